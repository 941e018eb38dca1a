package result

import (
	"bytes"
	"context"
	"encoding/json"
	"encoding/xml"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"reflect"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"golang.org/x/net/html"
)

var plotIDs = []string{"plot-cost", "plot-retained", "plot-latency", "plot-robots"}

// fakeReport builds a seeded report shaped like a drill's: two modes and
// three guess sources over five loss rates, two bursty configs, latency
// histograms on log-spaced edges and per-robot tallies. The figures are
// made up; the rendering is what is under test.
func fakeReport(seed uint64) *Report {
	rng := rand.New(rand.NewPCG(seed, 1))
	r := &Report{
		Drill: "lossy-links.yaml", Scenario: "warehouse-aisles",
		Robots: 8, Rounds: 40, Episodes: 20, Seed: seed,
		BaseCost: 412.345, BaseCI95: 6.5, SequentialCost: 301.25, SequentialCI95: 4.75,
		WallSeconds: 12.34, VirtualSeconds: 812.5,
	}
	edges := []float64{0.5, 1, 2, 5, 10, 20, 50, 100, 200, 500, 1000}
	add := func(mode, guess string, loss, burst float64) {
		k, lat := 1.0, 8+40*loss
		if mode == "parallel" {
			k, lat = 1.4, lat/2.5 // no waiting on peers: faster, worse
		}
		cost := r.SequentialCost + (r.BaseCost-r.SequentialCost)*math.Min(1, k*loss*(1+burst/4)) + rng.NormFloat64()*3
		c := Config{
			Name: fmt.Sprintf("%s %s loss=%g", mode, guess, loss), Mode: mode, Guess: guess,
			Loss: loss, Burst: burst,
			MeanCost: cost, CI95: 4 + 8*loss,
			Retained:     (r.BaseCost - cost) / (r.BaseCost - r.SequentialCost),
			RetainedCI95: 0.03 + 0.1*loss,
			GuessedShare: math.Min(1, 1.8*loss), HeldRounds: int(200 * loss * k),
			LatencyP50Ms: lat, LatencyP99Ms: 8 * lat,
			Dropped: uint64(5000 * loss), Duplicated: uint64(20 * loss), Late: uint64(90 * loss),
			FalseDead: -1,
			Latency:   Histogram{EdgesMs: edges, Counts: make([]int, len(edges)-1)},
		}
		if burst > 0 {
			c.Name += fmt.Sprintf(" burst=%g", burst)
			c.Faults = []string{fmt.Sprintf("gilbert-elliott loss %g, mean burst %g", loss, burst), "delay 5ms±2ms"}
		}
		if guess == "recompute" {
			c.FalseDead = int(10 * loss)
		}
		for range r.Rounds * r.Episodes {
			ms := math.Exp(rng.NormFloat64()*(0.6+loss) + math.Log(c.LatencyP50Ms))
			for j := range c.Latency.Counts {
				if ms < edges[j+1] || j == len(c.Latency.Counts)-1 {
					c.Latency.Counts[j]++
					break
				}
			}
		}
		for id := range r.Robots {
			c.PerRobot = append(c.PerRobot, Robot{Robot: id, Held: rng.IntN(1 + c.HeldRounds/4), Guessed: rng.IntN(1 + int(100*loss))})
		}
		for range r.Episodes {
			c.EpisodeCosts = append(c.EpisodeCosts, cost+rng.NormFloat64()*10)
		}
		r.Configs = append(r.Configs, c)
	}
	for _, mode := range []string{"hybrid", "parallel"} {
		for _, guess := range []string{"recompute", "last", "base"} {
			for _, loss := range []float64{0, 0.05, 0.1, 0.2, 0.3} {
				add(mode, guess, loss, 0)
			}
		}
	}
	add("hybrid", "recompute", 0.1, 4)
	add("hybrid", "recompute", 0.2, 6)
	return r
}

func TestJSONRoundTrip(t *testing.T) {
	r := fakeReport(7)
	var b bytes.Buffer
	if err := r.WriteJSON(&b); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), "\n  \"drill\": \"lossy-links.yaml\"") {
		t.Errorf("not indented JSON with the drill first:\n%.200s", b.String())
	}
	got, err := ReadJSON(bytes.NewReader(b.Bytes()))
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(got, r) {
		t.Errorf("round trip changed the report")
	}
}

