package main

import (
	"bytes"
	"container/heap"
	"context"
	_ "embed"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"text/tabwriter"
	"time"

	"github.com/alicebob/miniredis/v2"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/redis/go-redis/v9"
	"github.com/segmentio/kafka-go"
	"github.com/spf13/cobra"
	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"

	"ripen/cmd/ripen/report"
	"ripen/consumer"
	"ripen/consumer/kafkatest"
	"ripen/estimator/sim"
	"ripen/state"
)

// demoScenarioYAML is the built-in scenario of `ripen demo`.
//
//go:embed demo_scenario.yaml
var demoScenarioYAML []byte

// Store choices of `ripen demo --store` (a hidden flag, for tests).
const (
	demoStoreAuto     = "auto"
	demoStoreServer   = "redis-server"
	demoStoreEmbedded = "embedded"
)

// Settings of the demo run.
const (
	// demoShortHorizon is the simulated span of --short.
	demoShortHorizon = 4 * 24 * time.Hour
	// demoPartitions is the partition count of every demo topic.
	demoPartitions = 3
	// demoWaitTimeout bounds the wait for the service to refit one tick.
	demoWaitTimeout = 20 * time.Second
	// demoLateness is the service's allowed lateness; each chunk of traffic
	// runs this plus a second past its refit tick, so that the watermark
	// crosses the tick once the chunk is consumed.
	demoLateness = 2 * time.Minute
	// demoIdleTimeout is the wall time after which a caught-up partition
	// stops holding the watermark back.
	demoIdleTimeout = 25 * time.Millisecond
)

// demoFlags are the options of `ripen demo`.
type demoFlags struct {
	short  bool
	report string
	seed   uint64
	store  string
	days   float64
	logLvl string
}

