package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"ripen/consumer"
	"ripen/estimator/sim"
)

// dkwEpsilon is the half-width of the Dvoretzky–Kiefer–Wolfowitz
// confidence band of an empirical CDF of n draws: P(sup|F_n - F| > eps)
// <= 2 exp(-2 n eps^2) (Dvoretzky, Kiefer & Wolfowitz 1956, with the tight
// constant of Massart 1990, "The tight constant in the DKW inequality",
// Ann. Probab. 18(3)).
func dkwEpsilon(n int, alpha float64) float64 {
	return math.Sqrt(math.Log(2/alpha) / (2 * float64(n)))
}

// TestDemoGeneratorMatchesScenario checks the demo's traffic against the
// laws it is drawn from: Poisson arrivals, arms split by the weights,
// Bernoulli conversions and the truncated delay distribution.
func TestDemoGeneratorMatchesScenario(t *testing.T) {
	sc, err := demoScenario(demoFlags{})
	if err != nil {
		t.Fatal(err)
	}
	weights := []float64{0.5, 0.3, 0.2}
	g, err := newDemoGenerator(sc)
	if err != nil {
		t.Fatal(err)
	}
	const chunkMs = 2 * 3600 * 1000
	horizon := sc.Horizon.D().Milliseconds()
	clickTS := map[string]int64{}
	clickArm := map[string]int{}
	var delays [][]float64 = make([][]float64, len(sc.Arms))
	converted := map[string]bool{}
	var lastEnd int64
	for target := int64(chunkMs); target <= horizon; target += chunkMs {
		clicks, convs := g.chunk(target, weights)
		if len(clicks) == 0 {
			t.Fatalf("chunk to %d has no click", target)
		}
		prev := int64(math.MinInt64)
		for i, m := range clicks {
			var c struct {
				ClickID string `json:"click_id"`
				Arm     string `json:"arm"`
				TS      int64  `json:"ts"`
			}
			if err := json.Unmarshal(m.Value, &c); err != nil {
				t.Fatal(err)
			}
			el := c.TS - sim.Start
			if c.TS < prev || el < lastEnd {
				t.Fatalf("click %s at %d out of order", c.ClickID, c.TS)
			}
			prev = c.TS
			// Only the chunk's last click reaches the target.
			if last := i == len(clicks)-1; last != (el >= target) {
				t.Fatalf("click %d of %d at elapsed %d, target %d", i, len(clicks), el, target)
			}
			clickTS[c.ClickID] = c.TS
			clickArm[c.ClickID] = slices.Index(g.arms, c.Arm)
		}
		lastEnd = prev - sim.Start
		prev = math.MinInt64
		for _, m := range convs {
			var v struct {
				ClickID string `json:"click_id"`
				TS      int64  `json:"ts"`
			}
			if err := json.Unmarshal(m.Value, &v); err != nil {
				t.Fatal(err)
			}
			ct, ok := clickTS[v.ClickID]
			switch {
			case !ok:
				t.Fatalf("conversion of unknown click %s", v.ClickID)
			case v.TS < prev || v.TS-sim.Start >= target || v.TS < ct:
				t.Fatalf("conversion %s at %d out of order (target %d, click %d)", v.ClickID, v.TS, target, ct)
			case converted[v.ClickID]:
				t.Fatalf("click %s converted twice", v.ClickID)
			}
			prev = v.TS
			converted[v.ClickID] = true
			if ct-sim.Start < horizon-sc.Window.D().Milliseconds() {
				delays[clickArm[v.ClickID]] = append(delays[clickArm[v.ClickID]], float64(v.TS-ct)/1000)
			}
		}
	}

	// Arrivals: a Poisson process, so the count over the horizon has
	// variance equal to its mean (Ross, Introduction to Probability Models,
	// ch. 5); the day cycle integrates to zero over whole days.
	n := len(clickTS)
	mean := sc.ClicksPerHour * sc.Horizon.Hours()
	if math.Abs(float64(n)-mean) > 4*math.Sqrt(mean) {
		t.Errorf("%d clicks, want %.0f ± %.0f (4 Poisson SD)", n, mean, 4*math.Sqrt(mean))
	}
	early := map[int]int{} // clicks old enough that every conversion is in
	earlyConv := map[int]int{}
	for id, ts := range clickTS {
		if ts-sim.Start < horizon-sc.Window.D().Milliseconds() {
			early[clickArm[id]]++
			if converted[id] {
				earlyConv[clickArm[id]]++
			}
		}
	}
	for i, a := range sc.Arms {
		t.Run(a.Name, func(t *testing.T) {
			// Split: binomial(n, w) per arm.
			got := 0
			for _, arm := range clickArm {
				if arm == i {
					got++
				}
			}
			want, sd := float64(n)*weights[i], math.Sqrt(float64(n)*weights[i]*(1-weights[i]))
			if math.Abs(float64(got)-want) > 4*sd {
				t.Errorf("%d clicks, want %.0f ± %.0f (4 binomial SD)", got, want, 4*sd)
			}
			// Conversions of clicks older than the window: binomial(q).
			m := early[i]
			want, sd = float64(m)*a.CVR, math.Sqrt(float64(m)*a.CVR*(1-a.CVR))
			if math.Abs(float64(earlyConv[i])-want) > 4*sd {
				t.Errorf("%d of %d clicks converted, want %.0f ± %.0f", earlyConv[i], m, want, 4*sd)
			}
			// Delays: the empirical CDF stays within the DKW band around
			// the scenario's delay law truncated at the window.
			dist, err := a.Delay.Distribution()
			if err != nil {
				t.Fatal(err)
			}
			truth, err := sim.NewTruncated(dist, sc.Window.D().Seconds())
			if err != nil {
				t.Fatal(err)
			}
			d := slices.Clone(delays[i])
			slices.Sort(d)
			eps := dkwEpsilon(len(d), 1e-4)
			for j, x := range d {
				// Just below and at x the empirical CDF is j/n and
				// (j+1)/n; both must lie within eps of the true CDF.
				f := truth.CDF(x)
				if below, at := float64(j)/float64(len(d)), float64(j+1)/float64(len(d)); math.Abs(f-below) > eps || math.Abs(f-at) > eps {
					t.Fatalf("delay %d of %d = %.0fs: true CDF %.4f, empirical %.4f..%.4f, DKW band ± %.4f", j, len(d), x, f, below, at, eps)
				}
			}
		})
	}
}

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
			got := weightsFor(arms, tc.pub, prev)
			for i := range got {
				if math.Abs(got[i]-tc.want[i]) > 1e-12 {
					t.Fatalf("weightsFor = %v, want %v", got, tc.want)
				}
			}
		})
	}
}

