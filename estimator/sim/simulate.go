package sim

import (
	"container/heap"
	"context"
	"errors"
	"fmt"
	"math"
	"runtime"
	"slices"
	"sort"
	"sync"

	"ripen/estimator"
)

// Options controls Run.
type Options struct {
	// Policies are the allocation policies to simulate, by name (see
	// PolicyNames: the service's policies and PolicyDelayOracle). Default:
	// all of them.
	Policies []string
	// Runs overrides the scenario's number of runs. Default: 0 (the
	// scenario's).
	Runs int
	// Seed overrides the scenario's base seed. Default: 0 (the scenario's).
	Seed uint64
	// Allocation are the guardrails and settle thresholds of the simulated
	// service; its Policy is replaced by each simulated policy. Default:
	// nil (estimator.DefaultAllocationOptions()).
	Allocation *estimator.AllocationOptions
	// Workers is the number of goroutines running simulations; results do
	// not depend on it. Default: 0 (runtime.GOMAXPROCS(0)).
	Workers int
	// Progress, if set, is called after each finished run with the number
	// of runs done and the total (policies times runs). Calls are
	// serialised.
	Progress func(done, total int)
}

// Result is the outcome of Run: per policy, metrics averaged over the runs.
type Result struct {
	// Scenario is the scenario simulated (defaults applied).
	Scenario Scenario
	// Runs and Seed are the number of runs per policy and the base seed.
	Runs int
	Seed uint64
	// SettleTolerance is the simulated service's settle tolerance
	// (estimator.AllocationOptions): a settle naming an arm within it of the
	// best counts as right.
	SettleTolerance float64
	// Arms are the arm names in scenario order.
	Arms []string
	// Hours are the update times, in hours since the start; every series
	// below has one value per update time.
	Hours []float64
	// BestArm is, per update time, the index of the arm with the highest
	// true eventual CVR for clicks at that time.
	BestArm []int
	// TrueCVR[i][t] is arm i's true eventual CVR at update time t.
	TrueCVR [][]float64
	// Policies are the per-policy results, in the order asked for.
	Policies []PolicyResult
}

// PolicyResult holds one policy's metrics over the runs.
type PolicyResult struct {
	// Policy is the policy's name.
	Policy string
	// Regret is the expected number of conversions lost against always
	// playing the best arm: the sum over clicks of q*(t) - q_arm(t), with
	// true eventual CVRs at the click's time. RegretMean and RegretSE are its
	// mean over runs at the horizon and the standard error of that mean.
	RegretMean, RegretSE float64
	// RegretCurveMean and RegretCurveSE are the same at every update time.
	RegretCurveMean, RegretCurveSE []float64
	// FinalRegret is the regret of each run at the horizon, by run index;
	// runs with the same index share their clicks across policies, so
	// differences between policies can be paired (see PairedDifference).
	FinalRegret []float64
	// BestArmShare is the mean over runs of the share of clicks sent to the
	// arm that was best at the time of the click.
	BestArmShare float64
	// Weights[i][t] is the mean over runs of arm i's traffic weight during
	// the update interval ending at update time t.
	Weights [][]float64
	// SettledRuns counts the runs in which the settle rule fired at some
	// update. SettledWrong counts those whose leader at the first settle
	// was wrong: its true eventual CVR at that time below (1 -
	// SettleTolerance) times the best arm's (an arm within the tolerance of
	// the best counts as right). SettledCorrect is the share of settled
	// runs that were right (NaN when none settled), and SettleHoursMedian
	// the median time of the first settle (NaN when none).
	SettledRuns       int
	SettledWrong      int
	SettledCorrect    float64
	SettleHoursMedian float64
	// FlipRuns counts the runs whose status went from settled back to not
	// settled at least once; Flips counts every such change over all runs.
	FlipRuns, Flips int
	// ObservedCVR[i][t] and EventualCVR[i][t] are the means over runs of arm
	// i's observed CVR (conversions/clicks) and fitted eventual CVR at
	// update time t; PooledTrueCVR[i][t] is the mean over runs of the true
	// eventual CVR of the clicks the arm had received by then (what both
	// estimate; it differs from TrueCVR only after change points).
	ObservedCVR, EventualCVR, PooledTrueCVR [][]float64
	// ObservedError[t] and EventualError[t] are the mean absolute errors of
	// the observed and eventual CVR against the pooled true CVR, over runs
	// and arms with clicks, at update time t; ObservedMAE and EventualMAE
	// average them over the update times.
	ObservedError, EventualError []float64
	ObservedMAE, EventualMAE     float64
	// Trace is the detail of run 0, for delay charts.
	Trace RunTrace
}

