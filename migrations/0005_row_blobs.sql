-- holdout-ledger schema: a holdout's rows as blobs.
--
-- A holdout's row ids, in its canonical order, as one blob of UTF-8 text (the ids one after
-- another) and one blob of each id's end offset in it (little-endian u32), so that a
-- ten-million-row holdout is two blobs read straight into memory instead of ten million rows
-- of `holdout_rows` (which keeps the ids of holdouts created before this version). That no id
-- belongs to two holdouts (DESIGN 4.2 rule 5) is checked at creation by merging the sorted ids
-- of every holdout with the new ones.
CREATE TABLE holdout_ids (
    holdout_id INTEGER NOT NULL PRIMARY KEY REFERENCES holdouts (id),
    row_count  INTEGER NOT NULL CHECK (row_count > 0),
    ids        BLOB    NOT NULL,
    ends       BLOB    NOT NULL
) STRICT;

-- How a target's sealed labels are encoded: 'json' (a JSON array of strings, every holdout
-- created before this version), 'u8' (one class index per row), 'u32le' (four bytes per class
-- index, for more than 256 classes) or 'lines' (each numeric label's text, trimmed, followed
-- by a newline). Rows are in the holdout's canonical order in every encoding.
ALTER TABLE sealed_labels ADD COLUMN encoding TEXT NOT NULL DEFAULT 'json';