func newDemoCmd() *cobra.Command {
	var f demoFlags
	cmd := &cobra.Command{
		Use:   "demo [--short] [--report DIR] [--seed N]",
		Short: "Run the service on a simulated shop, closed-loop, and write a report",
		Long: `demo runs the real ` + "`ripen run`" + ` pipeline against an in-process
Kafka-compatible broker and a local Redis (a redis-server from PATH on a free
loopback port, or an embedded Redis-compatible store when there is none), and
feeds it two weeks of simulated traffic of an invented shop in under a minute.
The traffic generator follows the weights the service publishes: each chunk
of clicks is split between the arms by the latest allocation, and the next
chunk waits until the service has caught up and refitted. A live view shows
each arm's weight and its observed and eventual conversion rate; at the end
DIR/index.html holds the charts and DIR/allocations.jsonl every allocation
published.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runDemo(cmd.Context(), cmd.OutOrStdout(), cmd.ErrOrStderr(), f)
		},
	}
	fl := cmd.Flags()
	fl.BoolVar(&f.short, "short", false, "simulate a few days instead of two weeks")
	fl.StringVar(&f.report, "report", "ripen-demo-report", "directory for the report (index.html, allocations.jsonl)")
	fl.Uint64Var(&f.seed, "seed", 0, "seed of the simulated traffic (0: the scenario's)")
	fl.StringVar(&f.store, "store", demoStoreAuto, "state store: auto, redis-server or embedded")
	fl.Float64Var(&f.days, "days", 0, "simulated days (0: the scenario's, or a few with --short)")
	fl.StringVar(&f.logLvl, "log-level", "error", "level of the service's logs on stderr: debug, info, warn or error")
	_ = fl.MarkHidden("store")
	_ = fl.MarkHidden("days")
	return cmd
}

// demoScenario returns the built-in scenario with the flags applied.
func demoScenario(f demoFlags) (sim.Scenario, error) {
	sc, err := sim.ParseScenario(bytes.NewReader(demoScenarioYAML))
	if err != nil {
		return sim.Scenario{}, fmt.Errorf("demo scenario: %w", err)
	}
	switch {
	case f.days < 0 || math.IsNaN(f.days) || f.days > 60:
		return sim.Scenario{}, fmt.Errorf("--days %v: want 0 to 60", f.days)
	case f.days > 0:
		sc.Horizon = sim.Duration(time.Duration(f.days * float64(24*time.Hour)))
	case f.short:
		sc.Horizon = sim.Duration(demoShortHorizon)
	}
	if f.seed != 0 {
		sc.Seed = f.seed
	}
	if err := sc.Validate(); err != nil {
		return sim.Scenario{}, fmt.Errorf("demo scenario: %w", err)
	}
	return *sc, nil
}

func runDemo(ctx context.Context, stdout, stderr io.Writer, f demoFlags) error {
	began := time.Now()
	sc, err := demoScenario(f)
	if err != nil {
		return &exitError{code: 2, err: err}
	}
	rdb, storeName, stopStore, err := startDemoStore(ctx, f.store)
	if err != nil {
		return err
	}
	defer stopStore()
	cluster, err := kafkatest.New(kafkatest.Options{Partitions: demoPartitions})
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	defer cluster.Close()
	brokers := cluster.ListenAddrs()

	cfg := demoConfig(sc, brokers)
	store, err := state.New(rdb, state.Options{Prefix: cfg.Redis.Prefix, OrphanTTL: cfg.Pipeline.OrphanTTL + orphanTTLSlack})
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	level, err := zapcore.ParseLevel(f.logLvl)
	if err != nil {
		return &exitError{code: 2, err: fmt.Errorf("--log-level: %w", err)}
	}
	metrics := consumer.NewMetrics(prometheus.NewRegistry())
	svc, err := consumer.New(cfg, consumer.Deps{Store: store, Logger: demoLogger(stderr, level), Metrics: metrics})
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	runCtx, stopRun := context.WithCancel(ctx)
	defer stopRun()
	runDone := make(chan error, 1)
	go func() { runDone <- svc.Run(runCtx) }()
	stopService := func() error {
		stopRun()
		select {
		case err := <-runDone:
			return err
		case <-time.After(cfg.ShutdownTimeout + 5*time.Second):
			return errors.New("demo: service did not stop in time")
		}
	}

	watch := newAllocWatch()
	watchCtx, stopWatch := context.WithCancel(ctx)
	var watchers sync.WaitGroup
	for p := range demoPartitions {
		watchers.Add(1)
		go func() {
			defer watchers.Done()
			watch.read(watchCtx, brokers, cfg.Kafka.AllocationTopic, p)
		}()
	}
	defer func() {
		stopWatch()
		watchers.Wait()
	}()

	gen, err := newDemoGenerator(sc)
	if err != nil {
		return err
	}
	clickW := demoWriter(brokers, cfg.Kafka.ClickTopic)
	convW := demoWriter(brokers, cfg.Kafka.ConversionTopic)
	defer clickW.Close()
	defer convW.Close()

	kc := &kafka.Client{Addr: kafka.TCP(brokers...), Timeout: 10 * time.Second}
	view := newDemoView(stdout, sc, storeName)
	refitMs := cfg.Pipeline.RefitEvery.Milliseconds()
	lagMs := (demoLateness + time.Second).Milliseconds()
	ticks := int(sc.Horizon.D().Milliseconds() / refitMs)
	weights := uniformWeights(gen.arms)
	for k := 1; k <= ticks; k++ {
		tick := sim.Start + int64(k)*refitMs
		refits := sampleCount(metrics.RefitDuration)
		clicks, convs := gen.chunk(tick+lagMs-sim.Start, weights)
		// Everything but the chunk's last click, which alone is past the
		// target, goes first; once the service has consumed it, the last
		// click moves the watermark past the tick, so that the refit sees
		// the whole chunk.
		last := clicks[len(clicks)-1:]
		if err := produce(ctx, clickW, clicks[:len(clicks)-1]); err != nil {
			return err
		}
		if err := produce(ctx, convW, convs); err != nil {
			return err
		}
		if err := waitConsumed(ctx, kc, store, cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic); err != nil {
			_ = stopService()
			return err
		}
		if err := produce(ctx, clickW, last); err != nil {
			return err
		}
		latest, ok, err := watch.waitTick(ctx, tick, func() bool {
			return sampleCount(metrics.RefitDuration) > refits && gaugeValue(metrics.Watermark)*1000 >= float64(tick)
		})
		if err != nil {
			_ = stopService()
			return fmt.Errorf("demo: simulated %s (watermark %s, %d refits): %w", time.UnixMilli(tick).UTC().Format(time.RFC3339),
				time.UnixMilli(int64(gaugeValue(metrics.Watermark)*1000)).UTC().Format(time.RFC3339), sampleCount(metrics.RefitDuration), err)
		}
		if ok {
			weights = weightsFor(gen.arms, latest.Weights, weights)
			view.update(tick, gen, latest, began)
		}
	}
	if err := stopService(); err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	stopWatch()
	watchers.Wait()

	history := watch.history()
	if len(history) == 0 {
		return errors.New("demo: the service published no allocation")
	}
	ex, err := store.Load(ctx, sc.Name)
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	if err := writeDemoReport(f.report, sc, history, ex, watch.raw()); err != nil {
		return err
	}
	view.summary(history[len(history)-1], gen, len(history), f.report, time.Since(began))
	return nil
}

// demoConfig is the service configuration of the demo: the refit tick is
// the scenario's update interval, and every tick publishes.
func demoConfig(sc sim.Scenario, brokers []string) consumer.Config {
	var c consumer.Config
	c.Kafka.Brokers = brokers
	c.Kafka.Group = "ripen-demo"
	c.Log = consumer.LogConsole
	c.Pipeline.FlushEvents = 5000
	c.Pipeline.FlushInterval = 20 * time.Millisecond
	c.Pipeline.Lateness = demoLateness
	// Between two chunks every partition is caught up; a short idle
	// timeout lets the watermark follow the chunk's last click without a
	// minute of wall clock per tick.
	c.Pipeline.IdleTimeout = demoIdleTimeout
	c.Pipeline.RefitEvery = sc.UpdateInterval.D()
	c.Pipeline.PublishEvery = sc.UpdateInterval.D()
	c.Defaults.Window = sc.Window.D()
	c.Defaults.Delay = sc.FitFamily
	c.ShutdownTimeout = 10 * time.Second
	return c.WithDefaults()
}

// demoLogger logs the service's messages from level up to w (by default
// errors only, so that a failing refit is seen; the rest of its logging
// would drown the live view).
func demoLogger(w io.Writer, level zapcore.Level) *zap.Logger {
	enc := zap.NewDevelopmentEncoderConfig()
	core := zapcore.NewCore(zapcore.NewConsoleEncoder(enc), zapcore.Lock(zapcore.AddSync(w)), level)
	return zap.New(core)
}

func demoWriter(brokers []string, topic string) *kafka.Writer {
	return &kafka.Writer{
		Addr: kafka.TCP(brokers...), Topic: topic, Balancer: &kafka.Hash{},
		RequiredAcks: kafka.RequireAll, BatchTimeout: 5 * time.Millisecond, BatchSize: 2000,
	}
}

func produce(ctx context.Context, w *kafka.Writer, msgs []kafka.Message) error {
	if len(msgs) == 0 {
		return nil
	}
	if err := w.WriteMessages(ctx, msgs...); err != nil {
		return fmt.Errorf("demo: produce to %s: %w", w.Topic, err)
	}
	return nil
}

// waitConsumed waits until the service's resume offset of every partition
// of the topics is at the partition's log end.
func waitConsumed(ctx context.Context, kc *kafka.Client, store *state.Store, topics ...string) error {
	req := &kafka.ListOffsetsRequest{Topics: map[string][]kafka.OffsetRequest{}}
	for _, t := range topics {
		for p := range demoPartitions {
			req.Topics[t] = append(req.Topics[t], kafka.LastOffsetOf(p))
		}
	}
	resp, err := kc.ListOffsets(ctx, req)
	if err != nil {
		return fmt.Errorf("demo: end offsets: %w", err)
	}
	deadline := time.Now().Add(demoWaitTimeout)
	for _, t := range topics {
		for _, po := range resp.Topics[t] {
			if po.Error != nil {
				return fmt.Errorf("demo: end offset of %s/%d: %w", t, po.Partition, po.Error)
			}
			for po.LastOffset > 0 {
				got, err := store.Resume(ctx, t, po.Partition)
				if err != nil && !errors.Is(err, state.ErrNotFound) {
					return fmt.Errorf("demo: %w", err)
				}
				if err == nil && got >= po.LastOffset {
					break
				}
				if time.Now().After(deadline) {
					return fmt.Errorf("demo: the service did not consume %s/%d to offset %d within %v", t, po.Partition, po.LastOffset, demoWaitTimeout)
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

func uniformWeights(arms []string) []float64 {
	w := make([]float64, len(arms))
	for i := range w {
		w[i] = 1 / float64(len(arms))
	}
	return w
}

// weightsFor orders published weights like arms; it keeps prev when the
// publication lacks an arm or sums to nothing.
func weightsFor(arms []string, pub map[string]float64, prev []float64) []float64 {
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

// startDemoStore starts the state store the demo runs on and returns a
// client, the store's name and a function that stops it.
func startDemoStore(ctx context.Context, kind string) (redis.UniversalClient, string, func(), error) {
	switch kind {
	case demoStoreAuto, demoStoreServer:
		bin, err := exec.LookPath(demoRedisBinary)
		if err != nil {
			if kind == demoStoreServer {
				return nil, "", nil, fmt.Errorf("demo: --store %s: %w", kind, err)
			}
			return startEmbeddedStore()
		}
		return startRedisServer(ctx, bin)
	case demoStoreEmbedded:
		return startEmbeddedStore()
	}
	return nil, "", nil, &exitError{code: 2, err: fmt.Errorf("--store %q: want %s, %s or %s", kind, demoStoreAuto, demoStoreServer, demoStoreEmbedded)}
}

// demoRedisBinary is the Redis server looked up on PATH.
const demoRedisBinary = "redis-server"

func startEmbeddedStore() (redis.UniversalClient, string, func(), error) {
	m, err := miniredis.Run()
	if err != nil {
		return nil, "", nil, fmt.Errorf("demo: start embedded store: %w", err)
	}
	rdb := redis.NewClient(&redis.Options{Addr: m.Addr()})
	return rdb, "embedded (miniredis)", func() { _ = rdb.Close(); m.Close() }, nil
}

// startRedisServer runs bin on a free loopback port without persistence,
// in a temporary directory removed when it stops.
func startRedisServer(ctx context.Context, bin string) (redis.UniversalClient, string, func(), error) {
	dir, err := os.MkdirTemp("", "ripen-demo-redis-")
	if err != nil {
		return nil, "", nil, fmt.Errorf("demo: %w", err)
	}
	var lastErr error
	for range 3 { // the free port may be taken between probe and bind
		port, err := freePort()
		if err != nil {
			lastErr = err
			continue
		}
		var out bytes.Buffer
		cmd := exec.Command(bin, "--port", strconv.Itoa(port), "--bind", "127.0.0.1", "--save", "", "--appendonly", "no",
			"--dir", dir, "--daemonize", "no", "--loglevel", "warning")
		cmd.Stdout, cmd.Stderr = &out, &out
		if err := cmd.Start(); err != nil {
			lastErr = err
			continue
		}
		exited := make(chan struct{})
		go func() { _ = cmd.Wait(); close(exited) }()
		stop := func() {
			_ = cmd.Process.Signal(syscall.SIGTERM)
			select {
			case <-exited:
			case <-time.After(5 * time.Second):
				_ = cmd.Process.Kill()
				<-exited
			}
			_ = os.RemoveAll(dir)
		}
		addr := net.JoinHostPort("127.0.0.1", strconv.Itoa(port))
		rdb := redis.NewClient(&redis.Options{Addr: addr})
		if err := waitPing(ctx, rdb, exited); err != nil {
			_ = rdb.Close()
			stop()
			lastErr = fmt.Errorf("%w (output: %s)", err, strings.TrimSpace(out.String()))
			if dir, err = os.MkdirTemp("", "ripen-demo-redis-"); err != nil {
				return nil, "", nil, fmt.Errorf("demo: %w", err)
			}
			continue
		}
		return rdb, "redis-server on " + addr, func() { _ = rdb.Close(); stop() }, nil
	}
	_ = os.RemoveAll(dir)
	return nil, "", nil, fmt.Errorf("demo: start %s: %w", bin, lastErr)
}

func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, err
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// waitPing waits until rdb answers PING, the process exits or 10s pass.
func waitPing(ctx context.Context, rdb *redis.Client, exited <-chan struct{}) error {
	deadline := time.Now().Add(10 * time.Second)
	for {
		err := rdb.Ping(ctx).Err()
		if err == nil {
			return nil
		}
		select {
		case <-exited:
			return errors.New("redis-server exited at start")
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(20 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("no answer to PING within 10s: %w", err)
		}
	}
}

// allocWatch collects the allocation messages read from the allocation
// topic, as a serving layer would.
type allocWatch struct {
	mu     sync.Mutex
	all    []consumer.Allocation
	bodies [][]byte
	latest consumer.Allocation
	asOf   int64
	seen   chan struct{} // signalled on every new message
}

func newAllocWatch() *allocWatch {
	return &allocWatch{asOf: math.MinInt64, seen: make(chan struct{}, 1)}
}

// read consumes one partition of the allocation topic until ctx ends.
func (w *allocWatch) read(ctx context.Context, brokers []string, topic string, partition int) {
	r := kafka.NewReader(kafka.ReaderConfig{Brokers: brokers, Topic: topic, Partition: partition, MaxWait: 50 * time.Millisecond, StartOffset: kafka.FirstOffset})
	defer r.Close()
	for {
		m, err := r.ReadMessage(ctx)
		if err != nil {
			return // ctx ended (a reader retries transient errors itself)
		}
		var a consumer.Allocation
		if err := json.Unmarshal(m.Value, &a); err != nil {
			continue
		}
		t, err := time.Parse(time.RFC3339Nano, a.AsOf)
		if err != nil {
			continue
		}
		w.mu.Lock()
		w.all = append(w.all, a)
		w.bodies = append(w.bodies, m.Value)
		if t.UnixMilli() >= w.asOf {
			w.latest, w.asOf = a, t.UnixMilli()
		}
		w.mu.Unlock()
		select {
		case w.seen <- struct{}{}:
		default:
		}
	}
}

// waitTick waits until an allocation as of tick or later was read, and
// returns the latest one. It also returns, with ok false unless some
// allocation was read, when skipped reports that the service refitted
// past the tick without publishing (a failed fit is logged and retried on
// the next tick).
func (w *allocWatch) waitTick(ctx context.Context, tick int64, skipped func() bool) (consumer.Allocation, bool, error) {
	deadline := time.NewTimer(demoWaitTimeout)
	defer deadline.Stop()
	poll := time.NewTicker(20 * time.Millisecond)
	defer poll.Stop()
	for {
		w.mu.Lock()
		latest, asOf := w.latest, w.asOf
		w.mu.Unlock()
		if asOf >= tick {
			return latest, true, nil
		}
		if skipped() {
			// Give the publication of this refit a moment to be read.
			select {
			case <-w.seen:
				continue
			case <-time.After(200 * time.Millisecond):
			}
			w.mu.Lock()
			latest, asOf = w.latest, w.asOf
			w.mu.Unlock()
			return latest, asOf != math.MinInt64, nil
		}
		select {
		case <-ctx.Done():
			return consumer.Allocation{}, false, ctx.Err()
		case <-deadline.C:
			return consumer.Allocation{}, false, fmt.Errorf("no refit within %v", demoWaitTimeout)
		case <-w.seen:
		case <-poll.C:
		}
	}
}

// history returns the allocations read, by seq, once each.
func (w *allocWatch) history() []consumer.Allocation {
	w.mu.Lock()
	all := slices.Clone(w.all)
	w.mu.Unlock()
	slices.SortStableFunc(all, func(a, b consumer.Allocation) int { return int(a.Seq - b.Seq) })
	return slices.CompactFunc(all, func(a, b consumer.Allocation) bool { return a.Seq == b.Seq })
}

// raw returns the messages read, as read.
func (w *allocWatch) raw() [][]byte {
	w.mu.Lock()
	defer w.mu.Unlock()
	return slices.Clone(w.bodies)
}

// demoGenerator produces the scenario's clicks and conversions in event
// time order, chunk by chunk, splitting clicks by the weights it is given.
// Arrivals are a Poisson process with the scenario's (diurnal) rate by
// thinning (Lewis & Shedler 1979); an arm's clicks convert with its true
// eventual rate after a delay from its delay distribution truncated at the
// window (sim.Truncated).
type demoGenerator struct {
	sc       sim.Scenario
	arms     []string
	delays   []sim.Truncated
	r        *rand.Rand
	base     float64 // clicks per ms
	amp      float64
	windowMs int64
	t        float64 // elapsed ms of the last candidate arrival
	pending  convHeap
	clicks   []int // per arm
	convs    []int // per arm, emitted
	n        int
}

// demoStreamKey is the PCG stream constant of the demo's traffic.
const demoStreamKey = 0x71756c6c6d6f7373 // arbitrary

func newDemoGenerator(sc sim.Scenario) (*demoGenerator, error) {
	g := &demoGenerator{
		sc: sc, arms: sc.ArmNames(),
		r:        rand.New(rand.NewPCG(sc.Seed, demoStreamKey)),
		base:     sc.ClicksPerHour / 3.6e6,
		amp:      sc.DiurnalAmplitude,
		windowMs: sc.Window.D().Milliseconds(),
		clicks:   make([]int, len(sc.Arms)),
		convs:    make([]int, len(sc.Arms)),
	}
	for _, a := range sc.Arms {
		d, err := a.Delay.Distribution()
		if err != nil {
			return nil, fmt.Errorf("demo scenario: arm %q: %w", a.Name, err)
		}
		t, err := sim.NewTruncated(d, sc.Window.D().Seconds())
		if err != nil {
			return nil, fmt.Errorf("demo scenario: arm %q: %w", a.Name, err)
		}
		g.delays = append(g.delays, t)
	}
	return g, nil
}

// rate is the click rate per ms at elapsed time t (ms): the scenario's
// ClicksPerHour modulated by a day cycle peaking at 12:00 UTC.
func (g *demoGenerator) rate(t float64) float64 {
	hour := math.Mod(float64(sim.Start)+t, 8.64e7) / 3.6e6
	return g.base * (1 + g.amp*math.Sin(2*math.Pi*(hour-6)/24))
}

// arrival returns the elapsed ms of the next click.
func (g *demoGenerator) arrival() int64 {
	peak := g.base * (1 + g.amp)
	for {
		g.t += g.r.ExpFloat64() / peak
		if g.amp == 0 || g.r.Float64()*peak < g.rate(g.t) {
			return int64(g.t)
		}
	}
}

// chunk returns the clicks up to and including the first one at or after
// elapsed time target (ms), and the conversions due before target, each in
// time order; clicks go to the arms in proportion to weights. Ending on a
// click past the target lets the watermark pass target minus the lateness
// whatever the gaps in the traffic; every other event of the chunk is
// earlier than target.
func (g *demoGenerator) chunk(target int64, weights []float64) (clicks, convs []kafka.Message) {
	due := func(limit int64) {
		for g.pending.Len() > 0 && g.pending[0].ts-sim.Start < limit {
			convs = append(convs, g.popConversion())
		}
	}
	for {
		t := g.arrival()
		due(min(t+1, target))
		arm := sim.PickArm(weights, g.r.Float64())
		g.n++
		id := fmt.Sprintf("qm-%07d", g.n)
		ts := sim.Start + t
		clicks = append(clicks, message(id, consumer.Click{ClickID: id, Experiment: g.sc.Name, Arm: g.arms[arm], TS: ts}))
		g.clicks[arm]++
		q := g.sc.CVRAt(time.Duration(t) * time.Millisecond)[arm]
		if g.r.Float64() < q {
			d := int64(math.Round(g.delays[arm].Sample(g.r) * 1000))
			d = min(max(d, 0), g.windowMs-1)
			heap.Push(&g.pending, pendingConv{ts: ts + d, arm: arm, msg: message(id, consumer.Conversion{ClickID: id, TS: ts + d})})
		}
		if t >= target {
			due(target)
			return clicks, convs
		}
	}
}

func (g *demoGenerator) popConversion() kafka.Message {
	c := heap.Pop(&g.pending).(pendingConv)
	g.convs[c.arm]++
	return c.msg
}

func message(key string, v json.Marshaler) kafka.Message {
	b, err := v.MarshalJSON()
	if err != nil {
		panic(fmt.Sprintf("encode demo event: %v", err)) // plain structs always encode
	}
	return kafka.Message{Key: []byte(key), Value: b}
}

// pendingConv is a conversion waiting for its event time.
type pendingConv struct {
	ts  int64
	arm int
	msg kafka.Message
}

// convHeap is a min-heap of pending conversions by time.
type convHeap []pendingConv

func (h convHeap) Len() int           { return len(h) }
func (h convHeap) Less(i, j int) bool { return h[i].ts < h[j].ts }
func (h convHeap) Swap(i, j int)      { h[i], h[j] = h[j], h[i] }
func (h *convHeap) Push(x any)        { *h = append(*h, x.(pendingConv)) }
func (h *convHeap) Pop() any {
	old := *h
	x := old[len(old)-1]
	*h = old[:len(old)-1]
	return x
}

// demoView prints the live view: a redrawn frame on a terminal, one line
// per update otherwise.
type demoView struct {
	w        io.Writer
	tty      bool
	sc       sim.Scenario
	store    string
	best     string
	lastLine time.Time
}

func newDemoView(w io.Writer, sc sim.Scenario, store string) *demoView {
	v := &demoView{w: w, sc: sc, store: store}
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
	if !v.tty {
		fmt.Fprintf(w, "ripen demo: %s, %v of simulated traffic, state store %s\n", sc.Name, sc.Horizon.D(), store)
	}
	return v
}

func (v *demoView) update(tick int64, g *demoGenerator, a consumer.Allocation, began time.Time) {
	day := float64(tick-sim.Start) / 8.64e7
	if !v.tty {
		var b strings.Builder
		fmt.Fprintf(&b, "day %5.2f  %-10s", day, a.Status)
		for _, arm := range v.sc.Arms {
			r := armReport(a, arm.Name)
			if r == nil {
				continue
			}
			fmt.Fprintf(&b, "  %s w=%.2f obs=%s ev=%s", arm.Name, r.Weight, pctOrDash(r.ObservedCVR), pctOrDash(r.EventualCVR))
		}
		fmt.Fprintln(v.w, b.String())
		return
	}
	var b bytes.Buffer
	b.WriteString("\033[H\033[2J")
	fmt.Fprintf(&b, "ripen demo — %s\n%s\n\n", v.sc.Name, v.sc.Description)
	fmt.Fprintf(&b, "simulated day %.1f of %.3g · %d clicks · %d conversions · %s · %.1fs\n",
		day, v.sc.Horizon.Hours()/24, sum(g.clicks), sum(g.convs), v.store, time.Since(began).Seconds())
	fmt.Fprintf(&b, "status %s · leader %s · policy %s\n\n", a.Status, a.Leader, a.Policy)
	v.table(&b, a, tick)
	_, _ = v.w.Write(b.Bytes())
}

// table prints one row per arm of allocation a.
func (v *demoView) table(w io.Writer, a consumer.Allocation, at int64) {
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
			pctOrDash(r.ObservedCVR), pctOrDash(r.EventualCVR), pctOrDash(r.CVRLow), pctOrDash(r.CVRHigh), pctOrDash(q[i]), r.PBest)
	}
	_ = tw.Flush()
}

func (v *demoView) summary(a consumer.Allocation, g *demoGenerator, published int, dir string, elapsed time.Duration) {
	fmt.Fprintf(v.w, "\nripen demo: %v of traffic (%d clicks, %d conversions) in %.1fs; %d allocations published; final status %s, leader %s (best arm: %s)\n\n",
		v.sc.Horizon.D(), sum(g.clicks), sum(g.convs), elapsed.Seconds(), published, a.Status, a.Leader, v.best)
	at, _ := time.Parse(time.RFC3339Nano, a.AsOf)
	v.table(v.w, a, at.UnixMilli())
	fmt.Fprintf(v.w, "\nreport: %s\n", filepath.Join(dir, "index.html"))
}

func sum(xs []int) int {
	n := 0
	for _, x := range xs {
		n += x
	}
	return n
}

// writeDemoReport writes the charts and the allocations read to dir.
func writeDemoReport(dir string, sc sim.Scenario, history []consumer.Allocation, ex *state.Experiment, raw [][]byte) error {
	truth := &armTruth{
		CVR: func(at int64) map[string]float64 {
			q := sc.CVRAt(time.Duration(at-sim.Start) * time.Millisecond)
			m := make(map[string]float64, len(q))
			for i, a := range sc.Arms {
				m[a.Name] = q[i]
			}
			return m
		},
		DelayCDF: map[string]func(float64) float64{},
	}
	for _, a := range sc.Arms {
		d, err := a.Delay.Distribution()
		if err != nil {
			return fmt.Errorf("demo report: arm %q: %w", a.Name, err)
		}
		t, err := sim.NewTruncated(d, sc.Window.D().Seconds())
		if err != nil {
			return fmt.Errorf("demo report: arm %q: %w", a.Name, err)
		}
		truth.DelayCDF[a.Name] = t.CDF
	}
	v := experimentView{
		ID:    sc.Name,
		Title: "ripen demo: " + sc.Name,
		Notes: []string{sc.Description, fmt.Sprintf("Simulated traffic: %g clicks per hour on average over %v, split by the published weights; refit every %v; attribution window %v. Hours count from the start of the experiment.",
			sc.ClicksPerHour, sc.Horizon.D(), sc.UpdateInterval.D(), sc.Window.D())},
		History: history,
		State:   ex,
		Origin:  sim.Start,
		Truth:   truth,
	}
	page, err := experimentPage(v)
	if err != nil {
		return fmt.Errorf("demo report: %w", err)
	}
	if err := report.WriteDir(dir, page); err != nil {
		return fmt.Errorf("--report: %w", err)
	}
	var b bytes.Buffer
	for _, m := range raw {
		b.Write(m)
		b.WriteByte('\n')
	}
	if err := os.WriteFile(filepath.Join(dir, "allocations.jsonl"), b.Bytes(), 0o644); err != nil {
		return fmt.Errorf("--report: %w", err)
	}
	return nil
}
