//! Who is signed in, and the forms they post. Handlers get form data only
//! through [`CsrfForm`] and [`CsrfMultipart`], which refuse a body whose `csrf`
//! field differs from the session's token — so no form POST can skip the check.

use std::collections::HashMap;
use std::net::{IpAddr, Ipv4Addr, SocketAddr};

use axum::extract::{
    ConnectInfo, FromRequest, FromRequestParts, Multipart, OptionalFromRequestParts, Request,
};
use axum::http::Method;
use axum::http::request::Parts;
use serde::Deserialize;
use serde::de::DeserializeOwned;

use super::error::PageError;
use super::view::Chrome;
use crate::app::AppState;
use crate::auth::session::csrf_matches;
use crate::auth::{self, Role, Via};
use crate::db::sessions::SessionRow;
use crate::db::users::User;

/// Largest URL-encoded form body, bytes.
const FORM_LIMIT: usize = 64 * 1024;

/// A request with a live browser session.
#[derive(Debug, Clone)]
pub struct SignedIn {
    /// The user.
    pub user: User,
    /// Their session.
    pub session: SessionRow,
}

impl SignedIn {
    /// Refuses users below `role`.
    pub fn require(&self, role: Role) -> Result<(), PageError> {
        if self.user.role.allows(role) {
            Ok(())
        } else {
            tracing::warn!(user = %self.user.email, needed = %role, "page refused: role");
            Err(PageError::Forbidden(format!("This needs the {role} role.")))
        }
    }

    /// The page frame for this user.
    pub fn chrome(&self, section: &'static str) -> Chrome {
        Chrome::user(&self.user, &self.session.csrf_token, section)
    }
}

impl FromRequestParts<AppState> for SignedIn {
    type Rejection = PageError;

    async fn from_request_parts(parts: &mut Parts, state: &AppState) -> Result<Self, PageError> {
        match auth::session_user(state, &parts.headers).await? {
            Some(auth::UserCaller { user, via: Via::Session(session) }) => {
                Ok(SignedIn { user, session })
            }
            _ => {
                let next = if parts.method == Method::GET {
                    parts.uri.path_and_query().map(|p| p.to_string()).unwrap_or_default()
                } else {
                    "/overview".into()
                };
                Err(PageError::SignInRequired { next })
            }
        }
    }
}

impl OptionalFromRequestParts<AppState> for SignedIn {
    type Rejection = PageError;

    async fn from_request_parts(
        parts: &mut Parts,
        state: &AppState,
    ) -> Result<Option<Self>, PageError> {
        match <SignedIn as FromRequestParts<AppState>>::from_request_parts(parts, state).await {
            Ok(s) => Ok(Some(s)),
            Err(PageError::SignInRequired { .. }) => Ok(None),
            Err(e) => Err(e),
        }
    }
}

/// The client's address: the TCP peer, or 0.0.0.0 when the server was started
/// without connection information.
#[derive(Debug, Clone, Copy)]
pub struct ClientIp(pub IpAddr);

impl<S: Send + Sync> FromRequestParts<S> for ClientIp {
    type Rejection = std::convert::Infallible;

    async fn from_request_parts(parts: &mut Parts, _: &S) -> Result<Self, Self::Rejection> {
        Ok(ClientIp(
            parts
                .extensions
                .get::<ConnectInfo<SocketAddr>>()
                .map(|c| c.0.ip())
                .unwrap_or(IpAddr::V4(Ipv4Addr::UNSPECIFIED)),
        ))
    }
}

#[derive(Deserialize)]
struct CsrfField {
    #[serde(default)]
    csrf: String,
}

fn check_csrf(who: &SignedIn, submitted: &str) -> Result<(), PageError> {
    if csrf_matches(&who.session.csrf_token, submitted) {
        Ok(())
    } else {
        tracing::warn!(user = %who.user.email, "form refused: CSRF token missing or wrong");
        Err(PageError::CsrfRejected)
    }
}

