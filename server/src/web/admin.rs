//! Admin pages: users (add with a role, change role, delete), sites and lines
//! (register with an electrodes CSV and optional sequence CSV), sequence
//! versions (upload), line tokens (issue — shown once — and revoke), the
//! processing jobs (queue depth, running, dead — queued again on request) and
//! the audit trail. Every action here needs the admin role and is recorded in
//! `audit_events` and the log.

use askama::Template;
use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::response::{Redirect, Response};
use serde::Deserialize;

use super::forms::{CsrfForm, CsrfMultipart, SignedIn};
use super::pages::Empty;
use super::view::{Chrome, fmt_duration, fmt_time};
use super::{PageError, render, render_with};
use crate::app::AppState;
use crate::auth::password::{check_new_password, generate_password, hash_password};
use crate::auth::{Role, hash_token, new_line_token, normalise_email};
use crate::db::lines::NewLine;
use crate::db::{self, DbError};
use crate::files;

async fn audit(
    state: &AppState,
    who: &SignedIn,
    action: &str,
    target: &str,
    detail: &str,
) -> Result<(), PageError> {
    Ok(db::audit::record(&state.db, &who.user.email, action, target, detail).await?)
}

/// `GET /admin`.
pub async fn home(who: SignedIn) -> Result<Redirect, PageError> {
    who.require(Role::Admin)?;
    Ok(Redirect::to("/admin/users"))
}

struct RoleOption {
    name: &'static str,
    /// ` selected` for the user's role, else empty.
    selected: &'static str,
}

struct UserView {
    id: i64,
    email: String,
    roles: Vec<RoleOption>,
    created: String,
    is_self: bool,
}

#[derive(Template)]
#[template(path = "admin_users.html")]
struct UsersPage {
    chrome: Chrome,
    users: Vec<UserView>,
    roles: Vec<&'static str>,
    notice: String,
    secret: String,
    error: String,
}

async fn users_page(
    state: &AppState,
    who: &SignedIn,
    status: StatusCode,
    notice: &str,
    secret: &str,
    error: &str,
) -> Result<Response, PageError> {
    let users = db::users::list(&state.db)
        .await?
        .into_iter()
        .map(|u| UserView {
            id: u.id,
            is_self: u.id == who.user.id,
            roles: Role::ALL
                .iter()
                .map(|r| RoleOption {
                    name: r.as_str(),
                    selected: if *r == u.role { " selected" } else { "" },
                })
                .collect(),
            created: fmt_time(u.created_at),
            email: u.email,
        })
        .collect();
    render_with(
        status,
        &UsersPage {
            chrome: who.chrome("admin"),
            users,
            roles: Role::ALL.iter().map(|r| r.as_str()).collect(),
            notice: notice.into(),
            secret: secret.into(),
            error: error.into(),
        },
    )
}

/// `GET /admin/users`.
pub async fn users(State(state): State<AppState>, who: SignedIn) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    users_page(&state, &who, StatusCode::OK, "", "", "").await
}

/// The add-user form.
#[derive(Debug, Deserialize)]
pub struct AddUser {
    #[serde(default)]
    email: String,
    #[serde(default)]
    role: String,
    /// Empty: generate one and show it once.
    #[serde(default)]
    password: String,
}

