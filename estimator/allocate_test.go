package estimator

import (
	"fmt"
	"math"
	"math/rand/v2"
	"reflect"
	"strings"
	"testing"
)

// alctArm builds a burned-in arm whose likelihood posterior is lik.
func alctArm(name string, clicks, conv, ripe float64, lik BetaPosterior) ArmInput {
	return ArmInput{Arm: name, Clicks: clicks, Conversions: conv, RipeClicks: ripe, Likelihood: lik}
}

// alctOpts returns the defaults with the given changes.
func alctOpts(mod func(*AllocationOptions)) AllocationOptions {
	o := DefaultAllocationOptions()
	if mod != nil {
		mod(&o)
	}
	return o
}

func alctSum(w []float64) float64 {
	var s float64
	for _, v := range w {
		s += v
	}
	return s
}

func alctClose(t *testing.T, what string, got, want []float64, tol float64) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%s: len %d, want %d", what, len(got), len(want))
	}
	for i := range got {
		if math.Abs(got[i]-want[i]) > tol {
			t.Errorf("%s = %v, want %v (tol %g)", what, got, want, tol)
			return
		}
	}
}

func TestParsePolicy(t *testing.T) {
	for _, name := range PolicyNames() {
		t.Run(name, func(t *testing.T) {
			p, err := ParsePolicy(name)
			if err != nil {
				t.Fatal(err)
			}
			if p.Name() != name {
				t.Errorf("Name() = %q, want %q", p.Name(), name)
			}
		})
	}
	for _, bad := range []string{"", "thompson", "Uniform", "top_two"} {
		t.Run("invalid "+bad, func(t *testing.T) {
			_, err := ParsePolicy(bad)
			if err == nil || !strings.Contains(err.Error(), PolicyThompsonBayes) {
				t.Errorf("err = %v, want error listing valid names", err)
			}
		})
	}
	if p, _ := ParsePolicy(DefaultPolicy); !reflect.DeepEqual(p, Thompson{Source: PosteriorLikelihood}) {
		t.Errorf("default policy = %#v", p)
	}
}

func TestAllocationOptionsValidate(t *testing.T) {
	if err := DefaultAllocationOptions().Validate(); err != nil {
		t.Fatalf("defaults invalid: %v", err)
	}
	bad := map[string]func(*AllocationOptions){
		"zero value":          func(o *AllocationOptions) { *o = AllocationOptions{} },
		"few draws":           func(o *AllocationOptions) { o.Draws = 500 },
		"negative floor":      func(o *AllocationOptions) { o.Floor = -0.01 },
		"floor above cap":     func(o *AllocationOptions) { o.Floor, o.Cap = 0.5, 0.4 },
		"cap zero":            func(o *AllocationOptions) { o.Cap = 0 },
		"cap above one":       func(o *AllocationOptions) { o.Cap = 1.5 },
		"max change > 1":      func(o *AllocationOptions) { o.MaxChange = 1.1 },
		"max change NaN":      func(o *AllocationOptions) { o.MaxChange = math.NaN() },
		"burn-in clicks":      func(o *AllocationOptions) { o.BurnInClicks = -1 },
		"burn-in conv inf":    func(o *AllocationOptions) { o.BurnInConversions = math.Inf(1) },
		"settle confidence 0": func(o *AllocationOptions) { o.SettleConfidence = 0 },
		"settle confidence 1": func(o *AllocationOptions) { o.SettleConfidence = 1 },
		"tolerance negative":  func(o *AllocationOptions) { o.SettleTolerance = -0.1 },
		"tolerance 1":         func(o *AllocationOptions) { o.SettleTolerance = 1 },
	}
	for name, mod := range bad {
		t.Run(name, func(t *testing.T) {
			if err := alctOpts(mod).Validate(); err == nil {
				t.Error("validated")
			}
		})
	}
}

