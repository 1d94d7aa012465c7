//! The load driver shared by `ohmline bench load` and the end-to-end load
//! test: many simulated lines upload epochs to a running service at a fixed
//! offered rate while simulated people read pages and the API.
//!
//! The run is bounded: a fixed number of uploads at a fixed rate (so a fixed
//! duration), reads at their own fixed rate over the same time. It is an open
//! loop: every request starts at its scheduled time in its own task, whether
//! or not the earlier ones were answered, so a slow server shows up as
//! latency rather than as a lower offered rate. Upload `i` goes to line
//! `i mod lines` as that line's epoch `i div lines`, so each line uploads at
//! `rate / lines` per second.
//!
//! Uploads use a fresh connection each, as a field meter does; reads use one
//! kept-alive client, as a browser does, and follow no redirects (a page that
//! sends the reader to the sign-in form counts as an error). Reads take turns
//! over a line page, the alert list page, a line's epoch list over the API
//! and the alert list over the API.
//!
//! The acknowledgement latency of an upload is the time from sending the
//! request to receiving the answer's status; a read's latency includes its
//! whole body. Every answer other than 201 for an upload or 200 for a read is
//! an error, as is a transport failure or a timeout.

use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context, bail};
use bytes::Bytes;
use chrono::{DateTime, TimeZone, Utc};
use ohmline_core::geometry::{Electrode, LineGeometry};
use ohmline_core::sequence::{Quadrupole, Sequence, geometric_factor_flat};

use crate::auth::password::{generate_password, hash_password};
use crate::auth::session::SESSION_COOKIE;
use crate::auth::{Role, hash_token, new_line_token, new_user_token, random_secret};
use crate::db::lines::{NewElectrode, NewLine};
use crate::db::{self, Db};

/// A flat line of `ne` electrodes 1 m apart with every Wenner (a = 1…15) and
/// dipole–dipole (a = 1…2, n = 1…6) quadrupole that fits.
pub fn flat_line(ne: usize) -> anyhow::Result<(Vec<NewElectrode>, LineGeometry, Sequence)> {
    if ne < 8 {
        bail!("a bench line needs at least 8 electrodes, not {ne}");
    }
    let electrodes: Vec<NewElectrode> = (0..ne)
        .map(|i| NewElectrode {
            label: format!("{}", i + 1),
            x: i as f64,
            z: 0.0,
            easting: None,
            northing: None,
        })
        .collect();
    let geometry =
        LineGeometry::new(electrodes.iter().map(|e| Electrode::new(&e.label, e.x, e.z)).collect())?;
    let mut q = Vec::new();
    for a in 1..=15 {
        for i in 0..ne.saturating_sub(3 * a) {
            q.push(Quadrupole::new(i, i + 3 * a, i + a, i + 2 * a));
        }
    }
    for a in 1..=2 {
        for k in 1..=6 {
            for i in 0..ne.saturating_sub((k + 2) * a) {
                q.push(Quadrupole::new(i, i + a, i + (k + 1) * a, i + (k + 2) * a));
            }
        }
    }
    Ok((electrodes, geometry, Sequence::new(q, ne)?))
}

/// Registers a longitudinal line with its sequence (version `label`) and a
/// fresh meter token (labelled `label`); returns the line's id and the token.
pub async fn add_line(
    db: &Db,
    site_id: i64,
    name: &str,
    expected_interval_s: i64,
    electrodes: &[NewElectrode],
    sequence: &Sequence,
    label: &str,
) -> anyhow::Result<(i64, String)> {
    let new = NewLine {
        site_id,
        name,
        orientation: "longitudinal",
        expected_interval_s,
        notes: "",
        electrodes,
        sequence: Some((label, sequence)),
    };
    let (line, _) = db::lines::create(db, &new).await?;
    let token = new_line_token();
    db::tokens::insert(db, line.id, &hash_token(&token), label).await?;
    Ok((line.id, token))
}
/// The start time of a line's epoch `k`: one an hour from 2026-01-01.
pub fn epoch_start(k: usize) -> DateTime<Utc> {
    Utc.with_ymd_and_hms(2026, 1, 1, 0, 0, 0).unwrap() + chrono::Duration::hours(k as i64)
}

