-- holdout-ledger schema: holdout families (one total delta shared by row-disjoint holdouts).
--
-- A family's first member fixes its total failure probability; every member's own delta is its
-- share, and the daemon refuses a member whose share would make the shares sum past the total
-- (compared exactly, not in rounded floating point). Each member's genesis ledger entry also
-- records its family, share and total, so an audit of the members' exports can check the sum
-- without this table.
CREATE TABLE families (
    name        TEXT NOT NULL PRIMARY KEY,
    total_delta REAL NOT NULL CHECK (total_delta > 0 AND total_delta < 1),
    created_at  TEXT NOT NULL
) STRICT;

CREATE TABLE family_members (
    holdout_id INTEGER NOT NULL PRIMARY KEY REFERENCES holdouts (id),
    family     TEXT    NOT NULL REFERENCES families (name),
    share      REAL    NOT NULL CHECK (share > 0)
) STRICT;

CREATE INDEX family_members_family ON family_members (family);
