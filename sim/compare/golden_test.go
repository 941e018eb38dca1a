package compare

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"testing"

	"baton/agentd/decide"
	"baton/sim/assign"
	"baton/sim/auction"
	"baton/sim/episode"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// recorder digests every joint control a policy decides.
type recorder struct {
	decide.Policy
	d [8]byte
	s interface{ Write([]byte) (int, error) }
}

func (r *recorder) Decide(x model.State, round int, out []int) (decide.Stats, error) {
	st, err := r.Policy.Decide(x, round, out)
	for _, c := range out {
		binary.LittleEndian.PutUint64(r.d[:], uint64(c))
		r.s.Write(r.d[:])
	}
	return st, err
}

// Golden digests: for fixed seeds, every policy's decisions on both
// scenarios, so speed work on the hot paths can show it decides exactly as
// before (bit for bit: the same controls, step by step). A change that is
// meant to alter decisions updates these with the reason in its commit.
func TestGoldenDecisions(t *testing.T) {
	golden := map[string]string{}
	hm, _ := harbor.Default(4)
	um, _ := upkeep.Default(3)
	cfg := decide.Config{Samples: 6, Horizon: 8}
	for _, c := range []struct {
		name string
		m    model.Model
	}{{"harbor", hm}, {"upkeep", um}} {
		wrapped, err := assign.Wrap(c.m)
		if err != nil {
			t.Fatal(err)
		}
		ap, err := auction.NewPolicy(c.m, auction.Config{})
		if err != nil {
			t.Fatal(err)
		}
		d, da, dq := decide.New(c.m, cfg), decide.New(wrapped, cfg), decide.New(ap.Model(), cfg)
		for _, pol := range []string{Base, OneAtTime, Assignment, OneOnAssign, Auction, OneOnAuction} {
			h := sha256.New()
			for e := range 3 {
				seed := episode.Seed(5, e)
				var p decide.Policy
				switch pol {
				case Base:
					p = decide.Base{M: c.m}
				case OneAtTime:
					p = decide.OneAtATimePolicy{D: d, Seed: episode.FleetSeed(seed)}
				case Assignment:
					p = decide.Base{M: wrapped}
				case OneOnAssign:
					p = decide.OneAtATimePolicy{D: da, Seed: episode.FleetSeed(seed)}
				case Auction:
					p = ap
				case OneOnAuction:
					p = decide.OneAtATimePolicy{D: dq, Seed: episode.FleetSeed(seed)}
				}
				if _, err := episode.Run(c.m, &recorder{Policy: p, s: h}, seed, nil); err != nil {
					t.Fatal(err)
				}
			}
			golden[c.name+" "+pol] = hex.EncodeToString(h.Sum(nil))[:16]
		}
	}
	for k, got := range golden {
		if want := goldenDigests[k]; got != want {
			t.Errorf("%s decides differently: digest %s, golden %s", k, got, want)
		}
	}
}

var goldenDigests = map[string]string{
	"harbor assignment":               "3eab2d7fbf5ed42f",
	"harbor auction":                  "1183514b1b7dcf96",
	"harbor one-at-a-time+auction":    "b6b3a8f7be5a202d",
	"upkeep auction":                  "e7a5efd67166d73d",
	"upkeep one-at-a-time+auction":    "62fd92bc6a0cfdde",
	"harbor base":                     "0daf0d48cbd30c44",
	"harbor one-at-a-time":            "ab7738cbdd903b4d",
	"harbor one-at-a-time+assignment": "9dfc9ea8c3e496a1",
	"upkeep assignment":               "04bbf51d603be312",
	"upkeep base":                     "d175dcdac7a46f6f",
	"upkeep one-at-a-time":            "dafe3298903f4af3",
	"upkeep one-at-a-time+assignment": "f3eed38404fd6095",
}