/// A CSV epoch of homogeneous 100 Ω·m ground (R = ρ/K) with a small
/// deterministic variation by `k` and `salt` (a line's number), started at
/// [`epoch_start`]`(k)`.
pub fn epoch_csv(geometry: &LineGeometry, seq: &Sequence, k: usize, salt: usize) -> String {
    let mut s = format!(
        "# started_at: {}\n# meter_id: meter-{salt}\na,b,m,n,current_ma,voltage_mv,stack_error_pct\n",
        epoch_start(k).to_rfc3339()
    );
    let label = |i: Option<usize>| {
        i.map(|i| geometry.electrodes()[i].label().to_string()).unwrap_or_default()
    };
    for (i, q) in seq.quadrupoles().iter().enumerate() {
        let kf = geometric_factor_flat(geometry, q).unwrap_or(1.0);
        let r = 100.0 / kf * (1.0 + 1e-3 * ((i + k + 3 * salt) % 7) as f64);
        s.push_str(&format!(
            "{},{},{},{},100,{:.5},0.3\n",
            label(Some(q.a)),
            label(q.b),
            label(Some(q.m)),
            label(q.n),
            r * 100.0
        ));
    }
    s
}

/// The value at fraction `p` of sorted values (nearest rank); NaN when empty.
pub fn percentile(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let i = ((sorted.len() as f64 - 1.0) * p).round() as usize;
    sorted[i.min(sorted.len() - 1)]
}

/// One simulated line: its slug and meter token.
#[derive(Debug, Clone)]
pub struct LoadLine {
    /// Line slug.
    pub name: String,
    /// Its meter token.
    pub token: String,
}

/// What a run needs in the database: the lines with their tokens, a viewer
/// with a browser session and a personal token, and the line's layout.
#[derive(Debug, Clone)]
pub struct Fixture {
    /// The simulated lines, `load-00`, `load-01`, …
    pub lines: Vec<LoadLine>,
    /// `Cookie` header value of the viewer's session.
    pub session_cookie: String,
    /// The viewer's personal API token.
    pub api_token: String,
    /// Layout shared by every line.
    pub geometry: LineGeometry,
    /// Sequence shared by every line.
    pub sequence: Sequence,
}

/// Registers `n_lines` lines of `electrodes` electrodes (see [`flat_line`]) on
/// one site, a meter token for each, and a viewer with a session and a
/// personal token, in a migrated database.
pub async fn prepare(db: &Db, n_lines: usize, electrodes: usize) -> anyhow::Result<Fixture> {
    if n_lines == 0 {
        bail!("a load run needs at least one line");
    }
    let (new_electrodes, geometry, sequence) = flat_line(electrodes)?;
    let site = db::sites::create(db, "Load reach", "load test data").await?;
    let mut lines = Vec::with_capacity(n_lines);
    for i in 0..n_lines {
        let name = format!("load-{i:02}");
        let (_, token) =
            add_line(db, site.id, &name, 3600, &new_electrodes, &sequence, "load").await?;
        lines.push(LoadLine { name, token });
    }
    let hash = tokio::task::spawn_blocking(|| hash_password(&generate_password()))
        .await
        .context("password hashing task")??;
    let user = db::users::create(db, "viewer@levees.example.org", &hash, Role::Viewer).await?;
    let secret = random_secret();
    db::sessions::create(db, user.id, &hash_token(&secret), &random_secret()).await?;
    let api_token = new_user_token();
    db::user_tokens::insert(db, user.id, &hash_token(&api_token), "load").await?;
    Ok(Fixture {
        lines,
        session_cookie: format!("{SESSION_COOKIE}={secret}"),
        api_token,
        geometry,
        sequence,
    })
}

