package store

import (
	"context"
	"database/sql"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"sync"
	"sync/atomic"
	"time"
	"unicode/utf8"

	"github.com/pressly/goose/v3"
)

// sqlStore implements Store on database/sql for both dialects.
type sqlStore struct {
	d *dialect
	// w takes writes; r takes reads. They are the same pool on PostgreSQL.
	// On SQLite w has one connection and r is query-only.
	w, r *sql.DB
	prov *goose.Provider
	o    options

	// reqs carries Accept calls to the committer goroutine; closing quit
	// stops it, and it closes done when it has stopped.
	reqs      chan *acceptReq
	quit      chan struct{}
	done      chan struct{}
	closed    atomic.Bool
	closeOnce sync.Once
	closeErr  error

	// waiting counts Accept calls offering a request to the committer;
	// batches and batched count group commits and the submissions in them.
	waiting atomic.Int64
	batches atomic.Int64
	batched atomic.Int64
}

var _ Store = (*sqlStore)(nil)

func newSQLStore(d *dialect, w, r *sql.DB, prov *goose.Provider, o options) *sqlStore {
	return &sqlStore{
		d: d, w: w, r: r, prov: prov, o: o,
		reqs: make(chan *acceptReq),
		quit: make(chan struct{}),
		done: make(chan struct{}),
	}
}

// acceptReq is one Accept call waiting for its group commit.
type acceptReq struct {
	ctx   context.Context
	sub   *Submission
	reply chan acceptResult
}

type acceptResult struct {
	receipt Receipt
	err     error
}

func (s *sqlStore) now() time.Time {
	return s.o.now().UTC().Truncate(time.Microsecond)
}

// start runs the committer, which gathers concurrent Accept calls into
// group commits.
func (s *sqlStore) start() { go s.run() }

// run takes one waiting request, then every other request already waiting
// (up to maxBatch), and commits them together. Under load, requests pile up
// while a commit is in progress and the next batch takes them all; when
// idle, a lone request commits at once, without waiting for company.
func (s *sqlStore) run() {
	defer close(s.done)
	for {
		var first *acceptReq
		select {
		case first = <-s.reqs:
		case <-s.quit:
			return
		}
		batch := []*acceptReq{first}
	gather:
		for len(batch) < s.o.maxBatch {
			select {
			case r := <-s.reqs:
				batch = append(batch, r)
			default:
				break gather
			}
		}
		s.waiting.Add(-int64(len(batch)))
		s.batches.Add(1)
		s.batched.Add(int64(len(batch)))
		s.commitRequests(batch)
	}
}

func (s *sqlStore) commitRequests(batch []*acceptReq) {
	live := batch[:0]
	for _, r := range batch {
		if err := r.ctx.Err(); err != nil {
			// The caller gave up before anything was written.
			r.reply <- acceptResult{err: fmt.Errorf("store: accept: %w", err)}
			continue
		}
		live = append(live, r)
	}
	if len(live) == 0 {
		return
	}
	subs := make([]*Submission, len(live))
	for i, r := range live {
		subs[i] = r.sub
	}
	// The batch serves several callers, so no single caller's context
	// governs it.
	ctx, cancel := context.WithTimeout(context.Background(), s.o.batchTimeout)
	defer cancel()
	results, err := s.commitBatch(ctx, subs)
	if err != nil {
		s.o.logger.Warn("store: group commit failed", "submissions", len(subs), "err", err)
	}
	for i, r := range live {
		if err != nil {
			r.reply <- acceptResult{err: err}
			continue
		}
		r.reply <- results[i]
	}
}

// Accept implements Store.
func (s *sqlStore) Accept(ctx context.Context, sub Submission) (Receipt, error) {
	if s.closed.Load() {
		return Receipt{}, ErrClosed
	}
	norm, err := normalize(sub, s.o.softwareVersion)
	if err != nil {
		return Receipt{}, err
	}
	req := &acceptReq{ctx: ctx, sub: norm, reply: make(chan acceptResult, 1)}
	s.waiting.Add(1)
	select {
	case s.reqs <- req:
	case <-s.quit:
		s.waiting.Add(-1)
		return Receipt{}, ErrClosed
	case <-ctx.Done():
		s.waiting.Add(-1)
		return Receipt{}, fmt.Errorf("store: accept: %w", ctx.Err())
	}
	select {
	case res := <-req.reply:
		return res.receipt, res.err
	case <-ctx.Done():
		// The batch may still commit; the caller must treat the message as
		// not acknowledged, and a resend is recognised as a duplicate.
		return Receipt{}, fmt.Errorf("store: accept: outcome unknown: %w", ctx.Err())
	}
}

