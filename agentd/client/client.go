package client

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"sync/atomic"
	"time"
)

// Limits of what the client reads and sends.
const (
	// MaxAnswerBytes bounds a decision view or health answer read from
	// agentd.
	MaxAnswerBytes = 1 << 20
	// maxMessageBytes bounds the part of an error answer kept as agentd's
	// message.
	maxMessageBytes = 4 << 10
	// MaxObservationBytes is agentd's own bound on an observation body.
	MaxObservationBytes = 1 << 20
	// MaxWait is agentd's bound on one long poll (wait=).
	MaxWait = time.Minute
	// MinWait is the shortest long poll WithWait accepts.
	MinWait = 100 * time.Millisecond
)

// Defaults.
const (
	DefaultURL       = "http://127.0.0.1:7400"
	DefaultWait      = 10 * time.Second
	DefaultTimeout   = 5 * time.Second
	DefaultUserAgent = "baton-agentd-client/1"
)

// DefaultRetry is the retry policy without WithRetry.
var DefaultRetry = RetryPolicy{Initial: 100 * time.Millisecond, Max: 2 * time.Second, Attempts: 8}

// RetryPolicy is how the client retries transient failures: agentd
// unreachable (down, restarting) or answering 5xx or 429. The pause before
// retry n (from 0) is Initial x 2^n, at most Max, with +-20% jitter.
type RetryPolicy struct {
	Initial time.Duration
	Max     time.Duration
	// Attempts bounds Report's tries in all (at least 1). Decision, Closed
	// and Next retry until their context ends.
	Attempts int
}

// Client talks to one agentd's local interface. It is safe for concurrent
// use.
type Client struct {
	base    string // no trailing slash
	token   string
	hc      *http.Client
	retry   RetryPolicy
	ua      string
	wait    time.Duration
	timeout time.Duration
	// epoch is the coordinator run of the last decision Next or Decision
	// returned (0: none yet): Next uses it to notice a new run that numbers
	// its rounds from 1 again.
	epoch atomic.Uint64
}

// Option configures a Client.
type Option func(*Client) error

// WithToken sends "Authorization: Bearer token" with every request (the
// token in agentd's --http-token-file).
func WithToken(token string) Option {
	return func(c *Client) error {
		if token == "" || strings.ContainsFunc(token, func(r rune) bool { return r <= ' ' || r == 0x7f }) {
			return errors.New("client: the token must be one word with no spaces or control characters")
		}
		c.token = token
		return nil
	}
}

// WithHTTPClient makes requests with hc (its transport, TLS, proxies). Its
// Timeout, when set, must exceed the long-poll wait plus WithTimeout.
func WithHTTPClient(hc *http.Client) Option {
	return func(c *Client) error {
		if hc == nil {
			return errors.New("client: nil *http.Client")
		}
		c.hc = hc
		return nil
	}
}

// WithRetry sets the retry policy (DefaultRetry otherwise).
func WithRetry(p RetryPolicy) Option {
	return func(c *Client) error {
		if p.Initial <= 0 || p.Max < p.Initial || p.Attempts < 1 {
			return fmt.Errorf("client: retry policy %+v: want 0 < Initial <= Max and Attempts >= 1", p)
		}
		c.retry = p
		return nil
	}
}

// WithUserAgent sets the User-Agent header.
func WithUserAgent(ua string) Option {
	return func(c *Client) error {
		if ua == "" || strings.ContainsAny(ua, "\r\n") {
			return errors.New("client: the user agent must be one non-empty line")
		}
		c.ua = ua
		return nil
	}
}

// WithWait sets how long one long poll asks agentd to wait (DefaultWait;
// MinWait up to MaxWait). Waiting for a decision takes as many polls as it
// needs; a shorter wait only costs more requests.
func WithWait(d time.Duration) Option {
	return func(c *Client) error {
		if d < MinWait || d > MaxWait {
			return fmt.Errorf("client: wait %s: want %s up to %s (agentd's limit)", d, MinWait, MaxWait)
		}
		c.wait = d
		return nil
	}
}

