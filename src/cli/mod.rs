//! The command line: argument definitions ([`args`]), a short dispatcher (this file) into one
//! module per command family, and what those families share ([`Context`], writing files the
//! user named). This is the only place that prints, reads the environment or picks exit codes.
//!
//! `--json` has one convention: what is printed is a typed record serialised with serde, the
//! engine's own type where it is one (`Trail`, `VerifyReport`, ...), else a view struct of the
//! family module that borrows the engine's values; never a value built by hand.

pub mod admin;
pub mod args;
pub mod compare;
pub mod document;
pub mod endorse;
pub mod erase;
pub mod query;
pub mod record;
pub mod reproduce;
pub mod shared;
pub mod shell;
pub mod storage;
pub mod term;
pub mod text;

use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{anyhow, Context as _};

use args::{Cli, Command};
use sluice::model::{Agent, Storage};
use sluice::store::Store;

/// What a command asks the process to exit with.
pub type ExitCode = i32;

/// What every command may need: the parsed global options and the working directory.
pub struct Context<'a> {
    pub cli: &'a Cli,
    pub cwd: PathBuf,
}

impl Context<'_> {
    pub fn open_store(&self) -> anyhow::Result<Store> {
        Ok(Store::discover(self.cli.store.as_deref(), &self.cwd)?)
    }

    /// The project folder a command that makes a store (`setup`, `demo`, `borrow`) makes it
    /// in: the folder given (shown to the user as `given_as`), else the one `--store` (or
    /// SLUICE_STORE) names, as a project folder or its `sluice-store` folder, else `default`.
    /// A folder given beside a different `--store` flag is refused rather than one of them
    /// silently ignored; SLUICE_STORE set in the environment gives way to the folder given.
    pub fn new_store_folder(
        &self,
        given: Option<&Path>,
        given_as: &str,
        default: impl FnOnce() -> PathBuf,
    ) -> anyhow::Result<PathBuf> {
        let project_of = |p: &Path| {
            if p.file_name().is_some_and(|n| n == sluice::store::STORE_DIR) {
                p.parent()
                    .filter(|parent| !parent.as_os_str().is_empty())
                    .map_or_else(|| PathBuf::from("."), Path::to_path_buf)
            } else {
                p.to_path_buf()
            }
        };
        let store = self.cli.store.as_deref();
        let flag =
            store.filter(|s| std::env::var_os("SLUICE_STORE").as_deref() != Some(s.as_os_str()));
        match (given, flag, store) {
            (Some(d), Some(s), _) if project_of(s) != d => Err(sluice::Error::usage(format!(
                "two folders to make the store in: {given_as} {} and --store {}; give one of them",
                d.display(),
                s.display()
            ))
            .into()),
            (Some(d), _, _) => Ok(d.to_path_buf()),
            (None, _, Some(s)) => Ok(project_of(s)),
            (None, _, None) => Ok(default()),
        }
    }

    /// Who is acting, in the order `agent` documents; `store` gives the store's setting.
    pub fn agent(&self, store: Option<&Store>) -> anyhow::Result<Agent> {
        let env = |k: &str| std::env::var(k).ok();
        let env_name = env("SLUICE_PERSON");
        let env_email = env("SLUICE_EMAIL");
        let os_user = ["USER", "LOGNAME", "USERNAME"]
            .iter()
            .find_map(|k| env(k).filter(|v| !v.is_empty()))
            .or_else(account_name);
        let setting = match store {
            Some(s) => sluice::agent::store_setting(s)?,
            None => None,
        };
        Ok(sluice::agent::resolve(&sluice::agent::Sources {
            option_name: self.cli.person.as_deref(),
            option_email: self.cli.email.as_deref(),
            env_name: env_name.as_deref(),
            env_email: env_email.as_deref(),
            store: setting,
            os_user: os_user.as_deref(),
        })?)
    }

    /// Whether standard output is coloured.
    pub fn colour(&self) -> bool {
        term::colour_stdout(self.cli.color)
    }
}

