package consumer

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math/rand/v2"
	"os"
	"reflect"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"
	"go.uber.org/zap"
	"go.uber.org/zap/zaptest"

	"ripen/consumer/kafkatest"
	"ripen/estimator"
	"ripen/state"
	"ripen/state/redistest"
)

// streamT0 is the start of the generated streams: 2031-05-04T00:00:00Z.
const streamT0 int64 = 1935619200000

// testWindow is the attribution window of the generated experiments.
const testWindow = time.Hour

// stream is a generated click and conversion stream, in production order.
type stream struct {
	clicks, convs []kafka.Message
	// sentinel is a last click far enough ahead of every other event that
	// all parked conversions are due once it is consumed. Tests produce it
	// after the rest was consumed: a partition that is caught up does not
	// hold the watermark back, so producing it early could let the
	// watermark jump past conversions whose clicks are still in flight.
	sentinel kafka.Message
	// asOf is the time of the last event: the offline join's as-of time.
	asOf int64
}

// genStream builds a stream of about n clicks in two invented
// experiments (a bakery's banner test and a bike shop's checkout copy)
// with conversions delayed by an exponential time, and a sprinkling of
// every kind of bad event (the last click comes orphanTTL after the rest): conversions before their click, after the
// window, twice, of unknown clicks, with the wrong arm; self-attributed
// conversions whose click is not in the click stream; and undecodable
// messages.
func genStream(seed uint64, n int, orphanTTL time.Duration) stream {
	r := rand.New(rand.NewPCG(seed, 0x5eed))
	type exp struct {
		id   string
		arms []string
		cvr  []float64
	}
	exps := []exp{
		{"bakery-banner", []string{"croissant", "baguette", "brioche"}, []float64{0.10, 0.14, 0.08}},
		{"bike-checkout", []string{"short-copy", "long-copy"}, []float64{0.20, 0.15}},
	}
	var s stream
	add := func(dst *[]kafka.Message, key string, v any) {
		b, err := json.Marshal(v)
		if err != nil {
			panic(err)
		}
		*dst = append(*dst, kafka.Message{Key: []byte(key), Value: b})
	}
	last := streamT0
	meanDelay := 12 * time.Minute
	for i := range n {
		e := exps[r.IntN(len(exps))]
		a := r.IntN(len(e.arms))
		ts := streamT0 + int64(i)*2000 + r.Int64N(2000)
		id := fmt.Sprintf("c%06d", i)
		add(&s.clicks, id, Click{ClickID: id, Experiment: e.id, Arm: e.arms[a], TS: ts})
		last = max(last, ts)
		if r.Float64() >= e.cvr[a] {
			continue
		}
		d := int64(r.ExpFloat64() * float64(meanDelay.Milliseconds()))
		conv := Conversion{ClickID: id, TS: ts + d}
		switch u := r.Float64(); {
		case u < 0.03:
			conv.TS = ts + testWindow.Milliseconds() + 1 + r.Int64N(600_000) // after the window
		case u < 0.05:
			conv.TS = ts - 1 - r.Int64N(300_000) // before its click
		case u < 0.08:
			conv.Experiment, conv.Arm, conv.ClickTS = e.id, e.arms[(a+1)%len(e.arms)], ts // wrong arm
		case u < 0.20:
			conv.Experiment, conv.Arm, conv.ClickTS = e.id, e.arms[a], ts // carries its attribution
		}
		add(&s.convs, id, conv)
		last = max(last, conv.TS)
		if r.Float64() < 0.04 {
			add(&s.convs, id, conv) // the producer retried: same conversion twice
		}
	}
	// Conversions whose click is not in the click stream: self-attributed
	// ones count, bare ones are unknown.
	for i := range n / 50 {
		e := exps[i%len(exps)]
		id := fmt.Sprintf("ghost%04d", i)
		cts := streamT0 + r.Int64N(int64(n)*2000)
		conv := Conversion{ClickID: id, TS: cts + r.Int64N(1_800_000)}
		if i%3 != 0 {
			conv.Experiment, conv.Arm, conv.ClickTS = e.id, e.arms[i%len(e.arms)], cts
		}
		add(&s.convs, id, conv)
		last = max(last, conv.TS)
	}
	// Undecodable messages on both topics.
	bad := [][]byte{[]byte(`{"click_id":`), []byte(`{"click_id":"x","ts":"yesterday"}`), []byte(`[1,2]`), []byte("\xff\xfe")}
	for i, b := range bad {
		s.clicks = append(s.clicks, kafka.Message{Key: []byte(fmt.Sprintf("bad%d", i)), Value: b})
		s.convs = append(s.convs, kafka.Message{Key: []byte(fmt.Sprintf("bad%d", i)), Value: b})
	}
	// Shuffle conversions a little, as several producers would.
	for i := range s.convs {
		j := min(len(s.convs)-1, i+r.IntN(20))
		s.convs[i], s.convs[j] = s.convs[j], s.convs[i]
	}
	// A last click far enough ahead that every parked conversion is due.
	sentinel := last + orphanTTL.Milliseconds() + 5*time.Minute.Milliseconds()
	var tail []kafka.Message
	add(&tail, "sentinel", Click{ClickID: "sentinel", Experiment: exps[0].id, Arm: exps[0].arms[0], TS: sentinel})
	s.sentinel = tail[0]
	s.asOf = sentinel
	return s
}

