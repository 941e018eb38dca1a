// Package signal provides guesses: stand-ins for predecessors' decisions
// that did not arrive in time.
package signal

import (
	"fmt"

	"baton/sim/model"
)

// Source guesses robot r's control in state x.
type Source interface {
	Name() string
	Guess(x model.State, r int) int
}

// Base guesses the base policy's control: cheap, and what the robot would
// assume of a successor anyway.
type Base struct{ M model.Model }

func (Base) Name() string                     { return "base" }
func (b Base) Guess(x model.State, r int) int { return b.M.Base(x, r) }

// Names lists the guess sources this build knows.
func Names() []string { return []string{"base"} }

// New returns the named guess source for m.
func New(name string, m model.Model) (Source, error) {
	switch name {
	case "base", "":
		return Base{M: m}, nil
	}
	return nil, fmt.Errorf("unknown guess source %q (known: base)", name)
}
