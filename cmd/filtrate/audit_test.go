package main

import (
	"bytes"
	"context"
	"database/sql"
	"encoding/csv"
	"encoding/json"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/google/fhir/go/fhirversion"
	"github.com/google/fhir/go/jsonformat"
	"github.com/stretchr/testify/require"

	"filtrate/calc"
	"filtrate/internal/pipeline"
	"filtrate/store"
)

// Invented patients of an invented laboratory.
const (
	auditPatient1 = "INV-PAT-5501"
	auditBirth1   = "19720314"
	auditPatient2 = "INV-PAT-5502"
	auditBirth2   = "19580702"
)

// auditStore is a temporary store with records written by the pipeline,
// and a configuration file naming it.
type auditStore struct {
	dsn, config string
}

// newAuditStore commits two invented messages through the pipeline: the
// first gives a result (record 1), a refusal (2) and a withdrawal (3), the
// second three results (4-6).
func newAuditStore(t *testing.T) auditStore {
	t.Helper()
	dir := t.TempDir()
	as := auditStore{dsn: "file:" + filepath.Join(dir, "audit.db"), config: filepath.Join(dir, "filtrate.yml")}
	require.NoError(t, os.WriteFile(as.config, []byte("site: Invented Test Lab\ntimezone: UTC\nstore: "+as.dsn+"\n"), 0o644))

	ctx := context.Background()
	var mu sync.Mutex
	now := time.Date(2026, 11, 30, 8, 0, 0, 0, time.UTC)
	clock := func() time.Time {
		mu.Lock()
		defer mu.Unlock()
		return now
	}
	st, err := store.Open(ctx, as.dsn, store.WithClock(clock))
	require.NoError(t, err)
	defer st.Close()
	policy, err := calc.Preset("nkf-asn-2021")
	require.NoError(t, err)
	snap := &pipeline.Snapshot{Policy: policy, ConfigHash: "cfg-cli-test"}
	p := pipeline.NewProcessor(calc.NewCalculator(calc.Builtin()), st, "v-cli-test", nil)
	at := time.Date(2026, 11, 30, 7, 10, 0, 0, time.UTC)
	msgs := []pipeline.Message{
		{
			Transport: "hl7v2", MessageID: "CLI-MSG-1", DedupKey: "k1", Raw: []byte("raw 1"),
			PatientID: auditPatient1, BirthDate: auditBirth1, Sex: "F",
			Groups: []pipeline.Group{{Key: "OBR1", Request: calc.Request{
				Sex: calc.SexFemale, BirthDate: time.Date(1972, 3, 14, 0, 0, 0, 0, time.UTC), CollectedAt: at,
				Measurements: []calc.Measurement{
					{Analyte: calc.Creatinine, ValueText: "0.92", Unit: "mg/dL", SourceID: "OBX2"},
					{Analyte: calc.CystatinC, ValueText: "<0.3", Unit: "mg/L", SourceID: "OBX3"},
				},
			}, Withdrawn: []pipeline.Withdrawal{{SourceID: "OBX4", Analyte: calc.Creatinine, Status: "W"}}}},
		},
		{
			Transport: "hl7v2", MessageID: "CLI-MSG-2", DedupKey: "k2", Raw: []byte("raw 2"),
			PatientID: auditPatient2, BirthDate: auditBirth2, Sex: "M",
			Groups: []pipeline.Group{{Key: "OBR1", Request: calc.Request{
				Sex: calc.SexMale, BirthDate: time.Date(1958, 7, 2, 0, 0, 0, 0, time.UTC), CollectedAt: at,
				Measurements: []calc.Measurement{
					{Analyte: calc.Creatinine, ValueText: "88", Unit: "umol/L", SourceID: "OBX2"},
					{Analyte: calc.CystatinC, ValueText: "1.10", Unit: "mg/L", SourceID: "OBX3"},
				},
			}}}},
	}
	for i, m := range msgs {
		if i > 0 {
			mu.Lock()
			now = now.Add(24 * time.Hour)
			mu.Unlock()
		}
		out := []pipeline.Output{{Destination: "downstream", MessageID: "OUT-" + m.MessageID, Payload: []byte("x")}}
		_, err := p.Commit(ctx, m, p.Evaluate(m, snap), snap, out)
		require.NoError(t, err)
	}
	return as
}

