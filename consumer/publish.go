package consumer

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"slices"
	"strconv"
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

// maybeRefit refits the experiments changed since the last refit when the
// watermark crossed a RefitEvery boundary.
func (s *Service) maybeRefit(ctx context.Context, wm int64) error {
	s.mu.Lock()
	tick, ok := s.refitTick.due(wm)
	s.mu.Unlock()
	if !ok {
		return nil
	}
	ids := s.changedExperiments()
	slices.Sort(ids)
	for _, id := range ids {
		if err := s.refit(ctx, id, max(tick, wm)); err != nil {
			if ctx.Err() != nil {
				s.markChanged(id)
				return err
			}
			// A bad fit must not stop consumption; the next tick retries.
			s.log.Error("refit", zap.String("experiment", id), zap.Error(err))
			s.markChanged(id)
		}
	}
	return nil
}

// refit loads one experiment, evaluates it as of asOf and publishes its
// allocation when a weight moved by more than PublishThreshold or
// PublishEvery elapsed (in event time) since the last publication.
func (s *Service) refit(ctx context.Context, id string, asOf int64) error {
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
	}); err != nil {
		return err
	}
	asOf = max(asOf, ex.Watermark)
	alloc, err := ec.AllocationOptions()
	if err != nil {
		return fmt.Errorf("experiment %q settings: %w", id, err)
	}
	family, err := ec.DelayFamily()
	if err != nil {
		return fmt.Errorf("experiment %q settings: %w", id, err)
	}
	s.mu.Lock()
	warm := s.warm[id]
	prev, havePrev := s.published[id]
	s.mu.Unlock()
	if !havePrev {
		p, ok, err := s.loadPublication(ctx, id)
		if err != nil {
			return err
		}
		prev, havePrev = p, ok
	}
	in := estimator.ExperimentInput{
		Experiment: id, AsOf: asOf,
		Fit:        estimator.FitOptions{Family: family},
		Allocation: alloc,
	}
	for _, arm := range ex.Arms {
		st := ex.States[arm].Clone()
		st.Advance(asOf)
		in.Arms = append(in.Arms, estimator.ArmData{Arm: arm, State: st, Paused: slices.Contains(ec.Paused, arm), Warm: warm[arm]})
	}
	if havePrev {
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
	fits := map[string]*estimator.Fit{}
	for i, a := range in.Arms {
		if i < len(rep.Fits) && rep.Fits[i] != nil {
			fits[a.Arm] = rep.Fits[i]
		}
	}
	s.mu.Lock()
	s.warm[id] = fits
	s.mu.Unlock()

	if havePrev && !moved(prev.weights, rep.Weights, cfg.Pipeline.PublishThreshold) && asOf-prev.asOf < cfg.Pipeline.PublishEvery.Milliseconds() {
		return nil
	}
	return s.publish(ctx, id, asOf, rep)
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
	if err := s.retry(ctx, "publish allocation", func(ctx context.Context) error {
		return s.alloc.WriteMessages(ctx, kafka.Message{Key: []byte(id), Value: msg})
	}); err != nil {
		return err
	}
	s.mu.Lock()
	s.published[id] = publication{weights: rep.Weights, asOf: asOf}
	s.mu.Unlock()
	if s.metrics != nil {
		s.metrics.AllocationsPublished.Inc()
	}
	s.log.Info("allocation published", zap.String("experiment", id), zap.Int64("seq", seq), zap.String("as_of", rep.AsOf), zap.String("status", string(rep.Status)))
	return nil
}

// loadPublication reads the last saved allocation of an experiment, so
// that a restarted service keeps the guardrails and publish schedule.
func (s *Service) loadPublication(ctx context.Context, id string) (publication, bool, error) {
	var body []byte
	err := s.retry(ctx, "latest allocation", func(ctx context.Context) error {
		var err error
		_, body, err = s.store.LatestAllocation(ctx, id)
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
	return publication{weights: rep.Weights, asOf: t.UnixMilli()}, true, nil
}
