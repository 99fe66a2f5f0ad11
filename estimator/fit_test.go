package estimator

import (
	"encoding/csv"
	"math"
	"math/rand/v2"
	"os"
	"slices"
	"sort"
	"strconv"
	"testing"
	"time"

	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/optimize"
	"gonum.org/v1/gonum/stat/distuv"
)

const (
	daySec = 86400.0
	// fitEpoch is an arbitrary event-time origin (Unix ms) for the fit tests.
	fitEpoch = int64(1_780_000_000_000)
)

// simClick is one simulated click: its time in seconds after the start of
// the experiment and its conversion delay in seconds (negative: it never
// converts).
type simClick struct{ at, delay float64 }

// simulate returns n clicks uniform over [0, span] seconds, each converting
// with probability q after a delay drawn by delay.
func simulate(r *rand.Rand, n int, span, q float64, delay func(*rand.Rand) float64) []simClick {
	out := make([]simClick, n)
	for i := range out {
		out[i] = simClick{at: r.Float64() * span, delay: -1}
		if r.Float64() < q {
			out[i].delay = delay(r)
		}
	}
	sort.Slice(out, func(i, j int) bool { return out[i].at < out[j].at })
	return out
}

// truncExp draws exponential delays with the given rate truncated at w, by
// inverting G(a) = (1-exp(-rate a))/(1-exp(-rate w)).
func truncExp(rate, w float64) func(*rand.Rand) float64 {
	fw := -math.Expm1(-rate * w)
	return func(r *rand.Rand) float64 { return -math.Log1p(-r.Float64()*fw) / rate }
}

// truncWeibull draws Weibull(shape, scale) delays truncated at w.
func truncWeibull(shape, scale, w float64) func(*rand.Rand) float64 {
	fw := -math.Expm1(-math.Pow(w/scale, shape))
	return func(r *rand.Rand) float64 {
		return scale * math.Pow(-math.Log1p(-r.Float64()*fw), 1/shape)
	}
}

// obsClick is what is known of a click at an as-of time: its age and, if
// its conversion has been seen, the delay.
type obsClick struct {
	age       float64
	converted bool
	delay     float64
}

// observe returns the clicks made by asof as seen at asof.
func observe(clicks []simClick, asof float64) []obsClick {
	var out []obsClick
	for _, c := range clicks {
		if c.at > asof {
			break
		}
		o := obsClick{age: asof - c.at}
		if c.delay >= 0 && c.at+c.delay <= asof {
			o.converted, o.delay = true, c.delay
		}
		out = append(out, o)
	}
	return out
}

// stateAt feeds the clicks made by asof, and the conversions seen by then,
// into an ArmState advanced to asof, and returns its FitData.
func stateAt(clicks []simClick, asof float64, l Layout) *FitData {
	s := NewArmState(l)
	s.Advance(fitEpoch + int64(asof*1000))
	for _, c := range clicks {
		if c.at > asof {
			break
		}
		ct := fitEpoch + int64(c.at*1000)
		s.AddClicks(ct, 1)
		if c.delay >= 0 && c.at+c.delay <= asof {
			s.AddConversion(ct, ct+int64(c.delay*1000))
		}
	}
	d := s.FitData()
	return &d
}

// perClickExpLogLik is the log-likelihood of the window model with a
// truncated exponential delay written click by click from exact ages and
// delays: converted log(q g(d)), pending log(1 - q G(a)), matured
// unconverted log(1-q), with g and G the exponential truncated at w. It
// returns the gradient in (logit q, log rate) into grad when non-nil.
func perClickExpLogLik(obs []obsClick, w, q, rate float64, grad []float64) float64 {
	fw := -math.Expm1(-rate * w)
	logFW := math.Log(fw)
	dLogFW := rate * w / math.Expm1(rate*w) // d log F(W) / d log rate
	dFW := w * math.Exp(-rate*w)            // dF(W)/d rate
	ll, g0, g1 := 0.0, 0.0, 0.0
	for _, o := range obs {
		switch {
		case o.converted:
			ll += math.Log(q) + math.Log(rate) - rate*o.delay - logFW
			g0 += 1 - q
			g1 += 1 - rate*o.delay - dLogFW
		case o.age >= w:
			ll += math.Log1p(-q)
			g0 -= q
		default:
			fa := -math.Expm1(-rate * o.age)
			g := fa / fw
			den := 1 - q*g
			ll += math.Log1p(-q * g)
			if grad != nil {
				dg := (o.age*math.Exp(-rate*o.age)*fw - fa*dFW) / (fw * fw) // dG/d rate
				g0 -= q * (1 - q) * g / den
				g1 -= q * rate * dg / den
			}
		}
	}
	if grad != nil {
		grad[0], grad[1] = g0, g1
	}
	return ll
}

