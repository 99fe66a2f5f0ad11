package consumer

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"maps"
	"math/rand/v2"
	"reflect"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"ripen/estimator"
	"ripen/state"
)

// This file holds the large end-to-end check and helpers shared by the
// other acceptance tests of the streaming pipeline.

// produceTo writes msgs to one partition of topic, in order.
func (e *testEnv) produceTo(t *testing.T, topic string, partition int, msgs []kafka.Message) {
	t.Helper()
	w := &kafka.Writer{
		Addr: kafka.TCP(e.brokers...), Topic: topic,
		Balancer:     kafka.BalancerFunc(func(kafka.Message, ...int) int { return partition }),
		RequiredAcks: kafka.RequireAll, BatchTimeout: 5 * time.Millisecond, BatchSize: 500,
	}
	defer w.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	for i := 0; i < len(msgs); i += 500 {
		if err := w.WriteMessages(ctx, msgs[i:min(i+500, len(msgs))]...); err != nil {
			t.Fatalf("produce to %s/%d: %v", topic, partition, err)
		}
	}
}

// jsonMessage encodes v as a message value with the given key.
func jsonMessage(key string, v any) kafka.Message {
	b, err := json.Marshal(v)
	if err != nil {
		panic(err)
	}
	return kafka.Message{Key: []byte(key), Value: b}
}

// refitRecorder is a RefitFunc that evaluates with
// estimator.EvaluateExperiment and keeps every input and report, so a test
// can re-evaluate a published allocation from independently built states.
type refitRecorder struct {
	mu   sync.Mutex
	runs map[string][]recordedRefit
}

type recordedRefit struct {
	in  estimator.ExperimentInput
	rep estimator.ExperimentReport
}

func newRefitRecorder() *refitRecorder {
	return &refitRecorder{runs: map[string][]recordedRefit{}}
}

func (r *refitRecorder) refit(in estimator.ExperimentInput) (estimator.ExperimentReport, error) {
	rep, err := estimator.EvaluateExperiment(in)
	if err == nil {
		r.mu.Lock()
		r.runs[in.Experiment] = append(r.runs[in.Experiment], recordedRefit{in: in, rep: rep})
		r.mu.Unlock()
	}
	return rep, err
}

// count returns the number of successful refits recorded.
func (r *refitRecorder) count() int {
	r.mu.Lock()
	defer r.mu.Unlock()
	n := 0
	for _, runs := range r.runs {
		n += len(runs)
	}
	return n
}

// find returns the last recorded refit of experiment whose report has the
// given as-of text.
func (r *refitRecorder) find(experiment, asOf string) (recordedRefit, bool) {
	r.mu.Lock()
	defer r.mu.Unlock()
	runs := r.runs[experiment]
	for i := len(runs) - 1; i >= 0; i-- {
		if runs[i].rep.AsOf == asOf {
			return runs[i], true
		}
	}
	return recordedRefit{}, false
}

// lastAllocations returns, per experiment, the allocation message with the
// highest seq on the allocation topic, decoded and raw.
func lastAllocations(t *testing.T, msgs []kafka.Message) (map[string]Allocation, map[string][]byte) {
	t.Helper()
	dec := map[string]Allocation{}
	raw := map[string][]byte{}
	for _, m := range msgs {
		var a Allocation
		if err := json.Unmarshal(m.Value, &a); err != nil {
			t.Fatalf("allocation %s: %v", m.Value, err)
		}
		if prev, ok := dec[a.Experiment]; !ok || a.Seq > prev.Seq {
			dec[a.Experiment] = a
			raw[a.Experiment] = m.Value
		}
	}
	return dec, raw
}

// largeStream is the production plan of TestEndToEndLarge: steps produced
// one after the other, each waited for when wait is set.
type largeStream struct {
	steps []produceStep
	// clicks and convs are every click and conversion in production order
	// (per partition order agrees with it), for BuildOffline.
	clicks, convs []kafka.Message
	// early counts conversions produced, and consumed, before their click;
	// dups counts second conversions of a click; conversions counts the
	// first ones.
	early, dups, conversions int
	// last is the latest event time before the clock step; clock is the
	// event time of the clock step, which is also the stream's as-of.
	last, clock int64
}

// produceStep is one batch of production: clicks and conversions by
// partition (-1: by key hash).
type produceStep struct {
	clicks, convs map[int][]kafka.Message
	wait          bool
}

