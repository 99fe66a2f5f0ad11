package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"sort"
	"strings"
)

// ArmInput is what allocation needs to know about one arm.
type ArmInput struct {
	// Arm is the arm's identifier; non-empty and unique within a call.
	Arm string
	// Clicks is the number of clicks (exposures) so far.
	Clicks float64
	// Conversions is the number of conversions attributed so far.
	Conversions float64
	// RipeClicks is the delay-weighted number of clicks whose conversions
	// should have arrived by now (sum over clicks of the delay CDF at their
	// age, truncated at the attribution window).
	RipeClicks float64
	// Likelihood is the posterior of the eventual conversion probability from
	// the delay-censored likelihood. Required for every non-paused arm.
	Likelihood Posterior
	// Paused arms receive weight 0 and are left out of every comparison.
	Paused bool
}

// PosteriorSource says which posterior of an arm a policy samples from.
type PosteriorSource int

const (
	// PosteriorLikelihood uses ArmInput.Likelihood (delay-censored model).
	PosteriorLikelihood PosteriorSource = iota
	// PosteriorObserved uses NewObservedBeta(Clicks, Conversions), ignoring delay.
	PosteriorObserved
	// PosteriorDelayCorrected uses NewDelayCorrectedBeta(RipeClicks, Conversions).
	PosteriorDelayCorrected
)

// For returns the posterior of arm a that this source designates.
func (s PosteriorSource) For(a ArmInput) (Posterior, error) {
	switch s {
	case PosteriorLikelihood:
		if a.Likelihood == nil {
			return nil, fmt.Errorf("arm %q: no likelihood posterior", a.Arm)
		}
		return a.Likelihood, nil
	case PosteriorObserved:
		b, err := NewObservedBeta(a.Clicks, a.Conversions)
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", a.Arm, err)
		}
		return b, nil
	case PosteriorDelayCorrected:
		b, err := NewDelayCorrectedBeta(a.RipeClicks, a.Conversions)
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", a.Arm, err)
		}
		return b, nil
	}
	return nil, fmt.Errorf("unknown posterior source %d", int(s))
}

// allocPosteriors collects one posterior per arm from source s.
func allocPosteriors(s PosteriorSource, arms []ArmInput) ([]Posterior, error) {
	posts := make([]Posterior, len(arms))
	for i, a := range arms {
		p, err := s.For(a)
		if err != nil {
			return nil, err
		}
		posts[i] = p
	}
	return posts, nil
}

// Policy turns the active (non-paused) arms into raw traffic weights, before
// guardrails. Implementations must be deterministic given r's state.
type Policy interface {
	// Name is the policy's registered name (see PolicyNames).
	Name() string
	// Weights returns one non-negative weight per arm, summing to 1. arms is
	// non-empty and contains no paused arm.
	Weights(arms []ArmInput, r *rand.Rand) ([]float64, error)
}

// Registered policy names.
const (
	PolicyUniform          = "uniform"
	PolicyThompsonObserved = "thompson-observed"
	PolicyThompsonDelay    = "thompson-delay"
	PolicyThompsonBayes    = "thompson-bayes"
	PolicyTopTwo           = "top-two"
	// DefaultPolicy is the policy used when AllocationOptions.Policy is nil.
	DefaultPolicy = PolicyThompsonBayes
)

// PolicyNames lists the valid policy names in a fixed order.
func PolicyNames() []string {
	return []string{PolicyUniform, PolicyThompsonObserved, PolicyThompsonDelay, PolicyThompsonBayes, PolicyTopTwo}
}

// ParsePolicy returns the built-in policy registered under name, with its
// default settings.
func ParsePolicy(name string) (Policy, error) {
	switch name {
	case PolicyUniform:
		return Uniform{}, nil
	case PolicyThompsonObserved:
		return Thompson{Source: PosteriorObserved}, nil
	case PolicyThompsonDelay:
		return Thompson{Source: PosteriorDelayCorrected}, nil
	case PolicyThompsonBayes:
		return Thompson{Source: PosteriorLikelihood}, nil
	case PolicyTopTwo:
		return TopTwo{Source: PosteriorLikelihood}, nil
	}
	return nil, fmt.Errorf("unknown allocation policy %q (valid: %s)", name, strings.Join(PolicyNames(), ", "))
}

