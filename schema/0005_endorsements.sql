-- sluice lineage database, schema version 5.
--
-- Sign-offs (endorsements): a person's signature, with a stated meaning, over a version, a
-- written report or the audit head, and the signed changes to the list of keys the store
-- trusts. Each row keeps the exact statement that was signed and its signature in the OpenSSH
-- signature format (PROTOCOL.sshsig, Ed25519), so that any implementation of that format can
-- check it. The trusted keys are not a table of their own: they are what the `admission` and
-- `retirement` rows, read in order, leave (see src/endorse.rs). Rows are only ever added.

CREATE TABLE endorsements (
    id          INTEGER PRIMARY KEY,
    -- 'version', 'report', 'audit_head' (a sign-off), 'admission' or 'retirement' (a change to
    -- the trusted keys).
    kind        TEXT NOT NULL CHECK (kind IN ('version', 'report', 'audit_head', 'admission', 'retirement')),
    -- What was signed: a version's or report's BLAKE3 hash, the audit entry's hash, or the
    -- fingerprint of the key admitted or retired.
    subject     TEXT NOT NULL,
    -- How people name it: NAME:vN, the report's file name, the audit entry's number, the name
    -- a key is admitted under.
    label       TEXT NOT NULL,
    -- prepared, reviewed, approved or a meaning the store declares; 'admitted' or 'retired'.
    meaning     TEXT NOT NULL,
    -- The signer's printed name, as their key was admitted.
    name        TEXT NOT NULL,
    -- RFC 3339 UTC.
    signed_at   TEXT NOT NULL,
    -- The signing key: its SHA-256 fingerprint (SHA256:...) and OpenSSH public key line.
    fingerprint TEXT NOT NULL,
    public_key  TEXT NOT NULL,
    -- For an admission: the OpenSSH public key line of the key admitted.
    admitted_key TEXT,
    -- The exact UTF-8 text that was signed, and the armored signature over it.
    statement   TEXT NOT NULL,
    signature   TEXT NOT NULL
) STRICT;

-- Meanings a store declares beside the built-in prepared, reviewed and approved.
CREATE TABLE meanings (
    id          INTEGER PRIMARY KEY,
    word        TEXT NOT NULL UNIQUE,
    description TEXT NOT NULL,
    declared_at TEXT NOT NULL
) STRICT;
