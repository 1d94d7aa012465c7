//! Site time series: river stage, rainfall, air and ground temperature, or a
//! named quantity with its unit, uploaded as CSV or JSON and shown on the line
//! pages on the time axis of the epochs.
//!
//! Kinds and units: `river_stage` (m), `rainfall` (mm, the amount fallen in
//! the interval ending at the sample's time), `air_temperature` (°C),
//! `ground_temperature` (°C); any other kind is a name of 1–40 characters
//! `a-z 0-9 _ -` starting with a letter or digit, whose unit must be given with
//! its first upload. A unit given for a stored series must equal its unit.
//!
//! CSV: optional `# unit: U` lines, then the header `time,value` (required),
//! then one sample per row; times RFC 3339 with a UTC offset (`Z` or ±hh:mm),
//! values finite numbers. The unit may also come as the query parameter
//! `unit`. JSON: `{"unit"?: U, "samples": [{"time": T, "value": V}, …]}`.
//! Times are kept to the millisecond. Two samples at the same time in one
//! upload are an error.
//!
//! Order of work, as for epochs: the raw body is stored verbatim (gzip) with
//! its SHA-256 before parsing; any problem rejects the whole upload with the
//! row (CSV, 1-based line in the file) or index (JSON `samples[i]`) and the
//! field, nothing of it stored but the raw body and the reason; the samples go
//! in one transaction ([`crate::db::series::store`]): a new time is added, the
//! same value at a stored time changes nothing (re-sending is idempotent), a
//! different value replaces the stored one and the old value is recorded.

use std::io::Write;

use chrono::{DateTime, Utc};
use serde::Serialize;
use serde_json::Value;
use sha2::{Digest, Sha256};
use thiserror::Error;

use crate::db::series::NewUpload;
use crate::db::sites::Site;
use crate::db::{self, Db, DbError};
use crate::ingest::parse::Location;

/// The kinds with a fixed unit: kind, unit, title.
pub const KNOWN_KINDS: [(&str, &str, &str); 4] = [
    ("river_stage", "m", "River stage"),
    ("rainfall", "mm", "Rainfall"),
    ("air_temperature", "°C", "Air temperature"),
    ("ground_temperature", "°C", "Ground temperature"),
];

/// Most samples in one upload.
pub const MAX_SAMPLES: usize = 200_000;

/// Why a series upload was not stored.
#[derive(Debug, Error)]
pub enum SeriesError {
    /// Neither CSV nor JSON.
    #[error("unsupported content type {0:?}: send text/csv or application/json")]
    UnsupportedContentType(String),
    /// More samples than allowed in one upload.
    #[error("more than {limit} samples in one upload")]
    TooManySamples {
        /// The limit.
        limit: usize,
    },
    /// The kind, the unit, a time or a value is missing or malformed.
    #[error("{message}")]
    Invalid {
        /// Full message including the location.
        message: String,
        /// Where.
        at: Location,
    },
    /// Storage failed.
    #[error(transparent)]
    Db(#[from] DbError),
}

impl SeriesError {
    /// True for errors caused by the upload itself (as opposed to storage).
    pub fn is_client_error(&self) -> bool {
        !matches!(self, SeriesError::Db(_))
    }

