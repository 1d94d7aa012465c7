//! Alert notifications: what the duty engineer receives when an alert is raised,
//! escalated, acknowledged or resolved.
//!
//! The alert pipeline describes one alert event as an [`AlertNotice`] (plain data:
//! site, line, level, where, how much, since when, how sure, link, figures) and
//! writes it with [`enqueue`], or with the crate-internal `db::outbox::enqueue_notice!`
//! inside the transaction that stores the alert transition, so the transition and
//! its emails commit together. From there:
//!
//! - [`email`] renders the notice (subject, plain-text and HTML parts, PNG
//!   attachments, the caution of [`CAUTION`] in both parts) and the daily digest;
//! - [`crate::db::outbox`] stores one rendered message and one outbox row per
//!   matching recipient, each with its Message-ID fixed at that moment; rows over a
//!   recipient's hourly limit, and every row of a digest-only recipient, wait for
//!   the next daily digest instead of being dropped;
//! - [`worker`] (started by `ohmline serve`) claims due rows under a lease, sends
//!   them over SMTP with `lettre` (or writes `.eml` files when no SMTP server is
//!   configured), retries failures with exponential back-off, and builds the daily
//!   digests;
//! - [`cap`] renders an alert as an OASIS CAP 1.2 document and an Atom index of
//!   recent alerts.
//!
//! **Delivery guarantee.** An outbox row is written in the same transaction as
//! the alert event, so a crash cannot lose it; it is marked sent only after the
//! SMTP server accepted the message. SMTP therefore gives *at-least-once*
//! delivery: a crash (or a lost reply) between the server's acceptance and the
//! mark sends the message again once the lease expires. Every copy carries the
//! same Message-ID, fixed when the row was written, so mail clients that drop
//! messages with a Message-ID they already hold hide that rare duplicate. Written
//! `.eml` files are named after the row, so a repeat overwrites the same file.
//!
//! **Wiring (for the alert pipeline).** For every stored transition of an alert
//! (ohmline-core `alerts::Transition`: raise, escalation, acknowledgement,
//! resolution) build the notice from the alert's latest `Detail` with
//! [`DetailFacts::of`], [`level_rank`] and [`level_label`], its page link with
//! [`alert_link`] and the figures as PNG bytes, then in the transaction that
//! stores the transition:
//!
//! ```text
//! let params = config.notify.enqueue_params(db::now())?;
//! in_tx!(db, |c| {
//!     /* …insert the transition on `c`… */
//!     crate::db::outbox::enqueue_notice!(c, &notice, &params)
//! })
//! ```
//!
//! Levels: rank 0 is a notice (line-wide wetting, data quality), ranks 1… are the
//! line's trigger levels, gentlest first (ohmline-core `alerts::Level`). Lengths
//! are metres (chainage x along the line, depth below ground), areas m², changes
//! percent against the baseline (negative = resistivity drop), times UTC.

pub mod cap;
pub mod email;
pub mod worker;

use std::fmt;

use chrono::{DateTime, Utc};
use ohmline_core::alerts::{Detail, Level, RuleSet, WettingNotice};
use ohmline_core::zones::Direction;
use thiserror::Error;

pub use crate::db::outbox::{EnqueueParams, EnqueueReport, enqueue};
pub use ohmline_core::alerts::CAUTION;

/// Why a notice, a message or the notification settings cannot be used.
#[derive(Debug, Error)]
pub enum NotifyError {
    /// A field of a notice is outside its allowed range.
    #[error("alert notice {field}: {reason}")]
    InvalidNotice {
        /// The field, e.g. `chainage_m`.
        field: &'static str,
        /// What is allowed.
        reason: String,
    },
    /// A notification setting is unusable.
    #[error("notification setting {key}: {reason}")]
    InvalidSetting {
        /// The configuration key, e.g. `notify.from`.
        key: &'static str,
        /// What is wrong.
        reason: String,
    },
    /// A stored message cannot be turned into an email (bad address, header).
    #[error("outbox row {outbox_id}: {reason}")]
    BadMessage {
        /// The outbox row.
        outbox_id: i64,
        /// What is wrong.
        reason: String,
    },
}

