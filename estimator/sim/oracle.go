package sim

import (
	"fmt"
	"math"
	"math/rand/v2"
	"strings"

	"ripen/estimator"
)

// PolicyDelayOracle is the name of the simulation-only reference policy
// that knows every arm's true delay distribution (see OraclePosterior).
const PolicyDelayOracle = "delay-oracle"

// PolicyNames lists the policies a simulation accepts: the service's
// (estimator.PolicyNames) followed by PolicyDelayOracle.
func PolicyNames() []string {
	return append(estimator.PolicyNames(), PolicyDelayOracle)
}

// CheckPolicy reports whether name is a policy a simulation accepts.
func CheckPolicy(name string) error {
	if name == PolicyDelayOracle {
		return nil
	}
	if _, err := estimator.ParsePolicy(name); err != nil {
		return fmt.Errorf("unknown policy %q (valid: %s)", name, strings.Join(PolicyNames(), ", "))
	}
	return nil
}

// Grid of OraclePosterior.
const (
	// OracleGridPoints is the smallest number of q grid points of an
	// oracle posterior, laid evenly in logit(q) over the region where the
	// log-density is within OracleLogDrop of its maximum.
	OracleGridPoints = 401
	// OracleMaxStep is the largest step of the grid in logit(q): a wide
	// posterior (few conversions, where the Jeffreys prior's q^-1/2 spike
	// at 0 or (1-q)^-1/2 spike at 1 shows) gets more points. Quantiles are
	// within 0.002 posterior standard deviations of the exact ones (checked
	// against the conjugate Beta case in the tests).
	OracleMaxStep = 0.02
	// OracleLogDrop is how far below its maximum the log-density of
	// logit(q) is at the ends of the grid: the mass left out is of order
	// e^-25.
	OracleLogDrop = 25.0
	// oracleUMin and oracleUMax bound logit(q): q from 8.8e-27 to 1-1e-12.
	// With no conversions the Jeffreys posterior has a q^-1/2 spike at 0, so
	// the lower bound sits far out; above 1-1e-12 neighbouring grid points
	// would round to the same float64.
	oracleUMin = -60.0
	oracleUMax = 27.631021115928547 // logit(1 - 1e-12)
	// oracleBisections halves the logit bracket (width < 90) to below 1e-13.
	oracleBisections = 60
)

// oracleLik is the likelihood of q for one arm with a known delay CDF G,
// after the terms that do not depend on q are dropped:
//
//	C log q + sum_j u_j log(1 - q G(a_j)) + U log(1 - q),
//
// C all observed conversions, u_j the unconverted clicks of pending bin j
// at age a_j (0 < G(a_j) < 1), U the unconverted clicks that have matured
// (or whose G is 1). Each observed delay contributes log g(delay), constant
// in q.
type oracleLik struct {
	c, mat float64
	u, g   []float64
}

func newOracleLik(d *estimator.FitData, delay Distribution) (*oracleLik, error) {
	l := &oracleLik{c: d.TotalConversions(), mat: math.Max(d.MaturedClicks-d.MaturedConversions, 0)}
	for i, b := range d.Pending {
		u := b.Clicks - b.Converted
		if !(u >= 0) || math.IsInf(u, 0) {
			return nil, fmt.Errorf("oracle posterior: pending bin %d has clicks %v, converted %v", i, b.Clicks, b.Converted)
		}
		g := delay.CDF(b.Age)
		switch {
		case u == 0 || g <= 0:
		case g >= 1:
			l.mat += u
		default:
			l.u = append(l.u, u)
			l.g = append(l.g, g)
		}
	}
	if !(l.c >= 0 && l.mat >= 0) || math.IsInf(l.c+l.mat, 0) {
		return nil, fmt.Errorf("oracle posterior: conversions %v, matured unconverted %v", l.c, l.mat)
	}
	return l, nil
}

// log1pExp returns log(1 + e^x) without overflow.
func log1pExp(x float64) float64 {
	if x > 35 {
		return x
	}
	return math.Log1p(math.Exp(x))
}

// logDensityLogit returns the log-density, up to a constant, of u =
// logit(q) under the Jeffreys prior: log prior(q) + log likelihood(q) +
// log q(1-q) = (C+1/2) log q + (U+1/2) log(1-q) + sum_j u_j log(1-q G_j).
// As a function of q every term is concave with a positive coefficient, so
// the density is unimodal (in q and in u).
func (l *oracleLik) logDensityLogit(u float64) float64 {
	lq, l1q := -log1pExp(-u), -log1pExp(u)
	q := math.Exp(lq)
	v := (l.c+0.5)*lq + (l.mat+0.5)*l1q
	for j, uj := range l.u {
		v += uj * math.Log1p(-q*l.g[j])
	}
	return v
}

// slopeQ returns the derivative in q of logDensityLogit, which decreases in
// q: (C+1/2)/q - (U+1/2)/(1-q) - sum_j u_j G_j/(1-q G_j).
func (l *oracleLik) slopeQ(u float64) float64 {
	q := 1 / (1 + math.Exp(-u))
	s := (l.c+0.5)/q - (l.mat+0.5)/(1-q)
	for j, uj := range l.u {
		s -= uj * l.g[j] / (1 - q*l.g[j])
	}
	return s
}

