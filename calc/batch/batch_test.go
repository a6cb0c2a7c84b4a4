package batch

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

// All patients below are invented.

func preset(t testing.TB, name string) calc.Policy {
	t.Helper()
	p, err := calc.Preset(name)
	require.NoError(t, err)
	require.NoError(t, p.Validate(calc.Builtin()))
	return p
}

func run(t *testing.T, p calc.Policy, f Format, in string) (string, Summary) {
	t.Helper()
	var out bytes.Buffer
	sum, err := Run(context.Background(), strings.NewReader(in), &out, Options{Policy: p, Format: f})
	require.NoError(t, err)
	return out.String(), sum
}

// readCSV parses output CSV into maps keyed by column name.
func readCSV(t *testing.T, s string) ([]string, []map[string]string) {
	t.Helper()
	recs, err := csv.NewReader(strings.NewReader(s)).ReadAll()
	require.NoError(t, err)
	require.NotEmpty(t, recs)
	var rows []map[string]string
	for _, r := range recs[1:] {
		m := map[string]string{}
		for i, c := range recs[0] {
			m[c] = r[i]
		}
		rows = append(rows, m)
	}
	return recs[0], rows
}

func TestNewReaderHeader(t *testing.T) {
	tests := []struct {
		name    string
		in      string
		wantErr string // substring; "" means no error
		cols    []string
	}{
		{name: "base columns any order", in: "sex,age_years,id,creatinine\n", cols: BaseColumns()},
		{name: "case, blanks and byte order mark", in: "\ufeffID , Age_Years,SEX\n", cols: BaseColumns()},
		{
			name: "extension columns only as present", in: "id,age_years,collection_hours,urine_volume\n",
			cols: append(BaseColumns(), ColUrineVolume, ColCollectionHours),
		},
		{name: "unknown column named", in: "id,age_years,creatinine,potassium\n", wantErr: `column "potassium": unknown column (field 4 of the header)`},
		{name: "repeated column", in: "id,age_years,sex,Sex\n", wantErr: `column "sex": repeated column`},
		{name: "missing id", in: "age_years,sex\n", wantErr: `column "id": required column is missing`},
		{name: "missing age", in: "id,sex\n", wantErr: `column "age_years": required column is missing`},
		{name: "empty input", in: "", wantErr: "a header row is required"},
		{name: "semicolons", in: "id;age_years;sex\r\nW1;50;F\r\n", wantErr: "separated by commas, not semicolons"},
		{name: "CRLF line ends", in: "id,age_years\r\nW1,50\r\n", cols: BaseColumns()},
		{name: "malformed header", in: "id,\"age_years\n", wantErr: "malformed CSV"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r, err := NewReader(strings.NewReader(tt.in))
			if tt.wantErr != "" {
				require.ErrorContains(t, err, tt.wantErr)
				return
			}
			require.NoError(t, err)
			require.Equal(t, tt.cols, r.Columns())
		})
	}
}

// A file without a header starts with patient data; the error must not echo
// it (DESIGN.md: patient data never goes into an error string).
func TestNewReaderHeaderlessDoesNotEchoData(t *testing.T) {
	_, err := NewReader(strings.NewReader("Jane Invented,1970-01-01,0.9\n"))
	require.Error(t, err)
	require.NotContains(t, err.Error(), "Jane")
	require.NotContains(t, err.Error(), "1970")
	require.Contains(t, err.Error(), "no known column")
}

func TestNextMalformedNamesLine(t *testing.T) {
	tests := []struct {
		name, in string
		line     int
	}{
		{name: "ragged row", in: "id,age_years,creatinine\nW1,50,0.9\nW2,50\n", line: 3},
		{name: "bare quote", in: "id,age_years,creatinine\nW1,50,0.9\nW2,5\"0,0.9\n", line: 3},
		{name: "unterminated quote", in: "id,age_years,creatinine\nW1,50,0.9\n\nW2,\"50,0.9\n", line: 4},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r, err := NewReader(strings.NewReader(tt.in))
			require.NoError(t, err)
			rec, err := r.Next()
			require.NoError(t, err)
			require.Equal(t, 2, rec.Line)
			_, err = r.Next()
			var pe *csv.ParseError
			require.ErrorAs(t, err, &pe)
			require.Equal(t, tt.line, pe.StartLine)
			require.ErrorContains(t, err, fmt.Sprintf("line %d", tt.line))
			require.NotContains(t, err.Error(), "W2")
		})
	}
}

