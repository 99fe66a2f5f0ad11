package main

import (
	"fmt"
	"io"
	"math"
	"text/tabwriter"

	"ripen/estimator"
	"ripen/estimator/sim"
)

// simulateReference is the policy every other's regret is compared with:
// Thompson sampling on observed counts, which ignores delay.
const simulateReference = estimator.PolicyThompsonObserved

// simulateOutput is the JSON document `ripen simulate --format json` prints
// for one scenario (and one element of simulateBattery.Scenarios).
type simulateOutput struct {
	Scenario     string        `json:"scenario"`
	Description  string        `json:"description,omitempty"`
	Runs         int           `json:"runs"`
	Seed         uint64        `json:"seed"`
	HorizonHours float64       `json:"horizon_hours"`
	UpdateHours  float64       `json:"update_interval_hours"`
	WindowHours  float64       `json:"window_hours"`
	FitFamily    string        `json:"fit_family"`
	Arms         []simulateArm `json:"arms"`
	// Reference is the policy regret ratios are taken against, and
	// SettleTolerance the relative shortfall within which a settle is right.
	Reference       string           `json:"reference"`
	SettleTolerance float64          `json:"settle_tolerance"`
	Policies        []simulatePolicy `json:"policies"`
}

type simulateArm struct {
	Arm string  `json:"arm"`
	CVR float64 `json:"cvr"`
}

type simulatePolicy struct {
	Policy     string  `json:"policy"`
	RegretMean float64 `json:"regret_mean"`
	RegretSE   float64 `json:"regret_se"`
	// RegretRatio is the mean regret over the reference's on the same runs
	// and RegretRatioSE its delta-method standard error; null when the
	// reference was not simulated or lost nothing.
	RegretRatio   *float64 `json:"regret_ratio"`
	RegretRatioSE *float64 `json:"regret_ratio_se"`
	// RegretRatioOracle and RegretRatioOracleSE are the same against
	// delay-oracle, the yardstick of what a delay model can reach; null
	// when it was not simulated.
	RegretRatioOracle   *float64 `json:"regret_ratio_oracle"`
	RegretRatioOracleSE *float64 `json:"regret_ratio_oracle_se"`
	BestArmShare        float64  `json:"best_arm_share"`
	SettledRuns         int      `json:"settled_runs"`
	// SettleShare is settled runs over runs; SettledWrong the settled runs
	// that named an arm more than the settle tolerance below the best.
	SettleShare  float64 `json:"settle_share"`
	SettledWrong int     `json:"settled_wrong"`
	// SettledCorrect, SettleWrongShare and SettleHoursMedian are null when
	// no run settled.
	SettledCorrect    *float64 `json:"settled_correct"`
	SettleWrongShare  *float64 `json:"settle_wrong_share"`
	SettleHoursMedian *float64 `json:"settle_hours_median"`
	// SettleFlipRuns counts runs whose status went from settled back to not
	// settled, SettleFlips every such change.
	SettleFlipRuns int                  `json:"settle_flip_runs"`
	SettleFlips    int                  `json:"settle_flips"`
	ObservedCVRMAE float64              `json:"observed_cvr_mae"`
	EventualCVRMAE float64              `json:"eventual_cvr_mae"`
	CVRErrorAt     []simulateCVRErrorAt `json:"cvr_error_at"`
	CVRError       []simulateCVRError   `json:"cvr_error"`
}

// simulateCVRError is the mean absolute error of the observed and eventual
// CVR (against the true CVR of the arms' clicks) at one update time.
type simulateCVRError struct {
	Hours    float64 `json:"hours"`
	Observed float64 `json:"observed"`
	Eventual float64 `json:"eventual"`
}

// simulateCVRErrorAt is simulateCVRError at the update nearest a target
// time; null values when the horizon ends before it.
type simulateCVRErrorAt struct {
	TargetHours float64  `json:"target_hours"`
	Hours       *float64 `json:"hours"`
	Observed    *float64 `json:"observed"`
	Eventual    *float64 `json:"eventual"`
}

// simulateBattery is the JSON document for several scenarios.
type simulateBattery struct {
	Scenarios []simulateOutput   `json:"scenarios"`
	Pooled    []simulatePooledJS `json:"pooled"`
}

