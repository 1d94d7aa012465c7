//! Credentials and who is calling.
//!
//! - Line tokens (`ohl_…`): random 256-bit secrets of field meters, scoped to
//!   one line; upload that line's epochs and read its data.
//! - Personal tokens (`ohu_…`): random 256-bit secrets of users, for scripts;
//!   read every line with the user's role.
//! - Browser sessions ([`session`]): a cookie after signing in with e-mail and
//!   password ([`password`]); failed sign-ins are limited ([`limiter`]).
//!
//! Only SHA-256 hashes of tokens and session secrets are stored (a fast hash is
//! right for high-entropy secrets: there is nothing to guess). Roles are
//! ordered: viewer < engineer < admin; a role allows everything a lower one
//! does.

pub mod limiter;
pub mod password;
pub mod session;

use std::fmt;
use std::str::FromStr;

use axum::extract::FromRequestParts;
use axum::http::header::AUTHORIZATION;
use axum::http::request::Parts;
use axum::http::{HeaderMap, Method};
use chrono::Duration;
use rand::RngCore;
use serde::Serialize;
use sha2::{Digest, Sha256};

use crate::app::AppState;
use crate::db::sessions::SessionRow;
use crate::db::users::User;
use crate::db::{self, DbResult, tokens::LineToken};
use crate::error::ApiError;
use session::{SESSION_COOKIE, SessionPolicy, SessionState};

/// Prefix of line tokens, so a leaked one is recognisable.
pub const LINE_TOKEN_PREFIX: &str = "ohl_";
/// Prefix of personal (user) tokens.
pub const USER_TOKEN_PREFIX: &str = "ohu_";

/// 256 random bits as 64 hex digits.
pub fn random_secret() -> String {
    let mut bytes = [0u8; 32];
    rand::rng().fill_bytes(&mut bytes);
    hex::encode(bytes)
}

/// A new random line token: the prefix and 64 hex digits (256 bits).
pub fn new_line_token() -> String {
    format!("{LINE_TOKEN_PREFIX}{}", random_secret())
}

/// A new random personal token: the prefix and 64 hex digits (256 bits).
pub fn new_user_token() -> String {
    format!("{USER_TOKEN_PREFIX}{}", random_secret())
}

/// The stored form of a token or session secret (SHA-256, hex).
pub fn hash_token(token: &str) -> String {
    hex::encode(Sha256::digest(token.as_bytes()))
}

/// What a user may do. Ordered: each role includes the ones below it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Role {
    /// Reads everything.
    Viewer,
    /// Also acknowledges and resolves alerts and adds notes.
    Engineer,
    /// Also manages users, sites, lines, sequences and tokens.
    Admin,
}

impl Role {
    /// Every role, lowest first.
    pub const ALL: [Role; 3] = [Role::Viewer, Role::Engineer, Role::Admin];

    /// The stored and displayed name.
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Viewer => "viewer",
            Role::Engineer => "engineer",
            Role::Admin => "admin",
        }
    }

    /// Whether this role may do what `needed` may.
    pub fn allows(self, needed: Role) -> bool {
        self >= needed
    }
}

impl fmt::Display for Role {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// A role name that is not one of viewer, engineer, admin.
#[derive(Debug, thiserror::Error, PartialEq)]
#[error("unknown role {0:?}: use viewer, engineer or admin")]
pub struct UnknownRole(pub String);

impl FromStr for Role {
    type Err = UnknownRole;
    fn from_str(s: &str) -> Result<Role, UnknownRole> {
        match s.trim().to_ascii_lowercase().as_str() {
            "viewer" => Ok(Role::Viewer),
            "engineer" => Ok(Role::Engineer),
            "admin" => Ok(Role::Admin),
            _ => Err(UnknownRole(s.to_string())),
        }
    }
}

/// An e-mail address that cannot be used for a user.
#[derive(Debug, thiserror::Error, PartialEq)]
#[error("{0:?} is not a usable e-mail address")]
pub struct InvalidEmail(pub String);

/// An e-mail address trimmed and lower-cased, if it has the shape
/// `local@domain` (one `@`, both parts non-empty, the domain with a dot, no
/// spaces or control characters, at most 254 bytes — RFC 5321 §4.5.3.1.3).
pub fn normalise_email(raw: &str) -> Result<String, InvalidEmail> {
    let e = raw.trim().to_lowercase();
    let ok = e.len() <= 254
        && !e.chars().any(|c| c.is_whitespace() || c.is_control())
        && matches!(e.split_once('@'), Some((l, d)) if !l.is_empty() && d.contains('.')
            && !d.starts_with('.') && !d.ends_with('.') && !d.contains('@'));
    if ok { Ok(e) } else { Err(InvalidEmail(raw.to_string())) }
}

/// A request authenticated by a line token (meters only).
#[derive(Debug, Clone)]
pub struct MeterAuth {
    /// The token used.
    pub token: LineToken,
}

impl MeterAuth {
    /// Refuses access to any line but the token's own.
    pub fn require_line(&self, line_id: i64) -> Result<(), ApiError> {
        if self.token.line_id == line_id {
            Ok(())
        } else {
            Err(ApiError::Forbidden("this token belongs to another line".into()))
        }
    }
}

impl FromRequestParts<AppState> for MeterAuth {
    type Rejection = ApiError;

