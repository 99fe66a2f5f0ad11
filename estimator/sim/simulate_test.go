package sim

import (
	"context"
	"math"
	"reflect"
	"strings"
	"testing"

	"ripen/estimator"
)

func mustParse(t *testing.T, doc string) Scenario {
	t.Helper()
	sc, err := ParseScenario(strings.NewReader(doc))
	if err != nil {
		t.Fatal(err)
	}
	return *sc
}

// slowBest is a delayed scenario in which the better arm converts slowly:
// while its buyers are still on their way, its observed CVR is lower than
// the quick arm's.
const slowBest = `
name: loam-garden-seed-packs
horizon: 3d
clicks_per_hour: 120
update_interval: 12h
window: 7d
arms:
  - name: heirloom-tomato
    cvr: 0.06
    delay: {exponential: {mean: 36h}}
  - name: quick-radish
    cvr: 0.045
    delay: {exponential: {mean: 1h}}
runs: 6
seed: 21
`

// TestDelayAwarePoliciesBeatObserved: on a delayed scenario the
// delay-aware Thompson variants lose fewer conversions than Thompson on
// observed counts. The comparison is paired: run r of every policy sees the
// same clicks and potential outcomes, so the standard error is that of the
// per-run differences (mean difference > 2 standard errors).
func TestDelayAwarePoliciesBeatObserved(t *testing.T) {
	sc := mustParse(t, slowBest)
	res, err := Run(context.Background(), sc, Options{Policies: []string{
		estimator.PolicyThompsonObserved, estimator.PolicyThompsonDelay, estimator.PolicyThompsonBayes}})
	if err != nil {
		t.Fatal(err)
	}
	obs := res.Policy(estimator.PolicyThompsonObserved)
	for _, name := range []string{estimator.PolicyThompsonDelay, estimator.PolicyThompsonBayes} {
		p := res.Policy(name)
		d, se, err := PairedDifference(obs.FinalRegret, p.FinalRegret)
		if err != nil {
			t.Fatal(err)
		}
		t.Logf("%s: regret %.1f ± %.1f vs observed %.1f ± %.1f; paired difference %.1f ± %.1f; best-arm share %.2f vs %.2f",
			name, p.RegretMean, p.RegretSE, obs.RegretMean, obs.RegretSE, d, se, p.BestArmShare, obs.BestArmShare)
		if !(d > 2*se && d > 0) {
			t.Errorf("%s: regret not lower than thompson-observed beyond 2 paired SE: difference %.2f, SE %.2f", name, d, se)
		}
		if !(p.BestArmShare > obs.BestArmShare) {
			t.Errorf("%s: best-arm share %.3f not above thompson-observed's %.3f", name, p.BestArmShare, obs.BestArmShare)
		}
	}
	// The delay-corrected estimate is closer to the truth than the observed
	// rate once conversions lag.
	b := res.Policy(estimator.PolicyThompsonBayes)
	if !(b.EventualMAE < b.ObservedMAE) {
		t.Errorf("eventual CVR error %.4f not below observed %.4f", b.EventualMAE, b.ObservedMAE)
	}
}

// TestZeroDelayThompsonVariantsAgree: with immediate conversions the
// observed, delay-corrected and likelihood posteriors coincide (ripe clicks
// equal clicks), so the three Thompson variants lose the same conversions
// within noise: every paired difference is within 2 paired standard errors
// or 5% of the regret.
func TestZeroDelayThompsonVariantsAgree(t *testing.T) {
	sc := mustParse(t, strings.NewReplacer("{exponential: {mean: 36h}}", "{constant: {delay: 0s}}",
		"{exponential: {mean: 1h}}", "{constant: {delay: 0s}}").Replace(slowBest))
	names := []string{estimator.PolicyThompsonObserved, estimator.PolicyThompsonDelay, estimator.PolicyThompsonBayes}
	res, err := Run(context.Background(), sc, Options{Policies: names})
	if err != nil {
		t.Fatal(err)
	}
	for i := range names {
		for j := i + 1; j < len(names); j++ {
			a, b := res.Policy(names[i]), res.Policy(names[j])
			d, se, err := PairedDifference(a.FinalRegret, b.FinalRegret)
			if err != nil {
				t.Fatal(err)
			}
			t.Logf("%s %.1f vs %s %.1f: paired difference %.2f ± %.2f", a.Policy, a.RegretMean, b.Policy, b.RegretMean, d, se)
			if math.Abs(d) > math.Max(2*se, 0.05*a.RegretMean) {
				t.Errorf("%s and %s differ by %.2f (paired SE %.2f, regret %.1f)", a.Policy, b.Policy, d, se, a.RegretMean)
			}
		}
	}
	// With no delay the observed CVR is unbiased: its error is of the same
	// order as the eventual estimate's.
	o := res.Policy(estimator.PolicyThompsonObserved)
	if r := o.ObservedMAE / o.EventualMAE; r < 0.5 || r > 2 {
		t.Errorf("observed/eventual error ratio %.2f with zero delay", r)
	}
}

// TestRunDeterministic: the result depends on the seed, not on the number
// of goroutines.
func TestRunDeterministic(t *testing.T) {
	sc := mustParse(t, `
name: determinism
horizon: 1d
clicks_per_hour: 60
update_interval: 12h
window: 2d
arms:
  - {name: a, cvr: 0.1, delay: {weibull: {shape: 1.2, scale: 2h}}}
  - {name: b, cvr: 0.08, delay: {mixture: [{weight: 1, constant: {delay: 1h}}, {weight: 1, lognormal: {median: 3h, sigma: 0.5}}]}}
change_points: [{at: 18h, arm: b, cvr: 0.2}]
runs: 3
`)
	o := Options{Policies: []string{estimator.PolicyTopTwo, estimator.PolicyUniform}}
	a, err := Run(context.Background(), sc, o)
	if err != nil {
		t.Fatal(err)
	}
	o.Workers = 1
	b, err := Run(context.Background(), sc, o)
	if err != nil {
		t.Fatal(err)
	}
	ignoreNaN := func(r *Result) {
		for i := range r.Policies {
			r.Policies[i].Trace = RunTrace{}
		}
	}
	ignoreNaN(a)
	ignoreNaN(b)
	if !reflect.DeepEqual(a.Policies[0].FinalRegret, b.Policies[0].FinalRegret) ||
		!reflect.DeepEqual(a.Policies[1].Weights, b.Policies[1].Weights) ||
		!reflect.DeepEqual(a.Policies[0].EventualCVR, b.Policies[0].EventualCVR) {
		t.Fatal("results differ between worker counts")
	}
	o.Seed = 12345
	c, err := Run(context.Background(), sc, o)
	if err != nil {
		t.Fatal(err)
	}
	if reflect.DeepEqual(a.Policies[0].FinalRegret, c.Policies[0].FinalRegret) {
		t.Fatal("a different seed gave the same regrets")
	}
	// The change point makes b the best arm from 18h: the update at 24h
	// sees it, and uniform's regret is half the gap per click before and
	// after (about 60*18*0.01 + 60*6*0.06 = 32.4 conversions).
	if a.BestArm[0] != 0 || a.BestArm[1] != 1 {
		t.Errorf("best arm by update %v, want [0 1]", a.BestArm)
	}
	if u := a.Policy(estimator.PolicyUniform); math.Abs(u.RegretMean-32.4) > 4*u.RegretSE+3 {
		t.Errorf("uniform regret %.1f ± %.1f, want about 32.4", u.RegretMean, u.RegretSE)
	}
}
