package audit

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"sort"
	"time"

	"filtrate/calc"
	"filtrate/store"
)

// Source is the part of the store the audit view reads. store.Store
// implements it.
type Source interface {
	Record(ctx context.Context, id int64) (store.AuditRecord, error)
	Search(ctx context.Context, f store.Filter) ([]store.AuditRecord, error)
	Walk(ctx context.Context, fromID int64, fn func(store.AuditRecord) error) error
	Head(ctx context.Context) (store.ChainHead, error)
}

// ProblemKind classifies a verification finding.
type ProblemKind string

// Kinds of findings: the chain kinds of package store, and two of
// recomputation.
const (
	ProblemContentHash = ProblemKind(store.ProblemContentHash)
	ProblemBrokenLink  = ProblemKind(store.ProblemBrokenLink)
	ProblemGap         = ProblemKind(store.ProblemGap)
	ProblemOrder       = ProblemKind(store.ProblemOrder)
	ProblemHead        = ProblemKind(store.ProblemHead)
	// ProblemRecompute: the record recomputes to something else.
	ProblemRecompute ProblemKind = "recompute-mismatch"
	// ProblemRecomputeFailed: the record cannot be recomputed.
	ProblemRecomputeFailed ProblemKind = "recompute-failed"
)

// Problem is one verification finding. It names record IDs, kinds and
// value-free details, never record content.
type Problem struct {
	Kind ProblemKind
	// ID is the record concerned (the first missing ID of a gap).
	ID int64
	// LastID is the last missing ID of a gap or head mismatch, and equals
	// ID otherwise.
	LastID int64
	// Detail adds a value-free description (recomputation findings).
	Detail string
}

// String describes the problem, for example "record 7: gap",
// "records 7-9: gap" or "record 4: recompute-mismatch: exact: ...".
func (p Problem) String() string {
	s := fmt.Sprintf("record %d: %s", p.ID, p.Kind)
	if p.LastID != p.ID {
		s = fmt.Sprintf("records %d-%d: %s", p.ID, p.LastID, p.Kind)
	}
	if p.Detail != "" {
		s += ": " + p.Detail
	}
	return s
}

// Report is the result of [Verify].
type Report struct {
	// FirstID and LastID bound the records walked (0 when none).
	FirstID, LastID int64
	// Checked counts the records walked.
	Checked int64
	// Recomputed counts the records whose recomputation matched;
	// NotApplicable those with nothing to recompute.
	Recomputed, NotApplicable int64
	// Head is the chain head the store tracks, read before the walk.
	Head store.ChainHead
	// Problems lists every finding, ordered by record ID.
	Problems []Problem
}

// OK reports whether verification found nothing wrong.
func (r Report) OK() bool { return len(r.Problems) == 0 }

// Counts returns how many problems of each kind were found.
func (r Report) Counts() map[ProblemKind]int {
	m := map[ProblemKind]int{}
	for _, p := range r.Problems {
		m[p.Kind]++
	}
	return m
}

// ByRecord groups the problems by record ID (the first ID of a range).
func (r Report) ByRecord() map[int64][]Problem {
	m := map[int64][]Problem{}
	for _, p := range r.Problems {
		m[p.ID] = append(m[p.ID], p)
	}
	return m
}

// VerifyOptions adjust [Verify].
type VerifyOptions struct {
	// Since, when set, verifies the records from the first one recorded at
	// or after it, still checking its link to the record before. With
	// several writers whose clocks disagree, "first" means: after the last
	// record recorded before Since.
	Since time.Time
	// Calculator recomputes the records; nil means the builtin one.
	Calculator *calc.Calculator
	// Progress, when set, is called with the number of records checked so
	// far, at most once per ProgressInterval (default 1 s) and, when
	// ProgressEvery is positive, every ProgressEvery records.
	Progress         func(checked int64)
	ProgressInterval time.Duration
	ProgressEvery    int64
	// Logger receives a summary and one line per problem (IDs and kinds
	// only). The default discards.
	Logger *slog.Logger
	// Checkpoints, exported earlier and kept outside the database, are
	// checked too: each record they name must still carry their hash.
	Checkpoints []Checkpoint
}

