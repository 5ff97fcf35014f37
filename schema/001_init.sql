-- 001_init.sql: the first schema of worthd's database.
-- Applied once, in one transaction, when PRAGMA user_version < 1; it then
-- sets user_version = 1.  Migrations are forward-only: never edit a released
-- file, add 002_....sql instead.

CREATE TABLE models (
    id          INTEGER PRIMARY KEY,          -- stable id; never reused
    name        TEXT    NOT NULL,             -- the protocol's model name
    spec        TEXT    NOT NULL,             -- canonical model.create spec (JSON)
    created_at  REAL    NOT NULL,             -- seconds since 1970, UTC
    dropped_at  REAL                          -- set by model.drop; NULL while live
);
-- One live model per name; dropped ones stay for audit.
CREATE UNIQUE INDEX models_live_name ON models(name) WHERE dropped_at IS NULL;

CREATE TABLE transitions (
    model       INTEGER NOT NULL REFERENCES models(id),
    seq         INTEGER NOT NULL,             -- 1, 2, ... per model, never reused
    t           REAL,                         -- the sender's timestamp, if given
    source      TEXT    NOT NULL,             -- '' for the default source
    x           BLOB    NOT NULL,             -- D little-endian float64
    r           REAL    NOT NULL,
    x_next      BLOB,                         -- D little-endian float64; NULL when terminal
    terminal    INTEGER NOT NULL,             -- 0 or 1
    dt          REAL,                         -- sample interval in seconds, if given
    rolled_back INTEGER NOT NULL DEFAULT 0,   -- 0, or the id of the rollback event that undid it
    PRIMARY KEY (model, seq)
) WITHOUT ROWID;

CREATE TABLE trainings (
    id          INTEGER PRIMARY KEY,
    model       INTEGER NOT NULL REFERENCES models(id),
    ordinal     INTEGER NOT NULL,             -- 1, 2, ... per model, in request order
    after_seq   INTEGER NOT NULL,             -- ran after transition after_seq was learnt
    estimator   TEXT    NOT NULL,
    passes      INTEGER NOT NULL,
    rolled_back INTEGER NOT NULL DEFAULT 0
);
CREATE INDEX trainings_model ON trainings(model, ordinal);

CREATE TABLE checkpoints (
    id          INTEGER PRIMARY KEY,
    model       INTEGER NOT NULL REFERENCES models(id),
    seq         INTEGER NOT NULL,             -- the last transition the state has learnt
    training    INTEGER NOT NULL,             -- the last training (ordinal) the state includes
    label       TEXT,                         -- NULL for automatic checkpoints
    created_at  REAL    NOT NULL,
    size        INTEGER NOT NULL,             -- bytes of state
    state       BLOB    NOT NULL,             -- model_save bytes: header, estimators, CRC-32
    invalid     INTEGER NOT NULL DEFAULT 0    -- 0, or the id of the rollback event that voided it
);
CREATE INDEX checkpoints_model ON checkpoints(model, seq);

CREATE TABLE events (
    id          INTEGER PRIMARY KEY,
    model       INTEGER REFERENCES models(id), -- NULL for daemon-wide events
    at          REAL    NOT NULL,
    kind        TEXT    NOT NULL,             -- start, stop, checkpoint, rollback, drop, ...
    detail      TEXT    NOT NULL              -- JSON object
);
CREATE INDEX events_model ON events(model, at);
