//! The command line as the user types it (clap definitions). These structs stay close to what
//! was typed; `cli::run` turns them into the engine's validated options.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand, ValueEnum};

#[derive(Debug, Parser)]
#[command(
    name = "sluice",
    version,
    about = "Keeps the provenance of cleaned data: every version by content hash, every step in a lineage graph",
    long_about = "sluice records every version of a dataset by the BLAKE3 hash of its bytes and every \
                  transform as a step in a lineage graph, so that a cleaned value can be traced back \
                  to the raw line it came from.\n\n\
                  Exit codes: 0 success; 1 the data, the store or the system failed (verify found damage, \
                  an inspection at a hold point failed, a reproduction differed, the disk is full); 2 a usage or input error \
                  (bad arguments, a refused file, an unknown version, no store). `sluice capture` passes on \
                  a failing command's own status.",
    after_help = "Start with `sluice demo` to see a worked example, or `sluice setup` in a project folder."
)]
pub struct Cli {
    /// The store to use (a project folder or its sluice-store folder); by default the
    /// sluice-store folder in the working directory or the nearest parent that has one
    #[arg(long, global = true, env = "SLUICE_STORE", value_name = "PATH")]
    pub store: Option<PathBuf>,

    /// Who is acting, by name; default: SLUICE_PERSON, then the store's setting
    /// (`sluice identity`), then the operating system user
    #[arg(long, global = true, value_name = "NAME")]
    pub person: Option<String>,

    /// The acting person's e-mail address; default: SLUICE_EMAIL, then the store's setting
    #[arg(long, global = true, value_name = "ADDRESS")]
    pub email: Option<String>,

