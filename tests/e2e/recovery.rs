//! Crash recovery end to end: uploads from several meters while the server is
//! killed with SIGKILL and restarted on the same database; every acknowledged
//! epoch is stored exactly once with its raw body and processed, and no job is
//! left behind.

use std::io::Read;
use std::sync::Arc;
use std::time::{Duration, Instant};

use rand::{Rng, SeedableRng};
use tokio::sync::watch;

use ohmline_server::db::{self, Db};

use crate::support::{Engine, Server, TestDb, TestLine, crash_test_config, register_line};

/// An epoch a meter got a 2xx for.
#[derive(Debug, Clone)]
struct Acked {
    line: String,
    started_at: String,
    body: String,
    epoch_id: i64,
    status: u16,
}

/// What one meter saw: acknowledged epochs and how many sends failed on the
/// way (connection refused or cut, 503).
#[derive(Debug, Default)]
struct MeterLog {
    acked: Vec<Acked>,
    retries: usize,
}

/// Sends `bodies` one after another to whatever address `base` holds now,
/// re-sending the same body after any connection error or 503 until it gets
/// a 2xx, as a field meter does. Any other answer fails the test.
async fn meter(
    base: watch::Receiver<String>,
    line: String,
    token: String,
    bodies: Vec<(String, String)>,
    seed: u64,
    deadline: Instant,
) -> MeterLog {
    let client = reqwest::Client::builder()
        .pool_max_idle_per_host(0)
        .timeout(Duration::from_secs(10))
        .build()
        .unwrap();
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let mut log = MeterLog::default();
    for (started_at, body) in bodies {
        loop {
            assert!(Instant::now() < deadline, "{line} {started_at}: never acknowledged");
            let url = format!("{}/api/v1/lines/{line}/epochs", base.borrow().clone());
            let sent = client
                .post(&url)
                .bearer_auth(&token)
                .header("content-type", "text/csv")
                .body(body.clone())
                .send()
                .await;
            let answer = match sent {
                Ok(r) => {
                    let status = r.status().as_u16();
                    r.json::<serde_json::Value>().await.map(|v| (status, v))
                }
                Err(e) => Err(e),
            };
            match answer {
                Ok((status @ (200 | 201), v)) => {
                    let epoch_id = v["epoch_id"].as_i64().expect("epoch id");
                    log.acked.push(Acked {
                        line: line.clone(),
                        started_at: started_at.clone(),
                        body: body.clone(),
                        epoch_id,
                        status,
                    });
                    break;
                }
                Ok((503, _)) | Err(_) => {
                    log.retries += 1;
                    tokio::time::sleep(Duration::from_millis(rng.random_range(30..120))).await;
                }
                Ok((status, v)) => panic!("{line} {started_at}: unexpected {status} {v}"),
            }
        }
        tokio::time::sleep(Duration::from_millis(rng.random_range(40..120))).await;
    }
    log
}

/// Epoch counts by status.
async fn statuses(db: &Db) -> Vec<(String, i64)> {
    let q = "SELECT status, COUNT(*) FROM epochs GROUP BY status ORDER BY status";
    match db {
        Db::Sqlite(p) => sqlx::query_as(q).fetch_all(p).await.unwrap(),
        Db::Postgres(p) => sqlx::query_as(q).fetch_all(p).await.unwrap(),
    }
}

/// Epochs stored for a line and start time (by the line's slug).
async fn stored_ids(db: &Db, line: &str, started_at: &str) -> Vec<i64> {
    let line_id = db::lines::by_name(db, line).await.unwrap().expect("line").id;
    let at: chrono::DateTime<chrono::Utc> = started_at.parse().unwrap();
    let q = "SELECT id FROM epochs WHERE line_id = $1 AND started_at = $2";
    match db {
        Db::Sqlite(p) => sqlx::query_scalar(q).bind(line_id).bind(at).fetch_all(p).await.unwrap(),
        Db::Postgres(p) => sqlx::query_scalar(q).bind(line_id).bind(at).fetch_all(p).await.unwrap(),
    }
}

