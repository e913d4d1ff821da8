//! The roles of a shared store, enforced by the PostgreSQL server rather than by sluice:
//! reading, recording, signing and administering, each a group role with grants on the
//! lineage tables (and row-level security on the sign-offs), so that a modified client can do
//! no more than its login's roles allow. Nobody gets UPDATE or DELETE on the audit log, and a
//! trigger (in the schema) refuses them and TRUNCATE even to the tables' owner. The objects'
//! half: the bucket policy (AWS policy language) that gives each role its S3 actions on the
//! store's objects and denies everyone their deletion.

use super::backend::{Kind, Value};
use super::Store;
use crate::error::{ErrorKind, Result};

/// The roles, as sluice names them and as the server knows them.
pub const ROLES: &[(&str, &str)] = &[
    ("reading", "sluice_reading"),
    ("recording", "sluice_recording"),
    ("signing", "sluice_signing"),
    ("administering", "sluice_administering"),
];

/// The grants, run by the tables' owner. Idempotent: a second run changes nothing.
const SET_UP: &str = r#"
DO $roles$
DECLARE r text;
BEGIN
    FOREACH r IN ARRAY ARRAY['sluice_reading', 'sluice_recording', 'sluice_signing', 'sluice_administering'] LOOP
        IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = r) THEN
            EXECUTE format('CREATE ROLE %I NOLOGIN', r);
        END IF;
    END LOOP;
    EXECUTE format('GRANT USAGE ON SCHEMA %I TO sluice_reading', current_schema());
    EXECUTE format('GRANT SELECT ON ALL TABLES IN SCHEMA %I TO sluice_reading', current_schema());
    EXECUTE format('GRANT USAGE ON ALL SEQUENCES IN SCHEMA %I TO sluice_recording, sluice_signing, sluice_administering', current_schema());
END
$roles$;

GRANT sluice_reading TO sluice_recording, sluice_signing, sluice_administering;

-- Recording: the rows of steps and versions, and the few columns a later step sets on an
-- earlier row (a withdrawal, a declared key, a version's storage).
GRANT INSERT ON objects, agents, datasets, steps, step_inputs, versions, column_profiles,
    row_runs, cell_changes, drops, column_sources, check_results, cell_notes, audit_log
    TO sluice_recording;
GRANT UPDATE (reverts_step) ON steps TO sluice_recording;
GRANT UPDATE (key_columns) ON datasets TO sluice_recording;
GRANT UPDATE (storage) ON versions TO sluice_recording;

-- Signing: sign-offs of versions, reports and the audit head.
GRANT INSERT ON endorsements, agents, audit_log TO sluice_signing;

-- Administering: the trusted keys (admissions and retirements) and the declared meanings.
GRANT INSERT ON endorsements, meanings, agents, audit_log TO sluice_administering;

-- Which sign-offs each may add: row-level security on endorsements.
ALTER TABLE endorsements ENABLE ROW LEVEL SECURITY;
DROP POLICY IF EXISTS endorsements_read ON endorsements;
DROP POLICY IF EXISTS endorsements_sign ON endorsements;
DROP POLICY IF EXISTS endorsements_keys ON endorsements;
CREATE POLICY endorsements_read ON endorsements FOR SELECT USING (true);
CREATE POLICY endorsements_sign ON endorsements FOR INSERT TO sluice_signing
    WITH CHECK (kind IN ('version', 'report', 'audit_head'));
CREATE POLICY endorsements_keys ON endorsements FOR INSERT TO sluice_administering
    WITH CHECK (kind IN ('admission', 'retirement'));

-- Nothing for anyone else.
REVOKE ALL ON ALL TABLES IN SCHEMA public FROM PUBLIC;
"#;

/// Gives a login one of the roles: the names are bound as values and quoted by the server.
const GIVE: &str = "DO $give$ BEGIN
    EXECUTE format('GRANT %I TO %I', current_setting('sluice.role'), current_setting('sluice.login'));
END $give$";

/// The server's name of one of sluice's roles.
pub fn server_role(role: &str) -> Result<&'static str> {
    ROLES
        .iter()
        .find(|(ours, _)| *ours == role)
        .map(|(_, theirs)| *theirs)
        .ok_or_else(|| {
            ErrorKind::Usage(format!(
                "no role {role:?}; the roles are reading, recording, signing and administering"
            ))
            .into()
        })
}

fn shared_only(store: &Store) -> Result<()> {
    if store.lineage.kind() != Kind::Postgres {
        return Err(ErrorKind::Usage(
            "roles are the server's: this store keeps its lineage in its folder (SQLite), where whoever can write the folder can do everything; set up a shared store with `sluice setup --lineage-server CONN`".into(),
        )
        .into());
    }
    Ok(())
}

/// Makes the roles and their grants on the store's server (as the tables' owner).
pub fn set_up(store: &Store) -> Result<()> {
    shared_only(store)?;
    store.lineage.run_script(SET_UP)
}