// perClickExpMLE maximises perClickExpLogLik (per click) over
// (logit q, log rate) with gonum's BFGS from (q0, rate0).
func perClickExpMLE(t testing.TB, obs []obsClick, w, q0, rate0 float64) (q, rate float64) {
	t.Helper()
	unpack := func(x []float64) (float64, float64) { return 1 / (1 + math.Exp(-x[0])), math.Exp(x[1]) }
	n := float64(len(obs))
	prob := optimize.Problem{
		Func: func(x []float64) float64 {
			q, rate := unpack(x)
			return -perClickExpLogLik(obs, w, q, rate, nil) / n
		},
		Grad: func(g, x []float64) {
			q, rate := unpack(x)
			perClickExpLogLik(obs, w, q, rate, g)
			g[0], g[1] = -g[0]/n, -g[1]/n
		},
	}
	x0 := []float64{math.Log(q0 / (1 - q0)), math.Log(rate0)}
	res, err := optimize.Minimize(prob, x0, &optimize.Settings{GradientThreshold: 1e-9}, &optimize.BFGS{})
	if res == nil {
		t.Fatalf("per-click MLE: %v", err)
	}
	// Close to the optimum the line search can stall on rounding; accept
	// the point if the gradient there is negligible.
	g := make([]float64, 2)
	prob.Grad(g, res.X)
	if gn := math.Hypot(g[0], g[1]); err != nil && gn > 1e-6 {
		t.Fatalf("per-click MLE: %v (gradient norm %g)", err, gn)
	}
	return unpack(res.X)
}

// naiveStart returns a starting point for the per-click fit that does not
// use the binned fit: the observed rate and the mean observed delay.
func naiveStart(obs []obsClick) (q, rate float64) {
	var conv, sum float64
	for _, o := range obs {
		if o.converted {
			conv++
			sum += o.delay
		}
	}
	return conv / float64(len(obs)), conv / sum
}

func relErr(got, want float64) float64 { return math.Abs(got-want) / math.Abs(want) }

