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

use faer::linalg::matmul::matmul;
use faer::{Accum, Mat, MatRef, Par};
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
}

/// Collects ∂R/∂ln ρ over wavenumbers during a forward run.
pub(crate) struct JacobianAccumulator {
    /// Per datum: up to four (flattened a·n_e + m index, sign) terms.
    terms: Vec<[(usize, f64); 4]>,
    n_data: usize,
    sigma: Vec<f64>,
    bc_of: Vec<Vec<usize>>,
    n_cells: usize,
    values: Vec<f64>,
    /// Per cell: its nodes, and per triangle of the cell the local indices.
    cell_nodes: Vec<Vec<usize>>,
    cell_local: Vec<Vec<[usize; 3]>>,
}

impl JacobianAccumulator {
    pub(crate) fn new(fwd: &Forward, quads: &[Quadrupole], sigma: &[f64]) -> Self {
        let mesh = fwd.mesh();
        let n_cells = mesh.section().len();
        let mut stamp = vec![usize::MAX; mesh.nodes().len()];
        let mut local = vec![0usize; mesh.nodes().len()];
        let mut cell_nodes = Vec::with_capacity(n_cells);
        let mut cell_local = Vec::with_capacity(n_cells);
        for (c, tris) in fwd.cell_triangles().iter().enumerate() {
            let mut nodes = Vec::new();
            let mut loc = Vec::with_capacity(tris.len());
            for &t in tris {
                let tri = mesh.triangles()[t];
                loc.push(tri.map(|v| {
                    if stamp[v] != c {
                        stamp[v] = c;
                        local[v] = nodes.len();
                        nodes.push(v);
                    }
                    local[v]
                }));
            }
            cell_nodes.push(nodes);
            cell_local.push(loc);
        }
        let ne = mesh.electrode_nodes().len();
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
                        *slot = (a * ne + m, sign);
                    }
                }
                t
            })
            .collect();
        Self {
            terms,
            n_data: quads.len(),
            sigma: sigma.to_vec(),
            bc_of: fwd.boundary_edges_by_triangle(),
            n_cells,
            values: vec![0.0; quads.len() * n_cells],
            cell_nodes,
            cell_local,
        }
    }

    /// Adds 2·w·φ̃_Aᵀ K_j φ̃_M combinations of one wavenumber; `phi` is
    /// n_nodes × n_electrodes.
    pub(crate) fn add_wavenumber(&mut self, fwd: &Forward, ki: usize, w: f64, phi: &Mat<f64>) {
        let ne = phi.ncols();
        let mut e = Mat::<f64>::zeros(ne, ne);
        let mut ev = vec![0.0; ne * ne];
        // Node-major copy of the fields: row v holds φ̃ of every source at node v.
        let n = phi.nrows();
        let mut nm = vec![0.0; n * ne];
        for src in 0..ne {
            for (v, &x) in phi.col_as_slice(src).iter().enumerate() {
                nm[v * ne + src] = x;
            }
        }
        let max_nc = self.cell_nodes.iter().map(Vec::len).max().unwrap_or(0);
        let mut f = vec![0.0; max_nc * ne];
        let mut g = vec![0.0; max_nc * ne];
        for c in 0..self.n_cells {
            let nodes = &self.cell_nodes[c];
            let nc = nodes.len();
            if nc == 0 {
                continue;
            }
            // F (n_e × n_c, column l = fields at the cell's node l), G = F·K_c.
            for (l, &v) in nodes.iter().enumerate() {
                f[l * ne..(l + 1) * ne].copy_from_slice(&nm[v * ne..(v + 1) * ne]);
            }
            g[..nc * ne].fill(0.0);
            for (&t, loc) in fwd.cell_triangles()[c].iter().zip(&self.cell_local[c]) {
                let s = self.sigma[t];
                let k = fwd.local_matrix(t, ki, &self.bc_of).map(|v| s * v);
                for i in 0..3 {
                    let gi = &mut g[loc[i] * ne..(loc[i] + 1) * ne];
                    let (f0, f1, f2) = (
                        &f[loc[0] * ne..(loc[0] + 1) * ne],
                        &f[loc[1] * ne..(loc[1] + 1) * ne],
                        &f[loc[2] * ne..(loc[2] + 1) * ne],
                    );
                    let (k0, k1, k2) = (k[3 * i], k[3 * i + 1], k[3 * i + 2]);
                    for (((o, a), b), d) in gi.iter_mut().zip(f0).zip(f1).zip(f2) {
                        *o += k0 * a + k1 * b + k2 * d;
                    }
                }
            }
            let fm = MatRef::from_column_major_slice(&f[..nc * ne], ne, nc);
            let gm = MatRef::from_column_major_slice(&g[..nc * ne], ne, nc);
            matmul(e.as_mut(), Accum::Replace, fm, gm.transpose(), 1.0, Par::Seq);
            // e is column-major: entry (a, m) at a + m·n_e; it is symmetric, so
            // index a·n_e + m reads the same value.
            for m in 0..ne {
                ev[m * ne..(m + 1) * ne].copy_from_slice(e.col_as_slice(m));
            }
            let out = &mut self.values[c * self.n_data..(c + 1) * self.n_data];
            for (o, t) in out.iter_mut().zip(&self.terms) {
                *o += 2.0
                    * w
                    * (t[0].1 * ev[t[0].0]
                        + t[1].1 * ev[t[1].0]
                        + t[2].1 * ev[t[2].0]
                        + t[3].1 * ev[t[3].0]);
            }
        }
    }

    pub(crate) fn finish(self, resistances: &[f64]) -> Jacobian {
        let (nd, nc) = (self.n_data, self.n_cells);
        let zero_resistance: Vec<usize> =
            resistances.iter().enumerate().filter(|(_, r)| **r == 0.0).map(|(i, _)| i).collect();
        let inv: Vec<f64> =
            resistances.iter().map(|&r| if r == 0.0 { 0.0 } else { 1.0 / r }).collect();
        // Accumulated cell-major; transpose to row-major by datum.
        let mut values = vec![0.0; nd * nc];
        for c in 0..nc {
            let col = &self.values[c * nd..(c + 1) * nd];
            for (i, v) in col.iter().enumerate() {
                values[i * nc + c] = v * inv[i];
            }
        }
        Jacobian { n_data: nd, n_cells: nc, values, zero_resistance }
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