// WithTimeout bounds one report or health request, and what a long poll
// may take beyond its wait (DefaultTimeout).
func WithTimeout(d time.Duration) Option {
	return func(c *Client) error {
		if d <= 0 {
			return fmt.Errorf("client: timeout %s: want more than 0", d)
		}
		c.timeout = d
		return nil
	}
}

// New returns a client of the agentd local interface at baseURL, e.g.
// "http://127.0.0.1:7400" (a path prefix, for a gateway in front of
// agentd, is kept).
func New(baseURL string, opts ...Option) (*Client, error) {
	base, err := parseBase(baseURL)
	if err != nil {
		return nil, err
	}
	c := &Client{base: base, hc: &http.Client{}, retry: DefaultRetry, ua: DefaultUserAgent, wait: DefaultWait, timeout: DefaultTimeout}
	for _, o := range opts {
		if o == nil {
			continue
		}
		if err := o(c); err != nil {
			return nil, err
		}
	}
	if t := c.hc.Timeout; t > 0 && t <= c.wait+c.timeout {
		return nil, fmt.Errorf("client: the http.Client's Timeout %s would cut long polls of %s short: leave it 0 or make it over %s", t, c.wait, c.wait+c.timeout)
	}
	return c, nil
}

// parseBase checks a base URL: http or https, a host, no credentials,
// query or fragment. A trailing slash is dropped.
func parseBase(raw string) (string, error) {
	raw = strings.TrimSpace(raw)
	bad := func(why string) error {
		return fmt.Errorf("client: agentd URL %q: %s; want e.g. %s", raw, why, DefaultURL)
	}
	if raw == "" {
		return "", bad("empty")
	}
	u, err := url.Parse(raw)
	switch {
	case err != nil:
		var ue *url.Error
		if errors.As(err, &ue) {
			err = ue.Err
		}
		return "", bad(err.Error())
	case u.Scheme != "http" && u.Scheme != "https":
		return "", bad("not an http or https URL")
	case u.Hostname() == "":
		return "", bad("no host")
	case u.User != nil:
		return "", bad("credentials belong in WithToken, not the URL")
	case u.RawQuery != "" || u.Fragment != "" || u.ForceQuery:
		return "", bad("no query or fragment, please")
	}
	if p := u.Port(); p != "" {
		if n, err := strconv.Atoi(p); err != nil || n < 1 || n > 65535 {
			return "", bad("bad port")
		}
	}
	return strings.TrimRight(u.String(), "/"), nil
}

// URL is the base URL of the agentd this client talks to.
func (c *Client) URL() string { return c.base }

// ---- errors ----

// Sentinel errors, for errors.Is.
var (
	// ErrUnreachable: no answer from agentd (not running, restarting,
	// wrong address), or the connection broke mid-answer.
	ErrUnreachable = errors.New("agentd unreachable")
	// ErrUnauthorized: agentd answered 401 (token missing or wrong).
	ErrUnauthorized = errors.New("agentd refused the token")
	// ErrBadRequest: agentd answered 400 (a bad observation, say).
	ErrBadRequest = errors.New("agentd refused the request")
)

// UnreachableError is a request that got no answer from agentd.
type UnreachableError struct {
	URL string // agentd's base URL
	Err error
}

func (e *UnreachableError) Error() string {
	return fmt.Sprintf("agentd at %s is unreachable: %v", e.URL, e.Err)
}
func (e *UnreachableError) Unwrap() error        { return e.Err }
func (e *UnreachableError) Is(target error) bool { return target == ErrUnreachable }

// StatusError is an answer from agentd other than success.
type StatusError struct {
	URL     string // agentd's base URL
	Request string // e.g. "POST /v1/observation"
	Code    int
	// Message is agentd's own explanation: the "error" of its JSON answer,
	// or the answer's text.
	Message string
	hint    string
}

