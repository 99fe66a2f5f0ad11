package state

import (
	"context"
	"errors"
	"reflect"
	"strconv"
	"sync"
	"testing"
)

// TestCompactBesideApply runs three appliers (disjoint partitions) and a
// compactor concurrently, then checks that no count was lost, that the
// hash holds exactly the canonical fields, and that Load is unchanged by a
// final compaction.
func TestCompactBesideApply(t *testing.T) {
	s, rdb, _ := newStore(t, Options{})
	ctx := testCtx(t)
	evs := scenario(21, 1500, 6)
	var mine [3][]event
	for _, e := range evs {
		mine[e.partition%3] = append(mine[e.partition%3], e)
	}
	var all []step
	var wg sync.WaitGroup
	errs := make(chan error, 4)
	done := make(chan struct{})
	for g := range mine {
		steps := singleInstance(mine[g], 30)
		all = append(all, steps...)
		wg.Add(1)
		go func() {
			defer wg.Done()
			for _, st := range steps {
				for _, d := range buildDeltas(testLayout, st.wm, 1, st.events) {
					if _, err := s.Apply(ctx, d); err != nil {
						errs <- err
						return
					}
				}
			}
		}()
	}
	var rewrites, conflicts, retried int
	var cwg sync.WaitGroup
	cwg.Add(1)
	go func() {
		defer cwg.Done()
		// Bounded: stop when the appliers are done or after 400 rounds.
		for round := 0; round < 400; round++ {
			select {
			case <-done:
				return
			default:
			}
			for _, ea := range [][2]string{{"exp-a", "red"}, {"exp-a", "blue"}, {"exp-a", "green"}, {"exp-b", "x"}, {"exp-b", "y"}} {
				res, err := s.Compact(ctx, ea[0], ea[1])
				if res.Attempts > 1 {
					retried++
				}
				switch {
				case errors.Is(err, ErrConflict):
					if !IsRetriable(err) {
						errs <- err
						return
					}
					conflicts++
				case err != nil:
					errs <- err
					return
				case res.FieldsAfter < res.FieldsBefore:
					rewrites++
				}
			}
		}
	}()
	wg.Wait()
	close(done)
	cwg.Wait()
	close(errs)
	for err := range errs {
		t.Fatal(err)
	}
	t.Logf("concurrent compactions: %d rewrites, %d retried after a conflict, %d gave up", rewrites, retried, conflicts)
	if rewrites == 0 {
		t.Errorf("no compaction rewrote a hash while the appliers ran")
	}
	ref := reference(testLayout, all)
	assertMatches(t, ctx, s, ref)

	before, err := s.Load(ctx, "exp-a")
	if err != nil {
		t.Fatal(err)
	}
	for _, arm := range before.Arms {
		res, err := s.Compact(ctx, "exp-a", arm)
		if err != nil {
			t.Fatalf("compact %s: %v", arm, err)
		}
		// The hash now holds exactly one field per canonical bucket and
		// kind, the matured and delay totals, nothing zero.
		h, err := rdb.HGetAll(ctx, s.keys.arm("exp-a", arm)).Result()
		if err != nil {
			t.Fatal(err)
		}
		snap := before.States[arm].Snapshot()
		want := map[string]string{}
		put := func(f string, n uint64) {
			if n > 0 {
				want[f] = strconv.FormatUint(n, 10)
			}
		}
		for _, b := range snap.Buckets {
			put(bucketField('b', b.BucketKey), b.Clicks)
			put(bucketField('v', b.BucketKey), b.Converted)
		}
		put("mc", snap.MaturedClicks)
		put("mv", snap.MaturedConversions)
		for i, n := range snap.Delays {
			put("d:"+strconv.Itoa(i), n)
		}
		put("dn", snap.DelayCount)
		put("ds", snap.DelaySumMs)
		if !reflect.DeepEqual(h, want) {
			t.Errorf("%s: compacted hash has %d fields, want the %d canonical ones (compact said %+v)", arm, len(h), len(want), res)
		}
	}
	after, err := s.Load(ctx, "exp-a")
	if err != nil {
		t.Fatal(err)
	}
	for _, arm := range before.Arms {
		if !reflect.DeepEqual(before.States[arm].Snapshot(), after.States[arm].Snapshot()) {
			t.Errorf("%s: Load differs after compaction", arm)
		}
	}
}

// TestCompactConflict shows the compare-and-set refusing a stale read: a
// hash changed between read and write is left alone.
func TestCompactConflict(t *testing.T) {
	s, rdb, _ := newStore(t, Options{})
	ctx := context.Background()
	key := s.keys.arm("e", "a")
	if err := rdb.HSet(ctx, key, "b:0:5", "2", "mc", "1").Err(); err != nil {
		t.Fatal(err)
	}
	stale := []any{2, "b:0:5", "2", "mc", "0", "b:1:2", "2"}
	ok, err := compactScript.Run(ctx, rdb, []string{key}, stale...).Int()
	if err != nil || ok != 0 {
		t.Fatalf("stale compare-and-set: ok=%d err=%v, want refused", ok, err)
	}
	fresh := []any{2, "b:0:5", "2", "mc", "1", "b:1:2", "2", "mc", "1"}
	ok, err = compactScript.Run(ctx, rdb, []string{key}, fresh...).Int()
	if err != nil || ok != 1 {
		t.Fatalf("fresh compare-and-set: ok=%d err=%v, want done", ok, err)
	}
	h, _ := rdb.HGetAll(ctx, key).Result()
	if !reflect.DeepEqual(h, map[string]string{"b:1:2": "2", "mc": "1"}) {
		t.Fatalf("hash after rewrite: %v", h)
	}
}
