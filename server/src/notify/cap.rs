//! Alerts as OASIS Common Alerting Protocol 1.2 documents (CAP 1.2, OASIS
//! Standard, 1 July 2010) and an Atom index of recent alerts (RFC 4287), so
//! emergency-management systems can subscribe.
//!
//! One CAP document describes one event of one alert ([`AlertNotice`]):
//! `<identifier>` is `alert-<id>-<event>-<time>` (unique for the sender), `<sent>`
//! the event time in the CAP date-time form (`2026-03-03T06:00:00-00:00`: numeric
//! offset, UTC as `-00:00`, no fractions), a raise is `msgType` `Alert`, every
//! later event an `Update` whose `<references>` names the raise. The `<info>`
//! block carries the event, the headline (the email subject), a description with
//! the facts and the caution ([`super::CAUTION`]) verbatim, an instruction, the
//! alert page as `<web>`, the facts as `<parameter>`s, and an `<area>` with a
//! description (site, line, chainage) and, where the line has WGS 84 map
//! coordinates, a `<circle>` or `<polygon>` ([`CapArea`]).
//!
//! **Mapping of ohmline levels to CAP** (a design choice of ohmline, not from the
//! standard; the levels are the line's trigger levels, rank 0 = notice):
//!
//! | ohmline | urgency | severity | certainty |
//! |---|---|---|---|
//! | data-quality notice | Future | Unknown | Observed |
//! | line-wide wetting notice (rank 0) | Future | Minor | Possible |
//! | zone, level 1 | Future | Minor | Possible |
//! | zone, level 2 | Expected | Moderate | Possible |
//! | zone, level ≥ 3 | Immediate | Severe | Possible |
//! | any alert, resolved | Past | as its level | as above |
//!
//! Certainty stays `Possible` for every resistivity alert: the change is
//! measured, but whether it means seepage is for the inspecting engineer to say
//! (the caution), and `Extreme` severity is never used for the same reason.
//! Category is `Geo` and `Infra` (`Infra` alone for data quality); responseType
//! `Monitor` while the alert is active (`Assess` is not for public warnings) and
//! `AllClear` once resolved.
//!
//! **Wiring (for the alert routes).** Once alerts are stored, `GET
//! /api/v1/alerts/{id}/cap` answers `alert_document(&notice_of_latest_event,
//! area, &CapParams::from_config(&config.notify))` with content type
//! `application/cap+xml`, and `GET /api/v1/alerts/feed.atom` answers
//! `atom_feed(&latest_notice_per_alert, &FeedParams { .. })` with
//! `application/atom+xml`, newest first, e.g. the alerts updated in the past 30
//! days. Lines store electrode map coordinates as projected easting/northing
//! (unspecified reference system): convert them to WGS 84 latitude/longitude
//! before building a [`CapArea`], or pass `None` (the area is then described in
//! words only).

use chrono::{DateTime, SecondsFormat, Utc};
use quick_xml::Writer;
use quick_xml::events::{BytesDecl, BytesEnd, BytesStart, BytesText, Event};

use super::email::subject;
use super::{
    AlertEvent, AlertKind, AlertNotice, CAUTION, NotifyError, fmt_m, fmt_pct, fmt_range_m,
};
use crate::config::{CapScope, CapStatus, NotifyConfig};

/// The CAP 1.2 XML namespace.
pub const CAP_NS: &str = "urn:oasis:names:tc:emergency:cap:1.2";
/// The Atom namespace (RFC 4287).
pub const ATOM_NS: &str = "http://www.w3.org/2005/Atom";

/// Who publishes, and how (from `[notify.cap]`).
#[derive(Debug, Clone, PartialEq)]
pub struct CapParams {
    /// `<sender>`: globally unique, without spaces, commas, `<` or `&`.
    pub sender: String,
    /// `<senderName>`.
    pub sender_name: String,
    /// `<status>`.
    pub status: CapStatus,
    /// `<scope>`.
    pub scope: CapScope,
    /// `<restriction>` (used with the `Restricted` scope).
    pub restriction: String,
}

impl CapParams {
    /// The CAP settings of a validated configuration.
    pub fn from_config(n: &NotifyConfig) -> CapParams {
        CapParams {
            sender: n.cap_sender(),
            sender_name: n.cap.sender_name.clone(),
            status: n.cap.status,
            scope: n.cap.scope,
            restriction: n.cap.restriction.clone(),
        }
    }
}

/// A WGS 84 point: latitude and longitude, degrees.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LatLon {
    /// Latitude, degrees north (−90…90).
    pub lat: f64,
    /// Longitude, degrees east (−180…180).
    pub lon: f64,
}