/// `POST /admin/users`.
pub async fn add_user(
    State(state): State<AppState>,
    f: CsrfForm<AddUser>,
) -> Result<Response, PageError> {
    let CsrfForm { who, form } = f;
    who.require(Role::Admin)?;
    let refuse =
        async |msg: String| users_page(&state, &who, StatusCode::BAD_REQUEST, "", "", &msg).await;
    let email = match normalise_email(&form.email) {
        Ok(e) => e,
        Err(e) => return refuse(format!("{e}.")).await,
    };
    let role: Role = match form.role.parse() {
        Ok(r) => r,
        Err(e) => return refuse(format!("{e}.")).await,
    };
    let generated = form.password.is_empty();
    let password = if generated { generate_password() } else { form.password };
    if let Err(e) = check_new_password(&password) {
        return refuse(format!("{e}.")).await;
    }
    let pw = password.clone();
    let hash = tokio::task::spawn_blocking(move || hash_password(&pw))
        .await
        .map_err(|e| PageError::Task(e.to_string()))?
        .map_err(|e| PageError::BadRequest(format!("{e}.")))?;
    match db::users::create(&state.db, &email, &hash, role).await {
        Ok(_) => {}
        Err(DbError::Conflict { .. }) => {
            return refuse(format!("A user {email} already exists.")).await;
        }
        Err(e) => return Err(e.into()),
    }
    audit(&state, &who, "user.add", &email, &format!("role {role}")).await?;
    let (notice, secret) = if generated {
        (format!("User {email} added as {role}. Their password, shown only now:"), password)
    } else {
        (format!("User {email} added as {role} with the password you chose."), String::new())
    };
    users_page(&state, &who, StatusCode::OK, &notice, &secret, "").await
}

/// The change-role form.
#[derive(Debug, Deserialize)]
pub struct RoleForm {
    #[serde(default)]
    role: String,
}

async fn target_user(state: &AppState, id: i64) -> Result<db::users::User, PageError> {
    db::users::by_id(&state.db, id).await?.ok_or_else(|| PageError::NotFound(format!("User {id}")))
}

/// `POST /admin/users/{id}/role`.
pub async fn set_role(
    State(state): State<AppState>,
    Path(id): Path<i64>,
    f: CsrfForm<RoleForm>,
) -> Result<Response, PageError> {
    let CsrfForm { who, form } = f;
    who.require(Role::Admin)?;
    let role: Role = form.role.parse().map_err(|e| PageError::BadRequest(format!("{e}.")))?;
    let target = target_user(&state, id).await?;
    if target.role == Role::Admin
        && role != Role::Admin
        && db::users::count_with_role(&state.db, Role::Admin).await? <= 1
    {
        return users_page(
            &state,
            &who,
            StatusCode::CONFLICT,
            "",
            "",
            "The last admin keeps the admin role.",
        )
        .await;
    }
    let updated = db::users::set_role(&state.db, id, role).await?;
    audit(&state, &who, "user.role", &updated.email, &format!("{} → {role}", target.role)).await?;
    users_page(&state, &who, StatusCode::OK, &format!("{} is now {role}.", updated.email), "", "")
        .await
}

/// `POST /admin/users/{id}/delete`: the user's sessions and tokens go with them.
pub async fn delete_user(
    State(state): State<AppState>,
    Path(id): Path<i64>,
    f: CsrfForm<Empty>,
) -> Result<Response, PageError> {
    let who = f.who;
    who.require(Role::Admin)?;
    if id == who.user.id {
        return users_page(
            &state,
            &who,
            StatusCode::CONFLICT,
            "",
            "",
            "You cannot delete yourself; ask another admin.",
        )
        .await;
    }
    let gone = db::users::delete(&state.db, id).await?;
    audit(&state, &who, "user.delete", &gone.email, &format!("role {}", gone.role)).await?;
    users_page(
        &state,
        &who,
        StatusCode::OK,
        &format!("User {} deleted; their sessions and tokens no longer work.", gone.email),
        "",
        "",
    )
    .await
}

struct LineView {
    name: String,
    site: String,
    orientation: String,
    interval: String,
    n_electrodes: i64,
    n_epochs: i64,
}

struct SiteView {
    id: i64,
    name: String,
}

#[derive(Template)]
#[template(path = "admin_lines.html")]
struct LinesPage {
    chrome: Chrome,
    lines: Vec<LineView>,
    sites: Vec<SiteView>,
    notice: String,
    error: String,
}

