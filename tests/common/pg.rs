//! A real PostgreSQL server for the tests of shared stores: Debian's `postgresql` package
//! (installed by tests/run), started once per test binary in a temporary data folder on
//! loopback at a free port, as the unprivileged user `nobody` when the tests run as root
//! (initdb refuses root), and stopped when the test binary exits, whether its tests passed or
//! not. Logins over TCP need a password (SCRAM-SHA-256), which the tests keep in a password file
//! named by PGPASSFILE, as a person would keep theirs in ~/.pgpass. No mock: every query of a
//! shared store in these tests runs on this server.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::OnceLock;

/// The superuser the tests' cluster is made with, and its password.
pub const SUPERUSER: &str = "sluice_test_admin";
pub const PASSWORD: &str = "loopback-only-test-password";

pub struct Server {
    pub port: u16,
    pub bin: PathBuf,
    pub data: PathBuf,
    pub socket: PathBuf,
    /// The password file every sluice the tests run is given (PGPASSFILE).
    pub passfile: PathBuf,
    root: PathBuf,
    as_nobody: bool,
}

static SERVER: OnceLock<Server> = OnceLock::new();

/// The password file, once the server runs (the sandbox hands it to every sluice it runs).
pub fn passfile() -> Option<&'static Path> {
    SERVER.get().map(|s| s.passfile.as_path())
}

/// The binaries of the newest PostgreSQL Debian installs.
fn bin_dir() -> PathBuf {
    let mut found: Vec<(u32, PathBuf)> = std::fs::read_dir("/usr/lib/postgresql")
        .expect("PostgreSQL is not installed (/usr/lib/postgresql is missing); run tests/run, which installs Debian's postgresql")
        .flatten()
        .filter_map(|e| {
            let v = e.file_name().to_str()?.parse::<u32>().ok()?;
            let bin = e.path().join("bin");
            bin.join("initdb").is_file().then_some((v, bin))
        })
        .collect();
    found.sort();
    found
        .pop()
        .expect("no initdb under /usr/lib/postgresql/*/bin; run tests/run")
        .1
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .expect("a free loopback port")
        .port()
}

extern "C" fn stop_at_exit() {
    if let Some(s) = SERVER.get() {
        let _ = s
            .as_user(&s.bin.join("pg_ctl"))
            .args(["stop", "-m", "immediate", "-w", "-D"])
            .arg(&s.data)
            .output();
        let _ = std::fs::remove_dir_all(&s.root);
    }
}

impl Server {
    fn as_user(&self, program: &Path) -> Command {
        if self.as_nobody {
            let mut c = Command::new("runuser");
            c.args(["-u", "nobody", "--"]).arg(program);
            c
        } else {
            Command::new(program)
        }
    }

    /// Runs SQL as the superuser over the local socket; panics with psql's message on failure.
    pub fn admin_sql(&self, db: &str, sql: &str) -> String {
        let out = self.psql(SUPERUSER, db, sql);
        assert!(
            out.0,
            "psql as {SUPERUSER} on {db} failed:\n{sql}\n{}",
            out.1
        );
        out.1
    }

    /// Runs SQL as `role` over TCP with the password file; (succeeded, output and messages).
    pub fn psql(&self, role: &str, db: &str, sql: &str) -> (bool, String) {
        let out = Command::new(self.bin.join("psql"))
            .args([
                "-X",
                "-q",
                "-A",
                "-t",
                "-v",
                "ON_ERROR_STOP=1",
                "-h",
                "127.0.0.1",
            ])
            .arg("-p")
            .arg(self.port.to_string())
            .args(["-U", role, "-d", db, "-c", sql])
            .env("PGPASSFILE", &self.passfile)
            .env_remove("PGPASSWORD")
            .output()
            .expect("run psql");
        (
            out.status.success(),
            format!(
                "{}{}",
                String::from_utf8_lossy(&out.stdout),
                String::from_utf8_lossy(&out.stderr)
            ),
        )
    }

    /// A fresh database for one test, and the connection string a store names it by
    /// (no password: that is in the password file).
    pub fn new_database(&self, name: &str) -> String {
        self.admin_sql("postgres", &format!("CREATE DATABASE {name}"));
        format!(
            "host=127.0.0.1 port={} dbname={name} user={SUPERUSER}",
            self.port
        )
    }

    /// Adds a login role with the tests' password (the password file's entry covers it).
    pub fn add_login(&self, role: &str) {
        self.admin_sql(
            "postgres",
            &format!("CREATE ROLE {role} LOGIN PASSWORD '{PASSWORD}'"),
        );
    }

    pub fn connection(&self, db: &str, role: &str) -> String {
        format!("host=127.0.0.1 port={} dbname={db} user={role}", self.port)
    }
}

/// The tests' server, started on first use.
pub fn server() -> &'static Server {
    SERVER.get_or_init(start)
}

fn start() -> Server {
    let bin = bin_dir();
    let as_nobody = unsafe { libc::geteuid() } == 0;
    // As nobody, the cluster's folder must be reachable by nobody: /tmp, whatever TMPDIR says.
    let base = if as_nobody {
        PathBuf::from("/tmp")
    } else {
        std::env::temp_dir()
    };
    let root = base.join(format!("sluice-pg-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&root);
    let data = root.join("data");
    let socket = root.join("socket");
    std::fs::create_dir_all(&socket).unwrap();
    let pwfile = root.join("pw");
    std::fs::write(&pwfile, format!("{PASSWORD}\n")).unwrap();
    let passfile = root.join("pgpass");
    std::fs::write(&passfile, format!("127.0.0.1:*:*:*:{PASSWORD}\n")).unwrap();
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&passfile, std::fs::Permissions::from_mode(0o600)).unwrap();
    }
    if as_nobody {
        let st = Command::new("chown")
            .args(["-R", "nobody"])
            .arg(&root)
            .status()
            .unwrap();
        assert!(st.success(), "chown of the server's folder to nobody");
        // The password file stays readable to the tests (root) only.
        let st = Command::new("chown")
            .arg("root")
            .arg(&passfile)
            .status()
            .unwrap();
        assert!(st.success());
    }
    let mut server = Server {
        port: 0,
        bin,
        data,
        socket,
        passfile,
        root,
        as_nobody,
    };
    let out = server
        .as_user(&server.bin.join("initdb"))
        .arg("-D")
        .arg(&server.data)
        .args([
            "-U",
            SUPERUSER,
            "--auth-local=trust",
            "--auth-host=scram-sha-256",
        ])
        .arg(format!("--pwfile={}", pwfile.display()))
        .args(["-E", "UTF8", "--locale=C.UTF-8", "--no-sync"])
        .output()
        .expect("run initdb");
    assert!(
        out.status.success(),
        "initdb failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let mut last = String::new();
    for _ in 0..5 {
        server.port = free_port();
        let opts = format!(
            "-c listen_addresses=127.0.0.1 -p {} -k {} -c fsync=off -c max_connections=60",
            server.port,
            server.socket.display()
        );
        let out = server
            .as_user(&server.bin.join("pg_ctl"))
            .arg("-D")
            .arg(&server.data)
            .arg("-l")
            .arg(server.root.join("log"))
            .args(["-w", "-t", "60", "-o", &opts, "start"])
            .output()
            .expect("run pg_ctl");
        if out.status.success() {
            unsafe { libc::atexit(stop_at_exit) };
            return server;
        }
        last = format!(
            "{}{}",
            String::from_utf8_lossy(&out.stderr),
            std::fs::read_to_string(server.root.join("log")).unwrap_or_default()
        );
    }
    panic!("the PostgreSQL server did not start: {last}");
}
