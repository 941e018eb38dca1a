package result

import (
	"bytes"
	"cmp"
	"fmt"
	"image/color"
	"math"
	"regexp"
	"slices"
	"strconv"
	"strings"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/font"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/text"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"
)

// Plot geometry in SVG user units, which the page maps 1:1 to CSS pixels
// at native size: 360 wide fits a phone's width without shrinking the
// text, and the page scales plots up on wider screens.
const (
	plotWidth  = 360
	plotHeight = 250 // axes and data; the legend goes below
	legendRow  = 15
	legendPad  = 6
)

var (
	// Sans text, sized for a phone at 1:1. The SVG names the family with
	// metric-compatible fallbacks (see svgFor).
	sansFont    = font.Font{Typeface: "Liberation", Variant: "Sans"}
	tickFont    = font.From(sansFont, 11)
	labelFont   = font.From(sansFont, 12)
	legendFont  = font.From(sansFont, 11)
	noteFont    = font.From(sansFont, 12)
	gridColor   = color.RGBA{R: 0xdd, G: 0xdd, B: 0xdd, A: 0xff}
	black       = color.RGBA{A: 0xff}
	lineWidth   = vg.Points(1.8)
	markerSize  = vg.Points(3.5)
	burstMarker = vg.Points(4.5)
)

// palette is the Okabe–Ito palette less black (Okabe & Ito 2008, "Color
// Universal Design"), whose hues stay apart under the common colour-vision
// deficiencies. Yellow comes last: it is faint on white.
var palette = []color.Color{
	color.RGBA{R: 0x00, G: 0x72, B: 0xB2, A: 0xff}, // blue
	color.RGBA{R: 0xD5, G: 0x5E, B: 0x00, A: 0xff}, // vermillion
	color.RGBA{R: 0x00, G: 0x9E, B: 0x73, A: 0xff}, // bluish green
	color.RGBA{R: 0xCC, G: 0x79, B: 0xA7, A: 0xff}, // reddish purple
	color.RGBA{R: 0xE6, G: 0x9F, B: 0x00, A: 0xff}, // orange
	color.RGBA{R: 0x56, G: 0xB4, B: 0xE9, A: 0xff}, // sky blue
	color.RGBA{R: 0xF0, G: 0xE4, B: 0x42, A: 0xff}, // yellow
}

// dashes and shapes vary with the colour so that series differ without
// it (five of each against seven colours: 35 distinct series).
var dashes = [][]vg.Length{
	nil,
	{6, 3},
	{2, 2.5},
	{9, 3, 2, 3},
	{3, 5},
}

// series is the look of one line: colour, dash, marker shape.
type series struct {
	color color.Color
	dash  []vg.Length
	shape int
}

func seriesStyle(i int) series {
	return series{palette[i%len(palette)], dashes[i%len(dashes)], i % numShapes}
}

func (s series) line() draw.LineStyle {
	return draw.LineStyle{Color: s.color, Width: lineWidth, Dashes: s.dash}
}

func (s series) glyph(hollow bool) draw.GlyphStyle {
	r := markerSize
	if hollow {
		r = burstMarker
	}
	return draw.GlyphStyle{Color: s.color, Radius: r, Shape: marker{s.shape, hollow}}
}

const numShapes = 5

// marker draws a filled or a hollow shape; hollow ones (bursty loss) are
// filled white so they stay visible on top of lines.
type marker struct {
	shape  int
	hollow bool
}

func (m marker) DrawGlyph(c *draw.Canvas, sty draw.GlyphStyle, pt vg.Point) {
	r := sty.Radius
	var p vg.Path
	poly := func(pts ...vg.Point) {
		p.Move(vg.Point{X: pt.X + pts[0].X, Y: pt.Y + pts[0].Y})
		for _, q := range pts[1:] {
			p.Line(vg.Point{X: pt.X + q.X, Y: pt.Y + q.Y})
		}
		p.Close()
	}
	switch m.shape {
	case 0: // circle
		p.Move(vg.Point{X: pt.X + r, Y: pt.Y})
		p.Arc(pt, r, 0, 2*math.Pi)
		p.Close()
	case 1: // square
		s := r * 0.85
		poly(vg.Point{X: -s, Y: -s}, vg.Point{X: s, Y: -s}, vg.Point{X: s, Y: s}, vg.Point{X: -s, Y: s})
	case 2: // triangle up
		poly(vg.Point{Y: r * 1.15}, vg.Point{X: -r, Y: -r * 0.75}, vg.Point{X: r, Y: -r * 0.75})
	case 3: // diamond
		poly(vg.Point{Y: r * 1.2}, vg.Point{X: r, Y: 0}, vg.Point{Y: -r * 1.2}, vg.Point{X: -r})
	default: // triangle down
		poly(vg.Point{Y: -r * 1.15}, vg.Point{X: r, Y: r * 0.75}, vg.Point{X: -r, Y: r * 0.75})
	}
	if m.hollow {
		c.SetColor(color.White)
		c.Fill(p)
		c.SetLineStyle(draw.LineStyle{Color: sty.Color, Width: vg.Points(1.6)})
		c.Stroke(p)
		return
	}
	c.SetColor(sty.Color)
	c.Fill(p)
}

