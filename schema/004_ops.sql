-- 004_ops.sql: retention policies per model, and how far retention has deleted a model's log.
-- Applied once, in one transaction, when PRAGMA user_version < 4.  (003 is the samples
-- migration; this one depends on nothing of it.)

CREATE TABLE retention (
    model       INTEGER PRIMARY KEY REFERENCES models(id),
    days        REAL,                       -- keep the log this many days; NULL: worthd's --retain-days
    transitions INTEGER,                    -- keep at least the newest N; NULL: --retain-transitions
    log_floor   INTEGER NOT NULL DEFAULT 0, -- transitions with seq <= log_floor may have been deleted
    last_run    REAL                        -- when retention last ran for the model
);