    /// When to colour the output: auto (only on a terminal, and not when NO_COLOR is set),
    /// always, or never
    #[arg(
        long,
        global = true,
        value_enum,
        default_value = "auto",
        value_name = "WHEN"
    )]
    pub color: ColorArg,

    /// The most one record of a file taken in may hold, header included, in MiB (default 32);
    /// a longer record is refused with its line and byte, so a hostile file cannot fill memory
    #[arg(long, global = true, value_name = "MIB", value_parser = clap::value_parser!(u64).range(1..=65536))]
    pub max_record_mib: Option<u64>,

    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Set up a store (a sluice-store folder) in a project folder
    #[command(after_help = "Example:\n  sluice setup work/q3-orders")]
    Setup {
        /// The project folder (default: the folder --store names, else the working directory)
        dir: Option<PathBuf>,
        /// Keep the lineage on this PostgreSQL server (a connection string such as
        /// `host=db.example port=5432 dbname=lineage user=ada`, without a password: that stays
        /// in ~/.pgpass, PGPASSFILE or PGPASSWORD)
        #[arg(long, value_name = "CONN")]
        lineage_server: Option<String>,
        /// Keep the objects in an S3-compatible bucket, http(s)://HOST[:PORT]/BUCKET[/PREFIX]
        /// (credentials: AWS_ACCESS_KEY_ID and AWS_SECRET_ACCESS_KEY, or the AWS credentials file)
        #[arg(long, value_name = "URL")]
        object_bucket: Option<String>,
    },

    /// Record a file as a new version of a dataset
    #[command(
        after_help = "Example:\n  sluice receive exports/quillby_2026q3.csv --as quillby_orders --key order_id \\\n      --null-token NA --why \"Q3 export from the Quillby till\""
    )]
    Receive(ReceiveArgs),

    /// Clean a version with one built-in operation, recording every changed cell
    #[command(
        after_help = "Examples:\n  sluice clean quillby_orders trim --inner --why \"the till pads names with spaces\"\n  sluice clean quillby_orders case --columns email --to lower --why \"e-mail addresses are case-blind\""
    )]
    Clean(CleanArgs),

    /// Inspect a version against declared rules and record the results on it
    #[command(
        after_help = "Rules file (schema/rules.schema.json), rules by data-quality dimension:\n  {\"sluice_rules\": 2, \"rules\": [\n    \
        {\"dimension\": \"completeness\", \"columns\": [\"order_id\"]},\n    {\"dimension\": \"uniqueness\", \"columns\": [\"order_id\"]},\n    \
        {\"dimension\": \"validity\", \"column\": \"parts_cost\", \"at_least\": \"0\", \"at_most\": \"5000\"},\n    \
        {\"dimension\": \"validity\", \"column\": \"order_id\", \"length_at_least\": 5, \"length_at_most\": 5},\n    \
        {\"dimension\": \"validity\", \"column\": \"email\", \"pattern\": \"[^@ ]+@[^@ ]+\"},\n    \
        {\"dimension\": \"validity\", \"column\": \"status\", \"one_of\": [\"done\", \"open\"]}\n  ]}\n\n\
        Example:\n  sluice inspect quillby_orders --rules rules.json\n\nExit code 0 when every rule passes, 1 when one fails."
    )]
    Inspect {
        /// The version: NAME (latest), NAME:vN or blake3:HEX
        reference: String,
        /// The rules file (JSON)
        #[arg(long, value_name = "FILE")]
        rules: PathBuf,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },

    /// Run a plan: take in its inputs, then record each of its steps in order
    #[command(
        after_help = "A plan is a JSON file listing steps (format: README.md, \"Plans\", and schema/plan.schema.json).\n\n\
        Examples:\n  sluice run plans/q3-cleaning.json\n  sluice run plans/q3-cleaning.json --input quillby_orders=exports/quillby_2026q4.csv\n  \
        sluice run plans/q3-cleaning.json --input quillby_orders=quillby_orders:v1\n\n\
        A failing step stops the run; the steps before it stay recorded and are listed. Exit code 1 when a step or an \
        inspection at a hold point fails on the data, 2 for a usage or input error."
    )]
    Run {
        /// The plan file (JSON)
        plan: PathBuf,
        /// Take input NAME from a file, or bind it to a stored version (NAME:vN, blake3:HEX),
        /// instead of the plan's file; repeatable
        #[arg(long = "input", value_name = "NAME=FILE|REF")]
        inputs: Vec<String>,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },

    /// Write what produced a version in another form: the plan that remakes it from raw data,
    /// or its lineage in the W3C PROV data model
    #[command(
        after_help = "Examples:\n  sluice export quillby_orders --format plan -o plans/q3-cleaning.json\n  \
        sluice export q3_by_shop --format prov-json -o q3_by_shop.prov.json\n  sluice export q3_by_shop --format prov-n\n\n\
        The plan's input files are written relative to the folder of the -o file (or of the working directory). \
        In PROV, versions are entities, steps activities, people and sluice agents."
    )]
    Export {
        /// The version: NAME (latest), NAME:vN or blake3:HEX
        reference: String,
        /// The form to write
        #[arg(long, value_enum)]
        format: ExportFormat,
        /// Write to this file instead of standard output
        #[arg(short = 'o', long = "output", value_name = "FILE")]
        output: Option<PathBuf>,
    },

    /// Write a lineage report of a version for reviewers and auditors: every step from its raw
    /// inputs (who, when, why, what), checks, data quality before and after, hashes, and a
    /// verification made now; the report's hash is recorded in the audit log
    #[command(
        after_help = "Examples:\n  sluice report q3_by_shop -o q3_by_shop-report.html\n  \
        sluice report q3_by_shop --format md -o q3_by_shop-report.md --reproduce\n\n\
        The format follows the -o file's extension (.html, .md, .json) unless --format is given. \
        The report documents what was recorded; it is not legal or regulatory advice."
    )]
    Report(ReportArgs),

    /// Which recorded version or report is this file? Hashes it and looks the hash up among
    /// the versions and the reports recorded in the audit chain
    #[command(
        after_help = "Examples:\n  sluice identify q3_by_shop-report.html\n  sluice identify exports/quillby_2026q3.csv\n\n\
        Exit code 0 when the file is recorded, 1 when it is not (changed after it was written, or from another store)."
    )]
    Identify {
        /// The file to look up
        file: PathBuf,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },

    /// Where a cell's value came from: its trail back to the raw file and line
    #[command(
        after_help = "Examples:\n  sluice trace all_orders --row 12 --column customer\n  \
        sluice trace all_orders --key order_id=41012 --column parts_cost --json\n\n\
        Newest step first; steps that left the value alone are folded into one line. A derived column \
        branches to every column it was made from; a looked-up column continues in the looked-up table."
    )]
    Trace {
        /// The version: NAME (latest), NAME:vN or blake3:HEX
        reference: String,
        /// The 1-based data row, as `sluice retrieve` shows it (the header not counted)
        #[arg(
            long,
            value_name = "N",
            conflicts_with = "key",
            required_unless_present = "key"
        )]
        row: Option<u64>,
        /// The row whose columns hold these values, e.g. order_id=41012
        #[arg(long, value_name = "COL=VAL[,COL=VAL..]", value_delimiter = ',')]
        key: Vec<String>,
        /// The column
        #[arg(long, value_name = "COL")]
        column: String,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },

    /// Why a total is what it is: the rows a summary cell aggregates, its arithmetic, and what
    /// earlier steps dropped or changed
    #[command(
        after_help = "Examples:\n  sluice explain q3_by_shop --row 1 --column sum_parts_cost\n  \
        sluice explain by_species --key species=Adelie --column count --json\n\n\
        The aggregate is computed again from the stored input and checked against the stored value. \
        A row an earlier step dropped counts for the group when its group columns, as they were where \
        it was dropped, hold the group's values; drops made before a group column existed are counted \
        as undecided."
    )]
    Explain {
        /// The summary version: NAME (latest), NAME:vN or blake3:HEX
        reference: String,
        /// The 1-based data row of the summary
        #[arg(
            long,
            value_name = "N",
            conflicts_with = "key",
            required_unless_present = "key"
        )]
        row: Option<u64>,
        /// The summary row whose columns hold these values, e.g. shop=Oxwater
        #[arg(long, value_name = "COL=VAL[,COL=VAL..]", value_delimiter = ',')]
        key: Vec<String>,
        /// The summary column: count, or an aggregate such as sum_parts_cost
        #[arg(long, value_name = "COL")]
        column: String,
        /// How many rows to list (contributing rows, and dropped rows per reason)
        #[arg(long, value_name = "N", default_value_t = 10)]
        limit: usize,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },

    /// Every version and step that depends on a version (what a wrong raw file affects)
    #[command(after_help = "Example:\n  sluice impact quillby_orders:v1")]
    Impact {
        /// The version: NAME (latest), NAME:vN or blake3:HEX
        reference: String,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },

    /// Draw the lineage graph (versions and steps) as Graphviz DOT text or as SVG
    #[command(
        after_help = "Examples:\n  sluice lineage --format svg -o lineage.svg\n  sluice lineage q3_by_shop --format dot | dot -Tpng > q3.png\n\n\
        With a version, only what it comes from and what depends on it. The SVG is laid out by sluice itself \
        (no outside program needed); latest versions are drawn in blue."
    )]
    Lineage {
        /// Only the part around this version
        reference: Option<String>,
        /// The form to write
        #[arg(long, value_enum, default_value = "dot")]
        format: LineageFormat,
        /// Write to this file instead of standard output
        #[arg(short = 'o', long = "output", value_name = "FILE")]
        output: Option<PathBuf>,
    },

    /// Compute a version again from its raw ancestors and check every step gives its recorded bytes
    #[command(
        after_help = "Examples:\n  sluice reproduce q3_by_shop\n  sluice reproduce reviewed_orders --allow-exec\n\n\
        Built-in steps are run again on their recorded inputs (nothing is recorded); an intermediate object \
        missing from the store is restored when the recomputed bytes have its hash. Hand edits are re-applied \
        from their recorded row map, changed cells and dropped rows. Outside commands run again only with \
        --allow-exec, each in a temporary checkout of its recorded commit; without it nothing recorded in the \
        store is executed. The first step whose output differs stops the reproduction with a summary of the \
        difference. Exit code 0 when every step was shown to give its recorded bytes, 1 otherwise."
    )]
    Reproduce {
        /// The version: NAME (latest), NAME:vN or blake3:HEX
        reference: String,
        /// Run the recorded outside commands again, each in a temporary checkout of the git commit
        /// it was recorded at (the command lines are listed before anything runs)
        #[arg(long)]
        allow_exec: bool,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },

    /// Run the chain of steps that made a version again on new raw data (next quarter's export)
    #[command(
        after_help = "Example:\n  sluice rerun q3_by_shop --with quillby_orders=exports/quillby_2026q4.csv --why \"Q4 export\"\n\n\
        The file is received as the next version of dataset NAME and every step is recorded again on it, \
        each naming the step it repeats. Exit codes as for `sluice run`."
    )]
    Rerun {
        /// The version whose chain of steps to run again: NAME (latest), NAME:vN or blake3:HEX
        reference: String,
        /// The new raw file for input NAME
        #[arg(long = "with", value_name = "NAME=FILE", required = true)]
        with: String,
        /// Why the new file is received (kept with its intake)
        #[arg(long, value_name = "TEXT")]
        why: Option<String>,
        /// Print JSON (schema/output/rerun.schema.json)
        #[arg(long)]
        json: bool,
    },

    /// Withdraw the step that made a version, keeping everything recorded after it
    #[command(
        after_help = "Example:\n  sluice withdraw all_orders:v4 --why \"the dedupe key was wrong: two shops reuse order numbers\"\n\n\
        Records the table from before that step as the dataset's next version (a withdrawal step), then applies \
        every later step again on top of it: built-in steps run again with their recorded parameters, hand edits are \
        re-applied as cell patches matched through the row lineage. Nothing is deleted. Conflicts (a later edit to a \
        row or column only the withdrawn step made, to a row that is now dropped, to a row whose duplicate comes back, \
        or an outside command after it) refuse the withdrawal with exit code 1 and are listed; --accept-conflicts \
        resolves them as README.md, \"Withdrawing a step\", documents."
    )]
    Withdraw {
        /// The version whose step is withdrawn: NAME:vN or blake3:HEX
        reference: String,
        /// Why the step is withdrawn (kept with the withdrawal step)
        #[arg(long, value_name = "TEXT")]
        why: String,
        /// Resolve conflicts by the documented rules instead of refusing; each is recorded
        #[arg(long)]
        accept_conflicts: bool,
        /// Print JSON (schema/output/withdraw.schema.json)
        #[arg(long)]
        json: bool,
    },

    /// Retrieve a version's exact bytes (or its rows as CSV, TSV or JSON Lines) to standard output or a file
    #[command(
        after_help = "Examples:\n  sluice retrieve quillby_orders:v1 > q3-as-received.csv\n  sluice retrieve blake3:5f3a9c0d -o q3.csv\n  sluice retrieve all_orders --format jsonl -o all_orders.jsonl\n  sluice retrieve all_orders --format parquet --column-type total=decimal(12,2) -o all_orders.parquet\n  sluice retrieve q3_by_shop -o q3_by_shop.csv --deliver \"Q3 figures for the board pack\""
    )]
    Retrieve {
        /// The version: NAME (latest), NAME:vN (N-th version) or blake3:HEX (8+ hex digits)
        reference: String,
        /// Write to this file instead of standard output
        #[arg(short = 'o', long = "output", value_name = "FILE")]
        output: Option<PathBuf>,
        /// Write the rows as csv (canonical CSV), tsv (tab-separated) or jsonl (JSON Lines)
        /// instead of the stored bytes
        #[arg(long, value_name = "FORMAT")]
        format: Option<RetrieveFormat>,
        /// With --format parquet or arrow: write COLUMN as TYPE instead of the type its profile
        /// suggests, every value checked (integer, decimal(P,S), date, timestamp(UNIT) or
        /// timestamp(UNIT, ZONE) with UNIT s, ms, us or ns and ZONE UTC or +HH:MM, text);
        /// repeat for more columns
        #[arg(long = "column-type", value_name = "COLUMN=TYPE")]
        column_type: Vec<String>,
        /// Record this retrieval as a delivery, with the reason (who receives the file and what
        /// for): the written file's own hash goes into the audit chain, so `sluice identify`
        /// names the file later, and the version's bytes stay stored
        #[arg(long, value_name = "REASON")]
        deliver: Option<String>,
    },

    /// The audit trail in time order: one line per step, oldest first
    #[command(
        after_help = "Examples:\n  sluice timeline\n  sluice timeline --dataset quillby_orders --since 2026-10-01 --json\n  \
        sluice timeline --by \"Ada Moss\" --limit 20\n\n\
        --since and --until take an ISO 8601 date (2026-10-01, whole days in UTC) or a UTC time (2026-10-01T09:00:00Z); \
        --until includes the day it names. --limit keeps the latest N lines, still oldest first."
    )]
    Timeline(TimelineArgs),

    /// About one version: hash, size, dialect, columns, profile and the step that made it
    #[command(after_help = "Example:\n  sluice about quillby_orders:v1")]
    About {
        /// The version: NAME (latest), NAME:vN (N-th version) or blake3:HEX (8+ hex digits)
        reference: String,
        /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
        #[arg(long)]
        json: bool,
    },

    /// Re-hash every object, check every reference and the audit chain
    #[command(
        after_help = "Example:\n  sluice verify\n\nExit code 0 when the store is intact, 1 with the list of what is wrong otherwise."
    )]
    Verify {
        /// Also hold an endorsement file kept outside the store (`sluice endorse -o`) against
        /// the store: its signature, its key, and that the store still holds what it signed;
        /// repeatable
        #[arg(long, value_name = "FILE")]
        endorsement: Vec<PathBuf>,
        /// Also read every version again and compare its row index and column profile with
        /// ones computed from its bytes (reads every version in full)
        #[arg(long)]
        deep: bool,
        /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
        #[arg(long)]
        json: bool,
    },

    /// Copy this store into a shared store: its objects, then its lineage in one transaction on
    /// the server (nothing is merged: a shared store that moved on is named)
    #[command(
        after_help = "The shared store is a folder set up with `sluice setup --lineage-server CONN`. This store is verified \
        first (every object re-hashed, the audit chain and its row commitments checked) and each object is re-hashed as it \
        is copied. The shared store must hold nothing yet or an earlier part of this store's history (a working copy taken \
        with `sluice borrow`); if it moved on, nothing is copied and the entry where the two part is named. \
        With --lineage-server, DIR is a new shared store made for this store, its lineage in that (empty) server database \
        (and its objects in the bucket --object-bucket names, when given).\n\n\
        Examples:\n  sluice publish --to /srv/three-rivers/q3 --lineage-server \"host=db.example dbname=q3 user=ada\"\n  \
        sluice publish --to /srv/three-rivers/q3"
    )]
    Publish {
        /// The shared store's folder (or the project folder holding it)
        #[arg(long, value_name = "DIR")]
        to: PathBuf,
        /// Make DIR a new shared store whose lineage is on this PostgreSQL server (an empty
        /// database), then publish into it
        #[arg(long, value_name = "CONN")]
        lineage_server: Option<String>,
        /// With --lineage-server: the new shared store keeps its objects in this S3-compatible
        /// bucket, http(s)://HOST[:PORT]/BUCKET[/PREFIX]
        #[arg(long, value_name = "URL")]
        object_bucket: Option<String>,
        /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
        #[arg(long)]
        json: bool,
    },

    /// Copy a shared store into a new working copy of your own (its lineage in its folder)
    #[command(
        after_help = "The shared store is verified first and every object re-hashed as it is copied; the working copy is \
        verified when it is made. Work recorded there can be copied back with `sluice publish`.\n\n\
        With --dataset, only part of the bytes is copied: those of the named datasets' versions and of every version \
        they are made from. The whole lineage is copied; the other versions stay readable in the shared store only, \
        and the working copy's verify counts them as left there.\n\n\
        Examples:\n  sluice borrow /srv/three-rivers/q3 --into q3-offline\n  \
        sluice borrow /srv/three-rivers/q3 --into q3-totals --dataset q3_by_shop"
    )]
    Borrow {
        /// The shared store's folder (or the project folder holding it)
        from: PathBuf,
        /// The project folder for the working copy (default: the folder --store names, else the
        /// working directory)
        #[arg(long, value_name = "DIR")]
        into: Option<PathBuf>,
        /// Copy only the bytes of this dataset's versions and of the versions they are made
        /// from; the lineage is copied whole (repeat for more datasets; default: everything)
        #[arg(long, value_name = "NAME")]
        dataset: Vec<String>,
        /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
        #[arg(long)]
        json: bool,
    },

    /// The roles of a shared store, enforced by its server: reading, recording, signing,
    /// administering
    #[command(
        after_help = "Run --set-up once as the owner of the server database's tables; it makes the roles sluice_reading, \
        sluice_recording, sluice_signing and sluice_administering with their grants. Logins are the server's own \
        (CREATE ROLE ... LOGIN); --give adds one of the roles to one.\n\n\
        For a store whose objects are in a bucket, --bucket-policy writes the bucket's policy for its owner to \
        install (S3 PutBucketPolicy): every principal is denied deleting the store's objects, each named principal may \
        read them and list the bucket, recording principals may upload, and the others are denied uploads.\n\n\
        Examples:\n  sluice roles --set-up\n  sluice roles --give recording --to ada\n  sluice roles --of ada\n  \
        sluice roles --bucket-policy q3-policy.json --bucket-principal recording=arn:aws:iam::000000000000:user/ada"
    )]
    Roles {
        /// Make the roles and their grants (idempotent)
        #[arg(long)]
        set_up: bool,
        /// Give this role ...
        #[arg(long, value_name = "ROLE", requires = "to", value_parser = ["reading", "recording", "signing", "administering"])]
        give: Option<String>,
        /// ... to this login
        #[arg(long, value_name = "LOGIN", requires = "give")]
        to: Option<String>,
        /// Show the roles a login has
        #[arg(long, value_name = "LOGIN", conflicts_with_all = ["set_up", "give"])]
        of: Option<String>,
        /// Write the bucket policy (AWS policy language) for the store's bucket to FILE: no
        /// deletion of its objects for anyone, and each --bucket-principal's actions
        #[arg(long, value_name = "FILE")]
        bucket_policy: Option<PathBuf>,
        /// Name a principal of the bucket's server for a role in the bucket policy, as
        /// ROLE=ARN (arn:aws:iam::ACCOUNT:user/NAME) or ROLE=ACCOUNT; repeat for more
        #[arg(long, value_name = "ROLE=PRINCIPAL", requires = "bucket_policy")]
        bucket_principal: Vec<String>,
    },

    /// Copy every object of the store into a bucket, or back into the store's folder, each
    /// re-hashed, then read the objects from there (recorded in the audit log)
    #[command(
        after_help = "The copy is made first and checked object by object; only then does the store read its objects \
        from the new place. The old copy is left where it was.\n\nExamples:\n  \
        sluice transfer --to-bucket http://127.0.0.1:9000/three-rivers-q3\n  sluice transfer --to-folder"
    )]
    Transfer {
        /// The bucket to copy the objects into, http(s)://HOST[:PORT]/BUCKET[/PREFIX]
        #[arg(
            long,
            value_name = "URL",
            conflicts_with = "to_folder",
            required_unless_present = "to_folder"
        )]
        to_bucket: Option<String>,
        /// Copy the objects from the bucket into the store's own folder
        #[arg(long)]
        to_folder: bool,
        /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
        #[arg(long)]
        json: bool,
    },

    /// Give back the space of objects no version or step refers to, and pack small segments
    /// (recorded in the audit log)
    #[command(
        after_help = "Objects nothing refers to are left by interrupted or failed commands; they are never read. \
        Reclaim waits for commands that are writing objects, re-hashes every object it keeps, and also moves \
        objects of the earlier one-file-per-object layout into a segment.\n\nExample:\n  sluice reclaim"
    )]
    Reclaim {
        /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
        #[arg(long)]
        json: bool,
    },

    /// Keep versions' bytes stored for good, computing them from their recipes when they
    /// are not stored (recorded in the audit log)
    #[command(
        after_help = "A run records the intermediate versions of a one-pass stretch of steps by hash, shape, profile \
        and recipe, without their bytes; they are computed again, and checked against their hash, whenever \
        something reads them. `retain` stores a version's bytes and marks it kept: `evict` will not release it.\n\n\
        Example:\n  sluice retain quillby_orders:v3"
    )]
    Retain {
        /// The versions (NAME:vN, NAME for the latest, or blake3:HEX)
        #[arg(required = true, value_name = "REF")]
        references: Vec<String>,
        /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
        #[arg(long)]
        json: bool,
    },

    /// Compute recomputable versions from their recipes and store their bytes again (recorded
    /// in the audit log)
    #[command(
        after_help = "Each version is computed from its nearest stored ancestors through the steps that made it, \
        and its bytes must have the recorded hash (else the command fails naming the step, and nothing is \
        recorded). The version is then stored like any other; `evict` may release it again.\n\n\
        Example:\n  sluice recompute quillby_orders:v3"
    )]
    Recompute {
        /// The versions (NAME:vN, NAME for the latest, or blake3:HEX)
        #[arg(required = true, value_name = "REF")]
        references: Vec<String>,
        /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
        #[arg(long)]
        json: bool,
    },

    /// Stop keeping the bytes of versions that built-in steps made and can make again
    /// (recorded in the audit log; `reclaim` then frees the space)
    #[command(
        after_help = "Only versions made by a built-in operation can be evicted, and never a dataset's latest \
        version, a version signed off, or one kept with `retain`; raw data, outside commands' outputs, hand \
        edits and withdrawals always stay stored. An evicted version keeps its hash, recipe, shape and profile, \
        and is computed again (and checked against its hash) whenever something reads it. The space goes \
        at the next `sluice reclaim`.\n\n\
        Examples:\n  sluice evict quillby_orders:v2\n  sluice evict --all"
    )]
    Evict {
        /// The versions (NAME:vN or blake3:HEX)
        #[arg(
            value_name = "REF",
            required_unless_present = "all",
            conflicts_with = "all"
        )]
        references: Vec<String>,
        /// Every version the policy allows to evict
        #[arg(long)]
        all: bool,
        /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
        #[arg(long)]
        json: bool,
    },

    /// Compare two versions: rows kept, added and removed, every changed cell, and added,
    /// removed, renamed or reordered columns
    #[command(
        after_help = "Rows are paired by --key; else, when recorded steps relate the two versions, through those steps' \
        row maps (the recorded lineage); else by the key declared on the dataset; else by order (a minimal edit \
        script over row fingerprints, then a guess at which removed and added rows are one row changed). The first \
        line says which, and key values shared by several rows are counted and paired within their group. \
        Changed cells are listed as a table (row | key | column | before | after; no key column when rows are paired \
        by order); the characters that changed are \
        wrapped in « and », and white space is made visible (space ·, tab →, no-break space ⍽, line break ↵).\n\n\
        Examples:\n  sluice compare quillby_orders:v1 quillby_orders:v2 --key order_id --limit 20\n  \
        sluice compare all_orders:v1 all_orders:v2 --counts\n\n\
        Exit code 0 whether or not the versions differ (1 and 2 as for every command: a failure, a usage error)."
    )]
    Compare(CompareArgs),

    /// Capture the work of an outside command on stored versions: record what it writes, with
    /// lineage inferred by comparing it with its inputs
    #[command(
        after_help = "Placeholders in the command's arguments: {NAME} is the file holding input NAME (a copy of \
        the stored version, in a temporary folder removed afterwards), {out:NAME} the file of output NAME. \
        The same paths are in the environment variables SLUICE_INPUT_<NAME> and SLUICE_OUTPUT_<NAME> (NAME in \
        upper case, other characters than letters and digits as _).\n\n\
        Example:\n  sluice capture --input all_orders --output all_orders=fixed.csv --why \"one spelling of each name\" \\\n      \
        -- python3 fix_names.py {all_orders} {out:all_orders}\n\n\
        Exit code: the command's own status when it fails (128 + N when ended by signal N, 127 when the program \
        does not exist, 126 when it cannot be started); 1 when it exits with 0 but an output is missing or it \
        changed an input; then nothing but the failure's audit entry is recorded."
    )]
    Capture(CaptureArgs),

    /// Convert a plan or rules file of the old form (`"sluice_plan": 1`, `{"rules": [{"rule": ...}]}`)
    /// to the current form
    #[command(
        after_help = "Example:\n  sluice upgrade plans/q3-cleaning.json -o plans/q3-cleaning.v2.json\n\n\
        Without -o the converted file is printed. The converted file says the same thing: every step, rule, \
        reason and setting is kept."
    )]
    Upgrade {
        /// The plan or rules file to convert
        file: PathBuf,
        /// Write the converted file here instead of standard output
        #[arg(short = 'o', long = "output", value_name = "FILE")]
        output: Option<PathBuf>,
    },

    /// Sign off a version, a report sluice wrote, or the audit head, with a stated meaning and
    /// an Ed25519 key in the OpenSSH format; the signature is recorded in the audit chain
    #[command(
        after_help = "Examples:\n  sluice endorse q3_by_shop --meaning approved --signing-key ~/.ssh/id_ed25519\n  \
        sluice endorse --report q3_by_shop-report.html --meaning reviewed --signing-key ~/.ssh/id_ed25519\n  \
        sluice endorse --audit-head --meaning approved --signing-key ~/.ssh/id_ed25519 -o q3-close.endorsement\n\n\
        The key must be one of the store's signatories (`sluice signatories`); the printed name is the one it was \
        admitted under. A key protected by a passphrase reads it from SLUICE_KEY_PASSPHRASE. The signature is in \
        the OpenSSH signature format (namespace sluice-endorsement): `ssh-keygen -Y verify` checks it too. Signing \
        the audit head ties the whole history to you and this moment; keep the -o file outside the store, and \
        `sluice verify --endorsement FILE` later shows whether the store still holds that history. A sign-off \
        supports a compliance process; it does not by itself make one (README.md, \"Sign-offs\")."
    )]
    Endorse(EndorseArgs),

    /// An erasure order for personal data in a raw version: every cell it reaches, forward
    /// through the lineage (a dry run unless --carry-out)
    #[command(
        after_help = "Examples:\n  sluice erase quillby_orders:v1 --where 'customer = \"Ada Gilford\"' --request \"request 2026-117, GDPR Art. 17\"\n  \
        sluice erase quillby_orders:v1 --where 'customer = \"Ada Gilford\"' --request \"request 2026-117, GDPR Art. 17\" --carry-out\n  \
        sluice erase oxwater_orders:v1 --key order_id=52007 --request \"request 2026-118\"\n  \
        sluice erase fennmarsh_orders:v1 --column email --request \"retention ended\"\n\n\
        Lists every cell derived from the named cells, in every version made from them, and the summary cells \
        that aggregated them (kept as published, no longer recomputable). With --carry-out the order is recorded \
        in the audit chain with a salted commitment to every cell of every version it reaches, the cells are \
        emptied in every stored copy, and the old bytes are removed from the segments and the database; \
        versions keep their names, and `sluice verify` proves every other cell unchanged. What must be erased, \
        and what must be kept, is for the organisation's data-protection officer to decide under local law \
        (README.md, \"Erasure\")."
    )]
    Erase(EraseArgs),

    /// The keys the store trusts for sign-offs; admit or retire one by a signed, recorded change
    #[command(after_help = "Examples:\n  sluice signatories\n  \
        sluice signatories --admit ada.pub --name \"Ada Moss\" --signing-key ~/.ssh/id_ed25519\n  \
        sluice signatories --retire SHA256:Hh2Bx... --signing-key ~/.ssh/id_ed25519\n\n\
        The first key is admitted by its holder: its admission is signed with its own private key. Every later \
        admission or retirement is signed by a key the store trusts at that moment. Write the first key's \
        fingerprint down outside the store: the store itself cannot show who admitted it.")]
    Signatories(SignatoriesArgs),

    /// The meanings a sign-off may state; declare another one (recorded in the audit chain)
    #[command(
        after_help = "Examples:\n  sluice meanings\n  sluice meanings --declare \"released to the board\" --says \"I release these figures to the board\"\n\n\
        prepared, reviewed and approved are always known; what a meaning commits a person to is for the \
        organisation's compliance staff to decide."
    )]
    Meanings {
        /// Declare this meaning
        #[arg(long, value_name = "WORD", requires = "says")]
        declare: Option<String>,
        /// What a person states by signing with it (with --declare)
        #[arg(long, value_name = "TEXT", requires = "declare")]
        says: Option<String>,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },

    /// Show who is acting, and where that comes from; or set the store's default person
    #[command(
        after_help = "Examples:\n  sluice identity\n  sluice identity --name \"Ada Moss\" --email ada@example.org\n\n\
        Who is acting is taken from --person and --email, then SLUICE_PERSON and SLUICE_EMAIL, then the store's \
        setting, then the operating system user. Setting it is recorded in the audit chain."
    )]
    Identity {
        /// Set the store's default person to this name
        #[arg(long, value_name = "NAME")]
        name: Option<String>,
        /// Set the store's default e-mail address (with --name)
        #[arg(long, value_name = "ADDRESS", requires = "name")]
        email: Option<String>,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },

    /// Create a store with an invented example (three bicycle repair shops) and take it in
    #[command(after_help = "Example:\n  sluice demo\n  sluice demo /tmp/try-sluice")]
    Demo {
        /// Where to create it (default: the folder --store names, else a new folder sluice-demo…
        /// in the working directory)
        dir: Option<PathBuf>,
        /// Keep the demo store's lineage on this PostgreSQL server (as `setup --lineage-server`)
        #[arg(long, value_name = "CONN")]
        lineage_server: Option<String>,
        /// Keep the demo store's objects in an S3-compatible bucket (as `setup --object-bucket`)
        #[arg(long, value_name = "URL")]
        object_bucket: Option<String>,
    },

    /// Print the tab-completion script for a shell (bash, zsh or fish)
    #[command(after_help = "Examples:\n  \
        sluice completions bash > ~/.local/share/bash-completion/completions/sluice\n  \
        sluice completions zsh > ~/.zfunc/_sluice      # with fpath+=(~/.zfunc) before compinit\n  \
        sluice completions fish > ~/.config/fish/completions/sluice.fish\n\n\
        The script is made from this build's own command definitions; make it again after an upgrade.")]
    Completions {
        /// The shell to write the script for
        #[arg(value_enum)]
        shell: ShellArg,
    },

    /// Print the manual page (roff), or write one page per command into a folder
    #[command(after_help = "Examples:\n  sluice manual | man -l -\n  \
        sluice manual --dir ~/.local/share/man/man1    # then: man sluice, man sluice-trace\n\n\
        The pages are made from this build's own command definitions and --help texts.")]
    Manual {
        /// Write sluice.1 and a page per command (sluice-receive.1, sluice-clean-trim.1, ...)
        /// into this folder instead of printing sluice.1
        #[arg(long, value_name = "DIR")]
        dir: Option<PathBuf>,
    },
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ColorArg {
    /// Colour only when writing to a terminal and NO_COLOR is not set
    Auto,
    /// Always colour (also when piped, e.g. into `less -R`)
    Always,
    /// Never colour
    Never,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum ShellArg {
    Bash,
    Zsh,
    Fish,
}

/// The formats `retrieve --format` writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum RetrieveFormat {
    Csv,
    Tsv,
    Jsonl,
    /// Apache Parquet, typed from the profile (integers, exact decimals, dates, text)
    Parquet,
    /// Arrow IPC file (Feather version 2), typed as for parquet
    Arrow,
}

