//! Sensitivities: the Jacobian of log transfer resistances with respect to
//! log cell resistivities, and cumulative sensitivity per cell.
//!
//! Adjoint/reciprocity formula (METHODS §1.7; Ellis & Oldenburg 1994,
//! *GJI* 119, 187–194): for the pole–pole resistance u_AM with unit current,
//! ∂u_AM/∂ln σ_j = −2 Σ_i w_i φ̃_A(k_i)ᵀ K_j(k_i) φ̃_M(k_i), where K_j(k) is the
//! part of the system matrix contributed by cell j (stiffness, k²·mass and its
//! mixed-boundary edges, all ∝ σ_j) and φ̃_A the wavenumber-domain field of a
//! source at A (right-hand side I/2). With ln ρ = −ln σ the sign flips:
//! ∂u_AM/∂ln ρ_j = +2 Σ_i w_i φ̃_Aᵀ K_j φ̃_M. Four-electrode data combine the
//! terms AM − AN − BM + BN; dividing by R gives ∂ln|R|/∂ln ρ_j
//! (dimensionless). Because R is homogeneous of degree one in ρ, each row
//! sums to 1 on any model (exactly for the discrete system).
//!
//! The per-cell products φ̃_Aᵀ K_j φ̃_M for all electrode pairs are one small
//! dense product Φ_jᵀ(K_j Φ_j) per cell, Φ_j the fields of all electrodes on
//! the cell's nodes; no extra factorisation or solve is needed.
//!
//! Cumulative sensitivity (METHODS §3.4): S_j = Σ_i |J_ij|/ε_i / area_j,
//! normalised to a maximum of 1, with ε_i the relative error of datum i.

use faer::linalg::matmul::triangular::{BlockStructure, matmul};
use faer::{Accum, Mat, MatMut, MatRef, Par};
use thiserror::Error;

use crate::forward::Forward;
use crate::section::SectionGrid;
use crate::sequence::Quadrupole;

/// Why a sensitivity computation cannot be done.
#[derive(Debug, Error, PartialEq)]
pub enum SensitivityError {
    /// Lengths of the inputs do not match.
    #[error("{what}: expected {expected} values, got {got}")]
    Length {
        /// Which input.
        what: &'static str,
        /// Values needed.
        expected: usize,
        /// Values given.
        got: usize,
    },
    /// A data error is not positive and finite.
    #[error("datum {index}: relative error {value} is not positive and finite")]
    BadError {
        /// Datum index.
        index: usize,
        /// The value.
        value: f64,
    },
}

/// The Jacobian ∂ln|R_i|/∂ln ρ_j, n_data × n_cells, row-major by datum.
#[derive(Debug, Clone, PartialEq)]
pub struct Jacobian {
    n_data: usize,
    n_cells: usize,
    values: Vec<f64>,
    zero_resistance: Vec<usize>,
}

impl Jacobian {
    /// Number of data (rows).
    pub fn n_data(&self) -> usize {
        self.n_data
    }

    /// Number of section cells (columns).
    pub fn n_cells(&self) -> usize {
        self.n_cells
    }

    /// All entries, row-major (datum i, cell j at `i * n_cells + j`).
    pub fn values(&self) -> &[f64] {
        &self.values
    }

    /// Row of datum `i`: its sensitivity to every cell.
    pub fn row(&self, i: usize) -> &[f64] {
        &self.values[i * self.n_cells..(i + 1) * self.n_cells]
    }

    /// Entry (datum `i`, cell `j`).
    pub fn get(&self, i: usize, j: usize) -> f64 {
        self.values[i * self.n_cells + j]
    }

    /// Data whose modelled R is exactly zero: ln|R| is undefined there and
    /// their rows are left at zero.
    pub fn zero_resistance(&self) -> &[usize] {
        &self.zero_resistance
    }

    /// The entries, row-major (n_data × n_cells), taking ownership.
    pub fn into_values(self) -> Vec<f64> {
        self.values
    }

