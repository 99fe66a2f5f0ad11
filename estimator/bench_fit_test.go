package estimator

import (
	"math/rand/v2"
	"testing"
)

// Benchmark data: one arm, q = 0.05, exponential delays with a one-day
// mean (before truncation), a 7-day window, clicks uniform over 10 days,
// fitted as of day 10 (about 30% of clicks matured).
const (
	benchSpan = 10 * daySec
	benchQ    = 0.05
)

func benchClicks(n int) []simClick {
	r := rand.New(rand.NewPCG(99, uint64(n)))
	return simulate(r, n, benchSpan, benchQ, truncExp(1/daySec, 7*daySec))
}

// benchState returns an ArmState holding clicks clicks: the 1e4-click
// arm's state merged with itself clicks/1e4 times, so the larger states
// have the same shape with every count scaled and setup stays fast.
func benchState(b *testing.B, clicks int) *ArmState {
	b.Helper()
	const base = 10000
	sim := benchClicks(base)
	s := NewArmState(Layout{})
	s.Advance(fitEpoch + int64(benchSpan*1000))
	for _, c := range sim {
		ct := fitEpoch + int64(c.at*1000)
		s.AddClicks(ct, 1)
		if c.delay >= 0 && c.at+c.delay <= benchSpan {
			s.AddConversion(ct, ct+int64(c.delay*1000))
		}
	}
	// Double while possible, then add the base for the remainder.
	acc := NewArmState(Layout{})
	acc.Advance(s.Watermark())
	unit, k := s.Clone(), clicks/base
	for k > 0 {
		if k&1 == 1 {
			if err := acc.Merge(unit); err != nil {
				b.Fatal(err)
			}
		}
		k >>= 1
		if k > 0 {
			if err := unit.Merge(unit.Clone()); err != nil {
				b.Fatal(err)
			}
		}
	}
	if acc.Clicks() != uint64(clicks) {
		b.Fatalf("state holds %d clicks, want %d", acc.Clicks(), clicks)
	}
	return acc
}

var benchSizes = []struct {
	name   string
	clicks int
}{{"clicks=1e4", 1e4}, {"clicks=1e6", 1e6}, {"clicks=1e8", 1e8}}

// BenchmarkRefit measures one refit of an arm from its state: FitData and
// FitModel with the default options (all three families, AIC choice). Its
// cost depends on the state's bins, not on the clicks absorbed.
func BenchmarkRefit(b *testing.B) {
	for _, sz := range benchSizes {
		b.Run(sz.name, func(b *testing.B) {
			s := benchState(b, sz.clicks)
			enc, err := s.MarshalBinary()
			if err != nil {
				b.Fatal(err)
			}
			b.ResetTimer()
			for range b.N {
				d := s.FitData()
				if _, err := FitModel(&d, FitOptions{}); err != nil {
					b.Fatal(err)
				}
			}
			// After the loop: ResetTimer deletes reported metrics.
			b.ReportMetric(float64(len(enc)), "state-bytes/arm")
		})
	}
}

// BenchmarkRefitExponential is BenchmarkRefit with the exponential family
// only, the like-for-like comparison with BenchmarkRefitPerClick.
func BenchmarkRefitExponential(b *testing.B) {
	for _, sz := range benchSizes {
		b.Run(sz.name, func(b *testing.B) {
			s := benchState(b, sz.clicks)
			b.ResetTimer()
			for range b.N {
				d := s.FitData()
				if _, err := FitModel(&d, FitOptions{Family: FamilyExponential}); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// BenchmarkRefitPosterior measures the posterior of q of one arm
// (ArmPosterior: fit and posterior together) for each delay family and
// for auto, on the 1e4- and 1e6-click states.
func BenchmarkRefitPosterior(b *testing.B) {
	for _, sz := range benchSizes[:2] {
		s := benchState(b, sz.clicks)
		d := s.FitData()
		for _, fam := range []DelayFamily{FamilyAuto, FamilyExponential, FamilyWeibull, FamilyLognormal, FamilyHistogram} {
			b.Run(sz.name+"/"+fam.String(), func(b *testing.B) {
				for range b.N {
					if _, err := ArmPosterior(&d, fam, Prior{}, nil); err != nil {
						b.Fatal(err)
					}
				}
			})
		}
	}
}

// BenchmarkRefitPerClick fits the same model (exponential delay, window
// truncation) click by click from exact ages and delays with gonum's BFGS,
// for comparison with the binned refit.
func BenchmarkRefitPerClick(b *testing.B) {
	for _, sz := range benchSizes[:2] {
		b.Run(sz.name, func(b *testing.B) {
			obs := observe(benchClicks(sz.clicks), benchSpan)
			q0, rate0 := naiveStart(obs)
			b.ResetTimer()
			for range b.N {
				perClickExpMLE(b, obs, 7*daySec, q0, rate0)
			}
		})
	}
}
