package fault

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"log"
	"net"
	"net/netip"
	"os"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/hashicorp/memberlist"

	"baton/deploy/shell"
)

// synRTO is the wait before a lost SYN or SYN-ACK is sent again: Linux's
// initial retransmission timeout (RFC 6298 §2.1 gives 1 s), doubling on
// every further loss.
const synRTO = time.Second

// GossipNet is the fault layer for membership gossip: one Layer shared by
// every node's Transport, so each directed link (from, to) draws from one
// stream whoever asks. It maps the addresses and names memberlist sends to
// onto endpoints; a Transport registers its own address, and Name adds
// member names for peers that are addressed by name only. Traffic to an
// address no endpoint owns passes untouched (counted in Unmapped). Safe for
// concurrent use.
type GossipNet struct {
	// Round is the schedule's round for every decision (nil: round 1).
	// Set it before the first Transport; it is called without locks held.
	Round func() int

	mu    sync.Mutex
	layer *Layer
	addrs map[string]int  // transports' "ip:port" → endpoint
	names map[string]int  // member name → endpoint
	down  map[string]bool // addresses of crashed transports
	stats GossipStats
}

// GossipStats counts what a GossipNet did.
type GossipStats struct {
	Packets, PacketsLost uint64 // UDP packets between endpoints, and those lost
	Dials, DialsFailed   uint64 // TCP dials between endpoints, and those that failed
	Unmapped             uint64 // packets and dials to addresses of no endpoint
	// Layer is the shared layer's own count: a dial is one or more
	// handshake deliveries in it.
	Layer Stats
}

// NewGossipNet builds the gossip network for specs (each must pass Check).
func NewGossipNet(seed uint64, specs []Spec) *GossipNet {
	return &GossipNet{layer: New(seed, specs), addrs: map[string]int{}, names: map[string]int{}, down: map[string]bool{}}
}

// Name maps a member name (e.g. shell.RobotMember(fleet, r)) to endpoint e.
func (g *GossipNet) Name(name string, e int) {
	g.mu.Lock()
	defer g.mu.Unlock()
	g.names[name] = e
}

// Crash makes endpoint e's transports fall silent from now on, as a
// process that died: nothing they send leaves, nothing sent to them (even
// in flight) arrives and dials to or from them time out. A Transport made
// for e afterwards is a restarted daemon and works.
func (g *GossipNet) Crash(e int) {
	g.mu.Lock()
	defer g.mu.Unlock()
	for a, ep := range g.addrs {
		if ep == e {
			g.down[a] = true
		}
	}
}

// Stats is what the network did so far.
func (g *GossipNet) Stats() GossipStats {
	g.mu.Lock()
	defer g.mu.Unlock()
	s := g.stats
	s.Layer = g.layer.Stats()
	return s
}

func (g *GossipNet) round() int {
	if g.Round == nil {
		return 1
	}
	return g.Round()
}

// addrKey normalises "ip:port" so 127.0.0.1 and ::ffff:127.0.0.1 agree.
func addrKey(addr string) string {
	ap, err := netip.ParseAddrPort(addr)
	if err != nil {
		return addr
	}
	return netip.AddrPortFrom(ap.Addr().Unmap(), ap.Port()).String()
}

// endpoint finds who owns a: its address first (what the packet really
// goes to), then its name. Called with g.mu held.
func (g *GossipNet) endpoint(a memberlist.Address) (int, bool) {
	if e, ok := g.addrs[addrKey(a.Addr)]; ok {
		return e, true
	}
	e, ok := g.names[a.Name]
	return e, ok
}

// packet decides one UDP packet from t to a; mapped is false for unknown
// addresses.
func (g *GossipNet) packet(t *GossipTransport, a memberlist.Address) (v Verdict, mapped bool) {
	r := g.round()
	g.mu.Lock()
	defer g.mu.Unlock()
	peer, ok := g.endpoint(a)
	if !ok {
		g.stats.Unmapped++
		return Verdict{Copies: 1}, false
	}
	g.stats.Packets++
	if g.live(t, a) {
		v = g.layer.Deliver(r, t.self, peer)
	}
	if v.Copies == 0 {
		g.stats.PacketsLost++
	}
	return v, true
}

