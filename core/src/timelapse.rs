//! Time-lapse inversion of an epoch against a baseline: ratio and difference
//! inversions.
//!
//! Units as in [`crate::inversion`]: m = ln ρ per section cell (ρ in Ω·m),
//! data in ln|R| (R in Ω). Only quadrupoles used in the baseline inversion and
//! present in the epoch with the same sign of R (that of K) enter; the
//! baseline may combine several quiet epochs ([`EpochData::median_of`],
//! per-quadrupole median) and is inverted once ([`Baseline::new`]).
//!
//! * Ratio inversion (Daily, Ramirez, LaBrecque & Nitao 1992, *Water Resour.
//!   Res.* 28, 1429–1442): the data R_t/R_0 · R_hom, with R_hom the response of
//!   a homogeneous model ρ_hom (the baseline's median apparent resistivity),
//!   are inverted with m_ref = ln ρ_hom; the image is ρ/ρ_hom = ρ_t/ρ_0. In log
//!   units d_i = ln|R_t,i| − ln|R_0,i| + ln|R_hom,i|.
//! * Difference inversion (LaBrecque & Yang 2001, *JEEG* 6, 83–89):
//!   minimise ‖W_d[(d_t − d_0) − (f(m) − f(m_0))]‖² + λ‖W_m(m − m_0)‖², m_0 the
//!   baseline model: a standard inversion of d_i = d_t,i − d_0,i + f_i(m_0)
//!   with reference m_0; the image is ρ_t/ρ_0 = exp(m − m_0).
//!
//! Both use λ fixed at the baseline inversion's value: with λ chosen anew per
//! epoch, changing noise changes the resolution and paints false change
//! (LaBrecque, Miletto, Daily, Ramirez & Owen 1996, *Geophysics* 61, 538–548).
//! The error of a log ratio of two independent readings is
//! ε_i = √(ε_t,i² + ε_0,i² + e_mod²) (relative errors from the error model,
//! e_mod the modelling floor of [`InversionParams`]).
//!
//! Linearisation: either Gauss–Newton with the Jacobian recomputed at each
//! model, or the baseline's Jacobian kept (at m_0 for the difference, at the
//! homogeneous model for the ratio inversion): every iteration then costs one
//! forward run and no Jacobian, a simplified Gauss–Newton iteration that is
//! accurate while the change is small enough for the linearisation about the
//! baseline to hold (METHODS §8: reuse across epochs of the linearised step
//! about m_0). Changes are reported as percent, 100·(ρ_t/ρ_0 − 1), with the
//! coverage mask of the epoch's data.

use thiserror::Error;

use crate::errormodel::ErrorModel;
use crate::forward::{Forward, Resistivity};
use std::sync::OnceLock;

use crate::inversion::{
    EpochData, Gram, InversionError, InversionParams, InversionReport, JacobianSource,
    LambdaStrategy, Norm, Problem, StartModel, gauss_newton, log_model, prepare, relative_error,
};
use crate::sequence::{Quadrupole, Sequence};

/// Why a time-lapse inversion cannot be computed.
#[derive(Debug, Error, PartialEq)]
pub enum TimeLapseError {
    /// The underlying inversion failed.
    #[error("{0}")]
    Inversion(#[from] InversionError),
    /// The baseline was built for another sequence.
    #[error("the baseline has {baseline} quadrupoles, the sequence {sequence}")]
    SequenceMismatch {
        /// Quadrupoles in the baseline's sequence.
        baseline: usize,
        /// Quadrupoles in the given sequence.
        sequence: usize,
    },
    /// No quadrupole is usable in both epochs.
    #[error("no quadrupole is usable in both the baseline and the epoch")]
    NoCommonData,
}

/// Which time-lapse formulation.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TimeLapseMode {
    /// Ratio inversion (Daily et al. 1992).
    Ratio,
    /// Difference inversion (LaBrecque & Yang 2001).
    Difference,
}

/// Where the Jacobian of the time-lapse iterations comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Linearisation {
    /// Recomputed at every model (Gauss–Newton).
    Update,
    /// The baseline's, kept fixed (simplified Gauss–Newton; one forward run
    /// per iteration).
    Baseline,
}

/// Settings of a time-lapse inversion.
#[derive(Debug, Clone, PartialEq)]
pub struct TimeLapseParams {
    /// Ratio or difference.
    pub mode: TimeLapseMode,
    /// Jacobian policy.
    pub linearisation: Linearisation,
    /// Inversion settings; the λ strategy is replaced by the baseline's fixed λ.
    pub inversion: InversionParams,
}

