//! Inversion stage: every quality-controlled epoch of a line becomes a
//! resistivity section, change sections against the
//! line's baseline (ratio: Daily et al. 1992; difference: LaBrecque & Yang
//! 2001), temperature-corrected (Hayley et al. 2007); zones and alerts follow
//! in [`super::monitor`].
//!
//! - **Section**: the mesh is built from the line's electrodes and extra surface
//!   points; its parameter cells are stored once per geometry
//!   (`line_sections`) and every model refers to them.
//! - **Baseline**: the median of the first `processing.baseline_epochs`
//!   checked epochs of the line's sequence whose dropped share is below 20 %
//!   (common practice, no source), chosen automatically when enough exist, or
//!   chosen by a person (`ohmline baseline`). Epochs before it get a section but
//!   no change.
//! - **Warm starts**: each single inversion starts from the newest stored
//!   model of an earlier epoch (with several workers inverting a line's epochs
//!   at once, the nearest one already inverted); each change inversion from
//!   the last change model of its mode in this process (kept in memory; a
//!   restart starts cold once).
//! - **Jobs**: each epoch is its own job ([`INVERT_EPOCH`]); the line's
//!   monitor ([`MONITOR_LINE`]) then takes the inverted epochs in order.
//! - **Temperature**: models are corrected to the reference temperature with
//!   each cell's temperature on the epoch's day (measured profile of the epoch
//!   if uploaded, else the configured seasonal wave). A change c (%) from the
//!   time-lapse inversion is corrected the same way:
//!   1 + c′ = (1 + c) · f(T_t) / f(T_0), f(T) = 1 + α(T − T_ref), with T_0 the
//!   mean cell temperature over the baseline epochs.
//!
//! Heavy numerical work runs on the blocking thread pool.

use std::collections::HashMap;
use std::sync::Arc;
use std::time::Instant;

use chrono::{DateTime, Datelike, Timelike, Utc};
use ohmline_core::errormodel::ErrorModel;
use ohmline_core::forward::{Forward, ForwardParams};
use ohmline_core::geometry::{LineGeometry, Surface};
use ohmline_core::inversion::{EpochData, InversionParams, InversionReport, StartModel, invert};
use ohmline_core::mesh::{Mesh, MeshParams};
use ohmline_core::sequence::Sequence;
use ohmline_core::temperature::{
    GroundTemperature, SeasonalParams, SeasonalTemperature, TemperatureCorrection,
    TemperatureProfile,
};
use ohmline_core::timelapse::{
    Baseline, Linearisation, TimeLapseError, TimeLapseMode, TimeLapseParams, invert_change,
};
use sha2::{Digest, Sha256};

use super::{Pipeline, PipelineError};
use crate::config::{ChangeJacobian, ChangeMode, ProcessingConfig};
use crate::db::epochs::EpochRow;
use crate::db::models::{NewChange, NewModel, NextJob};
use crate::db::{self, Db, DbError, lines::Line};

/// Job kind: queue the inversion of every checked epoch of a line (what
/// `ohmline reprocess` and jobs queued by earlier versions ask for).
pub const PROCESS_LINE: &str = "process_line";

/// Job kind: the single and time-lapse inversions of one epoch.
pub const INVERT_EPOCH: &str = "invert_epoch";

/// Job kind: zones and alerts of a line's inverted epochs, in start-time order.
pub const MONITOR_LINE: &str = "monitor_line";

/// Key, kind and payload of the inversion job of an epoch. Epochs invert
/// independently, so one line's history spreads over every worker.
pub fn invert_job(line_id: i64, epoch_id: i64) -> NextJob {
    (
        format!("invert:epoch:{epoch_id}"),
        INVERT_EPOCH.to_string(),
        format!("{{\"line_id\":{line_id},\"epoch_id\":{epoch_id}}}"),
    )
}

/// Key, kind and payload of the monitor job of a line (one at a time per
/// line: its alert state moves epoch by epoch).
pub fn monitor_job(line_id: i64) -> NextJob {
    (
        format!("monitor:line:{line_id}"),
        MONITOR_LINE.to_string(),
        format!("{{\"line_id\":{line_id}}}"),
    )
}

