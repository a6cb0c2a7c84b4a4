-- filtrate store schema 2, SQLite dialect: the eGFR observations last sent
-- downstream, so that a later correction withdraws exactly what was sent.
-- Unlike audit_records this table is state, updated in place; the audit
-- trail keeps the history.

-- +goose Up

CREATE TABLE reported_observations (
    obs_key     TEXT PRIMARY KEY,
    group_key   TEXT NOT NULL,
    equation    TEXT NOT NULL,
    assumed_sex TEXT NOT NULL,
    external_id TEXT NOT NULL,
    inputs      TEXT NOT NULL,
    active      INTEGER NOT NULL CHECK (active IN (0, 1)),
    message_id  TEXT NOT NULL,
    updated_at  TEXT NOT NULL
) STRICT;

CREATE INDEX reported_observations_group ON reported_observations (group_key);
