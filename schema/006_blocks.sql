-- 006_blocks.sql: the transition log in blocks.
-- Applied once, in one transaction, when PRAGMA user_version < 6.  From here on worthd logs
-- transitions as blocks, a row per run of up to 1024 consecutive transitions of one model
-- (the records' layout: daemon/store/logblk.h, schema/README.md), so that a group commit
-- writes a few rows instead of one per transition and recovery reads the log in large
-- sequential pieces.  Rows of the transitions table written before stay where they are and
-- are read as ever (their seqs all come before the model's first block); its rolled_back
-- column still marks them.  A rollback marks blocks' transitions in log_undone, a row per
-- run of consecutive seqs it undid.

CREATE TABLE log_blocks (
    id          INTEGER PRIMARY KEY,          -- rowid: a block's data runs over overflow pages,
                                              -- which a search of a rowid table never reads
    model       INTEGER NOT NULL REFERENCES models(id),
    first_seq   INTEGER NOT NULL,             -- seq of the block's first transition
    last_seq    INTEGER NOT NULL,             -- and of its last: first_seq..last_seq, no gap
    t_lo        REAL,                         -- smallest t of its transitions; NULL: none has one
    t_hi        REAL,                         -- largest t
    untimed     INTEGER NOT NULL,             -- its transitions without t
    data        BLOB    NOT NULL              -- the records (logblk.h), each with its CRC-32
);
CREATE UNIQUE INDEX log_blocks_first ON log_blocks(model, first_seq);
CREATE INDEX log_blocks_last ON log_blocks(model, last_seq);

CREATE TABLE log_undone (
    model       INTEGER NOT NULL REFERENCES models(id),
    lo          INTEGER NOT NULL,             -- seqs lo..hi of the model's blocks
    hi          INTEGER NOT NULL,
    rollback    INTEGER NOT NULL,             -- the id of the rollback event that undid them
    PRIMARY KEY (model, lo)
) WITHOUT ROWID;
