// Package shell holds what agentd, the coordinator and the simulator share
// at the edge: connecting to NATS (with a clear error and retries), the
// embedded NATS server, memberlist gossip, logging and the scenario digest.
package shell

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"log"
	"net"
	"net/url"
	"os"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/hashicorp/memberlist"
	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"
)

// Logger builds a zap logger at level ("debug", "info", "warn", "error")
// writing to stderr; json picks machine-readable lines.
func Logger(level string, json bool, name string) (*zap.Logger, error) {
	lvl, err := zapcore.ParseLevel(level)
	if err != nil {
		return nil, fmt.Errorf("--log-level %q: use debug, info, warn or error", level)
	}
	cfg := zap.NewProductionConfig()
	if !json {
		cfg = zap.NewDevelopmentConfig()
		cfg.DisableStacktrace = true
	}
	cfg.Level = zap.NewAtomicLevelAt(lvl)
	cfg.OutputPaths = []string{"stderr"}
	l, err := cfg.Build()
	if err != nil {
		return nil, err
	}
	return l.Named(name), nil
}

// Connect dials the NATS URL list, retrying every second until timeout
// when no server answers, and keeps reconnecting after that.
func Connect(urls, creds, name string, timeout time.Duration, lg *zap.Logger, extra ...nats.Option) (*nats.Conn, error) {
	if strings.TrimSpace(urls) == "" {
		return nil, errors.New("--nats: give at least one NATS URL, e.g. nats://127.0.0.1:4222")
	}
	// A URL that cannot parse will never connect: say so at once.
	for _, u := range strings.Split(urls, ",") {
		u = strings.TrimSpace(u)
		if !strings.Contains(u, "://") {
			u = "nats://" + u
		}
		pu, err := url.Parse(u)
		if err != nil || pu.Host == "" || strings.ContainsAny(pu.Host, " \t") {
			return nil, fmt.Errorf("--nats %q: not a NATS URL (want e.g. nats://127.0.0.1:4222)", u)
		}
	}
	opts := []nats.Option{
		nats.Name(name), nats.MaxReconnects(-1), nats.ReconnectWait(250 * time.Millisecond),
		nats.DisconnectErrHandler(func(c *nats.Conn, err error) {
			if err == nil || c.IsClosed() {
				return // our own Close, not a fault
			}
			lg.Warn("lost NATS connection; reconnecting", zap.Error(err))
		}),
		nats.ReconnectHandler(func(c *nats.Conn) { lg.Info("NATS reconnected", zap.String("url", c.ConnectedUrl())) }),
	}
	opts = append(opts, extra...)
	if creds != "" {
		data, err := os.ReadFile(creds)
		if err != nil {
			return nil, fmt.Errorf("--creds: %w", err)
		}
		// An nkey seed file (from sim creds), or a JWT credentials file.
		if seed := strings.TrimSpace(string(data)); strings.HasPrefix(seed, "SU") && !strings.ContainsAny(seed, " \n") {
			o, err := nats.NkeyOptionFromSeed(creds)
			if err != nil {
				return nil, fmt.Errorf("--creds %s: %w", creds, err)
			}
			opts = append(opts, o)
		} else {
			opts = append(opts, nats.UserCredentials(creds))
		}
	}
	deadline := time.Now().Add(timeout)
	for attempt := 1; ; attempt++ {
		nc, err := nats.Connect(urls, opts...)
		if err == nil {
			return nc, nil
		}
		if time.Now().After(deadline) {
			return nil, fmt.Errorf("cannot reach NATS at %s after %d attempts over %s: %w", urls, attempt, timeout, err)
		}
		lg.Warn("cannot reach NATS; retrying in 1s", zap.String("nats", urls), zap.Int("attempt", attempt), zap.Error(err))
		time.Sleep(time.Second)
	}
}

// Embedded is a NATS server running in this process.
type Embedded struct {
	*server.Server
	dir string // removed at Shutdown ("": kept)
}

// Shutdown stops the server and removes its JetStream files unless they
// were kept in a directory of the caller's.
func (e *Embedded) Shutdown() {
	e.Server.Shutdown()
	e.Server.WaitForShutdown()
	if e.dir != "" {
		os.RemoveAll(e.dir)
	}
}

// EmbeddedNATS starts a NATS server in this process on host:port (port 0:
// a free one) and returns it with its client URL. JetStream is on (for the
// guess models and the durable decision log), keeping its files in a
// temporary directory that Shutdown removes.
func EmbeddedNATS(host string, port int) (*Embedded, string, error) {
	return EmbeddedNATSAt(host, port, "")
}

// EmbeddedNATSAt is EmbeddedNATS with JetStream's files in storeDir, which
// outlives the server (a server started again on it has the same streams);
// "" is a temporary directory.
func EmbeddedNATSAt(host string, port int, storeDir string) (*Embedded, string, error) {
	return EmbeddedNATSWith(host, port, storeDir, nil)
}

