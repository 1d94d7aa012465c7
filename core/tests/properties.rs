//! Property tests of the geometry: any electrode list, surface profile or
//! quadrupole list gives a value or an error, never a panic; what is accepted
//! keeps its invariants; the flat-ground geometric factor matches the
//! analytic Wenner value and is symmetric under reciprocity.

use std::f64::consts::PI;

use ohmline_core::geometry::{Electrode, LineGeometry, Surface};
use ohmline_core::sequence::{Quadrupole, Sequence, geometric_factor_flat};
use proptest::prelude::*;

/// Any f64, the awkward ones often.
fn any_f64() -> impl Strategy<Value = f64> {
    prop_oneof![
        4 => -1e3..1e3f64,
        1 => Just(f64::NAN),
        1 => Just(f64::INFINITY),
        1 => Just(f64::NEG_INFINITY),
        1 => Just(0.0),
        1 => any::<f64>(),
    ]
}

fn label() -> impl Strategy<Value = String> {
    prop_oneof![4 => "E[0-9]{1,2}", 1 => Just(String::new()), 1 => Just(" ".to_string()), 1 => ".{0,6}"]
}

/// An evenly spaced flat line of `n` electrodes.
fn flat_line(n: usize, spacing: f64) -> LineGeometry {
    LineGeometry::new(
        (0..n).map(|i| Electrode::new(format!("E{}", i + 1), i as f64 * spacing, 10.0)).collect(),
    )
    .unwrap()
}

proptest! {
    #[test]
    fn any_electrode_list_is_a_line_or_an_error(
        raw in prop::collection::vec((label(), any_f64(), any_f64()), 0..12)
    ) {
        let electrodes: Vec<Electrode> =
            raw.iter().map(|(l, x, z)| Electrode::new(l.clone(), *x, *z)).collect();
        if let Ok(line) = LineGeometry::new(electrodes) {
            let e = line.electrodes();
            prop_assert!(e.len() >= 4);
            prop_assert!(e.windows(2).all(|w| w[0].x() < w[1].x()), "increasing chainage");
            prop_assert!(e.iter().all(|e| e.x().is_finite() && e.z().is_finite()));
            for i in 0..e.len() {
                for j in 0..e.len() {
                    // Infinite only for coordinates near the largest f64.
                    let d = line.distance(i, j);
                    prop_assert!(d >= 0.0 && (d == 0.0) == (i == j), "distance {d}");
                }
            }
        }
    }

    #[test]
    fn any_profile_is_a_surface_or_an_error(
        points in prop::collection::vec((any_f64(), any_f64()), 0..10),
        probe in -1e4..1e4f64,
    ) {
        let pts: Vec<[f64; 2]> = points.iter().map(|(x, z)| [*x, *z]).collect();
        let tame = pts.iter().flatten().all(|v| v.abs() < 1e6);
        if let Ok(s) = Surface::new(pts) {
            let p = s.points();
            prop_assert!(p.iter().flatten().all(|v| v.is_finite()));
            if !tame {
                return Ok(());
            }
            prop_assert!(p.windows(2).all(|w| w[0][0] < w[1][0]), "strictly increasing in x");
            let z = s.elevation_at(probe);
            let (lo, hi) = p.iter().fold((f64::MAX, f64::MIN), |(lo, hi), q| (lo.min(q[1]), hi.max(q[1])));
            // Linear interpolation stays within the vertices' range.
            prop_assert!(z >= lo - 1e-9 && z <= hi + 1e-9, "{z} outside {lo}…{hi}");
            prop_assert!((s.depth_below(probe, z)).abs() < 1e-9);
        }
    }

    #[test]
    fn any_quadrupole_list_is_a_sequence_or_an_error(
        n in 0usize..16,
        raw in prop::collection::vec((0usize..20, prop::option::of(0usize..20), 0usize..20, prop::option::of(0usize..20)), 0..30),
    ) {
        let q: Vec<Quadrupole> = raw.iter().map(|&(a, b, m, n)| Quadrupole { a, b, m, n }).collect();
        if let Ok(seq) = Sequence::new(q, n) {
            for q in seq.quadrupoles() {
                let all = [Some(q.a), q.b, Some(q.m), q.n];
                prop_assert!(all.iter().flatten().all(|&i| i < n), "indices on the line");
            }
        }
    }

    /// Wenner-α on flat ground: K = 2πa (Telford, Geldart & Sheriff, Applied
    /// Geophysics, 2nd ed. 1990, §8.5.3), whatever the spacing and position.
    #[test]
    fn the_wenner_factor_is_two_pi_a(spacing in 0.05..20.0f64, mult in 1usize..4, start in 0usize..4) {
        let line = flat_line(16, spacing);
        let q = Quadrupole::new(start, start + 3 * mult, start + mult, start + 2 * mult);
        let k = geometric_factor_flat(&line, &q).unwrap();
        let expected = 2.0 * PI * spacing * mult as f64;
        prop_assert!((k - expected).abs() <= 1e-9 * expected, "{k} vs {expected}");
    }

    /// Reciprocity: swapping the current and potential pairs leaves the
    /// geometric factor unchanged (the bracket is symmetric in the pairs).
    #[test]
    fn the_factor_is_reciprocal(
        spacing in 0.1..5.0f64,
        idx in prop::sample::subsequence((0..12).collect::<Vec<usize>>(), 4).prop_shuffle(),
    ) {
        let line = flat_line(12, spacing);
        let q = Quadrupole::new(idx[0], idx[1], idx[2], idx[3]);
        let (k, kr) = (geometric_factor_flat(&line, &q), geometric_factor_flat(&line, &q.reciprocal()));
        match (k, kr) {
            (Some(k), Some(kr)) => prop_assert!((k - kr).abs() <= 1e-9 * k.abs().max(1.0), "{k} vs {kr}"),
            (None, None) => {}
            other => prop_assert!(false, "one direction without a factor: {other:?}"),
        }
    }
}
