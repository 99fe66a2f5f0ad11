package estimator

import (
	"errors"
	"fmt"
	"hash/fnv"
	"math"
	"time"
)

// ArmData is one arm of an experiment as EvaluateExperiment sees it.
type ArmData struct {
	// Arm is the arm's identifier, unique within the experiment.
	Arm string
	// State is the arm's compact state at the experiment's as-of time.
	State *ArmState
	// Paused arms are fitted and reported but get no traffic.
	Paused bool
	// Warm is the arm's previous fit, to warm-start EM from; nil for none.
	Warm *Fit
}

// ExperimentInput is everything EvaluateExperiment needs.
type ExperimentInput struct {
	// Experiment is the experiment's identifier.
	Experiment string
	// AsOf is the event time (Unix ms) the states were advanced to.
	AsOf int64
	// Arms in a stable order (reports keep it).
	Arms []ArmData
	// Fit configures the model; Warm is taken per arm from ArmData.
	Fit FitOptions
	// Allocation configures the policy and guardrails. Start from
	// DefaultAllocationOptions.
	Allocation AllocationOptions
	// PrevWeights are the weights last published, indexed like Arms, or nil.
	PrevWeights []float64
	// PrevSettle is the settle state of the previous evaluation (the
	// report's SettledAt and Settle.Arm when it was settled), or nil.
	PrevSettle *SettleState
	// Prior is the prior of every arm's model parameters. Default: the zero
	// value (DefaultPrior's values).
	Prior Prior
	// Seed drives every random draw. Default: 0, which derives a seed from
	// the experiment id and as-of time, so replays reproduce the weights.
	Seed uint64
}

// ExperimentReport is the estimate of one experiment at one as-of time:
// what `ripen fit` prints and what allocation messages carry.
type ExperimentReport struct {
	Experiment string           `json:"experiment"`
	AsOf       string           `json:"as_of"`
	Status     AllocationStatus `json:"status"`
	// SettledAt is the event time at which the settle rule first named the
	// settled arm; empty while not settled.
	SettledAt string             `json:"settled_at,omitempty"`
	Settle    SettleReport       `json:"settle"`
	Policy    string             `json:"policy"`
	Leader    string             `json:"leader"`
	Weights   map[string]float64 `json:"weights"`
	Arms      []ArmReport        `json:"arms"`

	// Fits are the arms' fits, indexed like Arms, for warm starts; not
	// serialised.
	Fits []*Fit `json:"-"`
	// SettleState is the settle state to pass to the next evaluation as
	// PrevSettle (nil when not settled); not serialised (SettledAt and
	// Settle.Arm carry it).
	SettleState *SettleState `json:"-"`
}

// PrevSettle returns the settle state a report carries, for the next
// evaluation's ExperimentInput.PrevSettle: nil unless it is settled.
func (r *ExperimentReport) PrevSettle() (*SettleState, error) {
	if r.Status != StatusSettled || r.SettledAt == "" || r.Settle.Arm == "" {
		return nil, nil
	}
	t, err := time.Parse(time.RFC3339Nano, r.SettledAt)
	if err != nil {
		return nil, fmt.Errorf("report %q: settled_at: %w", r.Experiment, err)
	}
	return &SettleState{Arm: r.Settle.Arm, At: t.UnixMilli()}, nil
}

