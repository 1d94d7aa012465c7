//! `ohmline demo`: the real binary sets up an invented site on SQLite, its
//! simulated meter uploads over HTTP, and (once the processing stages exist)
//! the season ends with alerts and `.eml` files.

use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::{Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use mail_parser::MessageParser;
use ohmline_core::alerts::CAUTION;
use ohmline_server::db::{self, Db};

use crate::support::{BIN, Engine, HttpSession, Server, TestDb};

/// Starts `ohmline demo` in `dir` with extra arguments; returns the child and a
/// channel of its stdout lines.
pub(crate) fn start_demo(
    dir: &Path,
    extra: &[&str],
) -> (std::process::Child, mpsc::Receiver<String>) {
    let mut child = Command::new(BIN)
        .args(["demo", "--data-dir"])
        .arg(dir)
        .args(["--listen", "127.0.0.1:0", "--speed", "max", "--seed", "1"])
        .args(extra)
        .env("RUST_LOG", "warn")
        .stdout(Stdio::piped())
        .stderr(std::fs::File::create(dir.with_extension("log")).expect("log file"))
        .spawn()
        .expect("spawn ohmline demo");
    let stdout = child.stdout.take().expect("stdout");
    let (tx, rx) = mpsc::channel();
    std::thread::spawn(move || {
        for line in BufReader::new(stdout).lines().map_while(Result::ok) {
            if tx.send(line).is_err() {
                break;
            }
        }
    });
    (child, rx)
}

/// The password printed on the sign-in line.
pub(crate) fn password(lines: &[String]) -> String {
    let l = lines.iter().find(|l| l.contains("with password")).expect("a sign-in line");
    l.rsplit(' ').next().unwrap().to_string()
}

async fn open(dir: &Path) -> Db {
    let db = Db::connect(&format!("sqlite://{}", dir.join("ohmline.sqlite").display()))
        .await
        .expect("the demo's database");
    db.migrate().await.unwrap();
    db
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn demo_sets_up_the_world_and_the_meter_uploads_over_http() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path().join("demo");
    let (mut child, rx) = start_demo(&dir, &["--epochs", "4"]);
    // Wait until the meter has uploaded all 8 epochs and QC has checked them.
    let deadline = Instant::now() + Duration::from_secs(600);
    let mut lines = Vec::new();
    while lines.iter().filter(|l: &&String| l.starts_with("checked")).count() < 8 {
        let left = deadline.saturating_duration_since(Instant::now());
        match rx.recv_timeout(left) {
            Ok(l) => lines.push(l),
            Err(_) => {
                let _ = child.kill();
                panic!(
                    "the demo did not upload and check 8 epochs; stdout:\n{}\nlog:\n{}",
                    lines.join("\n"),
                    std::fs::read_to_string(dir.with_extension("log")).unwrap_or_default()
                );
            }
        }
    }
    assert_eq!(lines.iter().filter(|l| l.starts_with("uploaded")).count(), 8, "{lines:?}");
    assert!(lines[0].starts_with("ohmline demo listening on http://127.0.0.1:"), "{lines:?}");
    let pw = password(&lines);
    child.kill().unwrap();
    child.wait().unwrap();

    let db = open(&dir).await;
    let listed = db::lines::list(&db, None).await.unwrap();
    let shape: Vec<(&str, &str, i64, i64)> = listed
        .iter()
        .map(|l| (l.name.as_str(), l.orientation.as_str(), l.n_electrodes, l.n_epochs))
        .collect();
    assert_eq!(
        shape,
        [("pellingford-crest", "longitudinal", 64, 4), ("pellingford-cross", "transverse", 48, 4)]
    );
    let cross = db::lines::by_name(&db, "pellingford-cross").await.unwrap().unwrap();
    assert_eq!(db::models::surface_points(&db, cross.id).await.unwrap().len(), 4);
    let site = db::sites::by_name(&db, "Pellingford levee (invented)").await.unwrap().unwrap();
    assert!(site.description.contains("invented River Thaddle"), "{}", site.description);
    assert_eq!(db::recipients::list(&db).await.unwrap().len(), 1);
    let admin = db::users::by_email(&db, "admin@pellingford.example").await.unwrap().unwrap();
    assert_eq!(admin.role.as_str(), "admin");
    assert_eq!(pw.len(), 20);
    // Each epoch carries the meter's readings and thermistor temperatures.
    let crest = db::lines::by_name(&db, "pellingford-crest").await.unwrap().unwrap();
    let epochs = db::epochs::list_for_line(&db, crest.id, None, 10).await.unwrap();
    // QC has passed them all; the inversion may have taken some further.
    assert!(
        epochs.iter().all(|e| ["checked", "inverted", "processed"].contains(&e.status.as_str())
            && e.n_readings == 2084),
        "{epochs:?}"
    );
    assert_eq!(db::epochs::temperatures(&db, epochs[0].id).await.unwrap().len(), 4);
    // The meter station also reported the river gauge and the rain gauge at
    // each epoch's nominal time; the season starts at the low stage of 0.3 m
    // (core::scenario::STAGE_M) and dry.
    let series = db::series::summaries(&db, site.id).await.unwrap();
    let shape: Vec<(&str, &str, i64)> =
        series.iter().map(|s| (s.kind.as_str(), s.unit.as_str(), s.n_samples)).collect();
    assert_eq!(shape, [("rainfall", "mm", 4), ("river_stage", "m", 4)]);
    let stage = db::series::samples(&db, series[1].id, None, None).await.unwrap();
    assert_eq!(stage[0].1, ohmline_core::scenario::STAGE_M[0]);
    assert_eq!(stage[0].0, epochs.last().unwrap().started_at, "at the crest line's epoch times");
    db.close().await;

    // A second run on the same folder refuses and says why; a folder with
    // other files is left alone even with --reset.
    let out = Command::new(BIN).args(["demo", "--data-dir"]).arg(&dir).output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success() && err.contains("already holds an ohmline demo"), "{err}");
    assert!(err.contains("--reset"), "{err}");
    let other = tmp.path().join("other");
    std::fs::create_dir(&other).unwrap();
    std::fs::write(other.join("notes.txt"), "mine").unwrap();
    let out =
        Command::new(BIN).args(["demo", "--reset", "--data-dir"]).arg(&other).output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success() && err.contains("holds no ohmline demo"), "{err}");
    assert!(other.join("notes.txt").exists());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn demo_season_ends_with_alerts_and_emails() {
    let db = TestDb::new(Engine::Sqlite).await;
    let dir = db.dir.path().to_path_buf();
    let lines = crate::detection::run_season(&dir, &[]);
    assert!(lines.iter().any(|l| l.starts_with("ALERT")), "{lines:?}");

    let conn = db.connect().await;
    for l in db::lines::list(&conn, None).await.unwrap() {
        assert_eq!(l.n_epochs, 10, "{}", l.name);
    }
    let alerts =
        db::alerts::list(&conn, &db::alerts::AlertFilter { limit: 100, ..Default::default() })
            .await
            .unwrap();
    assert!(!alerts.is_empty());
    conn.close().await;
    crate::detection::seepage_is_found_in_time_and_place(&dir).await;

    let eml: Vec<_> = std::fs::read_dir(dir.join("outbox"))
        .unwrap()
        .filter_map(Result::ok)
        .map(|e| e.path())
        .filter(|p| p.extension().is_some_and(|e| e == "eml"))
        .collect();
    assert!(!eml.is_empty());
    let with_caution = eml.iter().any(|p| {
        let raw = std::fs::read(p).unwrap();
        let m = MessageParser::default().parse(&raw).expect("a MIME message");
        m.body_text(0).is_some_and(|t| t.contains(CAUTION))
    });
    assert!(with_caution, "no email carries the caution");

    // Served again from its own configuration, the overview says the world
    // is invented.
    let server = Server::start_with(&db, Some(&dir.join("ohmline.toml"))).await;
    let mut session = HttpSession::new();
    let code = session.sign_in(&server, "admin@pellingford.example", &password(&lines)).await;
    assert_eq!(code, 303);
    let (code, _, _) = session.get(&server.url("/")).await;
    assert_eq!(code, 303, "the front door sends a signed-in user on to the overview");
    let (code, _, page) = session.get(&server.url("/overview")).await;
    assert_eq!(code, 200);
    assert!(page.contains("invented River Thaddle"), "{page}");
    server.kill();
}
