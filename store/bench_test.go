package store_test

import (
	"crypto/rand"
	"database/sql"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"path/filepath"
	"sync/atomic"
	"testing"
	"time"

	"filtrate/internal/pgtest"
	"filtrate/store"
)

// benchParallelism makes RunParallel use 8 goroutines per CPU, enough
// concurrent Accepts for group commit to matter.
const benchParallelism = 8

// benchRecord is an invented audit record of typical size.
func benchRecord(key string) store.AuditRecord {
	exact := 71.23456
	return store.AuditRecord{
		Transport: "hl7v2", MessageID: "MSG-" + key, RawHash: "3f8a" + key,
		PatientID: "DEMO-BENCH-" + key, BirthDate: "19580704", Sex: "F",
		CollectedAt:     time.Date(2025, 3, 13, 7, 45, 0, 0, time.UTC),
		Inputs:          json.RawMessage(`{"creatinine":{"received":{"value":"88","unit":"umol/L"},"used":{"value":88,"unit":"umol/L","rule":"cal-demo","rule_version":"2"}}}`),
		Equation:        "ckd-epi-2021-cr",
		EquationVersion: "1",
		Steps:           json.RawMessage(`[{"name":"scr_mg_dl","value":0.99548},{"name":"ratio","value":1.42212},{"name":"power","value":-1.2},{"name":"age_factor","value":0.8423}]`),
		Exact:           &exact, Reported: "71", Unit: "mL/min/1.73m2", Category: "G2",
		Comments: []string{"Estimate assumes steady-state kidney function."},
		Policy:   "demo-policy", PolicyVersion: "3", ConfigHash: "c0ffee", SoftwareVersion: "bench",
		OutputMessageID: "OUT-" + key,
		Request:         json.RawMessage(`{"equation":"ckd-epi-2021-cr","sex":"F","birth_date":"1958-07-04","collected_at":"2025-03-13T07:45:00Z"}`),
	}
}

func runID(b *testing.B) string {
	var r [4]byte
	if _, err := rand.Read(r[:]); err != nil {
		b.Fatal(err)
	}
	return hex.EncodeToString(r[:])
}

// BenchmarkAccept measures accepted messages per second (each one audit
// record, one outbox item and one history point) under concurrent load.
func BenchmarkAccept(b *testing.B) {
	b.Run("sqlite", func(b *testing.B) {
		benchAccept(b, "file:"+filepath.Join(b.TempDir(), "bench.db"))
	})
	b.Run("postgres", func(b *testing.B) {
		benchAccept(b, pgtest.Fresh(b))
	})
}

func benchAccept(b *testing.B, dsn string) {
	st, err := store.Open(b.Context(), dsn)
	if err != nil {
		b.Fatal(err)
	}
	defer st.Close()
	run := runID(b)
	var n atomic.Int64
	b.SetParallelism(benchParallelism)
	b.ResetTimer()
	b.RunParallel(func(pb *testing.PB) {
		for pb.Next() {
			key := fmt.Sprintf("%s-%d", run, n.Add(1))
			rec := benchRecord(key)
			_, err := st.Accept(b.Context(), store.Submission{
				DedupKey: key,
				Records:  []store.AuditRecord{rec},
				Outbox: []store.OutboxMessage{{
					Destination: "lis", PartitionKey: rec.PatientID, MessageID: rec.OutputMessageID,
					ContentType: "application/hl7-v2", Payload: []byte("MSH|^~\\&|FILTRATE|DEMO|||20250313074500||ORU^R01|OUT|P|2.5.1\rPID|1||DEMO\rOBX|1|NM|62238-1^eGFR||71|mL/min/1.73m2\r"),
				}},
				History: []store.HistoryPoint{{
					PatientID: rec.PatientID, Analyte: "creatinine", Value: 88, Unit: "umol/L",
					CollectedAt: rec.CollectedAt, MessageID: rec.MessageID,
				}},
			})
			if err != nil {
				b.Error(err)
				return
			}
		}
	})
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "records/s")
}

// BenchmarkBareInsert inserts a row shaped like an audit record with one
// plain autocommit INSERT per row on the same PostgreSQL server, with the
// same concurrency: the floor to compare BenchmarkAccept/postgres with.
func BenchmarkBareInsert(b *testing.B) {
	dsn := pgtest.Fresh(b)
	// Open once to create the schema, then copy the audit table's shape
	// without its triggers, keys and indexes.
	st, err := store.Open(b.Context(), dsn)
	if err != nil {
		b.Fatal(err)
	}
	st.Close()
	db, err := sql.Open("postgres", dsn)
	if err != nil {
		b.Fatal(err)
	}
	defer db.Close()
	db.SetMaxOpenConns(8)
	db.SetMaxIdleConns(8)
	if _, err := db.ExecContext(b.Context(), `CREATE TABLE bare_records (LIKE audit_records)`); err != nil {
		b.Fatal(err)
	}
	const insert = `INSERT INTO bare_records (id, recorded_at, transport, message_id, dedup_key, raw_hash, patient_id, birth_date, sex, collected_at, inputs, equation, equation_version, steps, exact, reported, unit, category, comments, suppression_code, suppression_text, policy, policy_version, config_hash, software_version, output_message_id, request, content_hash, prev_hash)
VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16, $17, $18, $19, $20, $21, $22, $23, $24, $25, $26, $27, $28, $29)`
	var n atomic.Int64
	b.SetParallelism(benchParallelism)
	b.ResetTimer()
	b.RunParallel(func(pb *testing.PB) {
		for pb.Next() {
			id := n.Add(1)
			r := benchRecord(fmt.Sprint(id))
			_, err := db.ExecContext(b.Context(), insert, id, time.Now().UTC(), r.Transport, r.MessageID, r.MessageID, r.RawHash,
				r.PatientID, r.BirthDate, r.Sex, r.CollectedAt, string(r.Inputs), r.Equation, r.EquationVersion,
				string(r.Steps), *r.Exact, r.Reported, r.Unit, r.Category, `["Estimate assumes steady-state kidney function."]`,
				"", "", r.Policy, r.PolicyVersion, r.ConfigHash, r.SoftwareVersion, r.OutputMessageID,
				string(r.Request), store.GenesisHash, store.GenesisHash)
			if err != nil {
				b.Error(err)
				return
			}
		}
	})
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "records/s")
}
