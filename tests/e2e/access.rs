//! Access control as a table: every route the router serves × every kind of
//! caller (anonymous, meter tokens of this line, of another line and revoked,
//! personal tokens of each role and revoked, browser sessions of each role),
//! with the status each one gets. The table's routes are compared with the
//! router's own list (`ohmline_server::app::routes`), and every method the
//! table does not name must answer 405: a new route without a row fails.

use std::collections::{BTreeMap, BTreeSet};

use reqwest::Method;
use serde_json::{Value, json};

use crate::on_both_engines;
use crate::support::{
    Engine, HttpSession, Server, TestDb, TestLine, add_user, cli, hidden_input, multipart_body,
    register_line, upload_block_season, user_token, wait_processed,
};

/// The kinds of caller, in the order requests are made (sessions last, so a
/// destructive page action succeeds once, for the admin, after every refusal).
const CALLERS: [&str; 11] = [
    "anonymous",
    "meter token of this line",
    "meter token of another line",
    "revoked meter token",
    "revoked personal token",
    "viewer personal token",
    "engineer personal token",
    "admin personal token",
    "viewer session",
    "engineer session",
    "admin session",
];

const fn bits(callers: &[usize]) -> u16 {
    let mut m = 0;
    let mut i = 0;
    while i < callers.len() {
        m |= 1 << callers[i];
        i += 1;
    }
    m
}

const EVERYONE: u16 = bits(&[0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10]);
const SESSIONS: u16 = bits(&[8, 9, 10]);
const ENGINEER_SESSIONS: u16 = bits(&[9, 10]);
const ADMIN_SESSION: u16 = bits(&[10]);
/// Reading this line's data over the API: its meter, every user's token,
/// every session.
const API_READ_LINE: u16 = bits(&[1, 5, 6, 7, 8, 9, 10]);
/// Listings every credential may read, scoped to a meter's own line.
const API_LISTING: u16 = bits(&[1, 2, 5, 6, 7, 8, 9, 10]);
/// Alert actions: engineer and admin personal tokens (a session never
/// writes through the API: it carries no CSRF token there).
const API_ENGINEER: u16 = bits(&[6, 7]);
const UPLOAD_THIS_LINE: u16 = bits(&[1]);
/// Site series: the meters of the site's lines (both lines here are on one
/// site), engineer and admin personal tokens.
const SITE_SERIES_WRITE: u16 = bits(&[1, 2, 6, 7]);
/// Reading site series: the site's meters, every user's token, every session.
const SITE_SERIES_READ: u16 = bits(&[1, 2, 5, 6, 7, 8, 9, 10]);

fn is_session(caller: usize) -> bool {
    caller >= 8
}

