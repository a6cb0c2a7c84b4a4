package audit_test

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"math"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/google/fhir/go/fhirversion"
	"github.com/google/fhir/go/jsonformat"
	"github.com/stretchr/testify/require"

	"filtrate/internal/audit"
	"filtrate/store"
)

func TestRenderShowsTheWholeRecord(t *testing.T) {
	f := newFixture(t)
	ids := commitAll(t, f, nil, nil)
	ctx := context.Background()

	tests := []struct {
		name string
		id   int64
		want []string
	}{
		{
			name: "result",
			id:   ids[0][0],
			want: []string{
				"Audit record 1", patientA, birthA, "MSG-A", "OUT-MSG-A", "hl7v2",
				`creatinine [OBX2]: "0.92" mg/dL → 0.92 mg/dL`,
				"ckd-epi-2021-cr version 1 (CKD-EPI 2021 creatinine)",
				// Step names of calc/ckdepi2021cr.go.
				"Scr/κ", "0.9938^age", "eGFR",
				"nkf-asn-2021 version 1", configHash, softwareV,
				"age used", "54 years",
				"Recompute: match: ckd-epi-2021-cr version 1 gives the identical value",
			},
		},
		{
			name: "refusal",
			id:   ids[0][1],
			want: []string{"no value computed", "value-censored: ", `cystatin_c [OBX3]: "<0.3" mg/L → not used`, "Recompute: match: the refusal recurs"},
		},
		{
			name: "withdrawal",
			id:   ids[0][2],
			want: []string{"input-withdrawn: ", "Recompute: not-applicable"},
		},
		{
			name: "calibrated input",
			id:   ids[3][0],
			want: []string{"calibration rule CAL-CREA-ENZ version 2, traceable: yes", "assay: method ENZ, instrument AN-1", "calibration CAL-CREA-ENZ v2 = "},
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			rec, err := f.st.Record(ctx, tc.id)
			require.NoError(t, err)
			v, _ := audit.Recompute(rec)
			var buf bytes.Buffer
			require.NoError(t, audit.Render(&buf, rec, v))
			out := buf.String()
			for _, w := range tc.want {
				require.Contains(t, out, w)
			}
			require.Contains(t, out, rec.ContentHash)
			require.Contains(t, out, rec.PrevHash)
			if rec.Exact != nil {
				require.Contains(t, out, strconv.FormatFloat(*rec.Exact, 'g', -1, 64))
			}
		})
	}
}

func TestRenderShowsTheMismatchedValues(t *testing.T) {
	f := newFixture(t)
	ids := commitAll(t, f, nil, nil)
	rec, err := f.st.Record(context.Background(), ids[0][0])
	require.NoError(t, err)
	rec.Reported = "99"
	v, err := audit.Recompute(rec)
	require.NoError(t, err)
	var buf bytes.Buffer
	require.NoError(t, audit.Render(&buf, rec, v))
	require.Contains(t, buf.String(), `Recompute: mismatch: reported stored "99", recomputed "`)
	// The value-free summary names the field only.
	require.Equal(t, "mismatch: reported differs", v.Summary())
}

func TestEach(t *testing.T) {
	f := newFixture(t)
	commitAll(t, f, nil, nil)
	tests := []struct {
		name   string
		filter store.Filter
		want   []int64
	}{
		{"all, newest first", store.Filter{}, []int64{9, 8, 7, 6, 5, 4, 3, 2, 1}},
		{"limit", store.Filter{Limit: 2}, []int64{9, 8}},
		{"patient", store.Filter{PatientID: patientB}, []int64{6, 5, 4}},
		{"message", store.Filter{MessageID: "MSG-A"}, []int64{3, 2, 1}},
		{"equation", store.Filter{Equation: "ckd-epi-2012-cys"}, []int64{5}},
		// Messages were recorded a minute apart from 08:00.
		{"time range", store.Filter{Since: time.Date(2026, 11, 30, 8, 1, 0, 0, time.UTC), Until: time.Date(2026, 11, 30, 8, 2, 0, 0, time.UTC)}, []int64{6, 5, 4}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var got []int64
			require.NoError(t, audit.Each(context.Background(), f.st, tc.filter, func(r store.AuditRecord) error {
				got = append(got, r.ID)
				return nil
			}))
			require.Equal(t, tc.want, got)
		})
	}
}

