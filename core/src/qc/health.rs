//! Electrode health over time: persistent flags take an electrode out of service.
//!
//! Each epoch's [`EpochQc`] says which electrodes were flagged. An electrode flagged in
//! `flags_to_out_of_service` consecutive epochs (an unflagged epoch resets the count) is
//! marked out of service; it stays so, whatever later epochs show, until an operator
//! returns it with [`ElectrodeHealth::return_to_service`]. Every change of state is
//! recorded as a [`HealthTransition`] with the time passed in by the caller (seconds on
//! the caller's clock, e.g. Unix time; this module never reads a clock). Readings using an
//! out-of-service electrode are dropped by [`super::check_epoch`] through
//! [`ElectrodeHealth::in_service`].

use super::{ElectrodeFlag, EpochQc, QcError, require};

/// Settings of the health tracker.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HealthParams {
    /// Consecutive flagged epochs that take an electrode out of service (≥ 1). Default
    /// 3: common practice, no source (one bad epoch is often a passing glitch).
    pub flags_to_out_of_service: usize,
}

impl Default for HealthParams {
    fn default() -> Self {
        Self { flags_to_out_of_service: 3 }
    }
}

/// State of one electrode.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ElectrodeState {
    /// In service, flagged in this many consecutive epochs up to the latest.
    InService {
        /// Consecutive flagged epochs (0 when the latest epoch did not flag it).
        consecutive_flags: usize,
    },
    /// Out of service since `since_s`.
    OutOfService {
        /// Time of the transition, seconds.
        since_s: f64,
    },
}

/// What changed.
#[derive(Debug, Clone, PartialEq)]
pub enum TransitionKind {
    /// Taken out of service after persistent flags; the flags of the last epoch.
    OutOfService {
        /// Consecutive flagged epochs that led to it.
        consecutive_flags: usize,
        /// The flags of the epoch that completed the run.
        flags: Vec<ElectrodeFlag>,
    },
    /// Returned to service by an operator.
    ReturnedToService,
}

impl TransitionKind {
    /// Stable short code for storage and the API.
    pub fn code(&self) -> &'static str {
        match self {
            TransitionKind::OutOfService { .. } => "out_of_service",
            TransitionKind::ReturnedToService => "returned_to_service",
        }
    }
}

/// A recorded change of an electrode's state.
#[derive(Debug, Clone, PartialEq)]
pub struct HealthTransition {
    /// Electrode index.
    pub electrode: usize,
    /// Time of the change, seconds on the caller's clock.
    pub time_s: f64,
    /// What changed.
    pub kind: TransitionKind,
}

/// Health of every electrode of a line, with the history of transitions.
#[derive(Debug, Clone, PartialEq)]
pub struct ElectrodeHealth {
    params: HealthParams,
    states: Vec<ElectrodeState>,
    in_service: Vec<bool>,
    transitions: Vec<HealthTransition>,
}

impl ElectrodeHealth {
    /// All `n_electrodes` electrodes in service.
    pub fn new(n_electrodes: usize, params: HealthParams) -> Result<Self, QcError> {
        require(
            params.flags_to_out_of_service >= 1,
            "flags_to_out_of_service",
            params.flags_to_out_of_service as f64,
            "≥ 1",
        )?;
        Ok(Self {
            params,
            states: vec![ElectrodeState::InService { consecutive_flags: 0 }; n_electrodes],
            in_service: vec![true; n_electrodes],
            transitions: Vec::new(),
        })
    }