    /// Where in the upload, for invalid input.
    pub fn location(&self) -> Option<&Location> {
        match self {
            SeriesError::Invalid { at, .. } => Some(at),
            _ => None,
        }
    }
}

/// Builds [`SeriesError::Invalid`] with the place in front of the message.
fn invalid(at: Location, message: impl Into<String>) -> SeriesError {
    let message = message.into();
    let mut place = Vec::new();
    if let Some(r) = at.row {
        place.push(format!("row {r}"));
    }
    if let Some(i) = at.index {
        place.push(format!("samples[{i}]"));
    }
    if let Some(f) = &at.field {
        place.push(format!("field {f}"));
    }
    let message =
        if place.is_empty() { message } else { format!("{}: {message}", place.join(", ")) };
    SeriesError::Invalid { message, at }
}

fn at_row(row: usize, field: &str) -> Location {
    Location { row: Some(row), index: None, field: Some(field.into()) }
}

fn at_index(index: usize, field: &str) -> Location {
    Location { row: None, index: Some(index), field: Some(field.into()) }
}

/// Checks a kind: a known kind, or a name of 1–40 characters `a-z 0-9 _ -`
/// starting with a letter or digit.
pub fn check_kind(kind: &str) -> Result<(), SeriesError> {
    let ok = !kind.is_empty()
        && kind.len() <= 40
        && kind
            .bytes()
            .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'_' || b == b'-')
        && kind.as_bytes()[0].is_ascii_alphanumeric();
    if ok {
        Ok(())
    } else {
        Err(invalid(
            Location::field("kind"),
            format!(
                "{kind:?} is not a series kind: use river_stage, rainfall, air_temperature, \
                 ground_temperature, or a name of 1–40 characters a-z, 0-9, _ and -"
            ),
        ))
    }
}

/// The fixed unit of a known kind.
pub fn known_unit(kind: &str) -> Option<&'static str> {
    KNOWN_KINDS.iter().find(|k| k.0 == kind).map(|k| k.1)
}

/// A title for a kind: the known kind's, or the name with spaces.
pub fn title(kind: &str) -> String {
    match KNOWN_KINDS.iter().find(|k| k.0 == kind) {
        Some(k) => k.2.to_string(),
        None => {
            let s = kind.replace(['_', '-'], " ");
            let mut c = s.chars();
            match c.next() {
                Some(f) => f.to_uppercase().chain(c).collect(),
                None => s,
            }
        }
    }
}

/// A unit as written by people: `degC`, `C` and `deg C` are °C; otherwise
/// trimmed. 1–16 characters without control characters.
fn normalise_unit(raw: &str, at: Location) -> Result<String, SeriesError> {
    let u = raw.trim();
    let u = match u {
        "degC" | "deg C" | "C" | "ºC" => "°C",
        _ => u,
    };
    if u.is_empty() || u.chars().count() > 16 || u.chars().any(char::is_control) {
        return Err(invalid(
            at,
            format!("{raw:?} is not a unit (1–16 characters, e.g. m, mm, °C)"),
        ));
    }
    Ok(u.to_string())
}

/// The unit of an upload: given (body or query) and checked against the
/// kind's fixed unit and the stored series' unit, or taken from them.
fn resolve_unit(
    kind: &str,
    given: Option<(String, Location)>,
    stored: Option<&str>,
) -> Result<String, SeriesError> {
    let fixed = known_unit(kind).or(stored);
    match (given, fixed) {
        (Some((u, at)), Some(f)) if u != f => {
            Err(invalid(at, format!("the unit of {kind} is {f:?}, not {u:?}")))
        }
        (Some((u, _)), _) => Ok(u),
        (None, Some(f)) => Ok(f.to_string()),
        (None, None) => Err(invalid(
            Location::field("unit"),
            format!(
                "{kind} is a new series of a kind without a fixed unit: give its unit (query \
                 parameter unit, a '# unit:' line, or the JSON key unit)"
            ),
        )),
    }
}

/// An upload after parsing.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ParsedSeries {
    /// Unit given in the body, with where.
    pub unit: Option<(String, Location)>,
    /// Samples in time order (strictly increasing, milliseconds).
    pub samples: Vec<(DateTime<Utc>, f64)>,
}

fn parse_time(s: &str, at: Location) -> Result<DateTime<Utc>, SeriesError> {
    DateTime::parse_from_rfc3339(s.trim()).map(|t| db::ms(t.with_timezone(&Utc))).map_err(|e| {
        invalid(
            at,
            format!(
                "{s:?} is not an RFC 3339 time with a UTC offset, e.g. 2026-03-01T06:00:00Z ({e})"
            ),
        )
    })
}

fn check_value(v: f64, raw: &str, at: Location) -> Result<f64, SeriesError> {
    if v.is_finite() { Ok(v) } else { Err(invalid(at, format!("{raw:?} is not a finite number"))) }
}

