// Command agentd is one robot's Baton daemon; see `agentd -h`.
package main

import (
	"os"

	"baton/agentd/daemon"
)

func main() { os.Exit(daemon.Main(os.Args[1:])) }
