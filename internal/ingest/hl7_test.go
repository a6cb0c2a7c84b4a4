package ingest

import (
	"bytes"
	"context"
	"flag"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/stretchr/testify/require"

	"filtrate/calc"
	"filtrate/config"
	"filtrate/hl7v2"
	"filtrate/internal/pipeline"
	"filtrate/internal/telemetry"
	"filtrate/store"
)

var update = flag.Bool("update", false, "rewrite golden files")

const demoDir = "../../testdata/demo"

// fixedNow is the clock of the golden files (ACK MSH-7 and control IDs).
var fixedNow = time.Date(2026, 11, 30, 12, 0, 0, 0, time.UTC)

type harness struct {
	h     *HL7
	store store.Store
	reg   *prometheus.Registry
	m     *telemetry.Metrics
	state *State
}

func newHarness(t *testing.T, cfg *config.Config) *harness {
	t.Helper()
	s, err := store.Open(context.Background(), "file:"+filepath.Join(t.TempDir(), "t.db"))
	require.NoError(t, err)
	t.Cleanup(func() { _ = s.Close() })
	c := calc.NewCalculator(calc.Builtin())
	st, err := StateFromConfig(cfg, c.Registry())
	require.NoError(t, err)
	reg := prometheus.NewPedanticRegistry()
	m := telemetry.New(reg, "test", c.Registry().IDs(), nil)
	h := &HL7{
		Proc:    pipeline.NewProcessor(c, s, "test", m),
		State:   func() *State { return st },
		Metrics: m,
		Now:     func() time.Time { return fixedNow },
	}
	return &harness{h: h, store: s, reg: reg, m: m, state: st}
}

func demoConfig(t *testing.T) *config.Config {
	t.Helper()
	cfg, err := config.LoadFile(filepath.Join(demoDir, "filtrate.yml"))
	require.NoError(t, err)
	return cfg
}

func golden(t *testing.T, path string, got []byte) {
	t.Helper()
	// Goldens are stored with \n line ends for review; HL7 uses \r.
	text := bytes.ReplaceAll(got, []byte("\r"), []byte("\n"))
	if *update {
		require.NoError(t, os.MkdirAll(filepath.Dir(path), 0o755))
		require.NoError(t, os.WriteFile(path, text, 0o644))
		return
	}
	want, err := os.ReadFile(path)
	require.NoError(t, err, "missing golden file; run go test ./internal/ingest -update")
	require.Equal(t, string(want), string(text))
}

// The demo scenario through the real pipeline: each input message gives the
// forwarded message and the acknowledgement in testdata/demo/expected.
func TestDemoScenarioGolden(t *testing.T) {
	hs := newHarness(t, demoConfig(t))
	files, err := filepath.Glob(filepath.Join(demoDir, "*.hl7"))
	require.NoError(t, err)
	require.NotEmpty(t, files)
	for _, f := range files {
		name := strings.TrimSuffix(filepath.Base(f), ".hl7")
		raw, err := os.ReadFile(f)
		require.NoError(t, err)
		msgs := hl7v2.SplitMessages(raw)
		require.Len(t, msgs, 1, f)
		p := hs.h.Handle(context.Background(), msgs[0])
		require.Equal(t, hl7v2.AckAccept, p.Code, "%s: %v", name, p.Err)
		golden(t, filepath.Join(demoDir, "expected", name+".forwarded.hl7"), p.Enriched)
		golden(t, filepath.Join(demoDir, "expected", name+".ack.hl7"), p.Ack)
	}
}

func handle(t *testing.T, hs *harness, text string) Processed {
	t.Helper()
	return hs.h.Handle(context.Background(), []byte(strings.ReplaceAll(text, "\n", "\r")))
}

const adult = `MSH|^~\&|LIS|LAB|EHR|HOSP|20261130081500||ORU^R01^ORU_R01|C1|P|2.5.1
PID|1||P1^^^LAB^MR||Doe^Test||19720314|F
OBR|1|O1|F1|RENAL^Renal^L|||20261130071000
OBX|1|NM|2160-0^Creatinine^LN||0.92|mg/dL|||||F|||20261130071000
`