// commitBatch records subs in one transaction and returns one result per
// submission; the returned error is for the whole batch (nothing
// committed). It first tries commitFast, which writes the whole batch with
// a few multi-row statements; if anything fails there, it rolls back and
// takes the careful path, commitEach, where each submission runs under its
// own savepoint, so that a submission that fails fails alone.
func (s *sqlStore) commitBatch(ctx context.Context, subs []*Submission) ([]acceptResult, error) {
	if !repeatedKeys(subs) {
		results, err := s.commitFast(ctx, subs)
		if err == nil {
			return results, nil
		}
		if ctx.Err() != nil {
			return nil, fmt.Errorf("store: accept: %w", ctx.Err())
		}
		s.o.logger.Debug("store: group commit falls back to one savepoint per submission", "submissions", len(subs), "err", err)
	}
	return s.commitEach(ctx, subs)
}

// commitEach records subs in one transaction, each under its own
// savepoint. A submission that fails is rolled back to its savepoint and
// the others go on.
func (s *sqlStore) commitEach(ctx context.Context, subs []*Submission) (_ []acceptResult, err error) {
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
	for i, sub := range subs {
		if _, err := tx.ExecContext(ctx, "SAVEPOINT accept_one"); err != nil {
			return nil, dbErr("accept: savepoint", err)
		}
		saved := head
		receipt, err := s.acceptOne(ctx, tx, &head, sub, now)
		if err != nil {
			if ctx.Err() != nil {
				return nil, fmt.Errorf("store: accept: %w", ctx.Err())
			}
			head = saved
			if _, rbErr := tx.ExecContext(ctx, "ROLLBACK TO SAVEPOINT accept_one"); rbErr != nil {
				return nil, dbErr("accept: rollback to savepoint", rbErr)
			}
			results[i].err = err
		} else {
			results[i].receipt = receipt
		}
		if _, err := tx.ExecContext(ctx, "RELEASE SAVEPOINT accept_one"); err != nil {
			return nil, dbErr("accept: release savepoint", err)
		}
	}
	if err := s.finishWrite(ctx, tx, start, head); err != nil {
		return nil, err
	}
	return results, nil
}

const insertRecord = `INSERT INTO audit_records (` + recordCols + `)
VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)`

