package report

import (
	"bytes"
	"encoding/json"
	"math"
	"regexp"
	"slices"
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
		Title:      "Report <b>&</b> </script><script>alert(1)</script>",
		Paragraphs: []string{"first <script>"},
		Tables:     []Table{{Caption: "t", Header: []string{"policy", "regret"}, Rows: [][]string{{"<img src=x onerror=alert(1)>", "1.0"}}}},
		Charts: []Chart{
			RegretChart([]Band{{Name: "uniform", X: x, Mean: []float64{0, 1, 2, math.NaN()}, SE: []float64{0, 0.1, 0.2, 0.3}}}),
			TrafficShareChart("traffic-u", "Traffic", x, []ArmSeries{{Arm: "a", Y: []float64{0.5, 0.6, 0.7, 0.7}}, {Arm: "b", Y: []float64{0.5, 0.4, 0.3, 0.3}}}),
			CVRChart("CVR", x, []ArmCVR{{Arm: "a", Observed: []float64{0, 0.01, 0.02, 0.03}, Eventual: []float64{0.04, 0.04, 0.05, 0.05},
				Low: []float64{0.01, 0.02, 0.03, 0.04}, High: []float64{0.09, 0.08, 0.07, 0.06}}}),
			delay,
		},
	}
	var buf bytes.Buffer
	if err := WriteHTML(&buf, p); err != nil {
		t.Fatal(err)
	}
	s := buf.String()
	// Untrusted text never reaches the markup as tags: the title element
	// is escaped, and the JSON escapes '<'.
	if n := strings.Count(strings.ToLower(s), "<script"); n != 3 {
		t.Errorf("%d script elements, want 3 (data, uPlot, page script)", n)
	}
	if strings.Contains(s, "<img") || strings.Contains(s, "<b>") {
		t.Error("text from the page reached the markup unescaped")
	}
	m := regexp.MustCompile(`(?s)<script type="application/json" id="page-data">(.*?)</script>`).FindStringSubmatch(s)
	if m == nil {
		t.Fatal("no inline page data")
	}
	var back Page
	if err := json.Unmarshal([]byte(m[1]), &back); err != nil {
		t.Fatalf("inline data: %v", err)
	}
	if back.Title != p.Title || back.Tables[0].Rows[0][0] != "<img src=x onerror=alert(1)>" {
		t.Errorf("inline data lost text: %q %q", back.Title, back.Tables[0].Rows[0][0])
	}
	ids := []string{}
	for _, c := range back.Charts {
		ids = append(ids, c.ID)
	}
	if strings.Join(ids, ",") != "regret,traffic-u,cvr,delay-cdf" {
		t.Errorf("chart ids %v", ids)
	}
	// NaN is a gap (null), and the regret band is ±2 SE.
	reg := back.Charts[0].Series[0]
	if !math.IsNaN(reg.Y[3]) || reg.High[2] != 2.4 || reg.Low[1] != 0.8 {
		t.Errorf("regret series %v low %v high %v", reg.Y, reg.Low, reg.High)
	}
	cvr := back.Charts[2].Series[0]
	if cvr.Role != "eventual" || len(cvr.Low) != 4 || cvr.Band == "" {
		t.Errorf("eventual series lost its band: %+v", cvr)
	}
}

// TestAssetsSafeInline checks what WriteHTML relies on to inline the
// scripts: neither closes its script element or opens a comment.
func TestAssetsSafeInline(t *testing.T) {
	for _, name := range []string{scriptPath, uplotPath} {
		b := bytes.ToLower(mustRead(name))
		if bytes.Contains(b, []byte("</script")) || bytes.Contains(b, []byte("<!--")) {
			t.Errorf("%s cannot be inlined", name)
		}
		if bytes.Contains(b, []byte("innerhtml")) || bytes.Contains(b, []byte("insertadjacenthtml")) || bytes.Contains(b, []byte("document.write")) {
			t.Errorf("%s parses text as markup", name)
		}
	}
	if len(mustRead(uplotLicense)) == 0 {
		t.Error("uPlot's licence is missing")
	}
}

func TestNormalizeSteps(t *testing.T) {
	// Repeated delays: the staircase keeps the last point of each x.
	c, err := DelayCDFChart("d", []ArmDelay{{Arm: "a", ObservedHours: []float64{3, 1, 1, 2}}})
	if err != nil {
		t.Fatal(err)
	}
	p := Normalize(Page{Charts: []Chart{c}})
	s := p.Charts[0].Series[0]
	if !s.Step || len(s.X) != 4 || s.X[1] != 1 || s.Y[1] != 0.5 || s.X[3] != 3 || s.Y[3] != 1 || s.Y[0] != 0 {
		t.Fatalf("empirical CDF x %v y %v", s.X, s.Y)
	}
	if _, err := DelayCDFChart("d", []ArmDelay{{Arm: "a", GridHours: []float64{0, 1}, FittedCDF: []float64{0}}}); err == nil {
		t.Fatal("mismatched grid accepted")
	}
}

// TestCVRChartRange checks the y range of the CVR chart: early spikes and
// wide bands are clipped, the latest values always show, and nothing is
// clipped when the lines and bands fit.
func TestCVRChartRange(t *testing.T) {
	x := make([]float64, 40)
	flat := make([]float64, 40)
	spiky := make([]float64, 40)
	wide := make([]float64, 40)
	narrow := make([]float64, 40)
	for i := range x {
		x[i] = float64(2 * i)
		flat[i] = 0.04
		spiky[i] = 0.04
		wide[i] = 0.05
		narrow[i] = 0.045
	}
	spiky[0], spiky[1] = 0.5, 0.3 // two noisy estimates of the first hours
	wide[0], wide[1] = 0.9, 0.7
	rising := slices.Clone(flat)
	rising[39] = 0.2 // the latest value is far above the rest
	for _, tc := range []struct {
		name     string
		arms     []ArmCVR
		clipped  bool
		wantMax  float64
		showLast float64
	}{
		{"early spike and band clipped", []ArmCVR{{Arm: "a", Observed: flat, Eventual: spiky, Low: flat, High: wide}}, true, 1.5 * 0.04, 0.04},
		{"latest value stays visible", []ArmCVR{{Arm: "a", Observed: flat, Eventual: rising, Low: flat, High: rising}}, false, 0, 0.2},
		{"narrow band not clipped", []ArmCVR{{Arm: "a", Observed: flat, Eventual: flat, Low: flat, High: narrow}}, false, 0, 0.045},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c := CVRChart("CVR", x, tc.arms)
			if !tc.clipped {
				if c.Y.Max != nil {
					t.Fatalf("y axis clipped at %v, want it to fit the data", *c.Y.Max)
				}
				return
			}
			if c.Y.Max == nil {
				t.Fatal("y axis not clipped")
			}
			if math.Abs(*c.Y.Max-tc.wantMax) > 1e-12 {
				t.Errorf("y max %v, want %v", *c.Y.Max, tc.wantMax)
			}
			if *c.Y.Max < tc.showLast {
				t.Errorf("y max %v hides the latest value %v", *c.Y.Max, tc.showLast)
			}
		})
	}
}
