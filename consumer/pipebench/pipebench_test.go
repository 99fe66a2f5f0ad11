package pipebench

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"os/exec"
	"strings"
	"testing"
)

func needRedis(t testing.TB) {
	if _, err := exec.LookPath("redis-server"); err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("redis-server not on PATH and CI is set: %v", err)
		}
		t.Skipf("redis-server not on PATH: %v", err)
	}
}

// TestRun runs the benchmark on a small workload and checks the JSON
// report: every documented key is present, rates, CPU and byte counts are
// positive, each ratio is the median of the rounds', and every pipeline
// run counted every generated click and conversion in Redis.
func TestRun(t *testing.T) {
	needRedis(t)
	const n = 3000
	res, err := Run(context.Background(), Options{Events: n, IndexClicks: 5_000})
	if err != nil {
		t.Fatal(err)
	}
	var out bytes.Buffer
	if err := Write(&out, "json", res); err != nil {
		t.Fatal(err)
	}
	var raw map[string]any
	if err := json.Unmarshal(out.Bytes(), &raw); err != nil {
		t.Fatalf("not JSON: %v\n%s", err, out.String())
	}
	keys := []string{"events", "pipeline_eps", "bare_eps", "ratio", "ticked_pipeline_eps", "ticked_ratio",
		"redis_cpu_us_per_event", "redis_bytes_per_pending_click", "max_bytes_per_arm", "carried", "rounds"}
	for _, k := range keys {
		if _, ok := raw[k]; !ok {
			t.Errorf("JSON lacks %q", k)
		}
	}
	carried, _ := raw["carried"].(map[string]any)
	for _, k := range []string{"pipeline_eps", "ratio", "ticked_ratio", "redis_cpu_us_per_event", "redis_bytes_per_pending_click", "max_bytes_per_arm"} {
		if _, ok := carried[k]; !ok {
			t.Errorf("JSON carried lacks %q", k)
		}
	}
	if res.Events != n || res.Generated.Clicks+res.Generated.Conversions != n || res.Generated.Conversions == 0 {
		t.Errorf("events %d, generated %+v, want %d with some conversions", res.Events, res.Generated, n)
	}
	if res.Counted != res.Generated {
		t.Errorf("counted %+v, generated %+v", res.Counted, res.Generated)
	}
	for name, v := range map[string]float64{
		"bare_eps": res.BareEPS, "pipeline_eps": res.PipelineEPS, "ratio": res.Ratio, "ticked_ratio": res.TickedRatio,
		"redis_cpu_us_per_event": res.RedisCPUUsPerEvent, "redis_bytes_per_pending_click": res.RedisBytesPerPendingClick,
		"max_bytes_per_arm": float64(res.MaxBytesPerArm), "carried.ratio": res.Carried.Ratio,
		"carried.ticked_ratio": res.Carried.TickedRatio, "carried.max_bytes_per_arm": float64(res.Carried.MaxBytesPerArm),
		"index_redis_cpu_us_per_click": res.IndexRedisCPUUsPerClick,
	} {
		if !(v > 0) {
			t.Errorf("%s = %v, want > 0", name, v)
		}
	}
	if len(res.Rounds) != DefaultRounds {
		t.Fatalf("%d rounds, want %d", len(res.Rounds), DefaultRounds)
	}
	var ingest, ticked, cIngest, cTicked []float64
	for _, r := range res.Rounds {
		ingest = append(ingest, r.Bare.Seconds/r.Ingest.Seconds)
		ticked = append(ticked, r.Bare.Seconds/r.Ticked.Seconds)
		cIngest = append(cIngest, r.Bare.Seconds/r.CarriedIngest.Seconds)
		cTicked = append(cTicked, r.Bare.Seconds/r.CarriedTicked.Seconds)
		for _, s := range []RunStats{r.Ingest, r.Ticked, r.CarriedIngest, r.CarriedTicked} {
			if !(s.RedisCPUSeconds > 0) || !(s.ProcessCPUSeconds > 0) || len(s.RedisCommands) == 0 {
				t.Errorf("run %+v: want positive CPU seconds and command stats", s)
			}
			if sum := s.StageSeconds["join"] + s.StageSeconds["delta"] + s.StageSeconds["apply"]; !(sum > 0) || sum > s.FlushSeconds*1.001 || s.FlushSeconds > s.Seconds {
				t.Errorf("run %+v: stages %v take %v s of %v s of flushes", s, s.StageSeconds, sum, s.FlushSeconds)
			}
		}
		if r.CarriedIngest.OrphansParked != 0 || r.CarriedTicked.OrphansParked != 0 {
			t.Errorf("carried runs parked conversions: %+v %+v", r.CarriedIngest, r.CarriedTicked)
		}
	}
	for _, c := range []struct {
		name      string
		got, want float64
	}{{"ratio", res.Ratio, median(ingest)}, {"ticked_ratio", res.TickedRatio, median(ticked)},
		{"carried.ratio", res.Carried.Ratio, median(cIngest)}, {"carried.ticked_ratio", res.Carried.TickedRatio, median(cTicked)}} {
		if c.got != c.want {
			t.Errorf("%s %v, median of the rounds' %v", c.name, c.got, c.want)
		}
	}
	if res.OrphansParked > float64(res.Generated.Conversions) {
		t.Errorf("orphans parked %v, more than the %d conversions", res.OrphansParked, res.Generated.Conversions)
	}

	out.Reset()
	if err := Write(&out, "table", res); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"bare reader", "pipeline/bare", "ticked pipeline/bare", "carried attribution", "redis bytes per pending click", "max bytes per arm", "orphans parked"} {
		if !strings.Contains(out.String(), want) {
			t.Errorf("table lacks %q:\n%s", want, out.String())
		}
	}
	if err := Write(&out, "xml", res); err == nil {
		t.Error("format xml accepted")
	}
}

