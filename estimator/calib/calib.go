// Package calib checks by simulation whether the estimator's posterior of
// an arm's eventual conversion rate keeps its promise: over a grid of
// maturity (how old the experiment is, in attribution windows), the delay
// family of the truth, traffic and the fitted delay family, it simulates
// many replicates of one arm and measures how often the 50%, 80% and 95%
// credible intervals hold the true rate, and the error of the observed and
// eventual rates; and it runs simulation-based calibration (Talts,
// Betancourt, Simpson, Vehtari & Gelman 2018, "Validating Bayesian
// inference algorithms with simulation-based calibration",
// arXiv:1804.06788), drawing the truth from the estimator's own prior.
//
// The package is pure like the estimator: no I/O, no clock, and results
// are a deterministic function of the options (never of Workers).
package calib

import (
	"context"
	"errors"
	"fmt"
	"hash/fnv"
	"math"
	"math/rand/v2"
	"runtime"
	"slices"
	"sync"
	"time"

	"gonum.org/v1/gonum/stat/distuv"

	"ripen/estimator"
	"ripen/estimator/sim"
)

// Levels are the credible levels whose equal-tailed intervals are checked.
var Levels = [3]float64{0.5, 0.8, 0.95}

// Defaults of Options, applied by WithDefaults to zero fields.
var (
	// DefaultMaturities are the as-of times in windows: a tenth of the
	// window to three windows.
	DefaultMaturities = []float64{0.1, 0.25, 0.5, 1, 2, 3}
	// DefaultClicksPerHour is the traffic grid, clicks per hour to the arm.
	DefaultClicksPerHour = []float64{30, 300, 3000}
	// DefaultFits are the fitted families: the service default and each
	// family on its own.
	DefaultFits = []estimator.DelayFamily{estimator.FamilyAuto, estimator.FamilyExponential, estimator.FamilyWeibull, estimator.FamilyHistogram}
	// DefaultSBCClicksPerHour is the traffic of simulation-based
	// calibration: small, because the prior's q reaches up to 1.
	DefaultSBCClicksPerHour = []float64{30}
)

// Further defaults and limits.
const (
	// DefaultReplicates is the number of replicates per coverage cell.
	DefaultReplicates = 200
	// DefaultSBCReplicates is the number of replicates per SBC cell.
	DefaultSBCReplicates = 200
	// DefaultSBCDraws is L, the number of posterior quantiles the truth is
	// ranked among (ranks 0..L).
	DefaultSBCDraws = 99
	// SBCBins is the number of bins of the rank histogram.
	SBCBins = 20
	// DefaultQMin and DefaultQMax bound the true eventual rate of coverage
	// replicates, drawn uniformly.
	DefaultQMin, DefaultQMax = 0.02, 0.08
	// DefaultStep is how often a batch of clicks arrives.
	DefaultStep = 5 * time.Minute
	// DefaultSeed is the base seed.
	DefaultSeed = 1
	// MaxReplicates bounds replicates per cell.
	MaxReplicates = 100000
	// MaxClicksPerReplicate bounds clicks per hour times the as-of time.
	MaxClicksPerReplicate = 2e7
	// MaxStepsPerReplicate bounds the as-of time over Step.
	MaxStepsPerReplicate = 1e6
)

// Options controls Run. Start from the zero value: every zero field takes
// its default.
type Options struct {
	// Window is the attribution window. Default: estimator.DefaultWindow.
	Window time.Duration
	// Maturities are the as-of times, in windows since the first click.
	// Default: DefaultMaturities.
	Maturities []float64
	// Truths are the delay families of the coverage truth. Default: all
	// (TruthFamilies).
	Truths []TruthFamily
	// ClicksPerHour is the coverage traffic grid. Default:
	// DefaultClicksPerHour.
	ClicksPerHour []float64
	// Fits are the fitted delay families. Default: DefaultFits.
	Fits []estimator.DelayFamily
	// Replicates per coverage cell. Default: DefaultReplicates.
	Replicates int
	// QMin and QMax bound the coverage truth's eventual rate. Default:
	// DefaultQMin and DefaultQMax.
	QMin, QMax float64
	// Step is the interval between batches of clicks. Default: DefaultStep.
	Step time.Duration
	// SkipCoverage and SkipSBC leave out a part of the run.
	SkipCoverage, SkipSBC bool
	// SBCClicksPerHour is the traffic grid of SBC. Default:
	// DefaultSBCClicksPerHour.
	SBCClicksPerHour []float64
	// SBCReplicates per SBC cell, at least 5 per bin. Default:
	// DefaultSBCReplicates.
	SBCReplicates int
	// SBCDraws is L: the truth is ranked among the posterior's quantiles at
	// i/(L+1), i = 1..L; L+1 must be a multiple of SBCBins. Default:
	// DefaultSBCDraws.
	SBCDraws int
	// Seed is the base seed; each replicate's seed derives from it, the
	// cell's parameters and the replicate's index, so a cell gives the same
	// numbers whatever else the grid holds. Default: DefaultSeed.
	Seed uint64
	// Workers is the number of goroutines; results do not depend on it.
	// Default: runtime.GOMAXPROCS(0).
	Workers int
	// Progress, if set, is called after each replicate with the number
	// done and the total; calls are serialised.
	Progress func(done, total int)
}

