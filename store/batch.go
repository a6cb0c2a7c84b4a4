package store

import (
	"context"
	"database/sql"
	"fmt"
	"slices"
	"strings"
)

// rowsPerStatement caps the rows of one multi-row INSERT (29 parameters per
// audit record keeps a statement far below both databases' parameter
// limits).
const rowsPerStatement = 200

// repeatedKeys reports whether two submissions of the batch share a
// DedupKey; such a batch takes the per-submission path, which settles which
// one is the original.
func repeatedKeys(subs []*Submission) bool {
	seen := make(map[string]bool, len(subs))
	for _, s := range subs {
		if seen[s.DedupKey] {
			return true
		}
		seen[s.DedupKey] = true
	}
	return false
}

// commitFast writes a whole batch in one transaction with one multi-row
// statement per table, which costs a handful of round trips per batch
// instead of several per submission. Any error rolls everything back; the
// caller then retries submission by submission.
func (s *sqlStore) commitFast(ctx context.Context, subs []*Submission) (_ []acceptResult, err error) {
	tx, head, err := s.beginWrite(ctx)
	if err != nil {
		return nil, err
	}
	defer func() {
		if err != nil {
			tx.Rollback()
		}
	}()
	start := head
	now := s.now()
	results := make([]acceptResult, len(subs))

	// Submissions: the keys that come back are new, the others duplicates.
	rows := make([][]any, len(subs))
	for i, sub := range subs {
		rows[i] = []any{sub.DedupKey, s.d.t(now)}
	}
	inserted := make(map[string]bool, len(subs))
	err = s.insertRows(ctx, tx, `INSERT INTO submissions (dedup_key, accepted_at) VALUES `, 2, rows,
		` ON CONFLICT (dedup_key) DO NOTHING RETURNING dedup_key`, func(r *sql.Rows) error {
			var k string
			if err := r.Scan(&k); err != nil {
				return err
			}
			inserted[k] = true
			return nil
		})
	if err != nil {
		return nil, dbErr("accept: submissions", err)
	}

	var recRows, outRows, histRows [][]any
	var outOwner []int // index into subs of each outbox row
	for i, sub := range subs {
		if !inserted[sub.DedupKey] {
			results[i].receipt, err = s.duplicate(ctx, tx, sub.DedupKey)
			if err != nil {
				return nil, err
			}
			continue
		}
		for j := range sub.Records {
			r := &sub.Records[j]
			r.ID = head.LastID + 1
			r.RecordedAt = now
			r.DedupKey = sub.DedupKey
			r.PrevHash = head.LastHash
			r.ContentHash = HashRecord(*r)
			head.LastID, head.LastHash = r.ID, r.ContentHash
			recRows = append(recRows, s.recordArgs(r))
			results[i].receipt.RecordIDs = append(results[i].receipt.RecordIDs, r.ID)
		}
		for _, m := range sub.Outbox {
			outRows = append(outRows, []any{sub.DedupKey, m.Destination, m.PartitionKey, m.MessageID,
				m.ContentType, m.Payload, "pending", 0, s.d.t(now), s.d.t(now)})
			outOwner = append(outOwner, i)
		}
		for _, p := range sub.History {
			histRows = append(histRows, []any{sub.DedupKey, p.PatientID, p.Analyte, p.Value, p.Unit,
				s.d.t(p.CollectedAt), p.MessageID, s.d.t(now)})
		}
	}

	if err := s.insertRows(ctx, tx, `INSERT INTO audit_records (`+recordCols+`) VALUES `, 29, recRows, ``, nil); err != nil {
		return nil, dbErr("accept: records", err)
	}
	// Identity values follow the order of the VALUES rows; RETURNING does
	// not promise to, so sort each statement's IDs before handing them out.
	next := 0
	for chunk := range slices.Chunk(outRows, rowsPerStatement) {
		var ids []int64
		err := s.insertRows(ctx, tx, `INSERT INTO outbox_items (dedup_key, destination, partition_key, message_id, content_type, payload, state, attempts, created_at, next_attempt_at) VALUES `,
			10, chunk, ` RETURNING id`, func(r *sql.Rows) error {
				var id int64
				if err := r.Scan(&id); err != nil {
					return err
				}
				ids = append(ids, id)
				return nil
			})
		if err != nil {
			return nil, dbErr("accept: outbox", err)
		}
		if len(ids) != len(chunk) {
			return nil, fmt.Errorf("store: accept: outbox: %d IDs for %d items", len(ids), len(chunk))
		}
		slices.Sort(ids)
		for _, id := range ids {
			rc := &results[outOwner[next]].receipt
			rc.OutboxIDs = append(rc.OutboxIDs, id)
			next++
		}
	}
	if err := s.insertRows(ctx, tx, `INSERT INTO history_points (dedup_key, patient_id, analyte, value, unit, collected_at, message_id, recorded_at) VALUES `, 8, histRows, ``, nil); err != nil {
		return nil, dbErr("accept: history", err)
	}
	for _, sub := range subs { // in submission order: a later one wins
		if inserted[sub.DedupKey] {
			if err := s.upsertReported(ctx, tx, sub.Reported, now); err != nil {
				return nil, err
			}
		}
	}
	if err := s.finishWrite(ctx, tx, start, head); err != nil {
		return nil, err
	}
	return results, nil
}

