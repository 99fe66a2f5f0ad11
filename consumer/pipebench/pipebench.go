// Package pipebench is the benchmark harness behind `ripen bench`: it
// starts an in-process Kafka-compatible broker and a redis-server, produces
// a generated workload, and times, side by side in one process, a bare
// kafka-go reader and the run pipeline (consumer.Service) over the same
// topics, in both attribution modes (clicks indexed in Redis, or
// attribution carried by the conversions), with and without refit ticks.
// It also feeds a million clicks through the click index to measure the
// Redis memory a pending click costs.
//
// It lives beside consumer (like consumer/kafkatest) rather than in the
// command, which only wires flags: it drives the consumer, state and
// kafkatest packages together and is tested on its own.
package pipebench

import (
	"context"
	"fmt"
	"slices"
	"time"

	"github.com/redis/go-redis/v9"

	"ripen/consumer"
	"ripen/consumer/kafkatest"
	"ripen/state"
)

// Options configure a benchmark run.
type Options struct {
	// Events is the number of generated events (clicks and conversions).
	// Default: 200000.
	Events int
	// Rounds is how many times each run is timed, alternately. Default: 2.
	Rounds int
	// Partitions per topic. Default: 3.
	Partitions int
	// IndexClicks is the number of clicks fed through the click index to
	// measure the memory of a pending click (at least 10^6 for a steady
	// state). Default: 1000000.
	IndexClicks int
}

// Defaults of Options.
const (
	DefaultEvents      = 200_000
	DefaultRounds      = 2
	DefaultPartitions  = 3
	DefaultIndexClicks = 1_000_000
)

// WithDefaults returns o with every zero field set to its default.
func (o Options) WithDefaults() Options {
	if o.Events == 0 {
		o.Events = DefaultEvents
	}
	if o.Rounds == 0 {
		o.Rounds = DefaultRounds
	}
	if o.Partitions == 0 {
		o.Partitions = DefaultPartitions
	}
	if o.IndexClicks == 0 {
		o.IndexClicks = DefaultIndexClicks
	}
	return o
}

// Validate reports what is wrong with o, after defaults are applied.
func (o Options) Validate() error {
	o = o.WithDefaults()
	switch {
	case o.Events < 1:
		return fmt.Errorf("events %d must be at least 1", o.Events)
	case o.Rounds < 1:
		return fmt.Errorf("rounds %d must be at least 1", o.Rounds)
	case o.Partitions < 1:
		return fmt.Errorf("partitions %d must be at least 1", o.Partitions)
	case o.IndexClicks < 1:
		return fmt.Errorf("index clicks %d must be at least 1", o.IndexClicks)
	}
	return nil
}

// Result is what a benchmark run reports. Rates are medians over the
// rounds; ratios are medians of the per-round ratios (a run's time against
// the same round's bare read).
type Result struct {
	Events  int     `json:"events"`
	BareEPS float64 `json:"bare_eps"`
	Mode
	// Carried is the same for the deployment whose conversions carry
	// their attribution (no click index).
	Carried Mode `json:"carried"`
	// OrphansParked counts the conversions the last ingest and ticked runs
	// (click index) parked to wait for their click.
	OrphansParked       float64 `json:"orphans_parked"`
	TickedOrphansParked float64 `json:"ticked_orphans_parked"`
	// RedisBytesPerArm is the mean MEMORY USAGE of the arm hashes the last
	// ingest run left, and RedisBytesPerArmCompacted the same after a
	// compaction of every arm (what each refit leaves).
	RedisBytesPerArm          float64 `json:"redis_bytes_per_arm"`
	RedisBytesPerArmCompacted float64 `json:"redis_bytes_per_arm_compacted"`
	// IndexClicks is the number of clicks fed through the click index for
	// RedisBytesPerPendingClick, and IndexRedisCPUUsPerClick the Redis CPU
	// that feed took per click.
	IndexClicks             int     `json:"index_clicks"`
	IndexRedisCPUUsPerClick float64 `json:"index_redis_cpu_us_per_click"`
	BytesMethod             string  `json:"bytes_method"`
	// Generated and Counted are the clicks and conversions produced and
	// those each last pipeline run holds in Redis; Run fails when they
	// differ.
	Generated Counts  `json:"generated"`
	Counted   Counts  `json:"counted"`
	Rounds    []Round `json:"rounds"`
}

