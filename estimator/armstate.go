package estimator

import (
	"fmt"
	"math"
	"slices"
	"sort"
)

// noWatermark marks a state that has not been advanced yet: every click is
// held at age zero in the finest buckets.
const noWatermark = math.MinInt64

// ArmState is the compact state of one arm: a pending-click sketch (clicks
// younger than the window, by click time, in buckets that widen with age,
// each counting how many of its clicks converted), a histogram of observed
// conversion delays, and the matured totals of clicks older than the window.
// Its size depends on the window and layout, never on traffic.
//
// Bucket placement is a function of the click time and the watermark alone,
// so two states holding the same clicks at the same watermark are identical
// whatever order the clicks arrived in, and Merge is associative and
// commutative. All counts are integers, so merges are exact.
//
// For efficiency, advance a state to (about) the time of the clicks before
// adding them: clicks ahead of the watermark sit in the finest buckets.
type ArmState struct {
	layout    Layout
	watermark int64
	buckets   map[BucketKey]BucketCounts

	maturedClicks      uint64
	maturedConversions uint64

	delays     []uint64
	delayCount uint64
	delaySumMs uint64

	edges []float64 // delay histogram edges, seconds (layout.DelayEdges)
}

// BucketKey names a pending bucket: the bucket of width Base*2^Level that
// starts at Index*Base*2^Level milliseconds after the Unix epoch.
type BucketKey struct {
	Level uint8
	Index int64
}

// BucketCounts are the clicks a pending bucket holds and how many of them
// have converted.
type BucketCounts struct {
	Clicks    uint64
	Converted uint64
}

// NewArmState returns an empty state with layout l (defaults applied). It
// panics if l is invalid; call l.Validate first on user input.
func NewArmState(l Layout) *ArmState {
	l = l.WithDefaults()
	if err := l.Validate(); err != nil {
		panic(fmt.Sprintf("estimator: %v", err))
	}
	edges := l.DelayEdges()
	return &ArmState{
		layout:    l,
		watermark: noWatermark,
		buckets:   make(map[BucketKey]BucketCounts),
		delays:    make([]uint64, len(edges)-1),
		edges:     edges,
	}
}

// Layout returns the state's layout.
func (s *ArmState) Layout() Layout { return s.layout }

// Watermark returns the event time (Unix ms) the state has been advanced to,
// or math.MinInt64 if it never was.
func (s *ArmState) Watermark() int64 { return s.watermark }

// Clicks returns every click the state holds, pending and matured.
func (s *ArmState) Clicks() uint64 {
	n := s.maturedClicks
	for _, c := range s.buckets {
		n += c.Clicks
	}
	return n
}

// Conversions returns every conversion the state holds, pending and matured.
func (s *ArmState) Conversions() uint64 {
	n := s.maturedConversions
	for _, c := range s.buckets {
		n += c.Converted
	}
	return n
}

// Matured returns the clicks older than the window and their conversions.
func (s *ArmState) Matured() (clicks, conversions uint64) {
	return s.maturedClicks, s.maturedConversions
}

// PendingBuckets returns how many pending buckets the sketch holds.
func (s *ArmState) PendingBuckets() int { return len(s.buckets) }

// floorDiv is integer division rounding toward minus infinity.
func floorDiv(a, b int64) int64 {
	q := a / b
	if (a%b != 0) && ((a < 0) != (b < 0)) {
		q--
	}
	return q
}

// keyAt returns the key of the level-k bucket holding time t.
func (s *ArmState) keyAt(t int64, k uint8) BucketKey {
	return BucketKey{Level: k, Index: floorDiv(t, s.layout.levelWidth(k))}
}

// end returns the exclusive end time of bucket key.
func (s *ArmState) end(key BucketKey) int64 {
	w := s.layout.levelWidth(key.Level)
	return key.Index*w + w
}

// allowed reports whether bucket key may exist at watermark wm: its width is
// at most AgeError times the age of its youngest click.
func (s *ArmState) allowed(key BucketKey, wm int64) bool {
	if wm == noWatermark {
		return key.Level == 0
	}
	w := float64(s.layout.levelWidth(key.Level))
	return w <= s.layout.AgeError*float64(wm-s.end(key))
}

// canonical returns the key of the coarsest allowed bucket holding time t at
// watermark wm, never finer than level min. Allowed levels are closed
// downwards (a child of an allowed bucket is allowed), so the coarsest one is
// found by climbing until the parent is not allowed.
func (s *ArmState) canonical(t int64, wm int64, min uint8) BucketKey {
	k := min
	top := s.layout.maxLevel()
	for k < top && s.allowed(s.keyAt(t, k+1), wm) {
		k++
	}
	return s.keyAt(t, k)
}

// matured reports whether every click of bucket key is at least a window old.
func (s *ArmState) matured(key BucketKey, wm int64) bool {
	return wm != noWatermark && wm-s.end(key) >= s.layout.Window.Milliseconds()
}

// AddClicks records n clicks made at clickTime (Unix ms).
func (s *ArmState) AddClicks(clickTime int64, n uint64) {
	if n == 0 {
		return
	}
	key := s.canonical(clickTime, s.watermark, 0)
	if s.matured(key, s.watermark) {
		s.maturedClicks += n
		return
	}
	c := s.buckets[key]
	c.Clicks += n
	s.buckets[key] = c
}