/// What happened to the alert.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum AlertEvent {
    /// The alert was raised.
    Raised,
    /// It climbed to a higher level.
    Escalated,
    /// A person acknowledged it.
    Acknowledged,
    /// It is over (by hand, or after the hysteresis epochs).
    Resolved,
}

impl AlertEvent {
    /// The stored and displayed name (`raised`, `escalated`, …).
    pub fn as_str(self) -> &'static str {
        match self {
            AlertEvent::Raised => "raised",
            AlertEvent::Escalated => "escalated",
            AlertEvent::Acknowledged => "acknowledged",
            AlertEvent::Resolved => "resolved",
        }
    }

    /// Parses [`AlertEvent::as_str`].
    pub fn parse(s: &str) -> Option<AlertEvent> {
        Some(match s {
            "raised" => AlertEvent::Raised,
            "escalated" => AlertEvent::Escalated,
            "acknowledged" => AlertEvent::Acknowledged,
            "resolved" => AlertEvent::Resolved,
            _ => return None,
        })
    }
}

impl fmt::Display for AlertEvent {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// What the alert is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum AlertKind {
    /// A laterally confined zone of dropping resistivity.
    DropZone,
    /// A zone of rising resistivity (rise rule, e.g. loss of fines in a clay core).
    RiseZone,
    /// A change along most of the line at once (flood stage, rain on the crest).
    LineWideWetting,
    /// A data-quality problem (line silent, many readings rejected, electrode out).
    DataQuality,
}

impl AlertKind {
    /// Words for messages.
    pub fn describe(self) -> &'static str {
        match self {
            AlertKind::DropZone => "zone of dropping resistivity",
            AlertKind::RiseZone => "zone of rising resistivity",
            AlertKind::LineWideWetting => "line-wide wetting",
            AlertKind::DataQuality => "data quality",
        }
    }
}

/// The fields of an alert notice, filled by the alert pipeline and checked by
/// [`AlertNotice::new`].
#[derive(Debug, Clone, PartialEq)]
pub struct NewNotice {
    /// The stored alert's id (the alert page and the CAP document are keyed by it).
    pub alert_id: i64,
    /// What happened.
    pub event: AlertEvent,
    /// Site name, as registered.
    pub site: String,
    /// Line slug.
    pub line: String,
    /// Level rank after the event: 0 = notice, 1… = trigger level (1 = gentlest).
    pub level_rank: u8,
    /// The level in words, e.g. `level 2 (−20 %)`.
    pub level_label: String,
    /// What the alert is about.
    pub kind: AlertKind,
    /// One or two sentences from the rules, e.g. why it was raised.
    pub summary: String,
    /// Chainage range of the zone (from, to), m; `None` for line-wide subjects.
    pub chainage_m: Option<(f64, f64)>,
    /// Depth range below ground (top, bottom), m.
    pub depth_m: Option<(f64, f64)>,
    /// Zone area in the section, m².
    pub area_m2: Option<f64>,
    /// Extreme change against the baseline, % (negative = drop).
    pub peak_change_pct: Option<f64>,
    /// Start of the run of qualifying epochs that raised the alert ("since when").
    pub since: DateTime<Utc>,
    /// When the alert was first raised.
    pub raised_at: DateTime<Utc>,
    /// When this event happened (for a raise, equal to `raised_at`).
    pub event_at: DateTime<Utc>,
    /// Start time of the epoch behind the latest facts.
    pub epoch_at: DateTime<Utc>,
    /// Consecutive epochs the subject has held its level.
    pub persistence_epochs: u32,
    /// Share of the zone's area with good sensitivity, 0–1 ("how sure").
    pub good_sensitivity_share: Option<f64>,
    /// Who acknowledged or resolved it by hand, and their note.
    pub actor: Option<(String, String)>,
    /// Absolute http(s) URL of the alert page.
    pub link: String,
    /// PNG of the change section with the zone outlined.
    pub section_png: Option<Vec<u8>>,
    /// PNG chart of the zone's history.
    pub history_png: Option<Vec<u8>>,
}

