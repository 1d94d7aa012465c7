//! The browser pages, served by `ohmline serve` itself: templates compiled
//! into the binary (askama, `web/templates/`), one stylesheet and one small
//! script (`web/static/`, included at compile time). Pages work without
//! JavaScript; every form POST carries the session's CSRF token; every
//! response carries the security headers of [`with_security_headers`]. Times are
//! shown in UTC.

pub mod admin;
pub mod error;
pub mod exports;
pub mod figures;
pub mod forms;
pub mod pages;
pub mod planning;
pub mod recipients;
pub mod review;
pub mod rules;
pub mod series;
pub mod view;

use axum::Router;
use axum::extract::Path;
use axum::http::{HeaderValue, StatusCode, header};
use axum::response::{Html, IntoResponse, Response};
use axum::routing::{get, post};
use tower_http::set_header::SetResponseHeaderLayer;

use crate::app::Routes;
use crate::config::WebConfig;
pub use error::PageError;

/// Content-Security-Policy of every response: only this origin's scripts,
/// styles and images, no inline script, no framing, forms post only here.
pub const CSP: &str = "default-src 'self'; script-src 'self'; style-src 'self'; \
    img-src 'self' data:; object-src 'none'; base-uri 'none'; form-action 'self'; \
    frame-ancestors 'none'";

/// Routes of the pages and their static files.
pub fn routes() -> Routes {
    Routes::new()
        .route("/", get(pages::home))
        .route("/sign-in", get(pages::sign_in_form).post(pages::sign_in))
        .route("/sign-out", post(pages::sign_out))
        .route("/account", get(pages::account))
        .route("/account/password", post(pages::change_password))
        .route("/overview", get(pages::overview))
        .route("/lines/{line}", get(pages::line))
        .route("/lines/{line}/epochs/{id}/{file}", get(figures::section))
        .route("/lines/{line}/quality", get(pages::quality))
        .route("/lines/{line}/quality/{file}", get(figures::quality))
        .route("/lines/{line}/export/{file}", get(exports::export))
        .route("/lines/{line}/series/{file}", get(series::chart))
        .route("/lines/{line}/{file}", get(figures::trend))
        .route("/sites/{id}/series", get(series::site).post(series::upload))
        .route("/alerts", get(review::alerts))
        .route("/alerts/{id}", get(review::alert))
        .route("/alerts/{id}/acknowledge", post(review::acknowledge))
        .route("/alerts/{id}/resolve", post(review::resolve))
        .route("/alerts/{id}/{file}", get(figures::alert_history))
        .route("/admin", get(admin::home))
        .route("/admin/users", get(admin::users).post(admin::add_user))
        .route("/admin/users/{id}/role", post(admin::set_role))
        .route("/admin/users/{id}/delete", post(admin::delete_user))
        .route("/admin/lines", get(admin::lines).post(admin::register_line))
        .route("/admin/sites", post(admin::add_site))
        .route("/admin/lines/{line}", get(admin::line))
        .route("/admin/lines/{line}/sequences", post(admin::upload_sequence))
        .route("/admin/lines/{line}/tokens", post(admin::issue_token))
        .route("/admin/rules", get(rules::rules_index))
        .route("/admin/lines/{line}/rules", get(rules::rules).post(rules::save_rules))
        .route("/admin/recipients", get(recipients::recipients).post(recipients::add_recipient))
        .route("/admin/recipients/{id}/remove", post(recipients::remove_recipient))
        .route("/admin/tokens/{id}/revoke", post(admin::revoke_token))
        .route("/admin/audit", get(admin::audit_log))
        .route("/admin/jobs", get(admin::jobs))
        .route("/admin/jobs/{id}/requeue", post(admin::requeue_job))
        .route("/admin/plan", get(planning::plan))
        .route("/admin/plan/sequence.csv", get(planning::sequence_csv))
        .route("/static/{file}", get(asset))
}

