package consumer

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"sync"
	"time"

	"github.com/segmentio/kafka-go"
	"go.uber.org/zap"

	"ripen/state"
)

// Group timing. Short enough that a rebalance after a crash takes seconds.
const (
	groupHeartbeat    = 500 * time.Millisecond
	groupSession      = 6 * time.Second
	groupRebalance    = 10 * time.Second
	groupJoinBackoff  = 500 * time.Millisecond
	readerMaxWait     = 200 * time.Millisecond
	readerMaxBytes    = 10 << 20
	fetchBufferFactor = 2 // channel capacity, in units of FlushEvents
	// barrierInterval is the step period while events are held back.
	barrierInterval = 100 * time.Millisecond
	// catchUpSteps bounds the steps taken back to back while each one
	// moves towards the barrier and events are still held back.
	catchUpSteps = 64
)

// consume joins the consumer group over the click and conversion topics
// and runs one pipeline per generation until ctx is cancelled.
func (s *Service) consume(ctx context.Context, cfg Config) error {
	dialer, err := KafkaDialer(cfg.Kafka)
	if err != nil {
		return err
	}
	if cfg.indexes() {
		// The index's horizon is the longest window configured; an
		// experiment with a longer one raises it when its clicks come.
		if err := s.retry(ctx, "open click index", func(ctx context.Context) error {
			_, err := s.store.OpenClickIndex(ctx, state.ClickIndexOptions{
				Horizon:        cfg.longestWindow(),
				ProgressTopics: []string{cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic},
			})
			return err
		}); err != nil {
			if ctx.Err() != nil {
				return nil
			}
			return err
		}
	}
	group, err := kafka.NewConsumerGroup(kafka.ConsumerGroupConfig{
		ID:                cfg.Kafka.Group,
		Brokers:           cfg.Kafka.Brokers,
		Dialer:            dialer,
		Topics:            []string{cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic},
		HeartbeatInterval: groupHeartbeat,
		SessionTimeout:    groupSession,
		RebalanceTimeout:  groupRebalance,
		JoinGroupBackoff:  groupJoinBackoff,
		StartOffset:       kafka.FirstOffset,
		ErrorLogger:       kafka.LoggerFunc(func(f string, a ...any) { s.log.Sugar().Debugf("kafka group: "+f, a...) }),
	})
	if err != nil {
		return fmt.Errorf("consumer group: %w", err)
	}
	defer func() {
		if err := group.Close(); err != nil {
			s.log.Warn("leave consumer group", zap.Error(err))
		}
		s.setInGroup(false)
	}()
	for {
		gen, err := group.Next(ctx)
		if ctx.Err() != nil {
			return nil
		}
		if err != nil {
			s.log.Warn("join consumer group", zap.Error(err))
			s.setInGroup(false)
			continue // Next backs off by itself
		}
		s.setInGroup(true)
		err = s.runGeneration(ctx, dialer, gen)
		switch {
		case errors.Is(err, errCrash):
			return err
		case errors.Is(err, errFenced):
			s.log.Warn("generation fenced; rejoining", zap.Int32("generation", gen.ID), zap.Error(err))
		case err != nil && ctx.Err() == nil:
			return err
		}
		if ctx.Err() != nil {
			return nil
		}
	}
}