/// How hard and how long to push.
#[derive(Debug, Clone)]
pub struct Plan {
    /// Uploads in all.
    pub uploads: usize,
    /// Uploads offered per second, all lines together.
    pub uploads_per_s: f64,
    /// Reads offered per second over the same time.
    pub reads_per_s: f64,
    /// Longest wait for one answer before it counts as an error.
    pub timeout: Duration,
}

impl Plan {
    /// The length of the run, s.
    pub fn duration_s(&self) -> f64 {
        self.uploads as f64 / self.uploads_per_s
    }

    /// Reads in all.
    pub fn reads(&self) -> usize {
        (self.duration_s() * self.reads_per_s).round() as usize
    }
}

/// An acknowledged upload.
#[derive(Debug, Clone)]
pub struct Acked {
    /// Line slug.
    pub line: String,
    /// The epoch's start time as sent.
    pub started_at: DateTime<Utc>,
    /// The epoch id in the answer.
    pub epoch_id: i64,
    /// The body sent.
    pub body: Bytes,
}

/// The kinds of read, in the order they take turns.
pub const READS: [&str; 4] = ["line page", "alert list page", "API epoch list", "API alert list"];

/// What a run measured.
#[derive(Debug, Clone, Default)]
pub struct Report {
    /// Uploads offered per second.
    pub offered_uploads_per_s: f64,
    /// Acknowledged uploads per second, from the first send to the last answer.
    pub achieved_uploads_per_s: f64,
    /// Reads offered per second.
    pub offered_reads_per_s: f64,
    /// Successful reads per second over the run.
    pub achieved_reads_per_s: f64,
    /// Acknowledged uploads.
    pub acked: Vec<Acked>,
    /// Acknowledgement latency of each acknowledged upload, ms, sorted.
    pub upload_ms: Vec<f64>,
    /// Latency of each successful read, ms, sorted.
    pub read_ms: Vec<f64>,
    /// Successful reads by kind (in the order of [`READS`]).
    pub reads_by_kind: [usize; 4],
    /// Failed uploads: what went wrong.
    pub upload_errors: Vec<String>,
    /// Failed reads: what went wrong.
    pub read_errors: Vec<String>,
    /// From the first scheduled request to the last answer, s.
    pub wall_s: f64,
}

impl Report {
    /// Upload acknowledgement latency at fraction `p`, ms.
    pub fn upload_p(&self, p: f64) -> f64 {
        percentile(&self.upload_ms, p)
    }

    /// Read latency at fraction `p`, ms.
    pub fn read_p(&self, p: f64) -> f64 {
        percentile(&self.read_ms, p)
    }

    /// Failed requests of both kinds.
    pub fn errors(&self) -> usize {
        self.upload_errors.len() + self.read_errors.len()
    }
}

#[derive(Default)]
struct Tally {
    acked: Vec<Acked>,
    upload_ms: Vec<f64>,
    read_ms: Vec<f64>,
    reads_by_kind: [usize; 4],
    upload_errors: Vec<String>,
    read_errors: Vec<String>,
    last_answer: Option<Instant>,
}

impl Tally {
    fn answered(&mut self, at: Instant) {
        self.last_answer = Some(self.last_answer.map_or(at, |t| t.max(at)));
    }
}

