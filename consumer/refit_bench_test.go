package consumer

import (
	"fmt"
	"math/rand/v2"
	"testing"
	"time"

	"ripen/estimator"
)

// benchArmStates returns k arm states of 20,000 clicks each, clicked
// uniformly over ten days and fitted as of the end (7-day window), with
// conversion rates from 4% to 4%+k·0.5% and exponential delays (mean one
// day) truncated at the window.
func benchArmStates(k int) []*estimator.ArmState {
	const clicks = 20_000
	day := 24 * time.Hour.Milliseconds()
	asOf := streamT0 + 10*day
	layout := estimator.Layout{}.WithDefaults()
	out := make([]*estimator.ArmState, k)
	for i := range out {
		r := rand.New(rand.NewPCG(uint64(i), 77))
		q := 0.04 + 0.005*float64(i)
		s := estimator.NewArmState(layout)
		s.Advance(asOf)
		for range clicks {
			ct := streamT0 + r.Int64N(10*day)
			s.AddClicks(ct, 1)
			if r.Float64() < q {
				d := int64(r.ExpFloat64() * float64(day))
				if d <= layout.Window.Milliseconds() && ct+d <= asOf {
					s.AddConversion(ct, ct+d)
				}
			}
		}
		out[i] = s
	}
	return out
}

// BenchmarkRefitExperiments evaluates 1,000 experiments of 4 arms each
// (EvaluateExperiment with the default fit and allocation options, as a
// refit tick does) and reports the cost per experiment.
func BenchmarkRefitExperiments(b *testing.B) {
	const experiments, arms = 1000, 4
	base := benchArmStates(8)
	asOf := base[0].Watermark()
	inputs := make([]estimator.ExperimentInput, experiments)
	for e := range inputs {
		in := estimator.ExperimentInput{
			Experiment: fmt.Sprintf("bench-exp-%04d", e),
			AsOf:       asOf,
			Allocation: estimator.DefaultAllocationOptions(),
		}
		for a := range arms {
			in.Arms = append(in.Arms, estimator.ArmData{Arm: fmt.Sprintf("arm-%d", a), State: base[(e+a)%len(base)]})
		}
		inputs[e] = in
	}
	b.ResetTimer()
	for range b.N {
		for _, in := range inputs {
			if _, err := estimator.EvaluateExperiment(in); err != nil {
				b.Fatal(err)
			}
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*experiments), "ns/experiment")
}
