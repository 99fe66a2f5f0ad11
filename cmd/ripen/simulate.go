package main

import (
	"encoding/json"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"time"

	"github.com/spf13/cobra"

	"ripen/console/report"
	"ripen/estimator"
	"ripen/estimator/sim"
)

// simulateFlags are the options of `ripen simulate`.
type simulateFlags struct {
	scenarios []string
	policies  string
	runs      int
	format    string
	report    string
	seed      uint64
}

func newSimulateCmd() *cobra.Command {
	var f simulateFlags
	cmd := &cobra.Command{
		Use:   "simulate --scenario FILE|DIR [--scenario ...]",
		Short: "Simulate allocation policies closed-loop on scenarios and compare their regret and settle errors",
		Long: `simulate reads scenarios (YAML: traffic, arms with their true eventual
conversion rates and delay distributions, change points, update interval),
and runs every policy closed-loop on each: traffic follows the policy's
current weights, conversions are revealed after their delays, and the arms
are refitted on the update interval with the service's estimator. Runs are
seeded and spread over all cores; the output is the same for the same seed.
--scenario may be repeated and may name a directory (every *.yaml in it).

It prints one table, a row per scenario and policy: the mean cumulative
regret (expected conversions lost against always playing the best arm)
with its standard error; the ratio of the policy's mean regret to
thompson-observed's over the same runs, with its delta-method standard
error, and the same against delay-oracle; the share of traffic sent to the best arm; how often the settle rule
fired and how often it named a wrong arm (one whose true eventual rate was
more than the settle tolerance below the best arm's at that time); runs whose
status went from settled back to not settled; the median time of the first
settle; and the mean absolute error of the observed and eventual CVR at the
updates nearest 12, 24 and 48 hours. A pooled line per policy gives the
settle errors over all scenarios with a one-sided 95% upper bound.

The policy delay-oracle is a simulation-only yardstick: it knows every
arm's true delay distribution (only the eventual rate is unknown) and
samples from the exact posterior under the same burn-in, guardrails and
settle rule. --report DIR (one scenario) also writes DIR/index.html with
charts.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runSimulate(cmd, f)
		},
	}
	fl := cmd.Flags()
	fl.StringArrayVar(&f.scenarios, "scenario", nil, "scenario file (YAML) or directory of them; repeatable (required)")
	fl.StringVar(&f.policies, "policies", strings.Join(sim.PolicyNames(), ","), "comma-separated policies: "+strings.Join(sim.PolicyNames(), ", "))
	fl.IntVar(&f.runs, "runs", 0, "seeded runs per policy (0: each scenario's)")
	fl.StringVar(&f.format, "format", "table", "output format: table or json")
	fl.StringVar(&f.report, "report", "", "write an HTML report with charts to DIR/index.html (one scenario only)")
	fl.Uint64Var(&f.seed, "seed", 0, "base seed (0: each scenario's)")
	_ = cmd.MarkFlagRequired("scenario")
	return cmd
}

// loadScenarios reads every scenario the --scenario values name: a file, or
// a directory whose *.yaml files are read in name order. Scenario names
// must be unique.
func loadScenarios(paths []string) ([]*sim.Scenario, error) {
	var files []string
	for _, p := range paths {
		st, err := os.Stat(p)
		if err != nil {
			return nil, fmt.Errorf("--scenario: %w", err)
		}
		if !st.IsDir() {
			files = append(files, p)
			continue
		}
		found, err := filepath.Glob(filepath.Join(p, "*.yaml"))
		if err != nil {
			return nil, fmt.Errorf("--scenario %s: %w", p, err)
		}
		if len(found) == 0 {
			return nil, fmt.Errorf("--scenario %s: no *.yaml files in the directory", p)
		}
		sort.Strings(found)
		files = append(files, found...)
	}
	var out []*sim.Scenario
	seen := make(map[string]string)
	for _, name := range files {
		file, err := os.Open(name)
		if err != nil {
			return nil, fmt.Errorf("--scenario: %w", err)
		}
		sc, err := sim.ParseScenario(file)
		file.Close()
		if err != nil {
			return nil, fmt.Errorf("--scenario %s: %w", name, err)
		}
		if prev, ok := seen[sc.Name]; ok {
			return nil, fmt.Errorf("--scenario %s: scenario name %q already used by %s", name, sc.Name, prev)
		}
		seen[sc.Name] = name
		out = append(out, sc)
	}
	return out, nil
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
		if err := sim.CheckPolicy(p); err != nil {
			return fmt.Errorf("--policies: %w", err)
		}
		policies = append(policies, p)
	}
	if len(policies) == 0 {
		return fmt.Errorf("--policies: none given (valid: %s)", strings.Join(sim.PolicyNames(), ", "))
	}
	scenarios, err := loadScenarios(f.scenarios)
	if err != nil {
		return err
	}
	if f.report != "" && len(scenarios) != 1 {
		return fmt.Errorf("--report: needs exactly one scenario, got %d", len(scenarios))
	}

	errOut := cmd.ErrOrStderr()
	total := 0
	for _, sc := range scenarios {
		runs := sc.Runs
		if f.runs != 0 {
			runs = f.runs
		}
		total += runs * len(policies)
	}
	bar := newProgressBar(errOut, "simulating")
	start := time.Now()
	var results []*sim.Result
	for _, sc := range scenarios {
		opts := sim.Options{Policies: policies, Runs: f.runs, Seed: f.seed}
		if bar != nil {
			before := 0
			for _, r := range results {
				before += r.Runs * len(r.Policies)
			}
			opts.Progress = func(done, _ int) { bar.update(before+done, total) }
		}
		t0 := time.Now()
		res, err := sim.Run(cmd.Context(), *sc, opts)
		if err != nil {
			if bar != nil {
				bar.finish()
			}
			return fmt.Errorf("scenario %s: %w", sc.Name, err)
		}
		if bar != nil {
			bar.finish()
		}
		fmt.Fprintf(errOut, "ripen simulate: %s: %d policies x %d runs in %.1fs\n", sc.Name, len(res.Policies), res.Runs, time.Since(t0).Seconds())
		results = append(results, res)
	}
	elapsed := time.Since(start)

	w := cmd.OutOrStdout()
	if f.format == "json" {
		var doc any = simulateJSON(results[0])
		if len(results) > 1 {
			doc = simulateBatteryJSON(results)
		}
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		if err := enc.Encode(doc); err != nil {
			return fmt.Errorf("write json: %w", err)
		}
	} else if err := printSimulateTable(w, results); err != nil {
		return err
	}
	if f.report != "" {
		page, err := simulateReport(results[0], simulateJSON(results[0]))
		if err != nil {
			return err
		}
		if err := report.WriteDir(f.report, page); err != nil {
			return fmt.Errorf("--report: %w", err)
		}
	}
	if len(results) > 1 {
		fmt.Fprintf(errOut, "ripen simulate: %d scenarios in %.1fs\n", len(results), elapsed.Seconds())
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
	w     io.Writer
	label string
	last  int
}

// newProgressBar returns a bar labelled label drawing on w, or nil unless
// w is a terminal (so tests and pipes never see one).
func newProgressBar(w io.Writer, label string) *progressBar {
	f, ok := w.(*os.File)
	if !ok {
		return nil
	}
	st, err := f.Stat()
	if err != nil || st.Mode()&os.ModeCharDevice == 0 {
		return nil
	}
	return &progressBar{w: w, label: label, last: -1}
}

func (b *progressBar) update(done, total int) {
	const width = 30
	n := done * width / total
	if n == b.last && done != total {
		return
	}
	b.last = n
	fmt.Fprintf(b.w, "\r%s [%s%s] %d/%d", b.label, strings.Repeat("=", n), strings.Repeat(" ", width-n), done, total)
}

func (b *progressBar) finish() { fmt.Fprint(b.w, "\r\033[K") }
