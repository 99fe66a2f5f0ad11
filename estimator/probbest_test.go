package estimator

import (
	"fmt"
	"math"
	"math/rand/v2"
	"reflect"
	"testing"

	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/stat/distuv"
)

// pbtIntegrate is an independent numerical integral of f over [a, b]:
// composite Gauss-Legendre quadrature from gonum.org/v1/gonum/integrate/quad
// (64 panels of 20 nodes).
func pbtIntegrate(f func(float64) float64, a, b float64) float64 {
	const panels, nodes = 64, 20
	h := (b - a) / panels
	var s float64
	for p := 0; p < panels; p++ {
		s += quad.Fixed(f, a+h*float64(p), a+h*float64(p+1), nodes, quad.Legendre{}, 0)
	}
	return s
}

// pbtRange is an interval holding all but ~2e-14 of a Beta posterior's mass
// (gonum distuv quantiles), the region quadrature needs to cover.
func pbtRange(b BetaPosterior) (float64, float64) {
	d := distuv.Beta{Alpha: b.Alpha, Beta: b.Beta}
	return d.Quantile(1e-14), d.Quantile(1 - 1e-14)
}

// pbtQuadProbBest is P(arm i has the largest value) for independent Beta
// posteriors as the integral of pdf_i(x) * prod_{j != i} CDF_j(x) over [0, 1],
// with gonum's Beta pdf and CDF (distuv) and gonum quadrature. For two arms
// this is P(p_B > p_A) = int pdf_B(x) CDF_A(x) dx.
func pbtQuadProbBest(posts []BetaPosterior, i int) float64 {
	fi := distuv.Beta{Alpha: posts[i].Alpha, Beta: posts[i].Beta}
	lo, hi := pbtRange(posts[i])
	return pbtIntegrate(func(x float64) float64 {
		v := fi.Prob(x)
		for j, p := range posts {
			if j != i {
				v *= distuv.Beta{Alpha: p.Alpha, Beta: p.Beta}.CDF(x)
			}
		}
		return v
	}, lo, hi)
}

// pbtQuadExpectedLoss is E[max_j theta_j] - E[theta_i], with
// E[max] = int_0^1 (1 - prod_j CDF_j(x)) dx (the expectation of a variable on
// [0, 1] is the integral of its survival function).
func pbtQuadExpectedLoss(posts []BetaPosterior, i int) float64 {
	lo, hi := 1.0, 0.0
	for _, p := range posts {
		a, b := pbtRange(p)
		lo, hi = math.Min(lo, a), math.Max(hi, b)
	}
	eMax := lo + pbtIntegrate(func(x float64) float64 {
		v := 1.0
		for _, p := range posts {
			v *= distuv.Beta{Alpha: p.Alpha, Beta: p.Beta}.CDF(x)
		}
		return 1 - v
	}, lo, hi)
	return eMax - posts[i].Mean()
}

func pbtPosteriors(bs []BetaPosterior) []Posterior {
	out := make([]Posterior, len(bs))
	for i, b := range bs {
		out[i] = b
	}
	return out
}

func TestBetaPosteriorMoments(t *testing.T) {
	// Beta(a, b) mean a/(a+b), variance ab/((a+b)^2 (a+b+1)); Beta(a, 1) has
	// CDF x^a so its p-quantile is p^(1/a), and Beta(1, b) has CDF
	// 1-(1-x)^b so its p-quantile is 1-(1-p)^(1/b). Textbook facts (e.g.
	// Johnson, Kotz & Balakrishnan, "Continuous Univariate Distributions",
	// vol. 2, 1995, ch. 25), recalled from memory.
	cases := []struct {
		b       BetaPosterior
		p, want float64
	}{
		{BetaPosterior{3, 1}, 0.3, math.Pow(0.3, 1.0/3)},
		{BetaPosterior{1, 4}, 0.8, 1 - math.Pow(0.2, 0.25)},
		{BetaPosterior{7, 7}, 0.5, 0.5},
		{BetaPosterior{1, 1}, 0.123, 0.123},
	}
	for _, c := range cases {
		t.Run(fmt.Sprintf("quantile_%v_%v", c.b.Alpha, c.b.Beta), func(t *testing.T) {
			if got := c.b.Quantile(c.p); math.Abs(got-c.want) > 1e-10 {
				t.Errorf("Quantile(%v) = %v, want %v", c.p, got, c.want)
			}
		})
	}
	for _, b := range []BetaPosterior{{2, 5}, {31, 971}, {0.5, 0.5}} {
		t.Run(fmt.Sprintf("sample_%v_%v", b.Alpha, b.Beta), func(t *testing.T) {
			s := b.Alpha + b.Beta
			mean := b.Alpha / s
			if got := b.Mean(); math.Abs(got-mean) > 1e-15 {
				t.Errorf("Mean = %v, want %v", got, mean)
			}
			variance := b.Alpha * b.Beta / (s * s * (s + 1))
			const n = 20000
			r := rand.New(rand.NewPCG(11, 12))
			var sum float64
			for i := 0; i < n; i++ {
				x := b.Sample(r)
				if x < 0 || x > 1 {
					t.Fatalf("sample %v outside [0, 1]", x)
				}
				sum += x
			}
			if se := math.Sqrt(variance / n); math.Abs(sum/n-mean) > 3*se {
				t.Errorf("sample mean %v, want %v within 3 SE (%v)", sum/n, mean, se)
			}
			r1, r2 := rand.New(rand.NewPCG(5, 6)), rand.New(rand.NewPCG(5, 6))
			for i := 0; i < 10; i++ {
				if x, y := b.Sample(r1), b.Sample(r2); x != y {
					t.Fatalf("same seed gave %v and %v", x, y)
				}
			}
		})
	}
}