// bisect returns the point where pred switches from true (at lo) to false
// (at hi).
func bisect(lo, hi float64, pred func(float64) bool) float64 {
	for range oracleBisections {
		mid := (lo + hi) / 2
		if pred(mid) {
			lo = mid
		} else {
			hi = mid
		}
	}
	return (lo + hi) / 2
}

// OraclePosterior returns the exact posterior of one arm's eventual
// conversion rate q when its delay distribution is known (delay: the CDF of
// a converter's delay within the window, in seconds, as the simulator draws
// it), with the Jeffreys prior Beta(1/2, 1/2) on q (Brown, Cai & DasGupta
// 2001, "Interval estimation for a binomial proportion", Statistical
// Science 16:101-133, section 4.1.2):
//
//	log p(q | data) = -1/2 log q - 1/2 log(1-q) + C log q
//	                  + sum_j u_j log(1 - q G(a_j)) + U log(1 - q) + const
//
// with C the observed conversions, u_j the unconverted clicks of pending
// bin j of d at age a_j and U the matured unconverted clicks. With G = 1
// everywhere it is Beta(C+1/2, N-C+1/2). Like the estimator it takes the
// rate to be constant over the arm's clicks, so after a change point it is
// the posterior of a misspecified model, not the truth.
//
// The grid adapts to the data: the mode of logit(q) is found by bisection
// on the derivative (the density is unimodal), the grid's ends where the
// log-density of logit(q) has dropped by OracleLogDrop, and its points
// (OracleGridPoints, more when OracleMaxStep requires) are evenly spaced in
// logit(q), so they crowd towards q = 0 when the mass sits there.
func OraclePosterior(d *estimator.FitData, delay Distribution) (*estimator.GridPosterior, error) {
	l, err := newOracleLik(d, delay)
	if err != nil {
		return nil, err
	}
	mode := bisect(oracleUMin, oracleUMax, func(u float64) bool { return l.slopeQ(u) > 0 })
	top := l.logDensityLogit(mode)
	above := func(u float64) bool { return l.logDensityLogit(u) > top-OracleLogDrop }
	lo, hi := oracleUMin, oracleUMax
	if !above(lo) {
		lo = bisect(mode, oracleUMin, above)
	}
	if !above(hi) {
		hi = bisect(mode, oracleUMax, above)
	}
	if !(hi > lo) {
		return nil, fmt.Errorf("oracle posterior: degenerate grid [%v, %v] in logit(q)", lo, hi)
	}
	n := max(OracleGridPoints, int(math.Ceil((hi-lo)/OracleMaxStep))+1)
	q := make([]float64, 0, n)
	logp := make([]float64, 0, n)
	for i := range n {
		u := lo + (hi-lo)*float64(i)/float64(n-1)
		x := 1 / (1 + math.Exp(-u))
		if len(q) > 0 && !(x > q[len(q)-1]) {
			continue
		}
		// Density of q = density of u / (q (1-q)).
		q = append(q, x)
		logp = append(logp, l.logDensityLogit(u)+log1pExp(-u)+log1pExp(u))
	}
	post, err := estimator.NewGridPosterior(q, logp)
	if err != nil {
		return nil, fmt.Errorf("oracle posterior: %w", err)
	}
	return post, nil
}

// delayOracle is the delay-oracle policy of one simulated run: Thompson
// sampling weights (each arm's probability of being best, by
// estimator.ProbBest) from every arm's OraclePosterior. The simulator sets
// the posteriors from the arms' states before each evaluation, so the
// policy passes through the service's own burn-in, guardrails and settle
// rule like every other.
type delayOracle struct {
	delays []Distribution
	index  map[string]int
	posts  []estimator.Posterior
}

func newDelayOracle(c *compiled) *delayOracle {
	o := &delayOracle{index: make(map[string]int, c.k), posts: make([]estimator.Posterior, c.k)}
	for i, a := range c.sc.Arms {
		o.index[a.Name] = i
		o.delays = append(o.delays, c.delays[i])
	}
	return o
}

// Name implements estimator.Policy.
func (o *delayOracle) Name() string { return PolicyDelayOracle }

// update computes every arm's oracle posterior from its state.
func (o *delayOracle) update(states []*estimator.ArmState) error {
	for i, s := range states {
		d := s.FitData()
		p, err := OraclePosterior(&d, o.delays[i])
		if err != nil {
			return fmt.Errorf("arm %d: %w", i, err)
		}
		o.posts[i] = p
	}
	return nil
}

// Weights implements estimator.Policy.
func (o *delayOracle) Weights(arms []estimator.ArmInput, r *rand.Rand) ([]float64, error) {
	posts := make([]estimator.Posterior, len(arms))
	for j, a := range arms {
		i, ok := o.index[a.Arm]
		if !ok || o.posts[i] == nil {
			return nil, fmt.Errorf("%s: no posterior for arm %q", PolicyDelayOracle, a.Arm)
		}
		posts[j] = o.posts[i]
	}
	return estimator.ProbBest(posts, 0, r).PBest, nil
}