// refStyles are the horizontal reference lines: black, told apart by dash.
var (
	refBase = draw.LineStyle{Color: black, Width: vg.Points(1.3), Dashes: []vg.Length{10, 4}}
	refSeq  = draw.LineStyle{Color: black, Width: vg.Points(1.3), Dashes: []vg.Length{1.5, 3}}
)

// trimmedTicks are gonum's default ticks without the trailing zeros
// their labels get on some ranges ("25.00" on a count axis).
type trimmedTicks struct{}

func (trimmedTicks) Ticks(lo, hi float64) []plot.Tick {
	ts := plot.DefaultTicks{}.Ticks(lo, hi)
	for i, t := range ts {
		if strings.Contains(t.Label, ".") && !strings.ContainsAny(t.Label, "eE") {
			ts[i].Label = strings.TrimRight(strings.TrimRight(t.Label, "0"), ".")
		}
	}
	return ts
}

// figure is a plot with the legend kept outside the data area, so that
// it never covers data, and an optional note in the middle of it.
type figure struct {
	p      *plot.Plot
	legend []legendEntry
	note   string
}

type legendEntry struct {
	text   string
	thumbs []plot.Thumbnailer
}

func newFigure(xlabel, ylabel string) *figure {
	p := plot.New()
	p.X.Label.Text = xlabel
	p.Y.Label.Text = ylabel
	for _, a := range []*plot.Axis{&p.X, &p.Y} {
		a.Label.TextStyle.Font = labelFont
		a.Tick.Label.Font = tickFont
		a.Tick.Marker = trimmedTicks{}
		a.Padding = vg.Points(4)
	}
	p.Legend.TextStyle.Font = legendFont
	g := plotter.NewGrid()
	g.Vertical.Color, g.Horizontal.Color = gridColor, gridColor
	g.Vertical.Width, g.Horizontal.Width = vg.Points(0.6), vg.Points(0.6)
	p.Add(g)
	return &figure{p: p}
}

func (f *figure) addLegend(text string, thumbs ...plot.Thumbnailer) {
	f.legend = append(f.legend, legendEntry{text, thumbs})
}

// svg renders the figure and returns the <svg> element, with the given
// id, sized in CSS pixels, and with its fonts named with fallbacks.
func (f *figure) svg(id string) (string, error) {
	sty := text.Style{Font: legendFont, Handler: plot.DefaultTextHandler}
	thumbW := vg.Points(26)
	avail := vg.Length(plotWidth - 2*legendPad)
	cols := 2
	for _, e := range f.legend {
		if thumbW+sty.Width(" "+e.text)+vg.Points(10) > avail/2 {
			cols = 1
		}
	}
	rows := (len(f.legend) + cols - 1) / cols
	legendH := vg.Length(0)
	if rows > 0 {
		legendH = vg.Length(rows*legendRow + 2*legendPad)
	}
	height := vg.Length(plotHeight) + legendH

	cv := vgsvg.New(vg.Length(plotWidth), height)
	dc := draw.New(cv)
	dc.SetColor(color.White)
	dc.Fill(dc.Rectangle.Path())
	area := draw.Crop(dc, 4, -10, legendH+2, -8)
	f.p.Draw(area)
	if f.note != "" {
		data := f.p.DataCanvas(area)
		ns := text.Style{Font: noteFont, Color: black, XAlign: draw.XCenter, YAlign: draw.YCenter, Handler: plot.DefaultTextHandler}
		data.FillText(ns, data.Center(), f.note)
	}
	for col := range cols {
		lo := col * rows
		hi := min(lo+rows, len(f.legend))
		if lo >= hi {
			break
		}
		l := plot.NewLegend()
		l.TextStyle = sty
		l.Top, l.Left = true, true
		l.ThumbnailWidth = thumbW
		l.Padding = vg.Length(legendRow) - l.TextStyle.Rectangle("Mg").Size().Y
		for _, e := range f.legend[lo:hi] {
			l.Add(e.text, e.thumbs...)
		}
		x0 := vg.Length(legendPad) + vg.Length(col)*avail/vg.Length(cols)
		l.Draw(draw.Canvas{Canvas: dc.Canvas, Rectangle: vg.Rectangle{
			Min: vg.Point{X: x0, Y: legendPad},
			Max: vg.Point{X: x0 + avail/vg.Length(cols), Y: legendH - legendPad},
		}})
	}

	var b bytes.Buffer
	if _, err := cv.WriteTo(&b); err != nil {
		return "", err
	}
	return fixSVG(b.String(), id, plotWidth, height.Points())
}

