//! Configuration: built-in defaults, then a TOML file (`--config FILE`), then
//! `OHMLINE_*` environment variables (nested keys joined by `__`, e.g.
//! `OHMLINE_INGEST__MAX_READINGS`), then command-line flags. Every key is
//! documented in `deploy/ohmline.example.toml` (a test keeps it complete).

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

/// Transport security of the SMTP connection.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum SmtpSecurity {
    /// Plain SMTP (a relay on the same host or a trusted network only).
    None,
    /// Upgrade with STARTTLS, refusing to continue without it (default; port 587).
    #[default]
    Starttls,
    /// TLS from the first byte (SMTPS; port 465).
    Tls,
}

impl SmtpSecurity {
    /// The usual port: 25, 587 or 465.
    pub fn default_port(self) -> u16 {
        match self {
            SmtpSecurity::None => 25,
            SmtpSecurity::Starttls => 587,
            SmtpSecurity::Tls => 465,
        }
    }
}

/// The SMTP server alert emails are handed to.
#[derive(Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SmtpConfig {
    /// Host name; TLS certificates are checked against it.
    pub host: String,
    /// Port; default by `security`: 25, 587 (starttls) or 465 (tls).
    #[serde(default)]
    pub port: Option<u16>,
    /// `none`, `starttls` (default) or `tls`.
    #[serde(default)]
    pub security: SmtpSecurity,
    /// User name, when the server wants authentication.
    #[serde(default)]
    pub username: Option<String>,
    /// Password (prefer `OHMLINE_NOTIFY__SMTP__PASSWORD` to a file).
    #[serde(default)]
    pub password: Option<String>,
    /// Timeout of each SMTP command, s (default 30).
    #[serde(default = "default_smtp_timeout_s")]
    pub timeout_s: f64,
}

fn default_smtp_timeout_s() -> f64 {
    30.0
}

impl std::fmt::Debug for SmtpConfig {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SmtpConfig")
            .field("host", &self.host)
            .field("port", &self.port)
            .field("security", &self.security)
            .field("username", &self.username)
            .field("password", &self.password.as_ref().map(|_| "***"))
            .field("timeout_s", &self.timeout_s)
            .finish()
    }
}

/// CAP 1.2 `<status>` of published alerts.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
pub enum CapStatus {
    /// Actionable by all targeted recipients (default).
    #[default]
    Actual,
    /// An exercise.
    Exercise,
    /// Technical testing only; all recipients disregard it (demos).
    Test,
}

/// CAP 1.2 `<scope>` of published alerts.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
pub enum CapScope {
    /// For the general public.
    Public,
    /// For users with a known operational need; `restriction` says who (default).
    #[default]
    Restricted,
}

/// The Common Alerting Protocol feed.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct CapConfig {
    /// `<sender>`: a globally unique name of this installation without spaces,
    /// commas, `<` or `&`; default: the `notify.from` address.
    pub sender: Option<String>,
    /// `<senderName>`: the operator as people know it.
    pub sender_name: String,
    /// `Actual`, `Exercise` or `Test`.
    pub status: CapStatus,
    /// `Public` or `Restricted`.
    pub scope: CapScope,
    /// `<restriction>` text for the `Restricted` scope.
    pub restriction: String,
}

impl Default for CapConfig {
    fn default() -> Self {
        Self {
            sender: None,
            sender_name: "ohmline embankment monitoring".into(),
            status: CapStatus::Actual,
            scope: CapScope::Restricted,
            restriction: "For the embankment owner's engineers and emergency-management partners; prompts an inspection, not a public warning.".into(),
        }
    }
}