// Mode is what one attribution mode measured.
type Mode struct {
	// PipelineEPS and Ratio are the ingest run's: the refit period beyond
	// the events' span, so no tick.
	PipelineEPS float64 `json:"pipeline_eps"`
	Ratio       float64 `json:"ratio"`
	// TickedEPS and TickedRatio are the run with the default refit period,
	// so that hold-back, the group barrier, per-tick loads, compaction and
	// publication run as in a replay; only the model fit is left out
	// (Refit).
	TickedEPS   float64 `json:"ticked_pipeline_eps"`
	TickedRatio float64 `json:"ticked_ratio"`
	// RedisCPUUsPerEvent is the redis-server's CPU time (INFO cpu) per
	// event in the ingest run, TickedRedisCPUUsPerEvent in the ticked one.
	RedisCPUUsPerEvent       float64 `json:"redis_cpu_us_per_event"`
	TickedRedisCPUUsPerEvent float64 `json:"ticked_redis_cpu_us_per_event"`
	// RedisBytesPerPendingClick is the growth of INFO used_memory per
	// pending click: with the click index, over Result.IndexClicks clicks
	// fed through it, spread over three of its generations; with carried
	// attribution (no index), over the ingest run, per click of the
	// workload.
	RedisBytesPerPendingClick float64 `json:"redis_bytes_per_pending_click"`
	// MaxBytesPerArm is the largest MEMORY USAGE of any arm hash sampled
	// during and after the ingest and ticked runs.
	MaxBytesPerArm int64 `json:"max_bytes_per_arm"`
}

// Counts counts clicks and conversions.
type Counts struct {
	Clicks      uint64 `json:"clicks"`
	Conversions uint64 `json:"conversions"`
}

// Round is one round: a bare read, then every pipeline run.
type Round struct {
	Bare          RunStats `json:"bare"`
	Ingest        RunStats `json:"ingest"`
	Ticked        RunStats `json:"ticked"`
	CarriedIngest RunStats `json:"carried_ingest"`
	CarriedTicked RunStats `json:"carried_ticked"`
}

// RunStats is one timed run.
type RunStats struct {
	Seconds float64 `json:"seconds"`
	// Ratio is the bare read's seconds over these (0 for the bare read).
	Ratio float64 `json:"ratio,omitempty"`
	// ProcessCPUSeconds is this process's CPU time (user + system) during
	// the run: the broker, the reader or pipeline, the Go runtime.
	ProcessCPUSeconds float64 `json:"process_cpu_seconds"`
	// RedisCPUSeconds is the redis-server's (INFO cpu).
	RedisCPUSeconds float64 `json:"redis_cpu_seconds,omitempty"`
	// RedisBytes is the growth of INFO used_memory during the run.
	RedisBytes int64 `json:"redis_bytes,omitempty"`
	// RedisCommands are the run's busiest Redis commands by time (INFO
	// commandstats; commands run by scripts count both on their own and in
	// their script's EVALSHA).
	RedisCommands []CommandStat `json:"redis_commands,omitempty"`
	// OrphansParked counts conversions parked to wait for their click.
	OrphansParked float64 `json:"orphans_parked,omitempty"`
	// StageSeconds is the wall time the flushes spent in each stage (join,
	// delta, apply; ripen_flush_stage_duration_seconds), and FlushSeconds
	// in flushes altogether; the rest of a run is reading, holding back,
	// sweeping, progress and refit ticks.
	StageSeconds map[string]float64 `json:"stage_seconds,omitempty"`
	FlushSeconds float64            `json:"flush_seconds,omitempty"`
	Flushes      int                `json:"flushes,omitempty"`
	// MaxBytesPerArm is the largest arm hash sampled during and after the
	// run.
	MaxBytesPerArm int64 `json:"max_bytes_per_arm,omitempty"`
}

// CommandStat is one line of INFO commandstats.
type CommandStat struct {
	Command string  `json:"command"`
	Calls   int64   `json:"calls"`
	Usec    int64   `json:"usec"`
	PerCall float64 `json:"usec_per_call"`
}