func TestBuildRequest(t *testing.T) {
	in := "equation,collection_hours,urine_volume,urine_volume_unit,id,age_years,sex,creatinine,creatinine_unit,weight,weight_unit,height\n" +
		" mdrd-175 ,24,1.5,L,W1, 45.5 ,f, 0.90 ,µmol/L,70,,\n"
	r, err := NewReader(strings.NewReader(in))
	require.NoError(t, err)
	rec, err := r.Next()
	require.NoError(t, err)
	require.Empty(t, rec.Problem)
	req := rec.Request
	require.NotNil(t, req.AgeYears)
	require.Equal(t, 45.5, *req.AgeYears)
	require.Equal(t, calc.SexFemale, req.Sex)
	require.Equal(t, "mdrd-175", req.Equation)
	// Value text and unit exactly as written; a blank unit stays blank (calc
	// refuses it, the reader never guesses); a blank value is absent.
	require.Equal(t, []calc.Measurement{
		{Analyte: calc.Creatinine, ValueText: " 0.90 ", Unit: "µmol/L", SourceID: ColCreatinine},
		{Analyte: calc.Weight, ValueText: "70", Unit: "", SourceID: ColWeight},
		{Analyte: calc.UrineVolume, ValueText: "1.5", Unit: "L", SourceID: ColUrineVolume},
		{Analyte: calc.CollectionTime, ValueText: "24", Unit: "h", SourceID: ColCollectionHours},
	}, req.Measurements)
}

func TestBuildRequestAge(t *testing.T) {
	tests := []struct {
		text    string
		problem calc.Reason
		age     *float64
	}{
		{text: "50", age: ptr(50.0)},
		{text: "", age: nil}, // calc decides (age-missing)
		{text: "fifty", problem: calc.ReasonAgeMissing},
		{text: "<1", problem: calc.ReasonAgeMissing},
		{text: "0x32", problem: calc.ReasonAgeMissing}, // strconv would read hexadecimal
		{text: "NaN", problem: calc.ReasonAgeMissing},
	}
	for _, tt := range tests {
		t.Run(tt.text, func(t *testing.T) {
			req, problem := buildRequest(map[string]string{ColID: "W1", ColAgeYears: tt.text})
			require.Equal(t, tt.problem, problem)
			require.Equal(t, tt.age, req.AgeYears)
		})
	}
}

func ptr[T any](v T) *T { return &v }

