//! Monitoring stage: the primary change section of each processed epoch goes
//! through the line's [`LineMonitor`] (zones by connected cells, tracking by
//! overlap, lateral contrast against the line-wide change per depth band,
//! trigger levels with persistence and hysteresis, data-quality rules). Zones,
//! alerts, their transitions and the email notices are stored in one
//! transaction ([`db::alerts::store_update`]).
//!
//! With a river-stage rule in the line's rules, the site's `river_stage`
//! series gives the stage at the epoch's time: the latest reading at or before
//! it, at most [`STAGE_MAX_AGE_S`] old ([`stage_at`]). The stage is taken as an
//! elevation on the line's datum (the electrodes' z): the site's gauge must
//! report on that datum (or be converted before upload). Without a fresh
//! reading the rule does not apply and the epoch stores a warning.
//!
//! People acknowledge and resolve alerts through [`acknowledge`] and
//! [`resolve`], which go through the same monitor state, so the engine and the
//! stored alerts never disagree. A concurrent update (an engineer acknowledging
//! while an epoch is processed) is detected by the state's version and retried.

use std::collections::HashMap;

use chrono::{DateTime, TimeZone, Utc};
use ohmline_core::alerts::{
    Alert, AlertState, Detail, EpochInput, Level, LineMonitor, QualityEvent, RuleSet, Subject,
    Transition, WettingNotice, stage_at,
};
use ohmline_core::figures::{
    Axis, Canvas, Figure, SectionFigure, SectionParams, SectionValues, Threshold, TimeChart,
    TimeChartParams, TimeSeries, Zone as FigureZone,
};
use ohmline_core::section::SectionGrid;
use ohmline_core::zones::{
    ChangeField, CoverageLevels, Direction, EnvelopeParams, NoiseModel, NoiseParams, PastEpoch,
    SeasonalEnvelope, SensitivityMask, TrackerParams, ZoneTracker, lateral_contrast, outline,
    season_day, season_distance,
};

use super::monitor_state::{DetailDto, EngineDto, MonitorState, TrackerDto};
use super::process::LineModel;
use super::{Pipeline, PipelineError};
use crate::db::alerts::{
    AlertUpsert, EpochMonitoring, MonitorUpdate, NewTransition, ZoneRow, store_update,
};
use crate::db::epochs::EpochRow;
use crate::db::rules::RulesDto;
use crate::db::{self, DbError, lines::Line};
use crate::notify::{
    AlertEvent, AlertNotice, DetailFacts, NewNotice, alert_link, level_label, level_rank,
};

/// Attempts at storing a monitor update before giving up on version conflicts.
const ATTEMPTS: usize = 5;

/// Oldest river-stage reading the river-stage rule takes for an epoch, s
/// (common practice, no source: a flood moves within hours).
pub const STAGE_MAX_AGE_S: i64 = 12 * 3600;

/// The site's river stage at `time` (module docs), m; `None` without a
/// `river_stage` series or a fresh reading.
async fn river_stage(p: &Pipeline, site_id: i64, time: i64) -> Result<Option<f64>, DbError> {
    let Some(series) = db::series::by_kind(&p.db, site_id, "river_stage").await? else {
        return Ok(None);
    };
    let samples =
        db::series::samples(&p.db, series.id, Some(ts(time - STAGE_MAX_AGE_S)), Some(ts(time)))
            .await?;
    let samples: Vec<(i64, f64)> = samples.into_iter().map(|(t, v)| (t.timestamp(), v)).collect();
    Ok(stage_at(&samples, time, STAGE_MAX_AGE_S))
}

/// The rules in force for a line: its stored rules, else the defaults of
/// [`RuleSet`]. Read afresh for every epoch, so a change applies from the
/// next processed epoch on.
pub async fn rules_for(db: &db::Db, line: &Line) -> Result<RuleSet, DbError> {
    Ok(db::rules::get(db, line.id).await?.map(|s| s.rules).unwrap_or_default())
}

/// The monitor's view of a change section: change clamped above −100 %,
/// the in-mask flags (change mask and coverage) and the sensitivity mask.
fn field_inputs(
    change: &[f64],
    change_mask: &[bool],
    coverage: &[f64],
) -> Result<(Vec<f64>, Vec<bool>, SensitivityMask), String> {
    let coverage_mask = SensitivityMask::from_coverage(coverage, CoverageLevels::default())
        .map_err(|e| e.to_string())?;
    let in_mask: Vec<bool> =
        coverage_mask.in_mask().iter().zip(change_mask).map(|(a, b)| *a && *b).collect();
    let clamped: Vec<f64> = change.iter().map(|c| c.max(-99.0)).collect();
    let mask = restrict(coverage_mask, &in_mask);
    Ok((clamped, in_mask, mask))
}