// RunTrace is the end state of one run.
type RunTrace struct {
	// Delays[i] are the delays (seconds, ascending) of arm i's conversions
	// observed by the horizon.
	Delays [][]float64
	// Fits[i] is arm i's fit at the horizon.
	Fits []*estimator.Fit
}

// runOutput is what one (policy, run) simulation records.
type runOutput struct {
	regret      []float64   // cumulative, per update
	weights     [][]float64 // [t][arm]
	bestClicks  float64
	clicks      float64
	settleAt    int // update index of the first settle, -1 if never
	settleRight bool
	flips       int         // changes from settled to not settled
	observed    [][]float64 // [t][arm]
	eventual    [][]float64
	pooled      [][]float64 // pooled true CVR, NaN when the arm has no clicks
	trace       RunTrace
}

// Run simulates every policy of o over the scenario's runs and returns the
// aggregated metrics. The result depends only on sc and o (never on
// o.Workers or scheduling).
func Run(ctx context.Context, sc Scenario, o Options) (*Result, error) {
	c, err := compile(sc)
	if err != nil {
		return nil, err
	}
	names := o.Policies
	if len(names) == 0 {
		names = PolicyNames()
	}
	policies := make([]estimator.Policy, len(names))
	for i, n := range names {
		if n == PolicyDelayOracle {
			continue // one per run: it holds the run's posteriors
		}
		p, err := estimator.ParsePolicy(n)
		if err != nil {
			return nil, fmt.Errorf("simulate: %w", CheckPolicy(n))
		}
		policies[i] = p
	}
	runs := c.sc.Runs
	if o.Runs != 0 {
		runs = o.Runs
	}
	if runs < 1 || runs > MaxRuns {
		return nil, fmt.Errorf("simulate: runs %d must be in [1, %d]", runs, MaxRuns)
	}
	seed := c.sc.Seed
	if o.Seed != 0 {
		seed = o.Seed
	}
	alloc := estimator.DefaultAllocationOptions()
	if o.Allocation != nil {
		alloc = *o.Allocation
	}
	if err := alloc.Validate(); err != nil {
		return nil, fmt.Errorf("simulate: %w", err)
	}
	family, err := estimator.ParseDelayFamily(c.sc.FitFamily)
	if err != nil {
		return nil, fmt.Errorf("simulate: %w", err)
	}
	workers := o.Workers
	if workers <= 0 {
		workers = runtime.GOMAXPROCS(0)
	}

	total := len(policies) * runs
	outs := make([]runOutput, total)
	errs := make([]error, total)
	jobs := make(chan int)
	var wg sync.WaitGroup
	var mu sync.Mutex
	done := 0
	for range min(workers, total) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for j := range jobs {
				p, r := j/runs, j%runs
				a := alloc
				a.Policy = policies[p]
				var oracle *delayOracle
				if a.Policy == nil {
					oracle = newDelayOracle(c)
					a.Policy = oracle
				}
				outs[j], errs[j] = c.simulate(ctx, a, oracle, family, RunSeed(seed, r), r == 0)
				if o.Progress != nil {
					mu.Lock()
					done++
					o.Progress(done, total)
					mu.Unlock()
				}
			}
		}()
	}