// TestDemoShortAdapts runs `ripen demo --short` end to end on each state
// store: the real service consumes the simulated traffic from the
// in-process broker, and the traffic follows the weights it publishes.
func TestDemoShortAdapts(t *testing.T) {
	sc, err := demoScenario(demoFlags{short: true})
	if err != nil {
		t.Fatal(err)
	}
	best := 0
	for i, a := range sc.Arms {
		if a.CVR > sc.Arms[best].CVR {
			best = i
		}
	}
	bestArm := sc.Arms[best].Name
	uniform := 1 / float64(len(sc.Arms))
	for _, tc := range []struct {
		store string
		args  []string
		// full: the adaptation checks; the other store runs a shorter
		// span to keep the package's test time down.
		full bool
	}{
		{demoStoreServer, []string{"--short"}, true},
		{demoStoreEmbedded, []string{"--days", "1"}, false},
	} {
		t.Run(tc.store, func(t *testing.T) {
			if tc.store == demoStoreServer {
				if _, err := exec.LookPath(demoRedisBinary); err != nil {
					if os.Getenv("CI") != "" {
						t.Fatalf("%s not on PATH and CI is set", demoRedisBinary)
					}
					t.Skipf("%s not on PATH", demoRedisBinary)
				}
			}
			dir := filepath.Join(t.TempDir(), "report")
			ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
			defer cancel()
			cmd := newDemoCmd()
			var out, errOut bytes.Buffer
			cmd.SetOut(&out)
			cmd.SetErr(&errOut)
			cmd.SetArgs(append(slices.Clone(tc.args), "--report", dir, "--store", tc.store))
			if err := cmd.ExecuteContext(ctx); err != nil {
				t.Fatalf("demo: %v\nstdout:\n%s\nstderr:\n%s", err, out.String(), errOut.String())
			}
			if errOut.Len() > 0 {
				t.Errorf("service logged errors:\n%s", errOut.String())
			}
			if !strings.Contains(out.String(), "allocations published") || strings.Contains(out.String(), "\033[") {
				t.Errorf("want plain progress lines and a summary on a non-terminal, got:\n%s", out.String())
			}
			allocs := readAllocations(t, filepath.Join(dir, "allocations.jsonl"))
			if len(allocs) < 5 {
				t.Fatalf("%d allocations published, want several", len(allocs))
			}
			for i, a := range allocs {
				if a.Seq != int64(i+1) {
					t.Fatalf("allocation %d has seq %d: every publication should be read once, in order", i, a.Seq)
				}
				var sum float64
				for _, w := range a.Weights {
					sum += w
				}
				if math.Abs(sum-1) > 1e-9 || len(a.Weights) != len(sc.Arms) {
					t.Fatalf("allocation %d weights %v: want one per arm summing to 1", a.Seq, a.Weights)
				}
			}
			html, err := os.ReadFile(filepath.Join(dir, "index.html"))
			if err != nil {
				t.Fatal(err)
			}
			for _, want := range []string{`<figure id="traffic">`, `<figure id="cvr">`, `<figure id="delay-cdf">`, `<figure id="delay-model">`} {
				if !bytes.Contains(html, []byte(want)) {
					t.Errorf("report lacks %s", want)
				}
			}
			if n := bytes.Count(html, []byte("<svg")); n != 4 {
				t.Errorf("report has %d charts, want 4", n)
			}
			if !tc.full {
				return
			}
			last := allocs[len(allocs)-1]
			if w := last.Weights[bestArm]; w < uniform+0.25 {
				t.Errorf("best arm %s ends with weight %.3f, want well above its uniform share %.3f", bestArm, w, uniform)
			}
			if last.Leader != bestArm {
				t.Errorf("leader %s, want the best arm %s", last.Leader, bestArm)
			}
			// Closed loop: the clicks follow the weights, so the best
			// arm received more than its uniform share of the traffic.
			var total, bestClicks uint64
			for _, a := range last.Arms {
				total += a.Clicks
				if a.Arm == bestArm {
					bestClicks = a.Clicks
				}
			}
			if share := float64(bestClicks) / float64(total); share < uniform+0.1 {
				t.Errorf("best arm got %.3f of the clicks, want more than its uniform share %.3f", share, uniform)
			}
		})
	}
}

func readAllocations(t *testing.T, path string) []consumer.Allocation {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var raw [][]byte
	sc := bufio.NewScanner(f)
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		raw = append(raw, slices.Clone(sc.Bytes()))
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	allocs, err := parseAllocations(raw)
	if err != nil {
		t.Fatal(err)
	}
	if len(allocs) != len(raw) {
		t.Errorf("%d messages but %d distinct seqs: an allocation was read twice", len(raw), len(allocs))
	}
	return allocs
}
