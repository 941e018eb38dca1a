// Package tcpfault is a small TCP proxy for drills: put it between a daemon
// and its NATS server and it can stall the transport (bytes stop flowing in
// both directions for a while, connections stay open) or reset it (every
// connection is torn down abruptly, as a crashed peer or a broken path would
// do). Drills use it to check that agentd and the coordinator ride out a
// stuck or broken link to the bus and recover once it works again.
//
// It is a shell part: it uses real sockets and the real clock. Memory is
// bounded: each connection holds one fixed-size buffer per direction, and a
// stall holds at most one read's worth of bytes per direction in the proxy;
// the rest waits in the kernel's socket buffers and, once those fill, pushes
// back on the sender as TCP flow control does.
package tcpfault

import (
	"context"
	"errors"
	"io"
	"net"
	"sync"
	"sync/atomic"
	"time"
)

const (
	// bufSize is the copy buffer per direction per connection.
	bufSize = 32 << 10
	// dialTimeout bounds the dial to the target, so that an unreachable
	// target does not pin a goroutine per accepted connection.
	dialTimeout = 5 * time.Second
	// maxAcceptBackoff caps the wait after a failed Accept (e.g. out of file
	// descriptors) so the proxy neither spins nor gives up.
	maxAcceptBackoff = time.Second
)

// Stats counts what the proxy has done since Listen.
type Stats struct {
	Accepted  uint64 // connections accepted from clients
	Resets    uint64 // connections torn down by Reset
	Stalls    uint64 // calls to Stall with a positive duration
	BytesUp   uint64 // bytes forwarded client -> target
	BytesDown uint64 // bytes forwarded target -> client
}

// Proxy forwards TCP connections from its listening address to one target
// and injects stalls and resets on demand. Its methods are safe for
// concurrent use.
type Proxy struct {
	ln     net.Listener
	target string
	ctx    context.Context // cancelled by Close; aborts pending dials
	cancel context.CancelFunc
	wg     sync.WaitGroup // every goroutine the proxy starts

	mu         sync.Mutex
	closed     bool
	links      map[*link]struct{}
	stallUntil time.Time

	accepted, resets, stalls, bytesUp, bytesDown atomic.Uint64
}

// link is one client connection and, once dialled, its upstream connection.
type link struct {
	client net.Conn
	server net.Conn      // nil while dialling; guarded by Proxy.mu
	done   chan struct{} // closed when the link is torn down
	gone   bool          // guarded by Proxy.mu
}

// Listen starts a proxy listening on listen (e.g. "127.0.0.1:0") that
// forwards every accepted connection to target.
func Listen(listen, target string) (*Proxy, error) {
	if target == "" {
		return nil, errors.New("tcpfault: empty target address")
	}
	ln, err := net.Listen("tcp", listen)
	if err != nil {
		return nil, err
	}
	ctx, cancel := context.WithCancel(context.Background())
	p := &Proxy{
		ln:     ln,
		target: target,
		ctx:    ctx,
		cancel: cancel,
		links:  make(map[*link]struct{}),
	}
	p.wg.Add(1)
	go p.acceptLoop()
	return p, nil
}

// Addr is the address the proxy listens on; point the daemon at it.
func (p *Proxy) Addr() string { return p.ln.Addr().String() }

// Stall stops forwarding bytes in both directions on every connection,
// current and new, for d. Connections stay open and accepted; bytes sent
// meanwhile are delivered after the stall ends. A stall that overlaps an
// earlier one extends it to the later end; it never shortens it.
func (p *Proxy) Stall(d time.Duration) {
	if d <= 0 {
		return
	}
	end := time.Now().Add(d)
	p.mu.Lock()
	if end.After(p.stallUntil) {
		p.stallUntil = end
	}
	p.mu.Unlock()
	p.stalls.Add(1)
}

// Reset tears down every current connection on both sides, with a TCP RST
// rather than an orderly close, so each peer sees the connection break
// rather than end. Connections accepted afterwards are forwarded normally.
func (p *Proxy) Reset() {
	p.mu.Lock()
	defer p.mu.Unlock()
	for l := range p.links {
		p.dropLocked(l, true)
		p.resets.Add(1)
	}
}

// Counters returns a snapshot of the proxy's counters.
func (p *Proxy) Counters() Stats {
	return Stats{
		Accepted:  p.accepted.Load(),
		Resets:    p.resets.Load(),
		Stalls:    p.stalls.Load(),
		BytesUp:   p.bytesUp.Load(),
		BytesDown: p.bytesDown.Load(),
	}
}

