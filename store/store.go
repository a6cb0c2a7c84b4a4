// Package store owns filtrate's durability: the hash-chained, append-only
// audit trail, the outbox of enriched messages waiting to be forwarded, and
// the history of results per patient.
//
// Two backends behave identically and pass the same test suite
// (package storetest): an embedded SQLite file for a zero-setup first run
// (DSN "file:PATH") and PostgreSQL for production (DSN "postgres://...").
// [Open] picks the backend from the DSN and applies the schema migrations.
//
// The unit of work is a [Submission]: everything one processed message
// produces. [Store.Accept] records a submission in one transaction and
// returns only after that transaction has committed, so the caller may
// acknowledge the message as soon as Accept returns without error.
// Concurrent Accept calls share transactions (group commit); each
// submission runs under its own savepoint, so one that fails fails alone.
//
// Every audit record carries the SHA-256 of a canonical encoding of its
// fields ([Canonical], [HashRecord]) and the hash of the record before it,
// forming a chain that [Verifier] checks. The database refuses UPDATE, DELETE
// and TRUNCATE on audit records.
//
// The package never puts patient data into error strings or log lines:
// errors name fields, indexes and database error codes, never values.
package store

import (
	"context"
	"encoding/json"
	"errors"
	"log/slog"
	"time"
)

// Sentinel errors, matched with [errors.Is].
var (
	// ErrNotFound reports that no audit record or outbox item has the
	// requested ID.
	ErrNotFound = errors.New("store: not found")
	// ErrWrongState reports an outbox transition that the item's current
	// state does not allow, such as marking a parked item sent.
	ErrWrongState = errors.New("store: outbox item is not in a state that allows this change")
	// ErrClosed reports a call on a closed Store.
	ErrClosed = errors.New("store: closed")
	// ErrInvalid reports a submission or argument that the store refuses
	// before touching the database.
	ErrInvalid = errors.New("store: invalid input")
	// ErrUnsupportedDSN reports a DSN whose scheme names no backend.
	ErrUnsupportedDSN = errors.New("store: unsupported DSN (want file:PATH or postgres://...)")
	// ErrMigrationsPending reports a database whose schema is older than
	// this build of the store.
	ErrMigrationsPending = errors.New("store: schema migrations pending")
)

// DiscardedPrefix starts the AckInfo of an item a person discarded.
const DiscardedPrefix = "discarded by a person: "

// GenesisHash is the PrevHash of the first audit record: 64 zeros.
const GenesisHash = "0000000000000000000000000000000000000000000000000000000000000000"

