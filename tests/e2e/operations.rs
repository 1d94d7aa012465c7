//! Operations end to end: separate `api` and `worker` processes sharing one
//! database, a worker killed with SIGKILL mid-job and one stopped with
//! SIGTERM, yet every epoch processed exactly once; the same pipeline in one
//! process on SQLite, killed and restarted; the health, readiness and metrics
//! endpoints; `ohmline backup`; dead jobs on the admin page.

use std::path::PathBuf;
use std::time::{Duration, Instant};

use ohmline_server::db::{self, Db};

use crate::on_both_engines;
use crate::support::{
    Engine, HttpSession, Server, TestDb, TestLine, add_user, cli, cli_output, crash_test_config,
    register_line,
};

/// Configuration of the processes under test ([`crash_test_config`]) with
/// the outbox polled twice a second.
fn write_config(db: &TestDb) -> PathBuf {
    crash_test_config(db, "", "[notify]\npoll_interval_s = 0.5")
}

/// Epoch counts by status.
async fn statuses(db: &Db) -> Vec<(String, i64)> {
    match db {
        Db::Sqlite(p) => {
            sqlx::query_as("SELECT status, COUNT(*) FROM epochs GROUP BY status ORDER BY status")
                .fetch_all(p)
                .await
                .unwrap()
        }
        Db::Postgres(p) => {
            sqlx::query_as("SELECT status, COUNT(*) FROM epochs GROUP BY status ORDER BY status")
                .fetch_all(p)
                .await
                .unwrap()
        }
    }
}

/// (stored single-epoch models, distinct epochs they belong to, epochs with
/// no model).
async fn stored_models(db: &Db) -> (i64, i64, i64) {
    let q = "SELECT (SELECT COUNT(*) FROM epoch_models),
                    (SELECT COUNT(DISTINCT epoch_id) FROM epoch_models),
                    (SELECT COUNT(*) FROM epochs e
                      WHERE NOT EXISTS (SELECT 1 FROM epoch_models m WHERE m.epoch_id = e.id))";
    match db {
        Db::Sqlite(p) => sqlx::query_as(q).fetch_one(p).await.unwrap(),
        Db::Postgres(p) => sqlx::query_as(q).fetch_one(p).await.unwrap(),
    }
}

/// (lines, baselines ever chosen): epochs inverted in parallel still choose
/// one automatic baseline per line.
async fn baselines(db: &Db) -> (i64, i64) {
    let q = "SELECT (SELECT COUNT(*) FROM lines), (SELECT COUNT(*) FROM line_baselines)";
    match db {
        Db::Sqlite(p) => sqlx::query_as(q).fetch_one(p).await.unwrap(),
        Db::Postgres(p) => sqlx::query_as(q).fetch_one(p).await.unwrap(),
    }
}

/// Mean stored seconds of the single and change inversions.
async fn mean_seconds(db: &Db) -> (f64, f64) {
    let q = "SELECT (SELECT COALESCE(AVG(seconds), 0) FROM epoch_models),
                    (SELECT COALESCE(AVG(seconds), 0) FROM epoch_changes)";
    match db {
        Db::Sqlite(p) => sqlx::query_as(q).fetch_one(p).await.unwrap(),
        Db::Postgres(p) => sqlx::query_as(q).fetch_one(p).await.unwrap(),
    }
}