/// The change section of a stored epoch in `mode` against `baseline_id` on
/// the current section, with its coverage; `None` when it is missing or on
/// another section.
async fn stored_change(
    p: &Pipeline,
    epoch_id: i64,
    baseline_id: i64,
    mode: &str,
    cells: usize,
) -> Result<Option<(Vec<f64>, Vec<bool>, Vec<f64>)>, PipelineError> {
    let Some(c) = db::models::changes(&p.db, epoch_id)
        .await?
        .into_iter()
        .find(|c| c.mode == mode && c.baseline_id == baseline_id)
    else {
        return Ok(None);
    };
    let Some(m) = db::models::model(&p.db, epoch_id).await? else { return Ok(None) };
    let change = db::models::blob_to_f64s(&c.change_pct)?;
    let mask = db::models::blob_to_mask(&c.mask);
    let coverage = db::models::blob_to_f64s(&m.coverage)?;
    if change.len() != cells || mask.len() != cells || coverage.len() != cells {
        return Ok(None);
    }
    Ok(Some((change, mask, coverage)))
}

/// The noise calibration of the rules' noise-calibrated level: σ per cell
/// (1.4826·MAD, [`NoiseModel::calibrate`]) of the judged change over the
/// baseline epochs that have a change section against the baseline (the
/// baseline period is taken as quiet). Cached per line and baseline with the
/// epochs and settings it rests on. `None` without a noise rule or with fewer
/// than [`NoiseParams::min_epochs`] such epochs (fixed thresholds then apply,
/// with a warning stored for the epoch).
async fn noise_model(
    p: &Pipeline,
    line: &Line,
    rules: &RuleSet,
    model: &LineModel,
    baseline_id: i64,
    mode: &str,
) -> Result<Option<NoiseModel>, PipelineError> {
    if rules.noise.is_none() {
        return Ok(None);
    }
    let params = NoiseParams::default();
    let Some(baseline) = db::models::baseline(&p.db, baseline_id).await? else {
        return Ok(None);
    };
    let members = baseline.epochs()?;
    let changed: Vec<i64> = db::models::changed_epochs(&p.db, line.id, baseline_id, mode)
        .await?
        .into_iter()
        .map(|(id, _)| id)
        .filter(|id| members.contains(id))
        .collect();
    if changed.len() < params.min_epochs {
        return Ok(None);
    }
    let lateral = RulesDto::from(rules).lateral;
    let basis =
        serde_json::json!({ "mode": mode, "lateral": lateral, "spacing_m": model.spacing_m })
            .to_string();
    let grid = model.forward.mesh().section();
    let n = grid.len();
    let bad =
        |e: String| PipelineError::Data(format!("noise calibration of line {}: {e}", line.name));
    if let Some(c) = db::rules::noise(&p.db, line.id, baseline_id).await?
        && c.basis == basis
        && c.epoch_ids == changed
        && c.sigma.len() == n
    {
        return NoiseModel::from_sigma(c.sigma).map(Some).map_err(|e| bad(e.to_string()));
    }
    let mut quiet = Vec::new();
    let mut used = Vec::new();
    for &id in &changed {
        let Some((change, change_mask, coverage)) =
            stored_change(p, id, baseline_id, mode, n).await?
        else {
            continue;
        };
        let (clamped, in_mask, mask) =
            field_inputs(&change, &change_mask, &coverage).map_err(bad)?;
        let field = ChangeField::new(grid, clamped, mask).map_err(|e| bad(e.to_string()))?;
        let judged: Vec<f64> = match &rules.lateral {
            Some(l) => lateral_contrast(&field, &l.params(model.spacing_m))
                .map_err(|e| bad(e.to_string()))?
                .relative()
                .to_vec(),
            None => field.change().to_vec(),
        };
        quiet.push(
            judged
                .iter()
                .zip(&in_mask)
                .map(|(v, m)| if *m { *v } else { f64::NAN })
                .collect::<Vec<_>>(),
        );
        used.push(id);
    }
    if quiet.len() < params.min_epochs {
        return Ok(None);
    }
    let noise = NoiseModel::calibrate(&quiet, &params).map_err(|e| bad(e.to_string()))?;
    db::rules::set_noise(
        &p.db,
        line.id,
        baseline_id,
        &db::rules::StoredNoise { basis, epoch_ids: changed, sigma: noise.sigma().to_vec() },
    )
    .await?;
    tracing::info!(
        line = %line.name, baseline = baseline_id, epochs = ?used,
        cells = noise.sigma().iter().filter(|s| s.is_some()).count(),
        "noise calibrated"
    );
    Ok(Some(noise))
}