// EmbeddedNATSWith is EmbeddedNATSAt with set applied to the server's
// options last (authorization, TLS).
func EmbeddedNATSWith(host string, port int, storeDir string, set func(*server.Options)) (*Embedded, string, error) {
	if port == 0 {
		port = server.RANDOM_PORT
	}
	if port != server.RANDOM_PORT {
		// Say "in use" now rather than time out waiting for a server that
		// could not bind.
		l, err := net.Listen("tcp", net.JoinHostPort(host, strconv.Itoa(port)))
		if err != nil {
			return nil, "", fmt.Errorf("embedded NATS: %w", err)
		}
		l.Close()
	}
	dir, remove := storeDir, ""
	if dir == "" {
		var err error
		if dir, err = os.MkdirTemp("", "baton-nats-"); err != nil {
			return nil, "", err
		}
		remove = dir
	} else if err := os.MkdirAll(dir, 0o700); err != nil {
		return nil, "", fmt.Errorf("embedded NATS store: %w", err)
	}
	opts := &server.Options{Host: host, Port: port, NoSigs: true, NoLog: true, MaxPayload: 8 << 20,
		JetStream: true, StoreDir: dir, JetStreamMaxMemory: 64 << 20, JetStreamMaxStore: 1 << 30}
	if set != nil {
		set(opts)
	}
	ns, err := server.NewServer(opts)
	if err != nil {
		if remove != "" {
			os.RemoveAll(remove)
		}
		return nil, "", fmt.Errorf("embedded NATS: %w", err)
	}
	go ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		ns.Shutdown()
		if remove != "" {
			os.RemoveAll(remove)
		}
		return nil, "", fmt.Errorf("embedded NATS on %s:%d did not start within 10s", host, port)
	}
	return &Embedded{Server: ns, dir: remove}, ns.ClientURL(), nil
}

// GossipConfig is memberlist tuned for robots on a lossy radio: a crash is
// found by every member within a few seconds, and losing a fifth of all
// messages does not get a live robot declared dead.
//
// It follows Lifeguard (Dadgar, Phillips, Currey, "Lifeguard: Local Health
// Awareness for More Accurate Failure Detection", arXiv:1707.00788), which
// memberlist implements: a failed probe makes a member suspect, not dead,
// and the suspect has a suspicion timeout to refute. Before this tuning
// (see fault.FastGossipConfig) probes ran every 200 ms with one indirect
// check and a fixed 400 ms suspicion: found a crash in about a second on a
// clean network, but at 20% loss declared live robots dead within seconds.
// Now:
//   - ProbeInterval 400 ms, ProbeTimeout 200 ms: time for the indirect
//     probes and the TCP fallback ping to get an answer through.
//   - IndirectChecks 3: three relays instead of one, so a probe fails only
//     if the direct ping, all three relayed ones and the TCP ping fail.
//   - SuspicionMult 4, SuspicionMaxTimeoutMult 2 (Lifeguard's LHA-Suspicion):
//     a suspicion lasts 3.2 s (for up to 10 members), shrinking to 1.6 s as
//     k = 2 other members independently confirm it; a live robot has
//     seconds to refute, a crashed one is confirmed by every prober.
//   - AwarenessMaxMultiplier 3 (Lifeguard's LHA-Probe, scaled by the Local
//     Health Multiplier): a member that misses nacks or has to refute
//     probes less often, up to every 1.2 s, rather than accuse others of
//     its own trouble; capped low (default 8) so detection stays within 5 s.
//   - The buddy system (a probe of a suspect carries the suspicion, so it
//     can refute at once) and the TCP fallback ping stay on.
//   - RetransmitMult 8 (times log10 of the member count, rounded up): a
//     refutation must reach every member that heard the suspicion before
//     its timer runs out; with 4, at 30% loss the odd member missed it and
//     declared a live robot dead.
//   - TCPTimeout 3 s: a join or push-pull survives one lost SYN (1 s
//     retransmission).
//
// Measured with sim/fault's MeasureGossip (6 robots and a coordinator on
// loopback, table at TestGossipSweep): no false dead declarations up to 30%
// independent loss and at bursty 20% loss; every member finds a crash in
// 1.7-3.5 s at up to 30% loss. The old settings found it in under a second
// but declared live robots dead from 10% loss on.
func GossipConfig(name, bind string) (*memberlist.Config, error) {
	host, portStr, err := net.SplitHostPort(bind)
	if err != nil {
		return nil, fmt.Errorf("--gossip %q: want host:port (port 0 picks one): %w", bind, err)
	}
	port, err := strconv.Atoi(portStr)
	if err != nil || port < 0 || port > 65535 {
		return nil, fmt.Errorf("--gossip %q: bad port", bind)
	}
	c := memberlist.DefaultLocalConfig()
	c.Name = name
	c.BindAddr, c.BindPort = host, port
	c.AdvertiseAddr, c.AdvertisePort = "", 0
	c.ProbeInterval = 400 * time.Millisecond
	c.ProbeTimeout = 200 * time.Millisecond
	c.IndirectChecks = 3
	c.SuspicionMult = 4
	c.SuspicionMaxTimeoutMult = 2
	c.AwarenessMaxMultiplier = 3
	c.RetransmitMult = 8
	c.DisableTcpPings = false
	c.TCPTimeout = 3 * time.Second
	c.GossipInterval = 50 * time.Millisecond
	c.PushPullInterval = 2 * time.Second
	// A restarted daemon comes back on a new port under the same name.
	c.DeadNodeReclaimTime = 100 * time.Millisecond
	c.Logger = log.New(io.Discard, "", 0)
	return c, nil
}

