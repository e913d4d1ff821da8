//! sluice's benchmarks, run from one command:
//!
//! ```text
//! cargo build --release                      # the benchmarks run the real target/release/sluice
//! cargo run --release --example bench -- intake
//! cargo run --release --example bench        # every benchmark there is
//! cargo run --release --example bench -- intake --quick          # 100,000 rows only
//! cargo run --release --example bench -- ops                     # 1,000,000 rows
//! cargo run --release --example bench -- ops --quick
//! cargo run --release --example bench -- intake --rows 200000,2000000
//! cargo run --release --example bench -- trace                   # 100,000, 1,000,000 and 5,000,000 rows
//! cargo run --release --example bench -- trace --quick           # 100,000 rows
//! cargo run --release --example bench -- compare                 # 1,000,000 rows, two versions
//! cargo run --release --example bench -- reproduce --quick       # 100,000 rows
//! cargo run --release --example bench -- ops --rows 10000        # any size, to check it runs
//! cargo run --release --example bench -- shared --runs 1          # needs Debian's postgresql
//! ```
//!
//! # `shared`
//!
//! Recording throughput of a store whose lineage is on a PostgreSQL server against one whose
//! lineage is SQLite in its folder, in the same run. The benchmark starts a cluster of its own
//! from `/usr/lib/postgresql/*/bin` (as `nobody` when run as root) on loopback, with the
//! server's default durability, and stops it at the end. For 1, 4 and 8 concurrent writer
//! processes, 48 steps in all (each `sluice receive` of a new 200-row extract, one process per
//! step, half as further versions of one dataset all writers share, half into a dataset of each
//! writer's own) are recorded into a fresh SQLite store, then into a fresh store on the
//! server; steps per second are wall-clock steps over the whole batch, median of `--runs`.
//! Baseline: SQLite, the default backend, measured right before.
//!
//! # `bucket-trace`
//!
//! `cargo run --release --example bench -- bucket-trace [--rows N]` (1,000,000 rows by
//! default): the `trace` benchmark's history built twice, in a store with its objects in its
//! folder and in one with its objects in a bucket of a SeaweedFS server started on loopback by
//! `tests/reference/s3server.sh` (installed from PyPI the first time, stopped at the end), then
//! `sluice trace` of the same rows timed in three ways, in the same run: the local store (the
//! baseline), the bucket with a cold read cache (`sluice-store/cache/` removed before each run)
//! and with a warm one (after one untimed run). Each is a whole process; medians of 11 runs per
//! row. The ratios are bucket / local.
//!
//! # `trace`
//!
//! Measures `sluice trace` and `sluice explain` over a long history. At each size (100,000,
//! 1,000,000 and 5,000,000 rows of the Quillby work-order file by default) the benchmark writes
//! a plan and builds the history once with `sluice run` in a fresh store (set-up: not timed,
//! but its time is printed): the file taken in as `orders`, then twenty steps on it, each
//! recorded (trim with `inner`, case of email, status and service, two `replace`s on service
//! and parts_cost, `number` on parts_cost, `replace` and `fill` on labour_hours, `date` with
//! `"order": "mdy"`, `drop` of test orders, `dedupe` of whole rows, `keep` of amounts under
//! 1000, `rename` of notes, `extract` of the month from opened, `split` of customer, `combine`
//! of the two names, `extract` of a shop column that the Quillby order numbers never fill, and
//! `fill` that makes it the constant `Quillby`, `case` of customer), then `summarize` of
//! parts_cost and labour_hours by shop into `summary`: one group holding every row left (about
//! 95% of the file).
//!
//! Timed, each as a whole process, median of 21 runs at each of five rows spread evenly over
//! the latest version (first, quarter, middle, three quarters, last; the same at every run):
//! `sluice trace orders --row R --column parts_cost` (changed by trim, number and a replace,
//! traced back through all twenty steps to the raw line) and `--column month` (made by
//! `extract` from opened, which `date` rewrote). Then `sluice explain summary --row 1 --column
//! count` and `--column sum_parts_cost` (runs as for `intake`). Goals: a trace under 50 ms at
//! every size, the slowest size's trace no more than 1.5x the fastest's; an explanation of a
//! group of about a million rows under 2 s (judged where the group has at most 1,250,000 rows;
//! larger groups are printed with the time per million rows).
//!
//! How the lookups scale: per step a trail reads the step's row map and does a binary search
//! in its runs, then reads the cell by offset, through the row index's checkpoint before the
//! row and at most a stride of records after it; so a trail's cost is the number of steps times a lookup that does not depend
//! on the rows, plus reading each step's provenance object (which grows with what the step
//! changed). A key lookup (`--key`) and `explain` scan the version they start from, and
//! explain carries the group's rows back through every step, so both grow with the rows.
//!
//! # `ops`
//!
//! Measures a cleaning plan on the Quillby work-order file of 1,000,000 rows (the intake
//! benchmark's file) against the same cleaning written in pandas and in polars, on the same
//! file in the same run. The plan, written by the benchmark into its scratch folder, takes the
//! file in as `orders` and runs `trim` (every column), `case` (email, to lower case), `dedupe`
//! (whole rows, the first kept), `number` (parts_cost), `drop` (`status = 'cancelled'`) and
//! `summarize` (sum of parts_cost by technician, `as` totals). The Quillby export has no shop
//! column, so the totals are per technician rather than per shop. sluice's time is `sluice run
//! PLAN` in a fresh store (made by `sluice setup`, not timed) followed by `sluice retrieve orders -o
//! cleaned.csv`, since writing the cleaned CSV is part of the job; the run alone is shown too,
//! and the peak memory is the larger of the two processes'. The baselines are the scripts
//! `examples/bench_ops_pandas.py` (pandas: `read_csv(dtype=str, keep_default_na=False)`,
//! `str.strip`, `str.lower`, `drop_duplicates`, `to_numeric` after removing `€` and thousands
//! commas, a filter, `groupby(...).sum()`, `to_csv`) and `examples/bench_ops_polars.py` (the same
//! in polars, eager), each timed whole, interpreter start-up and imports included, with the
//! interpreter of the pinned reference environment (`python3 tests/reference/pyenv.py`).
//!
//! Checks, not timed: the three agree on the number of cleaned rows and, per technician, on the
//! row count and the sum (pandas and polars sum in floating point, so their sums are compared
//! with sluice's exact ones within 0.01); a disagreement is printed as a finding. The store's
//! footprint: the provenance stored for the run (how much `lineage.db` plus `lineage.db-wal`
//! grew over a fresh store's) and the bytes of the objects (every version's bytes, the raw copy
//! among them, and their row indexes), each as a percentage of the input file.
//!
//! Goals: sluice (run + retrieve, recording full provenance) at least 5x faster than pandas and no
//! slower than polars; peak memory under 1 GiB; provenance under 5% of the input. Timing as for
//! `intake`.
//!
//! # `compare` (also `diff`)
//!
//! Measures `sluice compare` of two versions of a Quillby work-order table made by
//! [`sluice::demo::revision_pair`] (deterministic; 1,000,000 rows by default, about 1% of the
//! rows changed in one or two cells, 0.5% removed and 0.5% inserted), both already in a store
//! (taken in before timing, once with `--key order_id` and once without): the full diff by key,
//! cell by cell, and the diff by order, each writing its text output to a file. In the same
//! run, on the same two files: GNU `diff`, `git diff --no-index --stat`, and the outer-merge
//! comparisons with pandas and polars (`tests/reference/diff_pandas.py`, `diff_polars.py`, run
//! by the interpreter of `tests/reference/pyenv.py`). Goals: the diff by key at least 2x faster
//! than GNU diff and 10x faster than pandas; the diff by order no slower than GNU diff. The
//! diff by key and GNU diff are timed in turn (one run of each, then again), as many runs of
//! each as the shorter needs, so that their ratio does not move with the machine's speed
//! between the two tools' runs. The
//! counts sluice reports are checked against what the generator says it changed. Files:
//! `target/bench-data/revision_N_{first,second}.csv`.
//!
//! # `intake`
//!
//! Measures `sluice receive` of a dirty work-order CSV (made by [`sluice::demo::work_orders`],
//! Quillby till, deterministic: 1,000,000 rows are about 104 MB, 5,000,000 rows about 523 MB)
//! into a fresh store: wall time, throughput (MB = 10^6 bytes per second) and the child
//! process's peak resident memory (`ru_maxrss` from `wait4`, with this process's own peak reset
//! before each spawn, which the child would otherwise inherit). Side by side, on the same file in
//! the same run, it measures the two baselines intake is judged against:
//!
//! - BLAKE3 alone, the floor any content-hashing intake pays: the file hashed by the `blake3`
//!   crate in a child process (this example run again with a hidden flag) with 1 MiB reads, on
//!   one thread and on two (the tree split with `blake3::hazmat`, no extra dependency); the time
//!   is the hashing alone, measured inside the child, so the baseline is as fast as it can be;
//! - `git add` of the file into a fresh repository, what people use today to version CSVs
//!   (git's own defaults: user and system configuration are not read).
//!
//! Goals: receive throughput >= 6x `git add` and >= 0.1x the faster BLAKE3
//! figure; sluice's peak memory under 64 MiB at every size. The page cache is warm (the file is
//! read once first) and dirty pages are flushed (`sync`) before every timed run; each time is
//! the median of 3 runs (`--runs N`; 9 for a tool whose first run takes under 0.5 s; 1 for one
//! whose first run takes over 30 s, and the table says so). Peak memory is the largest of the
//! runs. The table also gives each tool's CPU time and how much CPU the rest of the machine
//! used (from `/proc/stat`, before timing and during the runs): a warning says when the machine
//! was not quiet enough for the times to be trusted.
//!
//! Files: data in `target/bench-data/` (kept, and checked byte for byte against the generator
//! before reuse), scratch stores and repositories in `target/bench-tmp/` (removed after each
//! run), results in `target/bench-results/<benchmark>.json`.

use std::fs::{self, File};
use std::io::{self, BufWriter, Read, Write};
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant, SystemTime};

use anyhow::{anyhow, bail, ensure, Context, Result};
use clap::{Parser, ValueEnum};
use serde_json::{json, Value};

/// The size of every read, as in sluice's own streaming.
const PIECE: usize = 1 << 20;
/// The store folder in a project folder.
const STORE_DIR: &str = sluice::store::STORE_DIR;
/// A tool whose first run takes longer than this is run only once.
const LONG_RUN: Duration = Duration::from_secs(30);
/// A tool whose first run takes less than this is run at least [`SHORT_RUNS`] times.
const SHORT_RUN: Duration = Duration::from_millis(500);
const SHORT_RUNS: u32 = 9;
/// Other processes using more than this many cores make the times noisy (on 2 cores).
const NOISY_CORES: f64 = 0.2;
/// During a long run the tool's own writeback counts as "others": allow more.
const NOISY_CORES_DURING: f64 = 0.5;
/// The shortest window over which the machine's load is worth computing.
const MIN_LOAD_WINDOW: Duration = Duration::from_secs(1);
/// Who the benchmark's stores record as acting (`SLUICE_PERSON`, `SLUICE_EMAIL`).
const IDENTITY: [(&str, &str); 2] = [
    ("SLUICE_PERSON", "Bench Runner"),
    ("SLUICE_EMAIL", "bench@example.org"),
];
const DEFAULT_ROWS: &[u64] = &[1_000_000, 5_000_000];
const QUICK_ROWS: &[u64] = &[100_000];
const DIFF_ROWS: &[u64] = &[1_000_000];
const OPS_ROWS: &[u64] = &[1_000_000];

#[derive(Debug, Parser)]
#[command(
    name = "bench",
    about = "sluice's benchmarks: each measures the real release binary against today's baselines",
    after_help = "Run `cargo build --release` first. With no benchmark named, all of them run.\n\
                  Example: cargo run --release --example bench -- intake --quick"
)]
struct Cli {
    /// The benchmarks to run (default: all)
    #[arg(value_enum)]
    benches: Vec<Bench>,

    /// Row counts of the generated files, separated by commas [default: 1000000,5000000]
    #[arg(long, value_delimiter = ',', value_parser = parse_rows, value_name = "N[,N..]")]
    rows: Option<Vec<u64>>,

    /// Only 100,000 rows: a quick check that everything runs
    #[arg(long, conflicts_with = "rows")]
    quick: bool,

    /// Runs of each tool; the median is reported
    #[arg(long, default_value_t = 3, value_parser = clap::value_parser!(u32).range(1..=99))]
    runs: u32,

    /// Keep the scratch stores under target/bench-tmp/ (named by benchmark and size) for
    /// profiling by hand, instead of removing each when its benchmark ends
    #[arg(long)]
    keep_stores: bool,

    /// Internal: hash FILE with BLAKE3 on THREADS threads and print "SECONDS HEX"
    #[arg(long, hide = true, num_args = 2, value_names = ["FILE", "THREADS"])]
    hash_child: Option<Vec<String>>,
}

/// The benchmarks. A new one is a variant here and an arm in [`run_bench`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
enum Bench {
    /// `sluice receive` against BLAKE3 alone and `git add`
    Intake,
    /// `sluice compare` (by key and by order) against GNU diff, git diff, pandas and polars
    #[value(alias = "diff")]
    Compare,
    /// A cleaning plan (`sluice run` + `sluice retrieve`) against the same cleaning in pandas and polars
    Ops,
    /// `sluice trace` and `sluice explain` over a history of 20 steps, at three sizes
    Trace,
    /// `sluice reproduce` of the ops benchmark's plan against a plain `sluice run` of it
    #[value(alias = "replay")]
    Reproduce,
    /// Salted cell commitments of a version's cells (what an erasure's proof needs) against
    /// `sluice receive` of the same file and against reading its cells alone
    Commit,
    /// Recording throughput with 1, 4 and 8 concurrent writers, lineage on a PostgreSQL server
    /// (started here from Debian's postgresql) against SQLite in the store folder
    Shared,
    /// `sluice trace` with the objects in a bucket (a local S3-compatible server), with a cold
    /// and a warm read cache, against the same store with its objects in its folder
    BucketTrace,
}

impl Bench {
    fn name(self) -> &'static str {
        match self {
            Bench::Intake => "intake",
            Bench::Compare => "compare",
            Bench::Ops => "ops",
            Bench::Trace => "trace",
            Bench::Reproduce => "reproduce",
            Bench::Commit => "commit",
            Bench::Shared => "shared",
            Bench::BucketTrace => "bucket-trace",
        }
    }

    /// The sizes the benchmark runs at when neither `--rows` nor `--quick` is given.
    fn default_rows(self) -> &'static [u64] {
        match self {
            Bench::Intake => DEFAULT_ROWS,
            Bench::Compare => DIFF_ROWS,
            Bench::Ops => OPS_ROWS,
            Bench::Trace => TRACE_ROWS,
            Bench::Reproduce => OPS_ROWS,
            Bench::Commit => &[1_000_000],
            Bench::Shared => &[SHARED_ROWS],
            Bench::BucketTrace => &[1_000_000],
        }
    }
}

fn parse_rows(s: &str) -> std::result::Result<u64, String> {
    let n: u64 = s
        .trim()
        .replace('_', "")
        .parse()
        .map_err(|_| format!("\"{s}\" is not a row count (e.g. 1000000)"))?;
    if n == 0 {
        return Err("a row count must be at least 1".into());
    }
    Ok(n)
}

/// Where things are and how to run.
struct Ctx {
    sluice: PathBuf,
    data_dir: PathBuf,
    tmp_dir: PathBuf,
    results_dir: PathBuf,
    /// The sizes asked for (`--rows` or `--quick`); `None`: each benchmark's default.
    rows: Option<Vec<u64>>,
    runs: u32,
    bench_exe: PathBuf,
    /// `--keep-stores`: scratch folders stay after their benchmark.
    keep_stores: bool,
}

fn main() {
    if let Err(e) = run(Cli::parse()) {
        eprintln!("error: {e:#}");
        std::process::exit(2);
    }
}

fn run(cli: Cli) -> Result<()> {
    if let Some(args) = &cli.hash_child {
        return hash_child(args);
    }
    let ctx = context(&cli)?;
    let benches = if cli.benches.is_empty() {
        Bench::value_variants().to_vec()
    } else {
        cli.benches.clone()
    };
    print_machine(&ctx);
    for bench in benches {
        run_bench(bench, &ctx)?;
    }
    Ok(())
}

