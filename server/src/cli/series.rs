//! `ohmline series …`: time series of a site (river stage, rainfall,
//! temperatures) from a file, through the same checks and storage as the API.

use std::path::PathBuf;

use anyhow::Context;
use clap::Subcommand;

use crate::db::{self, Db};
use crate::series::{self, SeriesUpload};

/// `ohmline series …`
#[derive(Debug, Subcommand)]
pub enum SeriesCmd {
    /// Store the samples of a CSV (`time,value`) or JSON file in a site's series.
    Upload {
        /// Site id or name.
        #[arg(long)]
        site: String,
        /// river_stage (m), rainfall (mm), air_temperature (°C),
        /// ground_temperature (°C), or another name (then --unit is needed the
        /// first time).
        #[arg(long)]
        kind: String,
        /// Unit of the values (otherwise the kind's, or a '# unit:' line).
        #[arg(long)]
        unit: Option<String>,
        /// CSV or JSON file (by its extension; JSON for .json).
        file: PathBuf,
    },
    /// List a site's series.
    List {
        /// Site id or name.
        #[arg(long)]
        site: String,
    },
}

/// Runs `ohmline series …`.
pub async fn series(db: &Db, cmd: SeriesCmd) -> anyhow::Result<()> {
    match cmd {
        SeriesCmd::Upload { site, kind, unit, file } => {
            let s = series::site_by_key(db, &site)
                .await?
                .with_context(|| format!("no site with id or name {site:?}"))?;
            let body =
                std::fs::read(&file).with_context(|| format!("reading {}", file.display()))?;
            let json = file.extension().is_some_and(|e| e.eq_ignore_ascii_case("json"));
            let name = file.display().to_string();
            let a = series::upload(
                db,
                &s,
                &kind,
                SeriesUpload {
                    body: &body,
                    content_type: if json { "application/json" } else { "text/csv" },
                    unit: unit.as_deref(),
                    query: "",
                    source: "cli",
                    actor: "cli",
                    filename: Some(&name),
                },
            )
            .await
            .with_context(|| format!("{name}: not stored"))?;
            let detail = format!(
                "{} from {name}: {} samples, {} added, {} unchanged, {} replaced",
                a.kind, a.n_samples, a.added, a.unchanged, a.replaced
            );
            db::audit::record(db, "cli", "series.upload", &s.name, &detail).await?;
            println!("site {}: {kind} ({}) stored {detail}", s.name, a.unit);
        }
        SeriesCmd::List { site } => {
            let s = series::site_by_key(db, &site)
                .await?
                .with_context(|| format!("no site with id or name {site:?}"))?;
            for x in db::series::summaries(db, s.id).await? {
                println!(
                    "{}\t{}\t{} samples\t{}\t{}",
                    x.kind,
                    x.unit,
                    x.n_samples,
                    x.first_at.map(|t| t.to_rfc3339()).unwrap_or_default(),
                    x.last_at.map(|t| t.to_rfc3339()).unwrap_or_default()
                );
            }
        }
    }
    Ok(())
}
