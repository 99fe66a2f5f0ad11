package state

import (
	"bytes"
	"context"
	"errors"
	"reflect"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"

	"ripen/estimator"
	"ripen/state/redistest"
)

// The reference for these tests is the estimator itself: Load rebuilds each
// arm with estimator.FromSnapshot, and an imported prefix must Load to the
// very same ArmSnapshot, offsets and held conversions as the source.

// seedStore fills s with a scenario applied in batches of batch events, a
// conversion whose click never lands (held back), an allocation and resume
// offsets.
func seedStore(t *testing.T, ctx context.Context, s *Store, batch int) {
	t.Helper()
	evs := scenario(7, 600, 3)
	applySteps(t, ctx, s, singleInstance(evs, batch), 1)
	wm := eventTime(evs[len(evs)-1])
	key, _ := bucketAt(testLayout, wm, wm-5_000)
	d := &ExperimentDelta{
		Experiment: "exp-h", Layout: testLayout, Watermark: wm, Generation: 2,
		Ranges: []OffsetRange{{Topic: "convs", Partition: 7, From: 40, To: 40}},
		Arms: map[string]*ArmDelta{"solo": {Conversions: []ConversionDelta{{
			ClickID: "late-click", Origin: "convs/7/40", Bucket: key,
			DelayBin: delayBinOf(testLayout, 4_000), DelayMs: 4_000,
		}}}},
	}
	if _, err := s.Apply(ctx, d); err != nil {
		t.Fatalf("apply held conversion: %v", err)
	}
	// A report with characters the default JSON encoder would escape.
	alloc := []byte(`{"experiment": "exp-a", "status": "adapting", "policy": "thompson-bayes", "leader": "red",
		"weights": {"red": 0.5, "blue": 0.25, "green": 0.25}, "arms": [], "note": "a<b & c>d"}`)
	for range 3 {
		if _, err := s.SaveAllocation(ctx, "exp-a", alloc); err != nil {
			t.Fatalf("save allocation: %v", err)
		}
	}
	if _, err := s.SaveAllocation(ctx, "exp-only-alloc", []byte(`{"experiment":"exp-only-alloc"}`)); err != nil {
		t.Fatalf("save allocation: %v", err)
	}
	for p := range 3 {
		if err := s.SetResume(ctx, "clicks", p, int64(100+p)); err != nil {
			t.Fatalf("set resume: %v", err)
		}
	}
}

// assertSameLoad checks that every experiment Loads identically from a and
// b: arm names, canonical arm snapshots, offsets, watermark, held counts and
// the latest allocation's sequence number.
func assertSameLoad(t *testing.T, ctx context.Context, a, b *Store) {
	t.Helper()
	ida, err := a.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	idb, err := b.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(ida, idb) {
		t.Fatalf("experiments %v and %v", ida, idb)
	}
	for _, id := range ida {
		ea, errA := a.Load(ctx, id)
		eb, errB := b.Load(ctx, id)
		if errors.Is(errA, ErrCorrupt) && errors.Is(errB, ErrCorrupt) {
			continue // allocation only: no layout to load
		}
		if errA != nil || errB != nil {
			t.Fatalf("load %s: %v / %v", id, errA, errB)
		}
		if !slices.Equal(ea.Arms, eb.Arms) || ea.Watermark != eb.Watermark || ea.Layout != eb.Layout {
			t.Fatalf("%s: arms %v wm %d vs arms %v wm %d", id, ea.Arms, ea.Watermark, eb.Arms, eb.Watermark)
		}
		for _, arm := range ea.Arms {
			if sa, sb := ea.States[arm].Snapshot(), eb.States[arm].Snapshot(); !reflect.DeepEqual(sa, sb) {
				t.Errorf("%s/%s: %s vs %s", id, arm, summary(sa), summary(sb))
			}
		}
		if !reflect.DeepEqual(ea.Offsets, eb.Offsets) || !reflect.DeepEqual(ea.Held, eb.Held) {
			t.Errorf("%s: offsets %v held %v vs offsets %v held %v", id, ea.Offsets, ea.Held, eb.Offsets, eb.Held)
		}
		seqA, _, errA := a.LatestAllocation(ctx, id)
		seqB, _, errB := b.LatestAllocation(ctx, id)
		if seqA != seqB || (errA == nil) != (errB == nil) {
			t.Errorf("%s: allocation seq %d (%v) vs %d (%v)", id, seqA, errA, seqB, errB)
		}
	}
}

