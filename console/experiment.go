// Package console is the read-only web console of `ripen run` and the
// page builders it shares with `ripen report` and `ripen demo`: one
// experiment's page (ExperimentPage), the experiments list and the service
// page, all described as report.Page data and drawn by the report
// package's page script. It reads state and metrics; it never writes.
package console

import (
	"cmp"
	"encoding/json"
	"fmt"
	"math"
	"slices"
	"strings"
	"time"

	"ripen/console/report"
	"ripen/consumer"
	"ripen/estimator"
	"ripen/state"
)

// Allocation is an allocation message as the console reads it: the
// published report with its seq. The report carries the settle rule's
// verdict (Settle, SettledAt); older messages without it read as not
// settled with no reason.
type Allocation struct {
	consumer.Allocation
}

// asOfMillis is the allocation's as-of time in Unix ms.
func (a Allocation) asOfMillis() int64 {
	t, err := time.Parse(time.RFC3339Nano, a.AsOf)
	if err != nil {
		return 0
	}
	return t.UnixMilli()
}

// arm returns the report of one arm, nil if the allocation lacks it.
func (a Allocation) arm(name string) *estimator.ArmReport {
	for i := range a.Arms {
		if a.Arms[i].Arm == name {
			return &a.Arms[i]
		}
	}
	return nil
}

// ParseAllocation decodes one allocation message.
func ParseAllocation(b []byte) (Allocation, error) {
	var a Allocation
	if err := json.Unmarshal(b, &a); err != nil {
		return Allocation{}, err
	}
	if _, err := time.Parse(time.RFC3339Nano, a.AsOf); err != nil {
		return Allocation{}, fmt.Errorf("as_of: %w", err)
	}
	return a, nil
}

// ParseAllocations decodes allocation messages and returns them by
// sequence number, one per number (a message read twice counts once).
func ParseAllocations(raw [][]byte) ([]Allocation, error) {
	out := make([]Allocation, 0, len(raw))
	for i, b := range raw {
		a, err := ParseAllocation(b)
		if err != nil {
			return nil, fmt.Errorf("allocation %d: %w", i+1, err)
		}
		out = append(out, a)
	}
	slices.SortStableFunc(out, func(a, b Allocation) int { return cmp.Compare(a.Seq, b.Seq) })
	return slices.CompactFunc(out, func(a, b Allocation) bool { return a.Seq == b.Seq }), nil
}

// View is what an experiment's page is drawn from: the allocations
// published for it and its current arm states, and, in a simulation, the
// truth; in the live console also the settings in force.
type View struct {
	// ID is the experiment id; Title, when set, heads the page.
	ID, Title string
	// Notes are printed as paragraphs under the title.
	Notes []string
	// History holds the published allocations, oldest first.
	History []Allocation
	// State is the stored state (nil if none).
	State *state.Experiment
	// Origin is time zero of the charts (Unix ms). Default: the first
	// allocation's as-of time.
	Origin int64
	// Truth is known only in simulations (nil otherwise).
	Truth *Truth
	// Settings are the settings in force (nil outside the service).
	Settings *consumer.ExperimentSettings
	// Links are the page's downloads.
	Links []report.Link
}

// Truth is the simulated truth behind a demo experiment.
type Truth struct {
	// CVR returns every arm's true eventual conversion rate for clicks at
	// the given time (Unix ms).
	CVR func(atMs int64) map[string]float64
	// DelayCDF holds each arm's true delay CDF (seconds in, probability
	// out), conditioned on converting within the window.
	DelayCDF map[string]func(seconds float64) float64
}

// delayGridPoints is the resolution of the delay CDF curves.
const delayGridPoints = 200

// ArmOrder lists an experiment's arms in colour order: by first
// appearance in the history, then the stored arms not published yet,
// sorted. An arm keeps its colour as the experiment grows.
func ArmOrder(history []Allocation, st *state.Experiment) []string {
	var out []string
	seen := map[string]bool{}
	add := func(a string) {
		if !seen[a] {
			seen[a] = true
			out = append(out, a)
		}
	}
	for _, a := range history {
		for _, r := range a.Arms {
			add(r.Arm)
		}
	}
	if st != nil {
		for _, a := range slices.Sorted(slices.Values(st.Arms)) {
			add(a)
		}
	}
	return out
}

