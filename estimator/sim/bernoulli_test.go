package sim

import (
	"math"
	"testing"
)

// bernoulliKL is the Kullback–Leibler divergence between Bernoulli(a) and
// Bernoulli(b): a ln(a/b) + (1-a) ln((1-a)/(1-b)).
func bernoulliKL(a, b float64) float64 {
	return a*math.Log(a/b) + (1-a)*math.Log((1-a)/(1-b))
}

// TestBernoulliThompsonLaiRobbins checks that per-click Thompson sampling on
// two Bernoulli arms has regret growing like ln T, near the asymptotic
// lower bound of Lai T.L. & Robbins H. (1985), "Asymptotically efficient
// adaptive allocation rules", Adv. Appl. Math. 6:4-22:
//
//	liminf_{T->inf} R_T / ln T >= sum_{i suboptimal} (mu* - mu_i) / KL(mu_i, mu*),
//	KL(a, b) = a ln(a/b) + (1-a) ln((1-a)/(1-b)).
//
// For arms 0.05 (best) and 0.04, KL(0.04, 0.05) = 0.001127 and the constant
// is 0.01/0.001127 = 8.875 conversions lost per unit of ln T (the worked
// example of the shared reference notes). Thompson sampling attains the
// bound asymptotically (Kaufmann E., Korda N., Munos R. (2012), "Thompson
// sampling: an asymptotically optimal finite-time analysis", ALT 2012), but
// at finite horizons its regret sits above it, so the check allows a factor.
func TestBernoulliThompsonLaiRobbins(t *testing.T) {
	const best, other = 0.05, 0.04
	kl := bernoulliKL(other, best)
	if math.Abs(kl-0.001127) > 5e-7 {
		t.Fatalf("KL(0.04, 0.05) = %.7f, want 0.001127", kl)
	}
	lr := (best - other) / kl
	if math.Abs(lr-8.875) > 0.005 {
		t.Fatalf("Lai–Robbins constant %.4f, want 8.875", lr)
	}
	checkpoints := []int{10000, 30000, 100000, 300000}
	runs := 48
	if testing.Short() {
		runs = 24
	}
	res, err := BernoulliThompson(BernoulliOptions{CVR: []float64{best, other}, Checkpoints: checkpoints, Runs: runs, Seed: 7})
	if err != nil {
		t.Fatal(err)
	}
	for c, n := range checkpoints {
		t.Logf("T = %6d: regret %.1f ± %.1f, R/ln T = %.2f (bound %.3f)", n, res.Mean[c], res.SE[c], res.Mean[c]/math.Log(float64(n)), lr)
	}
	last := len(checkpoints) - 1
	T := float64(checkpoints[last])
	// Upper side: within a factor 3 of the bound at the horizon. A policy
	// that plays the worse arm a fixed share s of the time has linear regret
	// 0.01*s*T, 300 at T = 3e5 for s = 10%, about the allowance of 336.
	if r := res.Mean[last] / math.Log(T); r > 3*lr {
		t.Errorf("R_T/ln T = %.2f exceeds 3x the Lai–Robbins constant %.3f", r, lr)
	}
	// Logarithmic growth with the Lai–Robbins rate: R_T = c ln T + o(ln T),
	// so the increment per unit of ln T between the first and the last
	// checkpoint estimates c (the o(ln T) term may make R_T/ln T itself
	// smaller than the constant at finite T, so that ratio is not compared
	// from below). A linear-regret policy would instead add the regret per
	// click at the first checkpoint times every extra click.
	slope := (res.Mean[last] - res.Mean[0]) / math.Log(T/float64(checkpoints[0]))
	linear := res.Mean[0] / float64(checkpoints[0]) * (T - float64(checkpoints[0]))
	t.Logf("slope %.2f per ln T; linear growth would add %.0f, log growth added %.0f", slope, linear, res.Mean[last]-res.Mean[0])
	if !(slope > 0.5*lr && slope < 2*lr) {
		t.Errorf("regret grows by %.2f per unit ln T, want within [0.5, 2] x %.3f", slope, lr)
	}
	if d := res.Mean[last] - res.Mean[0]; d > 0.25*linear {
		t.Errorf("regret grew by %.1f from the first to the last checkpoint, more than a quarter of linear growth %.1f", d, linear)
	}
}

func TestBernoulliThompsonDeterministic(t *testing.T) {
	o := BernoulliOptions{CVR: []float64{0.3, 0.2, 0.1}, Checkpoints: []int{50, 500}, Runs: 5, Seed: 3}
	a, err := BernoulliThompson(o)
	if err != nil {
		t.Fatal(err)
	}
	o.Workers = 1
	b, err := BernoulliThompson(o)
	if err != nil {
		t.Fatal(err)
	}
	for r := range a.Regret {
		for c := range a.Regret[r] {
			if a.Regret[r][c] != b.Regret[r][c] {
				t.Fatalf("run %d checkpoint %d: %v with default workers, %v with one", r, c, a.Regret[r][c], b.Regret[r][c])
			}
		}
	}
	for _, bad := range []BernoulliOptions{
		{CVR: []float64{0.1}, Checkpoints: []int{10}},
		{CVR: []float64{0.1, 1.5}, Checkpoints: []int{10}},
		{CVR: []float64{0.1, 0.2}, Checkpoints: []int{10, 5}},
		{CVR: []float64{0.1, 0.2}},
	} {
		if _, err := BernoulliThompson(bad); err == nil {
			t.Errorf("%+v: no error", bad)
		}
	}
}
