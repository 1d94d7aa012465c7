//! Drop-folder ingest: meters that upload files by (S)FTP put them into a folder
//! per line; the server polls it, takes each complete file through the same
//! [`super::ingest`] path as the API, and moves it to `done/` or to `failed/`
//! with a `<name>.error.txt` beside it.
//!
//! A file is complete when its size and modification time did not change over one
//! poll interval; names starting with `.` or ending in `.part`/`.tmp` are
//! skipped (uploads in progress). Exactly once: if the server stops between
//! storing an epoch and moving its file, the next poll ingests the file again,
//! which is recognised as a duplicate and moved to `done/`.
//!
//! CSV files carry their start time in a `# started_at: …` line; JSON files in
//! their `started_at` key.

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, SystemTime};

use tokio::sync::watch;

use super::{IngestError, Limits, SequenceCache, Upload, ingest};
use crate::db::{self, Db};

/// One line's watched folder.
#[derive(Debug, Clone)]
pub struct Watch {
    /// Line slug.
    pub line: String,
    /// Folder polled.
    pub dir: PathBuf,
}

/// Polls `watch.dir` until `shutdown` turns true.
pub async fn run(
    db: Db,
    cache: Arc<SequenceCache>,
    watch: Watch,
    poll: Duration,
    limits: Limits,
    mut shutdown: watch::Receiver<bool>,
) {
    let mut seen: HashMap<PathBuf, (u64, SystemTime)> = HashMap::new();
    tracing::info!(line = %watch.line, dir = %watch.dir.display(), "watching drop folder");
    loop {
        if let Err(e) = poll_once(&db, &cache, &watch, limits, &mut seen).await {
            tracing::warn!(line = %watch.line, error = %e, "drop folder poll failed; will retry");
        }
        tokio::select! {
            _ = tokio::time::sleep(poll) => {}
            _ = shutdown.changed() => break,
        }
        if *shutdown.borrow() {
            break;
        }
    }
}

/// Errors that stop one poll (the next poll retries).
#[derive(Debug, thiserror::Error)]
pub enum PollError {
    /// The folder could not be read or a file moved.
    #[error("{path}: {source}")]
    Io {
        /// The path.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The line does not exist (yet).
    #[error("line {0:?} is not registered")]
    UnknownLine(String),
    /// Storage is unavailable; the file stays for the next poll.
    #[error(transparent)]
    Db(#[from] db::DbError),
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> PollError + '_ {
    move |source| PollError::Io { path: path.to_path_buf(), source }
}

/// One pass over the folder: ingests every file that was already present and
/// unchanged in the previous pass.
pub async fn poll_once(
    db: &Db,
    cache: &SequenceCache,
    watch: &Watch,
    limits: Limits,
    seen: &mut HashMap<PathBuf, (u64, SystemTime)>,
) -> Result<usize, PollError> {
    let line = db::lines::by_name(db, &watch.line)
        .await?
        .ok_or_else(|| PollError::UnknownLine(watch.line.clone()))?;
    let mut entries = tokio::fs::read_dir(&watch.dir).await.map_err(io(&watch.dir))?;
    let mut current = HashMap::new();
    let mut ready = Vec::new();
    while let Some(entry) = entries.next_entry().await.map_err(io(&watch.dir))? {
        let path = entry.path();
        let name = entry.file_name().to_string_lossy().to_string();
        if name.starts_with('.') || name.ends_with(".part") || name.ends_with(".tmp") {
            continue;
        }
        let meta = entry.metadata().await.map_err(io(&path))?;
        if !meta.is_file() {
            continue;
        }
        let stamp = (meta.len(), meta.modified().map_err(io(&path))?);
        if seen.get(&path) == Some(&stamp) && stamp.0 > 0 {
            ready.push((path.clone(), name));
        }
        current.insert(path, stamp);
    }
    *seen = current;
    ready.sort();
    let mut n = 0;
    for (path, name) in ready {
        let body = tokio::fs::read(&path).await.map_err(io(&path))?;
        let content_type = content_type_of(&name, &body);
        let upload = Upload {
            body: &body,
            content_type,
            query: BTreeMap::new(),
            source: "dropfolder",
            filename: Some(&name),
        };
        match ingest(db, cache, &line, upload, limits).await {
            Ok(a) => {
                tracing::info!(file = %name, epoch = a.epoch_id, duplicate = a.duplicate, "file ingested");
                move_to(&watch.dir, "done", &path, &name, None).await?;
                n += 1;
            }
            Err(IngestError::Db(e)) => return Err(PollError::Db(e)),
            Err(e) => {
                tracing::warn!(file = %name, error = %e, "file rejected");
                move_to(&watch.dir, "failed", &path, &name, Some(&e.to_string())).await?;
            }
        }
        seen.remove(&path);
    }
    Ok(n)
}

fn content_type_of(name: &str, body: &[u8]) -> &'static str {
    let lower = name.to_ascii_lowercase();
    if lower.ends_with(".json") {
        "application/json"
    } else if lower.ends_with(".csv") || lower.ends_with(".txt") {
        "text/csv"
    } else if body.iter().find(|b| !b.is_ascii_whitespace()) == Some(&b'{') {
        "application/json"
    } else {
        "text/csv"
    }
}

/// Moves `path` into `dir/sub/`, never overwriting: a name already there gets a
/// numeric suffix. Writes the error text beside a failed file.
async fn move_to(
    dir: &Path,
    sub: &str,
    path: &Path,
    name: &str,
    error: Option<&str>,
) -> Result<(), PollError> {
    let target_dir = dir.join(sub);
    tokio::fs::create_dir_all(&target_dir).await.map_err(io(&target_dir))?;
    let mut target = target_dir.join(name);
    let mut k = 1;
    while tokio::fs::try_exists(&target).await.map_err(io(&target))? {
        target = target_dir.join(format!("{name}.{k}"));
        k += 1;
    }
    if let Some(msg) = error {
        let err_path = target.with_file_name(format!(
            "{}.error.txt",
            target.file_name().map(|f| f.to_string_lossy().to_string()).unwrap_or_default()
        ));
        tokio::fs::write(&err_path, format!("{msg}\n")).await.map_err(io(&err_path))?;
    }
    tokio::fs::rename(path, &target).await.map_err(io(path))?;
    Ok(())
}
