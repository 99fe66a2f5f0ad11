package estimator

import (
	"cmp"
	"errors"
	"fmt"
	"math"
	"slices"
)

// This file computes the posterior of the eventual conversion probability
// q with the delay parameters integrated out over the whole support of
// their prior (see Prior), for the parametric families. Early data leave a
// long, curved ridge in the likelihood (a high q with slow delays explains
// the conversions seen so far as well as a low q with fast delays), so the
// integral is a quadrature over the entire prior box, refined where the
// posterior is concentrated, never a window around the maximum-likelihood
// estimate.
//
// Notation: u = (log shape, log scale) for the Weibull family and
// u = (log scale) for the exponential (shape 1); z = logit(q). For fixed u
// the log posterior of z is
//
//	f(z | u) = (C+a) log q + (U+b) log(1-q) + sum_j u_j log(1 - q G_j(u)) + D(u)
//
// with C the observed conversions, U the matured unconverted clicks, u_j
// the unconverted clicks of pending bin j, G_j(u) the delay CDF at the
// bin's age, D(u) = sum_k h_k log(G(e_{k+1}) - G(e_k)) the delay histogram's
// term and Beta(a, b) the prior of q (its density times the Jacobian
// dq/dz = q(1-q)). The marginal of u is approximated by Laplace's method in
// z to choose where to refine; the final marginal of q is computed on a
// grid of z with every u node's conditional density evaluated exactly.
//
// The sum over pending bins is evaluated through the moments
// T_m = sum_j u_j G_j^m: sum_j u_j log(1 - q G_j) = -sum_m q^m T_m / m,
// truncated after M terms with M chosen per node so that the remainder is
// below ipSeriesTol relative for the q the node needs (q*max(G) <= rho,
// rho^M <= ipSeriesTol), and by direct summation beyond.

// Quadrature settings of the integrated posterior.
const (
	// ipSeriesTol is the relative truncation error allowed in the moment
	// series; ipMinTerms and ipMaxTerms bound its length, and ipMaxRho is
	// the largest q*max(G) it is used for.
	ipSeriesTol = 1e-10
	ipMinTerms  = 6
	ipMaxTerms  = 40
	ipMaxRho    = 0.5
	// ipMergeAge is the widest span of log ages merged into one pending
	// bin (ten percent).
	ipMergeAge = 0.0953
)

// seriesTerms returns the number of moments needed for q*max(G) up to rho
// and the rho they are valid for.
func seriesTerms(rho float64) (int, float64) {
	rho = math.Min(math.Max(rho, 1e-9), ipMaxRho)
	m := int(math.Ceil(math.Log(ipSeriesTol) / math.Log(rho)))
	m = min(max(m, ipMinTerms), ipMaxTerms)
	return m, math.Exp(math.Log(ipSeriesTol) / float64(m))
}

// ipData is one arm's data laid out for the integrated posterior.
type ipData struct {
	w, logW   float64
	conv      float64 // C
	matUnconv float64 // U
	// Pending bins with unconverted clicks and a positive age.
	logAge, u []float64
	// Delay bins holding conversions: log of the lower edge (-Inf at 0),
	// log of the upper edge (the window for the last bin), count.
	binLo, binHi, binN []float64
	clicks             float64
}

// newIPData lays out prepared data for integration.
func newIPData(p *prepared) *ipData {
	d := &ipData{w: p.w, logW: math.Log(p.w), conv: p.conv, matUnconv: p.matUnconv}
	// Pending bins by age, neighbours within ipMergeAge of each other
	// merged at their clicks' mean log age: the pending term is smooth in
	// the age, so this changes it only at second order in the log-age
	// spread (about (log 1.1)^2/8 relative), and halves the work per node.
	type bin struct{ la, u float64 }
	var bins []bin
	for j, u := range p.unconv {
		if u > 0 && p.ages[j] > 0 {
			bins = append(bins, bin{p.logAges[j], u})
		}
		d.clicks += p.clicks[j]
	}
	slices.SortFunc(bins, func(a, b bin) int { return cmp.Compare(a.la, b.la) })
	for i := 0; i < len(bins); {
		j, u, sum := i, 0.0, 0.0
		for ; j < len(bins) && bins[j].la-bins[i].la <= ipMergeAge; j++ {
			u += bins[j].u
			sum += bins[j].u * bins[j].la
		}
		d.logAge = append(d.logAge, sum/u)
		d.u = append(d.u, u)
		i = j
	}
	d.clicks += p.matClicks
	for k, c := range p.h {
		if c > 0 {
			d.binLo = append(d.binLo, p.logEdges[k])
			hi := p.logEdges[k+1]
			if k+1 == len(p.edges)-1 {
				hi = d.logW
			}
			d.binHi = append(d.binHi, hi)
			d.binN = append(d.binN, c)
		}
	}
	return d
}