// Close stops listening, closes every connection and returns once all of
// the proxy's goroutines have exited. Later calls return nil.
func (p *Proxy) Close() error {
	p.mu.Lock()
	if p.closed {
		p.mu.Unlock()
		return nil
	}
	p.closed = true
	for l := range p.links {
		p.dropLocked(l, false)
	}
	p.mu.Unlock()
	p.cancel()
	err := p.ln.Close()
	p.wg.Wait()
	return err
}

func (p *Proxy) acceptLoop() {
	defer p.wg.Done()
	var backoff time.Duration
	for {
		c, err := p.ln.Accept()
		if err != nil {
			if p.isClosed() || errors.Is(err, net.ErrClosed) {
				return
			}
			// Most other Accept errors are transient (descriptor limits);
			// back off as net/http does instead of ending the proxy mid-drill.
			backoff = min(max(2*backoff, 5*time.Millisecond), maxAcceptBackoff)
			t := time.NewTimer(backoff)
			select {
			case <-p.ctx.Done():
				t.Stop()
				return
			case <-t.C:
			}
			continue
		}
		backoff = 0
		p.accepted.Add(1)
		p.wg.Add(1)
		go p.serve(c)
	}
}

func (p *Proxy) isClosed() bool {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.closed
}

// serve dials the target for one client connection and copies both ways
// until both directions end or the link is torn down.
func (p *Proxy) serve(c net.Conn) {
	defer p.wg.Done()
	l := &link{client: c, done: make(chan struct{})}
	p.mu.Lock()
	if p.closed {
		p.mu.Unlock()
		c.Close()
		return
	}
	// Registered before dialling so that Reset and Close reach it too.
	p.links[l] = struct{}{}
	p.mu.Unlock()

	d := net.Dialer{Timeout: dialTimeout}
	s, err := d.DialContext(p.ctx, "tcp", p.target)
	if err != nil {
		p.drop(l, false)
		return
	}
	p.mu.Lock()
	if l.gone {
		// Reset or Close reached the link while it was dialling.
		p.mu.Unlock()
		abort(s)
		return
	}
	l.server = s
	p.mu.Unlock()

	upDone := make(chan struct{})
	p.wg.Add(1)
	go func() {
		defer p.wg.Done()
		defer close(upDone)
		p.pump(l, s, c, &p.bytesUp)
	}()
	p.pump(l, c, s, &p.bytesDown)
	<-upDone
	p.drop(l, false)
}

// pump copies src to dst. Whatever a read returns (bytes, end of stream or
// an error) waits out any stall before it is passed on, so that nothing,
// not even a close, crosses the proxy during a stall.
func (p *Proxy) pump(l *link, dst, src net.Conn, count *atomic.Uint64) {
	buf := make([]byte, bufSize)
	for {
		n, err := src.Read(buf)
		if !p.waitStall(l.done) {
			return
		}
		if n > 0 {
			w, werr := dst.Write(buf[:n])
			count.Add(uint64(w))
			if werr != nil {
				p.drop(l, false)
				return
			}
		}
		if err == io.EOF {
			// Pass the half-close on; the other direction may still flow.
			if cw, ok := dst.(interface{ CloseWrite() error }); ok {
				if cw.CloseWrite() == nil {
					return
				}
			}
			p.drop(l, false)
			return
		}
		if err != nil {
			p.drop(l, false)
			return
		}
	}
}

// waitStall blocks until no stall is in force. It reports false if the link
// was torn down meanwhile. It rereads the end after each wait because a
// later Stall may have extended it.
func (p *Proxy) waitStall(done <-chan struct{}) bool {
	for {
		p.mu.Lock()
		until := p.stallUntil
		p.mu.Unlock()
		wait := time.Until(until)
		if wait <= 0 {
			select {
			case <-done:
				return false
			default:
				return true
			}
		}
		t := time.NewTimer(wait)
		select {
		case <-done:
			t.Stop()
			return false
		case <-t.C:
		}
	}
}

func (p *Proxy) drop(l *link, reset bool) {
	p.mu.Lock()
	p.dropLocked(l, reset)
	p.mu.Unlock()
}

// dropLocked tears a link down once; closing the sockets unblocks its
// pumps' reads and writes, and closing done ends any wait for a stall.
func (p *Proxy) dropLocked(l *link, reset bool) {
	if l.gone {
		return
	}
	l.gone = true
	close(l.done)
	delete(p.links, l)
	shut := net.Conn.Close
	if reset {
		shut = abort
	}
	shut(l.client)
	if l.server != nil {
		shut(l.server)
	}
}

// abort closes c with a TCP RST instead of a FIN where the platform allows.
func abort(c net.Conn) error {
	if tc, ok := c.(*net.TCPConn); ok {
		_ = tc.SetLinger(0)
	}
	return c.Close()
}
