//! Sections: the parameter cells of a 2D image under a line.
//!
//! A [`SectionGrid`] is the set of polygons (in x = chainage, z = elevation,
//! metres) on which resistivity models, change images, sensitivity masks and
//! change zones are defined. The forward mesh is finer; each of its triangles
//! belongs to one section cell. Values live beside the grid as plain slices
//! (`values[i]` belongs to `cells()[i]`).
//!
//! Cells must be conforming: two neighbouring cells share a whole edge (the same
//! two vertices). Neighbours are found by those shared edges.

use std::collections::HashMap;

use thiserror::Error;

use crate::geometry::Surface;

/// One cell of a section.
#[derive(Debug, Clone, PartialEq)]
pub struct Cell {
    polygon: Vec<[f64; 2]>,
    area: f64,
    centroid: [f64; 2],
    depth: f64,
}

impl Cell {
    /// Vertices (x, z) in metres, counter-clockwise.
    pub fn polygon(&self) -> &[[f64; 2]] {
        &self.polygon
    }

    /// Area in m² (shoelace formula).
    pub fn area(&self) -> f64 {
        self.area
    }

    /// Area centroid (x, z), metres.
    pub fn centroid(&self) -> [f64; 2] {
        self.centroid
    }

    /// Vertical depth of the centroid below the ground surface, metres.
    pub fn depth(&self) -> f64 {
        self.depth
    }

    /// Chainage range (min x, max x) of the cell, metres.
    pub fn x_range(&self) -> (f64, f64) {
        range(self.polygon.iter().map(|p| p[0]))
    }

    /// Elevation range (min z, max z) of the cell, metres.
    pub fn z_range(&self) -> (f64, f64) {
        range(self.polygon.iter().map(|p| p[1]))
    }
}

fn range(v: impl Iterator<Item = f64>) -> (f64, f64) {
    v.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), x| (lo.min(x), hi.max(x)))
}

/// Why a set of polygons is not a valid section.
#[derive(Debug, Error, PartialEq)]
pub enum SectionError {
    /// No cells.
    #[error("a section needs at least one cell")]
    Empty,
    /// A polygon has fewer than three vertices.
    #[error("cell {cell}: a polygon needs at least 3 vertices, got {vertices}")]
    TooFewVertices {
        /// Cell index.
        cell: usize,
        /// Vertices given.
        vertices: usize,
    },
    /// A coordinate is NaN or infinite.
    #[error("cell {cell}: a vertex is not a finite number")]
    NonFinite {
        /// Cell index.
        cell: usize,
    },
    /// The polygon encloses no area.
    #[error("cell {cell}: the polygon has zero area")]
    Degenerate {
        /// Cell index.
        cell: usize,
    },
}

/// A validated set of section cells with their neighbours.
#[derive(Debug, Clone, PartialEq)]
pub struct SectionGrid {
    cells: Vec<Cell>,
    neighbours: Vec<Vec<usize>>,
    surface: Surface,
}

impl SectionGrid {
    /// Builds a grid from cell polygons (either orientation) below `surface`.
    pub fn new(polygons: Vec<Vec<[f64; 2]>>, surface: Surface) -> Result<Self, SectionError> {
        if polygons.is_empty() {
            return Err(SectionError::Empty);
        }
        let mut cells = Vec::with_capacity(polygons.len());
        for (cell, mut polygon) in polygons.into_iter().enumerate() {
            if polygon.len() < 3 {
                return Err(SectionError::TooFewVertices { cell, vertices: polygon.len() });
            }
            if polygon.iter().any(|p| !p[0].is_finite() || !p[1].is_finite()) {
                return Err(SectionError::NonFinite { cell });
            }
            let signed = signed_area(&polygon);
            let scale = polygon.iter().map(|p| p[0].abs().max(p[1].abs())).fold(1.0f64, f64::max);
            if signed.abs() <= 1e-12 * scale * scale {
                return Err(SectionError::Degenerate { cell });
            }
            if signed < 0.0 {
                polygon.reverse();
            }
            let centroid = polygon_centroid(&polygon, signed.abs());
            let depth = surface.depth_below(centroid[0], centroid[1]);
            cells.push(Cell { polygon, area: signed.abs(), centroid, depth });
        }
        let neighbours = find_neighbours(&cells);
        Ok(Self { cells, neighbours, surface })
    }

    /// The cells.
    pub fn cells(&self) -> &[Cell] {
        &self.cells
    }

    /// Number of cells.
    pub fn len(&self) -> usize {
        self.cells.len()
    }

    /// Always false: a valid grid has at least one cell.
    pub fn is_empty(&self) -> bool {
        self.cells.is_empty()
    }

    /// Indices of the cells sharing an edge with cell `i`, ascending.
    pub fn neighbours(&self, i: usize) -> &[usize] {
        &self.neighbours[i]
    }

    /// The ground surface the cells lie under.
    pub fn surface(&self) -> &Surface {
        &self.surface
    }

    /// Index of the cell containing point (x, z), if any.
    pub fn locate(&self, x: f64, z: f64) -> Option<usize> {
        self.cells.iter().position(|c| point_in_polygon(c.polygon(), x, z))
    }
}

/// Signed polygon area by the shoelace formula (positive counter-clockwise), m².
pub fn signed_area(p: &[[f64; 2]]) -> f64 {
    let n = p.len();
    0.5 * (0..n).map(|i| p[i][0] * p[(i + 1) % n][1] - p[(i + 1) % n][0] * p[i][1]).sum::<f64>()
}