func TestAcknowledgeOnlyWhatIsRecorded(t *testing.T) {
	hs := newHarness(t, config.Default())
	p := handle(t, hs, adult)
	require.Equal(t, hl7v2.AckAccept, p.Code)
	ack, err := hl7v2.ParseACK(p.Ack)
	require.NoError(t, err)
	require.Equal(t, "C1", ack.ControlID)
	recs, err := hs.store.Search(context.Background(), store.Filter{MessageID: "C1"})
	require.NoError(t, err)
	require.Len(t, recs, 1, "AA is sent only after the audit record exists")
	require.Equal(t, "ckd-epi-2021-cr", recs[0].Equation)
	require.Equal(t, "P1^^^LAB", recs[0].PatientID)
	require.Equal(t, "19720314", recs[0].BirthDate)

	// The same message again: AA, nothing new recorded.
	again := handle(t, hs, adult)
	require.Equal(t, hl7v2.AckAccept, again.Code)
	require.True(t, again.Duplicate)
	recs, err = hs.store.Search(context.Background(), store.Filter{MessageID: "C1"})
	require.NoError(t, err)
	require.Len(t, recs, 1)
	require.Equal(t, 2.0, testutil.ToFloat64(hs.m.Acknowledged.WithLabelValues("hl7v2", "AA")))
}

// A store that fails makes the handler answer AE, so the sender retries.
type failingStore struct{}

func (failingStore) Accept(context.Context, store.Submission) (store.Receipt, error) {
	return store.Receipt{}, context.DeadlineExceeded
}

func TestStoreFailureAnswersAE(t *testing.T) {
	hs := newHarness(t, config.Default())
	hs.h.Proc = pipeline.NewProcessor(calc.NewCalculator(calc.Builtin()), failingStore{}, "test", nil)
	p := handle(t, hs, adult)
	require.Equal(t, hl7v2.AckError, p.Code)
	ack, err := hl7v2.ParseACK(p.Ack)
	require.NoError(t, err)
	require.Equal(t, "AE", ack.Code)
	require.Equal(t, "C1", ack.ControlID)
}

func TestBadInputIsRejectedNotCrashed(t *testing.T) {
	hs := newHarness(t, config.Default())
	tests := []struct {
		name, msg string
		code      string
		errCode   string
	}{
		{"no MSH", "PID|1||P1\rOBX|1|NM|2160-0^Cr^LN||1|mg/dL\r", "AR", "100"},
		{"empty", "", "AR", "100"},
		{"binary", "\x00\x01\x02MSH", "AR", ""},
		{"not an ORU", strings.Replace(adult, "ORU^R01^ORU_R01", "ADT^A01^ADT_A01", 1), "AR", "200"},
		{"garbled delimiters", "MSH|||\r", "AR", ""},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			p := handle(t, hs, tc.msg)
			require.Equal(t, tc.code, p.Code)
			ack, err := hl7v2.ParseACK(p.Ack)
			require.NoError(t, err, "even a refused frame gets a readable ACK")
			require.Equal(t, tc.code, ack.Code)
			if tc.errCode != "" {
				require.Equal(t, tc.errCode, ack.ErrorCode)
			}
		})
	}
	recs, err := hs.store.Search(context.Background(), store.Filter{})
	require.NoError(t, err)
	require.Empty(t, recs, "nothing is recorded for a refused message")
}

// Results that cannot be computed are acknowledged, recorded with their
// reason and forwarded with a note, never with a number.
func TestUncomputableResultsAreForwardedWithReason(t *testing.T) {
	cfg := config.Default()
	cfg.HL7v2.Forward = "127.0.0.1:1" // only makes the handler queue an outbox item
	hs := newHarness(t, cfg)
	tests := []struct {
		name, from, to, reason string
	}{
		{"unknown unit", "|0.92|mg/dL|", "|0.92|mg%|", "unit-unknown"},
		{"censored", "|NM|2160-0^Creatinine^LN||0.92|", "|SN|2160-0^Creatinine^LN||<^0.2|", "value-censored"},
		{"implausible", "|0.92|mg/dL|", "|85|mg/dL|", "value-implausible"},
		{"missing birth date", "||19720314|F", "|||F", "age-missing"},
		{"birth year only", "||19720314|F", "||1972|F", "age-missing"}, // a partial date would shift the age: refused
		{"collection date without day", "|||20261130071000\nOBX", "|||202611\nOBX", "age-missing"},
		{"missing sex", "||19720314|F", "||19720314|", "sex-unknown"},
		{"child without height", "||19720314|F", "||20190101|F", "height-missing"},
	}
	for i, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			msg := strings.Replace(adult, tc.from, tc.to, 1)
			require.NotEqual(t, adult, msg)
			msg = strings.Replace(msg, "|C1|", "|R"+string(rune('0'+i))+"|", 1)
			p := handle(t, hs, msg)
			require.Equal(t, hl7v2.AckAccept, p.Code)
			require.NotContains(t, string(p.Enriched), "98979-8", "no eGFR OBX")
			require.Contains(t, string(p.Enriched), "\rNTE|", "a note says why")
			recs, err := hs.store.Search(context.Background(), store.Filter{MessageID: "R" + string(rune('0'+i))})
			require.NoError(t, err)
			require.NotEmpty(t, recs)
			require.Equal(t, tc.reason, recs[0].SuppressionCode)
			require.Nil(t, recs[0].Exact)
		})
	}
	stats, err := hs.store.OutboxStats(context.Background())
	require.NoError(t, err)
	require.Len(t, stats, 1)
	require.EqualValues(t, len(tests), stats[0].Pending, "every message is still forwarded")
}

