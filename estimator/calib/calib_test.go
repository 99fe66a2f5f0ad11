package calib

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"reflect"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/stat/distuv"

	"ripen/estimator"
	"ripen/estimator/sim"
)

// oraclePosterior is the exact posterior given the true delay
// (sim.OraclePosterior, Jeffreys prior), with its mean as the point.
func oraclePosterior(d *estimator.FitData, _ estimator.DelayFamily, truth sim.Distribution) (float64, estimator.Posterior, error) {
	p, err := sim.OraclePosterior(d, truth)
	if err != nil {
		return 0, nil, err
	}
	return p.Mean(), p, nil
}

// jeffreysDraw draws q from the Jeffreys prior Beta(1/2, 1/2) and uses the
// given delay.
func jeffreysDraw(delay sim.Distribution) drawFunc {
	return func(r *rand.Rand) (float64, sim.Distribution, error) {
		return distuv.Beta{Alpha: 0.5, Beta: 0.5, Src: r}.Rand(), delay, nil
	}
}

func testOptions() Options {
	return Options{Window: 3 * 24 * time.Hour, Step: 10 * time.Minute, Workers: 2}.WithDefaults()
}

// run simulates one plan and returns its samples.
func runOne(t *testing.T, p cellPlan, o Options) []sample {
	t.Helper()
	s, err := runPlans(context.Background(), []cellPlan{p}, o)
	if err != nil {
		t.Fatal(err)
	}
	return s[0]
}

// TestCoverageMachineryOracle checks the coverage machinery where the
// answer is known. With the true delay known, the oracle posterior is the
// exact posterior under the Jeffreys prior; when the truth is drawn from
// that prior, the equal-tailed intervals of level l hold it with
// probability exactly l (coverage of a Bayesian credible interval averaged
// over its prior; Gelman et al. 2013, "Bayesian Data Analysis", 3rd ed.,
// section 1.3, recalled from memory). With immediate conversions the
// posterior is the conjugate Beta(C+1/2, N-C+1/2). With q drawn from
// [0.02, 0.08] instead, coverage is close to nominal (Jeffreys intervals:
// Brown, Cai & DasGupta 2001, Statistical Science 16:101-133, figure 5).
// Each share must lie within 3.5 binomial standard errors of its level.
func TestCoverageMachineryOracle(t *testing.T) {
	o := testOptions()
	w := o.Window.Seconds()
	reps := 1000
	if testing.Short() {
		reps = 500
	}
	for _, tc := range []struct {
		name  string
		draw  drawFunc
		asOf  float64
		slack float64
	}{
		{"jeffreys truth, immediate conversions", jeffreysDraw(sim.Constant{Delay: 0}), 0.25 * w, 0},
		{"jeffreys truth, exponential delays, young", jeffreysDraw(sim.Exponential{Mean: 20 * 3600}), 0.3 * w, 0},
		{"q in [0.02, 0.08], weibull delays, two windows", coverageDraw(TruthWeibull, 0.02, 0.08, w), 2 * w, 0.01},
	} {
		t.Run(tc.name, func(t *testing.T) {
			p := cellPlan{key: tc.name, fit: estimator.FamilyExponential, asOf: tc.asOf, clicksPerHour: 40, replicates: reps, draw: tc.draw, posterior: oraclePosterior}
			c := summariseCoverage(runOne(t, p, o))
			if c.Failed != 0 {
				t.Fatalf("%d failed replicates", c.Failed)
			}
			for i, l := range Levels {
				se := math.Sqrt(l * (1 - l) / float64(c.Replicates))
				t.Logf("level %.2f: coverage %.3f (SE %.3f)", l, c.Coverage[i], se)
				if math.Abs(c.Coverage[i]-l) > 3.5*se+tc.slack {
					t.Errorf("level %.2f: coverage %.3f, more than 3.5 SE (%.3f) from nominal", l, c.Coverage[i], se)
				}
			}
		})
	}
}