// TestEvaluate checks the choice of rows, equation and suppression code.
// Values themselves are checked in cmd/filtrate against the worksheet whose
// sources are listed in testdata/calc/README.md; here only the shape.
func TestEvaluate(t *testing.T) {
	head := "id,age_years,sex,creatinine,creatinine_unit,cystatin_c,cystatin_c_unit,height,height_unit,weight,weight_unit,equation\n"
	tests := []struct {
		name     string
		policy   string
		both     bool // sex rule "both"
		row      string
		equation []string // per output row
		supp     []calc.Reason
		assumed  []string
	}{
		{name: "policy primary only", row: "W1,50,M,1.0,mg/dL,1.0,mg/L,,,,,", equation: []string{"ckd-epi-2021-crcys"}, supp: []calc.Reason{""}},
		{name: "nice primary cystatin", policy: "nice-2021", row: "W1,50,M,1.0,mg/dL,1.0,mg/L,,,,,", equation: []string{"ckd-epi-2012-cys"}, supp: []calc.Reason{""}},
		{name: "explicit equation", row: "W1,50,M,1.0,mg/dL,1.0,mg/L,,,,,ckd-epi-2021-cr", equation: []string{"ckd-epi-2021-cr"}, supp: []calc.Reason{""}},
		{name: "explicit, input missing", row: "W1,50,M,,,1.0,mg/L,,,,,ckd-epi-2021-cr", equation: []string{"ckd-epi-2021-cr"}, supp: []calc.Reason{calc.ReasonInputMissing}},
		{name: "explicit, age out of range", row: "W1,12,M,0.6,mg/dL,,,,,,,ckd-epi-2021-cr", equation: []string{"ckd-epi-2021-cr"}, supp: []calc.Reason{calc.ReasonAgeBelowRange}},
		{name: "explicit, unknown", row: "W1,50,M,1.0,mg/dL,,,,,,,no-such-equation", equation: []string{"no-such-equation"}, supp: []calc.Reason{calc.ReasonEquationUnknown}},
		{name: "explicit, weight unit unknown: root cause first", row: "W1,50,F,1.0,mg/dL,,,,,60,st,cockcroft-gault", equation: []string{"cockcroft-gault"}, supp: []calc.Reason{calc.ReasonUnitUnknown}},
		{name: "unused input refused: still reported", row: "W1,50,F,1.0,mg/dL,,,,,60,st,", equation: []string{"ckd-epi-2021-cr"}, supp: []calc.Reason{""}},
		{name: "child height unit blank: unit first", row: "W1,6,F,0.4,mg/dL,,,115,,,,", equation: []string{"ckid-u25-cr"}, supp: []calc.Reason{calc.ReasonUnitUnknown}},
		{name: "child without height", row: "W1,6,F,0.4,mg/dL,,,,,,,", equation: []string{"ckid-u25-cr"}, supp: []calc.Reason{calc.ReasonHeightMissing}},
		{name: "creatinine refused, cystatin used", row: "W1,50,F,<0.2,mg/dL,0.9,mg/L,,,,,", equation: []string{"ckd-epi-2012-cys"}, supp: []calc.Reason{""}},
		{name: "both refused: first in input order", row: "W1,50,F,<0.2,mg/dL,0.9,mg/dL,,,,,", equation: []string{""}, supp: []calc.Reason{calc.ReasonValueCensored}},
		{name: "sex unknown refused", row: "W1,50,X,1.0,mg/dL,1.0,mg/L,,,,,", equation: []string{"ckd-epi-2021-crcys"}, supp: []calc.Reason{calc.ReasonSexUnknown}},
		{
			name: "sex unknown, both", both: true, row: "W1,50,,1.0,mg/dL,,,,,,,",
			equation: []string{"ckd-epi-2021-cr", "ckd-epi-2021-cr"}, supp: []calc.Reason{"", ""}, assumed: []string{"female", "male"},
		},
		{name: "sex known, both: one row", both: true, row: "W1,50,M,1.0,mg/dL,,,,,,,", equation: []string{"ckd-epi-2021-cr"}, supp: []calc.Reason{""}, assumed: []string{""}},
		{name: "age blank", row: "W1,,M,1.0,mg/dL,,,,,,,", equation: []string{""}, supp: []calc.Reason{calc.ReasonAgeMissing}},
		{name: "age blank, nothing measured", row: "W1,,M,,,,,,,,,", equation: []string{""}, supp: []calc.Reason{calc.ReasonAgeMissing}},
		{name: "age not a number keeps equation text", row: "W1,5O,M,1.0,mg/dL,,,,,,,mdrd-175", equation: []string{"mdrd-175"}, supp: []calc.Reason{calc.ReasonAgeMissing}},
		{name: "infant: no band", row: "W1,0.5,M,0.3,mg/dL,,,,,,,", equation: []string{""}, supp: []calc.Reason{calc.ReasonAgeBelowRange}},
		{name: "nothing measured", row: "W1,50,M,,,,,,,70,kg,", equation: []string{""}, supp: []calc.Reason{calc.ReasonInputMissing}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			name := tt.policy
			if name == "" {
				name = "nkf-asn-2021"
			}
			p := preset(t, name)
			if tt.both {
				p.SexUnknown = calc.SexRuleBoth
			}
			out, sum := run(t, p, FormatCSV, head+tt.row+"\n")
			header, rows := readCSV(t, out)
			require.Equal(t, tt.both, header[len(header)-1] == ColAssumedSex)
			require.Len(t, rows, len(tt.equation))
			require.Equal(t, Summary{Records: 1, Rows: len(rows), Reported: count(tt.supp, ""), Suppressed: len(rows) - count(tt.supp, "")}, sum)
			for i, r := range rows {
				require.Equal(t, "W1", r[ColID])
				require.Equal(t, tt.equation[i], r[ColEquation], "equation")
				require.Equal(t, string(tt.supp[i]), r[ColSuppressed], "suppressed")
				if tt.supp[i] == "" {
					require.NotEmpty(t, r[ColEGFRExact])
					require.Regexp(t, `^\d+\.\d{4}$`, r[ColEGFRExact])
					require.NotEmpty(t, r[ColReported])
				} else {
					require.Empty(t, r[ColEGFRExact]+r[ColReported]+r[ColUnit]+r[ColCategory])
				}
				if tt.assumed != nil {
					require.Equal(t, tt.assumed[i], r[ColAssumedSex])
				}
			}
		})
	}
}

