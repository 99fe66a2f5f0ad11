package consumer

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"go/ast"
	"go/parser"
	"go/token"
	"io"
	"net"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"
	"go.uber.org/zap/zaptest/observer"
)

// fakeStatus is an in-memory StatusSource.
type fakeStatus struct {
	mu       sync.Mutex
	notReady error
	listErr  error
	allocErr error
	allocs   map[string][]byte
	asked    []string // experiments passed to LatestAllocation
}

func (f *fakeStatus) Ready(ctx context.Context) error {
	f.mu.Lock()
	defer f.mu.Unlock()
	return f.notReady
}

func (f *fakeStatus) Experiments(ctx context.Context) ([]string, error) {
	f.mu.Lock()
	defer f.mu.Unlock()
	if f.listErr != nil {
		return nil, f.listErr
	}
	var ids []string
	for id := range f.allocs {
		ids = append(ids, id)
	}
	return ids, nil
}

func (f *fakeStatus) LatestAllocation(ctx context.Context, experiment string) ([]byte, bool, error) {
	f.mu.Lock()
	defer f.mu.Unlock()
	f.asked = append(f.asked, experiment)
	if f.allocErr != nil {
		return nil, false, f.allocErr
	}
	b, ok := f.allocs[experiment]
	return b, ok, nil
}

func get(t *testing.T, h http.Handler, method, target string) (int, http.Header, string) {
	t.Helper()
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, httptest.NewRequest(method, target, nil))
	return rec.Code, rec.Header(), rec.Body.String()
}

// TestHTTPEndpoints checks status codes, bodies and content types of every
// route against an in-memory status source.
func TestHTTPEndpoints(t *testing.T) {
	alloc := []byte(`{"experiment":"copper-pan-photos","weights":{"studio":0.7,"kitchen":0.3}}`)
	for _, tc := range []struct {
		name     string
		src      *fakeStatus
		method   string
		path     string
		code     int
		body     string // substring
		ctype    string // prefix
		logged   string // substring of an error log entry, "" = none expected
		askedFor string
	}{
		{name: "livez", src: &fakeStatus{notReady: errors.New("x")}, method: "GET", path: "/livez", code: 200, body: "ok", ctype: "text/plain"},
		{name: "readyz ok", src: &fakeStatus{}, method: "GET", path: "/readyz", code: 200, body: "ok"},
		{name: "readyz not ready", src: &fakeStatus{notReady: errors.New("no partitions assigned yet")}, method: "GET", path: "/readyz", code: 503, body: "not ready: no partitions assigned yet"},
		{name: "list", src: &fakeStatus{allocs: map[string][]byte{"b-exp": nil, "a-exp": nil, "c-exp": nil}}, method: "GET", path: "/v1/experiments", code: 200, body: `["a-exp","b-exp","c-exp"]`, ctype: "application/json"},
		{name: "empty list", src: &fakeStatus{}, method: "GET", path: "/v1/experiments", code: 200, body: `[]`, ctype: "application/json"},
		{name: "list error", src: &fakeStatus{listErr: errors.New("redis: connection refused 10.0.0.7:6379")}, method: "GET", path: "/v1/experiments", code: 500, body: "internal error", logged: "connection refused"},
		{name: "allocation", src: &fakeStatus{allocs: map[string][]byte{"copper-pan-photos": alloc}}, method: "GET", path: "/v1/experiments/copper-pan-photos", code: 200, body: string(alloc), ctype: "application/json", askedFor: "copper-pan-photos"},
		{name: "escaped id", src: &fakeStatus{allocs: map[string][]byte{"pans/2025 q1": alloc}}, method: "GET", path: "/v1/experiments/pans%2F2025%20q1", code: 200, body: string(alloc), askedFor: "pans/2025 q1"},
		{name: "unknown experiment", src: &fakeStatus{}, method: "GET", path: "/v1/experiments/tea-towels", code: 404, body: `"tea-towels"`, askedFor: "tea-towels"},
		{name: "allocation error", src: &fakeStatus{allocErr: errors.New("redis down")}, method: "GET", path: "/v1/experiments/x", code: 500, body: "internal error", logged: "redis down"},
		{name: "HEAD allowed", src: &fakeStatus{}, method: "HEAD", path: "/livez", code: 200},
		{name: "POST refused", src: &fakeStatus{}, method: "POST", path: "/v1/experiments", code: 405},
		{name: "unknown path", src: &fakeStatus{}, method: "GET", path: "/v2/experiments", code: 404},
		{name: "nested path", src: &fakeStatus{}, method: "GET", path: "/v1/experiments/a/b", code: 404},
	} {
		t.Run(tc.name, func(t *testing.T) {
			core, logs := observer.New(zapcore.InfoLevel)
			h := NewHTTPHandler(tc.src, prometheus.NewRegistry(), zap.New(core))
			code, hdr, body := get(t, h, tc.method, tc.path)
			if code != tc.code {
				t.Errorf("code %d, want %d (body %q)", code, tc.code, body)
			}
			if !strings.Contains(body, tc.body) {
				t.Errorf("body %q lacks %q", body, tc.body)
			}
			if ct := hdr.Get("Content-Type"); !strings.HasPrefix(ct, tc.ctype) {
				t.Errorf("content type %q, want %q", ct, tc.ctype)
			}
			if tc.code == 500 && strings.Contains(body, "redis") {
				t.Errorf("500 body leaks the internal error: %q", body)
			}
			var logged []string
			for _, e := range logs.All() {
				logged = append(logged, e.Message+" "+e.ContextMap()["error"].(string))
			}
			if got := strings.Join(logged, "\n"); (tc.logged == "") != (got == "") || !strings.Contains(got, tc.logged) {
				t.Errorf("logged %q, want %q", got, tc.logged)
			}
			if tc.askedFor != "" && !slices.Equal(tc.src.asked, []string{tc.askedFor}) {
				t.Errorf("source asked for %q, want %q", tc.src.asked, tc.askedFor)
			}
		})
	}
}

