//! Email content: the subject, plain-text and HTML parts and attachments of an
//! alert email and of the daily digest, and the MIME message built from a stored
//! outbox row.
//!
//! Subject: `[ohmline] Level 2 — Site / line — chainage 24–28 m` (the event is
//! named when it is not a raise: `Escalated to level 3`, `Acknowledged: level 2`,
//! `Resolved: level 2`; notices read `Notice`; line-wide subjects name their kind
//! instead of a chainage). Both parts say what, where (chainage m, depth below
//! ground m), how much (peak change %, area m²), since when, how sure (share of
//! the zone with good sensitivity), the link to the alert page, and the caution
//! ([`super::CAUTION`]) verbatim. The HTML part escapes every value, uses inline
//! styles and no images, so it reads the same with images blocked; the figures
//! travel as PNG attachments (`section.png`, `history.png`).
//!
//! The MIME structure is `multipart/mixed` (when there are attachments) around
//! `multipart/alternative` (text, HTML). The `Date` header is the time the row
//! was written and the `Message-ID` the one fixed then, so a resent copy is the
//! same message.

use std::borrow::Cow;
use std::fmt::Write as _;
use std::time::SystemTime;

use chrono::{DateTime, Utc};
use lettre::Message;
use lettre::message::header::{ContentType, Header, HeaderName, HeaderValue};
use lettre::message::{Attachment as MimeAttachment, Mailbox, MultiPart, SinglePart};

use super::fmt_range_m;
use super::{AlertEvent, AlertKind, AlertNotice, CAUTION, NotifyError, fmt_m, fmt_pct};
use crate::db::outbox::Outgoing;

/// A file attached to an email.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Attachment {
    /// File name shown to the reader, e.g. `section.png`.
    pub filename: String,
    /// MIME type, e.g. `image/png`.
    pub content_type: String,
    /// The bytes.
    pub content: Vec<u8>,
}

/// A rendered email, the same for every recipient.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RenderedEmail {
    /// Subject line (one line, UTF-8; encoded on sending).
    pub subject: String,
    /// Plain-text part.
    pub text: String,
    /// HTML part (a complete document).
    pub html: String,
    /// Attachments, in order.
    pub attachments: Vec<Attachment>,
}

/// One alert event listed in a digest.
#[derive(Debug, Clone, PartialEq)]
pub struct DigestItem {
    /// The alert's id.
    pub alert_id: i64,
    /// What happened.
    pub event: AlertEvent,
    /// Site name.
    pub site: String,
    /// Line slug.
    pub line: String,
    /// Level in words.
    pub level_label: String,
    /// The notice's summary.
    pub summary: String,
    /// Subject line of the event's own email (carries the chainage).
    pub subject: String,
    /// Alert page.
    pub link: String,
    /// When it happened.
    pub event_at: DateTime<Utc>,
}

fn when(t: DateTime<Utc>) -> String {
    t.format("%Y-%m-%d %H:%M UTC").to_string()
}

/// Escapes text content of HTML (`<`, `>`, `&`); the caution's apostrophe stays
/// as written.
fn esc(s: &str) -> Cow<'_, str> {
    quick_xml::escape::partial_escape(s)
}

/// Escapes an attribute value in double quotes (`<`, `>`, `&`, `'`, `"`).
fn esc_attr(s: &str) -> Cow<'_, str> {
    quick_xml::escape::escape(s)
}

/// The subject line of an alert email.
pub fn subject(n: &AlertNotice) -> String {
    let f = n.fields();
    let level = match (f.event, f.level_rank) {
        (AlertEvent::Raised, _) => n.level_title(),
        (AlertEvent::Escalated, 0) => "Escalated to notice".to_string(),
        (AlertEvent::Escalated, r) => format!("Escalated to level {r}"),
        (AlertEvent::Acknowledged, _) => format!("Acknowledged: {}", lower_first(&n.level_title())),
        (AlertEvent::Resolved, _) => format!("Resolved: {}", lower_first(&n.level_title())),
    };
    let tail = match f.chainage_m {
        Some(r) => format!("chainage {}", fmt_range_m(r)),
        None => f.kind.describe().to_string(),
    };
    format!("[ohmline] {level} \u{2014} {} / {} \u{2014} {tail}", f.site, f.line)
}

