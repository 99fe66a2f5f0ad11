package state

import (
	"fmt"
	"hash/fnv"
	"reflect"
	"strconv"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"ripen/state/redistest"
)

// TestClickIndexJoin covers the join both ways round: click first (found),
// conversion first (parked, then claimed by the click), redelivery and
// duplicate conversions, TTLs, and the deadline sweep.
func TestClickIndexJoin(t *testing.T) {
	s, rdb, _ := newStore(t, Options{ClickTTLSlack: 10 * time.Minute, OrphanTTL: 2 * time.Hour})
	ctx := testCtx(t)
	window := time.Hour

	// Click first.
	orphans, err := s.PutClicks(ctx, []ClickRecord{{ClickID: "k1", Experiment: "e", Arm: "red", TS: t0, Window: window}})
	if err != nil || len(orphans) != 0 {
		t.Fatalf("put: %v %v", orphans, err)
	}
	conv := func(id, origin string, part int, deadline int64) ConversionLookup {
		return ConversionLookup{ClickID: id, TS: t0 + 5000, Origin: origin, Raw: []byte("raw:" + origin), Topic: "convs", Partition: part, Deadline: deadline}
	}
	res, err := s.LookupConversions(ctx, []ConversionLookup{
		conv("k1", "convs/0/1", 0, t0+100),
		conv("k2", "convs/0/2", 0, t0+200), // no click yet: parked
		conv("k2", "convs/0/2", 0, t0+200), // the same again: redelivery
		conv("k2", "convs/1/9", 1, t0+300), // another conversion of k2: duplicate
		conv("k3", "convs/0/3", 0, t0+400), // parked, never claimed
	})
	if err != nil {
		t.Fatal(err)
	}
	want := []LookupResult{
		{Status: LookupFound, Click: ClickEntry{Experiment: "e", Arm: "red", TS: t0}},
		{Status: LookupParked},
		{Status: LookupParkedBefore},
		{Status: LookupDuplicate, Origin: "convs/0/2"},
		{Status: LookupParked},
	}
	if !reflect.DeepEqual(res, want) {
		t.Fatalf("lookups:\n got  %+v\n want %+v", res, want)
	}
	ttl, _ := rdb.PTTL(ctx, s.keys.indexOrphans(refOf("k2").group)).Result()
	if ttl <= 2*time.Hour-time.Minute || ttl > 2*time.Hour {
		t.Errorf("orphans TTL %v, want about 2h", ttl)
	}
	due, _ := rdb.ZRangeWithScores(ctx, s.keys.due("convs", 0), 0, -1).Result()
	if len(due) != 2 || due[0].Member != "k2" || due[0].Score != float64(t0+200) || due[1].Member != "k3" {
		t.Errorf("due set %v, want k2@%d and k3", due, t0+200)
	}
	if n, _ := rdb.ZCard(ctx, s.keys.due("convs", 1)).Result(); n != 0 {
		t.Errorf("duplicate was added to its partition's due set")
	}

	// The click of k2 arrives and claims the orphan; a redelivered click
	// claims it again, marked as claimed before.
	for i, wantClaimed := range []bool{false, true} {
		orphans, err := s.PutClicks(ctx, []ClickRecord{
			{ClickID: "k2", Experiment: "e", Arm: "blue", TS: t0 + 1000, Window: window},
			{ClickID: "k4", Experiment: "e", Arm: "blue", TS: t0 + 1000, Window: window},
		})
		if err != nil {
			t.Fatal(err)
		}
		wantO := []Orphan{{ClickID: "k2", TS: t0 + 5000, Origin: "convs/0/2", Topic: "convs", Partition: 0, Deadline: t0 + 200, Raw: []byte("raw:convs/0/2"), Claimed: wantClaimed}}
		if !reflect.DeepEqual(orphans, wantO) {
			t.Fatalf("put %d: orphans %+v, want %+v", i, orphans, wantO)
		}
	}
	res, err = s.LookupConversions(ctx, []ConversionLookup{conv("k2", "convs/0/2", 0, t0+200)})
	if err != nil || res[0].Status != LookupFound || res[0].Click.Arm != "blue" {
		t.Fatalf("lookup after click: %+v %v", res, err)
	}

	// Sweep: nothing due before the deadlines; then k3 expires (returned,
	// marked), k2 was claimed (removed silently). Until it is settled, k3
	// comes back from every sweep (a sweeper that crashed before settling
	// loses nothing), even one at an earlier watermark, and a late click
	// does not claim it.
	if got, err := s.DueOrphans(ctx, "convs", 0, t0+199, "test"); err != nil || len(got) != 0 {
		t.Fatalf("early sweep: %v %v", got, err)
	}
	for i, wm := range []int64{t0 + 1000, t0 + 1000, t0 + 450} {
		got, err := s.DueOrphans(ctx, "convs", 0, wm, "test")
		if err != nil {
			t.Fatal(err)
		}
		if len(got) != 1 || got[0].ClickID != "k3" || got[0].Origin != "convs/0/3" || string(got[0].Raw) != "raw:convs/0/3" || got[0].Claimed {
			t.Fatalf("sweep %d returned %+v, want k3 unclaimed", i, got)
		}
		if i == 0 {
			res, err := s.IndexClicks(ctx, []ClickRecord{{ClickID: "k3", Experiment: "e", Arm: "red", TS: t0, Window: window, Origin: "clicks/0/7"}})
			if err != nil || res[0].Status != ClickNew || res[0].Orphan != nil {
				t.Fatalf("late click of an expiring orphan: %+v %v", res, err)
			}
		}
	}
	if ok, _ := rdb.HExists(ctx, s.keys.indexOrphans(refOf("k2").group), refOf("k2").field).Result(); ok {
		t.Errorf("claimed orphan k2 still exists after the sweep")
	}
	if err := s.SettleOrphans(ctx, "convs", 0, []string{"k3"}); err != nil {
		t.Fatal(err)
	}
	if ok, _ := rdb.HExists(ctx, s.keys.indexOrphans(refOf("k3").group), refOf("k3").field).Result(); ok {
		t.Errorf("orphan k3 still exists after settling")
	}
	if n, _ := rdb.Exists(ctx, s.keys.due("convs", 0)).Result(); n != 0 {
		t.Errorf("due set still exists after settling")
	}
	if got, err := s.DueOrphans(ctx, "convs", 0, t0+1000, "test"); err != nil || len(got) != 0 {
		t.Fatalf("sweep after settling: %v %v", got, err)
	}
}

