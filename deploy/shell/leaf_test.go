package shell

import (
	"context"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"go.uber.org/zap"
)

// A robot's leaf node, configured from the shipped template
// (deploy/nats/leaf-robot.conf) and the identity sim creds writes for it,
// against the shipped three-node cluster (deploy/nats/node-{a,b,c}.conf),
// both with only their host names, ports and paths rewritten for the test:
// robot 1's agentd on the leaf hears round starts from the coordinator on
// the cluster, its decisions reach the coordinator, it reads the guess
// models from the cluster's JetStream; a leaf signing as robot 1 cannot
// speak for robot 2 or start rounds even when its host lets anyone publish;
// neither anonymous clients on the leaf nor anonymous leaf nodes on the
// cluster get in; and when the cluster node the leaf is connected to
// dies, the leaf moves to another and traffic flows again.
func TestLeafNodeOnRobot(t *testing.T) {
	dir := t.TempDir()
	creds := filepath.Join(dir, "creds")
	ids, err := FleetIdentities("baton", "yard", 3)
	if err != nil {
		t.Fatal(err)
	}
	if err := WriteFleetCredentials(creds, ids); err != nil {
		t.Fatal(err)
	}
	auth, err := os.ReadFile(filepath.Join(creds, "authorization.conf"))
	if err != nil {
		t.Fatal(err)
	}
	identity, err := os.ReadFile(filepath.Join(creds, "robot-1.leaf.conf"))
	if err != nil {
		t.Fatal(err)
	}

	// The cluster, from the shipped node configurations.
	nodes := []string{"a", "b", "c"}
	routePort, leafPort := map[string]int{}, map[string]int{}
	for _, x := range nodes {
		routePort[x], leafPort[x] = leafFreePort(t), leafFreePort(t)
	}
	hub := map[string]*server.Server{}
	var hubURLs []string
	for _, x := range nodes {
		rw := []string{"0.0.0.0:4222", "127.0.0.1:-1", "http: 127.0.0.1:8222\n", "",
			"0.0.0.0:6222", fmt.Sprintf("127.0.0.1:%d", routePort[x]),
			"0.0.0.0:7422", fmt.Sprintf("127.0.0.1:%d", leafPort[x]),
			"/var/lib/nats", filepath.ToSlash(filepath.Join(dir, "js-"+x))}
		for _, y := range nodes {
			if y != x {
				rw = append(rw, "nats-"+y+":6222", fmt.Sprintf("127.0.0.1:%d", routePort[y]))
			}
		}
		opts := leafLoadConf(t, filepath.Join("..", "nats", "node-"+x+".conf"), filepath.Join(dir, "node-"+x),
			map[string]string{"authorization.conf": string(auth)}, rw...)
		if opts.JetStreamDomain != HubDomain || opts.LeafNode.Port != leafPort[x] {
			t.Fatalf("node-%s.conf: JetStream domain %q (want %q), leaf node port %d", x, opts.JetStreamDomain, HubDomain, opts.LeafNode.Port)
		}
		hub[x] = startServer(t, opts)
		hubURLs = append(hubURLs, hub[x].ClientURL())
	}

	// Robot 1's leaf, from the shipped template and robot 1's identity.
	leafRW := []string{"127.0.0.1:4222", "127.0.0.1:-1", "http: 127.0.0.1:8222\n", ""}
	for _, y := range nodes {
		leafRW = append(leafRW, "nats-"+y+":7422", fmt.Sprintf("127.0.0.1:%d", leafPort[y]))
	}
	leafOpts := leafLoadConf(t, filepath.Join("..", "nats", "leaf-robot.conf"), filepath.Join(dir, "leaf"),
		map[string]string{"leaf-identity.conf": string(identity)}, leafRW...)
	if leafOpts.JetStream || len(leafOpts.LeafNode.Remotes) != 1 || len(leafOpts.LeafNode.Remotes[0].URLs) != 3 ||
		leafOpts.LeafNode.Remotes[0].Nkey != string(ids[2].Seed) || len(leafOpts.Nkeys) != 1 || leafOpts.Nkeys[0].Nkey != ids[2].Public {
		t.Fatalf("leaf-robot.conf with robot 1's identity: jetstream %v, remotes %+v, %d local users", leafOpts.JetStream,
			leafOpts.LeafNode.Remotes, len(leafOpts.Nkeys))
	}
	leaf := startServer(t, leafOpts)
	// A leaf with no key is refused by the cluster.
	anonOpts := leafLoadConf(t, filepath.Join("..", "nats", "leaf-robot.conf"), filepath.Join(dir, "anonymous-leaf"),
		map[string]string{"leaf-identity.conf": "server_name: anonymous-leaf\n"}, append(leafRW, "nkey: $LEAF_SEED", "")...)
	if len(anonOpts.LeafNode.Remotes) != 1 || anonOpts.LeafNode.Remotes[0].Nkey != "" {
		t.Fatalf("the anonymous leaf: remotes %+v", anonOpts.LeafNode.Remotes)
	}
	anon := startServer(t, anonOpts)

	lg := zap.NewNop()
	errs := make(chan error, 16)
	connect := func(url, name string) *nats.Conn {
		t.Helper()
		nc, err := Connect(url, filepath.Join(creds, name+".nk"), name, 5*time.Second, lg,
			nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) {
				select {
				case errs <- err:
				default:
				}
			}))
		if err != nil {
			t.Fatalf("%s at %s: %v", name, url, err)
		}
		t.Cleanup(nc.Close)
		return nc
	}
	coord := connect(strings.Join(hubURLs, ","), "coordinator")
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	bucket := ModelBucket("baton", "yard")
	// The cluster's JetStream takes a moment to elect its leader.
	leafEventually(t, 30*time.Second, "the coordinator storing a model on the cluster", func() error {
		c, cancel := context.WithTimeout(ctx, 2*time.Second)
		defer cancel()
		return PublishModel(c, coord, bucket, 7, []byte("model seven"))
	})

	if nc, err := nats.Connect(leaf.ClientURL(), nats.MaxReconnects(0)); err == nil {
		nc.Close()
		t.Fatal("an anonymous client connected to the leaf")
	}
	robot := connect(leaf.ClientURL(), "robot-1")
	leafEventually(t, 10*time.Second, "the leaf connecting to the cluster", func() error {
		if leaf.NumLeafNodes() != 1 {
			return fmt.Errorf("%d leaf connections", leaf.NumLeafNodes())
		}
		return nil
	})
	if lz, _ := leaf.Leafz(nil); lz == nil || len(lz.Leafs) != 1 {
		t.Fatalf("the leaf's /leafz: %+v", lz)
	} else {
		t.Logf("the leaf's /leafz: %s %s", lz.Leafs[0].Name, lz.Leafs[0].IP)
	}
	if n := anon.NumLeafNodes(); n != 0 {
		t.Fatalf("a leaf node without a key connected to the cluster (%d)", n)
	}
	anon.Shutdown()
	rounds, err := robot.SubscribeSync("baton.yard.round")
	if err != nil {
		t.Fatal(err)
	}
	decisions, err := coord.SubscribeSync("baton.yard.decision.*")
	if err != nil {
		t.Fatal(err)
	}
	robot.Flush()
	coord.Flush()

	// (b) a round start from the cluster reaches the robot on its leaf,
	// (a) and the robot's decision from the leaf reaches the coordinator.
	roundFlows := func(what string) {
		t.Helper()
		leafDrain(rounds)
		leafEventually(t, 15*time.Second, what+": a round start reaching robot 1 on its leaf", func() error {
			coord.Publish("baton.yard.round", []byte("round"))
			coord.Flush()
			_, err := rounds.NextMsg(200 * time.Millisecond)
			return err
		})
	}
	decisionFlows := func(what string) {
		t.Helper()
		leafDrain(decisions)
		leafEventually(t, 15*time.Second, what+": robot 1's decision reaching the coordinator", func() error {
			robot.Publish("baton.yard.decision.1", []byte("mine"))
			robot.Flush()
			m, err := decisions.NextMsg(200 * time.Millisecond)
			if err == nil && m.Subject != "baton.yard.decision.1" {
				return fmt.Errorf("got %s", m.Subject)
			}
			return err
		})
	}
	roundFlows("through the leaf")
	decisionFlows("through the leaf")

	// The robot reads the guess model through the leaf, with the plain
	// JetStream API agentd uses.
	if b, err := FetchModel(ctx, robot, bucket, 7); err != nil || string(b) != "model seven" {
		t.Fatalf("robot 1 reading the model through its leaf: %q %v", b, err)
	}

	// (c) robot 1 cannot speak for robot 2: its own leaf refuses it...
	leafDrain(decisions)
	for len(errs) > 0 {
		<-errs
	}
	robot.Publish("baton.yard.decision.2", []byte("forged"))
	robot.Flush()
	select {
	case err := <-errs:
		if !strings.Contains(strings.ToLower(err.Error()), "permissions violation") {
			t.Fatal(err)
		}
	case <-time.After(3 * time.Second):
		t.Fatal("robot 1's leaf let it publish as robot 2")
	}
	// ... and so does the cluster, for a leaf signing as robot 1 on a host
	// whose local server lets anyone publish anything (the template with
	// robot 1's seed but without the local authorization block).
	open := fmt.Sprintf("server_name: open-leaf\nLEAF_SEED: %q\n", ids[2].Seed)
	openOpts := leafLoadConf(t, filepath.Join("..", "nats", "leaf-robot.conf"), filepath.Join(dir, "open-leaf"),
		map[string]string{"leaf-identity.conf": open}, leafRW...)
	if len(openOpts.Nkeys) != 0 || openOpts.LeafNode.Remotes[0].Nkey != string(ids[2].Seed) {
		t.Fatalf("the open leaf: %d local users, remotes %+v", len(openOpts.Nkeys), openOpts.LeafNode.Remotes)
	}
	openLeaf := startServer(t, openOpts)
	anyone, err := nats.Connect(openLeaf.ClientURL(), nats.MaxReconnects(0))
	if err != nil {
		t.Fatal(err)
	}
	defer anyone.Close()
	hubRobot := connect(strings.Join(hubURLs, ","), "robot-0")
	hubRounds, err := hubRobot.SubscribeSync("baton.yard.round")
	if err != nil {
		t.Fatal(err)
	}
	hubRobot.Flush()
	leafEventually(t, 15*time.Second, "the open leaf's own decisions reaching the coordinator", func() error {
		anyone.Publish("baton.yard.decision.1", []byte("open"))
		anyone.Flush()
		m, err := decisions.NextMsg(200 * time.Millisecond)
		if err == nil && m.Subject != "baton.yard.decision.1" {
			return fmt.Errorf("got %s", m.Subject)
		}
		return err
	})
	leafDrain(decisions)
	leafDrain(hubRounds)
	anyone.Publish("baton.yard.decision.2", []byte("forged"))
	anyone.Publish("baton.yard.round", []byte("forged round"))
	anyone.Publish("baton.yard.decision.1", []byte("marker"))
	anyone.Flush()
	if m, err := decisions.NextMsg(3 * time.Second); err != nil || string(m.Data) != "marker" {
		t.Fatalf("the coordinator got %v (%v), want only the marker after the forged decision", m, err)
	}
	if m, err := decisions.NextMsg(300 * time.Millisecond); err == nil {
		t.Fatalf("a forged %s from the leaf reached the cluster", m.Subject)
	}
	if m, err := hubRounds.NextMsg(300 * time.Millisecond); err == nil {
		t.Fatalf("a forged round start from the leaf reached robot 0: %q", m.Data)
	}
	anyone.Close()
	openLeaf.Shutdown()

	// The cluster node robot 1's leaf is connected to dies: the leaf
	// reconnects to another, and rounds and decisions flow again.
	var dead string
	for _, x := range nodes {
		lz, err := hub[x].Leafz(nil)
		if err != nil {
			t.Fatal(err)
		}
		for _, l := range lz.Leafs {
			if l.Name == "leaf-robot-1" {
				dead = x
			}
		}
	}
	if dead == "" {
		t.Fatal("no cluster node holds robot 1's leaf connection")
	}
	hub[dead].Shutdown()
	t.Logf("stopped nats-%s", dead)
	roundFlows("after nats-" + dead + " died")
	decisionFlows("after nats-" + dead + " died")
}

