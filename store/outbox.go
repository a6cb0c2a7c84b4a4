package store

import (
	"context"
	"database/sql"
	"fmt"
	"sort"
	"time"
)

// outboxCols lists the outbox_items columns in scanItem order.
const outboxCols = `id, dedup_key, destination, partition_key, message_id, content_type, payload, state, attempts, created_at, next_attempt_at, claimed_by, lease_until, last_error, sent_at, ack_info, parked_at`

func scanItem(sc scanner) (OutboxItem, error) {
	var (
		it    OutboxItem
		state string
	)
	err := sc.Scan(&it.ID, &it.DedupKey, &it.Destination, &it.PartitionKey, &it.MessageID,
		&it.ContentType, &it.Payload, &state, &it.Attempts, dbTime{&it.CreatedAt},
		dbTime{&it.NextAttemptAt}, &it.ClaimedBy, dbTime{&it.LeaseUntil}, &it.LastError,
		dbTime{&it.SentAt}, &it.AckInfo, dbTime{&it.ParkedAt})
	it.State = OutboxState(state)
	return it, err
}

func (s *sqlStore) queryItems(ctx context.Context, db interface {
	QueryContext(context.Context, string, ...any) (*sql.Rows, error)
}, op, query string, args ...any) ([]OutboxItem, error) {
	rows, err := db.QueryContext(ctx, query, args...)
	if err != nil {
		return nil, dbErr(op, err)
	}
	defer rows.Close()
	var out []OutboxItem
	for rows.Next() {
		it, err := scanItem(rows)
		if err != nil {
			return nil, dbErr(op, err)
		}
		out = append(out, it)
	}
	if err := rows.Err(); err != nil {
		return nil, dbErr(op, err)
	}
	return out, nil
}

// Claim implements Store.
func (s *sqlStore) Claim(ctx context.Context, destination, worker string, limit int, lease time.Duration) ([]OutboxItem, error) {
	if s.closed.Load() {
		return nil, ErrClosed
	}
	if limit <= 0 {
		return nil, fmt.Errorf("%w: claim limit must be positive", ErrInvalid)
	}
	if lease <= 0 {
		return nil, fmt.Errorf("%w: claim lease must be positive", ErrInvalid)
	}
	now := s.now()
	items, err := s.queryItems(ctx, s.w, "claim outbox items", s.d.claim,
		s.d.claimArgs(destination, worker, now, now.Add(lease), limit)...)
	if err != nil {
		return nil, err
	}
	// RETURNING does not promise an order.
	sort.Slice(items, func(i, j int) bool { return items[i].ID < items[j].ID })
	return items, nil
}

// transition applies an UPDATE guarded by the item's state and tells
// ErrNotFound from ErrWrongState when it changes nothing.
func (s *sqlStore) transition(ctx context.Context, op string, id int64, query string, args ...any) error {
	if s.closed.Load() {
		return ErrClosed
	}
	res, err := s.w.ExecContext(ctx, s.d.q(query), args...)
	if err != nil {
		return dbErr(op, err)
	}
	n, err := res.RowsAffected()
	if err != nil {
		return dbErr(op, err)
	}
	if n == 1 {
		return nil
	}
	var state string
	err = s.w.QueryRowContext(ctx, s.d.q(`SELECT state FROM outbox_items WHERE id = ?`), id).Scan(&state)
	if isNoRows(err) {
		return fmt.Errorf("store: %s: outbox item %d: %w", op, id, ErrNotFound)
	}
	if err != nil {
		return dbErr(op, err)
	}
	return fmt.Errorf("store: %s: outbox item %d is %s: %w", op, id, state, ErrWrongState)
}

// MarkSent implements Store.
func (s *sqlStore) MarkSent(ctx context.Context, id int64, ackInfo string) error {
	if err := checkText("ackInfo", ackInfo); err != nil {
		return fmt.Errorf("%w: %s", ErrInvalid, err)
	}
	return s.transition(ctx, "mark sent", id,
		`UPDATE outbox_items SET state = 'sent', sent_at = ?, ack_info = ?, lease_until = NULL
WHERE id = ? AND state = 'pending'`, s.d.t(s.now()), ackInfo, id)
}

// Retry implements Store.
func (s *sqlStore) Retry(ctx context.Context, id int64, next time.Time, reason string) error {
	if err := checkText("reason", reason); err != nil {
		return fmt.Errorf("%w: %s", ErrInvalid, err)
	}
	if next.IsZero() {
		next = s.now()
	}
	return s.transition(ctx, "retry", id,
		`UPDATE outbox_items SET next_attempt_at = ?, last_error = ?, lease_until = NULL
WHERE id = ? AND state = 'pending'`, s.d.t(next), reason, id)
}

