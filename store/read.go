package store

import (
	"context"
	"database/sql"
	"encoding/json"
	"fmt"
	"strings"
	"time"
)

// recordCols lists the audit_records columns in the order of recordArgs
// and scanRecord.
const recordCols = `id, recorded_at, transport, message_id, dedup_key, raw_hash, patient_id, birth_date, sex, collected_at, inputs, equation, equation_version, steps, exact, reported, unit, category, comments, suppression_code, suppression_text, policy, policy_version, config_hash, software_version, output_message_id, request, content_hash, prev_hash`

// walkPage is how many records Walk reads per query.
const walkPage = 500

// scanner is a *sql.Row or *sql.Rows.
type scanner interface{ Scan(dest ...any) error }

func scanRecord(sc scanner) (AuditRecord, error) {
	var (
		r                      AuditRecord
		inputs, steps, request []byte
		exact                  sql.NullFloat64
		comments               string
	)
	err := sc.Scan(&r.ID, dbTime{&r.RecordedAt}, &r.Transport, &r.MessageID, &r.DedupKey,
		&r.RawHash, &r.PatientID, &r.BirthDate, &r.Sex, dbTime{&r.CollectedAt}, &inputs,
		&r.Equation, &r.EquationVersion, &steps, &exact, &r.Reported, &r.Unit, &r.Category,
		&comments, &r.SuppressionCode, &r.SuppressionText, &r.Policy, &r.PolicyVersion,
		&r.ConfigHash, &r.SoftwareVersion, &r.OutputMessageID, &request, &r.ContentHash,
		&r.PrevHash)
	if err != nil {
		return AuditRecord{}, err
	}
	if len(inputs) > 0 {
		r.Inputs = inputs
	}
	if len(steps) > 0 {
		r.Steps = steps
	}
	if len(request) > 0 {
		r.Request = request
	}
	if exact.Valid {
		v := exact.Float64
		r.Exact = &v
	}
	if err := json.Unmarshal([]byte(comments), &r.Comments); err != nil {
		// Surfaced to the verifier as a content-hash mismatch would be
		// less clear; this names the record.
		return AuditRecord{}, fmt.Errorf("store: record %d: stored comments are not a JSON array of strings", r.ID)
	}
	if len(r.Comments) == 0 {
		r.Comments = nil
	}
	return r, nil
}

// Record implements Store.
func (s *sqlStore) Record(ctx context.Context, id int64) (AuditRecord, error) {
	if s.closed.Load() {
		return AuditRecord{}, ErrClosed
	}
	r, err := scanRecord(s.r.QueryRowContext(ctx, s.d.q(`SELECT `+recordCols+` FROM audit_records WHERE id = ?`), id))
	if isNoRows(err) {
		return AuditRecord{}, fmt.Errorf("store: audit record %d: %w", id, ErrNotFound)
	}
	if err != nil {
		return AuditRecord{}, dbErr("read record", err)
	}
	return r, nil
}

// Search implements Store.
func (s *sqlStore) Search(ctx context.Context, f Filter) ([]AuditRecord, error) {
	if s.closed.Load() {
		return nil, ErrClosed
	}
	var (
		where []string
		args  []any
	)
	add := func(cond string, arg any) {
		where = append(where, cond)
		args = append(args, arg)
	}
	if f.PatientID != "" {
		add("patient_id = ?", f.PatientID)
	}
	if f.MessageID != "" {
		add("message_id = ?", f.MessageID)
	}
	if f.Equation != "" {
		add("equation = ?", f.Equation)
	}
	if !f.Since.IsZero() {
		add("recorded_at >= ?", s.d.t(f.Since))
	}
	if !f.Until.IsZero() {
		add("recorded_at < ?", s.d.t(f.Until))
	}
	if f.BeforeID > 0 {
		add("id < ?", f.BeforeID)
	}
	limit := f.Limit
	switch {
	case limit <= 0:
		limit = 100
	case limit > 10000:
		limit = 10000
	}
	query := `SELECT ` + recordCols + ` FROM audit_records`
	if len(where) > 0 {
		query += ` WHERE ` + strings.Join(where, ` AND `)
	}
	query += ` ORDER BY id DESC LIMIT ?`
	args = append(args, limit)
	return s.queryRecords(ctx, "search records", s.d.q(query), args...)
}

