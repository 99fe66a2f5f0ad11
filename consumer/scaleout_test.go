package consumer

import (
	"context"
	"encoding/json"
	"maps"
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/redis/go-redis/v9"
	"github.com/segmentio/kafka-go"
	"go.uber.org/zap"

	"ripen/consumer/kafkatest"
	"ripen/state"
	"ripen/state/redistest"
)

// scaleOutExperiments are the invented experiments of the scale-out
// stream: six shops, so that their hash tags spread over the masters.
var scaleOutExperiments = []streamExperiment{
	{"fern-nursery-hero", []string{"fronds", "pots"}, []float64{0.10, 0.13}},
	{"kayak-rental-form", []string{"short", "long", "stepped"}, []float64{0.16, 0.12, 0.14}},
	{"cider-press-price", []string{"per-litre", "per-crate"}, []float64{0.07, 0.09}},
	{"yarn-shop-badge", []string{"none", "bestseller"}, []float64{0.11, 0.12}},
	{"clock-repair-cta", []string{"book-now", "get-quote", "call-us"}, []float64{0.05, 0.08, 0.06}},
	{"map-store-banner", []string{"coastal", "alpine"}, []float64{0.12, 0.10}},
}

// genScaleOutStream builds n clicks of the scale-out experiments in chunks,
// as genLargeStream does for its two: exponential conversion delays (mean
// 20 minutes, all within the window), 20% of conversions carrying their
// attribution, about 3% produced before their click (each chunk's first
// step), about 5% sent twice (a producer retry of the same bytes or a
// second, later conversion of the same click), conversions a little out
// of order, and a last step with one click of every experiment on every
// click partition and one conversion of an unknown click on every
// conversion partition, two refit periods after the rest.
func genScaleOutStream(seed uint64, n, chunks, partitions int, refitEvery time.Duration) largeStream {
	return genChunkedStream(streamSpec{
		seed: seed, seedKey: 0x5ca1e, idPrefix: "s", exps: scaleOutExperiments,
		n: n, chunks: chunks, partitions: partitions, refitEvery: refitEvery,
	})
}

// produceScaleOutStep produces one step: its conversions first, then its
// clicks, each partition's messages in order.
func produceScaleOutStep(t *testing.T, env *testEnv, cfg Config, st produceStep) {
	t.Helper()
	for _, p := range slices.Sorted(maps.Keys(st.convs)) {
		produceMaybePartition(t, env, cfg.Kafka.ConversionTopic, p, st.convs[p])
	}
	for _, p := range slices.Sorted(maps.Keys(st.clicks)) {
		produceMaybePartition(t, env, cfg.Kafka.ClickTopic, p, st.clicks[p])
	}
}

// scaleOutInstance is one running Service with its own metrics.
type scaleOutInstance struct {
	name    string
	svc     *Service
	metrics *Metrics
	stop    func() error
}

// consumed returns the events the instance read from the click and
// conversion topics so far (redeliveries count again).
func (in *scaleOutInstance) consumed(cfg Config) float64 {
	return testutil.ToFloat64(in.metrics.EventsConsumed.WithLabelValues(cfg.Kafka.ClickTopic)) +
		testutil.ToFloat64(in.metrics.EventsConsumed.WithLabelValues(cfg.Kafka.ConversionTopic))
}

// startInstance runs a Service on env's store with its own metrics and the
// given hooks until its stop function is called (or the test ends).
func startInstance(t *testing.T, env *testEnv, cfg Config, name string, hooks testHooks) *scaleOutInstance {
	t.Helper()
	m := NewMetrics(nil)
	log := testLogger(t).With(zap.String("instance", name))
	svc, err := New(cfg, Deps{Store: env.store, Logger: log, Metrics: m})
	if err != nil {
		t.Fatal(err)
	}
	svc.hooks = hooks
	stop := runService(t, svc, cfg)
	return &scaleOutInstance{name: name, svc: svc, metrics: m, stop: stop}
}

