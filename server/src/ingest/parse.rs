//! Parsing of epoch uploads (CSV and JSON) into [`ParsedEpoch`], with errors that
//! name the row (CSV: 1-based line number in the file), the reading (JSON: 0-based
//! index in `readings`) and the field.
//!
//! CSV: optional metadata lines `# key: value` before the header (`started_at`,
//! `finished_at`, `meter_id`, `sequence_version`, `temperatures`), then a header
//! row and one reading per row. Columns `a,b,m,n` are electrode labels (`b`/`n`
//! empty for a remote electrode); `resistance_ohm`, or `current_ma` and
//! `voltage_mv`; optional `stack_error_pct`, `contact_a_ohm`, `contact_b_ohm`.
//! Other columns are ignored and reported.
//!
//! JSON: `{"started_at": RFC3339, "finished_at"?, "meter_id"?, "sequence_version"?,
//! "temperatures"?: [{"depth_m", "temperature_c"}], "readings": [{...same fields}]}`.

use std::collections::BTreeMap;

use chrono::{DateTime, Utc};
use serde::Serialize;
use serde_json::Value;

use super::IngestError;

/// Where in an upload something is.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize)]
pub struct Location {
    /// CSV: 1-based line number in the file.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub row: Option<usize>,
    /// JSON: 0-based index in `readings`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub index: Option<usize>,
    /// Field (column) name.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub field: Option<String>,
}

impl Location {
    /// A whole-upload field such as `started_at`.
    pub fn field(f: &str) -> Self {
        Self { field: Some(f.into()), ..Self::default() }
    }

    /// The same place with a field.
    pub fn with_field(&self, f: &str) -> Self {
        Self { field: Some(f.into()), ..self.clone() }
    }

    fn describe(&self) -> String {
        let mut parts = Vec::new();
        if let Some(r) = self.row {
            parts.push(format!("row {r}"));
        }
        if let Some(i) = self.index {
            parts.push(format!("readings[{i}]"));
        }
        if let Some(f) = &self.field {
            parts.push(format!("field {f}"));
        }
        parts.join(", ")
    }
}

/// Builds an [`IngestError::Invalid`] at a location.
pub(crate) fn invalid(at: Location, message: impl Into<String>) -> IngestError {
    let message = message.into();
    let place = at.describe();
    IngestError::Invalid {
        message: if place.is_empty() { message } else { format!("{place}: {message}") },
        at,
    }
}

/// One reading as uploaded (labels not yet resolved).
#[derive(Debug, Clone, PartialEq)]
pub struct ParsedReading {
    /// Where it is in the upload.
    pub at: Location,
    /// Current electrode A label.
    pub a: String,
    /// Current electrode B label, `None` for remote.
    pub b: Option<String>,
    /// Potential electrode M label.
    pub m: String,
    /// Potential electrode N label, `None` for remote.
    pub n: Option<String>,
    /// Ω.
    pub resistance_ohm: Option<f64>,
    /// mA.
    pub current_ma: Option<f64>,
    /// mV.
    pub voltage_mv: Option<f64>,
    /// %.
    pub stack_error_pct: Option<f64>,
    /// Ω.
    pub contact_a_ohm: Option<f64>,
    /// Ω.
    pub contact_b_ohm: Option<f64>,
}

/// An upload after parsing, before checks against the line.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ParsedEpoch {
    /// Start of the run.
    pub started_at: Option<DateTime<Utc>>,
    /// End of the run.
    pub finished_at: Option<DateTime<Utc>>,
    /// Meter identifier.
    pub meter_id: Option<String>,
    /// Sequence version the meter ran (default: the line's newest).
    pub sequence_version: Option<i64>,
    /// Ground temperatures (depth m, °C).
    pub temperatures: Vec<(f64, f64)>,
    /// Readings in upload order.
    pub readings: Vec<ParsedReading>,
    /// Columns or keys that were not understood and were ignored.
    pub ignored: Vec<String>,
}

