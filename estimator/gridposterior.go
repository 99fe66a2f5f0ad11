package estimator

import (
	"fmt"
	"math"
	"slices"
)

// NewGridPosterior returns the posterior of q tabulated on the increasing
// grid q (at least two finite points), with unnormalised log-densities
// logDensity, one per grid point (-Inf where the density vanishes; NaN and
// +Inf are errors). The density is linear between grid points and is
// normalised by the trapezoid rule; mass outside the grid is dropped. It
// lets code outside the package (simulation references, calibration
// checks) hand the policies a posterior it computed itself.
func NewGridPosterior(q, logDensity []float64) (*GridPosterior, error) {
	if len(q) < 2 || len(logDensity) != len(q) {
		return nil, fmt.Errorf("grid posterior: need at least two grid points and one log-density per point, got %d and %d", len(q), len(logDensity))
	}
	for i, x := range q {
		if math.IsNaN(x) || math.IsInf(x, 0) || (i > 0 && !(x > q[i-1])) {
			return nil, fmt.Errorf("grid posterior: grid point %d = %v is not finite and above the previous one", i, x)
		}
		if v := logDensity[i]; math.IsNaN(v) || math.IsInf(v, 1) {
			return nil, fmt.Errorf("grid posterior: log-density %v at grid point %d", v, i)
		}
	}
	return newGridPosterior(slices.Clone(q), logDensity, false)
}