impl RetrieveFormat {
    /// The name given on the command line.
    pub fn name(self) -> &'static str {
        match self {
            RetrieveFormat::Csv => "csv",
            RetrieveFormat::Tsv => "tsv",
            RetrieveFormat::Jsonl => "jsonl",
            RetrieveFormat::Parquet => "parquet",
            RetrieveFormat::Arrow => "arrow",
        }
    }
}

#[derive(Debug, Args)]
pub struct ReceiveArgs {
    /// The file to take in: delimited text (comma, semicolon, tab or pipe), a workbook (.xlsx,
    /// .xlsm, .ods), JSON Lines (.jsonl, .ndjson), Apache Parquet (.parquet) or Arrow IPC
    /// (.arrow, .feather)
    pub file: PathBuf,

    /// The dataset this file is a version of (created if new)
    #[arg(long = "as", value_name = "NAME")]
    pub dataset: String,

    /// Declare key columns that identify each row, comma-separated; they must be unique and
    /// never blank
    #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
    pub key: Option<Vec<String>>,

    /// Why this version is being recorded (kept with the step)
    #[arg(long, value_name = "TEXT")]
    pub why: Option<String>,

    /// The field delimiter, if detection should not decide: one character, or "tab"
    #[arg(long, value_name = "C")]
    pub delimiter: Option<String>,