/// The geometry of a CAP `<area>`, checked.
#[derive(Debug, Clone, PartialEq)]
pub enum CapArea {
    /// A closed polygon (first point = last point, at least 4 points).
    Polygon(Vec<LatLon>),
    /// A circle: centre and radius, km.
    Circle {
        /// Centre.
        centre: LatLon,
        /// Radius, km (> 0).
        radius_km: f64,
    },
}

fn area_err(reason: impl Into<String>) -> NotifyError {
    NotifyError::InvalidNotice { field: "area", reason: reason.into() }
}

fn check_point(p: LatLon) -> Result<(), NotifyError> {
    if (-90.0..=90.0).contains(&p.lat) && (-180.0..=180.0).contains(&p.lon) {
        Ok(())
    } else {
        Err(area_err(format!("({}, {}) is not a WGS 84 latitude, longitude", p.lat, p.lon)))
    }
}

/// Mean Earth radius, km (IUGG mean radius R1 = 6371.0088 km, from memory).
const EARTH_RADIUS_KM: f64 = 6371.0088;

/// Great-circle distance between two points, km (haversine formula).
pub fn distance_km(a: LatLon, b: LatLon) -> f64 {
    let (p1, p2) = (a.lat.to_radians(), b.lat.to_radians());
    let dp = p2 - p1;
    let dl = (b.lon - a.lon).to_radians();
    let h = (dp / 2.0).sin().powi(2) + p1.cos() * p2.cos() * (dl / 2.0).sin().powi(2);
    2.0 * EARTH_RADIUS_KM * h.sqrt().min(1.0).asin()
}

impl CapArea {
    /// A polygon from at least 3 distinct points; it is closed here if open.
    pub fn polygon(mut points: Vec<LatLon>) -> Result<CapArea, NotifyError> {
        for &p in &points {
            check_point(p)?;
        }
        if points.first() != points.last() {
            points.push(points[0]);
        }
        if points.len() < 4 {
            return Err(area_err("a polygon needs at least 3 distinct points"));
        }
        Ok(CapArea::Polygon(points))
    }

    /// A circle around `centre` with `radius_km` > 0.
    pub fn circle(centre: LatLon, radius_km: f64) -> Result<CapArea, NotifyError> {
        check_point(centre)?;
        if !(radius_km.is_finite() && radius_km > 0.0) {
            return Err(area_err(format!("radius {radius_km} km must be positive")));
        }
        Ok(CapArea::Circle { centre, radius_km })
    }

    /// The circle covering chainages `from_m`…`to_m` of a line plus `margin_m`:
    /// `line` lists (chainage m, WGS 84 position) of electrodes in increasing
    /// chainage; positions in between are interpolated linearly (adequate over
    /// the few hundred metres of a line). The centre is the position at the
    /// middle chainage; the radius reaches every electrode within the range and
    /// both ends.
    pub fn around_chainage(
        line: &[(f64, LatLon)],
        from_m: f64,
        to_m: f64,
        margin_m: f64,
    ) -> Result<CapArea, NotifyError> {
        if line.len() < 2
            || line
                .windows(2)
                .any(|w| w[1].0.partial_cmp(&w[0].0) != Some(std::cmp::Ordering::Greater))
        {
            return Err(area_err("the line needs ≥ 2 points in increasing chainage"));
        }
        if !(from_m <= to_m && margin_m >= 0.0 && margin_m.is_finite()) {
            return Err(area_err(format!("range {from_m}–{to_m} m, margin {margin_m} m")));
        }
        for &(_, p) in line {
            check_point(p)?;
        }
        let at = |x: f64| -> LatLon {
            let x = x.clamp(line[0].0, line[line.len() - 1].0);
            let i = line.partition_point(|(c, _)| *c <= x).clamp(1, line.len() - 1);
            let ((x0, a), (x1, b)) = (line[i - 1], line[i]);
            let t = (x - x0) / (x1 - x0);
            LatLon { lat: a.lat + t * (b.lat - a.lat), lon: a.lon + t * (b.lon - a.lon) }
        };
        let centre = at(0.5 * (from_m + to_m));
        let mut reach = distance_km(centre, at(from_m)).max(distance_km(centre, at(to_m)));
        for &(c, p) in line {
            if (from_m..=to_m).contains(&c) {
                reach = reach.max(distance_km(centre, p));
            }
        }
        CapArea::circle(centre, (reach + margin_m / 1000.0).max(0.001))
    }
}

/// A CAP date-time: seconds, numeric offset, UTC written `-00:00`.
pub fn cap_time(t: DateTime<Utc>) -> String {
    format!("{}-00:00", t.format("%Y-%m-%dT%H:%M:%S"))
}

/// The `<identifier>` of a notice's CAP document.
pub fn identifier(n: &AlertNotice) -> String {
    let f = n.fields();
    format!("alert-{}-{}-{}", f.alert_id, f.event.as_str(), f.event_at.format("%Y%m%dT%H%M%S%3f"))
}

