//! Admin page of the recipients of alert emails (`/admin/recipients`): list,
//! add (address, name, one site or every site, lowest level, per event or
//! daily digest only) and remove. The same rules as `ohmline recipient`; every
//! change is recorded in the audit trail.

use askama::Template;
use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::response::Response;
use serde::Deserialize;

use super::forms::{CsrfForm, SignedIn};
use super::pages::Empty;
use super::view::{Chrome, fmt_time};
use super::{PageError, render_with};
use crate::app::AppState;
use crate::auth::Role;
use crate::db::recipients::{Delivery, NewRecipient};
use crate::db::{self, DbError};

/// Highest level a recipient can start from (core allows up to 9 trigger levels).
const MAX_LEVEL: u8 = 9;

struct RecipientView {
    id: i64,
    email: String,
    name: String,
    site: String,
    levels: String,
    delivery: &'static str,
    added: String,
}

struct SiteOption {
    id: i64,
    name: String,
}

#[derive(Template)]
#[template(path = "admin_recipients.html")]
struct RecipientsPage {
    chrome: Chrome,
    recipients: Vec<RecipientView>,
    sites: Vec<SiteOption>,
    levels: Vec<u8>,
    notice: String,
    error: String,
}

fn levels_text(min_level: i64) -> String {
    if min_level <= 0 {
        "notices and every level".into()
    } else {
        format!("level {min_level} and above")
    }
}

async fn page(
    state: &AppState,
    who: &SignedIn,
    status: StatusCode,
    notice: &str,
    error: &str,
) -> Result<Response, PageError> {
    let recipients = db::recipients::list(&state.db)
        .await?
        .into_iter()
        .map(|r| RecipientView {
            id: r.id,
            site: r.site.unwrap_or_else(|| "every site".into()),
            levels: levels_text(r.min_level),
            delivery: if r.digest_only { "daily digest only" } else { "email per event" },
            added: fmt_time(r.created_at),
            email: r.email,
            name: r.name,
        })
        .collect();
    let sites = db::sites::list(&state.db)
        .await?
        .into_iter()
        .map(|s| SiteOption { id: s.id, name: s.name })
        .collect();
    render_with(
        status,
        &RecipientsPage {
            chrome: who.chrome("admin"),
            recipients,
            sites,
            levels: (1..=MAX_LEVEL).collect(),
            notice: notice.into(),
            error: error.into(),
        },
    )
}

/// `GET /admin/recipients`.
pub async fn recipients(
    State(state): State<AppState>,
    who: SignedIn,
) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    page(&state, &who, StatusCode::OK, "", "").await
}

/// The add-recipient form.
#[derive(Debug, Deserialize)]
pub struct AddRecipient {
    #[serde(default)]
    email: String,
    #[serde(default)]
    name: String,
    /// A site id, or empty for every site.
    #[serde(default)]
    site: String,
    /// Lowest level rank: 0 = notices and up.
    #[serde(default)]
    min_level: String,
    /// `event` or `digest`.
    #[serde(default)]
    delivery: String,
}

/// `POST /admin/recipients`.
pub async fn add_recipient(
    State(state): State<AppState>,
    f: CsrfForm<AddRecipient>,
) -> Result<Response, PageError> {
    let CsrfForm { who, form } = f;
    who.require(Role::Admin)?;
    let refuse = async |status: StatusCode, msg: String| page(&state, &who, status, "", &msg).await;
    let address: lettre::Address = match form.email.trim().parse() {
        Ok(a) => a,
        Err(_) => {
            return refuse(
                StatusCode::BAD_REQUEST,
                format!("E-mail address: {:?} is not an email address.", form.email.trim()),
            )
            .await;
        }
    };
    let name = form.name.trim();
    if name.chars().any(char::is_control) || name.chars().count() > 200 {
        return refuse(StatusCode::BAD_REQUEST, "Name: one line of at most 200 characters.".into())
            .await;
    }
    let site = match form.site.trim() {
        "" => None,
        s => {
            let found = match s.parse::<i64>() {
                Ok(id) => db::sites::by_id(&state.db, id).await?,
                Err(_) => None,
            };
            match found {
                Some(site) => Some(site),
                None => {
                    return refuse(StatusCode::BAD_REQUEST, format!("Site: there is no site {s}."))
                        .await;
                }
            }
        }
    };
    let min_level = match form.min_level.trim().parse::<u8>() {
        Ok(l) if l <= MAX_LEVEL => l,
        _ => {
            return refuse(
                StatusCode::BAD_REQUEST,
                format!(
                    "Lowest level: {:?} is not 0 (notices) or a level 1–{MAX_LEVEL}.",
                    form.min_level
                ),
            )
            .await;
        }
    };
    let delivery = match form.delivery.as_str() {
        "" | "event" => Delivery::PerEvent,
        "digest" => Delivery::DigestOnly,
        d => {
            return refuse(
                StatusCode::BAD_REQUEST,
                format!("Delivery: {d:?} is neither an email per event nor the daily digest."),
            )
            .await;
        }
    };
    let added = db::recipients::add(
        &state.db,
        &NewRecipient {
            email: &address,
            name,
            site_id: site.as_ref().map(|s| s.id),
            min_level,
            delivery,
        },
    )
    .await;
    let r = match added {
        Ok(r) => r,
        Err(DbError::Conflict { .. }) => {
            return refuse(
                StatusCode::CONFLICT,
                format!(
                    "{address} already receives the alerts of {}.",
                    site.map(|s| s.name).unwrap_or_else(|| "every site".into())
                ),
            )
            .await;
        }
        Err(e) => return Err(e.into()),
    };
    let detail = format!(
        "id {}, {}, {}, {}",
        r.id,
        r.site.clone().unwrap_or_else(|| "every site".into()),
        levels_text(r.min_level),
        if r.digest_only { "daily digest only" } else { "email per event" }
    );
    db::audit::record(&state.db, &who.user.email, "recipient.add", &r.email, &detail).await?;
    page(&state, &who, StatusCode::OK, &format!("Recipient {} added: {detail}.", r.email), "").await
}

/// `POST /admin/recipients/{id}/remove`: its undelivered emails are cancelled.
pub async fn remove_recipient(
    State(state): State<AppState>,
    Path(id): Path<i64>,
    f: CsrfForm<Empty>,
) -> Result<Response, PageError> {
    let who = f.who;
    who.require(Role::Admin)?;
    let removed = match db::recipients::remove(&state.db, id).await {
        Ok(r) => r,
        Err(DbError::NotFound { .. }) => {
            return Err(PageError::NotFound(format!("Recipient {id}")));
        }
        Err(e) => return Err(e.into()),
    };
    let detail = format!("id {id}, {} undelivered email(s) cancelled", removed.cancelled);
    db::audit::record(
        &state.db,
        &who.user.email,
        "recipient.remove",
        &removed.recipient.email,
        &detail,
    )
    .await?;
    page(
        &state,
        &who,
        StatusCode::OK,
        &format!("Recipient {} removed; {detail}.", removed.recipient.email),
        "",
    )
    .await
}