// MinPolicyDraws is the smallest number of Monte Carlo draws a sampling
// policy accepts.
const MinPolicyDraws = 10000

func allocCheckDraws(name string, draws int) error {
	if draws != 0 && draws < MinPolicyDraws {
		return fmt.Errorf("%s: draws %d below minimum %d", name, draws, MinPolicyDraws)
	}
	return nil
}

// Uniform splits traffic equally among the active arms.
type Uniform struct{}

// Name implements Policy.
func (Uniform) Name() string { return PolicyUniform }

// Weights implements Policy.
func (Uniform) Weights(arms []ArmInput, _ *rand.Rand) ([]float64, error) {
	return allocUniform(len(arms)), nil
}

func allocUniform(k int) []float64 {
	w := make([]float64, k)
	for i := range w {
		w[i] = 1 / float64(k)
	}
	return w
}

// Thompson is Thompson sampling expressed as weights: each arm's weight is
// its posterior probability of being best under Source, estimated by ProbBest.
type Thompson struct {
	// Source selects the posterior. Default: PosteriorLikelihood.
	Source PosteriorSource
	// Draws is the number of Monte Carlo draws. Default: DefaultProbBestDraws
	// (0 selects it); at least MinPolicyDraws otherwise.
	Draws int
}

// Name implements Policy.
func (t Thompson) Name() string {
	switch t.Source {
	case PosteriorObserved:
		return PolicyThompsonObserved
	case PosteriorDelayCorrected:
		return PolicyThompsonDelay
	case PosteriorLikelihood:
		return PolicyThompsonBayes
	}
	return fmt.Sprintf("thompson(source %d)", int(t.Source))
}

// Weights implements Policy.
func (t Thompson) Weights(arms []ArmInput, r *rand.Rand) ([]float64, error) {
	if err := allocCheckDraws(t.Name(), t.Draws); err != nil {
		return nil, err
	}
	posts, err := allocPosteriors(t.Source, arms)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", t.Name(), err)
	}
	return ProbBest(posts, t.Draws, r).PBest, nil
}

// Top-two defaults.
const (
	// DefaultTopTwoBeta is the probability of playing the sampled leader.
	DefaultTopTwoBeta = 0.5
	// DefaultTopTwoMaxRedraws bounds the extra batches of draws used to find
	// challengers when one arm wins almost every draw.
	DefaultTopTwoMaxRedraws = 10
	// topTwoMinChallengerWins is how many draws not won by an arm are wanted
	// before the distribution of its challenger is taken from them.
	topTwoMinChallengerWins = 1000
)

// TopTwo is top-two Thompson sampling for best-arm identification: with
// probability Beta play the arm I that is best in a posterior draw; otherwise
// re-draw until a different arm J is best and play J. Its weights are the
// play probabilities Beta P(I=i) + (1-Beta) P(J=i).
//
// Estimation: Draws joint draws give P(I=i). Given I=k, J is distributed as
// the winner of an independent draw conditioned on not being k, so
// P(J=i | I=k) is estimated from the draws not won by k. When fewer than 1,000
// such draws exist, up to MaxRedraws further batches of Draws joint draws are
// taken; if an arm still wins every draw, its challenger is taken to be the
// runner-up (largest non-winning value) in the draws it won.
type TopTwo struct {
	// Source selects the posterior. Default: PosteriorLikelihood.
	Source PosteriorSource
	// Beta is the probability of playing the leader, in (0, 1). Default:
	// DefaultTopTwoBeta (0 selects it).
	Beta float64
	// Draws is the batch size of Monte Carlo draws. Default:
	// DefaultProbBestDraws (0 selects it); at least MinPolicyDraws otherwise.
	Draws int
	// MaxRedraws bounds the extra batches. Default: DefaultTopTwoMaxRedraws
	// (0 selects it); negative disables re-draws.
	MaxRedraws int
}

// Name implements Policy.
func (TopTwo) Name() string { return PolicyTopTwo }