fn raise_identifier(n: &AlertNotice) -> String {
    let f = n.fields();
    format!("alert-{}-raised-{}", f.alert_id, f.raised_at.format("%Y%m%dT%H%M%S%3f"))
}

/// CAP `<urgency>` of a notice (see the module table).
pub fn urgency(n: &AlertNotice) -> &'static str {
    let f = n.fields();
    match (f.event, f.kind, f.level_rank) {
        (AlertEvent::Resolved, _, _) => "Past",
        (_, AlertKind::DataQuality | AlertKind::LineWideWetting, _) | (_, _, 0 | 1) => "Future",
        (_, _, 2) => "Expected",
        _ => "Immediate",
    }
}

/// CAP `<severity>` of a notice (see the module table).
pub fn severity(n: &AlertNotice) -> &'static str {
    let f = n.fields();
    match (f.kind, f.level_rank) {
        (AlertKind::DataQuality, _) => "Unknown",
        (AlertKind::LineWideWetting, _) | (_, 0 | 1) => "Minor",
        (_, 2) => "Moderate",
        _ => "Severe",
    }
}

/// CAP `<certainty>` of a notice (see the module table).
pub fn certainty(n: &AlertNotice) -> &'static str {
    match n.fields().kind {
        AlertKind::DataQuality => "Observed",
        _ => "Possible",
    }
}

fn event_name(kind: AlertKind) -> &'static str {
    match kind {
        AlertKind::DropZone => "Embankment resistivity drop",
        AlertKind::RiseZone => "Embankment resistivity rise",
        AlertKind::LineWideWetting => "Embankment wetting along the line",
        AlertKind::DataQuality => "Embankment monitoring data quality",
    }
}

fn area_desc(n: &AlertNotice) -> String {
    let f = n.fields();
    match f.chainage_m {
        Some(r) => format!("{}, line {}, chainage {}", f.site, f.line, fmt_range_m(r)),
        None => format!("{}, line {}", f.site, f.line),
    }
}

fn description(n: &AlertNotice) -> String {
    let f = n.fields();
    let mut parts = vec![format!(
        "{} on line {} at {}: {}, {}.",
        match f.event {
            AlertEvent::Raised => "Alert raised",
            AlertEvent::Escalated => "Alert escalated",
            AlertEvent::Acknowledged => "Alert acknowledged",
            AlertEvent::Resolved => "Alert resolved",
        },
        f.line,
        f.site,
        f.kind.describe(),
        f.level_label
    )];
    if !f.summary.trim().is_empty() {
        parts.push(f.summary.trim().to_string());
    }
    if let Some(r) = f.chainage_m {
        parts.push(format!("Chainage {}.", fmt_range_m(r)));
    }
    if let Some((a, b)) = f.depth_m {
        parts.push(format!("Depth {}\u{2013}{} m below ground.", fmt_m(a), fmt_m(b)));
    }
    if let Some(p) = f.peak_change_pct {
        parts.push(format!("Peak change {} against the baseline.", fmt_pct(p)));
    }
    parts.push(format!(
        "Since {} UTC, held for {} consecutive epochs.",
        f.since.format("%Y-%m-%d %H:%M"),
        f.persistence_epochs
    ));
    parts.push(format!("Caution: {CAUTION}"));
    parts.join(" ")
}

fn instruction(n: &AlertNotice) -> String {
    let f = n.fields();
    match (f.event, f.kind) {
        (AlertEvent::Resolved, _) => {
            "This alert is over; no further action is requested by it.".into()
        }
        (_, AlertKind::DataQuality) => format!(
            "Have the monitoring line {} at {} checked; until then the line may not show changes in the embankment.",
            f.line, f.site
        ),
        _ => format!(
            "Have a qualified engineer inspect the embankment at {} and follow the owner's emergency action plan where it applies.",
            area_desc(n)
        ),
    }
}

/// A small wrapper over the XML writer; writing into memory cannot fail.
struct Xml(Writer<Vec<u8>>);

const MEMORY: &str = "writing XML into memory cannot fail";

impl Xml {
    fn new() -> Xml {
        let mut w = Writer::new_with_indent(Vec::new(), b' ', 2);
        w.write_event(Event::Decl(BytesDecl::new("1.0", Some("UTF-8"), None))).expect(MEMORY);
        Xml(w)
    }

    fn open(&mut self, name: &str, attrs: &[(&str, &str)]) {
        let start = BytesStart::new(name).with_attributes(attrs.iter().copied());
        self.0.write_event(Event::Start(start)).expect(MEMORY);
    }

    fn close(&mut self, name: &str) {
        self.0.write_event(Event::End(BytesEnd::new(name))).expect(MEMORY);
    }

    fn leaf(&mut self, name: &str, text: &str) {
        self.open(name, &[]);
        // Text needs only `<`, `>` and `&` escaped; apostrophes stay readable.
        let escaped = quick_xml::escape::partial_escape(text);
        self.0.write_event(Event::Text(BytesText::from_escaped(escaped))).expect(MEMORY);
        self.close(name);
    }