func count(rs []calc.Reason, want calc.Reason) int {
	n := 0
	for _, r := range rs {
		if r == want {
			n++
		}
	}
	return n
}

// The female and male values under the "both" rule are the values of the
// same record with the sex stated, so the assumed rows can be checked
// against the plain ones.
func TestEvaluateBothMatchesStatedSex(t *testing.T) {
	p := preset(t, "nkf-asn-2021")
	p.SexUnknown = calc.SexRuleBoth
	in := "id,age_years,sex,creatinine,creatinine_unit\nW1,60,,1.2,mg/dL\nW2,60,F,1.2,mg/dL\nW3,60,M,1.2,mg/dL\n"
	out, _ := run(t, p, FormatCSV, in)
	_, rows := readCSV(t, out)
	require.Len(t, rows, 4)
	require.Equal(t, rows[2][ColEGFRExact], rows[0][ColEGFRExact])
	require.Equal(t, rows[3][ColEGFRExact], rows[1][ColEGFRExact])
	require.NotEqual(t, rows[0][ColEGFRExact], rows[1][ColEGFRExact])
}

func TestRunOutputColumns(t *testing.T) {
	in := "creatinine_unit,creatinine,collection_hours,id,age_years,sex\nmg/dL,1.0,,W1,50,M\n"
	out, _ := run(t, preset(t, "nkf-asn-2021"), FormatCSV, in)
	header, rows := readCSV(t, out)
	want := append(BaseColumns(), ColCollectionHours, ColEGFRExact, ColReported, ColUnit, ColCategory, ColSuppressed)
	require.Equal(t, want, header)
	require.Equal(t, "1.0", rows[0][ColCreatinine])
	require.Equal(t, "", rows[0][ColCystatinC]) // absent column written blank
}

func TestRunEmptyWorksheet(t *testing.T) {
	out, sum := run(t, preset(t, "nkf-asn-2021"), FormatCSV, "id,age_years\n")
	require.Equal(t, "id,age_years,sex,creatinine,creatinine_unit,cystatin_c,cystatin_c_unit,height,height_unit,weight,weight_unit,equation,egfr_exact,reported,unit,category,suppressed\n", out)
	require.Zero(t, sum.Records)
	out, _ = run(t, preset(t, "nkf-asn-2021"), FormatJSON, "id,age_years\n")
	require.Equal(t, "[]\n", out)
}

func TestRunJSON(t *testing.T) {
	p := preset(t, "nkf-asn-2021")
	p.SexUnknown = calc.SexRuleBoth
	in := "id,age_years,sex,creatinine,creatinine_unit,urine_creatinine,urine_creatinine_unit,urine_volume,urine_volume_unit,collection_hours,equation\n" +
		"W1,50,,88.4,umol/L,,,,,,\n" +
		"W2,50,F,<0.2,mg/dL,,,,,,\n" +
		"W3,40,M,1.0,mg/dL,100,mg/dL,1440,mL,24,crcl-timed-urine\n"
	out, sum := run(t, p, FormatJSON, in)
	require.True(t, json.Valid([]byte(out)), out)
	require.Equal(t, Summary{Records: 3, Rows: 4, Reported: 3, Suppressed: 1}, sum)

	// Keys in CSV column order, then steps and comments.
	dec := json.NewDecoder(strings.NewReader(out))
	_, err := dec.Token() // [
	require.NoError(t, err)
	var raw json.RawMessage
	require.NoError(t, dec.Decode(&raw))
	keys := objectKeys(t, raw)
	want := append(BaseColumns(), ColUrineCreatinine, ColUrineCreatinineUnit, ColUrineVolume, ColUrineVolumeUnit, ColCollectionHours,
		ColEGFRExact, ColReported, ColUnit, ColCategory, ColSuppressed, ColAssumedSex, "steps", "comments")
	require.Equal(t, want, keys)

	var rows []struct {
		ID         string      `json:"id"`
		Equation   string      `json:"equation"`
		Exact      string      `json:"egfr_exact"`
		Suppressed string      `json:"suppressed"`
		AssumedSex string      `json:"assumed_sex"`
		Steps      []calc.Step `json:"steps"`
		Comments   []string    `json:"comments"`
	}
	require.NoError(t, json.Unmarshal([]byte(out), &rows))
	require.Len(t, rows, 4)

	// W1 in µmol/L: the conversion is the first step, named after its input.
	require.Equal(t, "female", rows[0].AssumedSex)
	require.Equal(t, "male", rows[1].AssumedSex)
	require.Equal(t, "creatinine: convert to mg/dL", rows[0].Steps[0].Name)
	require.InDelta(t, 1.0, rows[0].Steps[0].Value, 1e-12) // 88.4 µmol/L ÷ 88.4 = 1 mg/dL (calc.CreatinineMgDLToUmolL)
	require.Equal(t, "eGFR", rows[0].Steps[len(rows[0].Steps)-1].Name)
	require.Contains(t, rows[0].Comments[0], "as if female")

	// Refused: no steps, the reason in words.
	require.Equal(t, string(calc.ReasonValueCensored), rows[2].Suppressed)
	require.Empty(t, rows[2].Steps)
	require.Equal(t, []string{calc.ReasonValueCensored.Describe()}, rows[2].Comments)

	// Timed urine: U × V / (P × t) = 100 × 1440 / (1.0 × 1440) = 100 mL/min
	// (by hand; collection time 24 h = 1440 min).
	require.Equal(t, "crcl-timed-urine", rows[3].Equation)
	require.Equal(t, "100.0000", rows[3].Exact)
	require.Equal(t, "collection_time: convert to min", rows[3].Steps[0].Name)
}

