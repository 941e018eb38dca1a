package shell

import (
	"bytes"
	"encoding/base64"
	"io"
	"log"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/hashicorp/memberlist"
	"go.uber.org/zap"
)

func TestGossipConfigBind(t *testing.T) {
	for _, bad := range []string{"", "127.0.0.1", "127.0.0.1:x", "127.0.0.1:70000", ":-1"} {
		if _, err := GossipConfig("n", bad); err == nil {
			t.Errorf("GossipConfig(%q): no error", bad)
		}
	}
	c, err := GossipConfig("fleet/robot-1", "127.0.0.1:7946")
	if err != nil {
		t.Fatal(err)
	}
	if c.Name != "fleet/robot-1" || c.BindAddr != "127.0.0.1" || c.BindPort != 7946 {
		t.Errorf("name %q bind %s:%d", c.Name, c.BindAddr, c.BindPort)
	}
	// The relations the Lifeguard tuning relies on: the probe timeout
	// leaves time in the interval for the indirect and TCP probes,
	// suspicions wait for confirmations, and the TCP fallback is on.
	if c.ProbeTimeout >= c.ProbeInterval || c.IndirectChecks < 3 || c.DisableTcpPings ||
		c.SuspicionMult < 4 || c.SuspicionMaxTimeoutMult < 2 || c.AwarenessMaxMultiplier < 2 {
		t.Errorf("tuning lost: %+v", c)
	}
}

// countingTransport counts the packets a node sends through it.
type countingTransport struct {
	*memberlist.NetTransport
	sent atomic.Int64
}

func (c *countingTransport) WriteToAddress(b []byte, a memberlist.Address) (time.Time, error) {
	c.sent.Add(1)
	return c.NetTransport.WriteToAddress(b, a)
}

func (c *countingTransport) WriteTo(b []byte, addr string) (time.Time, error) {
	return c.WriteToAddress(b, memberlist.Address{Addr: addr})
}

// Gossip's options reach the configuration: a node given its own
// transport joins through it.
func TestGossipOptions(t *testing.T) {
	t.Parallel()
	lg := zap.NewNop()
	coord, err := Gossip("f/coordinator", "127.0.0.1:0", nil, lg)
	if err != nil {
		t.Fatal(err)
	}
	defer coord.Shutdown()
	nt, err := memberlist.NewNetTransport(&memberlist.NetTransportConfig{BindAddrs: []string{"127.0.0.1"}, Logger: log.New(io.Discard, "", 0)})
	if err != nil {
		t.Fatal(err)
	}
	ct := &countingTransport{NetTransport: nt}
	var applied bool
	robot, err := Gossip(RobotMember("f", 0), "127.0.0.1:0", []string{coord.LocalNode().Address()}, lg,
		func(c *memberlist.Config) { c.Transport = ct },
		func(c *memberlist.Config) { applied = c.Transport == ct })
	if err != nil {
		t.Fatal(err)
	}
	defer robot.Shutdown()
	if !applied {
		t.Error("options did not run in order")
	}
	if robot.LocalNode().Port != uint16(nt.GetAutoBindPort()) {
		t.Errorf("robot on port %d, its transport on %d", robot.LocalNode().Port, nt.GetAutoBindPort())
	}
	deadline := time.Now().Add(5 * time.Second)
	for len(AliveRobots(coord, "f")) != 1 {
		if time.Now().After(deadline) {
			t.Fatalf("coordinator sees robots %v, want [0]", AliveRobots(coord, "f"))
		}
		time.Sleep(20 * time.Millisecond)
	}
	for ct.sent.Load() == 0 {
		if time.Now().After(deadline) {
			t.Fatal("the robot sent nothing through its transport")
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// A restarted daemon gossips under a new incarnation of its name; the
// robot it is counts once.
func TestIncarnations(t *testing.T) {
	a, b := Incarnation(RobotMember("f", 3)), Incarnation(RobotMember("f", 3))
	if a == b || MemberOf(a) != "f/robot-3" || MemberOf("f/coordinator") != "f/coordinator" {
		t.Fatalf("%q %q", a, b)
	}
}

// Encrypted gossip: members with the fleet's key join; one without it, or
// with another key, cannot.
func TestGossipKey(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	write := func(name, content string) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, []byte(content), 0o600); err != nil {
			t.Fatal(err)
		}
		return p
	}
	key, err := ReadGossipKey(write("k", base64.StdEncoding.EncodeToString(bytes.Repeat([]byte{7}, 32))+"\n"))
	if err != nil {
		t.Fatal(err)
	}
	other, _ := ReadGossipKey(write("o", base64.StdEncoding.EncodeToString(bytes.Repeat([]byte{9}, 16))))
	for content, want := range map[string]string{"not base64!": "not base64", base64.StdEncoding.EncodeToString([]byte("short")): "a 5-byte key"} {
		if _, err := ReadGossipKey(write("bad", content)); err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("%q: %v", content, err)
		}
	}
	lg := zap.NewNop()
	coord, err := Gossip("f/coordinator", "127.0.0.1:0", nil, lg, WithGossipKey(key))
	if err != nil {
		t.Fatal(err)
	}
	defer coord.Shutdown()
	join := []string{coord.LocalNode().Address()}
	ok, err := Gossip(RobotMember("f", 0), "127.0.0.1:0", join, lg, WithGossipKey(key))
	if err != nil {
		t.Fatal(err)
	}
	defer ok.Shutdown()
	for _, opts := range [][]func(*memberlist.Config){nil, {WithGossipKey(other)}} {
		bad, err := memberlist.Create(mustConfig(t, RobotMember("f", 1), opts...))
		if err != nil {
			t.Fatal(err)
		}
		if _, err := bad.Join(join); err == nil {
			t.Error("a member without the fleet's key joined")
		}
		bad.Shutdown()
	}
	deadline := time.Now().Add(5 * time.Second)
	for !slices.Equal(AliveRobots(coord, "f"), []int{0}) {
		if time.Now().After(deadline) {
			t.Fatalf("coordinator sees robots %v, want [0]", AliveRobots(coord, "f"))
		}
		time.Sleep(20 * time.Millisecond)
	}
}

func mustConfig(t *testing.T, name string, opts ...func(*memberlist.Config)) *memberlist.Config {
	t.Helper()
	c, err := GossipConfig(name, "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	c.TCPTimeout = 500 * time.Millisecond
	for _, o := range opts {
		o(c)
	}
	return c
}
