package consumer

import (
	"context"
	"encoding/json"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"
)

// carriedStream rewrites s for experiments whose conversions carry their
// attribution: each conversion of their clicks gets the click's own
// experiment, arm and click time, except one in dropEvery, which is left
// without them (dead-lettered as missing_attribution; returned apart as
// unattributed, and left out of offline). Conversions of clicks not in
// the stream (s's ghosts) are dropped for those experiments: with no
// click to index there is nothing to tell their carried click from a
// missing one, and the offline join, which counts such a click from the
// conversion, would differ.
func carriedStream(t *testing.T, s stream, carried map[string]bool, dropEvery int) (out stream, offline stream, unattributed int) {
	t.Helper()
	clicks := map[string]Click{}
	for _, m := range s.clicks {
		if c, err := DecodeClick(m.Value); err == nil {
			clicks[c.ClickID] = c
		}
	}
	out, offline = s, s
	out.convs, offline.convs = nil, nil
	n := 0
	for _, m := range s.convs {
		v, err := DecodeConversion(m.Value)
		if err != nil {
			out.convs = append(out.convs, m)
			offline.convs = append(offline.convs, m)
			continue
		}
		c, ok := clicks[v.ClickID]
		switch {
		case !ok && carried[v.Experiment]:
			continue
		case !ok || !carried[c.Experiment]:
			out.convs = append(out.convs, m)
			offline.convs = append(offline.convs, m)
			continue
		}
		n++
		v = Conversion{ClickID: v.ClickID, TS: v.TS}
		if n%dropEvery != 0 {
			v.Experiment, v.Arm, v.ClickTS = c.Experiment, c.Arm, c.TS
		}
		b, err := json.Marshal(v)
		if err != nil {
			t.Fatal(err)
		}
		msg := kafka.Message{Key: m.Key, Value: b}
		out.convs = append(out.convs, msg)
		if n%dropEvery == 0 {
			unattributed++
			continue
		}
		offline.convs = append(offline.convs, msg)
	}
	return out, offline, unattributed
}

// indexKeys counts the click index's keys under the default prefix.
func indexKeys(t *testing.T, env *testEnv) int {
	t.Helper()
	keys, err := env.redis.Client().Keys(context.Background(), DefaultPrefix+":{i*").Result()
	if err != nil {
		t.Fatal(err)
	}
	return len(keys)
}

// TestCarriedAttributionMatchesOffline runs a deployment whose
// conversions carry their attribution: nothing is written to the click
// index, the stored state equals the offline join's of the same events
// (without the conversions that lack attribution), and those are
// dead-lettered as missing_attribution.
func TestCarriedAttributionMatchesOffline(t *testing.T) {
	env := newTestEnv(t, 3)
	base := genStream(21, 2000, time.Hour)
	s, offline, unattributed := carriedStream(t, base, map[string]bool{"bakery-banner": true, "bike-checkout": true}, 17)
	if unattributed == 0 {
		t.Fatal("no conversion left without attribution")
	}
	cfg := env.config("carried")
	cfg.Defaults.Attribution = AttributionCarried
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks)
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)
	_, stop := env.start(t, cfg, testLogger(t), testHooks{}, nil)
	env.finish(t, cfg, s)
	if err := stop(); err != nil {
		t.Fatalf("run: %v", err)
	}
	off := checkAgainstOffline(t, env.store, offline)
	// Conversions of clicks not in the stream that lack attribution are
	// unknown to the offline join; here they lack attribution like the
	// others.
	want := offlineReasons(off)
	want[ReasonMissingAttribution] = unattributed + want[ReasonOrphanExpired]
	delete(want, ReasonOrphanExpired)
	checkReasons(t, deadLetterReasons(t, env.readAll(t, cfg.Kafka.DeadLetterTopic)), want)
	if n := indexKeys(t, env); n != 0 {
		t.Errorf("%d click index keys written with every experiment carried", n)
	}
}

// TestMixedAttribution runs one experiment through the click index and
// another (an override) with carried attribution, on the same topics; the
// state equals the offline join's.
func TestMixedAttribution(t *testing.T) {
	env := newTestEnv(t, 3)
	base := genStream(22, 2000, time.Hour)
	s, offline, unattributed := carriedStream(t, base, map[string]bool{"bike-checkout": true}, 13)
	cfg := env.config("mixed")
	cfg.Experiments = map[string]ExperimentConfig{"bike-checkout": {Attribution: AttributionCarried}}
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks)
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)
	_, stop := env.start(t, cfg, testLogger(t), testHooks{}, nil)
	env.finish(t, cfg, s)
	if err := stop(); err != nil {
		t.Fatalf("run: %v", err)
	}
	off := checkAgainstOffline(t, env.store, offline)
	// A bike conversion without attribution names no experiment, so it is
	// looked up in the index, where bike clicks are not, and expires.
	want := offlineReasons(off)
	want[ReasonOrphanExpired] += unattributed
	checkReasons(t, deadLetterReasons(t, env.readAll(t, cfg.Kafka.DeadLetterTopic)), want)
	if n := indexKeys(t, env); n == 0 {
		t.Errorf("no click index key written for the indexed experiment")
	}
}
