package batonpb

import (
	"fmt"
	"regexp"
	"strings"
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

// RobotOf is the robot a decision or observation subject names, or -1 when
// subject is neither (or names a number that is no robot id).
func (s Subjects) RobotOf(subject string) int {
	rest, ok := strings.CutPrefix(subject, s.prefix+".")
	if !ok {
		return -1
	}
	if r, ok := strings.CutPrefix(rest, "decision."); ok {
		rest = r
	} else if r, ok := strings.CutPrefix(rest, "obs."); ok {
		rest = r
	} else {
		return -1
	}
	if rest == "" || len(rest) > 7 {
		return -1
	}
	n := 0
	for _, c := range rest {
		if c < '0' || c > '9' {
			return -1
		}
		n = n*10 + int(c-'0')
	}
	if len(rest) > 1 && rest[0] == '0' {
		return -1 // "07" is not how robot 7's subject is spelled
	}
	return n
}