/// A checked alert notice: one event of one alert, as plain data.
#[derive(Debug, Clone, PartialEq)]
pub struct AlertNotice {
    f: NewNotice,
}

const PNG_SIGNATURE: [u8; 8] = [0x89, b'P', b'N', b'G', 0x0D, 0x0A, 0x1A, 0x0A];

fn bad(field: &'static str, reason: impl Into<String>) -> NotifyError {
    NotifyError::InvalidNotice { field, reason: reason.into() }
}

fn one_line(field: &'static str, s: &str, required: bool) -> Result<(), NotifyError> {
    if required && s.trim().is_empty() {
        return Err(bad(field, "must not be empty"));
    }
    if s.chars().any(|c| c.is_control()) {
        return Err(bad(field, "must be one line without control characters"));
    }
    Ok(())
}

fn range(field: &'static str, r: Option<(f64, f64)>) -> Result<(), NotifyError> {
    if let Some((a, b)) = r
        && !(a.is_finite() && b.is_finite() && a <= b)
    {
        return Err(bad(field, format!("({a}, {b}) must be finite with from ≤ to")));
    }
    Ok(())
}

impl AlertNotice {
    /// Checks the fields: site, line and level label are non-empty single lines;
    /// ranges are finite with from ≤ to; area ≥ 0; share within 0–1; raised_at ≤
    /// event_at; the link is an absolute http(s) URL without spaces; figures start
    /// with the PNG signature.
    pub fn new(f: NewNotice) -> Result<AlertNotice, NotifyError> {
        one_line("site", &f.site, true)?;
        one_line("line", &f.line, true)?;
        one_line("level_label", &f.level_label, true)?;
        range("chainage_m", f.chainage_m)?;
        range("depth_m", f.depth_m)?;
        if let Some(a) = f.area_m2
            && !(a.is_finite() && a >= 0.0)
        {
            return Err(bad("area_m2", format!("{a} must be a finite area ≥ 0")));
        }
        if let Some(p) = f.peak_change_pct
            && !p.is_finite()
        {
            return Err(bad("peak_change_pct", "must be finite"));
        }
        if let Some(s) = f.good_sensitivity_share
            && !(0.0..=1.0).contains(&s)
        {
            return Err(bad("good_sensitivity_share", format!("{s} must lie within 0–1")));
        }
        if f.event_at < f.raised_at {
            return Err(bad("event_at", "must not be before raised_at"));
        }
        let link_ok = (f.link.starts_with("https://") || f.link.starts_with("http://"))
            && !f.link.chars().any(|c| c.is_whitespace() || c.is_control() || c == '"');
        if !link_ok {
            return Err(bad("link", format!("{:?} must be an absolute http(s) URL", f.link)));
        }
        if let Some((who, _)) = &f.actor {
            one_line("actor", who, true)?;
        }
        for (field, png) in [("section_png", &f.section_png), ("history_png", &f.history_png)] {
            if let Some(bytes) = png
                && !bytes.starts_with(&PNG_SIGNATURE)
            {
                return Err(bad(field, "is not a PNG image (signature missing)"));
            }
        }
        Ok(AlertNotice { f })
    }

    /// The checked fields.
    pub fn fields(&self) -> &NewNotice {
        &self.f
    }

    /// The level for people: `Level 2` or `Notice`.
    pub fn level_title(&self) -> String {
        match self.f.level_rank {
            0 => "Notice".to_string(),
            n => format!("Level {n}"),
        }
    }
}