/// In debug builds only (the crash tests' binary): `SLUICE_TEST_IO_POINT=stop:N` ends the
/// process at the Nth I/O point of its object writes as a kill would, `fail:N` makes that
/// point fail (`store::objects::Countdown`); `stop:N:NAME` and `fail:N:NAME` count only the
/// points of that name (`upload`: each request sending an object's bytes to a bucket).
fn install_test_countdown() {
    if !cfg!(debug_assertions) {
        return;
    }
    let Ok(v) = std::env::var("SLUICE_TEST_IO_POINT") else {
        return;
    };
    let Some((mode, n)) = v.split_once(':') else {
        return;
    };
    let (n, only) = match n.split_once(':') {
        Some((n, what)) => (n, Some(what)),
        None => (n, None),
    };
    if let Ok(n) = n.parse::<u64>() {
        use sluice::store::objects::Countdown;
        let c = match only {
            Some(what) => Countdown::of(n, mode == "stop", what),
            None => Countdown::new(n, mode == "stop"),
        };
        sluice::store::objects::install_countdown(std::sync::Arc::new(c));
    }
}

/// Hands the PostgreSQL client what PostgreSQL's own programs read from the environment (a
/// shared store's lineage server): `PGPASSWORD`, the password file (`PGPASSFILE`, else
/// `~/.pgpass`), the connection service file (`PGSERVICEFILE`, else `~/.pg_service.conf`) and
/// the role to log in as when the connection string names none (`PGUSER`, else the
/// operating-system user).
fn install_server_client_env() {
    let env = |k: &str| std::env::var(k).ok().filter(|v| !v.is_empty());
    let passfile = env("PGPASSFILE")
        .map(PathBuf::from)
        .or_else(|| env("HOME").map(|h| PathBuf::from(h).join(".pgpass")));
    let service_file = env("PGSERVICEFILE")
        .map(PathBuf::from)
        .or_else(|| env("HOME").map(|h| PathBuf::from(h).join(".pg_service.conf")));
    sluice::store::pg::use_client_env(sluice::store::pg::ClientEnv {
        password: env("PGPASSWORD"),
        passfile,
        user: env("PGUSER")
            .or_else(|| env("USER"))
            .or_else(|| env("LOGNAME")),
        service_file,
    });
}

/// Who sluice acts as towards a bucket: `AWS_ACCESS_KEY_ID`, `AWS_SECRET_ACCESS_KEY` and
/// `AWS_SESSION_TOKEN`, else the profile `AWS_PROFILE` (or `default`) of the AWS credentials file
/// (`AWS_SHARED_CREDENTIALS_FILE`, or `~/.aws/credentials`); the region from `AWS_REGION` or
/// `AWS_DEFAULT_REGION`. Never stored in the store.
fn install_bucket_access() {
    let env = |k: &str| std::env::var(k).ok().filter(|v| !v.is_empty());
    let mut access = sluice::store::bucket::Access {
        key: env("AWS_ACCESS_KEY_ID"),
        secret: env("AWS_SECRET_ACCESS_KEY"),
        token: env("AWS_SESSION_TOKEN"),
        region: env("AWS_REGION").or_else(|| env("AWS_DEFAULT_REGION")),
    };
    if access.key.is_none() {
        let file = env("AWS_SHARED_CREDENTIALS_FILE")
            .map(PathBuf::from)
            .or_else(|| env("HOME").map(|h| Path::new(&h).join(".aws").join("credentials")));
        let profile = env("AWS_PROFILE").unwrap_or_else(|| "default".to_string());
        if let Some(text) = file.and_then(|f| std::fs::read_to_string(f).ok()) {
            let mut inside = false;
            for line in text.lines().map(str::trim) {
                if let Some(name) = line.strip_prefix('[').and_then(|l| l.strip_suffix(']')) {
                    inside = name.trim() == profile;
                } else if let (true, Some((k, v))) = (inside, line.split_once('=')) {
                    let v = Some(v.trim().to_string());
                    match k.trim() {
                        "aws_access_key_id" => access.key = v,
                        "aws_secret_access_key" => access.secret = v,
                        "aws_session_token" => access.token = v,
                        _ => {}
                    }
                }
            }
        }
    }
    sluice::store::bucket::install_access(access);
}

