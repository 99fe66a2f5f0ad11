package console

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"ripen/consumer"
	"ripen/estimator"
	"ripen/estimator/sim"
	"ripen/state"
)

// dkwEpsilon is the half-width of the Dvoretzky–Kiefer–Wolfowitz
// confidence band of an empirical CDF of n draws: P(sup|F_n - F| > eps)
// <= 2 exp(-2 n eps^2) (Dvoretzky, Kiefer & Wolfowitz 1956, with the tight
// constant of Massart 1990, "The tight constant in the DKW inequality",
// Ann. Probab. 18(3)).
func dkwEpsilon(n int, alpha float64) float64 {
	return math.Sqrt(math.Log(2/alpha) / (2 * float64(n)))
}

// reportT0 is the first click of the report tests: 2031-02-03T00:00:00Z.
var reportT0 = time.Date(2031, 2, 3, 0, 0, 0, 0, time.UTC).UnixMilli()

// reportLayout is the layout of the report tests: a two-day window.
var reportLayout = estimator.Layout{Window: 48 * time.Hour}.WithDefaults()

// yarnArm is one arm of the invented test experiment (Fernhollow Yarns
// testing two product photos): its true eventual rate and exponential
// mean delay.
type yarnArm struct {
	name      string
	q         float64
	meanHours float64
}

var yarnArms = []yarnArm{{"skein-closeup", 0.20, 5}, {"knitted-scarf", 0.15, 12}}

// yarnStates simulates n clicks per arm spread evenly over span, ending
// gap before asOf, each converting with probability q after an exponential delay
// truncated at the window, and returns the states at asOf with the
// conversions seen by then.
func yarnStates(t *testing.T, n int, span, gap time.Duration, asOf int64, seed uint64) map[string]*estimator.ArmState {
	t.Helper()
	r := rand.New(rand.NewPCG(seed, 0x7961726e))
	w := reportLayout.Window.Seconds()
	out := map[string]*estimator.ArmState{}
	for _, a := range yarnArms {
		g, err := sim.NewTruncated(sim.Exponential{Mean: a.meanHours * 3600}, w)
		if err != nil {
			t.Fatal(err)
		}
		st := estimator.NewArmState(reportLayout)
		start := asOf - gap.Milliseconds() - span.Milliseconds()
		st.Advance(start)
		for i := range n {
			ct := start + int64(i)*span.Milliseconds()/int64(n)
			st.AddClicks(ct, 1)
			if r.Float64() < a.q {
				if cv := ct + int64(g.Sample(r)*1000); cv <= asOf {
					st.AddConversion(ct, cv)
				}
			}
		}
		st.Advance(asOf)
		out[a.name] = st
	}
	return out
}

// trueDelayCDF is the true delay CDF of a test arm.
func trueDelayCDF(t *testing.T, a yarnArm) func(float64) float64 {
	t.Helper()
	g, err := sim.NewTruncated(sim.Exponential{Mean: a.meanHours * 3600}, reportLayout.Window.Seconds())
	if err != nil {
		t.Fatal(err)
	}
	return g.CDF
}

// supOnEdges is the largest distance between the staircase (value just
// before and at each edge) and f at the edges.
func supOnEdges(edgesHours, cdf []float64, f func(float64) float64) float64 {
	var d float64
	for i, h := range edgesHours {
		v := f(h * 3600)
		d = max(d, math.Abs(v-cdf[i]))
		if i > 0 {
			d = max(d, math.Abs(v-cdf[i-1]))
		}
	}
	return d
}

// interp evaluates the curve (xs, ys) at x by linear interpolation.
func interp(xs, ys []float64, x float64) float64 {
	for i := 1; i < len(xs); i++ {
		if x <= xs[i] {
			f := (x - xs[i-1]) / (xs[i] - xs[i-1])
			return ys[i-1] + f*(ys[i]-ys[i-1])
		}
	}
	return ys[len(ys)-1]
}