// WithDefaults returns o with every zero field set to its default.
func (o Options) WithDefaults() Options {
	if o.Window == 0 {
		o.Window = estimator.DefaultWindow
	}
	if len(o.Maturities) == 0 {
		o.Maturities = slices.Clone(DefaultMaturities)
	}
	if len(o.Truths) == 0 {
		o.Truths = TruthFamilies()
	}
	if len(o.ClicksPerHour) == 0 {
		o.ClicksPerHour = slices.Clone(DefaultClicksPerHour)
	}
	if len(o.Fits) == 0 {
		o.Fits = slices.Clone(DefaultFits)
	}
	if o.Replicates == 0 {
		o.Replicates = DefaultReplicates
	}
	if o.QMin == 0 && o.QMax == 0 {
		o.QMin, o.QMax = DefaultQMin, DefaultQMax
	}
	if o.Step == 0 {
		o.Step = DefaultStep
	}
	if len(o.SBCClicksPerHour) == 0 {
		o.SBCClicksPerHour = slices.Clone(DefaultSBCClicksPerHour)
	}
	if o.SBCReplicates == 0 {
		o.SBCReplicates = DefaultSBCReplicates
	}
	if o.SBCDraws == 0 {
		o.SBCDraws = DefaultSBCDraws
	}
	if o.Seed == 0 {
		o.Seed = DefaultSeed
	}
	if o.Workers <= 0 {
		o.Workers = runtime.GOMAXPROCS(0)
	}
	return o
}

// Validate reports every problem of o, after defaults.
func (o Options) Validate() error {
	o = o.WithDefaults()
	var errs []error
	add := func(format string, a ...any) { errs = append(errs, fmt.Errorf(format, a...)) }
	if err := (estimator.Layout{Window: o.Window}).Validate(); err != nil {
		add("window: %w", err)
	}
	if !(o.Step >= time.Second) {
		add("step %v: must be at least 1s", o.Step)
	}
	hours := o.Window.Hours()
	for _, m := range o.Maturities {
		if !(m > 0) || math.IsInf(m, 0) {
			add("maturity %v: must be a positive number of windows", m)
		} else if o.Step > 0 && m*o.Window.Seconds()/o.Step.Seconds() > MaxStepsPerReplicate {
			add("maturity %v: more than %g steps of %v", m, float64(MaxStepsPerReplicate), o.Step)
		}
	}
	for _, t := range o.Truths {
		if _, err := ParseTruthFamily(string(t)); err != nil {
			add("%w", err)
		}
	}
	for _, f := range o.Fits {
		if f < estimator.FamilyAuto || f > estimator.FamilyHistogram {
			add("fit family %v: unknown", f)
		}
	}
	traffic := slices.Concat(o.ClicksPerHour, o.SBCClicksPerHour)
	for _, c := range traffic {
		if !(c > 0) || math.IsInf(c, 0) {
			add("clicks per hour %v: must be positive", c)
		}
		for _, m := range o.Maturities {
			if c*m*hours > MaxClicksPerReplicate {
				add("clicks per hour %v over %v windows: more than %g clicks per replicate", c, m, float64(MaxClicksPerReplicate))
			}
		}
	}
	if o.Replicates < 1 || o.Replicates > MaxReplicates {
		add("replicates %d: must be in [1, %d]", o.Replicates, MaxReplicates)
	}
	if o.SBCReplicates < 5*SBCBins || o.SBCReplicates > MaxReplicates {
		add("SBC replicates %d: must be in [%d, %d] (at least 5 per bin)", o.SBCReplicates, 5*SBCBins, MaxReplicates)
	}
	if o.SBCDraws < SBCBins-1 || (o.SBCDraws+1)%SBCBins != 0 {
		add("SBC draws %d: L+1 must be a positive multiple of %d", o.SBCDraws, SBCBins)
	}
	if !(o.QMin > 0 && o.QMin < o.QMax && o.QMax < 1) {
		add("q range [%v, %v]: need 0 < min < max < 1", o.QMin, o.QMax)
	}
	if err := errors.Join(errs...); err != nil {
		return fmt.Errorf("calibration options: %w", err)
	}
	return nil
}

