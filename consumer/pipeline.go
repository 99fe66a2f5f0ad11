package consumer

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"

	"go.uber.org/zap"

	"ripen/estimator"
	"ripen/state"
)

// errFenced ends a generation whose partitions have a newer owner.
var errFenced = errors.New("partition taken over by a newer consumer generation")

// overlapAttempts bounds the reload-and-retry rounds of one experiment's
// delta refused as overlapping (see genState.apply).
const overlapAttempts = 4

// genState is the pipeline state of one consumer-group generation: what it
// owns, where each partition resumes, what it knows of experiments and of
// the group's event-time progress, and the events it holds back.
type genState struct {
	s *Service
	// id is the writer epoch: the Kafka generation id plus the fencing
	// base of the group (see Service.fencingBase).
	id       int32
	assigned []state.TopicPartition
	exps     map[string]*expInfo
	capped   map[string]bool // experiments refused by limits.max_experiments
	commit   func(map[string]map[int]int64) error

	meta  partitionMeta
	own   map[state.TopicPartition]*ownedPart
	times groupTimes
	// heldTotal counts the held messages of every owned partition.
	heldTotal int
	// advances counts what moves the group's barrier: steps that released
	// held events, sweeps that advanced, ticks marked refitted.
	advances int
	// swept is the last tick through which each owned conversion
	// partition's due orphans were settled (from its record at first).
	swept map[state.TopicPartition]int64
	// carriedOf caches Config.carried by experiment (see carried).
	carriedOf map[string]bool
	// retiredAt is the watermark of the last click index retirement this
	// generation ran (noTime before the first), retireNext the watermark
	// from which it can retire again (noTime: unknown).
	retiredAt, retireNext int64
}

// ownedPart is what the generation tracks of one assigned partition.
type ownedPart struct {
	// held are messages read but not applied yet, in offset order: every
	// message from the first one after the hold-back boundary on.
	held []fetched
	// seen is the latest event time read, noTime if none.
	seen int64
	// caughtUp is true when the last message read was the log's last (or
	// there was nothing to read).
	caughtUp bool
	// lastRead is the wall time of the last message read (liveness only).
	lastRead time.Time
	// gate pauses the partition's reader while its share of
	// pipeline.holdback_cap is read but not applied. A partition with
	// that many held events has applied everything up to the boundary,
	// so pausing it never holds the group's barrier back.
	gate *readGate
}

// readGate bounds the messages of one partition that are read but not
// applied (in the fetch channel or held back): its reader waits while
// limit of them are out. The nil *readGate never waits.
type readGate struct {
	mu    sync.Mutex
	limit int
	count int
	open  chan struct{} // closed while count < limit
	shut  bool
}

func newReadGate(limit int) *readGate {
	ch := make(chan struct{})
	close(ch)
	return &readGate{limit: max(1, limit), open: ch}
}

