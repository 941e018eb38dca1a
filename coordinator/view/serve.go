package view

import (
	"bytes"
	"embed"
	"encoding/json"
	"fmt"
	"io"
	"io/fs"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"time"
)

//go:embed assets
var assets embed.FS

// Keep is how many rounds the live view holds for a page that opens late.
const Keep = 600

// subBuffer is how many frames a slow page may fall behind before it is
// dropped (its EventSource reconnects and fetches frames.json again).
const subBuffer = 64

// Live is the coordinator's view: the last Keep frames and the pages
// watching. Safe for concurrent use.
type Live struct {
	mu     sync.Mutex
	site   []byte
	frames [][]byte // marshalled, oldest first
	rounds []uint64
	subs   map[chan []byte]struct{}
}

// NewLive starts a live view of site.
func NewLive(site Site) (*Live, error) {
	site.Mode = "live"
	b, err := json.Marshal(site)
	if err != nil {
		return nil, err
	}
	return &Live{site: b, subs: map[chan []byte]struct{}{}}, nil
}

// Add shows a round: kept, and sent to every page watching (a page that
// fell subBuffer frames behind is dropped).
func (l *Live) Add(f Frame) {
	b, err := json.Marshal(f)
	if err != nil {
		return
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	if len(l.frames) >= Keep {
		l.frames, l.rounds = l.frames[1:], l.rounds[1:]
	}
	l.frames, l.rounds = append(l.frames, b), append(l.rounds, f.Round)
	for ch := range l.subs {
		select {
		case ch <- b:
		default:
			delete(l.subs, ch)
			close(ch)
		}
	}
}

// Handler serves the page, site.json, frames.json and events.
func (l *Live) Handler() http.Handler {
	mux := http.NewServeMux()
	serveAssets(mux)
	mux.HandleFunc("GET /view/site.json", func(w http.ResponseWriter, _ *http.Request) { writeJSON(w, l.site) })
	mux.HandleFunc("GET /view/frames.json", func(w http.ResponseWriter, r *http.Request) {
		since, ok := sinceParam(w, r)
		if !ok {
			return
		}
		l.mu.Lock()
		var buf bytes.Buffer
		buf.WriteByte('[')
		first := true
		for i, b := range l.frames {
			if l.rounds[i] > since || since == 0 {
				if !first {
					buf.WriteByte(',')
				}
				buf.Write(b)
				first = false
			}
		}
		l.mu.Unlock()
		buf.WriteByte(']')
		writeJSON(w, buf.Bytes())
	})
	mux.HandleFunc("GET /view/events", l.events)
	return mux
}

// events streams frames as server-sent events until the page goes.
func (l *Live) events(w http.ResponseWriter, r *http.Request) {
	fl, ok := w.(http.Flusher)
	if !ok {
		http.Error(w, "streaming unsupported", http.StatusInternalServerError)
		return
	}
	ch := make(chan []byte, subBuffer)
	l.mu.Lock()
	l.subs[ch] = struct{}{}
	l.mu.Unlock()
	defer func() {
		l.mu.Lock()
		if _, ok := l.subs[ch]; ok {
			delete(l.subs, ch)
			close(ch)
		}
		l.mu.Unlock()
	}()
	h := w.Header()
	h.Set("Content-Type", "text/event-stream")
	h.Set("Cache-Control", "no-store")
	h.Set("X-Accel-Buffering", "no")
	w.WriteHeader(http.StatusOK)
	fmt.Fprint(w, "retry: 1000\n\n")
	fl.Flush()
	keepalive := time.NewTicker(15 * time.Second)
	defer keepalive.Stop()
	for {
		select {
		case <-r.Context().Done():
			return
		case b, ok := <-ch:
			if !ok {
				return // too slow: the page reconnects and catches up
			}
			fmt.Fprintf(w, "event: frame\ndata: %s\n\n", b)
			fl.Flush()
		case <-keepalive.C:
			fmt.Fprint(w, ": keepalive\n\n")
			fl.Flush()
		}
	}
}

// Replay serves a decision log's frames with the same page.
func Replay(site Site, frames []Frame) (http.Handler, error) {
	site.Mode = "replay"
	sb, err := json.Marshal(site)
	if err != nil {
		return nil, err
	}
	fb, err := json.Marshal(frames)
	if err != nil {
		return nil, err
	}
	mux := http.NewServeMux()
	serveAssets(mux)
	mux.HandleFunc("GET /view/site.json", func(w http.ResponseWriter, _ *http.Request) { writeJSON(w, sb) })
	mux.HandleFunc("GET /view/frames.json", func(w http.ResponseWriter, _ *http.Request) { writeJSON(w, fb) })
	return mux, nil
}

// WriteHTML writes the replay page as one self-contained file: styles,
// script and the log's frames inline.
func WriteHTML(w io.Writer, site Site, frames []Frame) error {
	site.Mode = "replay"
	page, err := fs.ReadFile(assets, "assets/index.html")
	if err != nil {
		return err
	}
	css, err := fs.ReadFile(assets, "assets/view.css")
	if err != nil {
		return err
	}
	js, err := fs.ReadFile(assets, "assets/view.js")
	if err != nil {
		return err
	}
	data, err := json.Marshal(struct {
		Site   Site    `json:"site"`
		Frames []Frame `json:"frames"`
	}{site, frames})
	if err != nil {
		return err
	}
	// </script> cannot appear inside the inline JSON.
	data = bytes.ReplaceAll(data, []byte("</"), []byte(`<\/`))
	out := string(page)
	out = strings.Replace(out, `<link rel="stylesheet" href="/view/view.css">`, "<style>\n"+string(css)+"\n</style>", 1)
	out = strings.Replace(out, `<script src="/view/view.js"></script>`,
		`<script id="baton-data" type="application/json">`+string(data)+"</script>\n<script>\n"+string(js)+"\n</script>", 1)
	_, err = io.WriteString(w, out)
	return err
}

func serveAssets(mux *http.ServeMux) {
	sub, _ := fs.Sub(assets, "assets")
	files := http.FileServerFS(sub)
	mux.HandleFunc("GET /view", func(w http.ResponseWriter, r *http.Request) {
		r2 := r.Clone(r.Context())
		r2.URL.Path = "/"
		files.ServeHTTP(w, r2)
	})
	mux.Handle("GET /view/", http.StripPrefix("/view", files))
}

func writeJSON(w http.ResponseWriter, b []byte) {
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-store")
	w.Write(b)
}

func sinceParam(w http.ResponseWriter, r *http.Request) (uint64, bool) {
	s := r.URL.Query().Get("since")
	if s == "" {
		return 0, true
	}
	v, err := strconv.ParseUint(s, 10, 64)
	if err != nil {
		http.Error(w, fmt.Sprintf("since=%q is not a round number", s), http.StatusBadRequest)
		return 0, false
	}
	return v, true
}