// Store is the durability layer used by the daemon. Implementations are safe
// for concurrent use by multiple goroutines, and several Stores (in one
// process or several) may share one database.
type Store interface {
	// Accept durably records one processed message: its audit records
	// (appended to the hash chain), its outbox items and its result-history
	// points, all in one transaction. It returns only after that transaction
	// has committed. If a submission with the same DedupKey was accepted
	// before, Accept writes nothing and returns a Receipt with Duplicate set
	// and the original IDs.
	//
	// An error does not prove that nothing was recorded (the commit may
	// have succeeded after the caller's context ended); the caller should
	// not acknowledge the message, and a retry with the same DedupKey is
	// safe.
	Accept(ctx context.Context, sub Submission) (Receipt, error)

	// Record returns the audit record with the given ID, or ErrNotFound.
	Record(ctx context.Context, id int64) (AuditRecord, error)
	// Search returns the audit records matching f, newest first.
	Search(ctx context.Context, f Filter) ([]AuditRecord, error)
	// Walk calls fn for every audit record with ID >= fromID in chain order
	// (ascending ID) and stops at the first error from fn, which it returns
	// unchanged. fn may call other Store methods.
	Walk(ctx context.Context, fromID int64, fn func(AuditRecord) error) error
	// Head returns the chain head: the ID and content hash of the last
	// appended audit record as the store itself tracks them.
	Head(ctx context.Context) (ChainHead, error)

	// Claim leases up to limit due items for destination to worker for the
	// lease duration and returns them in ID order. An item is due when it is
	// pending, its next attempt time has come and no live lease holds it.
	// Items sharing a PartitionKey go out one at a time, oldest first: an item
	// is not claimable while an older pending or parked item of the same
	// destination and partition exists. Each claim counts as an attempt. When a lease
	// runs out without MarkSent, Retry or Park, the item becomes claimable
	// again. Concurrent Claims (also from other processes) never return the
	// same item while its lease is live.
	Claim(ctx context.Context, destination, worker string, limit int, lease time.Duration) ([]OutboxItem, error)
	// MarkSent records that the receiver acknowledged a pending item.
	// ackInfo is kept for the audit view (for example the acknowledgement's
	// control ID and code).
	MarkSent(ctx context.Context, id int64, ackInfo string) error
	// Retry releases a pending item's lease and makes it due again at next.
	// reason must not contain patient data.
	Retry(ctx context.Context, id int64, next time.Time, reason string) error
	// Park takes a pending item out of delivery for a person to look at.
	// Later items of its partition wait until the person requeues or
	// discards it, so that delivery order is kept. reason must not contain
	// patient data.
	Park(ctx context.Context, id int64, reason string) error
	// Discard closes a parked item without sending it, when a person has
	// decided it must not be sent; it is kept, marked sent with AckInfo
	// DiscardedPrefix + reason, and its partition proceeds. reason is
	// required and must not contain patient data.
	Discard(ctx context.Context, id int64, reason string) error
	// ListParked returns all parked items in ID order.
	ListParked(ctx context.Context) ([]OutboxItem, error)
	// Requeue returns a parked item to delivery, due now.
	Requeue(ctx context.Context, id int64) error
	// Item returns the outbox item with the given ID, or ErrNotFound.
	Item(ctx context.Context, id int64) (OutboxItem, error)
	// OutboxStats returns, per destination that has pending or parked
	// items, the queue depth and age, sorted by destination. A destination
	// missing from the result has nothing pending and nothing parked.
	OutboxStats(ctx context.Context) ([]DestinationStats, error)
	// PurgeSent deletes sent outbox items whose SentAt is before the given
	// time and returns how many it deleted. Audit records are never purged.
	PurgeSent(ctx context.Context, before time.Time) (int64, error)

	// History returns the result-history points of one patient and analyte
	// collected at or after since, oldest first.
	History(ctx context.Context, patientID, analyte string, since time.Time) ([]HistoryPoint, error)
	// ReportedIn returns the eGFR observations last sent or withdrawn for
	// a specimen or order (Submission.Reported), by Key.
	ReportedIn(ctx context.Context, groupKey string) ([]Reported, error)

	// Ping checks that the database answers.
	Ping(ctx context.Context) error
	// Ready checks that the database answers and that every schema
	// migration known to this build has been applied; it wraps
	// ErrMigrationsPending when not. It suits a readiness probe.
	Ready(ctx context.Context) error
	// Close waits for Accept calls already queued to finish, then releases
	// the database. Calling Close more than once is safe.
	Close() error
}

// Submission is everything one processed message leaves behind. The store
// fills the fields of each record that it owns (ID, RecordedAt, DedupKey,
// PrevHash, ContentHash, and SoftwareVersion when empty).
type Submission struct {
	// DedupKey identifies the message so that a resent copy is recognised
	// (for example sender, control ID and raw hash). Required.
	DedupKey string
	// Records are the audit records, appended to the chain in this order.
	Records []AuditRecord
	// Outbox are the messages to forward.
	Outbox []OutboxMessage
	// History are the result points to remember for the patient.
	History []HistoryPoint
	// Reported are the eGFR observations this message sends (Active) or
	// withdraws (not Active); each replaces the state kept under its Key.
	Reported []Reported
}

// Reported is the state of one eGFR observation as last sent downstream.
type Reported struct {
	// Key is the observation's identity at the receiver (for HL7 v2 the
	// order, OBX-3 and OBX-4; for FHIR the resource id). Required.
	Key string
	// GroupKey names the specimen or order it belongs to. Required.
	GroupKey string
	// Equation and AssumedSex identify the value.
	Equation   string
	AssumedSex string
	// ExternalID is the receiver's id (FHIR resource id); "" for HL7 v2.
	ExternalID string
	// Inputs names the input observations the value was computed from
	// (FHIR identities, sorted and comma-separated); "" when the group key
	// alone ties it to its inputs (HL7 v2 order).
	Inputs string
	// Active is false once the observation was withdrawn.
	Active bool
	// MessageID is the message that last sent or withdrew it.
	MessageID string
	// UpdatedAt is set by the store.
	UpdatedAt time.Time
}

// Receipt tells the caller what Accept recorded.
type Receipt struct {
	// Duplicate is true when the DedupKey had been accepted before and
	// nothing was written; the IDs are then those of the original.
	Duplicate bool
	// RecordIDs are the audit record IDs in submission order.
	RecordIDs []int64
	// OutboxIDs are the outbox item IDs in submission order.
	OutboxIDs []int64
}

