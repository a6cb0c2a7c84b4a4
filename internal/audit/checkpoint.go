package audit

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"time"

	"filtrate/store"
)

// CheckpointKind identifies the checkpoint format.
const CheckpointKind = "filtrate-audit-checkpoint/1"

// Checkpoint is the chain head at one moment, exported to be kept outside
// the database (write-once storage, the quality manager's records, an email
// to the auditor). The hash chain alone shows that records were not altered
// one by one; it cannot show that someone with full database access did not
// rewrite the whole chain and recompute every hash. A checkpoint kept
// elsewhere can: the record it names must still carry the hash it recorded.
type Checkpoint struct {
	Kind           string    `json:"kind"`
	LastID         int64     `json:"last_id"`
	LastHash       string    `json:"last_hash"`
	LastRecordedAt time.Time `json:"last_recorded_at"`
	TakenAt        time.Time `json:"taken_at"`
}

// TakeCheckpoint reads the chain head and the record it names, checks that
// they agree, and returns the checkpoint.
func TakeCheckpoint(ctx context.Context, src Source, now time.Time) (Checkpoint, error) {
	head, err := src.Head(ctx)
	if err != nil {
		return Checkpoint{}, fmt.Errorf("audit: checkpoint: %w", err)
	}
	cp := Checkpoint{Kind: CheckpointKind, LastID: head.LastID, LastHash: head.LastHash, TakenAt: now.UTC()}
	if head.LastID == 0 {
		return cp, nil
	}
	rec, err := src.Record(ctx, head.LastID)
	if err != nil {
		return Checkpoint{}, fmt.Errorf("audit: checkpoint: read record %d: %w", head.LastID, err)
	}
	if rec.ContentHash != head.LastHash || store.HashRecord(rec) != rec.ContentHash {
		return Checkpoint{}, fmt.Errorf("audit: checkpoint: record %d does not match the chain head; run audit verify", head.LastID)
	}
	cp.LastRecordedAt = rec.RecordedAt.UTC()
	return cp, nil
}

// WriteCheckpoint writes a checkpoint as one JSON line.
func WriteCheckpoint(w io.Writer, cp Checkpoint) error {
	b, err := json.Marshal(cp)
	if err != nil {
		return err
	}
	_, err = fmt.Fprintf(w, "%s\n", b)
	return err
}

// ReadCheckpoints reads checkpoints written by WriteCheckpoint, one JSON
// object per line; blank lines are skipped.
func ReadCheckpoints(r io.Reader) ([]Checkpoint, error) {
	var out []Checkpoint
	sc := bufio.NewScanner(r)
	line := 0
	for sc.Scan() {
		line++
		text := sc.Bytes()
		if len(text) == 0 {
			continue
		}
		var cp Checkpoint
		if err := json.Unmarshal(text, &cp); err != nil {
			return nil, fmt.Errorf("audit: checkpoints line %d: %w", line, err)
		}
		if cp.Kind != CheckpointKind {
			return nil, fmt.Errorf("audit: checkpoints line %d: not a filtrate checkpoint (kind %q)", line, cp.Kind)
		}
		out = append(out, cp)
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("audit: checkpoints: %w", err)
	}
	return out, nil
}

// Checkpoint findings.
const (
	// ProblemCheckpointMissing: a record named by a checkpoint is gone.
	ProblemCheckpointMissing ProblemKind = "checkpoint-record-missing"
	// ProblemCheckpointMismatch: a record named by a checkpoint no longer
	// carries the hash the checkpoint recorded (the chain was rewritten).
	ProblemCheckpointMismatch ProblemKind = "checkpoint-mismatch"
)

// CheckCheckpoints checks that every checkpointed record still carries the
// recorded hash.
func CheckCheckpoints(ctx context.Context, src Source, cps []Checkpoint) ([]Problem, error) {
	var probs []Problem
	for _, cp := range cps {
		if cp.LastID == 0 {
			continue
		}
		rec, err := src.Record(ctx, cp.LastID)
		switch {
		case errors.Is(err, store.ErrNotFound):
			probs = append(probs, Problem{Kind: ProblemCheckpointMissing, ID: cp.LastID, LastID: cp.LastID,
				Detail: "checkpoint taken " + cp.TakenAt.Format(time.RFC3339)})
		case err != nil:
			return nil, fmt.Errorf("audit: checkpoint record %d: %w", cp.LastID, err)
		case rec.ContentHash != cp.LastHash:
			probs = append(probs, Problem{Kind: ProblemCheckpointMismatch, ID: cp.LastID, LastID: cp.LastID,
				Detail: "checkpoint taken " + cp.TakenAt.Format(time.RFC3339)})
		}
	}
	return probs, nil
}
