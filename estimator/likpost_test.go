package estimator

import (
	"math"
	"math/rand/v2"
	"sort"
	"testing"

	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
)

// binDirect bins observed clicks into FitData without an ArmState: pending
// clicks into the age bins ageEdges (each at the mean age of its clicks),
// delays into the layout's histogram edges.
func binDirect(obs []obsClick, w float64, edges, ageEdges []float64) *FitData {
	d := &FitData{Window: w, Delays: DelayBins{Edges: edges, Counts: make([]float64, len(edges)-1)}}
	type acc struct{ clicks, conv, ageSum float64 }
	bins := make([]acc, len(ageEdges)-1)
	for _, o := range obs {
		if o.converted {
			k, _ := binOf(edges, o.delay)
			d.Delays.Counts[k]++
			d.Delays.Count++
			d.Delays.Sum += o.delay
		}
		if o.age >= w {
			d.MaturedClicks++
			if o.converted {
				d.MaturedConversions++
			}
			continue
		}
		k := sort.SearchFloat64s(ageEdges, o.age)
		k = max(0, min(k-1, len(bins)-1))
		if o.age == ageEdges[k+1] && k+1 < len(bins) {
			k++
		}
		bins[k].clicks++
		bins[k].ageSum += o.age
		if o.converted {
			bins[k].conv++
		}
	}
	for _, b := range bins {
		if b.clicks > 0 {
			d.Pending = append(d.Pending, PendingBin{Age: b.ageSum / b.clicks, Clicks: b.clicks, Converted: b.conv})
		}
	}
	return d
}

// geomEdges returns 0 followed by n+1 log-spaced edges from lo to hi.
func geomEdges(lo, hi float64, n int) []float64 {
	out := []float64{0}
	for i := 0; i <= n; i++ {
		out = append(out, lo*math.Pow(hi/lo, float64(i)/float64(n)))
	}
	return out
}

// TestEarlyReplications checks, over seeded replications at an early as-of
// time when every click is still pending, that the eventual-rate estimate
// is unbiased while the observed rate is biased low, and that the
// likelihood posterior's 95% interval covers the truth at its nominal rate.
// The coverage band 93-97% is about ±2.9 binomial standard errors at 1000
// replications (sqrt(0.95*0.05/1000) = 0.69%).
func TestEarlyReplications(t *testing.T) {
	const (
		q      = 0.05
		rate   = 1 / daySec
		window = 7 * daySec
		span   = 3 * daySec // clicks over the first three days; as of day 3
		clicks = 5000
	)
	reps := 1000
	if testing.Short() {
		reps = 200
	}
	edges := Layout{}.DelayEdges()
	ageEdges := geomEdges(60, window, 40)
	var est, observed []float64
	covered := 0
	for i := range reps {
		r := rand.New(rand.NewPCG(1000+uint64(i), 77))
		obs := observe(simulate(r, clicks, span, q, truncExp(rate, window)), span)
		d := binDirect(obs, window, edges, ageEdges)
		f, err := FitModel(d, FitOptions{Family: FamilyExponential})
		if err != nil {
			t.Fatal(err)
		}
		post, err := NewLikelihoodPosterior(d, f)
		if err != nil {
			t.Fatal(err)
		}
		lo, hi := post.Interval95()
		if lo <= q && q <= hi {
			covered++
		}
		est = append(est, f.Q)
		observed = append(observed, d.TotalConversions()/d.TotalClicks())
	}
	n := float64(reps)
	mEst, sdEst := stat.MeanStdDev(est, nil)
	mObs, sdObs := stat.MeanStdDev(observed, nil)
	seEst, seObs := sdEst/math.Sqrt(n), sdObs/math.Sqrt(n)
	cov := float64(covered) / n
	t.Logf("%d reps: eventual %.5f (SE %.5f), observed %.5f (SE %.5f), truth %.3f; 95%% coverage %.3f",
		reps, mEst, seEst, mObs, seObs, q, cov)
	if math.Abs(mEst-q) >= 3*seEst {
		t.Errorf("mean eventual rate %.5f differs from %.3f by %.1f SE", mEst, q, math.Abs(mEst-q)/seEst)
	}
	if !(q-mObs > 3*seObs) {
		t.Errorf("observed rate %.5f not biased low by > 3 SE (SE %.5f)", mObs, seObs)
	}
	lo, hi := 0.93, 0.97
	if testing.Short() {
		lo, hi = 0.91, 0.98 // ±2 SE at 200 replications
	}
	if cov < lo || cov > hi {
		t.Errorf("95%% interval coverage %.3f outside [%.2f, %.2f]", cov, lo, hi)
	}
}