// readCSV returns the rows of a testdata CSV file without its header.
func readCSV(t *testing.T, name string) [][]string {
	t.Helper()
	f, err := os.Open("../testdata/" + name)
	if err != nil {
		t.Fatalf("open %s: %v", name, err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatalf("read %s: %v", name, err)
	}
	return rows[1:]
}

type survObs struct {
	time  float64
	event bool
}

func readGBSG2(t *testing.T) []survObs {
	var out []survObs
	for _, r := range readCSV(t, "gbsg2-time-recurrence.csv") {
		v, err := strconv.ParseFloat(r[0], 64)
		if err != nil {
			t.Fatal(err)
		}
		out = append(out, survObs{time: v, event: r[1] == "1"})
	}
	return out
}

// gbsg2Ref is the published no-covariate mixture cure fit to GBSG2
// (recurrence-free survival, days): S(t) = pi + (1-pi) exp(-lambda t^gamma).
// Source: German Breast Cancer Study Group data, Schumacher M. et al. (1994),
// J. Clin. Oncol. 12:2086-2093; reference maximum-likelihood fit
// logit(pi) = -0.4731367, ln(lambda) = -11.10519, ln(gamma) = 0.448163,
// maximised log-likelihood -2628.235, as reported in published software
// tests comparing two independent implementations of the mixture cure model
// (values collected in /work/shared/data/README.md of this project's
// reference data; see testdata/README.md).
var gbsg2Ref = struct{ logitPi, logLambda, logGamma, logLik float64 }{-0.4731367, -11.10519, 0.448163, -2628.235}

// gbsg2ExactLogLik is the per-patient mixture-cure log-likelihood with
// density (1-pi) lambda gamma t^(gamma-1) exp(-lambda t^gamma).
func gbsg2ExactLogLik(obs []survObs, logitPi, logLambda, logGamma float64) float64 {
	pi := 1 / (1 + math.Exp(-logitPi))
	lambda, gamma := math.Exp(logLambda), math.Exp(logGamma)
	ll := 0.0
	for _, o := range obs {
		h := lambda * math.Pow(o.time, gamma)
		if o.event {
			ll += math.Log(1-pi) + math.Log(lambda*gamma) + (gamma-1)*math.Log(o.time) - h
		} else {
			ll += math.Log(pi + (1-pi)*math.Exp(-h))
		}
	}
	return ll
}

// TestGBSG2MixtureCure checks the Weibull fit against the published
// mixture-cure fit to GBSG2 (gbsg2Ref): each patient is a click whose age is
// its follow-up, each recurrence a conversion at its time.
func TestGBSG2MixtureCure(t *testing.T) {
	obs := readGBSG2(t)
	if len(obs) != 686 {
		t.Fatalf("read %d patients, want 686", len(obs))
	}
	refQ := 1 - 1/(1+math.Exp(-gbsg2Ref.logitPi)) // 0.6161
	refShape := math.Exp(gbsg2Ref.logGamma)       // 1.5654
	refScale := math.Exp(-gbsg2Ref.logLambda / refShape)

	t.Run("per-patient likelihood at the reference", func(t *testing.T) {
		ll := gbsg2ExactLogLik(obs, gbsg2Ref.logitPi, gbsg2Ref.logLambda, gbsg2Ref.logGamma)
		if math.Abs(ll-gbsg2Ref.logLik) > 2e-3 {
			t.Fatalf("log-likelihood at the published parameters = %.4f, want %.3f", ll, gbsg2Ref.logLik)
		}
	})

	// Time unit: one day of follow-up is one second of delay, with a window
	// of 20000 days (7.5 times the last observation, 2659 days). At the
	// reference scale (about 1204 days) (W/scale)^shape > 80, so
	// F(W) = 1 to double precision and the window model is the standard
	// mixture cure model.
	const window = 20000.0

	t.Run("exact likelihood through FitData", func(t *testing.T) {
		// Delay bins of width 2*eps around each distinct recurrence time make
		// the interval likelihood q*(G(t+eps)-G(t-eps)) equal the density
		// form q*g(t)*2eps up to O(eps^2): the package's log-likelihood minus
		// 299*log(2eps) is then the exact log-likelihood.
		const eps = 1e-4
		d := exactFitData(obs, window, eps)
		p, err := prepare(d)
		if err != nil {
			t.Fatal(err)
		}
		r := &emRun{p: p, family: FamilyWeibull}
		r.logS = make([]float64, len(p.ages))
		r.lm = make([]float64, len(p.h))
		dist := newParametric(FamilyWeibull, refShape, refScale, window)
		shift := p.conv * math.Log(2*eps)
		if got := r.loglik(refQ, &dist) - shift; math.Abs(got-gbsg2Ref.logLik) > 2e-3 {
			t.Errorf("package log-likelihood at the reference = %.4f, want %.3f", got, gbsg2Ref.logLik)
		}
		f, err := FitModel(d, FitOptions{Family: FamilyWeibull})
		if err != nil {
			t.Fatal(err)
		}
		if !f.Converged {
			t.Errorf("EM did not converge in %d iterations", f.Iterations)
		}
		if got := f.LogLik - shift; math.Abs(got-gbsg2Ref.logLik) > 5e-3 {
			t.Errorf("maximised log-likelihood = %.4f, want %.3f", got, gbsg2Ref.logLik)
		}
		for _, c := range []struct {
			name      string
			got, want float64
		}{{"1-pi", f.Q, refQ}, {"shape", f.Shape, refShape}, {"scale", f.Scale, refScale}} {
			if e := relErr(c.got, c.want); e > 2e-3 {
				t.Errorf("%s = %.5f, want %.5f (rel. error %.2g)", c.name, c.got, c.want, e)
			}
		}
	})

	t.Run("Weibull fit through the binned state", func(t *testing.T) {
		// One day is one minute here (the state works in milliseconds and its
		// first delay bin is a minute wide). Fine delay bins (200 per
		// decade, 1.2% wide) and age buckets (0.2%) keep the binning error
		// well under the 2% tolerance.
		l := Layout{Window: time.Duration(window) * time.Minute, AgeError: 0.002, BinsPerDecade: 200}
		s := NewArmState(l)
		asOf := fitEpoch
		s.Advance(asOf)
		for _, o := range obs {
			ms := int64(o.time * 60000)
			s.AddClicks(asOf-ms, 1)
			if o.event {
				s.AddConversion(asOf-ms, asOf)
			}
		}
		d := s.FitData()
		if d.TotalClicks() != 686 || d.TotalConversions() != 299 {
			t.Fatalf("state holds %v clicks, %v conversions", d.TotalClicks(), d.TotalConversions())
		}
		f, err := FitModel(&d, FitOptions{Family: FamilyWeibull})
		if err != nil {
			t.Fatal(err)
		}
		if !f.Converged {
			t.Errorf("EM did not converge in %d iterations", f.Iterations)
		}
		if e := relErr(f.Q, 0.6161); e > 0.02 {
			t.Errorf("eventual rate 1-pi = %.4f, want 0.6161 within 2%%", f.Q)
		}
		if e := relErr(f.Shape, 1.5654); e > 0.02 {
			t.Errorf("shape = %.4f, want 1.5654 within 2%%", f.Shape)
		}
		if e := relErr(f.Scale/60, refScale); e > 0.02 {
			t.Errorf("scale = %.1f days, want %.1f within 2%%", f.Scale/60, refScale)
		}
		t.Logf("binned fit: 1-pi %.4f shape %.4f scale %.1f days in %d iterations", f.Q, f.Shape, f.Scale/60, f.Iterations)
	})
}

// exactFitData returns survival data as FitData with a delay bin of width
// 2*eps around each distinct event time and each pending click at its exact
// follow-up.
func exactFitData(obs []survObs, window, eps float64) *FitData {
	var times []float64
	for _, o := range obs {
		if o.event {
			times = append(times, o.time)
		}
	}
	slices.Sort(times)
	times = slices.Compact(times)
	edges := []float64{0}
	for _, x := range times {
		edges = append(edges, x-eps, x+eps)
	}
	edges = append(edges, window)
	d := &FitData{Window: window, Delays: DelayBins{Edges: edges, Counts: make([]float64, len(edges)-1)}}
	for _, o := range obs {
		if o.event {
			i := sort.SearchFloat64s(times, o.time)
			d.Delays.Counts[2*i+1]++
			d.Delays.Count++
			d.Delays.Sum += o.time
			d.Pending = append(d.Pending, PendingBin{Age: o.time, Clicks: 1, Converted: 1})
		} else {
			d.Pending = append(d.Pending, PendingBin{Age: o.time, Clicks: 1})
		}
	}
	return d
}

// kmFitData returns right-censored survival times as FitData for the
// histogram family: a delay edge just above every distinct time, so each
// event time has its own bin and a censoring tied with an event sits at the
// top of that bin (it stays at risk, the Kaplan–Meier convention).
func kmFitData(obs []survObs, window, eps float64) *FitData {
	var times []float64
	for _, o := range obs {
		times = append(times, o.time)
	}
	slices.Sort(times)
	times = slices.Compact(times)
	edges := []float64{0}
	for _, x := range times {
		edges = append(edges, x+eps)
	}
	edges = append(edges, window)
	d := &FitData{Window: window, Delays: DelayBins{Edges: edges, Counts: make([]float64, len(edges)-1)}}
	for _, o := range obs {
		pb := PendingBin{Age: o.time, Clicks: 1}
		if o.event {
			i := sort.SearchFloat64s(times, o.time)
			d.Delays.Counts[i]++
			d.Delays.Count++
			d.Delays.Sum += o.time
			pb.Converted = 1
		}
		d.Pending = append(d.Pending, pb)
	}
	return d
}

// TestHistogramKaplanMeier checks that with q fixed at 1 and censoring only
// by follow-up the histogram family is the Kaplan–Meier estimator.
func TestHistogramKaplanMeier(t *testing.T) {
	var sixMP, placebo []survObs
	for _, r := range readCSV(t, "6mp-remission.csv") {
		v, err := strconv.ParseFloat(r[0], 64)
		if err != nil {
			t.Fatal(err)
		}
		o := survObs{time: v, event: r[1] == "1"}
		if r[2] == "6-MP" {
			sixMP = append(sixMP, o)
		} else {
			placebo = append(placebo, o)
		}
	}
	bewick := []survObs{{1, true}, {1, true}, {4, true}, {5, true}, {6, false}, {9, true}, {9, false}, {22, true}}
	cases := []struct {
		name string
		obs  []survObs
		// want maps a time to the published Kaplan–Meier survival just after it.
		want map[float64]float64
		tol  float64
	}{
		// Freireich E.J. et al. (1963), "The effect of 6-mercaptopurine on the
		// duration of steroid-induced remissions in acute leukemia", Blood
		// 21:699-716; Kaplan–Meier values as tabulated in Kleinbaum D.G. &
		// Klein M., "Survival Analysis: A Self-Learning Text" (6-MP group,
		// four decimals).
		{"6-MP", sixMP, map[float64]float64{6: 0.8571, 7: 0.8067, 10: 0.7529, 13: 0.6902, 16: 0.6275, 22: 0.5378, 23: 0.4482}, 6e-5},
		// Same source, placebo group (no censoring).
		{"placebo", placebo, map[float64]float64{1: 0.9048, 2: 0.8095, 3: 0.7619, 4: 0.6667, 5: 0.5714, 8: 0.3810, 11: 0.2857, 12: 0.1905, 15: 0.1429, 17: 0.0952, 22: 0.0476, 23: 0}, 6e-5},
		// Bewick V., Cheek L., Ball J. (2004), "Statistics review 12:
		// Survival analysis", Critical Care 8:389-394, Table 2 (three
		// decimals).
		{"Bewick Table 2", bewick, map[float64]float64{1: 0.750, 4: 0.625, 5: 0.500, 9: 0.333, 22: 0}, 6e-4},
	}
	const eps = 1e-7
	one := 1.0
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if len(c.obs) == 0 {
				t.Fatal("no data")
			}
			d := kmFitData(c.obs, 100, eps)
			f, err := FitModel(d, FitOptions{Family: FamilyHistogram, FixedQ: &one})
			if err != nil {
				t.Fatal(err)
			}
			if f.Q != 1 || !f.Converged {
				t.Fatalf("q = %v, converged %v", f.Q, f.Converged)
			}
			times := slices.Sorted(func(yield func(float64) bool) {
				for k := range c.want {
					if !yield(k) {
						return
					}
				}
			})
			for _, x := range times {
				// Survival just after x is 1 - G at the top edge of x's bin.
				if got := 1 - f.CDF(x+eps); math.Abs(got-c.want[x]) > c.tol {
					t.Errorf("S(%v) = %.5f, want %.4f", x, got, c.want[x])
				}
			}
		})
	}
}