// TestAllocateThompsonPosteriors checks that each Thompson policy samples the
// posterior it is named for: its raw weight for arm B must match the exact
// P(p_B > p_A) of that posterior (finite sum of Miller E. (2015), "Formulas
// for Bayesian A/B testing", itself checked against quadrature in
// probbest_test.go) within 3 binomial standard errors.
func TestAllocateThompsonPosteriors(t *testing.T) {
	// B has the lower observed rate but more of its clicks are still unripe.
	arms := []ArmInput{
		alctArm("A", 2000, 60, 1900, BetaPosterior{Alpha: 55, Beta: 1000}),
		alctArm("B", 2000, 50, 1000, BetaPosterior{Alpha: 52, Beta: 900}),
	}
	cases := []struct {
		policy string
		a, b   BetaPosterior
	}{
		{PolicyThompsonObserved, BetaPosterior{61, 1941}, BetaPosterior{51, 1951}},
		{PolicyThompsonDelay, BetaPosterior{61, 1841}, BetaPosterior{51, 951}},
		{PolicyThompsonBayes, BetaPosterior{55, 1000}, BetaPosterior{52, 900}},
	}
	for _, c := range cases {
		t.Run(c.policy, func(t *testing.T) {
			pol, err := ParsePolicy(c.policy)
			if err != nil {
				t.Fatal(err)
			}
			got, err := Allocate(arms, nil, alctOpts(func(o *AllocationOptions) { o.Policy = pol }), 7)
			if err != nil {
				t.Fatal(err)
			}
			exact, err := ProbBestTwoBeta(c.a, c.b)
			if err != nil {
				t.Fatal(err)
			}
			se := math.Sqrt(exact * (1 - exact) / DefaultProbBestDraws)
			if d := math.Abs(got.RawWeights[1] - exact); d > 3*se {
				t.Errorf("raw weight of B %v, exact P(best) %v, |diff| %v > 3 SE %v", got.RawWeights[1], exact, d, 3*se)
			}
			if got.Status != StatusAdapting || got.Policy != c.policy {
				t.Errorf("status %q policy %q", got.Status, got.Policy)
			}
			// Reported P(best) is under the likelihood posterior whatever the policy.
			exactLik, _ := ProbBestTwoBeta(BetaPosterior{55, 1000}, BetaPosterior{52, 900})
			seLik := math.Sqrt(exactLik * (1 - exactLik) / DefaultProbBestDraws)
			if d := math.Abs(got.PBest[1] - exactLik); d > 3*seLik {
				t.Errorf("reported P(B best) %v, exact under likelihood %v", got.PBest[1], exactLik)
			}
		})
	}
}

func TestAllocateReportIndependentOfPolicy(t *testing.T) {
	arms := []ArmInput{
		alctArm("A", 500, 30, 450, BetaPosterior{31, 471}),
		alctArm("B", 500, 35, 400, BetaPosterior{36, 466}),
		alctArm("C", 500, 28, 480, BetaPosterior{29, 473}),
	}
	var first Allocation
	for i, name := range PolicyNames() {
		pol, _ := ParsePolicy(name)
		got, err := Allocate(arms, nil, alctOpts(func(o *AllocationOptions) { o.Policy = pol }), 99)
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		if i == 0 {
			first = got
			continue
		}
		if !reflect.DeepEqual(got.PBest, first.PBest) || !reflect.DeepEqual(got.ExpectedLoss, first.ExpectedLoss) || got.Leader != first.Leader {
			t.Errorf("%s: report %v / %v differs from %s's %v / %v", name, got.PBest, got.ExpectedLoss, PolicyNames()[0], first.PBest, first.ExpectedLoss)
		}
	}
}

// alctSeparated are three arms whose posteriors never overlap in practice:
// arm "top" wins every draw.
func alctSeparated() []ArmInput {
	return []ArmInput{
		alctArm("top", 1000, 500, 1000, BetaPosterior{501, 501}),
		alctArm("low1", 1000, 10, 1000, BetaPosterior{11, 991}),
		alctArm("low2", 1000, 12, 1000, BetaPosterior{13, 989}),
	}
}