func (e *StatusError) Error() string {
	s := fmt.Sprintf("agentd at %s: %s: %d %s", e.URL, e.Request, e.Code, http.StatusText(e.Code))
	if e.Message != "" {
		s += ": " + e.Message
	}
	if e.hint != "" {
		s += " (" + e.hint + ")"
	}
	return s
}

func (e *StatusError) Is(target error) bool {
	return target == ErrUnauthorized && e.Code == http.StatusUnauthorized ||
		target == ErrBadRequest && e.Code == http.StatusBadRequest
}

// transient reports whether err may go away by asking again.
func transient(err error) bool {
	var se *StatusError
	if errors.As(err, &se) {
		return se.Code >= 500 || se.Code == http.StatusTooManyRequests
	}
	return errors.Is(err, ErrUnreachable)
}

// ---- requests ----

// do makes one request, bounded by timeout, and returns the status and
// the answer (read up to MaxAnswerBytes). A status other than 2xx is a
// *StatusError; no answer is an *UnreachableError, or ctx's error when ctx
// ended.
func (c *Client) do(ctx context.Context, method, path string, q url.Values, body []byte, timeout time.Duration) (int, []byte, error) {
	rctx, cancel := context.WithTimeout(ctx, timeout)
	defer cancel()
	target := c.base + path
	if len(q) > 0 {
		target += "?" + q.Encode()
	}
	var rd io.Reader
	if body != nil {
		rd = bytes.NewReader(body)
	}
	req, err := http.NewRequestWithContext(rctx, method, target, rd)
	if err != nil {
		return 0, nil, fmt.Errorf("client: %s %s: %w", method, path, err)
	}
	req.Header.Set("User-Agent", c.ua)
	req.Header.Set("Accept", "application/json")
	if body != nil {
		req.Header.Set("Content-Type", "application/json")
	}
	if c.token != "" {
		req.Header.Set("Authorization", "Bearer "+c.token)
	}
	resp, err := c.hc.Do(req)
	if err != nil {
		if ctx.Err() != nil {
			return 0, nil, ctx.Err()
		}
		return 0, nil, &UnreachableError{URL: c.base, Err: unwrapURL(err)}
	}
	defer resp.Body.Close()
	data, err := io.ReadAll(io.LimitReader(resp.Body, MaxAnswerBytes+1))
	if err != nil {
		if ctx.Err() != nil {
			return 0, nil, ctx.Err()
		}
		return 0, nil, &UnreachableError{URL: c.base, Err: fmt.Errorf("reading the answer to %s %s: %w", method, path, err)}
	}
	if resp.StatusCode < 200 || resp.StatusCode > 299 {
		se := &StatusError{URL: c.base, Request: method + " " + path, Code: resp.StatusCode, Message: message(data)}
		if se.Code == http.StatusUnauthorized {
			se.hint = "no token given: use WithToken with the token in agentd's --http-token-file"
			if c.token != "" {
				se.hint = "the token given is not the one in agentd's --http-token-file"
			}
		}
		return resp.StatusCode, data, se
	}
	if len(data) > MaxAnswerBytes {
		return 0, nil, fmt.Errorf("agentd at %s: %s %s: answer over %d bytes", c.base, method, path, MaxAnswerBytes)
	}
	return resp.StatusCode, data, nil
}

// unwrapURL drops the *url.Error layer, which repeats the method and the
// whole URL.
func unwrapURL(err error) error {
	var ue *url.Error
	if errors.As(err, &ue) {
		return ue.Err
	}
	return err
}

// message is agentd's explanation in an error answer: {"error": "..."},
// or the text itself, trimmed and bounded.
func message(data []byte) string {
	var e struct {
		Error string `json:"error"`
	}
	if json.Unmarshal(data, &e) == nil && e.Error != "" {
		return bound(e.Error)
	}
	return bound(strings.TrimSpace(string(data)))
}

func bound(s string) string {
	if len(s) > maxMessageBytes {
		return s[:maxMessageBytes] + "..."
	}
	return s
}