// ExperimentPage builds the page of one experiment: a summary, the latest
// allocation as a table, charts over time (weights, P(best), observed and
// eventual conversion rates with the credible band), the delay fit
// against the observed delays, and, in the console, the settings in force.
func ExperimentPage(v View) (report.Page, error) {
	title := v.Title
	if title == "" {
		title = "Experiment " + v.ID
	}
	page := report.Page{Title: title, Paragraphs: slices.Clone(v.Notes), Links: v.Links}
	asOf := make([]int64, len(v.History))
	for i, a := range v.History {
		asOf[i] = a.asOfMillis()
	}
	origin := v.Origin
	if origin == 0 && len(asOf) > 0 {
		origin = asOf[0]
	}
	hoursOf := func(ms int64) float64 { return float64(ms-origin) / 3.6e6 }
	arms := ArmOrder(v.History, v.State)

	var latest *Allocation
	if n := len(v.History); n > 0 {
		latest = &v.History[n-1]
	}
	page.Facts = experimentFacts(v, latest)
	if len(v.History) > 0 {
		page.Paragraphs = append(page.Paragraphs, fmt.Sprintf("%d allocations from %s to %s. Time axes count from %s (UTC).",
			len(v.History), v.History[0].AsOf, latest.AsOf, time.UnixMilli(origin).UTC().Format("2006-01-02 15:04")))
	}
	if v.State != nil {
		page.Paragraphs = append(page.Paragraphs, fmt.Sprintf("Arm states as of the stored watermark %s; attribution window %s.",
			fmtMillis(v.State.Watermark), consumer.FormatDuration(v.State.Layout.Window)))
	}
	page.Tables = append(page.Tables, armTable(v, latest, arms))

	if len(v.History) > 0 {
		page.Charts = append(page.Charts, historyCharts(v, arms, asOf, hoursOf)...)
	}
	if v.State != nil {
		charts, err := delayCharts(v, latest, arms)
		if err != nil {
			return report.Page{}, err
		}
		page.Charts = append(page.Charts, charts...)
	}
	if v.Settings != nil {
		page.After = append(page.After, settingsTable(*v.Settings))
	}
	return page, nil
}

// experimentFacts is the summary line of an experiment page.
func experimentFacts(v View, latest *Allocation) []report.Fact {
	if latest == nil {
		return []report.Fact{{Label: "status", Value: "no allocation yet", Tone: "warn"}}
	}
	facts := []report.Fact{{Label: "status", Value: string(latest.Status), Tone: statusTone(latest.Status)}}
	if latest.Leader != "" {
		leader := latest.Leader
		if r := latest.arm(latest.Leader); r != nil {
			leader += fmt.Sprintf(" (P(best) %.2f)", r.PBest)
		}
		facts = append(facts, report.Fact{Label: "leader", Value: leader})
	}
	facts = append(facts, report.Fact{Label: "policy", Value: latest.Policy}, report.Fact{Label: "as of", Value: latest.AsOf},
		report.Fact{Label: "allocation", Value: fmt.Sprintf("#%d", latest.Seq)})
	if latest.SettledAt != "" {
		facts = append(facts, report.Fact{Label: "settled at", Value: latest.SettledAt, Tone: "good"})
	}
	if s := latest.Settle; !s.Settled && s.Reason != "" {
		facts = append(facts, report.Fact{Label: "not settled because", Value: s.Reason})
	}
	return facts
}

func statusTone(s estimator.AllocationStatus) string {
	switch s {
	case estimator.StatusSettled:
		return "good"
	case estimator.StatusCollecting:
		return "warn"
	}
	return ""
}

// historyCharts draws the allocations over time: weights, P(best), and
// observed against eventual conversion rates.
func historyCharts(v View, arms []string, asOf []int64, hoursOf func(int64) float64) []report.Chart {
	// Weights hold from one publication to the next: extend the last step
	// to the stored watermark (or one step further).
	hours := make([]float64, 0, len(asOf)+1)
	for _, t := range asOf {
		hours = append(hours, hoursOf(t))
	}
	end := asOf[len(asOf)-1]
	if v.State != nil && v.State.Watermark > end {
		end = v.State.Watermark
	}
	hours = append(hours, hoursOf(end))
	var share, pbest []report.ArmSeries
	var cvr []report.ArmCVR
	for _, arm := range arms {
		w := make([]float64, 0, len(hours))
		pb := make([]float64, 0, len(asOf))
		c := report.ArmCVR{Arm: arm}
		for i, a := range v.History {
			weight, p := math.NaN(), math.NaN()
			obs, ev, lo, hi := math.NaN(), math.NaN(), math.NaN(), math.NaN()
			if x, ok := a.Weights[arm]; ok {
				weight = x
			}
			if r := a.arm(arm); r != nil {
				obs, ev, lo, hi, p = r.ObservedCVR, r.EventualCVR, r.CVRLow, r.CVRHigh, r.PBest
			}
			w = append(w, weight)
			pb = append(pb, p)
			c.Observed = append(c.Observed, obs)
			c.Eventual = append(c.Eventual, ev)
			c.Low = append(c.Low, lo)
			c.High = append(c.High, hi)
			if v.Truth != nil {
				c.True = append(c.True, v.Truth.CVR(asOf[i])[arm])
			}
		}
		share = append(share, report.ArmSeries{Arm: arm, Y: append(w, w[len(w)-1])})
		pbest = append(pbest, report.ArmSeries{Arm: arm, Y: pb})
		cvr = append(cvr, c)
	}
	traffic := report.TrafficShareChart("traffic", "Traffic weights", hours, share)
	zero := 0.0
	traffic.Note = "The weights each allocation published; a weight holds until the next one."
	rates := report.CVRChart("Conversion rate: observed and eventual", hours[:len(hours)-1], cvr)
	rates.Note = "Observed: conversions so far over clicks, low while clicks are young. Eventual: the model's rate once every click has had its window, with its 95% credible band."
	if v.Truth != nil {
		rates.Note += " True: the simulated rate."
	}
	pb := report.ProbBestChart(hours[:len(hours)-1], pbest)
	charts := []report.Chart{traffic, pb, rates}
	for i := range charts {
		charts[i].X.Min = &zero // hours count from the origin
	}
	return charts
}

