//! The delivery worker started by `ohmline serve`.
//!
//! Every `poll_interval_s` it
//! 1. processes the daily digest slot once it has passed (slot = the latest
//!    `digest_at_utc` time of day ≤ now; a slot missed while the server was down
//!    is processed at the next start; several workers process a slot once);
//! 2. claims due outbox rows under a lease of `lease_s` (a crash mid-send leaves
//!    the row claimable again when the lease expires: at-least-once delivery,
//!    duplicates share one Message-ID);
//! 3. sends each over SMTP with `lettre`, or writes it as
//!    `<outbox_dir>/<created>-<row>-<kind>.eml` when no SMTP server is configured
//!    (written under a temporary name, then renamed, so a reader never sees half a
//!    file and a repeat overwrites the same file);
//! 4. marks it sent; after a transient failure (connection refused, timeout, a 4xx
//!    reply, a file error) it is tried again `retry_initial_s · 2^(n−1)` seconds
//!    after the poll, n = attempts so far, capped at `retry_max_s` (an outage loses
//!    nothing); a permanent refusal (5xx) or an unbuildable message marks it
//!    `failed` with the reason.

use std::path::{Path, PathBuf};
use std::time::Duration as StdDuration;

use chrono::{DateTime, Duration, NaiveTime, Utc};
use lettre::message::Mailbox;
use lettre::transport::smtp::authentication::Credentials;
use lettre::{AsyncSmtpTransport, AsyncTransport, Tokio1Executor};
use tokio::sync::watch;

use super::NotifyError;
use super::email::build_message;
use crate::config::{Config, SmtpSecurity};
use crate::db::outbox::{self, Outgoing};
use crate::db::{Db, DbError};

/// Where messages go.
#[derive(Debug, Clone, PartialEq)]
pub enum Destination {
    /// An SMTP server.
    Smtp {
        /// Host name (also the name checked in its TLS certificate).
        host: String,
        /// TCP port.
        port: u16,
        /// Transport security.
        security: SmtpSecurity,
        /// User name and password, when the server wants them.
        credentials: Option<(String, String)>,
        /// Timeout of each SMTP command.
        timeout: StdDuration,
    },
    /// `.eml` files in a folder.
    Folder(PathBuf),
}

/// Settings of the worker, checked.
#[derive(Debug, Clone, PartialEq)]
pub struct WorkerParams {
    /// Sender of every email.
    pub from: Mailbox,
    /// Where messages go.
    pub destination: Destination,
    /// Time between polls of the outbox.
    pub poll: StdDuration,
    /// How long a claim lasts; longer than one SMTP exchange can take.
    pub lease: Duration,
    /// Wait before the first retry; doubles with every failed attempt.
    pub retry_initial: Duration,
    /// Longest wait between retries.
    pub retry_max: Duration,
    /// Rows claimed per poll.
    pub batch: i64,
    /// Time of day (UTC) of the daily digest.
    pub digest_at: NaiveTime,
    /// Domain of generated Message-IDs.
    pub message_id_domain: String,
}

impl WorkerParams {
    /// The worker settings of a (validated) configuration.
    pub fn from_config(c: &Config) -> Result<WorkerParams, NotifyError> {
        let n = &c.notify;
        let from = n.from_mailbox()?;
        let destination = match &n.smtp {
            Some(s) => Destination::Smtp {
                host: s.host.clone(),
                port: s.port.unwrap_or(s.security.default_port()),
                security: s.security,
                credentials: s
                    .username
                    .clone()
                    .map(|u| (u, s.password.clone().unwrap_or_default())),
                timeout: StdDuration::from_secs_f64(s.timeout_s),
            },
            None => Destination::Folder(c.outbox_dir()),
        };
        Ok(WorkerParams {
            message_id_domain: from.email.domain().to_string(),
            from,
            destination,
            poll: StdDuration::from_secs_f64(n.poll_interval_s),
            lease: seconds(n.lease_s),
            retry_initial: seconds(n.retry_initial_s),
            retry_max: seconds(n.retry_max_s),
            batch: 20,
            digest_at: n.digest_time()?,
        })
    }
}

fn seconds(s: f64) -> Duration {
    Duration::milliseconds((s * 1000.0).round() as i64)
}