// live reports whether neither t nor a has crashed. Called with g.mu held.
func (g *GossipNet) live(t *GossipTransport, a memberlist.Address) bool {
	return !g.down[t.addr] && !g.down[addrKey(a.Addr)]
}

// inFlight reports whether a packet held back by a delay may still land.
func (g *GossipNet) inFlight(t *GossipTransport, a memberlist.Address) bool {
	g.mu.Lock()
	defer g.mu.Unlock()
	return g.live(t, a)
}

// handshake decides a TCP dial from t to a within timeout: how long it
// takes and whether it connects. mapped is false for unknown addresses.
//
// The model: a connection is up once a SYN (t→peer) and its SYN-ACK
// (peer→t) both get through, each a delivery on its directed link; a
// loss on either costs a retransmission timeout (1 s, then 2 s, ...) and
// the dial fails once the waits pass its timeout. Once up, a stream is
// reliable and prompt: TCP retransmits lost segments, and charging the
// handshake alone keeps the model simple while still making TCP fallback
// pings and push-pull syncs fail or stall on a lossy radio as they would.
func (g *GossipNet) handshake(t *GossipTransport, a memberlist.Address, timeout time.Duration) (wait time.Duration, up, mapped bool) {
	r := g.round()
	g.mu.Lock()
	defer g.mu.Unlock()
	peer, ok := g.endpoint(a)
	if !ok {
		g.stats.Unmapped++
		return 0, true, false
	}
	g.stats.Dials++
	if g.live(t, a) {
		for rto := synRTO; wait < timeout; rto *= 2 {
			syn := g.layer.Deliver(r, t.self, peer)
			if syn.Copies > 0 {
				ack := g.layer.Deliver(r, peer, t.self)
				if ack.Copies > 0 {
					if d := wait + syn.After[0] + ack.After[0]; d < timeout {
						return d, true, true
					}
					break
				}
			}
			wait += rto
		}
	}
	g.stats.DialsFailed++
	return timeout, false, true
}

// GossipTransport is one endpoint's memberlist transport: a real
// NetTransport whose outbound traffic goes through the GossipNet. Each
// UDP packet is decided on the sending side (lost, delayed, duplicated)
// and each TCP dial on the dialing side (see the handshake model on
// GossipNet), so every directed link is modelled exactly once; what comes
// in is passed on untouched.
type GossipTransport struct {
	net   *GossipNet
	self  int
	inner *memberlist.NetTransport
	addr  string

	done chan struct{}
	once sync.Once
}

var _ memberlist.NodeAwareTransport = (*GossipTransport)(nil)

// Transport binds a NetTransport on bind ("host:port", port 0 picks one),
// registers its address as endpoint self's and returns it wrapped. Plug it
// in with a config option: c.Transport = t.
func (g *GossipNet) Transport(self int, bind string) (*GossipTransport, error) {
	host, ps, err := net.SplitHostPort(bind)
	if err != nil {
		return nil, fmt.Errorf("gossip transport %q: %w", bind, err)
	}
	port, err := strconv.Atoi(ps)
	if err != nil || port < 0 || port > 65535 {
		return nil, fmt.Errorf("gossip transport %q: bad port", bind)
	}
	cfg := &memberlist.NetTransportConfig{BindAddrs: []string{host}, BindPort: port, Logger: log.New(io.Discard, "", 0)}
	var inner *memberlist.NetTransport
	// Port 0 takes the TCP port first and then asks for the same UDP port,
	// which another process may hold: try again, as memberlist does.
	for range 10 {
		if inner, err = memberlist.NewNetTransport(cfg); err == nil || port != 0 || !strings.Contains(err.Error(), "address already in use") {
			break
		}
	}
	if err != nil {
		return nil, fmt.Errorf("gossip transport %q: %w", bind, err)
	}
	ip, p, err := inner.FinalAdvertiseAddr("", 0)
	if err != nil {
		inner.Shutdown()
		return nil, fmt.Errorf("gossip transport %q: %w", bind, err)
	}
	t := &GossipTransport{net: g, self: self, inner: inner, addr: addrKey(net.JoinHostPort(ip.String(), strconv.Itoa(p))), done: make(chan struct{})}
	g.mu.Lock()
	g.addrs[t.addr] = self
	delete(g.down, t.addr)
	g.mu.Unlock()
	return t, nil
}