    /// A Jacobian from row-major entries (n_data × n_cells); `None` when the
    /// length does not match. Rows of exactly zero stand for zero resistances.
    pub(crate) fn from_values(n_data: usize, n_cells: usize, values: Vec<f64>) -> Option<Self> {
        if values.len() != n_data * n_cells {
            return None;
        }
        let zero_resistance = (0..n_data)
            .filter(|&i| values[i * n_cells..(i + 1) * n_cells].iter().all(|v| *v == 0.0))
            .collect();
        Some(Self { n_data, n_cells, values, zero_resistance })
    }
}

/// Collects the fields of every wavenumber during a forward run, then forms
/// ∂ln|R|/∂ln ρ cell by cell.
pub(crate) struct JacobianAccumulator {
    /// Per datum: up to four (index into the lower triangle of a column-major
    /// n_e × n_e matrix, sign) terms.
    terms: Vec<[(usize, f64); 4]>,
    sigma: Vec<f64>,
    /// Per wavenumber: (index, weight, node-major fields n_nodes × n_e).
    fields: Vec<(usize, f64, Vec<f64>)>,
}

impl JacobianAccumulator {
    pub(crate) fn new(fwd: &Forward, quads: &[Quadrupole], sigma: &[f64]) -> Self {
        let ne = fwd.mesh().electrode_nodes().len();
        let terms = quads
            .iter()
            .map(|q| {
                let mut t = [(0usize, 0.0f64); 4];
                let pairs = [
                    (Some(q.a), Some(q.m), 1.0),
                    (Some(q.a), q.n, -1.0),
                    (q.b, Some(q.m), -1.0),
                    (q.b, q.n, 1.0),
                ];
                for (slot, (a, m, sign)) in t.iter_mut().zip(pairs) {
                    if let (Some(a), Some(m)) = (a, m) {
                        // Lower triangle of the column-major product: row ≥ column.
                        *slot = (a.max(m) + a.min(m) * ne, sign);
                    }
                }
                t
            })
            .collect();
        Self { terms, sigma: sigma.to_vec(), fields: Vec::new() }
    }

    /// Keeps the fields of wavenumber index `ki` (weight `w`); `phi` is
    /// n_nodes × n_electrodes with rows in the solver's ordering.
    pub(crate) fn add_wavenumber(&mut self, fwd: &Forward, ki: usize, w: f64, phi: &Mat<f64>) {
        let ne = phi.ncols();
        let rows = fwd.node_row();
        let mut nm = vec![0.0; rows.len() * ne];
        for src in 0..ne {
            let col = phi.col_as_slice(src);
            for (v, &row) in rows.iter().enumerate() {
                nm[v * ne + src] = col[row];
            }
        }
        self.fields.push((ki, w, nm));
    }