/// Waits until all `n` epochs are processed; fails on a failed epoch or a
/// dead job.
async fn wait_all_processed(db: &Db, n: i64, timeout: Duration) {
    let deadline = Instant::now() + timeout;
    loop {
        let st = statuses(db).await;
        if st == vec![("processed".to_string(), n)] {
            return;
        }
        assert!(!st.iter().any(|(s, _)| s == "failed"), "an epoch failed: {st:?}");
        let dead = db::jobs::in_state(db, "dead", 10).await.unwrap();
        assert!(dead.is_empty(), "dead jobs: {dead:?}");
        assert!(Instant::now() < deadline, "not all {n} epochs processed in time: {st:?}");
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
}

/// Every acknowledged epoch is stored once under the id it was acknowledged
/// with, with all its readings and the very bytes that were sent.
async fn check_stored_once(store: &Db, acked: &[Acked], n_readings: i64) {
    for a in acked {
        let ids = stored_ids(store, &a.line, &a.started_at).await;
        assert_eq!(ids, vec![a.epoch_id], "{} {}: stored as {ids:?}", a.line, a.started_at);
        let epoch = db::epochs::get(store, a.epoch_id).await.unwrap().expect("epoch");
        assert_eq!(epoch.n_readings, n_readings);
        let readings = db::epochs::readings(store, a.epoch_id).await.unwrap();
        assert_eq!(readings.len() as i64, n_readings, "epoch {} half written", a.epoch_id);
        let raw = db::raw_uploads::get(store, epoch.raw_upload_id).await.unwrap();
        assert_eq!(raw.status, "accepted");
        assert_eq!(raw.epoch_id, Some(a.epoch_id));
        let gz = db::raw_uploads::body_gz(store, epoch.raw_upload_id).await.unwrap();
        let mut body = String::new();
        flate2::read::GzDecoder::new(&gz[..]).read_to_string(&mut body).unwrap();
        assert_eq!(body, a.body, "epoch {}: raw body differs from the one sent", a.epoch_id);
    }
}

/// No job waits, runs or gave up.
async fn check_no_jobs_left(store: &Db) {
    for state in ["queued", "running", "dead"] {
        let left = db::jobs::in_state(store, state, 100).await.unwrap();
        assert!(left.is_empty(), "{state} jobs left: {left:?}");
    }
}

/// Four meters upload 12 epochs each, paced at random, while the server is
/// SIGKILLed three times at seeded random moments and restarted on the same
/// SQLite database (on a new port, which the meters follow).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn acknowledged_uploads_survive_sigkill() {
    const METERS: usize = 4;
    const PER_METER: usize = 12;
    const KILLS: usize = 3;
    let db = TestDb::new(Engine::Sqlite).await;
    let config = crash_test_config(&db, "", "");
    let tl = Arc::new(TestLine::new(16, 1.0, 2));
    let n_readings = tl.sequence.quadrupoles().len() as i64;
    let mut tokens = Vec::new();
    for i in 0..METERS {
        tokens.push(register_line(&db, "Crash Reach", &format!("toe-{i}"), &tl));
    }
    let store = db.connect().await;
    let mut server = Server::start_with(&db, Some(&config)).await;
    let (base_tx, base_rx) = watch::channel(server.base.clone());

    let deadline = Instant::now() + Duration::from_secs(45);
    let mut meters = Vec::new();
    for (i, token) in tokens.iter().enumerate() {
        let bodies: Vec<(String, String)> = (0..PER_METER)
            .map(|k| {
                let at = format!("2026-09-{:02}T{:02}:00:00Z", 1 + k / 4, (k % 4) * 6);
                let body = tl.epoch_csv(&at, 60.0 + 5.0 * i as f64, k + 10 * i);
                (at, body)
            })
            .collect();
        meters.push(tokio::spawn(meter(
            base_rx.clone(),
            format!("toe-{i}"),
            token.clone(),
            bodies,
            1000 + i as u64,
            deadline,
        )));
    }

    let mut rng = rand::rngs::StdRng::seed_from_u64(20_260_903);
    for _ in 0..KILLS {
        tokio::time::sleep(Duration::from_millis(rng.random_range(100..400))).await;
        server.kill();
        server = Server::start_with(&db, Some(&config)).await;
        base_tx.send(server.base.clone()).unwrap();
    }

    let mut acked = Vec::new();
    let mut retries = 0;
    for m in meters {
        let log = m.await.expect("meter task");
        retries += log.retries;
        acked.extend(log.acked);
    }
    assert_eq!(acked.len(), METERS * PER_METER, "every epoch acknowledged in the end");
    assert!(retries > 0, "the kills interrupted no upload; the test proves nothing");
    let resent = acked.iter().filter(|a| a.status == 200).count();
    eprintln!(
        "{} epochs acknowledged over {KILLS} kills: {retries} failed sends re-sent, {resent} answered 200 (stored before the kill)",
        acked.len()
    );

    check_stored_once(&store, &acked, n_readings).await;
    // Bodies whose request died between storing the raw upload and the epoch
    // stay as raw uploads without an epoch; their re-send made the epoch.
    let raw = raw_statuses(&store).await;
    assert!(
        raw.iter().all(|(s, _)| s == "accepted" || s == "duplicate" || s == "received"),
        "{raw:?}"
    );
    eprintln!("raw uploads by status: {raw:?}");
    let total = acked.len() as i64;
    wait_all_processed(&store, total, Duration::from_secs(90)).await;
    check_no_jobs_left(&store).await;
    let models: i64 = match &store {
        Db::Sqlite(p) => sqlx::query_scalar("SELECT COUNT(DISTINCT epoch_id) FROM epoch_models")
            .fetch_one(p)
            .await
            .unwrap(),
        Db::Postgres(_) => unreachable!("SQLite test"),
    };
    assert_eq!(models, total, "one model per epoch");
    store.close().await;
    drop(server);
}