// ipNode is the evaluation of one point u of the delay parameters.
type ipNode struct {
	u       [2]float64 // log shape (0 for the exponential), log scale (seconds)
	delayLL float64    // D(u)
	gMax    float64    // largest G_j
	// Moment series of the pending term (see setMoments): tA over bins
	// with G <= 1/2, tB over the others (in powers of 1-G), uB the
	// unconverted clicks of the latter, gA the largest G of the first
	// group and dB the largest 1-G of the second, rA and rB the ratios up
	// to which the series are valid.
	tA, tB []float64
	// vA and vB are the same divided by m, and for B with the sign of
	// its series: vA_m = tA_m/m, vB_m = (-1)^(m+1) tB_m/m.
	vA, vB     []float64
	uB, gA, dB float64
	rA, rB     float64
	z, sz      float64 // conditional mode of z and Laplace standard deviation
	lp         float64 // log prior density of u
	logM       float64 // Laplace log marginal of u, times its prior density
	vol        float64 // volume of the cell the node stands for
	ok         bool
}

// ipEval evaluates nodes for one arm.
type ipEval struct {
	d     *ipData
	a, b  float64   // C+alpha, U+beta
	g     []float64 // G_j of the last node passed to delayAt
	dl    []float64 // 1 - G_j, computed without cancellation
	evals int
	// Powers cached for the last shape k: ageK[j] = exp(k log a_j),
	// loK[i] and hiK[i] the same for the delay bins' edges, so that
	// (a/s)^k = ageK[j] * exp(-k log s) costs one product per bin.
	cacheK         float64
	ageK, loK, hiK []float64
	// kq bounds f(z | u) - D(u) from above: the maximum over q of
	// (C+a) log q + (U+b) log(1-q).
	kq float64
	// prior is the prior and family the family being integrated: u[0] is
	// the log Weibull shape, the log lognormal sigma, or 0 (exponential).
	prior  Prior
	family DelayFamily
	// unitRow holds the coarse row of shape 1 computed by the Weibull
	// family without a pruning floor, keyed by the scale range's lower
	// end, for the exponential family to reuse.
	unitRow map[float64]ipRow
}

func newIPEval(d *ipData, pr Prior) *ipEval {
	a, b := d.conv+pr.QAlpha, d.matUnconv+pr.QBeta
	return &ipEval{
		d: d, a: a, b: b, prior: pr,
		kq:      a*math.Log(a/(a+b)) + b*math.Log(b/(a+b)),
		g:       make([]float64, len(d.u)),
		dl:      make([]float64, len(d.u)),
		cacheK:  math.NaN(),
		unitRow: map[float64]ipRow{},
		ageK:    make([]float64, len(d.u)),
		loK:     make([]float64, len(d.binN)),
		hiK:     make([]float64, len(d.binN)),
	}
}

// powers fills the cache for shape k.
func (e *ipEval) powers(k float64) {
	if k == e.cacheK {
		return
	}
	d := e.d
	for j, la := range d.logAge {
		e.ageK[j] = math.Exp(k * la)
	}
	for i := range d.binN {
		e.loK[i] = 0
		if !math.IsInf(d.binLo[i], -1) {
			e.loK[i] = math.Exp(k * d.binLo[i])
		}
		e.hiK[i] = math.Exp(k * d.binHi[i])
	}
	e.cacheK = k
}

// weibullX returns (a/s)^k for log a, log shape lk and log scale ls.
func weibullX(loga, k, ls float64) float64 {
	if math.IsInf(loga, -1) {
		return 0
	}
	return math.Exp(k * (loga - ls))
}

// delayTerm returns D(u) alone (the delay histogram's term), without
// touching the pending bins: a cheap first look at a node.
func (e *ipEval) delayTerm(lk, ls float64) float64 {
	if e.family == FamilyLognormal {
		return e.lognormalDelayTerm(lk, ls)
	}
	d := e.d
	k := math.Exp(lk)
	e.powers(k)
	sk := math.Exp(-k * ls)
	xW := weibullX(d.logW, k, ls)
	lFW := math.Log(-math.Expm1(-xW))
	dll := 0.0
	for i, c := range d.binN {
		xlo := e.loK[i] * sk
		xhi := xW
		if d.binHi[i] != d.logW {
			xhi = e.hiK[i] * sk
		}
		dll += c * (logFMass(xlo, xhi) - lFW)
	}
	return dll
}

// delayAt fills e.g with G_j and returns D(u) and max G.
func (e *ipEval) delayAt(lk, ls float64) (float64, float64) {
	return e.delayAtKnown(lk, ls, math.NaN())
}

