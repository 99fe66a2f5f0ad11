package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"sort"

	"gonum.org/v1/gonum/mat"
)

// Defaults of PosteriorOptions, applied by WithDefaults to zero fields.
const (
	// DefaultPosteriorQPoints is the default number of q grid points.
	DefaultPosteriorQPoints = 201
	// DefaultPosteriorDelayPoints is the default number of grid points per
	// delay-parameter axis.
	DefaultPosteriorDelayPoints = 13
	// DefaultPosteriorSpan is the default half-width of the delay-parameter
	// grid in standard errors.
	DefaultPosteriorSpan = 5.0
)

// PosteriorOptions controls LikelihoodPosterior.
type PosteriorOptions struct {
	// QPoints is the number of points of the q grid. Default:
	// DefaultPosteriorQPoints.
	QPoints int
	// DelayPoints is the number of grid points per delay-parameter axis
	// (exponential: log rate; Weibull: two axes along the principal axes of
	// the covariance of log shape and log scale). Default:
	// DefaultPosteriorDelayPoints.
	DelayPoints int
	// Span is the half-width of the delay-parameter grid in standard errors
	// around the maximum-likelihood estimate. Default: DefaultPosteriorSpan.
	Span float64
}

// WithDefaults returns o with every zero field set to its default.
func (o PosteriorOptions) WithDefaults() PosteriorOptions {
	if o.QPoints == 0 {
		o.QPoints = DefaultPosteriorQPoints
	}
	if o.DelayPoints == 0 {
		o.DelayPoints = DefaultPosteriorDelayPoints
	}
	if o.Span == 0 {
		o.Span = DefaultPosteriorSpan
	}
	return o
}

// Validate reports what is wrong with o, after defaults are applied.
func (o PosteriorOptions) Validate() error {
	o = o.WithDefaults()
	var errs []error
	if o.QPoints < 11 || o.QPoints > 100000 {
		errs = append(errs, fmt.Errorf("posterior options: q points %d must be in [11, 100000]", o.QPoints))
	}
	if o.DelayPoints < 3 || o.DelayPoints > 1000 {
		errs = append(errs, fmt.Errorf("posterior options: delay points %d must be in [3, 1000]", o.DelayPoints))
	}
	if !(o.Span > 0 && o.Span <= 50) {
		errs = append(errs, fmt.Errorf("posterior options: span %v must be in (0, 50]", o.Span))
	}
	return errors.Join(errs...)
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
}

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
func (g *GridPosterior) Sample(r *rand.Rand) float64 { return g.Quantile(r.Float64()) }

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
	return g, nil
}

// likGrid evaluates the binned log-likelihood on a grid of q values for a
// set of delay distributions.
type likGrid struct {
	p   *prepared
	run *emRun
}

// delayTerms returns sum_k h_k log(G(e_{k+1})-G(e_k)) and G(a_j) for every
// pending bin holding unconverted clicks, for distribution d.
func (lg *likGrid) delayTerms(d *delayDist, g []float64) float64 {
	p := lg.p
	a := 0.0
	if p.conv > 0 {
		d.logBinMasses(p.edges, lg.run.lm)
		for k, c := range p.h {
			if c > 0 {
				a += c * lg.run.lm[k]
			}
		}
	}
	i := 0
	for j, u := range p.unconv {
		if u > 0 {
			g[i] = d.cdf(p.ages[j])
			i++
		}
	}
	return a
}

// qTerms returns the q-dependent part of the log-likelihood given the
// delay terms (a, g) and the unconverted counts u.
func (lg *likGrid) qTerms(q, a float64, g, u []float64) float64 {
	p := lg.p
	ll := a
	if p.conv > 0 {
		ll += p.conv * math.Log(q)
	}
	for i, gi := range g {
		ll += u[i] * math.Log1p(-q*gi)
	}
	if p.matUnconv > 0 {
		ll += p.matUnconv * math.Log1p(-q)
	}
	return ll
}

// NewLikelihoodPosterior is NewLikelihoodPosteriorWithOptions with default
// options.
func NewLikelihoodPosterior(d *FitData, f *Fit) (*GridPosterior, error) {
	return NewLikelihoodPosteriorWithOptions(d, f, PosteriorOptions{})
}

