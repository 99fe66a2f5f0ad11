package consumer

import (
	"encoding/json"
	"errors"
	"fmt"
	"runtime"
	"sync"
	"sync/atomic"
	"testing"

	"ripen/estimator"
)

// refitInputs returns n experiment inputs of arms arms each, built from
// benchArmStates and fitted with family, as a refit tick evaluates them.
func refitInputs(n, arms int, family estimator.DelayFamily) []estimator.ExperimentInput {
	base := benchArmStates(8)
	asOf := base[0].Watermark()
	inputs := make([]estimator.ExperimentInput, n)
	for e := range inputs {
		in := estimator.ExperimentInput{
			Experiment: fmt.Sprintf("tick-exp-%04d", e),
			AsOf:       asOf,
			Fit:        estimator.FitOptions{Family: family},
			Allocation: estimator.DefaultAllocationOptions(),
		}
		for a := range arms {
			in.Arms = append(in.Arms, estimator.ArmData{Arm: fmt.Sprintf("arm-%d", a), State: base[(e+a)%len(base)]})
		}
		inputs[e] = in
	}
	return inputs
}

// evaluateAll evaluates inputs on workers goroutines (forEachBounded, as
// refitTick does) and returns each report's JSON, by input.
func evaluateAll(workers int, inputs []estimator.ExperimentInput) ([][]byte, error) {
	out := make([][]byte, len(inputs))
	err := forEachBounded(workers, len(inputs), func(i int) error {
		rep, err := estimator.EvaluateExperiment(inputs[i])
		if err != nil {
			return err
		}
		out[i], err = json.Marshal(rep)
		return err
	})
	return out, err
}

func TestForEachBounded(t *testing.T) {
	boom := errors.New("boom")
	for _, tc := range []struct {
		name       string
		workers, n int
		failAt     int // index whose call fails; -1 for none
	}{
		{"empty", 4, 0, -1},
		{"serial", 1, 50, -1},
		{"more workers than items", 16, 3, -1},
		{"parallel", 4, 200, -1},
		{"serial error", 1, 50, 10},
		{"parallel error", 4, 200, 10},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var (
				mu      sync.Mutex
				calls   = map[int]int{}
				running atomic.Int32
				peak    atomic.Int32
			)
			err := forEachBounded(tc.workers, tc.n, func(i int) error {
				r := running.Add(1)
				defer running.Add(-1)
				for {
					p := peak.Load()
					if r <= p || peak.CompareAndSwap(p, r) {
						break
					}
				}
				mu.Lock()
				calls[i]++
				mu.Unlock()
				if i == tc.failAt {
					return boom
				}
				return nil
			})
			if got := int(peak.Load()); got > max(1, tc.workers) {
				t.Errorf("%d calls ran at once, want at most %d", got, tc.workers)
			}
			for i, c := range calls {
				if c != 1 || i < 0 || i >= tc.n {
					t.Errorf("index %d called %d times (n=%d)", i, c, tc.n)
				}
			}
			if tc.failAt < 0 {
				if err != nil {
					t.Fatalf("err = %v, want nil", err)
				}
				if len(calls) != tc.n {
					t.Fatalf("%d indices called, want %d", len(calls), tc.n)
				}
				return
			}
			if !errors.Is(err, boom) {
				t.Fatalf("err = %v, want %v", err, boom)
			}
			if calls[tc.failAt] != 1 {
				t.Fatalf("failing index %d not called", tc.failAt)
			}
			if tc.workers == 1 && len(calls) != tc.failAt+1 {
				t.Fatalf("serial run called %d indices after failing at %d", len(calls), tc.failAt)
			}
		})
	}
}

// TestParallelRefitsMatchSerial evaluates the same experiments on one
// worker and on several: every report must be byte-identical, since a
// refit is a pure function of its input (seeded by experiment and as-of
// time).
func TestParallelRefitsMatchSerial(t *testing.T) {
	inputs := refitInputs(8, 3, estimator.FamilyExponential)
	serial, err := evaluateAll(1, inputs)
	if err != nil {
		t.Fatal(err)
	}
	parallel, err := evaluateAll(4, inputs)
	if err != nil {
		t.Fatal(err)
	}
	for i := range inputs {
		if string(serial[i]) != string(parallel[i]) {
			t.Errorf("%s: parallel report differs:\nserial   %s\nparallel %s", inputs[i].Experiment, serial[i], parallel[i])
		}
	}
}

// BenchmarkRefitTick evaluates one tick of 32 experiments of 4 arms each
// (default fit and allocation options) with one worker and with
// GOMAXPROCS workers, the refit owner's pool; compare their ns/op.
func BenchmarkRefitTick(b *testing.B) {
	inputs := refitInputs(32, 4, estimator.FamilyAuto)
	for _, workers := range []int{1, runtime.GOMAXPROCS(0)} {
		b.Run(fmt.Sprintf("workers=%d", workers), func(b *testing.B) {
			for range b.N {
				if _, err := evaluateAll(workers, inputs); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*len(inputs)), "ns/experiment")
		})
	}
}
