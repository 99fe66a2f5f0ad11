package estimator

// Placement places single clicks and conversions exactly as AddClicks and
// AddConversion do, without a state, for a store that builds partial
// deltas field by field. Build one per layout (Layout.Placement) and reuse
// it: it holds the layout's delay edges, so placing is cheap.
type Placement struct {
	s *ArmState // layout and cached edges only; never holds counts
}

// Placement returns the placement of layout l (defaults applied).
func (l Layout) Placement() Placement {
	l = l.WithDefaults()
	return Placement{s: &ArmState{layout: l, edges: l.DelayEdges()}}
}

// PendingBucket returns the bucket that holds a click made at clickTime
// (Unix ms) in a state at watermark wm, and whether the click has matured
// (is at least a window old), in which case it belongs to the matured
// totals instead of any bucket. The key is canonical at wm; a state at a
// later watermark re-keys it (FromSnapshot, Advance).
func (p Placement) PendingBucket(clickTime, wm int64) (key BucketKey, matured bool) {
	key = p.s.canonical(clickTime, wm, 0)
	return key, p.s.matured(key, wm)
}

// DelayBin returns the delay histogram bin (an index into the bins between
// consecutive DelayEdges) of a conversion delay of delayMs milliseconds, as
// AddConversion counts it. Negative delays fall in bin 0.
func (p Placement) DelayBin(delayMs int64) int {
	return delayBin(p.s.edges, p.s.layout.BinsPerDecade, max(delayMs, 0))
}

// PendingBucket is l.Placement().PendingBucket, for one-off use.
func (l Layout) PendingBucket(clickTime, wm int64) (key BucketKey, matured bool) {
	return l.Placement().PendingBucket(clickTime, wm)
}

// DelayBin is l.Placement().DelayBin, for one-off use.
func (l Layout) DelayBin(delayMs int64) int {
	return l.Placement().DelayBin(delayMs)
}
