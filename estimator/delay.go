package estimator

import (
	"fmt"
	"math"
	"sort"

	"gonum.org/v1/gonum/mathext"
)

// DelayFamily names a family of conversion-delay distributions on the
// attribution window [0, W].
type DelayFamily int

const (
	// FamilyAuto lets the data choose: FitModel fits the exponential,
	// Weibull and histogram families and keeps the lowest AIC (the point
	// fit), while ArmPosterior averages the exponential, Weibull and
	// lognormal posteriors by their marginal likelihoods (plus the
	// histogram by its AICc weight once the window has been observed).
	FamilyAuto DelayFamily = iota
	// FamilyExponential is the exponential delay truncated at the window:
	// G(a) = (1 - exp(-rate*a)) / (1 - exp(-rate*W)).
	FamilyExponential
	// FamilyWeibull is the Weibull delay truncated at the window:
	// G(a) = F(a)/F(W) with F(a) = 1 - exp(-(a/scale)^shape).
	FamilyWeibull
	// FamilyHistogram is the non-parametric delay: one discrete hazard per
	// delay-histogram bin, with the bin's mass spread uniformly over the bin.
	FamilyHistogram
	// FamilyLognormal is the lognormal delay truncated at the window:
	// G(a) = Phi((log a - mu)/sigma) / Phi((log W - mu)/sigma), median
	// e^mu. It takes part in the auto average (ArmPosterior) only; FitModel
	// does not fit it.
	FamilyLognormal
)

// String returns the family's lower-case name.
func (f DelayFamily) String() string {
	switch f {
	case FamilyAuto:
		return "auto"
	case FamilyExponential:
		return "exponential"
	case FamilyWeibull:
		return "weibull"
	case FamilyHistogram:
		return "histogram"
	case FamilyLognormal:
		return "lognormal"
	}
	return fmt.Sprintf("DelayFamily(%d)", int(f))
}

// delayDist is one member of a delay family, evaluated on [0, w]. The
// exponential is the Weibull with shape 1 and scale 1/rate.
type delayDist struct {
	family DelayFamily
	w      float64

	// Parametric families: Weibull shape k and scale s (seconds).
	k, s     float64
	logScale float64
	xW       float64 // (W/s)^k
	logFW    float64 // log F(W), the untruncated mass inside the window

	// Lognormal family (k is sigma, s the median): zW = (log W - log s)/k
	// and logPhiW = log Phi(zW), the untruncated mass inside the window.
	zW, logPhiW float64

	// Histogram family: edges e_0..e_K and hazards h_0..h_{K-1}; the last
	// hazard is 1 so that G(W) = 1. logSurvEdge[i] = log S(e_i).
	edges       []float64
	haz         []float64
	logSurvEdge []float64
}

// newParametric returns the Weibull (exponential when k == 1) delay with
// shape k and scale s truncated at w.
func newParametric(family DelayFamily, k, s, w float64) delayDist {
	d := delayDist{family: family, w: w, k: k, s: s, logScale: math.Log(s)}
	d.xW = d.x(w)
	d.logFW = math.Log(-math.Expm1(-d.xW))
	return d
}

// newLognormal returns the lognormal delay with log-sd sigma and median m
// truncated at w.
func newLognormal(sigma, m, w float64) delayDist {
	d := delayDist{family: FamilyLognormal, w: w, k: sigma, s: m, logScale: math.Log(m)}
	d.zW = (math.Log(w) - d.logScale) / sigma
	d.logPhiW = logPhi(d.zW)
	return d
}

// logPhi returns log Phi(z), Phi the standard normal CDF, accurately in
// both tails.
func logPhi(z float64) float64 {
	if z > 0 {
		return math.Log1p(-upperTail(z))
	}
	return math.Log(upperTail(-z))
}

// upperTail returns Q(z) = 1 - Phi(z) = erfc(z/sqrt 2)/2.
func upperTail(z float64) float64 { return 0.5 * math.Erfc(z/math.Sqrt2) }

// logNormalMass returns log(Phi(b) - Phi(a)) for a < b, computed from the
// tail where both lie so that it keeps its precision.
func logNormalMass(a, b float64) float64 {
	var m float64
	if a > 0 {
		m = upperTail(a) - upperTail(b)
	} else {
		m = upperTail(-b) - upperTail(-a)
	}
	if !(m > 0) {
		return math.Inf(-1)
	}
	return math.Log(m)
}

// lnZ returns (log a - log median)/sigma, -Inf at a <= 0.
func (d *delayDist) lnZ(a float64) float64 {
	if a <= 0 {
		return math.Inf(-1)
	}
	return (math.Log(a) - d.logScale) / d.k
}

// newHistogramDist returns the histogram-family delay with the given edges
// and hazards; haz is used in place and its last entry is forced to 1.
func newHistogramDist(edges, haz []float64) delayDist {
	d := delayDist{family: FamilyHistogram, w: edges[len(edges)-1], edges: edges, haz: haz}
	d.logSurvEdge = make([]float64, len(edges))
	d.refreshHistogram()
	return d
}