    /// The first line is data, not a header; columns are named col1, col2, ...
    #[arg(long)]
    pub no_header: bool,

    /// The text encoding, for files not in UTF-8 (a WHATWG label: windows-1252, iso-8859-15,
    /// shift_jis, utf-16le, ...)
    #[arg(long, value_name = "NAME")]
    pub encoding: Option<String>,

    /// A value that means "missing" (counted as blank in the profile); repeat for several
    #[arg(long = "null-token", value_name = "T")]
    pub null_tokens: Vec<String>,

    /// For a workbook (.xlsx, .xlsm, .ods): the sheet to take in, by name or 1-based position
    /// (default: the only sheet)
    #[arg(long, value_name = "NAME|N")]
    pub sheet: Option<String>,

    /// The file is a hand edit of this version (NAME, NAME:vN or blake3:HEX): record it as
    /// a hand edit, its row lineage inferred by comparing the two
    #[arg(long, value_name = "REF")]
    pub hand_edit_of: Option<String>,

    /// Print JSON (schema/output/receive.schema.json)
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Args)]
pub struct CaptureArgs {
    /// A version the command reads, as NAME (the latest version of dataset NAME) or
    /// NAME=REF (NAME:vN, blake3:HEX); repeatable
    #[arg(long = "input", value_name = "NAME[=REF]")]
    pub inputs: Vec<String>,

