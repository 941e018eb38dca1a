package node

import (
	"baton/sim/fuzzcheck"
	"strings"
	"testing"

	"baton/agentd/turn"
	"baton/sim/harbor"
)

// maxObservationAlloc bounds what reading one observation body allocates:
// the body is parsed twice (fields, then the report) at a few times its
// size.
const maxObservationAlloc = 32*MaxObservationBytes + 1<<20

// FuzzObservationBody feeds arbitrary bodies to the local interface's
// observation parser and what it accepts to the robot's machine: no panic,
// bounded allocation, and an accepted report is one the machine can judge.
func FuzzObservationBody(f *testing.F) {
	for _, s := range []string{
		`{"round":1,"position":3,"applied":0}`,
		`{"round":1,"position":3,"applied":3,"seen":[{"what":0,"value":-1}]}`,
		`{"round":1,"position":-4,"applied":0}`,
		`{"round":18446744073709551615,"position":2147483647,"applied":-1}`,
		`{"round":1,"pos":3}`, `null`, `{}`, `[]`, `not json`, `{"round":1e400,"position":1,"applied":1}`,
		`{"round":1,"position":3,"applied":0,"seen":[` + strings.Repeat(`{"what":0,"value":1},`, 100) + `{"what":1,"value":2}]}`,
	} {
		f.Add([]byte(s))
	}
	m, _ := harbor.Default(4)
	f.Fuzz(func(t *testing.T, body []byte) {
		var rep Report
		var err error
		n := fuzzcheck.Allocated(func() { rep, err = ParseReport(body) })
		if n > uint64(32*len(body)+1<<20) || n > maxObservationAlloc {
			t.Fatalf("%d-byte body allocated %d bytes", len(body), n)
		}
		if err != nil {
			return
		}
		mc := turn.New(turn.Config{Fleet: "yard", Robot: 1, Model: m, Sender: "r1"})
		if acts, err := mc.Observe(0, rep.Round, rep.Position, rep.Applied, rep.Seen); err == nil && acts[0].(turn.SendReport).Report.Robot != 1 {
			t.Fatalf("%+v", acts)
		}
	})
}