func TestExportImportRoundTrip(t *testing.T) {
	src, rdb, _ := newStore(t, Options{Prefix: "src"})
	ctx := testCtx(t)
	seedStore(t, ctx, src, 40)

	snap, err := src.ExportExperiments(ctx)
	if err != nil {
		t.Fatalf("export: %v", err)
	}
	if err := snap.Validate(); err != nil {
		t.Fatalf("exported snapshot invalid: %v", err)
	}
	ids := make([]string, len(snap.Experiments))
	for i, e := range snap.Experiments {
		ids[i] = e.ID
	}
	if want := []string{"exp-a", "exp-b", "exp-h", "exp-only-alloc"}; !slices.Equal(ids, want) {
		t.Fatalf("experiments %v, want %v", ids, want)
	}
	// The snapshot holds what Load returns.
	for _, e := range snap.Experiments[:3] {
		ld, err := src.Load(ctx, e.ID)
		if err != nil {
			t.Fatal(err)
		}
		for _, rec := range e.Arms {
			if want := ld.States[rec.Arm].Snapshot(); !reflect.DeepEqual(rec.State, want) {
				t.Errorf("%s/%s: snapshot state %s, Load %s", e.ID, rec.Arm, summary(rec.State), summary(want))
			}
			var held uint64
			for _, h := range rec.Held {
				held += h.Conversions
			}
			if held+rec.HeldMatured != ld.Held[rec.Arm] {
				t.Errorf("%s/%s: held %d+%d, Load %d", e.ID, rec.Arm, held, rec.HeldMatured, ld.Held[rec.Arm])
			}
		}
		if len(e.Offsets) != len(ld.Offsets) {
			t.Errorf("%s: %d offsets, Load %d", e.ID, len(e.Offsets), len(ld.Offsets))
		}
	}
	if h := snap.Experiments[2]; len(h.Arms) != 1 || len(h.Arms[0].Held) != 1 || h.Arms[0].Held[0].Conversions != 1 {
		t.Fatalf("exp-h: want one held conversion, got %+v", h.Arms)
	}
	if len(snap.Resume) != 3 || snap.Resume[2] != (ResumeOffset{"clicks", 2, 102}) {
		t.Fatalf("resume offsets %+v", snap.Resume)
	}
	if snap.Experiments[0].AllocationSeq != 3 {
		t.Fatalf("allocation seq %d, want 3", snap.Experiments[0].AllocationSeq)
	}

	// Through JSON and into a fresh prefix of the same server.
	var buf bytes.Buffer
	if err := src.Export(ctx, &buf); err != nil {
		t.Fatalf("Export: %v", err)
	}
	read, err := ReadSnapshot(&buf)
	if err != nil {
		t.Fatalf("read: %v", err)
	}
	d0 := Digest(snap)
	if !regexp.MustCompile(`^[0-9a-f]{64}$`).MatchString(d0) {
		t.Fatalf("digest %q is not 64 hex digits", d0)
	}
	if d := Digest(read); d != d0 {
		t.Fatalf("digest after JSON %s, before %s", d, d0)
	}
	dst, err := New(rdb, Options{Prefix: "dst"})
	if err != nil {
		t.Fatal(err)
	}
	if err := dst.Import(ctx, read); err != nil {
		t.Fatalf("import: %v", err)
	}
	again, err := dst.ExportExperiments(ctx)
	if err != nil {
		t.Fatalf("export dst: %v", err)
	}
	if d := Digest(again); d != d0 {
		t.Fatalf("digest after import %s, source %s; diff %+v", d, d0, Diff(snap, again))
	}
	if diff := Diff(snap, again); len(diff) != 0 {
		t.Fatalf("diff after import: %+v", diff)
	}
	assertSameLoad(t, ctx, src, dst)

	// The imported prefix takes further deltas like the source.
	extra := &ExperimentDelta{
		Experiment: "exp-b", Layout: testLayout, Watermark: again.Experiments[1].Watermark + 1000, Generation: 1,
		Ranges: []OffsetRange{{Topic: "clicks", Partition: 0, From: 10_000, To: 10_000}},
		Arms:   map[string]*ArmDelta{"x": {MaturedClicks: 2}},
	}
	for _, s := range []*Store{src, dst} {
		if _, err := s.Apply(ctx, extra); err != nil {
			t.Fatalf("apply after import: %v", err)
		}
	}
	assertSameLoad(t, ctx, src, dst)
}

