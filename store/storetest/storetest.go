// Package storetest is the behaviour suite every store backend must pass.
// The SQLite and PostgreSQL tests of package store both call [Run], so the
// two backends are held to one behaviour.
//
// All patients, messages and values here are invented test data; none is a
// clinical check value.
package storetest

import (
	"crypto/sha256"
	"database/sql"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"runtime"
	"slices"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"filtrate/store"
)

// Backend describes the backend under test.
type Backend struct {
	// NewDSN returns the DSN of a fresh, empty database private to t and
	// removes it when t ends.
	NewDSN func(t *testing.T) string
	// Driver is the database/sql driver name that opens a DSN from NewDSN
	// directly, with full privileges, for the tests that go around the store
	// ("sqlite" or "postgres").
	Driver string
	// DisableAppendOnly removes the append-only protection of
	// audit_records through db, as an attacker with owner rights could.
	DisableAppendOnly func(t *testing.T, db *sql.DB)
	// HasTruncate is true when the database has TRUNCATE, which must then be
	// refused on audit records.
	HasTruncate bool
}

// Clock is a settable clock for store.WithClock, safe for concurrent use.
type Clock struct {
	mu  sync.Mutex
	now time.Time
}

// NewClock returns a Clock reading t.
func NewClock(t time.Time) *Clock { return &Clock{now: t} }

// Now returns the clock's time.
func (c *Clock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.now
}

// Advance moves the clock forward by d.
func (c *Clock) Advance(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.now = c.now.Add(d)
}

// t0 is the suite's starting time (invented; the sub-microsecond part checks
// that the store keeps microseconds).
var t0 = time.Date(2025, 3, 14, 9, 26, 53, 589793238, time.UTC)

const softwareVersion = "0.0.0-storetest"

type suite struct {
	b Backend
}

// Run runs the behaviour suite against a backend.
func Run(t *testing.T, b Backend) {
	s := suite{b: b}
	tests := []struct {
		name string
		fn   func(t *testing.T)
	}{
		{"AcceptAndReadBack", s.acceptAndReadBack},
		{"Search", s.search},
		{"Duplicate", s.duplicate},
		{"ConcurrentDuplicates", s.concurrentDuplicates},
		{"FailingSubmissionAmongConcurrent", s.failingSubmission},
		{"Validation", s.validation},
		{"ChainAfter200ConcurrentAccepts", s.chain200},
		{"TwoStoresOneChain", s.twoStoresOneChain},
		{"ReopenContinuesChain", s.reopen},
		{"Walk", s.walk},
		{"OutboxLifecycle", s.outboxLifecycle},
		{"PartitionOrder", s.partitionOrder},
		{"LeaseExpiry", s.leaseExpiry},
		{"TwoStoresClaimConcurrently", s.twoStoresClaim},
		{"OutboxStats", s.outboxStats},
		{"History", s.history},
		{"Reported", s.reported},
		{"AppendOnly", s.appendOnly},
		{"TamperDetection", s.tamper},
		{"ReadyPingClose", s.readyPingClose},
	}
	for _, tc := range tests {
		t.Run(tc.name, tc.fn)
	}
}

func (s suite) open(t *testing.T, dsn string, clk *Clock, opts ...store.Option) store.Store {
	t.Helper()
	opts = append([]store.Option{store.WithClock(clk.Now), store.WithSoftwareVersion(softwareVersion)}, opts...)
	st, err := store.Open(t.Context(), dsn, opts...)
	require.NoError(t, err)
	t.Cleanup(func() { require.NoError(t, st.Close()) })
	return st
}

func (s suite) fresh(t *testing.T) (store.Store, *Clock, string) {
	t.Helper()
	dsn := s.b.NewDSN(t)
	clk := NewClock(t0)
	return s.open(t, dsn, clk), clk, dsn
}

func (s suite) raw(t *testing.T, dsn string) *sql.DB {
	t.Helper()
	db, err := sql.Open(s.b.Driver, dsn)
	require.NoError(t, err)
	t.Cleanup(func() { db.Close() })
	return db
}

func hexHash(s string) string {
	sum := sha256.Sum256([]byte(s))
	return hex.EncodeToString(sum[:])
}

func ptr(f float64) *float64 { return &f }

// record returns an invented audit record for patient.
func record(key, patient string, n int) store.AuditRecord {
	return store.AuditRecord{
		Transport:       "hl7v2",
		MessageID:       "MSG-" + key,
		RawHash:         hexHash("raw " + key),
		PatientID:       patient,
		BirthDate:       "19580704",
		Sex:             "F",
		CollectedAt:     time.Date(2025, 3, 13, 7, 45, 0, 123456000, time.UTC),
		Inputs:          json.RawMessage(`{"creatinine":{"received":{"value":"88","unit":"umol/L"},"used":{"value":88,"unit":"umol/L","rule":"cal-demo","rule_version":"2"}}}`),
		Equation:        "ckd-epi-2021-cr",
		EquationVersion: "1",
		Steps:           json.RawMessage(`[{"name":"scr_mg_dl","value":0.9955}, {"name":"ratio","value":1.422}]`),
		Exact:           ptr(61.5 + float64(n)),
		Reported:        fmt.Sprint(61 + n),
		Unit:            "mL/min/1.73m2",
		Category:        "G2",
		Comments:        []string{"Estimate assumes steady-state kidney function.", `Quote " and <tag> & backslash \ survive.`},
		Policy:          "demo-policy",
		PolicyVersion:   "3",
		ConfigHash:      hexHash("config"),
		OutputMessageID: "OUT-" + key,
		Request:         json.RawMessage(`{"equation":"ckd-epi-2021-cr","sex":"F"}`),
	}
}

