package shell

import (
	"context"
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
)

// The durable log on a real server: records in order with their kinds, a
// retried append stored once, the last closed round found, and all of it
// still there after the server restarts on the same store.
func TestJournal(t *testing.T) {
	store := t.TempDir()
	ns, url, err := EmbeddedNATSAt("127.0.0.1", 0, store)
	if err != nil {
		t.Fatal(err)
	}
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	j, err := OpenJournal(ctx, nc, "baton", "yard.1", JournalOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if _, last, err := j.LastClosed(ctx); err != nil || last != 0 {
		t.Fatalf("empty log: last %d, %v", last, err)
	}
	line := func(epoch, round uint64) []byte { return fmt.Appendf(nil, `{"epoch":%d,"round":%d}`, epoch, round) }
	appends := []struct {
		kind         string
		epoch, round uint64
	}{{JournalClosed, 5, 1}, {JournalFiled, 5, 1}, {JournalClosed, 5, 2}, {JournalClosed, 5, 2}, {JournalClosed, 9, 3}}
	for _, a := range appends {
		if err := j.Append(ctx, a.kind, a.epoch, a.round, line(a.epoch, a.round)); err != nil {
			t.Fatal(err)
		}
	}
	if ep, last, err := j.LastClosed(ctx); err != nil || last != 3 || ep != 9 {
		t.Fatalf("last closed: round %d of run %d, %v", last, ep, err)
	}
	nc.Close()
	ns.Shutdown()

	// A restarted server on the same store has every record.
	ns, url, err = EmbeddedNATSAt("127.0.0.1", 0, store)
	if err != nil {
		t.Fatal(err)
	}
	defer ns.Shutdown()
	nc, err = nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	var got []string
	err = ReadJournal(ctx, nc, "baton", "yard.1", func(r JournalRecord) error {
		got = append(got, r.Kind+" "+string(r.Data))
		return nil
	})
	want := []string{`closed {"epoch":5,"round":1}`, `filed {"epoch":5,"round":1}`, `closed {"epoch":5,"round":2}`, `closed {"epoch":9,"round":3}`}
	if err != nil || strings.Join(got, "|") != strings.Join(want, "|") {
		t.Fatalf("read back %q (%v), want %q (the repeated append once)", got, err, want)
	}
	if err := ReadJournal(ctx, nc, "baton", "other", func(JournalRecord) error { return nil }); err == nil || !strings.Contains(err.Error(), "--fleet") {
		t.Fatalf("missing stream: %v", err)
	}
}

func TestJournalWithoutJetStream(t *testing.T) {
	nc := noJetStreamServer(t)
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if _, err := OpenJournal(ctx, nc, "baton", "yard", JournalOptions{}); err != ErrNoJetStream {
		t.Fatalf("want ErrNoJetStream, got %v", err)
	}
}
