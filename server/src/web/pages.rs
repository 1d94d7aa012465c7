//! Pages for every signed-in user: sign-in and sign-out, the account page
//! (password change), the overview of every site and line, and the basic line
//! page (metadata, electrodes, sequence versions, recent epochs).

use std::collections::HashMap;
use std::time::Instant;

use askama::Template;
use axum::extract::{Path, Query, State};
use axum::http::{HeaderMap, StatusCode, header};
use axum::response::{IntoResponse, Redirect, Response};
use chrono::{DateTime, Duration, Utc};
use serde::Deserialize;

use super::forms::{ClientIp, CsrfForm, SignedIn};
use super::review::{AlertView, Timeline, open_alerts, timeline};
use super::view::{Chrome, Timeliness, expected_per_day, fmt_duration, fmt_time, iso};
use super::{PageError, render, render_with};
use crate::app::AppState;
use crate::auth::password::{check_new_password, hash_password, verify_nothing, verify_password};
use crate::auth::session::{
    SESSION_COOKIE, SIGN_IN_COOKIE, SIGN_IN_COOKIE_S, cookie, cookie_value, csrf_matches,
};
use crate::auth::{hash_token, random_secret, session_user};
use crate::db;
use ohmline_core::alerts::CAUTION;

/// Runs CPU-heavy password work off the async workers.
async fn blocking<T: Send + 'static>(
    f: impl FnOnce() -> T + Send + 'static,
) -> Result<T, PageError> {
    tokio::task::spawn_blocking(f).await.map_err(|e| PageError::Task(e.to_string()))
}

/// `GET /`: the overview, or the sign-in page.
pub async fn home(who: Option<SignedIn>) -> Redirect {
    match who {
        Some(_) => Redirect::to("/overview"),
        None => Redirect::to("/sign-in"),
    }
}

#[derive(Template)]
#[template(path = "sign_in.html")]
struct SignInPage {
    chrome: Chrome,
    csrf: String,
    next: String,
    email: String,
    error: String,
}

/// Query of the sign-in page.
#[derive(Debug, Deserialize)]
pub struct NextQuery {
    /// Local path to go to after signing in.
    #[serde(default)]
    pub next: String,
}

/// A local path to go to after signing in; anything else becomes the overview.
fn safe_next(next: &str) -> &str {
    let local = next.starts_with('/')
        && !next.starts_with("//")
        && !next.contains('\\')
        && !next.chars().any(char::is_control);
    if local && next != "/sign-in" { next } else { "/overview" }
}

fn sign_in_page(
    state: &AppState,
    status: StatusCode,
    next: &str,
    email: &str,
    error: &str,
) -> Result<Response, PageError> {
    // The form's token is also set as a cookie; the POST must carry both
    // (double-submit: there is no session yet to tie it to).
    let token = random_secret();
    let page = SignInPage {
        chrome: Chrome::anonymous(),
        csrf: token.clone(),
        next: safe_next(next).to_string(),
        email: email.to_string(),
        error: error.to_string(),
    };
    let mut resp = render_with(status, &page)?;
    let c =
        cookie(SIGN_IN_COOKIE, token, state.config.web.secure_cookies(), Some(SIGN_IN_COOKIE_S));
    resp.headers_mut().append(header::SET_COOKIE, c.parse().expect("cookie is a header value"));
    Ok(resp)
}

/// `GET /sign-in`.
pub async fn sign_in_form(
    State(state): State<AppState>,
    headers: HeaderMap,
    Query(q): Query<NextQuery>,
) -> Result<Response, PageError> {
    if session_user(&state, &headers).await?.is_some() {
        return Ok(Redirect::to(safe_next(&q.next)).into_response());
    }
    sign_in_page(&state, StatusCode::OK, &q.next, "", "")
}

/// The sign-in form's fields.
#[derive(Debug, Deserialize)]
pub struct SignInForm {
    #[serde(default)]
    csrf: String,
    #[serde(default)]
    email: String,
    #[serde(default)]
    password: String,
    #[serde(default)]
    next: String,
}

