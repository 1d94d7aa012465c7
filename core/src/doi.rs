//! Depth-of-investigation index from two reference models (Oldenburg & Li
//! 1999, *Geophysics* 64, 403–416).
//!
//! The data are inverted twice more, with reference (and start) models
//! m_r1 = ln(ρ_bg/q) and m_r2 = ln(ρ_bg·q) (ρ_bg the median apparent
//! resistivity in Ω·m, q > 1 the reference factor) and a smallness weight α_s
//! large enough for the reference to matter where the data are silent; both
//! fit the data to the same target misfit (the λ strategy of the given
//! settings, Occam by default). The index per cell is
//!
//! ```text
//!     R_j = (m1_j − m2_j) / (m_r1 − m_r2)     (ln ρ units, dimensionless)
//! ```
//!
//! R ≈ 0 where both inversions agree (the data determine the cell), R → 1
//! where each follows its own reference (METHODS §3.4; cells with R above
//! ≈ 0.1–0.2 are treated as unconstrained, from memory). This is the
//! expensive option; the coverage mask of every inversion report is the
//! cheap one.

use thiserror::Error;

use crate::errormodel::ErrorModel;
use crate::forward::Forward;
use crate::inversion::{
    EpochData, InversionError, InversionParams, JacobianSource, Problem, gauss_newton, prepare,
};
use crate::roughness::RoughnessParams;
use crate::sequence::Sequence;

/// Why a DOI index cannot be computed.
#[derive(Debug, Error, PartialEq)]
pub enum DoiError {
    /// A parameter is out of range.
    #[error("DOI parameter {name} = {value} is not valid: {requirement}")]
    BadParam {
        /// The field of [`DoiParams`].
        name: &'static str,
        /// The value given.
        value: f64,
        /// What it must satisfy.
        requirement: &'static str,
    },
    /// One of the two inversions failed.
    #[error("{0}")]
    Inversion(#[from] InversionError),
}

/// Settings of the DOI index.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DoiParams {
    /// Reference factor q (> 1): references at ρ_bg/q and ρ_bg·q.
    pub reference_factor: f64,
    /// Smallness weight α_s of the two inversions (> 0).
    pub smallness: f64,
    /// Cells with R above this are outside the DOI mask (in (0, 1)).
    pub threshold: f64,
}

impl Default for DoiParams {
    /// q = 10 (METHODS §3.4: 0.1× and 10× the background), α_s = 1
    /// (where the data are silent the model relaxes to the reference over
    /// about a/√α_s, one electrode spacing; common practice, no source),
    /// threshold 0.2 (METHODS §3.4, from memory).
    fn default() -> Self {
        Self { reference_factor: 10.0, smallness: 1.0, threshold: 0.2 }
    }
}

/// The DOI index and its mask.
#[derive(Debug, Clone, PartialEq)]
pub struct DoiReport {
    index: Vec<f64>,
    mask: Vec<bool>,
    warnings: Vec<String>,
}

impl DoiReport {
    /// R per cell (dimensionless; 0 = determined by the data).
    pub fn index(&self) -> &[f64] {
        &self.index
    }

    /// Per cell, true where R ≤ threshold.
    pub fn mask(&self) -> &[bool] {
        &self.mask
    }

    /// Warnings of the two inversions, prefixed by which.
    pub fn warnings(&self) -> &[String] {
        &self.warnings
    }
}