// A drill produces NaN (retained when base and sequential tie) and may
// close a histogram with +Inf; JSON has neither.
func TestJSONNonFinite(t *testing.T) {
	r := fakeReport(3)
	r.SequentialCost = r.BaseCost
	c := &r.Configs[0]
	c.Retained, c.RetainedCI95 = math.NaN(), math.NaN()
	c.Latency.EdgesMs = append(c.Latency.EdgesMs[:len(c.Latency.EdgesMs)-1:len(c.Latency.EdgesMs)-1], math.Inf(1))
	c.EpisodeCosts[0] = math.Inf(-1)
	var b bytes.Buffer
	if err := r.WriteJSON(&b); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), `"retained": null`) || !strings.Contains(b.String(), `"+Inf"`) {
		t.Errorf("NaN or +Inf not written as null / \"+Inf\"")
	}
	got, err := ReadJSON(&b)
	if err != nil {
		t.Fatal(err)
	}
	g := got.Configs[0]
	if !math.IsNaN(g.Retained) || !math.IsNaN(g.RetainedCI95) || !math.IsInf(g.Latency.EdgesMs[len(g.Latency.EdgesMs)-1], 1) || !math.IsInf(g.EpisodeCosts[0], -1) {
		t.Errorf("non-finite values not read back: retained %v ± %v, last edge %v, episode 0 %v",
			g.Retained, g.RetainedCI95, g.Latency.EdgesMs[len(g.Latency.EdgesMs)-1], g.EpisodeCosts[0])
	}
	if g.Name != c.Name || g.MeanCost != c.MeanCost || len(g.PerRobot) != len(c.PerRobot) {
		t.Errorf("finite fields changed: %+v", g)
	}
}

// Every float64 field, including ones added later, must survive NaN: the
// mirror types are built by reflection, and this checks it reaches them.
func TestJSONEveryFloatField(t *testing.T) {
	r := fakeReport(1)
	r.Configs = r.Configs[:1]
	nans := 0
	floats(reflect.ValueOf(r).Elem(), func(v reflect.Value) { v.SetFloat(math.NaN()); nans++ })
	b, err := json.Marshal(r)
	if err != nil {
		t.Fatalf("marshal with every float NaN: %v", err)
	}
	var got Report
	if err := json.Unmarshal(b, &got); err != nil {
		t.Fatal(err)
	}
	back := 0
	floats(reflect.ValueOf(&got).Elem(), func(v reflect.Value) {
		if math.IsNaN(v.Float()) {
			back++
		}
	})
	if back != nans || nans < 20 {
		t.Errorf("%d NaN floats written, %d read back", nans, back)
	}
}

// floats calls do on every float64 reachable from v (structs, slices).
func floats(v reflect.Value, do func(reflect.Value)) {
	switch v.Kind() {
	case reflect.Float64:
		do(v)
	case reflect.Struct:
		for i := range v.NumField() {
			floats(v.Field(i), do)
		}
	case reflect.Slice:
		for i := range v.Len() {
			floats(v.Index(i), do)
		}
	}
}

// endless yields spaces forever, without holding them in memory.
type endless struct{}

func (endless) Read(p []byte) (int, error) {
	for i := range p {
		p[i] = ' '
	}
	return len(p), nil
}

func TestReadJSONRefuses(t *testing.T) {
	for _, tc := range []struct {
		name string
		in   io.Reader
		want string
	}{
		{"empty", strings.NewReader("  \n"), "empty"},
		{"garbage", strings.NewReader("PK\x03\x04 not a report"), "expected a JSON object"},
		{"array", strings.NewReader(`[{"drill":"x"}]`), "expected a JSON object"},
		{"truncated", strings.NewReader(`{"drill": "x", "configs": [`), "decoding report"},
		{"bad syntax", strings.NewReader(`{"drill": "x",, }`), "not valid JSON at byte"},
		{"wrong type", strings.NewReader(`{"robots": "eight"}`), "decoding report"},
		{"trailing", strings.NewReader(`{"drill": "x"} {"drill": "y"}`), "after the report"},
		{"histogram shape", strings.NewReader(`{"configs": [{"name": "a", "latency_hist": {"edges_ms": [1, 2], "counts": [1, 2]}}]}`), `config 0 ("a"): latency histogram: 2 edges for 2 counts`},
		{"oversize", io.MultiReader(strings.NewReader(`{"drill": "x"}`), endless{}), "exceeds 64 MiB"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r, err := ReadJSON(tc.in)
			if err == nil {
				t.Fatalf("accepted: %+v", r)
			}
			if !strings.Contains(err.Error(), tc.want) {
				t.Errorf("error %q does not say %q", err, tc.want)
			}
		})
	}
}