/// `POST /sign-in`: checks the password (rate-limited), starts a session.
pub async fn sign_in(
    State(state): State<AppState>,
    ClientIp(ip): ClientIp,
    headers: HeaderMap,
    axum::Form(form): axum::Form<SignInForm>,
) -> Result<Response, PageError> {
    let expected = cookie_value(&headers, SIGN_IN_COOKIE).unwrap_or_default();
    if !csrf_matches(&expected, &form.csrf) {
        tracing::warn!("sign-in form refused: CSRF token missing or wrong");
        return Err(PageError::CsrfRejected);
    }
    if let Err(wait) = state.limits.sign_ins_by_ip.take(ip, Instant::now()) {
        let retry_after_s = crate::limits::retry_after_s(wait);
        tracing::warn!(%ip, "sign-in refused: too many attempts from the address");
        return Err(PageError::TooManyAttempts {
            message: format!(
                "Too many sign-in attempts from this address (at most {} a minute); try again in {retry_after_s} s.",
                state.config.limits.sign_ins_per_minute_per_ip
            ),
            retry_after_s,
        });
    }
    let email = form.email.trim().to_lowercase();
    if let Err(e) = state.sign_in.check(&email, ip, Instant::now()) {
        tracing::warn!(%email, %ip, "sign-in refused: too many failures");
        return Err(PageError::TooManyAttempts {
            message: format!("Too many failed sign-ins: {e}."),
            retry_after_s: e.retry_after().as_secs().max(1),
        });
    }
    let found = db::users::by_email_with_hash(&state.db, &email).await?;
    let password = form.password;
    let user = match found {
        Some((user, stored)) => {
            let ok = blocking(move || verify_password(&password, &stored)).await?;
            match ok {
                Ok(true) => Some(user),
                Ok(false) => None,
                Err(e) => {
                    tracing::error!(user = %user.email, error = %e, "stored password hash unusable");
                    None
                }
            }
        }
        None => {
            blocking(move || verify_nothing(&password)).await?;
            None
        }
    };
    let Some(user) = user else {
        state.sign_in.failed(&email, ip, Instant::now());
        tracing::warn!(%email, %ip, "sign-in failed");
        return sign_in_page(
            &state,
            StatusCode::UNAUTHORIZED,
            &form.next,
            &email,
            "E-mail address or password is wrong.",
        );
    };
    state.sign_in.succeeded(&email);
    let secret = random_secret();
    let session =
        db::sessions::create(&state.db, user.id, &hash_token(&secret), &random_secret()).await?;
    tracing::info!(user = %user.email, session = session.id, %ip, "signed in");
    let secure = state.config.web.secure_cookies();
    let max_age = state.config.web.session_max_s as i64;
    let mut resp = Redirect::to(safe_next(&form.next)).into_response();
    let h = resp.headers_mut();
    for c in [
        cookie(SESSION_COOKIE, secret, secure, Some(max_age)),
        cookie(SIGN_IN_COOKIE, String::new(), secure, None),
    ] {
        h.append(header::SET_COOKIE, c.parse().expect("cookie is a header value"));
    }
    Ok(resp)
}

/// A form with no fields but the CSRF token.
#[derive(Debug, Deserialize)]
pub struct Empty {}

/// `POST /sign-out`: ends the session.
pub async fn sign_out(
    State(state): State<AppState>,
    f: CsrfForm<Empty>,
) -> Result<Response, PageError> {
    db::sessions::delete(&state.db, f.who.session.id).await?;
    tracing::info!(user = %f.who.user.email, session = f.who.session.id, "signed out");
    let mut resp = Redirect::to("/sign-in").into_response();
    let c = cookie(SESSION_COOKIE, String::new(), state.config.web.secure_cookies(), None);
    resp.headers_mut().append(header::SET_COOKIE, c.parse().expect("cookie is a header value"));
    Ok(resp)
}

#[derive(Template)]
#[template(path = "account.html")]
struct AccountPage {
    chrome: Chrome,
    created: String,
    password_changed: String,
    notice: String,
    error: String,
}

fn account_page(
    who: &SignedIn,
    status: StatusCode,
    notice: &str,
    error: &str,
) -> Result<Response, PageError> {
    render_with(
        status,
        &AccountPage {
            chrome: who.chrome("account"),
            created: fmt_time(who.user.created_at),
            password_changed: fmt_time(who.user.password_changed_at),
            notice: notice.into(),
            error: error.into(),
        },
    )
}

/// `GET /account`.
pub async fn account(who: SignedIn) -> Result<Response, PageError> {
    account_page(&who, StatusCode::OK, "", "")
}

/// The password change form.
#[derive(Debug, Deserialize)]
pub struct PasswordForm {
    #[serde(default)]
    current: String,
    #[serde(default)]
    new: String,
    #[serde(default)]
    confirm: String,
}

