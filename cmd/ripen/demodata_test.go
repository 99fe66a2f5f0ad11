package main

import (
	"bytes"
	"flag"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"sort"
	"testing"
	"time"
)

var update = flag.Bool("update", false, "rewrite golden and demo files under testdata/")

// The demo data is invented: two online shops running experiments whose
// buyers take hours to days to purchase. Nothing here is a reference value.
type demoArm struct {
	experiment, arm string
	perDay          int
	cvr             float64 // eventual probability of a purchase within the window
	shape, scaleH   float64 // Weibull delay (shape 1 = exponential), scale in hours
}

var demoArms = []demoArm{
	// Marrow & Pine, a home-goods shop, tests three hero banners.
	{"marrow-pine-hero", "oak-lamp", 250, 0.030, 1.0, 14},
	{"marrow-pine-hero", "linen-set", 250, 0.036, 1.6, 60}, // best, and slowest to buy
	{"marrow-pine-hero", "copper-kettle", 250, 0.026, 1.0, 8},
	// Tallowby Candles tests two lines of checkout copy.
	{"tallowby-checkout", "free-shipping", 200, 0.050, 1.0, 5},
	{"tallowby-checkout", "gift-note", 200, 0.048, 1.2, 9},
}

var (
	demoStart  = time.Date(2026, 5, 4, 0, 0, 0, 0, time.UTC)
	demoDays   = 10
	demoWindow = 7 * 24 * time.Hour
)

// demoAsOf is the as-of time the README's first command uses.
const demoAsOf = "2026-05-14T00:00:00Z"

type demoLine struct {
	ts   int64
	text string
}

// generateDemo returns the demo click and conversion files, sorted by event
// time, with a few bad lines that `ripen fit` must report and skip.
func generateDemo() (clicks, conversions []byte) {
	r := rand.New(rand.NewPCG(20260504, 7))
	var cl, cv []demoLine
	n := 0
	for _, a := range demoArms {
		for i := 0; i < a.perDay*demoDays; i++ {
			n++
			ts := demoStart.Add(time.Duration(r.Float64() * float64(demoDays) * 24 * float64(time.Hour)))
			id := fmt.Sprintf("c%06d", n)
			cl = append(cl, demoLine{ts.UnixMilli(), fmt.Sprintf(`{"click_id":%q,"experiment":%q,"arm":%q,"ts":%q}`,
				id, a.experiment, a.arm, ts.Format(time.RFC3339Nano))})
			if r.Float64() >= a.cvr {
				continue
			}
			// Weibull by inversion, truncated to the window by rejection.
			var d time.Duration
			for {
				h := a.scaleH * math.Pow(-math.Log(1-r.Float64()), 1/a.shape)
				d = time.Duration(h * float64(time.Hour))
				if d <= demoWindow {
					break
				}
			}
			ct := ts.Add(d)
			var line string
			switch n % 3 {
			case 0: // epoch milliseconds, click looked up by id
				line = fmt.Sprintf(`{"click_id":%q,"ts":%d}`, id, ct.UnixMilli())
			case 1: // RFC 3339 with an offset
				line = fmt.Sprintf(`{"click_id":%q,"ts":%q}`, id, ct.In(time.FixedZone("", 2*3600)).Format(time.RFC3339))
			default: // self-attributed
				line = fmt.Sprintf(`{"click_id":%q,"ts":%q,"experiment":%q,"arm":%q,"click_ts":%d}`,
					id, ct.Format(time.RFC3339), a.experiment, a.arm, ts.UnixMilli())
			}
			cv = append(cv, demoLine{ct.UnixMilli(), line})
			if n%97 == 0 { // a resent purchase: must count once
				cv = append(cv, demoLine{ct.UnixMilli() + 1000, fmt.Sprintf(`{"click_id":%q,"ts":%d}`, id, ct.UnixMilli()+1000)})
			}
		}
	}
	mid := demoStart.Add(5 * 24 * time.Hour).UnixMilli()
	cv = append(cv,
		demoLine{mid, `{"click_id":"c999999","ts":"2026-05-09T00:00:00Z"}`},
		demoLine{mid + 1, `{"click_id":"c000001","ts":"not a time"}`},
		demoLine{mid + 2, `{"click_id":`},
	)
	cl = append(cl, demoLine{mid, `{"click_id":"c000002","experiment":"marrow-pine-hero","ts":"2026-05-09T00:00:00Z"}`})
	return joinLines(cl), joinLines(cv)
}

func joinLines(ls []demoLine) []byte {
	sort.SliceStable(ls, func(i, j int) bool { return ls[i].ts < ls[j].ts })
	var b bytes.Buffer
	for _, l := range ls {
		b.WriteString(l.text)
		b.WriteByte('\n')
	}
	return b.Bytes()
}

// checkGolden compares got with the file at path, first rewriting the file
// when -update is set.
func checkGolden(t *testing.T, path string, got []byte) {
	t.Helper()
	if *update {
		if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, got, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run with -update to create)", err)
	}
	if !bytes.Equal(got, want) {
		t.Fatalf("output differs from %s; rerun with -update if the change is intended", path)
	}
}

// TestDemoDataUpToDate keeps testdata/demo in step with its generator; run
// `go test ./cmd/ripen -run TestDemoDataUpToDate -update` after changing it.
func TestDemoDataUpToDate(t *testing.T) {
	clicks, conversions := generateDemo()
	for name, want := range map[string][]byte{"clicks.jsonl": clicks, "conversions.jsonl": conversions} {
		checkGolden(t, filepath.Join("..", "..", "testdata", "demo", name), want)
	}
}