// TestLookupFirstConversionCounts: of two conversions of one click in a
// call, the first in batch order is the one that parks and the second is
// its duplicate, even when the first, whose window reaches a newer
// generation, has to learn that generation in a second round. The
// generation appears between the call's refresh and its scripts (another
// writer sizing it); the test writes the group's copy of its size to
// stand in for that writer.
func TestLookupFirstConversionCounts(t *testing.T) {
	s, rdb, _ := newStore(t, Options{OrphanTTL: time.Hour})
	ctx := testCtx(t)
	window := time.Hour
	if _, err := s.IndexClicks(ctx, []ClickRecord{{ClickID: "other", Experiment: "e", Arm: "a", TS: t0, Window: window, Origin: "clicks/0/1"}}); err != nil {
		t.Fatal(err)
	}
	s.ix.mu.Lock()
	genMs := s.ix.genMs
	s.ix.mu.Unlock()
	later := ConversionLookup{ClickID: "k1", TS: t0 + 50*time.Minute.Milliseconds(), Origin: "convs/0/1", Raw: []byte("later"), Topic: "convs", Deadline: t0 + 2*window.Milliseconds()}
	earlier := ConversionLookup{ClickID: "k1", TS: t0 + time.Minute.Milliseconds(), Origin: "convs/0/2", Raw: []byte("earlier"), Topic: "convs", Deadline: t0 + 2*window.Milliseconds()}
	if floorDiv64(later.TS, genMs) <= floorDiv64(earlier.TS, genMs)+1 {
		t.Fatalf("generation of %d ms: the two conversions must be more than one generation apart", genMs)
	}
	g := floorDiv64(later.TS, genMs) + 1
	if err := rdb.HSet(ctx, s.keys.indexGens(refOf("k1").group), strconv.FormatInt(g, 10), 1).Err(); err != nil {
		t.Fatal(err)
	}
	res, err := s.LookupConversions(ctx, []ConversionLookup{later, earlier})
	if err != nil {
		t.Fatal(err)
	}
	want := []LookupResult{{Status: LookupParked}, {Status: LookupDuplicate, Origin: "convs/0/1"}}
	if !reflect.DeepEqual(res, want) {
		t.Fatalf("lookups:\n got  %+v\n want %+v", res, want)
	}
	// The click comes and claims the first conversion.
	put, err := s.IndexClicks(ctx, []ClickRecord{{ClickID: "k1", Experiment: "e", Arm: "a", TS: t0, Window: window, Origin: "clicks/0/2"}})
	if err != nil {
		t.Fatal(err)
	}
	if o := put[0].Orphan; o == nil || o.Origin != "convs/0/1" {
		t.Fatalf("click claimed %+v, want the conversion read first (convs/0/1)", o)
	}
}

