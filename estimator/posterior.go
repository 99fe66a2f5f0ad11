package estimator

import "math/rand/v2"

// Posterior is a posterior distribution of an arm's conversion probability,
// as the allocation policies consume it.
type Posterior interface {
	// Mean is the posterior mean.
	Mean() float64
	// Quantile returns the p-quantile, 0 <= p <= 1.
	Quantile(p float64) float64
	// Sample draws one value using r (the caller owns the seed).
	Sample(r *rand.Rand) float64
}
