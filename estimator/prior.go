package estimator

import (
	"errors"
	"fmt"
	"math"
)

// Defaults of Prior, applied by WithDefaults to zero fields.
const (
	// DefaultPriorQ is both parameters of the default Beta prior of the
	// eventual conversion probability: Beta(1/2, 1/2), the Jeffreys prior of
	// a binomial proportion, whose equal-tailed intervals have close to
	// nominal frequentist coverage (Brown, Cai & DasGupta 2001, "Interval
	// estimation for a binomial proportion", Statistical Science 16:101-133,
	// section 4.1.2).
	DefaultPriorQ = 0.5
	// DefaultPriorScaleMedian and DefaultPriorScaleSpread: the delay scale
	// is log-normal with median a tenth of the window and a standard
	// deviation of 1.5 on the log scale, so 95% of the prior lies between
	// about 1/190 of a window and 1.9 windows (30 minutes to 13 days for a
	// 7-day window). An attribution window is chosen to catch most
	// conversions, which makes mean delays of several windows implausible,
	// but within that range the prior is spread thin.
	DefaultPriorScaleMedian = 0.1
	DefaultPriorScaleSpread = 1.5
	// DefaultPriorScaleMin and DefaultPriorScaleMax truncate the scale
	// prior: one ten-thousandth of the window to ten windows, beyond which
	// a delay truncated at the window is indistinguishable from a uniform
	// one.
	DefaultPriorScaleMin = 1e-4
	DefaultPriorScaleMax = 10
	// DefaultPriorShapeSpread is the standard deviation of the log of the
	// Weibull shape around 0 (shape 1, the exponential): 95% of the prior
	// between shapes 0.25 and 4.
	DefaultPriorShapeSpread = 0.7
	// DefaultPriorShapeMin and DefaultPriorShapeMax truncate the shape
	// prior: from very heavy-tailed (0.2) to sharply peaked (5).
	DefaultPriorShapeMin = 0.2
	DefaultPriorShapeMax = 5
	// DefaultPriorSigmaSpread is the standard deviation of the log of the
	// lognormal's sigma around 0 (sigma 1): 95% of the prior between 0.3
	// and 3.2. DefaultPriorSigmaMin and DefaultPriorSigmaMax truncate it.
	DefaultPriorSigmaSpread = 0.6
	DefaultPriorSigmaMin    = 0.2
	DefaultPriorSigmaMax    = 5
)

// Prior is the prior distribution of one arm's model parameters. Every
// component is proper, so the posterior of q is proper and the marginal
// likelihoods that weigh the delay families against each other are
// finite:
//
//	q ~ Beta(QAlpha, QBeta)
//	log(scale/W) ~ Normal(log ScaleMedian, ScaleSpread^2), truncated to [log ScaleMin, log ScaleMax]
//	log(shape) ~ Normal(0, ShapeSpread^2), truncated to [log ShapeMin, log ShapeMax]   (Weibull only)
//	log(sigma) ~ Normal(0, SigmaSpread^2), truncated to [log SigmaMin, log SigmaMax]   (lognormal only)
//
// independently. The scale is the exponential's mean delay (1/rate), the
// Weibull's scale or the lognormal's median, before truncation at the
// window W. Normal priors on the
// logarithm of a positive parameter whose order of magnitude is known
// only roughly are the usual weakly informative choice (Gelman et al.,
// Bayesian Data Analysis, 3rd ed., 2013, sections 2.9 and 5.7); they
// matter only while the arm's own conversions cannot yet tell a slow delay
// from a low eventual rate.
type Prior struct {
	// QAlpha and QBeta are the Beta prior's parameters. Default:
	// DefaultPriorQ each.
	QAlpha, QBeta float64
	// ScaleMedian is the prior median of the delay scale in windows and
	// ScaleSpread the standard deviation of its logarithm. Defaults:
	// DefaultPriorScaleMedian, DefaultPriorScaleSpread.
	ScaleMedian, ScaleSpread float64
	// ScaleMin and ScaleMax truncate the scale prior, in windows. Default:
	// DefaultPriorScaleMin, DefaultPriorScaleMax.
	ScaleMin, ScaleMax float64
	// ShapeSpread is the standard deviation of the log Weibull shape.
	// Default: DefaultPriorShapeSpread.
	ShapeSpread float64
	// ShapeMin and ShapeMax truncate the Weibull shape prior. Default:
	// DefaultPriorShapeMin, DefaultPriorShapeMax.
	ShapeMin, ShapeMax float64
	// SigmaSpread is the standard deviation of the log of the lognormal's
	// sigma, and SigmaMin, SigmaMax truncate it. Defaults:
	// DefaultPriorSigmaSpread, DefaultPriorSigmaMin, DefaultPriorSigmaMax.
	SigmaSpread, SigmaMin, SigmaMax float64
}