func TestAllocateGuardrails(t *testing.T) {
	third := 1.0 / 3
	cases := []struct {
		name  string
		arms  []ArmInput
		prev  []float64
		mod   func(*AllocationOptions)
		raw   []float64 // expected raw weights
		want  []float64 // expected weights
		maxCh float64   // expected effective max change
	}{
		{
			name: "floor lifts losing arms",
			arms: alctSeparated(),
			mod:  func(o *AllocationOptions) { o.Floor = 0.05 },
			raw:  []float64{1, 0, 0},
			want: []float64{0.9, 0.05, 0.05},
		},
		{
			name: "cap limits the leader",
			arms: alctSeparated(),
			mod:  func(o *AllocationOptions) { o.Cap = 0.6 },
			raw:  []float64{1, 0, 0},
			want: []float64{0.6, 0.2, 0.2},
		},
		{
			name:  "max change from uniform",
			arms:  alctSeparated(),
			prev:  []float64{third, third, third},
			raw:   []float64{1, 0, 0},
			want:  []float64{third + 0.1, third - 0.05, third - 0.05},
			maxCh: 0.1,
		},
		{
			name: "max change zero disables the limit",
			arms: alctSeparated(),
			prev: []float64{third, third, third},
			mod:  func(o *AllocationOptions) { o.MaxChange = 0 },
			raw:  []float64{1, 0, 0},
			want: []float64{0.98, 0.01, 0.01},
		},
		{
			name: "floor above 1/k becomes uniform",
			arms: alctSeparated(),
			mod:  func(o *AllocationOptions) { o.Floor, o.Cap = 0.4, 0.5 },
			raw:  []float64{1, 0, 0},
			want: []float64{third, third, third},
		},
		{
			name: "cap below 1/k becomes uniform",
			arms: alctSeparated(),
			mod:  func(o *AllocationOptions) { o.Cap = 0.2 },
			raw:  []float64{1, 0, 0},
			want: []float64{third, third, third},
		},
		{
			name: "paused arm gets zero and max change widens",
			arms: func() []ArmInput {
				a := alctSeparated()
				a[0].Paused, a[0].Likelihood = true, nil
				return a
			}(),
			prev:  []float64{0.5, 0.25, 0.25},
			raw:   nil, // two close arms: checked loosely below
			want:  []float64{0, 0.5, 0.5},
			maxCh: 0.25,
		},
		{
			name: "burn-in is uniform",
			arms: func() []ArmInput {
				a := alctSeparated()
				a[1].Clicks = 99
				return a
			}(),
			raw:  []float64{third, third, third},
			want: []float64{third, third, third},
		},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			opts := alctOpts(c.mod)
			got, err := Allocate(c.arms, c.prev, opts, 3)
			if err != nil {
				t.Fatal(err)
			}
			if c.raw != nil {
				alctClose(t, "raw weights", got.RawWeights, c.raw, 1e-12)
			}
			alctClose(t, "weights", got.Weights, c.want, 1e-9)
			if s := alctSum(got.Weights); math.Abs(s-1) > 1e-12 {
				t.Errorf("weights sum to %v", s)
			}
			if math.Abs(got.EffectiveMaxChange-c.maxCh) > 1e-9 {
				t.Errorf("effective max change %v, want %v", got.EffectiveMaxChange, c.maxCh)
			}
			for i, a := range c.arms {
				if a.Paused && (got.Weights[i] != 0 || got.RawWeights[i] != 0 || got.PBest[i] != 0) {
					t.Errorf("paused arm %d: weight %v raw %v pbest %v", i, got.Weights[i], got.RawWeights[i], got.PBest[i])
				}
				if a.Paused && got.Leader == i {
					t.Errorf("paused arm %d is leader", i)
				}
			}
		})
	}
}

