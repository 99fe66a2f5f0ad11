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
	otherDir := twoScenarioDir(t)
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
		{"policy", []string{"--scenario", smallScenario, "--policies", "greedy"}, "unknown policy"},
		{"report with two scenarios", []string{"--scenario", smallScenario, "--scenario", otherDir, "--report", t.TempDir()}, "exactly one scenario"},
		{"duplicate name", []string{"--scenario", smallScenario, "--scenario", smallScenario}, "already used"},
		{"empty directory", []string{"--scenario", t.TempDir()}, "no *.yaml"},
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

// twoScenarioDir writes two small scenarios (renamed copies of the golden
// one, one with a slower arm) into a new directory.
func twoScenarioDir(t *testing.T) string {
	t.Helper()
	src, err := os.ReadFile(smallScenario)
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	a := strings.Replace(string(src), "name: ferngully-pottery-photos", "name: pottery-a", 1)
	b := strings.Replace(strings.Replace(string(src), "name: ferngully-pottery-photos", "name: pottery-b", 1), "mean: 6h", "mean: 30h", 1)
	for name, doc := range map[string]string{"a.yaml": a, "b.yaml": b, "notes.txt": "not a scenario"} {
		if err := os.WriteFile(filepath.Join(dir, name), []byte(doc), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	return dir
}

// TestSimulateBattery: a directory runs every *.yaml in it, in name order;
// the JSON document holds one summary per scenario and the settles pooled
// per policy (their sums), and the table has a row per scenario and policy
// and a pooled line per policy.
func TestSimulateBattery(t *testing.T) {
	dir := twoScenarioDir(t)
	args := []string{"--scenario", dir, "--runs", "2", "--policies", "thompson-observed,delay-oracle"}
	out, errOut, err := runSimulateCmd(t, append(args, "--format", "json")...)
	if err != nil {
		t.Fatal(err)
	}
	var doc struct {
		Scenarios []struct {
			Scenario string `json:"scenario"`
			Runs     int    `json:"runs"`
			Policies []struct {
				Policy        string   `json:"policy"`
				RegretRatio   *float64 `json:"regret_ratio"`
				RatioOracle   *float64 `json:"regret_ratio_oracle"`
				SettledRuns   int      `json:"settled_runs"`
				SettledWrong  int      `json:"settled_wrong"`
				SettleFlipRun *int     `json:"settle_flip_runs"`
				CVRErrorAt    []struct {
					TargetHours float64  `json:"target_hours"`
					Hours       *float64 `json:"hours"`
				} `json:"cvr_error_at"`
			} `json:"policies"`
		} `json:"scenarios"`
		Pooled []struct {
			Policy  string `json:"policy"`
			Settled int    `json:"settled_runs"`
			Wrong   int    `json:"settled_wrong"`
			Runs    int    `json:"runs"`
		} `json:"pooled"`
	}
	if err := json.Unmarshal([]byte(out), &doc); err != nil {
		t.Fatal(err)
	}
	if len(doc.Scenarios) != 2 || doc.Scenarios[0].Scenario != "pottery-a" || doc.Scenarios[1].Scenario != "pottery-b" {
		t.Fatalf("scenarios %+v", doc.Scenarios)
	}
	settled := map[string]int{}
	wrong := map[string]int{}
	for _, sc := range doc.Scenarios {
		if sc.Runs != 2 || len(sc.Policies) != 2 {
			t.Fatalf("%s: runs %d, %d policies", sc.Scenario, sc.Runs, len(sc.Policies))
		}
		for _, p := range sc.Policies {
			settled[p.Policy] += p.SettledRuns
			wrong[p.Policy] += p.SettledWrong
			if p.RegretRatio == nil || p.SettleFlipRun == nil || len(p.CVRErrorAt) != 3 {
				t.Fatalf("%s/%s: missing fields", sc.Scenario, p.Policy)
			}
			// The 2-day horizon has updates at 12, 24, 36 and 48 hours.
			for _, e := range p.CVRErrorAt {
				if e.Hours == nil || *e.Hours != e.TargetHours {
					t.Fatalf("%s/%s: error at %vh taken at %v", sc.Scenario, p.Policy, e.TargetHours, e.Hours)
				}
			}
		}
		if r := *sc.Policies[0].RegretRatio; r != 1 {
			t.Fatalf("reference's own ratio %v", r)
		}
		if o := sc.Policies[1].RatioOracle; o == nil || *o != 1 || sc.Policies[0].RatioOracle == nil {
			t.Fatalf("ratios to the oracle %v, %v", sc.Policies[0].RatioOracle, o)
		}
	}
	if len(doc.Pooled) != 2 {
		t.Fatalf("pooled %+v", doc.Pooled)
	}
	for _, p := range doc.Pooled {
		if p.Settled != settled[p.Policy] || p.Wrong != wrong[p.Policy] || p.Runs != 4 {
			t.Fatalf("pooled %+v, sums settled %d wrong %d", p, settled[p.Policy], wrong[p.Policy])
		}
	}
	for _, want := range []string{"pottery-a: 2 policies x 2 runs", "pottery-b: 2 policies x 2 runs", "2 scenarios in"} {
		if !strings.Contains(errOut, want) {
			t.Errorf("stderr lacks %q:\n%s", want, errOut)
		}
	}

	table, _, err := runSimulateCmd(t, args...)
	if err != nil {
		t.Fatal(err)
	}
	rows := 0
	for _, line := range strings.Split(table, "\n") {
		f := strings.Fields(line)
		if len(f) > 2 && strings.HasPrefix(f[0], "pottery-") && (f[1] == "thompson-observed" || f[1] == "delay-oracle") {
			rows++
		}
	}
	if rows != 4 {
		t.Errorf("%d scenario-policy rows, want 4:\n%s", rows, table)
	}
	if !strings.Contains(table, "settles pooled over 2 scenario(s)") || !strings.Contains(table, "95% upper") {
		t.Errorf("no pooled lines:\n%s", table)
	}
}