// TestSBCRanksUniformForExactPosterior: with the truth drawn from the
// Jeffreys prior and the exact posterior (conjugate Beta-binomial when
// conversions are immediate; the oracle grid posterior with delays), the
// rank of the truth among L posterior quantiles is uniform on 0..L (Talts
// et al. 2018, arXiv:1804.06788, theorem 1), so the chi-square test of the
// rank histogram does not reject; a posterior twice too confident (Beta
// with doubled counts) is rejected with a tiny p-value.
func TestSBCRanksUniformForExactPosterior(t *testing.T) {
	o := testOptions()
	w := o.Window.Seconds()
	reps := 600
	if testing.Short() {
		reps = 300
	}
	overconfident := func(d *estimator.FitData, _ estimator.DelayFamily, _ sim.Distribution) (float64, estimator.Posterior, error) {
		c, n := d.TotalConversions(), d.TotalClicks()
		b := estimator.BetaPosterior{Alpha: 2*c + 0.5, Beta: 2*(n-c) + 0.5}
		return b.Mean(), b, nil
	}
	for _, tc := range []struct {
		name      string
		delay     sim.Distribution
		posterior posteriorFunc
		uniform   bool
	}{
		{"conjugate", sim.Constant{Delay: 0}, oraclePosterior, true},
		{"oracle with lognormal delays", sim.Lognormal{Median: 10 * 3600, Sigma: 1}, oraclePosterior, true},
		{"overconfident", sim.Constant{Delay: 0}, overconfident, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			p := cellPlan{key: tc.name, asOf: 0.5 * w, clicksPerHour: 20, replicates: reps, draw: jeffreysDraw(tc.delay), posterior: tc.posterior}
			c := summariseSBC(runOne(t, p, o), o.SBCDraws)
			t.Logf("histogram %v, chi-square %.1f, p %.3g", c.Histogram, c.ChiSquare, c.PValue)
			if c.Failed != 0 || c.Replicates != reps {
				t.Fatalf("%d failed of %d", c.Failed, reps)
			}
			if tc.uniform && c.PValue < 1e-3 {
				t.Errorf("ranks of an exact posterior rejected as non-uniform: p = %.3g", c.PValue)
			}
			if !tc.uniform && c.PValue > 1e-6 {
				t.Errorf("an overconfident posterior passes: p = %.3g", c.PValue)
			}
		})
	}
}

// TestChiSquareUniform checks the statistic and p-value on a worked case:
// counts (8, 12, 10, 10) against 10 each give chi-square 0.8 on 3 degrees
// of freedom, upper tail 0.8495 (the chi-square survival function at 0.8
// with 3 degrees of freedom, from gonum's distuv.ChiSquared; textbook
// tables put the 0.85 quantile near 0.8, recalled from memory).
func TestChiSquareUniform(t *testing.T) {
	stat, p := chiSquareUniform([]int{8, 12, 10, 10})
	if math.Abs(stat-0.8) > 1e-12 || math.Abs(p-0.8495) > 5e-4 {
		t.Fatalf("chi-square %v, p %v", stat, p)
	}
	if s, p := chiSquareUniform([]int{0, 0}); !math.IsNaN(s) || !math.IsNaN(p) {
		t.Fatal("empty histogram")
	}
}

