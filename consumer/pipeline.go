package consumer

import (
	"context"
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
	"time"

	"go.uber.org/zap"

	"ripen/estimator"
	"ripen/state"
)

// errFenced ends a generation whose partitions have a newer owner.
var errFenced = errors.New("partition taken over by a newer consumer generation")

// genState is the pipeline state of one consumer-group generation: what it
// owns, where each partition resumes, and what it knows of experiments.
type genState struct {
	s        *Service
	id       int32
	assigned []state.TopicPartition
	wm       *watermarks
	exps     map[string]*expInfo
	capped   map[string]bool // experiments refused by limits.max_experiments
	commit   func(map[string]map[int]int64) error
}

// clickEvent and convEvent are decoded events with where they were read.
type clickEvent struct {
	m fetched
	c Click
}

type convEvent struct {
	m fetched
	v Conversion
}

// flushResult summarises one flush, for logs and tests.
type flushResult struct {
	events, deadLetters, deltas int
}

// flush turns one batch into per-experiment deltas, applies them with the
// offsets they cover, writes the batch's dead letters, records the resume
// offsets and commits them to Kafka, in that order. Redis failures are
// retried (never dropped) until ctx ends.
func (g *genState) flush(ctx context.Context, b *batch) (flushResult, error) {
	var res flushResult
	if b.len() == 0 {
		return res, nil
	}
	s := g.s
	start := time.Now()
	cfg := s.config()
	raw := map[string][]byte{} // original bytes by origin, for dead letters
	var dls []DeadLetter
	refuse := func(org string, rej *RejectError) {
		tp, off, err := parseOrigin(org)
		if err != nil {
			s.log.Error("dead letter with unparsable origin", zap.String("origin", org), zap.Error(err))
		}
		dls = append(dls, newDeadLetter(tp.Topic, tp.Partition, off, raw[org], rej))
	}

	var clicks []clickEvent
	var convs []convEvent
	for _, m := range b.msgs {
		org := origin(m.tp, m.offset)
		raw[org] = m.value
		if s.metrics != nil {
			s.metrics.EventsConsumed.WithLabelValues(m.tp.Topic).Inc()
		}
		caught := m.offset+1 >= m.hwm
		var rej *RejectError
		switch m.tp.Topic {
		case cfg.Kafka.ClickTopic:
			c, err := DecodeClick(m.value)
			if errors.As(err, &rej) {
				break
			}
			if rej = checkStorable(c.Experiment); rej != nil {
				break
			}
			g.wm.observe(m.tp, c.TS, caught)
			clicks = append(clicks, clickEvent{m, c})
		case cfg.Kafka.ConversionTopic:
			v, err := DecodeConversion(m.value)
			if errors.As(err, &rej) {
				break
			}
			if v.Experiment != "" {
				if rej = checkStorable(v.Experiment); rej != nil {
					break
				}
			}
			g.wm.observe(m.tp, v.TS, caught)
			convs = append(convs, convEvent{m, v})
		default:
			rej = reject(ReasonMalformedJSON, "message from unexpected topic %q", m.tp.Topic)
		}
		if rej != nil {
			refuse(org, rej)
		}
		g.wm.progress(m.tp, caught)
	}
	wm := g.wm.advance()
	keyWm := wm // the watermark the bucket keys are computed at
	if wm != noTime {
		s.setWatermark(wm)
	} else {
		// While some partition has not delivered yet the watermark is
		// unknown; keys computed at an earlier time are merely finer than
		// canonical, and reading re-keys them.
		keyWm = int64(math.MaxInt64)
		for _, ce := range clicks {
			keyWm = min(keyWm, ce.c.TS)
		}
		for _, cv := range convs {
			keyWm = min(keyWm, cv.v.TS)
		}
		keyWm -= cfg.Pipeline.Lateness.Milliseconds()
	}
	db := newDeltaBuilder(keyWm, g.id)

	// Clicks: index them, taking the conversions that waited for them.
	var records []state.ClickRecord
	byID := map[string]clickEvent{}
	for _, ce := range clicks {
		e, rej, err := g.experiment(ctx, cfg, ce.c.Experiment, ce.c.Arm)
		if err != nil {
			return res, err
		}
		if rej != nil {
			refuse(origin(ce.m.tp, ce.m.offset), rej)
			continue
		}
		if e.seen(ce.m.tp, ce.m.offset) {
			continue
		}
		db.click(e, ce.c.Arm, origin(ce.m.tp, ce.m.offset), ce.c.TS)
		records = append(records, state.ClickRecord{ClickID: ce.c.ClickID, Experiment: ce.c.Experiment, Arm: ce.c.Arm, TS: ce.c.TS, Window: e.layout.Window})
		byID[ce.c.ClickID] = ce
	}
	var claimed []state.Orphan
	if err := s.retry(ctx, "put clicks", func(ctx context.Context) error {
		var err error
		claimed, err = s.store.PutClicks(ctx, records)
		return err
	}); err != nil {
		return res, err
	}
	for _, o := range claimed {
		raw[o.Origin] = o.Raw
		ce, ok := byID[o.ClickID]
		if !ok {
			continue
		}
		v, err := DecodeConversion(o.Raw)
		var rej *RejectError
		if errors.As(err, &rej) {
			refuse(o.Origin, rej)
			continue
		}
		e := g.exps[ce.c.Experiment]
		if rej := checkJoin(v, ce.c.Experiment, ce.c.Arm, ce.c.TS, e.windowMs); rej != nil {
			refuse(o.Origin, rej)
			continue
		}
		db.conversion(e, ce.c.Arm, o.ClickID, o.Origin, ce.c.TS, v.TS)
	}

	// Conversions: join to indexed clicks or park until the click comes.
	lookups := make([]state.ConversionLookup, len(convs))
	for i, cv := range convs {
		lookups[i] = state.ConversionLookup{
			ClickID: cv.v.ClickID, TS: cv.v.TS, Origin: origin(cv.m.tp, cv.m.offset), Raw: cv.m.value,
			Topic: cv.m.tp.Topic, Partition: cv.m.tp.Partition,
			Deadline: cv.v.TS + cfg.Pipeline.OrphanTTL.Milliseconds(),
		}
	}
	var found []state.LookupResult
	if err := s.retry(ctx, "lookup conversions", func(ctx context.Context) error {
		var err error
		found, err = s.store.LookupConversions(ctx, lookups)
		return err
	}); err != nil {
		return res, err
	}
	for i, r := range found {
		cv, org := convs[i], lookups[i].Origin
		switch r.Status {
		case state.LookupFound:
			e, rej, err := g.experiment(ctx, cfg, r.Click.Experiment, r.Click.Arm)
			if err != nil {
				return res, err
			}
			if rej != nil {
				refuse(org, rej)
				continue
			}
			if e.seen(cv.m.tp, cv.m.offset) {
				continue
			}
			db.touch(e)
			if rej := checkJoin(cv.v, r.Click.Experiment, r.Click.Arm, r.Click.TS, e.windowMs); rej != nil {
				refuse(org, rej)
				continue
			}
			db.conversion(e, r.Click.Arm, cv.v.ClickID, org, r.Click.TS, cv.v.TS)
		case state.LookupParked, state.LookupParkedBefore:
			// Joined when the click comes, or settled by the sweep.
		case state.LookupDuplicate:
			refuse(org, reject(ReasonDuplicateConversion, "click %q already has a conversion waiting for it (%s)", cv.v.ClickID, r.Origin))
		case state.LookupCapExceeded:
			refuse(org, reject(ReasonCapExceeded, "partition %s has limits.max_orphans_per_partition conversions waiting for their clicks", cv.m.tp))
		default:
			return res, fmt.Errorf("lookup conversion %s: unexpected status %v", org, r.Status)
		}
	}

	// Sweep: conversions whose click did not come before their deadline.
	if wm != noTime {
		for _, tp := range g.assigned {
			if tp.Topic != cfg.Kafka.ConversionTopic {
				continue
			}
			var due []state.Orphan
			if err := s.retry(ctx, "due orphans", func(ctx context.Context) error {
				var err error
				due, err = s.store.DueOrphans(ctx, tp.Topic, tp.Partition, wm)
				return err
			}); err != nil {
				return res, err
			}
			for _, o := range due {
				s.log.Debug("orphan due", zap.String("click", o.ClickID), zap.Int64("deadline", o.Deadline), zap.Int64("watermark", wm))
				raw[o.Origin] = o.Raw
				if rej, err := g.settleOrphan(ctx, cfg, db, o); err != nil {
					return res, err
				} else if rej != nil {
					refuse(o.Origin, rej)
				}
			}
		}
	}

	// Apply, experiment by experiment, each with the offsets it covers.
	deltas := db.deltas(b)
	for _, d := range deltas {
		var ar state.ApplyResult
		err := s.retry(ctx, "apply", func(ctx context.Context) error {
			var err error
			ar, err = s.store.Apply(ctx, d)
			return err
		})
		switch {
		case errors.Is(err, state.ErrFenced):
			return res, fmt.Errorf("experiment %q: %w: %w", d.Experiment, errFenced, err)
		case errors.Is(err, state.ErrLayoutMismatch):
			// Refuse this experiment's events; reload its stored layout
			// for the next batch.
			s.log.Error("experiment stored with another layout", zap.String("experiment", d.Experiment), zap.Error(err))
			delete(g.exps, d.Experiment)
			for _, org := range db.origins[d.Experiment] {
				refuse(org, reject(ReasonLayoutMismatch, "experiment %q is stored with another layout than %+v", d.Experiment, d.Layout))
			}
			continue
		case err != nil:
			// Overlap or layout mismatch: the cached records are stale;
			// forget them so the next generation reloads them.
			delete(g.exps, d.Experiment)
			return res, fmt.Errorf("apply experiment %q: %w", d.Experiment, err)
		}
		e := g.exps[d.Experiment]
		for _, r := range d.Ranges {
			e.applied[state.TopicPartition{Topic: r.Topic, Partition: r.Partition}] = r.To
		}
		for _, dup := range ar.Duplicates {
			refuse(dup.Conversion.Origin, reject(ReasonDuplicateConversion, "click %q already converted (%s)", dup.Conversion.ClickID, dup.CountedOrigin))
		}
		if db.events[d.Experiment] > 0 {
			s.markChanged(d.Experiment)
		}
		if s.hooks.afterApply != nil {
			if err := s.hooks.afterApply(d.Experiment); err != nil {
				return res, err
			}
		}
	}
	res.deltas = len(deltas)
	res.events = b.len()
	res.deadLetters = len(dls)

	if err := s.retry(ctx, "write dead letters", func(ctx context.Context) error {
		return s.deadLetters.write(ctx, dls)
	}); err != nil {
		return res, err
	}
	commit := map[string]map[int]int64{}
	for _, tp := range b.order {
		next := b.ranges[tp].To + 1
		if err := s.retry(ctx, "set resume", func(ctx context.Context) error {
			return s.store.SetResume(ctx, tp.Topic, tp.Partition, next)
		}); err != nil {
			return res, err
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
		s.metrics.FlushDuration.Observe(time.Since(start).Seconds())
		for _, tp := range b.order {
			last := b.lastOf(tp)
			s.metrics.ConsumerLag.WithLabelValues(tp.Topic, strconv.Itoa(tp.Partition)).Set(float64(max(0, last.hwm-last.offset-1)))
		}
	}
	return res, nil
}

// settleOrphan handles a conversion whose click never came: one that
// carries its own attribution is counted with its click (as BuildOffline
// self-attributes it); any other is refused as orphan_expired.
func (g *genState) settleOrphan(ctx context.Context, cfg Config, db *deltaBuilder, o state.Orphan) (*RejectError, error) {
	v, err := DecodeConversion(o.Raw)
	var rej *RejectError
	if errors.As(err, &rej) {
		return rej, nil
	}
	if !v.Attributed {
		return reject(ReasonOrphanExpired, "no click %q arrived by event time %s", o.ClickID, time.UnixMilli(o.Deadline).UTC().Format(time.RFC3339)), nil
	}
	e, rej, err := g.experiment(ctx, cfg, v.Experiment, v.Arm)
	if err != nil || rej != nil {
		return rej, err
	}
	if rej := checkDelay(v.ClickTS, v.TS, e.windowMs); rej != nil {
		return rej, nil
	}
	db.click(e, v.Arm, o.Origin, v.ClickTS)
	db.conversion(e, v.Arm, o.ClickID, o.Origin, v.ClickTS, v.TS)
	return nil, nil
}

// experiment returns what the generation knows of an experiment, loading
// it on first sight, and registers arm; it refuses the event when the
// experiment or arm would exceed the configured limits.
func (g *genState) experiment(ctx context.Context, cfg Config, id, arm string) (*expInfo, *RejectError, error) {
	if g.capped[id] {
		return nil, reject(ReasonCapExceeded, "experiment %q: limits.max_experiments (%d) reached", id, cfg.Limits.MaxExperiments), nil
	}
	e := g.exps[id]
	if e == nil {
		var ex *state.Experiment
		err := g.s.retry(ctx, "load experiment", func(ctx context.Context) error {
			var err error
			ex, err = g.s.store.Load(ctx, id)
			if errors.Is(err, state.ErrNotFound) {
				return nil
			}
			return err
		})
		if err != nil {
			return nil, nil, err
		}
		if ex == nil {
			if !g.s.admitExperiment(id, cfg.Limits.MaxExperiments) {
				g.capped[id] = true
				return nil, reject(ReasonCapExceeded, "experiment %q: limits.max_experiments (%d) reached", id, cfg.Limits.MaxExperiments), nil
			}
			l := estimator.Layout{Window: cfg.ExperimentFor(id).Window}.WithDefaults()
			e = &expInfo{id: id, layout: l, arms: map[string]bool{}, applied: map[state.TopicPartition]int64{}}
		} else {
			g.s.admitExperiment(id, 0)
			e = &expInfo{id: id, layout: ex.Layout.WithDefaults(), arms: map[string]bool{}, applied: map[state.TopicPartition]int64{}}
			for _, a := range ex.Arms {
				e.arms[a] = true
			}
			for tp, ao := range ex.Offsets {
				e.applied[tp] = ao.Offset
			}
		}
		e.windowMs = e.layout.Window.Milliseconds()
		g.exps[id] = e
	}
	if !e.arms[arm] {
		if cfg.Limits.MaxArms > 0 && len(e.arms) >= cfg.Limits.MaxArms {
			return nil, reject(ReasonCapExceeded, "experiment %q: arm %q would exceed limits.max_arms (%d)", id, arm, cfg.Limits.MaxArms), nil
		}
		e.arms[arm] = true
	}
	return e, nil, nil
}

// checkStorable refuses experiment ids the state store cannot key.
func checkStorable(experiment string) *RejectError {
	if strings.ContainsAny(experiment, "{}") {
		return reject(ReasonInvalidText, "experiment %q contains '{' or '}'", experiment)
	}
	return nil
}

// checkJoin applies BuildOffline's join rules to a conversion v of the
// known click (experiment, arm, clickTS): attribution fields it carries
// must agree, and the delay must lie in [0, window].
func checkJoin(v Conversion, experiment, arm string, clickTS, windowMs int64) *RejectError {
	switch {
	case v.Experiment != "" && v.Experiment != experiment:
		return reject(ReasonAttributionMismatch, "conversion says experiment %q, click %q has %q", v.Experiment, v.ClickID, experiment)
	case v.Arm != "" && v.Arm != arm:
		return reject(ReasonAttributionMismatch, "conversion says arm %q, click %q has %q", v.Arm, v.ClickID, arm)
	case v.ClickTS != 0 && v.ClickTS != clickTS:
		return reject(ReasonAttributionMismatch, "conversion says click_ts %d, click %q has %d", v.ClickTS, v.ClickID, clickTS)
	}
	return checkDelay(clickTS, v.TS, windowMs)
}

// checkDelay checks that a conversion at convTS of a click at clickTS lies
// in the attribution window [0, window].
func checkDelay(clickTS, convTS, windowMs int64) *RejectError {
	d := convTS - clickTS
	switch {
	case d < 0:
		return reject(ReasonConversionBeforeClick, "conversion %d ms before its click", -d)
	case d > windowMs:
		return reject(ReasonConversionAfterWindow, "delay %d ms exceeds window %d ms", d, windowMs)
	}
	return nil
}

// parseOrigin splits "<topic>/<partition>/<offset>".
func parseOrigin(org string) (state.TopicPartition, int64, error) {
	j := strings.LastIndexByte(org, '/')
	if j < 0 {
		return state.TopicPartition{}, 0, fmt.Errorf("origin %q: want topic/partition/offset", org)
	}
	i := strings.LastIndexByte(org[:j], '/')
	if i < 0 {
		return state.TopicPartition{}, 0, fmt.Errorf("origin %q: want topic/partition/offset", org)
	}
	p, err1 := strconv.Atoi(org[i+1 : j])
	off, err2 := strconv.ParseInt(org[j+1:], 10, 64)
	if err1 != nil || err2 != nil {
		return state.TopicPartition{}, 0, fmt.Errorf("origin %q: want topic/partition/offset", org)
	}
	return state.TopicPartition{Topic: org[:i], Partition: p}, off, nil
}
