package consumer

import (
	"slices"

	"ripen/estimator"
	"ripen/state"
)

// The delta stage, the second of a flush (after join.go, before
// apply.go): the joined events of a batch become one delta per
// experiment, every bucket keyed at the flush's watermark.

// delta builds the deltas of a joined batch. While the watermark is
// unknown (some partition has not reported), keys are computed at the
// batch's earliest time minus the lateness; keys computed early are
// merely finer than canonical, and reading re-keys them.
func (g *genState) delta(j *joined) *deltaBuilder {
	lateness := g.s.config().Pipeline.Lateness.Milliseconds()
	db := newDeltaBuilder(g.times.keyWatermark(j.earliest-lateness), g.id)
	for _, e := range j.touched {
		db.touch(e)
	}
	for _, ev := range j.events {
		if ev.conv {
			db.conversion(ev.e, ev.arm, ev.clickID, ev.origin, ev.tp, ev.offset, ev.clickTS, ev.convTS, false)
		} else {
			db.click(ev.e, ev.arm, ev.tp, ev.offset, ev.origin, ev.clickTS)
		}
	}
	return db
}

// expInfo is what a generation caches about one experiment: its layout, its
// arms and the offsets already applied to it per partition.
type expInfo struct {
	id       string
	layout   estimator.Layout
	place    estimator.Placement // layout's placement, built once
	windowMs int64
	arms     map[string]bool
	// applied is the last offset applied per partition; absent means none.
	applied map[state.TopicPartition]int64
}

// seen reports whether the event at offset of tp was applied to the
// experiment before (a redelivery).
func (e *expInfo) seen(tp state.TopicPartition, offset int64) bool {
	last, ok := e.applied[tp]
	return ok && offset <= last
}

// contrib is one event's contribution to an experiment delta, with the
// message it comes from, so that a delta can be rebuilt without the events
// another writer applied meanwhile (see deltaBuilder.build).
type contrib struct {
	arm    string
	tp     state.TopicPartition
	offset int64
	origin string
	// guarded contributions count through a conversion marker, which
	// keeps them from counting twice; they are never filtered by offset.
	guarded bool
	clickTS int64
	conv    *state.ConversionDelta // nil for a click
}

// deltaBuilder accumulates the per-experiment deltas of one flush, with
// every bucket key computed at the flush's watermark.
type deltaBuilder struct {
	wm       int64
	gen      int32
	exps     map[string]*expInfo
	contribs map[string][]contrib
}

func newDeltaBuilder(wm int64, gen int32) *deltaBuilder {
	return &deltaBuilder{wm: wm, gen: gen, exps: map[string]*expInfo{}, contribs: map[string][]contrib{}}
}

// touch makes sure the experiment gets a delta (for its offsets) even if
// no event of the batch counts for it.
func (b *deltaBuilder) touch(e *expInfo) {
	b.exps[e.id] = e
}

// click adds one click made at ts, read at offset of tp (origin org).
func (b *deltaBuilder) click(e *expInfo, arm string, tp state.TopicPartition, offset int64, org string, ts int64) {
	b.touch(e)
	b.contribs[e.id] = append(b.contribs[e.id], contrib{arm: arm, tp: tp, offset: offset, origin: org, clickTS: ts})
}

// conversion adds one conversion read at origin of the click clickID made
// at clickTS, seen at convTS; tp and offset name the message that made it
// count (the conversion, or the click that claimed it). withClick adds the
// click too (self-attributed), guarded by the conversion marker. The
// caller checked the delay.
func (b *deltaBuilder) conversion(e *expInfo, arm, clickID, org string, tp state.TopicPartition, offset, clickTS, convTS int64, withClick bool) {
	b.touch(e)
	d := convTS - clickTS
	b.contribs[e.id] = append(b.contribs[e.id], contrib{
		arm: arm, tp: tp, offset: offset, origin: org, guarded: withClick, clickTS: clickTS,
		conv: &state.ConversionDelta{ClickID: clickID, Origin: org, DelayBin: e.place.DelayBin(d), DelayMs: d, WithClick: withClick},
	})
}

// origins lists the origin of every event counted for experiment id.
func (b *deltaBuilder) origins(id string) []string {
	var out []string
	for _, c := range b.contribs[id] {
		out = append(out, c.origin)
	}
	return out
}

// ids returns the touched experiments, sorted.
func (b *deltaBuilder) ids() []string {
	ids := make([]string, 0, len(b.exps))
	for id := range b.exps {
		ids = append(ids, id)
	}
	slices.Sort(ids)
	return ids
}

// build returns experiment id's delta covering the batch's ranges minus
// what the experiment applied before (e.applied), with the contributions
// of the messages not applied before; nil if every range was applied
// before. With a nil batch the delta covers no offsets and holds only the
// guarded contributions (a sweep's self-attributed conversions); nil if
// there are none.
func (b *deltaBuilder) build(id string, bt *batch) *state.ExperimentDelta {
	e := b.exps[id]
	d := &state.ExperimentDelta{Experiment: id, Layout: e.layout, Watermark: b.wm, Generation: b.gen, Arms: map[string]*state.ArmDelta{}}
	if bt != nil {
		for _, tp := range bt.order {
			r := *bt.ranges[tp]
			if last, ok := e.applied[tp]; ok {
				if r.To <= last {
					continue
				}
				r.From = max(r.From, last+1)
			}
			d.Ranges = append(d.Ranges, r)
		}
		if len(d.Ranges) == 0 {
			return nil
		}
	}
	clicks := map[string]map[estimator.BucketKey]uint64{}
	n := 0
	for _, c := range b.contribs[id] {
		if bt == nil && !c.guarded {
			continue
		}
		if !c.guarded && e.seen(c.tp, c.offset) {
			continue
		}
		a := d.Arms[c.arm]
		if a == nil {
			a = &state.ArmDelta{}
			d.Arms[c.arm] = a
			clicks[c.arm] = map[estimator.BucketKey]uint64{}
		}
		key, matured := e.place.PendingBucket(c.clickTS, b.wm)
		n++
		if c.conv == nil {
			if matured {
				a.MaturedClicks++
			} else {
				clicks[c.arm][key]++
			}
			continue
		}
		cv := *c.conv
		cv.Bucket, cv.Matured = key, matured
		a.Conversions = append(a.Conversions, cv)
	}
	if bt == nil && n == 0 {
		return nil
	}
	for name, m := range clicks {
		a := d.Arms[name]
		for k, cnt := range m {
			a.Clicks = append(a.Clicks, estimator.Bucket{BucketKey: k, BucketCounts: estimator.BucketCounts{Clicks: cnt}})
		}
		slices.SortFunc(a.Clicks, func(x, y estimator.Bucket) int {
			if x.Level != y.Level {
				return int(x.Level) - int(y.Level)
			}
			return cmpInt64(x.Index, y.Index)
		})
	}
	return d
}

func cmpInt64(a, b int64) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}
