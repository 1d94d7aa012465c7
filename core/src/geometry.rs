//! Electrode lines: where the electrodes of a permanent line sit.
//!
//! Conventions used across ohmline: `x` is the horizontal position along the line
//! (chainage) in metres, `z` is elevation in metres, positive up. Electrodes are
//! listed in cable order, which must be strictly increasing in `x`: a line is a
//! straight 2D profile and the section below it is imaged in the (x, z) plane.

use std::collections::HashMap;

use thiserror::Error;

/// One electrode of a line.
#[derive(Debug, Clone, PartialEq)]
pub struct Electrode {
    label: String,
    x: f64,
    z: f64,
}

impl Electrode {
    /// An electrode with a label (unique within its line), chainage `x` (m) and
    /// elevation `z` (m, up positive).
    pub fn new(label: impl Into<String>, x: f64, z: f64) -> Self {
        Self { label: label.into(), x, z }
    }

    /// The electrode's label as the meter and the sequence files name it.
    pub fn label(&self) -> &str {
        &self.label
    }

    /// Chainage along the line, metres.
    pub fn x(&self) -> f64 {
        self.x
    }

    /// Elevation, metres, up positive.
    pub fn z(&self) -> f64 {
        self.z
    }
}

/// Why a set of electrodes is not a valid line.
#[derive(Debug, Error, PartialEq)]
pub enum GeometryError {
    /// Fewer electrodes than a four-electrode measurement needs.
    #[error("a line needs at least 4 electrodes, got {0}")]
    TooFewElectrodes(usize),
    /// A label is empty.
    #[error("electrode {index}: the label is empty")]
    EmptyLabel {
        /// Position of the electrode in the list (0-based).
        index: usize,
    },
    /// Two electrodes share a label.
    #[error("electrode {index}: label {label:?} is used twice")]
    DuplicateLabel {
        /// Position of the second electrode with the label (0-based).
        index: usize,
        /// The repeated label.
        label: String,
    },
    /// A coordinate is NaN or infinite.
    #[error("electrode {label:?}: coordinate {field} is not a finite number")]
    NonFinite {
        /// The electrode's label.
        label: String,
        /// `x` or `z`.
        field: &'static str,
    },
    /// Electrodes are not in strictly increasing chainage.
    #[error(
        "electrode {label:?}: x = {x} m is not greater than the previous electrode's x = {previous} m (electrodes must be listed in increasing x)"
    )]
    NotIncreasing {
        /// The electrode's label.
        label: String,
        /// Its chainage.
        x: f64,
        /// The previous electrode's chainage.
        previous: f64,
    },
}

/// A validated electrode line: at least four electrodes, unique non-empty labels,
/// finite coordinates, strictly increasing `x`.
#[derive(Debug, Clone, PartialEq)]
pub struct LineGeometry {
    electrodes: Vec<Electrode>,
    by_label: HashMap<String, usize>,
}

impl LineGeometry {
    /// Validates the electrodes (in cable order) into a line.
    pub fn new(electrodes: Vec<Electrode>) -> Result<Self, GeometryError> {
        if electrodes.len() < 4 {
            return Err(GeometryError::TooFewElectrodes(electrodes.len()));
        }
        let mut by_label = HashMap::with_capacity(electrodes.len());
        for (index, e) in electrodes.iter().enumerate() {
            if e.label.trim().is_empty() {
                return Err(GeometryError::EmptyLabel { index });
            }
            for (field, v) in [("x", e.x), ("z", e.z)] {
                if !v.is_finite() {
                    return Err(GeometryError::NonFinite { label: e.label.clone(), field });
                }
            }
            if by_label.insert(e.label.clone(), index).is_some() {
                return Err(GeometryError::DuplicateLabel { index, label: e.label.clone() });
            }
            if index > 0 && e.x <= electrodes[index - 1].x {
                return Err(GeometryError::NotIncreasing {
                    label: e.label.clone(),
                    x: e.x,
                    previous: electrodes[index - 1].x,
                });
            }
        }
        Ok(Self { electrodes, by_label })
    }

    /// The electrodes in cable order.
    pub fn electrodes(&self) -> &[Electrode] {
        &self.electrodes
    }

    /// Number of electrodes.
    pub fn len(&self) -> usize {
        self.electrodes.len()
    }

    /// Always false: a valid line has at least four electrodes.
    pub fn is_empty(&self) -> bool {
        self.electrodes.is_empty()
    }

    /// Index (cable order, 0-based) of the electrode with this label.
    pub fn index_of(&self, label: &str) -> Option<usize> {
        self.by_label.get(label).copied()
    }

