package consumer

import (
	"context"
	"errors"
	"fmt"
	"sync/atomic"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"
)

// TestCrashRestartMatchesOffline stops the service abruptly right after
// the n-th experiment delta was applied (no final flush, no resume offset,
// no commit for that batch), restarts it in the same group, and checks
// that the final state still equals the offline join.
func TestCrashRestartMatchesOffline(t *testing.T) {
	for _, crashAt := range []int64{1, 4, 11} {
		t.Run(fmt.Sprintf("after apply %d", crashAt), func(t *testing.T) {
			env := newTestEnv(t, 3)
			s := genStream(2, 2000, time.Hour)
			cfg := env.config("crash")
			cfg.Pipeline.FlushEvents = 150
			env.produce(t, cfg.Kafka.ClickTopic, s.clicks)
			env.produce(t, cfg.Kafka.ConversionTopic, s.convs)

			var applies atomic.Int64
			crashed := make(chan struct{})
			hooks := testHooks{afterApply: func(string) error {
				if applies.Add(1) == crashAt {
					close(crashed)
					return errCrash
				}
				return nil
			}}
			_, stop := env.start(t, cfg, testLogger(t), hooks, nil)
			select {
			case <-crashed:
			case <-time.After(30 * time.Second):
				t.Fatal("no crash")
			}
			if err := stop(); !errors.Is(err, errCrash) {
				t.Fatalf("crashed run returned %v, want the crash", err)
			}

			_, stop = env.start(t, cfg, testLogger(t), testHooks{}, nil)
			env.finish(t, cfg, s)
			if err := stop(); err != nil {
				t.Fatalf("run after restart: %v", err)
			}
			checkAgainstOffline(t, env.store, s)
		})
	}
}

// splitByTime splits a stream's messages into parts by event time at the
// given cut times (clicks and conversions alike), keeping production order
// within each part.
func splitByTime(t *testing.T, msgs []kafka.Message, click bool, cuts []int64) [][]kafka.Message {
	t.Helper()
	parts := make([][]kafka.Message, len(cuts)+1)
	for _, m := range msgs {
		var ts int64
		if click {
			c, err := DecodeClick(m.Value)
			if err == nil {
				ts = c.TS
			}
		} else {
			v, err := DecodeConversion(m.Value)
			if err == nil {
				ts = v.TS
			}
		}
		k := 0
		for k < len(cuts) && ts >= cuts[k] {
			k++
		}
		parts[k] = append(parts[k], m)
	}
	return parts
}

// TestRebalanceTwoInstances runs two instances in one group, one joining
// and then the other leaving while events arrive, and checks the final
// state against the offline join.
func TestRebalanceTwoInstances(t *testing.T) {
	env := newTestEnv(t, 3)
	// Each instance sweeps expired orphans by its own watermark, which
	// knows nothing of partitions the other instance owns; while one
	// instance lags the other by more than the orphan TTL in event time,
	// conversions whose click is in the lagging instance's partitions
	// would expire early. The TTL here exceeds any lag this test can have
	// (the whole stream spans under three hours).
	orphanTTL := 4 * time.Hour
	s := genStream(3, 3000, orphanTTL)
	cfg := env.config("pair")
	cfg.Pipeline.OrphanTTL = orphanTTL
	cfg.Pipeline.FlushEvents = 200
	span := int64(3000 * 2000)
	cuts := []int64{streamT0 + span/3, streamT0 + 2*span/3}
	clicks := splitByTime(t, s.clicks, true, cuts)
	convs := splitByTime(t, s.convs, false, cuts)

	env.produce(t, cfg.Kafka.ClickTopic, clicks[0])
	env.produce(t, cfg.Kafka.ConversionTopic, convs[0])
	a, stopA := env.start(t, cfg, testLogger(t), testHooks{}, nil)
	env.waitConsumed(t, cfg, 60*time.Second)

	b, stopB := env.start(t, cfg, testLogger(t), testHooks{}, nil)
	waitReady(t, b)
	env.produce(t, cfg.Kafka.ClickTopic, clicks[1])
	env.produce(t, cfg.Kafka.ConversionTopic, convs[1])
	env.waitConsumed(t, cfg, 60*time.Second)

	if err := stopA(); err != nil {
		t.Fatalf("instance A: %v", err)
	}
	_ = a
	env.produce(t, cfg.Kafka.ClickTopic, clicks[2])
	env.produce(t, cfg.Kafka.ConversionTopic, convs[2])
	env.finish(t, cfg, s)
	if err := stopB(); err != nil {
		t.Fatalf("instance B: %v", err)
	}
	checkAgainstOffline(t, env.store, s)
}

// waitReady waits until svc reports ready (in the group, Redis up).
func waitReady(t *testing.T, svc *Service) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		err := svc.Ready(context.Background())
		if err == nil {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("not ready: %v", err)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// TestGracefulShutdown cancels the service while it consumes and checks
// that it returns nil within the shutdown timeout, that the offsets it
// committed to Kafka equal the resume offsets it stored, and that a
// restart completes the state exactly.
func TestGracefulShutdown(t *testing.T) {
	env := newTestEnv(t, 3)
	s := genStream(4, 2000, time.Hour)
	cfg := env.config("graceful")
	cfg.Pipeline.FlushEvents = 100
	cfg.Pipeline.FlushInterval = time.Second // the final flush has a partial batch
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks)
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)

	var applies atomic.Int64
	stopNow := make(chan struct{})
	hooks := testHooks{afterApply: func(string) error {
		if applies.Add(1) == 6 {
			close(stopNow)
		}
		return nil
	}}
	_, stop := env.start(t, cfg, testLogger(t), hooks, nil)
	<-stopNow
	t0 := time.Now()
	if err := stop(); err != nil {
		t.Fatalf("graceful stop returned %v", err)
	}
	if d := time.Since(t0); d > cfg.ShutdownTimeout {
		t.Errorf("stop took %v, shutdown timeout %v", d, cfg.ShutdownTimeout)
	}

	// Committed offsets equal the resume offsets.
	checkCommittedEqualsResume(t, env, cfg, 3)

	_, stop = env.start(t, cfg, testLogger(t), testHooks{}, nil)
	env.finish(t, cfg, s)
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	checkAgainstOffline(t, env.store, s)
}
