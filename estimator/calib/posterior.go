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
// It is what the service computes for an arm (estimator.EvaluateExperiment):
// estimator.ArmPosterior under the default prior (delay parameters
// integrated out; auto averages the exponential and Weibull families by
// marginal likelihood), with the posterior median as the point.
func armPosterior(d *estimator.FitData, family estimator.DelayFamily) (point float64, post estimator.Posterior, err error) {
	p, err := estimator.ArmPosterior(d, family, estimator.Prior{}, nil)
	if err != nil {
		return 0, nil, fmt.Errorf("posterior: %w", err)
	}
	return p.Median, p, nil
}