// submission returns an invented submission with nrec records, one outbox
// item for destination "lis" partitioned by patient, and one history point.
func submission(key, patient string, nrec int) store.Submission {
	sub := store.Submission{DedupKey: key}
	for i := range nrec {
		sub.Records = append(sub.Records, record(key, patient, i))
	}
	sub.Outbox = []store.OutboxMessage{{
		Destination:  "lis",
		PartitionKey: patient,
		MessageID:    "OUT-" + key,
		ContentType:  "application/hl7-v2",
		Payload:      []byte("MSH|^~\\&|FILTRATE|DEMO\rPID|1||" + patient + "\r"),
	}}
	sub.History = []store.HistoryPoint{{
		PatientID:   patient,
		Analyte:     "creatinine",
		Value:       88,
		Unit:        "umol/L",
		CollectedAt: time.Date(2025, 3, 13, 7, 45, 0, 123456000, time.UTC),
		MessageID:   "MSG-" + key,
	}}
	return sub
}

// outboxOnly returns a submission holding one outbox item.
func outboxOnly(key, destination, partition string) store.Submission {
	return store.Submission{DedupKey: key, Outbox: []store.OutboxMessage{{
		Destination: destination, PartitionKey: partition, MessageID: "OUT-" + key,
		ContentType: "application/hl7-v2", Payload: []byte("payload " + key),
	}}}
}

// verify walks the whole chain and returns the verifier after checking the
// head.
func verify(t *testing.T, st store.Store) *store.Verifier {
	t.Helper()
	v := store.NewVerifier()
	require.NoError(t, st.Walk(t.Context(), 1, func(r store.AuditRecord) error {
		v.Add(r)
		return nil
	}))
	head, err := st.Head(t.Context())
	require.NoError(t, err)
	v.CheckHead(head)
	return v
}

func (s suite) acceptAndReadBack(t *testing.T) {
	st, clk, _ := s.fresh(t)
	ctx := t.Context()
	sub := submission("k1", "DEMO-PAT-1", 2)
	sub.Records[1].Exact = nil // a suppressed result has no value
	sub.Records[1].SuppressionCode = "sex-unknown"
	sub.Records[1].SuppressionText = "No eGFR: sex not stated."
	sub.Records[1].Comments = nil
	sub.Records[1].Steps = nil
	sub.Records[1].SoftwareVersion = "explicit-version"
	sub.Records[1].CollectedAt = time.Time{}

	rc, err := st.Accept(ctx, sub)
	require.NoError(t, err)
	require.False(t, rc.Duplicate)
	require.Equal(t, []int64{1, 2}, rc.RecordIDs)
	require.Len(t, rc.OutboxIDs, 1)

	wantTime := clk.Now().Truncate(time.Microsecond)
	prev := store.GenesisHash
	for i, id := range rc.RecordIDs {
		got, err := st.Record(ctx, id)
		require.NoError(t, err)
		require.Equal(t, store.HashRecord(got), got.ContentHash, "stored hash covers the stored fields")
		require.Equal(t, prev, got.PrevHash)
		prev = got.ContentHash

		want := sub.Records[i]
		want.ID = id
		want.RecordedAt = wantTime
		want.DedupKey = "k1"
		if want.SoftwareVersion == "" {
			want.SoftwareVersion = softwareVersion
		}
		want.ContentHash, want.PrevHash = got.ContentHash, got.PrevHash
		require.Equal(t, want, got)
	}
	_, err = st.Record(ctx, 3)
	require.ErrorIs(t, err, store.ErrNotFound)

	head, err := st.Head(ctx)
	require.NoError(t, err)
	require.Equal(t, store.ChainHead{LastID: 2, LastHash: prev}, head)

	it, err := st.Item(ctx, rc.OutboxIDs[0])
	require.NoError(t, err)
	require.Equal(t, store.OutboxItem{
		ID:            rc.OutboxIDs[0],
		DedupKey:      "k1",
		OutboxMessage: sub.Outbox[0],
		State:         store.OutboxPending,
		CreatedAt:     wantTime,
		NextAttemptAt: wantTime,
	}, it)
	_, err = st.Item(ctx, rc.OutboxIDs[0]+100)
	require.ErrorIs(t, err, store.ErrNotFound)

	hist, err := st.History(ctx, "DEMO-PAT-1", "creatinine", time.Time{})
	require.NoError(t, err)
	wantPoint := sub.History[0]
	wantPoint.RecordedAt = wantTime
	require.Equal(t, []store.HistoryPoint{wantPoint}, hist)

	require.True(t, verify(t, st).OK())
}

func (s suite) search(t *testing.T) {
	st, clk, _ := s.fresh(t)
	ctx := t.Context()
	// Records 1-2 at t0 for patient A, 3 at t0+1h for B with another
	// equation, 4-5 at t0+2h for A.
	_, err := st.Accept(ctx, submission("s1", "DEMO-A", 2))
	require.NoError(t, err)
	clk.Advance(time.Hour)
	sub := submission("s2", "DEMO-B", 1)
	sub.Records[0].Equation = "ekfc-cr"
	_, err = st.Accept(ctx, sub)
	require.NoError(t, err)
	clk.Advance(time.Hour)
	_, err = st.Accept(ctx, submission("s3", "DEMO-A", 2))
	require.NoError(t, err)

	ids := func(f store.Filter) []int64 {
		t.Helper()
		recs, err := st.Search(ctx, f)
		require.NoError(t, err)
		out := []int64{}
		for _, r := range recs {
			out = append(out, r.ID)
		}
		return out
	}
	tests := []struct {
		name string
		f    store.Filter
		want []int64
	}{
		{"all newest first", store.Filter{}, []int64{5, 4, 3, 2, 1}},
		{"patient", store.Filter{PatientID: "DEMO-A"}, []int64{5, 4, 2, 1}},
		{"message", store.Filter{MessageID: "MSG-s2"}, []int64{3}},
		{"equation", store.Filter{Equation: "ekfc-cr"}, []int64{3}},
		{"since", store.Filter{Since: t0.Add(time.Hour)}, []int64{5, 4, 3}},
		{"until", store.Filter{Until: t0.Add(time.Hour)}, []int64{2, 1}},
		{"window", store.Filter{Since: t0.Add(30 * time.Minute), Until: t0.Add(90 * time.Minute)}, []int64{3}},
		{"limit", store.Filter{Limit: 2}, []int64{5, 4}},
		{"page", store.Filter{BeforeID: 4, Limit: 2}, []int64{3, 2}},
		{"combined", store.Filter{PatientID: "DEMO-A", Since: t0.Add(time.Hour)}, []int64{5, 4}},
		{"no match", store.Filter{PatientID: "DEMO-NOBODY"}, []int64{}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			require.Equal(t, tc.want, ids(tc.f))
		})
	}
}

