//! Ingest end to end: registration by the CLI, uploads as CSV and JSON,
//! idempotent re-sends, every kind of bad input, tokens, restart durability and
//! drop folders — on SQLite and PostgreSQL.

use std::io::Read;
use std::time::{Duration, Instant};

use ohmline_server::db;
use serde_json::Value;

use crate::on_both_engines;
use crate::support::{Engine, Server, TestDb, TestLine, cli, cli_output, register_line};

fn error_of(v: &Value) -> (&str, Option<u64>, Option<u64>, Option<&str>) {
    let e = &v["error"];
    (e["code"].as_str().unwrap_or(""), e["row"].as_u64(), e["index"].as_u64(), e["field"].as_str())
}

/// The main path: a 64-electrode line with ~1,600 quadrupoles, CSV and JSON
/// epochs, idempotent re-send, conflicting re-send, restart with SIGKILL.
async fn upload_resend_restart(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(64, 1.0, 20);
    assert!((1400..1800).contains(&tl.sequence.len()), "{}", tl.sequence.len());
    let token = register_line(&db, "Test reach", "crest-a", &tl);
    let listing = cli(&db, &["line", "list"]);
    assert!(listing.contains("crest-a") && listing.contains("64 electrodes"), "{listing}");

    let server = Server::start(&db).await;
    let mut sent: Vec<(i64, Vec<u8>)> = Vec::new();
    for k in 0..3 {
        let body = tl.epoch_csv(&format!("2026-03-0{}T06:00:00Z", k + 1), 100.0, k);
        let (status, v) = server.post_epoch("crest-a", &token, "text/csv", "", body.clone()).await;
        assert_eq!(status, 201, "{v}");
        assert_eq!(v["n_readings"], tl.sequence.len());
        assert_eq!(v["duplicate"], false);
        sent.push((v["epoch_id"].as_i64().unwrap(), body.into_bytes()));
    }
    // JSON, with the start time and temperatures in the body.
    let body = tl.epoch_json("2026-03-04T06:00:00+01:00", 120.0);
    let (status, v) =
        server.post_epoch("crest-a", &token, "application/json", "", body.clone()).await;
    assert_eq!(status, 201, "{v}");
    assert_eq!(v["started_at"], "2026-03-04T05:00:00Z");
    let json_epoch = v["epoch_id"].as_i64().unwrap();
    sent.push((json_epoch, body.into_bytes()));
    // CSV with the start time as a query parameter.
    let csv = tl
        .epoch_csv("2026-03-05T06:00:00Z", 100.0, 9)
        .replace("# started_at: 2026-03-05T06:00:00Z\n", "");
    let (status, v) = server
        .post_epoch(
            "crest-a",
            &token,
            "text/csv; charset=utf-8",
            "?started_at=2026-03-05T06:00:00Z",
            csv.clone(),
        )
        .await;
    assert_eq!(status, 201, "{v}");
    sent.push((v["epoch_id"].as_i64().unwrap(), csv.into_bytes()));

    // Re-sending the same epoch is idempotent: 200 and the first id.
    let again = tl.epoch_csv("2026-03-01T06:00:00Z", 100.0, 0);
    let (status, v) = server.post_epoch("crest-a", &token, "text/csv", "", again).await;
    assert_eq!(status, 200, "{v}");
    assert_eq!(v["duplicate"], true);
    assert_eq!(v["epoch_id"].as_i64().unwrap(), sent[0].0);
    // Different content for a stored start time is a conflict.
    let other = tl.epoch_csv("2026-03-01T06:00:00Z", 150.0, 0);
    let (status, v) = server.post_epoch("crest-a", &token, "text/csv", "", other).await;
    assert_eq!(status, 409, "{v}");
    assert_eq!(error_of(&v).0, "epoch_conflict");

    // Reads: listing newest first with paging, detail with temperatures.
    let (status, page) = server.get_json("/api/v1/lines/crest-a/epochs?limit=2", &token).await;
    assert_eq!(status, 200);
    let epochs = page["epochs"].as_array().unwrap();
    assert_eq!(epochs.len(), 2);
    assert_eq!(epochs[0]["started_at"], "2026-03-05T06:00:00Z");
    let next = page["next_before"].as_str().unwrap().to_string();
    let (_, page2) = server
        .get_json(&format!("/api/v1/lines/crest-a/epochs?limit=10&before={next}"), &token)
        .await;
    assert_eq!(page2["epochs"].as_array().unwrap().len(), 3);
    assert!(page2["next_before"].is_null());
    let (status, detail) = server.get_json(&format!("/api/v1/epochs/{json_epoch}"), &token).await;
    assert_eq!(status, 200, "{detail}");
    assert_eq!(detail["line"], "crest-a");
    assert_eq!(detail["sequence_version"], 1);
    assert_eq!(detail["n_readings"], tl.sequence.len());
    assert_eq!(detail["meter_id"], "test-meter");
    assert_eq!(detail["temperatures"][1]["temperature_c"], 10.25);
    let (_, lines) = server.get_json("/api/v1/lines", &token).await;
    assert_eq!(lines["lines"][0]["n_epochs"], 5);

    // Kill the server without warning and start it again on the same database.
    server.kill();
    let server = Server::start(&db).await;
    let (_, page) = server.get_json("/api/v1/lines/crest-a/epochs?limit=100", &token).await;
    assert_eq!(page["epochs"].as_array().unwrap().len(), sent.len());
    let store = db.connect().await;
    for (epoch_id, body) in &sent {
        let e = db::epochs::get(&store, *epoch_id)
            .await
            .unwrap()
            .expect("acknowledged epoch is stored");
        assert_eq!(e.n_readings as usize, tl.sequence.len());
        let readings = db::epochs::readings(&store, *epoch_id).await.unwrap();
        assert_eq!(readings.len(), tl.sequence.len());
        let gz = db::raw_uploads::body_gz(&store, e.raw_upload_id).await.unwrap();
        let mut raw = Vec::new();
        flate2::read::GzDecoder::new(&gz[..]).read_to_end(&mut raw).unwrap();
        assert_eq!(&raw, body, "raw body of epoch {epoch_id} is kept verbatim");
    }
    // The first epoch's readings are exactly what was sent: R = U/I.
    let r0 = db::epochs::readings(&store, sent[0].0).await.unwrap();
    let first_row: Vec<&str> =
        std::str::from_utf8(&sent[0].1).unwrap().lines().nth(3).unwrap().split(',').collect();
    let u: f64 = first_row[5].parse().unwrap();
    assert_eq!(r0[0].voltage_mv, Some(u));
    assert_eq!(r0[0].resistance_ohm, u / 100.0);
    store.close().await;
}
on_both_engines!(upload_resend_restart);