/// Adds the security headers to every response (pages, API, static files):
/// CSP ([`CSP`]), `X-Content-Type-Options: nosniff`, `Referrer-Policy:
/// same-origin`, `X-Frame-Options: DENY` for older browsers, and
/// `Strict-Transport-Security` when browsers reach the service over TLS
/// ([`WebConfig::hsts`]).
pub fn with_security_headers<S>(router: Router<S>, web: &WebConfig) -> Router<S>
where
    S: Clone + Send + Sync + 'static,
{
    let fixed =
        |name, value| SetResponseHeaderLayer::overriding(name, HeaderValue::from_static(value));
    let hsts = web.hsts().and_then(|v| HeaderValue::from_str(&v).ok());
    router
        .layer(fixed(header::CONTENT_SECURITY_POLICY, CSP))
        .layer(fixed(header::X_CONTENT_TYPE_OPTIONS, "nosniff"))
        .layer(fixed(header::REFERRER_POLICY, "same-origin"))
        .layer(fixed(header::X_FRAME_OPTIONS, "DENY"))
        .layer(SetResponseHeaderLayer::overriding(
            header::STRICT_TRANSPORT_SECURITY,
            move |_: &Response| hsts.clone(),
        ))
}

/// The static files, built into the binary.
const ASSETS: &[(&str, &str, &[u8])] = &[
    ("style.css", "text/css; charset=utf-8", include_bytes!("../../web/static/style.css")),
    ("app.js", "text/javascript; charset=utf-8", include_bytes!("../../web/static/app.js")),
];

/// `GET /static/{file}`.
async fn asset(Path(file): Path<String>) -> Response {
    match ASSETS.iter().find(|(name, _, _)| *name == file) {
        Some((_, mime, bytes)) => (
            [(header::CONTENT_TYPE, *mime), (header::CACHE_CONTROL, "public, max-age=3600")],
            *bytes,
        )
            .into_response(),
        None => (StatusCode::NOT_FOUND, "not found\n").into_response(),
    }
}

/// A rendered page, never cached (it shows a signed-in user's data).
pub fn html(status: StatusCode, body: String) -> Response {
    (status, [(header::CACHE_CONTROL, "no-store")], Html(body)).into_response()
}

/// Renders a template as a 200 page.
pub fn render<T: askama::Template>(t: &T) -> Result<Response, PageError> {
    Ok(html(StatusCode::OK, t.render()?))
}

/// Renders a template with a status.
pub fn render_with<T: askama::Template>(status: StatusCode, t: &T) -> Result<Response, PageError> {
    Ok(html(status, t.render()?))
}

#[cfg(test)]
mod tests {
    /// The CSP allows scripts and styles from this origin only: no template
    /// may carry an inline script, a `style` attribute or block, or an event
    /// handler attribute.
    #[test]
    fn templates_need_nothing_the_csp_forbids() {
        let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../web/templates");
        let mut n = 0;
        for entry in std::fs::read_dir(&dir).unwrap() {
            let path = entry.unwrap().path();
            let text = std::fs::read_to_string(&path).unwrap().to_ascii_lowercase();
            n += 1;
            for (i, _) in text.match_indices("<script") {
                let tag = &text[i..i + text[i..].find('>').unwrap()];
                assert!(tag.contains(" src="), "{}: inline script {tag}", path.display());
            }
            assert!(!text.contains("<style"), "{}: style block", path.display());
            assert!(!text.contains(" style="), "{}: style attribute", path.display());
            assert!(!text.contains("javascript:"), "{}: javascript: URL", path.display());
            for (i, _) in text.match_indices(" on") {
                let word: String =
                    text[i + 1..].chars().take_while(|c| c.is_ascii_alphabetic()).collect();
                let handler = text[i + 1 + word.len()..].starts_with('=');
                assert!(!handler, "{}: event handler attribute {word}", path.display());
            }
        }
        assert!(n >= 10, "templates found in {}", dir.display());
    }
}