func TestBetaConstructors(t *testing.T) {
	cases := []struct {
		name    string
		build   func() (BetaPosterior, error)
		want    BetaPosterior
		wantErr bool
	}{
		{"observed", func() (BetaPosterior, error) { return NewObservedBeta(100, 7) }, BetaPosterior{8, 94}, false},
		{"observed zero", func() (BetaPosterior, error) { return NewObservedBeta(0, 0) }, BetaPosterior{1, 1}, false},
		{"observed too many conversions", func() (BetaPosterior, error) { return NewObservedBeta(3, 4) }, BetaPosterior{}, true},
		{"observed negative", func() (BetaPosterior, error) { return NewObservedBeta(-1, 0) }, BetaPosterior{}, true},
		{"observed NaN", func() (BetaPosterior, error) { return NewObservedBeta(math.NaN(), 0) }, BetaPosterior{}, true},
		{"delay", func() (BetaPosterior, error) { return NewDelayCorrectedBeta(50.5, 7) }, BetaPosterior{8, 44.5}, false},
		{"delay conversions exceed ripe", func() (BetaPosterior, error) { return NewDelayCorrectedBeta(5, 7) }, BetaPosterior{8, 1}, false},
		{"delay infinite", func() (BetaPosterior, error) { return NewDelayCorrectedBeta(math.Inf(1), 7) }, BetaPosterior{}, true},
		{"delay negative conversions", func() (BetaPosterior, error) { return NewDelayCorrectedBeta(5, -1) }, BetaPosterior{}, true},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, err := c.build()
			if (err != nil) != c.wantErr {
				t.Fatalf("err = %v, wantErr %v", err, c.wantErr)
			}
			if !c.wantErr {
				if got != c.want {
					t.Errorf("got %+v, want %+v", got, c.want)
				}
				if err := got.Validate(); err != nil {
					t.Errorf("Validate: %v", err)
				}
			}
		})
	}
	if err := (BetaPosterior{}).Validate(); err == nil {
		t.Error("zero BetaPosterior validated")
	}
}

// pbtReadmeTable is the table "Two-arm Beta probability of being best" of
// /work/shared/data/README.md, for the finite sum of Miller E. (2015),
// "Formulas for Bayesian A/B testing". The README states these values were
// computed by direct numerical integration; they are not published numbers.
var pbtReadmeTable = []struct {
	aA, bA, aB, bB float64
	want           float64
}{
	{1, 1, 1, 1, 0.5},
	{2, 1, 1, 2, 0.1666666667},
	{2, 3, 4, 5, 0.5757575758},
	{11, 91, 21, 81, 0.9751730332},
	{17, 185, 19, 187, 0.6147356240},
	{301, 9701, 361, 9641, 0.9912153663},
}

func TestProbBestTwoBetaReferenceTable(t *testing.T) {
	for _, c := range pbtReadmeTable {
		a, b := BetaPosterior{c.aA, c.bA}, BetaPosterior{c.aB, c.bB}
		t.Run(fmt.Sprintf("%v_%v_vs_%v_%v", c.aA, c.bA, c.aB, c.bB), func(t *testing.T) {
			got, err := ProbBestTwoBeta(a, b)
			if err != nil {
				t.Fatal(err)
			}
			// The table has 10 decimals, so 1e-9 is its resolution.
			if math.Abs(got-c.want) > 1e-9 {
				t.Errorf("P(p_B > p_A) = %.12f, want %.10f", got, c.want)
			}
		})
	}
}

