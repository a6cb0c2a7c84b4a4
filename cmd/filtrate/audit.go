package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/spf13/cobra"

	"filtrate/config"
	"filtrate/internal/audit"
	"filtrate/store"
)

// auditOptions are the flags shared by the "audit" commands.
type auditOptions struct {
	config string // configuration file; "" is the built-in default
}

// auditFilterFlags are the record filters of "audit search" and
// "audit export".
type auditFilterFlags struct {
	patient, messageID, equation string
	since, until                 string
	limit                        int
}

func (f *auditFilterFlags) register(cmd *cobra.Command, defaultLimit int, limitHelp string) {
	fl := cmd.Flags()
	fl.StringVar(&f.patient, "patient", "", "patient identifier, exactly as received")
	fl.StringVar(&f.messageID, "message-id", "", "source message control ID")
	fl.StringVar(&f.since, "since", "", "records recorded at or after this time (RFC 3339, or YYYY-MM-DD in the configured time zone)")
	fl.StringVar(&f.until, "until", "", "records recorded before this time (RFC 3339, or YYYY-MM-DD: through the end of that day)")
	fl.StringVar(&f.equation, "equation", "", "equation ID, e.g. ckd-epi-2021-cr")
	fl.IntVar(&f.limit, "limit", defaultLimit, limitHelp)
}

func (f *auditFilterFlags) filter(loc *time.Location) (store.Filter, error) {
	sf := store.Filter{PatientID: f.patient, MessageID: f.messageID, Equation: f.equation, Limit: f.limit}
	var err error
	if f.since != "" {
		if sf.Since, err = audit.ParseTime(f.since, loc, false); err != nil {
			return sf, fmt.Errorf("--since: %w", err)
		}
	}
	if f.until != "" {
		if sf.Until, err = audit.ParseTime(f.until, loc, true); err != nil {
			return sf, fmt.Errorf("--until: %w", err)
		}
	}
	if f.limit < 0 {
		return sf, fmt.Errorf("--limit must not be negative")
	}
	return sf, nil
}

// openFiltered loads the configuration, turns the filter flags into a
// store filter in the configured time zone and opens the store.
func openFiltered(ctx context.Context, cfgPath string, ff *auditFilterFlags, name string) (store.Store, store.Filter, error) {
	cfg, err := auditConfig(cfgPath)
	if err != nil {
		return nil, store.Filter{}, err
	}
	loc, err := cfg.Location()
	if err != nil {
		return nil, store.Filter{}, err
	}
	f, err := ff.filter(loc)
	if err != nil {
		return nil, store.Filter{}, fmt.Errorf("%s: %w", name, err)
	}
	s, err := openAuditStore(ctx, cfg, nil)
	if err != nil {
		return nil, store.Filter{}, fmt.Errorf("%s: %w", name, err)
	}
	return s, f, nil
}

// auditConfig loads the configuration file, or the built-in default.
func auditConfig(path string) (*config.Config, error) {
	if path == "" {
		return config.Default(), nil
	}
	return config.LoadFile(path)
}

// openAuditStore opens the store the configuration names for reading. It
// never migrates (an auditor's database role may not), and it refuses a
// store file that does not exist rather than create an empty one.
func openAuditStore(ctx context.Context, cfg *config.Config, logger *slog.Logger) (store.Store, error) {
	kind, target, err := config.ParseStore(cfg.Store)
	if err != nil {
		return nil, fmt.Errorf("store: %w", err)
	}
	if kind == config.StoreFile {
		path, _, _ := strings.Cut(target, "?")
		if _, err := os.Stat(path); err != nil {
			return nil, fmt.Errorf("store file %s: %w", path, err)
		}
	}
	if logger == nil {
		logger = slog.New(slog.DiscardHandler)
	}
	s, err := store.Open(ctx, cfg.Store, store.WithoutMigrations(), store.WithLogger(logger))
	if errors.Is(err, store.ErrMigrationsPending) {
		return nil, fmt.Errorf(`%w: run "filtrate store migrate" first`, err)
	}
	return s, err
}

