package estimator

import (
	"math"
	"slices"
	"sort"

	"gonum.org/v1/gonum/floats"
)

// The delay parameters are integrated by nested one-dimensional adaptive
// quadrature: an inner integral over log scale for each log shape (a
// "row"), and an outer integral over log shape (the Weibull family only;
// the exponential is the single row of shape 1). Early data leave a thin,
// curved ridge in (log shape, log scale); each row finds and follows its
// own crest, so the ridge is integrated whatever its curvature, where a
// tensor grid laid along the principal axes at the mode would miss it.
//
// Each one-dimensional integral starts from a coarse grid of cells over
// the whole prior range. Where the integrand is much thinner than a coarse
// cell (a drop of more than two log units to the best cell's neighbours),
// its mode and width are found by Newton steps on finite differences and
// the integral is taken on ipLocalNodes cells spanning ±ipLocalSpan
// standard deviations around it; otherwise the coarse cells are used.
// Cells that cannot come within ipKeep log units of the best are skipped
// without their full evaluation, by an upper bound from the delay term
// alone (the pending-click term is never positive).

// Quadrature settings.
const (
	// ipScaleCells and ipShapeCells are the coarse cells over the prior
	// range of log scale and log shape.
	ipScaleCells = 16
	ipShapeCells = 7
	// ipNarrow: an integrand whose Laplace standard deviation is below
	// this fraction of the coarse spacing is integrated on a local grid.
	ipNarrow = 0.8
	// ipLocalSpan and ipLocalNodes: a local grid spans ±ipLocalSpan
	// standard deviations with ipLocalNodes cells.
	ipLocalSpan  = 4.9
	ipLocalNodes = 5
	// ipKeep is how far below the best (in log units) a cell may be and
	// still be evaluated.
	ipKeep = 30.0
	// ipBoundSlack is added to the upper bound of a cell's log marginal
	// for the Laplace width term it leaves out.
	ipBoundSlack = 10.0
	// ipTail and ipMaxExtend: a local grid whose end cell is within ipTail
	// log units of its best is extended by a cell on that side, at most
	// ipMaxExtend times.
	ipTail      = 7.0
	ipMaxExtend = 24
	// ipNewtonIter caps the Newton steps of a mode search from a coarse
	// row, ipNewtonHinted one started from a neighbouring row's crest.
	ipNewtonIter   = 4
	ipNewtonHinted = 1
	// ipOuterSteps caps the parabolic steps locating the mode along log
	// shape.
	ipOuterSteps = 8
)

// ipFamily is one family's quadrature: nodes with their cell volumes.
type ipFamily struct {
	family DelayFamily
	nodes  []ipNode
	// modeNode is the node with the largest Laplace log marginal.
	modeNode ipNode
	evals    int
}

// ipBox is the prior range of (log shape, log scale).
type ipBox struct {
	lo, hi [2]float64
}

func priorBox(pr Prior, w float64, family DelayFamily) ipBox {
	lw := math.Log(w)
	b := ipBox{}
	b.lo[1], b.hi[1] = lw+math.Log(pr.ScaleMin), lw+math.Log(pr.ScaleMax)
	switch family {
	case FamilyWeibull:
		b.lo[0], b.hi[0] = math.Log(pr.ShapeMin), math.Log(pr.ShapeMax)
	case FamilyLognormal:
		b.lo[0], b.hi[0] = math.Log(pr.SigmaMin), math.Log(pr.SigmaMax)
	}
	return b
}

// ipRow is the integral over log scale at one log shape.
type ipRow struct {
	lk      float64
	width   float64  // outer cell width (log shape); 1 for the exponential
	nodes   []ipNode // vol: width along log scale
	logMass float64  // log of sum over nodes of exp(logM) * vol
	mode    ipNode   // the node with the largest logM
	// peak and sd are the Laplace estimate of the row's mode (log scale)
	// and width; narrow reports a width below ipNarrow coarse cells.
	peak, sd float64
	narrow   bool
}

