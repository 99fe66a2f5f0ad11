package consumer

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"runtime"
	"slices"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	"github.com/segmentio/kafka-go"
	"go.uber.org/zap"

	"ripen/estimator"
	"ripen/state"
)

// publication is what the service remembers of an experiment's last
// published allocation.
type publication struct {
	weights map[string]float64
	asOf    int64 // event time of the evaluation, Unix ms
	seq     int64
	body    []byte // the stored report JSON
	status  estimator.AllocationStatus
	settle  *estimator.SettleState // nil unless settled
}

// Allocation is the message published to the allocation topic (key: the
// experiment id): the experiment's report with its sequence number. Seq
// increases by one per publication of the experiment; readers of the
// (compacted) topic keep the highest seq they saw.
type Allocation struct {
	Seq int64 `json:"seq"`
	estimator.ExperimentReport
}

// withSeq returns the JSON object body with a leading "seq" member.
func withSeq(body []byte, seq int64) ([]byte, error) {
	body = bytes.TrimSpace(body)
	if len(body) < 2 || body[0] != '{' {
		return nil, errors.New("allocation is not a JSON object")
	}
	out := make([]byte, 0, len(body)+24)
	out = append(out, `{"seq":`...)
	out = strconv.AppendInt(out, seq, 10)
	if rest := bytes.TrimSpace(body[1:]); len(rest) > 0 && rest[0] != '}' {
		out = append(out, ',')
	}
	return append(out, body[1:]...), nil
}

// refitOwned runs, for every click partition this generation owns, the
// refits of the ticks after the last one its owner completed, up to the
// last tick the whole group applied its events through, and records each
// completed tick. A click partition never marked before (a fresh prefix:
// nothing was applied, every event is held back) is marked at the current
// tick without refits.
//
// Ticks are run in order, each one across every owned partition due for
// it; the experiments of a tick are refitted concurrently by at most
// GOMAXPROCS workers (refitTick). Each refit depends only on its
// experiment's stored state, the tick and the seed derived from both, and
// an experiment's ticks never overlap, so every published allocation is
// the same as with one worker; only the order of publications across
// experiments within a tick may differ.
func (g *genState) refitOwned(ctx context.Context, prog map[string]map[int]state.PartitionProgress) error {
	s := g.s
	cfg := s.config()
	period := cfg.Pipeline.RefitEvery.Milliseconds()
	through, ok := g.times.refitThrough(period)
	if !ok {
		return nil
	}
	// due holds the owned click partitions with ticks to refit and, for
	// each, the next one.
	type due struct {
		tp   state.TopicPartition
		next int64
	}
	var pending []due
	for _, tp := range g.assigned {
		if tp.Topic != g.meta.clickTopic {
			continue
		}
		last := noTime
		if rec, ok := prog[tp.Topic][tp.Partition]; ok {
			last = rec.Refitted
		}
		if last == noTime {
			if err := s.retry(ctx, "mark refitted", func(ctx context.Context) error {
				return s.store.MarkRefitted(ctx, tp.Topic, tp.Partition, through)
			}); err != nil {
				return err
			}
			continue
		}
		if last+period <= through {
			pending = append(pending, due{tp: tp, next: last + period})
		}
	}
	var ids []string
	for len(pending) > 0 {
		if ids == nil {
			if err := s.retry(ctx, "list experiments", func(ctx context.Context) error {
				var err error
				ids, err = s.store.Experiments(ctx)
				return err
			}); err != nil {
				return err
			}
		}
		tick := pending[0].next
		for _, d := range pending[1:] {
			tick = min(tick, d.next)
		}
		parts := map[int]bool{}
		for _, d := range pending {
			if d.next == tick {
				parts[d.tp.Partition] = true
			}
		}
		var batch []string
		for _, id := range ids {
			if parts[refitPartition(id, g.meta.clickParts)] {
				batch = append(batch, id)
			}
		}
		if err := s.refitTick(ctx, batch, tick); err != nil {
			return err
		}
		kept := pending[:0]
		for _, d := range pending {
			if d.next == tick {
				if err := s.retry(ctx, "mark refitted", func(ctx context.Context) error {
					return s.store.MarkRefitted(ctx, d.tp.Topic, d.tp.Partition, tick)
				}); err != nil {
					return err
				}
				g.advances++
				d.next += period
			}
			if d.next <= through {
				kept = append(kept, d)
			}
		}
		pending = kept
	}
	return nil
}