func TestProbBestTwoBetaVsQuadrature(t *testing.T) {
	cases := [][4]float64{
		{1, 1, 2, 1}, // = int_0^1 2x * x dx = 2/3 by hand
		{5, 1, 1, 5},
		{1, 50, 3, 20},
		{40, 60, 45, 55},
		{120, 880, 100, 900},
		{37, 4963, 52, 4948},
		{601, 19401, 590, 19412},
	}
	for _, c := range pbtReadmeTable {
		cases = append(cases, [4]float64{c.aA, c.bA, c.aB, c.bB})
	}
	for _, c := range cases {
		a, b := BetaPosterior{c[0], c[1]}, BetaPosterior{c[2], c[3]}
		t.Run(fmt.Sprintf("%v_%v_vs_%v_%v", c[0], c[1], c[2], c[3]), func(t *testing.T) {
			got, err := ProbBestTwoBeta(a, b)
			if err != nil {
				t.Fatal(err)
			}
			want := pbtQuadProbBest([]BetaPosterior{a, b}, 1)
			if math.Abs(got-want) > 1e-7 {
				t.Errorf("closed form %.12f, quadrature %.12f", got, want)
			}
			rev, err := ProbBestTwoBeta(b, a)
			if err != nil {
				t.Fatal(err)
			}
			if math.Abs(got+rev-1) > 1e-12 {
				t.Errorf("P(B>A) + P(A>B) = %v, want 1", got+rev)
			}
		})
	}
	t.Run("by hand", func(t *testing.T) {
		got, err := ProbBestTwoBeta(BetaPosterior{1, 1}, BetaPosterior{2, 1})
		if err != nil {
			t.Fatal(err)
		}
		if math.Abs(got-2.0/3) > 1e-14 {
			t.Errorf("got %v, want 2/3", got)
		}
	})
}

func TestProbBestTwoBetaErrors(t *testing.T) {
	cases := map[string][2]BetaPosterior{
		"non-integer alpha": {{1.5, 2}, {1, 1}},
		"non-integer beta":  {{1, 1}, {1, 2.25}},
		"zero":              {{0, 1}, {1, 1}},
		"negative":          {{1, 1}, {1, -3}},
		"NaN":               {{math.NaN(), 1}, {1, 1}},
		"Inf":               {{1, 1}, {math.Inf(1), 1}},
	}
	for name, c := range cases {
		t.Run(name, func(t *testing.T) {
			if p, err := ProbBestTwoBeta(c[0], c[1]); err == nil {
				t.Errorf("got %v, want error", p)
			}
		})
	}
}

func TestProbBestMonteCarloTwoArms(t *testing.T) {
	cases := [][4]float64{
		{2, 3, 4, 5},
		{11, 91, 21, 81},
		{17, 185, 19, 187},
		{301, 9701, 361, 9641},
	}
	for ci, c := range cases {
		a, b := BetaPosterior{c[0], c[1]}, BetaPosterior{c[2], c[3]}
		t.Run(fmt.Sprintf("%v_%v_vs_%v_%v", c[0], c[1], c[2], c[3]), func(t *testing.T) {
			exact, err := ProbBestTwoBeta(a, b)
			if err != nil {
				t.Fatal(err)
			}
			res := ProbBest(pbtPosteriors([]BetaPosterior{a, b}), 0, rand.New(rand.NewPCG(uint64(ci), 99)))
			if res.Draws != DefaultProbBestDraws {
				t.Fatalf("draws = %d, want default %d", res.Draws, DefaultProbBestDraws)
			}
			// Binomial standard error at the exact probability.
			se := math.Sqrt(exact * (1 - exact) / float64(res.Draws))
			if d := math.Abs(res.PBest[1] - exact); d > 3*se {
				t.Errorf("MC P(B best) = %v, exact %v, |diff| %v > 3 SE %v", res.PBest[1], exact, d, 3*se)
			}
			if math.Abs(res.PBest[0]+res.PBest[1]-1) > 1e-12 {
				t.Errorf("P(best) sums to %v", res.PBest[0]+res.PBest[1])
			}
			if math.Abs(res.StdErr[1]-math.Sqrt(res.PBest[1]*(1-res.PBest[1])/float64(res.Draws))) > 1e-15 {
				t.Errorf("StdErr %v inconsistent with PBest %v", res.StdErr[1], res.PBest[1])
			}
			for i := range 2 {
				want := pbtQuadExpectedLoss([]BetaPosterior{a, b}, i)
				if d := math.Abs(res.ExpectedLoss[i] - want); d > 3*res.ExpectedLossStdErr[i] {
					t.Errorf("arm %d: MC expected loss %v, quadrature %v, |diff| %v > 3 SE %v",
						i, res.ExpectedLoss[i], want, d, 3*res.ExpectedLossStdErr[i])
				}
			}
		})
	}
}

