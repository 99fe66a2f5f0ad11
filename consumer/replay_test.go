package consumer

import (
	"bytes"
	"context"
	"encoding/json"
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"ripen/state"
)

// replayConfig is the determinism test's configuration: ticks short
// enough for several publications per experiment.
func replayConfig(env *testEnv, group string) Config {
	cfg := env.config(group)
	cfg.Pipeline.FlushEvents = 150
	cfg.Pipeline.RefitEvery = 10 * time.Minute
	cfg.Pipeline.PublishEvery = 10 * time.Minute
	cfg.Pipeline.HoldbackCap = 1000
	return cfg
}

// historySequences returns each experiment's stored publications (seq,
// as-of time, weights) in history order.
func historySequences(t *testing.T, st *state.Store) map[string][]pubRecord {
	t.Helper()
	ctx := context.Background()
	ids, err := st.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	out := map[string][]pubRecord{}
	for _, id := range ids {
		h, err := st.History(ctx, id)
		if err != nil {
			t.Fatal(err)
		}
		for _, m := range h {
			var a Allocation
			if err := json.Unmarshal(m, &a); err != nil {
				t.Fatalf("%s history entry %s: %v", id, m, err)
			}
			out[id] = append(out[id], pubRecord{Seq: a.Seq, AsOf: a.AsOf, Weights: a.Weights})
		}
	}
	return out
}

// topicSize is the number of messages in every partition of topic.
func topicSize(t *testing.T, env *testEnv, topic string) int64 {
	t.Helper()
	var n int64
	for _, end := range env.endOffsets(t, topic) {
		n += end
	}
	return n
}

// TestReplayTwiceIdentical replays the same topics twice into two fresh
// prefixes: both must end in the same logical state (the offline join's)
// and store the same sequence of weights, without writing a message to the
// allocation or dead-letter topics and without touching the live pointer.
func TestReplayTwiceIdentical(t *testing.T) {
	env := newTestEnv(t, 3)
	s := genStream(21, 700, time.Hour)
	cfg := replayConfig(env, "live")
	env.produce(t, cfg.Kafka.ClickTopic, append(slices.Clone(s.clicks), s.sentinel))
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()

	var digests []string
	var hists []map[string][]pubRecord
	for _, prefix := range []string{"ripen.ra", "ripen.rb"} {
		var progress bytes.Buffer
		rep, err := Replay(ctx, cfg, Deps{Store: env.store, Logger: testLogger(t)}, ReplayOptions{
			Prefix: prefix, NoSwitch: true, Progress: &progress, ProgressEvery: 50 * time.Millisecond,
		})
		if err != nil {
			t.Fatalf("replay into %s: %v", prefix, err)
		}
		if rep.Plan.Group != "live.replay."+prefix || rep.Plan.Live != "ripen" || rep.Switch != nil {
			t.Errorf("plan %+v, switch %+v", rep.Plan, rep.Switch)
		}
		if rep.Experiments != 2 {
			t.Errorf("%s: %d experiments rebuilt, want 2", prefix, rep.Experiments)
		}
		// The root prefix was never consumed: every experiment differs.
		if len(rep.Diff) == 0 {
			t.Errorf("%s: no difference from the empty live prefix", prefix)
		}
		if !strings.Contains(progress.String(), "6 of 6 partitions through their end offsets") {
			t.Errorf("no final progress line:\n%s", progress.String())
		}
		st := env.withPrefix(t, prefix).store
		checkAgainstOffline(t, st, s)
		digests = append(digests, normalizedDigest(t, st, s.asOf))
		hists = append(hists, historySequences(t, st))
	}
	if digests[0] != digests[1] {
		t.Errorf("state digests differ: %s vs %s", digests[0], digests[1])
	}
	if len(hists[0]) != 2 {
		t.Fatalf("first replay stored histories for %d experiments, want 2", len(hists[0]))
	}
	for id, h := range hists[0] {
		if len(h) < 5 {
			t.Errorf("%s: only %d publications; the comparison would be weak", id, len(h))
		}
		if !reflect.DeepEqual(h, hists[1][id]) {
			t.Errorf("%s: weight sequences differ:\n %+v\n %+v", id, h, hists[1][id])
		}
	}
	for _, topic := range []string{cfg.Kafka.AllocationTopic, cfg.Kafka.DeadLetterTopic} {
		if n := topicSize(t, env, topic); n != 0 {
			t.Errorf("replays wrote %d messages to %s", n, topic)
		}
	}
	if live, err := env.store.LivePrefix(ctx); err != nil || live != "ripen" {
		t.Errorf("live prefix %q, %v after replays without switch", live, err)
	}
}

