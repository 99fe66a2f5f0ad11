package estimator

import (
	"errors"
	"fmt"
	"math"
	"slices"

	"gonum.org/v1/gonum/optimize"
)

// Defaults of FitOptions, applied by WithDefaults to zero fields.
const (
	// DefaultFitMaxIter is the default cap on EM iterations.
	DefaultFitMaxIter = 500
	// DefaultFitTol is the default relative change of the log-likelihood
	// between EM iterations below which the fit has converged.
	DefaultFitTol = 1e-9
)

// FitOptions controls FitModel.
type FitOptions struct {
	// Family is the delay family to fit. FamilyAuto fits the exponential,
	// Weibull and histogram families and keeps the lowest AIC.
	// Default: FamilyAuto.
	Family DelayFamily
	// FixedQ, when non-nil, holds the eventual conversion probability q at
	// *FixedQ (in [0, 1]) and fits only the delay distribution; with q = 1
	// and no truncation the histogram family is the Kaplan–Meier estimator.
	// Default: nil (q is estimated).
	FixedQ *float64
	// MaxIter caps the EM iterations per family. Default: DefaultFitMaxIter.
	MaxIter int
	// Tol is the convergence threshold on the relative change of the
	// log-likelihood, |ΔlogL| <= Tol*max(1, |logL|). Default: DefaultFitTol.
	Tol float64
	// Warm is an earlier fit of the same arm to start EM from (used by the
	// family it was fitted with; a histogram warm start also needs the same
	// delay edges). Default: nil (start from the observed data).
	Warm *Fit
}

// WithDefaults returns o with every zero field set to its default.
func (o FitOptions) WithDefaults() FitOptions {
	if o.MaxIter == 0 {
		o.MaxIter = DefaultFitMaxIter
	}
	if o.Tol == 0 {
		o.Tol = DefaultFitTol
	}
	return o
}

// Validate reports what is wrong with o, after defaults are applied.
func (o FitOptions) Validate() error {
	o = o.WithDefaults()
	var errs []error
	if o.Family < FamilyAuto || o.Family > FamilyHistogram {
		errs = append(errs, fmt.Errorf("fit options: unknown delay family %v", o.Family))
	}
	if o.FixedQ != nil && !(*o.FixedQ >= 0 && *o.FixedQ <= 1) {
		errs = append(errs, fmt.Errorf("fit options: fixed q %v must be in [0, 1]", *o.FixedQ))
	}
	if o.MaxIter < 1 {
		errs = append(errs, fmt.Errorf("fit options: max iterations %d must be positive", o.MaxIter))
	}
	if !(o.Tol > 0) || math.IsInf(o.Tol, 0) {
		errs = append(errs, fmt.Errorf("fit options: tolerance %v must be finite and positive", o.Tol))
	}
	return errors.Join(errs...)
}

// Fit is the fitted model of one arm: the eventual conversion probability q
// and the conversion-delay distribution G on [0, Window].
type Fit struct {
	// Family is the fitted delay family (never FamilyAuto).
	Family DelayFamily
	// Q is the eventual conversion probability: the probability that a click
	// converts within the attribution window.
	Q float64
	// Rate is the exponential family's rate per second (0 otherwise).
	Rate float64
	// Shape and Scale (seconds) are the Weibull family's parameters, or the
	// lognormal's sigma and median (0 otherwise).
	Shape, Scale float64
	// Edges (seconds) and Hazards are the histogram family's bins and
	// discrete hazards: Hazards[k] is the probability that a converter's
	// delay falls in bin k given that it is at least Edges[k] (nil
	// otherwise).
	Edges, Hazards []float64
	// Window is the attribution window W in seconds.
	Window float64
	// MeanDelay is the mean conversion delay of converters in seconds,
	// E[D | D <= W].
	MeanDelay float64
	// LogLik is the maximised binned log-likelihood and Params the number of
	// free parameters it was maximised over; AIC = 2*Params - 2*LogLik.
	LogLik float64
	Params int
	AIC    float64
	// Iterations is the number of EM iterations run, and Converged whether
	// the tolerance was met within FitOptions.MaxIter.
	Iterations int
	Converged  bool
	// Clicks and Conversions are the arm's totals.
	Clicks, Conversions float64
	// RipeClicks is the number of clicks weighted by the probability that
	// their conversion, if any, would have been seen by now: the sum over
	// pending bins of Clicks*G(Age), plus the matured clicks.
	RipeClicks float64

	dist delayDist
}

