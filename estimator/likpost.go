package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"sort"
)

// DefaultPosteriorQPoints is the default number of q grid points of the
// histogram family's profile posterior.
const DefaultPosteriorQPoints = 201

// PosteriorOptions controls NewLikelihoodPosteriorWithOptions.
type PosteriorOptions struct {
	// QPoints is the number of points of the q grid. Default:
	// DefaultPosteriorQPoints.
	QPoints int
}

// WithDefaults returns o with every zero field set to its default.
func (o PosteriorOptions) WithDefaults() PosteriorOptions {
	if o.QPoints == 0 {
		o.QPoints = DefaultPosteriorQPoints
	}
	return o
}

// Validate reports what is wrong with o, after defaults are applied.
func (o PosteriorOptions) Validate() error {
	o = o.WithDefaults()
	if o.QPoints < 11 || o.QPoints > 100000 {
		return fmt.Errorf("posterior options: q points %d must be in [11, 100000]", o.QPoints)
	}
	return nil
}

// GridPosterior is a posterior of the eventual conversion probability q
// tabulated on a grid: the density is linear between grid points. It
// implements Posterior.
type GridPosterior struct {
	// Q is the increasing grid of q values and Density the normalised
	// posterior density at each of them.
	Q, Density []float64
	// CDF[i] is the posterior probability of q <= Q[i] (CDF[0] = 0, last 1).
	CDF []float64
	// Profile reports that the delay parameters were profiled out (held at
	// their conditional maximum for each q) rather than integrated out.
	Profile bool

	mean float64
	// inv tabulates the quantile function at the midpoints of invSize
	// equal slices of probability, for fast sampling.
	inv []float64
}

// invSize is the number of quantiles tabulated for sampling.
const invSize = 1024

var _ Posterior = (*GridPosterior)(nil)

// Mean is the posterior mean of q.
func (g *GridPosterior) Mean() float64 { return g.mean }

// Quantile returns the p-quantile of q, inverting the CDF exactly for the
// piecewise-linear density.
func (g *GridPosterior) Quantile(p float64) float64 {
	n := len(g.Q)
	switch {
	case !(p > 0):
		return g.Q[0]
	case p >= 1:
		return g.Q[n-1]
	}
	i := sort.SearchFloat64s(g.CDF, p) // first CDF >= p, 1 <= i <= n-1
	i = max(1, min(i, n-1))
	x0, h := g.Q[i-1], g.Q[i]-g.Q[i-1]
	d0, d1 := g.Density[i-1], g.Density[i]
	// Solve CDF[i-1] + h*(d0*t + (d1-d0)*t^2/2) = p for t in [0, 1].
	c := (p - g.CDF[i-1]) / h
	a := (d1 - d0) / 2
	var t float64
	if disc := d0*d0 + 4*a*c; disc > 0 && d0+math.Sqrt(disc) > 0 {
		t = 2 * c / (d0 + math.Sqrt(disc))
	} else {
		t = 0.5
	}
	return x0 + h*math.Min(math.Max(t, 0), 1)
}

// Sample draws q by inverting the CDF at a uniform draw from r.
// Draws in the central part are interpolated linearly between tabulated
// quantiles (the quantile function is smooth there); draws in the outer
// half-slices invert the CDF exactly.
func (g *GridPosterior) Sample(r *rand.Rand) float64 {
	u := r.Float64()
	x := u*invSize - 0.5
	if x < 0 || x >= invSize-1 || g.inv == nil {
		return g.Quantile(u)
	}
	i := int(x)
	f := x - float64(i)
	return g.inv[i] + f*(g.inv[i+1]-g.inv[i])
}

// Interval returns the equal-tailed credible interval of the given level
// (for example 0.95).
func (g *GridPosterior) Interval(level float64) (lo, hi float64) {
	return g.Quantile((1 - level) / 2), g.Quantile((1 + level) / 2)
}

// Interval95 returns the 95% equal-tailed credible interval of q.
func (g *GridPosterior) Interval95() (lo, hi float64) { return g.Interval(0.95) }

