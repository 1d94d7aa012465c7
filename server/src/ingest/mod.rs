//! Ingest: the one code path by which epochs enter ohmline, whether a meter
//! POSTs them to the API or drops a file into a watched folder.
//!
//! Order of work, so that nothing is lost and nothing half written:
//! 1. the raw body is stored verbatim (gzip) with its SHA-256 — before parsing;
//! 2. it is parsed (CSV or JSON) and checked against the line's electrodes and
//!    sequence; any problem rejects the whole upload with the row and field;
//! 3. the epoch, its temperatures and readings are written in one transaction
//!    that also marks the raw upload accepted.
//!
//! Re-sending an epoch (same line and start time, same content) returns the
//! stored epoch; different content for a stored start time is a conflict.

pub mod dropfolder;
pub mod parse;

use std::collections::{BTreeMap, HashMap};
use std::io::Write;
use std::sync::{Arc, Mutex};

use chrono::{DateTime, Duration, Utc};
use ohmline_core::geometry::LineGeometry;
use ohmline_core::sequence::{Quadrupole, Sequence};
use serde::Serialize;
use sha2::{Digest, Sha256};
use thiserror::Error;

use crate::db::epochs::{NewEpoch, NewReading, Stored};
use crate::db::lines::Line;
use crate::db::raw_uploads::NewRawUpload;
use crate::db::{self, Db, DbError};
use parse::{Location, ParsedEpoch, ParsedReading, invalid};

/// Why an upload was not stored as an epoch.
#[derive(Debug, Error)]
pub enum IngestError {
    /// Neither CSV nor JSON.
    #[error("unsupported content type {0:?}: send text/csv or application/json")]
    UnsupportedContentType(String),
    /// The body exceeds the configured limit.
    #[error("the body is larger than the limit of {limit} bytes (ingest.max_body_bytes)")]
    BodyTooLarge {
        /// The limit, bytes.
        limit: usize,
    },
    /// More readings than allowed in one epoch.
    #[error("more than {limit} readings in one epoch, the most accepted (ingest.max_readings)")]
    TooManyReadings {
        /// The limit.
        limit: usize,
    },
    /// A value is missing, malformed or inconsistent with the line.
    #[error("{message}")]
    Invalid {
        /// Full message including the location.
        message: String,
        /// Where.
        at: Location,
    },
    /// The line has no sequence to match readings against.
    #[error("line {line:?} has no sequence; register one before uploading epochs")]
    NoSequence {
        /// The line.
        line: String,
    },
    /// A different epoch is already stored for this start time.
    #[error(
        "epoch {epoch_id} with different content is already stored for started_at {started_at}"
    )]
    Conflict {
        /// The stored epoch.
        epoch_id: i64,
        /// The start time.
        started_at: DateTime<Utc>,
    },
    /// Storage failed.
    #[error(transparent)]
    Db(#[from] DbError),
}

impl IngestError {
    /// True for errors caused by the upload itself (as opposed to storage).
    pub fn is_client_error(&self) -> bool {
        !matches!(self, IngestError::Db(_))
    }
}

/// An upload as received.
#[derive(Debug, Clone)]
pub struct Upload<'a> {
    /// Body bytes.
    pub body: &'a [u8],
    /// Declared content type (`text/csv`, `application/json`).
    pub content_type: &'a str,
    /// Query parameters (metadata such as `started_at`).
    pub query: BTreeMap<String, String>,
    /// `api` or `dropfolder`.
    pub source: &'a str,
    /// File name for drop-folder uploads.
    pub filename: Option<&'a str>,
}

/// A stored (or recognised duplicate) epoch.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Accepted {
    /// Epoch id.
    pub epoch_id: i64,
    /// Line slug.
    pub line: String,
    /// Start of the run.
    pub started_at: DateTime<Utc>,
    /// Readings stored.
    pub n_readings: usize,
    /// Raw upload id (this upload's, also for duplicates).
    pub raw_upload_id: i64,
    /// True when the same epoch was already stored.
    pub duplicate: bool,
    /// Columns or keys that were ignored.
    pub ignored_fields: Vec<String>,
}

/// Limits applied to uploads.
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    /// Most readings in one epoch.
    pub max_readings: usize,
}

/// What ingest needs to know about a sequence version, cached by id (sequence
/// versions and electrode labels never change once stored).
#[derive(Debug)]
pub struct SequenceIndex {
    sequence_id: i64,
    name: String,
    version: i64,
    labels: HashMap<String, usize>,
    positions: HashMap<Quadrupole, usize>,
}

