package main

import (
	"fmt"
	"io"
	"os"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"
	"github.com/spf13/pflag"

	"ripen/consumer"
	"ripen/state"
)

// parseReplayFrom parses --from: "earliest" (the zero time) or an RFC 3339
// time.
func parseReplayFrom(s string) (time.Time, error) {
	if strings.EqualFold(strings.TrimSpace(s), "earliest") {
		return time.Time{}, nil
	}
	t, err := time.Parse(time.RFC3339Nano, strings.TrimSpace(s))
	if err != nil {
		return time.Time{}, fmt.Errorf("--from %q: want earliest or an RFC 3339 time such as 2031-05-04T00:00:00Z", s)
	}
	return t, nil
}

func newReplayCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "replay --from earliest|TIME [--prefix NEW] [--dry-run]",
		Short: "Rebuild state from the topics into a fresh prefix, then switch the live prefix to it",
		Long: `replay consumes the click and conversion topics again, in a consumer group of
its own, into a fresh Redis key prefix (default <root>.r<unix seconds>, where
the root is redis.prefix), with the allocation and dead-letter topics
disabled: allocations and their history are computed and stored under the new
prefix only. It starts each partition at its earliest offset, or with --from
TIME at the first offset at or after TIME, records the log end offsets and
stops by itself once every partition is applied through them. Progress goes
to standard error.

It then checks that every experiment loads and every partition reached its
end, prints how the new state differs from the live prefix's (expected after
a model or configuration change), raises each experiment's allocation seq in
the new prefix above the live one's and points <root>:live at the new prefix
in one command. Running 'ripen run' instances follow the pointer within a few
seconds: they finish their flush, leave the group and resume on the new
prefix from its resume offsets.

--switch-to PREFIX skips the replay and only verifies PREFIX and switches to
it (how to switch back). --dry-run prints the plan and changes nothing.`,
		Args: cobra.NoArgs,
	}
	// The configuration flags of `ripen run`, except --prefix, which names
	// the new prefix here (--root overrides redis.prefix).
	bound := pflag.NewFlagSet("config", pflag.ContinueOnError)
	flags := consumer.BindFlags(bound)
	bound.VisitAll(func(f *pflag.Flag) {
		if f.Name != "prefix" {
			cmd.Flags().AddFlag(f)
		}
	})
	fl := cmd.Flags()
	from := fl.String("from", "", "where to start: earliest, or an RFC 3339 `time` (each partition's first offset at or after it)")
	prefix := fl.String("prefix", "", "the fresh Redis key `prefix` to rebuild into (default <root>.r<unix seconds>)")
	root := fl.String("root", "", "the deployment's root key `prefix`, holder of the live pointer (redis.prefix)")
	group := fl.String("replay-group", "", "the replay's consumer group `id` (default <group>.replay.<prefix>)")
	dryRun := fl.Bool("dry-run", false, "print what would be done and change nothing")
	noSwitch := fl.Bool("no-switch", false, "verify the replay but leave the live pointer as it is")
	switchTo := fl.String("switch-to", "", "skip the replay: verify `PREFIX` and make it the live prefix")
	every := fl.Duration("progress-every", consumer.DefaultReplayProgressEvery, "at most one progress line per `interval`")
	cmd.RunE = func(cmd *cobra.Command, _ []string) error {
		cfg, err := consumer.LoadConfig("", os.LookupEnv, flags)
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		if *root != "" {
			cfg.Redis.Prefix = *root
		}
		if (*from == "") == (*switchTo == "") {
			return &exitError{code: 2, err: fmt.Errorf("give either --from earliest|TIME or --switch-to PREFIX")}
		}
		rdb, err := consumer.NewRedisClient(cfg.Redis)
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		defer rdb.Close()
		store, err := state.New(rdb, state.Options{Prefix: cfg.Redis.Prefix})
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		out, errOut := cmd.OutOrStdout(), cmd.ErrOrStderr()
		ctx := cmd.Context()
		if *switchTo != "" {
			if *dryRun {
				live, err := store.LivePrefix(ctx)
				if err != nil {
					return err
				}
				fmt.Fprintf(out, "would switch the live prefix of root %q from %q to %q (key %s)\n", cfg.Redis.Prefix, live, *switchTo, state.LiveKey(cfg.Redis.Prefix))
				return nil
			}
			sw, err := consumer.SwitchLive(ctx, store, cfg.Kafka.Group, *switchTo)
			if err != nil {
				return err
			}
			writeSwitch(out, cfg.Redis.Prefix, sw)
			return nil
		}
		at, err := parseReplayFrom(*from)
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		log, err := consumer.NewLogger(cfg.Log)
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		defer func() { _ = log.Sync() }()
		rep, err := consumer.Replay(ctx, cfg, consumer.Deps{Store: store, Logger: log}, consumer.ReplayOptions{
			From: at, Prefix: *prefix, Group: *group, DryRun: *dryRun, NoSwitch: *noSwitch,
			Progress: errOut, ProgressEvery: *every,
		})
		if rep != nil {
			writePlan(out, rep.Plan, *dryRun)
		}
		if err != nil {
			return err
		}
		if *dryRun {
			return nil
		}
		writeDiff(out, rep)
		if rep.Switch == nil {
			fmt.Fprintf(out, "live prefix left at %q; to switch: ripen replay --switch-to %s\n", rep.Plan.Live, rep.Plan.NewPrefix)
			return nil
		}
		writeSwitch(out, cfg.Redis.Prefix, rep.Switch)
		return nil
	}
	return cmd
}