fn run_bench(bench: Bench, ctx: &Ctx) -> Result<()> {
    let result = match bench {
        Bench::Intake => intake(ctx)?,
        Bench::Compare => diff(ctx)?,
        Bench::Ops => ops(ctx)?,
        Bench::Trace => trace_bench(ctx)?,
        Bench::Reproduce => replay_bench(ctx)?,
        Bench::Commit => commit_bench(ctx)?,
        Bench::Shared => shared_bench(ctx)?,
        Bench::BucketTrace => bucket_trace_bench(ctx)?,
    };
    fs::create_dir_all(&ctx.results_dir)
        .with_context(|| format!("creating {}", ctx.results_dir.display()))?;
    let out = ctx.results_dir.join(format!("{}.json", bench.name()));
    fs::write(&out, serde_json::to_string_pretty(&result)? + "\n")
        .with_context(|| format!("writing {}", out.display()))?;
    println!("results written to {}", out.display());
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// Setting up

fn context(cli: &Cli) -> Result<Ctx> {
    let bench_exe = std::env::current_exe().context("finding this example's own path")?;
    // target/release/examples/bench -> target/release -> target
    let profile_dir = bench_exe.parent().and_then(Path::parent).ok_or_else(|| {
        anyhow!(
            "unexpected location of the example: {}",
            bench_exe.display()
        )
    })?;
    let target = profile_dir.parent().ok_or_else(|| {
        anyhow!(
            "unexpected location of the example: {}",
            bench_exe.display()
        )
    })?;
    let sluice = profile_dir.join("sluice");
    build_binary(profile_dir)?;
    if !sluice.is_file() {
        bail!(
            "{} is missing: the benchmark runs the real release binary. Run `cargo build --release` first, then this again.",
            sluice.display()
        );
    }
    check_fresh(&sluice)?;
    let rows = match (&cli.rows, cli.quick) {
        (Some(r), _) => Some(r.clone()),
        (None, true) => Some(QUICK_ROWS.to_vec()),
        (None, false) => None,
    };
    let tmp_dir = target.join("bench-tmp");
    if tmp_dir.exists() {
        fs::remove_dir_all(&tmp_dir)
            .with_context(|| format!("removing the leftovers in {}", tmp_dir.display()))?;
    }
    Ok(Ctx {
        sluice,
        data_dir: target.join("bench-data"),
        tmp_dir,
        results_dir: target.join("bench-results"),
        rows,
        runs: cli.runs,
        bench_exe,
        keep_stores: cli.keep_stores,
    })
}

impl Ctx {
    /// The row counts `bench` runs at.
    fn rows_for(&self, bench: Bench) -> Vec<u64> {
        self.rows
            .clone()
            .unwrap_or_else(|| bench.default_rows().to_vec())
    }
}

/// `cargo run --example` builds the library and the example, not the binary the benchmark runs:
/// build it here, with the cargo that started this run, so one command measures current code.
fn build_binary(profile_dir: &Path) -> Result<()> {
    let Ok(cargo) = std::env::var("CARGO") else {
        // Started without cargo: the freshness check below still guards against stale code.
        return Ok(());
    };
    let mut c = Command::new(cargo);
    c.args(["build", "--quiet", "--bin", "sluice", "--manifest-path"])
        .arg(Path::new(env!("CARGO_MANIFEST_DIR")).join("Cargo.toml"));
    if profile_dir.file_name().is_some_and(|n| n == "release") {
        c.arg("--release");
    }
    let status = c
        .status()
        .context("running cargo build for the sluice binary")?;
    if !status.success() {
        bail!("cargo build of the sluice binary failed");
    }
    Ok(())
}

/// Refuses to measure a sluice binary older than the sources it would be built from.
fn check_fresh(sluice: &Path) -> Result<()> {
    let built = fs::metadata(sluice)
        .and_then(|m| m.modified())
        .with_context(|| format!("reading the date of {}", sluice.display()))?;
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let mut newest: Option<(SystemTime, PathBuf)> = None;
    for p in [
        root.join("src"),
        root.join("Cargo.toml"),
        root.join("Cargo.lock"),
    ] {
        newest_mtime(&p, &mut newest);
    }
    if let Some((t, p)) = newest {
        if t > built {
            bail!(
                "{} is older than {}: run `cargo build --release` so that the benchmark measures the current code.",
                sluice.display(),
                p.display()
            );
        }
    }
    Ok(())
}

fn newest_mtime(p: &Path, newest: &mut Option<(SystemTime, PathBuf)>) {
    let Ok(meta) = fs::metadata(p) else { return };
    if meta.is_dir() {
        if let Ok(entries) = fs::read_dir(p) {
            for e in entries.flatten() {
                newest_mtime(&e.path(), newest);
            }
        }
    } else if let Ok(t) = meta.modified() {
        if newest.as_ref().is_none_or(|(n, _)| t > *n) {
            *newest = Some((t, p.to_path_buf()));
        }
    }
}

fn print_machine(ctx: &Ctx) {
    println!("sluice benchmarks");
    println!("  binary:  {}", ctx.sluice.display());
    println!(
        "  source:  {}",
        source_revision().unwrap_or_else(|| "unknown".into())
    );
    println!("  cores:   {}", cores());
    println!(
        "  cpu:     {}",
        cpu_model().unwrap_or_else(|| "unknown".into())
    );
    println!(
        "  git:     {}",
        git_version().unwrap_or_else(|| "not found".into())
    );
    let list = |rows: &[u64]| {
        rows.iter()
            .map(|&n| thousands(n))
            .collect::<Vec<_>>()
            .join(", ")
    };
    match &ctx.rows {
        Some(rows) => println!("  rows:    {}", list(rows)),
        None => println!(
            "  rows:    each benchmark's default ({})",
            Bench::value_variants()
                .iter()
                .map(|b| format!("{}: {}", b.name(), list(b.default_rows())))
                .collect::<Vec<_>>()
                .join("; ")
        ),
    }
    println!();
}

/// The commit the sources are at, with "+changes" when the work tree differs from it.
fn source_revision() -> Option<String> {
    let root = env!("CARGO_MANIFEST_DIR");
    let git = |args: &[&str]| {
        let out = Command::new("git")
            .arg("-C")
            .arg(root)
            .args(args)
            .output()
            .ok()?;
        out.status
            .success()
            .then(|| String::from_utf8_lossy(&out.stdout).trim().to_string())
    };
    let head = git(&["rev-parse", "--short=12", "HEAD"])?;
    let dirty =
        git(&["status", "--porcelain", "--untracked-files=no"]).is_some_and(|s| !s.is_empty());
    Some(if dirty {
        format!("{head}+changes")
    } else {
        head
    })
}

fn cores() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get())
}

fn cpu_model() -> Option<String> {
    let info = fs::read_to_string("/proc/cpuinfo").ok()?;
    info.lines()
        .find(|l| l.starts_with("model name"))
        .and_then(|l| l.split_once(':'))
        .map(|(_, v)| v.trim().to_string())
}

fn git_version() -> Option<String> {
    let out = Command::new("git").arg("--version").output().ok()?;
    out.status
        .success()
        .then(|| String::from_utf8_lossy(&out.stdout).trim().to_string())
}

// ---------------------------------------------------------------------------------------------
// Data

/// The work-order file of `n_rows` rows, generated if it is missing or differs from what the
/// generator makes now.
fn ensure_data(dir: &Path, n_rows: u64) -> Result<PathBuf> {
    fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let path = dir.join(format!("work_orders_{n_rows}.csv"));
    let t = Instant::now();
    if path.is_file() {
        if matches_generator(&path, n_rows)? {
            println!(
                "data: {} (reused, checked in {:.1} s)",
                path.display(),
                secs(t.elapsed())
            );
            return Ok(path);
        }
        println!(
            "data: {} differs from the generator's output: making it again",
            path.display()
        );
    }
    let partial = path.with_extension("csv.partial");
    let file = File::create(&partial).with_context(|| format!("creating {}", partial.display()))?;
    let mut w = BufWriter::with_capacity(PIECE, file);
    sluice::demo::work_orders(&mut w, sluice::demo::Till::Quillby, n_rows, 1)
        .and_then(|()| w.flush())
        .with_context(|| format!("writing {}", partial.display()))?;
    drop(w);
    fs::rename(&partial, &path).with_context(|| format!("renaming {}", partial.display()))?;
    println!(
        "data: {} (generated in {:.1} s)",
        path.display(),
        secs(t.elapsed())
    );
    Ok(path)
}

/// Whether the file holds exactly the bytes the generator makes (compared as they are made).
fn matches_generator(path: &Path, n_rows: u64) -> Result<bool> {
    let file = File::open(path).with_context(|| format!("opening {}", path.display()))?;
    let mut cmp = BufWriter::with_capacity(
        PIECE,
        Compare {
            file,
            buf: Vec::new(),
            differs: false,
        },
    );
    let made = sluice::demo::work_orders(&mut cmp, sluice::demo::Till::Quillby, n_rows, 1)
        .and_then(|()| cmp.flush());
    let mut cmp = cmp
        .into_inner()
        .map_err(|e| anyhow!("comparing {}: {}", path.display(), e.error()))?;
    if cmp.differs {
        return Ok(false);
    }
    made.with_context(|| format!("comparing {}", path.display()))?;
    let mut rest = [0u8; 1];
    Ok(cmp
        .file
        .read(&mut rest)
        .with_context(|| format!("reading {}", path.display()))?
        == 0)
}

/// A writer that compares what is written with a file's next bytes.
struct Compare {
    file: File,
    buf: Vec<u8>,
    differs: bool,
}

impl Write for Compare {
    fn write(&mut self, data: &[u8]) -> io::Result<usize> {
        self.buf.resize(data.len(), 0);
        let same = match self.file.read_exact(&mut self.buf) {
            Ok(()) => self.buf == data,
            Err(e) if e.kind() == io::ErrorKind::UnexpectedEof => false,
            Err(e) => return Err(e),
        };
        if !same {
            self.differs = true;
            return Err(io::Error::other(
                "the file differs from the generator's output",
            ));
        }
        Ok(data.len())
    }

    fn flush(&mut self) -> io::Result<()> {
        Ok(())
    }
}

/// Reads the whole file once, so every tool starts from a warm page cache.
fn warm(path: &Path) -> Result<()> {
    let mut f = File::open(path).with_context(|| format!("opening {}", path.display()))?;
    let mut buf = vec![0u8; PIECE];
    while f
        .read(&mut buf)
        .with_context(|| format!("reading {}", path.display()))?
        > 0
    {}
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// Measuring a child process

/// One timed run.
#[derive(Debug, Clone, Copy)]
struct Sample {
    secs: f64,
    peak_kib: u64,
    /// CPU time of the child (user + system).
    cpu_secs: f64,
    /// CPU the rest of the machine used meanwhile, in cores on average (kernel threads writing
    /// back the tool's own output count here too); only for runs long enough to tell, as the
    /// counters tick in hundredths of a second.
    others_cores: Option<f64>,
}

/// What a child process printed.
struct Output {
    stdout: String,
}

/// Runs `cmd` to its end with its output in files under `log_dir`; returns the wall time from
/// spawn to exit and the child's peak resident memory.
fn run_measured(cmd: &mut Command, log_dir: &Path, what: &str) -> Result<(Sample, Output)> {
    fs::create_dir_all(log_dir).with_context(|| format!("creating {}", log_dir.display()))?;
    let out_path = log_dir.join("stdout.txt");
    let err_path = log_dir.join("stderr.txt");
    let out =
        File::create(&out_path).with_context(|| format!("creating {}", out_path.display()))?;
    let err =
        File::create(&err_path).with_context(|| format!("creating {}", err_path.display()))?;
    cmd.stdin(Stdio::null()).stdout(out).stderr(err);
    forget_own_peak()?;
    // Flush dirty pages left by earlier runs, so that they are not written during this one.
    // SAFETY: sync has no preconditions.
    unsafe { libc::sync() };
    let busy_before = busy_cpu_secs();
    let start = Instant::now();
    let child = cmd.spawn().with_context(|| format!("starting {what}"))?;
    let (status, rusage) = wait4(child.id())?;
    let elapsed = start.elapsed();
    let busy_after = busy_cpu_secs();
    let stdout = fs::read_to_string(&out_path).unwrap_or_default();
    if !(libc::WIFEXITED(status) && libc::WEXITSTATUS(status) == 0) {
        let stderr = fs::read_to_string(&err_path).unwrap_or_default();
        bail!("{what} failed (wait status {status}):\n{stdout}{stderr}");
    }
    let tv = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 / 1e6;
    let cpu_secs = tv(rusage.ru_utime) + tv(rusage.ru_stime);
    let others_cores = match (busy_before, busy_after) {
        (Some(a), Some(b)) if elapsed >= MIN_LOAD_WINDOW => {
            Some(((b - a - cpu_secs) / secs(elapsed)).max(0.0))
        }
        _ => None,
    };
    let sample = Sample {
        secs: secs(elapsed),
        peak_kib: u64::try_from(rusage.ru_maxrss).unwrap_or(0),
        cpu_secs,
        others_cores,
    };
    Ok((sample, Output { stdout }))
}

/// The CPU time the whole machine has spent busy since boot (Linux `/proc/stat`).
fn busy_cpu_secs() -> Option<f64> {
    let stat = fs::read_to_string("/proc/stat").ok()?;
    let line = stat.lines().next()?.strip_prefix("cpu ")?;
    let v: Vec<u64> = line
        .split_whitespace()
        .filter_map(|x| x.parse().ok())
        .collect();
    // user nice system idle iowait irq softirq steal: all but idle and iowait are busy.
    let busy = v.first()? + v.get(1)? + v.get(2)? + v.get(5)? + v.get(6)? + v.get(7)?;
    // SAFETY: sysconf has no preconditions.
    let hz = unsafe { libc::sysconf(libc::_SC_CLK_TCK) };
    (hz > 0).then(|| busy as f64 / hz as f64)
}

/// The cores the machine keeps busy over one second, with nothing of ours running.
fn background_load() -> Result<Option<f64>> {
    // SAFETY: sync has no preconditions.
    unsafe { libc::sync() };
    let (Some(a), t) = (busy_cpu_secs(), Instant::now()) else {
        return Ok(None);
    };
    std::thread::sleep(MIN_LOAD_WINDOW);
    Ok(busy_cpu_secs().map(|b| (b - a) / secs(t.elapsed())))
}

/// Lowers this process's recorded peak resident memory to what it holds now (Linux's
/// `clear_refs`, value 5). A child's `ru_maxrss` is at least the peak of the process that
/// spawned it: `Command` starts children in the parent's address space until they exec, and
/// the kernel carries that space's high-water mark over to the child at the exec. Without this,
/// every child measured after this benchmark had read a 100 MB file whole was reported at 140
/// MiB or more, whatever it used.
fn forget_own_peak() -> Result<()> {
    fs::write("/proc/self/clear_refs", "5")
        .context("resetting this process's peak memory through /proc/self/clear_refs")
}

/// Waits for the child `pid` and returns its wait status and resource usage.
fn wait4(pid: u32) -> Result<(i32, libc::rusage)> {
    let pid = libc::pid_t::try_from(pid).context("process id out of range")?;
    let mut status = 0;
    // SAFETY: rusage is plain old data; wait4 fills it in.
    let mut rusage: libc::rusage = unsafe { std::mem::zeroed() };
    loop {
        // SAFETY: pointers to live locals; the child is ours and not waited for elsewhere.
        let r = unsafe { libc::wait4(pid, &mut status, 0, &mut rusage) };
        if r == pid {
            return Ok((status, rusage));
        }
        let e = io::Error::last_os_error();
        if e.kind() != io::ErrorKind::Interrupted {
            return Err(e).context("waiting for a child process");
        }
    }
}

/// Repeats `once` `runs` times and collects the samples: only once if the first run is long,
/// [`SHORT_RUNS`] times if it is short (a short run is cheap to repeat and noisier).
fn repeat(runs: u32, mut once: impl FnMut(u32) -> Result<Sample>) -> Result<Vec<Sample>> {
    let first = once(0)?;
    let runs = runs_after(runs, &first);
    let mut samples = vec![first];
    for i in 1..runs {
        samples.push(once(i)?);
    }
    Ok(samples)
}

/// How many runs [`repeat`] makes of a tool whose first run gave `first`.
fn runs_after(runs: u32, first: &Sample) -> u32 {
    if first.secs > LONG_RUN.as_secs_f64() {
        1
    } else if first.secs < SHORT_RUN.as_secs_f64() {
        runs.max(SHORT_RUNS)
    } else {
        runs
    }
}

/// [`repeat`] of two tools in turn (a, b, a, b, ...), each as many times as the one of them
/// that needs more runs: the ratio of their medians then compares runs made at the same
/// moments, not the machine's speed while one ran against its speed while the other did.
fn repeat_in_turn(
    runs: u32,
    mut a: impl FnMut(u32) -> Result<Sample>,
    mut b: impl FnMut(u32) -> Result<Sample>,
) -> Result<(Vec<Sample>, Vec<Sample>)> {
    let (first_a, first_b) = (a(0)?, b(0)?);
    let runs = runs_after(runs, &first_a).max(runs_after(runs, &first_b));
    let (mut sa, mut sb) = (vec![first_a], vec![first_b]);
    for i in 1..runs {
        sa.push(a(i)?);
        sb.push(b(i)?);
    }
    Ok((sa, sb))
}

/// A fresh scratch folder under target/bench-tmp; removed by [`Scratch::drop`].
/// A scratch folder under `target/bench-tmp/`, removed when dropped unless `--keep-stores`.
struct Scratch(PathBuf, bool);

impl Scratch {
    fn new(ctx: &Ctx, name: &str) -> Result<Self> {
        let p = ctx.tmp_dir.join(name);
        if p.exists() {
            fs::remove_dir_all(&p).with_context(|| format!("removing {}", p.display()))?;
        }
        fs::create_dir_all(&p).with_context(|| format!("creating {}", p.display()))?;
        Ok(Scratch(p, ctx.keep_stores))
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        if self.1 {
            eprintln!("kept {}", self.0.display());
            return;
        }
        if let Err(e) = fs::remove_dir_all(&self.0) {
            eprintln!("warning: could not remove {}: {e}", self.0.display());
        }
    }
}

// ---------------------------------------------------------------------------------------------
// The tools

/// `sluice setup` (not timed) then `sluice --store DIR receive FILE --as orders --json` (timed).
/// Returns the sample and the full version hash sluice recorded.
fn sluice_ingest(ctx: &Ctx, file: &Path, run: u32) -> Result<(Sample, Option<String>)> {
    let scratch = Scratch::new(ctx, &format!("sluice-{run}"))?;
    let store = scratch.0.join("store");
    sluice_init(ctx, &store)?;
    let mut cmd = Command::new(&ctx.sluice);
    cmd.arg("--store")
        .arg(&store)
        .arg("receive")
        .arg(file)
        .args(["--as", "orders", "--json"])
        .envs(IDENTITY);
    let (sample, out) = run_measured(&mut cmd, &scratch.0.join("log"), "sluice receive")?;
    if run == 0 {
        let size = stored_size(&store.join(STORE_DIR))?;
        STORE_AFTER_INTAKE.with(|s| *s.borrow_mut() = Some(size));
    }
    Ok((sample, recorded_hash(&out.stdout)))
}

thread_local! {
    /// The store measured after the first timed intake of the current size.
    static STORE_AFTER_INTAKE: std::cell::RefCell<Option<StoredSize>> = const { std::cell::RefCell::new(None) };
}

/// What a store holds on disk against what its objects would take uncompressed.
#[derive(Debug, Clone, Copy)]
struct StoredSize {
    /// Bytes of every file under `segments/` (and `objects/`, the earlier layout).
    on_disk: u64,
    /// The objects' uncompressed bytes, as the database records them.
    uncompressed: u64,
    /// The row indexes: uncompressed and as stored, and their rows.
    index_raw: u64,
    index_stored: u64,
    index_rows: u64,
}

impl StoredSize {
    fn json(&self) -> Value {
        json!({
            "on_disk_bytes": self.on_disk,
            "objects_uncompressed_bytes": self.uncompressed,
            "row_index_bytes": self.index_raw,
            "row_index_stored_bytes": self.index_stored,
            "row_index_rows": self.index_rows,
        })
    }
}

/// Bytes of the object files of a store folder (`segments/` and `objects/`).
fn object_files_bytes(dot: &Path) -> Result<u64> {
    let mut total = 0;
    for sub in ["segments", "objects"] {
        if dot.join(sub).is_dir() {
            total += tree_bytes(&dot.join(sub))?;
        }
    }
    Ok(total)
}

fn stored_size(dot: &Path) -> Result<StoredSize> {
    let store = sluice::store::Store::open(dot).context("opening the benchmark's store")?;
    let backend = sluice::store::objects::FsBackend::new(dot);
    let objects = store.lineage.objects().context("listing objects")?;
    let mut size = StoredSize {
        on_disk: object_files_bytes(dot)?,
        uncompressed: objects.iter().map(|(_, _, n)| n).sum(),
        index_raw: 0,
        index_stored: 0,
        index_rows: 0,
    };
    for v in store.lineage.all_versions().context("listing versions")? {
        let h: sluice::hash::Hash = v.row_index.parse().map_err(|e| anyhow!("{e}"))?;
        if let Some((_, e)) = backend.locate(&h) {
            size.index_raw += e.raw;
            size.index_stored += e.stored;
            size.index_rows += v.n_rows;
        }
    }
    Ok(size)
}

/// The same version read by `sluice retrieve` from a compressed store and from a copy of it in the
/// earlier layout (each object an uncompressed file, which this build still reads): the
/// baseline for reading through the compression.
fn cat_compressed_vs_loose(ctx: &Ctx, file: &Path) -> Result<(Row, Row)> {
    let scratch = Scratch::new(ctx, "cat")?;
    let packed = scratch.0.join("packed");
    sluice_init(ctx, &packed)?;
    sluice_quiet(
        ctx,
        &packed,
        &[
            "receive".as_ref(),
            file.as_os_str(),
            "--as".as_ref(),
            "orders".as_ref(),
        ],
    )?;
    let loose = scratch.0.join("loose");
    fs::create_dir_all(loose.join(STORE_DIR).join("objects"))?;
    for f in ["lineage.db", "README"] {
        fs::copy(
            packed.join(STORE_DIR).join(f),
            loose.join(STORE_DIR).join(f),
        )?;
    }
    fs::create_dir_all(loose.join(STORE_DIR).join("tmp"))?;
    {
        let store = sluice::store::Store::open(&packed.join(STORE_DIR))?;
        for (hex, _, _) in store.lineage.objects()? {
            let dir = loose.join(STORE_DIR).join("objects").join(&hex[..2]);
            fs::create_dir_all(&dir)?;
            let mut out = fs::File::create(dir.join(&hex[2..]))?;
            let h: sluice::hash::Hash = hex.parse().map_err(|e| anyhow!("{e}"))?;
            store.objects.copy_to(&h, &mut out, &dir)?;
        }
    }
    let retrieve =
        |store: &Path, tool: &'static str, key: &'static str, i: u32| -> Result<Sample> {
            let out = scratch.0.join(format!("{key}.csv"));
            let _ = fs::remove_file(&out);
            let mut cmd = Command::new(&ctx.sluice);
            cmd.arg("--store")
                .arg(store)
                .args(["retrieve", "orders", "-o"])
                .arg(&out)
                .envs(IDENTITY);
            let (sample, _) =
                run_measured(&mut cmd, &scratch.0.join(format!("log-{key}-{i}")), tool)?;
            Ok(sample)
        };
    const PACKED: (&str, &str) = ("sluice retrieve, compressed segments", "cat_compressed");
    const LOOSE: (&str, &str) = ("sluice retrieve, uncompressed loose objects", "cat_loose");
    // In turn, so that the ratio compares runs made at the same moments.
    let (packed_samples, loose_samples) = repeat_in_turn(
        ctx.runs,
        |i| retrieve(&packed, PACKED.0, PACKED.1, i),
        |i| retrieve(&loose, LOOSE.0, LOOSE.1, i),
    )?;
    let raw = fs::read(file)?;
    for (tool, key) in [PACKED, LOOSE] {
        ensure!(
            fs::read(scratch.0.join(format!("{key}.csv")))? == raw,
            "{tool} did not give the file's bytes back"
        );
    }
    let packed_row = Row {
        tool: PACKED.0,
        key: PACKED.1,
        samples: packed_samples,
    };
    let loose_row = Row {
        tool: LOOSE.0,
        key: LOOSE.1,
        samples: loose_samples,
    };
    Ok((packed_row, loose_row))
}

/// Compression of the file in frames of several sizes at levels 1 and 3, in this process on
/// one thread: the ratio, the compression speed and the time to decode one frame (the cost of
/// reading one row by offset). Measurements behind `segments::FRAME_SIZE` and `LEVEL`.
fn frame_sizes(file: &Path) -> Result<Value> {
    let data = fs::read(file)?;
    println!("  frames (1 thread, in process): level, frame size, ratio, compress MB/s, decode one frame");
    let mut out = Vec::new();
    for (level, frame) in [
        (1, 64usize << 10),
        (1, 256 << 10),
        (1, 1 << 20),
        (3, 256 << 10),
        (3, 1 << 20),
    ] {
        let mut c = zstd::bulk::Compressor::new(level)?;
        let t = Instant::now();
        let frames: Vec<Vec<u8>> = data
            .chunks(frame)
            .map(|ch| c.compress(ch))
            .collect::<io::Result<_>>()?;
        let secs = t.elapsed().as_secs_f64();
        let stored: usize = frames.iter().map(Vec::len).sum();
        let mut d = zstd::bulk::Decompressor::new()?;
        let picks: Vec<usize> = (0..64).map(|k| k * 7919 % frames.len()).collect();
        let t = Instant::now();
        for &k in &picks {
            let _ = d.decompress(&frames[k], frame)?;
        }
        let decode_us = t.elapsed().as_secs_f64() * 1e6 / picks.len() as f64;
        let ratio = data.len() as f64 / stored as f64;
        let mbs = data.len() as f64 / 1e6 / secs;
        println!(
            "    level {level}, {:>5} KiB: {ratio:.2}x, {mbs:.0} MB/s, {decode_us:.0} µs",
            frame >> 10
        );
        out.push(json!({"level": level, "frame_bytes": frame, "ratio": ratio, "compress_mb_per_s": mbs, "decode_one_frame_us": decode_us}));
    }
    Ok(Value::Array(out))
}

/// The compact row index at several checkpoint strides, in this process on one thread, from
/// the file's records: bytes per row stored (Zstandard level 1 in the row index's frames) and
/// the time to find one row from its checkpoint (the parse of the stretch a trail does; the
/// decoding of the table's frame is the same at every stride and measured above). Measurements
/// behind `rowindex::STRIDE`.
fn index_strides(file: &Path) -> Result<Value> {
    use sluice::table::rowindex;
    let data = fs::read(file)?;
    let mut rows = Vec::new();
    let mut parser = sluice::table::parse::Parser::new(b',', 0);
    let mut keep = |r: sluice::table::RawRecord<'_>| -> std::result::Result<(), ()> {
        rows.push((r.byte, r.line));
        Ok(())
    };
    parser
        .feed(&data, &mut keep)
        .map_err(|_| anyhow!("parsing {}", file.display()))?;
    let _ = parser.finish(&mut keep);
    rows.remove(0);
    let n = rows.len();
    println!(
        "  row index strides (1 thread, in process): stride, bytes per row stored, find one row"
    );
    let frame = sluice::store::segments::RANDOM_ACCESS_FRAME_SIZE as usize;
    let mut out = Vec::new();
    for stride in [16u32, 64, 128, 512] {
        let mut index = rowindex::Builder::start().to_vec();
        let mut b = rowindex::Builder::with_stride(stride);
        for &(byte, line) in &rows {
            b.push(byte, line, &mut index);
        }
        b.finish(&mut index);
        let mut c = zstd::bulk::Compressor::new(1)?;
        let stored: usize = index
            .chunks(frame)
            .map(|ch| c.compress(ch).map(|f| f.len()))
            .sum::<io::Result<usize>>()?;
        let picks: Vec<usize> = (0..2000).map(|k| k * 7919 % n).collect();
        let t = Instant::now();
        for &r in &picks {
            let cp = r / stride as usize * stride as usize;
            let end = rows
                .get(cp + stride as usize)
                .map_or(data.len(), |&(b, _)| b as usize);
            let at = rows[cp];
            let found = rowindex::find_in_stretch(
                &mut parser,
                &data[at.0 as usize..end],
                at,
                (r - cp) as u64,
            );
            ensure!(
                found.map(|f| (f.0, f.1)) == Some(rows[r]),
                "stride {stride}: row {r} not found"
            );
        }
        let find_us = t.elapsed().as_secs_f64() * 1e6 / picks.len() as f64;
        let per_row = stored as f64 / n as f64;
        println!("    stride {stride:>4}: {per_row:.2} bytes per row, {find_us:.1} µs");
        out.push(
            json!({"stride": stride, "bytes_per_row_stored": per_row, "find_one_row_us": find_us}),
        );
    }
    Ok(Value::Array(out))
}

