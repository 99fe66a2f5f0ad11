package estimator

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"time"
)

// The settle rule says when an experiment's leader can be named, in a way
// that stays valid however often it is checked. A posterior threshold
// (P(best) >= 0.95) checked at every refit is not: each look is another
// chance for noise to cross it, so the share of wrong calls among those
// made grows with the number of looks. Instead every arm carries a
// confidence sequence for its eventual conversion rate, an interval that
// holds at every refit simultaneously with the stated probability
// (Howard, Ramdas, McAuliffe & Sekhon 2021, "Time-uniform, nonparametric,
// nonasymptotic confidence sequences", Annals of Statistics 49:1055-1080),
// built only from evidence that does not depend on the delay model:
//
//   - a click older than the attribution window has a known outcome, so the
//     matured clicks are a Bernoulli sample of the eventual rate;
//   - every click's eventual outcome lies between what has been seen so
//     far (a pending click counted as no conversion) and the most it could
//     still become (a pending unconverted click counted as a conversion).
//
// Each sequence is the beta-binomial mixture martingale of Robbins (1970,
// "Statistical methods related to the law of the iterated logarithm",
// Annals of Mathematical Statistics 41:1397-1408), the conjugate-mixture
// case of Howard et al. (2021, section 3 and table 1 there): for n trials
// with s successes and mixing distribution Beta(a, b),
//
//	M_n(p) = B(a+s, b+n-s) / (B(a, b) p^s (1-p)^(n-s))
//
// is a nonnegative martingale with M_0 = 1 under the true p, so by Ville's
// inequality P(exists n: M_n(p) >= 1/alpha) <= alpha, and {p : M_n(p) <
// 1/alpha} covers p at every n at once. The mixture is Beta(1/2, 1/2) (the
// Krichevsky-Trofimov mixture). Its bounds are monotone in s, so a count
// known only to lie in [s_lo, s_hi] gives the interval [lower(s_lo),
// upper(s_hi)].
//
// With K active arms, each arm's two sequences (matured clicks, all
// clicks) get alpha/(2K) each, so with probability at least 1 - alpha all
// of them hold at every refit. The rule names arm i when, for every other
// active arm j,
//
//	lower_i >= (1 - tolerance) * upper_j
//
// so whenever it fires (while the sequences hold) q_i >= (1-tolerance) q_j
// for every j: the named arm is the best or within the tolerance of it.
// Once settled an experiment stays settled on its arm, unless the evidence
// reverses (some arm's lower bound rises above the settled arm's upper
// bound, or its newer clicks clearly convert below its matured ones);
// settled_at records when it first fired. The rule also waits for burn-in,
// for no arm's newer clicks to convert clearly unlike its matured ones
// (the named arm falling or a rival rising: the sequences assume stable
// rates, and a change point would make them describe the past), and for
// the model's leader (largest P(best)) to agree with the arm named, so a
// report never says "settled" on an arm the model ranks below another.
// These checks can only withhold a call, never make one.

// SettleState is the settle decision carried from one evaluation to the
// next (hysteresis).
type SettleState struct {
	// Arm is the arm the experiment settled on.
	Arm string
	// At is the event time (Unix ms) of the evaluation at which it first
	// settled.
	At int64
}

// SettleReport says whether an experiment is settled and, if not, why.
type SettleReport struct {
	// Settled is true once the rule has named an arm.
	Settled bool `json:"settled"`
	// Arm is the arm named when settled, otherwise the candidate: the arm
	// with the highest anytime-valid lower bound.
	Arm string `json:"arm,omitempty"`
	// Reason says, when not settled, what is missing, in words.
	Reason string `json:"reason,omitempty"`
	// Blocking lists the arms that keep the candidate from being named:
	// arms too close to it, or too few of whose clicks have matured.
	Blocking []string `json:"blocking,omitempty"`
	// Confidence is the probability with which every arm's bounds hold at
	// every refit at once (1 - alpha).
	Confidence float64 `json:"confidence"`
	// Tolerance is the relative shortfall from the best arm that still
	// counts as a correct call.
	Tolerance float64 `json:"tolerance"`
}