// TestPosteriorMaturedIsBeta checks the posterior against the conjugate
// result when every click has matured: the likelihood in q is then
// binomial, q^C (1-q)^(N-C), whatever the delay parameters, so under a
// Beta(a, b) prior the posterior is Beta(C+a, N-C+b) (e.g. Gelman et al.,
// Bayesian Data Analysis, 3rd ed., 2013, section 2.4): Beta(C+1/2,
// N-C+1/2) for the integrated posterior's Jeffreys prior, Beta(C+1,
// N-C+1) for the histogram family's profile posterior with its flat
// prior. Quantiles are compared with gonum's distuv.Beta.
func TestPosteriorMaturedIsBeta(t *testing.T) {
	r := rand.New(rand.NewPCG(31, 32))
	const window = 7 * daySec
	for _, c := range []struct {
		name   string
		n      int
		q      float64
		family DelayFamily
	}{
		{"exponential", 4000, 0.03, FamilyExponential},
		{"weibull", 1500, 0.2, FamilyWeibull},
		{"histogram", 800, 0.01, FamilyHistogram},
	} {
		t.Run(c.name, func(t *testing.T) {
			obs := observe(simulate(r, c.n, 2*daySec, c.q, truncWeibull(0.7, daySec, window)), 10*daySec)
			d := binDirect(obs, window, Layout{}.DelayEdges(), geomEdges(60, window, 30))
			if d.MaturedClicks != float64(c.n) {
				t.Fatalf("%v of %d clicks matured", d.MaturedClicks, c.n)
			}
			f, err := FitModel(d, FitOptions{Family: c.family})
			if err != nil {
				t.Fatal(err)
			}
			conv := d.TotalConversions()
			if f.Q != conv/float64(c.n) {
				t.Errorf("q = %v, want C/N = %v", f.Q, conv/float64(c.n))
			}
			var post Posterior
			prior := DefaultPriorQ
			if c.family == FamilyHistogram {
				post, err = NewLikelihoodPosteriorWithOptions(d, f, PosteriorOptions{QPoints: 401})
				prior = 1
			} else {
				post, err = ArmPosterior(d, c.family, Prior{}, nil)
			}
			if err != nil {
				t.Fatal(err)
			}
			ref := distuv.Beta{Alpha: conv + prior, Beta: float64(c.n) - conv + prior}
			sd := ref.StdDev()
			if math.Abs(post.Mean()-ref.Mean()) > 1e-3*sd {
				t.Errorf("mean %.6f, Beta mean %.6f", post.Mean(), ref.Mean())
			}
			for _, p := range []float64{0.025, 0.25, 0.5, 0.75, 0.975} {
				if got, want := post.Quantile(p), ref.Quantile(p); math.Abs(got-want) > 5e-3*sd {
					t.Errorf("quantile %v = %.6f, Beta %.6f", p, got, want)
				}
			}
			ref = distuv.Beta{Alpha: conv + 1, Beta: float64(c.n) - conv + 1}
			// The delay-corrected Beta agrees too: every click is ripe.
			b, err := f.DelayCorrectedBeta()
			if err != nil {
				t.Fatal(err)
			}
			if b.Alpha != ref.Alpha || b.Beta != ref.Beta {
				t.Errorf("delay-corrected Beta(%v, %v), want Beta(%v, %v)", b.Alpha, b.Beta, ref.Alpha, ref.Beta)
			}
		})
	}
}

// TestGridPosteriorMoments checks the grid posterior's mean and quantiles
// against quadrature of its own density (gonum quad), and that sampling is
// deterministic given the generator and follows the CDF.
func TestGridPosteriorMoments(t *testing.T) {
	r := rand.New(rand.NewPCG(41, 42))
	obs := observe(simulate(r, 5000, 4*daySec, 0.06, truncExp(1/daySec, 7*daySec)), 4*daySec)
	d := binDirect(obs, 7*daySec, Layout{}.DelayEdges(), geomEdges(60, 7*daySec, 40))
	for _, fam := range []DelayFamily{FamilyExponential, FamilyWeibull, FamilyHistogram} {
		t.Run(fam.String(), func(t *testing.T) {
			f, err := FitModel(d, FitOptions{Family: fam})
			if err != nil {
				t.Fatal(err)
			}
			g, err := NewLikelihoodPosterior(d, f)
			if err != nil {
				t.Fatal(err)
			}
			if g.Profile != (fam == FamilyHistogram) {
				t.Errorf("profile = %v", g.Profile)
			}
			dens := func(x float64) float64 {
				i := sort.SearchFloat64s(g.Q, x)
				if i == 0 {
					return g.Density[0]
				}
				if i >= len(g.Q) {
					return 0
				}
				u := (x - g.Q[i-1]) / (g.Q[i] - g.Q[i-1])
				return g.Density[i-1]*(1-u) + g.Density[i]*u
			}
			lo, hi := g.Q[0], g.Q[len(g.Q)-1]
			mass := quad.Fixed(dens, lo, hi, 4000, nil, 0)
			mean := quad.Fixed(func(x float64) float64 { return x * dens(x) }, lo, hi, 4000, nil, 0)
			// Gauss–Legendre over a density with a kink at every grid point
			// is accurate to about 1e-6 here, hence the 1e-5 tolerances.
			if math.Abs(mass-1) > 1e-5 || math.Abs(g.Mean()-mean) > 1e-5*mean {
				t.Errorf("mass %v, mean %v vs quadrature %v", mass, g.Mean(), mean)
			}
			for _, p := range []float64{0.025, 0.5, 0.975} {
				x := g.Quantile(p)
				if c := quad.Fixed(dens, lo, x, 4000, nil, 0); math.Abs(c-p) > 1e-5 {
					t.Errorf("CDF(Quantile(%v)) = %v", p, c)
				}
			}
			if !(g.Q[0] < f.Q && f.Q < g.Q[len(g.Q)-1]) {
				t.Errorf("MLE %v outside grid [%v, %v]", f.Q, g.Q[0], g.Q[len(g.Q)-1])
			}
			a := rand.New(rand.NewPCG(1, 2))
			b := rand.New(rand.NewPCG(1, 2))
			below := 0
			med := g.Quantile(0.5)
			for range 2000 {
				x, y := g.Sample(a), g.Sample(b)
				if x != y {
					t.Fatal("samples differ for equal seeds")
				}
				if x <= med {
					below++
				}
			}
			// Binomial(2000, 1/2): 4 SD = 89.
			if below < 1000-89 || below > 1000+89 {
				t.Errorf("%d of 2000 samples below the median", below)
			}
		})
	}
}
