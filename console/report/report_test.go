package report

import (
	"bytes"
	"math"
	"strings"
	"testing"
)

func TestWriteHTML(t *testing.T) {
	x := []float64{0, 1, 2, 3}
	delay, err := DelayCDFChart("Delay CDF", []ArmDelay{{Arm: "a", ObservedHours: []float64{2, 0.5, 1}, GridHours: x, FittedCDF: []float64{0, 0.5, 0.8, 1}}})
	if err != nil {
		t.Fatal(err)
	}
	p := Page{
		Title:      "Report <b>&</b>",
		Paragraphs: []string{"first <script>"},
		Tables:     []Table{{Caption: "t", Header: []string{"policy", "regret"}, Rows: [][]string{{"uniform", "1.0"}}}},
		Charts: []Chart{
			RegretChart([]Band{{Name: "uniform", X: x, Mean: []float64{0, 1, 2, math.NaN()}, SE: []float64{0, 0.1, 0.2, 0.3}}}),
			TrafficShareChart("traffic-u", "Traffic", x, []ArmSeries{{Arm: "a", Y: []float64{0.5, 0.6, 0.7, 0.7}}, {Arm: "b", Y: []float64{0.5, 0.4, 0.3, 0.3}}}),
			CVRChart("CVR", x, []ArmCVR{{Arm: "a", Observed: []float64{0, 0.01, 0.02, 0.03}, Eventual: []float64{0.04, 0.04, 0.05, 0.05}}}),
			delay,
		},
	}
	var buf bytes.Buffer
	if err := WriteHTML(&buf, p); err != nil {
		t.Fatal(err)
	}
	s := buf.String()
	if n := strings.Count(s, "<svg"); n != 4 {
		t.Fatalf("%d inline SVGs, want 4", n)
	}
	if strings.Contains(s, "<?xml") {
		t.Fatal("XML prologue left inside HTML")
	}
	if strings.Contains(s, "<script>") || !strings.Contains(s, "Report &lt;b&gt;&amp;&lt;/b&gt;") {
		t.Fatal("text not escaped")
	}
	for _, id := range []string{`id="regret"`, `id="traffic-u"`, `id="cvr"`, `id="delay-cdf"`, "<td>uniform</td>"} {
		if !strings.Contains(s, id) {
			t.Errorf("page lacks %s", id)
		}
	}
	// Bands: the regret chart with SE draws one filled polygon.
	svg, err := SVG(p.Charts[0], DefaultWidth, DefaultHeight)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Contains(svg, []byte("fill-opacity")) && !bytes.Contains(svg, []byte("fill:")) && !bytes.Contains(svg, []byte("fill=")) {
		t.Error("no filled band in the regret chart")
	}
}

func TestDelayCDFChartErrors(t *testing.T) {
	if _, err := DelayCDFChart("d", []ArmDelay{{Arm: "a", GridHours: []float64{0, 1}, FittedCDF: []float64{0}}}); err == nil {
		t.Fatal("mismatched grid accepted")
	}
	// The empirical CDF is a staircase from 0 to 1 over the sorted delays.
	c, err := DelayCDFChart("d", []ArmDelay{{Arm: "a", ObservedHours: []float64{3, 1, 2}}})
	if err != nil {
		t.Fatal(err)
	}
	s := c.Series[0]
	if !s.Step || s.X[1] != 1 || s.X[3] != 3 || s.Y[0] != 0 || s.Y[3] != 1 {
		t.Fatalf("empirical CDF %v %v", s.X, s.Y)
	}
}
