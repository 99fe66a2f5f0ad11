package state

import (
	"cmp"
	"context"
	"fmt"
	"math/rand/v2"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"ripen/estimator"
	"ripen/state/redistest"
)

// testLayout is small enough that clicks mature within a test scenario.
var testLayout = estimator.Layout{Window: time.Hour, Base: time.Second, AgeError: 0.05, BinsPerDecade: 10}.WithDefaults()

// t0 is the scenario start (Unix ms).
const t0 = int64(1_760_000_000_000)

func testCtx(t testing.TB) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	t.Cleanup(cancel)
	return ctx
}

// newStore starts a server and returns a Store on it.
func newStore(t testing.TB, opts Options) (*Store, *redis.Client, *redistest.Server) {
	t.Helper()
	srv := redistest.Start(t)
	rdb := srv.Client()
	s, err := New(rdb, opts)
	if err != nil {
		t.Fatalf("New: %v", err)
	}
	return s, rdb, srv
}

// bucketAt is the canonical bucket of a click at clickTime for watermark wm,
// found with the estimator's public API only (the way any consumer can).
func bucketAt(l estimator.Layout, wm, clickTime int64) (estimator.BucketKey, bool) {
	s := estimator.NewArmState(l)
	s.Advance(wm)
	s.AddClicks(clickTime, 1)
	snap := s.Snapshot()
	if snap.MaturedClicks == 1 {
		return estimator.BucketKey{}, true
	}
	return snap.Buckets[0].BucketKey, false
}

// delayBinOf is the delay histogram bin of a delay, via the public API.
func delayBinOf(l estimator.Layout, d int64) int {
	s := estimator.NewArmState(l)
	s.AddConversion(0, d)
	for i, n := range s.Snapshot().Delays {
		if n > 0 {
			return i
		}
	}
	panic("no delay bin")
}

// event is one click or conversion read from a partition.
type event struct {
	exp, arm  string
	clickID   string
	clickTS   int64
	convTS    int64 // 0 for a click
	topic     string
	partition int
	offset    int64
}

func (e event) isConv() bool { return e.convTS != 0 }

func (e event) origin() string { return fmt.Sprintf("%s/%d/%d", e.topic, e.partition, e.offset) }

// scenario generates clicks on arms of two experiments over three hours
// (three windows), conversions after exponential delays, on nparts
// partitions of a click and a conversion topic, in event-time order with
// offsets increasing per partition.
func scenario(seed uint64, nclicks, nparts int) []event {
	r := rand.New(rand.NewPCG(seed, seed^0x5eed))
	arms := map[string][]string{"exp-a": {"red", "blue", "green"}, "exp-b": {"x", "y"}}
	rate := map[string]float64{"red": 0.3, "blue": 0.2, "green": 0.4, "x": 0.25, "y": 0.35}
	window := testLayout.Window.Milliseconds()
	span := 3 * window
	var evs []event
	for i := range nclicks {
		exp := "exp-a"
		if i%3 == 2 {
			exp = "exp-b"
		}
		arm := arms[exp][r.IntN(len(arms[exp]))]
		ts := t0 + r.Int64N(span)
		id := fmt.Sprintf("c%05d", i)
		part := r.IntN(nparts)
		evs = append(evs, event{exp: exp, arm: arm, clickID: id, clickTS: ts, topic: "clicks", partition: part})
		if r.Float64() < rate[arm] {
			d := int64(r.ExpFloat64() * float64(10*time.Minute/time.Millisecond))
			if d < window {
				evs = append(evs, event{exp: exp, arm: arm, clickID: id, clickTS: ts, convTS: ts + d + 1, topic: "convs", partition: r.IntN(nparts)})
			}
		}
	}
	slices.SortStableFunc(evs, func(a, b event) int {
		return int(max(a.clickTS, a.convTS) - max(b.clickTS, b.convTS))
	})
	next := map[string]int64{}
	for i := range evs {
		k := fmt.Sprintf("%s/%d", evs[i].topic, evs[i].partition)
		evs[i].offset = next[k]
		next[k]++
	}
	return evs
}

func eventTime(e event) int64 { return max(e.clickTS, e.convTS) }

// batches cuts events into batches of n.
func batches(evs []event, n int) [][]event {
	var out [][]event
	for len(evs) > 0 {
		k := min(n, len(evs))
		out = append(out, evs[:k])
		evs = evs[k:]
	}
	return out
}

