package app

import (
	"context"
	"encoding/json"
	"fmt"
	"net"
	"net/http"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus/promhttp"

	"filtrate/config"
)

func (a *App) setupHTTP(cfg *config.Config) error {
	tlsCfg, err := cfg.HTTP.TLS.TLSConfig()
	if err != nil {
		return fmt.Errorf("http.tls: %w", err)
	}
	mux := http.NewServeMux()
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, _ *http.Request) {
		w.Header().Set("Content-Type", "text/plain; charset=utf-8")
		fmt.Fprintln(w, "ok")
	})
	mux.HandleFunc("GET /readyz", a.readyz)
	mux.Handle("GET /metrics", promhttp.HandlerFor(a.reg, promhttp.HandlerOpts{Registry: a.reg}))
	mux.Handle("POST /-/reload", a.authenticated(http.HandlerFunc(a.reloadHandler)))
	for pattern, h := range a.extraRoutes() {
		mux.Handle(pattern, a.authenticated(h))
	}

	ln, err := net.Listen("tcp", cfg.HTTP.Listen)
	if err != nil {
		return fmt.Errorf("http.listen: %w", err)
	}
	a.httpLn = limitListener(countingListener(ln, a.metrics.Connections.WithLabelValues("http")), cfg.HTTP.MaxConnections)
	a.httpSrv = &http.Server{
		Handler:           http.MaxBytesHandler(mux, cfg.HTTP.MaxRequestBytes),
		TLSConfig:         tlsCfg,
		ReadHeaderTimeout: 10 * time.Second,
		ReadTimeout:       cfg.HTTP.ReadTimeout,
		WriteTimeout:      cfg.HTTP.WriteTimeout,
		IdleTimeout:       2 * time.Minute,
		MaxHeaderBytes:    64 << 10,
	}
	return nil
}

// extraRoutes returns the authenticated routes added by other parts of the
// daemon (FHIR, audit view); each pattern is a net/http ServeMux pattern.
func (a *App) extraRoutes() map[string]http.Handler {
	routes := map[string]http.Handler{}
	for _, r := range a.routes {
		routes[r.pattern] = r.handler
	}
	return routes
}

type route struct {
	pattern string
	handler http.Handler
}

// readyz reports ready when the store answers with every migration applied
// and the listeners are serving.
func (a *App) readyz(w http.ResponseWriter, r *http.Request) {
	ctx, cancel := context.WithTimeout(r.Context(), 2*time.Second)
	defer cancel()
	status := map[string]string{"store": "ok", "listeners": "ok"}
	code := http.StatusOK
	if err := a.store.Ready(ctx); err != nil {
		status["store"] = "unavailable"
		code = http.StatusServiceUnavailable
	}
	if !a.ready.Load() {
		status["listeners"] = "not serving"
		code = http.StatusServiceUnavailable
	}
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(code)
	_ = json.NewEncoder(w).Encode(status)
}

func (a *App) reloadHandler(w http.ResponseWriter, _ *http.Request) {
	if err := a.Reload(); err != nil {
		http.Error(w, "reload failed; the configuration in force is kept: "+err.Error(), http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	fmt.Fprintln(w, "configuration reloaded:", a.State().Snapshot.ConfigHash)
}

// authenticated requires a configured bearer token, or a verified client
// certificate when the listener requires one. With neither configured the
// listener is loopback-only (enforced by configuration validation), and
// requests pass.
func (a *App) authenticated(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		cfg := a.Config()
		auth := cfg.HTTP.Auth
		mtls := cfg.HTTP.TLS.RequireClientCert
		if !auth.Enabled() && !mtls {
			next.ServeHTTP(w, r)
			return
		}
		if mtls && r.TLS != nil && len(r.TLS.VerifiedChains) > 0 {
			next.ServeHTTP(w, r)
			return
		}
		if auth.Enabled() {
			h := r.Header.Get("Authorization")
			if tok, ok := strings.CutPrefix(h, "Bearer "); ok && auth.Accepts(tok) {
				next.ServeHTTP(w, r)
				return
			}
		}
		w.Header().Set("WWW-Authenticate", `Bearer realm="filtrate"`)
		http.Error(w, "authentication required", http.StatusUnauthorized)
	})
}
