package audit_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"log/slog"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
	"filtrate/internal/audit"
	"filtrate/internal/pipeline"
	"filtrate/store"
)

func TestVerifyCleanChain(t *testing.T) {
	f := newFixture(t)
	commitAll(t, f, nil, nil)

	var progress []int64
	rep, err := audit.Verify(context.Background(), f.st, audit.VerifyOptions{
		Progress: func(n int64) { progress = append(progress, n) }, ProgressEvery: 4, ProgressInterval: time.Hour,
	})
	require.NoError(t, err)
	require.True(t, rep.OK(), "problems: %v", rep.Problems)
	require.Equal(t, int64(fixtureRecords), rep.Checked)
	require.Equal(t, int64(1), rep.FirstID)
	require.Equal(t, int64(fixtureRecords), rep.LastID)
	require.Equal(t, int64(fixtureRecords), rep.Head.LastID)
	// Every record but the withdrawal recomputes.
	require.Equal(t, int64(fixtureRecords-1), rep.Recomputed)
	require.Equal(t, int64(1), rep.NotApplicable)
	require.Equal(t, []int64{4, 8}, progress)
}

func TestVerifyEmptyStore(t *testing.T) {
	f := newFixture(t)
	rep, err := audit.Verify(context.Background(), f.st, audit.VerifyOptions{})
	require.NoError(t, err)
	require.True(t, rep.OK())
	require.Zero(t, rep.Checked)
}

func kindsByID(rep audit.Report) map[int64][]audit.ProblemKind {
	m := map[int64][]audit.ProblemKind{}
	for id, ps := range rep.ByRecord() {
		for _, p := range ps {
			m[id] = append(m[id], p.Kind)
		}
	}
	return m
}

func TestVerifyFindsTampering(t *testing.T) {
	tests := []struct {
		name  string
		stmts []string
		want  map[int64][]audit.ProblemKind
	}{
		{
			name: "reported value changed and a record removed",
			stmts: []string{
				`UPDATE audit_records SET reported = '99' WHERE id = 1`,
				`DELETE FROM audit_records WHERE id = 5`,
			},
			want: map[int64][]audit.ProblemKind{
				1: {audit.ProblemContentHash, audit.ProblemRecompute},
				5: {audit.ProblemGap},
			},
		},
		{
			name:  "last record removed",
			stmts: []string{fmt.Sprintf(`DELETE FROM audit_records WHERE id = %d`, fixtureRecords)},
			want:  map[int64][]audit.ProblemKind{fixtureRecords: {audit.ProblemHead}},
		},
		{
			name: "unrounded value changed and rehashed, link broken",
			// Someone rewriting a value and its content hash still breaks
			// the next record's link, and the recomputation disagrees.
			stmts: []string{
				`UPDATE audit_records SET exact = exact + 1, content_hash = '` + strings.Repeat("ab", 32) + `' WHERE id = 4`,
			},
			want: map[int64][]audit.ProblemKind{
				4: {audit.ProblemContentHash, audit.ProblemRecompute},
				5: {audit.ProblemBrokenLink},
			},
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			f := newFixture(t)
			commitAll(t, f, nil, nil)
			f.tamper(t, tc.stmts...)
			rep, err := audit.Verify(context.Background(), f.st, audit.VerifyOptions{})
			require.NoError(t, err)
			require.False(t, rep.OK())
			got := kindsByID(rep)
			for id, kinds := range tc.want {
				require.ElementsMatch(t, kinds, got[id], "record %d", id)
			}
			require.Len(t, got, len(tc.want), "problems: %v", rep.Problems)
		})
	}
}

func TestVerifySinceChecksTheLinkIntoTheRange(t *testing.T) {
	f := newFixture(t)
	ids := commitAll(t, f, nil, nil)
	// Messages were recorded a minute apart from 08:00; the third message
	// (records 7-8) at 08:02.
	since := time.Date(2026, 11, 30, 8, 2, 0, 0, time.UTC)
	first := ids[2][0]

	rep, err := audit.Verify(context.Background(), f.st, audit.VerifyOptions{Since: since})
	require.NoError(t, err)
	require.True(t, rep.OK(), "problems: %v", rep.Problems)
	require.Equal(t, first, rep.FirstID)
	require.Equal(t, int64(fixtureRecords)-first+1, rep.Checked)

	// Rewriting the content hash of the record before the range breaks the
	// link into it.
	f.tamper(t, fmt.Sprintf(`UPDATE audit_records SET content_hash = '%s' WHERE id = %d`, strings.Repeat("cd", 32), first-1))
	rep, err = audit.Verify(context.Background(), f.st, audit.VerifyOptions{Since: since})
	require.NoError(t, err)
	got := kindsByID(rep)
	require.Equal(t, []audit.ProblemKind{audit.ProblemContentHash}, got[first-1])
	require.Equal(t, []audit.ProblemKind{audit.ProblemBrokenLink}, got[first])
	require.Len(t, got, 2)
}

