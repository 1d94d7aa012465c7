//! Test harness: fresh databases on both engines, the real `ohmline` binary as a
//! server on an ephemeral port, and the CLI.
//!
//! PostgreSQL is taken from `OHMLINE_TEST_POSTGRES` (default
//! `postgres://postgres@127.0.0.1:5432/postgres`); each test gets its own
//! database, dropped afterwards. A missing PostgreSQL fails the tests: it is
//! never skipped silently.

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::{Duration, Instant};

use ohmline_core::forward::{Forward, ForwardParams, Resistivity};
use ohmline_core::geometry::{Electrode, LineGeometry, Surface};
use ohmline_core::mesh::{Mesh, MeshParams};
use ohmline_core::model::{Body, ModelDescription};
use ohmline_core::noise::{NoiseParams, add_noise};
use ohmline_core::sequence::{Quadrupole, Sequence, geometric_factor_flat};
use ohmline_server::db::Db;
use tempfile::TempDir;

pub const BIN: &str = env!("CARGO_BIN_EXE_ohmline");

/// Which database engine a test runs against.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Engine {
    Sqlite,
    Postgres,
}

/// Runs an async test body once per engine as two test functions.
#[macro_export]
macro_rules! on_both_engines {
    ($name:ident) => {
        mod $name {
            #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
            async fn sqlite() {
                super::$name($crate::support::Engine::Sqlite).await
            }
            #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
            async fn postgres() {
                super::$name($crate::support::Engine::Postgres).await
            }
        }
    };
}

static COUNTER: AtomicUsize = AtomicUsize::new(0);
static SERVERS: AtomicUsize = AtomicUsize::new(0);

fn admin_url() -> String {
    std::env::var("OHMLINE_TEST_POSTGRES")
        .unwrap_or_else(|_| "postgres://postgres@127.0.0.1:5432/postgres".into())
}

/// A fresh, empty database plus a scratch folder; removed on drop.
pub struct TestDb {
    pub url: String,
    pub dir: TempDir,
    pg_name: Option<String>,
}

/// A configuration for tests that kill processes: one job loop, the
/// shortest lease (a killed process's job is claimed again after 3 s), a 1 s
/// shutdown grace, one change mode and few iterations to keep processing
/// short. `top` goes before the tables (top-level keys), `tail` after them
/// (more tables). Written to `ohmline.toml` in the test's folder.
pub fn crash_test_config(db: &TestDb, top: &str, tail: &str) -> PathBuf {
    let path = db.path("ohmline.toml");
    let body = r#"
[workers]
concurrency = 1
lease_s = 3
shutdown_grace_s = 1

[processing]
change_modes = ["ratio"]
max_iterations = 4
"#;
    std::fs::write(&path, format!("{top}\n{body}\n{tail}\n")).unwrap();
    path
}

impl TestDb {
    pub async fn new(engine: Engine) -> TestDb {
        let dir = tempfile::tempdir().expect("temp dir");
        match engine {
            Engine::Sqlite => {
                let url = format!("sqlite://{}", dir.path().join("ohmline.sqlite").display());
                TestDb { url, dir, pg_name: None }
            }
            Engine::Postgres => {
                let name = format!(
                    "ohmline_t_{}_{}_{}",
                    std::process::id(),
                    COUNTER.fetch_add(1, Ordering::SeqCst),
                    rand::random::<u32>()
                );
                let admin = Db::connect(&admin_url()).await.unwrap_or_else(|e| {
                    panic!(
                        "PostgreSQL is required for the test suite ({}): {e}. Start it or set OHMLINE_TEST_POSTGRES.",
                        admin_url()
                    )
                });
                let Db::Postgres(pool) = &admin else {
                    panic!("OHMLINE_TEST_POSTGRES must be a postgres:// URL")
                };
                sqlx::query(&format!("CREATE DATABASE {name}"))
                    .execute(pool)
                    .await
                    .expect("create test database");
                admin.close().await;
                let base = admin_url();
                let url = match base.rfind('/') {
                    Some(i) if base[..i].contains("://") && i > base.find("://").unwrap() + 2 => {
                        format!("{}/{name}", &base[..i])
                    }
                    _ => format!("{base}/{name}"),
                };
                TestDb { url, dir, pg_name: Some(name) }
            }
        }
    }

    /// An existing database at `url` (created and removed by the caller),
    /// with a fresh scratch folder.
    pub fn at(url: String) -> TestDb {
        TestDb { url, dir: tempfile::tempdir().expect("temp dir"), pg_name: None }
    }

