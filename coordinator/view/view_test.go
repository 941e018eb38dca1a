package view

import (
	"bufio"
	"context"
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"baton/coordinator/clock"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// record is a filed round of m from state x with controls u.
func record(m model.Fleet, x model.State, round uint64, u []int) clock.Record {
	ints, reals := m.Flatten(x, nil, nil)
	order := make([]int, m.Robots())
	for i := range order {
		order[i] = i
	}
	return clock.Record{Epoch: 9, Round: round, Mode: "hybrid", Order: order, Controls: u, Held: []int{},
		Snapshot: &clock.StateWire{Ints: ints, Reals: reals}, Stage: 3, LatencyUs: 2500}
}

// A harbor frame puts every boat on its cell and its arrow on the cell its
// control leads to; guesses and holds are told apart, with the reason.
func TestHarborFrame(t *testing.T) {
	m, _ := harbor.Default(3)
	x := m.NewState()
	m.Start(x, model.NewRNG(3).Rand)
	rec := record(m, x, 4, []int{harbor.North, harbor.East, 0})
	rec.Held = []int{2}
	stalled := 1
	rec.Mode, rec.Stalled = "sequential", &stalled
	rec.Decisions = []clock.Decision{{Robot: 1, Control: harbor.East, Heard: []uint32{}, Guessed: []uint32{0}}}
	f, err := FrameOf(m, rec)
	if err != nil {
		t.Fatal(err)
	}
	st := x.(*harbor.State)
	w := m.Width()
	for r, b := range st.Boats {
		if at := f.Robots[r].At; at.X != float64(int(b)%w) || at.Y != float64(int(b)/w) {
			t.Fatalf("robot %d drawn at %+v, its cell is %d", r, at, b)
		}
	}
	if to, at := f.Robots[0].To, f.Robots[0].At; to.Y != at.Y+1 && at.Y != float64(m.Height()-1) {
		t.Fatalf("north from %+v drawn to %+v", at, to)
	}
	if f.Robots[1].Action != "E" || len(f.Robots[1].Guessed) != 1 || f.Guessed != 1 {
		t.Fatalf("%+v", f.Robots[1])
	}
	if !f.Robots[2].Held || !strings.Contains(f.Robots[2].Why, "waited for robot 1") || f.Robots[2].To != f.Robots[2].At {
		t.Fatalf("%+v", f.Robots[2])
	}
	if len(f.Items) != len(st.Slicks) || f.LatencyMs != 2.5 {
		t.Fatalf("%d items for %d slicks, latency %g", len(f.Items), len(st.Slicks), f.LatencyMs)
	}
	rec.Controls[0] = 99
	if _, err := FrameOf(m, rec); err == nil {
		t.Fatal("a control out of range was drawn")
	}
}

// An upkeep frame has one item per site with the belief of its wear.
func TestUpkeepFrame(t *testing.T) {
	m, err := upkeep.Default(2)
	if err != nil {
		t.Fatal(err)
	}
	x := m.NewState()
	m.Start(x, model.NewRNG(1).Rand)
	site, err := NewSite("park", m)
	if err != nil {
		t.Fatal(err)
	}
	f, err := FrameOf(m, record(m, x, 1, []int{1, 0}))
	if err != nil {
		t.Fatal(err)
	}
	if site.Map.Kind != "graph" || len(f.Items) != len(site.Map.Places) || len(site.Map.Links) == 0 {
		t.Fatalf("map %+v, %d items", site.Map, len(f.Items))
	}
	for _, it := range f.Items {
		if it.Value < 0 || it.Value > 1 || it.Label == "" {
			t.Fatalf("%+v", it)
		}
	}
	if f.Robots[1].Action != "service" || f.Robots[0].Action == "service" {
		t.Fatalf("%+v", f.Robots)
	}
}

// The live feed: frames.json keeps the last rounds (since=N filters), the
// event stream delivers each new round, and a bad query is refused.
func TestLiveFeed(t *testing.T) {
	m, _ := harbor.Default(2)
	x := m.NewState()
	m.Start(x, model.NewRNG(1).Rand)
	site, _ := NewSite("yard", m)
	live, err := NewLive(site)
	if err != nil {
		t.Fatal(err)
	}
	srv := httptest.NewServer(live.Handler())
	defer srv.Close()
	add := func(round uint64) {
		f, err := FrameOf(m, record(m, x, round, []int{0, 0}))
		if err != nil {
			t.Fatal(err)
		}
		live.Add(f)
	}
	for r := uint64(1); r <= Keep+5; r++ {
		add(r)
	}
	var frames []Frame
	get := func(path string, v any) int {
		resp, err := http.Get(srv.URL + path)
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		if v != nil && resp.StatusCode == 200 {
			if err := json.NewDecoder(resp.Body).Decode(v); err != nil {
				t.Fatal(err)
			}
		}
		return resp.StatusCode
	}
	get("/view/frames.json", &frames)
	if len(frames) != Keep || frames[0].Round != 6 || frames[Keep-1].Round != Keep+5 {
		t.Fatalf("%d frames, %d..%d", len(frames), frames[0].Round, frames[len(frames)-1].Round)
	}
	get("/view/frames.json?since=600", &frames)
	if len(frames) != 5 || frames[0].Round != 601 {
		t.Fatalf("since: %d frames from %d", len(frames), frames[0].Round)
	}
	if code := get("/view/frames.json?since=x", nil); code != 400 {
		t.Fatalf("since=x: %d", code)
	}
	var s Site
	if get("/view/site.json", &s); s.Mode != "live" || s.Fleet != "yard" || s.Map.Kind != "grid" {
		t.Fatalf("%+v", s)
	}
	if code := get("/view", nil); code != 200 {
		t.Fatalf("/view: %d", code)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	req, _ := http.NewRequestWithContext(ctx, "GET", srv.URL+"/view/events", nil)
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	go func() {
		time.Sleep(100 * time.Millisecond)
		add(Keep + 6)
	}()
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		if data, ok := strings.CutPrefix(sc.Text(), "data: "); ok {
			var f Frame
			if err := json.Unmarshal([]byte(data), &f); err != nil || f.Round != Keep+6 {
				t.Fatalf("event %q: %v", data, err)
			}
			return
		}
	}
	t.Fatalf("no frame event: %v", sc.Err())
}

// A page that stops reading is dropped rather than let the feed grow.
func TestSlowPageDropped(t *testing.T) {
	m, _ := harbor.Default(2)
	x := m.NewState()
	m.Start(x, model.NewRNG(1).Rand)
	site, _ := NewSite("yard", m)
	live, _ := NewLive(site)
	ch := make(chan []byte, subBuffer)
	live.subs[ch] = struct{}{}
	f, _ := FrameOf(m, record(m, x, 1, []int{0, 0}))
	for range subBuffer + 1 {
		live.Add(f)
	}
	if _, ok := live.subs[ch]; ok {
		t.Fatal("a page that fell behind is still fed")
	}
}

// The self-contained page carries the log inline, and nothing in the data
// can end its script element early.
func TestWriteHTML(t *testing.T) {
	m, _ := harbor.Default(2)
	x := m.NewState()
	m.Start(x, model.NewRNG(1).Rand)
	site, _ := NewSite("yard</script><b>", m)
	f, _ := FrameOf(m, record(m, x, 1, []int{0, 0}))
	var b strings.Builder
	if err := WriteHTML(&b, site, []Frame{f}); err != nil {
		t.Fatal(err)
	}
	page := b.String()
	if strings.Count(page, "</script>") != 2 || !strings.Contains(page, `id="baton-data"`) || strings.Contains(page, `src="/view/view.js"`) {
		t.Fatalf("page:\n%s", page[:min(len(page), 2000)])
	}
}