// runGeneration consumes the partitions assigned in gen: each from its
// resume offset in Redis, flushing batches until the generation ends or ctx
// is cancelled; then it flushes what it read and returns.
func (s *Service) runGeneration(ctx context.Context, dialer *kafka.Dialer, gen *kafka.Generation) error {
	cfg := s.config()
	var assigned []state.TopicPartition
	for topic, parts := range gen.Assignments {
		for _, p := range parts {
			assigned = append(assigned, state.TopicPartition{Topic: topic, Partition: p.ID})
		}
	}
	slices.SortFunc(assigned, compareTP)
	s.log.Info("generation assigned", zap.Int32("generation", gen.ID), zap.Int("partitions", len(assigned)))

	// Resume offsets from Redis (the authority); Kafka's committed offsets
	// only serve lag monitoring.
	start := map[state.TopicPartition]int64{}
	for _, tp := range assigned {
		var off int64
		err := s.retry(ctx, "resume", func(ctx context.Context) error {
			var err error
			off, err = s.store.Resume(ctx, tp.Topic, tp.Partition)
			if errors.Is(err, state.ErrNotFound) {
				off, err = kafka.FirstOffset, nil
			}
			return err
		})
		if err != nil {
			return fmt.Errorf("generation %d: %w", gen.ID, err)
		}
		start[tp] = off
	}

	// Every partition of both input topics (the group's, not just ours):
	// the watermark and the refit barrier are computed over all of them.
	meta := partitionMeta{empty: map[state.TopicPartition]bool{}, clickTopic: cfg.Kafka.ClickTopic}
	ends := map[state.TopicPartition][2]int64{}
	for _, topic := range []string{cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic} {
		var parts []kafka.Partition
		err := s.retry(ctx, "kafka metadata", func(ctx context.Context) error {
			var err error
			parts, err = dialer.LookupPartitions(ctx, "tcp", cfg.Kafka.Brokers[0], topic)
			return err
		})
		if err != nil {
			return fmt.Errorf("generation %d: partitions of %s: %w", gen.ID, topic, err)
		}
		for _, p := range parts {
			tp := state.TopicPartition{Topic: topic, Partition: p.ID}
			var first, last int64
			err := s.retry(ctx, "kafka metadata", func(ctx context.Context) error {
				conn, err := dialer.DialLeader(ctx, "tcp", cfg.Kafka.Brokers[0], tp.Topic, tp.Partition)
				if err != nil {
					return err
				}
				defer conn.Close()
				first, last, err = conn.ReadOffsets()
				return err
			})
			if err != nil {
				return fmt.Errorf("generation %d: offsets of %s: %w", gen.ID, tp, err)
			}
			meta.all = append(meta.all, tp)
			meta.empty[tp] = first >= last
			ends[tp] = [2]int64{first, last}
			if topic == cfg.Kafka.ClickTopic {
				meta.clickParts = max(meta.clickParts, p.ID+1)
			}
		}
	}
	slices.SortFunc(meta.all, compareTP)

	base, err := s.fencingBase(ctx, cfg, gen.ID)
	if err != nil {
		return fmt.Errorf("generation %d: %w", gen.ID, err)
	}
	now := time.Now()
	g := &genState{
		s: s, id: base + gen.ID, assigned: assigned,
		exps: map[string]*expInfo{}, capped: map[string]bool{},
		commit: gen.CommitOffsets, meta: meta, own: map[state.TopicPartition]*ownedPart{},
		times: unknownTimes, swept: map[state.TopicPartition]int64{}, retiredAt: noTime, retireNext: noTime,
	}
	for _, tp := range assigned {
		// A partition with nothing to read is caught up from the start.
		e := ends[tp]
		off := start[tp]
		g.own[tp] = &ownedPart{seen: noTime, lastRead: now, caughtUp: off >= e[1] || (off < 0 && e[0] >= e[1]), gate: newReadGate(partitionHoldCap(cfg, len(assigned)))}
	}

	done := make(chan error, 1)
	gen.Start(func(genCtx context.Context) {
		done <- s.pipeline(ctx, genCtx, gen, dialer, g, start)
	})
	return <-done
}

// compareTP orders partitions by topic, then number.
func compareTP(a, b state.TopicPartition) int {
	if a.Topic != b.Topic {
		if a.Topic < b.Topic {
			return -1
		}
		return 1
	}
	return a.Partition - b.Partition
}

