package node

import (
	"bytes"
	"crypto/subtle"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"strconv"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"baton/agentd/turn"
)

// Handler serves the robot's local interface:
//
//	GET  /v1/decision?round=N&wait=2s&closed=1   this robot's decision (hold when none)
//	POST /v1/observation                         {"round":N,"position":P,"applied":C,"seen":[{"what":i,"value":v}]}
//	GET  /healthz                                200 while the robot can act on rounds; 503 and why when it holds
//	GET  /metrics                                Prometheus
func (n *Node) Handler(reg prometheus.Gatherer) http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("GET /v1/decision", n.serveDecision)
	mux.HandleFunc("POST /v1/observation", n.serveObservation)
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, r *http.Request) {
		ok, why := n.Health()
		if !ok {
			http.Error(w, fmt.Sprintf("robot %d fleet %s: %s", n.cfg.Robot, n.cfg.Fleet, why), http.StatusServiceUnavailable)
			return
		}
		fmt.Fprintf(w, "ok robot %d fleet %s %s\n", n.cfg.Robot, n.cfg.Fleet, why)
	})
	if reg != nil {
		mux.Handle("GET /metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{}))
	}
	return mux
}

func httpError(w http.ResponseWriter, code int, msg string) {
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(code)
	json.NewEncoder(w).Encode(map[string]string{"error": msg})
}

func (n *Node) serveDecision(w http.ResponseWriter, r *http.Request) {
	q := r.URL.Query()
	var round uint64
	if s := q.Get("round"); s != "" {
		v, err := strconv.ParseUint(s, 10, 64)
		if err != nil {
			httpError(w, http.StatusBadRequest, fmt.Sprintf("round=%q is not a round number", s))
			return
		}
		round = v
	}
	wait := time.Duration(0)
	if s := q.Get("wait"); s != "" {
		d, err := time.ParseDuration(s)
		if err != nil || d < 0 || d > time.Minute {
			httpError(w, http.StatusBadRequest, fmt.Sprintf("wait=%q: give a duration up to 1m, e.g. 2s", s))
			return
		}
		wait = d
	}
	closed := q.Get("closed") == "1" || q.Get("closed") == "true"
	v := n.Decision(r.Context(), round, wait, closed)
	w.Header().Set("Content-Type", "application/json")
	json.NewEncoder(w).Encode(v)
}

func (n *Node) serveObservation(w http.ResponseWriter, r *http.Request) {
	body, err := io.ReadAll(io.LimitReader(r.Body, MaxObservationBytes+1))
	if err != nil {
		httpError(w, http.StatusBadRequest, "reading the observation: "+err.Error())
		return
	}
	rep, err := ParseReport(body)
	if err != nil {
		httpError(w, http.StatusBadRequest, err.Error())
		return
	}
	if err := n.Observe(rep); err != nil {
		code := http.StatusServiceUnavailable
		if errors.Is(err, ErrBadReport) {
			code = http.StatusBadRequest
		}
		httpError(w, code, err.Error())
		return
	}
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(http.StatusAccepted)
	fmt.Fprintln(w, `{"ok":true}`)
}

// MaxObservationBytes bounds an observation body.
const MaxObservationBytes = 1 << 20

// ParseReport reads an observation body: one JSON object with round,
// position and applied (all required) and seen. Errors say what is wrong.
func ParseReport(body []byte) (Report, error) {
	if len(body) > MaxObservationBytes {
		return Report{}, fmt.Errorf("observation over %d bytes", MaxObservationBytes)
	}
	// Every field but "seen" is required: a report that leaves out the
	// position would silently put the robot at cell 0.
	var fields map[string]json.RawMessage
	if err := json.Unmarshal(body, &fields); err != nil || fields == nil {
		return Report{}, errors.New(`observation must be one JSON object like {"round":N,"position":P,"applied":C,"seen":[...]}`)
	}
	for _, f := range []string{"round", "position", "applied"} {
		if _, ok := fields[f]; !ok {
			return Report{}, fmt.Errorf("observation lacks %q", f)
		}
	}
	var rep Report
	dec := json.NewDecoder(bytes.NewReader(body))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&rep); err != nil {
		return Report{}, errors.New("observation: " + strings.TrimPrefix(err.Error(), "json: "))
	}
	if len(rep.Seen) > turn.MaxSightings {
		return Report{}, fmt.Errorf("observation with %d sightings, over %d", len(rep.Seen), turn.MaxSightings)
	}
	return rep, nil
}

// RequireToken guards the local interface when it is reachable from other
// hosts: every request but /healthz (for probes) must carry
// "Authorization: Bearer <token>".
func RequireToken(h http.Handler, token string) http.Handler {
	want := []byte("Bearer " + token)
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.URL.Path != "/healthz" && subtle.ConstantTimeCompare([]byte(r.Header.Get("Authorization")), want) != 1 {
			w.Header().Set("WWW-Authenticate", `Bearer realm="agentd"`)
			httpError(w, http.StatusUnauthorized, "this interface needs Authorization: Bearer <token> (agentd --http-token-file)")
			return
		}
		h.ServeHTTP(w, r)
	})
}

// Loopback reports whether a listen address is reachable from this host
// only.
func Loopback(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// ReadToken reads a token file: one line of at least 16 bytes.
func ReadToken(path string) (string, error) {
	f, err := os.Open(path)
	if err != nil {
		return "", fmt.Errorf("--http-token-file: %w", err)
	}
	defer f.Close()
	b, err := io.ReadAll(io.LimitReader(f, 4097))
	if err != nil {
		return "", fmt.Errorf("--http-token-file %s: %w", path, err)
	}
	tok := strings.TrimSpace(string(b))
	switch {
	case len(b) > 4096:
		return "", fmt.Errorf("--http-token-file %s: more than 4096 bytes", path)
	case len(tok) < 16 || strings.ContainsAny(tok, " \t\r\n"):
		return "", fmt.Errorf("--http-token-file %s: want one token of at least 16 characters, no spaces", path)
	}
	return tok, nil
}
