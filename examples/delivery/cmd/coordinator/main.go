// Command coordinator is the round clock of a delivery fleet: Baton's own
// coordinator (baton/coordinator/server), built with the delivery scenario
// registered; see `coordinator -h`.
package main

import (
	"os"

	"baton/coordinator/server"

	_ "example.com/delivery" // registers scenario "delivery"
)

func main() { os.Exit(server.Main(os.Args[1:])) }