// refitTick refits experiments ids as of tick, at most refitWorkers at a
// time. A failed refit is logged and does not stop the others (nor
// consumption, nor the group's barrier: the next tick tries again); the
// error returned is the first one met after ctx ended.
func (s *Service) refitTick(ctx context.Context, ids []string, tick int64) error {
	return forEachBounded(refitWorkers(), len(ids), func(i int) error {
		id := ids[i]
		if err := s.refit(ctx, id, tick); err != nil {
			if ctx.Err() != nil {
				return err
			}
			s.log.Error("refit", zap.String("experiment", id), zap.Int64("tick", tick), zap.Error(err))
		}
		return nil
	})
}

// refitWorkers is the number of experiments refitted at once: one per
// processor the Go scheduler uses (GOMAXPROCS), as a refit is mostly CPU.
func refitWorkers() int {
	return max(1, runtime.GOMAXPROCS(0))
}

// forEachBounded calls fn(0), ..., fn(n-1) on at most workers goroutines
// and waits for them. After fn returns an error no further index is
// started; the first error is returned.
func forEachBounded(workers, n int, fn func(i int) error) error {
	workers = max(1, min(workers, n))
	if n == 0 {
		return nil
	}
	if workers == 1 {
		for i := range n {
			if err := fn(i); err != nil {
				return err
			}
		}
		return nil
	}
	var (
		next    atomic.Int64
		errOnce sync.Once
		first   error
		failed  atomic.Bool
		wg      sync.WaitGroup
	)
	for range workers {
		wg.Go(func() {
			for !failed.Load() {
				i := int(next.Add(1) - 1)
				if i >= n {
					return
				}
				if err := fn(i); err != nil {
					errOnce.Do(func() { first = err })
					failed.Store(true)
					return
				}
			}
		})
	}
	wg.Wait()
	return first
}

// refit loads one experiment, evaluates it as of tick (cold-started, so
// that the result depends on the stored state alone) and publishes its
// allocation when a weight moved by more than PublishThreshold or
// PublishEvery elapsed (in event time) since the last publication, read
// from Redis. A tick already published (a refit redone after a crash) is
// not evaluated again; its stored allocation is written to the topic once
// more, unless this instance wrote it, so that none is lost (readers keep
// the highest seq).
func (s *Service) refit(ctx context.Context, id string, tick int64) error {
	cfg := s.config()
	ec := cfg.ExperimentFor(id)
	if ec.Ended {
		return nil
	}
	start := time.Now()
	var ex *state.Experiment
	if err := s.retry(ctx, "load experiment", func(ctx context.Context) error {
		var err error
		ex, err = s.store.Load(ctx, id)
		return err
	}); errors.Is(err, state.ErrNotFound) {
		return nil
	} else if err != nil {
		return err
	}
	if len(ex.Arms) == 0 {
		return nil
	}
	// Whatever the refit's outcome, fold the records the arms received
	// since their last compaction into their bases afterwards, so that the
	// next loads read less (Apply bounds them in any case).
	defer s.compactLoaded(ctx, ex)
	asOf := max(tick, ex.Watermark)
	alloc, err := ec.AllocationOptions()
	if err != nil {
		return fmt.Errorf("experiment %q settings: %w", id, err)
	}
	family, err := ec.DelayFamily()
	if err != nil {
		return fmt.Errorf("experiment %q settings: %w", id, err)
	}
	prev, havePrev, err := s.loadPublication(ctx, id)
	if err != nil {
		return err
	}
	if havePrev && prev.asOf >= asOf {
		return s.republish(ctx, id, prev)
	}
	in := estimator.ExperimentInput{
		Experiment: id, AsOf: asOf,
		Fit:        estimator.FitOptions{Family: family},
		Allocation: alloc,
	}
	for _, arm := range ex.Arms {
		st := ex.States[arm].Clone()
		st.Advance(asOf)
		in.Arms = append(in.Arms, estimator.ArmData{Arm: arm, State: st, Paused: slices.Contains(ec.Paused, arm)})
	}
	if havePrev {
		in.PrevSettle = prev.settle
		in.PrevWeights = make([]float64, len(in.Arms))
		complete := true
		for i, a := range in.Arms {
			w, ok := prev.weights[a.Arm]
			in.PrevWeights[i] = w
			complete = complete && ok
		}
		if !complete {
			in.PrevWeights = nil // an arm was added: start the guardrails afresh
		}
	}
	rep, err := s.refitFn(in)
	if s.metrics != nil {
		s.metrics.RefitDuration.Observe(time.Since(start).Seconds())
	}
	if err != nil {
		return fmt.Errorf("evaluate experiment %q: %w", id, err)
	}
	// A change of status is always published, so the stored report carries
	// the settle state the next refit continues from.
	if havePrev && rep.Status == prev.status && !moved(prev.weights, rep.Weights, cfg.Pipeline.PublishThreshold) && asOf-prev.asOf < cfg.Pipeline.PublishEvery.Milliseconds() {
		return nil
	}
	return s.publish(ctx, id, asOf, rep)
}