// CDF returns G(a), the fitted probability that a converter's delay is at
// most a seconds (0 below zero, 1 from the window on).
func (f *Fit) CDF(a float64) float64 { return f.dist.cdf(a) }

// MeanDelayHours returns MeanDelay in hours.
func (f *Fit) MeanDelayHours() float64 { return f.MeanDelay / 3600 }

// DelayCorrectedBeta returns the delay-corrected Beta posterior of the arm,
// Beta(Conversions+1, max(RipeClicks-Conversions, 0)+1).
func (f *Fit) DelayCorrectedBeta() (BetaPosterior, error) {
	b, err := NewDelayCorrectedBeta(f.RipeClicks, f.Conversions)
	if err != nil {
		return BetaPosterior{}, fmt.Errorf("fit %s: %w", f.Family, err)
	}
	return b, nil
}

// prepared is FitData checked and laid out for the EM loops.
type prepared struct {
	w     float64
	edges []float64
	h     []float64 // conversions per delay bin
	conv  float64   // total conversions, sum of h
	// Pending bins (all of them, for RipeClicks) and the unconverted clicks
	// of each; bin and frac locate each age in the delay histogram.
	ages, clicks, unconv []float64
	bin                  []int
	frac                 []float64
	matClicks, matUnconv float64
	n                    float64   // conv + sum(unconv) + matUnconv
	meanObs              float64   // mean observed delay, seconds
	lastConvBin          int       // highest delay bin holding a conversion, -1 if none
	byBin                [][]int   // pending bins whose age lies strictly inside each delay bin
	logEdges, logAges    []float64 // log of each edge and age (-Inf at 0), for the Weibull M-step
}