// simulatePooledJS is one policy's settle record over all scenarios.
type simulatePooledJS struct {
	Policy     string   `json:"policy"`
	Scenarios  int      `json:"scenarios"`
	Runs       int      `json:"runs"`
	Settled    int      `json:"settled_runs"`
	Wrong      int      `json:"settled_wrong"`
	WrongShare *float64 `json:"settle_wrong_share"`
	// WrongUpper95 is the one-sided 95% Clopper-Pearson upper bound of the
	// wrong share.
	WrongUpper95 *float64 `json:"settle_wrong_upper95"`
}

// round6 rounds to six decimals so that the JSON stays readable.
func round6(x float64) float64 { return math.Round(x*1e6) / 1e6 }

func optional(x float64) *float64 {
	if math.IsNaN(x) {
		return nil
	}
	v := round6(x)
	return &v
}

// simulateJSON summarises a result for output.
func simulateJSON(res *sim.Result) simulateOutput {
	sc := res.Scenario
	out := simulateOutput{
		Scenario:        sc.Name,
		Description:     sc.Description,
		Runs:            res.Runs,
		Seed:            res.Seed,
		HorizonHours:    sc.Horizon.Hours(),
		UpdateHours:     sc.UpdateInterval.Hours(),
		WindowHours:     sc.Window.Hours(),
		FitFamily:       sc.FitFamily,
		Reference:       simulateReference,
		SettleTolerance: res.SettleTolerance,
	}
	for _, a := range sc.Arms {
		out.Arms = append(out.Arms, simulateArm{Arm: a.Name, CVR: a.CVR})
	}
	for i := range res.Policies {
		p := &res.Policies[i]
		ratio, ratioSE := res.RegretRatio(p.Policy, simulateReference)
		oracle, oracleSE := res.RegretRatio(p.Policy, sim.PolicyDelayOracle)
		wrongShare := math.NaN()
		if p.SettledRuns > 0 {
			wrongShare = float64(p.SettledWrong) / float64(p.SettledRuns)
		}
		sp := simulatePolicy{
			Policy:              p.Policy,
			RegretMean:          round6(p.RegretMean),
			RegretSE:            round6(p.RegretSE),
			RegretRatio:         optional(ratio),
			RegretRatioSE:       optional(ratioSE),
			RegretRatioOracle:   optional(oracle),
			RegretRatioOracleSE: optional(oracleSE),
			BestArmShare:        round6(p.BestArmShare),
			SettledRuns:         p.SettledRuns,
			SettleShare:         round6(float64(p.SettledRuns) / float64(res.Runs)),
			SettledWrong:        p.SettledWrong,
			SettledCorrect:      optional(p.SettledCorrect),
			SettleWrongShare:    optional(wrongShare),
			SettleHoursMedian:   optional(p.SettleHoursMedian),
			SettleFlipRuns:      p.FlipRuns,
			SettleFlips:         p.Flips,
			ObservedCVRMAE:      round6(p.ObservedMAE),
			EventualCVRMAE:      round6(p.EventualMAE),
		}
		for _, target := range sim.ErrorHours {
			at, obs, ev := res.ErrorAt(p, target)
			sp.CVRErrorAt = append(sp.CVRErrorAt, simulateCVRErrorAt{TargetHours: target, Hours: optional(at), Observed: optional(obs), Eventual: optional(ev)})
		}
		for t, h := range res.Hours {
			if math.IsNaN(p.ObservedError[t]) {
				continue
			}
			sp.CVRError = append(sp.CVRError, simulateCVRError{Hours: round6(h), Observed: round6(p.ObservedError[t]), Eventual: round6(p.EventualError[t])})
		}
		out.Policies = append(out.Policies, sp)
	}
	return out
}

// simulateBatteryJSON summarises several results and pools their settles.
func simulateBatteryJSON(results []*sim.Result) simulateBattery {
	var doc simulateBattery
	for _, r := range results {
		doc.Scenarios = append(doc.Scenarios, simulateJSON(r))
	}
	for _, p := range sim.PoolSettles(results) {
		doc.Pooled = append(doc.Pooled, simulatePooledJS{Policy: p.Policy, Scenarios: p.Scenarios, Runs: p.Runs, Settled: p.Settled, Wrong: p.Wrong,
			WrongShare: optional(p.WrongShare), WrongUpper95: optional(p.WrongUpper95)})
	}
	return doc
}

