package console

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io/fs"
	"maps"
	"math"
	"net/http"
	"net/url"
	"slices"
	"strings"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/zap"

	"ripen/console/report"
	"ripen/consumer"
	"ripen/state"
)

// Source is what the console reads from the running service;
// *consumer.Service implements it.
type Source interface {
	// Ready returns nil when the service can do its work, else why not.
	Ready(ctx context.Context) error
	// Store is the state store in use.
	Store() *state.Store
	// Settings are an experiment's settings in force.
	Settings(experiment string) consumer.ExperimentSettings
	// Watermark is the group's event-time watermark (Unix ms), if known.
	Watermark() (int64, bool)
}

// Options configure the console handler.
type Options struct {
	// Source is the running service. Required.
	Source Source
	// Metrics is the registry /metrics exposes; the service page shows
	// its numbers. Required.
	Metrics prometheus.Gatherer
	// Logger receives errors. Default: none.
	Logger *zap.Logger
	// Refresh is how often an open page updates itself. Default: 5s.
	Refresh time.Duration
}

// DefaultRefresh is the default of Options.Refresh.
const DefaultRefresh = 5 * time.Second

// requestTimeout bounds the reads of one request.
const requestTimeout = 10 * time.Second

// ContentSecurityPolicy is sent with every console response: scripts,
// styles and data from the console's own address only, no frames, no
// forms, no plugins.
const ContentSecurityPolicy = "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; " +
	"base-uri 'none'; form-action 'none'; frame-ancestors 'none'"

// Paths of the console.
const (
	pathList       = "/"
	pathExperiment = "/experiment"
	pathService    = "/service"
	apiList        = "/console/api/experiments"
	apiExperiment  = "/console/api/experiment"
	apiService     = "/console/api/service"
	pathJSONL      = "/console/history.jsonl"
	pathCSV        = "/console/history.csv"
)

// NewHandler returns the read-only web console: the experiments list at
// /, one experiment at /experiment?id=ID, the service at /service, their
// data as JSON under /console/api/, an experiment's allocation history as
// JSON Lines and CSV, and the page assets under /assets/. Only GET and
// HEAD are served; every response carries ContentSecurityPolicy.
func NewHandler(o Options) (http.Handler, error) {
	if o.Source == nil || o.Metrics == nil {
		return nil, errors.New("console: a source and a metrics registry are required")
	}
	if o.Logger == nil {
		o.Logger = zap.NewNop()
	}
	if o.Refresh <= 0 {
		o.Refresh = DefaultRefresh
	}
	c := &server{o: o, cache: map[string]cachedPage{}}
	mux := http.NewServeMux()
	mux.HandleFunc("GET /{$}", c.shell("Experiments", apiList))
	mux.HandleFunc("GET "+pathExperiment, c.shell("Experiment", apiExperiment))
	mux.HandleFunc("GET "+pathService, c.shell("Service", apiService))
	mux.HandleFunc("GET "+apiList, c.api(c.listPage))
	mux.HandleFunc("GET "+apiExperiment, c.api(c.experimentPage))
	mux.HandleFunc("GET "+apiService, c.api(c.servicePage))
	mux.HandleFunc("GET "+pathJSONL, c.download("jsonl"))
	mux.HandleFunc("GET "+pathCSV, c.download("csv"))
	sub, err := fs.Sub(report.Assets(), "assets")
	if err != nil {
		return nil, fmt.Errorf("console: %w", err)
	}
	mux.Handle("GET /assets/", http.StripPrefix("/assets/", http.FileServerFS(sub)))
	return securityHeaders(mux), nil
}

// securityHeaders sets the console's headers on every response and
// refuses every method but GET and HEAD.
func securityHeaders(h http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		hd := w.Header()
		hd.Set("Content-Security-Policy", ContentSecurityPolicy)
		hd.Set("X-Content-Type-Options", "nosniff")
		hd.Set("X-Frame-Options", "DENY")
		hd.Set("Referrer-Policy", "no-referrer")
		hd.Set("Cross-Origin-Opener-Policy", "same-origin")
		if r.Method != http.MethodGet && r.Method != http.MethodHead {
			hd.Set("Allow", "GET, HEAD")
			http.Error(w, "the console only reads", http.StatusMethodNotAllowed)
			return
		}
		h.ServeHTTP(w, r)
	})
}

