//! Forward-modelling mesh: an unstructured triangulation of the ground under a
//! line, with the line's parameter section embedded in it.
//!
//! Coordinates are (x, z) in metres, x chainage, z elevation (up positive).
//! The domain is bounded above by the ground surface (a [`Surface`] through the
//! surface electrodes and any extra points such as levee crest edges and toes)
//! and extends `padding` line lengths beyond the first and last electrode and
//! below the ground.
//!
//! Construction: node rows follow the ground at depths d_j below it (vertical
//! depth, m); element size is h0 = a/`nodes_per_spacing` within `fine_depth`
//! spacings of the line and grows geometrically (factor `growth` per element)
//! beyond, both for row spacing and node spacing along each row; electrodes
//! are nodes; the cell edges of the parameter section, the ground, the outer
//! boundary and any requested interfaces are constraint edges of a constrained
//! Delaunay triangulation (crate `spade`), which is then refined to a minimum
//! angle (Ruppert/Chew refinement as implemented by `spade`).
//!
//! The parameter section ([`SectionGrid`]) covers the line's chainage with
//! columns ≈ `cell_width` electrode spacings wide (column edges at electrodes,
//! between them and at surface kinks) and layers that follow the topography,
//! the first `first_layer` spacings thick and growing by `layer_growth`, down
//! to `section_depth` line lengths. Every triangle belongs to exactly one
//! section cell; triangles of the padding belong to the nearest cell at the
//! section's edge (same layer beside it, bottom layer below it), so a model is
//! one resistivity per section cell.

use std::collections::HashMap;

use spade::{
    AngleLimit, ConstrainedDelaunayTriangulation, Point2, RefinementParameters, Triangulation,
};
use thiserror::Error;

use crate::geometry::{LineGeometry, Surface};
use crate::section::{SectionError, SectionGrid, signed_area};

/// Tolerance (m) for an electrode counting as on the surface, and for
/// matching points on mesh lines.
const ON_SURFACE_TOL: f64 = 1e-3;

/// How to build a mesh. Lengths are given relative to the line's nominal
/// electrode spacing `a` or its length `L` (first to last electrode).
#[derive(Debug, Clone, PartialEq)]
pub struct MeshParams {
    /// Node intervals between neighbouring electrodes along the surface (≥ 1);
    /// the surface element size is h0 = a / this.
    pub nodes_per_spacing: usize,
    /// Depth below the line (and distance beyond its ends), in spacings a,
    /// within which the element size stays h0.
    pub fine_depth: f64,
    /// Element size growth per element beyond that zone (> 1, e.g. 1.1).
    pub growth: f64,
    /// Padding beyond the first/last electrode and below the surface, in line
    /// lengths L.
    pub padding: f64,
    /// Width of the section's columns, in spacings a.
    pub cell_width: f64,
    /// Thickness of the section's first layer, in spacings a.
    pub first_layer: f64,
    /// Thickness ratio of successive section layers (≥ 1).
    pub layer_growth: f64,
    /// Depth of the section below the surface, in line lengths L.
    pub section_depth: f64,
    /// Minimum triangle angle the refinement aims for, degrees (0 = none, ≤ 30).
    pub min_angle_deg: f64,
    /// Depths below the surface (m) of extra mesh lines across the whole
    /// domain, e.g. known horizontal interfaces.
    pub interface_depths: Vec<f64>,
    /// Chainages (m) of extra vertical mesh lines through the whole depth, e.g.
    /// known vertical contacts.
    pub interface_chainages: Vec<f64>,
}

impl Default for MeshParams {
    /// h0 = a/5 down to one spacing, then growth 1.1 per element, padding 2 L, columns a/2 wide, first layer a/4
    /// thick growing ×1.1, section depth L/4, minimum angle 25°.
    /// (METHODS §1.3 and §1.6: padding ≥ 1–2 L, 2–4 nodes per spacing, common
    /// practice.)
    fn default() -> Self {
        Self {
            nodes_per_spacing: 5,
            fine_depth: 1.0,
            growth: 1.1,
            padding: 2.0,
            cell_width: 0.5,
            first_layer: 0.25,
            layer_growth: 1.1,
            section_depth: 0.25,
            min_angle_deg: 25.0,
            interface_depths: Vec::new(),
            interface_chainages: Vec::new(),
        }
    }
}