    /// Chainage of the first and last electrode, metres.
    pub fn extent(&self) -> (f64, f64) {
        (self.electrodes[0].x, self.electrodes[self.electrodes.len() - 1].x)
    }

    /// Smallest distance between neighbouring electrodes, metres (in the x–z plane).
    pub fn min_spacing(&self) -> f64 {
        self.electrodes
            .windows(2)
            .map(|w| (w[1].x - w[0].x).hypot(w[1].z - w[0].z))
            .fold(f64::INFINITY, f64::min)
    }

    /// Median distance between neighbouring electrodes, metres: the line's
    /// nominal electrode spacing.
    pub fn nominal_spacing(&self) -> f64 {
        let mut d: Vec<f64> =
            self.electrodes.windows(2).map(|w| (w[1].x - w[0].x).hypot(w[1].z - w[0].z)).collect();
        d.sort_by(f64::total_cmp);
        d[d.len() / 2]
    }

    /// Straight-line distance between electrodes `i` and `j`, metres.
    pub fn distance(&self, i: usize, j: usize) -> f64 {
        let (a, b) = (&self.electrodes[i], &self.electrodes[j]);
        (a.x - b.x).hypot(a.z - b.z)
    }

    /// True when every electrode has the same elevation (to 1 mm).
    pub fn is_flat(&self) -> bool {
        let z0 = self.electrodes[0].z;
        self.electrodes.iter().all(|e| (e.z - z0).abs() < 1e-3)
    }
}

/// Why a ground-surface profile is invalid.
#[derive(Debug, Error, PartialEq)]
pub enum SurfaceError {
    /// Fewer than two points.
    #[error("a surface profile needs at least 2 points, got {0}")]
    TooFewPoints(usize),
    /// A coordinate is NaN or infinite.
    #[error("surface point {index}: coordinate is not a finite number")]
    NonFinite {
        /// Position of the point (0-based, after sorting by x).
        index: usize,
    },
    /// Two points share a chainage.
    #[error("surface point {index}: x = {x} m appears twice")]
    RepeatedX {
        /// Position of the point (0-based, after sorting by x).
        index: usize,
        /// The repeated chainage.
        x: f64,
    },
}

/// The ground surface along a line: a piecewise-linear profile z(x), strictly
/// increasing in x, extended horizontally beyond its ends.
#[derive(Debug, Clone, PartialEq)]
pub struct Surface {
    points: Vec<[f64; 2]>,
}

impl Surface {
    /// A profile through the given (x, z) points (any order; sorted by x here).
    pub fn new(mut points: Vec<[f64; 2]>) -> Result<Self, SurfaceError> {
        if points.len() < 2 {
            return Err(SurfaceError::TooFewPoints(points.len()));
        }
        points.sort_by(|p, q| p[0].total_cmp(&q[0]));
        for (index, p) in points.iter().enumerate() {
            if !p[0].is_finite() || !p[1].is_finite() {
                return Err(SurfaceError::NonFinite { index });
            }
            if index > 0 && p[0] <= points[index - 1][0] {
                return Err(SurfaceError::RepeatedX { index, x: p[0] });
            }
        }
        Ok(Self { points })
    }

    /// The profile through a line's electrodes plus extra surface points (for
    /// example the crest edges and toes of a levee). Where an extra point has the
    /// chainage of an electrode, the electrode wins.
    pub fn through_line(line: &LineGeometry, extra: &[[f64; 2]]) -> Result<Self, SurfaceError> {
        let mut pts: Vec<[f64; 2]> = line.electrodes().iter().map(|e| [e.x(), e.z()]).collect();
        for p in extra {
            if !pts.iter().any(|q| (q[0] - p[0]).abs() < 1e-9) {
                pts.push(*p);
            }
        }
        Self::new(pts)
    }

    /// The profile's vertices, increasing in x.
    pub fn points(&self) -> &[[f64; 2]] {
        &self.points
    }

    /// Ground elevation at chainage `x` (linear between vertices, constant beyond
    /// the ends), metres.
    pub fn elevation_at(&self, x: f64) -> f64 {
        let p = &self.points;
        if x <= p[0][0] {
            return p[0][1];
        }
        if x >= p[p.len() - 1][0] {
            return p[p.len() - 1][1];
        }
        let i = p.partition_point(|q| q[0] <= x).max(1);
        let (a, b) = (p[i - 1], p[i]);
        a[1] + (b[1] - a[1]) * (x - a[0]) / (b[0] - a[0])
    }

    /// Vertical depth of (x, z) below the ground, metres (negative above ground).
    pub fn depth_below(&self, x: f64, z: f64) -> f64 {
        self.elevation_at(x) - z
    }

