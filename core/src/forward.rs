//! 2.5D finite-element forward model of DC resistivity on a line's mesh.
//!
//! Physics (METHODS §1.1–1.3). For a point current I at node s of a 2D
//! conductivity σ(x, z) = 1/ρ (S/m), the cosine transform along strike
//! φ̃(x, k, z) = ∫0^∞ φ cos(k y) dy obeys
//!
//! ```text
//!     −∇·(σ∇φ̃) + k²σφ̃ = (I/2)·δ(x − x_s)δ(z − z_s)
//! ```
//!
//! with ∂φ̃/∂n = 0 on the ground surface and the mixed condition
//! ∂φ̃/∂n + αφ̃ = 0, α = k·K1(k r)/K0(k r)·cos θ, on the sides and bottom
//! (Dey & Morrison 1979, *Geophys. Prosp.* 27, 106–136), r and θ measured from a
//! single reference source at the line's centre on the surface so that one
//! matrix per wavenumber serves every source. The potential is
//! φ = Σ_i w_i φ̃(k_i) with fitted wavenumbers ([`crate::wavenumbers`]).
//!
//! Discretisation: linear triangles (Galerkin), element matrices
//! σ_e[(b bᵀ + c cᵀ)/(4A) + k²·A/12·(1 + δ_ij)], boundary edges by two-point
//! Gauss quadrature. Each wavenumber's symmetric positive definite matrix is
//! factorised by sparse Cholesky (`faer`, AMD ordering); the symbolic
//! factorisation is computed once per mesh and reused for every model, and one
//! factorisation serves all electrodes as sources. Electrodes are mesh nodes;
//! with unit current the pole–pole transfer resistance u_AM = φ_A(M) (Ω), and a
//! quadrupole's R = u_AM − u_AN − u_BM + u_BN by superposition, a remote `b` or
//! `n` dropping its terms. Units: ρ in Ω·m, lengths in m, R in Ω (= mV/mA).
//!
//! Singularity removal (METHODS §1.4) is not used: total potentials on a mesh
//! refined along the line are accurate on topography, where a flat-earth
//! primary field would be wrong.

use std::f64::consts::PI;

use faer::dyn_stack::{MemBuffer, MemStack};
use faer::sparse::linalg::cholesky::{
    CholeskySymbolicParams, LltRef, SymbolicCholesky, SymmetricOrdering,
    factorize_symbolic_cholesky,
};
use faer::sparse::linalg::SupernodalThreshold;
use faer::sparse::{SparseColMatRef, SymbolicSparseColMatRef};
use faer::{Conj, Mat, Par, Side};
use thiserror::Error;

use crate::bessel::k1_over_k0;
use crate::mesh::Mesh;
use crate::sensitivity::{Jacobian, JacobianAccumulator};
use crate::sequence::{Quadrupole, Sequence, geometric_factor_buried, geometric_factor_flat};
use crate::wavenumbers::{WavenumberError, WavenumberParams, Wavenumbers};

/// Settings of the forward model.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ForwardParams {
    /// How the wavenumbers are fitted to the line's electrode separations.
    pub wavenumbers: WavenumberParams,
}