// integrateFamily builds the quadrature of one parametric family.
func (e *ipEval) integrateFamily(family DelayFamily, pr Prior) *ipFamily {
	start := e.evals
	box := priorBox(pr, e.d.w, family)
	fam := &ipFamily{family: family}
	e.family = family
	var rows []ipRow
	if family == FamilyWeibull || family == FamilyLognormal {
		rows = e.shapeRows(box)
	} else {
		// Shape 1 is the middle coarse row of the Weibull family (when the
		// shape range is symmetric about 1 on the log scale): reuse it,
		// without the shape prior's density.
		c, ok := e.unitRow[box.lo[1]]
		if ok {
			c = dropShapePrior(c, e.prior.logShapeDensity(c.lk))
		} else {
			c = e.coarseRow(0, box, math.Inf(-1))
		}
		r := e.fineRow(c, box)
		r.width = 1
		rows = []ipRow{r}
	}
	for _, r := range rows {
		for _, n := range r.nodes {
			n.vol *= r.width
			fam.nodes = append(fam.nodes, n)
		}
	}
	fam.modeNode = bestNode(fam.nodes)
	fam.evals = e.evals - start
	return fam
}

// dropShapePrior returns a copy of row r whose nodes leave out the shape
// prior's log density ls.
func dropShapePrior(r ipRow, ls float64) ipRow {
	r.nodes = slices.Clone(r.nodes)
	for i := range r.nodes {
		r.nodes[i].lp -= ls
		r.nodes[i].logM -= ls
	}
	r.mode.lp -= ls
	r.mode.logM -= ls
	r.logMass -= ls
	return r
}

// shapeRows integrates the outer axis (log shape): coarse rows first, then,
// when the posterior of log shape is thinner than a coarse row spacing,
// ipLocalNodes rows around its mode. It returns the rows, each integrated
// along log scale and carrying its outer cell width.
func (e *ipEval) shapeRows(box ipBox) []ipRow {
	n := ipShapeCells
	hk := (box.hi[0] - box.lo[0]) / float64(n)
	coarse := make([]ipRow, n)
	floor := math.Inf(-1)
	// From the middle (shape 1) outwards, so the pruning floor rises early.
	for _, i := range middleOut(n) {
		lk := box.lo[0] + (float64(i)+0.5)*hk
		coarse[i] = e.coarseRow(lk, box, floor)
		if e.family == FamilyWeibull && math.Abs(lk) < 1e-12 && floor == math.Inf(-1) {
			e.unitRow[box.lo[1]] = coarse[i]
		}
		if coarse[i].mode.ok {
			floor = math.Max(floor, coarse[i].mode.logM)
		}
	}
	masses := make([]float64, n)
	for i, r := range coarse {
		masses[i] = r.logMass
	}
	best := floats.MaxIdx(masses)
	if math.IsInf(masses[best], -1) {
		return nil
	}
	center, sd, narrow := peakOf(masses, best, hk)
	center += box.lo[0] + (float64(best)+0.5)*hk
	if !narrow {
		var rows []ipRow
		for i := range coarse {
			if coarse[i].logMass > masses[best]-ipKeep {
				r := e.fineRow(coarse[i], box)
				r.width = hk
				rows = append(rows, r)
			}
		}
		return e.densifyRows(rows, box)
	}
	hint := func(lk float64, rows []ipRow) *ipRow {
		var h *ipRow
		for i := range rows {
			if rows[i].mode.ok && (h == nil || math.Abs(rows[i].lk-lk) < math.Abs(h.lk-lk)) {
				h = &rows[i]
			}
		}
		return h
	}
	w := 2 * ipLocalSpan * sd / ipLocalNodes
	rowAt := func(j int, from []ipRow) (ipRow, bool) {
		a, b, ok := clipCell(center-ipLocalSpan*sd+float64(j)*w, w, box.lo[0], box.hi[0])
		if !ok {
			return ipRow{}, false
		}
		lk := (a + b) / 2
		r := e.rowAt(lk, box, hint(lk, from))
		r.width = b - a
		return r, r.mode.ok
	}
	local := func(from []ipRow) []ipRow {
		var rows []ipRow
		for j := range ipLocalNodes {
			if r, ok := rowAt(j, from); ok {
				rows = append(rows, r)
			}
		}
		return rows
	}
	// The coarse rows only roughly locate a thin posterior: refine its
	// mode by successive parabolic interpolation through the three best
	// rows so far, one new row per step, before laying out the local rows.
	center, sd = e.outerMode(coarse, center, sd, box, hint)
	w = 2 * ipLocalSpan * sd / ipLocalNodes
	rows := local(coarse)
	if len(rows) == 0 {
		return nil
	}
	// Extend on a side whose end row still holds mass.
	top := math.Inf(-1)
	for _, r := range rows {
		top = math.Max(top, r.logMass)
	}
	lo, hi := 0, ipLocalNodes-1
	for ext := 0; ext < ipMaxExtend; ext++ {
		grew := false
		if rows[0].logMass > top-ipTail && rows[0].lk-rows[0].width/2 > box.lo[0] {
			lo--
			if r, ok := rowAt(lo, rows); ok {
				rows = slices.Insert(rows, 0, r)
				top = math.Max(top, r.logMass)
				grew = true
			}
		}
		if last := rows[len(rows)-1]; last.logMass > top-ipTail && last.lk+last.width/2 < box.hi[0] {
			hi++
			if r, ok := rowAt(hi, rows); ok {
				rows = append(rows, r)
				top = math.Max(top, r.logMass)
				grew = true
			}
		}
		if !grew {
			break
		}
	}
	return e.densifyRows(rows, box)
}