/// Cache of [`SequenceIndex`] by sequence id.
#[derive(Debug, Default)]
pub struct SequenceCache {
    map: Mutex<HashMap<i64, Arc<SequenceIndex>>>,
}

impl SequenceCache {
    async fn get(
        &self,
        db: &Db,
        line: &Line,
        version: Option<i64>,
    ) -> Result<Arc<SequenceIndex>, IngestError> {
        let row = match version {
            Some(v) => db::sequences::by_version(db, line.id, v).await?.ok_or_else(|| {
                invalid(
                    Location::field("sequence_version"),
                    format!("line {:?} has no sequence version {v}", line.name),
                )
            })?,
            None => db::sequences::latest(db, line.id)
                .await?
                .ok_or_else(|| IngestError::NoSequence { line: line.name.clone() })?,
        };
        if let Some(hit) = self.map.lock().expect("cache lock").get(&row.id) {
            return Ok(hit.clone());
        }
        let geometry = db::lines::geometry(db, line.id).await?;
        let seq: Sequence = db::sequences::load(db, row.id, geometry.len()).await?;
        let labels = geometry
            .electrodes()
            .iter()
            .enumerate()
            .map(|(i, e)| (e.label().to_string(), i))
            .collect();
        let positions = seq.quadrupoles().iter().enumerate().map(|(i, q)| (*q, i)).collect();
        let idx = Arc::new(SequenceIndex {
            sequence_id: row.id,
            name: row.name,
            version: row.version,
            labels,
            positions,
        });
        self.map.lock().expect("cache lock").insert(row.id, idx.clone());
        Ok(idx)
    }
}

/// Ingests one upload for `line`: stores the raw body first, then parses,
/// checks and stores the epoch. See the module documentation.
#[tracing::instrument(skip_all, fields(line = %line.name, source = upload.source))]
pub async fn ingest(
    db: &Db,
    cache: &SequenceCache,
    line: &Line,
    upload: Upload<'_>,
    limits: Limits,
) -> Result<Accepted, IngestError> {
    let received_at = db::now();
    let body = upload.body.to_vec();
    let (sha, gz) = tokio::task::spawn_blocking(move || {
        let sha = hex::encode(Sha256::digest(&body));
        let mut enc = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
        enc.write_all(&body).expect("writing to memory");
        (sha, enc.finish().expect("writing to memory"))
    })
    .await
    .expect("compression task");
    let query_string =
        upload.query.iter().map(|(k, v)| format!("{k}={v}")).collect::<Vec<_>>().join("&");
    let raw_id = db::raw_uploads::insert(
        db,
        &NewRawUpload {
            line_id: line.id,
            source: upload.source,
            filename: upload.filename,
            content_type: upload.content_type,
            query: &query_string,
            sha256: &sha,
            size_bytes: upload.body.len(),
            body_gz: &gz,
        },
    )
    .await?;
    tracing::debug!(raw_upload_id = raw_id, bytes = upload.body.len(), "raw upload stored");

    let result = check_and_store(db, cache, line, &upload, limits, raw_id, received_at).await;
    match &result {
        Ok(a) if a.duplicate => {
            db::raw_uploads::mark(db, raw_id, "duplicate", None, Some(a.epoch_id)).await?;
            tracing::info!(epoch = a.epoch_id, "duplicate epoch ignored");
        }
        Ok(a) => {
            metrics::counter!(crate::metrics::EPOCHS_INGESTED).increment(1);
            metrics::counter!(crate::metrics::READINGS_INGESTED).increment(a.n_readings as u64);
            tracing::info!(epoch = a.epoch_id, readings = a.n_readings, "epoch stored")
        }
        Err(e) if e.is_client_error() => {
            let epoch = match e {
                IngestError::Conflict { epoch_id, .. } => Some(*epoch_id),
                _ => None,
            };
            db::raw_uploads::mark(db, raw_id, "rejected", Some(&e.to_string()), epoch).await?;
            tracing::warn!(raw_upload_id = raw_id, error = %e, "upload rejected");
        }
        Err(e) => tracing::error!(raw_upload_id = raw_id, error = %e, "upload not stored"),
    }
    result
}