feed:
	for j := range total {
		select {
		case jobs <- j:
		case <-ctx.Done():
			break feed
		}
	}
	close(jobs)
	wg.Wait()
	if err := ctx.Err(); err != nil {
		return nil, fmt.Errorf("simulate: %w", err)
	}
	for j, err := range errs {
		if err != nil {
			return nil, fmt.Errorf("simulate: policy %s, run %d: %w", names[j/runs], j%runs, err)
		}
	}

	res := &Result{Scenario: c.sc, Runs: runs, Seed: seed, SettleTolerance: alloc.SettleTolerance, Arms: c.sc.ArmNames()}
	q := make([]float64, c.k)
	for t := int64(1); ; t++ {
		at := min(t*c.updateMs, c.horizonMs)
		res.Hours = append(res.Hours, float64(at)/3.6e6)
		c.cvrAt(at, q)
		res.BestArm = append(res.BestArm, argmax(q))
		if at == c.horizonMs {
			break
		}
	}
	res.TrueCVR = make([][]float64, c.k)
	for i := range res.TrueCVR {
		for _, h := range res.Hours {
			c.cvrAt(int64(math.Round(h*3.6e6)), q)
			res.TrueCVR[i] = append(res.TrueCVR[i], q[i])
		}
	}
	for p, name := range names {
		res.Policies = append(res.Policies, aggregate(name, outs[p*runs:(p+1)*runs], len(res.Hours), c.k, res.Hours))
	}
	return res, nil
}

// RunSeed returns the seed of run r under base seed base: every policy's
// run r sees the same clicks.
func RunSeed(base uint64, r int) uint64 {
	return splitmix(base ^ splitmix(uint64(r)+0x52756e))
}

// splitmix is the SplitMix64 finaliser, a bijective bit mixer.
func splitmix(x uint64) uint64 {
	x += 0x9e3779b97f4a7c15
	x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9
	x = (x ^ (x >> 27)) * 0x94d049bb133111eb
	return x ^ (x >> 31)
}

// withinLoss reports whether arm i's rate q[i] is at least (1 - loss)
// times the best rate: naming it is right within the stated loss.
func withinLoss(q []float64, i int, loss float64) bool {
	return q[i] >= (1-loss)*slices.Max(q)
}

func argmax(x []float64) int {
	b := 0
	for i, v := range x {
		if v > x[b] {
			b = i
		}
	}
	return b
}

// conversion is a conversion not yet revealed to the service.
type conversion struct {
	at, click int64 // elapsed ms
	arm       int
}

type convHeap []conversion

func (h convHeap) Len() int { return len(h) }
func (h convHeap) Less(i, j int) bool {
	if h[i].at != h[j].at {
		return h[i].at < h[j].at
	}
	return h[i].click < h[j].click
}
func (h convHeap) Swap(i, j int) { h[i], h[j] = h[j], h[i] }
func (h *convHeap) Push(x any)   { *h = append(*h, x.(conversion)) }
func (h *convHeap) Pop() any {
	old := *h
	x := old[len(old)-1]
	*h = old[:len(old)-1]
	return x
}

