package shell

import (
	"bytes"
	"context"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
)

// Models round-trip through a real JetStream object store, by version.
func TestModelStore(t *testing.T) {
	ns, url, err := EmbeddedNATS("127.0.0.1", 0)
	if err != nil {
		t.Fatal(err)
	}
	defer ns.Shutdown()
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	bucket := ModelBucket("baton", "yard.1")
	if strings.ContainsAny(bucket, ".") {
		t.Fatalf("bucket %q keeps a dot", bucket)
	}
	for v, body := range map[uint64][]byte{1: []byte("first"), 2: bytes.Repeat([]byte("x"), 300000)} {
		if err := PublishModel(ctx, nc, bucket, v, body); err != nil {
			t.Fatal(err)
		}
	}
	got, err := FetchModel(ctx, nc, bucket, 2)
	if err != nil || len(got) != 300000 {
		t.Fatalf("v2: %d bytes, %v", len(got), err)
	}
	if got, err := FetchModel(ctx, nc, bucket, 1); err != nil || string(got) != "first" {
		t.Fatalf("v1: %q %v", got, err)
	}
	if _, err := FetchModel(ctx, nc, bucket, 7); err == nil || !strings.Contains(err.Error(), "guess-v7") {
		t.Fatalf("missing version: %v", err)
	}
}

// noJetStreamServer is a connection to a server without JetStream.
func noJetStreamServer(t *testing.T) *nats.Conn {
	t.Helper()
	ns, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: server.RANDOM_PORT, NoSigs: true, NoLog: true})
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	if !ns.ReadyForConnections(5 * time.Second) {
		t.Fatal("no server")
	}
	t.Cleanup(ns.Shutdown)
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	return nc
}

func TestModelStoreWithoutJetStream(t *testing.T) {
	nc := noJetStreamServer(t)
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if err := PublishModel(ctx, nc, "b", 1, []byte("x")); err == nil || !strings.Contains(err.Error(), "JetStream") {
		t.Fatalf("want a no-JetStream error, got %v", err)
	}
}
