//! Storage: every SQL statement of ohmline lives under this module, one file per
//! table or aggregate. Handlers and jobs call these functions; nothing else
//! builds SQL.
//!
//! Two engines are supported with the same SQL text: SQLite (embedded, the
//! default) and PostgreSQL. Statements use `$1`-style placeholders, which both
//! drivers accept. [`Db`] holds one pool of either kind; the `on_pool!` and
//! `on_tx!` macros expand a body once per engine so each arm type-checks
//! against its concrete driver. Times are UTC with millisecond precision
//! ([`now`], [`ms`]) so that SQLite's text timestamps sort correctly and compare
//! equal after a round trip.

pub mod activity;
pub mod alerts;
pub mod audit;
pub mod epochs;
pub mod jobs;
pub mod lines;
pub mod models;
pub mod outbox;
pub mod quality;
pub mod raw_uploads;
pub mod recipients;
pub mod rules;
pub mod sequences;
pub mod series;
pub mod sessions;
pub mod sites;
pub mod tokens;
pub mod user_tokens;
pub mod users;

use std::path::Path;
use std::str::FromStr;
use std::time::Duration;

use chrono::{DateTime, SubsecRound, Utc};
use sqlx::postgres::{PgConnectOptions, PgPoolOptions};
use sqlx::sqlite::{SqliteConnectOptions, SqliteJournalMode, SqlitePoolOptions, SqliteSynchronous};
use sqlx::{PgPool, SqlitePool};
use thiserror::Error;