/// A PostgreSQL cluster of the test's own (initdb in a temp folder, its own
/// port), so the test can stop and start it. Run as the `postgres` user when
/// the test runs as root (initdb refuses root). Stopped and removed on drop.
struct PrivatePostgres {
    bin: std::path::PathBuf,
    dir: tempfile::TempDir,
    port: u16,
    as_postgres: bool,
}

impl PrivatePostgres {
    /// The newest installed PostgreSQL's programs.
    fn bin() -> std::path::PathBuf {
        let mut bins: Vec<_> = std::fs::read_dir("/usr/lib/postgresql")
            .expect("PostgreSQL server programs under /usr/lib/postgresql")
            .filter_map(|e| e.ok().map(|e| e.path().join("bin")))
            .filter(|p| p.join("initdb").exists())
            .collect();
        bins.sort_by_key(|p| {
            p.parent()
                .and_then(|v| v.file_name())
                .and_then(|v| v.to_str())
                .and_then(|v| v.parse::<u32>().ok())
                .unwrap_or(0)
        });
        bins.pop().expect("an initdb under /usr/lib/postgresql/*/bin")
    }

    fn run(&self, program: &str, args: &[&str]) -> std::process::Output {
        let exe = self.bin.join(program);
        let mut cmd = if self.as_postgres {
            let mut c = std::process::Command::new("runuser");
            c.args(["-u", "postgres", "--"]).arg(&exe);
            c
        } else {
            std::process::Command::new(&exe)
        };
        cmd.args(args).output().unwrap_or_else(|e| panic!("run {}: {e}", exe.display()))
    }

    fn data(&self) -> String {
        self.dir.path().join("data").display().to_string()
    }

    /// initdb (trust authentication, superuser `postgres`) and start.
    fn init() -> PrivatePostgres {
        let dir = tempfile::tempdir().expect("temp dir");
        let as_postgres = running_as_root();
        if as_postgres {
            let st = std::process::Command::new("chown")
                .args(["-R", "postgres:"])
                .arg(dir.path())
                .status()
                .expect("chown");
            assert!(st.success(), "chown the cluster folder to postgres");
        }
        let port = std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
        let pg = PrivatePostgres { bin: Self::bin(), dir, port, as_postgres };
        let out = pg.run(
            "initdb",
            &["-D", &pg.data(), "-U", "postgres", "-A", "trust", "--no-sync", "-E", "UTF8"],
        );
        assert!(out.status.success(), "initdb: {}", String::from_utf8_lossy(&out.stderr));
        pg.start();
        pg
    }

    fn url(&self) -> String {
        format!("postgres://postgres@127.0.0.1:{}/postgres", self.port)
    }

    fn start(&self) {
        let opts = format!(
            "-p {} -k {} -c listen_addresses=127.0.0.1 -c fsync=off",
            self.port,
            self.dir.path().display()
        );
        let log = self.dir.path().join("postgres.log").display().to_string();
        let out = self.run("pg_ctl", &["-D", &self.data(), "-o", &opts, "-l", &log, "-w", "start"]);
        assert!(
            out.status.success(),
            "pg_ctl start: {}\n{}",
            String::from_utf8_lossy(&out.stderr),
            std::fs::read_to_string(&log).unwrap_or_default()
        );
    }

    fn stop(&self, mode: &str) -> bool {
        self.run("pg_ctl", &["-D", &self.data(), "-m", mode, "-w", "stop"]).status.success()
    }
}

impl Drop for PrivatePostgres {
    fn drop(&mut self) {
        // Already stopped is fine; the folder goes with the TempDir.
        let _ = self.stop("immediate");
    }
}

/// Whether the test runs as root.
fn running_as_root() -> bool {
    let out = std::process::Command::new("id").arg("-u").output().expect("id -u");
    String::from_utf8_lossy(&out.stdout).trim() == "0"
}