// delayAtKnown is delayAt with D(u) given when already known (NaN: not).
func (e *ipEval) delayAtKnown(lk, ls, dll float64) (float64, float64) {
	if e.family == FamilyLognormal {
		return e.lognormalDelayAt(lk, ls, dll)
	}
	d := e.d
	if math.IsNaN(dll) {
		dll = e.delayTerm(lk, ls)
	}
	k := math.Exp(lk)
	e.powers(k)
	sk := math.Exp(-k * ls) // s^-k
	xW := weibullX(d.logW, k, ls)
	fw := -math.Expm1(-xW)
	gmax := 0.0
	ew := math.Exp(-xW)
	invFW := 1 / fw
	for j := range d.logAge {
		x := e.ageK[j] * sk
		var em float64
		if x > 0.5 {
			em = math.Exp(-x) - 1 // no cancellation: exp(-x) < 0.61
		} else {
			em = math.Expm1(-x)
		}
		g := -em * invFW
		dl := (1 + em - ew) * invFW
		g, dl = clampDelay(g, dl)
		e.g[j], e.dl[j] = g, dl
		if g > gmax {
			gmax = g
		}
	}
	return dll, gmax
}

// clampDelay keeps a pending bin's G(age) at most 1 and the bin's delay
// mass non-negative against rounding.
func clampDelay(g, dl float64) (float64, float64) {
	if g > 1 {
		return 1, 0
	}
	return g, max(dl, 0)
}

// lognormalDelayTerm is delayTerm for the lognormal with log sigma lk and
// log median ls.
func (e *ipEval) lognormalDelayTerm(lk, ls float64) float64 {
	d := e.d
	sig := math.Exp(lk)
	zW := (d.logW - ls) / sig
	lpW := logPhi(zW)
	// Upper and lower tails at each edge; consecutive bins share an edge,
	// so the last upper edge's tails are kept for the next bin.
	tails := func(z float64) (up, low float64) {
		if math.IsInf(z, -1) {
			return 1, 0
		}
		return upperTail(z), upperTail(-z)
	}
	prevZ, prevUp, prevLow := math.NaN(), 0.0, 0.0
	dll := 0.0
	for i, c := range d.binN {
		zlo := (d.binLo[i] - ls) / sig // -Inf for the first edge
		var upLo, lowLo float64
		if zlo == prevZ {
			upLo, lowLo = prevUp, prevLow
		} else {
			upLo, lowLo = tails(zlo)
		}
		zhi := zW
		if d.binHi[i] != d.logW {
			zhi = (d.binHi[i] - ls) / sig
		}
		upHi, lowHi := tails(zhi)
		prevZ, prevUp, prevLow = zhi, upHi, lowHi
		// Phi(zhi) - Phi(zlo) from the tail where both lie.
		m := lowHi - lowLo
		if zlo > 0 {
			m = upLo - upHi
		}
		if !(m > 0) {
			return math.Inf(-1)
		}
		dll += c * (math.Log(m) - lpW)
	}
	return dll
}

// lognormalDelayAt is delayAtKnown for the lognormal.
func (e *ipEval) lognormalDelayAt(lk, ls, dll float64) (float64, float64) {
	d := e.d
	if math.IsNaN(dll) {
		dll = e.lognormalDelayTerm(lk, ls)
	}
	sig := math.Exp(lk)
	zW := (d.logW - ls) / sig
	phiW := 1 - upperTail(zW)
	qW := upperTail(zW)
	inv := 1 / phiW
	gmax := 0.0
	for j, la := range d.logAge {
		z := (la - ls) / sig
		var g, dl float64
		if z > 0 {
			qz := upperTail(z)
			g, dl = (1-qz)*inv, (qz-qW)*inv
		} else {
			pz := upperTail(-z)
			g, dl = pz*inv, (phiW-pz)*inv
		}
		g, dl = clampDelay(g, dl)
		e.g[j], e.dl[j] = g, dl
		if g > gmax {
			gmax = g
		}
	}
	return dll, gmax
}

// pendingExact returns sum_j u_j log(1-q G_j) and its first two
// derivatives in q, from e.g.
func (e *ipEval) pendingExact(q float64) (v, d1, d2 float64) {
	for j, u := range e.d.u {
		g := e.g[j]
		den := 1 - q*g
		if den <= 0 {
			return math.Inf(-1), math.Inf(-1), math.Inf(-1)
		}
		r := g / den
		v += u * math.Log1p(-q*g)
		d1 -= u * r
		d2 -= u * r * r
	}
	return v, d1, d2
}