/// Upload metadata given outside the body (query parameters) or in CSV comments.
pub(crate) fn apply_meta(
    e: &mut ParsedEpoch,
    key: &str,
    value: &str,
    at: Location,
) -> Result<(), IngestError> {
    let value = value.trim();
    match key {
        "started_at" => e.started_at = Some(parse_time(value, at.with_field(key))?),
        "finished_at" => e.finished_at = Some(parse_time(value, at.with_field(key))?),
        "meter_id" => e.meter_id = Some(value.to_string()),
        "sequence_version" => {
            e.sequence_version = Some(value.parse().map_err(|_| {
                invalid(at.with_field(key), format!("{value:?} is not a whole number"))
            })?)
        }
        "temperatures" => e.temperatures = parse_temperatures(value, at.with_field(key))?,
        _ => e.ignored.push(key.to_string()),
    }
    Ok(())
}

/// Parses an RFC 3339 time into UTC with millisecond precision.
pub(crate) fn parse_time(s: &str, at: Location) -> Result<DateTime<Utc>, IngestError> {
    DateTime::parse_from_rfc3339(s.trim()).map(|t| crate::db::ms(t.with_timezone(&Utc))).map_err(
        |e| {
            invalid(at, format!("{s:?} is not an RFC 3339 time such as 2026-03-01T06:00:00Z ({e})"))
        },
    )
}

/// `depth:celsius` pairs separated by commas, e.g. `0.1:12.5, 1.0:10.8`.
fn parse_temperatures(s: &str, at: Location) -> Result<Vec<(f64, f64)>, IngestError> {
    let mut out = Vec::new();
    for part in s.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let (d, t) = part
            .split_once(':')
            .ok_or_else(|| invalid(at.clone(), format!("{part:?} is not depth_m:temperature_c")))?;
        let d = finite(d.trim(), &at)?;
        let t = finite(t.trim(), &at)?;
        check_temperature(d, t, &at)?;
        out.push((d, t));
    }
    dedup_depths(&mut out, &at)?;
    Ok(out)
}

fn check_temperature(depth: f64, t: f64, at: &Location) -> Result<(), IngestError> {
    if depth < 0.0 {
        return Err(invalid(at.clone(), format!("depth {depth} m is negative")));
    }
    if !(-60.0..=80.0).contains(&t) {
        return Err(invalid(at.clone(), format!("{t} °C is outside −60…80 °C")));
    }
    Ok(())
}

fn dedup_depths(v: &mut [(f64, f64)], at: &Location) -> Result<(), IngestError> {
    v.sort_by(|a, b| a.0.total_cmp(&b.0));
    if let Some(w) = v.windows(2).find(|w| w[0].0 == w[1].0) {
        return Err(invalid(at.clone(), format!("depth {} m is given twice", w[0].0)));
    }
    Ok(())
}

fn finite(s: &str, at: &Location) -> Result<f64, IngestError> {
    match s.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        _ => Err(invalid(at.clone(), format!("{s:?} is not a finite number"))),
    }
}

/// Recognised reading columns.
const COLUMNS: &[&str] = &[
    "a",
    "b",
    "m",
    "n",
    "resistance_ohm",
    "current_ma",
    "voltage_mv",
    "stack_error_pct",
    "contact_a_ohm",
    "contact_b_ohm",
];