/// Runs `plan` against the service at `base` (`http://host:port`) with the
/// lines and credentials of `fixture`. Upload bodies are built before the
/// clock starts.
pub async fn run(base: &str, fixture: &Fixture, plan: &Plan) -> anyhow::Result<Report> {
    if !(plan.uploads_per_s > 0.0 && plan.uploads_per_s.is_finite()) || plan.uploads == 0 {
        bail!("a load run needs a positive upload rate and at least one upload");
    }
    if !(plan.reads_per_s >= 0.0 && plan.reads_per_s.is_finite()) {
        bail!("the read rate must be zero or positive");
    }
    let n_lines = fixture.lines.len();
    let (g, s) = (fixture.geometry.clone(), fixture.sequence.clone());
    let n = plan.uploads;
    let bodies: Vec<Bytes> = tokio::task::spawn_blocking(move || {
        (0..n).map(|i| Bytes::from(epoch_csv(&g, &s, i / n_lines, i % n_lines))).collect()
    })
    .await
    .context("building upload bodies")?;

    // A meter opens a connection per upload; a browser keeps one open.
    let uploader =
        reqwest::Client::builder().pool_max_idle_per_host(0).timeout(plan.timeout).build()?;
    let reader = reqwest::Client::builder()
        .redirect(reqwest::redirect::Policy::none())
        .timeout(plan.timeout)
        .build()?;
    let tally = Arc::new(Mutex::new(Tally::default()));
    let start = Instant::now() + Duration::from_millis(100);

    let mut tasks = tokio::task::JoinSet::new();
    let upload_gap = Duration::from_secs_f64(1.0 / plan.uploads_per_s);
    let n_reads = plan.reads();
    let read_gap =
        if n_reads > 0 { Duration::from_secs_f64(1.0 / plan.reads_per_s) } else { Duration::ZERO };
    // One schedule of both kinds of request, in time order.
    let mut next_upload = 0usize;
    let mut next_read = 0usize;
    let base = base.trim_end_matches('/').to_string();
    while next_upload < n || next_read < n_reads {
        let up_at = start + upload_gap * next_upload as u32;
        let read_at = start + read_gap * next_read as u32;
        let upload_first = next_read >= n_reads || (next_upload < n && up_at <= read_at);
        if upload_first {
            tokio::time::sleep_until(up_at.into()).await;
            let i = next_upload;
            next_upload += 1;
            let line = fixture.lines[i % n_lines].clone();
            let body = bodies[i].clone();
            let (client, tally, base) = (uploader.clone(), tally.clone(), base.clone());
            tasks.spawn(async move {
                let started_at = epoch_start(i / n_lines);
                let t0 = Instant::now();
                let sent = client
                    .post(format!("{base}/api/v1/lines/{}/epochs", line.name))
                    .bearer_auth(&line.token)
                    .header("content-type", "text/csv")
                    .body(body.clone())
                    .send()
                    .await;
                let answered = Instant::now();
                let outcome = match sent {
                    Ok(r) if r.status() == 201 => {
                        let ms = t0.elapsed().as_secs_f64() * 1e3;
                        match r.json::<serde_json::Value>().await {
                            Ok(v) => match v["epoch_id"].as_i64() {
                                Some(epoch_id) => Ok((ms, epoch_id)),
                                None => Err(format!("201 without an epoch id: {v}")),
                            },
                            Err(e) => Err(format!("201 with an unreadable body: {e}")),
                        }
                    }
                    Ok(r) => {
                        let status = r.status();
                        Err(format!("{status}: {}", r.text().await.unwrap_or_default()))
                    }
                    Err(e) => Err(format!("no answer: {e}")),
                };
                let mut t = tally.lock().unwrap_or_else(|e| e.into_inner());
                t.answered(answered);
                match outcome {
                    Ok((ms, epoch_id)) => {
                        t.upload_ms.push(ms);
                        t.acked.push(Acked { line: line.name, started_at, epoch_id, body });
                    }
                    Err(e) => {
                        t.upload_errors.push(format!("{} epoch {started_at}: {e}", line.name))
                    }
                }
            });
        } else {
            tokio::time::sleep_until(read_at.into()).await;
            let j = next_read;
            next_read += 1;
            let kind = j % READS.len();
            let line = fixture.lines[(j / READS.len()) % n_lines].name.clone();
            let (path, by_session, expect) = match kind {
                0 => (format!("/lines/{line}"), true, line.clone()),
                1 => ("/alerts".to_string(), true, "<html".to_string()),
                2 => (format!("/api/v1/lines/{line}/epochs"), false, "\"epochs\"".to_string()),
                _ => ("/api/v1/alerts".to_string(), false, "\"caution\"".to_string()),
            };
            let (client, tally, base) = (reader.clone(), tally.clone(), base.clone());
            let (cookie, token) = (fixture.session_cookie.clone(), fixture.api_token.clone());
            tasks.spawn(async move {
                let t0 = Instant::now();
                let req = client.get(format!("{base}{path}"));
                let req =
                    if by_session { req.header("cookie", cookie) } else { req.bearer_auth(token) };
                let outcome = match req.send().await {
                    Ok(r) if r.status() == 200 => match r.text().await {
                        Ok(body) if body.contains(&expect) => Ok(t0.elapsed()),
                        Ok(body) => Err(format!(
                            "200 without {expect:?}: {}",
                            body.chars().take(200).collect::<String>()
                        )),
                        Err(e) => Err(format!("body cut off: {e}")),
                    },
                    Ok(r) => Err(format!("{}", r.status())),
                    Err(e) => Err(format!("no answer: {e}")),
                };
                let mut t = tally.lock().unwrap_or_else(|e| e.into_inner());
                t.answered(Instant::now());
                match outcome {
                    Ok(d) => {
                        t.read_ms.push(d.as_secs_f64() * 1e3);
                        t.reads_by_kind[kind] += 1;
                    }
                    Err(e) => t.read_errors.push(format!("GET {path}: {e}")),
                }
            });
        }
    }
    while let Some(done) = tasks.join_next().await {
        done.context("a request task panicked")?;
    }
    let t = std::mem::take(&mut *tally.lock().unwrap_or_else(|e| e.into_inner()));
    let wall_s =
        t.last_answer.map_or(0.0, |end| end.saturating_duration_since(start).as_secs_f64());
    let mut upload_ms = t.upload_ms;
    upload_ms.sort_by(f64::total_cmp);
    let mut read_ms = t.read_ms;
    read_ms.sort_by(f64::total_cmp);
    let per_s = |k: usize| if wall_s > 0.0 { k as f64 / wall_s } else { 0.0 };
    Ok(Report {
        offered_uploads_per_s: plan.uploads_per_s,
        achieved_uploads_per_s: per_s(t.acked.len()),
        offered_reads_per_s: if n_reads > 0 { plan.reads_per_s } else { 0.0 },
        achieved_reads_per_s: per_s(read_ms.len()),
        acked: t.acked,
        upload_ms,
        read_ms,
        reads_by_kind: t.reads_by_kind,
        upload_errors: t.upload_errors,
        read_errors: t.read_errors,
        wall_s,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn percentiles_by_nearest_rank() {
        let v: Vec<f64> = (1..=100).map(f64::from).collect();
        // Nearest rank on (n − 1)·p (common practice, no source).
        assert_eq!(percentile(&v, 0.5), 51.0);
        assert_eq!(percentile(&v, 0.99), 99.0);
        assert_eq!(percentile(&v, 1.0), 100.0);
        assert!(percentile(&[], 0.5).is_nan());
    }

    #[test]
    fn a_plan_lasts_uploads_over_rate() {
        let p = Plan {
            uploads: 1000,
            uploads_per_s: 50.0,
            reads_per_s: 10.0,
            timeout: Duration::from_secs(30),
        };
        assert_eq!(p.duration_s(), 20.0);
        assert_eq!(p.reads(), 200);
    }

    #[test]
    fn epochs_of_a_line_differ_in_start_and_lines_in_values() {
        let (_, g, s) = flat_line(16).unwrap();
        let a = epoch_csv(&g, &s, 0, 0);
        let b = epoch_csv(&g, &s, 1, 0);
        let c = epoch_csv(&g, &s, 0, 1);
        assert!(a.starts_with("# started_at: 2026-01-01T00:00:00+00:00\n"));
        assert!(b.starts_with("# started_at: 2026-01-01T01:00:00+00:00\n"));
        assert_ne!(a, c);
        assert_eq!(a.lines().count(), 3 + s.len());
    }
}