/// Gives the login `login` the role `role` (one of [`ROLES`]).
pub fn give(store: &Store, role: &str, login: &str) -> Result<()> {
    shared_only(store)?;
    let theirs = server_role(role)?;
    store.lineage.in_transaction(&|db| {
        db.query(
            "SELECT set_config('sluice.role', ?1, true), set_config('sluice.login', ?2, true)",
            &[Value::from(theirs), Value::from(login)],
        )?;
        db.execute(GIVE, &[])?;
        Ok(())
    })
}

/// The roles a login has, as sluice names them.
pub fn of(store: &Store, login: &str) -> Result<Vec<String>> {
    shared_only(store)?;
    let mut out = Vec::new();
    for (ours, theirs) in ROLES {
        let rows = store.lineage.query_raw(
            "SELECT CASE WHEN pg_has_role(?1::name, ?2::name, 'MEMBER') THEN 1 ELSE 0 END",
            &[Value::from(login), Value::from(*theirs)],
        )?;
        if rows.first().map_or(Ok(0), |r| r.int(0))? == 1 {
            out.push((*ours).to_string());
        }
    }
    Ok(out)
}

/// The S3 actions each role needs on the store's objects: reading only reads (every role
/// reads), recording also uploads (a multipart upload's parts and its abort included).
const READ_ACTIONS: &[&str] = &["s3:GetObject"];
const LIST_ACTIONS: &[&str] = &["s3:ListBucket"];
const RECORD_ACTIONS: &[&str] = &[
    "s3:PutObject",
    "s3:AbortMultipartUpload",
    "s3:ListMultipartUploadParts",
];
/// Denied to every principal on the store's objects, whatever else grants it.
const DELETE_ACTIONS: &[&str] = &["s3:DeleteObject", "s3:DeleteObjectVersion"];

/// The bucket policy (AWS policy language, version 2012-10-17) for the store whose objects are
/// at the bucket URL `url`: nobody may delete an object under the store's folder in the bucket
/// (an explicit deny, which no grant overrides); each principal named for a role may read the
/// objects and list the bucket; those named for recording may also upload; every other named
/// principal is explicitly denied uploads, so a key that the server's own user settings let
/// write still cannot write here. `principals` pairs a role (one of [`ROLES`]) with an AWS
/// principal: an ARN (`arn:aws:iam::ACCOUNT:user/NAME`) or an account id.
pub fn bucket_policy(url: &str, principals: &[(String, String)]) -> Result<serde_json::Value> {
    use serde_json::json;
    let place = super::bucket::Place::parse(url)
        .map_err(|e| crate::Error::from(ErrorKind::Usage(e.to_string())))?;
    for (role, who) in principals {
        server_role(role)?;
        let account = who.len() == 12 && who.bytes().all(|b| b.is_ascii_digit());
        if !(who.starts_with("arn:") || account) {
            return Err(ErrorKind::Usage(format!(
                "{who:?} is not an AWS principal; name it as an ARN (arn:aws:iam::ACCOUNT:user/NAME) or a 12-digit account id"
            ))
            .into());
        }
    }
    let named = |roles: &[&str]| -> Vec<&str> {
        let mut v: Vec<&str> = principals
            .iter()
            .filter(|(r, _)| roles.contains(&r.as_str()))
            .map(|(_, w)| w.as_str())
            .collect();
        v.sort_unstable();
        v.dedup();
        v
    };
    let everyone = named(&["reading", "recording", "signing", "administering"]);
    let recorders = named(&["recording"]);
    let not_recording: Vec<&str> = everyone
        .iter()
        .copied()
        .filter(|w| !recorders.contains(w))
        .collect();
    let bucket_arn = format!("arn:aws:s3:::{}", place.bucket_name());
    let objects_arn = format!("{bucket_arn}/{}*", place.prefix());
    let mut statements = vec![json!({
        "Sid": "SluiceObjectsAreNeverDeleted",
        "Effect": "Deny",
        "Principal": "*",
        "Action": DELETE_ACTIONS,
        "Resource": [objects_arn],
    })];
    if !everyone.is_empty() {
        statements.push(json!({
            "Sid": "SluiceEveryRoleReads",
            "Effect": "Allow",
            "Principal": { "AWS": everyone },
            "Action": READ_ACTIONS,
            "Resource": [objects_arn],
        }));
        statements.push(json!({
            "Sid": "SluiceEveryRoleLists",
            "Effect": "Allow",
            "Principal": { "AWS": everyone },
            "Action": LIST_ACTIONS,
            "Resource": [bucket_arn],
        }));
    }
    if !recorders.is_empty() {
        statements.push(json!({
            "Sid": "SluiceRecordingUploads",
            "Effect": "Allow",
            "Principal": { "AWS": recorders },
            "Action": RECORD_ACTIONS,
            "Resource": [objects_arn],
        }));
    }
    if !not_recording.is_empty() {
        statements.push(json!({
            "Sid": "SluiceOnlyRecordingUploads",
            "Effect": "Deny",
            "Principal": { "AWS": not_recording },
            "Action": RECORD_ACTIONS,
            "Resource": [objects_arn],
        }));
    }
    Ok(json!({ "Version": "2012-10-17", "Statement": statements }))
}
