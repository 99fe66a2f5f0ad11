package main

import (
	"encoding/json"
	"fmt"
	"io"
	"os"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"

	"ripen/consumer"
	"ripen/estimator"
)

// fitFlags are the options of `ripen fit`.
type fitFlags struct {
	clicks, conversions string
	asOf                string
	window              string
	delay               string
	policy              string
	format              string
	strict              bool
	seed                uint64
}

func newFitCmd() *cobra.Command {
	var f fitFlags
	cmd := &cobra.Command{
		Use:   "fit --clicks FILE --conversions FILE --as-of TIME --window DUR",
		Short: "Fit eventual conversion rates and traffic weights from JSON Lines event files",
		Long: `fit reads a click file and a conversion file (JSON Lines), joins conversions to
clicks by click_id, builds each arm's compact state as of --as-of, fits the
delay-censored model per arm, and prints per experiment and arm the observed
and eventual conversion rates, credible intervals, P(best) and weights.

Bad lines are reported with their line number and reason and not counted;
with --strict the first one ends the run with a non-zero exit.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runFit(cmd, f)
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.clicks, "clicks", "", "click events, JSON Lines (required)")
	fl.StringVar(&f.conversions, "conversions", "", "conversion events, JSON Lines (required)")
	fl.StringVar(&f.asOf, "as-of", "", "as-of time: RFC 3339 or epoch milliseconds (required)")
	fl.StringVar(&f.window, "window", "7d", "attribution window, e.g. 7d, 36h")
	fl.StringVar(&f.delay, "delay", "auto", "delay family: auto, exponential, weibull or histogram")
	fl.StringVar(&f.policy, "policy", estimator.PolicyThompsonBayes, "allocation policy: "+strings.Join(estimator.PolicyNames(), ", "))
	fl.StringVar(&f.format, "format", "table", "output format: table or json")
	fl.BoolVar(&f.strict, "strict", false, "stop at the first bad line with a non-zero exit")
	fl.Uint64Var(&f.seed, "seed", 0, "random seed (0: derived from experiment and as-of)")
	for _, name := range []string{"clicks", "conversions", "as-of"} {
		_ = cmd.MarkFlagRequired(name)
	}
	return cmd
}

// fitOutput is the JSON document `ripen fit --format json` prints.
type fitOutput struct {
	AsOf        string                       `json:"as_of"`
	Window      string                       `json:"window"`
	Delay       string                       `json:"delay"`
	Experiments []estimator.ExperimentReport `json:"experiments"`
	Counts      fitCounts                    `json:"counts"`
	Rejections  []fitRejection               `json:"rejections"`
}

type fitCounts struct {
	Clicks            int `json:"clicks"`
	Conversions       int `json:"conversions"`
	SelfAttributed    int `json:"self_attributed"`
	FutureClicks      int `json:"future_clicks"`
	FutureConversions int `json:"future_conversions"`
	Rejected          int `json:"rejected"`
}

type fitRejection struct {
	Source string `json:"source"`
	Line   int    `json:"line"`
	Reason string `json:"reason"`
	Detail string `json:"detail,omitempty"`
}

// parseEventTime parses an RFC 3339 time or integer epoch milliseconds.
func parseEventTime(s string) (int64, error) {
	if ms, err := strconv.ParseInt(strings.TrimSpace(s), 10, 64); err == nil {
		return ms, nil
	}
	t, err := time.Parse(time.RFC3339Nano, strings.TrimSpace(s))
	if err != nil {
		return 0, fmt.Errorf("time %q: want RFC 3339 (2026-05-14T00:00:00Z) or epoch milliseconds", s)
	}
	return t.UnixMilli(), nil
}

func runFit(cmd *cobra.Command, f fitFlags) error {
	asOf, err := parseEventTime(f.asOf)
	if err != nil {
		return fmt.Errorf("--as-of: %w", err)
	}
	window, err := estimator.ParseDuration(f.window)
	if err != nil {
		return fmt.Errorf("--window: %w", err)
	}
	family, err := estimator.ParseDelayFamily(f.delay)
	if err != nil {
		return fmt.Errorf("--delay: %w", err)
	}
	policy, err := estimator.ParsePolicy(f.policy)
	if err != nil {
		return fmt.Errorf("--policy: %w", err)
	}
	if f.format != "table" && f.format != "json" {
		return fmt.Errorf("--format %q: want table or json", f.format)
	}
	clicks, err := os.Open(f.clicks)
	if err != nil {
		return fmt.Errorf("--clicks: %w", err)
	}
	defer clicks.Close()
	convs, err := os.Open(f.conversions)
	if err != nil {
		return fmt.Errorf("--conversions: %w", err)
	}
	defer convs.Close()

	res, err := consumer.BuildOffline(cmd.Context(), clicks, convs, consumer.OfflineOptions{
		AsOf:   asOf,
		Layout: estimator.Layout{Window: window},
		Strict: f.strict,
	})
	if err != nil {
		if f.strict {
			return &exitError{code: 2, err: err}
		}
		return err
	}
	alloc := estimator.DefaultAllocationOptions()
	alloc.Policy = policy
	out := fitOutput{
		AsOf:   time.UnixMilli(asOf).UTC().Format(time.RFC3339Nano),
		Window: window.String(),
		Delay:  family.String(),
		Counts: fitCounts{
			Clicks: res.Clicks, Conversions: res.Conversions, SelfAttributed: res.SelfAttributed,
			FutureClicks: res.FutureClicks, FutureConversions: res.FutureConversions, Rejected: len(res.Rejections),
		},
		Experiments: []estimator.ExperimentReport{},
		Rejections:  []fitRejection{},
	}
	for _, e := range res.Experiments {
		in := estimator.ExperimentInput{
			Experiment: e.Name,
			AsOf:       asOf,
			Fit:        estimator.FitOptions{Family: family},
			Allocation: alloc,
			Seed:       f.seed,
		}
		for _, a := range e.Arms {
			in.Arms = append(in.Arms, estimator.ArmData{Arm: a.Name, State: a.State})
		}
		rep, err := estimator.EvaluateExperiment(in)
		if err != nil {
			return err
		}
		out.Experiments = append(out.Experiments, rep)
	}
	for _, r := range res.Rejections {
		out.Rejections = append(out.Rejections, fitRejection{Source: r.Source, Line: r.Line, Reason: string(r.Reason), Detail: r.Detail})
	}
	if f.format == "json" {
		enc := json.NewEncoder(cmd.OutOrStdout())
		enc.SetIndent("", "  ")
		return enc.Encode(out)
	}
	writeFitTable(cmd.OutOrStdout(), &out)
	writeRejections(cmd.ErrOrStderr(), out.Rejections)
	return nil
}

// maxListedRejections bounds the rejections listed one by one on stderr;
// --format json lists them all.
const maxListedRejections = 20

// writeFitTable prints one aligned table per experiment.
func writeFitTable(w io.Writer, out *fitOutput) {
	fmt.Fprintf(w, "as of %s, window %s, delay family %s\n", out.AsOf, out.Window, out.Delay)
	fmt.Fprintf(w, "%d clicks, %d conversions counted; %d rejected lines; %d future events ignored\n",
		out.Counts.Clicks, out.Counts.Conversions, out.Counts.Rejected, out.Counts.FutureClicks+out.Counts.FutureConversions)
	for _, e := range out.Experiments {
		fmt.Fprintf(w, "\nexperiment %s: %s (policy %s, leader %s)\n", e.Experiment, e.Status, e.Policy, e.Leader)
		switch {
		case e.Settle.Settled:
			fmt.Fprintf(w, "settled on %s at %s\n", e.Settle.Arm, e.SettledAt)
		case e.Settle.Reason != "":
			fmt.Fprintf(w, "not settled: %s\n", e.Settle.Reason)
		}
		tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "arm\tclicks\tconv\tobserved\tripe\teventual\t95% interval\tanytime bounds\tP(best)\tweight\tdelay\tmean h\t")
		for _, a := range e.Arms {
			arm := a.Arm
			if a.Paused {
				arm += " (paused)"
			}
			fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%.0f\t%s\t%s–%s\t%s–%s\t%.3f\t%.3f\t%s\t%.1f\t\n",
				arm, a.Clicks, a.Conversions, pct(a.ObservedCVR), a.RipeClicks, pct(a.EventualCVR),
				pct(a.CVRLow), pct(a.CVRHigh), pct(a.AnytimeLow), pct(a.AnytimeHigh), a.PBest, a.Weight, delayParams(a.Delay), a.Delay.MeanHours)
		}
		tw.Flush()
	}
}

// delayParams names the delay family and its parameters briefly, with its
// posterior probability when families were averaged.
func delayParams(d estimator.Delay) string {
	var out string
	switch d.Family {
	case "exponential":
		out = fmt.Sprintf("exponential(rate %.3g/h)", d.RatePerHour)
	case "weibull":
		out = fmt.Sprintf("weibull(shape %.2f, scale %.1fh)", d.Shape, d.ScaleHours)
	case "lognormal":
		out = fmt.Sprintf("lognormal(sigma %.2f, median %.1fh)", d.Shape, d.ScaleHours)
	default:
		out = d.Family
	}
	if p, ok := d.Families[d.Family]; ok {
		out += fmt.Sprintf(" p=%.2f", p)
	}
	return out
}

func pct(x float64) string { return strconv.FormatFloat(100*x, 'f', 2, 64) + "%" }

// writeRejections summarises rejected lines by reason and lists the first few.
func writeRejections(w io.Writer, rs []fitRejection) {
	if len(rs) == 0 {
		return
	}
	byReason := map[string]int{}
	for _, r := range rs {
		byReason[r.Reason]++
	}
	reasons := make([]string, 0, len(byReason))
	for r := range byReason {
		reasons = append(reasons, r)
	}
	sort.Strings(reasons)
	fmt.Fprintf(w, "\n%d lines not counted:", len(rs))
	for _, r := range reasons {
		fmt.Fprintf(w, " %s %d;", r, byReason[r])
	}
	fmt.Fprintln(w)
	for i, r := range rs {
		if i == maxListedRejections {
			fmt.Fprintf(w, "  ... %d more (--format json lists them all)\n", len(rs)-i)
			break
		}
		fmt.Fprintf(w, "  %s:%d: %s: %s\n", r.Source, r.Line, r.Reason, r.Detail)
	}
}
