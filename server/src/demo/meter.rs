//! The simulated meter: computes each epoch of the invented season with the
//! forward model and uploads it like field hardware — only through
//! `POST /api/v1/lines/{line}/epochs` (CSV) with the line's upload token.
//!
//! Each reading is the forward model's transfer resistance R (Ω) with
//! * Gaussian noise of 0.8 % plus 0.2 mΩ ([`ohmline_core::noise`]), drawn
//!   independently for a quadrupole and its reciprocal, so pairs disagree;
//! * in 3 % of readings an extra reciprocal error of 3–8 % (a bad stack);
//! * in 0.3 % of readings a spike: ×3…10, sometimes with the sign flipped;
//! * on the crest line, electrode 13 (chainage 12 m) failing between 30 % and
//!   45 % of the season: contact resistance 40–90 kΩ, the current through it
//!   falling to 0.5–2 mA and its readings garbage (±50 %, stacking error
//!   5–30 %); as a potential electrode its readings carry 15 % noise.
//!
//! With a site set, the meter station also reports the site's river gauge
//! (stage above the waterside toe, m, at each epoch's nominal time) and rain
//! gauge (mm fallen since the previous epoch) of the scenario through
//! `POST /api/v1/sites/{site}/series/{kind}` with the first line's token.
//!
//! The forward computation runs on the blocking pool; one [`Forward`] per line
//! is built once and reused for every epoch.

use std::sync::Arc;
use std::time::{Duration, Instant};

use chrono::{DateTime, Utc};
use ohmline_core::forward::{Forward, ForwardError, ForwardParams, Resistivity};
use ohmline_core::geometry::{LineGeometry, Surface};
use ohmline_core::mesh::{Mesh, MeshParams};
use ohmline_core::noise::{NoiseParams, add_noise};
use ohmline_core::scenario::{DemoLine, Scenario};
use ohmline_core::sequence::Sequence;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use thiserror::Error;
use tokio::sync::{mpsc, watch};

/// Why the meter stopped.
#[derive(Debug, Error)]
pub enum MeterError {
    /// The mesh or forward model of a line could not be built or run.
    #[error("line {line}: {message}")]
    Model {
        /// Line slug.
        line: String,
        /// What failed.
        message: String,
    },
    /// The server refused an upload or could not be reached.
    #[error("line {line}, epoch {epoch}: upload failed: {message}")]
    Upload {
        /// Line slug.
        line: String,
        /// Epoch index (0-based).
        epoch: usize,
        /// The server's answer or the connection error.
        message: String,
    },
    /// The server refused a river-stage or rainfall sample.
    #[error("site series {kind}, epoch {epoch}: upload failed: {message}")]
    Series {
        /// Series kind.
        kind: String,
        /// Epoch index (0-based).
        epoch: usize,
        /// The server's answer or the connection error.
        message: String,
    },
}

/// One line as the meter knows it.
#[derive(Debug, Clone)]
pub struct MeterLine {
    /// Which demo line.
    pub kind: DemoLine,
    /// Slug used in the URL.
    pub name: String,
    /// Upload token of the line.
    pub token: String,
    /// Electrodes.
    pub geometry: LineGeometry,
    /// Ground points beyond the electrodes (levee edges and toes).
    pub surface_points: Vec<[f64; 2]>,
    /// The sequence the meter runs.
    pub sequence: Arc<Sequence>,
    /// Start of this line's runs after the epoch's nominal time.
    pub offset: chrono::Duration,
}

/// How the meter runs.
#[derive(Debug, Clone)]
pub struct MeterSettings {
    /// Base URL of the server, e.g. `http://127.0.0.1:8080`.
    pub base_url: String,
    /// Real time between epochs; `None` sends each as soon as it is computed.
    pub pace: Option<Duration>,
    /// Nominal start of epoch 0.
    pub first_start: DateTime<Utc>,
    /// Simulated time between epochs.
    pub interval: chrono::Duration,
    /// Seed of the noise, spikes and faults.
    pub seed: u64,
    /// Site (id or name) whose river stage and rainfall the meter reports;
    /// `None`: epochs only.
    pub site: Option<String>,
}

