// Command coordinator is the round clock of one Baton fleet; see
// `coordinator -h`.
package main

import (
	"os"

	"baton/coordinator/server"
)

func main() { os.Exit(server.Main(os.Args[1:])) }
