-- holdout-ledger schema, version 1.
--
-- Holdouts and their sealed labels, the hash-chained ledger, users with hashed tokens, and
-- idempotency keys. Labels are stored in clear: keep the database file's permissions tight.

-- One sealed holdout. The policy and the targets are fixed at creation (DESIGN 4.2 rule 3).
CREATE TABLE holdouts (
    id            INTEGER PRIMARY KEY,
    name          TEXT    NOT NULL UNIQUE,
    description   TEXT    NOT NULL DEFAULT '',
    row_count     INTEGER NOT NULL CHECK (row_count > 0),
    policy_json   TEXT    NOT NULL,
    targets_json  TEXT    NOT NULL,
    labels_digest TEXT    NOT NULL UNIQUE,
    created_at    TEXT    NOT NULL,
    closed_at     TEXT
) STRICT;

-- Every row id of every holdout, once: a second holdout over the same rows is refused
-- (DESIGN 4.2 rule 5). `pos` is the row's position in the holdout's canonical order.
CREATE TABLE holdout_rows (
    row_id     TEXT    NOT NULL PRIMARY KEY,
    holdout_id INTEGER NOT NULL REFERENCES holdouts (id),
    pos        INTEGER NOT NULL,
    UNIQUE (holdout_id, pos)
) STRICT;

-- The sealed labels of one target, encoded as a JSON array of strings in row order. Never
-- returned by any call.
CREATE TABLE sealed_labels (
    holdout_id INTEGER NOT NULL REFERENCES holdouts (id),
    target     INTEGER NOT NULL,
    labels     BLOB    NOT NULL,
    PRIMARY KEY (holdout_id, target)
) STRICT;

-- The append-only ledger, one hash chain per holdout (`chain` is the holdout name) plus the
-- identity chain '@users'. Entries are never updated or deleted.
CREATE TABLE ledger (
    chain      TEXT    NOT NULL,
    seq        INTEGER NOT NULL CHECK (seq >= 0),
    kind       TEXT    NOT NULL,
    body       TEXT    NOT NULL,
    salt       TEXT    NOT NULL,
    prev_hash  TEXT    NOT NULL,
    hash       TEXT    NOT NULL,
    PRIMARY KEY (chain, seq)
) STRICT;

CREATE TRIGGER ledger_no_update BEFORE UPDATE ON ledger
BEGIN
    SELECT RAISE(ABORT, 'ledger entries are append-only');
END;

CREATE TRIGGER ledger_no_delete BEFORE DELETE ON ledger
BEGIN
    SELECT RAISE(ABORT, 'ledger entries are append-only');
END;

-- Users and their roles; analysts belong to a team, the accounting identity.
CREATE TABLE users (
    id         INTEGER PRIMARY KEY,
    name       TEXT    NOT NULL UNIQUE,
    roles      TEXT    NOT NULL,
    team       TEXT    NOT NULL,
    created_at TEXT    NOT NULL,
    revoked_at TEXT
) STRICT;

-- Bearer tokens, stored only as SHA-256 hashes.
CREATE TABLE tokens (
    token_hash TEXT    NOT NULL PRIMARY KEY,
    user_id    INTEGER NOT NULL REFERENCES users (id),
    created_at TEXT    NOT NULL,
    revoked_at TEXT
) STRICT;

-- Idempotency keys (DESIGN 4.2 rule 4): a request id is scoped to the team and tied to the
-- digest of the submission; `seq` is the ledger entry that answered it.
CREATE TABLE request_keys (
    holdout_id INTEGER NOT NULL REFERENCES holdouts (id),
    team       TEXT    NOT NULL,
    request_id TEXT    NOT NULL,
    digest     TEXT    NOT NULL,
    seq        INTEGER NOT NULL,
    PRIMARY KEY (holdout_id, team, request_id)
) STRICT;

-- Answered queries by digest, so an identical prediction vector is answered again from the
-- ledger at no charge. `scope` is '' under the shared assumption and the team under isolated
-- (another team's answer must not leak across transcripts).
CREATE TABLE answered_digests (
    holdout_id INTEGER NOT NULL REFERENCES holdouts (id),
    target     INTEGER NOT NULL,
    scope      TEXT    NOT NULL,
    digest     TEXT    NOT NULL,
    seq        INTEGER NOT NULL,
    PRIMARY KEY (holdout_id, target, scope, digest)
) STRICT;
