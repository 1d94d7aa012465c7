//! Quality-control stage: runs `ohmline_core::qc` on each waiting epoch of a
//! line, oldest first, and stores the outcome.
//!
//! Per-line state carried from epoch to epoch (rebuilt from storage whenever a
//! job starts or an epoch arrives out of order):
//! - the spike-test history: log ρa of the last [`WINDOW`] checked epochs of the
//!   same sequence version, from readings that failed nothing but the spike test;
//! - contact resistances per electrode over the same window;
//! - reciprocal pairs of kept readings over the window, for the error model;
//! - each electrode's consecutive flagged epochs (electrode health).
//!
//! The error model stored with an epoch is fitted over the window including the
//! epoch (stable weights for inversion). "Error model worsening" compares the
//! epoch's own pairs against the window before it, so a sudden degradation is
//! reported at once.

use std::collections::{BTreeMap, VecDeque};

use chrono::{DateTime, Utc};
use ohmline_core::errormodel::{FitParams, ReciprocalPair, fit_error_model};
use ohmline_core::geometry::LineGeometry;
use ohmline_core::qc::events::{EventParams, QualityEvent, epoch_events, error_model_worsening};
use ohmline_core::qc::health::{ElectrodeHealth, ElectrodeState, HealthParams, TransitionKind};
use ohmline_core::qc::{EpochQc, QcHistory, QcInput, QcParams, Reading, check_epoch};
use ohmline_core::sequence::{Sequence, geometric_factor_flat};

use super::{Pipeline, PipelineError};
use crate::db::epochs::EpochRow;
use crate::db::quality::{
    ElectrodeQuality, EpochQuality, NewEvent, QcOutcome, ReadingQuality, ServiceChange,
};
use crate::db::{self, lines::Line};

/// Epochs of history for the spike test and the error model.
pub const WINDOW: usize = 10;

/// What one checked epoch contributes to the next epochs' checks.
struct Contribution {
    started_at: DateTime<Utc>,
    sequence_id: i64,
    log_rho_a: Vec<(usize, f64)>,
    contacts: Vec<(usize, f64)>,
    pairs: Vec<ReciprocalPair>,
}

/// Log ρa per quadrupole and contact resistance per electrode of one past epoch.
type HistoryPart = (Vec<(usize, f64)>, Vec<(usize, f64)>);

/// The rolling state of one line.
struct LineState {
    recent: VecDeque<Contribution>,
    consecutive_flags: Vec<usize>,
    newest: Option<DateTime<Utc>>,
}

/// Checks every waiting epoch of a line.
pub async fn run_line(p: &Pipeline, line_id: i64) -> Result<(), PipelineError> {
    let line = db::lines::by_id(&p.db, line_id)
        .await?
        .ok_or_else(|| PipelineError::Data(format!("line {line_id} does not exist")))?;
    let geometry = p.geometry(line_id).await?;
    let mut state: Option<LineState> = None;
    loop {
        let waiting = db::quality::epochs_waiting(&p.db, line_id, 50).await?;
        if waiting.is_empty() {
            return Ok(());
        }
        for epoch in waiting {
            let fresh = match &state {
                Some(s) => s.newest.is_none_or(|t| t <= epoch.started_at),
                None => false,
            };
            if !fresh {
                state = Some(load_state(p, &line, &geometry, &epoch).await?);
            }
            let s = state.as_mut().expect("state loaded");
            check_one(p, &line, &geometry, &epoch, s).await?;
        }
    }
}