// buildDeltas is a minimal consumer: it turns one batch, processed at
// watermark wm, into one delta per experiment.
func buildDeltas(l estimator.Layout, wm int64, gen int32, batch []event) []*ExperimentDelta {
	byExp := map[string]*ExperimentDelta{}
	ranges := map[string]map[TopicPartition]*OffsetRange{}
	var order []string
	for _, e := range batch {
		d := byExp[e.exp]
		if d == nil {
			d = &ExperimentDelta{Experiment: e.exp, Layout: l, Watermark: wm, Generation: gen, Arms: map[string]*ArmDelta{}}
			byExp[e.exp] = d
			ranges[e.exp] = map[TopicPartition]*OffsetRange{}
			order = append(order, e.exp)
		}
		tp := TopicPartition{e.topic, e.partition}
		r := ranges[e.exp][tp]
		if r == nil {
			r = &OffsetRange{Topic: e.topic, Partition: e.partition, From: e.offset, To: e.offset}
			ranges[e.exp][tp] = r
		}
		r.From, r.To = min(r.From, e.offset), max(r.To, e.offset)
		a := d.Arms[e.arm]
		if a == nil {
			a = &ArmDelta{}
			d.Arms[e.arm] = a
		}
		key, matured := bucketAt(l, wm, e.clickTS)
		if !e.isConv() {
			if matured {
				a.MaturedClicks++
				continue
			}
			i := slices.IndexFunc(a.Clicks, func(b estimator.Bucket) bool { return b.BucketKey == key })
			if i < 0 {
				a.Clicks = append(a.Clicks, estimator.Bucket{BucketKey: key})
				i = len(a.Clicks) - 1
			}
			a.Clicks[i].Clicks++
			continue
		}
		delay := e.convTS - e.clickTS
		a.Conversions = append(a.Conversions, ConversionDelta{
			ClickID: e.clickID, Origin: e.origin(), Bucket: key, Matured: matured,
			DelayBin: delayBinOf(l, delay), DelayMs: delay,
		})
	}
	var out []*ExperimentDelta
	for _, exp := range order {
		d := byExp[exp]
		for _, r := range ranges[exp] {
			d.Ranges = append(d.Ranges, *r)
		}
		slices.SortFunc(d.Ranges, func(a, b OffsetRange) int {
			return cmp.Or(cmp.Compare(a.Topic, b.Topic), cmp.Compare(a.Partition, b.Partition))
		})
		out = append(out, d)
	}
	return out
}

// reference builds the expected arm states directly with the estimator:
// per batch, advance the experiments it touches to its watermark (the
// watermark their deltas carry), then add its events.
func reference(l estimator.Layout, steps []step) map[string]map[string]*estimator.ArmState {
	ref := map[string]map[string]*estimator.ArmState{}
	final := map[string]int64{}
	for _, st := range steps {
		touched := map[string]bool{}
		for _, e := range st.events {
			touched[e.exp] = true
			if ref[e.exp] == nil {
				ref[e.exp] = map[string]*estimator.ArmState{}
			}
			if ref[e.exp][e.arm] == nil {
				ref[e.exp][e.arm] = estimator.NewArmState(l)
			}
		}
		for exp := range touched {
			for _, s := range ref[exp] {
				s.Advance(st.wm)
			}
			if f, ok := final[exp]; !ok || st.wm > f {
				final[exp] = st.wm
			}
		}
		for _, e := range st.events {
			s := ref[e.exp][e.arm]
			if e.isConv() {
				s.AddConversion(e.clickTS, e.convTS)
			} else {
				s.AddClicks(e.clickTS, 1)
			}
		}
	}
	for exp, arms := range ref {
		for _, s := range arms {
			s.Advance(final[exp])
		}
	}
	return ref
}

// step is one batch and the watermark it was processed at.
type step struct {
	wm     int64
	events []event
}

// singleInstance processes all events in batches of n with one consumer
// whose watermark is the latest event time it has seen.
func singleInstance(evs []event, n int) []step {
	var steps []step
	wm := int64(-1 << 62)
	for _, b := range batches(evs, n) {
		for _, e := range b {
			wm = max(wm, eventTime(e))
		}
		steps = append(steps, step{wm: wm, events: b})
	}
	return steps
}

// applySteps applies every step's deltas and fails on any error.
func applySteps(t testing.TB, ctx context.Context, s *Store, steps []step, gen int32) {
	t.Helper()
	for i, st := range steps {
		for _, d := range buildDeltas(testLayout, st.wm, gen, st.events) {
			res, err := s.Apply(ctx, d)
			if err != nil {
				t.Fatalf("step %d: apply %s: %v", i, d.Experiment, err)
			}
			if res.Skipped || len(res.Duplicates) > 0 {
				t.Fatalf("step %d: apply %s: unexpected result %+v", i, d.Experiment, res)
			}
		}
	}
}

// assertMatches loads every experiment and compares each arm's snapshot
// with the reference.
func assertMatches(t testing.TB, ctx context.Context, s *Store, ref map[string]map[string]*estimator.ArmState) {
	t.Helper()
	for exp, arms := range ref {
		got, err := s.Load(ctx, exp)
		if err != nil {
			t.Fatalf("load %s: %v", exp, err)
		}
		if len(got.Held) != 0 {
			t.Errorf("%s: held conversions %v after all deltas", exp, got.Held)
		}
		var names []string
		for a := range arms {
			names = append(names, a)
		}
		slices.Sort(names)
		if !reflect.DeepEqual(got.Arms, names) {
			t.Fatalf("%s: arms %v, want %v", exp, got.Arms, names)
		}
		for _, a := range names {
			want := arms[a].Snapshot()
			have := got.States[a].Snapshot()
			if !reflect.DeepEqual(have, want) {
				t.Errorf("%s/%s: loaded state differs from the estimator's:\n got  %+v\n want %+v", exp, a, summary(have), summary(want))
			}
		}
	}
}

// summary is a short form of a snapshot for failure messages.
func summary(s estimator.ArmSnapshot) string {
	var c, v uint64
	for _, b := range s.Buckets {
		c += b.Clicks
		v += b.Converted
	}
	return fmt.Sprintf("wm=%d buckets=%d pending=%d/%d matured=%d/%d delays=%d sum=%d",
		s.Watermark, len(s.Buckets), v, c, s.MaturedConversions, s.MaturedClicks, s.DelayCount, s.DelaySumMs)
}