// ArmReport is the estimate of one arm.
type ArmReport struct {
	Arm         string `json:"arm"`
	Clicks      uint64 `json:"clicks"`
	Conversions uint64 `json:"conversions"`
	// ObservedCVR is conversions / clicks: biased low while clicks are young.
	ObservedCVR float64 `json:"observed_cvr"`
	// RipeClicks weights each click by the probability its conversion, if
	// any, would have been seen by now.
	RipeClicks float64 `json:"ripe_clicks"`
	// MaturedClicks are the clicks older than the attribution window, whose
	// outcome is known.
	MaturedClicks uint64 `json:"matured_clicks"`
	// EventualCVR is the posterior median of the probability q of
	// converting within the window; CVRLow and CVRHigh its 95% equal-tailed
	// credible interval (the median always lies inside it).
	EventualCVR float64 `json:"eventual_cvr"`
	CVRLow      float64 `json:"cvr_low"`
	CVRHigh     float64 `json:"cvr_high"`
	// PosteriorMean is the posterior mean of q.
	PosteriorMean float64 `json:"posterior_mean"`
	// AnytimeLow and AnytimeHigh bound the eventual rate at every refit
	// at once, from matured clicks and seen conversions only (the settle
	// rule's evidence; see Settle).
	AnytimeLow  float64 `json:"anytime_low"`
	AnytimeHigh float64 `json:"anytime_high"`
	// BetaMean, BetaLow and BetaHigh summarise the delay-corrected Beta
	// posterior Beta(conversions+1, ripe clicks-conversions+1).
	BetaMean float64 `json:"beta_mean"`
	BetaLow  float64 `json:"beta_low"`
	BetaHigh float64 `json:"beta_high"`
	// PBest is the probability of being best under the likelihood
	// posterior; ExpectedLoss the expected CVR lost by choosing this arm.
	PBest        float64 `json:"p_best"`
	ExpectedLoss float64 `json:"expected_loss"`
	Weight       float64 `json:"weight"`
	Paused       bool    `json:"paused,omitempty"`
	Delay        Delay   `json:"delay"`
}

// Delay describes an arm's fitted delay distribution and fit diagnostics.
type Delay struct {
	// Family is the delay family reported: the one with the largest
	// posterior probability when families are averaged.
	Family string `json:"family"`
	// Families are the posterior probabilities of the delay families
	// averaged by the auto setting (absent for a single family).
	Families map[string]float64 `json:"families,omitempty"`
	// MeanHours is the mean delay of converters, E[D | D <= W], in hours.
	MeanHours float64 `json:"mean_hours"`
	// RatePerHour is the exponential rate.
	RatePerHour float64 `json:"rate_per_hour,omitempty"`
	// Shape and ScaleHours are the Weibull's shape and scale, or the
	// lognormal's sigma and median.
	Shape      float64 `json:"shape,omitempty"`
	ScaleHours float64 `json:"scale_hours,omitempty"`
	// MedianHours is the median delay of converters in hours.
	MedianHours float64 `json:"median_hours"`
	Iterations  int     `json:"iterations"`
	Converged   bool    `json:"converged"`
	LogLik      float64 `json:"log_lik"`
	AIC         float64 `json:"aic"`
}

// credibleMass is the mass of reported credible intervals.
const credibleMass = 0.95

// DeriveSeed returns the default seed of an experiment at an as-of time: a
// hash of both, so that every evaluation is reproducible.
func DeriveSeed(experiment string, asOf int64) uint64 {
	h := fnv.New64a()
	h.Write([]byte(experiment))
	var b [8]byte
	for i := range b {
		b[i] = byte(uint64(asOf) >> (8 * i))
	}
	h.Write(b[:])
	return h.Sum64()
}