// TestIndexClicksOnce checks that a click id is indexed once: the same
// click read again is a redelivery (and claims its orphan again), another
// click with the id is a duplicate that changes nothing.
func TestIndexClicksOnce(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	rec := func(arm, origin string, ts int64) ClickRecord {
		return ClickRecord{ClickID: "d1", Experiment: "e", Arm: arm, TS: ts, Window: time.Hour, Origin: origin}
	}
	if _, err := s.LookupConversions(ctx, []ConversionLookup{{ClickID: "d1", TS: t0 + 10, Origin: "convs/0/4", Topic: "convs", Partition: 0, Deadline: t0 + 99}}); err != nil {
		t.Fatal(err)
	}
	res, err := s.IndexClicks(ctx, []ClickRecord{
		rec("red", "clicks/0/1", t0),
		rec("red", "clicks/0/1", t0),    // the same message twice in a batch
		rec("blue", "clicks/1/5", t0+5), // another click with the id
		rec("red", "clicks/0/2", t0),    // same content, other origin
	})
	if err != nil {
		t.Fatal(err)
	}
	first := ClickEntry{Experiment: "e", Arm: "red", TS: t0, Origin: "clicks/0/1"}
	want := []ClickStatus{ClickNew, ClickRedelivered, ClickDuplicate, ClickDuplicate}
	for i, r := range res {
		if r.Status != want[i] {
			t.Errorf("click %d: status %v, want %v", i, r.Status, want[i])
		}
		if r.Status == ClickDuplicate && r.Existing != first {
			t.Errorf("click %d: existing %+v, want %+v", i, r.Existing, first)
		}
		if hasOrphan := r.Orphan != nil; hasOrphan != (i < 2) {
			t.Errorf("click %d: orphan %+v", i, r.Orphan)
		}
	}
	if res[0].Orphan.Claimed || !res[1].Orphan.Claimed {
		t.Errorf("claimed flags %v %v, want false then true", res[0].Orphan.Claimed, res[1].Orphan.Claimed)
	}
	lk, err := s.LookupConversions(ctx, []ConversionLookup{{ClickID: "d1", TS: t0 + 10, Origin: "convs/0/9", Topic: "convs", Partition: 0, Deadline: t0 + 99}})
	if err != nil || lk[0].Status != LookupFound || lk[0].Click != first {
		t.Fatalf("lookup after duplicates: %+v %v", lk, err)
	}
}

