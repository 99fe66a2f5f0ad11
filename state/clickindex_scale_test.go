package state

import (
	"context"
	"fmt"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
)

// indexed reports whether the click index holds an entry for id in the
// generation of ts, reading the store's view of the descriptor.
func indexed(t testing.TB, ctx context.Context, s *Store, id string, ts int64) bool {
	t.Helper()
	v, err := s.refreshIndex(ctx, 0, nil)
	if err != nil {
		t.Fatal(err)
	}
	g := v.gen(ts)
	m, ok := v.subs[g]
	if !ok {
		return false
	}
	r := refOf(id)
	ok, err = s.rdb.HExists(ctx, s.keys.indexEntries(r.group, g, r.sub(m)), r.field).Result()
	if err != nil {
		t.Fatal(err)
	}
	return ok
}

// indexKeyCount counts the keys of the click index's groups (entries,
// filters, sizes, orphans) under s's prefix.
func indexKeyCount(t testing.TB, ctx context.Context, s *Store) int {
	t.Helper()
	n := 0
	if err := s.scan(ctx, globEscape(s.opts.Prefix)+":{i:*", func(string) bool { n++; return true }); err != nil {
		t.Fatal(err)
	}
	return n
}

// TestClickIndexMillion feeds 10^6 clicks (20-character ids, three
// experiments of four arms, spread evenly over three hours of click time)
// through the click index of a real redis-server, and checks:
//
//   - the server's memory (INFO used_memory) grows by at most 40 bytes per
//     pending click, entries, filters and key overhead included (the
//     issue's budget for the compact index; a project target);
//   - as the watermark advances, no entry goes before the watermark has
//     passed its click time plus the horizon (with a slack of 1 ms), and
//     every entry is gone once it has passed that plus one generation;
//   - once the watermark is past the last click plus horizon and one
//     generation, no index key is left and the memory is given back.
func TestClickIndexMillion(t *testing.T) {
	const (
		n       = 1_000_000
		batch   = 5000
		horizon = 4 * time.Hour
		span    = 3 * time.Hour
	)
	// No slack: entries go as soon as the rule allows.
	s, rdb, _ := newStore(t, Options{Prefix: "mil", IndexGenerations: 4, ClickTTLSlack: time.Millisecond})
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	info, err := s.OpenClickIndex(ctx, ClickIndexOptions{Horizon: horizon})
	if err != nil {
		t.Fatal(err)
	}
	if info.Generation != time.Hour {
		t.Fatalf("generation %v, want a quarter of the horizon", info.Generation)
	}
	step := span.Milliseconds() / n
	tsOf := func(i int) int64 { return t0 + int64(i)*step }
	exps := []string{"ink-well-hero", "paper-mill-cta", "quill-banner"}
	arms := []string{"sepia", "cobalt", "vermilion", "jade"}
	before := usedMemory(t, ctx, rdb)
	start := time.Now()
	recs := make([]ClickRecord, 0, batch)
	for i := 0; i < n; i += batch {
		recs = recs[:0]
		for j := i; j < i+batch; j++ {
			recs = append(recs, ClickRecord{
				ClickID: clickID(j), Experiment: exps[j%3], Arm: arms[(j/3)%4], TS: tsOf(j), Window: horizon,
				Origin: "clicks/" + strconv.Itoa(j%6) + "/" + strconv.Itoa(j/6),
			})
		}
		res, err := s.IndexClicks(ctx, recs)
		if err != nil {
			t.Fatalf("batch at %d: %v", i, err)
		}
		for k, r := range res {
			if r.Status != ClickNew {
				t.Fatalf("click %d: %v (%+v), want new", i+k, r.Status, r.Existing)
			}
		}
	}
	took := time.Since(start)
	after := usedMemory(t, ctx, rdb)
	perClick := float64(after-before) / n
	gens, err := s.refreshIndex(ctx, 0, nil)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%d clicks indexed in %v; used_memory grew %.1f bytes per pending click; generations %v", n, took.Round(time.Millisecond), perClick, gens.subs)
	if perClick > 40 {
		t.Errorf("click index holds %.1f bytes per pending click, budget 40", perClick)
	}

	// Every 20th click, looked up as a conversion would: found.
	var convs []ConversionLookup
	for i := 7; i < n; i += 20_011 {
		convs = append(convs, ConversionLookup{ClickID: clickID(i), TS: tsOf(i) + time.Hour.Milliseconds(), Origin: "convs/0/" + strconv.Itoa(i), Topic: "convs", Partition: 0, Deadline: tsOf(i) + 2*time.Hour.Milliseconds()})
	}
	res, err := s.LookupConversions(ctx, convs)
	if err != nil {
		t.Fatal(err)
	}
	for k, r := range res {
		i := 7 + k*20_011
		if r.Status != LookupFound || r.Click.TS != tsOf(i) || r.Click.Experiment != exps[i%3] || r.Click.Arm != arms[(i/3)%4] {
			t.Fatalf("lookup of click %d: %+v", i, r)
		}
	}

	// Retire as the watermark advances by half a generation at a time.
	g := info.Generation.Milliseconds()
	h := horizon.Milliseconds() + 1 // the horizon and the slack
	var last RetireResult
	for wm := t0 + h; wm <= tsOf(n-1)+h+2*g; wm += g / 2 {
		res, err := s.RetireClickIndex(ctx, wm)
		if err != nil {
			t.Fatal(err)
		}
		if res.Next != NoTime && res.Next <= wm {
			t.Fatalf("watermark %d: next retirement at %d, not after it", wm, res.Next)
		}
		if last.Next != NoTime && wm < last.Next && len(res.Generations) > 0 {
			t.Fatalf("watermark %d retired %v before the announced %d", wm, res.Generations, last.Next)
		}
		last = res
		for i := 3; i < n; i += 9_973 {
			ts := tsOf(i)
			has := indexed(t, ctx, s, clickID(i), ts)
			switch {
			case ts+h > wm && !has:
				t.Fatalf("watermark %d: click %d at %d gone before its horizon passed", wm, i, ts)
			case ts+h+g <= wm && has:
				t.Fatalf("watermark %d: click %d at %d still indexed a generation after its horizon passed", wm, i, ts)
			}
		}
	}
	if last.Next != NoTime {
		t.Errorf("next retirement %d with no generation left", last.Next)
	}
	if k := indexKeyCount(t, ctx, s); k != 0 {
		t.Errorf("%d index keys left after every generation was retired", k)
	}
	left := usedMemory(t, ctx, rdb) - before
	t.Logf("after retiring everything: %d bytes above the start", left)
	if left > 2<<20 {
		t.Errorf("%d bytes not given back after retiring every generation", left)
	}
}

