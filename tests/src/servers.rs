//! Real servers from Debian's packages, run by a test on localhost in a
//! folder of its own and stopped when the test ends (`cargo xtask test`
//! installs the packages).

use std::net::{SocketAddr, TcpListener, TcpStream};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

/// A free TCP port on 127.0.0.1 (bound and released; a server started
/// right after takes it).
pub fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .map(|a| a.port())
        .expect("a free port on localhost")
}

/// Waits until something accepts connections on `port`.
///
/// # Panics
/// After `limit`, with `log`'s contents.
pub fn wait_for_port(port: u16, limit: Duration, log: &Path) {
    let addr = SocketAddr::from(([127, 0, 0, 1], port));
    let t0 = Instant::now();
    while TcpStream::connect_timeout(&addr, Duration::from_millis(200)).is_err() {
        assert!(
            t0.elapsed() < limit,
            "nothing listens on port {port} after {limit:?}; log:\n{}",
            std::fs::read_to_string(log).unwrap_or_default()
        );
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// Finds a server binary of a Debian package (`/usr/sbin` is not on every
/// user's PATH).
pub fn sbin(name: &str) -> PathBuf {
    for dir in ["/usr/sbin", "/usr/bin", "/usr/local/sbin", "/usr/local/bin"] {
        let p = Path::new(dir).join(name);
        if p.exists() {
            return p;
        }
    }
    panic!("{name} is not installed: `cargo xtask test` installs it (Debian package)")
}

/// A mosquitto broker (Debian package `mosquitto`) on a free localhost
/// port, with persistence in its own folder, so that a restart keeps the
/// subscriptions and queued messages of persistent sessions.
pub struct Mosquitto {
    dir: tempfile::TempDir,
    /// Its port.
    pub port: u16,
    child: Option<Child>,
}

impl Mosquitto {
    /// Starts the broker.
    ///
    /// # Panics
    /// If mosquitto is missing or does not come up within a minute.
    pub fn start() -> Self {
        let dir = tempfile::tempdir().expect("temp dir");
        let port = free_port();
        let conf = format!(
            "listener {port} 127.0.0.1\nallow_anonymous true\npersistence true\npersistence_location {}/\nuser root\nlog_dest file {}/broker.log\nlog_type error\nlog_type warning\nlog_type notice\n",
            dir.path().display(),
            dir.path().display()
        );
        std::fs::write(dir.path().join("mosquitto.conf"), conf).expect("broker config");
        let mut m = Self {
            dir,
            port,
            child: None,
        };
        m.restart();
        m
    }

    fn log(&self) -> PathBuf {
        self.dir.path().join("broker.log")
    }

    /// Stops the broker as a service manager would (SIGTERM: it saves its
    /// persistence file) and waits for it to end.
    pub fn stop(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = Command::new("kill")
                .args(["-TERM", &c.id().to_string()])
                .status();
            let t0 = Instant::now();
            while c.try_wait().ok().flatten().is_none() {
                if t0.elapsed() > Duration::from_secs(20) {
                    let _ = c.kill();
                }
                std::thread::sleep(Duration::from_millis(20));
            }
        }
    }

    /// Starts it (again) on the same port with the same persistence.
    pub fn restart(&mut self) {
        self.stop();
        let child = Command::new(sbin("mosquitto"))
            .arg("-c")
            .arg(self.dir.path().join("mosquitto.conf"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("start mosquitto");
        self.child = Some(child);
        wait_for_port(self.port, Duration::from_secs(60), &self.log());
    }
}

/// A mosquitto broker with two listeners on localhost: the plain one of
/// [`Mosquitto`] (anonymous, for the test's subscriber) and a TLS one that
/// takes only `user` with `password` (a password file made with
/// `mosquitto_passwd`), with a server certificate for 127.0.0.1 signed by a
/// throwaway CA made here with the `openssl` command (Debian package
/// `openssl`).
pub struct SecureMosquitto {
    /// The broker (its `port` is the plain listener).
    pub broker: Mosquitto,
    /// The TLS listener's port.
    pub tls_port: u16,
    /// The CA certificate (PEM) the gateway is given as `tls_ca`.
    pub ca_pem: PathBuf,
}

fn run_ok(cmd: &mut Command) {
    let o = cmd.output().unwrap_or_else(|e| panic!("{cmd:?}: {e}"));
    assert!(
        o.status.success(),
        "{cmd:?}: {}",
        String::from_utf8_lossy(&o.stderr)
    );
}

impl SecureMosquitto {
    /// Starts the broker with both listeners.
    ///
    /// # Panics
    /// If mosquitto, mosquitto_passwd or openssl is missing, or the broker
    /// does not come up within a minute.
    pub fn start(user: &str, password: &str) -> Self {
        let dir = tempfile::tempdir().expect("temp dir");
        let d = dir.path();
        let openssl = |args: &[&str]| run_ok(Command::new("openssl").args(args).current_dir(d));
        openssl(&[
            "req",
            "-x509",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-keyout",
            "ca.key",
            "-out",
            "ca.pem",
            "-days",
            "2",
            "-subj",
            "/CN=Fringe test CA",
        ]);
        openssl(&[
            "req",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-keyout",
            "server.key",
            "-out",
            "server.csr",
            "-subj",
            "/CN=localhost",
        ]);
        std::fs::write(
            d.join("ext.cnf"),
            "subjectAltName=IP:127.0.0.1,DNS:localhost\nbasicConstraints=CA:FALSE\n\
             keyUsage=digitalSignature,keyEncipherment\nextendedKeyUsage=serverAuth\n",
        )
        .expect("ext");
        openssl(&[
            "x509",
            "-req",
            "-in",
            "server.csr",
            "-CA",
            "ca.pem",
            "-CAkey",
            "ca.key",
            "-CAcreateserial",
            "-out",
            "server.pem",
            "-days",
            "2",
            "-extfile",
            "ext.cnf",
        ]);
        run_ok(
            Command::new(sbin_or_bin("mosquitto_passwd"))
                .args(["-b", "-c", "passwd", user, password])
                .current_dir(d),
        );
        let port = free_port();
        let tls_port = free_port();
        let conf = format!(
            "per_listener_settings true\n\
             listener {port} 127.0.0.1\nallow_anonymous true\n\
             listener {tls_port} 127.0.0.1\nallow_anonymous false\npassword_file {d}/passwd\n\
             cafile {d}/ca.pem\ncertfile {d}/server.pem\nkeyfile {d}/server.key\n\
             persistence true\npersistence_location {d}/\nuser root\n\
             log_dest file {d}/broker.log\nlog_type error\nlog_type warning\nlog_type notice\n",
            d = d.display()
        );
        std::fs::write(d.join("mosquitto.conf"), conf).expect("broker config");
        let ca_pem = d.join("ca.pem");
        let mut broker = Mosquitto {
            dir,
            port,
            child: None,
        };
        broker.restart();
        wait_for_port(tls_port, Duration::from_secs(60), &broker.log());
        Self {
            broker,
            tls_port,
            ca_pem,
        }
    }
}

/// A program of a Debian package, in /usr/sbin or /usr/bin.
fn sbin_or_bin(name: &str) -> PathBuf {
    ["/usr/bin", "/usr/sbin"]
        .iter()
        .map(|d| Path::new(d).join(name))
        .find(|p| p.exists())
        .unwrap_or_else(|| {
            panic!("{name} is not installed: `cargo xtask test` installs it (Debian package)")
        })
}

impl Drop for Mosquitto {
    fn drop(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// The `bin` folder of the installed PostgreSQL (Debian package
/// `postgresql`), the newest version if several.
pub fn postgres_bin() -> PathBuf {
    let mut versions: Vec<PathBuf> = std::fs::read_dir("/usr/lib/postgresql")
        .map(|d| {
            d.filter_map(Result::ok)
                .map(|e| e.path().join("bin"))
                .collect()
        })
        .unwrap_or_default();
    versions.retain(|p| p.join("initdb").exists());
    versions.sort();
    versions.pop().expect(
        "PostgreSQL is not installed: `cargo xtask test` installs it (Debian package postgresql)",
    )
}

/// A throwaway PostgreSQL cluster (Debian's binaries) on a free localhost
/// port, trust authentication for user `fringe`, database `fringe`. As
/// root the server runs as the `postgres` user (initdb refuses root).
pub struct Postgres {
    dir: tempfile::TempDir,
    /// Its port.
    pub port: u16,
    running: bool,
    /// Whether the server flushes its WAL to disk (off for tests, which
    /// do not survive a power cut anyway; on for benchmarks).
    fsync: bool,
}

fn as_postgres(cmd: &Path) -> Command {
    let root = Command::new("id")
        .arg("-u")
        .output()
        .map(|o| String::from_utf8_lossy(&o.stdout).trim() == "0")
        .unwrap_or(false);
    if root {
        let mut c = Command::new("runuser");
        c.args(["-u", "postgres", "--"]).arg(cmd);
        c
    } else {
        Command::new(cmd)
    }
}

impl Postgres {
    /// Creates and starts the cluster (`fsync = off`: for tests).
    ///
    /// # Panics
    /// If PostgreSQL is missing or does not start within a minute.
    pub fn start() -> Self {
        Self::start_with(false)
    }

    /// Creates and starts the cluster with PostgreSQL's default durability
    /// (`fsync = on`, `synchronous_commit = on`): for benchmarks.
    ///
    /// # Panics
    /// As [`Postgres::start`].
    pub fn start_durable() -> Self {
        Self::start_with(true)
    }

    fn start_with(fsync: bool) -> Self {
        let dir = tempfile::Builder::new()
            .prefix("fringe-pg")
            .tempdir()
            .expect("temp dir");
        let _ = Command::new("chown")
            .args(["-R", "postgres:postgres"])
            .arg(dir.path())
            .status();
        let bin = postgres_bin();
        let out = as_postgres(&bin.join("initdb"))
            .arg("-D")
            .arg(dir.path().join("data"))
            .args(["-A", "trust", "-U", "fringe", "--no-sync", "-E", "UTF8"])
            .output()
            .expect("run initdb");
        assert!(
            out.status.success(),
            "initdb failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        let mut pg = Self {
            dir,
            port: free_port(),
            running: false,
            fsync,
        };
        pg.restart();
        let out = Command::new(bin.join("createdb"))
            .args([
                "-h",
                "127.0.0.1",
                "-p",
                &pg.port.to_string(),
                "-U",
                "fringe",
                "fringe",
            ])
            .output()
            .expect("run createdb");
        assert!(
            out.status.success(),
            "createdb failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        pg
    }

    /// The connection URL of database `fringe`.
    pub fn url(&self) -> String {
        format!("postgres://fringe@127.0.0.1:{}/fringe", self.port)
    }

    fn pg_ctl(&self, args: &[&str]) -> std::process::Output {
        as_postgres(&postgres_bin().join("pg_ctl"))
            .arg("-D")
            .arg(self.dir.path().join("data"))
            .args(args)
            .output()
            .expect("run pg_ctl")
    }

    /// Starts the server (again) on the same port and data.
    pub fn restart(&mut self) {
        self.stop();
        let opts = format!(
            "-p {} -k {} -c listen_addresses=127.0.0.1 -c fsync={}",
            self.port,
            self.dir.path().display(),
            if self.fsync { "on" } else { "off" }
        );
        let log = self.dir.path().join("server.log");
        let out = self.pg_ctl(&[
            "-w",
            "-t",
            "60",
            "-l",
            log.to_str().unwrap_or_default(),
            "-o",
            &opts,
            "start",
        ]);
        assert!(
            out.status.success(),
            "pg_ctl start failed: {}{}",
            String::from_utf8_lossy(&out.stderr),
            std::fs::read_to_string(&log).unwrap_or_default()
        );
        self.running = true;
        wait_for_port(self.port, Duration::from_secs(60), &log);
    }

    /// Stops the server (fast shutdown: clients disconnected).
    pub fn stop(&mut self) {
        if self.running {
            let _ = self.pg_ctl(&["-m", "fast", "-w", "stop"]);
            self.running = false;
        }
    }
}

impl Drop for Postgres {
    fn drop(&mut self) {
        self.stop();
    }
}