// pause sleeps before retry n, or returns ctx's error when it ends first.
func (c *Client) pause(ctx context.Context, n int) error {
	d := c.retry.Initial
	for i := 0; i < n && d < c.retry.Max; i++ {
		d *= 2
	}
	d = min(d, c.retry.Max)
	d = time.Duration(float64(d) * (0.8 + 0.4*rand.Float64()))
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return ctx.Err()
	case <-t.C:
		return nil
	}
}

// ---- decisions ----

// Decision is this robot's decision for one round, as agentd serves it.
type Decision struct {
	Round uint64
	// Epoch is the coordinator run the round belongs to.
	Epoch uint64
	// Act: carry out Control. False is a hold: there is no valid decision,
	// do nothing new (Control is 0 and Action empty then).
	Act     bool
	Control int
	// Action names Control in the scenario's terms (harbor: N, S, E, W or
	// stay; upkeep: service or "to SITE").
	Action string
	// Reason says why the robot holds (empty otherwise).
	Reason string
	// Heard and Guessed are the predecessors whose decisions this robot
	// heard in time, and those it guessed.
	Heard, Guessed []int
	// Closed: the round is closed; Control is then the fleet's final
	// control for this robot.
	Closed bool
	// RoundLatency is the coordinator's measure of the whole round, once
	// closed (0 otherwise).
	RoundLatency time.Duration
}

// view is agentd's decision JSON (agentd/node.View). A hold has no
// control or action.
type view struct {
	Round          uint64  `json:"round"`
	Epoch          uint64  `json:"epoch"`
	Control        *int    `json:"control"`
	Action         *string `json:"action"`
	Hold           bool    `json:"hold"`
	Reason         string  `json:"reason"`
	Heard          []int   `json:"heard"`
	Guessed        []int   `json:"guessed"`
	Closed         bool    `json:"closed"`
	RoundLatencyUs uint64  `json:"round_latency_us"`
}

func (v view) decision() Decision {
	d := Decision{Round: v.Round, Epoch: v.Epoch, Reason: v.Reason, Heard: nonNil(v.Heard), Guessed: nonNil(v.Guessed),
		Closed: v.Closed, RoundLatency: time.Duration(v.RoundLatencyUs) * time.Microsecond}
	if !v.Hold && v.Control != nil {
		d.Act, d.Control = true, *v.Control
		if v.Action != nil {
			d.Action = *v.Action
		}
	}
	return d
}

func nonNil(s []int) []int {
	if s == nil {
		return []int{}
	}
	return s
}

// Decision waits for this robot's decision for round (0: the current
// round). It returns the decision, or a hold (Act false) that waiting
// cannot lift; see the package documentation for how it waits.
func (c *Client) Decision(ctx context.Context, round uint64) (Decision, error) {
	return c.await(ctx, round, false)
}

// Closed waits for round's close (closed=1): Control is then the fleet's
// final control for this robot, the one the coordinator books. A robot
// the round closed without holds.
func (c *Client) Closed(ctx context.Context, round uint64) (Decision, error) {
	return c.await(ctx, round, true)
}

func (c *Client) await(ctx context.Context, round uint64, closed bool) (Decision, error) {
	var last *view
	for {
		v, final, err := c.poll(ctx, round, closed)
		if err != nil {
			return c.ended(last, err)
		}
		if !v.Hold || final {
			return c.served(v), nil
		}
		last = &v
	}
}

