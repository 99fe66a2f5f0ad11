package consumer

import (
	"crypto/sha256"
	"crypto/subtle"
	"net"
	"net/http"
	"strings"

	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/zap"
)

// IsLoopback reports whether the listen address addr (host:port) accepts
// connections from this machine only: a loopback IP or "localhost". An
// empty host (every interface) or any other name is not loopback.
func IsLoopback(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if strings.EqualFold(host, "localhost") {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// RequireAuth wraps h so that a request must carry the credential of a
// (a bearer token, or basic auth; see HTTPAuthConfig); without a
// configured credential it returns h unchanged. Refused requests get 401
// with a WWW-Authenticate challenge, so a browser asks for the basic-auth
// credential (any user name with the bearer token as password works).
func RequireAuth(a HTTPAuthConfig, h http.Handler) http.Handler {
	if !a.Enabled() {
		return h
	}
	digest := func(s string) [32]byte { return sha256.Sum256([]byte(s)) }
	token, user, pass := digest(a.BearerToken), digest(a.Username), digest(a.Password)
	// equal compares in constant time (the digests hide the lengths).
	equal := func(want [32]byte, got string) bool {
		d := digest(got)
		return subtle.ConstantTimeCompare(want[:], d[:]) == 1
	}
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		ok := false
		if v, found := strings.CutPrefix(r.Header.Get("Authorization"), "Bearer "); found && a.BearerToken != "" {
			ok = equal(token, strings.TrimSpace(v))
		} else if u, p, found := r.BasicAuth(); found {
			tokenOK := a.BearerToken != "" && equal(token, p)
			userOK := a.Username != "" && equal(user, u) && equal(pass, p)
			ok = tokenOK || userOK
		}
		if !ok {
			w.Header().Set("WWW-Authenticate", `Basic realm="ripen", charset="UTF-8"`)
			writeText(w, http.StatusUnauthorized, "authentication required")
			return
		}
		h.ServeHTTP(w, r)
	})
}

// HTTPOptions extend the status endpoints of NewServiceHandler.
type HTTPOptions struct {
	// Auth protects /v1 and Console (see RequireAuth). Default: none.
	Auth HTTPAuthConfig
	// Console serves every path the status endpoints do not (the web
	// console). Default: none (404).
	Console http.Handler
}

// NewServiceHandler serves what NewHTTPHandler does, with /v1 behind
// opts.Auth, and every other path by opts.Console behind opts.Auth.
// /metrics, /livez and /readyz stay open for scrapers and probes.
func NewServiceHandler(src StatusSource, reg prometheus.Gatherer, log *zap.Logger, opts HTTPOptions) http.Handler {
	status := NewHTTPHandler(src, reg, log)
	mux := http.NewServeMux()
	for _, p := range []string{"/metrics", "/livez", "/readyz"} {
		mux.Handle(p, status)
	}
	mux.Handle("/v1/", RequireAuth(opts.Auth, status))
	if opts.Console != nil {
		mux.Handle("/", RequireAuth(opts.Auth, opts.Console))
	}
	return mux
}
