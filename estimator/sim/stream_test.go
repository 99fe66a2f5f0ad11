package sim

import (
	"math"
	"sort"
	"testing"
	"time"

	"gonum.org/v1/gonum/stat/distuv"
)

func dur(d time.Duration) Duration { return Duration(d) }

// ksStatistic is the one-sample Kolmogorov–Smirnov statistic
// D = sup_x |F_n(x) - F(x)| of sorted data x against the CDF f.
func ksStatistic(x []float64, f func(float64) float64) float64 {
	n := float64(len(x))
	var d float64
	for i, v := range x {
		p := f(v)
		d = math.Max(d, math.Max(float64(i+1)/n-p, p-float64(i)/n))
	}
	return d
}

// ksCritical01 is the asymptotic 1% critical value of D for n draws,
// 1.63/sqrt(n): Massey F.J. (1951), "The Kolmogorov-Smirnov test for
// goodness of fit", J. Amer. Statist. Assoc. 46:68-78, Table 1 (n > 35;
// 1.36/sqrt(n) at 5%). The 1% level keeps the chance that one of the five
// arms below fails by accident near 5%.
func ksCritical01(n int) float64 { return 1.63 / math.Sqrt(float64(n)) }

// binomialTwoSided is the exact two-sided p-value (twice the smaller tail)
// of x successes in n trials with probability p, from gonum's
// distuv.Binomial CDF.
func binomialTwoSided(x, n int, p float64) float64 {
	b := distuv.Binomial{N: float64(n), P: p}
	lo := b.CDF(float64(x))
	hi := 1.0
	if x > 0 {
		hi = 1 - b.CDF(float64(x-1))
	}
	return math.Min(1, 2*math.Min(lo, hi))
}

// TestStreamConversions checks that the simulator's clicks convert at each
// arm's eventual CVR and that converters' delays follow the arm's delay
// distribution conditioned on the window, against gonum's distributions:
// an exact binomial test per arm, and a Kolmogorov–Smirnov test for every
// continuous family; the constant delay must be exact.
func TestStreamConversions(t *testing.T) {
	window := 48 * time.Hour
	w := window.Seconds()
	h := 3600.0
	lnMix := distuv.LogNormal{Mu: math.Log(30 * h), Sigma: 0.5}
	expMix := distuv.Exponential{Rate: 1 / (2 * h)}
	lnArm := distuv.LogNormal{Mu: math.Log(20 * h), Sigma: 1}
	weib := distuv.Weibull{K: 1.5, Lambda: 10 * h}
	expo := distuv.Exponential{Rate: 1 / (6 * h)}
	cases := []struct {
		arm Arm
		ref func(float64) float64 // untruncated reference CDF (gonum)
	}{
		{Arm{Name: "exponential", CVR: 0.5, Delay: DelaySpec{DelayKind: DelayKind{Exponential: &ExponentialDelay{Mean: dur(6 * time.Hour)}}}}, expo.CDF},
		{Arm{Name: "weibull", CVR: 0.3, Delay: DelaySpec{DelayKind: DelayKind{Weibull: &WeibullDelay{Shape: 1.5, Scale: dur(10 * time.Hour)}}}}, weib.CDF},
		{Arm{Name: "lognormal", CVR: 0.4, Delay: DelaySpec{DelayKind: DelayKind{Lognormal: &LognormalDelay{Median: dur(20 * time.Hour), Sigma: 1}}}}, lnArm.CDF},
		{Arm{Name: "constant", CVR: 0.2, Delay: DelaySpec{DelayKind: DelayKind{Constant: &ConstantDelay{Delay: dur(time.Hour)}}}}, nil},
		{Arm{Name: "mixture", CVR: 0.45, Delay: DelaySpec{Mixture: []MixtureComponent{
			{Weight: 7, DelayKind: DelayKind{Exponential: &ExponentialDelay{Mean: dur(2 * time.Hour)}}},
			{Weight: 3, DelayKind: DelayKind{Lognormal: &LognormalDelay{Median: dur(30 * time.Hour), Sigma: 0.5}}},
		}}}, func(x float64) float64 { return 0.7*expMix.CDF(x) + 0.3*lnMix.CDF(x) }},
	}
	sc := Scenario{Name: "stream-check", Horizon: dur(48 * time.Hour), ClicksPerHour: 2500, Window: dur(window)}
	for _, c := range cases {
		sc.Arms = append(sc.Arms, c.arm)
	}
	comp, err := compile(sc)
	if err != nil {
		t.Fatal(err)
	}
	k := len(cases)
	uniform := make([]float64, k)
	for i := range uniform {
		uniform[i] = 1 / float64(k)
	}
	clicks := make([]int, k)
	delays := make([][]float64, k)
	s := newStream(comp, 99)
	total := 0
	for cl := s.next(); cl != nil; cl = s.next() {
		total++
		a := PickArm(uniform, cl.uArm)
		clicks[a]++
		if d := cl.delay[a]; d >= 0 {
			delays[a] = append(delays[a], float64(d)/1000)
		}
	}
	// Total traffic is Poisson with mean 2500*48 = 120000 (sd 346).
	if z := (float64(total) - 120000) / math.Sqrt(120000); math.Abs(z) > 3.29 {
		t.Errorf("%d clicks, z = %.2f against Poisson(120000)", total, z)
	}
	for i, c := range cases {
		t.Run(c.arm.Name, func(t *testing.T) {
			n, x := clicks[i], len(delays[i])
			if p := binomialTwoSided(x, n, c.arm.CVR); p < 0.001 {
				t.Errorf("%d conversions of %d clicks: binomial p = %.2g against cvr %v", x, n, p, c.arm.CVR)
			}
			d := delays[i]
			sort.Float64s(d)
			if c.ref == nil {
				for _, v := range d {
					if v != 3600 {
						t.Fatalf("constant delay: got %v s, want 3600", v)
					}
				}
				return
			}
			// Reference: the gonum CDF conditioned on [0, window].
			mass := c.ref(w)
			cond := func(x float64) float64 { return math.Min(c.ref(x)/mass, 1) }
			ks := ksStatistic(d, cond)
			t.Logf("n=%d conversions, D=%.4f, critical %.4f, mass within window %.3f", len(d), ks, ksCritical01(len(d)), mass)
			if ks > ksCritical01(len(d)) {
				t.Errorf("KS D = %.4f above the 1%% critical value %.4f", ks, ksCritical01(len(d)))
			}
			// The test has power: the same draws reject a delay 15% longer.
			longer := func(x float64) float64 { return math.Min(c.ref(x/1.15)/c.ref(w/1.15), 1) }
			if ks2 := ksStatistic(d, longer); ks2 <= ksCritical01(len(d)) {
				t.Errorf("KS does not reject a 15%% longer delay: D = %.4f", ks2)
			}
		})
	}
	// Truncation matters for the lognormal arm (19% of its mass lies beyond
	// the window): the untruncated CDF is rejected.
	if ks := ksStatistic(delays[2], lnArm.CDF); ks <= ksCritical01(len(delays[2])) {
		t.Errorf("untruncated lognormal CDF not rejected: D = %.4f", ks)
	}
}