// TestWorkloadInTimeOrder checks that each generated topic is in event
// time order, as a producer writing events when they happen leaves it,
// and that conversions carry their click's attribution.
func TestWorkloadInTimeOrder(t *testing.T) {
	w := generate(20_000)
	clicks := map[string]struct {
		exp, arm string
		ts       int64
	}{}
	for _, topic := range []struct {
		name  string
		convs bool
	}{{"clicks", false}, {"conversions", true}} {
		msgs := w.clicks
		if topic.convs {
			msgs = w.convs
		}
		var last int64
		for i, m := range msgs {
			var v struct {
				ClickID    string `json:"click_id"`
				Experiment string `json:"experiment"`
				Arm        string `json:"arm"`
				TS         int64  `json:"ts"`
				ClickTS    int64  `json:"click_ts"`
			}
			if err := json.Unmarshal(m.Value, &v); err != nil {
				t.Fatalf("%s %d: %v", topic.name, i, err)
			}
			if v.TS < last {
				t.Fatalf("%s %d at %d, before its predecessor at %d", topic.name, i, v.TS, last)
			}
			last = v.TS
			if !topic.convs {
				clicks[v.ClickID] = struct {
					exp, arm string
					ts       int64
				}{v.Experiment, v.Arm, v.TS}
				continue
			}
			if c := clicks[v.ClickID]; c.exp != v.Experiment || c.arm != v.Arm || c.ts != v.ClickTS {
				t.Fatalf("conversion %d carries %s/%s/%d, its click is %+v", i, v.Experiment, v.Arm, v.ClickTS, c)
			}
		}
	}
	if len(w.convs) == 0 {
		t.Fatal("no conversions generated")
	}
}

func TestOptionsValidate(t *testing.T) {
	for _, o := range []Options{{Events: -1}, {Rounds: -1}, {Partitions: -2}, {IndexClicks: -5}} {
		if err := o.Validate(); err == nil {
			t.Errorf("%+v accepted", o)
		}
	}
	if err := (Options{}).Validate(); err != nil {
		t.Errorf("defaults refused: %v", err)
	}
}

// BenchmarkPipeline runs one round of 200k events per iteration, so that
// `go test -bench Pipeline -cpuprofile` profiles the run pipeline (decode,
// join, aggregate, flush) in this process; the reported ratio is the one
// `ripen bench` prints.
func BenchmarkPipeline(b *testing.B) {
	needRedis(b)
	for b.Loop() {
		res, err := Run(context.Background(), Options{Events: 200_000, Rounds: 1, IndexClicks: 1000})
		if err != nil {
			b.Fatal(err)
		}
		b.ReportMetric(res.Ratio, "pipeline/bare")
		b.ReportMetric(res.Carried.Ratio, "carried/bare")
		b.ReportMetric(res.PipelineEPS, "pipeline_events/s")
	}
}