// Addr is the transport's "ip:port".
func (t *GossipTransport) Addr() string { return t.addr }

// FinalAdvertiseAddr implements memberlist.Transport.
func (t *GossipTransport) FinalAdvertiseAddr(ip string, port int) (net.IP, int, error) {
	return t.inner.FinalAdvertiseAddr(ip, port)
}

// WriteTo implements memberlist.Transport.
func (t *GossipTransport) WriteTo(b []byte, addr string) (time.Time, error) {
	return t.WriteToAddress(b, memberlist.Address{Addr: addr})
}

// WriteToAddress implements memberlist.NodeAwareTransport. A lost packet
// reports success: a radio sender cannot tell.
func (t *GossipTransport) WriteToAddress(b []byte, a memberlist.Address) (time.Time, error) {
	v, mapped := t.net.packet(t, a)
	if !mapped {
		return t.inner.WriteToAddress(b, a)
	}
	now := time.Now()
	var err error
	for c := range v.Copies {
		if v.After[c] <= 0 {
			_, err = t.inner.WriteToAddress(b, a)
			continue
		}
		// memberlist does not promise to leave b alone once we return.
		buf := bytes.Clone(b)
		time.AfterFunc(v.After[c], func() {
			select {
			case <-t.done:
				return
			default:
			}
			if t.net.inFlight(t, a) {
				_, _ = t.inner.WriteToAddress(buf, a)
			}
		})
	}
	return now, err
}

// PacketCh implements memberlist.Transport.
func (t *GossipTransport) PacketCh() <-chan *memberlist.Packet { return t.inner.PacketCh() }

// DialTimeout implements memberlist.Transport.
func (t *GossipTransport) DialTimeout(addr string, timeout time.Duration) (net.Conn, error) {
	return t.DialAddressTimeout(memberlist.Address{Addr: addr}, timeout)
}

// DialAddressTimeout implements memberlist.NodeAwareTransport: it waits
// out the handshake the GossipNet decided, then dials for real or fails
// with a dial timeout.
func (t *GossipTransport) DialAddressTimeout(a memberlist.Address, timeout time.Duration) (net.Conn, error) {
	wait, up, mapped := t.net.handshake(t, a, timeout)
	if !mapped {
		return t.inner.DialAddressTimeout(a, timeout)
	}
	if wait > 0 {
		tm := time.NewTimer(wait)
		defer tm.Stop()
		select {
		case <-tm.C:
		case <-t.done:
			return nil, &net.OpError{Op: "dial", Net: "tcp", Err: net.ErrClosed}
		}
	}
	if !up {
		return nil, &net.OpError{Op: "dial", Net: "tcp", Err: os.ErrDeadlineExceeded}
	}
	return t.inner.DialAddressTimeout(a, max(timeout-wait, time.Millisecond))
}

// StreamCh implements memberlist.Transport.
func (t *GossipTransport) StreamCh() <-chan net.Conn { return t.inner.StreamCh() }

// Shutdown implements memberlist.Transport; it also drops packets still
// held back by a delay.
func (t *GossipTransport) Shutdown() error {
	t.once.Do(func() { close(t.done) })
	return t.inner.Shutdown()
}

// FastGossipConfig is shell.GossipConfig as it was before the Lifeguard
// tuning, kept for comparison: memberlist's local-network defaults with
// probes every 200 ms, a 100 ms probe timeout, one indirect check and a
// fixed 400 ms suspicion (SuspicionMult 2, too few members to ask for
// confirmations), two sends per broadcast. It finds a crash in under a
// second on a clean network but declares live members dead under message
// loss (see TestGossipSweep).
func FastGossipConfig(name, bind string) (*memberlist.Config, error) {
	tuned, err := shell.GossipConfig(name, bind) // for the bind's checks
	if err != nil {
		return nil, err
	}
	c := memberlist.DefaultLocalConfig()
	c.Name = name
	c.BindAddr, c.BindPort = tuned.BindAddr, tuned.BindPort
	c.AdvertiseAddr, c.AdvertisePort = "", 0
	c.ProbeInterval = 200 * time.Millisecond
	c.ProbeTimeout = 100 * time.Millisecond
	c.SuspicionMult = 2
	c.GossipInterval = 50 * time.Millisecond
	c.PushPullInterval = 2 * time.Second
	c.DeadNodeReclaimTime = 100 * time.Millisecond
	c.Logger = tuned.Logger
	return c, nil
}