// TestSimulateArmCounts checks the data generator against the expected
// counts of its process. Batches of Poisson(c s) clicks arrive every s
// hours until the as-of T; a click converts with probability q, and by T
// with probability q G(T - t) (G the delay CDF within the window), so the
// expected conversions seen are q c s sum_k G(T - k s), the Riemann sum of
// the textbook q c ∫_0^T G(T - t) dt for a Poisson process thinned by the
// delay (Ross 2014, "Introduction to Probability Models", 11th ed.,
// section 5.3.5; recalled from memory); matured clicks are those of batches
// at least a window old.
func TestSimulateArmCounts(t *testing.T) {
	w := 3 * 24 * 3600.0
	layout := estimator.Layout{Window: time.Duration(w) * time.Second}
	delay, err := sim.NewTruncated(sim.Weibull{Shape: 0.8, Scale: 30 * 3600}, w)
	if err != nil {
		t.Fatal(err)
	}
	const reps, rate, q = 200, 50.0, 0.06
	asOf := 1.5 * w
	step := 600.0
	r := rand.New(rand.NewPCG(3, 4))
	var clicks, conv, matured []float64
	for range reps {
		st := simulateArm(r, q, delay, rate, asOf, step, layout)
		mc, _ := st.Matured()
		clicks = append(clicks, float64(st.Clicks()))
		conv = append(conv, float64(st.Conversions()))
		matured = append(matured, float64(mc))
	}
	// Clicks come in batches at 0, step, 2 step, ...: the expectations sum
	// over batches (the integral's Riemann sum at the batch times).
	batches := math.Ceil(asOf / step)
	perBatch := rate * step / 3600
	wantClicks := perBatch * batches
	var g float64
	for k := 0.0; k < batches; k++ {
		g += delay.CDF(asOf - k*step)
	}
	wantConv := perBatch * q * g
	wantMatured := perBatch * math.Floor((asOf-w)/step) // batches at least a window old, up to bucket rounding
	for _, c := range []struct {
		name string
		x    []float64
		want float64
		tol  float64 // relative slack beyond 4 SE
	}{
		{"clicks", clicks, wantClicks, 0},
		{"conversions", conv, wantConv, 0},
		{"matured clicks", matured, wantMatured, 0.03},
	} {
		m, se := sim.MeanSE(c.x)
		if math.Abs(m-c.want) > 4*se+c.tol*c.want {
			t.Errorf("%s: mean %.1f ± %.1f, want %.1f", c.name, m, se, c.want)
		}
	}
}

// TestRunDeterministic: the result does not depend on the number of
// workers, and a cell gives the same numbers alone or in a larger grid.
func TestRunDeterministic(t *testing.T) {
	o := Options{
		Window: 24 * time.Hour, Maturities: []float64{0.5, 1}, Truths: []TruthFamily{TruthExponential, TruthMixture},
		ClicksPerHour: []float64{20}, Fits: []estimator.DelayFamily{estimator.FamilyExponential}, Replicates: 6,
		SBCReplicates: 100, SBCClicksPerHour: []float64{5}, Step: time.Hour,
	}
	o.Workers = 1
	a, err := Run(context.Background(), o)
	if err != nil {
		t.Fatal(err)
	}
	o.Workers = 3
	b, err := Run(context.Background(), o)
	if err != nil {
		t.Fatal(err)
	}
	a.Options.Workers, b.Options.Workers = 0, 0
	if !reflect.DeepEqual(a, b) {
		t.Fatal("results differ with the number of workers")
	}
	if len(a.Cells) != 4 || len(a.Pooled) != 2 || len(a.SBC) != 2 || a.Pooled[1].Replicates+a.Pooled[1].Failed != 12 || a.SBC[0].Replicates+a.SBC[0].Failed != 100 {
		t.Fatalf("%d cells, %d pooled, %d SBC", len(a.Cells), len(a.Pooled), len(a.SBC))
	}
	o.Maturities, o.Truths, o.SkipSBC = []float64{1}, []TruthFamily{TruthMixture}, true
	one, err := Run(context.Background(), o)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(one.Cells[0], a.Cells[3]) || one.SBC != nil {
		t.Fatalf("cell alone %+v, in the grid %+v", one.Cells[0], a.Cells[3])
	}
}

