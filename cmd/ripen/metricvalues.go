package main

import (
	"math"

	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
)

// The demo reads the service's metrics in process.

// sampleCount reads a histogram's sample count.
func sampleCount(h prometheus.Histogram) uint64 {
	var m dto.Metric
	if err := h.Write(&m); err != nil {
		return 0
	}
	return m.GetHistogram().GetSampleCount()
}

// gaugeValue reads a gauge's value (NaN if it cannot be read).
func gaugeValue(g prometheus.Gauge) float64 {
	var m dto.Metric
	if err := g.Write(&m); err != nil {
		return math.NaN()
	}
	return m.GetGauge().GetValue()
}
