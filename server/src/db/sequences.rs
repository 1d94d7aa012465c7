//! Sequences: named, versioned lists of quadrupoles for a line. A new upload of a
//! line's sequence becomes the next version; epochs name the version they ran.

use chrono::{DateTime, Utc};
use ohmline_core::sequence::{Quadrupole, Sequence, SequenceError};
use serde::Serialize;

use super::{Db, DbError, DbResult, in_tx, on_pool};

/// A stored sequence version.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct SequenceRow {
    /// Row id.
    pub id: i64,
    /// The line it belongs to.
    pub line_id: i64,
    /// Name given at upload.
    pub name: String,
    /// Version, 1 for the first sequence of the line.
    pub version: i64,
    /// Number of quadrupoles.
    pub n_quadrupoles: i64,
    /// When it was stored.
    pub created_at: DateTime<Utc>,
}

const COLUMNS: &str = "id, line_id, name, version, n_quadrupoles, created_at";

/// Inserts `$seq` as the next version of line `$line_id` on connection `$c`,
/// evaluating to `Result<SequenceRow, DbError>`. A macro so that line creation can
/// store its first sequence in the same transaction on either engine.
macro_rules! insert_sequence {
    ($c:ident, $line_id:expr, $name:expr, $seq:expr) => {{
        let seq: &ohmline_core::sequence::Sequence = $seq;
        let version: i64 = sqlx::query_scalar(
            "SELECT COALESCE(MAX(version), 0) + 1 FROM sequences WHERE line_id = $1",
        )
        .bind($line_id)
        .fetch_one(&mut *$c)
        .await?;
        let row = sqlx::query_as::<_, $crate::db::sequences::SequenceRow>(
            "INSERT INTO sequences (line_id, name, version, n_quadrupoles, created_at)
             VALUES ($1, $2, $3, $4, $5)
             RETURNING id, line_id, name, version, n_quadrupoles, created_at",
        )
        .bind($line_id)
        .bind($name)
        .bind(version)
        .bind(seq.len() as i64)
        .bind($crate::db::now())
        .fetch_one(&mut *$c)
        .await?;
        let quads: Vec<(usize, &ohmline_core::sequence::Quadrupole)> =
            seq.quadrupoles().iter().enumerate().collect();
        for chunk in quads.chunks(1000) {
            let mut qb = sqlx::QueryBuilder::new(
                "INSERT INTO sequence_quadrupoles (sequence_id, position, a, b, m, n, reciprocal) ",
            );
            qb.push_values(chunk, |mut b, &(i, q)| {
                b.push_bind(row.id)
                    .push_bind(i as i64)
                    .push_bind(q.a as i64)
                    .push_bind(q.b.map(|x| x as i64))
                    .push_bind(q.m as i64)
                    .push_bind(q.n.map(|x| x as i64))
                    .push_bind(seq.reciprocal_of(i).map(|x| x as i64));
            });
            qb.build().execute(&mut *$c).await?;
        }
        Ok::<_, $crate::db::DbError>(row)
    }};
}
pub(crate) use insert_sequence;

/// Stores `seq` as the next version of the line's sequence.
pub async fn create(db: &Db, line_id: i64, name: &str, seq: &Sequence) -> DbResult<SequenceRow> {
    in_tx!(db, |c| insert_sequence!(c, line_id, name, seq))
}

/// The newest version of the line's sequence.
pub async fn latest(db: &Db, line_id: i64) -> DbResult<Option<SequenceRow>> {
    let sql =
        format!("SELECT {COLUMNS} FROM sequences WHERE line_id = $1 ORDER BY version DESC LIMIT 1");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, SequenceRow>(&sql)
        .bind(line_id)
        .fetch_optional(p)
        .await?))
}

/// A given version of the line's sequence.
pub async fn by_version(db: &Db, line_id: i64, version: i64) -> DbResult<Option<SequenceRow>> {
    let sql = format!("SELECT {COLUMNS} FROM sequences WHERE line_id = $1 AND version = $2");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, SequenceRow>(&sql)
        .bind(line_id)
        .bind(version)
        .fetch_optional(p)
        .await?))
}

/// A sequence version by id.
pub async fn by_id(db: &Db, id: i64) -> DbResult<Option<SequenceRow>> {
    let sql = format!("SELECT {COLUMNS} FROM sequences WHERE id = $1");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, SequenceRow>(&sql).bind(id).fetch_optional(p).await?))
}

/// Every version of the line's sequence, newest first.
pub async fn list(db: &Db, line_id: i64) -> DbResult<Vec<SequenceRow>> {
    let sql = format!("SELECT {COLUMNS} FROM sequences WHERE line_id = $1 ORDER BY version DESC");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, SequenceRow>(&sql).bind(line_id).fetch_all(p).await?))
}

/// The quadrupoles of a stored sequence, in order, validated for a line of
/// `n_electrodes` electrodes.
pub async fn load(db: &Db, sequence_id: i64, n_electrodes: usize) -> DbResult<Sequence> {
    type Row = (i64, Option<i64>, i64, Option<i64>);
    let rows: Vec<Row> = on_pool!(db, |p| sqlx::query_as(
        "SELECT a, b, m, n FROM sequence_quadrupoles WHERE sequence_id = $1 ORDER BY position"
    )
    .bind(sequence_id)
    .fetch_all(p)
    .await?);
    let quads = rows
        .into_iter()
        .map(|(a, b, m, n)| Quadrupole {
            a: a as usize,
            b: b.map(|x| x as usize),
            m: m as usize,
            n: n.map(|x| x as usize),
        })
        .collect();
    Sequence::new(quads, n_electrodes).map_err(|e: SequenceError| DbError::Corrupt {
        what: format!("stored sequence {sequence_id}: {e}"),
    })
}