// TestDelayCurves checks the delay chart's curves against the law the
// delays were drawn from, with the Dvoretzky–Kiefer–Wolfowitz band (see
// dkwEpsilon). The histogram staircase is the empirical CDF evaluated at
// the bin edges, so the band applies to it at the edges.
func TestDelayCurves(t *testing.T) {
	const alpha = 1e-4
	for _, tc := range []struct {
		name string
		// span over which the clicks were made, ending gap before as-of.
		span, gap time.Duration
		// censored: some clicks are younger than the window, so observed
		// delays are short-biased and G itself must not fit them.
		censored bool
	}{
		{"all matured", 10 * 24 * time.Hour, reportLayout.Window, false},
		{"young clicks", 24 * time.Hour, 0, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			asOf := reportT0 + tc.span.Milliseconds() + tc.gap.Milliseconds()
			states := yarnStates(t, 6000, tc.span, tc.gap, asOf, 3)
			for _, a := range yarnArms {
				c, err := NewDelayCurves(states[a.name], estimator.FamilyExponential)
				if err != nil {
					t.Fatal(err)
				}
				n := int(states[a.name].Conversions())
				eps := dkwEpsilon(n, alpha)
				g := trueDelayCDF(t, a)
				// The fit's G is the true law within the band (a fit of the
				// right family is no farther from the truth than the data).
				fitDist := 0.0
				for j, h := range c.GridHours {
					fitDist = max(fitDist, math.Abs(c.Fitted[j]-g(h*3600)))
				}
				if fitDist > eps {
					t.Errorf("%s: fitted G is %.4f from the truth, DKW band %.4f (n=%d)", a.name, fitDist, eps, n)
				}
				// The observed histogram against the fit's prediction for
				// it: within the band in both cases.
				asObs := func(x float64) float64 { return interp(c.GridHours, c.AsObserved, x/3600) }
				if d := supOnEdges(c.EdgesHours, c.Empirical, asObs); d > eps+0.005 {
					t.Errorf("%s: observed delays %.4f from the fit's prediction for them, band %.4f", a.name, d, eps)
				}
				naive := supOnEdges(c.EdgesHours, c.Empirical, g)
				if tc.censored {
					// Young clicks show only short delays: the DKW test
					// rejects the true G itself at level alpha, which is
					// why the chart draws the censoring-aware prediction.
					if naive <= eps {
						t.Errorf("%s: observed delays only %.4f from G with young clicks; want them visibly short-biased (band %.4f)", a.name, naive, eps)
					}
				} else {
					if naive > eps {
						t.Errorf("%s: observed delays %.4f from the true G with every click matured, band %.4f", a.name, naive, eps)
					}
					for j := range c.Fitted {
						if math.Abs(c.Fitted[j]-c.AsObserved[j]) > 1e-12 {
							t.Fatalf("%s: with no pending click the prediction for observed delays must be G itself: at %vh %v vs %v", a.name, c.GridHours[j], c.Fitted[j], c.AsObserved[j])
						}
					}
				}
			}
		})
	}
}

// TestExperimentPageSeries checks that the charts plot what the history
// and the states hold.
func TestExperimentPageSeries(t *testing.T) {
	const id = "fernhollow-photos"
	asOf := reportT0 + (4 * 24 * time.Hour).Milliseconds()
	states := yarnStates(t, 2000, 4*24*time.Hour, 0, asOf, 9)
	ex := &state.Experiment{ID: id, Layout: reportLayout, Watermark: asOf, Arms: []string{"knitted-scarf", "skein-closeup"}, States: states}
	mk := func(seq int64, hours float64, w0 float64) consumer.Allocation {
		at := time.UnixMilli(reportT0 + int64(hours*3.6e6)).UTC().Format(time.RFC3339Nano)
		return consumer.Allocation{Seq: seq, ExperimentReport: estimator.ExperimentReport{
			Experiment: id, AsOf: at, Status: estimator.StatusAdapting,
			Weights: map[string]float64{"knitted-scarf": w0, "skein-closeup": 1 - w0},
			Arms: []estimator.ArmReport{
				{Arm: "knitted-scarf", ObservedCVR: 0.1, EventualCVR: 0.15, Weight: w0, Delay: estimator.Delay{Family: "exponential"}},
				{Arm: "skein-closeup", ObservedCVR: 0.18, EventualCVR: 0.2, Weight: 1 - w0, Delay: estimator.Delay{Family: "weibull"}},
			},
		}}
	}
	// Read out of order and twice, as from a partitioned topic; the
	// latest carries the settle rule's verdict.
	raw := [][]byte{}
	for _, a := range []consumer.Allocation{mk(2, 48, 0.3), mk(1, 24, 0.5), mk(2, 48, 0.3), mk(3, 72, 0.2)} {
		if a.Seq == 3 {
			a.Settle = estimator.SettleReport{Arm: "skein-closeup", Reason: "no click of knitted-scarf is older than the 7d attribution window yet", Blocking: []string{"knitted-scarf"}}
		}
		b, err := json.Marshal(a)
		if err != nil {
			t.Fatal(err)
		}
		raw = append(raw, b)
	}
	hist, err := ParseAllocations(raw)
	if err != nil {
		t.Fatal(err)
	}
	if len(hist) != 3 || hist[0].Seq != 1 || hist[2].Seq != 3 {
		t.Fatalf("ParseAllocations: got %d allocations, want seq 1..3 once each", len(hist))
	}
	if s := hist[2].Settle; s.Settled || len(s.Blocking) != 1 || hist[1].Settle.Reason != "" {
		t.Fatalf("settle verdicts %+v, %+v", hist[1].Settle, hist[2].Settle)
	}
	page, err := ExperimentPage(View{ID: id, History: hist, State: ex, Origin: reportT0})
	if err != nil {
		t.Fatal(err)
	}
	charts := map[string]int{}
	for i, c := range page.Charts {
		charts[c.ID] = i
	}
	traffic := page.Charts[charts["traffic"]]
	scarf := traffic.Series[0]
	wantX := []float64{24, 48, 72, 96} // the last step runs to the watermark
	wantY := []float64{0.5, 0.3, 0.2, 0.2}
	if scarf.Name != "knitted-scarf" || !approxEqual(scarf.X, wantX) || !approxEqual(scarf.Y, wantY) {
		t.Errorf("traffic series %s: x %v y %v, want x %v y %v", scarf.Name, scarf.X, scarf.Y, wantX, wantY)
	}
	cvr := page.Charts[charts["cvr"]]
	if s := cvr.Series[0]; s.Name != "knitted-scarf" || s.Role != "eventual" || !approxEqual(s.Y, []float64{0.15, 0.15, 0.15}) || len(s.Low) != 3 {
		t.Errorf("cvr series %s %s = %v (band %v)", s.Name, s.Role, s.Y, s.Low)
	}
	if s := cvr.Series[1]; s.Role != "observed" || s.Style != "dashed" || !approxEqual(s.Y, []float64{0.1, 0.1, 0.1}) {
		t.Errorf("observed series %+v", s)
	}
	if pb, ok := charts["pbest"]; !ok || len(page.Charts[pb].Series) != 2 {
		t.Error("no P(best) chart with one line per arm")
	}
	model := page.Charts[charts["delay-model"]]
	for _, want := range []string{"knitted-scarf: exponential", "skein-closeup: weibull"} {
		if !strings.Contains(model.Note, want) {
			t.Errorf("delay model note %q lacks %q (refitted with the latest allocation's family)", model.Note, want)
		}
	}
	rows := page.Tables[0].Rows
	if len(rows) != 2 || rows[0][1] != "0.200" || rows[1][8] != "weibull" || rows[0][0] != "knitted-scarf (blocks settling)" {
		t.Errorf("arm table rows %v", rows)
	}
	if g := page.Tables[0].Groups; len(g) != 2 || g[0] != 0 || g[1] != 1 {
		t.Errorf("arm colours %v, want the chart order", g)
	}
	var reason string
	for _, f := range page.Facts {
		if f.Label == "not settled because" {
			reason = f.Value
		}
	}
	if !strings.Contains(reason, "older than the 7d attribution window") {
		t.Errorf("facts %+v lack the settle reason", page.Facts)
	}
}

