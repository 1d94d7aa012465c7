//! Site time series end to end: uploads over the API (CSV and JSON) with their
//! idempotent re-send, replacement and refusals (bad rows, units, roles and
//! tokens); the web upload form; the CLI; and the line page's charts on the
//! time axis of the processed epochs — over HTTP and in headless Chromium, with
//! a screenshot under `tests/artifacts/`.

use std::time::Duration;

use chrono::{DateTime, Utc};
use fantoccini::Locator;
use serde_json::{Value, json};
use serial_test::serial;

use crate::on_both_engines;
use crate::support::{
    Browser, Engine, HttpSession, Server, TestDb, TestLine, add_user, cli, register_line,
    save_screenshot, upload_block_season, user_token, wait_processed,
};
use ohmline_server::db;

/// The id of a site, from `ohmline site list`.
fn site_id(db: &TestDb, name: &str) -> i64 {
    let out = cli(db, &["site", "list"]);
    let row = out.lines().find(|l| l.split('\t').nth(1) == Some(name)).expect("site listed");
    row.split('\t').next().unwrap().parse().unwrap()
}

/// Hourly samples from `start` (RFC 3339), `value(h)` at hour h.
fn hourly_csv(start: &str, hours: usize, value: impl Fn(usize) -> f64) -> String {
    let t0 = DateTime::parse_from_rfc3339(start).unwrap().with_timezone(&Utc);
    let mut s = String::from("time,value\n");
    for h in 0..hours {
        let t = t0 + chrono::Duration::hours(h as i64);
        s.push_str(&format!("{},{}\n", t.to_rfc3339(), value(h)));
    }
    s
}

async fn post(
    server: &Server,
    path: &str,
    token: Option<&str>,
    content_type: &str,
    body: String,
) -> (u16, Value) {
    let mut req = server.client.post(server.url(path)).header("content-type", content_type);
    if let Some(t) = token {
        req = req.bearer_auth(t);
    }
    let r = req.body(body).send().await.unwrap();
    let status = r.status().as_u16();
    (status, r.json().await.unwrap_or(Value::Null))
}