// WithDefaults returns p with every zero field set to its default.
func (p Prior) WithDefaults() Prior {
	def := func(x *float64, v float64) {
		if *x == 0 {
			*x = v
		}
	}
	def(&p.QAlpha, DefaultPriorQ)
	def(&p.QBeta, DefaultPriorQ)
	def(&p.ScaleMedian, DefaultPriorScaleMedian)
	def(&p.ScaleSpread, DefaultPriorScaleSpread)
	def(&p.ScaleMin, DefaultPriorScaleMin)
	def(&p.ScaleMax, DefaultPriorScaleMax)
	def(&p.ShapeSpread, DefaultPriorShapeSpread)
	def(&p.ShapeMin, DefaultPriorShapeMin)
	def(&p.ShapeMax, DefaultPriorShapeMax)
	def(&p.SigmaSpread, DefaultPriorSigmaSpread)
	def(&p.SigmaMin, DefaultPriorSigmaMin)
	def(&p.SigmaMax, DefaultPriorSigmaMax)
	return p
}

// Validate reports what is wrong with p, after defaults are applied.
func (p Prior) Validate() error {
	p = p.WithDefaults()
	var errs []error
	finitePos := func(x float64) bool { return x > 0 && !math.IsInf(x, 0) }
	if !finitePos(p.QAlpha) || !finitePos(p.QBeta) {
		errs = append(errs, fmt.Errorf("prior: Beta(%v, %v) needs finite positive parameters", p.QAlpha, p.QBeta))
	}
	if !finitePos(p.ScaleMin) || !finitePos(p.ScaleMax) || !(p.ScaleMax > p.ScaleMin*1.01) {
		errs = append(errs, fmt.Errorf("prior: delay scale range [%v, %v] windows must be positive and increasing", p.ScaleMin, p.ScaleMax))
	}
	if !(p.ScaleMedian >= p.ScaleMin && p.ScaleMedian <= p.ScaleMax) || !finitePos(p.ScaleSpread) {
		errs = append(errs, fmt.Errorf("prior: delay scale median %v must lie in its range and spread %v be positive", p.ScaleMedian, p.ScaleSpread))
	}
	if !finitePos(p.ShapeMin) || !finitePos(p.ShapeMax) || !(p.ShapeMax > p.ShapeMin*1.01) || !(p.ShapeMin < 1 && p.ShapeMax > 1) {
		errs = append(errs, fmt.Errorf("prior: Weibull shape range [%v, %v] must be positive and contain 1", p.ShapeMin, p.ShapeMax))
	}
	if !finitePos(p.ShapeSpread) {
		errs = append(errs, fmt.Errorf("prior: Weibull shape spread %v must be positive", p.ShapeSpread))
	}
	if !finitePos(p.SigmaMin) || !finitePos(p.SigmaMax) || !(p.SigmaMin < 1 && p.SigmaMax > 1) || !finitePos(p.SigmaSpread) {
		errs = append(errs, fmt.Errorf("prior: lognormal sigma range [%v, %v] must be positive and contain 1, spread %v positive", p.SigmaMin, p.SigmaMax, p.SigmaSpread))
	}
	return errors.Join(errs...)
}

// logScaleDensity returns the log prior density of the log scale ls
// (log seconds) for window w, or -Inf outside the truncation.
func (p Prior) logScaleDensity(ls, logW float64) float64 {
	lo, hi := logW+math.Log(p.ScaleMin), logW+math.Log(p.ScaleMax)
	return truncNormalLog(ls, logW+math.Log(p.ScaleMedian), p.ScaleSpread, lo, hi)
}

// logShapeDensity returns the log prior density of the log Weibull shape.
func (p Prior) logShapeDensity(lk float64) float64 {
	return truncNormalLog(lk, 0, p.ShapeSpread, math.Log(p.ShapeMin), math.Log(p.ShapeMax))
}

// logSigmaDensity returns the log prior density of the log lognormal
// sigma.
func (p Prior) logSigmaDensity(ls float64) float64 {
	return truncNormalLog(ls, 0, p.SigmaSpread, math.Log(p.SigmaMin), math.Log(p.SigmaMax))
}

// truncNormalLog is the log density at x of Normal(mu, sd^2) truncated to
// [lo, hi].
func truncNormalLog(x, mu, sd, lo, hi float64) float64 {
	if x < lo || x > hi {
		return math.Inf(-1)
	}
	z := (x - mu) / sd
	mass := 0.5 * (math.Erf((hi-mu)/(sd*math.Sqrt2)) - math.Erf((lo-mu)/(sd*math.Sqrt2)))
	return -0.5*z*z - math.Log(sd*math.Sqrt(2*math.Pi)) - math.Log(mass)
}
