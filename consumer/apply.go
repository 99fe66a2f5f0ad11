package consumer

import (
	"context"
	"errors"
	"fmt"
	"strconv"

	"go.uber.org/zap"

	"ripen/state"
)

// The apply stage, the last of a flush (after join.go and delta.go): each
// experiment's delta is applied with the offsets it covers, then the
// batch's dead letters are written, the resume offsets recorded and
// committed to Kafka, in that order.

// applyBatch applies the deltas of db for batch j.b, writes j's dead
// letters (with those the apply adds), records the resume offsets and
// commits them; it returns how many deltas were applied.
func (g *genState) applyBatch(ctx context.Context, j *joined, db *deltaBuilder) (int, error) {
	s := g.s
	b := j.b
	n, err := g.apply(ctx, db, b, func(org string, rej *RejectError) { j.refuse(s, org, rej) })
	if err != nil {
		return n, err
	}
	if err := s.retry(ctx, "write dead letters", func(ctx context.Context) error {
		return s.deadLetters.write(ctx, j.dls)
	}); err != nil {
		return n, err
	}
	commit := map[string]map[int]int64{}
	for _, tp := range b.order {
		next := b.ranges[tp].To + 1
		if err := s.retry(ctx, "set resume", func(ctx context.Context) error {
			return s.store.SetResume(ctx, tp.Topic, tp.Partition, next)
		}); err != nil {
			return n, err
		}
		if commit[tp.Topic] == nil {
			commit[tp.Topic] = map[int]int64{}
		}
		commit[tp.Topic][tp.Partition] = next
	}
	if g.commit != nil {
		if err := g.commit(commit); err != nil {
			// Redis holds the authoritative resume offsets; the Kafka
			// commit only serves lag monitoring.
			s.log.Warn("commit offsets to Kafka", zap.Int32("generation", g.id), zap.Error(err))
		}
	}
	if s.metrics != nil {
		for _, tp := range b.order {
			last := b.lastOf(tp)
			s.metrics.ConsumerLag.WithLabelValues(tp.Topic, strconv.Itoa(tp.Partition)).Set(float64(max(0, last.hwm-last.offset-1)))
		}
	}
	return n, nil
}

// apply applies the deltas of db (covering batch b, or no offsets when b
// is nil) and returns how many were applied. A delta refused as
// overlapping applied offsets (a zombie's late write, or another writer,
// made the cached offsets stale) is rebuilt from the experiment's stored
// offsets, without the events they cover, and retried; refused by a newer
// generation, it ends the generation.
func (g *genState) apply(ctx context.Context, db *deltaBuilder, b *batch, refuse func(string, *RejectError)) (int, error) {
	s := g.s
	applied := 0
	for _, id := range db.ids() {
		d := db.build(id, b)
		var ar state.ApplyResult
		var err error
		for attempt := 1; d != nil; attempt++ {
			err = s.retry(ctx, "apply", func(ctx context.Context) error {
				var err error
				ar, err = s.store.Apply(ctx, d)
				return err
			})
			if !errors.Is(err, state.ErrOverlap) || attempt == overlapAttempts {
				break
			}
			s.log.Warn("delta overlaps applied offsets; reloading them", zap.String("experiment", id), zap.Int("attempt", attempt), zap.Error(err))
			var offs map[state.TopicPartition]state.AppliedOffset
			if err := s.retry(ctx, "offsets", func(ctx context.Context) error {
				var err error
				offs, err = s.store.Offsets(ctx, id)
				return err
			}); err != nil {
				return applied, err
			}
			e := db.exps[id]
			for tp, ao := range offs {
				if last, ok := e.applied[tp]; !ok || ao.Offset > last {
					e.applied[tp] = ao.Offset
				}
			}
			d = db.build(id, b)
		}
		if d == nil {
			continue // everything it covered was applied by another writer
		}
		switch {
		case errors.Is(err, state.ErrFenced):
			return applied, fmt.Errorf("experiment %q: %w: %w (if this repeats after every rejoin, the consumer group was probably deleted or recreated and its generation ids restarted below the stored ones: stop every other writer of this Redis prefix and run ripen run --reset-fencing once)", id, errFenced, err)
		case errors.Is(err, state.ErrLayoutMismatch):
			// Refuse this experiment's events; reload its stored layout
			// for the next batch.
			s.log.Error("experiment stored with another layout", zap.String("experiment", id), zap.Error(err))
			delete(g.exps, id)
			for _, org := range db.origins(id) {
				refuse(org, reject(ReasonLayoutMismatch, "experiment %q is stored with another layout than %+v", id, d.Layout))
			}
			continue
		case err != nil:
			// The cached records are stale; forget them so that the next
			// generation reloads them.
			delete(g.exps, id)
			return applied, fmt.Errorf("apply experiment %q: %w", id, err)
		}
		applied++
		e := db.exps[id]
		for _, r := range d.Ranges {
			e.applied[state.TopicPartition{Topic: r.Topic, Partition: r.Partition}] = r.To
		}
		for _, dup := range ar.Duplicates {
			refuse(dup.Conversion.Origin, reject(ReasonDuplicateConversion, "click %q already converted (%s)", dup.Conversion.ClickID, dup.CountedOrigin))
		}
		if s.hooks.afterApply != nil {
			if err := s.hooks.afterApply(id); err != nil {
				return applied, err
			}
		}
	}
	return applied, nil
}
