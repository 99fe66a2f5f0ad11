package main

import (
	"encoding/json"
	"fmt"
	"io"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"

	"ripen/estimator"
	"ripen/estimator/calib"
)

// calibrateFlags are the options of `ripen calibrate`.
type calibrateFlags struct {
	window        string
	maturities    []string
	truths        []string
	clicks        []string
	fits          []string
	replicates    int
	qMin, qMax    float64
	step          string
	sbcClicks     []string
	sbcReplicates int
	sbcDraws      int
	skipCoverage  bool
	skipSBC       bool
	seed          uint64
	workers       int
	format        string
}

func newCalibrateCmd() *cobra.Command {
	var f calibrateFlags
	d := calib.Options{}.WithDefaults()
	cmd := &cobra.Command{
		Use:   "calibrate",
		Short: "Check by simulation that the posterior of an arm's eventual conversion rate is calibrated",
		Long: `calibrate simulates many replicates of one arm receiving steady traffic from
time 0 to an as-of time, builds its state as the service does, fits it and
computes the posterior of its eventual conversion rate, over a grid of
maturity (the as-of, in attribution windows) x delay family of the truth
(exponential, Weibull, lognormal, a two-component mixture) x traffic
(clicks per hour) x fitted delay family. Each replicate draws its true rate
uniformly from [--q-min, --q-max] and its delay parameters from fixed ranges
(mean delay from one hour to two windows).

Per cell it prints how often the equal-tailed 50%, 80% and 95% intervals
hold the true rate (and on which side the 95% interval misses), and the
mean absolute error of the observed CVR (conversions/clicks) and of the
eventual estimate; then the same pooled per fitted family and maturity.

Simulation-based calibration (Talts et al. 2018) then draws the truth from
the estimator's own prior, ranks it among --sbc-draws posterior quantiles
and tests the rank histogram (20 bins) for uniformity with a chi-square
test: a small p-value says the posterior is not the posterior of its model.

Everything is seeded; the output does not depend on --workers.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runCalibrate(cmd, f)
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.window, "window", "7d", "attribution window, e.g. 7d, 36h")
	fl.StringSliceVar(&f.maturities, "maturities", floatNames(d.Maturities), "as-of times in windows")
	fl.StringSliceVar(&f.truths, "truths", truthNames(d.Truths), "delay families of the truth: exponential, weibull, lognormal, mixture")
	fl.StringSliceVar(&f.clicks, "clicks-per-hour", floatNames(d.ClicksPerHour), "traffic to the arm, clicks per hour")
	fl.StringSliceVar(&f.fits, "fits", familyNames(d.Fits), "fitted delay families: auto, exponential, weibull, histogram")
	fl.IntVar(&f.replicates, "replicates", d.Replicates, "replicates per coverage cell")
	fl.Float64Var(&f.qMin, "q-min", d.QMin, "smallest true eventual rate")
	fl.Float64Var(&f.qMax, "q-max", d.QMax, "largest true eventual rate")
	fl.StringVar(&f.step, "step", d.Step.String(), "interval between batches of clicks")
	fl.StringSliceVar(&f.sbcClicks, "sbc-clicks-per-hour", floatNames(d.SBCClicksPerHour), "traffic of simulation-based calibration")
	fl.IntVar(&f.sbcReplicates, "sbc-replicates", d.SBCReplicates, "replicates per SBC cell (at least 100)")
	fl.IntVar(&f.sbcDraws, "sbc-draws", d.SBCDraws, "posterior quantiles the truth is ranked among (L; L+1 a multiple of 20)")
	fl.BoolVar(&f.skipCoverage, "skip-coverage", false, "run simulation-based calibration only")
	fl.BoolVar(&f.skipSBC, "skip-sbc", false, "run the coverage grid only")
	fl.Uint64Var(&f.seed, "seed", d.Seed, "base seed")
	fl.IntVar(&f.workers, "workers", 0, "goroutines (0: all cores); results do not depend on it")
	fl.StringVar(&f.format, "format", "table", "output format: table or json")
	return cmd
}

// floatNames formats numbers for flag defaults (0.25, not 0.250000).
func floatNames(xs []float64) []string {
	out := make([]string, len(xs))
	for i, x := range xs {
		out[i] = strconv.FormatFloat(x, 'g', -1, 64)
	}
	return out
}

// parseFloats parses the values of a list flag.
func parseFloats(flag string, vals []string) ([]float64, error) {
	out := make([]float64, len(vals))
	for i, v := range vals {
		x, err := strconv.ParseFloat(strings.TrimSpace(v), 64)
		if err != nil {
			return nil, fmt.Errorf("--%s: %q is not a number", flag, v)
		}
		out[i] = x
	}
	return out, nil
}

func truthNames(ts []calib.TruthFamily) []string {
	out := make([]string, len(ts))
	for i, t := range ts {
		out[i] = string(t)
	}
	return out
}

func familyNames(fs []estimator.DelayFamily) []string {
	out := make([]string, len(fs))
	for i, f := range fs {
		out[i] = f.String()
	}
	return out
}

// calibrateOptions turns the flags into options.
func calibrateOptions(f calibrateFlags) (calib.Options, error) {
	o := calib.Options{
		Replicates: f.replicates, QMin: f.qMin, QMax: f.qMax, SBCReplicates: f.sbcReplicates, SBCDraws: f.sbcDraws,
		SkipCoverage: f.skipCoverage, SkipSBC: f.skipSBC, Seed: f.seed, Workers: f.workers,
	}
	if f.skipCoverage && f.skipSBC {
		return o, fmt.Errorf("--skip-coverage and --skip-sbc: nothing left to run")
	}
	var err error
	if o.Maturities, err = parseFloats("maturities", f.maturities); err != nil {
		return o, err
	}
	if o.ClicksPerHour, err = parseFloats("clicks-per-hour", f.clicks); err != nil {
		return o, err
	}
	if o.SBCClicksPerHour, err = parseFloats("sbc-clicks-per-hour", f.sbcClicks); err != nil {
		return o, err
	}
	w, err := estimator.ParseDuration(f.window)
	if err != nil {
		return o, fmt.Errorf("--window: %w", err)
	}
	o.Window = w
	if o.Step, err = estimator.ParseDuration(f.step); err != nil {
		return o, fmt.Errorf("--step: %w", err)
	}
	for _, name := range f.truths {
		t, err := calib.ParseTruthFamily(strings.TrimSpace(name))
		if err != nil {
			return o, fmt.Errorf("--truths: %w", err)
		}
		o.Truths = append(o.Truths, t)
	}
	for _, name := range f.fits {
		fam, err := estimator.ParseDelayFamily(strings.TrimSpace(name))
		if err != nil {
			return o, fmt.Errorf("--fits: %w", err)
		}
		o.Fits = append(o.Fits, fam)
	}
	if err := o.Validate(); err != nil {
		return o, err
	}
	return o, nil
}

func runCalibrate(cmd *cobra.Command, f calibrateFlags) error {
	if f.format != "table" && f.format != "json" {
		return fmt.Errorf("--format %q: want table or json", f.format)
	}
	o, err := calibrateOptions(f)
	if err != nil {
		return err
	}
	errOut := cmd.ErrOrStderr()
	if bar := newProgressBar(errOut, "calibrating"); bar != nil {
		o.Progress = bar.update
		defer bar.finish()
	}
	start := time.Now()
	res, err := calib.Run(cmd.Context(), o)
	if err != nil {
		return err
	}
	elapsed := time.Since(start)
	doc := calibrateJSON(res)
	w := cmd.OutOrStdout()
	if f.format == "json" {
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		if err := enc.Encode(doc); err != nil {
			return fmt.Errorf("write json: %w", err)
		}
	} else if err := printCalibrate(w, doc); err != nil {
		return err
	}
	fmt.Fprintf(errOut, "ripen calibrate: %d coverage cells, %d SBC cells in %.1fs\n", len(res.Cells), len(res.SBC), elapsed.Seconds())
	return nil
}

// calibrateOutput is the JSON document `ripen calibrate --format json`
// prints.
type calibrateOutput struct {
	WindowHours   float64           `json:"window_hours"`
	Replicates    int               `json:"replicates"`
	QMin          float64           `json:"q_min"`
	QMax          float64           `json:"q_max"`
	StepMinutes   float64           `json:"step_minutes"`
	Seed          uint64            `json:"seed"`
	SBCReplicates int               `json:"sbc_replicates"`
	SBCDraws      int               `json:"sbc_draws"`
	Cells         []calibrateCell   `json:"cells"`
	Pooled        []calibrateCell   `json:"pooled"`
	SBC           []calibrateSBCRow `json:"sbc"`
}

// calibrateCell is one coverage cell; Truth and ClicksPerHour are empty in
// pooled rows. Values are null when every replicate failed.
type calibrateCell struct {
	Fit             string   `json:"fit"`
	Truth           string   `json:"truth,omitempty"`
	Maturity        float64  `json:"maturity_windows"`
	ClicksPerHour   float64  `json:"clicks_per_hour,omitempty"`
	Replicates      int      `json:"replicates"`
	Failed          int      `json:"failed"`
	Coverage50      *float64 `json:"coverage_50"`
	Coverage80      *float64 `json:"coverage_80"`
	Coverage95      *float64 `json:"coverage_95"`
	Below95         *float64 `json:"below_95"`
	Above95         *float64 `json:"above_95"`
	ObservedMAE     *float64 `json:"observed_mae"`
	EventualMAE     *float64 `json:"eventual_mae"`
	MeanClicks      *float64 `json:"mean_clicks"`
	MeanConversions *float64 `json:"mean_conversions"`
}

type calibrateSBCRow struct {
	Fit           string   `json:"fit"`
	Maturity      float64  `json:"maturity_windows"`
	ClicksPerHour float64  `json:"clicks_per_hour"`
	Replicates    int      `json:"replicates"`
	Failed        int      `json:"failed"`
	Histogram     []int    `json:"histogram"`
	ChiSquare     *float64 `json:"chi_square"`
	PValue        *float64 `json:"p_value"`
}

func calibrateJSON(res *calib.Result) calibrateOutput {
	o := res.Options
	doc := calibrateOutput{
		WindowHours: o.Window.Hours(), Replicates: o.Replicates, QMin: o.QMin, QMax: o.QMax, StepMinutes: o.Step.Minutes(),
		Seed: o.Seed, SBCReplicates: o.SBCReplicates, SBCDraws: o.SBCDraws,
		Cells: []calibrateCell{}, Pooled: []calibrateCell{}, SBC: []calibrateSBCRow{},
	}
	cell := func(c calib.CoverageCell) calibrateCell {
		return calibrateCell{
			Fit: c.Fit.String(), Truth: string(c.Truth), Maturity: c.Maturity, ClicksPerHour: c.ClicksPerHour,
			Replicates: c.Replicates, Failed: c.Failed,
			Coverage50: optional(c.Coverage[0]), Coverage80: optional(c.Coverage[1]), Coverage95: optional(c.Coverage[2]),
			Below95: optional(c.Below95), Above95: optional(c.Above95),
			ObservedMAE: optional(c.ObservedMAE), EventualMAE: optional(c.EventualMAE),
			MeanClicks: optional(c.MeanClicks), MeanConversions: optional(c.MeanConversions),
		}
	}
	for _, c := range res.Cells {
		doc.Cells = append(doc.Cells, cell(c))
	}
	for _, c := range res.Pooled {
		doc.Pooled = append(doc.Pooled, cell(c))
	}
	for _, s := range res.SBC {
		doc.SBC = append(doc.SBC, calibrateSBCRow{Fit: s.Fit.String(), Maturity: s.Maturity, ClicksPerHour: s.ClicksPerHour,
			Replicates: s.Replicates, Failed: s.Failed, Histogram: s.Histogram[:], ChiSquare: optional(s.ChiSquare), PValue: optional(s.PValue)})
	}
	return doc
}

// printCalibrate prints the coverage cells, the pooled rows and the SBC
// cells as three tables.
func printCalibrate(w io.Writer, doc calibrateOutput) error {
	fmt.Fprintf(w, "window %gh; true q uniform on [%g, %g]; clicks in batches every %gm; seed %d\n", doc.WindowHours, doc.QMin, doc.QMax, doc.StepMinutes, doc.Seed)
	row := func(tw io.Writer, lead string, c calibrateCell) {
		fmt.Fprintf(tw, "%s%d\t%d\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t\n", lead, c.Replicates, c.Failed,
			fmtOptional(c.Coverage50, "%.3f"), fmtOptional(c.Coverage80, "%.3f"), fmtOptional(c.Coverage95, "%.3f"),
			fmtOptional(c.Below95, "%.3f"), fmtOptional(c.Above95, "%.3f"), fmtOptional(c.ObservedMAE, "%.4f"), fmtOptional(c.EventualMAE, "%.4f"))
	}
	const cols = "n\tfailed\tcover 50%\tcover 80%\tcover 95%\tbelow 95%\tabove 95%\tMAE observed\tMAE eventual\t"
	if len(doc.Cells) > 0 {
		fmt.Fprintf(w, "\ncoverage of the equal-tailed intervals of q (share holding the truth; below/above: truth outside the 95%% interval), %d replicates per cell\n", doc.Replicates)
		tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "fit\ttruth\tmaturity (windows)\tclicks/h\t"+cols)
		for _, c := range doc.Cells {
			row(tw, fmt.Sprintf("%s\t%s\t%g\t%g\t", c.Fit, c.Truth, c.Maturity, c.ClicksPerHour), c)
		}
		if err := tw.Flush(); err != nil {
			return fmt.Errorf("write table: %w", err)
		}
		fmt.Fprintln(w, "\npooled over truth families and traffic")
		tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "fit\tmaturity (windows)\t"+cols)
		for _, c := range doc.Pooled {
			row(tw, fmt.Sprintf("%s\t%g\t", c.Fit, c.Maturity), c)
		}
		if err := tw.Flush(); err != nil {
			return fmt.Errorf("write table: %w", err)
		}
	}
	if len(doc.SBC) > 0 {
		fmt.Fprintf(w, "\nsimulation-based calibration: truth from the estimator's prior, rank among %d posterior quantiles in %d bins, chi-square with %d d.f.\n",
			doc.SBCDraws, calib.SBCBins, calib.SBCBins-1)
		tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "fit\tmaturity (windows)\tclicks/h\tn\tfailed\tchi-square\tp\t")
		for _, s := range doc.SBC {
			fmt.Fprintf(tw, "%s\t%g\t%g\t%d\t%d\t%s\t%s\t\n", s.Fit, s.Maturity, s.ClicksPerHour, s.Replicates, s.Failed,
				fmtOptional(s.ChiSquare, "%.1f"), fmtOptional(s.PValue, "%.3g"))
		}
		if err := tw.Flush(); err != nil {
			return fmt.Errorf("write table: %w", err)
		}
	}
	return nil
}
