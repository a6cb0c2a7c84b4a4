-- filtrate store schema 2, PostgreSQL dialect: the eGFR observations last
-- sent downstream, so that a later correction withdraws exactly what was
-- sent. Unlike audit_records this table is state, updated in place; the
-- audit trail keeps the history.

-- +goose Up

CREATE TABLE reported_observations (
    obs_key     text PRIMARY KEY,
    group_key   text NOT NULL,
    equation    text NOT NULL,
    assumed_sex text NOT NULL,
    external_id text NOT NULL,
    inputs      text NOT NULL,
    active      integer NOT NULL CHECK (active IN (0, 1)),
    message_id  text NOT NULL,
    updated_at  timestamptz NOT NULL
);

CREATE INDEX reported_observations_group ON reported_observations (group_key);
