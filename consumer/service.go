package consumer

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"time"

	"github.com/segmentio/kafka-go"
	"go.uber.org/zap"

	"ripen/estimator"
	"ripen/state"
)

// RefitFunc evaluates one experiment: fits its arms and allocates traffic.
// Default: estimator.EvaluateExperiment.
type RefitFunc func(estimator.ExperimentInput) (estimator.ExperimentReport, error)

// Deps are the collaborators of a Service.
type Deps struct {
	// Store is the Redis state store. Required.
	Store *state.Store
	// Logger receives operational logs. Default: a no-op logger.
	Logger *zap.Logger
	// Metrics are updated as the service runs. Default: none.
	Metrics *Metrics
	// Refit evaluates experiments on refit ticks. Default:
	// estimator.EvaluateExperiment.
	Refit RefitFunc
	// NoAllocationTopic keeps allocations off the allocation topic; they
	// are still computed, stored and appended to the history (a replay).
	// Default: false (publish).
	NoAllocationTopic bool
	// NoDeadLetterTopic keeps dead letters off the dead-letter topic; they
	// are still counted (a replay, whose dead letters the live service
	// wrote already). Default: false (write them).
	NoDeadLetterTopic bool
	// FixedPrefix keeps the Store's prefix instead of following the live
	// prefix pointer under it (see state.LiveKey). Default: false (follow).
	FixedPrefix bool
	// LiveCheckEvery is how often the live prefix pointer is read.
	// Default: 2s.
	LiveCheckEvery time.Duration
}

// DefaultLiveCheckEvery is the default of Deps.LiveCheckEvery.
const DefaultLiveCheckEvery = 2 * time.Second

// Retry backoff for Redis and Kafka writes: doubling from backoffMin up to
// backoffMax.
const (
	backoffMin = 50 * time.Millisecond
	backoffMax = 5 * time.Second
)

// Service is `ripen run`: it consumes the click and conversion topics in a
// consumer group, joins conversions to clicks, applies per-experiment
// deltas to Redis with the offsets they cover, refits experiments on
// event-time ticks and publishes their traffic weights. It implements
// StatusSource for the HTTP endpoints.
//
// Determinism. Refit ticks are the multiples of pipeline.refit_every in
// event time (aligned to the Unix epoch). Every instance records in Redis,
// per partition it owns, the latest event time it read and the time
// through which it applied the partition's events; the group's watermark
// and refit barrier are computed from every partition's record, not just
// the instance's own (see groupTimes). Events after the next tick boundary
// are held back (each partition's longest run of events at or before the
// boundary, in offset order, is applied) until every refit of that tick is
// done. Each experiment is refitted and published by one instance only:
// the owner of click partition fnv32a(experiment) mod the number of click
// partitions, once every partition applied its events through the tick.
// So the refit at tick T sees exactly the events at or before T, at state
// watermark at most T, whoever consumed them and however they were
// batched; evaluations are cold-started and seeded by experiment and
// as-of time, and the previous weights come from Redis. Guarantee: a
// replay of the same topics publishes the same sequence of weights as long
// as no event is more than pipeline.lateness out of order within its
// partition (later ones are still counted, possibly after a refit they
// belonged to), the hold-back cap is not exceeded and no partition turns
// idle while others still lag (a live-mode liveness rule that wall-clock
// pauses of the producers can trigger).
type Service struct {
	cfgMu sync.RWMutex
	cfg   Config

	store       *state.Store // the live prefix's store; replaced only between consumer-group sessions (see consumeLive)
	root        *state.Store // the configured prefix, holder of the live pointer
	follow      bool
	liveEvery   time.Duration
	log         *zap.Logger
	metrics     *Metrics
	refitFn     RefitFunc
	deadLetters *deadLetters
	alloc       messageWriter

	mu        sync.Mutex
	redisUp   bool
	inGroup   bool
	known     map[string]bool  // experiments admitted under limits.max_experiments
	published map[string]int64 // seq of the last allocation this instance wrote, per experiment
	watermark int64
	// fenceReset is set once the fencing base was raised for
	// pipeline.reset_fencing (it is done once per run).
	fenceReset bool
	// overflows counts hold-back overflows (pipeline.holdback_cap).
	overflows int

	hooks testHooks
}

// testHooks let tests stop the pipeline at chosen points, as a crash would,
// or slow it down. An error aborts the run at once, without any graceful
// step.
type testHooks struct {
	// afterApply runs after each experiment's delta is applied.
	afterApply func(experiment string) error
	// afterSweepMark runs after the orphan sweep marked and read the due
	// orphans of a partition, before anything is applied.
	afterSweepMark func() error
	// beforeSweepSettle runs after the sweep applied and dead-lettered
	// them, before they are deleted.
	beforeSweepSettle func() error
	// beforeStep runs before each pipeline step (a flush).
	beforeStep func()
	// onTimes observes the group times each step computed.
	onTimes func(groupTimes)
}