    /// For each cell j: E_j = Σ_k 2·w_k·F_k K_j(k) F_kᵀ (n_e × n_e, F_k the
    /// fields of all sources on the cell's nodes), then every datum's
    /// combination of E_j divided by its R.
    pub(crate) fn finish(self, fwd: &Forward, resistances: &[f64]) -> Jacobian {
        let mesh = fwd.mesh();
        let ne = mesh.electrode_nodes().len();
        let (nd, n_cells) = (resistances.len(), mesh.section().len());
        let bc_of = fwd.boundary_edges_by_triangle();
        let inv: Vec<f64> =
            resistances.iter().map(|&r| if r == 0.0 { 0.0 } else { 1.0 / r }).collect();
        let mut values = vec![0.0; nd * n_cells];
        let mut ev = vec![0.0; ne * ne];
        let mut stamp = vec![usize::MAX; mesh.nodes().len()];
        let mut local = vec![0usize; mesh.nodes().len()];
        let mut nodes: Vec<usize> = Vec::new();
        let mut loc: Vec<[usize; 3]> = Vec::new();
        let (mut f, mut g) = (Vec::new(), Vec::new());
        for (c, tris) in fwd.cell_triangles().iter().enumerate() {
            if tris.is_empty() {
                continue;
            }
            nodes.clear();
            loc.clear();
            for &t in tris {
                loc.push(mesh.triangles()[t].map(|v| {
                    if stamp[v] != c {
                        stamp[v] = c;
                        local[v] = nodes.len();
                        nodes.push(v);
                    }
                    local[v]
                }));
            }
            let nc = nodes.len();
            f.resize(nc * ne, 0.0);
            g.resize(nc * ne, 0.0);
            for (i, (ki, w, nm)) in self.fields.iter().enumerate() {
                // F (n_e × n_c, column l = fields at the cell's node l), G = F·K_c.
                for (l, &v) in nodes.iter().enumerate() {
                    f[l * ne..(l + 1) * ne].copy_from_slice(&nm[v * ne..(v + 1) * ne]);
                }
                g.fill(0.0);
                for (&t, lt) in tris.iter().zip(&loc) {
                    let s = self.sigma[t];
                    let k = fwd.local_matrix(t, *ki, &bc_of).map(|v| s * v);
                    for r in 0..3 {
                        let gi = &mut g[lt[r] * ne..(lt[r] + 1) * ne];
                        let (f0, f1, f2) = (
                            &f[lt[0] * ne..(lt[0] + 1) * ne],
                            &f[lt[1] * ne..(lt[1] + 1) * ne],
                            &f[lt[2] * ne..(lt[2] + 1) * ne],
                        );
                        let (k0, k1, k2) = (k[3 * r], k[3 * r + 1], k[3 * r + 2]);
                        for (((o, a), b), d) in gi.iter_mut().zip(f0).zip(f1).zip(f2) {
                            *o += k0 * a + k1 * b + k2 * d;
                        }
                    }
                }
                let fm = MatRef::from_column_major_slice(&f[..], ne, nc);
                let gm = MatRef::from_column_major_slice(&g[..], ne, nc);
                // E = F·K_c·Fᵀ is symmetric: accumulate its lower triangle only.
                matmul(
                    MatMut::from_column_major_slice_mut(&mut ev, ne, ne),
                    BlockStructure::TriangularLower,
                    if i == 0 { Accum::Replace } else { Accum::Add },
                    fm,
                    BlockStructure::Rectangular,
                    gm.transpose(),
                    BlockStructure::Rectangular,
                    2.0 * w,
                    Par::Seq,
                );
            }
            for (d, t) in self.terms.iter().enumerate() {
                let v = t[0].1 * ev[t[0].0]
                    + t[1].1 * ev[t[1].0]
                    + t[2].1 * ev[t[2].0]
                    + t[3].1 * ev[t[3].0];
                values[d * n_cells + c] = v * inv[d];
            }
        }
        let zero_resistance =
            resistances.iter().enumerate().filter(|(_, r)| **r == 0.0).map(|(i, _)| i).collect();
        Jacobian { n_data: nd, n_cells, values, zero_resistance }
    }
}

