//! Smoothness-constrained Gauss–Newton inversion of one epoch.
//!
//! Parameters m_j = ln ρ_j (ρ in Ω·m) of the section cells
//! ([`crate::section::SectionGrid`]); data d_i = ln|R_i| (R in Ω) of the
//! readings whose R has the sign of the geometric factor K (ρa = K·R > 0;
//! readings of the other sign or without K are left out and counted in the
//! report). The objective (deGroot-Hedlin & Constable 1990, *Geophysics* 55,
//! 1613–1624) is
//!
//! ```text
//!     Φ(m) = ‖W_d(d − f(m))‖² + λ‖W_m(m − m_ref)‖²,   f_i(m) = ln|R_i(m)|,
//! ```
//!
//! W_d = diag(1/ε_i), ε_i = √((σ_R/|R|)² + e_mod²): the relative standard error
//! of the reading from the error model (σ_R = a + b|R|, [`ErrorModel`]; for
//! small errors σ_lnR = σ_R/|R|) combined in quadrature with a relative
//! modelling-error floor e_mod (METHODS §3.2). W_m is the length-weighted
//! first-order roughness with a weak smallness term ([`crate::roughness`]).
//! The Jacobian ∂ln|R|/∂ln ρ comes from the forward model
//! ([`Forward::simulate_with_jacobian`]).
//!
//! Gauss–Newton step: with G = W_d J, z = W_d(d − f(m) + J(m − m_ref)) and
//! H = W_mᵀW_m, the linearised minimiser x = m_new − m_ref solves
//! (GᵀG + λH)x = Gᵀz. It is solved densely, either in model space
//! (P × P Cholesky of GᵀG + λH) or, when there are fewer data M than cells P,
//! in data space through the identity x = H⁻¹Gᵀ(GH⁻¹Gᵀ + λI)⁻¹z (one sparse
//! Cholesky of H with M right-hand sides, then an M × M Cholesky per λ; the
//! linearised misfit is then ‖z − Gx‖² = λ²‖(GH⁻¹Gᵀ + λI)⁻¹z‖²). Dense
//! factorisations rather than conjugate gradients: once GᵀG or GH⁻¹Gᵀ is
//! formed, every trial λ costs one Cholesky, which the Occam search needs
//! several of per iteration (the benchmark records the times).
//!
//! λ strategy (Occam, Constable, Parker & Constable 1987, *Geophysics* 52,
//! 289–300, applied per iteration): λ is searched on the linearised misfit —
//! the largest λ whose predicted χ² reaches the iteration's goal
//! max(χ²_target·N, `goal_factor`·χ²_now) — so the first iterations are
//! strongly smoothed, χ² falls by at most 1/`goal_factor` per iteration (the
//! linearisation stays valid) and, once χ² ≈ N is reachable, the smoothest
//! model that fits is taken: no over-fitting, and no extra forward runs for
//! the search. Or λ is fixed (time-lapse: LaBrecque et al. 1996, *Geophysics*
//! 61, 538–548). Each step is followed by a backtracking line search on the
//! step length (halving until Φ decreases); under Occam λ a failed search is
//! retried with λ raised tenfold. Iteration stops when χ²/N is
//! within `chi2_tolerance` of the target (or below it at the largest λ),
//! when Φ or χ² stops decreasing, or at `max_iterations`; all are reported.
//!
//! Robust norms by iteratively reweighted least squares (Farquharson &
//! Oldenburg 1998, *GJI* 134, 213–227; Loke, Acworth & Dahlin 2003,
//! *Exploration Geophysics* 34, 182–187): Huber weights min(1, c/|r̃_i|) on the
//! normalised residuals r̃_i = (d_i − f_i)/ε_i (L1 beyond c), and likewise on
//! the roughness differences. Under the robust data norm Occam aims at a
//! χ² estimated from the median absolute normalised residual,
//! N·(1.4826·median|r̃|)², which a few outliers cannot inflate (the reported
//! χ² history stays the plain L2 one). Bounds on ρ clamp ln ρ after each step.
//!
//! Start model: homogeneous at the median apparent resistivity (Singha,
//! Johnson, Day-Lewis & Slater 2022, *Electrical Imaging for Hydrogeology*,
//! §4.1) or a given model (warm start). m_ref is the homogeneous median ρa.
//!
//! Coverage (METHODS §3.4): cumulative sensitivity S_j = Σ_i |J_ij|/ε_i / A_j
//! normalised to 1 ([`cumulative_sensitivity`]) with the Jacobian of the last
//! linearisation; the mask keeps cells with S_j ≥ `coverage_threshold` whose
//! centroid lies no deeper than the largest median depth of investigation of
//! the data used (Edwards 1977, [`crate::depth::median_depth`]).

use faer::linalg::matmul::matmul;
use faer::linalg::matmul::triangular::{self, BlockStructure};
use faer::linalg::solvers::{Llt, Solve, SolveCore};
use faer::sparse::linalg::solvers::Llt as SparseLlt;
use faer::{Accum, Conj, Mat, Par, Side};
use std::cell::RefCell;
use std::rc::Rc;

use thiserror::Error;

use crate::depth::median_depth;
use crate::errormodel::ErrorModel;
use crate::forward::{Forward, ForwardError, Resistivity};
use crate::geometry::{Electrode, LineGeometry};
use crate::roughness::{Roughness, RoughnessError, RoughnessParams};
use crate::sensitivity::{Jacobian, SensitivityError, cumulative_sensitivity};
use crate::sequence::{Quadrupole, Sequence, SequenceError};