// TestExponentialMatchesPerClickMLE checks that EM on the binned state gives
// the same eventual rate as a direct per-click maximum-likelihood fit of the
// same model (exact ages and delays, gonum Nelder–Mead) at early, middle and
// late as-of times.
func TestExponentialMatchesPerClickMLE(t *testing.T) {
	const (
		q      = 0.05
		mean   = daySec // rate of the untruncated exponential: one per day
		window = 7 * daySec
		span   = 21 * daySec
	)
	r := rand.New(rand.NewPCG(11, 12))
	clicks := simulate(r, 150000, span, q, truncExp(1/mean, window))
	l := Layout{Window: 7 * 24 * time.Hour}
	for _, c := range []struct {
		name string
		asOf float64
	}{
		{"early (all pending, 2 days in)", 2 * daySec},
		{"middle (7 days in, none matured)", 7 * daySec},
		{"late (21 days in, two thirds matured)", 21 * daySec},
	} {
		t.Run(c.name, func(t *testing.T) {
			d := stateAt(clicks, c.asOf, l)
			f, err := FitModel(d, FitOptions{Family: FamilyExponential})
			if err != nil {
				t.Fatal(err)
			}
			if !f.Converged {
				t.Errorf("EM did not converge in %d iterations", f.Iterations)
			}
			obs := observe(clicks, c.asOf)
			q0, rate0 := naiveStart(obs)
			mq, mrate := perClickExpMLE(t, obs, window, q0, rate0)
			if e := relErr(f.Q, mq); e > 0.01 {
				t.Errorf("binned EM q = %.5f, per-click MLE q = %.5f (rel. diff %.3g > 1%%)", f.Q, mq, e)
			}
			if e := relErr(f.Rate, mrate); e > 0.02 {
				t.Errorf("binned EM rate = %.4g/day, per-click MLE %.4g/day", f.Rate*daySec, mrate*daySec)
			}
			obsCVR := d.TotalConversions() / d.TotalClicks()
			t.Logf("q EM %.5f per-click %.5f observed %.5f; rate/day EM %.4f per-click %.4f; %d EM iterations, %d pending bins",
				f.Q, mq, obsCVR, f.Rate*daySec, mrate*daySec, f.Iterations, len(d.Pending))
		})
	}
}

