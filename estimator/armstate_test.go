package estimator

import (
	"math"
	"math/rand/v2"
	"reflect"
	"testing"
	"time"
)

const hourMs = int64(time.Hour / time.Millisecond)

// t0 is an arbitrary event-time origin for tests (2026-03-02T00:00:00Z).
var t0 = time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC).UnixMilli()

type testEvent struct {
	click    int64
	conv     int64 // 0: no conversion
	hasConv  bool
	clickCnt uint64
}

// randomEvents returns n clicks spread over span ms after t0, a fraction of
// them converting after an exponential delay that stays within the window.
func randomEvents(r *rand.Rand, n int, span int64, window time.Duration) []testEvent {
	evs := make([]testEvent, n)
	for i := range evs {
		c := t0 + r.Int64N(span)
		evs[i] = testEvent{click: c, clickCnt: 1 + uint64(r.IntN(3))}
		if r.Float64() < 0.3 {
			d := int64(r.ExpFloat64() * float64(6*hourMs))
			if d <= window.Milliseconds() {
				evs[i].conv, evs[i].hasConv = c+d, true
			}
		}
	}
	return evs
}

// build applies events to a fresh state, advancing the watermark to each
// event's time as a stream would, then to the final watermark.
func build(l Layout, evs []testEvent, final int64) *ArmState {
	return buildCut(l, evs, final, final)
}

// buildCut is build with conversions after convCut left out.
func buildCut(l Layout, evs []testEvent, final, convCut int64) *ArmState {
	s := NewArmState(l)
	for _, e := range evs {
		s.Advance(e.click)
		s.AddClicks(e.click, e.clickCnt)
		if e.hasConv && e.conv <= convCut {
			s.AddConversion(e.click, e.conv)
		}
	}
	s.Advance(final)
	return s
}

func TestMergeAssociativeAndOrderIndependent(t *testing.T) {
	l := Layout{Window: 3 * 24 * time.Hour}
	for seed := uint64(1); seed <= 20; seed++ {
		r := rand.New(rand.NewPCG(seed, 7))
		evs := randomEvents(r, 600, 5*24*hourMs, l.Window)
		final := t0 + 5*24*hourMs + r.Int64N(2*24*hourMs)
		// Split into three parts at random; each part is built with its own
		// watermark history, as three consumers would.
		var parts [3][]testEvent
		for _, e := range evs {
			i := r.IntN(3)
			parts[i] = append(parts[i], e)
		}
		a := buildCut(l, parts[0], final-r.Int64N(hourMs), final)
		b := buildCut(l, parts[1], final, final)
		c := buildCut(l, parts[2], final-r.Int64N(3*hourMs), final)

		ab := a.Clone()
		mustMerge(t, ab, b)
		abc1 := ab.Clone()
		mustMerge(t, abc1, c) // (a+b)+c
		bc := b.Clone()
		mustMerge(t, bc, c)
		abc2 := a.Clone()
		mustMerge(t, abc2, bc) // a+(b+c)
		cba := c.Clone()
		mustMerge(t, cba, b)
		mustMerge(t, cba, a) // c+b+a

		// The state of the whole stream, processed in one place in order.
		whole := build(l, evs, final)
		for name, got := range map[string]*ArmState{"(a+b)+c": abc1, "a+(b+c)": abc2, "c+b+a": cba} {
			if !reflect.DeepEqual(got.Snapshot(), whole.Snapshot()) {
				t.Fatalf("seed %d: %s differs from the state of the whole stream", seed, name)
			}
		}
	}
}

func mustMerge(t *testing.T, s, o *ArmState) {
	t.Helper()
	if err := s.Merge(o); err != nil {
		t.Fatal(err)
	}
}

func TestAdvanceNeverLosesAClick(t *testing.T) {
	l := Layout{Window: 2 * 24 * time.Hour}
	r := rand.New(rand.NewPCG(3, 3))
	evs := randomEvents(r, 2000, 4*24*hourMs, l.Window)
	s := NewArmState(l)
	var clicks, convs uint64
	for _, e := range evs {
		s.AddClicks(e.click, e.clickCnt)
		clicks += e.clickCnt
		if e.hasConv {
			s.AddConversion(e.click, e.conv)
			convs++
		}
	}
	for wm := t0; wm < t0+8*24*hourMs; wm += r.Int64N(5 * hourMs) {
		s.Advance(wm)
		if s.Clicks() != clicks || s.Conversions() != convs {
			t.Fatalf("at watermark +%dh: %d clicks %d conversions, want %d and %d",
				(wm-t0)/hourMs, s.Clicks(), s.Conversions(), clicks, convs)
		}
	}
	if mc, _ := s.Matured(); mc != clicks || s.PendingBuckets() != 0 {
		t.Fatalf("after the window every click is matured: matured %d of %d, %d buckets left", mc, clicks, s.PendingBuckets())
	}
}

