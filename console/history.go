package console

import (
	"bytes"
	"encoding/csv"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"ripen/console/report"
	"ripen/estimator/sim"
)

// WriteHistoryJSONL writes allocation messages one per line, as stored.
func WriteHistoryJSONL(w *bytes.Buffer, raw [][]byte) {
	for _, m := range raw {
		w.Write(bytes.TrimSpace(m))
		w.WriteByte('\n')
	}
}

// historyCSVHeader names the columns of WriteHistoryCSV.
var historyCSVHeader = []string{"seq", "as_of", "status", "policy", "leader", "arm", "weight", "clicks", "conversions",
	"observed_cvr", "eventual_cvr", "cvr_low", "cvr_high", "p_best", "expected_loss", "delay_family", "mean_delay_hours",
	"settled", "settle_reason"}

// WriteHistoryCSV writes one row per arm of every allocation. Text that a
// spreadsheet would read as a formula (starting with =, +, -, @, tab or
// carriage return) is prefixed with a quote, since names come from event
// producers (OWASP, "CSV Injection").
func WriteHistoryCSV(w io.Writer, hist []Allocation) error {
	cw := csv.NewWriter(w)
	if err := cw.Write(historyCSVHeader); err != nil {
		return fmt.Errorf("history csv: %w", err)
	}
	num := func(x float64) string { return strconv.FormatFloat(x, 'g', 8, 64) }
	for _, a := range hist {
		settled, reason := strconv.FormatBool(a.Settle.Settled), a.Settle.Reason
		for _, r := range a.Arms {
			row := []string{strconv.FormatInt(a.Seq, 10), a.AsOf, string(a.Status), a.Policy, cell(a.Leader), cell(r.Arm),
				num(a.Weights[r.Arm]), strconv.FormatUint(r.Clicks, 10), strconv.FormatUint(r.Conversions, 10),
				num(r.ObservedCVR), num(r.EventualCVR), num(r.CVRLow), num(r.CVRHigh), num(r.PBest), num(r.ExpectedLoss),
				r.Delay.Family, num(r.Delay.MeanHours), settled, cell(reason)}
			if err := cw.Write(row); err != nil {
				return fmt.Errorf("history csv: %w", err)
			}
		}
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return fmt.Errorf("history csv: %w", err)
	}
	return nil
}

// cell defuses text a spreadsheet would evaluate.
func cell(s string) string {
	if s != "" && strings.ContainsRune("=+-@\t\r", rune(s[0])) {
		return "'" + s
	}
	return s
}

// WriteExperimentReport writes an experiment's page to dir/index.html
// (self-contained), and its allocation history, raw as read, to
// dir/allocations.jsonl and as CSV to dir/allocations.csv.
func WriteExperimentReport(dir string, v View, raw [][]byte) error {
	if v.Links == nil {
		v.Links = []report.Link{{Text: "Allocation history (JSON Lines)", Href: "./allocations.jsonl"}, {Text: "Allocation history (CSV)", Href: "./allocations.csv"}}
	}
	page, err := ExperimentPage(v)
	if err != nil {
		return err
	}
	if err := report.WriteDir(dir, page); err != nil {
		return err
	}
	var jl bytes.Buffer
	WriteHistoryJSONL(&jl, raw)
	var cv bytes.Buffer
	if err := WriteHistoryCSV(&cv, v.History); err != nil {
		return err
	}
	for name, b := range map[string][]byte{"allocations.jsonl": jl.Bytes(), "allocations.csv": cv.Bytes()} {
		if err := os.WriteFile(filepath.Join(dir, name), b, 0o644); err != nil {
			return fmt.Errorf("report: %w", err)
		}
	}
	return nil
}

// ScenarioTruth is the truth of a simulated scenario, for its report.
func ScenarioTruth(sc sim.Scenario) (*Truth, error) {
	truth := &Truth{
		CVR: func(at int64) map[string]float64 {
			q := sc.CVRAt(time.Duration(at-sim.Start) * time.Millisecond)
			m := make(map[string]float64, len(q))
			for i, a := range sc.Arms {
				m[a.Name] = q[i]
			}
			return m
		},
		DelayCDF: map[string]func(float64) float64{},
	}
	for _, a := range sc.Arms {
		d, err := a.Delay.Distribution()
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", a.Name, err)
		}
		t, err := sim.NewTruncated(d, sc.Window.D().Seconds())
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", a.Name, err)
		}
		truth.DelayCDF[a.Name] = t.CDF
	}
	return truth, nil
}