fn lower_first(s: &str) -> String {
    let mut c = s.chars();
    match c.next() {
        Some(first) => first.to_lowercase().chain(c).collect(),
        None => String::new(),
    }
}

/// The opening sentence: what happened to which alert.
fn opening(n: &AlertNotice) -> String {
    let f = n.fields();
    let on = format!("on line {} at {}", f.line, f.site);
    match f.event {
        AlertEvent::Raised => {
            format!("Alert raised at {} {on}: {}.", f.level_label, f.kind.describe())
        }
        AlertEvent::Escalated => {
            format!("Alert escalated to {} {on}: {}.", f.level_label, f.kind.describe())
        }
        AlertEvent::Acknowledged => {
            format!("Alert at {} {on} acknowledged: {}.", f.level_label, f.kind.describe())
        }
        AlertEvent::Resolved => {
            format!("Alert at {} {on} resolved: {}.", f.level_label, f.kind.describe())
        }
    }
}

/// The facts as (label, value) rows, shared by both parts.
fn facts(n: &AlertNotice) -> Vec<(&'static str, String)> {
    let f = n.fields();
    let mut rows = Vec::new();
    let mut where_ = Vec::new();
    if let Some(r) = f.chainage_m {
        where_.push(format!("chainage {}", fmt_range_m(r)));
    }
    if let Some((top, bottom)) = f.depth_m {
        where_.push(format!("{}\u{2013}{} m below ground", fmt_m(top), fmt_m(bottom)));
    }
    if where_.is_empty() {
        where_.push("the whole line".to_string());
    }
    rows.push(("Where", where_.join(", ")));
    let mut much = Vec::new();
    if let Some(p) = f.peak_change_pct {
        much.push(format!("peak change {} against the baseline", fmt_pct(p)));
    }
    if let Some(a) = f.area_m2 {
        much.push(format!("area {} m\u{b2}", fmt_m(a)));
    }
    if !much.is_empty() {
        rows.push(("How much", much.join(", ")));
    }
    rows.push((
        "Since",
        format!(
            "{}; level held for {} consecutive epoch{}",
            when(f.since),
            f.persistence_epochs,
            if f.persistence_epochs == 1 { "" } else { "s" }
        ),
    ));
    rows.push(("Latest epoch", when(f.epoch_at)));
    if let Some(s) = f.good_sensitivity_share {
        rows.push(("How sure", format!("{:.0} % of the zone has good sensitivity", s * 100.0)));
    }
    if let Some((who, note)) = &f.actor {
        let label = match f.event {
            AlertEvent::Resolved => "Resolved by",
            _ => "Acknowledged by",
        };
        let v = if note.trim().is_empty() { who.clone() } else { format!("{who}: {note}") };
        rows.push((label, v));
    }
    rows.push(("Event", format!("{} at {} (alert {})", f.event, when(f.event_at), f.alert_id)));
    rows
}

fn attachment_list(n: &AlertNotice) -> Vec<Attachment> {
    let f = n.fields();
    let mut out = Vec::new();
    if let Some(png) = &f.section_png {
        out.push(Attachment {
            filename: "section.png".into(),
            content_type: "image/png".into(),
            content: png.clone(),
        });
    }
    if let Some(png) = &f.history_png {
        out.push(Attachment {
            filename: "history.png".into(),
            content_type: "image/png".into(),
            content: png.clone(),
        });
    }
    out
}

fn attachment_words(n: &AlertNotice) -> Option<String> {
    let f = n.fields();
    let mut parts = Vec::new();
    if f.section_png.is_some() {
        let what = match f.kind {
            AlertKind::DropZone | AlertKind::RiseZone => {
                "the change section with the zone outlined"
            }
            _ => "the change section",
        };
        parts.push(format!("{what} (section.png)"));
    }
    if f.history_png.is_some() {
        parts.push("the history chart (history.png)".to_string());
    }
    (!parts.is_empty()).then(|| format!("Attached: {}.", parts.join("; ")))
}

