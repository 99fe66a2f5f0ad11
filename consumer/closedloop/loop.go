// Package closedloop runs the real service (consumer.Service) on simulated
// traffic that follows the weights the service publishes: the engine of
// `ripen demo` and of tests that need a running service with a history.
//
// A Loop starts an in-process Kafka-protocol broker and the service on a
// given Redis; Drive then feeds the scenario's traffic (sim.Traffic) chunk
// by chunk, each chunk split between the arms by the latest allocation
// read from the allocation topic, and waits for the service to consume
// it and refit before the next one.
package closedloop

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/redis/go-redis/v9"
	"github.com/segmentio/kafka-go"
	"go.uber.org/zap"

	"github.com/twmb/franz-go/pkg/kfake"
	"ripen/consumer"

	"ripen/consumer/kafkatest"
	"ripen/estimator/sim"
	"ripen/state"
)

// Settings of a run.
const (
	// DefaultPartitions is the default partition count of every topic.
	DefaultPartitions = 3
	// waitTimeout bounds the wait for the service to refit one tick.
	waitTimeout = 20 * time.Second
	// lateness is the service's allowed lateness; each chunk of traffic
	// runs this plus a second past its refit tick, so that the watermark
	// crosses the tick once the chunk is consumed.
	lateness = 2 * time.Minute
	// idleTimeout is the wall time after which a caught-up partition
	// stops holding the watermark back.
	idleTimeout = 25 * time.Millisecond
	// orphanTTLSlack is added to the event-time orphan TTL for the
	// wall-clock lifetime of a parked conversion (as `ripen run` does).
	orphanTTLSlack = 6 * time.Hour
)

// Options configure a Loop.
type Options struct {
	// Scenario is the simulated traffic; its update interval is the
	// service's refit tick and publication period. Required (validated).
	Scenario sim.Scenario
	// Redis is the state store's client. Required.
	Redis redis.UniversalClient
	// Prefix is the Redis key prefix. Default: ripen.
	Prefix string
	// Partitions of every topic. Default: DefaultPartitions.
	Partitions int
	// Logger receives the service's logs. Default: none.
	Logger *zap.Logger
	// Registry receives the service's metrics. Default: a new registry
	// with the Go runtime and process collectors.
	Registry *prometheus.Registry
	// ClickIDPrefix starts every generated click id. Default: "qm-".
	ClickIDPrefix string

	// pauseBetweenWrites, when positive, is slept after every write of
	// events to the broker in Drive (tests: it widens the gaps in which a
	// partition with unread events looks idle to the service).
	pauseBetweenWrites time.Duration
}

// Tick is the state of a run after one refit tick.
type Tick struct {
	// At is the tick (Unix ms, event time).
	At int64
	// Allocation is the latest allocation read, if Published.
	Allocation consumer.Allocation
	Published  bool
	// Clicks and Conversions are the generated totals per arm so far.
	Clicks, Conversions []int
}

// Result is what a run leaves.
type Result struct {
	// History holds the allocations read, by seq, once each.
	History []consumer.Allocation
	// Raw holds the allocation messages as read.
	Raw [][]byte
	// Clicks and Conversions are the generated totals per arm.
	Clicks, Conversions []int
}

// Loop is a running service with its broker and allocation readers.
type Loop struct {
	opts    Options
	cfg     consumer.Config
	cluster *kfake.Cluster
	store   *state.Store
	reg     *prometheus.Registry
	svc     *consumer.Service
	watch   *allocWatch

	stopRun   context.CancelFunc
	runDone   chan error
	stopWatch context.CancelFunc
	watchers  sync.WaitGroup
	closeOnce sync.Once
	closeErr  error
}

