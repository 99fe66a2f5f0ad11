// Package report renders an HTML page of tables and SVG charts (drawn with
// gonum.org/v1/plot) from plain series data. It knows nothing about where
// the data come from: `ripen simulate --report` feeds it simulated runs, and
// a live experiment's history can feed it the same charts.
package report

import (
	"bytes"
	"errors"
	"fmt"
	"html/template"
	"image/color"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/plotutil"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"
)

// Chart size in the page. Default: 16cm by 9cm.
const (
	DefaultWidth  = 16 * vg.Centimeter
	DefaultHeight = 9 * vg.Centimeter
)

// Series is one line of a chart. Points whose X or Y is NaN or infinite
// are left out.
type Series struct {
	// Name is the legend entry.
	Name string
	// X and Y are the points, of equal length.
	X, Y []float64
	// Low and High, when both set (same length as X), draw a shaded band.
	Low, High []float64
	// Group selects the colour: series of one group (an arm, a policy)
	// share it.
	Group int
	// Dashed draws a dashed line; Step draws a right-continuous step
	// function (for empirical CDFs).
	Dashed, Step bool
}

// Chart is one chart: a title, axis labels and series.
type Chart struct {
	// ID names the chart in the page (an HTML id); derived from the
	// position when empty.
	ID     string
	Title  string
	XLabel string
	YLabel string
	Series []Series
}

// Table is a small table printed above the charts.
type Table struct {
	Caption string
	Header  []string
	Rows    [][]string
}

// Page is a whole report.
type Page struct {
	Title      string
	Paragraphs []string
	Tables     []Table
	Charts     []Chart
}

// finite keeps the points of s whose coordinates are finite.
func finite(x, y []float64) plotter.XYs {
	var out plotter.XYs
	for i := range x {
		if i < len(y) && isFinite(x[i]) && isFinite(y[i]) {
			out = append(out, plotter.XY{X: x[i], Y: y[i]})
		}
	}
	return out
}

func isFinite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// stepXYs turns points into a right-continuous staircase.
func stepXYs(p plotter.XYs) plotter.XYs {
	var out plotter.XYs
	for i, q := range p {
		if i > 0 {
			out = append(out, plotter.XY{X: q.X, Y: p[i-1].Y})
		}
		out = append(out, q)
	}
	return out
}

// groupColor returns the colour of group g.
func groupColor(g int) color.Color { return plotutil.Color(g) }

// build draws c on a gonum plot.
func build(c Chart) (*plot.Plot, error) {
	p := plot.New()
	p.Title.Text = c.Title
	p.X.Label.Text = c.XLabel
	p.Y.Label.Text = c.YLabel
	p.Add(plotter.NewGrid())
	p.Legend.Top = true
	p.Legend.Left = true
	// Bands first, so that lines are drawn over them.
	for _, s := range c.Series {
		if len(s.Low) == 0 || len(s.High) == 0 {
			continue
		}
		lo, hi := finite(s.X, s.Low), finite(s.X, s.High)
		if len(lo) < 2 || len(lo) != len(hi) {
			continue
		}
		ring := append(plotter.XYs{}, hi...)
		for i := len(lo) - 1; i >= 0; i-- {
			ring = append(ring, lo[i])
		}
		poly, err := plotter.NewPolygon(ring)
		if err != nil {
			return nil, fmt.Errorf("chart %q: band %q: %w", c.Title, s.Name, err)
		}
		r, g, b, _ := groupColor(s.Group).RGBA()
		poly.Color = color.NRGBA{R: uint8(r >> 8), G: uint8(g >> 8), B: uint8(b >> 8), A: 60}
		poly.LineStyle.Width = 0
		p.Add(poly)
	}
	for _, s := range c.Series {
		pts := finite(s.X, s.Y)
		if len(pts) == 0 {
			continue
		}
		if s.Step {
			pts = stepXYs(pts)
		}
		l, err := plotter.NewLine(pts)
		if err != nil {
			return nil, fmt.Errorf("chart %q: series %q: %w", c.Title, s.Name, err)
		}
		l.Color = groupColor(s.Group)
		l.Width = vg.Points(1.5)
		if s.Dashed {
			l.Dashes = []vg.Length{vg.Points(5), vg.Points(3)}
		}
		p.Add(l)
		if s.Name != "" {
			p.Legend.Add(s.Name, l)
		}
	}
	return p, nil
}

