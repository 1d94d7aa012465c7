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

use crate::support::{Engine, Server, TestDb, TestLine, register_line};

/// One job loop, the shortest lease (a killed process's job is claimed again
/// after 3 s), one change mode and few iterations to keep processing short.
fn write_config(db: &TestDb) -> std::path::PathBuf {
    let path = db.path("ohmline.toml");
    std::fs::write(
        &path,
        r#"
[workers]
concurrency = 1
lease_s = 3
shutdown_grace_s = 1

[processing]
change_modes = ["ratio"]
max_iterations = 4
"#,
    )
    .unwrap();
    path
}

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
        tokio::time::sleep(Duration::from_millis(rng.random_range(60..200))).await;
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

/// Four meters upload 8 epochs each, paced at random, while the server is
/// SIGKILLed three times at seeded random moments and restarted on the same
/// SQLite database (on a new port, which the meters follow).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn acknowledged_uploads_survive_sigkill() {
    const METERS: usize = 4;
    const PER_METER: usize = 8;
    const KILLS: usize = 3;
    let db = TestDb::new(Engine::Sqlite).await;
    let config = write_config(&db);
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
        tokio::time::sleep(Duration::from_millis(rng.random_range(200..600))).await;
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