/// Parses a CSV upload. `max_readings` stops parsing early on oversized uploads.
pub fn parse_csv(body: &[u8], max_readings: usize) -> Result<ParsedEpoch, IngestError> {
    let text = std::str::from_utf8(body).map_err(|e| {
        invalid(
            Location::default(),
            format!("the body is not UTF-8 text (byte {})", e.valid_up_to()),
        )
    })?;
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let mut epoch = ParsedEpoch::default();
    // Metadata comments before the header.
    let mut header_line = 0usize;
    let mut offset = 0usize;
    for (i, line) in text.split_inclusive('\n').enumerate() {
        let t = line.trim();
        if t.is_empty() {
            offset += line.len();
            continue;
        }
        if let Some(c) = t.strip_prefix('#') {
            let at = Location { row: Some(i + 1), ..Location::default() };
            if let Some((k, v)) = c.split_once(':').filter(|(k, _)| !k.trim().contains(' ')) {
                apply_meta(&mut epoch, &k.trim().to_ascii_lowercase(), v, at)?;
            }
            offset += line.len();
            continue;
        }
        header_line = i + 1;
        break;
    }
    if header_line == 0 {
        return Err(invalid(Location::default(), "no header row (expected a,b,m,n,...)"));
    }
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(false)
        .trim(csv::Trim::All)
        .from_reader(&text.as_bytes()[offset..]);
    let headers: Vec<String> = rdr
        .headers()
        .map_err(|e| csv_error(e, header_line))?
        .iter()
        .map(|h| h.to_ascii_lowercase())
        .collect();
    let col = |name: &str| headers.iter().position(|h| h == name);
    let header_at = Location { row: Some(header_line), ..Location::default() };
    for h in &headers {
        if !COLUMNS.contains(&h.as_str()) {
            epoch.ignored.push(h.clone());
        }
        if headers.iter().filter(|x| *x == h).count() > 1 {
            return Err(invalid(header_at.with_field(h), "column appears twice"));
        }
    }
    for req in ["a", "b", "m", "n"] {
        if col(req).is_none() {
            return Err(invalid(header_at.with_field(req), "required column is missing"));
        }
    }
    let has_r = col("resistance_ohm").is_some();
    let has_ui = col("current_ma").is_some() && col("voltage_mv").is_some();
    if !has_r && !has_ui {
        return Err(invalid(
            header_at.with_field("resistance_ohm"),
            "need a resistance_ohm column, or both current_ma and voltage_mv",
        ));
    }
    let idx: Vec<Option<usize>> = COLUMNS.iter().map(|c| col(c)).collect();
    let mut rec = csv::StringRecord::new();
    loop {
        match rdr.read_record(&mut rec) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => return Err(csv_error(e, header_line)),
        }
        let row = header_line + rec.position().map_or(0, |p| p.line() as usize) - 1;
        if rec.iter().all(str::is_empty) {
            continue;
        }
        if epoch.readings.len() >= max_readings {
            return Err(IngestError::TooManyReadings { limit: max_readings });
        }
        let at = Location { row: Some(row), ..Location::default() };
        let get = |k: usize| idx[k].and_then(|i| rec.get(i)).filter(|s| !s.is_empty());
        let num = |k: usize| -> Result<Option<f64>, IngestError> {
            get(k).map(|s| finite(s, &at.with_field(COLUMNS[k]))).transpose()
        };
        let label = |k: usize| -> Result<String, IngestError> {
            get(k)
                .map(str::to_string)
                .ok_or_else(|| invalid(at.with_field(COLUMNS[k]), "electrode label is empty"))
        };
        epoch.readings.push(ParsedReading {
            a: label(0)?,
            b: get(1).map(str::to_string),
            m: label(2)?,
            n: get(3).map(str::to_string),
            resistance_ohm: num(4)?,
            current_ma: num(5)?,
            voltage_mv: num(6)?,
            stack_error_pct: num(7)?,
            contact_a_ohm: num(8)?,
            contact_b_ohm: num(9)?,
            at,
        });
    }
    Ok(epoch)
}

fn csv_error(e: csv::Error, header_line: usize) -> IngestError {
    let row = e.position().map(|p| header_line + p.line() as usize - 1);
    let msg = match e.kind() {
        csv::ErrorKind::UnequalLengths { expected_len, len, .. } => {
            format!("has {len} fields, the header has {expected_len}")
        }
        csv::ErrorKind::Utf8 { .. } => "is not valid UTF-8".to_string(),
        _ => format!("cannot be read as CSV: {e}"),
    };
    invalid(Location { row, ..Location::default() }, msg)
}

