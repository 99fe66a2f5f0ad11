package sim

import (
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

const minimalScenario = `
name: tiny
horizon: 2d
clicks_per_hour: 10
arms:
  - {name: a, cvr: 0.1, delay: {exponential: {mean: 2h}}}
  - {name: b, cvr: 0.2, delay: {constant: {delay: 1h}}}
`

func TestParseScenarioDefaults(t *testing.T) {
	sc := mustParse(t, minimalScenario)
	if sc.UpdateInterval.D() != DefaultUpdateInterval || sc.Window.D() != 7*24*time.Hour ||
		sc.FitFamily != DefaultFitFamily || sc.Runs != DefaultRuns || sc.Seed != DefaultSeed {
		t.Fatalf("defaults not applied: %+v", sc)
	}
	if sc.Horizon.D() != 48*time.Hour {
		t.Fatalf("horizon %v", sc.Horizon)
	}
	if q := sc.CVRAt(0); q[0] != 0.1 || q[1] != 0.2 {
		t.Fatalf("cvr %v", q)
	}
}

func TestParseScenarioErrors(t *testing.T) {
	for _, tc := range []struct {
		name, doc, want string
	}{
		{"unknown key", minimalScenario + "colour: blue\n", "field colour not found"},
		{"unknown delay key", strings.Replace(minimalScenario, "mean: 2h", "mean: 2h, rate: 3", 1), "field rate not found"},
		{"duplicate key", minimalScenario + "horizon: 3d\n", "already defined"},
		{"two documents", minimalScenario + "---\nname: again\n", "more than one YAML document"},
		{"bad duration", strings.Replace(minimalScenario, "2d", "two days", 1), "want Go syntax such as 90m"},
		{"no name", strings.Replace(minimalScenario, "name: tiny", "", 1), "name: required"},
		{"one arm", strings.Replace(minimalScenario, "  - {name: b, cvr: 0.2, delay: {constant: {delay: 1h}}}\n", "", 1), "need at least two"},
		{"duplicate arm", strings.Replace(minimalScenario, "name: b", "name: a", 1), `duplicate arm "a"`},
		{"cvr range", strings.Replace(minimalScenario, "cvr: 0.2", "cvr: 1.2", 1), "arms[1].cvr: 1.2 must be in [0, 1]"},
		{"no delay", strings.Replace(minimalScenario, "delay: {constant: {delay: 1h}}", "delay: {}", 1), "arms[1].delay: one of exponential"},
		{"two kinds", strings.Replace(minimalScenario, "{constant: {delay: 1h}}", "{constant: {delay: 1h}, exponential: {mean: 1h}}", 1), "exactly one delay kind"},
		{"weibull shape", strings.Replace(minimalScenario, "{constant: {delay: 1h}}", "{weibull: {shape: 0, scale: 1h}}", 1), "weibull.shape"},
		{"mixture weight", strings.Replace(minimalScenario, "{constant: {delay: 1h}}", "{mixture: [{weight: 0, constant: {delay: 1h}}]}", 1), "mixture[0].weight"},
		{"nested mixture", strings.Replace(minimalScenario, "{constant: {delay: 1h}}", "{mixture: [{weight: 1, mixture: []}]}", 1), "field mixture not found"},
		{"mass outside window", strings.Replace(minimalScenario, "mean: 2h", "mean: 60d", 1), "falls within the window"},
		{"change point arm", minimalScenario + "change_points: [{at: 1d, arm: c, cvr: 0.1}]\n", `unknown arm "c"`},
		{"change point time", minimalScenario + "change_points: [{at: 3d, arm: a, cvr: 0.1}]\n", "must be within the horizon"},
		{"update interval", minimalScenario + "update_interval: 3d\n", "exceeds the horizon"},
		{"amplitude", minimalScenario + "diurnal_amplitude: 1\n", "diurnal_amplitude"},
		{"fit family", minimalScenario + "fit_family: gamma\n", "unknown delay family"},
		{"traffic", strings.Replace(minimalScenario, "clicks_per_hour: 10", "clicks_per_hour: -1", 1), "clicks_per_hour"},
		{"empty", "", "empty document"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := ParseScenario(strings.NewReader(tc.doc))
			if err == nil {
				t.Fatalf("no error, want %q", tc.want)
			}
			if !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("error %q, want it to contain %q", err, tc.want)
			}
		})
	}
}