/// The seasonal envelope of an epoch at `time` for the rules' seasonal rule:
/// the range of change per cell over this line's earlier change sections
/// (same baseline and mode) at the same season in earlier years
/// ([`SeasonalEnvelope::from_history`], default window). `None` without a
/// seasonal rule or without enough such history.
async fn seasonal_envelope(
    p: &Pipeline,
    rules: &RuleSet,
    cells: usize,
    baseline_id: i64,
    mode: &str,
    line_id: i64,
    time: i64,
) -> Result<Option<SeasonalEnvelope>, PipelineError> {
    if rules.seasonal.is_none() {
        return Ok(None);
    }
    let params = EnvelopeParams::default();
    let day = season_day(time);
    let past: Vec<i64> = db::models::changed_epochs(&p.db, line_id, baseline_id, mode)
        .await?
        .into_iter()
        .filter(|(_, t)| {
            let t = t.timestamp();
            (time - t) as f64 / 86_400.0 >= params.min_age_days
                && season_distance(season_day(t), day) <= params.half_window_days
        })
        .map(|(id, _)| id)
        .collect();
    if past.len() < params.min_samples {
        return Ok(None);
    }
    let mut history = Vec::new();
    for id in past {
        let Some((change, mask, _)) = stored_change(p, id, baseline_id, mode, cells).await? else {
            continue;
        };
        let Some(e) = db::epochs::get(&p.db, id).await? else { continue };
        let values: Vec<f64> =
            change.iter().zip(&mask).map(|(c, m)| if *m { *c } else { f64::NAN }).collect();
        history.push((e.started_at.timestamp(), values));
    }
    let past: Vec<PastEpoch<'_>> =
        history.iter().map(|(t, v)| PastEpoch { time: *t, change_pct: v }).collect();
    let env = SeasonalEnvelope::from_history(time, cells, &past, &params)
        .map_err(|e| PipelineError::Data(format!("seasonal envelope of line {line_id}: {e}")))?;
    Ok(env.samples().iter().any(|&n| n >= params.min_samples).then_some(env))
}

fn ts(t: i64) -> DateTime<Utc> {
    Utc.timestamp_opt(t, 0).single().unwrap_or(DateTime::<Utc>::UNIX_EPOCH)
}

/// A line's monitor as stored (or a new one), with the version it was read at.
async fn load(
    p: &Pipeline,
    line: &Line,
    spacing_m: f64,
) -> Result<(LineMonitor, Option<i64>), PipelineError> {
    let rules = rules_for(&p.db, line).await?;
    let bad = |e: String| PipelineError::Data(format!("monitor state of line {}: {e}", line.name));
    match db::alerts::monitor(&p.db, line.id).await? {
        Some(row) => {
            let state: MonitorState =
                serde_json::from_str(&row.state).map_err(|e| bad(e.to_string()))?;
            let tracker = ZoneTracker::from_state(TrackerParams::default(), state.tracker.into())
                .map_err(|e| bad(e.to_string()))?;
            let engine = ohmline_core::alerts::AlertEngine::from_state(state.engine.into())
                .map_err(|e| bad(e.to_string()))?;
            let m = LineMonitor::resume(rules, spacing_m, tracker, engine)
                .map_err(|e| bad(e.to_string()))?;
            Ok((m, Some(row.version)))
        }
        None => {
            // Alert ids continue after earlier processing of the line, so a
            // reprocessed history never reuses an id of the audit trail.
            let next = db::alerts::max_engine_id(&p.db, line.id).await? + 1;
            let engine =
                ohmline_core::alerts::AlertEngine::from_state(ohmline_core::alerts::EngineState {
                    next_id: next as u64,
                    alerts: Vec::new(),
                    subjects: Vec::new(),
                })
                .map_err(|e| bad(e.to_string()))?;
            let tracker = ZoneTracker::new(TrackerParams::default());
            let m = LineMonitor::resume(rules, spacing_m, tracker, engine)
                .map_err(|e| bad(e.to_string()))?;
            Ok((m, None))
        }
    }
}

fn state_json(m: &LineMonitor) -> String {
    let s = MonitorState {
        tracker: TrackerDto::from(m.tracker().state()),
        engine: EngineDto::from(m.engine().state()),
    };
    serde_json::to_string(&s).expect("monitor state serialises")
}

/// Words for a subject.
pub fn subject_words(s: &Subject) -> (String, &'static str, Option<i64>) {
    match s {
        Subject::Zone { track, direction } => (
            format!(
                "zone Z{track} ({})",
                if *direction == Direction::Drop { "drop" } else { "rise" }
            ),
            "zone",
            Some(*track as i64),
        ),
        Subject::LineWideWetting => ("line-wide wetting".into(), "line_wide_wetting", None),
        Subject::Quality(k) => (format!("data quality: {k:?}"), "quality", None),
    }
}

fn state_str(s: AlertState) -> &'static str {
    match s {
        AlertState::Raised => "raised",
        AlertState::Acknowledged => "acknowledged",
        AlertState::Resolved => "resolved",
    }
}