func (s suite) duplicate(t *testing.T) {
	st, _, _ := s.fresh(t)
	ctx := t.Context()
	first, err := st.Accept(ctx, submission("dup", "DEMO-PAT-1", 2))
	require.NoError(t, err)
	// A resent message, even one that would now compute differently,
	// changes nothing.
	again := submission("dup", "DEMO-PAT-1", 3)
	second, err := st.Accept(ctx, again)
	require.NoError(t, err)
	require.True(t, second.Duplicate)
	require.Equal(t, first.RecordIDs, second.RecordIDs)
	require.Equal(t, first.OutboxIDs, second.OutboxIDs)

	v := verify(t, st)
	require.True(t, v.OK())
	require.EqualValues(t, 2, v.Checked())
	stats, err := st.OutboxStats(ctx)
	require.NoError(t, err)
	require.Len(t, stats, 1)
	require.EqualValues(t, 1, stats[0].Pending)
	hist, err := st.History(ctx, "DEMO-PAT-1", "creatinine", time.Time{})
	require.NoError(t, err)
	require.Len(t, hist, 1)
}

func (s suite) concurrentDuplicates(t *testing.T) {
	st, _, _ := s.fresh(t)
	const n = 16
	receipts := make([]store.Receipt, n)
	errs := make([]error, n)
	start := make(chan struct{})
	var wg sync.WaitGroup
	for i := range n {
		wg.Go(func() {
			<-start
			receipts[i], errs[i] = st.Accept(t.Context(), submission("same", "DEMO-PAT-1", 1))
		})
	}
	close(start)
	wg.Wait()
	originals := 0
	for i := range n {
		require.NoError(t, errs[i])
		if !receipts[i].Duplicate {
			originals++
		}
		require.Equal(t, []int64{1}, receipts[i].RecordIDs)
		require.Equal(t, receipts[0].OutboxIDs, receipts[i].OutboxIDs)
	}
	require.Equal(t, 1, originals)
	require.EqualValues(t, 1, verify(t, st).Checked())
}

// failingSubmission sends good and bad submissions at once so that they
// share group commits. A bad one holds malformed JSON in its second record,
// which the database refuses after the first record was written: the
// savepoint must undo that record, its submission row and the chain
// position, and leave the others alone. (The store's internal tests force
// good and bad into one batch deterministically.)
func (s suite) failingSubmission(t *testing.T) {
	st, _, _ := s.fresh(t)
	const n = 48
	errs := make([]error, n)
	receipts := make([]store.Receipt, n)
	bad := func(i int) bool { return i%6 == 0 }
	key := func(i int) string { return fmt.Sprintf("mix-%02d", i) }
	patient := func(i int) string { return fmt.Sprintf("DEMO-MIX-%02d", i) }
	start := make(chan struct{})
	var wg sync.WaitGroup
	for i := range n {
		wg.Go(func() {
			sub := submission(key(i), patient(i), 2)
			if bad(i) {
				sub.Records[1].Request = json.RawMessage(`{"equation": "ckd-epi-2021-cr",`)
			}
			<-start
			receipts[i], errs[i] = st.Accept(t.Context(), sub)
		})
	}
	close(start)
	wg.Wait()

	good := 0
	for i := range n {
		if bad(i) {
			require.Error(t, errs[i], "submission %d", i)
			var dbe *store.DBError
			require.ErrorAs(t, errs[i], &dbe)
			require.NotContains(t, errs[i].Error(), patient(i), "no patient data in errors")
			require.NotContains(t, errs[i].Error(), "19580704", "no patient data in errors")
			continue
		}
		good++
		require.NoError(t, errs[i], "submission %d", i)
		require.False(t, receipts[i].Duplicate)
		require.Len(t, receipts[i].RecordIDs, 2)
	}

	v := verify(t, st)
	require.True(t, v.OK(), "%v", v.Problems())
	require.EqualValues(t, 2*good, v.Checked())
	ctx := t.Context()
	for i := range n {
		recs, err := st.Search(ctx, store.Filter{MessageID: "MSG-" + key(i)})
		require.NoError(t, err)
		hist, err := st.History(ctx, patient(i), "creatinine", time.Time{})
		require.NoError(t, err)
		if bad(i) {
			require.Empty(t, recs, "records of failed submission %d rolled back", i)
			require.Empty(t, hist, "history of failed submission %d rolled back", i)
		} else {
			require.Len(t, recs, 2)
			require.Len(t, hist, 1)
		}
	}
	stats, err := st.OutboxStats(ctx)
	require.NoError(t, err)
	require.EqualValues(t, good, stats[0].Pending, "outbox items of failed submissions rolled back")

	// The dedup key of a failed submission was not consumed: a corrected
	// resend is accepted as new.
	rc, err := st.Accept(ctx, submission(key(0), patient(0), 1))
	require.NoError(t, err)
	require.False(t, rc.Duplicate)
	require.Equal(t, []int64{int64(2*good + 1)}, rc.RecordIDs)
}

