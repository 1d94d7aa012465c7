//! Configuration: built-in defaults, then a TOML file (`--config FILE`), then
//! `OHMLINE_*` environment variables (nested keys joined by `__`, e.g.
//! `OHMLINE_INGEST__MAX_READINGS`), then command-line flags. Every key is
//! documented in `deploy/ohmline.example.toml`.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use figment::Figment;
use figment::providers::{Env, Format, Serialized, Toml};
use serde::{Deserialize, Serialize};
use thiserror::Error;

/// A configuration that cannot be used.
#[derive(Debug, Error)]
pub enum ConfigError {
    /// The file named by `--config` does not exist.
    #[error("configuration file {0} not found")]
    MissingFile(PathBuf),
    /// A key has the wrong type or is unknown.
    #[error("configuration: {0}")]
    Invalid(#[from] Box<figment::Error>),
    /// A value is out of its range.
    #[error("configuration key {key}: {message}")]
    OutOfRange {
        /// The key.
        key: &'static str,
        /// What is wrong.
        message: String,
    },
}

/// Log output format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum LogFormat {
    /// Human-readable lines.
    #[default]
    Text,
    /// One JSON object per line.
    Json,
}

/// Limits on uploads.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct IngestConfig {
    /// Largest accepted request body, bytes.
    pub max_body_bytes: usize,
    /// Most readings accepted in one epoch.
    pub max_readings: usize,
}

impl Default for IngestConfig {
    fn default() -> Self {
        // 20 000 readings is ten times a dense 96-electrode sequence; a CSV row is
        // under 100 bytes, so 16 MiB leaves ample room (common practice, no source).
        Self { max_body_bytes: 16 * 1024 * 1024, max_readings: 20_000 }
    }
}

/// Drop-folder ingest: one folder per line, polled for complete files.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct DropFolderConfig {
    /// Line slug → folder the line's meter uploads files into.
    pub lines: BTreeMap<String, PathBuf>,
    /// Seconds between polls. A file is taken once its size and modification
    /// time are unchanged over one poll interval.
    pub poll_interval_s: f64,
}

impl Default for DropFolderConfig {
    fn default() -> Self {
        Self { lines: BTreeMap::new(), poll_interval_s: 2.0 }
    }
}

/// Job workers of this process.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct WorkersConfig {
    /// Concurrent job loops (0 = one per CPU).
    pub concurrency: usize,
    /// Lease on a claimed job, seconds; renewed every third of it while the job runs.
    pub lease_s: u64,
}

impl Default for WorkersConfig {
    fn default() -> Self {
        Self { concurrency: 0, lease_s: 60 }
    }
}

impl WorkersConfig {
    /// Concurrent job loops in effect.
    pub fn effective_concurrency(&self) -> usize {
        if self.concurrency > 0 {
            self.concurrency
        } else {
            std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1)
        }
    }
}

/// The whole configuration.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Config {
    /// Folder for the embedded database and other state.
    pub data_dir: PathBuf,
    /// Database URL; defaults to `sqlite://<data_dir>/ohmline.sqlite`.
    pub database: Option<String>,
    /// Address the HTTP server listens on.
    pub listen: String,
    /// Log format.
    pub log_format: LogFormat,
    /// Upload limits.
    pub ingest: IngestConfig,
    /// Drop-folder ingest.
    pub drop_folders: DropFolderConfig,
    /// Job workers.
    pub workers: WorkersConfig,
}

impl Default for Config {
    fn default() -> Self {
        Self {
            data_dir: PathBuf::from("ohmline-data"),
            database: None,
            listen: "127.0.0.1:8080".into(),
            log_format: LogFormat::Text,
            ingest: IngestConfig::default(),
            drop_folders: DropFolderConfig::default(),
            workers: WorkersConfig::default(),
        }
    }
}

/// Top-level keys, for filtering the environment (other `OHMLINE_*` variables,
/// such as those of the test harness, are not configuration).
const KEYS: &[&str] =
    &["data_dir", "database", "listen", "log_format", "ingest", "drop_folders", "workers"];

