package audit_test

import (
	"context"
	"database/sql"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
	"filtrate/internal/pipeline"
	"filtrate/store"
)

// Invented patients of an invented laboratory: the identifiers and dates of
// birth below must never appear in logs or in the FHIR export.
const (
	patientA   = "INV-PAT-7731"
	birthA     = "19720314"
	patientB   = "INV-PAT-8802"
	birthB     = "19580702"
	patientC   = "INV-PAT-9113"
	birthC     = "19661120"
	patientD   = "INV-PAT-4420"
	birthD     = "19800105"
	softwareV  = "v-test"
	configHash = "cfg-test-1"
)

// fixture is a store in a temporary directory and the times it stamps.
type fixture struct {
	path string
	dsn  string
	st   store.Store
	mu   sync.Mutex
	now  time.Time
}

// clock returns the fixture's current time; advance moves it.
func (f *fixture) clock() time.Time {
	f.mu.Lock()
	defer f.mu.Unlock()
	return f.now
}

func (f *fixture) advance(d time.Duration) {
	f.mu.Lock()
	f.now = f.now.Add(d)
	f.mu.Unlock()
}

func newFixture(t *testing.T) *fixture {
	t.Helper()
	f := &fixture{path: filepath.Join(t.TempDir(), "audit.db"), now: time.Date(2026, 11, 30, 8, 0, 0, 0, time.UTC)}
	f.dsn = "file:" + f.path
	f.open(t)
	t.Cleanup(func() { _ = f.st.Close() })
	return f
}

func (f *fixture) open(t *testing.T) {
	t.Helper()
	st, err := store.Open(context.Background(), f.dsn, store.WithClock(f.clock), store.WithSoftwareVersion(softwareV))
	require.NoError(t, err)
	f.st = st
}

func (f *fixture) reopen(t *testing.T) {
	t.Helper()
	require.NoError(t, f.st.Close())
	f.open(t)
}

// tamper runs SQL on the store's file behind its back, after dropping the
// append-only triggers (store/migrations/sqlite/00001_init.sql), as someone
// holding the file could.
func (f *fixture) tamper(t *testing.T, stmts ...string) {
	t.Helper()
	require.NoError(t, f.st.Close())
	db, err := sql.Open("sqlite", f.dsn)
	require.NoError(t, err)
	defer db.Close()
	for _, s := range append([]string{
		`DROP TRIGGER audit_records_no_update`,
		`DROP TRIGGER audit_records_no_delete`,
	}, stmts...) {
		_, err := db.Exec(s)
		require.NoError(t, err, s)
	}
	require.NoError(t, db.Close())
	f.open(t)
}

func snapshot(t *testing.T, sexRule calc.SexRule, cals ...calc.CalibrationRule) *pipeline.Snapshot {
	t.Helper()
	p, err := calc.Preset("nkf-asn-2021")
	require.NoError(t, err)
	if sexRule != "" {
		p.SexUnknown = sexRule
	}
	return &pipeline.Snapshot{Policy: p, Calibrations: cals, ConfigHash: configHash}
}

func date(y int, m time.Month, d int) time.Time { return time.Date(y, m, d, 0, 0, 0, 0, time.UTC) }