/// Sorts samples by time and refuses two at the same time, naming both places.
fn ordered(
    mut samples: Vec<(DateTime<Utc>, f64, Location)>,
) -> Result<Vec<(DateTime<Utc>, f64)>, SeriesError> {
    samples.sort_by_key(|s| s.0);
    for w in samples.windows(2) {
        if w[0].0 == w[1].0 {
            let (first, second) = match (w[0].2.row, w[1].2.row) {
                (Some(a), Some(b)) if a > b => (&w[1].2, &w[0].2),
                _ => match (w[0].2.index, w[1].2.index) {
                    (Some(a), Some(b)) if a > b => (&w[1].2, &w[0].2),
                    _ => (&w[0].2, &w[1].2),
                },
            };
            let other = first
                .row
                .map(|r| format!("row {r}"))
                .or(first.index.map(|i| format!("samples[{i}]")))
                .unwrap_or_default();
            return Err(invalid(
                second.clone(),
                format!("repeats the time {} of {other}", w[0].0.to_rfc3339()),
            ));
        }
    }
    Ok(samples.into_iter().map(|(t, v, _)| (t, v)).collect())
}

/// Parses a CSV upload (see the module documentation).
pub fn parse_csv(body: &[u8]) -> Result<ParsedSeries, SeriesError> {
    let text = std::str::from_utf8(body)
        .map_err(|e| invalid(Location::default(), format!("the body is not UTF-8 text ({e})")))?;
    let mut unit = None;
    let mut header_seen = false;
    let mut samples = Vec::new();
    for (i, line) in text.lines().enumerate() {
        let row = i + 1;
        let l = line.trim().trim_start_matches('\u{feff}');
        if l.is_empty() {
            continue;
        }
        if let Some(meta) = l.strip_prefix('#') {
            if let Some((k, v)) = meta.split_once(':')
                && k.trim().eq_ignore_ascii_case("unit")
            {
                unit = Some((normalise_unit(v, at_row(row, "unit"))?, at_row(row, "unit")));
            }
            continue;
        }
        let cols: Vec<&str> = l.split(',').map(str::trim).collect();
        if !header_seen {
            let names: Vec<String> =
                cols.iter().map(|c| c.trim_matches('"').to_ascii_lowercase()).collect();
            if names != ["time", "value"] {
                return Err(invalid(
                    at_row(row, "header"),
                    format!("the header must be time,value, not {l:?}"),
                ));
            }
            header_seen = true;
            continue;
        }
        if cols.len() != 2 {
            return Err(invalid(
                at_row(row, "value"),
                format!("expected 2 columns (time,value), found {}", cols.len()),
            ));
        }
        if samples.len() == MAX_SAMPLES {
            return Err(SeriesError::TooManySamples { limit: MAX_SAMPLES });
        }
        let t = parse_time(cols[0].trim_matches('"'), at_row(row, "time"))?;
        let raw = cols[1].trim_matches('"');
        if raw.is_empty() {
            return Err(invalid(at_row(row, "value"), "is empty"));
        }
        let v = raw
            .parse::<f64>()
            .map_err(|_| invalid(at_row(row, "value"), format!("{raw:?} is not a number")))?;
        samples.push((t, check_value(v, raw, at_row(row, "value"))?, at_row(row, "time")));
    }
    if !header_seen {
        return Err(invalid(Location::field("header"), "the upload has no header row time,value"));
    }
    if samples.is_empty() {
        return Err(invalid(Location::default(), "the upload holds no samples"));
    }
    Ok(ParsedSeries { unit, samples: ordered(samples)? })
}

