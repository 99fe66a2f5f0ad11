package consumer

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math/rand/v2"
	"reflect"
	"slices"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"ripen/consumer/kafkatest"
	"ripen/estimator"
	"ripen/state"
	"ripen/state/redistest"
)

// newTestEnvTopics is newTestEnv with extra topics seeded in the broker.
func newTestEnvTopics(t *testing.T, partitions int, extra ...string) *testEnv {
	t.Helper()
	rs := redistest.Start(t)
	st, err := state.New(rs.Client(), state.Options{})
	if err != nil {
		t.Fatal(err)
	}
	topics := append(slices.Clone(kafkatest.DefaultTopics), extra...)
	return &testEnv{brokers: kafkatest.Start(t, partitions, topics...), redis: rs, store: st}
}

// withPrefix returns a copy of e whose store uses another key prefix on
// the same Redis.
func (e *testEnv) withPrefix(t *testing.T, prefix string) *testEnv {
	t.Helper()
	st, err := state.New(e.redis.Client(), state.Options{Prefix: prefix})
	if err != nil {
		t.Fatal(err)
	}
	c := *e
	c.store = st
	return &c
}

// withDuplicateClicks adds, a few messages after about one click in 25, a
// second click with the same click_id: half exact copies of the message
// (a producer retry), half with another time (a reused id). Keys are the
// click ids, so a duplicate lands in its original's partition after it.
func withDuplicateClicks(s stream, seed uint64) (stream, int) {
	r := rand.New(rand.NewPCG(seed, 0xd00b))
	var out []kafka.Message
	var later []kafka.Message
	n := 0
	for _, m := range s.clicks {
		out = append(out, m)
		if len(later) > 0 && r.IntN(3) == 0 {
			out = append(out, later[0])
			later = later[1:]
		}
		c, err := DecodeClick(m.Value)
		if err != nil || r.IntN(25) != 0 {
			continue
		}
		dup := m
		if r.IntN(2) == 0 {
			c.TS += 1500
			b, _ := json.Marshal(c)
			dup = kafka.Message{Key: m.Key, Value: b}
		}
		later = append(later, dup)
		n++
	}
	s.clicks = append(out, later...)
	return s, n
}

// publication of an allocation message, as compared across runs.
type pubRecord struct {
	Seq     int64
	AsOf    string
	Weights map[string]float64
}

// allocationSequences reads topic and returns, per experiment, the
// publications in seq order, deduplicated by seq (a message written twice
// after a crash counts once); it fails on a gap or a seq with two bodies.
func allocationSequences(t *testing.T, env *testEnv, topic string) map[string][]pubRecord {
	t.Helper()
	bySeq := map[string]map[int64]pubRecord{}
	for _, m := range env.readAll(t, topic) {
		var a Allocation
		if err := json.Unmarshal(m.Value, &a); err != nil {
			t.Fatalf("allocation %s: %v", m.Value, err)
		}
		p := pubRecord{Seq: a.Seq, AsOf: a.AsOf, Weights: a.Weights}
		if bySeq[a.Experiment] == nil {
			bySeq[a.Experiment] = map[int64]pubRecord{}
		}
		if prev, ok := bySeq[a.Experiment][a.Seq]; ok && !reflect.DeepEqual(prev, p) {
			t.Fatalf("%s seq %d published twice with different bodies: %+v, %+v", a.Experiment, a.Seq, prev, p)
		}
		bySeq[a.Experiment][a.Seq] = p
	}
	out := map[string][]pubRecord{}
	for id, m := range bySeq {
		for seq := int64(1); seq <= int64(len(m)); seq++ {
			p, ok := m[seq]
			if !ok {
				t.Fatalf("%s: seq %d missing from %d publications", id, seq, len(m))
			}
			out[id] = append(out[id], p)
		}
	}
	return out
}