/// Why an inversion cannot be computed.
#[derive(Debug, Error, PartialEq)]
pub enum InversionError {
    /// The forward model failed.
    #[error("forward model: {0}")]
    Forward(#[from] ForwardError),
    /// The regularisation operator could not be built.
    #[error("regularisation: {0}")]
    Roughness(#[from] RoughnessError),
    /// Cumulative sensitivity could not be computed.
    #[error("sensitivity: {0}")]
    Sensitivity(#[from] SensitivityError),
    /// The used quadrupoles do not form a valid sequence.
    #[error("sequence: {0}")]
    Sequence(#[from] SequenceError),
    /// An input has the wrong length.
    #[error("{what}: expected {expected} values, got {got}")]
    Length {
        /// Which input.
        what: &'static str,
        /// Values needed.
        expected: usize,
        /// Values given.
        got: usize,
    },
    /// A reading is not a finite number.
    #[error("reading {index}: resistance {value} Ω is not finite")]
    BadReading {
        /// Position in the sequence.
        index: usize,
        /// The value.
        value: f64,
    },
    /// A model value (start or reference) is not a positive finite resistivity.
    #[error("{what} model, cell {index}: resistivity {value} Ω·m is not positive and finite")]
    BadModel {
        /// `start`, `baseline`, …
        what: &'static str,
        /// Cell index.
        index: usize,
        /// The value.
        value: f64,
    },
    /// A parameter is out of range.
    #[error("parameter {name} = {value} is not valid: {requirement}")]
    BadParam {
        /// The parameter's name.
        name: &'static str,
        /// The value given.
        value: f64,
        /// What it must satisfy.
        requirement: &'static str,
    },
    /// No reading is usable (none present with the sign of K).
    #[error("no usable readings: {present} present, {wrong_sign} with the sign opposite to K")]
    NoData {
        /// Readings present.
        present: usize,
        /// Of those, readings with ρa ≤ 0 or without K.
        wrong_sign: usize,
    },
    /// A dense or sparse factorisation failed (matrix not positive definite).
    #[error("Cholesky factorisation of {what} failed")]
    Factorisation {
        /// Which matrix.
        what: &'static str,
    },
}

/// The readings of one epoch on a line's sequence: one optional transfer
/// resistance R (Ω, signed) per quadrupole of the sequence, `None` where the
/// reading is missing or was dropped by quality control.
#[derive(Debug, Clone, PartialEq)]
pub struct EpochData {
    resistances: Vec<Option<f64>>,
}

impl EpochData {
    /// Checks one value per quadrupole of `sequence`, every present value finite.
    pub fn new(sequence: &Sequence, resistances: Vec<Option<f64>>) -> Result<Self, InversionError> {
        if resistances.len() != sequence.len() {
            return Err(InversionError::Length {
                what: "resistances",
                expected: sequence.len(),
                got: resistances.len(),
            });
        }
        if let Some((index, value)) = resistances
            .iter()
            .enumerate()
            .find_map(|(i, r)| r.filter(|v| !v.is_finite()).map(|v| (i, v)))
        {
            return Err(InversionError::BadReading { index, value });
        }
        Ok(Self { resistances })
    }

    /// R (Ω) per quadrupole of the sequence, `None` where absent.
    pub fn resistances(&self) -> &[Option<f64>] {
        &self.resistances
    }

    /// Number of quadrupoles (present or not).
    pub fn len(&self) -> usize {
        self.resistances.len()
    }

    /// True when the sequence position list is empty (never for a valid sequence).
    pub fn is_empty(&self) -> bool {
        self.resistances.is_empty()
    }

    /// Robust combination of several epochs (e.g. quiet epochs forming a
    /// baseline): per quadrupole the median of the epochs that have it (mean of
    /// the two middle values for an even count), kept only when at least half
    /// the epochs have it (common practice, no source). All epochs must be on
    /// the same sequence.
    pub fn median_of(epochs: &[EpochData]) -> Result<EpochData, InversionError> {
        let Some(first) = epochs.first() else {
            return Err(InversionError::Length { what: "epochs", expected: 1, got: 0 });
        };
        let n = first.len();
        if let Some(e) = epochs.iter().find(|e| e.len() != n) {
            return Err(InversionError::Length { what: "epoch", expected: n, got: e.len() });
        }
        let resistances = (0..n)
            .map(|i| {
                let mut v: Vec<f64> = epochs.iter().filter_map(|e| e.resistances[i]).collect();
                if v.is_empty() || 2 * v.len() < epochs.len() {
                    return None;
                }
                v.sort_by(f64::total_cmp);
                let h = v.len() / 2;
                Some(if v.len() % 2 == 1 { v[h] } else { 0.5 * (v[h - 1] + v[h]) })
            })
            .collect();
        Ok(EpochData { resistances })
    }
}

/// A data or model norm.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Norm {
    /// Least squares.
    L2,
    /// Huber measure by IRLS: quadratic up to `threshold`, linear (L1)
    /// beyond. For data the threshold is in normalised residuals (units of
    /// ε); for the model in √w·Δln ρ between neighbouring cells.
    L1 {
        /// Transition from quadratic to linear, > 0.
        threshold: f64,
    },
}

/// How λ is chosen.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum LambdaStrategy {
    /// Occam-style search per iteration on the linearised misfit (see the
    /// module docs). λ is searched in [s·10^−`decades_below`,
    /// s·10^`decades_above`] with s = tr(GᵀG)/tr(W_mᵀW_m) at the start model.
    Occam {
        /// Decades below s, > 0.
        decades_below: f64,
        /// Decades above s, ≥ 0.
        decades_above: f64,
        /// Fraction of the current χ² an iteration aims at when the target is
        /// further away, in (0, 1).
        goal_factor: f64,
    },
    /// A fixed λ (> 0), e.g. from a baseline inversion.
    Fixed(f64),
}

/// Which dense system solves the Gauss–Newton step.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StepSolver {
    /// Data space when there are fewer data than cells, else model space.
    Auto,
    /// M × M system GH⁻¹Gᵀ + λI.
    DataSpace,
    /// P × P system GᵀG + λH.
    ModelSpace,
}

/// Start model of an inversion.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum StartModel<'a> {
    /// Homogeneous at the median apparent resistivity of the data used.
    MedianApparent,
    /// A given model, Ω·m per cell (warm start, e.g. the previous epoch's).
    Model(&'a [f64]),
}

/// Settings of an inversion. Tolerances are explicit.
#[derive(Debug, Clone, PartialEq)]
pub struct InversionParams {
    /// Regularisation weights.
    pub roughness: RoughnessParams,
    /// λ strategy.
    pub lambda: LambdaStrategy,
    /// Data misfit norm.
    pub data_norm: Norm,
    /// Model roughness norm.
    pub model_norm: Norm,
    /// Relative modelling-error floor e_mod added in quadrature to each
    /// datum's relative error (0.01 = 1 %).
    pub modelling_error: f64,
    /// Target χ²/N (1 for correctly estimated errors).
    pub chi2_target: f64,
    /// Relative tolerance on reaching the target (0.1: χ²/N within 0.9–1.1).
    pub chi2_tolerance: f64,
    /// Most Gauss–Newton iterations.
    pub max_iterations: usize,
    /// Relative decrease of the objective (fixed λ) or of χ² (Occam) per
    /// iteration below which iteration stops.
    pub min_relative_decrease: f64,
    /// Most step halvings in the line search.
    pub line_search_halvings: usize,
    /// Lower and upper bound on ρ, Ω·m.
    pub bounds_ohm_m: [f64; 2],
    /// Dense solver of the step.
    pub solver: StepSolver,
    /// Coverage threshold of the mask (normalised cumulative sensitivity).
    pub coverage_threshold: f64,
}

impl Default for InversionParams {
    /// Isotropic roughness, Occam λ over [10⁻⁵, 10²]·s with goal factor 0.2,
    /// L2 norms, 1 % modelling error (METHODS §3.2: 0.5–2 % for this mesh
    /// class), χ²/N target 1 ± 0.1, 12 iterations (deGroot-Hedlin & Constable
    /// 1990 needed 12–16 for smooth 2D models; the λ search here usually
    /// converges in fewer), 2 % minimum decrease (METHODS §3.1, from memory),
    /// 4 halvings, ρ in [0.1, 10⁵] Ω·m, coverage threshold 10⁻³ (METHODS §3.4,
    /// from memory).
    fn default() -> Self {
        Self {
            roughness: RoughnessParams::default(),
            lambda: LambdaStrategy::Occam {
                decades_below: 5.0,
                decades_above: 2.0,
                goal_factor: 0.2,
            },
            data_norm: Norm::L2,
            model_norm: Norm::L2,
            modelling_error: 0.01,
            chi2_target: 1.0,
            chi2_tolerance: 0.1,
            max_iterations: 12,
            min_relative_decrease: 0.02,
            line_search_halvings: 4,
            bounds_ohm_m: [0.1, 1e5],
            solver: StepSolver::Auto,
            coverage_threshold: 1e-3,
        }
    }
}

impl InversionParams {
    fn validate(&self) -> Result<(), InversionError> {
        let bad =
            |name, value, requirement| Err(InversionError::BadParam { name, value, requirement });
        match self.lambda {
            LambdaStrategy::Occam { decades_below, decades_above, goal_factor } => {
                if !(decades_below > 0.0 && decades_below.is_finite()) {
                    return bad("decades_below", decades_below, "positive and finite");
                }
                if !(decades_above >= 0.0 && decades_above.is_finite()) {
                    return bad("decades_above", decades_above, "finite and ≥ 0");
                }
                if !(goal_factor > 0.0 && goal_factor < 1.0) {
                    return bad("goal_factor", goal_factor, "in (0, 1)");
                }
            }
            LambdaStrategy::Fixed(l) => {
                if !(l > 0.0 && l.is_finite()) {
                    return bad("lambda", l, "positive and finite");
                }
            }
        }
        for (name, norm) in
            [("data_norm threshold", self.data_norm), ("model_norm threshold", self.model_norm)]
        {
            if let Norm::L1 { threshold } = norm
                && !(threshold > 0.0 && threshold.is_finite())
            {
                return bad(name, threshold, "positive and finite");
            }
        }
        if !(self.modelling_error >= 0.0 && self.modelling_error.is_finite()) {
            return bad("modelling_error", self.modelling_error, "finite and ≥ 0");
        }
        if !(self.chi2_target > 0.0 && self.chi2_target.is_finite()) {
            return bad("chi2_target", self.chi2_target, "positive and finite");
        }
        if !(self.chi2_tolerance > 0.0 && self.chi2_tolerance < 1.0) {
            return bad("chi2_tolerance", self.chi2_tolerance, "in (0, 1)");
        }
        if self.max_iterations == 0 {
            return bad("max_iterations", 0.0, "at least 1");
        }
        if !(self.min_relative_decrease >= 0.0 && self.min_relative_decrease < 1.0) {
            return bad("min_relative_decrease", self.min_relative_decrease, "in [0, 1)");
        }
        let [lo, hi] = self.bounds_ohm_m;
        if !(lo > 0.0 && hi > lo && hi.is_finite()) {
            return bad("bounds_ohm_m", lo, "0 < lower < upper < ∞");
        }
        if !(self.coverage_threshold >= 0.0 && self.coverage_threshold < 1.0) {
            return bad("coverage_threshold", self.coverage_threshold, "in [0, 1)");
        }
        Ok(())
    }
}

/// Outcome of an inversion. Non-convergence is reported here, not as an error.
#[derive(Debug, Clone, PartialEq)]
pub struct InversionReport {
    pub(crate) model: Vec<f64>,
    pub(crate) converged: bool,
    pub(crate) iterations: usize,
    pub(crate) chi2_history: Vec<f64>,
    pub(crate) rms_pct: f64,
    pub(crate) lambda: f64,
    pub(crate) used: Vec<usize>,
    pub(crate) response: Vec<f64>,
    pub(crate) coverage: Vec<f64>,
    pub(crate) mask: Vec<bool>,
    pub(crate) warnings: Vec<String>,
}

impl InversionReport {
    /// Resistivity per section cell, Ω·m.
    pub fn model(&self) -> &[f64] {
        &self.model
    }

    /// True when the stopping rule was met (χ²/N at target for Occam λ, a
    /// stationary objective for a fixed λ).
    pub fn converged(&self) -> bool {
        self.converged
    }

    /// Gauss–Newton iterations done.
    pub fn iterations(&self) -> usize {
        self.iterations
    }

    /// χ²/N of the start model and after each iteration (L2, unweighted by
    /// IRLS).
    pub fn chi2_history(&self) -> &[f64] {
        &self.chi2_history
    }

    /// Final χ²/N.
    pub fn chi2(&self) -> f64 {
        *self.chi2_history.last().expect("start value always recorded")
    }

    /// Root-mean-square of ln(R_obs/R_mod), in percent (≈ relative misfit).
    pub fn rms_pct(&self) -> f64 {
        self.rms_pct
    }

    /// The λ of the last iteration.
    pub fn lambda(&self) -> f64 {
        self.lambda
    }

