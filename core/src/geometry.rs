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
        let mut d: Vec<f64> = self
            .electrodes
            .windows(2)
            .map(|w| (w[1].x - w[0].x).hypot(w[1].z - w[0].z))
            .collect();
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

#[cfg(test)]
mod tests {
    use super::*;

    fn line(xs: &[(&str, f64, f64)]) -> Result<LineGeometry, GeometryError> {
        LineGeometry::new(xs.iter().map(|&(l, x, z)| Electrode::new(l, x, z)).collect())
    }

    #[test]
    fn valid_line_reports_spacing_and_labels() {
        let g = line(&[("1", 0.0, 0.0), ("2", 1.0, 0.0), ("3", 2.0, 0.0), ("4", 3.5, 0.0)]).unwrap();
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
}