// splitStream splits a stream at event time cut: clicks and conversions
// before it (and undecodable messages) first, the rest after.
func splitStream(s stream, cut int64) (before, after stream) {
	for _, m := range s.clicks {
		if c, err := DecodeClick(m.Value); err == nil && c.TS >= cut {
			after.clicks = append(after.clicks, m)
		} else {
			before.clicks = append(before.clicks, m)
		}
	}
	for _, m := range s.convs {
		if c, err := DecodeConversion(m.Value); err == nil && c.TS >= cut {
			after.convs = append(after.convs, m)
		} else {
			before.convs = append(before.convs, m)
		}
	}
	return before, after
}

// TestReplaySwitchFollowed runs a live service, replays its topics into a
// new prefix and switches: the service must follow the pointer, go on from
// the new prefix's resume offsets (its final state equals the offline join
// of the whole stream), and every experiment's allocation seqs on the
// topic must keep increasing across the switch, with publications after
// it.
func TestReplaySwitchFollowed(t *testing.T) {
	env := newTestEnv(t, 3)
	s := genStream(22, 800, time.Hour)
	first, second := splitStream(s, streamT0+400*2000)
	cfg := replayConfig(env, "live")
	svc, stop := env.startDeps(t, cfg, Deps{Logger: testLogger(t), LiveCheckEvery: 100 * time.Millisecond})
	env.produce(t, cfg.Kafka.ClickTopic, first.clicks)
	env.produce(t, cfg.Kafka.ConversionTopic, first.convs)
	env.waitConsumed(t, cfg, 60*time.Second)
	if svc.Prefix() != "ripen" {
		t.Fatalf("service uses %q before any switch", svc.Prefix())
	}
	waitAllocations(t, env, cfg.Kafka.AllocationTopic, 2, 0)

	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	rep, err := Replay(ctx, cfg, Deps{Store: env.store, Logger: testLogger(t)}, ReplayOptions{Prefix: "ripen.rnew"})
	if err != nil {
		t.Fatalf("replay: %v", err)
	}
	if rep.Switch == nil || rep.Switch.From != "ripen" || rep.Switch.To != "ripen.rnew" {
		t.Fatalf("switch %+v", rep.Switch)
	}
	deadline := time.Now().Add(20 * time.Second)
	for svc.Prefix() != "ripen.rnew" {
		if time.Now().After(deadline) {
			t.Fatal("the service did not follow the live pointer within 20s")
		}
		time.Sleep(20 * time.Millisecond)
	}
	before := map[string]int64{}
	nBefore := 0
	for _, m := range env.readAll(t, cfg.Kafka.AllocationTopic) {
		var a Allocation
		if err := json.Unmarshal(m.Value, &a); err != nil {
			t.Fatal(err)
		}
		before[a.Experiment] = max(before[a.Experiment], a.Seq)
		nBefore++
	}

	env.produce(t, cfg.Kafka.ClickTopic, append(slices.Clone(second.clicks), s.sentinel))
	env.produce(t, cfg.Kafka.ConversionTopic, second.convs)
	next := env.withPrefix(t, "ripen.rnew")
	next.waitConsumed(t, cfg, 60*time.Second)
	waitAllocations(t, env, cfg.Kafka.AllocationTopic, 2, nBefore)
	if err := stop(); err != nil {
		t.Fatalf("live service: %v", err)
	}
	checkAgainstOffline(t, next.store, s)

	// Readers keep a message only if its seq is above the last they saw:
	// per experiment (one partition, by key), seqs must strictly increase
	// in log order, and the new prefix's publications must be above the
	// old ones.
	last := map[string]int64{}
	after := map[string]int{}
	for i, m := range env.readAll(t, cfg.Kafka.AllocationTopic) {
		var a Allocation
		if err := json.Unmarshal(m.Value, &a); err != nil {
			t.Fatal(err)
		}
		if a.Seq <= last[a.Experiment] {
			t.Errorf("message %d: %s seq %d not above the previous %d", i, a.Experiment, a.Seq, last[a.Experiment])
		}
		last[a.Experiment] = a.Seq
		if a.Seq > before[a.Experiment] {
			after[a.Experiment]++
		}
	}
	for id := range before {
		if after[id] == 0 {
			t.Errorf("%s: no publication above seq %d after the switch", id, before[id])
		}
	}
}