    /// Sequence positions of the readings used, ascending.
    pub fn used(&self) -> &[usize] {
        &self.used
    }

    /// Modelled transfer resistance R (Ω) of each used reading (order of
    /// [`Self::used`]); for a ratio inversion, of the ratio data.
    pub fn response(&self) -> &[f64] {
        &self.response
    }

    /// Normalised cumulative sensitivity per cell (0–1).
    pub fn coverage(&self) -> &[f64] {
        &self.coverage
    }

    /// Per cell, true where the data constrain the model (see the module docs).
    pub fn mask(&self) -> &[bool] {
        &self.mask
    }

    /// What the caller should know (dropped readings, clamped cells, stops).
    pub fn warnings(&self) -> &[String] {
        &self.warnings
    }
}

/// Inverts one epoch: `data` on `sequence` (the line's sequence), errors
/// from `errors`, starting from `start`.
pub fn invert(
    forward: &Forward,
    sequence: &Sequence,
    data: &EpochData,
    errors: &ErrorModel,
    start: StartModel<'_>,
    params: &InversionParams,
) -> Result<InversionReport, InversionError> {
    params.validate()?;
    let prepared = prepare(forward, sequence, data, errors, params)?;
    let p = forward.mesh().section().len();
    let m_ref = vec![prepared.median_rho_a.ln(); p];
    let m0 = match start {
        StartModel::MedianApparent => m_ref.clone(),
        StartModel::Model(v) => log_model(v, p, "start")?,
    };
    let problem = Problem {
        forward,
        sequence: prepared.sequence,
        data: prepared.data,
        eps: prepared.eps,
        m_ref,
        jacobian: JacobianSource::Update,
        used: prepared.used,
    };
    let mut report = gauss_newton(&problem, m0, params)?.report;
    report.warnings.splice(0..0, prepared.warnings);
    Ok(report)
}

/// Readings turned into inversion data.
pub(crate) struct Prepared {
    pub(crate) sequence: Sequence,
    pub(crate) used: Vec<usize>,
    pub(crate) data: Vec<f64>,
    pub(crate) eps: Vec<f64>,
    pub(crate) median_rho_a: f64,
    pub(crate) warnings: Vec<String>,
}

/// Selects the readings with ρa > 0 and forms d = ln|R| and ε.
pub(crate) fn prepare(
    forward: &Forward,
    sequence: &Sequence,
    data: &EpochData,
    errors: &ErrorModel,
    params: &InversionParams,
) -> Result<Prepared, InversionError> {
    if data.len() != sequence.len() {
        return Err(InversionError::Length {
            what: "epoch data",
            expected: sequence.len(),
            got: data.len(),
        });
    }
    let k = forward.geometric_factors(sequence)?;
    let mut used = Vec::new();
    let (mut present, mut wrong) = (0, 0);
    let mut rho_a = Vec::new();
    for (i, (r, k)) in data.resistances().iter().zip(&k).enumerate() {
        let Some(r) = *r else { continue };
        present += 1;
        match k {
            Some(k) if k * r > 0.0 => {
                used.push(i);
                rho_a.push(k * r);
            }
            _ => wrong += 1,
        }
    }
    if used.is_empty() {
        return Err(InversionError::NoData { present, wrong_sign: wrong });
    }
    let mut warnings = Vec::new();
    if wrong > 0 {
        warnings.push(format!(
            "{wrong} of {present} readings left out: R has the sign opposite to K (ρa ≤ 0) or K is undefined"
        ));
    }
    let r: Vec<f64> = used.iter().map(|&i| data.resistances()[i].expect("present")).collect();
    let quads: Vec<Quadrupole> = used.iter().map(|&i| sequence.quadrupoles()[i]).collect();
    Ok(Prepared {
        sequence: Sequence::new(quads, sequence.n_electrodes())?,
        data: r.iter().map(|r| r.abs().ln()).collect(),
        eps: r.iter().map(|&r| relative_error(errors, r, params.modelling_error)).collect(),
        median_rho_a: median(&mut rho_a),
        used,
        warnings,
    })
}

/// ε = √((σ_R/|R|)² + e_mod²).
pub(crate) fn relative_error(errors: &ErrorModel, r: f64, modelling: f64) -> f64 {
    errors.relative(r).hypot(modelling)
}

pub(crate) fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    let h = v.len() / 2;
    if v.len() % 2 == 1 { v[h] } else { 0.5 * (v[h - 1] + v[h]) }
}

/// ln ρ of a model given in Ω·m, checked.
pub(crate) fn log_model(
    v: &[f64],
    p: usize,
    what: &'static str,
) -> Result<Vec<f64>, InversionError> {
    if v.len() != p {
        return Err(InversionError::Length { what: "model", expected: p, got: v.len() });
    }
    if let Some((index, &value)) = v.iter().enumerate().find(|(_, x)| !(x.is_finite() && **x > 0.0))
    {
        return Err(InversionError::BadModel { what, index, value });
    }
    Ok(v.iter().map(|x| x.ln()).collect())
}

/// Where the Jacobian of each iteration comes from.
pub(crate) enum JacobianSource<'a> {
    /// Recomputed at every new model (Gauss–Newton).
    Update,
    /// Kept fixed (row-major, n_data × n_cells), e.g. a baseline's; with the
    /// [`Gram`] of the full Jacobian it was cut from and the rows kept, when
    /// one is at hand.
    Fixed(Vec<f64>, Option<(&'a Gram, Vec<usize>)>),
}

/// The data-space product J H⁻¹ Jᵀ of a fixed Jacobian J (all its rows,
/// unweighted; lower triangle) for the roughness H = W_mᵀW_m of `roughness`.
///
/// For data weights D and a subset of rows, G H⁻¹ Gᵀ with G = D J_rows is
/// D (J H⁻¹ Jᵀ)_rows D: computed once per fixed Jacobian (a baseline's), it
/// turns every later data-space step into an M × M copy and one Cholesky,
/// instead of a sparse solve with M right-hand sides and a P × M × M product.
/// Valid under the L2 model norm (H without IRLS weights).
#[derive(Debug, Clone)]
pub(crate) struct Gram {
    roughness: RoughnessParams,
    s: Mat<f64>,
}

impl Gram {
    /// J H⁻¹ Jᵀ of `jac` (row-major, rows × cells of `forward`'s section).
    pub(crate) fn new(
        forward: &Forward,
        jac: &[f64],
        roughness: &RoughnessParams,
    ) -> Result<Self, InversionError> {
        let section = forward.mesh().section();
        let p = section.len();
        if p == 0 || jac.len() % p != 0 {
            return Err(InversionError::Length { what: "Jacobian", expected: p, got: jac.len() });
        }
        let nd = jac.len() / p;
        let rough = Roughness::new(section, spacing(forward), roughness)?;
        let gt = Mat::<f64>::from_fn(p, nd, |j, i| jac[i * p + j]);
        let s = match System::new(gt, &rough, None, StepSolver::DataSpace)? {
            System::Data { s, .. } => s,
            _ => unreachable!("data space asked"),
        };
        Ok(Self { roughness: *roughness, s })
    }

    /// Whether this Gram serves inversions with `roughness`.
    pub(crate) fn fits(&self, roughness: &RoughnessParams) -> bool {
        self.roughness == *roughness
    }
}

/// An inversion problem in log units: data `data` (ln) with errors `eps`,
/// prediction f(m) = ln|R(m)| over `sequence`.
pub(crate) struct Problem<'a> {
    pub(crate) forward: &'a Forward,
    pub(crate) sequence: Sequence,
    pub(crate) data: Vec<f64>,
    pub(crate) eps: Vec<f64>,
    pub(crate) m_ref: Vec<f64>,
    pub(crate) jacobian: JacobianSource<'a>,
    pub(crate) used: Vec<usize>,
}

impl Problem<'_> {
    /// ln|R| of every datum at m (and the Jacobian when asked), plus R.
    fn predict(&self, m: &[f64], with_jacobian: bool) -> Result<Predicted, InversionError> {
        let rho: Vec<f64> = m.iter().map(|v| v.exp()).collect();
        let model = Resistivity::Cells(&rho);
        let (sim, jac) = if with_jacobian {
            let (s, j) = self.forward.simulate_with_jacobian(model, &self.sequence)?;
            (s, Some(j))
        } else {
            (self.forward.simulate(model, &self.sequence)?, None)
        };
        let r = sim.resistances().to_vec();
        let f = r.iter().map(|v| v.abs().max(f64::MIN_POSITIVE).ln()).collect();
        Ok(Predicted { f, r, jacobian: jac.map(Jacobian::into_values) })
    }
}

struct Predicted {
    f: Vec<f64>,
    r: Vec<f64>,
    jacobian: Option<Vec<f64>>,
}

/// Dense Gauss–Newton system of one iteration.
enum System {
    /// B = H⁻¹Gᵀ (P × M) and the lower triangle of S = GB (M × M).
    Data { b: Mat<f64>, s: Mat<f64> },
    /// The lower triangle of S = GH⁻¹Gᵀ from a [`Gram`], Gᵀ (P × M) and the
    /// sparse Cholesky factor of H: x = H⁻¹(Gᵀy).
    Gram { s: Mat<f64>, gt: Mat<f64>, h: SparseLlt<usize, f64> },
    /// Lower triangles of N = GᵀG and H (P × P), and Gᵀ (P × M).
    Model { n: Mat<f64>, h: Mat<f64>, gt: Mat<f64> },
}

