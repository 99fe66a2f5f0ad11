package consumer

import (
	"bufio"
	"bytes"
	"context"
	"encoding/base64"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/segmentio/kafka-go"

	"ripen/state"
)

// badCase is one message of the bad-event corpus (see
// testdata/badevents/README.md).
type badCase struct {
	Name        string  `json:"name"`
	Phase       int     `json:"phase"`
	Topic       string  `json:"topic"`
	Partition   int     `json:"partition"`
	Want        Reason  `json:"want"`
	Value       *string `json:"value"`
	ValueBase64 string  `json:"value_base64"`
	raw         []byte
}

func loadBadCases(t *testing.T) []badCase {
	t.Helper()
	f, err := os.Open(filepath.Join("..", "testdata", "badevents", "cases.jsonl"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var out []badCase
	seen := map[string]string{}
	sc := bufio.NewScanner(f)
	sc.Buffer(nil, 1<<20)
	for line := 1; sc.Scan(); line++ {
		var c badCase
		dec := json.NewDecoder(bytes.NewReader(sc.Bytes()))
		dec.DisallowUnknownFields()
		if err := dec.Decode(&c); err != nil {
			t.Fatalf("cases.jsonl line %d: %v", line, err)
		}
		switch {
		case c.Value != nil && c.ValueBase64 == "":
			c.raw = []byte(*c.Value)
		case c.Value == nil && c.ValueBase64 != "":
			if c.raw, err = base64.StdEncoding.DecodeString(c.ValueBase64); err != nil {
				t.Fatalf("cases.jsonl line %d: %v", line, err)
			}
		default:
			t.Fatalf("cases.jsonl line %d: want exactly one of value and value_base64", line)
		}
		if c.Topic != SourceClicks && c.Topic != SourceConversions || c.Phase < 1 || c.Name == "" {
			t.Fatalf("cases.jsonl line %d: bad topic %q, phase %d or name %q", line, c.Topic, c.Phase, c.Name)
		}
		if other, dup := seen[string(c.raw)]; dup {
			t.Fatalf("cases.jsonl line %d (%s): same bytes as %q; the test finds messages by their bytes", line, c.Name, other)
		}
		seen[string(c.raw)] = c.Name
		out = append(out, c)
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	return out
}

// TestBadEventsDeadLettered produces the bad-event corpus between valid
// events and checks that every bad message reaches the dead-letter topic
// once, with the corpus's reason, its original bytes and where it was read
// (topic, partition, offset, and the key naming them); that no valid
// message is dead-lettered and exactly the valid ones are counted in the
// arm states; that the service keeps running and stops cleanly; and that
// ripen_events_rejected_total counts every reason.
func TestBadEventsDeadLettered(t *testing.T) {
	cases := loadBadCases(t)
	const partitions = 3
	env := newTestEnv(t, partitions)
	store, err := state.New(env.redis.Client(), state.Options{MaxParkedOrphans: 2})
	if err != nil {
		t.Fatal(err)
	}
	env.store = store
	cfg := env.config("badevents")
	cfg.Pipeline.OrphanTTL = 10 * time.Minute
	cfg.Limits.MaxArms = 2
	cfg.Limits.MaxExperiments = 1
	cfg.Limits.MaxOrphansPerPartition = 2
	topic := map[string]string{SourceClicks: cfg.Kafka.ClickTopic, SourceConversions: cfg.Kafka.ConversionTopic}

	reg := prometheus.NewRegistry()
	svc, stop := env.startDeps(t, cfg, Deps{Logger: testLogger(t), Metrics: NewMetrics(reg)})
	last := 0
	for _, c := range cases {
		last = max(last, c.Phase)
	}
	for phase := 1; phase <= last; phase++ {
		for _, src := range []string{SourceConversions, SourceClicks} {
			for p := range partitions {
				var msgs []kafka.Message
				for _, c := range cases {
					if c.Phase == phase && c.Topic == src && c.Partition == p {
						msgs = append(msgs, kafka.Message{Key: []byte(c.Name), Value: c.raw})
					}
				}
				if len(msgs) > 0 {
					env.produceTo(t, topic[src], p, msgs)
				}
			}
		}
		env.waitConsumed(t, cfg, 30*time.Second)
	}
	if err := svc.Ready(context.Background()); err != nil {
		t.Errorf("not ready after the corpus: %v", err)
	}
	if err := stop(); err != nil {
		t.Fatalf("run: %v", err)
	}

	// Where each message landed.
	where := map[string]kafka.Message{}
	for _, tp := range []string{cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic} {
		for _, m := range env.readAll(t, tp) {
			where[string(m.Value)] = m
		}
	}
	dls := map[string]DeadLetter{}
	for _, m := range env.readAll(t, cfg.Kafka.DeadLetterTopic) {
		var d DeadLetter
		if err := json.Unmarshal(m.Value, &d); err != nil {
			t.Fatalf("dead letter %s: %v", m.Value, err)
		}
		if string(m.Key) != d.origin() {
			t.Errorf("dead letter key %q, its origin %q", m.Key, d.origin())
		}
		if prev, dup := dls[d.origin()]; dup {
			t.Errorf("message %s dead-lettered twice: %s and %s", d.origin(), prev.Reason, d.Reason)
		}
		dls[d.origin()] = d
	}
	wantReasons := map[Reason]int{}
	for _, c := range cases {
		m, ok := where[string(c.raw)]
		if !ok {
			t.Fatalf("%s: not found on %s", c.Name, topic[c.Topic])
		}
		org := fmt.Sprintf("%s/%d/%d", m.Topic, m.Partition, m.Offset)
		d, got := dls[org]
		delete(dls, org)
		if c.Want != "" {
			wantReasons[c.Want]++
		}
		t.Run(c.Name, func(t *testing.T) {
			switch {
			case c.Want == "" && got:
				t.Errorf("valid message %s dead-lettered: %s: %s", org, d.Reason, d.Detail)
			case c.Want == "":
			case !got:
				t.Errorf("message %s (%q) not dead-lettered, want reason %s", org, c.raw, c.Want)
			default:
				if d.Reason != c.Want {
					t.Errorf("reason %s (%s), want %s", d.Reason, d.Detail, c.Want)
				}
				if !bytes.Equal(d.Value, c.raw) {
					t.Errorf("dead letter holds %q, original %q", d.Value, c.raw)
				}
				if d.Topic != topic[c.Topic] || d.Partition != c.Partition || d.Offset != m.Offset {
					t.Errorf("dead letter says %s/%d/%d, message was read at %s", d.Topic, d.Partition, d.Offset, org)
				}
				if d.Detail == "" {
					t.Error("dead letter without a detail")
				}
			}
		})
	}
	for org, d := range dls {
		t.Errorf("dead letter for %s (%s) matches no corpus message", org, d.Reason)
	}
	for r, n := range wantReasons {
		if got := gaugeValue(t, reg, "ripen_events_rejected_total", map[string]string{"reason": string(r)}); got != float64(n) {
			t.Errorf("ripen_events_rejected_total{reason=%q} = %v, want %d", r, got, n)
		}
	}
	// Every expired orphan was parked first (others may have been parked
	// and joined later, depending on read order).
	if parked, expired := gaugeValue(t, reg, "ripen_orphans_parked_total", nil), wantReasons[ReasonOrphanExpired]; expired == 0 || parked < float64(expired) {
		t.Errorf("ripen_orphans_parked_total = %v with %d expired orphans (want >= and the corpus to hold some)", parked, expired)
	}

	// Exactly the valid events are counted.
	clickArm := map[string]string{}
	wantClicks, wantConvs := map[string]uint64{}, map[string]uint64{}
	for _, c := range cases {
		if c.Want != "" || c.Topic != SourceClicks {
			continue
		}
		k, err := DecodeClick(c.raw)
		if err != nil {
			t.Fatalf("%s: corpus says valid: %v", c.Name, err)
		}
		clickArm[k.ClickID] = k.Arm
		wantClicks[k.Arm]++
	}
	for _, c := range cases {
		if c.Want != "" || c.Topic != SourceConversions {
			continue
		}
		v, err := DecodeConversion(c.raw)
		if err != nil {
			t.Fatalf("%s: corpus says valid: %v", c.Name, err)
		}
		wantConvs[clickArm[v.ClickID]]++
	}
	ctx := context.Background()
	ids, err := env.store.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(ids, []string{"loom-shop"}) {
		t.Fatalf("stored experiments %v, want [loom-shop]", ids)
	}
	ex, err := env.store.Load(ctx, "loom-shop")
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(ex.Arms, []string{"linen", "wool"}) {
		t.Errorf("stored arms %v, want [linen wool]", ex.Arms)
	}
	for arm, n := range wantClicks {
		st := ex.States[arm]
		if st == nil {
			t.Errorf("arm %s not stored", arm)
			continue
		}
		if st.Clicks() != n || st.Conversions() != wantConvs[arm] {
			t.Errorf("arm %s: %d clicks, %d conversions; want %d and %d", arm, st.Clicks(), st.Conversions(), n, wantConvs[arm])
		}
	}
}
