package main

import (
	"cmp"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"path/filepath"
	"slices"
	"strings"
	"time"

	"github.com/spf13/cobra"

	"ripen/cmd/ripen/report"
	"ripen/consumer"
	"ripen/estimator"
	"ripen/state"
)

// reportFlags are the options of `ripen report`.
type reportFlags struct {
	experiment string
	redisURL   string
	prefix     string
	out        string
}

func newReportCmd() *cobra.Command {
	var f reportFlags
	cmd := &cobra.Command{
		Use:   "report --experiment ID [--redis URL] [--prefix P] [--out DIR]",
		Short: "Draw the charts of a live experiment from the state store",
		Long: `report reads one experiment from Redis — the history of its published
allocations and its current arm states — and writes DIR/index.html with
charts: each arm's traffic share over time, observed vs eventual conversion
rate over time, and the delay distribution (the histogram of observed
delays against the fitted model, refitted from the stored states with the
delay family of the latest allocation).`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runReport(cmd, f)
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.experiment, "experiment", "", "experiment id (required)")
	fl.StringVar(&f.redisURL, "redis", consumer.DefaultRedisURL, "Redis URL (redis:// or rediss://)")
	fl.StringVar(&f.prefix, "prefix", consumer.DefaultPrefix, "key prefix of the deployment")
	fl.StringVar(&f.out, "out", "ripen-report", "directory to write index.html to")
	_ = cmd.MarkFlagRequired("experiment")
	return cmd
}

func runReport(cmd *cobra.Command, f reportFlags) error {
	if strings.TrimSpace(f.experiment) == "" {
		return &exitError{code: 2, err: errors.New("--experiment: must not be empty")}
	}
	rdb, err := consumer.NewRedisClient(consumer.RedisConfig{URL: f.redisURL, Prefix: f.prefix})
	if err != nil {
		return &exitError{code: 2, err: fmt.Errorf("--redis: %w", err)}
	}
	defer rdb.Close()
	store, err := state.New(rdb, state.Options{Prefix: f.prefix})
	if err != nil {
		return &exitError{code: 2, err: err}
	}
	ctx := cmd.Context()
	v := experimentView{ID: f.experiment}
	raw, err := store.History(ctx, f.experiment)
	if err != nil {
		return fmt.Errorf("report %q: %w", f.experiment, err)
	}
	if len(raw) == 0 {
		_, body, err := store.LatestAllocation(ctx, f.experiment)
		switch {
		case errors.Is(err, state.ErrNotFound):
			v.Notes = append(v.Notes, "No allocation has been published for this experiment yet.")
		case err != nil:
			return fmt.Errorf("report %q: %w", f.experiment, err)
		default:
			raw = [][]byte{body}
			v.Notes = append(v.Notes, "No allocation history is stored for this experiment; the charts over time show the latest allocation only.")
		}
	}
	if v.History, err = parseAllocations(raw); err != nil {
		return fmt.Errorf("report %q: %w", f.experiment, err)
	}
	v.State, err = store.Load(ctx, f.experiment)
	switch {
	case errors.Is(err, state.ErrNotFound):
		v.State = nil
		if len(v.History) == 0 {
			return &exitError{code: 1, err: fmt.Errorf("report: experiment %q not found under prefix %q", f.experiment, f.prefix)}
		}
	case err != nil:
		return fmt.Errorf("report %q: %w", f.experiment, err)
	}
	page, err := experimentPage(v)
	if err != nil {
		return fmt.Errorf("report %q: %w", f.experiment, err)
	}
	if err := report.WriteDir(f.out, page); err != nil {
		return fmt.Errorf("--out: %w", err)
	}
	fmt.Fprintf(cmd.OutOrStdout(), "wrote %s (%d allocations, %d arms)\n", filepath.Join(f.out, "index.html"), len(v.History), len(page.Tables[0].Rows))
	return nil
}

