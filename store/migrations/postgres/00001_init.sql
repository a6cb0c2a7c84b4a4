-- filtrate store schema, PostgreSQL dialect (production store).
--
-- The SQLite migration of the same version creates the same tables with the
-- same columns and the same rules; only the types differ. JSON columns use the
-- json type (not jsonb) because json keeps the exact text, which the content
-- hash covers. There is no Down section on purpose: a migration never drops
-- audit data.

-- +goose Up

-- chain_head holds the last audit record of the hash chain. Accept locks this
-- single row (SELECT ... FOR UPDATE) at the start of its transaction, which
-- serialises appends from every daemon process into one chain.
CREATE TABLE chain_head (
    singleton boolean PRIMARY KEY DEFAULT true CHECK (singleton),
    last_id   bigint  NOT NULL,
    last_hash text    NOT NULL CHECK (length(last_hash) = 64)
);

INSERT INTO chain_head (singleton, last_id, last_hash)
VALUES (true, 0, '0000000000000000000000000000000000000000000000000000000000000000');

-- submissions holds one row per accepted message; its key makes a resent
-- message a duplicate that changes nothing.
CREATE TABLE submissions (
    dedup_key   text PRIMARY KEY CHECK (dedup_key <> ''),
    accepted_at timestamptz NOT NULL
);

-- audit_records is the append-only, hash-chained audit trail. id is the chain
-- position, assigned by the store (no gaps), not by a sequence.
CREATE TABLE audit_records (
    id                bigint PRIMARY KEY,
    recorded_at       timestamptz NOT NULL,
    transport         text NOT NULL,
    message_id        text NOT NULL,
    dedup_key         text NOT NULL REFERENCES submissions (dedup_key),
    raw_hash          text NOT NULL,
    patient_id        text NOT NULL,
    birth_date        text NOT NULL,
    sex               text NOT NULL,
    collected_at      timestamptz,
    inputs            json,
    equation          text NOT NULL,
    equation_version  text NOT NULL,
    steps             json,
    exact             double precision,
    reported          text NOT NULL,
    unit              text NOT NULL,
    category          text NOT NULL,
    comments          json NOT NULL,
    suppression_code  text NOT NULL,
    suppression_text  text NOT NULL,
    policy            text NOT NULL,
    policy_version    text NOT NULL,
    config_hash       text NOT NULL,
    software_version  text NOT NULL,
    output_message_id text NOT NULL,
    request           json,
    content_hash      text NOT NULL CHECK (length(content_hash) = 64),
    prev_hash         text NOT NULL CHECK (length(prev_hash) = 64)
);

CREATE INDEX audit_records_patient ON audit_records (patient_id, id);
CREATE INDEX audit_records_message ON audit_records (message_id, id);
CREATE INDEX audit_records_dedup ON audit_records (dedup_key);
CREATE INDEX audit_records_recorded ON audit_records (recorded_at);

-- Append-only: the database refuses UPDATE, DELETE and TRUNCATE on the audit
-- tables, whoever asks (the restricted daemon role has no such privilege
-- either; see store/ROLES.md).
-- +goose StatementBegin
CREATE FUNCTION filtrate_append_only() RETURNS trigger
LANGUAGE plpgsql AS $$
BEGIN
    RAISE EXCEPTION 'filtrate: % is append-only: % refused', TG_TABLE_NAME, TG_OP;
END;
$$;
-- +goose StatementEnd

CREATE TRIGGER audit_records_append_only
    BEFORE UPDATE OR DELETE ON audit_records
    FOR EACH ROW EXECUTE FUNCTION filtrate_append_only();

CREATE TRIGGER audit_records_no_truncate
    BEFORE TRUNCATE ON audit_records
    FOR EACH STATEMENT EXECUTE FUNCTION filtrate_append_only();

CREATE TRIGGER submissions_append_only
    BEFORE UPDATE OR DELETE ON submissions
    FOR EACH ROW EXECUTE FUNCTION filtrate_append_only();

CREATE TRIGGER submissions_no_truncate
    BEFORE TRUNCATE ON submissions
    FOR EACH STATEMENT EXECUTE FUNCTION filtrate_append_only();

-- outbox_items holds the enriched messages to forward, written in the same
-- transaction as their audit records. partition_key orders delivery (one
-- patient's messages go out in order); '' means no ordering constraint.
CREATE TABLE outbox_items (
    id              bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    dedup_key       text NOT NULL REFERENCES submissions (dedup_key),
    destination     text NOT NULL CHECK (destination <> ''),
    partition_key   text NOT NULL,
    message_id      text NOT NULL,
    content_type    text NOT NULL,
    payload         bytea NOT NULL,
    state           text NOT NULL CHECK (state IN ('pending', 'sent', 'parked')),
    attempts        integer NOT NULL DEFAULT 0,
    created_at      timestamptz NOT NULL,
    next_attempt_at timestamptz NOT NULL,
    claimed_by      text NOT NULL DEFAULT '',
    lease_until     timestamptz,
    last_error      text NOT NULL DEFAULT '',
    sent_at         timestamptz,
    ack_info        text NOT NULL DEFAULT '',
    parked_at       timestamptz
);

CREATE INDEX outbox_items_pending ON outbox_items (destination, partition_key, id)
    WHERE state = 'pending';
CREATE INDEX outbox_items_state ON outbox_items (state, destination);
CREATE INDEX outbox_items_dedup ON outbox_items (dedup_key);

-- history_points holds results in canonical units for trend and delta checks.
CREATE TABLE history_points (
    id           bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    dedup_key    text NOT NULL REFERENCES submissions (dedup_key),
    patient_id   text NOT NULL,
    analyte      text NOT NULL,
    value        double precision NOT NULL,
    unit         text NOT NULL,
    collected_at timestamptz NOT NULL,
    message_id   text NOT NULL,
    recorded_at  timestamptz NOT NULL
);

CREATE INDEX history_points_lookup ON history_points (patient_id, analyte, collected_at);