impl Config {
    /// Loads defaults, then `file` (if given), then the environment.
    pub fn load(file: Option<&Path>) -> Result<Config, ConfigError> {
        let mut fig = Figment::from(Serialized::defaults(Config::default()));
        if let Some(path) = file {
            if !path.exists() {
                return Err(ConfigError::MissingFile(path.to_path_buf()));
            }
            fig = fig.merge(Toml::file(path));
        }
        fig = fig.merge(Env::prefixed("OHMLINE_").split("__").filter(|k| {
            let top = k.as_str().split('.').next().unwrap_or("").to_ascii_lowercase();
            KEYS.contains(&top.as_str())
        }));
        Self::from_figment(fig)
    }

    /// Parses a configuration from TOML text alone (no environment).
    pub fn from_toml(text: &str) -> Result<Config, ConfigError> {
        Self::from_figment(
            Figment::from(Serialized::defaults(Config::default())).merge(Toml::string(text)),
        )
    }

    fn from_figment(fig: Figment) -> Result<Config, ConfigError> {
        let c: Config = fig.extract().map_err(Box::new)?;
        c.validate()?;
        Ok(c)
    }

    fn validate(&self) -> Result<(), ConfigError> {
        if self.ingest.max_readings == 0 {
            return Err(ConfigError::OutOfRange {
                key: "ingest.max_readings",
                message: "must be at least 1".into(),
            });
        }
        if self.ingest.max_body_bytes < 1024 {
            return Err(ConfigError::OutOfRange {
                key: "ingest.max_body_bytes",
                message: "must be at least 1024".into(),
            });
        }
        if self.workers.lease_s < 3 {
            return Err(ConfigError::OutOfRange {
                key: "workers.lease_s",
                message: "must be at least 3 seconds".into(),
            });
        }
        let p = self.drop_folders.poll_interval_s;
        if !(p.is_finite() && p > 0.0) {
            return Err(ConfigError::OutOfRange {
                key: "drop_folders.poll_interval_s",
                message: format!("must be a positive number of seconds, got {p}"),
            });
        }
        Ok(())
    }

    /// The database URL in effect.
    pub fn database_url(&self) -> String {
        match &self.database {
            Some(url) => url.clone(),
            None => format!("sqlite://{}", self.data_dir.join("ohmline.sqlite").display()),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_use_embedded_sqlite_under_the_data_dir() {
        let c = Config::from_toml("").unwrap();
        assert_eq!(c.database_url(), "sqlite://ohmline-data/ohmline.sqlite");
        assert_eq!(c.listen, "127.0.0.1:8080");
    }

    #[test]
    fn toml_keys_are_read_and_checked() {
        let c = Config::from_toml(
            r#"
            data_dir = "/var/lib/ohmline"
            log_format = "json"
            [ingest]
            max_readings = 500
            [drop_folders]
            poll_interval_s = 5
            lines = { "crest-a" = "/srv/drop/crest-a" }
            "#,
        )
        .unwrap();
        assert_eq!(c.database_url(), "sqlite:///var/lib/ohmline/ohmline.sqlite");
        assert_eq!(c.log_format, LogFormat::Json);
        assert_eq!(c.ingest.max_readings, 500);
        assert_eq!(c.drop_folders.lines["crest-a"], PathBuf::from("/srv/drop/crest-a"));

        let e = Config::from_toml("listn = 'x'").unwrap_err().to_string();
        assert!(e.contains("listn"), "{e}");
        let e = Config::from_toml("[ingest]\nmax_readings = 0").unwrap_err().to_string();
        assert!(e.contains("ingest.max_readings"), "{e}");
    }
}

#[cfg(test)]
mod env_tests {
    use super::*;

    // The closure's error type is figment's own.
    #[allow(clippy::result_large_err)]
    #[test]
    fn environment_overrides_defaults() {
        figment::Jail::expect_with(|jail| {
            jail.set_env("OHMLINE_DATA_DIR", "/tmp/x");
            jail.set_env("OHMLINE_INGEST__MAX_READINGS", "77");
            jail.set_env("OHMLINE_TEST_POSTGRES", "not a config key");
            let c = Config::load(None).map_err(|e| e.to_string())?;
            assert_eq!(c.data_dir, PathBuf::from("/tmp/x"));
            assert_eq!(c.ingest.max_readings, 77);
            Ok(())
        });
    }
}
