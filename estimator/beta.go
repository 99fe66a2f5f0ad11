package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/stat/distuv"
)

// BetaPosterior is a Beta(Alpha, Beta) posterior of an arm's conversion
// probability. It implements Posterior; the zero value is invalid, build one
// with NewObservedBeta or NewDelayCorrectedBeta, or set both parameters > 0.
type BetaPosterior struct {
	// Alpha is the first shape parameter (prior 1 + conversions).
	Alpha float64
	// Beta is the second shape parameter (prior 1 + non-converting clicks).
	Beta float64
}

var _ Posterior = BetaPosterior{}

// Validate reports whether both shape parameters are finite and positive.
func (b BetaPosterior) Validate() error {
	if !(b.Alpha > 0) || math.IsInf(b.Alpha, 0) {
		return fmt.Errorf("beta posterior: alpha must be finite and > 0, got %v", b.Alpha)
	}
	if !(b.Beta > 0) || math.IsInf(b.Beta, 0) {
		return fmt.Errorf("beta posterior: beta must be finite and > 0, got %v", b.Beta)
	}
	return nil
}

// dist returns the gonum distribution with the given random source.
func (b BetaPosterior) dist(src rand.Source) distuv.Beta {
	return distuv.Beta{Alpha: b.Alpha, Beta: b.Beta, Src: src}
}

// Mean is the posterior mean Alpha / (Alpha + Beta).
func (b BetaPosterior) Mean() float64 { return b.Alpha / (b.Alpha + b.Beta) }

// Quantile returns the p-quantile of the Beta distribution (gonum distuv).
func (b BetaPosterior) Quantile(p float64) float64 { return b.dist(nil).Quantile(p) }

// Sample draws one value from the posterior using r as the random source.
func (b BetaPosterior) Sample(r *rand.Rand) float64 { return b.dist(r).Rand() }

// errBetaCounts is wrapped by the constructors when counts are unusable.
var errBetaCounts = errors.New("invalid counts")

func betaCountOK(x float64) bool { return x >= 0 && !math.IsInf(x, 0) }

// NewObservedBeta is the posterior of the observed conversion rate under a
// uniform Beta(1, 1) prior: Beta(conversions+1, clicks-conversions+1). It
// ignores conversion delay, so it is biased low while conversions are still
// arriving; it is the baseline the delay-aware posteriors are compared with.
func NewObservedBeta(clicks, conversions float64) (BetaPosterior, error) {
	if !betaCountOK(clicks) || !betaCountOK(conversions) {
		return BetaPosterior{}, fmt.Errorf("observed beta: clicks %v, conversions %v: %w", clicks, conversions, errBetaCounts)
	}
	if conversions > clicks {
		return BetaPosterior{}, fmt.Errorf("observed beta: conversions %v exceed clicks %v: %w", conversions, clicks, errBetaCounts)
	}
	return BetaPosterior{Alpha: conversions + 1, Beta: clicks - conversions + 1}, nil
}

// NewDelayCorrectedBeta is the posterior of the conversion rate with the
// denominator replaced by the ripe clicks (the delay-weighted number of
// clicks whose conversions should have arrived by now):
// Beta(conversions+1, max(ripeClicks-conversions, 0)+1). Conversions may exceed
// ripeClicks when the delay model is pessimistic; the second parameter is then
// floored at the prior's 1.
func NewDelayCorrectedBeta(ripeClicks, conversions float64) (BetaPosterior, error) {
	if !betaCountOK(ripeClicks) || !betaCountOK(conversions) {
		return BetaPosterior{}, fmt.Errorf("delay-corrected beta: ripe clicks %v, conversions %v: %w", ripeClicks, conversions, errBetaCounts)
	}
	return BetaPosterior{Alpha: conversions + 1, Beta: math.Max(ripeClicks-conversions, 0) + 1}, nil
}