func TestStoreMigrate(t *testing.T) {
	dir := t.TempDir()
	cfg := filepath.Join(dir, "filtrate.yml")
	require.NoError(t, os.WriteFile(cfg, []byte("store: file:"+filepath.Join(dir, "new.db")+"\n"), 0o644))

	// Auditing a store that does not exist fails without creating it.
	_, _, err := runCLI(t, "", "audit", "verify", "--config", cfg)
	require.ErrorContains(t, err, "new.db")
	require.NoFileExists(t, filepath.Join(dir, "new.db"))

	out, _, err := runCLI(t, "", "store", "migrate", "--config", cfg)
	require.NoError(t, err)
	require.Equal(t, "store migrate: applied 1, 2\n", out)
	out, _, err = runCLI(t, "", "store", "migrate", "--config", cfg)
	require.NoError(t, err)
	require.Equal(t, "store migrate: schema up to date\n", out)

	out, _, err = runCLI(t, "", "audit", "verify", "--config", cfg)
	require.NoError(t, err)
	require.Contains(t, out, "audit verify: OK: no records")
}

func TestAuditSearch(t *testing.T) {
	as := newAuditStore(t)
	tests := []struct {
		name string
		args []string
		ids  []string
	}{
		{"all", nil, []string{"6", "5", "4", "3", "2", "1"}},
		{"patient", []string{"--patient", auditPatient1}, []string{"3", "2", "1"}},
		{"message", []string{"--message-id", "CLI-MSG-2"}, []string{"6", "5", "4"}},
		{"equation", []string{"--equation", "ckd-epi-2021-cr"}, []string{"4", "1"}},
		{"limit", []string{"--limit", "2"}, []string{"6", "5"}},
		// The first message was recorded on 2026-11-30, the second a day later.
		{"since date", []string{"--since", "2026-12-01"}, []string{"6", "5", "4"}},
		{"until date, whole day", []string{"--until", "2026-11-30"}, []string{"3", "2", "1"}},
		{"since RFC 3339", []string{"--since", "2026-11-30T09:00:00Z"}, []string{"6", "5", "4"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			out, _, err := runCLI(t, "", append([]string{"audit", "search", "--config", as.config}, tc.args...)...)
			require.NoError(t, err)
			lines := strings.Split(strings.TrimSpace(out), "\n")
			require.True(t, strings.HasPrefix(lines[0], "ID "), lines[0])
			var ids []string
			for _, l := range lines[1:] {
				ids = append(ids, strings.Fields(l)[0])
			}
			require.Equal(t, tc.ids, ids)
		})
	}

	out, _, err := runCLI(t, "", "audit", "search", "--config", as.config, "--message-id", "CLI-MSG-1", "--json")
	require.NoError(t, err)
	var recs []map[string]any
	for _, l := range strings.Split(strings.TrimSpace(out), "\n") {
		var m map[string]any
		require.NoError(t, json.Unmarshal([]byte(l), &m))
		recs = append(recs, m)
	}
	require.Len(t, recs, 3)
	require.Equal(t, auditPatient1, recs[2]["patient_id"])
	require.Equal(t, "ckd-epi-2021-cr", recs[2]["equation"])
	require.Equal(t, "1", recs[2]["equation_version"])
	require.Equal(t, "", recs[2]["suppressed"])
	require.Equal(t, "value-censored", recs[1]["suppressed"])

	_, _, err = runCLI(t, "", "audit", "search", "--config", as.config, "--since", "yesterday")
	require.ErrorContains(t, err, "--since")
}

func TestAuditShow(t *testing.T) {
	as := newAuditStore(t)
	out, _, err := runCLI(t, "", "audit", "show", "1", "--config", as.config)
	require.NoError(t, err)
	for _, want := range []string{
		"Audit record 1", auditPatient1, auditBirth1, "CLI-MSG-1", "OUT-CLI-MSG-1",
		"ckd-epi-2021-cr version 1 (CKD-EPI 2021 creatinine)", "nkf-asn-2021 version 1", "cfg-cli-test", "v-cli-test",
		"Recompute: match",
	} {
		require.Contains(t, out, want)
	}

	_, _, err = runCLI(t, "", "audit", "show", "99", "--config", as.config)
	require.EqualError(t, err, "audit show: no audit record 99")
	_, _, err = runCLI(t, "", "audit", "show", "x", "--config", as.config)
	require.ErrorContains(t, err, "positive integer")
}

// tamperAuditStore drops the append-only triggers
// (store/migrations/sqlite/00001_init.sql) and runs stmts on the file.
func tamperAuditStore(t *testing.T, dsn string, stmts ...string) {
	t.Helper()
	db, err := sql.Open("sqlite", dsn)
	require.NoError(t, err)
	defer db.Close()
	for _, s := range append([]string{`DROP TRIGGER audit_records_no_update`, `DROP TRIGGER audit_records_no_delete`}, stmts...) {
		_, err := db.Exec(s)
		require.NoError(t, err, s)
	}
}