// fencingBase returns the group's fencing base (added to Kafka generation
// ids to form the writer epoch), raising it first above every stored
// generation when pipeline.reset_fencing asks for it (once per run).
func (s *Service) fencingBase(ctx context.Context, cfg Config, genID int32) (int32, error) {
	s.mu.Lock()
	reset := cfg.Pipeline.ResetFencing && !s.fenceReset
	s.mu.Unlock()
	var base int32
	err := s.retry(ctx, "fencing base", func(ctx context.Context) error {
		var err error
		if reset {
			base, err = s.store.ResetFencing(ctx, cfg.Kafka.Group, genID)
		} else {
			base, err = s.store.FencingBase(ctx, cfg.Kafka.Group)
		}
		return err
	})
	if err != nil {
		return 0, err
	}
	if reset {
		s.mu.Lock()
		s.fenceReset = true
		s.mu.Unlock()
		s.log.Warn("fencing reset: writer epochs now start above every stored generation", zap.String("group", cfg.Kafka.Group), zap.Int32("base", base))
	}
	return base, nil
}

// pipeline starts one reader per assigned partition and steps (see
// genState.step) every FlushEvents messages read or FlushInterval.
func (s *Service) pipeline(ctx, genCtx context.Context, gen *kafka.Generation, dialer *kafka.Dialer, g *genState, start map[state.TopicPartition]int64) error {
	cfg := s.config()
	fetchCtx, stopFetch := context.WithCancel(genCtx)
	in := make(chan fetched, fetchBufferFactor*cfg.Pipeline.FlushEvents)
	var readers sync.WaitGroup
	for _, tp := range g.assigned {
		readers.Add(1)
		gen.Start(func(context.Context) {
			defer readers.Done()
			s.readPartition(fetchCtx, dialer, cfg, tp, start[tp], in, g.own[tp].gate)
		})
	}
	defer func() {
		stopFetch()
		readers.Wait()
	}()

	// A step in progress is finished even when the generation ends or ctx
	// is cancelled meanwhile (an aborted flush leaves half-done join work
	// and resume offsets ahead of the Kafka commit); after a cancellation
	// its retries are bounded by ShutdownTimeout. A flush that outlives the
	// rebalance timeout is refused by the fencing check.
	runCtx, stopRun := context.WithCancel(context.WithoutCancel(ctx))
	defer stopRun()
	go func() {
		select {
		case <-ctx.Done():
		case <-runCtx.Done():
			return
		}
		t := time.NewTimer(cfg.ShutdownTimeout)
		defer t.Stop()
		select {
		case <-t.C:
			stopRun()
		case <-runCtx.Done():
		}
	}()

	pending := 0
	timer := time.NewTimer(cfg.Pipeline.FlushInterval)
	defer timer.Stop()
	step := func(sctx context.Context) error {
		pending = 0
		for i := 1; ; i++ {
			before, times := g.advances, g.times
			if err := g.step(sctx); err != nil {
				return err
			}
			// While events wait for the barrier and this step moved
			// towards it (released events, swept, refitted a tick, or
			// learnt of the group's progress), step again at once: a
			// replay then crosses a tick in a few back-to-back steps,
			// not one per barrierInterval.
			if (g.advances == before && g.times == times) || i == catchUpSteps {
				return nil
			}
			// Take in what the readers fetched meanwhile (without
			// waiting), so that the next step can release it.
			for drained := false; !drained; {
				select {
				case m := <-in:
					g.receive(m, cfg, time.Now())
				default:
					drained = true
				}
			}
			if g.heldTotal == 0 {
				return nil
			}
		}
	}
	// final steps once more after fetching stopped (held events stay
	// unapplied; their offsets are read again by the next owner).
	final := func() error {
		stopFetch()
		sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), cfg.ShutdownTimeout)
		defer cancel()
		return step(sctx)
	}
	for {
		select {
		case m := <-in:
			g.receive(m, cfg, time.Now())
			pending++
			if pending >= cfg.Pipeline.FlushEvents {
				if err := step(runCtx); err != nil {
					return s.endGeneration(ctx, err)
				}
			}
		case <-timer.C:
			if err := step(runCtx); err != nil {
				return s.endGeneration(ctx, err)
			}
			// While events wait for the group's refit barrier, step
			// more often: each tick needs a few rounds through Redis.
			next := cfg.Pipeline.FlushInterval
			if g.heldTotal > 0 {
				next = min(next, barrierInterval)
			}
			timer.Reset(next)
		case <-ctx.Done():
			// Graceful stop: stop fetching, flush what may be applied,
			// commit.
			if err := final(); err != nil {
				s.log.Error("final flush on shutdown", zap.Error(err))
				if errors.Is(err, errCrash) {
					return err
				}
			}
			return nil
		case <-genCtx.Done():
			// Rebalance: flush what was read before giving the
			// partitions up; the group waits for this.
			if err := final(); err != nil {
				return s.endGeneration(ctx, err)
			}
			return nil
		}
	}
}