fn upsert_of(a: &Alert, rules: &RuleSet, epoch_id: Option<i64>) -> AlertUpsert {
    let (subject, kind, track) = subject_words(&a.subject);
    let facts = DetailFacts::of(&a.detail);
    AlertUpsert {
        engine_id: a.id as i64,
        subject,
        subject_kind: kind.into(),
        track,
        state: state_str(a.state).into(),
        level: i64::from(level_rank(a.level)),
        level_label: level_label(a.level, rules),
        raised_at: ts(a.raised_at),
        since: ts(a.since),
        updated_at: ts(a.updated_at),
        resolved_at: None,
        epoch_id,
        x_range: facts.chainage_m,
        depth_range: facts.depth_m,
        peak_change_pct: facts.peak_change_pct,
        area_m2: facts.area_m2,
        detail: serde_json::to_string(&DetailDto::from(&a.detail)).expect("detail serialises"),
    }
}

/// Rows of the alerts the transitions touch: live ones from the engine,
/// resolved ones from storage with the new state.
async fn upserts(
    p: &Pipeline,
    line: &Line,
    monitor: &LineMonitor,
    transitions: &[Transition],
    epoch_id: Option<i64>,
) -> Result<Vec<AlertUpsert>, PipelineError> {
    let mut out: Vec<AlertUpsert> = Vec::new();
    for t in transitions {
        let id = t.alert as i64;
        out.retain(|u| u.engine_id != id);
        if let Some(a) = monitor.alerts().iter().find(|a| a.id == t.alert) {
            out.push(upsert_of(a, monitor.rules(), epoch_id));
        } else if let Some(row) = db::alerts::by_engine_id(&p.db, line.id, id).await? {
            out.push(AlertUpsert {
                engine_id: id,
                subject: row.subject,
                subject_kind: row.subject_kind,
                track: row.track,
                state: state_str(t.to).into(),
                level: row.level,
                level_label: row.level_label,
                raised_at: row.raised_at,
                since: row.since,
                updated_at: ts(t.time),
                resolved_at: (t.to == AlertState::Resolved).then(|| ts(t.time)),
                epoch_id: row.epoch_id,
                x_range: row.x_min.zip(row.x_max),
                depth_range: row.depth_top.zip(row.depth_bottom),
                peak_change_pct: row.peak_change_pct,
                area_m2: row.area_m2,
                detail: row.detail,
            });
        }
    }
    Ok(out)
}

fn transition_row(t: &Transition) -> NewTransition {
    let note = match &t.reason {
        ohmline_core::alerts::Reason::Acknowledged { note }
        | ohmline_core::alerts::Reason::ResolvedByHand { note } => Some(note.clone()),
        _ => None,
    };
    NewTransition {
        engine_id: t.alert as i64,
        from_state: t.from.map(|s| state_str(s).to_string()),
        to_state: state_str(t.to).into(),
        level: i64::from(level_rank(t.level)),
        reason: t.reason.to_string(),
        actor: t.actor.to_string(),
        note,
        at: ts(t.time),
    }
}

/// The event a transition is for people.
fn event_of(t: &NewTransition) -> AlertEvent {
    match (t.from_state.as_deref(), t.to_state.as_str()) {
        (None, _) => AlertEvent::Raised,
        (_, "resolved") => AlertEvent::Resolved,
        (_, "acknowledged") => AlertEvent::Acknowledged,
        _ => AlertEvent::Escalated,
    }
}

/// Section and history PNGs of an alert's notice.
type Figures = (Option<Vec<u8>>, Option<Vec<u8>>);

/// Everything a notice needs besides the transition.
struct NoticeContext<'a> {
    site: String,
    line: &'a Line,
    base_url: String,
    alerts: &'a [AlertUpsert],
    epoch_at: DateTime<Utc>,
    persistence: HashMap<i64, u32>,
    figures: HashMap<i64, Figures>,
}

