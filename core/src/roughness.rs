//! Model regularisation on a section grid: first-order roughness between
//! edge-sharing cells plus a weak smallness term.
//!
//! For a model vector m (one value per section cell, here ln ρ with ρ in Ω·m)
//! and a reference m_ref, with u = m − m_ref,
//!
//! ```text
//!     ‖W_m u‖² = Σ_(i,j) c_k·w_k·(u_i − u_j)²  +  α_s·Σ_i (A_i / a²)·u_i²,
//!     w_k = (α_x·cos²θ_k + α_z·sin²θ_k)·ℓ_k / d_k
//! ```
//!
//! The first sum runs over pairs of cells sharing an edge (k = 1…n_pairs):
//! ℓ_k is the length of the shared edge (m), d_k the distance between the two
//! cell centroids (m) and θ_k the angle of the centroid-to-centroid vector to
//! the horizontal (x axis). ℓ/d·(u_i − u_j)² is the two-point finite-volume
//! approximation of ∫|∇u|² dA over the region between the two centroids, so
//! the sum approximates ∫(α_x u_x² + α_z u_z²) dA independently of the cell
//! sizes (exact for a linear u on a regular grid, see the tests): the
//! first-order smoothness operator of deGroot-Hedlin & Constable (1990,
//! *Geophysics* 55, 1613–1624) with horizontal and vertical weights α_x, α_z,
//! weighted by length. c_k = 1 except under the robust (IRLS) model norm,
//! where c_k is the reweighting factor of pair k (see
//! [`Roughness::huber_weights`]).
//!
//! The second sum is a weak smallness term (α_s ≥ 0, dimensionless; A_i the
//! cell area in m², a the line's nominal electrode spacing in m). With α_s > 0,
//! W_mᵀW_m is positive definite, which the data-space Gauss–Newton step needs;
//! α_s = 1e-3 (the default) pulls only the part of the model that the
//! roughness term leaves free (a constant shift) towards the reference.

use faer::sparse::{SparseColMat, Triplet};
use thiserror::Error;

use crate::section::SectionGrid;

/// Weights of the regularisation (all dimensionless, ≥ 0).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RoughnessParams {
    /// α_x: weight of horizontal gradients (along the chainage).
    pub horizontal: f64,
    /// α_z: weight of vertical gradients.
    pub vertical: f64,
    /// α_s: weight of the smallness term (area-weighted, per a²).
    pub smallness: f64,
}

impl Default for RoughnessParams {
    /// Isotropic smoothing (α_x = α_z = 1) and α_s = 1e-3 (common practice,
    /// no source: a smallness weight well below the roughness weight keeps
    /// the image smooth rather than close to the reference).
    fn default() -> Self {
        Self { horizontal: 1.0, vertical: 1.0, smallness: 1e-3 }
    }
}

/// Why a regularisation operator cannot be built or applied.
#[derive(Debug, Error, PartialEq)]
pub enum RoughnessError {
    /// A weight is negative or not finite, or all are zero.
    #[error("roughness parameter {name} = {value} is not valid: {requirement}")]
    BadParam {
        /// The field of [`RoughnessParams`].
        name: &'static str,
        /// The value given.
        value: f64,
        /// What it must satisfy.
        requirement: &'static str,
    },
    /// A vector has the wrong length.
    #[error("{what}: expected {expected} values, got {got}")]
    Length {
        /// Which input.
        what: &'static str,
        /// Values needed.
        expected: usize,
        /// Values given.
        got: usize,
    },
    /// The electrode spacing is not positive and finite.
    #[error("electrode spacing {value} m must be positive and finite")]
    BadSpacing {
        /// The value.
        value: f64,
    },
}

/// One pair of edge-sharing cells.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CellPair {
    /// Lower cell index.
    pub i: usize,
    /// Higher cell index.
    pub j: usize,
    /// w_k = (α_x cos²θ + α_z sin²θ)·ℓ/d, dimensionless.
    pub weight: f64,
}

/// The regularisation operator of a section grid (see the module docs).
#[derive(Debug, Clone, PartialEq)]
pub struct Roughness {
    n_cells: usize,
    pairs: Vec<CellPair>,
    /// α_s·A_i/a² per cell.
    smallness: Vec<f64>,
}

