package audit

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"io"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"filtrate/calc"
	"filtrate/store"
)

// RecordWriter writes audit records in some format. Close finishes the
// output (a closing bracket, a flush) and must be called once, also when no
// record was written.
type RecordWriter interface {
	Write(rec store.AuditRecord) error
	Close() error
}

// searchPage is how many records Each asks the store for at a time.
const searchPage = 1000

// Each calls fn for the records matching f, newest first, reading the store
// a page at a time (so f.Limit may exceed the store's cap of 10000). f.Limit
// caps the total; 0 means no cap. f.BeforeID is honoured as the starting
// point. Each stops at the first error from fn and returns it.
func Each(ctx context.Context, src Source, f store.Filter, fn func(store.AuditRecord) error) error {
	limit := f.Limit
	n := 0
	for {
		page := searchPage
		if limit > 0 && limit-n < page {
			page = limit - n
		}
		pf := f
		pf.Limit = page
		recs, err := src.Search(ctx, pf)
		if err != nil {
			return fmt.Errorf("audit: search: %w", err)
		}
		for _, r := range recs {
			if err := fn(r); err != nil {
				return err
			}
		}
		n += len(recs)
		if len(recs) < page || (limit > 0 && n >= limit) {
			return nil
		}
		f.BeforeID = recs[len(recs)-1].ID
	}
}

// Export writes the records matching f (newest first; f.Limit 0 means all)
// to rw and closes it. It returns how many records it wrote.
func Export(ctx context.Context, src Source, f store.Filter, rw RecordWriter) (int64, error) {
	var n int64
	err := Each(ctx, src, f, func(r store.AuditRecord) error {
		if err := rw.Write(r); err != nil {
			return err
		}
		n++
		return nil
	})
	if cerr := rw.Close(); err == nil {
		err = cerr
	}
	return n, err
}

// ExportCSV writes the records matching f to w as CSV; see [NewCSVWriter].
func ExportCSV(ctx context.Context, w io.Writer, src Source, f store.Filter) (int64, error) {
	return Export(ctx, src, f, NewCSVWriter(w))
}

// ExportFHIR writes the records matching f to w as a FHIR R4 Bundle; see
// [NewFHIRWriter].
func ExportFHIR(ctx context.Context, w io.Writer, src Source, f store.Filter, opts FHIROptions) (int64, error) {
	return Export(ctx, src, f, NewFHIRWriter(w, opts))
}

// Summary is the one-line view of a record used by "audit search --json":
// no date of birth, no sex, no steps.
type Summary struct {
	ID              int64    `json:"id"`
	RecordedAt      string   `json:"recorded_at"`
	Transport       string   `json:"transport"`
	MessageID       string   `json:"message_id"`
	PatientID       string   `json:"patient_id"`
	CollectedAt     string   `json:"collected_at,omitempty"`
	Equation        string   `json:"equation"`
	EquationVersion string   `json:"equation_version"`
	Exact           *float64 `json:"exact"`
	Reported        string   `json:"reported"`
	Unit            string   `json:"unit"`
	Category        string   `json:"category"`
	// Suppressed is the suppression reason code; "" when a value was
	// reported.
	Suppressed      string `json:"suppressed"`
	Policy          string `json:"policy"`
	PolicyVersion   string `json:"policy_version"`
	OutputMessageID string `json:"output_message_id"`
	ContentHash     string `json:"content_hash"`
}

// Summarize returns the summary of rec.
func Summarize(rec store.AuditRecord) Summary {
	return Summary{
		ID: rec.ID, RecordedAt: timeText(rec.RecordedAt), Transport: rec.Transport,
		MessageID: rec.MessageID, PatientID: rec.PatientID, CollectedAt: timeText(rec.CollectedAt),
		Equation: rec.Equation, EquationVersion: rec.EquationVersion, Exact: rec.Exact,
		Reported: rec.Reported, Unit: rec.Unit, Category: rec.Category, Suppressed: rec.SuppressionCode,
		Policy: rec.Policy, PolicyVersion: rec.PolicyVersion, OutputMessageID: rec.OutputMessageID,
		ContentHash: rec.ContentHash,
	}
}