    async fn from_request_parts(parts: &mut Parts, state: &AppState) -> Result<Self, ApiError> {
        match Caller::from_request_parts(parts, state).await? {
            Caller::Line(token) => Ok(MeterAuth { token }),
            Caller::User(_) => Err(ApiError::Forbidden("this needs a line token".into())),
        }
    }
}

/// How a user proved who they are.
#[derive(Debug, Clone, PartialEq)]
pub enum Via {
    /// A personal token (its id).
    Token(i64),
    /// A browser session.
    Session(SessionRow),
}

/// A signed-in user.
#[derive(Debug, Clone, PartialEq)]
pub struct UserCaller {
    /// The user.
    pub user: User,
    /// The credential used.
    pub via: Via,
}

/// Whoever made a request to the API.
#[derive(Debug, Clone)]
pub enum Caller {
    /// A meter, by its line token.
    Line(LineToken),
    /// A user, by personal token or (for reads) browser session.
    User(UserCaller),
}

impl Caller {
    /// Allows reading line `line_id`: every user; a line token only for its line.
    pub fn require_line(&self, line_id: i64) -> Result<(), ApiError> {
        match self {
            Caller::Line(t) if t.line_id == line_id => Ok(()),
            Caller::Line(_) => {
                Err(ApiError::Forbidden("this token belongs to another line".into()))
            }
            Caller::User(_) => Ok(()),
        }
    }

    /// Allows uploading epochs to line `line_id`: only that line's token.
    pub fn require_upload(&self, line_id: i64) -> Result<(), ApiError> {
        match self {
            Caller::User(_) => {
                Err(ApiError::Forbidden("epochs are uploaded with the line's meter token".into()))
            }
            line => line.require_line(line_id),
        }
    }

    /// The one line a caller may see, or None for all lines.
    pub fn line_scope(&self) -> Option<i64> {
        match self {
            Caller::Line(t) => Some(t.line_id),
            Caller::User(_) => None,
        }
    }

    /// The user, if they hold at least `role`.
    pub fn require_role(&self, role: Role) -> Result<&User, ApiError> {
        match self {
            Caller::User(u) if u.user.role.allows(role) => Ok(&u.user),
            Caller::User(_) => Err(ApiError::Forbidden(format!("this needs the {role} role"))),
            Caller::Line(_) => Err(ApiError::Forbidden("a line token cannot do this".into())),
        }
    }
}

fn bearer(headers: &HeaderMap) -> Option<Result<&str, ApiError>> {
    let value = headers.get(AUTHORIZATION)?;
    Some(
        value
            .to_str()
            .ok()
            .and_then(|v| v.strip_prefix("Bearer ").or_else(|| v.strip_prefix("bearer ")))
            .map(str::trim)
            .ok_or(ApiError::Unauthorized),
    )
}

impl FromRequestParts<AppState> for Caller {
    type Rejection = ApiError;