/// Every kind of bad input gets a 4xx naming what and where, and leaves no
/// epoch behind; the raw body of a rejected upload is kept.
async fn bad_input_is_refused_precisely(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(16, 1.0, 3);
    let token = register_line(&db, "Test reach", "crest-b", &tl);
    let server = Server::start(&db).await;
    let good = tl.epoch_csv("2026-04-01T00:00:00Z", 50.0, 0);
    let data_row = |n: usize| good.lines().nth(3 + n).unwrap().to_string();
    let replace_row = |n: usize, new: &str| {
        let mut lines: Vec<String> = good.lines().map(str::to_string).collect();
        lines[3 + n] = new.to_string();
        lines.join("\n") + "\n"
    };
    // Row numbers are 1-based file lines: 2 metadata lines, header on line 3,
    // data row n (0-based) on line 4 + n.
    let r1 = data_row(1);
    let f: Vec<&str> = r1.split(',').collect();
    // (what, body, content type, status, error code, row, field)
    type Case<'a> = (&'a str, String, &'a str, u16, &'a str, Option<u64>, Option<&'a str>);
    let cases: Vec<Case> = vec![
        ("unknown label", replace_row(1, &format!("{},{},{},E99,{}", f[0], f[1], f[2], f[4..].join(","))), "text/csv", 422, "invalid_upload", Some(5), Some("n")),
        ("not distinct", replace_row(1, &format!("{},{},{},{},{}", f[0], f[1], f[0], f[3], f[4..].join(","))), "text/csv", 422, "invalid_upload", Some(5), Some("a,b,m,n")),
        ("non-finite current", replace_row(1, &format!("{},{},{},{},inf,{}", f[0], f[1], f[2], f[3], f[5..].join(","))), "text/csv", 422, "invalid_upload", Some(5), Some("current_ma")),
        ("zero current", replace_row(1, &format!("{},{},{},{},0,{}", f[0], f[1], f[2], f[3], f[5..].join(","))), "text/csv", 422, "invalid_upload", Some(5), Some("current_ma")),
        ("negative current", replace_row(1, &format!("{},{},{},{},-5,{}", f[0], f[1], f[2], f[3], f[5..].join(","))), "text/csv", 422, "invalid_upload", Some(5), Some("current_ma")),
        ("malformed number", replace_row(1, &format!("{},{},{},{},100,1.2.3,{}", f[0], f[1], f[2], f[3], f[6])), "text/csv", 422, "invalid_upload", Some(5), Some("voltage_mv")),
        ("malformed time", good.replace("2026-04-01T00:00:00Z", "01/04/2026 00:00"), "text/csv", 422, "invalid_upload", Some(1), Some("started_at")),
        ("missing time", good.replace("# started_at: 2026-04-01T00:00:00Z\n", ""), "text/csv", 422, "invalid_upload", None, Some("started_at")),
        ("not in sequence", replace_row(1, &format!("E1,E16,E2,E3,{}", f[4..].join(","))), "text/csv", 422, "invalid_upload", Some(5), Some("a,b,m,n")),
        ("repeated quadrupole", replace_row(2, &r1), "text/csv", 422, "invalid_upload", Some(6), Some("a,b,m,n")),
        ("missing column", good.replace("a,b,m,n,current_ma", "a,b,m,current_ma"), "text/csv", 422, "invalid_upload", Some(3), Some("n")),
        ("ragged row", replace_row(1, "E1,E4"), "text/csv", 422, "invalid_upload", Some(5), None),
        ("json wrong type", r#"{"started_at":"2026-04-01T00:00:00Z","readings":[{"a":"E1","b":"E4","m":"E2","n":"E3","resistance_ohm":true}]}"#.to_string(), "application/json", 422, "invalid_upload", None, Some("resistance_ohm")),
        ("json not json", "{\"started_at\": ".to_string(), "application/json", 422, "invalid_upload", None, None),
        ("content type", good.clone(), "application/xml", 415, "unsupported_content_type", None, None),
    ];
    for (what, body, ct, status, code, row, field) in cases {
        let (s, v) = server.post_epoch("crest-b", &token, ct, "", body).await;
        assert_eq!(s, status, "{what}: {v}");
        let (c, r, _, fld) = error_of(&v);
        assert_eq!(c, code, "{what}: {v}");
        assert_eq!(r, row, "{what}: row in {v}");
        assert_eq!(fld, field, "{what}: field in {v}");
        assert!(v["error"]["message"].as_str().unwrap().len() > 10, "{what}: {v}");
    }
    // JSON errors name the reading's index.
    let (s, v) = server
        .post_epoch("crest-b", &token, "application/json", "",
            r#"{"started_at":"2026-04-01T00:00:00Z","readings":[{"a":"E1","b":"E4","m":"E2","n":"E3","resistance_ohm":1},{"a":"E1","b":"E4","m":"E2","n":"E77","resistance_ohm":1}]}"#)
        .await;
    assert_eq!(s, 422);
    assert_eq!(error_of(&v), ("invalid_upload", None, Some(1), Some("n")));

    // Too many rows: over the configured 20 000 readings.
    let mut big = String::from("# started_at: 2026-04-02T00:00:00Z\na,b,m,n,resistance_ohm\n");
    for _ in 0..20_001 {
        big.push_str("E1,E4,E2,E3,1\n");
    }
    let (s, v) = server.post_epoch("crest-b", &token, "text/csv", "", big).await;
    assert_eq!((s, error_of(&v).0), (413, "too_many_readings"), "{v}");
    // Body over the 16 MiB limit.
    let huge = vec![b'x'; 17 * 1024 * 1024];
    let (s, v) = server.post_epoch("crest-b", &token, "text/csv", "", huge).await;
    assert_eq!((s, error_of(&v).0), (413, "body_too_large"), "{v}");
    // Unknown line.
    let (s, v) = server.post_epoch("no-such-line", &token, "text/csv", "", good.clone()).await;
    assert_eq!((s, error_of(&v).0), (404, "not_found"), "{v}");

    // Nothing of the rejected uploads became an epoch; their raw bodies are kept.
    let store = db.connect().await;
    let line = db::lines::by_name(&store, "crest-b").await.unwrap().unwrap();
    assert_eq!(db::epochs::count_for_line(&store, line.id).await.unwrap(), 0);
    let rejected = db::raw_uploads::list(&store, line.id, Some("rejected"), 100).await.unwrap();
    // 15 table cases, the JSON index case and the oversized epoch are kept; the
    // body over the size limit is refused while it is read (never stored), and
    // the upload for an unknown line has no line to be filed under.
    assert_eq!(rejected.len(), 17, "every authenticated upload within the size limit is kept");
    assert!(rejected.iter().all(|r| r.error.as_deref().is_some_and(|e| !e.is_empty())));
    // The good epoch still goes in afterwards.
    let (s, v) = server.post_epoch("crest-b", &token, "text/csv", "", good).await;
    assert_eq!(s, 201, "{v}");
    store.close().await;
}
on_both_engines!(bad_input_is_refused_precisely);

/// A token works only for its own line; a revoked token is refused.
async fn tokens_are_scoped_and_revocable(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(12, 1.0, 2);
    let token_a = register_line(&db, "Test reach", "line-a", &tl);
    let token_b = register_line(&db, "Test reach", "line-b", &tl);
    let second_a =
        cli(&db, &["token", "issue", "--line", "line-a", "--label", "spare"]).trim().to_string();
    assert_ne!(token_a, second_a);
    let server = Server::start(&db).await;
    let epoch = tl.epoch_csv("2026-05-01T00:00:00Z", 80.0, 0);

    let (s, v) = server.post_epoch("line-b", &token_a, "text/csv", "", epoch.clone()).await;
    assert_eq!((s, error_of(&v).0), (403, "forbidden"), "{v}");
    let (s, _) = server.get_json("/api/v1/lines/line-b/epochs", &token_a).await;
    assert_eq!(s, 403);
    let (s, v) = server.post_epoch("line-a", &token_a, "text/csv", "", epoch.clone()).await;
    assert_eq!(s, 201, "{v}");
    let epoch_a = v["epoch_id"].as_i64().unwrap();
    let (s, _) = server.get_json(&format!("/api/v1/epochs/{epoch_a}"), &token_b).await;
    assert_eq!(s, 403);
    let (_, lines) = server.get_json("/api/v1/lines", &token_b).await;
    let names: Vec<&str> =
        lines["lines"].as_array().unwrap().iter().map(|l| l["name"].as_str().unwrap()).collect();
    assert_eq!(names, ["line-b"]);

    for bad in ["", "ohl_0000", "Basic abc", &token_a[..token_a.len() - 1]] {
        let r = server
            .client
            .get(server.url("/api/v1/lines"))
            .header("authorization", format!("Bearer {bad}"))
            .send()
            .await
            .unwrap();
        assert_eq!(r.status(), 401, "{bad:?}");
    }
    let r = server.client.get(server.url("/api/v1/lines")).send().await.unwrap();
    assert_eq!(r.status(), 401);

    // Revoke the first token of line A: refused from then on; the spare works.
    let listing = cli(&db, &["token", "list", "--line", "line-a"]);
    let id = listing
        .lines()
        .find(|l| l.split('\t').nth(1) == Some(""))
        .unwrap()
        .split('\t')
        .next()
        .unwrap()
        .to_string();
    assert!(listing.contains("last used 20"), "last use is recorded: {listing}");
    cli(&db, &["token", "revoke", &id]);
    let (s, _) = server.get_json("/api/v1/lines", &token_a).await;
    assert_eq!(s, 401);
    let (s, _) = server.get_json("/api/v1/lines", &second_a).await;
    assert_eq!(s, 200);
    // Tokens are stored only as hashes.
    let store = db.connect().await;
    let hashes: Vec<String> = match &store {
        db::Db::Sqlite(p) => {
            sqlx::query_scalar("SELECT token_hash FROM line_tokens").fetch_all(p).await.unwrap()
        }
        db::Db::Postgres(p) => {
            sqlx::query_scalar("SELECT token_hash FROM line_tokens").fetch_all(p).await.unwrap()
        }
    };
    assert!(!hashes.iter().any(|h| h.contains(&token_a[4..]) || h == &token_a));
    store.close().await;
}
on_both_engines!(tokens_are_scoped_and_revocable);

/// CLI input files with errors are refused with file, row and column.
async fn cli_reports_file_errors(engine: Engine) {
    let db = TestDb::new(engine).await;
    cli(&db, &["site", "add", "Test reach"]);
    let e = db.path("e.csv");
    std::fs::write(&e, "label,x,z\nE1,0,0\nE2,1,0\nE3,oops,0\nE4,3,0\n").unwrap();
    let out = cli_output(
        &db,
        &[
            "line",
            "add",
            "--site",
            "Test reach",
            "--name",
            "x",
            "--electrodes",
            e.to_str().unwrap(),
        ],
    );
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("e.csv, row 4, column x"), "{err}");
    std::fs::write(&e, "label,x,z\nE1,0,0\nE2,1,0\nE3,2,0\nE4,3,0\n").unwrap();
    let q = db.path("q.csv");
    std::fs::write(&q, "a,b,m,n\nE1,E4,E2,E3\nE1,E4,E2,E3\n").unwrap();
    let out = cli_output(
        &db,
        &[
            "line",
            "add",
            "--site",
            "Test reach",
            "--name",
            "x",
            "--electrodes",
            e.to_str().unwrap(),
            "--sequence",
            q.to_str().unwrap(),
        ],
    );
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success() && err.contains("q.csv, row 3"), "{err}");
    // Nothing half-registered: the line does not exist after the failure.
    assert!(!cli(&db, &["line", "list"]).contains("\tx\t"));
    let out = cli_output(
        &db,
        &["line", "add", "--site", "Nowhere", "--name", "x", "--electrodes", e.to_str().unwrap()],
    );
    assert!(String::from_utf8_lossy(&out.stderr).contains("no site named"));
    // A bad slug is refused; a line without a sequence registers and says so.
    let out = cli_output(
        &db,
        &[
            "line",
            "add",
            "--site",
            "Test reach",
            "--name",
            "Crest A",
            "--electrodes",
            e.to_str().unwrap(),
        ],
    );
    assert!(String::from_utf8_lossy(&out.stderr).contains("lower-case"));
    let msg = cli(
        &db,
        &[
            "line",
            "add",
            "--site",
            "Test reach",
            "--name",
            "x",
            "--electrodes",
            e.to_str().unwrap(),
        ],
    );
    assert!(msg.contains("4 electrodes, no sequence yet"), "{msg}");
}
on_both_engines!(cli_reports_file_errors);

