package console

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"net/url"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/zap/zaptest"

	"ripen/console/report"
	"ripen/consumer"
	"ripen/estimator"
	"ripen/state"
	"ripen/state/redistest"
)

// storeSource serves the console from a real store; the service's other
// answers are fixed.
type storeSource struct {
	store *state.Store
	cfg   consumer.Config
	wm    int64
}

func (s *storeSource) Ready(context.Context) error {
	return errors.New("not in the consumer group yet")
}
func (s *storeSource) Store() *state.Store      { return s.store }
func (s *storeSource) Watermark() (int64, bool) { return s.wm, s.wm != 0 }
func (s *storeSource) Settings(id string) consumer.ExperimentSettings {
	return s.cfg.SettingsFor(id)
}

// publish stores an allocation as the service does: latest and history.
func publish(t *testing.T, store *state.Store, id string, asOf time.Time, leader string, settle string) {
	t.Helper()
	ctx := context.Background()
	rep := estimator.ExperimentReport{Experiment: id, AsOf: asOf.UTC().Format(time.RFC3339), Status: estimator.StatusAdapting, Policy: "thompson-bayes", Leader: leader,
		Weights: map[string]float64{leader: 0.7, "=cmd|' /C calc'!A0": 0.3},
		Arms: []estimator.ArmReport{
			{Arm: leader, Clicks: 100, Conversions: 9, PBest: 0.9, Weight: 0.7, EventualCVR: 0.1, Delay: estimator.Delay{Family: "exponential"}},
			{Arm: "=cmd|' /C calc'!A0", Clicks: 80, Conversions: 4, PBest: 0.1, Weight: 0.3, EventualCVR: 0.05, Delay: estimator.Delay{Family: "exponential"}},
		},
		Settle: estimator.SettleReport{Reason: settle}}
	body, err := json.Marshal(rep)
	if err != nil {
		t.Fatal(err)
	}
	seq, err := store.SaveAllocation(ctx, id, body)
	if err != nil {
		t.Fatal(err)
	}
	msg := append([]byte(fmt.Sprintf(`{"seq":%d,`, seq)), body[1:]...)
	if err := store.AppendHistory(ctx, id, msg); err != nil {
		t.Fatal(err)
	}
}

func newTestConsole(t *testing.T) (*storeSource, *consumer.Metrics, http.Handler) {
	t.Helper()
	srv := redistest.Start(t)
	store, err := state.New(srv.Client(), state.Options{Prefix: "ct"})
	if err != nil {
		t.Fatal(err)
	}
	reg := prometheus.NewRegistry()
	m := consumer.NewMetrics(reg)
	cfg := consumer.Config{}.WithDefaults()
	cfg, err = cfg.ApplyControl([]byte("rosehip-banner"), []byte(`{"floor":0.05}`))
	if err != nil {
		t.Fatal(err)
	}
	src := &storeSource{store: store, cfg: cfg, wm: time.Date(2026, 5, 2, 3, 0, 0, 0, time.UTC).UnixMilli()}
	h, err := NewHandler(Options{Source: src, Metrics: reg, Logger: zaptest.NewLogger(t)})
	if err != nil {
		t.Fatal(err)
	}
	return src, m, h
}

func get(t *testing.T, h http.Handler, method, path string) *httptest.ResponseRecorder {
	t.Helper()
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, httptest.NewRequest(method, path, nil))
	return rec
}

func getPage(t *testing.T, h http.Handler, path string) report.Page {
	t.Helper()
	rec := get(t, h, http.MethodGet, path)
	if rec.Code != http.StatusOK {
		t.Fatalf("%s: %d %s", path, rec.Code, rec.Body.String())
	}
	var p report.Page
	if err := json.Unmarshal(rec.Body.Bytes(), &p); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	return p
}

