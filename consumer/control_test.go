package consumer

import (
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"ripen/estimator"
)

// controlExp is an invented experiment of the control test.
type controlExp struct {
	id   string
	arms []string
	cvr  []float64
}

// genPart returns n clicks spread over the experiments from event time
// from on, 2 s apart, with conversions delayed by up to 30 minutes.
// last is the latest event time of the part.
func genPart(r *rand.Rand, exps []controlExp, from int64, n int, tag string) (clicks, convs []kafka.Message, perExp map[string]uint64, last int64) {
	perExp = map[string]uint64{}
	for i := range n {
		e := exps[i%len(exps)]
		a := r.IntN(len(e.arms))
		ts := from + int64(i)*2000
		id := fmt.Sprintf("%s-%05d", tag, i)
		clicks = append(clicks, jsonMessage(id, Click{ClickID: id, Experiment: e.id, Arm: e.arms[a], TS: ts}))
		perExp[e.id]++
		last = max(last, ts)
		if r.Float64() < e.cvr[a] {
			cts := ts + r.Int64N(30*60_000)
			convs = append(convs, jsonMessage(id, Conversion{ClickID: id, TS: cts}))
			last = max(last, cts)
		}
	}
	return clicks, convs, perExp, last
}

// waitControl waits until cond holds for the configuration in force.
func waitControl(t *testing.T, svc *Service, what string, cond func(Config) bool) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for !cond(svc.config()) {
		if time.Now().After(deadline) {
			t.Fatalf("control message not applied within 20s: %s", what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// allocationsAfter returns the allocations of experiment whose as-of time
// is after t, decoded, in topic order.
func allocationsAfter(t *testing.T, msgs []kafka.Message, experiment string, after int64) []Allocation {
	t.Helper()
	var out []Allocation
	for _, m := range msgs {
		var a Allocation
		if err := json.Unmarshal(m.Value, &a); err != nil {
			t.Fatalf("allocation %s: %v", m.Value, err)
		}
		at, err := time.Parse(time.RFC3339Nano, a.AsOf)
		if err != nil {
			t.Fatalf("allocation as_of %q: %v", a.AsOf, err)
		}
		if a.Experiment == experiment && at.UnixMilli() > after {
			out = append(out, a)
		}
	}
	return out
}

// TestControlTopic changes an experiment's settings through the control
// topic while the service runs: pausing an arm and switching the policy
// take effect in the next allocation (the paused arm gets weight 0),
// ending the experiment stops its allocations while its events are still
// counted, and bad control messages are dead-lettered with their origin
// and leave the settings alone.
func TestControlTopic(t *testing.T) {
	env := newTestEnv(t, 3)
	cfg := env.config("control")
	cfg.Pipeline.RefitEvery = 20 * time.Minute
	cfg.Pipeline.PublishEvery = 20 * time.Minute
	exps := []controlExp{
		{"lamp-store", []string{"brass", "copper", "steel"}, []float64{0.10, 0.13, 0.08}},
		{"rug-store", []string{"jute", "wool"}, []float64{0.12, 0.09}},
	}
	r := rand.New(rand.NewPCG(51, 7))
	const perPart = 2400 // 80 minutes of event time
	partSpan := int64(perPart) * 2000
	produced := map[string]uint64{}
	// lastTS[k] is the latest event time of part k: an allocation as of a
	// later time was refitted after part k+1 began to be consumed, which
	// is after the control messages sent between the parts were in force.
	var lastTS []int64
	producePart := func(k int) {
		clicks, convs, per, last := genPart(r, exps, streamT0+int64(k)*partSpan, perPart, fmt.Sprintf("p%d", k))
		lastTS = append(lastTS, last)
		env.produce(t, cfg.Kafka.ClickTopic, clicks)
		env.produce(t, cfg.Kafka.ConversionTopic, convs)
		for id, n := range per {
			produced[id] += n
		}
		env.waitConsumed(t, cfg, 60*time.Second)
	}
	control := func(key, value string) {
		env.produceTo(t, cfg.Kafka.ControlTopic, 0, []kafka.Message{{Key: []byte(key), Value: []byte(value)}})
	}

	svc, stop := env.start(t, cfg, testLogger(t), testHooks{}, nil)
	producePart(0)
	before := allocationsAfter(t, env.readAll(t, cfg.Kafka.AllocationTopic), "lamp-store", 0)
	if len(before) == 0 {
		t.Fatal("no allocation of lamp-store before the control messages")
	}
	if a := before[len(before)-1]; a.Weights["steel"] <= 0 || a.Policy != estimator.PolicyThompsonBayes {
		t.Fatalf("lamp-store before control: steel weight %v, policy %q", a.Weights["steel"], a.Policy)
	}

	// Pause an arm and switch the policy.
	control("lamp-store", `{"paused":["steel"],"policy":"uniform"}`)
	waitControl(t, svc, "pause steel", func(c Config) bool {
		e := c.ExperimentFor("lamp-store")
		return slices.Equal(e.Paused, []string{"steel"}) && e.Policy == estimator.PolicyUniform
	})
	producePart(1)
	paused := allocationsAfter(t, env.readAll(t, cfg.Kafka.AllocationTopic), "lamp-store", lastTS[0])
	if len(paused) == 0 {
		t.Fatal("no allocation of lamp-store after pausing steel")
	}
	for _, a := range paused {
		if a.Weights["steel"] != 0 || a.Policy != estimator.PolicyUniform {
			t.Errorf("lamp-store seq %d as of %s: steel weight %v, policy %q; want 0 and uniform", a.Seq, a.AsOf, a.Weights["steel"], a.Policy)
		}
		for _, ar := range a.Arms {
			if (ar.Arm == "steel") != ar.Paused {
				t.Errorf("lamp-store seq %d: arm %s reported paused=%v", a.Seq, ar.Arm, ar.Paused)
			}
		}
	}

	// Bad control messages: refused, dead-lettered, settings unchanged.
	bad := []string{`{"policy":"coin-toss"}`, `not json`, `{"pause":["jute"]}`}
	for _, v := range bad {
		control("rug-store", v)
	}
	// End lamp-store; the control consumer applies messages in order, so
	// once this one is in force the bad ones were handled.
	control("lamp-store", `{"paused":["steel"],"policy":"uniform","ended":true}`)
	waitControl(t, svc, "end lamp-store", func(c Config) bool { return c.ExperimentFor("lamp-store").Ended })
	if e := svc.config().ExperimentFor("rug-store"); e.Policy != estimator.PolicyThompsonBayes || len(e.Paused) != 0 {
		t.Errorf("rug-store settings changed by refused messages: policy %q, paused %v", e.Policy, e.Paused)
	}
	producePart(2)
	if err := stop(); err != nil {
		t.Fatalf("run: %v", err)
	}

	allocs := env.readAll(t, cfg.Kafka.AllocationTopic)
	if after := allocationsAfter(t, allocs, "lamp-store", lastTS[1]); len(after) != 0 {
		t.Errorf("ended lamp-store published %d allocations, first as of %s", len(after), after[0].AsOf)
	}
	if after := allocationsAfter(t, allocs, "rug-store", lastTS[1]); len(after) == 0 {
		t.Error("rug-store published nothing in the last part: refits did not run, so the ended check proves nothing")
	}
	ex, err := env.store.Load(context.Background(), "lamp-store")
	if err != nil {
		t.Fatal(err)
	}
	var clicks uint64
	for _, st := range ex.States {
		clicks += st.Clicks()
	}
	if clicks != produced["lamp-store"] {
		t.Errorf("lamp-store holds %d clicks, %d were produced (an ended experiment still counts)", clicks, produced["lamp-store"])
	}

	// The refused control messages, in the dead-letter topic.
	ctlMsgs := env.readAll(t, cfg.Kafka.ControlTopic)
	var refused []DeadLetter
	for _, m := range env.readAll(t, cfg.Kafka.DeadLetterTopic) {
		var d DeadLetter
		if err := json.Unmarshal(m.Value, &d); err != nil {
			t.Fatal(err)
		}
		if d.Topic == cfg.Kafka.ControlTopic {
			refused = append(refused, d)
		}
	}
	if len(refused) != len(bad) {
		t.Fatalf("%d control dead letters, want %d: %+v", len(refused), len(bad), refused)
	}
	seen := map[string]bool{}
	for _, d := range refused {
		var src *kafka.Message
		for j := range ctlMsgs {
			if ctlMsgs[j].Partition == d.Partition && ctlMsgs[j].Offset == d.Offset {
				src = &ctlMsgs[j]
			}
		}
		switch {
		case d.Reason != ReasonBadControl:
			t.Errorf("control dead letter %s: reason %s, want %s", d.origin(), d.Reason, ReasonBadControl)
		case src == nil:
			t.Errorf("control dead letter %s: no control message there", d.origin())
		case string(d.Value) != string(src.Value) || string(src.Key) != "rug-store" || !slices.Contains(bad, string(d.Value)) || seen[string(d.Value)]:
			t.Errorf("control dead letter %s holds %q, the message there is %q (key %q); want each of %q once", d.origin(), d.Value, src.Value, src.Key, bad)
		}
		seen[string(d.Value)] = true
	}
}