func approxEqual(a, b []float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Abs(a[i]-b[i]) > 1e-9 {
			return false
		}
	}
	return true
}

// TestArmDelayCurvesFromReport: with an allocation whose report describes
// the arm's delay, the chart draws that delay, not a refit of the state:
// here a Weibull the yarn data (exponential delays) would never give,
// checked against the Weibull CDF truncated at the window, (1 -
// exp(-(x/s)^k)) / (1 - exp(-(W/s)^k)) (Weibull 1951, "A statistical
// distribution function of wide applicability", J. Appl. Mech. 18:293-297;
// truncation by conditioning on D <= W). A histogram delay, which a report
// cannot describe, is fitted again in its own family.
func TestArmDelayCurvesFromReport(t *testing.T) {
	asOf := reportT0 + (4 * 24 * time.Hour).Milliseconds()
	states := yarnStates(t, 2000, 3*24*time.Hour, 0, asOf, 3)
	arm := yarnArms[0].name
	st := states[arm]
	const k, sHours = 2.5, 30.0
	var alloc Allocation
	alloc.Arms = []estimator.ArmReport{{Arm: arm, Delay: estimator.Delay{Family: "weibull", Shape: k, ScaleHours: sHours}}}
	c, err := armDelayCurves(st, &alloc, arm)
	if err != nil {
		t.Fatal(err)
	}
	if c.Family != "weibull" {
		t.Errorf("family %q, want weibull", c.Family)
	}
	w := st.FitData().Window
	g := func(x float64) float64 {
		s := sHours * 3600
		return -math.Expm1(-math.Pow(x/s, k)) / -math.Expm1(-math.Pow(w/s, k))
	}
	for j, h := range c.GridHours {
		if d := math.Abs(c.Fitted[j] - g(h*3600)); d > 1e-12 {
			t.Fatalf("G(%vh) = %v, want %v", h, c.Fitted[j], g(h*3600))
		}
	}
	alloc.Arms[0].Delay = estimator.Delay{Family: "histogram"}
	if c, err = armDelayCurves(st, &alloc, arm); err != nil || c.Family != "histogram" {
		t.Fatalf("histogram report: family %q, %v; want a histogram refit", c.Family, err)
	}
}