// prepare validates d and lays it out for fitting.
func prepare(d *FitData) (*prepared, error) {
	w := d.Window
	if !(w > 0) || math.IsInf(w, 0) {
		return nil, fmt.Errorf("fit data: window %v must be finite and positive", w)
	}
	e := d.Delays.Edges
	if len(e) < 2 || e[0] != 0 || math.Abs(e[len(e)-1]-w) > 1e-9*w {
		return nil, fmt.Errorf("fit data: delay edges must run from 0 to the window %v (got %d edges)", w, len(e))
	}
	for i := 1; i < len(e); i++ {
		if !(e[i] > e[i-1]) {
			return nil, fmt.Errorf("fit data: delay edges must increase (edge %d = %v after %v)", i, e[i], e[i-1])
		}
	}
	if len(d.Delays.Counts) != len(e)-1 {
		return nil, fmt.Errorf("fit data: %d delay counts for %d bins", len(d.Delays.Counts), len(e)-1)
	}
	p := &prepared{w: w, edges: slices.Clone(e), lastConvBin: -1}
	p.edges[len(e)-1] = w
	p.h = make([]float64, len(e)-1)
	mids := 0.0
	for k, c := range d.Delays.Counts {
		if !countOK(c) {
			return nil, fmt.Errorf("fit data: delay count %v in bin %d", c, k)
		}
		p.h[k] = c
		p.conv += c
		mids += c * (e[k] + e[k+1]) / 2
		if c > 0 {
			p.lastConvBin = k
		}
	}
	switch {
	case d.Delays.Count > 0 && d.Delays.Sum >= 0 && !math.IsInf(d.Delays.Sum, 0):
		p.meanObs = d.Delays.Sum / d.Delays.Count
	case p.conv > 0:
		p.meanObs = mids / p.conv
	}
	if !(p.meanObs > 0) {
		p.meanObs = w / 10
	}
	p.meanObs = math.Min(math.Max(p.meanObs, w*1e-6), w)
	for i, b := range d.Pending {
		if !(b.Age >= 0 && b.Age < w) {
			return nil, fmt.Errorf("fit data: pending bin %d has age %v outside [0, %v)", i, b.Age, w)
		}
		if !countOK(b.Clicks) || !countOK(b.Converted) {
			return nil, fmt.Errorf("fit data: pending bin %d has clicks %v, converted %v", i, b.Clicks, b.Converted)
		}
		u := math.Max(b.Clicks-b.Converted, 0)
		if b.Age == 0 {
			// G(0) = 0: such clicks have likelihood 1 whatever the
			// parameters. Leaving them out changes nothing but EM's speed.
			u = 0
		}
		k, f := binOf(p.edges, b.Age)
		p.ages = append(p.ages, b.Age)
		p.clicks = append(p.clicks, b.Clicks)
		p.unconv = append(p.unconv, u)
		p.bin = append(p.bin, k)
		p.frac = append(p.frac, f)
		p.n += u
	}
	p.logEdges = make([]float64, len(p.edges))
	for i, e := range p.edges {
		p.logEdges[i] = math.Log(e)
	}
	p.logAges = make([]float64, len(p.ages))
	for j, a := range p.ages {
		p.logAges[j] = math.Log(a)
	}
	p.byBin = make([][]int, len(p.h))
	for j, k := range p.bin {
		if p.frac[j] > 0 && p.unconv[j] > 0 {
			p.byBin[k] = append(p.byBin[k], j)
		}
	}
	if !countOK(d.MaturedClicks) || !countOK(d.MaturedConversions) {
		return nil, fmt.Errorf("fit data: matured clicks %v, conversions %v", d.MaturedClicks, d.MaturedConversions)
	}
	p.matClicks = d.MaturedClicks
	p.matUnconv = math.Max(d.MaturedClicks-d.MaturedConversions, 0)
	p.n += p.conv + p.matUnconv
	return p, nil
}

func countOK(x float64) bool { return x >= 0 && !math.IsInf(x, 0) }

// params are the model parameters EM iterates on.
type params struct {
	q    float64
	k, s float64   // parametric families (exponential: k = 1, s = 1/rate)
	haz  []float64 // histogram family
}

// Bounds on the parametric delay parameters, keeping the M-step finite when
// the data push a parameter to its edge (for example every conversion in
// one bin).
const (
	minShape     = 0.05
	maxShape     = 20
	minScaleLogW = -25 // log(scale/W) bounds
	maxScaleLogW = 15
)

// emRun is one family's EM state.
type emRun struct {
	p      *prepared
	family DelayFamily
	fixedQ *float64
	// zeroTail applies the zero-tail constraint of the non-parametric
	// mixture-cure model: with q free and no click observed for a whole
	// window, mass beyond the last observed delay is confounded with q, so
	// the histogram latency ends at the last bin holding a conversion.
	zeroTail bool

	logS []float64 // log(1-G(a_j)) per pending bin
	m    []float64 // expected would-be converters per pending bin (E-step)
	lm   []float64 // log bin masses
}

// dist builds the delay distribution of par.
func (r *emRun) dist(par params) delayDist {
	switch r.family {
	case FamilyHistogram:
		return newHistogramDist(r.p.edges, par.haz)
	case FamilyLognormal:
		return newLognormal(par.k, par.s, r.p.w)
	}
	return newParametric(r.family, par.k, par.s, r.p.w)
}

// loglik returns the binned log-likelihood of (q, d) and fills r.logS:
//
//	sum_k h_k log(q (G(e_{k+1})-G(e_k))) + sum_j u_j log(1 - q G(a_j)) + U log(1-q)
//
// with 0*log(0) = 0.
func (r *emRun) loglik(q float64, d *delayDist) float64 {
	p := r.p
	ll := 0.0
	if p.conv > 0 {
		ll += p.conv * math.Log(q)
		d.logBinMasses(p.edges, r.lm)
		for k, c := range p.h {
			if c > 0 {
				ll += c * r.lm[k]
			}
		}
	}
	for j, u := range p.unconv {
		if d.family == FamilyHistogram {
			r.logS[j] = d.logSurvBin(p.bin[j], p.frac[j])
		} else {
			r.logS[j] = d.logSurv(p.ages[j])
		}
		if u > 0 {
			g := -math.Expm1(r.logS[j])
			ll += u * math.Log1p(-q*g)
		}
	}
	if p.matUnconv > 0 {
		ll += p.matUnconv * math.Log1p(-q)
	}
	return ll
}