var svgOpen = regexp.MustCompile(`<svg width="[^"]*" height="[^"]*"`)

// fixSVG turns vgsvg's standalone document into an element to inline:
// no XML prolog, an id, CSS-pixel size (vgsvg writes points, which would
// scale text by 4/3), and font families with fallbacks, since the page
// does not embed fonts (Liberation Sans has Arial's metrics).
func fixSVG(doc, id string, w, h float64) (string, error) {
	i := strings.Index(doc, "<svg ")
	if i < 0 {
		return "", fmt.Errorf("result: plot %s: no <svg> element in rendered output", id)
	}
	doc = doc[i:]
	size := fmt.Sprintf(`<svg id=%q class="plot" role="img" aria-labelledby="%s-title" width="%s" height="%s"`, id, id,
		strconv.FormatFloat(w, 'f', -1, 64), strconv.FormatFloat(h, 'f', -1, 64))
	doc = svgOpen.ReplaceAllLiteralString(doc, size)
	doc = strings.ReplaceAll(doc, "font-family:Liberation Sans;",
		"font-family:'Liberation Sans',Arial,Helvetica,sans-serif;")
	return doc, nil
}

// lossPct is the x of a config: its loss rate in percent.
func lossPct(c Config) float64 { return 100 * c.Loss }

// group is the configs of one (mode, guess) pair, in sweep order.
type group struct {
	mode, guess string
	steady      []Config // independent loss, one line
	bursty      []Config // Burst > 0, separate markers
}

func (g group) label() string { return g.mode + " / " + g.guess }

// groups splits configs by (mode, guess) in order of first appearance,
// so a group keeps its look in every plot.
func groups(cs []Config) []group {
	var gs []group
	idx := map[[2]string]int{}
	for _, c := range cs {
		k := [2]string{c.Mode, c.Guess}
		i, ok := idx[k]
		if !ok {
			i = len(gs)
			idx[k] = i
			gs = append(gs, group{mode: c.Mode, guess: c.Guess})
		}
		if c.Burst > 0 {
			gs[i].bursty = append(gs[i].bursty, c)
		} else {
			gs[i].steady = append(gs[i].steady, c)
		}
	}
	for i := range gs {
		slices.SortStableFunc(gs[i].steady, func(a, b Config) int { return cmp.Compare(a.Loss, b.Loss) })
	}
	return gs
}

// points holds x, y and the half-width of y's interval; it feeds lines,
// markers and error bars alike.
type points struct{ x, y, e []float64 }

func (p points) Len() int                        { return len(p.x) }
func (p points) XY(i int) (float64, float64)     { return p.x[i], p.y[i] }
func (p points) YError(i int) (float64, float64) { return p.e[i], p.e[i] }

// collect gathers the defined points of cs, shifted sideways by dx.
func collect(cs []Config, dx float64, y func(Config) (float64, float64)) points {
	var p points
	for _, c := range cs {
		v, e := y(c)
		if math.IsNaN(v) || math.IsInf(v, 0) || math.IsNaN(lossPct(c)) {
			continue // undefined here: leave a gap, the table says n/a
		}
		if math.IsNaN(e) || math.IsInf(e, 0) {
			e = 0
		}
		p.x, p.y, p.e = append(p.x, lossPct(c)+dx), append(p.y, v), append(p.e, e)
	}
	return p
}

