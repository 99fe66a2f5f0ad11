package main

import (
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"maps"
	"math/rand/v2"
	"net"
	"os"
	"os/exec"
	"slices"
	"strconv"
	"strings"
	"sync"
	"text/tabwriter"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/redis/go-redis/v9"
	"github.com/segmentio/kafka-go"
	"github.com/spf13/cobra"
	"go.uber.org/zap"

	"ripen/consumer"
	"ripen/consumer/kafkatest"
	"ripen/estimator"
	"ripen/state"
)

// benchOptions configures one `ripen bench` run.
type benchOptions struct {
	// Events is the number of generated events (clicks and conversions).
	// Default: 200000.
	Events int
	// Format is "table" or "json". Default: table.
	Format string
	// Rounds is how many times the bare reader and the pipeline are run,
	// alternately. Default: 2.
	Rounds int
	// Partitions per topic. Default: 3.
	Partitions int
}

// Defaults of benchOptions.
const (
	defaultBenchEvents     = 200_000
	defaultBenchRounds     = 2
	defaultBenchPartitions = 3
)

// benchResult is what `ripen bench` reports. Rates are medians over the
// rounds; Ratio is the median of the per-round ratios.
type benchResult struct {
	Events      int     `json:"events"`
	PipelineEPS float64 `json:"pipeline_eps"`
	BareEPS     float64 `json:"bare_eps"`
	Ratio       float64 `json:"ratio"`
	// TickedEPS and TickedRatio are the same for the service with its
	// default refit period, so that the event-time ticks (hold-back,
	// group barrier, per-tick loads, compaction and publication) run as
	// in a replay; only the model fit is left out (benchRefit).
	TickedEPS   float64 `json:"ticked_pipeline_eps"`
	TickedRatio float64 `json:"ticked_ratio"`
	// OrphansParked counts the conversions the last ingest and ticked
	// runs parked to wait for their click (ripen_orphans_parked_total).
	OrphansParked       float64 `json:"orphans_parked"`
	TickedOrphansParked float64 `json:"ticked_orphans_parked"`
	// Bytes are MEMORY USAGE (SAMPLES 0) averages over the keys of the
	// last pipeline run: arm hashes as the pipeline left them (not
	// compacted), and click index entries (one per pending click).
	RedisBytesPerArm          float64 `json:"redis_bytes_per_arm"`
	RedisBytesPerPendingClick float64 `json:"redis_bytes_per_pending_click"`
	BytesMethod               string  `json:"bytes_method"`
	// RedisFieldsPerArm is the mean field count of those arm hashes.
	RedisFieldsPerArm float64 `json:"redis_fields_per_arm"`
	// RedisBytesPerArmCompacted and RedisFieldsPerArmCompacted are the
	// same after state.Store.Compact of every arm, as the refit owner
	// leaves them after each refit.
	RedisBytesPerArmCompacted  float64 `json:"redis_bytes_per_arm_compacted"`
	RedisFieldsPerArmCompacted float64 `json:"redis_fields_per_arm_compacted"`
	// Generated and Counted are the clicks and conversions produced and
	// those the last pipeline run holds in Redis; bench fails when they
	// differ.
	Generated benchCounts `json:"generated"`
	Counted   benchCounts `json:"counted"`
	Rounds    []benchRun  `json:"rounds"`
}

// benchCounts counts clicks and conversions.
type benchCounts struct {
	Clicks      uint64 `json:"clicks"`
	Conversions uint64 `json:"conversions"`
}

// benchRun is one round: a bare read and a pipeline run of every event.
type benchRun struct {
	BareSeconds     float64 `json:"bare_seconds"`
	PipelineSeconds float64 `json:"pipeline_seconds"`
	Ratio           float64 `json:"ratio"`
	// RedisCPUSeconds is the redis-server's CPU time (user + system,
	// INFO cpu) during the pipeline run.
	RedisCPUSeconds float64 `json:"redis_cpu_seconds"`
	// Ticked* are the ticked run's (see benchResult.TickedEPS).
	TickedSeconds         float64 `json:"ticked_seconds"`
	TickedRatio           float64 `json:"ticked_ratio"`
	TickedRedisCPUSeconds float64 `json:"ticked_redis_cpu_seconds"`
}