// TestDuplicateAcrossGenerations indexes a click, then clicks with its id
// and click times in other generations (before and after): each is a
// duplicate of the first, nothing is stored for them, and a conversion
// joins the first.
func TestDuplicateAcrossGenerations(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	if _, err := s.OpenClickIndex(ctx, ClickIndexOptions{Horizon: 4 * time.Hour}); err != nil {
		t.Fatal(err)
	}
	g := time.Hour.Milliseconds()
	first := ClickRecord{ClickID: "dup-7", Experiment: "e", Arm: "red", TS: t0 + 5*g + 10, Window: 4 * time.Hour, Origin: "clicks/0/1"}
	// Other clicks fill the generations, so that they exist (and their
	// filters hold other ids).
	var fill []ClickRecord
	for i := range 3000 {
		fill = append(fill, ClickRecord{ClickID: fmt.Sprintf("fill-%d", i), Experiment: "e", Arm: "blue", TS: t0 + 3*g + int64(i)*(4*g/3000), Window: 4 * time.Hour})
	}
	if _, err := s.IndexClicks(ctx, append(fill, first)); err != nil {
		t.Fatal(err)
	}
	want := ClickEntry{Experiment: "e", Arm: "red", TS: first.TS, Origin: first.Origin}
	for _, ts := range []int64{t0 + 3*g + 5, t0 + 4*g + 5, t0 + 6*g + 5} {
		dup := ClickRecord{ClickID: "dup-7", Experiment: "e", Arm: "green", TS: ts, Window: 4 * time.Hour, Origin: "clicks/1/9"}
		res, err := s.IndexClicks(ctx, []ClickRecord{dup})
		if err != nil {
			t.Fatal(err)
		}
		if res[0].Status != ClickDuplicate || res[0].Existing != want {
			t.Errorf("click at %d: %+v, want a duplicate of %+v", ts, res[0], want)
		}
		if indexed(t, ctx, s, "dup-7", ts) {
			t.Errorf("the duplicate at %d was stored", ts)
		}
	}
	lk, err := s.LookupConversions(ctx, []ConversionLookup{{ClickID: "dup-7", TS: t0 + 6*g + 100, Origin: "convs/0/1", Topic: "convs", Partition: 0, Deadline: t0 + 7*g}})
	if err != nil || lk[0].Status != LookupFound || lk[0].Click != want {
		t.Fatalf("lookup: %+v %v, want %+v", lk, err, want)
	}
}