// Next waits for the decision of the first round after round after that
// this robot can act on: round after+1, or, when rounds went by meanwhile,
// the current round (the ones in between are over: acting on them is too
// late). A hold for that round that waiting cannot lift is returned (Act
// false). Pass 0 for the first call; with a new coordinator run that
// numbers rounds from 1 again (no durable log), Next returns the new run's
// current round even though it is not above after.
func (c *Client) Next(ctx context.Context, after uint64) (Decision, error) {
	target := after + 1
	var last *view
	idle := 0
	for {
		v, final, err := c.poll(ctx, target, false)
		if err != nil {
			return c.ended(last, err)
		}
		if !v.Hold {
			return c.served(v), nil
		}
		last = &v
		// Where is the fleet? (round=0: the current round, at once.)
		cur, err := c.view(ctx, 0, false, 0)
		if err != nil {
			if !transient(err) {
				return c.ended(last, err)
			}
			if err := c.pause(ctx, idle); err != nil {
				return c.ended(last, err)
			}
			idle++
			continue
		}
		seen := c.epoch.Load()
		switch {
		case cur.Round > target:
			target, idle = cur.Round, 0
		case cur.Round > 0 && cur.Round <= after && seen != 0 && cur.Epoch != seen:
			target, idle = cur.Round, 0 // a new run, numbering from 1 again
		case final && cur.Round > 0 && cur.Round+1 >= target:
			// A hold waiting cannot lift, for the current round (or the
			// next, whose start never got here and which closed).
			return c.served(v), nil
		case final:
			// No round to hold for (round starts refused before any was
			// followed): ask again later.
			if err := c.pause(ctx, idle); err != nil {
				return c.ended(last, err)
			}
			idle++
		}
	}
}

// served notes the run of a decision returned to the caller.
func (c *Client) served(v view) Decision {
	if v.Epoch != 0 && v.Round != 0 {
		c.epoch.Store(v.Epoch)
	}
	return v.decision()
}

// ended is the answer to a wait that failed: the last hold agentd gave,
// if any, with the error.
func (c *Client) ended(last *view, err error) (Decision, error) {
	if last == nil {
		return Decision{}, err
	}
	d := last.decision()
	if d.Reason != "" {
		err = fmt.Errorf("%w (agentd's last answer for round %d: hold, %s)", err, d.Round, d.Reason)
	}
	return d, err
}

// poll is one long poll for round's view, retrying transient failures
// until ctx ends. final: agentd answered before the wait ran out, so the
// answer is one waiting cannot change (agentd answers a hold early only
// then); a hold that came at the end of the wait is not final.
func (c *Client) poll(ctx context.Context, round uint64, closed bool) (view, bool, error) {
	for n := 0; ; n++ {
		wait := c.wait
		if dl, ok := ctx.Deadline(); ok {
			// Let agentd answer before ctx ends, so its last word is known.
			wait = min(wait, time.Until(dl)-50*time.Millisecond).Truncate(time.Millisecond)
			if wait <= 0 {
				<-ctx.Done()
				return view{}, false, fmt.Errorf("waiting for round %s: %w", roundName(round), ctx.Err())
			}
		}
		t0 := time.Now()
		v, err := c.view(ctx, round, closed, wait)
		if err == nil {
			return v, time.Since(t0) < wait, nil
		}
		if ctx.Err() != nil {
			return view{}, false, fmt.Errorf("waiting for round %s: %w", roundName(round), ctx.Err())
		}
		if !transient(err) {
			return view{}, false, err
		}
		if perr := c.pause(ctx, n); perr != nil {
			return view{}, false, fmt.Errorf("waiting for round %s: %w (last try: %v)", roundName(round), perr, err)
		}
	}
}

func roundName(r uint64) string {
	if r == 0 {
		return "the current round"
	}
	return strconv.FormatUint(r, 10)
}

// view asks once for round's view, agentd waiting up to wait.
func (c *Client) view(ctx context.Context, round uint64, closed bool, wait time.Duration) (view, error) {
	q := url.Values{"round": {strconv.FormatUint(round, 10)}, "wait": {wait.String()}}
	if closed {
		q.Set("closed", "1")
	}
	_, data, err := c.do(ctx, http.MethodGet, "/v1/decision", q, nil, wait+c.timeout)
	if err != nil {
		return view{}, err
	}
	var v view
	if err := json.Unmarshal(data, &v); err != nil {
		return view{}, fmt.Errorf("agentd at %s: GET /v1/decision: not a decision view: %v", c.base, err)
	}
	if !v.Hold && v.Control == nil {
		return view{}, fmt.Errorf("agentd at %s: GET /v1/decision: round %d's view is neither a hold nor names a control", c.base, v.Round)
	}
	return v, nil
}