/// Alert notifications: email delivery and the CAP feed.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct NotifyConfig {
    /// Base URL of the web pages, for links in emails and feeds.
    pub public_base_url: String,
    /// Sender of alert emails, `Name <address>` or `address`; its domain also
    /// ends every Message-ID.
    pub from: String,
    /// SMTP server; without one, emails are written as `.eml` files into `outbox_dir`.
    pub smtp: Option<SmtpConfig>,
    /// Folder for `.eml` files; default `<data_dir>/outbox`.
    pub outbox_dir: Option<PathBuf>,
    /// Seconds between polls of the outbox.
    pub poll_interval_s: f64,
    /// Seconds a worker holds a claimed email; must exceed the SMTP timeout.
    pub lease_s: f64,
    /// Seconds before the first retry of a failed delivery; doubles each time.
    pub retry_initial_s: f64,
    /// Longest wait between retries, s.
    pub retry_max_s: f64,
    /// Most alert emails per recipient in any rolling hour; the excess goes into
    /// the next daily digest. 0 = no limit.
    pub max_per_hour: u32,
    /// Time of day (UTC, `HH:MM`) of the daily digest.
    pub digest_at_utc: String,
    /// The CAP feed.
    pub cap: CapConfig,
}

impl Default for NotifyConfig {
    fn default() -> Self {
        // Delivery timings and the hourly limit are common practice, no source.
        Self {
            public_base_url: "http://127.0.0.1:8080".into(),
            from: "ohmline <ohmline@localhost>".into(),
            smtp: None,
            outbox_dir: None,
            poll_interval_s: 2.0,
            lease_s: 300.0,
            retry_initial_s: 30.0,
            retry_max_s: 3600.0,
            max_per_hour: 6,
            digest_at_utc: "07:00".into(),
            cap: CapConfig::default(),
        }
    }
}

impl NotifyConfig {
    /// The sender as a mailbox.
    pub fn from_mailbox(&self) -> Result<lettre::message::Mailbox, crate::notify::NotifyError> {
        self.from.parse().map_err(|e: lettre::address::AddressError| {
            crate::notify::NotifyError::InvalidSetting {
                key: "notify.from",
                reason: format!("{:?} is not an email address: {e}", self.from),
            }
        })
    }

    /// The digest time of day.
    pub fn digest_time(&self) -> Result<chrono::NaiveTime, crate::notify::NotifyError> {
        chrono::NaiveTime::parse_from_str(&self.digest_at_utc, "%H:%M").map_err(|e| {
            crate::notify::NotifyError::InvalidSetting {
                key: "notify.digest_at_utc",
                reason: format!("{:?} is not a time HH:MM: {e}", self.digest_at_utc),
            }
        })
    }

    /// The CAP `<sender>`: `cap.sender`, else the `from` address.
    pub fn cap_sender(&self) -> String {
        match &self.cap.sender {
            Some(s) => s.clone(),
            None => self.from_mailbox().map(|m| m.email.to_string()).unwrap_or_default(),
        }
    }

    /// Settings of an enqueue at `now`.
    pub fn enqueue_params(
        &self,
        now: chrono::DateTime<chrono::Utc>,
    ) -> Result<crate::notify::EnqueueParams, crate::notify::NotifyError> {
        Ok(crate::notify::EnqueueParams {
            max_per_hour: self.max_per_hour,
            message_id_domain: self.from_mailbox()?.email.domain().to_string(),
            now,
        })
    }