// parseAllocations decodes allocation messages and returns them by
// sequence number, one per number (a message read twice counts once).
func parseAllocations(raw [][]byte) ([]consumer.Allocation, error) {
	out := make([]consumer.Allocation, 0, len(raw))
	for i, b := range raw {
		var a consumer.Allocation
		if err := json.Unmarshal(b, &a); err != nil {
			return nil, fmt.Errorf("allocation %d: %w", i+1, err)
		}
		if _, err := time.Parse(time.RFC3339Nano, a.AsOf); err != nil {
			return nil, fmt.Errorf("allocation %d: as_of: %w", i+1, err)
		}
		out = append(out, a)
	}
	slices.SortStableFunc(out, func(a, b consumer.Allocation) int { return cmp.Compare(a.Seq, b.Seq) })
	return slices.CompactFunc(out, func(a, b consumer.Allocation) bool { return a.Seq == b.Seq }), nil
}

// experimentView is what an experiment's report is drawn from: the
// allocations published for it and its current arm states, and, in a
// simulation, the truth.
type experimentView struct {
	// ID is the experiment id; Title, when set, heads the page.
	ID, Title string
	// Notes are printed as paragraphs under the title.
	Notes []string
	// History holds the published allocations, oldest first.
	History []consumer.Allocation
	// State is the stored state (nil if none).
	State *state.Experiment
	// Origin is time zero of the charts (Unix ms). Default: the first
	// allocation's as-of time.
	Origin int64
	// Truth is known only in simulations (nil otherwise).
	Truth *armTruth
}

// armTruth is the simulated truth behind a demo experiment.
type armTruth struct {
	// CVR returns every arm's true eventual conversion rate for clicks at
	// the given time (Unix ms).
	CVR func(atMs int64) map[string]float64
	// DelayCDF holds each arm's true delay CDF (seconds in, probability
	// out), conditioned on converting within the window.
	DelayCDF map[string]func(seconds float64) float64
}

// delayGridPoints is the resolution of the delay CDF curves.
const delayGridPoints = 200

// experimentPage builds the report page of one experiment.
func experimentPage(v experimentView) (report.Page, error) {
	title := v.Title
	if title == "" {
		title = "Experiment " + v.ID
	}
	page := report.Page{Title: title, Paragraphs: slices.Clone(v.Notes)}
	origin := v.Origin
	asOf := make([]int64, len(v.History))
	for i, a := range v.History {
		t, _ := time.Parse(time.RFC3339Nano, a.AsOf) // checked by parseAllocations
		asOf[i] = t.UnixMilli()
	}
	if origin == 0 && len(asOf) > 0 {
		origin = asOf[0]
	}
	hoursOf := func(ms int64) float64 { return float64(ms-origin) / 3.6e6 }

	arms := armNames(v)
	var latest *consumer.Allocation
	if n := len(v.History); n > 0 {
		latest = &v.History[n-1]
		page.Paragraphs = append(page.Paragraphs, fmt.Sprintf("%d allocations from %s to %s. Latest: status %s, leader %s, policy %s.",
			n, v.History[0].AsOf, latest.AsOf, latest.Status, latest.Leader, latest.Policy))
	}
	if v.State != nil {
		page.Paragraphs = append(page.Paragraphs, fmt.Sprintf("Arm states as of the stored watermark %s; attribution window %v.",
			time.UnixMilli(v.State.Watermark).UTC().Format(time.RFC3339), v.State.Layout.Window))
	}
	page.Tables = append(page.Tables, armTable(v, latest, arms))

	if len(v.History) > 0 {
		// Weights hold from one publication to the next: extend the last
		// step to the stored watermark (or one step further).
		hours := make([]float64, 0, len(asOf)+1)
		for _, t := range asOf {
			hours = append(hours, hoursOf(t))
		}
		end := asOf[len(asOf)-1]
		if v.State != nil && v.State.Watermark > end {
			end = v.State.Watermark
		}
		hours = append(hours, hoursOf(end))
		var share []report.ArmSeries
		var cvr []report.ArmCVR
		for _, arm := range arms {
			w := make([]float64, 0, len(hours))
			c := report.ArmCVR{Arm: arm}
			for i, a := range v.History {
				w = append(w, a.Weights[arm])
				obs, ev := math.NaN(), math.NaN()
				if r := armReport(a, arm); r != nil {
					obs, ev = r.ObservedCVR, r.EventualCVR
				}
				c.Observed = append(c.Observed, obs)
				c.Eventual = append(c.Eventual, ev)
				if v.Truth != nil {
					c.True = append(c.True, v.Truth.CVR(asOf[i])[arm])
				}
			}
			share = append(share, report.ArmSeries{Arm: arm, Y: append(w, w[len(w)-1])})
			cvr = append(cvr, c)
		}
		page.Charts = append(page.Charts,
			report.TrafficShareChart("traffic", "Traffic share per arm (published weights)", hours, share),
			report.CVRChart(cvrTitle(v), hours[:len(hours)-1], cvr))
	}
	if v.State != nil {
		charts, err := delayCharts(v, latest, arms)
		if err != nil {
			return report.Page{}, err
		}
		page.Charts = append(page.Charts, charts...)
	}
	return page, nil
}