func (s suite) validation(t *testing.T) {
	st, _, _ := s.fresh(t)
	const secret = "DEMO-SECRET-PATIENT"
	tests := []struct {
		name   string
		mutate func(*store.Submission)
	}{
		{"no dedup key", func(s *store.Submission) { s.DedupKey = "" }},
		{"exact NaN", func(s *store.Submission) { s.Records[0].Exact = ptr(math.NaN()) }},
		{"exact infinite", func(s *store.Submission) { s.Records[0].Exact = ptr(math.Inf(1)) }},
		{"history value NaN", func(s *store.Submission) { s.History[0].Value = math.NaN() }},
		{"invalid UTF-8", func(s *store.Submission) { s.Records[0].Sex = secret + "\xff" }},
		{"NUL byte", func(s *store.Submission) { s.Records[0].BirthDate = secret + "\x00" }},
		{"outbox without destination", func(s *store.Submission) { s.Outbox[0].Destination = "" }},
		{"outbox without payload", func(s *store.Submission) { s.Outbox[0].Payload = nil }},
		{"history without collection time", func(s *store.Submission) { s.History[0].CollectedAt = time.Time{} }},
		{"history without patient", func(s *store.Submission) { s.History[0].PatientID = "" }},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			sub := submission("v-"+tc.name, secret, 1)
			tc.mutate(&sub)
			_, err := st.Accept(t.Context(), sub)
			require.ErrorIs(t, err, store.ErrInvalid)
			require.NotContains(t, err.Error(), secret)
		})
	}
	require.EqualValues(t, 0, verify(t, st).Checked(), "nothing written")
}

// acceptMany runs n concurrent Accepts of one-record submissions, spread
// over the stores, and returns all record IDs.
func acceptMany(t *testing.T, prefix string, n int, stores ...store.Store) []int64 {
	t.Helper()
	ids := make([][]int64, n)
	errs := make([]error, n)
	start := make(chan struct{})
	var wg sync.WaitGroup
	for i := range n {
		wg.Go(func() {
			<-start
			rc, err := stores[i%len(stores)].Accept(t.Context(), submission(fmt.Sprintf("%s-%03d", prefix, i), fmt.Sprintf("DEMO-%03d", i%17), 1))
			ids[i], errs[i] = rc.RecordIDs, err
		})
	}
	close(start)
	wg.Wait()
	var all []int64
	for i := range n {
		require.NoError(t, errs[i])
		all = append(all, ids[i]...)
	}
	slices.Sort(all)
	return all
}

func seq(from, to int64) []int64 {
	var out []int64
	for i := from; i <= to; i++ {
		out = append(out, i)
	}
	return out
}

func (s suite) chain200(t *testing.T) {
	st, _, _ := s.fresh(t)
	ids := acceptMany(t, "c", 200, st)
	require.Equal(t, seq(1, 200), ids, "every record has its own chain position, without gaps")
	v := verify(t, st)
	require.True(t, v.OK(), "%v", v.Problems())
	require.EqualValues(t, 200, v.Checked())
}

func (s suite) twoStoresOneChain(t *testing.T) {
	dsn := s.b.NewDSN(t)
	clk := NewClock(t0)
	a := s.open(t, dsn, clk)
	b := s.open(t, dsn, clk)
	ids := acceptMany(t, "two", 120, a, b)
	require.Equal(t, seq(1, 120), ids)
	for _, st := range []store.Store{a, b} {
		v := verify(t, st)
		require.True(t, v.OK(), "%v", v.Problems())
		require.EqualValues(t, 120, v.Checked())
	}
}

func (s suite) reopen(t *testing.T) {
	dsn := s.b.NewDSN(t)
	clk := NewClock(t0)
	st, err := store.Open(t.Context(), dsn, store.WithClock(clk.Now))
	require.NoError(t, err)
	_, err = st.Accept(t.Context(), submission("r1", "DEMO-PAT-1", 2))
	require.NoError(t, err)
	require.NoError(t, st.Close())
	require.NoError(t, st.Close(), "closing twice is safe")

	applied, err := store.Migrate(t.Context(), dsn)
	require.NoError(t, err)
	require.Empty(t, applied, "schema already current")

	// A restricted daemon opens without migrating.
	again := s.open(t, dsn, clk, store.WithoutMigrations())
	require.NoError(t, again.Ready(t.Context()))
	rc, err := again.Accept(t.Context(), submission("r2", "DEMO-PAT-1", 1))
	require.NoError(t, err)
	require.Equal(t, []int64{3}, rc.RecordIDs)
	rc, err = again.Accept(t.Context(), submission("r1", "DEMO-PAT-1", 2))
	require.NoError(t, err)
	require.True(t, rc.Duplicate, "dedup survives a restart")
	v := verify(t, again)
	require.True(t, v.OK(), "%v", v.Problems())
	require.EqualValues(t, 3, v.Checked())
}