/// Queues the inversion of every checked epoch of a line, and its monitor;
/// returns how many epochs were queued.
pub async fn queue_line(db: &Db, line_id: i64) -> Result<usize, DbError> {
    db::models::queue_checked(db, line_id, |id| invert_job(line_id, id), &[monitor_job(line_id)])
        .await
}

/// Dropped share above which an epoch is not used for an automatic baseline.
pub const BASELINE_MAX_DROPPED: f64 = 0.2;

/// The forward model of a line's geometry, with its stored section.
pub struct LineModel {
    /// Forward operator (mesh, wavenumbers, factorisation pattern).
    pub forward: Forward,
    /// `line_sections` row.
    pub section_id: i64,
    /// Cell centroid depths below ground, m.
    pub depths: Vec<f64>,
    /// Electrode geometry.
    pub geometry: LineGeometry,
    /// Median horizontal electrode spacing, m.
    pub spacing_m: f64,
}

/// Hash of a line's geometry and surface points (identifies its section).
pub fn geometry_hash(geometry: &LineGeometry, surface: &[[f64; 2]]) -> String {
    let mut h = Sha256::new();
    for e in geometry.electrodes() {
        h.update(e.label().as_bytes());
        h.update(e.x().to_le_bytes());
        h.update(e.z().to_le_bytes());
    }
    h.update(b"|");
    for [x, z] in surface {
        h.update(x.to_le_bytes());
        h.update(z.to_le_bytes());
    }
    let d = h.finalize();
    d.iter().take(12).map(|b| format!("{b:02x}")).collect()
}

/// Median horizontal spacing of consecutive electrodes, m.
pub fn median_spacing(geometry: &LineGeometry) -> f64 {
    let mut d: Vec<f64> = geometry.electrodes().windows(2).map(|w| w[1].x() - w[0].x()).collect();
    d.sort_by(f64::total_cmp);
    d.get(d.len() / 2).copied().unwrap_or(1.0)
}

impl Pipeline {
    /// The forward model of a line (built once per geometry and cached).
    pub async fn line_model(&self, line_id: i64) -> Result<Arc<LineModel>, PipelineError> {
        let geometry = self.geometry(line_id).await?;
        let points = db::models::surface_points(&self.db, line_id).await?;
        let hash = geometry_hash(&geometry, &points);
        if let Some(m) = self.models.lock().expect("cache lock").get(&(line_id, hash.clone())) {
            return Ok(m.clone());
        }
        let g = geometry.clone();
        let built = tokio::task::spawn_blocking(move || -> Result<Forward, String> {
            let surface = Surface::through_line(&g, &points).map_err(|e| e.to_string())?;
            let mesh =
                Mesh::new(&g, &surface, &MeshParams::default()).map_err(|e| e.to_string())?;
            Forward::new(mesh, &ForwardParams::default()).map_err(|e| e.to_string())
        })
        .await
        .map_err(|e| PipelineError::Data(format!("mesh task: {e}")))?
        .map_err(|e| PipelineError::Data(format!("line {line_id}: cannot build the mesh: {e}")))?;
        let grid = built.mesh().section();
        let polygons: Vec<Vec<[f64; 2]>> =
            grid.cells().iter().map(|c| c.polygon().to_vec()).collect();
        let depths: Vec<f64> = grid.cells().iter().map(|c| c.depth()).collect();
        let section_id =
            db::models::ensure_section(&self.db, line_id, &hash, &polygons, &depths).await?;
        let model = Arc::new(LineModel {
            spacing_m: median_spacing(&geometry),
            forward: built,
            section_id,
            depths,
            geometry,
        });
        self.models.lock().expect("cache lock").insert((line_id, hash), model.clone());
        Ok(model)
    }
}

/// The inversion settings of the configuration.
pub fn inversion_params(c: &ProcessingConfig) -> InversionParams {
    InversionParams {
        modelling_error: c.modelling_error,
        max_iterations: c.max_iterations,
        ..InversionParams::default()
    }
}

