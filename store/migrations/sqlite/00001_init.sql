-- filtrate store schema, SQLite dialect (embedded default store).
--
-- The PostgreSQL migration of the same version creates the same tables with
-- the same columns and the same rules; only the types differ. Times are TEXT
-- in the fixed-width UTC form 2006-01-02T15:04:05.000000Z so that they sort
-- and compare as text. There is no Down section on purpose: a migration never
-- drops audit data.

-- +goose Up

-- chain_head holds the last audit record of the hash chain. Accept reads and
-- updates it inside its write transaction (BEGIN IMMEDIATE), which serialises
-- every writer of the file, so all processes append to one chain.
CREATE TABLE chain_head (
    singleton INTEGER PRIMARY KEY CHECK (singleton = 1),
    last_id   INTEGER NOT NULL,
    last_hash TEXT    NOT NULL CHECK (length(last_hash) = 64)
) STRICT;

INSERT INTO chain_head (singleton, last_id, last_hash)
VALUES (1, 0, '0000000000000000000000000000000000000000000000000000000000000000');

-- submissions holds one row per accepted message; its key makes a resent
-- message a duplicate that changes nothing.
CREATE TABLE submissions (
    dedup_key   TEXT PRIMARY KEY CHECK (dedup_key <> ''),
    accepted_at TEXT NOT NULL
) STRICT;

-- audit_records is the append-only, hash-chained audit trail. id is the chain
-- position, assigned by the store (no gaps), not by the database.
CREATE TABLE audit_records (
    id                INTEGER PRIMARY KEY,
    recorded_at       TEXT    NOT NULL,
    transport         TEXT    NOT NULL,
    message_id        TEXT    NOT NULL,
    dedup_key         TEXT    NOT NULL REFERENCES submissions (dedup_key),
    raw_hash          TEXT    NOT NULL,
    patient_id        TEXT    NOT NULL,
    birth_date        TEXT    NOT NULL,
    sex               TEXT    NOT NULL,
    collected_at      TEXT,
    inputs            TEXT CHECK (inputs IS NULL OR json_valid(inputs)),
    equation          TEXT    NOT NULL,
    equation_version  TEXT    NOT NULL,
    steps             TEXT CHECK (steps IS NULL OR json_valid(steps)),
    exact             REAL,
    reported          TEXT    NOT NULL,
    unit              TEXT    NOT NULL,
    category          TEXT    NOT NULL,
    comments          TEXT    NOT NULL CHECK (json_valid(comments)),
    suppression_code  TEXT    NOT NULL,
    suppression_text  TEXT    NOT NULL,
    policy            TEXT    NOT NULL,
    policy_version    TEXT    NOT NULL,
    config_hash       TEXT    NOT NULL,
    software_version  TEXT    NOT NULL,
    output_message_id TEXT    NOT NULL,
    request           TEXT CHECK (request IS NULL OR json_valid(request)),
    content_hash      TEXT    NOT NULL CHECK (length(content_hash) = 64),
    prev_hash         TEXT    NOT NULL CHECK (length(prev_hash) = 64)
) STRICT;

CREATE INDEX audit_records_patient ON audit_records (patient_id, id);
CREATE INDEX audit_records_message ON audit_records (message_id, id);
CREATE INDEX audit_records_dedup ON audit_records (dedup_key);
CREATE INDEX audit_records_recorded ON audit_records (recorded_at);

-- Append-only: the database refuses UPDATE and DELETE on the audit tables.
-- SQLite has no TRUNCATE; a DELETE without WHERE fires the DELETE trigger.
-- +goose StatementBegin
CREATE TRIGGER audit_records_no_update BEFORE UPDATE ON audit_records
BEGIN
    SELECT RAISE(ABORT, 'filtrate: audit_records is append-only: UPDATE refused');
END;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE TRIGGER audit_records_no_delete BEFORE DELETE ON audit_records
BEGIN
    SELECT RAISE(ABORT, 'filtrate: audit_records is append-only: DELETE refused');
END;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE TRIGGER submissions_no_update BEFORE UPDATE ON submissions
BEGIN
    SELECT RAISE(ABORT, 'filtrate: submissions is append-only: UPDATE refused');
END;
-- +goose StatementEnd

-- +goose StatementBegin
CREATE TRIGGER submissions_no_delete BEFORE DELETE ON submissions
BEGIN
    SELECT RAISE(ABORT, 'filtrate: submissions is append-only: DELETE refused');
END;
-- +goose StatementEnd

-- outbox_items holds the enriched messages to forward, written in the same
-- transaction as their audit records. partition_key orders delivery (one
-- patient's messages go out in order); '' means no ordering constraint.
CREATE TABLE outbox_items (
    id              INTEGER PRIMARY KEY AUTOINCREMENT,
    dedup_key       TEXT    NOT NULL REFERENCES submissions (dedup_key),
    destination     TEXT    NOT NULL CHECK (destination <> ''),
    partition_key   TEXT    NOT NULL,
    message_id      TEXT    NOT NULL,
    content_type    TEXT    NOT NULL,
    payload         BLOB    NOT NULL,
    state           TEXT    NOT NULL CHECK (state IN ('pending', 'sent', 'parked')),
    attempts        INTEGER NOT NULL DEFAULT 0,
    created_at      TEXT    NOT NULL,
    next_attempt_at TEXT    NOT NULL,
    claimed_by      TEXT    NOT NULL DEFAULT '',
    lease_until     TEXT,
    last_error      TEXT    NOT NULL DEFAULT '',
    sent_at         TEXT,
    ack_info        TEXT    NOT NULL DEFAULT '',
    parked_at       TEXT
) STRICT;

CREATE INDEX outbox_items_pending ON outbox_items (destination, partition_key, id)
    WHERE state = 'pending';
CREATE INDEX outbox_items_state ON outbox_items (state, destination);
CREATE INDEX outbox_items_dedup ON outbox_items (dedup_key);

-- history_points holds results in canonical units for trend and delta checks.
CREATE TABLE history_points (
    id           INTEGER PRIMARY KEY AUTOINCREMENT,
    dedup_key    TEXT NOT NULL REFERENCES submissions (dedup_key),
    patient_id   TEXT NOT NULL,
    analyte      TEXT NOT NULL,
    value        REAL NOT NULL,
    unit         TEXT NOT NULL,
    collected_at TEXT NOT NULL,
    message_id   TEXT NOT NULL,
    recorded_at  TEXT NOT NULL
) STRICT;

CREATE INDEX history_points_lookup ON history_points (patient_id, analyte, collected_at);
