package main

import (
	"bufio"
	"bytes"
	"context"
	"io"
	"math"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"ripen/console"
	"ripen/consumer/closedloop"
)

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
		{closedloop.StoreServer, []string{"--short"}, true},
		{closedloop.StoreEmbedded, []string{"--days", "1"}, false},
	} {
		t.Run(tc.store, func(t *testing.T) {
			if tc.store == closedloop.StoreServer {
				if _, err := exec.LookPath(closedloop.RedisBinary); err != nil {
					if os.Getenv("CI") != "" {
						t.Fatalf("%s not on PATH and CI is set", closedloop.RedisBinary)
					}
					t.Skipf("%s not on PATH", closedloop.RedisBinary)
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
			if !strings.Contains(out.String(), "console: http://127.0.0.1:") {
				t.Errorf("the console's address is not printed:\n%s", out.String())
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
			for _, want := range []string{`"id":"traffic"`, `"id":"pbest"`, `"id":"cvr"`, `"id":"delay-cdf"`, `"id":"delay-model"`, `"role":"true"`} {
				if !bytes.Contains(html, []byte(want)) {
					t.Errorf("report lacks %s", want)
				}
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

func readAllocations(t *testing.T, path string) []console.Allocation {
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
	allocs, err := console.ParseAllocations(raw)
	if err != nil {
		t.Fatal(err)
	}
	if len(allocs) != len(raw) {
		t.Errorf("%d messages but %d distinct seqs: an allocation was read twice", len(raw), len(allocs))
	}
	return allocs
}

// TestDemoKeepServing: with --keep-serving the demo writes its report,
// then keeps its console up until interrupted, and stops cleanly.
func TestDemoKeepServing(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	runCtx, interrupt := context.WithCancel(ctx)
	defer interrupt()
	dir := filepath.Join(t.TempDir(), "report")
	pr, pw := io.Pipe()
	done := make(chan error, 1)
	go func() {
		cmd := newDemoCmd()
		cmd.SetOut(pw)
		cmd.SetErr(io.Discard)
		cmd.SetArgs([]string{"--days", "0.5", "--store", closedloop.StoreEmbedded, "--report", dir, "--keep-serving"})
		err := cmd.ExecuteContext(runCtx)
		pw.Close()
		done <- err
	}()
	var consoleURL string
	lines := bufio.NewScanner(pr)
	for lines.Scan() {
		if u, ok := strings.CutSuffix(lines.Text(), " (serving until interrupted)"); ok {
			consoleURL = strings.TrimPrefix(u, "console: ")
			break
		}
	}
	go func() { _, _ = io.Copy(io.Discard, pr) }()
	if consoleURL == "" {
		t.Fatalf("the demo ended without serving its console: %v", <-done)
	}
	if _, err := os.Stat(filepath.Join(dir, "index.html")); err != nil {
		t.Errorf("report not written before serving: %v", err)
	}
	resp, err := http.Get(consoleURL + "console/api/experiments")
	if err != nil {
		t.Fatal(err)
	}
	body, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != http.StatusOK || !strings.Contains(string(body), "quillmoss-hero") {
		t.Errorf("console after the run: %d %s", resp.StatusCode, body)
	}
	interrupt()
	if err := <-done; err != nil {
		t.Errorf("demo after the interrupt: %v", err)
	}
}