/// The facts of a notice that come from the rules' latest [`Detail`] of an
/// alert (ohmline-core `alerts`), so the pipeline fills [`NewNotice`] without
/// re-deriving them.
#[derive(Debug, Clone, PartialEq)]
pub struct DetailFacts {
    /// What the alert is about.
    pub kind: AlertKind,
    /// Chainage range, m (zones only: a line-wide subject has none).
    pub chainage_m: Option<(f64, f64)>,
    /// Depth range below ground, m.
    pub depth_m: Option<(f64, f64)>,
    /// Area, m² (zones).
    pub area_m2: Option<f64>,
    /// Peak change of a zone, or the median change of a line-wide wetting, %.
    pub peak_change_pct: Option<f64>,
    /// Share of a zone's area with good sensitivity, 0–1.
    pub good_sensitivity_share: Option<f64>,
}

impl DetailFacts {
    /// The facts of `detail`.
    pub fn of(detail: &Detail) -> DetailFacts {
        match detail {
            Detail::Zone(z) => DetailFacts {
                kind: match z.direction {
                    Direction::Drop => AlertKind::DropZone,
                    Direction::Rise => AlertKind::RiseZone,
                },
                chainage_m: Some(z.x_range),
                depth_m: Some(z.depth_range),
                area_m2: Some(z.area_m2),
                peak_change_pct: Some(z.peak_change_pct),
                good_sensitivity_share: Some(z.good_share),
            },
            Detail::LineWideWetting(n) => match (&n.line_wide, &n.below_stage) {
                (Some(w), _) => DetailFacts {
                    kind: AlertKind::LineWideWetting,
                    chainage_m: None,
                    depth_m: Some((w.depth_top_m, w.depth_bottom_m)),
                    area_m2: None,
                    peak_change_pct: Some(w.median_change_pct),
                    good_sensitivity_share: None,
                },
                (None, Some(b)) => DetailFacts {
                    kind: AlertKind::LineWideWetting,
                    chainage_m: Some(b.x_range),
                    depth_m: Some(b.depth_range),
                    area_m2: Some(b.area_m2),
                    peak_change_pct: Some(b.peak_change_pct),
                    good_sensitivity_share: None,
                },
                (None, None) => DetailFacts {
                    kind: AlertKind::LineWideWetting,
                    chainage_m: None,
                    depth_m: None,
                    area_m2: None,
                    peak_change_pct: None,
                    good_sensitivity_share: None,
                },
            },
            Detail::Quality(_) => DetailFacts {
                kind: AlertKind::DataQuality,
                chainage_m: None,
                depth_m: None,
                area_m2: None,
                peak_change_pct: None,
                good_sensitivity_share: None,
            },
        }
    }
}

/// The wetting notice in words: the wetting along the line and the zones the
/// river stage explains, each a sentence.
pub fn wetting_words(n: &WettingNotice) -> String {
    let mut out = Vec::new();
    if let Some(w) = &n.line_wide {
        out.push(format!(
            "Line-wide wetting: the resistivity fell by a median {} over {:.0} % of the line at \
             {}\u{2013}{} m depth. A general wetting is not a local anomaly; zones are judged \
             against it.",
            fmt_pct(w.median_change_pct),
            100.0 * w.wetted_share,
            fmt_m(w.depth_top_m),
            fmt_m(w.depth_bottom_m),
        ));
    }
    if let Some(b) = &n.below_stage {
        out.push(format!(
            "Wetting below the river stage: at a stage of {} m (elevation on the line's datum; \
             cells up to {} m above it count as below it), {} zone{} at chainage {}, {}\u{2013}{} m \
             below ground, {} m\u{b2}, peak change {}, reached a trigger level only below the \
             water level. This is the wetting a flood is expected to cause there, reported as \
             this notice instead of a zone alert; this line cannot tell a seepage path below \
             the stage from it.",
            fmt_m(b.stage_m),
            fmt_m(b.margin_m),
            b.zones,
            if b.zones == 1 { "" } else { "s" },
            fmt_range_m(b.x_range),
            fmt_m(b.depth_range.0),
            fmt_m(b.depth_range.1),
            fmt_m(b.area_m2),
            fmt_pct(b.peak_change_pct),
        ));
    }
    out.join(" ")
}

/// The rank of a core alert level: 0 for a notice, n for trigger level n.
pub fn level_rank(level: Level) -> u8 {
    match level {
        Level::Notice => 0,
        Level::Trigger(n) => n,
    }
}

