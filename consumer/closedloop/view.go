package closedloop

import (
	"bytes"
	"fmt"
	"io"
	"math"
	"os"
	"strings"
	"text/tabwriter"
	"time"

	"ripen/consumer"
	"ripen/estimator"
	"ripen/estimator/sim"
)

// TerminalView prints a run's progress: a redrawn frame on a terminal, one
// line per tick otherwise.
type TerminalView struct {
	w     io.Writer
	tty   bool
	sc    sim.Scenario
	store string
	best  string
	began time.Time
}

// NewTerminalView returns a view of a run of sc on the named store,
// writing to w.
func NewTerminalView(w io.Writer, sc sim.Scenario, store string) *TerminalView {
	v := &TerminalView{w: w, sc: sc, store: store, began: time.Now()}
	if f, ok := w.(*os.File); ok {
		if st, err := f.Stat(); err == nil && st.Mode()&os.ModeCharDevice != 0 {
			v.tty = true
		}
	}
	best := 0
	for i, a := range sc.Arms {
		if a.CVR > sc.Arms[best].CVR {
			best = i
		}
	}
	v.best = sc.Arms[best].Name
	return v
}

// Header prints the run's first lines (on a terminal the frame redraws
// over them).
func (v *TerminalView) Header(lines ...string) {
	fmt.Fprintf(v.w, "ripen demo: %s, %s of simulated traffic, state store %s\n", v.sc.Name, consumer.FormatDuration(v.sc.Horizon.D()), v.store)
	for _, l := range lines {
		fmt.Fprintln(v.w, l)
	}
}

// Update shows one tick.
func (v *TerminalView) Update(t Tick, footer string) {
	if !t.Published {
		return
	}
	a := t.Allocation
	day := float64(t.At-sim.Start) / 8.64e7
	if !v.tty {
		var b strings.Builder
		fmt.Fprintf(&b, "day %5.2f  %-10s", day, a.Status)
		for _, arm := range v.sc.Arms {
			r := armReport(a, arm.Name)
			if r == nil {
				continue
			}
			fmt.Fprintf(&b, "  %s w=%.2f obs=%s ev=%s", arm.Name, r.Weight, pct(r.ObservedCVR), pct(r.EventualCVR))
		}
		fmt.Fprintln(v.w, b.String())
		return
	}
	var b bytes.Buffer
	b.WriteString("\033[H\033[2J")
	fmt.Fprintf(&b, "ripen demo — %s\n%s\n\n", v.sc.Name, v.sc.Description)
	fmt.Fprintf(&b, "simulated day %.1f of %.3g · %d clicks · %d conversions · %s · %.1fs\n",
		day, v.sc.Horizon.Hours()/24, sum(t.Clicks), sum(t.Conversions), v.store, time.Since(v.began).Seconds())
	fmt.Fprintf(&b, "status %s · leader %s · policy %s\n\n", a.Status, a.Leader, a.Policy)
	v.table(&b, a, t.At)
	if footer != "" {
		fmt.Fprintf(&b, "\n%s\n", footer)
	}
	_, _ = v.w.Write(b.Bytes())
}

// table prints one row per arm of allocation a.
func (v *TerminalView) table(w io.Writer, a consumer.Allocation, at int64) {
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "arm\tweight\tclicks\tconv\tobserved\teventual [95%]\ttrue\tP(best)\t")
	q := v.sc.CVRAt(time.Duration(at-sim.Start) * time.Millisecond)
	for i, arm := range v.sc.Arms {
		r := armReport(a, arm.Name)
		if r == nil {
			continue
		}
		bar := strings.Repeat("█", int(math.Round(r.Weight*20)))
		fmt.Fprintf(tw, "%s\t%.3f %s\t%d\t%d\t%s\t%s [%s, %s]\t%s\t%.2f\t\n", arm.Name, r.Weight, bar, r.Clicks, r.Conversions,
			pct(r.ObservedCVR), pct(r.EventualCVR), pct(r.CVRLow), pct(r.CVRHigh), pct(q[i]), r.PBest)
	}
	_ = tw.Flush()
}

// Summary prints the end of a run.
func (v *TerminalView) Summary(res *Result, reportPath string) {
	a := res.History[len(res.History)-1]
	fmt.Fprintf(v.w, "\nripen demo: %s of traffic (%d clicks, %d conversions) in %.1fs; %d allocations published; final status %s, leader %s (best arm: %s)\n\n",
		consumer.FormatDuration(v.sc.Horizon.D()), sum(res.Clicks), sum(res.Conversions), time.Since(v.began).Seconds(), len(res.History), a.Status, a.Leader, v.best)
	at, _ := time.Parse(time.RFC3339Nano, a.AsOf)
	v.table(v.w, a, at.UnixMilli())
	fmt.Fprintf(v.w, "\nreport: %s\n", reportPath)
}

func armReport(a consumer.Allocation, arm string) *estimator.ArmReport {
	for i := range a.Arms {
		if a.Arms[i].Arm == arm {
			return &a.Arms[i]
		}
	}
	return nil
}

func pct(x float64) string {
	if math.IsNaN(x) {
		return "-"
	}
	return fmt.Sprintf("%.2f%%", 100*x)
}

func sum(xs []int) int {
	n := 0
	for _, x := range xs {
		n += x
	}
	return n
}
