// Command agentd is one delivery robot's Baton daemon: Baton's own agentd
// (baton/agentd/daemon), built with the delivery scenario registered; see
// `agentd -h`.
package main

import (
	"os"

	"baton/agentd/daemon"

	_ "example.com/delivery" // registers scenario "delivery"
)

func main() { os.Exit(daemon.Main(os.Args[1:])) }