/// Parses a JSON upload (see the module documentation).
pub fn parse_json(body: &[u8]) -> Result<ParsedSeries, SeriesError> {
    let v: Value = serde_json::from_slice(body)
        .map_err(|e| invalid(Location::default(), format!("the body is not valid JSON ({e})")))?;
    let obj = v.as_object().ok_or_else(|| {
        invalid(Location::default(), "the body must be an object with a samples array")
    })?;
    let unit = match obj.get("unit") {
        None | Some(Value::Null) => None,
        Some(Value::String(s)) => {
            Some((normalise_unit(s, Location::field("unit"))?, Location::field("unit")))
        }
        Some(other) => {
            return Err(invalid(Location::field("unit"), format!("{other} is not a string")));
        }
    };
    let list = obj
        .get("samples")
        .and_then(Value::as_array)
        .ok_or_else(|| invalid(Location::field("samples"), "an array of samples is required"))?;
    if list.len() > MAX_SAMPLES {
        return Err(SeriesError::TooManySamples { limit: MAX_SAMPLES });
    }
    if list.is_empty() {
        return Err(invalid(Location::field("samples"), "the upload holds no samples"));
    }
    let mut samples = Vec::with_capacity(list.len());
    for (i, s) in list.iter().enumerate() {
        let time = match s.get("time") {
            Some(Value::String(t)) => parse_time(t, at_index(i, "time"))?,
            Some(other) => {
                return Err(invalid(at_index(i, "time"), format!("{other} is not a time string")));
            }
            None => return Err(invalid(at_index(i, "time"), "is missing")),
        };
        let value = match s.get("value") {
            Some(Value::Number(n)) => {
                let f = n.as_f64().unwrap_or(f64::NAN);
                check_value(f, &n.to_string(), at_index(i, "value"))?
            }
            Some(other) => {
                return Err(invalid(at_index(i, "value"), format!("{other} is not a number")));
            }
            None => return Err(invalid(at_index(i, "value"), "is missing")),
        };
        samples.push((time, value, at_index(i, "time")));
    }
    Ok(ParsedSeries { unit, samples: ordered(samples)? })
}

/// Parses a body by its content type (parameters such as `; charset=` ignored).
pub fn parse_body(body: &[u8], content_type: &str) -> Result<ParsedSeries, SeriesError> {
    let mime = content_type.split(';').next().unwrap_or("").trim().to_ascii_lowercase();
    match mime.as_str() {
        "text/csv" | "application/csv" | "text/plain" => parse_csv(body),
        "application/json" => parse_json(body),
        _ => Err(SeriesError::UnsupportedContentType(content_type.to_string())),
    }
}

/// A series upload as received.
#[derive(Debug, Clone)]
pub struct SeriesUpload<'a> {
    /// Body bytes.
    pub body: &'a [u8],
    /// Declared content type (`text/csv`, `application/json`).
    pub content_type: &'a str,
    /// Unit from outside the body (query parameter or form field), if any.
    pub unit: Option<&'a str>,
    /// Query string as received (kept with the raw body).
    pub query: &'a str,
    /// `api`, `web` or `cli`.
    pub source: &'a str,
    /// Who sent it.
    pub actor: &'a str,
    /// File name, if any.
    pub filename: Option<&'a str>,
}

/// What an accepted upload did.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SeriesAccepted {
    /// The upload's id (its raw body is kept).
    pub upload_id: i64,
    /// Site name.
    pub site: String,
    /// Kind.
    pub kind: String,
    /// Unit.
    pub unit: String,
    /// Samples in the upload.
    pub n_samples: usize,
    /// Samples at new times.
    pub added: usize,
    /// Samples already stored with the same value.
    pub unchanged: usize,
    /// Samples that replaced a different stored value (old values recorded).
    pub replaced: usize,
    /// Time of the upload's first sample.
    pub first: DateTime<Utc>,
    /// Time of its last sample.
    pub last: DateTime<Utc>,
}

impl SeriesAccepted {
    /// Whether the upload changed anything.
    pub fn changed(&self) -> bool {
        self.added + self.replaced > 0
    }
}