/// The API: uploads, idempotence, replacement, refusals, reading.
async fn series_api(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(12, 1.0, 2);
    let line_token = register_line(&db, "Test reach", "line-a", &tl);
    let other_token = register_line(&db, "Other reach", "line-o", &tl);
    add_user(&db, "viewer@levee.test", "viewer");
    add_user(&db, "engineer@levee.test", "engineer");
    let viewer = user_token(&db, "viewer@levee.test");
    let engineer = user_token(&db, "engineer@levee.test");
    let site = site_id(&db, "Test reach");
    let server = Server::start(&db).await;
    let stage = format!("/api/v1/sites/{site}/series/river_stage");

    // 24 hourly river stages by an engineer's token: all added.
    let csv = hourly_csv("2026-03-01T00:00:00Z", 24, |h| 0.3 + 0.05 * h as f64);
    let (s, v) = post(&server, &stage, Some(&engineer), "text/csv", csv.clone()).await;
    assert_eq!(s, 201, "{v}");
    assert_eq!((v["n_samples"].as_i64(), v["added"].as_i64()), (Some(24), Some(24)), "{v}");
    assert_eq!(v["unit"], "m");
    // The same again: nothing changes, 200.
    let (s, v) = post(&server, &stage, Some(&engineer), "text/csv", csv.clone()).await;
    assert_eq!(s, 200, "{v}");
    assert_eq!((v["added"].as_i64(), v["unchanged"].as_i64()), (Some(0), Some(24)), "{v}");
    // One changed value as JSON from the meter token of a line of the site,
    // with the site named by its name: replaced and recorded.
    let by_name = "/api/v1/sites/Test%20reach/series/river_stage";
    let body = json!({"samples": [{"time": "2026-03-01T05:00:00Z", "value": 0.9}]}).to_string();
    let (s, v) = post(&server, by_name, Some(&line_token), "application/json", body).await;
    assert_eq!(s, 201, "{v}");
    assert_eq!((v["replaced"].as_i64(), v["added"].as_i64()), (Some(1), Some(0)), "{v}");

    // Rainfall as JSON with its unit given: added.
    let rain = format!("/api/v1/sites/{site}/series/rainfall");
    let body = json!({"unit": "mm", "samples": [
        {"time": "2026-03-01T06:00:00Z", "value": 0.0},
        {"time": "2026-03-01T12:00:00Z", "value": 4.5},
    ]})
    .to_string();
    let (s, v) = post(&server, &rain, Some(&line_token), "application/json", body).await;
    assert_eq!(s, 201, "{v}");

    // A bad value in row 5 (the header is row 1): 400 naming row and field,
    // nothing of it stored.
    let mut bad = hourly_csv("2026-03-02T00:00:00Z", 6, |h| h as f64);
    bad = bad.replacen(",3\n", ",three\n", 1);
    let (s, v) = post(&server, &stage, Some(&engineer), "text/csv", bad).await;
    assert_eq!(s, 400, "{v}");
    assert_eq!(
        (v["error"]["row"].as_i64(), v["error"]["field"].as_str()),
        (Some(5), Some("value"))
    );
    assert!(v["error"]["message"].as_str().unwrap().starts_with("row 5, field value:"), "{v}");
    // A bad time in samples[2] of a JSON upload.
    let body = json!({"samples": [
        {"time": "2026-03-03T00:00:00Z", "value": 1.0},
        {"time": "2026-03-03T01:00:00Z", "value": 1.0},
        {"time": "3 March 2026", "value": 1.0},
    ]})
    .to_string();
    let (s, v) = post(&server, &stage, Some(&engineer), "application/json", body).await;
    assert_eq!(s, 400, "{v}");
    assert_eq!(
        (v["error"]["index"].as_i64(), v["error"]["field"].as_str()),
        (Some(2), Some("time"))
    );
    // Wrong unit for the kind; a new named kind without and with its unit.
    let (s, v) =
        post(&server, &format!("{stage}?unit=cm"), Some(&engineer), "text/csv", csv.clone()).await;
    assert_eq!((s, v["error"]["field"].as_str()), (400, Some("unit")), "{v}");
    let piezo = format!("/api/v1/sites/{site}/series/piezometer-p3");
    let small = hourly_csv("2026-03-01T00:00:00Z", 3, |h| 10.0 + h as f64);
    let (s, v) = post(&server, &piezo, Some(&engineer), "text/csv", small.clone()).await;
    assert_eq!((s, v["error"]["field"].as_str()), (400, Some("unit")), "{v}");
    let (s, v) =
        post(&server, &format!("{piezo}?unit=kPa"), Some(&engineer), "text/csv", small).await;
    assert_eq!(s, 201, "{v}");
    // An unknown content type, and a malformed kind.
    let (s, _) = post(&server, &stage, Some(&engineer), "application/xml", csv.clone()).await;
    assert_eq!(s, 415);
    let (s, v) = post(
        &server,
        &format!("/api/v1/sites/{site}/series/River%20Stage"),
        Some(&engineer),
        "text/csv",
        csv.clone(),
    )
    .await;
    assert_eq!((s, v["error"]["field"].as_str()), (400, Some("kind")), "{v}");

    // Refused callers: a viewer, another site's meter, nobody; unknown site.
    let (s, _) = post(&server, &stage, Some(&viewer), "text/csv", csv.clone()).await;
    assert_eq!(s, 403, "a viewer may not upload");
    let (s, _) = post(&server, &stage, Some(&other_token), "text/csv", csv.clone()).await;
    assert_eq!(s, 403, "a line of another site may not upload");
    let (s, _) = post(&server, &stage, None, "text/csv", csv.clone()).await;
    assert_eq!(s, 401);
    let (s, _) =
        post(&server, "/api/v1/sites/999/series/rainfall", Some(&engineer), "text/csv", csv).await;
    assert_eq!(s, 404);

    // Reading: the list with extents and newest values; a window of samples.
    let (s, v) = server.get_json(&format!("/api/v1/sites/{site}/series"), &viewer).await;
    assert_eq!(s, 200, "{v}");
    let kinds: Vec<(&str, i64)> = v["series"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| (x["kind"].as_str().unwrap(), x["n_samples"].as_i64().unwrap()))
        .collect();
    assert_eq!(kinds, [("piezometer-p3", 3), ("rainfall", 2), ("river_stage", 24)], "{v}");
    let newest = v["series"][2]["last_value"].as_f64().unwrap();
    assert!((newest - (0.3 + 0.05 * 23.0)).abs() < 1e-12, "{v}");
    let (s, v) = server
        .get_json(
            &format!("{stage}?from=2026-03-01T04:00:00Z&to=2026-03-01T06:00:00Z"),
            &line_token,
        )
        .await;
    assert_eq!(s, 200, "{v}");
    let values: Vec<f64> =
        v["samples"].as_array().unwrap().iter().map(|x| x["value"].as_f64().unwrap()).collect();
    assert_eq!(values.len(), 3);
    assert_eq!(values[1], 0.9, "the replaced value");
    let (s, _) = server.get_json(&format!("/api/v1/sites/{site}/series"), &other_token).await;
    assert_eq!(s, 403, "another site's meter may not read");
    let (s, v) = server.get_json(&format!("{stage}?from=yesterday"), &viewer).await;
    assert_eq!((s, v["error"]["field"].as_str()), (400, Some("from")));

    // Stored: the replaced value's history, and every upload kept with its
    // outcome (the rejected ones too).
    let conn = db.connect().await;
    let series = db::series::by_kind(&conn, site, "river_stage").await.unwrap().unwrap();
    let revisions = db::series::revisions(&conn, series.id).await.unwrap();
    assert_eq!(revisions.len(), 1);
    assert!((revisions[0].1 - 0.55).abs() < 1e-12 && revisions[0].2 == 0.9, "{revisions:?}");
    let uploads = db::series::uploads(&conn, site, 100).await.unwrap();
    let statuses: Vec<&str> = uploads.iter().rev().map(|u| u.status.as_str()).collect();
    assert_eq!(
        statuses,
        [
            "accepted", "accepted", "accepted", "accepted", "rejected", "rejected", "rejected",
            "rejected", "accepted", "rejected"
        ],
        "{uploads:?}"
    );
    let body = db::series::upload_body_gz(&conn, uploads[0].id).await.unwrap();
    assert!(!body.is_empty(), "the raw body is kept");
    conn.close().await;

    // The CLI goes through the same checks.
    let f = db.path("stage.csv");
    std::fs::write(&f, hourly_csv("2026-03-01T20:00:00Z", 8, |h| 1.0 + h as f64 / 100.0)).unwrap();
    let out = cli(
        &db,
        &["series", "upload", "--site", "Test reach", "--kind", "river_stage", f.to_str().unwrap()],
    );
    assert!(out.contains("8 samples, 4 added, 0 unchanged, 4 replaced"), "{out}");
    let listed = cli(&db, &["series", "list", "--site", &site.to_string()]);
    assert!(listed.lines().any(|l| l.starts_with("river_stage\tm\t28 samples")), "{listed}");
}
on_both_engines!(series_api);

