-- 002_health.sql: worthd marks its files, checkpoints say whether every estimator
-- in them was healthy, and a training cut short says how far it went.
-- Applied once, in one transaction, when PRAGMA user_version < 2.

-- "WRTH": a file that carries this id in its header was written by worthd (the live
-- database, and every backup copied from it).  Backups replace only such files.
PRAGMA application_id = 1465013320;

-- The number of estimators that had diverged when the checkpoint was taken (their state
-- is stored reset, never as the non-finite numbers they reached).  Retention never
-- deletes the newest checkpoint with 0 here.
ALTER TABLE checkpoints ADD COLUMN diverged INTEGER NOT NULL DEFAULT 0;

-- NULL: the training ran as asked.  Otherwise it was cut short (worthd stopping, the model
-- dropped or rolled back) after this many mini-batch steps, and a replay runs exactly those.
ALTER TABLE trainings ADD COLUMN steps INTEGER;