func TestRecomputeOldEquationVersion(t *testing.T) {
	old := oldCKDEPI2021Cr()
	// Version 0 listed first: version 1 stays the latest.
	withOld := registry(t, append([]calc.Equation{old}, builtinLatest()...)...)

	f := newFixture(t)
	m := messages()[0].msg
	m.Groups[0].Request.Pin = map[string]string{"ckd-epi-2021-cr": "0"}
	snap := snapshot(t, "")
	p := pipeline.NewProcessor(withOld, f.st, softwareV, nil)
	rcpt, err := p.Commit(context.Background(), m, p.Evaluate(m, snap), snap, nil)
	require.NoError(t, err)
	rec, err := f.st.Record(context.Background(), rcpt.RecordIDs[0])
	require.NoError(t, err)
	require.Equal(t, "0", rec.EquationVersion)

	// Verify recomputes it with version 0 and it holds.
	rep, err := audit.Verify(context.Background(), f.st, audit.VerifyOptions{Calculator: withOld})
	require.NoError(t, err)
	require.True(t, rep.OK(), "problems: %v", rep.Problems)
	v, err := audit.NewRecomputer(withOld).Recompute(rec)
	require.NoError(t, err)
	require.Equal(t, audit.Match, v.Outcome)
	require.Equal(t, "0", v.EquationVersion)

	// The latest version gives another value from the same request.
	var req calc.Request
	require.NoError(t, decodeRequest(rec, &req))
	req.Pin = nil
	latest := withOld.Evaluate(req)
	require.Equal(t, "1", latest.Results[0].EquationVersion)
	require.NotEqual(t, *rec.Exact, latest.Results[0].Exact)

	// A build that lacks version 0 cannot recompute the record and says so.
	rep, err = audit.Verify(context.Background(), f.st, audit.VerifyOptions{})
	require.NoError(t, err)
	require.Equal(t, map[int64][]audit.ProblemKind{rec.ID: {audit.ProblemRecomputeFailed}}, kindsByID(rep))
	require.Contains(t, rep.Problems[0].Detail, "ckd-epi-2021-cr version 0 is not in this build")
}

func TestRecomputeAfterAnUpgrade(t *testing.T) {
	// The record was made when version 0 was the latest (no pin in the
	// request); the upgraded build holds versions 0 and 1. The record's own
	// version, not the latest, must be used.
	old := oldCKDEPI2021Cr()
	var before []calc.Equation
	for _, e := range builtinLatest() {
		if e.ID == old.ID {
			e = old
		}
		before = append(before, e)
	}
	f := newFixture(t)
	commitAll(t, f, registry(t, before...), nil)
	after := registry(t, append([]calc.Equation{old}, builtinLatest()...)...)

	rep, err := audit.Verify(context.Background(), f.st, audit.VerifyOptions{Calculator: after})
	require.NoError(t, err)
	require.True(t, rep.OK(), "problems: %v", rep.Problems)
	require.Equal(t, int64(fixtureRecords-1), rep.Recomputed)
}