// clipCell returns the cell [a, a+w] clipped to [lo, hi], and false when
// nothing of it is left.
func clipCell(a, w, lo, hi float64) (float64, float64, bool) {
	b := a + w
	a, b = math.Max(a, lo), math.Min(b, hi)
	return a, b, b > a
}

// outerMode refines the mode and width of the row masses along log shape
// by successive parabolic interpolation (each step integrates one row at
// the vertex of the parabola through the three best rows so far), until
// the vertex moves by less than a third of the width.
func (e *ipEval) outerMode(coarse []ipRow, center, sd float64, box ipBox, hint func(float64, []ipRow) *ipRow) (float64, float64) {
	pts := slices.Clone(coarse)
	for range ipOuterSteps {
		slices.SortFunc(pts, func(a, b ipRow) int {
			switch {
			case a.logMass > b.logMass:
				return -1
			case a.logMass < b.logMass:
				return 1
			}
			return 0
		})
		if len(pts) < 3 || math.IsInf(pts[2].logMass, -1) {
			break
		}
		v, s2, ok := vertex3(pts[0], pts[1], pts[2])
		if !ok || v < box.lo[0] || v > box.hi[0] {
			break
		}
		moved := math.Abs(v - center)
		center, sd = v, math.Min(s2, sd*4)
		if moved < sd/3 {
			break
		}
		r := e.rowAt(v, box, hint(v, pts))
		if !r.mode.ok {
			break
		}
		pts = append(pts, r)
	}
	return center, sd
}

// vertex3 returns the vertex of the parabola through three rows' (log
// shape, log mass) and its width 1/sqrt(-second derivative).
func vertex3(a, b, c ipRow) (float64, float64, bool) {
	x0, x1, x2 := a.lk, b.lk, c.lk
	y0, y1, y2 := a.logMass, b.logMass, c.logMass
	d := (x0 - x1) * (x0 - x2) * (x1 - x2)
	if d == 0 {
		return 0, 0, false
	}
	A := (x2*(y1-y0) + x1*(y0-y2) + x0*(y2-y1)) / d
	B := (x2*x2*(y0-y1) + x1*x1*(y2-y0) + x0*x0*(y1-y2)) / d
	if !(A < 0) {
		return 0, 0, false
	}
	return -B / (2 * A), 1 / math.Sqrt(-2*A), true
}

// rowAt integrates the row at lk, starting from a neighbouring row's crest
// when one is given and was thin, else from a coarse row.
func (e *ipEval) rowAt(lk float64, box ipBox, hint *ipRow) ipRow {
	if hint != nil && hint.narrow {
		h := (box.hi[1] - box.lo[1]) / ipScaleCells
		if mode, sd, ok := e.scaleNewton(lk, hint.peak, hint.sd/4, ipNewtonHinted, box, hint.mode.z); ok && sd < ipNarrow*h {
			return e.localRow(lk, mode, sd, box)
		}
	}
	return e.fineRow(e.coarseRow(lk, box, math.Inf(-1)), box)
}

