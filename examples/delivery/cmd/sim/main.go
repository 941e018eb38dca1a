// Command sim is Baton's simulator (baton/sim/cli) built with the delivery
// scenario registered: whole fleets on this machine, comparisons on seeded
// episodes, training of learned guesses, drills and replays, all with
// --scenario delivery. The fleets it starts re-run this same binary as
// `sim agentd` and `sim coordinator`, so they know the scenario too.
//
//	go run ./cmd/sim fleet --scenario delivery --robots 3 --rounds 200 --view
//	go run ./cmd/sim compare --scenario delivery --robots 3 --episodes 20
package main

import (
	"os"

	"baton/sim/cli"

	_ "example.com/delivery" // registers scenario "delivery"
)

func main() { os.Exit(cli.Main(os.Args[1:])) }
