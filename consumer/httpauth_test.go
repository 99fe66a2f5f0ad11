package consumer

import (
	"math"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/zap"
)

func TestIsLoopback(t *testing.T) {
	for addr, want := range map[string]bool{
		"127.0.0.1:9464": true, "127.8.9.1:1": true, "[::1]:9464": true, "localhost:9464": true, "LOCALHOST:1": true,
		"0.0.0.0:9464": false, ":9464": false, "[::]:9464": false, "10.0.0.5:9464": false, "ripen.internal:9464": false, "nonsense": false,
	} {
		if got := IsLoopback(addr); got != want {
			t.Errorf("IsLoopback(%q) = %v, want %v", addr, got, want)
		}
	}
}

func TestHTTPAuthValidation(t *testing.T) {
	for _, tc := range []struct {
		name string
		http string
		auth HTTPAuthConfig
		bad  string // substring of the error, "" for valid
	}{
		{"loopback open", "127.0.0.1:9464", HTTPAuthConfig{}, ""},
		{"beyond loopback open", "0.0.0.0:9464", HTTPAuthConfig{}, "listens beyond loopback"},
		{"all interfaces open", ":9464", HTTPAuthConfig{}, "listens beyond loopback"},
		{"explicitly open", "0.0.0.0:9464", HTTPAuthConfig{AllowUnauthenticated: true}, ""},
		{"token", "0.0.0.0:9464", HTTPAuthConfig{BearerToken: "t"}, ""},
		{"basic", "0.0.0.0:9464", HTTPAuthConfig{Username: "u", Password: "p"}, ""},
		{"user without password", "127.0.0.1:9464", HTTPAuthConfig{Username: "u"}, "together"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c := Config{HTTP: tc.http, HTTPAuth: tc.auth}.WithDefaults()
			err := c.Validate()
			switch {
			case tc.bad == "" && err != nil:
				t.Fatalf("valid config refused: %v", err)
			case tc.bad != "" && (err == nil || !strings.Contains(err.Error(), tc.bad)):
				t.Fatalf("error %v, want one about %q", err, tc.bad)
			}
		})
	}
	r := Config{HTTPAuth: HTTPAuthConfig{BearerToken: "s3cret-token", Username: "u", Password: "s3cret-pass"}}.Redacted()
	if r.HTTPAuth.BearerToken != redacted || r.HTTPAuth.Password != redacted || r.HTTPAuth.Username != "u" {
		t.Errorf("Redacted kept a credential: %+v", r.HTTPAuth)
	}
}

// TestServiceHandlerAuth: /v1 and the console need the credential, the
// probes and /metrics never do, and a refusal carries a challenge.
func TestServiceHandlerAuth(t *testing.T) {
	console := http.HandlerFunc(func(w http.ResponseWriter, _ *http.Request) { _, _ = w.Write([]byte("console")) })
	src := &fakeStatus{allocs: map[string][]byte{"x": []byte(`{"experiment":"x"}`)}}
	for _, tc := range []struct {
		name string
		auth HTTPAuthConfig
		// set adds credentials to a request.
		set  func(*http.Request)
		want int // for /v1 and the console
	}{
		{"none configured", HTTPAuthConfig{}, func(*http.Request) {}, http.StatusOK},
		{"token missing", HTTPAuthConfig{BearerToken: "tok-1"}, func(*http.Request) {}, http.StatusUnauthorized},
		{"token right", HTTPAuthConfig{BearerToken: "tok-1"}, func(r *http.Request) { r.Header.Set("Authorization", "Bearer tok-1") }, http.StatusOK},
		{"token wrong", HTTPAuthConfig{BearerToken: "tok-1"}, func(r *http.Request) { r.Header.Set("Authorization", "Bearer tok-2") }, http.StatusUnauthorized},
		{"token as basic password", HTTPAuthConfig{BearerToken: "tok-1"}, func(r *http.Request) { r.SetBasicAuth("anyone", "tok-1") }, http.StatusOK},
		{"basic right", HTTPAuthConfig{Username: "ops", Password: "pw"}, func(r *http.Request) { r.SetBasicAuth("ops", "pw") }, http.StatusOK},
		{"basic wrong user", HTTPAuthConfig{Username: "ops", Password: "pw"}, func(r *http.Request) { r.SetBasicAuth("dev", "pw") }, http.StatusUnauthorized},
		{"basic wrong password", HTTPAuthConfig{Username: "ops", Password: "pw"}, func(r *http.Request) { r.SetBasicAuth("ops", "px") }, http.StatusUnauthorized},
		{"bearer when only basic", HTTPAuthConfig{Username: "ops", Password: "pw"}, func(r *http.Request) { r.Header.Set("Authorization", "Bearer pw") }, http.StatusUnauthorized},
	} {
		t.Run(tc.name, func(t *testing.T) {
			h := NewServiceHandler(src, prometheus.NewRegistry(), zap.NewNop(), HTTPOptions{Auth: tc.auth, Console: console})
			for _, path := range []string{"/v1/experiments", "/v1/experiments/x", "/", "/experiment?id=x"} {
				req := httptest.NewRequest(http.MethodGet, path, nil)
				tc.set(req)
				rec := httptest.NewRecorder()
				h.ServeHTTP(rec, req)
				if rec.Code != tc.want {
					t.Errorf("%s: status %d, want %d", path, rec.Code, tc.want)
				}
				if rec.Code == http.StatusUnauthorized && !strings.HasPrefix(rec.Header().Get("WWW-Authenticate"), "Basic ") {
					t.Errorf("%s: 401 without a basic-auth challenge", path)
				}
			}
			for _, path := range []string{"/livez", "/metrics"} {
				rec := httptest.NewRecorder()
				h.ServeHTTP(rec, httptest.NewRequest(http.MethodGet, path, nil))
				if rec.Code != http.StatusOK {
					t.Errorf("%s: status %d without credentials, want 200", path, rec.Code)
				}
			}
		})
	}
}

