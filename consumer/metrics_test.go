package consumer

import (
	"context"
	"strconv"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
)

// findMetric returns the series of family name whose labels include
// labels, and false when there is none.
func findMetric(t *testing.T, reg prometheus.Gatherer, name string, labels map[string]string) (*dto.Metric, dto.MetricType, bool) {
	t.Helper()
	fams, err := reg.Gather()
	if err != nil {
		t.Fatalf("gather: %v", err)
	}
	for _, f := range fams {
		if f.GetName() != name {
			continue
		}
	series:
		for _, m := range f.GetMetric() {
			have := map[string]string{}
			for _, l := range m.GetLabel() {
				have[l.GetName()] = l.GetValue()
			}
			for k, v := range labels {
				if have[k] != v {
					continue series
				}
			}
			return m, f.GetType(), true
		}
	}
	return nil, 0, false
}

// gaugeValue returns the value of a gauge or counter series, failing the
// test when the series is missing.
func gaugeValue(t *testing.T, reg prometheus.Gatherer, name string, labels map[string]string) float64 {
	t.Helper()
	m, typ, ok := findMetric(t, reg, name, labels)
	if !ok {
		t.Fatalf("no series %s%v", name, labels)
	}
	switch typ {
	case dto.MetricType_GAUGE:
		return m.GetGauge().GetValue()
	case dto.MetricType_COUNTER:
		return m.GetCounter().GetValue()
	}
	t.Fatalf("%s is a %v, not a gauge or counter", name, typ)
	return 0
}

// histogramCount returns the number of observations of a histogram.
func histogramCount(t *testing.T, reg prometheus.Gatherer, name string) uint64 {
	t.Helper()
	m, typ, ok := findMetric(t, reg, name, nil)
	if !ok || typ != dto.MetricType_HISTOGRAM {
		t.Fatalf("no histogram %s", name)
	}
	return m.GetHistogram().GetSampleCount()
}

// TestMetricsAfterRun runs the service over a stream and checks its
// metrics against what happened: events consumed per topic equal the
// messages on each topic (one instance, no redelivery), flush and refit
// histograms count every flush and refit, the lag gauge exists for every
// partition and reads 0 once everything is consumed, the allocation and
// dead-letter counters equal the messages on those topics, and rejections
// by reason equal the dead letters by reason.
func TestMetricsAfterRun(t *testing.T) {
	const partitions = 3
	env := newTestEnv(t, partitions)
	s := genStream(41, 2000, time.Hour)
	cfg := env.config("metrics")
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks)
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)

	reg := prometheus.NewRegistry()
	metrics := NewMetrics(reg)
	rec := newRefitRecorder()
	_, stop := env.startDeps(t, cfg, Deps{Logger: testLogger(t), Metrics: metrics, Refit: rec.refit})
	env.finish(t, cfg, s)
	if err := stop(); err != nil {
		t.Fatalf("run: %v", err)
	}

	for topic, want := range map[string]int{cfg.Kafka.ClickTopic: len(s.clicks) + 1, cfg.Kafka.ConversionTopic: len(s.convs)} {
		if got := gaugeValue(t, reg, "ripen_events_consumed_total", map[string]string{"topic": topic}); got != float64(want) {
			t.Errorf("ripen_events_consumed_total{topic=%q} = %v, want %d", topic, got, want)
		}
	}
	if n := histogramCount(t, reg, "ripen_flush_duration_seconds"); n == 0 {
		t.Error("ripen_flush_duration_seconds observed no flush")
	}
	if n, want := histogramCount(t, reg, "ripen_refit_duration_seconds"), rec.count(); n == 0 || n != uint64(want) {
		t.Errorf("ripen_refit_duration_seconds observed %d refits, the refit function ran %d times (want equal and > 0)", n, want)
	}
	for _, topic := range []string{cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic} {
		for p := range partitions {
			lbl := map[string]string{"topic": topic, "partition": strconv.Itoa(p)}
			if lag := gaugeValue(t, reg, "ripen_consumer_lag", lbl); lag != 0 {
				t.Errorf("ripen_consumer_lag%v = %v after consuming everything, want 0", lbl, lag)
			}
		}
	}
	allocs := env.readAll(t, cfg.Kafka.AllocationTopic)
	if got := gaugeValue(t, reg, "ripen_allocations_published_total", nil); len(allocs) == 0 || got != float64(len(allocs)) {
		t.Errorf("ripen_allocations_published_total = %v, allocation topic holds %d messages (want equal and > 0)", got, len(allocs))
	}
	dls := env.readAll(t, cfg.Kafka.DeadLetterTopic)
	if got := gaugeValue(t, reg, "ripen_deadletter_published_total", nil); got != float64(len(dls)) {
		t.Errorf("ripen_deadletter_published_total = %v, dead-letter topic holds %d messages", got, len(dls))
	}
	for r, n := range deadLetterReasons(t, dls) {
		if got := gaugeValue(t, reg, "ripen_events_rejected_total", map[string]string{"reason": string(r)}); got != float64(n) {
			t.Errorf("ripen_events_rejected_total{reason=%q} = %v, dead letters with that reason %d", r, got, n)
		}
	}
	if got := gaugeValue(t, reg, "ripen_redis_up", nil); got != 1 {
		t.Errorf("ripen_redis_up = %v after a healthy run, want 1", got)
	}
	if wm := gaugeValue(t, reg, "ripen_watermark_seconds", nil); wm <= float64(streamT0)/1000 || wm > float64(s.asOf)/1000 {
		t.Errorf("ripen_watermark_seconds = %v, want within the stream (%d, %d]", wm, streamT0/1000, s.asOf/1000)
	}
	ids, err := env.store.Experiments(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	if got := gaugeValue(t, reg, "ripen_experiments", nil); got != float64(len(ids)) {
		t.Errorf("ripen_experiments = %v, stored experiments %d", got, len(ids))
	}
}