// TestHTTPMetricsExposition scrapes /metrics and parses it with the
// Prometheus text parser (prometheus/common/expfmt, the reference parser of
// the exposition format).
func TestHTTPMetricsExposition(t *testing.T) {
	reg := prometheus.NewRegistry()
	m := NewMetrics(reg)
	m.EventsConsumed.WithLabelValues("clicks").Add(41)
	m.EventsConsumed.WithLabelValues("clicks").Inc()
	m.ConsumerLag.WithLabelValues("conversions", "3").Set(17)
	m.FlushDuration.Observe(0.003)
	m.RedisUp.Set(1)
	h := NewHTTPHandler(&fakeStatus{}, reg, zap.NewNop())
	code, hdr, body := get(t, h, "GET", "/metrics")
	if code != 200 || !strings.HasPrefix(hdr.Get("Content-Type"), "text/plain") {
		t.Fatalf("code %d, content type %q", code, hdr.Get("Content-Type"))
	}
	p := expfmt.NewTextParser(model.UTF8Validation)
	fams, err := p.TextToMetricFamilies(strings.NewReader(body))
	if err != nil {
		t.Fatalf("exposition does not parse: %v\n%s", err, body)
	}
	value := func(name string, labels map[string]string) float64 {
		f, ok := fams[name]
		if !ok {
			t.Fatalf("no family %s", name)
		}
		for _, mt := range f.Metric {
			match := true
			for _, lp := range mt.Label {
				if want, ok := labels[lp.GetName()]; ok && want != lp.GetValue() {
					match = false
				}
			}
			if !match {
				continue
			}
			switch {
			case mt.Counter != nil:
				return mt.Counter.GetValue()
			case mt.Gauge != nil:
				return mt.Gauge.GetValue()
			case mt.Histogram != nil:
				return float64(mt.Histogram.GetSampleCount())
			}
		}
		t.Fatalf("%s%v not found", name, labels)
		return 0
	}
	for _, c := range []struct {
		name   string
		labels map[string]string
		want   float64
	}{
		{"ripen_events_consumed_total", map[string]string{"topic": "clicks"}, 42},
		{"ripen_consumer_lag", map[string]string{"topic": "conversions", "partition": "3"}, 17},
		{"ripen_flush_duration_seconds", nil, 1},
		{"ripen_redis_up", nil, 1},
		{"ripen_events_rejected_total", map[string]string{"reason": "bad_control"}, 0},
	} {
		if got := value(c.name, c.labels); got != c.want {
			t.Errorf("%s%v = %v, want %v", c.name, c.labels, got, c.want)
		}
	}
}