// genLargeStream builds n clicks of two invented experiments (a tea shop's
// hero image and a ski rental's booking form) in chunks; conversions are
// delayed exponentially (mean 20 minutes, all within the window), a 5%
// share of them is sent twice (half as a producer retry of the same bytes,
// half as a second, later conversion of the same click), 20% carry their
// attribution, and in every chunk about 3% of the conversions are produced
// and consumed before their click is produced. A last step puts one event
// on every partition of both topics at clock, two refit periods after the
// last event, so that a refit sees every other event.
func genLargeStream(seed uint64, n, chunks int, partitions int, refitEvery time.Duration) largeStream {
	return genChunkedStream(streamSpec{
		seed: seed, seedKey: 0x1a76e, idPrefix: "t", waitEarly: true,
		exps: []streamExperiment{
			{"tea-hero", []string{"oolong", "sencha", "rooibos"}, []float64{0.08, 0.11, 0.09}},
			{"ski-booking", []string{"one-page", "wizard"}, []float64{0.15, 0.12}},
		},
		n: n, chunks: chunks, partitions: partitions, refitEvery: refitEvery,
	})
}

// streamExperiment is one experiment of a generated stream with the true
// eventual conversion rate of each arm.
type streamExperiment struct {
	id   string
	arms []string
	cvr  []float64
}

// streamSpec describes a generated stream (see genLargeStream).
type streamSpec struct {
	seed, seedKey uint64
	idPrefix      string
	exps          []streamExperiment
	n, chunks     int
	partitions    int
	refitEvery    time.Duration
	// waitEarly makes each chunk's early conversions a step that waits
	// until they are consumed before the clicks are produced.
	waitEarly bool
}

// genChunkedStream builds the stream described by sp: clicks in chunks, each
// chunk's early conversions first, then its clicks and the rest of its
// conversions, and the clock step last.
func genChunkedStream(sp streamSpec) largeStream {
	r := rand.New(rand.NewPCG(sp.seed, sp.seedKey))
	exps, n, chunks, partitions, refitEvery := sp.exps, sp.n, sp.chunks, sp.partitions, sp.refitEvery
	meanDelay := float64((20 * time.Minute).Milliseconds())
	windowMs := testWindow.Milliseconds()
	var ls largeStream
	per := (n + chunks - 1) / chunks
	for c := range chunks {
		var clicks, early, convs []kafka.Message
		for i := c * per; i < min(n, (c+1)*per); i++ {
			e := exps[r.IntN(len(exps))]
			a := r.IntN(len(e.arms))
			ts := streamT0 + int64(i)*2000 + r.Int64N(2000)
			id := fmt.Sprintf("%s%06d", sp.idPrefix, i)
			clicks = append(clicks, jsonMessage(id, Click{ClickID: id, Experiment: e.id, Arm: e.arms[a], TS: ts}))
			ls.last = max(ls.last, ts)
			if r.Float64() >= e.cvr[a] {
				continue
			}
			d := min(int64(r.ExpFloat64()*meanDelay), windowMs-60_000)
			conv := Conversion{ClickID: id, TS: ts + d}
			if r.Float64() < 0.2 {
				conv.Experiment, conv.Arm, conv.ClickTS = e.id, e.arms[a], ts
			}
			m := jsonMessage(id, conv)
			ls.conversions++
			if r.Float64() < 0.03 {
				early = append(early, m)
				ls.early++
			} else {
				convs = append(convs, m)
			}
			ls.last = max(ls.last, conv.TS)
			if r.Float64() < 0.05 {
				ls.dups++
				if r.IntN(2) == 0 {
					convs = append(convs, m) // the producer retried
				} else {
					later := Conversion{ClickID: id, TS: conv.TS + 1 + r.Int64N(windowMs-d-1)}
					convs = append(convs, jsonMessage(id, later))
				}
			}
		}
		// Several producers: conversions a little out of order.
		for i := range convs {
			j := min(len(convs)-1, i+r.IntN(20))
			convs[i], convs[j] = convs[j], convs[i]
		}
		ls.steps = append(ls.steps,
			produceStep{convs: map[int][]kafka.Message{-1: early}, wait: sp.waitEarly},
			produceStep{clicks: map[int][]kafka.Message{-1: clicks}, convs: map[int][]kafka.Message{-1: convs}},
		)
		ls.clicks = append(ls.clicks, clicks...)
		ls.convs = append(ls.convs, early...)
		ls.convs = append(ls.convs, convs...)
	}
	// The clock step: on every click partition a click of every
	// experiment, on every conversion partition a conversion of an unknown
	// click (it waits, and never expires before the test ends).
	ls.clock = ls.last + 2*refitEvery.Milliseconds() + 10*time.Minute.Milliseconds()
	clock := produceStep{clicks: map[int][]kafka.Message{}, convs: map[int][]kafka.Message{}, wait: true}
	for p := range partitions {
		for _, e := range exps {
			id := fmt.Sprintf("clock-%s-p%d", e.id, p)
			m := jsonMessage(id, Click{ClickID: id, Experiment: e.id, Arm: e.arms[0], TS: ls.clock})
			clock.clicks[p] = append(clock.clicks[p], m)
			ls.clicks = append(ls.clicks, m)
		}
		id := fmt.Sprintf("clock-unknown-p%d", p)
		m := jsonMessage(id, Conversion{ClickID: id, TS: ls.clock})
		clock.convs[p] = append(clock.convs[p], m)
		ls.convs = append(ls.convs, m)
	}
	ls.steps = append(ls.steps, clock)
	return ls
}

