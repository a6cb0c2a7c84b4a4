package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"

	"github.com/spf13/cobra"

	"filtrate/calc"
	"filtrate/calc/batch"
)

// calcOptions are the flags of "filtrate calc".
type calcOptions struct {
	in         string // input file; "" or "-" is standard input
	out        string // output file; "" or "-" is standard output
	format     string
	policy     string
	sexUnknown string // "" keeps the preset's rule
}

func newCalcCmd() *cobra.Command {
	var opts calcOptions
	cmd := &cobra.Command{
		Use:   "calc",
		Short: "Batch verification of eGFR calculations (validation worksheet)",
		Long: `calc reads a worksheet of cases as CSV, computes each one as the daemon would
under the chosen policy, and writes the equation used, the unrounded value, the
reported text, the unit, the KDIGO category, or the reason no value is reported.

Input columns (header row required, any order, blanks allowed):
  id, age_years, sex, creatinine, creatinine_unit, cystatin_c, cystatin_c_unit,
  height, height_unit, weight, weight_unit, equation
and optionally, for a timed urine creatinine clearance:
  urine_creatinine, urine_creatinine_unit, urine_volume, urine_volume_unit,
  collection_hours

A blank equation lets the policy choose (only its primary result is written);
an equation ID runs that equation. Units are never guessed: a value with a
blank or unknown unit is refused (unit-unknown).

Output columns: the input columns, egfr_exact, reported, unit, category,
suppressed, and assumed_sex when the sex rule is "both".`,
		Example: `  filtrate calc --in worksheet.csv --out results.csv
  filtrate calc --policy nice-2021 --format json < worksheet.csv`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runCalc(cmd.Context(), opts, cmd.InOrStdin(), cmd.OutOrStdout(), cmd.ErrOrStderr())
		},
	}
	f := cmd.Flags()
	f.StringVar(&opts.in, "in", "", "worksheet CSV file (default standard input)")
	f.StringVar(&opts.out, "out", "", "output file (default standard output)")
	f.StringVar(&opts.format, "format", string(batch.FormatCSV), "output format: csv or json")
	f.StringVar(&opts.policy, "policy", "nkf-asn-2021", "reporting policy preset: "+strings.Join(calc.PresetNames(), ", "))
	f.StringVar(&opts.sexUnknown, "sex-unknown", "", `override the policy's rule for unknown sex: "refuse" or "both" (default: the preset's rule)`)
	return cmd
}

// runCalc is the calc command without cobra, so that tests can call it.
func runCalc(ctx context.Context, opts calcOptions, stdin io.Reader, stdout, stderr io.Writer) error {
	if ctx == nil {
		ctx = context.Background()
	}
	format, err := batch.ParseFormat(opts.format)
	if err != nil {
		return fmt.Errorf("calc: --format: %w", err)
	}
	reg := calc.Builtin()
	policy, err := calc.Preset(opts.policy)
	if err != nil {
		return fmt.Errorf("calc: --policy: %w", err)
	}
	switch rule := calc.SexRule(opts.sexUnknown); rule {
	case "":
	case calc.SexRuleRefuse, calc.SexRuleBoth:
		policy.SexUnknown = rule
	default:
		return fmt.Errorf("calc: --sex-unknown: want %q or %q, not %q", calc.SexRuleRefuse, calc.SexRuleBoth, opts.sexUnknown)
	}
	if err := policy.Validate(reg); err != nil {
		return fmt.Errorf("calc: %w", err)
	}

	in := stdin
	if opts.in != "" && opts.in != "-" {
		f, err := os.Open(opts.in)
		if err != nil {
			return fmt.Errorf("calc: %w", err)
		}
		defer f.Close()
		in = f
	}

	run := func(w io.Writer) (batch.Summary, error) {
		return batch.Run(ctx, in, w, batch.Options{
			Calculator: calc.NewCalculator(reg), Policy: policy, Format: format,
		})
	}
	var sum batch.Summary
	if opts.out == "" || opts.out == "-" {
		sum, err = run(stdout)
	} else {
		sum, err = writeFileAtomic(opts.out, run)
	}
	if err != nil {
		return fmt.Errorf("calc: %w", err)
	}
	fmt.Fprintf(stderr, "calc: %d records, %d rows: %d reported, %d suppressed (policy %s v%s)\n",
		sum.Records, sum.Rows, sum.Reported, sum.Suppressed, policy.Name, policy.Version)
	return nil
}

// writeFileAtomic runs write against a temporary file beside path and renames
// it to path only when write succeeds, so that a failed run never leaves a
// partial worksheet that looks complete.
func writeFileAtomic(path string, write func(io.Writer) (batch.Summary, error)) (batch.Summary, error) {
	tmp, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return batch.Summary{}, err
	}
	defer os.Remove(tmp.Name()) // no-op after the rename
	sum, err := write(tmp)
	if err != nil {
		tmp.Close()
		return sum, err
	}
	if err := tmp.Sync(); err != nil {
		tmp.Close()
		return sum, err
	}
	if err := tmp.Close(); err != nil {
		return sum, err
	}
	if err := os.Chmod(tmp.Name(), 0o644); err != nil {
		return sum, err
	}
	return sum, os.Rename(tmp.Name(), path)
}