func TestProbBestMonteCarloThreeArms(t *testing.T) {
	cases := [][]BetaPosterior{
		{{11, 91}, {21, 81}, {16, 86}},
		{{41, 960}, {45, 956}, {50, 951}},
		{{3, 8}, {2, 9}, {4, 7}},
		{{101, 901}, {100, 902}, {30, 972}}, // third arm almost never best
	}
	for ci, posts := range cases {
		t.Run(fmt.Sprint(ci), func(t *testing.T) {
			res := ProbBest(pbtPosteriors(posts), 20000, rand.New(rand.NewPCG(uint64(ci), 7)))
			var total float64
			for i := range posts {
				exact := pbtQuadProbBest(posts, i)
				total += exact
				se := math.Sqrt(exact * (1 - exact) / float64(res.Draws))
				if d := math.Abs(res.PBest[i] - exact); d > 3*se {
					t.Errorf("arm %d: MC P(best) %v, quadrature %v, |diff| %v > 3 SE %v", i, res.PBest[i], exact, d, 3*se)
				}
				wantLoss := pbtQuadExpectedLoss(posts, i)
				if d := math.Abs(res.ExpectedLoss[i] - wantLoss); d > 3*res.ExpectedLossStdErr[i] {
					t.Errorf("arm %d: MC expected loss %v, quadrature %v, |diff| %v > 3 SE %v",
						i, res.ExpectedLoss[i], wantLoss, d, 3*res.ExpectedLossStdErr[i])
				}
			}
			// The quadrature probabilities must themselves sum to 1.
			if math.Abs(total-1) > 1e-7 {
				t.Errorf("quadrature P(best) sums to %v", total)
			}
		})
	}
}

// pbtPoint is a point-mass posterior, used to force exact ties.
type pbtPoint float64

func (p pbtPoint) Mean() float64             { return float64(p) }
func (p pbtPoint) Quantile(float64) float64  { return float64(p) }
func (p pbtPoint) Sample(*rand.Rand) float64 { return float64(p) }

func TestProbBestTiesAndDeterminism(t *testing.T) {
	t.Run("ties go to lowest index", func(t *testing.T) {
		res := ProbBest([]Posterior{pbtPoint(0.1), pbtPoint(0.3), pbtPoint(0.3), pbtPoint(0.2)}, 100, rand.New(rand.NewPCG(1, 2)))
		want := []float64{0, 1, 0, 0}
		if !reflect.DeepEqual(res.PBest, want) {
			t.Errorf("PBest = %v, want %v", res.PBest, want)
		}
		wantLoss := []float64{0.3 - 0.1, 0, 0, 0.3 - 0.2}
		for i := range wantLoss {
			if math.Abs(res.ExpectedLoss[i]-wantLoss[i]) > 1e-12 {
				t.Errorf("ExpectedLoss[%d] = %v, want %v", i, res.ExpectedLoss[i], wantLoss[i])
			}
		}
	})
	t.Run("same seed same result", func(t *testing.T) {
		posts := pbtPosteriors([]BetaPosterior{{3, 8}, {2, 9}, {4, 7}})
		r1 := ProbBest(posts, 5000, rand.New(rand.NewPCG(42, 1)))
		r2 := ProbBest(posts, 5000, rand.New(rand.NewPCG(42, 1)))
		if !reflect.DeepEqual(r1, r2) {
			t.Error("same seed gave different results")
		}
		r3 := ProbBest(posts, 5000, rand.New(rand.NewPCG(43, 1)))
		if reflect.DeepEqual(r1.PBest, r3.PBest) {
			t.Error("different seeds gave identical P(best); randomness not used")
		}
	})
	t.Run("empty", func(t *testing.T) {
		res := ProbBest(nil, 10, rand.New(rand.NewPCG(1, 1)))
		if len(res.PBest) != 0 || res.Draws != 10 {
			t.Errorf("got %+v", res)
		}
	})
}
