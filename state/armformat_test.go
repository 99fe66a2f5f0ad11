package state

import (
	"math/rand/v2"
	"reflect"
	"strconv"
	"testing"

	"ripen/estimator"
)

// randomCounts returns arm counts with buckets on several levels, negative
// and large indices, conversions beyond their clicks (held back) and a
// few delay bins.
func randomCounts(r *rand.Rand, nbins int) armCounts {
	c := newArmCounts(nbins)
	for range r.IntN(40) {
		k := estimator.BucketKey{Level: uint8(r.IntN(20)), Index: r.Int64N(1<<40) - 1<<39}
		c.clicks[k] += uint64(r.IntN(1000) + 1)
		if r.IntN(3) == 0 {
			c.converted[k] += uint64(r.IntN(2000) + 1)
		}
	}
	c.maturedClicks = uint64(r.IntN(3)) * uint64(r.Int64N(1<<50))
	c.maturedConversions = uint64(r.IntN(1000))
	for range r.IntN(nbins) {
		c.delays[r.IntN(nbins)] += uint64(r.IntN(500) + 1)
	}
	c.delayCount = uint64(r.IntN(5000))
	c.delaySumMs = uint64(r.Int64N(1 << 45))
	return c
}

// sameCounts compares counts, treating absent and zero entries alike.
func sameCounts(a, b armCounts) bool {
	nz := func(m map[estimator.BucketKey]uint64) map[estimator.BucketKey]uint64 {
		out := map[estimator.BucketKey]uint64{}
		for k, n := range m {
			if n > 0 {
				out[k] = n
			}
		}
		return out
	}
	return reflect.DeepEqual(nz(a.clicks), nz(b.clicks)) && reflect.DeepEqual(nz(a.converted), nz(b.converted)) &&
		a.maturedClicks == b.maturedClicks && a.maturedConversions == b.maturedConversions &&
		reflect.DeepEqual(a.delays, b.delays) && a.delayCount == b.delayCount && a.delaySumMs == b.delaySumMs
}

// TestArmBaseRoundTrip encodes random counts as a base and reads them
// back, refuses truncated, padded and unversioned bases, and checks that
// a base, records and first-layout fields add up in one hash.
func TestArmBaseRoundTrip(t *testing.T) {
	const nbins = 30
	r := rand.New(rand.NewPCG(10, 20))
	for i := range 200 {
		c := randomCounts(r, nbins)
		b := c.encodeBase()
		if b == nil {
			continue
		}
		got := newArmCounts(nbins)
		if err := got.addBase(b); err != nil {
			t.Fatalf("case %d: %v", i, err)
		}
		if !sameCounts(got, c) {
			t.Fatalf("case %d: round trip differs", i)
		}
		for _, bad := range [][]byte{b[:len(b)-1], append(append([]byte{}, b...), 0), append([]byte{9}, b[1:]...)} {
			c := newArmCounts(nbins)
			if err := c.addBase(bad); err == nil {
				t.Fatalf("case %d: corrupt base %x decoded", i, bad)
			}
		}
	}
	if b := newArmCounts(nbins).encodeBase(); b != nil {
		t.Errorf("empty counts encode to %x, want nil", b)
	}

	// One hash of every kind of field: the counts add up.
	base := newArmCounts(nbins)
	base.clicks[estimator.BucketKey{Level: 3, Index: 10}] = 5
	base.delays[2] = 1
	h := map[string]string{
		armBaseField:          string(base.encodeBase()),
		armRecordPrefix + "1": clickRecord(map[estimator.BucketKey]uint64{{Level: 3, Index: 10}: 2}, 4),
		armConvPrefix + "1":   "v:3:10 1 d:2 1 dn 1 ds 900",
		armConvPrefix + "2":   "b:0:7 1",
		"b:3:10":              "1",
		"mv":                  "2",
		armCountField:         "2",
		armBytesField:         "44",
	}
	got, err := parseArmHash(h, nbins)
	if err != nil {
		t.Fatal(err)
	}
	want := newArmCounts(nbins)
	want.clicks[estimator.BucketKey{Level: 3, Index: 10}] = 8
	want.clicks[estimator.BucketKey{Level: 0, Index: 7}] = 1
	want.converted[estimator.BucketKey{Level: 3, Index: 10}] = 1
	want.maturedClicks, want.maturedConversions = 4, 2
	want.delays[2] = 2
	want.delayCount, want.delaySumMs = 1, 900
	if !sameCounts(got, want) {
		t.Errorf("parsed %+v, want %+v", got, want)
	}
	for _, rec := range []string{"b:3:10", "b:3:10 x", "q 1", "b:3:10 -1", "d:99 1", " b:0:1 1"} {
		if _, err := parseArmHash(map[string]string{armConvPrefix + "1": rec}, nbins); err == nil {
			t.Errorf("record %q parsed", rec)
		}
	}
}