/// Rebuilds the rolling state as it stood just before `epoch`.
async fn load_state(
    p: &Pipeline,
    line: &Line,
    geometry: &LineGeometry,
    epoch: &EpochRow,
) -> Result<LineState, PipelineError> {
    let prev = db::quality::checked_before(
        &p.db,
        line.id,
        epoch.sequence_id,
        epoch.started_at,
        WINDOW as i64,
    )
    .await?;
    let seq = p.sequence(epoch.sequence_id, geometry.len()).await?;
    let mut recent = VecDeque::new();
    for e in prev.iter().rev() {
        let rq = db::quality::readings(&p.db, e.id).await?;
        let eq = db::quality::electrodes(&p.db, e.id).await?;
        let raw = db::epochs::readings(&p.db, e.id).await?;
        let mut kept_r = vec![None; seq.len()];
        let mut log_rho_a = Vec::new();
        for (q, r) in rq.iter().zip(&raw) {
            if q.kept {
                kept_r[q.quad as usize] = Some(r.resistance_ohm);
            }
            if (q.rules.is_empty() || q.rules == "spike")
                && let Some(v) = q.rho_a.filter(|v| *v > 0.0)
            {
                log_rho_a.push((q.quad as usize, v.ln()));
            }
        }
        let pairs = seq
            .reciprocal_pairs()
            .filter_map(|(i, j)| {
                Some(ReciprocalPair { normal_ohm: kept_r[i]?, reciprocal_ohm: kept_r[j]? })
            })
            .collect();
        let contacts =
            eq.iter().filter_map(|x| Some((x.position as usize, x.contact_ohm?))).collect();
        recent.push_back(Contribution {
            started_at: e.started_at,
            sequence_id: e.sequence_id,
            log_rho_a,
            contacts,
            pairs,
        });
    }
    let last = db::quality::last_checked_before(&p.db, line.id, epoch.started_at).await?;
    let mut consecutive_flags = vec![0; geometry.len()];
    if let Some(last) = &last {
        for x in db::quality::electrodes(&p.db, last.id).await? {
            if let Some(c) = consecutive_flags.get_mut(x.position as usize) {
                *c = x.consecutive_flags.max(0) as usize;
            }
        }
    }
    Ok(LineState { recent, consecutive_flags, newest: last.map(|l| l.started_at) })
}

/// Geometric factors of every quadrupole; NaN where a quadrupole has none.
/// Analytic for surface electrodes (straight-line distances between electrodes).
pub fn geometric_factors(geometry: &LineGeometry, seq: &Sequence) -> Vec<f64> {
    seq.quadrupoles()
        .iter()
        .map(|q| geometric_factor_flat(geometry, q).unwrap_or(f64::NAN))
        .collect()
}

struct Checked {
    qc: EpochQc,
    transitions: Vec<ohmline_core::qc::health::HealthTransition>,
    window_fit: ohmline_core::errormodel::ErrorModelFit,
    worsening: Option<QualityEvent>,
    events: Vec<QualityEvent>,
    k: Vec<f64>,
}