func TestImportRefusesNonEmpty(t *testing.T) {
	src, rdb, _ := newStore(t, Options{Prefix: "src"})
	ctx := testCtx(t)
	seedStore(t, ctx, src, 60)
	snap, err := src.ExportExperiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	dst, _ := New(rdb, Options{Prefix: "dst"})
	if err := dst.Import(ctx, snap); err != nil {
		t.Fatalf("first import: %v", err)
	}
	if err := dst.Import(ctx, snap); !errors.Is(err, ErrNotEmpty) {
		t.Fatalf("second import: %v, want ErrNotEmpty", err)
	}
	// A prefix holding only a resume offset is not empty either.
	other, _ := New(rdb, Options{Prefix: "other"})
	if err := other.SetResume(ctx, "clicks", 0, 5); err != nil {
		t.Fatal(err)
	}
	if err := other.Import(ctx, snap); !errors.Is(err, ErrNotEmpty) {
		t.Fatalf("import over a resume offset: %v, want ErrNotEmpty", err)
	}
	// Forced, an edited snapshot replaces the stored experiment: an arm
	// removed from the snapshot is gone afterwards.
	edited := cloneSnapshot(t, snap)
	edited.Experiments[0].Arms = edited.Experiments[0].Arms[:1]
	if err := dst.ImportWith(ctx, edited, ImportOptions{Force: true}); err != nil {
		t.Fatalf("forced import: %v", err)
	}
	got, err := dst.ExportExperiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if Digest(got) != Digest(edited) || Digest(got) == Digest(snap) {
		t.Fatalf("forced import: digest %s, want %s (source %s)", Digest(got), Digest(edited), Digest(snap))
	}
	ld, err := dst.Load(ctx, snap.Experiments[0].ID)
	if err != nil {
		t.Fatal(err)
	}
	if len(ld.Arms) != 1 {
		t.Fatalf("after forced import: arms %v, want one", ld.Arms)
	}
}

func cloneSnapshot(t *testing.T, s *Snapshot) *Snapshot {
	t.Helper()
	var buf bytes.Buffer
	if err := WriteSnapshot(&buf, s); err != nil {
		t.Fatal(err)
	}
	c, err := ReadSnapshot(&buf)
	if err != nil {
		t.Fatal(err)
	}
	return c
}

