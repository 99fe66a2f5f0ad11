package main

import (
	"encoding/json"
	"strings"
	"testing"
)

// calibrateSmall are the flags of a calibration small enough for a test.
var calibrateSmall = []string{"calibrate", "--window", "1d", "--maturities", "0.5,2", "--truths", "exponential,mixture",
	"--clicks-per-hour", "20", "--fits", "exponential", "--replicates", "8", "--sbc-replicates", "100", "--sbc-clicks-per-hour", "5", "--step", "1h"}

// TestCalibrateJSON: the JSON document holds a cell per maturity and truth,
// a pooled row per maturity and an SBC row per maturity, with coverage
// shares in [0, 1] and a 20-bin rank histogram holding every replicate; the
// same seed prints the same document whatever the number of workers.
func TestCalibrateJSON(t *testing.T) {
	out, errOut, err := runRipen(t, append(calibrateSmall, "--format", "json")...)
	if err != nil {
		t.Fatal(err)
	}
	var doc calibrateOutput
	if err := json.Unmarshal([]byte(out), &doc); err != nil {
		t.Fatal(err)
	}
	if len(doc.Cells) != 4 || len(doc.Pooled) != 2 || len(doc.SBC) != 2 || doc.WindowHours != 24 {
		t.Fatalf("%d cells, %d pooled, %d SBC, window %v", len(doc.Cells), len(doc.Pooled), len(doc.SBC), doc.WindowHours)
	}
	for _, c := range doc.Cells {
		if c.Replicates+c.Failed != 8 || c.Coverage95 == nil || *c.Coverage95 < 0 || *c.Coverage95 > 1 || *c.Coverage50 > *c.Coverage95 {
			t.Fatalf("cell %+v", c)
		}
	}
	for _, s := range doc.SBC {
		n := 0
		for _, h := range s.Histogram {
			n += h
		}
		if len(s.Histogram) != 20 || n != s.Replicates || s.PValue == nil {
			t.Fatalf("SBC row %+v", s)
		}
	}
	if !strings.Contains(errOut, "4 coverage cells, 2 SBC cells") {
		t.Errorf("stderr %q", errOut)
	}
	again, _, err := runRipen(t, append(calibrateSmall, "--format", "json", "--workers", "1")...)
	if err != nil || again != out {
		t.Fatalf("one worker gives another document (err %v)", err)
	}
	table, _, err := runRipen(t, append(calibrateSmall, "--skip-sbc")...)
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"cover 95%", "pooled over truth families", "mixture"} {
		if !strings.Contains(table, want) {
			t.Errorf("table lacks %q:\n%s", want, table)
		}
	}
	if strings.Contains(table, "simulation-based calibration") {
		t.Errorf("--skip-sbc printed SBC:\n%s", table)
	}
}

func TestCalibrateErrors(t *testing.T) {
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"--truths", "gamma"}, `unknown truth family "gamma"`},
		{[]string{"--fits", "spline"}, "--fits"},
		{[]string{"--window", "soon"}, "--window"},
		{[]string{"--skip-sbc", "--skip-coverage"}, "nothing left"},
		{[]string{"--sbc-replicates", "10"}, "SBC replicates 10"},
		{[]string{"--format", "xml"}, "--format"},
		{[]string{"--maturities", "0.5,soon"}, `--maturities: "soon" is not a number`},
	} {
		t.Run(tc.want, func(t *testing.T) {
			_, _, err := runRipen(t, append([]string{"calibrate"}, tc.args...)...)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("error %v, want %q", err, tc.want)
			}
		})
	}
}
