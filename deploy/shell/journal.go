package shell

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// The durable decision log: a file-backed JetStream stream per fleet that
// the coordinator appends to, so a coordinator killed mid-run (or its
// host) loses no round it closed, and its successor continues the round
// numbering from it. Records are JSON decision-log lines (the same lines
// --decision-log writes), on two subjects:
//
//	<prefix>.<fleet>.log.closed  a round's decisions, written before its
//	                             close is published (write-ahead)
//	<prefix>.<fleet>.log.filed   the same round once the robots' reports
//	                             are filed (stage cost, reports)
//
// Every record carries its run's epoch; each is published with a message id
// "<epoch>.<round>.<kind>", so a retried append is stored once.

// Journal kinds (the last token of the subject).
const (
	JournalClosed = "closed"
	JournalFiled  = "filed"
)

// MaxJournalRecord bounds one record read back from the stream: a round's
// line holds the state and one decision per robot, far below this.
const MaxJournalRecord = 4 << 20

// JournalOptions sizes the stream.
type JournalOptions struct {
	// Replicas: copies kept by a JetStream cluster (1 on a single server;
	// 3 on the three-node cluster in deploy/nats).
	Replicas int
	// MaxBytes: the oldest records go first beyond this (0:
	// DefaultJournalBytes). The server reserves it from its JetStream
	// file store.
	MaxBytes int64
}

// DefaultJournalBytes keeps about 50,000 rounds of a 16-robot fleet (a
// round's two records take 2-5 kB).
const DefaultJournalBytes = 256 << 20

// JournalStream names a fleet's stream.
func JournalStream(prefix, fleet string) string {
	return bucketSafe.ReplaceAllString(prefix+"_"+fleet+"_log", "_")
}

// JournalSubject is the subject records of kind go to ("" kind: both).
func JournalSubject(prefix, fleet, kind string) string {
	if kind == "" {
		kind = "*"
	}
	return prefix + "." + fleet + ".log." + kind
}

// Journal appends to a fleet's durable decision log.
type Journal struct {
	js            jetstream.JetStream
	stream        jetstream.Stream
	prefix, fleet string
}

// OpenJournal creates the fleet's stream, or updates its limits, and
// returns a writer for it.
func OpenJournal(ctx context.Context, nc *nats.Conn, prefix, fleet string, o JournalOptions) (*Journal, error) {
	js, err := jetstream.New(nc)
	if err != nil {
		return nil, err
	}
	if o.Replicas == 0 {
		o.Replicas = 1
	}
	if o.MaxBytes == 0 {
		o.MaxBytes = DefaultJournalBytes
	}
	name := JournalStream(prefix, fleet)
	st, err := js.CreateOrUpdateStream(ctx, jetstream.StreamConfig{
		Name:        name,
		Description: "Baton decision log of fleet " + fleet,
		Subjects:    []string{JournalSubject(prefix, fleet, "")},
		Storage:     jetstream.FileStorage,
		Replicas:    o.Replicas,
		MaxBytes:    o.MaxBytes,
		Discard:     jetstream.DiscardOld,
		MaxMsgSize:  MaxJournalRecord,
		Duplicates:  2 * time.Minute,
	})
	if err != nil {
		if noJetStream(err) {
			return nil, ErrNoJetStream
		}
		return nil, fmt.Errorf("decision log stream %s: %w", name, err)
	}
	return &Journal{js: js, stream: st, prefix: prefix, fleet: fleet}, nil
}

// Append stores one record and waits for the server's acknowledgement.
func (j *Journal) Append(ctx context.Context, kind string, epoch, round uint64, line []byte) error {
	msg := nats.NewMsg(JournalSubject(j.prefix, j.fleet, kind))
	msg.Data = line
	msg.Header.Set(jetstream.MsgIDHeader, fmt.Sprintf("%d.%d.%s", epoch, round, kind))
	if _, err := j.js.PublishMsg(ctx, msg); err != nil {
		return fmt.Errorf("decision log stream %s: round %d (%s): %w", JournalStream(j.prefix, j.fleet), round, kind, err)
	}
	return nil
}