func TestDiffFindsChangedArm(t *testing.T) {
	s, rdb, _ := newStore(t, Options{Prefix: "a"})
	ctx := testCtx(t)
	seedStore(t, ctx, s, 50)
	base, err := s.ExportExperiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if d := Diff(base, cloneSnapshot(t, base)); len(d) != 0 {
		t.Fatalf("diff of a snapshot with its copy: %+v", d)
	}
	armIndex := func(s *Snapshot, exp, arm string) (int, int) {
		for i, e := range s.Experiments {
			for j, r := range e.Arms {
				if e.ID == exp && r.Arm == arm {
					return i, j
				}
			}
		}
		t.Fatalf("no arm %s/%s", exp, arm)
		return 0, 0
	}
	tests := []struct {
		name   string
		edit   func(*Snapshot)
		want   ArmDiff
		digest bool // whether the digest must change
	}{
		{"one more click", func(c *Snapshot) {
			i, j := armIndex(c, "exp-a", "blue")
			c.Experiments[i].Arms[j].State.Buckets[0].Clicks++
		}, ArmDiff{Experiment: "exp-a", Arm: "blue", Kind: DiffChanged, Fields: []string{"pending_clicks"}}, true},
		{"matured conversion and delay", func(c *Snapshot) {
			i, j := armIndex(c, "exp-b", "y")
			st := &c.Experiments[i].Arms[j].State
			st.MaturedConversions++
			st.DelayCount++
		}, ArmDiff{Experiment: "exp-b", Arm: "y", Kind: DiffChanged, Fields: []string{"matured_conversions", "delay_count"}}, true},
		{"arm removed", func(c *Snapshot) {
			i, j := armIndex(c, "exp-a", "green")
			c.Experiments[i].Arms = slices.Delete(c.Experiments[i].Arms, j, j+1)
		}, ArmDiff{Experiment: "exp-a", Arm: "green", Kind: DiffOnlyInA}, true},
		{"held conversion dropped", func(c *Snapshot) {
			i, j := armIndex(c, "exp-h", "solo")
			c.Experiments[i].Arms[j].Held = nil
		}, ArmDiff{Experiment: "exp-h", Arm: "solo", Kind: DiffChanged, Fields: []string{"pending_conversions"}}, true},
		{"resume offset", func(c *Snapshot) {
			c.Resume[0].Offset++
		}, ArmDiff{Kind: DiffChanged, Fields: []string{"resume:clicks/0"}}, true},
		{"allocation whitespace and key order only", func(c *Snapshot) {
			c.Experiments[0].Allocation = []byte(`{"weights":{"green":0.25,"blue":0.25,"red":0.5},"status":"adapting",` +
				`"policy":"thompson-bayes","note":"a\u003cb \u0026 c>d","leader":"red","experiment":"exp-a","arms":[]}`)
		}, ArmDiff{}, false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			c := cloneSnapshot(t, base)
			tc.edit(c)
			got := Diff(base, c)
			if changed := Digest(c) != Digest(base); changed != tc.digest {
				t.Errorf("digest changed = %v, want %v", changed, tc.digest)
			}
			if !tc.digest {
				if len(got) != 0 {
					t.Fatalf("diff %+v, want none", got)
				}
				return
			}
			if len(got) != 1 {
				t.Fatalf("diff %+v, want one entry", got)
			}
			g := got[0]
			g.A, g.B = ArmTotals{}, ArmTotals{}
			if !reflect.DeepEqual(g, tc.want) {
				t.Fatalf("diff %+v, want %+v", g, tc.want)
			}
		})
	}

	// A live change: one more click on a real arm, seen between two
	// prefixes holding the same state before it.
	other, _ := New(rdb, Options{Prefix: "b"})
	if err := other.Import(ctx, base); err != nil {
		t.Fatal(err)
	}
	wm := base.Experiments[0].Watermark
	key, _ := bucketAt(testLayout, wm, wm-1000)
	if _, err := other.Apply(ctx, &ExperimentDelta{
		Experiment: "exp-a", Layout: testLayout, Watermark: wm, Generation: 1,
		Ranges: []OffsetRange{{Topic: "clicks", Partition: 9, From: 0, To: 0}},
		Arms:   map[string]*ArmDelta{"red": {Clicks: []estimator.Bucket{{BucketKey: key, BucketCounts: estimator.BucketCounts{Clicks: 1}}}}},
	}); err != nil {
		t.Fatal(err)
	}
	live, err := other.ExportExperiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	got := Diff(base, live)
	want := []ArmDiff{
		{Experiment: "exp-a", Kind: DiffChanged, Fields: []string{"offset:clicks/9"}},
		{Experiment: "exp-a", Arm: "red", Kind: DiffChanged, Fields: []string{"pending_clicks"}},
	}
	if len(got) != 2 || !reflect.DeepEqual(got[0], want[0]) || got[1].Arm != "red" || !slices.Equal(got[1].Fields, want[1].Fields) {
		t.Fatalf("live diff %+v, want %+v", got, want)
	}
	if got[1].B.Clicks != got[1].A.Clicks+1 {
		t.Fatalf("live diff totals %+v -> %+v, want one more click", got[1].A, got[1].B)
	}
}

