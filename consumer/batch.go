package consumer

import (
	"slices"
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

// expInfo is what a generation caches about one experiment: its layout, its
// arms and the offsets already applied to it per partition.
type expInfo struct {
	id       string
	layout   estimator.Layout
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

// armDelta accumulates one arm's share of a flush.
type armDelta struct {
	clicks  map[estimator.BucketKey]uint64
	matured uint64
	convs   []state.ConversionDelta
}

// deltaBuilder accumulates the per-experiment deltas of one flush, with
// every bucket key computed at the flush's watermark.
type deltaBuilder struct {
	wm     int64
	gen    int32
	exps   map[string]*expInfo
	arms   map[string]map[string]*armDelta
	events map[string]int // counted events per experiment
	// origins lists the origin of every counted event per experiment.
	origins map[string][]string
}

func newDeltaBuilder(wm int64, gen int32) *deltaBuilder {
	return &deltaBuilder{wm: wm, gen: gen, exps: map[string]*expInfo{}, arms: map[string]map[string]*armDelta{}, events: map[string]int{}, origins: map[string][]string{}}
}

func (b *deltaBuilder) arm(e *expInfo, arm string) *armDelta {
	b.exps[e.id] = e
	m := b.arms[e.id]
	if m == nil {
		m = map[string]*armDelta{}
		b.arms[e.id] = m
	}
	a := m[arm]
	if a == nil {
		a = &armDelta{clicks: map[estimator.BucketKey]uint64{}}
		m[arm] = a
	}
	return a
}

// touch makes sure the experiment gets a delta (for its offsets) even if
// no event of the batch counts for it.
func (b *deltaBuilder) touch(e *expInfo) {
	b.exps[e.id] = e
}

// click adds one click made at ts, read at origin.
func (b *deltaBuilder) click(e *expInfo, arm, origin string, ts int64) {
	a := b.arm(e, arm)
	key, matured := e.layout.PendingBucket(ts, b.wm)
	if matured {
		a.matured++
	} else {
		a.clicks[key]++
	}
	b.events[e.id]++
	b.origins[e.id] = append(b.origins[e.id], origin)
}

// conversion adds one conversion, read at origin, of the click clickID made
// at clickTS, seen at convTS. The caller checked the delay.
func (b *deltaBuilder) conversion(e *expInfo, arm, clickID, origin string, clickTS, convTS int64) {
	a := b.arm(e, arm)
	key, matured := e.layout.PendingBucket(clickTS, b.wm)
	d := convTS - clickTS
	a.convs = append(a.convs, state.ConversionDelta{
		ClickID: clickID, Origin: origin, Bucket: key, Matured: matured,
		DelayBin: e.layout.DelayBin(d), DelayMs: d,
	})
	b.events[e.id]++
	b.origins[e.id] = append(b.origins[e.id], origin)
}

// deltas returns one delta per touched experiment, sorted by id, covering
// the batch's ranges minus what each experiment applied before. An
// experiment for which every range was applied before gets none.
func (b *deltaBuilder) deltas(bt *batch) []*state.ExperimentDelta {
	ids := make([]string, 0, len(b.exps))
	for id := range b.exps {
		ids = append(ids, id)
	}
	slices.Sort(ids)
	var out []*state.ExperimentDelta
	for _, id := range ids {
		e := b.exps[id]
		d := &state.ExperimentDelta{Experiment: id, Layout: e.layout, Watermark: b.wm, Generation: b.gen, Arms: map[string]*state.ArmDelta{}}
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
			continue
		}
		for name, a := range b.arms[id] {
			ad := &state.ArmDelta{MaturedClicks: a.matured, Conversions: a.convs}
			for k, n := range a.clicks {
				ad.Clicks = append(ad.Clicks, estimator.Bucket{BucketKey: k, BucketCounts: estimator.BucketCounts{Clicks: n}})
			}
			slices.SortFunc(ad.Clicks, func(x, y estimator.Bucket) int {
				if x.Level != y.Level {
					return int(x.Level) - int(y.Level)
				}
				return cmpInt64(x.Index, y.Index)
			})
			d.Arms[name] = ad
		}
		out = append(out, d)
	}
	return out
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