/// Why a mesh cannot be built.
#[derive(Debug, Error, PartialEq)]
pub enum MeshError {
    /// A parameter is out of its range.
    #[error("mesh parameter {name}: {reason}")]
    BadParam {
        /// Field of [`MeshParams`].
        name: &'static str,
        /// What is wrong.
        reason: &'static str,
    },
    /// An electrode lies above the ground surface.
    #[error("electrode {label:?} is {height:.3} m above the ground surface")]
    ElectrodeAboveSurface {
        /// The electrode's label.
        label: String,
        /// Height above the surface, m.
        height: f64,
    },
    /// The triangulation failed (e.g. non-finite coordinates).
    #[error("triangulation failed: {0}")]
    Triangulation(String),
    /// The section cells are invalid.
    #[error("section: {0}")]
    Section(#[from] SectionError),
}

/// An edge of the outer (non-surface) boundary, where the mixed boundary
/// condition applies.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BoundaryEdge {
    /// The two end nodes.
    pub nodes: [usize; 2],
    /// The triangle the edge belongs to.
    pub triangle: usize,
}

/// A triangular mesh of the ground under a line with its parameter section.
#[derive(Debug, Clone)]
pub struct Mesh {
    nodes: Vec<[f64; 2]>,
    triangles: Vec<[usize; 3]>,
    triangle_cell: Vec<usize>,
    section: SectionGrid,
    electrode_nodes: Vec<usize>,
    buried: Vec<bool>,
    boundary: Vec<BoundaryEdge>,
    reference: [f64; 2],
    surface: Surface,
    surface_is_flat: bool,
}

