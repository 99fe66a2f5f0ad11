package main

import (
	"bytes"
	"encoding/json"
	"errors"
	"path/filepath"
	"strings"
	"testing"
)

// runRipen runs the root command with args and returns stdout and stderr.
func runRipen(t *testing.T, args ...string) (string, string, error) {
	t.Helper()
	cmd := newRootCmd()
	var out, errOut bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetErr(&errOut)
	cmd.SetArgs(args)
	err := cmd.Execute()
	return out.String(), errOut.String(), err
}

var demoArgs = []string{"fit",
	"--clicks", filepath.Join("..", "..", "testdata", "demo", "clicks.jsonl"),
	"--conversions", filepath.Join("..", "..", "testdata", "demo", "conversions.jsonl"),
	"--as-of", demoAsOf, "--window", "7d"}

// TestFitGolden pins the JSON output of `ripen fit` on the demo files; run
// with -update after an intended change of the model or the output.
func TestFitGolden(t *testing.T) {
	out, _, err := runRipen(t, append(demoArgs, "--format", "json")...)
	if err != nil {
		t.Fatal(err)
	}
	checkGolden(t, filepath.Join("..", "..", "testdata", "golden", "fit_demo.json"), []byte(out))

	// The document has the promised keys and sane values.
	var doc struct {
		AsOf        string `json:"as_of"`
		Experiments []struct {
			Experiment string `json:"experiment"`
			Status     string `json:"status"`
			Arms       []map[string]any
		} `json:"experiments"`
		Rejections []fitRejection `json:"rejections"`
	}
	if err := json.Unmarshal([]byte(out), &doc); err != nil {
		t.Fatal(err)
	}
	if doc.AsOf != demoAsOf || len(doc.Experiments) != 2 {
		t.Fatalf("as_of %q, %d experiments", doc.AsOf, len(doc.Experiments))
	}
	keys := []string{"arm", "clicks", "conversions", "observed_cvr", "ripe_clicks", "eventual_cvr", "cvr_low", "cvr_high", "p_best", "weight", "delay"}
	for _, e := range doc.Experiments {
		sum := 0.0
		for _, a := range e.Arms {
			for _, k := range keys {
				if _, ok := a[k]; !ok {
					t.Fatalf("%s: arm lacks key %q", e.Experiment, k)
				}
			}
			low, q, high := a["cvr_low"].(float64), a["eventual_cvr"].(float64), a["cvr_high"].(float64)
			if !(low <= q && q <= high) {
				t.Fatalf("%s/%v: interval [%v, %v] misses estimate %v", e.Experiment, a["arm"], low, high, q)
			}
			sum += a["weight"].(float64)
		}
		if sum < 1-1e-9 || sum > 1+1e-9 {
			t.Fatalf("%s: weights sum to %v", e.Experiment, sum)
		}
	}
	// The demo files hold one bad line of each kind they mean to show.
	reasons := map[string]bool{}
	for _, r := range doc.Rejections {
		if r.Line <= 0 {
			t.Fatalf("rejection without a line number: %+v", r)
		}
		reasons[r.Reason] = true
	}
	for _, want := range []string{"unknown_click", "bad_timestamp", "malformed_json", "missing_field", "duplicate_conversion"} {
		if !reasons[want] {
			t.Fatalf("no %s rejection reported: %v", want, reasons)
		}
	}
}

func TestFitTableListsRejections(t *testing.T) {
	out, errOut, err := runRipen(t, demoArgs...)
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"experiment marrow-pine-hero", "linen-set", "P(best)", "95% interval"} {
		if !strings.Contains(out, want) {
			t.Fatalf("table lacks %q:\n%s", want, out)
		}
	}
	if !strings.Contains(errOut, "conversions:195: unknown_click") {
		t.Fatalf("stderr lacks the unknown click with its line:\n%s", errOut)
	}
}

func TestFitStrictStopsAtFirstBadLine(t *testing.T) {
	_, _, err := runRipen(t, append(demoArgs, "--strict")...)
	var ee *exitError
	if !errors.As(err, &ee) || ee.code != 2 {
		t.Fatalf("want exit code 2, got %v", err)
	}
	if !strings.Contains(err.Error(), "missing_field") || !strings.Contains(err.Error(), "5790") {
		t.Fatalf("error should name the first bad line and reason: %v", err)
	}
}

func TestFitFlagErrors(t *testing.T) {
	cases := map[string][]string{
		"bad window": {"--window", "a week"},
		"bad family": {"--delay", "gamma"},
		"bad policy": {"--policy", "greedy"},
		"bad format": {"--format", "xml"},
		"bad as-of":  {"--as-of", "yesterday"},
	}
	for name, extra := range cases {
		t.Run(name, func(t *testing.T) {
			if _, _, err := runRipen(t, append(append([]string{}, demoArgs...), extra...)...); err == nil {
				t.Fatal("no error")
			}
		})
	}
}