/// Cumulative sensitivity per cell, S_j = Σ_i |J_ij|/ε_i / area_j, normalised
/// so the largest is 1 (dimensionless). `relative_errors` ε_i has one positive
/// value per datum (e.g. 0.02 for 2 %).
pub fn cumulative_sensitivity(
    jacobian: &Jacobian,
    relative_errors: &[f64],
    section: &SectionGrid,
) -> Result<Vec<f64>, SensitivityError> {
    if relative_errors.len() != jacobian.n_data {
        return Err(SensitivityError::Length {
            what: "relative_errors",
            expected: jacobian.n_data,
            got: relative_errors.len(),
        });
    }
    if section.len() != jacobian.n_cells {
        return Err(SensitivityError::Length {
            what: "section cells",
            expected: jacobian.n_cells,
            got: section.len(),
        });
    }
    if let Some((index, &value)) =
        relative_errors.iter().enumerate().find(|(_, e)| !(e.is_finite() && **e > 0.0))
    {
        return Err(SensitivityError::BadError { index, value });
    }
    let mut s = vec![0.0; jacobian.n_cells];
    for (i, eps) in relative_errors.iter().enumerate() {
        for (sj, j) in s.iter_mut().zip(jacobian.row(i)) {
            *sj += j.abs() / eps;
        }
    }
    for (sj, cell) in s.iter_mut().zip(section.cells()) {
        *sj /= cell.area();
    }
    let max = s.iter().fold(0.0f64, |m, v| m.max(*v));
    if max > 0.0 {
        s.iter_mut().for_each(|v| *v /= max);
    }
    Ok(s)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::forward::{ForwardParams, Resistivity};
    use crate::geometry::{Electrode, LineGeometry, Surface};
    use crate::mesh::{Mesh, MeshParams};
    use crate::sequence::{Sequence, WennerParams, wenner};

    fn jacobian() -> (Jacobian, SectionGrid) {
        let line = LineGeometry::new(
            (0..12).map(|i| Electrode::new(format!("{i}"), i as f64, 0.0)).collect(),
        )
        .unwrap();
        let s = Surface::through_line(&line, &[]).unwrap();
        let mesh = Mesh::new(&line, &s, &MeshParams::default()).unwrap();
        let fwd = Forward::new(mesh, &ForwardParams::default()).unwrap();
        let seq = Sequence::new(wenner(12, &WennerParams { max_a: 3 }), 12).unwrap();
        let rho = vec![50.0; fwd.mesh().section().len()];
        let (_, jac) = fwd.simulate_with_jacobian(Resistivity::Cells(&rho), &seq).unwrap();
        (jac, fwd.mesh().section().clone())
    }

    /// Cumulative sensitivity with errors `eps` against the definition
    /// S_j = Σ_i |J_ij|/ε_i / area_j, normalised to max 1 (METHODS §3.4).
    fn check(jac: &Jacobian, section: &SectionGrid, eps: &[f64]) -> Vec<f64> {
        let s = cumulative_sensitivity(jac, eps, section).unwrap();
        let raw: Vec<f64> = (0..jac.n_cells())
            .map(|j| {
                (0..jac.n_data()).map(|i| jac.get(i, j).abs() / eps[i]).sum::<f64>()
                    / section.cells()[j].area()
            })
            .collect();
        let max = raw.iter().cloned().fold(0.0, f64::max);
        for (a, b) in s.iter().zip(&raw) {
            assert!((a - b / max).abs() < 1e-12);
        }
        assert!((s.iter().cloned().fold(0.0, f64::max) - 1.0).abs() < 1e-15);
        s
    }

    #[test]
    fn cumulative_sensitivity_follows_its_definition_and_decays_with_depth() {
        let (jac, section) = jacobian();
        let eps: Vec<f64> = (0..jac.n_data()).map(|i| 0.01 + 0.001 * i as f64).collect();
        let s = check(&jac, &section, &eps);
        // Under the line centre, sensitivity of surface arrays on homogeneous
        // ground falls off with depth (Oldenburg & Li 1999 use this decay for
        // their depth-of-investigation masks); compare a shallow and a deep cell.
        let shallow = section.locate(5.6, -0.1).unwrap();
        let deep = section.locate(5.6, -2.5).unwrap();
        assert!(s[shallow] > 10.0 * s[deep], "{} vs {}", s[shallow], s[deep]);
        assert_eq!(
            cumulative_sensitivity(&jac, &eps[1..], &section),
            Err(SensitivityError::Length {
                what: "relative_errors",
                expected: jac.n_data(),
                got: jac.n_data() - 1
            })
        );
        let mut bad = eps.clone();
        bad[2] = 0.0;
        assert_eq!(
            cumulative_sensitivity(&jac, &bad, &section),
            Err(SensitivityError::BadError { index: 2, value: 0.0 })
        );
    }
}