// waitAllocations waits until topic holds at least one more message than
// skip for each of n experiments.
func waitAllocations(t *testing.T, env *testEnv, topic string, n, skip int) {
	t.Helper()
	deadline := time.Now().Add(60 * time.Second)
	for {
		msgs := env.readAll(t, topic)
		// Messages of one experiment share a partition: count those past
		// the first skip messages overall is not per partition, so count
		// experiments with messages after the skip-th in read order.
		seen := map[string]bool{}
		for _, m := range msgs[min(skip, len(msgs)):] {
			seen[string(m.Key)] = true
		}
		if len(seen) >= n && len(msgs) > skip {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("%s: %d messages, %d experiments past %d within 60s", topic, len(msgs), len(seen), skip)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// TestPlanReplayFromTime checks the start offsets of --from TIME: per
// partition, the first offset whose log timestamp is at or after TIME
// (Kafka's ListOffsets by timestamp), the log end when none is; and that a
// dry run writes nothing.
func TestPlanReplayFromTime(t *testing.T) {
	env := newTestEnv(t, 2)
	cfg := env.config("live")
	t0 := time.Date(2031, 5, 4, 0, 0, 0, 0, time.UTC)
	var msgs []kafka.Message
	for i := range 10 {
		msgs = append(msgs, kafka.Message{Key: []byte("k"), Value: []byte(`{}`), Time: t0.Add(time.Duration(i) * time.Minute)})
	}
	env.produceTo(t, cfg.Kafka.ClickTopic, 0, msgs)
	env.produceTo(t, cfg.Kafka.ConversionTopic, 1, msgs[:3])
	ctx := context.Background()
	for _, tc := range []struct {
		name string
		from time.Time
		want []ReplayPartition
	}{
		{"earliest", time.Time{}, []ReplayPartition{{"clicks", 0, 0, 10}, {"clicks", 1, 0, 0}, {"conversions", 0, 0, 0}, {"conversions", 1, 0, 3}}},
		{"exact", t0.Add(4 * time.Minute), []ReplayPartition{{"clicks", 0, 4, 10}, {"clicks", 1, 0, 0}, {"conversions", 0, 0, 0}, {"conversions", 1, 3, 3}}},
		{"between", t0.Add(4*time.Minute + time.Second), []ReplayPartition{{"clicks", 0, 5, 10}, {"clicks", 1, 0, 0}, {"conversions", 0, 0, 0}, {"conversions", 1, 3, 3}}},
		{"after all", t0.Add(time.Hour), []ReplayPartition{{"clicks", 0, 10, 10}, {"clicks", 1, 0, 0}, {"conversions", 0, 0, 0}, {"conversions", 1, 3, 3}}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			rep, err := Replay(ctx, cfg, Deps{Store: env.store}, ReplayOptions{From: tc.from, DryRun: true, Now: func() time.Time { return t0 }})
			if err != nil {
				t.Fatal(err)
			}
			want := "ripen.r" + "1935619200"
			if rep.Plan.NewPrefix != want || rep.Plan.Group != "live.replay."+want {
				t.Errorf("prefix %q group %q, want %q", rep.Plan.NewPrefix, rep.Plan.Group, want)
			}
			if !reflect.DeepEqual(rep.Plan.Partitions, tc.want) {
				t.Errorf("partitions %+v, want %+v", rep.Plan.Partitions, tc.want)
			}
		})
	}
	if n := env.redis.Client().DBSize(ctx).Val(); n != 0 {
		t.Errorf("dry runs wrote %d keys", n)
	}
}