/// The version hash in `sluice receive --json`'s output (`version.hash`, the full hex digits).
fn recorded_hash(stdout: &str) -> Option<String> {
    let v: Value = serde_json::from_str(stdout).ok()?;
    v["version"]["hash"].as_str().map(str::to_string)
}

/// `git init` and a copy of the file (not timed), then `git add` of it (timed).
fn git_add(ctx: &Ctx, file: &Path, run: u32) -> Result<Sample> {
    let scratch = Scratch::new(ctx, &format!("git-{run}"))?;
    let repo = scratch.0.join("repo");
    let git = |cmd: &mut Command| {
        // git's defaults, whatever the user's or the system's configuration says.
        cmd.env("GIT_CONFIG_GLOBAL", "/dev/null")
            .env("GIT_CONFIG_NOSYSTEM", "1");
    };
    let mut init = Command::new("git");
    init.args(["init", "-q"]).arg(&repo);
    git(&mut init);
    let out = init
        .output()
        .context("running `git init` (is git installed?)")?;
    ensure!(
        out.status.success(),
        "`git init` failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let name = file
        .file_name()
        .ok_or_else(|| anyhow!("no file name in {}", file.display()))?;
    let copy = repo.join(name);
    fs::copy(file, &copy).with_context(|| format!("copying the data to {}", copy.display()))?;
    File::open(&copy)
        .and_then(|f| f.sync_all())
        .context("syncing the copy")?;
    let mut add = Command::new("git");
    add.arg("-C").arg(&repo).arg("add").arg(name);
    git(&mut add);
    let (sample, _) = run_measured(&mut add, &scratch.0.join("log"), "git add")?;
    Ok(sample)
}

/// This example run again as a child that hashes the file; the time is the one it measured.
fn blake3_alone(ctx: &Ctx, file: &Path, threads: usize, run: u32) -> Result<(Sample, String)> {
    let scratch = Scratch::new(ctx, &format!("blake3-{threads}-{run}"))?;
    let mut cmd = Command::new(&ctx.bench_exe);
    cmd.arg("--hash-child").arg(file).arg(threads.to_string());
    let (mut sample, out) = run_measured(&mut cmd, &scratch.0, "the BLAKE3 child")?;
    let (t, hex) = out
        .stdout
        .trim()
        .split_once(' ')
        .ok_or_else(|| anyhow!("unexpected output of the BLAKE3 child: {:?}", out.stdout))?;
    sample.secs = t
        .parse()
        .with_context(|| format!("reading the BLAKE3 child's time {t:?}"))?;
    Ok((sample, hex.to_string()))
}

/// The hidden `--hash-child FILE THREADS` mode.
fn hash_child(args: &[String]) -> Result<()> {
    let [file, threads] = args else {
        bail!("--hash-child needs FILE THREADS")
    };
    let threads: usize = threads.parse().context("THREADS must be a number")?;
    let path = Path::new(file);
    let start = Instant::now();
    let hash = if threads <= 1 {
        blake3_serial(path)?
    } else {
        blake3_parallel(path, threads)?
    };
    let t = secs(start.elapsed());
    println!("{t:.6} {}", hash.to_hex());
    Ok(())
}

fn blake3_serial(path: &Path) -> Result<blake3::Hash> {
    let mut f = File::open(path).with_context(|| format!("opening {}", path.display()))?;
    let mut buf = vec![0u8; PIECE];
    let mut h = blake3::Hasher::new();
    loop {
        let n = f
            .read(&mut buf)
            .with_context(|| format!("reading {}", path.display()))?;
        if n == 0 {
            break;
        }
        h.update(&buf[..n]);
    }
    Ok(h.finalize())
}

/// The subtrees each thread hashes on its own: at most this long (a power of two of chunks).
const LEAF: u64 = 4 << 20;

/// The shape of BLAKE3's tree above the leaves that threads hash.
enum Tree {
    Leaf { index: usize },
    Parent(Box<Tree>, Box<Tree>),
}

/// Splits `len` bytes at `offset` as BLAKE3 does (the left subtree is the largest power of two
/// of chunks shorter than the whole) until the pieces are at most [`LEAF`] long.
fn plan(offset: u64, len: u64, leaves: &mut Vec<(u64, u64)>) -> Tree {
    if len <= LEAF {
        leaves.push((offset, len));
        return Tree::Leaf {
            index: leaves.len() - 1,
        };
    }
    let left = blake3::hazmat::left_subtree_len(len);
    Tree::Parent(
        Box::new(plan(offset, left, leaves)),
        Box::new(plan(offset + left, len - left, leaves)),
    )
}

/// BLAKE3 of the file on `threads` threads, each taking the next leaf and reading it with 1 MiB
/// positioned reads; the chaining values are then merged up the tree.
fn blake3_parallel(path: &Path, threads: usize) -> Result<blake3::Hash> {
    use blake3::hazmat::{
        merge_subtrees_non_root, merge_subtrees_root, ChainingValue, HasherExt, Mode,
    };
    let file = File::open(path).with_context(|| format!("opening {}", path.display()))?;
    let len = file.metadata().context("reading the file's size")?.len();
    if len <= LEAF {
        return blake3_serial(path);
    }
    let mut leaves = Vec::new();
    let tree = plan(0, len, &mut leaves);
    let cvs: Mutex<Vec<Option<ChainingValue>>> = Mutex::new(vec![None; leaves.len()]);
    let next = AtomicUsize::new(0);
    std::thread::scope(|s| -> Result<()> {
        let workers: Vec<_> = (0..threads)
            .map(|_| {
                s.spawn(|| -> io::Result<()> {
                    let mut buf = vec![0u8; PIECE];
                    loop {
                        let i = next.fetch_add(1, Ordering::Relaxed);
                        let Some(&(offset, len)) = leaves.get(i) else {
                            return Ok(());
                        };
                        let mut h = blake3::Hasher::new();
                        h.set_input_offset(offset);
                        let mut done = 0u64;
                        while done < len {
                            let n = (len - done).min(PIECE as u64) as usize;
                            file.read_exact_at(&mut buf[..n], offset + done)?;
                            h.update(&buf[..n]);
                            done += n as u64;
                        }
                        let cv = h.finalize_non_root();
                        cvs.lock().expect("no worker panics holding the lock")[i] = Some(cv);
                    }
                })
            })
            .collect();
        for w in workers {
            w.join()
                .map_err(|_| anyhow!("a hashing thread panicked"))?
                .with_context(|| format!("reading {}", path.display()))?;
        }
        Ok(())
    })?;
    let cvs = cvs.into_inner().expect("no worker panicked");
    fn cv(t: &Tree, cvs: &[Option<ChainingValue>]) -> ChainingValue {
        match t {
            Tree::Leaf { index } => cvs[*index].expect("every leaf hashed"),
            Tree::Parent(l, r) => merge_subtrees_non_root(&cv(l, cvs), &cv(r, cvs), Mode::Hash),
        }
    }
    match &tree {
        Tree::Parent(l, r) => Ok(merge_subtrees_root(&cv(l, &cvs), &cv(r, &cvs), Mode::Hash)),
        Tree::Leaf { .. } => unreachable!("a file longer than a leaf has a parent at the root"),
    }
}

// ---------------------------------------------------------------------------------------------
// Reporting

/// One tool's figures at one size.
struct Row {
    tool: &'static str,
    key: &'static str,
    samples: Vec<Sample>,
}

impl Row {
    fn median_secs(&self) -> f64 {
        median(self.samples.iter().map(|s| s.secs).collect())
    }

    fn mb_per_s(&self, bytes: u64) -> f64 {
        bytes as f64 / 1e6 / self.median_secs()
    }

    fn median_cpu_secs(&self) -> f64 {
        median(self.samples.iter().map(|s| s.cpu_secs).collect())
    }

    /// The most the rest of the machine used during one of the runs.
    fn others_cores(&self) -> Option<f64> {
        self.samples
            .iter()
            .filter_map(|s| s.others_cores)
            .reduce(f64::max)
    }

    fn peak_mib(&self) -> f64 {
        self.samples.iter().map(|s| s.peak_kib).max().unwrap_or(0) as f64 / 1024.0
    }

    fn json(&self, bytes: u64) -> Value {
        json!({
            "tool": self.tool,
            "runs": self.samples.iter().map(|s| json!({
                "seconds": s.secs,
                "peak_kib": s.peak_kib,
                "cpu_seconds": s.cpu_secs,
                "other_processes_cores": s.others_cores,
            })).collect::<Vec<_>>(),
            "median_seconds": self.median_secs(),
            "median_cpu_seconds": self.median_cpu_secs(),
            "mb_per_s": self.mb_per_s(bytes),
            "peak_mib": self.peak_mib(),
        })
    }
}

fn print_table(rows: &[Row], bytes: u64) {
    let w = rows.iter().map(|r| r.tool.len()).fold(30, usize::max);
    println!(
        "  {:<w$} {:>4} {:>9} {:>9} {:>9} {:>8} {:>7}",
        "tool", "runs", "seconds", "MB/s", "peak MiB", "cpu s", "others"
    );
    let dash = |c: Option<f64>| c.map_or("-".to_string(), |c| format!("{c:.2}"));
    for r in rows {
        let runs = if r.samples.len() == 1 {
            "1*".to_string()
        } else {
            r.samples.len().to_string()
        };
        let others = dash(r.others_cores());
        println!(
            "  {:<w$} {:>4} {:>9.3} {:>9.1} {:>9.1} {:>8.3} {:>7}",
            r.tool,
            runs,
            r.median_secs(),
            r.mb_per_s(bytes),
            r.peak_mib(),
            r.median_cpu_secs(),
            others
        );
    }
    println!("  (cpu s: the child's user + system time, median; others: the most CPU, in cores, that the");
    println!("  rest of the machine used during one run of 1 s or more, the kernel's writeback included)");
    if let Some(worst) = rows.iter().filter_map(Row::others_cores).reduce(f64::max) {
        if worst > NOISY_CORES_DURING {
            println!(
                "  WARNING: other processes used up to {worst:.2} cores during the timed runs: the times are noisy; run again on a quiet machine"
            );
        }
    }
    if rows.iter().any(|r| r.samples.len() == 1) {
        println!(
            "  (* one run only: --runs 1 was asked for, or the first took over {} s)",
            LONG_RUN.as_secs()
        );
    }
}

/// A goal check, printed and recorded.
struct Goal {
    label: String,
    value: f64,
    goal: &'static str,
    pass: bool,
}

impl Goal {
    fn print(&self) {
        let verdict = if self.pass { "PASS" } else { "MISS" };
        let claim = format!("{} = {:.2}", self.label, self.value);
        println!(
            "  {claim:<48} {:<14} {verdict}",
            format!("(goal {})", self.goal)
        );
    }

    fn json(&self) -> Value {
        json!({"what": self.label, "value": self.value, "goal": self.goal, "pass": self.pass})
    }
}

/// The last line of a benchmark's report.
fn verdict(all_pass: bool) -> &'static str {
    if all_pass {
        "all goals met"
    } else {
        "some goals missed"
    }
}