impl Mesh {
    /// Meshes the ground under `line` below `surface`. Electrodes on the
    /// surface (within 1 mm) become surface nodes, electrodes below it become
    /// buried nodes; an electrode above the surface is an error.
    pub fn new(
        line: &LineGeometry,
        surface: &Surface,
        params: &MeshParams,
    ) -> Result<Self, MeshError> {
        validate(params)?;
        let a = line.nominal_spacing();
        let (x0, x1) = line.extent();
        let length = x1 - x0;
        let h0 = a / params.nodes_per_spacing as f64;
        let g = params.growth - 1.0;
        let fine = params.fine_depth * a;
        let pad = (params.padding * length).max(4.0 * a);
        let (xl, xr) = (x0 - pad, x1 + pad);

        // Electrodes: on the surface or buried.
        let mut buried = Vec::with_capacity(line.len());
        for e in line.electrodes() {
            let depth = surface.depth_below(e.x(), e.z());
            if depth < -ON_SURFACE_TOL {
                return Err(MeshError::ElectrodeAboveSurface {
                    label: e.label().to_string(),
                    height: -depth,
                });
            }
            buried.push(depth > ON_SURFACE_TOL);
        }

        // Column boundaries of the section: electrodes (surface or buried
        // chainage), subdivisions between them, surface kinks, interfaces.
        let mut cols: Vec<f64> = Vec::new();
        let ex: Vec<f64> = line.electrodes().iter().map(|e| e.x()).collect();
        for w in ex.windows(2) {
            let n = ((w[1] - w[0]) / (params.cell_width * a)).round().max(1.0) as usize;
            for i in 0..n {
                cols.push(w[0] + (w[1] - w[0]) * i as f64 / n as f64);
            }
        }
        cols.push(x1);
        // Surface kinks: vertices where the slope changes.
        let sp = surface.points();
        let kinks: Vec<f64> = (1..sp.len().saturating_sub(1))
            .filter(|&i| {
                let s0 = (sp[i][1] - sp[i - 1][1]) / (sp[i][0] - sp[i - 1][0]);
                let s1 = (sp[i + 1][1] - sp[i][1]) / (sp[i + 1][0] - sp[i][0]);
                (s1 - s0).abs() > 1e-9
            })
            .map(|i| sp[i][0])
            .collect();
        for &k in kinks.iter().chain(&params.interface_chainages) {
            if k > x0 && k < x1 {
                cols.push(k);
            }
        }
        sort_dedup(&mut cols, 1e-6 * a);

        // Section layer depths (d = 0 first).
        let section_depth = params.section_depth * length;
        let mut layers = vec![0.0];
        let mut t = params.first_layer * a;
        while *layers.last().expect("non-empty") + 0.5 * t < section_depth {
            let next = layers.last().expect("non-empty") + t;
            layers.push(next);
            t *= params.layer_growth;
        }
        if layers.len() < 2 {
            layers.push(section_depth.max(params.first_layer * a));
        }
        let d_section = *layers.last().expect("non-empty");

        // Node rows: depths including every forced depth.
        let mut forced: Vec<f64> = layers.clone();
        forced.extend(params.interface_depths.iter().copied().filter(|&d| d > 0.0 && d < pad));
        forced.push(pad.max(d_section + h0));
        sort_dedup(&mut forced, 1e-6 * a);
        let d_bottom = *forced.last().expect("non-empty");
        let mut rows = vec![0.0];
        let mut step = h0;
        for &f in &forced[1..] {
            loop {
                let d = *rows.last().expect("non-empty");
                let rem = f - d;
                if rem <= 1e-9 * a {
                    break;
                }
                let want = if d < fine { h0 } else { step.max(h0 + g * (d - fine)) };
                let n = (rem / want - 0.2).ceil().max(1.0);
                let s = rem / n;
                rows.push(if n <= 1.0 { f } else { d + s });
                step = s * params.growth;
            }
        }

        // Surface x: must-keep points.
        let mut keep_all: Vec<f64> = vec![xl, xr];
        keep_all.extend(kinks.iter().copied().filter(|&k| k > xl && k < xr));
        keep_all.extend(params.interface_chainages.iter().copied().filter(|&k| k > xl && k < xr));
        sort_dedup(&mut keep_all, 1e-6 * a);
        let mut keep_section = keep_all.clone();
        keep_section.extend(cols.iter().copied());
        sort_dedup(&mut keep_section, 1e-6 * a);

        let size = |x: f64, d: f64| {
            let dx = if x < x0 {
                x0 - x
            } else if x > x1 {
                x - x1
            } else {
                0.0
            };
            h0 + g * (dx.hypot(d) - fine).max(0.0)
        };

        let mut pts: Vec<[f64; 2]> = Vec::new();
        let mut index: HashMap<(i64, i64), usize> = HashMap::new();
        let key = |p: [f64; 2]| ((p[0] * 1e7).round() as i64, (p[1] * 1e7).round() as i64);
        let mut add = |p: [f64; 2], pts: &mut Vec<[f64; 2]>| -> usize {
            *index.entry(key(p)).or_insert_with(|| {
                pts.push(p);
                pts.len() - 1
            })
        };
        // rows_nodes[j] = (x, node) sorted by x.
        let mut row_nodes: Vec<Vec<(f64, usize)>> = Vec::with_capacity(rows.len());
        for &d in &rows {
            let in_section = d <= d_section + 1e-9 * a;
            let keep = if in_section { &keep_section } else { &keep_all };
            let mut xs: Vec<f64> = Vec::new();
            for w in keep.windows(2) {
                xs.extend(subdivide(w[0], w[1], |x| size(x, d)));
            }
            xs.push(xr);
            let nodes = xs
                .into_iter()
                .map(|x| (x, add([x, surface.elevation_at(x) - d], &mut pts)))
                .collect();
            row_nodes.push(nodes);
        }

        // Electrode nodes.
        let mut electrode_nodes = Vec::with_capacity(line.len());
        for (i, e) in line.electrodes().iter().enumerate() {
            let p = if buried[i] { [e.x(), e.z()] } else { [e.x(), surface.elevation_at(e.x())] };
            electrode_nodes.push(add(p, &mut pts));
        }

        // Constraint chains.
        let mut edges: Vec<[usize; 2]> = Vec::new();
        let chain = |list: &[usize], edges: &mut Vec<[usize; 2]>| {
            for w in list.windows(2) {
                if w[0] != w[1] {
                    edges.push([w[0], w[1]]);
                }
            }
        };
        let last = rows.len() - 1;
        // Ground, bottom, interface rows across the whole domain.
        for (j, &d) in rows.iter().enumerate() {
            let full = j == 0
                || j == last
                || params.interface_depths.iter().any(|&f| (f - d).abs() < 1e-6 * a);
            let is_layer = layers.iter().any(|&l| (l - d).abs() < 1e-6 * a);
            let nodes: Vec<usize> = row_nodes[j]
                .iter()
                .filter(|(x, _)| full || (is_layer && *x >= x0 - 1e-9 && *x <= x1 + 1e-9))
                .map(|&(_, n)| n)
                .collect();
            if full || is_layer {
                chain(&with_points_on(&nodes, &electrode_nodes, &pts), &mut edges);
            }
        }
        // Vertical lines: domain sides, section columns (to the section
        // bottom), interface chainages (whole depth).
        let mut verticals: Vec<(f64, f64)> = vec![(xl, d_bottom), (xr, d_bottom)];
        verticals.extend(cols.iter().map(|&c| (c, d_section)));
        verticals.extend(params.interface_chainages.iter().map(|&c| (c, d_bottom)));
        for (xc, dmax) in verticals {
            let mut list = Vec::new();
            for (j, &d) in rows.iter().enumerate() {
                if d > dmax + 1e-9 * a {
                    break;
                }
                if let Some(&(_, n)) = row_nodes[j].iter().find(|(x, _)| (x - xc).abs() < 1e-9) {
                    list.push(n);
                }
            }
            chain(&with_points_on(&list, &electrode_nodes, &pts), &mut edges);
        }
        edges.sort_unstable_by_key(|e| (e[0].min(e[1]), e[0].max(e[1])));
        edges.dedup_by_key(|e| (e[0].min(e[1]), e[0].max(e[1])));

        // Triangulate and refine.
        let vertices: Vec<Point2<f64>> = pts.iter().map(|p| Point2::new(p[0], p[1])).collect();
        let mut cdt: ConstrainedDelaunayTriangulation<Point2<f64>> =
            ConstrainedDelaunayTriangulation::try_bulk_load_cdt(vertices, edges, |_| {})
                .map_err(|e| MeshError::Triangulation(format!("{e:?}")))?;
        if cdt.num_vertices() != pts.len() {
            return Err(MeshError::Triangulation("coincident mesh points".into()));
        }
        // Outer faces are told apart geometrically below (spade's own
        // inside/outside test counts constraint crossings, which the section's
        // interior lines would confuse).
        let angle = AngleLimit::from_deg(params.min_angle_deg);
        let rp = RefinementParameters::<f64>::new()
            .with_angle_limit(angle)
            .with_min_required_area(0.05 * h0 * h0)
            .with_max_additional_vertices(2 * pts.len());
        cdt.refine(rp);

        let mut all_nodes = vec![[0.0; 2]; cdt.num_vertices()];
        for v in cdt.vertices() {
            let p = v.position();
            all_nodes[v.fix().index()] = [p.x, p.y];
        }
        let inside = |c: [f64; 2]| {
            let s = surface.elevation_at(c[0]);
            let tol = 1e-9 * a;
            c[1] < s - tol && c[1] > s - d_bottom + tol && c[0] > xl && c[0] < xr
        };
        let mut new_index = vec![usize::MAX; all_nodes.len()];
        let mut nodes: Vec<[f64; 2]> = Vec::with_capacity(all_nodes.len());
        let mut renumber = |i: usize, nodes: &mut Vec<[f64; 2]>| {
            if new_index[i] == usize::MAX {
                new_index[i] = nodes.len();
                nodes.push(all_nodes[i]);
            }
            new_index[i]
        };
        // Electrodes first, so their nodes are 0..n_electrodes in cable order.
        let electrode_nodes: Vec<usize> =
            electrode_nodes.iter().map(|&e| renumber(e, &mut nodes)).collect();
        let mut triangles = Vec::with_capacity(cdt.num_inner_faces());
        for f in cdt.inner_faces() {
            let [p, q, r] = f.vertices().map(|v| v.fix().index());
            let tri = [all_nodes[p], all_nodes[q], all_nodes[r]];
            let area = signed_area(&tri);
            // Zero-area faces only arise from collinear points on the outer
            // boundary (outside the domain).
            if area.abs() < 1e-10 * h0 * h0 || !inside(centroid(&tri, &[0, 1, 2])) {
                continue;
            }
            let [p, q, r] = [p, q, r].map(|i| renumber(i, &mut nodes));
            triangles.push(if area > 0.0 { [p, q, r] } else { [p, r, q] });
        }

        // Section cells (quadrilaterals following the topography).
        let mut polys = Vec::with_capacity((cols.len() - 1) * (layers.len() - 1));
        for j in 0..layers.len() - 1 {
            for i in 0..cols.len() - 1 {
                let (ca, cb) = (cols[i], cols[i + 1]);
                let (sa, sb) = (surface.elevation_at(ca), surface.elevation_at(cb));
                polys.push(vec![
                    [ca, sa - layers[j]],
                    [ca, sa - layers[j + 1]],
                    [cb, sb - layers[j + 1]],
                    [cb, sb - layers[j]],
                ]);
            }
        }
        let section = SectionGrid::new(polys, surface.clone())?;
        let ncol = cols.len() - 1;
        let nlay = layers.len() - 1;
        let triangle_cell = triangles
            .iter()
            .map(|t| {
                let c = centroid(&nodes, t);
                let i = cols.partition_point(|&v| v <= c[0]).saturating_sub(1).min(ncol - 1);
                // Depth below the local ground (beside the section too).
                let d = surface.elevation_at(c[0]) - c[1];
                let j = layers.partition_point(|&v| v <= d).saturating_sub(1).min(nlay - 1);
                j * ncol + i
            })
            .collect();

        // Outer boundary edges (not on the ground surface).
        let on_surface =
            |n: usize| (surface.elevation_at(nodes[n][0]) - nodes[n][1]).abs() < 1e-7 * a.max(1.0);
        let mut owners: HashMap<(usize, usize), (usize, usize)> = HashMap::new();
        for (ti, t) in triangles.iter().enumerate() {
            for k in 0..3 {
                let (p, q) = (t[k], t[(k + 1) % 3]);
                owners.entry((p.min(q), p.max(q))).or_insert((ti, 0)).1 += 1;
            }
        }
        let mut boundary: Vec<BoundaryEdge> = owners
            .into_iter()
            .filter(|&((p, q), (_, count))| count == 1 && !(on_surface(p) && on_surface(q)))
            .map(|((p, q), (ti, _))| BoundaryEdge { nodes: [p, q], triangle: ti })
            .collect();
        boundary.sort_by_key(|b| b.nodes);

        let xm = 0.5 * (x0 + x1);
        let surface_is_flat = {
            let z0 = surface.points()[0][1];
            surface.points().iter().all(|p| (p[1] - z0).abs() < ON_SURFACE_TOL)
        };
        Ok(Self {
            nodes,
            triangles,
            triangle_cell,
            section,
            electrode_nodes,
            buried,
            boundary,
            reference: [xm, surface.elevation_at(xm)],
            surface: surface.clone(),
            surface_is_flat,
        })
    }

