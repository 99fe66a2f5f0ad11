package main

import (
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"slices"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/segmentio/kafka-go"
	"github.com/spf13/cobra"

	"ripen/consumer"
	"ripen/estimator"
	"ripen/state"
)

// inspectTimeout bounds the broker round trip of --brokers.
const inspectTimeout = 10 * time.Second

// newInspectCmd is `ripen inspect`: a console view of the stored state.
func newInspectCmd() *cobra.Command {
	var sf storeFlags
	var experiment, brokers string
	cmd := &cobra.Command{
		Use:   "inspect [--experiment ID] [--brokers LIST]",
		Short: "Print the experiments, arms, latest allocations and offsets stored in Redis",
		Long: `inspect reads the state under a Redis prefix and prints three tables:
experiments (watermark and latest allocation), arms (clicks and conversions now
stored, the observed conversion rate, and the eventual rate, interval, weight
and status of the latest allocation), and offsets (per experiment the last
offset applied per partition; per partition the resume offset).

With --brokers, the partitions table also shows each partition's end offset
and the lag behind the resume offset (messages not yet flushed to Redis).`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			c, err := sf.open(cmd)
			if err != nil {
				return err
			}
			defer c.Close()
			v, err := collectInspect(cmd.Context(), c.store, experiment)
			if err != nil {
				return err
			}
			if brokers != "" {
				k := c.cfg.Kafka
				k.Brokers = strings.Split(brokers, ",")
				if err := v.addLag(cmd.Context(), k); err != nil {
					return err
				}
			}
			v.write(cmd.OutOrStdout())
			return nil
		},
	}
	sf.bind(cmd)
	cmd.Flags().StringVar(&experiment, "experiment", "", "show only this experiment `id`")
	cmd.Flags().StringVar(&brokers, "brokers", "", "Kafka seed brokers, comma-separated host:port `list`, to show end offsets and lag")
	return cmd
}

// inspectView is what inspect prints.
type inspectView struct {
	experiments []inspectExperiment
	resume      []state.ResumeOffset
	// end and lagErr are set by addLag.
	end    map[state.TopicPartition]int64
	endErr map[state.TopicPartition]string
	lag    bool
}

type inspectExperiment struct {
	snap   *state.ExperimentSnapshot
	report *estimator.ExperimentReport // nil without a readable allocation
	// reportErr says why an allocation could not be read.
	reportErr string
}

func collectInspect(ctx context.Context, st *state.Store, only string) (*inspectView, error) {
	v := &inspectView{}
	ids := []string{only}
	if only == "" {
		var err error
		if ids, err = st.Experiments(ctx); err != nil {
			return nil, err
		}
	}
	for _, id := range ids {
		e, err := st.ExportExperiment(ctx, id)
		if errors.Is(err, state.ErrNotFound) && only == "" {
			continue // registered, nothing written yet
		}
		if err != nil {
			return nil, err
		}
		ie := inspectExperiment{snap: e}
		if len(e.Allocation) > 0 {
			var r estimator.ExperimentReport
			if err := json.Unmarshal(e.Allocation, &r); err != nil {
				ie.reportErr = err.Error()
			} else {
				ie.report = &r
			}
		}
		v.experiments = append(v.experiments, ie)
	}
	res, err := st.ResumeOffsets(ctx)
	if err != nil {
		return nil, err
	}
	v.resume = res
	return v, nil
}

// addLag asks the brokers for the end offset of every partition with a
// resume offset.
func (v *inspectView) addLag(ctx context.Context, k consumer.KafkaConfig) error {
	v.lag = true
	v.end, v.endErr = map[state.TopicPartition]int64{}, map[state.TopicPartition]string{}
	if len(v.resume) == 0 {
		return nil
	}
	tr, err := consumer.KafkaTransport(k)
	if err != nil {
		return &exitError{code: 2, err: err}
	}
	client := &kafka.Client{Addr: kafka.TCP(k.Brokers...), Timeout: inspectTimeout, Transport: tr}
	req := &kafka.ListOffsetsRequest{Topics: map[string][]kafka.OffsetRequest{}}
	for _, r := range v.resume {
		req.Topics[r.Topic] = append(req.Topics[r.Topic], kafka.LastOffsetOf(r.Partition))
	}
	ctx, cancel := context.WithTimeout(ctx, inspectTimeout)
	defer cancel()
	resp, err := client.ListOffsets(ctx, req)
	if err != nil {
		return fmt.Errorf("inspect: list offsets from %s: %w", strings.Join(k.Brokers, ","), err)
	}
	for topic, parts := range resp.Topics {
		for _, p := range parts {
			tp := state.TopicPartition{Topic: topic, Partition: p.Partition}
			if p.Error != nil {
				v.endErr[tp] = p.Error.Error()
				continue
			}
			v.end[tp] = p.LastOffset
		}
	}
	return nil
}