    fn validate(&self) -> Result<(), ConfigError> {
        let range = |key: &'static str, message: String| ConfigError::OutOfRange { key, message };
        self.from_mailbox().map_err(|e| range("notify.from", e.to_string()))?;
        self.digest_time().map_err(|e| range("notify.digest_at_utc", e.to_string()))?;
        let url = &self.public_base_url;
        if !(url.starts_with("http://") || url.starts_with("https://"))
            || url.chars().any(char::is_whitespace)
        {
            return Err(range(
                "notify.public_base_url",
                format!("{url:?} must be an absolute http(s) URL"),
            ));
        }
        for (key, v) in [
            ("notify.poll_interval_s", self.poll_interval_s),
            ("notify.lease_s", self.lease_s),
            ("notify.retry_initial_s", self.retry_initial_s),
            ("notify.retry_max_s", self.retry_max_s),
        ] {
            if !(v.is_finite() && v > 0.0) {
                return Err(range(key, format!("must be a positive number of seconds, got {v}")));
            }
        }
        if self.retry_max_s < self.retry_initial_s {
            return Err(range("notify.retry_max_s", "must not be below retry_initial_s".into()));
        }
        if let Some(smtp) = &self.smtp {
            if smtp.host.trim().is_empty() {
                return Err(range("notify.smtp.host", "must not be empty".into()));
            }
            let t = smtp.timeout_s;
            if !(t.is_finite() && t > 0.0) {
                return Err(range("notify.smtp.timeout_s", format!("must be positive, got {t}")));
            }
            // One delivery is a connection plus a handful of commands, each
            // bounded by the timeout; the lease must outlast it.
            if self.lease_s < 4.0 * t {
                return Err(range(
                    "notify.lease_s",
                    format!("must be at least 4 × notify.smtp.timeout_s = {} s", 4.0 * t),
                ));
            }
            if smtp.password.is_some() && smtp.username.is_none() {
                return Err(range("notify.smtp.username", "a password needs a user name".into()));
            }
        }
        let sender = self.cap_sender();
        if sender.is_empty() || sender.contains([' ', ',', '<', '&']) {
            return Err(range(
                "notify.cap.sender",
                format!("{sender:?} must be non-empty without spaces, commas, '<' or '&'"),
            ));
        }
        Ok(())
    }
}

/// Browser pages: sessions and sign-in limits.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct WebConfig {
    /// The URL people use to reach the service (e.g.
    /// `https://levees.example.org`), when it differs from `listen` (behind a
    /// TLS proxy). Cookies are marked Secure when it starts with `https://`.
    pub public_url: Option<String>,
    /// A session ends after this long without a request, s (default 12 h).
    pub session_idle_s: u64,
    /// A session ends this long after signing in, s (default 7 days).
    pub session_max_s: u64,
    /// Failed sign-ins per account within a window before further attempts
    /// are refused (default 5).
    pub sign_in_failures_per_account: u32,
    /// Failed sign-ins per client address within a window (default 20).
    pub sign_in_failures_per_ip: u32,
    /// Length of the failed sign-in window, s (default 900).
    pub sign_in_window_s: u64,
    /// `Strict-Transport-Security` max-age, s, sent when `public_url` is
    /// https (default one year); 0 sends none.
    pub hsts_max_age_s: u64,
}

impl Default for WebConfig {
    fn default() -> Self {
        // A duty shift is up to 12 h; a week's absolute limit makes people
        // sign in again weekly. 5 failures per account and 20 per address in
        // 15 min (common practice, no source).
        Self {
            public_url: None,
            session_idle_s: 12 * 3600,
            session_max_s: 7 * 24 * 3600,
            sign_in_failures_per_account: 5,
            sign_in_failures_per_ip: 20,
            sign_in_window_s: 900,
            hsts_max_age_s: 365 * 24 * 3600,
        }
    }
}

impl WebConfig {
    /// Whether cookies must be marked Secure (the public URL is https).
    pub fn secure_cookies(&self) -> bool {
        self.public_url.as_deref().is_some_and(|u| u.to_ascii_lowercase().starts_with("https://"))
    }

    /// The `Strict-Transport-Security` value, when browsers reach the service
    /// over TLS (the public URL is https) and it is not switched off.
    pub fn hsts(&self) -> Option<String> {
        (self.secure_cookies() && self.hsts_max_age_s > 0)
            .then(|| format!("max-age={}", self.hsts_max_age_s))
    }
}

