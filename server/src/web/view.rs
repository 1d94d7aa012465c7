//! What pages show, computed from stored rows: the page frame ([`Chrome`]),
//! times and durations as text, and whether a line is late.
//!
//! A line is late when its newest epoch started more than twice its expected
//! interval ago (the product's rule for the overview, issue 7; the factor 2 is
//! common practice, no source: it tolerates one missed upload).

use chrono::{DateTime, Duration, SecondsFormat, Utc};

use crate::auth::Role;
use crate::db::users::User;

/// The frame around every page: who is signed in, their CSRF token for the
/// sign-out form, and which navigation entry is current.
#[derive(Debug, Clone)]
pub struct Chrome {
    /// Someone is signed in.
    pub signed_in: bool,
    /// Their e-mail address.
    pub email: String,
    /// Their role.
    pub role: &'static str,
    /// They see the admin navigation.
    pub is_admin: bool,
    /// The session's CSRF token.
    pub csrf: String,
    /// Current navigation entry: `overview`, `admin`, `account` or empty.
    pub section: &'static str,
    /// Program version.
    pub version: &'static str,
}

impl Chrome {
    /// The frame for a signed-in user.
    pub fn user(user: &User, csrf: &str, section: &'static str) -> Self {
        Self {
            signed_in: true,
            email: user.email.clone(),
            role: user.role.as_str(),
            is_admin: user.role.allows(Role::Admin),
            csrf: csrf.to_string(),
            section,
            version: env!("CARGO_PKG_VERSION"),
        }
    }

    /// The frame for nobody signed in (sign-in and error pages).
    pub fn anonymous() -> Self {
        Self {
            signed_in: false,
            email: String::new(),
            role: "",
            is_admin: false,
            csrf: String::new(),
            section: "",
            version: env!("CARGO_PKG_VERSION"),
        }
    }
}

/// Whether a line reports on time.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Timeliness {
    /// No epoch stored yet.
    NoEpochs,
    /// The newest epoch is within twice the expected interval.
    OnTime,
    /// Silent for longer than twice the expected interval.
    Late {
        /// Time since the newest epoch started.
        silent_for: Duration,
    },
}

impl Timeliness {
    /// Of a line whose newest epoch started at `last`, expected every
    /// `expected`, seen at `now`.
    pub fn of(last: Option<DateTime<Utc>>, expected: Duration, now: DateTime<Utc>) -> Self {
        match last {
            None => Timeliness::NoEpochs,
            Some(t) if now - t > expected * 2 => Timeliness::Late { silent_for: now - t },
            Some(_) => Timeliness::OnTime,
        }
    }

    /// Short label.
    pub fn label(&self) -> &'static str {
        match self {
            Timeliness::NoEpochs => "No epochs yet",
            Timeliness::OnTime => "On time",
            Timeliness::Late { .. } => "Late",
        }
    }

    /// CSS class of the label.
    pub fn class(&self) -> &'static str {
        match self {
            Timeliness::NoEpochs => "state-none",
            Timeliness::OnTime => "state-ok",
            Timeliness::Late { .. } => "state-late",
        }
    }
}

/// A time as `2026-03-05 06:00 UTC`.
pub fn fmt_time(t: DateTime<Utc>) -> String {
    t.format("%Y-%m-%d %H:%M UTC").to_string()
}

/// A time for a `<time datetime>` attribute (RFC 3339, ms, `Z`).
pub fn iso(t: DateTime<Utc>) -> String {
    t.to_rfc3339_opts(SecondsFormat::Millis, true)
}

/// A duration as at most two units: `40 s`, `12 min`, `3 h 5 min`, `2 d 4 h`.
/// Negative durations (clock skew) read as `0 s`.
pub fn fmt_duration(d: Duration) -> String {
    let s = d.num_seconds().max(0);
    let (days, hours, mins) = (s / 86_400, s % 86_400 / 3600, s % 3600 / 60);
    match () {
        _ if s < 60 => format!("{s} s"),
        _ if s < 3600 => format!("{mins} min"),
        _ if s < 86_400 && mins == 0 => format!("{hours} h"),
        _ if s < 86_400 => format!("{hours} h {mins} min"),
        _ if hours == 0 => format!("{days} d"),
        _ => format!("{days} d {hours} h"),
    }
}

/// The number of epochs expected in 24 h at an interval of `interval_s`
/// seconds, as text (`4`, `0.5`).
pub fn expected_per_day(interval_s: i64) -> String {
    let n = 86_400.0 / interval_s.max(1) as f64;
    if (n - n.round()).abs() < 0.05 { format!("{}", n.round()) } else { format!("{n:.1}") }
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::TimeZone;

    fn at(h: i64, m: i64) -> DateTime<Utc> {
        Utc.with_ymd_and_hms(2026, 3, 1, 0, 0, 0).unwrap()
            + Duration::hours(h)
            + Duration::minutes(m)
    }

    fn check(last: Option<DateTime<Utc>>, now: DateTime<Utc>, expected: Timeliness) {
        assert_eq!(Timeliness::of(last, Duration::hours(6), now), expected, "{last:?} at {now}");
    }

    #[test]
    fn a_line_is_late_after_twice_its_interval() {
        check(None, at(0, 0), Timeliness::NoEpochs);
        check(Some(at(0, 0)), at(6, 0), Timeliness::OnTime);
        check(Some(at(0, 0)), at(12, 0), Timeliness::OnTime); // exactly 2× is not late
        check(Some(at(0, 0)), at(12, 1), Timeliness::Late { silent_for: Duration::minutes(721) });
        check(Some(at(5, 0)), at(0, 0), Timeliness::OnTime); // future epoch (clock skew)
    }

    #[test]
    fn durations_and_times_read_naturally() {
        for (secs, text) in [
            (-5, "0 s"),
            (40, "40 s"),
            (720, "12 min"),
            (3 * 3600, "3 h"),
            (3 * 3600 + 300, "3 h 5 min"),
            (2 * 86_400, "2 d"),
            (2 * 86_400 + 4 * 3600 + 59, "2 d 4 h"),
        ] {
            assert_eq!(fmt_duration(Duration::seconds(secs)), text);
        }
        assert_eq!(fmt_time(at(6, 5)), "2026-03-01 06:05 UTC");
        assert_eq!(iso(at(6, 5)), "2026-03-01T06:05:00.000Z");
        assert_eq!(expected_per_day(6 * 3600), "4");
        assert_eq!(expected_per_day(48 * 3600), "0.5");
        assert_eq!(expected_per_day(7 * 3600), "3.4");
    }
}
