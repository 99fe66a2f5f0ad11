package estimator

import (
	"math"

	"gonum.org/v1/gonum/interp"
)

// With auto, the non-parametric (histogram) delay family joins the
// average once the whole window has been observed (some clicks have
// matured or are at least 95% of the window old: windowObserved), so that delays no parametric family can follow (two waves of
// buyers, a lognormal body) do not leave a confidently wrong eventual
// rate when the data are plentiful. Before that the histogram family says
// nothing about conversions later than the oldest click's age, so it
// stays out.
//
// Its weight against the parametric average uses the Schwarz (BIC)
// approximation of the marginal likelihood, log Z ~ log L_max - (d/2) log n
// (Schwarz 1978, "Estimating the dimension of a model", Annals of
// Statistics 6:461-464; its use for model averaging: Raftery 1995,
// "Bayesian model selection in social research", Sociological
// Methodology 25:111-163): with dozens of hazards the histogram family
// needs a large gain in fit to earn weight, which a parametric family that
// fits does not leave it. Its posterior of q is the profile likelihood of
// q (hazards at their conditional maximum) with the Jeffreys prior: with
// the window observed and the data plentiful enough to earn weight, the
// hazards are well determined and profiling is close to integrating them.

// Settings of the histogram alternative.
const (
	// histMinConversions is the fewest conversions for which the histogram
	// family is considered.
	histMinConversions = 100
	// histMinLogOdds: below these log odds against the parametric average
	// the histogram family's posterior is not computed (weight < 1e-6).
	histMinLogOdds = -14
	// histProfilePoints and histProfileSpan: the profile likelihood is
	// evaluated at this many points over ± this many standard deviations
	// of logit q around its maximum, and interpolated by a natural cubic
	// spline.
	histProfilePoints = 15
	histProfileSpan   = 7.0
	// histQuickIter EM iterations first; a family then more than
	// histQuickMargin below histMinLogOdds is dropped.
	histQuickIter   = 3
	histQuickMargin = 30.0
	// histWindowSeen is the oldest pending age, as a share of the window,
	// from which the window counts as observed (windowObserved).
	histWindowSeen = 0.95
)

// histAlternative is the histogram family's fit, its log odds against the
// parametric average and, when worth it, its posterior of logit q.
type histAlternative struct {
	fit     *Fit
	logOdds float64
	// zlo and zhi bound the profile's points; spline interpolates the log
	// posterior density of z = logit q between them.
	zlo, zhi float64
	spline   *interp.NaturalCubic
}

// weight returns the histogram family's posterior probability against the
// parametric average.
func (h *histAlternative) weight() float64 {
	if h == nil {
		return 0
	}
	return 1 / (1 + math.Exp(-h.logOdds))
}

// logDensity returns the unnormalised log posterior density of z, -Inf
// outside the profiled range.
func (h *histAlternative) logDensity(z float64) float64 {
	if h.spline == nil || z < h.zlo || z > h.zhi {
		return math.Inf(-1)
	}
	return h.spline.Predict(z)
}

// windowObserved reports whether the data reach (nearly) every delay
// bin: some clicks have matured, or the oldest pending clicks are at least
// histWindowSeen of the window old, so the hazards of all bins but the
// last few have clicks at risk through them. (Pending ages are bucket
// midpoints, within Layout.AgeError/2 of their clicks' ages, so an exact
// "reached the last bin" test would hinge on the bucket grid.)
func windowObserved(p *prepared) bool {
	if p.matClicks > 0 {
		return true
	}
	for i, a := range p.ages {
		if a >= histWindowSeen*p.w && p.clicks[i] > 0 {
			return true
		}
	}
	return false
}

// histogramAlternative fits the histogram family to p, starting EM from
// the parametric fit best (its delay distribution laid on the bins), and
// returns it with its log odds against best; nil when the window has not
// been observed yet or there are too few conversions.
func histogramAlternative(p *prepared, d *FitData, best *Fit, pr Prior) *histAlternative {
	if best == nil || !windowObserved(p) || p.conv < histMinConversions {
		return nil
	}
	haz := make([]float64, len(p.h))
	for k := range haz {
		sLo, sHi := 1-best.CDF(p.edges[k]), 1-best.CDF(p.edges[k+1])
		haz[k] = 1
		if sLo > 0 {
			haz[k] = math.Min(math.Max(1-sHi/sLo, 0), 1)
		}
	}
	// EM's log-likelihood only rises, and by little after its first
	// iterations: when a short run leaves the histogram family far behind,
	// it stays out without running to convergence.
	run := &emRun{p: p, family: FamilyHistogram}
	penalty := func(f *Fit) float64 {
		return float64(f.Params-best.Params) / 2 * math.Log(d.TotalClicks())
	}
	par, ll, iters, conv := run.run(params{q: best.Q, haz: haz}, histQuickIter, 1e-10, nil)
	fit := run.assemble(d, par, ll, iters, conv)
	h := &histAlternative{fit: fit}
	if h.logOdds = (ll - best.LogLik) - penalty(fit); h.logOdds < histMinLogOdds-histQuickMargin {
		return h
	}
	if !conv {
		par, ll, iters, conv = run.run(par, DefaultFitMaxIter, 1e-10, nil)
		fit = run.assemble(d, par, ll, iters+histQuickIter, conv)
		h = &histAlternative{fit: fit, logOdds: (ll - best.LogLik) - penalty(fit)}
	}
	if h.logOdds < histMinLogOdds || !(par.q > 0 && par.q < 1) {
		return h
	}
	// Profile of logit q: curvature at the maximum, then points over ±
	// histProfileSpan standard deviations, each EM warm-started from its
	// neighbour.
	prof := func(z float64, warm []float64) (float64, []float64) {
		q := sigmoid(z)
		r := &emRun{p: p, family: FamilyHistogram, fixedQ: &q}
		pp, l, _, _ := r.run(params{q: q, haz: warm}, DefaultFitMaxIter, 1e-11, nil)
		return l + pr.QAlpha*logSigmoid(z) + pr.QBeta*logSigmoid(-z), pp.haz
	}
	z0 := logit(par.q)
	const step = 0.02
	f0, _ := prof(z0, par.haz)
	fp, _ := prof(z0+step, par.haz)
	fm, _ := prof(z0-step, par.haz)
	sd := 0.3
	if c2 := (fp - 2*f0 + fm) / (step * step); c2 < 0 {
		sd = 1 / math.Sqrt(-c2)
	}
	zs := linspace(z0-histProfileSpan*sd, z0+histProfileSpan*sd, histProfilePoints)
	vs := warmWalk(zs, len(zs)/2, par.haz, prof)
	var nc interp.NaturalCubic
	if err := nc.Fit(zs, vs); err != nil {
		return h
	}
	h.zlo, h.zhi, h.spline = zs[0], zs[len(zs)-1], &nc
	return h
}

// warmWalk returns at(x) for every x of xs, walking outwards from index
// mid in both directions so that each evaluation starts from the hazards
// its neighbour ended with (start for the first step each way): EM at
// neighbouring fixed q converges in a few iterations from there.
func warmWalk(xs []float64, mid int, start []float64, at func(x float64, warm []float64) (float64, []float64)) []float64 {
	out := make([]float64, len(xs))
	warm := start
	for i := mid; i < len(xs); i++ {
		out[i], warm = at(xs[i], warm)
	}
	warm = start
	for i := mid - 1; i >= 0; i-- {
		out[i], warm = at(xs[i], warm)
	}
	return out
}
