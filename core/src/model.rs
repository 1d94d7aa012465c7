//! Model descriptions: a resistivity section given as background, layers and
//! polygonal bodies, for synthetic data and demos.
//!
//! ρ(x, z) in Ω·m at chainage x (m) and elevation z (m, up positive) is built
//! in order: the background everywhere; each layer (in list order) fills
//! everything at or below its `top` elevation; each body (in list order) fills
//! its polygon (boundary included). Later entries win. Layers are horizontal
//! in elevation, not parallel to the topography.

use thiserror::Error;

use crate::mesh::Mesh;
use crate::section::{SectionGrid, point_in_polygon};

/// A horizontal layer: everything at or below elevation `top` (m).
#[derive(Debug, Clone, PartialEq)]
pub struct Layer {
    /// Elevation of the layer's top, m.
    pub top: f64,
    /// Resistivity, Ω·m.
    pub rho: f64,
}

/// A polygonal body in the (x, z) plane.
#[derive(Debug, Clone, PartialEq)]
pub struct Body {
    /// Vertices (x, z) in metres, either orientation, not closed (the last
    /// vertex connects to the first).
    pub polygon: Vec<[f64; 2]>,
    /// Resistivity, Ω·m.
    pub rho: f64,
}

/// Why a model description is invalid. Entries are named by list and
/// position (0-based).
#[derive(Debug, Error, PartialEq)]
pub enum ModelError {
    /// A resistivity is not positive and finite.
    #[error("{entry}: resistivity {rho} Ω·m must be positive and finite")]
    BadResistivity {
        /// `background`, `layer 2`, `body 0`, …
        entry: String,
        /// The value.
        rho: f64,
    },
    /// A coordinate is not finite.
    #[error("{entry}: coordinates must be finite numbers")]
    NonFinite {
        /// The entry.
        entry: String,
    },
    /// A polygon has fewer than three vertices.
    #[error("{entry}: a polygon needs at least 3 vertices, got {vertices}")]
    TooFewVertices {
        /// The entry.
        entry: String,
        /// Vertices given.
        vertices: usize,
    },
    /// A polygon's edges cross each other (or it has no area).
    #[error("{entry}: the polygon intersects itself (edges {first} and {second})")]
    SelfIntersecting {
        /// The entry.
        entry: String,
        /// First of two crossing edges (edge i joins vertex i and i + 1).
        first: usize,
        /// Second crossing edge.
        second: usize,
    },
}

/// A validated model description.
#[derive(Debug, Clone, PartialEq)]
pub struct ModelDescription {
    background: f64,
    layers: Vec<Layer>,
    bodies: Vec<Body>,
}

impl ModelDescription {
    /// Validates a description: every ρ positive and finite, every coordinate
    /// finite, every polygon with ≥ 3 vertices and no crossing edges.
    pub fn new(background: f64, layers: Vec<Layer>, bodies: Vec<Body>) -> Result<Self, ModelError> {
        let check_rho = |entry: String, rho: f64| {
            if rho.is_finite() && rho > 0.0 {
                Ok(())
            } else {
                Err(ModelError::BadResistivity { entry, rho })
            }
        };
        check_rho("background".into(), background)?;
        for (i, l) in layers.iter().enumerate() {
            check_rho(format!("layer {i}"), l.rho)?;
            if !l.top.is_finite() {
                return Err(ModelError::NonFinite { entry: format!("layer {i}") });
            }
        }
        for (i, b) in bodies.iter().enumerate() {
            let entry = format!("body {i}");
            check_rho(entry.clone(), b.rho)?;
            if b.polygon.len() < 3 {
                return Err(ModelError::TooFewVertices { entry, vertices: b.polygon.len() });
            }
            if b.polygon.iter().any(|p| !p[0].is_finite() || !p[1].is_finite()) {
                return Err(ModelError::NonFinite { entry });
            }
            if let Some((first, second)) = crossing_edges(&b.polygon) {
                return Err(ModelError::SelfIntersecting { entry, first, second });
            }
        }
        Ok(Self { background, layers, bodies })
    }

    /// A homogeneous model of resistivity `rho` (Ω·m).
    pub fn homogeneous(rho: f64) -> Result<Self, ModelError> {
        Self::new(rho, Vec::new(), Vec::new())
    }

    /// Background resistivity, Ω·m.
    pub fn background(&self) -> f64 {
        self.background
    }

    /// The layers, in order.
    pub fn layers(&self) -> &[Layer] {
        &self.layers
    }

    /// The bodies, in order.
    pub fn bodies(&self) -> &[Body] {
        &self.bodies
    }

    /// Resistivity (Ω·m) at chainage `x`, elevation `z` (m).
    pub fn resistivity_at(&self, x: f64, z: f64) -> f64 {
        let mut rho = self.background;
        for l in &self.layers {
            if z <= l.top {
                rho = l.rho;
            }
        }
        for b in &self.bodies {
            if point_in_polygon(&b.polygon, x, z) {
                rho = b.rho;
            }
        }
        rho
    }

    /// Resistivity at each section cell's centroid, Ω·m (one per cell).
    pub fn on_cells(&self, section: &SectionGrid) -> Vec<f64> {
        section
            .cells()
            .iter()
            .map(|c| {
                let p = c.centroid();
                self.resistivity_at(p[0], p[1])
            })
            .collect()
    }

    /// Resistivity at each mesh triangle's centroid, Ω·m (one per triangle):
    /// a fine synthetic model for [`crate::forward::Resistivity::Triangles`].
    pub fn on_triangles(&self, mesh: &Mesh) -> Vec<f64> {
        (0..mesh.triangles().len())
            .map(|t| {
                let p = mesh.triangle_centroid(t);
                self.resistivity_at(p[0], p[1])
            })
            .collect()
    }
}

