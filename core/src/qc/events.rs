//! Data-quality events: pure decisions for the alerting side.
//!
//! Times are seconds on the caller's clock (e.g. Unix time), passed in; nothing here
//! reads a clock. The rules:
//! - **line silent**: no epoch for longer than `silent_factor` (default 2) times the
//!   line's expected interval: `now − last > factor · interval`;
//! - **dropped share**: an epoch dropped more than `max_dropped_share` of its readings;
//! - **electrode out of service**: one event per out-of-service transition;
//! - **error model worsening**: both the previous and the current fits are fitted (not
//!   defaults) and the current relative error at a reference |R| is at least
//!   `worsening_ratio` times the previous one there. The reference |R| is the current
//!   fit's median |R| (the typical reading now), else the previous fit's. Relative error
//!   at R: δR/|R| = b + a/|R| (METHODS §3.2).

use super::health::{HealthTransition, TransitionKind};
use super::{EpochQc, QcError, require};
use crate::errormodel::ErrorModelFit;

/// Thresholds of the data-quality events.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EventParams {
    /// A line is silent after this many expected intervals without an epoch (> 1).
    /// Default 2 (the project's rule for silent lines).
    pub silent_factor: f64,
    /// Dropped share of an epoch above which an event is raised (0–1). Default 0.2:
    /// common practice, no source.
    pub max_dropped_share: f64,
    /// Ratio of current to previous relative error that counts as worsening (> 1).
    /// Default 1.5: common practice, no source.
    pub worsening_ratio: f64,
}

impl Default for EventParams {
    fn default() -> Self {
        Self { silent_factor: 2.0, max_dropped_share: 0.2, worsening_ratio: 1.5 }
    }
}

impl EventParams {
    fn validate(&self) -> Result<(), QcError> {
        require(
            self.silent_factor.is_finite() && self.silent_factor > 1.0,
            "silent_factor",
            self.silent_factor,
            "> 1",
        )?;
        require(
            (0.0..=1.0).contains(&self.max_dropped_share),
            "max_dropped_share",
            self.max_dropped_share,
            "in [0, 1]",
        )?;
        require(
            self.worsening_ratio.is_finite() && self.worsening_ratio > 1.0,
            "worsening_ratio",
            self.worsening_ratio,
            "> 1",
        )
    }
}

/// A data-quality event.
#[derive(Debug, Clone, PartialEq)]
pub enum QualityEvent {
    /// No epoch for longer than the silent factor times the expected interval.
    LineSilent {
        /// Time of the last epoch (or of the line's creation), seconds.
        last_epoch_s: f64,
        /// Now, seconds.
        now_s: f64,
        /// The line's expected interval between epochs, seconds.
        expected_interval_s: f64,
    },
    /// An epoch dropped too large a share of its readings.
    DroppedShare {
        /// Share dropped (0–1).
        share: f64,
        /// The threshold (0–1).
        threshold: f64,
    },
    /// An electrode was taken out of service.
    ElectrodeOutOfService {
        /// Electrode index.
        electrode: usize,
        /// Time of the transition, seconds.
        time_s: f64,
    },
    /// The fitted error model got worse.
    ErrorModelWorsening {
        /// |R| at which the two fits were compared, Ω.
        reference_r_ohm: f64,
        /// Previous relative error at that |R| (0.02 = 2 %).
        previous_relative: f64,
        /// Current relative error at that |R|.
        current_relative: f64,
    },
}

impl QualityEvent {
    /// Stable short code for storage and the API.
    pub fn code(&self) -> &'static str {
        match self {
            QualityEvent::LineSilent { .. } => "line_silent",
            QualityEvent::DroppedShare { .. } => "dropped_share",
            QualityEvent::ElectrodeOutOfService { .. } => "electrode_out_of_service",
            QualityEvent::ErrorModelWorsening { .. } => "error_model_worsening",
        }
    }
}

/// Is the line silent at `now_s`, given its last epoch (or its creation) at
/// `last_epoch_s` and its expected interval `expected_interval_s` (> 0), all in seconds?
pub fn line_silent(
    last_epoch_s: f64,
    now_s: f64,
    expected_interval_s: f64,
    params: &EventParams,
) -> Result<Option<QualityEvent>, QcError> {
    params.validate()?;
    require(last_epoch_s.is_finite(), "last_epoch_s", last_epoch_s, "a finite time")?;
    require(now_s.is_finite(), "now_s", now_s, "a finite time")?;
    require(
        expected_interval_s.is_finite() && expected_interval_s > 0.0,
        "expected_interval_s",
        expected_interval_s,
        "> 0",
    )?;
    Ok((now_s - last_epoch_s > params.silent_factor * expected_interval_s)
        .then_some(QualityEvent::LineSilent { last_epoch_s, now_s, expected_interval_s }))
}

/// Events of one epoch: dropped share above the threshold, and one per electrode taken
/// out of service among `transitions` (as returned by
/// [`super::health::ElectrodeHealth::update`] for this epoch).
pub fn epoch_events(
    epoch: &EpochQc,
    transitions: &[HealthTransition],
    params: &EventParams,
) -> Result<Vec<QualityEvent>, QcError> {
    params.validate()?;
    let mut out = Vec::new();
    let share = epoch.dropped_share();
    if share > params.max_dropped_share {
        out.push(QualityEvent::DroppedShare { share, threshold: params.max_dropped_share });
    }
    for t in transitions {
        if let TransitionKind::OutOfService { .. } = t.kind {
            out.push(QualityEvent::ElectrodeOutOfService {
                electrode: t.electrode,
                time_s: t.time_s,
            });
        }
    }
    Ok(out)
}

/// Has the error model worsened from `previous` to `current`? (Rule in the module docs.)
pub fn error_model_worsening(
    previous: &ErrorModelFit,
    current: &ErrorModelFit,
    params: &EventParams,
) -> Result<Option<QualityEvent>, QcError> {
    params.validate()?;
    if !(previous.is_fitted() && current.is_fitted()) {
        return Ok(None);
    }
    let Some(r) = current.median_abs_r_ohm().or(previous.median_abs_r_ohm()).filter(|&r| r > 0.0)
    else {
        return Ok(None);
    };
    let (p, c) = (previous.model().relative(r), current.model().relative(r));
    Ok((c >= params.worsening_ratio * p).then_some(QualityEvent::ErrorModelWorsening {
        reference_r_ohm: r,
        previous_relative: p,
        current_relative: c,
    }))
}
