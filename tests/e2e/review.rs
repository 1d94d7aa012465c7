//! The review pages end to end on a processed season (forward-modelled epochs
//! with a conductive block appearing, as in `processing.rs`): in headless
//! Chromium an engineer goes overview → line → steps through the epochs →
//! opens the alert → acknowledges it with a note → finds the note in the audit
//! trail; a viewer sees no form and a POST is refused; the data-quality and
//! alerts pages; screenshots under `tests/artifacts/`. Over HTTP: the exports
//! (CSV, JSON, VTK `.vtu` parsed with an XML parser) agree with the JSON API.

use std::time::Duration;

use fantoccini::Locator;
use ohmline_core::alerts::CAUTION;
use serde_json::{Value, json};
use serial_test::serial;

use crate::support::{
    Browser, Engine, HttpSession, Server, TestDb, TestLine, add_user, hidden_input, register_line,
    save_screenshot, upload_block_season, wait_processed,
};

struct Season {
    /// Kept until the test ends (the database is dropped with it).
    _db: TestDb,
    server: Server,
    token: String,
    ids: Vec<i64>,
    engineer_pw: String,
    viewer_pw: String,
}

async fn season(engine: Engine) -> Season {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(32, 1.0, 6);
    let token = register_line(&db, "Test Levee", "crest-t", &tl);
    let engineer_pw = add_user(&db, "eng@levees.example.org", "engineer");
    let viewer_pw = add_user(&db, "view@levees.example.org", "viewer");
    let server = Server::start(&db).await;
    let ids = upload_block_season(&server, &tl, "crest-t", &token).await;
    wait_processed(&server, &ids, &token).await;
    Season { _db: db, server, token, ids, engineer_pw, viewer_pw }
}

async fn path(b: &Browser) -> String {
    b.client.current_url().await.unwrap().path().to_string()
}

async fn url(b: &Browser) -> String {
    b.client.current_url().await.unwrap().to_string()
}

async fn js(b: &Browser, script: &str) -> Value {
    b.client.execute(script, vec![]).await.unwrap()
}