// New returns a Service for cfg (defaults applied, then validated).
func New(cfg Config, deps Deps) (*Service, error) {
	cfg = cfg.WithDefaults()
	if err := cfg.Validate(); err != nil {
		return nil, fmt.Errorf("new service: %w", err)
	}
	if deps.Store == nil {
		return nil, errors.New("new service: a state store is required")
	}
	if deps.Logger == nil {
		deps.Logger = zap.NewNop()
	}
	if deps.Refit == nil {
		deps.Refit = estimator.EvaluateExperiment
	}
	if deps.LiveCheckEvery <= 0 {
		deps.LiveCheckEvery = DefaultLiveCheckEvery
	}
	transport, err := KafkaTransport(cfg.Kafka)
	if err != nil {
		return nil, fmt.Errorf("new service: %w", err)
	}
	s := &Service{
		cfg:       cfg,
		store:     deps.Store,
		root:      deps.Store,
		follow:    !deps.FixedPrefix,
		liveEvery: deps.LiveCheckEvery,
		log:       deps.Logger,
		metrics:   deps.Metrics,
		refitFn:   deps.Refit,
		known:     map[string]bool{},
		published: map[string]int64{},
		watermark: noTime,
	}
	s.deadLetters = &deadLetters{w: newWriter(cfg.Kafka, cfg.Kafka.DeadLetterTopic, transport, deadLetterBatch), metrics: deps.Metrics}
	s.alloc = newWriter(cfg.Kafka, cfg.Kafka.AllocationTopic, transport, 1)
	if deps.NoDeadLetterTopic {
		s.deadLetters.w = discardWriter{}
	}
	if deps.NoAllocationTopic {
		s.alloc = discardWriter{}
	}
	return s, nil
}

// deadLetterBatch is the batch size of the dead-letter writer: a flush
// writes its dead letters in one call.
const deadLetterBatch = 1000

// newWriter returns a synchronous writer to topic that waits for every
// in-sync replica, with batches of batch messages and a short batch
// timeout. A synchronous call whose messages do not fill a batch waits
// for the timeout (kafka-go sends a partial batch only then), so the
// allocation writer, which writes one message a call, has batches of one
// and sends each at once.
func newWriter(k KafkaConfig, topic string, t *kafka.Transport, batch int) *kafka.Writer {
	return &kafka.Writer{
		Addr:         kafka.TCP(k.Brokers...),
		Topic:        topic,
		Balancer:     &kafka.Hash{},
		RequiredAcks: kafka.RequireAll,
		BatchTimeout: 10 * time.Millisecond,
		BatchSize:    batch,
		MaxAttempts:  3,
		Transport:    t,
	}
}

// config returns the configuration in force (control messages included).
func (s *Service) config() Config {
	s.cfgMu.RLock()
	defer s.cfgMu.RUnlock()
	return s.cfg
}

// Run consumes until ctx is cancelled, then stops fetching, flushes and
// commits what it read, publishes pending allocations and returns nil,
// within cfg.ShutdownTimeout. It returns an error only for failures it
// cannot recover from.
func (s *Service) Run(ctx context.Context) error {
	cfg := s.config()
	defer func() {
		if err := s.deadLetters.w.Close(); err != nil {
			s.log.Warn("close dead-letter writer", zap.Error(err))
		}
		if err := s.alloc.Close(); err != nil {
			s.log.Warn("close allocation writer", zap.Error(err))
		}
	}()
	if err := s.retry(ctx, "list experiments", func(ctx context.Context) error {
		ids, err := s.store.Experiments(ctx)
		if err != nil {
			return err
		}
		s.mu.Lock()
		for _, id := range ids {
			s.known[id] = true
		}
		s.mu.Unlock()
		return nil
	}); err != nil {
		if ctx.Err() != nil {
			return nil
		}
		return fmt.Errorf("run: %w", err)
	}
	s.updateExperimentsGauge()
	var wg sync.WaitGroup
	ctlCtx, stopCtl := context.WithCancel(ctx)
	wg.Add(1)
	go func() {
		defer wg.Done()
		s.consumeControl(ctlCtx)
	}()
	defer func() {
		stopCtl()
		wg.Wait()
	}()
	err := s.consumeLive(ctx, cfg)
	if errors.Is(err, errCrash) {
		return err
	}
	if err != nil {
		return fmt.Errorf("run: %w", err)
	}
	return nil
}

// errCrash marks an abort requested by a test hook.
var errCrash = errors.New("simulated crash")

