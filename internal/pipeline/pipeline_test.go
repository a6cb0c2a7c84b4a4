package pipeline

import (
	"context"
	"encoding/json"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/stretchr/testify/require"

	"filtrate/calc"
	"filtrate/internal/telemetry"
	"filtrate/store"
)

func openStore(t *testing.T) store.Store {
	t.Helper()
	s, err := store.Open(context.Background(), "file:"+filepath.Join(t.TempDir(), "p.db"))
	require.NoError(t, err)
	t.Cleanup(func() { _ = s.Close() })
	return s
}

func snapshot(t *testing.T) *Snapshot {
	t.Helper()
	p, err := calc.Preset("nkf-asn-2021")
	require.NoError(t, err)
	return &Snapshot{Policy: p, ConfigHash: "cfg-1"}
}

func message() Message {
	at := time.Date(2026, 11, 30, 7, 10, 0, 0, time.UTC)
	return Message{
		Transport: "hl7v2", MessageID: "M1", DedupKey: "LIS|LAB|M1", Raw: []byte("raw message"),
		PatientID: "P1", BirthDate: "19720314", Sex: "F",
		Groups: []Group{{
			Key: "OBR1",
			Request: calc.Request{
				Sex: calc.SexFemale, BirthDate: time.Date(1972, 3, 14, 0, 0, 0, 0, time.UTC), CollectedAt: at,
				Measurements: []calc.Measurement{
					{Analyte: calc.Creatinine, ValueText: "0.92", Unit: "mg/dL", SourceID: "OBX2"},
					{Analyte: calc.CystatinC, ValueText: "<0.3", Unit: "mg/L", SourceID: "OBX3"},
				},
			},
			Withdrawn: []Withdrawal{{SourceID: "OBX4", Analyte: calc.Creatinine, Status: "W"}},
		}},
	}
}

func TestCommitRecordsEveryOutcome(t *testing.T) {
	ctx := context.Background()
	s := openStore(t)
	reg := prometheus.NewPedanticRegistry()
	m := telemetry.New(reg, "t", []string{"ckd-epi-2021-cr"}, []string{string(calc.ReasonValueCensored)})
	p := NewProcessor(calc.NewCalculator(calc.Builtin()), s, "v-test", m)
	snap := snapshot(t)
	msg := message()

	evals := p.Evaluate(msg, snap)
	require.Len(t, evals, 1)
	require.Equal(t, "nkf-asn-2021", evals[0].Request.Policy.Name, "the snapshot's policy is applied")
	out := []Output{{Destination: "hl7v2", PartitionKey: "P1", MessageID: "M1", ContentType: "application/hl7-v2", Payload: []byte("enriched")}}
	rcpt, err := p.Commit(ctx, msg, evals, snap, out)
	require.NoError(t, err)
	require.False(t, rcpt.Duplicate)
	// One computed value, one refusal (censored cystatin C), one withdrawal.
	require.Len(t, rcpt.RecordIDs, 3)
	require.Len(t, rcpt.OutboxIDs, 1)

	rec, err := s.Record(ctx, rcpt.RecordIDs[0])
	require.NoError(t, err)
	require.Equal(t, "ckd-epi-2021-cr", rec.Equation)
	require.Equal(t, "cfg-1", rec.ConfigHash)
	require.Equal(t, "v-test", rec.SoftwareVersion)
	require.Equal(t, RawHash([]byte("raw message")), rec.RawHash)
	require.Equal(t, "M1", rec.OutputMessageID)
	require.NotNil(t, rec.Exact)

	// The stored request alone recomputes the same value.
	var req calc.Request
	require.NoError(t, json.Unmarshal(rec.Request, &req))
	again := calc.NewCalculator(calc.Builtin()).Evaluate(req)
	require.Equal(t, *rec.Exact, again.Results[0].Exact)
	require.Equal(t, rec.Reported, again.Results[0].Reported)

	refusal, err := s.Record(ctx, rcpt.RecordIDs[1])
	require.NoError(t, err)
	require.Equal(t, string(calc.ReasonValueCensored), refusal.SuppressionCode)
	require.Nil(t, refusal.Exact)
	withdrawn, err := s.Record(ctx, rcpt.RecordIDs[2])
	require.NoError(t, err)
	require.Equal(t, ReasonWithdrawn, withdrawn.SuppressionCode)

	// Only the accepted creatinine enters the history.
	hist, err := s.History(ctx, "P1", "creatinine", time.Time{})
	require.NoError(t, err)
	require.Len(t, hist, 1)
	require.InDelta(t, 0.92, hist[0].Value, 1e-12)
	hist, err = s.History(ctx, "P1", "cystatin_c", time.Time{})
	require.NoError(t, err)
	require.Empty(t, hist)

	require.Equal(t, 1.0, testutil.ToFloat64(m.Results.WithLabelValues("ckd-epi-2021-cr")))
	require.Equal(t, 1.0, testutil.ToFloat64(m.Refusals.WithLabelValues(string(calc.ReasonValueCensored))))

	// A resent copy changes nothing and counts nothing.
	dup, err := p.Commit(ctx, msg, p.Evaluate(msg, snap), snap, out)
	require.NoError(t, err)
	require.True(t, dup.Duplicate)
	require.Equal(t, rcpt.RecordIDs, dup.RecordIDs)
	require.Equal(t, 1.0, testutil.ToFloat64(m.Results.WithLabelValues("ckd-epi-2021-cr")))
	recs, err := s.Search(ctx, store.Filter{MessageID: "M1"})
	require.NoError(t, err)
	require.Len(t, recs, 3)
}