/// Protection against overload and slow or abusive clients. Every limit is
/// per process (counts live in memory).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct LimitsConfig {
    /// Time a client has to send a request's headers, s; a kept-alive
    /// connection is closed after this long without a new request. A client
    /// sending slowly cannot hold a connection beyond it.
    pub header_read_timeout_s: f64,
    /// Longest time to answer a request, body upload included, s; then 408.
    pub request_timeout_s: f64,
    /// Epoch uploads per minute per meter token (a minute's worth may come at
    /// once); beyond it 429 with Retry-After. 0 = no limit.
    pub uploads_per_minute_per_token: u32,
    /// Epoch uploads per minute per client address (meters behind one
    /// gateway share it). 0 = no limit.
    pub uploads_per_minute_per_ip: u32,
    /// Sign-in attempts per minute per client address, right or wrong (failed
    /// ones are also limited by `web.sign_in_failures_*`). 0 = no limit.
    pub sign_ins_per_minute_per_ip: u32,
    /// Epochs received but not yet through quality control and inversion
    /// (the work of the queued jobs) above which uploads get 429 with
    /// Retry-After, until the workers catch up. 0 = no bound.
    pub max_backlog_epochs: u64,
    /// Retry-After of an upload refused for the backlog, s.
    pub backlog_retry_after_s: u64,
}

impl Default for LimitsConfig {
    fn default() -> Self {
        // A meter uploads every few hours; 120 a minute lets one send a long
        // backlog after an outage. 6000 a minute per address is 100 uploads/s
        // through one gateway. 10 s for headers and 120 s for a 16 MiB upload
        // on a slow link (common practice, no source).
        Self {
            header_read_timeout_s: 10.0,
            request_timeout_s: 120.0,
            uploads_per_minute_per_token: 120,
            uploads_per_minute_per_ip: 6000,
            sign_ins_per_minute_per_ip: 30,
            max_backlog_epochs: 10_000,
            backlog_retry_after_s: 30,
        }
    }
}

impl LimitsConfig {
    /// No rate limits and no backlog bound (benchmarks); timeouts stay.
    pub fn without_rate_limits(self) -> Self {
        Self {
            uploads_per_minute_per_token: 0,
            uploads_per_minute_per_ip: 0,
            sign_ins_per_minute_per_ip: 0,
            max_backlog_epochs: 0,
            ..self
        }
    }

    fn validate(&self) -> Result<(), ConfigError> {
        for (key, v) in [
            ("limits.header_read_timeout_s", self.header_read_timeout_s),
            ("limits.request_timeout_s", self.request_timeout_s),
        ] {
            if !(v.is_finite() && v > 0.0 && v < 86_400.0) {
                return Err(ConfigError::OutOfRange {
                    key,
                    message: format!("must be a positive number of seconds below a day, got {v}"),
                });
            }
        }
        if self.backlog_retry_after_s == 0 {
            return Err(ConfigError::OutOfRange {
                key: "limits.backlog_retry_after_s",
                message: "must be at least 1".into(),
            });
        }
        Ok(())
    }
}

/// Job workers of this process.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct WorkersConfig {
    /// Concurrent job loops (0 = one per CPU).
    pub concurrency: usize,
    /// Lease on a claimed job, seconds; renewed every third of it while the job
    /// runs. A job whose worker died is claimed again once its lease expires.
    pub lease_s: u64,
    /// On SIGTERM, seconds a running job may take to finish before it is
    /// released (queued again, the attempt not counted).
    pub shutdown_grace_s: u64,
}

impl Default for WorkersConfig {
    fn default() -> Self {
        Self { concurrency: 0, lease_s: 60, shutdown_grace_s: 30 }
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

/// Which time-lapse inversions each epoch gets.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ChangeMode {
    /// Ratio inversion (Daily et al. 1992).
    Ratio,
    /// Difference inversion (LaBrecque & Yang 2001).
    Difference,
}

impl ChangeMode {
    /// Name as stored and shown.
    pub fn as_str(self) -> &'static str {
        match self {
            ChangeMode::Ratio => "ratio",
            ChangeMode::Difference => "difference",
        }
    }
}