/// A [`System`] with its last dense factorisation, reused while λ repeats
/// (a fixed λ over several iterations of one linearisation).
struct Step {
    system: System,
    factor: RefCell<Option<(f64, Rc<Llt<f64>>)>>,
}

impl Step {
    fn new(system: System) -> Self {
        Self { system, factor: RefCell::new(None) }
    }

    /// The Cholesky factor of the system's matrix at λ.
    fn factor(&self, lambda: f64) -> Result<Rc<Llt<f64>>, InversionError> {
        if let Some((l, f)) = &*self.factor.borrow()
            && *l == lambda
        {
            return Ok(f.clone());
        }
        let f = Rc::new(self.system.factorise(lambda)?);
        *self.factor.borrow_mut() = Some((lambda, f.clone()));
        Ok(f)
    }

    /// x = (GᵀG + λH)⁻¹Gᵀz and the predicted weighted residuals z − Gx.
    fn solve(&self, lambda: f64, z: &[f64]) -> Result<(Vec<f64>, Vec<f64>), InversionError> {
        let llt = self.factor(lambda)?;
        self.system.solve_with(&llt, lambda, z)
    }
}

impl System {
    /// The data-space system of the rows `rows` (increasing) of a [`Gram`]'s
    /// Jacobian with weights `sw`; `gt` is the weighted Gᵀ of those rows.
    fn from_gram(
        gram: &Gram,
        rows: &[usize],
        sw: &[f64],
        gt: Mat<f64>,
        rough: &Roughness,
    ) -> Result<Self, InversionError> {
        let m = rows.len();
        let full = gram.s.nrows();
        if sw.len() != m || gt.ncols() != m || rows.iter().any(|&r| r >= full) {
            return Err(InversionError::Length { what: "Gram rows", expected: m, got: sw.len() });
        }
        // Rows increase, so the lower triangle maps onto the lower triangle.
        let s = Mat::<f64>::from_fn(m, m, |i, j| {
            if i >= j { sw[i] * sw[j] * gram.s[(rows[i], rows[j])] } else { 0.0 }
        });
        let h = rough
            .matrix_lower(None)?
            .sp_cholesky(Side::Lower)
            .map_err(|_| InversionError::Factorisation { what: "W_mᵀW_m (sparse)" })?;
        Ok(System::Gram { s, gt, h })
    }

    fn new(
        gt: Mat<f64>,
        rough: &Roughness,
        factors: Option<&[f64]>,
        solver: StepSolver,
    ) -> Result<Self, InversionError> {
        let (p, m) = (gt.nrows(), gt.ncols());
        let h = rough.matrix_lower(factors)?;
        let data_space = match solver {
            StepSolver::Auto => m < p,
            StepSolver::DataSpace => true,
            StepSolver::ModelSpace => false,
        };
        if data_space {
            let llt = h
                .sp_cholesky(Side::Lower)
                .map_err(|_| InversionError::Factorisation { what: "W_mᵀW_m (sparse)" })?;
            let mut b = gt.clone();
            llt.solve_in_place_with_conj(Conj::No, b.as_mut());
            let mut s = Mat::<f64>::zeros(m, m);
            triangular::matmul(
                s.as_mut(),
                BlockStructure::TriangularLower,
                Accum::Replace,
                gt.transpose(),
                BlockStructure::Rectangular,
                b.as_ref(),
                BlockStructure::Rectangular,
                1.0,
                Par::Seq,
            );
            Ok(System::Data { b, s })
        } else {
            let mut n = Mat::<f64>::zeros(p, p);
            triangular::matmul(
                n.as_mut(),
                BlockStructure::TriangularLower,
                Accum::Replace,
                gt.as_ref(),
                BlockStructure::Rectangular,
                gt.transpose(),
                BlockStructure::Rectangular,
                1.0,
                Par::Seq,
            );
            let mut hd = Mat::<f64>::zeros(p, p);
            for col in 0..p {
                let rows = h.symbolic().row_idx_of_col_raw(col);
                for (&row, &v) in rows.iter().zip(h.val_of_col(col)) {
                    hd[(row.max(col), row.min(col))] += v;
                }
            }
            Ok(System::Model { n, h: hd, gt })
        }
    }

    /// Cholesky factor of S + λI (data space) or GᵀG + λH (model space).
    fn factorise(&self, lambda: f64) -> Result<Llt<f64>, InversionError> {
        match self {
            System::Data { s, .. } | System::Gram { s, .. } => {
                let mut a = s.clone();
                for i in 0..a.nrows() {
                    a[(i, i)] += lambda;
                }
                a.llt(Side::Lower)
                    .map_err(|_| InversionError::Factorisation { what: "GH⁻¹Gᵀ + λI" })
            }
            System::Model { n, h, .. } => {
                let p = n.nrows();
                let mut a = n.clone();
                for c in 0..p {
                    for r in c..p {
                        a[(r, c)] += lambda * h[(r, c)];
                    }
                }
                a.llt(Side::Lower)
                    .map_err(|_| InversionError::Factorisation { what: "GᵀG + λH" })
            }
        }
    }

    /// x = (GᵀG + λH)⁻¹Gᵀz and the predicted weighted residuals z − Gx, with
    /// the factor of [`System::factorise`] at λ.
    fn solve_with(
        &self,
        llt: &Llt<f64>,
        lambda: f64,
        z: &[f64],
    ) -> Result<(Vec<f64>, Vec<f64>), InversionError> {
        match self {
            System::Data { b, s } => {
                let m = s.nrows();
                let mut y = Mat::<f64>::from_fn(m, 1, |i, _| z[i]);
                llt.solve_in_place(y.as_mut());
                let mut x = Mat::<f64>::zeros(b.nrows(), 1);
                matmul(x.as_mut(), Accum::Replace, b.as_ref(), y.as_ref(), 1.0, Par::Seq);
                let e = (0..m).map(|i| lambda * y[(i, 0)]).collect();
                Ok(((0..b.nrows()).map(|j| x[(j, 0)]).collect(), e))
            }
            System::Gram { s, gt, h } => {
                let m = s.nrows();
                let mut y = Mat::<f64>::from_fn(m, 1, |i, _| z[i]);
                llt.solve_in_place(y.as_mut());
                let mut x = Mat::<f64>::zeros(gt.nrows(), 1);
                matmul(x.as_mut(), Accum::Replace, gt.as_ref(), y.as_ref(), 1.0, Par::Seq);
                h.solve_in_place_with_conj(Conj::No, x.as_mut());
                let e = (0..m).map(|i| lambda * y[(i, 0)]).collect();
                Ok(((0..gt.nrows()).map(|j| x[(j, 0)]).collect(), e))
            }
            System::Model { n, gt, .. } => {
                let p = n.nrows();
                let zc = Mat::<f64>::from_fn(z.len(), 1, |i, _| z[i]);
                let mut x = Mat::<f64>::zeros(p, 1);
                matmul(x.as_mut(), Accum::Replace, gt.as_ref(), zc.as_ref(), 1.0, Par::Seq);
                llt.solve_in_place(x.as_mut());
                let mut gx = Mat::<f64>::zeros(z.len(), 1);
                matmul(gx.as_mut(), Accum::Replace, gt.transpose(), x.as_ref(), 1.0, Par::Seq);
                let e = (0..z.len()).map(|i| z[i] - gx[(i, 0)]).collect();
                Ok(((0..p).map(|j| x[(j, 0)]).collect(), e))
            }
        }
    }
}

/// A report with the Jacobian of the last linearisation (row-major, data ×
/// cells) and whether it belongs to the final model.
pub(crate) struct Outcome {
    pub(crate) report: InversionReport,
    pub(crate) jacobian: Vec<f64>,
    pub(crate) jacobian_current: bool,
}