// TestDigestStableAcrossCompaction compacts every arm (rewriting hashes
// whose fields were written at finer levels than canonical) and checks the
// digest is unchanged.
func TestDigestStableAcrossCompaction(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	seedStore(t, ctx, s, 25)
	before, err := s.ExportExperiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	rewritten := 0
	for _, e := range before.Experiments {
		for _, a := range e.Arms {
			res, err := s.Compact(ctx, e.ID, a.Arm)
			if err != nil {
				t.Fatalf("compact %s/%s: %v", e.ID, a.Arm, err)
			}
			if res.FieldsAfter < res.FieldsBefore {
				rewritten++
			}
		}
	}
	if rewritten == 0 {
		t.Fatal("no arm hash was shrunk by compaction; the test would prove nothing")
	}
	after, err := s.ExportExperiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if Digest(after) != Digest(before) {
		t.Fatalf("digest changed by compaction: %+v", Diff(before, after))
	}
}

// TestDigestAcrossPrefixes applies the same events in different batch
// sizes under two prefixes: the raw arm hashes differ (fields at other
// levels), the logical state and so the digest do not.
func TestDigestAcrossPrefixes(t *testing.T) {
	a, rdb, _ := newStore(t, Options{Prefix: "left"})
	b, _ := New(rdb, Options{Prefix: "right:side"})
	ctx := testCtx(t)
	evs := scenario(11, 500, 2)
	sa, sb := singleInstance(evs, 17), singleInstance(evs, 45)
	// Precondition: each experiment ends at the same watermark either way
	// (the state is a function of the events and the final watermark).
	finals := func(steps []step) map[string]int64 {
		m := map[string]int64{}
		for _, st := range steps {
			for _, e := range st.events {
				m[e.exp] = max(m[e.exp], st.wm)
			}
		}
		return m
	}
	if fa, fb := finals(sa), finals(sb); !reflect.DeepEqual(fa, fb) {
		t.Fatalf("setup: final watermarks %v and %v differ; pick other batch sizes", fa, fb)
	}
	applySteps(t, ctx, a, sa, 3)
	applySteps(t, ctx, b, sb, 3)
	ha, err := rdb.HGetAll(ctx, a.keys.arm("exp-a", "red")).Result()
	if err != nil {
		t.Fatal(err)
	}
	hb, err := rdb.HGetAll(ctx, b.keys.arm("exp-a", "red")).Result()
	if err != nil {
		t.Fatal(err)
	}
	if reflect.DeepEqual(ha, hb) {
		t.Fatal("setup: raw arm hashes are identical; the test would prove nothing")
	}
	xa, err := a.ExportExperiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	xb, err := b.ExportExperiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if xa.Prefix == xb.Prefix {
		t.Fatal("prefixes should differ")
	}
	if Digest(xa) != Digest(xb) {
		t.Fatalf("digests differ: %+v", Diff(xa, xb))
	}
	// A snapshot with its arm buckets split into finer levels (as a
	// hand-made or older file might hold) digests the same, because Digest
	// re-keys like Load.
	fine := cloneSnapshot(t, xa)
	rec := &fine.Experiments[0].Arms[0]
	var split []estimator.Bucket
	for _, bk := range rec.State.Buckets {
		if bk.Level == 0 || bk.Clicks < 2 || bk.Converted > 0 {
			split = append(split, bk)
			continue
		}
		lo := estimator.BucketKey{Level: bk.Level - 1, Index: 2 * bk.Index}
		split = append(split,
			estimator.Bucket{BucketKey: lo, BucketCounts: estimator.BucketCounts{Clicks: 1}},
			estimator.Bucket{BucketKey: lo, BucketCounts: estimator.BucketCounts{Clicks: bk.Clicks - 1}})
	}
	if len(split) == len(rec.State.Buckets) {
		t.Fatal("setup: no bucket to split")
	}
	rec.State.Buckets = split
	if Digest(fine) != Digest(xa) {
		t.Fatalf("digest depends on bucket levels: %+v", Diff(xa, fine))
	}
}