// ---- observations ----

// Sighting is one thing the robot saw, in the scenario's terms (harbor:
// What a slick's index, Value its cell or -1 once collected; upkeep: What
// a site's index, Value its wear level).
type Sighting struct {
	What  int32 `json:"what"`
	Value int32 `json:"value"`
}

// Observation is the robot's report after carrying out a round: the round
// (0: before round 1, where the robot is), its position after it, the
// control it actually carried out (0 after a hold) and what it saw.
type Observation struct {
	Round    uint64     `json:"round"`
	Position int32      `json:"position"`
	Applied  int        `json:"applied"`
	Seen     []Sighting `json:"seen"`
}

// Report posts an observation (POST /v1/observation). Transient failures
// are retried (RetryPolicy.Attempts tries in all, within ctx); a 400 is
// returned at once with agentd's reason (errors.Is(err, ErrBadRequest)).
// Reporting the same observation twice is harmless.
func (c *Client) Report(ctx context.Context, o Observation) error {
	if o.Seen == nil {
		o.Seen = []Sighting{}
	}
	body, err := json.Marshal(o)
	if err != nil {
		return fmt.Errorf("client: observation: %w", err)
	}
	if len(body) > MaxObservationBytes {
		return fmt.Errorf("client: observation of round %d is %d bytes, over agentd's %d", o.Round, len(body), MaxObservationBytes)
	}
	for n := 0; ; n++ {
		_, _, err := c.do(ctx, http.MethodPost, "/v1/observation", nil, body, c.timeout)
		if err == nil {
			return nil
		}
		if ctx.Err() != nil {
			return fmt.Errorf("reporting round %d: %w", o.Round, ctx.Err())
		}
		if !transient(err) {
			return fmt.Errorf("reporting round %d: %w", o.Round, err)
		}
		if n+1 >= c.retry.Attempts {
			return fmt.Errorf("reporting round %d: %w (gave up after %d tries)", o.Round, err, n+1)
		}
		if perr := c.pause(ctx, n); perr != nil {
			return fmt.Errorf("reporting round %d: %w (last try: %v)", o.Round, perr, err)
		}
	}
}

// ---- health ----

// Health is agentd's /healthz: OK while the robot can act on rounds, and
// agentd's text either way ("ok robot 3 fleet yard run ... round 12",
// "waiting for the first round", or why it holds).
type Health struct {
	OK   bool
	Text string
	// Err is set when the probe got no usable answer (WatchHealth only;
	// OK is false then and Text is the error's).
	Err error
}

// Health asks /healthz once (no retries; bounded by WithTimeout). A 503
// is not an error: it is agentd saying the robot holds, and why.
func (c *Client) Health(ctx context.Context) (Health, error) {
	code, data, err := c.do(ctx, http.MethodGet, "/healthz", nil, nil, c.timeout)
	var se *StatusError
	if errors.As(err, &se) && code == http.StatusServiceUnavailable {
		return Health{OK: false, Text: se.Message}, nil
	}
	if err != nil {
		return Health{}, err
	}
	return Health{OK: true, Text: bound(strings.TrimSpace(string(data)))}, nil
}

// WatchHealth probes /healthz every interval (a second when every <= 0)
// and sends each result; a probe that fails sends OK false with the error.
// The channel is closed when ctx ends. A reader that falls behind slows
// the probes down; none is dropped.
func (c *Client) WatchHealth(ctx context.Context, every time.Duration) <-chan Health {
	if every <= 0 {
		every = time.Second
	}
	out := make(chan Health, 1)
	go func() {
		defer close(out)
		t := time.NewTicker(every)
		defer t.Stop()
		for {
			h, err := c.Health(ctx)
			if ctx.Err() != nil {
				return
			}
			if err != nil {
				h = Health{OK: false, Text: err.Error(), Err: err}
			}
			select {
			case out <- h:
			case <-ctx.Done():
				return
			}
			select {
			case <-t.C:
			case <-ctx.Done():
				return
			}
		}
	}()
	return out
}
