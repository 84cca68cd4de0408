-- holdout-ledger schema, version 2: the daemon's own Ed25519 key for signed checkpoints.
--
-- One row, created on first use from operating-system randomness. It lives in the database,
-- which is already kept readable by its owner only (it holds the labels in clear), so the key
-- is exactly as protected as the labels and travels with the ledger it signs. Checkpoints
-- shipped elsewhere stay valid evidence even if the key later leaks: a rebuilt chain cannot
-- match a head hash that was signed and kept before.
CREATE TABLE signing_key (
    id          INTEGER PRIMARY KEY CHECK (id = 1),
    secret_hex  TEXT    NOT NULL,
    public_hex  TEXT    NOT NULL,
    created_at  TEXT    NOT NULL
) STRICT;