// newGridPosterior normalises log-densities logp on the grid q.
func newGridPosterior(q, logp []float64, profile bool) (*GridPosterior, error) {
	top := math.Inf(-1)
	for _, v := range logp {
		top = math.Max(top, v)
	}
	if math.IsInf(top, -1) || math.IsNaN(top) {
		return nil, errors.New("posterior: likelihood vanishes on the whole grid")
	}
	n := len(q)
	g := &GridPosterior{Q: q, Density: make([]float64, n), CDF: make([]float64, n), Profile: profile}
	for i, v := range logp {
		g.Density[i] = math.Exp(v - top)
	}
	var mass, first float64
	for i := 1; i < n; i++ {
		h := q[i] - q[i-1]
		mass += h * (g.Density[i-1] + g.Density[i]) / 2
		g.CDF[i] = mass
		first += h * (g.Density[i-1]*(2*q[i-1]+q[i]) + g.Density[i]*(q[i-1]+2*q[i])) / 6
	}
	for i := range g.Density {
		g.Density[i] /= mass
		g.CDF[i] /= mass
	}
	g.CDF[n-1] = 1
	g.mean = first / mass
	g.inv = make([]float64, invSize)
	for i := range g.inv {
		g.inv[i] = g.Quantile((float64(i) + 0.5) / invSize)
	}
	return g, nil
}

// NewLikelihoodPosterior returns the posterior of the eventual conversion
// probability q of data d for the delay family of fit f, with the default
// prior: for the exponential and Weibull families the delay parameters are
// integrated out over their whole prior support (ArmPosterior); for the
// histogram family see NewLikelihoodPosteriorWithOptions.
func NewLikelihoodPosterior(d *FitData, f *Fit) (*GridPosterior, error) {
	if f == nil {
		return nil, errors.New("likelihood posterior: nil fit")
	}
	if f.Family == FamilyHistogram {
		return NewLikelihoodPosteriorWithOptions(d, f, PosteriorOptions{})
	}
	ip, err := ArmPosterior(d, f.Family, Prior{}, nil)
	if err != nil {
		return nil, err
	}
	return ip.GridPosterior, nil
}

// ArmPosterior returns the posterior of the eventual conversion probability
// q of one arm's data under prior pr (zero fields take their defaults):
//
//   - FamilyExponential, FamilyWeibull, FamilyLognormal: the delay parameters integrated out
//     over their whole prior support (see integrate.go);
//   - FamilyAuto: the exponential, Weibull and lognormal posteriors averaged with
//     weights proportional to their marginal likelihoods (Bayesian model
//     averaging: Hoeting, Madigan, Raftery & Volinsky 1999, "Bayesian model
//     averaging: a tutorial", Statistical Science 14:382-417), instead of
//     a hard choice of one family; once the whole window has been observed,
//     the histogram family joins with its AICc weight (see histmix.go);
//   - FamilyHistogram: the profile posterior of the non-parametric family
//     (NewLikelihoodPosteriorWithOptions).
//
// warm, if non-nil, is an earlier fit of the same arm; only the histogram
// family's EM uses it.
func ArmPosterior(d *FitData, family DelayFamily, pr Prior, warm *Fit) (*IntegratedPosterior, error) {
	switch family {
	case FamilyAuto:
		return integratePosterior(d, []DelayFamily{FamilyExponential, FamilyWeibull, FamilyLognormal}, pr, true)
	case FamilyExponential, FamilyWeibull, FamilyLognormal:
		return integratePosterior(d, []DelayFamily{family}, pr, false)
	case FamilyHistogram:
		f, err := FitModel(d, FitOptions{Family: FamilyHistogram, Warm: warm})
		if err != nil {
			return nil, err
		}
		g, err := NewLikelihoodPosteriorWithOptions(d, f, PosteriorOptions{})
		if err != nil {
			return nil, err
		}
		return &IntegratedPosterior{
			GridPosterior: g,
			Median:        g.Quantile(0.5),
			Families:      []FamilyWeight{{Family: FamilyHistogram, Weight: 1, LogEvidence: math.NaN(), Fit: f}},
		}, nil
	}
	return nil, fmt.Errorf("arm posterior: unknown delay family %v", family)
}

