package sim

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/stat/distuv"

	"ripen/estimator"
)

// TestOraclePosteriorBetaWhenEveryClickIsRipe: when every click's
// conversion would have been seen (G = 1: matured clicks, or a delay that
// is always zero), the oracle posterior under the Jeffreys prior is the
// conjugate Beta(C+1/2, N-C+1/2) (Brown, Cai & DasGupta 2001, "Interval
// estimation for a binomial proportion", Statistical Science 16:101-133,
// section 4.1.2). Its mean and quantiles are checked against gonum's
// distuv.Beta, from near-empty data (C = 0: the q^-1/2 spike at 0) to a
// million clicks (mass in a sliver near q = 0.03).
func TestOraclePosteriorBetaWhenEveryClickIsRipe(t *testing.T) {
	window := (7 * 24 * time.Hour).Seconds()
	for _, tc := range []struct {
		clicks, conv float64
		pending      bool // clicks held in pending bins with a zero delay
	}{
		{0, 0, false}, {5, 5, false}, {100, 3, false}, {1000, 0, false},
		{10000, 300, false}, {1e6, 30000, false}, {2000, 61, true},
	} {
		t.Run(fmt.Sprintf("%g of %g pending=%v", tc.conv, tc.clicks, tc.pending), func(t *testing.T) {
			d := &estimator.FitData{Window: window, MaturedClicks: tc.clicks, MaturedConversions: tc.conv}
			var delay Distribution = Exponential{Mean: 3600}
			if tc.pending {
				d = &estimator.FitData{Window: window, Pending: []estimator.PendingBin{
					{Age: 600, Clicks: tc.clicks / 2, Converted: 30},
					{Age: 86400, Clicks: tc.clicks / 2, Converted: tc.conv - 30},
				}}
				delay = Constant{Delay: 0}
			}
			post, err := OraclePosterior(d, delay)
			if err != nil {
				t.Fatal(err)
			}
			ref := distuv.Beta{Alpha: tc.conv + 0.5, Beta: tc.clicks - tc.conv + 0.5}
			sd := ref.StdDev()
			if got, want := post.Mean(), ref.Mean(); math.Abs(got-want) > 5e-4*sd {
				t.Errorf("mean %.8g, Beta mean %.8g (sd %.3g)", got, want, sd)
			}
			for _, p := range []float64{0.01, 0.025, 0.1, 0.25, 0.5, 0.75, 0.9, 0.975, 0.99} {
				got, want := post.Quantile(p), ref.Quantile(p)
				if math.Abs(got-want) > 2e-3*sd+1e-12 {
					t.Errorf("quantile %.3f: %.8g, Beta %.8g (sd %.3g)", p, got, want, sd)
				}
			}
		})
	}
}

// TestOraclePosteriorAgainstQuadrature checks the oracle posterior with
// pending clicks (0 < G < 1) against a second, independent computation:
// Gauss-Legendre quadrature (gonum integrate/quad) of likelihood times
// prior in theta = asin(sqrt(q)), in which the Jeffreys prior is uniform
// (Jeffreys 1946, "An invariant form for the prior probability in
// estimation problems", Proc. R. Soc. A 186:453-461), so the integrand has
// no singularity at the ends.
func TestOraclePosteriorAgainstQuadrature(t *testing.T) {
	window := (3 * 24 * time.Hour).Seconds()
	delay, err := NewTruncated(Weibull{Shape: 0.7, Scale: 20 * 3600}, window)
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name string
		d    estimator.FitData
	}{
		{"young", estimator.FitData{Window: window, Pending: []estimator.PendingBin{
			{Age: 3600, Clicks: 120, Converted: 1}, {Age: 6 * 3600, Clicks: 300, Converted: 4}, {Age: 20 * 3600, Clicks: 200, Converted: 5},
		}}},
		{"mixed", estimator.FitData{Window: window, MaturedClicks: 900, MaturedConversions: 41, Pending: []estimator.PendingBin{
			{Age: 1800, Clicks: 80, Converted: 0}, {Age: 12 * 3600, Clicks: 400, Converted: 9}, {Age: 60 * 3600, Clicks: 350, Converted: 12},
		}}},
		{"no conversions", estimator.FitData{Window: window, Pending: []estimator.PendingBin{
			{Age: 2 * 3600, Clicks: 50}, {Age: 40 * 3600, Clicks: 70},
		}}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			post, err := OraclePosterior(&tc.d, delay)
			if err != nil {
				t.Fatal(err)
			}
			logLik := func(q float64) float64 {
				c := tc.d.TotalConversions()
				v := (tc.d.MaturedClicks - tc.d.MaturedConversions) * math.Log1p(-q)
				if c > 0 {
					v += c * math.Log(q)
				}
				for _, b := range tc.d.Pending {
					v += (b.Clicks - b.Converted) * math.Log1p(-q*delay.CDF(b.Age))
				}
				return v
			}
			// Scale by the largest value on a fine scan so exp does not underflow.
			top := math.Inf(-1)
			for i := 1; i < 20000; i++ {
				top = math.Max(top, logLik(math.Pow(math.Sin(math.Pi/2*float64(i)/20000), 2)))
			}
			lik := func(theta float64) float64 {
				s := math.Sin(theta)
				return math.Exp(logLik(s*s) - top)
			}
			const n = 3000
			norm := quad.Fixed(lik, 0, math.Pi/2, n, quad.Legendre{}, 0)
			mean := quad.Fixed(func(th float64) float64 { s := math.Sin(th); return s * s * lik(th) }, 0, math.Pi/2, n, quad.Legendre{}, 0) / norm
			sd := math.Sqrt(quad.Fixed(func(th float64) float64 {
				s := math.Sin(th)
				return (s*s - mean) * (s*s - mean) * lik(th)
			}, 0, math.Pi/2, n, quad.Legendre{}, 0) / norm)
			if math.Abs(post.Mean()-mean) > 1e-3*sd {
				t.Errorf("mean %.8g, quadrature %.8g (sd %.3g)", post.Mean(), mean, sd)
			}
			for _, p := range []float64{0.025, 0.1, 0.5, 0.9, 0.975} {
				x := post.Quantile(p)
				cdf := quad.Fixed(lik, 0, math.Asin(math.Sqrt(x)), n, quad.Legendre{}, 0) / norm
				if math.Abs(cdf-p) > 5e-4 {
					t.Errorf("quadrature CDF at the %.3f-quantile %.6g is %.6f", p, x, cdf)
				}
			}
		})
	}
}