    /// Restores a tracker from stored states (one per electrode, in cable order) and its
    /// stored transitions, oldest first. In-service counts must be below
    /// `flags_to_out_of_service`; times must be finite.
    pub fn from_states(
        states: Vec<ElectrodeState>,
        transitions: Vec<HealthTransition>,
        params: HealthParams,
    ) -> Result<Self, QcError> {
        let mut h = Self::new(states.len(), params)?;
        for (e, st) in states.iter().enumerate() {
            match *st {
                ElectrodeState::InService { consecutive_flags } => require(
                    consecutive_flags < params.flags_to_out_of_service,
                    "consecutive_flags",
                    consecutive_flags as f64,
                    "below flags_to_out_of_service for an electrode in service",
                )?,
                ElectrodeState::OutOfService { since_s } => {
                    require(since_s.is_finite(), "since_s", since_s, "a finite time")?;
                    h.in_service[e] = false;
                }
            }
        }
        if let Some(t) = transitions.iter().find(|t| t.electrode >= states.len()) {
            return Err(QcError::ElectrodeOutOfRange {
                electrode: t.electrode,
                n_electrodes: states.len(),
            });
        }
        h.states = states;
        h.transitions = transitions;
        Ok(h)
    }

    /// Per electrode, true when in service (pass to [`super::QcInput::in_service`]).
    pub fn in_service(&self) -> &[bool] {
        &self.in_service
    }

    /// State of electrode `e` (None beyond the line).
    pub fn state(&self, e: usize) -> Option<&ElectrodeState> {
        self.states.get(e)
    }

    /// Every transition so far, oldest first.
    pub fn transitions(&self) -> &[HealthTransition] {
        &self.transitions
    }

    /// Takes in an epoch's outcome at time `time_s` (seconds) and returns the
    /// transitions it caused (also appended to [`Self::transitions`]).
    pub fn update(
        &mut self,
        epoch: &EpochQc,
        time_s: f64,
    ) -> Result<Vec<HealthTransition>, QcError> {
        require(time_s.is_finite(), "time_s", time_s, "a finite time")?;
        if epoch.electrodes().len() != self.states.len() {
            return Err(QcError::LengthMismatch {
                what: "epoch electrodes",
                got: epoch.electrodes().len(),
                expected: self.states.len(),
            });
        }
        let mut new = Vec::new();
        for el in epoch.electrodes() {
            let e = el.electrode();
            let ElectrodeState::InService { consecutive_flags } = self.states[e] else {
                continue;
            };
            let count = if el.is_flagged() { consecutive_flags + 1 } else { 0 };
            if count >= self.params.flags_to_out_of_service {
                self.states[e] = ElectrodeState::OutOfService { since_s: time_s };
                self.in_service[e] = false;
                new.push(HealthTransition {
                    electrode: e,
                    time_s,
                    kind: TransitionKind::OutOfService {
                        consecutive_flags: count,
                        flags: el.flags().to_vec(),
                    },
                });
            } else {
                self.states[e] = ElectrodeState::InService { consecutive_flags: count };
            }
        }
        self.transitions.extend(new.iter().cloned());
        Ok(new)
    }

    /// An operator returns electrode `e` to service at `time_s` (after repair or
    /// inspection). Its flag count starts again from zero.
    pub fn return_to_service(
        &mut self,
        e: usize,
        time_s: f64,
    ) -> Result<HealthTransition, QcError> {
        require(time_s.is_finite(), "time_s", time_s, "a finite time")?;
        let n = self.states.len();
        let state = self
            .states
            .get_mut(e)
            .ok_or(QcError::ElectrodeOutOfRange { electrode: e, n_electrodes: n })?;
        if let ElectrodeState::InService { .. } = state {
            return Err(QcError::AlreadyInService { electrode: e });
        }
        *state = ElectrodeState::InService { consecutive_flags: 0 };
        self.in_service[e] = true;
        let t = HealthTransition { electrode: e, time_s, kind: TransitionKind::ReturnedToService };
        self.transitions.push(t.clone());
        Ok(t)
    }
}

#[cfg(test)]
mod tests {
    use rand::SeedableRng;
    use rand::rngs::StdRng;

    use super::super::synth::{REALISTIC, Run};
    use super::super::{DropReason, Rule};
    use super::*;

    /// Runs `epochs` epochs (true = electrode `e` dead) and checks the state after each.
    fn check(run: &mut Run, e: usize, epochs: &[bool], expected: &[ElectrodeState]) {
        let mut rng = StdRng::seed_from_u64(8);
        for (k, (&dead, want)) in epochs.iter().zip(expected).enumerate() {
            let mut readings = run.synth.epoch(1000 + k as u64, REALISTIC);
            if dead {
                run.synth.kill(&mut readings, e, false, &mut rng);
            }
            run.step(&readings, 3600.0 * k as f64);
            assert_eq!(run.health.state(e), Some(want), "after epoch {k}");
        }
    }

