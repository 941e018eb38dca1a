package result

import (
	"bytes"
	"fmt"
	"html/template"
	"io"
	"math"
)

// HTML writes the report as one self-contained page: header figures, the
// table of configs and four inline SVG plots. It loads nothing from
// elsewhere, so it can be mailed or opened offline, and it reads on a
// phone: plots shrink to the screen, the table scrolls on its own.
func (r *Report) HTML(w io.Writer) error {
	page, err := r.page()
	if err != nil {
		return err
	}
	var b bytes.Buffer
	if err := pageTemplate.Execute(&b, page); err != nil {
		return fmt.Errorf("result: html: %w", err)
	}
	_, err = w.Write(b.Bytes())
	return err
}

type htmlPage struct {
	Title   string
	Facts   []fact
	Columns []string
	Rows    [][]htmlCell
	Plots   []htmlPlot
	Faults  []htmlList
	Events  []htmlList
	Worst   []htmlWorst
}

// htmlWorst is a configuration's worst episode and its replay page.
type htmlWorst struct {
	Name, Replay string
	Episode      int
	Cost         string
}

type htmlCell struct {
	Text string
	Num  bool
}

type htmlPlot struct {
	ID, Heading, Caption string
	SVG                  template.HTML // rendered by gonum/plot, whose text is escaped
}

type htmlList struct {
	Name  string
	Lines []string
}

func (r *Report) page() (*htmlPage, error) {
	p := &htmlPage{Title: "Drill " + r.Drill, Facts: r.facts(), Columns: columns}
	if r.Drill == "" {
		p.Title = "Drill report"
	}
	for _, row := range r.rows() {
		cells := make([]htmlCell, len(row))
		for i, s := range row {
			cells[i] = htmlCell{s, i >= 3} // loss onwards are figures
		}
		p.Rows = append(p.Rows, cells)
	}
	undefined, noLatency := 0, 0
	for _, c := range r.Configs {
		if math.IsNaN(c.Retained) {
			undefined++
		}
		if len(c.Latency.Counts) == 0 || c.Latency.validate() != nil {
			noLatency++
		}
		if len(c.Faults) > 0 {
			p.Faults = append(p.Faults, htmlList{c.Name, c.Faults})
		}
		if len(c.Events) > 0 {
			p.Events = append(p.Events, htmlList{c.Name, c.Events})
		}
		if c.Replay != "" && c.WorstEpisode < len(c.EpisodeCosts) {
			p.Worst = append(p.Worst, htmlWorst{c.Name, c.Replay, c.WorstEpisode, fmt.Sprintf("%.2f", c.EpisodeCosts[c.WorstEpisode])})
		}
	}

	cost, err := costPlot(r)
	if err != nil {
		return nil, err
	}
	retained, err := retainedPlot(r)
	if err != nil {
		return nil, err
	}
	latency, err := latencyPlot(r)
	if err != nil {
		return nil, err
	}
	robots, worst, why, err := robotsPlot(r)
	if err != nil {
		return nil, err
	}

	retainedCaption := "The share of sequential rollout's gain over the base policy that a config keeps under its faults: 1 is as good as sequential, 0 no better than the base policy. Bars: 95% intervals; hollow markers: bursty loss; lines shifted slightly sideways as above."
	if undefined > 0 {
		retainedCaption += fmt.Sprintf(" %d of %d configs have no defined value (base and sequential costs tie) and are not drawn.", undefined, len(r.Configs))
	}
	latencyCaption := "Round latency per mode, the histograms of that mode's configs summed; the height is the share of the mode's rounds in each bin."
	if noLatency > 0 {
		latencyCaption += fmt.Sprintf(" %d of %d configs have no latency data.", noLatency, len(r.Configs))
	}
	robotsCaption := "No config has per-robot data."
	if worst >= 0 {
		robotsCaption = fmt.Sprintf("Per robot, for config “%s” (%s): robot-rounds held without a valid decision, and turns decided with at least one guess.", r.Configs[worst].Name, why)
	}
	plots := []struct {
		f                    *figure
		id, heading, caption string
	}{
		{cost, "plot-cost", "Mean cost against loss",
			"Mean cost per episode against the loss rate of the swept channel, one line per mode / guess source (lower is better). Bars: 95% intervals; hollow markers: bursty loss (burst lengths in the table); lines are shifted slightly sideways so that they do not hide each other. Black lines: the base policy and sequential rollout without faults."},
		{retained, "plot-retained", "Retained gain against loss", retainedCaption},
		{latency, "plot-latency", "Round latency", latencyCaption},
		{robots, "plot-robots", "Held and guessed per robot", robotsCaption},
	}
	for _, pl := range plots {
		svg, err := pl.f.svg(pl.id)
		if err != nil {
			return nil, fmt.Errorf("result: plot %s: %w", pl.id, err)
		}
		// vgsvg escapes every string it draws, so the markup is safe.
		p.Plots = append(p.Plots, htmlPlot{pl.id, pl.heading, pl.caption, template.HTML(svg)})
	}
	return p, nil
}