async fn lines_page(
    state: &AppState,
    who: &SignedIn,
    status: StatusCode,
    notice: &str,
    error: &str,
) -> Result<Response, PageError> {
    let lines = db::lines::list(&state.db, None)
        .await?
        .into_iter()
        .map(|l| LineView {
            interval: fmt_duration(chrono::Duration::seconds(l.expected_interval_s)),
            name: l.name,
            site: l.site,
            orientation: l.orientation,
            n_electrodes: l.n_electrodes,
            n_epochs: l.n_epochs,
        })
        .collect();
    let sites = db::sites::list(&state.db)
        .await?
        .into_iter()
        .map(|s| SiteView { id: s.id, name: s.name })
        .collect();
    render_with(
        status,
        &LinesPage {
            chrome: who.chrome("admin"),
            lines,
            sites,
            notice: notice.into(),
            error: error.into(),
        },
    )
}

/// `GET /admin/lines`.
pub async fn lines(State(state): State<AppState>, who: SignedIn) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    lines_page(&state, &who, StatusCode::OK, "", "").await
}

/// The add-site form.
#[derive(Debug, Deserialize)]
pub struct SiteForm {
    #[serde(default)]
    name: String,
    #[serde(default)]
    description: String,
}

/// `POST /admin/sites`.
pub async fn add_site(
    State(state): State<AppState>,
    f: CsrfForm<SiteForm>,
) -> Result<Response, PageError> {
    let CsrfForm { who, form } = f;
    who.require(Role::Admin)?;
    let name = form.name.trim();
    if name.is_empty() || name.chars().count() > 200 {
        return lines_page(
            &state,
            &who,
            StatusCode::BAD_REQUEST,
            "",
            "A site needs a name of 1–200 characters.",
        )
        .await;
    }
    match db::sites::create(&state.db, name, form.description.trim()).await {
        Ok(site) => {
            audit(&state, &who, "site.add", &site.name, "").await?;
            lines_page(&state, &who, StatusCode::OK, &format!("Site {} registered.", site.name), "")
                .await
        }
        Err(DbError::Conflict { .. }) => {
            lines_page(
                &state,
                &who,
                StatusCode::CONFLICT,
                "",
                &format!("A site named {name} already exists."),
            )
            .await
        }
        Err(e) => Err(e.into()),
    }
}

/// `POST /admin/lines` (multipart): registers a line with its electrodes and
/// optionally its first sequence.
pub async fn register_line(
    State(state): State<AppState>,
    f: CsrfMultipart,
) -> Result<Response, PageError> {
    f.who.require(Role::Admin)?;
    let who = &f.who;
    let refuse =
        async |status: StatusCode, msg: String| lines_page(&state, who, status, "", &msg).await;
    let name = f.field("name").to_string();
    if let Err(e) = crate::cli::check_slug(&name) {
        return refuse(StatusCode::BAD_REQUEST, format!("{e}.")).await;
    }
    let site_id: i64 = match f.field("site").parse() {
        Ok(id) => id,
        Err(_) => {
            return refuse(
                StatusCode::BAD_REQUEST,
                "Choose a site (add one first if there is none).".into(),
            )
            .await;
        }
    };
    let Some(site) = db::sites::by_id(&state.db, site_id).await? else {
        return refuse(StatusCode::BAD_REQUEST, format!("There is no site {site_id}.")).await;
    };
    let orientation = match f.field("orientation") {
        o @ ("longitudinal" | "transverse") => o.to_string(),
        o => {
            return refuse(
                StatusCode::BAD_REQUEST,
                format!("Orientation {o:?} is neither longitudinal nor transverse."),
            )
            .await;
        }
    };
    let interval = match humantime::parse_duration(f.field("interval")) {
        Ok(d) if d.as_secs() >= 1 => d.as_secs() as i64,
        _ => {
            return refuse(
                StatusCode::BAD_REQUEST,
                format!(
                    "Interval {:?} is not a duration such as 6h or 90min.",
                    f.field("interval")
                ),
            )
            .await;
        }
    };
    let Some(e_file) = f.files.get("electrodes") else {
        return refuse(StatusCode::BAD_REQUEST, "Choose an electrodes CSV file.".into()).await;
    };
    let (electrodes, geometry) = match files::read_electrodes(&e_file.filename, e_file.text()?) {
        Ok(x) => x,
        Err(e) => return refuse(StatusCode::BAD_REQUEST, format!("{e}.")).await,
    };
    let seq = match f.files.get("sequence") {
        Some(s) => match files::read_sequence(&s.filename, s.text()?, &geometry) {
            Ok(q) => Some((s.filename.clone(), q)),
            Err(e) => return refuse(StatusCode::BAD_REQUEST, format!("{e}.")).await,
        },
        None => None,
    };
    let notes = f.field("notes").to_string();
    let created = db::lines::create(
        &state.db,
        &NewLine {
            site_id: site.id,
            name: &name,
            orientation: &orientation,
            expected_interval_s: interval,
            notes: &notes,
            electrodes: &electrodes,
            sequence: seq.as_ref().map(|(n, s)| (file_stem(n), s)),
        },
    )
    .await;
    let (line, seq_row) = match created {
        Ok(x) => x,
        Err(DbError::Conflict { .. }) => {
            return refuse(StatusCode::CONFLICT, format!("A line named {name} already exists."))
                .await;
        }
        Err(e) => return Err(e.into()),
    };
    let detail = format!(
        "site {}, {} electrodes, {}",
        site.name,
        electrodes.len(),
        seq_row
            .map(|s| format!("sequence v{} with {} quadrupoles", s.version, s.n_quadrupoles))
            .unwrap_or_else(|| "no sequence".into())
    );
    audit(&state, who, "line.register", &line.name, &detail).await?;
    lines_page(
        &state,
        who,
        StatusCode::OK,
        &format!("Line {} registered: {detail}.", line.name),
        "",
    )
    .await
}

