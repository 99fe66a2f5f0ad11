package estimator

// Helpers that let a store build partial deltas of an ArmState field by
// field (one click or one conversion at a time) with exactly the bucket
// placement AddClicks and AddConversion use.

// PendingBucket returns the bucket that holds a click made at clickTime
// (Unix ms) in a state of layout l at watermark wm, and whether the click
// has matured (is at least a window old), in which case it belongs to the
// matured totals instead of any bucket. The key is canonical at wm; a state
// at a later watermark re-keys it (FromSnapshot, Advance).
func (l Layout) PendingBucket(clickTime, wm int64) (key BucketKey, matured bool) {
	s := &ArmState{layout: l.WithDefaults()}
	key = s.canonical(clickTime, wm, 0)
	return key, s.matured(key, wm)
}

// DelayBin returns the delay histogram bin (an index into the bins between
// consecutive DelayEdges) of a conversion delay of delayMs milliseconds, as
// AddConversion counts it. Negative delays fall in bin 0.
func (l Layout) DelayBin(delayMs int64) int {
	return l.WithDefaults().delayBin(max(delayMs, 0))
}
