package consumer

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"testing"

	"ripen/state"
	"ripen/state/redistest"
)

// unitGen is a generation of svc with writer epoch epoch owning clicks/0,
// driven directly (no Kafka), for flush-level tests against Redis.
func unitGen(svc *Service, epoch int32) *genState {
	return &genState{
		s: svc, id: epoch, assigned: []state.TopicPartition{{Topic: DefaultClickTopic, Partition: 0}},
		exps: map[string]*expInfo{}, capped: map[string]bool{},
		own: map[state.TopicPartition]*ownedPart{}, times: unknownTimes, swept: map[state.TopicPartition]int64{},
	}
}

// clickBatch is a batch of clicks/0 offsets from..to, one click each.
func clickBatch(t *testing.T, from, to int64) *batch {
	t.Helper()
	b := newBatch()
	tp := state.TopicPartition{Topic: DefaultClickTopic, Partition: 0}
	for off := from; off <= to; off++ {
		v, err := json.Marshal(Click{ClickID: fmt.Sprintf("z%03d", off), Experiment: "zoo-gate", Arm: []string{"lion", "otter"}[off%2], TS: streamT0 + off*1000})
		if err != nil {
			t.Fatal(err)
		}
		b.add(fetched{tp: tp, offset: off, value: v, hwm: to + 1})
	}
	return b
}

// TestZombieAndStaleOffsets drives two generations of the same partition
// against a real Redis: a zombie (older epoch) writes an experiment the new
// owner had cached as untouched, so the new owner's delta overlaps stored
// offsets; the new owner reloads them, rebuilds its delta without the
// events the zombie applied and retries, counting every click once. A
// later write of the zombie is refused as fenced and changes nothing.
func TestZombieAndStaleOffsets(t *testing.T) {
	rs := redistest.Start(t)
	st, err := state.New(rs.Client(), state.Options{})
	if err != nil {
		t.Fatal(err)
	}
	svc, err := New(Config{}, Deps{Store: st, Logger: testLogger(t)})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	cfg := svc.config()
	clicks := func() uint64 {
		t.Helper()
		ex, err := st.Load(ctx, "zoo-gate")
		if err != nil {
			t.Fatal(err)
		}
		var n uint64
		for _, s := range ex.States {
			n += s.Clicks()
		}
		return n
	}

	owner, zombie := unitGen(svc, 5), unitGen(svc, 4)
	// The new owner looks the experiment up before the zombie's write.
	if _, rej, err := owner.experiment(ctx, cfg, "zoo-gate", "lion"); err != nil || rej != nil {
		t.Fatalf("load: %v %v", rej, err)
	}
	if _, err := zombie.flush(ctx, clickBatch(t, 0, 5)); err != nil {
		t.Fatalf("zombie's first flush: %v", err)
	}
	if n := clicks(); n != 6 {
		t.Fatalf("after the zombie: %d clicks, want 6", n)
	}
	res, err := owner.flush(ctx, clickBatch(t, 0, 9))
	if err != nil {
		t.Fatalf("owner's flush over the zombie's offsets: %v", err)
	}
	if res.deltas != 1 {
		t.Errorf("owner applied %d deltas, want 1", res.deltas)
	}
	if n := clicks(); n != 10 {
		t.Fatalf("after the owner: %d clicks, want 10 (each once)", n)
	}
	offs, err := st.Offsets(ctx, "zoo-gate")
	if err != nil {
		t.Fatal(err)
	}
	if got := offs[state.TopicPartition{Topic: DefaultClickTopic, Partition: 0}]; got != (state.AppliedOffset{Generation: 5, Offset: 9}) {
		t.Errorf("stored offsets %+v, want generation 5 through 9", got)
	}

	// The zombie's late write is refused; nothing changes.
	_, err = zombie.flush(ctx, clickBatch(t, 10, 12))
	if !errors.Is(err, errFenced) || !errors.Is(err, state.ErrFenced) {
		t.Fatalf("zombie's late flush: %v, want fenced", err)
	}
	if n := clicks(); n != 10 {
		t.Fatalf("after the refused zombie: %d clicks, want 10", n)
	}
	// The owner reads those offsets itself and counts them once.
	if _, err := owner.flush(ctx, clickBatch(t, 10, 12)); err != nil {
		t.Fatal(err)
	}
	if n := clicks(); n != 13 {
		t.Fatalf("after the owner's next flush: %d clicks, want 13", n)
	}
}

// TestResetFencing recreates a group in effect (its generation ids restart
// at 1 below the stored ones): writes are fenced until the fencing base is
// raised, then accepted.
func TestResetFencing(t *testing.T) {
	rs := redistest.Start(t)
	st, err := state.New(rs.Client(), state.Options{})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	cfg := Config{}
	cfg.Kafka.Group = "zoo"
	svc, err := New(cfg, Deps{Store: st, Logger: testLogger(t)})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := unitGen(svc, 40).flush(ctx, clickBatch(t, 0, 3)); err != nil {
		t.Fatal(err)
	}
	// The recreated group's first generation.
	base, err := svc.fencingBase(ctx, svc.config(), 1)
	if err != nil || base != 0 {
		t.Fatalf("base %d %v, want 0", base, err)
	}
	if _, err := unitGen(svc, base+1).flush(ctx, clickBatch(t, 4, 5)); !errors.Is(err, errFenced) {
		t.Fatalf("recreated group's write: %v, want fenced", err)
	}
	cfg.Pipeline.ResetFencing = true
	svc2, err := New(cfg, Deps{Store: st, Logger: testLogger(t)})
	if err != nil {
		t.Fatal(err)
	}
	base, err = svc2.fencingBase(ctx, svc2.config(), 1)
	if err != nil || base+1 <= 40 {
		t.Fatalf("base after reset %d %v, want above 39", base, err)
	}
	if _, err := unitGen(svc2, base+1).flush(ctx, clickBatch(t, 4, 5)); err != nil {
		t.Fatalf("write after the reset: %v", err)
	}
	// Once per run: the next generation keeps the base.
	if again, err := svc2.fencingBase(ctx, svc2.config(), 2); err != nil || again != base {
		t.Fatalf("second generation base %d %v, want %d", again, err, base)
	}
}