func newAuditCmd() *cobra.Command {
	opts := &auditOptions{}
	cmd := &cobra.Command{
		Use:   "audit",
		Short: "The auditor's view: search, show, verify and export audit records",
		Long: `Every eGFR filtrate reports, and every one it refuses, leaves an audit record
holding what is needed to reproduce it: the inputs as received and as used, the
equation and its version, every step of the arithmetic, the policy and the
configuration hash. Records form a hash chain.

  search   find records (one line each, or JSON lines)
  show     one record in full, with a recomputation verdict (shows patient data)
  verify   check the hash chain and recompute every record
  export   records as CSV, or as a FHIR R4 Bundle of Provenance and AuditEvent
  checkpoint  the chain head, to keep outside the database (see verify --checkpoints)

The store is the one the configuration names (--config; default file:filtrate.db).
The audit commands never change the store.`,
	}
	cmd.PersistentFlags().StringVar(&opts.config, "config", "", "configuration file (YAML) naming the store; default: built-in (file:filtrate.db)")
	cmd.AddCommand(newAuditSearchCmd(opts), newAuditShowCmd(opts), newAuditVerifyCmd(opts), newAuditExportCmd(opts), newAuditCheckpointCmd(opts))
	return cmd
}

func newAuditSearchCmd(opts *auditOptions) *cobra.Command {
	var (
		ff      auditFilterFlags
		jsonOut bool
	)
	cmd := &cobra.Command{
		Use:   "search [--patient ID] [--message-id ID] [--since T] [--until T] [--equation ID] [--limit N] [--json]",
		Short: "Find audit records, newest first",
		Long: `Find audit records, newest first, one line each: ID, recorded time (UTC), source
message ID, patient ID, equation, reported value and unit, KDIGO category and
suppression code ("-" when empty). With --json, one JSON object per line.`,
		Example: `  filtrate audit search --patient 12345 --since 2026-11-01
  filtrate audit search --message-id MSG00042 --json`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			s, f, err := openFiltered(cmd.Context(), opts.config, &ff, "audit search")
			if err != nil {
				return err
			}
			defer s.Close()
			if _, err := audit.Export(cmd.Context(), s, f, audit.NewSearchWriter(cmd.OutOrStdout(), jsonOut)); err != nil {
				return fmt.Errorf("audit search: %w", err)
			}
			return nil
		},
	}
	ff.register(cmd, 100, "at most this many records (0: all)")
	cmd.Flags().BoolVar(&jsonOut, "json", false, "one JSON object per line")
	return cmd
}

func newAuditShowCmd(opts *auditOptions) *cobra.Command {
	return &cobra.Command{
		Use:   "show ID",
		Short: "Show one audit record in full, with its recomputation (displays patient data)",
		Long: `Show one audit record as a person reads it: the source message, the patient as
received, each input as received and as used (unit conversion, calibration rule
and version), the equation and version, every step of the arithmetic, the exact
and reported value, comments, suppression, policy, configuration hash, software
version and chain hashes. The last line recomputes the record from its stored
request and says whether the result is the same.

This is the one command that displays patient data.`,
		Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			id, err := strconv.ParseInt(args[0], 10, 64)
			if err != nil || id <= 0 {
				return fmt.Errorf("audit show: the record ID must be a positive integer")
			}
			cfg, err := auditConfig(opts.config)
			if err != nil {
				return err
			}
			s, err := openAuditStore(cmd.Context(), cfg, nil)
			if err != nil {
				return fmt.Errorf("audit show: %w", err)
			}
			defer s.Close()
			rec, err := s.Record(cmd.Context(), id)
			if errors.Is(err, store.ErrNotFound) {
				return fmt.Errorf("audit show: no audit record %d", id)
			}
			if err != nil {
				return fmt.Errorf("audit show: %w", err)
			}
			v, _ := audit.Recompute(rec) // a failure is part of the verdict shown
			return audit.Render(cmd.OutOrStdout(), rec, v)
		},
	}
}

// auditVerifyOptions are the flags of "audit verify".
type auditVerifyOptions struct {
	since       string
	checkpoints string
	logLevel    string
	// logger, when set (tests), replaces the JSON logger on standard error.
	logger *slog.Logger
}