// SVG renders c as a standalone SVG document of the given size.
func SVG(c Chart, width, height vg.Length) ([]byte, error) {
	p, err := build(c)
	if err != nil {
		return nil, err
	}
	canvas := vgsvg.New(width, height)
	p.Draw(draw.New(canvas))
	var buf bytes.Buffer
	if _, err := canvas.WriteTo(&buf); err != nil {
		return nil, fmt.Errorf("chart %q: write svg: %w", c.Title, err)
	}
	return buf.Bytes(), nil
}

// inlineSVG strips the XML prologue so the SVG can sit inside HTML.
func inlineSVG(doc []byte) template.HTML {
	if i := bytes.Index(doc, []byte("<svg")); i >= 0 {
		doc = doc[i:]
	}
	return template.HTML(doc) // produced by the SVG canvas, not user text
}

var page = template.Must(template.New("page").Parse(`<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>{{.Title}}</title>
<style>
body { font-family: sans-serif; max-width: 60rem; margin: 2rem auto; color: #222; }
table { border-collapse: collapse; margin: 1rem 0; }
th, td { border: 1px solid #ccc; padding: 0.25rem 0.6rem; text-align: right; }
th:first-child, td:first-child { text-align: left; }
caption { text-align: left; font-weight: bold; padding-bottom: 0.3rem; }
figure { margin: 1.5rem 0; }
figcaption { font-weight: bold; margin-bottom: 0.3rem; }
</style>
</head>
<body>
<h1>{{.Title}}</h1>
{{range .Paragraphs}}<p>{{.}}</p>
{{end}}{{range .Tables}}<table>
<caption>{{.Caption}}</caption>
<thead><tr>{{range .Header}}<th>{{.}}</th>{{end}}</tr></thead>
<tbody>
{{range .Rows}}<tr>{{range .}}<td>{{.}}</td>{{end}}</tr>
{{end}}</tbody>
</table>
{{end}}{{range .Charts}}<figure id="{{.ID}}">
<figcaption>{{.Title}}</figcaption>
{{.SVG}}
</figure>
{{end}}</body>
</html>
`))

type renderedChart struct {
	ID, Title string
	SVG       template.HTML
}

// WriteHTML renders p as one self-contained HTML document with the charts
// inline.
func WriteHTML(w io.Writer, p Page) error {
	data := struct {
		Page
		Charts []renderedChart
	}{Page: p}
	for i, c := range p.Charts {
		doc, err := SVG(c, DefaultWidth, DefaultHeight)
		if err != nil {
			return fmt.Errorf("report: %w", err)
		}
		id := c.ID
		if id == "" {
			id = fmt.Sprintf("chart-%d", i+1)
		}
		data.Charts = append(data.Charts, renderedChart{ID: id, Title: c.Title, SVG: inlineSVG(doc)})
	}
	if err := page.Execute(w, data); err != nil {
		return fmt.Errorf("report: render page: %w", err)
	}
	return nil
}

// WriteDir writes p to dir/index.html, creating dir if needed.
func WriteDir(dir string, p Page) (err error) {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return fmt.Errorf("report: %w", err)
	}
	path := filepath.Join(dir, "index.html")
	var buf bytes.Buffer
	if err := WriteHTML(&buf, p); err != nil {
		return err
	}
	if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
		return fmt.Errorf("report: %w", err)
	}
	return nil
}

// Band is a mean curve with its standard error, e.g. one policy's
// cumulative regret over runs.
type Band struct {
	Name        string
	X, Mean, SE []float64
}

