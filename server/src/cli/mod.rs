//! The `ohmline` command line. Commands print results on stdout and logs on
//! stderr; errors reach `main` as `anyhow` errors with their context.

mod admin;
mod bench;
mod demo;
mod forward;
mod invert;
mod plan;
mod process;
mod series;
mod serve;
mod user;

pub use admin::check_slug;
pub use serve::Role;

use std::path::PathBuf;

use anyhow::{Context, bail};
use clap::{Parser, Subcommand};

use crate::config::{Config, LogFormat};
use crate::db::Db;

/// ohmline: monitoring of earth embankments with permanent resistivity lines.
#[derive(Debug, Parser)]
#[command(name = "ohmline", version, about, long_about = None)]
pub struct Cli {
    /// Configuration file (TOML); every key can also be set as OHMLINE_<KEY>.
    #[arg(long, global = true, env = "OHMLINE_CONFIG", value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Database URL: sqlite://PATH (default: under the data folder) or postgres://…
    #[arg(long, global = true, env = "OHMLINE_DATABASE", value_name = "URL")]
    pub database: Option<String>,
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Commands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the service: HTTP API and pages, drop-folder ingest, job workers,
    /// alert email delivery (all of them, or one role's share).
    Serve {
        /// Address to listen on, e.g. 127.0.0.1:8080 (port 0 picks a free port).
        #[arg(long, value_name = "ADDR")]
        listen: Option<String>,
        /// `api` (HTTP and drop folders), `worker` (jobs and email; HTTP only
        /// for /healthz, /readyz, /metrics) or `all`.
        #[arg(long, value_enum, env = "OHMLINE_ROLE", default_value_t = serve::Role::All)]
        role: serve::Role,
    },
    /// Copy the SQLite database to FILE while the service runs (online backup).
    Backup {
        /// The copy to write; must not exist yet.
        #[arg(long, value_name = "FILE")]
        to: PathBuf,
    },
    /// Apply pending database migrations and exit.
    Migrate,
    /// Sites (levee reaches).
    #[command(subcommand)]
    Site(admin::SiteCmd),
    /// Electrode lines.
    #[command(subcommand)]
    Line(admin::LineCmd),
    /// Measurement sequences of a line.
    #[command(subcommand)]
    Sequence(admin::SequenceCmd),
    /// Meter tokens of a line.
    #[command(subcommand)]
    Token(admin::TokenCmd),
    /// Time series of a site (river stage, rainfall, temperatures).
    #[command(subcommand)]
    Series(series::SeriesCmd),
    /// Simulate a sequence's readings over a described ground (2.5D finite elements).
    Forward(forward::ForwardArgs),
    /// Invert a readings file (or its change against a baseline file) into a
    /// resistivity section: model.json, summary.json, section.png.
    Invert(invert::InvertArgs),
    /// Plan a new line's survey: sequence, epoch duration, sensitivity and
    /// detectability of a target.
    Plan(plan::PlanArgs),
    /// Measure the service: ingest, season reprocessing with 1 and 2 workers,
    /// upload-to-email latency (no subcommand: all of them, one table).
    Bench(bench::BenchArgs),
    /// Recipients of alert emails.
    #[command(subcommand)]
    Recipient(admin::RecipientCmd),
    /// Users of the pages and the API, and their personal tokens.
    #[command(subcommand)]
    User(user::UserCmd),
    /// Re-run inversion, time-lapse, zones and alerts of a line's history.
    Reprocess(process::ReprocessArgs),
    /// A line's baseline (the reference state changes are measured against).
    #[command(subcommand)]
    Baseline(process::BaselineCmd),
    /// An invented flood season end to end: a fresh SQLite service, two lines
    /// fed by a simulated meter over HTTP, alerts and emails.
    Demo(demo::DemoArgs),
}

impl Cli {
    /// The configuration in effect: file, environment, then flags.
    pub fn load_config(&self) -> anyhow::Result<Config> {
        let mut config = Config::load(self.config.as_deref())?;
        if let Some(db) = &self.database {
            config.database = Some(db.clone());
        }
        if let Command::Serve { listen: Some(l), .. } = &self.command {
            config.listen = l.clone();
        }
        Ok(config)
    }
}