/// A benchmark's JSON summary: what ran, where and from which source, then its own `fields`.
fn with_header(ctx: &Ctx, name: &str, fields: Value) -> Value {
    let mut out = json!({
        "benchmark": name,
        "generated_by": format!("cargo run --release --example bench -- {name}"),
        "machine": {"cores": cores(), "cpu": cpu_model(), "git": git_version()},
        "sluice_binary": ctx.sluice.display().to_string(),
        "source": source_revision(),
    });
    if let (Some(o), Value::Object(f)) = (out.as_object_mut(), fields) {
        o.extend(f);
    }
    out
}

// ---------------------------------------------------------------------------------------------
// The intake benchmark

fn intake(ctx: &Ctx) -> Result<Value> {
    println!("== intake: sluice receive vs BLAKE3 alone vs git add ==");
    let mut sizes = Vec::new();
    let mut all_pass = true;
    for n in ctx.rows_for(Bench::Intake) {
        let (size, pass) = intake_size(ctx, n)?;
        sizes.push(size);
        all_pass &= pass;
    }
    println!("intake: {}", verdict(all_pass));
    Ok(with_header(
        ctx,
        "intake",
        json!({
        "runs_requested": ctx.runs,
        "notes": [
            "MB = 10^6 bytes; seconds are medians; peak memory is the largest ru_maxrss of the runs",
            "BLAKE3 times are the hashing alone, measured inside a child process (1 MiB reads)",
            "git add: fresh repository, git's default configuration, the file copied in before timing",
            "warm page cache; sync before every timed run",
        ],
        "all_goals_met": all_pass,
        "sizes": sizes,
        }),
    ))
}

/// Salted cell commitments: the cells of the intake file read with the `csv` crate alone, read
/// and committed to (GGM salts, salted leaves, RFC 6962 tree; one thread, in this process), and
/// `sluice receive` of the same file, all in one run.
fn commit_bench(ctx: &Ctx) -> Result<Value> {
    use sluice::commitment::{Committer, Salts};
    println!("== commit: salted cell commitments vs reading the cells vs sluice receive ==");
    let mut sizes = Vec::new();
    for n in ctx.rows_for(Bench::Commit) {
        let file = ensure_data(&ctx.data_dir, n)?;
        warm(&file)?;
        let cells = |commit: bool| -> Result<Sample> {
            let started = Instant::now();
            let mut r = csv::ReaderBuilder::new().from_path(&file)?;
            let n_cols = r.byte_headers()?.len() as u64;
            let salts = Salts::fresh([42; 32]);
            let mut c = Committer::new(&salts, n, n_cols, std::collections::BTreeMap::new());
            let mut rec = csv::ByteRecord::new();
            let mut bytes = 0u64;
            while r.read_byte_record(&mut rec)? {
                bytes += rec.as_slice().len() as u64;
                if commit {
                    c.row(rec.iter());
                }
            }
            let root = c.finish();
            std::hint::black_box((root, bytes));
            let secs = started.elapsed().as_secs_f64();
            Ok(Sample {
                secs,
                peak_kib: 0,
                cpu_secs: secs,
                others_cores: None,
            })
        };
        let read = repeat(ctx.runs, |_| cells(false))?;
        let commit = repeat(ctx.runs, |_| cells(true))?;
        let ingest = repeat(ctx.runs, |i| Ok(sluice_ingest(ctx, &file, i)?.0))?;
        let m = |v: &[Sample]| median(v.iter().map(|s| s.secs).collect());
        let (read_s, commit_s, ingest_s) = (m(&read), m(&commit), m(&ingest));
        let added = (commit_s - read_s).max(0.0);
        println!(
            "{} rows: reading the cells {read_s:.2} s; reading and committing {commit_s:.2} s \
             (commitments {added:.2} s, {:.0} ns per cell); sluice receive {ingest_s:.2} s; \
             commitments at intake would add {:.0}% to receive",
            thousands(n),
            added * 1e9 / (n as f64 * 10.0),
            added / ingest_s * 100.0
        );
        sizes.push(json!({
            "rows": n,
            "read_cells_secs": read_s,
            "read_and_commit_secs": commit_s,
            "commit_secs": added,
            "sluice_receive_secs": ingest_s,
            "commit_over_receive": added / ingest_s,
        }));
    }
    Ok(with_header(
        ctx,
        "commit",
        json!({
            "runs_requested": ctx.runs,
            "notes": ["seconds are medians; one thread; the demo generator's work orders (10 columns)"],
            "sizes": sizes,
        }),
    ))
}

/// Measures every tool on the file of `n` rows, prints the table and the goals.
fn intake_size(ctx: &Ctx, n: u64) -> Result<(Value, bool)> {
    println!();
    let file = ensure_data(&ctx.data_dir, n)?;
    let bytes = fs::metadata(&file)
        .with_context(|| format!("reading {}", file.display()))?
        .len();
    println!(
        "{} rows, {:.1} MB ({bytes} bytes)",
        thousands(n),
        bytes as f64 / 1e6
    );
    warm(&file)?;
    let background = background_load()?;
    match background {
        Some(c) if c > NOISY_CORES => println!(
            "WARNING: other processes use {c:.2} cores before timing starts: the times will be noisy"
        ),
        Some(c) => println!("background load before timing: {c:.2} cores"),
        None => {}
    }

    let mut hashes = Vec::new();
    let mut b3 = |threads: usize| -> Result<Vec<Sample>> {
        repeat(ctx.runs, |i| {
            let (s, h) = blake3_alone(ctx, &file, threads, i)?;
            hashes.push(h);
            Ok(s)
        })
    };
    let b3_1 = b3(1)?;
    let b3_2 = b3(2)?;
    ensure!(
        hashes.windows(2).all(|w| w[0] == w[1]),
        "the BLAKE3 runs disagree on the file's hash: {hashes:?}"
    );
    let file_hash = hashes.first().cloned().unwrap_or_default();

    let mut recorded = Vec::new();
    let ingest = repeat(ctx.runs, |i| {
        let (s, h) = sluice_ingest(ctx, &file, i)?;
        recorded.push(h);
        Ok(s)
    })?;
    let git = repeat(ctx.runs, |i| git_add(ctx, &file, i))?;

    let rows = vec![
        Row {
            tool: "sluice receive (fresh store)",
            key: "sluice_ingest",
            samples: ingest,
        },
        Row {
            tool: "BLAKE3 alone, 1 thread",
            key: "blake3_1_thread",
            samples: b3_1,
        },
        Row {
            tool: "BLAKE3 alone, 2 threads",
            key: "blake3_2_threads",
            samples: b3_2,
        },
        Row {
            tool: "git add (fresh repository)",
            key: "git_add",
            samples: git,
        },
    ];
    print_table(&rows, bytes);
    check_recorded_hash(&recorded, &file_hash);
    let stored = STORE_AFTER_INTAKE
        .with(|s| *s.borrow())
        .ok_or_else(|| anyhow!("the store after intake was not measured"))?;
    let store_ratio = stored.on_disk as f64 / bytes as f64;
    println!(
        "  store after intake: {} bytes of object files = {store_ratio:.3}x the raw file (objects uncompressed: {} bytes = {:.3}x)",
        thousands(stored.on_disk),
        thousands(stored.uncompressed),
        stored.uncompressed as f64 / bytes as f64
    );
    if stored.index_rows > 0 {
        println!(
            "  row index: {:.2} bytes per row uncompressed, {:.2} bytes per row stored",
            stored.index_raw as f64 / stored.index_rows as f64,
            stored.index_stored as f64 / stored.index_rows as f64
        );
    }
    let frames = frame_sizes(&file)?;
    let strides = index_strides(&file)?;
    let (cat_packed, cat_loose) = cat_compressed_vs_loose(ctx, &file)?;
    let cat_rows = vec![cat_packed, cat_loose];
    print_table(&cat_rows, bytes);
    let cat_ratio = cat_rows[0].median_secs() / cat_rows[1].median_secs();

    let mut goals = intake_goals(&rows, bytes);
    goals.push(Goal {
        label: "store after intake / raw file".into(),
        value: store_ratio,
        goal: "<= 0.3",
        pass: store_ratio <= 0.3,
    });
    goals.push(Goal {
        label: "retrieve compressed / retrieve uncompressed".into(),
        value: cat_ratio,
        goal: "<= 1.5",
        pass: cat_ratio <= 1.5,
    });
    println!("  ratios:");
    for g in &goals {
        g.print();
    }
    let pass = goals.iter().all(|g| g.pass);
    let tools: serde_json::Map<String, Value> = rows
        .iter()
        .map(|r| (r.key.to_string(), r.json(bytes)))
        .collect();
    let value = json!({
        "rows": n,
        "bytes": bytes,
        "file": file.display().to_string(),
        "blake3": file_hash,
        "tools": tools,
        "store_after_intake": stored.json(),
        "frames": frames,
        "row_index_strides": strides,
        "cat": cat_rows.iter().map(|r| (r.key.to_string(), r.json(bytes))).collect::<serde_json::Map<String, Value>>(),
        "background_load_cores": background,
        "max_other_processes_cores": rows.iter().filter_map(Row::others_cores).reduce(f64::max),
        "goals": goals.iter().map(Goal::json).collect::<Vec<_>>(),
        "all_goals_met": pass,
    });
    Ok((value, pass))
}

/// Checks that sluice recorded the bytes BLAKE3 hashed.
fn check_recorded_hash(recorded: &[Option<String>], file_hash: &str) {
    match recorded.first().cloned().flatten() {
        Some(h) if h == file_hash && recorded.iter().all(|r| r.as_ref() == Some(&h)) => {
            println!(
                "  check: sluice recorded version {}, the BLAKE3 hash of the file",
                sluice::model::short_hash(&h)
            );
        }
        Some(h) => {
            println!("  warning: sluice recorded {h} but the file's BLAKE3 hash is {file_hash}")
        }
        None => println!("  note: could not read the version hash in sluice's output"),
    }
}

fn intake_goals(rows: &[Row], bytes: u64) -> Vec<Goal> {
    let by = |key: &str| {
        rows.iter()
            .find(|r| r.key == key)
            .expect("every tool measured")
    };
    let sluice = by("sluice_ingest");
    let git = by("git_add");
    let (b1, b2) = (by("blake3_1_thread"), by("blake3_2_threads"));
    let fastest = if b2.mb_per_s(bytes) > b1.mb_per_s(bytes) {
        b2
    } else {
        b1
    };
    let vs_git = sluice.mb_per_s(bytes) / git.mb_per_s(bytes);
    let vs_b3 = sluice.mb_per_s(bytes) / fastest.mb_per_s(bytes);
    let peak = sluice.peak_mib();
    vec![
        Goal {
            label: "sluice/git add throughput".into(),
            value: vs_git,
            goal: ">= 4",
            pass: vs_git >= 4.0,
        },
        Goal {
            label: format!(
                "sluice/BLAKE3 ({}) throughput",
                fastest.tool.trim_start_matches("BLAKE3 alone, ")
            ),
            value: vs_b3,
            goal: ">= 0.1",
            pass: vs_b3 >= 0.1,
        },
        Goal {
            label: "sluice peak memory, MiB".into(),
            value: peak,
            goal: "< 64",
            pass: peak < 64.0,
        },
    ]
}

// ---------------------------------------------------------------------------------------------
// The diff benchmark

fn diff(ctx: &Ctx) -> Result<Value> {
    println!("== compare: sluice compare vs GNU diff, git diff, pandas and polars ==");
    let python = reference_python()?;
    let mut sizes = Vec::new();
    let mut all_pass = true;
    for n in ctx.rows_for(Bench::Compare) {
        let (size, pass) = diff_size(ctx, n, &python)?;
        sizes.push(size);
        all_pass &= pass;
    }
    println!("compare: {}", verdict(all_pass));
    Ok(with_header(
        ctx,
        "compare",
        json!({
        "runs_requested": ctx.runs,
        "python": python,
        "notes": [
            "MB = 10^6 bytes of both files together; seconds are medians; peak memory is the largest ru_maxrss of the runs",
            "sluice: both versions already in the store; the text output of the whole comparison is written to a file",
            "GNU diff and git diff --no-index --stat: exit status 1 (files differ) counts as success",
            "pandas and polars: read both files as text, outer join on order_id, count per column",
            "warm page cache; sync before every timed run",
        ],
        "all_goals_met": all_pass,
        "sizes": sizes,
        }),
    ))
}