func (s *sqlStore) queryRecords(ctx context.Context, op, query string, args ...any) ([]AuditRecord, error) {
	rows, err := s.r.QueryContext(ctx, query, args...)
	if err != nil {
		return nil, dbErr(op, err)
	}
	defer rows.Close()
	var out []AuditRecord
	for rows.Next() {
		r, err := scanRecord(rows)
		if err != nil {
			return nil, dbErr(op, err)
		}
		out = append(out, r)
	}
	if err := rows.Err(); err != nil {
		return nil, dbErr(op, err)
	}
	return out, nil
}

// Walk implements Store. It reads a page at a time and calls fn outside
// any query, so fn may use the Store.
func (s *sqlStore) Walk(ctx context.Context, fromID int64, fn func(AuditRecord) error) error {
	if s.closed.Load() {
		return ErrClosed
	}
	next := max(fromID, 1)
	query := s.d.q(`SELECT ` + recordCols + ` FROM audit_records WHERE id >= ? ORDER BY id LIMIT ?`)
	for {
		page, err := s.queryRecords(ctx, "walk records", query, next, walkPage)
		if err != nil {
			return err
		}
		for _, r := range page {
			if err := fn(r); err != nil {
				return err
			}
		}
		if len(page) < walkPage {
			return nil
		}
		next = page[len(page)-1].ID + 1
	}
}

// Head implements Store.
func (s *sqlStore) Head(ctx context.Context) (ChainHead, error) {
	if s.closed.Load() {
		return ChainHead{}, ErrClosed
	}
	var h ChainHead
	if err := s.r.QueryRowContext(ctx, `SELECT last_id, last_hash FROM chain_head`).Scan(&h.LastID, &h.LastHash); err != nil {
		return ChainHead{}, dbErr("read chain head", err)
	}
	return h, nil
}

// History implements Store.
func (s *sqlStore) History(ctx context.Context, patientID, analyte string, since time.Time) ([]HistoryPoint, error) {
	if s.closed.Load() {
		return nil, ErrClosed
	}
	rows, err := s.r.QueryContext(ctx, s.d.q(`SELECT patient_id, analyte, value, unit, collected_at, message_id, recorded_at
FROM history_points WHERE patient_id = ? AND analyte = ? AND collected_at >= ?
ORDER BY collected_at, id`), patientID, analyte, s.d.t(since))
	if err != nil {
		return nil, dbErr("read history", err)
	}
	defer rows.Close()
	var out []HistoryPoint
	for rows.Next() {
		var p HistoryPoint
		if err := rows.Scan(&p.PatientID, &p.Analyte, &p.Value, &p.Unit, dbTime{&p.CollectedAt}, &p.MessageID, dbTime{&p.RecordedAt}); err != nil {
			return nil, dbErr("read history", err)
		}
		out = append(out, p)
	}
	if err := rows.Err(); err != nil {
		return nil, dbErr("read history", err)
	}
	return out, nil
}

// Ping implements Store.
func (s *sqlStore) Ping(ctx context.Context) error {
	if s.closed.Load() {
		return ErrClosed
	}
	if err := s.w.PingContext(ctx); err != nil {
		return dbErr("ping", err)
	}
	if s.r != s.w {
		if err := s.r.PingContext(ctx); err != nil {
			return dbErr("ping", err)
		}
	}
	return nil
}

// Ready implements Store.
func (s *sqlStore) Ready(ctx context.Context) error {
	if err := s.Ping(ctx); err != nil {
		return err
	}
	return ready(ctx, s.prov)
}

// ReportedIn implements Store.
func (s *sqlStore) ReportedIn(ctx context.Context, groupKey string) ([]Reported, error) {
	if s.closed.Load() {
		return nil, ErrClosed
	}
	rows, err := s.r.QueryContext(ctx, s.d.q(`SELECT obs_key, group_key, equation, assumed_sex, external_id, inputs, active, message_id, updated_at
FROM reported_observations WHERE group_key = ? ORDER BY obs_key`), groupKey)
	if err != nil {
		return nil, dbErr("read reported observations", err)
	}
	defer rows.Close()
	var out []Reported
	for rows.Next() {
		var r Reported
		var active int
		if err := rows.Scan(&r.Key, &r.GroupKey, &r.Equation, &r.AssumedSex, &r.ExternalID, &r.Inputs, &active, &r.MessageID, dbTime{&r.UpdatedAt}); err != nil {
			return nil, dbErr("read reported observations", err)
		}
		r.Active = active == 1
		out = append(out, r)
	}
	if err := rows.Err(); err != nil {
		return nil, dbErr("read reported observations", err)
	}
	return out, nil
}
