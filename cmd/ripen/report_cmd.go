package main

import (
	"errors"
	"fmt"
	"path/filepath"
	"strings"

	"github.com/spf13/cobra"

	"ripen/console"
	"ripen/consumer"
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
the charts the console draws for it: each arm's traffic weight and P(best)
over time, observed vs eventual conversion rate over time with the 95%
credible band, and the delay distribution (the histogram of observed delays
against the fitted model, refitted from the stored states with the delay
family of the latest allocation). DIR/allocations.jsonl and
DIR/allocations.csv hold the allocation history.`,
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
	v := console.View{ID: f.experiment}
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
	if v.History, err = console.ParseAllocations(raw); err != nil {
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
	if err := console.WriteExperimentReport(f.out, v, raw); err != nil {
		return fmt.Errorf("report %q: %w", f.experiment, err)
	}
	fmt.Fprintf(cmd.OutOrStdout(), "wrote %s (%d allocations, %d arms)\n", filepath.Join(f.out, "index.html"), len(v.History), len(console.ArmOrder(v.History, v.State)))
	return nil
}