    fn empty(&mut self, name: &str, attrs: &[(&str, &str)]) {
        let start = BytesStart::new(name).with_attributes(attrs.iter().copied());
        self.0.write_event(Event::Empty(start)).expect(MEMORY);
    }

    fn finish(self) -> String {
        let mut s = String::from_utf8(self.0.into_inner()).expect("the writer only writes UTF-8");
        s.push('\n');
        s
    }
}

fn status_str(s: CapStatus) -> &'static str {
    match s {
        CapStatus::Actual => "Actual",
        CapStatus::Exercise => "Exercise",
        CapStatus::Test => "Test",
    }
}

/// Renders one alert event as a CAP 1.2 `<alert>` document (UTF-8 XML).
pub fn alert_document(n: &AlertNotice, area: Option<&CapArea>, p: &CapParams) -> String {
    let f = n.fields();
    let mut x = Xml::new();
    x.open("alert", &[("xmlns", CAP_NS)]);
    x.leaf("identifier", &identifier(n));
    x.leaf("sender", &p.sender);
    x.leaf("sent", &cap_time(f.event_at));
    x.leaf("status", status_str(p.status));
    x.leaf("msgType", if f.event == AlertEvent::Raised { "Alert" } else { "Update" });
    x.leaf("source", "ohmline");
    match p.scope {
        CapScope::Public => x.leaf("scope", "Public"),
        CapScope::Restricted => {
            x.leaf("scope", "Restricted");
            x.leaf("restriction", &p.restriction);
        }
    }
    if f.event != AlertEvent::Raised {
        let r = format!("{},{},{}", p.sender, raise_identifier(n), cap_time(f.raised_at));
        x.leaf("references", &r);
    }
    x.leaf("incidents", &format!("alert-{}", f.alert_id));

    x.open("info", &[]);
    x.leaf("language", "en");
    // Data quality concerns the monitoring installation only: no `Geo`.
    if f.kind != AlertKind::DataQuality {
        x.leaf("category", "Geo");
    }
    x.leaf("category", "Infra");
    x.leaf("event", event_name(f.kind));
    x.leaf("responseType", if f.event == AlertEvent::Resolved { "AllClear" } else { "Monitor" });
    x.leaf("urgency", urgency(n));
    x.leaf("severity", severity(n));
    x.leaf("certainty", certainty(n));
    if f.event != AlertEvent::Resolved {
        x.leaf("onset", &cap_time(f.since));
    }
    x.leaf("senderName", &p.sender_name);
    x.leaf("headline", subject(n).trim_start_matches("[ohmline] "));
    x.leaf("description", &description(n));
    x.leaf("instruction", &instruction(n));
    x.leaf("web", &f.link);
    let mut params: Vec<(&str, String)> = vec![
        ("ohmlineLevelRank", f.level_rank.to_string()),
        ("ohmlineLevel", f.level_label.clone()),
        ("ohmlineEvent", f.event.as_str().to_string()),
        ("ohmlinePersistenceEpochs", f.persistence_epochs.to_string()),
    ];
    if let Some((a, b)) = f.chainage_m {
        params.push(("ohmlineChainageM", format!("{a} {b}")));
    }
    if let Some((a, b)) = f.depth_m {
        params.push(("ohmlineDepthM", format!("{a} {b}")));
    }
    if let Some(a) = f.area_m2 {
        params.push(("ohmlineAreaM2", a.to_string()));
    }
    if let Some(c) = f.peak_change_pct {
        params.push(("ohmlinePeakChangePct", c.to_string()));
    }
    if let Some(s) = f.good_sensitivity_share {
        params.push(("ohmlineGoodSensitivityShare", s.to_string()));
    }
    for (name, value) in &params {
        x.open("parameter", &[]);
        x.leaf("valueName", name);
        x.leaf("value", value);
        x.close("parameter");
    }
    x.open("area", &[]);
    x.leaf("areaDesc", &area_desc(n));
    match area {
        Some(CapArea::Polygon(points)) => {
            let pairs: Vec<String> =
                points.iter().map(|p| format!("{:.6},{:.6}", p.lat, p.lon)).collect();
            x.leaf("polygon", &pairs.join(" "));
        }
        Some(CapArea::Circle { centre, radius_km }) => {
            x.leaf("circle", &format!("{:.6},{:.6} {:.3}", centre.lat, centre.lon, radius_km));
        }
        None => {}
    }
    x.close("area");
    x.close("info");
    x.close("alert");
    x.finish()
}

