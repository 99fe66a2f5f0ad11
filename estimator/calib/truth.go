package calib

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"

	"gonum.org/v1/gonum/stat/distuv"

	"ripen/estimator"
	"ripen/estimator/sim"
)

// TruthFamily names the delay family of the simulated truth.
type TruthFamily string

// Delay families of the truth.
const (
	TruthExponential TruthFamily = "exponential"
	TruthWeibull     TruthFamily = "weibull"
	TruthLognormal   TruthFamily = "lognormal"
	// TruthMixture is a two-component mixture: quick buyers (exponential)
	// and slow ones (lognormal).
	TruthMixture TruthFamily = "mixture"
)

// TruthFamilies lists the truth families in a fixed order.
func TruthFamilies() []TruthFamily {
	return []TruthFamily{TruthExponential, TruthWeibull, TruthLognormal, TruthMixture}
}

// ParseTruthFamily returns the truth family called name.
func ParseTruthFamily(name string) (TruthFamily, error) {
	if t := TruthFamily(name); slices.Contains(TruthFamilies(), t) {
		return t, nil
	}
	names := make([]string, 0, 4)
	for _, t := range TruthFamilies() {
		names = append(names, string(t))
	}
	return "", fmt.Errorf("unknown truth family %q (valid: %s)", name, strings.Join(names, ", "))
}

// Ranges of the coverage truth. Each replicate draws its parameters
// uniformly from them (scales log-uniformly), fixed here so that every run
// of the grid asks the same question.
const (
	// minMeanDelayHours and maxMeanDelayWindows bound the mean delay of the
	// untruncated delay distribution: from one hour to two windows.
	minMeanDelayHours   = 1.0
	maxMeanDelayWindows = 2.0
	// Weibull shape range.
	minWeibullShape, maxWeibullShape = 0.5, 2.0
	// Lognormal sigma range.
	minLognormalSigma, maxLognormalSigma = 0.5, 1.5
	// Mixture: the quick component's weight and mean delay (exponential,
	// one hour to a fourteenth of the window), the slow component's mean
	// (lognormal with sigma mixtureSlowSigma, a quarter window to two
	// windows).
	minMixtureQuickWeight, maxMixtureQuickWeight = 0.3, 0.7
	maxMixtureQuickWindows                       = 1.0 / 14
	minMixtureSlowWindows                        = 0.25
	mixtureSlowSigma                             = 0.7
)

// logUniform draws from lo to hi uniformly on the log scale.
func logUniform(r *rand.Rand, lo, hi float64) float64 {
	return math.Exp(math.Log(lo) + r.Float64()*(math.Log(hi)-math.Log(lo)))
}

func uniform(r *rand.Rand, lo, hi float64) float64 { return lo + r.Float64()*(hi-lo) }

// truthDelay draws the delay distribution of one replicate of truth family
// t (before conditioning on the window W, seconds): the mean delay is
// log-uniform from one hour to two windows; Weibull shapes are uniform on
// [0.5, 2], lognormal sigmas on [0.5, 1.5]; a mixture puts a uniform
// [0.3, 0.7] weight on quick exponential buyers (mean one hour to W/14) and
// the rest on slow lognormal ones (sigma 0.7, mean W/4 to 2W).
func truthDelay(r *rand.Rand, t TruthFamily, w float64) (sim.Distribution, error) {
	mean := logUniform(r, minMeanDelayHours*3600, maxMeanDelayWindows*w)
	switch t {
	case TruthExponential:
		return sim.Exponential{Mean: mean}, nil
	case TruthWeibull:
		k := uniform(r, minWeibullShape, maxWeibullShape)
		return sim.Weibull{Shape: k, Scale: mean / math.Gamma(1+1/k)}, nil
	case TruthLognormal:
		s := uniform(r, minLognormalSigma, maxLognormalSigma)
		return sim.Lognormal{Median: mean * math.Exp(-s*s/2), Sigma: s}, nil
	case TruthMixture:
		wq := uniform(r, minMixtureQuickWeight, maxMixtureQuickWeight)
		quick := logUniform(r, minMeanDelayHours*3600, maxMixtureQuickWindows*w)
		slow := logUniform(r, minMixtureSlowWindows*w, maxMeanDelayWindows*w)
		return sim.Mixture{
			Weights: []float64{wq, 1 - wq},
			Components: []sim.Distribution{
				sim.Exponential{Mean: quick},
				sim.Lognormal{Median: slow * math.Exp(-mixtureSlowSigma*mixtureSlowSigma/2), Sigma: mixtureSlowSigma},
			},
		}, nil
	}
	return nil, fmt.Errorf("unknown truth family %q", t)
}

