package estimator

import (
	"testing"
	"time"
)

// TestWindowObserved checks when the histogram family may join the auto
// average: only once the oldest clicks have been at risk through nearly
// the whole window (histWindowSeen).
func TestWindowObserved(t *testing.T) {
	w := DefaultWindow
	for _, tc := range []struct {
		name   string
		oldest time.Duration // age of the oldest click at the watermark
		want   bool
	}{
		{"a tenth of the window", w / 10, false},
		{"nine tenths of the window", w * 9 / 10, false},
		{"the whole window", w, true},
		{"matured clicks", w + 24*time.Hour, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			s := NewArmState(Layout{})
			wm := fitEpoch + (30 * 24 * time.Hour).Milliseconds()
			s.Advance(wm - tc.oldest.Milliseconds())
			// One click per hour from the oldest age down to one hour.
			for age := tc.oldest; age >= time.Hour; age -= time.Hour {
				s.AddClicks(wm-age.Milliseconds(), 1)
			}
			s.Advance(wm)
			d := s.FitData()
			p, err := prepare(&d)
			if err != nil {
				t.Fatal(err)
			}
			if got := windowObserved(p); got != tc.want {
				t.Errorf("windowObserved = %v with the oldest click %v old, want %v", got, tc.oldest, tc.want)
			}
		})
	}
}
