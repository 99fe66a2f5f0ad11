package consumer

import (
	"fmt"
	"math"
	"strings"

	"ripen/state"
)

// noTime marks an event time not known yet.
const noTime = math.MinInt64

// watermarks tracks the event-time watermark of one consumer: the minimum
// over its assigned partitions of the latest event time seen, minus the
// allowed lateness. A partition with messages still to read holds the
// watermark back even before its first event arrives, so that a slow start
// of one partition cannot make another's conversions look overdue. A
// partition that is caught up with its log end does not hold it back
// (otherwise an idle partition would stop it forever); when every
// partition is idle the watermark follows the latest time seen anywhere.
// The watermark never moves backwards.
type watermarks struct {
	latenessMs int64
	parts      map[state.TopicPartition]*partitionTime
	wm         int64
}

type partitionTime struct {
	latest   int64 // latest event time seen, noTime if none
	caughtUp bool  // the last message read was the log's last
}

func newWatermarks(latenessMs int64, assigned []state.TopicPartition) *watermarks {
	w := &watermarks{latenessMs: latenessMs, parts: make(map[state.TopicPartition]*partitionTime, len(assigned)), wm: noTime}
	for _, tp := range assigned {
		w.parts[tp] = &partitionTime{latest: noTime}
	}
	return w
}

// observe records an event of time ts read from tp; caughtUp says whether
// it was the last message of the partition's log when it was fetched.
func (w *watermarks) observe(tp state.TopicPartition, ts int64, caughtUp bool) {
	p := w.parts[tp]
	if p == nil {
		p = &partitionTime{latest: noTime}
		w.parts[tp] = p
	}
	p.latest = max(p.latest, ts)
	p.caughtUp = caughtUp
}

// progress records whether the last message read from tp (decodable or
// not) was the last of its log.
func (w *watermarks) progress(tp state.TopicPartition, caughtUp bool) {
	if p := w.parts[tp]; p != nil {
		p.caughtUp = caughtUp
	}
}

// idle marks tp as caught up with its log end (nothing to read).
func (w *watermarks) idle(tp state.TopicPartition) {
	if p := w.parts[tp]; p != nil {
		p.caughtUp = true
	}
}

// advance recomputes the watermark from what was observed and returns it
// (noTime while nothing was seen).
func (w *watermarks) advance() int64 {
	low, high := int64(math.MaxInt64), int64(noTime)
	active := false
	for _, p := range w.parts {
		if p.latest == noTime {
			if !p.caughtUp {
				return w.wm // its first events are still to come
			}
			continue
		}
		high = max(high, p.latest)
		if !p.caughtUp {
			low = min(low, p.latest)
			active = true
		}
	}
	if high == noTime {
		return w.wm
	}
	cand := high
	if active {
		cand = low
	}
	if cand-w.latenessMs > w.wm {
		w.wm = cand - w.latenessMs
	}
	return w.wm
}

// current returns the last computed watermark.
func (w *watermarks) current() int64 { return w.wm }

// ticker fires once each time an event-time clock crosses a multiple of
// its period: refits happen at the same event times whatever the batching.
type ticker struct {
	periodMs int64
	last     int64 // index of the last tick fired; noTime before the first
}

// due reports whether wm crossed a tick boundary since the last call that
// returned true, and the tick time (the boundary) if so.
func (t *ticker) due(wm int64) (int64, bool) {
	if wm == noTime || t.periodMs <= 0 {
		return 0, false
	}
	idx := floorDiv(wm, t.periodMs)
	if t.last != noTime && idx <= t.last {
		return 0, false
	}
	t.last = idx
	return idx * t.periodMs, true
}

func floorDiv(a, b int64) int64 {
	q := a / b
	if a%b != 0 && (a < 0) != (b < 0) {
		q--
	}
	return q
}

// String describes every partition's latest time and idleness, for logs.
func (w *watermarks) String() string {
	var b strings.Builder
	for tp, p := range w.parts {
		fmt.Fprintf(&b, "%s=%d/%t ", tp, p.latest, p.caughtUp)
	}
	return b.String()
}
