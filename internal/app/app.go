// Package app wires filtrate's daemon together: configuration, store,
// pipeline, the HL7 v2 (MLLP) and HTTP listeners, the outbox workers and
// the metrics. Tests and the demo start it in-process, exactly as
// "filtrate serve" does.
package app

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"os"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"

	"filtrate/calc"
	"filtrate/config"
	"filtrate/hl7v2/mllp"
	"filtrate/internal/forward"
	"filtrate/internal/ingest"
	"filtrate/internal/pipeline"
	"filtrate/internal/telemetry"
	"filtrate/store"
)

// Options configure an App.
type Options struct {
	// ConfigFile is the YAML configuration; empty means the built-in
	// default (config.Default). Config, when set, is used instead of either
	// and cannot be reloaded from a file.
	ConfigFile string
	Config     *config.Config
	// Version is the software version written into audit records.
	Version string
	// Logger receives operational logs (never patient data).
	Logger *slog.Logger
	// Registry receives the metrics; nil means a new registry.
	Registry *prometheus.Registry
	// WorkerName identifies this daemon in outbox claims; default host:pid.
	WorkerName string
	// ShutdownTimeout bounds the graceful shutdown; default 40 s (longer
	// than a default delivery attempt, shorter than the systemd unit's
	// stop timeout).
	ShutdownTimeout time.Duration
	// ForwardPoll is how often the outbox workers look for due items when
	// not woken; default 1 s (tests shorten it).
	ForwardPoll time.Duration
}

// App is a running filtrate daemon.
type App struct {
	opts    Options
	log     *slog.Logger
	reg     *prometheus.Registry
	metrics *telemetry.Metrics
	calc    *calc.Calculator
	store   store.Store
	proc    *pipeline.Processor

	cfg   atomic.Pointer[config.Config]
	state atomic.Pointer[ingest.State]

	hl7      *ingest.HL7
	mllpSrv  *mllp.Server
	hl7Ln    net.Listener
	httpSrv  *http.Server
	httpLn   net.Listener
	workers  []*forward.Worker
	routes   []route
	ready    atomic.Bool
	reloadMu sync.Mutex

	runMu         sync.Mutex // guards stopped and cancelWorkers between Run and Shutdown
	stopped       bool
	cancelWorkers context.CancelFunc
	workersDone   sync.WaitGroup
	cleanups      []cleanup
	shutdownOnce  sync.Once
	shutdownErr   error
}

type cleanup struct {
	name string
	fn   func(context.Context) error
}

// New builds the daemon: it loads and validates the configuration, opens
// the store (applying migrations), and binds the listeners. Nothing is
// served until Run.
func New(ctx context.Context, opts Options) (a *App, err error) {
	if opts.Logger == nil {
		opts.Logger = slog.New(slog.DiscardHandler)
	}
	if opts.Registry == nil {
		opts.Registry = prometheus.NewRegistry()
	}
	if opts.Version == "" {
		opts.Version = "dev"
	}
	if opts.ShutdownTimeout <= 0 {
		opts.ShutdownTimeout = 40 * time.Second
	}
	if opts.WorkerName == "" {
		host, _ := os.Hostname()
		opts.WorkerName = fmt.Sprintf("%s:%d", host, os.Getpid())
	}
	a = &App{opts: opts, log: opts.Logger, reg: opts.Registry, calc: calc.NewCalculator(calc.Builtin())}
	defer func() {
		if err != nil {
			_ = a.Shutdown(context.Background())
		}
	}()

	cfg, err := a.loadConfig()
	if err != nil {
		return nil, err
	}
	for _, w := range cfg.Warnings() {
		a.log.Warn("configuration warning", "warning", w)
	}
	st, err := ingest.StateFromConfig(cfg, a.calc.Registry())
	if err != nil {
		return nil, err
	}
	a.cfg.Store(cfg)
	a.state.Store(st)

	reasons := []string{pipeline.ReasonWithdrawn}
	for _, r := range calc.Reasons() {
		reasons = append(reasons, string(r))
	}
	a.metrics = telemetry.New(a.reg, opts.Version, a.calc.Registry().IDs(), reasons)
	a.metrics.ReloadOK.Set(1)
	a.metrics.ReloadTime.SetToCurrentTime()
	a.reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))

	s, err := store.Open(ctx, cfg.Store, store.WithSoftwareVersion(opts.Version), store.WithLogger(a.log))
	if err != nil {
		return nil, fmt.Errorf("open store: %w", err)
	}
	a.store = s
	a.addCleanup("store", func(context.Context) error { return s.Close() })
	a.reg.MustRegister(telemetry.NewOutboxCollector(a.outboxStats))
	a.proc = pipeline.NewProcessor(a.calc, s, opts.Version, a.metrics)

	if err := a.setupForwarders(cfg); err != nil {
		return nil, err
	}
	if err := a.setupHL7(cfg); err != nil {
		return nil, err
	}
	if err := a.setupFHIR(cfg); err != nil {
		return nil, err
	}
	a.routes = append(a.routes, a.auditRoutes()...)
	if err := a.setupHTTP(cfg); err != nil {
		return nil, err
	}
	return a, nil
}

