package estimator

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"reflect"
	"testing"
	"time"
)

// experimentStates builds two arms with exponential delays; arm "slow"
// converts more often but later, so young traffic hides its lead.
func experimentStates(seed uint64, asOf int64) []ArmData {
	l := Layout{Window: 7 * 24 * time.Hour}
	r := rand.New(rand.NewPCG(seed, 1))
	arms := []struct {
		name      string
		q, meanH  float64
		clicksDay int
	}{{"fast", 0.04, 3, 400}, {"slow", 0.05, 48, 400}}
	var out []ArmData
	for _, a := range arms {
		s := NewArmState(l)
		s.Advance(asOf)
		for i := 0; i < a.clicksDay*4; i++ {
			c := asOf - r.Int64N(4*24*hourMs)
			s.AddClicks(c, 1)
			if r.Float64() < a.q {
				d := int64(r.ExpFloat64() * a.meanH * float64(hourMs))
				if d <= l.Window.Milliseconds() && c+d <= asOf {
					s.AddConversion(c, c+d)
				}
			}
		}
		out = append(out, ArmData{Arm: a.name, State: s})
	}
	return out
}

func TestEvaluateExperimentDeterministic(t *testing.T) {
	asOf := t0 + 30*24*hourMs
	in := ExperimentInput{Experiment: "north-porch-lamps", AsOf: asOf, Arms: experimentStates(4, asOf),
		Fit: FitOptions{Family: FamilyExponential}, Allocation: DefaultAllocationOptions()}
	a, err := EvaluateExperiment(in)
	if err != nil {
		t.Fatal(err)
	}
	b, err := EvaluateExperiment(in)
	if err != nil {
		t.Fatal(err)
	}
	a.Fits, b.Fits = nil, nil
	if !reflect.DeepEqual(a, b) {
		t.Fatal("same input gave different reports")
	}
	in.Seed = DeriveSeed(in.Experiment, asOf) + 1
	c, err := EvaluateExperiment(in)
	if err != nil {
		t.Fatal(err)
	}
	if c.Arms[0].PBest == a.Arms[0].PBest {
		t.Fatal("a different seed should change the Monte Carlo P(best)")
	}
	if DeriveSeed("x", 1) == DeriveSeed("x", 2) || DeriveSeed("x", 1) == DeriveSeed("y", 1) {
		t.Fatal("derived seeds collide")
	}
}

func TestEvaluateExperimentReport(t *testing.T) {
	asOf := t0 + 30*24*hourMs
	in := ExperimentInput{Experiment: "north-porch-lamps", AsOf: asOf, Arms: experimentStates(9, asOf),
		Fit: FitOptions{Family: FamilyExponential}, Allocation: DefaultAllocationOptions()}
	rep, err := EvaluateExperiment(in)
	if err != nil {
		t.Fatal(err)
	}
	if rep.AsOf != time.UnixMilli(asOf).UTC().Format(time.RFC3339Nano) || len(rep.Arms) != 2 || rep.Status == "" {
		t.Fatalf("report header: %+v", rep)
	}
	sum, pb := 0.0, 0.0
	for i, a := range rep.Arms {
		if a.Clicks != in.Arms[i].State.Clicks() || a.Conversions != in.Arms[i].State.Conversions() {
			t.Fatalf("%s: counts %d/%d differ from the state", a.Arm, a.Clicks, a.Conversions)
		}
		if !(a.CVRLow < a.EventualCVR && a.EventualCVR < a.CVRHigh) || !(a.BetaLow < a.BetaMean && a.BetaMean < a.BetaHigh) {
			t.Fatalf("%s: intervals do not hold their estimates: %+v", a.Arm, a)
		}
		if a.RipeClicks > float64(a.Clicks) || a.RipeClicks < float64(a.Conversions) {
			t.Fatalf("%s: ripe clicks %v outside [conversions, clicks]", a.Arm, a.RipeClicks)
		}
		if a.Delay.Family != "exponential" || a.Delay.MeanHours <= 0 || a.Delay.MedianHours <= 0 {
			t.Fatalf("%s: delay %+v", a.Arm, a.Delay)
		}
		// An exponential's median ln2/rate is below its mean 1/rate; with
		// delays this short next to the window, truncation keeps the order.
		if a.Delay.MedianHours >= a.Delay.MeanHours {
			t.Fatalf("%s: exponential median %v not below mean %v", a.Arm, a.Delay.MedianHours, a.Delay.MeanHours)
		}
		if rep.Weights[a.Arm] != a.Weight {
			t.Fatalf("%s: weights map %v, arm %v", a.Arm, rep.Weights[a.Arm], a.Weight)
		}
		sum += a.Weight
		pb += a.PBest
	}
	if math.Abs(sum-1) > 1e-9 || math.Abs(pb-1) > 1e-9 {
		t.Fatalf("weights sum %v, P(best) sum %v", sum, pb)
	}
	// The slow arm's observed rate understates it far more than the fast
	// arm's: the correction must widen the gap in its favour.
	fast, slow := rep.Arms[0], rep.Arms[1]
	if !(slow.EventualCVR-slow.ObservedCVR > 3*(fast.EventualCVR-fast.ObservedCVR)) {
		t.Fatalf("delay correction: fast %v->%v, slow %v->%v", fast.ObservedCVR, fast.EventualCVR, slow.ObservedCVR, slow.EventualCVR)
	}
	if rep.Leader != "slow" {
		t.Fatalf("leader %q, want the slow arm with the higher eventual rate", rep.Leader)
	}
}