/// Where the Jacobian of the time-lapse iterations comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ChangeJacobian {
    /// The baseline's, kept for every epoch: one forward run per iteration and
    /// the data-space product J H⁻¹ Jᵀ made once per baseline (METHODS §8).
    #[default]
    Baseline,
    /// Recomputed at every model (full Gauss–Newton; about three times the cost).
    Update,
}

/// Seasonal ground-temperature model for the temperature correction
/// (Hayley et al. 2007): surface sinusoid damped as exp(−z/d), lag z/d.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct TemperatureConfig {
    /// Apply the correction at all.
    pub enabled: bool,
    /// Annual mean ground temperature, °C.
    pub mean_c: f64,
    /// Surface amplitude, °C.
    pub amplitude_c: f64,
    /// Day of year (1–366) of the surface maximum.
    pub peak_day: f64,
    /// Damping depth, m.
    pub damping_depth_m: f64,
    /// Reference temperature models are corrected to, °C.
    pub reference_c: f64,
    /// Fractional change of conductivity per °C.
    pub alpha_per_c: f64,
}

impl Default for TemperatureConfig {
    /// Mid-latitude values: mean 10 °C, amplitude 8 °C, surface maximum at day
    /// 200, damping depth 2.5 m (moist soil, METHODS §5), α = 0.02 /°C
    /// (Hayley et al. 2007), reference 10 °C.
    fn default() -> Self {
        Self {
            enabled: true,
            mean_c: 10.0,
            amplitude_c: 8.0,
            peak_day: 200.0,
            damping_depth_m: 2.5,
            reference_c: 10.0,
            alpha_per_c: 0.02,
        }
    }
}

/// Inversion and monitoring of every epoch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ProcessingConfig {
    /// Time-lapse inversions per epoch; the first one feeds zones and alerts.
    pub change_modes: Vec<ChangeMode>,
    /// Jacobian of the time-lapse inversions.
    pub change_jacobian: ChangeJacobian,
    /// Quiet checked epochs whose median forms an automatic baseline.
    pub baseline_epochs: usize,
    /// Relative modelling-error floor added to each datum's error (0.01 = 1 %).
    pub modelling_error: f64,
    /// Most Gauss–Newton iterations per inversion.
    pub max_iterations: usize,
    /// Ground temperature correction.
    pub temperature: TemperatureConfig,
}