// MixtureBounds returns the confidence sequence for a Bernoulli mean at
// level 1-alpha after n trials of which between sLo and sHi succeeded
// (sLo <= sHi <= n): the set {p : M_n(p) < 1/alpha} of the beta-binomial
// mixture martingale with mixing Beta(1/2, 1/2), widened over the range of
// success counts. n = 0 gives [0, 1].
func MixtureBounds(n, sLo, sHi, alpha float64) (lo, hi float64, err error) {
	if !(n >= 0) || math.IsInf(n, 0) || !(sLo >= 0) || !(sHi >= sLo) || sHi > n*(1+1e-12)+1e-9 {
		return 0, 1, fmt.Errorf("mixture bounds: need 0 <= %v <= %v <= n = %v", sLo, sHi, n)
	}
	if !(alpha > 0 && alpha < 1) {
		return 0, 1, fmt.Errorf("mixture bounds: alpha %v not in (0, 1)", alpha)
	}
	if n == 0 {
		return 0, 1, nil
	}
	sHi = math.Min(sHi, n)
	return mixtureLower(n, sLo, alpha), mixtureUpper(n, sHi, alpha), nil
}

// csMix is the mixing Beta's parameter (both).
const csMix = 0.5

// mixtureExcess returns log M_n(p) - log(1/alpha).
func mixtureExcess(n, s, p, alpha float64) float64 {
	v := lbeta(csMix+s, csMix+n-s) - lbeta(csMix, csMix) + math.Log(alpha)
	if s > 0 {
		v -= s * math.Log(p)
	}
	if n-s > 0 {
		v -= (n - s) * math.Log1p(-p)
	}
	return v
}

// mixtureLower returns the smallest p in the sequence for s successes:
// log M_n is decreasing on (0, s/n], so bisect for its crossing of
// log(1/alpha).
func mixtureLower(n, s, alpha float64) float64 {
	if s <= 0 {
		return 0
	}
	hi := s / n
	if mixtureExcess(n, s, hi, alpha) >= 0 {
		return hi // not reached for alpha < 1 (the mixture is below the maximum likelihood)
	}
	lo := 0.0
	for range 200 {
		mid := (lo + hi) / 2
		if mixtureExcess(n, s, mid, alpha) >= 0 {
			lo = mid
		} else {
			hi = mid
		}
		if hi-lo <= 1e-12*hi {
			break
		}
	}
	return lo
}

// mixtureUpper returns the largest p in the sequence for s successes.
func mixtureUpper(n, s, alpha float64) float64 {
	return 1 - mixtureLower(n, n-s, alpha)
}

// ArmEvidence is the model-free evidence of one arm used by the settle
// rule.
type ArmEvidence struct {
	// Clicks and Conversions are every click and every observed conversion.
	Clicks, Conversions float64
	// MaturedClicks are the clicks older than the attribution window and
	// MaturedConversions how many of them converted.
	MaturedClicks, MaturedConversions float64
	// PendingRipe is the pending clicks weighted by the fitted probability
	// that a conversion would have been seen by now (the ripe clicks less
	// the matured ones); 0 turns the drift check off.
	PendingRipe float64
}

// Drift returns the z-score of the conversions seen among the arm's
// pending clicks against what its matured rate predicts for them: the
// matured clicks are the older cohort, the pending ones the newer, so a
// large |z| says the rate has moved (a change point) and the matured
// evidence no longer describes the arm. The variance adds the Poisson
// spread of the count to the uncertainty of the matured rate. ok is false
// when there is too little of either cohort to tell.
func (e ArmEvidence) Drift() (z float64, ok bool) {
	if e.MaturedClicks < driftMinMatured || e.PendingRipe <= 0 {
		return 0, false
	}
	qm := (e.MaturedConversions + 0.5) / (e.MaturedClicks + 1)
	exp := qm * e.PendingRipe
	if exp < driftMinExpected {
		return 0, false
	}
	seen := e.Conversions - e.MaturedConversions
	v := exp + e.PendingRipe*e.PendingRipe*qm*(1-qm)/e.MaturedClicks
	return (seen - exp) / math.Sqrt(v), true
}