// AuditRecord is one entry of the audit trail: enough to reproduce a
// reported number without the original message (see DESIGN.md, "Audit
// record"). Free-text fields hold values as received.
type AuditRecord struct {
	// ID is the record's position in the chain, assigned by the store
	// (1, 2, 3, ... without gaps).
	ID int64
	// RecordedAt is when the store recorded the record (UTC, microsecond
	// precision), assigned by the store.
	RecordedAt time.Time
	// Transport names the source transport, for example "hl7v2" or "fhir".
	Transport string
	// MessageID is the source message's control ID.
	MessageID string
	// DedupKey is the Submission's DedupKey, assigned by the store.
	DedupKey string
	// RawHash is the hex SHA-256 of the raw message as received.
	RawHash string
	// PatientID is the patient identifier as received.
	PatientID string
	// BirthDate is the date of birth as received (text).
	BirthDate string
	// Sex is the sex as received.
	Sex string
	// CollectedAt is the specimen collection time; zero when unknown. The
	// store keeps it in UTC with microsecond precision.
	CollectedAt time.Time
	// Inputs holds each input as received (value text, unit) and as used
	// (after unit conversion and calibration, with the calibration rule's ID
	// and version), as JSON. The database checks that it is valid JSON.
	Inputs json.RawMessage
	// Equation is the equation ID, for example "ckd-epi-2021-cr".
	Equation string
	// EquationVersion is the version of the equation's implementation.
	EquationVersion string
	// Steps holds every intermediate step of the calculation, as JSON.
	Steps json.RawMessage
	// Exact is the unrounded result; nil when no value was computed.
	Exact *float64
	// Reported is the text a report shows, for example "68" or ">90".
	Reported string
	// Unit is the unit of Exact and Reported.
	Unit string
	// Category is the KDIGO category, for example "G2".
	Category string
	// Comments are the comments added to the report.
	Comments []string
	// SuppressionCode is the reason code when no value was reported.
	SuppressionCode string
	// SuppressionText explains the suppression.
	SuppressionText string
	// Policy names the reporting policy applied.
	Policy string
	// PolicyVersion is the policy's version.
	PolicyVersion string
	// ConfigHash is the hash of the configuration in force.
	ConfigHash string
	// SoftwareVersion is filtrate's version; the store fills it from
	// WithSoftwareVersion when empty.
	SoftwareVersion string
	// OutputMessageID is the control ID of the enriched message sent on.
	OutputMessageID string
	// Request is the full neutral calculation request, as JSON, so that the
	// result can be recomputed without the original message.
	Request json.RawMessage
	// ContentHash is the hex SHA-256 of Canonical(record), assigned by the
	// store.
	ContentHash string
	// PrevHash is the ContentHash of the previous record (GenesisHash for
	// the first), assigned by the store.
	PrevHash string
}

// Filter selects audit records for Search. Zero fields do not filter.
type Filter struct {
	// PatientID matches the patient identifier exactly.
	PatientID string
	// MessageID matches the source message control ID exactly.
	MessageID string
	// Since keeps records with RecordedAt at or after it.
	Since time.Time
	// Until keeps records with RecordedAt before it.
	Until time.Time
	// Equation matches the equation ID exactly.
	Equation string
	// BeforeID keeps records with ID below it (for paging newest first).
	BeforeID int64
	// Limit caps the number of records returned; 0 means 100, and values
	// above 10000 are lowered to 10000.
	Limit int
}

// ChainHead is the last record of the audit chain as the store tracks it.
type ChainHead struct {
	// LastID is the ID of the last record; 0 for an empty chain.
	LastID int64
	// LastHash is the ContentHash of the last record; GenesisHash for an
	// empty chain.
	LastHash string
}

// OutboxMessage is a message to forward, part of a Submission.
type OutboxMessage struct {
	// Destination names the configured downstream peer. Required.
	Destination string
	// PartitionKey orders delivery: items with the same key for the same
	// destination are delivered one at a time in acceptance order. Use the
	// patient identifier (or a hash of it); "" imposes no order.
	PartitionKey string
	// MessageID is the control ID of the outgoing message.
	MessageID string
	// ContentType describes Payload, for example "application/hl7-v2" or
	// "application/fhir+json".
	ContentType string
	// Payload is the message to send. Required.
	Payload []byte
}