/// The data of an epoch as the inversion takes it: R per quadrupole of the
/// sequence, only readings kept by quality control.
pub async fn epoch_data(
    p: &Pipeline,
    epoch_id: i64,
    sequence: &Sequence,
) -> Result<EpochData, PipelineError> {
    let raw = db::epochs::readings(&p.db, epoch_id).await?;
    let quality = db::quality::readings(&p.db, epoch_id).await?;
    let kept: HashMap<i64, bool> = quality.iter().map(|q| (q.row_index, q.kept)).collect();
    let mut r = vec![None; sequence.len()];
    for row in raw {
        if kept.get(&row.row_index).copied().unwrap_or(false)
            && let Some(slot) = r.get_mut(row.quad as usize)
            && slot.is_none()
        {
            *slot = Some(row.resistance_ohm);
        }
    }
    EpochData::new(sequence, r).map_err(|e| PipelineError::Data(format!("epoch {epoch_id}: {e}")))
}

/// The error model of an epoch: QC's fitted reciprocal model, or 2 % with a
/// small absolute floor when none was fitted (common practice, no source).
pub async fn epoch_errors(p: &Pipeline, epoch_id: i64) -> Result<ErrorModel, PipelineError> {
    let q = db::quality::epoch(&p.db, epoch_id).await?;
    let (a, b) = match q {
        Some(q) if q.error_fitted => (q.error_a_ohm.max(0.0), q.error_b.max(0.005)),
        _ => (1e-4, 0.02),
    };
    ErrorModel::new(a, b).map_err(|e| PipelineError::Data(format!("epoch {epoch_id}: {e}")))
}

/// Fractional day of the year of a time (0 = 1 January 00:00 UTC).
pub fn day_of_year(t: DateTime<Utc>) -> f64 {
    f64::from(t.ordinal0()) + f64::from(t.num_seconds_from_midnight()) / 86_400.0
}

/// The ground temperature of an epoch: its measured profile, else the seasonal wave.
pub async fn ground_temperature(
    p: &Pipeline,
    epoch_id: i64,
) -> Result<Option<GroundTemperature>, PipelineError> {
    let t = &p.config.processing.temperature;
    if !t.enabled {
        return Ok(None);
    }
    let measured = db::epochs::temperatures(&p.db, epoch_id).await?;
    if !measured.is_empty() {
        let points = measured.iter().map(|&(d, c)| [d, c]).collect();
        if let Ok(profile) = TemperatureProfile::new(points) {
            return Ok(Some(GroundTemperature::Measured(profile)));
        }
    }
    let seasonal = SeasonalTemperature::new(SeasonalParams {
        mean_c: t.mean_c,
        amplitude_c: t.amplitude_c,
        t_min_day: t.peak_day - 365.0 / 2.0,
        damping_depth_m: t.damping_depth_m,
        period_days: 365.0,
    })
    .map_err(|e| PipelineError::Data(format!("processing.temperature: {e}")))?;
    Ok(Some(GroundTemperature::Seasonal(seasonal)))
}

/// Per-cell factor f(T) = 1 + α(T − T_ref) of an epoch (all 1 without a correction).
pub async fn temperature_factors(
    p: &Pipeline,
    epoch: &EpochRow,
    depths: &[f64],
) -> Result<(Vec<f64>, String), PipelineError> {
    let t = &p.config.processing.temperature;
    let Some(ground) = ground_temperature(p, epoch.id).await? else {
        return Ok((vec![1.0; depths.len()], "{\"applied\":false}".into()));
    };
    let corr = TemperatureCorrection::new(t.alpha_per_c, t.reference_c)
        .map_err(|e| PipelineError::Data(format!("processing.temperature: {e}")))?;
    let day = day_of_year(epoch.started_at);
    let temps = ground.cell_temperatures(depths, day);
    let factors: Vec<f64> = temps.iter().map(|&c| corr.factor(c)).collect();
    if let Some(i) = factors.iter().position(|f| f.is_nan() || *f <= 0.0) {
        return Err(PipelineError::Data(format!(
            "epoch {}: temperature correction factor {} at cell {i} is not positive",
            epoch.id, factors[i]
        )));
    }
    let (lo, hi) =
        temps.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &x| (a.min(x), b.max(x)));
    let source = match ground {
        GroundTemperature::Measured(_) => "measured",
        GroundTemperature::Seasonal(_) => "seasonal",
    };
    let summary = serde_json::json!({
        "applied": true, "source": source, "reference_c": t.reference_c,
        "alpha_per_c": t.alpha_per_c, "min_c": lo, "max_c": hi,
    })
    .to_string();
    Ok((factors, summary))
}