    /// Shortest distance from (x, z) to the ground profile, metres, negative above
    /// ground. On a levee slope this is the depth that matters for heat
    /// conduction from the surface; on flat ground it equals [`Self::depth_below`].
    pub fn distance_below(&self, x: f64, z: f64) -> f64 {
        let p = &self.points;
        let (x0, x1) = (p[0][0], p[p.len() - 1][0]);
        // Horizontal extensions beyond the ends count as part of the surface.
        let mut segs: Vec<([f64; 2], [f64; 2])> = p.windows(2).map(|w| (w[0], w[1])).collect();
        segs.push(([x0 - 1e9, p[0][1]], p[0]));
        segs.push((p[p.len() - 1], [x1 + 1e9, p[p.len() - 1][1]]));
        let d = segs
            .iter()
            .map(|&(a, b)| {
                let (dx, dz) = (b[0] - a[0], b[1] - a[1]);
                let t = (((x - a[0]) * dx + (z - a[1]) * dz) / (dx * dx + dz * dz)).clamp(0.0, 1.0);
                (x - a[0] - t * dx).hypot(z - a[1] - t * dz)
            })
            .fold(f64::INFINITY, f64::min);
        if self.depth_below(x, z) >= 0.0 { d } else { -d }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn line(xs: &[(&str, f64, f64)]) -> Result<LineGeometry, GeometryError> {
        LineGeometry::new(xs.iter().map(|&(l, x, z)| Electrode::new(l, x, z)).collect())
    }

    #[test]
    fn valid_line_reports_spacing_and_labels() {
        let g =
            line(&[("1", 0.0, 0.0), ("2", 1.0, 0.0), ("3", 2.0, 0.0), ("4", 3.5, 0.0)]).unwrap();
        assert_eq!(g.len(), 4);
        assert_eq!(g.index_of("3"), Some(2));
        assert_eq!(g.index_of("9"), None);
        assert!((g.min_spacing() - 1.0).abs() < 1e-12);
        assert!((g.nominal_spacing() - 1.0).abs() < 1e-12);
        assert_eq!(g.extent(), (0.0, 3.5));
        assert!(g.is_flat());
    }

    #[test]
    fn invalid_lines_say_what_is_wrong() {
        assert_eq!(line(&[("1", 0.0, 0.0)]), Err(GeometryError::TooFewElectrodes(1)));
        assert!(matches!(
            line(&[("1", 0.0, 0.0), ("2", 1.0, 0.0), ("1", 2.0, 0.0), ("4", 3.0, 0.0)]),
            Err(GeometryError::DuplicateLabel { index: 2, .. })
        ));
        assert!(matches!(
            line(&[("1", 0.0, 0.0), ("2", 1.0, 0.0), ("3", 1.0, 0.0), ("4", 3.0, 0.0)]),
            Err(GeometryError::NotIncreasing { .. })
        ));
        assert!(matches!(
            line(&[("1", 0.0, 0.0), ("2", 1.0, f64::NAN), ("3", 2.0, 0.0), ("4", 3.0, 0.0)]),
            Err(GeometryError::NonFinite { field: "z", .. })
        ));
        assert!(matches!(
            line(&[("1", 0.0, 0.0), (" ", 1.0, 0.0), ("3", 2.0, 0.0), ("4", 3.0, 0.0)]),
            Err(GeometryError::EmptyLabel { index: 1 })
        ));
    }

    #[test]
    fn surface_interpolates_and_measures_depth() {
        // A 1:2 slope from (0, 0) up to (4, 2), then a flat crest to (10, 2).
        let s = Surface::new(vec![[10.0, 2.0], [0.0, 0.0], [4.0, 2.0]]).unwrap();
        assert!((s.elevation_at(2.0) - 1.0).abs() < 1e-12);
        assert!((s.elevation_at(-5.0) - 0.0).abs() < 1e-12);
        assert!((s.elevation_at(50.0) - 2.0).abs() < 1e-12);
        assert!((s.depth_below(7.0, 0.5) - 1.5).abs() < 1e-12);
        // Below the middle of the slope the nearest surface is the slope itself:
        // distance = vertical depth × cos(atan(1/2)) = 1 × 2/√5.
        let d = s.distance_below(2.0, 0.0);
        assert!((d - 2.0 / 5f64.sqrt()).abs() < 1e-12, "{d}");
        assert!(s.distance_below(7.0, 3.0) < 0.0);
        assert_eq!(Surface::new(vec![[0.0, 0.0]]), Err(SurfaceError::TooFewPoints(1)));
        assert!(matches!(
            Surface::new(vec![[0.0, 0.0], [0.0, 1.0]]),
            Err(SurfaceError::RepeatedX { .. })
        ));
    }
}