// xRange spans the swept loss rates, widened when there is only one so
// that the axis is not degenerate.
func xRange(cs []Config) (lo, hi float64) {
	lo, hi = math.Inf(1), math.Inf(-1)
	for _, c := range cs {
		if x := lossPct(c); !math.IsNaN(x) && !math.IsInf(x, 0) {
			lo, hi = math.Min(lo, x), math.Max(hi, x)
		}
	}
	switch {
	case lo > hi:
		return 0, 50
	case hi-lo < 1e-9:
		lo = math.Max(0, lo-5)
		return lo, lo + 10
	}
	return lo, hi
}

// oneLoss tells whether every config has the same loss rate.
func oneLoss(cs []Config) bool {
	for _, c := range cs {
		if c.Loss != cs[0].Loss {
			return false
		}
	}
	return len(cs) > 0
}

// lossPlot draws y(config) against loss, one line per (mode, guess),
// bursty configs as hollow markers, and horizontal references.
func lossPlot(cs []Config, ylabel string, y func(Config) (float64, float64), refs []reference) (*figure, error) {
	f := newFigure("message loss (% of messages)", ylabel)
	lo, hi := xRange(cs)
	f.p.X.Min, f.p.X.Max = lo, hi
	for _, ref := range refs {
		if math.IsNaN(ref.y) || math.IsInf(ref.y, 0) {
			continue
		}
		l, err := plotter.NewLine(plotter.XYs{{X: lo, Y: ref.y}, {X: hi, Y: ref.y}})
		if err != nil {
			return nil, err
		}
		l.LineStyle = ref.style
		f.p.Add(l)
		f.addLegend(ref.label, l)
	}
	// Groups are spread a little sideways so that their markers and
	// intervals at one loss rate do not hide each other: by 2.5% of the
	// axis in all, or into lanes when there is only one loss rate.
	gs := groups(cs)
	spread := 0.025 * (hi - lo)
	if oneLoss(cs) {
		spread = 0.4 * (hi - lo)
		// Tick only the one rate, so that the lanes read as one x.
		x := lossPct(cs[0])
		f.p.X.Tick.Marker = plot.ConstantTicks{{Value: x, Label: strconv.FormatFloat(x, 'g', 4, 64)}}
	}
	dodge := func(i int) float64 {
		if len(gs) < 2 {
			return 0
		}
		return (float64(i)/float64(len(gs)-1) - 0.5) * spread
	}
	drawn := 0
	for i, g := range gs {
		s := seriesStyle(i)
		if p := collect(g.steady, dodge(i), y); p.Len() > 0 {
			l, sc, err := plotter.NewLinePoints(p)
			if err != nil {
				return nil, err
			}
			l.LineStyle = s.line()
			sc.GlyphStyle = s.glyph(false)
			eb, err := errorBars(p, s)
			if err != nil {
				return nil, err
			}
			f.p.Add(eb, l, sc)
			f.addLegend(g.label(), l, sc)
			drawn += p.Len()
		}
		if p := collect(g.bursty, dodge(i), y); p.Len() > 0 {
			sc, err := plotter.NewScatter(p)
			if err != nil {
				return nil, err
			}
			sc.GlyphStyle = s.glyph(true)
			eb, err := errorBars(p, s)
			if err != nil {
				return nil, err
			}
			f.p.Add(eb, sc)
			f.addLegend(g.label()+", bursty", sc)
			drawn += p.Len()
		}
	}
	switch {
	case len(cs) == 0:
		f.note = "no configurations"
	case drawn == 0:
		f.note = "no defined values"
	}
	return f, nil
}

type reference struct {
	label string
	y     float64
	style draw.LineStyle
}

func errorBars(p points, s series) (*plotter.YErrorBars, error) {
	eb, err := plotter.NewYErrorBars(p)
	if err != nil {
		return nil, err
	}
	eb.LineStyle = draw.LineStyle{Color: s.color, Width: vg.Points(1)}
	eb.CapWidth = vg.Points(5)
	return eb, nil
}

func costPlot(r *Report) (*figure, error) {
	refs := []reference{
		{"base policy, no faults", r.BaseCost, refBase},
		{"sequential, no faults", r.SequentialCost, refSeq},
	}
	return lossPlot(r.Configs, "mean cost per episode (cost units)",
		func(c Config) (float64, float64) { return c.MeanCost, c.CI95 }, refs)
}

