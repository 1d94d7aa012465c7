//! `ohmline reprocess` and `ohmline baseline`: re-run the inversion and
//! monitoring of a line's history (with new settings or a new baseline) by
//! queueing jobs for the service's workers, and wait for them with a progress
//! bar.

use std::io::Write;
use std::time::Duration;

use anyhow::{Context, bail};
use chrono::{DateTime, NaiveDate, Utc};
use clap::{Args, Subcommand};

use crate::db::{self, Db};

/// `ohmline reprocess`.
#[derive(Debug, Args)]
pub struct ReprocessArgs {
    /// Line slug.
    #[arg(long)]
    pub line: String,
    /// Reprocess epochs started at or after this time (RFC 3339 or YYYY-MM-DD, UTC);
    /// default: the whole history.
    #[arg(long, value_name = "DATE")]
    pub from: Option<String>,
    /// Queue the work and return without waiting.
    #[arg(long)]
    pub no_wait: bool,
}

/// `ohmline baseline …`.
#[derive(Debug, Subcommand)]
pub enum BaselineCmd {
    /// Make the epochs of a time range the line's baseline (their per-reading
    /// median), then reprocess the history against it.
    Set {
        /// Line slug.
        #[arg(long)]
        line: String,
        /// First epoch time (RFC 3339 or YYYY-MM-DD, UTC).
        #[arg(long, value_name = "DATE")]
        from: String,
        /// Last epoch time (RFC 3339 or YYYY-MM-DD, UTC; a date means its end).
        #[arg(long, value_name = "DATE")]
        to: String,
        /// Who chose it (kept with the baseline).
        #[arg(long, default_value = "cli")]
        by: String,
        /// Queue the work and return without waiting.
        #[arg(long)]
        no_wait: bool,
    },
    /// Show the line's baseline.
    Show {
        /// Line slug.
        #[arg(long)]
        line: String,
    },
}

/// Parses a time given as RFC 3339 or a date (its start, or its end when `end`).
pub fn parse_time(s: &str, end: bool) -> anyhow::Result<DateTime<Utc>> {
    if let Ok(t) = DateTime::parse_from_rfc3339(s) {
        return Ok(t.with_timezone(&Utc));
    }
    let d = NaiveDate::parse_from_str(s, "%Y-%m-%d").with_context(|| {
        format!("{s:?} is neither RFC 3339 (2026-03-01T06:00:00Z) nor YYYY-MM-DD")
    })?;
    let t = if end { d.and_hms_milli_opt(23, 59, 59, 999) } else { d.and_hms_opt(0, 0, 0) };
    Ok(t.expect("valid time").and_utc())
}

async fn line_id(db: &Db, name: &str) -> anyhow::Result<i64> {
    Ok(db::lines::by_name(db, name).await?.with_context(|| format!("no line named {name:?}"))?.id)
}

/// Resets and requeues a line's epochs from `from`; returns how many.
async fn requeue(db: &Db, line: i64, from: Option<DateTime<Utc>>) -> anyhow::Result<u64> {
    let since = from.unwrap_or(DateTime::<Utc>::UNIX_EPOCH);
    let superseded = db::alerts::supersede(db, line, since).await?;
    let n = db::models::reset_from(db, line, from).await?;
    crate::pipeline::process::queue_line(db, line).await?;
    if superseded > 0 {
        println!("{superseded} open alerts resolved as superseded (the audit trail keeps them)");
    }
    Ok(n)
}

/// Waits until no epoch of the line from `from` on waits for processing,
/// drawing a progress bar on stderr.
async fn wait(db: &Db, line: i64, from: DateTime<Utc>, total: u64) -> anyhow::Result<()> {
    let mut last = i64::MAX;
    let mut idle = 0u32;
    loop {
        let pending = db::models::pending_since(db, line, from).await?;
        let done = total.saturating_sub(pending as u64);
        let width = 30usize;
        let filled = if total == 0 { width } else { (done as usize * width) / total as usize };
        eprint!("\r[{}{}] {done}/{total} epochs", "#".repeat(filled), "-".repeat(width - filled));
        std::io::stderr().flush().ok();
        if pending == 0 {
            eprintln!();
            return Ok(());
        }
        if pending == last {
            idle += 1;
            if idle == 600 {
                eprintln!();
                eprintln!(
                    "no progress for 5 minutes: is `ohmline serve` running against this database? The jobs stay queued."
                );
            }
        } else {
            idle = 0;
        }
        last = pending;
        tokio::time::sleep(Duration::from_millis(500)).await;
    }
}

/// Runs `ohmline reprocess`.
pub async fn reprocess(db: &Db, a: ReprocessArgs) -> anyhow::Result<()> {
    let line = line_id(db, &a.line).await?;
    let from = a.from.as_deref().map(|s| parse_time(s, false)).transpose()?;
    let n = requeue(db, line, from).await?;
    println!(
        "{n} epochs of line {} queued for processing (the workers of `ohmline serve` run them)",
        a.line
    );
    if !a.no_wait {
        wait(db, line, from.unwrap_or(DateTime::<Utc>::UNIX_EPOCH), n).await?;
        println!("done");
    }
    Ok(())
}

/// Runs `ohmline baseline …`.
pub async fn baseline(db: &Db, cmd: BaselineCmd) -> anyhow::Result<()> {
    match cmd {
        BaselineCmd::Set { line, from, to, by, no_wait } => {
            let id = line_id(db, &line).await?;
            let (t0, t1) = (parse_time(&from, false)?, parse_time(&to, true)?);
            let epochs = db::models::epochs_between(db, id, t0, t1).await?;
            let Some(&(_, seq)) = epochs.first() else {
                bail!("line {line} has no quality-controlled epochs between {t0} and {t1}");
            };
            if epochs.iter().any(|e| e.1 != seq) {
                bail!(
                    "the epochs between {t0} and {t1} ran different sequence versions; choose a range with one"
                );
            }
            let section = db::models::latest_section(db, id).await?.with_context(|| {
                format!(
                    "line {line} has not been processed yet: no section to attach the baseline to"
                )
            })?;
            let ids: Vec<i64> = epochs.iter().map(|e| e.0).collect();
            let b = db::models::set_baseline(db, id, seq, section, &ids, &by).await?;
            println!("baseline {b} of line {line}: {} epochs from {t0} to {t1}", ids.len());
            let n = requeue(db, id, None).await?;
            println!("{n} epochs queued for processing against it");
            if !no_wait {
                wait(db, id, DateTime::<Utc>::UNIX_EPOCH, n).await?;
                println!("done");
            }
            Ok(())
        }
        BaselineCmd::Show { line } => {
            let id = line_id(db, &line).await?;
            match db::models::active_baseline(db, id).await? {
                None => println!("line {line} has no baseline yet"),
                Some(b) => println!(
                    "baseline {} of line {line}: epochs {}, chosen by {} at {}, χ²/N {}, RMS {} %",
                    b.id,
                    b.epoch_ids,
                    b.chosen_by,
                    b.created_at,
                    b.chi2.map_or("-".into(), |v| format!("{v:.2}")),
                    b.rms_pct.map_or("-".into(), |v| format!("{v:.2}")),
                ),
            }
            Ok(())
        }
    }
}