/// A URL-encoded form posted from a page of this session.
#[derive(Debug)]
pub struct CsrfForm<T> {
    /// Who posted it.
    pub who: SignedIn,
    /// The fields.
    pub form: T,
}

impl<T: DeserializeOwned + Send> FromRequest<AppState> for CsrfForm<T> {
    type Rejection = PageError;

    async fn from_request(req: Request, state: &AppState) -> Result<Self, PageError> {
        let (mut parts, body) = req.into_parts();
        let who =
            <SignedIn as FromRequestParts<AppState>>::from_request_parts(&mut parts, state).await?;
        let bytes = axum::body::to_bytes(body, FORM_LIMIT).await.map_err(|_| {
            PageError::TooLarge(format!("A form may hold at most {FORM_LIMIT} bytes."))
        })?;
        let token: CsrfField =
            serde_urlencoded::from_bytes(&bytes).unwrap_or(CsrfField { csrf: String::new() });
        check_csrf(&who, &token.csrf)?;
        let form = serde_urlencoded::from_bytes(&bytes)
            .map_err(|e| PageError::BadRequest(format!("The form could not be read: {e}.")))?;
        Ok(CsrfForm { who, form })
    }
}

/// A file sent with a multipart form.
#[derive(Debug, Clone)]
pub struct UploadedFile {
    /// File name as sent by the browser.
    pub filename: String,
    /// Content.
    pub bytes: Vec<u8>,
}

impl UploadedFile {
    /// The content as UTF-8 text.
    pub fn text(&self) -> Result<&str, PageError> {
        std::str::from_utf8(&self.bytes)
            .map_err(|_| PageError::BadRequest(format!("{} is not UTF-8 text.", self.filename)))
    }
}

/// A multipart form (with file uploads) posted from a page of this session.
#[derive(Debug)]
pub struct CsrfMultipart {
    /// Who posted it.
    pub who: SignedIn,
    /// Text fields by name.
    pub fields: HashMap<String, String>,
    /// Files by field name (a file input left empty is absent).
    pub files: HashMap<String, UploadedFile>,
}

impl CsrfMultipart {
    /// A text field, trimmed; empty when absent.
    pub fn field(&self, name: &str) -> &str {
        self.fields.get(name).map(|s| s.trim()).unwrap_or("")
    }
}

impl FromRequest<AppState> for CsrfMultipart {
    type Rejection = PageError;

    async fn from_request(req: Request, state: &AppState) -> Result<Self, PageError> {
        let (mut parts, body) = req.into_parts();
        let who =
            <SignedIn as FromRequestParts<AppState>>::from_request_parts(&mut parts, state).await?;
        let req = Request::from_parts(parts, body);
        let bad = |e: axum::extract::multipart::MultipartError| {
            PageError::BadRequest(format!("The form could not be read: {e}."))
        };
        let mut multipart = match Multipart::from_request(req, state).await {
            Ok(m) => m,
            // Not multipart at all: there is no token either.
            Err(_) => return Err(check_csrf(&who, "").expect_err("empty tokens never match")),
        };
        let (mut fields, mut files) = (HashMap::new(), HashMap::new());
        while let Some(field) = multipart.next_field().await.map_err(bad)? {
            let name = field.name().unwrap_or("").to_string();
            match field.file_name().map(str::to_string) {
                Some(filename) => {
                    let bytes = field.bytes().await.map_err(bad)?.to_vec();
                    if !(filename.is_empty() && bytes.is_empty()) {
                        files.insert(name, UploadedFile { filename, bytes });
                    }
                }
                None => {
                    fields.insert(name, field.text().await.map_err(bad)?);
                }
            }
        }
        check_csrf(&who, fields.get("csrf").map(String::as_str).unwrap_or(""))?;
        Ok(CsrfMultipart { who, fields, files })
    }
}