// TestConsoleHandler covers the console's pages, data and downloads
// against a real store (the page script itself runs in
// TestConsoleInBrowser).
func TestConsoleHandler(t *testing.T) {
	src, m, h := newTestConsole(t)
	t0 := time.Date(2026, 5, 2, 0, 0, 0, 0, time.UTC)
	publish(t, src.store, "rosehip-banner", t0, "petal-red", "petal-red leads with P(best) 0.90, below 0.95")
	publish(t, src.store, "rosehip-banner", t0.Add(time.Hour), "petal-red", "petal-red leads with P(best) 0.90, below 0.95")
	publish(t, src.store, "fern & moss/hero", t0.Add(2*time.Hour), "moss-green", "")

	t.Run("headers and methods", func(t *testing.T) {
		for _, path := range []string{"/", "/experiment?id=x", "/service", "/assets/ripen.js", "/assets/uplot/uPlot.iife.min.js", apiList} {
			rec := get(t, h, http.MethodGet, path)
			if rec.Code != http.StatusOK {
				t.Errorf("%s: %d", path, rec.Code)
			}
			if rec.Header().Get("Content-Security-Policy") != ContentSecurityPolicy || rec.Header().Get("X-Content-Type-Options") != "nosniff" {
				t.Errorf("%s: headers %v", path, rec.Header())
			}
		}
		for _, method := range []string{http.MethodPost, http.MethodPut, http.MethodDelete} {
			if rec := get(t, h, method, "/"); rec.Code != http.StatusMethodNotAllowed {
				t.Errorf("%s /: %d, want 405", method, rec.Code)
			}
		}
		if rec := get(t, h, http.MethodGet, "/nowhere"); rec.Code != http.StatusNotFound {
			t.Errorf("/nowhere: %d", rec.Code)
		}
	})

	t.Run("list", func(t *testing.T) {
		p := getPage(t, h, apiList)
		tab := p.Tables[0]
		if len(tab.Rows) != 2 || tab.Rows[0][0] != "fern & moss/hero" || tab.Rows[1][0] != "rosehip-banner" {
			t.Fatalf("rows %v: want the most recent allocation first", tab.Rows)
		}
		if tab.Links[0] != "/experiment?id="+url.QueryEscape("fern & moss/hero") || tab.Filter != "status" {
			t.Errorf("links %v, filter %q", tab.Links, tab.Filter)
		}
		if r := tab.Rows[1]; r[1] != "adapting" || r[2] != "petal-red (0.90)" || r[4] != "180" || r[7] != "2.0 h" || !strings.Contains(r[8], "below 0.95") {
			t.Errorf("row %q", r)
		}
	})

	t.Run("experiment", func(t *testing.T) {
		p := getPage(t, h, apiExperiment+"?id=rosehip-banner")
		if len(p.Charts) < 3 || len(p.After) != 1 || len(p.Links) != 2 {
			t.Fatalf("page has %d charts, %d tables after, %d links", len(p.Charts), len(p.After), len(p.Links))
		}
		var floor []string
		for _, r := range p.After[0].Rows {
			if r[0] == "floor" {
				floor = r
			}
		}
		if len(floor) != 3 || floor[1] != "0.05" || floor[2] != consumer.SourceControl {
			t.Errorf("floor row %v: want the control topic's override", floor)
		}
		if rec := get(t, h, http.MethodGet, apiExperiment+"?id=nothing-here"); rec.Code != http.StatusNotFound {
			t.Errorf("unknown experiment: %d", rec.Code)
		}
	})

	t.Run("downloads", func(t *testing.T) {
		rec := get(t, h, http.MethodGet, pathJSONL+"?id="+url.QueryEscape("fern & moss/hero"))
		if rec.Code != http.StatusOK || strings.Count(rec.Body.String(), "\n") != 1 || !strings.HasPrefix(rec.Body.String(), `{"seq":1,`) {
			t.Errorf("jsonl %d %q", rec.Code, rec.Body.String())
		}
		if cd := rec.Header().Get("Content-Disposition"); cd != `attachment; filename="fern___moss_hero-allocations.jsonl"` {
			t.Errorf("content disposition %q", cd)
		}
		rec = get(t, h, http.MethodGet, pathCSV+"?id=rosehip-banner")
		body, _ := io.ReadAll(rec.Body)
		lines := strings.Split(strings.TrimSpace(string(body)), "\n")
		if len(lines) != 1+2*2 || !strings.HasPrefix(lines[0], "seq,as_of,status") {
			t.Fatalf("csv %q", body)
		}
		// A name a spreadsheet would run as a formula is quoted.
		if !strings.Contains(lines[2], `,'=cmd|' /C calc'!A0,`) {
			t.Errorf("csv row %q: formula not defused", lines[2])
		}
	})

	t.Run("service", func(t *testing.T) {
		m.ConsumerLag.WithLabelValues("clicks", "0").Set(12)
		m.EventsRejected.WithLabelValues(string(consumer.ReasonUnknownClick)).Add(4)
		m.RedisUp.Set(1)
		p := getPage(t, h, apiService)
		facts := map[string]string{}
		for _, f := range p.Facts {
			facts[f.Label] = f.Value
		}
		if facts["Redis"] != "up" || !strings.HasPrefix(facts["readiness"], "not ready") {
			t.Errorf("facts %v", facts)
		}
		tables := map[string]report.Table{}
		for _, tab := range p.Tables {
			tables[tab.ID] = tab
		}
		if r := tables["partitions"].Rows; len(r) != 1 || r[0][0] != "clicks/0" || r[0][1] != "12" {
			t.Errorf("partitions %v", r)
		}
		if r := tables["deadletters"].Rows; len(r) != 1 || r[0][0] != "unknown_click" || r[0][1] != "4" {
			t.Errorf("dead letters %v", r)
		}
	})
}
