package consumer

import (
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
)

// Metrics are the Prometheus series of `ripen run`. All are created by
// NewMetrics; counters and gauges with labels are vectors.
type Metrics struct {
	// EventsConsumed counts events read from Kafka, by topic.
	EventsConsumed *prometheus.CounterVec
	// EventsRejected counts rejected events (and control messages), by
	// reason (a Reason value).
	EventsRejected *prometheus.CounterVec
	// DeadLetterPublished counts messages written to the dead-letter topic.
	DeadLetterPublished prometheus.Counter
	// FlushDuration observes the wall time of one batch flush to Redis.
	FlushDuration prometheus.Histogram
	// FlushStageDuration observes the wall time of each stage of a flush,
	// by stage: join (decode, click index, lookups), delta (per-experiment
	// deltas) and apply (Redis apply with offsets, dead letters, resume
	// offsets, commit).
	FlushStageDuration *prometheus.HistogramVec
	// RefitDuration observes the wall time of one experiment's refit.
	RefitDuration prometheus.Histogram
	// ConsumerLag is, per topic and partition, the partition's end offset
	// minus the group's committed offset, in messages.
	ConsumerLag *prometheus.GaugeVec
	// AllocationsPublished counts allocation messages written to Kafka.
	AllocationsPublished prometheus.Counter
	// Watermark is the event-time watermark as Unix seconds.
	Watermark prometheus.Gauge
	// RedisUp is 1 while the last Redis call succeeded, 0 otherwise.
	RedisUp prometheus.Gauge
	// Experiments is the number of experiments known (discovered or
	// configured).
	Experiments prometheus.Gauge
	// HoldbackOverflows counts flushes that applied held-back events early
	// because pipeline.holdback_cap was reached; each may make a refit see
	// events after its tick, so replays may differ.
	HoldbackOverflows prometheus.Counter
	// OrphansParked counts conversions parked to wait for their click,
	// the costly path of the join.
	OrphansParked prometheus.Counter
}

// Stages of a flush, the label values of FlushStageDuration.
const (
	stageJoin  = "join"
	stageDelta = "delta"
	stageApply = "apply"
)

// knownReasons are the rejection reasons pre-set to zero in EventsRejected
// so their series exist before the first rejection.
var knownReasons = []Reason{
	ReasonMalformedJSON, ReasonLineTooLong, ReasonDuplicateField, ReasonMissingField,
	ReasonWrongType, ReasonEmptyField, ReasonFieldTooLong, ReasonInvalidText,
	ReasonBadTimestamp, ReasonAbsurdTimestamp, ReasonDuplicateClick, ReasonUnknownClick,
	ReasonAttributionMismatch, ReasonConversionBeforeClick, ReasonConversionAfterWindow,
	ReasonDuplicateConversion, ReasonOrphanExpired, ReasonCapExceeded, ReasonLayoutMismatch,
	ReasonBadControl, ReasonMissingAttribution,
}

// NewMetrics creates the metrics and registers them on reg, panicking (as
// prometheus.MustRegister does) when a name is already registered there. A
// nil reg creates unregistered metrics, for tests.
func NewMetrics(reg prometheus.Registerer) *Metrics {
	m := &Metrics{
		EventsConsumed: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "ripen_events_consumed_total",
			Help: "Events read from Kafka, by topic.",
		}, []string{"topic"}),
		EventsRejected: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "ripen_events_rejected_total",
			Help: "Rejected events and control messages, by reason.",
		}, []string{"reason"}),
		DeadLetterPublished: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ripen_deadletter_published_total",
			Help: "Messages written to the dead-letter topic.",
		}),
		FlushDuration: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "ripen_flush_duration_seconds",
			Help: "Wall time of one batch flush to Redis.",
			// 1ms to about 16s.
			Buckets: prometheus.ExponentialBuckets(0.001, 2, 15),
		}),
		FlushStageDuration: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "ripen_flush_stage_duration_seconds",
			Help: "Wall time of one stage (join, delta, apply) of a batch flush.",
			// 0.1ms to about 3s.
			Buckets: prometheus.ExponentialBuckets(0.0001, 2, 15),
		}, []string{"stage"}),
		RefitDuration: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "ripen_refit_duration_seconds",
			Help: "Wall time of one experiment refit.",
			// 10ms to about 80s.
			Buckets: prometheus.ExponentialBuckets(0.01, 2, 14),
		}),
		ConsumerLag: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "ripen_consumer_lag",
			Help: "Partition end offset minus the committed offset, in messages.",
		}, []string{"topic", "partition"}),
		AllocationsPublished: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ripen_allocations_published_total",
			Help: "Allocation messages written to Kafka.",
		}),
		Watermark: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ripen_watermark_seconds",
			Help: "Event-time watermark, Unix seconds.",
		}),
		RedisUp: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ripen_redis_up",
			Help: "1 if the last Redis call succeeded, else 0.",
		}),
		Experiments: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ripen_experiments",
			Help: "Number of known experiments.",
		}),
		HoldbackOverflows: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ripen_holdback_overflows_total",
			Help: "Flushes that applied held-back events early because the hold-back cap was reached.",
		}),
		OrphansParked: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ripen_orphans_parked_total",
			Help: "Conversions parked in Redis until their click arrives.",
		}),
	}
	for _, r := range knownReasons {
		m.EventsRejected.WithLabelValues(string(r))
	}
	for _, st := range []string{stageJoin, stageDelta, stageApply} {
		m.FlushStageDuration.WithLabelValues(st)
	}
	if reg != nil {
		reg.MustRegister(m.EventsConsumed, m.EventsRejected, m.DeadLetterPublished,
			m.FlushDuration, m.FlushStageDuration, m.RefitDuration, m.ConsumerLag, m.AllocationsPublished,
			m.Watermark, m.RedisUp, m.Experiments, m.HoldbackOverflows, m.OrphansParked)
	}
	return m
}

// NewRegistry returns a registry holding the Go runtime and process
// collectors, ready for NewMetrics and NewHTTPHandler.
func NewRegistry() *prometheus.Registry {
	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	return reg
}