fn file_stem(name: &str) -> &str {
    let base = name.rsplit(['/', '\\']).next().unwrap_or(name);
    match base.rsplit_once('.') {
        Some((stem, _)) if !stem.is_empty() => stem,
        _ => base,
    }
}

struct SequenceView {
    version: i64,
    name: String,
    n_quadrupoles: i64,
    created: String,
}

struct TokenView {
    id: i64,
    label: String,
    created: String,
    state: String,
    active: bool,
    last_used: String,
}

#[derive(Template)]
#[template(path = "admin_line.html")]
struct LineAdminPage {
    chrome: Chrome,
    name: String,
    site: String,
    n_electrodes: usize,
    sequences: Vec<SequenceView>,
    tokens: Vec<TokenView>,
    notice: String,
    secret: String,
    error: String,
}

async fn line_page(
    state: &AppState,
    who: &SignedIn,
    name: &str,
    status: StatusCode,
    notice: &str,
    secret: &str,
    error: &str,
) -> Result<Response, PageError> {
    let line = db::lines::by_name(&state.db, name)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Line {name:?}")))?;
    let site = db::sites::by_id(&state.db, line.site_id).await?.map(|s| s.name).unwrap_or_default();
    let n_electrodes = db::lines::electrodes(&state.db, line.id).await?.len();
    let sequences = db::sequences::list(&state.db, line.id)
        .await?
        .into_iter()
        .map(|s| SequenceView {
            version: s.version,
            name: s.name,
            n_quadrupoles: s.n_quadrupoles,
            created: fmt_time(s.created_at),
        })
        .collect();
    let tokens = db::tokens::list(&state.db, line.id)
        .await?
        .into_iter()
        .map(|t| TokenView {
            id: t.id,
            label: t.label,
            created: fmt_time(t.created_at),
            state: t
                .revoked_at
                .map(|r| format!("revoked {}", fmt_time(r)))
                .unwrap_or_else(|| "active".into()),
            active: t.revoked_at.is_none(),
            last_used: t.last_used_at.map(fmt_time).unwrap_or_else(|| "never".into()),
        })
        .collect();
    render_with(
        status,
        &LineAdminPage {
            chrome: who.chrome("admin"),
            name: line.name,
            site,
            n_electrodes,
            sequences,
            tokens,
            notice: notice.into(),
            secret: secret.into(),
            error: error.into(),
        },
    )
}

/// `GET /admin/lines/{line}`.
pub async fn line(
    State(state): State<AppState>,
    who: SignedIn,
    Path(name): Path<String>,
) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    line_page(&state, &who, &name, StatusCode::OK, "", "", "").await
}

