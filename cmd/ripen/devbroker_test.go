package main

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"net"
	"net/http"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"ripen/consumer"
	"ripen/state/redistest"
)

// syncBuffer is a bytes.Buffer safe for one writer and one reader.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

func freeAddr(t *testing.T) string {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().String()
}

// TestDevbrokerAndRun starts `ripen devbroker`, runs `ripen run` against
// it and a test Redis, sends a click and a conversion, and checks that the
// state shows up on /v1 and that an interrupt stops both cleanly.
func TestDevbrokerAndRun(t *testing.T) {
	rs := redistest.Start(t)
	brokerAddr := freeAddr(t)
	httpAddr := freeAddr(t)

	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	var out syncBuffer
	broker := newDevbrokerCmd()
	broker.SetArgs([]string{"--addr", brokerAddr, "--partitions", "2"})
	broker.SetOut(&out)
	brokerDone := make(chan error, 1)
	go func() { brokerDone <- broker.ExecuteContext(ctx) }()
	deadline := time.Now().Add(10 * time.Second)
	for !strings.Contains(out.String(), "listening on "+brokerAddr) {
		if time.Now().After(deadline) {
			t.Fatalf("devbroker did not start: %q", out.String())
		}
		time.Sleep(20 * time.Millisecond)
	}

	runCtx, stopRun := context.WithCancel(ctx)
	defer stopRun()
	run := newRunCmd()
	run.SetArgs([]string{"--brokers", brokerAddr, "--redis", "redis://" + rs.Addr() + "/0", "--http", httpAddr, "--group", "smoke"})
	runDone := make(chan error, 1)
	go func() { runDone <- run.ExecuteContext(runCtx) }()

	w := &kafka.Writer{Addr: kafka.TCP(brokerAddr), Balancer: &kafka.Hash{}, RequiredAcks: kafka.RequireAll, BatchTimeout: 5 * time.Millisecond}
	defer w.Close()
	ts := int64(1935619200000)
	click, _ := json.Marshal(consumer.Click{ClickID: "k1", Experiment: "tea-shop-hero", Arm: "green", TS: ts})
	conv, _ := json.Marshal(consumer.Conversion{ClickID: "k1", TS: ts + 60_000})
	wctx, wcancel := context.WithTimeout(ctx, 10*time.Second)
	defer wcancel()
	if err := w.WriteMessages(wctx,
		kafka.Message{Topic: "clicks", Key: []byte("k1"), Value: click},
		kafka.Message{Topic: "conversions", Key: []byte("k1"), Value: conv},
	); err != nil {
		t.Fatal(err)
	}

	// The experiment appears on /v1/experiments once its delta is applied.
	deadline = time.Now().Add(30 * time.Second)
	for {
		body, code := get(t, "http://"+httpAddr+"/v1/experiments")
		if code == http.StatusOK && strings.Contains(body, "tea-shop-hero") {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("experiment not listed: %d %q", code, body)
		}
		time.Sleep(50 * time.Millisecond)
	}
	if body, code := get(t, "http://"+httpAddr+"/readyz"); code != http.StatusOK {
		t.Errorf("/readyz = %d %q while running", code, body)
	}

	stopRun()
	select {
	case err := <-runDone:
		if err != nil {
			t.Errorf("run after interrupt: %v", err)
		}
	case <-time.After(30 * time.Second):
		t.Fatal("run did not stop")
	}
	cancel()
	select {
	case err := <-brokerDone:
		if err != nil {
			t.Errorf("devbroker after interrupt: %v", err)
		}
	case <-time.After(10 * time.Second):
		t.Fatal("devbroker did not stop")
	}
}

func get(t *testing.T, url string) (string, int) {
	t.Helper()
	resp, err := http.Get(url)
	if err != nil {
		return err.Error(), 0 // not listening yet
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return string(b), resp.StatusCode
}