/// Storage failures.
#[derive(Debug, Error)]
pub enum DbError {
    /// The database URL is neither `sqlite:` nor `postgres:`.
    #[error("unsupported database URL {0:?}: use sqlite://PATH or postgres://...")]
    UnsupportedUrl(String),
    /// A uniqueness constraint refused the write.
    #[error("{what} already exists")]
    Conflict {
        /// What was duplicated, for the message.
        what: String,
    },
    /// A referenced row does not exist.
    #[error("{what} not found")]
    NotFound {
        /// What was looked for, for the message.
        what: String,
    },
    /// The database could not be reached or refused the connection.
    #[error("database unavailable: {0}")]
    Unavailable(#[source] sqlx::Error),
    /// Stored data no longer passes validation (a bug or a manual edit).
    #[error("stored data is inconsistent: {what}")]
    Corrupt {
        /// What is inconsistent.
        what: String,
    },
    /// Applying migrations failed.
    #[error("migration failed: {0}")]
    Migrate(#[from] sqlx::migrate::MigrateError),
    /// The operation is not available on this engine.
    #[error("{0}")]
    Unsupported(String),
    /// Any other driver error.
    #[error("database error: {0}")]
    Sqlx(#[source] sqlx::Error),
}

impl From<sqlx::Error> for DbError {
    fn from(e: sqlx::Error) -> Self {
        match &e {
            sqlx::Error::Io(_)
            | sqlx::Error::PoolTimedOut
            | sqlx::Error::PoolClosed
            | sqlx::Error::Tls(_) => DbError::Unavailable(e),
            sqlx::Error::Database(d) if d.is_unique_violation() => {
                DbError::Conflict { what: d.message().to_string() }
            }
            // PostgreSQL's connection exceptions (class 08) and a server
            // shutting down or starting (57P01–57P03).
            sqlx::Error::Database(d)
                if d.code().is_some_and(|c| c.starts_with("08") || c.starts_with("57P")) =>
            {
                DbError::Unavailable(e)
            }
            _ => DbError::Sqlx(e),
        }
    }
}

/// How long a statement waits for a pooled connection unless configured
/// otherwise (`database_acquire_timeout_s`).
pub const DEFAULT_ACQUIRE_TIMEOUT: Duration = Duration::from_secs(5);

/// Result alias for storage calls.
pub type DbResult<T> = Result<T, DbError>;

/// A connection pool to one of the supported engines.
#[derive(Clone, Debug)]
pub enum Db {
    /// Embedded SQLite (the default).
    Sqlite(SqlitePool),
    /// PostgreSQL.
    Postgres(PgPool),
}

/// Which engine a [`Db`] talks to.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Engine {
    /// SQLite.
    Sqlite,
    /// PostgreSQL.
    Postgres,
}

/// Expands `$body` once per engine with `$p` bound to the concrete pool.
macro_rules! on_pool {
    ($db:expr, |$p:ident| $body:expr) => {
        match $db {
            $crate::db::Db::Sqlite($p) => $body,
            $crate::db::Db::Postgres($p) => $body,
        }
    };
}
pub(crate) use on_pool;

/// Opens a transaction on `$db`, runs `$body` with `$c` bound to the
/// transaction's connection (`&mut Connection`), commits when the body returns
/// `Ok`, and rolls back otherwise.
macro_rules! in_tx {
    ($db:expr, |$c:ident| $body:expr) => {
        match $db {
            $crate::db::Db::Sqlite(pool) => {
                // IMMEDIATE takes the write lock first (waiting out other
                // writers under the busy timeout): a deferred transaction that
                // reads before it writes fails at once with SQLITE_BUSY when
                // another writer committed in between.
                let mut tx = pool.begin_with("BEGIN IMMEDIATE").await?;
                let r = {
                    let $c = &mut *tx;
                    $body
                };
                match r {
                    Ok(v) => {
                        tx.commit().await?;
                        Ok(v)
                    }
                    Err(e) => Err(e),
                }
            }
            $crate::db::Db::Postgres(pool) => {
                let mut tx = pool.begin().await?;
                let r = {
                    let $c = &mut *tx;
                    $body
                };
                match r {
                    Ok(v) => {
                        tx.commit().await?;
                        Ok(v)
                    }
                    Err(e) => Err(e),
                }
            }
        }
    };
}
pub(crate) use in_tx;

impl Db {
    /// Connects to `url` (`sqlite://PATH`, `sqlite::memory:` or `postgres://…`).
    /// A SQLite file and its folder are created when missing.
    pub async fn connect(url: &str) -> DbResult<Db> {
        Self::connect_with_timeout(url, DEFAULT_ACQUIRE_TIMEOUT).await
    }

    /// As [`Db::connect`]; a statement waits at most `acquire_timeout` for a
    /// connection (an unreachable database then fails it as
    /// [`DbError::Unavailable`]).
    pub async fn connect_with_timeout(url: &str, acquire_timeout: Duration) -> DbResult<Db> {
        if url.starts_with("sqlite:") {
            if let Some(path) = sqlite_path(url)
                && let Some(dir) = path.parent()
                && !dir.as_os_str().is_empty()
            {
                std::fs::create_dir_all(dir).map_err(|e| DbError::Unavailable(e.into()))?;
            }
            let opts = SqliteConnectOptions::from_str(url)?
                .create_if_missing(true)
                .journal_mode(SqliteJournalMode::Wal)
                .synchronous(SqliteSynchronous::Full)
                .foreign_keys(true)
                .busy_timeout(Duration::from_secs(10));
            let pool = SqlitePoolOptions::new()
                .max_connections(4)
                .acquire_timeout(acquire_timeout)
                .connect_with(opts)
                .await?;
            Ok(Db::Sqlite(pool))
        } else if url.starts_with("postgres:") || url.starts_with("postgresql:") {
            let opts = PgConnectOptions::from_str(url)?;
            let pool = PgPoolOptions::new()
                .max_connections(16)
                .acquire_timeout(acquire_timeout)
                .connect_with(opts)
                .await?;
            Ok(Db::Postgres(pool))
        } else {
            Err(DbError::UnsupportedUrl(url.to_string()))
        }
    }

    /// Applies every pending migration of this engine (`migrations/<engine>/`).
    pub async fn migrate(&self) -> DbResult<()> {
        match self {
            Db::Sqlite(p) => sqlx::migrate!("../migrations/sqlite").run(p).await?,
            Db::Postgres(p) => sqlx::migrate!("../migrations/postgres").run(p).await?,
        }
        Ok(())
    }

    /// Migrations this build knows that the database has not applied
    /// successfully (0 when the schema is current). Does not apply anything.
    pub async fn pending_migrations(&self) -> DbResult<usize> {
        let migrator = match self {
            Db::Sqlite(_) => sqlx::migrate!("../migrations/sqlite"),
            Db::Postgres(_) => sqlx::migrate!("../migrations/postgres"),
        };
        // A database never migrated has no bookkeeping table: everything is pending.
        let applied: Vec<i64> = on_pool!(self, |p| match sqlx::query_scalar::<_, i64>(
            "SELECT version FROM _sqlx_migrations WHERE success"
        )
        .fetch_all(p)
        .await
        {
            Ok(v) => v,
            Err(sqlx::Error::Database(_)) => Vec::new(),
            Err(e) => return Err(e.into()),
        });
        Ok(migrator
            .iter()
            .filter(|m| m.migration_type.is_up_migration() && !applied.contains(&m.version))
            .count())
    }

    /// Writes a consistent copy of a SQLite database to `path` while the
    /// service runs (`VACUUM INTO`: one read transaction, so writers are not
    /// blocked and the copy is a single point in time). `path` must not exist.
    /// PostgreSQL is refused: use `pg_dump`.
    pub async fn backup_to(&self, path: &Path) -> DbResult<()> {
        match self {
            Db::Sqlite(p) => {
                let target = path.to_str().ok_or_else(|| DbError::Corrupt {
                    what: format!("backup path {} is not UTF-8", path.display()),
                })?;
                sqlx::query("VACUUM INTO $1").bind(target).execute(p).await?;
                Ok(())
            }
            Db::Postgres(_) => Err(DbError::Unsupported(
                "ohmline backup copies SQLite databases only; back up PostgreSQL with pg_dump \
                 (see deploy/OPERATIONS.md)"
                    .into(),
            )),
        }
    }

    /// The engine behind this pool.
    pub fn engine(&self) -> Engine {
        match self {
            Db::Sqlite(_) => Engine::Sqlite,
            Db::Postgres(_) => Engine::Postgres,
        }
    }

    /// Answers when the database accepts a trivial query.
    pub async fn ping(&self) -> DbResult<()> {
        on_pool!(self, |p| sqlx::query("SELECT 1").execute(p).await.map(|_| ())?);
        Ok(())
    }

    /// Closes the pool, waiting for connections to be returned.
    pub async fn close(&self) {
        on_pool!(self, |p| p.close().await)
    }
}

/// The file path of a `sqlite://PATH` URL (None for in-memory databases).
pub fn sqlite_path(url: &str) -> Option<&Path> {
    let rest = url.strip_prefix("sqlite://").or_else(|| url.strip_prefix("sqlite:"))?;
    let rest = rest.split('?').next().unwrap_or(rest);
    (!rest.is_empty() && !rest.starts_with(":memory:")).then(|| Path::new(rest))
}

/// The current UTC time truncated to milliseconds, the precision of every stored
/// timestamp.
pub fn now() -> DateTime<Utc> {
    ms(Utc::now())
}

/// `t` truncated to milliseconds.
pub fn ms(t: DateTime<Utc>) -> DateTime<Utc> {
    t.trunc_subsecs(3)
}

/// Error for a missing row.
pub(crate) fn not_found(what: impl Into<String>) -> DbError {
    DbError::NotFound { what: what.into() }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sqlite_paths_are_extracted() {
        assert_eq!(sqlite_path("sqlite://data/x.sqlite"), Some(Path::new("data/x.sqlite")));
        assert_eq!(
            sqlite_path("sqlite:///abs/x.sqlite?mode=rwc"),
            Some(Path::new("/abs/x.sqlite"))
        );
        assert_eq!(sqlite_path("sqlite::memory:"), None);
    }
}