func TestSnapshotValidate(t *testing.T) {
	l := testLayout
	arm := ArmRecord{Arm: "a", State: estimator.NewArmState(l).Snapshot()}
	arm.State.Watermark = 1000
	good := func() *Snapshot {
		return &Snapshot{Format: SnapshotFormat, Experiments: []ExperimentSnapshot{{
			ID: "e", Layout: &l, Watermark: 1000, Arms: []ArmRecord{arm},
		}}}
	}
	if err := good().Validate(); err != nil {
		t.Fatalf("valid snapshot: %v", err)
	}
	tests := []struct {
		name string
		edit func(*Snapshot)
	}{
		{"format", func(s *Snapshot) { s.Format = 2 }},
		{"duplicate experiment", func(s *Snapshot) { s.Experiments = append(s.Experiments, s.Experiments[0]) }},
		{"brace in id", func(s *Snapshot) { s.Experiments[0].ID = "e}" }},
		{"arm watermark", func(s *Snapshot) { s.Experiments[0].Arms[0].State.Watermark = 999 }},
		{"duplicate arm", func(s *Snapshot) { s.Experiments[0].Arms = append(s.Experiments[0].Arms, arm) }},
		{"arms without layout", func(s *Snapshot) { s.Experiments[0].Layout = nil }},
		{"allocation not JSON", func(s *Snapshot) { s.Experiments[0].Allocation = []byte("{") }},
		{"conversions above clicks matured", func(s *Snapshot) { s.Experiments[0].Arms[0].State.MaturedConversions = 1 }},
		{"duplicate resume", func(s *Snapshot) {
			s.Resume = []ResumeOffset{{"t", 0, 1}, {"t", 0, 2}}
		}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			s := good()
			tc.edit(s)
			if err := s.Validate(); !errors.Is(err, ErrInvalid) {
				t.Fatalf("Validate: %v, want ErrInvalid", err)
			}
		})
	}
}