func newAuditVerifyCmd(opts *auditOptions) *cobra.Command {
	var vo auditVerifyOptions
	cmd := &cobra.Command{
		Use:   "verify [--since T]",
		Short: "Verify the hash chain and recompute every record",
		Long: `Walk the audit chain in order. For each record: check its content hash and its
link to the record before, and recompute it from its stored request with the
equation version it names; the unrounded value must be identical bit for bit,
the reported text and category equal, a refusal must recur. At the end the
chain must end at the head the store tracks.

With --since, start at the first record recorded at or after that time (still
checking its link to the record before).

Progress goes to standard error on long runs; findings, by record ID, and a
summary go to standard output. The exit status is 0 when everything holds, 2
when anything does not, 1 when the store cannot be read.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runAuditVerify(cmd.Context(), opts, vo, cmd.OutOrStdout(), cmd.ErrOrStderr())
		},
	}
	cmd.Flags().StringVar(&vo.since, "since", "", "start at the first record recorded at or after this time (RFC 3339, or YYYY-MM-DD)")
	cmd.Flags().StringVar(&vo.checkpoints, "checkpoints", "", "file of checkpoints from \"audit checkpoint\", kept outside the database, to check as well")
	cmd.Flags().StringVar(&vo.logLevel, "log-level", "error", "log level of the JSON log on standard error: debug, info, warn, error")
	return cmd
}

// runAuditVerify is "audit verify" without cobra, so that tests can inject
// a logger.
func runAuditVerify(ctx context.Context, opts *auditOptions, vo auditVerifyOptions, stdout, stderr io.Writer) error {
	logger := vo.logger
	if logger == nil {
		var level slog.Level
		if err := level.UnmarshalText([]byte(vo.logLevel)); err != nil {
			return fmt.Errorf("audit verify: --log-level: %w", err)
		}
		logger = slog.New(slog.NewJSONHandler(stderr, &slog.HandlerOptions{Level: level}))
	}
	cfg, err := auditConfig(opts.config)
	if err != nil {
		return err
	}
	vopts := audit.VerifyOptions{
		Logger: logger,
		Progress: func(n int64) {
			fmt.Fprintf(stderr, "verified %d records…\n", n)
		},
	}
	if vo.since != "" {
		loc, err := cfg.Location()
		if err != nil {
			return err
		}
		if vopts.Since, err = audit.ParseTime(vo.since, loc, false); err != nil {
			return fmt.Errorf("audit verify: --since: %w", err)
		}
	}
	if vo.checkpoints != "" {
		f, err := os.Open(vo.checkpoints)
		if err != nil {
			return fmt.Errorf("audit verify: --checkpoints: %w", err)
		}
		vopts.Checkpoints, err = audit.ReadCheckpoints(f)
		f.Close()
		if err != nil {
			return fmt.Errorf("audit verify: --checkpoints: %w", err)
		}
	}
	s, err := openAuditStore(ctx, cfg, logger)
	if err != nil {
		return fmt.Errorf("audit verify: %w", err)
	}
	defer s.Close()
	rep, err := audit.Verify(ctx, s, vopts)
	if err != nil {
		return err
	}
	for _, p := range rep.Problems {
		fmt.Fprintln(stdout, p.String())
	}
	fmt.Fprintln(stdout, verifySummary(rep))
	if !rep.OK() {
		return exitCode(2)
	}
	return nil
}

func verifySummary(rep audit.Report) string {
	rng := "no records"
	if rep.Checked > 0 {
		rng = fmt.Sprintf("%d records (%d-%d)", rep.Checked, rep.FirstID, rep.LastID)
	}
	head := fmt.Sprintf("chain head %d", rep.Head.LastID)
	if rep.OK() {
		return fmt.Sprintf("audit verify: OK: %s, %s; %d recomputed identically, %d with nothing to recompute",
			rng, head, rep.Recomputed, rep.NotApplicable)
	}
	counts := rep.Counts()
	kinds := make([]string, 0, len(counts))
	for k := range counts {
		kinds = append(kinds, string(k))
	}
	sort.Strings(kinds)
	parts := make([]string, len(kinds))
	for i, k := range kinds {
		parts[i] = fmt.Sprintf("%d %s", counts[audit.ProblemKind(k)], k)
	}
	return fmt.Sprintf("audit verify: FAILED: %d problems (%s) in %s, %s; %d recomputed identically",
		len(rep.Problems), strings.Join(parts, ", "), rng, head, rep.Recomputed)
}

func newAuditExportCmd(opts *auditOptions) *cobra.Command {
	var (
		ff     auditFilterFlags
		format string
		out    string
	)
	cmd := &cobra.Command{
		Use:   "export --format csv|fhir [--patient ID] [--message-id ID] [--since T] [--until T] [--equation ID] [--limit N] [--out FILE]",
		Short: "Export audit records as CSV or as a FHIR R4 Bundle",
		Long: `Export the records matching the filters, newest first.

csv:  one row per record for spreadsheets: the main fields, the inputs as
      received and used, and the steps as "name=value; ...". Of the patient it
      holds the identifier only.
fhir: a FHIR R4 Bundle (type collection) with a Provenance and an AuditEvent per
      record: the equation and version, policy, configuration hash, source
      message and its SHA-256, chain hashes. It holds no patient data.

With --out the file is written completely (mode 0600) or not at all.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if format != "csv" && format != "fhir" {
				return fmt.Errorf("audit export: --format: want csv or fhir, not %q", format)
			}
			s, f, err := openFiltered(cmd.Context(), opts.config, &ff, "audit export")
			if err != nil {
				return err
			}
			defer s.Close()
			var n int64
			write := func(w io.Writer) error {
				var rw audit.RecordWriter = audit.NewCSVWriter(w)
				if format == "fhir" {
					rw = audit.NewFHIRWriter(w, audit.FHIROptions{})
				}
				n, err = audit.Export(cmd.Context(), s, f, rw)
				return err
			}
			if out == "" || out == "-" {
				err = write(cmd.OutOrStdout())
			} else {
				err = writeAuditFile(out, write)
			}
			if err != nil {
				return fmt.Errorf("audit export: %w", err)
			}
			fmt.Fprintf(cmd.ErrOrStderr(), "audit export: wrote %d records\n", n)
			return nil
		},
	}
	ff.register(cmd, 0, "at most this many records (0: all)")
	cmd.Flags().StringVar(&format, "format", "", "csv or fhir (required)")
	cmd.Flags().StringVar(&out, "out", "", "output file (default standard output)")
	_ = cmd.MarkFlagRequired("format")
	return cmd
}