// RegretChart draws cumulative regret per policy with ±2 SE bands.
func RegretChart(bands []Band) Chart {
	c := Chart{ID: "regret", Title: "Cumulative regret (mean ± 2 SE over runs)", XLabel: "hours", YLabel: "conversions lost"}
	for i, b := range bands {
		lo, hi := make([]float64, len(b.Mean)), make([]float64, len(b.Mean))
		for j := range b.Mean {
			se := 0.0
			if j < len(b.SE) {
				se = b.SE[j]
			}
			lo[j], hi[j] = b.Mean[j]-2*se, b.Mean[j]+2*se
		}
		c.Series = append(c.Series, Series{Name: b.Name, X: b.X, Y: b.Mean, Low: lo, High: hi, Group: i})
	}
	return c
}

// ArmSeries is one arm's values over time.
type ArmSeries struct {
	Arm string
	Y   []float64
}

// TrafficShareChart draws each arm's traffic share over time.
func TrafficShareChart(id, title string, hours []float64, arms []ArmSeries) Chart {
	c := Chart{ID: id, Title: title, XLabel: "hours", YLabel: "traffic share"}
	for i, a := range arms {
		c.Series = append(c.Series, Series{Name: a.Arm, X: hours, Y: a.Y, Group: i, Step: true})
	}
	return c
}

// ArmCVR is one arm's conversion-rate estimates over time; True is
// optional (known only in simulations).
type ArmCVR struct {
	Arm                      string
	Observed, Eventual, True []float64
}

// CVRChart draws observed, eventual and (when known) true CVR per arm:
// eventual solid, observed dashed, true as a thin dotted-style line.
func CVRChart(title string, hours []float64, arms []ArmCVR) Chart {
	c := Chart{ID: "cvr", Title: title, XLabel: "hours", YLabel: "conversion rate"}
	for i, a := range arms {
		c.Series = append(c.Series,
			Series{Name: a.Arm + " eventual", X: hours, Y: a.Eventual, Group: i},
			Series{Name: a.Arm + " observed", X: hours, Y: a.Observed, Group: i, Dashed: true})
		if len(a.True) > 0 {
			c.Series = append(c.Series, Series{Name: a.Arm + " true", X: hours, Y: a.True, Group: i, Step: true, Dashed: true})
		}
	}
	return c
}

// ArmDelay is one arm's delay data: the delays of the conversions observed
// so far (hours) and a fitted CDF on a grid; TrueCDF, on the same grid, is
// optional.
type ArmDelay struct {
	Arm                           string
	ObservedHours                 []float64
	GridHours, FittedCDF, TrueCDF []float64
}

// DelayCDFChart draws, per arm, the empirical CDF of observed delays as a
// staircase against the fitted delay CDF (and the true one when known).
func DelayCDFChart(title string, arms []ArmDelay) (Chart, error) {
	c := Chart{ID: "delay-cdf", Title: title, XLabel: "delay (hours)", YLabel: "P(delay ≤ x)"}
	for i, a := range arms {
		if len(a.GridHours) != len(a.FittedCDF) || (len(a.TrueCDF) > 0 && len(a.TrueCDF) != len(a.GridHours)) {
			return Chart{}, errors.New("report: delay CDF grid and values differ in length")
		}
		d := append([]float64(nil), a.ObservedHours...)
		sort.Float64s(d)
		ecdf := make([]float64, len(d))
		for j := range d {
			ecdf[j] = float64(j+1) / float64(len(d))
		}
		if len(d) > 0 {
			d = append([]float64{0}, d...)
			ecdf = append([]float64{0}, ecdf...)
		}
		c.Series = append(c.Series,
			Series{Name: a.Arm + " observed", X: d, Y: ecdf, Group: i, Step: true},
			Series{Name: a.Arm + " fitted", X: a.GridHours, Y: a.FittedCDF, Group: i, Dashed: true})
		if len(a.TrueCDF) > 0 {
			c.Series = append(c.Series, Series{Name: a.Arm + " true", X: a.GridHours, Y: a.TrueCDF, Group: i + len(arms)})
		}
	}
	return c, nil
}