    /// Node coordinates (x, z), m.
    pub fn nodes(&self) -> &[[f64; 2]] {
        &self.nodes
    }

    /// Triangles as node indices, counter-clockwise in (x, z).
    pub fn triangles(&self) -> &[[usize; 3]] {
        &self.triangles
    }

    /// For each triangle, the index of the section cell it belongs to.
    pub fn triangle_cells(&self) -> &[usize] {
        &self.triangle_cell
    }

    /// The parameter section embedded in the mesh.
    pub fn section(&self) -> &SectionGrid {
        &self.section
    }

    /// Node of each electrode, in cable order.
    pub fn electrode_nodes(&self) -> &[usize] {
        &self.electrode_nodes
    }

    /// Whether each electrode (cable order) is buried below the surface.
    pub fn buried(&self) -> &[bool] {
        &self.buried
    }

    /// Outer boundary edges (sides and bottom), where the mixed boundary
    /// condition applies.
    pub fn boundary_edges(&self) -> &[BoundaryEdge] {
        &self.boundary
    }

    /// The line's centre on the ground surface (x, z), m: the reference source
    /// of the mixed boundary condition.
    pub fn reference_point(&self) -> [f64; 2] {
        self.reference
    }

    /// The ground surface.
    pub fn surface(&self) -> &Surface {
        &self.surface
    }