func (s suite) walk(t *testing.T) {
	st, _, _ := s.fresh(t)
	acceptMany(t, "w", 12, st)
	var got []int64
	require.NoError(t, st.Walk(t.Context(), 5, func(r store.AuditRecord) error {
		got = append(got, r.ID)
		return nil
	}))
	require.Equal(t, seq(5, 12), got)

	stop := errors.New("stop here")
	got = nil
	err := st.Walk(t.Context(), 0, func(r store.AuditRecord) error {
		got = append(got, r.ID)
		if r.ID == 3 {
			return stop
		}
		return nil
	})
	require.ErrorIs(t, err, stop)
	require.Equal(t, []int64{1, 2, 3}, got)

	// A verifier resumed from a trusted point checks the rest.
	r4, err := st.Record(t.Context(), 4)
	require.NoError(t, err)
	v := store.ResumeVerifier(r4.ID, r4.ContentHash)
	require.NoError(t, st.Walk(t.Context(), 5, func(r store.AuditRecord) error {
		v.Add(r)
		return nil
	}))
	require.True(t, v.OK(), "%v", v.Problems())
	require.EqualValues(t, 8, v.Checked())
}

func (s suite) outboxLifecycle(t *testing.T) {
	st, clk, _ := s.fresh(t)
	ctx := t.Context()
	rc, err := st.Accept(ctx, submission("o1", "DEMO-PAT-1", 1))
	require.NoError(t, err)
	id := rc.OutboxIDs[0]

	items, err := st.Claim(ctx, "lis", "w1", 10, time.Minute)
	require.NoError(t, err)
	require.Len(t, items, 1)
	it := items[0]
	require.Equal(t, id, it.ID)
	require.Equal(t, 1, it.Attempts)
	require.Equal(t, "w1", it.ClaimedBy)
	require.Equal(t, clk.Now().Add(time.Minute).Truncate(time.Microsecond), it.LeaseUntil)
	require.Equal(t, []byte("MSH|^~\\&|FILTRATE|DEMO\rPID|1||DEMO-PAT-1\r"), it.Payload)

	none := func(msg string) {
		t.Helper()
		items, err := st.Claim(ctx, "lis", "w2", 10, time.Minute)
		require.NoError(t, err)
		require.Empty(t, items, msg)
	}
	none("in flight")
	other, err := st.Claim(ctx, "elsewhere", "w2", 10, time.Minute)
	require.NoError(t, err)
	require.Empty(t, other, "other destination")

	require.NoError(t, st.Retry(ctx, id, clk.Now().Add(5*time.Minute), "AE: try later"))
	it, err = st.Item(ctx, id)
	require.NoError(t, err)
	require.Equal(t, store.OutboxPending, it.State)
	require.True(t, it.LeaseUntil.IsZero())
	require.Equal(t, "AE: try later", it.LastError)
	none("not due before the retry time")
	clk.Advance(5 * time.Minute)
	items, err = st.Claim(ctx, "lis", "w2", 10, time.Minute)
	require.NoError(t, err)
	require.Len(t, items, 1)
	require.Equal(t, 2, items[0].Attempts)

	require.NoError(t, st.Park(ctx, id, "AR: rejected by receiver"))
	none("parked")
	parked, err := st.ListParked(ctx)
	require.NoError(t, err)
	require.Len(t, parked, 1)
	require.Equal(t, id, parked[0].ID)
	require.Equal(t, store.OutboxParked, parked[0].State)
	require.Equal(t, "AR: rejected by receiver", parked[0].LastError)
	require.Equal(t, clk.Now().Truncate(time.Microsecond), parked[0].ParkedAt)
	require.ErrorIs(t, st.MarkSent(ctx, id, "x"), store.ErrWrongState)
	require.ErrorIs(t, st.Retry(ctx, id, time.Time{}, "x"), store.ErrWrongState)

	require.NoError(t, st.Requeue(ctx, id))
	require.ErrorIs(t, st.Requeue(ctx, id), store.ErrWrongState)
	parked, err = st.ListParked(ctx)
	require.NoError(t, err)
	require.Empty(t, parked)
	items, err = st.Claim(ctx, "lis", "w3", 10, time.Minute)
	require.NoError(t, err)
	require.Len(t, items, 1)
	require.Equal(t, 3, items[0].Attempts)

	clk.Advance(time.Second)
	require.NoError(t, st.MarkSent(ctx, id, "MSA|AA|OUT-o1"))
	it, err = st.Item(ctx, id)
	require.NoError(t, err)
	require.Equal(t, store.OutboxSent, it.State)
	require.Equal(t, "MSA|AA|OUT-o1", it.AckInfo)
	require.Equal(t, clk.Now().Truncate(time.Microsecond), it.SentAt)
	none("sent")
	require.ErrorIs(t, st.MarkSent(ctx, id, "again"), store.ErrWrongState)
	require.ErrorIs(t, st.Park(ctx, id, "x"), store.ErrWrongState)
	require.ErrorIs(t, st.MarkSent(ctx, id+100, "x"), store.ErrNotFound)
	require.ErrorIs(t, st.Requeue(ctx, id+100), store.ErrNotFound)

	_, err = st.Claim(ctx, "lis", "w", 0, time.Minute)
	require.ErrorIs(t, err, store.ErrInvalid)
	_, err = st.Claim(ctx, "lis", "w", 1, 0)
	require.ErrorIs(t, err, store.ErrInvalid)

	n, err := st.PurgeSent(ctx, it.SentAt)
	require.NoError(t, err)
	require.Zero(t, n, "purge keeps items sent at the cut-off")
	n, err = st.PurgeSent(ctx, it.SentAt.Add(time.Microsecond))
	require.NoError(t, err)
	require.EqualValues(t, 1, n)
	_, err = st.Item(ctx, id)
	require.ErrorIs(t, err, store.ErrNotFound)
}

func claimIDs(t *testing.T, st store.Store, limit int) []int64 {
	t.Helper()
	items, err := st.Claim(t.Context(), "lis", "w", limit, 24*time.Hour)
	require.NoError(t, err)
	ids := []int64{}
	for _, it := range items {
		ids = append(ids, it.ID)
	}
	return ids
}

