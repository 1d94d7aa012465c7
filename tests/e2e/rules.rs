//! Per-line alert rules and alert recipients edited in the admin pages, end to
//! end on SQLite and PostgreSQL: an admin adds a recipient and changes a
//! line's persistence in the middle of a season; the next processed epoch
//! follows the new rules (the alert comes one epoch later than the default
//! persistence of 3 would raise it, as `processing.rs` shows), and the
//! recipient added on the page gets the alert email from a real SMTP server
//! on loopback. Viewers and engineers are refused (403) on every rules and
//! recipients page and form; a bad rule is refused with its field named and
//! nothing stored.

use std::time::Duration;

use mail_parser::MessageParser;
use ohmline_core::alerts::CAUTION;
use ohmline_core::forward::Forward;
use serde_json::Value;

use crate::on_both_engines;
use crate::support::{
    Engine, HttpSession, Server, SmtpSink, TestDb, TestLine, add_user, block_readings, forward_of,
    hidden_input, readings_csv, register_line, wait_processed,
};

const ADMIN: &str = "admin@levees.example.org";

/// The rules form as a browser sends it: the default rules with `changes`
/// applied (field name → value; an empty value removes the field, like an
/// unticked checkbox).
fn rules_form<'a>(csrf: &'a str, changes: &[(&'a str, &'a str)]) -> Vec<(&'a str, &'a str)> {
    let mut f: Vec<(&str, &str)> = vec![
        ("csrf", csrf),
        ("level1_change", "-10"),
        ("level1_area", "1"),
        ("level1_width", "1"),
        ("level2_change", "-20"),
        ("level2_area", "1"),
        ("level2_width", "1"),
        ("level3_change", "-35"),
        ("level3_area", "1"),
        ("level3_width", "1"),
        ("level4_change", ""),
        ("level4_area", ""),
        ("level4_width", ""),
        ("level5_change", ""),
        ("level5_area", ""),
        ("level5_width", ""),
        ("persistence", "3"),
        ("clear_change", "-5"),
        ("clear_epochs", "3"),
        ("lateral_on", "on"),
        ("band_thickness", "0.5"),
        ("wetting_change", "-10"),
        ("extensive_share", "0.5"),
        ("min_band_cells", "5"),
        ("noise_on", "on"),
        ("noise_k", "3"),
        ("rate_drop", "2"),
        ("rate_window", "3"),
        ("rate_level", "1"),
        ("rise_change", "20"),
        ("rise_clear", "10"),
        ("rise_area", "1"),
        ("rise_width", "1"),
        ("rise_level", "1"),
        ("seasonal_on", "on"),
        ("seasonal_margin", "2"),
        ("silent_hours", "36"),
        ("max_drop_share", "0.3"),
        ("electrode_out", "on"),
        ("quality_clear", "1"),
    ];
    for (k, v) in changes {
        f.retain(|(name, _)| name != k);
        if !v.is_empty() {
            f.push((k, v));
        }
    }
    f
}

fn smtp_config(db: &TestDb, port: u16) -> std::path::PathBuf {
    let path = db.path("smtp.toml");
    let toml = format!(
        "[notify]\nfrom = \"alerts@levees.example.org\"\npoll_interval_s = 0.2\n\
         retry_initial_s = 0.3\nretry_max_s = 1\n\
         [notify.smtp]\nhost = \"127.0.0.1\"\nport = {port}\nsecurity = \"none\"\n"
    );
    std::fs::write(&path, toml).unwrap();
    path
}

/// Uploads epoch `k` of the block season (quiet for k < 3, the block from 3
/// on), 6 h apart from 2026-03-01, and waits until it is processed.
async fn upload(server: &Server, tl: &TestLine, fwd: &Forward, token: &str, k: u64) -> i64 {
    let at = format!("2026-03-0{}T{:02}:00:00Z", 1 + k / 4, (k % 4) * 6);
    let body = readings_csv(tl, &at, &block_readings(tl, fwd, k >= 3, 100 + k));
    let (code, v) = server.post_epoch("crest-t", token, "text/csv", "", body).await;
    assert_eq!(code, 201, "{v}");
    let id = v["epoch_id"].as_i64().unwrap();
    wait_processed(server, &[id], token).await;
    id
}