// TestReadMetrics reads back what the service's metrics hold, as /metrics
// would show it.
func TestReadMetrics(t *testing.T) {
	reg := prometheus.NewRegistry()
	m := NewMetrics(reg)
	r, err := ReadMetrics(reg)
	if err != nil {
		t.Fatal(err)
	}
	if !math.IsNaN(r.Watermark) || len(r.Lag) != 0 || r.Rejected[string(ReasonUnknownClick)] != 0 {
		t.Fatalf("fresh reading %+v", r)
	}
	m.EventsConsumed.WithLabelValues("clicks").Add(7)
	m.EventsRejected.WithLabelValues(string(ReasonUnknownClick)).Add(3)
	m.DeadLetterPublished.Add(3)
	m.ConsumerLag.WithLabelValues("clicks", "10").Set(5)
	m.ConsumerLag.WithLabelValues("clicks", "2").Set(1)
	m.Watermark.Set(float64(time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC).Unix()))
	m.RedisUp.Set(1)
	m.RefitDuration.Observe(0.2)
	r, err = ReadMetrics(reg)
	if err != nil {
		t.Fatal(err)
	}
	if r.Consumed["clicks"] != 7 || r.Rejected[string(ReasonUnknownClick)] != 3 || r.DeadLetters != 3 || r.RedisUp != 1 || r.Refits != 1 {
		t.Errorf("reading %+v", r)
	}
	if len(r.Lag) != 2 || r.Lag[0].Partition != 2 || r.Lag[1].Lag != 5 {
		t.Errorf("lag %+v, want partitions in numeric order", r.Lag)
	}
	if r.Watermark != 1772409600 {
		t.Errorf("watermark %v", r.Watermark)
	}
}

// TestSettingsSources: each setting names the layer it comes from.
func TestSettingsSources(t *testing.T) {
	floor := 0.05
	c := Config{Defaults: ExperimentConfig{Policy: "top-two"}, Experiments: map[string]ExperimentConfig{"x": {Floor: &floor, Window: 48 * time.Hour}}}.WithDefaults()
	c, err := c.ApplyControl([]byte("x"), []byte(`{"window":"3d","paused":["a"],"ended":false}`))
	if err != nil {
		t.Fatal(err)
	}
	got := map[string]SettingField{}
	for _, f := range c.SettingsFor("x").Fields() {
		got[f.Key] = f
	}
	for key, want := range map[string]SettingField{
		"window":               {Value: "3d", Source: SourceControl},
		"paused":               {Value: "a", Source: SourceControl},
		"ended":                {Value: "false", Source: SourceControl},
		"floor":                {Value: "0.05", Source: SourceOverride},
		"policy":               {Value: "top-two", Source: SourceDefaults},
		"cap":                  {Value: "1", Source: SourceBuiltIn},
		"attribution":          {Value: "indexed", Source: SourceBuiltIn},
		"pipeline.refit_every": {Value: "15m", Source: SourcePipeline},
	} {
		if g := got[key]; g.Value != want.Value || g.Source != want.Source {
			t.Errorf("%s = %q from %q, want %q from %q", key, g.Value, g.Source, want.Value, want.Source)
		}
	}
	if s := c.SettingsFor("x").Control; !strings.Contains(s, `"window":"3d"`) {
		t.Errorf("control message %q", s)
	}
	if s := c.SettingsFor("other"); s.Control != "" || s.Fields()[0].Source != SourceBuiltIn {
		t.Errorf("an experiment without overrides: %+v", s.Fields()[0])
	}
}