// NewSearchWriter returns the writer of "audit search": one JSON object
// ([Summary]) per line when jsonLines is set, otherwise an aligned table
// with a header line: ID, recorded at (UTC), message ID, patient ID,
// equation, reported value and unit, category, suppression code.
func NewSearchWriter(w io.Writer, jsonLines bool) RecordWriter {
	if jsonLines {
		return &jsonLinesWriter{enc: json.NewEncoder(w)}
	}
	tw := tabwriter.NewWriter(w, 0, 8, 2, ' ', 0)
	fmt.Fprintln(tw, "ID\tRECORDED (UTC)\tMESSAGE\tPATIENT\tEQUATION\tREPORTED\tCATEGORY\tSUPPRESSED")
	return &tableWriter{tw: tw}
}

type jsonLinesWriter struct{ enc *json.Encoder }

func (j *jsonLinesWriter) Write(rec store.AuditRecord) error { return j.enc.Encode(Summarize(rec)) }
func (j *jsonLinesWriter) Close() error                      { return nil }

type tableWriter struct{ tw *tabwriter.Writer }

func (t *tableWriter) Write(rec store.AuditRecord) error {
	dash := func(s string) string {
		if s == "" {
			return "-"
		}
		// A tab or newline received in a field would break the table.
		return strings.Map(func(r rune) rune {
			if r == '\t' || r == '\n' || r == '\r' {
				return ' '
			}
			return r
		}, s)
	}
	reported := rec.Reported
	if reported != "" && rec.Unit != "" {
		reported += " " + rec.Unit
	}
	rt := ""
	if !rec.RecordedAt.IsZero() {
		rt = rec.RecordedAt.UTC().Format("2006-01-02T15:04:05Z")
	}
	_, err := fmt.Fprintf(t.tw, "%d\t%s\t%s\t%s\t%s\t%s\t%s\t%s\n", rec.ID, dash(rt), dash(rec.MessageID),
		dash(rec.PatientID), dash(rec.Equation), dash(reported), dash(rec.Category), dash(rec.SuppressionCode))
	return err
}

func (t *tableWriter) Close() error { return t.tw.Flush() }

// CSVColumns returns the columns of the CSV export, in order.
func CSVColumns() []string {
	return []string{
		"id", "recorded_at", "transport", "message_id", "raw_hash", "patient_id", "collected_at",
		"inputs", "equation", "equation_version", "steps", "exact", "reported", "unit", "category",
		"comments", "suppression_code", "suppression_text", "policy", "policy_version", "config_hash",
		"software_version", "output_message_id", "content_hash", "prev_hash",
	}
}

// CSVWriter writes records as CSV for spreadsheets (RFC 4180, header row,
// columns of [CSVColumns]). Times are UTC RFC 3339; exact is the shortest
// decimal that round-trips, without exponent; inputs are rendered as
// "analyte value unit -> used unit [calibration ID vN]; ...", steps as
// "name=value; ..." and comments joined with " | ". Of the patient it
// carries the identifier only (no date of birth or sex).
//
// A text field received from outside that starts with =, +, -, @, tab or
// carriage return is prefixed with a single quote, so that a spreadsheet
// does not run it as a formula (OWASP, "CSV Injection").
type CSVWriter struct {
	w      *csv.Writer
	header bool
}

// NewCSVWriter returns a CSVWriter on w.
func NewCSVWriter(w io.Writer) *CSVWriter { return &CSVWriter{w: csv.NewWriter(w)} }