/// What the meter did, reported as it goes.
#[derive(Debug, Clone)]
pub enum MeterEvent {
    /// An epoch was accepted by the server.
    Uploaded {
        /// Line slug.
        line: String,
        /// Epoch index (0-based).
        epoch: usize,
        /// The server's epoch id.
        epoch_id: i64,
        /// Start time sent.
        started_at: DateTime<Utc>,
        /// Seconds spent in the forward model.
        forward_s: f64,
    },
}

/// The meter of the demo.
pub struct Meter {
    scenario: Arc<Scenario>,
    lines: Vec<MeterLine>,
    settings: MeterSettings,
    client: reqwest::Client,
}

/// One synthetic reading.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Reading {
    /// mA.
    pub current_ma: f64,
    /// mV.
    pub voltage_mv: f64,
    /// %.
    pub stack_error_pct: f64,
    /// Ω.
    pub contact_a_ohm: f64,
    /// Ω.
    pub contact_b_ohm: f64,
}

/// Label of the crest electrode that fails for a while.
pub const FAILING_ELECTRODE: usize = 12;

/// Whether the failing electrode is out at epoch `k` of `n`.
pub fn electrode_failing(line: DemoLine, k: usize, n: usize) -> bool {
    let tau = k as f64 / (n.max(2) - 1) as f64;
    line == DemoLine::Crest && (0.3..=0.45).contains(&tau)
}

/// Turns true transfer resistances into meter readings (see the module docs).
pub fn synthesize(
    line: DemoLine,
    sequence: &Sequence,
    resistances: &[f64],
    k: usize,
    n_epochs: usize,
    seed: u64,
) -> Vec<Reading> {
    let line_seed = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15)
        ^ ((k as u64) << 8)
        ^ matches!(line, DemoLine::Cross) as u64;
    let noisy =
        add_noise(resistances, &NoiseParams { relative: 0.008, absolute: 2e-4, seed: line_seed })
            .expect("valid noise levels");
    let mut rng = StdRng::seed_from_u64(line_seed ^ 0xD1B5_4A32_D192_ED03);
    let failing = electrode_failing(line, k, n_epochs);
    sequence
        .quadrupoles()
        .iter()
        .zip(noisy)
        .map(|(q, mut r)| {
            let mut current = rng.random_range(80.0..120.0);
            let mut stack = rng.random_range(0.05..0.5);
            let contact = |rng: &mut StdRng, e: Option<usize>| match e {
                Some(e) if failing && e == FAILING_ELECTRODE => {
                    rng.random_range(40_000.0..90_000.0)
                }
                Some(_) => rng.random_range(300.0..1500.0),
                None => 0.0,
            };
            let (ca, cb) = (contact(&mut rng, Some(q.a)), contact(&mut rng, q.b));
            if rng.random_bool(0.03) {
                r *= 1.0
                    + rng.random_range(0.03..0.08) * if rng.random_bool(0.5) { 1.0 } else { -1.0 };
            }
            if rng.random_bool(0.003) {
                r *= rng.random_range(3.0..10.0) * if rng.random_bool(0.3) { -1.0 } else { 1.0 };
            }
            if failing {
                if q.a == FAILING_ELECTRODE || q.b == Some(FAILING_ELECTRODE) {
                    current = rng.random_range(0.5..2.0);
                    r *= 1.0 + rng.random_range(-0.5..0.5);
                    stack = rng.random_range(5.0..30.0);
                } else if q.m == FAILING_ELECTRODE || q.n == Some(FAILING_ELECTRODE) {
                    r *= 1.0 + 0.15 * rng.random_range(-1.0..1.0);
                    stack = rng.random_range(1.0..5.0);
                }
            }
            Reading {
                current_ma: current,
                voltage_mv: r * current,
                stack_error_pct: stack,
                contact_a_ohm: ca,
                contact_b_ohm: cb,
            }
        })
        .collect()
}

