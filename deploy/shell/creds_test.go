package shell

import (
	"context"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"go.uber.org/zap"
)

// With the generated identities on a real server: no anonymous client
// gets in; robot 2's key cannot publish on robot 1's decision subject (the
// server refuses it, no peer sees it) nor start rounds; each robot
// publishes its own decisions, and reads the guess models the
// coordinator stores.
func TestFleetIdentities(t *testing.T) {
	dir := t.TempDir()
	ids, err := FleetIdentities("baton", "yard", 3)
	if err != nil {
		t.Fatal(err)
	}
	if err := WriteFleetCredentials(filepath.Join(dir, "creds"), ids); err != nil {
		t.Fatal(err)
	}
	auth, _ := os.ReadFile(filepath.Join(dir, "creds", "authorization.conf"))
	conf := filepath.Join(dir, "server.conf")
	text := "listen: 127.0.0.1:-1\njetstream { store_dir: " + strings.ReplaceAll(filepath.Join(dir, "js"), `\`, `/`) + " }\n" + string(auth)
	if err := os.WriteFile(conf, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	opts, err := server.ProcessConfigFile(conf)
	if err != nil {
		t.Fatalf("the generated configuration does not load: %v\n%s", err, text)
	}
	url := runServer(t, opts)
	lg := zap.NewNop()
	if nc, err := nats.Connect(url, nats.MaxReconnects(0)); err == nil {
		nc.Close()
		t.Fatal("an anonymous client connected")
	}
	denied := make(chan error, 8)
	connect := func(name string) *nats.Conn {
		nc, err := Connect(url, filepath.Join(dir, "creds", name+".nk"), name, 5*time.Second, lg,
			nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) { denied <- err }))
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		t.Cleanup(nc.Close)
		return nc
	}
	coord, r1, r2 := connect("coordinator"), connect("robot-1"), connect("robot-2")
	got, err := coord.SubscribeSync("baton.yard.decision.*")
	if err != nil {
		t.Fatal(err)
	}
	coord.Flush()
	r2.Publish("baton.yard.decision.1", []byte("forged"))
	r2.Flush()
	select {
	case err := <-denied:
		if !strings.Contains(strings.ToLower(err.Error()), "permissions violation") {
			t.Fatalf("%v", err)
		}
	case <-time.After(3 * time.Second):
		t.Fatal("the server did not refuse robot 2 publishing as robot 1")
	}
	if m, err := got.NextMsg(300 * time.Millisecond); err == nil {
		t.Fatalf("a peer received the forged decision on %s", m.Subject)
	}
	r1.Publish("baton.yard.round", []byte("a round start"))
	r1.Flush()
	select {
	case <-denied:
	case <-time.After(3 * time.Second):
		t.Fatal("a robot may start rounds")
	}
	r2.Publish("baton.yard.decision.2", []byte("mine"))
	if m, err := got.NextMsg(3 * time.Second); err != nil || m.Subject != "baton.yard.decision.2" {
		t.Fatalf("robot 2's own decision: %v %v", m, err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	bucket := ModelBucket("baton", "yard")
	if err := PublishModel(ctx, coord, bucket, 1, []byte("model bytes")); err != nil {
		t.Fatalf("the coordinator cannot store a model: %v", err)
	}
	if b, err := FetchModel(ctx, r1, bucket, 1); err != nil || string(b) != "model bytes" {
		t.Fatalf("a robot cannot read the model: %q %v", b, err)
	}
}