impl Roughness {
    /// Builds the operator for `section`; `spacing_m` is the line's nominal
    /// electrode spacing a (m), which scales the smallness term.
    pub fn new(
        section: &SectionGrid,
        spacing_m: f64,
        params: &RoughnessParams,
    ) -> Result<Self, RoughnessError> {
        for (name, value) in [
            ("horizontal", params.horizontal),
            ("vertical", params.vertical),
            ("smallness", params.smallness),
        ] {
            if !(value.is_finite() && value >= 0.0) {
                return Err(RoughnessError::BadParam {
                    name,
                    value,
                    requirement: "finite and ≥ 0",
                });
            }
        }
        if params.horizontal + params.vertical + params.smallness <= 0.0 {
            return Err(RoughnessError::BadParam {
                name: "smallness",
                value: params.smallness,
                requirement: "at least one weight must be positive",
            });
        }
        if !(spacing_m.is_finite() && spacing_m > 0.0) {
            return Err(RoughnessError::BadSpacing { value: spacing_m });
        }
        let cells = section.cells();
        let mut pairs = Vec::new();
        for (i, ci) in cells.iter().enumerate() {
            for &j in section.neighbours(i).iter().filter(|&&j| j > i) {
                let cj = &cells[j];
                let len = shared_edge_length(ci.polygon(), cj.polygon());
                let (p, q) = (ci.centroid(), cj.centroid());
                let (dx, dz) = (q[0] - p[0], q[1] - p[1]);
                let d2 = dx * dx + dz * dz;
                if len <= 0.0 || d2 <= 0.0 {
                    continue;
                }
                let dir = (params.horizontal * dx * dx + params.vertical * dz * dz) / d2;
                pairs.push(CellPair { i, j, weight: dir * len / d2.sqrt() });
            }
        }
        let a2 = spacing_m * spacing_m;
        let smallness = cells.iter().map(|c| params.smallness * c.area() / a2).collect();
        Ok(Self { n_cells: cells.len(), pairs, smallness })
    }

    /// Number of cells (model parameters).
    pub fn n_cells(&self) -> usize {
        self.n_cells
    }

    /// The edge-sharing pairs with their weights.
    pub fn pairs(&self) -> &[CellPair] {
        &self.pairs
    }

    /// Smallness weight α_s·A_i/a² of each cell.
    pub fn smallness(&self) -> &[f64] {
        &self.smallness
    }

    /// ‖W_m u‖² for u = m − m_ref with pair factors `pair_factors` (c_k; all 1
    /// for the plain L2 norm, `None` means all 1).
    pub fn norm2(&self, u: &[f64], pair_factors: Option<&[f64]>) -> Result<f64, RoughnessError> {
        self.check(u, pair_factors)?;
        let rough: f64 = self
            .pairs
            .iter()
            .enumerate()
            .map(|(k, p)| {
                let c = pair_factors.map_or(1.0, |f| f[k]);
                c * p.weight * (u[p.i] - u[p.j]).powi(2)
            })
            .sum();
        let small: f64 = self.smallness.iter().zip(u).map(|(s, v)| s * v * v).sum();
        Ok(rough + small)
    }

    /// IRLS factors c_k that turn the L2 roughness into a Huber measure
    /// (quadratic for |g_k| ≤ `threshold`, linear beyond; an L1 "blocky"
    /// norm when the threshold is small): c_k = min(1, threshold/|g_k|) with
    /// g_k = √w_k·(u_i − u_j) (Farquharson & Oldenburg 1998, *GJI* 134,
    /// 213–227; Loke, Acworth & Dahlin 2003, *Exploration Geophysics* 34,
    /// 182–187).
    pub fn huber_weights(&self, u: &[f64], threshold: f64) -> Result<Vec<f64>, RoughnessError> {
        self.check(u, None)?;
        Ok(self
            .pairs
            .iter()
            .map(|p| {
                let g = (p.weight.sqrt() * (u[p.i] - u[p.j])).abs();
                if g <= threshold { 1.0 } else { threshold / g }
            })
            .collect())
    }

    /// W_mᵀW_m (with pair factors c_k) as a sparse symmetric n_cells × n_cells
    /// matrix, lower triangle only (row ≥ column).
    pub fn matrix_lower(
        &self,
        pair_factors: Option<&[f64]>,
    ) -> Result<SparseColMat<usize, f64>, RoughnessError> {
        self.check(&self.smallness, pair_factors)?;
        let mut diag = self.smallness.clone();
        let mut t = Vec::with_capacity(self.pairs.len() + self.n_cells);
        for (k, p) in self.pairs.iter().enumerate() {
            let w = pair_factors.map_or(1.0, |f| f[k]) * p.weight;
            diag[p.i] += w;
            diag[p.j] += w;
            t.push(Triplet::new(p.j, p.i, -w));
        }
        t.extend(diag.iter().enumerate().map(|(i, &v)| Triplet::new(i, i, v)));
        Ok(SparseColMat::try_new_from_triplets(self.n_cells, self.n_cells, &t)
            .expect("unique in-range entries"))
    }

    fn check(&self, u: &[f64], pair_factors: Option<&[f64]>) -> Result<(), RoughnessError> {
        if u.len() != self.n_cells {
            return Err(RoughnessError::Length {
                what: "model",
                expected: self.n_cells,
                got: u.len(),
            });
        }
        if let Some(f) = pair_factors
            && f.len() != self.pairs.len()
        {
            return Err(RoughnessError::Length {
                what: "pair factors",
                expected: self.pairs.len(),
                got: f.len(),
            });
        }
        Ok(())
    }
}