    /// A file the command writes, recorded as the next version of dataset NAME; repeatable
    #[arg(long = "output", value_name = "NAME=FILE", required = true)]
    pub outputs: Vec<String>,

    /// Why the command is run (kept with each step it makes)
    #[arg(long, value_name = "TEXT")]
    pub why: String,

    /// Match the output's rows to the input's by order, not by the declared key (for a command
    /// that rewrites key values); the step records which matching was used
    #[arg(long = "match-by-order")]
    pub match_by_order: bool,

    /// Print JSON (schema/output/capture.schema.json)
    #[arg(long)]
    pub json: bool,

    /// The command and its arguments, after `--`
    #[arg(last = true, required = true, value_name = "COMMAND")]
    pub command: Vec<String>,
}

#[derive(Debug, Args)]
pub struct CleanArgs {
    /// The version to clean: NAME (latest), NAME:vN or blake3:HEX
    pub reference: String,

    /// Print JSON (schema/output/clean.schema.json)
    #[arg(long, global = true)]
    pub json: bool,

    #[command(subcommand)]
    pub op: OpCommand,
}

/// What every recorded step takes.
#[derive(Debug, Args)]
pub struct StepArgs {
    /// Why this step is done (kept with the step)
    #[arg(long, value_name = "TEXT")]
    pub why: String,