// AddConversion records the conversion of a click made at clickTime, seen at
// convTime (both Unix ms). The caller has joined the conversion to a click
// already added and checked that 0 <= convTime-clickTime <= Window.
func (s *ArmState) AddConversion(clickTime, convTime int64) {
	key := s.canonical(clickTime, s.watermark, 0)
	if s.matured(key, s.watermark) {
		s.maturedConversions++
	} else {
		c := s.buckets[key]
		c.Converted++
		s.buckets[key] = c
	}
	d := convTime - clickTime
	if d < 0 {
		d = 0
	}
	s.delays[delayBin(s.edges, s.layout.BinsPerDecade, d)]++
	s.delayCount++
	s.delaySumMs += uint64(d)
}

// delayBin returns the histogram bin of a delay of d milliseconds.
func (l Layout) delayBin(d int64) int {
	return delayBin(l.DelayEdges(), l.BinsPerDecade, d)
}

// delayBin returns the bin of a delay of d milliseconds among edges (from
// Layout.DelayEdges with binsPerDecade).
func delayBin(edges []float64, binsPerDecade int, d int64) int {
	sec := float64(d) / 1000
	n := len(edges) - 1
	if sec < edges[1] {
		return 0
	}
	// Index from the log, then correct for rounding against the edges.
	i := int(math.Floor(math.Log10(sec/firstDelayEdge)*float64(binsPerDecade))) + 1
	i = max(1, min(i, n-1))
	for i > 1 && sec < edges[i] {
		i--
	}
	for i < n-1 && sec >= edges[i+1] {
		i++
	}
	return i
}

// Advance moves the state's watermark to wm (Unix ms), merging buckets that
// have aged enough to widen and collapsing buckets older than the window
// into the matured totals. A watermark earlier than the current one is
// ignored. No click or conversion is ever lost.
func (s *ArmState) Advance(wm int64) {
	if wm <= s.watermark {
		return
	}
	s.watermark = wm
	if len(s.buckets) == 0 {
		return
	}
	next := make(map[BucketKey]BucketCounts, len(s.buckets))
	for key, c := range s.buckets {
		start := key.Index * s.layout.levelWidth(key.Level)
		nk := s.canonical(start, wm, key.Level)
		if s.matured(nk, wm) {
			s.maturedClicks += c.Clicks
			s.maturedConversions += c.Converted
			continue
		}
		acc := next[nk]
		acc.Clicks += c.Clicks
		acc.Converted += c.Converted
		next[nk] = acc
	}
	s.buckets = next
}

// Clone returns a deep copy of s.
func (s *ArmState) Clone() *ArmState {
	c := *s
	c.buckets = make(map[BucketKey]BucketCounts, len(s.buckets))
	for k, v := range s.buckets {
		c.buckets[k] = v
	}
	c.delays = slices.Clone(s.delays)
	return &c
}

// Merge adds o into s: afterwards s holds the union of both states' clicks
// and conversions at the later of the two watermarks. o is not changed.
func (s *ArmState) Merge(o *ArmState) error {
	if s.layout != o.layout {
		return fmt.Errorf("merge arm states: layouts differ (%+v vs %+v)", s.layout, o.layout)
	}
	if o.watermark > s.watermark {
		s.Advance(o.watermark)
	}
	src := o
	if s.watermark > o.watermark {
		src = o.Clone()
		src.Advance(s.watermark)
	}
	for k, v := range src.buckets {
		acc := s.buckets[k]
		acc.Clicks += v.Clicks
		acc.Converted += v.Converted
		s.buckets[k] = acc
	}
	s.maturedClicks += src.maturedClicks
	s.maturedConversions += src.maturedConversions
	for i, v := range src.delays {
		s.delays[i] += v
	}
	s.delayCount += src.delayCount
	s.delaySumMs += src.delaySumMs
	return nil
}

// sortedKeys returns the pending bucket keys in order of start time, finer
// level first on ties, so that everything derived from them is deterministic.
func (s *ArmState) sortedKeys() []BucketKey {
	keys := make([]BucketKey, 0, len(s.buckets))
	for k := range s.buckets {
		keys = append(keys, k)
	}
	sort.Slice(keys, func(i, j int) bool {
		si := keys[i].Index * s.layout.levelWidth(keys[i].Level)
		sj := keys[j].Index * s.layout.levelWidth(keys[j].Level)
		if si != sj {
			return si < sj
		}
		return keys[i].Level < keys[j].Level
	})
	return keys
}

// FitData returns the binned view of the state at its watermark that the
// model is fitted to. Each pending bucket becomes one bin at the age of its
// midpoint, clamped to [0, Window).
func (s *ArmState) FitData() FitData {
	edges := slices.Clone(s.edges)
	w := s.layout.Window.Seconds()
	d := FitData{
		Window:             w,
		MaturedClicks:      float64(s.maturedClicks),
		MaturedConversions: float64(s.maturedConversions),
		Delays: DelayBins{
			Edges:  edges,
			Counts: make([]float64, len(s.delays)),
			Count:  float64(s.delayCount),
			Sum:    float64(s.delaySumMs) / 1000,
		},
	}
	for i, v := range s.delays {
		d.Delays.Counts[i] = float64(v)
	}
	for _, k := range s.sortedKeys() {
		c := s.buckets[k]
		age := 0.0
		if s.watermark != noWatermark {
			width := s.layout.levelWidth(k.Level)
			mid := float64(k.Index*width) + float64(width)/2
			age = (float64(s.watermark) - mid) / 1000
		}
		age = math.Max(0, math.Min(age, math.Nextafter(w, 0)))
		d.Pending = append(d.Pending, PendingBin{Age: age, Clicks: float64(c.Clicks), Converted: float64(c.Converted)})
	}
	return d
}
