// Package report describes pages of tables and charts as plain data and
// renders them one way for every surface: the live console of `ripen run`
// and the HTML files `ripen report`, `ripen demo` and `ripen simulate`
// write. A Page marshals to JSON; the page script shipped in this package
// (assets/ripen.js, with uPlot, assets/uplot) draws it in the browser,
// whether the JSON came inline in a written file or from the console's API.
//
// It knows nothing about where the data come from, and it never builds
// HTML from the data: every name and number reaches the page as JSON text
// that the script places with textContent, so names from event producers
// cannot become markup.
package report

import (
	"bytes"
	"encoding/json"
	"errors"
	"math"
	"slices"
	"sort"
	"strconv"
)

// Axis units the page script understands.
const (
	// UnitHours: values are hours, ticked at round hours or days.
	UnitHours = "hours"
	// UnitPercent: values are shares in [0, 1], printed as percentages.
	UnitPercent = "percent"
	// UnitNumber: plain numbers.
	UnitNumber = "number"
)

// Line styles of a Series.
const (
	StyleSolid  = "solid"
	StyleDashed = "dashed"
	StyleDotted = "dotted"
)

// valueDigits is the precision of chart coordinates in JSON.
const valueDigits = 7

// Values are chart coordinates; NaN and infinities marshal as null (a gap).
type Values []float64

// MarshalJSON writes the values with null for non-finite ones, to
// valueDigits significant digits (more than a chart can show; it halves
// the size of a long history).
func (v Values) MarshalJSON() ([]byte, error) {
	if v == nil {
		return []byte("null"), nil
	}
	b := make([]byte, 0, 2+8*len(v))
	b = append(b, '[')
	for i, x := range v {
		if i > 0 {
			b = append(b, ',')
		}
		if isFinite(x) {
			b = strconv.AppendFloat(b, x, 'g', valueDigits, 64)
		} else {
			b = append(b, "null"...)
		}
	}
	return append(b, ']'), nil
}

// UnmarshalJSON reads values written by MarshalJSON (null as NaN).
func (v *Values) UnmarshalJSON(b []byte) error {
	var raw []*float64
	if err := json.Unmarshal(b, &raw); err != nil {
		return err
	}
	if raw == nil {
		*v = nil
		return nil
	}
	out := make(Values, len(raw))
	for i, p := range raw {
		out[i] = math.NaN()
		if p != nil {
			out[i] = *p
		}
	}
	*v = out
	return nil
}

// Series is one line of a chart. Points whose X or Y is NaN or infinite
// are gaps.
type Series struct {
	// Name is the legend entry of the series' colour (an arm, a policy);
	// series of one Group share both.
	Name string `json:"name"`
	// Role says what the line shows ("eventual", "observed"); the legend
	// pairs it with the line style. Empty: the colour alone identifies it.
	Role string `json:"role,omitempty"`
	// Group selects the colour from the page's colour-blind-safe palette.
	Group int `json:"group"`
	// Style is StyleSolid (default), StyleDashed or StyleDotted.
	Style string `json:"style,omitempty"`
	// Step draws a right-continuous step function (weights between
	// publications, empirical CDFs).
	Step bool `json:"step,omitempty"`
	// X and Y are the points, of equal length, X increasing.
	X Values `json:"x"`
	Y Values `json:"y"`
	// Low and High, when both set (same length as X), draw a shaded band;
	// Band names it in the legend ("95% credible interval").
	Low  Values `json:"low,omitempty"`
	High Values `json:"high,omitempty"`
	Band string `json:"band,omitempty"`
}

// Axis describes one axis of a chart.
type Axis struct {
	Label string `json:"label"`
	// Unit is UnitHours, UnitPercent or UnitNumber (default).
	Unit string `json:"unit,omitempty"`
	// Min and Max fix the range; nil fits the data.
	Min *float64 `json:"min,omitempty"`
	Max *float64 `json:"max,omitempty"`
}

// Chart is one chart: a title, axes and series.
type Chart struct {
	// ID names the chart in the page (an HTML id); derived from the
	// position when empty.
	ID    string `json:"id"`
	Title string `json:"title"`
	// Note is a sentence under the title (what the lines mean).
	Note   string   `json:"note,omitempty"`
	X      Axis     `json:"x"`
	Y      Axis     `json:"y"`
	Series []Series `json:"series"`
}