// EvaluateExperiment fits every arm, computes their posteriors and the
// allocation, and returns the report. It is a pure function of its input.
func EvaluateExperiment(in ExperimentInput) (ExperimentReport, error) {
	if len(in.Arms) == 0 {
		return ExperimentReport{}, fmt.Errorf("experiment %q: no arms", in.Experiment)
	}
	seed := in.Seed
	if seed == 0 {
		seed = DeriveSeed(in.Experiment, in.AsOf)
	}
	rep := ExperimentReport{
		Experiment: in.Experiment,
		AsOf:       time.UnixMilli(in.AsOf).UTC().Format(time.RFC3339Nano),
		Weights:    make(map[string]float64, len(in.Arms)),
		Fits:       make([]*Fit, len(in.Arms)),
	}
	inputs := make([]ArmInput, len(in.Arms))
	evidence := make([]ArmEvidence, len(in.Arms))
	paused := make([]bool, len(in.Arms))
	names := make([]string, len(in.Arms))
	var errs []error
	for i, a := range in.Arms {
		ar, fit, post, err := evaluateArm(a, in.Fit, in.Prior)
		if err != nil {
			errs = append(errs, fmt.Errorf("arm %q: %w", a.Arm, err))
			continue
		}
		rep.Arms = append(rep.Arms, ar)
		rep.Fits[i] = fit
		inputs[i] = ArmInput{
			Arm:         a.Arm,
			Clicks:      float64(ar.Clicks),
			Conversions: float64(ar.Conversions),
			RipeClicks:  ar.RipeClicks,
			Likelihood:  post,
			Paused:      a.Paused,
		}
		mc, mv := a.State.Matured()
		evidence[i] = ArmEvidence{
			Clicks:             float64(ar.Clicks),
			Conversions:        float64(ar.Conversions),
			MaturedClicks:      float64(mc),
			MaturedConversions: float64(mv),
			PendingRipe:        math.Max(ar.RipeClicks-float64(mc), 0),
		}
		paused[i], names[i] = a.Paused, a.Arm
	}
	if err := errors.Join(errs...); err != nil {
		return ExperimentReport{}, fmt.Errorf("experiment %q: %w", in.Experiment, err)
	}
	alloc, err := Allocate(inputs, in.PrevWeights, in.Allocation, seed)
	if err != nil {
		return ExperimentReport{}, fmt.Errorf("experiment %q: %w", in.Experiment, err)
	}
	set, err := Settle(SettleInput{
		Arms: names, Evidence: evidence, Paused: paused,
		Leader:     alloc.Leader,
		BurnedIn:   alloc.Status != StatusCollecting,
		BurnIn:     alloc.BurnIn,
		Window:     in.Arms[0].State.Layout().Window,
		AsOf:       in.AsOf,
		Prev:       in.PrevSettle,
		Confidence: in.Allocation.SettleConfidence,
		Tolerance:  in.Allocation.SettleTolerance,
	})
	if err != nil {
		return ExperimentReport{}, fmt.Errorf("experiment %q: %w", in.Experiment, err)
	}
	rep.Status = alloc.Status
	rep.Settle = set.Report
	rep.SettleState = set.State
	if set.Report.Settled {
		rep.Status = StatusSettled
		rep.SettledAt = time.UnixMilli(set.State.At).UTC().Format(time.RFC3339Nano)
	}
	rep.Policy = alloc.Policy
	rep.Leader = alloc.Arms[alloc.Leader]
	for i := range rep.Arms {
		rep.Arms[i].PBest = alloc.PBest[i]
		rep.Arms[i].ExpectedLoss = alloc.ExpectedLoss[i]
		rep.Arms[i].Weight = alloc.Weights[i]
		rep.Arms[i].AnytimeLow, rep.Arms[i].AnytimeHigh = set.Low[i], set.High[i]
		rep.Weights[rep.Arms[i].Arm] = alloc.Weights[i]
	}
	return rep, nil
}