func (v *inspectView) write(w io.Writer) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "EXPERIMENT\tWATERMARK\tARMS\tALLOCATION\tAS OF\tSTATUS\tPOLICY\tLEADER")
	for _, e := range v.experiments {
		wm := "-"
		if e.snap.Layout != nil {
			wm = fmtMillis(e.snap.Watermark)
		}
		alloc, asOf, status, policy, leader := "-", "-", "-", "-", "-"
		if e.snap.AllocationSeq > 0 {
			alloc = "#" + strconv.FormatInt(e.snap.AllocationSeq, 10)
		}
		if e.report != nil {
			asOf, status, policy, leader = orDash(e.report.AsOf), orDash(string(e.report.Status)), orDash(e.report.Policy), orDash(e.report.Leader)
		} else if e.reportErr != "" {
			status = "unreadable allocation"
		}
		fmt.Fprintf(tw, "%s\t%s\t%d\t%s\t%s\t%s\t%s\t%s\n", e.snap.ID, wm, len(e.snap.Arms), alloc, asOf, status, policy, leader)
	}
	_ = tw.Flush()

	fmt.Fprintln(w)
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "EXPERIMENT\tARM\tCLICKS\tCONVERSIONS\tHELD\tOBSERVED CVR\tEVENTUAL CVR\t95% INTERVAL\tP(BEST)\tWEIGHT\tSTATUS\t")
	for _, e := range v.experiments {
		byArm := map[string]estimator.ArmReport{}
		if e.report != nil {
			for _, a := range e.report.Arms {
				byArm[a.Arm] = a
			}
		}
		for _, rec := range e.snap.Arms {
			clicks, convs := armTotals(rec.State)
			var held uint64
			for _, h := range rec.Held {
				held += h.Conversions
			}
			held += rec.HeldMatured
			observed := "-"
			if clicks > 0 {
				observed = fmtPct(float64(convs) / float64(clicks))
			}
			eventual, interval, pbest, weight, status := "-", "-", "-", "-", "not in allocation"
			if e.report == nil {
				status = "no allocation"
			}
			if a, ok := byArm[rec.Arm]; ok {
				eventual = fmtPct(a.EventualCVR)
				interval = "[" + fmtPct(a.CVRLow) + ", " + fmtPct(a.CVRHigh) + "]"
				pbest = strconv.FormatFloat(a.PBest, 'f', 3, 64)
				w, found := e.report.Weights[rec.Arm]
				if !found {
					w = a.Weight
				}
				weight = strconv.FormatFloat(w, 'f', 3, 64)
				status = string(e.report.Status)
				if a.Paused {
					status = "paused"
				}
			}
			fmt.Fprintf(tw, "%s\t%s\t%d\t%d\t%d\t%s\t%s\t%s\t%s\t%s\t%s\t\n",
				e.snap.ID, rec.Arm, clicks, convs, held, observed, eventual, interval, pbest, weight, status)
		}
	}
	_ = tw.Flush()

	fmt.Fprintln(w)
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "EXPERIMENT\tPARTITION\tGENERATION\tAPPLIED OFFSET")
	for _, e := range v.experiments {
		for _, o := range e.snap.Offsets {
			fmt.Fprintf(tw, "%s\t%s/%d\t%d\t%d\n", e.snap.ID, o.Topic, o.Partition, o.Generation, o.Offset)
		}
	}
	_ = tw.Flush()

	fmt.Fprintln(w)
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	if !v.lag {
		fmt.Fprintln(tw, "PARTITION\tRESUME OFFSET")
		for _, r := range v.resume {
			fmt.Fprintf(tw, "%s/%d\t%d\n", r.Topic, r.Partition, r.Offset)
		}
		_ = tw.Flush()
		fmt.Fprintln(w, "(lag not shown: give --brokers)")
		return
	}
	fmt.Fprintln(tw, "PARTITION\tRESUME OFFSET\tEND OFFSET\tLAG")
	res := slices.Clone(v.resume)
	slices.SortFunc(res, func(a, b state.ResumeOffset) int {
		return cmp.Or(cmp.Compare(a.Topic, b.Topic), cmp.Compare(a.Partition, b.Partition))
	})
	for _, r := range res {
		tp := state.TopicPartition{Topic: r.Topic, Partition: r.Partition}
		end, lag := "-", "-"
		if e, ok := v.end[tp]; ok {
			end, lag = strconv.FormatInt(e, 10), strconv.FormatInt(max(e-r.Offset, 0), 10)
		} else if msg, ok := v.endErr[tp]; ok {
			end = "error: " + msg
		}
		fmt.Fprintf(tw, "%s\t%d\t%s\t%s\n", tp, r.Offset, end, lag)
	}
	_ = tw.Flush()
}

// armTotals are an arm's clicks and conversions, pending plus matured.
func armTotals(s estimator.ArmSnapshot) (clicks, conversions uint64) {
	clicks, conversions = s.MaturedClicks, s.MaturedConversions
	for _, b := range s.Buckets {
		clicks += b.Clicks
		conversions += b.Converted
	}
	return clicks, conversions
}

func fmtPct(x float64) string { return strconv.FormatFloat(100*x, 'f', 2, 64) + "%" }

func fmtMillis(ms int64) string { return time.UnixMilli(ms).UTC().Format(time.RFC3339) }

func orDash(s string) string {
	if s == "" {
		return "-"
	}
	return s
}