/// The level in words with its change threshold from the line's rules:
/// `level 2 (−20 %)`, or `notice`.
pub fn level_label(level: Level, rules: &RuleSet) -> String {
    match level {
        Level::Notice => "notice".to_string(),
        Level::Trigger(n) => match rules.levels.get(usize::from(n).wrapping_sub(1)) {
            Some(l) => format!("level {n} ({})", fmt_pct(l.change_pct).replace(".0 %", " %")),
            None => format!("level {n}"),
        },
    }
}

/// The link to an alert's page under the public base URL (no trailing slash
/// needed): `<base>/alerts/<id>`.
pub fn alert_link(public_base_url: &str, alert_id: i64) -> String {
    format!("{}/alerts/{alert_id}", public_base_url.trim_end_matches('/'))
}

/// Formats a length or chainage in metres for people: one decimal, without a
/// trailing `.0` (24 → `24`, 24.26 → `24.3`).
pub fn fmt_m(x: f64) -> String {
    let s = format!("{x:.1}");
    let s = s.strip_suffix(".0").map(str::to_string).unwrap_or(s);
    if s == "-0" { "0".to_string() } else { s.replace('-', "\u{2212}") }
}

/// Formats a change in percent with its sign (U+2212 for minus): `−27.3 %`.
pub fn fmt_pct(p: f64) -> String {
    if p < 0.0 { format!("\u{2212}{:.1} %", -p) } else { format!("+{p:.1} %") }
}