var pageTemplate = template.Must(template.New("page").Parse(`<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{{.Title}}</title>
<style>
*{box-sizing:border-box}
body{margin:0;background:#f5f5f3;color:#1b1b1b;font:16px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,"Liberation Sans",Arial,sans-serif}
main{max-width:1440px;margin:0 auto;padding:12px}
h1{font-size:1.35rem;margin:.3em 0 .5em;overflow-wrap:anywhere}
h2{font-size:1.1rem;margin:1.3em 0 .5em}
h3{font-size:1rem;margin:0 0 .4em}
.facts{display:grid;grid-template-columns:repeat(auto-fill,minmax(140px,1fr));gap:8px;margin:0}
.facts div{background:#fff;border:1px solid #ddd;border-radius:6px;padding:6px 10px;min-width:0}
.facts dt{font-size:.8rem;color:#555}
.facts dd{margin:0;font-variant-numeric:tabular-nums;overflow-wrap:anywhere}
.scroll{overflow-x:auto;-webkit-overflow-scrolling:touch;background:#fff;border:1px solid #ddd;border-radius:6px}
table{min-width:100%;border-collapse:collapse;font-size:.875rem;white-space:nowrap;font-variant-numeric:tabular-nums}
th,td{padding:5px 8px;border-bottom:1px solid #eee;text-align:left}
th{background:#efefec;font-weight:600}
td.num{text-align:right}
th:first-child,td:first-child{position:sticky;left:0;background:#fff;border-right:1px solid #ddd}
th:first-child{background:#efefec}
@media (max-width:600px){table{font-size:.8125rem}td:first-child{white-space:normal;min-width:8em;max-width:10em}}
.plots{display:grid;grid-template-columns:repeat(auto-fit,minmax(min(100%,440px),1fr));gap:12px}
figure{margin:0;background:#fff;border:1px solid #ddd;border-radius:6px;padding:8px;min-width:0}
svg.plot{display:block;width:100%;max-width:100%;height:auto}
figcaption{font-size:.85rem;color:#444;margin-top:6px}
details{margin:.5em 0}
ul{margin:.3em 0;padding-left:1.3em}
li{overflow-wrap:anywhere}
footer{font-size:.8rem;color:#666;margin:2em 0 1em}
</style>
</head>
<body>
<main>
<h1>{{.Title}}</h1>
<dl class="facts">
{{- range .Facts}}
<div><dt>{{.Label}}</dt><dd>{{.Value}}</dd></div>
{{- end}}
</dl>

<h2>Configurations</h2>
<div class="scroll">
<table>
<thead><tr>{{range .Columns}}<th scope="col">{{.}}</th>{{end}}</tr></thead>
<tbody>
{{- range .Rows}}
<tr>{{range .}}<td{{if .Num}} class="num"{{end}}>{{.Text}}</td>{{end}}</tr>
{{- else}}
<tr><td colspan="{{len .Columns}}">no configurations</td></tr>
{{- end}}
</tbody>
</table>
</div>

<h2>Plots</h2>
<div class="plots">
{{- range .Plots}}
<figure>
<h3 id="{{.ID}}-title">{{.Heading}}</h3>
{{.SVG}}
<figcaption>{{.Caption}}</figcaption>
</figure>
{{- end}}
</div>
{{- if .Worst}}

<h2>Worst episodes, replayed</h2>
<ul>
{{- range .Worst}}
<li>{{.Name}}: episode {{.Episode}}, cost {{.Cost}} — <a href="{{.Replay}}">replay it round by round</a></li>
{{- end}}
</ul>
{{- end}}
{{- if .Faults}}

<h2>Fault schedules</h2>
{{- range .Faults}}
<details><summary>{{.Name}}</summary><ul>{{range .Lines}}<li>{{.}}</li>{{end}}</ul></details>
{{- end}}
{{- end}}
{{- if .Events}}

<h2>Process runs</h2>
{{- range .Events}}
<details><summary>{{.Name}}</summary><ul>{{range .Lines}}<li>{{.}}</li>{{end}}</ul></details>
{{- end}}
{{- end}}
<footer>Written by baton's drill; the JSON report holds the same figures and per-episode costs.</footer>
</main>
</body>
</html>
`))
