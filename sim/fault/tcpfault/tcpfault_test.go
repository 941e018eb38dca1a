package tcpfault

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"net"
	"runtime"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
)

// echoServer echoes every connection back and reports how each one ended.
type echoServer struct {
	ln    net.Listener
	wg    sync.WaitGroup
	ended chan error // one per finished connection: nil for EOF, else the error

	mu    sync.Mutex
	conns map[net.Conn]struct{}
}

func newEcho(t *testing.T) *echoServer {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	e := &echoServer{ln: ln, ended: make(chan error, 64), conns: make(map[net.Conn]struct{})}
	e.wg.Add(1)
	go func() {
		defer e.wg.Done()
		for {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			e.mu.Lock()
			e.conns[c] = struct{}{}
			e.mu.Unlock()
			e.wg.Add(1)
			go func() {
				defer e.wg.Done()
				_, err := io.Copy(c, c)
				c.Close()
				e.mu.Lock()
				delete(e.conns, c)
				e.mu.Unlock()
				select {
				case e.ended <- err:
				default:
				}
			}()
		}
	}()
	t.Cleanup(e.close)
	return e
}

func (e *echoServer) addr() string { return e.ln.Addr().String() }

func (e *echoServer) close() {
	e.ln.Close()
	e.mu.Lock()
	for c := range e.conns {
		c.Close()
	}
	e.mu.Unlock()
	e.wg.Wait()
}

func listen(t *testing.T, target string) *Proxy {
	t.Helper()
	p, err := Listen("127.0.0.1:0", target)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { p.Close() })
	return p
}

func dial(t *testing.T, addr string) *net.TCPConn {
	t.Helper()
	c, err := net.DialTimeout("tcp", addr, 2*time.Second)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { c.Close() })
	return c.(*net.TCPConn)
}

// roundTrip writes msg and reads the echo back, failing after timeout.
func roundTrip(t *testing.T, c net.Conn, msg string, timeout time.Duration) {
	t.Helper()
	if err := echoOnce(c, msg, timeout); err != nil {
		t.Fatal(err)
	}
}

// echoOnce is roundTrip for goroutines other than the test's own.
func echoOnce(c net.Conn, msg string, timeout time.Duration) error {
	if err := c.SetDeadline(time.Now().Add(timeout)); err != nil {
		return err
	}
	if _, err := c.Write([]byte(msg)); err != nil {
		return err
	}
	got := make([]byte, len(msg))
	if _, err := io.ReadFull(c, got); err != nil {
		return fmt.Errorf("echo of %q: %w", msg, err)
	}
	if string(got) != msg {
		return fmt.Errorf("echo: got %q, want %q", got, msg)
	}
	return nil
}

