package calib

import (
	"fmt"

	"ripen/estimator"
)

// armPosterior is the posterior of one arm's eventual conversion rate q
// that calibration checks, and the point estimate reported beside it: the
// one seam between this package and the estimator's model, so that a new
// posterior is checked by replacing this body alone.
//
// Today it is what the service computes for an arm: the EM fit of the
// family (estimator.FitModel), the likelihood posterior of q
// (estimator.NewLikelihoodPosterior), and the fit's q as the point.
func armPosterior(d *estimator.FitData, family estimator.DelayFamily) (point float64, post estimator.Posterior, err error) {
	fit, err := estimator.FitModel(d, estimator.FitOptions{Family: family})
	if err != nil {
		return 0, nil, fmt.Errorf("fit: %w", err)
	}
	lp, err := estimator.NewLikelihoodPosterior(d, fit)
	if err != nil {
		return 0, nil, fmt.Errorf("posterior: %w", err)
	}
	return fit.Q, lp, nil
}