func TestTable(t *testing.T) {
	r := fakeReport(7)
	var b bytes.Buffer
	if err := r.Table(&b); err != nil {
		t.Fatal(err)
	}
	out := b.String()
	for _, want := range []string{
		"drill: lossy-links.yaml", "scenario: warehouse-aisles",
		"robots: 8", "rounds: 40", "episodes: 20", "seed: 7",
		"base cost: 412.35 ± 6.50", "sequential cost: 301.25 ± 4.75", "wall: 12.3 s",
		"mean cost ± ci95", "false dead",
	} {
		if !strings.Contains(out, want) {
			t.Errorf("table lacks %q", want)
		}
	}
	lines := strings.Split(out, "\n")
	for _, c := range r.Configs {
		found := false
		for _, l := range lines {
			if strings.HasPrefix(l, c.Name+" ") {
				found = true
				// Unmeasured false-dead counts show as "-" in the last column.
				if c.FalseDead < 0 && !strings.HasSuffix(strings.TrimSpace(l), " -") {
					t.Errorf("row %q: false dead not shown as -", l)
				}
			}
		}
		if !found {
			t.Errorf("no row for %q", c.Name)
		}
	}

	empty := &Report{Drill: "none"}
	b.Reset()
	if err := empty.Table(&b); err != nil || !strings.Contains(b.String(), "(no configurations)") {
		t.Errorf("empty report: %v\n%s", err, b.String())
	}
}

// edgeCases are reports the page must still render.
func edgeCases() map[string]*Report {
	cases := map[string]*Report{
		"full":     fakeReport(7),
		"empty":    {Drill: "empty.yaml", BaseCost: 10, SequentialCost: 8},
		"zero":     {},
		"one loss": fakeReport(2),
		"tie":      fakeReport(4),
		"no data":  fakeReport(5),
	}
	one := cases["one loss"]
	var keep []Config
	for _, c := range one.Configs {
		if c.Loss == 0.1 {
			keep = append(keep, c)
		}
	}
	one.Configs = keep
	tie := cases["tie"]
	tie.SequentialCost = tie.BaseCost
	for i := range tie.Configs {
		tie.Configs[i].Retained, tie.Configs[i].RetainedCI95 = math.NaN(), math.NaN()
	}
	nd := cases["no data"]
	for i := range nd.Configs {
		nd.Configs[i].Latency = Histogram{}
		nd.Configs[i].PerRobot = nil
	}
	nd.Configs[0].Latency = Histogram{EdgesMs: []float64{1, 2}, Counts: []int{1, 2, 3}} // malformed: skipped
	return cases
}

func TestHTML(t *testing.T) {
	for name, r := range edgeCases() {
		t.Run(name, func(t *testing.T) {
			var b bytes.Buffer
			if err := r.HTML(&b); err != nil {
				t.Fatal(err)
			}
			page := b.String()
			doc, err := html.Parse(strings.NewReader(page))
			if err != nil {
				t.Fatal(err)
			}
			svgs := map[string]*html.Node{}
			var viewport bool
			var walk func(n *html.Node)
			walk = func(n *html.Node) {
				if n.Type == html.ElementNode {
					if n.Data == "svg" {
						svgs[attr(n, "id")] = n
					}
					if n.Data == "meta" && attr(n, "name") == "viewport" {
						viewport = true
					}
					if n.Data == "script" || n.Data == "link" || n.Data == "iframe" {
						t.Errorf("page has a <%s>", n.Data)
					}
					for _, a := range n.Attr {
						k := strings.ToLower(a.Key)
						v := strings.ToLower(strings.TrimSpace(a.Val))
						if (k == "src" || k == "href" || strings.HasSuffix(k, ":href") || k == "srcset" || k == "action") &&
							(strings.HasPrefix(v, "http:") || strings.HasPrefix(v, "https:") || strings.HasPrefix(v, "//")) {
							t.Errorf("external reference <%s %s=%q>", n.Data, a.Key, a.Val)
						}
					}
				}
				for c := n.FirstChild; c != nil; c = c.NextSibling {
					walk(c)
				}
			}
			walk(doc)
			if !viewport {
				t.Error("no viewport meta")
			}
			if strings.Contains(page, "url(http") || strings.Contains(page, "@import") {
				t.Error("CSS loads something from elsewhere")
			}
			for _, id := range plotIDs {
				n := svgs[id]
				if n == nil {
					t.Errorf("no <svg id=%q>", id)
					continue
				}
				// Axes and grid at least, even with no data.
				if k := count(n, "path", "line"); k < 4 {
					t.Errorf("%s: %d paths/lines", id, k)
				}
				// The same element must also be well-formed XML, to be
				// usable cut out of the page.
				m := regexp.MustCompile(`(?s)<svg id="` + id + `".*?</svg>`).FindString(page)
				if err := wellFormed(m); err != nil {
					t.Errorf("%s: %v", id, err)
				}
			}
			for _, c := range r.Configs {
				if !strings.Contains(page, html.EscapeString(c.Name)) {
					t.Errorf("page lacks config %q", c.Name)
				}
			}
		})
	}
}