// OutboxState is the delivery state of an outbox item.
type OutboxState string

// Outbox states.
const (
	// OutboxPending items wait for delivery (possibly leased to a worker).
	OutboxPending OutboxState = "pending"
	// OutboxSent items were acknowledged by the receiver.
	OutboxSent OutboxState = "sent"
	// OutboxParked items wait for a person (see Requeue).
	OutboxParked OutboxState = "parked"
)

// OutboxItem is a stored outbox message with its delivery state.
type OutboxItem struct {
	// ID identifies the item; IDs grow in acceptance order.
	ID int64
	// DedupKey is the DedupKey of the submission that produced the item.
	DedupKey string
	OutboxMessage
	// State is the delivery state.
	State OutboxState
	// Attempts counts the claims so far.
	Attempts int
	// CreatedAt is when the item was accepted.
	CreatedAt time.Time
	// NextAttemptAt is when the item is next due.
	NextAttemptAt time.Time
	// ClaimedBy names the worker of the latest claim.
	ClaimedBy string
	// LeaseUntil is when the latest claim expires; zero when not leased.
	LeaseUntil time.Time
	// LastError is the reason given to the latest Retry or Park.
	LastError string
	// SentAt is when MarkSent was called; zero until then.
	SentAt time.Time
	// AckInfo is what MarkSent recorded.
	AckInfo string
	// ParkedAt is when the item was last parked; zero if never.
	ParkedAt time.Time
}

// DestinationStats describes one destination's outbox queue.
type DestinationStats struct {
	// Destination names the peer.
	Destination string
	// Pending counts items waiting for delivery, including in-flight ones.
	Pending int64
	// InFlight counts pending items under a live lease.
	InFlight int64
	// OldestPendingAge is how long the oldest pending item has waited;
	// zero when nothing is pending.
	OldestPendingAge time.Duration
	// Parked counts items waiting for a person.
	Parked int64
}

// HistoryPoint is one result remembered for a patient.
type HistoryPoint struct {
	// PatientID is the patient identifier as received. Required.
	PatientID string
	// Analyte names what was measured, for example "creatinine". Required.
	Analyte string
	// Value is the result in the analyte's canonical unit.
	Value float64
	// Unit is the canonical unit, for example "umol/L".
	Unit string
	// CollectedAt is the specimen collection time (UTC, microsecond
	// precision). Required.
	CollectedAt time.Time
	// MessageID is the control ID of the message that carried the result.
	MessageID string
	// RecordedAt is when the store recorded the point; set by the store.
	RecordedAt time.Time
}

// Option adjusts Open and Migrate.
type Option func(*options)

type options struct {
	now             func() time.Time
	softwareVersion string
	logger          *slog.Logger
	maxBatch        int
	maxConns        int
	skipMigrations  bool
	batchTimeout    time.Duration
}

func defaultOptions() options {
	return options{
		now:          time.Now,
		logger:       slog.New(slog.DiscardHandler),
		maxBatch:     128,
		maxConns:     8,
		batchTimeout: 30 * time.Second,
	}
}

// WithClock sets the clock the store reads for RecordedAt, lease and due
// times and queue ages. Tests pass a fake; the default is time.Now.
func WithClock(now func() time.Time) Option {
	return func(o *options) {
		if now != nil {
			o.now = now
		}
	}
}

// WithSoftwareVersion sets the version written into audit records whose
// SoftwareVersion is empty.
func WithSoftwareVersion(v string) Option {
	return func(o *options) { o.softwareVersion = v }
}

// WithLogger sets the logger for store events (never with patient data).
// The default discards.
func WithLogger(l *slog.Logger) Option {
	return func(o *options) {
		if l != nil {
			o.logger = l
		}
	}
}

// WithMaxBatch caps how many submissions share one group commit (default
// 128). 1 disables group commit.
func WithMaxBatch(n int) Option {
	return func(o *options) {
		if n > 0 {
			o.maxBatch = n
		}
	}
}

// WithMaxConns caps the PostgreSQL connection pool (default 8). The SQLite
// backend ignores it.
func WithMaxConns(n int) Option {
	return func(o *options) {
		if n > 0 {
			o.maxConns = n
		}
	}
}

// WithoutMigrations makes Open check the schema instead of migrating it, for
// a daemon running as a restricted database role that may not change the
// schema (see ROLES.md). Open then fails with ErrMigrationsPending when the
// schema is behind.
func WithoutMigrations() Option {
	return func(o *options) { o.skipMigrations = true }
}