/// The interpreter of the pinned reference environment (created once by the script).
fn reference_python() -> Result<String> {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/pyenv.py");
    let out = Command::new("python3")
        .arg(&script)
        .output()
        .context("running tests/reference/pyenv.py (is python3 installed?)")?;
    ensure!(
        out.status.success(),
        "tests/reference/pyenv.py failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    Ok(String::from_utf8_lossy(&out.stdout).trim().to_string())
}

/// The two versions of `n` rows, generated if missing or different from what the generator
/// makes now; with the generator's record of what it changed.
fn ensure_revision(dir: &Path, n: u64) -> Result<(PathBuf, PathBuf, sluice::demo::Revision)> {
    fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let first = dir.join(format!("revision_{n}_first.csv"));
    let second = dir.join(format!("revision_{n}_second.csv"));
    let t = Instant::now();
    if first.is_file() && second.is_file() {
        let open = |p: &Path| -> Result<BufWriter<Compare>> {
            Ok(BufWriter::with_capacity(
                PIECE,
                Compare {
                    file: File::open(p).with_context(|| format!("opening {}", p.display()))?,
                    buf: Vec::new(),
                    differs: false,
                },
            ))
        };
        let (mut ca, mut cb) = (open(&first)?, open(&second)?);
        let made = sluice::demo::revision_pair(&mut ca, &mut cb, n)
            .and_then(|r| ca.flush().and(cb.flush()).map(|()| r));
        let ends = |w: BufWriter<Compare>| -> bool {
            match w.into_inner() {
                Ok(mut c) => !c.differs && matches!(c.file.read(&mut [0u8; 1]), Ok(0)),
                Err(_) => false,
            }
        };
        if let Ok(rev) = made {
            if ends(ca) & ends(cb) {
                println!(
                    "data: {} and {} (reused, checked in {:.1} s)",
                    first.display(),
                    second.display(),
                    secs(t.elapsed())
                );
                return Ok((first, second, rev));
            }
        }
        println!("data: the revision files differ from the generator's output: making them again");
    }
    let create = |p: &Path| -> Result<BufWriter<File>> {
        Ok(BufWriter::with_capacity(
            PIECE,
            File::create(p).with_context(|| format!("creating {}", p.display()))?,
        ))
    };
    let (pa, pb) = (
        first.with_extension("csv.partial"),
        second.with_extension("csv.partial"),
    );
    let (mut wa, mut wb) = (create(&pa)?, create(&pb)?);
    let rev = sluice::demo::revision_pair(&mut wa, &mut wb, n)
        .and_then(|r| wa.flush().and(wb.flush()).map(|()| r))
        .context("writing the revision files")?;
    drop((wa, wb));
    fs::rename(&pa, &first).with_context(|| format!("renaming {}", pa.display()))?;
    fs::rename(&pb, &second).with_context(|| format!("renaming {}", pb.display()))?;
    println!(
        "data: {} and {} (generated in {:.1} s)",
        first.display(),
        second.display(),
        secs(t.elapsed())
    );
    Ok((first, second, rev))
}

/// Runs sluice (not timed) and insists on success; returns its standard output.
fn sluice_quiet(ctx: &Ctx, store: &Path, args: &[&std::ffi::OsStr]) -> Result<String> {
    let out = Command::new(&ctx.sluice)
        .arg("--store")
        .arg(store)
        .args(args)
        .envs(IDENTITY)
        .output()
        .context("running sluice")?;
    ensure!(
        out.status.success(),
        "sluice {:?} failed: {}",
        args,
        String::from_utf8_lossy(&out.stderr)
    );
    Ok(String::from_utf8_lossy(&out.stdout).into_owned())
}

fn diff_size(ctx: &Ctx, n: u64, python: &str) -> Result<(Value, bool)> {
    use std::ffi::OsStr;
    println!();
    let (first, second, rev) = ensure_revision(&ctx.data_dir, n)?;
    let size = |p: &Path| -> Result<u64> {
        Ok(fs::metadata(p)
            .with_context(|| format!("reading {}", p.display()))?
            .len())
    };
    let bytes = size(&first)? + size(&second)?;
    println!(
        "{} and {} rows, {:.1} MB together; {} rows changed, {} removed, {} inserted",
        thousands(rev.n_rows_first),
        thousands(rev.n_rows_second),
        bytes as f64 / 1e6,
        thousands(rev.changed_rows),
        thousands(rev.removed_rows),
        thousands(rev.added_rows)
    );
    let scratch = Scratch::new(ctx, "diff-store")?;
    let store = scratch.0.join("store");
    sluice_init(ctx, &store)?;
    let (f, s) = (first.as_os_str(), second.as_os_str());
    for args in [
        [
            OsStr::new("receive"),
            f,
            "--as".as_ref(),
            "orders".as_ref(),
            "--key".as_ref(),
            "order_id".as_ref(),
        ]
        .as_slice(),
        [OsStr::new("receive"), s, "--as".as_ref(), "orders".as_ref()].as_slice(),
        [OsStr::new("receive"), f, "--as".as_ref(), "plain".as_ref()].as_slice(),
        [OsStr::new("receive"), s, "--as".as_ref(), "plain".as_ref()].as_slice(),
    ] {
        sluice_quiet(ctx, &store, args)?;
    }
    // What sluice reports must be what the generator did.
    let stat = sluice_quiet(
        ctx,
        &store,
        &["compare", "orders:v1", "orders:v2", "--json", "--counts"].map(OsStr::new),
    )?;
    let stat: Value = serde_json::from_str(&stat).context("reading sluice compare --json")?;
    let counts = (
        stat["rows"]["changed"].as_u64(),
        stat["rows"]["removed"].as_u64(),
        stat["rows"]["added"].as_u64(),
    );
    ensure!(
        counts
            == (
                Some(rev.changed_rows),
                Some(rev.removed_rows),
                Some(rev.added_rows)
            ),
        "sluice compare reports {counts:?}, the generator made {:?}",
        (rev.changed_rows, rev.removed_rows, rev.added_rows)
    );
    println!("  check: sluice's counts are the generator's");
    warm(&first)?;
    warm(&second)?;
    let background = background_load()?;
    if let Some(c) = background {
        println!("background load before timing: {c:.2} cores");
    }
    let once = |name: &str, make: &dyn Fn() -> Command, i: u32| -> Result<Sample> {
        let log = scratch.0.join(format!("{name}-{i}"));
        let (sample, _) = run_measured(&mut make(), &log, name)?;
        Ok(sample)
    };
    let measure = |name: &str, make: &dyn Fn() -> Command| -> Result<Vec<Sample>> {
        repeat(ctx.runs, |i| once(name, make, i))
    };
    let sluice_diff = |reference: &'static str| {
        let (sl, st) = (ctx.sluice.clone(), store.clone());
        move || {
            let mut c = Command::new(&sl);
            c.arg("--store")
                .arg(&st)
                .args([
                    "compare",
                    &format!("{reference}:v1"),
                    &format!("{reference}:v2"),
                ])
                .envs(IDENTITY);
            c
        }
    };
    // `diff` and `git diff` exit with 1 when the files differ, as they do here.
    let differ_ok = |tool: &[&str]| {
        let mut c = Command::new("sh");
        c.arg("-c")
            .arg(format!("{} \"$1\" \"$2\"; test $? -le 1", tool.join(" ")))
            .arg("sh")
            .arg(&first)
            .arg(&second)
            .env("GIT_CONFIG_GLOBAL", "/dev/null")
            .env("GIT_CONFIG_NOSYSTEM", "1");
        c
    };
    // The goal closest to its mark, timed in turn.
    let (keyed, gnu) = repeat_in_turn(
        ctx.runs,
        |i| once("sluice-keyed", &sluice_diff("orders"), i),
        |i| once("gnu-diff", &|| differ_ok(&["diff"]), i),
    )?;
    let unkeyed = measure("sluice-unkeyed", &sluice_diff("plain"))?;
    let git = measure("git-diff", &|| {
        differ_ok(&["git", "diff", "--no-index", "--stat"])
    })?;
    let py = |script: &'static str| {
        let (first, second) = (first.clone(), second.clone());
        move || {
            let mut c = Command::new(python);
            c.arg(
                Path::new(env!("CARGO_MANIFEST_DIR"))
                    .join("tests/reference")
                    .join(script),
            )
            .arg(&first)
            .arg(&second)
            .arg("order_id");
            c
        }
    };
    let pandas = measure("pandas", &py("diff_pandas.py"))?;
    let polars = measure("polars", &py("diff_polars.py"))?;
    let rows = vec![
        Row {
            tool: "sluice compare, by key",
            key: "sluice_keyed",
            samples: keyed,
        },
        Row {
            tool: "sluice compare, by order",
            key: "sluice_unkeyed",
            samples: unkeyed,
        },
        Row {
            tool: "GNU diff",
            key: "gnu_diff",
            samples: gnu,
        },
        Row {
            tool: "git diff --no-index --stat",
            key: "git_diff_stat",
            samples: git,
        },
        Row {
            tool: "pandas outer merge",
            key: "pandas",
            samples: pandas,
        },
        Row {
            tool: "polars full join",
            key: "polars",
            samples: polars,
        },
    ];
    print_table(&rows, bytes);
    let by = |key: &str| {
        rows.iter()
            .find(|r| r.key == key)
            .expect("every tool measured")
    };
    let (k, u, g) = (by("sluice_keyed"), by("sluice_unkeyed"), by("gnu_diff"));
    let vs_gnu = g.median_secs() / k.median_secs();
    let vs_pandas = by("pandas").median_secs() / k.median_secs();
    let vs_polars = by("polars").median_secs() / k.median_secs();
    let unkeyed_vs_gnu = g.median_secs() / u.median_secs();
    let goals = vec![
        Goal {
            label: "GNU diff time / sluice by key".into(),
            value: vs_gnu,
            goal: ">= 2",
            pass: vs_gnu >= 2.0,
        },
        Goal {
            label: "pandas time / sluice by key".into(),
            value: vs_pandas,
            goal: ">= 10",
            pass: vs_pandas >= 10.0,
        },
        Goal {
            label: "GNU diff time / sluice by order".into(),
            value: unkeyed_vs_gnu,
            goal: ">= 1",
            pass: unkeyed_vs_gnu >= 1.0,
        },
    ];
    println!("  ratios:");
    for g in &goals {
        g.print();
    }
    println!("  (polars time / sluice by key = {vs_polars:.2}, for information)");
    let pass = goals.iter().all(|g| g.pass);
    let tools: serde_json::Map<String, Value> = rows
        .iter()
        .map(|r| (r.key.to_string(), r.json(bytes)))
        .collect();
    Ok((
        json!({
            "rows_first": rev.n_rows_first,
            "rows_second": rev.n_rows_second,
            "changed_rows": rev.changed_rows,
            "removed_rows": rev.removed_rows,
            "added_rows": rev.added_rows,
            "bytes": bytes,
            "tools": tools,
            "background_load_cores": background,
            "goals": goals.iter().map(Goal::json).collect::<Vec<_>>(),
            "all_goals_met": pass,
        }),
        pass,
    ))
}

// ---------------------------------------------------------------------------------------------
// The ops benchmark

/// The baselines' scripts, relative to the repository.
const OPS_PANDAS: &str = "examples/bench_ops_pandas.py";
const OPS_POLARS: &str = "examples/bench_ops_polars.py";
/// The sums pandas and polars compute in floating point agree with sluice's exact ones within
/// this (a cent).
const SUM_TOLERANCE: f64 = 0.01;
/// sluice's goals against the baselines, measured in the same run.
const OPS_PANDAS_SPEEDUP: f64 = 5.0;
const OPS_POLARS_SPEEDUP: f64 = 1.0;
const OPS_PEAK_MIB: f64 = 1024.0;
const OPS_PROVENANCE_PERCENT: f64 = 5.0;

/// The result of one cleaning, in the terms the three tools share: the rows left, and per
/// technician (in the order they first appear) the rows and the sum of parts_cost.
#[derive(Debug, Clone)]
struct Cleaned {
    rows: u64,
    totals: Vec<(String, u64, f64)>,
}

/// What one sluice run added to a fresh store, in bytes.
#[derive(Debug, Clone, Copy)]
struct Footprint {
    /// `lineage.db` (and `-wal`, if any) of the fresh store.
    db_fresh: u64,
    /// `lineage.db` after the run.
    db: u64,
    /// `lineage.db-wal` after the run (0 when SQLite removed it on closing).
    wal: u64,
    /// The steps' provenance objects (row maps, changed cells, drops), as the database lists
    /// them (kind `blob`).
    provenance_objects: u64,
    /// Every object file: the versions' bytes (the raw copy of the input among them), row
    /// indexes and provenance objects, as stored (compressed).
    objects: u64,
    /// The same objects uncompressed (what the earlier layout stored).
    objects_uncompressed: u64,
}

impl Footprint {
    /// The provenance stored for the run: how much the lineage database grew, plus the steps'
    /// provenance objects.
    fn provenance(&self) -> u64 {
        (self.db + self.wal).saturating_sub(self.db_fresh) + self.provenance_objects
    }

    fn json(&self) -> Value {
        json!({
            "lineage_db_fresh_bytes": self.db_fresh,
            "lineage_db_bytes": self.db,
            "lineage_wal_bytes": self.wal,
            "provenance_object_bytes": self.provenance_objects,
            "provenance_bytes": self.provenance(),
            "object_bytes": self.objects,
            "object_uncompressed_bytes": self.objects_uncompressed,
        })
    }
}

fn ops(ctx: &Ctx) -> Result<Value> {
    println!("== ops: a cleaning plan with sluice (run + retrieve) vs the same cleaning in pandas and polars ==");
    println!(
        "   trim every column, email to lower case, dedupe whole rows, parts_cost as a number,"
    );
    println!(
        "   drop status = 'cancelled', sum parts_cost per technician (the Quillby export has no"
    );
    println!("   shop column: all its rows are one shop's), cleaned CSV written out");
    let python = PathBuf::from(reference_python()?);
    let mut sizes = Vec::new();
    let mut all_pass = true;
    let mut all_agree = true;
    for n in ctx.rows_for(Bench::Ops) {
        for ten in [false, true] {
            let (size, pass, agree) = ops_size(ctx, &python, n, ten)?;
            sizes.push(size);
            all_pass &= pass;
            all_agree &= agree;
        }
    }
    println!(
        "ops: {}; {}",
        verdict(all_pass),
        if all_agree {
            "the three tools agree"
        } else {
            "the tools DISAGREE (see above)"
        }
    );
    Ok(with_header(
        ctx,
        "ops",
        json!({
        "python": python.display().to_string(),
        "runs_requested": ctx.runs,
        "notes": [
            "MB = 10^6 bytes of input; seconds are medians; peak memory is the largest ru_maxrss of the runs",
            "sluice: fresh store (sluice setup, not timed), then sluice run PLAN and sluice retrieve orders -o cleaned.csv, timed one after the other",
            "pandas and polars: examples/bench_ops_pandas.py and examples/bench_ops_polars.py, timed whole (interpreter start-up and imports included)",
            "the Quillby export has no shop column: the totals are per technician",
            "pandas and polars sum in floating point: their sums are compared with sluice's exact sums within 0.01",
            "provenance: growth of lineage.db plus lineage.db-wal over a fresh store's, after the run",
            "warm page cache; sync before every timed run",
        ],
        "all_goals_met": all_pass,
        "all_agree": all_agree,
        "sizes": sizes,
        }),
    ))
}

/// Measures the three tools on the file of `n` rows; prints the table, the checks and the
/// goals. Returns the figures, whether every goal was met and whether the tools agreed.
fn ops_size(ctx: &Ctx, python: &Path, n: u64, ten: bool) -> Result<(Value, bool, bool)> {
    let (file, bytes, background) = prepare_size(ctx, n)?;
    println!(
        "  the {} plan ({} rows)",
        if ten {
            "ten-step (six + case, replace, fill, rename before the summary)"
        } else {
            "six-step"
        },
        n
    );

    let mut run_alone = Vec::new();
    let mut footprints = Vec::new();
    let mut sluice_result = None;
    let whole = repeat(ctx.runs, |i| {
        let (whole, run, footprint, cleaned) = sluice_ops(ctx, &file, i, ten)?;
        run_alone.push(run);
        footprints.push(footprint);
        sluice_result.get_or_insert(cleaned);
        Ok(whole)
    })?;
    let baseline = |script: &str, key: &str| -> Result<(Vec<Sample>, Cleaned, String)> {
        let mut result = None;
        let samples = repeat(ctx.runs, |i| {
            let (s, cleaned, version) = python_ops(ctx, python, script, key, &file, i, ten)?;
            result.get_or_insert((cleaned, version));
            Ok(s)
        })?;
        let (cleaned, version) = result.ok_or_else(|| anyhow!("{script} never ran"))?;
        Ok((samples, cleaned, version))
    };
    let (pandas, pandas_result, pandas_version) = baseline(OPS_PANDAS, "pandas")?;
    let (polars, polars_result, polars_version) = baseline(OPS_POLARS, "polars")?;
    let sluice_result = sluice_result.ok_or_else(|| anyhow!("sluice never ran"))?;
    let footprint = *footprints
        .first()
        .ok_or_else(|| anyhow!("sluice never ran"))?;

    let rows = vec![
        Row {
            tool: "sluice run + retrieve (fresh store)",
            key: "sluice_run_cat",
            samples: whole,
        },
        Row {
            tool: "  of which sluice run",
            key: "sluice_run",
            samples: run_alone,
        },
        Row {
            tool: "pandas script",
            key: "pandas",
            samples: pandas,
        },
        Row {
            tool: "polars script",
            key: "polars",
            samples: polars,
        },
    ];
    println!("  baselines: pandas {pandas_version}, polars {polars_version} ({OPS_PANDAS}, {OPS_POLARS}, run by {})", python.display());
    print_table(&rows, bytes);

    let agree = ops_agree(
        &sluice_result,
        &[("pandas", &pandas_result), ("polars", &polars_result)],
    );
    print_footprint(&footprint, bytes);

    let goals = ops_goals(&rows, &footprint, bytes);
    println!("  goals:");
    for g in &goals {
        g.print();
    }
    let pass = goals.iter().all(|g| g.pass);
    let tools: serde_json::Map<String, Value> = rows
        .iter()
        .map(|r| (r.key.to_string(), r.json(bytes)))
        .collect();
    let cleaned_json = |c: &Cleaned| {
        json!({
            "rows": c.rows,
            "totals": c.totals.iter().map(|(t, count, sum)| json!({
                "technician": t, "count": count, "sum": sum,
            })).collect::<Vec<_>>(),
        })
    };
    let value = json!({
        "plan": if ten { "ten steps" } else { "six steps" },
        "rows": n,
        "bytes": bytes,
        "file": file.display().to_string(),
        "tools": tools,
        "library_versions": {"pandas": pandas_version, "polars": polars_version},
        "results": {
            "sluice": cleaned_json(&sluice_result),
            "pandas": cleaned_json(&pandas_result),
            "polars": cleaned_json(&polars_result),
        },
        "agree": agree,
        "store": footprint.json(),
        "provenance_percent_of_input": percent(footprint.provenance(), bytes),
        "objects_percent_of_input": percent(footprint.objects, bytes),
        "background_load_cores": background,
        "max_other_processes_cores": rows.iter().filter_map(Row::others_cores).reduce(f64::max),
        "goals": goals.iter().map(Goal::json).collect::<Vec<_>>(),
        "all_goals_met": pass,
    });
    Ok((value, pass, agree))
}

/// The plan the benchmark runs: `file` taken in as `orders`, cleaned, and summed per
/// technician into `totals`.
fn ops_plan(file: &Path, ten: bool) -> Value {
    let step = |clean: &str, settings: Value, reason: &str| json!({"dataset": "orders", "clean": clean, "settings": settings, "reason": reason});
    let mut steps = vec![
        step(
            "trim",
            json!({}),
            "the Quillby till pads names, addresses and amounts with spaces",
        ),
        step(
            "case",
            json!({"columns": ["email"], "to": "lower"}),
            "e-mail addresses are case-blind",
        ),
        step(
            "dedupe",
            json!({"keep": "first"}),
            "the till exports some orders twice",
        ),
        step(
            "number",
            json!({"columns": ["parts_cost"]}),
            "parts costs are written with euro signs and thousands commas",
        ),
        step(
            "drop",
            json!({"predicate": "status = 'cancelled'"}),
            "cancelled orders are not work done",
        ),
    ];
    if ten {
        // Four more row-by-row steps before the summary (the baselines' --ten does the same).
        steps.extend([
            step(
                "case",
                json!({"columns": ["service"], "to": "upper"}),
                "service codes in capitals",
            ),
            step(
                "replace",
                json!({"columns": ["opened"], "find": "-", "with": "/"}),
                "dates with slashes for the paper forms",
            ),
            step(
                "fill",
                json!({"columns": ["notes"], "value": "none"}),
                "no blank notes",
            ),
            step(
                "rename",
                json!({"columns": [{"from": "labour_hours", "to": "hours"}]}),
                "the ledger's name",
            ),
        ]);
    }
    let mut summary = step(
        "summarize",
        json!({"by": ["technician"], "aggregates": [{"func": "sum", "column": "parts_cost"}]}),
        "parts cost per technician",
    );
    summary["save_as"] = json!("totals");
    steps.push(summary);
    json!({
        "sluice_plan": sluice::plan::PLAN_FORMAT,
        "purpose": "Work orders of the Quillby shop cleaned and summed per technician (the ops benchmark)",
        "sources": [
            {"dataset": "orders", "file": file.display().to_string(), "reason": "the generated Quillby work-order export"},
        ],
        "steps": steps,
    })
}

// ---------------------------------------------------------------------------------------------
// The reproduce benchmark

/// Reproducing may cost this much more than the plain run it checks (a fraction).
const REPLAY_OVERHEAD: f64 = 0.10;

fn replay_bench(ctx: &Ctx) -> Result<Value> {
    println!("== reproduce: `sluice reproduce totals` (every step computed again, every hash checked) vs a plain `sluice run` of the same plan ==");
    println!("   the ops benchmark's plan and data: trim, case, dedupe, number, drop, summarize");
    let mut sizes = Vec::new();
    let mut all_pass = true;
    for n in ctx.rows_for(Bench::Reproduce) {
        let (size, pass) = replay_size(ctx, n)?;
        sizes.push(size);
        all_pass &= pass;
    }
    println!("reproduce: {}", verdict(all_pass));
    Ok(with_header(
        ctx,
        "reproduce",
        json!({
        "runs_requested": ctx.runs,
        "notes": [
            "seconds are medians; peak memory is the largest ru_maxrss of the runs",
            "plain run: sluice run PLAN in a fresh store (sluice setup not timed): intake of the raw file and six recorded steps",
            "reproduce: sluice reproduce totals --json in the store of the last plain run: the raw object re-hashed, every step computed again from it and its output and provenance hashes compared, nothing recorded",
            "warm page cache; sync before every timed run",
        ],
        "all_goals_met": all_pass,
        "sizes": sizes,
        }),
    ))
}