// TestClickEntryEncoding round-trips entries of both layouts with and
// without an origin and refuses truncated or padded ones.
func TestClickEntryEncoding(t *testing.T) {
	for _, e := range []entry{{arm: 1, tsOff: 0}, {arm: 70000, tsOff: 86_399_999, topic: 2, partition: 31, offset: 1 << 40}} {
		b := e.encode()
		got, err := decodeEntry(b)
		if err != nil || got != e {
			t.Errorf("round trip of %+v: %+v %v", e, got, err)
		}
		if _, err := decodeEntry(append(b, 7)); err == nil {
			t.Errorf("%+v with a trailing byte decoded", e)
		}
		if _, err := decodeEntry(b[:len(b)-1]); err == nil {
			t.Errorf("%+v truncated decoded", e)
		}
	}
	for _, e := range []ClickEntry{
		{Experiment: "e", Arm: "a", TS: t0},
		{Experiment: "spring-sale", Arm: "arm-b", TS: -5, Origin: "clicks/3/123456"},
	} {
		b := encodeClick(e)
		got, err := decodeClick(b)
		if err != nil || got != e {
			t.Errorf("round trip of %+v: %+v %v", e, got, err)
		}
		if _, err := decodeClick(append(b, 7)); err == nil {
			t.Errorf("%+v with a trailing byte decoded", e)
		}
		if _, err := decodeClick(b[:len(b)-1]); err == nil && e.Origin != "" {
			t.Errorf("%+v truncated decoded", e)
		}
	}
}

// TestOrphanCap parks at most MaxParkedOrphans per partition.
func TestOrphanCap(t *testing.T) {
	s, _, _ := newStore(t, Options{MaxParkedOrphans: 2})
	ctx := testCtx(t)
	var convs []ConversionLookup
	for i := range 4 {
		convs = append(convs, ConversionLookup{ClickID: fmt.Sprintf("m%d", i), Origin: fmt.Sprintf("convs/0/%d", i), Topic: "convs", Partition: 0, Deadline: t0})
	}
	convs = append(convs, ConversionLookup{ClickID: "n", Origin: "convs/1/0", Topic: "convs", Partition: 1, Deadline: t0})
	res, err := s.LookupConversions(ctx, convs)
	if err != nil {
		t.Fatal(err)
	}
	var got []LookupStatus
	for _, r := range res {
		got = append(got, r.Status)
	}
	want := []LookupStatus{LookupParked, LookupParked, LookupCapExceeded, LookupCapExceeded, LookupParked}
	if !reflect.DeepEqual(got, want) {
		t.Fatalf("statuses %v, want %v", got, want)
	}
	// Still full in the next batch; room again after the sweep.
	res, _ = s.LookupConversions(ctx, convs[2:3])
	if res[0].Status != LookupCapExceeded {
		t.Fatalf("next batch: %v, want cap exceeded", res[0].Status)
	}
	exp, err := s.DueOrphans(ctx, "convs", 0, t0, "test")
	if err != nil || len(exp) != 2 {
		t.Fatalf("sweep: %d %v", len(exp), err)
	}
	if err := s.SettleOrphans(ctx, "convs", 0, []string{exp[0].ClickID, exp[1].ClickID}); err != nil {
		t.Fatal(err)
	}
	res, _ = s.LookupConversions(ctx, convs[2:3])
	if res[0].Status != LookupParked {
		t.Fatalf("after sweep: %v, want parked", res[0].Status)
	}
}

