package batonpb

import (
	"fmt"
	"regexp"
)

// Subjects are the NATS subjects of one fleet.
type Subjects struct {
	Round    string // RoundStart, coordinator -> robots
	Decision string // wildcard for all robots' decisions
	Close    string // RoundClose, coordinator -> robots
	Obs      string // wildcard for all robots' observations
	Hello    string // ReportRequest, coordinator -> robots
	prefix   string
}

var token = regexp.MustCompile(`^[A-Za-z0-9_-]+$`)

// NewSubjects checks prefix and fleet are single NATS tokens.
func NewSubjects(prefix, fleet string) (Subjects, error) {
	if !token.MatchString(prefix) {
		return Subjects{}, fmt.Errorf("--prefix %q: use letters, digits, - and _ only", prefix)
	}
	if !token.MatchString(fleet) {
		return Subjects{}, fmt.Errorf("--fleet %q: use letters, digits, - and _ only", fleet)
	}
	p := prefix + "." + fleet
	return Subjects{Round: p + ".round", Decision: p + ".decision.*", Close: p + ".close", Obs: p + ".obs.*", Hello: p + ".hello", prefix: p}, nil
}

// DecisionOf is the subject robot r publishes its decision on.
func (s Subjects) DecisionOf(r int) string { return fmt.Sprintf("%s.decision.%d", s.prefix, r) }

// ObsOf is the subject robot r reports observations on.
func (s Subjects) ObsOf(r int) string { return fmt.Sprintf("%s.obs.%d", s.prefix, r) }