/// Runs a parsed command line; returns the exit code.
pub fn run(cli: Cli) -> anyhow::Result<ExitCode> {
    install_test_countdown();
    install_server_client_env();
    install_bucket_access();
    let cwd = std::env::current_dir().context("cannot read the working directory")?;
    let ctx = Context { cli: &cli, cwd };
    if let Some(mib) = cli.max_record_mib {
        sluice::table::stream::set_max_record_bytes(mib << 20);
    }
    let stdout = std::io::stdout();
    let out = &mut stdout.lock();
    match &cli.command {
        Command::Setup {
            dir,
            lineage_server,
            object_bucket,
        } => record::setup(
            &ctx,
            dir.as_deref(),
            lineage_server.as_deref(),
            object_bucket.as_deref(),
            out,
        ),
        Command::Receive(a) => record::receive(&ctx, a, out),
        Command::Clean(a) => record::clean(&ctx, a, out),
        Command::Inspect {
            reference,
            rules,
            json,
        } => record::inspect(&ctx, reference, rules, *json, out),
        Command::Run { plan, inputs, json } => record::run(&ctx, plan, inputs, *json, out),
        Command::Capture(a) => record::capture(&ctx, a, out),
        Command::Export {
            reference,
            format,
            output,
        } => document::export(&ctx, reference, *format, output.as_deref(), out),
        Command::Report(a) => document::report(&ctx, a, out),
        Command::Identify { file, json } => document::identify(&ctx, file, *json, out),
        Command::Trace {
            reference,
            row,
            key,
            column,
            json,
        } => query::trace(&ctx, reference, *row, key, column, *json, out),
        Command::Explain {
            reference,
            row,
            key,
            column,
            limit,
            json,
        } => query::explain(&ctx, reference, *row, key, column, *limit, *json, out),
        Command::Impact { reference, json } => query::impact(&ctx, reference, *json, out),
        Command::Lineage {
            reference,
            format,
            output,
        } => query::lineage(&ctx, reference.as_deref(), *format, output.as_deref(), out),
        Command::Timeline(a) => query::timeline(&ctx, a, out),
        Command::About { reference, json } => query::about(&ctx, reference, *json, out),
        Command::Retrieve {
            reference,
            output,
            format,
            column_type,
            deliver,
        } => query::retrieve(
            &ctx,
            query::Retrieval {
                reference,
                output: output.as_deref(),
                format: *format,
                column_types: column_type,
                deliver: deliver.as_deref(),
            },
            out,
        ),
        Command::Verify {
            json,
            deep,
            endorsement,
        } => query::verify(&ctx, *deep, endorsement, *json, out),
        Command::Reclaim { json } => admin::reclaim(&ctx, *json, out),
        Command::Publish {
            to,
            lineage_server,
            object_bucket,
            json,
        } => shared::publish(
            &ctx,
            to,
            lineage_server.as_deref(),
            object_bucket.as_deref(),
            *json,
            out,
        ),
        Command::Borrow {
            from,
            into,
            dataset,
            json,
        } => shared::borrow(&ctx, from, into.as_deref(), dataset, *json, out),
        Command::Roles {
            set_up,
            give,
            to,
            of,
            bucket_policy,
            bucket_principal,
        } => shared::roles(
            &ctx,
            &shared::RolesAsked {
                set_up: *set_up,
                give: give.as_deref(),
                to: to.as_deref(),
                of: of.as_deref(),
                bucket_policy: bucket_policy.as_deref(),
                bucket_principals: bucket_principal,
            },
            out,
        ),
        Command::Retain { references, json } => {
            storage::retain(&ctx, references, Storage::Kept, *json, out)
        }
        Command::Recompute { references, json } => {
            storage::retain(&ctx, references, Storage::Stored, *json, out)
        }
        Command::Evict {
            references,
            all,
            json,
        } => storage::evict(&ctx, references, *all, *json, out),
        Command::Compare(a) => compare::compare(&ctx, a, out),
        Command::Reproduce {
            reference,
            allow_exec,
            json,
        } => reproduce::reproduce(&ctx, reference, *allow_exec, *json, out),
        Command::Rerun {
            reference,
            with,
            why,
            json,
        } => reproduce::rerun(&ctx, reference, with, why.as_deref(), *json, out),
        Command::Withdraw {
            reference,
            why,
            accept_conflicts,
            json,
        } => reproduce::withdraw(&ctx, reference, why, *accept_conflicts, *json, out),
        Command::Demo {
            dir,
            lineage_server,
            object_bucket,
        } => admin::demo(
            &ctx,
            dir.as_deref(),
            lineage_server.as_deref(),
            object_bucket.as_deref(),
            out,
        ),
        Command::Transfer {
            to_bucket,
            to_folder: _,
            json,
        } => admin::transfer(&ctx, to_bucket.as_deref(), *json, out),
        Command::Completions { shell } => admin::completions(*shell, out),
        Command::Manual { dir } => admin::manual(dir.as_deref(), out),
        Command::Upgrade { file, output } => admin::upgrade(file, output.as_deref(), out),
        Command::Endorse(a) => endorse::endorse(&ctx, a, out),
        Command::Erase(a) => erase::erase(&ctx, a, out),
        Command::Signatories(a) => endorse::signatories(&ctx, a, out),
        Command::Meanings {
            declare,
            says,
            json,
        } => endorse::meanings(&ctx, declare.as_deref(), says.as_deref(), *json, out),
        Command::Identity { name, email, json } => {
            admin::identity(&ctx, name.as_deref(), email.as_deref(), *json, out)
        }
    }
}