    /// True when the ground surface is horizontal (all its points at one
    /// elevation, within 1 mm).
    pub fn surface_is_flat(&self) -> bool {
        self.surface_is_flat
    }

    /// Centroid (x, z) of triangle `t`, m.
    pub fn triangle_centroid(&self, t: usize) -> [f64; 2] {
        centroid(&self.nodes, &self.triangles[t])
    }

    /// Area of triangle `t`, m².
    pub fn triangle_area(&self, t: usize) -> f64 {
        let [p, q, r] = self.triangles[t];
        signed_area(&[self.nodes[p], self.nodes[q], self.nodes[r]])
    }
}

fn centroid(nodes: &[[f64; 2]], t: &[usize; 3]) -> [f64; 2] {
    let [p, q, r] = t.map(|i| nodes[i]);
    [(p[0] + q[0] + r[0]) / 3.0, (p[1] + q[1] + r[1]) / 3.0]
}

fn validate(p: &MeshParams) -> Result<(), MeshError> {
    let bad = |name, reason| Err(MeshError::BadParam { name, reason });
    if p.nodes_per_spacing == 0 {
        return bad("nodes_per_spacing", "must be at least 1");
    }
    if !(p.fine_depth >= 0.0 && p.fine_depth.is_finite()) {
        return bad("fine_depth", "must be finite and ≥ 0");
    }
    if !(p.growth > 1.0 && p.growth <= 3.0) {
        return bad("growth", "must be in (1, 3]");
    }
    if !(p.padding > 0.0 && p.padding.is_finite()) {
        return bad("padding", "must be positive");
    }
    if !(p.cell_width > 0.0 && p.cell_width.is_finite()) {
        return bad("cell_width", "must be positive");
    }
    if !(p.first_layer > 0.0 && p.first_layer.is_finite()) {
        return bad("first_layer", "must be positive");
    }
    if !(p.layer_growth >= 1.0 && p.layer_growth <= 3.0) {
        return bad("layer_growth", "must be in [1, 3]");
    }
    if !(p.section_depth > 0.0 && p.section_depth.is_finite()) {
        return bad("section_depth", "must be positive");
    }
    if !(0.0..=30.0).contains(&p.min_angle_deg) {
        return bad("min_angle_deg", "must be in [0, 30]");
    }
    if p.interface_depths.iter().chain(&p.interface_chainages).any(|v| !v.is_finite()) {
        return bad("interface_depths/interface_chainages", "must be finite");
    }
    Ok(())
}