func TestParseDelayFamily(t *testing.T) {
	for _, f := range []DelayFamily{FamilyAuto, FamilyExponential, FamilyWeibull, FamilyHistogram} {
		got, err := ParseDelayFamily(f.String())
		if err != nil || got != f {
			t.Fatalf("ParseDelayFamily(%q) = %v, %v", f.String(), got, err)
		}
	}
	if _, err := ParseDelayFamily("lognormal"); err == nil {
		t.Fatal("unknown family accepted")
	}
}

// TestDelayCDFRoundTrip: the CDF rebuilt from a report's delay (through
// its JSON) equals the fit's own, for every family a report can describe;
// the histogram family, whose hazards a report does not carry, is refused.
func TestDelayCDFRoundTrip(t *testing.T) {
	const w = 7 * daySec
	r := rand.New(rand.NewPCG(7, 7))
	d := stateAt(simulate(r, 20000, 2*w, 0.06, truncExp(1/(1.5*daySec), w)), 2*w, Layout{})
	ip, err := ArmPosterior(d, FamilyAuto, Prior{}, nil)
	if err != nil {
		t.Fatal(err)
	}
	fits := map[DelayFamily]*Fit{}
	for _, f := range ip.Families {
		fits[f.Family] = f.Fit
	}
	hist, err := FitModel(d, FitOptions{Family: FamilyHistogram})
	if err != nil {
		t.Fatal(err)
	}
	fits[FamilyHistogram] = hist
	for _, fam := range []DelayFamily{FamilyExponential, FamilyWeibull, FamilyLognormal, FamilyHistogram} {
		f := fits[fam]
		if f == nil {
			t.Fatalf("no %v fit", fam)
		}
		b, err := json.Marshal(describeDelay(f))
		if err != nil {
			t.Fatal(err)
		}
		var rep Delay
		if err := json.Unmarshal(b, &rep); err != nil {
			t.Fatal(err)
		}
		g, ok := rep.CDF(w)
		if fam == FamilyHistogram {
			if ok {
				t.Errorf("histogram delay rebuilt from a report")
			}
			continue
		}
		if !ok {
			t.Fatalf("%v: no CDF from %s", fam, b)
		}
		for i := 0; i <= 50; i++ {
			a := w * float64(i) / 50
			if diff := math.Abs(g(a) - f.CDF(a)); diff > 1e-12 {
				t.Errorf("%v: G(%.0f s) = %v from the report, %v from the fit", fam, a, g(a), f.CDF(a))
			}
		}
	}
	if _, ok := (Delay{Family: "weibull", Shape: 1.2}).CDF(w); ok {
		t.Errorf("a Weibull without a scale was accepted")
	}
}