func TestExportJoinBuffers(t *testing.T) {
	src, rdb, _ := newStore(t, Options{Prefix: "jb"})
	ctx := testCtx(t)
	if _, err := src.PutClicks(ctx, []ClickRecord{{ClickID: "k1", Experiment: "e", Arm: "a", TS: t0, Window: testLayout.Window}}); err != nil {
		t.Fatal(err)
	}
	if _, err := src.LookupConversions(ctx, []ConversionLookup{{ClickID: "k2", TS: t0 + 5, Origin: "convs/0/3", Topic: "convs", Partition: 0, Deadline: t0 + 1000, Raw: []byte("raw")}}); err != nil {
		t.Fatal(err)
	}
	snap, err := src.ExportWith(ctx, ExportOptions{JoinBuffers: true})
	if err != nil {
		t.Fatal(err)
	}
	var keys []string
	r1, r2 := refOf("k1"), refOf("k2")
	gen := strconv.FormatInt(floorDiv64(t0, src.ix.genMs), 10)
	for _, b := range snap.JoinBuffers {
		keys = append(keys, b.Key)
		// Parked orphans expire (a safety net behind the sweep); the index
		// is retired by event time, due sets by the sweep (TTL 0).
		if orphans := strings.HasSuffix(b.Key, "}:o"); orphans != (b.TTLMs > 0) {
			t.Errorf("%s: ttl %d", b.Key, b.TTLMs)
		}
	}
	slices.Sort(keys)
	want := []string{
		":{i:" + strconv.Itoa(r1.group) + "}:" + gen + ":0", ":{i:" + strconv.Itoa(r1.group) + "}:" + gen + ":f",
		":{i:" + strconv.Itoa(r1.group) + "}:g", ":{i:" + strconv.Itoa(r2.group) + "}:o",
		":{i}:dict", ":{i}:meta", ":{o:convs/0}:due",
	}
	slices.Sort(want)
	if !slices.Equal(keys, want) {
		t.Fatalf("join buffer keys %q, want %q", keys, want)
	}
	if plain, _ := src.ExportExperiments(ctx); len(plain.JoinBuffers) != 0 {
		t.Fatalf("join buffers exported by default: %v", plain.JoinBuffers)
	}
	dst, _ := New(rdb, Options{Prefix: "jb2"})
	if err := dst.Import(ctx, cloneSnapshot(t, snap)); err != nil {
		t.Fatalf("import: %v", err)
	}
	// The restored click joins a conversion in the new prefix.
	res, err := dst.LookupConversions(ctx, []ConversionLookup{{ClickID: "k1", TS: t0 + 9, Origin: "convs/0/4", Topic: "convs", Partition: 0, Deadline: t0 + 1000}})
	if err != nil {
		t.Fatal(err)
	}
	if res[0].Status != LookupFound || res[0].Click.Arm != "a" {
		t.Fatalf("lookup after import: %+v", res[0])
	}
}

// TestSnapshotOnCluster runs export, import (with join buffers) and digest
// through a cluster client against a one-node cluster, which refuses
// commands and transactions whose keys span slots.
func TestSnapshotOnCluster(t *testing.T) {
	srv := redistest.StartCluster(t)
	cc := srv.ClusterClient()
	src, err := New(cc, Options{Prefix: "c1"})
	if err != nil {
		t.Fatal(err)
	}
	ctx := testCtx(t)
	seedStore(t, ctx, src, 80)
	if _, err := src.PutClicks(ctx, []ClickRecord{{ClickID: "k1", Experiment: "exp-a", Arm: "red", TS: t0, Window: testLayout.Window}}); err != nil {
		t.Fatal(err)
	}
	snap, err := src.ExportWith(ctx, ExportOptions{JoinBuffers: true})
	if err != nil {
		t.Fatalf("export: %v", err)
	}
	clicks, markers := 0, 0
	for _, b := range snap.JoinBuffers {
		switch {
		case strings.HasPrefix(b.Key, ":{i"):
			clicks++
		case strings.HasPrefix(b.Key, ":{x:") && strings.Contains(b.Key, "}:cv:"):
			markers++
		default:
			t.Errorf("unexpected join buffer key %q", b.Key)
		}
	}
	if len(snap.Resume) != 3 || clicks != 5 || markers == 0 {
		t.Fatalf("resume %v, click index keys %d, markers %d: want 3, 5 (descriptor, dictionary, entries, filter, sizes) and some", snap.Resume, clicks, markers)
	}
	dst, _ := New(cc, Options{Prefix: "c2"})
	if err := dst.Import(ctx, snap); err != nil {
		t.Fatalf("import: %v", err)
	}
	again, err := dst.ExportExperiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if Digest(again) != Digest(snap) {
		t.Fatalf("digest differs on the cluster: %+v", Diff(snap, again))
	}
	assertSameLoad(t, ctx, src, dst)
}