fn sort_dedup(v: &mut Vec<f64>, tol: f64) {
    v.sort_by(f64::total_cmp);
    v.dedup_by(|a, b| (*a - *b).abs() <= tol);
}

/// Points from `a` (included) towards `b` (excluded) with spacing following
/// the size function `h(x)`: equal steps of ∫dx/h.
fn subdivide(a: f64, b: f64, h: impl Fn(f64) -> f64) -> Vec<f64> {
    const M: usize = 64;
    let dx = (b - a) / M as f64;
    let mut cum = vec![0.0; M + 1];
    for i in 0..M {
        let xm = a + dx * (i as f64 + 0.5);
        cum[i + 1] = cum[i] + dx / h(xm);
    }
    let total = cum[M];
    let n = total.round().max(1.0) as usize;
    let mut out = Vec::with_capacity(n);
    out.push(a);
    let mut seg = 0;
    for k in 1..n {
        let target = total * k as f64 / n as f64;
        while cum[seg + 1] < target {
            seg += 1;
        }
        let f = (target - cum[seg]) / (cum[seg + 1] - cum[seg]);
        out.push(a + dx * (seg as f64 + f));
    }
    out
}

/// Inserts into a chain of nodes any of `extra` that lie on it (between two
/// consecutive chain nodes, on their segment), keeping the order.
fn with_points_on(chain: &[usize], extra: &[usize], pts: &[[f64; 2]]) -> Vec<usize> {
    let mut out = Vec::with_capacity(chain.len());
    for (k, &n) in chain.iter().enumerate() {
        out.push(n);
        if let Some(&m) = chain.get(k + 1) {
            let (p, q) = (pts[n], pts[m]);
            let len = (q[0] - p[0]).hypot(q[1] - p[1]);
            let mut on: Vec<(f64, usize)> = extra
                .iter()
                .filter(|&&e| e != n && e != m)
                .filter_map(|&e| {
                    let r = pts[e];
                    let t = ((r[0] - p[0]) * (q[0] - p[0]) + (r[1] - p[1]) * (q[1] - p[1]))
                        / (len * len);
                    let cross = (q[0] - p[0]) * (r[1] - p[1]) - (q[1] - p[1]) * (r[0] - p[0]);
                    (t > 0.0 && t < 1.0 && cross.abs() < 1e-9 * len * len).then_some((t, e))
                })
                .collect();
            on.sort_by(|a, b| a.0.total_cmp(&b.0));
            out.extend(on.into_iter().map(|(_, e)| e));
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geometry::Electrode;

    fn flat_line(n: usize, a: f64) -> LineGeometry {
        LineGeometry::new(
            (0..n).map(|i| Electrode::new(format!("{i}"), i as f64 * a, 0.0)).collect(),
        )
        .unwrap()
    }

    /// Builds a mesh and checks the invariants every mesh must satisfy.
    fn check(line: &LineGeometry, surface: &Surface, params: &MeshParams) -> Mesh {
        let mesh = Mesh::new(line, surface, params).unwrap();
        // Positive areas; the triangles tile the domain: their area equals the
        // polygon area of the domain outline (ground + sides + bottom).
        let total: f64 = (0..mesh.triangles().len()).map(|t| mesh.triangle_area(t)).sum();
        assert!((0..mesh.triangles().len()).all(|t| mesh.triangle_area(t) > 0.0));
        // Every section cell's area equals the area of its triangles (exact
        // tiling of the section), to 1e-9 relative.
        let mut cell_area = vec![0.0; mesh.section().len()];
        for (t, &c) in mesh.triangle_cells().iter().enumerate() {
            let ctr = mesh.triangle_centroid(t);
            if mesh.section().cells()[c].polygon().len() >= 3
                && crate::section::point_in_polygon(
                    mesh.section().cells()[c].polygon(),
                    ctr[0],
                    ctr[1],
                )
            {
                cell_area[c] += mesh.triangle_area(t);
            }
        }
        for (c, cell) in mesh.section().cells().iter().enumerate() {
            assert!(
                (cell_area[c] - cell.area()).abs() <= 1e-9 * cell.area().max(1.0),
                "cell {c}: triangles {} vs cell {}",
                cell_area[c],
                cell.area()
            );
        }
        // Electrodes are nodes at their positions.
        for (e, &n) in line.electrodes().iter().zip(mesh.electrode_nodes()) {
            assert!((mesh.nodes()[n][0] - e.x()).abs() < 1e-9);
            assert!((mesh.nodes()[n][1] - e.z()).abs() < 2e-3);
        }
        assert!(total > 0.0);
        mesh
    }

    #[test]
    fn flat_line_mesh_is_valid_and_graded() {
        let line = flat_line(24, 1.0);
        let s = Surface::through_line(&line, &[]).unwrap();
        let p = MeshParams::default();
        let mesh = check(&line, &s, &p);
        // Domain area = (L + 2·pad) × pad for flat ground (exact tiling).
        let (l, pad) = (23.0, 2.0 * 23.0);
        let total: f64 = (0..mesh.triangles().len()).map(|t| mesh.triangle_area(t)).sum();
        assert!((total - (l + 2.0 * pad) * pad).abs() < 1e-6 * total, "{total}");
        // Columns a/2 wide over the line: 46 columns.
        let first_row = mesh.section().cells().iter().filter(|c| c.depth() < 0.2).count();
        assert_eq!(first_row, 46);
        // Surface nodes between two electrodes: nodes_per_spacing intervals.
        let between = mesh
            .nodes()
            .iter()
            .filter(|n| n[1].abs() < 1e-12 && n[0] > 10.0 + 1e-9 && n[0] < 11.0 - 1e-9)
            .count();
        assert!(between >= 3, "{between}");
        assert!(mesh.boundary_edges().len() > 10);
        assert!(mesh.surface_is_flat());
    }

    #[test]
    fn levee_mesh_follows_the_surface() {
        // An invented levee: 4 m crest, 1:2.5 slopes, 2.5 m high, line across it.
        let shape = |x: f64| {
            if !(0.0..=16.5).contains(&x) {
                0.0
            } else if x < 6.25 {
                x / 2.5
            } else if x <= 10.25 {
                2.5
            } else {
                (16.5 - x) / 2.5
            }
        };
        let line = LineGeometry::new(
            (0..48)
                .map(|i| {
                    let x = -3.5 + 0.5 * i as f64;
                    Electrode::new(format!("{i}"), x, shape(x))
                })
                .collect(),
        )
        .unwrap();
        let s = Surface::through_line(&line, &[[0.0, 0.0], [6.25, 2.5], [10.25, 2.5], [16.5, 0.0]])
            .unwrap();
        let mesh = check(&line, &s, &MeshParams::default());
        assert!(!mesh.surface_is_flat());
        // No node above the ground.
        for n in mesh.nodes() {
            assert!(n[1] <= s.elevation_at(n[0]) + 1e-9, "{n:?}");
        }
    }

    #[test]
    fn buried_electrodes_and_errors() {
        let line = LineGeometry::new(
            (0..8).map(|i| Electrode::new(format!("{i}"), i as f64, -0.5)).collect(),
        )
        .unwrap();
        let s = Surface::new(vec![[0.0, 0.0], [7.0, 0.0]]).unwrap();
        let mesh = check(&line, &s, &MeshParams::default());
        assert!(mesh.buried().iter().all(|&b| b));
        let high = LineGeometry::new(
            (0..8).map(|i| Electrode::new(format!("{i}"), i as f64, 0.2)).collect(),
        )
        .unwrap();
        assert!(matches!(
            Mesh::new(&high, &s, &MeshParams::default()),
            Err(MeshError::ElectrodeAboveSurface { .. })
        ));
        let p = MeshParams { growth: 1.0, ..MeshParams::default() };
        assert_eq!(
            Mesh::new(&line, &s, &p).unwrap_err(),
            MeshError::BadParam { name: "growth", reason: "must be in (1, 3]" }
        );
    }
}