func TestAgeErrorBound(t *testing.T) {
	for _, eps := range []float64{0.05, 0.01} {
		l := Layout{Window: 14 * 24 * time.Hour, AgeError: eps}.WithDefaults()
		r := rand.New(rand.NewPCG(11, uint64(eps*1000)))
		wm := t0 + 20*24*hourMs
		for i := 0; i < 3000; i++ {
			click := wm - r.Int64N(l.Window.Milliseconds())
			s := NewArmState(l)
			s.Advance(click)
			s.AddClicks(click, 1)
			s.Advance(wm)
			fd := s.FitData()
			age := float64(wm-click) / 1000
			if len(fd.Pending) == 0 {
				// Collapsed into matured: allowed only once the bucket is past the window.
				if age < (1-eps)*l.Window.Seconds() {
					t.Fatalf("eps %v: click of age %.0fs matured early", eps, age)
				}
				continue
			}
			got := fd.Pending[0].Age
			minAge := l.Base.Seconds() / eps // below this the finest bucket rules
			if age > minAge && math.Abs(got-age) > eps/2*age*(1+1e-12) {
				t.Fatalf("eps %v: age %.1fs represented as %.1fs (error %.4f > %.4f)", eps, age, got, math.Abs(got-age)/age, eps/2)
			}
		}
	}
}

func TestSizeIndependentOfTraffic(t *testing.T) {
	l := Layout{Window: 7 * 24 * time.Hour}.WithDefaults()
	wm := t0 + 30*24*hourMs
	// Saturate the sketch: one click in every finest bucket of the window.
	full := NewArmState(l)
	full.Advance(wm)
	for c := wm - l.Window.Milliseconds(); c <= wm; c += l.Base.Milliseconds() {
		full.AddClicks(c, 1)
	}
	// Each level holds buckets for ages from about width/eps to twice that,
	// so at most 2/eps+2 buckets per level.
	bound := int(l.maxLevel()+1) * int(2/l.AgeError+2)
	if full.PendingBuckets() > bound {
		t.Fatalf("saturated sketch holds %d buckets, bound %d", full.PendingBuckets(), bound)
	}
	saturated := full.PendingBuckets()
	// More traffic at any ages cannot add buckets to a saturated sketch.
	r := rand.New(rand.NewPCG(5, 5))
	for i := 0; i < 200000; i++ {
		full.AddClicks(wm-r.Int64N(l.Window.Milliseconds()+24*hourMs), 1+uint64(r.IntN(1000)))
	}
	b, err := full.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("saturated: %d buckets (bound %d), %d bytes, %d clicks", full.PendingBuckets(), bound, len(b), full.Clicks())
	if full.PendingBuckets() != saturated {
		t.Fatalf("bucket count grew with traffic from %d to %d", saturated, full.PendingBuckets())
	}
}

func TestBinaryRoundTrip(t *testing.T) {
	l := Layout{Window: 3 * 24 * time.Hour}
	r := rand.New(rand.NewPCG(9, 1))
	s := build(l, randomEvents(r, 500, 4*24*hourMs, l.Window), t0+4*24*hourMs)
	b, err := s.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	var got ArmState
	if err := got.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(got.Snapshot(), s.Snapshot()) {
		t.Fatal("round trip changed the state")
	}
	for cut := 0; cut < len(b); cut += 1 + len(b)/50 {
		var x ArmState
		if err := x.UnmarshalBinary(b[:cut]); err == nil {
			t.Fatalf("truncated at %d of %d bytes: no error", cut, len(b))
		}
	}
}

func TestDelayBinsMatchEdges(t *testing.T) {
	l := Layout{Window: 30 * 24 * time.Hour}.WithDefaults()
	edges := l.DelayEdges()
	if edges[0] != 0 || edges[1] != 60 || edges[len(edges)-1] != l.Window.Seconds() {
		t.Fatalf("edges start %v %v end %v", edges[0], edges[1], edges[len(edges)-1])
	}
	r := rand.New(rand.NewPCG(2, 2))
	for i := 0; i < 20000; i++ {
		d := int64(math.Exp(r.Float64() * math.Log(float64(l.Window.Milliseconds()))))
		k := l.delayBin(d)
		sec := float64(d) / 1000
		if sec < edges[k] || (sec >= edges[k+1] && k < len(edges)-2) {
			t.Fatalf("delay %vs in bin %d [%v, %v)", sec, k, edges[k], edges[k+1])
		}
	}
	// Every edge lands in the bin it opens.
	for k := 1; k < len(edges)-1; k++ {
		ms := int64(math.Ceil(edges[k] * 1000))
		if got := l.delayBin(ms); got != k {
			t.Fatalf("delay at edge %d (%vms) in bin %d", k, ms, got)
		}
	}
}

func TestLayoutValidate(t *testing.T) {
	cases := []struct {
		name string
		l    Layout
		ok   bool
	}{
		{"defaults", Layout{}, true},
		{"window below a minute", Layout{Window: 30 * time.Second}, false},
		{"sub-millisecond base", Layout{Base: time.Microsecond}, false},
		{"age error above one", Layout{AgeError: 1.5}, false},
		{"negative age error", Layout{AgeError: -0.1}, false},
		{"too many bins", Layout{BinsPerDecade: 5000}, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if err := c.l.Validate(); (err == nil) != c.ok {
				t.Fatalf("Validate() = %v, want ok=%v", err, c.ok)
			}
		})
	}
}