/// Why a forward computation cannot be done.
#[derive(Debug, Error, PartialEq)]
pub enum ForwardError {
    /// The wavenumbers could not be fitted.
    #[error("wavenumbers: {0}")]
    Wavenumbers(#[from] WavenumberError),
    /// A model has the wrong number of values.
    #[error("model has {got} values, the mesh needs {expected} ({kind})")]
    ModelLength {
        /// Values given.
        got: usize,
        /// Values needed.
        expected: usize,
        /// `cells` or `triangles`.
        kind: &'static str,
    },
    /// A resistivity is not positive and finite.
    #[error("model value {index} ({kind}): resistivity {value} Ω·m is not positive and finite")]
    BadResistivity {
        /// Position of the value.
        index: usize,
        /// `cells` or `triangles`.
        kind: &'static str,
        /// The value.
        value: f64,
    },
    /// A sequence refers to more electrodes than the mesh has.
    #[error("the sequence is for {sequence} electrodes, the mesh has {mesh}")]
    SequenceMismatch {
        /// Electrodes the sequence was validated for.
        sequence: usize,
        /// Electrodes in the mesh.
        mesh: usize,
    },
    /// The sparse factorisation failed (the system is not positive definite).
    #[error("sparse Cholesky failed at wavenumber {wavenumber} 1/m: {reason}")]
    Factorisation {
        /// The wavenumber, 1/m.
        wavenumber: f64,
        /// The solver's message.
        reason: String,
    },
}

/// A resistivity model on a mesh, Ω·m.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Resistivity<'a> {
    /// One value per section cell (`mesh.section().cells()` order).
    Cells(&'a [f64]),
    /// One value per triangle (`mesh.triangles()` order), for fine synthetic
    /// models.
    Triangles(&'a [f64]),
}

/// Result of a forward run.
#[derive(Debug, Clone, PartialEq)]
pub struct Simulation {
    resistances: Vec<f64>,
    pole_pole: Vec<f64>,
    n_electrodes: usize,
}

impl Simulation {
    /// Transfer resistance R (Ω) of each quadrupole, in sequence order.
    pub fn resistances(&self) -> &[f64] {
        &self.resistances
    }

    /// Pole–pole transfer resistance u_AM (Ω) for unit current at electrode
    /// `a` and potential at electrode `m` (u_AA is the source node's own
    /// value, finite only because of the discretisation).
    pub fn pole_pole(&self, a: usize, m: usize) -> f64 {
        self.pole_pole[a * self.n_electrodes + m]
    }

    /// Apparent resistivities ρa = K·R (Ω·m) with the given geometric factors
    /// (m), `None` where K is `None`.
    pub fn apparent_resistivities(&self, factors: &[Option<f64>]) -> Vec<Option<f64>> {
        self.resistances.iter().zip(factors).map(|(r, k)| k.map(|k| k * r)).collect()
    }
}

/// A line's forward model: mesh, wavenumbers, symbolic factorisation and
/// unit-conductivity element matrices, built once; each call with a new model
/// assembles, factorises and solves. `Send + Sync`: one instance can serve
/// several threads.
#[derive(Debug)]
pub struct Forward {
    mesh: Mesh,
    wavenumbers: Wavenumbers,
    col_ptr: Vec<usize>,
    row_idx: Vec<usize>,
    symbolic: SymbolicCholesky<usize>,
    /// Per triangle: value slots of (0,0), (1,1), (2,2), (0,1), (0,2), (1,2).
    tri_slots: Vec<[usize; 6]>,
    /// Per triangle: unit-σ stiffness entries in slot order.
    tri_stiff: Vec<[f64; 6]>,
    /// Per triangle: area, m².
    tri_area: Vec<f64>,
    /// Boundary edges: triangle, local node positions (i, j) in the triangle,
    /// value slots (ii, jj, ij).
    bc_edges: Vec<BcEdge>,
    /// Per wavenumber, per boundary edge: unit-σ entries (ii, jj, ij).
    bc_values: Vec<Vec<[f64; 3]>>,
    /// Triangles of each section cell.
    cell_tris: Vec<Vec<usize>>,
}

#[derive(Debug, Clone, Copy)]
struct BcEdge {
    triangle: usize,
    local: [usize; 2],
    slots: [usize; 3],
}

impl Forward {
    /// Prepares the forward model of `mesh`: fits wavenumbers to the
    /// electrode separations (smallest to largest distance between any two
    /// electrodes), builds the sparsity pattern and its symbolic Cholesky
    /// factorisation, and the unit-conductivity element matrices.
    pub fn new(mesh: Mesh, params: &ForwardParams) -> Result<Self, ForwardError> {
        let en = mesh.electrode_nodes();
        let mut r_min = f64::INFINITY;
        let mut r_max: f64 = 0.0;
        for i in 0..en.len() {
            for j in i + 1..en.len() {
                let (p, q) = (mesh.nodes()[en[i]], mesh.nodes()[en[j]]);
                let d = (p[0] - q[0]).hypot(p[1] - q[1]);
                r_min = r_min.min(d);
                r_max = r_max.max(d);
            }
        }
        let wavenumbers = Wavenumbers::fit(r_min, r_max.max(1.0001 * r_min), &params.wavenumbers)?;

        let n = mesh.nodes().len();
        // Lower-triangular CSC pattern.
        let mut pairs: Vec<(usize, usize)> = Vec::with_capacity(6 * mesh.triangles().len() + n);
        for t in mesh.triangles() {
            for &p in t {
                for &q in t {
                    if p >= q {
                        pairs.push((q, p)); // (column, row)
                    }
                }
            }
        }
        pairs.sort_unstable();
        pairs.dedup();
        let mut col_ptr = vec![0usize; n + 1];
        let mut row_idx = Vec::with_capacity(pairs.len());
        for &(c, r) in &pairs {
            col_ptr[c + 1] += 1;
            row_idx.push(r);
        }
        for c in 0..n {
            col_ptr[c + 1] += col_ptr[c];
        }
        let slot = |r: usize, c: usize| {
            let (r, c) = if r >= c { (r, c) } else { (c, r) };
            let range = col_ptr[c]..col_ptr[c + 1];
            col_ptr[c] + row_idx[range].binary_search(&r).expect("entry in pattern")
        };
        let mut tri_slots = Vec::with_capacity(mesh.triangles().len());
        let mut tri_stiff = Vec::with_capacity(mesh.triangles().len());
        let mut tri_area = Vec::with_capacity(mesh.triangles().len());
        for (ti, t) in mesh.triangles().iter().enumerate() {
            let p = t.map(|i| mesh.nodes()[i]);
            let area = mesh.triangle_area(ti);
            let b = [p[1][1] - p[2][1], p[2][1] - p[0][1], p[0][1] - p[1][1]];
            let c = [p[2][0] - p[1][0], p[0][0] - p[2][0], p[1][0] - p[0][0]];
            let s = |i: usize, j: usize| (b[i] * b[j] + c[i] * c[j]) / (4.0 * area);
            tri_stiff.push([s(0, 0), s(1, 1), s(2, 2), s(0, 1), s(0, 2), s(1, 2)]);
            tri_slots.push([
                slot(t[0], t[0]),
                slot(t[1], t[1]),
                slot(t[2], t[2]),
                slot(t[0], t[1]),
                slot(t[0], t[2]),
                slot(t[1], t[2]),
            ]);
            tri_area.push(area);
        }

        // Mixed boundary condition: unit-σ edge matrices per wavenumber.
        let reference = mesh.reference_point();
        let mut bc_edges = Vec::with_capacity(mesh.boundary_edges().len());
        let mut geometry = Vec::with_capacity(mesh.boundary_edges().len());
        for e in mesh.boundary_edges() {
            let t = mesh.triangles()[e.triangle];
            let li = t.iter().position(|&v| v == e.nodes[0]).expect("edge node in triangle");
            let lj = t.iter().position(|&v| v == e.nodes[1]).expect("edge node in triangle");
            let (p, q) = (mesh.nodes()[e.nodes[0]], mesh.nodes()[e.nodes[1]]);
            let third = mesh.nodes()[t[3 - li - lj]];
            let (dx, dz) = (q[0] - p[0], q[1] - p[1]);
            let len = dx.hypot(dz);
            let mut normal = [dz / len, -dx / len];
            let mid = [0.5 * (p[0] + q[0]), 0.5 * (p[1] + q[1])];
            if normal[0] * (third[0] - mid[0]) + normal[1] * (third[1] - mid[1]) > 0.0 {
                normal = [-normal[0], -normal[1]];
            }
            bc_edges.push(BcEdge {
                triangle: e.triangle,
                local: [li, lj],
                slots: [slot(e.nodes[0], e.nodes[0]), slot(e.nodes[1], e.nodes[1]), {
                    slot(e.nodes[0], e.nodes[1])
                }],
            });
            geometry.push((p, q, len, normal));
        }
        let g = 0.5 / 3f64.sqrt();
        let bc_values = wavenumbers
            .wavenumbers()
            .iter()
            .map(|&k| {
                geometry
                    .iter()
                    .map(|&(p, q, len, normal)| {
                        let mut m = [0.0; 3];
                        for t in [0.5 - g, 0.5 + g] {
                            let x = [p[0] + t * (q[0] - p[0]), p[1] + t * (q[1] - p[1])];
                            let (rx, rz) = (x[0] - reference[0], x[1] - reference[1]);
                            let r = rx.hypot(rz);
                            let cos = (rx * normal[0] + rz * normal[1]) / r;
                            let alpha = k * k1_over_k0(k * r) * cos;
                            let (ni, nj) = (1.0 - t, t);
                            let wq = 0.5 * len * alpha;
                            m[0] += wq * ni * ni;
                            m[1] += wq * nj * nj;
                            m[2] += wq * ni * nj;
                        }
                        m
                    })
                    .collect()
            })
            .collect();

        let mut cell_tris = vec![Vec::new(); mesh.section().len()];
        for (t, &c) in mesh.triangle_cells().iter().enumerate() {
            cell_tris[c].push(t);
        }

        let nnz = row_idx.len();
        let symbolic = {
            let pattern = SymbolicSparseColMatRef::new_checked(n, n, &col_ptr, None, &row_idx);
            factorize_symbolic_cholesky(
                pattern,
                Side::Lower,
                SymmetricOrdering::Amd,
                // Supernodal: dense blocks make the many-right-hand-side
                // solves (one per electrode) run at matrix–matrix speed.
                CholeskySymbolicParams {
                    supernodal_flop_ratio_threshold: SupernodalThreshold::FORCE_SUPERNODAL,
                    ..Default::default()
                },
            )
            .map_err(|e| ForwardError::Factorisation { wavenumber: 0.0, reason: format!("{e:?}") })?
        };
        debug_assert_eq!(col_ptr[n], nnz);
        Ok(Self {
            mesh,
            wavenumbers,
            col_ptr,
            row_idx,
            symbolic,
            tri_slots,
            tri_stiff,
            tri_area,
            bc_edges,
            bc_values,
            cell_tris,
        })
    }

    /// The mesh.
    pub fn mesh(&self) -> &Mesh {
        &self.mesh
    }

    /// The wavenumbers and weights in use.
    pub fn wavenumbers(&self) -> &Wavenumbers {
        &self.wavenumbers
    }

    /// Nonzeros of the lower triangle of the system matrix (all wavenumbers
    /// share the pattern).
    pub fn matrix_nonzeros(&self) -> usize {
        self.row_idx.len()
    }

    /// Nonzeros of the Cholesky factor.
    pub fn factor_nonzeros(&self) -> usize {
        self.symbolic.len_val()
    }

    /// Transfer resistances of every quadrupole of `sequence` for `model`.
    pub fn simulate(
        &self,
        model: Resistivity<'_>,
        sequence: &Sequence,
    ) -> Result<Simulation, ForwardError> {
        self.run(model, sequence, false).map(|(s, _)| s)
    }

    /// Transfer resistances and the Jacobian ∂ln|R_i|/∂ln ρ_c with respect to
    /// the section cells (all triangles of a cell scaled together), from the
    /// same solves (adjoint/reciprocity, METHODS §1.7).
    pub fn simulate_with_jacobian(
        &self,
        model: Resistivity<'_>,
        sequence: &Sequence,
    ) -> Result<(Simulation, Jacobian), ForwardError> {
        self.run(model, sequence, true)
            .map(|(s, j)| (s, j.expect("Jacobian requested")))
    }

    /// Geometric factors K (m) for `sequence`: analytic when the ground is
    /// flat (surface formula, or the image formula when electrodes are
    /// buried, METHODS §2.1), otherwise numeric, K = ρ/R from a homogeneous
    /// run ([`Self::numeric_geometric_factors`]). `None` where K is undefined
    /// (R of the homogeneous ground is zero).
    pub fn geometric_factors(&self, sequence: &Sequence) -> Result<Vec<Option<f64>>, ForwardError> {
        if !self.mesh.surface_is_flat() {
            return self.numeric_geometric_factors(sequence);
        }
        let line = self.line_geometry();
        let ground = self.mesh.surface().points()[0][1];
        let any_buried = self.mesh.buried().iter().any(|&b| b);
        Ok(sequence
            .quadrupoles()
            .iter()
            .map(|q| {
                if any_buried {
                    geometric_factor_buried(&line, ground, q)
                } else {
                    geometric_factor_flat(&line, q)
                }
            })
            .collect())
    }

    /// Numeric geometric factors K = 1/R (m) from a run on homogeneous ground
    /// of 1 Ω·m: they absorb topography and buried electrodes (and the mesh's
    /// own discretisation error). `None` where |R| is below 1e-9 of the
    /// largest |R| of the sequence.
    pub fn numeric_geometric_factors(
        &self,
        sequence: &Sequence,
    ) -> Result<Vec<Option<f64>>, ForwardError> {
        let ones = vec![1.0; self.mesh.section().len()];
        let sim = self.simulate(Resistivity::Cells(&ones), sequence)?;
        let max = sim.resistances.iter().fold(0.0f64, |m, r| m.max(r.abs()));
        Ok(sim.resistances.iter().map(|&r| (r.abs() > 1e-9 * max).then(|| 1.0 / r)).collect())
    }

    fn line_geometry(&self) -> crate::geometry::LineGeometry {
        let e = crate::geometry::Electrode::new;
        let nodes = self.mesh.nodes();
        crate::geometry::LineGeometry::new(
            self.mesh
                .electrode_nodes()
                .iter()
                .enumerate()
                .map(|(i, &n)| e(format!("{i}"), nodes[n][0], nodes[n][1]))
                .collect(),
        )
        .expect("mesh electrodes form a valid line")
    }

    /// Conductivity per triangle, S/m.
    fn conductivities(&self, model: Resistivity<'_>) -> Result<Vec<f64>, ForwardError> {
        let (values, kind, expected) = match model {
            Resistivity::Cells(v) => (v, "cells", self.mesh.section().len()),
            Resistivity::Triangles(v) => (v, "triangles", self.mesh.triangles().len()),
        };
        if values.len() != expected {
            return Err(ForwardError::ModelLength { got: values.len(), expected, kind });
        }
        if let Some((index, &value)) =
            values.iter().enumerate().find(|(_, v)| !(v.is_finite() && **v > 0.0))
        {
            return Err(ForwardError::BadResistivity { index, kind, value });
        }
        Ok(match model {
            Resistivity::Cells(v) => {
                self.mesh.triangle_cells().iter().map(|&c| 1.0 / v[c]).collect()
            }
            Resistivity::Triangles(v) => v.iter().map(|r| 1.0 / r).collect(),
        })
    }

    /// Assembles the lower triangle of the system matrix at wavenumber index
    /// `ki` for conductivities `sigma` (per triangle).
    fn assemble(&self, sigma: &[f64], ki: usize) -> Vec<f64> {
        let k2 = self.wavenumbers.wavenumbers()[ki].powi(2);
        let mut values = vec![0.0; self.row_idx.len()];
        for (t, slots) in self.tri_slots.iter().enumerate() {
            let (s, st, a) = (sigma[t], &self.tri_stiff[t], self.tri_area[t]);
            let (md, mo) = (k2 * a / 6.0, k2 * a / 12.0);
            for l in 0..3 {
                values[slots[l]] += s * (st[l] + md);
            }
            for l in 3..6 {
                values[slots[l]] += s * (st[l] + mo);
            }
        }
        for (e, v) in self.bc_edges.iter().zip(&self.bc_values[ki]) {
            let s = sigma[e.triangle];
            for l in 0..3 {
                values[e.slots[l]] += s * v[l];
            }
        }
        values
    }

    /// Unit-σ local 3×3 matrix of triangle `t` at wavenumber index `ki`,
    /// including its boundary edges (row-major).
    pub(crate) fn local_matrix(&self, t: usize, ki: usize, bc_of: &[Vec<usize>]) -> [f64; 9] {
        let k2 = self.wavenumbers.wavenumbers()[ki].powi(2);
        let (st, a) = (&self.tri_stiff[t], self.tri_area[t]);
        let (md, mo) = (k2 * a / 6.0, k2 * a / 12.0);
        let mut m = [
            st[0] + md,
            st[3] + mo,
            st[4] + mo,
            st[3] + mo,
            st[1] + md,
            st[5] + mo,
            st[4] + mo,
            st[5] + mo,
            st[2] + md,
        ];
        for &e in &bc_of[t] {
            let (edge, v) = (&self.bc_edges[e], &self.bc_values[ki][e]);
            let [i, j] = edge.local;
            m[i * 3 + i] += v[0];
            m[j * 3 + j] += v[1];
            m[i * 3 + j] += v[2];
            m[j * 3 + i] += v[2];
        }
        m
    }

    /// Factorises the matrix at wavenumber index `ki` and solves for unit
    /// (I/2 = 0.5) sources at every electrode: an n_nodes × n_electrodes
    /// matrix of φ̃ (column = source electrode).
    fn solve_all(&self, sigma: &[f64], ki: usize) -> Result<Mat<f64>, ForwardError> {
        let n = self.mesh.nodes().len();
        let values = self.assemble(sigma, ki);
        let pattern = SymbolicSparseColMatRef::new_checked(n, n, &self.col_ptr, None, &self.row_idx);
        let a = SparseColMatRef::new(pattern, &values);
        let mut l_values = vec![0.0; self.symbolic.len_val()];
        let par = Par::Seq;
        let mut buf = MemBuffer::new(
            self.symbolic.factorize_numeric_llt_scratch::<f64>(par, Default::default()),
        );
        let llt = self
            .symbolic
            .factorize_numeric_llt(
                &mut l_values,
                a,
                Side::Lower,
                Default::default(),
                par,
                MemStack::new(&mut buf),
                Default::default(),
            )
            .map_err(|e| ForwardError::Factorisation {
                wavenumber: self.wavenumbers.wavenumbers()[ki],
                reason: format!("{e:?}"),
            })?;
        let _ = llt;
        let en = self.mesh.electrode_nodes();
        let mut rhs = Mat::<f64>::zeros(n, en.len());
        for (e, &node) in en.iter().enumerate() {
            rhs[(node, e)] = 0.5;
        }
        let mut buf = MemBuffer::new(self.symbolic.solve_in_place_scratch::<f64>(en.len(), par));
        LltRef::new(&self.symbolic, &l_values).solve_in_place_with_conj(
            Conj::No,
            rhs.as_mut(),
            par,
            MemStack::new(&mut buf),
        );
        Ok(rhs)
    }

    fn run(
        &self,
        model: Resistivity<'_>,
        sequence: &Sequence,
        jacobian: bool,
    ) -> Result<(Simulation, Option<Jacobian>), ForwardError> {
        let ne = self.mesh.electrode_nodes().len();
        if sequence.n_electrodes() > ne {
            return Err(ForwardError::SequenceMismatch {
                sequence: sequence.n_electrodes(),
                mesh: ne,
            });
        }
        let sigma = self.conductivities(model)?;
        let en = self.mesh.electrode_nodes();
        let mut pole_pole = vec![0.0; ne * ne];
        let mut acc = jacobian.then(|| {
            JacobianAccumulator::new(self, sequence.quadrupoles(), &sigma)
        });
        for (ki, &w) in self.wavenumbers.weights().iter().enumerate() {
            let phi = self.solve_all(&sigma, ki)?;
            for a in 0..ne {
                for m in 0..ne {
                    pole_pole[a * ne + m] += w * phi[(en[m], a)];
                }
            }
            if let Some(acc) = acc.as_mut() {
                acc.add_wavenumber(self, ki, w, &phi);
            }
        }
        let resistances =
            sequence.quadrupoles().iter().map(|q| combine(q, |i, j| pole_pole[i * ne + j])).collect();
        let sim = Simulation { resistances, pole_pole, n_electrodes: ne };
        let jac = acc.map(|acc| acc.finish(&sim.resistances));
        Ok((sim, jac))
    }

    pub(crate) fn cell_triangles(&self) -> &[Vec<usize>] {
        &self.cell_tris
    }

    pub(crate) fn boundary_edges_by_triangle(&self) -> Vec<Vec<usize>> {
        let mut out = vec![Vec::new(); self.mesh.triangles().len()];
        for (e, edge) in self.bc_edges.iter().enumerate() {
            out[edge.triangle].push(e);
        }
        out
    }
}

/// R = u(A,M) − u(A,N) − u(B,M) + u(B,N), remote electrodes dropped.
pub(crate) fn combine(q: &Quadrupole, u: impl Fn(usize, usize) -> f64) -> f64 {
    let mut r = u(q.a, q.m);
    if let Some(n) = q.n {
        r -= u(q.a, n);
    }
    if let Some(b) = q.b {
        r -= u(b, q.m);
        if let Some(n) = q.n {
            r += u(b, n);
        }
    }
    r
}

/// Potential (V) of a unit current (1 A) on the surface of a homogeneous
/// half-space of resistivity ρ at distance r: ρ/(2πr).
pub fn half_space_potential(rho: f64, r: f64) -> f64 {
    rho / (2.0 * PI * r)
}
#[cfg(test)]
mod probe {
    use super::*;
    use crate::geometry::{Electrode, LineGeometry, Surface};
    use crate::mesh::MeshParams;
    #[test]
    fn probe() {
        let ne = 64;
        let line = LineGeometry::new((0..ne).map(|i| Electrode::new(format!("{i}"), i as f64, 0.0)).collect()).unwrap();
        let s = Surface::through_line(&line, &[]).unwrap();
        for (nps, gr, tgt, pad) in [(5usize, 1.1, 3e-4, 2.0)] {
        let t0 = std::time::Instant::now();
        let mesh = Mesh::new(&line, &s, &MeshParams { nodes_per_spacing: nps, growth: gr, padding: pad, ..MeshParams::default() }).unwrap();
        let t1 = t0.elapsed();
        let fwd = Forward::new(mesh, &ForwardParams { wavenumbers: WavenumberParams { target_error: tgt, ..Default::default() } }).unwrap();
        let t2 = t0.elapsed();
        let mut q = Vec::new();
        for a in 1..=10 { for i in 0..ne { if i + 3*a < ne { q.push(Quadrupole::new(i, i+3*a, i+a, i+2*a)); } } }
        let nw = q.len();
        for n in 1..=6 { for i in 0..ne { if i + n + 2 < ne { q.push(Quadrupole::new(i+1, i, i+n+1, i+n+2)); } } }
        let seq = Sequence::new(q, ne).unwrap();
        let rho = vec![100.0; fwd.mesh().section().len()];
        let sim = fwd.simulate(Resistivity::Cells(&rho), &seq).unwrap();
        let t3 = t0.elapsed();
        let k = fwd.geometric_factors(&seq).unwrap();
        let ra = sim.apparent_resistivities(&k);
        let errs: Vec<f64> = ra.iter().map(|r| (r.unwrap() / 100.0 - 1.0) * 100.0).collect();
        let mx = |v: &[f64]| v.iter().fold(0.0f64, |m, x| m.max(x.abs()));
        let mean = |v: &[f64]| v.iter().map(|x| x.abs()).sum::<f64>() / v.len() as f64;
        println!("nps {nps}: nodes {} tris {} cells {} nk {} L nnz {} | mesh {:?} setup {:?} fwd {:?}", fwd.mesh().nodes().len(), fwd.mesh().triangles().len(), fwd.mesh().section().len(), fwd.wavenumbers().len(), fwd.factor_nonzeros(), t1, t2, t3 - t2);
        println!("  wenner mean {:.3} max {:.3}; dd mean {:.3} max {:.3}", mean(&errs[..nw]), mx(&errs[..nw]), mean(&errs[nw..]), mx(&errs[nw..]));
        for a in 1..=10 { let i0: usize = (1..a).map(|b| ne - 3*b).sum(); let e = &errs[i0..i0 + ne - 3*a]; println!("   a={a} mean {:.3} max {:.3} min {:.3}", mean(e), mx(e), e.iter().cloned().fold(f64::MAX, f64::min)); }
        let t4 = std::time::Instant::now();
        let (_, jac) = fwd.simulate_with_jacobian(Resistivity::Cells(&rho), &seq).unwrap();
        println!("  jac {:?}  rowsum0 {}", t4.elapsed(), jac.row(0).iter().sum::<f64>());
        }
    }
}