/// A baseline: the combined quiet-epoch data, its inversion, and what the
/// time-lapse inversions reuse (responses and Jacobians). Holds two dense
/// Jacobians (8 bytes × used data × cells each).
#[derive(Debug, Clone)]
pub struct Baseline {
    n_quadrupoles: usize,
    data: EpochData,
    report: InversionReport,
    /// Per sequence position: index into the used list.
    slot: Vec<Option<usize>>,
    eps0: Vec<f64>,
    ln_r0: Vec<f64>,
    f0: Vec<f64>,
    jac0: Vec<f64>,
    rho_hom: f64,
    f_hom: Vec<f64>,
    jac_hom: Vec<f64>,
    /// J H⁻¹ Jᵀ of `jac_hom` and `jac0`, made on first use by an inversion
    /// with the baseline's Jacobian (ratio, difference).
    grams: [OnceLock<Gram>; 2],
}

impl Baseline {
    /// Combines `epochs` (one or more, on `sequence`) by per-quadrupole median
    /// and inverts the result with `params` (Occam λ, or fixed).
    pub fn new(
        forward: &Forward,
        sequence: &Sequence,
        epochs: &[EpochData],
        errors: &ErrorModel,
        params: &InversionParams,
    ) -> Result<Self, TimeLapseError> {
        let data = EpochData::median_of(epochs)?;
        let prepared = prepare(forward, sequence, &data, errors, params)?;
        let p = forward.mesh().section().len();
        let m_ref = vec![prepared.median_rho_a.ln(); p];
        let rho_hom = prepared.median_rho_a;
        let used = prepared.used.clone();
        let eps0: Vec<f64> = used
            .iter()
            .map(|&i| relative_error(errors, data.resistances()[i].expect("used"), 0.0))
            .collect();
        let ln_r0 = prepared.data.clone();
        let sub = prepared.sequence.clone();
        let problem = Problem {
            forward,
            sequence: prepared.sequence,
            data: prepared.data,
            eps: prepared.eps,
            m_ref: m_ref.clone(),
            jacobian: JacobianSource::Update,
            used: prepared.used,
        };
        let outcome = gauss_newton(&problem, m_ref, params)?;
        let mut report = outcome.report;
        report.warnings.splice(0..0, prepared.warnings);
        let (f0, jac0) = if outcome.jacobian_current {
            (report.response.iter().map(|r| ln_abs(*r)).collect(), outcome.jacobian)
        } else {
            let (sim, j) = forward
                .simulate_with_jacobian(Resistivity::Cells(&report.model), &sub)
                .map_err(InversionError::from)?;
            (sim.resistances().iter().map(|r| ln_abs(*r)).collect(), j.into_values())
        };
        let hom = vec![rho_hom; p];
        let (sim, jh) = forward
            .simulate_with_jacobian(Resistivity::Cells(&hom), &sub)
            .map_err(InversionError::from)?;
        let mut slot = vec![None; sequence.len()];
        for (k, &i) in used.iter().enumerate() {
            slot[i] = Some(k);
        }
        Ok(Self {
            n_quadrupoles: sequence.len(),
            data,
            report,
            slot,
            eps0,
            ln_r0,
            f0,
            jac0,
            rho_hom,
            f_hom: sim.resistances().iter().map(|r| ln_abs(*r)).collect(),
            jac_hom: jh.into_values(),
            grams: [OnceLock::new(), OnceLock::new()],
        })
    }

    /// Makes, once, what inversions with the baseline's Jacobian
    /// ([`Linearisation::Baseline`]) reuse for `mode`: J H⁻¹ Jᵀ of that
    /// Jacobian (one sparse solve with a right-hand side per datum and a
    /// P × M × M product). Otherwise it is made on first use.
    pub fn prepare(
        &self,
        forward: &Forward,
        mode: TimeLapseMode,
        params: &InversionParams,
    ) -> Result<(), TimeLapseError> {
        self.gram(forward, mode, params).map(|_| ())
    }

