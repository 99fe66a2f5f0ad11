package consumer

import (
	"slices"
	"sort"
	"strconv"

	"ripen/estimator"
	"ripen/state"
)

// fetched is one message read from an assigned partition.
type fetched struct {
	tp     state.TopicPartition
	offset int64
	value  []byte
	// hwm is the partition's high watermark (next offset to be written)
	// when the message was fetched.
	hwm int64
	// ts is the event time of a decodable event; hasTS is false for a
	// message that does not decode (it is dead-lettered, never held back).
	ts    int64
	hasTS bool
	// dec is the event as receive decoded it, so that flush does not
	// decode it again; nil if it was not decoded yet.
	dec *decoded
}

// decode decodes m by its topic and sets its event time. The partition
// readers call it, so that decoding runs on one goroutine per partition,
// beside the flush, rather than on the pipeline's.
func (m *fetched) decode(cfg Config) {
	switch m.tp.Topic {
	case cfg.Kafka.ClickTopic:
		d := &decoded{}
		if d.click, d.err = DecodeClick(m.value); d.err == nil {
			m.ts, m.hasTS = d.click.TS, true
		}
		m.dec = d
	case cfg.Kafka.ConversionTopic:
		d := &decoded{}
		if d.conv, d.err = DecodeConversion(m.value); d.err == nil {
			m.ts, m.hasTS = d.conv.TS, true
		}
		m.dec = d
	}
}

// decoded is a message decoded by its topic: click or conv is set, or err
// says why it does not decode.
type decoded struct {
	click Click
	conv  Conversion
	err   error
}

// origin names a message as "<topic>/<partition>/<offset>".
func origin(tp state.TopicPartition, offset int64) string {
	return tp.Topic + "/" + strconv.Itoa(tp.Partition) + "/" + strconv.FormatInt(offset, 10)
}

// batch is the messages of one flush: for each partition a contiguous run
// of offsets starting at the partition's resume offset.
type batch struct {
	msgs   []fetched
	ranges map[state.TopicPartition]*state.OffsetRange
	order  []state.TopicPartition // partitions in first-seen order
}

func newBatch() *batch {
	return &batch{ranges: make(map[state.TopicPartition]*state.OffsetRange)}
}

func (b *batch) add(m fetched) {
	b.msgs = append(b.msgs, m)
	r := b.ranges[m.tp]
	if r == nil {
		b.ranges[m.tp] = &state.OffsetRange{Topic: m.tp.Topic, Partition: m.tp.Partition, From: m.offset, To: m.offset}
		b.order = append(b.order, m.tp)
		return
	}
	r.To = m.offset
}

func (b *batch) len() int { return len(b.msgs) }

// value returns the bytes of the batch's message at offset of tp (for a
// dead letter). release adds each partition's messages as one run in
// offset order, so a binary search in the run finds it; a batch built
// otherwise is searched through.
func (b *batch) value(tp state.TopicPartition, offset int64) ([]byte, bool) {
	r := b.ranges[tp]
	if r == nil || offset < r.From || offset > r.To {
		return nil, false
	}
	if i := slices.IndexFunc(b.msgs, func(m fetched) bool { return m.tp == tp }); i >= 0 {
		j := i + sort.Search(len(b.msgs)-i, func(k int) bool {
			n := b.msgs[i+k]
			return n.tp != tp || n.offset >= offset
		})
		if j < len(b.msgs) && b.msgs[j].tp == tp && b.msgs[j].offset == offset {
			return b.msgs[j].value, true
		}
	}
	for _, m := range b.msgs {
		if m.tp == tp && m.offset == offset {
			return m.value, true
		}
	}
	return nil, false
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

// deltas returns one delta per touched experiment, sorted by id (see
// build); experiments with nothing to apply get none.
func (b *deltaBuilder) deltas(bt *batch) []*state.ExperimentDelta {
	var out []*state.ExperimentDelta
	for _, id := range b.ids() {
		if d := b.build(id, bt); d != nil {
			out = append(out, d)
		}
	}
	return out
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

// lastOf returns the batch's last message of tp.
func (b *batch) lastOf(tp state.TopicPartition) fetched {
	for i := len(b.msgs) - 1; i >= 0; i-- {
		if b.msgs[i].tp == tp {
			return b.msgs[i]
		}
	}
	return fetched{}
}
