package state

import (
	"errors"
	"fmt"
	"reflect"
	"slices"
	"testing"
	"time"

	"ripen/estimator"
)

// TestApplyLoadMatchesEstimator applies a stream's deltas and checks that
// Load gives exactly the state the estimator builds from the same events.
func TestApplyLoadMatchesEstimator(t *testing.T) {
	cases := []struct {
		name    string
		seed    uint64
		clicks  int
		parts   int
		batchSz int
	}{
		{"small batches", 1, 600, 2, 25},
		{"large batches", 2, 1500, 4, 400},
		{"one batch", 3, 300, 1, 10_000},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			s, _, _ := newStore(t, Options{})
			ctx := testCtx(t)
			steps := singleInstance(scenario(tc.seed, tc.clicks, tc.parts), tc.batchSz)
			applySteps(t, ctx, s, steps, 1)
			ref := reference(testLayout, steps)
			assertMatches(t, ctx, s, ref)

			exps, err := s.Experiments(ctx)
			if err != nil {
				t.Fatal(err)
			}
			if !reflect.DeepEqual(exps, []string{"exp-a", "exp-b"}) {
				t.Errorf("Experiments = %v", exps)
			}
			e, err := s.Load(ctx, "exp-a")
			if err != nil {
				t.Fatal(err)
			}
			if e.Layout != testLayout {
				t.Errorf("layout %+v, want %+v", e.Layout, testLayout)
			}
			if want := reference(testLayout, steps)["exp-a"]["red"].Watermark(); e.Watermark != want {
				t.Errorf("watermark %d, want %d", e.Watermark, want)
			}
			// The stored offsets are the last offsets of exp-a's events.
			last := map[TopicPartition]int64{}
			for _, st := range steps {
				for _, ev := range st.events {
					if ev.exp == "exp-a" {
						last[TopicPartition{ev.topic, ev.partition}] = ev.offset
					}
				}
			}
			offs, err := s.Offsets(ctx, "exp-a")
			if err != nil {
				t.Fatal(err)
			}
			if len(offs) != len(last) {
				t.Errorf("offsets for %d partitions, want %d", len(offs), len(last))
			}
			for tp, o := range last {
				if offs[tp] != (AppliedOffset{Generation: 1, Offset: o}) || e.Offsets[tp] != offs[tp] {
					t.Errorf("offset %s = %+v (load %+v), want 1:%d", tp, offs[tp], e.Offsets[tp], o)
				}
			}
		})
	}
}

// TestApplyTwice applies every delta twice in a row (as a go-redis retry
// after a read timeout would) and checks the state counts it once.
func TestApplyTwice(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	steps := singleInstance(scenario(7, 500, 2), 40)
	for i, st := range steps {
		for _, d := range buildDeltas(testLayout, st.wm, 1, st.events) {
			first, err := s.Apply(ctx, d)
			if err != nil {
				t.Fatalf("step %d: %v", i, err)
			}
			again, err := s.Apply(ctx, d)
			if err != nil {
				t.Fatalf("step %d again: %v", i, err)
			}
			if first.Skipped || !again.Skipped || again.Counted != 0 {
				t.Fatalf("step %d: first %+v, again %+v", i, first, again)
			}
		}
	}
	assertMatches(t, ctx, s, reference(testLayout, steps))
}

// oneClick is a delta with one click on arm "a" covering range [from, to]
// of partition p.
func oneClick(gen int32, p int, from, to int64) *ExperimentDelta {
	wm := t0 + to*1000
	key, _ := bucketAt(testLayout, wm, wm)
	return &ExperimentDelta{
		Experiment: "e", Layout: testLayout, Watermark: wm, Generation: gen,
		Ranges: []OffsetRange{{Topic: "clicks", Partition: p, From: from, To: to}},
		Arms:   map[string]*ArmDelta{"a": {Clicks: []estimator.Bucket{{BucketKey: key, BucketCounts: estimator.BucketCounts{Clicks: 1}}}}},
	}
}

func clicksOf(t *testing.T, s *Store, arm string) uint64 {
	t.Helper()
	e, err := s.Load(testCtx(t), "e")
	if err != nil {
		t.Fatalf("load: %v", err)
	}
	return e.States[arm].Clicks()
}