    async fn from_request_parts(parts: &mut Parts, state: &AppState) -> Result<Self, ApiError> {
        if let Some(secret) = bearer(&parts.headers) {
            let secret = secret?;
            if secret.starts_with(LINE_TOKEN_PREFIX) {
                let token = db::tokens::find_active(&state.db, &hash_token(secret))
                    .await?
                    .ok_or(ApiError::Unauthorized)?;
                db::tokens::touch(&state.db, token.id).await?;
                return Ok(Caller::Line(token));
            }
            if secret.starts_with(USER_TOKEN_PREFIX) {
                let token = db::user_tokens::find_active(&state.db, &hash_token(secret))
                    .await?
                    .ok_or(ApiError::Unauthorized)?;
                let user = db::users::by_id(&state.db, token.user_id)
                    .await?
                    .ok_or(ApiError::Unauthorized)?;
                db::user_tokens::touch(&state.db, token.id).await?;
                return Ok(Caller::User(UserCaller { user, via: Via::Token(token.id) }));
            }
            return Err(ApiError::Unauthorized);
        }
        // A browser session may read; anything else it does goes through the
        // pages' forms, which carry a CSRF token.
        if parts.method == Method::GET || parts.method == Method::HEAD {
            if let Some(u) = session_user(state, &parts.headers).await? {
                return Ok(Caller::User(u));
            }
        }
        Err(ApiError::Unauthorized)
    }
}

/// The session policy in effect.
pub fn session_policy(state: &AppState) -> SessionPolicy {
    let w = &state.config.web;
    SessionPolicy::new(
        Duration::seconds(w.session_idle_s as i64),
        Duration::seconds(w.session_max_s as i64),
    )
    .expect("the configuration validates session lifetimes")
}

/// The user of the request's session cookie, if it names a live session of an
/// existing user. An expired session is deleted.
pub async fn session_user(state: &AppState, headers: &HeaderMap) -> DbResult<Option<UserCaller>> {
    let Some(secret) = session::cookie_value(headers, SESSION_COOKIE) else {
        return Ok(None);
    };
    let Some(s) = db::sessions::find(&state.db, &hash_token(&secret)).await? else {
        return Ok(None);
    };
    match session_policy(state).state(s.created_at, s.last_seen_at, db::now()) {
        SessionState::Live => {}
        SessionState::Idle | SessionState::TooOld => {
            db::sessions::delete(&state.db, s.id).await?;
            return Ok(None);
        }
    }
    let Some(user) = db::users::by_id(&state.db, s.user_id).await? else {
        return Ok(None);
    };
    db::sessions::touch(&state.db, s.id).await?;
    Ok(Some(UserCaller { user, via: Via::Session(s) }))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tokens_are_long_random_and_hash_stably() {
        let (a, b) = (new_line_token(), new_line_token());
        assert_ne!(a, b);
        assert_eq!(a.len(), LINE_TOKEN_PREFIX.len() + 64);
        assert!(new_user_token().starts_with(USER_TOKEN_PREFIX));
        assert_eq!(hash_token(&a), hash_token(&a));
        // SHA-256 of "abc" (FIPS 180-2, appendix B.1).
        assert_eq!(
            hash_token("abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    fn check(role: Role, needed: Role, allowed: bool) {
        assert_eq!(role.allows(needed), allowed, "{role} doing what {needed} may");
    }

    #[test]
    fn roles_include_the_lower_ones() {
        use Role::*;
        for (role, needed, allowed) in [
            (Viewer, Viewer, true),
            (Viewer, Engineer, false),
            (Viewer, Admin, false),
            (Engineer, Viewer, true),
            (Engineer, Engineer, true),
            (Engineer, Admin, false),
            (Admin, Viewer, true),
            (Admin, Engineer, true),
            (Admin, Admin, true),
        ] {
            check(role, needed, allowed);
        }
        for r in Role::ALL {
            assert_eq!(r.as_str().parse::<Role>(), Ok(r));
        }
        assert_eq!(" Admin ".parse::<Role>(), Ok(Admin));
        assert!("root".parse::<Role>().is_err());
    }

    #[test]
    fn email_addresses_are_normalised_or_refused() {
        assert_eq!(
            normalise_email("  Duty.Engineer@Levee.Example "),
            Ok("duty.engineer@levee.example".into())
        );
        for bad in
            ["", "a", "a@b", "@b.org", "a@.org", "a@b.", "a b@c.org", "a@b@c.org", "a\u{7}@b.org"]
        {
            assert!(normalise_email(bad).is_err(), "{bad:?}");
        }
        assert!(normalise_email(&format!("{}@b.org", "x".repeat(250))).is_err());
    }

    fn line_token(line_id: i64) -> Caller {
        Caller::Line(LineToken {
            id: 1,
            line_id,
            label: String::new(),
            created_at: db::now(),
            revoked_at: None,
            last_used_at: None,
        })
    }

    fn user(role: Role) -> Caller {
        let t = db::now();
        Caller::User(UserCaller {
            user: User {
                id: 1,
                email: "a@example.org".into(),
                role,
                created_at: t,
                password_changed_at: t,
            },
            via: Via::Token(1),
        })
    }

    #[test]
    fn callers_reach_what_their_credential_allows() {
        let own = line_token(7);
        assert!(own.require_line(7).is_ok() && own.require_upload(7).is_ok());
        assert!(own.require_line(8).is_err() && own.require_upload(8).is_err());
        assert!(own.require_role(Role::Viewer).is_err());
        assert_eq!(own.line_scope(), Some(7));
        let viewer = user(Role::Viewer);
        assert!(viewer.require_line(8).is_ok());
        assert!(viewer.require_upload(8).is_err(), "users do not upload epochs");
        assert_eq!(viewer.line_scope(), None);
        assert!(viewer.require_role(Role::Viewer).is_ok());
        assert!(viewer.require_role(Role::Engineer).is_err());
        assert!(user(Role::Admin).require_role(Role::Engineer).is_ok());
    }
}
