package state

import (
	"context"
	"errors"
	"maps"
	"reflect"
	"slices"
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
		// The hash now holds its base alone, and the base holds exactly
		// the loaded state's canonical counts.
		h, err := rdb.HGetAll(ctx, s.keys.arm("exp-a", arm)).Result()
		if err != nil {
			t.Fatal(err)
		}
		if len(h) != 1 || h[armBaseField] == "" {
			t.Fatalf("%s: compacted hash has fields %v, want the base alone (compact said %+v)", arm, slices.Collect(maps.Keys(h)), res)
		}
		c := newArmCounts(len(testLayout.DelayEdges()) - 1)
		if err := c.addBase([]byte(h[armBaseField])); err != nil {
			t.Fatal(err)
		}
		st, held, err := c.state(testLayout, before.Watermark)
		if err != nil || held != 0 {
			t.Fatalf("%s: base: %v (held %d)", arm, err, held)
		}
		if !reflect.DeepEqual(st.Snapshot(), before.States[arm].Snapshot()) {
			t.Errorf("%s: the base holds other counts than the loaded state", arm)
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

// TestCompactLoaded folds the arms of a loaded experiment in one round
// trip: every arm with records is rewritten to its base, except one
// written between the load and the fold, and Load gives the same state
// before and after.
func TestCompactLoaded(t *testing.T) {
	s, rdb, _ := newStore(t, Options{})
	ctx := testCtx(t)
	steps := singleInstance(scenario(8, 900, 2), 60)
	half := len(steps) / 2
	applySteps(t, ctx, s, steps[:half], 1)
	ex, err := s.Load(ctx, "exp-a")
	if err != nil {
		t.Fatal(err)
	}
	// A write to red after the load: its fold must be refused.
	if _, err := s.Apply(ctx, &ExperimentDelta{Experiment: "exp-a", Layout: testLayout, Watermark: ex.Watermark, Generation: 1,
		Ranges: []OffsetRange{{Topic: "other", Partition: 0, From: 0, To: 0}},
		Arms:   map[string]*ArmDelta{"red": {MaturedClicks: 1}}}); err != nil {
		t.Fatal(err)
	}
	done, err := s.CompactLoaded(ctx, ex)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(done, []string{"blue", "green"}) {
		t.Fatalf("folded %v, want blue and green (red was written since the load)", done)
	}
	for _, arm := range done {
		h, err := rdb.HGetAll(ctx, s.keys.arm("exp-a", arm)).Result()
		if err != nil {
			t.Fatal(err)
		}
		if len(h) != 1 || h[armBaseField] == "" {
			t.Errorf("%s after the fold: fields %v, want the base alone", arm, slices.Collect(maps.Keys(h)))
		}
	}
	after, err := s.Load(ctx, "exp-a")
	if err != nil {
		t.Fatal(err)
	}
	for _, arm := range []string{"blue", "green"} {
		if !reflect.DeepEqual(after.States[arm].Snapshot(), ex.States[arm].Snapshot()) {
			t.Errorf("%s: Load differs after the fold", arm)
		}
	}
	if got, want := after.States["red"].Clicks(), ex.States["red"].Clicks()+1; got != want {
		t.Errorf("red: %d clicks, want %d", got, want)
	}
}