// TestLookupLearnsNewGeneration runs lookup.lua with a generation the
// caller does not know the size of, which the group's copy has: the script
// refuses to park and names the size, and LookupConversions, told by it,
// finds the click.
func TestLookupLearnsNewGeneration(t *testing.T) {
	s, rdb, _ := newStore(t, Options{})
	ctx := testCtx(t)
	c := ClickRecord{ClickID: "late-gen", Experiment: "e", Arm: "red", TS: t0, Window: time.Hour}
	if _, err := s.IndexClicks(ctx, []ClickRecord{c}); err != nil {
		t.Fatal(err)
	}
	v, err := s.refreshIndex(ctx, 0, nil)
	if err != nil {
		t.Fatal(err)
	}
	gen := v.gen(t0)
	r := refOf(c.ClickID)
	reply, err := lookupScript.Run(ctx, rdb, []string{s.keys.indexOrphans(r.group), s.keys.indexGens(r.group)},
		r.field, "1", 60_000, "convs/0/1", t0+100, orphanRest(t0+1, nil), 1, strconv.FormatInt(gen, 10)).Slice()
	if err != nil {
		t.Fatal(err)
	}
	if len(reply) != 3 || reply[0] != "retry" || reply[1] != strconv.FormatInt(gen, 10) || reply[2] != strconv.Itoa(v.subs[gen]) {
		t.Fatalf("reply %v, want retry with generation %d of size %d", reply, gen, v.subs[gen])
	}
	if n, _ := rdb.HLen(ctx, s.keys.indexOrphans(r.group)).Result(); n != 0 {
		t.Fatalf("the script parked the conversion")
	}
	// A second store has not seen the generation (and would skip it in
	// the first phase); the script tells it.
	other, err := New(rdb, Options{})
	if err != nil {
		t.Fatal(err)
	}
	other.ix.mu.Lock()
	other.ix.open, other.ix.genMs, other.ix.horizonMs, other.ix.retired, other.ix.legacy = true, v.genMs, v.horizonMs, noGen, NoTime
	other.ix.subs, other.ix.copied, other.ix.names, other.ix.byID = map[int64]int{}, map[groupGen]bool{}, map[string]uint64{}, map[uint64]string{}
	other.ix.mu.Unlock()
	res, err := other.LookupConversions(ctx, []ConversionLookup{{ClickID: c.ClickID, TS: t0 + 100, Origin: "convs/0/2", Topic: "convs", Partition: 0, Deadline: t0 + 1000}})
	if err != nil || res[0].Status != LookupFound || res[0].Click.Arm != "red" {
		t.Fatalf("lookup: %+v %v", res, err)
	}
}