// TestClickRecord checks the click part of a record: the base encoding
// of the clicks, nothing for no clicks.
func TestClickRecord(t *testing.T) {
	clicks := map[estimator.BucketKey]uint64{{Level: 2, Index: 5}: 3, {Level: 0, Index: -4}: 1, {Level: 0, Index: 9}: 0}
	got := newArmCounts(4)
	if err := got.addBase([]byte(clickRecord(clicks, 7))); err != nil {
		t.Fatal(err)
	}
	want := newArmCounts(4)
	want.clicks[estimator.BucketKey{Level: 2, Index: 5}] = 3
	want.clicks[estimator.BucketKey{Level: 0, Index: -4}] = 1
	want.maturedClicks = 7
	if !sameCounts(got, want) {
		t.Errorf("record holds %+v, want %+v", got, want)
	}
	if got := clickRecord(nil, 0); got != "" {
		t.Errorf("empty record %q", got)
	}
	// 3,600 clicks a second apart in the finest buckets (clicks ahead of
	// the watermark) take about 3 bytes each.
	many := map[estimator.BucketKey]uint64{}
	for i := range int64(3600) {
		many[estimator.BucketKey{Index: 1_938_124_800 + i}] = 2
	}
	if n := len(clickRecord(many, 0)); n > 3*3600+16 {
		t.Errorf("record of 3600 buckets takes %d bytes", n)
	}
}

// FuzzArmBase feeds arbitrary bytes to the base decoder: it never panics,
// and whatever it accepts encodes back to a base that decodes to the same
// counts.
func FuzzArmBase(f *testing.F) {
	const nbins = 12
	r := rand.New(rand.NewPCG(3, 4))
	for range 8 {
		if b := randomCounts(r, nbins).encodeBase(); b != nil {
			f.Add(b)
		}
	}
	f.Add([]byte{armBaseVersion, 0, 0, 0, 0, 0, 0, 0})
	f.Fuzz(func(t *testing.T, b []byte) {
		c := newArmCounts(nbins)
		if err := c.addBase(b); err != nil {
			return
		}
		again := newArmCounts(nbins)
		if enc := c.encodeBase(); enc != nil {
			if err := again.addBase(enc); err != nil {
				t.Fatalf("re-encoded base refused: %v", err)
			}
		}
		if !sameCounts(c, again) {
			t.Fatalf("re-encoded base differs")
		}
	})
}

// TestArmHashBounded applies a long stream in small batches with no
// compaction but Apply's own, keying every delta at the batch's latest
// event time (so that its young clicks land in the finest buckets), with
// small compaction bounds, and checks after every Apply that
// each arm hash stays within the compaction bounds and under 64 KiB of
// Redis memory; the loaded state still equals the estimator's.
func TestArmHashBounded(t *testing.T) {
	opts := Options{CompactFields: 32, CompactBytes: 4096}
	s, rdb, _ := newStore(t, opts)
	ctx := testCtx(t)
	evs := scenario(41, 6000, 2)
	steps := singleInstance(evs, 40)
	compactions := 0
	maxFields, maxBytes := int64(0), int64(0)
	for i, st := range steps {
		for _, d := range buildDeltas(testLayout, st.wm, 1, st.events) {
			res, err := s.Apply(ctx, d)
			if err != nil || res.CompactErr != nil {
				t.Fatalf("step %d: apply %s: %v %v", i, d.Experiment, err, res.CompactErr)
			}
			compactions += len(res.Compacted)
			for arm := range d.Arms {
				key := s.keys.arm(d.Experiment, arm)
				n, err := rdb.HLen(ctx, key).Result()
				if err != nil {
					t.Fatal(err)
				}
				b, err := rdb.MemoryUsage(ctx, key, 0).Result()
				if err != nil {
					t.Fatal(err)
				}
				maxFields, maxBytes = max(maxFields, n), max(maxBytes, b)
				if n > int64(opts.CompactFields) || b > 64<<10 {
					t.Fatalf("step %d: %s has %d fields, %d bytes", i, key, n, b)
				}
			}
		}
	}
	t.Logf("%d applies, %d compactions on write; at most %d fields and %d bytes per arm", len(steps), compactions, maxFields, maxBytes)
	if compactions == 0 {
		t.Errorf("no Apply compacted an arm")
	}
	assertMatches(t, ctx, s, reference(testLayout, steps))
}