/// Waits until a job of `kind` is running under a worker of process `pid`;
/// returns its key.
async fn running_job_of(db: &Db, pid: u32, kind: &str, timeout: Duration) -> String {
    let deadline = Instant::now() + timeout;
    let tag = format!("-{pid}-");
    loop {
        let running = db::jobs::in_state(db, "running", 100).await.unwrap();
        if let Some(j) = running
            .iter()
            .find(|j| j.kind == kind && j.worker.as_deref().is_some_and(|w| w.contains(&tag)))
        {
            return j.key.clone();
        }
        assert!(Instant::now() < deadline, "process {pid} never ran a {kind} job");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
}

/// Waits until `n` epochs are processed; fails on a failed epoch or a dead job.
async fn wait_all_processed(db: &Db, n: i64, timeout: Duration) {
    let deadline = Instant::now() + timeout;
    loop {
        let st = statuses(db).await;
        let processed = st.iter().find(|(s, _)| s == "processed").map(|x| x.1).unwrap_or(0);
        if processed == n {
            return;
        }
        assert!(!st.iter().any(|(s, _)| s == "failed"), "an epoch failed: {st:?}");
        let dead = db::jobs::in_state(db, "dead", 10).await.unwrap();
        assert!(dead.is_empty(), "dead jobs: {dead:?}");
        if Instant::now() >= deadline {
            let (models, _, _) = stored_models(db).await;
            let secs = mean_seconds(db).await;
            panic!(
                "not all {n} epochs processed in time: {st:?}; {models} models, {secs:?} s mean per inversion (single, change)"
            );
        }
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
}

async fn pipeline_survives_killed_workers(engine: Engine) {
    let db = TestDb::new(engine).await;
    let config = write_config(&db);
    // PostgreSQL: 4 lines × 50 epochs over three worker processes; SQLite: one
    // process, 2 lines × 8 epochs.
    let (n_lines, per_line) = match engine {
        Engine::Postgres => (4, 50),
        Engine::Sqlite => (2, 8),
    };
    let tl = TestLine::new(24, 1.0, 3);
    let mut tokens = Vec::new();
    for i in 0..n_lines {
        tokens.push(register_line(&db, "Scale Reach", &format!("crest-{i}"), &tl));
    }
    let store = db.connect().await;
    let front = Server::start_role(
        &db,
        Some(&config),
        if engine == Engine::Postgres { "api" } else { "all" },
    )
    .await;
    let mut uploads = Vec::new();
    for (i, token) in tokens.iter().enumerate() {
        for k in 0..per_line {
            let at = format!("2026-04-{:02}T{:02}:00:00Z", 1 + k / 4, (k % 4) * 6);
            let body = tl.epoch_csv(&at, 80.0 + (k % 5) as f64, k + i);
            let (code, v) =
                front.post_epoch(&format!("crest-{i}"), token, "text/csv", "", body).await;
            assert_eq!(code, 201, "{v}");
            uploads.push(v["epoch_id"].as_i64().unwrap());
        }
    }
    let total = uploads.len() as i64;

    match engine {
        Engine::Postgres => {
            assert_eq!(total, 200);
            // The api role runs no jobs: everything is still waiting.
            tokio::time::sleep(Duration::from_millis(500)).await;
            assert_eq!(statuses(&store).await, vec![("received".to_string(), total)]);
            let queued = db::jobs::in_state(&store, "queued", 100).await.unwrap();
            assert_eq!(queued.len(), n_lines, "one QC job per line");

            let mut workers = Vec::new();
            for _ in 0..3 {
                workers.push(Server::start_role(&db, Some(&config), "worker").await);
            }
            // A worker answers only the operations endpoints.
            let r = workers[0].client.get(workers[0].url("/api/v1/lines")).send().await.unwrap();
            assert_eq!(r.status(), 404);

            // SIGKILL the first worker in the middle of a processing job.
            let victim = workers.remove(0);
            let key =
                running_job_of(&store, victim.pid(), "invert_epoch", Duration::from_secs(60)).await;
            let killed_at = db::now();
            victim.kill();

            // SIGTERM the second while it runs a job: it exits cleanly and holds
            // nothing afterwards (finished, or released for another worker).
            let mut stopping = workers.remove(0);
            let pid = stopping.pid();
            running_job_of(&store, pid, "invert_epoch", Duration::from_secs(60)).await;
            let status = stopping.terminate(Duration::from_secs(30)).await;
            assert!(status.is_some_and(|s| s.success()), "graceful exit: {status:?}");
            let tag = format!("-{pid}-");
            let held = db::jobs::in_state(&store, "running", 100).await.unwrap();
            assert!(
                !held.iter().any(|j| j.worker.as_deref().is_some_and(|w| w.contains(&tag))),
                "a stopped worker holds no job: {held:?}"
            );
            // A replacement joins the remaining worker.
            workers.push(Server::start_role(&db, Some(&config), "worker").await);

            wait_all_processed(&store, total, Duration::from_secs(400)).await;
            let job = db::jobs::by_key(&store, &key).await.unwrap().unwrap();
            assert!(
                job.started_at.is_some_and(|t| t >= killed_at),
                "the killed worker's job {key} ran again after the kill: {job:?}"
            );
        }
        Engine::Sqlite => {
            // One process: killed mid-job, restarted, it finishes the work.
            let key =
                running_job_of(&store, front.pid(), "invert_epoch", Duration::from_secs(60)).await;
            let killed_at = db::now();
            front.kill();
            let mut again = Server::start_role(&db, Some(&config), "all").await;
            wait_all_processed(&store, total, Duration::from_secs(120)).await;
            let job = db::jobs::by_key(&store, &key).await.unwrap().unwrap();
            assert!(job.started_at.is_some_and(|t| t >= killed_at), "{job:?}");
            let status = again.terminate(Duration::from_secs(30)).await;
            assert!(status.is_some_and(|s| s.success()), "graceful exit: {status:?}");
        }
    }

    // Exactly once: one stored model per epoch, none missing, no job left over.
    let (models, distinct, missing) = stored_models(&store).await;
    assert_eq!((models, distinct, missing), (total, total, 0));
    assert_eq!(statuses(&store).await, vec![("processed".to_string(), total)]);
    let (lines, chosen) = baselines(&store).await;
    assert_eq!(chosen, lines, "one automatic baseline per line");
    for state in ["queued", "running", "dead"] {
        let left = db::jobs::in_state(&store, state, 100).await.unwrap();
        assert!(left.is_empty(), "{state} jobs left: {left:?}");
    }
    store.close().await;
}
on_both_engines!(pipeline_survives_killed_workers);

/// The value of a metric line `name{labels} value` (or `name value`) whose
/// name and labels start with `prefix`.
fn metric(text: &str, prefix: &str) -> Option<f64> {
    text.lines()
        .filter(|l| !l.starts_with('#'))
        .find(|l| l.starts_with(prefix))
        .and_then(|l| l.rsplit(' ').next())
        .and_then(|v| v.parse().ok())
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn health_readiness_and_metrics() {
    let db = TestDb::new(Engine::Sqlite).await;
    let config = write_config(&db);
    let tl = TestLine::new(24, 1.0, 4);
    let token = register_line(&db, "Metric Reach", "crest-m", &tl);
    let server = Server::start_with(&db, Some(&config)).await;

    let get = async |path: &str| {
        let r = server.client.get(server.url(path)).send().await.unwrap();
        let status = r.status().as_u16();
        let ctype = r
            .headers()
            .get("content-type")
            .map(|v| v.to_str().unwrap().to_string())
            .unwrap_or_default();
        (status, ctype, r.text().await.unwrap())
    };
    assert_eq!(get("/healthz").await.0, 200);
    let (code, _, body) = get("/readyz").await;
    assert_eq!((code, body.as_str()), (200, "ready\n"));

    let mut ids = Vec::new();
    for k in 0..4 {
        let body = tl.epoch_csv(&format!("2026-05-01T0{k}:00:00Z"), 90.0, k);
        let (code, v) = server.post_epoch("crest-m", &token, "text/csv", "", body).await;
        assert_eq!(code, 201, "{v}");
        ids.push(v["epoch_id"].as_i64().unwrap());
    }
    for id in &ids {
        server.wait_status(*id, &token, "processed").await;
    }

    let (code, ctype, text) = get("/metrics").await;
    assert_eq!(code, 200);
    assert!(ctype.starts_with("text/plain"), "{ctype}");
    let n_readings = tl.sequence.quadrupoles().len() as f64;
    assert_eq!(metric(&text, "ohmline_epochs_ingested_total "), Some(4.0), "{text}");
    assert_eq!(metric(&text, "ohmline_readings_ingested_total "), Some(4.0 * n_readings));
    assert!(metric(&text, "ohmline_qc_readings_dropped_total ").is_some(), "{text}");
    assert!(
        metric(&text, "ohmline_jobs{state=\"done\",kind=\"qc_line\"}").is_some_and(|v| v >= 1.0),
        "{text}"
    );
    assert_eq!(metric(&text, "ohmline_jobs{state=\"dead\""), Some(0.0), "{text}");
    assert!(
        metric(&text, "ohmline_job_run_seconds_count{kind=\"invert_epoch\",outcome=\"done\"}")
            .is_some_and(|v| v >= 1.0),
        "{text}"
    );
    assert!(
        metric(&text, "ohmline_job_wait_seconds_count{kind=\"qc_line\"}").is_some_and(|v| v >= 1.0)
    );
    assert_eq!(metric(&text, "ohmline_inversion_seconds_count{kind=\"single\"}"), Some(4.0));
    assert_eq!(
        metric(
            &text,
            "ohmline_http_requests_total{method=\"POST\",route=\"/api/v1/lines/{line}/epochs\",status=\"201\"}"
        ),
        Some(4.0),
        "{text}"
    );
    assert!(text.contains("ohmline_http_request_seconds_bucket{"), "{text}");

    // A database behind on migrations is not ready.
    let store = db.connect().await;
    if let Db::Sqlite(p) = &store {
        sqlx::query("DELETE FROM _sqlx_migrations WHERE version = (SELECT MAX(version) FROM _sqlx_migrations)")
            .execute(p)
            .await
            .unwrap();
    }
    let (code, _, body) = get("/readyz").await;
    assert_eq!(code, 503);
    assert!(body.contains("1 database migrations not applied"), "{body}");
    assert_eq!(get("/healthz").await.0, 200, "alive all the same");
    store.close().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn backup_copies_a_running_sqlite_database() {
    let db = TestDb::new(Engine::Sqlite).await;
    let tl = TestLine::new(24, 1.0, 4);
    let token = register_line(&db, "Backup Reach", "crest-b", &tl);
    let server = Server::start(&db).await;
    let body = tl.epoch_csv("2026-06-01T00:00:00Z", 90.0, 0);
    let (code, v) = server.post_epoch("crest-b", &token, "text/csv", "", body).await;
    assert_eq!(code, 201, "{v}");

    let copy = db.path("copy.sqlite");
    let out = cli(&db, &["backup", "--to", copy.to_str().unwrap()]);
    assert!(out.contains("written to"), "{out}");
    let again = cli_output(&db, &["backup", "--to", copy.to_str().unwrap()]);
    assert!(!again.status.success());
    assert!(String::from_utf8_lossy(&again.stderr).contains("already exists"));
    server.kill();

    // The copy opens as a database of its own and holds the line and epoch.
    let restored = Db::connect(&format!("sqlite://{}", copy.display())).await.unwrap();
    assert_eq!(restored.pending_migrations().await.unwrap(), 0);
    let line = db::lines::by_name(&restored, "crest-b").await.unwrap().expect("line in the copy");
    let epoch_id = v["epoch_id"].as_i64().unwrap();
    let epoch = db::epochs::get(&restored, epoch_id).await.unwrap().expect("epoch in the copy");
    assert_eq!(epoch.line_id, line.id);
    assert_eq!(epoch.n_readings, tl.sequence.quadrupoles().len() as i64);
    restored.close().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn backup_refuses_postgresql() {
    let db = TestDb::new(Engine::Postgres).await;
    let out = cli_output(&db, &["backup", "--to", db.path("x.sqlite").to_str().unwrap()]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("pg_dump"), "{err}");
    assert!(!db.path("x.sqlite").exists());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn admins_see_and_requeue_dead_jobs() {
    let db = TestDb::new(Engine::Sqlite).await;
    let config = write_config(&db);
    let tl = TestLine::new(24, 1.0, 4);
    let token = register_line(&db, "Jobs Reach", "crest-j", &tl);
    let admin_pw = add_user(&db, "admin@levee.test", "admin");
    let viewer_pw = add_user(&db, "viewer@levee.test", "viewer");
    let server = Server::start_with(&db, Some(&config)).await;
    let body = tl.epoch_csv("2026-07-01T00:00:00Z", 90.0, 0);
    let (code, v) = server.post_epoch("crest-j", &token, "text/csv", "", body).await;
    assert_eq!(code, 201, "{v}");
    server.wait_status(v["epoch_id"].as_i64().unwrap(), &token, "processed").await;

    // Bury the line's QC job as a worker does after its last failed attempt.
    let store = db.connect().await;
    let key =
        format!("qc:line:{}", db::lines::by_name(&store, "crest-j").await.unwrap().unwrap().id);
    let job = db::jobs::by_key(&store, &key).await.unwrap().unwrap();
    if let Db::Sqlite(p) = &store {
        sqlx::query(
            "UPDATE jobs SET state = 'dead', attempts = 5, last_error = 'meter file unreadable' WHERE id = $1",
        )
        .bind(job.id)
        .execute(p)
        .await
        .unwrap();
    }

    let mut viewer = HttpSession::new();
    assert_eq!(viewer.sign_in(&server, "viewer@levee.test", &viewer_pw).await, 303);
    assert_eq!(viewer.get(&server.url("/admin/jobs")).await.0, 403);

    let mut admin = HttpSession::new();
    assert_eq!(admin.sign_in(&server, "admin@levee.test", &admin_pw).await, 303);
    let (s, _, page) = admin.get(&server.url("/admin/jobs")).await;
    assert_eq!(s, 200);
    assert!(page.contains(&key) && page.contains("meter file unreadable"), "{page}");
    assert!(page.contains(&format!("/admin/jobs/{}/requeue", job.id)), "{page}");

    let csrf = admin.csrf(&server).await;
    let url = server.url(&format!("/admin/jobs/{}/requeue", job.id));
    let (s, _, page) = admin.post(&url, &[("csrf", &csrf)]).await;
    assert_eq!(s, 200, "{page}");
    assert!(page.contains("queued again"), "{page}");
    // A second request finds it no longer dead.
    let (s, _, _) = admin.post(&url, &[("csrf", &csrf)]).await;
    assert_eq!(s, 409);
    // Without the CSRF token nothing happens.
    let (s, _, _) = admin.post(&url, &[]).await;
    assert_eq!(s, 403);

    // The worker runs it again.
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        let j = db::jobs::by_key(&store, &key).await.unwrap().unwrap();
        if j.state == "done" {
            break;
        }
        assert!(Instant::now() < deadline, "requeued job never ran: {j:?}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    let (_, _, trail) = admin.get(&server.url("/admin/audit")).await;
    assert!(trail.contains("job.requeue"), "{trail}");
    store.close().await;
}
