-- holdout-ledger schema: withdrawn holdouts.
--
-- A holdout that released nothing can be withdrawn by its custodian and its organizer (the
-- ledger records the request and the withdrawal). It is then closed, `withdrawn_at` is set, and
-- its `labels_digest` is renamed `withdrawn:ID:DIGEST` so that the same labels can be sealed
-- again; the overlap check skips the row ids of withdrawn holdouts.
ALTER TABLE holdouts ADD COLUMN withdrawn_at TEXT;
-- A withdrawal request waiting for the other role, in words, for listings (the ledger's
-- `withdraw-request` entry is what the withdrawal itself checks).
ALTER TABLE holdouts ADD COLUMN withdraw_request TEXT;
