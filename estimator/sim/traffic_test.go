package sim

import (
	"math"
	"slices"
	"strings"
	"testing"
)

// trafficScenario is an invented one: Quillmoss Stationery's three hero
// images, the best one converting slowest.
const trafficScenario = `
name: quillmoss-hero
horizon: 14d
clicks_per_hour: 240
diurnal_amplitude: 0.5
update_interval: 2h
window: 7d
arms:
  - name: fountain-pen-closeup
    cvr: 0.055
    delay:
      exponential: {mean: 30h}
  - name: notebook-stack
    cvr: 0.038
    delay:
      exponential: {mean: 2h}
  - name: desk-flatlay
    cvr: 0.032
    delay:
      lognormal: {median: 3h, sigma: 0.8}
seed: 7
`

// dkwEpsilon is the half-width of the Dvoretzky–Kiefer–Wolfowitz
// confidence band of an empirical CDF of n draws: P(sup|F_n - F| > eps)
// <= 2 exp(-2 n eps^2) (Dvoretzky, Kiefer & Wolfowitz 1956, with the tight
// constant of Massart 1990, "The tight constant in the DKW inequality",
// Ann. Probab. 18(3)).
func dkwEpsilon(n int, alpha float64) float64 {
	return math.Sqrt(math.Log(2/alpha) / (2 * float64(n)))
}

// TestTrafficMatchesScenario checks the generated traffic against the
// laws it is drawn from: Poisson arrivals, arms split by the weights,
// Bernoulli conversions and the truncated delay distribution.
func TestTrafficMatchesScenario(t *testing.T) {
	sc, err := ParseScenario(strings.NewReader(trafficScenario))
	if err != nil {
		t.Fatal(err)
	}
	weights := []float64{0.5, 0.3, 0.2}
	g, err := NewTraffic(*sc, "qm-")
	if err != nil {
		t.Fatal(err)
	}
	const chunkMs = 2 * 3600 * 1000
	horizon := sc.Horizon.D().Milliseconds()
	windowMs := sc.Window.D().Milliseconds()
	clickTS := map[string]int64{}
	clickArm := map[string]int{}
	delays := make([][]float64, len(sc.Arms))
	converted := map[string]bool{}
	var lastEnd int64
	for target := int64(chunkMs); target <= horizon; target += chunkMs {
		clicks, convs := g.Chunk(target, weights)
		if len(clicks) == 0 {
			t.Fatalf("chunk to %d has no click", target)
		}
		prev := int64(math.MinInt64)
		for i, c := range clicks {
			el := c.TS - Start
			if c.TS < prev || el < lastEnd {
				t.Fatalf("click %s at %d out of order", c.ID, c.TS)
			}
			prev = c.TS
			// Only the chunk's last click reaches the target.
			if last := i == len(clicks)-1; last != (el >= target) {
				t.Fatalf("click %d of %d at elapsed %d, target %d", i, len(clicks), el, target)
			}
			clickTS[c.ID] = c.TS
			clickArm[c.ID] = c.Arm
		}
		lastEnd = prev - Start
		prev = math.MinInt64
		for _, v := range convs {
			ct, ok := clickTS[v.ClickID]
			switch {
			case !ok:
				t.Fatalf("conversion of unknown click %s", v.ClickID)
			case v.TS < prev || v.TS-Start >= target || v.TS < ct:
				t.Fatalf("conversion %s at %d out of order (target %d, click %d)", v.ClickID, v.TS, target, ct)
			case converted[v.ClickID]:
				t.Fatalf("click %s converted twice", v.ClickID)
			case v.Arm != clickArm[v.ClickID]:
				t.Fatalf("conversion %s on arm %d, its click on %d", v.ClickID, v.Arm, clickArm[v.ClickID])
			}
			prev = v.TS
			converted[v.ClickID] = true
			if ct-Start < horizon-windowMs {
				delays[v.Arm] = append(delays[v.Arm], float64(v.TS-ct)/1000)
			}
		}
	}
	if got := g.Clicks(); got[0]+got[1]+got[2] != len(clickTS) {
		t.Errorf("Clicks() %v, %d clicks generated", got, len(clickTS))
	}

	// Arrivals: a Poisson process, so the count over the horizon has
	// variance equal to its mean (Ross, Introduction to Probability Models,
	// ch. 5); the day cycle integrates to zero over whole days.
	n := len(clickTS)
	mean := sc.ClicksPerHour * sc.Horizon.Hours()
	if math.Abs(float64(n)-mean) > 4*math.Sqrt(mean) {
		t.Errorf("%d clicks, want %.0f ± %.0f (4 Poisson SD)", n, mean, 4*math.Sqrt(mean))
	}
	early := map[int]int{} // clicks old enough that every conversion is in
	earlyConv := map[int]int{}
	for id, ts := range clickTS {
		if ts-Start < horizon-windowMs {
			early[clickArm[id]]++
			if converted[id] {
				earlyConv[clickArm[id]]++
			}
		}
	}
	for i, a := range sc.Arms {
		t.Run(a.Name, func(t *testing.T) {
			// Split: binomial(n, w) per arm.
			got := 0
			for _, arm := range clickArm {
				if arm == i {
					got++
				}
			}
			want, sd := float64(n)*weights[i], math.Sqrt(float64(n)*weights[i]*(1-weights[i]))
			if math.Abs(float64(got)-want) > 4*sd {
				t.Errorf("%d clicks, want %.0f ± %.0f (4 binomial SD)", got, want, 4*sd)
			}
			// Conversions of clicks older than the window: binomial(q).
			m := early[i]
			want, sd = float64(m)*a.CVR, math.Sqrt(float64(m)*a.CVR*(1-a.CVR))
			if math.Abs(float64(earlyConv[i])-want) > 4*sd {
				t.Errorf("%d of %d clicks converted, want %.0f ± %.0f", earlyConv[i], m, want, 4*sd)
			}
			// Delays: the empirical CDF stays within the DKW band around
			// the scenario's delay law truncated at the window.
			dist, err := a.Delay.Distribution()
			if err != nil {
				t.Fatal(err)
			}
			truth, err := NewTruncated(dist, sc.Window.D().Seconds())
			if err != nil {
				t.Fatal(err)
			}
			d := slices.Clone(delays[i])
			slices.Sort(d)
			eps := dkwEpsilon(len(d), 1e-4)
			for j, x := range d {
				// Just below and at x the empirical CDF is j/n and
				// (j+1)/n; both must lie within eps of the true CDF.
				f := truth.CDF(x)
				if below, at := float64(j)/float64(len(d)), float64(j+1)/float64(len(d)); math.Abs(f-below) > eps || math.Abs(f-at) > eps {
					t.Fatalf("delay %d of %d = %.0fs: true CDF %.4f, empirical %.4f..%.4f, DKW band ± %.4f", j, len(d), x, f, below, at, eps)
				}
			}
		})
	}
}
