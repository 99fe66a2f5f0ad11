package sim

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
)

// Distribution is a conversion-delay distribution on [0, inf), in seconds.
type Distribution interface {
	// CDF returns P(delay <= x), x in seconds.
	CDF(x float64) float64
	// Sample draws one delay in seconds using r.
	Sample(r *rand.Rand) float64
}

// Exponential is the exponential distribution with mean Mean seconds.
type Exponential struct{ Mean float64 }

// CDF implements Distribution: 1 - exp(-x/Mean).
func (e Exponential) CDF(x float64) float64 {
	if x <= 0 {
		return 0
	}
	return -math.Expm1(-x / e.Mean)
}

// Sample implements Distribution.
func (e Exponential) Sample(r *rand.Rand) float64 { return e.Mean * r.ExpFloat64() }

// Weibull is the Weibull distribution, CDF 1 - exp(-(x/Scale)^Shape),
// Scale in seconds.
type Weibull struct{ Shape, Scale float64 }

// CDF implements Distribution.
func (w Weibull) CDF(x float64) float64 {
	if x <= 0 {
		return 0
	}
	return -math.Expm1(-math.Pow(x/w.Scale, w.Shape))
}

// Sample implements Distribution by inversion: Scale * E^(1/Shape) with E
// standard exponential.
func (w Weibull) Sample(r *rand.Rand) float64 {
	return w.Scale * math.Pow(r.ExpFloat64(), 1/w.Shape)
}

// Lognormal is the lognormal distribution: log(delay) ~ N(log(Median),
// Sigma^2), Median in seconds.
type Lognormal struct{ Median, Sigma float64 }

// CDF implements Distribution: Phi((log x - log Median)/Sigma).
func (l Lognormal) CDF(x float64) float64 {
	if x <= 0 {
		return 0
	}
	return 0.5 * math.Erfc(-math.Log(x/l.Median)/(l.Sigma*math.Sqrt2))
}

// Sample implements Distribution.
func (l Lognormal) Sample(r *rand.Rand) float64 {
	return l.Median * math.Exp(l.Sigma*r.NormFloat64())
}

// Constant is a point mass at Delay seconds.
type Constant struct{ Delay float64 }

// CDF implements Distribution: a step at Delay.
func (c Constant) CDF(x float64) float64 {
	if x >= c.Delay {
		return 1
	}
	return 0
}

// Sample implements Distribution.
func (c Constant) Sample(*rand.Rand) float64 { return c.Delay }

// Mixture is a weighted mixture of delay distributions; Weights are
// positive and sum to 1.
type Mixture struct {
	Weights    []float64
	Components []Distribution
}

// CDF implements Distribution.
func (m Mixture) CDF(x float64) float64 {
	var p float64
	for i, c := range m.Components {
		p += m.Weights[i] * c.CDF(x)
	}
	return p
}

// Sample implements Distribution: a component is drawn by weight, then a
// delay from it.
func (m Mixture) Sample(r *rand.Rand) float64 {
	u := r.Float64()
	for i, w := range m.Weights {
		if u < w || i == len(m.Weights)-1 {
			return m.Components[i].Sample(r)
		}
		u -= w
	}
	panic("unreachable")
}

// Truncated is Base conditioned on delay <= Max seconds: the distribution
// of a converter's delay within the attribution window.
type Truncated struct {
	Base Distribution
	Max  float64
	mass float64
}

// NewTruncated conditions base on [0, max]; it fails when base puts no
// mass there.
func NewTruncated(base Distribution, max float64) (Truncated, error) {
	m := base.CDF(max)
	if !(m > 0) {
		return Truncated{}, fmt.Errorf("delay distribution has no mass within %gs", max)
	}
	return Truncated{Base: base, Max: max, mass: m}, nil
}

// CDF implements Distribution: Base.CDF(x)/Base.CDF(Max) below Max.
func (t Truncated) CDF(x float64) float64 {
	if x >= t.Max {
		return 1
	}
	return t.Base.CDF(x) / t.mass
}

// Sample implements Distribution by rejection: draws from Base until one
// falls within [0, Max] (expected 1/Base.CDF(Max) draws).
func (t Truncated) Sample(r *rand.Rand) float64 {
	for {
		if d := t.Base.Sample(r); d <= t.Max {
			return d
		}
	}
}

// Distribution returns the distribution k describes, or an error naming
// what is wrong.
func (k DelayKind) Distribution() (Distribution, error) {
	var set []string
	var d Distribution
	var err error
	if e := k.Exponential; e != nil {
		set = append(set, "exponential")
		if !(e.Mean > 0) {
			err = fmt.Errorf("exponential.mean: %v must be positive", e.Mean)
		}
		d = Exponential{Mean: e.Mean.D().Seconds()}
	}
	if w := k.Weibull; w != nil {
		set = append(set, "weibull")
		switch {
		case !(w.Shape > 0 && w.Shape <= 50):
			err = fmt.Errorf("weibull.shape: %v must be in (0, 50]", w.Shape)
		case !(w.Scale > 0):
			err = fmt.Errorf("weibull.scale: %v must be positive", w.Scale)
		}
		d = Weibull{Shape: w.Shape, Scale: w.Scale.D().Seconds()}
	}
	if l := k.Lognormal; l != nil {
		set = append(set, "lognormal")
		switch {
		case !(l.Median > 0):
			err = fmt.Errorf("lognormal.median: %v must be positive", l.Median)
		case !(l.Sigma > 0 && l.Sigma <= 10):
			err = fmt.Errorf("lognormal.sigma: %v must be in (0, 10]", l.Sigma)
		}
		d = Lognormal{Median: l.Median.D().Seconds(), Sigma: l.Sigma}
	}
	if c := k.Constant; c != nil {
		set = append(set, "constant")
		if c.Delay < 0 {
			err = fmt.Errorf("constant.delay: %v must not be negative", c.Delay)
		}
		d = Constant{Delay: c.Delay.D().Seconds()}
	}
	switch {
	case len(set) == 0:
		return nil, errNoKind
	case len(set) > 1:
		return nil, fmt.Errorf("exactly one delay kind allowed, got %s", strings.Join(set, " and "))
	case err != nil:
		return nil, err
	}
	return d, nil
}

var errNoKind = errors.New("one of exponential, weibull, lognormal, constant or mixture is required")

// Distribution returns the distribution s describes, or an error naming
// what is wrong.
func (s DelaySpec) Distribution() (Distribution, error) {
	if len(s.Mixture) == 0 {
		return s.DelayKind.Distribution()
	}
	if _, err := s.DelayKind.Distribution(); !errors.Is(err, errNoKind) {
		return nil, errors.New("mixture cannot be combined with another delay kind at the same level")
	}
	m := Mixture{}
	var total float64
	for i, c := range s.Mixture {
		if !(c.Weight > 0) || math.IsInf(c.Weight, 0) {
			return nil, fmt.Errorf("mixture[%d].weight: %v must be positive", i, c.Weight)
		}
		d, err := c.DelayKind.Distribution()
		if err != nil {
			return nil, fmt.Errorf("mixture[%d]: %w", i, err)
		}
		total += c.Weight
		m.Weights = append(m.Weights, c.Weight)
		m.Components = append(m.Components, d)
	}
	for i := range m.Weights {
		m.Weights[i] /= total
	}
	return m, nil
}