// writePlan prints a replay plan.
func writePlan(w io.Writer, p consumer.ReplayPlan, dry bool) {
	if dry {
		fmt.Fprintln(w, "dry run: nothing is changed")
	}
	start := "earliest"
	if !p.From.IsZero() {
		start = p.From.UTC().Format(time.RFC3339Nano)
	}
	fmt.Fprintf(w, "source: group %s, live prefix %s (root %s)\n", p.SourceGroup, p.Live, p.Root)
	fmt.Fprintf(w, "replay: group %s into prefix %s from %s; allocation and dead-letter topics disabled\n", p.Group, p.NewPrefix, start)
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "TOPIC\tPARTITION\tSTART\tEND\tMESSAGES")
	for _, rp := range p.Partitions {
		fmt.Fprintf(tw, "%s\t%d\t%d\t%d\t%d\n", rp.Topic, rp.Partition, rp.Start, rp.End, rp.End-rp.Start)
	}
	_ = tw.Flush()
	if dry {
		fmt.Fprintf(w, "then: verify, raise allocation seqs and switch with the equivalent of\n  ripen replay --switch-to %s   (SET %s %s)\n",
			p.NewPrefix, state.LiveKey(p.Root), p.NewPrefix)
	}
}

// writeDiff prints a summary of how the replayed state differs from the
// live one.
func writeDiff(w io.Writer, rep *consumer.ReplayReport) {
	fmt.Fprintf(w, "verified: %d experiments load; every partition applied through its end offset\n", rep.Experiments)
	if len(rep.Diff) == 0 {
		fmt.Fprintf(w, "no difference from %s (offsets aside)\n", rep.Plan.Live)
		return
	}
	counts := map[state.DiffKind]int{}
	for _, d := range rep.Diff {
		counts[d.Kind]++
	}
	fmt.Fprintf(w, "differences from %s (informational; offsets aside): %d changed, %d only in %s, %d only in %s\n",
		rep.Plan.Live, counts[state.DiffChanged], counts[state.DiffOnlyInA], rep.Plan.Live, counts[state.DiffOnlyInB], rep.Plan.NewPrefix)
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "EXPERIMENT\tARM\tKIND\tCLICKS (LIVE/NEW)\tCONVERSIONS (LIVE/NEW)\tFIELDS")
	for _, d := range rep.Diff {
		fmt.Fprintf(tw, "%s\t%s\t%s\t%d/%d\t%d/%d\t%s\n", d.Experiment, d.Arm, d.Kind, d.A.Clicks, d.B.Clicks, d.A.Conversions, d.B.Conversions, strings.Join(d.Fields, ","))
	}
	_ = tw.Flush()
}

// writeSwitch prints a switch and how to undo it.
func writeSwitch(w io.Writer, root string, sw *consumer.SwitchReport) {
	if sw.From == sw.To {
		fmt.Fprintf(w, "%s is the live prefix already; nothing changed\n", sw.To)
		return
	}
	fmt.Fprintf(w, "switched: %s now names %s (was %s); allocation seqs raised for %d experiments\n", state.LiveKey(root), sw.To, sw.From, len(sw.Seqs))
	fmt.Fprintf(w, "to switch back: ripen replay --switch-to %s\n", sw.From)
}