/// First pair of non-adjacent polygon edges that intersect, or adjacent edges
/// that overlap (fold back), if any.
fn crossing_edges(p: &[[f64; 2]]) -> Option<(usize, usize)> {
    let n = p.len();
    let orient = |a: [f64; 2], b: [f64; 2], c: [f64; 2]| {
        let v = (b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0]);
        if v.abs() < 1e-12 {
            0
        } else if v > 0.0 {
            1
        } else {
            -1
        }
    };
    let on_segment = |a: [f64; 2], b: [f64; 2], c: [f64; 2]| {
        c[0] >= a[0].min(b[0]) - 1e-12
            && c[0] <= a[0].max(b[0]) + 1e-12
            && c[1] >= a[1].min(b[1]) - 1e-12
            && c[1] <= a[1].max(b[1]) + 1e-12
    };
    let intersects = |a: [f64; 2], b: [f64; 2], c: [f64; 2], d: [f64; 2]| {
        let (o1, o2, o3, o4) = (orient(a, b, c), orient(a, b, d), orient(c, d, a), orient(c, d, b));
        if o1 != o2 && o3 != o4 && o1 * o2 <= 0 && o3 * o4 <= 0 && (o1 != 0 || o2 != 0) {
            return true;
        }
        (o1 == 0 && on_segment(a, b, c))
            || (o2 == 0 && on_segment(a, b, d))
            || (o3 == 0 && on_segment(c, d, a))
            || (o4 == 0 && on_segment(c, d, b))
    };
    for i in 0..n {
        let (a, b) = (p[i], p[(i + 1) % n]);
        for j in i + 1..n {
            let (c, d) = (p[j], p[(j + 1) % n]);
            let adjacent = j == i + 1 || (i == 0 && j == n - 1);
            if adjacent {
                // Adjacent edges share a vertex; they conflict only when they
                // fold back onto each other (collinear, pointing back).
                let shared = if j == i + 1 { b } else { a };
                let (u, v) = if j == i + 1 { (a, d) } else { (b, c) };
                if orient(u, shared, v) == 0 {
                    let dot = (u[0] - shared[0]) * (v[0] - shared[0])
                        + (u[1] - shared[1]) * (v[1] - shared[1]);
                    if dot > 0.0 {
                        return Some((i, j));
                    }
                }
                continue;
            }
            if intersects(a, b, c, d) {
                return Some((i, j));
            }
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Evaluates the model at points and compares with expected values.
    fn check(model: &ModelDescription, points: &[(f64, f64, f64)]) {
        for &(x, z, rho) in points {
            assert_eq!(model.resistivity_at(x, z), rho, "at ({x}, {z})");
        }
    }

    #[test]
    fn later_entries_win() {
        let m = ModelDescription::new(
            100.0,
            vec![Layer { top: -1.0, rho: 30.0 }, Layer { top: -3.0, rho: 10.0 }],
            vec![
                Body {
                    polygon: vec![[0.0, 0.0], [2.0, 0.0], [2.0, -2.0], [0.0, -2.0]],
                    rho: 500.0,
                },
                Body { polygon: vec![[1.0, -1.0], [3.0, -1.0], [3.0, -5.0]], rho: 5.0 },
            ],
        )
        .unwrap();
        check(
            &m,
            &[
                (-5.0, -0.5, 100.0),
                (-5.0, -1.0, 30.0), // on the top: inside the layer
                (-5.0, -2.0, 30.0),
                (-5.0, -4.0, 10.0),
                (0.5, -1.5, 500.0),
                (1.9, -1.2, 5.0),  // both bodies: the later one wins
                (2.0, -4.0, 10.0), // below the triangle's slanted edge
            ],
        );
    }

    #[test]
    fn invalid_entries_are_named() {
        assert_eq!(
            ModelDescription::new(0.0, vec![], vec![]),
            Err(ModelError::BadResistivity { entry: "background".into(), rho: 0.0 })
        );
        assert_eq!(
            ModelDescription::new(10.0, vec![Layer { top: 0.0, rho: f64::NAN }], vec![])
                .unwrap_err()
                .to_string(),
            "layer 0: resistivity NaN Ω·m must be positive and finite"
        );
        let bow_tie = vec![[0.0, 0.0], [1.0, 1.0], [1.0, 0.0], [0.0, 1.0]];
        assert_eq!(
            ModelDescription::new(
                10.0,
                vec![],
                vec![
                    Body { polygon: vec![[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]], rho: 1.0 },
                    Body { polygon: bow_tie, rho: 1.0 }
                ]
            ),
            Err(ModelError::SelfIntersecting { entry: "body 1".into(), first: 0, second: 2 })
        );
        assert_eq!(
            ModelDescription::new(
                10.0,
                vec![],
                vec![Body { polygon: vec![[0.0, 0.0], [1.0, 0.0]], rho: 1.0 }]
            ),
            Err(ModelError::TooFewVertices { entry: "body 0".into(), vertices: 2 })
        );
        assert_eq!(
            ModelDescription::new(
                10.0,
                vec![],
                vec![Body { polygon: vec![[0.0, 0.0], [2.0, 0.0], [1.0, 0.0]], rho: 1.0 }]
            ),
            Err(ModelError::SelfIntersecting { entry: "body 0".into(), first: 0, second: 1 })
        );
        // A concave but simple polygon is fine.
        assert!(
            ModelDescription::new(
                10.0,
                vec![],
                vec![Body {
                    polygon: vec![[0.0, 0.0], [4.0, 0.0], [4.0, -4.0], [2.0, -1.0], [0.0, -4.0]],
                    rho: 1.0
                }]
            )
            .is_ok()
        );
    }
}
