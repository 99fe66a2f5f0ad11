package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"os/exec"
	"strings"
	"testing"

	"github.com/segmentio/kafka-go"
)

// TestBench runs `ripen bench` on a small workload and checks the JSON
// report: every documented key is present, rates and byte counts are
// positive, the ratio is the one the rounds give, and the pipeline counted
// every generated click and conversion in Redis.
func TestBench(t *testing.T) {
	if _, err := exec.LookPath("redis-server"); err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("redis-server not on PATH and CI is set: %v", err)
		}
		t.Skipf("redis-server not on PATH: %v", err)
	}
	const n = 3000
	cmd := newBenchCmd()
	var out bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetArgs([]string{"--events", "3000", "--format", "json"})
	if err := cmd.ExecuteContext(context.Background()); err != nil {
		t.Fatalf("bench: %v", err)
	}
	var raw map[string]any
	if err := json.Unmarshal(out.Bytes(), &raw); err != nil {
		t.Fatalf("bench output is not JSON: %v\n%s", err, out.String())
	}
	for _, k := range []string{"events", "pipeline_eps", "bare_eps", "ratio", "redis_bytes_per_arm", "redis_bytes_per_pending_click"} {
		if _, ok := raw[k]; !ok {
			t.Errorf("bench JSON lacks %q: %s", k, out.String())
		}
	}
	var r benchResult
	if err := json.Unmarshal(out.Bytes(), &r); err != nil {
		t.Fatal(err)
	}
	if r.Events != n {
		t.Errorf("events %d, want %d", r.Events, n)
	}
	for name, v := range map[string]float64{"pipeline_eps": r.PipelineEPS, "bare_eps": r.BareEPS, "ratio": r.Ratio,
		"redis_bytes_per_arm": r.RedisBytesPerArm, "redis_bytes_per_pending_click": r.RedisBytesPerPendingClick} {
		if !(v > 0) {
			t.Errorf("%s = %v, want > 0", name, v)
		}
	}
	if len(r.Rounds) != defaultBenchRounds {
		t.Fatalf("%d rounds, want %d", len(r.Rounds), defaultBenchRounds)
	}
	var ratios, ticked []float64
	for _, run := range r.Rounds {
		ratios = append(ratios, run.BareSeconds/run.PipelineSeconds)
		ticked = append(ticked, run.BareSeconds/run.TickedSeconds)
		if !(run.RedisCPUSeconds > 0) || !(run.TickedRedisCPUSeconds > 0) {
			t.Errorf("round %+v: want positive Redis CPU seconds for both runs", run)
		}
	}
	if got := median(ratios); got != r.Ratio {
		t.Errorf("ratio %v, median of the rounds' ratios %v", r.Ratio, got)
	}
	if got := median(ticked); got != r.TickedRatio || !(r.TickedEPS > 0) {
		t.Errorf("ticked ratio %v (%v events/s), median of the rounds' ticked ratios %v", r.TickedRatio, r.TickedEPS, got)
	}
	if r.OrphansParked > float64(r.Generated.Conversions) || r.TickedOrphansParked > float64(r.Generated.Conversions) {
		t.Errorf("orphans parked %v / %v, more than the %d conversions", r.OrphansParked, r.TickedOrphansParked, r.Generated.Conversions)
	}
	if r.Generated.Clicks+r.Generated.Conversions != n || r.Generated.Conversions == 0 {
		t.Errorf("generated %+v, want %d events with some conversions", r.Generated, n)
	}
	if r.Counted != r.Generated {
		t.Errorf("pipeline counted %+v in Redis, generated %+v", r.Counted, r.Generated)
	}

	// The table names both rates and the ratio.
	cmd = newBenchCmd()
	out.Reset()
	cmd.SetOut(&out)
	cmd.SetArgs([]string{"--events", "500"})
	if err := cmd.ExecuteContext(context.Background()); err != nil {
		t.Fatalf("bench table: %v", err)
	}
	for _, want := range []string{"bare reader", "pipeline", "pipeline/bare", "ticked pipeline/bare", "orphans parked", "redis bytes per arm", "redis bytes per pending click"} {
		if !strings.Contains(out.String(), want) {
			t.Errorf("table lacks %q:\n%s", want, out.String())
		}
	}
}

// TestBenchFlagErrors checks that bad flags are refused with exit code 2.
func TestBenchFlagErrors(t *testing.T) {
	for _, args := range [][]string{{"--events", "0"}, {"--format", "xml"}} {
		t.Run(strings.Join(args, " "), func(t *testing.T) {
			cmd := newBenchCmd()
			cmd.SetOut(&bytes.Buffer{})
			cmd.SetErr(&bytes.Buffer{})
			cmd.SetArgs(args)
			err := cmd.ExecuteContext(context.Background())
			ee, ok := err.(*exitError)
			if !ok || ee.code != 2 {
				t.Errorf("bench %v: error %v, want exit code 2", args, err)
			}
		})
	}
}

// TestBenchEventsInTimeOrder checks that each generated topic is in event
// time order, as a producer writing events when they happen leaves it.
func TestBenchEventsInTimeOrder(t *testing.T) {
	ev := genBenchEvents(20_000)
	for _, topic := range []struct {
		name string
		msgs []kafka.Message
	}{{"clicks", ev.clicks}, {"conversions", ev.convs}} {
		var last int64
		for i, m := range topic.msgs {
			var v struct {
				TS int64 `json:"ts"`
			}
			if err := json.Unmarshal(m.Value, &v); err != nil {
				t.Fatalf("%s %d: %v", topic.name, i, err)
			}
			if v.TS < last {
				t.Fatalf("%s %d at %d, before its predecessor at %d", topic.name, i, v.TS, last)
			}
			last = v.TS
		}
	}
	if len(ev.convs) == 0 {
		t.Fatal("no conversions generated")
	}
}