// TestMetricsNamesTypesAndLint checks the exact set of series with their
// types and labels, and runs Prometheus's own naming linter (promlint, via
// client_golang's testutil.GatherAndLint) over them.
func TestMetricsNamesTypesAndLint(t *testing.T) {
	reg := prometheus.NewRegistry()
	m := NewMetrics(reg)
	m.EventsConsumed.WithLabelValues("clicks").Inc()
	m.ConsumerLag.WithLabelValues("clicks", "0").Set(1)
	want := map[string]struct {
		typ    dto.MetricType
		labels []string
	}{
		"ripen_events_consumed_total":        {dto.MetricType_COUNTER, []string{"topic"}},
		"ripen_events_rejected_total":        {dto.MetricType_COUNTER, []string{"reason"}},
		"ripen_deadletter_published_total":   {dto.MetricType_COUNTER, nil},
		"ripen_flush_duration_seconds":       {dto.MetricType_HISTOGRAM, nil},
		"ripen_flush_stage_duration_seconds": {dto.MetricType_HISTOGRAM, []string{"stage"}},
		"ripen_refit_duration_seconds":       {dto.MetricType_HISTOGRAM, nil},
		"ripen_consumer_lag":                 {dto.MetricType_GAUGE, []string{"partition", "topic"}},
		"ripen_allocations_published_total":  {dto.MetricType_COUNTER, nil},
		"ripen_watermark_seconds":            {dto.MetricType_GAUGE, nil},
		"ripen_redis_up":                     {dto.MetricType_GAUGE, nil},
		"ripen_experiments":                  {dto.MetricType_GAUGE, nil},
		"ripen_holdback_overflows_total":     {dto.MetricType_COUNTER, nil},
		"ripen_orphans_parked_total":         {dto.MetricType_COUNTER, nil},
	}
	fams, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	if len(fams) != len(want) {
		t.Errorf("%d families, want %d", len(fams), len(want))
	}
	for _, f := range fams {
		w, ok := want[f.GetName()]
		if !ok {
			t.Errorf("unexpected family %s", f.GetName())
			continue
		}
		if f.GetType() != w.typ {
			t.Errorf("%s: type %v, want %v", f.GetName(), f.GetType(), w.typ)
		}
		var labels []string
		for _, lp := range f.Metric[0].Label {
			labels = append(labels, lp.GetName())
		}
		if !slices.Equal(labels, w.labels) {
			t.Errorf("%s: labels %v, want %v", f.GetName(), labels, w.labels)
		}
	}
	problems, err := testutil.GatherAndLint(reg)
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range problems {
		t.Errorf("promlint: %s: %s", p.Metric, p.Text)
	}
	defer func() {
		if recover() == nil {
			t.Errorf("registering the metrics twice on one registry did not panic")
		}
	}()
	NewMetrics(reg)
}

// TestMetricsKnownReasons checks that every Reason constant declared in the
// package is pre-set in ripen_events_rejected_total.
func TestMetricsKnownReasons(t *testing.T) {
	files, err := filepath.Glob("*.go")
	if err != nil {
		t.Fatal(err)
	}
	var declared []string
	for _, name := range files {
		if strings.HasSuffix(name, "_test.go") {
			continue
		}
		f, err := parser.ParseFile(token.NewFileSet(), name, nil, 0)
		if err != nil {
			t.Fatal(err)
		}
		for _, d := range f.Decls {
			gd, ok := d.(*ast.GenDecl)
			if !ok || gd.Tok != token.CONST {
				continue
			}
			for _, s := range gd.Specs {
				vs := s.(*ast.ValueSpec)
				if id, ok := vs.Type.(*ast.Ident); ok && id.Name == "Reason" {
					for _, v := range vs.Values {
						if lit, ok := v.(*ast.BasicLit); ok {
							declared = append(declared, strings.Trim(lit.Value, `"`))
						}
					}
				}
			}
		}
	}
	var known []string
	for _, r := range knownReasons {
		known = append(known, string(r))
	}
	slices.Sort(declared)
	slices.Sort(known)
	if len(declared) == 0 || !slices.Equal(declared, known) {
		t.Errorf("Reason constants %v, pre-set reasons %v", declared, known)
	}
}