type server struct {
	o     Options
	mu    sync.Mutex
	cache map[string]cachedPage
}

// cachedPage is an experiment page built for one published allocation
// (its seq) and stored watermark.
type cachedPage struct {
	seq, watermark int64
	page           report.Page
}

var nav = []report.Link{{Text: "Experiments", Href: pathList}, {Text: "Service", Href: pathService}}

func (c *server) shell(title, api string) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		var buf bytes.Buffer
		s := report.Shell{Title: title, Nav: nav, DataURL: api, RefreshSeconds: int(c.o.Refresh / time.Second)}
		if err := report.WriteShell(&buf, s); err != nil {
			c.fail(w, r, err)
			return
		}
		w.Header().Set("Content-Type", "text/html; charset=utf-8")
		w.Header().Set("Cache-Control", "no-store")
		_, _ = w.Write(buf.Bytes())
	}
}

// errNotFound answers 404 with its text.
type errNotFound struct{ msg string }

func (e errNotFound) Error() string { return e.msg }

func (c *server) api(build func(context.Context, *http.Request) (report.Page, error)) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		ctx, cancel := context.WithTimeout(r.Context(), requestTimeout)
		defer cancel()
		p, err := build(ctx, r)
		if err != nil {
			c.fail(w, r, err)
			return
		}
		b, err := report.MarshalPage(p)
		if err != nil {
			c.fail(w, r, err)
			return
		}
		w.Header().Set("Content-Type", "application/json")
		w.Header().Set("Cache-Control", "no-store")
		_, _ = w.Write(b)
	}
}

// fail logs err and answers without its detail (which may name internal
// addresses), except for a not-found, whose text is the reader's.
func (c *server) fail(w http.ResponseWriter, r *http.Request, err error) {
	var nf errNotFound
	if errors.As(err, &nf) {
		http.Error(w, nf.msg, http.StatusNotFound)
		return
	}
	c.o.Logger.Error("console request failed", zap.String("path", r.URL.Path), zap.Error(err))
	http.Error(w, "internal error", http.StatusInternalServerError)
}

// experimentHref is the console address of an experiment's page.
func experimentHref(id string) string { return pathExperiment + "?id=" + url.QueryEscape(id) }

// listPage is the experiments list: one row per experiment with a
// published allocation or stored state, most recent activity first.
func (c *server) listPage(ctx context.Context, _ *http.Request) (report.Page, error) {
	store := c.o.Source.Store()
	ids, err := store.Experiments(ctx)
	if err != nil {
		return report.Page{}, err
	}
	wm, haveWM := c.o.Source.Watermark()
	type row struct {
		id    string
		asOf  int64
		cells []string
	}
	var rows []row
	for _, id := range ids {
		_, body, err := store.LatestAllocation(ctx, id)
		if errors.Is(err, state.ErrNotFound) {
			rows = append(rows, row{id: id, asOf: -1, cells: []string{id, "no allocation yet", "–", "–", "–", "–", "–", "–", ""}})
			continue
		}
		if err != nil {
			return report.Page{}, err
		}
		a, err := ParseAllocation(body)
		if err != nil {
			rows = append(rows, row{id: id, asOf: -1, cells: []string{id, "unreadable allocation", "–", "–", "–", "–", "–", "–", ""}})
			continue
		}
		var clicks, convs uint64
		for _, r := range a.Arms {
			clicks += r.Clicks
			convs += r.Conversions
		}
		leader := "–"
		if r := a.arm(a.Leader); r != nil {
			leader = fmt.Sprintf("%s (%.2f)", a.Leader, r.PBest)
		}
		at := a.asOfMillis()
		age := "–"
		if haveWM {
			age = fmtAge(wm - at)
		}
		why := ""
		if !a.Settle.Settled {
			why = a.Settle.Reason
		}
		rows = append(rows, row{id: id, asOf: at, cells: []string{id, string(a.Status), leader, fmt.Sprint(len(a.Arms)),
			fmt.Sprint(clicks), fmt.Sprint(convs), a.AsOf, age, why}})
	}
	slices.SortStableFunc(rows, func(a, b row) int {
		if a.asOf != b.asOf {
			if a.asOf > b.asOf {
				return -1
			}
			return 1
		}
		return strings.Compare(a.id, b.id)
	})
	t := report.Table{ID: "experiments", Header: []string{"experiment", "status", "leader (P(best))", "arms", "clicks", "conversions",
		"latest allocation", "age", "why not settled yet"}, Filter: "status",
		Empty: "No experiment yet: the service lists an experiment once its first click is stored."}
	for _, r := range rows {
		t.Rows = append(t.Rows, r.cells)
		t.Links = append(t.Links, experimentHref(r.id))
	}
	p := report.Page{Title: "Experiments", Tables: []report.Table{t}}
	note := "Most recent allocation first. Age: how far the latest allocation is behind the service's event-time watermark."
	if haveWM {
		note += " Watermark " + fmtMillis(wm) + "."
	}
	p.Paragraphs = []string{note}
	return p, nil
}

