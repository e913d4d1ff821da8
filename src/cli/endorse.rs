//! `endorse`, `signatories`, `meanings`: sign-offs and the keys and meanings they use, their
//! screens and `--json` records. The passphrase of a protected key is read here, from
//! `SLUICE_KEY_PASSPHRASE`, and handed to the engine; the engine reads no environment.

use std::io::Write;
use std::path::Path;

use serde::Serialize;

use super::args::{EndorseArgs, SignatoriesArgs};
use super::text::json;
use super::{read_text, write_file_atomically, Context, ExitCode};
use sluice::endorse::{self, SignOff, Signatory, Target};
use sluice::model::{short_hash, Endorsement, Meaning};

/// The environment variable a protected key's passphrase is read from.
const PASSPHRASE_ENV: &str = "SLUICE_KEY_PASSPHRASE";

fn signing_key(path: &Path) -> anyhow::Result<endorse::SigningKey> {
    let passphrase = std::env::var(PASSPHRASE_ENV).ok();
    Ok(endorse::load_key(path, passphrase.as_deref())?)
}

#[derive(Serialize)]
struct EndorseJson<'a> {
    #[serde(flatten)]
    endorsement: &'a Endorsement,
    /// The file the endorsement was also written to (`-o`).
    written_to: Option<String>,
}

pub fn endorse(
    ctx: &Context<'_>,
    a: &EndorseArgs,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let key = signing_key(&a.signing_key)?;
    let report_bytes;
    let target = if let Some(file) = &a.report {
        report_bytes = std::fs::read(file).map_err(|e| sluice::Error::io(file, e))?;
        Target::Report(&report_bytes)
    } else if a.audit_head {
        Target::AuditHead
    } else {
        Target::Version(a.reference.as_deref().unwrap_or_default())
    };
    if let Some(path) = &a.output {
        // Refuse a folder that does not exist before anything is recorded.
        let dir = path
            .parent()
            .filter(|p| !p.as_os_str().is_empty())
            .unwrap_or(Path::new("."));
        super::folder_exists(path, dir)?;
    }
    let e = endorse::endorse(&mut store, target, &a.meaning, &key, &agent)?;
    if let Some(path) = &a.output {
        let text = endorse::as_file(&e);
        write_file_atomically(path, |f| Ok(f.write_all(text.as_bytes())?))?;
    }
    if a.json {
        json(
            out,
            &EndorseJson {
                endorsement: &e,
                written_to: a.output.as_ref().map(|p| p.display().to_string()),
            },
        )?;
        return Ok(0);
    }
    let what = match e.kind.as_str() {
        "audit_head" => format!("the audit head (entry {}, and all before it)", e.label),
        "report" => format!("the report {}", e.label),
        _ => e.label.clone(),
    };
    writeln!(
        out,
        "signed off {what} ({}) as {}: {}, key {}, at {}",
        short_hash(&e.subject),
        e.meaning,
        e.name,
        e.fingerprint,
        e.signed_at
    )?;
    if let Some(path) = &a.output {
        writeln!(
            out,
            "the endorsement is in {}; keep a copy outside the store",
            path.display()
        )?;
    }
    Ok(0)
}

#[derive(Serialize)]
struct SignatoriesJson<'a> {
    signatories: &'a [Signatory],
    /// The admission or retirement this run recorded.
    changed: Option<&'a Endorsement>,
}

pub fn signatories(
    ctx: &Context<'_>,
    a: &SignatoriesArgs,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let mut changed = None;
    if let (Some(file), Some(key_file)) = (&a.admit, &a.signing_key) {
        let agent = ctx.agent(Some(&store))?;
        let public = read_text(
            file,
            "the public key",
            "the .pub file of `ssh-keygen -t ed25519`",
            // A public key line is under a kilobyte; anything near this bound is not one.
            64 << 10,
        )?;
        let key = signing_key(key_file)?;
        let name = a.name.as_deref().unwrap_or_default();
        changed = Some(endorse::admit(&mut store, &public, name, &key, &agent)?);
    } else if let (Some(fp), Some(key_file)) = (&a.retire, &a.signing_key) {
        let agent = ctx.agent(Some(&store))?;
        let key = signing_key(key_file)?;
        changed = Some(endorse::retire(&mut store, fp, &key, &agent)?);
    }
    let list = endorse::signatories(&store)?;
    if a.json {
        json(
            out,
            &SignatoriesJson {
                signatories: &list,
                changed: changed.as_ref(),
            },
        )?;
        return Ok(0);
    }
    if let Some(c) = &changed {
        let done = if c.kind == "admission" {
            "admitted"
        } else {
            "retired"
        };
        writeln!(
            out,
            "{done} {} ({}), signed by {} ({})",
            c.label, c.subject, c.name, c.fingerprint
        )?;
    }
    if list.is_empty() {
        writeln!(
            out,
            "no signatories yet: the first key is admitted by its holder with `sluice signatories --admit FILE.pub --name NAME --signing-key FILE`"
        )?;
    }
    for s in &list {
        let by = if s.admitted_by == s.fingerprint {
            "by its own key".to_string()
        } else {
            format!("by {}", s.admitted_by)
        };
        write!(
            out,
            "{}  {}  admitted {} {by}",
            s.name, s.fingerprint, s.admitted_at
        )?;
        match &s.retired_at {
            Some(at) => writeln!(out, ", retired {at}")?,
            None => writeln!(out)?,
        }
    }
    Ok(0)
}

#[derive(Serialize)]
struct MeaningsJson<'a> {
    meanings: &'a [Meaning],
    /// The meaning this run declared.
    declared: Option<&'a Meaning>,
}

pub fn meanings(
    ctx: &Context<'_>,
    declare: Option<&str>,
    says: Option<&str>,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let mut declared = None;
    if let (Some(word), Some(text)) = (declare, says) {
        let agent = ctx.agent(Some(&store))?;
        declared = Some(endorse::declare_meaning(&mut store, word, text, &agent)?);
    }
    let list = endorse::meanings(&store)?;
    if as_json {
        json(
            out,
            &MeaningsJson {
                meanings: &list,
                declared: declared.as_ref(),
            },
        )?;
        return Ok(0);
    }
    if let Some(m) = &declared {
        writeln!(out, "declared the meaning {:?}", m.word)?;
    }
    let width = list
        .iter()
        .map(|m| m.word.chars().count())
        .max()
        .unwrap_or(0);
    for m in &list {
        let pad = width - m.word.chars().count();
        let when = match &m.declared_at {
            Some(at) => format!("declared {at}"),
            None => "built in".to_string(),
        };
        writeln!(
            out,
            "{}{}  {}  ({when})",
            m.word,
            " ".repeat(pad),
            m.description
        )?;
    }
    Ok(0)
}

/// The sign-off lines of a screen (`identify`): one per sign-off, or that there is none.
pub fn sign_off_lines(out: &mut impl Write, offs: &[SignOff]) -> std::io::Result<()> {
    if offs.is_empty() {
        return writeln!(out, "  signed off   no (unsigned)");
    }
    for s in offs {
        writeln!(
            out,
            "  signed off   {} · {} · {} · {} ({}; {})",
            s.meaning,
            s.name,
            s.at,
            s.fingerprint,
            s.label,
            s.status.describe()
        )?;
    }
    Ok(())
}
