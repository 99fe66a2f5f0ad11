package sim

import (
	"errors"
	"fmt"
	"math/rand/v2"
	"runtime"
	"sync"

	"ripen/estimator"
)

// BernoulliOptions configures BernoulliThompson, the fast path for arms
// whose conversions are immediate: with zero delay an arm's state is just
// its clicks and conversions, so the posterior is updated after every click
// instead of on an update interval.
type BernoulliOptions struct {
	// CVR are the arms' conversion rates; at least two, each in [0, 1].
	CVR []float64
	// Checkpoints are the click counts (increasing, positive) at which the
	// cumulative regret is recorded; the last is the horizon.
	Checkpoints []int
	// Runs is the number of seeded runs. Default: 0 selects 1.
	Runs int
	// Seed is the base seed (see RunSeed).
	Seed uint64
	// Workers is the number of goroutines; results do not depend on it.
	// Default: 0 (runtime.GOMAXPROCS(0)).
	Workers int
}

// BernoulliResult is the regret of per-click Thompson sampling.
type BernoulliResult struct {
	// Regret[r][c] is run r's cumulative expected regret, sum over clicks of
	// max(CVR) - CVR[arm], after Checkpoints[c] clicks.
	Regret [][]float64
	// Mean[c] and SE[c] are the mean over runs and its standard error.
	Mean, SE []float64
}

// BernoulliThompson simulates Thompson sampling with one posterior draw per
// arm per click: each arm's estimator.NewObservedBeta posterior (uniform
// prior) is sampled, the click goes to the largest draw (lowest index on
// ties) and converts with the arm's rate.
func BernoulliThompson(o BernoulliOptions) (BernoulliResult, error) {
	if len(o.CVR) < 2 {
		return BernoulliResult{}, errors.New("bernoulli thompson: need at least two arms")
	}
	for i, q := range o.CVR {
		if !(q >= 0 && q <= 1) {
			return BernoulliResult{}, fmt.Errorf("bernoulli thompson: cvr[%d] = %v not in [0, 1]", i, q)
		}
	}
	if len(o.Checkpoints) == 0 {
		return BernoulliResult{}, errors.New("bernoulli thompson: no checkpoints")
	}
	for i, c := range o.Checkpoints {
		if c < 1 || (i > 0 && c <= o.Checkpoints[i-1]) {
			return BernoulliResult{}, fmt.Errorf("bernoulli thompson: checkpoints must be positive and increasing, got %v", o.Checkpoints)
		}
	}
	runs := max(o.Runs, 1)
	if runs > MaxRuns {
		return BernoulliResult{}, fmt.Errorf("bernoulli thompson: runs %d above %d", runs, MaxRuns)
	}
	workers := o.Workers
	if workers <= 0 {
		workers = runtime.GOMAXPROCS(0)
	}
	res := BernoulliResult{Regret: make([][]float64, runs)}
	errs := make([]error, runs)
	jobs := make(chan int)
	var wg sync.WaitGroup
	for range min(workers, runs) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for r := range jobs {
				res.Regret[r], errs[r] = bernoulliRun(o.CVR, o.Checkpoints, RunSeed(o.Seed, r))
			}
		}()
	}
	for r := range runs {
		jobs <- r
	}
	close(jobs)
	wg.Wait()
	if err := errors.Join(errs...); err != nil {
		return BernoulliResult{}, fmt.Errorf("bernoulli thompson: %w", err)
	}
	col := make([]float64, runs)
	for c := range o.Checkpoints {
		for r := range runs {
			col[r] = res.Regret[r][c]
		}
		m, se := MeanSE(col)
		res.Mean = append(res.Mean, m)
		res.SE = append(res.SE, se)
	}
	return res, nil
}

func bernoulliRun(cvr []float64, checkpoints []int, seed uint64) ([]float64, error) {
	r := rand.New(rand.NewPCG(seed, 0x6265726e))
	k := len(cvr)
	best := cvr[argmax(cvr)]
	clicks, convs := make([]float64, k), make([]float64, k)
	out := make([]float64, 0, len(checkpoints))
	var regret float64
	next := 0
	for n := 1; n <= checkpoints[len(checkpoints)-1]; n++ {
		arm, top := 0, -1.0
		for i := range k {
			b, err := estimator.NewObservedBeta(clicks[i], convs[i])
			if err != nil {
				return nil, err
			}
			if x := b.Sample(r); x > top {
				arm, top = i, x
			}
		}
		regret += best - cvr[arm]
		clicks[arm]++
		if r.Float64() < cvr[arm] {
			convs[arm]++
		}
		if n == checkpoints[next] {
			out = append(out, regret)
			next++
		}
	}
	return out, nil
}