// TestFirstLayoutIndexUpgrade stores clicks and a parked conversion as the
// first layout did, over a prefix with an experiment and progress records,
// then uses the second layout: conversions find the old entries, a click
// with an old entry's id is a redelivery (same click) or a duplicate, a
// click claims the conversion parked for it in the old layout, the sweep
// settles an old orphan, and retiring past the legacy bound ends all that.
func TestFirstLayoutIndexUpgrade(t *testing.T) {
	s, rdb, _ := newStore(t, Options{OrphanTTL: time.Hour})
	ctx := testCtx(t)
	// State of the first layout: an experiment, progress up to t0+1000.
	steps := singleInstance(scenario(9, 60, 1), 60)
	applySteps(t, ctx, s, steps, 1)
	if err := s.ReportProgress(ctx, "clicks", 1, []PartitionProgress{{Partition: 0, Seen: t0 + 1000, Applied: NoTime, Swept: NoTime}}); err != nil {
		t.Fatal(err)
	}
	old := map[string]ClickEntry{
		"old-1": {Experiment: "e", Arm: "red", TS: t0 + 100, Origin: "clicks/0/11"},
		"old-2": {Experiment: "e", Arm: "blue", TS: t0 + 200, Origin: "clicks/0/12"},
	}
	for id, e := range old {
		if err := rdb.Set(ctx, s.keys.legacyClick(id), encodeClick(e), 2*time.Hour).Err(); err != nil {
			t.Fatal(err)
		}
	}
	for _, id := range []string{"old-3", "old-4"} {
		if err := rdb.HSet(ctx, s.keys.legacyOrphan(id), "s", "p", "org", "convs/0/"+id[4:], "ts", t0+300, "dl", t0+900, "tp", "convs", "pt", 0, "raw", "raw-"+id).Err(); err != nil {
			t.Fatal(err)
		}
		if err := rdb.ZAdd(ctx, s.keys.due("convs", 0), redis.Z{Score: float64(t0 + 900), Member: id}).Err(); err != nil {
			t.Fatal(err)
		}
	}
	info, err := s.OpenClickIndex(ctx, ClickIndexOptions{Horizon: time.Hour, ProgressTopics: []string{"clicks", "convs"}})
	if err != nil {
		t.Fatal(err)
	}
	if want := t0 + 1000 + time.Hour.Milliseconds() + DefaultClickTTLSlack.Milliseconds(); info.LegacyUntil != want {
		t.Fatalf("legacy bound %d, want %d", info.LegacyUntil, want)
	}

	res, err := s.LookupConversions(ctx, []ConversionLookup{
		{ClickID: "old-1", TS: t0 + 2000, Origin: "convs/0/20", Topic: "convs", Partition: 0, Deadline: t0 + 5000},
		{ClickID: "new-1", TS: t0 + 2000, Origin: "convs/0/21", Topic: "convs", Partition: 0, Deadline: t0 + 5000},
	})
	if err != nil {
		t.Fatal(err)
	}
	if res[0].Status != LookupFound || res[0].Click != old["old-1"] || res[1].Status != LookupParked {
		t.Fatalf("lookups %+v", res)
	}
	clicks, err := s.IndexClicks(ctx, []ClickRecord{
		{ClickID: "old-1", Experiment: "e", Arm: "red", TS: t0 + 100, Window: time.Hour, Origin: "clicks/0/11"},  // the same click again
		{ClickID: "old-2", Experiment: "e", Arm: "green", TS: t0 + 250, Window: time.Hour, Origin: "clicks/1/5"}, // another one
		{ClickID: "old-3", Experiment: "e", Arm: "red", TS: t0 + 150, Window: time.Hour, Origin: "clicks/0/13"},  // claims its old orphan
		{ClickID: "new-1", Experiment: "e", Arm: "red", TS: t0 + 1500, Window: time.Hour, Origin: "clicks/0/14"}, // claims its new orphan
	})
	if err != nil {
		t.Fatal(err)
	}
	if clicks[0].Status != ClickRedelivered || clicks[1].Status != ClickDuplicate || clicks[1].Existing != old["old-2"] {
		t.Errorf("old ids: %+v %+v", clicks[0], clicks[1])
	}
	if clicks[2].Status != ClickNew || clicks[2].Orphan == nil || clicks[2].Orphan.Origin != "convs/0/3" || string(clicks[2].Orphan.Raw) != "raw-old-3" {
		t.Errorf("click of an old orphan: %+v", clicks[2])
	}
	if clicks[3].Status != ClickNew || clicks[3].Orphan == nil || clicks[3].Orphan.Origin != "convs/0/21" {
		t.Errorf("click of a new orphan: %+v", clicks[3])
	}
	due, err := s.DueOrphans(ctx, "convs", 0, t0+1000, "test")
	if err != nil {
		t.Fatal(err)
	}
	if len(due) != 1 || due[0].ClickID != "old-4" || due[0].Origin != "convs/0/4" || string(due[0].Raw) != "raw-old-4" {
		t.Fatalf("due %+v, want old-4 (old-3 was claimed)", due)
	}
	if err := s.SettleOrphans(ctx, "convs", 0, []string{"old-4"}); err != nil {
		t.Fatal(err)
	}
	if n, _ := rdb.Exists(ctx, s.keys.legacyOrphan("old-4")).Result(); n != 0 {
		t.Errorf("old orphan left after settling")
	}

	// Past the bound and the orphan TTL, the first layout is not read.
	if _, err := s.RetireClickIndex(ctx, info.LegacyUntil+time.Hour.Milliseconds()+1); err != nil {
		t.Fatal(err)
	}
	v, err := s.refreshIndex(ctx, 0, nil)
	if err != nil || v.legacy != NoTime {
		t.Fatalf("legacy bound %d after retiring past it (%v)", v.legacy, err)
	}
	res, err = s.LookupConversions(ctx, []ConversionLookup{{ClickID: "old-2", TS: t0 + 3000, Origin: "convs/0/22", Topic: "convs", Partition: 0, Deadline: t0 + 5000}})
	if err != nil || res[0].Status != LookupParked {
		t.Fatalf("lookup after the bound: %+v %v, want parked (the old entry is not read)", res, err)
	}
}