// Start starts the broker, the service and the allocation readers.
func Start(ctx context.Context, opts Options) (*Loop, error) {
	if opts.Redis == nil {
		return nil, errors.New("closedloop: a Redis client is required")
	}
	if opts.Partitions <= 0 {
		opts.Partitions = DefaultPartitions
	}
	if opts.Prefix == "" {
		opts.Prefix = consumer.DefaultPrefix
	}
	if opts.ClickIDPrefix == "" {
		opts.ClickIDPrefix = "qm-"
	}
	if opts.Registry == nil {
		opts.Registry = consumer.NewRegistry()
	}
	if err := opts.Scenario.Validate(); err != nil {
		return nil, fmt.Errorf("closedloop: %w", err)
	}
	cluster, err := kafkatest.New(kafkatest.Options{Partitions: opts.Partitions})
	if err != nil {
		return nil, fmt.Errorf("closedloop: %w", err)
	}
	l := &Loop{opts: opts, cluster: cluster, reg: opts.Registry, watch: newAllocWatch()}
	l.cfg = serviceConfig(opts.Scenario, cluster.ListenAddrs(), opts.Prefix)
	l.store, err = state.New(opts.Redis, state.Options{Prefix: opts.Prefix, OrphanTTL: l.cfg.Pipeline.OrphanTTL + orphanTTLSlack})
	if err != nil {
		cluster.Close()
		return nil, fmt.Errorf("closedloop: %w", err)
	}
	l.svc, err = consumer.New(l.cfg, consumer.Deps{Store: l.store, Logger: opts.Logger, Metrics: consumer.NewMetrics(l.reg)})
	if err != nil {
		cluster.Close()
		return nil, fmt.Errorf("closedloop: %w", err)
	}
	runCtx, stopRun := context.WithCancel(context.WithoutCancel(ctx))
	l.stopRun, l.runDone = stopRun, make(chan error, 1)
	go func() { l.runDone <- l.svc.Run(runCtx) }()
	watchCtx, stopWatch := context.WithCancel(context.WithoutCancel(ctx))
	l.stopWatch = stopWatch
	for p := range opts.Partitions {
		l.watchers.Add(1)
		go func() {
			defer l.watchers.Done()
			l.watch.read(watchCtx, cluster.ListenAddrs(), l.cfg.Kafka.AllocationTopic, p)
		}()
	}
	return l, nil
}

// serviceConfig is the service configuration of a run: the refit tick is
// the scenario's update interval, and every tick publishes.
func serviceConfig(sc sim.Scenario, brokers []string, prefix string) consumer.Config {
	var c consumer.Config
	c.Kafka.Brokers = brokers
	c.Kafka.Group = "ripen-demo"
	c.Redis.Prefix = prefix
	c.Log = consumer.LogConsole
	c.Pipeline.FlushEvents = 5000
	c.Pipeline.FlushInterval = 20 * time.Millisecond
	c.Pipeline.Lateness = lateness
	// Between two chunks every partition is caught up; a short idle
	// timeout lets the watermark follow the chunk's last click without a
	// minute of wall clock per tick.
	c.Pipeline.IdleTimeout = idleTimeout
	c.Pipeline.RefitEvery = sc.UpdateInterval.D()
	c.Pipeline.PublishEvery = sc.UpdateInterval.D()
	c.Defaults.Window = sc.Window.D()
	c.Defaults.Delay = sc.FitFamily
	c.ShutdownTimeout = 10 * time.Second
	return c.WithDefaults()
}

// Service is the running service.
func (l *Loop) Service() *consumer.Service { return l.svc }

// Store is the service's state store.
func (l *Loop) Store() *state.Store { return l.store }

// Registry holds the service's metrics.
func (l *Loop) Registry() *prometheus.Registry { return l.reg }

