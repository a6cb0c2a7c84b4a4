package batch

import (
	"bufio"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"io"
	"math"
)

// Format is an output format.
type Format string

// Output formats.
const (
	FormatCSV  Format = "csv"
	FormatJSON Format = "json"
)

// ParseFormat accepts "csv" or "json".
func ParseFormat(s string) (Format, error) {
	switch f := Format(s); f {
	case FormatCSV, FormatJSON:
		return f, nil
	default:
		return "", fmt.Errorf("batch: unknown format %q (want %s or %s)", s, FormatCSV, FormatJSON)
	}
}

// Writer writes output rows one at a time. Close finishes the output (the
// closing bracket of a JSON array) and flushes it; it does not close the
// underlying io.Writer.
type Writer interface {
	Write(Row) error
	Close() error
}

// NewWriter returns a writer of format f.
func NewWriter(w io.Writer, f Format, h Header) (Writer, error) {
	switch f {
	case FormatCSV:
		return NewCSVWriter(w, h), nil
	case FormatJSON:
		return NewJSONWriter(w, h), nil
	default:
		return nil, fmt.Errorf("batch: unknown format %q (want %s or %s)", f, FormatCSV, FormatJSON)
	}
}

// CSVWriter writes rows as CSV with a header row.
type CSVWriter struct {
	w      *csv.Writer
	h      Header
	header bool
}

// NewCSVWriter returns a CSV writer. The header row is written with the
// first row, or by Close when there is none. Each row is flushed to w as it
// is written.
func NewCSVWriter(w io.Writer, h Header) *CSVWriter {
	return &CSVWriter{w: csv.NewWriter(w), h: h}
}

func (c *CSVWriter) writeHeader() error {
	if c.header {
		return nil
	}
	c.header = true
	if err := c.w.Write(c.h.Names()); err != nil {
		return fmt.Errorf("batch: writing CSV header: %w", err)
	}
	return nil
}

// Write writes one row.
func (c *CSVWriter) Write(r Row) error {
	if err := c.writeHeader(); err != nil {
		return err
	}
	if err := c.w.Write(c.h.Values(r)); err != nil {
		return fmt.Errorf("batch: writing CSV row: %w", err)
	}
	// Flush per row so that a consumer (a pipe, a terminal) sees each row
	// as soon as it is computed.
	c.w.Flush()
	if err := c.w.Error(); err != nil {
		return fmt.Errorf("batch: writing CSV row: %w", err)
	}
	return nil
}

// Close writes the header if no row was written and flushes.
func (c *CSVWriter) Close() error {
	if err := c.writeHeader(); err != nil {
		return err
	}
	c.w.Flush()
	if err := c.w.Error(); err != nil {
		return fmt.Errorf("batch: writing CSV: %w", err)
	}
	return nil
}

// JSONWriter writes rows as a JSON array of objects whose keys are the CSV
// column names (in the same order, values as the same text) plus "steps"
// and "comments".
type JSONWriter struct {
	w     *bufio.Writer
	h     Header
	names []string
	n     int
}

// NewJSONWriter returns a JSON writer. Each element is flushed to w as it is
// written.
func NewJSONWriter(w io.Writer, h Header) *JSONWriter {
	return &JSONWriter{w: bufio.NewWriter(w), h: h, names: h.Names()}
}

// jsonStep is a calc.Step whose value is null when it is not finite (JSON
// has no NaN or infinity).
type jsonStep struct {
	Name    string   `json:"name"`
	Formula string   `json:"formula"`
	Value   *float64 `json:"value"`
}

// Write writes one row as one array element.
func (j *JSONWriter) Write(r Row) error {
	sep := ",\n"
	if j.n == 0 {
		sep = "[\n"
	}
	j.n++
	buf := []byte(sep + "  {")
	for i, v := range j.h.Values(r) {
		if i > 0 {
			buf = append(buf, ", "...)
		}
		buf = appendJSON(buf, j.names[i])
		buf = append(buf, ": "...)
		buf = appendJSON(buf, v)
	}
	steps := make([]jsonStep, 0, len(r.Steps))
	for _, s := range r.Steps {
		js := jsonStep{Name: s.Name, Formula: s.Formula}
		if !math.IsNaN(s.Value) && !math.IsInf(s.Value, 0) {
			v := s.Value
			js.Value = &v
		}
		steps = append(steps, js)
	}
	buf = append(buf, `, "steps": `...)
	buf = appendJSON(buf, steps)
	buf = append(buf, `, "comments": `...)
	buf = appendJSON(buf, nonNil(r.Comments))
	buf = append(buf, '}')
	if _, err := j.w.Write(buf); err != nil {
		return fmt.Errorf("batch: writing JSON: %w", err)
	}
	if err := j.w.Flush(); err != nil { // one element at a time, as the CSV writer
		return fmt.Errorf("batch: writing JSON: %w", err)
	}
	return nil
}

// Close ends the array and flushes.
func (j *JSONWriter) Close() error {
	end := "\n]\n"
	if j.n == 0 {
		end = "[]\n"
	}
	if _, err := j.w.WriteString(end); err != nil {
		return fmt.Errorf("batch: writing JSON: %w", err)
	}
	if err := j.w.Flush(); err != nil {
		return fmt.Errorf("batch: writing JSON: %w", err)
	}
	return nil
}

// appendJSON appends the JSON encoding of a string, string slice or step
// slice; those never fail to encode.
func appendJSON(buf []byte, v any) []byte {
	b, err := json.Marshal(v)
	if err != nil {
		// Unreachable for the types above; keep the output valid JSON.
		return append(buf, "null"...)
	}
	return append(buf, b...)
}

func nonNil(s []string) []string {
	if s == nil {
		return []string{}
	}
	return s
}

// compile-time checks.
var (
	_ Writer = (*CSVWriter)(nil)
	_ Writer = (*JSONWriter)(nil)
)