func TestExportCSV(t *testing.T) {
	f := newFixture(t)
	commitAll(t, f, nil, nil)
	var buf bytes.Buffer
	n, err := audit.ExportCSV(context.Background(), &buf, f.st, store.Filter{})
	require.NoError(t, err)
	require.Equal(t, int64(fixtureRecords), n)

	rows, err := csv.NewReader(&buf).ReadAll()
	require.NoError(t, err)
	require.Len(t, rows, fixtureRecords+1)
	require.Equal(t, audit.CSVColumns(), rows[0])
	col := map[string]int{}
	for i, c := range rows[0] {
		col[c] = i
	}
	recs := allRecords(t, f.st)
	for _, row := range rows[1:] {
		id, err := strconv.ParseInt(row[col["id"]], 10, 64)
		require.NoError(t, err)
		rec := recs[id-1]
		require.Equal(t, rec.PatientID, row[col["patient_id"]])
		require.Equal(t, rec.SuppressionCode, row[col["suppression_code"]])
		require.Equal(t, rec.ContentHash, row[col["content_hash"]])
		if rec.Exact == nil {
			require.Empty(t, row[col["exact"]])
			continue
		}
		// The unrounded value survives the export bit for bit.
		x, err := strconv.ParseFloat(row[col["exact"]], 64)
		require.NoError(t, err)
		require.Equal(t, math.Float64bits(*rec.Exact), math.Float64bits(x))
		// Every equation ends with its "eGFR" step (calc).
		require.Contains(t, row[col["steps"]], "eGFR=")
	}
	// No date of birth in the export.
	for _, b := range []string{birthA, birthB, birthC, birthD} {
		require.NotContains(t, buf.String(), b)
	}
}

func TestCSVNeutralisesFormulas(t *testing.T) {
	var buf bytes.Buffer
	w := audit.NewCSVWriter(&buf)
	require.NoError(t, w.Write(store.AuditRecord{ID: 1, MessageID: "=HYPERLINK(\"x\")", PatientID: "+1", OutputMessageID: "@a"}))
	require.NoError(t, w.Close())
	rows, err := csv.NewReader(&buf).ReadAll()
	require.NoError(t, err)
	require.Equal(t, `'=HYPERLINK("x")`, rows[1][3])
	require.Equal(t, "'+1", rows[1][5])
}

func TestExportCSVEmptyHasHeader(t *testing.T) {
	f := newFixture(t)
	var buf bytes.Buffer
	n, err := audit.ExportCSV(context.Background(), &buf, f.st, store.Filter{})
	require.NoError(t, err)
	require.Zero(t, n)
	require.Equal(t, strings.Join(audit.CSVColumns(), ",")+"\n", buf.String())
}

func TestSearchWriter(t *testing.T) {
	f := newFixture(t)
	commitAll(t, f, nil, nil)
	ctx := context.Background()

	var text bytes.Buffer
	_, err := audit.Export(ctx, f.st, store.Filter{MessageID: "MSG-A"}, audit.NewSearchWriter(&text, false))
	require.NoError(t, err)
	lines := strings.Split(strings.TrimSpace(text.String()), "\n")
	require.Len(t, lines, 4)
	require.Contains(t, lines[0], "PATIENT")
	require.Regexp(t, `^3\s+2026-11-30T08:00:00Z\s+MSG-A\s+`+patientA+`\s+-\s+-\s+-\s+input-withdrawn$`, lines[1])
	require.Regexp(t, `^1\s+2026-11-30T08:00:00Z\s+MSG-A\s+`+patientA+`\s+ckd-epi-2021-cr\s+\d+ mL/min/\{1.73_m2\}\s+G\d\s+-$`, lines[3])

	var js bytes.Buffer
	_, err = audit.Export(ctx, f.st, store.Filter{MessageID: "MSG-A"}, audit.NewSearchWriter(&js, true))
	require.NoError(t, err)
	var got []map[string]any
	dec := json.NewDecoder(&js)
	for dec.More() {
		var m map[string]any
		require.NoError(t, dec.Decode(&m))
		got = append(got, m)
	}
	require.Len(t, got, 3)
	for _, k := range []string{"id", "message_id", "patient_id", "recorded_at", "equation", "equation_version", "reported", "unit", "category", "suppressed"} {
		require.Contains(t, got[2], k)
	}
	require.Equal(t, "input-withdrawn", got[0]["suppressed"])
	require.Equal(t, "", got[2]["suppressed"])
	require.Equal(t, "ckd-epi-2021-cr", got[2]["equation"])
	require.Equal(t, "1", got[2]["equation_version"])
}