// messages returns four invented messages; together they produce records
// of every kind: results, a refusal, a withdrawal, two results under an
// assumed sex, and a calibrated input.
func messages() []struct {
	msg  pipeline.Message
	snap func(t *testing.T) *pipeline.Snapshot
} {
	at := time.Date(2026, 11, 30, 7, 10, 0, 0, time.UTC)
	cal := calc.CalibrationRule{
		ID: "CAL-CREA-ENZ", Version: "2", Analyte: calc.Creatinine, Method: "ENZ", Instrument: "AN-1",
		Slope: 1.02, Intercept: -0.01, Unit: "mg/dL", Traceable: true,
	}
	return []struct {
		msg  pipeline.Message
		snap func(t *testing.T) *pipeline.Snapshot
	}{
		{
			// One result, one refusal (censored cystatin C), one withdrawal.
			msg: pipeline.Message{
				Transport: "hl7v2", MessageID: "MSG-A", DedupKey: "LIS|LAB|MSG-A", Raw: []byte("raw A"),
				PatientID: patientA, BirthDate: birthA, Sex: "F",
				Groups: []pipeline.Group{{
					Key: "OBR1",
					Request: calc.Request{
						Sex: calc.SexFemale, BirthDate: date(1972, 3, 14), CollectedAt: at,
						Measurements: []calc.Measurement{
							{Analyte: calc.Creatinine, ValueText: "0.92", Unit: "mg/dL", SourceID: "OBX2"},
							{Analyte: calc.CystatinC, ValueText: "<0.3", Unit: "mg/L", SourceID: "OBX3"},
						},
					},
					Withdrawn: []pipeline.Withdrawal{{SourceID: "OBX4", Analyte: calc.Creatinine, Status: "W"}},
				}},
			},
			snap: func(t *testing.T) *pipeline.Snapshot { return snapshot(t, "") },
		},
		{
			// Creatinine and cystatin C: three results.
			msg: pipeline.Message{
				Transport: "hl7v2", MessageID: "MSG-B", DedupKey: "LIS|LAB|MSG-B", Raw: []byte("raw B"),
				PatientID: patientB, BirthDate: birthB, Sex: "M",
				Groups: []pipeline.Group{{
					Key: "OBR1",
					Request: calc.Request{
						Sex: calc.SexMale, BirthDate: date(1958, 7, 2), CollectedAt: at,
						Measurements: []calc.Measurement{
							{Analyte: calc.Creatinine, ValueText: "88", Unit: "umol/L", SourceID: "OBX2"},
							{Analyte: calc.CystatinC, ValueText: "1.10", Unit: "mg/L", SourceID: "OBX3"},
						},
					},
				}},
			},
			snap: func(t *testing.T) *pipeline.Snapshot { return snapshot(t, "") },
		},
		{
			// Sex not recorded, policy "both": two results, one per assumed sex.
			msg: pipeline.Message{
				Transport: "fhir", MessageID: "BUNDLE-C", DedupKey: "fhir|BUNDLE-C", Raw: []byte("raw C"),
				PatientID: patientC, BirthDate: birthC, Sex: "unknown",
				Groups: []pipeline.Group{{
					Key: "G1",
					Request: calc.Request{
						Sex: calc.SexUnknown, BirthDate: date(1966, 11, 20), CollectedAt: at,
						Measurements: []calc.Measurement{{Analyte: calc.Creatinine, ValueText: "1.05", Unit: "mg/dL", SourceID: "obs-1"}},
					},
				}},
			},
			snap: func(t *testing.T) *pipeline.Snapshot { return snapshot(t, calc.SexRuleBoth) },
		},
		{
			// A calibrated creatinine.
			msg: pipeline.Message{
				Transport: "hl7v2", MessageID: "MSG-D", DedupKey: "LIS|LAB|MSG-D", Raw: []byte("raw D"),
				PatientID: patientD, BirthDate: birthD, Sex: "F",
				Groups: []pipeline.Group{{
					Key: "OBR1",
					Request: calc.Request{
						Sex: calc.SexFemale, BirthDate: date(1980, 1, 5), CollectedAt: at,
						Measurements: []calc.Measurement{{Analyte: calc.Creatinine, ValueText: "1.20", Unit: "mg/dL", Method: "ENZ", Instrument: "AN-1", SourceID: "OBX2"}},
					},
				}},
			},
			snap: func(t *testing.T) *pipeline.Snapshot { return snapshot(t, "", cal) },
		},
	}
}

// fixtureRecords is how many records commitAll writes: 3 + 3 + 2 + 1.
const fixtureRecords = 9

// commitAll processes every message through the pipeline with c (nil: the
// builtin calculator) and acc (nil: the store), a minute apart, and
// returns the record IDs per message.
func commitAll(t *testing.T, f *fixture, c *calc.Calculator, acc pipeline.Acceptor) [][]int64 {
	t.Helper()
	if c == nil {
		c = calc.NewCalculator(calc.Builtin())
	}
	if acc == nil {
		acc = f.st
	}
	p := pipeline.NewProcessor(c, acc, softwareV, nil)
	var ids [][]int64
	for _, m := range messages() {
		snap := m.snap(t)
		outs := []pipeline.Output{{Destination: "downstream", PartitionKey: m.msg.PatientID, MessageID: "OUT-" + m.msg.MessageID, ContentType: "application/hl7-v2", Payload: []byte("enriched")}}
		rcpt, err := p.Commit(context.Background(), m.msg, p.Evaluate(m.msg, snap), snap, outs)
		require.NoError(t, err)
		ids = append(ids, rcpt.RecordIDs)
		f.advance(time.Minute)
	}
	return ids
}

// acceptFunc adapts a function to pipeline.Acceptor.
type acceptFunc func(ctx context.Context, sub store.Submission) (store.Receipt, error)

func (a acceptFunc) Accept(ctx context.Context, sub store.Submission) (store.Receipt, error) {
	return a(ctx, sub)
}

// builtinLatest returns the latest version of every builtin equation.
func builtinLatest() []calc.Equation {
	reg := calc.Builtin()
	var eqs []calc.Equation
	for _, id := range reg.IDs() {
		e, _ := reg.Latest(id)
		eqs = append(eqs, e)
	}
	return eqs
}

func registry(t *testing.T, eqs ...calc.Equation) *calc.Calculator {
	t.Helper()
	reg, err := calc.NewRegistry(eqs...)
	require.NoError(t, err)
	return calc.NewCalculator(reg)
}

// oldCKDEPI2021Cr is an invented superseded version "0" of
// ckd-epi-2021-cr for the tests: the version 1 arithmetic scaled by 0.99,
// so that the two versions give different values from the same inputs.
func oldCKDEPI2021Cr() calc.Equation {
	cur, _ := calc.Builtin().Latest("ckd-epi-2021-cr")
	old := cur
	old.Version = "0"
	old.Compute = func(in calc.Inputs) (float64, []calc.Step, error) {
		v, steps, err := cur.Compute(in)
		if err != nil {
			return 0, nil, err
		}
		return v * 0.99, append(steps, calc.Step{Name: "version 0 factor", Formula: "× 0.99", Value: v * 0.99}), nil
	}
	return old
}

func allRecords(t *testing.T, st store.Store) []store.AuditRecord {
	t.Helper()
	var recs []store.AuditRecord
	require.NoError(t, st.Walk(context.Background(), 1, func(r store.AuditRecord) error {
		recs = append(recs, r)
		return nil
	}))
	return recs
}