func (s suite) partitionOrder(t *testing.T) {
	st, clk, _ := s.fresh(t)
	ctx := t.Context()
	id := map[string]int64{}
	for _, k := range []struct{ key, part string }{
		{"A1", "A"}, {"B1", "B"}, {"A2", "A"}, {"N1", ""}, {"A3", "A"}, {"N2", ""},
	} {
		rc, err := st.Accept(ctx, outboxOnly(k.key, "lis", k.part))
		require.NoError(t, err)
		id[k.key] = rc.OutboxIDs[0]
	}
	require.Equal(t, []int64{id["A1"], id["B1"], id["N1"], id["N2"]}, claimIDs(t, st, 10),
		"the oldest of each partition; unpartitioned items all")
	require.Empty(t, claimIDs(t, st, 10), "successors wait while their predecessor is in flight")

	require.NoError(t, st.MarkSent(ctx, id["A1"], "ok"))
	require.Equal(t, []int64{id["A2"]}, claimIDs(t, st, 10))
	require.NoError(t, st.Retry(ctx, id["A2"], clk.Now().Add(time.Hour), "later"))
	require.Empty(t, claimIDs(t, st, 10), "A3 waits behind A2's retry")

	// A parked item holds up its partition (a requeued original must not
	// follow its correction) until a person requeues or discards it.
	require.NoError(t, st.Park(ctx, id["B1"], "rejected"))
	rc, err := st.Accept(ctx, outboxOnly("B2", "lis", "B"))
	require.NoError(t, err)
	require.Empty(t, claimIDs(t, st, 10), "B2 waits behind the parked B1")
	require.ErrorIs(t, st.Discard(ctx, id["B1"], ""), store.ErrInvalid, "a reason is required")
	require.ErrorIs(t, st.Discard(ctx, id["A2"], "x"), store.ErrWrongState, "only parked items are discarded")
	require.NoError(t, st.Discard(ctx, id["B1"], "duplicate of an order cancelled by the ward"))
	it, err := st.Item(ctx, id["B1"])
	require.NoError(t, err)
	require.Equal(t, store.OutboxSent, it.State)
	require.Equal(t, store.DiscardedPrefix+"duplicate of an order cancelled by the ward", it.AckInfo)
	require.Equal(t, rc.OutboxIDs, claimIDs(t, st, 10))

	clk.Advance(time.Hour)
	require.Equal(t, []int64{id["A2"]}, claimIDs(t, st, 10))
	require.NoError(t, st.MarkSent(ctx, id["A2"], "ok"))
	require.Equal(t, []int64{id["A3"]}, claimIDs(t, st, 1))
}

func (s suite) leaseExpiry(t *testing.T) {
	st, clk, _ := s.fresh(t)
	ctx := t.Context()
	rc, err := st.Accept(ctx, submission("l1", "DEMO-PAT-1", 1))
	require.NoError(t, err)
	items, err := st.Claim(ctx, "lis", "w1", 1, 30*time.Second)
	require.NoError(t, err)
	require.Len(t, items, 1)

	stats, err := st.OutboxStats(ctx)
	require.NoError(t, err)
	require.EqualValues(t, 1, stats[0].InFlight)

	clk.Advance(29 * time.Second)
	items, err = st.Claim(ctx, "lis", "w2", 1, 30*time.Second)
	require.NoError(t, err)
	require.Empty(t, items, "lease still live")

	// w1 crashed: once its lease runs out the item is claimable again.
	clk.Advance(time.Second)
	items, err = st.Claim(ctx, "lis", "w2", 1, 30*time.Second)
	require.NoError(t, err)
	require.Len(t, items, 1)
	require.Equal(t, rc.OutboxIDs[0], items[0].ID)
	require.Equal(t, "w2", items[0].ClaimedBy)
	require.Equal(t, 2, items[0].Attempts)
}

func (s suite) twoStoresClaim(t *testing.T) {
	dsn := s.b.NewDSN(t)
	clk := NewClock(t0)
	a := s.open(t, dsn, clk)
	b := s.open(t, dsn, clk)
	ctx := t.Context()
	const unpartitioned, partitions, perPartition = 40, 8, 10
	total := unpartitioned + partitions*perPartition
	partOf := map[int64]string{}
	i := 0
	for p := range perPartition {
		for q := range partitions {
			rc, err := a.Accept(ctx, outboxOnly(fmt.Sprintf("p%d-%d", q, p), "lis", fmt.Sprintf("P%d", q)))
			require.NoError(t, err)
			partOf[rc.OutboxIDs[0]] = fmt.Sprintf("P%d", q)
			i++
		}
		for range unpartitioned / perPartition {
			_, err := b.Accept(ctx, outboxOnly(fmt.Sprintf("n%d", i), "lis", ""))
			require.NoError(t, err)
			i++
		}
	}
	require.Equal(t, total, i)

	var (
		mu        sync.Mutex
		claimedBy = map[int64]string{}
		doubles   []int64
		order     = map[string][]int64{}
		sent      atomic.Int64
		errs      []error
	)
	var wg sync.WaitGroup
	for w := range 6 {
		st := []store.Store{a, b}[w%2]
		worker := fmt.Sprintf("worker-%d", w)
		wg.Go(func() {
			for range 5000 {
				if sent.Load() == int64(total) {
					return
				}
				items, err := st.Claim(ctx, "lis", worker, 3, time.Hour)
				if err != nil {
					mu.Lock()
					errs = append(errs, err)
					mu.Unlock()
					return
				}
				mu.Lock()
				for _, it := range items {
					if _, seen := claimedBy[it.ID]; seen {
						doubles = append(doubles, it.ID)
					}
					claimedBy[it.ID] = worker
					if p := it.PartitionKey; p != "" {
						order[p] = append(order[p], it.ID)
					}
				}
				mu.Unlock()
				for _, it := range items {
					if err := st.MarkSent(ctx, it.ID, "ok"); err != nil {
						mu.Lock()
						errs = append(errs, err)
						mu.Unlock()
						return
					}
					sent.Add(1)
				}
				if len(items) == 0 {
					runtime.Gosched()
				}
			}
		})
	}
	wg.Wait()
	require.Empty(t, errs)
	require.Empty(t, doubles, "no item claimed twice")
	require.Len(t, claimedBy, total)
	require.EqualValues(t, total, sent.Load())
	for p, ids := range order {
		require.Len(t, ids, perPartition, p)
		require.True(t, slices.IsSorted(ids), "partition %s delivered in order: %v", p, ids)
		for _, id := range ids {
			require.Equal(t, p, partOf[id])
		}
	}
}