// run produces every step, waiting for the consumer after the steps that
// ask for it.
func (ls largeStream) run(t *testing.T, env *testEnv, cfg Config) {
	t.Helper()
	for _, st := range ls.steps {
		for _, p := range slices.Sorted(maps.Keys(st.convs)) {
			produceMaybePartition(t, env, cfg.Kafka.ConversionTopic, p, st.convs[p])
		}
		for _, p := range slices.Sorted(maps.Keys(st.clicks)) {
			produceMaybePartition(t, env, cfg.Kafka.ClickTopic, p, st.clicks[p])
		}
		if st.wait {
			env.waitConsumed(t, cfg, 90*time.Second)
		}
	}
	env.waitConsumed(t, cfg, 90*time.Second)
}

func produceMaybePartition(t *testing.T, env *testEnv, topic string, p int, msgs []kafka.Message) {
	t.Helper()
	if len(msgs) == 0 {
		return
	}
	if p < 0 {
		env.produce(t, topic, msgs)
		return
	}
	env.produceTo(t, topic, p, msgs)
}

// offlineAt builds the offline states of the stream's events as of asOf.
func offlineAt(t *testing.T, clicks, convs []kafka.Message, asOf int64) *OfflineResult {
	t.Helper()
	off, err := BuildOffline(context.Background(), bytes.NewReader(jsonLines(clicks)), bytes.NewReader(jsonLines(convs)),
		OfflineOptions{AsOf: asOf, Layout: estimator.Layout{Window: testWindow}})
	if err != nil {
		t.Fatal(err)
	}
	return off
}

// TestEndToEndLarge streams 100,000 clicks (20,000 with -short) with
// delayed conversions, conversions that arrive before their clicks and
// duplicate conversions, and checks that
//   - the final Redis state equals what BuildOffline builds from the same
//     events, arm by arm, at the stream's as-of time;
//   - exactly the duplicate conversions are dead-lettered;
//   - the last allocation published for each experiment equals, byte for
//     byte, what EvaluateExperiment returns for BuildOffline's states at
//     that allocation's as-of time, given the same options, previous
//     weights and warm starts the service used (the seed is derived from
//     the experiment and the as-of time, so it is the same too).
func TestEndToEndLarge(t *testing.T) {
	n := 100_000
	if testing.Short() {
		n = 20_000
	}
	const partitions = 3
	env := newTestEnv(t, partitions)
	cfg := env.config("e2e-large")
	cfg.Pipeline.FlushEvents = 5000
	cfg.Pipeline.RefitEvery = 4 * time.Hour
	cfg.Pipeline.PublishEvery = 4 * time.Hour
	cfg.Pipeline.OrphanTTL = 12 * time.Hour // longer than any chunk's span
	ls := genLargeStream(11, n, 10, partitions, cfg.Pipeline.RefitEvery)
	if ls.early == 0 || ls.dups == 0 {
		t.Fatalf("generated stream lacks early (%d) or duplicate (%d) conversions", ls.early, ls.dups)
	}
	if share := float64(ls.dups) / float64(ls.conversions); share < 0.04 || share > 0.06 {
		t.Fatalf("duplicate share %.3f, want about 0.05", share)
	}

	rec := newRefitRecorder()
	svc, stop := env.start(t, cfg, testLogger(t), testHooks{}, rec.refit)
	ls.run(t, env, cfg)
	if err := stop(); err != nil {
		t.Fatalf("run: %v", err)
	}

	// Final state against the offline join at the stream's as-of time.
	s := stream{clicks: ls.clicks[:len(ls.clicks)-1], convs: ls.convs, sentinel: ls.clicks[len(ls.clicks)-1], asOf: ls.clock}
	off := checkAgainstOffline(t, env.store, s)
	if t.Failed() {
		explainCountedConversions(t, env, ls.convs, cfg.Kafka.ConversionTopic)
	}
	if off.Clicks != n+2*partitions {
		t.Errorf("offline counted %d clicks, want %d", off.Clicks, n+2*partitions)
	}

	// Dead letters: exactly the duplicates (the clock step's unknown
	// conversions are still waiting for their clicks).
	got := deadLetterReasons(t, env.readAll(t, cfg.Kafka.DeadLetterTopic))
	if want := map[Reason]int{ReasonDuplicateConversion: ls.dups}; !reflect.DeepEqual(got, want) {
		t.Errorf("dead letters by reason %v, want %v", got, want)
	}

	// The last allocation of each experiment, re-evaluated offline.
	allocs, raw := lastAllocations(t, env.readAll(t, cfg.Kafka.AllocationTopic))
	if len(allocs) != 2 {
		t.Fatalf("allocations published for %d experiments, want 2", len(allocs))
	}
	for _, id := range slices.Sorted(maps.Keys(allocs)) {
		a := allocs[id]
		asOf, err := time.Parse(time.RFC3339Nano, a.AsOf)
		if err != nil {
			t.Fatalf("%s: as_of %q: %v", id, a.AsOf, err)
		}
		if asOf.UnixMilli() <= ls.last {
			t.Errorf("%s: last allocation as of %s is not after the last event (%s)", id, a.AsOf, time.UnixMilli(ls.last).UTC().Format(time.RFC3339))
		}
		r, ok := rec.find(id, a.AsOf)
		if !ok {
			t.Fatalf("%s: no recorded refit as of %s", id, a.AsOf)
		}
		offAt := offlineAt(t, ls.clicks, ls.convs, asOf.UnixMilli())
		in := r.in
		in.Arms = slices.Clone(in.Arms)
		for i, arm := range in.Arms {
			st := offAt.Arm(id, arm.Arm)
			if st == nil {
				t.Fatalf("%s/%s: no offline state as of %s", id, arm.Arm, a.AsOf)
			}
			if g, w := arm.State.Snapshot(), st.Snapshot(); !reflect.DeepEqual(g, w) {
				t.Errorf("%s/%s: state the service refitted as of %s differs from offline: clicks %d conv %d, offline clicks %d conv %d",
					id, arm.Arm, a.AsOf, arm.State.Clicks(), arm.State.Conversions(), st.Clicks(), st.Conversions())
			}
			in.Arms[i].State = st.Clone()
		}
		rep, err := estimator.EvaluateExperiment(in)
		if err != nil {
			t.Fatalf("%s: offline evaluation: %v", id, err)
		}
		body, err := json.Marshal(rep)
		if err != nil {
			t.Fatal(err)
		}
		want, err := withSeq(body, a.Seq)
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(raw[id], want) {
			t.Errorf("%s: last published allocation differs from the offline evaluation as of %s:\n got %s\nwant %s", id, a.AsOf, raw[id], want)
		}
		if served, ok, err := svc.LatestAllocation(context.Background(), id); err != nil || !ok || !bytes.Equal(served, raw[id]) {
			t.Errorf("%s: served allocation %s (%v, %v), want the last published", id, served, ok, err)
		}
	}
}