    #[test]
    fn persistent_flag_takes_electrode_out_of_service_until_returned() {
        let mut run = Run::new(24);
        run.warm_up(5, 1);
        let s = |n| ElectrodeState::InService { consecutive_flags: n };
        // One bad epoch, then a good one: the count resets.
        check(&mut run, 9, &[true, false], &[s(1), s(0)]);
        // Three bad epochs in a row (the default): out of service at the third.
        check(
            &mut run,
            9,
            &[true, true, true, false],
            &[
                s(1),
                s(2),
                ElectrodeState::OutOfService { since_s: 7200.0 },
                ElectrodeState::OutOfService { since_s: 7200.0 },
            ],
        );
        let t = &run.health.transitions()[0];
        assert_eq!((t.electrode, t.time_s, t.kind.code()), (9, 7200.0, "out_of_service"));
        assert_eq!(run.health.transitions().len(), 1);
        assert!(!run.health.in_service()[9]);
        // Out of service: its readings are dropped naming it, and it is not flagged.
        let out = run.check(&run.synth.epoch(2000, REALISTIC));
        let q = run.synth.seq.quadrupoles();
        for r in out.readings() {
            assert_eq!(
                r.reasons().contains(&DropReason::OutOfService { electrode: 9 }),
                q[r.quad()].uses(9)
            );
        }
        assert!(out.flagged_electrodes().is_empty());
        assert!(!out.electrodes()[9].in_service());
        // Its health figures are still reported: its readings are fine again, so its
        // failing share is down to the clean noise level (a few %).
        assert!(out.electrodes()[9].n_readings() > 0);
        assert!(out.electrodes()[9].fail_share().unwrap() < 0.1);
        assert!(out.count(Rule::OutOfService) > 0);
        // The operator returns it.
        let t = run.health.return_to_service(9, 9e4).unwrap();
        assert_eq!(t.kind, TransitionKind::ReturnedToService);
        assert!(run.health.in_service()[9]);
        assert_eq!(run.health.state(9), Some(&s(0)));
        assert_eq!(run.health.transitions().len(), 2);
        assert_eq!(run.check(&run.synth.epoch(2001, REALISTIC)).count(Rule::OutOfService), 0);
        assert_eq!(
            run.health.return_to_service(9, 9e4),
            Err(QcError::AlreadyInService { electrode: 9 })
        );
        assert_eq!(
            run.health.return_to_service(99, 9e4),
            Err(QcError::ElectrodeOutOfRange { electrode: 99, n_electrodes: 24 })
        );
        // Stored and restored, the tracker is the same.
        let states: Vec<ElectrodeState> = (0..24).map(|e| *run.health.state(e).unwrap()).collect();
        let restored = ElectrodeHealth::from_states(
            states,
            run.health.transitions().to_vec(),
            HealthParams::default(),
        )
        .unwrap();
        assert_eq!(restored, run.health);
    }

    #[test]
    fn invalid_settings_are_named() {
        assert!(matches!(
            ElectrodeHealth::new(8, HealthParams { flags_to_out_of_service: 0 }),
            Err(QcError::InvalidParameter { name: "flags_to_out_of_service", .. })
        ));
        let run = Run::new(24);
        let out = run.check(&run.synth.epoch(1, REALISTIC));
        let mut other = ElectrodeHealth::new(8, HealthParams::default()).unwrap();
        assert!(matches!(other.update(&out, 0.0), Err(QcError::LengthMismatch { .. })));
        assert!(matches!(
            ElectrodeHealth::from_states(
                vec![ElectrodeState::InService { consecutive_flags: 3 }],
                vec![],
                HealthParams::default()
            ),
            Err(QcError::InvalidParameter { name: "consecutive_flags", .. })
        ));
    }
}