/// `POST /admin/lines/{line}/sequences` (multipart): stores the next version.
pub async fn upload_sequence(
    State(state): State<AppState>,
    Path(name): Path<String>,
    f: CsrfMultipart,
) -> Result<Response, PageError> {
    f.who.require(Role::Admin)?;
    let who = &f.who;
    let line = db::lines::by_name(&state.db, &name)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Line {name:?}")))?;
    let Some(file) = f.files.get("sequence") else {
        return line_page(
            &state,
            who,
            &name,
            StatusCode::BAD_REQUEST,
            "",
            "",
            "Choose a sequence CSV file.",
        )
        .await;
    };
    let geometry = db::lines::geometry(&state.db, line.id).await?;
    let seq = match files::read_sequence(&file.filename, file.text()?, &geometry) {
        Ok(s) => s,
        Err(e) => {
            return line_page(
                &state,
                who,
                &name,
                StatusCode::BAD_REQUEST,
                "",
                "",
                &format!("{e}."),
            )
            .await;
        }
    };
    let seq_name = match f.field("name") {
        "" => file_stem(&file.filename).to_string(),
        n => n.to_string(),
    };
    let row = db::sequences::create(&state.db, line.id, &seq_name, &seq).await?;
    let detail =
        format!("version {} {:?} with {} quadrupoles", row.version, row.name, row.n_quadrupoles);
    audit(&state, who, "sequence.upload", &line.name, &detail).await?;
    line_page(&state, who, &name, StatusCode::OK, &format!("Sequence stored as {detail}."), "", "")
        .await
}

/// The issue-token form.
#[derive(Debug, Deserialize)]
pub struct TokenForm {
    #[serde(default)]
    label: String,
}

/// `POST /admin/lines/{line}/tokens`: issues a meter token and shows it once.
pub async fn issue_token(
    State(state): State<AppState>,
    Path(name): Path<String>,
    f: CsrfForm<TokenForm>,
) -> Result<Response, PageError> {
    let CsrfForm { who, form } = f;
    who.require(Role::Admin)?;
    let line = db::lines::by_name(&state.db, &name)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Line {name:?}")))?;
    let secret = new_line_token();
    let t = db::tokens::insert(&state.db, line.id, &hash_token(&secret), form.label.trim()).await?;
    audit(&state, &who, "line_token.issue", &line.name, &format!("token {} {:?}", t.id, t.label))
        .await?;
    line_page(
        &state,
        &who,
        &name,
        StatusCode::OK,
        &format!("Token {} issued. Copy it now; it is not shown again:", t.id),
        &secret,
        "",
    )
    .await
}

/// `POST /admin/tokens/{id}/revoke`.
pub async fn revoke_token(
    State(state): State<AppState>,
    Path(id): Path<i64>,
    f: CsrfForm<Empty>,
) -> Result<Response, PageError> {
    let who = f.who;
    who.require(Role::Admin)?;
    let t = db::tokens::revoke(&state.db, id).await?;
    let line = db::lines::by_id(&state.db, t.line_id)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Line {}", t.line_id)))?;
    audit(&state, &who, "line_token.revoke", &line.name, &format!("token {id}")).await?;
    line_page(&state, &who, &line.name, StatusCode::OK, &format!("Token {id} revoked."), "", "")
        .await
}

struct AuditView {
    at: String,
    actor: String,
    action: String,
    target: String,
    detail: String,
}

#[derive(Template)]
#[template(path = "admin_audit.html")]
struct AuditPage {
    chrome: Chrome,
    events: Vec<AuditView>,
}

/// `GET /admin/audit`: the newest 200 administrative actions.
pub async fn audit_log(
    State(state): State<AppState>,
    who: SignedIn,
) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    let events = db::audit::recent(&state.db, 200)
        .await?
        .into_iter()
        .map(|e| AuditView {
            at: fmt_time(e.at),
            actor: e.actor,
            action: e.action,
            target: e.target,
            detail: e.detail,
        })
        .collect();
    render(&AuditPage { chrome: who.chrome("admin"), events })
}