// TestWeibullRecovery checks that the Weibull family recovers known shape
// and scale from data simulated with Weibull delays and that AIC prefers it
// to the exponential.
func TestWeibullRecovery(t *testing.T) {
	const window = 7 * daySec
	l := Layout{Window: 7 * 24 * time.Hour}
	for _, c := range []struct {
		shape, scale, q float64
	}{
		{0.6, 0.5 * daySec, 0.08}, // heavy early mass, long tail
		{2.0, 1.5 * daySec, 0.04}, // delays bunched around a day and a half
	} {
		t.Run(strconv.FormatFloat(c.shape, 'g', -1, 64), func(t *testing.T) {
			r := rand.New(rand.NewPCG(21, uint64(c.shape*10)))
			clicks := simulate(r, 60000, 14*daySec, c.q, truncWeibull(c.shape, c.scale, window))
			d := stateAt(clicks, 14*daySec, l)
			weib, err := FitModel(d, FitOptions{Family: FamilyWeibull})
			if err != nil {
				t.Fatal(err)
			}
			expo, err := FitModel(d, FitOptions{Family: FamilyExponential})
			if err != nil {
				t.Fatal(err)
			}
			if e := relErr(weib.Shape, c.shape); e > 0.10 {
				t.Errorf("shape = %.3f, want %.3f within 10%%", weib.Shape, c.shape)
			}
			if e := relErr(weib.Scale, c.scale); e > 0.10 {
				t.Errorf("scale = %.3f days, want %.3f within 10%%", weib.Scale/daySec, c.scale/daySec)
			}
			if e := relErr(weib.Q, c.q); e > 0.10 {
				t.Errorf("q = %.4f, want %.4f within 10%%", weib.Q, c.q)
			}
			if !(weib.AIC < expo.AIC) {
				t.Errorf("AIC Weibull %.1f not below exponential %.1f", weib.AIC, expo.AIC)
			}
			auto, err := FitModel(d, FitOptions{})
			if err != nil {
				t.Fatal(err)
			}
			if auto.Family != FamilyWeibull {
				t.Errorf("auto picked %v (AIC %.1f), Weibull AIC %.1f", auto.Family, auto.AIC, weib.AIC)
			}
			t.Logf("shape %.3f scale %.3f d q %.4f; AIC weibull %.1f exponential %.1f auto %v", weib.Shape, weib.Scale/daySec, weib.Q, weib.AIC, expo.AIC, auto.Family)
		})
	}
}