/// What the stage keeps of a baseline between epochs.
pub struct ActiveBaseline {
    /// `line_baselines` row id.
    pub id: i64,
    /// Sequence version of its epochs.
    pub sequence_id: i64,
    /// The inverted baseline.
    pub baseline: Baseline,
    /// Mean temperature factor per cell over the baseline epochs.
    pub factors: Vec<f64>,
}

/// Inverts one epoch (job [`INVERT_EPOCH`]) and queues the line's monitor in
/// the transaction that stores the result. An epoch that is no longer
/// `checked` was inverted (or failed) by an earlier run of this job: only the
/// monitor is queued again.
pub async fn run_epoch(p: &Pipeline, line_id: i64, epoch_id: i64) -> Result<(), PipelineError> {
    let line = db::lines::by_id(&p.db, line_id)
        .await?
        .ok_or_else(|| PipelineError::Data(format!("line {line_id} does not exist")))?;
    let epoch = db::epochs::get(&p.db, epoch_id)
        .await?
        .ok_or_else(|| PipelineError::Data(format!("epoch {epoch_id} does not exist")))?;
    let (key, kind, payload) = monitor_job(line_id);
    let monitor = db::jobs::NewJob {
        key: &key,
        kind: &kind,
        payload: &payload,
        priority: 0,
        run_after: db::now(),
    };
    if epoch.status != "checked" {
        db::jobs::enqueue(&p.db, &monitor).await?;
        return Ok(());
    }
    match invert_epoch(p, &line, &epoch).await {
        Ok(()) => Ok(()),
        Err(PipelineError::Data(msg)) => {
            tracing::warn!(line = %line.name, epoch = epoch.id, error = %msg, "epoch not processed");
            db::models::mark_failed(&p.db, epoch.id, &msg).await?;
            // Later epochs may wait for this one.
            db::jobs::enqueue(&p.db, &monitor).await?;
            Ok(())
        }
        Err(e) => Err(e),
    }
}

/// The line's baseline for an epoch's sequence, choosing one automatically
/// when none exists and enough quiet epochs do.
async fn baseline_for(
    p: &Pipeline,
    line: &Line,
    model: &Arc<LineModel>,
    sequence: &Arc<Sequence>,
    sequence_id: i64,
) -> Result<Option<Arc<ActiveBaseline>>, PipelineError> {
    let row = match db::models::active_baseline(&p.db, line.id).await? {
        Some(b) => b,
        None => {
            let n = p.config.processing.baseline_epochs;
            let quiet = db::models::quiet_epochs(
                &p.db,
                line.id,
                sequence_id,
                BASELINE_MAX_DROPPED,
                n as i64,
            )
            .await?;
            if quiet.len() < n {
                return Ok(None);
            }
            let id = db::models::choose_baseline(
                &p.db,
                line.id,
                sequence_id,
                model.section_id,
                &quiet,
                "auto",
            )
            .await?;
            tracing::info!(line = %line.name, baseline = id, epochs = ?quiet, "baseline chosen");
            db::models::baseline(&p.db, id)
                .await?
                .ok_or_else(|| PipelineError::Data(format!("baseline {id} vanished")))?
        }
    };
    if row.sequence_id != sequence_id {
        return Ok(None);
    }
    // One inversion of a baseline per process: the other job loops wait for it.
    let lock = p.baseline_locks.lock().expect("cache lock").entry(row.id).or_default().clone();
    let _inverting = lock.lock().await;
    if let Some(b) = p.baselines.lock().expect("cache lock").get(&row.id) {
        return Ok(Some(b.clone()));
    }
    let ids = row.epochs()?;
    let mut data = Vec::new();
    let mut factors = vec![0.0; model.depths.len()];
    let mut errors = None;
    for &id in &ids {
        let e = db::epochs::get(&p.db, id)
            .await?
            .ok_or_else(|| PipelineError::Data(format!("baseline epoch {id} is missing")))?;
        data.push(epoch_data(p, id, sequence).await?);
        let (f, _) = temperature_factors(p, &e, &model.depths).await?;
        for (acc, v) in factors.iter_mut().zip(f) {
            *acc += v / ids.len() as f64;
        }
        errors = Some(epoch_errors(p, id).await?);
    }
    let errors = errors.ok_or_else(|| PipelineError::Data("baseline without epochs".into()))?;
    let params = inversion_params(&p.config.processing);
    let started = Instant::now();
    let (fwd_model, seq) = (model.clone(), sequence.clone());
    // With the baseline's Jacobian kept, J H⁻¹ Jᵀ is made here, once.
    let prepare: Vec<TimeLapseMode> = match p.config.processing.change_jacobian {
        ChangeJacobian::Baseline => {
            p.config.processing.change_modes.iter().map(|m| time_lapse_mode(*m)).collect()
        }
        ChangeJacobian::Update => Vec::new(),
    };
    let baseline = tokio::task::spawn_blocking(move || {
        let b = Baseline::new(&fwd_model.forward, &seq, &data, &errors, &params)?;
        for mode in prepare {
            b.prepare(&fwd_model.forward, mode, &params)?;
        }
        Ok::<_, TimeLapseError>(b)
    })
    .await
    .map_err(|e| PipelineError::Data(format!("baseline task: {e}")))?
    .map_err(|e| PipelineError::Data(format!("baseline of line {}: {e}", line.name)))?;
    metrics::histogram!(crate::metrics::INVERSION, "kind" => "baseline")
        .record(started.elapsed().as_secs_f64());
    let r = baseline.report();
    db::models::store_baseline_model(&p.db, row.id, r.model(), r.chi2(), r.rms_pct(), r.lambda())
        .await?;
    tracing::info!(
        line = %line.name,
        baseline = row.id,
        chi2 = r.chi2(),
        rms_pct = r.rms_pct(),
        seconds = started.elapsed().as_secs_f64(),
        "baseline inverted"
    );
    let active = Arc::new(ActiveBaseline { id: row.id, sequence_id, baseline, factors });
    p.baselines.lock().expect("cache lock").insert(row.id, active.clone());
    Ok(Some(active))
}

