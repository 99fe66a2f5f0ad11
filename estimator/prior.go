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
	// DefaultPriorScaleMin and DefaultPriorScaleMax bound the delay scale
	// (the exponential's mean, the Weibull's scale) relative to the
	// attribution window: one ten-thousandth of the window (one minute of a
	// 7-day window) to ten windows, beyond which a delay truncated at the
	// window is indistinguishable from a uniform one.
	DefaultPriorScaleMin = 1e-4
	DefaultPriorScaleMax = 10
	// DefaultPriorShapeMin and DefaultPriorShapeMax bound the Weibull shape:
	// from very heavy-tailed (0.2) to sharply peaked (5).
	DefaultPriorShapeMin = 0.2
	DefaultPriorShapeMax = 5
)

// Prior is the prior distribution of one arm's model parameters. Every
// component is proper, so the posterior of q is proper and the marginal
// likelihoods that weigh the delay families against each other are
// finite:
//
//	q ~ Beta(QAlpha, QBeta)
//	log(scale/W) ~ Uniform(log ScaleMin, log ScaleMax)
//	log(shape) ~ Uniform(log ShapeMin, log ShapeMax)   (Weibull only)
//
// independently. The scale is the exponential's mean delay (1/rate) or the
// Weibull's scale before truncation at the window W. Uniform priors on the
// logarithm of a scale are the usual weakly informative choice for
// positive parameters whose order of magnitude is unknown (Jeffreys'
// prior for a scale, restricted to a finite range to make it proper;
// Gelman et al., Bayesian Data Analysis, 3rd ed., 2013, section 2.8).
type Prior struct {
	// QAlpha and QBeta are the Beta prior's parameters. Default:
	// DefaultPriorQ each.
	QAlpha, QBeta float64
	// ScaleMin and ScaleMax bound the delay scale as multiples of the
	// window. Default: DefaultPriorScaleMin, DefaultPriorScaleMax.
	ScaleMin, ScaleMax float64
	// ShapeMin and ShapeMax bound the Weibull shape. Default:
	// DefaultPriorShapeMin, DefaultPriorShapeMax.
	ShapeMin, ShapeMax float64
}

// WithDefaults returns p with every zero field set to its default.
func (p Prior) WithDefaults() Prior {
	if p.QAlpha == 0 {
		p.QAlpha = DefaultPriorQ
	}
	if p.QBeta == 0 {
		p.QBeta = DefaultPriorQ
	}
	if p.ScaleMin == 0 {
		p.ScaleMin = DefaultPriorScaleMin
	}
	if p.ScaleMax == 0 {
		p.ScaleMax = DefaultPriorScaleMax
	}
	if p.ShapeMin == 0 {
		p.ShapeMin = DefaultPriorShapeMin
	}
	if p.ShapeMax == 0 {
		p.ShapeMax = DefaultPriorShapeMax
	}
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
	if !finitePos(p.ShapeMin) || !finitePos(p.ShapeMax) || !(p.ShapeMax > p.ShapeMin*1.01) {
		errs = append(errs, fmt.Errorf("prior: Weibull shape range [%v, %v] must be positive and increasing", p.ShapeMin, p.ShapeMax))
	}
	return errors.Join(errs...)
}