// fmtAge prints an event-time age.
func fmtAge(ms int64) string {
	if ms < 0 {
		ms = 0
	}
	return fmtHours(float64(ms) / 3.6e6)
}

// experimentPage is one experiment's page, rebuilt when a new allocation
// is published or the stored state moves; the settings are read afresh.
func (c *server) experimentPage(ctx context.Context, r *http.Request) (report.Page, error) {
	id := r.URL.Query().Get("id")
	if id == "" {
		return report.Page{}, errNotFound{"no experiment given (?id=)"}
	}
	store := c.o.Source.Store()
	seq, err := store.AllocationSeq(ctx, id)
	if err != nil && !errors.Is(err, state.ErrNotFound) {
		return report.Page{}, err
	}
	ex, err := store.Load(ctx, id)
	var notes []string
	switch {
	case errors.Is(err, state.ErrNotFound):
		ex = nil
	case err != nil && state.IsRetriable(err):
		return report.Page{}, err
	case err != nil:
		c.o.Logger.Warn("console: arm states unreadable", zap.String("experiment", id), zap.Error(err))
		ex, notes = nil, []string{"The stored arm states could not be read (see the service's log); the delay charts are left out."}
	}
	var wm int64
	if ex != nil {
		wm = ex.Watermark
	}
	c.mu.Lock()
	cached, ok := c.cache[id]
	c.mu.Unlock()
	if !ok || cached.seq != seq || cached.watermark != wm {
		raw, err := store.History(ctx, id)
		if err != nil {
			return report.Page{}, err
		}
		if len(raw) == 0 && ex == nil {
			return report.Page{}, errNotFound{fmt.Sprintf("experiment %q not found", id)}
		}
		hist, err := ParseAllocations(raw)
		if err != nil {
			return report.Page{}, err
		}
		page, err := ExperimentPage(View{ID: id, History: hist, State: ex, Notes: notes, Links: []report.Link{
			{Text: "Allocation history (JSON Lines)", Href: pathJSONL + "?id=" + url.QueryEscape(id)},
			{Text: "Allocation history (CSV)", Href: pathCSV + "?id=" + url.QueryEscape(id)},
		}})
		if err != nil {
			return report.Page{}, err
		}
		cached = cachedPage{seq: seq, watermark: wm, page: page}
		c.mu.Lock()
		if len(c.cache) > 64 {
			clear(c.cache)
		}
		c.cache[id] = cached
		c.mu.Unlock()
	}
	page := cached.page
	page.After = []report.Table{settingsTable(c.o.Source.Settings(id))}
	return page, nil
}