impl NoticeContext<'_> {
    fn notice(&self, alert_id: i64, t: &NewTransition) -> Option<AlertNotice> {
        let a = self.alerts.iter().find(|a| a.engine_id == t.engine_id)?;
        let kind = match a.subject_kind.as_str() {
            "zone" if a.subject.contains("rise") => crate::notify::AlertKind::RiseZone,
            "zone" => crate::notify::AlertKind::DropZone,
            "line_wide_wetting" => crate::notify::AlertKind::LineWideWetting,
            _ => crate::notify::AlertKind::DataQuality,
        };
        let event = event_of(t);
        let mut summary =
            format!("{} {} on line {}: {}.", a.subject, event, self.line.name, t.reason);
        if let Ok(DetailDto::LineWideWetting(w)) = serde_json::from_str::<DetailDto>(&a.detail) {
            summary =
                format!("{summary} {}", crate::notify::wetting_words(&WettingNotice::from(w)));
        }
        let actor =
            (t.actor != "system").then(|| (t.actor.clone(), t.note.clone().unwrap_or_default()));
        let (section_png, history_png) =
            self.figures.get(&t.engine_id).cloned().unwrap_or((None, None));
        let n = NewNotice {
            alert_id,
            event,
            site: self.site.clone(),
            line: self.line.name.clone(),
            level_rank: u8::try_from(t.level).unwrap_or(0),
            level_label: a.level_label.clone(),
            kind,
            summary,
            chainage_m: a.x_range,
            depth_m: a.depth_range,
            area_m2: a.area_m2,
            peak_change_pct: a.peak_change_pct,
            since: a.since,
            raised_at: a.raised_at,
            event_at: t.at.max(a.raised_at),
            epoch_at: self.epoch_at,
            persistence_epochs: self.persistence.get(&t.engine_id).copied().unwrap_or(0),
            good_sensitivity_share: serde_json::from_str::<DetailDto>(&a.detail).ok().and_then(
                |d| match d {
                    DetailDto::Zone(z) => Some(z.good_share.clamp(0.0, 1.0)),
                    _ => None,
                },
            ),
            actor,
            link: alert_link(&self.base_url, alert_id),
            section_png,
            history_png,
        };
        match AlertNotice::new(n) {
            Ok(n) => Some(n),
            Err(e) => {
                tracing::error!(alert = alert_id, error = %e, "alert notice not sent: invalid");
                None
            }
        }
    }
}

/// Renders the change section of an epoch with zones outlined (PNG).
pub fn change_png(
    grid: &SectionGrid,
    model: &LineModel,
    change: &[f64],
    mask: &[bool],
    title: String,
    subtitle: Option<String>,
    zones: Vec<FigureZone>,
) -> Option<Vec<u8>> {
    let fig = SectionFigure::new(
        grid,
        SectionParams {
            title,
            subtitle,
            values: SectionValues::ChangePercent { change, limit: Some(40.0) },
            line: Some(&model.geometry),
            well_resolved: Some(mask),
            fade: 0.6,
            zones,
            vertical_exaggeration: 1.0,
        },
    )
    .ok()?;
    let canvas = Canvas::with_default_font(900, 420).ok()?;
    fig.png(&canvas).ok()
}

/// Renders a zone's history (peak change against time, trigger levels drawn).
pub fn history_png(
    title: String,
    points: &[(i64, Option<f64>)],
    rules: &RuleSet,
) -> Option<Vec<u8>> {
    if points.is_empty() {
        return None;
    }
    let series = TimeSeries::new("peak change (%)", points, Axis::Left).ok()?;
    let thresholds = rules
        .levels
        .iter()
        .enumerate()
        .map(|(i, l)| Threshold {
            value: l.change_pct,
            label: format!("level {}", i + 1),
            axis: Axis::Left,
        })
        .collect();
    let chart = TimeChart::new(TimeChartParams {
        title,
        subtitle: None,
        series: vec![series],
        thresholds,
        left_title: "Change (%)".into(),
        right_title: None,
        max_gap_s: None,
        time_range: None,
        left_range: None,
        right_range: None,
    })
    .ok()?;
    let canvas = Canvas::with_default_font(700, 260).ok()?;
    chart.png(&canvas).ok()
}

/// Runs the monitor over a line's inverted epochs in start-time order (job
/// [`super::process::MONITOR_LINE`]), stopping before the first epoch that
/// still waits for quality control or inversion: its own inversion queues
/// this job again. The primary change is the first configured change mode
/// the epoch has.
pub async fn run_line(p: &Pipeline, line_id: i64) -> Result<(), PipelineError> {
    let line = db::lines::by_id(&p.db, line_id)
        .await?
        .ok_or_else(|| PipelineError::Data(format!("line {line_id} does not exist")))?;
    loop {
        let ready = db::models::epochs_to_monitor(&p.db, line_id, 20).await?;
        if ready.is_empty() {
            return Ok(());
        }
        for epoch in ready {
            match monitor_stored(p, &line, &epoch).await {
                Ok(()) => {}
                Err(PipelineError::Data(msg)) => {
                    tracing::warn!(line = %line.name, epoch = epoch.id, error = %msg, "epoch not monitored");
                    db::models::mark_failed(&p.db, epoch.id, &msg).await?;
                }
                Err(e) => return Err(e),
            }
        }
    }
}

