//! Security over HTTP: the security headers of every kind of response (HSTS
//! only behind TLS); hostile strings (SQL injection, HTML and script, path
//! traversal) in every text field a user or meter can set stay inert — pages
//! escape them, SQL stores them as text, no file lands outside the data
//! folder; and passwords, tokens and session secrets never reach the log.

use std::path::{Path, PathBuf};

use serde_json::{Value, json};

use crate::on_both_engines;
use crate::support::{
    Engine, HttpSession, Server, TestDb, TestLine, add_user, cli, hidden_input, multipart_body,
    register_line, upload_block_season, user_token, wait_processed,
};

fn write_config(db: &TestDb, toml: &str) -> PathBuf {
    let path = db.path("ohmline.toml");
    std::fs::write(&path, toml).unwrap();
    path
}

/// Every response, page or not, carries the CSP, nosniff, the referrer
/// policy and the framing refusal; HSTS only when the public URL is https.
async fn security_headers_on_every_response(engine: Engine) {
    let db = TestDb::new(engine).await;
    let pw = add_user(&db, "admin@levee.test", "admin");
    let tls = write_config(&db, "[web]\npublic_url = \"https://levees.example.test\"\n");
    for (config, hsts) in [(None, None), (Some(tls.as_path()), Some("max-age=31536000"))] {
        let server = Server::start_with(&db, config).await;
        let mut s = HttpSession::new();
        assert_eq!(s.sign_in(&server, "admin@levee.test", &pw).await, 303);
        for path in [
            "/sign-in",
            "/overview",
            "/admin/users",
            "/lines/nowhere",
            "/static/app.js",
            "/static/style.css",
            "/api/v1/lines",
            "/api/v1/epochs/999",
            "/healthz",
            "/no-such-page",
        ] {
            let (status, h, body) = s.get(&server.url(path)).await;
            let csp = h["content-security-policy"].to_str().unwrap();
            for part in [
                "default-src 'self'",
                "script-src 'self'",
                "style-src 'self'",
                "frame-ancestors 'none'",
                "object-src 'none'",
            ] {
                assert!(csp.contains(part), "{path}: {csp}");
            }
            assert!(!csp.contains("unsafe"), "{path}: {csp}");
            assert_eq!(h["x-content-type-options"], "nosniff", "{path}");
            assert_eq!(h["referrer-policy"], "same-origin", "{path}");
            assert_eq!(h["x-frame-options"], "DENY", "{path}");
            assert_eq!(
                h.get("strict-transport-security").map(|v| v.to_str().unwrap()),
                hsts,
                "{path}"
            );
            let html =
                h.get("content-type").is_some_and(|v| v.to_str().unwrap().starts_with("text/html"));
            if html {
                assert!(
                    !body.contains("<script>") && !body.contains(" style="),
                    "{path} ({status})"
                );
            }
        }
        drop(server);
    }
}
on_both_engines!(security_headers_on_every_response);

const SCRIPT: &str = "<script>alert(1)</script>";
/// An element with an event handler: inert only if escaped.
const IMG: &str = "<img src=x onerror=alert(2)>";
const SQL: &str = "x'); DROP TABLE users; --";

/// Text of HTML with its character references resolved (named ones for
/// markup characters, decimal and hexadecimal ones).
fn unescape(html: &str) -> String {
    let mut out = String::with_capacity(html.len());
    let mut rest = html;
    while let Some(i) = rest.find('&') {
        out.push_str(&rest[..i]);
        rest = &rest[i..];
        let end = rest.find(';').filter(|&e| e <= 10);
        let decoded = end.and_then(|e| {
            let name = &rest[1..e];
            let c = match name {
                "lt" => Some('<'),
                "gt" => Some('>'),
                "amp" => Some('&'),
                "quot" => Some('"'),
                "apos" => Some('\''),
                _ => match name.strip_prefix("#x").or_else(|| name.strip_prefix("#X")) {
                    Some(hex) => u32::from_str_radix(hex, 16).ok().and_then(char::from_u32),
                    None => {
                        name.strip_prefix('#').and_then(|d| d.parse().ok()).and_then(char::from_u32)
                    }
                },
            };
            c.map(|c| (c, e))
        });
        match decoded {
            Some((c, e)) => {
                out.push(c);
                rest = &rest[e + 1..];
            }
            None => {
                out.push('&');
                rest = &rest[1..];
            }
        }
    }
    out.push_str(rest);
    out
}

