package main

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// runSimulateCmd runs `ripen simulate` with args and returns stdout and stderr.
func runSimulateCmd(t *testing.T, args ...string) (string, string, error) {
	t.Helper()
	return runRipen(t, append([]string{"simulate"}, args...)...)
}

var smallScenario = filepath.Join("..", "..", "testdata", "scenarios", "small-golden.yaml")

// TestSimulateGolden pins the JSON output of `ripen simulate` on a small
// scenario (deterministic given the seed); run with -update after an
// intended change of the simulator, the model or the output.
func TestSimulateGolden(t *testing.T) {
	args := []string{"--scenario", smallScenario, "--format", "json", "--policies", "uniform,thompson-observed,thompson-bayes"}
	out, _, err := runSimulateCmd(t, args...)
	if err != nil {
		t.Fatal(err)
	}
	checkGolden(t, filepath.Join("..", "..", "testdata", "golden", "simulate_small.json"), []byte(out))
	// The same seed gives the same document.
	again, _, err := runSimulateCmd(t, args...)
	if err != nil || again != out {
		t.Fatalf("second run differs (err %v)", err)
	}
	var doc struct {
		Scenario string           `json:"scenario"`
		Runs     int              `json:"runs"`
		Policies []map[string]any `json:"policies"`
	}
	if err := json.Unmarshal([]byte(out), &doc); err != nil {
		t.Fatal(err)
	}
	if doc.Scenario != "ferngully-pottery-photos" || doc.Runs != 3 || len(doc.Policies) != 3 {
		t.Fatalf("scenario %q, runs %d, %d policies", doc.Scenario, doc.Runs, len(doc.Policies))
	}
	for _, p := range doc.Policies {
		for _, k := range []string{"policy", "regret_mean", "regret_se", "best_arm_share", "settled_correct", "settle_hours_median"} {
			if _, ok := p[k]; !ok {
				t.Fatalf("policy %v lacks key %q", p["policy"], k)
			}
		}
		share := p["best_arm_share"].(float64)
		if !(share > 0 && share < 1) {
			t.Fatalf("%v: best-arm share %v", p["policy"], share)
		}
	}
	// Uniform splits traffic evenly between the two arms, so its share to
	// the best arm is near one half.
	if s := doc.Policies[0]["best_arm_share"].(float64); s < 0.45 || s > 0.55 {
		t.Fatalf("uniform best-arm share %v", s)
	}
	// --runs and --seed override the scenario.
	out2, _, err := runSimulateCmd(t, "--scenario", smallScenario, "--format", "json", "--policies", "uniform", "--runs", "2", "--seed", "9")
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(out2, `"runs": 2,`) || !strings.Contains(out2, `"seed": 9,`) {
		t.Fatalf("overrides not applied:\n%s", out2)
	}
}

// TestSimulateReport: --report writes index.html with the four kinds of
// chart inline as SVG, and the table format prints every policy.
func TestSimulateReport(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "report")
	out, errOut, err := runSimulateCmd(t, "--scenario", smallScenario, "--policies", "thompson-delay,top-two", "--runs", "2", "--report", dir)
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"thompson-delay", "top-two", "regret", "best-arm share"} {
		if !strings.Contains(out, want) {
			t.Errorf("table lacks %q:\n%s", want, out)
		}
	}
	if strings.Contains(errOut, "simulating [") {
		t.Errorf("progress bar drawn on a non-terminal: %q", errOut)
	}
	html, err := os.ReadFile(filepath.Join(dir, "index.html"))
	if err != nil {
		t.Fatal(err)
	}
	page := string(html)
	// One regret chart, one traffic chart per policy, a CVR chart and a
	// delay CDF chart.
	if n := strings.Count(page, `"series":[`); n != 5 {
		t.Errorf("%d charts, want 5", n)
	}
	for _, id := range []string{`"id":"regret"`, `"id":"traffic-thompson-delay"`, `"id":"traffic-top-two"`, `"id":"cvr"`, `"id":"delay-cdf"`} {
		if !strings.Contains(page, id) {
			t.Errorf("report lacks chart %s", id)
		}
	}
	for _, want := range []string{"Cumulative regret", "Traffic share per arm", "Observed vs eventual vs true CVR", "Delay CDF", "glaze-closeup", "studio-shelf"} {
		if !strings.Contains(page, want) {
			t.Errorf("report lacks %q", want)
		}
	}
}

func TestSimulateErrors(t *testing.T) {
	bad := filepath.Join(t.TempDir(), "bad.yaml")
	if err := os.WriteFile(bad, []byte("name: x\nhorizon: 1d\nclicks_per_hour: 5\nflavour: mint\narms: []\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name string
		args []string
		want string
	}{
		{"no scenario", nil, `"scenario" not set`},
		{"missing file", []string{"--scenario", "nope.yaml"}, "--scenario"},
		{"unknown key", []string{"--scenario", bad}, "field flavour not found"},
		{"policy", []string{"--scenario", smallScenario, "--policies", "greedy"}, "unknown allocation policy"},
		{"format", []string{"--scenario", smallScenario, "--format", "xml"}, "--format"},
		{"runs", []string{"--scenario", smallScenario, "--runs", "-1"}, "--runs"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, _, err := runSimulateCmd(t, tc.args...)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("error %v, want %q", err, tc.want)
			}
		})
	}
}
