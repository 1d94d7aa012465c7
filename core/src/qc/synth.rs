//! Synthetic epochs for the quality-control tests (test builds only).
//!
//! Transfer resistances come from the analytic two-layer earth: a point source of
//! current I on the surface of a layer ρ1 of thickness h over a half-space ρ2 gives
//! V(r) = ρ1 I/(2π) [1/r + 2 Σ_{n≥1} kⁿ/√(r² + (2nh)²)], k = (ρ2 − ρ1)/(ρ2 + ρ1)
//! (image series, Telford, Geldart & Sheriff, *Applied Geophysics*, 2nd ed., 1990;
//! METHODS §2.2), superposed over A, B, M, N. Noise, currents, contacts and faults are
//! drawn from seeded generators; the numbers are invented for the tests.

use std::f64::consts::PI;

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::StandardNormal;

use super::Reading;
use crate::geometry::{Electrode, LineGeometry};
use crate::sequence::{Quadrupole, Sequence, geometric_factor_flat};

/// Potential (V) at distance `r` (m) from a 1 A surface source over a two-layer earth.
pub(crate) fn two_layer_potential(rho1: f64, rho2: f64, h: f64, r: f64) -> f64 {
    let k = (rho2 - rho1) / (rho2 + rho1);
    // |k|ⁿ < 1e-15 after n = ln(1e-15)/ln|k| terms (METHODS §2.2).
    let n_terms = if k.abs() < 1e-12 { 0 } else { ((1e-15f64).ln() / k.abs().ln()).ceil() as i32 };
    let series: f64 =
        (1..=n_terms).map(|n| k.powi(n) / (r * r + (2.0 * n as f64 * h).powi(2)).sqrt()).sum();
    rho1 / (2.0 * PI) * (1.0 / r + 2.0 * series)
}

/// Transfer resistance (Ω) of a quadrupole on a flat line over the two-layer earth.
pub(crate) fn two_layer_resistance(
    line: &LineGeometry,
    q: &Quadrupole,
    rho1: f64,
    rho2: f64,
    h: f64,
) -> f64 {
    let v = |src: usize, rec: usize| two_layer_potential(rho1, rho2, h, line.distance(src, rec));
    let mut r = v(q.a, q.m);
    if let Some(n) = q.n {
        r -= v(q.a, n);
    }
    if let Some(b) = q.b {
        r -= v(b, q.m);
        if let Some(n) = q.n {
            r += v(b, n);
        }
    }
    r
}

/// Noise of the synthetic meter: each reading's error is Gaussian with standard
/// deviation `abs_ohm + rel·|R|` (the a + b|R| model of METHODS §3.2).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Noise {
    pub rel: f64,
    pub abs_ohm: f64,
}

/// Realistic noise for a permanent line: 1 % relative plus 0.2 mΩ absolute (0.02 mV at
/// 100 mA). Typical orders of magnitude, from memory.
pub(crate) const REALISTIC: Noise = Noise { rel: 0.01, abs_ohm: 2e-4 };

/// A flat line with a dipole–dipole sequence and all its reciprocals.
pub(crate) struct Synth {
    pub seq: Sequence,
    pub k: Vec<f64>,
    pub r_true: Vec<f64>,
    /// Base contact resistance per electrode, Ω.
    pub contact: Vec<f64>,
}

impl Synth {
    /// `n_el` electrodes 1 m apart; dipole–dipole with dipole lengths 1 and 2 m, n = 1…6,
    /// each quadrupole followed later by its reciprocal; a 100 Ω·m layer 2 m thick over
    /// 30 Ω·m.
    pub(crate) fn new(n_el: usize) -> Self {
        let line = LineGeometry::new(
            (0..n_el).map(|i| Electrode::new(format!("E{}", i + 1), i as f64, 0.0)).collect(),
        )
        .unwrap();
        let mut normals = Vec::new();
        for s in [1, 2] {
            for n in 1..=6 {
                for a in 0..n_el {
                    let (b, m) = (a + s, a + s + n * s);
                    if m + s < n_el {
                        normals.push(Quadrupole::new(a, b, m, m + s));
                    }
                }
            }
        }
        let recips: Vec<Quadrupole> = normals.iter().map(|q| q.reciprocal()).collect();
        let quads: Vec<Quadrupole> = normals.into_iter().chain(recips).collect();
        let seq = Sequence::new(quads, n_el).unwrap();
        let k: Vec<f64> =
            seq.quadrupoles().iter().map(|q| geometric_factor_flat(&line, q).unwrap()).collect();
        let r_true = seq
            .quadrupoles()
            .iter()
            .map(|q| two_layer_resistance(&line, q, 100.0, 30.0, 2.0))
            .collect();
        let mut rng = StdRng::seed_from_u64(99);
        let contact = (0..n_el).map(|_| rng.random_range(600.0..1500.0)).collect();
        Self { seq, k, r_true, contact }
    }

