-- 005_history.sql: the learning history of each model, in plant time, kept across restarts.
-- Applied once, in one transaction, when PRAGMA user_version < 5.  One row per bucket: for
-- transitions that carry the plant's t, the bucket is floor(t / width) with width ten control
-- periods (600 s when the model declares no period); for transitions without t, the bucket
-- is floor(seq / 100).  The first row of a bucket wins (INSERT OR IGNORE): recovery, which
-- learns the tail of the log again, adds what the crash lost and changes nothing else.

CREATE TABLE history (
    model        INTEGER NOT NULL REFERENCES models(id),
    timed        INTEGER NOT NULL,  -- 1: bucket of plant time; 0: bucket of seq
    bucket       INTEGER NOT NULL,
    seq          INTEGER NOT NULL,  -- the last transition learnt when the row was taken
    at           REAL NOT NULL,     -- worthd's clock then (seconds since 1970)
    plant_t      REAL,              -- the plant's t of the last transition with one; NULL: none
    td_rms       TEXT NOT NULL,     -- JSON array: each estimator's running RMS TD error
    realised_rms TEXT NOT NULL,     -- JSON array: realised-return RMS error over the window
    PRIMARY KEY (model, timed, bucket)
) WITHOUT ROWID;
CREATE INDEX history_seq ON history(model, seq);