// step is one round of the pipeline: read the group's progress, apply the
// held events the boundary lets through, sweep due orphans, retire the
// click index generations the group is done with, report this instance's
// progress, and run the refits this instance owns that the group is
// ready for.
func (g *genState) step(ctx context.Context) error {
	s := g.s
	cfg := s.config()
	if s.hooks.beforeStep != nil {
		s.hooks.beforeStep()
	}
	if err := g.readTimes(ctx); err != nil {
		return err
	}
	b, overflow := g.release(cfg)
	if overflow {
		s.mu.Lock()
		s.overflows++
		s.mu.Unlock()
		if s.metrics != nil {
			s.metrics.HoldbackOverflows.Inc()
		}
		s.log.Warn("hold-back cap exceeded: applying held events early; the next refit may see events after its tick", zap.Int("held", b.len()), zap.Int("cap", cfg.Pipeline.HoldbackCap))
	}
	if _, err := g.flush(ctx, b); err != nil {
		return err
	}
	if err := g.sweep(ctx); err != nil {
		return err
	}
	if err := g.retire(ctx); err != nil {
		return err
	}
	for _, topic := range []string{cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic} {
		parts := g.progress(cfg, time.Now())[topic]
		if err := s.retry(ctx, "report progress", func(ctx context.Context) error {
			return s.store.ReportProgress(ctx, topic, g.id, parts)
		}); err != nil {
			return err
		}
	}
	prog, err := g.readTimesProgress(ctx)
	if err != nil {
		return err
	}
	return g.refitOwned(ctx, prog)
}

// readTimes refreshes the group times from Redis.
func (g *genState) readTimes(ctx context.Context) error {
	_, err := g.readTimesProgress(ctx)
	return err
}

// readTimesProgress refreshes the group times from Redis and returns the
// progress records read.
func (g *genState) readTimesProgress(ctx context.Context) (map[string]map[int]state.PartitionProgress, error) {
	s := g.s
	cfg := s.config()
	var prog map[string]map[int]state.PartitionProgress
	if err := s.retry(ctx, "progress", func(ctx context.Context) error {
		var err error
		prog, err = s.store.Progress(ctx, cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic)
		return err
	}); err != nil {
		return nil, err
	}
	g.times = computeGroupTimes(g.meta, prog, cfg.Pipeline.Lateness.Milliseconds(), cfg.Pipeline.RefitEvery.Milliseconds(), g.times.watermark)
	for _, tp := range g.assigned {
		if _, ok := g.swept[tp]; !ok && tp.Topic == cfg.Kafka.ConversionTopic {
			swept := noTime
			if rec, ok := prog[tp.Topic][tp.Partition]; ok {
				swept = rec.Swept
			}
			g.swept[tp] = swept
		}
	}
	if g.times.watermark != noTime {
		s.setWatermark(g.times.watermark)
	}
	if s.hooks.onTimes != nil {
		s.hooks.onTimes(g.times)
	}
	return prog, nil
}

// endGeneration classifies a flush error: a crash hook, a fence or a
// cancellation end the generation; other errors end the run.
func (s *Service) endGeneration(ctx context.Context, err error) error {
	switch {
	case errors.Is(err, errCrash), errors.Is(err, errFenced):
		return err
	case ctx.Err() != nil:
		return nil
	case errors.Is(err, context.Canceled):
		// The generation ended during a retry; the batch is re-read by
		// the next owner from the resume offsets.
		return nil
	}
	return err
}