// acceptOne writes one submission inside the batch transaction, advancing
// head as it appends records.
func (s *sqlStore) acceptOne(ctx context.Context, tx *sql.Tx, head *ChainHead, sub *Submission, now time.Time) (Receipt, error) {
	res, err := tx.ExecContext(ctx, s.d.q(`INSERT INTO submissions (dedup_key, accepted_at) VALUES (?, ?) ON CONFLICT (dedup_key) DO NOTHING`),
		sub.DedupKey, s.d.t(now))
	if err != nil {
		return Receipt{}, dbErr("accept: submission", err)
	}
	n, err := res.RowsAffected()
	if err != nil {
		return Receipt{}, dbErr("accept: submission", err)
	}
	if n == 0 {
		return s.duplicate(ctx, tx, sub.DedupKey)
	}
	var rc Receipt
	for i := range sub.Records {
		r := &sub.Records[i]
		r.ID = head.LastID + 1
		r.RecordedAt = now
		r.DedupKey = sub.DedupKey
		r.PrevHash = head.LastHash
		r.ContentHash = HashRecord(*r)
		if _, err := tx.ExecContext(ctx, s.d.q(insertRecord), s.recordArgs(r)...); err != nil {
			return Receipt{}, dbErr(fmt.Sprintf("accept: record %d", i), err)
		}
		head.LastID, head.LastHash = r.ID, r.ContentHash
		rc.RecordIDs = append(rc.RecordIDs, r.ID)
	}
	for i, m := range sub.Outbox {
		var id int64
		err := tx.QueryRowContext(ctx, s.d.q(`INSERT INTO outbox_items
(dedup_key, destination, partition_key, message_id, content_type, payload, state, attempts, created_at, next_attempt_at)
VALUES (?, ?, ?, ?, ?, ?, 'pending', 0, ?, ?) RETURNING id`),
			sub.DedupKey, m.Destination, m.PartitionKey, m.MessageID, m.ContentType, m.Payload, s.d.t(now), s.d.t(now)).Scan(&id)
		if err != nil {
			return Receipt{}, dbErr(fmt.Sprintf("accept: outbox item %d", i), err)
		}
		rc.OutboxIDs = append(rc.OutboxIDs, id)
	}
	for i, p := range sub.History {
		if _, err := tx.ExecContext(ctx, s.d.q(`INSERT INTO history_points
(dedup_key, patient_id, analyte, value, unit, collected_at, message_id, recorded_at)
VALUES (?, ?, ?, ?, ?, ?, ?, ?)`),
			sub.DedupKey, p.PatientID, p.Analyte, p.Value, p.Unit, s.d.t(p.CollectedAt), p.MessageID, s.d.t(now)); err != nil {
			return Receipt{}, dbErr(fmt.Sprintf("accept: history point %d", i), err)
		}
	}
	if err := s.upsertReported(ctx, tx, sub.Reported, now); err != nil {
		return Receipt{}, err
	}
	return rc, nil
}

// duplicate builds the receipt of an already accepted submission.
func (s *sqlStore) duplicate(ctx context.Context, tx *sql.Tx, key string) (Receipt, error) {
	rc := Receipt{Duplicate: true}
	var err error
	rc.RecordIDs, err = queryIDs(ctx, tx, s.d.q(`SELECT id FROM audit_records WHERE dedup_key = ? ORDER BY id`), key)
	if err != nil {
		return Receipt{}, dbErr("accept: duplicate", err)
	}
	rc.OutboxIDs, err = queryIDs(ctx, tx, s.d.q(`SELECT id FROM outbox_items WHERE dedup_key = ? ORDER BY id`), key)
	if err != nil {
		return Receipt{}, dbErr("accept: duplicate", err)
	}
	return rc, nil
}

func queryIDs(ctx context.Context, tx *sql.Tx, query string, args ...any) ([]int64, error) {
	rows, err := tx.QueryContext(ctx, query, args...)
	if err != nil {
		return nil, err
	}
	defer rows.Close()
	var ids []int64
	for rows.Next() {
		var id int64
		if err := rows.Scan(&id); err != nil {
			return nil, err
		}
		ids = append(ids, id)
	}
	return ids, rows.Err()
}

// recordArgs lists r's columns in recordCols order.
func (s *sqlStore) recordArgs(r *AuditRecord) []any {
	var exact any
	if r.Exact != nil {
		exact = *r.Exact
	}
	comments := r.Comments
	if comments == nil {
		comments = []string{}
	}
	cj, _ := json.Marshal(comments) // a []string always marshals
	return []any{
		r.ID, s.d.t(r.RecordedAt), r.Transport, r.MessageID, r.DedupKey, r.RawHash,
		r.PatientID, r.BirthDate, r.Sex, s.d.nt(r.CollectedAt), jsonArg(r.Inputs),
		r.Equation, r.EquationVersion, jsonArg(r.Steps), exact, r.Reported, r.Unit,
		r.Category, string(cj), r.SuppressionCode, r.SuppressionText, r.Policy,
		r.PolicyVersion, r.ConfigHash, r.SoftwareVersion, r.OutputMessageID,
		jsonArg(r.Request), r.ContentHash, r.PrevHash,
	}
}

// jsonArg passes JSON as text (NULL when absent): as []byte the drivers
// would send bytea or a BLOB.
func jsonArg(m json.RawMessage) any {
	if len(m) == 0 {
		return nil
	}
	return string(m)
}

