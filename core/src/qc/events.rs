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

#[cfg(test)]
mod tests {
    use rand::rngs::StdRng;
    use rand::{Rng, SeedableRng};
    use rand_distr::StandardNormal;

    use super::super::synth::{REALISTIC, Run};
    use super::*;
    use crate::errormodel::{FitParams, ReciprocalPair, fit_error_model};

    /// Checks the codes of a list of events.
    fn check(events: &[QualityEvent], expected: &[&str]) {
        let got: Vec<&str> = events.iter().map(|e| e.code()).collect();
        assert_eq!(got, expected, "{events:?}");
    }

    #[test]
    fn silent_line_after_twice_its_interval() {
        let p = EventParams::default();
        let hour = 3600.0;
        assert_eq!(line_silent(0.0, 2.0 * hour, hour, &p), Ok(None)); // exactly 2×: not yet
        let e = line_silent(0.0, 2.0 * hour + 1.0, hour, &p).unwrap();
        check(&e.into_iter().collect::<Vec<_>>(), &["line_silent"]);
        assert!(matches!(
            line_silent(0.0, 1.0, 0.0, &p),
            Err(QcError::InvalidParameter { name: "expected_interval_s", .. })
        ));
    }

    #[test]
    fn dropped_share_and_out_of_service_events() {
        let mut run = Run::new(24);
        run.warm_up(5, 1);
        let p = EventParams::default();
        let clean = run.check(&run.synth.epoch(100, REALISTIC));
        check(&epoch_events(&clean, &[], &p).unwrap(), &[]);
        // A cut section of 6 electrodes drops well over 20 % of the readings; after three
        // such epochs the electrodes go out of service.
        let mut rng = StdRng::seed_from_u64(9);
        let mut last = Vec::new();
        for k in 0..3 {
            let mut readings = run.synth.epoch(200 + k, REALISTIC);
            for e in 18..24 {
                run.synth.kill(&mut readings, e, true, &mut rng);
            }
            let (out, transitions) = run.step(&readings, 1e5 + k as f64);
            assert!(out.dropped_share() > 0.2, "{}", out.dropped_share());
            last = epoch_events(&out, &transitions, &p).unwrap();
        }
        let mut want = vec!["dropped_share"];
        want.extend(["electrode_out_of_service"; 6]);
        check(&last, &want);
        assert_eq!(
            last[1],
            QualityEvent::ElectrodeOutOfService { electrode: 18, time_s: 1e5 + 2.0 }
        );
    }

    #[test]
    fn error_model_worsening_by_the_stated_rule() {
        // Seeded pairs with Gaussian error of relative size b (no absolute term).
        let pairs = |b: f64, seed: u64| -> Vec<ReciprocalPair> {
            let mut rng = StdRng::seed_from_u64(seed);
            (0..1000)
                .map(|_| {
                    let r: f64 = rng.random_range(0.05..5.0);
                    let e1: f64 = rng.sample(StandardNormal);
                    let e2: f64 = rng.sample(StandardNormal);
                    ReciprocalPair {
                        normal_ohm: r * (1.0 + b * e1),
                        reciprocal_ohm: r * (1.0 + b * e2),
                    }
                })
                .collect()
        };
        let fp = FitParams { b_floor: 0.001, ..FitParams::default() };
        let low = fit_error_model(&pairs(0.01, 1), &fp).unwrap();
        let high = fit_error_model(&pairs(0.03, 2), &fp).unwrap();
        assert!(low.is_fitted() && high.is_fitted());
        let p = EventParams::default();
        let e = error_model_worsening(&low, &high, &p).unwrap().unwrap();
        let QualityEvent::ErrorModelWorsening { previous_relative, current_relative, .. } = e
        else {
            panic!("{e:?}")
        };
        // Generated 3 % against 1 %: the ratio is about 3, above the default 1.5.
        assert!((current_relative / previous_relative - 3.0).abs() < 0.6, "{e:?}");
        assert_eq!(error_model_worsening(&high, &low, &p), Ok(None)); // improving
        assert_eq!(error_model_worsening(&low, &low, &p), Ok(None)); // unchanged
        let default = ErrorModelFit::default_only(&fp, "no pairs");
        assert_eq!(error_model_worsening(&default, &high, &p), Ok(None));
    }
}
