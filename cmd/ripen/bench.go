package main

import (
	"fmt"

	"github.com/spf13/cobra"

	"ripen/consumer/pipebench"
)

func newBenchCmd() *cobra.Command {
	var o pipebench.Options
	var format string
	cmd := &cobra.Command{
		Use:   "bench [--events N] [--format table|json]",
		Short: "Measure pipeline throughput against a bare Kafka reader, and Redis CPU and memory per event, pending click and arm",
		Long: `bench starts an in-process Kafka-compatible broker and a redis-server (from
PATH), produces N generated events (clicks of a few experiments and arms, and
their delayed conversions, which carry their attribution), then times,
alternately and in one process, a bare reader that consumes every partition
to the end without decoding, and the full run pipeline (decode, join,
aggregate, Redis flush with offsets) consuming the same topics into a fresh
key prefix in its own consumer group: once with the click index and once
with attribution carried by the conversions (no index), each as an ingest
run (the refit period beyond the events' time span) and a ticked run (the
default refit period, so that hold-back, the group barrier, per-tick loads,
compaction and publication run as in a replay, with the model fit replaced
by a uniform allocation; BenchmarkRefitTick measures the fit). It prints the
rates, their ratios to the bare reader (medians over the rounds), the
redis-server CPU per event, the largest arm hash seen, and the growth of
Redis memory per pending click over 10^6 clicks fed through the click index.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if o.Events < 1 {
				return &exitError{code: 2, err: fmt.Errorf("--events %d must be at least 1", o.Events)}
			}
			if o.IndexClicks < 1 {
				return &exitError{code: 2, err: fmt.Errorf("--index-clicks %d must be at least 1", o.IndexClicks)}
			}
			if format != "table" && format != "json" {
				return &exitError{code: 2, err: fmt.Errorf("--format %q: want table or json", format)}
			}
			res, err := pipebench.Run(cmd.Context(), o)
			if err != nil {
				return err
			}
			return pipebench.Write(cmd.OutOrStdout(), format, res)
		},
	}
	cmd.Flags().IntVar(&o.Events, "events", pipebench.DefaultEvents, "events to generate (clicks and conversions)")
	cmd.Flags().IntVar(&o.IndexClicks, "index-clicks", pipebench.DefaultIndexClicks, "clicks fed through the click index to measure Redis memory per pending click")
	cmd.Flags().StringVar(&format, "format", "table", "output format: table or json")
	return cmd
}