/// The wait before the next attempt after `attempts` failed ones (≥ 1):
/// `initial · 2^(attempts−1)`, at most `max`.
pub fn backoff(attempts: i64, initial: Duration, max: Duration) -> Duration {
    let doublings = attempts.saturating_sub(1).clamp(0, 30) as u32;
    let wait = initial.num_milliseconds().saturating_mul(1i64 << doublings);
    Duration::milliseconds(wait.min(max.num_milliseconds()))
}

/// The latest digest slot at or before `now`: today's `at` if it has passed,
/// else yesterday's.
pub fn digest_slot(now: DateTime<Utc>, at: NaiveTime) -> DateTime<Utc> {
    let today = now.date_naive().and_time(at).and_utc();
    if today <= now { today } else { today - Duration::days(1) }
}

/// What one poll did.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct TickReport {
    /// Digest emails written.
    pub digests: usize,
    /// Messages delivered.
    pub sent: usize,
    /// Messages that failed transiently and wait for a retry.
    pub retried: usize,
    /// Messages refused for good.
    pub failed: usize,
}

enum Transport {
    Smtp(AsyncSmtpTransport<Tokio1Executor>),
    Folder(PathBuf),
}

enum Failure {
    Transient(String),
    Permanent(String),
}

/// The delivery worker of one process.
pub struct Worker {
    db: Db,
    params: WorkerParams,
    transport: Transport,
    owner: String,
    last_slot: Option<DateTime<Utc>>,
}

impl Worker {
    /// A worker over `db`; builds the SMTP transport (no connection yet).
    pub fn new(db: Db, params: WorkerParams) -> Result<Worker, NotifyError> {
        let transport = match &params.destination {
            Destination::Smtp { host, port, security, credentials, timeout } => {
                let setting = |e: lettre::transport::smtp::Error| NotifyError::InvalidSetting {
                    key: "notify.smtp",
                    reason: e.to_string(),
                };
                let builder = match security {
                    SmtpSecurity::None => {
                        AsyncSmtpTransport::<Tokio1Executor>::builder_dangerous(host)
                    }
                    SmtpSecurity::Starttls => {
                        AsyncSmtpTransport::<Tokio1Executor>::starttls_relay(host)
                            .map_err(setting)?
                    }
                    SmtpSecurity::Tls => {
                        AsyncSmtpTransport::<Tokio1Executor>::relay(host).map_err(setting)?
                    }
                };
                let mut builder = builder.port(*port).timeout(Some(*timeout));
                if let Some((user, password)) = credentials {
                    builder = builder.credentials(Credentials::new(user.clone(), password.clone()));
                }
                Transport::Smtp(builder.build())
            }
            Destination::Folder(dir) => Transport::Folder(dir.clone()),
        };
        let owner = format!("{}-{:08x}", std::process::id(), rand::random::<u32>());
        Ok(Worker { db, params, transport, owner, last_slot: None })
    }

    /// This worker's lease owner name.
    pub fn owner(&self) -> &str {
        &self.owner
    }

    /// One poll at time `now`: the digest slot if due, then up to one batch of
    /// due messages.
    pub async fn tick(&mut self, now: DateTime<Utc>) -> Result<TickReport, DbError> {
        let mut report = TickReport::default();
        let slot = digest_slot(now, self.params.digest_at);
        if self.last_slot.is_none_or(|s| s < slot) {
            if let Some(run) =
                outbox::run_digest(&self.db, slot, now, &self.params.message_id_domain).await?
            {
                if run.items > 0 {
                    tracing::info!(slot = %slot, digests = run.digests.len(), events = run.items, "daily digest written");
                }
                report.digests = run.digests.len();
            }
            self.last_slot = Some(slot);
        }
        let claimed =
            outbox::claim_due(&self.db, &self.owner, now, self.params.lease, self.params.batch)
                .await?;
        for row in claimed {
            match self.deliver(&row).await {
                Ok(()) => {
                    outbox::mark_sent(&self.db, row.outbox_id, Utc::now()).await?;
                    metrics::counter!(crate::metrics::EMAILS_SENT).increment(1);
                    tracing::info!(outbox = row.outbox_id, to = %row.to_address, subject = %row.subject, "email delivered");
                    report.sent += 1;
                }
                Err(Failure::Transient(e)) => {
                    let wait =
                        backoff(row.attempts, self.params.retry_initial, self.params.retry_max);
                    outbox::mark_retry(&self.db, row.outbox_id, &self.owner, now + wait, &e)
                        .await?;
                    metrics::counter!(crate::metrics::EMAILS_FAILED, "reason" => "retry")
                        .increment(1);
                    tracing::warn!(outbox = row.outbox_id, attempts = row.attempts, retry_in_s = wait.num_milliseconds() as f64 / 1000.0, error = %e, "email not delivered; will retry");
                    report.retried += 1;
                }
                Err(Failure::Permanent(e)) => {
                    outbox::mark_failed(&self.db, row.outbox_id, &self.owner, &e).await?;
                    metrics::counter!(crate::metrics::EMAILS_FAILED, "reason" => "permanent")
                        .increment(1);
                    tracing::error!(outbox = row.outbox_id, to = %row.to_address, error = %e, "email refused for good");
                    report.failed += 1;
                }
            }
        }
        Ok(report)
    }