/// Parses a JSON upload.
pub fn parse_json(body: &[u8], max_readings: usize) -> Result<ParsedEpoch, IngestError> {
    let v: Value = serde_json::from_slice(body).map_err(|e| {
        invalid(
            Location::default(),
            format!("not valid JSON at line {}, column {}: {e}", e.line(), e.column()),
        )
    })?;
    let obj = v
        .as_object()
        .ok_or_else(|| invalid(Location::default(), "the body must be a JSON object"))?;
    let mut epoch = ParsedEpoch::default();
    for (k, val) in obj {
        let at = Location::field(k);
        match k.as_str() {
            "readings" => {}
            "temperatures" => {
                let arr = val.as_array().ok_or_else(|| invalid(at.clone(), "must be an array"))?;
                for (i, t) in arr.iter().enumerate() {
                    let at = Location {
                        index: None,
                        field: Some(format!("temperatures[{i}]")),
                        row: None,
                    };
                    let d = json_num(
                        t.get("depth_m"),
                        &at.with_field(&format!("temperatures[{i}].depth_m")),
                    )?
                    .ok_or_else(|| invalid(at.clone(), "depth_m is required"))?;
                    let c = json_num(
                        t.get("temperature_c"),
                        &at.with_field(&format!("temperatures[{i}].temperature_c")),
                    )?
                    .ok_or_else(|| invalid(at.clone(), "temperature_c is required"))?;
                    check_temperature(d, c, &at)?;
                    epoch.temperatures.push((d, c));
                }
                dedup_depths(&mut epoch.temperatures, &at)?;
            }
            "sequence_version" => {
                epoch.sequence_version = Some(
                    val.as_i64().ok_or_else(|| invalid(at.clone(), "must be a whole number"))?,
                )
            }
            "started_at" | "finished_at" | "meter_id" => {
                let s = val.as_str().ok_or_else(|| invalid(at.clone(), "must be a string"))?;
                apply_meta(&mut epoch, k, s, Location::default())?;
            }
            _ => epoch.ignored.push(k.clone()),
        }
    }
    let readings = obj
        .get("readings")
        .ok_or_else(|| invalid(Location::field("readings"), "is required"))?
        .as_array()
        .ok_or_else(|| invalid(Location::field("readings"), "must be an array"))?;
    if readings.len() > max_readings {
        return Err(IngestError::TooManyReadings { limit: max_readings });
    }
    for (i, r) in readings.iter().enumerate() {
        let at = Location { index: Some(i), ..Location::default() };
        let o = r.as_object().ok_or_else(|| invalid(at.clone(), "must be an object"))?;
        for k in o.keys() {
            if !COLUMNS.contains(&k.as_str()) && !epoch.ignored.contains(k) {
                epoch.ignored.push(k.clone());
            }
        }
        let label = |k: &str| -> Result<Option<String>, IngestError> {
            match o.get(k) {
                None | Some(Value::Null) => Ok(None),
                Some(Value::String(s)) if s.trim().is_empty() => Ok(None),
                Some(Value::String(s)) => Ok(Some(s.trim().to_string())),
                Some(Value::Number(n)) if n.is_u64() => Ok(Some(n.to_string())),
                Some(_) => Err(invalid(
                    at.with_field(k),
                    "must be an electrode label (string or whole number)",
                )),
            }
        };
        let required = |k: &str| -> Result<String, IngestError> {
            label(k)?.ok_or_else(|| invalid(at.with_field(k), "electrode label is required"))
        };
        let num = |k: &str| json_num(o.get(k), &at.with_field(k));
        epoch.readings.push(ParsedReading {
            a: required("a")?,
            b: label("b")?,
            m: required("m")?,
            n: label("n")?,
            resistance_ohm: num("resistance_ohm")?,
            current_ma: num("current_ma")?,
            voltage_mv: num("voltage_mv")?,
            stack_error_pct: num("stack_error_pct")?,
            contact_a_ohm: num("contact_a_ohm")?,
            contact_b_ohm: num("contact_b_ohm")?,
            at,
        });
    }
    Ok(epoch)
}

fn json_num(v: Option<&Value>, at: &Location) -> Result<Option<f64>, IngestError> {
    match v {
        None | Some(Value::Null) => Ok(None),
        Some(Value::Number(n)) => match n.as_f64() {
            Some(x) if x.is_finite() => Ok(Some(x)),
            _ => Err(invalid(at.clone(), format!("{n} is not a finite number"))),
        },
        Some(Value::String(s)) => finite(s.trim(), at).map(Some),
        Some(_) => Err(invalid(at.clone(), "must be a number")),
    }
}