impl Default for ProcessingConfig {
    fn default() -> Self {
        Self {
            change_modes: vec![ChangeMode::Ratio, ChangeMode::Difference],
            change_jacobian: ChangeJacobian::Baseline,
            baseline_epochs: 3,
            modelling_error: 0.01,
            max_iterations: 12,
            temperature: TemperatureConfig::default(),
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
    /// Longest wait for a database connection, s; an unreachable database
    /// then answers uploads 503 with Retry-After.
    pub database_acquire_timeout_s: f64,
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
    /// Browser pages.
    pub web: WebConfig,
    /// Timeouts, rate limits and the backlog bound.
    pub limits: LimitsConfig,
    /// Alert emails and the CAP feed.
    pub notify: NotifyConfig,
    /// Inversion, time-lapse and monitoring.
    pub processing: ProcessingConfig,
}

impl Default for Config {
    fn default() -> Self {
        Self {
            data_dir: PathBuf::from("ohmline-data"),
            database: None,
            database_acquire_timeout_s: 5.0,
            listen: "127.0.0.1:8080".into(),
            log_format: LogFormat::Text,
            ingest: IngestConfig::default(),
            drop_folders: DropFolderConfig::default(),
            workers: WorkersConfig::default(),
            web: WebConfig::default(),
            limits: LimitsConfig::default(),
            notify: NotifyConfig::default(),
            processing: ProcessingConfig::default(),
        }
    }
}

/// Top-level keys, for filtering the environment (other `OHMLINE_*` variables,
/// such as those of the test harness, are not configuration).
const KEYS: &[&str] = &[
    "data_dir",
    "database",
    "database_acquire_timeout_s",
    "listen",
    "log_format",
    "ingest",
    "drop_folders",
    "workers",
    "notify",
    "web",
    "limits",
    "processing",
];

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
        let t = self.database_acquire_timeout_s;
        if !(t.is_finite() && (0.1..=600.0).contains(&t)) {
            return Err(ConfigError::OutOfRange {
                key: "database_acquire_timeout_s",
                message: format!("must be between 0.1 and 600 seconds, got {t}"),
            });
        }
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
        let pr = &self.processing;
        if pr.change_modes.is_empty() {
            return Err(ConfigError::OutOfRange {
                key: "processing.change_modes",
                message: "name at least one of \"ratio\", \"difference\"".into(),
            });
        }
        if pr.baseline_epochs == 0 {
            return Err(ConfigError::OutOfRange {
                key: "processing.baseline_epochs",
                message: "must be at least 1".into(),
            });
        }
        if !(0.0..0.5).contains(&pr.modelling_error) {
            return Err(ConfigError::OutOfRange {
                key: "processing.modelling_error",
                message: format!("must be in [0, 0.5), got {}", pr.modelling_error),
            });
        }
        if pr.max_iterations == 0 {
            return Err(ConfigError::OutOfRange {
                key: "processing.max_iterations",
                message: "must be at least 1".into(),
            });
        }
        let t = &pr.temperature;
        if !(t.damping_depth_m > 0.0 && t.damping_depth_m.is_finite()) {
            return Err(ConfigError::OutOfRange {
                key: "processing.temperature.damping_depth_m",
                message: format!("must be a positive length, got {}", t.damping_depth_m),
            });
        }
        if !(0.0..0.1).contains(&t.alpha_per_c) {
            return Err(ConfigError::OutOfRange {
                key: "processing.temperature.alpha_per_c",
                message: format!("must be in [0, 0.1) per °C, got {}", t.alpha_per_c),
            });
        }
        let w = &self.web;
        if w.session_idle_s == 0 || w.session_max_s == 0 || w.session_idle_s > w.session_max_s {
            return Err(ConfigError::OutOfRange {
                key: "web.session_idle_s",
                message: format!(
                    "session lifetimes must be positive with idle ({} s) at most the maximum ({} s)",
                    w.session_idle_s, w.session_max_s
                ),
            });
        }
        if w.session_max_s > i32::MAX as u64 {
            return Err(ConfigError::OutOfRange {
                key: "web.session_max_s",
                message: "must be below 68 years".into(),
            });
        }
        if w.sign_in_failures_per_account == 0 || w.sign_in_failures_per_ip == 0 {
            return Err(ConfigError::OutOfRange {
                key: "web.sign_in_failures_per_account",
                message: "failure limits must be at least 1".into(),
            });
        }
        if w.sign_in_window_s == 0 {
            return Err(ConfigError::OutOfRange {
                key: "web.sign_in_window_s",
                message: "must be at least 1".into(),
            });
        }
        self.limits.validate()?;
        self.notify.validate()
    }

    /// The folder `.eml` files are written to without SMTP.
    pub fn outbox_dir(&self) -> PathBuf {
        self.notify.outbox_dir.clone().unwrap_or_else(|| self.data_dir.join("outbox"))
    }