// eStep fills r.m with the expected number of each pending bin's
// unconverted clicks that will still convert, u_j * w_j with
// w_j = q(1-G(a_j)) / (1 - q G(a_j)), and returns their sum.
func (r *emRun) eStep(q float64) float64 {
	sum := 0.0
	for j, u := range r.p.unconv {
		r.m[j] = 0
		if u == 0 || q == 0 {
			continue
		}
		s := math.Exp(r.logS[j])
		den := 1 - q + q*s
		if den > 0 {
			r.m[j] = u * q * s / den
		}
		sum += r.m[j]
	}
	return sum
}

// mStep returns the parameters maximising the expected complete-data
// log-likelihood given the E-step weights in r.m.
func (r *emRun) mStep(par params, mSum float64) params {
	p := r.p
	next := par
	if r.fixedQ == nil && p.n > 0 {
		next.q = math.Min((p.conv+mSum)/p.n, 1)
	}
	a := p.conv + mSum // expected number of converters with delay information
	if a == 0 {
		return next
	}
	switch r.family {
	case FamilyExponential:
		next.s = 1 / r.exponentialRate(1/par.s, a)
	case FamilyWeibull:
		next.k, next.s = r.weibullMStep(par.k, par.s, a)
	case FamilyHistogram:
		next.haz = r.histogramMStep()
	}
	return next
}

// exponentialRate is the closed-form M-step of the exponential family. The
// delays are interval-censored (bins, and (a_j, W] for would-be converters)
// and truncated at W; following Dempster, Laird & Rubin (1977, truncated
// data), the complete data add, before each accepted delay, a geometric
// number of latent draws beyond W (mean p/(1-p), p = exp(-rate*W)), each
// with expected value W + 1/rate by memorylessness. The complete data are
// then untruncated exact exponential draws, whose rate MLE is count/sum:
//
//	rate' = a/(1-p) / (sum_k h_k E[D | bin k] + sum_j m_j E[D | a_j < D <= W] + a p/(1-p) (W + 1/rate))
func (r *emRun) exponentialRate(rate, a float64) float64 {
	p := r.p
	t := 0.0
	for k, c := range p.h {
		if c > 0 {
			t += c * (p.edges[k] + condMeanBelow(rate, p.edges[k+1]-p.edges[k]))
		}
	}
	for j, m := range r.m {
		if m > 0 {
			t += m * (p.ages[j] + condMeanBelow(rate, p.w-p.ages[j]))
		}
	}
	odds := 1 / math.Expm1(rate*p.w) // p/(1-p)
	t += a * odds * (p.w + 1/rate)
	next := a * (1 + odds) / t
	lo, hi := 1/(p.w*math.Exp(maxScaleLogW)), 1/(p.w*math.Exp(minScaleLogW))
	if !(next > 0) || math.IsNaN(next) {
		return rate
	}
	return math.Min(math.Max(next, lo), hi)
}

// condMeanBelow returns E[Y | Y < b] for Y exponential with the given rate:
// 1/rate - b/(exp(rate*b)-1), written as b*phi(rate*b) to stay accurate for
// small rate*b.
func condMeanBelow(rate, b float64) float64 {
	x := rate * b
	if x < 1e-4 {
		return b * (0.5 - x/12)
	}
	return b * (1/x - 1/math.Expm1(x))
}