// Weights implements Policy.
func (t TopTwo) Weights(arms []ArmInput, r *rand.Rand) ([]float64, error) {
	beta, draws, maxRedraws := t.Beta, t.Draws, t.MaxRedraws
	if beta == 0 {
		beta = DefaultTopTwoBeta
	}
	if !(beta > 0 && beta < 1) {
		return nil, fmt.Errorf("top-two: beta must be in (0, 1), got %v", t.Beta)
	}
	if err := allocCheckDraws(PolicyTopTwo, draws); err != nil {
		return nil, err
	}
	if draws == 0 {
		draws = DefaultProbBestDraws
	}
	if maxRedraws == 0 {
		maxRedraws = DefaultTopTwoMaxRedraws
	}
	posts, err := allocPosteriors(t.Source, arms)
	if err != nil {
		return nil, fmt.Errorf("top-two: %w", err)
	}
	k := len(posts)
	if k == 1 {
		return []float64{1}, nil
	}
	wins := make([]int, k)
	// runnerUp[w*k+j] counts draws won by w in which j had the next-largest value.
	runnerUp := make([]int, k*k)
	theta := make([]float64, k)
	total := 0
	batch := func() {
		for d := 0; d < draws; d++ {
			w := pbSampleJoint(posts, r, theta)
			wins[w]++
			ru := -1
			for j, v := range theta {
				if j != w && (ru < 0 || v > theta[ru]) {
					ru = j
				}
			}
			runnerUp[w*k+ru]++
		}
		total += draws
	}
	needMore := func() bool {
		for _, c := range wins {
			if c > 0 && total-c < topTwoMinChallengerWins {
				return true
			}
		}
		return false
	}
	batch()
	for extra := 0; extra < maxRedraws && needMore(); extra++ {
		batch()
	}
	n := float64(total)
	w := make([]float64, k)
	for i := range w {
		w[i] += beta * float64(wins[i]) / n
	}
	for lead, c := range wins {
		if c == 0 {
			continue
		}
		pLead := float64(c) / n
		if others := total - c; others > 0 {
			for j := range w {
				if j != lead {
					w[j] += (1 - beta) * pLead * float64(wins[j]) / float64(others)
				}
			}
			continue
		}
		for j := range w {
			if j != lead {
				w[j] += (1 - beta) * pLead * float64(runnerUp[lead*k+j]) / float64(c)
			}
		}
	}
	return w, nil
}

// AllocationStatus says which phase an experiment is in.
type AllocationStatus string

const (
	// StatusCollecting means burn-in is not over: traffic targets uniform.
	StatusCollecting AllocationStatus = "collecting"
	// StatusAdapting means the policy's weights are in use.
	StatusAdapting AllocationStatus = "adapting"
	// StatusSettled means the settle rule has named an arm (see Settle).
	StatusSettled AllocationStatus = "settled"
)

// AllocationOptions are the guardrails of Allocate and the thresholds of the
// settle rule (see Settle). Start from DefaultAllocationOptions; a zero
// value fails Validate (Cap and SettleConfidence must be positive).
type AllocationOptions struct {
	// Policy computes the raw weights. Default: nil, which selects
	// thompson-bayes (Thompson{Source: PosteriorLikelihood}).
	Policy Policy
	// Draws is the number of Monte Carlo draws for the reported P(best) and
	// expected loss. Default: 0, which selects DefaultProbBestDraws; at least
	// MinPolicyDraws otherwise.
	Draws int
	// Floor is the smallest weight of any active arm, so every arm keeps
	// collecting data. Default: 0.01 (common practice: keep a small
	// exploration share). Range [0, 1]; if Floor * active arms > 1 the
	// effective floor is lowered to 1/active arms.
	Floor float64
	// Cap is the largest weight of any arm. Default: 1 (no cap). Range
	// (0, 1], Cap >= Floor; if Cap * active arms < 1 the effective cap is
	// raised to 1/active arms.
	Cap float64
	// MaxChange is the largest absolute change of any arm's weight relative
	// to the previous weights. Default: 0.10. Range [0, 1]; 0 disables the
	// limit, as does passing no previous weights. If the limit cannot be met
	// together with the floor, the cap and the sum to 1 (for example after an
	// arm is paused or added), it is widened to the smallest value that can.
	MaxChange float64
	// BurnInClicks is the number of clicks every active arm needs before the
	// policy is used; until then the target is uniform. Default: 100 (common
	// practice).
	BurnInClicks float64
	// BurnInConversions is the number of conversions every active arm needs
	// before the policy is used. Default: 5 (common practice).
	BurnInConversions float64
	// SettleConfidence is the probability with which the settle rule's
	// anytime-valid bounds hold at every refit at once: it names a wrong
	// arm (one worse than the best by more than SettleTolerance) with
	// probability at most 1 - SettleConfidence, however often it is
	// checked. Default: 0.95. Range (0, 1).
	SettleConfidence float64
	// SettleTolerance is the relative shortfall from the best arm's
	// eventual rate that still counts as a right call: the rule names arm
	// i only when its rate is at least (1 - SettleTolerance) times every
	// other arm's. Default: 0.01. Range [0, 1).
	SettleTolerance float64
}