    async fn deliver(&self, row: &Outgoing) -> Result<(), Failure> {
        let message =
            build_message(&self.params.from, row).map_err(|e| Failure::Permanent(e.to_string()))?;
        match &self.transport {
            Transport::Smtp(t) => t.send(message).await.map(|_| ()).map_err(|e| {
                if e.is_permanent() {
                    Failure::Permanent(format!("SMTP: {e}"))
                } else {
                    Failure::Transient(format!("SMTP: {e}"))
                }
            }),
            Transport::Folder(dir) => write_eml(dir, row, &message.formatted())
                .await
                .map_err(|e| Failure::Transient(format!("writing to {}: {e}", dir.display()))),
        }
    }

    /// Polls until `stop` turns true; a message being sent is finished first.
    pub async fn run(mut self, mut stop: watch::Receiver<bool>) {
        match &self.params.destination {
            Destination::Smtp { host, port, .. } => {
                tracing::info!(%host, port, "alert emails go to the SMTP server")
            }
            Destination::Folder(dir) => {
                tracing::info!(dir = %dir.display(), "no SMTP server configured: alert emails are written as .eml files")
            }
        }
        loop {
            if let Err(e) = self.tick(Utc::now()).await {
                tracing::warn!(error = %e, "outbox poll failed; will retry");
            }
            tokio::select! {
                _ = tokio::time::sleep(self.params.poll) => {}
                _ = stop.changed() => {}
            }
            if *stop.borrow() {
                break;
            }
        }
    }
}

/// The file name of a row's `.eml` file.
pub fn eml_name(row: &Outgoing) -> String {
    format!("{}-{:06}-{}.eml", row.created_at.format("%Y%m%dT%H%M%S"), row.outbox_id, row.kind)
}

async fn write_eml(dir: &Path, row: &Outgoing, bytes: &[u8]) -> std::io::Result<()> {
    tokio::fs::create_dir_all(dir).await?;
    let name = eml_name(row);
    let tmp = dir.join(format!(".{name}.tmp"));
    tokio::fs::write(&tmp, bytes).await?;
    tokio::fs::rename(&tmp, dir.join(name)).await
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::TimeZone;

    #[test]
    fn backoff_doubles_up_to_the_cap() {
        let s = Duration::seconds;
        // Exponential back-off, initial · 2^(n−1) capped (common practice, no source).
        let waits: Vec<i64> = (1..=8).map(|n| backoff(n, s(30), s(3600)).num_seconds()).collect();
        assert_eq!(waits, [30, 60, 120, 240, 480, 960, 1920, 3600]);
        assert_eq!(backoff(10_000, s(30), s(3600)), s(3600));
        assert_eq!(backoff(0, s(30), s(3600)), s(30));
    }

    #[test]
    fn digest_slots_are_the_latest_passed_time_of_day() {
        let at = NaiveTime::from_hms_opt(7, 0, 0).unwrap();
        let t = |d, h, m| Utc.with_ymd_and_hms(2026, 3, d, h, m, 0).unwrap();
        assert_eq!(digest_slot(t(3, 6, 59), at), t(2, 7, 0));
        assert_eq!(digest_slot(t(3, 7, 0), at), t(3, 7, 0));
        assert_eq!(digest_slot(t(3, 23, 0), at), t(3, 7, 0));
        assert_eq!(
            digest_slot(t(1, 0, 0), at),
            Utc.with_ymd_and_hms(2026, 2, 28, 7, 0, 0).unwrap()
        );
    }
}

#[cfg(test)]
mod db_tests {
    use super::*;
    use crate::db::outbox::tests::{add, sqlite};
    use crate::db::outbox::{EnqueueParams, enqueue, list};
    use crate::db::recipients::Delivery;
    use crate::notify::tests::{png, sample};
    use crate::notify::{AlertNotice, CAUTION};

