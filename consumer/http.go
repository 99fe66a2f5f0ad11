package consumer

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net"
	"net/http"
	"slices"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"go.uber.org/zap"
)

// StatusSource answers the HTTP status endpoints. Implementations must be
// safe for concurrent use.
type StatusSource interface {
	// Ready returns nil when the service can do its work (Kafka assigned,
	// Redis reachable, ...) and otherwise an error saying why not.
	Ready(ctx context.Context) error
	// Experiments lists the known experiment ids.
	Experiments(ctx context.Context) ([]string, error)
	// LatestAllocation returns the latest published allocation of an
	// experiment as JSON, and false when the experiment is unknown or has
	// none yet.
	LatestAllocation(ctx context.Context, experiment string) ([]byte, bool, error)
}

// httpSourceTimeout bounds each StatusSource call made for a request.
const httpSourceTimeout = 5 * time.Second

// DefaultHTTPShutdownTimeout bounds the graceful stop of ServeHTTP.
const DefaultHTTPShutdownTimeout = 5 * time.Second

// NewHTTPHandler serves:
//
//	GET /metrics               Prometheus exposition of reg
//	GET /livez                 200 while the process runs
//	GET /readyz                200 when src.Ready succeeds, else 503 with the reason
//	GET /v1/experiments        JSON array of experiment ids, sorted
//	GET /v1/experiments/{id}   the latest allocation JSON, 404 when unknown
//
// Other paths are 404 and other methods 405. log receives errors of src.
func NewHTTPHandler(src StatusSource, reg prometheus.Gatherer, log *zap.Logger) http.Handler {
	if log == nil {
		log = zap.NewNop()
	}
	h := &statusHandler{src: src, log: log}
	mux := http.NewServeMux()
	mux.Handle("GET /metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{
		ErrorLog:      promLogger{log},
		ErrorHandling: promhttp.ContinueOnError,
	}))
	mux.HandleFunc("GET /livez", func(w http.ResponseWriter, _ *http.Request) {
		writeText(w, http.StatusOK, "ok")
	})
	mux.HandleFunc("GET /readyz", h.ready)
	mux.HandleFunc("GET /v1/experiments", h.experiments)
	mux.HandleFunc("GET /v1/experiments/{id}", h.allocation)
	return mux
}

type statusHandler struct {
	src StatusSource
	log *zap.Logger
}

func (h *statusHandler) ready(w http.ResponseWriter, r *http.Request) {
	ctx, cancel := context.WithTimeout(r.Context(), httpSourceTimeout)
	defer cancel()
	if err := h.src.Ready(ctx); err != nil {
		writeText(w, http.StatusServiceUnavailable, "not ready: "+err.Error())
		return
	}
	writeText(w, http.StatusOK, "ok")
}

func (h *statusHandler) experiments(w http.ResponseWriter, r *http.Request) {
	ctx, cancel := context.WithTimeout(r.Context(), httpSourceTimeout)
	defer cancel()
	ids, err := h.src.Experiments(ctx)
	if err != nil {
		h.internal(w, r, err)
		return
	}
	ids = slices.Sorted(slices.Values(ids))
	if ids == nil {
		ids = []string{}
	}
	b, err := json.Marshal(ids)
	if err != nil {
		h.internal(w, r, err)
		return
	}
	writeJSON(w, b)
}

func (h *statusHandler) allocation(w http.ResponseWriter, r *http.Request) {
	id := r.PathValue("id")
	ctx, cancel := context.WithTimeout(r.Context(), httpSourceTimeout)
	defer cancel()
	b, ok, err := h.src.LatestAllocation(ctx, id)
	if err != nil {
		h.internal(w, r, err)
		return
	}
	if !ok {
		writeText(w, http.StatusNotFound, fmt.Sprintf("experiment %q has no allocation", id))
		return
	}
	writeJSON(w, b)
}

// internal logs err and answers 500 without the detail, which may name
// internal addresses.
func (h *statusHandler) internal(w http.ResponseWriter, r *http.Request, err error) {
	h.log.Error("status request failed", zap.String("path", r.URL.Path), zap.Error(err))
	writeText(w, http.StatusInternalServerError, "internal error")
}

func writeText(w http.ResponseWriter, code int, msg string) {
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	w.Header().Set("X-Content-Type-Options", "nosniff")
	w.WriteHeader(code)
	_, _ = fmt.Fprintln(w, msg)
}

func writeJSON(w http.ResponseWriter, b []byte) {
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(http.StatusOK)
	_, _ = w.Write(b)
}

// promLogger adapts zap to promhttp's error log.
type promLogger struct{ log *zap.Logger }

func (l promLogger) Println(v ...any) {
	l.log.Error("metrics exposition", zap.String("error", fmt.Sprint(v...)))
}

// ServeHTTP listens on addr and serves h until ctx ends, then shuts down
// gracefully within DefaultHTTPShutdownTimeout. It returns nil after a
// shutdown caused by ctx, or the listen or serve error.
func ServeHTTP(ctx context.Context, addr string, h http.Handler) error {
	var lc net.ListenConfig
	ln, err := lc.Listen(ctx, "tcp", addr)
	if err != nil {
		return fmt.Errorf("http: %w", err)
	}
	return ServeListener(ctx, ln, h, DefaultHTTPShutdownTimeout)
}

// ServeListener serves h on ln (which it closes) until ctx ends, then
// stops accepting, waits up to shutdownTimeout for requests in flight and
// closes the remaining connections. It returns nil after a shutdown caused
// by ctx, or the serve error.
func ServeListener(ctx context.Context, ln net.Listener, h http.Handler, shutdownTimeout time.Duration) error {
	srv := &http.Server{
		Handler:           h,
		ReadHeaderTimeout: 5 * time.Second,
		ReadTimeout:       10 * time.Second,
		WriteTimeout:      30 * time.Second,
		IdleTimeout:       60 * time.Second,
	}
	done := make(chan error, 1)
	go func() { done <- srv.Serve(ln) }()
	select {
	case err := <-done:
		return fmt.Errorf("http: %w", err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), shutdownTimeout)
	defer cancel()
	err := srv.Shutdown(sctx)
	if errors.Is(err, context.DeadlineExceeded) {
		err = srv.Close()
	}
	if serr := <-done; serr != nil && !errors.Is(serr, http.ErrServerClosed) {
		return fmt.Errorf("http: %w", serr)
	}
	if err != nil {
		return fmt.Errorf("http shutdown: %w", err)
	}
	return nil
}