// deadLetterOrigins returns the origins (topic/partition/offset) of the
// dead letters by reason; a dead letter written twice counts once.
func deadLetterOrigins(t *testing.T, msgs []kafka.Message) map[Reason]map[string]bool {
	t.Helper()
	out := map[Reason]map[string]bool{}
	for _, m := range msgs {
		var d DeadLetter
		if err := json.Unmarshal(m.Value, &d); err != nil {
			t.Fatalf("dead letter %s: %v", m.Value, err)
		}
		if out[d.Reason] == nil {
			out[d.Reason] = map[string]bool{}
		}
		out[d.Reason][d.origin()] = true
	}
	return out
}

// experimentKeysByNode scans every master of the cluster for the keys of
// each experiment (hash tag {x:<id>} under prefix) and returns, per
// experiment, the nodes holding any of its keys, with a key count.
func experimentKeysByNode(t *testing.T, ctx context.Context, c *redistest.Cluster, prefix string) map[string]map[string]int {
	t.Helper()
	out := map[string]map[string]int{}
	tag := prefix + ":{x:"
	for _, addr := range c.Addrs() {
		nc := c.NodeClient(addr)
		var cursor uint64
		for {
			keys, next, err := nc.Scan(ctx, cursor, tag+"*", 1000).Result()
			if err != nil {
				t.Fatalf("scan %s: %v", addr, err)
			}
			for _, k := range keys {
				id, _, ok := strings.Cut(strings.TrimPrefix(k, tag), "}")
				if !ok {
					t.Fatalf("key %q on %s has no closing hash tag", k, addr)
				}
				if out[id] == nil {
					out[id] = map[string]int{}
				}
				out[id][addr]++
			}
			if next == 0 {
				break
			}
			cursor = next
		}
	}
	return out
}