// GossipRun is one membership measurement: real memberlist nodes on
// loopback, their traffic through a GossipNet.
type GossipRun struct {
	Nodes    int           // robots (endpoints 0..Nodes-1); a coordinator node joins too
	Specs    []Spec        // message faults on every gossip link, round 1 throughout
	Seed     uint64        // the GossipNet's seed
	Duration time.Duration // how long to watch once every node sees every other (0: 10 s)
	// Config builds each node's configuration (nil: shell.GossipConfig);
	// its Transport and Events are replaced.
	Config func(name, bind string) (*memberlist.Config, error)
	// CrashAt crashes robot 0 this long into the watch (0: no crash): the
	// GossipNet silences it and its memberlist shuts down without leaving.
	CrashAt time.Duration
}

// GossipResult is what a GossipRun saw. Observers are the nodes that did
// not crash; a pair is (observer, member).
type GossipResult struct {
	Join time.Duration // until every node had seen every other join
	// FalseDead counts NotifyLeave events (memberlist declared a member
	// dead: its suspicion timed out, or a dead message arrived) for a
	// member that had not crashed, at any observer, from the first node's
	// start to the end of the watch. Nobody leaves gracefully in a run, so
	// each one is a false failure detection.
	FalseDead int
	// Flaps counts pairs coming back alive (NotifyJoin after a false dead)
	// once the member refuted its death.
	Flaps int
	// Detect is, per observer, the time from the crash to its NotifyLeave
	// for the crashed robot; DetectMax is the largest and Undetected counts
	// observers that had not noticed by the end.
	Detect     []time.Duration
	DetectMax  time.Duration
	Undetected int
	Stats      GossipStats
}

// watcher records one observer's membership events.
type watcher struct {
	obs  string
	meas *measure
}

type measure struct {
	mu      sync.Mutex
	crashed string             // the crashed member's name, once it crashed
	crashAt time.Time          // when it crashed
	seen    map[string]int     // per observer: members it has seen join
	dead    map[[2]string]bool // (observer, member) pairs falsely dead
	detect  map[string]time.Duration
	res     GossipResult
	stopped bool
}

func (w watcher) NotifyJoin(n *memberlist.Node) {
	m := w.meas
	m.mu.Lock()
	defer m.mu.Unlock()
	m.seen[w.obs]++
	k := [2]string{w.obs, n.Name}
	if m.dead[k] && !m.stopped {
		m.res.Flaps++
	}
	delete(m.dead, k)
}

func (w watcher) NotifyLeave(n *memberlist.Node) {
	m := w.meas
	m.mu.Lock()
	defer m.mu.Unlock()
	// A crashed node's suspicion timers still fire after its Shutdown:
	// not an observation.
	if m.stopped || w.obs == m.crashed {
		return
	}
	if n.Name == m.crashed {
		if _, ok := m.detect[w.obs]; !ok {
			m.detect[w.obs] = time.Since(m.crashAt)
		}
		return
	}
	m.dead[[2]string{w.obs, n.Name}] = true
	m.res.FalseDead++
}

func (w watcher) NotifyUpdate(*memberlist.Node) {}

