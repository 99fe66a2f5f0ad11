package consumer

import (
	"context"
	"maps"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/redis/go-redis/v9"
	"github.com/segmentio/kafka-go"
	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"
	"go.uber.org/zap/zaptest/observer"

	"ripen/state"
)

// readyz answers GET /readyz through the service's HTTP handler.
func readyz(h http.Handler) (int, string) {
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, httptest.NewRequest(http.MethodGet, "/readyz", nil))
	return rec.Code, rec.Body.String()
}

// committedOffsets returns the group's committed offset per partition of
// the click and conversion topics.
func committedOffsets(t *testing.T, env *testEnv, cfg Config, partitions int) map[state.TopicPartition]int64 {
	t.Helper()
	client := &kafka.Client{Addr: kafka.TCP(env.brokers...)}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	parts := make([]int, partitions)
	for i := range parts {
		parts[i] = i
	}
	resp, err := client.OffsetFetch(ctx, &kafka.OffsetFetchRequest{GroupID: cfg.Kafka.Group,
		Topics: map[string][]int{cfg.Kafka.ClickTopic: parts, cfg.Kafka.ConversionTopic: parts}})
	if err != nil {
		t.Fatal(err)
	}
	out := map[state.TopicPartition]int64{}
	for topic, ps := range resp.Topics {
		for _, p := range ps {
			out[state.TopicPartition{Topic: topic, Partition: p.Partition}] = p.CommittedOffset
		}
	}
	return out
}

// checkCommittedEqualsResume checks that the offsets the group committed
// to Kafka equal the resume offsets in Redis, partition by partition, and
// that something was committed.
func checkCommittedEqualsResume(t *testing.T, env *testEnv, cfg Config, partitions int) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	committed := 0
	for tp, off := range committedOffsets(t, env, cfg, partitions) {
		want, err := env.store.Resume(ctx, tp.Topic, tp.Partition)
		if err != nil {
			want = -1
		}
		if off >= 0 {
			committed++
		}
		if off != want {
			t.Errorf("%s/%d: committed %d, resume %d", tp.Topic, tp.Partition, off, want)
		}
	}
	if committed == 0 {
		t.Error("nothing committed")
	}
}

// TestRedisOutageLosesNothing stops Redis in the middle of the stream
// (keeping its data, as a server with an append-only file would) while
// events keep arriving, and checks that the service reports not ready on
// /readyz and ripen_redis_up, retries with doubling backoff, commits
// nothing to Kafka while Redis is down, becomes ready again once Redis is
// back, and ends with exactly the offline join's state and dead letters.
func TestRedisOutageLosesNothing(t *testing.T) {
	const partitions = 3
	env := newTestEnv(t, partitions)
	s := genStream(31, 3000, time.Hour)
	cfg := env.config("outage")
	cfg.Pipeline.FlushEvents = 200
	span := int64(3000 * 2000)
	cut := []int64{streamT0 + span/2}
	clicks := splitByTime(t, s.clicks, true, cut)
	convs := splitByTime(t, s.convs, false, cut)

	reg := prometheus.NewRegistry()
	metrics := NewMetrics(reg)
	core, logs := observer.New(zap.WarnLevel)
	log := zap.New(zapcore.NewTee(core, testLogger(t).Core()))
	// A client that gives up on a refused dial at once (go-redis retries
	// dials five times by default), so the service's own retry loop is
	// what the test sees.
	rdb := redis.NewClient(&redis.Options{Addr: env.redis.Addr(), MaxRetries: -1, DialerRetries: 1, DialerRetryTimeout: 10 * time.Millisecond})
	t.Cleanup(func() { _ = rdb.Close() })
	store, err := state.New(rdb, state.Options{})
	if err != nil {
		t.Fatal(err)
	}
	svc, stop := env.startDeps(t, cfg, Deps{Store: store, Logger: log, Metrics: metrics})
	h := NewHTTPHandler(svc, reg, log)

	env.produce(t, cfg.Kafka.ClickTopic, clicks[0])
	env.produce(t, cfg.Kafka.ConversionTopic, convs[0])
	env.waitConsumed(t, cfg, 60*time.Second)
	waitReady(t, svc)
	if code, body := readyz(h); code != http.StatusOK {
		t.Fatalf("/readyz before the outage: %d %s", code, body)
	}
	before := committedOffsets(t, env, cfg, partitions)

	env.redis.StopKeepingData()
	env.produce(t, cfg.Kafka.ClickTopic, clicks[1])
	env.produce(t, cfg.Kafka.ConversionTopic, convs[1])

	// Not ready while Redis is down, with the reason.
	deadline := time.Now().Add(20 * time.Second)
	for {
		code, body := readyz(h)
		if code == http.StatusServiceUnavailable && strings.Contains(body, "redis") {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("/readyz during the outage: %d %s, want 503 naming redis", code, body)
		}
		time.Sleep(20 * time.Millisecond)
	}
	if v := gaugeValue(t, reg, "ripen_redis_up", nil); v != 0 {
		t.Errorf("ripen_redis_up = %v during the outage, want 0", v)
	}
	// Retries back off: wait for four of them, each waiting twice as long
	// as the one before (up to the cap).
	var backoffs []time.Duration
	deadline = time.Now().Add(20 * time.Second)
	for len(backoffs) < 4 {
		backoffs = backoffs[:0]
		for _, e := range logs.FilterMessage("retrying").All() {
			if d, ok := e.ContextMap()["backoff"].(time.Duration); ok {
				backoffs = append(backoffs, d)
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("%d retries logged within 20s of the outage, want 4", len(backoffs))
		}
		time.Sleep(20 * time.Millisecond)
	}
	for i := 1; i < len(backoffs); i++ {
		if want := min(2*backoffs[i-1], backoffMax); backoffs[i] != want {
			t.Errorf("retry %d waited %v after %v, want %v", i+1, backoffs[i], backoffs[i-1], want)
		}
	}
	if got := committedOffsets(t, env, cfg, partitions); !maps.Equal(got, before) {
		t.Errorf("offsets committed while Redis was down: %v, before %v", got, before)
	}

	env.redis.RestartKeepingData()
	waitReady(t, svc)
	if code, body := readyz(h); code != http.StatusOK {
		t.Errorf("/readyz after the outage: %d %s", code, body)
	}
	if v := gaugeValue(t, reg, "ripen_redis_up", nil); v != 1 {
		t.Errorf("ripen_redis_up = %v after the outage, want 1", v)
	}
	env.finish(t, cfg, s)
	if err := stop(); err != nil {
		t.Fatalf("run: %v", err)
	}
	off := checkAgainstOffline(t, env.store, s)
	checkReasons(t, deadLetterReasons(t, env.readAll(t, cfg.Kafka.DeadLetterTopic)), offlineReasons(off))
}
