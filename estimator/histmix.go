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
// Its weight against the parametric average is its Akaike weight
// (Akaike 1974, "A new look at the statistical model identification",
// IEEE Transactions on Automatic Control 19:716-723; Burnham & Anderson
// 2002, "Model Selection and Multimodel Inference", 2nd ed., section 2.9:
// w_i proportional to exp(-Delta_i/2), Delta_i the criterion's difference
// from the best model's), with the criterion corrected for small samples,
// AICc = -2 ll + 2 K n/(n - K - 1) (Sugiura 1978, "Further analysis of the
// data by Akaike's information criterion and the finite corrections",
// Communications in Statistics A 7:13-26; Hurvich & Tsai 1989,
// "Regression and time series model selection in small samples",
// Biometrika 76:297-307), K the free parameters and ll the maximised
// log-likelihood. The log odds of the histogram family against the
// parametric fit are therefore
//
//	(ll_hist - ll_param) - (c(K_hist) - c(K_param)),  c(K) = K n/(n-K-1)
//
// (histPenalty), which is Akaike's (ll_hist - ll_param) - (K_hist -
// K_param) once n is large against K. n is the number of conversions: the
// hazards are informed by the converters (seen, or latent among the
// pending clicks) at risk in each bin, about as many as the conversions,
// not by every click (Volinsky & Raftery 2000, "Bayesian information
// criterion for censored survival models", Biometrics 56:256-262,
// likewise count the events of censored data). Burnham & Anderson
// (section 2.4, recalled from memory) advise AICc whenever n/K is below
// about 40, which it is here: dozens of hazards against hundreds or
// thousands of conversions.
//
// The Schwarz (BIC) approximation used before, log Z ~ ll - (K/2) log n
// (Schwarz 1978, "Estimating the dimension of a model", Annals of
// Statistics 6:461-464), with n the clicks, charged each hazard (log n)/2,
// 4 to 7 log units from 5,000 to 500,000 clicks, where AICc charges
// n/(n-K-1): about 1.3 for 50 hazards on 200 conversions, 1.03 for 75 on
// 2,500. The unit-information prior behind it is far too wide a
// yardstick for a hazard that only the converters at risk in its bin
// inform. With two waves of buyers at one window it kept the histogram
// family out although no parametric family fitted, and the 95% interval
// of the eventual rate held the truth in 0.79, 0.61 and 0.86 of
// replicates at 30, 300 and 3,000 clicks per hour. With AICc: 0.91, 0.94
// and 0.94, the parametric truths' cells within 0.02 of before. Plain AIC
// covered as well (0.94, 0.95, 0.94) but at 30 clicks per hour let the
// histogram family in on fewer than 300 conversions, where its profile
// posterior sits high (eventual-rate error 0.0076 against 0.0056 with
// AICc and 0.0042 with BIC), and on Weibull and lognormal delays too (see
// DEVELOPERS.md for the grid).
//
// Its posterior of q is the profile likelihood of
// q (hazards at their conditional maximum) with the Jeffreys prior: with
// the window observed and the data plentiful enough to earn weight, the
// hazards are well determined and profiling is close to integrating them.

// Settings of the histogram alternative.
const (
	// histMinConversions is the fewest conversions for which the histogram
	// family is considered.
	histMinConversions = 100
	// histMinLogOdds: below these log odds against the parametric average
	// (weight < 1e-3) the histogram family's posterior is not computed and
	// it stays out. Leaving out a component of weight w moves every
	// posterior probability, so the level of each interval end, by at
	// most w: 0.1% of 95% here. Under AICc the histogram family can end
	// with weights from 1e-6 to 1e-3 on parametric delays, where profiling
	// it (18 EM runs) would about double the arm's refit.
	histMinLogOdds = -7
	// histProfilePoints and histProfileSpan: the profile likelihood is
	// evaluated at this many points over ± this many standard deviations
	// of logit q around its maximum, and interpolated by a natural cubic
	// spline.
	histProfilePoints = 15
	histProfileSpan   = 7.0
	// histQuickIter EM iterations first; a family then more than
	// histQuickMargin below histMinLogOdds (17 log units behind) is
	// dropped. EM's first iterations from the parametric fit take its big
	// steps: over the calibration grid at one to three windows (3,499 fits
	// of the histogram alternative, 100 replicates per cell of four truth
	// families at 30, 300 and 3,000 clicks per hour), a fit still behind
	// after three iterations gained at most 2.2 log units more.
	histQuickIter   = 3
	histQuickMargin = 10.0
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
	par, ll, iters, conv := run.run(params{q: best.Q, haz: haz}, histQuickIter, 1e-10, nil)
	fit := run.assemble(d, par, ll, iters, conv)
	h := &histAlternative{fit: fit, logOdds: histLogOdds(fit, best)}
	if h.logOdds < histMinLogOdds-histQuickMargin {
		return h
	}
	if !conv {
		par, ll, iters, conv = run.run(par, DefaultFitMaxIter, 1e-10, nil)
		fit = run.assemble(d, par, ll, iters+histQuickIter, conv)
		h = &histAlternative{fit: fit, logOdds: histLogOdds(fit, best)}
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

// histLogOdds returns the log odds of the histogram fit h against the
// parametric fit best: the gain in maximised log-likelihood less
// histPenalty.
func histLogOdds(h, best *Fit) float64 {
	return h.LogLik - best.LogLik - histPenalty(h, best)
}

// histPenalty is the penalty of the histogram fit h against the
// parametric fit best in log odds: half the difference of their AICc
// penalties, c(K_h) - c(K_best) with c(K) = K n/(n-K-1) and n the
// conversions (Hurvich & Tsai 1989; see the top of this file). +Inf when
// the histogram family has as many parameters as conversions less one,
// where AICc is undefined.
func histPenalty(h, best *Fit) float64 {
	n := h.Conversions
	c := func(k int) float64 {
		if n-float64(k)-1 <= 0 {
			return math.Inf(1)
		}
		return float64(k) * n / (n - float64(k) - 1)
	}
	return c(h.Params) - c(best.Params)
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