// writeAuditFile runs write against a temporary file beside path, readable
// by its owner only (an export holds patient identifiers), and renames it to
// path only when write succeeds.
func writeAuditFile(path string, write func(io.Writer) error) error {
	tmp, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return err
	}
	defer os.Remove(tmp.Name()) // no-op after the rename
	if err := write(tmp); err != nil {
		tmp.Close()
		return err
	}
	if err := tmp.Sync(); err != nil {
		tmp.Close()
		return err
	}
	if err := tmp.Close(); err != nil {
		return err
	}
	return os.Rename(tmp.Name(), path)
}

func newAuditCheckpointCmd(opts *auditOptions) *cobra.Command {
	var out string
	cmd := &cobra.Command{
		Use:   "checkpoint [--out FILE]",
		Short: "Export the chain head as a checkpoint to keep outside the database",
		Long: `Print the current chain head (last record ID, its hash and time) as one JSON
line, or append it to --out. Keep checkpoints where the database's
administrators cannot change them (write-once storage, the quality records), for
example from a daily timer. "audit verify --checkpoints FILE" then proves that
no checkpointed record was changed since, even by someone able to rewrite the
whole chain and recompute every hash.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			cfg, err := auditConfig(opts.config)
			if err != nil {
				return err
			}
			s, err := openAuditStore(cmd.Context(), cfg, nil)
			if err != nil {
				return fmt.Errorf("audit checkpoint: %w", err)
			}
			defer s.Close()
			cp, err := audit.TakeCheckpoint(cmd.Context(), s, time.Now())
			if err != nil {
				return err
			}
			w := cmd.OutOrStdout()
			if out != "" {
				f, err := os.OpenFile(out, os.O_APPEND|os.O_CREATE|os.O_WRONLY, 0o600)
				if err != nil {
					return fmt.Errorf("audit checkpoint: %w", err)
				}
				defer f.Close()
				w = f
			}
			if err := audit.WriteCheckpoint(w, cp); err != nil {
				return fmt.Errorf("audit checkpoint: %w", err)
			}
			if out != "" {
				fmt.Fprintf(cmd.OutOrStdout(), "checkpoint at record %d appended to %s\n", cp.LastID, out)
			}
			return nil
		},
	}
	cmd.Flags().StringVar(&out, "out", "", "append the checkpoint to this file instead of printing it")
	return cmd
}