/// A multipart form body (boundary, body) with text fields and one file.
fn multipart(fields: &[(&str, &str)], file: (&str, &str, &str)) -> (String, String) {
    let boundary = "----ohmline-test-boundary-7c1f".to_string();
    let mut body = String::new();
    for (k, v) in fields {
        body.push_str(&format!(
            "--{boundary}\r\nContent-Disposition: form-data; name=\"{k}\"\r\n\r\n{v}\r\n"
        ));
    }
    let (name, filename, content) = file;
    body.push_str(&format!(
        "--{boundary}\r\nContent-Disposition: form-data; name=\"{name}\"; filename=\"{filename}\"\r\nContent-Type: text/csv\r\n\r\n{content}\r\n--{boundary}--\r\n"
    ));
    (boundary, body)
}

async fn post_form(
    session: &mut HttpSession,
    url: &str,
    fields: &[(&str, &str)],
    file: (&str, &str, &str),
) -> (u16, String) {
    let (boundary, body) = multipart(fields, file);
    let r = session
        .client
        .post(url)
        .header("cookie", session.cookie_header())
        .header("content-type", format!("multipart/form-data; boundary={boundary}"))
        .body(body)
        .send()
        .await
        .unwrap();
    (r.status().as_u16(), r.text().await.unwrap())
}

async fn js(b: &Browser, script: &str) -> Value {
    b.client.execute(script, vec![]).await.unwrap()
}