/// The DOI index of `data` on `sequence` with the inversion settings
/// `params` (their smallness replaced by the DOI's).
pub fn doi_index(
    forward: &Forward,
    sequence: &Sequence,
    data: &EpochData,
    errors: &ErrorModel,
    doi: &DoiParams,
    params: &InversionParams,
) -> Result<DoiReport, DoiError> {
    if !(doi.reference_factor > 1.0 && doi.reference_factor.is_finite()) {
        return Err(DoiError::BadParam {
            name: "reference_factor",
            value: doi.reference_factor,
            requirement: "finite and > 1",
        });
    }
    if !(doi.smallness > 0.0 && doi.smallness.is_finite()) {
        return Err(DoiError::BadParam {
            name: "smallness",
            value: doi.smallness,
            requirement: "positive and finite",
        });
    }
    if !(doi.threshold > 0.0 && doi.threshold < 1.0) {
        return Err(DoiError::BadParam {
            name: "threshold",
            value: doi.threshold,
            requirement: "in (0, 1)",
        });
    }
    let p = forward.mesh().section().len();
    let inv = InversionParams {
        roughness: RoughnessParams { smallness: doi.smallness, ..params.roughness },
        ..params.clone()
    };
    let prepared = prepare(forward, sequence, data, errors, &inv)?;
    let q = doi.reference_factor.ln();
    let bg = prepared.median_rho_a.ln();
    let mut models = Vec::with_capacity(2);
    let mut warnings = Vec::new();
    for (name, r) in [("low reference", bg - q), ("high reference", bg + q)] {
        let problem = Problem {
            forward,
            sequence: prepared.sequence.clone(),
            data: prepared.data.clone(),
            eps: prepared.eps.clone(),
            m_ref: vec![r; p],
            jacobian: JacobianSource::Update,
            used: prepared.used.clone(),
        };
        let out = gauss_newton(&problem, vec![r; p], &inv)?.report;
        warnings.extend(out.warnings().iter().map(|w| format!("{name}: {w}")));
        models.push(out.model().to_vec());
    }
    let index: Vec<f64> =
        models[0].iter().zip(&models[1]).map(|(a, b)| (a.ln() - b.ln()) / (-2.0 * q)).collect();
    let mask = index.iter().map(|r| r.abs() <= doi.threshold).collect();
    Ok(DoiReport { index, mask, warnings })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::inversion::tests::{coarse, flat_line, forward_for, sequence, synthetic};
    use crate::mesh::MeshParams;
    use crate::model::ModelDescription;

    #[test]
    fn index_is_small_near_the_surface_and_large_at_depth() {
        // Oldenburg & Li (1999): under the line near the surface the two
        // inversions agree (R small); far below the deepest median depth of
        // investigation they follow their references (R large). Homogeneous
        // 100 Ω·m, 24 electrodes, Wenner and dipole–dipole data (deepest
        // median depth 4.2 m); the section reaches 17 m so that its bottom
        // cells, which also stand for the ground below, are far from it.
        let line = flat_line(24, 1.0);
        let fwd = forward_for(&line, &MeshParams { section_depth: 0.75, ..coarse() });
        let seq = sequence(24);
        let data = synthetic(&fwd, &seq, &ModelDescription::homogeneous(100.0).unwrap(), None);
        let errors = ErrorModel::new(0.0, 0.02).unwrap();
        let params = InversionParams::default();
        let doi = doi_index(&fwd, &seq, &data, &errors, &DoiParams::default(), &params).unwrap();
        let section = fwd.mesh().section();
        let at = |z: f64| doi.index()[section.locate(11.6, -z).unwrap()];
        let profile: Vec<String> = [0.3, 1.0, 2.0, 4.0, 6.0, 9.0, 12.0]
            .iter()
            .map(|&z| format!("{z} m: {:.3}", at(z)))
            .collect();
        println!("DOI index under the centre: {profile:?}");
        assert!(at(0.3).abs() < 0.1, "{}", at(0.3));
        assert!(at(9.0) > 0.3, "{}", at(9.0));
        assert!(doi.mask()[section.locate(11.6, -0.3).unwrap()]);
        assert!(!doi.mask()[section.locate(11.6, -9.0).unwrap()]);
        let bad = DoiParams { reference_factor: 1.0, ..DoiParams::default() };
        assert_eq!(
            doi_index(&fwd, &seq, &data, &errors, &bad, &params),
            Err(DoiError::BadParam {
                name: "reference_factor",
                value: 1.0,
                requirement: "finite and > 1"
            })
        );
    }
}
