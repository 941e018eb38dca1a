package cli

import (
	"fmt"
	"os"
	"path/filepath"

	"baton/agentd/turn"
	"baton/deploy/shell"
	pb "baton/proto"
)

func cmdCreds(args []string) error {
	fs := newFlags("creds", `Makes a fleet's NATS identities: an nkey per process (coordinator.nk,
robot-<r>.nk; pass each with --creds) and the server's authorization block
(authorization.conf; include it in the NATS server configuration), and
for each robot host's leaf node its identity (robot-<r>.leaf.conf; install
it as leaf-identity.conf next to deploy/nats/leaf-robot.conf). Each
robot may publish only its own decisions and observations, the
coordinator only round starts, closes, report requests and guess models.

  sim creds --fleet yard --robots 4 --out /etc/baton/creds`)
	fleet := fs.String("fleet", "demo", "fleet id")
	prefix := fs.String("prefix", "baton", "NATS subject prefix")
	robots := fs.Int("robots", 0, "robots in the fleet (required)")
	out := fs.String("out", "", "directory to write into (created; refuses one that already holds identities)")
	if err := parse(fs, args); err != nil {
		return err
	}
	switch {
	case *out == "":
		fmt.Fprintln(fs.Output(), "sim creds: --out is required")
		return errUsage
	case *robots < 1 || *robots > turn.MaxRobots:
		return fmt.Errorf("--robots %d: a fleet has 1..%d robots", *robots, turn.MaxRobots)
	}
	if _, err := pb.NewSubjects(*prefix, *fleet); err != nil {
		return err
	}
	if _, err := os.Stat(filepath.Join(*out, "coordinator.nk")); err == nil {
		return fmt.Errorf("--out %s already holds a fleet's identities; rotating them means a new directory (and a server reload)", *out)
	}
	ids, err := shell.FleetIdentities(*prefix, *fleet, *robots)
	if err != nil {
		return err
	}
	if err := shell.WriteFleetCredentials(*out, ids); err != nil {
		return err
	}
	fmt.Printf("wrote %d identities and authorization.conf to %s\n", len(ids), *out)
	fmt.Printf("NATS server: include %s in its configuration\n", filepath.Join(*out, "authorization.conf"))
	fmt.Printf("coordinator: --creds %s;  agentd --robot R: --creds %s\n", filepath.Join(*out, "coordinator.nk"), filepath.Join(*out, "robot-R.nk"))
	fmt.Printf("a leaf node on robot R's host: %s as leaf-identity.conf\n", filepath.Join(*out, "robot-R.leaf.conf"))
	return nil
}