// The pending term sum_j u_j log(1 - q G_j) is split at G = 1/2. For
// G_j <= 1/2 it expands in powers of q G_j:
//
//	log(1 - q G) = -sum_{m>=1} (q G)^m / m,
//
// and for G_j > 1/2, with d = 1 - G and r = q/(1-q), in powers of r d:
//
//	log(1 - q G) = log(1-q) + log(1 + r d) = log(1-q) + sum_{m>=1} (-1)^(m+1) (r d)^m / m,
//
// so both ratios stay at most about q/2 (late data, where most pending
// clicks are old and G near 1, need a few terms instead of dozens). The
// moments tA_m = sum u_j G_j^m and tB_m = sum u_j d_j^m are computed once
// per node.

// seriesOK reports whether the node's moments are valid at q.
func (n *ipNode) seriesOK(q float64) bool {
	return q*n.gA <= n.rA && q/(1-q)*n.dB <= n.rB
}

// pendingSeries evaluates the pending term and its first two derivatives
// in q from the node's moments.
func pendingSeries(n *ipNode, q float64) (v, d1, d2 float64) {
	// Group A: v = -sum q^m A_m/m, d1 = -sum q^(m-1) A_m,
	// d2 = -sum (m-1) q^(m-2) A_m.
	var va, a1, a2 float64
	t, tv := n.tA, n.vA
	for m := len(t); m >= 1; m-- {
		va = va*q + tv[m-1]
		a1 = a1*q + t[m-1]
		if m >= 2 {
			a2 = a2*q + float64(m-1)*t[m-1]
		}
	}
	v, d1, d2 = -va*q, -a1, -a2
	if n.uB == 0 {
		return v, d1, d2
	}
	// Group B: psi(r) = sum (-1)^(m+1) r^m B_m/m.
	r := q / (1 - q)
	var pb, b1, b2 float64
	t, tv = n.tB, n.vB
	for m := len(t); m >= 1; m-- {
		pb = pb*r + tv[m-1]
		sg := float64(m) * tv[m-1] // (-1)^(m+1) B_m
		b1 = b1*r + sg
		if m >= 2 {
			b2 = b2*r + float64(m-1)*sg
		}
	}
	pb *= r
	om := 1 - q
	rp := 1 / (om * om)
	rpp := 2 * rp / om
	v += n.uB*math.Log1p(-q) + pb
	d1 += -n.uB/om + b1*rp
	d2 += -n.uB*rp + b2*rp*rp + b1*rpp
	return v, d1, d2
}

// pendingValue is pendingSeries without the derivatives.
func pendingValue(n *ipNode, q float64) float64 {
	var va float64
	for i := len(n.vA) - 1; i >= 0; i-- {
		va = va*q + n.vA[i]
	}
	v := -va * q
	if n.uB == 0 {
		return v
	}
	r := q / (1 - q)
	var pb float64
	for i := len(n.vB) - 1; i >= 0; i-- {
		pb = pb*r + n.vB[i]
	}
	return v + n.uB*math.Log1p(-q) + pb*r
}

// setMoments fills the node's moments, from e.g and e.dl, with enough terms
// for q up to qMax.
func (e *ipEval) setMoments(n *ipNode, qMax float64) {
	var gA, dB, uB float64
	for j, u := range e.d.u {
		if g := e.g[j]; g <= 0.5 {
			if g > gA {
				gA = g
			}
		} else {
			uB += u
			if e.dl[j] > dB {
				dB = e.dl[j]
			}
		}
	}
	qMax = math.Min(qMax, 0.999)
	ma, ra := seriesTerms(qMax * gA)
	mb, rb := seriesTerms(qMax / (1 - qMax) * dB)
	n.tA = resize(n.tA, ma)
	n.tB = resize(n.tB, mb)
	for j, u := range e.d.u {
		if g := e.g[j]; g <= 0.5 {
			p := u * g
			for m := range n.tA {
				n.tA[m] += p
				p *= g
			}
		} else {
			dl := e.dl[j]
			p := u * dl
			for m := range n.tB {
				n.tB[m] += p
				p *= dl
			}
		}
	}
	n.vA = resize(n.vA, ma)
	n.vB = resize(n.vB, mb)
	for m := range n.tA {
		n.vA[m] = n.tA[m] / float64(m+1)
	}
	for m := range n.tB {
		n.vB[m] = n.tB[m] / float64(m+1)
		if m%2 == 1 {
			n.vB[m] = -n.vB[m]
		}
	}
	n.uB, n.gA, n.dB, n.rA, n.rB = uB, gA, dB, ra, rb
}