// jsonLines joins message values as JSON Lines for BuildOffline.
func jsonLines(msgs []kafka.Message) []byte {
	var b bytes.Buffer
	for _, m := range msgs {
		b.Write(m.Value)
		b.WriteByte('\n')
	}
	return b.Bytes()
}

// testEnv is one kfake cluster and one redis-server.
type testEnv struct {
	brokers []string
	redis   *redistest.Server
	store   *state.Store
}

func newTestEnv(t *testing.T, partitions int) *testEnv {
	t.Helper()
	rs := redistest.Start(t)
	st, err := state.New(rs.Client(), state.Options{})
	if err != nil {
		t.Fatal(err)
	}
	return &testEnv{brokers: kafkatest.Start(t, partitions), redis: rs, store: st}
}

// config is a test configuration: small batches, short timers.
func (e *testEnv) config(group string) Config {
	var c Config
	c.Kafka.Brokers = e.brokers
	c.Kafka.Group = group
	c.Pipeline.FlushEvents = 400
	c.Pipeline.FlushInterval = 50 * time.Millisecond
	c.Pipeline.Lateness = 2 * time.Minute
	c.Pipeline.RefitEvery = 40 * time.Minute
	c.Pipeline.OrphanTTL = time.Hour
	// Short, so that once the stream is consumed its quiet partitions stop
	// holding the watermark back quickly.
	c.Pipeline.IdleTimeout = 300 * time.Millisecond
	c.Defaults.Window = testWindow
	c.ShutdownTimeout = 10 * time.Second
	return c.WithDefaults()
}

func (e *testEnv) produce(t *testing.T, topic string, msgs []kafka.Message) {
	t.Helper()
	w := &kafka.Writer{Addr: kafka.TCP(e.brokers...), Topic: topic, Balancer: &kafka.Hash{}, RequiredAcks: kafka.RequireAll, BatchTimeout: 5 * time.Millisecond, BatchSize: 500}
	defer w.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	for i := 0; i < len(msgs); i += 500 {
		if err := w.WriteMessages(ctx, msgs[i:min(i+500, len(msgs))]...); err != nil {
			t.Fatalf("produce to %s: %v", topic, err)
		}
	}
}

// finish produces the stream's sentinel click and waits until it, and
// everything before it, was consumed.
func (e *testEnv) finish(t *testing.T, cfg Config, s stream) {
	t.Helper()
	e.waitConsumed(t, cfg, 60*time.Second)
	e.produce(t, cfg.Kafka.ClickTopic, []kafka.Message{s.sentinel})
	e.waitConsumed(t, cfg, 60*time.Second)
}

// endOffsets returns the log end offset of every partition of topic.
func (e *testEnv) endOffsets(t *testing.T, topic string) map[int]int64 {
	t.Helper()
	conn, err := kafka.Dial("tcp", e.brokers[0])
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	parts, err := conn.ReadPartitions(topic)
	if err != nil {
		t.Fatal(err)
	}
	out := map[int]int64{}
	for _, p := range parts {
		lc, err := kafka.DialLeader(context.Background(), "tcp", e.brokers[0], topic, p.ID)
		if err != nil {
			t.Fatal(err)
		}
		end, err := lc.ReadLastOffset()
		lc.Close()
		if err != nil {
			t.Fatal(err)
		}
		out[p.ID] = end
	}
	return out
}