// evaluateArm fits one arm and summarises its two posteriors: the
// integrated posterior of q (averaged over families for FamilyAuto) and
// the delay-corrected Beta of its most probable family's fit.
func evaluateArm(a ArmData, opts FitOptions, prior Prior) (ArmReport, *Fit, Posterior, error) {
	if a.State == nil {
		return ArmReport{}, nil, nil, errors.New("no state")
	}
	data := a.State.FitData()
	post, err := ArmPosterior(&data, opts.Family, prior, a.Warm)
	if err != nil {
		return ArmReport{}, nil, nil, err
	}
	fit := post.Fit()
	if fit == nil {
		return ArmReport{}, nil, nil, errors.New("posterior without a fit")
	}
	beta, err := fit.DelayCorrectedBeta()
	if err != nil {
		return ArmReport{}, nil, nil, err
	}
	clicks, convs := a.State.Clicks(), a.State.Conversions()
	matured, _ := a.State.Matured()
	lo, hi := post.Interval(credibleMass)
	ar := ArmReport{
		Arm:           a.Arm,
		Clicks:        clicks,
		Conversions:   convs,
		MaturedClicks: matured,
		RipeClicks:    fit.RipeClicks,
		EventualCVR:   post.Median,
		CVRLow:        lo,
		CVRHigh:       hi,
		PosteriorMean: post.Mean(),
		BetaMean:      beta.Mean(),
		BetaLow:       beta.Quantile((1 - credibleMass) / 2),
		BetaHigh:      beta.Quantile((1 + credibleMass) / 2),
		Paused:        a.Paused,
		Delay:         describeDelay(fit),
	}
	if len(post.Families) > 1 {
		ar.Delay.Families = make(map[string]float64, len(post.Families))
		for _, f := range post.Families {
			ar.Delay.Families[f.Family.String()] = f.Weight
		}
	}
	if clicks > 0 {
		ar.ObservedCVR = float64(convs) / float64(clicks)
	}
	return ar, fit, post, nil
}

// describeDelay summarises a fit's delay distribution.
func describeDelay(f *Fit) Delay {
	d := Delay{
		Family:      f.Family.String(),
		MeanHours:   f.MeanDelayHours(),
		MedianHours: medianDelay(f) / 3600,
		Iterations:  f.Iterations,
		Converged:   f.Converged,
		LogLik:      f.LogLik,
		AIC:         f.AIC,
	}
	switch f.Family {
	case FamilyExponential:
		d.RatePerHour = f.Rate * 3600
	case FamilyWeibull, FamilyLognormal:
		d.Shape = f.Shape
		d.ScaleHours = f.Scale / 3600
	}
	return d
}

// CDF returns the delay distribution d describes, G(a) for a delay of a
// seconds in an attribution window of window seconds: the inverse of
// describeDelay for the exponential, Weibull and lognormal families. It
// reports false for the histogram family (a report does not carry its
// hazards) and for parameters that describe no distribution.
func (d Delay) CDF(window float64) (func(float64) float64, bool) {
	if !(window > 0) {
		return nil, false
	}
	var dist delayDist
	switch d.Family {
	case FamilyExponential.String():
		if !(d.RatePerHour > 0) {
			return nil, false
		}
		dist = newParametric(FamilyExponential, 1, 3600/d.RatePerHour, window)
	case FamilyWeibull.String(), FamilyLognormal.String():
		if !(d.Shape > 0 && d.ScaleHours > 0) {
			return nil, false
		}
		if d.Family == FamilyWeibull.String() {
			dist = newParametric(FamilyWeibull, d.Shape, 3600*d.ScaleHours, window)
		} else {
			dist = newLognormal(d.Shape, 3600*d.ScaleHours, window)
		}
	default:
		return nil, false
	}
	return dist.cdf, true
}

// medianDelay finds G(m) = 1/2 by bisection on [0, W] (G is monotone).
func medianDelay(f *Fit) float64 {
	lo, hi := 0.0, f.Window
	for i := 0; i < 100 && hi-lo > 1e-6*f.Window; i++ {
		mid := (lo + hi) / 2
		if f.CDF(mid) < 0.5 {
			lo = mid
		} else {
			hi = mid
		}
	}
	if math.IsNaN(lo) {
		return 0
	}
	return (lo + hi) / 2
}

// ParseDelayFamily maps a family name (auto, exponential, weibull,
// histogram) to its DelayFamily.
func ParseDelayFamily(name string) (DelayFamily, error) {
	for _, f := range []DelayFamily{FamilyAuto, FamilyExponential, FamilyWeibull, FamilyHistogram} {
		if f.String() == name {
			return f, nil
		}
	}
	return 0, fmt.Errorf("unknown delay family %q (want auto, exponential, weibull or histogram)", name)
}