// resize returns x with length m, zeroed.
func resize(x []float64, m int) []float64 {
	if cap(x) < m {
		x = make([]float64, m)
	}
	x = x[:m]
	clear(x)
	return x
}

// logitCond evaluates f(z | u) - D(u) and its derivatives in z.
func (e *ipEval) logitCond(n *ipNode, z float64, exact bool) (f, f1, f2 float64) {
	q := sigmoid(z)
	if q <= 0 || q >= 1 {
		return math.Inf(-1), 0, -1
	}
	var pv, p1, p2 float64
	if !exact && n.seriesOK(q) {
		pv, p1, p2 = pendingSeries(n, q)
	} else {
		pv, p1, p2 = e.pendingExact(q)
	}
	lq, l1q := logSigmoid(z), logSigmoid(-z)
	f = e.a*lq + e.b*l1q + pv
	// dA/dq etc. with A = a/q - b/(1-q) + p1.
	A := e.a/q - e.b/(1-q) + p1
	Ap := -e.a/(q*q) - e.b/((1-q)*(1-q)) + p2
	j := q * (1 - q)
	f1 = A * j
	f2 = Ap*j*j + A*j*(1-2*q)
	return f, f1, f2
}

// condValue is f(z | u) - D(u) without derivatives, for the final grid.
func (e *ipEval) condValue(n *ipNode, z float64, exact bool) float64 {
	// log sigmoid(z) and log sigmoid(-z) share exp(-|z|).
	ez := math.Exp(-math.Abs(z))
	l := math.Log1p(ez)
	var lq, l1q, q float64
	if z >= 0 {
		lq, l1q, q = -l, -z-l, 1/(1+ez)
	} else {
		lq, l1q, q = z-l, -l, ez/(1+ez)
	}
	var pv float64
	if !exact {
		pv = pendingValue(n, q)
	} else {
		pv, _, _ = e.pendingExact(q)
	}
	return e.a*lq + e.b*l1q + pv
}

// sigmoid is the logistic function.
func sigmoid(z float64) float64 {
	if z >= 0 {
		return 1 / (1 + math.Exp(-z))
	}
	e := math.Exp(z)
	return e / (1 + e)
}

// logSigmoid returns log(sigmoid(z)) without overflow.
func logSigmoid(z float64) float64 {
	if z >= 0 {
		return -math.Log1p(math.Exp(-z))
	}
	return z - math.Log1p(math.Exp(z))
}

// evalNode fills n (given n.u) with the delay term, moments, conditional
// mode and Laplace marginal. z0 is a starting point for the mode.
func (e *ipEval) evalNode(n *ipNode, z0 float64) {
	e.evalNodeKnown(n, z0, math.NaN())
}

// evalNodeKnown is evalNode when the delay term at n.u is already known
// (dll; NaN when not).
func (e *ipEval) evalNodeKnown(n *ipNode, z0, dll float64) {
	e.evals++
	n.delayLL, n.gMax = e.delayAtKnown(n.u[0], n.u[1], dll)
	// Moments for q up to e^0.7 times the starting odds (a neighbouring
	// node's mode); the exact sum covers any q beyond while the mode is
	// sought, and the final grid adds terms where it needs them.
	e.setMoments(n, sigmoid(z0+0.7))
	n.ok = false
	if math.IsNaN(n.delayLL) || math.IsInf(n.delayLL, 0) {
		return
	}
	z, f, f2, ok := e.condMode(n, z0)
	if !ok {
		return
	}
	n.z, n.sz = z, 1/math.Sqrt(-f2)
	n.lp = e.logPrior(n.u)
	n.logM = n.delayLL + n.lp + f + 0.5*math.Log(2*math.Pi) + math.Log(n.sz)
	n.ok = !math.IsNaN(n.logM) && !math.IsInf(n.logM, 0)
}

// logPrior returns the log prior density of u for the family being
// integrated.
func (e *ipEval) logPrior(u [2]float64) float64 {
	lp := e.prior.logScaleDensity(u[1], e.d.logW)
	switch e.family {
	case FamilyWeibull:
		lp += e.prior.logShapeDensity(u[0])
	case FamilyLognormal:
		lp += e.prior.logSigmaDensity(u[0])
	}
	return lp
}