// TestApplyRefusals covers fencing, overlaps, skips and layout checks: each
// case starts from partition 0 applied up to offset 100 by generation 5.
func TestApplyRefusals(t *testing.T) {
	other := testLayout
	other.AgeError = 0.1
	cases := []struct {
		name    string
		delta   func() *ExperimentDelta
		want    error // nil: accepted
		skipped bool
		clicks  uint64 // clicks stored afterwards
	}{
		{"older generation fenced", func() *ExperimentDelta { return oneClick(4, 0, 101, 110) }, ErrFenced, false, 1},
		{"older generation fenced even when applied", func() *ExperimentDelta { return oneClick(4, 0, 90, 100) }, ErrFenced, false, 1},
		{"same generation next range", func() *ExperimentDelta { return oneClick(5, 0, 101, 110) }, nil, false, 2},
		{"newer generation with gap", func() *ExperimentDelta { return oneClick(6, 0, 150, 160) }, nil, false, 2},
		{"older generation other partition", func() *ExperimentDelta { return oneClick(1, 1, 0, 5) }, nil, false, 2},
		{"already applied skipped", func() *ExperimentDelta { return oneClick(5, 0, 0, 100) }, nil, true, 1},
		{"already applied by newer generation skipped", func() *ExperimentDelta { return oneClick(7, 0, 60, 100) }, nil, true, 1},
		{"partial overlap", func() *ExperimentDelta { return oneClick(5, 0, 100, 120) }, ErrOverlap, false, 1},
		{"mixed applied and fresh ranges", func() *ExperimentDelta {
			d := oneClick(5, 1, 0, 9)
			d.Ranges = append(d.Ranges, OffsetRange{Topic: "clicks", Partition: 0, From: 90, To: 100})
			return d
		}, ErrOverlap, false, 1},
		{"layout mismatch", func() *ExperimentDelta {
			d := oneClick(5, 0, 101, 110)
			d.Layout = other
			return d
		}, ErrLayoutMismatch, false, 1},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			s, _, _ := newStore(t, Options{})
			ctx := testCtx(t)
			if _, err := s.Apply(ctx, oneClick(5, 0, 0, 100)); err != nil {
				t.Fatalf("setup: %v", err)
			}
			before, err := s.Offsets(ctx, "e")
			if err != nil {
				t.Fatal(err)
			}
			res, err := s.Apply(ctx, tc.delta())
			switch {
			case tc.want == nil && err != nil:
				t.Fatalf("apply: %v", err)
			case tc.want != nil && !errors.Is(err, tc.want):
				t.Fatalf("apply error %v, want %v", err, tc.want)
			case tc.want != nil && IsRetriable(err):
				t.Fatalf("refusal %v reported retriable", err)
			}
			if res.Skipped != tc.skipped {
				t.Errorf("skipped = %v, want %v", res.Skipped, tc.skipped)
			}
			if got := clicksOf(t, s, "a"); got != tc.clicks {
				t.Errorf("clicks stored = %d, want %d", got, tc.clicks)
			}
			after, err := s.Offsets(ctx, "e")
			if err != nil {
				t.Fatal(err)
			}
			if (tc.want != nil || tc.skipped) && !reflect.DeepEqual(before, after) {
				t.Errorf("refused or skipped delta changed offsets: %v -> %v", before, after)
			}
		})
	}
}

// TestConversionDuplicates checks markers: a second conversion of a click
// with another origin is reported as a duplicate and not counted; the same
// conversion in a later delta (same origin) is a silent redelivery.
func TestConversionDuplicates(t *testing.T) {
	s, rdb, _ := newStore(t, Options{ClickTTLSlack: 30 * time.Minute})
	ctx := testCtx(t)
	wm := t0 + 600_000
	clickTS := t0 + 1000
	key, _ := bucketAt(testLayout, wm, clickTS)
	conv := func(origin string) ConversionDelta {
		return ConversionDelta{ClickID: "k1", Origin: origin, Bucket: key, DelayBin: delayBinOf(testLayout, 5000), DelayMs: 5000}
	}
	deltas := []struct {
		convs         []ConversionDelta
		counted, redo int
		dups          []string // counted origins reported
	}{
		{[]ConversionDelta{conv("convs/0/7")}, 1, 0, nil},
		{[]ConversionDelta{conv("convs/0/7")}, 0, 1, nil},
		{[]ConversionDelta{conv("convs/1/3"), conv("convs/0/7")}, 0, 1, []string{"convs/0/7"}},
	}
	for i, dd := range deltas {
		d := &ExperimentDelta{
			Experiment: "e", Layout: testLayout, Watermark: wm, Generation: 1,
			Ranges: []OffsetRange{{Topic: "convs", Partition: 0, From: int64(10 * i), To: int64(10*i + 9)}},
			Arms:   map[string]*ArmDelta{"a": {Conversions: dd.convs}},
		}
		if i == 0 {
			d.Arms["a"].Clicks = []estimator.Bucket{{BucketKey: key, BucketCounts: estimator.BucketCounts{Clicks: 1}}}
		}
		res, err := s.Apply(ctx, d)
		if err != nil {
			t.Fatalf("delta %d: %v", i, err)
		}
		var origins []string
		for _, dup := range res.Duplicates {
			origins = append(origins, dup.CountedOrigin)
			if dup.Arm != "a" || dup.Conversion.Origin != "convs/1/3" {
				t.Errorf("delta %d: duplicate %+v", i, dup)
			}
		}
		if res.Counted != dd.counted || res.Redelivered != dd.redo || !slices.Equal(origins, dd.dups) {
			t.Errorf("delta %d: result %+v, want counted %d redelivered %d duplicates %v", i, res, dd.counted, dd.redo, dd.dups)
		}
	}
	e, err := s.Load(ctx, "e")
	if err != nil {
		t.Fatal(err)
	}
	st := e.States["a"]
	if st.Clicks() != 1 || st.Conversions() != 1 || st.Snapshot().DelayCount != 1 || st.Snapshot().DelaySumMs != 5000 {
		t.Errorf("state %s, want one click converted once with delay 5000", summary(st.Snapshot()))
	}
	// The marker lives for window + slack.
	ttl, err := rdb.PTTL(ctx, s.keys.marker("e", "k1")).Result()
	if err != nil {
		t.Fatal(err)
	}
	if want := time.Hour + 30*time.Minute; ttl <= want-time.Minute || ttl > want {
		t.Errorf("marker TTL %v, want about %v", ttl, want)
	}
}