// eventually polls cond for up to 5 s; counters are bumped just after a
// write returns, so a reader can see the bytes a moment before the count.
func eventually(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

func TestForwardEcho(t *testing.T) {
	e := newEcho(t)
	p := listen(t, e.addr())

	// More than one copy buffer, written while reading so neither side
	// blocks on full socket buffers.
	payload := make([]byte, 5*bufSize+123)
	rng := rand.New(rand.NewPCG(1, 2))
	for i := range payload {
		payload[i] = byte(rng.Uint32())
	}
	const conns = 2
	for range conns {
		c := dial(t, p.Addr())
		if err := c.SetDeadline(time.Now().Add(5 * time.Second)); err != nil {
			t.Fatal(err)
		}
		werr := make(chan error, 1)
		go func() {
			_, err := c.Write(payload)
			if err == nil {
				// The half-close must cross the proxy: the echo server ends
				// on it, and its close ends our read below.
				err = c.CloseWrite()
			}
			werr <- err
		}()
		got, err := io.ReadAll(c)
		if err != nil {
			t.Fatal(err)
		}
		if err := <-werr; err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(got, payload) {
			t.Fatalf("echo differs: got %d bytes, want %d", len(got), len(payload))
		}
	}
	want := uint64(conns * len(payload))
	eventually(t, "byte counters", func() bool {
		s := p.Counters()
		return s.BytesUp == want && s.BytesDown == want
	})
	if s := p.Counters(); s.Accepted != conns || s.Resets != 0 || s.Stalls != 0 {
		t.Fatalf("counters: %+v", s)
	}
}

func TestResetEcho(t *testing.T) {
	e := newEcho(t)
	p := listen(t, e.addr())
	a, b := dial(t, p.Addr()), dial(t, p.Addr())
	roundTrip(t, a, "a", 2*time.Second)
	roundTrip(t, b, "b", 2*time.Second)

	p.Reset()
	for _, c := range []net.Conn{a, b} {
		if err := c.SetReadDeadline(time.Now().Add(2 * time.Second)); err != nil {
			t.Fatal(err)
		}
		_, err := c.Read(make([]byte, 1))
		if !errors.Is(err, syscall.ECONNRESET) {
			t.Fatalf("client side: want a reset, got %v", err)
		}
	}
	// The target's side is reset too, not closed in order.
	for range 2 {
		select {
		case err := <-e.ended:
			if !errors.Is(err, syscall.ECONNRESET) {
				t.Fatalf("target side: want a reset, got %v", err)
			}
		case <-time.After(2 * time.Second):
			t.Fatal("target side never saw the reset")
		}
	}
	if s := p.Counters(); s.Resets != 2 {
		t.Fatalf("resets: %+v", s)
	}

	c := dial(t, p.Addr())
	roundTrip(t, c, "after reset", 2*time.Second)
	if s := p.Counters(); s.Accepted != 3 || s.Resets != 2 {
		t.Fatalf("counters: %+v", s)
	}
}

func TestStallNewConnection(t *testing.T) {
	e := newEcho(t)
	p := listen(t, e.addr())
	old := dial(t, p.Addr())
	roundTrip(t, old, "before", 2*time.Second)

	const d = 300 * time.Millisecond
	start := time.Now()
	p.Stall(d)
	fresh := dial(t, p.Addr()) // accepted during the stall

	var wg sync.WaitGroup
	arrived := make([]time.Duration, 2)
	for i, c := range []net.Conn{old, fresh} {
		wg.Add(1)
		go func() {
			defer wg.Done()
			if err := echoOnce(c, "during", d+3*time.Second); err != nil {
				t.Errorf("conn %d: %v", i, err)
				return
			}
			arrived[i] = time.Since(start)
		}()
	}
	wg.Wait()
	if t.Failed() {
		return
	}
	// The stall's end is at least start+d, and nothing crosses before it.
	for i, got := range arrived {
		if got < d {
			t.Errorf("conn %d: echo after %v, inside the %v stall", i, got, d)
		}
	}
	if s := p.Counters(); s.Accepted != 2 || s.Stalls != 1 {
		t.Fatalf("counters: %+v", s)
	}
}

func TestOverlappingStalls(t *testing.T) {
	e := newEcho(t)
	p := listen(t, e.addr())
	c := dial(t, p.Addr())
	roundTrip(t, c, "before", 2*time.Second)

	// A shorter stall inside a longer one does not shorten it.
	start := time.Now()
	p.Stall(400 * time.Millisecond)
	p.Stall(50 * time.Millisecond)
	roundTrip(t, c, "x", 3*time.Second)
	if got := time.Since(start); got < 400*time.Millisecond {
		t.Fatalf("echo after %v, inside the 400ms stall", got)
	}

	// A longer stall starting inside one extends it to the later end.
	start = time.Now()
	p.Stall(200 * time.Millisecond)
	time.Sleep(100 * time.Millisecond)
	second := time.Now()
	p.Stall(300 * time.Millisecond)
	roundTrip(t, c, "y", 3*time.Second)
	if got := time.Since(second); got < 300*time.Millisecond {
		t.Fatalf("echo %v after the second stall began, inside it (first began %v ago)",
			got, time.Since(start))
	}
	if s := p.Counters(); s.Stalls != 4 {
		t.Fatalf("stalls: %+v", s)
	}
	p.Stall(0) // not a stall
	if s := p.Counters(); s.Stalls != 4 {
		t.Fatalf("zero stall counted: %+v", s)
	}
}

func TestNATSThroughProxy(t *testing.T) {
	ns, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, NoLog: true, NoSigs: true})
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	defer func() {
		ns.Shutdown()
		ns.WaitForShutdown()
	}()
	if !ns.ReadyForConnections(5 * time.Second) {
		t.Fatal("nats server not ready")
	}
	p := listen(t, ns.Addr().String())

	// The responder and publisher talk to the server directly, so only the
	// client under test crosses the proxy.
	direct, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer direct.Close()
	if _, err := direct.Subscribe("echo", func(m *nats.Msg) { _ = m.Respond(m.Data) }); err != nil {
		t.Fatal(err)
	}
	if err := direct.Flush(); err != nil {
		t.Fatal(err)
	}

	disconnected := make(chan error, 1)
	reconnected := make(chan struct{}, 1)
	nc, err := nats.Connect("nats://"+p.Addr(),
		nats.ReconnectWait(50*time.Millisecond),
		nats.MaxReconnects(-1),
		nats.DisconnectErrHandler(func(_ *nats.Conn, err error) {
			select {
			case disconnected <- err:
			default:
			}
		}),
		nats.ReconnectHandler(func(*nats.Conn) {
			select {
			case reconnected <- struct{}{}:
			default:
			}
		}),
	)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	sub, err := nc.SubscribeSync("news")
	if err != nil {
		t.Fatal(err)
	}

	// pubSub checks both directions through the proxy: a request out and
	// its reply back, and a message from the direct side to nc's
	// subscription (the flush makes sure the server has the subscription).
	pubSub := func(stage string) {
		t.Helper()
		if err := nc.Flush(); err != nil {
			t.Fatalf("%s: flush: %v", stage, err)
		}
		m, err := nc.Request("echo", []byte(stage), 2*time.Second)
		if err != nil || string(m.Data) != stage {
			t.Fatalf("%s: request: %v %v", stage, m, err)
		}
		if err := direct.Publish("news", []byte(stage)); err != nil {
			t.Fatal(err)
		}
		m, err = sub.NextMsg(2 * time.Second)
		if err != nil || string(m.Data) != stage {
			t.Fatalf("%s: subscription: %v %v", stage, m, err)
		}
	}
	pubSub("before")

	const d = 500 * time.Millisecond
	start := time.Now()
	p.Stall(d)
	if _, err := nc.Request("echo", []byte("stalled"), 100*time.Millisecond); !errors.Is(err, nats.ErrTimeout) {
		t.Fatalf("request during stall: want timeout, got %v", err)
	}
	// Issued during the stall, answered once it ends.
	m, err := nc.Request("echo", []byte("held"), d+3*time.Second)
	if err != nil || string(m.Data) != "held" {
		t.Fatalf("request across the stall: %v %v", m, err)
	}
	if got := time.Since(start); got < d {
		t.Fatalf("reply after %v, inside the %v stall", got, d)
	}
	pubSub("after stall")

	p.Reset()
	select {
	case <-disconnected:
	case <-time.After(5 * time.Second):
		t.Fatal("client saw no disconnect after Reset")
	}
	select {
	case <-reconnected:
	case <-time.After(5 * time.Second):
		t.Fatal("client did not reconnect through the proxy")
	}
	pubSub("after reset")

	if s := p.Counters(); s.Accepted < 2 || s.Resets < 1 || s.Stalls != 1 || s.BytesUp == 0 || s.BytesDown == 0 {
		t.Fatalf("counters: %+v", s)
	}
}