func objectKeys(t *testing.T, raw json.RawMessage) []string {
	t.Helper()
	dec := json.NewDecoder(bytes.NewReader(raw))
	tok, err := dec.Token()
	require.NoError(t, err)
	require.Equal(t, json.Delim('{'), tok)
	var keys []string
	for dec.More() {
		k, err := dec.Token()
		require.NoError(t, err)
		keys = append(keys, k.(string))
		var v json.RawMessage
		require.NoError(t, dec.Decode(&v))
	}
	return keys
}

// A malformed record stops the run with the line; rows before it are kept
// and the JSON array is still closed.
func TestRunMalformedStops(t *testing.T) {
	in := "id,age_years,sex,creatinine,creatinine_unit\nW1,50,F,0.8,mg/dL\nW2,50,F,0.8\nW3,50,F,0.8,mg/dL\n"
	for _, f := range []Format{FormatCSV, FormatJSON} {
		t.Run(string(f), func(t *testing.T) {
			var out bytes.Buffer
			sum, err := Run(context.Background(), strings.NewReader(in), &out, Options{Policy: preset(t, "nkf-asn-2021"), Format: f})
			require.ErrorContains(t, err, "record on line 3: wrong number of fields")
			require.Equal(t, 1, sum.Records)
			require.Contains(t, out.String(), "W1")
			require.NotContains(t, out.String(), "W3")
			if f == FormatJSON {
				require.True(t, json.Valid(out.Bytes()))
			}
		})
	}
}

func TestRunOptions(t *testing.T) {
	_, err := Run(context.Background(), strings.NewReader("id,age_years\n"), io.Discard, Options{Policy: preset(t, "ekfc"), Format: "xml"})
	require.ErrorContains(t, err, `unknown format "xml"`)

	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	_, err = Run(ctx, strings.NewReader("id,age_years\nW1,50\n"), io.Discard, Options{Policy: preset(t, "ekfc")})
	require.ErrorIs(t, err, context.Canceled)
}

// notifyWriter signals every write.
type notifyWriter struct {
	buf   bytes.Buffer
	wrote chan struct{}
}

func (w *notifyWriter) Write(p []byte) (int, error) {
	n, err := w.buf.Write(p)
	select {
	case w.wrote <- struct{}{}:
	default:
	}
	return n, err
}

// TestRunStreams proves that a row is written before the next record is
// read: the input is a pipe that sends the second record only after the
// first row has come out. The timeout only guards against a deadlock (the
// failure mode if rows were held back); it measures nothing.
func TestRunStreams(t *testing.T) {
	for _, f := range []Format{FormatCSV, FormatJSON} {
		t.Run(string(f), func(t *testing.T) {
			pr, pw := io.Pipe()
			out := &notifyWriter{wrote: make(chan struct{}, 1)}
			done := make(chan error, 1)
			go func() {
				_, err := Run(context.Background(), pr, out, Options{Policy: preset(t, "nkf-asn-2021"), Format: f})
				done <- err
			}()
			_, err := io.WriteString(pw, "id,age_years,sex,creatinine,creatinine_unit\nW1,50,F,0.8,mg/dL\n")
			require.NoError(t, err)
			select {
			case <-out.wrote:
			case err := <-done:
				t.Fatalf("run ended early: %v", err)
			case <-time.After(30 * time.Second):
				t.Fatal("no row written before the next record was sent: output is not streamed")
			}
			_, err = io.WriteString(pw, "W2,50,M,0.8,mg/dL\n")
			require.NoError(t, err)
			require.NoError(t, pw.Close())
			require.NoError(t, <-done)
			require.Contains(t, out.buf.String(), "W2")
		})
	}
}