    fn params(destination: Destination) -> WorkerParams {
        WorkerParams {
            from: "ohmline <alerts@levees.example.org>".parse().unwrap(),
            destination,
            poll: StdDuration::from_millis(100),
            lease: Duration::seconds(60),
            retry_initial: Duration::seconds(30),
            retry_max: Duration::seconds(3600),
            batch: 20,
            digest_at: NaiveTime::from_hms_opt(7, 0, 0).unwrap(),
            message_id_domain: "levees.example.org".into(),
        }
    }

    async fn enqueue_one(db: &Db, now: DateTime<Utc>) {
        add(db, "duty@x.org", None, 0, Delivery::PerEvent).await;
        let p =
            EnqueueParams { max_per_hour: 0, message_id_domain: "levees.example.org".into(), now };
        enqueue(db, &AlertNotice::new(sample()).unwrap(), &p).await.unwrap();
    }

    #[tokio::test]
    async fn without_smtp_each_email_becomes_one_eml_file() {
        let (db, dir) = sqlite().await;
        let now = Utc::now();
        enqueue_one(&db, now).await;
        let out = dir.path().join("outbox");
        let mut w = Worker::new(db.clone(), params(Destination::Folder(out.clone()))).unwrap();
        let r = w.tick(now).await.unwrap();
        assert_eq!((r.sent, r.retried, r.failed), (1, 0, 0));
        assert_eq!(w.tick(now).await.unwrap().sent, 0, "sent once");
        let files: Vec<_> = std::fs::read_dir(&out).unwrap().map(|e| e.unwrap().path()).collect();
        assert_eq!(files.len(), 1, "{files:?}");
        assert!(files[0].extension().is_some_and(|e| e == "eml"));
        let bytes = std::fs::read(&files[0]).unwrap();
        let m = mail_parser::MessageParser::default().parse(&bytes).expect("a MIME message");
        let row = &list(&db, Some("sent")).await.unwrap()[0];
        assert_eq!(Some(row.header_message_id.trim_matches(['<', '>'])), m.message_id());
        assert_eq!(m.subject(), Some(row.subject.as_str()));
        assert!(m.body_text(0).unwrap().contains(CAUTION));
        assert!(m.body_html(0).unwrap().contains(CAUTION));
        let pngs: Vec<Vec<u8>> = m.attachments().map(|a| a.contents().to_vec()).collect();
        assert_eq!(pngs, [png(1), png(2)]);
        assert_eq!(
            m.header_raw("Auto-Submitted").map(str::trim),
            Some("auto-generated"),
            "RFC 3834 marks machine-sent mail"
        );
    }

    #[tokio::test]
    async fn an_unreachable_smtp_server_means_retry_with_back_off() {
        let (db, _dir) = sqlite().await;
        let now = crate::db::now();
        enqueue_one(&db, now).await;
        // A port nobody listens on: bind, note the port, close.
        let port = std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
        let dest = Destination::Smtp {
            host: "127.0.0.1".into(),
            port,
            security: SmtpSecurity::None,
            credentials: None,
            timeout: StdDuration::from_secs(5),
        };
        let mut w = Worker::new(db.clone(), params(dest)).unwrap();
        let r = w.tick(now).await.unwrap();
        assert_eq!((r.sent, r.retried, r.failed), (0, 1, 0));
        let row = &list(&db, Some("pending")).await.unwrap()[0];
        assert_eq!(row.attempts, 1);
        assert!(row.last_error.as_deref().unwrap_or("").contains("SMTP"), "{row:?}");
        // Next attempt after retry_initial (30 s), measured from the failure.
        let wait = row.next_attempt_at - now;
        assert!(wait >= Duration::seconds(30) && wait < Duration::seconds(40), "{wait}");
        assert_eq!(w.tick(now + Duration::seconds(20)).await.unwrap().retried, 0, "not due yet");
        let r = w.tick(row.next_attempt_at).await.unwrap();
        assert_eq!(r.retried, 1);
        let row = &list(&db, Some("pending")).await.unwrap()[0];
        assert_eq!(row.attempts, 2);
        // The second wait doubles: 60 s.
        let wait = row.next_attempt_at - now;
        assert!(wait >= Duration::seconds(90), "{wait}");
    }
}
