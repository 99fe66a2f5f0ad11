package estimator

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// DefaultProbBestDraws is the number of joint posterior draws ProbBest uses
// when it is asked for draws <= 0. At 10,000 draws the Monte Carlo standard
// error of a probability is at most 0.005.
const DefaultProbBestDraws = 10000

// ProbBestTwoBeta returns the exact probability P(p_B > p_A) for independent
// p_A ~ Beta(a.Alpha, a.Beta) and p_B ~ Beta(b.Alpha, b.Beta) with positive
// integer parameters, by the closed-form finite sum
//
//	sum_{i=0}^{alpha_B-1} B(alpha_A+i, beta_A+beta_B) /
//	    ((beta_B+i) B(1+i, beta_B) B(alpha_A, beta_A))
//
// evaluated term by term in log space. By symmetry, P(p_B > p_A) =
// 1 - P(p_A > p_B), so the sum is taken over whichever of alpha_A, alpha_B is
// smaller; the cost is O(min(alpha_A, alpha_B)). It returns an error for
// non-integer, non-positive or non-finite parameters.
func ProbBestTwoBeta(a, b BetaPosterior) (float64, error) {
	for _, p := range []struct {
		name string
		v    float64
	}{{"a.Alpha", a.Alpha}, {"a.Beta", a.Beta}, {"b.Alpha", b.Alpha}, {"b.Beta", b.Beta}} {
		if !(p.v >= 1) || math.IsInf(p.v, 0) || p.v != math.Trunc(p.v) {
			return 0, fmt.Errorf("prob best two beta: %s = %v is not a positive integer", p.name, p.v)
		}
		if p.v > 1<<52 {
			return 0, fmt.Errorf("prob best two beta: %s = %v is too large to be exact", p.name, p.v)
		}
	}
	if b.Alpha <= a.Alpha {
		return probBBeatsA(a, b), nil
	}
	return 1 - probBBeatsA(b, a), nil
}

// probBBeatsA evaluates the finite sum for P(p_B > p_A); the number of terms
// is b.Alpha. Terms are positive, so they are combined with a log-sum-exp.
func probBBeatsA(a, b BetaPosterior) float64 {
	n := int(b.Alpha)
	logs := make([]float64, n)
	lbA := pbLogBeta(a.Alpha, a.Beta)
	maxLog := math.Inf(-1)
	for i := 0; i < n; i++ {
		fi := float64(i)
		l := pbLogBeta(a.Alpha+fi, a.Beta+b.Beta) - math.Log(b.Beta+fi) - pbLogBeta(1+fi, b.Beta) - lbA
		logs[i] = l
		if l > maxLog {
			maxLog = l
		}
	}
	var s float64
	for _, l := range logs {
		s += math.Exp(l - maxLog)
	}
	p := math.Exp(maxLog + math.Log(s))
	return math.Min(math.Max(p, 0), 1)
}

// pbLogBeta is log B(x, y) for x, y > 0.
func pbLogBeta(x, y float64) float64 {
	lx, _ := math.Lgamma(x)
	ly, _ := math.Lgamma(y)
	lxy, _ := math.Lgamma(x + y)
	return lx + ly - lxy
}

// ProbBestResult is the Monte Carlo summary of which arm is best.
type ProbBestResult struct {
	// Draws is the number of joint posterior draws used.
	Draws int
	// PBest[i] is the fraction of draws in which arm i had the largest
	// value; ties go to the lowest index.
	PBest []float64
	// StdErr[i] is the binomial Monte Carlo standard error of PBest[i],
	// sqrt(PBest[i] (1 - PBest[i]) / Draws).
	StdErr []float64
	// ExpectedLoss[i] estimates E[max_j theta_j - theta_i], the conversion
	// rate given up by choosing arm i.
	ExpectedLoss []float64
	// ExpectedLossStdErr[i] is the Monte Carlo standard error of
	// ExpectedLoss[i] (sample standard deviation / sqrt(Draws)).
	ExpectedLossStdErr []float64
}

// ProbBest estimates, by Monte Carlo with draws joint draws from the
// independent posteriors (DefaultProbBestDraws if draws <= 0), each arm's
// probability of having the highest conversion probability, its standard
// error, and each arm's expected loss. Draws are taken arm by arm within each
// joint draw, in slice order, from r, which must be non-nil; the result is a
// deterministic function of the posteriors, draws and r's state. Ties are
// broken in favour of the lowest index. An empty posts gives an empty result.
func ProbBest(posts []Posterior, draws int, r *rand.Rand) ProbBestResult {
	if draws <= 0 {
		draws = DefaultProbBestDraws
	}
	k := len(posts)
	res := ProbBestResult{
		Draws:              draws,
		PBest:              make([]float64, k),
		StdErr:             make([]float64, k),
		ExpectedLoss:       make([]float64, k),
		ExpectedLossStdErr: make([]float64, k),
	}
	if k == 0 {
		return res
	}
	wins := make([]int, k)
	lossSum := make([]float64, k)
	lossSq := make([]float64, k)
	theta := make([]float64, k)
	for d := 0; d < draws; d++ {
		best := pbSampleJoint(posts, r, theta)
		wins[best]++
		m := theta[best]
		for i, t := range theta {
			l := m - t
			lossSum[i] += l
			lossSq[i] += l * l
		}
	}
	n := float64(draws)
	for i := range posts {
		p := float64(wins[i]) / n
		res.PBest[i] = p
		res.StdErr[i] = math.Sqrt(p * (1 - p) / n)
		mean := lossSum[i] / n
		res.ExpectedLoss[i] = mean
		if draws > 1 {
			v := (lossSq[i] - n*mean*mean) / (n - 1)
			res.ExpectedLossStdErr[i] = math.Sqrt(math.Max(v, 0) / n)
		}
	}
	return res
}

// pbSampleJoint fills theta with one draw from each posterior (in order) and
// returns the index of the largest value, lowest index on ties.
func pbSampleJoint(posts []Posterior, r *rand.Rand, theta []float64) int {
	best := 0
	for i, p := range posts {
		theta[i] = p.Sample(r)
		if theta[i] > theta[best] {
			best = i
		}
	}
	return best
}