/// Settings of the Atom index.
#[derive(Debug, Clone, PartialEq)]
pub struct FeedParams {
    /// Base URL of the service (links to CAP documents and the feed itself).
    pub public_base_url: String,
    /// Feed title.
    pub title: String,
    /// The feed's `<updated>`: the newest entry's time, or now when empty.
    pub updated: DateTime<Utc>,
    /// Publisher name (`<author>`).
    pub author: String,
}

/// The URL of an alert's CAP document.
pub fn cap_url(public_base_url: &str, alert_id: i64) -> String {
    format!("{}/api/v1/alerts/{alert_id}/cap", public_base_url.trim_end_matches('/'))
}

fn atom_time(t: DateTime<Utc>) -> String {
    t.to_rfc3339_opts(SecondsFormat::Secs, true)
}

/// Renders an Atom feed with one entry per alert (`entries` = the latest
/// notice of each alert, in the order given, newest first). Each entry links to
/// the alert's CAP document (`rel="alternate"`, `application/cap+xml`) and its
/// page (`rel="related"`); its id is the alert page URL, stable over updates.
pub fn atom_feed(entries: &[AlertNotice], p: &FeedParams) -> String {
    let base = p.public_base_url.trim_end_matches('/');
    let self_url = format!("{base}/api/v1/alerts/feed.atom");
    let mut x = Xml::new();
    x.open("feed", &[("xmlns", ATOM_NS)]);
    x.leaf("id", &self_url);
    x.leaf("title", &p.title);
    x.leaf("subtitle", &format!("Embankment monitoring alerts. Caution: {CAUTION}"));
    x.leaf("updated", &atom_time(p.updated));
    x.open("author", &[]);
    x.leaf("name", &p.author);
    x.close("author");
    x.empty("link", &[("rel", "self"), ("type", "application/atom+xml"), ("href", &self_url)]);
    for n in entries {
        let f = n.fields();
        x.open("entry", &[]);
        x.leaf("id", &f.link);
        x.leaf("title", subject(n).trim_start_matches("[ohmline] "));
        x.leaf("updated", &atom_time(f.event_at));
        x.leaf("published", &atom_time(f.raised_at));
        let cap = cap_url(base, f.alert_id);
        x.empty("link", &[("rel", "alternate"), ("type", "application/cap+xml"), ("href", &cap)]);
        x.empty("link", &[("rel", "related"), ("type", "text/html"), ("href", &f.link)]);
        x.empty("category", &[("term", f.event.as_str())]);
        x.leaf("summary", &format!("{} Caution: {CAUTION}", description_head(n)));
        x.close("entry");
    }
    x.close("feed");
    x.finish()
}

