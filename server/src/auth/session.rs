//! Browser sessions and CSRF protection.
//!
//! A session cookie holds 256 random bits; the server stores only their
//! SHA-256 and finds the session by it. A session ends when signed out, when
//! its user is deleted, after `idle` without a request, or `max_age` after
//! sign-in, whichever comes first. Every form of a session carries the
//! session's synchronizer token (OWASP CSRF Prevention Cheat Sheet, "synchronizer
//! token pattern"); a POST whose token differs is refused. The sign-in form,
//! which has no session yet, uses a short-lived cookie of its own as the token
//! (double-submit). Cookies are HttpOnly, SameSite=Lax, Path=/, and Secure
//! when the service's public URL is https.

use chrono::{DateTime, Duration, Utc};
use cookie::{Cookie, SameSite};
use subtle::ConstantTimeEq;
use thiserror::Error;

/// Name of the session cookie.
pub const SESSION_COOKIE: &str = "ohmline_session";
/// Name of the sign-in form's token cookie.
pub const SIGN_IN_COOKIE: &str = "ohmline_signin";
/// Life of the sign-in form's token cookie, s.
pub const SIGN_IN_COOKIE_S: i64 = 3600;

/// Session lifetimes that cannot be used.
#[derive(Debug, Error, PartialEq)]
pub enum SessionPolicyError {
    /// A lifetime is zero or negative.
    #[error("session lifetimes must be positive (idle {idle_s} s, maximum {max_s} s)")]
    NotPositive {
        /// Idle lifetime, s.
        idle_s: i64,
        /// Absolute lifetime, s.
        max_s: i64,
    },
    /// The idle lifetime exceeds the absolute one.
    #[error("the idle lifetime ({idle_s} s) exceeds the maximum lifetime ({max_s} s)")]
    IdleAboveMax {
        /// Idle lifetime, s.
        idle_s: i64,
        /// Absolute lifetime, s.
        max_s: i64,
    },
}

/// How long sessions live.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SessionPolicy {
    idle: Duration,
    max_age: Duration,
}

/// Whether a session may still be used.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SessionState {
    /// In use.
    Live,
    /// No request for longer than the idle lifetime.
    Idle,
    /// Signed in longer ago than the absolute lifetime.
    TooOld,
}

impl SessionPolicy {
    /// A policy; both lifetimes positive and `idle <= max_age`.
    pub fn new(idle: Duration, max_age: Duration) -> Result<Self, SessionPolicyError> {
        let (idle_s, max_s) = (idle.num_seconds(), max_age.num_seconds());
        if idle <= Duration::zero() || max_age <= Duration::zero() {
            return Err(SessionPolicyError::NotPositive { idle_s, max_s });
        }
        if idle > max_age {
            return Err(SessionPolicyError::IdleAboveMax { idle_s, max_s });
        }
        Ok(Self { idle, max_age })
    }

    /// Idle lifetime.
    pub fn idle(&self) -> Duration {
        self.idle
    }

    /// Absolute lifetime.
    pub fn max_age(&self) -> Duration {
        self.max_age
    }

    /// The state at `now` of a session created at `created` and last used at
    /// `last_seen`. A session exactly at a limit is still live.
    pub fn state(
        &self,
        created: DateTime<Utc>,
        last_seen: DateTime<Utc>,
        now: DateTime<Utc>,
    ) -> SessionState {
        if now - created > self.max_age {
            SessionState::TooOld
        } else if now - last_seen > self.idle {
            SessionState::Idle
        } else {
            SessionState::Live
        }
    }
}

/// Whether a submitted CSRF token equals the expected one, compared in constant
/// time. An empty expected token never matches.
pub fn csrf_matches(expected: &str, submitted: &str) -> bool {
    !expected.is_empty() && bool::from(expected.as_bytes().ct_eq(submitted.as_bytes()))
}

/// A cookie with the project's attributes; `max_age_s` None makes it expire now
/// (removal).
pub fn cookie(name: &'static str, value: String, secure: bool, max_age_s: Option<i64>) -> String {
    let mut c = Cookie::build((name, value))
        .http_only(true)
        .same_site(SameSite::Lax)
        .secure(secure)
        .path("/");
    c = match max_age_s {
        Some(s) => c.max_age(cookie::time::Duration::seconds(s)),
        None => c.max_age(cookie::time::Duration::ZERO),
    };
    c.build().to_string()
}

/// The value of cookie `name` in a request's `Cookie` headers.
pub fn cookie_value(headers: &axum::http::HeaderMap, name: &str) -> Option<String> {
    headers
        .get_all(axum::http::header::COOKIE)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| Cookie::split_parse(v.to_string()).filter_map(Result::ok))
        .find(|c| c.name() == name)
        .map(|c| c.value().to_string())
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::TimeZone;

    fn t(h: i64) -> DateTime<Utc> {
        Utc.with_ymd_and_hms(2026, 3, 1, 0, 0, 0).unwrap() + Duration::hours(h)
    }

    fn check(created_h: i64, seen_h: i64, now_h: i64, expected: SessionState) {
        let p = SessionPolicy::new(Duration::hours(12), Duration::hours(24 * 7)).unwrap();
        assert_eq!(
            p.state(t(created_h), t(seen_h), t(now_h)),
            expected,
            "{created_h} {seen_h} {now_h}"
        );
    }

    #[test]
    fn sessions_expire_when_idle_or_too_old() {
        check(0, 0, 0, SessionState::Live);
        check(0, 0, 12, SessionState::Live); // exactly at the idle limit
        check(0, 0, 13, SessionState::Idle);
        check(0, 160, 168, SessionState::Live); // exactly at the absolute limit
        check(0, 168, 169, SessionState::TooOld);
        check(0, 100, 200, SessionState::TooOld); // both: too old wins
    }

    #[test]
    fn policies_are_validated() {
        assert!(SessionPolicy::new(Duration::zero(), Duration::hours(1)).is_err());
        assert_eq!(
            SessionPolicy::new(Duration::hours(2), Duration::hours(1)),
            Err(SessionPolicyError::IdleAboveMax { idle_s: 7200, max_s: 3600 })
        );
    }

    #[test]
    fn csrf_tokens_must_match_exactly() {
        let token = "6f1c0e2a9b";
        assert!(csrf_matches(token, "6f1c0e2a9b"));
        for bad in ["", "6f1c0e2a9", "6f1c0e2a9c", "6F1C0E2A9B", "6f1c0e2a9b "] {
            assert!(!csrf_matches(token, bad), "{bad:?}");
        }
        assert!(!csrf_matches("", ""), "an empty expected token never matches");
    }

    #[test]
    fn cookies_carry_the_security_attributes() {
        let c = cookie(SESSION_COOKIE, "abc".into(), true, Some(60));
        for part in
            ["ohmline_session=abc", "HttpOnly", "SameSite=Lax", "Secure", "Path=/", "Max-Age=60"]
        {
            assert!(c.contains(part), "{c} lacks {part}");
        }
        let c = cookie(SESSION_COOKIE, String::new(), false, None);
        assert!(c.contains("Max-Age=0") && !c.contains("Secure"), "{c}");

        let mut h = axum::http::HeaderMap::new();
        h.append(axum::http::header::COOKIE, "a=1; ohmline_session=xyz".parse().unwrap());
        assert_eq!(cookie_value(&h, SESSION_COOKIE).as_deref(), Some("xyz"));
        assert_eq!(cookie_value(&h, "b"), None);
    }
}