// errStop ends a walk at the chain head read before it.
var errStop = errors.New("audit: end of verified range")

// Verify walks the audit chain in order, checks every record's content
// hash and its link to the one before (store.Verifier), recomputes every
// record (see [Recomputer.Recompute]) and compares the end of the chain with
// the head the store tracks. Records appended while it runs (after the
// head it read first) are left for the next run.
//
// Findings are in the Report; the error reports only a failure to read the
// store (or a cancelled context).
func Verify(ctx context.Context, src Source, opts VerifyOptions) (Report, error) {
	log := opts.Logger
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	interval := opts.ProgressInterval
	if interval <= 0 {
		interval = time.Second
	}
	rc := NewRecomputer(opts.Calculator)

	var rep Report
	head, err := src.Head(ctx)
	if err != nil {
		return rep, fmt.Errorf("audit: verify: %w", err)
	}
	rep.Head = head

	v := store.NewVerifier()
	from := int64(1)
	if !opts.Since.IsZero() {
		prev, err := src.Search(ctx, store.Filter{Until: opts.Since, Limit: 1})
		if err != nil {
			return rep, fmt.Errorf("audit: verify: find the record before --since: %w", err)
		}
		if len(prev) == 1 {
			p := prev[0]
			// The link into the first record is checked against p; p's own
			// content is checked too, since the link relies on it.
			if store.HashRecord(p) != p.ContentHash {
				rep.Problems = append(rep.Problems, Problem{Kind: ProblemContentHash, ID: p.ID, LastID: p.ID})
			}
			v = store.ResumeVerifier(p.ID, p.ContentHash)
			from = p.ID + 1
		}
	}
	log.InfoContext(ctx, "audit verify started", "from_id", from, "head_id", head.LastID)

	lastReport := time.Now()
	err = src.Walk(ctx, from, func(r store.AuditRecord) error {
		if r.ID > head.LastID {
			return errStop
		}
		if rep.FirstID == 0 {
			rep.FirstID = r.ID
		}
		rep.LastID = r.ID
		rep.Checked++
		v.Add(r)
		verdict, _ := rc.Recompute(r)
		switch verdict.Outcome {
		case Match:
			rep.Recomputed++
		case NotApplicable:
			rep.NotApplicable++
		case Mismatch:
			rep.Problems = append(rep.Problems, Problem{Kind: ProblemRecompute, ID: r.ID, LastID: r.ID, Detail: verdict.Summary()})
		case Failed:
			rep.Problems = append(rep.Problems, Problem{Kind: ProblemRecomputeFailed, ID: r.ID, LastID: r.ID, Detail: verdict.Reason})
		}
		if opts.Progress != nil {
			if (opts.ProgressEvery > 0 && rep.Checked%opts.ProgressEvery == 0) || time.Since(lastReport) >= interval {
				opts.Progress(rep.Checked)
				lastReport = time.Now()
			}
		}
		return ctx.Err()
	})
	if err != nil && !errors.Is(err, errStop) {
		return rep, fmt.Errorf("audit: verify: %w", err)
	}
	v.CheckHead(head)
	for _, p := range v.Problems() {
		rep.Problems = append(rep.Problems, Problem{Kind: ProblemKind(p.Kind), ID: p.ID, LastID: p.LastID})
	}
	cpProblems, err := CheckCheckpoints(ctx, src, opts.Checkpoints)
	if err != nil {
		return rep, fmt.Errorf("audit: verify: %w", err)
	}
	rep.Problems = append(rep.Problems, cpProblems...)
	sort.SliceStable(rep.Problems, func(i, j int) bool { return rep.Problems[i].ID < rep.Problems[j].ID })
	for _, p := range rep.Problems {
		log.WarnContext(ctx, "audit verify problem", "kind", string(p.Kind), "id", p.ID, "last_id", p.LastID)
	}
	log.InfoContext(ctx, "audit verify finished", "checked", rep.Checked, "first_id", rep.FirstID,
		"last_id", rep.LastID, "recomputed", rep.Recomputed, "not_applicable", rep.NotApplicable,
		"problems", len(rep.Problems))
	return rep, nil
}