/// Jobs of one kind per state.
struct JobCounts {
    kind: String,
    queued: i64,
    running: i64,
    done: i64,
    dead: i64,
}

struct JobView {
    id: i64,
    key: String,
    kind: String,
    worker: String,
    started: String,
    lease_until: String,
    finished: String,
    attempts: i64,
    last_error: String,
}

impl JobView {
    fn of(j: db::jobs::Job) -> Self {
        let t = |t: Option<chrono::DateTime<chrono::Utc>>| t.map(fmt_time).unwrap_or_default();
        Self {
            id: j.id,
            started: t(j.started_at),
            lease_until: t(j.lease_until),
            finished: t(j.finished_at),
            worker: j.worker.unwrap_or_default(),
            last_error: j.last_error.unwrap_or_default(),
            attempts: j.attempts,
            key: j.key,
            kind: j.kind,
        }
    }
}

#[derive(Template)]
#[template(path = "admin_jobs.html")]
struct JobsPage {
    chrome: Chrome,
    counts: Vec<JobCounts>,
    running: Vec<JobView>,
    dead: Vec<JobView>,
    notice: String,
    error: String,
}

/// Most running and dead jobs listed.
const JOBS_LISTED: i64 = 200;

async fn jobs_page(
    state: &AppState,
    who: &SignedIn,
    status: StatusCode,
    notice: &str,
    error: &str,
) -> Result<Response, PageError> {
    let mut counts: Vec<JobCounts> = Vec::new();
    for (st, kind, n) in db::jobs::counts(&state.db).await? {
        let i = match counts.iter().position(|c| c.kind == kind) {
            Some(i) => i,
            None => {
                counts.push(JobCounts { kind, queued: 0, running: 0, done: 0, dead: 0 });
                counts.len() - 1
            }
        };
        let c = &mut counts[i];
        match st.as_str() {
            "queued" => c.queued = n,
            "running" => c.running = n,
            "done" => c.done = n,
            _ => c.dead = n,
        }
    }
    let running = db::jobs::in_state(&state.db, "running", JOBS_LISTED).await?;
    let dead = db::jobs::in_state(&state.db, "dead", JOBS_LISTED).await?;
    render_with(
        status,
        &JobsPage {
            chrome: who.chrome("admin"),
            counts,
            running: running.into_iter().map(JobView::of).collect(),
            dead: dead.into_iter().map(JobView::of).collect(),
            notice: notice.into(),
            error: error.into(),
        },
    )
}

/// `GET /admin/jobs`: queue depth by kind and state, running and dead jobs.
pub async fn jobs(State(state): State<AppState>, who: SignedIn) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    jobs_page(&state, &who, StatusCode::OK, "", "").await
}

/// `POST /admin/jobs/{id}/requeue`: queues a dead job again, attempts reset.
pub async fn requeue_job(
    State(state): State<AppState>,
    Path(id): Path<i64>,
    f: CsrfForm<Empty>,
) -> Result<Response, PageError> {
    let who = f.who;
    who.require(Role::Admin)?;
    if !db::jobs::retry_dead(&state.db, id).await? {
        return jobs_page(
            &state,
            &who,
            StatusCode::CONFLICT,
            "",
            &format!("Job {id} is not dead (it may have been queued again already)."),
        )
        .await;
    }
    state.wake.notify_waiters();
    audit(&state, &who, "job.requeue", &format!("job {id}"), "").await?;
    jobs_page(&state, &who, StatusCode::OK, &format!("Job {id} queued again."), "").await
}

#[cfg(test)]
mod tests {
    use super::file_stem;

    #[test]
    fn sequence_names_come_from_file_names() {
        assert_eq!(file_stem("wenner-dd.csv"), "wenner-dd");
        assert_eq!(file_stem("C:\\meters\\dd.v2.csv"), "dd.v2");
        assert_eq!(file_stem("plain"), "plain");
        assert_eq!(file_stem(".csv"), ".csv");
    }
}