func TestAllocateBurnIn(t *testing.T) {
	opts := DefaultAllocationOptions() // 100 clicks, 5 conversions
	cases := []struct {
		name          string
		clicks, conv  float64
		pausedLagging bool
		want          AllocationStatus
	}{
		{"at thresholds", 100, 5, false, StatusAdapting},
		{"few clicks", 99, 5, false, StatusCollecting},
		{"few conversions", 1000, 4, false, StatusCollecting},
		{"lagging arm paused", 10, 0, true, StatusAdapting},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			arms := []ArmInput{
				alctArm("A", 2000, 100, 2000, BetaPosterior{101, 1901}),
				alctArm("B", 2000, 104, 2000, BetaPosterior{105, 1897}),
				{Arm: "C", Clicks: c.clicks, Conversions: c.conv, RipeClicks: c.clicks, Likelihood: BetaPosterior{c.conv + 1, c.clicks - c.conv + 1}, Paused: c.pausedLagging},
			}
			got, err := Allocate(arms, nil, opts, 1)
			if err != nil {
				t.Fatal(err)
			}
			if got.Status != c.want {
				t.Fatalf("status %q, want %q", got.Status, c.want)
			}
			if c.want == StatusCollecting {
				alctClose(t, "raw", got.RawWeights, []float64{1.0 / 3, 1.0 / 3, 1.0 / 3}, 1e-15)
				alctClose(t, "weights", got.Weights, []float64{1.0 / 3, 1.0 / 3, 1.0 / 3}, 1e-12)
			}
		})
	}
}

// alctExact returns the exact two-arm P(B best) (Miller E. (2015), "Formulas
// for Bayesian A/B testing") and B's expected loss by gonum quadrature.
func alctExact(t *testing.T, a, b BetaPosterior) (pB, lossB float64) {
	t.Helper()
	pB, err := ProbBestTwoBeta(a, b)
	if err != nil {
		t.Fatal(err)
	}
	return pB, pbtQuadExpectedLoss([]BetaPosterior{a, b}, 1)
}

// TestAllocateStatus checks that Allocate reports collecting, with the arm
// and count that hold burn-in up, until every active arm has its burn-in
// clicks and conversions, and adapting after.
func TestAllocateStatus(t *testing.T) {
	a := BetaPosterior{101, 1901}
	cases := []struct {
		name       string
		clicks     float64
		conv       float64
		want       AllocationStatus
		wantBurnIn string
	}{
		{"burned in", 2000, 100, StatusAdapting, ""},
		{"short of clicks", 99, 50, StatusCollecting, "B has 99 of 100 clicks"},
		{"short of conversions", 2000, 4, StatusCollecting, "B has 4 of 5 conversions"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			arms := []ArmInput{
				alctArm("A", 2000, a.Alpha-1, 2000, a),
				alctArm("B", c.clicks, c.conv, c.clicks, BetaPosterior{c.conv + 1, c.clicks - c.conv + 1}),
			}
			got, err := Allocate(arms, nil, alctOpts(nil), 5)
			if err != nil {
				t.Fatal(err)
			}
			if got.Status != c.want || got.BurnIn != c.wantBurnIn {
				t.Errorf("status %q burn-in %q, want %q %q", got.Status, got.BurnIn, c.want, c.wantBurnIn)
			}
		})
	}
}