/// Reads a file the user named (a plan, a rules file); a failure names the file, says what is
/// wrong in the engine's words (no such file, permission denied) and where the format is. At
/// most `max_bytes` are read: a larger file is refused before more of it is held in memory.
pub fn read_text(
    path: &Path,
    what: &str,
    format_help: &str,
    max_bytes: usize,
) -> anyhow::Result<String> {
    use std::io::Read;
    let refused = |detail: String| {
        anyhow!(sluice::Error::usage(format!(
            "cannot read {what}: {detail} (its format: `{format_help}`)"
        )))
    };
    let io = |e: std::io::Error| refused(sluice::Error::io(path, e).to_string());
    let file = std::fs::File::open(path).map_err(io)?;
    let mut bytes = Vec::new();
    file.take(max_bytes as u64 + 1)
        .read_to_end(&mut bytes)
        .map_err(io)?;
    if bytes.len() > max_bytes {
        return Err(anyhow!(sluice::Error::usage(format!(
            "{}: {what} is more than the {} MiB it may be; split it into several files",
            path.display(),
            max_bytes >> 20
        ))));
    }
    String::from_utf8(bytes).map_err(|_| refused(format!("{}: not UTF-8 text", path.display())))
}

/// Writes through a temporary file beside `path` and renames it into place only when `fill`
/// succeeds, so a failed `retrieve -o` never leaves a partial file under the requested name.
/// An existing pipe or device is written into directly.
pub fn write_file_atomically(
    path: &Path,
    fill: impl FnOnce(&mut OutFile) -> anyhow::Result<()>,
) -> anyhow::Result<()> {
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = path
        .file_name()
        .ok_or_else(|| anyhow!("{}: not a file name", path.display()))?;
    folder_exists(path, dir)?;
    // A pipe or a device (`/dev/null`, `/dev/stdout`, a named pipe) is written into: renaming a
    // file over it would replace the device itself with a regular file.
    if std::fs::metadata(path).is_ok_and(|m| !m.is_file() && !m.is_dir()) {
        let f = std::fs::OpenOptions::new()
            .write(true)
            .open(path)
            .with_context(|| format!("cannot write {}", path.display()))?;
        return fill(&mut OutFile::new(f, false));
    }
    let tmp = dir.join(format!(".{}.sluice-part", name.to_string_lossy()));
    let f =
        std::fs::File::create(&tmp).with_context(|| format!("cannot write {}", path.display()))?;
    let mut f = OutFile::new(f, true);
    let result = fill(&mut f).and_then(|_| f.finish().map_err(Into::into));
    if let Err(e) = result {
        let _ = std::fs::remove_file(&tmp);
        return Err(e);
    }
    std::fs::rename(&tmp, path).with_context(|| format!("cannot write {}", path.display()))?;
    // The new name is synced too, as the store syncs its own folders after publishing. Best
    // effort: the file is whole and in place either way, and some file systems refuse to open
    // or sync a folder.
    if let Ok(folder) = std::fs::File::open(dir) {
        let _ = folder.sync_all();
    }
    Ok(())
}