// readPartition fetches one partition from offset, decodes each message
// (see fetched.decode) and sends it into out until ctx ends, waiting while
// gate is closed.
func (s *Service) readPartition(ctx context.Context, dialer *kafka.Dialer, cfg Config, tp state.TopicPartition, offset int64, out chan<- fetched, gate *readGate) {
	r := kafka.NewReader(kafka.ReaderConfig{
		Brokers:   cfg.Kafka.Brokers,
		Topic:     tp.Topic,
		Partition: tp.Partition,
		Dialer:    dialer,
		MinBytes:  1,
		MaxBytes:  readerMaxBytes,
		MaxWait:   readerMaxWait,
		ErrorLogger: kafka.LoggerFunc(func(f string, a ...any) {
			s.log.Sugar().Warnf("kafka reader %s: "+f, append([]any{tp}, a...)...)
		}),
	})
	defer r.Close()
	if err := r.SetOffset(offset); err != nil {
		s.log.Error("set reader offset", zap.Stringer("partition", tp), zap.Int64("offset", offset), zap.Error(err))
		return
	}
	for {
		if err := gate.wait(ctx); err != nil {
			return
		}
		m, err := r.FetchMessage(ctx)
		if err != nil {
			if ctx.Err() == nil {
				s.log.Error("fetch", zap.Stringer("partition", tp), zap.Error(err))
			}
			return
		}
		gate.add(1)
		f := fetched{tp: tp, offset: m.Offset, value: m.Value, hwm: m.HighWaterMark}
		f.decode(cfg)
		select {
		case out <- f:
		case <-ctx.Done():
			return
		}
	}
}

// consumeControl reads every partition of the control topic from the start
// (each instance applies every control message) until ctx ends. Messages
// are applied in partition order; a bad one is dead-lettered.
func (s *Service) consumeControl(ctx context.Context) {
	cfg := s.config()
	dialer, err := KafkaDialer(cfg.Kafka)
	if err != nil {
		s.log.Error("control topic", zap.Error(err))
		return
	}
	var parts []kafka.Partition
	err = s.retry(ctx, "kafka metadata", func(ctx context.Context) error {
		var err error
		parts, err = dialer.LookupPartitions(ctx, "tcp", cfg.Kafka.Brokers[0], cfg.Kafka.ControlTopic)
		return err
	})
	if err != nil {
		if ctx.Err() == nil {
			s.log.Error("control topic partitions", zap.Error(err))
		}
		return
	}
	var wg sync.WaitGroup
	for _, p := range parts {
		wg.Add(1)
		go func() {
			defer wg.Done()
			r := kafka.NewReader(kafka.ReaderConfig{
				Brokers: cfg.Kafka.Brokers, Topic: cfg.Kafka.ControlTopic, Partition: p.ID,
				Dialer: dialer, MaxWait: readerMaxWait, MaxBytes: readerMaxBytes,
			})
			defer r.Close()
			if err := r.SetOffset(kafka.FirstOffset); err != nil {
				s.log.Error("control reader offset", zap.Error(err))
				return
			}
			for {
				m, err := r.FetchMessage(ctx)
				if err != nil {
					return
				}
				if err := s.applyControl(m.Key, m.Value); err != nil {
					var rej *RejectError
					if !errors.As(err, &rej) {
						rej = reject(ReasonBadControl, "%v", err)
					}
					s.log.Warn("control message refused", zap.Int64("offset", m.Offset), zap.Error(err))
					dl := newDeadLetter(m.Topic, m.Partition, m.Offset, m.Value, rej)
					if err := s.retry(ctx, "write dead letters", func(ctx context.Context) error {
						return s.deadLetters.write(ctx, []DeadLetter{dl})
					}); err != nil {
						return
					}
					continue
				}
				s.log.Info("control message applied", zap.ByteString("experiment", m.Key), zap.Int64("offset", m.Offset))
			}
		}()
	}
	wg.Wait()
}