/// The upload body of one epoch: CSV with metadata lines.
pub fn epoch_csv(
    geometry: &LineGeometry,
    sequence: &Sequence,
    readings: &[Reading],
    started_at: DateTime<Utc>,
    meter_id: &str,
    temperatures: &[(f64, f64)],
) -> String {
    let label = |e: Option<usize>| e.map(|i| geometry.electrodes()[i].label()).unwrap_or("");
    // About 0.4 s per reading with stacking (common practice, no source).
    let finished = started_at + chrono::Duration::milliseconds(400 * readings.len() as i64);
    let temps: Vec<String> = temperatures.iter().map(|(d, t)| format!("{d}:{t:.2}")).collect();
    let mut s = format!(
        "# started_at: {}\n# finished_at: {}\n# meter_id: {meter_id}\n# temperatures: {}\n\
         a,b,m,n,current_ma,voltage_mv,stack_error_pct,contact_a_ohm,contact_b_ohm\n",
        started_at.to_rfc3339(),
        finished.to_rfc3339(),
        temps.join(", ")
    );
    for (q, r) in sequence.quadrupoles().iter().zip(readings) {
        s.push_str(&format!(
            "{},{},{},{},{:.3},{:.6e},{:.2},{:.0},{:.0}\n",
            label(Some(q.a)),
            label(q.b),
            label(Some(q.m)),
            label(q.n),
            r.current_ma,
            r.voltage_mv,
            r.stack_error_pct,
            r.contact_a_ohm,
            r.contact_b_ohm
        ));
    }
    s
}

/// Depths (m) of the meter's thermistor string.
const THERMISTOR_DEPTHS: [f64; 4] = [0.1, 0.5, 1.0, 2.0];

impl Meter {
    /// A meter for the lines of a season.
    pub fn new(scenario: Arc<Scenario>, lines: Vec<MeterLine>, settings: MeterSettings) -> Self {
        // A fresh connection per request, as a field meter makes.
        let client = reqwest::Client::builder()
            .pool_max_idle_per_host(0)
            .timeout(Duration::from_secs(120))
            .build()
            .expect("HTTP client");
        Self { scenario, lines, settings, client }
    }

    /// Builds each line's forward model (on the blocking pool).
    async fn forwards(&self) -> Result<Vec<Arc<Forward>>, MeterError> {
        let mut out = Vec::new();
        for l in &self.lines {
            let (geometry, extra, name) =
                (l.geometry.clone(), l.surface_points.clone(), l.name.clone());
            let fwd = tokio::task::spawn_blocking(move || {
                let surface =
                    Surface::through_line(&geometry, &extra).map_err(|e| e.to_string())?;
                let mesh = Mesh::new(&geometry, &surface, &MeshParams::default())
                    .map_err(|e| e.to_string())?;
                Forward::new(mesh, &ForwardParams::default()).map_err(|e| e.to_string())
            })
            .await
            .map_err(|e| MeterError::Model { line: name.clone(), message: e.to_string() })?
            .map_err(|message| MeterError::Model { line: name, message })?;
            out.push(Arc::new(fwd));
        }
        Ok(out)
    }

