// Package wire converts between the Protocol Buffers messages on the bus
// (proto/baton.proto) and the round protocol's own types (agentd/turn). It
// is the only place the daemons decode protocol messages: a message over
// turn.MaxMessageBytes is refused before decoding, one that does not decode
// is refused with the reason, and everything else is converted field for
// field, unchecked, for the machines to admit.
//
// Decoding a message allocates at most AllocPerByte times its size plus
// AllocFixed bytes (the fuzz tests hold every decoder to it).
package wire

import (
	"errors"
	"fmt"

	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	"baton/agentd/turn"
	pb "baton/proto"
	"baton/sim/model"
)

// The documented allocation bound of one decode: packed 1-byte varints
// become 8-byte integers at worst, and repeated messages are counted before
// decoding (at most turn.MaxSightings of them).
const (
	AllocPerByte = 16
	AllocFixed   = 4 << 20
)

// Error is a message that was not decoded, with the drop reason to count.
type Error struct {
	Reason turn.DropReason
	Err    error
}

func (e *Error) Error() string { return string(e.Reason) + ": " + e.Err.Error() }
func (e *Error) Unwrap() error { return e.Err }

// Reason is the drop reason of a decode error (malformed for any other).
func Reason(err error) turn.DropReason {
	var we *Error
	if errors.As(err, &we) {
		return we.Reason
	}
	return turn.DropMalformed
}

var unmarshal = proto.UnmarshalOptions{DiscardUnknown: true}

// fleeted is every protocol message: each names its fleet.
type fleeted interface {
	proto.Message
	GetFleet() string
}

func decode(what string, data []byte, m fleeted) error {
	if len(data) > turn.MaxMessageBytes {
		return &Error{turn.DropOversize, fmt.Errorf("%s of %d bytes, over %d", what, len(data), turn.MaxMessageBytes)}
	}
	if err := unmarshal.Unmarshal(data, m); err != nil {
		return &Error{turn.DropMalformed, fmt.Errorf("%s does not decode: %v", what, err)}
	}
	if m.GetFleet() == "" {
		// Empty bytes decode to an empty message: that is no message.
		return &Error{turn.DropMalformed, fmt.Errorf("%s names no fleet", what)}
	}
	return nil
}

// countField counts top-level occurrences of field num, without decoding.
func countField(data []byte, num protowire.Number) (int, error) {
	n := 0
	for len(data) > 0 {
		f, typ, l := protowire.ConsumeTag(data)
		if l < 0 {
			return 0, protowire.ParseError(l)
		}
		data = data[l:]
		l = protowire.ConsumeFieldValue(f, typ, data)
		if l < 0 {
			return 0, protowire.ParseError(l)
		}
		data = data[l:]
		if f == num {
			n++
		}
	}
	return n, nil
}

// Start decodes a RoundStart.
func Start(data []byte) (turn.Start, error) {
	var m pb.RoundStart
	if err := decode("round start", data, &m); err != nil {
		return turn.Start{}, err
	}
	p := m.GetParams()
	return turn.Start{Fleet: m.Fleet, Epoch: m.Epoch, Round: m.Round, Sender: m.Sender,
		Scenario: m.GetState().GetScenario(), Ints: m.GetState().GetInts(), Reals: m.GetState().GetReals(),
		Order: m.Order, DeadlinesUs: m.DeadlinesUs, Mode: turn.Mode(m.Mode),
		Params: turn.Params{Samples: p.GetSamples(), Horizon: p.GetHorizon(), TerminalCost: p.GetTerminalCost(), Seed: p.GetFleetSeed()},
		Digest: m.ScenarioDigest, Guess: m.GuessSource, ModelVersion: m.GuessModelVersion, AgeUs: m.AgeUs}, nil
}

// EncodeStart encodes a round start.
func EncodeStart(s turn.Start) ([]byte, error) {
	return marshal(&pb.RoundStart{Fleet: s.Fleet, Epoch: s.Epoch, Round: s.Round, Sender: s.Sender,
		State: &pb.Snapshot{Scenario: s.Scenario, Ints: s.Ints, Reals: s.Reals}, Order: s.Order,
		DeadlinesUs: s.DeadlinesUs, Mode: pb.Mode(s.Mode),
		Params:         &pb.DecideParams{Samples: s.Params.Samples, Horizon: s.Params.Horizon, TerminalCost: s.Params.TerminalCost, FleetSeed: s.Params.Seed},
		ScenarioDigest: s.Digest, GuessSource: s.Guess, GuessModelVersion: s.ModelVersion, AgeUs: s.AgeUs})
}