// NewLikelihoodPosteriorWithOptions returns the posterior of the eventual conversion
// probability q computed from the binned likelihood itself, with a flat
// prior on q. f must be a fit of d with q estimated (FitModel without
// FixedQ); its family decides how the delay parameters are removed:
//
//   - exponential: integrated out on a grid over log rate, ±Span standard
//     errors around the MLE (flat prior on log rate);
//   - Weibull: integrated out on a 2-D grid over log shape and log scale,
//     laid along the principal axes of their covariance (flat prior on
//     both);
//   - histogram: dozens of hazards cannot be integrated on a grid, so the
//     profile likelihood is used instead: for each q the hazards are held
//     at their conditional MLE (EM with q fixed).
//
// The standard errors come from a finite-difference Hessian of the
// log-likelihood at the MLE. The q grid is centred on the MLE and widened
// until the density at its ends is below e^-25 of the centre's.
func NewLikelihoodPosteriorWithOptions(d *FitData, f *Fit, o PosteriorOptions) (*GridPosterior, error) {
	o = o.WithDefaults()
	if err := o.Validate(); err != nil {
		return nil, err
	}
	if f == nil {
		return nil, errors.New("likelihood posterior: nil fit")
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
	lg := &likGrid{p: p, run: &emRun{p: p, family: f.Family}}
	lg.run.logS = make([]float64, len(p.ages))
	lg.run.m = make([]float64, len(p.ages))
	lg.run.lm = make([]float64, len(p.h))

	var logPost func(q float64) float64
	var prepareAt func(qs []float64) []float64 // batch evaluation
	profile := false
	switch f.Family {
	case FamilyExponential, FamilyWeibull:
		dists := lg.delayGrid(f, o)
		u := make([]float64, 0, len(p.unconv))
		for _, v := range p.unconv {
			if v > 0 {
				u = append(u, v)
			}
		}
		as := make([]float64, len(dists))
		gs := make([][]float64, len(dists))
		for i := range dists {
			gs[i] = make([]float64, len(u))
			as[i] = lg.delayTerms(&dists[i], gs[i])
		}
		logPost = func(q float64) float64 {
			terms := make([]float64, len(dists))
			for i := range dists {
				terms[i] = lg.qTerms(q, as[i], gs[i], u)
			}
			return logSumExp(terms)
		}
		prepareAt = func(qs []float64) []float64 {
			out := make([]float64, len(qs))
			for i, q := range qs {
				out[i] = logPost(q)
			}
			return out
		}
	case FamilyHistogram:
		profile = true
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
		logPost = func(q float64) float64 {
			ll, _ := at(q, start.haz)
			return ll
		}
		prepareAt = func(qs []float64) []float64 {
			// Walk outwards from the MLE, warm-starting each point from its
			// neighbour.
			out := make([]float64, len(qs))
			c := sort.SearchFloat64s(qs, f.Q)
			warm := start.haz
			for i := c; i < len(qs); i++ {
				out[i], warm = at(qs[i], warm)
			}
			warm = start.haz
			for i := c - 1; i >= 0; i-- {
				out[i], warm = at(qs[i], warm)
			}
			return out
		}
	default:
		return nil, fmt.Errorf("likelihood posterior: fit has family %v", f.Family)
	}

	lo, hi := lg.qRange(f, logPost)
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
	g, err := newGridPosterior(qs, logp, profile)
	if err != nil {
		return nil, fmt.Errorf("likelihood posterior: %w", err)
	}
	return g, nil
}

// qRange returns the ends of the q grid: centred on the fit's q with a
// starting half-width of ten standard deviations of the delay-corrected
// Beta, each end moved out until the log-density there is 25 below the
// centre's (or it reaches 0 or 1).
func (lg *likGrid) qRange(f *Fit, logPost func(float64) float64) (float64, float64) {
	p := lg.p
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

// delayGrid returns the delay distributions at which the parametric
// family's parameters are integrated out: the MLE plus L*z for z on a
// regular grid in [-Span, Span]^dim, L the Cholesky factor of the
// parameters' covariance (log scale).
func (lg *likGrid) delayGrid(f *Fit, o PosteriorOptions) []delayDist {
	p := lg.p
	var theta []float64
	if f.Family == FamilyExponential {
		theta = []float64{math.Log(f.Rate)}
	} else {
		theta = []float64{math.Log(f.Shape), math.Log(f.Scale)}
	}
	dim := len(theta)
	build := func(th []float64) delayDist {
		if f.Family == FamilyExponential {
			return newParametric(FamilyExponential, 1, math.Exp(-th[0]), p.w)
		}
		return newParametric(FamilyWeibull, math.Exp(th[0]), math.Exp(th[1]), p.w)
	}
	chol := lg.delayCovariance(f, theta, build)
	z := linspace(-o.Span, o.Span, o.DelayPoints)
	var out []delayDist
	idx := make([]int, dim)
	th := make([]float64, dim)
	for {
		for i := range th {
			th[i] = theta[i]
			for j := 0; j <= i; j++ {
				th[i] += chol.At(i, j) * z[idx[j]]
			}
		}
		d := build(th)
		if !math.IsNaN(d.logFW) && !math.IsInf(d.logFW, 0) {
			out = append(out, d)
		}
		// Next grid index (odometer).
		k := 0
		for k < dim {
			idx[k]++
			if idx[k] < len(z) {
				break
			}
			idx[k] = 0
			k++
		}
		if k == dim {
			break
		}
	}
	return out
}

// delayCovariance returns the lower Cholesky factor of the covariance of
// the (log) delay parameters: the delay block of the inverse negative
// Hessian of the log-likelihood in (logit q, theta); if q is on the
// boundary or that matrix is not positive definite, the inverse of the
// delay block of the Hessian at fixed q; failing both, 0.3 on the log scale
// per parameter.
func (lg *likGrid) delayCovariance(f *Fit, theta []float64, build func([]float64) delayDist) *mat.TriDense {
	dim := len(theta)
	ll := func(x []float64) float64 {
		q := 1 / (1 + math.Exp(-x[0]))
		d := build(x[1:])
		return lg.run.loglik(q, &d)
	}
	x0 := append([]float64{logit(f.Q)}, theta...)
	n := len(x0)
	h := 1e-3
	hess := mat.NewSymDense(n, nil)
	f0 := ll(x0)
	x := make([]float64, n)
	at := func(i, j int, si, sj float64) float64 {
		copy(x, x0)
		x[i] += si * h
		x[j] += sj * h
		return ll(x)
	}
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			var v float64
			if i == j {
				v = (at(i, i, 1, 0) - 2*f0 + at(i, i, -1, 0)) / (h * h)
			} else {
				v = (at(i, j, 1, 1) - at(i, j, 1, -1) - at(i, j, -1, 1) + at(i, j, -1, -1)) / (4 * h * h)
			}
			hess.SetSym(i, j, -v)
		}
	}
	fallback := func() *mat.TriDense {
		t := mat.NewTriDense(dim, mat.Lower, nil)
		for i := 0; i < dim; i++ {
			t.SetTri(i, i, 0.3)
		}
		return t
	}
	valid := func(m mat.Symmetric) bool {
		r, _ := m.Dims()
		for i := 0; i < r; i++ {
			for j := 0; j < r; j++ {
				if v := m.At(i, j); math.IsNaN(v) || math.IsInf(v, 0) {
					return false
				}
			}
		}
		return true
	}
	cholOf := func(cov *mat.SymDense) *mat.TriDense {
		var c mat.Cholesky
		if !valid(cov) || !c.Factorize(cov) {
			return nil
		}
		var l mat.TriDense
		c.LTo(&l)
		return &l
	}
	if f.Q > 0 && f.Q < 1 && valid(hess) {
		var c mat.Cholesky
		if c.Factorize(hess) {
			var inv mat.SymDense
			if err := c.InverseTo(&inv); err == nil {
				block := mat.NewSymDense(dim, nil)
				for i := 0; i < dim; i++ {
					for j := i; j < dim; j++ {
						block.SetSym(i, j, inv.At(i+1, j+1))
					}
				}
				if l := cholOf(block); l != nil {
					return l
				}
			}
		}
	}
	block := mat.NewSymDense(dim, nil)
	for i := 0; i < dim; i++ {
		for j := i; j < dim; j++ {
			block.SetSym(i, j, hess.At(i+1, j+1))
		}
	}
	var c mat.Cholesky
	if valid(block) && c.Factorize(block) {
		var inv mat.SymDense
		if err := c.InverseTo(&inv); err == nil {
			if l := cholOf(&inv); l != nil {
				return l
			}
		}
	}
	return fallback()
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