// condMode maximises f(z | u) by safeguarded Newton steps (f is concave
// near its mode) and returns the mode, f there (without D(u)) and f”.
func (e *ipEval) condMode(n *ipNode, z0 float64) (z, f, f2 float64, ok bool) {
	const zMin, zMax = -40.0, 40.0
	z = math.Min(math.Max(z0, zMin+1), zMax-1)
	f, f1, f2 := e.logitCond(n, z, false)
	if math.IsInf(f, -1) {
		// Move towards small q until finite.
		for i := 0; i < 60 && math.IsInf(f, -1); i++ {
			z -= 1
			f, f1, f2 = e.logitCond(n, z, false)
		}
		if math.IsInf(f, -1) {
			return 0, 0, 0, false
		}
	}
	lo, hi := zMin, zMax
	for it := 0; it < 100; it++ {
		if f1 > 0 {
			lo = z
		} else {
			hi = z
		}
		var next float64
		if f2 < 0 {
			next = z - f1/f2
		}
		if !(f2 < 0) || !(next > lo && next < hi) {
			next = (lo + hi) / 2
			if math.IsInf(lo, 0) || math.IsInf(hi, 0) {
				next = z + math.Copysign(2, f1)
			}
		}
		nf, nf1, nf2 := e.logitCond(n, next, false)
		if math.IsInf(nf, -1) || math.IsNaN(nf) {
			hi = math.Min(hi, next)
			next = (z + hi) / 2
			nf, nf1, nf2 = e.logitCond(n, next, false)
			if math.IsInf(nf, -1) || math.IsNaN(nf) {
				return 0, 0, 0, false
			}
		}
		step := math.Abs(next - z)
		z, f, f1, f2 = next, nf, nf1, nf2
		if step < 1e-9 || hi-lo < 1e-9 {
			break
		}
	}
	if !(f2 < 0) {
		// Flat or convex: use a curvature floor so the Laplace width stays
		// finite (only at degenerate data).
		f2 = math.Min(f2, -1e-6)
	}
	return z, f, f2, true
}

// IntegratedPosterior is the posterior of an arm's eventual conversion
// probability with the delay parameters integrated out, for one delay
// family or averaged over families.
type IntegratedPosterior struct {
	*GridPosterior
	// Median is the posterior median of q, the reported point estimate
	// (always inside every equal-tailed interval).
	Median float64
	// Families are the delay families averaged, with their posterior
	// probabilities (summing to 1) and log marginal likelihoods.
	Families []FamilyWeight
}

// Fit returns the fit of the family with the largest posterior
// probability (its posterior mode), for the reported delay distribution
// and the ripe clicks.
func (p *IntegratedPosterior) Fit() *Fit {
	var best *FamilyWeight
	for i := range p.Families {
		f := &p.Families[i]
		if f.Fit != nil && (best == nil || f.Weight > best.Weight) {
			best = f
		}
	}
	if best == nil {
		return nil
	}
	return best.Fit
}

// FamilyWeight is one delay family's share of a model-averaged posterior.
type FamilyWeight struct {
	Family DelayFamily
	// Weight is the family's posterior probability.
	Weight float64
	// LogEvidence is the log marginal likelihood of the family under the
	// prior (including the binned delay terms).
	LogEvidence float64
	// Fit is the family's posterior mode: q at its conditional mode and
	// the delay parameters at the mode of their marginal.
	Fit *Fit
}

// ipQPoints is the number of points of the z grid, and ipZSpan how many
// of a node's conditional standard deviations its density covers on it
// (beyond, the density is below e^-32 of its peak).
const (
	ipQPoints = 161
	ipZSpan   = 8.0
)