// Decision decodes a Decision.
func Decision(data []byte) (turn.Decision, error) {
	var m pb.Decision
	if err := decode("decision", data, &m); err != nil {
		return turn.Decision{}, err
	}
	return turn.Decision{Fleet: m.Fleet, Epoch: m.Epoch, Round: m.Round, Robot: m.Robot, Control: m.Control,
		Heard: m.Heard, Guessed: m.Guessed, ComputeUs: m.ComputeUs, HopUs: m.HopUs, Sender: m.Sender}, nil
}

// EncodeDecision encodes a decision.
func EncodeDecision(d turn.Decision) ([]byte, error) {
	return marshal(&pb.Decision{Fleet: d.Fleet, Epoch: d.Epoch, Round: d.Round, Robot: d.Robot, Control: d.Control,
		Heard: d.Heard, Guessed: d.Guessed, ComputeUs: d.ComputeUs, HopUs: d.HopUs, Sender: d.Sender})
}

// Close decodes a RoundClose.
func Close(data []byte) (turn.Close, error) {
	var m pb.RoundClose
	if err := decode("round close", data, &m); err != nil {
		return turn.Close{}, err
	}
	return turn.Close{Fleet: m.Fleet, Epoch: m.Epoch, Round: m.Round, Sender: m.Sender, Controls: m.Controls,
		Held: m.Held, LatencyUs: m.LatencyUs, Stalled: m.Stalled}, nil
}

// EncodeClose encodes a round close.
func EncodeClose(c turn.Close) ([]byte, error) {
	return marshal(&pb.RoundClose{Fleet: c.Fleet, Epoch: c.Epoch, Round: c.Round, Sender: c.Sender, Controls: c.Controls,
		Held: c.Held, LatencyUs: c.LatencyUs, Stalled: c.Stalled})
}

// Report decodes an Observation.
func Report(data []byte) (turn.Report, error) {
	if len(data) <= turn.MaxMessageBytes {
		// Sightings are messages: count them before decoding allocates one
		// each.
		n, err := countField(data, 6)
		if err != nil {
			return turn.Report{}, &Error{turn.DropMalformed, fmt.Errorf("report does not decode: %v", err)}
		}
		if n > turn.MaxSightings {
			return turn.Report{}, &Error{turn.DropBounds, fmt.Errorf("report with %d sightings, over %d", n, turn.MaxSightings)}
		}
	}
	var m pb.Observation
	if err := decode("report", data, &m); err != nil {
		return turn.Report{}, err
	}
	seen := make([]model.Sighting, len(m.Seen))
	for i, s := range m.Seen {
		seen[i] = model.Sighting{What: s.GetWhat(), Value: s.GetValue()}
	}
	return turn.Report{Fleet: m.Fleet, Epoch: m.Epoch, Round: m.Round, Robot: m.Robot, Position: m.Position,
		Applied: m.Applied, Seen: seen, Sender: m.Sender}, nil
}

// EncodeReport encodes a report.
func EncodeReport(r turn.Report) ([]byte, error) {
	o := &pb.Observation{Fleet: r.Fleet, Epoch: r.Epoch, Round: r.Round, Robot: r.Robot, Position: r.Position,
		Applied: r.Applied, Sender: r.Sender, Seen: make([]*pb.Sighting, len(r.Seen))}
	for i, s := range r.Seen {
		o.Seen[i] = &pb.Sighting{What: s.What, Value: s.Value}
	}
	return marshal(o)
}

// Hello decodes a ReportRequest.
func Hello(data []byte) (turn.Hello, error) {
	var m pb.ReportRequest
	if err := decode("report request", data, &m); err != nil {
		return turn.Hello{}, err
	}
	return turn.Hello{Fleet: m.Fleet, Epoch: m.Epoch, Sender: m.Sender}, nil
}

// EncodeHello encodes a report request.
func EncodeHello(h turn.Hello) ([]byte, error) {
	return marshal(&pb.ReportRequest{Fleet: h.Fleet, Epoch: h.Epoch, Sender: h.Sender})
}

// marshal fails only on a string that is not UTF-8.
func marshal(m proto.Message) ([]byte, error) { return proto.Marshal(m) }
