package shell

import (
	"bytes"
	"fmt"
	"os"
	"path/filepath"
	"strings"

	"github.com/nats-io/nkeys"
)

// Identity is one process's NATS identity: an nkey user whose seed file
// the process passes with --creds, and what the server lets it do.
type Identity struct {
	Name      string // "coordinator" or "robot-<r>"
	Seed      []byte // the user's nkey seed (secret: it goes in the seed file only)
	Public    string // the user's public key (goes in the server's config)
	Publish   []string
	Subscribe []string
}

// HubDomain is the JetStream domain of the fleet's NATS cluster
// (deploy/nats/node-<x>.conf). A robot host's leaf node
// (deploy/nats/leaf-robot.conf) runs no JetStream of its own and maps the
// JetStream API into this domain, so agentd behind a leaf reads the guess
// models from the cluster with the plain API.
const HubDomain = "hub"

// FleetIdentities makes a fresh nkey identity for the coordinator and for
// every robot, each allowed to publish only what its role sends: the
// coordinator round starts, closes and report requests (and its guess
// models, through JetStream), robot r only its own decisions and
// observations (and reads of the guess models). A robot's key cannot speak
// for another robot: the server refuses the publication.
func FleetIdentities(prefix, fleet string, robots int) ([]Identity, error) {
	if robots < 1 {
		return nil, fmt.Errorf("--robots %d: want at least 1", robots)
	}
	p := prefix + "." + fleet
	stream := "OBJ_" + ModelBucket(prefix, fleet)
	make1 := func(name string, pub, sub []string) (Identity, error) {
		kp, err := nkeys.CreateUser()
		if err != nil {
			return Identity{}, err
		}
		seed, _ := kp.Seed()
		public, _ := kp.PublicKey()
		return Identity{Name: name, Seed: seed, Public: public, Publish: pub, Subscribe: sub}, nil
	}
	coord, err := make1("coordinator",
		[]string{p + ".round", p + ".close", p + ".hello", p + ".log.*", "$JS.API.>", "$O." + ModelBucket(prefix, fleet) + ".>", "_INBOX.>"},
		[]string{p + ".decision.*", p + ".obs.*", "_INBOX.>"})
	if err != nil {
		return nil, err
	}
	out := []Identity{coord}
	for r := range robots {
		// Reading the model object store: stream info, message and direct
		// gets, an ordered consumer and its flow control.
		read := []string{"$JS.API.INFO", "$JS.API.STREAM.INFO." + stream, "$JS.API.STREAM.MSG.GET." + stream,
			"$JS.API.DIRECT.GET." + stream, "$JS.API.DIRECT.GET." + stream + ".>",
			"$JS.API.CONSUMER.CREATE." + stream, "$JS.API.CONSUMER.CREATE." + stream + ".>",
			"$JS.API.CONSUMER.DELETE." + stream + ".>", "$JS.FC.>", "$JS.ACK." + stream + ".>"}
		// The same requests through a leaf node, which forwards them
		// into the cluster's domain (and the cluster checks them as sent).
		for _, subj := range read {
			if rest, ok := strings.CutPrefix(subj, "$JS.API."); ok {
				read = append(read, "$JS."+HubDomain+".API."+rest)
			}
		}
		id, err := make1(fmt.Sprintf("robot-%d", r),
			append([]string{fmt.Sprintf("%s.decision.%d", p, r), fmt.Sprintf("%s.obs.%d", p, r)}, read...),
			[]string{p + ".round", p + ".close", p + ".hello", p + ".decision.*", "_INBOX.>"})
		if err != nil {
			return nil, err
		}
		out = append(out, id)
	}
	return out, nil
}

// AuthorizationConfig is the NATS server configuration block that admits
// exactly these identities with their permissions.
func AuthorizationConfig(ids []Identity) string {
	var b strings.Builder
	b.WriteString("authorization {\n  users = [\n")
	quote := func(xs []string) string {
		q := make([]string, len(xs))
		for i, x := range xs {
			q[i] = fmt.Sprintf("%q", x)
		}
		return strings.Join(q, ", ")
	}
	for _, id := range ids {
		fmt.Fprintf(&b, "    # %s\n    { nkey: %q, permissions: { publish: { allow: [%s] }, subscribe: { allow: [%s] } } }\n",
			id.Name, id.Public, quote(id.Publish), quote(id.Subscribe))
	}
	b.WriteString("  ]\n}\n")
	return b.String()
}

// LeafIdentityConfig is what a robot's leaf node (deploy/nats/leaf-robot.conf,
// which includes it as leaf-identity.conf) needs of the robot's identity:
// its server name, the robot's seed for the leaf connection to the
// cluster (LEAF_SEED: the cluster then bounds the leaf by the robot's
// permissions) and an authorization block admitting the robot's agentd
// locally with the same permissions.
func LeafIdentityConfig(id Identity) string {
	return fmt.Sprintf("# The leaf node identity of %s, written by sim creds; it holds the robot's\n"+
		"# key seed: copy it to that robot only (mode 0600), as leaf-identity.conf.\n"+
		"server_name: %q\nLEAF_SEED: %q\n", id.Name, "leaf-"+id.Name, id.Seed) + AuthorizationConfig([]Identity{id})
}

// WriteFleetCredentials writes one seed file per identity (<name>.nk, mode
// 0600), each robot's leaf node identity (robot-<r>.leaf.conf, mode 0600)
// and the server's authorization block (authorization.conf) into dir,
// which it creates.
func WriteFleetCredentials(dir string, ids []Identity) error {
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return err
	}
	for _, id := range ids {
		if err := os.WriteFile(filepath.Join(dir, id.Name+".nk"), append(bytes.Clone(id.Seed), '\n'), 0o600); err != nil {
			return err
		}
		if strings.HasPrefix(id.Name, "robot-") {
			if err := os.WriteFile(filepath.Join(dir, id.Name+".leaf.conf"), []byte(LeafIdentityConfig(id)), 0o600); err != nil {
				return err
			}
		}
	}
	return os.WriteFile(filepath.Join(dir, "authorization.conf"), []byte(AuthorizationConfig(ids)), 0o644)
}