/// Posts an epoch body to `server`; status, Retry-After and JSON body.
async fn post_csv(
    server: &Server,
    line: &str,
    token: &str,
    body: &str,
) -> (u16, Option<String>, serde_json::Value) {
    let r = server
        .client
        .post(server.url(&format!("/api/v1/lines/{line}/epochs")))
        .bearer_auth(token)
        .header("content-type", "text/csv")
        .body(body.to_string())
        .send()
        .await
        .expect("the server answers");
    let status = r.status().as_u16();
    let retry = r.headers().get("retry-after").map(|v| v.to_str().unwrap().to_string());
    (status, retry, r.json().await.unwrap_or(serde_json::Value::Null))
}

/// Raw uploads by status.
async fn raw_statuses(db: &Db) -> Vec<(String, i64)> {
    let q = "SELECT status, COUNT(*) FROM raw_uploads GROUP BY status ORDER BY status";
    match db {
        Db::Sqlite(p) => sqlx::query_as(q).fetch_all(p).await.unwrap(),
        Db::Postgres(p) => sqlx::query_as(q).fetch_all(p).await.unwrap(),
    }
}

/// PostgreSQL stopped under a running server, uploads meanwhile, PostgreSQL
/// started again: uploads during the outage get 503 with Retry-After and
/// leave nothing behind, and the same process recovers on its own.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn uploads_get_503_while_postgresql_is_down_and_recover() {
    let pg = PrivatePostgres::init();
    let db = TestDb::at(pg.url());
    let config = crash_test_config(&db, "database_acquire_timeout_s = 1.0", "");
    let tl = TestLine::new(16, 1.0, 2);
    let n_readings = tl.sequence.quadrupoles().len() as i64;
    let token = register_line(&db, "Outage Reach", "toe-pg", &tl);
    let server = Server::start_with(&db, Some(&config)).await;
    let epoch = |k: usize| {
        let at = format!("2026-10-01T{:02}:00:00Z", 2 * k);
        let body = tl.epoch_csv(&at, 70.0, k);
        (at, body)
    };

    let mut acked = Vec::new();
    for k in 0..2 {
        let (at, body) = epoch(k);
        let (code, _, v) = post_csv(&server, "toe-pg", &token, &body).await;
        assert_eq!(code, 201, "{v}");
        acked.push(Acked {
            line: "toe-pg".into(),
            started_at: at,
            body,
            epoch_id: v["epoch_id"].as_i64().unwrap(),
            status: code,
        });
    }

    // Stopped while the new epochs' processing is queued or running.
    assert!(pg.stop("fast"), "pg_ctl stop");
    let outage = Instant::now();
    for k in 2..5 {
        let (_, body) = epoch(k);
        let t = Instant::now();
        let (code, retry, v) = post_csv(&server, "toe-pg", &token, &body).await;
        assert_eq!(code, 503, "{v}");
        assert_eq!(v["error"]["code"], "database_unavailable", "{v}");
        let secs: u64 = retry.expect("Retry-After").parse().expect("seconds");
        assert!(secs >= 1, "Retry-After {secs}");
        assert!(t.elapsed() < Duration::from_secs(5), "answered within the acquire timeout");
    }
    // The server stays alive meanwhile.
    let r = server.client.get(server.url("/healthz")).send().await.unwrap();
    assert_eq!(r.status(), 200);
    let down_for = outage.elapsed();
    pg.start();

    // The same process: the next uploads are stored at once.
    for k in 2..5 {
        let (at, body) = epoch(k);
        let (code, _, v) = post_csv(&server, "toe-pg", &token, &body).await;
        assert_eq!(code, 201, "first upload after PostgreSQL is back: {v}");
        acked.push(Acked {
            line: "toe-pg".into(),
            started_at: at,
            body,
            epoch_id: v["epoch_id"].as_i64().unwrap(),
            status: code,
        });
    }
    eprintln!(
        "PostgreSQL down for {:.1} s; 3 uploads answered 503 meanwhile",
        down_for.as_secs_f64()
    );

    let store = db.connect().await;
    // Nothing half written: the refused uploads left no raw upload, epoch or
    // reading of their own; every stored epoch is whole.
    assert_eq!(raw_statuses(&store).await, vec![("accepted".to_string(), acked.len() as i64)]);
    check_stored_once(&store, &acked, n_readings).await;
    wait_all_processed(&store, acked.len() as i64, Duration::from_secs(90)).await;
    check_no_jobs_left(&store).await;
    store.close().await;
    drop(server);
    drop(pg);
}
