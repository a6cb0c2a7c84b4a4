package batch

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"strings"

	"filtrate/calc"
)

// Input column names.
const (
	ColID                  = "id"
	ColAgeYears            = "age_years"
	ColSex                 = "sex"
	ColCreatinine          = "creatinine"
	ColCreatinineUnit      = "creatinine_unit"
	ColCystatinC           = "cystatin_c"
	ColCystatinCUnit       = "cystatin_c_unit"
	ColHeight              = "height"
	ColHeightUnit          = "height_unit"
	ColWeight              = "weight"
	ColWeightUnit          = "weight_unit"
	ColEquation            = "equation"
	ColUrineCreatinine     = "urine_creatinine"
	ColUrineCreatinineUnit = "urine_creatinine_unit"
	ColUrineVolume         = "urine_volume"
	ColUrineVolumeUnit     = "urine_volume_unit"
	ColCollectionHours     = "collection_hours"
)

// Output column names added after the input columns.
const (
	ColEGFRExact  = "egfr_exact"
	ColReported   = "reported"
	ColUnit       = "unit"
	ColCategory   = "category"
	ColSuppressed = "suppressed"
	ColAssumedSex = "assumed_sex"
)

// BaseColumns returns the input columns every output carries, in canonical
// order.
func BaseColumns() []string {
	return []string{
		ColID, ColAgeYears, ColSex, ColCreatinine, ColCreatinineUnit, ColCystatinC,
		ColCystatinCUnit, ColHeight, ColHeightUnit, ColWeight, ColWeightUnit, ColEquation,
	}
}

// ExtensionColumns returns the optional timed-urine columns, in canonical
// order.
func ExtensionColumns() []string {
	return []string{
		ColUrineCreatinine, ColUrineCreatinineUnit, ColUrineVolume, ColUrineVolumeUnit, ColCollectionHours,
	}
}

// measured maps each value column to its analyte and unit column. An empty
// unit column means a fixed unit (fixedUnit).
type measured struct {
	value, unit string
	analyte     calc.Analyte
	fixedUnit   string
}

func measuredColumns() []measured {
	return []measured{
		{value: ColCreatinine, unit: ColCreatinineUnit, analyte: calc.Creatinine},
		{value: ColCystatinC, unit: ColCystatinCUnit, analyte: calc.CystatinC},
		{value: ColHeight, unit: ColHeightUnit, analyte: calc.Height},
		{value: ColWeight, unit: ColWeightUnit, analyte: calc.Weight},
		{value: ColUrineCreatinine, unit: ColUrineCreatinineUnit, analyte: calc.UrineCreatinine},
		{value: ColUrineVolume, unit: ColUrineVolumeUnit, analyte: calc.UrineVolume},
		{value: ColCollectionHours, analyte: calc.CollectionTime, fixedUnit: "h"},
	}
}

// HeaderError reports a problem with the header row. Column names are not
// patient data and are named in the message.
type HeaderError struct {
	Column string // the offending column name, if any
	Reason string
}

func (e *HeaderError) Error() string {
	if e.Column == "" {
		return "batch: header: " + e.Reason
	}
	return fmt.Sprintf("batch: header: column %q: %s", e.Column, e.Reason)
}

// Record is one input record, not yet evaluated.
type Record struct {
	// Line is the input line on which the record starts (the header is
	// line 1 unless blank lines precede it).
	Line int
	// Values holds the cells by column name, as written, for the columns
	// present in the input.
	Values map[string]string
	// Request is the calculation the record asks for, without a policy
	// (the Evaluator supplies it). It is zero when Problem is set.
	Request calc.Request
	// Problem is set when the record cannot become a request.
	Problem calc.Reason
}

// Reader reads worksheet records from CSV, one at a time.
type Reader struct {
	cr      *csv.Reader
	columns []string       // input header, normalised, in file order
	present map[string]int // column name → index
}