// coarseRow evaluates the coarse cells of the row at lk that can come
// within ipKeep of max(floor, the row's best), and estimates the row's
// peak and width from the best cell and its neighbours.
func (e *ipEval) coarseRow(lk float64, box ipBox, floor float64) ipRow {
	n := ipScaleCells
	h := (box.hi[1] - box.lo[1]) / float64(n)
	row := ipRow{lk: lk, logMass: math.Inf(-1), sd: math.Inf(1)}
	type cand struct {
		i       int
		dll, ub float64
	}
	cands := make([]cand, n)
	for i := range cands {
		ls := box.lo[1] + (float64(i)+0.5)*h
		dll := e.delayTerm(lk, ls)
		cands[i] = cand{i, dll, dll + e.logPrior([2]float64{lk, ls}) + e.kq + ipBoundSlack}
	}
	sort.Slice(cands, func(a, b int) bool { return cands[a].ub > cands[b].ub })
	cells := make([]ipNode, n)
	best := floor
	z0 := e.startZ()
	for _, c := range cands {
		if !(c.ub > best-ipKeep) {
			break
		}
		nd := &cells[c.i]
		nd.u = [2]float64{lk, box.lo[1] + (float64(c.i)+0.5)*h}
		nd.vol = h
		e.evalNodeKnown(nd, z0, c.dll)
		if nd.ok {
			z0 = nd.z
			best = math.Max(best, nd.logM)
		}
	}
	vals := make([]float64, n)
	for i, c := range cells {
		vals[i] = math.Inf(-1)
		if c.ok {
			vals[i] = c.logM
			row.nodes = append(row.nodes, c)
		}
	}
	if len(row.nodes) == 0 {
		return row
	}
	b := floats.MaxIdx(vals)
	row.mode = cells[b]
	off, sd, narrow := peakOf(vals, b, h)
	row.peak, row.sd, row.narrow = cells[b].u[1]+off, sd, narrow
	if narrow {
		// Laplace estimate of the row's integral from the parabola.
		_, fv, c2, ok := parabola(at(vals, b-1), vals[b], at(vals, b+1), h)
		if !ok {
			fv, c2 = vals[b], -1/(sd*sd)
		}
		row.logMass = fv + 0.5*math.Log(2*math.Pi/-c2)
	} else {
		row.logMass = rowMass(row.nodes)
	}
	return row
}

// fineRow refines a coarse row: a thin row is integrated on a local grid
// around its mode; a broad one keeps its coarse cells.
func (e *ipEval) fineRow(r ipRow, box ipBox) ipRow {
	h := (box.hi[1] - box.lo[1]) / ipScaleCells
	if r.narrow && r.mode.ok {
		step := math.Min(h/4, r.sd/2)
		if mode, sd, ok := e.scaleNewton(r.lk, r.peak, step, ipNewtonIter, box, r.mode.z); ok && sd < ipNarrow*h {
			return e.localRow(r.lk, mode, sd, box)
		}
	}
	r.nodes = e.densify(r.nodes, box)
	r.logMass = rowMass(r.nodes)
	return r
}

// localRow integrates the row at lk on ipLocalNodes cells spanning
// ±ipLocalSpan sd around mode, extended cell by cell on a side whose end
// still holds mass (a skewed row: the curvature at the mode understates a
// long tail).
func (e *ipEval) localRow(lk, mode, sd float64, box ipBox) ipRow {
	row := ipRow{lk: lk, peak: mode, sd: sd, narrow: true}
	w := 2 * ipLocalSpan * sd / ipLocalNodes
	z0 := e.startZ()
	eval := func(j int) (ipNode, bool) {
		a, b, ok := clipCell(mode-ipLocalSpan*sd+float64(j)*w, w, box.lo[1], box.hi[1])
		if !ok {
			return ipNode{}, false
		}
		nd := ipNode{u: [2]float64{lk, (a + b) / 2}, vol: b - a}
		e.evalNode(&nd, z0)
		if nd.ok {
			z0 = nd.z
		}
		return nd, nd.ok
	}
	for j := range ipLocalNodes {
		if nd, ok := eval(j); ok {
			row.nodes = append(row.nodes, nd)
		}
	}
	if len(row.nodes) == 0 {
		row.logMass = math.Inf(-1)
		return row
	}
	top := bestNode(row.nodes).logM
	lo, hi := 0, ipLocalNodes-1
	for ext := 0; ext < ipMaxExtend; ext++ {
		first, last := row.nodes[0], row.nodes[len(row.nodes)-1]
		grew := false
		if first.logM > top-ipTail && first.u[1]-first.vol/2 > box.lo[1] {
			lo--
			if nd, ok := eval(lo); ok {
				row.nodes = slices.Insert(row.nodes, 0, nd)
				grew = true
			}
		}
		if last.logM > top-ipTail && last.u[1]+last.vol/2 < box.hi[1] {
			hi++
			if nd, ok := eval(hi); ok {
				row.nodes = append(row.nodes, nd)
				grew = true
			}
		}
		if !grew {
			break
		}
		top = math.Max(top, bestNode(row.nodes).logM)
	}
	row.nodes = e.densify(row.nodes, box)
	row.mode = bestNode(row.nodes)
	row.logMass = rowMass(row.nodes)
	return row
}

