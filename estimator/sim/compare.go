package sim

import (
	"errors"
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// ErrorHours are the times since the start (hours) at which a comparison
// of policies reports the error of observed and eventual CVR: half a day,
// a day and two days, when most decisions are made.
var ErrorHours = []float64{12, 24, 48}

// RatioOfMeans returns mean(x)/mean(y) over paired observations (x[i] and
// y[i] come from the same run) and its large-sample standard error by the
// delta method,
//
//	se = sqrt( sum_i (x_i - R y_i)^2 / (n-1) / n ) / mean(y),
//
// the variance of a ratio estimator (Cochran 1977, "Sampling Techniques",
// 3rd ed., chapter 6; recalled from memory), which accounts for the
// correlation of the pairs. The ratio is NaN when mean(y) is 0 and the
// standard error is 0 for a single pair.
func RatioOfMeans(x, y []float64) (ratio, se float64, err error) {
	if len(x) != len(y) || len(x) == 0 {
		return 0, 0, errors.New("ratio of means: need two non-empty series of equal length")
	}
	mx, _ := MeanSE(x)
	my, _ := MeanSE(y)
	if my == 0 {
		return math.NaN(), math.NaN(), nil
	}
	ratio = mx / my
	n := float64(len(x))
	if n < 2 {
		return ratio, 0, nil
	}
	var ss float64
	for i := range x {
		d := x[i] - ratio*y[i]
		ss += d * d
	}
	return ratio, math.Sqrt(ss/(n-1)/n) / math.Abs(my), nil
}

// RegretRatio returns the ratio of the named policy's mean regret to the
// reference policy's, over the same seeded runs, with its standard error
// (RatioOfMeans). Both are NaN when either policy was not simulated or the
// reference lost nothing.
func (r *Result) RegretRatio(policy, reference string) (ratio, se float64) {
	p, ref := r.Policy(policy), r.Policy(reference)
	if p == nil || ref == nil {
		return math.NaN(), math.NaN()
	}
	ratio, se, err := RatioOfMeans(p.FinalRegret, ref.FinalRegret)
	if err != nil {
		return math.NaN(), math.NaN()
	}
	return ratio, se
}

// ErrorAt returns the mean absolute errors of p's observed and eventual CVR
// (see PolicyResult.ObservedError) at the update nearest to hours since the
// start, and that update's time. All three are NaN when the horizon ends
// more than half an update interval before hours, or no arm had clicks then.
func (r *Result) ErrorAt(p *PolicyResult, hours float64) (at, observed, eventual float64) {
	nan := math.NaN()
	if len(r.Hours) == 0 || hours > r.Hours[len(r.Hours)-1]+r.Scenario.UpdateInterval.Hours()/2 {
		return nan, nan, nan
	}
	best := 0
	for t, h := range r.Hours {
		if math.Abs(h-hours) < math.Abs(r.Hours[best]-hours) {
			best = t
		}
	}
	if math.IsNaN(p.ObservedError[best]) {
		return nan, nan, nan
	}
	return r.Hours[best], p.ObservedError[best], p.EventualError[best]
}

// PooledSettle is one policy's settle record pooled over scenarios.
type PooledSettle struct {
	Policy string
	// Scenarios is how many scenarios simulated the policy, Runs their runs.
	Scenarios, Runs int
	// Settled counts the runs in which the settle rule fired and Wrong those
	// that named a wrong arm (PolicyResult.SettledWrong).
	Settled, Wrong int
	// WrongShare is Wrong/Settled and WrongUpper95 its one-sided 95%
	// Clopper-Pearson upper bound; both NaN when no run settled.
	WrongShare, WrongUpper95 float64
}

// PoolSettles pools every policy's settle record over the results, in the
// order in which policies first appear.
func PoolSettles(results []*Result) []PooledSettle {
	var out []PooledSettle
	idx := make(map[string]int)
	for _, r := range results {
		for _, p := range r.Policies {
			i, ok := idx[p.Policy]
			if !ok {
				i = len(out)
				idx[p.Policy] = i
				out = append(out, PooledSettle{Policy: p.Policy})
			}
			out[i].Scenarios++
			out[i].Runs += r.Runs
			out[i].Settled += p.SettledRuns
			out[i].Wrong += p.SettledWrong
		}
	}
	for i := range out {
		out[i].WrongShare, out[i].WrongUpper95 = math.NaN(), math.NaN()
		if out[i].Settled > 0 {
			out[i].WrongShare = float64(out[i].Wrong) / float64(out[i].Settled)
			out[i].WrongUpper95 = ClopperPearsonUpper(out[i].Wrong, out[i].Settled, 0.95)
		}
	}
	return out
}

// ClopperPearsonUpper returns the one-sided upper confidence bound of
// level (for example 0.95) for a binomial proportion after k successes in
// n trials: the level-quantile of Beta(k+1, n-k), and 1 when k = n
// (Clopper & Pearson 1934, "The use of confidence or fiducial limits
// illustrated in the case of the binomial", Biometrika 26:404-413). It is
// NaN unless 0 <= k <= n, n > 0 and 0 < level < 1.
func ClopperPearsonUpper(k, n int, level float64) float64 {
	if n <= 0 || k < 0 || k > n || !(level > 0 && level < 1) {
		return math.NaN()
	}
	if k == n {
		return 1
	}
	return distuv.Beta{Alpha: float64(k + 1), Beta: float64(n - k)}.Quantile(level)
}