// TestTwoInstances splits the partitions between two consumers that each
// keep their own watermark and apply in interleaved order, and checks that
// the result equals one consumer's and the estimator's.
func TestTwoInstances(t *testing.T) {
	evs := scenario(11, 1200, 4)
	s, _, _ := newStore(t, Options{Prefix: "one"})
	ctx := testCtx(t)
	single := singleInstance(evs, 60)
	applySteps(t, ctx, s, single, 1)

	two, err := New(s.rdb, Options{Prefix: "two"})
	if err != nil {
		t.Fatal(err)
	}
	var mine [2][]event
	for _, e := range evs {
		mine[e.partition%2] = append(mine[e.partition%2], e)
	}
	a, b := singleInstance(mine[0], 45), singleInstance(mine[1], 70)
	var all []step
	for i := 0; i < max(len(a), len(b)); i++ {
		// B runs ahead of A in event time, then A catches up: deltas land
		// with watermarks both below and above the stored one.
		for _, part := range [][]step{b, a} {
			if i < len(part) {
				all = append(all, part[i])
			}
		}
	}
	for i, st := range all {
		for _, d := range buildDeltas(testLayout, st.wm, 1, st.events) {
			if _, err := two.Apply(ctx, d); err != nil {
				t.Fatalf("step %d: %v", i, err)
			}
		}
	}
	ref := reference(testLayout, single)
	assertMatches(t, ctx, s, ref)
	assertMatches(t, ctx, two, ref)
}

// TestHeldConversions lands a conversion's delta before its click's (they
// come from different partitions): Load holds it back, then shows it.
func TestHeldConversions(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	wm := t0 + 100_000
	key, _ := bucketAt(testLayout, wm, t0)
	conv := &ExperimentDelta{
		Experiment: "e", Layout: testLayout, Watermark: wm, Generation: 1,
		Ranges: []OffsetRange{{Topic: "convs", Partition: 0, From: 0, To: 0}},
		Arms: map[string]*ArmDelta{"a": {Conversions: []ConversionDelta{{
			ClickID: "k", Origin: "convs/0/0", Bucket: key, DelayBin: delayBinOf(testLayout, 100_000), DelayMs: 100_000,
		}}}},
	}
	if _, err := s.Apply(ctx, conv); err != nil {
		t.Fatal(err)
	}
	e, err := s.Load(ctx, "e")
	if err != nil {
		t.Fatal(err)
	}
	if e.Held["a"] != 1 || e.States["a"].Conversions() != 0 {
		t.Fatalf("held %v, conversions %d; want 1 held, 0 shown", e.Held, e.States["a"].Conversions())
	}
	// Compaction keeps the held conversion.
	if _, err := s.Compact(ctx, "e", "a"); err != nil {
		t.Fatal(err)
	}
	click := oneClick(1, 0, 0, 0)
	click.Watermark = wm - 50_000 // the click side lags
	ck, _ := bucketAt(testLayout, click.Watermark, t0)
	click.Arms["a"].Clicks[0].BucketKey = ck
	if _, err := s.Apply(ctx, click); err != nil {
		t.Fatal(err)
	}
	e, err = s.Load(ctx, "e")
	if err != nil {
		t.Fatal(err)
	}
	if len(e.Held) != 0 || e.States["a"].Conversions() != 1 || e.States["a"].Clicks() != 1 {
		t.Fatalf("after the click: held %v, %s", e.Held, summary(e.States["a"].Snapshot()))
	}
}