func TestVerifyFindsRecomputeMismatch(t *testing.T) {
	f := newFixture(t)
	// The store receives records whose first unrounded value is one unit in
	// the last place off: the chain is intact, the arithmetic is not.
	nudge := acceptFunc(func(ctx context.Context, sub store.Submission) (store.Receipt, error) {
		for i, r := range sub.Records {
			if r.Exact != nil && r.Equation == "ckd-epi-2021-cr" {
				x := math.Nextafter(*r.Exact, math.Inf(1))
				sub.Records[i].Exact = &x
				break
			}
		}
		return f.st.Accept(ctx, sub)
	})
	ids := commitAll(t, f, nil, nudge)

	rep, err := audit.Verify(context.Background(), f.st, audit.VerifyOptions{})
	require.NoError(t, err)
	got := kindsByID(rep)
	// One nudged result per message that has a ckd-epi-2021-cr result.
	for _, msg := range ids {
		require.Equal(t, []audit.ProblemKind{audit.ProblemRecompute}, got[msg[0]])
	}
	require.Len(t, got, len(ids))
	require.Contains(t, rep.ByRecord()[ids[0][0]][0].Detail, "exact: recomputed − stored = ")
	require.Contains(t, rep.ByRecord()[ids[0][0]][0].Detail, "(1 ulp)")

	rec, err := f.st.Record(context.Background(), ids[0][0])
	require.NoError(t, err)
	v, err := audit.Recompute(rec)
	require.NoError(t, err)
	require.Equal(t, audit.Mismatch, v.Outcome)
	require.Len(t, v.Differences, 1)
	require.Equal(t, "exact", v.Differences[0].Field)
}

func TestRecomputeRefusalAndWithdrawal(t *testing.T) {
	f := newFixture(t)
	ids := commitAll(t, f, nil, nil)
	ctx := context.Background()

	refusal, err := f.st.Record(ctx, ids[0][1])
	require.NoError(t, err)
	require.Equal(t, string(calc.ReasonValueCensored), refusal.SuppressionCode)
	v, err := audit.Recompute(refusal)
	require.NoError(t, err)
	require.Equal(t, audit.Match, v.Outcome)

	// The same record claiming another refusal does not recompute.
	refusal.SuppressionCode = string(calc.ReasonValueNotNumeric)
	v, err = audit.Recompute(refusal)
	require.NoError(t, err)
	require.Equal(t, audit.Mismatch, v.Outcome)
	require.Equal(t, "refusal", v.Differences[0].Field)

	withdrawn, err := f.st.Record(ctx, ids[0][2])
	require.NoError(t, err)
	v, err = audit.Recompute(withdrawn)
	require.NoError(t, err)
	require.Equal(t, audit.NotApplicable, v.Outcome)

	// Assumed-sex results match their own sex, not the other one.
	female, err := f.st.Record(ctx, ids[2][0])
	require.NoError(t, err)
	require.Equal(t, "assumed sex: female", female.Comments[0])
	v, err = audit.Recompute(female)
	require.NoError(t, err)
	require.Equal(t, audit.Match, v.Outcome)
	male, err := f.st.Record(ctx, ids[2][1])
	require.NoError(t, err)
	female.Comments[0] = male.Comments[0]
	v, err = audit.Recompute(female)
	require.NoError(t, err)
	require.Equal(t, audit.Mismatch, v.Outcome)

	// No stored request: cannot recompute.
	rec := female
	rec.Request = nil
	v, err = audit.Recompute(rec)
	require.Error(t, err)
	require.Equal(t, audit.Failed, v.Outcome)
}

func TestVerifyLogsNoPatientData(t *testing.T) {
	f := newFixture(t)
	commitAll(t, f, nil, nil)
	// Problems of every kind, so that the problem log lines run too.
	f.tamper(t,
		`UPDATE audit_records SET reported = '1' WHERE id = 1`,
		`DELETE FROM audit_records WHERE id = 4`,
	)
	var buf bytes.Buffer
	logger := slog.New(slog.NewJSONHandler(&buf, &slog.HandlerOptions{Level: slog.LevelDebug}))
	rep, err := audit.Verify(context.Background(), f.st, audit.VerifyOptions{Logger: logger})
	require.NoError(t, err)
	require.False(t, rep.OK())

	logged := buf.String()
	require.Contains(t, logged, "audit verify finished")
	require.Contains(t, logged, `"kind":"gap"`)
	var findings strings.Builder
	for _, p := range rep.Problems {
		findings.WriteString(p.String() + "\n")
	}
	for _, secret := range []string{patientA, birthA, patientB, birthB, patientC, birthC, patientD, birthD, "1972-03-14", "0.92"} {
		require.NotContains(t, logged, secret)
		require.NotContains(t, findings.String(), secret)
	}
}

func decodeRequest(rec store.AuditRecord, req *calc.Request) error {
	return json.Unmarshal(rec.Request, req)
}