func TestOptionsValidate(t *testing.T) {
	for _, tc := range []struct {
		o    Options
		want string
	}{
		{Options{Maturities: []float64{-1}}, "maturity -1"},
		{Options{Truths: []TruthFamily{"gamma"}}, `unknown truth family "gamma"`},
		{Options{ClicksPerHour: []float64{1e6}}, "clicks per replicate"},
		{Options{SBCReplicates: 50}, "SBC replicates 50"},
		{Options{SBCDraws: 50}, "SBC draws 50"},
		{Options{QMin: 0.5, QMax: 0.2}, "q range"},
		{Options{Step: time.Millisecond}, "step"},
		{Options{Fits: []estimator.DelayFamily{9}}, "fit family"},
	} {
		t.Run(tc.want, func(t *testing.T) {
			if err := tc.o.Validate(); err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("error %v, want %q", err, tc.want)
			}
		})
	}
	if err := (Options{}).Validate(); err != nil {
		t.Fatalf("defaults: %v", err)
	}
}

// TestPriorDraw: the SBC truths follow the estimator's prior
// (estimator.Prior defaults): draws stay within the truncation bounds; the
// means of q, of the log scale and of the log shape match the Jeffreys
// Beta(1/2, 1/2) mean 1/2 and the mean of a truncated normal,
// mu + sd (phi(a) - phi(b)) / (Phi(b) - Phi(a)) with a, b the standardised
// bounds (Johnson, Kotz & Balakrishnan 1994, "Continuous Univariate
// Distributions", vol. 1, 2nd ed., section 10.1; recalled from memory;
// phi and Phi from gonum's distuv.UnitNormal), within 4 standard errors;
// auto draws each of its three parametric families a third of the time.
func TestPriorDraw(t *testing.T) {
	w := 7 * 24 * 3600.0
	p := estimator.Prior{}.WithDefaults()
	truncMean := func(mu, sd, lo, hi float64) float64 {
		a, b := (lo-mu)/sd, (hi-mu)/sd
		n := distuv.UnitNormal
		return mu + sd*(n.Prob(a)-n.Prob(b))/(n.CDF(b)-n.CDF(a))
	}
	inside := func(x, lo, hi float64) bool { return x >= lo*(1-1e-12) && x <= hi*(1+1e-12) }
	r := rand.New(rand.NewPCG(5, 6))
	var qs, logScales, logShapes, logSigmas []float64
	weibulls := map[estimator.DelayFamily]int{}
	lognormals := map[estimator.DelayFamily]int{}
	const n = 4000
	for _, fam := range DefaultFits {
		for range n {
			q, d := priorDraw(r, fam, w)
			qs = append(qs, q)
			switch d := d.(type) {
			case sim.Exponential:
				if !inside(d.Mean/w, p.ScaleMin, p.ScaleMax) || fam == estimator.FamilyWeibull || fam == estimator.FamilyHistogram {
					t.Fatalf("%v: exponential mean %v", fam, d.Mean)
				}
				logScales = append(logScales, math.Log(d.Mean/w))
			case sim.Weibull:
				if !inside(d.Shape, p.ShapeMin, p.ShapeMax) || !inside(d.Scale/w, p.ScaleMin, p.ScaleMax) || fam == estimator.FamilyExponential {
					t.Fatalf("%v: weibull %+v", fam, d)
				}
				logScales = append(logScales, math.Log(d.Scale/w))
				logShapes = append(logShapes, math.Log(d.Shape))
				weibulls[fam]++
			case sim.Lognormal:
				if !inside(d.Sigma, p.SigmaMin, p.SigmaMax) || !inside(d.Median/w, p.ScaleMin, p.ScaleMax) || fam != estimator.FamilyAuto {
					t.Fatalf("%v: lognormal %+v", fam, d)
				}
				logScales = append(logScales, math.Log(d.Median/w))
				logSigmas = append(logSigmas, math.Log(d.Sigma))
				lognormals[fam]++
			default:
				t.Fatalf("%v: delay %T", fam, d)
			}
		}
	}
	for _, c := range []struct {
		name string
		x    []float64
		want float64
	}{
		{"q", qs, 0.5},
		{"log scale", logScales, truncMean(math.Log(p.ScaleMedian), p.ScaleSpread, math.Log(p.ScaleMin), math.Log(p.ScaleMax))},
		{"log shape", logShapes, truncMean(0, p.ShapeSpread, math.Log(p.ShapeMin), math.Log(p.ShapeMax))},
		{"log sigma", logSigmas, truncMean(0, p.SigmaSpread, math.Log(p.SigmaMin), math.Log(p.SigmaMax))},
	} {
		if m, se := sim.MeanSE(c.x); math.Abs(m-c.want) > 4*se {
			t.Errorf("mean of %s %v ± %v, want %v", c.name, m, se, c.want)
		}
	}
	for name, got := range map[string]int{"Weibull": weibulls[estimator.FamilyAuto], "lognormal": lognormals[estimator.FamilyAuto]} {
		if share := float64(got) / n; math.Abs(share-1.0/3) > 4*math.Sqrt(2.0/9/n) {
			t.Errorf("auto draws the %s in %.3f of draws, want 1/3", name, share)
		}
	}
}