func TestMessageWithoutKidneyResultsStillCommits(t *testing.T) {
	ctx := context.Background()
	s := openStore(t)
	p := NewProcessor(calc.NewCalculator(calc.Builtin()), s, "v", nil)
	snap := snapshot(t)
	msg := Message{Transport: "hl7v2", MessageID: "M2", DedupKey: "k2", Raw: []byte("x"), PatientID: "P2"}
	rcpt, err := p.Commit(ctx, msg, p.Evaluate(msg, snap), snap, []Output{{Destination: "hl7v2", MessageID: "M2", Payload: []byte("x")}})
	require.NoError(t, err)
	require.Empty(t, rcpt.RecordIDs)
	require.Len(t, rcpt.OutboxIDs, 1)
	dup, err := p.Commit(ctx, msg, nil, snap, []Output{{Destination: "hl7v2", MessageID: "M2", Payload: []byte("x")}})
	require.NoError(t, err)
	require.True(t, dup.Duplicate)
}

// A sender writing Latin-1 (or NUL bytes) must not be refused for ever: the
// text is stored as valid UTF-8, and keys that would change are hashed so
// that different keys never merge.
func TestTextFromOtherCharacterSetsIsStorable(t *testing.T) {
	ctx := context.Background()
	s := openStore(t)
	p := NewProcessor(calc.NewCalculator(calc.Builtin()), s, "v", nil)
	snap := snapshot(t)
	msg := message()
	msg.DedupKey = "hl7v2|H\xf4pital|LAB|M1"
	msg.PatientID = "P\xe91\x00"
	msg.MessageID = "M\xe91"
	rcpt, err := p.Commit(ctx, msg, p.Evaluate(msg, snap), snap, []Output{{Destination: "hl7v2", PartitionKey: msg.PatientID, MessageID: msg.MessageID, Payload: []byte("x")}})
	require.NoError(t, err)
	rec, err := s.Record(ctx, rcpt.RecordIDs[0])
	require.NoError(t, err)
	require.Equal(t, "P\uFFFD1", rec.PatientID)
	require.Equal(t, "M\uFFFD1", rec.MessageID)
	require.True(t, strings.HasPrefix(rec.DedupKey, "sha256:"))

	other := msg
	other.DedupKey = "hl7v2|H\xf5pital|LAB|M1" // cleans to the same text
	rc2, err := p.Commit(ctx, other, p.Evaluate(other, snap), snap, nil)
	require.NoError(t, err)
	require.False(t, rc2.Duplicate, "different keys stay different")
}