// DefaultAllocationOptions returns the documented defaults.
func DefaultAllocationOptions() AllocationOptions {
	return AllocationOptions{
		Floor:             0.01,
		Cap:               1,
		MaxChange:         0.10,
		BurnInClicks:      100,
		BurnInConversions: 5,
		SettleConfidence:  0.95,
		SettleTolerance:   0.01,
	}
}

func allocInClosed(x, lo, hi float64) bool { return x >= lo && x <= hi }

// Validate checks the ranges documented on each field.
func (o AllocationOptions) Validate() error {
	var errs []error
	if o.Draws != 0 && o.Draws < MinPolicyDraws {
		errs = append(errs, fmt.Errorf("draws %d below minimum %d", o.Draws, MinPolicyDraws))
	}
	if !allocInClosed(o.Floor, 0, 1) {
		errs = append(errs, fmt.Errorf("floor %v not in [0, 1]", o.Floor))
	}
	if !(o.Cap > 0 && o.Cap <= 1) {
		errs = append(errs, fmt.Errorf("cap %v not in (0, 1]", o.Cap))
	}
	if o.Floor > o.Cap {
		errs = append(errs, fmt.Errorf("floor %v above cap %v", o.Floor, o.Cap))
	}
	if !allocInClosed(o.MaxChange, 0, 1) {
		errs = append(errs, fmt.Errorf("max change %v not in [0, 1]", o.MaxChange))
	}
	if !(o.BurnInClicks >= 0) || math.IsInf(o.BurnInClicks, 0) {
		errs = append(errs, fmt.Errorf("burn-in clicks %v must be finite and >= 0", o.BurnInClicks))
	}
	if !(o.BurnInConversions >= 0) || math.IsInf(o.BurnInConversions, 0) {
		errs = append(errs, fmt.Errorf("burn-in conversions %v must be finite and >= 0", o.BurnInConversions))
	}
	if !(o.SettleConfidence > 0 && o.SettleConfidence < 1) {
		errs = append(errs, fmt.Errorf("settle confidence %v not in (0, 1)", o.SettleConfidence))
	}
	if !(o.SettleTolerance >= 0 && o.SettleTolerance < 1) {
		errs = append(errs, fmt.Errorf("settle tolerance %v not in [0, 1)", o.SettleTolerance))
	}
	if err := errors.Join(errs...); err != nil {
		return fmt.Errorf("allocation options: %w", err)
	}
	return nil
}

// Allocation is the result of Allocate. Slices are indexed like the input arms.
type Allocation struct {
	// Arms are the arm identifiers, in input order.
	Arms []string
	// Weights are the traffic weights after guardrails; they sum to 1 and
	// paused arms have 0.
	Weights []float64
	// RawWeights are the weights before floor, cap and max-change: the
	// policy's weights (uniform during burn-in), 0 for paused arms.
	RawWeights []float64
	// PBest is each active arm's probability of being best under the
	// likelihood posterior, whatever the policy, so that reporting and the
	// settle rule do not depend on the policy. Paused arms report 0.
	PBest []float64
	// PBestStdErr is the Monte Carlo standard error of PBest.
	PBestStdErr []float64
	// ExpectedLoss is each active arm's expected loss under the likelihood
	// posterior. Paused arms report 0.
	ExpectedLoss []float64
	// Leader is the index of the active arm with the largest PBest (lowest
	// index on ties).
	Leader int
	// Status is collecting (burn-in) or adapting; EvaluateExperiment turns
	// it into settled when the settle rule fires.
	Status AllocationStatus
	// BurnIn says, during burn-in, which arm is short of what.
	BurnIn string
	// Policy is the name of the policy that produced RawWeights.
	Policy string
	// EffectiveFloor, EffectiveCap and EffectiveMaxChange are the bounds
	// actually enforced after resolving conflicts (EffectiveMaxChange 0 means
	// no limit was applied).
	EffectiveFloor, EffectiveCap, EffectiveMaxChange float64
}