// armTable lists each arm as of the latest allocation.
func armTable(v View, latest *Allocation, arms []string) report.Table {
	t := report.Table{ID: "arms", Header: []string{"arm", "weight", "clicks", "conversions", "observed CVR", "eventual CVR (95% interval)", "P(best)", "expected loss", "delay fit", "mean delay"}}
	if v.Truth != nil {
		t.Header = append(t.Header, "true CVR")
	}
	blocking := map[string]bool{}
	if latest == nil {
		t.Caption = "Arms (no allocation published yet)"
	} else {
		t.Caption = "Latest allocation, as of " + latest.AsOf
		for _, a := range latest.Settle.Blocking {
			blocking[a] = true
		}
	}
	for i, arm := range arms {
		row := []string{arm, "–", "–", "–", "–", "–", "–", "–", "–", "–"}
		if latest != nil {
			if r := latest.arm(arm); r != nil {
				name := arm
				switch {
				case r.Paused:
					name += " (paused)"
				case blocking[arm]:
					name += " (blocks settling)"
				}
				row = []string{name, fmt.Sprintf("%.3f", latest.Weights[arm]), fmt.Sprint(r.Clicks), fmt.Sprint(r.Conversions),
					pct(r.ObservedCVR), fmt.Sprintf("%s (%s – %s)", pct(r.EventualCVR), pct(r.CVRLow), pct(r.CVRHigh)),
					fmt.Sprintf("%.3f", r.PBest), pct(r.ExpectedLoss), r.Delay.Family, fmtHours(r.Delay.MeanHours)}
			}
		}
		if v.Truth != nil {
			at := v.Origin
			if latest != nil {
				at = latest.asOfMillis()
			}
			row = append(row, pct(v.Truth.CVR(at)[arm]))
		}
		t.Rows = append(t.Rows, row)
		t.Groups = append(t.Groups, i)
	}
	return t
}

// pct prints a share as a percentage, "–" when unknown.
func pct(x float64) string {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return "–"
	}
	return fmt.Sprintf("%.2f%%", 100*x)
}

// fmtHours prints a duration given in hours, in hours or days.
func fmtHours(h float64) string {
	switch {
	case math.IsNaN(h) || math.IsInf(h, 0):
		return "–"
	case h >= 48:
		return fmt.Sprintf("%.1f d", h/24)
	case h >= 1:
		return fmt.Sprintf("%.1f h", h)
	}
	return fmt.Sprintf("%.0f min", h*60)
}

func fmtMillis(ms int64) string { return time.UnixMilli(ms).UTC().Format(time.RFC3339) }

// DelayCurves are one arm's delay curves on a grid of delays.
type DelayCurves struct {
	// EdgesHours and Empirical are the staircase of the observed delays'
	// histogram: Empirical[i] is the share of observed delays below
	// EdgesHours[i] (empty when nothing converted yet).
	EdgesHours, Empirical []float64
	// GridHours holds the grid; Fitted is the fitted delay CDF G, and
	// AsObserved the CDF the fit predicts for the delays observed so far
	// (young clicks can only show short delays).
	GridHours, Fitted, AsObserved []float64
	// Family names the delay family of the fit.
	Family string
}

// NewDelayCurves computes one arm's delay curves from the fit of the
// given family the service would report for st: the most probable
// family's posterior mode (estimator.ArmPosterior). delayCharts uses it
// only when the allocation's report cannot describe the delay itself.
func NewDelayCurves(st *estimator.ArmState, family estimator.DelayFamily) (DelayCurves, error) {
	data := st.FitData()
	post, err := estimator.ArmPosterior(&data, family, estimator.Prior{}, nil)
	if err != nil {
		return DelayCurves{}, fmt.Errorf("posterior: %w", err)
	}
	fit := post.Fit()
	if fit == nil {
		return DelayCurves{}, fmt.Errorf("posterior of family %v has no fit", family)
	}
	return delayCurves(&data, fit.Family.String(), fit.CDF), nil
}