// The full report's plots must carry one legend entry and one series per
// (mode, guess) pair, the bursty markers, and the two references.
func TestHTMLPlotContents(t *testing.T) {
	r := fakeReport(7)
	var b bytes.Buffer
	if err := r.HTML(&b); err != nil {
		t.Fatal(err)
	}
	page := b.String()
	cost := regexp.MustCompile(`(?s)<svg id="plot-cost".*?</svg>`).FindString(page)
	for _, want := range []string{"hybrid / recompute", "parallel / base", "hybrid / recompute, bursty", "base policy, no faults", "sequential, no faults", "message loss (% of messages)", "mean cost per episode (cost units)"} {
		if !strings.Contains(cost, html.EscapeString(want)) {
			t.Errorf("cost plot lacks %q", want)
		}
	}
	worst, _ := worstConfig(r.Configs)
	if !strings.Contains(page, "for config “"+html.EscapeString(r.Configs[worst].Name)+"” (lowest retained)") {
		t.Errorf("robots caption does not name %q", r.Configs[worst].Name)
	}
	if strings.Contains(page, "Liberation Sans;") {
		t.Error("SVG font family without fallbacks")
	}

	// Text in a name must be escaped everywhere, plots included.
	r.Configs[0].Name = `<script>alert(1)</script> & "x"`
	r.Configs[0].Mode = `<b>`
	b.Reset()
	if err := r.HTML(&b); err != nil {
		t.Fatal(err)
	}
	if strings.Contains(b.String(), "<script>") || strings.Contains(b.String(), "<b>") {
		t.Error("unescaped markup from a config name")
	}
}

func attr(n *html.Node, key string) string {
	for _, a := range n.Attr {
		if a.Key == key {
			return a.Val
		}
	}
	return ""
}

func count(n *html.Node, tags ...string) int {
	k := 0
	for c := n.FirstChild; c != nil; c = c.NextSibling {
		if c.Type == html.ElementNode {
			for _, tag := range tags {
				if c.Data == tag {
					k++
				}
			}
		}
		k += count(c, tags...)
	}
	return k
}

func wellFormed(s string) error {
	if s == "" {
		return errors.New("not found")
	}
	d := xml.NewDecoder(strings.NewReader(s))
	for {
		if _, err := d.Token(); err == io.EOF {
			return nil
		} else if err != nil {
			return err
		}
	}
}