// normalize validates sub and returns a deep copy in the form the store
// keeps: times in UTC with microsecond precision, empty JSON and comment
// lists as nil, -0 as 0. Errors name the item and field, never the value.
func normalize(sub Submission, softwareVersion string) (*Submission, error) {
	if sub.DedupKey == "" {
		return nil, fmt.Errorf("%w: submission has no DedupKey", ErrInvalid)
	}
	if err := checkText("DedupKey", sub.DedupKey); err != nil {
		return nil, fmt.Errorf("%w: submission: %s", ErrInvalid, err)
	}
	out := &Submission{DedupKey: sub.DedupKey}
	if len(sub.Records) > 0 {
		out.Records = make([]AuditRecord, len(sub.Records))
	}
	for i, r := range sub.Records {
		c := r
		c.ID, c.RecordedAt, c.DedupKey, c.ContentHash, c.PrevHash = 0, time.Time{}, "", "", ""
		if c.SoftwareVersion == "" {
			c.SoftwareVersion = softwareVersion
		}
		if !c.CollectedAt.IsZero() {
			c.CollectedAt = c.CollectedAt.UTC().Truncate(time.Microsecond)
		}
		if c.Exact != nil {
			if !finite(*c.Exact) {
				return nil, fmt.Errorf("%w: record %d: Exact is not a finite number", ErrInvalid, i)
			}
			v := normalizeFloat(*c.Exact)
			c.Exact = &v
		}
		c.Inputs, c.Steps, c.Request = copyJSON(c.Inputs), copyJSON(c.Steps), copyJSON(c.Request)
		if len(c.Comments) == 0 {
			c.Comments = nil
		} else {
			c.Comments = append([]string(nil), c.Comments...)
		}
		for _, f := range recordTextFields(&c) {
			if err := checkText(f.name, f.value); err != nil {
				return nil, fmt.Errorf("%w: record %d: %s", ErrInvalid, i, err)
			}
		}
		for j, cm := range c.Comments {
			if err := checkText(fmt.Sprintf("Comments[%d]", j), cm); err != nil {
				return nil, fmt.Errorf("%w: record %d: %s", ErrInvalid, i, err)
			}
		}
		out.Records[i] = c
	}
	for i, m := range sub.Outbox {
		if m.Destination == "" {
			return nil, fmt.Errorf("%w: outbox item %d has no Destination", ErrInvalid, i)
		}
		if len(m.Payload) == 0 {
			return nil, fmt.Errorf("%w: outbox item %d has no Payload", ErrInvalid, i)
		}
		for _, f := range []struct{ name, value string }{
			{"Destination", m.Destination}, {"PartitionKey", m.PartitionKey},
			{"MessageID", m.MessageID}, {"ContentType", m.ContentType},
		} {
			if err := checkText(f.name, f.value); err != nil {
				return nil, fmt.Errorf("%w: outbox item %d: %s", ErrInvalid, i, err)
			}
		}
		m.Payload = append([]byte(nil), m.Payload...)
		out.Outbox = append(out.Outbox, m)
	}
	for i, r := range sub.Reported {
		if r.Key == "" || r.GroupKey == "" {
			return nil, fmt.Errorf("%w: reported observation %d needs Key and GroupKey", ErrInvalid, i)
		}
		for _, f := range []struct{ name, value string }{
			{"Key", r.Key}, {"GroupKey", r.GroupKey}, {"Equation", r.Equation}, {"AssumedSex", r.AssumedSex},
			{"ExternalID", r.ExternalID}, {"Inputs", r.Inputs}, {"MessageID", r.MessageID},
		} {
			if err := checkText(f.name, f.value); err != nil {
				return nil, fmt.Errorf("%w: reported observation %d: %s", ErrInvalid, i, err)
			}
		}
		out.Reported = append(out.Reported, r)
	}
	for i, p := range sub.History {
		switch {
		case p.PatientID == "":
			return nil, fmt.Errorf("%w: history point %d has no PatientID", ErrInvalid, i)
		case p.Analyte == "":
			return nil, fmt.Errorf("%w: history point %d has no Analyte", ErrInvalid, i)
		case p.CollectedAt.IsZero():
			return nil, fmt.Errorf("%w: history point %d has no CollectedAt", ErrInvalid, i)
		case !finite(p.Value):
			return nil, fmt.Errorf("%w: history point %d: Value is not a finite number", ErrInvalid, i)
		}
		for _, f := range []struct{ name, value string }{
			{"PatientID", p.PatientID}, {"Analyte", p.Analyte}, {"Unit", p.Unit}, {"MessageID", p.MessageID},
		} {
			if err := checkText(f.name, f.value); err != nil {
				return nil, fmt.Errorf("%w: history point %d: %s", ErrInvalid, i, err)
			}
		}
		p.CollectedAt = p.CollectedAt.UTC().Truncate(time.Microsecond)
		p.Value = normalizeFloat(p.Value)
		p.RecordedAt = time.Time{}
		out.History = append(out.History, p)
	}
	return out, nil
}