/// The monitor on an inverted epoch's stored primary change.
async fn monitor_stored(p: &Pipeline, line: &Line, epoch: &EpochRow) -> Result<(), PipelineError> {
    let model = p.line_model(line.id).await?;
    let stored = db::models::model(&p.db, epoch.id)
        .await?
        .ok_or_else(|| PipelineError::Data(format!("epoch {}: no stored model", epoch.id)))?;
    let changes = db::models::changes(&p.db, epoch.id).await?;
    let primary = p
        .config
        .processing
        .change_modes
        .iter()
        .find_map(|m| changes.iter().find(|c| c.mode == m.as_str()))
        .or(changes.first())
        .ok_or_else(|| PipelineError::Data(format!("epoch {}: no change section", epoch.id)))?;
    if primary.section_id != model.section_id || stored.section_id != model.section_id {
        return Err(PipelineError::Data(format!(
            "epoch {}: inverted on section {}, the line now has section {} (reprocess the line)",
            epoch.id, primary.section_id, model.section_id
        )));
    }
    let change = db::models::blob_to_f64s(&primary.change_pct)?;
    let mask = db::models::blob_to_mask(&primary.mask);
    let coverage = db::models::blob_to_f64s(&stored.coverage)?;
    let input = PrimaryChange {
        baseline_id: primary.baseline_id,
        mode: &primary.mode,
        change: &change,
        mask: &mask,
        coverage: &coverage,
    };
    observe_epoch(p, line, epoch, &model, &input).await
}

/// The primary change section of an epoch, as the monitor takes it.
pub struct PrimaryChange<'a> {
    /// Baseline it is against (`line_baselines` row).
    pub baseline_id: i64,
    /// Change mode (`ratio` or `difference`).
    pub mode: &'a str,
    /// Change per cell, %.
    pub change: &'a [f64],
    /// Mask of the change inversion per cell.
    pub mask: &'a [bool],
    /// Coverage of the epoch's single inversion per cell.
    pub coverage: &'a [f64],
}