/// Runs the Gauss–Newton iterations of `problem` from `m0` (ln ρ).
pub(crate) fn gauss_newton(
    problem: &Problem<'_>,
    m0: Vec<f64>,
    params: &InversionParams,
) -> Result<Outcome, InversionError> {
    let fwd = problem.forward;
    let section = fwd.mesh().section();
    let p = section.len();
    let nd = problem.data.len();
    let rough = Roughness::new(section, spacing(fwd), &params.roughness)?;
    let [lo, hi] = params.bounds_ohm_m.map(f64::ln);
    let clamp = |m: &mut Vec<f64>| m.iter_mut().for_each(|v| *v = v.clamp(lo, hi));
    let update = matches!(problem.jacobian, JacobianSource::Update);
    let d = &problem.data;
    let eps = &problem.eps;
    let n = nd as f64;
    let target = params.chi2_target * n;
    let mut warnings = Vec::new();

    let mut m = m0;
    clamp(&mut m);
    let first = problem.predict(&m, update)?;
    let (mut f, mut r) = (first.f, first.r);
    let mut jac: Vec<f64> = match (&problem.jacobian, first.jacobian) {
        (JacobianSource::Fixed(j, _), _) => j.clone(),
        (JacobianSource::Update, Some(j)) => j,
        (JacobianSource::Update, None) => unreachable!("Jacobian requested"),
    };
    if jac.len() != nd * p {
        return Err(InversionError::Length { what: "Jacobian", expected: nd * p, got: jac.len() });
    }
    let mut jac_stale = false;
    let gram = match &problem.jacobian {
        JacobianSource::Fixed(_, Some((g, rows)))
            if g.fits(&params.roughness) && rows.len() == nd =>
        {
            Some((*g, rows.as_slice()))
        }
        _ => None,
    };
    let mut kept: Option<(Vec<f64>, Step)> = None;
    let chi2_of = |f: &[f64], w: Option<&[f64]>| -> f64 {
        (0..nd).map(|i| w.map_or(1.0, |w| w[i]) * ((d[i] - f[i]) / eps[i]).powi(2)).sum()
    };
    // The misfit Occam aims at: χ², or under the robust data norm a χ² from
    // the median absolute normalised residual, N·(1.4826·median|r̃|)², which
    // outliers cannot inflate.
    let misfit_of = |f: &[f64]| match params.data_norm {
        Norm::L2 => chi2_of(f, None),
        Norm::L1 { .. } => robust_chi2((0..nd).map(|i| (d[i] - f[i]) / eps[i])),
    };
    let mut chi2 = chi2_of(&f, None);
    let mut history = vec![chi2 / n];
    let mut lambda = match params.lambda {
        LambdaStrategy::Fixed(l) => l,
        LambdaStrategy::Occam { .. } => f64::NAN,
    };
    let mut lambda_range: Option<(f64, f64)> = None;
    let mut converged = false;
    let mut iterations = 0;
    let mut stop: Option<String> = None;

    for _ in 0..params.max_iterations {
        if jac_stale {
            let pr = problem.predict(&m, true)?;
            jac = pr.jacobian.expect("requested");
            jac_stale = false;
        }
        iterations += 1;
        let u: Vec<f64> = m.iter().zip(&problem.m_ref).map(|(a, b)| a - b).collect();
        let wd: Option<Vec<f64>> = match params.data_norm {
            Norm::L2 => None,
            Norm::L1 { threshold } => Some(
                (0..nd)
                    .map(|i| {
                        let a = ((d[i] - f[i]) / eps[i]).abs();
                        if a <= threshold { 1.0 } else { threshold / a }
                    })
                    .collect(),
            ),
        };
        let wm: Option<Vec<f64>> = match params.model_norm {
            Norm::L2 => None,
            Norm::L1 { threshold } => Some(rough.huber_weights(&u, threshold)?),
        };
        let sw: Vec<f64> =
            (0..nd).map(|i| wd.as_ref().map_or(1.0, |w| w[i]).sqrt() / eps[i]).collect();
        // Gᵀ (P × M): column i is datum i's Jacobian row scaled by its weight.
        let gt = || Mat::<f64>::from_fn(p, nd, |j, i| jac[i * p + j] * sw[i]);
        let z: Vec<f64> = (0..nd)
            .map(|i| {
                let row = &jac[i * p..(i + 1) * p];
                let ju: f64 = row.iter().zip(&u).map(|(a, b)| a * b).sum();
                sw[i] * (d[i] - f[i] + ju)
            })
            .collect();
        // With the Jacobian fixed and H unweighted the system changes only
        // with the data weights: keep it (and its factor) while they repeat.
        let keep = !update && wm.is_none();
        if !(keep && kept.as_ref().is_some_and(|(w, _)| *w == sw)) {
            let data_space = match params.solver {
                StepSolver::Auto => nd < p,
                StepSolver::DataSpace => true,
                StepSolver::ModelSpace => false,
            };
            let system = match gram {
                Some((g, rows)) if wm.is_none() && data_space => {
                    System::from_gram(g, rows, &sw, gt(), &rough)?
                }
                _ => System::new(gt(), &rough, wm.as_deref(), params.solver)?,
            };
            kept = Some((sw.clone(), Step::new(system)));
        }
        let system = &kept.as_ref().expect("just set").1;
        let misfit_w = chi2_of(&f, wd.as_deref());
        // Misfit measure of predicted weighted residuals e_i = √w_i·r̃_i.
        let measure = |e: &[f64]| match &wd {
            None => e.iter().map(|v| v * v).sum(),
            Some(w) => robust_chi2(e.iter().zip(w).map(|(v, w)| v / w.sqrt())),
        };
        let x = match params.lambda {
            LambdaStrategy::Fixed(l) => system.solve(l, &z)?.0,
            LambdaStrategy::Occam { decades_below, decades_above, goal_factor } => {
                let (lmin, lmax) = match lambda_range {
                    Some(r) => r,
                    None => {
                        let tr_g: f64 = (0..p)
                            .map(|j| (0..nd).map(|i| (jac[i * p + j] * sw[i]).powi(2)).sum::<f64>())
                            .sum();
                        let h = rough.matrix_lower(None)?;
                        let tr_h: f64 = (0..p)
                            .map(|c| {
                                let rows = h.symbolic().row_idx_of_col_raw(c);
                                rows.iter()
                                    .zip(h.val_of_col(c))
                                    .filter(|(r, _)| **r == c)
                                    .map(|(_, v)| *v)
                                    .sum::<f64>()
                            })
                            .sum();
                        let s = (tr_g / tr_h).max(f64::MIN_POSITIVE);
                        let r = (s * 10f64.powf(-decades_below), s * 10f64.powf(decades_above));
                        lambda_range = Some(r);
                        r
                    }
                };
                let goal = target.max(goal_factor * misfit_of(&f));
                let (l, x) = search_lambda(system, &z, goal, (lmin, lmax), &measure)?;
                lambda = l;
                x
            }
        };
        // Line search on the step length; under Occam λ a failed search is
        // retried with λ raised tenfold (a shorter, smoother step), up to six
        // times, in case the λ search overshot the linearisation.
        let mut x = x;
        let mut accepted = None;
        let mut phi0 = f64::NAN;
        let retries = if matches!(params.lambda, LambdaStrategy::Occam { .. }) { 6 } else { 0 };
        for retry in 0..=retries {
            if retry > 0 {
                lambda *= 10.0;
                x = system.solve(lambda, &z)?.0;
            }
            let delta: Vec<f64> = (0..p).map(|j| problem.m_ref[j] + x[j] - m[j]).collect();
            phi0 = misfit_w + lambda * rough.norm2(&u, wm.as_deref())?;
            let mut alpha = 1.0;
            for h in 0..=params.line_search_halvings {
                let mut trial: Vec<f64> = (0..p).map(|j| m[j] + alpha * delta[j]).collect();
                clamp(&mut trial);
                let pr = problem.predict(&trial, update && h == 0)?;
                let ut: Vec<f64> = trial.iter().zip(&problem.m_ref).map(|(a, b)| a - b).collect();
                let phi =
                    chi2_of(&pr.f, wd.as_deref()) + lambda * rough.norm2(&ut, wm.as_deref())?;
                if phi < phi0 {
                    accepted = Some((trial, pr, phi));
                    break;
                }
                alpha *= 0.5;
            }
            if accepted.is_some() {
                break;
            }
        }
        let Some((trial, pr, phi)) = accepted else {
            stop = Some(format!(
                "iteration {iterations}: the line search found no decrease of the objective; stopped at the previous model"
            ));
            converged = match params.lambda {
                LambdaStrategy::Fixed(_) => true,
                LambdaStrategy::Occam { .. } => chi2 <= target * (1.0 + params.chi2_tolerance),
            };
            break;
        };
        m = trial;
        f = pr.f;
        r = pr.r;
        match pr.jacobian {
            Some(j) => jac = j,
            None => jac_stale = update,
        }
        let previous = chi2;
        chi2 = chi2_of(&f, None);
        history.push(chi2 / n);
        match params.lambda {
            LambdaStrategy::Fixed(_) => {
                if phi0 - phi <= params.min_relative_decrease * phi0 {
                    converged = true;
                    break;
                }
            }
            LambdaStrategy::Occam { .. } => {
                let ratio = misfit_of(&f) / target;
                let at_top = lambda_range.is_some_and(|(_, top)| lambda >= top * (1.0 - 1e-12));
                if (ratio - 1.0).abs() <= params.chi2_tolerance || (ratio < 1.0 && at_top) {
                    converged = true;
                    break;
                }
                let small = (previous - chi2).abs() <= params.min_relative_decrease * previous;
                if small && ratio <= 1.0 + params.chi2_tolerance {
                    converged = true;
                    break;
                }
                if ratio > 1.0 && previous - chi2 <= params.min_relative_decrease * previous {
                    stop = Some(format!(
                        "χ²/N stopped decreasing at {:.3} (target {}) after {iterations} iterations",
                        chi2 / n,
                        params.chi2_target
                    ));
                    break;
                }
            }
        }
    }
    if let Some(s) = stop {
        warnings.push(s);
    } else if !converged {
        warnings.push(format!(
            "not converged after {} iterations (χ²/N = {:.3})",
            params.max_iterations,
            chi2 / n
        ));
    }
    let clamped = m.iter().filter(|&&v| v <= lo || v >= hi).count();
    if clamped > 0 {
        warnings.push(format!(
            "{clamped} cells at the resistivity bounds [{}, {}] Ω·m",
            params.bounds_ohm_m[0], params.bounds_ohm_m[1]
        ));
    }
    let zero = r.iter().filter(|v| **v == 0.0).count();
    if zero > 0 {
        warnings.push(format!("{zero} modelled readings are exactly zero"));
    }
    let rms_pct = 100.0 * ((0..nd).map(|i| (d[i] - f[i]).powi(2)).sum::<f64>() / n).sqrt();
    let (coverage, mask) =
        coverage_mask(fwd, &problem.sequence, &jac, eps, params.coverage_threshold)?;
    let report = InversionReport {
        model: m.iter().map(|v| v.exp()).collect(),
        converged,
        iterations,
        chi2_history: history,
        rms_pct,
        lambda,
        used: problem.used.clone(),
        response: r,
        coverage,
        mask,
        warnings,
    };
    Ok(Outcome { report, jacobian: jac, jacobian_current: !jac_stale && update })
}

