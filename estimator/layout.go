package estimator

import (
	"errors"
	"fmt"
	"math"
	"time"
)

// Layout fixes the shape of an arm's state: the attribution window, the
// resolution of the pending-click sketch and the delay histogram bins. Two
// states merge only when their layouts are equal.
type Layout struct {
	// Window is the attribution window W: a conversion more than W after
	// its click is not attributed. Default: 7 days.
	Window time.Duration
	// Base is the width of the finest pending-click bucket. Buckets double
	// in width as their clicks age. Default: 1s.
	Base time.Duration
	// AgeError bounds a bucket's width relative to the age of its youngest
	// click, so the age the model uses (the bucket midpoint) is within
	// AgeError/2 of every click's true age once that age exceeds Base/AgeError.
	// Default: 0.05.
	AgeError float64
	// BinsPerDecade is the number of log-spaced delay histogram bins per
	// factor of ten of delay between one minute and the window; delays under
	// one minute share one bin. Default: 20.
	BinsPerDecade int
}

// Defaults of Layout, applied by WithDefaults to zero fields.
const (
	DefaultWindow        = 7 * 24 * time.Hour
	DefaultBase          = time.Second
	DefaultAgeError      = 0.05
	DefaultBinsPerDecade = 20
)

// firstDelayEdge is the upper edge of the lowest delay bin, in seconds.
const firstDelayEdge = 60.0

// WithDefaults returns l with every zero field set to its default.
func (l Layout) WithDefaults() Layout {
	if l.Window == 0 {
		l.Window = DefaultWindow
	}
	if l.Base == 0 {
		l.Base = DefaultBase
	}
	if l.AgeError == 0 {
		l.AgeError = DefaultAgeError
	}
	if l.BinsPerDecade == 0 {
		l.BinsPerDecade = DefaultBinsPerDecade
	}
	return l
}

// Validate reports what is wrong with l, after defaults are applied.
func (l Layout) Validate() error {
	l = l.WithDefaults()
	var errs []error
	if l.Base < time.Millisecond || l.Base%time.Millisecond != 0 {
		errs = append(errs, fmt.Errorf("layout: base bucket width %v must be a whole number of milliseconds, at least 1ms", l.Base))
	}
	if l.Window < time.Minute || l.Window%time.Millisecond != 0 {
		errs = append(errs, fmt.Errorf("layout: window %v must be a whole number of milliseconds, at least 1m", l.Window))
	}
	if l.Window <= l.Base {
		errs = append(errs, fmt.Errorf("layout: window %v must exceed the base bucket width %v", l.Window, l.Base))
	}
	if !(l.AgeError > 0 && l.AgeError <= 1) {
		errs = append(errs, fmt.Errorf("layout: age error %v must be in (0, 1]", l.AgeError))
	}
	if l.BinsPerDecade < 1 || l.BinsPerDecade > 1000 {
		errs = append(errs, fmt.Errorf("layout: bins per decade %d must be in [1, 1000]", l.BinsPerDecade))
	}
	return errors.Join(errs...)
}

// DelayEdges returns the delay histogram's bin edges in seconds: 0, one
// minute, then log-spaced edges, the last one equal to the window.
func (l Layout) DelayEdges() []float64 {
	l = l.WithDefaults()
	w := l.Window.Seconds()
	edges := []float64{0}
	if w <= firstDelayEdge {
		return append(edges, w)
	}
	for i := 0; ; i++ {
		e := firstDelayEdge * math.Pow(10, float64(i)/float64(l.BinsPerDecade))
		if e >= w*(1-1e-9) {
			break
		}
		edges = append(edges, e)
	}
	return append(edges, w)
}

// levelWidth returns the width in milliseconds of a pending bucket at level k.
func (l Layout) levelWidth(k uint8) int64 {
	return l.Base.Milliseconds() << k
}

// maxLevel is the coarsest pending bucket level: no bucket is wider than the
// window.
func (l Layout) maxLevel() uint8 {
	var k uint8
	for l.levelWidth(k+1) <= l.Window.Milliseconds() && k < 40 {
		k++
	}
	return k
}