// TestScaleOutThreeInstancesThreeMasters is the scale-out acceptance check:
// three instances in one consumer group against a Redis Cluster of three
// masters, with the experiments spread over the masters, consume a stream
// while it is produced and while the group rebalances (two instances
// start, a third joins mid-stream, then the first leaves mid-stream). The
// final arm states (clicks, conversions, pending buckets, matured totals,
// delay histograms) must equal, arm by arm, those of one instance that
// replays the same topics in another group on a plain redis-server, and
// those BuildOffline builds from the same events; both runs must
// dead-letter exactly the duplicate conversions, the same ones. Allocations
// and refit timing are not compared here (TestReplayDeterministic does).
func TestScaleOutThreeInstancesThreeMasters(t *testing.T) {
	n, chunks := 9000, 9
	if testing.Short() {
		n, chunks = 4500, 9
	}
	const partitions = 3
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	brokers := kafkatest.Start(t, partitions, append(slices.Clone(kafkatest.DefaultTopics), "alloc-solo", "dl-solo")...)
	cluster := redistest.StartCluster3(t)
	plain := redistest.Start(t)

	// The scale-out deployment: the store on a cluster client built from
	// redis.cluster, as `ripen run` builds it.
	scaleEnv := &testEnv{brokers: brokers}
	cfg := scaleEnv.config("scale-out")
	cfg.Pipeline.FlushEvents = 1000
	cfg.Pipeline.RefitEvery = 4 * time.Hour
	cfg.Pipeline.PublishEvery = 4 * time.Hour
	cfg.Pipeline.OrphanTTL = 12 * time.Hour // longer than any chunk's span
	cfg.Redis.Cluster = cluster.Addrs()
	rdb, err := NewRedisClient(cfg.Redis)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = rdb.Close() })
	if _, ok := rdb.(*redis.ClusterClient); !ok {
		t.Fatalf("redis.cluster set but NewRedisClient returned a %T", rdb)
	}
	if scaleEnv.store, err = state.New(rdb, state.Options{Prefix: cfg.Redis.Prefix}); err != nil {
		t.Fatal(err)
	}

	// The experiments' hash slots must spread over the masters, or the
	// test would be a one-node test in disguise.
	predicted := map[string]string{}
	masters := map[string]bool{}
	for _, e := range scaleOutExperiments {
		owner, err := cluster.MasterOf(ctx, cfg.Redis.Prefix+":{x:"+e.id+"}:meta")
		if err != nil {
			t.Fatal(err)
		}
		predicted[e.id] = owner
		masters[owner] = true
	}
	t.Logf("experiments by master: %v", predicted)
	if len(masters) < 2 {
		t.Fatalf("every experiment hashes to master %v; pick other names", slices.Collect(maps.Keys(masters)))
	}

	ls := genScaleOutStream(23, n, chunks, partitions, cfg.Pipeline.RefitEvery)
	if ls.early == 0 || ls.dups == 0 {
		t.Fatalf("generated stream lacks early (%d) or duplicate (%d) conversions", ls.early, ls.dups)
	}
	total := float64(len(ls.clicks) + len(ls.convs))

	// Keep the instances a little slower than the producer, so that every
	// rebalance happens with events still unread.
	slow := testHooks{beforeStep: func() { time.Sleep(3 * time.Millisecond) }}
	a := startInstance(t, scaleEnv, cfg, "a", slow)
	b := startInstance(t, scaleEnv, cfg, "b", slow)
	waitReady(t, a.svc)
	waitReady(t, b.svc)
	var c *scaleOutInstance
	steps, clock := ls.steps[:len(ls.steps)-1], ls.steps[len(ls.steps)-1]
	joinAt, leaveAt := len(steps)/3, 2*len(steps)/3
	var aConsumed, atLeave float64
	for i, st := range steps {
		produceScaleOutStep(t, scaleEnv, cfg, st)
		// Pace the producer: wait for part of what is in the topics, not
		// all of it.
		waitFraction(t, scaleEnv, cfg, 0.5)
		switch i {
		case joinAt:
			c = startInstance(t, scaleEnv, cfg, "c", slow)
		case joinAt + 2:
			waitReady(t, c.svc)
		case leaveAt:
			atLeave = consumedFraction(t, scaleEnv, cfg)
			if err := a.stop(); err != nil {
				t.Fatalf("instance a: %v", err)
			}
			aConsumed = a.consumed(cfg)
		}
	}
	scaleEnv.waitConsumed(t, cfg, 90*time.Second)
	produceScaleOutStep(t, scaleEnv, cfg, clock)
	scaleEnv.waitConsumed(t, cfg, 90*time.Second)
	for _, in := range []*scaleOutInstance{b, c} {
		if err := in.stop(); err != nil {
			t.Fatalf("instance %s: %v", in.name, err)
		}
	}
	t.Logf("events read: a %.0f (left at %.0f%% consumed), b %.0f, c %.0f, of %.0f produced",
		aConsumed, 100*atLeave, b.consumed(cfg), c.consumed(cfg), total)
	for _, in := range []*scaleOutInstance{a, b, c} {
		if in.consumed(cfg) == 0 {
			t.Errorf("instance %s read no event; the group did not spread the partitions", in.name)
		}
	}
	if aConsumed >= total {
		t.Errorf("instance a read all %.0f events before it left; no rebalance mid-stream", total)
	}
	if atLeave >= 1 {
		t.Logf("the stream was consumed as far as produced when instance a left")
	}

	// Where the keys really are: each experiment's keys on the one master
	// its hash slot names, and the experiments on at least two masters.
	byNode := experimentKeysByNode(t, ctx, cluster, cfg.Redis.Prefix)
	used := map[string]bool{}
	for _, e := range scaleOutExperiments {
		nodes := byNode[e.id]
		if len(nodes) != 1 || nodes[predicted[e.id]] == 0 {
			t.Errorf("%s: keys on %v, want all on %s", e.id, nodes, predicted[e.id])
		}
		for addr := range nodes {
			used[addr] = true
		}
	}
	if len(used) < 2 {
		t.Errorf("experiment keys on %d master(s), want at least 2", len(used))
	}

	// The same topics replayed by one instance into a plain redis-server.
	soloEnv := &testEnv{brokers: brokers, redis: plain}
	if soloEnv.store, err = state.New(plain.Client(), state.Options{}); err != nil {
		t.Fatal(err)
	}
	solo := soloEnv.config("scale-out-solo")
	solo.Pipeline.FlushEvents = cfg.Pipeline.FlushEvents
	solo.Pipeline.RefitEvery, solo.Pipeline.PublishEvery = cfg.Pipeline.RefitEvery, cfg.Pipeline.PublishEvery
	solo.Pipeline.OrphanTTL = cfg.Pipeline.OrphanTTL
	solo.Kafka.AllocationTopic, solo.Kafka.DeadLetterTopic = "alloc-solo", "dl-solo"
	one := startInstance(t, soloEnv, solo, "solo", testHooks{})
	soloEnv.waitConsumed(t, solo, 90*time.Second)
	if err := one.stop(); err != nil {
		t.Fatalf("solo instance: %v", err)
	}

	// Arm states: scale-out against solo, arm by arm, both advanced to the
	// stream's as-of time (the stored watermarks depend on batching).
	compareArmStates(t, ctx, scaleEnv.store, soloEnv.store, ls.clock)
	// And against the offline join of the same events.
	s := stream{clicks: ls.clicks[:len(ls.clicks)-1], convs: ls.convs, sentinel: ls.clicks[len(ls.clicks)-1], asOf: ls.clock}
	off := checkAgainstOffline(t, scaleEnv.store, s)
	if want := n + partitions*len(scaleOutExperiments); off.Clicks != want {
		t.Errorf("offline counted %d clicks, want %d", off.Clicks, want)
	}

	// Dead letters: exactly the duplicate conversions, the same ones in
	// both runs (the clock step's unknown conversions still wait).
	scaleDL := deadLetterOrigins(t, scaleEnv.readAll(t, cfg.Kafka.DeadLetterTopic))
	soloDL := deadLetterOrigins(t, soloEnv.readAll(t, solo.Kafka.DeadLetterTopic))
	for name, got := range map[string]map[Reason]map[string]bool{"scale-out": scaleDL, "solo": soloDL} {
		counts := map[Reason]int{}
		for r, o := range got {
			counts[r] = len(o)
		}
		if want := map[Reason]int{ReasonDuplicateConversion: ls.dups}; !reflect.DeepEqual(counts, want) {
			t.Errorf("%s: dead-lettered origins by reason %v, want %v", name, counts, want)
		}
	}
	if !reflect.DeepEqual(scaleDL, soloDL) {
		t.Errorf("the scale-out and solo runs dead-lettered different events")
	}
}

