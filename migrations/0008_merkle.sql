-- holdout-ledger schema: the Merkle tree of every chain (RFC 9162 section 2.1), and each
-- chain's entry encoding.
--
-- `merkle_nodes` holds the hash of every perfect subtree of a chain's tree: level 0 is the
-- leaf hash of entry `idx`, level l + 1 node `idx` joins level l nodes 2 idx and 2 idx + 1.
-- `ledger::append` adds an entry's leaf and the subtrees it completes in the same transaction
-- as the entry, so a proof for any tree size reads O(log^2 n) rows and rehashes nothing.
-- After this script, the migration code (`ledger::merkle::build_all`) builds the trees of the
-- chains that exist, from their stored entry hashes, in the same transaction.
CREATE TABLE merkle_nodes (
    chain TEXT    NOT NULL,
    level INTEGER NOT NULL CHECK (level >= 0),
    idx   INTEGER NOT NULL CHECK (idx >= 0),
    hash  BLOB    NOT NULL CHECK (length(hash) = 32),
    PRIMARY KEY (chain, level, idx)
) STRICT, WITHOUT ROWID;

CREATE TRIGGER merkle_nodes_no_update BEFORE UPDATE ON merkle_nodes
BEGIN
    SELECT RAISE(ABORT, 'tree nodes are append-only');
END;

CREATE TRIGGER merkle_nodes_no_delete BEFORE DELETE ON merkle_nodes
BEGIN
    SELECT RAISE(ABORT, 'tree nodes are append-only');
END;

-- The entry encoding of each chain (`holdout-ledger-entry/1` or `/2`), fixed by its first
-- entry: chains that exist keep /1 (their hashes cannot change); chains started by this
-- version use /2 (RFC 8785 canonical JSON).
CREATE TABLE chain_encodings (
    chain    TEXT NOT NULL PRIMARY KEY,
    encoding TEXT NOT NULL
) STRICT;

INSERT INTO chain_encodings (chain, encoding)
    SELECT DISTINCT chain, 'holdout-ledger-entry/1' FROM ledger;

-- `rpc Prove` finds the entry a receipt names by its hash.
CREATE INDEX ledger_by_hash ON ledger (hash);
