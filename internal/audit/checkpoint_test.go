package audit_test

import (
	"bytes"
	"context"
	"database/sql"
	"fmt"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"filtrate/internal/audit"
	"filtrate/store"
)

// Someone with full access to the database file rewrites a record and
// recomputes every hash after it, so that the chain alone verifies again.
// A checkpoint kept outside the database still exposes it.
func TestCheckpointExposesARewrittenChain(t *testing.T) {
	f := newFixture(t)
	commitAll(t, f, nil, nil)
	cp, err := audit.TakeCheckpoint(context.Background(), f.st, time.Date(2026, 12, 1, 0, 0, 0, 0, time.UTC))
	require.NoError(t, err)
	require.EqualValues(t, fixtureRecords, cp.LastID)
	var buf bytes.Buffer
	require.NoError(t, audit.WriteCheckpoint(&buf, cp))
	cps, err := audit.ReadCheckpoints(&buf)
	require.NoError(t, err)
	require.Equal(t, []audit.Checkpoint{cp}, cps)

	// Rewrite: change a field recomputation does not cover, then rehash
	// every record and the chain head.
	f.tamper(t, `UPDATE audit_records SET patient_id = 'SOMEONE-ELSE' WHERE id = 2`)
	recs := allRecords(t, f.st)
	require.NoError(t, f.st.Close())
	db, err := sql.Open("sqlite", f.dsn)
	require.NoError(t, err)
	prev := store.GenesisHash
	for _, r := range recs {
		r.PrevHash = prev
		r.ContentHash = store.HashRecord(r)
		_, err := db.Exec(`UPDATE audit_records SET prev_hash = ?, content_hash = ? WHERE id = ?`, r.PrevHash, r.ContentHash, r.ID)
		require.NoError(t, err)
		prev = r.ContentHash
	}
	_, err = db.Exec(`UPDATE chain_head SET last_hash = ?`, prev)
	require.NoError(t, err)
	require.NoError(t, db.Close())
	f.open(t)

	rep, err := audit.Verify(context.Background(), f.st, audit.VerifyOptions{})
	require.NoError(t, err)
	require.True(t, rep.OK(), "the rewritten chain is internally consistent: %v", rep.Problems)

	rep, err = audit.Verify(context.Background(), f.st, audit.VerifyOptions{Checkpoints: cps})
	require.NoError(t, err)
	require.False(t, rep.OK())
	require.Equal(t, []audit.Problem{{Kind: audit.ProblemCheckpointMismatch, ID: cp.LastID, LastID: cp.LastID,
		Detail: "checkpoint taken 2026-12-01T00:00:00Z"}}, rep.Problems)
}

func TestCheckpointRecordMissingAndBadFile(t *testing.T) {
	f := newFixture(t)
	commitAll(t, f, nil, nil)
	cps := []audit.Checkpoint{{Kind: audit.CheckpointKind, LastID: fixtureRecords + 5, LastHash: store.GenesisHash}}
	probs, err := audit.CheckCheckpoints(context.Background(), f.st, cps)
	require.NoError(t, err)
	require.Len(t, probs, 1)
	require.Equal(t, audit.ProblemCheckpointMissing, probs[0].Kind)

	_, err = audit.ReadCheckpoints(bytes.NewBufferString("{\"kind\":\"other\"}\n"))
	require.ErrorContains(t, err, "line 1")
	_, err = audit.ReadCheckpoints(bytes.NewBufferString("\nnot json\n"))
	require.ErrorContains(t, err, fmt.Sprintf("line %d", 2))
}