func BenchmarkHandleORU(b *testing.B) {
	s, err := store.Open(context.Background(), "file:"+filepath.Join(b.TempDir(), "b.db"))
	require.NoError(b, err)
	defer s.Close()
	c := calc.NewCalculator(calc.Builtin())
	st, err := StateFromConfig(config.Default(), c.Registry())
	require.NoError(b, err)
	h := &HL7{Proc: pipeline.NewProcessor(c, s, "bench", nil), State: func() *State { return st }}
	base := strings.ReplaceAll(adult, "\n", "\r")
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		i++
		msg := strings.Replace(base, "|C1|", "|B"+time.Duration(i).String()+"|", 1)
		if p := h.Handle(context.Background(), []byte(msg)); p.Code != "AA" {
			b.Fatal(p.Err)
		}
	}
}

// A control ID reused for a different report (a sender's counter reset) is
// processed, not dropped as a duplicate; a resend that differs only in MSH-7
// is still a duplicate.
func TestReusedControlIDIsNotADuplicate(t *testing.T) {
	hs := newHarness(t, config.Default())
	require.Equal(t, hl7v2.AckAccept, handle(t, hs, adult).Code)
	resend := handle(t, hs, strings.Replace(adult, "|20261130081500|", "|20261130091500|", 1))
	require.True(t, resend.Duplicate, "same body, new message time: the same message")
	other := handle(t, hs, strings.Replace(strings.Replace(adult, "P1^^^LAB", "P2^^^LAB", 1), "|0.92|", "|1.40|", 1))
	require.Equal(t, hl7v2.AckAccept, other.Code)
	require.False(t, other.Duplicate, "a different report under a reused control ID is processed")
	recs, err := hs.store.Search(context.Background(), store.Filter{MessageID: "C1"})
	require.NoError(t, err)
	require.Len(t, recs, 2)
}

// Age counts calendar days in the laboratory's zone: 01:00 UTC on
// 16 March 2024 is still 15 March in New York, the day before this
// patient's 18th birthday, so the adult equation must not be used.
func TestAgeUsesTheLaboratoryTimeZone(t *testing.T) {
	cfg, err := config.Load([]byte("timezone: America/New_York\n"), "tz.yml")
	require.NoError(t, err)
	hs := newHarness(t, cfg)
	msg := strings.NewReplacer("19720314|F", "20060316|M", "|||20261130071000\nOBX", "|||20240316010000+0000\nOBX").Replace(adult)
	p := handle(t, hs, msg)
	require.Equal(t, hl7v2.AckAccept, p.Code)
	require.Len(t, p.Evaluated, 1)
	o := p.Evaluated[0].Outcome
	require.NotNil(t, o.AgeYears)
	require.Less(t, *o.AgeYears, 18.0)
	require.Empty(t, o.Results, "CKiD U25 needs height; no adult equation at 17")
	require.Equal(t, calc.ReasonHeightMissing, o.Refusals[0].Code)
}

func TestControlIDIsRequired(t *testing.T) {
	hs := newHarness(t, config.Default())
	p := handle(t, hs, strings.Replace(adult, "|C1|", "||", 1))
	require.Equal(t, hl7v2.AckReject, p.Code)
	ack, err := hl7v2.ParseACK(p.Ack)
	require.NoError(t, err)
	require.Equal(t, hl7v2.ErrCodeRequiredField, ack.ErrorCode)
}

// A report without a patient identifier is still delivered in order with
// the rest of its sender's reports.
func TestPartitionWithoutPatientIdentifier(t *testing.T) {
	cfg := config.Default()
	cfg.HL7v2.Forward = "127.0.0.1:1"
	hs := newHarness(t, cfg)
	require.Equal(t, hl7v2.AckAccept, handle(t, hs, strings.Replace(adult, "P1^^^LAB^MR", "", 1)).Code)
	items, err := hs.store.Claim(context.Background(), DestinationHL7, "t", 10, time.Minute)
	require.NoError(t, err)
	require.Len(t, items, 1)
	require.Equal(t, "sender:LIS|LAB", items[0].PartitionKey)
}
