//! Load end to end, short: 50 lines upload epochs concurrently at a fixed
//! offered rate while a viewer reads line pages, the alert list and the API,
//! against the real `ohmline serve --role api` on both engines. Every request
//! must succeed and every acknowledged epoch must be stored exactly once; the
//! latencies are printed, not asserted (the figures come from
//! `ohmline bench load` on a release build).

use std::io::Read;
use std::time::Duration;

use ohmline_server::db::{self, Db};
use ohmline_server::loadgen::{self, Plan, READS};

use crate::on_both_engines;
use crate::support::{Engine, Server, TestDb};

const LINES: usize = 50;
const PER_LINE: usize = 4;
const ELECTRODES: usize = 24;

/// The measured server's limits, set here rather than left to the defaults
/// (they are the defaults, and the run stays below each): a line uploads 1 a
/// second (60 a minute, half its token's allowance); all 50 simulated meters
/// share 127.0.0.1 (50 a second, half the address's allowance); the api role
/// runs no workers, so the 200 epochs stay in the backlog, far below its
/// bound. A 429 would count as an error and fail the test.
const LIMITS: &str = "[limits]
uploads_per_minute_per_token = 120
uploads_per_minute_per_ip = 6000
max_backlog_epochs = 10000
";

async fn count(db: &Db, sql: &str) -> i64 {
    match db {
        Db::Sqlite(p) => sqlx::query_scalar(sql).fetch_one(p).await.unwrap(),
        Db::Postgres(p) => sqlx::query_scalar(sql).fetch_one(p).await.unwrap(),
    }
}

async fn fifty_lines_upload_while_pages_are_read(engine: Engine) {
    let db = TestDb::new(engine).await;
    let store = db.connect().await;
    let fixture = loadgen::prepare(&store, LINES, ELECTRODES).await.expect("lines and a viewer");
    let n_readings = fixture.sequence.len() as i64;
    let config = db.path("ohmline.toml");
    std::fs::write(&config, LIMITS).unwrap();
    // The API alone, as an operator scales it: processing triggered by the
    // uploads runs elsewhere and does not share this process.
    let server = Server::start_role(&db, Some(&config), "api").await;

    let plan = Plan {
        uploads: LINES * PER_LINE,
        uploads_per_s: 50.0,
        reads_per_s: 10.0,
        timeout: Duration::from_secs(30),
    };
    let report = loadgen::run(&server.base, &fixture, &plan).await.expect("the run");
    eprintln!(
        "{engine:?}: {} uploads of {n_readings} readings, {:.1}/s offered, {:.1}/s achieved; ack p50 {:.0} ms, p99 {:.0} ms, max {:.0} ms; {} reads ({:?} of {READS:?}), p50 {:.0} ms, p99 {:.0} ms; {} errors (debug build, shared machine)",
        report.acked.len(),
        report.offered_uploads_per_s,
        report.achieved_uploads_per_s,
        report.upload_p(0.5),
        report.upload_p(0.99),
        report.upload_p(1.0),
        report.read_ms.len(),
        report.reads_by_kind,
        report.read_p(0.5),
        report.read_p(0.99),
        report.errors(),
    );
    assert!(report.upload_errors.is_empty(), "failed uploads: {:#?}", report.upload_errors);
    assert!(report.read_errors.is_empty(), "failed reads: {:#?}", report.read_errors);
    assert_eq!(report.acked.len(), plan.uploads);
    assert_eq!(report.read_ms.len(), plan.reads());
    assert!(report.reads_by_kind.iter().all(|&k| k == plan.reads() / READS.len()));

    // Every acknowledged epoch once, under its id, whole, with the body sent.
    let mut ids: Vec<i64> = report.acked.iter().map(|a| a.epoch_id).collect();
    ids.sort_unstable();
    ids.dedup();
    assert_eq!(ids.len(), plan.uploads, "an epoch id acknowledged twice");
    assert_eq!(count(&store, "SELECT COUNT(*) FROM epochs").await, plan.uploads as i64);
    assert_eq!(
        count(&store, "SELECT COUNT(*) FROM raw_uploads WHERE status = 'accepted'").await,
        plan.uploads as i64
    );
    assert_eq!(count(&store, "SELECT COUNT(*) FROM raw_uploads").await, plan.uploads as i64);
    assert_eq!(
        count(&store, "SELECT COUNT(*) FROM readings").await,
        plan.uploads as i64 * n_readings,
        "every epoch with all its readings"
    );
    for a in &report.acked {
        let epoch = db::epochs::get(&store, a.epoch_id).await.unwrap().expect("stored");
        let line = db::lines::by_name(&store, &a.line).await.unwrap().expect("line");
        assert_eq!((epoch.line_id, epoch.started_at), (line.id, a.started_at), "{a:?}");
        assert_eq!(epoch.n_readings, n_readings);
        // Nothing processed them: the api role runs no jobs.
        assert_eq!(epoch.status, "received");
        let gz = db::raw_uploads::body_gz(&store, epoch.raw_upload_id).await.unwrap();
        let mut body = Vec::new();
        flate2::read::GzDecoder::new(&gz[..]).read_to_end(&mut body).unwrap();
        assert_eq!(body, a.body, "epoch {}: raw body differs from the one sent", a.epoch_id);
    }
    store.close().await;
    drop(server);
}
on_both_engines!(fifty_lines_upload_while_pages_are_read);