// CoverageCell is the coverage of one cell of the grid, or of a pooled
// row (Truth "" and ClicksPerHour 0: every truth family and traffic).
type CoverageCell struct {
	Fit   estimator.DelayFamily
	Truth TruthFamily
	// Maturity is the as-of time in windows; ClicksPerHour the traffic.
	Maturity      float64
	ClicksPerHour float64
	// Replicates counts the replicates whose posterior was computed;
	// Failed those whose fit or posterior returned an error (left out).
	Replicates, Failed int
	// Coverage[i] is the share of replicates whose equal-tailed interval
	// of level Levels[i] holds the true rate.
	Coverage [len(Levels)]float64
	// Below95 and Above95 are the shares whose truth lies below the 95%
	// interval's lower end and above its upper end.
	Below95, Above95 float64
	// ObservedMAE and EventualMAE are the mean absolute errors of the
	// observed CVR (conversions/clicks) and of the point estimate against
	// the true eventual rate.
	ObservedMAE, EventualMAE float64
	// MeanClicks and MeanConversions are per replicate.
	MeanClicks, MeanConversions float64
}

// SBCCell is the simulation-based calibration of one cell: the truth
// drawn from the estimator's prior (priorDraw), its rank among the
// posterior's quantiles, the rank histogram and its chi-square test of
// uniformity.
type SBCCell struct {
	Fit           estimator.DelayFamily
	Maturity      float64
	ClicksPerHour float64
	Replicates    int
	Failed        int
	// Histogram counts the ranks in SBCBins equal bins.
	Histogram [SBCBins]int
	// ChiSquare is sum over bins of (count - expected)^2/expected and
	// PValue its upper tail under the chi-square law with SBCBins-1
	// degrees of freedom.
	ChiSquare, PValue float64
}

// Result is the outcome of Run.
type Result struct {
	// Options are the options run, defaults applied.
	Options Options
	// Cells are the coverage cells in the order fit, maturity, truth,
	// traffic; Pooled has one row per fit and maturity.
	Cells, Pooled []CoverageCell
	// SBC are the SBC cells in the order fit, maturity, traffic.
	SBC []SBCCell
}

// posteriorFunc computes one replicate's point estimate and posterior;
// truth is the delay distribution the data were drawn from (the oracle
// checks in the tests use it; armPosterior must not).
type posteriorFunc func(d *estimator.FitData, family estimator.DelayFamily, truth sim.Distribution) (float64, estimator.Posterior, error)

// estimatorPosterior is the posterior under test: armPosterior.
func estimatorPosterior(d *estimator.FitData, family estimator.DelayFamily, _ sim.Distribution) (float64, estimator.Posterior, error) {
	return armPosterior(d, family)
}

// drawFunc draws one replicate's truth.
type drawFunc func(r *rand.Rand) (q float64, delay sim.Distribution, err error)

// cellPlan is one cell to simulate.
type cellPlan struct {
	key           string // the cell's parameters; seeds derive from it
	fit           estimator.DelayFamily
	asOf          float64 // seconds
	clicksPerHour float64
	replicates    int
	draw          drawFunc
	posterior     posteriorFunc
}

// sample is what one replicate records.
type sample struct {
	failed              bool
	q, point, observed  float64
	clicks, conversions float64
	lo, hi              [len(Levels)]float64
	rank                int
}