// TestBrowser opens the page in headless Chromium, checks that each plot
// is laid out with a size and drawn marks, that nothing is wider than a
// phone, and takes full-page screenshots at phone and desktop sizes.
func TestBrowser(t *testing.T) {
	const chromium = "/usr/bin/chromium"
	if _, err := os.Stat(chromium); err != nil {
		if os.Getenv("CI_REQUIRE_BROWSER") == "1" {
			t.Fatalf("CI_REQUIRE_BROWSER=1 but no browser: %v", err)
		}
		t.Skipf("needs Debian's chromium at %s (apt-get install chromium): %v", chromium, err)
	}
	dir := t.TempDir()
	page := filepath.Join(dir, "report.html")
	var b bytes.Buffer
	if err := fakeReport(7).HTML(&b); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(page, b.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}

	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	opts := append(chromedp.DefaultExecAllocatorOptions[:],
		chromedp.ExecPath(chromium),
		chromedp.NoSandbox, // tests run as root
		chromedp.DisableGPU,
	)
	actx, cancelAlloc := chromedp.NewExecAllocator(ctx, opts...)
	defer cancelAlloc()
	bctx, cancelTab := chromedp.NewContext(actx)
	defer cancelTab()

	type plotBox struct {
		Found  bool    `json:"found"`
		Width  float64 `json:"width"`
		Height float64 `json:"height"`
		Right  float64 `json:"right"`
		Marks  int     `json:"marks"`
	}
	type layout struct {
		Plots       map[string]plotBox `json:"plots"`
		ViewWidth   float64            `json:"viewWidth"`
		ScrollWidth float64            `json:"scrollWidth"`
		TableScroll bool               `json:"tableScroll"`
	}
	ids, _ := json.Marshal(plotIDs)
	measure := `(() => {
		const out = {plots: {}, viewWidth: window.innerWidth,
			scrollWidth: document.documentElement.scrollWidth};
		for (const id of ` + string(ids) + `) {
			const el = document.getElementById(id);
			if (!el || el.tagName.toLowerCase() !== 'svg') { out.plots[id] = {found: false}; continue; }
			const r = el.getBoundingClientRect();
			out.plots[id] = {found: true, width: r.width, height: r.height, right: r.right,
				marks: el.querySelectorAll('path, line, polyline').length};
		}
		const s = document.querySelector('.scroll');
		out.tableScroll = !!s && getComputedStyle(s).overflowX === 'auto';
		return out;
	})()`

	shots := map[string][]byte{}
	for _, vp := range []struct {
		name          string
		width, height int64
		scale         float64
		mobile        bool
	}{
		{"phone", 390, 844, 2, true},
		{"desktop", 1366, 900, 1, false},
	} {
		emu := []chromedp.EmulateViewportOption{chromedp.EmulateScale(vp.scale)}
		if vp.mobile {
			emu = append(emu, chromedp.EmulateMobile, chromedp.EmulateTouch, chromedp.EmulatePortrait)
		}
		if err := chromedp.Do(bctx,
			chromedp.EmulateViewport(vp.width, vp.height, emu...),
			chromedp.Navigate("file://"+page),
			chromedp.WaitReady(chromedp.ID("plot-robots")),
		); err != nil {
			t.Fatalf("%s: loading the page: %v", vp.name, err)
		}
		got, err := chromedp.Run(bctx, chromedp.Evaluate[layout](measure))
		if err != nil {
			t.Fatalf("%s: measuring: %v", vp.name, err)
		}
		for _, id := range plotIDs {
			p := got.Plots[id]
			switch {
			case !p.Found:
				t.Errorf("%s: no <svg id=%q>", vp.name, id)
			case p.Width < 200 || p.Height < 100:
				t.Errorf("%s: %s rendered %.0f×%.0f px", vp.name, id, p.Width, p.Height)
			case p.Marks < 10:
				t.Errorf("%s: %s has %d paths/lines", vp.name, id, p.Marks)
			case p.Right > got.ViewWidth+0.5:
				t.Errorf("%s: %s overflows the view (right edge %.0f > %.0f)", vp.name, id, p.Right, got.ViewWidth)
			}
		}
		if got.ScrollWidth > got.ViewWidth+0.5 {
			t.Errorf("%s: page scrolls sideways (%.0f px wide in %.0f); only the table may", vp.name, got.ScrollWidth, got.ViewWidth)
		}
		if !got.TableScroll {
			t.Errorf("%s: table container does not scroll horizontally", vp.name)
		}
		png, err := chromedp.Run(bctx, chromedp.FullScreenshot(100))
		if err != nil {
			t.Fatalf("%s: screenshot: %v", vp.name, err)
		}
		if !bytes.HasPrefix(png, []byte("\x89PNG")) {
			t.Fatalf("%s: screenshot is not a PNG", vp.name)
		}
		shots["report-"+vp.name+".png"] = png
	}

	out := os.Getenv("BATON_SCREENSHOT_DIR")
	if out != "" {
		if err := os.MkdirAll(out, 0o755); err != nil {
			t.Fatal(err)
		}
	}
	for name, png := range shots {
		if err := os.WriteFile(filepath.Join(dir, name), png, 0o644); err != nil {
			t.Fatal(err)
		}
		if out != "" {
			if err := os.WriteFile(filepath.Join(out, name), png, 0o644); err != nil {
				t.Fatal(err)
			}
		}
	}
	if out != "" {
		if err := os.WriteFile(filepath.Join(out, "report.html"), b.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
		t.Logf("screenshots in %s", out)
	}
}
