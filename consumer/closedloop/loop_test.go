package closedloop

import (
	"context"
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	"ripen/consumer"
	"ripen/estimator/sim"
	"ripen/state/redistest"
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

// TestDriveRefitSeesEventsThroughTick drives the service (in-process
// broker, real redis-server) with a pause after every write, longer than
// the service's idle timeout, so that the partitions of the next write
// look idle meanwhile, and checks that every allocation as of tick T counts exactly the generated
// clicks and conversions with event times up to T: the traffic is
// generated again, chunk by chunk, with the weights the allocations
// published.
func TestDriveRefitSeesEventsThroughTick(t *testing.T) {
	srv := redistest.Start(t)
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	sc, err := sim.ParseScenario(strings.NewReader(`
name: tick-view
horizon: 12h
clicks_per_hour: 300
update_interval: 2h
window: 1d
fit_family: exponential
arms:
  - name: quick
    cvr: 0.3
    delay: {exponential: {mean: 20m}}
  - name: slow
    cvr: 0.2
    delay: {exponential: {mean: 40m}}
seed: 3
`))
	if err != nil {
		t.Fatal(err)
	}
	loop, err := Start(ctx, Options{Scenario: *sc, Redis: srv.Client(), Prefix: "tickview", pauseBetweenWrites: 60 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	defer func() {
		if err := loop.Close(); err != nil {
			t.Error(err)
		}
	}()
	res, err := loop.Drive(ctx, nil)
	if err != nil {
		t.Fatal(err)
	}
	byAsOf := map[string]consumer.Allocation{}
	for _, a := range res.History {
		byAsOf[a.AsOf] = a
	}

	gen, err := sim.NewTraffic(*sc, "qm-")
	if err != nil {
		t.Fatal(err)
	}
	arms := gen.Arms()
	refitMs := sc.UpdateInterval.D().Milliseconds()
	lagMs := (lateness + time.Second).Milliseconds()
	weights := uniform(len(arms))
	clickTS, convTS := make([][]int64, len(arms)), make([][]int64, len(arms))
	upTo := func(ts []int64, tick int64) uint64 {
		var n uint64
		for _, x := range ts {
			if x <= tick {
				n++
			}
		}
		return n
	}
	ticks := int(sc.Horizon.D().Milliseconds() / refitMs)
	for k := 1; k <= ticks; k++ {
		tick := sim.Start + int64(k)*refitMs
		clicks, convs := gen.Chunk(tick+lagMs-sim.Start, weights)
		for _, c := range clicks {
			clickTS[c.Arm] = append(clickTS[c.Arm], c.TS)
		}
		for _, c := range convs {
			convTS[c.Arm] = append(convTS[c.Arm], c.TS)
		}
		asOf := time.UnixMilli(tick).UTC().Format(time.RFC3339)
		a, ok := byAsOf[asOf]
		if !ok {
			t.Errorf("no allocation as of %s", asOf)
			continue
		}
		if len(a.Arms) != len(arms) {
			t.Errorf("%s: %d arms reported, want %d", asOf, len(a.Arms), len(arms))
		}
		for _, r := range a.Arms {
			i := slices.Index(arms, r.Arm)
			if i < 0 {
				t.Errorf("%s: unknown arm %q", asOf, r.Arm)
				continue
			}
			if want := upTo(clickTS[i], tick); r.Clicks != want {
				t.Errorf("%s: arm %s: %d clicks counted, %d generated up to the tick", asOf, r.Arm, r.Clicks, want)
			}
			if want := upTo(convTS[i], tick); r.Conversions != want {
				t.Errorf("%s: arm %s: %d conversions counted, %d generated up to the tick", asOf, r.Arm, r.Conversions, want)
			}
		}
		weights = WeightsFor(arms, a.Weights, weights)
	}
}
