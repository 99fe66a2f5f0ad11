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
)

// consume joins the consumer group over the click and conversion topics
// and runs one pipeline per generation until ctx is cancelled.
func (s *Service) consume(ctx context.Context, cfg Config) error {
	dialer, err := KafkaDialer(cfg.Kafka)
	if err != nil {
		return err
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
	slices.SortFunc(assigned, func(a, b state.TopicPartition) int {
		if a.Topic != b.Topic {
			if a.Topic < b.Topic {
				return -1
			}
			return 1
		}
		return a.Partition - b.Partition
	})
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

	s.mu.Lock()
	wm := newWatermarks(cfg.Pipeline.Lateness.Milliseconds(), assigned)
	wm.wm = s.watermark
	s.mu.Unlock()
	// Partitions with nothing to read must not hold the watermark back.
	for _, tp := range assigned {
		var end int64
		err := s.retry(ctx, "kafka metadata", func(ctx context.Context) error {
			conn, err := dialer.DialLeader(ctx, "tcp", cfg.Kafka.Brokers[0], tp.Topic, tp.Partition)
			if err != nil {
				return err
			}
			defer conn.Close()
			end, err = conn.ReadLastOffset()
			return err
		})
		if err != nil {
			return fmt.Errorf("generation %d: end offset of %s: %w", gen.ID, tp, err)
		}
		if off := start[tp]; off >= end || (off == kafka.FirstOffset && end == 0) {
			wm.idle(tp)
		}
	}
	g := &genState{
		s: s, id: gen.ID, assigned: assigned, wm: wm,
		exps: map[string]*expInfo{}, capped: map[string]bool{},
		commit: gen.CommitOffsets,
	}

	done := make(chan error, 1)
	gen.Start(func(genCtx context.Context) {
		done <- s.pipeline(ctx, genCtx, gen, dialer, g, start)
	})
	return <-done
}

// pipeline starts one reader per assigned partition and batches what they
// fetch, flushing every FlushEvents events or FlushInterval.
func (s *Service) pipeline(ctx, genCtx context.Context, gen *kafka.Generation, dialer *kafka.Dialer, g *genState, start map[state.TopicPartition]int64) error {
	cfg := s.config()
	fetchCtx, stopFetch := context.WithCancel(genCtx)
	in := make(chan fetched, fetchBufferFactor*cfg.Pipeline.FlushEvents)
	var readers sync.WaitGroup
	for _, tp := range g.assigned {
		readers.Add(1)
		gen.Start(func(context.Context) {
			defer readers.Done()
			s.readPartition(fetchCtx, dialer, cfg.Kafka.Brokers, tp, start[tp], in)
		})
	}
	defer func() {
		stopFetch()
		readers.Wait()
	}()

	// A flush in progress is finished even when the generation ends or ctx
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

	b := newBatch()
	timer := time.NewTimer(cfg.Pipeline.FlushInterval)
	defer timer.Stop()
	flush := func(fctx context.Context) error {
		if b.len() == 0 {
			return nil
		}
		_, err := g.flush(fctx, b)
		if err != nil {
			return err
		}
		b = newBatch()
		return s.maybeRefit(fctx, g.wm.current())
	}
	for {
		select {
		case m := <-in:
			b.add(m)
			if b.len() >= cfg.Pipeline.FlushEvents {
				if err := flush(runCtx); err != nil {
					return s.endGeneration(ctx, err)
				}
			}
		case <-timer.C:
			if err := flush(runCtx); err != nil {
				return s.endGeneration(ctx, err)
			}
			timer.Reset(cfg.Pipeline.FlushInterval)
		case <-ctx.Done():
			// Graceful stop: stop fetching, flush what was read, commit.
			stopFetch()
			sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), cfg.ShutdownTimeout)
			defer cancel()
			if err := flush(sctx); err != nil {
				s.log.Error("final flush on shutdown", zap.Error(err))
				if errors.Is(err, errCrash) {
					return err
				}
			}
			return nil
		case <-genCtx.Done():
			// Rebalance: flush what was read before giving the
			// partitions up; the group waits for this.
			stopFetch()
			sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), cfg.ShutdownTimeout)
			defer cancel()
			if err := flush(sctx); err != nil {
				return s.endGeneration(ctx, err)
			}
			return nil
		}
	}
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

// readPartition fetches one partition from offset into out until ctx ends.
func (s *Service) readPartition(ctx context.Context, dialer *kafka.Dialer, brokers []string, tp state.TopicPartition, offset int64, out chan<- fetched) {
	r := kafka.NewReader(kafka.ReaderConfig{
		Brokers:   brokers,
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
		m, err := r.FetchMessage(ctx)
		if err != nil {
			if ctx.Err() == nil {
				s.log.Error("fetch", zap.Stringer("partition", tp), zap.Error(err))
			}
			return
		}
		select {
		case out <- fetched{tp: tp, offset: m.Offset, value: m.Value, hwm: m.HighWaterMark}:
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