// integratePosterior computes the posterior of q for the given parametric
// families (averaged by marginal likelihood when more than one).
func integratePosterior(d *FitData, families []DelayFamily, pr Prior, robust bool) (*IntegratedPosterior, error) {
	pr = pr.WithDefaults()
	if err := pr.Validate(); err != nil {
		return nil, err
	}
	p, err := prepare(d)
	if err != nil {
		return nil, fmt.Errorf("integrated posterior: %w", err)
	}
	data := newIPData(p)
	if data.clicks == 0 {
		return priorPosterior(d, families, pr)
	}
	ev := newIPEval(data, pr)
	// Weibull first, so the exponential can reuse its row of shape 1.
	fams := make([]*ipFamily, len(families))
	for _, want := range []DelayFamily{FamilyWeibull, FamilyExponential, FamilyLognormal} {
		for i, f := range families {
			if f == want {
				fams[i] = ev.integrateFamily(f, pr)
			}
		}
	}
	// The z grid: every node's conditional spans its mode ± 10 of its
	// standard deviations; nodes far below the best are ignored.
	top := math.Inf(-1)
	for _, f := range fams {
		for _, n := range f.nodes {
			top = math.Max(top, f.weight(&n))
		}
	}
	if math.IsInf(top, -1) {
		return nil, errors.New("integrated posterior: the likelihood vanishes on the whole prior support")
	}
	zlo, zhi := math.Inf(1), math.Inf(-1)
	for _, f := range fams {
		for _, n := range f.nodes {
			if f.weight(&n) < top-ipKeep {
				continue
			}
			zlo = math.Min(zlo, n.z-ipZSpan*n.sz)
			zhi = math.Max(zhi, n.z+ipZSpan*n.sz)
		}
	}
	// The families' posterior modes, for the report and, with robust, as
	// the starting point of the histogram alternative (see histmix.go).
	fits := make([]*Fit, len(fams))
	var best *Fit
	bestMass := math.Inf(-1)
	for fi, f := range fams {
		fits[fi] = ev.modeFit(d, p, f)
		mass := math.Inf(-1)
		for i := range f.nodes {
			mass = logAddExp(mass, f.weight(&f.nodes[i]))
		}
		if fits[fi] != nil && mass > bestMass {
			best, bestMass = fits[fi], mass
		}
	}
	var hist *histAlternative
	if robust {
		hist = histogramAlternative(p, d, best, pr)
		if hist != nil && hist.spline != nil {
			zlo, zhi = math.Min(zlo, hist.zlo), math.Max(zhi, hist.zhi)
		}
	}
	zlo, zhi = math.Max(zlo, -40), math.Min(zhi, 40)
	zs := linspace(zlo, zhi, ipQPoints)
	dz := zs[1] - zs[0]

	// Each node adds its cell's mass times its exact conditional density of
	// z (the quadrature keeps neighbouring nodes' conditionals within
	// about one standard deviation of each other, so the sum is smooth).
	logp := make([][]float64, len(fams))
	famLogZ := make([]float64, len(fams))
	cut := massCut(fams, top)
	for fi, f := range fams {
		ev.family = f.family // delayAt below recomputes this family's nodes
		acc := make([]float64, len(zs))
		for ni := range f.nodes {
			n := &f.nodes[ni]
			if f.weight(n) < cut {
				continue
			}
			base := n.delayLL + n.lp + math.Log(n.vol) - top
			first := max(0, int(math.Floor((n.z-ipZSpan*n.sz-zlo)/dz)))
			last := min(len(zs)-1, int(math.Ceil((n.z+ipZSpan*n.sz-zlo)/dz)))
			if hi := sigmoid(n.z + ipZSpan*n.sz); !n.seriesOK(hi) {
				// More terms for this node's whole range.
				ev.delayAt(n.u[0], n.u[1])
				ev.setMoments(n, hi)
			}
			exactLoaded := false
			for i := first; i <= last; i++ {
				zp := zs[i]
				exact := !n.seriesOK(sigmoid(zp))
				if exact && !exactLoaded {
					ev.delayAt(n.u[0], n.u[1])
					exactLoaded = true
				}
				v := ev.condValue(n, zp, exact)
				if x := base + v; x > -745 {
					acc[i] += math.Exp(x)
				}
			}
		}
		sum := 0.0
		lp := make([]float64, len(zs))
		for i, v := range acc {
			sum += v
			lp[i] = math.Log(v)
		}
		logp[fi] = lp
		famLogZ[fi] = math.Log(sum*dz) + top
	}
	// Normalising constant of the Beta prior: log B(alpha, beta).
	lb := lbeta(pr.QAlpha, pr.QBeta)
	ip := &IntegratedPosterior{}
	zTop := logSumExp(famLogZ)
	mix := make([]float64, len(zs))
	for i := range mix {
		mix[i] = math.Inf(-1)
	}
	wh := 0.0
	if hist != nil && hist.spline != nil {
		wh = hist.weight()
	}
	for fi, f := range fams {
		w := math.Exp(famLogZ[fi] - zTop)
		fw := FamilyWeight{Family: f.family, Weight: w * (1 - wh), LogEvidence: famLogZ[fi] - lb, Fit: fits[fi]}
		ip.Families = append(ip.Families, fw)
		for i := range mix {
			mix[i] = logAddExp(mix[i], logp[fi][i])
		}
	}
	if wh > 0 {
		// Mix the normalised parametric and histogram densities of z.
		hv := make([]float64, len(zs))
		for i, z := range zs {
			hv[i] = hist.logDensity(z)
		}
		lzp := logSumExp(mix) + math.Log(dz)
		lzh := logSumExp(hv) + math.Log(dz)
		for i := range mix {
			mix[i] = logAddExp(math.Log(1-wh)+mix[i]-lzp, math.Log(wh)+hv[i]-lzh)
		}
		ip.Families = append(ip.Families, FamilyWeight{Family: FamilyHistogram, Weight: wh, LogEvidence: math.NaN(), Fit: hist.fit})
	}
	// Density in q: p(q) = p(z) / (q (1-q)).
	qs := make([]float64, len(zs))
	lq := make([]float64, len(zs))
	for i, z := range zs {
		qs[i] = sigmoid(z)
		lq[i] = mix[i] - logSigmoid(z) - logSigmoid(-z)
	}
	qs, lq = dedupeGrid(qs, lq)
	g, err := newGridPosterior(qs, lq, false)
	if err != nil {
		return nil, fmt.Errorf("integrated posterior: %w", err)
	}
	ip.GridPosterior = g
	ip.Median = g.Quantile(0.5)
	return ip, nil
}