// Drive feeds the scenario's traffic to the service until its horizon,
// calling progress (if not nil) after every refit tick, and returns what
// was published. The service keeps running afterwards, until Close.
func (l *Loop) Drive(ctx context.Context, progress func(Tick)) (*Result, error) {
	sc := l.opts.Scenario
	gen, err := sim.NewTraffic(sc, l.opts.ClickIDPrefix)
	if err != nil {
		return nil, fmt.Errorf("closedloop: %w", err)
	}
	brokers := l.cluster.ListenAddrs()
	clickW := writer(brokers, l.cfg.Kafka.ClickTopic)
	convW := writer(brokers, l.cfg.Kafka.ConversionTopic)
	defer clickW.Close()
	defer convW.Close()
	kc := &kafka.Client{Addr: kafka.TCP(brokers...), Timeout: 10 * time.Second}

	refitMs := l.cfg.Pipeline.RefitEvery.Milliseconds()
	lagMs := (lateness + time.Second).Milliseconds()
	ticks := int(sc.Horizon.D().Milliseconds() / refitMs)
	arms := gen.Arms()
	weights := uniform(len(arms))
	for k := 1; k <= ticks; k++ {
		tick := sim.Start + int64(k)*refitMs
		before, err := consumer.ReadMetrics(l.reg)
		if err != nil {
			return nil, fmt.Errorf("closedloop: %w", err)
		}
		clicks, convs := gen.Chunk(tick+lagMs-sim.Start, weights)
		// The chunk goes in rounds by event time: before the tick, at the
		// tick, after it. Each of the first two is consumed (applied)
		// before the next is written, so that the refit of the tick sees
		// exactly the events up to it. The refit does not wait for the
		// chunk's last click: once every partition is idle (the service's
		// idle timeout is short here), the watermark is the latest time
		// read anywhere, so a partition whose events were written but not
		// read yet must never sit behind a partition that has read past
		// the tick. Two events at exactly the tick's millisecond on
		// different partitions can still race each other.
		for i, r := range splitAtTick(tick, clicks, convs) {
			if err := l.write(ctx, clickW, clickMessages(sc.Name, arms, r.clicks)); err != nil {
				return nil, err
			}
			if err := l.write(ctx, convW, conversionMessages(r.convs)); err != nil {
				return nil, err
			}
			if i == roundAfter || len(r.clicks)+len(r.convs) == 0 {
				continue
			}
			if err := l.waitConsumed(ctx, kc, l.cfg.Kafka.ClickTopic, l.cfg.Kafka.ConversionTopic); err != nil {
				return nil, err
			}
		}
		var now consumer.MetricsReading
		latest, ok, err := l.watch.waitTick(ctx, tick, func() bool {
			now, _ = consumer.ReadMetrics(l.reg)
			return now.Refits > before.Refits && now.Watermark*1000 >= float64(tick)
		})
		if err != nil {
			return nil, fmt.Errorf("closedloop: simulated %s (watermark %s, %d refits): %w", time.UnixMilli(tick).UTC().Format(time.RFC3339),
				time.UnixMilli(int64(now.Watermark*1000)).UTC().Format(time.RFC3339), now.Refits, err)
		}
		if ok {
			weights = WeightsFor(arms, latest.Weights, weights)
		}
		if progress != nil {
			progress(Tick{At: tick, Allocation: latest, Published: ok, Clicks: gen.Clicks(), Conversions: gen.Conversions()})
		}
	}
	history := l.watch.history()
	if len(history) == 0 {
		return nil, errors.New("closedloop: the service published no allocation")
	}
	return &Result{History: history, Raw: l.watch.raw(), Clicks: gen.Clicks(), Conversions: gen.Conversions()}, nil
}

// Close stops the service (flushing what it read), the readers and the
// broker, and returns the service's error, if any.
func (l *Loop) Close() error {
	l.closeOnce.Do(func() {
		l.stopRun()
		select {
		case err := <-l.runDone:
			if err != nil {
				l.closeErr = fmt.Errorf("closedloop: service: %w", err)
			}
		case <-time.After(l.cfg.ShutdownTimeout + 5*time.Second):
			l.closeErr = errors.New("closedloop: the service did not stop in time")
		}
		l.stopWatch()
		l.watchers.Wait()
		l.cluster.Close()
	})
	return l.closeErr
}

func writer(brokers []string, topic string) *kafka.Writer {
	return &kafka.Writer{
		Addr: kafka.TCP(brokers...), Topic: topic, Balancer: &kafka.Hash{},
		RequiredAcks: kafka.RequireAll, BatchTimeout: 5 * time.Millisecond, BatchSize: 2000,
	}
}

// Rounds of a chunk, in the order Drive writes them (see splitAtTick).
const (
	roundBefore = iota
	roundAt
	roundAfter
	rounds
)

// round is the part of a chunk written in one round.
type round struct {
	clicks []sim.TrafficClick
	convs  []sim.TrafficConversion
}

// splitAtTick splits a chunk by event time into the events before tick,
// at tick and after it, keeping each part in order.
func splitAtTick(tick int64, clicks []sim.TrafficClick, convs []sim.TrafficConversion) [rounds]round {
	var out [rounds]round
	at := func(ts int64) int {
		switch {
		case ts < tick:
			return roundBefore
		case ts == tick:
			return roundAt
		}
		return roundAfter
	}
	for _, c := range clicks {
		i := at(c.TS)
		out[i].clicks = append(out[i].clicks, c)
	}
	for _, c := range convs {
		i := at(c.TS)
		out[i].convs = append(out[i].convs, c)
	}
	return out
}