    /// Record the result as a version of this dataset instead of the input's
    #[arg(long = "as", value_name = "NAME")]
    pub dataset: Option<String>,
}

#[derive(Debug, Subcommand)]
pub enum OpCommand {
    /// Remove leading and trailing white space; --inner also turns inner runs into one space
    #[command(
        after_help = "Example:\n  sluice clean quillby_orders trim --columns customer,email --inner --why \"stray spaces from the till\""
    )]
    Trim {
        /// Only these columns (default: all), comma-separated
        #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
        columns: Option<Vec<String>>,
        /// Also collapse runs of white space inside values to one space
        #[arg(long)]
        inner: bool,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Change letters to lower, upper or title case
    #[command(
        after_help = "Example:\n  sluice clean quillby_orders case --columns email --to lower --why \"e-mail addresses are case-blind\""
    )]
    Case {
        /// Only these columns (default: all), comma-separated
        #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
        columns: Option<Vec<String>>,
        /// The case to change to
        #[arg(long, value_enum)]
        to: CaseArg,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Replace text inside values: literally, or by regular expression with --regex
    #[command(
        after_help = "Examples:\n  sluice clean quillby_orders replace --columns labour_hours --find , --with . --why \"decimal commas typed by hand\"\n  \
        sluice clean quillby_orders replace --columns service --regex --find '^brakes? *- *adjust$' --with 'Brake tune' --why \"one label\""
    )]
    Replace {
        /// Only these columns (default: all), comma-separated
        #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
        columns: Option<Vec<String>>,
        /// The text (or with --regex, the regular expression) to find
        #[arg(long, value_name = "TEXT", allow_hyphen_values = true)]
        find: String,
        /// What to put instead; with --regex, $1, $2 ... or ${name} insert groups
        #[arg(long, value_name = "TEXT", allow_hyphen_values = true)]
        with: String,
        /// --find is a regular expression (Rust regex syntax)
        #[arg(long)]
        regex: bool,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Replace values through a two-column mapping table (a file, taken in first, or a version)
    #[command(
        after_help = "The table's first column holds values as they are written, the second what they become (or name them with \
        --from and --to). A file is taken in as a dataset named after it first, so the table is part of the lineage.\n\n\
        Example:\n  sluice clean quillby_orders map --columns service --table exports/service_labels.csv --why \"the cooperative's service names\""
    )]
    Map {
        /// The columns to map, comma-separated
        #[arg(
            long,
            required = true,
            value_name = "COL[,COL..]",
            value_delimiter = ','
        )]
        columns: Vec<String>,
        /// The mapping table: a file to take in, or a version (NAME, NAME:vN, blake3:HEX)
        #[arg(long, value_name = "FILE|REF")]
        table: String,
        /// The table column holding the values as written (default: its first of two)
        #[arg(long, value_name = "COL")]
        from: Option<String>,
        /// The table column holding what they become (default: its second of two)
        #[arg(long, value_name = "COL")]
        to: Option<String>,
        /// What to do with a value the table has no entry for: keep it (noted), blank it (noted) or fail
        #[arg(long, value_enum, default_value = "keep")]
        unmatched: OnErrorArg,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Add columns from another table, matching rows on key columns (a left join)
    #[command(
        after_help = "Example:\n  sluice clean quillby_orders lookup --table technicians --on technician --table-on name --take grade,shop --why \"grade for the pay report\""
    )]
    Lookup {
        /// The table to look up in: a file to take in, or a version (NAME, NAME:vN, blake3:HEX)
        #[arg(long, value_name = "FILE|REF")]
        table: String,
        /// The key columns of this table, comma-separated
        #[arg(
            long,
            required = true,
            value_name = "COL[,COL..]",
            value_delimiter = ','
        )]
        on: Vec<String>,
        /// The key columns of the looked-up table, if named differently
        #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
        table_on: Option<Vec<String>>,
        /// The columns to take from the looked-up table
        #[arg(
            long,
            required = true,
            value_name = "COL[,COL..]",
            value_delimiter = ','
        )]
        take: Vec<String>,
        /// Stop when a key has no row in the table (default: leave the taken cells blank, noted)
        #[arg(long)]
        fail_unmatched: bool,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Stack the rows of another version under this one, matching columns by name
    #[command(
        after_help = "Example:\n  sluice clean quillby_orders append --other oxwater_orders --map \"order no=order_id\" --map date=opened --why \"one table for the cooperative\""
    )]
    Append {
        /// The version whose rows to add: NAME, NAME:vN or blake3:HEX
        #[arg(long, value_name = "REF")]
        other: String,
        /// Rename one of its columns to one of ours: THEIRS=OURS (repeat for several)
        #[arg(long = "map", value_name = "THEIRS=OURS")]
        map: Vec<String>,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Fill blank cells (empty or a null token) with a value or from another column
    #[command(
        after_help = "Examples:\n  sluice clean quillby_orders fill --columns labour_hours --value 0 --why \"no labour booked\"\n  sluice clean quillby_orders fill --columns email --from notes --why \"clerk typed the address in the notes\""
    )]
    Fill {
        /// The columns to fill, comma-separated
        #[arg(
            long,
            required = true,
            value_name = "COL[,COL..]",
            value_delimiter = ','
        )]
        columns: Vec<String>,
        /// The value to put in blank cells
        #[arg(
            long,
            value_name = "TEXT",
            conflicts_with = "from",
            required_unless_present = "from"
        )]
        value: Option<String>,
        /// Take the value from this column of the same row (when it is not blank itself)
        #[arg(long, value_name = "COL")]
        from: Option<String>,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Read amounts written as text ("$1,204.50", "12,50 €", "(5.00)", "12.5%") as exact decimals
    #[command(
        after_help = "Accepted: a currency sign ($ € £ ¥) or ISO 4217 code before or after; thousands separators in groups of three; \
        a sign, a trailing minus or parentheses for negatives; a trailing % read as a fraction (12.5% -> 0.125). \
        Never through floating point.\n\nExample:\n  sluice clean oxwater_orders number --columns parts --decimal-comma --why \"amounts as numbers\""
    )]
    Number {
        /// The columns to read, comma-separated
        #[arg(
            long,
            required = true,
            value_name = "COL[,COL..]",
            value_delimiter = ','
        )]
        columns: Vec<String>,
        /// The decimal separator is a comma (and "." or a space groups thousands)
        #[arg(long)]
        decimal_comma: bool,
        /// What to do with a value that is not an amount: fail (list them), keep it (noted) or blank it (noted)
        #[arg(long, value_enum, default_value = "fail")]
        on_error: OnErrorArg,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Write dates in mixed formats as ISO 8601 (YYYY-MM-DD, with time and offset when present)
    #[command(
        after_help = "Accepted: ISO 8601 (2026-07-03, 20260703, 2026-W27-5, 2026-184, with a time and offset), numeric dates \
        with / . or - and a four-digit year, and English month names (3 Jul 2026, Jul 3, 2026). A numeric date that \
        reads both ways (03/04/2026) needs --order; dates that do not exist (2023-02-29) are errors.\n\nExample:\n  \
        sluice clean fennmarsh_orders date --columns opened --order dmy --why \"one date format\""
    )]
    Date {
        /// The columns to read, comma-separated
        #[arg(
            long,
            required = true,
            value_name = "COL[,COL..]",
            value_delimiter = ','
        )]
        columns: Vec<String>,
        /// The order of day, month and year in numeric dates
        #[arg(long, value_enum)]
        order: Option<OrderArg>,
        /// What to do with a value that is not a date (ambiguous dates always stop the step)
        #[arg(long, value_enum, default_value = "fail")]
        on_error: OnErrorArg,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Split one column into new columns on a separator (the last new column takes the rest)
    #[command(
        after_help = "Example:\n  sluice clean quillby_orders split --column customer --on ' ' --into given_name,family_name --why \"names for the mailing\""
    )]
    Split {
        /// The column to split
        #[arg(long, value_name = "COL")]
        column: String,
        /// The separator
        #[arg(long, value_name = "TEXT", allow_hyphen_values = true)]
        on: String,
        /// The new columns, comma-separated, placed after the source
        #[arg(
            long,
            value_name = "COL[,COL..]",
            value_delimiter = ',',
            required = true
        )]
        into: Vec<String>,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Join the non-blank values of several columns into a new column
    #[command(
        after_help = "Example:\n  sluice clean quillby_orders combine --columns service,technician --with ' by ' --into job --why \"one label for the board\""
    )]
    Combine {
        /// The columns to join, comma-separated, in order
        #[arg(
            long,
            value_name = "COL[,COL..]",
            value_delimiter = ',',
            required = true
        )]
        columns: Vec<String>,
        /// What to put between values
        #[arg(
            long,
            value_name = "TEXT",
            default_value = " ",
            allow_hyphen_values = true
        )]
        with: String,
        /// The new column, placed after the last source
        #[arg(long, value_name = "COL")]
        into: String,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Copy part of a column into a new column: by character position, or a regular expression's first group
    #[command(
        after_help = "Examples:\n  sluice clean oxwater_orders extract --column 'order no' --regex '^OX-(\\d+)$' --into order_number --why \"numeric id\"\n  \
        sluice clean quillby_orders extract --column opened --from 1 --len 7 --into month --why \"monthly totals\""
    )]
    Extract {
        /// The column to read
        #[arg(long, value_name = "COL")]
        column: String,
        /// The new column, placed after the source
        #[arg(long, value_name = "COL")]
        into: String,
        /// The first character to take, counted from 1
        #[arg(long, value_name = "N", conflicts_with = "regex")]
        from: Option<u64>,
        /// How many characters to take (default: to the end)
        #[arg(long, value_name = "L", requires = "from")]
        len: Option<u64>,
        /// A regular expression; its first group (or the whole match) is taken, blank when it does not match
        #[arg(long, value_name = "RE")]
        regex: Option<String>,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Rename columns; values and order stay
    #[command(
        after_help = "Example:\n  sluice clean oxwater_orders rename \"order no=order_id\" date=opened --why \"one naming for all shops\""
    )]
    Rename {
        /// OLD=NEW pairs
        #[arg(required = true, value_name = "OLD=NEW")]
        pairs: Vec<String>,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Keep only the named columns, in the order named
    #[command(
        after_help = "Example:\n  sluice clean quillby_orders select order_id,opened,service,parts_cost --why \"what the revenue report needs\""
    )]
    Select {
        /// The columns, comma-separated, in the order wanted
        #[arg(value_name = "COL[,COL..]", value_delimiter = ',', required = true)]
        columns: Vec<String>,
        #[command(flatten)]
        step: StepArgs,
    },
    /// One row per group with its count and exact sums, means, minimums and maximums
    #[command(
        after_help = "The result is a new dataset (--as NAME) keyed by the --by columns, one row per group in the order the \
        groups first appear: the group values, count (rows), then sum_COL, mean_COL, min_COL, max_COL over non-blank values. \
        Sums are exact decimals; means are rounded half to even at 6 fraction digits (more when the values have more).\n\n\
        Example:\n  sluice clean quillby_orders summarize --by technician --sum parts_cost --mean parts_cost --as parts_by_technician --why \"Q3 report\""
    )]
    Summarize {
        /// The columns to group on, comma-separated
        #[arg(
            long,
            required = true,
            value_name = "COL[,COL..]",
            value_delimiter = ','
        )]
        by: Vec<String>,
        /// Columns to sum
        #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
        sum: Vec<String>,
        /// Columns to average
        #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
        mean: Vec<String>,
        /// Columns whose least value to give
        #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
        min: Vec<String>,
        /// Columns whose greatest value to give
        #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
        max: Vec<String>,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Keep only the rows where a predicate holds
    #[command(
        after_help = "Predicates: comparisons (= != < <= > >=; numeric when both sides are numbers), \
        `is [not] blank`, `[not] in (...)`, `matches 're'`, and, or, not, parentheses. Text in 'single quotes', \
        odd column names in `backquotes`.\n\nExample:\n  sluice clean penguins keep \"body_mass_g is not blank and sex in ('female', 'male')\" --why \"complete records only\""
    )]
    Keep {
        /// The predicate, e.g. "status != 'cancelled'"
        predicate: String,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Remove the rows where a predicate holds
    #[command(
        after_help = "Predicates: comparisons (= != < <= > >=; numeric when both sides are numbers), \
        `is [not] blank`, `[not] in (...)`, `matches 're'`, and, or, not, parentheses. Text in 'single quotes', \
        odd column names in `backquotes`.\n\nExample:\n  sluice clean quillby_orders drop \"status in ('cancelled', 'Cancelled', 'test')\" --why \"not revenue\""
    )]
    Drop {
        /// The predicate, e.g. "status = 'cancelled'"
        predicate: String,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Remove rows that repeat another row (whole rows, or equal values in --key columns)
    #[command(
        after_help = "Examples:\n  sluice clean quillby_orders dedupe --why \"the till exports some orders twice\"\n  sluice clean quillby_orders dedupe --key order_id --keep last --why \"the last export of an order wins\""
    )]
    Dedupe {
        /// Compare only these columns (default: the whole row), comma-separated
        #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
        key: Option<Vec<String>>,
        /// Which of the repeated rows stays
        #[arg(long, value_enum, default_value = "first")]
        keep: KeepArg,
        #[command(flatten)]
        step: StepArgs,
    },
    /// Put the rows in a stable order by one or more columns (numbers as numbers, else text)
    #[command(
        after_help = "Each column sorts ascending unless it ends in :desc. Two cells that are both plain numbers compare \
        as numbers, exactly; otherwise as text; numbers come before text. Rows with equal keys keep their order.\n\n\
        Example:\n  sluice clean all_orders sort --by shop,opened:desc --why \"each shop's latest orders first\""
    )]
    Sort {
        /// The columns to sort by, the first deciding first; COL:desc for descending
        #[arg(
            long,
            required = true,
            value_name = "COL[:desc][,COL..]",
            value_delimiter = ','
        )]
        by: Vec<String>,
        #[command(flatten)]
        step: StepArgs,
    },
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum LineageFormat {
    /// Graphviz DOT text
    Dot,
    /// A self-contained SVG drawing
    Svg,
}

