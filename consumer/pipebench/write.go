package pipebench

import (
	"encoding/json"
	"fmt"
	"io"
	"text/tabwriter"
)

// Write writes r as indented JSON (format "json") or as a table ("table").
func Write(w io.Writer, format string, r *Result) error {
	switch format {
	case "json":
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		return enc.Encode(r)
	case "table":
	default:
		return fmt.Errorf("bench: format %q: want table or json", format)
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintf(tw, "events\t%d\n", r.Events)
	for i, rd := range r.Rounds {
		fmt.Fprintf(tw, "round %d\tbare %.3fs", i+1, rd.Bare.Seconds)
		for _, run := range []struct {
			name string
			s    RunStats
		}{{"ingest", rd.Ingest}, {"ticked", rd.Ticked}, {"carried ingest", rd.CarriedIngest}, {"carried ticked", rd.CarriedTicked}} {
			fmt.Fprintf(tw, "\t%s %.3fs (ratio %.3f, redis cpu %.2fs)", run.name, run.s.Seconds, run.s.Ratio, run.s.RedisCPUSeconds)
		}
		fmt.Fprintln(tw)
	}
	fmt.Fprintf(tw, "bare reader\t%.0f events/s\n", r.BareEPS)
	for _, m := range []struct {
		name string
		m    Mode
	}{{"click index", r.Mode}, {"carried attribution", r.Carried}} {
		fmt.Fprintf(tw, "%s: pipeline\t%.0f events/s, pipeline/bare %.3f (median of rounds), redis cpu %.2f us/event\n", m.name, m.m.PipelineEPS, m.m.Ratio, m.m.RedisCPUUsPerEvent)
		fmt.Fprintf(tw, "%s: ticked pipeline\t%.0f events/s, ticked pipeline/bare %.3f (default refit period, fit left out), redis cpu %.2f us/event\n", m.name, m.m.TickedEPS, m.m.TickedRatio, m.m.TickedRedisCPUUsPerEvent)
		fmt.Fprintf(tw, "%s: redis bytes per pending click\t%.1f (%s)\n", m.name, m.m.RedisBytesPerPendingClick, r.BytesMethod)
		fmt.Fprintf(tw, "%s: max bytes per arm\t%d (MEMORY USAGE, sampled during and after the runs)\n", m.name, m.m.MaxBytesPerArm)
	}
	fmt.Fprintf(tw, "orphans parked\t%.0f (ticked: %.0f) of %d conversions\n", r.OrphansParked, r.TickedOrphansParked, r.Generated.Conversions)
	fmt.Fprintf(tw, "redis bytes per arm\t%.0f after ingest, %.0f compacted\n", r.RedisBytesPerArm, r.RedisBytesPerArmCompacted)
	fmt.Fprintf(tw, "click index feed\t%d clicks, %.2f us redis cpu per click\n", r.IndexClicks, r.IndexRedisCPUUsPerClick)
	return tw.Flush()
}