/// `POST /account/password`: checks the current password, sets the new one and
/// ends the user's other sessions.
pub async fn change_password(
    State(state): State<AppState>,
    ClientIp(ip): ClientIp,
    f: CsrfForm<PasswordForm>,
) -> Result<Response, PageError> {
    let CsrfForm { who, form } = f;
    let email = who.user.email.clone();
    if let Err(e) = state.sign_in.check(&email, ip, Instant::now()) {
        return Err(PageError::TooManyAttempts {
            message: format!("Too many wrong passwords: {e}."),
            retry_after_s: e.retry_after().as_secs().max(1),
        });
    }
    let stored = db::users::password_hash(&state.db, who.user.id).await?;
    let current = form.current;
    let ok = blocking(move || verify_password(&current, &stored)).await?;
    if ok != Ok(true) {
        state.sign_in.failed(&email, ip, Instant::now());
        tracing::warn!(%email, %ip, "password change: wrong current password");
        return account_page(&who, StatusCode::UNAUTHORIZED, "", "The current password is wrong.");
    }
    if form.new != form.confirm {
        return account_page(&who, StatusCode::BAD_REQUEST, "", "The new passwords differ.");
    }
    if let Err(e) = check_new_password(&form.new) {
        return account_page(&who, StatusCode::BAD_REQUEST, "", &format!("{e}."));
    }
    let new = form.new;
    let hash = blocking(move || hash_password(&new))
        .await?
        .map_err(|e| PageError::BadRequest(format!("{e}.")))?;
    db::users::set_password(&state.db, who.user.id, &hash, Some(who.session.id)).await?;
    db::audit::record(&state.db, &email, "user.password", &email, "changed by the user").await?;
    let who = SignedIn {
        user: db::users::by_id(&state.db, who.user.id).await?.unwrap_or(who.user),
        ..who
    };
    account_page(&who, StatusCode::OK, "Password changed. Your other sessions were signed out.", "")
}

struct LineRow {
    name: String,
    orientation: String,
    n_electrodes: i64,
    last_epoch: String,
    last_epoch_iso: String,
    age: String,
    state_label: &'static str,
    state_class: &'static str,
    recent: i64,
    expected: String,
    /// Open alerts in words, empty when none.
    open_alerts: String,
    /// CSS class of the highest open level.
    alert_class: &'static str,
    /// Some epoch of the line has been processed.
    processed: bool,
    /// Share dropped in the newest checked epoch, empty when none.
    dropped: String,
    /// A change section is stored (the trend can be drawn).
    has_trend: bool,
}

struct SiteRows {
    id: i64,
    name: String,
    description: String,
    lines: Vec<LineRow>,
    /// Newest value of each of the site's series, in words.
    series: Vec<String>,
}

#[derive(Template)]
#[template(path = "overview.html")]
struct OverviewPage {
    chrome: Chrome,
    now: String,
    sites: Vec<SiteRows>,
    n_lines: usize,
    n_late: usize,
    n_silent: usize,
}

/// `GET /overview`: every site and line.
pub async fn overview(State(state): State<AppState>, who: SignedIn) -> Result<Response, PageError> {
    let now = db::now();
    let activity = db::activity::lines(&state.db, now - Duration::hours(24)).await?;
    let sites = db::sites::list(&state.db).await?;
    let mut open: HashMap<i64, (i64, i64)> = HashMap::new();
    for (line_id, level, n) in db::alerts::open_counts(&state.db).await? {
        let e = open.entry(line_id).or_insert((0, i64::MIN));
        e.0 += n;
        e.1 = e.1.max(level);
    }
    let mut by_site: HashMap<i64, Vec<LineRow>> = HashMap::new();
    let (mut n_late, mut n_silent) = (0, 0);
    for a in &activity {
        let t = Timeliness::of(a.last_epoch_at, Duration::seconds(a.expected_interval_s), now);
        match t {
            Timeliness::Late { .. } => n_late += 1,
            Timeliness::NoEpochs => n_silent += 1,
            Timeliness::OnTime => {}
        }
        let processed = db::models::status_counts(&state.db, a.line_id)
            .await?
            .iter()
            .any(|(s, n)| s == "processed" && *n > 0);
        let (open_alerts, alert_class) = match open.get(&a.line_id) {
            Some(&(n, level)) => (
                format!("{n} open · highest level {}", level.max(0)),
                match level {
                    i64::MIN..=0 => "level-0",
                    1 => "level-1",
                    2 => "level-2",
                    _ => "level-3",
                },
            ),
            None => (String::new(), ""),
        };
        let dropped = db::quality::line_epochs(&state.db, a.line_id, 1)
            .await?
            .first()
            .map(|(_, q)| format!("{:.1} % dropped", 100.0 * q.dropped_share))
            .unwrap_or_default();
        let has_trend = processed
            && !db::models::strongest_drops(
                &state.db,
                a.line_id,
                &super::figures::primary_mode(&state),
            )
            .await?
            .is_empty();
        by_site.entry(a.site_id).or_default().push(LineRow {
            dropped,
            has_trend,
            open_alerts,
            alert_class,
            processed,
            name: a.line.clone(),
            orientation: a.orientation.clone(),
            n_electrodes: a.n_electrodes,
            last_epoch: a.last_epoch_at.map(fmt_time).unwrap_or_else(|| "none yet".into()),
            last_epoch_iso: a.last_epoch_at.map(iso).unwrap_or_default(),
            age: a
                .last_epoch_at
                .map(|t| format!("{} ago", fmt_duration(now - t)))
                .unwrap_or_default(),
            state_label: t.label(),
            state_class: t.class(),
            recent: a.recent_epochs,
            expected: expected_per_day(a.expected_interval_s),
        });
    }
    let mut site_rows = Vec::with_capacity(sites.len());
    for s in sites {
        site_rows.push(SiteRows {
            id: s.id,
            lines: by_site.remove(&s.id).unwrap_or_default(),
            series: super::series::latest_values(&state, s.id).await?,
            name: s.name,
            description: s.description,
        });
    }
    let sites = site_rows;
    render(&OverviewPage {
        chrome: who.chrome("overview"),
        now: fmt_time(now),
        sites,
        n_lines: activity.len(),
        n_late,
        n_silent,
    })
}