/// How many bytes [`OutFile`] writes between two syncs on its helper thread.
const SYNC_EVERY: u64 = 8 << 20;

/// A file [`write_file_atomically`] fills. When it is to be synced before it is renamed into
/// place, what was written is handed to the disk as the writing goes on: every [`SYNC_EVERY`]
/// bytes a thread of its own syncs the file, so the last sync waits for the last stretch only
/// (a 106 MB `retrieve -o` spent 45 ms of its 120 ms in a sync at the end).
pub struct OutFile {
    file: std::fs::File,
    unsynced: u64,
    /// Whether the file is synced at all (not a device or a pipe).
    synced: bool,
    syncer: Option<(
        std::sync::mpsc::SyncSender<()>,
        std::thread::JoinHandle<std::io::Result<()>>,
    )>,
}

impl OutFile {
    fn new(file: std::fs::File, synced: bool) -> Self {
        OutFile {
            file,
            unsynced: 0,
            synced,
            syncer: None,
        }
    }

    /// Asks the syncing thread (started the first time) to sync what is written so far, unless
    /// it is still busy with the last request.
    fn sync_behind(&mut self) -> std::io::Result<()> {
        if self.syncer.is_none() {
            let file = self.file.try_clone()?;
            let (tx, rx) = std::sync::mpsc::sync_channel::<()>(1);
            let handle = std::thread::Builder::new()
                .name("sluice-sync".into())
                .spawn(move || {
                    for () in rx {
                        file.sync_data()?;
                    }
                    Ok(())
                })?;
            self.syncer = Some((tx, handle));
        }
        if let Some((tx, _)) = &self.syncer {
            // Full: a sync is already waiting, which will cover these bytes too. Gone: the
            // thread stopped on an error, which `finish` reports.
            let _ = tx.try_send(());
        }
        Ok(())
    }

    /// Waits for the syncing thread and syncs the whole file; an error of either is returned.
    fn finish(mut self) -> std::io::Result<()> {
        if let Some((tx, handle)) = self.syncer.take() {
            drop(tx);
            handle
                .join()
                .map_err(|_| std::io::Error::other("the thread syncing the output stopped"))??;
        }
        self.file.sync_all()
    }
}

impl Write for OutFile {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let n = self.file.write(buf)?;
        self.unsynced += n as u64;
        if self.synced && self.unsynced >= SYNC_EVERY {
            self.unsynced = 0;
            self.sync_behind()?;
        }
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.file.flush()
    }
}

/// The folder a file the user named goes into must exist; the message names that folder, not
/// the temporary file written beside the target.
pub fn folder_exists(path: &Path, dir: &Path) -> anyhow::Result<()> {
    if dir.is_dir() {
        return Ok(());
    }
    Err(anyhow!(sluice::Error::usage(format!(
        "cannot write {}: the folder {} does not exist; create it first or give another path",
        path.display(),
        dir.display()
    ))))
}

/// Writes `text` to `output`, or to standard output when no file is named.
pub fn write_text_to(
    output: Option<&Path>,
    text: &str,
    out: &mut impl Write,
) -> anyhow::Result<bool> {
    match output {
        None => {
            out.write_all(text.as_bytes())?;
            Ok(false)
        }
        Some(path) => {
            write_file_atomically(path, |f| Ok(f.write_all(text.as_bytes())?))?;
            Ok(true)
        }
    }
}

/// The name of the account this process runs as, from the system's account list, for when the
/// environment names no user (services, containers, `env -i`): the owner of `/proc/self` is the
/// process's user on Linux, and `/etc/passwd` maps that number to a name (common practice:
/// passwd(5)). Elsewhere, or if either cannot be read, no name.
fn account_name() -> Option<String> {
    use std::os::unix::fs::MetadataExt;
    let uid = std::fs::metadata("/proc/self").ok()?.uid();
    let list = std::fs::read_to_string("/etc/passwd").ok()?;
    list.lines().find_map(|line| {
        let mut fields = line.split(':');
        let name = fields.next()?;
        let _password = fields.next()?;
        let id: u32 = fields.next()?.parse().ok()?;
        (id == uid && !name.is_empty()).then(|| name.to_string())
    })
}