// compactLoaded folds the arm hashes of the loaded experiment ex into
// their bases (state.Store.CompactLoaded). It never fails the refit: an
// arm written since the load is left for the next tick, and an error is
// logged.
func (s *Service) compactLoaded(ctx context.Context, ex *state.Experiment) {
	done, err := s.store.CompactLoaded(ctx, ex)
	if err != nil {
		if ctx.Err() == nil {
			s.log.Warn("compact arms", zap.String("experiment", ex.ID), zap.Error(err))
		}
		return
	}
	s.log.Debug("arms compacted", zap.String("experiment", ex.ID), zap.Strings("arms", done))
}

// republish writes the stored allocation prev to the allocation topic
// again unless this instance wrote it.
func (s *Service) republish(ctx context.Context, id string, prev publication) error {
	s.mu.Lock()
	mine := s.published[id] == prev.seq
	s.mu.Unlock()
	if mine {
		return nil
	}
	msg, err := withSeq(prev.body, prev.seq)
	if err != nil {
		return fmt.Errorf("allocation of %q: %w", id, err)
	}
	if err := s.retry(ctx, "publish allocation", func(ctx context.Context) error {
		return s.alloc.WriteMessages(ctx, kafka.Message{Key: []byte(id), Value: msg})
	}); err != nil {
		return err
	}
	s.mu.Lock()
	s.published[id] = prev.seq
	s.mu.Unlock()
	return nil
}

// moved reports whether any weight differs by more than threshold, or the
// arms differ.
func moved(prev, next map[string]float64, threshold float64) bool {
	if len(prev) != len(next) {
		return true
	}
	for arm, w := range next {
		p, ok := prev[arm]
		if !ok || math.Abs(w-p) > threshold {
			return true
		}
	}
	return false
}

// publish saves the report as the experiment's latest allocation (which
// assigns its seq) and writes it to the allocation topic, retrying the
// write until it succeeds or ctx ends.
func (s *Service) publish(ctx context.Context, id string, asOf int64, rep estimator.ExperimentReport) error {
	body, err := json.Marshal(rep)
	if err != nil {
		return fmt.Errorf("encode allocation of %q: %w", id, err)
	}
	var seq int64
	if err := s.retry(ctx, "save allocation", func(ctx context.Context) error {
		var err error
		seq, err = s.store.SaveAllocation(ctx, id, body)
		return err
	}); err != nil {
		return err
	}
	msg, err := withSeq(body, seq)
	if err != nil {
		return fmt.Errorf("allocation of %q: %w", id, err)
	}
	// The history feeds `ripen report`; a retried append may leave a
	// duplicate, which readers drop by seq.
	if err := s.retry(ctx, "append history", func(ctx context.Context) error {
		return s.store.AppendHistory(ctx, id, msg)
	}); err != nil {
		return err
	}
	if err := s.retry(ctx, "publish allocation", func(ctx context.Context) error {
		return s.alloc.WriteMessages(ctx, kafka.Message{Key: []byte(id), Value: msg})
	}); err != nil {
		return err
	}
	s.mu.Lock()
	s.published[id] = seq
	s.mu.Unlock()
	if s.metrics != nil {
		s.metrics.AllocationsPublished.Inc()
	}
	s.log.Info("allocation published", zap.String("experiment", id), zap.Int64("seq", seq), zap.String("as_of", rep.AsOf), zap.String("status", string(rep.Status)))
	return nil
}

// loadPublication reads the last saved allocation of an experiment, so
// that whichever instance refits it keeps the guardrails and publish
// schedule.
func (s *Service) loadPublication(ctx context.Context, id string) (publication, bool, error) {
	var body []byte
	var seq int64
	err := s.retry(ctx, "latest allocation", func(ctx context.Context) error {
		var err error
		seq, body, err = s.store.LatestAllocation(ctx, id)
		if errors.Is(err, state.ErrNotFound) {
			body = nil
			return nil
		}
		return err
	})
	if err != nil || body == nil {
		return publication{}, false, err
	}
	var rep estimator.ExperimentReport
	if err := json.Unmarshal(body, &rep); err != nil {
		s.log.Warn("stored allocation unreadable; starting afresh", zap.String("experiment", id), zap.Error(err))
		return publication{}, false, nil
	}
	t, err := time.Parse(time.RFC3339Nano, rep.AsOf)
	if err != nil {
		return publication{}, false, nil
	}
	settle, err := rep.PrevSettle()
	if err != nil {
		s.log.Warn("stored allocation's settle state unreadable; settling afresh", zap.String("experiment", id), zap.Error(err))
	}
	return publication{weights: rep.Weights, asOf: t.UnixMilli(), seq: seq, body: body, status: rep.Status, settle: settle}, true, nil
}