/// N·(1.4826·median|r|)²: χ² of N normalised residuals estimated from their
/// median absolute value (Gaussian consistency factor 1.4826).
fn robust_chi2(r: impl Iterator<Item = f64>) -> f64 {
    let mut a: Vec<f64> = r.map(f64::abs).collect();
    let n = a.len() as f64;
    n * (crate::errormodel::MAD_TO_SIGMA * median(&mut a)).powi(2)
}

/// Largest λ in [lo, hi] whose linearised misfit (`measure` of the predicted
/// weighted residuals) is at most `goal` (λ = lo when none is; a bracketing
/// search in log λ to 2 % in λ or 2 % in misfit), with its step.
fn search_lambda(
    system: &Step,
    z: &[f64],
    goal: f64,
    (lo, hi): (f64, f64),
    measure: &dyn Fn(&[f64]) -> f64,
) -> Result<(f64, Vec<f64>), InversionError> {
    let (x_hi, e) = system.solve(hi, z)?;
    let phi_hi = measure(&e);
    if phi_hi <= goal {
        return Ok((hi, x_hi));
    }
    let (x_lo, e) = system.solve(lo, z)?;
    let phi_lo = measure(&e);
    if phi_lo >= goal {
        return Ok((lo, x_lo));
    }
    let (mut a, mut b) = (lo.ln(), hi.ln());
    // g = ln(φ/goal), monotone in ln λ: g(a) ≤ 0 < g(b) throughout.
    let g = |phi: f64| (phi.max(f64::MIN_POSITIVE) / goal).ln();
    let (mut ga, mut gb) = (g(phi_lo), g(phi_hi));
    let mut best = (lo, x_lo);
    // Regula falsi on ln λ with the Illinois modification (Dowell & Jarratt
    // 1971, *BIT* 11, 168–174, from memory): the end kept twice in a row has its g halved,
    // so the bracket shrinks from both sides; the trial is kept inside the
    // middle 90 % of the bracket, and bisection is used where g is not finite.
    let mut kept_side = 0i8;
    for _ in 0..30 {
        if b - a < 0.02 {
            break;
        }
        let w = b - a;
        let c = if ga.is_finite() && gb.is_finite() && gb > ga {
            (b - gb * w / (gb - ga)).clamp(a + 0.05 * w, b - 0.05 * w)
        } else {
            0.5 * (a + b)
        };
        let (x, e) = system.solve(c.exp(), z)?;
        let phi = measure(&e);
        if phi <= goal {
            a = c;
            ga = g(phi);
            best = (c.exp(), x);
            if phi >= 0.98 * goal {
                break;
            }
            if kept_side == 1 {
                gb *= 0.5;
            }
            kept_side = 1;
        } else {
            b = c;
            gb = g(phi);
            if kept_side == -1 {
                ga *= 0.5;
            }
            kept_side = -1;
        }
    }
    Ok(best)
}

/// The line's nominal electrode spacing (m) from the mesh's electrode nodes.
pub(crate) fn spacing(forward: &Forward) -> f64 {
    line_of(forward).nominal_spacing()
}

/// The line geometry of the mesh's electrodes.
pub(crate) fn line_of(forward: &Forward) -> LineGeometry {
    let mesh = forward.mesh();
    LineGeometry::new(
        mesh.electrode_nodes()
            .iter()
            .enumerate()
            .map(|(i, &v)| Electrode::new(format!("{i}"), mesh.nodes()[v][0], mesh.nodes()[v][1]))
            .collect(),
    )
    .expect("mesh electrodes form a valid line")
}

/// Coverage and mask from a Jacobian (row-major, `sequence.len()` × cells)
/// and relative errors.
pub(crate) fn coverage_mask(
    forward: &Forward,
    sequence: &Sequence,
    jacobian: &[f64],
    eps: &[f64],
    threshold: f64,
) -> Result<(Vec<f64>, Vec<bool>), InversionError> {
    let section = forward.mesh().section();
    let jac = Jacobian::from_values(sequence.len(), section.len(), jacobian.to_vec()).ok_or(
        InversionError::Length {
            what: "Jacobian",
            expected: sequence.len() * section.len(),
            got: jacobian.len(),
        },
    )?;
    let coverage = cumulative_sensitivity(&jac, eps, section)?;
    let line = line_of(forward);
    let deepest =
        sequence.quadrupoles().iter().filter_map(|q| median_depth(&line, q)).fold(0.0f64, f64::max);
    let mask = coverage
        .iter()
        .zip(section.cells())
        .map(|(s, c)| *s >= threshold && c.depth() <= deepest)
        .collect();
    Ok((coverage, mask))
}

#[cfg(test)]
pub(crate) mod tests {
    use std::f64::consts::PI;

    use super::*;
    use crate::forward::{ForwardParams, combine};
    use crate::geometry::Surface;
    use crate::mesh::{Mesh, MeshParams};
    use crate::model::{Body, ModelDescription};
    use crate::noise::{NoiseParams, add_noise};
    use crate::section::SectionGrid;
    use crate::sequence::{
        DipoleDipoleParams, SchlumbergerParams, WennerParams, dipole_dipole, merge, schlumberger,
        wenner,
    };
    use rand::rngs::StdRng;
    use rand::{Rng, SeedableRng};

    pub(crate) fn flat_line(n: usize, a: f64) -> LineGeometry {
        LineGeometry::new(
            (0..n).map(|i| Electrode::new(format!("{i}"), i as f64 * a, 0.0)).collect(),
        )
        .unwrap()
    }

    /// A coarse inversion mesh: 3 nodes per spacing, columns one spacing
    /// wide, layers from a/2 growing ×1.15 (fast tests).
    pub(crate) fn coarse() -> MeshParams {
        MeshParams {
            nodes_per_spacing: 3,
            cell_width: 1.0,
            first_layer: 0.5,
            layer_growth: 1.15,
            ..MeshParams::default()
        }
    }

    pub(crate) fn forward_for(line: &LineGeometry, params: &MeshParams) -> Forward {
        let surface = Surface::through_line(line, &[]).unwrap();
        Forward::new(Mesh::new(line, &surface, params).unwrap(), &ForwardParams::default()).unwrap()
    }

    /// Wenner a = 1…8 and dipole–dipole a = 1–2, n = 1…6.
    pub(crate) fn sequence(n: usize) -> Sequence {
        let quads = merge(&[
            wenner(n, &WennerParams { max_a: 8 }),
            dipole_dipole(n, &DipoleDipoleParams { max_a: 2, max_n: 6 }),
        ]);
        Sequence::new(quads, n).unwrap()
    }

    /// Data of `model` computed on `fwd` (per triangle), with seeded relative
    /// noise when `noise` is given.
    pub(crate) fn synthetic(
        fwd: &Forward,
        seq: &Sequence,
        model: &ModelDescription,
        noise: Option<NoiseParams>,
    ) -> EpochData {
        let rho = model.on_triangles(fwd.mesh());
        let r = fwd.simulate(Resistivity::Triangles(&rho), seq).unwrap().resistances().to_vec();
        let r = match noise {
            Some(p) => add_noise(&r, &p).unwrap(),
            None => r,
        };
        EpochData::new(seq, r.into_iter().map(Some).collect()).unwrap()
    }

    /// Checks a report against a homogeneous ρ inside its mask (relative
    /// tolerance) and that the mask is not empty.
    fn check(report: &InversionReport, section: &SectionGrid, rho: f64, rel_tol: f64) {
        let mut n = 0;
        for (j, (v, &keep)) in report.model().iter().zip(report.mask()).enumerate() {
            if keep {
                n += 1;
                assert!(
                    (v / rho - 1.0).abs() <= rel_tol,
                    "cell {j} at {:?}: {v} Ω·m",
                    section.cells()[j].centroid()
                );
            }
        }
        assert!(n * 4 >= section.len(), "mask keeps only {n} of {} cells", section.len());
    }

    #[test]
    fn homogeneous_data_give_a_homogeneous_model() {
        // On a homogeneous half-space every reading has ρa = ρ (definition of
        // K; Telford, Geldart & Sheriff 1990): the inversion must return
        // 100 Ω·m within 1 % wherever the mask allows, from the median-ρa
        // start and from a warm start three times too high.
        let line = flat_line(32, 1.0);
        let fwd = forward_for(&line, &coarse());
        let seq = sequence(32);
        let data = synthetic(&fwd, &seq, &ModelDescription::homogeneous(100.0).unwrap(), None);
        let errors = ErrorModel::new(0.0, 0.02).unwrap();
        let params = InversionParams::default();
        let wrong = vec![300.0; fwd.mesh().section().len()];
        for start in [StartModel::MedianApparent, StartModel::Model(&wrong)] {
            let report = invert(&fwd, &seq, &data, &errors, start, &params).unwrap();
            println!(
                "homogeneous: {} iterations, χ²/N {:?}, λ {:.3e}",
                report.iterations(),
                report.chi2_history(),
                report.lambda()
            );
            assert!(report.converged(), "{:?}", report.warnings());
            assert!(report.chi2() < 1.1);
            check(&report, fwd.mesh().section(), 100.0, 0.01);
        }
    }