    /// The [`Gram`] of the Jacobian `mode` linearises about (made once), or
    /// `None` when it does not serve `params` (a robust model norm, or other
    /// roughness settings than the first use's).
    fn gram(
        &self,
        forward: &Forward,
        mode: TimeLapseMode,
        params: &InversionParams,
    ) -> Result<Option<&Gram>, TimeLapseError> {
        if params.model_norm != Norm::L2 {
            return Ok(None);
        }
        let (cell, jac) = match mode {
            TimeLapseMode::Ratio => (&self.grams[0], &self.jac_hom),
            TimeLapseMode::Difference => (&self.grams[1], &self.jac0),
        };
        let gram = match cell.get() {
            Some(g) => g,
            None => {
                let g = Gram::new(forward, jac, &params.roughness)?;
                cell.get_or_init(|| g)
            }
        };
        Ok(gram.fits(&params.roughness).then_some(gram))
    }

    /// The combined baseline data.
    pub fn data(&self) -> &EpochData {
        &self.data
    }

    /// The baseline inversion (m_0, its λ, coverage and mask).
    pub fn report(&self) -> &InversionReport {
        &self.report
    }

    /// The fixed λ the time-lapse inversions use.
    pub fn lambda(&self) -> f64 {
        self.report.lambda()
    }

    /// ρ_hom (Ω·m): the homogeneous reference of the ratio inversion.
    pub fn homogeneous_ohm_m(&self) -> f64 {
        self.rho_hom
    }
}

/// Outcome of a time-lapse inversion.
#[derive(Debug, Clone, PartialEq)]
pub struct ChangeReport {
    mode: TimeLapseMode,
    inversion: InversionReport,
    ratio: Vec<f64>,
    percent: Vec<f64>,
}

impl ChangeReport {
    /// The formulation used.
    pub fn mode(&self) -> TimeLapseMode {
        self.mode
    }

    /// The inversion behind the change: its model (Ω·m per cell) is ρ_t for
    /// the difference inversion and ρ_hom·ρ_t/ρ_0 for the ratio inversion —
    /// the warm start of the next epoch in the same mode — with its χ²,
    /// iterations, coverage, mask and warnings.
    pub fn inversion(&self) -> &InversionReport {
        &self.inversion
    }

    /// ρ_t/ρ_0 per cell.
    pub fn ratio(&self) -> &[f64] {
        &self.ratio
    }

    /// 100·(ρ_t/ρ_0 − 1) per cell, percent.
    pub fn percent_change(&self) -> &[f64] {
        &self.percent
    }

    /// Per cell, true inside the coverage mask of the epoch's data.
    pub fn mask(&self) -> &[bool] {
        self.inversion.mask()
    }
}