/// Stores one upload of the site's series `kind`: the raw body first, then
/// the parsed samples (see the module documentation).
#[tracing::instrument(skip_all, fields(site = %site.name, kind, source = upload.source))]
pub async fn upload(
    db: &Db,
    site: &Site,
    kind: &str,
    upload: SeriesUpload<'_>,
) -> Result<SeriesAccepted, SeriesError> {
    check_kind(kind)?;
    let body = upload.body.to_vec();
    let (sha, gz) = tokio::task::spawn_blocking(move || {
        let sha = hex::encode(Sha256::digest(&body));
        let mut enc = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
        enc.write_all(&body).expect("writing to memory");
        (sha, enc.finish().expect("writing to memory"))
    })
    .await
    .expect("compression task");
    let upload_id = db::series::insert_upload(
        db,
        &NewUpload {
            site_id: site.id,
            kind,
            source: upload.source,
            actor: upload.actor,
            filename: upload.filename,
            content_type: upload.content_type,
            query: upload.query,
            sha256: &sha,
            size_bytes: upload.body.len(),
            body_gz: &gz,
        },
    )
    .await?;
    let result = check_and_store(db, site, kind, &upload, upload_id).await;
    match &result {
        Ok(a) => tracing::info!(
            upload = upload_id,
            added = a.added,
            unchanged = a.unchanged,
            replaced = a.replaced,
            "series samples stored"
        ),
        Err(e) if e.is_client_error() => {
            db::series::reject_upload(db, upload_id, &e.to_string()).await?;
            tracing::warn!(upload = upload_id, error = %e, "series upload rejected");
        }
        Err(e) => tracing::error!(upload = upload_id, error = %e, "series upload not stored"),
    }
    result
}

async fn check_and_store(
    db: &Db,
    site: &Site,
    kind: &str,
    upload: &SeriesUpload<'_>,
    upload_id: i64,
) -> Result<SeriesAccepted, SeriesError> {
    let parsed = parse_body(upload.body, upload.content_type)?;
    let outside = match upload.unit.map(str::trim).filter(|u| !u.is_empty()) {
        Some(u) => Some((normalise_unit(u, Location::field("unit"))?, Location::field("unit"))),
        None => None,
    };
    let given = match (outside, parsed.unit) {
        (Some((a, at)), Some((b, _))) if a != b => {
            return Err(invalid(
                at,
                format!("the unit {a:?} differs from the unit {b:?} given in the body"),
            ));
        }
        (Some(a), _) => Some(a),
        (None, b) => b,
    };
    let stored = db::series::by_kind(db, site.id, kind).await?;
    let unit = resolve_unit(kind, given, stored.as_ref().map(|s| s.unit.as_str()))?;
    let samples = parsed.samples;
    let outcome = match db::series::store(db, upload_id, site.id, kind, &unit, &samples).await {
        // A series created with another unit between the check and the store.
        Err(DbError::Conflict { what }) => {
            return Err(invalid(Location::field("unit"), format!("{what} stored meanwhile")));
        }
        r => r?,
    };
    Ok(SeriesAccepted {
        upload_id,
        site: site.name.clone(),
        kind: kind.to_string(),
        unit,
        n_samples: samples.len(),
        added: outcome.added,
        unchanged: outcome.unchanged,
        replaced: outcome.replaced,
        first: samples[0].0,
        last: samples[samples.len() - 1].0,
    })
}

/// A site by its id (digits) or its name.
pub async fn site_by_key(db: &Db, key: &str) -> Result<Option<Site>, DbError> {
    if let Ok(id) = key.parse::<i64>()
        && let Some(s) = db::sites::by_id(db, id).await?
    {
        return Ok(Some(s));
    }
    db::sites::by_name(db, key).await
}

#[cfg(test)]
mod tests {
    use super::*;

    fn err_at(r: Result<ParsedSeries, SeriesError>) -> (Location, String) {
        match r {
            Err(SeriesError::Invalid { at, message }) => (at, message),
            other => panic!("expected an invalid upload, got {other:?}"),
        }
    }

