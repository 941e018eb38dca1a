package node

import (
	"context"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"

	"baton/agentd/decide"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/signal/learn"
)

// Guess models reach robots through the JetStream object store, by the
// version a round start names; a bad one is refused and the robot keeps
// the model it has.
func TestGuessModelDistribution(t *testing.T) {
	r := newRig(t)
	data, err := learn.Collect(r.m, decide.Config{Samples: 2, Horizon: 3}, 2, 1, nil)
	if err != nil {
		t.Fatal(err)
	}
	feat, _ := learn.FeaturizerFor(r.m)
	net, _ := learn.Train(feat, data, learn.TrainConfig{Epochs: 2, Seed: 1})
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	bucket := shell.ModelBucket("baton", "yard")
	publish := func(v uint64, corrupt bool) {
		blob, err := net.Marshal(v)
		if err != nil {
			t.Fatal(err)
		}
		if corrupt {
			blob[len(blob)/2] ^= 0xff
		}
		if err := shell.PublishModel(ctx, r.nc, bucket, v, blob); err != nil {
			t.Fatal(err)
		}
	}
	model := func(v uint64) func(*pb.RoundStart) {
		return func(rs *pb.RoundStart) { rs.GuessModelVersion, rs.GuessSource = v, "learned" }
	}
	publish(1, false)
	r.start(1, []uint32{0, 1}, model(1))
	waitFor(t, func() bool { return r.n.ModelVersion() == 1 })
	if g := testutil.ToFloat64(r.met.Model); g != 1 {
		t.Fatalf("model gauge %g", g)
	}
	// Version 2 is corrupt: refused, version 1 stays in use.
	publish(2, true)
	r.start(2, []uint32{0, 1}, model(2))
	waitFor(t, func() bool { return r.logs.FilterMessage("guess model refused; keeping the one in use").Len() == 1 })
	if v := r.n.ModelVersion(); v != 1 {
		t.Fatalf("after a bad model the robot uses version %d", v)
	}
	// A version that is not in the store at all is refused the same way.
	r.start(3, []uint32{0, 1}, model(9))
	waitFor(t, func() bool { return r.logs.FilterMessage("guess model refused; keeping the one in use").Len() == 2 })
	publish(4, false)
	r.start(4, []uint32{0, 1}, model(4))
	waitFor(t, func() bool { return r.n.ModelVersion() == 4 })
}