// TestAllocateTopTwo checks top-two Thompson sampling (Russo D. (2016),
// "Simple Bayesian algorithms for best arm identification", COLT). Its
// allocation is psi_i = P_i (beta + (1-beta) sum_{j != i} P_j / (1 - P_j)),
// with P_i the posterior probability that arm i is best (the formula for the
// TTTS measurement probabilities, recalled from memory); so a clearly best arm
// gets about beta of the traffic.
func TestAllocateTopTwo(t *testing.T) {
	moderate := []BetaPosterior{{11, 91}, {21, 81}, {16, 86}}
	for _, beta := range []float64{0.5, 0.7} {
		t.Run(fmt.Sprintf("separated beta=%v", beta), func(t *testing.T) {
			opts := alctOpts(func(o *AllocationOptions) { o.Policy, o.Floor = TopTwo{Beta: beta}, 0 })
			got, err := Allocate(alctSeparated(), nil, opts, 11)
			if err != nil {
				t.Fatal(err)
			}
			if math.Abs(got.RawWeights[0]-beta) > 0.01 {
				t.Errorf("leader raw weight %v, want about %v", got.RawWeights[0], beta)
			}
			// The two weak arms share the rest; the slightly better one more.
			if !(got.RawWeights[2] > got.RawWeights[1]) || math.Abs(alctSum(got.RawWeights)-1) > 1e-12 {
				t.Errorf("raw weights %v", got.RawWeights)
			}
		})
		t.Run(fmt.Sprintf("two arms likely best beta=%v", beta), func(t *testing.T) {
			a, b := BetaPosterior{101, 1901}, BetaPosterior{131, 1871}
			pB, _ := alctExact(t, a, b)
			opts := alctOpts(func(o *AllocationOptions) { o.Policy, o.Floor = TopTwo{Beta: beta}, 0 })
			got, err := Allocate([]ArmInput{alctArm("A", 2000, 100, 2000, a), alctArm("B", 2000, 130, 2000, b)}, nil, opts, 12)
			if err != nil {
				t.Fatal(err)
			}
			// Two arms: psi_B = beta P_B + (1-beta)(1-P_B).
			want := beta*pB + (1-beta)*(1-pB)
			se := math.Abs(2*beta-1) * math.Sqrt(pB*(1-pB)/DefaultProbBestDraws)
			if d := math.Abs(got.RawWeights[1] - want); d > 3*se+1e-12 {
				t.Errorf("leader raw weight %v, want %v (|diff| %v > 3 SE %v)", got.RawWeights[1], want, d, 3*se)
			}
		})
		t.Run(fmt.Sprintf("moderate three arms beta=%v", beta), func(t *testing.T) {
			var arms []ArmInput
			p := make([]float64, len(moderate))
			for i, b := range moderate {
				arms = append(arms, alctArm(fmt.Sprint("arm", i), 101, b.Alpha-1, 101, b))
				p[i] = pbtQuadProbBest(moderate, i)
			}
			want := make([]float64, len(p))
			for i := range p {
				var s float64
				for j := range p {
					if j != i {
						s += p[j] / (1 - p[j])
					}
				}
				want[i] = p[i] * (beta + (1-beta)*s)
			}
			opts := alctOpts(func(o *AllocationOptions) { o.Policy, o.Floor = TopTwo{Beta: beta}, 0 })
			got, err := Allocate(arms, nil, opts, 13)
			if err != nil {
				t.Fatal(err)
			}
			// Tolerance 0.015 = 3 x 0.005, the largest binomial standard error of
			// a probability at 10,000 draws; psi is a weighted average of such
			// estimates.
			alctClose(t, "raw weights", got.RawWeights, want, 0.015)
		})
	}
	t.Run("single arm", func(t *testing.T) {
		w, err := TopTwo{}.Weights([]ArmInput{alctArm("only", 10, 1, 10, BetaPosterior{2, 10})}, rand.New(rand.NewPCG(1, 1)))
		if err != nil || len(w) != 1 || w[0] != 1 {
			t.Errorf("got %v, %v", w, err)
		}
	})
	t.Run("invalid beta", func(t *testing.T) {
		_, err := TopTwo{Beta: 1}.Weights(alctSeparated(), rand.New(rand.NewPCG(1, 1)))
		if err == nil {
			t.Error("beta = 1 accepted")
		}
	})
}

func TestAllocateDeterminism(t *testing.T) {
	arms := []ArmInput{
		alctArm("A", 500, 30, 450, BetaPosterior{31, 471}),
		alctArm("B", 500, 35, 400, BetaPosterior{36, 466}),
		alctArm("C", 500, 28, 480, BetaPosterior{29, 473}),
	}
	prev := []float64{0.4, 0.3, 0.3}
	for _, name := range PolicyNames() {
		t.Run(name, func(t *testing.T) {
			pol, _ := ParsePolicy(name)
			opts := alctOpts(func(o *AllocationOptions) { o.Policy = pol })
			a1, err := Allocate(arms, prev, opts, 2024)
			if err != nil {
				t.Fatal(err)
			}
			a2, err := Allocate(arms, prev, opts, 2024)
			if err != nil {
				t.Fatal(err)
			}
			if !reflect.DeepEqual(a1, a2) {
				t.Errorf("same seed, different output:\n%+v\n%+v", a1, a2)
			}
			a3, err := Allocate(arms, prev, opts, 2025)
			if err != nil {
				t.Fatal(err)
			}
			if reflect.DeepEqual(a1.PBest, a3.PBest) {
				t.Error("different seed, identical P(best): seed not used")
			}
		})
	}
}