// TestDelayDistributions checks G and the mean delay of the parametric
// families against gonum's distributions and quadrature: G(a) = F(a)/F(W)
// (the distribution truncated at W) and E[D | D <= W] = integral of 1-G.
func TestDelayDistributions(t *testing.T) {
	const w = 7 * daySec
	for _, c := range []struct {
		name   string
		family DelayFamily
		k, s   float64
	}{
		{"exponential", FamilyExponential, 1, 0.8 * daySec},
		{"exponential long", FamilyExponential, 1, 20 * daySec},
		{"weibull 0.5", FamilyWeibull, 0.5, 0.3 * daySec},
		{"weibull 3", FamilyWeibull, 3, 2 * daySec},
	} {
		t.Run(c.name, func(t *testing.T) {
			d := newParametric(c.family, c.k, c.s, w)
			ref := distuv.Weibull{K: c.k, Lambda: c.s}
			for _, a := range []float64{1, 60, 3600, daySec, 3 * daySec, w - 1} {
				want := ref.CDF(a) / ref.CDF(w)
				if got := d.cdf(a); math.Abs(got-want) > 1e-12 {
					t.Errorf("G(%v) = %.15g, want %.15g", a, got, want)
				}
			}
			mean := quad.Fixed(func(a float64) float64 { return 1 - ref.CDF(a)/ref.CDF(w) }, 0, w, 2000, nil, 0)
			if got := d.mean(); relErr(got, mean) > 1e-6 {
				t.Errorf("mean delay = %.6g, quadrature %.6g", got, mean)
			}
		})
	}
	t.Run("histogram", func(t *testing.T) {
		edges := []float64{0, 60, 600, 3600, w}
		d := newHistogramDist(edges, []float64{0.2, 0.5, 0.25, 0.3})
		// Masses: 0.2, 0.8*0.5, 0.4*0.25, remainder 0.3.
		masses := []float64{0.2, 0.4, 0.1, 0.3}
		cum := 0.0
		for i, m := range masses {
			if got := d.cdf(edges[i]); math.Abs(got-cum) > 1e-15 {
				t.Errorf("G(%v) = %v, want %v", edges[i], got, cum)
			}
			mid := (edges[i] + edges[i+1]) / 2
			if got := d.cdf(mid); math.Abs(got-(cum+m/2)) > 1e-15 {
				t.Errorf("G(%v) = %v, want %v", mid, got, cum+m/2)
			}
			cum += m
		}
		mean := quad.Fixed(func(a float64) float64 { return 1 - d.cdf(a) }, 0, w, 20000, nil, 0)
		if got := d.mean(); relErr(got, mean) > 1e-3 {
			t.Errorf("mean delay = %v, quadrature %v", got, mean)
		}
	})
}