struct ElectrodeView {
    position: i64,
    label: String,
    x: String,
    z: String,
    easting: String,
    northing: String,
    in_service: bool,
}

struct SequenceView {
    version: i64,
    name: String,
    n_quadrupoles: i64,
    created: String,
}

struct EpochView {
    id: i64,
    started: String,
    started_iso: String,
    received: String,
    meter: String,
    sequence_version: String,
    n_readings: i64,
    status: String,
}

#[derive(Template)]
#[template(path = "line.html")]
struct LinePage {
    chrome: Chrome,
    name: String,
    site: String,
    site_description: String,
    orientation: String,
    interval: String,
    notes: String,
    registered: String,
    state_label: &'static str,
    state_class: &'static str,
    last_epoch: String,
    n_epochs: i64,
    electrodes: Vec<ElectrodeView>,
    length: String,
    sequences: Vec<SequenceView>,
    epochs: Vec<EpochView>,
    paged: bool,
    older: String,
    timeline: Option<Timeline>,
    alerts: Vec<AlertView>,
    caution: &'static str,
    series: super::series::LineSeries,
}

/// Query of the line page.
#[derive(Debug, Deserialize)]
pub struct EpochPaging {
    /// Show epochs that started before this time (RFC 3339).
    pub before: Option<String>,
    /// Processed epoch whose sections are shown (default: the newest).
    pub epoch: Option<i64>,
}

/// Epochs per page of the line page.
const EPOCHS_PER_PAGE: i64 = 50;

fn metres(v: f64) -> String {
    format!("{v:.2}")
}