func TestOraclePosteriorRejectsBadData(t *testing.T) {
	d := &estimator.FitData{Window: 3600, Pending: []estimator.PendingBin{{Age: 60, Clicks: 1, Converted: 2}}}
	if _, err := OraclePosterior(d, Exponential{Mean: 60}); err == nil || !strings.Contains(err.Error(), "pending bin 0") {
		t.Fatalf("error %v", err)
	}
}

// TestDelayOracleWeights: the policy's weights are the probabilities of
// being best under its posteriors, found by name whatever the order of the
// arms; an arm it has no posterior for is an error.
func TestDelayOracleWeights(t *testing.T) {
	c, err := compile(mustParse(t, slowBest))
	if err != nil {
		t.Fatal(err)
	}
	o := newDelayOracle(c)
	if _, err := o.Weights([]estimator.ArmInput{{Arm: "heirloom-tomato"}}, rand.New(rand.NewPCG(1, 2))); err == nil {
		t.Fatal("weights before any update")
	}
	layout := estimator.Layout{Window: c.sc.Window.D()}
	states := []*estimator.ArmState{estimator.NewArmState(layout), estimator.NewArmState(layout)}
	states[0].AddClicks(Start, 1000)
	states[1].AddClicks(Start, 1000)
	for i := range 80 {
		states[0].AddConversion(Start, Start+int64(i)*60000)
	}
	for i := range 20 {
		states[1].AddConversion(Start, Start+int64(i)*60000)
	}
	for _, s := range states {
		s.Advance(Start + 8*24*3600*1000) // every click matured: Beta posteriors
	}
	if err := o.update(states); err != nil {
		t.Fatal(err)
	}
	w, err := o.Weights([]estimator.ArmInput{{Arm: "quick-radish"}, {Arm: "heirloom-tomato"}}, rand.New(rand.NewPCG(1, 2)))
	if err != nil {
		t.Fatal(err)
	}
	// Beta(80.5, 920.5) against Beta(20.5, 980.5): the first is best with
	// probability 1 to many decimals.
	if w[0] != 0 || w[1] != 1 {
		t.Fatalf("weights %v, want [0 1]", w)
	}
	if _, err := o.Weights([]estimator.ArmInput{{Arm: "parsnip"}}, rand.New(rand.NewPCG(1, 2))); err == nil {
		t.Fatal("unknown arm accepted")
	}
}

// TestDelayOracleRuns: the oracle runs through the simulator like any
// policy and, knowing the delays, loses fewer conversions than Thompson on
// observed counts on the slow-best scenario (paired runs, > 2 SE).
func TestDelayOracleRuns(t *testing.T) {
	sc := mustParse(t, slowBest)
	res, err := Run(context.Background(), sc, Options{Policies: []string{estimator.PolicyThompsonObserved, PolicyDelayOracle}})
	if err != nil {
		t.Fatal(err)
	}
	obs, orc := res.Policy(estimator.PolicyThompsonObserved), res.Policy(PolicyDelayOracle)
	d, se, err := PairedDifference(obs.FinalRegret, orc.FinalRegret)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("oracle regret %.1f ± %.1f, observed %.1f ± %.1f, paired difference %.1f ± %.1f", orc.RegretMean, orc.RegretSE, obs.RegretMean, obs.RegretSE, d, se)
	if !(d > 2*se && d > 0) {
		t.Errorf("oracle not better than thompson-observed beyond 2 paired SE: %.2f ± %.2f", d, se)
	}
	if _, err := Run(context.Background(), sc, Options{Policies: []string{"greedy"}}); err == nil || !strings.Contains(err.Error(), PolicyDelayOracle) {
		t.Errorf("unknown policy error %v does not list %s", err, PolicyDelayOracle)
	}
}
