package pipebench

import (
	"context"
	"errors"
	"fmt"
	"maps"
	"math/rand/v2"
	"slices"
	"strconv"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/redis/go-redis/v9"
	"github.com/segmentio/kafka-go"
	"go.uber.org/zap"

	"ripen/consumer"
	"ripen/estimator"
	"ripen/state"
)

// bench is one benchmark's fixed parts.
type bench struct {
	rdb  *redis.Client
	ends map[state.TopicPartition]int64
	w    workload
}

// bare reads every partition to its end with one reader each, as the
// pipeline does, decoding nothing.
func (b *bench) bare(ctx context.Context, brokers []string) (RunStats, error) {
	cpu0 := processCPU()
	start := time.Now()
	var wg sync.WaitGroup
	errs := make(chan error, len(b.ends))
	for tp, end := range b.ends {
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
		return RunStats{}, err
	}
	return RunStats{Seconds: time.Since(start).Seconds(), ProcessCPUSeconds: processCPU() - cpu0}, nil
}

// pipeline runs the service configured by cfg in a fresh group and key
// prefix until its resume offsets reach every end, timed from the moment
// it was ready (in the group, Redis answering) to then; the group join is
// left out, as the bare reader has none. The model fit is replaced by
// Refit. It samples the arm hashes' memory every 100 ms.
func (b *bench) pipeline(ctx context.Context, cfg consumer.Config, prefix string) (RunStats, error) {
	var run RunStats
	st, err := state.New(b.rdb, state.Options{Prefix: prefix})
	if err != nil {
		return run, fmt.Errorf("bench: %w", err)
	}
	cfg.Kafka.Group = prefix
	cfg.Redis.Prefix = prefix
	// The logs end: let their partitions count as idle soon, so that the
	// watermark reaches the last events without a minute's wait.
	cfg.Pipeline.IdleTimeout = 200 * time.Millisecond
	reg := prometheus.NewRegistry()
	metrics := consumer.NewMetrics(reg)
	svc, err := consumer.New(cfg, consumer.Deps{Store: st, Logger: zap.NewNop(), Metrics: metrics, Refit: Refit})
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
	var ready, sampled time.Time
	var cpu0, pcpu0 float64
	var mem0 int64
	for {
		select {
		case err := <-done:
			return run, fmt.Errorf("bench: pipeline stopped early: %v", err)
		default:
		}
		if ready.IsZero() && svc.Ready(ctx) == nil {
			if err := b.rdb.ConfigResetStat(ctx).Err(); err != nil {
				_ = stop()
				return run, fmt.Errorf("bench: CONFIG RESETSTAT: %w", err)
			}
			if cpu0, err = redisCPU(ctx, b.rdb); err == nil {
				mem0, err = usedMemory(ctx, b.rdb)
			}
			if err != nil {
				_ = stop()
				return run, err
			}
			pcpu0 = processCPU()
			ready = time.Now()
		}
		if !ready.IsZero() {
			if time.Since(sampled) >= 100*time.Millisecond {
				if err := b.sampleArms(ctx, st, &run); err != nil {
					_ = stop()
					return run, err
				}
				sampled = time.Now()
			}
			caught := true
			for tp, end := range b.ends {
				off, err := st.Resume(ctx, tp.Topic, tp.Partition)
				if end > 0 && (err != nil || off < end) {
					caught = false
					break
				}
			}
			if caught {
				run.Seconds = time.Since(ready).Seconds()
				run.ProcessCPUSeconds = processCPU() - pcpu0
				cpu1, err := redisCPU(ctx, b.rdb)
				if err != nil {
					_ = stop()
					return run, err
				}
				run.RedisCPUSeconds = cpu1 - cpu0
				if err := stop(); err != nil {
					return run, fmt.Errorf("bench: pipeline: %w", err)
				}
				mem1, err := usedMemory(ctx, b.rdb)
				if err != nil {
					return run, err
				}
				run.RedisBytes = mem1 - mem0
				if run.RedisCommands, err = commandStats(ctx, b.rdb, 8); err != nil {
					return run, err
				}
				if err := b.sampleArms(ctx, st, &run); err != nil {
					return run, err
				}
				if run.OrphansParked, err = counter(reg, "ripen_orphans_parked_total"); err != nil {
					return run, err
				}
				if run.StageSeconds, err = histogramSums(reg, "ripen_flush_stage_duration_seconds", "stage"); err != nil {
					return run, err
				}
				delete(run.StageSeconds, "count")
				flush, err := histogramSums(reg, "ripen_flush_duration_seconds", "")
				run.FlushSeconds = flush[""]
				run.Flushes = int(flush["count"])
				return run, err
			}
		}
		if time.Now().After(deadline) || ctx.Err() != nil {
			_ = stop()
			return run, errors.New("bench: pipeline did not consume every event within 10 minutes")
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// sampleArms raises run.MaxBytesPerArm to the largest arm hash now.
func (b *bench) sampleArms(ctx context.Context, st *state.Store, run *RunStats) error {
	for _, exp := range slices.Sorted(maps.Keys(b.w.experiments)) {
		for _, arm := range b.w.experiments[exp] {
			n, err := st.ArmMemory(ctx, exp, arm)
			if err != nil {
				return fmt.Errorf("bench: %w", err)
			}
			run.MaxBytesPerArm = max(run.MaxBytesPerArm, n)
		}
	}
	return nil
}

// counter reads a counter from a registry (0 when it has no sample).
func counter(reg *prometheus.Registry, name string) (float64, error) {
	mfs, err := reg.Gather()
	if err != nil {
		return 0, fmt.Errorf("bench: metrics: %w", err)
	}
	var sum float64
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
		for _, m := range mf.GetMetric() {
			sum += m.GetCounter().GetValue()
		}
	}
	return sum, nil
}

// histogramSums reads the sums of a histogram's series from a registry,
// by the value of label ("" for a histogram without labels), and their
// total sample count (under "count").
func histogramSums(reg *prometheus.Registry, name, label string) (map[string]float64, error) {
	mfs, err := reg.Gather()
	if err != nil {
		return nil, fmt.Errorf("bench: metrics: %w", err)
	}
	out := map[string]float64{}
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
		for _, m := range mf.GetMetric() {
			key := ""
			for _, lp := range m.GetLabel() {
				if lp.GetName() == label {
					key = lp.GetValue()
				}
			}
			out[key] += m.GetHistogram().GetSampleSum()
			out["count"] += float64(m.GetHistogram().GetSampleCount())
		}
	}
	return out, nil
}

// armBytes returns the mean memory of the workload's arm hashes as st
// holds them, and the same after compacting every arm.
func (b *bench) armBytes(ctx context.Context, st *state.Store) (asLeft, compacted float64, err error) {
	mean := func() (float64, error) {
		var sum, n int64
		for exp, arms := range b.w.experiments {
			for _, arm := range arms {
				m, err := st.ArmMemory(ctx, exp, arm)
				if err != nil {
					return 0, fmt.Errorf("bench: %w", err)
				}
				sum += m
				n++
			}
		}
		return float64(sum) / float64(n), nil
	}
	if asLeft, err = mean(); err != nil {
		return 0, 0, err
	}
	for exp, arms := range b.w.experiments {
		for _, arm := range arms {
			if _, err := st.Compact(ctx, exp, arm); err != nil {
				return 0, 0, fmt.Errorf("bench: compact %s/%s: %w", exp, arm, err)
			}
		}
	}
	compacted, err = mean()
	return asLeft, compacted, err
}

// indexMemory feeds n clicks, continuing the workload's (ids, experiments
// and arms), through the click index of a fresh prefix in batches of the
// pipeline's flush size, and returns the growth of used_memory and the
// Redis CPU per click. The clicks are spread evenly over three
// generations of the index from a generation's start, so that the second
// and third are sized from the one before, as in a steady state; with the
// default 7-day window a generation is 42 hours.
func (b *bench) indexMemory(ctx context.Context, n int) (bytesPerClick, cpuUsPerClick float64, err error) {
	st, err := state.New(b.rdb, state.Options{Prefix: "benchindex"})
	if err != nil {
		return 0, 0, fmt.Errorf("bench: %w", err)
	}
	window := estimator.DefaultWindow
	info, err := st.OpenClickIndex(ctx, state.ClickIndexOptions{Horizon: window})
	if err != nil {
		return 0, 0, fmt.Errorf("bench: %w", err)
	}
	gen := info.Generation.Milliseconds()
	start := (t0/gen + 1) * gen
	every := 3 * gen / int64(n)
	ids := slices.Sorted(maps.Keys(b.w.experiments))
	r := rand.New(rand.NewPCG(2031, 7))
	mem0, err := usedMemory(ctx, b.rdb)
	if err != nil {
		return 0, 0, err
	}
	cpu0, err := redisCPU(ctx, b.rdb)
	if err != nil {
		return 0, 0, err
	}
	const batch = consumer.DefaultFlushEvents
	recs := make([]state.ClickRecord, 0, batch)
	for i := 0; i < n; i += batch {
		recs = recs[:0]
		for j := i; j < min(n, i+batch); j++ {
			c := click(len(b.w.clicks)+j, ids, b.w.experiments, r)
			recs = append(recs, state.ClickRecord{ClickID: c.ClickID, Experiment: c.Experiment, Arm: c.Arm, TS: start + int64(j)*every, Window: window, Origin: "clicks/" + strconv.Itoa(j%3) + "/" + strconv.Itoa(j/3)})
		}
		if _, err := st.IndexClicks(ctx, recs); err != nil {
			return 0, 0, fmt.Errorf("bench: index clicks: %w", err)
		}
	}
	cpu1, err := redisCPU(ctx, b.rdb)
	if err != nil {
		return 0, 0, err
	}
	mem1, err := usedMemory(ctx, b.rdb)
	if err != nil {
		return 0, 0, err
	}
	return float64(mem1-mem0) / float64(n), (cpu1 - cpu0) * 1e6 / float64(n), nil
}

// Refit stands in for the estimator in bench runs: the tick machinery,
// loads, compaction and publication run as in production, but the fit is
// left out (its cost is measured by consumer's BenchmarkRefitTick).
func Refit(in estimator.ExperimentInput) (estimator.ExperimentReport, error) {
	rep := estimator.ExperimentReport{Experiment: in.Experiment, AsOf: time.UnixMilli(in.AsOf).UTC().Format(time.RFC3339Nano), Status: estimator.StatusCollecting, Policy: "uniform", Weights: map[string]float64{}}
	for _, a := range in.Arms {
		rep.Weights[a.Arm] = 1 / float64(len(in.Arms))
	}
	return rep, nil
}