fn polygon_centroid(p: &[[f64; 2]], area: f64) -> [f64; 2] {
    // Shift to the first vertex for accuracy far from the origin.
    let o = p[0];
    let n = p.len();
    let (mut cx, mut cz) = (0.0, 0.0);
    for i in 0..n {
        let (a, b) = (p[i], p[(i + 1) % n]);
        let (ax, az, bx, bz) = (a[0] - o[0], a[1] - o[1], b[0] - o[0], b[1] - o[1]);
        let cross = ax * bz - bx * az;
        cx += (ax + bx) * cross;
        cz += (az + bz) * cross;
    }
    [o[0] + cx / (6.0 * area), o[1] + cz / (6.0 * area)]
}

/// True when (x, z) lies inside or on the boundary of polygon `p` (even–odd rule).
pub fn point_in_polygon(p: &[[f64; 2]], x: f64, z: f64) -> bool {
    let n = p.len();
    let mut inside = false;
    for i in 0..n {
        let (a, b) = (p[i], p[(i + 1) % n]);
        // On the edge counts as inside.
        let cross = (b[0] - a[0]) * (z - a[1]) - (b[1] - a[1]) * (x - a[0]);
        let len = (b[0] - a[0]).hypot(b[1] - a[1]);
        if cross.abs() <= 1e-9 * len.max(1.0)
            && x >= a[0].min(b[0]) - 1e-9
            && x <= a[0].max(b[0]) + 1e-9
            && z >= a[1].min(b[1]) - 1e-9
            && z <= a[1].max(b[1]) + 1e-9
        {
            return true;
        }
        if (a[1] > z) != (b[1] > z) && x < a[0] + (z - a[1]) * (b[0] - a[0]) / (b[1] - a[1]) {
            inside = !inside;
        }
    }
    inside
}

fn find_neighbours(cells: &[Cell]) -> Vec<Vec<usize>> {
    // Vertices are matched after rounding to 1 µm.
    let key = |p: [f64; 2]| ((p[0] * 1e6).round() as i64, (p[1] * 1e6).round() as i64);
    type Edge = ((i64, i64), (i64, i64));
    let mut edges: HashMap<Edge, Vec<usize>> = HashMap::new();
    for (i, c) in cells.iter().enumerate() {
        let n = c.polygon.len();
        for k in 0..n {
            let (a, b) = (key(c.polygon[k]), key(c.polygon[(k + 1) % n]));
            let e = if a < b { (a, b) } else { (b, a) };
            edges.entry(e).or_default().push(i);
        }
    }
    let mut out = vec![Vec::new(); cells.len()];
    for owners in edges.values() {
        for &i in owners {
            for &j in owners {
                if i != j && !out[i].contains(&j) {
                    out[i].push(j);
                }
            }
        }
    }
    for v in &mut out {
        v.sort_unstable();
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn flat(x0: f64, x1: f64) -> Surface {
        Surface::new(vec![[x0, 0.0], [x1, 0.0]]).unwrap()
    }

    /// A 3 × 2 grid of 1 m squares under flat ground at z = 0.
    fn grid() -> SectionGrid {
        let mut polys = Vec::new();
        for j in 0..2 {
            for i in 0..3 {
                let (x, z) = (i as f64, -(j as f64));
                polys.push(vec![[x, z], [x, z - 1.0], [x + 1.0, z - 1.0], [x + 1.0, z]]);
            }
        }
        SectionGrid::new(polys, flat(0.0, 3.0)).unwrap()
    }

    #[test]
    fn areas_centroids_depths_neighbours() {
        let g = grid();
        assert_eq!(g.len(), 6);
        for c in g.cells() {
            assert!((c.area() - 1.0).abs() < 1e-12);
            assert!(signed_area(c.polygon()) > 0.0, "normalised to counter-clockwise");
        }
        assert_eq!(g.cells()[4].centroid(), [1.5, -1.5]);
        assert!((g.cells()[4].depth() - 1.5).abs() < 1e-12);
        assert_eq!(g.neighbours(0), &[1, 3]);
        assert_eq!(g.neighbours(4), &[1, 3, 5]);
        assert_eq!(g.locate(2.5, -0.5), Some(2));
        assert_eq!(g.locate(9.0, -0.5), None);
    }

    #[test]
    fn triangle_area_and_centroid_match_the_formulas() {
        // Triangle centroid = mean of the vertices; area = |cross|/2.
        let g = SectionGrid::new(vec![vec![[0.0, 0.0], [4.0, 0.0], [1.0, -3.0]]], flat(0.0, 4.0))
            .unwrap();
        let c = &g.cells()[0];
        assert!((c.area() - 6.0).abs() < 1e-12);
        assert!((c.centroid()[0] - 5.0 / 3.0).abs() < 1e-12);
        assert!((c.centroid()[1] + 1.0).abs() < 1e-12);
    }

    #[test]
    fn bad_polygons_are_named() {
        let s = flat(0.0, 1.0);
        assert_eq!(SectionGrid::new(vec![], s.clone()), Err(SectionError::Empty));
        assert_eq!(
            SectionGrid::new(vec![vec![[0.0, 0.0], [1.0, 0.0]]], s.clone()),
            Err(SectionError::TooFewVertices { cell: 0, vertices: 2 })
        );
        assert_eq!(
            SectionGrid::new(vec![vec![[0.0, 0.0], [1.0, 0.0], [2.0, 0.0]]], s),
            Err(SectionError::Degenerate { cell: 0 })
        );
    }
}