// NewLikelihoodPosteriorWithOptions returns the profile posterior of q for
// a histogram-family fit f of d, with a flat prior on q: dozens of hazards
// cannot be integrated on a grid, so for each q the hazards are held at
// their conditional maximum (EM with q fixed). The q grid is centred on the
// MLE and widened until the density at its ends is below e^-25 of the
// centre's.
func NewLikelihoodPosteriorWithOptions(d *FitData, f *Fit, o PosteriorOptions) (*GridPosterior, error) {
	o = o.WithDefaults()
	if err := o.Validate(); err != nil {
		return nil, err
	}
	if f == nil {
		return nil, errors.New("likelihood posterior: nil fit")
	}
	if f.Family != FamilyHistogram {
		return nil, fmt.Errorf("likelihood posterior: profile posterior of family %v (want histogram; see ArmPosterior)", f.Family)
	}
	p, err := prepare(d)
	if err != nil {
		return nil, fmt.Errorf("likelihood posterior: %w", err)
	}
	if p.n == 0 {
		// No data: the flat prior.
		q := linspace(0, 1, o.QPoints)
		return newGridPosterior(q, make([]float64, len(q)), false)
	}
	run := &emRun{p: p, family: FamilyHistogram, zeroTail: p.matClicks == 0}
	start := params{q: f.Q, haz: slices.Clone(f.Hazards)}
	if len(start.haz) != len(p.h) {
		return nil, fmt.Errorf("likelihood posterior: histogram fit has %d hazards for %d bins", len(start.haz), len(p.h))
	}
	at := func(q float64, warm []float64) (float64, []float64) {
		qq := q
		run.fixedQ = &qq
		par, ll, _, _ := run.run(params{q: q, haz: warm}, 200, 1e-11, nil)
		return ll, par.haz
	}
	logPost := func(q float64) float64 {
		ll, _ := at(q, start.haz)
		return ll
	}
	prepareAt := func(qs []float64) []float64 {
		// Walk outwards from the MLE.
		return warmWalk(qs, sort.SearchFloat64s(qs, f.Q), start.haz, at)
	}
	lo, hi := qRange(p, f, logPost)
	qs := linspace(lo, hi, o.QPoints)
	logp := prepareAt(qs)
	// If the mass sits in a small part of the grid, tabulate that part
	// finely.
	top := math.Inf(-1)
	for _, v := range logp {
		top = math.Max(top, v)
	}
	first, last := 0, len(qs)-1
	for first < last && !(logp[first] > top-25) {
		first++
	}
	for last > first && !(logp[last] > top-25) {
		last--
	}
	first, last = max(first-1, 0), min(last+1, len(qs)-1)
	if last-first < len(qs)/2 {
		qs = linspace(qs[first], qs[last], o.QPoints)
		logp = prepareAt(qs)
	}
	g, err := newGridPosterior(qs, logp, true)
	if err != nil {
		return nil, fmt.Errorf("likelihood posterior: %w", err)
	}
	return g, nil
}

// qRange returns the ends of the q grid: centred on the fit's q with a
// starting half-width of ten standard deviations of the delay-corrected
// Beta, each end moved out until the log-density there is 25 below the
// centre's (or it reaches 0 or 1).
func qRange(p *prepared, f *Fit, logPost func(float64) float64) (float64, float64) {
	c := math.Min(math.Max(f.Q, 0), 1)
	a := p.conv + 1
	b := math.Max(f.RipeClicks-p.conv, 0) + 1
	sd := math.Sqrt(a * b / ((a + b) * (a + b) * (a + b + 1)))
	sd = math.Max(sd, 1e-9)
	ref := logPost(c)
	if math.IsInf(ref, -1) || math.IsNaN(ref) {
		// The MLE sits on an impossible boundary (for example q = 1 with
		// unconverted clicks): use a nearby interior point.
		c = math.Min(math.Max(c, sd), 1-sd)
		ref = logPost(c)
	}
	edge := func(dir float64) float64 {
		w := 10 * sd
		for range 60 {
			x := c + dir*w
			if x <= 0 {
				return 0
			}
			if x >= 1 {
				return 1
			}
			if v := logPost(x); !(v > ref-25) {
				return x
			}
			w *= 2
		}
		return math.Min(math.Max(c+dir*w, 0), 1)
	}
	return edge(-1), edge(1)
}

// logit returns log(q/(1-q)), clamped away from the boundaries.
func logit(q float64) float64 {
	q = math.Min(math.Max(q, 1e-12), 1-1e-12)
	return math.Log(q / (1 - q))
}

// logSumExp returns log(sum(exp(v))), -Inf for an empty or all -Inf v.
func logSumExp(v []float64) float64 {
	top := math.Inf(-1)
	for _, x := range v {
		if !math.IsNaN(x) {
			top = math.Max(top, x)
		}
	}
	if math.IsInf(top, -1) {
		return top
	}
	s := 0.0
	for _, x := range v {
		if !math.IsNaN(x) {
			s += math.Exp(x - top)
		}
	}
	return top + math.Log(s)
}

// linspace returns n evenly spaced points from lo to hi inclusive.
func linspace(lo, hi float64, n int) []float64 {
	out := make([]float64, n)
	for i := range out {
		out[i] = lo + (hi-lo)*float64(i)/float64(n-1)
	}
	out[n-1] = hi
	return out
}