/// Waits up to 20 s for `script` to return `true`.
async fn wait_true(b: &Browser, script: &str) {
    let deadline = std::time::Instant::now() + Duration::from_secs(20);
    while js(b, script).await != json!(true) {
        assert!(std::time::Instant::now() < deadline, "never true: {script}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

/// Waits until every image of the page has loaded, and checks none is broken.
async fn images_loaded(b: &Browser, at_least: usize) {
    wait_true(b, "return [...document.images].every(i => i.complete)").await;
    let sizes = js(b, "return [...document.images].map(i => [i.src, i.naturalWidth])").await;
    let sizes = sizes.as_array().unwrap();
    assert!(sizes.len() >= at_least, "{at_least} figures expected: {sizes:?}");
    for s in sizes {
        assert!(s[1].as_u64().unwrap() > 0, "figure did not load: {s}");
    }
}

async fn shot(b: &Browser, name: &str) {
    let png = b.client.screenshot().await.unwrap();
    save_screenshot(&format!("review-{name}"), &png);
}

async fn sign_in(b: &Browser, server: &Server, email: &str, password: &str) {
    let c = &b.client;
    c.goto(&server.url("/sign-in")).await.unwrap();
    c.find(Locator::Id("email")).await.unwrap().send_keys(email).await.unwrap();
    c.find(Locator::Id("password")).await.unwrap().send_keys(password).await.unwrap();
    c.find(Locator::Css("form[action='/sign-in'] button")).await.unwrap().click().await.unwrap();
    wait_true(b, "return location.pathname === '/overview'").await;
}

async fn text(b: &Browser, css: &str) -> String {
    b.client.find(Locator::Css(css)).await.unwrap().text().await.unwrap()
}

const NOTE: &str = "Inspection of the landside toe arranged <b>at dawn</b> & logged.";

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[serial(chromium)]
async fn review_in_browser() {
    let s = season(Engine::Sqlite).await;
    let server = &s.server;
    let b = Browser::start().await;
    let c = &b.client;

    // Overview: the line's open alerts are linked.
    sign_in(&b, server, "eng@levees.example.org", &s.engineer_pw).await;
    let row =
        c.find(Locator::XPath("//tr[th/a[text()='crest-t']]")).await.unwrap().text().await.unwrap();
    assert!(row.contains("open"), "open alerts on the overview: {row}");
    assert!(row.contains("% dropped"), "data quality on the overview: {row}");
    wait_true(&b, "const i = document.querySelector('img.spark'); return !!i && i.complete && i.naturalWidth > 0").await;
    shot(&b, "overview").await;

    // Line page: the newest epoch's sections, zones and the season chart.
    c.find(Locator::LinkText("crest-t")).await.unwrap().click().await.unwrap();
    wait_true(&b, "return location.pathname === '/lines/crest-t'").await;
    images_loaded(&b, 3).await;
    assert!(
        c.find(Locator::Id("fig-model")).await.is_ok()
            && c.find(Locator::Id("fig-change")).await.is_ok()
    );
    let now = text(&b, ".timeline .now").await;
    assert!(now.contains("2026-03-02 12:00 UTC") && now.contains("7 of 7"), "{now}");
    let zones = text(&b, "table.zones tbody").await;
    assert!(zones.contains("drop"), "the block's zone is listed: {zones}");
    assert_eq!(js(&b, "return document.querySelectorAll('#epoch-slider').length").await, json!(1));
    js(&b, "document.getElementById('sections-h').scrollIntoView(); return 0").await;
    shot(&b, "line").await;

    // Step back through the epochs with the links, then forward with the arrow key.
    for want in ["6 of 7", "5 of 7", "4 of 7"] {
        c.find(Locator::Id("epoch-prev")).await.unwrap().click().await.unwrap();
        wait_true(
            &b,
            &format!(
                "return document.querySelector('.timeline .now').textContent.includes('{want}')"
            ),
        )
        .await;
    }
    assert!(url(&b).await.contains(&format!("epoch={}", s.ids[3])), "{}", url(&b).await);
    images_loaded(&b, 3).await;
    js(&b, "document.getElementById('sections-h').scrollIntoView(); return 0").await;
    shot(&b, "line-epoch-4").await;
    c.find(Locator::Css("body")).await.unwrap().send_keys("\u{E014}").await.unwrap(); // ArrowRight
    wait_true(&b, "return document.querySelector('.timeline .now').textContent.includes('5 of 7')")
        .await;
    // Any epoch by its id (the no-script picker's target).
    c.goto(&server.url(&format!("/lines/crest-t?epoch={}", s.ids[0]))).await.unwrap();
    assert!(text(&b, ".timeline .now").await.contains("1 of 7"));
    assert!(c.find(Locator::Id("epoch-prev")).await.is_err(), "nothing earlier");
    images_loaded(&b, 2).await;

    // The zone alert from the line page.
    c.goto(&server.url("/lines/crest-t")).await.unwrap();
    let link =
        c.find(Locator::XPath("//ul[@class='alert-list']//a[contains(., 'zone')]")).await.unwrap();
    link.click().await.unwrap();
    wait_true(&b, "return location.pathname.startsWith('/alerts/')").await;
    let alert_path = path(&b).await;
    let caution = text(&b, "#caution").await;
    assert!(caution.contains(CAUTION), "{caution}");
    let facts = text(&b, "dl.facts").await;
    assert!(facts.contains("Chainage") && facts.contains("Depth below surface"), "{facts}");
    images_loaded(&b, 2).await; // history and the change sections
    shot(&b, "alert").await;

    // Acknowledge with a note; it is in the audit trail, shown as text.
    c.find(Locator::Id("note")).await.unwrap().send_keys(NOTE).await.unwrap();
    c.find(Locator::Id("acknowledge")).await.unwrap().click().await.unwrap();
    wait_true(&b, "return !!document.querySelector('.astate-acknowledged') && !document.getElementById('acknowledge')").await;
    assert_eq!(path(&b).await, alert_path);
    let trail = text(&b, "table.trail tbody tr:last-child").await;
    assert!(trail.contains("acknowledged") && trail.contains("eng@levees.example.org"), "{trail}");
    assert!(trail.contains(NOTE), "the note is shown as written: {trail}");
    assert_eq!(
        js(&b, "return document.querySelectorAll('main b, main script').length").await,
        json!(0)
    );
    assert!(
        c.find(Locator::Id("resolve")).await.is_ok(),
        "an acknowledged alert can still be resolved"
    );
    shot(&b, "alert-acknowledged").await;

    // An empty note is refused with a message and changes nothing.
    js(&b, "document.getElementById('note').removeAttribute('required'); return 0").await;
    c.find(Locator::Id("resolve")).await.unwrap().click().await.unwrap();
    wait_true(&b, "return !!document.getElementById('action-error')").await;
    assert!(text(&b, "#action-error").await.contains("note"));

    // The alerts list with its filters and the caution.
    c.goto(&server.url("/alerts?state=acknowledged&line=crest-t")).await.unwrap();
    let list = text(&b, "table.alerts tbody").await;
    assert!(list.contains("acknowledged"), "{list}");
    assert!(text(&b, ".caution").await.contains(CAUTION));
    shot(&b, "alerts").await;

    // Data quality.
    c.goto(&server.url("/lines/crest-t/quality")).await.unwrap();
    images_loaded(&b, 4).await;
    shot(&b, "quality").await;

    // A phone-sized alert page.
    c.set_window_size(390, 844).await.unwrap();
    c.goto(&server.url(&alert_path)).await.unwrap();
    images_loaded(&b, 2).await;
    shot(&b, "alert-phone").await;
    c.set_window_size(1280, 900).await.unwrap();

    // A viewer: no form, and a forged POST is refused.
    c.find(Locator::Css("form[action='/sign-out'] button")).await.unwrap().click().await.unwrap();
    wait_true(&b, "return location.pathname === '/sign-in'").await;
    sign_in(&b, server, "view@levees.example.org", &s.viewer_pw).await;
    c.goto(&server.url(&alert_path)).await.unwrap();
    assert!(c.find(Locator::Id("act-form")).await.is_err(), "no form for a viewer");
    assert!(text(&b, "#caution").await.contains(CAUTION));
    shot(&b, "alert-viewer").await;
    let status = c
        .execute_async(
            "const done = arguments[arguments.length - 1];
             const csrf = document.querySelector('form[action=\"/sign-out\"] input[name=csrf]').value;
             fetch(location.pathname + '/resolve', {method: 'POST',
               headers: {'content-type': 'application/x-www-form-urlencoded'},
               body: new URLSearchParams({csrf, note: 'closing it'})})
             .then(r => done(r.status));",
            vec![],
        )
        .await
        .unwrap();
    assert_eq!(status, json!(403), "a viewer's POST is refused");
    c.goto(&server.url(&alert_path)).await.unwrap();
    assert!(text(&b, ".page-head").await.contains("acknowledged"), "still acknowledged");
    b.close().await;
}

/// The page's HTML holds the caution (its apostrophe is escaped).
fn shows_caution(html: &str) -> bool {
    CAUTION.split('\'').all(|part| html.contains(part))
}

/// Exports over HTTP agree with the JSON API; the VTK file parses as XML with
/// the counts of the API's cells.
async fn exports_agree_with_the_api(engine: Engine) {
    let s = season(engine).await;
    let server = &s.server;
    let mut http = HttpSession::new();
    assert_eq!(http.sign_in(server, "view@levees.example.org", &s.viewer_pw).await, 303);
    let last = *s.ids.last().unwrap();

    let (code, model) = server.get_json(&format!("/api/v1/epochs/{last}/model"), &s.token).await;
    assert_eq!(code, 200, "{model}");
    let cells = model["cells"].as_array().unwrap();
    let (code, change) = server.get_json(&format!("/api/v1/epochs/{last}/change"), &s.token).await;
    assert_eq!(code, 200, "{change}");
    let ch_cells = change["cells"].as_array().unwrap();

    // VTK XML UnstructuredGrid (format: VTK User's Guide, "VTK File Formats").
    let (code, headers, vtu) =
        http.get(&server.url(&format!("/lines/crest-t/export/sections.vtu?epoch={last}"))).await;
    assert_eq!(code, 200, "{vtu}");
    assert!(headers["content-disposition"].to_str().unwrap().contains(".vtu"));
    let doc = roxmltree::Document::parse(&vtu).expect("the .vtu is well-formed XML");
    let root = doc.root_element();
    assert_eq!(root.tag_name().name(), "VTKFile");
    assert_eq!(root.attribute("type"), Some("UnstructuredGrid"));
    let piece = doc.descendants().find(|n| n.has_tag_name("Piece")).unwrap();
    let n_cells: usize = piece.attribute("NumberOfCells").unwrap().parse().unwrap();
    let n_points: usize = piece.attribute("NumberOfPoints").unwrap().parse().unwrap();
    assert_eq!(n_cells, cells.len(), "one VTK cell per model cell");
    let array = |name: &str| -> Vec<String> {
        doc.descendants()
            .find(|n| n.has_tag_name("DataArray") && n.attribute("Name") == Some(name))
            .unwrap_or_else(|| panic!("no {name} array"))
            .text()
            .unwrap_or_default()
            .split_whitespace()
            .map(str::to_string)
            .collect()
    };
    let points = doc
        .descendants()
        .find(|n| n.has_tag_name("Points"))
        .and_then(|p| p.children().find(|n| n.has_tag_name("DataArray")))
        .unwrap();
    assert_eq!(points.text().unwrap().split_whitespace().count(), 3 * n_points);
    let connectivity: Vec<usize> =
        array("connectivity").iter().map(|v| v.parse().unwrap()).collect();
    let offsets: Vec<usize> = array("offsets").iter().map(|v| v.parse().unwrap()).collect();
    assert_eq!(offsets.len(), n_cells);
    let vertices: usize = cells.iter().map(|c| c["polygon"].as_array().unwrap().len()).sum();
    assert_eq!(*offsets.last().unwrap(), vertices);
    assert_eq!(connectivity.len(), vertices);
    assert!(connectivity.iter().all(|&i| i < n_points));
    assert!(n_points < vertices, "neighbouring cells share their vertices");
    assert!(array("types").iter().all(|t| t == "7"), "every cell a VTK_POLYGON");
    let rho: Vec<f64> = array("resistivity").iter().map(|v| v.parse().unwrap()).collect();
    let chg: Vec<f64> = array("change").iter().map(|v| v.parse().unwrap()).collect();
    let mask = array("in_mask");
    assert_eq!((rho.len(), chg.len(), mask.len()), (n_cells, n_cells, n_cells));
    for (i, c) in cells.iter().enumerate() {
        let v = c["value"].as_f64().unwrap();
        assert!((rho[i] - v).abs() <= 1e-9 * v.abs(), "cell {i}: {} vs {v}", rho[i]);
        assert_eq!(mask[i] == "1", c["in_mask"] == true, "cell {i} mask");
        let d = ch_cells[i]["value"].as_f64().unwrap();
        assert!((chg[i] - d).abs() <= 1e-9 * d.abs().max(1.0), "cell {i}: {} vs {d}", chg[i]);
    }

    // CSV and JSON exports: one row per cell and epoch; zones as in the API.
    let (code, _, csv) = http.get(&server.url("/lines/crest-t/export/models.csv")).await;
    assert_eq!(code, 200);
    let mut r = csv::Reader::from_reader(csv.as_bytes());
    let rows: Vec<csv::StringRecord> = r.records().map(Result::unwrap).collect();
    assert_eq!(rows.len(), s.ids.len() * cells.len(), "every epoch's cells");
    let (code, _, one) =
        http.get(&server.url(&format!("/lines/crest-t/export/models.csv?epoch={last}"))).await;
    assert_eq!(code, 200);
    let one: Vec<csv::StringRecord> =
        csv::Reader::from_reader(one.as_bytes()).records().map(Result::unwrap).collect();
    assert_eq!(one.len(), cells.len(), "one epoch's cells");
    for (row, cell) in one.iter().zip(cells) {
        assert_eq!(row[0].parse::<i64>().unwrap(), last);
        let v: f64 = row[7].parse().unwrap();
        let want = cell["value"].as_f64().unwrap();
        assert!((v - want).abs() <= 1e-9 * want, "corrected {v} vs the API's {want}");
    }
    let (code, _, zones) = http.get(&server.url("/lines/crest-t/export/zones.json")).await;
    assert_eq!(code, 200);
    let zones: Value = serde_json::from_str(&zones).unwrap();
    let last_zones: Vec<&Value> =
        zones["zones"].as_array().unwrap().iter().filter(|z| z["epoch_id"] == last).collect();
    assert_eq!(last_zones.len(), change["zones"].as_array().unwrap().len());
    let (code, _, zcsv) = http.get(&server.url("/lines/crest-t/export/zones.csv")).await;
    assert_eq!(code, 200);
    let n_csv = csv::Reader::from_reader(zcsv.as_bytes()).records().count();
    assert_eq!(n_csv, zones["zones"].as_array().unwrap().len());
    let (code, _, changes) = http.get(&server.url("/lines/crest-t/export/changes.json")).await;
    assert_eq!(code, 200);
    let changes: Value = serde_json::from_str(&changes).unwrap();
    let ours = changes["changes"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["epoch_id"] == last && c["mode"] == change["mode"])
        .unwrap();
    assert_eq!(ours["change_pct"].as_array().unwrap().len(), ch_cells.len());

    // Figures: SVG and PNG of a section, refused kinds, unknown epochs.
    let (code, h, svg) = http
        .get(&server.url(&format!("/lines/crest-t/epochs/{last}/section.svg?kind=change")))
        .await;
    assert_eq!(code, 200);
    assert_eq!(h["content-type"], "image/svg+xml");
    assert!(svg.starts_with("<svg") || svg.contains("<svg"), "{}", &svg[..svg.len().min(200)]);
    let r = http
        .client
        .get(server.url(&format!("/lines/crest-t/epochs/{last}/section.png?kind=model")))
        .header("cookie", http.cookie_header())
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    let png = r.bytes().await.unwrap();
    assert_eq!(&png[..8], b"\x89PNG\r\n\x1a\n");
    let (code, _, _) =
        http.get(&server.url(&format!("/lines/crest-t/epochs/{last}/section.svg?kind=pie"))).await;
    assert_eq!(code, 400);
    let (code, _, _) =
        http.get(&server.url("/lines/crest-t/epochs/999999/section.svg?kind=model")).await;
    assert_eq!(code, 404);

    // The form refuses a POST without the CSRF token, and a viewer's with it.
    let (_, _, page) = http.get(&server.url("/alerts?line=crest-t")).await;
    assert!(shows_caution(&page), "the alerts list carries the caution");
    let id = page
        .split("href=\"/alerts/")
        .nth(1)
        .and_then(|p| p.split('"').next())
        .and_then(|p| p.parse::<i64>().ok())
        .expect("an alert listed");
    let (code, _, _) =
        http.post(&server.url(&format!("/alerts/{id}/acknowledge")), &[("note", "no token")]).await;
    assert_eq!(code, 403);
    let (_, _, page) = http.get(&server.url(&format!("/alerts/{id}"))).await;
    assert!(shows_caution(&page), "the alert page carries the caution");
    let csrf = hidden_input(&page, "csrf").unwrap();
    let (code, _, _) = http
        .post(&server.url(&format!("/alerts/{id}/acknowledge")), &[("csrf", &csrf), ("note", "x")])
        .await;
    assert_eq!(code, 403, "a viewer may not acknowledge");
}
crate::on_both_engines!(exports_agree_with_the_api);
