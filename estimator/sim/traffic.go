package sim

import (
	"container/heap"
	"fmt"
	"math"
	"math/rand/v2"
)

// TrafficClick is one generated click: its id, the index of its arm in
// the scenario and its event time (Unix ms).
type TrafficClick struct {
	ID  string
	Arm int
	TS  int64
}

// TrafficConversion is the conversion of a generated click, at event
// time TS (Unix ms).
type TrafficConversion struct {
	ClickID string
	Arm     int
	TS      int64
}

// Traffic produces a scenario's clicks and conversions in event-time
// order, chunk by chunk, splitting clicks between the arms by the weights
// it is given, so that a driver can follow the weights a service
// publishes (a closed loop). Arrivals are a Poisson process with the
// scenario's (diurnal) rate by thinning (Lewis & Shedler 1979); an arm's
// clicks convert with its true eventual rate (change points included)
// after a delay from its delay distribution truncated at the window
// (Truncated). It does no I/O and reads no clock.
type Traffic struct {
	c        *compiled
	r        *rand.Rand
	prefix   string
	t        float64 // elapsed ms of the last candidate arrival
	pending  trafficHeap
	clicks   []int // per arm
	convs    []int // per arm, emitted
	n        int
	q        []float64
	arms     []string
	peakRate float64
}

// trafficStreamKey is the PCG stream constant of generated traffic.
const trafficStreamKey = 0x71756c6c6d6f7373 // arbitrary

// NewTraffic returns a generator of sc's traffic seeded with sc.Seed;
// click ids are idPrefix followed by a running number.
func NewTraffic(sc Scenario, idPrefix string) (*Traffic, error) {
	c, err := compile(sc)
	if err != nil {
		return nil, fmt.Errorf("traffic: %w", err)
	}
	return &Traffic{
		c: c, r: rand.New(rand.NewPCG(c.sc.Seed, trafficStreamKey)), prefix: idPrefix,
		clicks: make([]int, c.k), convs: make([]int, c.k), q: make([]float64, c.k),
		arms: c.sc.ArmNames(), peakRate: c.base * (1 + c.amp),
	}, nil
}

// Arms returns the arm names, indexed like TrafficClick.Arm.
func (g *Traffic) Arms() []string { return g.arms }

// Clicks returns the clicks generated so far per arm.
func (g *Traffic) Clicks() []int { return g.clicks }

// Conversions returns the conversions emitted so far per arm.
func (g *Traffic) Conversions() []int { return g.convs }

// arrival returns the elapsed ms of the next click.
func (g *Traffic) arrival() int64 {
	for {
		g.t += g.r.ExpFloat64() / g.peakRate
		if g.c.amp == 0 || g.r.Float64()*g.peakRate < g.c.rate(g.t) {
			return int64(g.t)
		}
	}
}

// Chunk returns the clicks up to and including the first one at or after
// elapsed time target (ms since Start), and the conversions due before
// target, each in time order; clicks go to the arms in proportion to
// weights (indexed like Arms). Ending on a click past the target lets a
// watermark pass target minus a lateness whatever the gaps in the
// traffic; every other event of the chunk is earlier than target.
func (g *Traffic) Chunk(target int64, weights []float64) (clicks []TrafficClick, convs []TrafficConversion) {
	due := func(limit int64) {
		for g.pending.Len() > 0 && g.pending[0].TS-Start < limit {
			c := heap.Pop(&g.pending).(TrafficConversion)
			g.convs[c.Arm]++
			convs = append(convs, c)
		}
	}
	for {
		t := g.arrival()
		due(min(t+1, target))
		arm := PickArm(weights, g.r.Float64())
		g.n++
		id := fmt.Sprintf("%s%07d", g.prefix, g.n)
		ts := Start + t
		clicks = append(clicks, TrafficClick{ID: id, Arm: arm, TS: ts})
		g.clicks[arm]++
		g.c.cvrAt(t, g.q)
		if g.r.Float64() < g.q[arm] {
			d := int64(math.Round(g.c.delays[arm].Sample(g.r) * 1000))
			d = min(max(d, 0), g.c.windowMs-1)
			heap.Push(&g.pending, TrafficConversion{ClickID: id, Arm: arm, TS: ts + d})
		}
		if t >= target {
			due(target)
			return clicks, convs
		}
	}
}

// trafficHeap is a min-heap of pending conversions by time.
type trafficHeap []TrafficConversion

func (h trafficHeap) Len() int           { return len(h) }
func (h trafficHeap) Less(i, j int) bool { return h[i].TS < h[j].TS }
func (h trafficHeap) Swap(i, j int)      { h[i], h[j] = h[j], h[i] }
func (h *trafficHeap) Push(x any)        { *h = append(*h, x.(TrafficConversion)) }
func (h *trafficHeap) Pop() any {
	old := *h
	x := old[len(old)-1]
	*h = old[:len(old)-1]
	return x
}