// Gossip starts a memberlist node. With join addresses it tries to join
// for a few seconds; KeepJoined keeps trying after that. opts adjust the
// configuration before the node starts, e.g. a drill's fault transport
// (c.Transport, already bound: bind is then only for the log).
func Gossip(name, bind string, join []string, lg *zap.Logger, opts ...func(*memberlist.Config)) (*memberlist.Memberlist, error) {
	c, err := GossipConfig(name, bind)
	if err != nil {
		return nil, err
	}
	for _, o := range opts {
		o(c)
	}
	ml, err := memberlist.Create(c)
	if err != nil {
		return nil, fmt.Errorf("gossip on %s: %w", bind, err)
	}
	if len(join) > 0 {
		var jerr error
		for range 30 {
			if _, jerr = ml.Join(join); jerr == nil {
				break
			}
			time.Sleep(100 * time.Millisecond)
		}
		if jerr != nil {
			lg.Warn("cannot join gossip yet; will keep trying", zap.Strings("join", join), zap.String("error", oneLine(jerr)))
		}
	}
	lg.Info("gossip up", zap.String("name", name), zap.String("addr", fmt.Sprintf("%s:%d", ml.LocalNode().Addr, ml.LocalNode().Port)))
	return ml, nil
}

// KeepJoined re-joins the join addresses whenever no member named want is
// alive: a coordinator that restarts comes back with an empty member list,
// and without this its robots would never be scheduled again.
func KeepJoined(ctx context.Context, ml *memberlist.Memberlist, join []string, want string, lg *zap.Logger) {
	if len(join) == 0 {
		return
	}
	t := time.NewTicker(500 * time.Millisecond)
	defer t.Stop()
	warned := false
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		alive := false
		for _, n := range ml.Members() {
			alive = alive || (MemberOf(n.Name) == want && n.State == memberlist.StateAlive)
		}
		if alive {
			warned = false
			continue
		}
		if _, err := ml.Join(join); err != nil {
			if !warned {
				lg.Warn("coordinator not in gossip; retrying join", zap.Strings("join", join), zap.String("error", oneLine(err)))
				warned = true
			}
		} else {
			lg.Info("joined gossip", zap.Strings("join", join))
		}
	}
}

// oneLine folds memberlist's multi-line errors.
func oneLine(err error) string { return strings.Join(strings.Fields(err.Error()), " ") }

// RobotMember is a robot's gossip name in a fleet.
func RobotMember(fleet string, r int) string { return fmt.Sprintf("%s/robot-%d", fleet, r) }

// Incarnation names one process of a member: name@<start time>. A
// restarted daemon is a new member, so the old process being declared
// dead (which gossip may only conclude after the new one joined) never
// marks the new one dead too.
func Incarnation(name string) string {
	return name + "@" + strconv.FormatInt(time.Now().UnixNano(), 36)
}

// MemberOf is the member a gossip name is an incarnation of.
func MemberOf(name string) string {
	if i := strings.LastIndexByte(name, '@'); i >= 0 {
		return name[:i]
	}
	return name
}

// AliveRobots lists the robots of fleet that gossip reports alive, each
// once (a restarted robot's two incarnations can both be alive briefly).
func AliveRobots(ml *memberlist.Memberlist, fleet string) []int {
	var out []int
	prefix := fleet + "/robot-"
	for _, n := range ml.Members() {
		name := MemberOf(n.Name)
		if n.State != memberlist.StateAlive || !strings.HasPrefix(name, prefix) {
			continue
		}
		if r, err := strconv.Atoi(strings.TrimPrefix(name, prefix)); err == nil && !slices.Contains(out, r) {
			out = append(out, r)
		}
	}
	slices.Sort(out)
	return out
}

// Digest identifies the scenario a process runs: file contents (or the
// built-in demo's name) and the robot count, so robots started with a
// different file refuse the round.
func Digest(scenario, file string, robots int) (string, error) {
	return DigestStarts(scenario, file, robots, "")
}

// DigestStarts is Digest with per-robot start positions (--starts; "":
// the file's, and the same digest as Digest).
func DigestStarts(scenario, file string, robots int, starts string) (string, error) {
	h := sha256.New()
	fmt.Fprintf(h, "%s\x00%d\x00", scenario, robots)
	if file == "" {
		h.Write([]byte("builtin"))
	} else {
		data, err := os.ReadFile(file)
		if err != nil {
			return "", fmt.Errorf("scenario file: %w", err)
		}
		h.Write(data)
	}
	if starts != "" {
		fmt.Fprintf(h, "\x00starts\x00%s", starts)
	}
	return hex.EncodeToString(h.Sum(nil))[:16], nil
}