    /// Runs the season: every epoch of every line, paced by the settings,
    /// until done or `stop` turns true. Reports each upload on `events`.
    pub async fn run(
        self,
        events: mpsc::UnboundedSender<MeterEvent>,
        mut stop: watch::Receiver<bool>,
    ) -> Result<(), MeterError> {
        let forwards = self.forwards().await?;
        let n = self.scenario.params().n_epochs;
        for k in 0..n {
            let started = Instant::now();
            // The gauges' readings at the epoch's nominal time go first, so
            // they are stored by the time the epoch is.
            self.gauges(k).await?;
            for (l, fwd) in self.lines.iter().zip(&forwards) {
                if *stop.borrow() {
                    return Ok(());
                }
                let ev = self.one_epoch(l, fwd.clone(), k).await?;
                let _ = events.send(ev);
            }
            if k + 1 < n
                && let Some(pace) = self.settings.pace
            {
                let wait = pace.saturating_sub(started.elapsed());
                tokio::select! {
                    _ = tokio::time::sleep(wait) => {}
                    _ = stop.changed() => return Ok(()),
                }
            }
        }
        Ok(())
    }

    async fn one_epoch(
        &self,
        l: &MeterLine,
        fwd: Arc<Forward>,
        k: usize,
    ) -> Result<MeterEvent, MeterError> {
        let started_at = self.settings.first_start + self.settings.interval * k as i32 + l.offset;
        let (scenario, seq, kind) = (self.scenario.clone(), l.sequence.clone(), l.kind);
        let seed = self.settings.seed;
        let t0 = Instant::now();
        let resistances = tokio::task::spawn_blocking(move || {
            let rho = scenario.on_triangles(kind, fwd.mesh(), k);
            fwd.simulate(Resistivity::Triangles(&rho), &seq).map(|s| s.resistances().to_vec())
        })
        .await
        .map_err(|e| MeterError::Model { line: l.name.clone(), message: e.to_string() })?
        .map_err(|e: ForwardError| MeterError::Model {
            line: l.name.clone(),
            message: e.to_string(),
        })?;
        let forward_s = t0.elapsed().as_secs_f64();
        let n = self.scenario.params().n_epochs;
        let readings = synthesize(kind, &l.sequence, &resistances, k, n, seed);
        let temps: Vec<(f64, f64)> =
            THERMISTOR_DEPTHS.iter().map(|&d| (d, self.scenario.temperature_c(d, k))).collect();
        let body = epoch_csv(
            &l.geometry,
            &l.sequence,
            &readings,
            started_at,
            &format!("demo-meter-{}", l.name),
            &temps,
        );
        let epoch_id = self.upload(l, k, body).await?;
        Ok(MeterEvent::Uploaded { line: l.name.clone(), epoch: k, epoch_id, started_at, forward_s })
    }

    /// Reports the river stage and the rain of epoch `k` at its nominal time.
    async fn gauges(&self, k: usize) -> Result<(), MeterError> {
        let (Some(site), Some(line)) = (&self.settings.site, self.lines.first()) else {
            return Ok(());
        };
        let at = (self.settings.first_start + self.settings.interval * k as i32).to_rfc3339();
        let stage = (self.scenario.stage_m(k) * 1000.0).round() / 1000.0;
        let rain = (self.scenario.rain_mm(k) * 10.0).round() / 10.0;
        for (kind, value) in [("river_stage", stage), ("rainfall", rain)] {
            let fail =
                |message: String| MeterError::Series { kind: kind.into(), epoch: k, message };
            let url = format!("{}/api/v1/sites/{site}/series/{kind}", self.settings.base_url);
            let body = serde_json::json!({ "samples": [{ "time": at, "value": value }] });
            let r = self
                .client
                .post(&url)
                .bearer_auth(&line.token)
                .json(&body)
                .send()
                .await
                .map_err(|e| fail(e.to_string()))?;
            let status = r.status();
            if !status.is_success() {
                let text = r.text().await.unwrap_or_default();
                return Err(fail(format!("HTTP {status}: {text}")));
            }
        }
        Ok(())
    }