// writeFirstLayout stores an experiment as the first key layout did, from
// the reference states at their watermark: counter fields per bucket in
// each arm hash, meta, arm set, offsets, discovery set.
func writeFirstLayout(t testing.TB, s *Store, exp string, wm int64, arms map[string]*estimator.ArmState, offs map[TopicPartition]int64) {
	t.Helper()
	ctx := testCtx(t)
	rdb := s.rdb
	if err := rdb.HSet(ctx, s.keys.meta(exp), "layout", encodeLayout(testLayout), "wm", wm, "arms", len(arms)).Err(); err != nil {
		t.Fatal(err)
	}
	for name, st := range arms {
		snap := st.Clone()
		snap.Advance(wm)
		h, err := fieldsOf(ArmRecord{Arm: name, State: snap.Snapshot()})
		if err != nil {
			t.Fatal(err)
		}
		if len(h) > 0 {
			if err := rdb.HSet(ctx, s.keys.arm(exp, name), h).Err(); err != nil {
				t.Fatal(err)
			}
		}
		if err := rdb.SAdd(ctx, s.keys.arms(exp), name).Err(); err != nil {
			t.Fatal(err)
		}
	}
	for tp, o := range offs {
		if err := rdb.HSet(ctx, s.keys.offsets(exp), tp.String(), "1:"+strconv.FormatInt(o, 10)).Err(); err != nil {
			t.Fatal(err)
		}
	}
	if err := rdb.SAdd(ctx, s.keys.experiments(), exp).Err(); err != nil {
		t.Fatal(err)
	}
}

// TestFirstLayoutArmsUpgrade stores the first half of a stream in the
// first layout's counter fields, applies the second half with Apply, and
// checks that Load equals the estimator's state of the whole stream and
// that a compaction folds the old fields into the base.
func TestFirstLayoutArmsUpgrade(t *testing.T) {
	s, rdb, _ := newStore(t, Options{})
	ctx := testCtx(t)
	steps := singleInstance(scenario(5, 1200, 2), 30)
	half := len(steps) / 2
	old := reference(testLayout, steps[:half])
	for exp, arms := range old {
		offs := map[TopicPartition]int64{}
		wm := int64(-1 << 62)
		for _, st := range steps[:half] {
			for _, e := range st.events {
				if e.exp == exp {
					offs[TopicPartition{e.topic, e.partition}] = e.offset
					wm = max(wm, st.wm)
				}
			}
		}
		writeFirstLayout(t, s, exp, wm, arms, offs)
	}
	applySteps(t, ctx, s, steps[half:], 1)
	assertMatches(t, ctx, s, reference(testLayout, steps))
	for _, arm := range []string{"red", "blue", "green"} {
		if _, err := s.Compact(ctx, "exp-a", arm); err != nil {
			t.Fatal(err)
		}
		h, err := rdb.HGetAll(ctx, s.keys.arm("exp-a", arm)).Result()
		if err != nil {
			t.Fatal(err)
		}
		if len(h) != 1 || h[armBaseField] == "" {
			t.Errorf("%s after compaction: %d fields, want the base alone", arm, len(h))
		}
	}
	assertMatches(t, ctx, s, reference(testLayout, steps))
}