func cvrTitle(v experimentView) string {
	if v.Truth != nil {
		return "Observed (dashed) vs eventual (solid) vs true conversion rate per arm"
	}
	return "Observed (dashed) vs eventual (solid) conversion rate per arm"
}

// armNames lists the arms of the state, else of the latest allocation.
func armNames(v experimentView) []string {
	if v.State != nil {
		return slices.Clone(v.State.Arms)
	}
	if n := len(v.History); n > 0 {
		var names []string
		for _, a := range v.History[n-1].Arms {
			names = append(names, a.Arm)
		}
		slices.Sort(names)
		return names
	}
	return nil
}

func armReport(a consumer.Allocation, arm string) *estimator.ArmReport {
	for i := range a.Arms {
		if a.Arms[i].Arm == arm {
			return &a.Arms[i]
		}
	}
	return nil
}

// armTable lists each arm as of the latest allocation.
func armTable(v experimentView, latest *consumer.Allocation, arms []string) report.Table {
	t := report.Table{Header: []string{"arm", "weight", "clicks", "conversions", "observed CVR", "eventual CVR", "95% interval", "P(best)", "delay family", "mean delay (h)"}}
	if v.Truth != nil {
		t.Header = append(t.Header, "true CVR")
	}
	if latest == nil {
		t.Caption = "Arms (no allocation published yet)"
	} else {
		t.Caption = "Arms at " + latest.AsOf
	}
	for _, arm := range arms {
		row := []string{arm, "-", "-", "-", "-", "-", "-", "-", "-", "-"}
		if latest != nil {
			if r := armReport(*latest, arm); r != nil {
				row = []string{arm, fmt.Sprintf("%.3f", r.Weight), fmt.Sprint(r.Clicks), fmt.Sprint(r.Conversions),
					pctOrDash(r.ObservedCVR), pctOrDash(r.EventualCVR), pctOrDash(r.CVRLow) + " – " + pctOrDash(r.CVRHigh),
					fmt.Sprintf("%.3f", r.PBest), r.Delay.Family, fmt.Sprintf("%.1f", r.Delay.MeanHours)}
			}
		}
		if v.Truth != nil {
			at := v.Origin
			if latest != nil {
				tm, _ := time.Parse(time.RFC3339Nano, latest.AsOf)
				at = tm.UnixMilli()
			}
			row = append(row, pctOrDash(v.Truth.CVR(at)[arm]))
		}
		t.Rows = append(t.Rows, row)
	}
	return t
}

func pctOrDash(x float64) string {
	if math.IsNaN(x) {
		return "-"
	}
	return fmt.Sprintf("%.2f%%", 100*x)
}

// armDelayCurves are one arm's delay curves on a grid of delays.
type armDelayCurves struct {
	// EdgesHours and Empirical are the staircase of the observed delays'
	// histogram: Empirical[i] is the share of observed delays below
	// EdgesHours[i] (empty when nothing converted yet).
	EdgesHours, Empirical []float64
	// GridHours holds the grid; Fitted is the fitted delay CDF G, and
	// AsObserved the CDF the fit predicts for the delays observed so far
	// (young clicks can only show short delays).
	GridHours, Fitted, AsObserved []float64
	Fit                           *estimator.Fit
}