/// Runs the monitor on an epoch's primary change section and stores the
/// result, with the noise calibration and seasonal envelope the line's rules
/// ask for where they can be measured.
pub async fn observe_epoch(
    p: &Pipeline,
    line: &Line,
    epoch: &EpochRow,
    model: &LineModel,
    primary: &PrimaryChange<'_>,
) -> Result<(), PipelineError> {
    let PrimaryChange { baseline_id, mode, change, mask: change_mask, coverage } = *primary;
    let grid = model.forward.mesh().section();
    let time = epoch.started_at.timestamp();
    let data_err = |e: String| PipelineError::Data(format!("epoch {}: {e}", epoch.id));
    // Quality events of the epoch.
    let mut events = Vec::new();
    if let Some(q) = db::quality::epoch(&p.db, epoch.id).await? {
        events.push(QualityEvent::DropShare { share: q.dropped_share.clamp(0.0, 1.0) });
    }
    for e in db::quality::electrodes(&p.db, epoch.id).await? {
        if !e.in_service {
            events.push(QualityEvent::ElectrodeOutOfService { electrode: e.position as usize });
        }
    }
    let (clamped, in_mask, _) = field_inputs(change, change_mask, coverage).map_err(data_err)?;
    let site = db::sites::name_of_line(&p.db, line.id).await?.unwrap_or_default();
    let base_url = p.config.notify.public_base_url.clone();
    let params = p
        .config
        .notify
        .enqueue_params(db::now())
        .map_err(|e| PipelineError::Data(format!("notification settings: {e}")))?;

    for attempt in 1..=ATTEMPTS {
        let (mut monitor, version) = load(p, line, model.spacing_m).await?;
        let noise = noise_model(p, line, monitor.rules(), model, baseline_id, mode).await?;
        let river_stage_m = match monitor.rules().stage {
            Some(_) => river_stage(p, line.site_id, time).await?,
            None => None,
        };
        let envelope =
            seasonal_envelope(p, monitor.rules(), grid.len(), baseline_id, mode, line.id, time)
                .await?;
        let (_, _, mask) = field_inputs(change, change_mask, coverage).map_err(data_err)?;
        let field =
            ChangeField::new(grid, clamped.clone(), mask).map_err(|e| data_err(e.to_string()))?;
        let outcome = monitor
            .process(&EpochInput {
                time,
                field: &field,
                noise: noise.as_ref(),
                envelope: envelope.as_ref(),
                quality: &events,
                river_stage_m,
            })
            .map_err(|e| data_err(e.to_string()))?;
        if tracing::enabled!(tracing::Level::DEBUG) {
            let bands: Vec<String> = outcome
                .lateral
                .iter()
                .flat_map(|l| l.bands())
                .map(|b| {
                    format!(
                        "{:.2}-{:.2} m: {} cells, median {:.1} %, {:.0} % wet",
                        b.top_m,
                        b.bottom_m,
                        b.cells,
                        b.background_pct.unwrap_or(f64::NAN),
                        100.0 * b.wetted_share
                    )
                })
                .collect();
            let zones: Vec<String> = outcome
                .zones
                .iter()
                .zip(&outcome.assessments)
                .map(|(z, a)| {
                    let e = z.extent();
                    format!(
                        "x {:.1}-{:.1} z {:.2}-{:.2} area {:.1} peak {:.1} judged {:.1} {:?}",
                        e.x_range().0,
                        e.x_range().1,
                        e.z_range().0,
                        e.z_range().1,
                        e.area(),
                        z.peak_change(),
                        z.peak_judged(),
                        a.level
                    )
                })
                .collect();
            tracing::debug!(
                line = %line.name, epoch = epoch.id, ?river_stage_m, ?bands, ?zones, "monitor epoch"
            );
        }

        // Zones of this epoch.
        let mut zones = Vec::new();
        let mut figure_zones = Vec::new();
        for (i, z) in outcome.zones.iter().enumerate() {
            let track = outcome.tracking.ids.get(i).copied().unwrap_or_default();
            let level = outcome.assessments.get(i).and_then(|a| a.level).map(level_rank);
            let e = z.extent();
            let (x0, x1) = e.x_range();
            let (d0, d1) = e.depth_range();
            let c = e.centroid();
            zones.push(ZoneRow {
                track: track as i64,
                direction: if z.direction() == Direction::Drop { "drop" } else { "rise" }.into(),
                level: level.map(i64::from),
                area_m2: e.area(),
                x_min: x0,
                x_max: x1,
                depth_top: d0,
                depth_bottom: d1,
                centroid_x: c[0],
                centroid_z: c[1],
                mean_change_pct: z.mean_change(),
                peak_change_pct: z.peak_change(),
                peak_judged_pct: z.peak_judged(),
                good_share: z.good_share(),
                outline: serde_json::to_string(&outline(grid, z.cells())).expect("outline"),
                cells: serde_json::to_string(z.cells()).expect("cells"),
            });
            figure_zones.push((track, z.cells().to_vec(), z.peak_change()));
        }
        let wetting = outcome.wetting.as_ref().map(|w| {
            serde_json::to_string(&DetailDto::from(&Detail::LineWideWetting(w.clone())))
                .expect("wetting serialises")
        });
        let warnings = serde_json::to_string(
            &outcome.warnings.iter().map(|w| format!("{w:?}")).collect::<Vec<_>>(),
        )
        .expect("warnings serialise");

        let alerts = upserts(p, line, &monitor, &outcome.transitions, Some(epoch.id)).await?;
        let transitions: Vec<NewTransition> =
            outcome.transitions.iter().map(transition_row).collect();

        // Figures for zone alerts that changed.
        let mut figures = HashMap::new();
        let mut persistence = HashMap::new();
        for a in monitor.alerts() {
            persistence.insert(a.id as i64, a.persistence);
        }
        for t in &outcome.transitions {
            let Subject::Zone { track, .. } = t.subject else { continue };
            let Some((_, cells, _)) = figure_zones.iter().find(|z| z.0 == track) else {
                continue;
            };
            let section = change_png(
                grid,
                model,
                &clamped,
                &in_mask,
                format!("Line {} — change against baseline", line.name),
                Some(format!(
                    "{} UTC — zone Z{track} outlined",
                    epoch.started_at.format("%Y-%m-%d %H:%M")
                )),
                vec![FigureZone { label: format!("Z{track}"), cells: cells.clone() }],
            );
            let mut points: Vec<(i64, Option<f64>)> =
                db::alerts::track_history(&p.db, line.id, track as i64)
                    .await?
                    .into_iter()
                    .filter(|(_, t0, _)| t0.timestamp() < time)
                    .map(|(_, t0, z)| (t0.timestamp(), Some(z.peak_change_pct)))
                    .collect();
            if let Some(z) = zones.iter().find(|z| z.track == track as i64) {
                points.push((time, Some(z.peak_change_pct)));
            }
            let history = history_png(
                format!("Zone Z{track} on line {}: peak change", line.name),
                &points,
                monitor.rules(),
            );
            figures.insert(t.alert as i64, (section, history));
        }

        let ctx = NoticeContext {
            site: site.clone(),
            line,
            base_url: base_url.clone(),
            alerts: &alerts,
            epoch_at: epoch.started_at,
            persistence,
            figures,
        };
        let update = MonitorUpdate {
            line_id: line.id,
            state: state_json(&monitor),
            read_version: version,
            last_time: Some(epoch.started_at),
            epoch: Some(EpochMonitoring {
                epoch_id: epoch.id,
                zones: &zones,
                wetting,
                warnings,
                status: "processed",
            }),
            alerts: &alerts,
            transitions: &transitions,
        };
        match store_update(&p.db, &update, &|id, t| ctx.notice(id, t), &params).await {
            Ok(stored) => {
                for t in transitions.iter().filter(|t| t.from_state.is_none()) {
                    metrics::counter!(crate::metrics::ALERTS_RAISED, "level" => t.level.to_string())
                        .increment(1);
                }
                for t in &transitions {
                    let id = stored.alert_ids.get(&t.engine_id).copied().unwrap_or_default();
                    tracing::info!(
                        line = %line.name, alert = id, from = ?t.from_state, to = %t.to_state,
                        level = t.level, reason = %t.reason, "alert transition"
                    );
                }
                return Ok(());
            }
            Err(DbError::Conflict { .. }) if attempt < ATTEMPTS => continue,
            Err(e) => return Err(e.into()),
        }
    }
    unreachable!("the loop returns on its last attempt")
}