async fn check_and_store(
    db: &Db,
    cache: &SequenceCache,
    line: &Line,
    upload: &Upload<'_>,
    limits: Limits,
    raw_id: i64,
    received_at: DateTime<Utc>,
) -> Result<Accepted, IngestError> {
    let mut parsed = parse_body(upload.body, upload.content_type, limits.max_readings)?;
    parse::apply_query(&mut parsed, &upload.query)?;
    let started_at = parsed.started_at.ok_or_else(|| {
        invalid(
            Location::field("started_at"),
            "the epoch's start time is required (query parameter started_at, a '# started_at:' line, or the JSON key)",
        )
    })?;
    if started_at > received_at + Duration::hours(24) {
        return Err(invalid(
            Location::field("started_at"),
            format!("{started_at} is more than a day in the future; check the meter's clock"),
        ));
    }
    if let Some(f) = parsed.finished_at
        && f < started_at
    {
        return Err(invalid(Location::field("finished_at"), "is before started_at"));
    }
    let seq = cache.get(db, line, parsed.sequence_version).await?;
    let readings = resolve(&parsed, &seq)?;
    let content_hash = content_hash(&parsed, &seq, &readings);
    let stored = db::epochs::insert(
        db,
        &NewEpoch {
            line_id: line.id,
            sequence_id: seq.sequence_id,
            started_at,
            finished_at: parsed.finished_at,
            meter_id: parsed.meter_id.as_deref(),
            received_at,
            content_hash: &content_hash,
            raw_upload_id: raw_id,
            temperatures: &parsed.temperatures,
            readings: &readings,
        },
    )
    .await?;
    let (epoch_id, duplicate) = match stored {
        Stored::Created(id) => (id, false),
        Stored::Duplicate(id) => (id, true),
        Stored::Conflict(id) => return Err(IngestError::Conflict { epoch_id: id, started_at }),
    };
    Ok(Accepted {
        epoch_id,
        line: line.name.clone(),
        started_at,
        n_readings: readings.len(),
        raw_upload_id: raw_id,
        duplicate,
        ignored_fields: parsed.ignored,
    })
}

/// Parses a body by its content type (parameters such as `; charset=` ignored).
pub fn parse_body(
    body: &[u8],
    content_type: &str,
    max_readings: usize,
) -> Result<ParsedEpoch, IngestError> {
    let mime = content_type.split(';').next().unwrap_or("").trim().to_ascii_lowercase();
    match mime.as_str() {
        "text/csv" | "application/csv" | "text/plain" => parse::parse_csv(body, max_readings),
        "application/json" => parse::parse_json(body, max_readings),
        _ => Err(IngestError::UnsupportedContentType(content_type.to_string())),
    }
}

/// Resolves labels to electrodes and quadrupoles to sequence positions, and
/// checks every reading's values.
fn resolve(p: &ParsedEpoch, seq: &SequenceIndex) -> Result<Vec<NewReading>, IngestError> {
    if p.readings.is_empty() {
        return Err(invalid(Location::default(), "the upload holds no readings"));
    }
    let mut first_row: HashMap<usize, &Location> = HashMap::with_capacity(p.readings.len());
    let mut out = Vec::with_capacity(p.readings.len());
    for (i, r) in p.readings.iter().enumerate() {
        let q = reading_quadrupole(r, |l| seq.labels.get(l).copied())?;
        let quad = *seq.positions.get(&q).ok_or_else(|| {
            invalid(
                r.at.with_field("a,b,m,n"),
                format!(
                    "quadrupole a={} b={} m={} n={} is not in sequence {:?} version {}",
                    r.a,
                    r.b.as_deref().unwrap_or(""),
                    r.m,
                    r.n.as_deref().unwrap_or(""),
                    seq.name,
                    seq.version
                ),
            )
        })?;
        if let Some(first) = first_row.insert(quad, &r.at) {
            return Err(repeated(r, first));
        }
        let resistance = reading_resistance(r)?;
        out.push(NewReading {
            row_index: i as i64,
            quad: quad as i64,
            current_ma: r.current_ma,
            voltage_mv: r.voltage_mv,
            resistance_ohm: resistance,
            stack_error_pct: r.stack_error_pct,
            contact_a_ohm: r.contact_a_ohm,
            contact_b_ohm: r.contact_b_ohm,
        });
    }
    Ok(out)
}

/// Resolves the readings of a parsed upload against a line alone, without a
/// stored sequence: the quadrupoles are the upload's own, in upload order,
/// each with its transfer resistance (Ω). The same checks as [`ingest`]
/// apply (labels, distinct electrodes, repeats, current and resistance
/// values), with errors naming the row (or reading) and field.
pub fn readings_on_line(
    p: &ParsedEpoch,
    line: &LineGeometry,
) -> Result<Vec<(Quadrupole, f64)>, IngestError> {
    if p.readings.is_empty() {
        return Err(invalid(Location::default(), "the upload holds no readings"));
    }
    let mut first_row: HashMap<Quadrupole, &Location> = HashMap::with_capacity(p.readings.len());
    let mut out = Vec::with_capacity(p.readings.len());
    for r in &p.readings {
        let q = reading_quadrupole(r, |l| line.index_of(l))?;
        if let Some(first) = first_row.insert(q, &r.at) {
            return Err(repeated(r, first));
        }
        out.push((q, reading_resistance(r)?));
    }
    Ok(out)
}