// Thresholds of the drift check.
const (
	// driftMinMatured and driftMinExpected: the check needs this many
	// matured clicks and expected pending conversions.
	driftMinMatured  = 200
	driftMinExpected = 20
	// driftBlock is the |z| beyond which a change blocks settling (the
	// candidate falling or a rival rising); driftRelease the larger |z| by
	// which a settled arm's fall releases the settle.
	driftBlock   = 3.0
	driftRelease = 4.0
)

// Bounds returns the arm's anytime-valid interval for its eventual rate at
// level 1-alpha, intersecting the matured-click sequence and the all-click
// sequence (each at alpha/2).
func (e ArmEvidence) Bounds(alpha float64) (lo, hi float64, err error) {
	unresolved := e.Clicks - e.Conversions - (e.MaturedClicks - e.MaturedConversions)
	if unresolved < -1e-9 || e.MaturedConversions > e.MaturedClicks || e.Conversions > e.Clicks {
		return 0, 1, fmt.Errorf("arm evidence: inconsistent counts %+v", e)
	}
	unresolved = math.Max(unresolved, 0)
	l1, h1, err := MixtureBounds(e.MaturedClicks, e.MaturedConversions, e.MaturedConversions, alpha/2)
	if err != nil {
		return 0, 1, err
	}
	l2, h2, err := MixtureBounds(e.Clicks, e.Conversions, math.Min(e.Conversions+unresolved, e.Clicks), alpha/2)
	if err != nil {
		return 0, 1, err
	}
	return math.Max(l1, l2), math.Min(h1, h2), nil
}

// SettleInput is what the settle rule needs about an experiment.
type SettleInput struct {
	// Arms are the arms' names, evidence and whether they are paused,
	// indexed alike.
	Arms     []string
	Evidence []ArmEvidence
	Paused   []bool
	// Leader is the index of the model's leader (largest P(best)).
	Leader int
	// BurnedIn reports whether burn-in is over, and BurnIn why not.
	BurnedIn bool
	BurnIn   string
	// Window is the attribution window, for the wording of reasons.
	Window time.Duration
	// AsOf is the event time of the evaluation (Unix ms).
	AsOf int64
	// Prev is the previous evaluation's settle state, or nil.
	Prev *SettleState
	// Confidence is 1 - alpha and Tolerance the relative shortfall allowed.
	Confidence, Tolerance float64
}

// SettleOutcome is the decision and the per-arm bounds behind it.
type SettleOutcome struct {
	Report SettleReport
	// State is the state to carry to the next evaluation (nil when not
	// settled).
	State *SettleState
	// Low and High are each arm's anytime-valid bounds (0 and 1 for paused
	// arms).
	Low, High []float64
}