func (a *App) loadConfig() (*config.Config, error) {
	switch {
	case a.opts.Config != nil:
		return a.opts.Config, nil
	case a.opts.ConfigFile != "":
		c, err := config.LoadFile(a.opts.ConfigFile)
		if err != nil {
			return nil, fmt.Errorf("load configuration: %w", err)
		}
		return c, nil
	default:
		return config.Default(), nil
	}
}

func (a *App) addCleanup(name string, fn func(context.Context) error) {
	a.cleanups = append(a.cleanups, cleanup{name: name, fn: fn})
}

// State returns the processing state in force.
func (a *App) State() *ingest.State { return a.state.Load() }

// Config returns the configuration in force.
func (a *App) Config() *config.Config { return a.cfg.Load() }

// Store returns the daemon's store.
func (a *App) Store() store.Store { return a.store }

// Registry returns the metrics registry.
func (a *App) Registry() *prometheus.Registry { return a.reg }

// HL7Addr returns the bound HL7 v2 (MLLP) address, or "" when disabled.
func (a *App) HL7Addr() string {
	if a.hl7Ln == nil {
		return ""
	}
	return a.hl7Ln.Addr().String()
}

// HTTPAddr returns the bound HTTP address.
func (a *App) HTTPAddr() string {
	if a.httpLn == nil {
		return ""
	}
	return a.httpLn.Addr().String()
}

// Run serves until ctx is cancelled, then shuts down gracefully within the
// shutdown timeout. It returns the first serving or shutdown error.
func (a *App) Run(ctx context.Context) error {
	errc := make(chan error, 2)
	if a.mllpSrv != nil {
		go func() {
			if err := a.mllpSrv.Serve(a.hl7Ln); err != nil && !errors.Is(err, mllp.ErrServerClosed) {
				errc <- fmt.Errorf("hl7v2 listener: %w", err)
			}
		}()
	}
	go func() {
		var err error
		if a.httpSrv.TLSConfig != nil {
			err = a.httpSrv.ServeTLS(a.httpLn, "", "")
		} else {
			err = a.httpSrv.Serve(a.httpLn)
		}
		if err != nil && !errors.Is(err, http.ErrServerClosed) {
			errc <- fmt.Errorf("http listener: %w", err)
		}
	}()
	a.runMu.Lock()
	if a.stopped {
		a.runMu.Unlock()
		return errors.New("app: already shut down")
	}
	wctx, cancel := context.WithCancel(context.WithoutCancel(ctx))
	a.cancelWorkers = cancel
	for _, w := range a.workers {
		a.workersDone.Add(1)
		go func() {
			defer a.workersDone.Done()
			_ = w.Run(wctx)
		}()
	}
	a.runMu.Unlock()
	a.ready.Store(true)
	a.log.Info("filtrate serving", "hl7v2", a.HL7Addr(), "http", a.HTTPAddr(), "version", a.opts.Version)

	var runErr error
	select {
	case <-ctx.Done():
	case runErr = <-errc:
	}
	sctx, scancel := context.WithTimeout(context.Background(), a.opts.ShutdownTimeout)
	defer scancel()
	return errors.Join(runErr, a.Shutdown(sctx))
}

// Shutdown stops accepting (listeners first), drains in-flight messages,
// lets the outbox workers finish their current delivery, then runs the
// named cleanups in reverse order, all within ctx. Calling it twice is safe.
func (a *App) Shutdown(ctx context.Context) error {
	a.shutdownOnce.Do(func() {
		a.runMu.Lock()
		a.stopped = true
		cancelWorkers := a.cancelWorkers
		a.runMu.Unlock()
		a.ready.Store(false)
		var errs []error
		if a.mllpSrv != nil {
			if err := a.mllpSrv.Shutdown(ctx); err != nil {
				errs = append(errs, fmt.Errorf("hl7v2 listener: %w", err))
			}
		} else if a.hl7Ln != nil {
			a.hl7Ln.Close()
		}
		if a.httpSrv != nil {
			if err := a.httpSrv.Shutdown(ctx); err != nil {
				errs = append(errs, fmt.Errorf("http listener: %w", err))
			}
		} else if a.httpLn != nil {
			a.httpLn.Close()
		}
		if cancelWorkers != nil {
			cancelWorkers()
		}
		done := make(chan struct{})
		go func() { a.workersDone.Wait(); close(done) }()
		select {
		case <-done:
		case <-ctx.Done():
			errs = append(errs, fmt.Errorf("outbox workers: %w", ctx.Err()))
		}
		for i := len(a.cleanups) - 1; i >= 0; i-- {
			c := a.cleanups[i]
			if err := c.fn(ctx); err != nil {
				errs = append(errs, fmt.Errorf("%s: %w", c.name, err))
			}
		}
		a.shutdownErr = errors.Join(errs...)
	})
	return a.shutdownErr
}

