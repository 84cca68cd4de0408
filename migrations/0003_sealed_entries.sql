-- holdout-ledger schema: sealed final rounds.
--
-- The per-row losses of every sealed entry, kept until the round closes: the close answers
-- every entry at once and compares neighbours of the ranking row by row (DESIGN 4.6). The
-- ledger records each entry as it arrives, without anything about its score; these rows are
-- never returned by any call. `losses` holds the per-row losses as little-endian f64 in the
-- holdout's row order. Like the labels, they stay in the database in clear.
CREATE TABLE sealed_entries (
    holdout_id INTEGER NOT NULL REFERENCES holdouts (id),
    ticket     INTEGER NOT NULL CHECK (ticket >= 0),
    seq        INTEGER NOT NULL,
    team       TEXT    NOT NULL,
    digest     TEXT    NOT NULL,
    request_id TEXT    NOT NULL DEFAULT '',
    marked     INTEGER NOT NULL DEFAULT 0,
    losses     BLOB    NOT NULL,
    PRIMARY KEY (holdout_id, ticket)
) STRICT;

CREATE INDEX sealed_entries_team ON sealed_entries (holdout_id, team);