    /// How long a statement waits for a database connection.
    pub fn database_acquire_timeout(&self) -> std::time::Duration {
        std::time::Duration::from_secs_f64(self.database_acquire_timeout_s)
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
    fn the_deployment_example_is_a_valid_configuration() {
        let c = Config::from_toml(include_str!("../../deploy/ohmline.example.toml")).unwrap();
        assert_eq!(c.processing.change_modes, vec![ChangeMode::Ratio, ChangeMode::Difference]);
        assert_eq!(c.notify.smtp.as_ref().map(|s| s.host.as_str()), Some("smtp.example.org"));
    }

    /// `section.key` of every key line in the example, commented out or not.
    fn documented_keys(text: &str) -> std::collections::BTreeSet<String> {
        let mut section = String::new();
        let mut keys = std::collections::BTreeSet::new();
        for line in text.lines() {
            let l = line.trim_start_matches('#').trim();
            if let Some(h) = l.strip_prefix('[').and_then(|h| h.strip_suffix(']')) {
                section = h.to_string();
                keys.insert(section.clone());
            } else if let Some((k, _)) = l.split_once(" = ")
                && k.chars().all(|c| c.is_ascii_lowercase() || c == '_')
            {
                keys.insert(if section.is_empty() { k.into() } else { format!("{section}.{k}") });
            }
        }
        keys
    }

    fn leaf_keys(prefix: &str, v: &toml::Value, out: &mut Vec<String>) {
        match v {
            toml::Value::Table(t) if !t.is_empty() => {
                for (k, v) in t {
                    let p = if prefix.is_empty() { k.clone() } else { format!("{prefix}.{k}") };
                    leaf_keys(&p, v, out);
                }
            }
            _ => out.push(prefix.to_string()),
        }
    }

    #[test]
    fn the_deployment_example_documents_every_key() {
        let documented = documented_keys(include_str!("../../deploy/ohmline.example.toml"));
        let mut keys = Vec::new();
        leaf_keys("", &toml::Value::try_from(Config::default()).unwrap(), &mut keys);
        // Keys without a default (absent from the serialised defaults).
        keys.extend(
            [
                "database",
                "web.public_url",
                "notify.outbox_dir",
                "notify.cap.sender",
                "notify.smtp.host",
                "notify.smtp.port",
                "notify.smtp.security",
                "notify.smtp.username",
                "notify.smtp.password",
                "notify.smtp.timeout_s",
            ]
            .map(String::from),
        );
        let missing: Vec<&String> = keys.iter().filter(|k| !documented.contains(*k)).collect();
        assert!(missing.is_empty(), "deploy/ohmline.example.toml lacks {missing:?}");
        let example = Config::from_toml(include_str!("../../deploy/ohmline.example.toml")).unwrap();
        assert_eq!(example.workers, WorkersConfig::default(), "example shows the defaults");
        assert_eq!(example.processing, ProcessingConfig::default());
    }

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

        assert_eq!(c.outbox_dir(), PathBuf::from("/var/lib/ohmline/outbox"));
        assert_eq!(c.notify.smtp, None);

        let e = Config::from_toml("listn = 'x'").unwrap_err().to_string();
        assert!(e.contains("listn"), "{e}");
        let e = Config::from_toml("[ingest]\nmax_readings = 0").unwrap_err().to_string();
        assert!(e.contains("ingest.max_readings"), "{e}");
    }

    #[test]
    fn database_acquire_timeout_is_read_and_checked() {
        assert_eq!(Config::default().database_acquire_timeout(), std::time::Duration::from_secs(5));
        let c = Config::from_toml("database_acquire_timeout_s = 0.5").unwrap();
        assert_eq!(c.database_acquire_timeout(), std::time::Duration::from_millis(500));
        for bad in ["0", "-1", "601", "nan"] {
            let e = Config::from_toml(&format!("database_acquire_timeout_s = {bad}"))
                .unwrap_err()
                .to_string();
            assert!(e.contains("database_acquire_timeout_s"), "{bad}: {e}");
        }
    }