async fn zone_alerts(server: &Server, token: &str) -> Vec<Value> {
    let (code, list) = server.get_json("/api/v1/alerts?line=crest-t", token).await;
    assert_eq!(code, 200, "{list}");
    list["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|a| a["subject_kind"] == "zone")
        .cloned()
        .collect()
}

async fn rules_apply_from_the_next_epoch(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(32, 1.0, 6);
    let token = register_line(&db, "Test Levee", "crest-t", &tl);
    let password = add_user(&db, ADMIN, "admin");
    let smtp = SmtpSink::start().await;
    let server = Server::start_with(&db, Some(&smtp_config(&db, smtp.port))).await;
    let mut admin = HttpSession::new();
    assert_eq!(admin.sign_in(&server, ADMIN, &password).await, 303);

    // A recipient added on the page, for level 1 and above, every site.
    let (code, _, page) = admin.get(&server.url("/admin/recipients")).await;
    assert_eq!(code, 200);
    assert!(page.contains("No recipients yet"), "{page}");
    let csrf = hidden_input(&page, "csrf").unwrap();
    let (code, _, page) = admin
        .post(
            &server.url("/admin/recipients"),
            &[
                ("csrf", &csrf),
                ("email", "not an address"),
                ("site", ""),
                ("min_level", "1"),
                ("delivery", "event"),
            ],
        )
        .await;
    assert_eq!(code, 400);
    assert!(page.contains("E-mail address: ") && page.contains("not an address"), "{page}");
    let (code, _, page) = admin
        .post(
            &server.url("/admin/recipients"),
            &[
                ("csrf", &csrf),
                ("email", "duty@levees.example.org"),
                ("name", "Duty engineer"),
                ("site", ""),
                ("min_level", "1"),
                ("delivery", "event"),
            ],
        )
        .await;
    assert_eq!(code, 200, "{page}");
    assert!(page.contains("Recipient duty@levees.example.org added"), "{page}");
    assert!(page.contains("level 1 and above"), "{page}");

    // The default rules are shown; the line page links to them.
    let (code, _, page) = admin.get(&server.url("/admin/lines/crest-t")).await;
    assert_eq!(code, 200);
    assert!(page.contains("/admin/lines/crest-t/rules"), "{page}");
    let (code, _, page) = admin.get(&server.url("/admin/lines/crest-t/rules")).await;
    assert_eq!(code, 200);
    assert!(page.contains("This line uses the default rules."), "{page}");
    let (code, v) = server.get_json("/api/v1/lines/crest-t/rules", &token).await;
    assert_eq!(code, 200, "{v}");
    assert_eq!(
        (v["defaults"].as_bool(), v["rules"]["persistence_epochs"].as_i64()),
        (Some(true), Some(3))
    );

    // Three quiet epochs and two with the block under the default rules: no alert yet.
    let fwd = forward_of(&tl);
    for k in 0..5 {
        upload(&server, &tl, &fwd, &token, k).await;
    }
    assert!(zone_alerts(&server, &token).await.is_empty());

    // A bad rule is refused with its field named, and nothing is stored.
    let (code, _, page) = admin
        .post(
            &server.url("/admin/lines/crest-t/rules"),
            &rules_form(&csrf, &[("level2_change", "-8")]),
        )
        .await;
    assert_eq!(code, 400);
    assert!(page.contains("Level 2 change (levels[1].change_pct)"), "{page}");
    let (code, _, page) = admin
        .post(
            &server.url("/admin/lines/crest-t/rules"),
            &rules_form(&csrf, &[("persistence", "0")]),
        )
        .await;
    assert_eq!(code, 400);
    assert!(page.contains("Persistence (persistence_epochs)"), "{page}");
    let (_, v) = server.get_json("/api/v1/lines/crest-t/rules", &token).await;
    assert_eq!(v["defaults"], true, "{v}");

    // The admin asks for 4 consecutive epochs.
    let (code, _, page) = admin
        .post(
            &server.url("/admin/lines/crest-t/rules"),
            &rules_form(&csrf, &[("persistence", "4")]),
        )
        .await;
    assert_eq!(code, 200, "{page}");
    assert!(page.contains("stored as version 1"), "{page}");
    assert!(page.contains(&format!("Version 1, changed by {ADMIN}")), "{page}");
    let (_, v) = server.get_json("/api/v1/lines/crest-t/rules", &token).await;
    assert_eq!(v["defaults"], false, "{v}");
    assert_eq!(v["version"], 1);
    assert_eq!(v["updated_by"], ADMIN);
    assert_eq!(v["rules"]["persistence_epochs"], 4);
    assert_eq!(v["rules"]["levels"].as_array().unwrap().len(), 3);

    // The block's third epoch would raise under persistence 3; now it does not.
    upload(&server, &tl, &fwd, &token, 5).await;
    assert!(zone_alerts(&server, &token).await.is_empty(), "raised with persistence 3");
    // The fourth raises, held for 4 epochs.
    upload(&server, &tl, &fwd, &token, 6).await;
    let alerts = zone_alerts(&server, &token).await;
    assert_eq!(alerts.len(), 1, "{alerts:?}");
    let id = alerts[0]["id"].as_i64().unwrap();
    let (code, a) = server.get_json(&format!("/api/v1/alerts/{id}"), &token).await;
    assert_eq!(code, 200, "{a}");
    let first = &a["transitions"].as_array().unwrap()[0];
    assert_eq!(first["to_state"], "raised");
    assert_eq!(first["reason"], "held for 4 consecutive epochs", "{a}");

    // The recipient added on the page gets the alert email.
    let got = smtp.wait_for(1, Duration::from_secs(30)).await;
    let mail = got
        .iter()
        .find(|m| m.to.iter().any(|t| t.contains("duty@levees.example.org")))
        .unwrap_or_else(|| panic!("no email to the new recipient: {got:?}"));
    let m = MessageParser::default().parse(&mail.data).expect("a MIME message");
    assert!(m.subject().unwrap_or("").contains("crest-t"), "{:?}", m.subject());
    assert!(m.body_text(0).is_some_and(|t| t.contains(CAUTION)), "the caution");

    // Both changes are in the audit trail; the recipient can be removed.
    let (_, _, page) = admin.get(&server.url("/admin/audit")).await;
    assert!(page.contains("line.rules") && page.contains("recipient.add"), "{page}");
    let conn = db.connect().await;
    let r = ohmline_server::db::recipients::list(&conn).await.unwrap();
    assert_eq!(r.len(), 1);
    let (code, _, page) = admin
        .post(&server.url(&format!("/admin/recipients/{}/remove", r[0].id)), &[("csrf", &csrf)])
        .await;
    assert_eq!(code, 200, "{page}");
    assert!(page.contains("No recipients yet"), "{page}");
    assert!(ohmline_server::db::recipients::list(&conn).await.unwrap().is_empty());
    conn.close().await;
    server.kill();
}
on_both_engines!(rules_apply_from_the_next_epoch);

async fn only_admins_edit_rules_and_recipients(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(8, 1.0, 2);
    let token = register_line(&db, "Test Levee", "crest-t", &tl);
    let admin_pw = add_user(&db, ADMIN, "admin");
    let viewer_pw = add_user(&db, "view@levees.example.org", "viewer");
    let engineer_pw = add_user(&db, "eng@levees.example.org", "engineer");
    let server = Server::start(&db).await;
    let conn = db.connect().await;

    for (email, pw) in
        [("view@levees.example.org", &viewer_pw), ("eng@levees.example.org", &engineer_pw)]
    {
        let mut s = HttpSession::new();
        assert_eq!(s.sign_in(&server, email, pw).await, 303);
        let csrf = s.csrf(&server).await;
        for path in ["/admin/rules", "/admin/lines/crest-t/rules", "/admin/recipients"] {
            let (code, _, _) = s.get(&server.url(path)).await;
            assert_eq!(code, 403, "{email} GET {path}");
        }
        let (code, _, _) = s
            .post(
                &server.url("/admin/lines/crest-t/rules"),
                &rules_form(&csrf, &[("persistence", "1")]),
            )
            .await;
        assert_eq!(code, 403, "{email} POST rules");
        let (code, _, _) = s
            .post(
                &server.url("/admin/recipients"),
                &[("csrf", &csrf), ("email", "x@levees.example.org"), ("min_level", "0")],
            )
            .await;
        assert_eq!(code, 403, "{email} POST recipient");
        let (code, _, _) =
            s.post(&server.url("/admin/recipients/1/remove"), &[("csrf", &csrf)]).await;
        assert_eq!(code, 403, "{email} POST remove");
    }
    assert!(ohmline_server::db::recipients::list(&conn).await.unwrap().is_empty());
    let (_, v) = server.get_json("/api/v1/lines/crest-t/rules", &token).await;
    assert_eq!(v["defaults"], true, "{v}");

    // An admin without the form's CSRF token is refused too.
    let mut s = HttpSession::new();
    assert_eq!(s.sign_in(&server, ADMIN, &admin_pw).await, 303);
    let (code, _, _) =
        s.post(&server.url("/admin/lines/crest-t/rules"), &rules_form("", &[("csrf", "")])).await;
    assert_eq!(code, 403);
    let (code, _, _) =
        s.post(&server.url("/admin/recipients"), &[("email", "x@levees.example.org")]).await;
    assert_eq!(code, 403);
    assert!(ohmline_server::db::recipients::list(&conn).await.unwrap().is_empty());
    let (_, v) = server.get_json("/api/v1/lines/crest-t/rules", &token).await;
    assert_eq!(v["defaults"], true, "{v}");
    // The admin sees every line on the rules index.
    let (code, _, page) = s.get(&server.url("/admin/rules")).await;
    assert_eq!(code, 200);
    assert!(page.contains("/admin/lines/crest-t/rules") && page.contains("defaults"), "{page}");
    conn.close().await;
    server.kill();
}
on_both_engines!(only_admins_edit_rules_and_recipients);

/// The noise-calibrated level uses the baseline epochs: with a baseline of
/// five quiet epochs chosen by hand, σ per cell is measured and cached for
/// the baseline; with k = 1000 (no change can exceed 1000 σ with σ ≥ 0.5 %)
/// the block's zone is found but never qualifies, and with k = 3 set on the
/// page it raises after the persistence epochs. Without the noise model the
/// monitor would judge fixed thresholds only and raise in both cases.
async fn noise_calibrated_level_from_the_baseline_epochs(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(32, 1.0, 6);
    let token = register_line(&db, "Test Levee", "crest-t", &tl);
    let password = add_user(&db, ADMIN, "admin");
    let server = Server::start(&db).await;
    let conn = db.connect().await;
    let line = ohmline_server::db::lines::by_name(&conn, "crest-t").await.unwrap().unwrap();
    let fwd = forward_of(&tl);

    // Five quiet epochs, then the baseline chosen over all of them.
    let quiet = |k: u64| k < 5;
    let upload_at = async |k: u64| {
        let at = format!("2026-03-0{}T{:02}:00:00Z", 1 + k / 4, (k % 4) * 6);
        let body = readings_csv(&tl, &at, &block_readings(&tl, &fwd, !quiet(k), 100 + k));
        let (code, v) = server.post_epoch("crest-t", &token, "text/csv", "", body).await;
        assert_eq!(code, 201, "{v}");
        let id = v["epoch_id"].as_i64().unwrap();
        wait_processed(&server, &[id], &token).await;
        id
    };
    let mut ids = Vec::new();
    for k in 0..5 {
        ids.push(upload_at(k).await);
    }
    let out = crate::support::cli(
        &db,
        &[
            "baseline",
            "set",
            "--line",
            "crest-t",
            "--from",
            "2026-03-01T00:00:00Z",
            "--to",
            "2026-03-02T00:00:00Z",
            "--no-wait",
        ],
    );
    assert!(out.contains("5 epochs"), "{out}");
    wait_processed(&server, &ids, &token).await;
    let baseline =
        ohmline_server::db::models::active_baseline(&conn, line.id).await.unwrap().unwrap();
    let noise = ohmline_server::db::rules::noise(&conn, line.id, baseline.id)
        .await
        .unwrap()
        .expect("the noise calibration is cached for the baseline");
    assert_eq!(noise.epoch_ids, ids);
    let measured: Vec<f64> = noise.sigma.iter().flatten().copied().collect();
    assert!(measured.len() > 50, "{} cells with σ", measured.len());
    // σ is floored at 0.5 % (NoiseParams default) and, for 1 % data noise,
    // stays a few percent at most (from the test's own noise level).
    assert!(measured.iter().all(|s| (0.5..10.0).contains(s)), "{measured:?}");

    // k = 1000: three epochs of the block, a zone each time, no level, no alert.
    let mut admin = HttpSession::new();
    assert_eq!(admin.sign_in(&server, ADMIN, &password).await, 303);
    let csrf = admin.csrf(&server).await;
    let (code, _, page) = admin
        .post(&server.url("/admin/lines/crest-t/rules"), &rules_form(&csrf, &[("noise_k", "1000")]))
        .await;
    assert_eq!(code, 200, "{page}");
    assert!(page.contains("σ measured over 5 of the baseline"), "{page}");
    for k in 5..8 {
        let id = upload_at(k).await;
        let zones = ohmline_server::db::alerts::epoch_zones(&conn, id).await.unwrap();
        let block = zones
            .iter()
            .find(|z| z.direction == "drop" && z.x_min < 16.0 && z.x_max > 14.0)
            .unwrap_or_else(|| panic!("no zone at the block in epoch {k}: {zones:?}"));
        assert_eq!(block.level, None, "{block:?}");
    }
    assert!(zone_alerts(&server, &token).await.is_empty());

    // k = 3: the zone qualifies and raises after three epochs.
    let (code, _, _) =
        admin.post(&server.url("/admin/lines/crest-t/rules"), &rules_form(&csrf, &[])).await;
    assert_eq!(code, 200);
    for k in 8..10 {
        upload_at(k).await;
        assert!(zone_alerts(&server, &token).await.is_empty(), "epoch {k}");
    }
    upload_at(10).await;
    let alerts = zone_alerts(&server, &token).await;
    assert_eq!(alerts.len(), 1, "{alerts:?}");
    conn.close().await;
    server.kill();
}
on_both_engines!(noise_calibrated_level_from_the_baseline_epochs);

/// The rules and recipients pages in headless Chromium: an admin follows the
/// admin navigation to a line's rules, turns the noise-calibrated level off
/// and sets persistence 2, then adds a recipient; screenshots of both pages
/// under `tests/artifacts/`.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[serial_test::serial(chromium)]
async fn rules_and_recipients_pages_in_chromium() {
    use fantoccini::Locator;
    let db = TestDb::new(Engine::Sqlite).await;
    let tl = TestLine::new(8, 1.0, 2);
    let token = register_line(&db, "Test Levee", "crest-t", &tl);
    let password = add_user(&db, ADMIN, "admin");
    let server = Server::start(&db).await;
    let b = crate::support::Browser::start().await;
    let c = &b.client;
    let wait_text = async |css: &str, needle: &str| {
        let deadline = std::time::Instant::now() + Duration::from_secs(20);
        loop {
            if let Ok(e) = c.find(Locator::Css(css)).await
                && let Ok(t) = e.text().await
                && t.contains(needle)
            {
                return t;
            }
            assert!(std::time::Instant::now() < deadline, "no {css} with {needle:?}");
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
    };

    c.goto(&server.url("/sign-in")).await.unwrap();
    c.find(Locator::Id("email")).await.unwrap().send_keys(ADMIN).await.unwrap();
    c.find(Locator::Id("password")).await.unwrap().send_keys(&password).await.unwrap();
    c.find(Locator::Css("form[action='/sign-in'] button")).await.unwrap().click().await.unwrap();
    wait_text("nav.main-nav", "Admin").await;
    c.goto(&server.url("/admin/users")).await.unwrap();
    c.find(Locator::LinkText("Alert rules")).await.unwrap().click().await.unwrap();
    wait_text("h1", "Alert rules").await;
    c.find(Locator::LinkText("crest-t")).await.unwrap().click().await.unwrap();
    wait_text("h1", "Alert rules of crest-t").await;
    let noise = c.find(Locator::Css("input[name='noise_on']")).await.unwrap();
    assert!(noise.prop("checked").await.unwrap().is_some_and(|v| v == "true"));
    noise.click().await.unwrap();
    let p = c.find(Locator::Id("persistence")).await.unwrap();
    p.clear().await.unwrap();
    p.send_keys("2").await.unwrap();
    c.find(Locator::Css("#rules-form button[type='submit']:not([name])"))
        .await
        .unwrap()
        .click()
        .await
        .unwrap();
    wait_text("p.notice", "stored as version 1").await;
    crate::support::save_screenshot("admin-rules", &c.screenshot().await.unwrap());
    let (_, v) = server.get_json("/api/v1/lines/crest-t/rules", &token).await;
    assert_eq!(v["rules"]["persistence_epochs"], 2, "{v}");
    assert_eq!(v["rules"]["noise"], Value::Null, "{v}");
    assert_eq!(v["updated_by"], ADMIN);

    c.find(Locator::LinkText("Alert recipients")).await.unwrap().click().await.unwrap();
    wait_text("h1", "Alert recipients").await;
    c.find(Locator::Id("rcp-email"))
        .await
        .unwrap()
        .send_keys("duty@levees.example.org")
        .await
        .unwrap();
    c.find(Locator::Css("#rcp-level option[value='2']")).await.unwrap().click().await.unwrap();
    c.find(Locator::Css("#rcp-delivery option[value='digest']"))
        .await
        .unwrap()
        .click()
        .await
        .unwrap();
    c.find(Locator::Css("#add-recipient button")).await.unwrap().click().await.unwrap();
    let row = wait_text("#recipients tbody", "duty@levees.example.org").await;
    assert!(row.contains("level 2 and above") && row.contains("daily digest only"), "{row}");
    crate::support::save_screenshot("admin-recipients", &c.screenshot().await.unwrap());
    b.close().await;
    server.kill();
}
