package sim

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"gonum.org/v1/gonum/stat/distuv"
)

// TestRatioOfMeansStandardError: over many simulated sets of 30 correlated
// pairs, the spread of the ratio of means matches the delta-method
// standard error (Cochran 1977, "Sampling Techniques", chapter 6; recalled
// from memory) within 10%, and an exact proportion has no error.
func TestRatioOfMeansStandardError(t *testing.T) {
	r, se, err := RatioOfMeans([]float64{2, 4, 6}, []float64{1, 2, 3})
	if err != nil || r != 2 || se != 0 {
		t.Fatalf("exact proportion: ratio %v, se %v, err %v", r, se, err)
	}
	if r, _, _ := RatioOfMeans([]float64{1, 2}, []float64{0, 0}); !math.IsNaN(r) {
		t.Fatalf("zero reference: ratio %v", r)
	}
	if _, _, err := RatioOfMeans([]float64{1}, nil); err == nil {
		t.Fatal("unequal lengths accepted")
	}
	rng := rand.New(rand.NewPCG(7, 8))
	const sets, n = 4000, 30
	var ratios []float64
	var seSum float64
	x, y := make([]float64, n), make([]float64, n)
	for range sets {
		for i := range n {
			// y ~ N(40, 8^2), x = 1.5 y + N(0, 6^2): correlated pairs.
			y[i] = 40 + 8*rng.NormFloat64()
			x[i] = 1.5*y[i] + 6*rng.NormFloat64()
		}
		r, se, err := RatioOfMeans(x, y)
		if err != nil {
			t.Fatal(err)
		}
		ratios = append(ratios, r)
		seSum += se
	}
	_, seOfMean := MeanSE(ratios)
	spread := seOfMean * math.Sqrt(sets)
	meanSE := seSum / sets
	t.Logf("mean delta-method SE %.5f, spread of the ratio %.5f", meanSE, spread)
	if math.Abs(meanSE/spread-1) > 0.1 {
		t.Fatalf("mean delta-method SE %.5f, spread of the ratio %.5f", meanSE, spread)
	}
}

// TestClopperPearsonUpper checks the bound against its definition, an upper
// bound p at which P(X <= k | n, p) = 1 - level (binomial CDF from gonum),
// the closed form 1 - (1-level)^(1/n) at k = 0, and the textbook exact 95%
// interval of 3 successes in 10 trials, (0.0667, 0.6525) (recalled from
// memory).
func TestClopperPearsonUpper(t *testing.T) {
	for _, tc := range []struct{ k, n int }{{0, 60}, {3, 60}, {1, 10}, {12, 250}} {
		u := ClopperPearsonUpper(tc.k, tc.n, 0.95)
		if got := (distuv.Binomial{N: float64(tc.n), P: u}).CDF(float64(tc.k)); math.Abs(got-0.05) > 1e-9 {
			t.Errorf("k=%d n=%d: bound %.6f has P(X<=k) = %.9f, want 0.05", tc.k, tc.n, u, got)
		}
	}
	if got, want := ClopperPearsonUpper(0, 60, 0.95), 1-math.Pow(0.05, 1.0/60); math.Abs(got-want) > 1e-12 {
		t.Errorf("0 of 60: %v, want %v", got, want)
	}
	if got := ClopperPearsonUpper(3, 10, 0.975); math.Abs(got-0.6525) > 5e-5 {
		t.Errorf("3 of 10, two-sided 95%% upper: %.5f, want 0.6525", got)
	}
	if ClopperPearsonUpper(5, 5, 0.95) != 1 || !math.IsNaN(ClopperPearsonUpper(6, 5, 0.95)) || !math.IsNaN(ClopperPearsonUpper(0, 0, 0.95)) {
		t.Error("edge cases")
	}
}

// TestAggregateSettleRecords: settles within the stated loss of the best
// count as right, flips back from settled are counted per run and in all.
func TestAggregateSettleRecords(t *testing.T) {
	if !withinLoss([]float64{0.050, 0.0496}, 1, 0.01) || withinLoss([]float64{0.050, 0.0494}, 1, 0.01) || !withinLoss([]float64{0.05, 0.04}, 0, 0.01) {
		t.Fatal("withinLoss")
	}
	run := func(settleAt int, right bool, flips int) runOutput {
		return runOutput{
			regret: []float64{0, 1}, weights: [][]float64{{0.5, 0.5}, {0.5, 0.5}}, clicks: 10, bestClicks: 5,
			settleAt: settleAt, settleRight: right, flips: flips,
			observed: [][]float64{{0, 0}, {0, 0}}, eventual: [][]float64{{0, 0}, {0, 0}}, pooled: [][]float64{{0, 0}, {0, 0}},
		}
	}
	pr := aggregate("p", []runOutput{run(-1, false, 0), run(0, true, 2), run(1, false, 1), run(1, true, 0)}, 2, 2, []float64{6, 12})
	if pr.SettledRuns != 3 || pr.SettledWrong != 1 || pr.FlipRuns != 2 || pr.Flips != 3 || math.Abs(pr.SettledCorrect-2.0/3) > 1e-15 || pr.SettleHoursMedian != 12 {
		t.Fatalf("settled %d wrong %d flip runs %d flips %d correct %v median %v", pr.SettledRuns, pr.SettledWrong, pr.FlipRuns, pr.Flips, pr.SettledCorrect, pr.SettleHoursMedian)
	}
	res := &Result{Runs: 4, Policies: []PolicyResult{pr, {Policy: "q", SettledRuns: 2}}}
	pooled := PoolSettles([]*Result{res, res})
	if len(pooled) != 2 || pooled[0].Settled != 6 || pooled[0].Wrong != 2 || pooled[0].Runs != 8 || pooled[0].Scenarios != 2 || pooled[0].WrongShare != 2.0/6 {
		t.Fatalf("pooled %+v", pooled)
	}
	if pooled[1].Wrong != 0 || pooled[1].WrongUpper95 != ClopperPearsonUpper(0, 4, 0.95) {
		t.Fatalf("pooled %+v", pooled[1])
	}
}

// TestErrorAt picks the update nearest the time asked for and gives NaN
// past the horizon.
func TestErrorAt(t *testing.T) {
	res := &Result{Hours: []float64{10, 20, 30, 40}, Scenario: Scenario{UpdateInterval: Duration(10 * time.Hour)}}
	p := &PolicyResult{ObservedError: []float64{0.1, 0.2, 0.3, 0.4}, EventualError: []float64{1, 2, 3, 4}}
	if at, o, e := res.ErrorAt(p, 24); at != 20 || o != 0.2 || e != 2 {
		t.Fatalf("24h: %v %v %v", at, o, e)
	}
	if at, o, _ := res.ErrorAt(p, 44); at != 40 || o != 0.4 {
		t.Fatalf("44h: %v %v", at, o)
	}
	if at, _, _ := res.ErrorAt(p, 48); !math.IsNaN(at) {
		t.Fatalf("48h past a 40h horizon: %v", at)
	}
}
