package shell

import (
	"flag"

	pb "baton/proto"
)

// Hooks let a program that embeds a daemon's command line add to it. The
// production binaries (./agentd, ./coordinator) pass none, so nothing set
// through hooks can be switched on in them; `sim` uses them to put the
// drills' fault layer between a daemon and its bus.
type Hooks struct {
	// Flags registers extra flags before parsing; Parsed checks them
	// right after, before anything connects.
	Flags  func(fs *flag.FlagSet)
	Parsed func() error
	// Bus wraps the daemon's bus once flags are parsed; self is the
	// robot's id, or -1 for the coordinator. Close is called on exit.
	Bus func(b Bus, self int, subjects pb.Subjects) (wrapped Bus, close func(), err error)
}