type namedText struct{ name, value string }

func recordTextFields(r *AuditRecord) []namedText {
	return []namedText{
		{"Transport", r.Transport}, {"MessageID", r.MessageID}, {"RawHash", r.RawHash},
		{"PatientID", r.PatientID}, {"BirthDate", r.BirthDate}, {"Sex", r.Sex},
		{"Inputs", string(r.Inputs)}, {"Equation", r.Equation},
		{"EquationVersion", r.EquationVersion}, {"Steps", string(r.Steps)},
		{"Reported", r.Reported}, {"Unit", r.Unit}, {"Category", r.Category},
		{"SuppressionCode", r.SuppressionCode}, {"SuppressionText", r.SuppressionText},
		{"Policy", r.Policy}, {"PolicyVersion", r.PolicyVersion}, {"ConfigHash", r.ConfigHash},
		{"SoftwareVersion", r.SoftwareVersion}, {"OutputMessageID", r.OutputMessageID},
		{"Request", string(r.Request)},
	}
}

// checkText refuses text that one of the databases cannot store
// faithfully: invalid UTF-8 and NUL bytes (PostgreSQL rejects both).
func checkText(name, v string) error {
	if !utf8.ValidString(v) {
		return fmt.Errorf("field %s is not valid UTF-8", name)
	}
	if strings.IndexByte(v, 0) >= 0 {
		return fmt.Errorf("field %s contains a NUL byte", name)
	}
	return nil
}

func copyJSON(m json.RawMessage) json.RawMessage {
	if len(m) == 0 {
		return nil
	}
	return append(json.RawMessage(nil), m...)
}

// Close implements Store.
func (s *sqlStore) Close() error {
	s.closeOnce.Do(func() {
		s.closed.Store(true)
		close(s.quit)
		<-s.done
		errW := s.w.Close()
		var errR error
		if s.r != s.w {
			errR = s.r.Close()
		}
		if err := errors.Join(errW, errR); err != nil {
			s.closeErr = fmt.Errorf("store: close: %w", err)
		}
	})
	return s.closeErr
}

// upsertReported records the eGFR observations a submission sends or
// withdraws. One statement per row: two submissions of one batch may touch
// the same observation, which a multi-row upsert cannot do.
func (s *sqlStore) upsertReported(ctx context.Context, tx *sql.Tx, rs []Reported, now time.Time) error {
	for i, r := range rs {
		active := 0
		if r.Active {
			active = 1
		}
		if _, err := tx.ExecContext(ctx, s.d.q(`INSERT INTO reported_observations
(obs_key, group_key, equation, assumed_sex, external_id, inputs, active, message_id, updated_at)
VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)
ON CONFLICT (obs_key) DO UPDATE SET group_key = excluded.group_key, equation = excluded.equation,
assumed_sex = excluded.assumed_sex, external_id = excluded.external_id, inputs = excluded.inputs, active = excluded.active,
message_id = excluded.message_id, updated_at = excluded.updated_at`),
			r.Key, r.GroupKey, r.Equation, r.AssumedSex, r.ExternalID, r.Inputs, active, r.MessageID, s.d.t(now)); err != nil {
			return dbErr(fmt.Sprintf("accept: reported observation %d", i), err)
		}
	}
	return nil
}