// Run simulates the grid of o and returns coverage, pooled rows and SBC.
func Run(ctx context.Context, o Options) (*Result, error) {
	o = o.WithDefaults()
	if err := o.Validate(); err != nil {
		return nil, err
	}
	w := o.Window.Seconds()
	res := &Result{Options: o}
	var cov, sbc []cellPlan
	type coverageID struct {
		fit      estimator.DelayFamily
		truth    TruthFamily
		maturity float64
		traffic  float64
	}
	var covIDs []coverageID
	if !o.SkipCoverage {
		for _, fit := range o.Fits {
			for _, m := range o.Maturities {
				for _, truth := range o.Truths {
					for _, c := range o.ClicksPerHour {
						covIDs = append(covIDs, coverageID{fit, truth, m, c})
						cov = append(cov, cellPlan{
							key: fmt.Sprintf("coverage/%s/%s/%g/%g/%g/%g/%v/%v", fit, truth, m, c, o.QMin, o.QMax, o.Window, o.Step),
							fit: fit, asOf: m * w, clicksPerHour: c, replicates: o.Replicates,
							draw:      coverageDraw(truth, o.QMin, o.QMax, w),
							posterior: estimatorPosterior,
						})
					}
				}
			}
		}
	}
	if !o.SkipSBC {
		for _, fit := range o.Fits {
			for _, m := range o.Maturities {
				for _, c := range o.SBCClicksPerHour {
					sbc = append(sbc, cellPlan{
						key: fmt.Sprintf("sbc/%s/%g/%g/%v/%v", fit, m, c, o.Window, o.Step),
						fit: fit, asOf: m * w, clicksPerHour: c, replicates: o.SBCReplicates,
						draw:      sbcDraw(fit, w),
						posterior: estimatorPosterior,
					})
				}
			}
		}
	}
	samples, err := runPlans(ctx, slices.Concat(cov, sbc), o)
	if err != nil {
		return nil, err
	}
	type poolKey struct {
		fit      estimator.DelayFamily
		maturity float64
	}
	pooled := make(map[poolKey][]sample)
	var pooledOrder []poolKey
	for i, id := range covIDs {
		c := summariseCoverage(samples[i])
		c.Fit, c.Truth, c.Maturity, c.ClicksPerHour = id.fit, id.truth, id.maturity, id.traffic
		res.Cells = append(res.Cells, c)
		k := poolKey{id.fit, id.maturity}
		if _, ok := pooled[k]; !ok {
			pooledOrder = append(pooledOrder, k)
		}
		pooled[k] = append(pooled[k], samples[i]...)
	}
	for _, k := range pooledOrder {
		c := summariseCoverage(pooled[k])
		c.Fit, c.Maturity = k.fit, k.maturity
		res.Pooled = append(res.Pooled, c)
	}
	for i, p := range sbc {
		c := summariseSBC(samples[len(cov)+i], o.SBCDraws)
		c.Fit, c.Maturity, c.ClicksPerHour = p.fit, p.asOf/w, p.clicksPerHour
		res.SBC = append(res.SBC, c)
	}
	return res, nil
}

// coverageDraw draws q uniformly on [qMin, qMax] and a delay of family t.
func coverageDraw(t TruthFamily, qMin, qMax, w float64) drawFunc {
	return func(r *rand.Rand) (float64, sim.Distribution, error) {
		q := uniform(r, qMin, qMax)
		d, err := truthDelay(r, t, w)
		return q, d, err
	}
}

// sbcDraw draws the truth from the estimator's prior (priorDraw).
func sbcDraw(fit estimator.DelayFamily, w float64) drawFunc {
	return func(r *rand.Rand) (float64, sim.Distribution, error) {
		q, d := priorDraw(r, fit, w)
		return q, d, nil
	}
}

// replicateSeed derives the seed of replicate rep of the cell with key.
func replicateSeed(base uint64, key string, rep int) uint64 {
	h := fnv.New64a()
	h.Write([]byte(key))
	return splitmix(base ^ splitmix(h.Sum64()^splitmix(uint64(rep))))
}

// splitmix is the SplitMix64 finaliser, a bijective bit mixer.
func splitmix(x uint64) uint64 {
	x += 0x9e3779b97f4a7c15
	x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9
	x = (x ^ (x >> 27)) * 0x94d049bb133111eb
	return x ^ (x >> 31)
}

// replicateStream is the PCG stream constant of replicates.
const replicateStream = 0x63616c6962 // arbitrary

// runPlans simulates every replicate of every plan on o.Workers goroutines
// and returns the samples by plan and replicate.
func runPlans(ctx context.Context, plans []cellPlan, o Options) ([][]sample, error) {
	out := make([][]sample, len(plans))
	type job struct{ plan, rep int }
	var jobs []job
	for i, p := range plans {
		out[i] = make([]sample, p.replicates)
		for r := range p.replicates {
			jobs = append(jobs, job{i, r})
		}
	}
	layout := estimator.Layout{Window: o.Window}
	step := o.Step.Seconds()
	errs := make([]error, len(jobs))
	ch := make(chan int)
	var wg sync.WaitGroup
	var mu sync.Mutex
	done := 0
	for range min(o.Workers, max(len(jobs), 1)) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for j := range ch {
				jb := jobs[j]
				p := plans[jb.plan]
				out[jb.plan][jb.rep], errs[j] = runReplicate(p, replicateSeed(o.Seed, p.key, jb.rep), layout, step, o.SBCDraws)
				if o.Progress != nil {
					mu.Lock()
					done++
					o.Progress(done, len(jobs))
					mu.Unlock()
				}
			}
		}()
	}
