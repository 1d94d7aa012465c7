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
//! refined along the line (element size a/5 down to one spacing) give
//! ρa within ≈ 0.3 % on homogeneous ground and ≈ 1 % over strong layering
//! (see the tests), and stay valid on topography, where a flat-earth primary
//! field would be wrong.

use faer::dyn_stack::{MemBuffer, MemStack};
use faer::sparse::linalg::SupernodalThreshold;
use faer::sparse::linalg::cholesky::simplicial::SimplicialLltRef;
use faer::sparse::linalg::cholesky::supernodal::SupernodalLltRef;
use faer::sparse::linalg::cholesky::{
    CholeskySymbolicParams, SymbolicCholesky, SymbolicCholeskyRaw, SymmetricOrdering,
    factorize_symbolic_cholesky,
};
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

/// The fields φ̃ (V·m for unit current) of every electrode as a source at
/// one wavenumber, on every mesh node.
#[derive(Debug, Clone)]
pub struct WavenumberFields<'a> {
    values: Mat<f64>,
    node_row: &'a [usize],
}

impl WavenumberFields<'_> {
    /// φ̃ at mesh node `node` for a unit current at electrode `source`.
    pub fn value(&self, node: usize, source: usize) -> f64 {
        self.values[(self.node_row[node], source)]
    }

    /// Number of mesh nodes.
    pub fn n_nodes(&self) -> usize {
        self.values.nrows()
    }

    /// Number of sources (electrodes).
    pub fn n_sources(&self) -> usize {
        self.values.ncols()
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
    /// Row of each node in the factorisation's (fill-reducing) ordering.
    perm_inv: Vec<usize>,
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
            .map_err(|e| ForwardError::Factorisation {
                wavenumber: 0.0,
                reason: format!("{e:?}"),
            })?
        };
        debug_assert_eq!(col_ptr[n], nnz);
        let perm_inv = match symbolic.perm() {
            Some(p) => p.arrays().1.to_vec(),
            None => (0..n).collect(),
        };
        Ok(Self {
            mesh,
            wavenumbers,
            col_ptr,
            row_idx,
            symbolic,
            perm_inv,
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

    /// The wavenumber-domain fields φ̃ (V·m, unit current) of every
    /// electrode as a source at wavenumber index `wavenumber` (see
    /// [`Self::wavenumbers`]). One assembly, one factorisation and one
    /// multi-right-hand-side solve: the bare cost the forward model builds on.
    pub fn wavenumber_fields(
        &self,
        model: Resistivity<'_>,
        wavenumber: usize,
    ) -> Result<WavenumberFields<'_>, ForwardError> {
        let sigma = self.conductivities(model)?;
        let values = self.solve_all(&sigma, wavenumber)?;
        Ok(WavenumberFields { values, node_row: &self.perm_inv })
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
    /// same solves (adjoint/reciprocity, METHODS §1.7). Holds the fields of
    /// all wavenumbers meanwhile: n_nodes × n_electrodes × n_wavenumbers × 8
    /// bytes (≈ 100 MB for 96 electrodes on a 22k-node mesh), plus the
    /// n_data × n_cells Jacobian.
    pub fn simulate_with_jacobian(
        &self,
        model: Resistivity<'_>,
        sequence: &Sequence,
    ) -> Result<(Simulation, Jacobian), ForwardError> {
        self.run(model, sequence, true).map(|(s, j)| (s, j.expect("Jacobian requested")))
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
    /// matrix of φ̃ (column = source electrode) whose rows are in the
    /// factorisation's ordering (node v is row `perm_inv[v]`).
    fn solve_all(&self, sigma: &[f64], ki: usize) -> Result<Mat<f64>, ForwardError> {
        let n = self.mesh.nodes().len();
        let values = self.assemble(sigma, ki);
        let pattern =
            SymbolicSparseColMatRef::new_checked(n, n, &self.col_ptr, None, &self.row_idx);
        let a = SparseColMatRef::new(pattern, &values);
        let mut l_values = vec![0.0; self.symbolic.len_val()];
        let par = Par::Seq;
        let mut buf = MemBuffer::new(
            self.symbolic.factorize_numeric_llt_scratch::<f64>(par, Default::default()),
        );
        self.symbolic
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
        let en = self.mesh.electrode_nodes();
        // Right-hand sides built directly in the permuted ordering, so the
        // solve needs no row permutation of the dense block.
        let mut rhs = Mat::<f64>::zeros(n, en.len());
        for (e, &node) in en.iter().enumerate() {
            rhs[(self.perm_inv[node], e)] = 0.5;
        }
        match self.symbolic.raw() {
            SymbolicCholeskyRaw::Supernodal(sym) => {
                let mut buf = MemBuffer::new(sym.solve_in_place_scratch::<f64>(en.len(), par));
                SupernodalLltRef::new(sym, &l_values).solve_in_place_with_conj(
                    Conj::No,
                    rhs.as_mut(),
                    par,
                    MemStack::new(&mut buf),
                );
            }
            SymbolicCholeskyRaw::Simplicial(sym) => {
                let mut buf = MemBuffer::new(sym.solve_in_place_scratch::<f64>(en.len()));
                SimplicialLltRef::new(sym, &l_values).solve_in_place_with_conj(
                    Conj::No,
                    rhs.as_mut(),
                    par,
                    MemStack::new(&mut buf),
                );
            }
        }
        Ok(rhs)
    }

    /// Row of node `v` in the fields returned by the solver.
    pub(crate) fn node_row(&self) -> &[usize] {
        &self.perm_inv
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
        let mut acc =
            jacobian.then(|| JacobianAccumulator::new(self, sequence.quadrupoles(), &sigma));
        for (ki, &w) in self.wavenumbers.weights().iter().enumerate() {
            let phi = self.solve_all(&sigma, ki)?;
            for a in 0..ne {
                for m in 0..ne {
                    pole_pole[a * ne + m] += w * phi[(self.perm_inv[en[m]], a)];
                }
            }
            if let Some(acc) = acc.as_mut() {
                acc.add_wavenumber(self, ki, w, &phi);
            }
        }
        let resistances = sequence
            .quadrupoles()
            .iter()
            .map(|q| combine(q, |i, j| pole_pole[i * ne + j]))
            .collect();
        let sim = Simulation { resistances, pole_pole, n_electrodes: ne };
        let jac = acc.map(|acc| acc.finish(self, &sim.resistances));
        Ok((sim, jac))
    }

    /// Triangles of each section cell.
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

#[cfg(test)]
mod tests {
    use std::f64::consts::PI;

    use super::*;
    use crate::geometry::{Electrode, LineGeometry, Surface};
    use crate::mesh::MeshParams;
    use crate::model::{Body, Layer, ModelDescription};
    use crate::sequence::{
        DipoleDipoleParams, SchlumbergerParams, WennerParams, dipole_dipole, merge, schlumberger,
        wenner,
    };
    use rand::rngs::StdRng;
    use rand::{Rng, SeedableRng};

    fn line_at(xs: impl Iterator<Item = (f64, f64)>) -> LineGeometry {
        LineGeometry::new(
            xs.enumerate().map(|(i, (x, z))| Electrode::new(format!("{i}"), x, z)).collect(),
        )
        .unwrap()
    }

    fn flat_line(n: usize, a: f64) -> LineGeometry {
        line_at((0..n).map(|i| (i as f64 * a, 0.0)))
    }

    fn forward(line: &LineGeometry, surface: &Surface, params: MeshParams) -> Forward {
        let mesh = Mesh::new(line, surface, &params).unwrap();
        Forward::new(mesh, &ForwardParams::default()).unwrap()
    }

    /// Runs `model` (per triangle) and compares every apparent resistivity
    /// with `expected(q)` to a relative tolerance; returns the worst error.
    fn check(
        fwd: &Forward,
        quads: Vec<Quadrupole>,
        model: &ModelDescription,
        expected: impl Fn(&Quadrupole) -> f64,
        rel_tol: f64,
    ) -> f64 {
        let seq = Sequence::new(quads, fwd.mesh().electrode_nodes().len()).unwrap();
        let rho = model.on_triangles(fwd.mesh());
        let sim = fwd.simulate(Resistivity::Triangles(&rho), &seq).unwrap();
        let k = fwd.geometric_factors(&seq).unwrap();
        let mut worst: f64 = 0.0;
        for ((q, ra), _) in seq.quadrupoles().iter().zip(sim.apparent_resistivities(&k)).zip(0..) {
            let (ra, want) = (ra.unwrap(), expected(q));
            let err = (ra / want - 1.0).abs();
            assert!(err <= rel_tol, "{q:?}: ρa {ra:.4} vs {want:.4} (error {:.2} %)", 100.0 * err);
            worst = worst.max(err);
        }
        println!("worst ρa error {:.3} % over {} quadrupoles", 100.0 * worst, seq.len());
        worst
    }

    #[test]
    fn homogeneous_half_space_within_one_percent() {
        // ρa = ρ on a homogeneous half-space with the analytic flat-ground K
        // (definition of K; Telford, Geldart & Sheriff 1990). 64 electrodes,
        // Wenner a = 1..10, Wenner–Schlumberger n = 1..6, dipole–dipole n = 1..6.
        let line = flat_line(64, 1.0);
        let fwd =
            forward(&line, &Surface::through_line(&line, &[]).unwrap(), MeshParams::default());
        let quads = merge(&[
            wenner(64, &WennerParams { max_a: 10 }),
            schlumberger(64, &SchlumbergerParams { max_a: 2, max_n: 6 }),
            dipole_dipole(64, &DipoleDipoleParams { max_a: 2, max_n: 6 }),
        ]);
        let model = ModelDescription::homogeneous(100.0).unwrap();
        check(&fwd, quads, &model, |_| 100.0, 0.01);
    }

    /// Potential (V) at distance r of 1 A on the surface of ρ1 over ρ2 (layer
    /// thickness h): image series of Telford, Geldart & Sheriff (1990), §8.3
    /// (METHODS §2.2): V = ρ1/(2π)[1/r + 2Σ kⁿ/√(r² + (2nh)²)].
    fn two_layer_potential(rho1: f64, rho2: f64, h: f64, r: f64) -> f64 {
        let k = (rho2 - rho1) / (rho2 + rho1);
        let terms = ((1e-14f64).ln() / k.abs().ln()).ceil() as i32;
        let mut sum = 1.0 / r;
        for n in 1..=terms {
            sum += 2.0 * k.powi(n) / (r * r + (2.0 * n as f64 * h).powi(2)).sqrt();
        }
        rho1 / (2.0 * PI) * sum
    }

    /// Apparent resistivity of `q` on `line` over the two-layer earth.
    fn two_layer_rho_a(line: &LineGeometry, q: &Quadrupole, rho1: f64, rho2: f64, h: f64) -> f64 {
        let u = |i: usize, j: usize| two_layer_potential(rho1, rho2, h, line.distance(i, j));
        combine(q, u) * geometric_factor_flat(line, q).unwrap()
    }

    #[test]
    fn two_layer_series_matches_tabulated_values() {
        // METHODS §2.2 reference values [C], ρ1 = 100 Ω·m, h = 1 m: Wenner a = 2,
        // ρ2 = 10 → 33.867; a = 10, ρ2 = 1000 → 630.267; Schlumberger L = 5 with
        // MN = 2 mm, ρ2 = 10 → 13.034. Tolerance 5e-4 relative (printed digits).
        let line = line_at([0.0, 2.0, 4.0, 6.0, 10.0, 20.0, 30.0].into_iter().map(|x| (x, 0.0)));
        let w = two_layer_rho_a(&line, &Quadrupole::new(0, 3, 1, 2), 100.0, 10.0, 1.0);
        assert!((w / 33.867 - 1.0).abs() < 5e-4, "{w}");
        let w = two_layer_rho_a(&line, &Quadrupole::new(0, 6, 4, 5), 100.0, 1000.0, 1.0);
        assert!((w / 630.267 - 1.0).abs() < 5e-4, "{w}");
        let schl = line_at([-5.0, -0.001, 0.001, 5.0].into_iter().map(|x| (x, 0.0)));
        let s = two_layer_rho_a(&schl, &Quadrupole::new(0, 3, 1, 2), 100.0, 10.0, 1.0);
        assert!((s / 13.034 - 1.0).abs() < 5e-4, "{s}");
    }

    #[test]
    fn two_layer_earth_within_two_percent() {
        // FE vs the image series (Telford, Geldart & Sheriff 1990) for Wenner
        // and Wenner–Schlumberger, reflection coefficients ±0.5 and ±0.9,
        // a/h from 0.2 to 10 (two interface depths), within 2 %.
        let line = flat_line(48, 1.0);
        let surface = Surface::through_line(&line, &[]).unwrap();
        let rho1 = 100.0;
        for (h, max_a) in [(5.0, 15), (1.0, 10)] {
            let params = MeshParams { interface_depths: vec![h], ..MeshParams::default() };
            let fwd = forward(&line, &surface, params);
            let quads = merge(&[
                wenner(48, &WennerParams { max_a }),
                schlumberger(48, &SchlumbergerParams { max_a: 2, max_n: 6 }),
            ]);
            for k in [0.5, -0.5, 0.9, -0.9] {
                let rho2 = rho1 * (1.0 + k) / (1.0 - k);
                let model = ModelDescription::new(rho1, vec![Layer { top: -h, rho: rho2 }], vec![])
                    .unwrap();
                check(
                    &fwd,
                    quads.clone(),
                    &model,
                    |q| two_layer_rho_a(&line, q, rho1, rho2, h),
                    0.02,
                );
            }
        }
    }

    #[test]
    fn vertical_contact_within_three_percent() {
        // Wenner a = 1 m traverse across a vertical contact (10 Ω·m for x < 0,
        // 100 Ω·m beyond): image solution (Telford et al. 1990, from memory;
        // METHODS §2.3 tabulates ρa [C]): P in medium 1: V = ρ1/(2π)(1/r + k/r′),
        // P in medium 2: V = ρ1(1 + k)/(2πr).
        let table = [
            (-3.0, 10.263),
            (-2.0, 11.091),
            (-1.0, 13.409),
            (-0.25, 40.545),
            (0.25, 64.545),
            (1.0, 65.909),
            (2.0, 89.091),
            (3.0, 97.370),
        ];
        let line = line_at((0..49).map(|i| (-6.0 + 0.25 * i as f64, 0.0)));
        let params = MeshParams { interface_chainages: vec![0.0], ..MeshParams::default() };
        let fwd = forward(&line, &Surface::through_line(&line, &[]).unwrap(), params);
        let model = ModelDescription::new(
            100.0,
            vec![],
            vec![Body {
                polygon: vec![[-1e4, 1.0], [0.0, 1.0], [0.0, -1e4], [-1e4, -1e4]],
                rho: 10.0,
            }],
        )
        .unwrap();
        let idx = |x: f64| ((x + 6.0) / 0.25).round() as usize;
        let quads: Vec<Quadrupole> = table
            .iter()
            .map(|&(c, _)| Quadrupole::new(idx(c - 1.5), idx(c + 1.5), idx(c - 0.5), idx(c + 0.5)))
            .collect();
        let expected = |q: &Quadrupole| {
            let xc = 0.5 * (line.electrodes()[q.a].x() + line.electrodes()[q.b.unwrap()].x());
            table.iter().find(|t| (t.0 - xc).abs() < 1e-9).unwrap().1
        };
        check(&fwd, quads, &model, expected, 0.03);
    }

    /// Pole–pole resistances from a current electrode on the edge of a wedge
    /// (flat ground for x ≥ 0 meeting a 1:2.5 slope for x < 0, `up` = slope
    /// rising away from the edge) against V = ρI/(2θr) (exact: the field of a
    /// source on the edge of a wedge of interior angle θ is spherically
    /// symmetric and meets the no-flux condition on both faces).
    fn check_wedge(up: bool, rel_tol: f64) {
        let slope = if up { -0.4 } else { 0.4 };
        let z = |x: f64| if x < 0.0 { slope * x } else { 0.0 };
        // Electrodes every 1 m of chainage, the current electrode on the edge.
        let line = line_at((0..25).map(|i| {
            let x = i as f64 - 12.0;
            (x, z(x))
        }));
        let far = 1e4;
        let surface = Surface::through_line(&line, &[[-far, z(-far)], [far, 0.0]]).unwrap();
        let fwd = forward(&line, &surface, MeshParams::default());
        let theta = if up { PI + 0.4f64.atan() } else { PI - 0.4f64.atan() };
        let rho = 50.0;
        let cells = vec![rho; fwd.mesh().section().len()];
        let seq = Sequence::new(vec![Quadrupole { a: 12, b: None, m: 0, n: None }], 25).unwrap();
        let sim = fwd.simulate(Resistivity::Cells(&cells), &seq).unwrap();
        let mut worst: f64 = 0.0;
        for m in (0..25).filter(|&m| m != 12) {
            let r = line.distance(12, m);
            let want = rho / (2.0 * theta * r);
            let got = sim.pole_pole(12, m);
            let err = (got / want - 1.0).abs();
            assert!(err <= rel_tol, "electrode {m} (r = {r:.2} m): {got:.5} vs {want:.5} Ω");
            worst = worst.max(err);
        }
        println!("wedge θ = {theta:.4}: worst pole–pole error {:.3} %", 100.0 * worst);
    }

    #[test]
    fn wavenumber_fields_match_the_half_space_green_function() {
        // Surface source on a half-space: φ̃ = I·K0(k r)/(2πσ) (METHODS §1.1,
        // cosine transform of I/(2πσr); Gradshteyn & Ryzhik 3.754.2, number from
        // memory). Checked at electrodes 1–10 m from the source where
        // 0.05 ≤ k r ≤ 3, within 2 %.
        let line = flat_line(32, 1.0);
        let fwd =
            forward(&line, &Surface::through_line(&line, &[]).unwrap(), MeshParams::default());
        let rho = vec![100.0; fwd.mesh().section().len()];
        let mut checked = 0;
        for (ki, &k) in fwd.wavenumbers().wavenumbers().iter().enumerate() {
            let fields = fwd.wavenumber_fields(Resistivity::Cells(&rho), ki).unwrap();
            assert_eq!((fields.n_nodes(), fields.n_sources()), (fwd.mesh().nodes().len(), 32));
            for m in 11..=20 {
                let r = line.distance(10, m);
                if !(0.05..=3.0).contains(&(k * r)) {
                    continue;
                }
                let want = 100.0 * crate::bessel::k0(k * r) / (2.0 * PI);
                let got = fields.value(fwd.mesh().electrode_nodes()[m], 10);
                assert!((got / want - 1.0).abs() < 0.02, "k = {k}, r = {r}: {got} vs {want}");
                checked += 1;
            }
        }
        assert!(checked >= 20, "{checked}");
    }

    #[test]
    fn convex_edge_wedge_within_two_percent() {
        check_wedge(false, 0.02);
    }

    #[test]
    fn concave_edge_wedge_within_two_percent() {
        check_wedge(true, 0.02);
    }

    #[test]
    fn buried_electrodes_match_the_image_method() {
        // Wenner a = 1 m with all electrodes 0.5 m deep: K = 8.268 m by the image
        // method (METHODS §2.1 [C]); the FE numeric K must agree within 1 %.
        let line = line_at((0..32).map(|i| (i as f64, -0.5)));
        let surface = Surface::new(vec![[0.0, 0.0], [31.0, 0.0]]).unwrap();
        let fwd = forward(&line, &surface, MeshParams::default());
        let quads = wenner(32, &WennerParams { max_a: 1 });
        let seq = Sequence::new(quads, 32).unwrap();
        let numeric = fwd.numeric_geometric_factors(&seq).unwrap();
        let analytic = fwd.geometric_factors(&seq).unwrap();
        for (n, a) in numeric.iter().zip(&analytic) {
            let (n, a) = (n.unwrap(), a.unwrap());
            assert!((a - 8.268).abs() < 1e-3, "image-method K {a}");
            assert!((n / a - 1.0).abs() < 0.01, "numeric K {n} vs {a}");
        }
    }

    /// A seeded random per-cell model, log-uniform in [10, 1000] Ω·m.
    fn random_cells(fwd: &Forward, seed: u64) -> Vec<f64> {
        let mut rng = StdRng::seed_from_u64(seed);
        (0..fwd.mesh().section().len()).map(|_| 10f64.powf(rng.random_range(1.0..3.0))).collect()
    }

    /// An invented levee cross-section: toe at x = 0, 1:2.5 slope up to a 4 m
    /// crest at 2.5 m, down to a toe at 16.5 m; 24 electrodes 0.75 m apart in
    /// chainage from x = −0.5.
    fn levee() -> (LineGeometry, Surface) {
        let z = |x: f64| ((x / 2.5).min(2.5).min((16.5 - x) / 2.5)).max(0.0);
        let line = line_at((0..24).map(|i| {
            let x = -0.5 + 0.75 * i as f64;
            (x, z(x))
        }));
        let extra = [[0.0, 0.0], [6.25, 2.5], [10.25, 2.5], [16.5, 0.0]];
        let surface = Surface::through_line(&line, &extra).unwrap();
        (line, surface)
    }

    #[test]
    fn topography_uses_numeric_factors_and_keeps_reciprocity() {
        let (line, surface) = levee();
        let fwd = forward(&line, &surface, MeshParams::default());
        assert!(!fwd.mesh().surface_is_flat());
        let normal = dipole_dipole(24, &DipoleDipoleParams { max_a: 1, max_n: 5 });
        let seq = Sequence::new(normal.clone(), 24).unwrap();
        assert_eq!(fwd.geometric_factors(&seq), fwd.numeric_geometric_factors(&seq));
        // Reciprocity theorem (any linear isotropic ground, any geometry):
        // R(ABMN) = R(MNAB) within 0.1 %, on a seeded random model.
        let rho = random_cells(&fwd, 3);
        let recip: Vec<Quadrupole> = normal.iter().map(Quadrupole::reciprocal).collect();
        let a = fwd.simulate(Resistivity::Cells(&rho), &seq).unwrap();
        let b = fwd.simulate(Resistivity::Cells(&rho), &Sequence::new(recip, 24).unwrap()).unwrap();
        for (x, y) in a.resistances().iter().zip(b.resistances()) {
            assert!((x / y - 1.0).abs() < 1e-3, "{x} vs {y}");
        }
    }

    #[test]
    fn reciprocity_within_a_thousandth() {
        // Reciprocity theorem: R(ABMN) = R(MNAB) for any linear isotropic
        // ground (e.g. Parasnis 1988; METHODS §1.6 uses it as an error check).
        let line = flat_line(24, 1.0);
        let fwd =
            forward(&line, &Surface::through_line(&line, &[]).unwrap(), MeshParams::default());
        let rho = random_cells(&fwd, 11);
        let normal = dipole_dipole(24, &DipoleDipoleParams { max_a: 2, max_n: 6 });
        let recip: Vec<Quadrupole> = normal.iter().map(Quadrupole::reciprocal).collect();
        let run = |q: Vec<Quadrupole>| {
            fwd.simulate(Resistivity::Cells(&rho), &Sequence::new(q, 24).unwrap()).unwrap()
        };
        let (a, b) = (run(normal), run(recip));
        for (x, y) in a.resistances().iter().zip(b.resistances()) {
            assert!((x / y - 1.0).abs() < 1e-3, "{x} vs {y}");
        }
    }

    #[test]
    fn jacobian_matches_finite_differences_and_sums_to_one() {
        let line = flat_line(16, 1.0);
        let fwd =
            forward(&line, &Surface::through_line(&line, &[]).unwrap(), MeshParams::default());
        let quads = merge(&[
            wenner(16, &WennerParams { max_a: 4 }),
            dipole_dipole(16, &DipoleDipoleParams { max_a: 1, max_n: 5 }),
        ]);
        let seq = Sequence::new(quads, 16).unwrap();
        // Homogeneous model: each row sums to 1 (R is homogeneous of degree one
        // in ρ, Euler's theorem), within 1 %.
        let hom = vec![100.0; fwd.mesh().section().len()];
        let (_, jac) = fwd.simulate_with_jacobian(Resistivity::Cells(&hom), &seq).unwrap();
        for i in 0..jac.n_data() {
            let sum: f64 = jac.row(i).iter().sum();
            assert!((sum - 1.0).abs() < 0.01, "row {i} sums to {sum}");
        }
        // Heterogeneous model: central differences of ln R in ln ρ_j
        // (step 1e-3) for the three largest entries of seeded random rows,
        // within 2 %.
        let rho = random_cells(&fwd, 5);
        let (sim, jac) = fwd.simulate_with_jacobian(Resistivity::Cells(&rho), &seq).unwrap();
        let mut rng = StdRng::seed_from_u64(9);
        let step: f64 = 1e-3;
        let mut worst: f64 = 0.0;
        for _ in 0..3 {
            let i = rng.random_range(0..jac.n_data());
            let mut order: Vec<usize> = (0..jac.n_cells()).collect();
            order.sort_by(|&a, &b| jac.get(i, b).abs().total_cmp(&jac.get(i, a).abs()));
            for &j in &order[..3] {
                let run = |f: f64| {
                    let mut r = rho.clone();
                    r[j] *= f;
                    fwd.simulate(Resistivity::Cells(&r), &seq).unwrap().resistances()[i]
                };
                let (up, down) = (run(step.exp()), run((-step).exp()));
                let fd = ((up / sim.resistances()[i]).abs().ln()
                    - (down / sim.resistances()[i]).abs().ln())
                    / (2.0 * step);
                let an = jac.get(i, j);
                assert!(
                    (fd / an - 1.0).abs() < 0.02,
                    "datum {i}, cell {j}: FD {fd} vs adjoint {an}"
                );
                worst = worst.max((fd / an - 1.0).abs());
            }
        }
        println!("Jacobian vs finite differences: worst relative difference {worst:.2e}");
    }

    #[test]
    fn forward_model_is_shareable_and_errors_say_what() {
        fn shareable<T: Send + Sync>() {}
        shareable::<Forward>();
        let line = flat_line(8, 1.0);
        let fwd =
            forward(&line, &Surface::through_line(&line, &[]).unwrap(), MeshParams::default());
        let seq = Sequence::new(vec![Quadrupole::new(0, 3, 1, 2)], 8).unwrap();
        let n = fwd.mesh().section().len();
        assert_eq!(
            fwd.simulate(Resistivity::Cells(&[1.0]), &seq).unwrap_err(),
            ForwardError::ModelLength { got: 1, expected: n, kind: "cells" }
        );
        let mut bad = vec![1.0; n];
        bad[3] = -2.0;
        assert_eq!(
            fwd.simulate(Resistivity::Cells(&bad), &seq).unwrap_err(),
            ForwardError::BadResistivity { index: 3, kind: "cells", value: -2.0 }
        );
        let long = Sequence::new(vec![Quadrupole::new(0, 9, 1, 2)], 10).unwrap();
        assert_eq!(
            fwd.simulate(Resistivity::Cells(&vec![1.0; n]), &long).unwrap_err(),
            ForwardError::SequenceMismatch { sequence: 10, mesh: 8 }
        );
    }
}