// Table is a small table of text cells.
type Table struct {
	ID      string     `json:"id,omitempty"`
	Caption string     `json:"caption,omitempty"`
	Header  []string   `json:"header"`
	Rows    [][]string `json:"rows"`
	// Groups, when set (one per row), puts the colour swatch of that
	// group before the row's first cell (-1: none), so a table's arms
	// match the charts.
	Groups []int `json:"groups,omitempty"`
	// Links, when set (one per row), makes the first cell a link to
	// that page-relative address ("" for none).
	Links []string `json:"links,omitempty"`
	// Filter, when set, is the header of a column the reader can filter
	// the rows by (the console's status filter).
	Filter string `json:"filter,omitempty"`
	// Empty is shown instead of the table when it has no rows.
	Empty string `json:"empty,omitempty"`
}

// Fact is one labelled value in a page's summary line.
type Fact struct {
	Label string `json:"label"`
	Value string `json:"value"`
	// Tone colours the value: "", "good", "warn" or "bad".
	Tone string `json:"tone,omitempty"`
}

// Link is a download or navigation link of a page.
type Link struct {
	Text string `json:"text"`
	Href string `json:"href"`
}

// Page is a whole page.
type Page struct {
	Title      string   `json:"title"`
	Facts      []Fact   `json:"facts,omitempty"`
	Paragraphs []string `json:"paragraphs,omitempty"`
	Tables     []Table  `json:"tables,omitempty"`
	Charts     []Chart  `json:"charts,omitempty"`
	Links      []Link   `json:"links,omitempty"`
	// After holds tables shown below the charts (configuration, details).
	After []Table `json:"after,omitempty"`
}

func isFinite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// Normalize returns p ready to marshal: chart ids filled in from their
// position, and step series with repeated X reduced to the last point of
// each X (the page script needs strictly increasing X).
func Normalize(p Page) Page {
	p.Charts = slices.Clone(p.Charts)
	for i := range p.Charts {
		c := &p.Charts[i]
		if c.ID == "" {
			c.ID = "chart-" + strconv.Itoa(i+1)
		}
		c.Series = slices.Clone(c.Series)
		for j := range c.Series {
			c.Series[j] = dedupeX(c.Series[j])
		}
	}
	return p
}

// dedupeX keeps, for each run of equal X, its last point (and drops
// points out of order), so that X increases strictly.
func dedupeX(s Series) Series {
	n := len(s.X)
	if n == 0 {
		return s
	}
	keep := make([]int, 0, n)
	for i := range n {
		if !isFinite(s.X[i]) {
			continue
		}
		if k := len(keep); k > 0 && s.X[i] <= s.X[keep[k-1]] {
			if s.X[i] == s.X[keep[k-1]] {
				keep[k-1] = i
			}
			continue
		}
		keep = append(keep, i)
	}
	if len(keep) == n {
		return s
	}
	pick := func(v Values) Values {
		if len(v) != n {
			return v
		}
		out := make(Values, len(keep))
		for j, i := range keep {
			out[j] = v[i]
		}
		return out
	}
	s.X, s.Y, s.Low, s.High = pick(s.X), pick(s.Y), pick(s.Low), pick(s.High)
	return s
}

// MarshalPage returns the JSON of p after Normalize. Go's encoder escapes
// <, > and &, so the text is safe inside an HTML script element.
func MarshalPage(p Page) ([]byte, error) {
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	if err := enc.Encode(Normalize(p)); err != nil {
		return nil, err
	}
	return bytes.TrimSpace(buf.Bytes()), nil
}

// ptr returns a pointer to x, for Axis bounds.
func ptr(x float64) *float64 { return &x }

// shareAxis is the y axis of weights and probabilities.
func shareAxis(label string) Axis {
	return Axis{Label: label, Unit: UnitPercent, Min: ptr(0), Max: ptr(1)}
}

// Band is a mean curve with its standard error, e.g. one policy's
// cumulative regret over runs.
type Band struct {
	Name        string
	X, Mean, SE []float64
}

// RegretChart draws cumulative regret per policy with ±2 SE bands.
func RegretChart(bands []Band) Chart {
	c := Chart{ID: "regret", Title: "Cumulative regret", Note: "Mean over runs; shaded: ± 2 standard errors.",
		X: Axis{Label: "time since start", Unit: UnitHours}, Y: Axis{Label: "conversions lost", Min: ptr(0)}}
	for i, b := range bands {
		lo, hi := make(Values, len(b.Mean)), make(Values, len(b.Mean))
		for j := range b.Mean {
			se := 0.0
			if j < len(b.SE) {
				se = b.SE[j]
			}
			lo[j], hi[j] = b.Mean[j]-2*se, b.Mean[j]+2*se
		}
		c.Series = append(c.Series, Series{Name: b.Name, X: b.X, Y: b.Mean, Low: lo, High: hi, Band: "± 2 SE", Group: i})
	}
	return c
}

// ArmSeries is one arm's values over time.
type ArmSeries struct {
	Arm string
	Y   []float64
}