// Write implements RecordWriter.
func (c *CSVWriter) Write(rec store.AuditRecord) error {
	if err := c.writeHeader(); err != nil {
		return err
	}
	exact := ""
	if rec.Exact != nil {
		exact = strconv.FormatFloat(*rec.Exact, 'f', -1, 64)
	}
	row := []string{
		strconv.FormatInt(rec.ID, 10), timeText(rec.RecordedAt), safeCell(rec.Transport),
		safeCell(rec.MessageID), rec.RawHash, safeCell(rec.PatientID), timeText(rec.CollectedAt),
		safeCell(inputsText(rec.Inputs)), rec.Equation, rec.EquationVersion, safeCell(stepsText(rec.Steps)),
		exact, safeCell(rec.Reported), rec.Unit, rec.Category, safeCell(strings.Join(rec.Comments, " | ")),
		rec.SuppressionCode, safeCell(rec.SuppressionText), safeCell(rec.Policy), safeCell(rec.PolicyVersion),
		rec.ConfigHash, safeCell(rec.SoftwareVersion), safeCell(rec.OutputMessageID), rec.ContentHash, rec.PrevHash,
	}
	if err := c.w.Write(row); err != nil {
		return fmt.Errorf("audit: write CSV: %w", err)
	}
	return nil
}

// Close implements RecordWriter: it writes the header if no record was
// written, and flushes.
func (c *CSVWriter) Close() error {
	if err := c.writeHeader(); err != nil {
		return err
	}
	c.w.Flush()
	if err := c.w.Error(); err != nil {
		return fmt.Errorf("audit: write CSV: %w", err)
	}
	return nil
}

func (c *CSVWriter) writeHeader() error {
	if c.header {
		return nil
	}
	c.header = true
	if err := c.w.Write(CSVColumns()); err != nil {
		return fmt.Errorf("audit: write CSV: %w", err)
	}
	return nil
}

func safeCell(s string) string {
	if s != "" && strings.ContainsRune("=+-@\t\r", rune(s[0])) {
		return "'" + s
	}
	return s
}

// stepsText renders worked steps compactly: "name=value; ...".
func stepsText(raw json.RawMessage) string {
	if len(raw) == 0 {
		return ""
	}
	var steps []calc.Step
	if err := json.Unmarshal(raw, &steps); err != nil {
		return string(raw)
	}
	parts := make([]string, len(steps))
	for i, s := range steps {
		parts[i] = s.Name + "=" + formatExact(s.Value)
	}
	return strings.Join(parts, "; ")
}

// inputsText renders inputs compactly:
// "creatinine 0.92 mg/dL -> 0.92 mg/dL [CAL-1 v2]; ...".
func inputsText(raw json.RawMessage) string {
	if len(raw) == 0 {
		return ""
	}
	var ins []calc.InputUse
	if err := json.Unmarshal(raw, &ins); err != nil {
		return string(raw)
	}
	parts := make([]string, len(ins))
	for i, in := range ins {
		s := fmt.Sprintf("%s %s %s -> ", in.Analyte, in.ValueText, in.Unit)
		if in.Accepted {
			s += formatExact(in.Used) + " " + in.UsedUnit
		} else {
			s += "not used"
		}
		if in.Calibration != "" {
			s += fmt.Sprintf(" [%s v%s]", in.Calibration, in.CalibrationV)
		}
		parts[i] = s
	}
	return strings.Join(parts, "; ")
}

// ParseTime reads a time given on the command line: RFC 3339 (with or
// without fractional seconds), or a date YYYY-MM-DD meaning midnight at the
// start of that day in loc (UTC when nil). With endOfDay, a date means
// midnight at the end of that day, so that an exclusive upper bound
// "--until 2026-11-30" includes the whole of that day.
func ParseTime(s string, loc *time.Location, endOfDay bool) (time.Time, error) {
	if loc == nil {
		loc = time.UTC
	}
	if t, err := time.Parse(time.RFC3339Nano, s); err == nil {
		return t, nil
	}
	d, err := time.ParseInLocation(time.DateOnly, s, loc)
	if err != nil {
		return time.Time{}, fmt.Errorf("want RFC 3339 (2006-01-02T15:04:05Z) or a date (2006-01-02), not %q", s)
	}
	if endOfDay {
		d = d.AddDate(0, 0, 1)
	}
	return d, nil
}