// weibullMStep maximises the weighted latency log-likelihood
//
//	sum_k h_k log(G(e_{k+1})-G(e_k)) + sum_j m_j log(1-G(a_j))
//
// over log shape and log scale with BFGS (gonum/optimize), starting from the
// current parameters; it never returns a point worse than the start.
func (r *emRun) weibullMStep(k0, s0, a float64) (float64, float64) {
	p := r.p
	logW := math.Log(p.w)
	lo := []float64{math.Log(minShape), logW + minScaleLogW}
	hi := []float64{math.Log(maxShape), logW + maxScaleLogW}
	x0 := []float64{math.Log(k0), math.Log(s0)}
	obj := func(grad, x []float64) float64 {
		// Evaluate inside the box and add a quadratic penalty outside it.
		var xc [2]float64
		pen := 0.0
		for i := range xc {
			xc[i] = math.Min(math.Max(x[i], lo[i]), hi[i])
			pen += (x[i] - xc[i]) * (x[i] - xc[i])
		}
		v := -r.weibullLatency(xc[0], xc[1], grad) / a
		for i := range grad {
			grad[i] = -grad[i]/a + 2*(x[i]-xc[i])
		}
		return v + pen
	}
	// BFGS asks for the value and the gradient at the same points; compute
	// both in one pass and remember the last point.
	var lastX [2]float64
	var lastF float64
	var lastG [2]float64
	have := false
	eval := func(x []float64) {
		if have && x[0] == lastX[0] && x[1] == lastX[1] {
			return
		}
		lastF = obj(lastG[:], x)
		lastX[0], lastX[1], have = x[0], x[1], true
	}
	prob := optimize.Problem{
		Func: func(x []float64) float64 { eval(x); return lastF },
		Grad: func(g, x []float64) { eval(x); copy(g, lastG[:]) },
	}
	f0 := prob.Func(x0)
	settings := &optimize.Settings{
		GradientThreshold: 1e-10,
		MajorIterations:   200,
		Converger:         &optimize.FunctionConverge{Absolute: 1e-13, Relative: 1e-13, Iterations: 3},
	}
	res, err := optimize.Minimize(prob, x0, settings, &optimize.BFGS{})
	// A failed line search still reports the best point found; keep it
	// only when it improves on the start.
	if res == nil || !(res.F < f0) || (err != nil && math.IsNaN(res.F)) {
		return k0, s0
	}
	rho := math.Min(math.Max(res.X[0], lo[0]), hi[0])
	sig := math.Min(math.Max(res.X[1], lo[1]), hi[1])
	return math.Exp(rho), math.Exp(sig)
}

// weibullLatency returns the weighted latency log-likelihood at log shape
// rho and log scale sig, and its gradient into grad when grad is non-nil.
func (r *emRun) weibullLatency(rho, sig float64, grad []float64) float64 {
	p := r.p
	k := math.Exp(rho)
	// cum returns x = (a/s)^k and its derivatives in rho and sig, given
	// log a.
	cum := func(loga float64) (x, dr, ds float64) {
		if math.IsInf(loga, -1) {
			return 0, 0, 0
		}
		lx := k * (loga - sig)
		x = math.Exp(lx)
		return x, x * lx, -k * x
	}
	var gr, gs float64
	// term adds weight*log(F(hi)-F(lo)) = weight*(-xlo + log(1-exp(-dx))).
	term := func(wt, xl, rl, sl, xh, rh, sh float64) float64 {
		e := math.Expm1(-(xh - xl)) // -(1-exp(-dx))
		if grad != nil {
			c := -(1 + e) / e // 1/(exp(dx)-1)
			gr += wt * (-rl + (rh-rl)*c)
			gs += wt * (-sl + (sh-sl)*c)
		}
		return wt * (-xl + math.Log(-e))
	}
	xW, rW, sW := cum(p.logEdges[len(p.edges)-1])
	total := 0.0
	v := 0.0
	xl, rl, sl := 0.0, 0.0, 0.0
	for i, c := range p.h {
		xh, rh, sh := xW, rW, sW
		if i+1 < len(p.edges)-1 {
			xh, rh, sh = cum(p.logEdges[i+1])
		}
		if c > 0 {
			v += term(c, xl, rl, sl, xh, rh, sh)
			total += c
		}
		xl, rl, sl = xh, rh, sh
	}
	for j, m := range r.m {
		if m > 0 {
			xa, ra, sa := cum(p.logAges[j])
			v += term(m, xa, ra, sa, xW, rW, sW)
			total += m
		}
	}
	// Truncation: every delay is conditioned on D <= W.
	v -= total * math.Log(-math.Expm1(-xW))
	if grad != nil {
		c := total / math.Expm1(xW)
		grad[0] = gr - c*rW
		grad[1] = gs - c*sW
	}
	return v
}