    /// Area-weighted centroid of the masked cells whose ρ lies below the
    /// geometric midpoint of the masked minimum and median, with that minimum
    /// and median (Ω·m).
    pub(crate) fn low_region(
        section: &SectionGrid,
        values: &[f64],
        mask: &[bool],
    ) -> ([f64; 2], f64, f64) {
        let mut kept: Vec<f64> =
            values.iter().zip(mask).filter(|(_, m)| **m).map(|(v, _)| *v).collect();
        let med = median(&mut kept);
        let min = kept[0];
        let cut = (min * med).sqrt();
        let (mut a, mut cx, mut cz) = (0.0, 0.0, 0.0);
        for ((c, v), m) in section.cells().iter().zip(values).zip(mask) {
            if *m && *v < cut {
                a += c.area();
                cx += c.area() * c.centroid()[0];
                cz += c.area() * c.centroid()[1];
            }
        }
        ([cx / a, cz / a], min, med)
    }

    #[test]
    fn conductive_block_is_recovered_in_place() {
        // Synthetic recovery: a 10 Ω·m block 2 m × 2 m, top 2 m deep (centre
        // at x = 31.5 m, z = −3 m), in 100 Ω·m under a 64-electrode line (1 m
        // spacing); data from a finer forward mesh with 2 % Gaussian noise.
        // Expected: the low-ρ region's centroid within one spacing (1 m) of
        // the block centre, ρ below the background there, χ²/N in 0.8–1.3.
        let line = flat_line(64, 1.0);
        let seq = sequence(64);
        let truth = ModelDescription::new(
            100.0,
            vec![],
            vec![Body {
                polygon: vec![[30.5, -2.0], [32.5, -2.0], [32.5, -4.0], [30.5, -4.0]],
                rho: 10.0,
            }],
        )
        .unwrap();
        let data = {
            let fine = forward_for(&line, &MeshParams::default());
            synthetic(
                &fine,
                &seq,
                &truth,
                Some(NoiseParams { relative: 0.02, absolute: 0.0, seed: 21 }),
            )
        };
        let fwd = forward_for(&line, &coarse());
        let errors = ErrorModel::new(0.0, 0.02).unwrap();
        let report = invert(
            &fwd,
            &seq,
            &data,
            &errors,
            StartModel::MedianApparent,
            &InversionParams::default(),
        )
        .unwrap();
        let section = fwd.mesh().section();
        let (c, min, med) = low_region(section, report.model(), report.mask());
        println!(
            "block: {} iterations, χ²/N {:?}, rms {:.2} %, λ {:.3e}, centroid {c:?}, min {min:.1}, median {med:.1}, warnings {:?}",
            report.iterations(),
            report.chi2_history(),
            report.rms_pct(),
            report.lambda(),
            report.warnings()
        );
        assert!((c[0] - 31.5).hypot(c[1] + 3.0) <= 1.0, "centroid {c:?}");
        assert!(min < 0.7 * med && min < 100.0, "min {min}, median {med}");
        assert!((0.8..=1.3).contains(&report.chi2()), "χ²/N {}", report.chi2());
        assert!(report.converged(), "{:?}", report.warnings());
    }

    /// Potential (V) at r (m) of 1 A on the surface of ρ1 over ρ2 below depth
    /// h: image series, Telford, Geldart & Sheriff (1990), *Applied
    /// Geophysics* 2nd ed. (METHODS §2.2).
    fn two_layer_potential(rho1: f64, rho2: f64, h: f64, r: f64) -> f64 {
        let k = (rho2 - rho1) / (rho2 + rho1);
        let terms = ((1e-14f64).ln() / k.abs().ln()).ceil() as i32;
        let mut sum = 1.0 / r;
        for n in 1..=terms {
            sum += 2.0 * k.powi(n) / (r * r + (2.0 * n as f64 * h).powi(2)).sqrt();
        }
        rho1 / (2.0 * PI) * sum
    }

    #[test]
    fn two_layer_earth_from_the_image_series() {
        // Independence: data from the analytic image series (not the FE
        // model) for 100 Ω·m over 25 Ω·m below h = 2 m, Wenner a = 1…15 and
        // Wenner–Schlumberger a = 1–2, n = 1…6 on 48 electrodes, noise-free
        // with 1 % + 1 % assumed errors. Tolerances (a smooth inversion
        // spreads a sharp interface over about a layer thickness): upper
        // layer (depth < 1 m) within 10 % of ρ1; lower layer (depth 3.5–6 m)
        // within 25 % of ρ2; the depth where ln ρ crosses the mean of ln ρ1
        // and ln ρ2 under the line centre within 0.5 m of h.
        let (rho1, rho2, h) = (100.0, 25.0, 2.0);
        let line = flat_line(48, 1.0);
        let quads = merge(&[
            wenner(48, &WennerParams { max_a: 15 }),
            schlumberger(48, &SchlumbergerParams { max_a: 2, max_n: 6 }),
        ]);
        let seq = Sequence::new(quads, 48).unwrap();
        let r = seq
            .quadrupoles()
            .iter()
            .map(|q| {
                Some(combine(q, |i, j| two_layer_potential(rho1, rho2, h, line.distance(i, j))))
            })
            .collect();
        let data = EpochData::new(&seq, r).unwrap();
        let fwd = forward_for(&line, &coarse());
        let errors = ErrorModel::new(0.0, 0.01).unwrap();
        let report = invert(
            &fwd,
            &seq,
            &data,
            &errors,
            StartModel::MedianApparent,
            &InversionParams::default(),
        )
        .unwrap();
        let section = fwd.mesh().section();
        let pick = |lo: f64, hi: f64| {
            let mut v: Vec<f64> = section
                .cells()
                .iter()
                .zip(report.model())
                .zip(report.mask())
                .filter(|((c, _), m)| {
                    **m && c.depth() >= lo
                        && c.depth() <= hi
                        && (c.centroid()[0] - 23.5).abs() < 12.0
                })
                .map(|((_, v), _)| *v)
                .collect();
            assert!(!v.is_empty(), "no masked cells at {lo}–{hi} m");
            median(&mut v)
        };
        let (top, bottom) = (pick(0.0, 1.0), pick(3.5, 6.0));
        // Interface: centre column, linear interpolation of ln ρ in depth.
        let mut column: Vec<(f64, f64)> = section
            .cells()
            .iter()
            .zip(report.model())
            .filter(|(c, _)| (c.x_range().0..c.x_range().1).contains(&23.6))
            .map(|(c, v)| (c.depth(), v.ln()))
            .collect();
        column.sort_by(|a, b| a.0.total_cmp(&b.0));
        let mid = 0.5 * (rho1.ln() + rho2.ln());
        let depth = column
            .windows(2)
            .find(|w| w[0].1 >= mid && w[1].1 < mid)
            .map(|w| w[0].0 + (w[0].1 - mid) / (w[0].1 - w[1].1) * (w[1].0 - w[0].0))
            .expect("ln ρ crosses the mid value");
        println!(
            "two-layer: {} iterations, χ²/N {:?}, ρ1 {top:.1}, ρ2 {bottom:.1}, interface {depth:.2} m",
            report.iterations(),
            report.chi2_history()
        );
        assert!((top / rho1 - 1.0).abs() <= 0.10, "ρ1 {top}");
        assert!((bottom / rho2 - 1.0).abs() <= 0.25, "ρ2 {bottom}");
        assert!((depth - h).abs() <= 0.5, "interface {depth}");
    }

    #[test]
    fn robust_data_norm_resists_outliers() {
        // IRLS with Huber weights (Farquharson & Oldenburg 1998; Loke, Acworth
        // & Dahlin 2003): on 100 Ω·m ground with 1 % noise and every 25th
        // reading raised by 30 %, the robust inversion stays within 3 % of
        // 100 Ω·m in the mask (three times the noise) and deviates less than
        // the least-squares one, whose χ² the outliers dominate.
        let line = flat_line(32, 1.0);
        let fwd = forward_for(&line, &coarse());
        let seq = sequence(32);
        let clean = synthetic(
            &fwd,
            &seq,
            &ModelDescription::homogeneous(100.0).unwrap(),
            Some(NoiseParams { relative: 0.01, absolute: 0.0, seed: 8 }),
        );
        let corrupted = clean
            .resistances()
            .iter()
            .enumerate()
            .map(|(i, r)| r.map(|r| if i % 25 == 0 { 1.3 * r } else { r }))
            .collect();
        let data = EpochData::new(&seq, corrupted).unwrap();
        let errors = ErrorModel::new(0.0, 0.01).unwrap();
        let worst = |norm: Norm| {
            let params = InversionParams { data_norm: norm, ..InversionParams::default() };
            let report =
                invert(&fwd, &seq, &data, &errors, StartModel::MedianApparent, &params).unwrap();
            let w = report
                .model()
                .iter()
                .zip(report.mask())
                .filter(|(_, m)| **m)
                .fold(0.0f64, |a, (v, _)| a.max((v / 100.0 - 1.0).abs()));
            println!(
                "{norm:?}: χ²/N {:?}, worst deviation {:.2} %",
                report.chi2_history(),
                100.0 * w
            );
            w
        };
        let l2 = worst(Norm::L2);
        let l1 = worst(Norm::L1 { threshold: 1.0 });
        assert!(l1 <= 0.03, "robust: {l1}");
        assert!(l1 < l2, "robust {l1} vs least squares {l2}");
    }