func TestAllocateErrors(t *testing.T) {
	good := func() []ArmInput {
		return []ArmInput{alctArm("A", 200, 10, 200, BetaPosterior{11, 191}), alctArm("B", 200, 12, 200, BetaPosterior{13, 189})}
	}
	cases := map[string]struct {
		arms []ArmInput
		prev []float64
		opts AllocationOptions
	}{
		"no arms":          {nil, nil, DefaultAllocationOptions()},
		"duplicate":        {func() []ArmInput { a := good(); a[1].Arm = "A"; return a }(), nil, DefaultAllocationOptions()},
		"empty name":       {func() []ArmInput { a := good(); a[0].Arm = ""; return a }(), nil, DefaultAllocationOptions()},
		"negative clicks":  {func() []ArmInput { a := good(); a[0].Clicks = -1; return a }(), nil, DefaultAllocationOptions()},
		"NaN ripe":         {func() []ArmInput { a := good(); a[0].RipeClicks = math.NaN(); return a }(), nil, DefaultAllocationOptions()},
		"nil likelihood":   {func() []ArmInput { a := good(); a[1].Likelihood = nil; return a }(), nil, DefaultAllocationOptions()},
		"all paused":       {func() []ArmInput { a := good(); a[0].Paused, a[1].Paused = true, true; return a }(), nil, DefaultAllocationOptions()},
		"prev length":      {good(), []float64{1}, DefaultAllocationOptions()},
		"prev negative":    {good(), []float64{1.2, -0.2}, DefaultAllocationOptions()},
		"invalid options":  {good(), nil, AllocationOptions{}},
		"policy few draws": {good(), nil, alctOpts(func(o *AllocationOptions) { o.Policy = Thompson{Draws: 100} })},
		"observed conversions exceed clicks": {
			func() []ArmInput { a := good(); a[0].Conversions = 300; return a }(), nil,
			alctOpts(func(o *AllocationOptions) { o.Policy = Thompson{Source: PosteriorObserved} }),
		},
	}
	for name, c := range cases {
		t.Run(name, func(t *testing.T) {
			if _, err := Allocate(c.arms, c.prev, c.opts, 1); err == nil {
				t.Error("no error")
			}
		})
	}
}