// histogramMStep maximises the weighted latency log-likelihood over the
// discrete hazards. It factorises by bin: bin k's hazard h maximises
//
//	D_k log h + R_k log(1-h) + sum_{j in bin k} m_j log(1 - h f_j),
//
// D_k the conversions in bin k, R_k the (weighted) converters known to pass
// bin k, f_j the position of age a_j inside bin k. With every f_j = 1 (or
// none) this is h = D_k/(D_k+R_k+M_k), the Kaplan–Meier hazard. The last
// bin's hazard is 1 (G(W) = 1). With q estimated and no click yet observed
// for a whole window, mass beyond the last observed delay cannot be told
// apart from a larger q, so the zero-tail constraint of the non-parametric
// mixture cure model (Taylor 1995, Biometrics 51:899-907; recalled from
// memory) ends the latency at the last bin holding a conversion.
func (r *emRun) histogramMStep() []float64 {
	p := r.p
	nb := len(p.h)
	haz := make([]float64, nb)
	inBin := make([]float64, nb) // weighted censored clicks located in each bin
	for j, m := range r.m {
		if m > 0 {
			inBin[p.bin[j]] += m
		}
	}
	last := nb - 1
	if r.zeroTail && p.lastConvBin >= 0 {
		last = p.lastConvBin
	}
	beyond := 0.0 // R_k: events and censored in bins after k
	for k := nb - 1; k >= 0; k-- {
		switch {
		case k >= last:
			haz[k] = boolHaz(k == last)
		default:
			haz[k] = r.binHazard(k, p.h[k], beyond)
		}
		beyond += p.h[k] + inBin[k]
	}
	return haz
}