// Random streams of Allocate: the same seed feeds independent PCG streams
// for the reported P(best) and for the policy.
const (
	allocStreamReport = 0x5265706f72745042 // arbitrary constants
	allocStreamPolicy = 0x506f6c6963795757
)

// Allocate turns the arms' state into traffic weights.
//
// Steps: validate; if some active arm is below the burn-in thresholds the raw
// weights are uniform over the active arms (status collecting), otherwise the
// policy's (status adapting); P(best) and expected loss are computed under
// the likelihood posterior for reporting; guardrails are applied. The settle
// rule is applied afterwards by Settle (EvaluateExperiment does both).
//
// Guardrails: the weights are the Euclidean projection of the raw weights onto
// {w : sum w = 1, paused w = 0, lo_i <= w_i <= hi_i}, with lo_i = max(floor,
// prev_i - maxChange) and hi_i = min(cap, prev_i + maxChange). Precedence
// when they conflict: paused arms at 0 and the sum to 1 always hold; then
// floor and cap (relaxed to 1/k when k active arms cannot meet them); then
// max change, widened to the smallest value with which every arm can reach
// [floor, cap] and the bounds admit a sum of 1 (this happens after arms are
// paused or added, or when floor or cap changed since prev).
// Burn-in weights go through the same guardrails.
//
// prev are the previous weights in the same arm order, or nil for none; the
// previous weights of paused arms are ignored. The result is a deterministic
// function of the arguments: the same inputs and seed give the same output.
func Allocate(arms []ArmInput, prev []float64, opts AllocationOptions, seed uint64) (Allocation, error) {
	if err := opts.Validate(); err != nil {
		return Allocation{}, fmt.Errorf("allocate: %w", err)
	}
	active, err := allocCheckArms(arms, prev)
	if err != nil {
		return Allocation{}, fmt.Errorf("allocate: %w", err)
	}
	pol := opts.Policy
	if pol == nil {
		pol = Thompson{Source: PosteriorLikelihood}
	}
	k := len(arms)
	act := make([]ArmInput, len(active))
	for j, i := range active {
		act[j] = arms[i]
	}
	out := Allocation{
		Arms:         make([]string, k),
		Weights:      make([]float64, k),
		RawWeights:   make([]float64, k),
		PBest:        make([]float64, k),
		PBestStdErr:  make([]float64, k),
		ExpectedLoss: make([]float64, k),
		Policy:       pol.Name(),
	}
	for i, a := range arms {
		out.Arms[i] = a.Arm
	}

	// Reporting under the likelihood posterior.
	likPosts, err := allocPosteriors(PosteriorLikelihood, act)
	if err != nil {
		return Allocation{}, fmt.Errorf("allocate: %w", err)
	}
	rep := ProbBest(likPosts, opts.Draws, rand.New(rand.NewPCG(seed, allocStreamReport)))
	leadJ := 0
	for j, i := range active {
		out.PBest[i] = rep.PBest[j]
		out.PBestStdErr[i] = rep.StdErr[j]
		out.ExpectedLoss[i] = rep.ExpectedLoss[j]
		if rep.PBest[j] > rep.PBest[leadJ] {
			leadJ = j
		}
	}
	out.Leader = active[leadJ]

	// Raw weights.
	for _, a := range act {
		switch {
		case a.Clicks < opts.BurnInClicks:
			out.BurnIn = fmt.Sprintf("%s has %g of %g clicks", a.Arm, a.Clicks, opts.BurnInClicks)
		case a.Conversions < opts.BurnInConversions:
			out.BurnIn = fmt.Sprintf("%s has %g of %g conversions", a.Arm, a.Conversions, opts.BurnInConversions)
		default:
			continue
		}
		break
	}
	var raw []float64
	if out.BurnIn == "" {
		if t, ok := pol.(Thompson); ok && t.Source == PosteriorLikelihood && t.Draws == opts.Draws {
			// Thompson sampling on the reporting posterior: its weights are
			// the P(best) just computed.
			raw = slices.Clone(rep.PBest)
		} else {
			raw, err = pol.Weights(act, rand.New(rand.NewPCG(seed, allocStreamPolicy)))
		}
		if err != nil {
			return Allocation{}, fmt.Errorf("allocate: policy %s: %w", pol.Name(), err)
		}
		if err := allocCheckRaw(raw, len(act)); err != nil {
			return Allocation{}, fmt.Errorf("allocate: policy %s: %w", pol.Name(), err)
		}
		out.Status = StatusAdapting
	} else {
		raw = allocUniform(len(act))
		out.Status = StatusCollecting
	}
	for j, i := range active {
		out.RawWeights[i] = raw[j]
	}

	// Guardrails.
	var prevAct []float64
	if len(prev) > 0 {
		prevAct = make([]float64, len(active))
		for j, i := range active {
			prevAct[j] = prev[i]
		}
	}
	w, g := allocGuard(raw, prevAct, opts.Floor, opts.Cap, opts.MaxChange)
	for j, i := range active {
		out.Weights[i] = w[j]
	}
	out.EffectiveFloor, out.EffectiveCap, out.EffectiveMaxChange = g.floor, g.cap, g.maxChange
	return out, nil
}