// normalizedDigest is the digest of the store's logical state with the
// consumption bookkeeping left out (applied offsets and their generations,
// resume offsets: they record who consumed what in which batches) and
// every experiment advanced to asOf (its stored watermark is the largest
// one its deltas were keyed at, which depends on batching; canonical
// placement at one watermark does not).
func normalizedDigest(t *testing.T, st *state.Store, asOf int64) string {
	t.Helper()
	snap, err := st.ExportExperiments(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	snap.Resume = nil
	for i := range snap.Experiments {
		e := &snap.Experiments[i]
		e.Offsets = nil
		if e.Layout == nil {
			continue
		}
		for j := range e.Arms {
			a := &e.Arms[j]
			if len(a.Held) > 0 || a.HeldMatured > 0 {
				t.Fatalf("%s/%s: conversions still held at the end: %+v", e.ID, a.Arm, a.Held)
			}
			as, err := estimator.FromSnapshot(a.State)
			if err != nil {
				t.Fatal(err)
			}
			as.Advance(asOf)
			a.State = as.Snapshot()
		}
		e.Watermark = asOf
	}
	return state.Digest(snap)
}

// consumedFraction returns the share of the input messages whose offsets
// are covered by resume offsets.
func consumedFraction(t *testing.T, env *testEnv, cfg Config) float64 {
	t.Helper()
	var done, total int64
	for _, topic := range []string{cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic} {
		for p, end := range env.endOffsets(t, topic) {
			total += end
			if got, err := env.store.Resume(context.Background(), topic, p); err == nil {
				done += got
			}
		}
	}
	if total == 0 {
		return 1
	}
	return float64(done) / float64(total)
}

// waitFraction waits until at least frac of the input was consumed.
func waitFraction(t *testing.T, env *testEnv, cfg Config, frac float64) {
	t.Helper()
	deadline := time.Now().Add(60 * time.Second)
	for consumedFraction(t, env, cfg) < frac {
		if time.Now().After(deadline) {
			t.Fatalf("less than %.0f%% consumed within 60s", 100*frac)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// TestReplayDeterministic consumes the same topics twice, into two
// prefixes and consumer groups: once with one instance, once with two
// instances and rebalances mid-stream (the second joins, then the first
// leaves). Both runs must end in the same state and publish the same
// sequence of weights, as the hold-back of events after the next refit
// tick and the single refit owner per experiment promise. The stream
// repeats some click ids; both runs must also equal the offline join and
// its rejections.
func TestReplayDeterministic(t *testing.T) {
	env := newTestEnvTopics(t, 3, "alloc-solo", "alloc-pair", "dl-solo", "dl-pair")
	s, dups := withDuplicateClicks(genStream(7, 1000, time.Hour), 7)
	if dups < 20 {
		t.Fatalf("only %d duplicate clicks generated", dups)
	}
	cfgFor := func(name string) Config {
		cfg := env.config(name)
		cfg.Kafka.AllocationTopic = "alloc-" + name
		cfg.Kafka.DeadLetterTopic = "dl-" + name
		cfg.Pipeline.FlushEvents = 150
		cfg.Pipeline.RefitEvery = 10 * time.Minute
		cfg.Pipeline.PublishEvery = 10 * time.Minute
		// Small, so that readers pause while their partitions wait for
		// the refit barrier (the cap itself must never be exceeded).
		cfg.Pipeline.HoldbackCap = 1000
		return cfg
	}
	solo, pair := cfgFor("solo"), cfgFor("pair")
	// Everything, the sentinel too, is in the topics before either run:
	// the group watermark is the minimum over every partition, so the
	// sentinel cannot hurry it.
	env.produce(t, solo.Kafka.ClickTopic, append(slices.Clone(s.clicks), s.sentinel))
	env.produce(t, solo.Kafka.ConversionTopic, s.convs)

	soloEnv := env.withPrefix(t, "solo")
	svcSolo, stop := soloEnv.start(t, solo, testLogger(t), testHooks{}, nil)
	soloEnv.waitConsumed(t, solo, 60*time.Second)
	if err := stop(); err != nil {
		t.Fatalf("solo run: %v", err)
	}

	pairEnv := env.withPrefix(t, "pair")
	// Slow the first instance a little so that the rebalances land
	// mid-stream.
	slow := testHooks{beforeStep: func() { time.Sleep(5 * time.Millisecond) }}
	svcA, stopA := pairEnv.start(t, pair, testLogger(t), slow, nil)
	waitFraction(t, pairEnv, pair, 0.2)
	b, stopB := pairEnv.start(t, pair, testLogger(t), testHooks{}, nil)
	waitReady(t, b)
	waitFraction(t, pairEnv, pair, 0.5)
	if f := consumedFraction(t, pairEnv, pair); f > 0.95 {
		t.Logf("the stream was %.0f%% consumed before the first instance left", 100*f)
	}
	if err := stopA(); err != nil {
		t.Fatalf("instance A: %v", err)
	}
	pairEnv.waitConsumed(t, pair, 60*time.Second)
	if err := stopB(); err != nil {
		t.Fatalf("instance B: %v", err)
	}

	// Both equal the offline join, repeated click ids included: each
	// repeat is dead-lettered once as duplicate_click and the first click
	// is the one counted, as BuildOffline does.
	off := checkAgainstOffline(t, soloEnv.store, s)
	checkAgainstOffline(t, pairEnv.store, s)
	for i, svc := range []*Service{svcSolo, svcA, b} {
		svc.mu.Lock()
		n := svc.overflows
		svc.mu.Unlock()
		if n != 0 {
			t.Errorf("service %d exceeded the hold-back cap %d times", i, n)
		}
	}
	want := offlineReasons(off)
	if want[ReasonDuplicateClick] != dups {
		t.Fatalf("offline rejected %d duplicate clicks, generated %d", want[ReasonDuplicateClick], dups)
	}
	checkReasons(t, deadLetterReasons(t, env.readAll(t, solo.Kafka.DeadLetterTopic)), want)
	checkReasons(t, deadLetterReasons(t, env.readAll(t, pair.Kafka.DeadLetterTopic)), want)
	if a, b := normalizedDigest(t, soloEnv.store, s.asOf), normalizedDigest(t, pairEnv.store, s.asOf); a != b {
		t.Errorf("state digests differ: one instance %s, two instances %s", a, b)
	}
	sa, sb := allocationSequences(t, env, solo.Kafka.AllocationTopic), allocationSequences(t, env, pair.Kafka.AllocationTopic)
	if len(sa) != 2 {
		t.Fatalf("one instance published for %d experiments, want 2", len(sa))
	}
	for id, seq := range sa {
		if len(seq) < 5 {
			t.Errorf("%s: only %d publications; the comparison would be weak", id, len(seq))
		}
		if !reflect.DeepEqual(seq, sb[id]) {
			t.Errorf("%s: publications differ:\n one instance  %+v\n two instances %+v", id, seq, sb[id])
		}
	}
	for id := range sb {
		if _, ok := sa[id]; !ok {
			t.Errorf("two instances published %s, one instance did not", id)
		}
	}
}

// TestSweepCrashBetweenPhases stops the service abruptly between the
// phases of its first orphan sweep that found due orphans (after marking,
// and after applying but before deleting them), restarts it, and checks
// that the final state equals the offline join and that every expired
// orphan was dead-lettered (a crash may write a dead letter twice).
func TestSweepCrashBetweenPhases(t *testing.T) {
	for _, phase := range []string{"after mark", "before settle"} {
		t.Run(phase, func(t *testing.T) {
			env := newTestEnv(t, 3)
			s := genStream(9, 1000, time.Hour)
			cfg := env.config("sweepcrash")
			env.produce(t, cfg.Kafka.ClickTopic, append(slices.Clone(s.clicks), s.sentinel))
			env.produce(t, cfg.Kafka.ConversionTopic, s.convs)

			var once sync.Once
			crashed := make(chan struct{})
			crash := func() error {
				err := error(nil)
				once.Do(func() { close(crashed); err = errCrash })
				return err
			}
			hooks := testHooks{afterSweepMark: crash}
			if phase == "before settle" {
				hooks = testHooks{beforeSweepSettle: crash}
			}
			_, stop := env.start(t, cfg, testLogger(t), hooks, nil)
			select {
			case <-crashed:
			case <-time.After(60 * time.Second):
				t.Fatal("no sweep with due orphans")
			}
			if err := stop(); !errors.Is(err, errCrash) {
				t.Fatalf("crashed run returned %v, want the crash", err)
			}
			_, stop = env.start(t, cfg, testLogger(t), testHooks{}, nil)
			env.waitConsumed(t, cfg, 60*time.Second)
			waitNoDue(t, env, cfg)
			if err := stop(); err != nil {
				t.Fatal(err)
			}
			off := checkAgainstOffline(t, env.store, s)
			origins := map[Reason]map[string]bool{}
			for _, m := range env.readAll(t, cfg.Kafka.DeadLetterTopic) {
				var d DeadLetter
				if err := json.Unmarshal(m.Value, &d); err != nil {
					t.Fatal(err)
				}
				if origins[d.Reason] == nil {
					origins[d.Reason] = map[string]bool{}
				}
				origins[d.Reason][d.origin()] = true
			}
			if got, want := len(origins[ReasonOrphanExpired]), offlineReasons(off)[ReasonOrphanExpired]; got != want {
				t.Errorf("orphan_expired dead letters for %d conversions, offline %d", got, want)
			}
		})
	}
}

// waitNoDue waits until no parked conversion is left in any due set.
func waitNoDue(t *testing.T, env *testEnv, cfg Config) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		n := int64(0)
		for p := range 3 {
			c, err := env.redis.Client().ZCard(context.Background(), fmt.Sprintf("%s:{o:%s/%d}:due", env.store.Options().Prefix, cfg.Kafka.ConversionTopic, p)).Result()
			if err != nil {
				t.Fatal(err)
			}
			n += c
		}
		if n == 0 {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("%d orphans still due", n)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// TestLaggingInstanceHoldsWatermark runs two instances, one of them slow,
// with an orphan TTL much shorter than the lag between them. Each
// instance's watermark is the minimum over every partition of the group,
// so the fast instance never sweeps a conversion whose click is still
// unread in the slow one's partitions: the final state and the dead
// letters equal the offline join's. Every watermark the fast instance
// computed is also checked against the progress the group recorded.
func TestLaggingInstanceHoldsWatermark(t *testing.T) {
	env := newTestEnv(t, 3)
	orphanTTL := 5 * time.Minute
	s := genStream(10, 1000, orphanTTL)
	cfg := env.config("lag")
	cfg.Pipeline.OrphanTTL = orphanTTL
	env.produce(t, cfg.Kafka.ClickTopic, append(slices.Clone(s.clicks), s.sentinel))
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)

	slowCfg := cfg
	slowCfg.Pipeline.FlushEvents = 20
	slow, stopSlow := env.start(t, slowCfg, testLogger(t), testHooks{beforeStep: func() { time.Sleep(40 * time.Millisecond) }}, nil)
	waitReady(t, slow)
	lateness := cfg.Pipeline.Lateness.Milliseconds()
	var checked, violations atomic.Int64
	var firstViolation atomic.Value
	fast := testHooks{onTimes: func(gt groupTimes) {
		if gt.watermark == noTime {
			return
		}
		prog, err := env.store.Progress(context.Background(), cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic)
		if err != nil {
			return
		}
		// Records only grow, so this later read bounds the watermark the
		// step computed from an earlier one.
		bound, all := int64(forever), true
		for _, parts := range prog {
			for _, r := range parts {
				if r.Seen != noTime && !r.Idle {
					bound, all = min(bound, r.Seen-lateness), false
				}
			}
		}
		if all {
			return
		}
		checked.Add(1)
		if gt.watermark > bound {
			violations.Add(1)
			firstViolation.CompareAndSwap(nil, fmt.Sprintf("watermark %d > group bound %d", gt.watermark, bound))
		}
	}}
	_, stopFast := env.start(t, cfg, testLogger(t), fast, nil)
	env.waitConsumed(t, cfg, 90*time.Second)
	waitNoDue(t, env, cfg)
	if err := stopFast(); err != nil {
		t.Fatal(err)
	}
	if err := stopSlow(); err != nil {
		t.Fatal(err)
	}
	if checked.Load() == 0 {
		t.Fatal("the fast instance never computed a watermark while a partition was active")
	}
	if v := violations.Load(); v > 0 {
		t.Errorf("%d of %d watermarks ran ahead of the group: first %v", v, checked.Load(), firstViolation.Load())
	}
	off := checkAgainstOffline(t, env.store, s)
	checkReasons(t, deadLetterReasons(t, env.readAll(t, cfg.Kafka.DeadLetterTopic)), offlineReasons(off))
}
