-- 003_samples.sql: what worthd keeps per source to pair samples into transitions and to
-- skip what a producer sends twice, and the plant time of each checkpoint.
-- Applied once, in one transaction, when PRAGMA user_version < 3.

-- Per model and source: the last sample logged (t, x, r, terminal), from which the next
-- sample of that source makes a transition, and the last producer sequence (pseq) of a
-- transition.  Updated in the same transaction as the log rows that change it, so after a
-- restart pairing and skipping go on where they were.  Not touched by a rollback: what a
-- source sent stays sent.
CREATE TABLE sources (
    model       INTEGER NOT NULL REFERENCES models(id),
    source      TEXT    NOT NULL,             -- '' for the default source
    t           REAL,                         -- the last sample's time; NULL before any
    x           BLOB,                         -- its state, D little-endian float64
    r           REAL,                         -- its reward
    terminal    INTEGER NOT NULL DEFAULT 0,   -- 1: its state was terminal (the chain ended)
    pseq        INTEGER NOT NULL DEFAULT 0,   -- the last producer sequence of a transition
    PRIMARY KEY (model, source)
) WITHOUT ROWID;

-- The plant's time (t) of the last transition the checkpoint's state has learnt, when the
-- transitions carry one.
ALTER TABLE checkpoints ADD COLUMN plant_t REAL;