// Reload builds a new configuration from the configuration file and swaps
// it in; on any error the configuration in force is kept. Calibration,
// policy, analyte and reporting changes apply to messages received after
// the swap. Listener, TLS and store changes need a restart and are logged.
func (a *App) Reload() error {
	a.reloadMu.Lock()
	defer a.reloadMu.Unlock()
	err := a.reload()
	if err != nil {
		a.metrics.ReloadOK.Set(0)
		a.log.Error("configuration reload failed; keeping the configuration in force", "err", err)
		return err
	}
	a.metrics.ReloadOK.Set(1)
	a.metrics.ReloadTime.SetToCurrentTime()
	return nil
}

func (a *App) reload() error {
	if a.opts.Config != nil || a.opts.ConfigFile == "" {
		return errors.New("reload: the daemon was not started from a configuration file")
	}
	cfg, err := config.LoadFile(a.opts.ConfigFile)
	if err != nil {
		return fmt.Errorf("reload: %w", err)
	}
	st, err := ingest.StateFromConfig(cfg, a.calc.Registry())
	if err != nil {
		return fmt.Errorf("reload: %w", err)
	}
	old := a.cfg.Load()
	if keys := restartKeys(old, cfg); len(keys) > 0 {
		a.log.Warn("configuration reload: these changes take effect after a restart", "keys", keys)
		// Forwarding targets stay as started.
		st.ForwardHL7, st.ForwardFHIR = a.state.Load().ForwardHL7, a.state.Load().ForwardFHIR
	}
	a.cfg.Store(cfg)
	a.state.Store(st)
	a.log.Info("configuration reloaded", "config_hash", st.Snapshot.ConfigHash)
	return nil
}

// restartKeys lists the changed keys that a reload does not apply: the
// listeners, TLS, the store and the forwarders are built once at start.
// Policy, calibration, analytes, reporting, timezone and HTTP
// authentication tokens apply at once.
func restartKeys(old, cur *config.Config) []string {
	var keys []string
	add := func(changed bool, key string) {
		if changed {
			keys = append(keys, key)
		}
	}
	add(old.Store != cur.Store, "store")
	add(old.HTTP.Listen != cur.HTTP.Listen, "http.listen")
	add(old.HTTP.TLS != cur.HTTP.TLS, "http.tls")
	add(old.HTTP.MaxRequestBytes != cur.HTTP.MaxRequestBytes || old.HTTP.MaxConnections != cur.HTTP.MaxConnections ||
		old.HTTP.ReadTimeout != cur.HTTP.ReadTimeout || old.HTTP.WriteTimeout != cur.HTTP.WriteTimeout, "http limits and time-outs")
	add(old.HL7v2.Listen != cur.HL7v2.Listen, "hl7v2.listen")
	add(old.HL7v2.TLS != cur.HL7v2.TLS, "hl7v2.tls")
	add(old.HL7v2.Forward != cur.HL7v2.Forward, "hl7v2.forward")
	add(old.HL7v2.ForwardTLS != cur.HL7v2.ForwardTLS, "hl7v2.forward_tls")
	add(old.HL7v2.MaxFrameBytes != cur.HL7v2.MaxFrameBytes || old.HL7v2.MaxConnections != cur.HL7v2.MaxConnections ||
		old.HL7v2.ReadTimeout != cur.HL7v2.ReadTimeout || old.HL7v2.IdleTimeout != cur.HL7v2.IdleTimeout ||
		old.HL7v2.AckTimeout != cur.HL7v2.AckTimeout, "hl7v2 limits and time-outs")
	add(old.HL7v2.Retry != cur.HL7v2.Retry, "hl7v2.retry")
	add(old.FHIR.Forward != cur.FHIR.Forward, "fhir.forward")
	add(old.FHIR.ForwardTokenFile != cur.FHIR.ForwardTokenFile || old.FHIR.ForwardToken() != cur.FHIR.ForwardToken(), "fhir.forward_token_file")
	add(old.FHIR.PatientSource != cur.FHIR.PatientSource || old.FHIR.PatientCacheTTL != cur.FHIR.PatientCacheTTL, "fhir.patient_source")
	add(old.FHIR.Retry != cur.FHIR.Retry, "fhir.retry")
	return keys
}

func (a *App) outboxStats(ctx context.Context) ([]telemetry.OutboxStat, error) {
	stats, err := a.store.OutboxStats(ctx)
	if err != nil {
		return nil, err
	}
	out := make([]telemetry.OutboxStat, 0, len(stats))
	for _, s := range stats {
		out = append(out, telemetry.OutboxStat{Destination: s.Destination, Pending: int(s.Pending), OldestPending: s.OldestPendingAge, Parked: int(s.Parked)})
	}
	return out, nil
}