func (s suite) outboxStats(t *testing.T) {
	st, clk, _ := s.fresh(t)
	ctx := t.Context()
	stats, err := st.OutboxStats(ctx)
	require.NoError(t, err)
	require.Empty(t, stats)

	_, err = st.Accept(ctx, outboxOnly("a1", "alpha", "P1"))
	require.NoError(t, err)
	clk.Advance(10 * time.Minute)
	_, err = st.Accept(ctx, outboxOnly("a2", "alpha", "P2"))
	require.NoError(t, err)
	rc, err := st.Accept(ctx, outboxOnly("a3", "alpha", "P3"))
	require.NoError(t, err)
	_, err = st.Accept(ctx, outboxOnly("b1", "beta", "P1"))
	require.NoError(t, err)
	_, err = st.Accept(ctx, outboxOnly("c1", "gamma", ""))
	require.NoError(t, err)

	require.NoError(t, st.Park(ctx, rc.OutboxIDs[0], "rejected"))
	items, err := st.Claim(ctx, "beta", "w", 1, time.Hour)
	require.NoError(t, err)
	require.Len(t, items, 1)
	items, err = st.Claim(ctx, "gamma", "w", 1, time.Minute)
	require.NoError(t, err)
	require.NoError(t, st.MarkSent(ctx, items[0].ID, "ok"))
	clk.Advance(5 * time.Minute)

	stats, err = st.OutboxStats(ctx)
	require.NoError(t, err)
	require.Equal(t, []store.DestinationStats{
		{Destination: "alpha", Pending: 2, InFlight: 0, OldestPendingAge: 15 * time.Minute, Parked: 1},
		{Destination: "beta", Pending: 1, InFlight: 1, OldestPendingAge: 5 * time.Minute, Parked: 0},
	}, stats, "gamma has nothing pending or parked")
}

func (s suite) history(t *testing.T) {
	st, clk, _ := s.fresh(t)
	ctx := t.Context()
	day := 24 * time.Hour
	base := time.Date(2025, 1, 10, 8, 0, 0, 0, time.UTC)
	point := func(patient, analyte string, v float64, at time.Time, msg string) store.HistoryPoint {
		return store.HistoryPoint{PatientID: patient, Analyte: analyte, Value: v, Unit: "umol/L", CollectedAt: at, MessageID: msg}
	}
	subs := []store.Submission{
		{DedupKey: "h1", History: []store.HistoryPoint{
			point("DEMO-H1", "creatinine", 80, base, "M1"),
			point("DEMO-H1", "cystatin-c", 1.1, base, "M1"),
		}},
		{DedupKey: "h2", History: []store.HistoryPoint{point("DEMO-H1", "creatinine", 95, base.Add(2*day), "M2")}},
		{DedupKey: "h3", History: []store.HistoryPoint{point("DEMO-H1", "creatinine", 88, base.Add(day), "M3")}},
		{DedupKey: "h4", History: []store.HistoryPoint{point("DEMO-H2", "creatinine", 60, base.Add(day), "M4")}},
	}
	for _, sub := range subs {
		_, err := st.Accept(ctx, sub)
		require.NoError(t, err)
	}
	now := clk.Now().Truncate(time.Microsecond)
	withRecorded := func(p store.HistoryPoint) store.HistoryPoint { p.RecordedAt = now; return p }

	got, err := st.History(ctx, "DEMO-H1", "creatinine", base.Add(day))
	require.NoError(t, err)
	require.Equal(t, []store.HistoryPoint{
		withRecorded(subs[2].History[0]),
		withRecorded(subs[1].History[0]),
	}, got, "since is inclusive; ordered by collection time")

	got, err = st.History(ctx, "DEMO-H1", "creatinine", time.Time{})
	require.NoError(t, err)
	require.Len(t, got, 3)
	got, err = st.History(ctx, "DEMO-H1", "cystatin-c", time.Time{})
	require.NoError(t, err)
	require.Equal(t, []store.HistoryPoint{withRecorded(subs[0].History[1])}, got)
	got, err = st.History(ctx, "DEMO-H3", "creatinine", time.Time{})
	require.NoError(t, err)
	require.Empty(t, got)
}

func (s suite) appendOnly(t *testing.T) {
	st, _, dsn := s.fresh(t)
	ctx := t.Context()
	_, err := st.Accept(ctx, submission("ao", "DEMO-PAT-1", 2))
	require.NoError(t, err)
	before, err := st.Record(ctx, 1)
	require.NoError(t, err)

	db := s.raw(t, dsn)
	statements := []string{
		`UPDATE audit_records SET reported = '99' WHERE id = 1`,
		`DELETE FROM audit_records WHERE id = 1`,
		`DELETE FROM audit_records`,
		`UPDATE submissions SET dedup_key = 'other'`,
		`DELETE FROM submissions`,
	}
	if s.b.HasTruncate {
		statements = append(statements, `TRUNCATE audit_records`, `TRUNCATE submissions CASCADE`)
	}
	for _, q := range statements {
		_, err := db.ExecContext(ctx, q)
		require.Error(t, err, q)
		require.Contains(t, err.Error(), "append-only", q)
	}
	after, err := st.Record(ctx, 1)
	require.NoError(t, err)
	require.Equal(t, before, after)
	v := verify(t, st)
	require.True(t, v.OK(), "%v", v.Problems())
	require.EqualValues(t, 2, v.Checked())
}