// TestClickIndexKeysStayListpacks checks that the index's entry keys keep
// the compact encoding at the sizes the generations are cut to.
func TestClickIndexKeysStayListpacks(t *testing.T) {
	s, rdb, _ := newStore(t, Options{Prefix: "lp"})
	ctx := testCtx(t)
	var recs []ClickRecord
	for i := range 50_000 {
		recs = append(recs, ClickRecord{ClickID: clickID(i), Experiment: "e", Arm: "a", TS: t0 + int64(i)*100, Window: 24 * time.Hour})
	}
	for len(recs) > 0 {
		k := min(5000, len(recs))
		if _, err := s.IndexClicks(ctx, recs[:k]); err != nil {
			t.Fatal(err)
		}
		recs = recs[k:]
	}
	counts := map[string]int{}
	err := s.scan(ctx, "lp:{i:*", func(k string) bool {
		if strings.HasSuffix(k, ":f") || strings.HasSuffix(k, ":g") {
			return true
		}
		enc, err := rdb.ObjectEncoding(ctx, k).Result()
		if err != nil {
			t.Fatal(err)
		}
		counts[enc]++
		return true
	})
	if err != nil {
		t.Fatal(err)
	}
	if counts["hashtable"] > 0 || counts["listpack"] == 0 {
		t.Errorf("entry key encodings %v, want listpacks only", counts)
	}
}

// TestFilterBitsOneByOne runs the duplicate check across generations with
// filter bits read and set one command per bit, as on a server without
// BITFIELD (the embedded store of `ripen demo`), and checks that both ways
// leave the same filter.
func TestFilterBitsOneByOne(t *testing.T) {
	s, rdb, _ := newStore(t, Options{Prefix: "bits"})
	ctx := testCtx(t)
	if _, err := s.OpenClickIndex(ctx, ClickIndexOptions{Horizon: 4 * time.Hour}); err != nil {
		t.Fatal(err)
	}
	s.ix.mu.Lock()
	s.ix.bits = filterBits{perBit: true}
	s.ix.mu.Unlock()
	g := time.Hour.Milliseconds()
	var recs []ClickRecord
	for i := range 500 {
		recs = append(recs, ClickRecord{ClickID: fmt.Sprintf("b%d", i), Experiment: "e", Arm: "a", TS: t0 + int64(i)*(3*g/500), Window: 4 * time.Hour})
	}
	if _, err := s.IndexClicks(ctx, recs); err != nil {
		t.Fatal(err)
	}
	res, err := s.IndexClicks(ctx, []ClickRecord{{ClickID: "b7", Experiment: "e", Arm: "z", TS: t0 + 2*g + 5, Window: 4 * time.Hour, Origin: "clicks/0/1"}})
	if err != nil || res[0].Status != ClickDuplicate || res[0].Existing.TS != recs[7].TS {
		t.Fatalf("duplicate in another generation: %+v %v", res, err)
	}
	// The same clicks with BITFIELD under another prefix set the same bits.
	other, err := New(rdb, Options{Prefix: "bits2"})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := other.IndexClicks(ctx, recs); err != nil {
		t.Fatal(err)
	}
	v, err := s.refreshIndex(ctx, 0, nil)
	if err != nil {
		t.Fatal(err)
	}
	for gen := range v.subs {
		for grp := range indexGroups {
			a, _ := rdb.Get(ctx, s.keys.indexFilter(grp, gen)).Result()
			b, _ := rdb.Get(ctx, other.keys.indexFilter(grp, gen)).Result()
			if a != b {
				t.Fatalf("filter of group %d, generation %d differs between GETBIT/SETBIT and BITFIELD", grp, gen)
			}
		}
	}
}