// waitConsumed waits until the resume offset of every partition of the
// click and conversion topics is at its log end.
func (e *testEnv) waitConsumed(t *testing.T, cfg Config, timeout time.Duration) {
	t.Helper()
	want := map[string]map[int]int64{
		cfg.Kafka.ClickTopic:      e.endOffsets(t, cfg.Kafka.ClickTopic),
		cfg.Kafka.ConversionTopic: e.endOffsets(t, cfg.Kafka.ConversionTopic),
	}
	deadline := time.Now().Add(timeout)
	for {
		behind := ""
		for topic, parts := range want {
			for p, end := range parts {
				got, err := e.store.Resume(context.Background(), topic, p)
				if (err != nil && !errors.Is(err, state.ErrNotFound)) || (end > 0 && got < end) {
					behind = fmt.Sprintf("%s/%d at %d of %d (%v)", topic, p, got, end, err)
				}
			}
		}
		if behind == "" {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("not consumed within %v: %s", timeout, behind)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// readAll reads every message of topic from the start.
func (e *testEnv) readAll(t *testing.T, topic string) []kafka.Message {
	t.Helper()
	var out []kafka.Message
	for p, end := range e.endOffsets(t, topic) {
		if end == 0 {
			continue
		}
		r := kafka.NewReader(kafka.ReaderConfig{Brokers: e.brokers, Topic: topic, Partition: p, MaxWait: 100 * time.Millisecond})
		ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
		for {
			m, err := r.FetchMessage(ctx)
			if err != nil {
				t.Fatalf("read %s/%d: %v", topic, p, err)
			}
			out = append(out, m)
			if m.Offset+1 >= end {
				break
			}
		}
		cancel()
		r.Close()
	}
	return out
}

// start runs a service in the background and returns a function that
// cancels it and returns Run's error.
func (e *testEnv) start(t *testing.T, cfg Config, log *zap.Logger, hooks testHooks, refit RefitFunc) (*Service, func() error) {
	t.Helper()
	svc, err := New(cfg, Deps{Store: e.store, Logger: log, Refit: refit})
	if err != nil {
		t.Fatal(err)
	}
	svc.hooks = hooks
	return svc, runService(t, svc, cfg)
}

// runService runs svc (built with cfg) in the background until the
// returned function, also called when the test ends, cancels it; that
// function returns Run's error, or an error if Run does not return within
// the shutdown timeout plus 10 s. An error ending Run is logged.
func runService(t *testing.T, svc *Service, cfg Config) func() error {
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() {
		err := svc.Run(ctx)
		if err != nil {
			svc.log.Error("run ended", zap.Error(err))
		}
		done <- err
	}()
	var once sync.Once
	var runErr error
	wait := cfg.ShutdownTimeout + 10*time.Second
	stop := func() error {
		once.Do(func() {
			cancel()
			select {
			case runErr = <-done:
			case <-time.After(wait):
				runErr = fmt.Errorf("service did not stop within %v", wait)
			}
		})
		return runErr
	}
	t.Cleanup(func() { _ = stop() })
	return stop
}

// checkAgainstOffline compares every stored arm state with the state
// BuildOffline builds from the same events, both advanced to s.asOf.
func checkAgainstOffline(t *testing.T, store *state.Store, s stream) *OfflineResult {
	t.Helper()
	ctx := context.Background()
	off, err := BuildOffline(ctx, bytes.NewReader(jsonLines(append(slices.Clone(s.clicks), s.sentinel))), bytes.NewReader(jsonLines(s.convs)),
		OfflineOptions{AsOf: s.asOf, Layout: estimator.Layout{Window: testWindow}})
	if err != nil {
		t.Fatal(err)
	}
	ids, err := store.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	var want []string
	for _, e := range off.Experiments {
		want = append(want, e.Name)
	}
	if !slices.Equal(ids, want) {
		t.Fatalf("stored experiments %v, offline %v", ids, want)
	}
	for _, e := range off.Experiments {
		ex, err := store.Load(ctx, e.Name)
		if err != nil {
			t.Fatal(err)
		}
		var arms []string
		for _, a := range e.Arms {
			arms = append(arms, a.Name)
		}
		if !slices.Equal(ex.Arms, arms) {
			t.Fatalf("%s: stored arms %v, offline %v", e.Name, ex.Arms, arms)
		}
		for _, a := range e.Arms {
			got := ex.States[a.Name].Clone()
			got.Advance(s.asOf)
			if g, w := got.Snapshot(), a.State.Snapshot(); !reflect.DeepEqual(g, w) {
				t.Errorf("%s/%s: streamed state differs from offline:\n got clicks %d conv %d matured %d/%d delays %d\nwant clicks %d conv %d matured %d/%d delays %d",
					e.Name, a.Name, got.Clicks(), got.Conversions(), g.MaturedClicks, g.MaturedConversions, g.DelayCount,
					a.State.Clicks(), a.State.Conversions(), w.MaturedClicks, w.MaturedConversions, w.DelayCount)
			}
		}
	}
	return off
}

// checkReasons compares dead letters by reason with the offline join's
// rejections. One difference is expected: a second copy of a conversion
// that waits for its click is refused as a duplicate at once, while the
// offline join refuses it for the same reason as the first copy when that
// one fails the window check; so only the sum of those three reasons is
// compared.
func checkReasons(t *testing.T, got, want map[Reason]int) {
	t.Helper()
	joint := []Reason{ReasonDuplicateConversion, ReasonConversionBeforeClick, ReasonConversionAfterWindow}
	sum := func(m map[Reason]int) int {
		n := 0
		for _, r := range joint {
			n += m[r]
		}
		return n
	}
	if sum(got) != sum(want) {
		t.Errorf("dead letters for %v: %d, offline %d (got %v, want %v)", joint, sum(got), sum(want), got, want)
	}
	for r, n := range want {
		if !slices.Contains(joint, r) && got[r] != n {
			t.Errorf("dead letters with reason %s: %d, offline %d (got %v, want %v)", r, got[r], n, got, want)
		}
	}
	for r, n := range got {
		if _, ok := want[r]; !ok && !slices.Contains(joint, r) {
			t.Errorf("dead letters with reason %s: %d, offline none", r, n)
		}
	}
}

// deadLetterReasons counts dead letters by reason.
func deadLetterReasons(t *testing.T, msgs []kafka.Message) map[Reason]int {
	t.Helper()
	out := map[Reason]int{}
	for _, m := range msgs {
		var d DeadLetter
		if err := json.Unmarshal(m.Value, &d); err != nil {
			t.Fatalf("dead letter %s: %v", m.Value, err)
		}
		if d.Topic == "" || len(d.Value) == 0 || string(m.Key) != d.origin() {
			t.Errorf("dead letter without its origin or bytes: key %q value %s", m.Key, m.Value)
		}
		out[d.Reason]++
	}
	return out
}

// offlineReasons counts BuildOffline's rejections by the reason the
// streaming join gives the same event: a conversion of an unknown click
// waits for it and then expires.
func offlineReasons(off *OfflineResult) map[Reason]int {
	out := map[Reason]int{}
	for _, r := range off.Rejections {
		reason := r.Reason
		if reason == ReasonUnknownClick {
			reason = ReasonOrphanExpired
		}
		out[reason]++
	}
	return out
}

func TestEndToEndMatchesOffline(t *testing.T) {
	env := newTestEnv(t, 3)
	s := genStream(1, 3000, time.Hour)
	cfg := env.config("e2e")
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks)
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)

	svc, stop := env.start(t, cfg, testLogger(t), testHooks{}, nil)
	env.finish(t, cfg, s)
	if err := svc.Ready(context.Background()); err != nil {
		t.Errorf("ready while consuming: %v", err)
	}
	if err := stop(); err != nil {
		t.Fatalf("run: %v", err)
	}
	off := checkAgainstOffline(t, env.store, s)
	if off.SelfAttributed == 0 || len(off.Rejections) == 0 {
		t.Fatalf("generated stream lacks self-attributed (%d) or rejected (%d) events", off.SelfAttributed, len(off.Rejections))
	}

	got := deadLetterReasons(t, env.readAll(t, cfg.Kafka.DeadLetterTopic))
	checkReasons(t, got, offlineReasons(off))

	// Allocations: published with increasing seq per experiment, and the
	// latest one served equals the last one published.
	allocs := env.readAll(t, cfg.Kafka.AllocationTopic)
	if len(allocs) == 0 {
		t.Fatal("no allocation published")
	}
	lastSeq := map[string]int64{}
	lastMsg := map[string][]byte{}
	for _, m := range allocs {
		var a Allocation
		if err := json.Unmarshal(m.Value, &a); err != nil {
			t.Fatalf("allocation %s: %v", m.Value, err)
		}
		if string(m.Key) != a.Experiment || a.Seq != lastSeq[a.Experiment]+1 || len(a.Weights) == 0 || a.Status == "" {
			t.Errorf("allocation key %q seq %d after %d: %s", m.Key, a.Seq, lastSeq[a.Experiment], m.Value)
		}
		lastSeq[a.Experiment] = a.Seq
		lastMsg[a.Experiment] = m.Value
	}
	for id, want := range lastMsg {
		got, ok, err := svc.LatestAllocation(context.Background(), id)
		if err != nil || !ok || !bytes.Equal(got, want) {
			t.Errorf("latest allocation of %s = %s, %v, %v; want %s", id, got, ok, err, want)
		}
	}
}

// testLogger logs warnings and errors to the test log (and, with
// RIPEN_TEST_LOG set, everything to stderr as it happens).
func testLogger(t *testing.T) *zap.Logger {
	if os.Getenv("RIPEN_TEST_LOG") != "" {
		l, _ := zap.NewDevelopment()
		return l
	}
	return zaptest.NewLogger(t, zaptest.Level(zap.WarnLevel))
}