// allocCheckArms validates the arms and prev and returns the indices of the
// active arms.
func allocCheckArms(arms []ArmInput, prev []float64) ([]int, error) {
	if len(arms) == 0 {
		return nil, errors.New("no arms")
	}
	if len(prev) != 0 && len(prev) != len(arms) {
		return nil, fmt.Errorf("%d previous weights for %d arms", len(prev), len(arms))
	}
	seen := make(map[string]bool, len(arms))
	var active []int
	for i, a := range arms {
		if a.Arm == "" {
			return nil, fmt.Errorf("arm %d has an empty name", i)
		}
		if seen[a.Arm] {
			return nil, fmt.Errorf("duplicate arm %q", a.Arm)
		}
		seen[a.Arm] = true
		for _, c := range []struct {
			name string
			v    float64
		}{{"clicks", a.Clicks}, {"conversions", a.Conversions}, {"ripe clicks", a.RipeClicks}} {
			if !betaCountOK(c.v) {
				return nil, fmt.Errorf("arm %q: %s %v must be finite and >= 0", a.Arm, c.name, c.v)
			}
		}
		if len(prev) != 0 && (!betaCountOK(prev[i]) || prev[i] > 1) {
			return nil, fmt.Errorf("arm %q: previous weight %v not in [0, 1]", a.Arm, prev[i])
		}
		if !a.Paused {
			active = append(active, i)
		}
	}
	if len(active) == 0 {
		return nil, errors.New("every arm is paused")
	}
	return active, nil
}

// allocCheckRaw checks that a policy returned a usable weight vector.
func allocCheckRaw(raw []float64, k int) error {
	if len(raw) != k {
		return fmt.Errorf("%d weights for %d arms", len(raw), k)
	}
	var s float64
	for _, v := range raw {
		if !betaCountOK(v) {
			return fmt.Errorf("weight %v not finite and >= 0", v)
		}
		s += v
	}
	if math.Abs(s-1) > 1e-9 {
		return fmt.Errorf("weights sum to %v, not 1", s)
	}
	return nil
}

// allocBounds are the guardrail bounds actually enforced.
type allocBounds struct{ floor, cap, maxChange float64 }

// allocGuardTol is the slack allowed when testing feasibility of sums.
const allocGuardTol = 1e-12