const HTML_HEAD: &str = "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">";
const CAUTION_STYLE: &str =
    "border:2px solid #8a6d00;background:#fff8db;padding:8px 12px;margin:16px 0;color:#111";

/// Renders an alert email.
pub fn render(n: &AlertNotice) -> RenderedEmail {
    let f = n.fields();
    let subject = subject(n);
    let opening = opening(n);
    let facts = facts(n);
    let attached = attachment_words(n);

    let mut text = String::new();
    let _ = writeln!(text, "{opening}\n");
    if !f.summary.trim().is_empty() {
        let _ = writeln!(text, "{}\n", f.summary.trim());
    }
    let width = facts.iter().map(|(k, _)| k.chars().count()).max().unwrap_or(0) + 1;
    for (k, v) in &facts {
        let _ = writeln!(text, "{:<width$} {v}", format!("{k}:"));
    }
    let _ = writeln!(text, "\nAlert page: {}\n", f.link);
    if let Some(a) = &attached {
        let _ = writeln!(text, "{a}\n");
    }
    let _ = writeln!(text, "Caution: {CAUTION}");

    let mut html = String::new();
    let _ = write!(html, "{HTML_HEAD}<title>{}</title></head>", esc(&subject));
    let _ = write!(html, "<body style=\"font-family:sans-serif;color:#111;max-width:44em\">");
    let _ = write!(html, "<p style=\"font-size:1.1em\"><strong>{}</strong></p>", esc(&opening));
    if !f.summary.trim().is_empty() {
        let _ = write!(html, "<p>{}</p>", esc(f.summary.trim()));
    }
    let _ = write!(html, "<table style=\"border-collapse:collapse\">");
    for (k, v) in &facts {
        let _ = write!(
            html,
            "<tr><th style=\"text-align:left;padding:2px 12px 2px 0;vertical-align:top\">{}</th><td style=\"padding:2px 0\">{}</td></tr>",
            esc(k),
            esc(v)
        );
    }
    let _ = write!(html, "</table>");
    let _ = write!(
        html,
        "<p><a href=\"{}\">Open the alert page</a> ({})</p>",
        esc_attr(&f.link),
        esc(&f.link)
    );
    if let Some(a) = &attached {
        let _ = write!(html, "<p>{}</p>", esc(a));
    }
    let _ = writeln!(
        html,
        "<p style=\"{CAUTION_STYLE}\"><strong>Caution:</strong> {}</p></body></html>",
        esc(CAUTION)
    );

    RenderedEmail { subject, text, html, attachments: attachment_list(n) }
}

/// Renders the daily digest of `items` (oldest first), written at `until`
/// (it lists every event waiting until then).
pub fn render_digest(items: &[DigestItem], until: DateTime<Utc>) -> RenderedEmail {
    let n = items.len();
    let plural = if n == 1 { "" } else { "s" };
    let subject =
        format!("[ohmline] Daily digest \u{2014} {n} alert event{plural} up to {}", when(until));
    let intro = format!(
        "{n} alert event{plural} not sent one by one (digest delivery, or over the hourly limit), up to {}.",
        when(until)
    );
    let mut text = format!("{intro}\n\n");
    for (i, it) in items.iter().enumerate() {
        let _ = writeln!(
            text,
            "{}. {} \u{2014} {} ({})\n   {} / {}, {}: {}\n   {}\n",
            i + 1,
            when(it.event_at),
            it.subject,
            it.event,
            it.site,
            it.line,
            it.level_label,
            it.summary.trim(),
            it.link
        );
    }
    let _ = writeln!(text, "Caution: {CAUTION}");

    let mut html = String::new();
    let _ = write!(html, "{HTML_HEAD}<title>{}</title></head>", esc(&subject));
    let _ = write!(html, "<body style=\"font-family:sans-serif;color:#111;max-width:44em\">");
    let _ = write!(html, "<p>{}</p><ol>", esc(&intro));
    for it in items {
        let _ = write!(
            html,
            "<li style=\"margin-bottom:8px\">{} \u{2014} <strong>{}</strong> ({})<br>{} / {}, {}: {}<br><a href=\"{}\">alert {}</a></li>",
            esc(&when(it.event_at)),
            esc(&it.subject),
            esc(it.event.as_str()),
            esc(&it.site),
            esc(&it.line),
            esc(&it.level_label),
            esc(it.summary.trim()),
            esc_attr(&it.link),
            it.alert_id
        );
    }
    let _ = writeln!(
        html,
        "</ol><p style=\"{CAUTION_STYLE}\"><strong>Caution:</strong> {}</p></body></html>",
        esc(CAUTION)
    );
    RenderedEmail { subject, text, html, attachments: Vec::new() }
}

