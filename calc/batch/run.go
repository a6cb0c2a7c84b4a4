package batch

import (
	"context"
	"errors"
	"fmt"
	"io"

	"filtrate/calc"
)

// Options configure Run.
type Options struct {
	// Calculator evaluates the requests; nil means calc.Builtin().
	Calculator *calc.Calculator
	// Policy is the reporting policy applied to every record.
	Policy calc.Policy
	// Format is the output format; empty means CSV.
	Format Format
}

// Summary counts what a run did. It carries no patient data and may be
// logged.
type Summary struct {
	Records    int // input records read
	Rows       int // output rows written
	Reported   int // rows with a value
	Suppressed int // rows without one
}

// Run reads the worksheet from r, evaluates every record and writes the rows
// to w, one record at a time. It stops at the first malformed record (the
// error names its line), when ctx is done, or when writing fails; rows
// already written stay written. The summary counts what was done before any
// error.
func Run(ctx context.Context, r io.Reader, w io.Writer, opt Options) (Summary, error) {
	var sum Summary
	format := opt.Format
	if format == "" {
		format = FormatCSV
	}
	if _, err := ParseFormat(string(format)); err != nil {
		return sum, err
	}
	rd, err := NewReader(r)
	if err != nil {
		return sum, err
	}
	ev := NewEvaluator(opt.Calculator, opt.Policy)
	out, err := NewWriter(w, format, ev.Header(rd.Columns()))
	if err != nil {
		return sum, err
	}
	for {
		if err := ctx.Err(); err != nil {
			return sum, fmt.Errorf("batch: %w", err)
		}
		rec, err := rd.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			// Close what was written so far so that the output stays well
			// formed up to the bad record; the read error is what matters.
			_ = out.Close()
			return sum, err
		}
		sum.Records++
		for _, row := range ev.Evaluate(rec) {
			if err := out.Write(row); err != nil {
				return sum, err
			}
			sum.Rows++
			if row.Suppressed == "" {
				sum.Reported++
			} else {
				sum.Suppressed++
			}
		}
	}
	if err := out.Close(); err != nil {
		return sum, err
	}
	return sum, nil
}