func fmtOptional(x *float64, format string) string {
	if x == nil {
		return "-"
	}
	return fmt.Sprintf(format, *x)
}

// printSimulateTable prints one line per scenario, then one table with a
// row per scenario and policy, then the settles pooled per policy.
func printSimulateTable(w io.Writer, results []*sim.Result) error {
	var outs []simulateOutput
	for _, r := range results {
		out := simulateJSON(r)
		outs = append(outs, out)
		fmt.Fprintf(w, "scenario %s: %d runs, seed %d, horizon %gh, update every %gh, window %gh, fit %s\n",
			out.Scenario, out.Runs, out.Seed, out.HorizonHours, out.UpdateHours, out.WindowHours, out.FitFamily)
	}
	fmt.Fprintf(w, "\nregret: expected conversions lost; vs %s, vs %s: ratio of mean regrets over the same runs (± delta-method SE);\n", simulateReference, sim.PolicyDelayOracle)
	fmt.Fprintf(w, "wrong: settles naming an arm more than %g%% below the best; flips: runs whose status left settled again;\n", 100*results[0].SettleTolerance)
	fmt.Fprintln(w, "CVR MAE observed/eventual at the update nearest each time.")
	fmt.Fprintln(w)
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', tabwriter.AlignRight)
	fmt.Fprint(tw, "scenario\tpolicy\tregret\t± SE\tvs "+simulateReference+"\t± SE\tvs "+sim.PolicyDelayOracle+"\t± SE\tbest-arm share\tsettled\twrong\tflips\tsettle h (median)")
	for _, h := range sim.ErrorHours {
		fmt.Fprintf(tw, "\tMAE %gh", h)
	}
	fmt.Fprintln(tw, "\t")
	for _, out := range outs {
		for _, p := range out.Policies {
			fmt.Fprintf(tw, "%s\t%s\t%.1f\t%.1f\t%s\t%s\t%s\t%s\t%.3f\t%d/%d\t%s\t%d\t%s", out.Scenario, p.Policy, p.RegretMean, p.RegretSE,
				fmtOptional(p.RegretRatio, "%.2f"), fmtOptional(p.RegretRatioSE, "%.2f"),
				fmtOptional(p.RegretRatioOracle, "%.2f"), fmtOptional(p.RegretRatioOracleSE, "%.2f"), p.BestArmShare,
				p.SettledRuns, out.Runs, fmtCount(p.SettledWrong, p.SettledRuns), p.SettleFlipRuns, fmtOptional(p.SettleHoursMedian, "%.0f"))
			for _, e := range p.CVRErrorAt {
				if e.Observed == nil {
					fmt.Fprint(tw, "\t-")
					continue
				}
				fmt.Fprintf(tw, "\t%.4f/%.4f", *e.Observed, *e.Eventual)
			}
			fmt.Fprintln(tw, "\t")
		}
	}
	if err := tw.Flush(); err != nil {
		return fmt.Errorf("write table: %w", err)
	}
	fmt.Fprintf(w, "\nsettles pooled over %d scenario(s): wrong / settled runs, share, one-sided 95%% upper bound (Clopper-Pearson)\n", len(results))
	tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "policy\tsettled\twrong\tshare\t95% upper\t")
	for _, p := range sim.PoolSettles(results) {
		fmt.Fprintf(tw, "%s\t%d/%d\t%d\t%s\t%s\t\n", p.Policy, p.Settled, p.Runs, p.Wrong,
			fmtOptional(optional(p.WrongShare), "%.3f"), fmtOptional(optional(p.WrongUpper95), "%.3f"))
	}
	if err := tw.Flush(); err != nil {
		return fmt.Errorf("write table: %w", err)
	}
	return nil
}

// fmtCount formats k of n, or "-" when n is 0.
func fmtCount(k, n int) string {
	if n == 0 {
		return "-"
	}
	return fmt.Sprintf("%d/%d", k, n)
}