async fn check_one(
    p: &Pipeline,
    line: &Line,
    geometry: &LineGeometry,
    epoch: &EpochRow,
    state: &mut LineState,
) -> Result<(), PipelineError> {
    let seq = p.sequence(epoch.sequence_id, geometry.len()).await?;
    let raw = db::epochs::readings(&p.db, epoch.id).await?;
    let electrodes = db::lines::electrodes(&p.db, line.id).await?;
    let in_service: Vec<bool> = electrodes.iter().map(|e| e.in_service).collect();
    // Transitions of electrode health apply only to the newest epoch of the line;
    // a late epoch is checked against the state but changes nothing.
    let apply_health = !db::quality::checked_after(&p.db, line.id, epoch.started_at).await?;
    let time_s = epoch.started_at.timestamp() as f64;

    let readings: Vec<Reading> = raw
        .iter()
        .map(|r| Reading {
            quad: r.quad as usize,
            resistance_ohm: r.resistance_ohm,
            current_ma: r.current_ma,
            voltage_mv: r.voltage_mv,
            stack_error_pct: r.stack_error_pct,
            contact_a_ohm: r.contact_a_ohm,
            contact_b_ohm: r.contact_b_ohm,
        })
        .collect();
    let history_parts: Vec<HistoryPart> = state
        .recent
        .iter()
        .filter(|c| c.sequence_id == epoch.sequence_id)
        .map(|c| (c.log_rho_a.clone(), c.contacts.clone()))
        .collect();
    let window_pairs: Vec<ReciprocalPair> =
        state.recent.iter().flat_map(|c| c.pairs.iter().copied()).collect();
    let flags = state.consecutive_flags.clone();
    let geometry2 = geometry.clone();
    let seq2 = seq.clone();

    let checked = tokio::task::spawn_blocking(move || -> Result<Checked, String> {
        let k = geometric_factors(&geometry2, &seq2);
        let n_e = geometry2.len();
        let mut history = QcHistory::new(seq2.len(), n_e, WINDOW).map_err(|e| e.to_string())?;
        for (rho, contacts) in &history_parts {
            for &(q, v) in rho {
                if q < seq2.len() {
                    history.push_log_rho_a(q, v).map_err(|e| e.to_string())?;
                }
            }
            for &(e, c) in contacts {
                if e < n_e {
                    history.push_contact(e, c).map_err(|e| e.to_string())?;
                }
            }
        }
        let params = QcParams::default();
        let health_params = HealthParams::default();
        let qc = check_epoch(
            &QcInput {
                sequence: &seq2,
                geometric_factors_m: &k,
                readings: &readings,
                history: &history,
                in_service: &in_service,
            },
            &params,
        )
        .map_err(|e| e.to_string())?;
        let states = in_service
            .iter()
            .zip(&flags)
            .map(|(&ok, &f)| {
                if ok {
                    ElectrodeState::InService {
                        consecutive_flags: f.min(health_params.flags_to_out_of_service - 1),
                    }
                } else {
                    ElectrodeState::OutOfService { since_s: time_s }
                }
            })
            .collect();
        let mut health = ElectrodeHealth::from_states(states, Vec::new(), health_params)
            .map_err(|e| e.to_string())?;
        let transitions = health.update(&qc, time_s).map_err(|e| e.to_string())?;
        let fit_params = FitParams::default();
        let mut all_pairs = window_pairs.clone();
        all_pairs.extend_from_slice(qc.reciprocal_pairs());
        let window_fit = fit_error_model(&all_pairs, &fit_params).map_err(|e| e.to_string())?;
        let before = fit_error_model(&window_pairs, &fit_params).map_err(|e| e.to_string())?;
        let own = fit_error_model(qc.reciprocal_pairs(), &fit_params).map_err(|e| e.to_string())?;
        let event_params = EventParams::default();
        let worsening =
            error_model_worsening(&before, &own, &event_params).map_err(|e| e.to_string())?;
        let events = epoch_events(&qc, &transitions, &event_params).map_err(|e| e.to_string())?;
        Ok(Checked { qc, transitions, window_fit, worsening, events, k })
    })
    .await
    .map_err(|e| PipelineError::Data(format!("quality control task: {e}")))?
    .map_err(|e| PipelineError::Data(format!("epoch {}: {e}", epoch.id)))?;

    let labels: Vec<String> = electrodes.iter().map(|e| e.label.clone()).collect();
    let outcome = to_rows(epoch, &checked, &raw, &labels, apply_health, &state.consecutive_flags);
    let (epoch_row, reading_rows, electrode_rows, mut events, service) = outcome;
    if let Some(w) = &checked.worsening {
        events.push(event_row(w, epoch.started_at, &labels));
    }
    db::quality::store(
        &p.db,
        &QcOutcome {
            line_id: line.id,
            epoch: &epoch_row,
            readings: &reading_rows,
            electrodes: &electrode_rows,
            events: &events,
            service: if apply_health { &service } else { &[] },
            status: "checked",
            next_jobs: &[super::process::invert_job(line.id, epoch.id)],
        },
    )
    .await?;
    metrics::counter!(crate::metrics::QC_DROPPED).increment(checked.qc.n_dropped() as u64);
    tracing::info!(
        line = %line.name,
        epoch = epoch.id,
        dropped = checked.qc.n_dropped(),
        of = checked.qc.n_readings(),
        "quality control done"
    );

    // Roll the state forward.
    for e in &electrode_rows {
        if let Some(c) = state.consecutive_flags.get_mut(e.position as usize) {
            *c = e.consecutive_flags as usize;
        }
    }
    let mut log_rho_a = Vec::new();
    for r in checked.qc.readings() {
        let only_spike = r.reasons().iter().all(|x| x.code() == "spike");
        if only_spike && let Some(v) = r.rho_a_ohm_m().filter(|v| *v > 0.0) {
            log_rho_a.push((r.quad(), v.ln()));
        }
    }
    state.recent.push_back(Contribution {
        started_at: epoch.started_at,
        sequence_id: epoch.sequence_id,
        log_rho_a,
        contacts: checked
            .qc
            .electrodes()
            .iter()
            .filter_map(|e| Some((e.electrode(), e.contact_ohm()?)))
            .collect(),
        pairs: checked.qc.reciprocal_pairs().to_vec(),
    });
    while state.recent.len() > WINDOW {
        state.recent.pop_front();
    }
    state.newest = Some(epoch.started_at.max(state.newest.unwrap_or(epoch.started_at)));
    debug_assert!(state.recent.iter().all(|c| c.started_at <= epoch.started_at));
    Ok(())
}

type Rows =
    (EpochQuality, Vec<ReadingQuality>, Vec<ElectrodeQuality>, Vec<NewEvent>, Vec<ServiceChange>);