// Park implements Store.
func (s *sqlStore) Park(ctx context.Context, id int64, reason string) error {
	if err := checkText("reason", reason); err != nil {
		return fmt.Errorf("%w: %s", ErrInvalid, err)
	}
	return s.transition(ctx, "park", id,
		`UPDATE outbox_items SET state = 'parked', parked_at = ?, last_error = ?, lease_until = NULL
WHERE id = ? AND state = 'pending'`, s.d.t(s.now()), reason, id)
}

// Requeue implements Store.
func (s *sqlStore) Requeue(ctx context.Context, id int64) error {
	return s.transition(ctx, "requeue", id,
		`UPDATE outbox_items SET state = 'pending', next_attempt_at = ?, lease_until = NULL
WHERE id = ? AND state = 'parked'`, s.d.t(s.now()), id)
}

// Discard implements Store.
func (s *sqlStore) Discard(ctx context.Context, id int64, reason string) error {
	if err := checkText("reason", reason); err != nil {
		return fmt.Errorf("%w: %s", ErrInvalid, err)
	}
	if reason == "" {
		return fmt.Errorf("%w: a reason is required to discard an outbox item", ErrInvalid)
	}
	return s.transition(ctx, "discard", id,
		`UPDATE outbox_items SET state = 'sent', sent_at = ?, ack_info = ?, lease_until = NULL
WHERE id = ? AND state = 'parked'`, s.d.t(s.now()), DiscardedPrefix+reason, id)
}

// ListParked implements Store.
func (s *sqlStore) ListParked(ctx context.Context) ([]OutboxItem, error) {
	if s.closed.Load() {
		return nil, ErrClosed
	}
	return s.queryItems(ctx, s.r, "list parked", `SELECT `+outboxCols+` FROM outbox_items WHERE state = 'parked' ORDER BY id`)
}

// Item implements Store.
func (s *sqlStore) Item(ctx context.Context, id int64) (OutboxItem, error) {
	if s.closed.Load() {
		return OutboxItem{}, ErrClosed
	}
	it, err := scanItem(s.r.QueryRowContext(ctx, s.d.q(`SELECT `+outboxCols+` FROM outbox_items WHERE id = ?`), id))
	if isNoRows(err) {
		return OutboxItem{}, fmt.Errorf("store: outbox item %d: %w", id, ErrNotFound)
	}
	if err != nil {
		return OutboxItem{}, dbErr("read outbox item", err)
	}
	return it, nil
}

// OutboxStats implements Store.
func (s *sqlStore) OutboxStats(ctx context.Context) ([]DestinationStats, error) {
	if s.closed.Load() {
		return nil, ErrClosed
	}
	now := s.now()
	rows, err := s.r.QueryContext(ctx, s.d.q(`SELECT destination,
	SUM(CASE WHEN state = 'pending' THEN 1 ELSE 0 END),
	SUM(CASE WHEN state = 'pending' AND lease_until > ? THEN 1 ELSE 0 END),
	MIN(CASE WHEN state = 'pending' THEN created_at END),
	SUM(CASE WHEN state = 'parked' THEN 1 ELSE 0 END)
FROM outbox_items WHERE state IN ('pending', 'parked')
GROUP BY destination ORDER BY destination`), s.d.t(now))
	if err != nil {
		return nil, dbErr("outbox stats", err)
	}
	defer rows.Close()
	var out []DestinationStats
	for rows.Next() {
		var (
			st     DestinationStats
			oldest time.Time
		)
		if err := rows.Scan(&st.Destination, &st.Pending, &st.InFlight, dbTime{&oldest}, &st.Parked); err != nil {
			return nil, dbErr("outbox stats", err)
		}
		if !oldest.IsZero() && now.After(oldest) {
			st.OldestPendingAge = now.Sub(oldest)
		}
		out = append(out, st)
	}
	if err := rows.Err(); err != nil {
		return nil, dbErr("outbox stats", err)
	}
	return out, nil
}

// PurgeSent implements Store.
func (s *sqlStore) PurgeSent(ctx context.Context, before time.Time) (int64, error) {
	if s.closed.Load() {
		return 0, ErrClosed
	}
	res, err := s.w.ExecContext(ctx, s.d.q(`DELETE FROM outbox_items WHERE state = 'sent' AND sent_at < ?`), s.d.t(before))
	if err != nil {
		return 0, dbErr("purge sent", err)
	}
	n, err := res.RowsAffected()
	if err != nil {
		return 0, dbErr("purge sent", err)
	}
	return n, nil
}