// TestStreamChangePointsAndDiurnal checks that a change point changes the
// conversion rate of clicks after it (exact binomial tests, gonum) and that
// the diurnal cycle shapes traffic: the rate at 12:00 over the rate at
// 00:00 is (1+A)/(1-A).
func TestStreamChangePointsAndDiurnal(t *testing.T) {
	sc := Scenario{
		Name: "change-check", Horizon: dur(10 * 24 * time.Hour), ClicksPerHour: 400, DiurnalAmplitude: 0.5,
		Window: dur(24 * time.Hour),
		Arms: []Arm{
			{Name: "a", CVR: 0.10, Delay: DelaySpec{DelayKind: DelayKind{Constant: &ConstantDelay{}}}},
			{Name: "b", CVR: 0.20, Delay: DelaySpec{DelayKind: DelayKind{Constant: &ConstantDelay{}}}},
		},
		ChangePoints: []ChangePoint{{At: dur(5 * 24 * time.Hour), Arm: "a", CVR: 0.30}},
	}
	comp, err := compile(sc)
	if err != nil {
		t.Fatal(err)
	}
	var before, after [2]int
	var convBefore, convAfter int
	var noon, midnight int
	s := newStream(comp, 5)
	for cl := s.next(); cl != nil; cl = s.next() {
		hour := (cl.t / 3600000) % 24
		if hour == 11 || hour == 12 {
			noon++
		}
		if hour == 23 || hour == 0 {
			midnight++
		}
		conv := 0
		if cl.delay[0] >= 0 {
			conv = 1
		}
		if cl.t < 5*24*3600000 {
			before[0]++
			convBefore += conv
		} else {
			after[0]++
			convAfter += conv
		}
	}
	if p := binomialTwoSided(convBefore, before[0], 0.10); p < 0.001 {
		t.Errorf("before the change: %d/%d, p = %.2g against 0.10", convBefore, before[0], p)
	}
	if p := binomialTwoSided(convAfter, after[0], 0.30); p < 0.001 {
		t.Errorf("after the change: %d/%d, p = %.2g against 0.30", convAfter, after[0], p)
	}
	// Hours 11-13 and 23-01 (two-hour blocks centred on noon and midnight):
	// the integral of 1 + A sin over each block gives a ratio of
	// (1 + A*s)/(1 - A*s), s = sin(pi/12)/(pi/12) = 0.9886.
	sinc := math.Sin(math.Pi/12) / (math.Pi / 12)
	want := (1 + 0.5*sinc) / (1 - 0.5*sinc)
	got := float64(noon) / float64(midnight)
	if math.Abs(got/want-1) > 0.08 {
		t.Errorf("noon/midnight traffic %.3f (%d/%d), want %.3f", got, noon, midnight, want)
	}
}
