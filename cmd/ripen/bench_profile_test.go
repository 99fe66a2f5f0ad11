package main

import (
	"context"
	"os/exec"
	"testing"
)

// BenchmarkBenchPipeline runs one `ripen bench` round of 200k events per
// iteration, so that `go test -bench BenchPipeline -cpuprofile` profiles
// the run pipeline (decode, join, aggregate, flush) in this process; the
// reported pipeline/bare ratio is the one `ripen bench` prints.
func BenchmarkBenchPipeline(b *testing.B) {
	if _, err := exec.LookPath("redis-server"); err != nil {
		b.Skipf("redis-server not on PATH: %v", err)
	}
	for b.Loop() {
		res, err := runBench(context.Background(), benchOptions{Events: 200_000, Rounds: 1})
		if err != nil {
			b.Fatal(err)
		}
		b.ReportMetric(res.Ratio, "pipeline/bare")
		b.ReportMetric(res.PipelineEPS, "pipeline_events/s")
	}
}