func retainedPlot(r *Report) (*figure, error) {
	refs := []reference{
		{"base policy (0)", 0, refBase},
		{"sequential (1)", 1, refSeq},
	}
	f, err := lossPlot(r.Configs, "retained gain (fraction of sequential's)",
		func(c Config) (float64, float64) { return c.Retained, c.RetainedCI95 }, refs)
	if err != nil {
		return nil, err
	}
	if f.note == "no defined values" {
		f.note = "undefined: base and sequential tie"
	}
	return f, nil
}

// modeHist is the latency of one mode's configs summed into one
// histogram, on the edges of the first of them.
type modeHist struct {
	mode   string
	edges  []float64
	counts []float64
	open   bool // the last bin has no upper edge
}

// latencyHists sums configs' histograms per mode, in order of first
// appearance. A config whose edges differ from its mode's first is
// re-binned by the midpoint of each of its bins.
func latencyHists(cs []Config) []modeHist {
	var hs []modeHist
	idx := map[string]int{}
	for _, c := range cs {
		h := c.Latency
		if len(h.Counts) == 0 || h.validate() != nil {
			continue
		}
		i, ok := idx[c.Mode]
		if !ok {
			i = len(hs)
			idx[c.Mode] = i
			edges := slices.Clone(h.EdgesMs)
			n := len(edges) - 1
			open := math.IsInf(edges[n], 1)
			if open {
				// Draw the overflow bin as wide as the one before.
				w := 1.0
				if n > 0 {
					w = edges[n-1] - edges[max(n-2, 0)]
					if n == 1 || w <= 0 {
						w = math.Max(1, math.Abs(edges[n-1]))
					}
				}
				edges[n] = edges[n-1] + w
			}
			hs = append(hs, modeHist{mode: c.Mode, edges: edges, counts: make([]float64, n), open: open})
		}
		m := &hs[i]
		same := slices.Equal(h.EdgesMs[:len(h.EdgesMs)-1], m.edges[:len(m.edges)-1]) && len(h.EdgesMs) == len(m.edges)
		for j, n := range h.Counts {
			k := j
			if !same {
				lo, hi := h.EdgesMs[j], h.EdgesMs[j+1]
				mid := lo
				if !math.IsInf(hi, 1) {
					mid = (lo + hi) / 2
				}
				k, _ = slices.BinarySearch(m.edges, mid)
				k = min(max(k-1, 0), len(m.counts)-1)
			}
			m.counts[k] += float64(n)
		}
	}
	return hs
}

func latencyPlot(r *Report) (*figure, error) {
	hs := latencyHists(r.Configs)
	f := newFigure("round latency (ms)", "rounds (% of the mode's rounds)")
	if len(hs) == 0 {
		f.p.X.Min, f.p.X.Max, f.p.Y.Min, f.p.Y.Max = 0, 100, 0, 100
		f.note = "no latency data"
		return f, nil
	}
	// Show only the occupied span of the edges, and use a log axis when
	// the edges are spread over decades (as latency bins usually are).
	lo, hi := math.Inf(1), math.Inf(-1)
	positive := true
	for _, h := range hs {
		for j, n := range h.counts {
			if n > 0 {
				lo, hi = math.Min(lo, h.edges[j]), math.Max(hi, h.edges[j+1])
			}
		}
		positive = positive && h.edges[0] > 0
	}
	if lo > hi { // every count is zero
		lo, hi = hs[0].edges[0], hs[0].edges[len(hs[0].edges)-1]
	}
	if positive && hi/lo >= 20 {
		f.p.X.Scale = plot.LogScale{}
		f.p.X.Tick.Marker = plot.LogTicks{Prec: -1}
	}
	f.p.X.Min, f.p.X.Max = lo, hi
	f.p.Y.Min = 0
	open := false
	for i, h := range hs {
		total := 0.0
		for _, n := range h.counts {
			total += n
		}
		if total == 0 {
			total = 1
		}
		// A step outline: bars of several modes would hide each other.
		var xy plotter.XYs
		for j, n := range h.counts {
			if h.edges[j+1] <= lo || h.edges[j] >= hi {
				continue
			}
			share := 100 * n / total
			if len(xy) == 0 {
				xy = append(xy, plotter.XY{X: h.edges[j], Y: 0})
			}
			xy = append(xy, plotter.XY{X: h.edges[j], Y: share}, plotter.XY{X: h.edges[j+1], Y: share})
		}
		if len(xy) == 0 {
			continue
		}
		xy = append(xy, plotter.XY{X: xy[len(xy)-1].X, Y: 0})
		l, err := plotter.NewLine(xy)
		if err != nil {
			return nil, err
		}
		s := seriesStyle(i)
		l.LineStyle = s.line()
		l.FillColor = withAlpha(s.color, 0x26)
		f.p.Add(l)
		f.addLegend(h.mode, l)
		open = open || h.open
	}
	if open {
		f.p.X.Label.Text += "; last bin open-ended"
	}
	return f, nil
}