    /// A connection of the test's own, for checking what is stored.
    pub async fn connect(&self) -> Db {
        let db = Db::connect(&self.url).await.expect("connect to test database");
        db.migrate().await.expect("migrate");
        db
    }

    pub fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }
}

impl Drop for TestDb {
    fn drop(&mut self) {
        if let Some(name) = self.pg_name.take() {
            // Drop runs inside the test's runtime; use a thread with its own.
            let url = admin_url();
            let _ = std::thread::spawn(move || {
                let rt =
                    tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
                rt.block_on(async {
                    if let Ok(Db::Postgres(pool)) = Db::connect(&url).await {
                        let _ =
                            sqlx::query(&format!("DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
                                .execute(&pool)
                                .await;
                        pool.close().await;
                    }
                });
            })
            .join();
        }
    }
}

/// Runs the CLI against a database; panics with its output if it fails.
pub fn cli(db: &TestDb, args: &[&str]) -> String {
    let out = cli_output(db, args);
    assert!(
        out.status.success(),
        "ohmline {args:?} failed:\nstdout: {}\nstderr: {}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).expect("utf-8 stdout")
}

/// Runs the CLI and returns its output whatever the exit status.
pub fn cli_output(db: &TestDb, args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .env("OHMLINE_DATABASE", &db.url)
        .env("OHMLINE_DATA_DIR", db.dir.path())
        .env("RUST_LOG", "warn")
        .output()
        .expect("run ohmline")
}

/// A running `ohmline serve` process; killed on drop.
pub struct Server {
    child: Child,
    pub base: String,
    pub client: reqwest::Client,
}

impl Server {
    /// Starts `ohmline serve` on 127.0.0.1:0 and waits until it listens.
    pub async fn start(db: &TestDb) -> Server {
        Self::start_with(db, None).await
    }

    /// As [`Server::start`], with a configuration file.
    pub async fn start_with(db: &TestDb, config: Option<&Path>) -> Server {
        Self::start_with_env(db, config, &[]).await
    }

    /// As [`Server::start_with`], with more environment variables (they win
    /// over the harness's own, e.g. `RUST_LOG`).
    pub async fn start_with_env(
        db: &TestDb,
        config: Option<&Path>,
        env: &[(&str, &str)],
    ) -> Server {
        Self::start_role_env(db, config, "all", env).await
    }

    /// As [`Server::start_with`], in a role (`api`, `worker`, `all`).
    pub async fn start_role(db: &TestDb, config: Option<&Path>, role: &str) -> Server {
        Self::start_role_env(db, config, role, &[]).await
    }

    /// A server in `role` with more environment variables. Each process logs
    /// to its own `server-<n>.log` in the test's folder (the first one to
    /// `server.log`).
    pub async fn start_role_env(
        db: &TestDb,
        config: Option<&Path>,
        role: &str,
        env: &[(&str, &str)],
    ) -> Server {
        let mut cmd = Command::new(BIN);
        cmd.arg("serve").arg("--listen").arg("127.0.0.1:0").arg("--role").arg(role);
        if let Some(c) = config {
            cmd.arg("--config").arg(c);
        }
        let n = SERVERS.fetch_add(1, Ordering::SeqCst);
        let mut log = db.dir.path().join("server.log");
        if log.exists() {
            log = db.dir.path().join(format!("server-{n}.log"));
        }
        let mut child = cmd
            .env("OHMLINE_DATABASE", &db.url)
            .env("OHMLINE_DATA_DIR", db.dir.path())
            .env("RUST_LOG", "warn")
            .envs(env.iter().copied())
            .stdout(Stdio::piped())
            .stderr(std::fs::File::create(&log).expect("server log"))
            .spawn()
            .expect("spawn ohmline serve");
        let stdout = child.stdout.take().expect("stdout");
        let base = tokio::task::spawn_blocking(move || {
            let mut lines = BufReader::new(stdout).lines();
            let Some(Ok(first)) = lines.next() else {
                panic!(
                    "server did not start; its log:\n{}",
                    std::fs::read_to_string(&log).unwrap_or_default()
                )
            };
            // Keep draining so the server never blocks on a full pipe.
            std::thread::spawn(move || for _ in lines {});
            first.rsplit(' ').next().expect("address").to_string()
        })
        .await
        .unwrap();
        assert!(base.starts_with("http://127.0.0.1:"), "unexpected first line {base:?}");
        // A fresh connection per request, as a field meter makes: no keep-alive races.
        let client = reqwest::Client::builder().pool_max_idle_per_host(0).build().unwrap();
        let server = Server { child, base, client };
        server.wait_healthy().await;
        server
    }

    async fn wait_healthy(&self) {
        let deadline = Instant::now() + Duration::from_secs(20);
        loop {
            if let Ok(r) = self.client.get(self.url("/healthz")).send().await
                && r.status() == 200
            {
                return;
            }
            assert!(Instant::now() < deadline, "server did not become healthy");
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }

    pub fn url(&self, path: &str) -> String {
        format!("{}{path}", self.base)
    }

    /// Kills the process without warning (SIGKILL).
    pub fn kill(mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }

    /// The process id.
    pub fn pid(&self) -> u32 {
        self.child.id()
    }

    /// Asks the process to stop (SIGTERM) and waits up to `timeout` for it to
    /// exit; its exit status, or None when it is still running.
    pub async fn terminate(&mut self, timeout: Duration) -> Option<std::process::ExitStatus> {
        let sent = Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status()
            .expect("run kill");
        assert!(sent.success(), "kill -TERM failed");
        let deadline = Instant::now() + timeout;
        loop {
            if let Some(status) = self.child.try_wait().expect("wait for the server") {
                return Some(status);
            }
            if Instant::now() >= deadline {
                return None;
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }

    /// Posts an epoch body with a token.
    pub async fn post_epoch(
        &self,
        line: &str,
        token: &str,
        content_type: &str,
        query: &str,
        body: impl Into<reqwest::Body>,
    ) -> (u16, serde_json::Value) {
        let url = self.url(&format!("/api/v1/lines/{line}/epochs{query}"));
        let r = self
            .client
            .post(&url)
            .bearer_auth(token)
            .header("content-type", content_type)
            .body(body)
            .send()
            .await
            .unwrap_or_else(|e| panic!("POST {url}: {e}"));
        let status = r.status().as_u16();
        let json = r.json().await.unwrap_or(serde_json::Value::Null);
        (status, json)
    }

    pub async fn get_json(&self, path: &str, token: &str) -> (u16, serde_json::Value) {
        let r = self.client.get(self.url(path)).bearer_auth(token).send().await.expect("request");
        let status = r.status().as_u16();
        (status, r.json().await.unwrap_or(serde_json::Value::Null))
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A flat test line: `n` electrodes `E1…En` at spacing `a` m, and a sequence of
/// Wenner (a = 1…`max_wenner`) and dipole–dipole (a = 1…3, n = 1…6) quadrupoles.
pub struct TestLine {
    pub geometry: LineGeometry,
    pub sequence: Sequence,
}

impl TestLine {
    pub fn new(n: usize, spacing: f64, max_wenner: usize) -> TestLine {
        let geometry = LineGeometry::new(
            (0..n)
                .map(|i| Electrode::new(format!("E{}", i + 1), i as f64 * spacing, 10.0))
                .collect(),
        )
        .unwrap();
        let mut q = Vec::new();
        for a in 1..=max_wenner {
            for i in 0..n.saturating_sub(3 * a) {
                q.push(Quadrupole::new(i, i + 3 * a, i + a, i + 2 * a));
            }
        }
        for a in 1..=3 {
            for nn in 1..=6 {
                for i in 0..n.saturating_sub((nn + 2) * a) {
                    q.push(Quadrupole::new(i, i + a, i + (nn + 1) * a, i + (nn + 2) * a));
                }
            }
        }
        let sequence = Sequence::new(q, n).unwrap();
        TestLine { geometry, sequence }
    }

    pub fn electrodes_csv(&self) -> String {
        let mut s = String::from("label,x,z\n");
        for e in self.geometry.electrodes() {
            s.push_str(&format!("{},{},{}\n", e.label(), e.x(), e.z()));
        }
        s
    }

    pub fn sequence_csv(&self) -> String {
        ohmline_server::files::write_sequence(&self.sequence, &self.geometry)
    }

    fn label(&self, i: Option<usize>) -> String {
        i.map(|i| self.geometry.electrodes()[i].label().to_string()).unwrap_or_default()
    }

    /// Readings of a homogeneous ground of resistivity `rho` (R = ρ/K) with a
    /// small deterministic variation per epoch `k`, as CSV.
    pub fn epoch_csv(&self, started_at: &str, rho: f64, k: usize) -> String {
        let mut s = format!(
            "# started_at: {started_at}\n# meter_id: test-meter\na,b,m,n,current_ma,voltage_mv,stack_error_pct\n"
        );
        for (i, q) in self.sequence.quadrupoles().iter().enumerate() {
            let kf = geometric_factor_flat(&self.geometry, q).unwrap();
            let r = rho / kf * (1.0 + 0.001 * (((i * 7 + k * 13) % 11) as f64 - 5.0));
            s.push_str(&format!(
                "{},{},{},{},100,{:.6},0.{}\n",
                self.label(Some(q.a)),
                self.label(q.b),
                self.label(Some(q.m)),
                self.label(q.n),
                r * 100.0,
                i % 9 + 1
            ));
        }
        s
    }

    /// The same kind of epoch as JSON with resistances.
    pub fn epoch_json(&self, started_at: &str, rho: f64) -> String {
        let readings: Vec<serde_json::Value> = self
            .sequence
            .quadrupoles()
            .iter()
            .map(|q| {
                let kf = geometric_factor_flat(&self.geometry, q).unwrap();
                serde_json::json!({
                    "a": self.label(Some(q.a)), "b": self.label(q.b),
                    "m": self.label(Some(q.m)), "n": self.label(q.n),
                    "resistance_ohm": rho / kf,
                })
            })
            .collect();
        serde_json::json!({
            "started_at": started_at,
            "meter_id": "test-meter",
            "temperatures": [{"depth_m": 0.5, "temperature_c": 11.5}, {"depth_m": 1.5, "temperature_c": 10.25}],
            "readings": readings,
        })
        .to_string()
    }
}

/// Registers site `site` and line `line` through the CLI and issues a token.
pub fn register_line(db: &TestDb, site: &str, line: &str, tl: &TestLine) -> String {
    let e = db.path(&format!("{line}-electrodes.csv"));
    let q = db.path(&format!("{line}-sequence.csv"));
    std::fs::write(&e, tl.electrodes_csv()).unwrap();
    std::fs::write(&q, tl.sequence_csv()).unwrap();
    let sites = cli(db, &["site", "list"]);
    if !sites.lines().any(|l| l.split('\t').nth(1) == Some(site)) {
        cli(db, &["site", "add", site]);
    }
    cli(
        db,
        &[
            "line",
            "add",
            "--site",
            site,
            "--name",
            line,
            "--electrodes",
            e.to_str().unwrap(),
            "--sequence",
            q.to_str().unwrap(),
        ],
    );
    cli(db, &["token", "issue", "--line", line]).trim().to_string()
}

impl TestLine {
    /// The same line with every quadrupole's reciprocal appended.
    pub fn with_reciprocals(mut self) -> TestLine {
        let mut q = self.sequence.quadrupoles().to_vec();
        let extra: Vec<Quadrupole> = q.iter().map(|x| x.reciprocal()).collect();
        q.extend(extra);
        self.sequence = Sequence::new(q, self.geometry.len()).unwrap();
        self
    }

    /// An epoch of a homogeneous ground with seeded 0.5 % noise; `fault`
    /// rewrites (quadrupole, R, contact at A) per reading.
    pub fn epoch_csv_with(
        &self,
        started_at: &str,
        rho: f64,
        seed: u64,
        fault: impl Fn(usize, &Quadrupole, f64) -> (f64, f64),
    ) -> String {
        use rand::{Rng, SeedableRng};
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let mut s = format!(
            "# started_at: {started_at}\na,b,m,n,current_ma,voltage_mv,stack_error_pct,contact_a_ohm,contact_b_ohm\n"
        );
        for (i, q) in self.sequence.quadrupoles().iter().enumerate() {
            let kf = geometric_factor_flat(&self.geometry, q).unwrap();
            let noise: f64 = rng.random_range(-0.005..0.005);
            let (r, contact) = fault(i, q, rho / kf * (1.0 + noise));
            s.push_str(&format!(
                "{},{},{},{},100,{:.9},0.2,{contact},900\n",
                self.label(Some(q.a)),
                self.label(q.b),
                self.label(Some(q.m)),
                self.label(q.n),
                r * 100.0
            ));
        }
        s
    }
}

impl Server {
    /// Waits until an epoch reaches `status` (a processing stage) or a later
    /// one, or fails the test.
    pub async fn wait_status(&self, epoch_id: i64, token: &str, status: &str) -> serde_json::Value {
        const STAGES: [&str; 4] = ["received", "checked", "inverted", "processed"];
        let rank = |s: &str| STAGES.iter().position(|x| *x == s);
        let wanted = rank(status).expect("a processing stage");
        let deadline = Instant::now() + Duration::from_secs(180);
        loop {
            let (code, v) = self.get_json(&format!("/api/v1/epochs/{epoch_id}"), token).await;
            assert_eq!(code, 200, "{v}");
            let now = v["status"].as_str().unwrap_or_default();
            if rank(now).is_some_and(|r| r >= wanted) {
                return v;
            }
            assert_ne!(now, "failed", "epoch {epoch_id} failed: {v}");
            assert!(
                Instant::now() < deadline,
                "epoch {epoch_id} stayed {} (waiting for {status})",
                v["status"]
            );
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
    }
}

/// An email received by [`SmtpSink`]: envelope and the raw message.
#[derive(Debug, Clone)]
pub struct ReceivedMail {
    pub from: String,
    pub to: Vec<String>,
    pub data: Vec<u8>,
}

#[derive(Clone)]
struct SinkHandler {
    mails: std::sync::Arc<std::sync::Mutex<Vec<ReceivedMail>>>,
    current: Option<ReceivedMail>,
}

impl mailin::Handler for SinkHandler {
    /// Addresses starting with `bounce` do not exist here: 550, a permanent refusal.
    fn rcpt(&mut self, to: &str) -> mailin::Response {
        if to.trim_start_matches('<').starts_with("bounce") {
            mailin::response::NO_MAILBOX
        } else {
            mailin::response::OK
        }
    }

    fn data_start(
        &mut self,
        _domain: &str,
        from: &str,
        _is8bit: bool,
        to: &[String],
    ) -> mailin::Response {
        self.current =
            Some(ReceivedMail { from: from.to_string(), to: to.to_vec(), data: Vec::new() });
        mailin::response::OK
    }

    fn data(&mut self, buf: &[u8]) -> std::io::Result<()> {
        if let Some(m) = &mut self.current {
            m.data.extend_from_slice(buf);
        }
        Ok(())
    }

    fn data_end(&mut self) -> mailin::Response {
        if let Some(m) = self.current.take() {
            self.mails.lock().unwrap().push(m);
        }
        mailin::response::OK
    }
}

/// How slowly [`SmtpSink`] takes a message: a wait after the message's last
/// line arrives before it is accepted (a server scanning it), and a wait after
/// accepting it before the reply goes out (a reply delayed on the way). A
/// message whose last line arrived is taken even if the client goes away
/// during either wait, as a server holding the whole message delivers it: the
/// client never learns that it was.
#[derive(Debug, Clone, Copy, Default)]
pub struct SmtpPace {
    pub before_accept: Duration,
    pub before_reply: Duration,
}

/// A real SMTP server on loopback for the tests: the SMTP state machine of the
/// `mailin` crate behind a tokio listener that the test can stop (port closed,
/// connections dropped) and start again on the same port. It accepts every
/// recipient except addresses starting with `bounce` (550), at once unless
/// paced ([`SmtpSink::set_pace`]).
pub struct SmtpSink {
    pub port: u16,
    mails: std::sync::Arc<std::sync::Mutex<Vec<ReceivedMail>>>,
    pace: std::sync::Arc<std::sync::Mutex<SmtpPace>>,
    task: Option<tokio::task::JoinHandle<()>>,
}

impl SmtpSink {
    pub async fn start() -> SmtpSink {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.expect("bind SMTP");
        let port = listener.local_addr().unwrap().port();
        let mut sink =
            SmtpSink { port, mails: Default::default(), pace: Default::default(), task: None };
        sink.task =
            Some(tokio::spawn(Self::serve(listener, sink.mails.clone(), sink.pace.clone())));
        sink
    }

    /// Paces the messages taken from now on.
    pub fn set_pace(&self, pace: SmtpPace) {
        *self.pace.lock().unwrap() = pace;
    }

    async fn serve(
        listener: tokio::net::TcpListener,
        mails: std::sync::Arc<std::sync::Mutex<Vec<ReceivedMail>>>,
        pace: std::sync::Arc<std::sync::Mutex<SmtpPace>>,
    ) {
        // Connections live in this set: aborting the server task drops them all.
        let mut connections = tokio::task::JoinSet::new();
        loop {
            let Ok((stream, peer)) = listener.accept().await else { continue };
            let handler = SinkHandler { mails: mails.clone(), current: None };
            let pace = pace.clone();
            connections.spawn(async move {
                use tokio::io::{AsyncBufReadExt, AsyncWriteExt, BufReader};
                let (read, mut write) = stream.into_split();
                let mut read = BufReader::new(read);
                let mut session =
                    mailin::SessionBuilder::new("sink.test").build(peer.ip(), handler);
                let greeting = session.greeting().buffer().unwrap();
                if write.write_all(&greeting).await.is_err() {
                    return;
                }
                let mut line = Vec::new();
                loop {
                    line.clear();
                    match read.read_until(b'\n', &mut line).await {
                        Ok(0) | Err(_) => return,
                        Ok(_) => {}
                    }
                    // A lone "." ends a message's data (RFC 5321 §4.1.1.4;
                    // a "." inside the data arrives dot-stuffed as "..").
                    let end_of_data = line == b".\r\n";
                    let p = *pace.lock().unwrap();
                    if end_of_data && !p.before_accept.is_zero() {
                        tokio::time::sleep(p.before_accept).await;
                    }
                    let res = session.process(&line);
                    if end_of_data && !p.before_reply.is_zero() {
                        tokio::time::sleep(p.before_reply).await;
                    }
                    match res.action {
                        mailin::Action::Reply => {
                            if write.write_all(&res.buffer().unwrap()).await.is_err() {
                                return;
                            }
                        }
                        mailin::Action::Close | mailin::Action::UpgradeTls => {
                            let _ = write.write_all(&res.buffer().unwrap()).await;
                            return;
                        }
                        mailin::Action::NoReply => {}
                    }
                }
            });
        }
    }

    /// Closes the port and drops open connections.
    pub async fn stop(&mut self) {
        if let Some(t) = self.task.take() {
            t.abort();
            let _ = t.await;
        }
    }

    /// Listens again on the same port.
    pub async fn restart(&mut self) {
        self.stop().await;
        let listener = tokio::net::TcpListener::bind(("127.0.0.1", self.port))
            .await
            .expect("bind the SMTP port again");
        self.task =
            Some(tokio::spawn(Self::serve(listener, self.mails.clone(), self.pace.clone())));
    }

    pub fn received(&self) -> Vec<ReceivedMail> {
        self.mails.lock().unwrap().clone()
    }

    /// Waits until at least `n` emails arrived (at most `timeout`), then returns all.
    pub async fn wait_for(&self, n: usize, timeout: Duration) -> Vec<ReceivedMail> {
        let deadline = Instant::now() + timeout;
        loop {
            let got = self.received();
            if got.len() >= n || Instant::now() > deadline {
                return got;
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }
}

impl Drop for SmtpSink {
    fn drop(&mut self) {
        if let Some(t) = self.task.take() {
            t.abort();
        }
    }
}
// ---------------------------------------------------------------------------
// Users, sessions and a headless browser.

/// Adds a user through the CLI and returns the generated password.
pub fn add_user(db: &TestDb, email: &str, role: &str) -> String {
    let password = cli(db, &["user", "add", "--email", email, "--role", role]).trim().to_string();
    assert!(password.len() >= 12, "a generated password is printed: {password:?}");
    password
}

/// Issues a personal API token through the CLI.
pub fn user_token(db: &TestDb, email: &str) -> String {
    cli(db, &["user", "token", "--email", email]).trim().to_string()
}

/// The value of `name="…" value="…"` hidden inputs in a page (the first one).
pub fn hidden_input(html: &str, name: &str) -> Option<String> {
    let key = format!("name=\"{name}\" value=\"");
    let start = html.find(&key)? + key.len();
    let end = html[start..].find('"')?;
    Some(html[start..start + end].to_string())
}

/// A cookie jar of one browser-like HTTP client (no redirects followed).
pub struct HttpSession {
    pub client: reqwest::Client,
    pub cookies: std::collections::BTreeMap<String, String>,
}

impl HttpSession {
    pub fn new() -> HttpSession {
        let client =
            reqwest::Client::builder().redirect(reqwest::redirect::Policy::none()).build().unwrap();
        HttpSession { client, cookies: Default::default() }
    }

    pub fn cookie_header(&self) -> String {
        self.cookies.iter().map(|(k, v)| format!("{k}={v}")).collect::<Vec<_>>().join("; ")
    }

    fn keep_cookies(&mut self, r: &reqwest::Response) {
        for v in r.headers().get_all("set-cookie") {
            let v = v.to_str().unwrap();
            let pair = v.split(';').next().unwrap();
            let (k, val) = pair.split_once('=').unwrap();
            if val.is_empty() || v.contains("Max-Age=0") {
                self.cookies.remove(k);
            } else {
                self.cookies.insert(k.to_string(), val.to_string());
            }
        }
    }

    /// GET; returns status, headers and body.
    pub async fn get(&mut self, url: &str) -> (u16, reqwest::header::HeaderMap, String) {
        let r = self.client.get(url).header("cookie", self.cookie_header()).send().await.unwrap();
        self.keep_cookies(&r);
        let (s, h) = (r.status().as_u16(), r.headers().clone());
        (s, h, r.text().await.unwrap())
    }

    /// POST of a URL-encoded form.
    pub async fn post(
        &mut self,
        url: &str,
        form: &[(&str, &str)],
    ) -> (u16, reqwest::header::HeaderMap, String) {
        let r = self
            .client
            .post(url)
            .header("cookie", self.cookie_header())
            .form(form)
            .send()
            .await
            .unwrap();
        self.keep_cookies(&r);
        let (s, h) = (r.status().as_u16(), r.headers().clone());
        (s, h, r.text().await.unwrap())
    }

    /// Signs in through the sign-in form; returns the status of the POST.
    pub async fn sign_in(&mut self, server: &Server, email: &str, password: &str) -> u16 {
        let (_, _, page) = self.get(&server.url("/sign-in")).await;
        let csrf = hidden_input(&page, "csrf").expect("sign-in form has a token");
        let (s, _, _) = self
            .post(
                &server.url("/sign-in"),
                &[("csrf", &csrf), ("email", email), ("password", password)],
            )
            .await;
        s
    }

    /// The CSRF token of the session, read from a page's sign-out form.
    pub async fn csrf(&mut self, server: &Server) -> String {
        let (s, _, page) = self.get(&server.url("/account")).await;
        assert_eq!(s, 200, "signed in");
        hidden_input(&page, "csrf").expect("the page has a token")
    }
}

/// Headless Chromium driven through chromedriver on a free port; both end on drop.
pub struct Browser {
    pub client: fantoccini::Client,
    driver: Child,
    _profile: TempDir,
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

impl Browser {
    /// Starts chromedriver and a fresh Chromium profile at 1280×900.
    pub async fn start() -> Browser {
        let port = free_port();
        let driver = Command::new("chromedriver")
            .arg(format!("--port={port}"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("chromedriver must be installed (Debian: chromium-driver)");
        let profile = tempfile::tempdir().unwrap();
        let url = format!("http://127.0.0.1:{port}");
        let deadline = Instant::now() + Duration::from_secs(20);
        let http = reqwest::Client::new();
        while http.get(format!("{url}/status")).send().await.is_err() {
            assert!(Instant::now() < deadline, "chromedriver did not start");
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        let mut caps = serde_json::Map::new();
        caps.insert(
            "goog:chromeOptions".into(),
            serde_json::json!({
                "binary": "/usr/bin/chromium",
                "args": [
                    "--headless", "--no-sandbox", "--disable-gpu",
                    "--disable-background-networking", "--disable-component-update",
                    "--disable-sync", "--disable-dev-shm-usage", "--window-size=1280,900",
                    format!("--user-data-dir={}", profile.path().display()),
                ],
            }),
        );
        let connector = hyper_util::client::legacy::connect::HttpConnector::new();
        let client = fantoccini::ClientBuilder::new(connector)
            .capabilities(caps)
            .connect(&url)
            .await
            .expect("start a Chromium session");
        Browser { client, driver, _profile: profile }
    }

    /// Ends the session (the driver is killed on drop).
    pub async fn close(self) {
        let _ = self.client.clone().close().await;
    }
}

impl Drop for Browser {
    fn drop(&mut self) {
        let _ = self.driver.kill();
        let _ = self.driver.wait();
    }
}

/// Folder for screenshots (`tests/artifacts/`, git-ignored).
pub fn artifacts_dir() -> PathBuf {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/artifacts");
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// Saves a PNG screenshot and checks it is not blank: it decodes, has the
/// expected size, and no single colour covers more than 97 % of its pixels
/// (a page with text, tables and a header bar has far more variety).
pub fn save_screenshot(name: &str, png_bytes: &[u8]) -> PathBuf {
    let path = artifacts_dir().join(format!("{name}.png"));
    std::fs::write(&path, png_bytes).unwrap();
    let decoder = png::Decoder::new(std::io::Cursor::new(png_bytes));
    let mut reader = decoder.read_info().expect("screenshot is a PNG");
    let mut buf = vec![0; reader.output_buffer_size().expect("size")];
    let info = reader.next_frame(&mut buf).expect("PNG frame");
    let channels = info.color_type.samples();
    let pixels = buf[..info.buffer_size()].chunks(channels);
    let n = (info.width * info.height) as usize;
    assert!(info.width >= 300 && info.height >= 300, "{name}: {}×{}", info.width, info.height);
    let mut counts = std::collections::HashMap::new();
    for p in pixels {
        *counts.entry(p.to_vec()).or_insert(0usize) += 1;
    }
    let top = counts.values().max().copied().unwrap_or(0);
    assert!(counts.len() > 20, "{name}: only {} colours — blank page?", counts.len());
    assert!(top * 100 < n * 97, "{name}: one colour covers {top} of {n} pixels — blank page?");
    path
}

/// Resistivity of the homogeneous ground of [`block_readings`], Ω·m.
pub const RHO: f64 = 100.0;
/// The conductive block of [`block_readings`]: chainage 13–17 m, 1–3 m below
/// the surface (z = 10 − depth), −40 %.
pub const BLOCK: [f64; 4] = [13.0, 17.0, 7.0, 9.0];

/// Resistances of the test line's sequence computed with the forward model
/// over homogeneous ground, with the [`BLOCK`] when `block`, and 1 % noise.
pub fn block_readings(tl: &TestLine, fwd: &Forward, block: bool, seed: u64) -> Vec<f64> {
    let bodies = if block {
        let [x0, x1, z0, z1] = BLOCK;
        vec![Body { polygon: vec![[x0, z0], [x1, z0], [x1, z1], [x0, z1]], rho: RHO * 0.6 }]
    } else {
        vec![]
    };
    let m = ModelDescription::new(RHO, vec![], bodies).unwrap();
    let rho = m.on_triangles(fwd.mesh());
    let r =
        fwd.simulate(Resistivity::Triangles(&rho), &tl.sequence).unwrap().resistances().to_vec();
    add_noise(&r, &NoiseParams { relative: 0.01, absolute: 0.0, seed }).unwrap()
}

/// An epoch upload (CSV) of resistances in sequence order.
pub fn readings_csv(tl: &TestLine, started_at: &str, r: &[f64]) -> String {
    let label = |i: Option<usize>| {
        i.map(|i| tl.geometry.electrodes()[i].label().to_string()).unwrap_or_default()
    };
    let mut s = format!("# started_at: {started_at}\na,b,m,n,resistance_ohm\n");
    for (q, r) in tl.sequence.quadrupoles().iter().zip(r) {
        s.push_str(&format!(
            "{},{},{},{},{r:.9}\n",
            label(Some(q.a)),
            label(q.b),
            label(Some(q.m)),
            label(q.n)
        ));
    }
    s
}

/// Waits until every epoch is processed.
pub async fn wait_processed(server: &Server, ids: &[i64], token: &str) {
    for &id in ids {
        let v = server.wait_status(id, token, "processed").await;
        assert_eq!(v["status"], "processed", "{v}");
    }
}

/// The forward model of a flat test line.
pub fn forward_of(tl: &TestLine) -> Forward {
    let surface = Surface::through_line(&tl.geometry, &[]).unwrap();
    let mesh = Mesh::new(&tl.geometry, &surface, &MeshParams::default()).unwrap();
    Forward::new(mesh, &ForwardParams::default()).unwrap()
}

/// Uploads a season to `line`: three quiet epochs (the baseline), then four
/// with the [`BLOCK`], 6 h apart from 2026-03-01 — enough for a zone alert
/// (persistence 3). Returns the epoch ids, oldest first.
pub async fn upload_block_season(
    server: &Server,
    tl: &TestLine,
    line: &str,
    token: &str,
) -> Vec<i64> {
    let fwd = forward_of(tl);
    let mut ids = Vec::new();
    for k in 0..7u64 {
        let at = format!("2026-03-0{}T{:02}:00:00Z", 1 + k / 4, (k % 4) * 6);
        let body = readings_csv(tl, &at, &block_readings(tl, &fwd, k >= 3, 100 + k));
        let (code, v) = server.post_epoch(line, token, "text/csv", "", body).await;
        assert_eq!(code, 201, "{v}");
        ids.push(v["epoch_id"].as_i64().unwrap());
    }
    ids
}

/// A `multipart/form-data` body of text fields and files (field, file name,
/// content); returns the content type and the body.
pub fn multipart_body(
    fields: &[(&str, String)],
    files: &[(&str, &str, String)],
) -> (String, Vec<u8>) {
    let boundary = format!("ohmline-test-{:016x}", rand::random::<u64>());
    let mut body = String::new();
    for (name, value) in fields {
        body.push_str(&format!(
            "--{boundary}\r\nContent-Disposition: form-data; name=\"{name}\"\r\n\r\n{value}\r\n"
        ));
    }
    for (name, filename, content) in files {
        body.push_str(&format!(
            "--{boundary}\r\nContent-Disposition: form-data; name=\"{name}\"; filename=\"{filename}\"\r\nContent-Type: text/csv\r\n\r\n{content}\r\n"
        ));
    }
    body.push_str(&format!("--{boundary}--\r\n"));
    (format!("multipart/form-data; boundary={boundary}"), body.into_bytes())
}
