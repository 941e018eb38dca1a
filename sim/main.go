// Command sim is Baton's simulator: a whole fleet on this machine,
// comparisons of policies on seeded episodes, exact solutions of tiny
// instances, drills, training, replays (package sim/cli).
//
//	sim fleet --scenario harbor --robots 6 --rounds 200 --seed 1 --view
//	sim compare --scenario harbor --robots 4 --episodes 30 --seed 7
package main

import (
	"os"

	"baton/sim/cli"
)

func main() { os.Exit(cli.Main(os.Args[1:])) }