func withAlpha(c color.Color, a uint8) color.Color {
	r, g, b, _ := c.RGBA()
	// color.RGBA is premultiplied: scale the 8-bit channels by a.
	scale := func(v uint32) uint8 { return uint8((v >> 8) * uint32(a) / 0xff) }
	return color.RGBA{R: scale(r), G: scale(g), B: scale(b), A: a}
}

// worstConfig picks the config the robots plot shows: among those with
// per-robot data, the lowest retained, or if none is defined the most
// held rounds. It returns -1 when no config has per-robot data.
func worstConfig(cs []Config) (int, string) {
	best, why := -1, ""
	for i, c := range cs {
		if len(c.PerRobot) == 0 || math.IsNaN(c.Retained) {
			continue
		}
		if best < 0 || c.Retained < cs[best].Retained {
			best, why = i, "lowest retained"
		}
	}
	if best >= 0 {
		return best, why
	}
	for i, c := range cs {
		if len(c.PerRobot) == 0 {
			continue
		}
		if best < 0 || c.HeldRounds > cs[best].HeldRounds {
			best, why = i, "most held rounds (retained undefined)"
		}
	}
	return best, why
}

var (
	heldColor    = palette[0] // dark blue
	guessedColor = palette[4] // orange: far from blue in hue and lightness
)

func robotsPlot(r *Report) (*figure, int, string, error) {
	f := newFigure("robot", "count (held robot-rounds, guessed turns)")
	w, why := worstConfig(r.Configs)
	if w < 0 {
		f.p.X.Min, f.p.X.Max, f.p.Y.Min, f.p.Y.Max = 0, 10, 0, 10
		f.note = "no per-robot data"
		return f, w, why, nil
	}
	robots := slices.Clone(r.Configs[w].PerRobot)
	slices.SortStableFunc(robots, func(a, b Robot) int { return cmp.Compare(a.Robot, b.Robot) })
	held := make(plotter.Values, len(robots))
	guessed := make(plotter.Values, len(robots))
	for i, rb := range robots {
		held[i], guessed[i] = float64(rb.Held), float64(rb.Guessed)
	}
	// Two bars per robot across about 300 units of data width.
	bw := vg.Points(math.Max(1, math.Min(9, 300/(2.6*float64(len(robots))))))
	outline := draw.LineStyle{Color: black, Width: vg.Points(0.5)}
	if bw < 4 {
		outline.Width = 0 // thin bars would be all outline
	}
	hb, err := plotter.NewBarChart(held, bw)
	if err != nil {
		return nil, w, why, err
	}
	gb, err := plotter.NewBarChart(guessed, bw)
	if err != nil {
		return nil, w, why, err
	}
	hb.Color, gb.Color = heldColor, guessedColor
	hb.LineStyle, gb.LineStyle = outline, outline
	hb.Offset, gb.Offset = -bw/2, bw/2
	f.p.Add(hb, gb)
	f.p.Y.Min = 0
	if f.p.Y.Max <= 0 {
		f.p.Y.Max = 1
	}
	// Label robots by id, at most about a dozen labels.
	step := max(1, (len(robots)+11)/12)
	var ticks []plot.Tick
	for i, rb := range robots {
		t := plot.Tick{Value: float64(i)}
		if i%step == 0 {
			t.Label = strconv.Itoa(rb.Robot)
		}
		ticks = append(ticks, t)
	}
	f.p.X.Tick.Marker = plot.ConstantTicks(ticks)
	f.p.X.Label.Text = "robot (id)"
	f.addLegend("held (robot-rounds)", hb)
	f.addLegend("guessed (turns)", gb)
	return f, w, why, nil
}