feed:
	for j := range jobs {
		select {
		case ch <- j:
		case <-ctx.Done():
			break feed
		}
	}
	close(ch)
	wg.Wait()
	if err := ctx.Err(); err != nil {
		return nil, fmt.Errorf("calibrate: %w", err)
	}
	for j, err := range errs {
		if err != nil {
			return nil, fmt.Errorf("calibrate: %s, replicate %d: %w", plans[jobs[j].plan].key, jobs[j].rep, err)
		}
	}
	return out, nil
}

// runReplicate draws a truth, simulates the arm, computes its posterior
// and records the interval ends and the rank of the truth among the
// posterior's quantiles at i/(draws+1). A posterior that cannot be
// computed gives a failed sample; a truth that cannot be simulated is an
// error.
func runReplicate(p cellPlan, seed uint64, layout estimator.Layout, step float64, draws int) (sample, error) {
	r := rand.New(rand.NewPCG(seed, replicateStream))
	q, base, err := p.draw(r)
	if err != nil {
		return sample{}, err
	}
	delay, err := sim.NewTruncated(base, layout.Window.Seconds())
	if err != nil {
		return sample{}, err
	}
	st := simulateArm(r, q, delay, p.clicksPerHour, p.asOf, step, layout)
	d := st.FitData()
	s := sample{q: q, clicks: float64(st.Clicks()), conversions: float64(st.Conversions())}
	if s.clicks > 0 {
		s.observed = s.conversions / s.clicks
	}
	point, post, err := p.posterior(&d, p.fit, delay)
	if err != nil {
		s.failed = true
		return s, nil
	}
	s.point = point
	for i, l := range Levels {
		s.lo[i], s.hi[i] = post.Quantile((1-l)/2), post.Quantile((1+l)/2)
	}
	for i := 1; i <= draws; i++ {
		if post.Quantile(float64(i)/float64(draws+1)) < q {
			s.rank++
		}
	}
	return s, nil
}

// summariseCoverage averages coverage samples (failed ones only counted).
func summariseCoverage(samples []sample) CoverageCell {
	var c CoverageCell
	for _, s := range samples {
		if s.failed {
			c.Failed++
			continue
		}
		c.Replicates++
		for i := range Levels {
			if s.lo[i] <= s.q && s.q <= s.hi[i] {
				c.Coverage[i]++
			}
		}
		last := len(Levels) - 1
		if s.q < s.lo[last] {
			c.Below95++
		}
		if s.q > s.hi[last] {
			c.Above95++
		}
		c.ObservedMAE += math.Abs(s.observed - s.q)
		c.EventualMAE += math.Abs(s.point - s.q)
		c.MeanClicks += s.clicks
		c.MeanConversions += s.conversions
	}
	n := float64(c.Replicates)
	if n == 0 {
		nan := math.NaN()
		for i := range c.Coverage {
			c.Coverage[i] = nan
		}
		c.Below95, c.Above95, c.ObservedMAE, c.EventualMAE, c.MeanClicks, c.MeanConversions = nan, nan, nan, nan, nan, nan
		return c
	}
	for i := range c.Coverage {
		c.Coverage[i] /= n
	}
	c.Below95 /= n
	c.Above95 /= n
	c.ObservedMAE /= n
	c.EventualMAE /= n
	c.MeanClicks /= n
	c.MeanConversions /= n
	return c
}

// summariseSBC bins the ranks (0..draws) of the samples and tests the
// histogram's uniformity by Pearson's chi-square statistic.
func summariseSBC(samples []sample, draws int) SBCCell {
	var c SBCCell
	per := (draws + 1) / SBCBins
	for _, s := range samples {
		if s.failed {
			c.Failed++
			continue
		}
		c.Replicates++
		c.Histogram[s.rank/per]++
	}
	c.ChiSquare, c.PValue = chiSquareUniform(c.Histogram[:])
	return c
}

// chiSquareUniform returns Pearson's chi-square statistic of counts
// against equal expected counts, and its p-value under the chi-square law
// with len(counts)-1 degrees of freedom (NaN for an empty histogram).
func chiSquareUniform(counts []int) (stat, p float64) {
	var n float64
	for _, c := range counts {
		n += float64(c)
	}
	if n == 0 {
		return math.NaN(), math.NaN()
	}
	e := n / float64(len(counts))
	for _, c := range counts {
		stat += (float64(c) - e) * (float64(c) - e) / e
	}
	return stat, distuv.ChiSquared{K: float64(len(counts) - 1)}.Survival(stat)
}