/// Sets up logging on stderr in the configured format. `RUST_LOG` overrides
/// the default level.
pub fn init_logging(format: LogFormat) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| "info,sqlx=warn,tower_http=warn".into());
    let builder = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    match format {
        LogFormat::Json => builder.json().init(),
        LogFormat::Text => builder.init(),
    }
}

/// Opens the configured database and applies migrations.
pub async fn open_db(config: &Config) -> anyhow::Result<Db> {
    let url = config.database_url();
    let db = Db::connect_with_timeout(&url, config.database_acquire_timeout())
        .await
        .with_context(|| format!("opening database {}", redact(&url)))?;
    db.migrate().await.context("applying migrations")?;
    Ok(db)
}

/// A database URL with any password replaced, for messages.
pub fn redact(url: &str) -> String {
    match (url.find("://"), url.rfind('@')) {
        (Some(s), Some(at)) if at > s => {
            let creds = &url[s + 3..at];
            match creds.split_once(':') {
                Some((user, _)) => format!("{}{user}:***{}", &url[..s + 3], &url[at..]),
                None => url.to_string(),
            }
        }
        _ => url.to_string(),
    }
}

/// `ohmline backup --to FILE`: an online copy of the SQLite database.
async fn backup(config: &Config, to: &std::path::Path) -> anyhow::Result<()> {
    let url = config.database_url();
    if !url.starts_with("sqlite:") {
        bail!(
            "ohmline backup copies SQLite databases only; {} is PostgreSQL: back it up with \
             pg_dump (see deploy/OPERATIONS.md)",
            redact(&url)
        );
    }
    if let Some(src) = crate::db::sqlite_path(&url)
        && !src.exists()
    {
        bail!("there is no database at {} to back up", src.display());
    }
    if to.exists() {
        bail!("{} already exists; choose a new file name", to.display());
    }
    // Copy as it is: no migrations are applied to the source.
    let db =
        Db::connect(&url).await.with_context(|| format!("opening database {}", redact(&url)))?;
    db.backup_to(to).await.with_context(|| format!("writing the backup {}", to.display()))?;
    db.close().await;
    let size = std::fs::metadata(to).map(|m| m.len()).unwrap_or(0);
    println!("backup of {} written to {} ({size} bytes)", redact(&url), to.display());
    Ok(())
}

/// Runs a parsed command line.
pub async fn run(cli: Cli, config: Config) -> anyhow::Result<()> {
    match cli.command {
        Command::Serve { role, .. } => serve::run(config, role).await,
        Command::Backup { to } => backup(&config, &to).await,
        Command::Migrate => {
            open_db(&config).await?;
            println!("migrations applied to {}", redact(&config.database_url()));
            Ok(())
        }
        Command::Site(cmd) => admin::site(&open_db(&config).await?, cmd).await,
        Command::Line(cmd) => admin::line(&open_db(&config).await?, cmd).await,
        Command::Sequence(cmd) => admin::sequence(&open_db(&config).await?, cmd).await,
        Command::Token(cmd) => admin::token(&open_db(&config).await?, cmd).await,
        Command::Series(cmd) => series::series(&open_db(&config).await?, cmd).await,
        Command::Bench(cmd) => bench::run(cmd).await,
        Command::Forward(args) => tokio::task::spawn_blocking(move || forward::run(args)).await?,
        Command::Invert(args) => tokio::task::spawn_blocking(move || invert::run(args)).await?,
        Command::Plan(args) => tokio::task::spawn_blocking(move || plan::run(args)).await?,
        Command::Recipient(cmd) => admin::recipient(&open_db(&config).await?, cmd).await,
        Command::User(cmd) => user::user(&open_db(&config).await?, cmd).await,
        Command::Reprocess(a) => process::reprocess(&open_db(&config).await?, a).await,
        Command::Baseline(cmd) => process::baseline(&open_db(&config).await?, cmd).await,
        Command::Demo(args) => demo::run(args).await,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn passwords_are_redacted() {
        assert_eq!(redact("postgres://u:secret@h:5432/db"), "postgres://u:***@h:5432/db");
        assert_eq!(redact("postgres://u@h/db"), "postgres://u@h/db");
        assert_eq!(redact("sqlite://x.sqlite"), "sqlite://x.sqlite");
    }
}