// write produces msgs, then pauses when the options ask for it.
func (l *Loop) write(ctx context.Context, w *kafka.Writer, msgs []kafka.Message) error {
	if err := produce(ctx, w, msgs); err != nil {
		return err
	}
	if d := l.opts.pauseBetweenWrites; d > 0 && len(msgs) > 0 {
		select {
		case <-ctx.Done():
			return fmt.Errorf("closedloop: pause after writing to %s: %w", w.Topic, ctx.Err())
		case <-time.After(d):
		}
	}
	return nil
}

func produce(ctx context.Context, w *kafka.Writer, msgs []kafka.Message) error {
	if len(msgs) == 0 {
		return nil
	}
	if err := w.WriteMessages(ctx, msgs...); err != nil {
		return fmt.Errorf("closedloop: produce to %s: %w", w.Topic, err)
	}
	return nil
}

// clickMessages encodes clicks as the service reads them (key: click id).
func clickMessages(experiment string, arms []string, clicks []sim.TrafficClick) []kafka.Message {
	out := make([]kafka.Message, len(clicks))
	for i, c := range clicks {
		out[i] = message(c.ID, consumer.Click{ClickID: c.ID, Experiment: experiment, Arm: arms[c.Arm], TS: c.TS})
	}
	return out
}

func conversionMessages(convs []sim.TrafficConversion) []kafka.Message {
	out := make([]kafka.Message, len(convs))
	for i, c := range convs {
		out[i] = message(c.ClickID, consumer.Conversion{ClickID: c.ClickID, TS: c.TS})
	}
	return out
}

func message(key string, v json.Marshaler) kafka.Message {
	b, err := v.MarshalJSON()
	if err != nil {
		panic(fmt.Sprintf("encode simulated event: %v", err)) // plain structs always encode
	}
	return kafka.Message{Key: []byte(key), Value: b}
}

// waitConsumed waits until the service's resume offset of every partition
// of the topics is at the partition's log end.
func (l *Loop) waitConsumed(ctx context.Context, kc *kafka.Client, topics ...string) error {
	req := &kafka.ListOffsetsRequest{Topics: map[string][]kafka.OffsetRequest{}}
	for _, t := range topics {
		for p := range l.opts.Partitions {
			req.Topics[t] = append(req.Topics[t], kafka.LastOffsetOf(p))
		}
	}
	resp, err := kc.ListOffsets(ctx, req)
	if err != nil {
		return fmt.Errorf("closedloop: end offsets: %w", err)
	}
	deadline := time.Now().Add(waitTimeout)
	for _, t := range topics {
		for _, po := range resp.Topics[t] {
			if po.Error != nil {
				return fmt.Errorf("closedloop: end offset of %s/%d: %w", t, po.Partition, po.Error)
			}
			for po.LastOffset > 0 {
				got, err := l.store.Resume(ctx, t, po.Partition)
				if err != nil && !errors.Is(err, state.ErrNotFound) {
					return fmt.Errorf("closedloop: %w", err)
				}
				if err == nil && got >= po.LastOffset {
					break
				}
				if time.Now().After(deadline) {
					return fmt.Errorf("closedloop: the service did not consume %s/%d to offset %d within %v", t, po.Partition, po.LastOffset, waitTimeout)
				}
				select {
				case <-ctx.Done():
					return ctx.Err()
				case <-time.After(5 * time.Millisecond):
				}
			}
		}
	}
	return nil
}

func uniform(k int) []float64 {
	w := make([]float64, k)
	for i := range w {
		w[i] = 1 / float64(k)
	}
	return w
}

// WeightsFor orders published weights like arms; it keeps prev when the
// publication lacks an arm or sums to nothing.
func WeightsFor(arms []string, pub map[string]float64, prev []float64) []float64 {
	w := make([]float64, len(arms))
	var sum float64
	for i, a := range arms {
		x, ok := pub[a]
		if !ok || !(x >= 0) {
			return prev
		}
		w[i] = x
		sum += x
	}
	if !(sum > 0) {
		return prev
	}
	for i := range w {
		w[i] /= sum
	}
	return w
}