/// Inverts `epoch` against `baseline` in the mode of `params`, starting from
/// `warm_start` (the previous epoch's [`ChangeReport::inversion`] model in the
/// same mode, Ω·m per cell) or from the reference model.
pub fn invert_change(
    forward: &Forward,
    sequence: &Sequence,
    baseline: &Baseline,
    epoch: &EpochData,
    errors: &ErrorModel,
    warm_start: StartModel<'_>,
    params: &TimeLapseParams,
) -> Result<ChangeReport, TimeLapseError> {
    if sequence.len() != baseline.n_quadrupoles {
        return Err(TimeLapseError::SequenceMismatch {
            baseline: baseline.n_quadrupoles,
            sequence: sequence.len(),
        });
    }
    if epoch.len() != sequence.len() {
        return Err(InversionError::Length {
            what: "epoch data",
            expected: sequence.len(),
            got: epoch.len(),
        }
        .into());
    }
    let p = forward.mesh().section().len();
    let e_mod = params.inversion.modelling_error;
    let mut used = Vec::new();
    let mut rows = Vec::new();
    let mut data = Vec::new();
    let mut eps = Vec::new();
    let mut dropped = 0;
    for (i, r_t) in epoch.resistances().iter().enumerate() {
        let Some(k) = baseline.slot[i] else { continue };
        let r0 = baseline.data.resistances()[i].expect("used in the baseline");
        match r_t {
            Some(r) if r * r0 > 0.0 => {
                let e_t = relative_error(errors, *r, 0.0);
                let dlog = ln_abs(*r) - baseline.ln_r0[k];
                data.push(match params.mode {
                    TimeLapseMode::Ratio => dlog + baseline.f_hom[k],
                    TimeLapseMode::Difference => dlog + baseline.f0[k],
                });
                eps.push((e_t * e_t + baseline.eps0[k].powi(2) + e_mod * e_mod).sqrt());
                used.push(i);
                rows.push(k);
            }
            Some(_) => dropped += 1,
            None => {}
        }
    }
    if used.is_empty() {
        return Err(TimeLapseError::NoCommonData);
    }
    let quads: Vec<Quadrupole> = used.iter().map(|&i| sequence.quadrupoles()[i]).collect();
    let sub = Sequence::new(quads, sequence.n_electrodes()).map_err(InversionError::from)?;
    let m_ref: Vec<f64> = match params.mode {
        TimeLapseMode::Ratio => vec![baseline.rho_hom.ln(); p],
        TimeLapseMode::Difference => baseline.report.model().iter().map(|v| v.ln()).collect(),
    };
    let m0 = match warm_start {
        StartModel::MedianApparent => m_ref.clone(),
        StartModel::Model(v) => log_model(v, p, "warm start")?,
    };
    let jacobian = match params.linearisation {
        Linearisation::Update => JacobianSource::Update,
        Linearisation::Baseline => {
            let full = match params.mode {
                TimeLapseMode::Ratio => &baseline.jac_hom,
                TimeLapseMode::Difference => &baseline.jac0,
            };
            let mut j = Vec::with_capacity(rows.len() * p);
            for &k in &rows {
                j.extend_from_slice(&full[k * p..(k + 1) * p]);
            }
            let gram = baseline.gram(forward, params.mode, &params.inversion)?;
            JacobianSource::Fixed(j, gram.map(|g| (g, rows.clone())))
        }
    };
    let problem =
        Problem { forward, sequence: sub, data, eps, m_ref: m_ref.clone(), jacobian, used };
    let inv = InversionParams {
        lambda: LambdaStrategy::Fixed(baseline.lambda()),
        ..params.inversion.clone()
    };
    let mut report = gauss_newton(&problem, m0, &inv)?.report;
    if dropped > 0 {
        report.warnings.insert(
            0,
            format!("{dropped} readings left out: their sign differs from the baseline's"),
        );
    }
    let ratio: Vec<f64> =
        report.model().iter().zip(&m_ref).map(|(rho, r)| (rho.ln() - r).exp()).collect();
    let percent = ratio.iter().map(|q| 100.0 * (q - 1.0)).collect();
    Ok(ChangeReport { mode: params.mode, inversion: report, ratio, percent })
}