func TestAuditVerify(t *testing.T) {
	as := newAuditStore(t)
	out, _, err := runCLI(t, "", "audit", "verify", "--config", as.config)
	require.NoError(t, err)
	require.Equal(t, "audit verify: OK: 6 records (1-6), chain head 6; 5 recomputed identically, 1 with nothing to recompute\n", out)

	out, _, err = runCLI(t, "", "audit", "verify", "--config", as.config, "--since", "2026-12-01T00:00:00Z")
	require.NoError(t, err)
	require.Contains(t, out, "OK: 3 records (4-6)")

	tamperAuditStore(t, as.dsn,
		`UPDATE audit_records SET reported = '99' WHERE id = 1`,
		`DELETE FROM audit_records WHERE id = 4`,
	)
	out, _, err = runCLI(t, "", "audit", "verify", "--config", as.config)
	var ec exitCode
	require.ErrorAs(t, err, &ec)
	require.Equal(t, exitCode(2), ec)
	require.Contains(t, out, "record 1: content-hash-mismatch\n")
	require.Contains(t, out, "record 1: recompute-mismatch: mismatch: reported differs\n")
	require.Contains(t, out, "record 4: gap\n")
	require.Contains(t, out, "audit verify: FAILED: 3 problems (1 content-hash-mismatch, 1 gap, 1 recompute-mismatch)")
}

func TestAuditVerifyLogsNoPatientData(t *testing.T) {
	as := newAuditStore(t)
	tamperAuditStore(t, as.dsn, `UPDATE audit_records SET reported = '99' WHERE id = 1`)

	var logs, stdout, stderr bytes.Buffer
	logger := slog.New(slog.NewJSONHandler(&logs, &slog.HandlerOptions{Level: slog.LevelDebug}))
	err := runAuditVerify(context.Background(), &auditOptions{config: as.config}, auditVerifyOptions{logger: logger}, &stdout, &stderr)
	var ec exitCode
	require.ErrorAs(t, err, &ec)
	require.Contains(t, logs.String(), "audit verify finished")
	require.Contains(t, logs.String(), `"kind":"recompute-mismatch"`)

	// Through the command line too, with the JSON log on standard error.
	out, errOut, err := runCLI(t, "", "audit", "verify", "--config", as.config, "--log-level", "debug")
	require.ErrorAs(t, err, &ec)
	require.Contains(t, errOut, "audit verify finished")

	for _, secret := range []string{auditPatient1, auditBirth1, auditPatient2, auditBirth2, "1972-03-14", "1958-07-02"} {
		require.NotContains(t, logs.String(), secret)
		require.NotContains(t, stdout.String(), secret)
		require.NotContains(t, stderr.String(), secret)
		require.NotContains(t, out, secret)
		require.NotContains(t, errOut, secret)
	}
}

func TestAuditExport(t *testing.T) {
	as := newAuditStore(t)

	out, errOut, err := runCLI(t, "", "audit", "export", "--config", as.config, "--format", "csv")
	require.NoError(t, err)
	require.Equal(t, "audit export: wrote 6 records\n", errOut)
	rows, err := csv.NewReader(strings.NewReader(out)).ReadAll()
	require.NoError(t, err)
	require.Len(t, rows, 7)
	require.Equal(t, "id", rows[0][0])
	require.Equal(t, "6", rows[1][0])

	path := filepath.Join(t.TempDir(), "export.json")
	_, _, err = runCLI(t, "", "audit", "export", "--config", as.config, "--format", "fhir", "--patient", auditPatient1, "--out", path)
	require.NoError(t, err)
	info, err := os.Stat(path)
	require.NoError(t, err)
	require.Equal(t, os.FileMode(0o600), info.Mode().Perm(), "exports hold patient identifiers: owner only")
	data, err := os.ReadFile(path)
	require.NoError(t, err)
	u, err := jsonformat.NewUnmarshaller("UTC", fhirversion.R4)
	require.NoError(t, err)
	_, err = u.Unmarshal(data)
	require.NoError(t, err)
	var bundle struct {
		Entry []json.RawMessage `json:"entry"`
	}
	require.NoError(t, json.Unmarshal(data, &bundle))
	require.Len(t, bundle.Entry, 6, "a Provenance and an AuditEvent for each of the patient's 3 records")
	require.NotContains(t, string(data), auditPatient1)

	_, _, err = runCLI(t, "", "audit", "export", "--config", as.config, "--format", "xml")
	require.ErrorContains(t, err, "--format")
	_, _, err = runCLI(t, "", "audit", "export", "--config", as.config)
	require.ErrorContains(t, err, "format")
}
