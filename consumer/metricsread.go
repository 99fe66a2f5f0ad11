package consumer

import (
	"cmp"
	"fmt"
	"math"
	"slices"
	"strconv"

	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
)

// MetricsReading is the service's metrics as read back from the registry
// /metrics exposes, for people and in-process drivers: the same numbers a
// scrape would show.
type MetricsReading struct {
	// Consumed counts events read, by topic.
	Consumed map[string]float64
	// Rejected counts rejected events (each dead-lettered), by reason.
	Rejected map[string]float64
	// DeadLetters counts messages written to the dead-letter topic.
	DeadLetters float64
	// Lag is the consumer lag per partition, by topic then partition.
	Lag []PartitionLag
	// AllocationsPublished counts allocation messages written.
	AllocationsPublished float64
	// Watermark is the event-time watermark, Unix seconds; NaN until the
	// service computed one.
	Watermark float64
	// RedisUp is 1 while the last Redis call succeeded, else 0.
	RedisUp float64
	// Experiments is the number of experiments known.
	Experiments float64
	// HoldbackOverflows and OrphansParked: see Metrics.
	HoldbackOverflows, OrphansParked float64
	// Refits and Flushes count refits and flushes (the histograms'
	// sample counts).
	Refits, Flushes uint64
}

// PartitionLag is one partition's consumer lag, in messages.
type PartitionLag struct {
	Topic     string
	Partition int
	Lag       float64
}

// ReadMetrics reads the series NewMetrics registers from g. Series not
// registered there read as zero (Watermark as NaN).
func ReadMetrics(g prometheus.Gatherer) (MetricsReading, error) {
	fams, err := g.Gather()
	if err != nil {
		return MetricsReading{}, fmt.Errorf("read metrics: %w", err)
	}
	r := MetricsReading{Consumed: map[string]float64{}, Rejected: map[string]float64{}, Watermark: math.NaN()}
	for _, f := range fams {
		for _, m := range f.GetMetric() {
			switch f.GetName() {
			case "ripen_events_consumed_total":
				r.Consumed[label(m, "topic")] = m.GetCounter().GetValue()
			case "ripen_events_rejected_total":
				r.Rejected[label(m, "reason")] = m.GetCounter().GetValue()
			case "ripen_deadletter_published_total":
				r.DeadLetters = m.GetCounter().GetValue()
			case "ripen_consumer_lag":
				p, _ := strconv.Atoi(label(m, "partition"))
				r.Lag = append(r.Lag, PartitionLag{Topic: label(m, "topic"), Partition: p, Lag: m.GetGauge().GetValue()})
			case "ripen_allocations_published_total":
				r.AllocationsPublished = m.GetCounter().GetValue()
			case "ripen_watermark_seconds":
				if v := m.GetGauge().GetValue(); v != 0 {
					r.Watermark = v
				}
			case "ripen_redis_up":
				r.RedisUp = m.GetGauge().GetValue()
			case "ripen_experiments":
				r.Experiments = m.GetGauge().GetValue()
			case "ripen_holdback_overflows_total":
				r.HoldbackOverflows = m.GetCounter().GetValue()
			case "ripen_orphans_parked_total":
				r.OrphansParked = m.GetCounter().GetValue()
			case "ripen_refit_duration_seconds":
				r.Refits = m.GetHistogram().GetSampleCount()
			case "ripen_flush_duration_seconds":
				r.Flushes = m.GetHistogram().GetSampleCount()
			}
		}
	}
	slices.SortFunc(r.Lag, func(a, b PartitionLag) int {
		return cmp.Or(cmp.Compare(a.Topic, b.Topic), cmp.Compare(a.Partition, b.Partition))
	})
	return r, nil
}

func label(m *dto.Metric, name string) string {
	for _, l := range m.GetLabel() {
		if l.GetName() == name {
			return l.GetValue()
		}
	}
	return ""
}