// compareArmStates checks that two stores hold the same experiments and
// arms, with no conversion held back, and the same arm states once both
// are advanced to asOf.
func compareArmStates(t *testing.T, ctx context.Context, got, want *state.Store, asOf int64) {
	t.Helper()
	gotIDs, err := got.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	wantIDs, err := want.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	var gen []string
	for _, e := range scaleOutExperiments {
		gen = append(gen, e.id)
	}
	slices.Sort(gen)
	if !slices.Equal(gotIDs, gen) || !slices.Equal(wantIDs, gen) {
		t.Fatalf("experiments: scale-out %v, solo %v, generated %v", gotIDs, wantIDs, gen)
	}
	for _, id := range gen {
		g, err := got.Load(ctx, id)
		if err != nil {
			t.Fatalf("load %s from the cluster: %v", id, err)
		}
		w, err := want.Load(ctx, id)
		if err != nil {
			t.Fatalf("load %s from the plain server: %v", id, err)
		}
		if !slices.Equal(g.Arms, w.Arms) {
			t.Errorf("%s: arms %v, solo %v", id, g.Arms, w.Arms)
			continue
		}
		if len(g.Held) > 0 || len(w.Held) > 0 {
			t.Errorf("%s: conversions still held back: scale-out %v, solo %v", id, g.Held, w.Held)
		}
		for _, arm := range g.Arms {
			gs, ws := g.States[arm].Clone(), w.States[arm].Clone()
			gs.Advance(asOf)
			ws.Advance(asOf)
			if gsn, wsn := gs.Snapshot(), ws.Snapshot(); !reflect.DeepEqual(gsn, wsn) {
				t.Errorf("%s/%s: scale-out state differs from solo: clicks %d conv %d matured %d/%d, solo clicks %d conv %d matured %d/%d",
					id, arm, gs.Clicks(), gs.Conversions(), gsn.MaturedClicks, gsn.MaturedConversions,
					ws.Clicks(), ws.Conversions(), wsn.MaturedClicks, wsn.MaturedConversions)
			}
		}
	}
}