/// What a request sends.
#[derive(Clone)]
enum Payload {
    Nothing,
    /// URL-encoded form; the session's CSRF token is added for sessions and
    /// `$PASSWORD` is replaced by the caller's password.
    Form(Vec<(&'static str, String)>),
    /// Multipart form: text fields and (field, file name, content) files.
    Multipart(Vec<(&'static str, String)>, Vec<(&'static str, &'static str, String)>),
    Json(Value),
    Csv(String),
    /// The sign-in form with a valid double-submit token and a wrong password.
    SignIn,
}

struct Row {
    method: Method,
    /// The route as the router names it.
    route: &'static str,
    /// A concrete path of it.
    path: String,
    send: Payload,
    /// Callers allowed (bit per index of [`CALLERS`]).
    allowed: u16,
    /// Statuses an allowed caller may get.
    ok: &'static [u16],
}

fn row(
    method: Method,
    route: &'static str,
    path: impl Into<String>,
    send: Payload,
    allowed: u16,
    ok: &'static [u16],
) -> Row {
    Row { method, route, path: path.into(), send, allowed, ok }
}

/// The status a refused caller gets: API routes answer 401 without a valid
/// credential (a session is none for writes) and 403 for a valid one without
/// the right; pages send anyone without a session to the sign-in page and
/// answer 403 to a session without the role.
fn refusal(row: &Row, caller: usize) -> (u16, bool) {
    if row.route.starts_with("/api/") {
        let no_credential =
            matches!(caller, 0 | 3 | 4) || (is_session(caller) && row.method != Method::GET);
        (if no_credential { 401 } else { 403 }, false)
    } else if is_session(caller) {
        (403, false)
    } else {
        (303, true)
    }
}

struct Caller {
    bearer: Option<String>,
    session: Option<HttpSession>,
    csrf: String,
    password: String,
}

fn id_of(listing: &str, column: usize, value: &str) -> String {
    listing
        .lines()
        .find(|l| l.split('\t').nth(column) == Some(value))
        .and_then(|l| l.split('\t').next())
        .unwrap_or_else(|| panic!("{value} in {listing}"))
        .to_string()
}

async fn every_route_by_every_caller(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(32, 1.0, 6);
    let small = TestLine::new(12, 1.0, 2);
    let token_a = register_line(&db, "Test Levee", "crest-t", &tl);
    let token_b = register_line(&db, "Test Levee", "toe-t", &small);
    let revoked_meter =
        cli(&db, &["token", "issue", "--line", "crest-t", "--label", "old"]).trim().to_string();
    cli(
        &db,
        &["token", "revoke", &id_of(&cli(&db, &["token", "list", "--line", "crest-t"]), 1, "old")],
    );
    let spare = cli(&db, &["token", "issue", "--line", "toe-t", "--label", "spare"]);
    assert!(spare.starts_with("ohl_"));
    let spare_id = id_of(&cli(&db, &["token", "list", "--line", "toe-t"]), 1, "spare");

    let mut passwords = BTreeMap::new();
    for (email, role) in [
        ("viewer@levee.test", "viewer"),
        ("engineer@levee.test", "engineer"),
        ("admin@levee.test", "admin"),
        ("target@levee.test", "viewer"),
        ("victim@levee.test", "viewer"),
    ] {
        passwords.insert(email, add_user(&db, email, role));
    }
    let revoked_personal = user_token(&db, "viewer@levee.test");
    let tokens = cli(&db, &["user", "tokens", "--email", "viewer@levee.test"]);
    cli(&db, &["user", "revoke-token", tokens.lines().next().unwrap().split('\t').next().unwrap()]);
    let users = cli(&db, &["user", "list"]);
    let target_id = id_of(&users, 1, "target@levee.test");
    let victim_id = id_of(&users, 1, "victim@levee.test");
    let site_id = id_of(&cli(&db, &["site", "list"]), 1, "Test Levee");

    let server = Server::start(&db).await;
    let ids = upload_block_season(&server, &tl, "crest-t", &token_a).await;
    wait_processed(&server, &ids, &token_a).await;
    let epoch = *ids.last().unwrap();
    let (_, alerts) = server.get_json("/api/v1/alerts?line=crest-t", &token_a).await;
    let alert = alerts["alerts"][0]["id"].as_i64().expect("the season raises an alert");
    // The first epoch again: an idempotent re-send (200) for the line's meter.
    let resend = crate::support::readings_csv(
        &tl,
        "2026-03-01T00:00:00Z",
        &crate::support::block_readings(&tl, &crate::support::forward_of(&tl), false, 100),
    );

    let mut callers = Vec::new();
    for (i, _) in CALLERS.iter().enumerate() {
        let bearer = match i {
            1 => Some(token_a.clone()),
            2 => Some(token_b.clone()),
            3 => Some(revoked_meter.clone()),
            4 => Some(revoked_personal.clone()),
            5 => Some(user_token(&db, "viewer@levee.test")),
            6 => Some(user_token(&db, "engineer@levee.test")),
            7 => Some(user_token(&db, "admin@levee.test")),
            _ => None,
        };
        let (session, csrf, password) = if is_session(i) {
            let email = ["viewer@levee.test", "engineer@levee.test", "admin@levee.test"][i - 8];
            let mut s = HttpSession::new();
            assert_eq!(s.sign_in(&server, email, &passwords[email]).await, 303);
            let csrf = s.csrf(&server).await;
            (Some(s), csrf, passwords[email].clone())
        } else {
            (None, String::new(), String::new())
        };
        callers.push(Caller { bearer, session, csrf, password });
    }
    // A valid sign-in form token (double submit: form field and cookie).
    let mut anon = HttpSession::new();
    let (_, _, page) = anon.get(&server.url("/sign-in")).await;
    let sign_in_csrf = hidden_input(&page, "csrf").unwrap();
    let sign_in_cookie = anon.cookie_header();

    let e = format!("/api/v1/epochs/{epoch}");
    let a = format!("/api/v1/alerts/{alert}");
    let note = |n: &str| json!({ "note": n });
    let form_note = |n: &str| Payload::Form(vec![("note", n.to_string())]);
    use Method as M;
    use Payload::Nothing as N;
    let table = vec![
        row(M::GET, "/healthz", "/healthz", N, EVERYONE, &[200]),
        row(M::GET, "/static/{file}", "/static/app.js", N, EVERYONE, &[200]),
        row(M::GET, "/", "/", N, EVERYONE, &[303]),
        row(M::GET, "/sign-in", "/sign-in", N, EVERYONE, &[200, 303]),
        row(M::POST, "/sign-in", "/sign-in", Payload::SignIn, EVERYONE, &[401]),
        // The JSON API.
        row(M::GET, "/api/v1/lines", "/api/v1/lines", N, API_LISTING, &[200]),
        row(
            M::GET,
            "/api/v1/lines/{line}/epochs",
            "/api/v1/lines/crest-t/epochs",
            N,
            API_READ_LINE,
            &[200],
        ),
        row(
            M::POST,
            "/api/v1/lines/{line}/epochs",
            "/api/v1/lines/crest-t/epochs",
            Payload::Csv(resend),
            UPLOAD_THIS_LINE,
            &[200],
        ),
        row(M::GET, "/api/v1/epochs/{id}", e.clone(), N, API_READ_LINE, &[200]),
        row(
            M::GET,
            "/api/v1/epochs/{id}/readings",
            format!("{e}/readings"),
            N,
            API_READ_LINE,
            &[200],
        ),
        row(
            M::GET,
            "/api/v1/epochs/{id}/quality",
            format!("{e}/quality"),
            N,
            API_READ_LINE,
            &[200],
        ),
        row(M::GET, "/api/v1/epochs/{id}/model", format!("{e}/model"), N, API_READ_LINE, &[200]),
        row(M::GET, "/api/v1/epochs/{id}/change", format!("{e}/change"), N, API_READ_LINE, &[200]),
        row(M::GET, "/api/v1/alerts", "/api/v1/alerts", N, API_LISTING, &[200]),
        row(M::GET, "/api/v1/alerts/feed.atom", "/api/v1/alerts/feed.atom", N, API_LISTING, &[200]),
        row(M::GET, "/api/v1/alerts/{id}", a.clone(), N, API_READ_LINE, &[200]),
        row(M::GET, "/api/v1/alerts/{id}/cap", format!("{a}/cap"), N, API_READ_LINE, &[200]),
        // The engineer acknowledges (200); the admin's second acknowledgement is
        // refused by the alert's state (400), not by access.
        row(
            M::POST,
            "/api/v1/alerts/{id}/acknowledge",
            format!("{a}/acknowledge"),
            Payload::Json(note("Inspected the crest.")),
            API_ENGINEER,
            &[200, 400],
        ),
        // Pages for every signed-in user.
        row(M::GET, "/overview", "/overview", N, SESSIONS, &[200]),
        row(M::GET, "/account", "/account", N, SESSIONS, &[200]),
        row(
            M::POST,
            "/account/password",
            "/account/password",
            Payload::Form(vec![
                ("current", "$PASSWORD".into()),
                ("new", "another long password".into()),
                ("confirm", "another long password".into()),
            ]),
            SESSIONS,
            &[200],
        ),
        row(M::GET, "/lines/{line}", "/lines/crest-t", N, SESSIONS, &[200]),
        row(
            M::GET,
            "/lines/{line}/epochs/{id}/{file}",
            format!("/lines/crest-t/epochs/{epoch}/section.svg?kind=change"),
            N,
            SESSIONS,
            &[200],
        ),
        row(M::GET, "/lines/{line}/quality", "/lines/crest-t/quality", N, SESSIONS, &[200]),
        row(
            M::GET,
            "/lines/{line}/quality/{file}",
            "/lines/crest-t/quality/dropped.svg",
            N,
            SESSIONS,
            &[200],
        ),
        row(
            M::GET,
            "/lines/{line}/export/{file}",
            "/lines/crest-t/export/models.csv",
            N,
            SESSIONS,
            &[200],
        ),
        row(M::GET, "/lines/{line}/{file}", "/lines/crest-t/trend.svg", N, SESSIONS, &[200]),
        row(M::GET, "/alerts", "/alerts", N, SESSIONS, &[200]),
        row(M::GET, "/alerts/{id}", format!("/alerts/{alert}"), N, SESSIONS, &[200]),
        row(
            M::GET,
            "/alerts/{id}/{file}",
            format!("/alerts/{alert}/history.svg"),
            N,
            SESSIONS,
            &[200],
        ),
        // Already acknowledged through the API: a conflict (409) for an engineer, not a refusal.
        row(
            M::POST,
            "/alerts/{id}/acknowledge",
            format!("/alerts/{alert}/acknowledge"),
            form_note("Seen on site."),
            ENGINEER_SESSIONS,
            &[409],
        ),
        // The engineer resolves (303 to the alert); the admin finds it resolved (409).
        row(
            M::POST,
            "/alerts/{id}/resolve",
            format!("/alerts/{alert}/resolve"),
            form_note("Drained and repaired."),
            ENGINEER_SESSIONS,
            &[303, 409],
        ),
        row(
            M::POST,
            "/api/v1/alerts/{id}/resolve",
            format!("{a}/resolve"),
            Payload::Json(note("Closed.")),
            API_ENGINEER,
            &[400],
        ),
        // Admin pages.
        row(M::GET, "/admin", "/admin", N, ADMIN_SESSION, &[303]),
        row(M::GET, "/admin/users", "/admin/users", N, ADMIN_SESSION, &[200]),
        row(
            M::POST,
            "/admin/users",
            "/admin/users",
            Payload::Form(vec![
                ("email", "added@levee.test".into()),
                ("role", "viewer".into()),
                ("password", String::new()),
            ]),
            ADMIN_SESSION,
            &[200],
        ),
        row(
            M::POST,
            "/admin/users/{id}/role",
            format!("/admin/users/{target_id}/role"),
            Payload::Form(vec![("role", "admin".into())]),
            ADMIN_SESSION,
            &[200],
        ),
        row(
            M::POST,
            "/admin/users/{id}/delete",
            format!("/admin/users/{victim_id}/delete"),
            Payload::Form(vec![]),
            ADMIN_SESSION,
            &[200],
        ),
        row(M::GET, "/admin/lines", "/admin/lines", N, ADMIN_SESSION, &[200]),
        row(
            M::POST,
            "/admin/lines",
            "/admin/lines",
            Payload::Multipart(
                vec![
                    ("name", "bank-c".into()),
                    ("site", site_id.clone()),
                    ("orientation", "transverse".into()),
                    ("interval", "6h".into()),
                    ("notes", String::new()),
                ],
                vec![("electrodes", "bank-c.csv", small.electrodes_csv())],
            ),
            ADMIN_SESSION,
            &[200],
        ),
        row(
            M::POST,
            "/admin/sites",
            "/admin/sites",
            Payload::Form(vec![("name", "Second reach".into()), ("description", String::new())]),
            ADMIN_SESSION,
            &[200],
        ),
        row(M::GET, "/admin/lines/{line}", "/admin/lines/crest-t", N, ADMIN_SESSION, &[200]),
        row(
            M::POST,
            "/admin/lines/{line}/sequences",
            "/admin/lines/crest-t/sequences",
            Payload::Multipart(
                vec![("name", String::new())],
                vec![("sequence", "wenner.csv", tl.sequence_csv())],
            ),
            ADMIN_SESSION,
            &[200],
        ),
        row(
            M::POST,
            "/admin/lines/{line}/tokens",
            "/admin/lines/crest-t/tokens",
            Payload::Form(vec![("label", "logger 2".into())]),
            ADMIN_SESSION,
            &[200],
        ),
        row(
            M::POST,
            "/admin/tokens/{id}/revoke",
            format!("/admin/tokens/{spare_id}/revoke"),
            Payload::Form(vec![]),
            ADMIN_SESSION,
            &[200],
        ),
        row(M::GET, "/admin/audit", "/admin/audit", N, ADMIN_SESSION, &[200]),
        row(M::GET, "/admin/plan", "/admin/plan", N, ADMIN_SESSION, &[200]),
        row(
            M::GET,
            "/admin/plan/sequence.csv",
            "/admin/plan/sequence.csv?electrodes=24&spacing=1&wenner=on&max_a=4&max_n=6&gradient_s=6&channels=8&seconds=0.5&noise_relative=1&noise_absolute=0.001&background=100",
            N,
            ADMIN_SESSION,
            &[200],
        ),
        // Operations endpoints: open (counts and timings only; kept off the
        // public side by the reverse proxy, deploy/nginx.conf).
        row(M::GET, "/readyz", "/readyz", N, EVERYONE, &[200]),
        row(M::GET, "/metrics", "/metrics", N, EVERYONE, &[200]),
        row(M::GET, "/admin/jobs", "/admin/jobs", N, ADMIN_SESSION, &[200]),
        row(
            M::POST,
            "/admin/jobs/{id}/requeue",
            "/admin/jobs/999999/requeue",
            Payload::Form(vec![]),
            ADMIN_SESSION,
            &[404, 409],
        ),
        // Alert rules and recipients.
        row(M::GET, "/admin/rules", "/admin/rules", N, ADMIN_SESSION, &[200]),
        row(
            M::GET,
            "/admin/lines/{line}/rules",
            "/admin/lines/crest-t/rules",
            N,
            ADMIN_SESSION,
            &[200],
        ),
        row(
            M::POST,
            "/admin/lines/{line}/rules",
            "/admin/lines/crest-t/rules",
            Payload::Form(vec![("persistence", "not a number".into())]),
            ADMIN_SESSION,
            &[400, 422],
        ),
        row(M::GET, "/admin/recipients", "/admin/recipients", N, ADMIN_SESSION, &[200]),
        row(
            M::POST,
            "/admin/recipients",
            "/admin/recipients",
            Payload::Form(vec![("email", "not an address".into())]),
            ADMIN_SESSION,
            &[400, 422],
        ),
        row(
            M::POST,
            "/admin/recipients/{id}/remove",
            "/admin/recipients/999999/remove",
            Payload::Form(vec![]),
            ADMIN_SESSION,
            &[404],
        ),
        row(
            M::GET,
            "/api/v1/lines/{line}/rules",
            "/api/v1/lines/crest-t/rules",
            N,
            API_READ_LINE,
            &[200],
        ),
        // Site time series: written by engineers, admins and the site's meters.
        row(
            M::POST,
            "/api/v1/sites/{site}/series/{kind}",
            "/api/v1/sites/Test%20Levee/series/river_stage",
            Payload::Csv("time,value\n2026-03-01T00:00:00Z,1.25\n".into()),
            SITE_SERIES_WRITE,
            &[200, 201],
        ),
        row(
            M::GET,
            "/api/v1/sites/{site}/series",
            "/api/v1/sites/Test%20Levee/series",
            N,
            SITE_SERIES_READ,
            &[200],
        ),
        row(
            M::GET,
            "/api/v1/sites/{site}/series/{kind}",
            "/api/v1/sites/Test%20Levee/series/river_stage",
            N,
            SITE_SERIES_READ,
            &[200],
        ),
        row(M::GET, "/sites/{id}/series", format!("/sites/{site_id}/series"), N, SESSIONS, &[200]),
        row(
            M::POST,
            "/sites/{id}/series",
            format!("/sites/{site_id}/series"),
            Payload::Multipart(vec![("kind", "river_stage".into())], vec![]),
            ENGINEER_SESSIONS,
            &[400],
        ),
        row(
            M::GET,
            "/lines/{line}/series/{file}",
            "/lines/crest-t/series/river_stage.svg",
            N,
            SESSIONS,
            &[200],
        ),
        // Signing out ends each session: last.
        row(M::POST, "/sign-out", "/sign-out", Payload::Form(vec![]), SESSIONS, &[303]),
    ];

    let mut failures = Vec::new();
    for r in &table {
        for (i, name) in CALLERS.iter().enumerate() {
            let c = &mut callers[i];
            let allowed = r.allowed & (1 << i) != 0;
            let mut req = server.client.request(r.method.clone(), server.url(&r.path));
            let mut cookie = c.session.as_ref().map(|s| s.cookie_header()).unwrap_or_default();
            if let Some(t) = &c.bearer {
                req = req.bearer_auth(t);
            }
            req = match &r.send {
                Payload::Nothing => req,
                Payload::Form(fields) => {
                    let mut f: Vec<(&str, String)> = fields
                        .iter()
                        .map(|(k, v)| (*k, v.replace("$PASSWORD", &c.password)))
                        .collect();
                    f.push(("csrf", c.csrf.clone()));
                    req.form(&f)
                }
                Payload::Multipart(fields, files) => {
                    let mut f = fields.clone();
                    f.push(("csrf", c.csrf.clone()));
                    let (ct, body) = multipart_body(&f, files);
                    req.header("content-type", ct).body(body)
                }
                Payload::Json(v) => req.json(v),
                Payload::Csv(body) => req.header("content-type", "text/csv").body(body.clone()),
                Payload::SignIn => {
                    cookie = [cookie.as_str(), sign_in_cookie.as_str()]
                        .iter()
                        .filter(|s| !s.is_empty())
                        .copied()
                        .collect::<Vec<_>>()
                        .join("; ");
                    req.form(&[
                        ("csrf", sign_in_csrf.clone()),
                        ("email", format!("nobody-{i}@levee.test")),
                        ("password", "not the password".into()),
                    ])
                }
            };
            if !cookie.is_empty() {
                req = req.header("cookie", cookie);
            }
            // `HttpSession`'s client follows no redirects; so does this one.
            let resp = match &c.session {
                Some(s) => s.client.execute(req.build().unwrap()).await,
                None => HttpSession::new().client.execute(req.build().unwrap()).await,
            }
            .unwrap();
            let got = resp.status().as_u16();
            let location =
                resp.headers().get("location").and_then(|v| v.to_str().ok()).unwrap_or("");
            let what = format!("{} {} as {name}", r.method, r.path);
            if allowed {
                if !r.ok.contains(&got) {
                    failures.push(format!("{what}: {got}, expected one of {:?}", r.ok));
                }
            } else {
                let (want, to_sign_in) = refusal(r, i);
                if got != want || (to_sign_in && !location.starts_with("/sign-in")) {
                    failures.push(format!("{what}: {got} {location}, expected refusal {want}"));
                }
            }
        }
    }
    assert!(failures.is_empty(), "access rules broken:\n{}", failures.join("\n"));

    // What the allowed callers did took effect once.
    let (_, v) = server.get_json(&a, &token_a).await;
    assert_eq!(v["alert"]["state"], "resolved", "{v}");
    let trail: Vec<&str> =
        v["transitions"].as_array().unwrap().iter().filter_map(|t| t["actor"].as_str()).collect();
    assert!(trail.contains(&"engineer@levee.test"), "{v}");
    let users = cli(&db, &["user", "list"]);
    assert!(users.contains("added@levee.test") && !users.contains("victim@levee.test"), "{users}");
    assert!(users.lines().any(|l| l.contains("target@levee.test\tadmin")), "{users}");
    assert!(cli(&db, &["line", "list"]).contains("bank-c"));
    let toe = cli(&db, &["token", "list", "--line", "toe-t"]);
    assert!(toe.lines().any(|l| l.contains("spare") && l.contains("revoked")), "{toe}");
    for c in &callers {
        if let Some(s) = &c.session {
            let r = s.client.get(server.url("/overview")).header("cookie", s.cookie_header());
            assert_eq!(r.send().await.unwrap().status(), 303, "signed out");
        }
    }

    // Every route of the router has rows, and every method without a row is
    // not served (405) on it.
    let routes = ohmline_server::app::routes();
    let served: BTreeSet<&str> = routes.paths().iter().copied().collect();
    let in_table: BTreeSet<&str> = table.iter().map(|r| r.route).collect();
    let missing: Vec<_> = served.difference(&in_table).collect();
    let stale: Vec<_> = in_table.difference(&served).collect();
    assert!(missing.is_empty(), "routes without access rows: {missing:?}");
    assert!(stale.is_empty(), "rows for routes the router does not serve: {stale:?}");
    let mut unlisted = Vec::new();
    for route in &served {
        let example = table.iter().find(|r| r.route == *route).unwrap();
        for m in [M::GET, M::POST, M::PUT, M::PATCH, M::DELETE] {
            if table.iter().any(|r| r.route == *route && r.method == m) {
                continue;
            }
            let url = server.url(&example.path);
            let got = server.client.request(m.clone(), url).send().await.unwrap().status();
            if got != 405 {
                unlisted.push(format!("{m} {route}: {got}"));
            }
        }
    }
    assert!(unlisted.is_empty(), "methods served without an access row:\n{}", unlisted.join("\n"));
}
on_both_engines!(every_route_by_every_caller);