fn replay_size(ctx: &Ctx, n: u64) -> Result<(Value, bool)> {
    let (file, bytes, background) = prepare_size(ctx, n)?;
    let mut kept: Option<Scratch> = None;
    let run = repeat(ctx.runs, |i| {
        let scratch = Scratch::new(ctx, &format!("replay-run-{i}"))?;
        let store = scratch.0.join("store");
        sluice_init(ctx, &store)?;
        let plan = scratch.0.join("plan.json");
        fs::write(
            &plan,
            serde_json::to_string_pretty(&ops_plan(&file, false))? + "\n",
        )
        .with_context(|| format!("writing {}", plan.display()))?;
        let (sample, _) = run_measured(
            Command::new(&ctx.sluice)
                .arg("--store")
                .arg(&store)
                .arg("run")
                .arg(&plan)
                .envs(IDENTITY),
            &scratch.0.join("log-run"),
            "sluice run",
        )?;
        kept = Some(scratch);
        Ok(sample)
    })?;
    let scratch = kept.ok_or_else(|| anyhow!("sluice run never ran"))?;
    let store = scratch.0.join("store");
    let mut steps_checked = 0u64;
    let replay = repeat(ctx.runs, |i| {
        let (sample, out) = run_measured(
            Command::new(&ctx.sluice)
                .arg("--store")
                .arg(&store)
                .args(["reproduce", "totals", "--json"])
                .envs(IDENTITY),
            &scratch.0.join(format!("log-replay-{i}")),
            "sluice reproduce",
        )?;
        let report: Value =
            serde_json::from_str(&out.stdout).context("reading `sluice reproduce --json`")?;
        ensure!(
            report["reproduced"] == true,
            "sluice reproduce did not reproduce the plan's output:\n{}",
            out.stdout
        );
        steps_checked = report["steps"].as_array().map_or(0, |s| s.len() as u64);
        Ok(sample)
    })?;
    let rows = vec![
        Row {
            tool: "sluice run (fresh store)",
            key: "sluice_run",
            samples: run,
        },
        Row {
            tool: "sluice reproduce (hashes checked)",
            key: "sluice_replay",
            samples: replay,
        },
    ];
    print_table(&rows, bytes);
    println!("  reproduce checked {steps_checked} steps (the intake and every step of the plan) and reproduced them");
    let overhead = rows[1].median_secs() / rows[0].median_secs() - 1.0;
    let cpu_ratio = rows[1].median_cpu_secs() / rows[0].median_cpu_secs();
    println!("  reproduce CPU time / plain run CPU time = {cpu_ratio:.2} (moves less with the machine's load than the wall time)");
    let goals = vec![Goal {
        label: "reproduce time / plain run time - 1".into(),
        value: overhead,
        goal: "< 0.10",
        pass: overhead < REPLAY_OVERHEAD,
    }];
    println!("  goals:");
    for g in &goals {
        g.print();
    }
    let pass = goals.iter().all(|g| g.pass);
    let tools: serde_json::Map<String, Value> = rows
        .iter()
        .map(|r| (r.key.to_string(), r.json(bytes)))
        .collect();
    Ok((
        json!({
            "rows": n,
            "bytes": bytes,
            "file": file.display().to_string(),
            "tools": tools,
            "steps_checked": steps_checked,
            "overhead": overhead,
            "cpu_ratio": cpu_ratio,
            "background_load_cores": background,
            "max_other_processes_cores": rows.iter().filter_map(Row::others_cores).reduce(f64::max),
            "goals": goals.iter().map(Goal::json).collect::<Vec<_>>(),
            "all_goals_met": pass,
        }),
        pass,
    ))
}

