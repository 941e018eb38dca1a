// Package cli is the `sim` command (Baton's fleet simulator): fleets on
// one machine, comparisons, drills, training, replays, and the daemons
// themselves. Its Main is all a `sim` binary needs, so an integrator's own
// module builds its own sim, with its own scenarios registered
// (sim/scenarios.Register), by calling it:
//
//	func main() { os.Exit(cli.Main(os.Args[1:])) }
//
// The fleets it starts re-run that same binary as `sim agentd` and `sim
// coordinator`, so they know the same scenarios.
package cli

import (
	"errors"
	"fmt"
	"os"

	"baton/agentd/daemon"
	"baton/coordinator/server"
)

const usage = `sim: Baton's fleet simulator

usage: sim <command> [flags]

commands:
  compare   base vs all-at-once vs one-at-a-time rollout on seeded episodes
  exact     exact costs of optimal, base and both rollouts on a tiny instance
  fleet     a whole fleet on this machine: embedded NATS, coordinator, one agentd per robot
  drive     play the world through the local interfaces of daemons running elsewhere
  bench     bench rounds: hop and round latency against the physics;
            bench security: round latency with and without TLS and per-process permissions;
            bench search: the rollout hot path, each speed-up on and off, in one run
  soak      a process fleet for many rounds under loss: goroutines, heap, fds, log size
  creds     a fleet's NATS identities (nkeys) and the server's permissions
  replay    rebuild an episode from a decision log (durable stream or file), recompute its cost
  drill     run a drill file: fleets through scheduled faults, and what each costs
  train     learn a stand-in for rollout (the learned guess source); --iterations K
            repeats train-then-use-as-base (approximate policy iteration)
  agentd, coordinator   the daemons themselves (as ./agentd and ./coordinator)

Run 'sim <command> -h' for a command's flags.
`

// Main runs the sim command with args (without the program name) and
// returns the exit code.
func Main(args []string) int {
	if len(args) == 0 {
		fmt.Fprint(os.Stderr, usage)
		return 2
	}
	var err error
	switch args[0] {
	case "compare":
		err = cmdCompare(args[1:])
	case "exact":
		err = cmdExact(args[1:])
	case "fleet":
		err = cmdFleet(args[1:])
	case "drive":
		err = cmdDrive(args[1:])
	case "bench":
		err = cmdBench(args[1:])
	case "train":
		err = cmdTrain(args[1:])
	case "agentd":
		// The same daemon as ./agentd, so `sim fleet` can start real
		// processes from this one binary.
		return daemon.MainWith(args[1:], drillHooks())
	case "coordinator":
		return server.MainWith(args[1:], drillHooks())
	case "drill":
		err = cmdDrill(args[1:])
	case "creds":
		err = cmdCreds(args[1:])
	case "soak":
		err = cmdSoak(args[1:])
	case "replay":
		err = cmdReplay(args[1:])
	case "-h", "-help", "--help", "help":
		fmt.Print(usage)
		return 0
	default:
		fmt.Fprintf(os.Stderr, "sim: unknown command %q\n\n%s", args[0], usage)
		return 2
	}
	if err == errUsage {
		return 2
	}
	if errors.Is(err, errInterrupted) {
		fmt.Fprintln(os.Stderr, "sim:", err)
		return 130
	}
	if err != nil {
		fmt.Fprintln(os.Stderr, "sim:", err)
		return 1
	}
	return 0
}