/// A chainage range for people: `24–28 m`.
pub fn fmt_range_m((a, b): (f64, f64)) -> String {
    format!("{}\u{2013}{} m", fmt_m(a), fmt_m(b))
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use chrono::TimeZone;

    /// A tiny valid PNG-signed byte string for tests (content after the signature
    /// is opaque to notifications).
    pub fn png(tag: u8) -> Vec<u8> {
        let mut v = PNG_SIGNATURE.to_vec();
        v.extend_from_slice(&[tag; 16]);
        v
    }

    /// A complete zone notice; tests change fields from here.
    pub fn sample() -> NewNotice {
        let t = |d: u32, h: u32| Utc.with_ymd_and_hms(2026, 3, d, h, 0, 0).unwrap();
        NewNotice {
            alert_id: 17,
            event: AlertEvent::Raised,
            site: "Levee North".into(),
            line: "crest-a".into(),
            level_rank: 2,
            level_label: "level 2 (\u{2212}20 %)".into(),
            kind: AlertKind::DropZone,
            summary: "Resistivity dropped in a confined zone for 3 consecutive epochs.".into(),
            chainage_m: Some((24.0, 28.0)),
            depth_m: Some((1.5, 4.0)),
            area_m2: Some(6.5),
            peak_change_pct: Some(-27.34),
            since: t(1, 6),
            raised_at: t(3, 6),
            event_at: t(3, 6),
            epoch_at: t(3, 6),
            persistence_epochs: 3,
            good_sensitivity_share: Some(0.78),
            actor: None,
            link: "https://levees.example.org/alerts/17".into(),
            section_png: Some(png(1)),
            history_png: Some(png(2)),
        }
    }

    fn check(change: impl FnOnce(&mut NewNotice), field: Option<&str>) {
        let mut f = sample();
        change(&mut f);
        match (AlertNotice::new(f), field) {
            (Ok(_), None) => {}
            (Err(NotifyError::InvalidNotice { field: got, .. }), Some(want)) => {
                assert_eq!(got, want)
            }
            (other, want) => panic!("expected {want:?}, got {other:?}"),
        }
    }

    #[test]
    fn notices_are_checked_field_by_field() {
        check(|_| {}, None);
        check(|f| f.chainage_m = None, None);
        check(|f| f.site = " ".into(), Some("site"));
        check(|f| f.line = "a\nb".into(), Some("line"));
        check(|f| f.chainage_m = Some((28.0, 24.0)), Some("chainage_m"));
        check(|f| f.depth_m = Some((f64::NAN, 1.0)), Some("depth_m"));
        check(|f| f.area_m2 = Some(-1.0), Some("area_m2"));
        check(|f| f.good_sensitivity_share = Some(1.2), Some("good_sensitivity_share"));
        check(|f| f.link = "/alerts/17".into(), Some("link"));
        check(|f| f.link = "https://x.org/a b".into(), Some("link"));
        check(|f| f.section_png = Some(vec![1, 2, 3]), Some("section_png"));
        check(|f| f.event_at = f.raised_at - chrono::Duration::hours(1), Some("event_at"));
    }

    #[test]
    fn core_alert_details_become_notice_facts() {
        use ohmline_core::alerts::{QualityEvent, ZoneDetail};
        let zone = ZoneDetail {
            direction: Direction::Drop,
            x_range: (24.0, 28.0),
            z_range: (6.0, 8.5),
            depth_range: (1.5, 4.0),
            centroid: [26.0, 7.2],
            area_m2: 6.5,
            width_m: 4.0,
            peak_change_pct: -27.3,
            mean_change_pct: -18.0,
            peak_judged_pct: -22.0,
            good_share: 0.78,
            core_area_m2: Some(5.0),
            rate_pct_per_day: None,
        };
        let f = DetailFacts::of(&Detail::Zone(zone));
        assert_eq!(f.kind, AlertKind::DropZone);
        assert_eq!((f.chainage_m, f.depth_m), (Some((24.0, 28.0)), Some((1.5, 4.0))));
        assert_eq!(
            (f.area_m2, f.peak_change_pct, f.good_sensitivity_share),
            (Some(6.5), Some(-27.3), Some(0.78))
        );
        let q = DetailFacts::of(&Detail::Quality(QualityEvent::DropShare { share: 0.4 }));
        assert_eq!((q.kind, q.chainage_m), (AlertKind::DataQuality, None));
        // A wetting notice below the river stage alone says where and names the stage.
        let below = ohmline_core::alerts::StageWetting {
            stage_m: 1.8,
            margin_m: 0.5,
            zones: 1,
            area_m2: 5.1,
            x_range: (6.1, 12.0),
            depth_range: (0.2, 2.1),
            peak_change_pct: -35.4,
        };
        let n = WettingNotice { line_wide: None, below_stage: Some(below) };
        let w = DetailFacts::of(&Detail::LineWideWetting(n.clone()));
        assert_eq!(w.kind, AlertKind::LineWideWetting);
        assert_eq!(
            (w.chainage_m, w.depth_m, w.peak_change_pct),
            (Some((6.1, 12.0)), Some((0.2, 2.1)), Some(-35.4))
        );
        let words = wetting_words(&n);
        assert!(words.starts_with("Wetting below the river stage: at a stage of 1.8 m"), "{words}");
        assert!(
            words.contains("chainage 6.1\u{2013}12 m") && words.contains("\u{2212}35.4 %"),
            "{words}"
        );

        let rules = RuleSet::default();
        assert_eq!(level_rank(Level::Trigger(2)), 2);
        assert_eq!(level_rank(Level::Notice), 0);
        assert_eq!(level_label(Level::Trigger(2), &rules), "level 2 (\u{2212}20 %)");
        assert_eq!(level_label(Level::Trigger(9), &rules), "level 9");
        assert_eq!(level_label(Level::Notice, &rules), "notice");
    }

    #[test]
    fn numbers_are_formatted_for_people() {
        assert_eq!(fmt_m(24.0), "24");
        assert_eq!(fmt_m(24.26), "24.3");
        assert_eq!(fmt_m(-0.01), "0");
        assert_eq!(fmt_m(-2.5), "\u{2212}2.5");
        assert_eq!(fmt_pct(-27.34), "\u{2212}27.3 %");
        assert_eq!(fmt_pct(12.0), "+12.0 %");
        assert_eq!(fmt_range_m((24.0, 28.5)), "24\u{2013}28.5 m");
        assert_eq!(alert_link("https://h.org/", 5), "https://h.org/alerts/5");
    }
}