// insertRows runs prefix + "(?, ...), (?, ...)" + suffix for rows, at most
// rowsPerStatement rows per statement. When scan is not nil the statement
// returns rows and scan reads each.
func (s *sqlStore) insertRows(ctx context.Context, tx *sql.Tx, prefix string, ncols int, rows [][]any, suffix string, scan func(*sql.Rows) error) error {
	one := "(" + strings.Repeat("?, ", ncols-1) + "?)"
	for chunk := range slices.Chunk(rows, rowsPerStatement) {
		var b strings.Builder
		b.WriteString(prefix)
		args := make([]any, 0, len(chunk)*ncols)
		for i, row := range chunk {
			if i > 0 {
				b.WriteString(", ")
			}
			b.WriteString(one)
			args = append(args, row...)
		}
		b.WriteString(suffix)
		query := s.d.q(b.String())
		if scan == nil {
			if _, err := tx.ExecContext(ctx, query, args...); err != nil {
				return err
			}
			continue
		}
		if err := queryEach(ctx, tx, query, args, scan); err != nil {
			return err
		}
	}
	return nil
}

func queryEach(ctx context.Context, tx *sql.Tx, query string, args []any, scan func(*sql.Rows) error) error {
	rows, err := tx.QueryContext(ctx, query, args...)
	if err != nil {
		return err
	}
	defer rows.Close()
	for rows.Next() {
		if err := scan(rows); err != nil {
			return err
		}
	}
	return rows.Err()
}

// beginWrite starts a write transaction and locks the chain head in it
// (FOR UPDATE on PostgreSQL; SQLite's write transaction serialises
// writers), so that every writer appends to one chain.
func (s *sqlStore) beginWrite(ctx context.Context) (*sql.Tx, ChainHead, error) {
	tx, err := s.w.BeginTx(ctx, nil)
	if err != nil {
		return nil, ChainHead{}, dbErr("accept: begin", err)
	}
	var head ChainHead
	if err := tx.QueryRowContext(ctx, s.d.lockHead).Scan(&head.LastID, &head.LastHash); err != nil {
		tx.Rollback()
		return nil, ChainHead{}, dbErr("accept: lock chain head", err)
	}
	return tx, head, nil
}

// finishWrite moves the chain head from start to head, if it moved, and
// commits.
func (s *sqlStore) finishWrite(ctx context.Context, tx *sql.Tx, start, head ChainHead) error {
	if head != start {
		if _, err := tx.ExecContext(ctx, s.d.q(`UPDATE chain_head SET last_id = ?, last_hash = ?`), head.LastID, head.LastHash); err != nil {
			return dbErr("accept: update chain head", err)
		}
	}
	if err := tx.Commit(); err != nil {
		return dbErr("accept: commit", err)
	}
	return nil
}