// TestOrphanCapOnlyParked checks that only conversions that park use a
// partition's room: conversions whose click is indexed, redeliveries of
// parked ones and duplicates take none of it, whatever their place in
// the batch.
func TestOrphanCapOnlyParked(t *testing.T) {
	s, rdb, _ := newStore(t, Options{MaxParkedOrphans: 2})
	ctx := testCtx(t)
	var clicks []ClickRecord
	for i := range 3 {
		clicks = append(clicks, ClickRecord{ClickID: fmt.Sprintf("known%d", i), Experiment: "e", Arm: "red", TS: t0, Window: time.Hour})
	}
	if _, err := s.IndexClicks(ctx, clicks); err != nil {
		t.Fatal(err)
	}
	conv := func(id string, off int) ConversionLookup {
		return ConversionLookup{ClickID: id, TS: t0 + 1000, Origin: fmt.Sprintf("convs/0/%d", off), Topic: "convs", Partition: 0, Deadline: t0 + 5000}
	}
	tests := []struct {
		name  string
		convs []ConversionLookup
		want  []LookupStatus
	}{
		{
			// Three joined conversions first: before the fix they took
			// both shares of room and the two unknown clicks were capped.
			name:  "joined before parked",
			convs: []ConversionLookup{conv("known0", 1), conv("known1", 2), conv("known2", 3), conv("wait0", 4), conv("wait1", 5)},
			want:  []LookupStatus{LookupFound, LookupFound, LookupFound, LookupParked, LookupParked},
		},
		{
			// The partition is full now; redeliveries and a duplicate
			// are still answered as such, a new unknown click is capped.
			name:  "full partition",
			convs: []ConversionLookup{conv("wait0", 4), conv("wait1", 9), conv("known0", 1), conv("wait2", 6)},
			want:  []LookupStatus{LookupParkedBefore, LookupDuplicate, LookupFound, LookupCapExceeded},
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			res, err := s.LookupConversions(ctx, tc.convs)
			if err != nil {
				t.Fatal(err)
			}
			var got []LookupStatus
			for _, r := range res {
				got = append(got, r.Status)
			}
			if !reflect.DeepEqual(got, tc.want) {
				t.Fatalf("statuses %v, want %v", got, tc.want)
			}
			if n, _ := rdb.ZCard(ctx, s.keys.due("convs", 0)).Result(); n != 2 {
				t.Errorf("due set holds %d, want the 2 parked", n)
			}
		})
	}
}

// TestScriptsAfterRestart restarts the server (its script cache is empty)
// and checks that pipelined and single scripts reload themselves, and that
// calls while it is down fail as retriable.
func TestScriptsAfterRestart(t *testing.T) {
	srv := redistest.Start(t)
	// Few retries, so that the calls made while the server is down fail
	// quickly.
	rdb := redis.NewClient(&redis.Options{Addr: srv.Addr(), MaxRetries: -1, DialerRetries: 1, DialTimeout: 200 * time.Millisecond})
	t.Cleanup(func() { _ = rdb.Close() })
	s, err := New(rdb, Options{})
	if err != nil {
		t.Fatal(err)
	}
	ctx := testCtx(t)
	put := func() error {
		_, err := s.PutClicks(ctx, []ClickRecord{{ClickID: "k", Experiment: "e", Arm: "a", TS: t0, Window: time.Hour}})
		return err
	}
	if err := put(); err != nil {
		t.Fatal(err)
	}
	if _, err := s.Apply(ctx, oneClick(1, 0, 0, 0)); err != nil {
		t.Fatal(err)
	}
	srv.Stop()
	for name, call := range map[string]func() error{
		"put clicks": put,
		"apply":      func() error { _, err := s.Apply(ctx, oneClick(1, 0, 1, 1)); return err },
		"load":       func() error { _, err := s.Load(ctx, "e"); return err },
		"resume":     func() error { _, err := s.Resume(ctx, "clicks", 0); return err },
	} {
		if err := call(); err == nil || !IsRetriable(err) {
			t.Errorf("%s while down: %v, want a retriable error", name, err)
		}
	}
	srv.Restart()
	if err := put(); err != nil {
		t.Fatalf("put clicks after restart: %v", err)
	}
	if _, err := s.Apply(ctx, oneClick(1, 0, 0, 0)); err != nil {
		t.Fatalf("apply after restart: %v", err)
	}
	if n := clicksOf(t, s, "a"); n != 1 {
		t.Fatalf("clicks after restart %d, want 1", n)
	}
}