fn description_head(n: &AlertNotice) -> String {
    let f = n.fields();
    let mut s =
        format!("{} ({}) on line {} at {}.", f.kind.describe(), f.level_label, f.line, f.site);
    if !f.summary.trim().is_empty() {
        s.push(' ');
        s.push_str(f.summary.trim());
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::notify::NewNotice;
    use crate::notify::tests::sample;

    // Code lists of OASIS Common Alerting Protocol Version 1.2 (OASIS Standard,
    // 1 July 2010), section 3.2: the values each element may take.
    const STATUS: &[&str] = &["Actual", "Exercise", "System", "Test", "Draft"];
    const MSG_TYPE: &[&str] = &["Alert", "Update", "Cancel", "Ack", "Error"];
    const SCOPE: &[&str] = &["Public", "Restricted", "Private"];
    const CATEGORY: &[&str] = &[
        "Geo",
        "Met",
        "Safety",
        "Security",
        "Rescue",
        "Fire",
        "Health",
        "Env",
        "Transport",
        "Infra",
        "CBRNE",
        "Other",
    ];
    const RESPONSE_TYPE: &[&str] = &[
        "Shelter", "Evacuate", "Prepare", "Execute", "Avoid", "Monitor", "Assess", "AllClear",
        "None",
    ];
    const URGENCY: &[&str] = &["Immediate", "Expected", "Future", "Past", "Unknown"];
    const SEVERITY: &[&str] = &["Extreme", "Severe", "Moderate", "Minor", "Unknown"];
    const CERTAINTY: &[&str] = &["Observed", "Likely", "Possible", "Unlikely", "Unknown"];
    // Element order of the CAP 1.2 schema (xs:sequence) for <alert>, <info> and <area>.
    const ALERT_ORDER: &[&str] = &[
        "identifier",
        "sender",
        "sent",
        "status",
        "msgType",
        "source",
        "scope",
        "restriction",
        "addresses",
        "code",
        "note",
        "references",
        "incidents",
        "info",
    ];
    const INFO_ORDER: &[&str] = &[
        "language",
        "category",
        "event",
        "responseType",
        "urgency",
        "severity",
        "certainty",
        "audience",
        "eventCode",
        "effective",
        "onset",
        "expires",
        "senderName",
        "headline",
        "description",
        "instruction",
        "web",
        "contact",
        "parameter",
        "resource",
        "area",
    ];
    const AREA_ORDER: &[&str] =
        &["areaDesc", "polygon", "circle", "geocode", "altitude", "ceiling"];

    fn params() -> CapParams {
        CapParams::from_config(&NotifyConfig {
            from: "ohmline <alerts@levees.example.org>".into(),
            ..NotifyConfig::default()
        })
    }

    fn children<'a>(n: roxmltree::Node<'a, 'a>) -> Vec<roxmltree::Node<'a, 'a>> {
        n.children().filter(|c| c.is_element()).collect()
    }

    fn one<'a>(n: roxmltree::Node<'a, 'a>, name: &str) -> roxmltree::Node<'a, 'a> {
        let found: Vec<_> =
            children(n).into_iter().filter(|c| c.has_tag_name((CAP_NS, name))).collect();
        assert_eq!(found.len(), 1, "<{}> must hold exactly one <{name}>", n.tag_name().name());
        found[0]
    }

    fn text<'a>(n: roxmltree::Node<'a, 'a>, name: &str) -> &'a str {
        one(n, name).text().unwrap_or("")
    }

    fn in_order(n: roxmltree::Node<'_, '_>, order: &[&str]) {
        let mut last = 0;
        for c in children(n) {
            let name = c.tag_name().name();
            let pos = order.iter().position(|o| *o == name).unwrap_or_else(|| {
                panic!("<{name}> is not a CAP 1.2 child of <{}>", n.tag_name().name())
            });
            assert!(pos >= last, "<{name}> out of the schema order");
            last = pos;
        }
    }

    /// A CAP date-time: `YYYY-MM-DDThh:mm:ss` and a numeric offset, never `Z`
    /// (CAP 1.2, 3.3.2 "dateTime Data Type").
    fn is_cap_time(s: &str) -> bool {
        let b = s.as_bytes();
        let digits = |r: std::ops::Range<usize>| r.into_iter().all(|i| b[i].is_ascii_digit());
        b.len() == 25
            && digits(0..4)
            && b[4] == b'-'
            && digits(5..7)
            && b[7] == b'-'
            && digits(8..10)
            && b[10] == b'T'
            && digits(11..13)
            && b[13] == b':'
            && digits(14..16)
            && b[16] == b':'
            && digits(17..19)
            && (b[19] == b'+' || b[19] == b'-')
            && digits(20..22)
            && b[22] == b':'
            && digits(23..25)
    }

    /// Renders, parses back and checks every element CAP 1.2 requires with
    /// values from its code lists; returns the document for further checks.
    fn check(change: impl FnOnce(&mut NewNotice), area: Option<&CapArea>, p: &CapParams) -> String {
        let mut f = sample();
        change(&mut f);
        let notice = AlertNotice::new(f).unwrap();
        let xml = alert_document(&notice, area, p);
        let doc = roxmltree::Document::parse(&xml).expect("well-formed XML");
        let alert = doc.root_element();
        assert!(alert.has_tag_name((CAP_NS, "alert")), "root must be cap:alert");
        in_order(alert, ALERT_ORDER);
        // Required: identifier, sender, sent, status, msgType, scope.
        for name in ["identifier", "sender"] {
            let v = text(alert, name);
            assert!(!v.is_empty() && !v.contains([' ', ',', '<', '&']), "<{name}> {v:?}");
        }
        assert!(is_cap_time(text(alert, "sent")), "{}", text(alert, "sent"));
        assert!(STATUS.contains(&text(alert, "status")));
        let msg_type = text(alert, "msgType");
        assert!(MSG_TYPE.contains(&msg_type));
        let scope = text(alert, "scope");
        assert!(SCOPE.contains(&scope));
        // <restriction> is used when scope is Restricted (3.2.1).
        if scope == "Restricted" {
            assert!(!text(alert, "restriction").is_empty());
        }
        // Updates reference the earlier message as "sender,identifier,sent" (3.2.1).
        if msg_type != "Alert" {
            let r = text(alert, "references");
            let parts: Vec<&str> = r.split(',').collect();
            assert_eq!(parts.len(), 3, "{r}");
            assert!(is_cap_time(parts[2]), "{r}");
        }
        let info = one(alert, "info");
        in_order(info, INFO_ORDER);
        let cats: Vec<&str> = children(info)
            .into_iter()
            .filter(|c| c.has_tag_name((CAP_NS, "category")))
            .map(|c| c.text().unwrap_or(""))
            .collect();
        assert!(!cats.is_empty() && cats.iter().all(|c| CATEGORY.contains(c)), "{cats:?}");
        assert!(!text(info, "event").is_empty());
        assert!(RESPONSE_TYPE.contains(&text(info, "responseType")));
        assert!(URGENCY.contains(&text(info, "urgency")));
        assert!(SEVERITY.contains(&text(info, "severity")));
        assert!(CERTAINTY.contains(&text(info, "certainty")));
        assert!(text(info, "description").contains(CAUTION), "the caution, verbatim");
        assert_eq!(text(info, "web"), notice.fields().link);
        for p in children(info).into_iter().filter(|c| c.has_tag_name((CAP_NS, "parameter"))) {
            assert!(!text(p, "valueName").is_empty());
            one(p, "value");
        }
        let area_el = one(info, "area");
        in_order(area_el, AREA_ORDER);
        assert!(!text(area_el, "areaDesc").is_empty());
        xml
    }

    fn mapping(xml: &str) -> (String, String, String, String) {
        let doc = roxmltree::Document::parse(xml).unwrap();
        let info = one(doc.root_element(), "info");
        let t = |n: &str| text(info, n).to_string();
        (t("urgency"), t("severity"), t("certainty"), text(doc.root_element(), "msgType").into())
    }

    #[test]
    fn a_raised_zone_alert_is_a_complete_cap_document() {
        let xml = check(|_| {}, None, &params());
        assert!(xml.contains("<sent>2026-03-03T06:00:00-00:00</sent>"), "{xml}");
        assert!(xml.contains("<identifier>alert-17-raised-20260303T060000000</identifier>"));
        assert!(xml.contains("<sender>alerts@levees.example.org</sender>"));
        assert!(
            xml.contains("<areaDesc>Levee North, line crest-a, chainage 24\u{2013}28 m</areaDesc>")
        );
        assert!(xml.contains("<onset>2026-03-01T06:00:00-00:00</onset>"));
        assert_eq!(
            mapping(&xml),
            ("Expected".into(), "Moderate".into(), "Possible".into(), "Alert".into())
        );
    }

    #[test]
    fn levels_and_events_map_to_cap_values() {
        let p = params();
        let level = |rank: u8| {
            move |f: &mut NewNotice| {
                f.level_rank = rank;
                f.event = AlertEvent::Escalated;
                f.event_at = f.raised_at + chrono::Duration::hours(12);
            }
        };
        let m = |x: &str| mapping(x);
        assert_eq!(m(&check(level(1), None, &p)).0, "Future");
        assert_eq!(m(&check(level(1), None, &p)).1, "Minor");
        let l3 = m(&check(level(3), None, &p));
        assert_eq!(
            (l3.0.as_str(), l3.1.as_str(), l3.3.as_str()),
            ("Immediate", "Severe", "Update")
        );
        let resolved = check(|f| f.event = AlertEvent::Resolved, None, &p);
        assert_eq!(m(&resolved).0, "Past");
        assert!(resolved.contains("<responseType>AllClear</responseType>"));
        assert!(resolved.contains(
            "<references>alerts@levees.example.org,alert-17-raised-20260303T060000000,2026-03-03T06:00:00-00:00</references>"
        ));
        let dq = check(
            |f| {
                f.kind = AlertKind::DataQuality;
                f.level_rank = 0;
                f.chainage_m = None;
            },
            None,
            &p,
        );
        assert_eq!(m(&dq), ("Future".into(), "Unknown".into(), "Observed".into(), "Alert".into()));
        assert!(!dq.contains("<category>Geo</category>"));
        let public = CapParams { scope: CapScope::Public, status: CapStatus::Test, ..params() };
        let xml = check(|_| {}, None, &public);
        assert!(!xml.contains("<restriction>") && xml.contains("<status>Test</status>"));
    }

    #[test]
    fn names_with_markup_survive_the_round_trip() {
        let xml = check(|f| f.site = "Dyke <North> & Sons".into(), None, &params());
        let doc = roxmltree::Document::parse(&xml).unwrap();
        let info = one(doc.root_element(), "info");
        assert_eq!(
            text(one(info, "area"), "areaDesc"),
            "Dyke <North> & Sons, line crest-a, chainage 24\u{2013}28 m"
        );
    }

    #[test]
    fn areas_are_written_as_cap_polygons_and_circles() {
        let pts = vec![
            LatLon { lat: 52.0, lon: 5.0 },
            LatLon { lat: 52.001, lon: 5.0 },
            LatLon { lat: 52.001, lon: 5.001 },
        ];
        let poly = CapArea::polygon(pts).unwrap();
        let xml = check(|_| {}, Some(&poly), &params());
        let doc = roxmltree::Document::parse(&xml).unwrap();
        let area = one(one(doc.root_element(), "info"), "area");
        // CAP 1.2 3.2.4 <polygon>: "lat,lon" pairs, at least 4, first = last.
        let pairs: Vec<&str> = text(area, "polygon").split_whitespace().collect();
        assert_eq!(pairs.len(), 4);
        assert_eq!(pairs[0], pairs[3]);
        assert_eq!(pairs[0], "52.000000,5.000000");
        assert!(CapArea::polygon(vec![LatLon { lat: 52.0, lon: 5.0 }; 2]).is_err());
        assert!(CapArea::polygon(vec![LatLon { lat: 95.0, lon: 5.0 }; 3]).is_err());

        // A line due north along a meridian: arc length s = R·Δφ on a sphere
        // (analytic), so 100 m of chainage is 100 / (R·π/180) degrees of latitude.
        let deg_per_m = 180.0 / (std::f64::consts::PI * EARTH_RADIUS_KM * 1000.0);
        let line = [
            (0.0, LatLon { lat: 52.0, lon: 5.0 }),
            (100.0, LatLon { lat: 52.0 + 100.0 * deg_per_m, lon: 5.0 }),
        ];
        let c = CapArea::around_chainage(&line, 40.0, 60.0, 5.0).unwrap();
        let CapArea::Circle { centre, radius_km } = c else { panic!("a circle") };
        assert!((centre.lat - (52.0 + 50.0 * deg_per_m)).abs() < 1e-9);
        // Half the range (10 m) plus the margin (5 m); haversine vs arc length
        // agree to rounding on a meridian (tolerance 1 mm).
        assert!((radius_km - 0.015).abs() < 1e-6, "{radius_km}");
        let xml = check(|_| {}, Some(&c), &params());
        let doc = roxmltree::Document::parse(&xml).unwrap();
        let circle = text(one(one(doc.root_element(), "info"), "area"), "circle").to_string();
        // CAP 1.2 3.2.4 <circle>: "lat,lon radius" with the radius in km.
        let (point, radius) = circle.split_once(' ').unwrap();
        assert_eq!(point.split(',').count(), 2);
        assert_eq!(radius, "0.015");
        assert!(CapArea::around_chainage(&line[..1], 0.0, 1.0, 0.0).is_err());
    }

    #[test]
    fn haversine_matches_a_known_distance() {
        // One degree of longitude on the equator is R·π/180 = 111.195 km for
        // R = 6371.0088 km (analytic arc length).
        let d = distance_km(LatLon { lat: 0.0, lon: 0.0 }, LatLon { lat: 0.0, lon: 1.0 });
        assert!((d - EARTH_RADIUS_KM * std::f64::consts::PI / 180.0).abs() < 1e-9, "{d}");
        assert!((d - 111.195).abs() < 1e-3);
    }

    #[test]
    fn the_atom_index_lists_alerts_with_their_cap_links() {
        let a = AlertNotice::new(sample()).unwrap();
        let mut f = sample();
        f.alert_id = 18;
        f.link = "https://levees.example.org/alerts/18".into();
        f.site = "Dyke <South>".into();
        let b = AlertNotice::new(f).unwrap();
        let p = FeedParams {
            public_base_url: "https://levees.example.org/".into(),
            title: "ohmline alerts".into(),
            updated: a.fields().event_at,
            author: "Levee authority".into(),
        };
        let xml = atom_feed(&[b, a], &p);
        let doc = roxmltree::Document::parse(&xml).unwrap();
        let feed = doc.root_element();
        assert!(feed.has_tag_name((ATOM_NS, "feed")));
        let el = |n: roxmltree::Node<'_, '_>, name: &str| {
            n.children().filter(|c| c.has_tag_name((ATOM_NS, name))).count()
        };
        // RFC 4287 4.1.1: a feed has exactly one id, title and updated, and an
        // author (here at feed level); 4.1.2: so has every entry, with a
        // rel="alternate" link when it has no content.
        for name in ["id", "title", "updated", "author"] {
            assert_eq!(el(feed, name), 1, "feed/{name}");
        }
        let entries: Vec<_> =
            feed.children().filter(|c| c.has_tag_name((ATOM_NS, "entry"))).collect();
        assert_eq!(entries.len(), 2);
        for e in &entries {
            for name in ["id", "title", "updated"] {
                assert_eq!(el(*e, name), 1, "entry/{name}");
            }
            let updated = e.children().find(|c| c.has_tag_name((ATOM_NS, "updated"))).unwrap();
            assert!(DateTime::parse_from_rfc3339(updated.text().unwrap()).is_ok());
            let summary = e.children().find(|c| c.has_tag_name((ATOM_NS, "summary"))).unwrap();
            assert!(summary.text().unwrap().contains(CAUTION));
        }
        let alt = entries[0]
            .children()
            .find(|c| c.has_tag_name((ATOM_NS, "link")) && c.attribute("rel") == Some("alternate"))
            .unwrap();
        assert_eq!(alt.attribute("href"), Some("https://levees.example.org/api/v1/alerts/18/cap"));
        assert_eq!(alt.attribute("type"), Some("application/cap+xml"));
        let title = entries[0].children().find(|c| c.has_tag_name((ATOM_NS, "title"))).unwrap();
        assert!(title.text().unwrap().contains("Dyke <South> / crest-a"));
    }
}