// TestShippedScenarios: every scenario under testdata/scenarios parses and
// validates, and the set covers a constant one-hour delay and a scenario
// whose best arm converts slowest.
func TestShippedScenarios(t *testing.T) {
	files, err := filepath.Glob(filepath.Join("..", "..", "testdata", "scenarios", "*.yaml"))
	if err != nil || len(files) < 3 {
		t.Fatalf("scenarios: %v, %v", files, err)
	}
	var constantHour, slowBest bool
	for _, f := range files {
		t.Run(filepath.Base(f), func(t *testing.T) {
			sc := readScenario(t, f)
			best, slowest := 0, 0
			var slowMedian float64
			for i, a := range sc.Arms {
				if c := a.Delay.Constant; c != nil && c.Delay.D() == time.Hour {
					constantHour = true
				}
				if a.CVR > sc.Arms[best].CVR {
					best = i
				}
				d, _ := a.Delay.Distribution()
				tr, _ := NewTruncated(d, sc.Window.D().Seconds())
				m := medianOf(tr, sc.Window.D().Seconds())
				if m > slowMedian {
					slowest, slowMedian = i, m
				}
			}
			if best == slowest && len(sc.ChangePoints) == 0 {
				slowBest = true
			}
		})
	}
	if !constantHour || !slowBest {
		t.Errorf("constant one-hour delay scenario: %v; best-arm-slowest scenario: %v", constantHour, slowBest)
	}
}

// medianOf bisects the CDF of d on [0, hi].
func medianOf(d Distribution, hi float64) float64 {
	lo := 0.0
	for range 200 {
		mid := (lo + hi) / 2
		if d.CDF(mid) < 0.5 {
			lo = mid
		} else {
			hi = mid
		}
	}
	if math.IsNaN(lo) {
		return 0
	}
	return (lo + hi) / 2
}

// TestBatteryScenarios: the scenarios of testdata/scenarios/battery parse,
// fit the service's default family and run for at least three attribution
// windows, so a settle rule based on matured clicks has room to fire.
func TestBatteryScenarios(t *testing.T) {
	files, err := filepath.Glob(filepath.Join("..", "..", "testdata", "scenarios", "battery", "*.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	if len(files) != 6 {
		t.Fatalf("%d battery scenarios, want 6", len(files))
	}
	for _, name := range files {
		sc := readScenario(t, name)
		if sc.FitFamily != "auto" || sc.Horizon.D() < 3*sc.Window.D() {
			t.Errorf("%s: fit %s, horizon %v, window %v", name, sc.FitFamily, sc.Horizon, sc.Window)
		}
	}
}

// TestRandomScenarios: the randomly drawn scenarios of
// testdata/scenarios/random (the settle rule's wider check) parse and
// validate.
func TestRandomScenarios(t *testing.T) {
	files, err := filepath.Glob(filepath.Join("..", "..", "testdata", "scenarios", "random", "*.yaml"))
	if err != nil || len(files) != 40 {
		t.Fatalf("random scenarios: %d files, %v", len(files), err)
	}
	for _, f := range files {
		sc := readScenario(t, f)
		if len(sc.Arms) < 2 || len(sc.Arms) > 4 {
			t.Errorf("%s: %d arms, want 2 to 4", f, len(sc.Arms))
		}
	}
}

// readScenario parses the scenario file name, failing the test if it
// cannot.
func readScenario(t *testing.T, name string) *Scenario {
	t.Helper()
	f, err := os.Open(name)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	sc, err := ParseScenario(f)
	if err != nil {
		t.Fatalf("%s: %v", name, err)
	}
	return sc
}
