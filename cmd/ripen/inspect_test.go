package main

import (
	"context"
	"encoding/json"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"ripen/consumer/kafkatest"
	"ripen/estimator"
)

// seedInspect stores an invented experiment with two arms and a report
// of the shape EvaluateExperiment produces.
func seedInspect(t *testing.T) (url string) {
	t.Helper()
	url, st, _ := newCmdStore(t, "kiosk")
	seedArm(t, st, "hero-copy", "plain", 80, 4, 0, 20)
	seedArm(t, st, "hero-copy", "bold", 64, 8, 1, 7)
	report := estimator.ExperimentReport{
		Experiment: "hero-copy", AsOf: "2026-02-02T02:10:00Z", Status: estimator.StatusAdapting,
		Policy: estimator.PolicyThompsonBayes, Leader: "bold",
		Weights: map[string]float64{"plain": 0.3, "bold": 0.7},
		Arms: []estimator.ArmReport{
			{Arm: "plain", Clicks: 80, Conversions: 4, EventualCVR: 0.081, CVRLow: 0.04, CVRHigh: 0.15, PBest: 0.2, Weight: 0.3},
			{Arm: "bold", Clicks: 64, Conversions: 8, EventualCVR: 0.19, CVRLow: 0.11, CVRHigh: 0.29, PBest: 0.8, Weight: 0.7},
		},
	}
	b, err := json.Marshal(report)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := st.SaveAllocation(context.Background(), "hero-copy", b); err != nil {
		t.Fatal(err)
	}
	if _, err := st.SaveAllocation(context.Background(), "hero-copy", b); err != nil {
		t.Fatal(err)
	}
	if err := st.SetResume(context.Background(), "clicks", 0, 4); err != nil {
		t.Fatal(err)
	}
	return url
}

func TestInspectTable(t *testing.T) {
	url := seedInspect(t)
	out, err := runSub(t, newInspectCmd(), "--redis", url, "--prefix", "kiosk")
	if err != nil {
		t.Fatalf("inspect: %v", err)
	}
	wm := time.UnixMilli(cmdT0 + 600_000).UTC().Format(time.RFC3339)
	tableRow(t, out, "hero-copy", wm, "2", "#2", "2026-02-02T02:10:00Z", "adapting", estimator.PolicyThompsonBayes, "bold")
	// EXPERIMENT ARM CLICKS CONVERSIONS HELD OBSERVED EVENTUAL [LOW, HIGH] P(BEST) WEIGHT STATUS
	for _, want := range [][]string{
		{"hero-copy", "bold", "64", "8", "0", "12.50%", "19.00%", "[11.00%,", "29.00%]", "0.800", "0.700", "adapting"},
		{"hero-copy", "plain", "80", "4", "0", "5.00%", "8.10%", "[4.00%,", "15.00%]", "0.200", "0.300", "adapting"},
	} {
		if got := tableRow(t, out, want[:2]...); strings.Join(got, " ") != strings.Join(want, " ") {
			t.Errorf("arm row %q, want %q\n%s", got, want, out)
		}
	}
	tableRow(t, out, "hero-copy", "clicks/0", "4", "20")
	tableRow(t, out, "hero-copy", "clicks/1", "4", "7")
	tableRow(t, out, "clicks/0", "4")
	if !strings.Contains(out, "lag not shown") {
		t.Errorf("no lag note without --brokers:\n%s", out)
	}
	// Columns are aligned: numbers are right-aligned under their header.
	var header, bold string
	for _, line := range strings.Split(out, "\n") {
		if strings.Contains(line, "CLICKS") && strings.Contains(line, "OBSERVED CVR") {
			header = line
		}
		if f := strings.Fields(line); len(f) > 2 && f[1] == "bold" {
			bold = line
		}
	}
	end := strings.Index(header, "CLICKS") + len("CLICKS")
	if end < len("CLICKS") || len(bold) < end || bold[end-2:end] != "64" {
		t.Errorf("CLICKS column not right-aligned:\n%s\n%s", header, bold)
	}

	if _, err := runSub(t, newInspectCmd(), "--redis", url, "--prefix", "kiosk", "--experiment", "absent"); err == nil {
		t.Fatal("inspect of a missing experiment succeeded")
	}
	only, err := runSub(t, newInspectCmd(), "--redis", url, "--prefix", "kiosk", "--experiment", "hero-copy")
	if err != nil || !strings.Contains(only, "bold") {
		t.Fatalf("inspect --experiment: %v\n%s", err, only)
	}
}

// TestInspectLag produces to an in-process broker and checks the lag of
// the resume offset against the partition's end offset.
func TestInspectLag(t *testing.T) {
	url := seedInspect(t)
	brokers := kafkatest.Start(t, 1, "clicks")
	w := &kafka.Writer{Addr: kafka.TCP(brokers...), Topic: "clicks", Balancer: &kafka.Hash{}, RequiredAcks: kafka.RequireAll, BatchTimeout: 5 * time.Millisecond}
	msgs := make([]kafka.Message, 10)
	for i := range msgs {
		msgs[i] = kafka.Message{Key: []byte("k" + strconv.Itoa(i)), Value: []byte("{}")}
	}
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := w.WriteMessages(ctx, msgs...); err != nil {
		t.Fatalf("produce: %v", err)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	out, err := runSub(t, newInspectCmd(), "--redis", url, "--prefix", "kiosk", "--brokers", strings.Join(brokers, ","))
	if err != nil {
		t.Fatalf("inspect --brokers: %v", err)
	}
	// PARTITION RESUME END LAG: 10 messages written, resume at 4.
	if got := tableRow(t, out, "clicks/0"); strings.Join(got, " ") != "clicks/0 4 10 6" {
		t.Fatalf("lag row %q, want clicks/0 4 10 6\n%s", got, out)
	}
}