func TestParseFormat(t *testing.T) {
	for _, s := range []string{"csv", "json"} {
		f, err := ParseFormat(s)
		require.NoError(t, err)
		require.Equal(t, Format(s), f)
	}
	_, err := ParseFormat("CSV ")
	require.Error(t, err)
}

// FuzzRead feeds arbitrary bytes through the reader, the evaluator and both
// writers: no panic, and whenever the run succeeds, both outputs are well
// formed (the CSV re-reads with one field count, the JSON is valid).
func FuzzRead(f *testing.F) {
	f.Add([]byte("id,age_years,sex,creatinine,creatinine_unit\nW1,50,F,0.8,mg/dL\n"))
	f.Add([]byte("id,age_years,sex,cystatin_c,cystatin_c_unit,height,height_unit,equation\nW1,7,M,1.1,mg/L,120,cm,ckid-u25-cys\nW2,x,,,,,,\n"))
	f.Add([]byte("\ufeffid,age_years,urine_creatinine,urine_creatinine_unit,urine_volume,urine_volume_unit,collection_hours,creatinine,creatinine_unit,equation,sex\nW1,40,100,mg/dL,1.5,L,24,1,mg/dL,crcl-timed-urine,M\n"))
	f.Add([]byte("id,age_years,creatinine\nW1,\"5\"0,1\n"))
	f.Add([]byte("id,age_years,weight,weight_unit,sex,creatinine,creatinine_unit,equation\nW1,1e308,1e308,[lb_av],f,-0,umol/L,cockcroft-gault\n"))
	f.Add([]byte(""))
	p, err := calc.Preset("nkf-asn-2021")
	if err != nil {
		f.Fatal(err)
	}
	both := p
	both.SexUnknown = calc.SexRuleBoth
	c := calc.NewCalculator(calc.Builtin())
	f.Fuzz(func(t *testing.T, data []byte) {
		var csvOut, jsonOut bytes.Buffer
		_, errCSV := Run(context.Background(), bytes.NewReader(data), &csvOut, Options{Calculator: c, Policy: p, Format: FormatCSV})
		_, errJSON := Run(context.Background(), bytes.NewReader(data), &jsonOut, Options{Calculator: c, Policy: both, Format: FormatJSON})
		if (errCSV == nil) != (errJSON == nil) {
			t.Fatalf("formats disagree: csv %v, json %v", errCSV, errJSON)
		}
		if errCSV != nil {
			var he *HeaderError
			var pe *csv.ParseError
			if !errors.As(errCSV, &he) && !errors.As(errCSV, &pe) {
				t.Fatalf("unexpected error type %T: %v", errCSV, errCSV)
			}
			return
		}
		recs, err := csv.NewReader(&csvOut).ReadAll()
		if err != nil {
			t.Fatalf("output CSV does not re-read: %v", err)
		}
		if len(recs) == 0 {
			t.Fatal("no header written")
		}
		if !json.Valid(jsonOut.Bytes()) {
			t.Fatalf("invalid JSON output: %q", jsonOut.String())
		}
	})
}

func TestRunAgeNotNumberComment(t *testing.T) {
	out, sum := run(t, preset(t, "nkf-asn-2021"), FormatJSON, "id,age_years,sex,creatinine,creatinine_unit\nW1,5O,F,0.8,mg/dL\n")
	require.Equal(t, Summary{Records: 1, Rows: 1, Suppressed: 1}, sum)
	var rows []struct {
		Suppressed string   `json:"suppressed"`
		AgeYears   string   `json:"age_years"`
		Comments   []string `json:"comments"`
	}
	require.NoError(t, json.Unmarshal([]byte(out), &rows))
	require.Equal(t, "age-missing", rows[0].Suppressed)
	require.Equal(t, "5O", rows[0].AgeYears) // echoed as written
	require.Equal(t, []string{"eGFR not calculated: age_years is not a plain decimal number."}, rows[0].Comments)
}