// ipMassTail is the share of the posterior mass that the smallest nodes
// may together hold and still be left out of the final grid.
const ipMassTail = 1e-6

// weight returns a node's log mass: its Laplace log marginal (which
// includes the prior density of u) times its cell volume.
func (f *ipFamily) weight(n *ipNode) float64 {
	return n.logM + math.Log(n.vol)
}

// massCut returns the log mass (as weight computes it) below which nodes
// are left out: the smallest nodes holding together at most ipMassTail of
// the total.
func massCut(fams []*ipFamily, top float64) float64 {
	var ws []float64
	for _, f := range fams {
		for i := range f.nodes {
			ws = append(ws, f.weight(&f.nodes[i]))
		}
	}
	slices.Sort(ws)
	total := 0.0
	for _, w := range ws {
		total += math.Exp(w - top)
	}
	acc := 0.0
	for _, w := range ws {
		acc += math.Exp(w - top)
		if acc > ipMassTail*total {
			return w
		}
	}
	return math.Inf(-1)
}

// priorPosterior is the posterior of an arm without clicks: the prior of
// q, with each family's (degenerate) maximum-likelihood fit for the report.
func priorPosterior(d *FitData, families []DelayFamily, pr Prior) (*IntegratedPosterior, error) {
	zs := linspace(-30, 30, ipQPoints)
	qs := make([]float64, len(zs))
	lq := make([]float64, len(zs))
	for i, z := range zs {
		qs[i] = sigmoid(z)
		lq[i] = (pr.QAlpha-1)*logSigmoid(z) + (pr.QBeta-1)*logSigmoid(-z)
	}
	qs, lq = dedupeGrid(qs, lq)
	g, err := newGridPosterior(qs, lq, false)
	if err != nil {
		return nil, fmt.Errorf("integrated posterior: %w", err)
	}
	ip := &IntegratedPosterior{GridPosterior: g, Median: g.Quantile(0.5)}
	for _, f := range families {
		if f == FamilyLognormal {
			continue // no data: its fit would say nothing FitModel's do not
		}
		fit, err := FitModel(d, FitOptions{Family: f})
		if err != nil {
			return nil, err
		}
		ip.Families = append(ip.Families, FamilyWeight{Family: f, Fit: fit})
	}
	for i := range ip.Families {
		ip.Families[i].Weight = 1 / float64(len(ip.Families))
	}
	return ip, nil
}

// dedupeGrid drops grid points whose q does not increase (sigmoid
// saturation at the ends of a wide z range).
func dedupeGrid(q, v []float64) ([]float64, []float64) {
	oq, ov := q[:1], v[:1]
	for i := 1; i < len(q); i++ {
		if q[i] > oq[len(oq)-1] {
			oq = append(oq, q[i])
			ov = append(ov, v[i])
		}
	}
	return oq, ov
}

// logAddExp returns log(exp(a) + exp(b)).
func logAddExp(a, b float64) float64 {
	if math.IsInf(a, -1) {
		return b
	}
	if math.IsInf(b, -1) {
		return a
	}
	if a < b {
		a, b = b, a
	}
	return a + math.Log1p(math.Exp(b-a))
}

// lbeta returns log B(a, b).
func lbeta(a, b float64) float64 {
	x, _ := math.Lgamma(a)
	y, _ := math.Lgamma(b)
	z, _ := math.Lgamma(a + b)
	return x + y - z
}

// modeFit builds the reported fit of a family from its mode: delay
// parameters at the mode of their marginal, q at its conditional mode.
func (e *ipEval) modeFit(d *FitData, p *prepared, f *ipFamily) *Fit {
	n := f.modeNode
	if !n.ok {
		return nil
	}
	r := &emRun{p: p, family: f.family}
	par := params{q: sigmoid(n.z), k: 1, s: math.Exp(n.u[1])}
	if f.family == FamilyWeibull || f.family == FamilyLognormal {
		par.k = math.Exp(n.u[0])
	}
	r.logS = make([]float64, len(p.ages))
	r.m = make([]float64, len(p.ages))
	r.lm = make([]float64, len(p.h))
	dist := r.dist(par)
	ll := r.loglik(par.q, &dist)
	fit := r.assemble(d, par, ll, f.evals, true)
	return fit
}