// NewReader reads the header row from r and checks it.
func NewReader(r io.Reader) (*Reader, error) {
	cr := csv.NewReader(r)
	cr.ReuseRecord = false
	head, err := cr.Read()
	if errors.Is(err, io.EOF) {
		return nil, &HeaderError{Reason: "the input is empty; a header row is required"}
	}
	if err != nil {
		return nil, fmt.Errorf("batch: malformed CSV: %w", err)
	}
	known := map[string]bool{}
	for _, c := range append(BaseColumns(), ExtensionColumns()...) {
		known[c] = true
	}
	names := make([]string, len(head))
	anyKnown := false
	for i, h := range head {
		if i == 0 {
			h = strings.TrimPrefix(h, "\ufeff")
		}
		names[i] = strings.ToLower(strings.TrimSpace(h))
		anyKnown = anyKnown || known[names[i]]
	}
	if !anyKnown {
		if len(head) == 1 && strings.Contains(head[0], ";") {
			return nil, &HeaderError{Reason: "fields must be separated by commas, not semicolons"}
		}
		// Probably a file without a header: its first record would be
		// patient data, which must not be echoed in an error.
		return nil, &HeaderError{Reason: fmt.Sprintf("no known column in the first row; a header row naming the columns (%s, ...) is required", strings.Join(BaseColumns()[:3], ", "))}
	}
	rd := &Reader{cr: cr, present: map[string]int{}}
	for i, name := range names {
		if !known[name] {
			return nil, &HeaderError{Column: name, Reason: fmt.Sprintf("unknown column (field %d of the header)", i+1)}
		}
		if _, dup := rd.present[name]; dup {
			return nil, &HeaderError{Column: name, Reason: "repeated column"}
		}
		rd.present[name] = i
		rd.columns = append(rd.columns, name)
	}
	for _, req := range []string{ColID, ColAgeYears} {
		if _, ok := rd.present[req]; !ok {
			return nil, &HeaderError{Column: req, Reason: "required column is missing"}
		}
	}
	// Every record must have as many fields as the header.
	cr.FieldsPerRecord = len(head)
	return rd, nil
}

// Columns returns the input columns of the output in canonical order: every
// base column, then the extension columns present in the input.
func (r *Reader) Columns() []string {
	cols := BaseColumns()
	for _, c := range ExtensionColumns() {
		if _, ok := r.present[c]; ok {
			cols = append(cols, c)
		}
	}
	return cols
}

// Next returns the next record, or io.EOF after the last one. A malformed
// record is an error naming its line (it wraps the *csv.ParseError).
func (r *Reader) Next() (Record, error) {
	fields, err := r.cr.Read()
	if errors.Is(err, io.EOF) {
		return Record{}, io.EOF
	}
	if err != nil {
		return Record{}, fmt.Errorf("batch: malformed CSV: %w", err)
	}
	line, _ := r.cr.FieldPos(0)
	rec := Record{Line: line, Values: make(map[string]string, len(fields))}
	for name, i := range r.present {
		rec.Values[name] = fields[i]
	}
	rec.Request, rec.Problem = buildRequest(rec.Values)
	return rec, nil
}

// buildRequest turns one record's cells into a request (policy unset).
func buildRequest(v map[string]string) (calc.Request, calc.Reason) {
	var req calc.Request
	if t := strings.TrimSpace(v[ColAgeYears]); t != "" {
		age, reason := calc.ParseValue(t)
		if reason != "" {
			return calc.Request{}, calc.ReasonAgeMissing
		}
		req.AgeYears = &age
	}
	req.Sex = calc.ParseSex(strings.TrimSpace(v[ColSex]))
	req.Equation = strings.TrimSpace(v[ColEquation])
	for _, m := range measuredColumns() {
		text := v[m.value]
		if strings.TrimSpace(text) == "" {
			continue
		}
		unit := m.fixedUnit
		if m.unit != "" {
			unit = v[m.unit]
		}
		req.Measurements = append(req.Measurements, calc.Measurement{
			Analyte: m.analyte, ValueText: text, Unit: unit, SourceID: m.value,
		})
	}
	return req, ""
}