// leafLoadConf copies a shipped configuration into dir with each old
// string of rewrites (old, new pairs) replaced, each of which must occur,
// writes the files it includes next to it, and loads it.
func leafLoadConf(t *testing.T, path, dir string, includes map[string]string, rewrites ...string) *server.Options {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	text := string(data)
	for i := 0; i+1 < len(rewrites); i += 2 {
		if !strings.Contains(text, rewrites[i]) {
			t.Fatalf("%s no longer has %q", path, rewrites[i])
		}
		text = strings.ReplaceAll(text, rewrites[i], rewrites[i+1])
	}
	if err := os.MkdirAll(dir, 0o700); err != nil {
		t.Fatal(err)
	}
	for name, content := range includes {
		if err := os.WriteFile(filepath.Join(dir, name), []byte(content), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	conf := filepath.Join(dir, filepath.Base(path))
	if err := os.WriteFile(conf, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	opts, err := server.ProcessConfigFile(conf)
	if err != nil {
		t.Fatalf("%s does not load: %v\n%s", path, err, text)
	}
	return opts
}

func leafFreePort(t *testing.T) int {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port
}

func leafEventually(t *testing.T, within time.Duration, what string, try func() error) {
	t.Helper()
	deadline := time.Now().Add(within)
	for {
		err := try()
		if err == nil {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("%s: %v", what, err)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

func leafDrain(s *nats.Subscription) {
	for {
		if _, err := s.NextMsg(50 * time.Millisecond); err != nil {
			return
		}
	}
}