// TestEMLogLikNeverDecreases checks the EM ascent property (Dempster, Laird
// & Rubin 1977, Theorem 1) for each family.
func TestEMLogLikNeverDecreases(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	clicks := simulate(r, 20000, 10*daySec, 0.06, truncWeibull(0.8, 0.7*daySec, 7*daySec))
	d := stateAt(clicks, 4*daySec, Layout{})
	p, err := prepare(d)
	if err != nil {
		t.Fatal(err)
	}
	for _, fam := range []DelayFamily{FamilyExponential, FamilyWeibull, FamilyHistogram} {
		t.Run(fam.String(), func(t *testing.T) {
			var trace []float64
			f := fitFamily(p, d, fam, FitOptions{MaxIter: 300, Tol: 1e-13}, &trace)
			if len(trace) < 3 {
				t.Fatalf("only %d iterations traced", len(trace))
			}
			for i := 1; i < len(trace); i++ {
				if trace[i] < trace[i-1]-1e-10*math.Abs(trace[i-1]) {
					t.Fatalf("log-likelihood fell at iteration %d: %.12g -> %.12g", i, trace[i-1], trace[i])
				}
			}
			if trace[len(trace)-1] != f.LogLik {
				t.Errorf("reported LogLik %v is not the last iterate %v", f.LogLik, trace[len(trace)-1])
			}
			if !(trace[len(trace)-1] > trace[0]) {
				t.Errorf("EM made no progress from %v", trace[0])
			}
		})
	}
}

// TestWarmStart checks that starting EM from the previous fit of the same
// arm converges in fewer iterations to the same answer.
func TestWarmStart(t *testing.T) {
	r := rand.New(rand.NewPCG(5, 6))
	clicks := simulate(r, 40000, 10*daySec, 0.05, truncExp(1/daySec, 7*daySec))
	before := stateAt(clicks, 3*daySec, Layout{})
	after := stateAt(clicks, 3*daySec+3600, Layout{})
	for _, fam := range []DelayFamily{FamilyExponential, FamilyWeibull, FamilyHistogram} {
		t.Run(fam.String(), func(t *testing.T) {
			prev, err := FitModel(before, FitOptions{Family: fam})
			if err != nil {
				t.Fatal(err)
			}
			cold, err := FitModel(after, FitOptions{Family: fam})
			if err != nil {
				t.Fatal(err)
			}
			warm, err := FitModel(after, FitOptions{Family: fam, Warm: prev})
			if err != nil {
				t.Fatal(err)
			}
			if !(warm.Iterations < cold.Iterations) {
				t.Errorf("warm start took %d iterations, cold %d", warm.Iterations, cold.Iterations)
			}
			if e := relErr(warm.Q, cold.Q); e > 1e-3 {
				t.Errorf("warm q %.6f, cold q %.6f", warm.Q, cold.Q)
			}
			t.Logf("iterations cold %d warm %d", cold.Iterations, warm.Iterations)
		})
	}
}

// checkFinite fails if any reported number of f is NaN or infinite.
func checkFinite(t *testing.T, f *Fit) {
	t.Helper()
	vals := map[string]float64{"Q": f.Q, "Rate": f.Rate, "Shape": f.Shape, "Scale": f.Scale, "MeanDelay": f.MeanDelay,
		"LogLik": f.LogLik, "AIC": f.AIC, "RipeClicks": f.RipeClicks, "CDF(W/2)": f.CDF(f.Window / 2)}
	for _, h := range f.Hazards {
		vals["hazard"] = h
		if math.IsNaN(h) || h < 0 || h > 1 {
			t.Errorf("hazard %v", h)
		}
	}
	for name, v := range vals {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			t.Errorf("%s = %v", name, v)
		}
	}
	if f.Q < 0 || f.Q > 1 {
		t.Errorf("q = %v outside [0, 1]", f.Q)
	}
}