fn time_lapse_mode(mode: ChangeMode) -> TimeLapseMode {
    match mode {
        ChangeMode::Ratio => TimeLapseMode::Ratio,
        ChangeMode::Difference => TimeLapseMode::Difference,
    }
}

fn strongest(change: &[f64], mask: &[bool]) -> (f64, f64) {
    change
        .iter()
        .zip(mask)
        .filter(|(_, m)| **m)
        .fold((0.0f64, 0.0f64), |(lo, hi), (c, _)| (lo.min(*c), hi.max(*c)))
}

fn report_warnings(r: &InversionReport) -> String {
    serde_json::to_string(r.warnings()).expect("strings serialise")
}

/// One change inversion: mode, corrected change %, mask, report, seconds.
type ChangeResult = (ChangeMode, Vec<f64>, Vec<bool>, InversionReport, f64);

/// Inverts one epoch and its changes against the baseline, and stores them
/// with status `inverted` (`processed` when there is no change to monitor).
async fn invert_epoch(p: &Pipeline, line: &Line, epoch: &EpochRow) -> Result<(), PipelineError> {
    let model = p.line_model(line.id).await?;
    let sequence = p.sequence(epoch.sequence_id, model.geometry.len()).await?;
    let data = epoch_data(p, epoch.id, &sequence).await?;
    let errors = epoch_errors(p, epoch.id).await?;
    let (factors, temperature) = temperature_factors(p, epoch, &model.depths).await?;
    let params = inversion_params(&p.config.processing);

    // Single-epoch inversion, warm-started from the previous epoch's model.
    let previous =
        db::models::previous_model(&p.db, line.id, model.section_id, epoch.started_at).await?;
    let started = Instant::now();
    let single = {
        let (m, seq, d, prm, prev) =
            (model.clone(), sequence.clone(), data.clone(), params.clone(), previous.clone());
        tokio::task::spawn_blocking(move || {
            let start = match &prev {
                Some(v) => StartModel::Model(v),
                None => StartModel::MedianApparent,
            };
            invert(&m.forward, &seq, &d, &errors, start, &prm)
        })
        .await
        .map_err(|e| PipelineError::Data(format!("inversion task: {e}")))?
        .map_err(|e| PipelineError::Data(format!("epoch {}: inversion: {e}", epoch.id)))?
    };
    let single_s = started.elapsed().as_secs_f64();
    metrics::histogram!(crate::metrics::INVERSION, "kind" => "single").record(single_s);
    let corrected: Vec<f64> = single.model().iter().zip(&factors).map(|(r, f)| r * f).collect();

    // Time-lapse inversions against the baseline.
    let baseline = baseline_for(p, line, &model, &sequence, epoch.sequence_id).await?;
    let mut changes: Vec<ChangeResult> = Vec::new();
    if let Some(b) = &baseline {
        for &mode in &p.config.processing.change_modes {
            let key = (line.id, mode.as_str());
            let warm = p.warm.lock().expect("cache lock").get(&key).cloned();
            let tl = TimeLapseParams {
                mode: time_lapse_mode(mode),
                linearisation: match p.config.processing.change_jacobian {
                    ChangeJacobian::Baseline => Linearisation::Baseline,
                    ChangeJacobian::Update => Linearisation::Update,
                },
                inversion: params.clone(),
            };
            let started = Instant::now();
            let (m, seq, d, bl) = (model.clone(), sequence.clone(), data.clone(), b.clone());
            let report = tokio::task::spawn_blocking(move || {
                let start = match &warm {
                    Some(v) if v.len() == m.depths.len() => StartModel::Model(v),
                    _ => StartModel::MedianApparent,
                };
                invert_change(&m.forward, &seq, &bl.baseline, &d, &errors, start, &tl)
            })
            .await
            .map_err(|e| PipelineError::Data(format!("time-lapse task: {e}")))?
            .map_err(|e| {
                PipelineError::Data(format!("epoch {}: {} inversion: {e}", epoch.id, mode.as_str()))
            })?;
            let secs = started.elapsed().as_secs_f64();
            metrics::histogram!(crate::metrics::INVERSION, "kind" => mode.as_str()).record(secs);
            p.warm.lock().expect("cache lock").insert(key, report.inversion().model().to_vec());
            let change: Vec<f64> = report
                .percent_change()
                .iter()
                .zip(factors.iter().zip(&b.factors))
                .map(|(c, (ft, f0))| ((1.0 + c / 100.0) * ft / f0 - 1.0) * 100.0)
                .collect();
            changes.push((mode, change, report.mask().to_vec(), report.inversion().clone(), secs));
        }
    }

    let warnings = report_warnings(&single);
    let change_warnings: Vec<String> = changes.iter().map(|c| report_warnings(&c.3)).collect();
    let new_changes: Vec<NewChange<'_>> = changes
        .iter()
        .zip(&change_warnings)
        .map(|((mode, change, mask, r, secs), w)| {
            let (drop, rise) = strongest(change, mask);
            NewChange {
                epoch_id: epoch.id,
                mode: mode.as_str(),
                line_id: line.id,
                baseline_id: baseline.as_ref().map(|b| b.id).unwrap_or_default(),
                section_id: model.section_id,
                change_pct: change,
                mask,
                chi2: r.chi2(),
                rms_pct: r.rms_pct(),
                iterations: r.iterations() as i64,
                converged: r.converged(),
                strongest_drop_pct: drop,
                strongest_rise_pct: rise,
                warnings: w,
                seconds: *secs,
            }
        })
        .collect();
    let monitored = !changes.is_empty();
    db::models::store_epoch(
        &p.db,
        &NewModel {
            epoch_id: epoch.id,
            line_id: line.id,
            section_id: model.section_id,
            model: single.model(),
            corrected: &corrected,
            coverage: single.coverage(),
            mask: single.mask(),
            chi2: single.chi2(),
            rms_pct: single.rms_pct(),
            iterations: single.iterations() as i64,
            lambda: single.lambda(),
            converged: single.converged(),
            n_used: single.used().len() as i64,
            temperature: &temperature,
            warnings: &warnings,
            seconds: single_s,
        },
        &new_changes,
        if monitored { "inverted" } else { "processed" },
        &[monitor_job(line.id)],
    )
    .await?;
    tracing::info!(
        line = %line.name,
        epoch = epoch.id,
        chi2 = single.chi2(),
        rms_pct = single.rms_pct(),
        seconds = single_s,
        changes = changes.len(),
        "epoch inverted"
    );
    Ok(())
}