// TestHTTPServeListener serves over real TCP, then checks that cancelling
// the context stops the server, also with a request stuck in a handler.
func TestHTTPServeListener(t *testing.T) {
	release := make(chan struct{})
	entered := make(chan struct{})
	mux := http.NewServeMux()
	mux.Handle("/", NewHTTPHandler(&fakeStatus{}, prometheus.NewRegistry(), zap.NewNop()))
	mux.HandleFunc("GET /stuck", func(w http.ResponseWriter, r *http.Request) {
		close(entered)
		<-release
	})
	defer close(release)

	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- ServeListener(ctx, ln, mux, 100*time.Millisecond) }()
	base := "http://" + ln.Addr().String()
	client := &http.Client{Timeout: 5 * time.Second}
	resp, err := client.Get(base + "/livez")
	if err != nil {
		t.Fatal(err)
	}
	b, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != 200 || !bytes.Contains(b, []byte("ok")) {
		t.Fatalf("livez over TCP: %d %q", resp.StatusCode, b)
	}
	go func() {
		if r, err := client.Get(base + "/stuck"); err == nil {
			r.Body.Close()
		}
	}()
	<-entered
	cancel()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("ServeListener after cancel: %v", err)
		}
	case <-time.After(10 * time.Second):
		t.Fatal("ServeListener did not return after its shutdown bound")
	}
	if _, err := (&http.Client{Timeout: time.Second}).Get(base + "/livez"); err == nil {
		t.Errorf("server still answers after shutdown")
	}

	err = ServeHTTP(context.Background(), "127.0.0.1:not-a-port", mux)
	if err == nil || !strings.HasPrefix(err.Error(), "http: ") {
		t.Errorf("ServeHTTP on a bad address: %v", err)
	}
}

// TestHTTPLoggerEncodings checks NewLogger's encodings: JSON lines that
// parse with the fields as keys, and console lines that are not JSON.
func TestHTTPLoggerEncodings(t *testing.T) {
	for _, tc := range []struct {
		encoding string
		json     bool
		err      bool
	}{
		{"", true, false},
		{"json", true, false},
		{"console", false, false},
		{"logfmt", false, true},
	} {
		t.Run(tc.encoding, func(t *testing.T) {
			var buf bytes.Buffer
			log, err := newLogger(tc.encoding, zapcore.AddSync(&buf))
			if tc.err {
				if err == nil || !strings.Contains(err.Error(), `"logfmt"`) {
					t.Errorf("err = %v", err)
				}
				if _, err := NewLogger(tc.encoding); err == nil {
					t.Errorf("NewLogger accepted %q", tc.encoding)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			log.Info("flush done", zap.String("experiment", "copper-pan-photos"), zap.Int("events", 1200))
			_ = log.Sync()
			line := strings.TrimSpace(buf.String())
			var obj map[string]any
			isJSON := json.Unmarshal([]byte(line), &obj) == nil
			if isJSON != tc.json {
				t.Fatalf("line %q: JSON = %v, want %v", line, isJSON, tc.json)
			}
			if tc.json {
				if obj["msg"] != "flush done" || obj["level"] != "info" || obj["experiment"] != "copper-pan-photos" || obj["events"] != 1200.0 || obj["ts"] == nil || obj["caller"] == nil {
					t.Errorf("JSON entry %v", obj)
				}
				if _, err := time.Parse(time.RFC3339Nano, obj["ts"].(string)); err != nil {
					t.Errorf("ts: %v", err)
				}
			} else if !strings.Contains(line, "INFO") || !strings.Contains(line, "flush done") || !strings.Contains(line, `"experiment": "copper-pan-photos"`) {
				t.Errorf("console line %q", line)
			}
		})
	}
}