fn to_rows(
    epoch: &EpochRow,
    c: &Checked,
    raw: &[db::epochs::ReadingRow],
    labels: &[String],
    apply_health: bool,
    prev_flags: &[usize],
) -> Rows {
    let qc = &c.qc;
    let label = |e: usize| labels.get(e).cloned().unwrap_or_else(|| e.to_string());
    let readings = qc
        .readings()
        .iter()
        .zip(raw)
        .map(|(r, row)| ReadingQuality {
            row_index: row.row_index,
            quad: r.quad() as i64,
            kept: r.kept(),
            k_factor: c.k.get(r.quad()).copied().filter(|k| k.is_finite()),
            rho_a: r.rho_a_ohm_m(),
            reciprocal_error: r.reciprocal_error(),
            spike_score: r.spike_score(),
            rules: r.reasons().iter().map(|x| x.code()).collect::<Vec<_>>().join(","),
            reasons: r
                .reasons()
                .iter()
                .map(|x| match x.electrode() {
                    // Name electrodes by label, as the engineer knows them.
                    Some(e) => x
                        .to_string()
                        .replace(&format!("electrode {e}"), &format!("electrode {}", label(e))),
                    None => x.to_string(),
                })
                .collect::<Vec<_>>()
                .join("; "),
        })
        .collect();
    let electrodes = qc
        .electrodes()
        .iter()
        .map(|e| {
            let consecutive = if e.is_flagged() {
                prev_flags.get(e.electrode()).copied().unwrap_or(0) + 1
            } else {
                0
            };
            ElectrodeQuality {
                position: e.electrode() as i64,
                in_service: e.in_service(),
                n_readings: e.n_readings() as i64,
                n_failing: e.n_failing() as i64,
                fail_share: e.fail_share(),
                contact_ohm: e.contact_ohm(),
                flags: e.flags().iter().map(|f| f.code()).collect::<Vec<_>>().join(","),
                consecutive_flags: consecutive as i64,
            }
        })
        .collect();
    let counts: BTreeMap<&str, usize> =
        qc.counts().filter(|(_, n)| *n > 0).map(|(r, n)| (r.code(), n)).collect();
    let fit = &c.window_fit;
    let epoch_row = EpochQuality {
        epoch_id: epoch.id,
        processed_at: db::now(),
        n_readings: qc.n_readings() as i64,
        n_dropped: qc.n_dropped() as i64,
        dropped_share: qc.dropped_share(),
        rule_counts: serde_json::to_string(&counts).expect("json"),
        flagged: serde_json::to_string(&qc.flagged_electrodes()).expect("json"),
        median_rho_a: qc.median_rho_a_ohm_m(),
        error_a_ohm: fit.model().a_ohm(),
        error_b: fit.model().b(),
        error_fitted: fit.is_fitted(),
        error_pairs: fit.n_used() as i64,
        warnings: serde_json::to_string(
            &qc.warnings().iter().chain(fit.warnings()).collect::<Vec<_>>(),
        )
        .expect("json"),
    };
    let events = c.events.iter().map(|e| event_row(e, epoch.started_at, labels)).collect();
    let service = if apply_health {
        c.transitions
            .iter()
            .map(|t| ServiceChange {
                position: t.electrode as i64,
                in_service: matches!(t.kind, TransitionKind::ReturnedToService),
                reason: match &t.kind {
                    TransitionKind::OutOfService { consecutive_flags, flags } => format!(
                        "flagged in {consecutive_flags} consecutive epochs ({})",
                        flags.iter().map(|f| f.code()).collect::<Vec<_>>().join(", ")
                    ),
                    TransitionKind::ReturnedToService => "returned to service".into(),
                },
            })
            .collect()
    } else {
        Vec::new()
    };
    (epoch_row, readings, electrodes, events, service)
}

fn event_row(e: &QualityEvent, at: DateTime<Utc>, labels: &[String]) -> NewEvent {
    let detail = match e {
        QualityEvent::LineSilent { last_epoch_s, now_s, expected_interval_s } => format!(
            "no epoch for {:.1} h (expected every {:.1} h)",
            (now_s - last_epoch_s) / 3600.0,
            expected_interval_s / 3600.0
        ),
        QualityEvent::DroppedShare { share, threshold } => format!(
            "{:.1} % of the readings were dropped (threshold {:.0} %)",
            share * 100.0,
            threshold * 100.0
        ),
        QualityEvent::ElectrodeOutOfService { electrode, .. } => format!(
            "electrode {} taken out of service",
            labels.get(*electrode).cloned().unwrap_or_else(|| electrode.to_string())
        ),
        QualityEvent::ErrorModelWorsening {
            reference_r_ohm,
            previous_relative,
            current_relative,
        } => format!(
            "reciprocal error at |R| = {reference_r_ohm:.3} Ω rose from {:.2} % to {:.2} %",
            previous_relative * 100.0,
            current_relative * 100.0
        ),
    };
    NewEvent { kind: e.code().to_string(), detail, occurred_at: at }
}