/// A mask limited to `keep` (cells outside become outside the mask).
fn restrict(mask: SensitivityMask, keep: &[bool]) -> SensitivityMask {
    let in_mask: Vec<bool> = mask.in_mask().iter().zip(keep).map(|(a, b)| *a && *b).collect();
    let good: Vec<bool> = mask.good().iter().zip(&in_mask).map(|(a, b)| *a && *b).collect();
    SensitivityMask::from_parts(in_mask, good)
}

/// Why a person's action on an alert was refused.
#[derive(Debug, thiserror::Error)]
pub enum ActionError {
    /// No such alert.
    #[error("alert {0} not found")]
    NotFound(i64),
    /// The rules refuse it (already resolved, empty note, …).
    #[error("{0}")]
    Refused(String),
    /// Storage or processing failed.
    #[error(transparent)]
    Pipeline(#[from] PipelineError),
}

impl From<DbError> for ActionError {
    fn from(e: DbError) -> Self {
        ActionError::Pipeline(e.into())
    }
}

/// What a person does to an alert.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Action {
    /// Acknowledge (seen, inspection arranged).
    Acknowledge,
    /// Resolve by hand.
    Resolve,
}

/// A person acknowledges or resolves an alert, with a note; stored with the
/// audit trail and notified like every transition.
pub async fn act(
    p: &Pipeline,
    alert_id: i64,
    action: Action,
    actor: &str,
    note: &str,
) -> Result<db::alerts::AlertRow, ActionError> {
    let row = db::alerts::by_id(&p.db, alert_id).await?.ok_or(ActionError::NotFound(alert_id))?;
    if row.state == "resolved" {
        return Err(ActionError::Refused(format!("alert {alert_id} is already resolved")));
    }
    let line =
        db::lines::by_id(&p.db, row.line_id).await?.ok_or(ActionError::NotFound(alert_id))?;
    let geometry = p.geometry(line.id).await?;
    let spacing = super::process::median_spacing(&geometry);
    let site = db::sites::name_of_line(&p.db, line.id).await?.unwrap_or_default();
    let params = p
        .config
        .notify
        .enqueue_params(db::now())
        .map_err(|e| PipelineError::Data(format!("notification settings: {e}")))?;
    for attempt in 1..=ATTEMPTS {
        let (mut monitor, version) = load(p, &line, spacing).await?;
        let now = db::now();
        let t = match action {
            Action::Acknowledge => {
                monitor.acknowledge(row.engine_id as u64, actor, note, now.timestamp())
            }
            Action::Resolve => monitor.resolve(row.engine_id as u64, actor, note, now.timestamp()),
        }
        .map_err(|e| ActionError::Refused(e.to_string()))?;
        let transitions = vec![t];
        let alerts = upserts(p, &line, &monitor, &transitions, None).await?;
        let rows: Vec<NewTransition> = transitions.iter().map(transition_row).collect();
        let ctx = NoticeContext {
            site: site.clone(),
            line: &line,
            base_url: p.config.notify.public_base_url.clone(),
            alerts: &alerts,
            epoch_at: row.updated_at,
            persistence: monitor.alerts().iter().map(|a| (a.id as i64, a.persistence)).collect(),
            figures: HashMap::new(),
        };
        let update = MonitorUpdate {
            line_id: line.id,
            state: state_json(&monitor),
            read_version: version,
            last_time: None,
            epoch: None,
            alerts: &alerts,
            transitions: &rows,
        };
        match store_update(&p.db, &update, &|id, t| ctx.notice(id, t), &params).await {
            Ok(_) => {
                tracing::info!(alert = alert_id, action = ?action, actor, "alert updated by a person");
                return db::alerts::by_id(&p.db, alert_id)
                    .await?
                    .ok_or(ActionError::NotFound(alert_id));
            }
            Err(DbError::Conflict { .. }) if attempt < ATTEMPTS => continue,
            Err(e) => return Err(e.into()),
        }
    }
    unreachable!("the loop returns on its last attempt")
}

/// Level of a stored rank.
pub fn level_of_rank(rank: i64) -> Level {
    if rank <= 0 { Level::Notice } else { Level::Trigger(rank.min(255) as u8) }
}