    #[test]
    fn csv_with_unit_line_is_read_in_time_order() {
        let p = parse_csv(
            b"# unit: m\ntime,value\n2026-03-01T06:00:00Z,1.25\n2026-03-01T00:00:00+01:00,0.5\n",
        )
        .unwrap();
        assert_eq!(p.unit.as_ref().map(|u| u.0.as_str()), Some("m"));
        // 00:00+01:00 is 23:00 UTC the day before, so it comes first.
        assert_eq!(p.samples.len(), 2);
        assert_eq!(p.samples[0].0.to_rfc3339(), "2026-02-28T23:00:00+00:00");
        assert_eq!(p.samples[1].1, 1.25);
    }

    #[test]
    fn bad_csv_names_row_and_field() {
        let (at, msg) =
            err_at(parse_csv(b"time,value\n2026-03-01T00:00:00Z,1\n2026-03-01T01:00:00Z,abc\n"));
        assert_eq!((at.row, at.field.as_deref()), (Some(3), Some("value")));
        assert!(msg.starts_with("row 3, field value:"), "{msg}");
        let (at, _) = err_at(parse_csv(b"time,value\n2026-03-01 00:00,1\n"));
        assert_eq!((at.row, at.field.as_deref()), (Some(2), Some("time")));
        let (at, _) = err_at(parse_csv(b"when,level\n2026-03-01T00:00:00Z,1\n"));
        assert_eq!((at.row, at.field.as_deref()), (Some(1), Some("header")));
        let (at, msg) =
            err_at(parse_csv(b"time,value\n2026-03-01T00:00:00Z,1\n2026-03-01T00:00:00.000Z,2\n"));
        assert_eq!(at.row, Some(3));
        assert!(msg.contains("of row 2"), "{msg}");
        let (at, _) = err_at(parse_csv(b"time,value\n2026-03-01T00:00:00Z,NaN\n"));
        assert_eq!(at.field.as_deref(), Some("value"));
        assert!(parse_csv(b"time,value\n").is_err(), "no samples");
    }

    #[test]
    fn json_errors_name_the_sample() {
        let p =
            parse_json(br#"{"unit":"mm","samples":[{"time":"2026-03-01T00:00:00Z","value":2}]}"#)
                .unwrap();
        assert_eq!(p.samples.len(), 1);
        let (at, msg) = err_at(parse_json(
            br#"{"samples":[{"time":"2026-03-01T00:00:00Z","value":2},{"time":"2026-03-01T01:00:00Z","value":"x"}]}"#,
        ));
        assert_eq!((at.index, at.field.as_deref()), (Some(1), Some("value")));
        assert!(msg.starts_with("samples[1], field value:"), "{msg}");
        let (at, _) = err_at(parse_json(br#"{"samples":[{"value":2}]}"#));
        assert_eq!((at.index, at.field.as_deref()), (Some(0), Some("time")));
    }

    #[test]
    fn units_follow_the_kind_and_the_stored_series() {
        let f = |u: &str| Some((u.to_string(), Location::field("unit")));
        assert_eq!(resolve_unit("river_stage", None, None).unwrap(), "m");
        assert!(resolve_unit("river_stage", f("cm"), None).is_err());
        assert_eq!(
            resolve_unit(
                "air_temperature",
                Some((normalise_unit("degC", Location::default()).unwrap(), Location::default())),
                None
            )
            .unwrap(),
            "°C"
        );
        assert!(resolve_unit("piezometer_p3", None, None).is_err(), "a new free kind needs a unit");
        assert_eq!(resolve_unit("piezometer_p3", f("kPa"), None).unwrap(), "kPa");
        assert_eq!(resolve_unit("piezometer_p3", None, Some("kPa")).unwrap(), "kPa");
        assert!(resolve_unit("piezometer_p3", f("m"), Some("kPa")).is_err());
        assert!(check_kind("river_stage").is_ok() && check_kind("p-3_a").is_ok());
        for bad in ["", "River", "_x", "a b", &"x".repeat(41)] {
            assert!(check_kind(bad).is_err(), "{bad:?}");
        }
        assert_eq!(title("river_stage"), "River stage");
        assert_eq!(title("piezometer_p3"), "Piezometer p3");
    }
}