// boolHaz is 1 for true and 0 for false.
func boolHaz(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// binHazard solves bin k's one-dimensional concave M-step problem by a
// safeguarded Newton iteration on its derivative.
func (r *emRun) binHazard(k int, d, rr float64) float64 {
	if d == 0 {
		return 0
	}
	p := r.p
	idx := p.byBin[k] // censored clicks ending part-way through bin k
	var mf float64
	for _, j := range idx {
		mf += r.m[j] * p.frac[j]
	}
	if mf == 0 {
		return d / (d + rr)
	}
	deriv := func(h float64) (g, gg float64) {
		g = d/h - rr/(1-h)
		gg = -d/(h*h) - rr/((1-h)*(1-h))
		for _, j := range idx {
			m, f := r.m[j], p.frac[j]
			den := 1 - h*f
			g -= m * f / den
			gg -= m * f * f / (den * den)
		}
		return g, gg
	}
	if rr == 0 {
		// At h = 1 the derivative is d - sum m f/(1-f); if still positive
		// the maximum is at the boundary.
		g1 := d
		for _, j := range idx {
			if p.frac[j] >= 1 {
				g1 = math.Inf(-1)
				break
			}
			g1 -= r.m[j] * p.frac[j] / (1 - p.frac[j])
		}
		if g1 >= 0 {
			return 1
		}
	}
	lo, hi := 0.0, 1.0
	h := d / (d + rr + mf) // Kaplan–Meier value, exact when every f = 1
	for range 100 {
		g, gg := deriv(h)
		if g > 0 {
			lo = h
		} else {
			hi = h
		}
		next := h - g/gg
		if !(next > lo && next < hi) {
			next = (lo + hi) / 2
		}
		if math.Abs(next-h) <= 1e-15*math.Max(h, 1e-300) || hi-lo <= 1e-15 {
			return next
		}
		h = next
	}
	return h
}

// initial returns the starting parameters of family for data p.
func (r *emRun) initial(warm *Fit) params {
	p := r.p
	par := params{k: 1, s: p.meanObs}
	if warm != nil && warm.Family == r.family {
		switch r.family {
		case FamilyExponential:
			if warm.Rate > 0 {
				par.s = 1 / warm.Rate
			}
		case FamilyWeibull:
			if warm.Shape > 0 && warm.Scale > 0 {
				par.k, par.s = warm.Shape, warm.Scale
			}
		}
	}
	if r.family == FamilyHistogram {
		if warm != nil && warm.Family == FamilyHistogram && slices.Equal(warm.Edges, p.edges) {
			par.haz = slices.Clone(warm.Hazards)
		} else {
			// Discretise the starting exponential onto the bins.
			d := newParametric(FamilyExponential, 1, par.s, p.w)
			par.haz = make([]float64, len(p.h))
			for k := range par.haz {
				lsLo, lsHi := d.logSurv(p.edges[k]), d.logSurv(p.edges[k+1])
				par.haz[k] = -math.Expm1(lsHi - lsLo)
			}
		}
	}
	switch {
	case r.fixedQ != nil:
		par.q = *r.fixedQ
	case warm != nil && warm.Q > 0 && warm.Q < 1:
		par.q = warm.Q
	default:
		d := r.dist(par)
		ripe := p.matClicks
		for j, a := range p.ages {
			ripe += p.clicks[j] * d.cdf(a)
		}
		par.q = 0.5
		if ripe > 0 {
			par.q = p.conv / ripe
		}
		par.q = math.Max(par.q, p.conv/p.n)
		if p.conv < p.n {
			par.q = math.Min(par.q, 1-1e-3)
		}
		par.q = math.Min(par.q, 1)
	}
	if p.conv == 0 && r.fixedQ == nil {
		// No conversion: the likelihood decreases in q, so q = 0.
		par.q = 0
	}
	return par
}

// run iterates EM from par until the log-likelihood's relative change falls
// below tol or maxIter iterations have run. trace, if non-nil, receives the
// log-likelihood before each iteration and at the end.
func (r *emRun) run(par params, maxIter int, tol float64, trace *[]float64) (params, float64, int, bool) {
	p := r.p
	r.logS = make([]float64, len(p.ages))
	r.m = make([]float64, len(p.ages))
	r.lm = make([]float64, len(p.h))
	if r.family == FamilyHistogram {
		par.haz = slices.Clone(par.haz)
	}
	d := r.dist(par)
	ll := r.loglik(par.q, &d)
	if trace != nil {
		*trace = append(*trace, ll)
	}
	if p.n == 0 || (p.conv == 0 && r.fixedQ == nil) {
		// Nothing to learn about the delays (no clicks or no conversions):
		// q is 0 (or fixed) and the delay parameters stay at their start.
		return par, ll, 0, true
	}
	for it := 1; it <= maxIter; it++ {
		mSum := r.eStep(par.q)
		next := r.mStep(par, mSum)
		d = r.dist(next)
		nll := r.loglik(next.q, &d)
		if trace != nil {
			*trace = append(*trace, nll)
		}
		if math.IsNaN(nll) {
			return par, ll, it, false
		}
		done := math.Abs(nll-ll) <= tol*math.Max(1, math.Abs(nll))
		par, ll = next, nll
		if done {
			// Refresh logS for the returned parameters (already done by
			// loglik) and report.
			return par, ll, it, true
		}
	}
	return par, ll, maxIter, false
}

// FitModel fits the window model to one arm's binned data by EM.
//
// Model: a click converts within the attribution window W with probability
// q; a converter's delay D has CDF G on [0, W] (for the parametric families
// the untruncated distribution truncated at W, G(a) = F(a)/F(W); as W grows
// this is the mixture cure model). A pending unconverted click of age a
// contributes 1 - q G(a) (right-censoring), a conversion in delay bin k
// contributes q (G(e_{k+1}) - G(e_k)), a matured unconverted click 1 - q.
// Every family uses this binned likelihood, so their AICs are comparable
// (the exact delay sum in FitData is used only to start EM).
//
// EM (the mixture-cure EM of Peng & Dear 2000 and Sy & Taylor 2000): the
// E-step gives each pending bin's unconverted clicks the probability
// w_j = q(1-G(a_j)) / (1-q G(a_j)) of converting later; the M-step sets
// q = (conversions + sum_j u_j w_j) / clicks and maximises the weighted
// latency likelihood sum_k h_k log(G(e_{k+1})-G(e_k)) + sum_j u_j w_j
// log(1-G(a_j)) over the delay parameters: in closed form for the
// exponential (latent draws beyond W, see exponentialRate), by BFGS for the
// Weibull, bin by bin for the histogram (see histogramMStep). The
// log-likelihood never decreases from one iteration to the next.
//
// FitModel returns an error only for invalid data or options; degenerate
// data (no clicks, no conversions, every click matured or converted) give
// a finite fit, with q = 0 when nothing converted and q = C/N exactly when
// every click has matured.
func FitModel(d *FitData, o FitOptions) (*Fit, error) {
	o = o.WithDefaults()
	if err := o.Validate(); err != nil {
		return nil, err
	}
	p, err := prepare(d)
	if err != nil {
		return nil, fmt.Errorf("fit model: %w", err)
	}
	if o.Family != FamilyAuto {
		return fitFamily(p, d, o.Family, o, nil), nil
	}
	expo := fitFamily(p, d, FamilyExponential, o, nil)
	wo := o
	if o.Warm == nil || o.Warm.Family != FamilyWeibull {
		wo.Warm = &Fit{Family: FamilyWeibull, Q: expo.Q, Shape: 1, Scale: 1 / expo.Rate}
	}
	weib := fitFamily(p, d, FamilyWeibull, wo, nil)
	hist := fitFamily(p, d, FamilyHistogram, o, nil)
	best := expo
	for _, f := range []*Fit{weib, hist} {
		if f.AIC < best.AIC {
			best = f
		}
	}
	return best, nil
}

// fitFamily runs EM for one family and assembles the Fit.
func fitFamily(p *prepared, d *FitData, family DelayFamily, o FitOptions, trace *[]float64) *Fit {
	r := &emRun{p: p, family: family, fixedQ: o.FixedQ}
	r.zeroTail = family == FamilyHistogram && o.FixedQ == nil && p.matClicks == 0
	par := r.initial(o.Warm)
	par, ll, iters, conv := r.run(par, o.MaxIter, o.Tol, trace)
	return r.assemble(d, par, ll, iters, conv)
}

// assemble builds the Fit of parameters par.
func (r *emRun) assemble(d *FitData, par params, ll float64, iters int, conv bool) *Fit {
	p := r.p
	dist := r.dist(par)
	f := &Fit{
		Family:      r.family,
		Q:           par.q,
		Window:      p.w,
		LogLik:      ll,
		Iterations:  iters,
		Converged:   conv,
		Clicks:      d.TotalClicks(),
		Conversions: d.TotalConversions(),
		dist:        dist,
	}
	switch r.family {
	case FamilyExponential:
		f.Rate = 1 / par.s
		f.Params = 1
	case FamilyWeibull, FamilyLognormal:
		f.Shape, f.Scale = par.k, par.s
		f.Params = 2
	case FamilyHistogram:
		f.Edges = slices.Clone(p.edges)
		f.Hazards = slices.Clone(dist.haz)
		for k, c := range p.h {
			if c > 0 && !(r.zeroTail && k == p.lastConvBin) {
				f.Params++
			}
		}
	}
	if r.fixedQ == nil {
		f.Params++
	}
	f.AIC = 2*float64(f.Params) - 2*ll
	f.MeanDelay = dist.mean()
	f.RipeClicks = p.matClicks
	for j, a := range p.ages {
		f.RipeClicks += p.clicks[j] * dist.cdf(a)
	}
	return f
}