// wait returns once fewer than limit messages are out, or ctx's error.
func (g *readGate) wait(ctx context.Context) error {
	if g == nil {
		return nil
	}
	g.mu.Lock()
	ch := g.open
	g.mu.Unlock()
	select {
	case <-ch:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

// add counts n more messages out (negative when they are applied).
func (g *readGate) add(n int) {
	if g == nil {
		return
	}
	g.mu.Lock()
	defer g.mu.Unlock()
	g.count += n
	switch {
	case g.count < g.limit && g.shut:
		close(g.open)
		g.shut = false
	case g.count >= g.limit && !g.shut:
		g.open = make(chan struct{})
		g.shut = true
	}
}

// partitionHoldCap is the share of pipeline.holdback_cap one partition may
// have read but not applied before its reader pauses.
func partitionHoldCap(cfg Config, partitions int) int {
	return max(1, cfg.Pipeline.HoldbackCap/max(1, partitions))
}

// flushResult summarises one flush, for logs and tests.
type flushResult struct {
	events, deadLetters, deltas int
}

// receive records a message read from an owned partition: it is held
// until release lets it through.
func (g *genState) receive(m fetched, cfg Config, now time.Time) {
	if m.dec == nil {
		m.decode(cfg)
	}
	p := g.own[m.tp]
	if p == nil {
		p = &ownedPart{seen: noTime}
		g.own[m.tp] = p
	}
	p.held = append(p.held, m)
	g.heldTotal++
	if m.hasTS {
		p.seen = max(p.seen, m.ts)
	}
	p.caughtUp = m.offset+1 >= m.hwm
	p.lastRead = now
}

// release takes from every owned partition the longest run of held
// messages, in offset order, whose event times are at or before the
// hold-back boundary (undecodable messages pass), and returns them as a
// batch. Holding back by prefix keeps each partition's applied offsets
// contiguous and makes what a refit sees a function of the partition logs
// alone. While the boundary is unknown everything is held. Conversions of
// experiments that use the click index are held, too, until every click
// partition has applied its events through their time, so that they find
// their click indexed rather than wait for it in Redis (when the click
// topic is read behind the conversion topic, as in a replay or after a
// pause). A partition holding its share of pipeline.holdback_cap has its
// reader paused until it holds less; if more than the cap is held all the
// same, everything is released (overflow reports that), trading
// determinism (and the join's economy) for bounded memory.
func (g *genState) release(cfg Config) (b *batch, overflow bool) {
	b = newBatch()
	overflow = g.heldTotal > cfg.Pipeline.HoldbackCap

	for _, tp := range g.assigned {
		p := g.own[tp]
		if p == nil {
			continue
		}
		bound := g.times.boundary
		if tp.Topic == cfg.Kafka.ConversionTopic && cfg.indexes() && bound != noTime {
			bound = min(bound, g.times.clicksApplied) // noTime holds them all
		}
		n := 0
		for n < len(p.held) {
			m := p.held[n]
			if !overflow && m.hasTS && (bound == noTime || m.ts > bound) {
				break
			}
			n++
		}
		for _, m := range p.held[:n] {
			b.add(m)
		}
		p.held = slices.Delete(p.held, 0, n)
		g.heldTotal -= n
		if n > 0 {
			g.advances++
		}
		p.gate.add(-n)
	}
	return b, overflow
}

// progress returns what to report for every owned partition after a step.
func (g *genState) progress(cfg Config, now time.Time) map[string][]state.PartitionProgress {
	out := map[string][]state.PartitionProgress{}
	for _, tp := range g.assigned {
		p := g.own[tp]
		idle := p.caughtUp && now.Sub(p.lastRead) >= cfg.Pipeline.IdleTimeout
		first := noTime
		if len(p.held) > 0 && p.held[0].hasTS {
			first = p.held[0].ts
		}
		swept, ok := g.swept[tp]
		if !ok {
			swept = noTime
		}
		out[tp.Topic] = append(out[tp.Topic], state.PartitionProgress{
			Partition: tp.Partition, Seen: p.seen, Applied: appliedThrough(g.times, idle, first, p.seen), Idle: idle, Swept: swept,
		})
	}
	return out
}

// flush runs a batch through the three stages of the join path, in the
// order the data flows: join (join.go) decodes, checks and joins its
// events through the click index; delta (delta.go) turns what counts into
// one delta per experiment; apply (apply.go) applies each delta with the
// offsets it covers, writes the dead letters, records the resume offsets
// and commits them to Kafka. Redis failures are retried (never dropped)
// until ctx ends.
func (g *genState) flush(ctx context.Context, b *batch) (flushResult, error) {
	var res flushResult
	if b.len() == 0 {
		return res, nil
	}
	start := time.Now()
	stage := func(name string, since time.Time) time.Time {
		now := time.Now()
		if m := g.s.metrics; m != nil {
			m.FlushStageDuration.WithLabelValues(name).Observe(now.Sub(since).Seconds())
		}
		return now
	}
	j, err := g.join(ctx, b)
	if err != nil {
		return res, err
	}
	t := stage(stageJoin, start)
	db := g.delta(j)
	t = stage(stageDelta, t)
	n, err := g.applyBatch(ctx, j, db)
	if err != nil {
		return res, err
	}
	stage(stageApply, t)
	if m := g.s.metrics; m != nil {
		m.FlushDuration.Observe(time.Since(start).Seconds())
	}
	return flushResult{events: b.len(), deadLetters: len(j.dls), deltas: n}, nil
}

// sweep settles, for every owned conversion partition, the parked orphans
// due by the sweep watermark (see groupTimes.sweepWatermark), in three
// phases: mark them
// expiring (state.Store.DueOrphans), apply the self-attributed ones and
// dead-letter the others, then delete them (SettleOrphans). A crash
// between phases loses nothing: marked orphans come back from the next
// sweep, and their conversion markers keep them from counting twice.
// Sweeping after every event released by the boundary is applied and
// before the boundary tick's refits (which wait for every conversion
// partition's sweep) makes what expires a function of the logs alone.
func (g *genState) sweep(ctx context.Context) error {
	s := g.s
	cfg := s.config()
	wm, vacuous, ok := g.times.sweepWatermark(cfg.Pipeline.RefitEvery.Milliseconds())
	if !ok {
		return nil
	}
	for _, tp := range g.assigned {
		if tp.Topic != cfg.Kafka.ConversionTopic {
			continue
		}
		if last, ok := g.swept[tp]; ok && last != noTime && wm <= last {
			continue
		}
		g.advances++
		if vacuous {
			g.swept[tp] = wm
			continue
		}
		var due []state.Orphan
		if err := s.retry(ctx, "due orphans", func(ctx context.Context) error {
			var err error
			due, err = s.store.DueOrphans(ctx, tp.Topic, tp.Partition, wm, fmt.Sprintf("%s@%d", tp, g.id))
			return err
		}); err != nil {
			return err
		}
		if len(due) == 0 {
			g.swept[tp] = wm
			continue
		}
		db := newDeltaBuilder(wm, g.id)
		var dls []DeadLetter
		refuse := func(org string, raw []byte, rej *RejectError) { dls = append(dls, s.deadLetter(org, raw, rej)) }
		raw := map[string][]byte{}
		ids := make([]string, 0, len(due))
		for _, o := range due {
			s.log.Debug("orphan due", zap.String("click", o.ClickID), zap.Int64("deadline", o.Deadline), zap.Int64("watermark", wm))
			raw[o.Origin] = o.Raw
			ids = append(ids, o.ClickID)
			rej, err := g.settleOrphan(ctx, cfg, db, o)
			if err != nil {
				return err
			}
			if rej != nil {
				refuse(o.Origin, o.Raw, rej)
			}
		}
		if s.hooks.afterSweepMark != nil {
			if err := s.hooks.afterSweepMark(); err != nil {
				return err
			}
		}
		if _, err := g.apply(ctx, db, nil, func(org string, rej *RejectError) { refuse(org, raw[org], rej) }); err != nil {
			return err
		}
		if err := s.retry(ctx, "write dead letters", func(ctx context.Context) error {
			return s.deadLetters.write(ctx, dls)
		}); err != nil {
			return err
		}
		if s.hooks.beforeSweepSettle != nil {
			if err := s.hooks.beforeSweepSettle(); err != nil {
				return err
			}
		}
		if err := s.retry(ctx, "settle orphans", func(ctx context.Context) error {
			return s.store.SettleOrphans(ctx, tp.Topic, tp.Partition, ids)
		}); err != nil {
			return err
		}
		g.swept[tp] = wm
	}
	return nil
}

// retire deletes the click index generations the group is done with (see
// state.Store.RetireClickIndex). The owner of the click topic's first
// partition does it, at the time every partition applied its events through and every partition,
// idle ones included, has seen, less the lateness: an event still to come
// lies after that (as long as none is more than the lateness out of order
// within its partition), so no conversion still to come needs a
// generation retired then; the index's slack (state.Options.ClickTTLSlack)
// covers conversions later than that. A partition that stops receiving
// events holds retirement back until it gets events again. It calls again
// once the watermark reaches the time the last call said the next
// generation can go, or retireEvery refit periods later.
func (g *genState) retire(ctx context.Context) error {
	s := g.s
	cfg := s.config()
	gt := g.times
	if !cfg.indexes() || gt.watermark == noTime || gt.applied == noTime || gt.oldestSeen == noTime {
		return nil
	}
	if !slices.Contains(g.assigned, state.TopicPartition{Topic: cfg.Kafka.ClickTopic, Partition: 0}) {
		return nil
	}
	wm := min(gt.watermark, min(gt.applied, gt.oldestSeen)-cfg.Pipeline.Lateness.Milliseconds())
	due := g.retiredAt == noTime || wm >= g.retiredAt+retireEvery*cfg.Pipeline.RefitEvery.Milliseconds() ||
		(g.retireNext != noTime && wm >= g.retireNext)
	if !due {
		return nil
	}
	var res state.RetireResult
	if err := s.retry(ctx, "retire click index", func(ctx context.Context) error {
		var err error
		res, err = s.store.RetireClickIndex(ctx, wm)
		return err
	}); err != nil {
		return err
	}
	if len(res.Generations) > 0 {
		s.log.Debug("click index generations retired", zap.Int64s("generations", res.Generations), zap.Int("keys", res.Keys), zap.Int64("watermark", wm))
	}
	g.retiredAt, g.retireNext = wm, res.Next
	return nil
}

// retireEvery is how many refit periods of event time may pass between
// retirements when the last one named no next time (or a generation
// appeared since that ends earlier).
const retireEvery = 4

// settleOrphan handles a conversion whose click never came: one that
// carries its own attribution is counted with its click (as BuildOffline
// self-attributes it), guarded by its conversion marker; any other is
// refused as orphan_expired.
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
	tp, off, _ := parseOrigin(o.Origin)
	db.conversion(e, v.Arm, o.ClickID, o.Origin, tp, off, v.ClickTS, v.TS, true)
	return nil, nil
}

// deadLetter builds the dead letter of the message read at org.
func (s *Service) deadLetter(org string, raw []byte, rej *RejectError) DeadLetter {
	tp, off, err := parseOrigin(org)
	if err != nil {
		s.log.Error("dead letter with unparsable origin", zap.String("origin", org), zap.Error(err))
	}
	return newDeadLetter(tp.Topic, tp.Partition, off, raw, rej)
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
		e.place = e.layout.Placement()
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