fn ln_abs(r: f64) -> f64 {
    r.abs().max(f64::MIN_POSITIVE).ln()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::inversion::tests::{coarse, flat_line, forward_for, sequence, synthetic};
    use crate::mesh::MeshParams;
    use crate::model::{Body, Layer, ModelDescription};
    use crate::noise::NoiseParams;
    use crate::section::SectionGrid;

    /// The zone that changes: x 22–25 m, z −1 to −3 m (3 m × 2 m).
    const ZONE: [f64; 4] = [22.0, 25.0, -3.0, -1.0];

    fn distance_to_zone(c: [f64; 2]) -> f64 {
        let dx = (ZONE[0] - c[0]).max(c[0] - ZONE[1]).max(0.0);
        let dz = (ZONE[2] - c[1]).max(c[1] - ZONE[3]).max(0.0);
        dx.hypot(dz)
    }

    /// 100 Ω·m over 40 Ω·m below 5 m, the zone at `zone_rho`.
    fn truth(zone_rho: Option<f64>) -> ModelDescription {
        let [x0, x1, z0, z1] = ZONE;
        let bodies = zone_rho
            .map(|rho| vec![Body { polygon: vec![[x0, z0], [x1, z0], [x1, z1], [x0, z1]], rho }])
            .unwrap_or_default();
        ModelDescription::new(100.0, vec![Layer { top: -5.0, rho: 40.0 }], bodies).unwrap()
    }

    /// Checks a change image: the strongest decrease in the mask lies in the
    /// zone and masked cells more than 3 m away change by less than 5 %.
    fn check(section: &SectionGrid, report: &ChangeReport) -> (f64, f64) {
        let cells = section.cells();
        let (mut strongest, mut at) = (0.0, [0.0; 2]);
        let mut far: f64 = 0.0;
        for ((c, &pc), &m) in cells.iter().zip(report.percent_change()).zip(report.mask()) {
            if !m {
                continue;
            }
            if pc < strongest {
                strongest = pc;
                at = c.centroid();
            }
            if distance_to_zone(c.centroid()) > 3.0 {
                far = far.max(pc.abs());
            }
        }
        assert!(
            distance_to_zone(at) == 0.0,
            "{:?}: strongest change {strongest:.1} % at {at:?}",
            report.mode()
        );
        assert!(far < 5.0, "{:?}: a cell > 3 m from the zone changes by {far:.2} %", report.mode());
        (strongest, far)
    }

    #[test]
    fn ratio_and_difference_find_the_change_and_ignore_noise() {
        // A −40 % change in a 3 m × 2 m zone (x 22–25 m, 1–3 m deep) in a
        // two-layer ground, 48 electrodes; every epoch from a finer forward
        // mesh with independent 2 % noise. The baseline is the median of three
        // quiet epochs. Expected (LaBrecque & Yang 2001; Daily et al. 1992):
        // both formulations put the strongest decrease inside the zone and
        // change cells more than 3 m away by less than 5 %. With no change, no
        // masked cell may change by more than 3 % — the noise of a single
        // log-ratio datum, √2 × 2 %: a regularised image averages many data,
        // so noise alone should stay below that of one reading.
        let line = flat_line(48, 1.0);
        let seq = sequence(48);
        let fine = forward_for(&line, &MeshParams::default());
        let noise = |seed| Some(NoiseParams { relative: 0.02, absolute: 0.0, seed });
        let quiet: Vec<EpochData> =
            (1..=3).map(|s| synthetic(&fine, &seq, &truth(None), noise(s))).collect();
        let changed = synthetic(&fine, &seq, &truth(Some(60.0)), noise(4));
        let unchanged = synthetic(&fine, &seq, &truth(None), noise(5));
        let fwd = forward_for(&line, &coarse());
        let errors = ErrorModel::new(0.0, 0.02).unwrap();
        let inv = InversionParams::default();
        let baseline = Baseline::new(&fwd, &seq, &quiet, &errors, &inv).unwrap();
        println!(
            "baseline: {} iterations, χ²/N {:?}, λ {:.3e}",
            baseline.report().iterations(),
            baseline.report().chi2_history(),
            baseline.lambda()
        );
        let section = fwd.mesh().section();
        for mode in [TimeLapseMode::Ratio, TimeLapseMode::Difference] {
            for linearisation in [Linearisation::Update, Linearisation::Baseline] {
                let params = TimeLapseParams { mode, linearisation, inversion: inv.clone() };
                let run = |epoch: &EpochData| {
                    invert_change(
                        &fwd,
                        &seq,
                        &baseline,
                        epoch,
                        &errors,
                        StartModel::MedianApparent,
                        &params,
                    )
                    .unwrap()
                };
                let report = run(&changed);
                let (strongest, far) = check(section, &report);
                let quiet = run(&unchanged);
                let noise_max = quiet
                    .percent_change()
                    .iter()
                    .zip(quiet.mask())
                    .filter(|(_, m)| **m)
                    .fold(0.0f64, |a, (v, _)| a.max(v.abs()));
                println!(
                    "{mode:?}/{linearisation:?}: {} iterations, χ²/N {:.3}, strongest {strongest:.1} %, far {far:.2} %, no-change max {noise_max:.2} % ({} iterations)",
                    report.inversion().iterations(),
                    report.inversion().chi2(),
                    quiet.inversion().iterations()
                );
                assert!(
                    noise_max < 3.0,
                    "{mode:?}/{linearisation:?}: noise alone changes a cell by {noise_max:.2} %"
                );
                assert!(report.inversion().converged(), "{:?}", report.inversion().warnings());
            }
        }
        // Input errors name what is wrong.
        let short = EpochData::new(
            &Sequence::new(seq.quadrupoles()[..3].to_vec(), 48).unwrap(),
            vec![None; 3],
        )
        .unwrap();
        let params = TimeLapseParams {
            mode: TimeLapseMode::Ratio,
            linearisation: Linearisation::Baseline,
            inversion: inv.clone(),
        };
        assert_eq!(
            invert_change(
                &fwd,
                &seq,
                &baseline,
                &short,
                &errors,
                StartModel::MedianApparent,
                &params
            ),
            Err(TimeLapseError::Inversion(InversionError::Length {
                what: "epoch data",
                expected: seq.len(),
                got: 3
            }))
        );
        let empty = EpochData::new(&seq, vec![None; seq.len()]).unwrap();
        assert_eq!(
            invert_change(
                &fwd,
                &seq,
                &baseline,
                &empty,
                &errors,
                StartModel::MedianApparent,
                &params
            ),
            Err(TimeLapseError::NoCommonData)
        );
    }
}