// scaleNewton finds the mode of the Laplace log marginal along log scale
// at fixed lk by at most iters Newton steps on central differences, from
// ls0 with difference step step. It returns the mode and the standard deviation
// 1/sqrt(-second derivative) there.
func (e *ipEval) scaleNewton(lk, ls0, step float64, iters int, box ipBox, z0 float64) (float64, float64, bool) {
	f := func(ls float64) (float64, float64, bool) {
		if ls < box.lo[1] || ls > box.hi[1] {
			return math.Inf(-1), z0, false
		}
		n := ipNode{u: [2]float64{lk, ls}}
		e.evalNode(&n, z0)
		return n.logM, n.z, n.ok
	}
	x := ls0
	var sd float64
	for range iters {
		f0, z, ok0 := f(x)
		fp, _, ok1 := f(x + step)
		fm, _, ok2 := f(x - step)
		if !ok0 || !ok1 || !ok2 {
			return 0, 0, false
		}
		z0 = z
		dx, _, c2, ok := parabola(fm, f0, fp, step)
		if !ok {
			return 0, 0, false
		}
		sd = 1 / math.Sqrt(-c2)
		// At most two difference steps at a time: the parabola is only
		// trusted near the points it was fitted to.
		dx = math.Max(-2*step, math.Min(2*step, dx))
		x += dx
		done := math.Abs(dx) < 0.05*sd
		step = math.Max(sd/4, 1e-6)
		if done {
			return x, sd, true
		}
	}
	return x, sd, sd > 0
}

// peakOf returns the offset of the vertex of the parabola through the
// values at b-1, b, b+1 (spacing h) from b, its standard deviation, and
// whether the peak is narrow (thinner than ipNarrow cells). A missing or
// pruned neighbour (-Inf) means narrow with an unknown width (h/4).
func peakOf(vals []float64, b int, h float64) (off, sd float64, narrow bool) {
	fm, fp := at(vals, b-1), at(vals, b+1)
	if b-1 >= 0 && b+1 < len(vals) && (math.IsInf(fm, -1) || math.IsInf(fp, -1)) {
		return 0, h / 4, true
	}
	if b-1 < 0 || b+1 >= len(vals) {
		// At the edge of the prior range: broad unless the one neighbour
		// falls sharply.
		nb := fm
		if b-1 < 0 {
			nb = fp
		}
		if vals[b]-nb > 2 {
			return 0, h / 4, true
		}
		return 0, math.Inf(1), false
	}
	dx, _, c2, ok := parabola(fm, vals[b], fp, h)
	if !ok {
		return 0, math.Inf(1), false
	}
	sd = 1 / math.Sqrt(-c2)
	return dx, sd, sd < ipNarrow*h
}

// parabola returns, for the parabola through (-h, fm), (0, f0), (h, fp),
// the offset of its vertex, the value there and its second derivative;
// ok is false unless it opens downwards.
func parabola(fm, f0, fp, h float64) (dx, fv, c2 float64, ok bool) {
	c2 = (fp - 2*f0 + fm) / (h * h)
	if !(c2 < 0) || math.IsInf(fm, 0) || math.IsInf(fp, 0) {
		return 0, f0, c2, false
	}
	c1 := (fp - fm) / (2 * h)
	dx = -c1 / c2
	return dx, f0 - c1*c1/(2*c2), c2, true
}

// ipLumpy is the largest change of the conditional mode of z across one
// cell, in conditional standard deviations: beyond it the sum of the
// cells' conditionals would show one bump per cell, so the cell is split.
// ipMaxSplit caps the pieces of one cell.
const (
	ipLumpy    = 0.7
	ipMaxSplit = 9
	// ipDenseKeep: only cells within this many log units of the best are
	// split.
	ipDenseKeep = 14
)