func (s suite) tamper(t *testing.T) {
	st, _, dsn := s.fresh(t)
	ctx := t.Context()
	acceptMany(t, "t", 10, st)
	require.True(t, verify(t, st).OK())

	db := s.raw(t, dsn)
	s.b.DisableAppendOnly(t, db)
	// Alter record 3; alter record 5 and forge its hash; delete record 7;
	// delete the last record, 10.
	_, err := db.ExecContext(ctx, `UPDATE audit_records SET reported = '99' WHERE id = 3`)
	require.NoError(t, err)
	r5, err := st.Record(ctx, 5)
	require.NoError(t, err)
	r5.Reported = "12"
	forged := store.HashRecord(r5)
	_, err = db.ExecContext(ctx, `UPDATE audit_records SET reported = '12', content_hash = '`+forged+`' WHERE id = 5`)
	require.NoError(t, err)
	_, err = db.ExecContext(ctx, `DELETE FROM audit_records WHERE id IN (7, 10)`)
	require.NoError(t, err)

	require.Equal(t, []store.Problem{
		{Kind: store.ProblemContentHash, ID: 3, LastID: 3},
		{Kind: store.ProblemBrokenLink, ID: 6, LastID: 6},
		{Kind: store.ProblemGap, ID: 7, LastID: 7},
		{Kind: store.ProblemHead, ID: 10, LastID: 10},
	}, verify(t, st).Problems())
}

func (s suite) readyPingClose(t *testing.T) {
	dsn := s.b.NewDSN(t)
	st, err := store.Open(t.Context(), dsn)
	require.NoError(t, err)
	require.NoError(t, st.Ping(t.Context()))
	require.NoError(t, st.Ready(t.Context()))
	require.NoError(t, st.Close())
	_, err = st.Accept(t.Context(), submission("x", "DEMO-PAT-1", 1))
	require.ErrorIs(t, err, store.ErrClosed)
	require.ErrorIs(t, st.Ping(t.Context()), store.ErrClosed)
	require.NoError(t, st.Close())
}

// reported checks the state of eGFR observations sent downstream: the
// latest submission touching a key wins, in one batch too, and a duplicate
// changes nothing.
func (s suite) reported(t *testing.T) {
	st, clk, _ := s.fresh(t)
	ctx := t.Context()
	rep := func(key, group, eq string, active bool, msg string) store.Reported {
		return store.Reported{Key: key, GroupKey: group, Equation: eq, Active: active, MessageID: msg}
	}
	_, err := st.Accept(ctx, store.Submission{DedupKey: "r1", Reported: []store.Reported{
		rep("g1|cr", "g1", "ckd-epi-2021-cr", true, "M1"), rep("g1|crcys", "g1", "ckd-epi-2021-crcys", true, "M1"),
		rep("g2|cr", "g2", "ckd-epi-2021-cr", true, "M1"),
	}})
	require.NoError(t, err)
	clk.Advance(time.Minute)
	_, err = st.Accept(ctx, store.Submission{DedupKey: "r2", Reported: []store.Reported{
		rep("g1|crcys", "g1", "ckd-epi-2021-crcys", false, "M2"),
	}})
	require.NoError(t, err)
	got, err := st.ReportedIn(ctx, "g1")
	require.NoError(t, err)
	require.Len(t, got, 2)
	require.Equal(t, "g1|cr", got[0].Key)
	require.True(t, got[0].Active)
	require.Equal(t, "g1|crcys", got[1].Key)
	require.False(t, got[1].Active, "withdrawn by the later submission")
	require.Equal(t, "M2", got[1].MessageID)
	require.Equal(t, clk.Now().Truncate(time.Microsecond), got[1].UpdatedAt)

	// A duplicate of r1 does not revive the withdrawn observation.
	rc, err := st.Accept(ctx, store.Submission{DedupKey: "r1", Reported: []store.Reported{
		rep("g1|crcys", "g1", "ckd-epi-2021-crcys", true, "M1"),
	}})
	require.NoError(t, err)
	require.True(t, rc.Duplicate)
	got, err = st.ReportedIn(ctx, "g1")
	require.NoError(t, err)
	require.False(t, got[1].Active)

	// Concurrent submissions (one group commit) touching one key: no
	// error, and one of them wins.
	var wg sync.WaitGroup
	for i := range 8 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			_, err := st.Accept(ctx, store.Submission{DedupKey: fmt.Sprintf("c%d", i), Reported: []store.Reported{
				rep("g3|cr", "g3", "ckd-epi-2021-cr", i%2 == 0, fmt.Sprintf("C%d", i)),
			}})
			assert.NoError(t, err)
		}()
	}
	wg.Wait()
	got, err = st.ReportedIn(ctx, "g3")
	require.NoError(t, err)
	require.Len(t, got, 1)

	_, err = st.Accept(ctx, store.Submission{DedupKey: "bad", Reported: []store.Reported{{Key: "k"}}})
	require.ErrorIs(t, err, store.ErrInvalid)
	none, err := st.ReportedIn(ctx, "nothing")
	require.NoError(t, err)
	require.Empty(t, none)
}