// Run sets up the broker and Redis, produces the workload, runs the
// rounds and measures the click index's memory.
func Run(ctx context.Context, o Options) (*Result, error) {
	if err := o.Validate(); err != nil {
		return nil, fmt.Errorf("bench: %w", err)
	}
	o = o.WithDefaults()
	rs, err := startRedis(ctx)
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

	w := generate(o.Events)
	var base consumer.Config
	base.Kafka.Brokers = brokers
	base = base.WithDefaults()
	if err := produce(ctx, brokers, base.Kafka.ClickTopic, w.clicks); err != nil {
		return nil, err
	}
	if err := produce(ctx, brokers, base.Kafka.ConversionTopic, w.convs); err != nil {
		return nil, err
	}
	ends, err := endOffsets(ctx, brokers, []string{base.Kafka.ClickTopic, base.Kafka.ConversionTopic})
	if err != nil {
		return nil, err
	}

	rdb := redis.NewClient(&redis.Options{Addr: rs.addr})
	defer rdb.Close()
	b := &bench{rdb: rdb, ends: ends, w: w}
	res := &Result{Events: o.Events, IndexClicks: o.IndexClicks, BytesMethod: "growth of INFO used_memory"}
	type series struct{ eps, ratio, ticked, tickedRatio, cpu, tickedCPU []float64 }
	var bare []float64
	var idx, car series
	var last [4]string // prefixes of the last round's runs
	for round := range o.Rounds {
		var r Round
		if r.Bare, err = b.bare(ctx, brokers); err != nil {
			return nil, err
		}
		bare = append(bare, float64(o.Events)/r.Bare.Seconds)
		for k, run := range []struct {
			out     *RunStats
			carried bool
			ticked  bool
			s       *series
		}{
			{&r.Ingest, false, false, &idx}, {&r.Ticked, false, true, &idx},
			{&r.CarriedIngest, true, false, &car}, {&r.CarriedTicked, true, true, &car},
		} {
			cfg := base
			if !run.ticked {
				cfg.Pipeline.RefitEvery = 365 * 24 * time.Hour
				cfg.Pipeline.PublishEvery = cfg.Pipeline.RefitEvery
			}
			if run.carried {
				cfg.Defaults.Attribution = consumer.AttributionCarried
			}
			prefix := fmt.Sprintf("bench%d-%d", round, k)
			st, err := b.pipeline(ctx, cfg, prefix)
			if err != nil {
				return nil, err
			}
			st.Ratio = r.Bare.Seconds / st.Seconds
			*run.out = st
			last[k] = prefix
			eps, cpu := float64(o.Events)/st.Seconds, st.RedisCPUSeconds*1e6/float64(o.Events)
			if run.ticked {
				run.s.ticked, run.s.tickedRatio, run.s.tickedCPU = append(run.s.ticked, eps), append(run.s.tickedRatio, st.Ratio), append(run.s.tickedCPU, cpu)
			} else {
				run.s.eps, run.s.ratio, run.s.cpu = append(run.s.eps, eps), append(run.s.ratio, st.Ratio), append(run.s.cpu, cpu)
			}
		}
		res.Rounds = append(res.Rounds, r)
	}
	res.BareEPS = median(bare)
	for _, m := range []struct {
		out *Mode
		s   series
	}{{&res.Mode, idx}, {&res.Carried, car}} {
		m.out.PipelineEPS, m.out.Ratio = median(m.s.eps), median(m.s.ratio)
		m.out.TickedEPS, m.out.TickedRatio = median(m.s.ticked), median(m.s.tickedRatio)
		m.out.RedisCPUUsPerEvent, m.out.TickedRedisCPUUsPerEvent = median(m.s.cpu), median(m.s.tickedCPU)
	}
	for _, r := range res.Rounds {
		res.MaxBytesPerArm = max(res.MaxBytesPerArm, r.Ingest.MaxBytesPerArm, r.Ticked.MaxBytesPerArm)
		res.Carried.MaxBytesPerArm = max(res.Carried.MaxBytesPerArm, r.CarriedIngest.MaxBytesPerArm, r.CarriedTicked.MaxBytesPerArm)
	}
	lastRound := res.Rounds[len(res.Rounds)-1]
	res.OrphansParked, res.TickedOrphansParked = lastRound.Ingest.OrphansParked, lastRound.Ticked.OrphansParked
	res.Carried.RedisBytesPerPendingClick = float64(lastRound.CarriedIngest.RedisBytes) / float64(len(w.clicks))

	res.Generated = Counts{Clicks: uint64(len(w.clicks)), Conversions: uint64(len(w.convs))}
	for k, prefix := range last {
		st, err := state.New(rdb, state.Options{Prefix: prefix})
		if err != nil {
			return nil, err
		}
		c, err := totals(ctx, st, w)
		if err != nil {
			return nil, err
		}
		if c != res.Generated {
			return nil, fmt.Errorf("bench: run %s counted %d clicks and %d conversions, generated %d and %d",
				prefix, c.Clicks, c.Conversions, res.Generated.Clicks, res.Generated.Conversions)
		}
		if k == 0 {
			res.Counted = c
			if res.RedisBytesPerArm, res.RedisBytesPerArmCompacted, err = b.armBytes(ctx, st); err != nil {
				return nil, err
			}
			res.MaxBytesPerArm = max(res.MaxBytesPerArm, int64(res.RedisBytesPerArm))
		}
	}
	if res.RedisBytesPerPendingClick, res.IndexRedisCPUUsPerClick, err = b.indexMemory(ctx, o.IndexClicks); err != nil {
		return nil, err
	}
	return res, nil
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