// TestDegenerateData checks finite, sensible fits on edge cases.
func TestDegenerateData(t *testing.T) {
	l := Layout{}.WithDefaults()
	edges := l.DelayEdges()
	w := l.Window.Seconds()
	counts := func(bins map[int]float64) []float64 {
		c := make([]float64, len(edges)-1)
		for k, v := range bins {
			c[k] = v
		}
		return c
	}
	empty := &FitData{Window: w, Delays: DelayBins{Edges: edges, Counts: counts(nil)}}
	noConv := &FitData{Window: w, Delays: DelayBins{Edges: edges, Counts: counts(nil)},
		Pending: []PendingBin{{Age: 3600, Clicks: 500}, {Age: 2 * daySec, Clicks: 700}}, MaturedClicks: 300}
	oneBin := &FitData{Window: w, Delays: DelayBins{Edges: edges, Counts: counts(map[int]float64{40: 25}), Count: 25, Sum: 25 * edges[40]},
		Pending: []PendingBin{{Age: 3600, Clicks: 500}, {Age: 2 * daySec, Clicks: 700, Converted: 25}}}
	allMatured := &FitData{Window: w, Delays: DelayBins{Edges: edges, Counts: counts(map[int]float64{10: 3, 50: 9, 70: 4}), Count: 16},
		MaturedClicks: 400, MaturedConversions: 16}
	allConverted := &FitData{Window: w, Delays: DelayBins{Edges: edges, Counts: counts(map[int]float64{30: 10, 60: 10}), Count: 20},
		MaturedClicks: 20, MaturedConversions: 20}
	ageZero := &FitData{Window: w, Delays: DelayBins{Edges: edges, Counts: counts(map[int]float64{0: 2}), Count: 2},
		Pending: []PendingBin{{Age: 0, Clicks: 100, Converted: 2}}}
	for _, c := range []struct {
		name  string
		d     *FitData
		wantQ float64 // NaN: only finiteness is checked
	}{
		{"zero clicks", empty, 0},
		{"zero conversions", noConv, 0},
		{"all conversions in one bin", oneBin, math.NaN()},
		{"every click matured", allMatured, 16.0 / 400},
		{"every click converted", allConverted, 1},
		{"all clicks at age zero", ageZero, math.NaN()},
	} {
		for _, fam := range []DelayFamily{FamilyAuto, FamilyExponential, FamilyWeibull, FamilyHistogram} {
			t.Run(c.name+"/"+fam.String(), func(t *testing.T) {
				f, err := FitModel(c.d, FitOptions{Family: fam})
				if err != nil {
					t.Fatal(err)
				}
				checkFinite(t, f)
				if !math.IsNaN(c.wantQ) && math.Abs(f.Q-c.wantQ) > 1e-12 {
					t.Errorf("q = %.15g, want %.15g", f.Q, c.wantQ)
				}
				post, err := NewLikelihoodPosterior(c.d, f)
				if err != nil {
					t.Fatal(err)
				}
				lo, hi := post.Interval95()
				if m := post.Mean(); math.IsNaN(m) || !(lo <= m && m <= hi) || lo < 0 || hi > 1 {
					t.Errorf("posterior mean %v, interval [%v, %v]", m, lo, hi)
				}
			})
		}
	}
	t.Run("invalid data", func(t *testing.T) {
		bad := []*FitData{
			{Window: 0, Delays: DelayBins{Edges: edges, Counts: counts(nil)}},
			{Window: w, Delays: DelayBins{Edges: []float64{0, 60}, Counts: []float64{0}}},
			{Window: w, Delays: DelayBins{Edges: edges, Counts: counts(nil)}, Pending: []PendingBin{{Age: w, Clicks: 1}}},
			{Window: w, Delays: DelayBins{Edges: edges, Counts: counts(map[int]float64{3: -1})}},
		}
		for i, d := range bad {
			if _, err := FitModel(d, FitOptions{}); err == nil {
				t.Errorf("case %d: no error", i)
			}
		}
		if _, err := FitModel(empty, FitOptions{Tol: -1}); err == nil {
			t.Error("negative tolerance accepted")
		}
		q := 1.5
		if _, err := FitModel(empty, FitOptions{FixedQ: &q}); err == nil {
			t.Error("fixed q 1.5 accepted")
		}
	})
}

// TestFitDeterministic checks that fitting the same data twice, and data
// from states fed in different orders, gives identical results.
func TestFitDeterministic(t *testing.T) {
	r := rand.New(rand.NewPCG(8, 9))
	clicks := simulate(r, 5000, 5*daySec, 0.07, truncExp(2/daySec, 7*daySec))
	a := stateAt(clicks, 4*daySec, Layout{})
	rev := slices.Clone(clicks)
	slices.Reverse(rev)
	s := NewArmState(Layout{})
	s.Advance(fitEpoch + 4*86400*1000)
	for _, c := range rev {
		if c.at > 4*daySec {
			continue
		}
		ct := fitEpoch + int64(c.at*1000)
		s.AddClicks(ct, 1)
		if c.delay >= 0 && c.at+c.delay <= 4*daySec {
			s.AddConversion(ct, ct+int64(c.delay*1000))
		}
	}
	b := s.FitData()
	f1, err := FitModel(a, FitOptions{})
	if err != nil {
		t.Fatal(err)
	}
	f2, err := FitModel(&b, FitOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if f1.Q != f2.Q || f1.LogLik != f2.LogLik || f1.Family != f2.Family || f1.RipeClicks != f2.RipeClicks {
		t.Errorf("fits differ: %+v vs %+v", f1, f2)
	}
}