// Settle applies the settle rule.
func Settle(in SettleInput) (SettleOutcome, error) {
	k := len(in.Arms)
	if k == 0 || len(in.Evidence) != k || len(in.Paused) != k {
		return SettleOutcome{}, errors.New("settle: arms, evidence and paused must have the same non-zero length")
	}
	if !(in.Confidence > 0 && in.Confidence < 1) {
		return SettleOutcome{}, fmt.Errorf("settle: confidence %v not in (0, 1)", in.Confidence)
	}
	if !(in.Tolerance >= 0 && in.Tolerance < 1) {
		return SettleOutcome{}, fmt.Errorf("settle: tolerance %v not in [0, 1)", in.Tolerance)
	}
	active := 0
	for _, p := range in.Paused {
		if !p {
			active++
		}
	}
	out := SettleOutcome{Low: make([]float64, k), High: make([]float64, k)}
	out.Report.Confidence, out.Report.Tolerance = in.Confidence, in.Tolerance
	if active == 0 {
		out.Report.Reason = "every arm is paused"
		return out, nil
	}
	alpha := (1 - in.Confidence) / float64(active)
	cand := -1
	for i, e := range in.Evidence {
		out.High[i] = 1
		if in.Paused[i] {
			continue
		}
		lo, hi, err := e.Bounds(alpha)
		if err != nil {
			return SettleOutcome{}, fmt.Errorf("settle: arm %q: %w", in.Arms[i], err)
		}
		out.Low[i], out.High[i] = lo, hi
		if cand < 0 || lo > out.Low[cand] {
			cand = i
		}
	}
	if active == 1 {
		out.Report.Arm = in.Arms[cand]
		out.Report.Reason = "only one active arm"
		return out, nil
	}
	// Hysteresis: a settled experiment stays settled on its arm unless
	// another arm is now known to be better, or the arm's newer clicks
	// clearly convert below its matured ones (a change).
	if in.Prev != nil {
		if i := indexOf(in.Arms, in.Prev.Arm); i >= 0 && !in.Paused[i] {
			reversed := false
			for j := range in.Arms {
				if j != i && !in.Paused[j] && out.Low[j] > out.High[i] {
					reversed = true
				}
			}
			if z, ok := in.Evidence[i].Drift(); ok && z < -driftRelease {
				reversed = true
			}
			if !reversed {
				out.Report.Settled, out.Report.Arm = true, in.Arms[i]
				out.State = &SettleState{Arm: in.Arms[i], At: in.Prev.At}
				return out, nil
			}
		}
	}
	out.Report.Arm = in.Arms[cand]
	if !in.BurnedIn {
		out.Report.Reason = "burn-in: " + in.BurnIn
		return out, nil
	}
	var immature, close []string
	var closeDetail []string
	for j := range in.Arms {
		if j == cand || in.Paused[j] {
			continue
		}
		if out.Low[cand] >= (1-in.Tolerance)*out.High[j] {
			continue
		}
		out.Report.Blocking = append(out.Report.Blocking, in.Arms[j])
		if in.Evidence[j].MaturedClicks == 0 {
			immature = append(immature, in.Arms[j])
		} else {
			close = append(close, in.Arms[j])
			closeDetail = append(closeDetail, fmt.Sprintf("%s up to %.2f%%", in.Arms[j], 100*out.High[j]))
		}
	}
	if len(out.Report.Blocking) > 0 {
		var parts []string
		if len(immature) > 0 {
			parts = append(parts, fmt.Sprintf("no click of %s is older than the %s attribution window yet", strings.Join(immature, ", "), fmtWindow(in.Window)))
		}
		if len(close) > 0 {
			parts = append(parts, fmt.Sprintf("%s (at least %.2f%%) is not yet ahead of %s", in.Arms[cand], 100*out.Low[cand], strings.Join(closeDetail, ", ")))
		}
		out.Report.Reason = strings.Join(parts, "; ")
		return out, nil
	}
	// The bounds assume each arm's rate is stable; a clear change blocks.
	var drifted []string
	for j := range in.Arms {
		if in.Paused[j] {
			continue
		}
		z, ok := in.Evidence[j].Drift()
		if ok && ((j == cand && z < -driftBlock) || (j != cand && z > driftBlock)) {
			drifted = append(drifted, fmt.Sprintf("%s (z = %+.1f)", in.Arms[j], z))
			out.Report.Blocking = append(out.Report.Blocking, in.Arms[j])
		}
	}
	if len(drifted) > 0 {
		out.Report.Reason = fmt.Sprintf("the newer clicks of %s convert unlike the matured ones: the rates may have changed", strings.Join(drifted, ", "))
		return out, nil
	}
	if in.Leader != cand {
		out.Report.Reason = fmt.Sprintf("the matured evidence favours %s but the model's leader is %s", in.Arms[cand], in.Arms[in.Leader])
		out.Report.Blocking = []string{in.Arms[in.Leader]}
		return out, nil
	}
	out.Report.Settled = true
	out.State = &SettleState{Arm: in.Arms[cand], At: in.AsOf}
	return out, nil
}

// fmtWindow writes a window in days when whole, else as a Go duration.
func fmtWindow(w time.Duration) string {
	if w > 0 && w%(24*time.Hour) == 0 {
		return fmt.Sprintf("%dd", w/(24*time.Hour))
	}
	return w.String()
}

func indexOf(xs []string, x string) int {
	for i, v := range xs {
		if v == x {
			return i
		}
	}
	return -1
}