// servicePage shows the service: readiness, Redis, the watermark, consumer
// lag per partition and dead letters by reason, read from the registry
// /metrics exposes.
func (c *server) servicePage(ctx context.Context, _ *http.Request) (report.Page, error) {
	m, err := consumer.ReadMetrics(c.o.Metrics)
	if err != nil {
		return report.Page{}, err
	}
	ready, tone := "ready", "good"
	if err := c.o.Source.Ready(ctx); err != nil {
		ready, tone = "not ready: "+err.Error(), "bad"
	}
	redisUp, redisTone := "up", "good"
	if m.RedisUp != 1 {
		redisUp, redisTone = "down", "bad"
	}
	wm := "not yet"
	if !math.IsNaN(m.Watermark) {
		wm = fmtMillis(int64(m.Watermark * 1000))
	}
	p := report.Page{Title: "Service", Facts: []report.Fact{
		{Label: "readiness", Value: ready, Tone: tone},
		{Label: "Redis", Value: redisUp, Tone: redisTone},
		{Label: "watermark", Value: wm},
		{Label: "experiments", Value: fmt.Sprint(m.Experiments)},
		{Label: "allocations published", Value: fmt.Sprint(m.AllocationsPublished)},
		{Label: "dead letters written", Value: fmt.Sprint(m.DeadLetters)},
	}, Paragraphs: []string{"Counts since this instance started, read from the same registry as /metrics. Lag: messages between a partition's end and the group's committed offset."}}

	consumed := report.Table{ID: "consumed", Caption: "Events read", Header: []string{"topic", "events"}, Empty: "Nothing read yet."}
	for _, t := range slices.Sorted(maps.Keys(m.Consumed)) {
		consumed.Rows = append(consumed.Rows, []string{t, fmt.Sprint(m.Consumed[t])})
	}
	lag := report.Table{ID: "partitions", Caption: "Partitions", Header: []string{"partition", "lag (messages)"}, Empty: "No partition assigned to this instance yet."}
	for _, l := range m.Lag {
		lag.Rows = append(lag.Rows, []string{fmt.Sprintf("%s/%d", l.Topic, l.Partition), fmt.Sprint(l.Lag)})
	}
	dead := report.Table{ID: "deadletters", Caption: "Rejected events by reason (each sent to the dead-letter topic)", Header: []string{"reason", "events"},
		Empty: "No event rejected since the service started."}
	reasons := slices.Sorted(maps.Keys(m.Rejected))
	slices.SortStableFunc(reasons, func(a, b string) int {
		switch x, y := m.Rejected[a], m.Rejected[b]; {
		case x > y:
			return -1
		case x < y:
			return 1
		}
		return 0
	})
	for _, reason := range reasons {
		if n := m.Rejected[reason]; n > 0 {
			dead.Rows = append(dead.Rows, []string{reason, fmt.Sprint(n)})
		}
	}
	p.Tables = []report.Table{lag, dead, consumed}
	return p, nil
}

// download serves an experiment's allocation history as JSON Lines (the
// messages as published) or CSV (one row per arm and allocation).
func (c *server) download(format string) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		id := r.URL.Query().Get("id")
		ctx, cancel := context.WithTimeout(r.Context(), requestTimeout)
		defer cancel()
		if id == "" {
			http.Error(w, "no experiment given (?id=)", http.StatusNotFound)
			return
		}
		raw, err := c.o.Source.Store().History(ctx, id)
		if err != nil {
			c.fail(w, r, err)
			return
		}
		var buf bytes.Buffer
		ctype := "application/x-ndjson"
		if format == "csv" {
			ctype = "text/csv; charset=utf-8"
			hist, err := ParseAllocations(raw)
			if err == nil {
				err = WriteHistoryCSV(&buf, hist)
			}
			if err != nil {
				c.fail(w, r, err)
				return
			}
		} else {
			WriteHistoryJSONL(&buf, raw)
		}
		w.Header().Set("Content-Type", ctype)
		w.Header().Set("Cache-Control", "no-store")
		w.Header().Set("Content-Disposition", fmt.Sprintf(`attachment; filename="%s-allocations.%s"`, fileSafe(id), format))
		_, _ = w.Write(buf.Bytes())
	}
}

// fileSafe keeps letters, digits, '.', '-' and '_' of s for a file name.
func fileSafe(s string) string {
	out := strings.Map(func(r rune) rune {
		if r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '.' || r == '-' || r == '_' {
			return r
		}
		return '_'
	}, s)
	if len(out) > 80 {
		out = out[:80]
	}
	return out
}