// TestAllocGuardProperties checks the guardrail projection on random inputs:
// the constraints hold simultaneously, conflicts are resolved with the
// documented precedence, and the result is the Euclidean projection, verified
// by the KKT conditions of min ||w - raw||^2 s.t. sum w = 1, lo <= w <= hi
// (Boyd S., Vandenberghe L. (2004), "Convex Optimization", sec. 5.5.3): there
// is a lambda with w_i - raw_i = lambda for interior w_i, >= lambda at the
// lower bound and <= lambda at the upper bound.
func TestAllocGuardProperties(t *testing.T) {
	r := rand.New(rand.NewPCG(8, 9))
	simplex := func(k int, zeros bool) []float64 {
		w := make([]float64, k)
		var s float64
		for i := range w {
			w[i] = r.ExpFloat64()
			if zeros && r.IntN(3) == 0 {
				w[i] = 0
			}
			s += w[i]
		}
		if s == 0 {
			w[0], s = 1, 1
		}
		for i := range w {
			w[i] /= s
		}
		return w
	}
	floors := []float64{0, 0.01, 0.05, 0.2, 0.3}
	caps := []float64{1, 0.5, 0.3, 0.15}
	changes := []float64{0, 0.02, 0.1, 0.5, 1}
	const tol = 1e-9
	var nLimited, nWidened, nRelaxed int
	for n := 0; n < 3000; n++ {
		k := 1 + r.IntN(8)
		floor, cp := floors[r.IntN(len(floors))], caps[r.IntN(len(caps))]
		if floor > cp {
			continue
		}
		mc := changes[r.IntN(len(changes))]
		raw := simplex(k, true)
		var prev []float64
		switch r.IntN(3) {
		case 1: // previous weights on the same arms
			prev = simplex(k, false)
		case 2: // previous weights after an arm was paused or added
			prev = simplex(k, true)
			scale := 0.5 + r.Float64()
			for i := range prev {
				prev[i] = math.Min(prev[i]*scale, 1)
			}
		}
		w, g := allocGuard(raw, prev, floor, cp, mc)
		if g.maxChange > 0 {
			nLimited++
		}
		if g.maxChange > mc {
			nWidened++
		}
		if g.floor < floor || g.cap > cp {
			nRelaxed++
		}
		fail := func(format string, args ...any) {
			t.Fatalf("case %d (k=%d floor=%v cap=%v mc=%v raw=%v prev=%v -> w=%v %+v): %s",
				n, k, floor, cp, mc, raw, prev, w, g, fmt.Sprintf(format, args...))
		}
		if s := alctSum(w); math.Abs(s-1) > 1e-12 {
			fail("sum %v", s)
		}
		if g.floor != math.Min(floor, 1/float64(k)) || g.cap != math.Max(cp, 1/float64(k)) {
			fail("effective floor/cap")
		}
		limited := prev != nil && mc > 0 && mc < 1
		if limited != (g.maxChange > 0) || (limited && g.maxChange < mc) {
			fail("effective max change")
		}
		lo, hi := make([]float64, k), make([]float64, k)
		var sumLo, sumHi float64
		for i := range w {
			lo[i], hi[i] = g.floor, g.cap
			if limited {
				lo[i] = math.Min(math.Max(prev[i]-g.maxChange, g.floor), g.cap)
				hi[i] = math.Min(math.Max(prev[i]+g.maxChange, g.floor), g.cap)
			}
			sumLo += lo[i]
			sumHi += hi[i]
			if w[i] < g.floor-tol || w[i] > g.cap+tol {
				fail("arm %d outside [floor, cap]", i)
			}
			if limited && math.Abs(w[i]-prev[i]) > g.maxChange+tol {
				fail("arm %d moved %v > %v", i, math.Abs(w[i]-prev[i]), g.maxChange)
			}
		}
		if limited && (sumLo > 1+tol || sumHi < 1-tol) {
			fail("bounds [%v, %v] cannot sum to 1", sumLo, sumHi)
		}
		// feasibleAt says whether limit m can hold together with floor, cap
		// and the sum to 1: every arm reaches [floor, cap] within m of its
		// previous weight and the clamped bounds bracket 1.
		feasibleAt := func(m float64) bool {
			var sl, sh float64
			for _, p := range prev {
				if p+m < g.floor || p-m > g.cap {
					return false
				}
				sl += math.Min(math.Max(p-m, g.floor), g.cap)
				sh += math.Min(math.Max(p+m, g.floor), g.cap)
			}
			return sl <= 1 && sh >= 1
		}
		if limited && g.maxChange > mc && feasibleAt(g.maxChange-1e-9) {
			fail("max change widened more than needed")
		}
		if limited && feasibleAt(mc) && g.maxChange != mc {
			fail("feasible max change %v was widened to %v", mc, g.maxChange)
		}
		// KKT.
		lower, upper := math.Inf(-1), math.Inf(1)
		for i := range w {
			if hi[i]-lo[i] < tol {
				continue
			}
			d := w[i] - raw[i]
			atLo, atHi := w[i] <= lo[i]+tol, w[i] >= hi[i]-tol
			if !atLo {
				lower = math.Max(lower, d) // interior or at upper: lambda >= d
			}
			if !atHi {
				upper = math.Min(upper, d) // interior or at lower: lambda <= d
			}
		}
		if lower > upper+1e-8 {
			fail("KKT violated: need lambda in [%v, %v]", lower, upper)
		}
	}
	// The random cases must exercise every branch.
	if nLimited < 300 || nWidened < 50 || nRelaxed < 50 {
		t.Errorf("weak coverage: %d limited, %d widened, %d relaxed cases", nLimited, nWidened, nRelaxed)
	}
}