// delayCurves computes the delay curves of data under the delay CDF g
// (seconds) of the named family.
func delayCurves(data *estimator.FitData, family string, g func(float64) float64) DelayCurves {
	c := DelayCurves{Family: family}
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
		ripe += b.Clicks * g(b.Age)
	}
	for j := 0; j <= delayGridPoints; j++ {
		x := data.Window * float64(j) / delayGridPoints
		gx := g(x)
		obs := data.MaturedClicks * gx
		for _, b := range data.Pending {
			obs += b.Clicks * g(min(x, b.Age))
		}
		c.GridHours = append(c.GridHours, x/3600)
		c.Fitted = append(c.Fitted, gx)
		if ripe > 0 {
			c.AsObserved = append(c.AsObserved, obs/ripe)
		} else {
			c.AsObserved = append(c.AsObserved, math.NaN())
		}
	}
	return c
}

// delayCharts draws the delay histogram of each arm against its fit, and
// the fitted delay CDFs (against the truth when known).
func delayCharts(v View, latest *Allocation, arms []string) ([]report.Chart, error) {
	hoursAxis := report.Axis{Label: "delay after the click", Unit: report.UnitHours}
	cdfAxis := report.Axis{Label: "P(delay ≤ x)", Unit: report.UnitPercent}
	zero, one := 0.0, 1.0
	hoursAxis.Min, cdfAxis.Min, cdfAxis.Max = &zero, &zero, &one
	obs := report.Chart{ID: "delay-cdf", Title: "Observed delays against the fit", X: hoursAxis, Y: cdfAxis,
		Note: "Solid: share of the conversions seen so far with at most this delay. Dashed: what the fitted model predicts for them, given how young the clicks are."}
	model := report.Chart{ID: "delay-model", Title: "Fitted delay distribution", X: hoursAxis, Y: cdfAxis,
		Note: "Delay of the clicks that convert within the attribution window, as fitted."}
	if v.Truth != nil {
		model.Note += " Dotted: the simulated truth."
	}
	var families []string
	for i, arm := range arms {
		st := v.State.States[arm]
		if st == nil {
			continue
		}
		c, err := armDelayCurves(st, latest, arm)
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", arm, err)
		}
		obs.Series = append(obs.Series,
			report.Series{Name: arm, Role: "observed", X: c.EdgesHours, Y: c.Empirical, Group: i, Step: true},
			report.Series{Name: arm, Role: "predicted by the fit", X: c.GridHours, Y: c.AsObserved, Group: i, Style: report.StyleDashed})
		model.Series = append(model.Series, report.Series{Name: arm, Role: "fitted", X: c.GridHours, Y: c.Fitted, Group: i})
		families = append(families, fmt.Sprintf("%s: %s", arm, c.Family))
		if v.Truth != nil && v.Truth.DelayCDF[arm] != nil {
			tr := make([]float64, len(c.GridHours))
			for j, h := range c.GridHours {
				tr[j] = v.Truth.DelayCDF[arm](h * 3600)
			}
			model.Series = append(model.Series, report.Series{Name: arm, Role: "true", X: c.GridHours, Y: tr, Group: i, Style: report.StyleDotted})
		}
	}
	if len(families) > 0 {
		model.Note += " Families: " + strings.Join(families, ", ") + "."
	}
	return []report.Chart{obs, model}, nil
}

// armDelayCurves computes arm's delay curves under the delay the latest
// allocation reports for it, which the service fitted when it computed
// the allocation. Without an allocation, or when the report cannot
// describe the delay (the histogram family), the arm's posterior is
// computed again: with the reported single family, or auto.
func armDelayCurves(st *estimator.ArmState, latest *Allocation, arm string) (DelayCurves, error) {
	data := st.FitData()
	family := estimator.FamilyAuto
	if latest != nil {
		if r := latest.arm(arm); r != nil {
			if g, ok := r.Delay.CDF(data.Window); ok {
				return delayCurves(&data, r.Delay.Family, g), nil
			}
			if len(r.Delay.Families) == 0 {
				if f, err := estimator.ParseDelayFamily(r.Delay.Family); err == nil {
					family = f
				}
			}
		}
	}
	return NewDelayCurves(st, family)
}

// settingsTable lists the settings in force and where each comes from.
func settingsTable(s consumer.ExperimentSettings) report.Table {
	t := report.Table{ID: "settings", Caption: "Configuration in force", Header: []string{"setting", "value", "from"}}
	for _, f := range s.Fields() {
		t.Rows = append(t.Rows, []string{f.Key, f.Value, f.Source})
	}
	if s.Control != "" {
		t.Rows = append(t.Rows, []string{"control message", s.Control, "control topic"})
	}
	return t
}