func newBenchCmd() *cobra.Command {
	var o benchOptions
	cmd := &cobra.Command{
		Use:   "bench [--events N] [--format table|json]",
		Short: "Measure pipeline throughput against a bare Kafka reader, and Redis bytes per arm and per pending click",
		Long: `bench starts an in-process Kafka-compatible broker and a redis-server (from
PATH), produces N generated events (clicks of a few experiments and arms, and
their delayed conversions), then times, alternately and in one process, a bare
reader that consumes every partition to the end without decoding, and the
full run pipeline (decode, join, aggregate, Redis flush with offsets) consuming
the same topics into a fresh key prefix in its own consumer group. It prints
both rates, their ratio (median over the rounds), and the Redis memory
(MEMORY USAGE) of an arm hash and of a pending click's index entry.
In that ingest run the refit period is set beyond the events' time span.
Each round also times a ticked run: the service with its default refit
period, so that hold-back, the group barrier, per-tick loads, compaction
and publication run as in a replay, with the model fit replaced by a
uniform allocation (BenchmarkRefitTick measures the fit). Both runs report
the conversions parked to wait for their click and the redis-server CPU
seconds they used.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if o.Events < 1 {
				return &exitError{code: 2, err: fmt.Errorf("--events %d must be at least 1", o.Events)}
			}
			if o.Format != "table" && o.Format != "json" {
				return &exitError{code: 2, err: fmt.Errorf("--format %q: want table or json", o.Format)}
			}
			res, err := runBench(cmd.Context(), o)
			if err != nil {
				return err
			}
			return writeBench(cmd.OutOrStdout(), o.Format, res)
		},
	}
	cmd.Flags().IntVar(&o.Events, "events", defaultBenchEvents, "events to generate (clicks and conversions)")
	cmd.Flags().StringVar(&o.Format, "format", "table", "output format: table or json")
	return cmd
}

func (o benchOptions) withDefaults() benchOptions {
	if o.Events == 0 {
		o.Events = defaultBenchEvents
	}
	if o.Format == "" {
		o.Format = "table"
	}
	if o.Rounds == 0 {
		o.Rounds = defaultBenchRounds
	}
	if o.Partitions == 0 {
		o.Partitions = defaultBenchPartitions
	}
	return o
}

// benchEvents is the generated workload.
type benchEvents struct {
	clicks, convs []kafka.Message
	// experiments and arms of the workload.
	experiments map[string][]string
}

// benchT0 is the event time of the first generated click,
// 2031-06-01T00:00:00Z.
const benchT0 int64 = 1938124800000

// genBenchEvents returns n events: clicks of three invented experiments
// of four arms each, one every 100 ms of event time, about 8% of them
// converting after an exponential delay (mean 6 hours, within the default
// 7-day window). Each topic is in event-time order, as a producer that
// writes events when they happen leaves it: the conversions are sorted by
// their own time, not by their clicks'.
func genBenchEvents(n int) benchEvents {
	r := rand.New(rand.NewPCG(2031, 6))
	ev := benchEvents{experiments: map[string][]string{
		"cafe-menu":    {"espresso", "latte", "mocha", "cortado"},
		"garden-promo": {"tulip", "fern", "ivy", "moss"},
		"bookshop-cta": {"read-now", "browse", "preview", "sample"},
	}}
	ids := slices.Sorted(maps.Keys(ev.experiments))
	meanDelay := 6 * float64(time.Hour.Milliseconds())
	var convs []consumer.Conversion
	for i := 0; len(ev.clicks)+len(convs) < n; i++ {
		exp := ids[i%len(ids)]
		arms := ev.experiments[exp]
		arm := arms[r.IntN(len(arms))]
		ts := benchT0 + int64(i)*100
		id := "k" + strconv.Itoa(i)
		ev.clicks = append(ev.clicks, benchMessage(id, consumer.Click{ClickID: id, Experiment: exp, Arm: arm, TS: ts}))
		if len(ev.clicks)+len(convs) < n && r.Float64() < 0.08 {
			d := int64(r.ExpFloat64() * meanDelay)
			convs = append(convs, consumer.Conversion{ClickID: id, TS: ts + d})
		}
	}
	slices.SortStableFunc(convs, func(a, b consumer.Conversion) int { return cmp.Compare(a.TS, b.TS) })
	for _, c := range convs {
		ev.convs = append(ev.convs, benchMessage(c.ClickID, c))
	}
	return ev
}

func benchMessage(key string, v any) kafka.Message {
	b, err := json.Marshal(v)
	if err != nil {
		panic(err) // Click and Conversion always encode
	}
	return kafka.Message{Key: []byte(key), Value: b}
}

// runBench sets up the broker and Redis, produces the workload and runs
// the rounds.
func runBench(ctx context.Context, o benchOptions) (*benchResult, error) {
	o = o.withDefaults()
	rs, err := startBenchRedis(ctx)
	if err != nil {
		return nil, err
	}
	defer rs.stop()
	cluster, err := kafkatest.New(kafkatest.Options{Partitions: o.Partitions})
	if err != nil {
		return nil, fmt.Errorf("bench: %w", err)
	}
	defer cluster.Close()
	brokers := cluster.ListenAddrs()

	ev := genBenchEvents(o.Events)
	var base consumer.Config
	base.Kafka.Brokers = brokers
	base = base.WithDefaults()
	if err := benchProduce(ctx, brokers, base.Kafka.ClickTopic, ev.clicks); err != nil {
		return nil, err
	}
	if err := benchProduce(ctx, brokers, base.Kafka.ConversionTopic, ev.convs); err != nil {
		return nil, err
	}
	ends, err := benchEnds(ctx, brokers, []string{base.Kafka.ClickTopic, base.Kafka.ConversionTopic})
	if err != nil {
		return nil, err
	}

	rdb := redis.NewClient(&redis.Options{Addr: rs.addr})
	defer rdb.Close()
	res := &benchResult{Events: o.Events, BytesMethod: "MEMORY USAGE SAMPLES 0"}
	var bare, pipe, ratios, ticked, tickedRatios []float64
	var lastPrefix string
	for round := range o.Rounds {
		b, err := benchBare(ctx, brokers, ends)
		if err != nil {
			return nil, err
		}
		lastPrefix = fmt.Sprintf("bench%d", round)
		// Ingest: no refit tick within the events' span.
		ingest := base
		ingest.Pipeline.RefitEvery = 365 * 24 * time.Hour
		ingest.Pipeline.PublishEvery = ingest.Pipeline.RefitEvery
		p, err := benchPipeline(ctx, ingest, rdb, lastPrefix, fmt.Sprintf("bench-%d", round), ends)
		if err != nil {
			return nil, err
		}
		t, err := benchPipeline(ctx, base, rdb, lastPrefix+"t", fmt.Sprintf("bench-%d-ticked", round), ends)
		if err != nil {
			return nil, err
		}
		res.Rounds = append(res.Rounds, benchRun{
			BareSeconds: b.Seconds(), PipelineSeconds: p.took.Seconds(), Ratio: b.Seconds() / p.took.Seconds(), RedisCPUSeconds: p.redisCPU,
			TickedSeconds: t.took.Seconds(), TickedRatio: b.Seconds() / t.took.Seconds(), TickedRedisCPUSeconds: t.redisCPU,
		})
		bare = append(bare, float64(o.Events)/b.Seconds())
		pipe = append(pipe, float64(o.Events)/p.took.Seconds())
		ratios = append(ratios, b.Seconds()/p.took.Seconds())
		ticked = append(ticked, float64(o.Events)/t.took.Seconds())
		tickedRatios = append(tickedRatios, b.Seconds()/t.took.Seconds())
		res.OrphansParked, res.TickedOrphansParked = p.orphansParked, t.orphansParked
	}
	res.BareEPS, res.PipelineEPS, res.Ratio = median(bare), median(pipe), median(ratios)
	res.TickedEPS, res.TickedRatio = median(ticked), median(tickedRatios)

	st, err := state.New(rdb, state.Options{Prefix: lastPrefix})
	if err != nil {
		return nil, err
	}
	res.Generated = benchCounts{Clicks: uint64(len(ev.clicks)), Conversions: uint64(len(ev.convs))}
	if res.Counted, err = benchTotals(ctx, st, ev); err != nil {
		return nil, err
	}
	if res.Counted != res.Generated {
		return nil, fmt.Errorf("bench: pipeline counted %d clicks and %d conversions, generated %d and %d",
			res.Counted.Clicks, res.Counted.Conversions, res.Generated.Clicks, res.Generated.Conversions)
	}
	tst, err := state.New(rdb, state.Options{Prefix: lastPrefix + "t"})
	if err != nil {
		return nil, err
	}
	if tc, err := benchTotals(ctx, tst, ev); err != nil {
		return nil, err
	} else if tc != res.Generated {
		return nil, fmt.Errorf("bench: ticked pipeline counted %d clicks and %d conversions, generated %d and %d",
			tc.Clicks, tc.Conversions, res.Generated.Clicks, res.Generated.Conversions)
	}
	if res.RedisBytesPerArm, err = meanMemoryUsage(ctx, rdb, lastPrefix+":{x:*}:a:*", 0); err != nil {
		return nil, err
	}
	if res.RedisFieldsPerArm, err = meanHashLen(ctx, rdb, lastPrefix+":{x:*}:a:*"); err != nil {
		return nil, err
	}
	if res.RedisBytesPerPendingClick, err = meanMemoryUsage(ctx, rdb, lastPrefix+":{k:*}:c", 2000); err != nil {
		return nil, err
	}
	// What the refit owner's compaction after each refit leaves (the
	// bench runs no refit, so it is done here, once).
	for id, arms := range ev.experiments {
		for _, arm := range arms {
			if _, err := st.Compact(ctx, id, arm); err != nil {
				return nil, fmt.Errorf("bench: compact %s/%s: %w", id, arm, err)
			}
		}
	}
	if res.RedisBytesPerArmCompacted, err = meanMemoryUsage(ctx, rdb, lastPrefix+":{x:*}:a:*", 0); err != nil {
		return nil, err
	}
	if res.RedisFieldsPerArmCompacted, err = meanHashLen(ctx, rdb, lastPrefix+":{x:*}:a:*"); err != nil {
		return nil, err
	}
	return res, nil
}

// benchTotals adds up the clicks and conversions stored for the
// workload's experiments.
func benchTotals(ctx context.Context, st *state.Store, ev benchEvents) (benchCounts, error) {
	var c benchCounts
	for id := range ev.experiments {
		ex, err := st.Load(ctx, id)
		if err != nil {
			return c, fmt.Errorf("bench: load %q: %w", id, err)
		}
		for _, s := range ex.States {
			c.Clicks += s.Clicks()
			c.Conversions += s.Conversions()
		}
	}
	return c, nil
}

func median(xs []float64) float64 {
	s := slices.Clone(xs)
	slices.Sort(s)
	n := len(s)
	if n == 0 {
		return 0
	}
	if n%2 == 1 {
		return s[n/2]
	}
	return (s[n/2-1] + s[n/2]) / 2
}

func benchProduce(ctx context.Context, brokers []string, topic string, msgs []kafka.Message) error {
	w := &kafka.Writer{Addr: kafka.TCP(brokers...), Topic: topic, Balancer: &kafka.Hash{}, RequiredAcks: kafka.RequireAll, BatchTimeout: 5 * time.Millisecond, BatchSize: 1000}
	defer w.Close()
	for i := 0; i < len(msgs); i += 1000 {
		if err := w.WriteMessages(ctx, msgs[i:min(i+1000, len(msgs))]...); err != nil {
			return fmt.Errorf("bench: produce to %s: %w", topic, err)
		}
	}
	return nil
}

// benchEnds returns the end offset of every partition of topics.
func benchEnds(ctx context.Context, brokers []string, topics []string) (map[state.TopicPartition]int64, error) {
	out := map[state.TopicPartition]int64{}
	for _, topic := range topics {
		parts, err := kafka.LookupPartitions(ctx, "tcp", brokers[0], topic)
		if err != nil {
			return nil, fmt.Errorf("bench: partitions of %s: %w", topic, err)
		}
		for _, p := range parts {
			conn, err := kafka.DialLeader(ctx, "tcp", brokers[0], topic, p.ID)
			if err != nil {
				return nil, fmt.Errorf("bench: dial %s/%d: %w", topic, p.ID, err)
			}
			end, err := conn.ReadLastOffset()
			conn.Close()
			if err != nil {
				return nil, fmt.Errorf("bench: end of %s/%d: %w", topic, p.ID, err)
			}
			out[state.TopicPartition{Topic: topic, Partition: p.ID}] = end
		}
	}
	return out, nil
}

// benchBare reads every partition to its end with one reader each, as the
// pipeline does, decoding nothing, and returns the wall time.
func benchBare(ctx context.Context, brokers []string, ends map[state.TopicPartition]int64) (time.Duration, error) {
	start := time.Now()
	var wg sync.WaitGroup
	errs := make(chan error, len(ends))
	for tp, end := range ends {
		if end == 0 {
			continue
		}
		wg.Add(1)
		go func() {
			defer wg.Done()
			r := kafka.NewReader(kafka.ReaderConfig{Brokers: brokers, Topic: tp.Topic, Partition: tp.Partition, MinBytes: 1, MaxBytes: 10 << 20, MaxWait: 200 * time.Millisecond})
			defer r.Close()
			for {
				m, err := r.FetchMessage(ctx)
				if err != nil {
					errs <- fmt.Errorf("bench: bare read %s: %w", tp, err)
					return
				}
				if m.Offset+1 >= end {
					return
				}
			}
		}()
	}
	wg.Wait()
	close(errs)
	if err := <-errs; err != nil {
		return 0, err
	}
	return time.Since(start), nil
}

// pipelineRun is one timed run of the service.
type pipelineRun struct {
	took          time.Duration
	redisCPU      float64 // seconds
	orphansParked float64
}

// benchPipeline runs the service configured by base in a fresh group and
// key prefix until its resume offsets reach every end, and returns the
// wall time from the moment it was ready (in the group, Redis answering)
// to then; the group join is left out, as the bare reader has none. The
// model fit is replaced by benchRefit.
func benchPipeline(ctx context.Context, base consumer.Config, rdb *redis.Client, prefix, group string, ends map[state.TopicPartition]int64) (pipelineRun, error) {
	var run pipelineRun
	st, err := state.New(rdb, state.Options{Prefix: prefix})
	if err != nil {
		return run, fmt.Errorf("bench: %w", err)
	}
	cfg := base
	cfg.Kafka.Group = group
	cfg.Redis.Prefix = prefix
	// The logs end: let their partitions count as idle soon, so that the
	// watermark reaches the last events without a minute's wait.
	cfg.Pipeline.IdleTimeout = 200 * time.Millisecond
	metrics := consumer.NewMetrics(prometheus.NewRegistry())
	svc, err := consumer.New(cfg, consumer.Deps{Store: st, Logger: zap.NewNop(), Metrics: metrics, Refit: benchRefit})
	if err != nil {
		return run, fmt.Errorf("bench: %w", err)
	}
	runCtx, cancel := context.WithCancel(ctx)
	done := make(chan error, 1)
	go func() { done <- svc.Run(runCtx) }()
	stop := func() error {
		cancel()
		return <-done
	}
	deadline := time.Now().Add(10 * time.Minute)
	var ready time.Time
	var cpu0 float64
	for {
		select {
		case err := <-done:
			return run, fmt.Errorf("bench: pipeline stopped early: %v", err)
		default:
		}
		if ready.IsZero() && svc.Ready(ctx) == nil {
			if cpu0, err = redisCPU(ctx, rdb); err != nil {
				_ = stop()
				return run, err
			}
			ready = time.Now()
		}
		if !ready.IsZero() {
			caught := true
			for tp, end := range ends {
				off, err := st.Resume(ctx, tp.Topic, tp.Partition)
				if end > 0 && (err != nil || off < end) {
					caught = false
					break
				}
			}
			if caught {
				run.took = time.Since(ready)
				cpu1, err := redisCPU(ctx, rdb)
				if err != nil {
					_ = stop()
					return run, err
				}
				run.redisCPU = cpu1 - cpu0
				if err := stop(); err != nil {
					return run, fmt.Errorf("bench: pipeline: %w", err)
				}
				run.orphansParked = counterValue(metrics.OrphansParked)
				return run, nil
			}
		}
		if time.Now().After(deadline) || ctx.Err() != nil {
			_ = stop()
			return run, errors.New("bench: pipeline did not consume every event within 10 minutes")
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// redisCPU returns the CPU seconds (user + system) the redis-server used
// so far, from INFO cpu.
func redisCPU(ctx context.Context, rdb *redis.Client) (float64, error) {
	info, err := rdb.Info(ctx, "cpu").Result()
	if err != nil {
		return 0, fmt.Errorf("bench: INFO cpu: %w", err)
	}
	var sum float64
	var found int
	for line := range strings.Lines(info) {
		k, v, ok := strings.Cut(strings.TrimSpace(line), ":")
		if ok && (k == "used_cpu_user" || k == "used_cpu_sys") {
			f, err := strconv.ParseFloat(v, 64)
			if err != nil {
				return 0, fmt.Errorf("bench: INFO cpu %s: %w", k, err)
			}
			sum += f
			found++
		}
	}
	if found != 2 {
		return 0, errors.New("bench: INFO cpu lacks used_cpu_user or used_cpu_sys")
	}
	return sum, nil
}

// meanMemoryUsage averages MEMORY USAGE over the keys matching pattern
// (at most limit keys; 0: all).
func meanMemoryUsage(ctx context.Context, rdb *redis.Client, pattern string, limit int) (float64, error) {
	return meanOverKeys(ctx, rdb, pattern, limit, "MEMORY USAGE", func(key string) (int64, error) {
		return rdb.MemoryUsage(ctx, key, 0).Result() // SAMPLES 0: every field
	})
}

// meanHashLen averages HLEN over the hashes matching pattern.
func meanHashLen(ctx context.Context, rdb *redis.Client, pattern string) (float64, error) {
	return meanOverKeys(ctx, rdb, pattern, 0, "HLEN", func(key string) (int64, error) {
		return rdb.HLen(ctx, key).Result()
	})
}

// meanOverKeys averages measure over the keys matching pattern (at most
// limit keys; 0: all); what names the measure in errors.
func meanOverKeys(ctx context.Context, rdb *redis.Client, pattern string, limit int, what string, measure func(key string) (int64, error)) (float64, error) {
	var sum, n int64
	iter := rdb.Scan(ctx, 0, pattern, 1000).Iterator()
	for iter.Next(ctx) && (limit == 0 || n < int64(limit)) {
		v, err := measure(iter.Val())
		if err != nil {
			return 0, fmt.Errorf("bench: %s %s: %w", what, iter.Val(), err)
		}
		sum += v
		n++
	}
	if err := iter.Err(); err != nil {
		return 0, fmt.Errorf("bench: scan %s: %w", pattern, err)
	}
	if n == 0 {
		return 0, fmt.Errorf("bench: no key matches %s", pattern)
	}
	return float64(sum) / float64(n), nil
}

func writeBench(w io.Writer, format string, r *benchResult) error {
	if format == "json" {
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		return enc.Encode(r)
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintf(tw, "events\t%d\n", r.Events)
	for i, run := range r.Rounds {
		fmt.Fprintf(tw, "round %d\tbare %.3fs\tpipeline %.3fs\tratio %.3f\tredis cpu %.2fs\tticked %.3fs\tratio %.3f\tredis cpu %.2fs\n", i+1, run.BareSeconds, run.PipelineSeconds, run.Ratio, run.RedisCPUSeconds, run.TickedSeconds, run.TickedRatio, run.TickedRedisCPUSeconds)
	}
	fmt.Fprintf(tw, "bare reader\t%.0f events/s\n", r.BareEPS)
	fmt.Fprintf(tw, "pipeline\t%.0f events/s\n", r.PipelineEPS)
	fmt.Fprintf(tw, "pipeline/bare\t%.3f (median of rounds)\n", r.Ratio)
	fmt.Fprintf(tw, "ticked pipeline\t%.0f events/s\n", r.TickedEPS)
	fmt.Fprintf(tw, "ticked pipeline/bare\t%.3f (median of rounds; default refit period, fit left out)\n", r.TickedRatio)
	fmt.Fprintf(tw, "orphans parked\t%.0f (ticked: %.0f) of %d conversions\n", r.OrphansParked, r.TickedOrphansParked, r.Generated.Conversions)
	fmt.Fprintf(tw, "redis bytes per arm\t%.0f (%s; %.0f hash fields, not compacted)\n", r.RedisBytesPerArm, r.BytesMethod, r.RedisFieldsPerArm)
	fmt.Fprintf(tw, "redis bytes per arm, compacted\t%.0f (%.0f hash fields, as after a refit)\n", r.RedisBytesPerArmCompacted, r.RedisFieldsPerArmCompacted)
	fmt.Fprintf(tw, "redis bytes per pending click\t%.0f (%s)\n", r.RedisBytesPerPendingClick, r.BytesMethod)
	return tw.Flush()
}

// benchRedis is a redis-server started for one bench run.
type benchRedis struct {
	cmd  *exec.Cmd
	dir  string
	addr string
	done chan struct{}
}

// startBenchRedis starts redis-server from PATH on a free loopback port,
// without persistence, in a temporary directory.
func startBenchRedis(ctx context.Context) (*benchRedis, error) {
	bin, err := exec.LookPath("redis-server")
	if err != nil {
		return nil, fmt.Errorf("bench needs redis-server on PATH (for example apt-get install redis-server): %w", err)
	}
	dir, err := os.MkdirTemp("", "ripen-bench-")
	if err != nil {
		return nil, fmt.Errorf("bench: %w", err)
	}
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		os.RemoveAll(dir)
		return nil, fmt.Errorf("bench: free port: %w", err)
	}
	port := l.Addr().(*net.TCPAddr).Port
	l.Close()
	rs := &benchRedis{dir: dir, addr: net.JoinHostPort("127.0.0.1", strconv.Itoa(port)), done: make(chan struct{})}
	rs.cmd = exec.Command(bin, "--port", strconv.Itoa(port), "--bind", "127.0.0.1", "--save", "", "--appendonly", "no", "--dir", dir, "--daemonize", "no")
	var out strings.Builder
	rs.cmd.Stdout, rs.cmd.Stderr = &out, &out
	if err := rs.cmd.Start(); err != nil {
		os.RemoveAll(dir)
		return nil, fmt.Errorf("bench: start redis-server: %w", err)
	}
	go func() {
		_ = rs.cmd.Wait()
		close(rs.done)
	}()
	c := redis.NewClient(&redis.Options{Addr: rs.addr})
	defer c.Close()
	deadline := time.Now().Add(10 * time.Second)
	for c.Ping(ctx).Err() != nil {
		select {
		case <-rs.done:
			os.RemoveAll(dir)
			return nil, fmt.Errorf("bench: redis-server exited: %s", out.String())
		default:
		}
		if time.Now().After(deadline) {
			rs.stop()
			return nil, errors.New("bench: redis-server did not answer PING within 10s")
		}
		time.Sleep(20 * time.Millisecond)
	}
	return rs, nil
}

func (rs *benchRedis) stop() {
	_ = rs.cmd.Process.Kill()
	<-rs.done
	os.RemoveAll(rs.dir)
}

// benchRefit stands in for the estimator in bench runs: the tick
// machinery, loads, compaction and publication run as in production, but
// the fit is left out (its cost is measured by BenchmarkRefitTick).
func benchRefit(in estimator.ExperimentInput) (estimator.ExperimentReport, error) {
	rep := estimator.ExperimentReport{Experiment: in.Experiment, AsOf: time.UnixMilli(in.AsOf).UTC().Format(time.RFC3339Nano), Status: estimator.StatusCollecting, Policy: "uniform", Weights: map[string]float64{}}
	for _, a := range in.Arms {
		rep.Weights[a.Arm] = 1 / float64(len(in.Arms))
	}
	return rep, nil
}