/// `Auto-Submitted: auto-generated` (RFC 3834): tells auto-responders not to
/// answer.
#[derive(Debug, Clone, Copy)]
struct AutoSubmitted;

impl Header for AutoSubmitted {
    fn name() -> HeaderName {
        HeaderName::new_from_ascii_str("Auto-Submitted")
    }

    fn parse(_: &str) -> Result<Self, Box<dyn std::error::Error + Send + Sync>> {
        Ok(AutoSubmitted)
    }

    fn display(&self) -> HeaderValue {
        HeaderValue::new(Self::name(), "auto-generated".to_string())
    }
}

/// Builds the MIME message of a claimed outbox row.
pub fn build_message(from: &Mailbox, row: &Outgoing) -> Result<Message, NotifyError> {
    let bad = |reason: String| NotifyError::BadMessage { outbox_id: row.outbox_id, reason };
    let to_addr: lettre::Address =
        row.to_address.parse().map_err(|e| bad(format!("recipient {:?}: {e}", row.to_address)))?;
    let name = (!row.to_name.trim().is_empty()).then(|| row.to_name.clone());
    let to = Mailbox::new(name, to_addr);
    let builder = Message::builder()
        .from(from.clone())
        .to(to)
        .subject(row.subject.clone())
        .message_id(Some(row.header_message_id.clone()))
        .date(SystemTime::from(row.created_at))
        .header(AutoSubmitted);
    let alternative = MultiPart::alternative_plain_html(row.text.clone(), row.html.clone());
    let message = if row.attachments.is_empty() {
        builder.multipart(alternative)
    } else {
        let mut mixed = MultiPart::mixed().multipart(alternative);
        for a in &row.attachments {
            let ct = ContentType::parse(&a.content_type)
                .map_err(|e| bad(format!("attachment {:?}: {e}", a.filename)))?;
            let part: SinglePart =
                MimeAttachment::new(a.filename.clone()).body(a.content.clone(), ct);
            mixed = mixed.singlepart(part);
        }
        builder.multipart(mixed)
    };
    message.map_err(|e| bad(e.to_string()))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::notify::NewNotice;
    use crate::notify::tests::sample;

    fn check(
        change: impl FnOnce(&mut NewNotice),
        subject: &str,
        in_both: &[&str],
    ) -> RenderedEmail {
        let mut f = sample();
        change(&mut f);
        let r = render(&AlertNotice::new(f).unwrap());
        assert_eq!(r.subject, subject);
        for s in in_both.iter().chain([&CAUTION]) {
            assert!(r.text.contains(s), "text part lacks {s:?}:\n{}", r.text);
            let escaped = esc(s);
            assert!(r.html.contains(escaped.as_ref()), "HTML part lacks {s:?}:\n{}", r.html);
        }
        r
    }

    #[test]
    fn a_raised_zone_alert_names_site_line_level_chainage_and_caution() {
        let r = check(
            |_| {},
            "[ohmline] Level 2 \u{2014} Levee North / crest-a \u{2014} chainage 24\u{2013}28 m",
            &[
                "chainage 24\u{2013}28 m",
                "1.5\u{2013}4 m below ground",
                "\u{2212}27.3 %",
                "area 6.5 m\u{b2}",
                "2026-03-01 06:00 UTC",
                "3 consecutive epochs",
                "78 % of the zone has good sensitivity",
                "https://levees.example.org/alerts/17",
                "section.png",
                "history.png",
            ],
        );
        assert_eq!(r.attachments.len(), 2);
        assert_eq!(r.attachments[0].filename, "section.png");
        assert_eq!(r.attachments[0].content, crate::notify::tests::png(1));
        assert_eq!(r.attachments[1].content_type, "image/png");
        // Readable without images: the HTML part references none.
        assert!(!r.html.contains("<img"));
    }

    #[test]
    fn events_and_notices_change_the_subject() {
        check(
            |f| {
                f.event = AlertEvent::Escalated;
                f.level_rank = 3;
                f.level_label = "level 3 (\u{2212}35 %)".into();
            },
            "[ohmline] Escalated to level 3 \u{2014} Levee North / crest-a \u{2014} chainage 24\u{2013}28 m",
            &["Alert escalated to level 3 (\u{2212}35 %)"],
        );
        check(
            |f| {
                f.event = AlertEvent::Acknowledged;
                f.actor = Some(("J. Duty".into(), "inspection sent".into()));
            },
            "[ohmline] Acknowledged: level 2 \u{2014} Levee North / crest-a \u{2014} chainage 24\u{2013}28 m",
            &["J. Duty: inspection sent"],
        );
        let r = check(
            |f| {
                f.level_rank = 0;
                f.level_label = "notice".into();
                f.kind = AlertKind::LineWideWetting;
                f.chainage_m = None;
                f.depth_m = None;
                f.area_m2 = None;
                f.section_png = None;
                f.history_png = None;
            },
            "[ohmline] Notice \u{2014} Levee North / crest-a \u{2014} line-wide wetting",
            &["the whole line"],
        );
        assert!(r.attachments.is_empty());
        assert!(!r.text.contains("Attached"));
    }

    #[test]
    fn names_are_escaped_in_html() {
        let r = check(
            |f| {
                f.site = "Dyke <North> & \"Sons\"".into();
                f.summary = "<script>alert(1)</script>".into();
            },
            "[ohmline] Level 2 \u{2014} Dyke <North> & \"Sons\" / crest-a \u{2014} chainage 24\u{2013}28 m",
            &["Dyke <North> & \"Sons\""],
        );
        assert!(r.html.contains("Dyke &lt;North&gt; &amp; \"Sons\""), "{}", r.html);
        assert!(!r.html.contains("<script>"));
        assert!(r.html.contains("&lt;script&gt;"));
        // The plain-text part is not HTML and keeps the name as it is.
        assert!(r.text.contains("Dyke <North> & \"Sons\""));
    }

    #[test]
    fn the_digest_lists_every_item_with_the_caution() {
        let n = AlertNotice::new(sample()).unwrap();
        let f = n.fields();
        let item = |id: i64, ev: AlertEvent| DigestItem {
            alert_id: id,
            event: ev,
            site: "Dyke <North>".into(),
            line: f.line.clone(),
            level_label: f.level_label.clone(),
            summary: f.summary.clone(),
            subject: subject(&n),
            link: f.link.clone(),
            event_at: f.event_at,
        };
        let r = render_digest(
            &[item(17, AlertEvent::Raised), item(18, AlertEvent::Escalated)],
            f.event_at,
        );
        assert_eq!(
            r.subject,
            "[ohmline] Daily digest \u{2014} 2 alert events up to 2026-03-03 06:00 UTC"
        );
        for part in [&r.text, &r.html] {
            assert!(part.contains(CAUTION));
            assert!(part.contains("chainage 24\u{2013}28 m"));
            assert!(part.contains("escalated"));
        }
        assert!(r.html.contains("Dyke &lt;North&gt;"));
        assert!(r.text.contains("1. 2026-03-03 06:00 UTC"));
        assert!(r.text.contains("2. 2026-03-03 06:00 UTC"));
    }
}