/// Query parameters → metadata (overriding what the body says).
pub fn apply_query(e: &mut ParsedEpoch, q: &BTreeMap<String, String>) -> Result<(), IngestError> {
    for (k, v) in q {
        apply_meta(e, k, v, Location::default())?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn err_at(r: Result<ParsedEpoch, IngestError>) -> (Location, String) {
        match r {
            Err(IngestError::Invalid { at, message }) => (at, message),
            other => panic!("expected an invalid-input error, got {other:?}"),
        }
    }

    #[test]
    fn csv_with_metadata_and_remote_electrodes() {
        let body = b"# started_at: 2026-03-01T06:00:00+01:00\n# temperatures: 1.0:9.5, 0.1:12\n\
            a,b,m,n,current_ma,voltage_mv,extra\n1,4,2,3,100,250.5,x\n1,,2,,50,-3,y\n";
        let e = parse_csv(body, 100).unwrap();
        assert_eq!(e.started_at.unwrap().to_rfc3339(), "2026-03-01T05:00:00+00:00");
        assert_eq!(e.temperatures, vec![(0.1, 12.0), (1.0, 9.5)]);
        assert_eq!(e.readings.len(), 2);
        assert_eq!(e.readings[0].at.row, Some(4));
        assert_eq!(e.readings[1].b, None);
        assert_eq!(e.readings[1].voltage_mv, Some(-3.0));
        assert_eq!(e.ignored, vec!["extra".to_string()]);
    }

    #[test]
    fn csv_errors_name_row_and_field() {
        let (at, msg) =
            err_at(parse_csv(b"a,b,m,n,resistance_ohm\n1,2,3,4,1.5\n1,2,3,4,abc\n", 10));
        assert_eq!((at.row, at.field.as_deref()), (Some(3), Some("resistance_ohm")));
        assert!(msg.contains("row 3") && msg.contains("abc"), "{msg}");
        let (at, _) = err_at(parse_csv(b"a,b,m,resistance_ohm\n1,2,3,1\n", 10));
        assert_eq!(at.field.as_deref(), Some("n"));
        let (at, _) = err_at(parse_csv(b"a,b,m,n\n1,2,3,4\n", 10));
        assert_eq!(at.field.as_deref(), Some("resistance_ohm"));
        let (at, msg) = err_at(parse_csv(b"a,b,m,n,resistance_ohm\n1,2,3,4\n", 10));
        assert_eq!(at.row, Some(2), "{msg}");
        let (at, _) = err_at(parse_csv(b"a,b,m,n,resistance_ohm\n1,2,3,4,NaN\n", 10));
        assert_eq!(at.field.as_deref(), Some("resistance_ohm"));
        let (at, _) = err_at(parse_csv(b"# started_at: yesterday\na,b,m,n,resistance_ohm\n", 10));
        assert_eq!((at.row, at.field.as_deref()), (Some(1), Some("started_at")));
        assert!(matches!(
            parse_csv(b"a,b,m,n,resistance_ohm\n1,2,3,4,1\n1,2,3,4,1\n", 1),
            Err(IngestError::TooManyReadings { limit: 1 })
        ));
    }

    #[test]
    fn json_readings_and_errors() {
        let body = br#"{"started_at":"2026-03-01T06:00:00Z","meter_id":"M7",
            "temperatures":[{"depth_m":0.5,"temperature_c":11.0}],
            "readings":[{"a":1,"b":"4","m":2,"n":3,"resistance_ohm":2.5},
                        {"a":"1","b":null,"m":"2","n":null,"current_ma":10,"voltage_mv":5}]}"#;
        let e = parse_json(body, 10).unwrap();
        assert_eq!(e.meter_id.as_deref(), Some("M7"));
        assert_eq!(e.readings[0].a, "1");
        assert_eq!(e.readings[1].b, None);
        assert_eq!(e.temperatures, vec![(0.5, 11.0)]);

        let (at, _) =
            err_at(parse_json(br#"{"readings":[{"a":1,"m":2,"resistance_ohm":"x"}]}"#, 10));
        assert_eq!((at.index, at.field.as_deref()), (Some(0), Some("resistance_ohm")));
        let (at, _) = err_at(parse_json(br#"{"started_at":"2026-13-01","readings":[]}"#, 10));
        assert_eq!(at.field.as_deref(), Some("started_at"));
        let (_, msg) = err_at(parse_json(b"{not json", 10));
        assert!(msg.contains("line 1"), "{msg}");
    }
}