    /// A clean epoch: every quadrupole read once with `noise`, 100 mA ± 5 %, stacking
    /// error |N(0, 0.3)| %, contact resistances within ±5 % of the base, each true
    /// resistance multiplied by `change[quad]`.
    pub(crate) fn epoch_with_change(
        &self,
        seed: u64,
        noise: Noise,
        change: &[f64],
    ) -> Vec<Reading> {
        let mut rng = StdRng::seed_from_u64(seed);
        let quads = self.seq.quadrupoles();
        (0..self.seq.len())
            .map(|i| {
                let r0 = self.r_true[i] * change[i];
                let e: f64 = rng.sample(StandardNormal);
                let r = r0 + (noise.abs_ohm + noise.rel * r0.abs()) * e;
                let current: f64 = 100.0 * (1.0 + 0.05 * rng.sample::<f64, _>(StandardNormal));
                let stack: f64 = 0.3 * rng.sample::<f64, _>(StandardNormal);
                let mut contact = |e: usize| {
                    self.contact[e] * (1.0 + 0.05 * rng.sample::<f64, _>(StandardNormal))
                };
                let (ca, cb) = (contact(quads[i].a), quads[i].b.map(&mut contact));
                Reading {
                    quad: i,
                    resistance_ohm: r,
                    current_ma: Some(current),
                    voltage_mv: Some(r * current),
                    stack_error_pct: Some(stack.abs()),
                    contact_a_ohm: Some(ca),
                    contact_b_ohm: cb,
                }
            })
            .collect()
    }

    /// A clean epoch (no change of the ground).
    pub(crate) fn epoch(&self, seed: u64, noise: Noise) -> Vec<Reading> {
        self.epoch_with_change(seed, noise, &vec![1.0; self.seq.len()])
    }

    /// Makes electrode `e` dead (open circuit): readings using it return garbage (the
    /// true value times e^{N(0,1)} with a random sign); as a current electrode it shows
    /// a contact resistance of 500 kΩ and a current of 0.02 mA when `with_contact`
    /// (otherwise its contact readings stay unremarkable).
    pub(crate) fn kill(
        &self,
        readings: &mut [Reading],
        e: usize,
        with_contact: bool,
        rng: &mut StdRng,
    ) {
        let quads = self.seq.quadrupoles();
        for r in readings.iter_mut() {
            let q = &quads[r.quad];
            if !q.uses(e) {
                continue;
            }
            let sign = if rng.random::<bool>() { 1.0 } else { -1.0 };
            let f: f64 = rng.sample(StandardNormal);
            r.resistance_ohm = self.r_true[r.quad] * f.exp() * sign;
            if with_contact && (q.a == e || q.b == Some(e)) {
                r.current_ma = Some(0.02);
                if q.a == e {
                    r.contact_a_ohm = Some(5e5);
                } else {
                    r.contact_b_ohm = Some(5e5);
                }
            }
            r.voltage_mv = r.current_ma.map(|i| i * r.resistance_ohm);
        }
    }
}

/// Quality control run epoch after epoch on a synthetic line, as the server would:
/// history and electrode health carried from one epoch to the next.
pub(crate) struct Run {
    pub synth: Synth,
    pub params: super::QcParams,
    pub history: super::QcHistory,
    pub health: super::health::ElectrodeHealth,
}

impl Run {
    /// A run on a line of `n_el` electrodes with a 10-epoch history window.
    pub(crate) fn new(n_el: usize) -> Self {
        let synth = Synth::new(n_el);
        let history = super::QcHistory::new(synth.seq.len(), n_el, 10).unwrap();
        let health =
            super::health::ElectrodeHealth::new(n_el, super::health::HealthParams::default())
                .unwrap();
        Self { synth, params: super::QcParams::default(), history, health }
    }

    /// Checks one epoch against the current history and health (nothing recorded).
    pub(crate) fn check(&self, readings: &[Reading]) -> super::EpochQc {
        self.check_with_k(readings, &self.synth.k)
    }

    /// As [`Self::check`] with other geometric factors.
    pub(crate) fn check_with_k(&self, readings: &[Reading], k: &[f64]) -> super::EpochQc {
        super::check_epoch(
            &super::QcInput {
                sequence: &self.synth.seq,
                geometric_factors_m: k,
                readings,
                history: &self.history,
                in_service: self.health.in_service(),
            },
            &self.params,
        )
        .unwrap()
    }

    /// Checks an epoch, then records it into the history and the health tracker at
    /// `time_s`; returns the outcome and the health transitions.
    pub(crate) fn step(
        &mut self,
        readings: &[Reading],
        time_s: f64,
    ) -> (super::EpochQc, Vec<super::health::HealthTransition>) {
        let out = self.check(readings);
        self.history.record(&out).unwrap();
        let transitions = self.health.update(&out, time_s).unwrap();
        (out, transitions)
    }

    /// Runs `n` clean epochs with realistic noise (seeds from `seed0`).
    pub(crate) fn warm_up(&mut self, n: u64, seed0: u64) {
        for s in 0..n {
            let readings = self.synth.epoch(seed0 + s, REALISTIC);
            self.step(&readings, (seed0 + s) as f64 * 3600.0);
        }
    }
}