    /// Posts one epoch, retrying a connection failure a few times and a busy
    /// answer (429, 503) after its Retry-After, like a field meter; returns the
    /// server's epoch id.
    async fn upload(&self, l: &MeterLine, k: usize, body: String) -> Result<i64, MeterError> {
        let url = format!("{}/api/v1/lines/{}/epochs", self.settings.base_url, l.name);
        let fail = |message: String| MeterError::Upload { line: l.name.clone(), epoch: k, message };
        let mut attempt = 0;
        loop {
            attempt += 1;
            let sent = self
                .client
                .post(&url)
                .bearer_auth(&l.token)
                .header("content-type", "text/csv")
                .body(body.clone())
                .send()
                .await;
            match sent {
                Ok(r) => {
                    let status = r.status();
                    let retry_after = r
                        .headers()
                        .get(reqwest::header::RETRY_AFTER)
                        .and_then(|v| v.to_str().ok())
                        .and_then(|v| v.trim().parse::<u64>().ok());
                    let json: serde_json::Value = r.json().await.unwrap_or_default();
                    // Busy (rate limit, backlog) or briefly unavailable: wait as told.
                    let busy = status == reqwest::StatusCode::TOO_MANY_REQUESTS
                        || status == reqwest::StatusCode::SERVICE_UNAVAILABLE;
                    if busy && attempt < 30 {
                        let wait = retry_after.unwrap_or(1).clamp(1, 60);
                        tracing::info!(line = %l.name, epoch = k, wait_s = wait, "server busy; retrying");
                        tokio::time::sleep(Duration::from_secs(wait)).await;
                        continue;
                    }
                    if !status.is_success() {
                        return Err(fail(format!("HTTP {status}: {json}")));
                    }
                    return json["epoch_id"]
                        .as_i64()
                        .ok_or_else(|| fail(format!("no epoch id in the answer {json}")));
                }
                Err(e) if attempt < 5 => {
                    tracing::warn!(line = %l.name, epoch = k, error = %e, "upload failed; retrying");
                    tokio::time::sleep(Duration::from_millis(500 * attempt)).await;
                }
                Err(e) => return Err(fail(e.to_string())),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ohmline_core::scenario::crest_line;

    #[test]
    fn readings_carry_noise_spikes_and_the_failing_electrode() {
        let line = crest_line();
        let seq = crate::demo::sequence(DemoLine::Crest);
        let r = vec![0.5; seq.len()];
        // Epoch 10 of 30 is at τ = 0.34: the electrode is out.
        assert!(electrode_failing(DemoLine::Crest, 10, 30));
        assert!(!electrode_failing(DemoLine::Crest, 5, 30));
        assert!(!electrode_failing(DemoLine::Cross, 10, 30));
        let out = synthesize(DemoLine::Crest, &seq, &r, 10, 30, 1);
        assert_eq!(out, synthesize(DemoLine::Crest, &seq, &r, 10, 30, 1), "seeded");
        let mut healthy = Vec::new();
        for (q, x) in seq.quadrupoles().iter().zip(&out) {
            let bad_current = q.a == FAILING_ELECTRODE || q.b == Some(FAILING_ELECTRODE);
            if bad_current {
                assert!(x.current_ma < 2.0 && x.stack_error_pct >= 5.0);
                assert!(x.contact_a_ohm >= 40_000.0 || x.contact_b_ohm >= 40_000.0);
            } else if !q.uses(FAILING_ELECTRODE) {
                healthy.push(x.voltage_mv / x.current_ma);
            }
        }
        // Healthy readings: median near 0.5 Ω (noise 0.8 %, a few outliers).
        healthy.sort_by(f64::total_cmp);
        let median = healthy[healthy.len() / 2];
        assert!((median - 0.5).abs() < 0.01, "{median}");
        assert!(healthy.iter().filter(|v| (*v - 0.5).abs() > 0.5).count() >= 1, "a spike");
        let csv = epoch_csv(&line, &seq, &out, Utc::now(), "m", &[(0.5, 9.0)]);
        assert_eq!(csv.lines().count(), 5 + seq.len());
        assert!(csv.contains("# temperatures: 0.5:9.00"));
    }
}