// TrafficShareChart draws each arm's traffic share over time as steps
// (a weight holds until the next publication).
func TrafficShareChart(id, title string, hours []float64, arms []ArmSeries) Chart {
	c := Chart{ID: id, Title: title, X: Axis{Label: "time since start", Unit: UnitHours}, Y: shareAxis("traffic share")}
	for i, a := range arms {
		c.Series = append(c.Series, Series{Name: a.Arm, X: hours, Y: a.Y, Group: i, Step: true})
	}
	return c
}

// ProbBestChart draws each arm's probability of being the best arm over
// time.
func ProbBestChart(hours []float64, arms []ArmSeries) Chart {
	c := Chart{ID: "pbest", Title: "Probability of being the best arm", Note: "Under the model's posterior at each refit.",
		X: Axis{Label: "time since start", Unit: UnitHours}, Y: shareAxis("P(best)")}
	for i, a := range arms {
		c.Series = append(c.Series, Series{Name: a.Arm, X: hours, Y: a.Y, Group: i})
	}
	return c
}

// ArmCVR is one arm's conversion-rate estimates over time. Low and High
// (the eventual rate's credible interval) and True (known only in
// simulations) are optional.
type ArmCVR struct {
	Arm                      string
	Observed, Eventual, True []float64
	Low, High                []float64
}

// CVRChart draws observed (dashed), eventual (solid, with its credible
// band when given) and, when known, true (dotted) CVR per arm. The y axis
// stops at cvrHeadroom times the lines' cvrTopQuantile (and never below
// any line's latest value), so that neither the wide bands nor the noisy
// estimates of the first hours flatten the lines; what lies above is
// clipped.
func CVRChart(title string, hours []float64, arms []ArmCVR) Chart {
	c := Chart{ID: "cvr", Title: title, X: Axis{Label: "time since start", Unit: UnitHours}, Y: Axis{Label: "conversion rate", Unit: UnitPercent, Min: ptr(0)}}
	var lines []float64
	var last, highest float64
	for _, a := range arms {
		for _, ys := range [][]float64{a.Observed, a.Eventual, a.True, a.High} {
			highest = max(highest, maxFinite(ys))
		}
		for _, ys := range [][]float64{a.Observed, a.Eventual, a.True} {
			for _, y := range ys {
				if isFinite(y) {
					lines = append(lines, y)
				}
			}
			last = max(last, lastFinite(ys))
		}
	}
	if len(lines) > 0 {
		slices.Sort(lines)
		top := max(lines[int(cvrTopQuantile*float64(len(lines)-1))], last)
		if top > 0 && highest > cvrHeadroom*top {
			c.Y.Max = ptr(cvrHeadroom * top)
		}
	}
	for i, a := range arms {
		ev := Series{Name: a.Arm, Role: "eventual", X: hours, Y: a.Eventual, Group: i}
		if len(a.Low) > 0 && len(a.High) > 0 {
			ev.Low, ev.High, ev.Band = a.Low, a.High, "95% credible interval of the eventual rate"
		}
		c.Series = append(c.Series, ev, Series{Name: a.Arm, Role: "observed", X: hours, Y: a.Observed, Group: i, Style: StyleDashed})
		if len(a.True) > 0 {
			c.Series = append(c.Series, Series{Name: a.Arm, Role: "true", X: hours, Y: a.True, Group: i, Step: true, Style: StyleDotted})
		}
	}
	return c
}

// cvrHeadroom and cvrTopQuantile set the y axis of CVRChart: headroom
// times the given quantile of every point of its lines.
const (
	cvrHeadroom    = 1.5
	cvrTopQuantile = 0.95
)

// lastFinite is the last finite value of xs (0 if none).
func lastFinite(xs []float64) float64 {
	for i := len(xs) - 1; i >= 0; i-- {
		if isFinite(xs[i]) {
			return xs[i]
		}
	}
	return 0
}

// maxFinite is the largest finite value of xs (0 if none).
func maxFinite(xs []float64) float64 {
	var m float64
	for _, x := range xs {
		if isFinite(x) && x > m {
			m = x
		}
	}
	return m
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
	c := Chart{ID: "delay-cdf", Title: title, X: Axis{Label: "delay", Unit: UnitHours, Min: ptr(0)}, Y: shareAxis("P(delay ≤ x)")}
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
			Series{Name: a.Arm, Role: "observed", X: d, Y: ecdf, Group: i, Step: true},
			Series{Name: a.Arm, Role: "fitted", X: a.GridHours, Y: a.FittedCDF, Group: i, Style: StyleDashed})
		if len(a.TrueCDF) > 0 {
			c.Series = append(c.Series, Series{Name: a.Arm, Role: "true", X: a.GridHours, Y: a.TrueCDF, Group: i, Style: StyleDotted})
		}
	}
	return c, nil
}