    #[test]
    fn limits_are_read_and_checked() {
        let c = Config::from_toml(
            "[limits]\nheader_read_timeout_s = 2.5\nuploads_per_minute_per_token = 0\nmax_backlog_epochs = 7",
        )
        .unwrap();
        assert_eq!(c.limits.header_read_timeout_s, 2.5);
        assert_eq!(c.limits.uploads_per_minute_per_token, 0);
        assert_eq!(c.limits.max_backlog_epochs, 7);
        assert_eq!(c.limits.request_timeout_s, 120.0, "default");
        let off = c.limits.clone().without_rate_limits();
        assert_eq!((off.uploads_per_minute_per_ip, off.max_backlog_epochs), (0, 0));
        for (toml, key) in [
            ("[limits]\nrequest_timeout_s = 0", "limits.request_timeout_s"),
            ("[limits]\nheader_read_timeout_s = -1", "limits.header_read_timeout_s"),
            ("[limits]\nbacklog_retry_after_s = 0", "limits.backlog_retry_after_s"),
            ("[limits]\nuploads_per_hour = 3", "uploads_per_hour"),
        ] {
            let e = Config::from_toml(toml).unwrap_err().to_string();
            assert!(e.contains(key), "{e}");
        }
        // HSTS only when the public URL is https.
        assert_eq!(Config::default().web.hsts(), None);
        let tls = Config::from_toml("[web]\npublic_url = 'https://x.example'").unwrap();
        assert_eq!(tls.web.hsts().as_deref(), Some("max-age=31536000"));
        let off = Config::from_toml("[web]\npublic_url = 'https://x.example'\nhsts_max_age_s = 0");
        assert_eq!(off.unwrap().web.hsts(), None);
    }
}

#[cfg(test)]
mod notify_tests {
    use super::*;

    fn check(toml: &str, bad_key: Option<&str>) -> Option<Config> {
        match (Config::from_toml(toml), bad_key) {
            (Ok(c), None) => Some(c),
            (Err(e), Some(key)) => {
                assert!(e.to_string().contains(key), "{e} should name {key}");
                None
            }
            (r, want) => panic!("{toml}: expected error on {want:?}, got {r:?}"),
        }
    }

    #[test]
    fn smtp_and_delivery_keys_are_read_and_checked() {
        let c = check(
            r#"
            [notify]
            from = "Levee duty <alerts@levees.example.org>"
            max_per_hour = 3
            [notify.smtp]
            host = "mail.example.org"
            security = "tls"
            username = "ohmline"
            password = "secret"
            "#,
            None,
        )
        .unwrap();
        let smtp = c.notify.smtp.clone().unwrap();
        assert_eq!(smtp.security, SmtpSecurity::Tls);
        assert_eq!(smtp.port.unwrap_or(smtp.security.default_port()), 465);
        assert_eq!(smtp.timeout_s, 30.0);
        assert!(!format!("{smtp:?}").contains("secret"));
        assert_eq!(c.notify.cap_sender(), "alerts@levees.example.org");
        let p = c.notify.enqueue_params(chrono::Utc::now()).unwrap();
        assert_eq!((p.max_per_hour, p.message_id_domain.as_str()), (3, "levees.example.org"));

        check("[notify]\nfrom = 'not an address'", Some("notify.from"));
        check("[notify]\ndigest_at_utc = '25:00'", Some("notify.digest_at_utc"));
        check("[notify]\npublic_base_url = 'levees.example.org'", Some("notify.public_base_url"));
        check("[notify]\nretry_initial_s = 0", Some("notify.retry_initial_s"));
        check("[notify.smtp]\nhost = 'h'\ntimeout_s = 100", Some("notify.lease_s"));
        check("[notify.smtp]\nhost = 'h'\nsecurity = 'ssl'", Some("security"));
        check("[notify.smtp]\nport = 25", Some("host"));
        check("[notify.cap]\nsender = 'a b'", Some("notify.cap.sender"));
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
            jail.set_env("OHMLINE_NOTIFY__SMTP__HOST", "127.0.0.1");
            jail.set_env("OHMLINE_NOTIFY__SMTP__SECURITY", "none");
            let c = Config::load(None).map_err(|e| e.to_string())?;
            assert_eq!(c.data_dir, PathBuf::from("/tmp/x"));
            assert_eq!(c.ingest.max_readings, 77);
            let smtp = c.notify.smtp.expect("smtp from the environment");
            assert_eq!((smtp.host.as_str(), smtp.security), ("127.0.0.1", SmtpSecurity::None));
            Ok(())
        });
    }
}