// simulate runs one policy over one run's clicks: traffic follows the
// current weights, conversions are revealed once their time has passed,
// and at every update the arms' states are advanced and the experiment is
// evaluated exactly as the service does.
//
// oracle, when not nil, is alloc.Policy: its posteriors are computed from
// the arms' states before each evaluation.
func (c *compiled) simulate(ctx context.Context, alloc estimator.AllocationOptions, oracle *delayOracle, family estimator.DelayFamily, seed uint64, trace bool) (runOutput, error) {
	k := c.k
	layout := estimator.Layout{Window: c.sc.Window.D()}
	states := make([]*estimator.ArmState, k)
	for i := range states {
		states[i] = estimator.NewArmState(layout)
	}
	fits := make([]*estimator.Fit, k)
	weights := make([]float64, k)
	for i := range weights {
		weights[i] = 1 / float64(k)
	}
	var prev []float64
	var settle *estimator.SettleState
	var pending convHeap
	trueSum := make([]float64, k) // sum of true CVR over each arm's clicks
	clicks := make([]float64, k)
	var delays [][]float64
	if trace {
		delays = make([][]float64, k)
	}
	out := runOutput{settleAt: -1}
	st := newStream(c, seed)
	cl := st.next()
	var regret float64
	settled := false
	q := make([]float64, k)
	for step := int64(1); ; step++ {
		if err := ctx.Err(); err != nil {
			return runOutput{}, err
		}
		end := min(step*c.updateMs, c.horizonMs)
		for ; cl != nil && cl.t < end; cl = st.next() {
			a := PickArm(weights, cl.uArm)
			best := slices.Max(cl.q)
			regret += best - cl.q[a]
			if cl.q[a] == best {
				out.bestClicks++
			}
			out.clicks++
			clicks[a]++
			trueSum[a] += cl.q[a]
			states[a].AddClicks(Start+cl.t, 1)
			if d := cl.delay[a]; d >= 0 {
				heap.Push(&pending, conversion{at: cl.t + d, click: cl.t, arm: a})
			}
		}
		out.weights = append(out.weights, slices.Clone(weights))
		for _, s := range states {
			s.Advance(Start + end)
		}
		for len(pending) > 0 && pending[0].at <= end {
			cv := heap.Pop(&pending).(conversion)
			states[cv.arm].AddConversion(Start+cv.click, Start+cv.at)
			if trace {
				delays[cv.arm] = append(delays[cv.arm], float64(cv.at-cv.click)/1000)
			}
		}
		if oracle != nil {
			if err := oracle.update(states); err != nil {
				return runOutput{}, fmt.Errorf("update at %.1fh: %w", float64(end)/3.6e6, err)
			}
		}
		arms := make([]estimator.ArmData, k)
		for i, a := range c.sc.Arms {
			arms[i] = estimator.ArmData{Arm: a.Name, State: states[i], Warm: fits[i]}
		}
		rep, err := estimator.EvaluateExperiment(estimator.ExperimentInput{
			Experiment:  c.sc.Name,
			AsOf:        Start + end,
			Arms:        arms,
			Fit:         estimator.FitOptions{Family: family},
			Allocation:  alloc,
			PrevWeights: prev,
			PrevSettle:  settle,
			Seed:        splitmix(seed^uint64(step)) | 1,
		})
		if err != nil {
			return runOutput{}, fmt.Errorf("update at %.1fh: %w", float64(end)/3.6e6, err)
		}
		copy(fits, rep.Fits)
		obs, ev, pooled := make([]float64, k), make([]float64, k), make([]float64, k)
		for i, ar := range rep.Arms {
			weights[i] = ar.Weight
			obs[i], ev[i] = ar.ObservedCVR, ar.EventualCVR
			pooled[i] = math.NaN()
			if clicks[i] > 0 {
				pooled[i] = trueSum[i] / clicks[i]
			}
		}
		prev = slices.Clone(weights)
		settle = rep.SettleState
		out.regret = append(out.regret, regret)
		out.observed = append(out.observed, obs)
		out.eventual = append(out.eventual, ev)
		out.pooled = append(out.pooled, pooled)
		settledNow := rep.Status == estimator.StatusSettled
		if settledNow && out.settleAt < 0 {
			out.settleAt = int(step - 1)
			c.cvrAt(end, q)
			for i, a := range c.sc.Arms {
				if a.Name == rep.Settle.Arm {
					out.settleRight = withinLoss(q, i, alloc.SettleTolerance)
				}
			}
		}
		if settled && !settledNow {
			out.flips++
		}
		settled = settledNow
		if end == c.horizonMs {
			break
		}
	}
	if trace {
		for _, d := range delays {
			sort.Float64s(d)
		}
		out.trace = RunTrace{Delays: delays, Fits: fits}
	}
	return out, nil
}