// delayCurves refits one arm's state with the given family and computes
// its delay curves.
func delayCurves(st *estimator.ArmState, family estimator.DelayFamily) (armDelayCurves, error) {
	data := st.FitData()
	fit, err := estimator.FitModel(&data, estimator.FitOptions{Family: family})
	if err != nil {
		return armDelayCurves{}, fmt.Errorf("fit: %w", err)
	}
	c := armDelayCurves{Fit: fit}
	if d := data.Delays; d.Count > 0 {
		var cum float64
		c.EdgesHours = append(c.EdgesHours, 0)
		c.Empirical = append(c.Empirical, 0)
		for k, n := range d.Counts {
			cum += n
			c.EdgesHours = append(c.EdgesHours, d.Edges[k+1]/3600)
			c.Empirical = append(c.Empirical, cum/d.Count)
		}
	}
	// Under the fit, a pending click of age a shows a delay of at most x
	// with probability q*G(min(x, a)) and a matured click with q*G(x);
	// normalised by q*(ripe clicks) this is the CDF of observed delays.
	ripe := data.MaturedClicks
	for _, b := range data.Pending {
		ripe += b.Clicks * fit.CDF(b.Age)
	}
	for j := 0; j <= delayGridPoints; j++ {
		x := data.Window * float64(j) / delayGridPoints
		g := fit.CDF(x)
		obs := data.MaturedClicks * g
		for _, b := range data.Pending {
			obs += b.Clicks * fit.CDF(min(x, b.Age))
		}
		c.GridHours = append(c.GridHours, x/3600)
		c.Fitted = append(c.Fitted, g)
		if ripe > 0 {
			c.AsObserved = append(c.AsObserved, obs/ripe)
		} else {
			c.AsObserved = append(c.AsObserved, math.NaN())
		}
	}
	return c, nil
}

// delayCharts draws the delay histogram of each arm against its fit, and
// the fitted delay CDFs (against the truth when known).
func delayCharts(v experimentView, latest *consumer.Allocation, arms []string) ([]report.Chart, error) {
	obs := report.Chart{ID: "delay-cdf", Title: "Observed delays (histogram, solid) vs the fit's prediction for them (dashed)", XLabel: "delay (hours)", YLabel: "P(delay ≤ x)"}
	model := report.Chart{ID: "delay-model", Title: "Fitted delay CDF of converters within the window", XLabel: "delay (hours)", YLabel: "P(delay ≤ x | converts)"}
	if v.Truth != nil {
		model.Title += " (dashed: true)"
	}
	for i, arm := range arms {
		st := v.State.States[arm]
		if st == nil {
			continue
		}
		family := estimator.FamilyAuto
		if latest != nil {
			if r := armReport(*latest, arm); r != nil {
				if f, err := estimator.ParseDelayFamily(r.Delay.Family); err == nil {
					family = f
				}
			}
		}
		c, err := delayCurves(st, family)
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", arm, err)
		}
		obs.Series = append(obs.Series,
			report.Series{Name: arm + " observed", X: c.EdgesHours, Y: c.Empirical, Group: i, Step: true},
			report.Series{Name: arm + " fit, as observed", X: c.GridHours, Y: c.AsObserved, Group: i, Dashed: true})
		model.Series = append(model.Series, report.Series{Name: fmt.Sprintf("%s fitted (%s)", arm, c.Fit.Family), X: c.GridHours, Y: c.Fitted, Group: i})
		if v.Truth != nil && v.Truth.DelayCDF[arm] != nil {
			tr := make([]float64, len(c.GridHours))
			for j, h := range c.GridHours {
				tr[j] = v.Truth.DelayCDF[arm](h * 3600)
			}
			model.Series = append(model.Series, report.Series{Name: arm + " true", X: c.GridHours, Y: tr, Group: i, Dashed: true})
		}
	}
	return []report.Chart{obs, model}, nil
}
