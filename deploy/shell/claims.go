package shell

import (
	"encoding/base64"
	"fmt"
	"net"
	"os"
	"strings"

	"github.com/hashicorp/memberlist"
	"go.uber.org/zap"
)

// LiveClaim looks for another live process of this member (another
// incarnation of its name, see Incarnation): a second daemon for one
// robot. Gossip may still list a process that was killed a moment ago, so
// each candidate must answer a direct ping (a few tries); one that does
// not is a dead leftover and no claim. It returns the live one, or nil.
func LiveClaim(ml *memberlist.Memberlist, tries int) *memberlist.Node {
	self := ml.LocalNode().Name
	for _, n := range ml.Members() {
		if n.Name == self || MemberOf(n.Name) != MemberOf(self) || n.State != memberlist.StateAlive {
			continue
		}
		addr := &net.UDPAddr{IP: n.Addr, Port: int(n.Port)}
		for range max(tries, 1) {
			if _, err := ml.Ping(n.Name, addr); err == nil {
				return n
			}
		}
	}
	return nil
}

// ClaimError names the live process that already claims a member.
func ClaimError(member string, other *memberlist.Node) error {
	return fmt.Errorf("%s is already live: gossip member %s at %s answers; refusing to run a second daemon for it (stop that one first, or check --robot)",
		member, other.Name, other.Address())
}

// ClaimWatch is a memberlist event delegate that logs any other process
// of this member joining (a second daemon for one robot, refused at its
// start or not), so both daemons' logs name the conflict. Pass it with
// Gossip's options: func(c *memberlist.Config) { c.Events = w }.
type ClaimWatch struct {
	Self string // this process's gossip name (an Incarnation)
	Log  *zap.Logger
}

func (w ClaimWatch) NotifyJoin(n *memberlist.Node) {
	if n.Name != w.Self && MemberOf(n.Name) == MemberOf(w.Self) {
		w.Log.Error("another daemon claims this robot: two processes would decide for one robot",
			zap.String("member", MemberOf(w.Self)), zap.String("other", n.Name), zap.String("other_addr", n.Address()))
	}
}
func (ClaimWatch) NotifyLeave(*memberlist.Node)  {}
func (ClaimWatch) NotifyUpdate(*memberlist.Node) {}

// ReadGossipKey reads a gossip encryption key file: the base64 of 16, 24
// or 32 random bytes (AES-128, -192 or -256; e.g. `head -c 32 /dev/urandom
// | base64`). Every member of a fleet must use the same key; a member
// without it cannot join.
func ReadGossipKey(path string) ([]byte, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("--gossip-key-file: %w", err)
	}
	if len(data) > 1024 {
		return nil, fmt.Errorf("--gossip-key-file %s: more than 1024 bytes; want the base64 of 16, 24 or 32 bytes", path)
	}
	key, err := base64.StdEncoding.DecodeString(strings.TrimSpace(string(data)))
	if err != nil {
		return nil, fmt.Errorf("--gossip-key-file %s: not base64: %w", path, err)
	}
	if n := len(key); n != 16 && n != 24 && n != 32 {
		return nil, fmt.Errorf("--gossip-key-file %s: a %d-byte key; want 16, 24 or 32 bytes (e.g. head -c 32 /dev/urandom | base64)", path, n)
	}
	return key, nil
}

// WithGossipKey is a Gossip option that encrypts gossip with key.
func WithGossipKey(key []byte) func(*memberlist.Config) {
	return func(c *memberlist.Config) { c.SecretKey = key }
}