/// A fresh store (not timed), then `sluice run PLAN` and `sluice retrieve orders -o cleaned.csv`
/// (timed). Returns the two timed together and the run alone, what the run added to the store,
/// and the result as read back from the store afterwards (not timed).
fn sluice_ops(
    ctx: &Ctx,
    file: &Path,
    run: u32,
    ten: bool,
) -> Result<(Sample, Sample, Footprint, Cleaned)> {
    let scratch = Scratch::new(ctx, &format!("ops-sluice-{run}"))?;
    let store = scratch.0.join("store");
    sluice_init(ctx, &store)?;
    let dot = store.join("sluice-store");
    let db = dot.join("lineage.db");
    let wal = dot.join("lineage.db-wal");
    let db_fresh = file_len(&db)? + file_len(&wal)?;
    let plan = scratch.0.join("plan.json");
    fs::write(
        &plan,
        serde_json::to_string_pretty(&ops_plan(file, ten))? + "\n",
    )
    .with_context(|| format!("writing {}", plan.display()))?;
    let sluice = |args: &[&std::ffi::OsStr]| {
        let mut cmd = Command::new(&ctx.sluice);
        cmd.arg("--store").arg(&store).args(args).envs(IDENTITY);
        cmd
    };
    let (run_sample, _) = run_measured(
        &mut sluice(&["run".as_ref(), plan.as_os_str()]),
        &scratch.0.join("log-run"),
        "sluice run",
    )?;
    let footprint = Footprint {
        db_fresh,
        db: file_len(&db)?,
        wal: file_len(&wal)?,
        provenance_objects: sluice::store::Store::open(&dot)
            .and_then(|s| s.lineage.objects())
            .context("listing the store's objects")?
            .iter()
            .filter(|(_, kind, _)| kind == "blob")
            .map(|(_, _, n)| n)
            .sum(),
        objects: object_files_bytes(&dot)?,
        objects_uncompressed: sluice::store::Store::open(&dot)
            .and_then(|s| s.lineage.objects())
            .context("listing the store's objects")?
            .iter()
            .map(|(_, _, n)| n)
            .sum(),
    };
    let cleaned_csv = scratch.0.join("cleaned.csv");
    let (cat_sample, _) = run_measured(
        &mut sluice(&[
            "retrieve".as_ref(),
            "orders".as_ref(),
            "-o".as_ref(),
            cleaned_csv.as_os_str(),
        ]),
        &scratch.0.join("log-cat"),
        "sluice retrieve",
    )?;

    // The result, read back from the store.
    let read = |args: &[&str], what: &str| -> Result<String> {
        let out = sluice(&args.iter().map(|a| a.as_ref()).collect::<Vec<_>>())
            .output()
            .with_context(|| format!("running sluice {what}"))?;
        ensure!(
            out.status.success(),
            "sluice {what} failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8(out.stdout).with_context(|| format!("reading sluice {what}'s output"))
    };
    let shown: Value = serde_json::from_str(&read(&["about", "orders", "--json"], "about")?)
        .context("reading `sluice about orders --json`")?;
    let rows = shown["version"]["n_rows"]
        .as_u64()
        .ok_or_else(|| anyhow!("no version.n_rows in `sluice about orders --json`"))?;
    let totals = sluice_totals(&read(&["retrieve", "totals"], "retrieve totals")?)?;
    Ok((
        then(run_sample, cat_sample),
        run_sample,
        footprint,
        Cleaned { rows, totals },
    ))
}

/// The rows of `technician,count,sum_parts_cost`, as sluice's summary writes them (no value
/// here needs quoting; one that does is refused rather than misread).
fn sluice_totals(csv: &str) -> Result<Vec<(String, u64, f64)>> {
    let mut lines = csv.lines();
    ensure!(
        lines.next() == Some("technician,count,sum_parts_cost"),
        "unexpected header in `sluice retrieve totals`: {csv:?}"
    );
    lines
        .map(|line| {
            let parts: Vec<&str> = line.split(',').collect();
            match parts.as_slice() {
                [t, count, sum] if !line.contains('"') => Ok((
                    t.to_string(),
                    count
                        .parse()
                        .with_context(|| format!("reading the count in {line:?}"))?,
                    sum.parse()
                        .with_context(|| format!("reading the sum in {line:?}"))?,
                )),
                _ => bail!("unexpected row in `sluice retrieve totals`: {line:?}"),
            }
        })
        .collect()
}

/// One of the baseline scripts on `file`, timed whole. Returns the sample, the result it
/// printed and the library's version.
fn python_ops(
    ctx: &Ctx,
    python: &Path,
    script: &str,
    key: &str,
    file: &Path,
    run: u32,
    ten: bool,
) -> Result<(Sample, Cleaned, String)> {
    let scratch = Scratch::new(ctx, &format!("ops-{key}-{run}"))?;
    let mut cmd = Command::new(python);
    cmd.arg(Path::new(env!("CARGO_MANIFEST_DIR")).join(script))
        .arg(file)
        .arg(scratch.0.join("cleaned.csv"));
    if ten {
        cmd.arg("--ten");
    }
    let (sample, out) = run_measured(&mut cmd, &scratch.0.join("log"), script)?;
    let v: Value = serde_json::from_str(out.stdout.trim())
        .with_context(|| format!("reading the result {script} printed: {:?}", out.stdout))?;
    let bad = || anyhow!("unexpected result from {script}: {v}");
    let totals = v["totals"]
        .as_array()
        .ok_or_else(bad)?
        .iter()
        .map(|t| {
            Some((
                t["technician"].as_str()?.to_string(),
                t["count"].as_u64()?,
                t["sum"].as_f64()?,
            ))
        })
        .collect::<Option<Vec<_>>>()
        .ok_or_else(bad)?;
    let cleaned = Cleaned {
        rows: v["rows"].as_u64().ok_or_else(bad)?,
        totals,
    };
    let version = v["version"].as_str().ok_or_else(bad)?.to_string();
    Ok((sample, cleaned, version))
}

/// Prints whether the baselines agree with sluice: the same number of cleaned rows, the same
/// technicians with the same row counts, and sums within [`SUM_TOLERANCE`] of sluice's exact
/// ones. A disagreement is printed as a finding, not an error.
fn ops_agree(sluice: &Cleaned, others: &[(&str, &Cleaned)]) -> bool {
    let mut agree = true;
    for (name, other) in others {
        let mut problems = Vec::new();
        if other.rows != sluice.rows {
            problems.push(format!(
                "{} cleaned rows, sluice {}",
                thousands(other.rows),
                thousands(sluice.rows)
            ));
        }
        if other.totals.len() != sluice.totals.len() {
            problems.push(format!(
                "{} technicians, sluice {}",
                other.totals.len(),
                sluice.totals.len()
            ));
        }
        let mut worst: f64 = 0.0;
        for (t, count, sum) in &sluice.totals {
            match other.totals.iter().find(|(o, _, _)| o == t) {
                None => problems.push(format!("no total for {t}")),
                Some((_, c, s)) => {
                    if c != count {
                        problems.push(format!("{t}: {c} rows, sluice {count}"));
                    }
                    let d = (s - sum).abs();
                    worst = worst.max(d);
                    if d > SUM_TOLERANCE {
                        problems.push(format!("{t}: sum {s}, sluice {sum}"));
                    }
                }
            }
        }
        if problems.is_empty() {
            println!(
                "  check: {name} agrees with sluice: {} cleaned rows, {} technicians with the same counts, sums within {SUM_TOLERANCE} (largest difference {worst:.2e}; {name} sums in floating point, sluice exactly)",
                thousands(sluice.rows),
                sluice.totals.len()
            );
        } else {
            agree = false;
            println!(
                "  FINDING: {name} and sluice disagree: {}",
                problems.join("; ")
            );
        }
    }
    let sums = sluice
        .totals
        .iter()
        .map(|(t, c, s)| format!("{t} {} rows {s:.2}", thousands(*c)))
        .collect::<Vec<_>>()
        .join(", ");
    println!("  sluice totals: {sums}");
    agree
}

fn print_footprint(f: &Footprint, bytes: u64) {
    println!(
        "  provenance stored for the run (growth of lineage.db + -wal, and provenance objects): {:.1} MB = {:.2}% of the input",
        f.provenance() as f64 / 1e6,
        percent(f.provenance(), bytes)
    );
    println!(
        "    (lineage.db {} -> {} bytes, lineage.db-wal {} bytes after the run, provenance objects {} bytes)",
        thousands(f.db_fresh),
        thousands(f.db),
        thousands(f.wal),
        thousands(f.provenance_objects)
    );
    println!(
        "  objects (every version's bytes and row index, and the provenance objects): {:.1} MB = {:.1}% of the input, the raw copy included; uncompressed they are {:.1} MB = {:.1}%",
        f.objects as f64 / 1e6,
        percent(f.objects, bytes),
        f.objects_uncompressed as f64 / 1e6,
        percent(f.objects_uncompressed, bytes)
    );
}

fn ops_goals(rows: &[Row], footprint: &Footprint, bytes: u64) -> Vec<Goal> {
    let by = |key: &str| {
        rows.iter()
            .find(|r| r.key == key)
            .expect("every tool measured")
    };
    let sluice = by("sluice_run_cat");
    let vs_pandas = by("pandas").median_secs() / sluice.median_secs();
    let vs_polars = by("polars").median_secs() / sluice.median_secs();
    let peak = sluice.peak_mib();
    let provenance = percent(footprint.provenance(), bytes);
    vec![
        Goal {
            label: "pandas time / sluice (run + retrieve) time".into(),
            value: vs_pandas,
            goal: ">= 5",
            pass: vs_pandas >= OPS_PANDAS_SPEEDUP,
        },
        Goal {
            label: "polars time / sluice (run + retrieve) time".into(),
            value: vs_polars,
            goal: ">= 1",
            pass: vs_polars >= OPS_POLARS_SPEEDUP,
        },
        Goal {
            label: "sluice peak memory, MiB".into(),
            value: peak,
            goal: "< 1024",
            pass: peak < OPS_PEAK_MIB,
        },
        Goal {
            label: "provenance, % of the input".into(),
            value: provenance,
            goal: "< 5",
            pass: provenance < OPS_PROVENANCE_PERCENT,
        },
    ]
}

/// Two runs one after the other, as one: times added, the larger peak, the rest of the
/// machine's load averaged over both.
fn then(a: Sample, b: Sample) -> Sample {
    let secs = a.secs + b.secs;
    let others_cores = match (a.others_cores, b.others_cores) {
        (Some(x), Some(y)) => Some((x * a.secs + y * b.secs) / secs),
        (x, y) => x.or(y),
    };
    Sample {
        secs,
        peak_kib: a.peak_kib.max(b.peak_kib),
        cpu_secs: a.cpu_secs + b.cpu_secs,
        others_cores,
    }
}

/// A file's length, 0 when it does not exist.
fn file_len(p: &Path) -> Result<u64> {
    match fs::metadata(p) {
        Ok(m) => Ok(m.len()),
        Err(e) if e.kind() == io::ErrorKind::NotFound => Ok(0),
        Err(e) => Err(e).with_context(|| format!("reading the size of {}", p.display())),
    }
}

/// The bytes of every file under `dir`.
fn tree_bytes(dir: &Path) -> Result<u64> {
    let mut total = 0;
    for e in fs::read_dir(dir).with_context(|| format!("listing {}", dir.display()))? {
        let e = e.with_context(|| format!("listing {}", dir.display()))?;
        let meta = e
            .metadata()
            .with_context(|| format!("reading {}", e.path().display()))?;
        total += if meta.is_dir() {
            tree_bytes(&e.path())?
        } else {
            meta.len()
        };
    }
    Ok(total)
}

fn percent(part: u64, whole: u64) -> f64 {
    100.0 * part as f64 / whole as f64
}

// ---------------------------------------------------------------------------------------------
// The trace benchmark

/// The sizes of the trace benchmark: the question is whether a trail costs the same at each.
const TRACE_ROWS: &[u64] = &[100_000, 1_000_000, 5_000_000];
/// Runs of each timed trail (per row picked); the median is reported.
const TRACE_RUNS: u32 = 21;
/// Where the traced rows lie, as fractions of the latest version's rows.
const TRACE_PICKS: &[f64] = &[0.0, 0.25, 0.5, 0.75, 1.0];
/// The columns traced: one that several steps changed, one cut from another column.
const TRACE_COLUMNS: &[&str] = &["parts_cost", "month"];
/// The steps the plan applies to `orders` before it summarizes it.
const TRACE_STEPS: usize = 20;
/// Goals: a whole `sluice trace` process under this, at every size ...
const TRACE_GOAL_MS: f64 = 50.0;
/// ... and no size more than this many times slower than another.
const TRACE_FLAT_RATIO: f64 = 1.5;
/// Goal: `sluice explain` of a group of about a million rows under this.
const EXPLAIN_GOAL_SECS: f64 = 2.0;
/// The explain goal is judged where the group has at most this many rows (larger groups are
/// shown for information).
const EXPLAIN_GOAL_GROUP: u64 = 1_250_000;

/// The plan that builds the history: `file` taken in as `orders`, twenty steps on it, each
/// changing cells, dropping rows or adding a column, then a summary by `shop`, a column made
/// constant on the way, so that the summary has one group holding nearly every row.
fn trace_plan(file: &Path) -> Value {
    // Each step written as the operation's name beside its settings, then placed in the plan's
    // form: `clean` names the operation, `settings` holds the rest.
    let step = |mut settings: Value, reason: &str| {
        let op = settings
            .as_object_mut()
            .and_then(|m| m.remove("op"))
            .expect("every step names its operation");
        json!({"dataset": "orders", "clean": op, "settings": settings, "reason": reason})
    };
    let mut steps = vec![
        step(
            json!({"op": "trim", "inner": true}),
            "the Quillby till pads values with spaces",
        ),
        step(
            json!({"op": "case", "columns": ["email"], "to": "lower"}),
            "e-mail addresses are case-blind",
        ),
        step(
            json!({"op": "case", "columns": ["status"], "to": "lower"}),
            "one spelling per status",
        ),
        step(
            json!({"op": "case", "columns": ["service"], "to": "title"}),
            "service names in title case",
        ),
        step(
            json!({"op": "replace", "columns": ["service"], "regex": true,
                   "find": "^(Flat Fix|Flat Repair|Puncture)$", "with": "Puncture Repair"}),
            "three names for one service",
        ),
        step(
            json!({"op": "number", "columns": ["parts_cost"]}),
            "parts costs are written with euro signs and thousands commas",
        ),
        step(
            json!({"op": "replace", "columns": ["parts_cost"], "regex": true,
                   "find": "^(-?[0-9]+\\.[0-9])$", "with": "${1}0"}),
            "amounts with cents written out",
        ),
        step(
            json!({"op": "replace", "columns": ["labour_hours"], "find": ",", "with": "."}),
            "some hours are written with a decimal comma",
        ),
        step(
            json!({"op": "fill", "columns": ["labour_hours"], "value": "0"}),
            "no hours booked is no hours",
        ),
        step(
            json!({"op": "date", "columns": ["opened"], "order": "mdy"}),
            "the till writes dates month first",
        ),
        step(
            json!({"op": "drop", "predicate": "status = 'test'"}),
            "test orders are not work done",
        ),
        step(
            json!({"op": "dedupe", "keep": "first"}),
            "the till exports some orders twice",
        ),
        step(
            json!({"op": "keep", "predicate": "parts_cost < 1000"}),
            "larger amounts are frame sales, reported apart",
        ),
        step(
            json!({"op": "rename", "columns": [{"from": "notes", "to": "remarks"}]}),
            "the cooperative's name for the column",
        ),
        step(
            json!({"op": "extract", "column": "opened", "into": "month", "from": 1, "len": 7}),
            "orders are reported by month",
        ),
        step(
            json!({"op": "split", "column": "customer", "on": " ", "into": ["given", "family"]}),
            "given and family names apart",
        ),
        step(
            json!({"op": "combine", "columns": ["family", "given"], "with": ", ", "into": "sort_name"}),
            "customers sorted by family name",
        ),
        step(
            json!({"op": "extract", "column": "order_id", "into": "shop", "regex": "^Q-[0-9]+$"}),
            "the shop, where the order number says it",
        ),
        step(
            json!({"op": "fill", "columns": ["shop"], "value": "Quillby"}),
            "every order of this export is Quillby's",
        ),
        step(
            json!({"op": "case", "columns": ["customer"], "to": "title"}),
            "customer names in title case",
        ),
    ];
    debug_assert_eq!(steps.len(), TRACE_STEPS);
    let mut summary = step(
        json!({"op": "summarize", "by": ["shop"],
               "aggregates": [{"func": "sum", "column": "parts_cost"}, {"func": "sum", "column": "labour_hours"}]}),
        "parts and hours of the shop",
    );
    summary["save_as"] = json!("summary");
    steps.push(summary);
    json!({
        "sluice_plan": sluice::plan::PLAN_FORMAT,
        "purpose": "Twenty cleaning steps on the Quillby work orders, then one summary (the trace benchmark)",
        "sources": [
            {"dataset": "orders", "file": file.display().to_string(), "reason": "the generated Quillby work-order export"},
        ],
        "steps": steps,
    })
}

fn trace_bench(ctx: &Ctx) -> Result<Value> {
    println!("== trace: sluice trace and sluice explain over a history of {TRACE_STEPS} steps ==");
    let mut sizes = Vec::new();
    let mut medians: Vec<(u64, Vec<f64>)> = Vec::new();
    let mut all_pass = true;
    for n in ctx.rows_for(Bench::Trace) {
        let (size, per_column, pass) = trace_size(ctx, n)?;
        sizes.push(size);
        medians.push((n, per_column));
        all_pass &= pass;
    }
    // Whether a trail costs the same at every size.
    let mut flat = Vec::new();
    if medians.len() > 1 {
        println!();
        println!("trace time across sizes (median ms):");
        for (c, column) in TRACE_COLUMNS.iter().enumerate() {
            let ms: Vec<f64> = medians.iter().map(|(_, m)| m[c]).collect();
            let shown = medians
                .iter()
                .map(|(n, m)| format!("{} rows {:.1}", thousands(*n), m[c]))
                .collect::<Vec<_>>()
                .join(", ");
            println!("  {column}: {shown}");
            let base = ms[0];
            for ((n, _), m) in medians.iter().zip(&ms).skip(1) {
                println!(
                    "    {} rows / {} rows = {:.2}",
                    thousands(*n),
                    thousands(medians[0].0),
                    m / base
                );
            }
            let (lo, hi) = ms.iter().fold((f64::INFINITY, 0.0f64), |(lo, hi), &m| {
                (lo.min(m), hi.max(m))
            });
            flat.push(Goal {
                label: format!("trace {column}: slowest / fastest size"),
                value: hi / lo,
                goal: "<= 1.5",
                pass: hi / lo <= TRACE_FLAT_RATIO,
            });
        }
        for g in &flat {
            g.print();
        }
        all_pass &= flat.iter().all(|g| g.pass);
    } else {
        println!("(one size only: whether the time grows with the rows is not judged)");
    }
    println!("trace: {}", verdict(all_pass));
    Ok(with_header(
        ctx,
        "trace",
        json!({
        "steps": TRACE_STEPS,
        "trace_runs_per_row": TRACE_RUNS.max(ctx.runs),
        "notes": [
            "the history (sluice run of a plan of 20 steps and a summary) is built once per size, not timed",
            "each trace and explain is one whole sluice process; seconds are medians, pooled over the rows picked",
            "warm page cache; sync before every timed run",
        ],
        "flat_goals": flat.iter().map(Goal::json).collect::<Vec<_>>(),
        "all_goals_met": all_pass,
        "sizes": sizes,
        }),
    ))
}

/// One column's trail from the latest version, as read once before timing.
struct TrailShape {
    hops: usize,
    changed: usize,
    end: String,
}

fn trail_shape(trail: &Value) -> Result<TrailShape> {
    let hops = trail["hops"]
        .as_array()
        .ok_or_else(|| anyhow!("no hops in `sluice trace --json`: {trail}"))?;
    let changed = hops
        .iter()
        .filter(|h| h["changed"].as_bool() == Some(true))
        .count();
    let end = &trail["end"];
    let end = match end["kind"].as_str() {
        Some("raw") => format!(
            "raw line {} {:?}",
            end["line"].as_u64().unwrap_or(0),
            end["raw_value"].as_str().unwrap_or("")
        ),
        Some(kind) => kind.to_string(),
        None => bail!("no end in `sluice trace --json`: {trail}"),
    };
    Ok(TrailShape {
        hops: hops.len(),
        changed,
        end,
    })
}

/// Builds the history of `n` rows, then times the trails and the explanations. Returns the
/// figures, the median trace time per column in ms (in [`TRACE_COLUMNS`] order) and whether
/// the goals at this size were met.
fn trace_size(ctx: &Ctx, n: u64) -> Result<(Value, Vec<f64>, bool)> {
    use std::ffi::OsStr;
    println!();
    let file = ensure_data(&ctx.data_dir, n)?;
    let bytes = fs::metadata(&file)
        .with_context(|| format!("reading {}", file.display()))?
        .len();
    println!(
        "{} rows, {:.1} MB ({bytes} bytes)",
        thousands(n),
        bytes as f64 / 1e6
    );
    let scratch = Scratch::new(ctx, &format!("trace-store-{n}"))?;
    let store = scratch.0.join("store");
    sluice_init(ctx, &store)?;
    let plan = scratch.0.join("plan.json");
    fs::write(
        &plan,
        serde_json::to_string_pretty(&trace_plan(&file))? + "\n",
    )
    .with_context(|| format!("writing {}", plan.display()))?;

    // The history: set-up, not timed, but its time is worth knowing.
    let mut run = Command::new(&ctx.sluice);
    run.arg("--store")
        .arg(&store)
        .arg("run")
        .arg(&plan)
        .arg("--json")
        .envs(IDENTITY);
    let (built, out) = run_measured(&mut run, &scratch.0.join("log-run"), "sluice run")?;
    let done: Value = serde_json::from_str(&out.stdout).context("reading `sluice run --json`")?;
    let applied: Vec<&Value> = done["done"]
        .as_array()
        .ok_or_else(|| anyhow!("no done list in `sluice run --json`"))?
        .iter()
        .filter(|d| d["kind"] == "clean")
        .collect();
    ensure!(
        done["completed"] == true
            && applied.len() == TRACE_STEPS + 1
            && applied.iter().all(|d| d["recorded"] == true),
        "the plan did not record {} steps and a summary: {}",
        TRACE_STEPS,
        out.stdout
    );
    let about = |reference: &str| -> Result<Value> {
        let text = sluice_quiet(ctx, &store, &["about", reference, "--json"].map(OsStr::new))?;
        serde_json::from_str(&text)
            .with_context(|| format!("reading `sluice about {reference} --json`"))
    };
    let latest = about("orders")?;
    let latest_rows = latest["version"]["n_rows"]
        .as_u64()
        .ok_or_else(|| anyhow!("no version.n_rows in `sluice about orders --json`"))?;
    let latest_label = format!("orders:v{}", latest["version"]["seq"].as_u64().unwrap_or(0));
    println!(
        "  history: {} steps and a summary built by `sluice run` in {:.1} s ({:.0} MiB peak); {latest_label} has {} rows × {} columns",
        TRACE_STEPS,
        built.secs,
        built.peak_kib as f64 / 1024.0,
        thousands(latest_rows),
        latest["version"]["n_cols"].as_u64().unwrap_or(0)
    );
    ensure!(latest_rows > 0, "the history left no rows to trace");

    // Rows spread over the table, the same at every run.
    let mut picks: Vec<u64> = TRACE_PICKS
        .iter()
        .map(|f| 1 + ((latest_rows - 1) as f64 * f).round() as u64)
        .collect();
    picks.dedup();

    // Each trail once, not timed: what it crosses.
    let mut shapes = Vec::new();
    for column in TRACE_COLUMNS {
        let row = picks[picks.len() / 2].to_string();
        let text = sluice_quiet(
            ctx,
            &store,
            &[
                "trace", "orders", "--row", &row, "--column", column, "--json",
            ]
            .map(OsStr::new),
        )?;
        let trail: Value = serde_json::from_str(&text).context("reading `sluice trace --json`")?;
        let shape = trail_shape(&trail)?;
        println!(
            "  trail of {column} at row {row}: {} hops, {} of them changed it, ends at {}",
            shape.hops, shape.changed, shape.end
        );
        shapes.push(shape);
    }

    // The summary's one group, checked once before timing.
    let summary_cells = ["count", "sum_parts_cost"];
    let mut group_rows = 0;
    for column in summary_cells {
        let text = sluice_quiet(
            ctx,
            &store,
            &[
                "explain", "summary", "--row", "1", "--column", column, "--json",
            ]
            .map(OsStr::new),
        )?;
        let e: Value = serde_json::from_str(&text).context("reading `sluice explain --json`")?;
        ensure!(
            e["agrees"] == true,
            "sluice explain does not agree with the stored {column}: {}",
            e["arithmetic"]
        );
        group_rows = e["contributing"]["rows"].as_u64().unwrap_or(0);
        println!(
            "  summary row 1, {column} = {}: {}; {} rows in the group, {} upstream steps listed",
            e["value"].as_str().unwrap_or(""),
            e["arithmetic"].as_str().unwrap_or(""),
            thousands(group_rows),
            e["upstream"].as_array().map_or(0, Vec::len)
        );
    }

    let background = background_load()?;
    match background {
        Some(c) if c > NOISY_CORES => println!(
            "WARNING: other processes use {c:.2} cores before timing starts: the times will be noisy"
        ),
        Some(c) => println!("background load before timing: {c:.2} cores"),
        None => {}
    }
    let sluice = |args: &[&str]| {
        let mut c = Command::new(&ctx.sluice);
        c.arg("--store").arg(&store).args(args).envs(IDENTITY);
        c
    };

    // The trails, timed: every row picked, TRACE_RUNS times each.
    let runs = TRACE_RUNS.max(ctx.runs);
    let mut trace_rows = Vec::new();
    let mut per_pick = Vec::new();
    for column in TRACE_COLUMNS {
        let mut samples = Vec::new();
        let mut medians = Vec::new();
        for &row in &picks {
            let row_text = row.to_string();
            let mut these = Vec::new();
            for i in 0..runs {
                let (s, _) = run_measured(
                    &mut sluice(&["trace", "orders", "--row", &row_text, "--column", column]),
                    &scratch.0.join(format!("log-trace-{column}-{row}-{i}")),
                    "sluice trace",
                )?;
                these.push(s);
            }
            medians.push((row, median(these.iter().map(|s| s.secs).collect())));
            samples.extend(these);
        }
        per_pick.push(medians);
        trace_rows.push(Row {
            tool: column,
            key: column,
            samples,
        });
    }
    let explain_rows: Vec<Row> = summary_cells
        .iter()
        .map(|column| -> Result<Row> {
            let samples = repeat(ctx.runs, |i| {
                let (s, _) = run_measured(
                    &mut sluice(&["explain", "summary", "--row", "1", "--column", column]),
                    &scratch.0.join(format!("log-explain-{column}-{i}")),
                    "sluice explain",
                )?;
                Ok(s)
            })?;
            Ok(Row {
                tool: column,
                key: column,
                samples,
            })
        })
        .collect::<Result<_>>()?;

    println!(
        "  {:<44} {:>5} {:>10} {:>10} {:>10} {:>9}",
        "command", "runs", "median ms", "max ms", "cpu ms", "peak MiB"
    );
    let line = |what: String, r: &Row| {
        let max = r.samples.iter().map(|s| s.secs).fold(0.0, f64::max);
        println!(
            "  {:<44} {:>5} {:>10.1} {:>10.1} {:>10.1} {:>9.1}",
            what,
            r.samples.len(),
            1e3 * r.median_secs(),
            1e3 * max,
            1e3 * r.median_cpu_secs(),
            r.peak_mib()
        );
    };
    for (r, medians) in trace_rows.iter().zip(&per_pick) {
        line(format!("trace {latest_label} --column {}", r.tool), r);
        let rows = medians
            .iter()
            .map(|(row, s)| format!("{} {:.1}", thousands(*row), 1e3 * s))
            .collect::<Vec<_>>()
            .join(", ");
        println!("    median ms by row: {rows}");
    }
    for r in &explain_rows {
        line(format!("explain summary:v1 --row 1 --column {}", r.tool), r);
    }
    let by_key = trace_by_key(ctx, &store, &scratch.0, picks.last().copied().unwrap_or(1))?;
    match &by_key {
        Ok((key, r)) => line(
            format!("trace --key {key} --column {}", TRACE_COLUMNS[0]),
            r,
        ),
        Err(why) => println!("  trace by key: not timed ({why})"),
    }
    if let Some(worst) = trace_rows
        .iter()
        .chain(&explain_rows)
        .filter_map(Row::others_cores)
        .reduce(f64::max)
    {
        if worst > NOISY_CORES_DURING {
            println!(
                "  WARNING: other processes used up to {worst:.2} cores during the timed runs: the times are noisy"
            );
        }
    }

    let mut goals: Vec<Goal> = trace_rows
        .iter()
        .map(|r| {
            let ms = 1e3 * r.median_secs();
            Goal {
                label: format!("trace {}, median ms", r.tool),
                value: ms,
                goal: "< 50",
                pass: ms < TRACE_GOAL_MS,
            }
        })
        .collect();
    let judged = group_rows <= EXPLAIN_GOAL_GROUP;
    for r in &explain_rows {
        let s = r.median_secs();
        let g = Goal {
            label: format!("explain {}, seconds", r.tool),
            value: s,
            goal: "< 2",
            pass: s < EXPLAIN_GOAL_SECS,
        };
        if judged {
            goals.push(g);
        } else {
            println!(
                "  explain {}: {:.2} s for a group of {} rows ({:.2} s per million rows; the goal is judged for groups of about a million)",
                r.tool,
                s,
                thousands(group_rows),
                s * 1e6 / group_rows.max(1) as f64
            );
        }
    }
    println!("  goals:");
    for g in &goals {
        g.print();
    }
    let pass = goals.iter().all(|g| g.pass);
    let trace_json: serde_json::Map<String, Value> = trace_rows
        .iter()
        .zip(&per_pick)
        .zip(&shapes)
        .map(|((r, medians), shape)| {
            let mut v = r.json(bytes);
            v["hops"] = json!(shape.hops);
            v["hops_that_changed_the_value"] = json!(shape.changed);
            v["end"] = json!(shape.end);
            v["median_seconds_by_row"] = json!(medians
                .iter()
                .map(|(row, s)| json!({"row": row, "seconds": s}))
                .collect::<Vec<_>>());
            (r.key.to_string(), v)
        })
        .collect();
    let explain_json: serde_json::Map<String, Value> = explain_rows
        .iter()
        .map(|r| (r.key.to_string(), r.json(bytes)))
        .collect();
    let median_ms: Vec<f64> = trace_rows.iter().map(|r| 1e3 * r.median_secs()).collect();
    let value = json!({
        "rows": n,
        "bytes": bytes,
        "file": file.display().to_string(),
        "history_build_seconds": built.secs,
        "history_build_peak_mib": built.peak_kib as f64 / 1024.0,
        "latest": latest_label,
        "latest_rows": latest_rows,
        "rows_traced": picks,
        "trace": trace_json,
        "explain_group_rows": group_rows,
        "explain": explain_json,
        "explain_goal_judged": judged,
        "trace_by_key": by_key.as_ref().ok().map(|(key, r)| {
            let mut v = r.json(bytes);
            v["key"] = json!(key);
            v
        }),
        "background_load_cores": background,
        "goals": goals.iter().map(Goal::json).collect::<Vec<_>>(),
        "all_goals_met": pass,
    });
    Ok((value, median_ms, pass))
}

/// A trail picked by key rather than by row (for information; the goal is judged by row): the
/// order id of data row `row` of the latest version, found again by `trace --key`, which
/// searches the version's bytes for it. `Err` with the reason when that id is not one row's.
fn trace_by_key(
    ctx: &Ctx,
    store: &Path,
    scratch: &Path,
    row: u64,
) -> Result<std::result::Result<(String, Row), String>> {
    let row_text = row.to_string();
    let id: Value = serde_json::from_str(&sluice_quiet(
        ctx,
        store,
        &[
            "trace", "orders", "--row", &row_text, "--column", "order_id", "--json",
        ]
        .map(std::ffi::OsStr::new),
    )?)?;
    let key = format!("order_id={}", id["value"].as_str().unwrap_or_default());
    let args = [
        "trace",
        "orders",
        "--key",
        &key,
        "--column",
        TRACE_COLUMNS[0],
    ];
    let probe = Command::new(&ctx.sluice)
        .arg("--store")
        .arg(store)
        .args(args)
        .envs(IDENTITY)
        .output()
        .context("running sluice trace --key")?;
    if !probe.status.success() {
        return Ok(Err(String::from_utf8_lossy(&probe.stderr)
            .trim()
            .to_string()));
    }
    let samples = repeat(TRACE_RUNS.max(ctx.runs), |i| {
        let mut c = Command::new(&ctx.sluice);
        c.arg("--store").arg(store).args(args).envs(IDENTITY);
        let (s, _) = run_measured(
            &mut c,
            &scratch.join(format!("log-trace-key-{i}")),
            "sluice trace --key",
        )?;
        Ok(s)
    })?;
    Ok(Ok((
        key,
        Row {
            tool: "by key",
            key: "by_key",
            samples,
        },
    )))
}

// ---------------------------------------------------------------------------------------------
/// The file of `n` rows made ready for timing (checked or generated, then read once), its size,
/// and the machine's load before timing, printed with a warning when it is too busy.
fn prepare_size(ctx: &Ctx, n: u64) -> Result<(PathBuf, u64, Option<f64>)> {
    println!();
    let file = ensure_data(&ctx.data_dir, n)?;
    let bytes = fs::metadata(&file)
        .with_context(|| format!("reading {}", file.display()))?
        .len();
    println!(
        "{} rows, {:.1} MB ({bytes} bytes)",
        thousands(n),
        bytes as f64 / 1e6
    );
    warm(&file)?;
    let background = background_load()?;
    match background {
        Some(c) if c > NOISY_CORES => println!(
            "WARNING: other processes use {c:.2} cores before timing starts: the times will be noisy"
        ),
        Some(c) => println!("background load before timing: {c:.2} cores"),
        None => {}
    }
    Ok((file, bytes, background))
}

/// `sluice setup STORE` (not timed): a fresh, empty store.
fn sluice_init(ctx: &Ctx, store: &Path) -> Result<()> {
    let status = Command::new(&ctx.sluice)
        .arg("setup")
        .arg(store)
        .envs(IDENTITY)
        .stdout(Stdio::null())
        .output()
        .context("running `sluice setup`")?;
    ensure!(
        status.status.success(),
        "`sluice setup {}` failed: {}",
        store.display(),
        String::from_utf8_lossy(&status.stderr)
    );
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// shared: recording throughput, SQLite against a PostgreSQL server

/// Rows of each small extract the writers receive (a nightly meter export).
const SHARED_ROWS: u64 = 200;
/// Steps recorded in each measurement, split among the writers.
const SHARED_STEPS: usize = 48;

/// A PostgreSQL cluster of the benchmark's own, on loopback, stopped when dropped.
struct BenchServer {
    bin: PathBuf,
    root: PathBuf,
    port: u16,
    as_nobody: bool,
}

impl BenchServer {
    fn user_cmd(&self, program: &str) -> Command {
        let path = self.bin.join(program);
        if self.as_nobody {
            let mut c = Command::new("runuser");
            c.args(["-u", "nobody", "--"]).arg(path);
            c
        } else {
            Command::new(path)
        }
    }

    fn start(dir: &Path) -> Result<BenchServer> {
        let mut found: Vec<(u32, PathBuf)> = fs::read_dir("/usr/lib/postgresql")
            .context("PostgreSQL is not installed: apt-get install postgresql")?
            .flatten()
            .filter_map(|e| {
                let v = e.file_name().to_str()?.parse::<u32>().ok()?;
                Some((v, e.path().join("bin")))
            })
            .filter(|(_, b)| b.join("initdb").is_file())
            .collect();
        found.sort();
        let bin = found
            .pop()
            .ok_or_else(|| anyhow!("no initdb under /usr/lib/postgresql"))?
            .1;
        let root = dir.join("pg");
        fs::create_dir_all(root.join("socket"))?;
        let as_nobody = std::env::var("USER").is_ok_and(|u| u == "root")
            || fs::read_to_string("/proc/self/status").is_ok_and(|s| {
                s.lines()
                    .any(|l| l.starts_with("Uid:") && l.split_whitespace().nth(1) == Some("0"))
            });
        if as_nobody {
            let st = Command::new("chown")
                .args(["-R", "nobody"])
                .arg(&root)
                .status()?;
            ensure!(st.success(), "chown of {} to nobody failed", root.display());
        }
        let port = std::net::TcpListener::bind("127.0.0.1:0")?
            .local_addr()?
            .port();
        let server = BenchServer {
            bin,
            root,
            port,
            as_nobody,
        };
        let out = server
            .user_cmd("initdb")
            .arg("-D")
            .arg(server.root.join("data"))
            .args([
                "-U",
                "bench",
                "--auth=trust",
                "-E",
                "UTF8",
                "--locale=C.UTF-8",
                "--no-sync",
            ])
            .output()?;
        ensure!(
            out.status.success(),
            "initdb: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        // The server keeps its default durability (fsync on): the figures are what a team's
        // server would do, on this machine's disk.
        let opts = format!(
            "-c listen_addresses=127.0.0.1 -p {} -k {} -c max_connections=40",
            server.port,
            server.root.join("socket").display()
        );
        let out = server
            .user_cmd("pg_ctl")
            .arg("-D")
            .arg(server.root.join("data"))
            .arg("-l")
            .arg(server.root.join("log"))
            .args(["-w", "-o", &opts, "start"])
            .output()?;
        ensure!(
            out.status.success(),
            "pg_ctl start: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        Ok(server)
    }

    /// A new empty database, and the connection string of a store on it.
    fn database(&self, name: &str) -> Result<String> {
        let out = Command::new(self.bin.join("psql"))
            .args([
                "-X",
                "-q",
                "-h",
                "127.0.0.1",
                "-U",
                "bench",
                "-d",
                "postgres",
            ])
            .arg("-p")
            .arg(self.port.to_string())
            .arg("-c")
            .arg(format!("CREATE DATABASE {name}"))
            .output()?;
        ensure!(
            out.status.success(),
            "psql: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        Ok(format!(
            "host=127.0.0.1 port={} dbname={name} user=bench",
            self.port
        ))
    }
}

impl Drop for BenchServer {
    fn drop(&mut self) {
        let _ = self
            .user_cmd("pg_ctl")
            .arg("-D")
            .arg(self.root.join("data"))
            .args(["-m", "fast", "-w", "stop"])
            .output();
    }
}

/// The one-minute load average, as the machine reports it.
fn load_average() -> f64 {
    fs::read_to_string("/proc/loadavg")
        .ok()
        .and_then(|s| s.split_whitespace().next().and_then(|v| v.parse().ok()))
        .unwrap_or(f64::NAN)
}

/// Steps per second of `writers` processes at once, each receiving its share of
/// [`SHARED_STEPS`] new extracts into the store at `project` (one dataset they all add
/// versions to, and one of each writer's own).
fn recording_rate(ctx: &Ctx, project: &Path, writers: usize) -> Result<f64> {
    let per = SHARED_STEPS / writers;
    let mut files = Vec::new();
    for w in 0..writers {
        let mut mine = Vec::new();
        for i in 0..per {
            let f = project.join(format!("w{w}_{i}.csv"));
            let mut text = String::from("reading_id,meter,kwh\n");
            for r in 0..SHARED_ROWS {
                text.push_str(&format!(
                    "R{w}-{i}-{r},M{},{}.{}\n",
                    r % 40,
                    100 + r,
                    (w + i) % 10
                ));
            }
            fs::write(&f, text)?;
            let dataset = if i % 2 == 0 {
                "meter_readings".to_string()
            } else {
                format!("depot_{w}")
            };
            mine.push((f, dataset));
        }
        files.push(mine);
    }
    let started = Instant::now();
    let handles: Vec<_> = files
        .into_iter()
        .map(|mine| {
            let sluice = ctx.sluice.clone();
            let store = project.join("sluice-store");
            std::thread::spawn(move || -> Result<()> {
                for (f, dataset) in mine {
                    let out = Command::new(&sluice)
                        .arg("--store")
                        .arg(&store)
                        .arg("receive")
                        .arg(&f)
                        .args(["--as", &dataset, "--why", "nightly meter export"])
                        .envs(IDENTITY)
                        .output()?;
                    ensure!(
                        out.status.success(),
                        "receive: {}",
                        String::from_utf8_lossy(&out.stderr)
                    );
                }
                Ok(())
            })
        })
        .collect();
    for h in handles {
        h.join()
            .map_err(|_| anyhow!("a writer thread panicked"))??;
    }
    Ok((per * writers) as f64 / secs(started.elapsed()))
}

fn shared_bench(ctx: &Ctx) -> Result<serde_json::Value> {
    println!("\n== shared: recording throughput, lineage on PostgreSQL against SQLite ==");
    let dir = ctx.tmp_dir.join("shared");
    fs::create_dir_all(&dir)?;
    let server = BenchServer::start(&dir)?;
    println!(
        "{} steps per measurement (`sluice receive` of a {SHARED_ROWS}-row extract, one process each), median of {} runs; load average {:.2} at the start",
        SHARED_STEPS,
        ctx.runs,
        load_average()
    );
    println!("writers  SQLite steps/s  PostgreSQL steps/s  PostgreSQL/SQLite  load average");
    let mut rows = Vec::new();
    let mut n = 0;
    for writers in [1usize, 4, 8] {
        let (mut lite, mut pg) = (Vec::new(), Vec::new());
        for _ in 0..ctx.runs {
            // Same run: each SQLite measurement is followed by its PostgreSQL one.
            n += 1;
            let local = dir.join(format!("lite{n}"));
            let out = Command::new(&ctx.sluice)
                .arg("setup")
                .arg(&local)
                .envs(IDENTITY)
                .output()?;
            ensure!(
                out.status.success(),
                "setup: {}",
                String::from_utf8_lossy(&out.stderr)
            );
            lite.push(recording_rate(ctx, &local, writers)?);
            let conn = server.database(&format!("bench{n}"))?;
            let shared = dir.join(format!("pg{n}"));
            let out = Command::new(&ctx.sluice)
                .arg("setup")
                .arg(&shared)
                .args(["--lineage-server", &conn])
                .envs(IDENTITY)
                .output()?;
            ensure!(
                out.status.success(),
                "setup: {}",
                String::from_utf8_lossy(&out.stderr)
            );
            pg.push(recording_rate(ctx, &shared, writers)?);
            fs::remove_dir_all(&local)?;
            fs::remove_dir_all(&shared)?;
        }
        let (l, p) = (median(lite), median(pg));
        let load = load_average();
        println!(
            "{writers:>7}  {l:>14.1}  {p:>18.1}  {:>17.2}x  {load:>12.2}",
            p / l
        );
        rows.push(serde_json::json!({
            "writers": writers, "sqlite_steps_per_s": l, "postgres_steps_per_s": p,
            "ratio": p / l, "load_average": load,
        }));
    }
    drop(server);
    let _ = fs::remove_dir_all(&dir);
    Ok(
        serde_json::json!({ "steps": SHARED_STEPS, "rows_per_extract": SHARED_ROWS, "results": rows }),
    )
}

// ---------------------------------------------------------------------------------------------
// Small helpers

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    match n {
        0 => f64::NAN,
        _ if n % 2 == 1 => v[n / 2],
        _ => (v[n / 2 - 1] + v[n / 2]) / 2.0,
    }
}

fn secs(d: Duration) -> f64 {
    d.as_secs_f64()
}

fn thousands(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

// ---------------------------------------------------------------------------------------------
// bucket-trace: trails with the objects in a bucket, cold and warm read cache, against a folder

/// Runs per row and way of reading.
const BUCKET_TRACE_RUNS: u32 = 11;

/// The S3-compatible server of tests/reference/s3server.sh, stopped when dropped.
struct S3Server {
    dir: PathBuf,
    endpoint: String,
}

impl S3Server {
    fn start(dir: &Path) -> Result<S3Server> {
        let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/s3server.sh");
        let out = Command::new(&script)
            .arg("start")
            .arg(dir)
            .stderr(Stdio::inherit())
            .output()
            .with_context(|| format!("running {}", script.display()))?;
        let text = String::from_utf8_lossy(&out.stdout);
        let endpoint = text
            .trim()
            .strip_prefix("export SLUICE_TEST_S3_ENDPOINT=")
            .map(str::to_string);
        match (out.status.success(), endpoint) {
            (true, Some(endpoint)) => Ok(S3Server {
                dir: dir.to_path_buf(),
                endpoint,
            }),
            _ => bail!("could not start the S3-compatible server: {text}"),
        }
    }
}

impl Drop for S3Server {
    fn drop(&mut self) {
        let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/s3server.sh");
        let _ = Command::new(script).arg("stop").arg(&self.dir).status();
    }
}

/// The steward's test keys (tests/reference/s3_identities.json).
fn s3_steward() -> Result<(String, String)> {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/s3_identities.json");
    let v: Value = serde_json::from_str(&fs::read_to_string(&path)?)?;
    let users = v["identities"].as_array().cloned().unwrap_or_default();
    let c = users
        .iter()
        .find(|u| u["name"] == "steward")
        .map(|u| u["credentials"][0].clone())
        .ok_or_else(|| anyhow!("no steward in {}", path.display()))?;
    Ok((
        c["accessKey"].as_str().unwrap_or("").to_string(),
        c["secretKey"].as_str().unwrap_or("").to_string(),
    ))
}

fn bucket_trace_bench(ctx: &Ctx) -> Result<Value> {
    use rusty_s3::S3Action;
    println!("== bucket-trace: sluice trace with the objects in a bucket (cold and warm read cache) against a folder ==");
    let scratch = Scratch::new(ctx, "bucket-trace")?;
    let server = S3Server::start(&scratch.0.join("server"))?;
    let (key, secret) = s3_steward()?;
    let creds = rusty_s3::Credentials::new(key.clone(), secret.clone());
    let bucket_name = "sluice-bench-trace";
    let bucket = rusty_s3::Bucket::new(
        server.endpoint.parse()?,
        rusty_s3::UrlStyle::Path,
        bucket_name,
        "us-east-1",
    )?;
    let create = rusty_s3::actions::CreateBucket::new(&bucket, &creds);
    let agent: ureq::Agent = ureq::Agent::config_builder()
        .http_status_as_error(false)
        .build()
        .into();
    let r = agent
        .put(create.sign(Duration::from_secs(600)).as_str())
        .send(create.body())?;
    ensure!(
        r.status().is_success(),
        "creating the bucket: {}",
        r.status()
    );
    let url = format!("{}/{bucket_name}", server.endpoint);
    let aws = [
        ("AWS_ACCESS_KEY_ID", key.as_str()),
        ("AWS_SECRET_ACCESS_KEY", secret.as_str()),
        ("AWS_REGION", "us-east-1"),
    ];

    let mut sizes = Vec::new();
    for n in ctx.rows_for(Bench::BucketTrace) {
        println!();
        let file = ensure_data(&ctx.data_dir, n)?;
        println!(
            "{} rows, {:.1} MB",
            thousands(n),
            file_len(&file)? as f64 / 1e6
        );
        let plan = scratch.0.join(format!("plan-{n}.json"));
        fs::write(
            &plan,
            serde_json::to_string_pretty(&trace_plan(&file))? + "\n",
        )?;
        let local = scratch.0.join(format!("local-{n}"));
        let shared = scratch.0.join(format!("bucket-{n}"));
        sluice_init(ctx, &local)?;
        let status = Command::new(&ctx.sluice)
            .arg("setup")
            .arg(&shared)
            .arg("--object-bucket")
            .arg(format!("{url}/rows-{n}"))
            .envs(IDENTITY)
            .envs(aws)
            .stdout(Stdio::null())
            .status()?;
        ensure!(status.success(), "sluice setup --object-bucket failed");
        let mut built = Vec::new();
        for store in [&local, &shared] {
            let mut run = Command::new(&ctx.sluice);
            run.arg("--store")
                .arg(store)
                .arg("run")
                .arg(&plan)
                .envs(IDENTITY)
                .envs(aws);
            let (s, _) = run_measured(&mut run, &scratch.0.join("log-run"), "sluice run")?;
            built.push(s.secs);
        }
        println!(
            "  history of {TRACE_STEPS} steps and a summary built by `sluice run` in {:.1} s in the folder, {:.1} s with the bucket (set-up, shown for information)",
            built[0], built[1]
        );
        let about = sluice_quiet(
            ctx,
            &local,
            &["about", "orders", "--json"].map(std::ffi::OsStr::new),
        )?;
        let rows = serde_json::from_str::<Value>(&about)?["version"]["n_rows"]
            .as_u64()
            .unwrap_or(1);
        let picks: Vec<u64> = TRACE_PICKS
            .iter()
            .map(|f| 1 + ((rows - 1) as f64 * f).round() as u64)
            .collect();
        let trace = |store: &Path, row: u64| {
            let mut c = Command::new(&ctx.sluice);
            c.arg("--store")
                .arg(store)
                .args([
                    "trace",
                    "orders",
                    "--row",
                    &row.to_string(),
                    "--column",
                    "parts_cost",
                ])
                .envs(IDENTITY)
                .envs(aws);
            c
        };
        // The same trail from both stores, once, before timing.
        for &row in &picks {
            let a = trace(&local, row).output()?;
            let b = trace(&shared, row).output()?;
            ensure!(
                a.status.success() && b.status.success(),
                "trace of row {row} failed: {}",
                String::from_utf8_lossy(&b.stderr)
            );
            // The two histories were recorded at other moments: times masked.
            let body = |o: &std::process::Output| {
                String::from_utf8_lossy(&o.stdout)
                    .split(' ')
                    .map(|w| {
                        if w.len() >= 20 && w.as_bytes()[0].is_ascii_digit() && w.contains('T') {
                            "TIME"
                        } else {
                            w
                        }
                    })
                    .collect::<Vec<_>>()
                    .join(" ")
            };
            ensure!(body(&a) == body(&b), "row {row}: the trails differ");
        }
        let background = background_load()?;
        if let Some(c) = background {
            println!("background load before timing: {c:.2} cores");
        }
        let cache = shared.join("sluice-store").join("cache");
        let mut ways: Vec<(&str, Vec<Sample>)> = Vec::new();
        for way in ["folder", "bucket, cold cache", "bucket, warm cache"] {
            let mut samples = Vec::new();
            for &row in &picks {
                let store = if way == "folder" { &local } else { &shared };
                if way == "bucket, warm cache" {
                    trace(store, row).output()?;
                }
                for i in 0..BUCKET_TRACE_RUNS.max(ctx.runs) {
                    if way == "bucket, cold cache" && cache.exists() {
                        fs::remove_dir_all(&cache)?;
                    }
                    let (s, _) = run_measured(
                        &mut trace(store, row),
                        &scratch.0.join(format!("log-trace-{i}")),
                        "sluice trace",
                    )?;
                    samples.push(s);
                }
            }
            ways.push((way, samples));
        }
        let ms = |v: &[Sample]| median(v.iter().map(|s| s.secs * 1e3).collect());
        let base = ms(&ways[0].1);
        let mut results = Vec::new();
        for (way, samples) in &ways {
            let m = ms(samples);
            println!(
                "  {way:<20} median {m:7.1} ms per trace  ({:.2}x the folder)",
                m / base
            );
            results.push(json!({"way": way, "median_ms": m, "ratio_to_folder": m / base, "runs": samples.len()}));
        }
        println!(
            "  cache after the warm runs: {} bytes",
            fs::read_dir(&cache)
                .map(|d| d
                    .flatten()
                    .filter_map(|e| e.metadata().ok())
                    .map(|m| m.len())
                    .sum::<u64>())
                .unwrap_or(0)
        );
        sizes.push(json!({"rows": n, "rows_picked": picks, "background_cores": background, "ways": results}));
    }
    drop(server);
    Ok(with_header(
        ctx,
        "bucket-trace",
        json!({
            "notes": [
                "the server is SeaweedFS on loopback (tests/reference/s3server.sh): no network latency, so the figures are the requests' and the server's own cost",
                "each trace is one whole sluice process; medians over every row picked",
                "cold: sluice-store/cache/ removed before each run; warm: after one untimed run of the same row",
            ],
            "sizes": sizes,
        }),
    ))
}