// allocGuard applies floor, cap and max change to raw (active arms only)
// following the precedence documented on Allocate. prev may be nil.
func allocGuard(raw, prev []float64, floor, cp, maxChange float64) ([]float64, allocBounds) {
	k := float64(len(raw))
	g := allocBounds{floor: math.Min(floor, 1/k), cap: math.Max(cp, 1/k)}
	lo := make([]float64, len(raw))
	hi := make([]float64, len(raw))
	setBounds := func(m float64) (sumLo, sumHi float64) {
		for i := range raw {
			lo[i], hi[i] = g.floor, g.cap
			if prev != nil && m > 0 {
				lo[i] = allocClamp(prev[i]-m, g.floor, g.cap)
				hi[i] = allocClamp(prev[i]+m, g.floor, g.cap)
			}
			sumLo += lo[i]
			sumHi += hi[i]
		}
		return sumLo, sumHi
	}
	// The limit m is feasible when every arm can reach [floor, cap] within m
	// of its previous weight and the bounds admit a sum of 1.
	feasible := func(m float64) bool {
		for _, p := range prev {
			if p+m < g.floor-allocGuardTol || p-m > g.cap+allocGuardTol {
				return false
			}
		}
		sl, sh := setBounds(m)
		return sl <= 1+allocGuardTol && sh >= 1-allocGuardTol
	}
	if prev != nil && maxChange > 0 && maxChange < 1 {
		m := maxChange
		if !feasible(m) {
			// Feasibility is monotone in m and holds at m = 1 (bounds are
			// then [floor, cap]); bisect for the smallest feasible m.
			a, b := m, 1.0
			for it := 0; it < 100 && b-a > 1e-15; it++ {
				mid := (a + b) / 2
				if feasible(mid) {
					b = mid
				} else {
					a = mid
				}
			}
			m = b
		}
		g.maxChange = m
	}
	setBounds(g.maxChange)
	return allocProject(raw, lo, hi), g
}

func allocClamp(x, lo, hi float64) float64 { return math.Min(math.Max(x, lo), hi) }

// allocProject returns the Euclidean projection of raw onto
// {w : sum w = 1, lo <= w <= hi}, assuming sum lo <= 1 <= sum hi (up to
// rounding). The projection is w_i = clamp(raw_i + lambda, lo_i, hi_i) for the
// lambda at which the sum is 1; the sum is piecewise linear and
// non-decreasing in lambda, so lambda is found exactly between breakpoints.
func allocProject(raw, lo, hi []float64) []float64 {
	n := len(raw)
	sumAt := func(l float64) float64 {
		var s float64
		for i := range raw {
			s += allocClamp(raw[i]+l, lo[i], hi[i])
		}
		return s
	}
	bps := make([]float64, 0, 2*n)
	for i := range raw {
		bps = append(bps, lo[i]-raw[i], hi[i]-raw[i])
	}
	sort.Float64s(bps)
	var lambda float64
	switch {
	case sumAt(bps[0]) >= 1:
		lambda = bps[0]
	case sumAt(bps[len(bps)-1]) <= 1:
		lambda = bps[len(bps)-1]
	default:
		// Find consecutive breakpoints with sumAt(a) < 1 <= sumAt(b); the sum
		// is linear between them.
		j := sort.Search(len(bps), func(j int) bool { return sumAt(bps[j]) >= 1 })
		a, b := bps[j-1], bps[j]
		sa, sb := sumAt(a), sumAt(b)
		lambda = b
		if sb > sa {
			lambda = a + (1-sa)*(b-a)/(sb-sa)
		}
	}
	w := make([]float64, n)
	var s float64
	for i := range raw {
		w[i] = allocClamp(raw[i]+lambda, lo[i], hi[i])
		s += w[i]
	}
	// Put the rounding residual on arms with room, so the sum is 1.
	for i := 0; i < n && s != 1; i++ {
		d := 1 - s
		nw := allocClamp(w[i]+d, lo[i], hi[i])
		s += nw - w[i]
		w[i] = nw
	}
	// If the bounds were feasible only within allocGuardTol, no arm has room:
	// the sum to 1 takes precedence over bounds at the 1e-12 level.
	if s = allocSum(w); math.Abs(s-1) > 1e-15 {
		for i := range w {
			w[i] /= s
		}
	}
	return w
}

func allocSum(w []float64) float64 {
	var s float64
	for _, v := range w {
		s += v
	}
	return s
}