/// Files anywhere under `dir` whose name contains `needle`.
fn files_named(dir: &Path, needle: &str, out: &mut Vec<PathBuf>) {
    let Ok(entries) = std::fs::read_dir(dir) else { return };
    for e in entries.flatten() {
        let p = e.path();
        if p.file_name().is_some_and(|n| n.to_string_lossy().contains(needle)) {
            out.push(p.clone());
        }
        if e.file_type().is_ok_and(|t| t.is_dir()) {
            files_named(&p, needle, out);
        }
    }
}

/// Hostile strings in every text field people and meters set: site names and
/// descriptions, line names and notes, electrode labels, file names of
/// uploads, sequence names, token labels, user e-mails, meter ids in CSV
/// uploads, alert notes, the sign-in form. Pages show them escaped, the API
/// returns them byte for byte, the tables survive, and no file is written
/// outside the data folder.
async fn hostile_strings_stay_inert(engine: Engine) {
    let db = TestDb::new(engine).await;
    let escape = format!("ohmline-escape-{:08x}", rand::random::<u32>());
    // A file name that climbs out of every folder (both separators) and ends
    // in markup.
    let traversal = format!("../../../../../../tmp/{escape}/..\\{IMG}.csv");
    let hostile = format!("{SCRIPT} {SQL}");

    let tl = TestLine::new(32, 1.0, 6);
    let token = register_line(&db, "Plain reach", "crest-t", &tl);
    cli(&db, &["site", "add", &hostile, "--description", &hostile]);
    let pw = add_user(&db, "admin@levee.test", "admin");
    let eng_pw = add_user(&db, "eng@levee.test", "engineer");
    let server = Server::start(&db).await;
    let mut admin = HttpSession::new();
    assert_eq!(admin.sign_in(&server, "admin@levee.test", &pw).await, 303);
    let csrf = admin.csrf(&server).await;
    let post = async |s: &mut HttpSession, path: &str, form: &[(&str, &str)]| {
        let mut f = form.to_vec();
        f.push(("csrf", &csrf));
        s.post(&server.url(path), &f).await
    };

    // Sites: another one through the page.
    let second = format!("{SQL} {SCRIPT} 2");
    let (st, _, page) =
        post(&mut admin, "/admin/sites", &[("name", &second), ("description", &hostile)]).await;
    assert_eq!(st, 200, "{page}");
    let sites = cli(&db, &["site", "list"]);
    let site_id = sites.lines().find(|l| l.split('\t').nth(1) == Some(hostile.as_str())).unwrap();
    let site_id = site_id.split('\t').next().unwrap().to_string();

    // Lines: a hostile name is refused; notes, electrode labels and file names are kept as text.
    let electrodes = (0..12)
        .map(|i| format!("E{i}{SCRIPT},{i},10"))
        .fold(String::from("label,x,z\n"), |s, l| s + &l + "\n");
    let register = |name: &str| {
        multipart_body(
            &[
                ("name", name.to_string()),
                ("site", site_id.clone()),
                ("orientation", "longitudinal".into()),
                ("interval", "6h".into()),
                ("notes", hostile.clone()),
                ("csrf", csrf.clone()),
            ],
            &[("electrodes", traversal.as_str(), electrodes.clone())],
        )
    };
    let mut pages = Vec::new();
    for (name, want) in [(hostile.as_str(), 400), ("../../etc", 400), ("hostile-line", 200)] {
        let (ct, body) = register(name);
        let r = admin
            .client
            .post(server.url("/admin/lines"))
            .header("cookie", admin.cookie_header())
            .header("content-type", ct)
            .body(body)
            .send()
            .await
            .unwrap();
        assert_eq!(r.status().as_u16(), want, "line named {name:?}");
        pages.push((format!("register {name:?}"), r.text().await.unwrap()));
    }
    // A sequence whose file name climbs out of every folder and whose name is hostile.
    let (ct, body) = multipart_body(
        &[("name", String::new()), ("csrf", csrf.clone())],
        &[("sequence", traversal.as_str(), tl.sequence_csv())],
    );
    let r = admin
        .client
        .post(server.url("/admin/lines/crest-t/sequences"))
        .header("cookie", admin.cookie_header())
        .header("content-type", ct)
        .body(body)
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    let (st, _, page) = post(
        &mut admin,
        "/admin/lines/crest-t/sequences",
        &[("name", "plain")], // not multipart: refused, nothing stored
    )
    .await;
    assert_eq!(st, 403, "{page}");

    // Token labels and user e-mails (an address may hold '<', '>', quotes and ').
    let (st, _, page) =
        post(&mut admin, "/admin/lines/crest-t/tokens", &[("label", &hostile)]).await;
    assert_eq!(st, 200, "{page}");
    let evil_email = "<script>alert(1)</script>x'--@evil.example";
    assert!(!evil_email.contains(char::is_whitespace));
    let (st, _, page) = post(
        &mut admin,
        "/admin/users",
        &[("email", evil_email), ("role", "viewer"), ("password", "")],
    )
    .await;
    assert_eq!(st, 200, "{page}");
    let (st, _, page) = post(
        &mut admin,
        "/admin/users",
        &[("email", SCRIPT), ("role", "viewer"), ("password", "")],
    )
    .await;
    assert_eq!(st, 400, "not an address: {page}");
    pages.push(("refused user".into(), page));

    // A meter's CSV: the meter id header and an unknown electrode label.
    let mut season_ids = upload_block_season(&server, &tl, "crest-t", &token).await;
    let epoch = tl
        .epoch_csv("2026-03-03T00:00:00Z", 80.0, 9)
        .replace("# meter_id: test-meter", &format!("# meter_id: {hostile}"));
    let (st, v) = server.post_epoch("crest-t", &token, "text/csv", "", epoch).await;
    assert_eq!(st, 201, "{v}");
    season_ids.push(v["epoch_id"].as_i64().unwrap());
    let bad = format!(
        "# started_at: 2026-03-04T00:00:00Z\na,b,m,n,resistance_ohm\n{SCRIPT},E4,E2,E3,1\n"
    );
    let (st, v) = server.post_epoch("crest-t", &token, "text/csv", "", bad).await;
    assert_eq!(st, 422, "{v}");
    assert!(v["error"]["message"].as_str().unwrap().contains(SCRIPT), "the API names it: {v}");
    wait_processed(&server, &season_ids, &token).await;

    // Alert notes from an engineer.
    let (_, alerts) = server.get_json("/api/v1/alerts?line=crest-t", &token).await;
    let alert = alerts["alerts"][0]["id"].as_i64().expect("an alert");
    let mut eng = HttpSession::new();
    assert_eq!(eng.sign_in(&server, "eng@levee.test", &eng_pw).await, 303);
    let eng_csrf = eng.csrf(&server).await;
    let (st, _, page) = eng
        .post(
            &server.url(&format!("/alerts/{alert}/acknowledge")),
            &[("note", hostile.as_str()), ("csrf", &eng_csrf)],
        )
        .await;
    assert_eq!(st, 303, "{page}");

    // The sign-in form echoes the address typed.
    let mut stranger = HttpSession::new();
    let (_, _, form) = stranger.get(&server.url("/sign-in")).await;
    let token_field = hidden_input(&form, "csrf").unwrap();
    let (st, _, page) = stranger
        .post(
            &server.url("/sign-in"),
            &[
                ("csrf", &token_field),
                ("email", &hostile),
                ("password", SQL),
                ("next", "//evil.example/"),
            ],
        )
        .await;
    assert_eq!(st, 401);
    pages.push(("failed sign-in".into(), page));

    // Every page that shows these fields.
    for path in [
        "/overview".to_string(),
        "/lines/crest-t".into(),
        format!("/lines/crest-t?epoch={}", season_ids.last().unwrap()),
        "/lines/hostile-line".into(),
        "/lines/crest-t/quality".into(),
        "/alerts".into(),
        format!("/alerts/{alert}"),
        "/admin/users".into(),
        "/admin/lines".into(),
        "/admin/lines/crest-t".into(),
        "/admin/lines/hostile-line".into(),
        "/admin/audit".into(),
    ] {
        let (st, _, page) = admin.get(&server.url(&path)).await;
        assert_eq!(st, 200, "{path}");
        pages.push((path, page));
    }
    let mut shown = 0;
    for (what, page) in &pages {
        assert!(!page.contains("<script>"), "{what}: a script tag in the page");
        assert!(!page.contains("<img src=x"), "{what}: an injected element in the page");
        assert!(!page.contains("//evil.example"), "{what}: a foreign next address");
        shown += unescape(page).matches(SCRIPT).count();
    }
    assert!(shown >= 12, "the hostile strings are shown escaped ({shown} times)");
    let all: String = pages.iter().map(|(_, p)| unescape(p)).collect();
    for (field, expected) in [
        ("site name", hostile.as_str()),
        ("second site", second.as_str()),
        ("electrode label", "E3<script>alert(1)</script>"),
        ("sequence named after the file", IMG),
        ("user e-mail", evil_email),
    ] {
        assert!(all.contains(expected), "{field} shown (escaped) as {expected:?}");
    }

    // The API returns the text byte for byte; the SQL was data.
    let admin_token = user_token(&db, "admin@levee.test");
    let (_, lines) = server.get_json("/api/v1/lines", &admin_token).await;
    let hostile_line =
        lines["lines"].as_array().unwrap().iter().find(|l| l["name"] == "hostile-line").unwrap();
    assert_eq!(hostile_line["site"], json!(hostile), "{hostile_line}");
    let (_, a) = server.get_json(&format!("/api/v1/alerts/{alert}"), &admin_token).await;
    let notes: Vec<&Value> =
        a["transitions"].as_array().unwrap().iter().map(|t| &t["note"]).collect();
    assert!(notes.contains(&&json!(hostile)), "{a}");
    let (_, epochs) = server.get_json("/api/v1/lines/crest-t/epochs", &admin_token).await;
    assert!(epochs["epochs"].as_array().unwrap().iter().any(|e| e["meter_id"] == json!(hostile)));
    let users = cli(&db, &["user", "list"]);
    assert!(users.contains("admin@levee.test") && users.contains(evil_email), "{users}");
    assert!(cli(&db, &["site", "list"]).contains(&second));

    // Path traversal in addresses finds nothing outside the routes.
    for path in [
        "/static/..%2F..%2FCargo.toml",
        "/static/%2e%2e/%2e%2e/etc/passwd",
        "/lines/crest-t/export/..%2F..%2F..%2Fetc%2Fpasswd",
        "/lines/..%2F..%2Fetc/quality",
        "/lines/crest-t/quality/..%2Fdropped.svg",
    ] {
        let (st, _, body) = admin.get(&server.url(path)).await;
        assert!(st == 404 || st == 400, "{path}: {st}");
        assert!(!body.contains("root:") && !body.contains("[workspace]"), "{path}");
    }

    // No file was written outside the data folder, nor named after an upload.
    drop(server);
    assert!(!Path::new("/tmp").join(&escape).exists());
    let mut found = Vec::new();
    for dir in [std::env::temp_dir(), db.dir.path().to_path_buf(), std::env::current_dir().unwrap()]
    {
        files_named(&dir, &escape, &mut found);
        files_named(&dir, "pwned", &mut found);
    }
    assert!(found.is_empty(), "files named after hostile input: {found:?}");
}
on_both_engines!(hostile_strings_stay_inert);