// priorDraw draws an arm's eventual conversion rate q and its delay
// distribution (before conditioning on the window w, seconds) from the
// estimator's prior for the fitted family: the truth of simulation-based
// calibration, which is exact only when data are drawn from the prior the
// posterior assumes. It reads estimator.Prior's defaults; replace this
// function if the estimator's prior changes shape.
//
// q ~ Beta(QAlpha, QBeta); the delay scale (the exponential's mean, the
// Weibull's scale, the lognormal's median) is log-normal around
// ScaleMedian windows with log standard deviation ScaleSpread, truncated
// to [ScaleMin, ScaleMax] windows; the Weibull shape is log-normal around
// 1 with log standard deviation ShapeSpread, truncated to [ShapeMin,
// ShapeMax], and the lognormal's sigma likewise with SigmaSpread, SigmaMin
// and SigmaMax. The histogram family has no parametric prior: its truth is
// drawn as a Weibull (which it contains); auto draws the exponential, the
// Weibull or the lognormal with probability 1/3 each (equal prior odds of
// the families it averages; the histogram family, which joins auto only
// once the window has been observed and by its AICc weight, is left out).
func priorDraw(r *rand.Rand, family estimator.DelayFamily, w float64) (q float64, delay sim.Distribution) {
	p := estimator.Prior{}.WithDefaults()
	q = distuv.Beta{Alpha: p.QAlpha, Beta: p.QBeta, Src: r}.Rand()
	scale := w * math.Exp(truncatedNormal(r, math.Log(p.ScaleMedian), p.ScaleSpread, math.Log(p.ScaleMin), math.Log(p.ScaleMax)))
	if family == estimator.FamilyAuto {
		family = []estimator.DelayFamily{estimator.FamilyExponential, estimator.FamilyWeibull, estimator.FamilyLognormal}[r.IntN(3)]
	}
	switch family {
	case estimator.FamilyWeibull, estimator.FamilyHistogram:
		shape := math.Exp(truncatedNormal(r, 0, p.ShapeSpread, math.Log(p.ShapeMin), math.Log(p.ShapeMax)))
		return q, sim.Weibull{Shape: shape, Scale: scale}
	case estimator.FamilyLognormal:
		sigma := math.Exp(truncatedNormal(r, 0, p.SigmaSpread, math.Log(p.SigmaMin), math.Log(p.SigmaMax)))
		return q, sim.Lognormal{Median: scale, Sigma: sigma}
	}
	return q, sim.Exponential{Mean: scale}
}

// truncatedNormal draws from Normal(mu, sd^2) restricted to [lo, hi] by
// rejection (the priors keep most of their mass inside their bounds).
func truncatedNormal(r *rand.Rand, mu, sd, lo, hi float64) float64 {
	for {
		if x := mu + sd*r.NormFloat64(); x >= lo && x <= hi {
			return x
		}
	}
}

// armStart is the simulated start of every arm's traffic (Unix ms).
var armStart = sim.Start

// simulateArm builds the state of one arm that receives steady traffic of
// clicksPerHour from time 0 to asOf (both seconds): clicks arrive in
// batches every step seconds (Poisson counts, split by Poisson thinning
// into converters, rate clicksPerHour*q, and the rest); each converter's
// delay is drawn from delay (conditioned on the window) and its conversion
// is recorded when it falls by asOf.
func simulateArm(r *rand.Rand, q float64, delay sim.Truncated, clicksPerHour, asOf, step float64, layout estimator.Layout) *estimator.ArmState {
	st := estimator.NewArmState(layout)
	windowMs := layout.Window.Milliseconds()
	asOfMs := int64(math.Round(asOf * 1000))
	perStep := clicksPerHour * step / 3600
	conv := distuv.Poisson{Lambda: perStep * q, Src: r}
	rest := distuv.Poisson{Lambda: perStep * (1 - q), Src: r}
	type event struct{ click, at int64 }
	var events []event
	for s := 0; ; s++ {
		at := int64(math.Round(float64(s) * step * 1000))
		if at >= asOfMs {
			break
		}
		var c, n float64
		if conv.Lambda > 0 {
			c = conv.Rand()
		}
		if rest.Lambda > 0 {
			n = rest.Rand()
		}
		if c+n == 0 {
			continue
		}
		st.AddClicks(armStart+at, uint64(c+n))
		for range int(c) {
			d := min(max(int64(math.Round(delay.Sample(r)*1000)), 0), windowMs)
			if at+d <= asOfMs {
				events = append(events, event{click: at, at: at + d})
			}
		}
	}
	st.Advance(armStart + asOfMs)
	for _, e := range events {
		st.AddConversion(armStart+e.click, armStart+e.at)
	}
	return st
}
