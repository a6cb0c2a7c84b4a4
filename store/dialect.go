package store

import (
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"

	"github.com/lib/pq"
	"github.com/pressly/goose/v3"
	"modernc.org/sqlite"
)

// dialect holds what differs between the backends. Queries are written
// once with ? placeholders; q rewrites them for PostgreSQL.
type dialect struct {
	name     string
	goose    goose.Dialect
	postgres bool
	// lockHead reads the chain head inside the Accept transaction, locking
	// it against other writers (SQLite: the IMMEDIATE transaction already
	// holds the database write lock).
	lockHead string
	// claim leases due outbox items; see claimArgs for its arguments.
	claim string
}

// sqliteTimeLayout stores times as fixed-width UTC text, which sorts and
// compares correctly as text.
const sqliteTimeLayout = "2006-01-02T15:04:05.000000Z"

// claimDue is the condition shared by both claim queries: pending, due, not
// under a live lease, and the oldest unsent item of its partition. A parked
// item holds up its partition until a person requeues or discards it: if
// later reports (a correction) went out first, requeueing the original
// would put it after its correction.
const claimDue = `o.destination = ? AND o.state = 'pending' AND o.next_attempt_at <= ?
	AND (o.lease_until IS NULL OR o.lease_until <= ?)
	AND (o.partition_key = '' OR NOT EXISTS (
		SELECT 1 FROM outbox_items p
		WHERE p.destination = o.destination AND p.partition_key = o.partition_key
		AND p.state IN ('pending', 'parked') AND p.id < o.id))`

var sqliteDialect = &dialect{
	name:     "sqlite",
	goose:    goose.DialectSQLite3,
	lockHead: `SELECT last_id, last_hash FROM chain_head WHERE singleton = 1`,
	claim: `UPDATE outbox_items SET claimed_by = ?, lease_until = ?, attempts = attempts + 1
WHERE id IN (SELECT o.id FROM outbox_items o WHERE ` + claimDue + ` ORDER BY o.id LIMIT ?)
RETURNING ` + outboxCols,
}

var postgresDialect = &dialect{
	name:     "postgres",
	goose:    goose.DialectPostgres,
	postgres: true,
	lockHead: `SELECT last_id, last_hash FROM chain_head WHERE singleton FOR UPDATE`,
	// SKIP LOCKED lets several daemons claim from one outbox at once without
	// waiting on, or double-claiming, each other's rows.
	claim: rebind(`WITH due AS (
	SELECT o.id FROM outbox_items o WHERE ` + claimDue + `
	ORDER BY o.id LIMIT ? FOR UPDATE OF o SKIP LOCKED)
UPDATE outbox_items SET claimed_by = ?, lease_until = ?, attempts = outbox_items.attempts + 1
FROM due WHERE outbox_items.id = due.id
RETURNING ` + qualify("outbox_items", outboxCols)),
}

// claimArgs orders the Claim arguments for the dialect's claim query.
func (d *dialect) claimArgs(destination, worker string, now, leaseUntil time.Time, limit int) []any {
	due := []any{destination, d.t(now), d.t(now)}
	if d.postgres {
		return append(due, limit, worker, d.t(leaseUntil))
	}
	return append(append([]any{worker, d.t(leaseUntil)}, due...), limit)
}

// q adapts a query written with ? placeholders to the dialect.
func (d *dialect) q(query string) string {
	if d.postgres {
		return rebind(query)
	}
	return query
}

// rebind replaces each ? with $1, $2, ... The store's queries hold no ? in
// literals.
func rebind(query string) string {
	var b strings.Builder
	b.Grow(len(query) + 16)
	n := 0
	for i := 0; i < len(query); i++ {
		if query[i] == '?' {
			n++
			b.WriteByte('$')
			b.WriteString(strconv.Itoa(n))
			continue
		}
		b.WriteByte(query[i])
	}
	return b.String()
}

// qualify prefixes each column of a comma-separated list with table.
func qualify(table, cols string) string {
	parts := strings.Split(cols, ",")
	for i, p := range parts {
		parts[i] = table + "." + strings.TrimSpace(p)
	}
	return strings.Join(parts, ", ")
}

// t converts a time to a query argument: UTC with microsecond precision
// (what both databases keep), as time.Time for PostgreSQL and fixed-width
// text for SQLite.
func (d *dialect) t(t time.Time) any {
	t = t.UTC().Truncate(time.Microsecond)
	if d.postgres {
		return t
	}
	return t.Format(sqliteTimeLayout)
}

// nt is t with the zero time as NULL.
func (d *dialect) nt(t time.Time) any {
	if t.IsZero() {
		return nil
	}
	return d.t(t)
}

// dbTime scans a time column of either backend into a UTC time.Time; NULL
// becomes the zero time.
type dbTime struct{ t *time.Time }

// Scan implements sql.Scanner.
func (s dbTime) Scan(src any) error {
	switch v := src.(type) {
	case nil:
		*s.t = time.Time{}
	case time.Time:
		*s.t = v.UTC()
	case string:
		return s.parse(v)
	case []byte:
		return s.parse(string(v))
	default:
		return fmt.Errorf("store: cannot scan %T into a time", src)
	}
	return nil
}

func (s dbTime) parse(v string) error {
	t, err := time.Parse(time.RFC3339Nano, v)
	if err != nil {
		return errors.New("store: stored time does not parse")
	}
	*s.t = t.UTC()
	return nil
}

// DBError is a database error stripped of anything that could hold patient
// data: it keeps the operation, the database's error code and the
// constraint or rule concerned. The driver's error stays reachable through
// Unwrap for errors.As, but its text may quote values and must not be
// logged.
type DBError struct {
	// Op names the store operation, for example "accept".
	Op string
	// Code is the database's error code (PostgreSQL SQLSTATE, SQLite
	// extended result code).
	Code string
	// Reason describes the error without values: a condition name, a
	// constraint, or the store's own trigger message.
	Reason string
	err    error
}

// Error implements error.
func (e *DBError) Error() string {
	return fmt.Sprintf("store: %s: database error %s: %s", e.Op, e.Code, e.Reason)
}

// Unwrap returns the driver's error.
func (e *DBError) Unwrap() error { return e.err }

// dbErr wraps a database error for op. Driver errors become DBError;
// context and connection errors are wrapped as they are (they carry no
// patient data).
func dbErr(op string, err error) error {
	if err == nil {
		return nil
	}
	var pe *pq.Error
	if errors.As(err, &pe) {
		reason := pe.Code.Name()
		switch {
		case pe.Code.Class() == "P0":
			// Raised by the store's own trigger functions.
			reason = pe.Message
		case pe.Constraint != "":
			reason += " (" + pe.Constraint + ")"
		case pe.Column != "":
			reason += " (column " + pe.Column + ")"
		}
		return &DBError{Op: op, Code: string(pe.Code), Reason: reason, err: err}
	}
	var se *sqlite.Error
	if errors.As(err, &se) {
		// SQLite messages name tables, columns, constraints and the store's
		// own RAISE texts, never values.
		return &DBError{Op: op, Code: strconv.Itoa(se.Code()), Reason: se.Error(), err: err}
	}
	return fmt.Errorf("store: %s: %w", op, err)
}