    #[test]
    fn gram_rows_give_the_step_of_a_freshly_formed_system() {
        // Matrix identity (D J_r) H⁻¹ (D J_r)ᵀ = D (J H⁻¹ Jᵀ)_r D for a row
        // subset r and diagonal weights D (block matrix algebra, no outside
        // value needed): the step from a baseline's precomputed J H⁻¹ Jᵀ equals
        // the step of the system formed afresh from the kept rows, to 1e-8
        // relative, at two λ, and a repeated λ reuses the factor.
        let line = flat_line(24, 1.0);
        let seq = sequence(24);
        let fwd = forward_for(&line, &coarse());
        let p = fwd.mesh().section().len();
        let rho: Vec<f64> = (0..p).map(|j| 40.0 + (j % 7) as f64 * 5.0).collect();
        let (_, j) = fwd.simulate_with_jacobian(Resistivity::Cells(&rho), &seq).unwrap();
        let jac = j.into_values();
        let params = RoughnessParams::default();
        let gram = Gram::new(&fwd, &jac, &params).unwrap();
        assert!(gram.fits(&params));
        let rows: Vec<usize> = (0..seq.len()).filter(|i| i % 3 != 1).collect();
        let sw: Vec<f64> = rows.iter().map(|&i| 1.0 / (0.02 + 0.001 * (i % 11) as f64)).collect();
        let gt = Mat::<f64>::from_fn(p, rows.len(), |j, i| jac[rows[i] * p + j] * sw[i]);
        let rough = Roughness::new(fwd.mesh().section(), spacing(&fwd), &params).unwrap();
        let fresh =
            Step::new(System::new(gt.clone(), &rough, None, StepSolver::DataSpace).unwrap());
        let cached = Step::new(System::from_gram(&gram, &rows, &sw, gt, &rough).unwrap());
        let z: Vec<f64> = (0..rows.len()).map(|i| (i as f64 * 0.37).sin()).collect();
        let rel = |a: &[f64], b: &[f64]| {
            let scale = a.iter().map(|v| v.abs()).fold(0.0, f64::max);
            a.iter().zip(b).map(|(x, y)| (x - y).abs()).fold(0.0, f64::max) / scale
        };
        for lambda in [0.05, 20.0, 20.0] {
            let (x1, e1) = fresh.solve(lambda, &z).unwrap();
            let (x2, e2) = cached.solve(lambda, &z).unwrap();
            assert!(rel(&x1, &x2) < 1e-8, "step differs by {:.2e} at λ {lambda}", rel(&x1, &x2));
            assert!(rel(&e1, &e2) < 1e-8, "residuals differ by {:.2e}", rel(&e1, &e2));
        }
        let factor = cached.factor.borrow();
        assert_eq!(factor.as_ref().map(|(l, _)| *l), Some(20.0));
    }

    #[test]
    fn data_and_model_space_steps_agree() {
        // Push-through identity (G ᵀG + λH)⁻¹Gᵀ = H⁻¹Gᵀ(GH⁻¹Gᵀ + λI)⁻¹ (matrix
        // algebra, e.g. Tarantola 2005, *Inverse Problem Theory*, §3.2.3, from
        // memory): both systems give the same step and misfit, and the step
        // satisfies the normal equations. Seeded random G, regular grid, to
        // 1e-8 relative.
        let polys: Vec<Vec<[f64; 2]>> = (0..5)
            .flat_map(|j| {
                (0..8).map(move |i| {
                    let (x, z) = (i as f64 * 0.5, -(j as f64) * 0.4);
                    vec![[x, z], [x, z - 0.4], [x + 0.5, z - 0.4], [x + 0.5, z]]
                })
            })
            .collect();
        let section =
            SectionGrid::new(polys, Surface::new(vec![[0.0, 0.0], [4.0, 0.0]]).unwrap()).unwrap();
        let rough = Roughness::new(&section, 1.0, &RoughnessParams::default()).unwrap();
        let mut rng = StdRng::seed_from_u64(4);
        for m in [12usize, 60] {
            let p = section.len();
            let gt = Mat::<f64>::from_fn(p, m, |_, _| rng.random_range(-1.0..1.0));
            let z: Vec<f64> = (0..m).map(|_| rng.random_range(-1.0..1.0)).collect();
            let lambda = 0.7;
            let a =
                Step::new(System::new(gt.clone(), &rough, None, StepSolver::DataSpace).unwrap());
            let b =
                Step::new(System::new(gt.clone(), &rough, None, StepSolver::ModelSpace).unwrap());
            let (xa, ea) = a.solve(lambda, &z).unwrap();
            let (xb, eb) = b.solve(lambda, &z).unwrap();
            let fa: f64 = ea.iter().map(|v| v * v).sum();
            let fb: f64 = eb.iter().map(|v| v * v).sum();
            let scale = xb.iter().fold(0.0f64, |s, v| s.max(v.abs()));
            for (u, v) in xa.iter().zip(&xb) {
                assert!((u - v).abs() <= 1e-8 * scale, "{u} vs {v}");
            }
            assert!((fa - fb).abs() <= 1e-8 * fb, "{fa} vs {fb}");
            // Residual of the normal equations (GᵀG + λH)x − Gᵀz.
            let h = rough.matrix_lower(None).unwrap();
            let mut hx = vec![0.0; p];
            for c in 0..p {
                for (&r, &v) in h.symbolic().row_idx_of_col_raw(c).iter().zip(h.val_of_col(c)) {
                    hx[r] += v * xb[c];
                    if r != c {
                        hx[c] += v * xb[r];
                    }
                }
            }
            let gx: Vec<f64> = (0..m).map(|i| (0..p).map(|j| gt[(j, i)] * xb[j]).sum()).collect();
            for j in 0..p {
                let lhs: f64 = (0..m).map(|i| gt[(j, i)] * gx[i]).sum::<f64>() + lambda * hx[j];
                let rhs: f64 = (0..m).map(|i| gt[(j, i)] * z[i]).sum();
                assert!((lhs - rhs).abs() <= 1e-8 * rhs.abs().max(1.0), "row {j}: {lhs} vs {rhs}");
            }
        }
    }

    #[test]
    fn median_combination_and_input_errors() {
        let seq = Sequence::new(wenner(8, &WennerParams { max_a: 1 }), 8).unwrap();
        let e = |v: [Option<f64>; 5]| EpochData::new(&seq, v.to_vec()).unwrap();
        let epochs = [
            e([Some(1.0), Some(2.0), None, Some(5.0), None]),
            e([Some(3.0), Some(2.2), None, Some(9.0), None]),
            e([Some(2.0), Some(90.0), Some(4.0), None, None]),
        ];
        // Median by definition (odd count: middle value; even: mean of the
        // two middle ones); a quadrupole read by fewer than half the epochs
        // is dropped.
        let m = EpochData::median_of(&epochs).unwrap();
        assert_eq!(m.resistances(), &[Some(2.0), Some(2.2), None, Some(7.0), None]);
        assert_eq!(
            EpochData::new(&seq, vec![Some(1.0)]),
            Err(InversionError::Length { what: "resistances", expected: 5, got: 1 })
        );
        assert_eq!(
            EpochData::new(&seq, vec![Some(1.0), Some(f64::NAN), None, None, None])
                .unwrap_err()
                .to_string(),
            "reading 1: resistance NaN Ω is not finite"
        );
        // All readings with the sign opposite to K: nothing to invert.
        let line = flat_line(8, 1.0);
        let fwd = forward_for(&line, &coarse());
        let negative = EpochData::new(&seq, vec![Some(-1.0); 5]).unwrap();
        let errors = ErrorModel::new(0.0, 0.02).unwrap();
        let params = InversionParams::default();
        assert_eq!(
            invert(&fwd, &seq, &negative, &errors, StartModel::MedianApparent, &params),
            Err(InversionError::NoData { present: 5, wrong_sign: 5 })
        );
        let bad = InversionParams { chi2_tolerance: 0.0, ..InversionParams::default() };
        let data = EpochData::new(&seq, vec![Some(1.0); 5]).unwrap();
        assert_eq!(
            invert(&fwd, &seq, &data, &errors, StartModel::MedianApparent, &bad),
            Err(InversionError::BadParam {
                name: "chi2_tolerance",
                value: 0.0,
                requirement: "in (0, 1)"
            })
        );
        assert_eq!(
            invert(&fwd, &seq, &data, &errors, StartModel::Model(&[1.0]), &params),
            Err(InversionError::Length {
                what: "model",
                expected: fwd.mesh().section().len(),
                got: 1
            })
        );
    }
}