/// Files dropped into a line's folder are ingested once and moved to done/ or
/// failed/ with an error file.
async fn drop_folder_ingest(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(12, 1.0, 2);
    register_line(&db, "Test reach", "crest-d", &tl);
    let drop = db.path("drop");
    std::fs::create_dir_all(&drop).unwrap();
    let config = db.path("ohmline.toml");
    std::fs::write(
        &config,
        format!(
            "[drop_folders]\npoll_interval_s = 0.2\nlines = {{ \"crest-d\" = \"{}\" }}\n",
            drop.display()
        ),
    )
    .unwrap();
    let _server = Server::start_with(&db, Some(&config)).await;
    // An upload in progress (.part) is left alone; the rename makes it complete.
    std::fs::write(drop.join("e1.csv.part"), tl.epoch_csv("2026-06-01T00:00:00Z", 60.0, 0))
        .unwrap();
    std::fs::rename(drop.join("e1.csv.part"), drop.join("e1.csv")).unwrap();
    std::fs::write(drop.join("e2.json"), tl.epoch_json("2026-06-01T06:00:00Z", 60.0)).unwrap();
    std::fs::write(
        drop.join("bad.csv"),
        "# started_at: 2026-06-01T12:00:00Z\na,b,m,n,resistance_ohm\nE1,E4,E2,E99,1\n",
    )
    .unwrap();
    // The same epoch again under another name: a duplicate, also moved to done/.
    std::fs::write(drop.join("e1-again.csv"), tl.epoch_csv("2026-06-01T00:00:00Z", 60.0, 0))
        .unwrap();

    let deadline = Instant::now() + Duration::from_secs(20);
    while std::fs::read_dir(&drop).unwrap().filter(|e| e.as_ref().unwrap().path().is_file()).count()
        > 0
    {
        assert!(Instant::now() < deadline, "drop folder not emptied");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    let mut done: Vec<String> = std::fs::read_dir(drop.join("done"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into())
        .collect();
    done.sort();
    assert_eq!(done, ["e1-again.csv", "e1.csv", "e2.json"]);
    let err = std::fs::read_to_string(drop.join("failed").join("bad.csv.error.txt")).unwrap();
    assert!(err.contains("row 3, field n: unknown electrode label \"E99\""), "{err}");
    assert!(drop.join("failed").join("bad.csv").exists());
    let store = db.connect().await;
    let line = db::lines::by_name(&store, "crest-d").await.unwrap().unwrap();
    assert_eq!(db::epochs::count_for_line(&store, line.id).await.unwrap(), 2);
    let raws = db::raw_uploads::list(&store, line.id, None, 10).await.unwrap();
    assert_eq!(raws.len(), 4);
    assert!(raws.iter().all(|r| r.source == "dropfolder" && r.filename.is_some()));
    store.close().await;
}
on_both_engines!(drop_folder_ingest);