// ExampleRun is kept small: one cell of each kind.
func ExampleRun() {
	res, err := Run(context.Background(), Options{
		Window: 24 * time.Hour, Maturities: []float64{1}, Truths: []TruthFamily{TruthExponential}, ClicksPerHour: []float64{30},
		Fits: []estimator.DelayFamily{estimator.FamilyExponential}, Replicates: 20, SBCReplicates: 100, Step: time.Hour,
	})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println(len(res.Cells), len(res.Pooled), len(res.SBC), res.Cells[0].Replicates+res.Cells[0].Failed)
	// Output: 1 1 1 20
}

// TestEstimatorCoverage is the calibration gate of the posterior under test
// (armPosterior, the service's posterior of q): in a small grid of maturity
// (a quarter window, one and three windows of the default 7-day window)
// and truth delay family (exponential, Weibull) at 300 clicks per hour,
// with the service's default family auto fitted (whose model contains both
// truths), the 95% equal-tailed interval must hold the true eventual rate
// in 90% to 99% of 200 replicates per cell (150 under -short). With a
// calibrated posterior each share is binomial with mean 0.95 and standard
// error 0.015 (0.018), so the band is [-3.3, +2.7] (-2.8, +2.2) standard
// errors wide; the rule "coverage within [0.90, 0.99] in every cell" is
// the project's acceptance threshold, not a published one. Misspecified
// cells (a single family fitted to another family's delays) and the full
// grid are for `ripen calibrate`, which costs too much for every CI run.
func TestEstimatorCoverage(t *testing.T) {
	reps := 200
	if testing.Short() {
		reps = 150
	}
	res, err := Run(context.Background(), Options{
		Maturities:    []float64{0.25, 1, 3},
		Truths:        []TruthFamily{TruthExponential, TruthWeibull},
		ClicksPerHour: []float64{300},
		Fits:          []estimator.DelayFamily{estimator.FamilyAuto},
		Replicates:    reps,
		Step:          15 * time.Minute,
		SkipSBC:       true,
	})
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range res.Cells {
		cov := c.Coverage[len(Levels)-1]
		t.Logf("fit %s, truth %s, %g windows: coverage 50/80/95%% %.3f/%.3f/%.3f (below %.3f, above %.3f), failed %d, MAE observed %.4f eventual %.4f",
			c.Fit, c.Truth, c.Maturity, c.Coverage[0], c.Coverage[1], cov, c.Below95, c.Above95, c.Failed, c.ObservedMAE, c.EventualMAE)
		if c.Failed > 0 || !(cov >= 0.90 && cov <= 0.99) {
			t.Errorf("fit %s, truth %s, %g windows: 95%% coverage %.3f outside [0.90, 0.99] (%d failed)", c.Fit, c.Truth, c.Maturity, cov, c.Failed)
		}
	}
}