// explainCountedConversions logs, for a failed comparison with the offline
// join, the clicks whose counted conversion (the origin its conversion
// marker holds) is not the first of the click's conversions in production
// order, which is the one BuildOffline counts.
func explainCountedConversions(t *testing.T, env *testEnv, produced []kafka.Message, topic string) {
	t.Helper()
	ctx := context.Background()
	first := map[string]int64{}
	for _, m := range produced {
		if v, err := DecodeConversion(m.Value); err == nil {
			if _, ok := first[v.ClickID]; !ok {
				first[v.ClickID] = v.TS
			}
		}
	}
	byOrigin := map[string]Conversion{}
	for _, m := range env.readAll(t, topic) {
		if v, err := DecodeConversion(m.Value); err == nil {
			byOrigin[origin(state.TopicPartition{Topic: m.Topic, Partition: m.Partition}, m.Offset)] = v
		}
	}
	keys, err := env.redis.Client().Keys(ctx, "*:cv:*").Result()
	if err != nil {
		t.Logf("conversion markers: %v", err)
		return
	}
	differ := 0
	for _, k := range keys {
		org, err := env.redis.Client().Get(ctx, k).Result()
		v, ok := byOrigin[org]
		if err != nil || !ok {
			continue
		}
		if want := first[v.ClickID]; v.TS != want {
			differ++
			t.Logf("click %s: counted the conversion at %d (%s), the first produced is at %d", v.ClickID, v.TS, org, want)
		}
	}
	t.Logf("%d of %d counted conversions are not their click's first", differ, len(keys))
}

// storeResumeTotal sums the resume offsets of every partition of topics.
func storeResumeTotal(t *testing.T, st *state.Store, topics map[string]int) int64 {
	t.Helper()
	var sum int64
	for topic, n := range topics {
		for p := range n {
			off, err := st.Resume(context.Background(), topic, p)
			if err == nil {
				sum += off
			}
		}
	}
	return sum
}

// startDeps is testEnv.start with every dependency given (the store
// defaults to the environment's).
func (e *testEnv) startDeps(t *testing.T, cfg Config, deps Deps) (*Service, func() error) {
	t.Helper()
	if deps.Store == nil {
		deps.Store = e.store
	}
	svc, err := New(cfg, deps)
	if err != nil {
		t.Fatal(err)
	}
	return svc, runService(t, svc, cfg)
}
