-- Salted cell commitments (DEVELOPERS.md, "Cell commitments"): per version, the root of the
-- hash tree over its cells and the seeds its cells' salts are derived from. An erasure
-- punctures `salts` (the erased cells' salts can no longer be derived) and re-commits to the
-- row in its own audit entry.
CREATE TABLE cell_commitments (
    version_id  INTEGER PRIMARY KEY REFERENCES versions(id),
    -- 64 hex digits: the root bound to the header, the shape and the tree.
    root        TEXT NOT NULL CHECK (length(root) = 64),
    -- The salt tree's kept nodes: per node u32 depth, u64 index, 32-byte seed (little-endian).
    salts       BLOB NOT NULL,
    -- 'recorded' with the version, or 'first_needed' (made later from bytes re-hashed to the
    -- version's recorded hash at that moment).
    made        TEXT NOT NULL CHECK (made IN ('recorded', 'first_needed')),
    made_at     TEXT NOT NULL
) STRICT;