// densify splits the cells of a row (nodes sorted by log scale, each the
// centre of a cell of width vol) across which the conditional mode of z
// changes by more than ipLumpy conditional standard deviations, among the
// cells holding mass.
func (e *ipEval) densify(nodes []ipNode, box ipBox) []ipNode {
	sortByScale(nodes)
	if len(nodes) < 2 {
		return nodes
	}
	top := bestNode(nodes).logM
	out := make([]ipNode, 0, len(nodes))
	for i, n := range nodes {
		r := 1
		if n.logM > top-ipDenseKeep {
			lo, hi := i-1, i+1
			lo, hi = max(lo, 0), min(hi, len(nodes)-1)
			span := math.Abs(nodes[hi].z-nodes[lo].z) / float64(hi-lo)
			r = min(ipMaxSplit, int(math.Ceil(span/(ipLumpy*n.sz))))
		}
		if r <= 1 {
			out = append(out, n)
			continue
		}
		w := n.vol / float64(r)
		for j := range r {
			ls := n.u[1] - n.vol/2 + (float64(j)+0.5)*w
			if 2*j+1 == r {
				m := n
				m.vol = w
				out = append(out, m)
				continue
			}
			m := ipNode{u: [2]float64{n.u[0], ls}, vol: w}
			if ls < box.lo[1] || ls > box.hi[1] {
				continue
			}
			e.evalNode(&m, n.z)
			if m.ok {
				out = append(out, m)
			}
		}
	}
	return out
}

// densifyRows splits the outer cells (rows) across which the conditional
// mode of z at the rows' crests changes by more than ipLumpy conditional
// standard deviations, as densify does along a row.
func (e *ipEval) densifyRows(rows []ipRow, box ipBox) []ipRow {
	if len(rows) < 2 {
		return rows
	}
	top := math.Inf(-1)
	for _, r := range rows {
		top = math.Max(top, r.logMass)
	}
	out := make([]ipRow, 0, len(rows))
	for i, r := range rows {
		k := 1
		if r.logMass > top-ipDenseKeep && r.mode.ok {
			lo, hi := max(i-1, 0), min(i+1, len(rows)-1)
			span := math.Abs(rows[hi].mode.z-rows[lo].mode.z) / float64(hi-lo)
			k = min(ipMaxSplit, int(math.Ceil(span/(ipLumpy*r.mode.sz))))
		}
		if k <= 1 {
			out = append(out, r)
			continue
		}
		w := r.width / float64(k)
		for j := range k {
			lk := r.lk - r.width/2 + (float64(j)+0.5)*w
			if 2*j+1 == k {
				m := r
				m.width = w
				out = append(out, m)
				continue
			}
			if lk < box.lo[0] || lk > box.hi[0] {
				continue
			}
			m := e.rowAt(lk, box, &rows[i])
			m.width = w
			if m.mode.ok {
				out = append(out, m)
			}
		}
	}
	return out
}

// sortByScale sorts nodes by log scale.
func sortByScale(nodes []ipNode) {
	slices.SortFunc(nodes, func(a, b ipNode) int {
		switch {
		case a.u[1] < b.u[1]:
			return -1
		case a.u[1] > b.u[1]:
			return 1
		}
		return 0
	})
}

// rowMass returns log sum exp(logM) vol over nodes.
func rowMass(nodes []ipNode) float64 {
	top := math.Inf(-1)
	for _, n := range nodes {
		top = math.Max(top, n.logM)
	}
	if math.IsInf(top, -1) {
		return top
	}
	s := 0.0
	for _, n := range nodes {
		s += math.Exp(n.logM-top) * n.vol
	}
	return top + math.Log(s)
}

// bestNode returns the node with the largest Laplace log marginal.
func bestNode(nodes []ipNode) ipNode {
	var b ipNode
	for _, n := range nodes {
		if n.ok && (!b.ok || n.logM > b.logM) {
			b = n
		}
	}
	return b
}

// middleOut returns 0..n-1 ordered from the middle outwards.
func middleOut(n int) []int {
	out := make([]int, 0, n)
	m := n / 2
	out = append(out, m)
	for d := 1; len(out) < n; d++ {
		if m-d >= 0 {
			out = append(out, m-d)
		}
		if m+d < n {
			out = append(out, m+d)
		}
	}
	return out
}

// at returns x[i], or -Inf outside the slice.
func at(x []float64, i int) float64 {
	if i < 0 || i >= len(x) {
		return math.Inf(-1)
	}
	return x[i]
}

// startZ returns a starting logit for the conditional mode: the observed
// rate, shrunk away from 0 and 1.
func (e *ipEval) startZ() float64 {
	q := (e.d.conv + 0.5) / (e.d.clicks + 1)
	return logit(math.Min(math.Max(q, 1e-9), 1-1e-9))
}