func TestCloseReleasesEverything(t *testing.T) {
	before := runtime.NumGoroutine()
	func() {
		e := newEcho(t)
		defer e.close()
		p, err := Listen("127.0.0.1:0", e.addr())
		if err != nil {
			t.Fatal(err)
		}
		addr := p.Addr()

		// One idle connection, one with bytes held by a long stall.
		idle, err := net.DialTimeout("tcp", addr, 2*time.Second)
		if err != nil {
			t.Fatal(err)
		}
		defer idle.Close()
		roundTrip(t, idle, "idle", 2*time.Second)
		p.Stall(time.Hour)
		held, err := net.DialTimeout("tcp", addr, 2*time.Second)
		if err != nil {
			t.Fatal(err)
		}
		defer held.Close()
		if _, err := held.Write([]byte("held")); err != nil {
			t.Fatal(err)
		}
		eventually(t, "second accept", func() bool { return p.Counters().Accepted == 2 })

		closed := make(chan error, 1)
		go func() { closed <- p.Close() }()
		select {
		case err := <-closed:
			if err != nil {
				t.Fatalf("close: %v", err)
			}
		case <-time.After(5 * time.Second):
			t.Fatal("Close did not return despite the stall")
		}
		if err := p.Close(); err != nil {
			t.Fatalf("second close: %v", err)
		}

		// Both clients see their connection end.
		for _, c := range []net.Conn{idle, held} {
			if err := c.SetReadDeadline(time.Now().Add(2 * time.Second)); err != nil {
				t.Fatal(err)
			}
			if _, err := c.Read(make([]byte, 1)); err == nil {
				t.Fatal("read after Close succeeded")
			} else if ne, ok := err.(net.Error); ok && ne.Timeout() {
				t.Fatal("connection still open after Close")
			}
		}
		if c, err := net.DialTimeout("tcp", addr, time.Second); err == nil {
			c.Close()
			t.Fatal("proxy still accepting after Close")
		}
	}()
	// Close waits for its own goroutines; the echo server's and the
	// runtime's may take a moment more to be gone.
	eventually(t, "goroutines to exit", func() bool { return runtime.NumGoroutine() <= before })
}

func TestListenErrors(t *testing.T) {
	if _, err := Listen("127.0.0.1:0", ""); err == nil {
		t.Fatal("empty target accepted")
	}
	if _, err := Listen("127.0.0.1:-1", "127.0.0.1:1"); err == nil {
		t.Fatal("bad listen address accepted")
	}
}

func TestUnreachableTarget(t *testing.T) {
	// A port nobody listens on: take one and give it back.
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	target := ln.Addr().String()
	ln.Close()

	p := listen(t, target)
	c := dial(t, p.Addr())
	if err := c.SetReadDeadline(time.Now().Add(2 * time.Second)); err != nil {
		t.Fatal(err)
	}
	// The failed dial closes the client's connection rather than leaving it open.
	if _, err := c.Read(make([]byte, 1)); err == nil {
		t.Fatal("read succeeded with no target")
	} else if ne, ok := err.(net.Error); ok && ne.Timeout() {
		t.Fatal("client left hanging after a failed dial")
	}
}