// refreshHistogram recomputes the survival at the edges after haz changed.
func (d *delayDist) refreshHistogram() {
	n := len(d.haz)
	d.haz[n-1] = 1
	d.logSurvEdge[0] = 0
	for i, h := range d.haz {
		d.logSurvEdge[i+1] = d.logSurvEdge[i] + log1mx(h)
	}
}

// log1mx returns log(1-h), -Inf at h >= 1.
func log1mx(h float64) float64 {
	if h >= 1 {
		return math.Inf(-1)
	}
	return math.Log1p(-h)
}

// x returns the Weibull cumulative hazard (a/s)^k, 0 for a <= 0.
func (d *delayDist) x(a float64) float64 {
	if a <= 0 {
		return 0
	}
	return math.Exp(d.k * (math.Log(a) - d.logScale))
}

// logFMass returns log(F(hi) - F(lo)) for the untruncated Weibull given the
// cumulative hazards at lo and hi.
func logFMass(xlo, xhi float64) float64 {
	dx := xhi - xlo
	if !(dx > 0) {
		return math.Inf(-1)
	}
	return -xlo + math.Log(-math.Expm1(-dx))
}

// binOf returns the histogram bin holding a (clamped to [0, W)) and the
// fraction of the bin's width below a.
func binOf(edges []float64, a float64) (int, float64) {
	n := len(edges) - 1
	if a <= 0 {
		return 0, 0
	}
	if a >= edges[n] {
		return n - 1, 1
	}
	i := sort.SearchFloat64s(edges, a) // first edge >= a, 1 <= i <= n
	if edges[i] == a {
		return i, 0
	}
	i--
	return i, (a - edges[i]) / (edges[i+1] - edges[i])
}

// logSurv returns log(1 - G(a)), the log-probability that a converter's
// delay exceeds a.
func (d *delayDist) logSurv(a float64) float64 {
	if a <= 0 {
		return 0
	}
	if a >= d.w {
		return math.Inf(-1)
	}
	switch d.family {
	case FamilyHistogram:
		i, f := binOf(d.edges, a)
		return d.logSurvEdge[i] + log1mx(d.haz[i]*f)
	case FamilyLognormal:
		return logNormalMass(d.lnZ(a), d.zW) - d.logPhiW
	}
	return logFMass(d.x(a), d.xW) - d.logFW
}

// logSurvBin is logSurv for an age already located in bin i at fraction f
// (histogram family only).
func (d *delayDist) logSurvBin(i int, f float64) float64 {
	return d.logSurvEdge[i] + log1mx(d.haz[i]*f)
}

// cdf returns G(a), the probability that a converter's delay is at most a.
func (d *delayDist) cdf(a float64) float64 {
	if a <= 0 {
		return 0
	}
	if a >= d.w {
		return 1
	}
	return -math.Expm1(d.logSurv(a))
}

// logBinMasses writes log(G(e_{i+1}) - G(e_i)) for every bin of edges into
// dst.
func (d *delayDist) logBinMasses(edges, dst []float64) {
	if d.family == FamilyHistogram {
		for i, h := range d.haz {
			dst[i] = d.logSurvEdge[i] + math.Log(h)
		}
		return
	}
	if d.family == FamilyLognormal {
		zlo := d.lnZ(edges[0])
		for i := range dst {
			zhi := d.zW
			if i+1 < len(edges)-1 {
				zhi = d.lnZ(edges[i+1])
			}
			dst[i] = logNormalMass(zlo, zhi) - d.logPhiW
			zlo = zhi
		}
		return
	}
	xlo := d.x(edges[0])
	for i := range dst {
		xhi := d.xW
		if i+1 < len(edges)-1 {
			xhi = d.x(edges[i+1])
		}
		dst[i] = logFMass(xlo, xhi) - d.logFW
		xlo = xhi
	}
}

// mean returns the mean delay E[D | D <= W] in seconds.
func (d *delayDist) mean() float64 {
	if d.family == FamilyHistogram {
		m := 0.0
		for i, h := range d.haz {
			p := math.Exp(d.logSurvEdge[i]) * h
			m += p * (d.edges[i] + d.edges[i+1]) / 2
		}
		return m
	}
	if d.family == FamilyLognormal {
		// E[D; D <= W] = e^(mu + sigma^2/2) Phi(zW - sigma) for the
		// lognormal.
		m := math.Exp(d.logScale + d.k*d.k/2 + logPhi(d.zW-d.k) - d.logPhiW)
		return math.Min(m, d.w)
	}
	// E[D; D <= W] = s * Gamma(1+1/k) * P(1+1/k, (W/s)^k) for the Weibull,
	// P the regularised lower incomplete gamma function.
	a := 1 + 1/d.k
	lg, _ := math.Lgamma(a)
	m := d.s * math.Exp(lg-d.logFW) * mathext.GammaIncReg(a, d.xW)
	return math.Min(m, d.w)
}