/// Length (m) of the edge two polygons share (vertices matched to 1 µm);
/// 0 when they share none.
fn shared_edge_length(p: &[[f64; 2]], q: &[[f64; 2]]) -> f64 {
    let same = |a: [f64; 2], b: [f64; 2]| (a[0] - b[0]).abs() < 1e-6 && (a[1] - b[1]).abs() < 1e-6;
    let mut total = 0.0;
    for k in 0..p.len() {
        let (a, b) = (p[k], p[(k + 1) % p.len()]);
        for l in 0..q.len() {
            let (c, d) = (q[l], q[(l + 1) % q.len()]);
            if (same(a, c) && same(b, d)) || (same(a, d) && same(b, c)) {
                total += (b[0] - a[0]).hypot(b[1] - a[1]);
            }
        }
    }
    total
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geometry::Surface;

    /// A regular grid of nx × nz cells of hx × hz metres under flat ground.
    fn grid(nx: usize, nz: usize, hx: f64, hz: f64) -> SectionGrid {
        let mut polys = Vec::new();
        for j in 0..nz {
            for i in 0..nx {
                let (x, z) = (i as f64 * hx, -(j as f64) * hz);
                polys.push(vec![[x, z], [x, z - hz], [x + hx, z - hz], [x + hx, z]]);
            }
        }
        let s = Surface::new(vec![[0.0, 0.0], [nx as f64 * hx, 0.0]]).unwrap();
        SectionGrid::new(polys, s).unwrap()
    }

    /// ‖W_m u‖² of u(x, z) on the grid against an expected value.
    fn check(params: RoughnessParams, u: impl Fn([f64; 2]) -> f64, expected: f64, tol: f64) {
        let g = grid(6, 4, 0.5, 0.25);
        let r = Roughness::new(&g, 1.0, &params).unwrap();
        let v: Vec<f64> = g.cells().iter().map(|c| u(c.centroid())).collect();
        let got = r.norm2(&v, None).unwrap();
        assert!((got - expected).abs() <= tol * expected.abs().max(1.0), "{got} vs {expected}");
        // The sparse matrix gives the same quadratic form uᵀ(W_mᵀW_m)u.
        let m = r.matrix_lower(None).unwrap();
        let mut q = 0.0;
        for (col, vc) in v.iter().enumerate() {
            let rows = m.symbolic().row_idx_of_col_raw(col);
            for (&row, val) in rows.iter().zip(m.val_of_col(col)) {
                let f = if row == col { 1.0 } else { 2.0 };
                q += f * val * v[row] * vc;
            }
        }
        assert!((q - got).abs() <= 1e-12 * got.abs().max(1.0), "{q} vs {got}");
    }

    #[test]
    fn linear_fields_integrate_exactly() {
        // Two-point finite-volume flux: for u = g·x on a regular grid,
        // Σ ℓ/d·(Δu)² = g²·hx·hz·nz·(nx − 1) = ∫|∇u|² dA over the rectangle
        // between the outer centroid columns (exact, calculus).
        let iso = RoughnessParams { horizontal: 1.0, vertical: 1.0, smallness: 0.0 };
        let g = 0.8;
        check(iso, |c| g * c[0], g * g * 0.5 * 0.25 * 4.0 * 5.0, 1e-12);
        // u = g·z: the vertical pairs, nx·(nz − 1) of them.
        check(iso, |c| g * c[1], g * g * 0.5 * 0.25 * 6.0 * 3.0, 1e-12);
        // Anisotropic weights scale each direction; a constant costs nothing.
        let aniso = RoughnessParams { horizontal: 3.0, vertical: 0.5, smallness: 0.0 };
        check(aniso, |c| g * c[0] + g * c[1], g * g * 0.125 * (3.0 * 20.0 + 0.5 * 18.0), 1e-12);
        check(iso, |_| 4.2, 0.0, 1e-12);
        // Smallness: α_s Σ A_i/a² u² = α_s·(area)·u² for a constant u.
        let small = RoughnessParams { horizontal: 1.0, vertical: 1.0, smallness: 0.1 };
        check(small, |_| 2.0, 0.1 * 3.0 * 1.0 * 4.0, 1e-12);
    }

    #[test]
    fn huber_factors_and_errors() {
        let g = grid(3, 1, 1.0, 1.0);
        let r = Roughness::new(&g, 1.0, &RoughnessParams::default()).unwrap();
        assert_eq!(r.pairs().len(), 2);
        // Unit weights (ℓ = d = 1): g = Δu; Huber factor min(1, c/|g|).
        let w = r.huber_weights(&[0.0, 0.1, 2.1], 0.5).unwrap();
        assert_eq!(w, vec![1.0, 0.25]);
        assert_eq!(
            r.norm2(&[1.0], None),
            Err(RoughnessError::Length { what: "model", expected: 3, got: 1 })
        );
        let bad = RoughnessParams { vertical: -1.0, ..RoughnessParams::default() };
        assert_eq!(
            Roughness::new(&g, 1.0, &bad),
            Err(RoughnessError::BadParam {
                name: "vertical",
                value: -1.0,
                requirement: "finite and ≥ 0"
            })
        );
    }
}
