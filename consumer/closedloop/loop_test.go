package closedloop

import (
	"math"
	"testing"
)

func TestWeightsFor(t *testing.T) {
	arms := []string{"a", "b", "c"}
	prev := []float64{0.2, 0.3, 0.5}
	for _, tc := range []struct {
		name string
		pub  map[string]float64
		want []float64
	}{
		{"normalised", map[string]float64{"a": 1, "b": 1, "c": 2}, []float64{0.25, 0.25, 0.5}},
		{"missing arm keeps prev", map[string]float64{"a": 1, "b": 1}, prev},
		{"negative keeps prev", map[string]float64{"a": 1, "b": -1, "c": 1}, prev},
		{"all zero keeps prev", map[string]float64{"a": 0, "b": 0, "c": 0}, prev},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got := WeightsFor(arms, tc.pub, prev)
			for i := range got {
				if math.Abs(got[i]-tc.want[i]) > 1e-12 {
					t.Fatalf("WeightsFor = %v, want %v", got, tc.want)
				}
			}
		})
	}
}