// MeasureGossip runs r: it starts the coordinator's node, joins the robots
// to it, waits until every node sees every other alive, watches for
// r.Duration (crashing robot 0 at r.CrashAt) and shuts every node down.
func MeasureGossip(ctx context.Context, r GossipRun) (GossipResult, error) {
	if r.Nodes < 1 {
		return GossipResult{}, errors.New("gossip run: want at least one robot")
	}
	for _, s := range r.Specs {
		if err := s.Check(r.Nodes, 0); err != nil {
			return GossipResult{}, err
		}
	}
	if r.Duration <= 0 {
		r.Duration = 10 * time.Second
	}
	if r.CrashAt >= r.Duration {
		return GossipResult{}, fmt.Errorf("gossip run: crash at %s is not within the %s watch", r.CrashAt, r.Duration)
	}
	cfg := r.Config
	if cfg == nil {
		cfg = shell.GossipConfig
	}
	const fleet = "drill"
	gn := NewGossipNet(r.Seed, r.Specs)
	meas := &measure{seen: map[string]int{}, dead: map[[2]string]bool{}, detect: map[string]time.Duration{}}
	type node struct {
		e    int
		name string
		ml   *memberlist.Memberlist
	}
	var nodes []node
	defer func() {
		meas.mu.Lock()
		meas.stopped = true
		meas.mu.Unlock()
		var wg sync.WaitGroup
		for _, n := range nodes {
			wg.Go(func() { _ = n.ml.Shutdown() })
		}
		wg.Wait()
	}()
	start := time.Now()
	for e := Coordinator; e < r.Nodes; e++ {
		name := fleet + "/coordinator"
		if e != Coordinator {
			name = shell.RobotMember(fleet, e)
		}
		gn.Name(name, e)
		c, err := cfg(name, "127.0.0.1:0")
		if err != nil {
			return GossipResult{}, err
		}
		t, err := gn.Transport(e, "127.0.0.1:0")
		if err != nil {
			return GossipResult{}, err
		}
		c.Transport = t
		c.Events = watcher{obs: name, meas: meas}
		ml, err := memberlist.Create(c)
		if err != nil {
			t.Shutdown()
			return GossipResult{}, fmt.Errorf("gossip node %s: %w", name, err)
		}
		nodes = append(nodes, node{e, name, ml})
	}
	// Robots join the coordinator, as agentd does; a join is a TCP
	// push-pull, and one link's long loss burst should not hold up the
	// measurement, so each retry asks the next node up before them.
	deadline := time.Now().Add(30 * time.Second)
	var up []string
	for i, n := range nodes {
		for try := 0; i > 0; try++ {
			_, err := n.ml.Join([]string{up[try%len(up)]})
			if err == nil {
				break
			}
			if time.Now().After(deadline) || ctx.Err() != nil {
				return GossipResult{}, fmt.Errorf("gossip run: %s cannot join: %s", n.name, strings.Join(strings.Fields(err.Error()), " "))
			}
			time.Sleep(50 * time.Millisecond)
		}
		up = append(up, n.ml.LocalNode().Address())
	}
	// Joined: every node has seen every node (itself included) join. Not
	// "all alive at once": the fast settings under loss never get there.
	everyone := func() bool {
		meas.mu.Lock()
		defer meas.mu.Unlock()
		for _, n := range nodes {
			if meas.seen[n.name] < len(nodes) {
				return false
			}
		}
		return true
	}
	for !everyone() {
		if time.Now().After(deadline) || ctx.Err() != nil {
			return GossipResult{}, errors.New("gossip run: the members did not all see each other within 30s")
		}
		time.Sleep(20 * time.Millisecond)
	}
	watch := time.Now()
	meas.res.Join = watch.Sub(start)

	// Watch, crashing robot 0 when due.
	crashed := -1
	end := time.NewTimer(r.Duration)
	defer end.Stop()
	var crash <-chan time.Time
	if r.CrashAt > 0 {
		tc := time.NewTimer(r.CrashAt)
		defer tc.Stop()
		crash = tc.C
	}
loop:
	for {
		select {
		case <-ctx.Done():
			return GossipResult{}, ctx.Err()
		case <-end.C:
			break loop
		case <-crash:
			crash = nil
			victim := nodes[1] // robot 0
			meas.mu.Lock()
			meas.crashed, meas.crashAt = victim.name, time.Now()
			for _, n := range nodes {
				// Already (falsely) dead at this observer: nothing to find.
				if meas.dead[[2]string{n.name, victim.name}] {
					meas.detect[n.name] = 0
				}
			}
			meas.mu.Unlock()
			gn.Crash(victim.e)
			_ = victim.ml.Shutdown()
			crashed = victim.e
		}
	}

	meas.mu.Lock()
	meas.stopped = true
	res := meas.res
	detect := meas.detect
	meas.mu.Unlock()
	if crashed >= 0 {
		for _, n := range nodes {
			if n.e == crashed {
				continue
			}
			d, ok := detect[n.name]
			if !ok {
				res.Undetected++
				continue
			}
			res.Detect = append(res.Detect, d)
			res.DetectMax = max(res.DetectMax, d)
		}
	}
	res.Stats = gn.Stats()
	return res, nil
}