// LastClosed is the last round any run of the fleet closed, from the last
// write-ahead record (0: none). Round numbers only grow across runs, so the
// last record holds the largest.
func (j *Journal) LastClosed(ctx context.Context) (epoch, round uint64, err error) {
	m, err := j.stream.GetLastMsgForSubject(ctx, JournalSubject(j.prefix, j.fleet, JournalClosed))
	if errors.Is(err, jetstream.ErrMsgNotFound) {
		return 0, 0, nil
	}
	if err != nil {
		return 0, 0, fmt.Errorf("decision log stream %s: %w", JournalStream(j.prefix, j.fleet), err)
	}
	var rec struct {
		Epoch uint64 `json:"epoch"`
		Round uint64 `json:"round"`
	}
	if err := json.Unmarshal(m.Data, &rec); err != nil {
		return 0, 0, fmt.Errorf("decision log stream %s: last closed record (sequence %d): %w", JournalStream(j.prefix, j.fleet), m.Sequence, err)
	}
	return rec.Epoch, rec.Round, nil
}

// JournalRecord is one record read back.
type JournalRecord struct {
	Kind     string
	Sequence uint64
	Data     []byte
}

// ReadJournal calls fn with every record in the fleet's stream, oldest
// first, and returns once it has read up to the last record there when it
// began. Records larger than MaxJournalRecord are refused.
func ReadJournal(ctx context.Context, nc *nats.Conn, prefix, fleet string, fn func(JournalRecord) error) error {
	js, err := jetstream.New(nc)
	if err != nil {
		return err
	}
	name := JournalStream(prefix, fleet)
	st, err := js.Stream(ctx, name)
	if err != nil {
		if noJetStream(err) {
			return ErrNoJetStream
		}
		if errors.Is(err, jetstream.ErrStreamNotFound) {
			return fmt.Errorf("no decision log stream %s on this server (wrong --fleet or --prefix, or the coordinator ran with --log-stream=false)", name)
		}
		return fmt.Errorf("decision log stream %s: %w", name, err)
	}
	info, err := st.Info(ctx)
	if err != nil {
		return fmt.Errorf("decision log stream %s: %w", name, err)
	}
	if info.State.Msgs == 0 {
		return nil
	}
	// Record by record (a direct request each): slower than a consumer,
	// but nothing to set up that a cluster failover could take away, and
	// each request is simply asked again.
	closed := JournalSubject(prefix, fleet, JournalClosed)
	for seq := info.State.FirstSeq; seq <= info.State.LastSeq; seq++ {
		var m *jetstream.RawStreamMsg
		for try := 0; ; try++ {
			if m, err = st.GetMsg(ctx, seq); err == nil || errors.Is(err, jetstream.ErrMsgNotFound) || try == 4 || ctx.Err() != nil {
				break
			}
			time.Sleep(250 * time.Millisecond)
		}
		if errors.Is(err, jetstream.ErrMsgNotFound) {
			continue // removed (the oldest go first past the stream's size)
		}
		if err != nil {
			return fmt.Errorf("decision log stream %s: reading record %d: %w", name, seq, err)
		}
		if len(m.Data) > MaxJournalRecord {
			return fmt.Errorf("decision log stream %s: record %d is %d bytes (at most %d)", name, seq, len(m.Data), MaxJournalRecord)
		}
		kind := JournalFiled
		if m.Subject == closed {
			kind = JournalClosed
		}
		if err := fn(JournalRecord{Kind: kind, Sequence: seq, Data: m.Data}); err != nil {
			return err
		}
	}
	return nil
}

// JournalSize is what a fleet's stream holds: bytes and records.
func JournalSize(ctx context.Context, nc *nats.Conn, prefix, fleet string) (bytes, records uint64, err error) {
	js, err := jetstream.New(nc)
	if err != nil {
		return 0, 0, err
	}
	st, err := js.Stream(ctx, JournalStream(prefix, fleet))
	if err != nil {
		return 0, 0, err
	}
	info, err := st.Info(ctx)
	if err != nil {
		return 0, 0, err
	}
	return info.State.Bytes, info.State.Msgs, nil
}
