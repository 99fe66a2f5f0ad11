package estimator

// FitData is the binned view of one arm that the model is fitted to. It is
// produced from an ArmState at its watermark (ArmState.FitData) and can also
// be built directly by tests. Counts are float64 so that synthetic or
// weighted data fit the same code; all durations are seconds.
type FitData struct {
	// Window is the attribution window W in seconds: a click converts
	// within W with probability q, and delays live on [0, W].
	Window float64
	// Pending holds clicks younger than the window, one entry per sketch
	// bucket, each at a representative age.
	Pending []PendingBin
	// MaturedClicks counts clicks whose age is at least the window;
	// MaturedConversions counts how many of them converted.
	MaturedClicks      float64
	MaturedConversions float64
	// Delays is the histogram of the delays of every observed conversion
	// (of pending and matured clicks alike).
	Delays DelayBins
}

// PendingBin is a group of clicks of about the same age that have not yet
// reached the attribution window.
type PendingBin struct {
	// Age is the representative age in seconds, 0 <= Age < Window.
	Age float64
	// Clicks is how many clicks the bin holds; Converted how many of them
	// have already converted (Converted <= Clicks).
	Clicks    float64
	Converted float64
}

// DelayBins is a histogram of conversion delays on [0, Window].
type DelayBins struct {
	// Edges are the bin boundaries in seconds, increasing, with
	// Edges[0] = 0 and Edges[len-1] = Window; bin k is [Edges[k], Edges[k+1]).
	Edges []float64
	// Counts[k] is the number of conversions whose delay fell in bin k
	// (len(Counts) = len(Edges)-1).
	Counts []float64
	// Count is the exact number of conversions and Sum the exact sum of
	// their delays in seconds.
	Count float64
	Sum   float64
}

// TotalClicks returns every click the data holds, pending and matured.
func (d *FitData) TotalClicks() float64 {
	n := d.MaturedClicks
	for _, b := range d.Pending {
		n += b.Clicks
	}
	return n
}

// TotalConversions returns every observed conversion, pending and matured.
func (d *FitData) TotalConversions() float64 {
	c := d.MaturedConversions
	for _, b := range d.Pending {
		c += b.Converted
	}
	return c
}
