//! The browser pages end to end: sign-in, roles, sessions and CSRF over HTTP;
//! the API's access rules for every caller; and a whole visit in headless
//! Chromium (sign in → overview → line page → admin pages → sign out), with
//! screenshots under `tests/artifacts/`.

use std::time::Duration;

use chrono::{SecondsFormat, Utc};
use fantoccini::Locator;
use serde_json::{Value, json};
use serial_test::serial;

use crate::on_both_engines;
use crate::support::{
    Browser, Engine, HttpSession, Server, TestDb, TestLine, add_user, cli, hidden_input,
    register_line, save_screenshot, user_token,
};

fn hours_ago(h: f64) -> String {
    (Utc::now() - chrono::Duration::milliseconds((h * 3_600_000.0) as i64))
        .to_rfc3339_opts(SecondsFormat::Secs, true)
}

/// Every API route that exists now × every kind of caller.
async fn api_access_by_caller(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(12, 1.0, 2);
    let token_a = register_line(&db, "Test reach", "line-a", &tl);
    let token_b = register_line(&db, "Test reach", "line-b", &tl);
    let revoked_line =
        cli(&db, &["token", "issue", "--line", "line-a", "--label", "old"]).trim().to_string();
    let pw = add_user(&db, "viewer@levee.test", "viewer");
    add_user(&db, "engineer@levee.test", "engineer");
    add_user(&db, "admin@levee.test", "admin");
    let viewer = user_token(&db, "viewer@levee.test");
    let engineer = user_token(&db, "engineer@levee.test");
    let admin = user_token(&db, "admin@levee.test");
    let revoked_user = user_token(&db, "viewer@levee.test");
    add_user(&db, "leaver@levee.test", "admin");
    let deleted_user = user_token(&db, "leaver@levee.test");
    cli(&db, &["user", "delete", "--email", "leaver@levee.test"]);
    // Revoke the second line token of line A and the second personal token of the viewer.
    let line_tokens = cli(&db, &["token", "list", "--line", "line-a"]);
    let old_id = line_tokens.lines().find(|l| l.split('\t').nth(1) == Some("old")).unwrap();
    cli(&db, &["token", "revoke", old_id.split('\t').next().unwrap()]);
    let user_tokens = cli(&db, &["user", "tokens", "--email", "viewer@levee.test"]);
    let newest = user_tokens.lines().next().unwrap().split('\t').next().unwrap().to_string();
    let out = cli(&db, &["user", "revoke-token", &newest]);
    assert!(out.contains("revoked"), "{out}");

    let server = Server::start(&db).await;
    let epoch = tl.epoch_csv("2026-05-01T00:00:00Z", 80.0, 0);
    let (s, v) = server.post_epoch("line-a", &token_a, "text/csv", "", epoch.clone()).await;
    assert_eq!(s, 201, "{v}");
    let id = v["epoch_id"].as_i64().unwrap();

    // A viewer's browser session may read the API too (GET only).
    let mut session = HttpSession::new();
    assert_eq!(session.sign_in(&server, "viewer@levee.test", &pw).await, 303);
    let cookie = session.cookie_header();

    #[derive(Clone, Copy)]
    enum Who<'a> {
        Anonymous,
        Bearer(&'a str),
        Cookie(&'a str),
    }
    let callers: Vec<(&str, Who)> = vec![
        ("anonymous", Who::Anonymous),
        ("viewer", Who::Bearer(&viewer)),
        ("engineer", Who::Bearer(&engineer)),
        ("admin", Who::Bearer(&admin)),
        ("line token of this line", Who::Bearer(&token_a)),
        ("line token of another line", Who::Bearer(&token_b)),
        ("revoked line token", Who::Bearer(&revoked_line)),
        ("revoked personal token", Who::Bearer(&revoked_user)),
        ("token of a deleted user", Who::Bearer(&deleted_user)),
        ("viewer session cookie", Who::Cookie(&cookie)),
    ];
    let read = format!("/api/v1/epochs/{id}");
    let readings = format!("/api/v1/epochs/{id}/readings");
    // Expected status per caller, in the order above.
    let table: Vec<(&str, &str, [u16; 10])> = vec![
        ("GET", "/api/v1/lines", [401, 200, 200, 200, 200, 200, 401, 401, 401, 200]),
        ("GET", "/api/v1/lines/line-a/epochs", [401, 200, 200, 200, 200, 403, 401, 401, 401, 200]),
        ("GET", &read, [401, 200, 200, 200, 200, 403, 401, 401, 401, 200]),
        ("GET", &readings, [401, 200, 200, 200, 200, 403, 401, 401, 401, 200]),
        // Re-sending the stored epoch is idempotent (200) for its line's token;
        // users never upload; a cookie never authorises a write.
        ("POST", "/api/v1/lines/line-a/epochs", [401, 403, 403, 403, 200, 403, 401, 401, 401, 401]),
        ("GET", "/api/v1/lines/nowhere/epochs", [401, 404, 404, 404, 404, 404, 401, 401, 401, 404]),
    ];
    let mut failures = Vec::new();
    for (method, path, expected) in &table {
        for ((name, who), want) in callers.iter().zip(expected) {
            let mut req = match *method {
                "GET" => server.client.get(server.url(path)),
                _ => server
                    .client
                    .post(server.url(path))
                    .header("content-type", "text/csv")
                    .body(epoch.clone()),
            };
            req = match who {
                Who::Anonymous => req,
                Who::Bearer(t) => req.bearer_auth(t),
                Who::Cookie(c) => req.header("cookie", *c),
            };
            let r = req.send().await.unwrap();
            let got = r.status().as_u16();
            if got != *want {
                failures.push(format!("{method} {path} as {name}: {got}, expected {want}"));
            }
            if got == 200 && *path == "/api/v1/lines" {
                let v: Value = r.json().await.unwrap();
                let n = v["lines"].as_array().unwrap().len();
                let scoped = name.starts_with("line token");
                assert_eq!(n, if scoped { 1 } else { 2 }, "{name} sees {n} lines");
            }
        }
    }
    assert!(failures.is_empty(), "access rules broken:\n{}", failures.join("\n"));

    // Pages: only sessions open them; tokens do not.
    let r = server.client.get(server.url("/overview")).bearer_auth(&admin);
    let r = r.send().await.unwrap();
    assert!(r.url().path().starts_with("/sign-in"), "a token is no page session: {}", r.url());
    let (s, _, _) = session.get(&server.url("/admin/users")).await;
    assert_eq!(s, 403, "a viewer's session cannot open admin pages");
}
on_both_engines!(api_access_by_caller);

/// Sign-in over plain HTTP: cookie attributes, security headers, CSRF on the
/// sign-in form and on session forms, rate limiting, sign-out, password change.
async fn sessions_csrf_and_limits(engine: Engine) {
    let db = TestDb::new(engine).await;
    let pw = add_user(&db, "duty@levee.test", "engineer");
    let server = Server::start(&db).await;
    let mut s = HttpSession::new();

    let (status, headers, page) = s.get(&server.url("/sign-in")).await;
    assert_eq!(status, 200);
    let csp = headers["content-security-policy"].to_str().unwrap();
    for part in ["default-src 'self'", "script-src 'self'", "frame-ancestors 'none'"] {
        assert!(csp.contains(part), "{csp}");
    }
    assert!(!csp.contains("unsafe-inline"), "{csp}");
    assert_eq!(headers["x-content-type-options"], "nosniff");
    assert_eq!(headers["referrer-policy"], "same-origin");
    assert!(!page.contains("<script>"), "no inline script");
    let (_, h, css) = s.get(&server.url("/static/style.css")).await;
    assert!(h["content-type"].to_str().unwrap().starts_with("text/css") && css.contains(":root"));

    // The sign-in form refuses a POST without its token (login CSRF).
    let (status, _, _) =
        s.post(&server.url("/sign-in"), &[("email", "duty@levee.test"), ("password", &pw)]).await;
    assert_eq!(status, 403);

    // Right password: a session cookie with the security attributes.
    let (_, _, page) = s.get(&server.url("/sign-in")).await;
    let csrf = hidden_input(&page, "csrf").unwrap();
    let (status, headers, _) = s
        .post(
            &server.url("/sign-in"),
            &[
                ("csrf", &csrf),
                ("email", "Duty@Levee.test"),
                ("password", &pw),
                ("next", "/account"),
            ],
        )
        .await;
    assert_eq!(status, 303);
    assert_eq!(headers["location"], "/account", "back to where the user was going");
    let set: Vec<&str> =
        headers.get_all("set-cookie").iter().map(|v| v.to_str().unwrap()).collect();
    let session_cookie = set.iter().find(|c| c.starts_with("ohmline_session=")).unwrap();
    for attr in ["HttpOnly", "SameSite=Lax", "Path=/"] {
        assert!(session_cookie.contains(attr), "{session_cookie}");
    }
    assert!(!session_cookie.contains("Secure"), "plain http without an https public URL");
    let stolen = s.cookie_header();

    // A session form without the token, or with another session's token, is refused.
    let token = s.csrf(&server).await;
    let form = [
        ("current", pw.as_str()),
        ("new", "a new long password"),
        ("confirm", "a new long password"),
    ];
    let (status, _, page) = s.post(&server.url("/account/password"), &form).await;
    assert_eq!(status, 403, "{page}");
    assert!(page.contains("Form refused"));
    let mut with_bad = form.to_vec();
    with_bad.push(("csrf", "0000"));
    assert_eq!(s.post(&server.url("/account/password"), &with_bad).await.0, 403);
    // With the token: changed.
    let mut with_token = form.to_vec();
    with_token.push(("csrf", &token));
    let (status, _, page) = s.post(&server.url("/account/password"), &with_token).await;
    assert_eq!(status, 200, "{page}");
    assert!(page.contains("Password changed"));

    // Sign out: the old cookie no longer opens pages.
    assert_eq!(s.post(&server.url("/sign-out"), &[("csrf", &token)]).await.0, 303);
    let r =
        server.client.get(server.url("/overview")).header("cookie", &stolen).send().await.unwrap();
    assert!(r.url().path().starts_with("/sign-in"), "{}", r.url());

    // Five wrong passwords lock the account for the window, even with the right one.
    let mut attacker = HttpSession::new();
    for i in 0..5 {
        let st = attacker.sign_in(&server, "duty@levee.test", &format!("wrong guess {i}")).await;
        assert_eq!(st, 401, "attempt {i}");
    }
    let st = attacker.sign_in(&server, "duty@levee.test", "a new long password").await;
    assert_eq!(st, 429, "locked");
    // Another account from the same address is not locked yet.
    let pw2 = add_user(&db, "other@levee.test", "viewer");
    assert_eq!(attacker.sign_in(&server, "other@levee.test", &pw2).await, 303);
    drop(server);

    // Only argon2id hashes are stored, never a password.
    let store = db.connect().await;
    let hashes: Vec<String> = match &store {
        ohmline_server::db::Db::Sqlite(p) => {
            sqlx::query_scalar("SELECT password_hash FROM users").fetch_all(p).await.unwrap()
        }
        ohmline_server::db::Db::Postgres(p) => {
            sqlx::query_scalar("SELECT password_hash FROM users").fetch_all(p).await.unwrap()
        }
    };
    assert_eq!(hashes.len(), 2);
    assert!(hashes.iter().all(|h| h.starts_with("$argon2id$v=19$") && !h.contains(&pw)));
    store.close().await;
}
on_both_engines!(sessions_csrf_and_limits);

async fn sign_in_browser(b: &Browser, server: &Server, email: &str, password: &str) {
    let c = &b.client;
    c.goto(&server.url("/sign-in")).await.unwrap();
    c.find(Locator::Id("email")).await.unwrap().send_keys(email).await.unwrap();
    c.find(Locator::Id("password")).await.unwrap().send_keys(password).await.unwrap();
    c.find(Locator::Css("form[action='/sign-in'] button")).await.unwrap().click().await.unwrap();
    // Wait for the answer: another page, or the form again with its error.
    let deadline = std::time::Instant::now() + Duration::from_secs(20);
    while path(b).await == "/sign-in" && c.find(Locator::Id("sign-in-error")).await.is_err() {
        assert!(std::time::Instant::now() < deadline, "no answer to the sign-in");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

/// Waits up to 20 s for the browser to be at `want`.
async fn wait_path(b: &Browser, want: &str) {
    let deadline = std::time::Instant::now() + Duration::from_secs(20);
    loop {
        let p = path(b).await;
        if p == want {
            return;
        }
        assert!(std::time::Instant::now() < deadline, "at {p}, expected {want}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

async fn path(b: &Browser) -> String {
    b.client.current_url().await.unwrap().path().to_string()
}

/// Waits up to 10 s for an element matching `css` whose text contains `needle`.
async fn wait_for_text(b: &Browser, css: &str, needle: &str) -> String {
    let deadline = std::time::Instant::now() + Duration::from_secs(10);
    loop {
        if let Ok(e) = b.client.find(Locator::Css(css)).await
            && let Ok(t) = e.text().await
            && t.contains(needle)
        {
            return t;
        }
        assert!(std::time::Instant::now() < deadline, "no {css} with {needle:?}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

async fn js(b: &Browser, script: &str) -> Value {
    b.client.execute(script, vec![]).await.unwrap()
}

async fn shot(b: &Browser, name: &str) {
    let png = b.client.screenshot().await.unwrap();
    save_screenshot(name, &png);
}

const HOSTILE_SITE: &str = "<script>document.title='owned'</script>North <b>dike</b>";
const HOSTILE_NOTES: &str = "<img src=x onerror=\"document.title='owned'\"> & \"quoted\"";

/// A whole visit in headless Chromium.
async fn browser_visit(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(24, 1.0, 4);
    let token = register_line(&db, "Riverside reach", "crest-a", &tl);
    cli(&db, &["site", "add", HOSTILE_SITE, "--description", "<i>levee</i> & dam"]);
    let e = db.path("x-electrodes.csv");
    std::fs::write(&e, tl.electrodes_csv()).unwrap();
    cli(
        &db,
        &[
            "line",
            "add",
            "--site",
            HOSTILE_SITE,
            "--name",
            "toe-x",
            "--electrodes",
            e.to_str().unwrap(),
            "--notes",
            HOSTILE_NOTES,
            "--interval",
            "2h",
        ],
    );
    let admin_pw = add_user(&db, "admin@levee.test", "admin");
    let viewer_pw = add_user(&db, "viewer@levee.test", "viewer");

    let server = Server::start(&db).await;
    let mut ids = Vec::new();
    for (k, h) in [26.0, 13.0, 7.0, 1.0].iter().enumerate() {
        let (s, v) = server
            .post_epoch("crest-a", &token, "text/csv", "", tl.epoch_csv(&hours_ago(*h), 90.0, k))
            .await;
        assert_eq!(s, 201, "{v}");
        ids.push(v["epoch_id"].as_i64().unwrap());
    }
    // The pages below show processed epochs.
    for id in ids {
        server.wait_status(id, &token, "processed").await;
    }

    let b = Browser::start().await;
    let c = &b.client;
    let tag = match engine {
        Engine::Sqlite => "sqlite",
        Engine::Postgres => "postgres",
    };

    // Not signed in: the overview sends us to the sign-in page.
    c.goto(&server.url("/overview")).await.unwrap();
    assert_eq!(path(&b).await, "/sign-in");
    shot(&b, &format!("{tag}-sign-in")).await;
    // A wrong password shows an error and stays on the form.
    sign_in_browser(&b, &server, "admin@levee.test", "not the password").await;
    let err = c.find(Locator::Id("sign-in-error")).await.unwrap().text().await.unwrap();
    assert!(err.contains("wrong"), "{err}");

    sign_in_browser(&b, &server, "admin@levee.test", &admin_pw).await;
    assert_eq!(path(&b).await, "/overview");
    let nav = c.find(Locator::Css("nav.main-nav")).await.unwrap().text().await.unwrap();
    assert!(nav.contains("Overview") && nav.contains("Admin"), "{nav}");
    let who = c.find(Locator::Css(".who")).await.unwrap().text().await.unwrap();
    assert!(who.contains("admin@levee.test"), "{who}");
    // Line crest-a reported an hour ago: on time, 3 epochs in the last 24 h.
    let row =
        c.find(Locator::XPath("//tr[th/a[text()='crest-a']]")).await.unwrap().text().await.unwrap();
    let row = row.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(row.contains("On time") && row.contains("3 of 4 expected"), "{row}");
    // Its epochs are processed: data quality and alerts are filled in.
    assert!(row.contains("% dropped") && row.contains("none open"), "{row}");
    let row =
        c.find(Locator::XPath("//tr[th/a[text()='toe-x']]")).await.unwrap().text().await.unwrap();
    assert!(row.contains("No epochs yet"), "{row}");
    assert!(row.contains("no processed epochs yet"), "empty slots are marked: {row}");
    // Hostile names are shown as text.
    let headings =
        js(&b, "return [...document.querySelectorAll('h2')].map(h => h.textContent)").await;
    assert!(headings.as_array().unwrap().iter().any(|h| h == HOSTILE_SITE), "{headings}");
    let injected =
        js(&b, "return document.querySelectorAll('main script, main b, main i, main img:not(.spark)').length")
            .await;
    assert_eq!(injected, json!(0));
    assert_eq!(js(&b, "return document.title").await, json!("Overview · ohmline"));
    shot(&b, &format!("{tag}-overview")).await;

    // Line page.
    c.find(Locator::LinkText("crest-a")).await.unwrap().click().await.unwrap();
    wait_path(&b, "/lines/crest-a").await;
    let n_el =
        js(&b, "return document.querySelectorAll('#el-h ~ .table-wrap tbody tr').length").await;
    assert_eq!(n_el, json!(24));
    let epochs =
        js(&b, "return document.querySelectorAll('#epochs-h ~ .table-wrap tbody tr').length").await;
    assert_eq!(epochs, json!(4));
    let seq =
        c.find(Locator::Css("#seq-h ~ .table-wrap tbody")).await.unwrap().text().await.unwrap();
    assert!(seq.contains("v1") && seq.contains(&tl.sequence.len().to_string()), "{seq}");
    shot(&b, &format!("{tag}-line")).await;
    c.goto(&server.url("/lines/toe-x")).await.unwrap();
    let notes = c.find(Locator::Css("dd.notes")).await.unwrap().text().await.unwrap();
    assert_eq!(notes, HOSTILE_NOTES);
    assert_eq!(js(&b, "return document.querySelectorAll('main img').length").await, json!(0));
    assert_eq!(js(&b, "return document.title").await, json!("toe-x · ohmline"));

    // Admin: add a user through the form; the generated password is shown once.
    c.goto(&server.url("/admin/users")).await.unwrap();
    c.find(Locator::Id("new-email"))
        .await
        .unwrap()
        .send_keys("new.engineer@levee.test")
        .await
        .unwrap();
    c.find(Locator::Css("#new-role option[value='engineer']"))
        .await
        .unwrap()
        .click()
        .await
        .unwrap();
    c.find(Locator::Css("#add-user button")).await.unwrap().click().await.unwrap();
    wait_for_text(&b, ".notice", "added as engineer").await;
    let secret = c.find(Locator::Id("new-secret")).await.unwrap().text().await.unwrap();
    assert_eq!(secret.len(), 20, "{secret}");
    let listing = cli(&db, &["user", "list"]);
    assert!(listing.contains("new.engineer@levee.test\tengineer"), "{listing}");
    shot(&b, &format!("{tag}-admin-users")).await;

    // Admin: register a line with an electrodes upload, issue and revoke a token.
    c.goto(&server.url("/admin/lines")).await.unwrap();
    c.find(Locator::Css("#line-site option:nth-child(2)")).await.unwrap().click().await.unwrap();
    c.find(Locator::Id("line-name")).await.unwrap().send_keys("crest-b").await.unwrap();
    c.find(Locator::Id("line-electrodes"))
        .await
        .unwrap()
        .send_keys(e.to_str().unwrap())
        .await
        .unwrap();
    let q = db.path("crest-b-seq.csv");
    std::fs::write(&q, tl.sequence_csv()).unwrap();
    c.find(Locator::Id("line-sequence"))
        .await
        .unwrap()
        .send_keys(q.to_str().unwrap())
        .await
        .unwrap();
    c.find(Locator::Css("#register-line button")).await.unwrap().click().await.unwrap();
    let notice = wait_for_text(&b, ".notice", "registered").await;
    assert!(
        notice.contains("Line crest-b registered") && notice.contains("24 electrodes"),
        "{notice}"
    );
    shot(&b, &format!("{tag}-admin-lines")).await;
    c.find(Locator::LinkText("crest-b")).await.unwrap().click().await.unwrap();
    wait_path(&b, "/admin/lines/crest-b").await;
    c.find(Locator::Id("token-label")).await.unwrap().send_keys("meter 7").await.unwrap();
    c.find(Locator::Css("#issue-token button")).await.unwrap().click().await.unwrap();
    wait_for_text(&b, ".notice", "issued").await;
    let meter_token = c.find(Locator::Id("new-secret")).await.unwrap().text().await.unwrap();
    let (s, _) = server.get_json("/api/v1/lines/crest-b/epochs", &meter_token).await;
    assert_eq!(s, 200, "the issued token works");
    shot(&b, &format!("{tag}-admin-line")).await;
    c.find(Locator::Css("form[action$='/revoke'] button")).await.unwrap().click().await.unwrap();
    c.accept_alert().await.unwrap();
    wait_for_text(&b, ".notice", "revoked").await;
    let (s, _) = server.get_json("/api/v1/lines/crest-b/epochs", &meter_token).await;
    assert_eq!(s, 401, "the revoked token is refused");
    c.goto(&server.url("/admin/audit")).await.unwrap();
    let audit = c.find(Locator::Css("main table")).await.unwrap().text().await.unwrap();
    for action in ["user.add", "line.register", "line_token.issue", "line_token.revoke"] {
        assert!(audit.contains(action), "{action} audited: {audit}");
    }
    assert!(
        !audit.contains(&meter_token) && !audit.contains(&secret),
        "no secrets in the audit trail"
    );
    shot(&b, &format!("{tag}-admin-audit")).await;

    // Survey planning: a 24-electrode line with the default families.
    c.find(Locator::LinkText("Survey planning")).await.unwrap().click().await.unwrap();
    wait_path(&b, "/admin/plan").await;
    let n = c.find(Locator::Id("p-electrodes")).await.unwrap();
    n.clear().await.unwrap();
    n.send_keys("24").await.unwrap();
    c.find(Locator::Css("#plan-form button")).await.unwrap().click().await.unwrap();
    let q = wait_for_text(&b, "#plan-quadrupoles", "quadrupoles").await;
    assert!(q.contains("sequence.csv"), "{q}");
    let loaded = js(&b, "const i = document.getElementById('plan-sensitivity'); return i.complete && i.naturalWidth > 0;").await;
    assert_eq!(loaded, Value::Bool(true), "the sensitivity figure shows");
    shot(&b, &format!("{tag}-admin-plan")).await;

    // A phone-sized overview.
    c.set_window_size(390, 844).await.unwrap();
    c.goto(&server.url("/overview")).await.unwrap();
    shot(&b, &format!("{tag}-overview-phone")).await;
    c.set_window_size(1280, 900).await.unwrap();

    // Sign out.
    c.find(Locator::Css("form[action='/sign-out'] button")).await.unwrap().click().await.unwrap();
    wait_path(&b, "/sign-in").await;
    c.goto(&server.url("/lines/crest-a")).await.unwrap();
    assert_eq!(path(&b).await, "/sign-in", "signed out");

    // A viewer: no admin navigation, admin pages and admin POSTs refused.
    sign_in_browser(&b, &server, "viewer@levee.test", &viewer_pw).await;
    assert_eq!(path(&b).await, "/overview");
    let nav = c.find(Locator::Css("nav.main-nav")).await.unwrap().text().await.unwrap();
    assert!(!nav.contains("Admin"), "{nav}");
    c.goto(&server.url("/admin/users")).await.unwrap();
    let h1 = c.find(Locator::Css("h1")).await.unwrap().text().await.unwrap();
    assert_eq!(h1, "Not allowed");
    shot(&b, &format!("{tag}-refused")).await;
    c.goto(&server.url("/overview")).await.unwrap();
    let status = c
        .execute_async(
            "const done = arguments[arguments.length - 1];
             const csrf = document.querySelector('form[action=\"/sign-out\"] input[name=csrf]').value;
             fetch('/admin/users', {method: 'POST', headers: {'content-type': 'application/x-www-form-urlencoded'},
               body: new URLSearchParams({csrf, email: 'intruder@levee.test', role: 'admin', password: ''})})
             .then(r => done(r.status));",
            vec![],
        )
        .await
        .unwrap();
    assert_eq!(status, json!(403), "a viewer's POST to an admin form is refused");
    assert!(!cli(&db, &["user", "list"]).contains("intruder"));

    // A form whose CSRF token was removed is refused.
    c.goto(&server.url("/account")).await.unwrap();
    js(&b, "document.querySelector('form[action=\"/account/password\"] input[name=csrf]').remove(); return 0").await;
    c.find(Locator::Id("current")).await.unwrap().send_keys(&viewer_pw).await.unwrap();
    c.find(Locator::Id("new")).await.unwrap().send_keys("viewer new password").await.unwrap();
    c.find(Locator::Id("confirm")).await.unwrap().send_keys("viewer new password").await.unwrap();
    c.find(Locator::Css("form[action='/account/password'] button"))
        .await
        .unwrap()
        .click()
        .await
        .unwrap();
    wait_for_text(&b, "h1", "Form refused").await;
    shot(&b, &format!("{tag}-csrf-refused")).await;

    // The account page, then the user is deleted: their session is refused.
    c.goto(&server.url("/account")).await.unwrap();
    shot(&b, &format!("{tag}-account")).await;
    cli(&db, &["user", "delete", "--email", "viewer@levee.test"]);
    c.goto(&server.url("/overview")).await.unwrap();
    assert_eq!(path(&b).await, "/sign-in", "a deleted user's session is refused");
    b.close().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[serial(chromium)]
async fn browser_visit_sqlite() {
    browser_visit(Engine::Sqlite).await
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[serial(chromium)]
async fn browser_visit_postgres() {
    browser_visit(Engine::Postgres).await
}

/// The line page pages through epochs, newest first, 50 at a time.
async fn line_page_pages_epochs(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(8, 1.0, 1);
    let token = register_line(&db, "Test reach", "line-a", &tl);
    let pw = add_user(&db, "viewer@levee.test", "viewer");
    let server = Server::start(&db).await;
    for k in 0..55 {
        let t = format!("2026-04-{:02}T{:02}:00:00Z", 1 + k / 4, (k % 4) * 6);
        let (s, v) =
            server.post_epoch("line-a", &token, "text/csv", "", tl.epoch_csv(&t, 50.0, k)).await;
        assert_eq!(s, 201, "{v}");
    }
    let mut s = HttpSession::new();
    assert_eq!(s.sign_in(&server, "viewer@levee.test", &pw).await, 303);
    let (status, headers, page) = s.get(&server.url("/lines/line-a")).await;
    assert_eq!(status, 200);
    assert_eq!(headers["cache-control"], "no-store");
    assert_eq!(page.matches("<tr id=\"epoch-").count(), 50);
    // Newest first: 55 epochs at 6 h steps from 2026-04-01 00:00; the last is 04-14 12:00.
    let first = page.find("2026-04-14 12:00 UTC").expect("newest epoch shown");
    assert!(first < page.find("2026-04-14 06:00 UTC").unwrap());
    let href = page
        .split("rel=\"next\"")
        .next()
        .and_then(|p| p.rsplit("href=\"").next())
        .map(|h| h.trim_end_matches(['"', ' ']).replace("&amp;", "&").to_string())
        .expect("a link to older epochs");
    assert!(href.starts_with("/lines/line-a?before=2026-04-02T06%3A00%3A00.000Z"), "{href}");
    let (status, _, older) = s.get(&server.url(&href)).await;
    assert_eq!(status, 200);
    assert_eq!(older.matches("<tr id=\"epoch-").count(), 5);
    assert!(!older.contains("rel=\"next\""), "the last page has no older link");
    assert!(older.contains("Newest epochs"));
    let (status, _, _) = s.get(&server.url("/lines/line-a?before=yesterday")).await;
    assert_eq!(status, 400);
    let (status, _, _) = s.get(&server.url("/lines/no-such-line")).await;
    assert_eq!(status, 404);
}
on_both_engines!(line_page_pages_epochs);
