package main

import (
	"encoding/json"
	"fmt"
	"io"
	"math"
	"os"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"

	"ripen/console/report"
	"ripen/estimator"
	"ripen/estimator/sim"
)

// simulateFlags are the options of `ripen simulate`.
type simulateFlags struct {
	scenario string
	policies string
	runs     int
	format   string
	report   string
	seed     uint64
}

func newSimulateCmd() *cobra.Command {
	var f simulateFlags
	cmd := &cobra.Command{
		Use:   "simulate --scenario FILE",
		Short: "Simulate allocation policies closed-loop on a scenario and compare their regret",
		Long: `simulate reads a scenario (YAML: traffic, arms with their true eventual
conversion rates and delay distributions, change points, update interval),
and runs every policy closed-loop: traffic follows the policy's current
weights, conversions are revealed after their delays, and the arms are
refitted on the update interval with the service's estimator. Runs are
seeded and spread over all cores; the output is the same for the same seed.

Per policy it prints the mean cumulative regret (expected conversions lost
against always playing the best arm) with its standard error, the share of
traffic sent to the best arm, how often and when the settle rule fired and
whether it picked the best arm, and the error of the observed and eventual
conversion rates. --report DIR also writes DIR/index.html with charts.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runSimulate(cmd, f)
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.scenario, "scenario", "", "scenario file, YAML (required)")
	fl.StringVar(&f.policies, "policies", strings.Join(estimator.PolicyNames(), ","), "comma-separated policies: "+strings.Join(estimator.PolicyNames(), ", "))
	fl.IntVar(&f.runs, "runs", 0, "seeded runs per policy (0: the scenario's)")
	fl.StringVar(&f.format, "format", "table", "output format: table or json")
	fl.StringVar(&f.report, "report", "", "write an HTML report with charts to DIR/index.html")
	fl.Uint64Var(&f.seed, "seed", 0, "base seed (0: the scenario's)")
	_ = cmd.MarkFlagRequired("scenario")
	return cmd
}

// simulateOutput is the JSON document `ripen simulate --format json` prints.
type simulateOutput struct {
	Scenario     string           `json:"scenario"`
	Description  string           `json:"description,omitempty"`
	Runs         int              `json:"runs"`
	Seed         uint64           `json:"seed"`
	HorizonHours float64          `json:"horizon_hours"`
	UpdateHours  float64          `json:"update_interval_hours"`
	WindowHours  float64          `json:"window_hours"`
	FitFamily    string           `json:"fit_family"`
	Arms         []simulateArm    `json:"arms"`
	Policies     []simulatePolicy `json:"policies"`
}

type simulateArm struct {
	Arm string  `json:"arm"`
	CVR float64 `json:"cvr"`
}

type simulatePolicy struct {
	Policy       string  `json:"policy"`
	RegretMean   float64 `json:"regret_mean"`
	RegretSE     float64 `json:"regret_se"`
	BestArmShare float64 `json:"best_arm_share"`
	SettledRuns  int     `json:"settled_runs"`
	// SettledCorrect and SettleHoursMedian are null when no run settled.
	SettledCorrect    *float64           `json:"settled_correct"`
	SettleHoursMedian *float64           `json:"settle_hours_median"`
	ObservedCVRMAE    float64            `json:"observed_cvr_mae"`
	EventualCVRMAE    float64            `json:"eventual_cvr_mae"`
	CVRError          []simulateCVRError `json:"cvr_error"`
}

// simulateCVRError is the mean absolute error of the observed and eventual
// CVR (against the true CVR of the arms' clicks) at one update time.
type simulateCVRError struct {
	Hours    float64 `json:"hours"`
	Observed float64 `json:"observed"`
	Eventual float64 `json:"eventual"`
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

func runSimulate(cmd *cobra.Command, f simulateFlags) error {
	if f.format != "table" && f.format != "json" {
		return fmt.Errorf("--format %q: want table or json", f.format)
	}
	if f.runs < 0 {
		return fmt.Errorf("--runs %d: must not be negative", f.runs)
	}
	var policies []string
	for _, p := range strings.Split(f.policies, ",") {
		if p = strings.TrimSpace(p); p == "" {
			continue
		}
		if _, err := estimator.ParsePolicy(p); err != nil {
			return fmt.Errorf("--policies: %w", err)
		}
		policies = append(policies, p)
	}
	if len(policies) == 0 {
		return fmt.Errorf("--policies: none given (valid: %s)", strings.Join(estimator.PolicyNames(), ", "))
	}
	file, err := os.Open(f.scenario)
	if err != nil {
		return fmt.Errorf("--scenario: %w", err)
	}
	sc, err := sim.ParseScenario(file)
	file.Close()
	if err != nil {
		return fmt.Errorf("--scenario %s: %w", f.scenario, err)
	}

	opts := sim.Options{Policies: policies, Runs: f.runs, Seed: f.seed}
	errOut := cmd.ErrOrStderr()
	bar := newProgressBar(errOut)
	if bar != nil {
		opts.Progress = bar.update
	}
	start := time.Now()
	res, err := sim.Run(cmd.Context(), *sc, opts)
	if bar != nil {
		bar.finish()
	}
	if err != nil {
		return err
	}
	elapsed := time.Since(start)

	out := simulateJSON(res)
	w := cmd.OutOrStdout()
	if f.format == "json" {
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		if err := enc.Encode(out); err != nil {
			return fmt.Errorf("write json: %w", err)
		}
	} else if err := printSimulateTable(w, out); err != nil {
		return err
	}
	if f.report != "" {
		page, err := simulateReport(res, out)
		if err != nil {
			return err
		}
		if err := report.WriteDir(f.report, page); err != nil {
			return fmt.Errorf("--report: %w", err)
		}
	}
	fmt.Fprintf(errOut, "ripen simulate: %d policies x %d runs in %.1fs\n", len(res.Policies), res.Runs, elapsed.Seconds())
	return nil
}

// simulateJSON summarises a result for output.
func simulateJSON(res *sim.Result) simulateOutput {
	sc := res.Scenario
	out := simulateOutput{
		Scenario:     sc.Name,
		Description:  sc.Description,
		Runs:         res.Runs,
		Seed:         res.Seed,
		HorizonHours: sc.Horizon.Hours(),
		UpdateHours:  sc.UpdateInterval.Hours(),
		WindowHours:  sc.Window.Hours(),
		FitFamily:    sc.FitFamily,
	}
	for _, a := range sc.Arms {
		out.Arms = append(out.Arms, simulateArm{Arm: a.Name, CVR: a.CVR})
	}
	for _, p := range res.Policies {
		sp := simulatePolicy{
			Policy:            p.Policy,
			RegretMean:        round6(p.RegretMean),
			RegretSE:          round6(p.RegretSE),
			BestArmShare:      round6(p.BestArmShare),
			SettledRuns:       p.SettledRuns,
			SettledCorrect:    optional(p.SettledCorrect),
			SettleHoursMedian: optional(p.SettleHoursMedian),
			ObservedCVRMAE:    round6(p.ObservedMAE),
			EventualCVRMAE:    round6(p.EventualMAE),
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

func fmtOptional(x *float64, format string) string {
	if x == nil {
		return "-"
	}
	return fmt.Sprintf(format, *x)
}

func printSimulateTable(w io.Writer, out simulateOutput) error {
	fmt.Fprintf(w, "scenario %s: %d runs, seed %d, horizon %gh, update every %gh, window %gh, fit %s\n\n",
		out.Scenario, out.Runs, out.Seed, out.HorizonHours, out.UpdateHours, out.WindowHours, out.FitFamily)
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "policy\tregret\t± SE\tbest-arm share\tsettled\tcorrect\tsettle h (median)\tobserved CVR MAE\teventual CVR MAE\t")
	for _, p := range out.Policies {
		fmt.Fprintf(tw, "%s\t%.1f\t%.1f\t%.3f\t%d/%d\t%s\t%s\t%.4f\t%.4f\t\n", p.Policy, p.RegretMean, p.RegretSE, p.BestArmShare,
			p.SettledRuns, out.Runs, fmtOptional(p.SettledCorrect, "%.2f"), fmtOptional(p.SettleHoursMedian, "%.0f"), p.ObservedCVRMAE, p.EventualCVRMAE)
	}
	if err := tw.Flush(); err != nil {
		return fmt.Errorf("write table: %w", err)
	}
	return nil
}

// reportPolicy picks the policy whose runs the CVR and delay charts show:
// thompson-bayes when simulated, else the first.
func reportPolicy(res *sim.Result) *sim.PolicyResult {
	if p := res.Policy(estimator.PolicyThompsonBayes); p != nil {
		return p
	}
	return &res.Policies[0]
}

// simulateReport builds the HTML report of a simulation.
func simulateReport(res *sim.Result, out simulateOutput) (report.Page, error) {
	sc := res.Scenario
	page := report.Page{
		Title: "Simulation: " + sc.Name,
		Paragraphs: []string{
			sc.Description,
			fmt.Sprintf("%d runs per policy (base seed %d), horizon %gh, %g clicks per hour, refit every %gh, attribution window %gh, %s delay fits. Regret is the expected number of conversions lost against always playing the arm with the highest true eventual conversion rate.",
				res.Runs, res.Seed, out.HorizonHours, sc.ClicksPerHour, out.UpdateHours, out.WindowHours, sc.FitFamily),
		},
	}
	tab := report.Table{Caption: "Policies", Header: []string{"policy", "regret", "± SE", "best-arm share", "settled", "correct", "settle h (median)", "observed CVR MAE", "eventual CVR MAE"}}
	for _, p := range out.Policies {
		tab.Rows = append(tab.Rows, []string{p.Policy, fmt.Sprintf("%.1f", p.RegretMean), fmt.Sprintf("%.1f", p.RegretSE), fmt.Sprintf("%.3f", p.BestArmShare),
			fmt.Sprintf("%d/%d", p.SettledRuns, out.Runs), fmtOptional(p.SettledCorrect, "%.2f"), fmtOptional(p.SettleHoursMedian, "%.0f"),
			fmt.Sprintf("%.4f", p.ObservedCVRMAE), fmt.Sprintf("%.4f", p.EventualCVRMAE)})
	}
	page.Tables = append(page.Tables, tab)

	hours := append([]float64{0}, res.Hours...)
	var bands []report.Band
	for _, p := range res.Policies {
		bands = append(bands, report.Band{Name: p.Policy, X: hours, Mean: append([]float64{0}, p.RegretCurveMean...), SE: append([]float64{0}, p.RegretCurveSE...)})
	}
	page.Charts = append(page.Charts, report.RegretChart(bands))

	// Weights hold during the interval ending at each update: start each
	// staircase at the interval's start.
	for _, p := range res.Policies {
		var arms []report.ArmSeries
		for i, name := range res.Arms {
			arms = append(arms, report.ArmSeries{Arm: name, Y: append(append([]float64(nil), p.Weights[i]...), p.Weights[i][len(p.Weights[i])-1])})
		}
		page.Charts = append(page.Charts, report.TrafficShareChart("traffic-"+p.Policy, "Traffic share per arm, "+p.Policy+" (mean over runs)", hours, arms))
	}

	rp := reportPolicy(res)
	var cvr []report.ArmCVR
	for i, name := range res.Arms {
		cvr = append(cvr, report.ArmCVR{Arm: name, Observed: rp.ObservedCVR[i], Eventual: rp.EventualCVR[i], True: rp.PooledTrueCVR[i]})
	}
	page.Charts = append(page.Charts, report.CVRChart("Observed vs eventual vs true CVR, "+rp.Policy+" (mean over runs; true: of the clicks received)", res.Hours, cvr))

	window := sc.Window.D().Seconds()
	const points = 200
	var delays []report.ArmDelay
	for i, a := range sc.Arms {
		ad := report.ArmDelay{Arm: a.Name}
		for _, d := range rp.Trace.Delays[i] {
			ad.ObservedHours = append(ad.ObservedHours, d/3600)
		}
		dist, err := a.Delay.Distribution()
		if err != nil {
			return report.Page{}, fmt.Errorf("report: arm %q: %w", a.Name, err)
		}
		truth, err := sim.NewTruncated(dist, window)
		if err != nil {
			return report.Page{}, fmt.Errorf("report: arm %q: %w", a.Name, err)
		}
		fit := rp.Trace.Fits[i]
		for j := 0; j <= points; j++ {
			x := window * float64(j) / points
			ad.GridHours = append(ad.GridHours, x/3600)
			ad.FittedCDF = append(ad.FittedCDF, fit.CDF(x))
			ad.TrueCDF = append(ad.TrueCDF, truth.CDF(x))
		}
		delays = append(delays, ad)
	}
	ch, err := report.DelayCDFChart("Delay CDF at the horizon, run 0 of "+rp.Policy+": observed delays vs fitted (dashed) and true", delays)
	if err != nil {
		return report.Page{}, err
	}
	page.Charts = append(page.Charts, ch)
	return page, nil
}

// progressBar draws a one-line progress bar on a terminal.
type progressBar struct {
	w    io.Writer
	last int
}

// newProgressBar returns a bar drawing on w, or nil unless w is a
// terminal (so tests and pipes never see one).
func newProgressBar(w io.Writer) *progressBar {
	f, ok := w.(*os.File)
	if !ok {
		return nil
	}
	st, err := f.Stat()
	if err != nil || st.Mode()&os.ModeCharDevice == 0 {
		return nil
	}
	return &progressBar{w: w, last: -1}
}

func (b *progressBar) update(done, total int) {
	const width = 30
	n := done * width / total
	if n == b.last && done != total {
		return
	}
	b.last = n
	fmt.Fprintf(b.w, "\rsimulating [%s%s] %d/%d", strings.Repeat("=", n), strings.Repeat(" ", width-n), done, total)
}

func (b *progressBar) finish() { fmt.Fprint(b.w, "\r\033[K") }