// aggregate averages one policy's runs.
func aggregate(name string, outs []runOutput, steps, k int, hours []float64) PolicyResult {
	n := float64(len(outs))
	pr := PolicyResult{
		Policy:          name,
		RegretCurveMean: make([]float64, steps),
		RegretCurveSE:   make([]float64, steps),
		ObservedError:   make([]float64, steps),
		EventualError:   make([]float64, steps),
		SettledCorrect:  math.NaN(),
	}
	matrix := func() [][]float64 {
		m := make([][]float64, k)
		for i := range m {
			m[i] = make([]float64, steps)
		}
		return m
	}
	pr.Weights, pr.ObservedCVR, pr.EventualCVR, pr.PooledTrueCVR = matrix(), matrix(), matrix(), matrix()
	col := make([]float64, len(outs))
	for t := range steps {
		for r, o := range outs {
			col[r] = o.regret[t]
		}
		pr.RegretCurveMean[t], pr.RegretCurveSE[t] = MeanSE(col)
		var obsErr, evErr, cnt float64
		for i := range k {
			var pooledN float64
			for _, o := range outs {
				pr.Weights[i][t] += o.weights[t][i] / n
				pr.ObservedCVR[i][t] += o.observed[t][i] / n
				pr.EventualCVR[i][t] += o.eventual[t][i] / n
				if p := o.pooled[t][i]; !math.IsNaN(p) {
					pr.PooledTrueCVR[i][t] += p
					pooledN++
					obsErr += math.Abs(o.observed[t][i] - p)
					evErr += math.Abs(o.eventual[t][i] - p)
					cnt++
				}
			}
			if pooledN > 0 {
				pr.PooledTrueCVR[i][t] /= pooledN
			} else {
				pr.PooledTrueCVR[i][t] = math.NaN()
			}
		}
		pr.ObservedError[t], pr.EventualError[t] = math.NaN(), math.NaN()
		if cnt > 0 {
			pr.ObservedError[t], pr.EventualError[t] = obsErr/cnt, evErr/cnt
		}
	}
	pr.ObservedMAE, pr.EventualMAE = nanMean(pr.ObservedError), nanMean(pr.EventualError)
	pr.RegretMean, pr.RegretSE = pr.RegretCurveMean[steps-1], pr.RegretCurveSE[steps-1]
	var settleHours []float64
	right := 0
	for _, o := range outs {
		pr.FinalRegret = append(pr.FinalRegret, o.regret[steps-1])
		if o.clicks > 0 {
			pr.BestArmShare += o.bestClicks / o.clicks / n
		}
		if o.settleAt >= 0 {
			pr.SettledRuns++
			settleHours = append(settleHours, hours[o.settleAt])
			if o.settleRight {
				right++
			}
		}
		if o.flips > 0 {
			pr.FlipRuns++
			pr.Flips += o.flips
		}
	}
	pr.SettleHoursMedian = Median(settleHours)
	pr.SettledWrong = pr.SettledRuns - right
	if pr.SettledRuns > 0 {
		pr.SettledCorrect = float64(right) / float64(pr.SettledRuns)
	}
	pr.Trace = outs[0].trace
	return pr
}

// MeanSE returns the mean of x and the standard error of the mean (sample
// standard deviation over sqrt(n); 0 for fewer than two values).
func MeanSE(x []float64) (mean, se float64) {
	n := float64(len(x))
	if n == 0 {
		return math.NaN(), math.NaN()
	}
	for _, v := range x {
		mean += v
	}
	mean /= n
	if n < 2 {
		return mean, 0
	}
	var ss float64
	for _, v := range x {
		ss += (v - mean) * (v - mean)
	}
	return mean, math.Sqrt(ss / (n - 1) / n)
}

// PairedDifference returns the mean of x[r]-y[r] over runs r and its
// standard error: the comparison of two policies over the same seeds.
func PairedDifference(x, y []float64) (mean, se float64, err error) {
	if len(x) != len(y) || len(x) == 0 {
		return 0, 0, errors.New("paired difference: need two non-empty series of equal length")
	}
	d := make([]float64, len(x))
	for i := range x {
		d[i] = x[i] - y[i]
	}
	mean, se = MeanSE(d)
	return mean, se, nil
}

// Median returns the median of x (NaN when empty); x is not modified.
func Median(x []float64) float64 {
	if len(x) == 0 {
		return math.NaN()
	}
	s := slices.Clone(x)
	sort.Float64s(s)
	m := len(s) / 2
	if len(s)%2 == 1 {
		return s[m]
	}
	return (s[m-1] + s[m]) / 2
}

func nanMean(x []float64) float64 {
	var s, n float64
	for _, v := range x {
		if !math.IsNaN(v) {
			s += v
			n++
		}
	}
	if n == 0 {
		return math.NaN()
	}
	return s / n
}

// Policy returns the result of the named policy, or nil.
func (r *Result) Policy(name string) *PolicyResult {
	for i := range r.Policies {
		if r.Policies[i].Policy == name {
			return &r.Policies[i]
		}
	}
	return nil
}