// TestApplyInvalid rejects deltas that cannot be stored, without writing.
func TestApplyInvalid(t *testing.T) {
	s, rdb, _ := newStore(t, Options{})
	ctx := testCtx(t)
	cases := map[string]func(d *ExperimentDelta){
		"clicks, no ranges": func(d *ExperimentDelta) { d.Ranges = nil },
		"brace in id":       func(d *ExperimentDelta) { d.Experiment = "a}b" },
		"from after to":     func(d *ExperimentDelta) { d.Ranges[0].From = 9; d.Ranges[0].To = 3 },
		"two ranges":        func(d *ExperimentDelta) { d.Ranges = append(d.Ranges, d.Ranges[0]) },
		"converted click":   func(d *ExperimentDelta) { d.Arms["a"].Clicks[0].Converted = 1 },
		"bad delay bin": func(d *ExperimentDelta) {
			d.Arms["a"].Conversions = []ConversionDelta{{ClickID: "k", Origin: "o", DelayBin: 10_000}}
		},
		"level too high": func(d *ExperimentDelta) { d.Arms["a"].Clicks[0].Level = 60 },
		"watermark":      func(d *ExperimentDelta) { d.Watermark = 1 << 60 },
		"bad layout":     func(d *ExperimentDelta) { d.Layout.AgeError = 2 },
	}
	for name, mutate := range cases {
		t.Run(name, func(t *testing.T) {
			d := oneClick(1, 0, 0, 3)
			mutate(d)
			_, err := s.Apply(ctx, d)
			if !errors.Is(err, ErrInvalid) || IsRetriable(err) {
				t.Fatalf("error %v, want permanent ErrInvalid", err)
			}
		})
	}
	if n, err := rdb.DBSize(ctx).Result(); err != nil || n != 0 {
		t.Fatalf("invalid deltas wrote %d keys (%v)", n, err)
	}
}

// TestSelfAttributedClickCountsOnce applies a self-attributed conversion
// (it brings its own click) in two deltas covering different offsets, as a
// sweep re-run after a crash does: the conversion marker guards the click
// as well as the conversion, so both count once; a matured one goes to the
// matured totals. The expected state is built with the estimator's own
// AddClicks and AddConversion.
func TestSelfAttributedClickCountsOnce(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	wm := t0 + 3*3600_000
	recent, old := wm-600_000, wm-2*3600_000 // the window is 1h: old is matured
	delta := func(from int64) *ExperimentDelta {
		d := &ExperimentDelta{
			Experiment: "e", Layout: testLayout, Watermark: wm, Generation: 1,
			Ranges: []OffsetRange{{Topic: "clicks", Partition: 0, From: from, To: from}},
			Arms:   map[string]*ArmDelta{"a": {}},
		}
		for i, ts := range []int64{recent, old} {
			key, matured := bucketAt(testLayout, wm, ts)
			d.Arms["a"].Conversions = append(d.Arms["a"].Conversions, ConversionDelta{
				ClickID: fmt.Sprintf("self%d", i), Origin: fmt.Sprintf("convs/0/%d", i), Bucket: key, Matured: matured,
				DelayBin: delayBinOf(testLayout, 60_000), DelayMs: 60_000, WithClick: true,
			})
		}
		return d
	}
	// The first delta covers offsets, the others another offset and none
	// (as the sweep's deltas do).
	for i, from := range []int64{0, 7, -1} {
		d := delta(max(from, 0))
		if from < 0 {
			d.Ranges = nil
		}
		res, err := s.Apply(ctx, d)
		if err != nil {
			t.Fatal(err)
		}
		if wantCounted := 2 * max(1-i, 0); res.Counted != wantCounted || res.Redelivered != 2-wantCounted || res.Skipped {
			t.Fatalf("apply %d: %+v, want %d counted", i, res, wantCounted)
		}
	}
	e, err := s.Load(ctx, "e")
	if err != nil {
		t.Fatal(err)
	}
	want := estimator.NewArmState(testLayout)
	want.Advance(wm)
	for _, ts := range []int64{recent, old} {
		want.AddClicks(ts, 1)
		want.AddConversion(ts, ts+60_000)
	}
	if g, w := e.States["a"].Snapshot(), want.Snapshot(); !reflect.DeepEqual(g, w) {
		t.Fatalf("state %s, want %s", summary(g), summary(w))
	}
}