/// Passwords, tokens, session cookies and CSRF tokens never appear in the
/// server's log (JSON, every level) nor on the CLI's standard error.
async fn secrets_never_logged(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(12, 1.0, 2);
    let meter = register_line(&db, "Test reach", "crest-t", &tl);
    let pw = add_user(&db, "admin@levee.test", "admin");
    let personal = user_token(&db, "admin@levee.test");
    // The CLI's own log (trace level) while it issues a token.
    let out = std::process::Command::new(crate::support::BIN)
        .args(["token", "issue", "--line", "crest-t", "--label", "spare"])
        .env("OHMLINE_DATABASE", &db.url)
        .env("OHMLINE_DATA_DIR", db.dir.path())
        .env("RUST_LOG", "trace")
        .output()
        .unwrap();
    assert!(out.status.success());
    let cli_token = String::from_utf8(out.stdout).unwrap().trim().to_string();
    let cli_log = String::from_utf8(out.stderr).unwrap();
    assert!(cli_token.starts_with("ohl_"));

    let server =
        Server::start_with_env(&db, None, &[("RUST_LOG", "trace"), ("OHMLINE_LOG_FORMAT", "json")])
            .await;
    let mut s = HttpSession::new();
    // A failed sign-in, a successful one, a password change.
    assert_eq!(s.sign_in(&server, "admin@levee.test", "wrong password 123").await, 401);
    assert_eq!(s.sign_in(&server, "admin@levee.test", &pw).await, 303);
    let session = s.cookies["ohmline_session"].clone();
    let csrf = s.csrf(&server).await;
    let new_pw = "a brand new passphrase 42";
    let (st, _, _) = s
        .post(
            &server.url("/account/password"),
            &[("current", pw.as_str()), ("new", new_pw), ("confirm", new_pw), ("csrf", &csrf)],
        )
        .await;
    assert_eq!(st, 200);
    // A token issued on the page (shown once), and every kind of token used.
    let (st, _, page) = s
        .post(&server.url("/admin/lines/crest-t/tokens"), &[("label", "logger"), ("csrf", &csrf)])
        .await;
    assert_eq!(st, 200);
    let start = page.find("id=\"new-secret\">").expect("the new token is shown") + 16;
    let page_token = page[start..start + 68].to_string();
    assert!(page_token.starts_with("ohl_"), "{page_token}");
    let epoch = tl.epoch_csv("2026-05-01T00:00:00Z", 80.0, 0);
    for t in [&meter, &cli_token, &page_token] {
        let (st, v) = server.post_epoch("crest-t", t, "text/csv", "", epoch.clone()).await;
        assert!(st == 201 || st == 200, "{v}");
    }
    assert_eq!(server.get_json("/api/v1/lines", &personal).await.0, 200);
    assert_eq!(server.get_json("/api/v1/lines", "ohl_not_a_real_token").await.0, 401);
    // A user added on the page with a chosen password.
    let chosen = "chosen by the admin 77";
    let (st, _, _) = s
        .post(
            &server.url("/admin/users"),
            &[
                ("email", "new@levee.test"),
                ("role", "viewer"),
                ("password", chosen),
                ("csrf", &csrf),
            ],
        )
        .await;
    assert_eq!(st, 200);
    let (st, _, _) = s.post(&server.url("/sign-out"), &[("csrf", &csrf)]).await;
    assert_eq!(st, 303);
    drop(server);

    let log = std::fs::read_to_string(db.path("server.log")).unwrap();
    assert!(log.lines().count() > 20, "the trace log is written:\n{log}");
    assert!(log.lines().all(|l| l.starts_with('{')), "JSON lines");
    assert!(log.contains("signed in") && log.contains("sign-in failed"), "events are logged");
    for (what, secret) in [
        ("password", pw.as_str()),
        ("wrong password", "wrong password 123"),
        ("new password", new_pw),
        ("chosen password", chosen),
        ("meter token", meter.as_str()),
        ("CLI token", cli_token.as_str()),
        ("page token", page_token.as_str()),
        ("personal token", personal.as_str()),
        ("session cookie", session.as_str()),
        ("CSRF token", csrf.as_str()),
    ] {
        assert!(!log.contains(secret), "the {what} is in the server log");
        assert!(!cli_log.contains(secret), "the {what} is in the CLI log");
        // Nor a recognisable part of it.
        if secret.len() > 20 {
            assert!(!log.contains(&secret[secret.len() - 16..]), "part of the {what} is logged");
        }
    }
}
on_both_engines!(secrets_never_logged);