/// The quadrupole of a reading: labels resolved by `index`, electrodes distinct.
fn reading_quadrupole(
    r: &ParsedReading,
    index: impl Fn(&str) -> Option<usize>,
) -> Result<Quadrupole, IngestError> {
    let electrode = |field: &str, label: &str| {
        index(label).ok_or_else(|| {
            invalid(r.at.with_field(field), format!("unknown electrode label {label:?}"))
        })
    };
    let q = Quadrupole {
        a: electrode("a", &r.a)?,
        b: r.b.as_deref().map(|l| electrode("b", l)).transpose()?,
        m: electrode("m", &r.m)?,
        n: r.n.as_deref().map(|l| electrode("n", l)).transpose()?,
    };
    let used: Vec<usize> = q.electrodes().collect();
    if (1..used.len()).any(|k| used[..k].contains(&used[k])) {
        return Err(invalid(r.at.with_field("a,b,m,n"), "electrodes a, b, m, n must be distinct"));
    }
    Ok(q)
}

/// The error for a reading that repeats the quadrupole of an earlier one.
fn repeated(r: &ParsedReading, first: &Location) -> IngestError {
    let where_first =
        first.row.map(|x| format!("row {x}")).or(first.index.map(|x| format!("readings[{x}]")));
    invalid(
        r.at.with_field("a,b,m,n"),
        format!("repeats the quadrupole of {}", where_first.unwrap_or_default()),
    )
}

/// Checks a reading's values and returns its transfer resistance R (Ω):
/// `resistance_ohm`, or `voltage_mv / current_ma`.
fn reading_resistance(r: &ParsedReading) -> Result<f64, IngestError> {
    if let Some(c) = r.current_ma
        && c <= 0.0
    {
        return Err(invalid(
            r.at.with_field("current_ma"),
            format!("current {c} mA must be positive"),
        ));
    }
    let resistance = match (r.resistance_ohm, r.current_ma, r.voltage_mv) {
        (Some(rr), _, _) => rr,
        (None, Some(i), Some(u)) => u / i,
        (None, None, _) => {
            return Err(invalid(
                r.at.with_field("current_ma"),
                "resistance_ohm is empty, so current_ma and voltage_mv are both required",
            ));
        }
        (None, Some(_), None) => {
            return Err(invalid(
                r.at.with_field("voltage_mv"),
                "resistance_ohm is empty, so current_ma and voltage_mv are both required",
            ));
        }
    };
    for (field, v) in [
        ("stack_error_pct", r.stack_error_pct),
        ("contact_a_ohm", r.contact_a_ohm),
        ("contact_b_ohm", r.contact_b_ohm),
    ] {
        if let Some(v) = v
            && v < 0.0
        {
            return Err(invalid(r.at.with_field(field), format!("{v} must not be negative")));
        }
    }
    Ok(resistance)
}

/// SHA-256 over the parsed content in a fixed form, so the same epoch sent as
/// CSV or JSON, or with different whitespace, hashes the same.
fn content_hash(p: &ParsedEpoch, seq: &SequenceIndex, readings: &[NewReading]) -> String {
    let mut h = Sha256::new();
    let opt = |v: Option<f64>| v.map_or(u64::MAX, f64::to_bits).to_le_bytes();
    h.update(seq.sequence_id.to_le_bytes());
    h.update(p.started_at.map(|t| t.timestamp_millis()).unwrap_or(0).to_le_bytes());
    h.update(p.finished_at.map(|t| t.timestamp_millis()).unwrap_or(i64::MIN).to_le_bytes());
    h.update(p.meter_id.as_deref().unwrap_or("\u{0}").as_bytes());
    h.update([0]);
    for (d, t) in &p.temperatures {
        h.update(d.to_bits().to_le_bytes());
        h.update(t.to_bits().to_le_bytes());
    }
    h.update([1]);
    for r in readings {
        h.update(r.quad.to_le_bytes());
        for v in [
            r.current_ma,
            r.voltage_mv,
            Some(r.resistance_ohm),
            r.stack_error_pct,
            r.contact_a_ohm,
            r.contact_b_ohm,
        ] {
            h.update(opt(v));
        }
    }
    hex::encode(h.finalize())
}
