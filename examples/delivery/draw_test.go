package delivery

import (
	"strings"
	"testing"

	"baton/sim/model"
)

func TestDrawing(t *testing.T) {
	m := mustDefault(t, 3)
	mp := m.Map()
	if mp.Kind != "graph" || len(mp.Places) != 12 || len(mp.Links) != 16 {
		t.Fatalf("map: %s, %d places, %d links", mp.Kind, len(mp.Places), len(mp.Links))
	}
	if p := mp.Places[11]; p.Name != "lighthouse" || p.X != 10 || p.Y != 0 {
		t.Errorf("place 11: %+v", p)
	}
	for _, l := range mp.Links {
		if l[0] >= l[1] || m.Distance(l[0], l[1]) != 1 {
			t.Errorf("link %v: each road once, lower index first", l)
		}
	}
	s := start(m)
	items := m.Items(s)
	if len(items) != 3 {
		t.Fatalf("%d items, want the 3 start parcels", len(items))
	}
	if it := items[0]; it.Kind != "parcel" || !it.Alarm || it.Label != "parcel 0 for clinic, waiting at market" || it.X <= 4 || it.X > 4.5 {
		t.Errorf("item 0: %+v", it)
	}
	// Robot 0 steps onto the market twice (hub -> mill -> market), picks
	// up the parcel: it is drawn on board, and the robot's aim follows.
	rng := model.NewRNG(1)
	m.Step(s, []int{1, 0, 0}, rng.Rand)
	if a := m.Aim(s, 0, 2); a != m.point(3) {
		t.Errorf("aim from the mill with control 2: %v, want the market %v", a, m.point(3))
	}
	m.Step(s, []int{2, 0, 0}, rng.Rand)
	if sp := m.Spot(s, 0); sp != (model.Point{X: 4, Y: 0}) {
		t.Errorf("robot 0 at %v, want the market", sp)
	}
	on := 0
	for _, it := range m.Items(s) {
		if strings.Contains(it.Label, "on robot 0") {
			on++
			if it.Alarm || it.Label != "parcel 0 for clinic, on robot 0" {
				t.Errorf("carried parcel: %+v", it)
			}
		}
	}
	if on != 1 {
		t.Errorf("%d parcels drawn on robot 0, want 1", on)
	}
}