/// `GET /lines/{line}`: the line's metadata, electrodes, sequences and epochs.
pub async fn line(
    State(state): State<AppState>,
    who: SignedIn,
    Path(name): Path<String>,
    Query(q): Query<EpochPaging>,
) -> Result<Response, PageError> {
    let line = db::lines::by_name(&state.db, &name)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Line {name:?}")))?;
    let before = match q.before.as_deref().filter(|s| !s.is_empty()) {
        Some(s) => Some(
            DateTime::parse_from_rfc3339(s)
                .map(|t| db::ms(t.with_timezone(&Utc)))
                .map_err(|_| PageError::BadRequest(format!("{s:?} is not an RFC 3339 time.")))?,
        ),
        None => None,
    };
    let site = db::sites::by_id(&state.db, line.site_id).await?;
    let electrodes = db::lines::electrodes(&state.db, line.id).await?;
    let sequences = db::sequences::list(&state.db, line.id).await?;
    let versions: HashMap<i64, i64> = sequences.iter().map(|s| (s.id, s.version)).collect();
    let epochs = db::epochs::list_for_line(&state.db, line.id, before, EPOCHS_PER_PAGE).await?;
    let n_epochs = db::epochs::count_for_line(&state.db, line.id).await?;
    let last = if before.is_none() {
        epochs.first().map(|e| e.started_at)
    } else {
        db::epochs::list_for_line(&state.db, line.id, None, 1).await?.first().map(|e| e.started_at)
    };
    let now = db::now();
    let t = Timeliness::of(last, Duration::seconds(line.expected_interval_s), now);
    let older = match epochs.last() {
        Some(e) if epochs.len() as i64 == EPOCHS_PER_PAGE => {
            let q =
                serde_urlencoded::to_string([("before", iso(e.started_at))]).unwrap_or_default();
            format!("/lines/{}?{q}", line.name)
        }
        _ => String::new(),
    };
    let timeline = timeline(&state, &line, q.epoch).await?;
    let series = super::series::for_line(&state, &line, q.epoch).await?;
    let alerts = open_alerts(&state, line.id).await?;
    let length = match (electrodes.first(), electrodes.last()) {
        (Some(a), Some(b)) => metres(b.x - a.x),
        _ => String::new(),
    };
    let page = LinePage {
        chrome: who.chrome("overview"),
        site: site.as_ref().map(|s| s.name.clone()).unwrap_or_default(),
        site_description: site.map(|s| s.description).unwrap_or_default(),
        orientation: line.orientation.clone(),
        interval: fmt_duration(Duration::seconds(line.expected_interval_s)),
        notes: line.notes.clone(),
        registered: fmt_time(line.created_at),
        state_label: t.label(),
        state_class: t.class(),
        last_epoch: last
            .map(|l| format!("{} ({} ago)", fmt_time(l), fmt_duration(now - l)))
            .unwrap_or_else(|| "none yet".into()),
        n_epochs,
        electrodes: electrodes
            .into_iter()
            .map(|e| ElectrodeView {
                position: e.position,
                label: e.label,
                x: metres(e.x),
                z: metres(e.z),
                easting: e.easting.map(metres).unwrap_or_default(),
                northing: e.northing.map(metres).unwrap_or_default(),
                in_service: e.in_service,
            })
            .collect(),
        length,
        sequences: sequences
            .into_iter()
            .map(|s| SequenceView {
                version: s.version,
                name: s.name,
                n_quadrupoles: s.n_quadrupoles,
                created: fmt_time(s.created_at),
            })
            .collect(),
        epochs: epochs
            .into_iter()
            .map(|e| EpochView {
                id: e.id,
                started: fmt_time(e.started_at),
                started_iso: iso(e.started_at),
                received: fmt_time(e.received_at),
                meter: e.meter_id.unwrap_or_default(),
                sequence_version: versions
                    .get(&e.sequence_id)
                    .map(|v| format!("v{v}"))
                    .unwrap_or_else(|| "?".into()),
                n_readings: e.n_readings,
                status: e.status,
            })
            .collect(),
        paged: before.is_some(),
        older,
        timeline,
        alerts,
        caution: CAUTION,
        series,
        name: line.name,
    };
    render(&page)
}

struct QualityRow {
    started: String,
    n_readings: i64,
    n_dropped: i64,
    dropped: String,
    error_model: String,
}

struct EventView {
    at: String,
    kind: String,
    detail: String,
}

#[derive(Template)]
#[template(path = "quality.html")]
struct QualityPage {
    chrome: Chrome,
    name: String,
    site: String,
    checked: usize,
    rows: Vec<QualityRow>,
    events: Vec<EventView>,
    latest: String,
}

/// Epochs listed in the quality page's table.
const QUALITY_ROWS: usize = 50;

/// `GET /lines/{line}/quality`: dropped share per epoch, electrode health
/// over time, the newest pseudosections and the quality events.
pub async fn quality(
    State(state): State<AppState>,
    who: SignedIn,
    Path(name): Path<String>,
) -> Result<Response, PageError> {
    let line = super::figures::line_named(&state, &name).await?;
    let site = db::sites::by_id(&state.db, line.site_id).await?.map(|s| s.name).unwrap_or_default();
    let epochs =
        db::quality::line_epochs(&state.db, line.id, super::figures::QUALITY_EPOCHS).await?;
    let events = db::quality::events(&state.db, line.id, 30).await?;
    render(&QualityPage {
        chrome: who.chrome("overview"),
        site,
        checked: epochs.len(),
        latest: epochs.last().map(|(t, _)| fmt_time(*t)).unwrap_or_default(),
        rows: epochs
            .iter()
            .rev()
            .take(QUALITY_ROWS)
            .map(|(t, q)| QualityRow {
                started: fmt_time(*t),
                n_readings: q.n_readings,
                n_dropped: q.n_dropped,
                dropped: format!("{:.1} %", 100.0 * q.dropped_share),
                error_model: if q.error_fitted {
                    format!(
                        "{:.3} Ω + {:.1} %·|R| ({} pairs)",
                        q.error_a_ohm,
                        100.0 * q.error_b,
                        q.error_pairs
                    )
                } else {
                    "not fitted".into()
                },
            })
            .collect(),
        events: events
            .into_iter()
            .map(|e| EventView { at: fmt_time(e.occurred_at), kind: e.kind, detail: e.detail })
            .collect(),
        name: line.name,
    })
}