// retry runs fn until it succeeds, fails for good, or ctx ends. Retriable
// state errors and every Kafka write error are retried with capped
// exponential backoff; while Redis fails the service reports not ready.
func (s *Service) retry(ctx context.Context, op string, fn func(context.Context) error) error {
	wait := backoffMin
	for attempt := 1; ; attempt++ {
		err := fn(ctx)
		if err == nil {
			if attempt > 1 {
				s.log.Info("recovered", zap.String("op", op), zap.Int("attempts", attempt))
			}
			if isStateOp(op) {
				s.setRedisUp(true)
			}
			return nil
		}
		var se *state.Error
		isState := errors.As(err, &se)
		if isState && !se.Retriable {
			s.setRedisUp(true) // Redis answered; the request was refused
			return fmt.Errorf("%s: %w", op, err)
		}
		if isState {
			s.setRedisUp(false)
		}
		if ctx.Err() != nil {
			return fmt.Errorf("%s: %w (after %d attempts: %w)", op, ctx.Err(), attempt, err)
		}
		s.log.Warn("retrying", zap.String("op", op), zap.Int("attempt", attempt), zap.Duration("backoff", wait), zap.Error(err))
		t := time.NewTimer(wait)
		select {
		case <-ctx.Done():
			t.Stop()
			return fmt.Errorf("%s: %w (after %d attempts: %w)", op, ctx.Err(), attempt, err)
		case <-t.C:
		}
		wait = min(2*wait, backoffMax)
	}
}

// isStateOp reports whether op is a Redis operation (vs a Kafka write).
func isStateOp(op string) bool {
	switch op {
	case "write dead letters", "publish allocation", "kafka metadata":
		return false
	}
	return true
}

func (s *Service) setRedisUp(up bool) {
	s.mu.Lock()
	s.redisUp = up
	s.mu.Unlock()
	if s.metrics != nil {
		v := 0.0
		if up {
			v = 1
		}
		s.metrics.RedisUp.Set(v)
	}
}

func (s *Service) setInGroup(in bool) {
	s.mu.Lock()
	s.inGroup = in
	s.mu.Unlock()
}

func (s *Service) setWatermark(wm int64) {
	s.mu.Lock()
	s.watermark = max(s.watermark, wm)
	s.mu.Unlock()
	if s.metrics != nil {
		s.metrics.Watermark.Set(float64(wm) / 1000)
	}
}

// admitExperiment admits a new experiment unless limit (> 0) experiments
// are known already; known experiments are always admitted.
func (s *Service) admitExperiment(id string, limit int) bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.known[id] {
		return true
	}
	if limit > 0 && len(s.known) >= limit {
		return false
	}
	s.known[id] = true
	if s.metrics != nil {
		s.metrics.Experiments.Set(float64(len(s.known)))
	}
	return true
}

func (s *Service) updateExperimentsGauge() {
	if s.metrics == nil {
		return
	}
	s.mu.Lock()
	n := len(s.known)
	s.mu.Unlock()
	s.metrics.Experiments.Set(float64(n))
}

// Ready reports nil when the service is in its consumer group and its last
// Redis call succeeded.
func (s *Service) Ready(ctx context.Context) error {
	s.mu.Lock()
	up, in := s.redisUp, s.inGroup
	s.mu.Unlock()
	switch {
	case !up:
		return errors.New("redis unavailable")
	case !in:
		return errors.New("not in the consumer group yet")
	}
	return nil
}

// Experiments lists the experiments with stored state.
func (s *Service) Experiments(ctx context.Context) ([]string, error) {
	ids, err := s.currentStore().Experiments(ctx)
	if err != nil {
		return nil, fmt.Errorf("experiments: %w", err)
	}
	return ids, nil
}

// Store returns the state store of the live prefix, which the service
// reads and writes (it follows a replay's switch).
func (s *Service) Store() *state.Store { return s.currentStore() }

// Watermark returns the group's event-time watermark as last computed
// (Unix ms), and false before the first.
func (s *Service) Watermark() (int64, bool) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.watermark, s.watermark != noTime
}

// LatestAllocation returns the experiment's latest allocation message as
// published (JSON with its seq), and false if none was published.
func (s *Service) LatestAllocation(ctx context.Context, experiment string) ([]byte, bool, error) {
	seq, body, err := s.currentStore().LatestAllocation(ctx, experiment)
	if errors.Is(err, state.ErrNotFound) {
		return nil, false, nil
	}
	if err != nil {
		return nil, false, fmt.Errorf("latest allocation: %w", err)
	}
	msg, err := withSeq(body, seq)
	if err != nil {
		return nil, false, fmt.Errorf("latest allocation of %q: %w", experiment, err)
	}
	return msg, true, nil
}

// applyControl puts a control message in force.
func (s *Service) applyControl(key, value []byte) error {
	s.cfgMu.Lock()
	defer s.cfgMu.Unlock()
	next, err := s.cfg.ApplyControl(key, value)
	if err != nil {
		return err
	}
	s.cfg = next
	return nil
}
