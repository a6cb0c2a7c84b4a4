package main

import (
	"context"
	"log/slog"
	"os"
	"os/signal"
	"syscall"
	"time"

	"github.com/spf13/cobra"

	"filtrate/internal/app"
)

func newServeCmd(version string) *cobra.Command {
	var opts struct {
		config   string
		logLevel string
		shutdown time.Duration
	}
	cmd := &cobra.Command{
		Use:   "serve",
		Short: "Run the daemon: HL7 v2 over MLLP, FHIR and metrics over HTTP",
		Long: `Run the daemon. Without --config it uses the built-in default: the embedded
store ./filtrate.db, HL7 v2 on 127.0.0.1:2575, HTTP on 127.0.0.1:8080, the
nkf-asn-2021 policy, and no forwarding.

SIGHUP (or POST /-/reload) reloads the configuration file: the new one is built
and validated completely, then swapped in; on any error the old one stays.
SIGTERM and SIGINT stop accepting, drain in-flight messages and exit.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			var level slog.Level
			if err := level.UnmarshalText([]byte(opts.logLevel)); err != nil {
				return err
			}
			logger := slog.New(slog.NewJSONHandler(cmd.ErrOrStderr(), &slog.HandlerOptions{Level: level}))
			a, err := app.New(cmd.Context(), app.Options{ConfigFile: opts.config, Version: version, Logger: logger, ShutdownTimeout: opts.shutdown})
			if err != nil {
				return err
			}
			ctx, cancel := context.WithCancel(cmd.Context())
			defer cancel()
			hup := make(chan os.Signal, 1)
			signal.Notify(hup, syscall.SIGHUP)
			defer signal.Stop(hup)
			go func() {
				for {
					select {
					case <-ctx.Done():
						return
					case <-hup:
						_ = a.Reload() // logged, and kept in the reload metric
					}
				}
			}()
			return a.Run(ctx)
		},
	}
	cmd.Flags().StringVar(&opts.config, "config", "", "configuration file (YAML); default: built-in")
	cmd.Flags().StringVar(&opts.logLevel, "log-level", "info", "log level: debug, info, warn, error")
	cmd.Flags().DurationVar(&opts.shutdown, "shutdown-timeout", 40*time.Second, "deadline for a graceful stop: drain in-flight messages, finish deliveries, close the store")
	return cmd
}