#[derive(Debug, Args)]
#[command(group(clap::ArgGroup::new("names").required(true).args(["rows_where", "key", "cell", "column"])))]
pub struct EraseArgs {
    /// The raw version holding the data: NAME (latest), NAME:vN or blake3:HEX
    pub reference: String,
    /// Every cell of the rows where this predicate holds (the language of `clean drop`)
    #[arg(long = "where", value_name = "PREDICATE")]
    pub rows_where: Option<String>,
    /// Every cell of the rows holding this value (repeat for several columns)
    #[arg(long, value_name = "COLUMN=VALUE")]
    pub key: Vec<String>,
    /// One cell, by 1-based data row and column name (repeatable)
    #[arg(long, value_name = "ROW:COLUMN")]
    pub cell: Vec<String>,
    /// Every cell of a column (repeatable)
    #[arg(long, value_name = "COLUMN")]
    pub column: Vec<String>,
    /// The request or legal basis the order answers, as the data-protection officer files it
    #[arg(long, value_name = "TEXT")]
    pub request: String,
    /// Carry the order out: record it, then erase every cell listed (without this, a dry run)
    #[arg(long)]
    pub carry_out: bool,
    /// Print JSON
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Args)]
pub struct EndorseArgs {
    /// The version to sign: NAME (latest), NAME:vN or blake3:HEX
    #[arg(
        required_unless_present_any = ["report", "audit_head"],
        conflicts_with_all = ["report", "audit_head"]
    )]
    pub reference: Option<String>,
    /// Sign this report file, as `sluice report` wrote it (by its hash)
    #[arg(long, value_name = "FILE", conflicts_with = "audit_head")]
    pub report: Option<PathBuf>,
    /// Sign the audit chain's last entry, and with it the whole history up to now
    #[arg(long)]
    pub audit_head: bool,
    /// What the signature means: prepared, reviewed, approved, or a meaning the store declares
    #[arg(long, value_name = "MEANING")]
    pub meaning: String,
    /// The private key to sign with (OpenSSH format, Ed25519)
    #[arg(long, value_name = "FILE")]
    pub signing_key: PathBuf,
    /// Also write the endorsement (the signed statement and its signature) to this file
    #[arg(short = 'o', long = "output", value_name = "FILE")]
    pub output: Option<PathBuf>,
    /// Print JSON
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Args)]
pub struct SignatoriesArgs {
    /// Admit the public key in this file (the .pub file ssh-keygen writes)
    #[arg(
        long,
        value_name = "FILE",
        requires_all = ["name", "signing_key"],
        conflicts_with = "retire"
    )]
    pub admit: Option<PathBuf>,
    /// The printed name the admitted key signs under (with --admit)
    #[arg(long, value_name = "NAME", requires = "admit")]
    pub name: Option<String>,
    /// Retire the key with this fingerprint (SHA256:...)
    #[arg(long, value_name = "FINGERPRINT", requires = "signing_key")]
    pub retire: Option<String>,
    /// The private key that signs the change (OpenSSH format, Ed25519)
    #[arg(long, value_name = "FILE")]
    pub signing_key: Option<PathBuf>,
    /// Print JSON
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Args)]
pub struct ReportArgs {
    /// The version: NAME (latest), NAME:vN or blake3:HEX
    pub reference: String,
    /// The form to write (default: from the -o file's extension, else html)
    #[arg(long, value_enum)]
    pub format: Option<ReportFormat>,
    /// The file to write
    #[arg(short = 'o', long = "output", value_name = "FILE")]
    pub output: PathBuf,
    /// How many changed cells to list per step (the counts stay complete)
    #[arg(long, value_name = "N", default_value_t = 5)]
    pub sample: usize,
    /// How many dropped rows to list per step (the counts stay complete)
    #[arg(long, value_name = "N", default_value_t = 10)]
    pub excluded: usize,
    /// Also reproduce the version from its raw inputs and state the result
    #[arg(long)]
    pub reproduce: bool,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ReportFormat {
    /// One self-contained HTML file (prints on A4 and Letter)
    Html,
    /// Markdown text tables
    Md,
    /// The report as data (schema/report.schema.json)
    Json,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum ExportFormat {
    /// A plan (JSON) that remakes the version from its raw inputs
    Plan,
    /// The version's lineage in the W3C PROV data model, as PROV-JSON
    #[value(name = "prov-json")]
    ProvJson,
    /// The version's lineage in the W3C PROV data model, as PROV-N text
    #[value(name = "prov-n")]
    ProvN,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum OrderArg {
    Dmy,
    Mdy,
    Ymd,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum OnErrorArg {
    Fail,
    Keep,
    Blank,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum KeepArg {
    First,
    Last,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum CaseArg {
    Lower,
    Upper,
    Title,
}

#[derive(Debug, Args)]
pub struct CompareArgs {
    /// The first version: NAME (latest), NAME:vN or blake3:HEX
    pub from: String,
    /// The second version
    pub to: String,
    /// Pair rows by these key columns, comma-separated (default: through the recorded lineage
    /// when steps relate the versions, else the dataset's declared key, else by order)
    #[arg(long, value_name = "COL[,COL..]", value_delimiter = ',')]
    pub key: Option<Vec<String>>,
    /// Counts only: changed cells per column, rows kept, added and removed, and how rows
    /// were paired
    #[arg(long)]
    pub counts: bool,
    /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
    #[arg(long)]
    pub json: bool,
    /// List at most N changes (the counts stay complete); without it, at most 50,000 are
    /// listed (a larger N lists more, holding their values in memory)
    #[arg(long, value_name = "N")]
    pub limit: Option<usize>,
}

#[derive(Debug, Args)]
pub struct TimelineArgs {
    /// Only steps that read or made versions of this dataset
    #[arg(long, value_name = "NAME")]
    pub dataset: Option<String>,
    /// Only steps by this person (their name, or their e-mail address)
    #[arg(long, value_name = "PERSON")]
    pub by: Option<String>,
    /// Only steps recorded at or after this time (ISO 8601 date or UTC time)
    #[arg(long, value_name = "TIME")]
    pub since: Option<String>,
    /// Only steps recorded at or before this time (a date includes its whole day)
    #[arg(long, value_name = "TIME")]
    pub until: Option<String>,
    /// Only the latest N steps (still shown oldest first)
    #[arg(long, value_name = "N")]
    pub limit: Option<usize>,
    /// Print JSON (fields: examples/reference.md, "JSON output"; schema/output/)
    #[arg(long)]
    pub json: bool,
}