// TestIndexClicksLargeBatch indexes a large batch and checks that clicks
// of one id keep their batch order (the first is indexed, a repeat from another origin is a
// duplicate, an exact repeat a redelivery) and that parked conversions
// are claimed by their clicks.
func TestIndexClicksLargeBatch(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	const n = 4000
	var parked []ConversionLookup
	for i := 0; i < n; i += 97 {
		parked = append(parked, ConversionLookup{ClickID: fmt.Sprintf("big%d", i), TS: t0 + 10, Origin: fmt.Sprintf("convs/0/%d", i), Topic: "convs", Partition: 0, Deadline: t0 + 1000})
	}
	if _, err := s.LookupConversions(ctx, parked); err != nil {
		t.Fatal(err)
	}
	var clicks []ClickRecord
	want := map[int]ClickStatus{}
	for i := range n {
		clicks = append(clicks, ClickRecord{ClickID: fmt.Sprintf("big%d", i), Experiment: "e", Arm: "red", TS: t0, Window: time.Hour, Origin: fmt.Sprintf("clicks/0/%d", i)})
		want[len(clicks)-1] = ClickNew
		if i%50 == 7 {
			// A reused id from another origin, then an exact repeat.
			clicks = append(clicks, ClickRecord{ClickID: fmt.Sprintf("big%d", i), Experiment: "e", Arm: "blue", TS: t0 + 5, Window: time.Hour, Origin: fmt.Sprintf("clicks/1/%d", i)})
			want[len(clicks)-1] = ClickDuplicate
			clicks = append(clicks, clicks[len(clicks)-2])
			want[len(clicks)-1] = ClickRedelivered
		}
	}
	res, err := s.IndexClicks(ctx, clicks)
	if err != nil {
		t.Fatal(err)
	}
	claimed := 0
	for i, r := range res {
		if r.Status != want[i] {
			t.Fatalf("click %d (%s from %s): %v, want %v", i, clicks[i].ClickID, clicks[i].Origin, r.Status, want[i])
		}
		if r.Status == ClickDuplicate && (r.Existing.Arm != "red" || r.Existing.Origin == clicks[i].Origin) {
			t.Errorf("click %d: existing %+v, want the first click", i, r.Existing)
		}
		if r.Orphan != nil {
			if r.Status == ClickNew {
				claimed++
			}
			if want := "convs/0/" + clicks[i].ClickID[len("big"):]; r.Orphan.Origin != want {
				t.Errorf("click %d claimed %q, want %q", i, r.Orphan.Origin, want)
			}
		}
	}
	if claimed != len(parked) {
		t.Errorf("new clicks claimed %d orphans, want %d", claimed, len(parked))
	}
}

// TestClickRefHash pins the index layout's hash of a click id to FNV-1a
// (64-bit) as hash/fnv computes it: groups, sub-keys and filter bits of
// stored entries depend on it.
func TestClickRefHash(t *testing.T) {
	for _, id := range []string{"", "k1", "c000123", "ck-00a3f9e2b7c4d5e6f", "√ünïcödé-click"} {
		h := fnv.New64a()
		h.Write([]byte(id))
		want := h.Sum64()
		if r := refOf(id); r.hash != want || r.group != int(want%indexGroups) {
			t.Errorf("refOf(%q) = %+v, want hash %x", id, r, want)
		}
	}
	if r := refOf("short-id"); r.field != "short-id" {
		t.Errorf("a 8-byte id is stored as %q", r.field)
	}
	if r := refOf("ck-00a3f9e2b7c4d5e6f"); len(r.field) != hashedIDBytes {
		t.Errorf("a 20-byte id is stored in %d bytes", len(r.field))
	}
}
