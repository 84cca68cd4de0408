-- holdout-ledger schema: retention of prediction files, and shredded labels.
--
-- A holdout declares at creation (in its genesis entry) whether the daemon keeps only the
-- digest of each submitted file (`keep_predictions_days` NULL, as before) or keeps the parsed
-- predictions, compressed, for that many days so an audit can re-score them. Kept files are
-- keyed by the ledger entry that scored (or sealed) them and dropped once older than the
-- retention, each drop recorded in the ledger (`predictions-dropped`).
ALTER TABLE holdouts ADD COLUMN keep_predictions_days INTEGER;
-- When the custodian shredded the labels of the closed holdout (`labels-shredded` entry); its
-- `sealed_labels` rows are zeroed and deleted, its kept files too.
ALTER TABLE holdouts ADD COLUMN shredded_at TEXT;

CREATE TABLE kept_predictions (
    holdout_id INTEGER NOT NULL REFERENCES holdouts (id),
    -- The answer or sealed entry that scored the file.
    seq        INTEGER NOT NULL,
    -- Its digest as the entry records it, and its target.
    digest     TEXT    NOT NULL,
    target     TEXT    NOT NULL,
    -- The entry's time, RFC 3339 UTC: the file is dropped once older than the retention.
    at         TEXT    NOT NULL,
    -- holdout-ledger-kept/1, deflate-compressed (see audit::kept).
    data       BLOB    NOT NULL,
    PRIMARY KEY (holdout_id, seq)
) STRICT;