/// The line page: a chart per series on the time axis of the processed
/// epochs with the epoch on show marked; the web upload form; the overview.
async fn series_on_line_page(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(32, 1.0, 6);
    let token = register_line(&db, "Test Levee", "crest-t", &tl);
    let engineer_pw = add_user(&db, "eng@levees.example.org", "engineer");
    let viewer_pw = add_user(&db, "view@levees.example.org", "viewer");
    let engineer = user_token(&db, "eng@levees.example.org");
    let site = site_id(&db, "Test Levee");
    let server = Server::start(&db).await;
    // Epochs every 6 h from 2026-03-01 00:00 to 2026-03-02 12:00.
    let ids = upload_block_season(&server, &tl, "crest-t", &token).await;
    wait_processed(&server, &ids, &token).await;

    // Hourly stage from a day before to half a day after the epochs: 73
    // samples, of which the 37 from 03-01 00:00 to 03-02 12:00 lie on the axis.
    let stage = hourly_csv("2026-02-28T00:00:00Z", 73, |h| {
        0.4 + 1.2 * (std::f64::consts::PI * h as f64 / 72.0).sin()
    });
    let url = format!("/api/v1/sites/{site}/series/river_stage");
    let (s, v) = post(&server, &url, Some(&engineer), "text/csv", stage).await;
    assert_eq!(s, 201, "{v}");

    // Rainfall through the web form by the engineer; a bad file is refused
    // with its row, and a viewer may not upload.
    let mut session = HttpSession::new();
    assert_eq!(session.sign_in(&server, "eng@levees.example.org", &engineer_pw).await, 303);
    let csrf = session.csrf(&server).await;
    let page_url = server.url(&format!("/sites/{site}/series"));
    let (s, _, page) = session.get(&page_url).await;
    assert_eq!(s, 200);
    assert!(page.contains("id=\"upload-series\""), "engineers see the form");
    let rain = "time,value\n2026-03-01T06:00:00Z,0\n2026-03-01T12:00:00Z,6.5\n2026-03-01T18:00:00Z,12\n2026-03-02T00:00:00Z,1.5\n";
    let fields = [("csrf", csrf.as_str()), ("kind", "rainfall"), ("other", ""), ("unit", "")];
    let (s, page) = post_form(&mut session, &page_url, &fields, ("file", "rain.csv", rain)).await;
    assert_eq!(s, 200, "{page}");
    assert!(page.contains("Stored rainfall from rain.csv: 4 samples, 4 added"), "{page}");
    let broken = "time,value\n2026-03-01T06:00:00Z,0\n2026-03-01T12:00:00Z,\n";
    let (s, page) = post_form(&mut session, &page_url, &fields, ("file", "b.csv", broken)).await;
    assert_eq!(s, 400);
    assert!(page.contains("row 3, field value: is empty"), "{page}");
    let no_csrf = [("kind", "rainfall"), ("unit", "")];
    let (s, _) = post_form(&mut session, &page_url, &no_csrf, ("file", "rain.csv", rain)).await;
    assert_eq!(s, 403, "no CSRF token");
    let mut viewer = HttpSession::new();
    assert_eq!(viewer.sign_in(&server, "view@levees.example.org", &viewer_pw).await, 303);
    let viewer_csrf = viewer.csrf(&server).await;
    let (_, _, page) = viewer.get(&page_url).await;
    assert!(!page.contains("id=\"upload-series\""), "viewers see no form");
    let vf = [("csrf", viewer_csrf.as_str()), ("kind", "rainfall"), ("unit", "")];
    let (s, _) = post_form(&mut viewer, &page_url, &vf, ("file", "rain.csv", rain)).await;
    assert_eq!(s, 403, "a viewer may not upload");

    // The line page (no script): one chart per series, on the axis of the
    // processed epochs, the newest epoch marked; the sample counts on the axis.
    let (s, _, page) = viewer.get(&server.url("/lines/crest-t")).await;
    assert_eq!(s, 200);
    let last = ids[ids.len() - 1];
    for (kind, n) in [("river_stage", 37), ("rainfall", 4)] {
        assert!(
            page.contains(&format!("id=\"series-{kind}\"")) && page.contains(&format!(
                "data-samples=\"{n}\" id=\"series-{kind}\"><img data-series=\"{kind}\" src=\"/lines/crest-t/series/{kind}.svg?epoch={last}\""
            )),
            "{kind} chart with {n} samples missing"
        );
    }
    assert!(
        page.contains(
            "from <time datetime=\"2026-03-01T00:00:00.000Z\">2026-03-01 00:00 UTC</time> to \
             <time datetime=\"2026-03-02T12:00:00.000Z\">2026-03-02 12:00 UTC</time>"
        ),
        "the axis of the time control"
    );
    // The chart of an earlier epoch marks that epoch, with the axis titled.
    let r = viewer
        .client
        .get(server.url(&format!("/lines/crest-t/series/river_stage.svg?epoch={}", ids[3])))
        .header("cookie", viewer.cookie_header())
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    assert_eq!(r.headers()["content-type"], "image/svg+xml");
    let svg = r.text().await.unwrap();
    for text in ["River stage (m)", "epoch 2026-03-01 18:00 UTC", "Date (UTC)", "Test Levee"] {
        assert!(svg.contains(text), "{text} missing in the chart");
    }
    let (s, _, _) = viewer.get(&server.url("/lines/crest-t/series/nothing.svg")).await;
    assert_eq!(s, 404);
    let (s, _, _) = viewer.get(&server.url("/lines/crest-t/series/rainfall.svg?epoch=99999")).await;
    assert_eq!(s, 404, "not a processed epoch of the line");
    // The overview names the newest values.
    let (_, _, overview) = viewer.get(&server.url("/overview")).await;
    assert!(overview.contains("Rainfall 1.5 mm (2026-03-02 00:00 UTC)"), "{overview}");

    // In Chromium: the charts load, follow the time control, and the page
    // with them is saved as a screenshot.
    let b = Browser::start().await;
    let c = &b.client;
    c.goto(&server.url("/sign-in")).await.unwrap();
    c.find(Locator::Id("email")).await.unwrap().send_keys("view@levees.example.org").await.unwrap();
    c.find(Locator::Id("password")).await.unwrap().send_keys(&viewer_pw).await.unwrap();
    c.find(Locator::Css("form[action='/sign-in'] button")).await.unwrap().click().await.unwrap();
    let deadline = std::time::Instant::now() + Duration::from_secs(20);
    while c.current_url().await.unwrap().path() == "/sign-in" {
        assert!(std::time::Instant::now() < deadline, "not signed in");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    c.goto(&server.url("/lines/crest-t")).await.unwrap();
    let loaded = "return Array.from(document.querySelectorAll('img[data-series]'))
        .map(i => i.complete && i.naturalWidth > 0)";
    let deadline = std::time::Instant::now() + Duration::from_secs(20);
    loop {
        let v = js(&b, loaded).await;
        if v.as_array().is_some_and(|a| a.len() == 2 && a.iter().all(|x| x == true)) {
            break;
        }
        assert!(std::time::Instant::now() < deadline, "series charts did not load: {v}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    js(&b, "document.getElementById('series-h').scrollIntoView()").await;
    tokio::time::sleep(Duration::from_millis(300)).await;
    let tag = format!("{engine:?}").to_lowercase();
    save_screenshot(&format!("series-{tag}-line-page"), &c.screenshot().await.unwrap());
    c.goto(&server.url(&format!("/sites/{site}/series"))).await.unwrap();
    save_screenshot(&format!("series-{tag}-site-page"), &c.screenshot().await.unwrap());
    c.goto(&server.url("/lines/crest-t")).await.unwrap();
    // Dragging the slider to the first epoch moves the mark on the charts.
    let moved = js(
        &b,
        "const s = document.getElementById('epoch-slider'); s.value = '0';
         s.dispatchEvent(new Event('input'));
         return Array.from(document.querySelectorAll('img[data-series]')).map(i => i.getAttribute('src'))",
    )
    .await;
    let first = ids[0];
    for src in moved.as_array().unwrap() {
        assert!(src.as_str().unwrap().ends_with(&format!(".svg?epoch={first}")), "{moved}");
    }
    b.close().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[serial(chromium)]
async fn series_on_line_page_sqlite() {
    series_on_line_page(Engine::Sqlite).await
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[serial(chromium)]
async fn series_on_line_page_postgres() {
    series_on_line_page(Engine::Postgres).await
}