func TestExportFHIRValidates(t *testing.T) {
	f := newFixture(t)
	commitAll(t, f, nil, nil)
	var buf bytes.Buffer
	now := func() time.Time { return time.Date(2026, 12, 1, 9, 0, 0, 0, time.UTC) }
	n, err := audit.ExportFHIR(context.Background(), &buf, f.st, store.Filter{}, audit.FHIROptions{Now: now})
	require.NoError(t, err)
	require.Equal(t, int64(fixtureRecords), n)

	// google/fhir/go's validating unmarshaller checks cardinality, required
	// elements, primitive formats and references against FHIR R4.
	u, err := jsonformat.NewUnmarshaller("UTC", fhirversion.R4)
	require.NoError(t, err)
	_, err = u.Unmarshal(buf.Bytes())
	require.NoError(t, err, "the Bundle")

	var bundle struct {
		ResourceType string `json:"resourceType"`
		Type         string `json:"type"`
		Timestamp    string `json:"timestamp"`
		Entry        []struct {
			Resource json.RawMessage `json:"resource"`
		} `json:"entry"`
	}
	require.NoError(t, json.Unmarshal(buf.Bytes(), &bundle))
	require.Equal(t, "Bundle", bundle.ResourceType)
	require.Equal(t, "collection", bundle.Type)
	require.Equal(t, "2026-12-01T09:00:00Z", bundle.Timestamp)
	require.Len(t, bundle.Entry, 2*fixtureRecords)
	kinds := map[string]int{}
	for i, e := range bundle.Entry {
		_, err := u.Unmarshal(e.Resource)
		require.NoError(t, err, "entry %d", i)
		var r struct {
			ResourceType string `json:"resourceType"`
		}
		require.NoError(t, json.Unmarshal(e.Resource, &r))
		kinds[r.ResourceType]++
	}
	require.Equal(t, map[string]int{"Provenance": fixtureRecords, "AuditEvent": fixtureRecords}, kinds)

	out := buf.String()
	require.Contains(t, out, `"code":"ckd-epi-2021-cr"`)
	require.Contains(t, out, `"NULLIFY"`)
	require.Contains(t, out, `"outcome":"4"`)
	require.Contains(t, out, configHash)
	for _, secret := range []string{patientA, birthA, patientB, birthB, patientC, birthC, patientD, birthD} {
		require.NotContains(t, out, secret)
	}
}

func TestExportFHIREmptyBundleValidates(t *testing.T) {
	var buf bytes.Buffer
	w := audit.NewFHIRWriter(&buf, audit.FHIROptions{})
	require.NoError(t, w.Close())
	u, err := jsonformat.NewUnmarshaller("UTC", fhirversion.R4)
	require.NoError(t, err)
	_, err = u.Unmarshal(buf.Bytes())
	require.NoError(t, err)
}

func TestParseTime(t *testing.T) {
	ams, err := time.LoadLocation("Europe/Amsterdam")
	require.NoError(t, err)
	tests := []struct {
		in       string
		loc      *time.Location
		endOfDay bool
		want     time.Time
		wantErr  bool
	}{
		{in: "2026-11-30T07:10:00Z", want: time.Date(2026, 11, 30, 7, 10, 0, 0, time.UTC)},
		{in: "2026-11-30T08:10:00.5+01:00", want: time.Date(2026, 11, 30, 7, 10, 0, 500000000, time.UTC)},
		{in: "2026-11-30", want: time.Date(2026, 11, 30, 0, 0, 0, 0, time.UTC)},
		{in: "2026-11-30", endOfDay: true, want: time.Date(2026, 12, 1, 0, 0, 0, 0, time.UTC)},
		// Amsterdam is UTC+1 in winter (IANA tz database).
		{in: "2026-11-30", loc: ams, want: time.Date(2026, 11, 29, 23, 0, 0, 0, time.UTC)},
		{in: "30/11/2026", wantErr: true},
		{in: "", wantErr: true},
	}
	for _, tc := range tests {
		got, err := audit.ParseTime(tc.in, tc.loc, tc.endOfDay)
		if tc.wantErr {
			require.Error(t, err, tc.in)
			continue
		}
		require.NoError(t, err, tc.in)
		require.True(t, tc.want.Equal(got), "%s: got %v", tc.in, got)
	}
}
