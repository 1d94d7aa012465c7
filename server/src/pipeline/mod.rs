//! The processing pipeline: what each job does. Stages read what the previous
//! stage stored and store their own results idempotently (re-running a job
//! replaces its earlier result), so a job that runs twice stores one result.
//!
//! - `qc_line` (key `qc:line:<id>`): quality control of the line's waiting
//!   epochs in start-time order (per-line history: spike test, electrode health,
//!   error model). Queued by ingest in the epoch's own transaction.
//! - `invert_epoch` (key `invert:epoch:<id>`): single inversion, time-lapse
//!   inversions against the baseline and temperature correction of one
//!   checked epoch ([`process`]). Queued by QC in the transaction that stores
//!   the epoch's outcome; epochs of one line invert on any number of workers
//!   at once.
//! - `monitor_line` (key `monitor:line:<id>`): zones and alerts of the line's
//!   inverted epochs in start-time order, up to the first epoch still waiting
//!   for QC or inversion ([`monitor`]). Queued by each inversion in the
//!   transaction that stores it.
//! - `process_line` (key `process:line:<id>`): queues `invert_epoch` for every
//!   checked epoch of the line (reprocessing; also what earlier versions queued).
//!
//! Epoch status: `received` → `checked` (QC stored) → `inverted` (model and
//! changes stored) → `processed` (zones and alerts stored), or `failed` with
//! the reason in `epoch_failures`.

pub mod monitor;
pub mod monitor_state;
pub mod process;
pub mod qc;

use std::collections::HashMap;
use std::sync::{Arc, Mutex};

use ohmline_core::geometry::LineGeometry;
use ohmline_core::sequence::Sequence;
use serde::Deserialize;
use thiserror::Error;

use crate::config::Config;
use crate::db::jobs::Job;
use crate::db::{self, Db, DbError};

/// Job kind: quality control of a line's waiting epochs.
pub const QC_LINE: &str = "qc_line";

/// Key and payload of the QC job of a line.
pub fn qc_job(line_id: i64) -> (String, String) {
    (format!("qc:line:{line_id}"), format!("{{\"line_id\":{line_id}}}"))
}

/// Why a job failed.
#[derive(Debug, Error)]
pub enum PipelineError {
    /// Storage failed; retried when the database was unavailable.
    #[error(transparent)]
    Db(#[from] DbError),
    /// The job's payload is not what its kind expects.
    #[error("job payload: {0}")]
    Payload(String),
    /// Stored data cannot be processed (reported, not retried).
    #[error("{0}")]
    Data(String),
    /// The job kind is unknown to this version.
    #[error("unknown job kind {0:?}")]
    UnknownKind(String),
}

impl PipelineError {
    /// Worth retrying later (a transient failure)?
    pub fn is_transient(&self) -> bool {
        matches!(self, PipelineError::Db(DbError::Unavailable(_) | DbError::Sqlx(_)))
    }
}

/// A cache shared by the job loops of a process.
type Cache<K, V> = Arc<Mutex<HashMap<K, V>>>;

/// What the stages share: storage, configuration and caches of immutable data.
#[derive(Clone)]
pub struct Pipeline {
    /// Storage.
    pub db: Db,
    /// Configuration.
    pub config: Arc<Config>,
    sequences: Arc<Mutex<HashMap<i64, Arc<Sequence>>>>,
    /// Forward models by (line, geometry hash).
    pub(crate) models: Cache<(i64, String), Arc<process::LineModel>>,
    /// Inverted baselines by baseline id.
    pub(crate) baselines: Cache<i64, Arc<process::ActiveBaseline>>,
    /// Held while a baseline is inverted, so a process inverts each once.
    pub(crate) baseline_locks: Cache<i64, Arc<tokio::sync::Mutex<()>>>,
    /// Last change-inversion model per (line, mode), for warm starts.
    pub(crate) warm: Cache<(i64, &'static str), Vec<f64>>,
}

impl Pipeline {
    /// A pipeline over a database.
    pub fn new(db: Db, config: Arc<Config>) -> Self {
        Self {
            db,
            config,
            sequences: Arc::default(),
            models: Arc::default(),
            baselines: Arc::default(),
            baseline_locks: Arc::default(),
            warm: Arc::default(),
        }
    }

    /// A stored sequence version (immutable, cached by id).
    pub async fn sequence(
        &self,
        sequence_id: i64,
        n_electrodes: usize,
    ) -> Result<Arc<Sequence>, PipelineError> {
        if let Some(s) = self.sequences.lock().expect("cache lock").get(&sequence_id) {
            return Ok(s.clone());
        }
        let s = Arc::new(db::sequences::load(&self.db, sequence_id, n_electrodes).await?);
        self.sequences.lock().expect("cache lock").insert(sequence_id, s.clone());
        Ok(s)
    }

    /// A line's electrode geometry.
    pub async fn geometry(&self, line_id: i64) -> Result<LineGeometry, PipelineError> {
        Ok(db::lines::geometry(&self.db, line_id).await?)
    }

    /// Runs one job.
    pub async fn run(&self, job: &Job) -> Result<(), PipelineError> {
        #[derive(Deserialize)]
        struct LinePayload {
            line_id: i64,
        }
        match job.kind.as_str() {
            QC_LINE => {
                let p: LinePayload = serde_json::from_str(&job.payload)
                    .map_err(|e| PipelineError::Payload(e.to_string()))?;
                qc::run_line(self, p.line_id).await
            }
            process::PROCESS_LINE => {
                let p: LinePayload = serde_json::from_str(&job.payload)
                    .map_err(|e| PipelineError::Payload(e.to_string()))?;
                process::queue_line(&self.db, p.line_id).await?;
                Ok(())
            }
            process::INVERT_EPOCH => {
                #[derive(Deserialize)]
                struct EpochPayload {
                    line_id: i64,
                    epoch_id: i64,
                }
                let p: EpochPayload = serde_json::from_str(&job.payload)
                    .map_err(|e| PipelineError::Payload(e.to_string()))?;
                process::run_epoch(self, p.line_id, p.epoch_id).await
            }
            process::MONITOR_LINE => {
                let p: LinePayload = serde_json::from_str(&job.payload)
                    .map_err(|e| PipelineError::Payload(e.to_string()))?;
                monitor::run_line(self, p.line_id).await
            }
            other => Err(PipelineError::UnknownKind(other.to_string())),
        }
    }
}
