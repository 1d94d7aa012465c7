//! Median depth of investigation of a quadrupole (Edwards 1977, "A modified
//! pseudosection for resistivity and IP", *Geophysics* 42, 1020–1036; Barker
//! 1989, *Geophysics* 54, 1031–1037).
//!
//! For a homogeneous half-space, the contribution to a pole–pole reading at
//! separation r from the ground between the surface and depth z is
//! C_r(z) = 1/r − 1/√(r² + 4z²) (1/m). A four-electrode reading sums
//! ±C over the pairs AM (+), AN (−), BM (−), BN (+), remote electrodes
//! dropped. The median depth z_e (m below the surface) halves the total:
//! C(z_e) = ½·C(∞) (METHODS §2.4). Distances are straight-line distances
//! between electrodes (horizontal on flat ground).
//!
//! The derivative dC/dz = Σ ±4z/(r² + 4z²)^{3/2} is the 1D sensitivity
//! (Fréchet derivative) of the reading to a thin horizontal layer at depth z
//! of a homogeneous half-space, the "depth investigation characteristic" of
//! Roy & Apparao 1971 (*Geophysics* 36, 943–959, from memory); divided by
//! C(∞) it integrates to 1 over depth. Its maximum is the depth of best
//! sensitivity ([`peak_sensitivity_depth`]).

use crate::geometry::LineGeometry;
use crate::sequence::Quadrupole;

/// The signed pole–pole pairs (distance r in m, sign) of a quadrupole:
/// AM (+), AN (−), BM (−), BN (+), remote electrodes dropped.
fn pairs(line: &LineGeometry, q: &Quadrupole) -> Vec<(f64, f64)> {
    let mut pairs: Vec<(f64, f64)> = vec![(line.distance(q.a, q.m), 1.0)];
    if let Some(n) = q.n {
        pairs.push((line.distance(q.a, n), -1.0));
    }
    if let Some(b) = q.b {
        pairs.push((line.distance(b, q.m), -1.0));
        if let Some(n) = q.n {
            pairs.push((line.distance(b, n), 1.0));
        }
    }
    pairs
}

/// Normalised 1D sensitivity (1/m) of `q` on `line` to a thin layer at depth
/// `z` (m) of a homogeneous half-space: (dC/dz)(z) / C(∞). `None` when the
/// reading has no half-space signal.
pub fn depth_sensitivity(line: &LineGeometry, q: &Quadrupole, z: f64) -> Option<f64> {
    let pairs = pairs(line, q);
    let total: f64 = pairs.iter().map(|&(r, s)| s / r).sum();
    if total.abs() <= 1e-12 / line.min_spacing() {
        return None;
    }
    let d: f64 = pairs.iter().map(|&(r, s)| s * 4.0 * z / (r * r + 4.0 * z * z).powf(1.5)).sum();
    Some(d / total)
}

/// Depth of best sensitivity (m below the surface): where
/// [`depth_sensitivity`] is largest, found on a grid of 2000 steps up to
/// twice the largest electrode distance and refined by golden-section search
/// to 1e-9 of that distance. `None` when the reading has no half-space signal.
pub fn peak_sensitivity_depth(line: &LineGeometry, q: &Quadrupole) -> Option<f64> {
    let r_max = pairs(line, q).iter().map(|p| p.0).fold(0.0, f64::max);
    let f = |z: f64| depth_sensitivity(line, q, z);
    f(r_max)?;
    let steps = 2000;
    let h = 2.0 * r_max / steps as f64;
    let best = (1..=steps)
        .map(|i| (i as f64 * h, f(i as f64 * h).expect("signal checked")))
        .max_by(|a, b| a.1.total_cmp(&b.1))
        .expect("non-empty grid")
        .0;
    let g = |z: f64| f(z).expect("signal checked");
    let (mut lo, mut hi) = ((best - h).max(0.0), best + h);
    let phi = 0.5 * (5f64.sqrt() - 1.0);
    while hi - lo > 1e-9 * r_max {
        let (x1, x2) = (hi - phi * (hi - lo), lo + phi * (hi - lo));
        if g(x1) < g(x2) { lo = x1 } else { hi = x2 }
    }
    Some(0.5 * (lo + hi))
}

/// Median depth of investigation z_e (m below the surface) of `q` on `line`,
/// found by bisection to 1e-9 relative. `None` when the reading has no
/// half-space signal (C(∞) = 0).
pub fn median_depth(line: &LineGeometry, q: &Quadrupole) -> Option<f64> {
    let pairs = pairs(line, q);
    let c = |z: f64| {
        pairs.iter().map(|&(r, s)| s * (1.0 / r - 1.0 / (r * r + 4.0 * z * z).sqrt())).sum::<f64>()
    };
    let total: f64 = pairs.iter().map(|&(r, s)| s / r).sum();
    let r_max = pairs.iter().map(|p| p.0).fold(0.0, f64::max);
    if total.abs() <= 1e-12 / line.min_spacing() {
        return None;
    }
    let f = |z: f64| (c(z) - 0.5 * total) * total.signum();
    let (mut lo, mut hi) = (0.0, r_max);
    while f(hi) < 0.0 {
        hi *= 2.0;
    }
    while hi - lo > 1e-9 * hi {
        let mid = 0.5 * (lo + hi);
        if f(mid) < 0.0 { lo = mid } else { hi = mid }
    }
    Some(0.5 * (lo + hi))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geometry::Electrode;
    use crate::sequence::{DipoleDipoleParams, SchlumbergerParams, dipole_dipole, schlumberger};

    fn line(n: usize) -> LineGeometry {
        LineGeometry::new((0..n).map(|i| Electrode::new(format!("{i}"), i as f64, 0.0)).collect())
            .unwrap()
    }

    /// Median depth of `q` on a unit-spacing line against a reference (m).
    fn check(q: Quadrupole, expected: f64, tol: f64) {
        let z = median_depth(&line(40), &q).unwrap();
        assert!((z - expected).abs() <= tol, "{q:?}: {z} vs {expected}");
    }

    #[test]
    fn pole_pole_is_exact() {
        // C(z) = ½C(∞) ⇒ √(a² + 4z²) = 2a ⇒ z = (√3/2)a (analytic).
        check(Quadrupole { a: 0, b: None, m: 3, n: None }, 3.0 * 3f64.sqrt() / 2.0, 1e-8);
    }

    #[test]
    fn edwards_barker_table() {
        // Edwards (1977) / Barker (1989) median depths z_e/a as tabulated in
        // METHODS §2.4 (values from memory; recomputed there [C]); 3 decimals
        // printed, tolerance 6e-4 a.
        check(Quadrupole::new(0, 3, 1, 2), 0.519, 6e-4); // Wenner α
        let dd = [0.416, 0.697, 0.962, 1.220, 1.476, 1.730];
        for (n, &z) in (1..=6).zip(&dd) {
            let q = dipole_dipole(40, &DipoleDipoleParams { max_a: 1, max_n: 6 })
                .into_iter()
                .find(|q| q.b == Some(0) && q.m == n + 1)
                .unwrap();
            check(q, z, 6e-4);
        }
        let ws = [0.519, 0.925, 1.318, 1.706, 2.093, 2.478];
        for (n, &z) in (1..=6).zip(&ws) {
            let q = schlumberger(40, &SchlumbergerParams { max_a: 1, max_n: 6 })
                .into_iter()
                .find(|q| q.a == 0 && q.m == n)
                .unwrap();
            check(q, z, 6e-4);
        }
        // Pole–dipole equals Wenner–Schlumberger (METHODS §2.4).
        check(Quadrupole { a: 0, b: None, m: 2, n: Some(3) }, 0.925, 6e-4);
    }

    #[test]
    fn wenner_is_most_sensitive_at_a_third_of_its_spacing() {
        // Depth of best 1D sensitivity of Wenner α: 0.3–0.5·a (common
        // practice, no source); Roy & Apparao 1971 put the peak of the depth
        // investigation characteristic of Wenner at 0.11·L = 0.33·a (from
        // memory). Here: 0.3194·a, the root of d/dz[S(z)] = 0 found
        // independently by a 1e-5·a scan of S(z) in Python.
        let line = line(40);
        for a in 1..=5 {
            let q = Quadrupole::new(0, 3 * a, a, 2 * a);
            let z = peak_sensitivity_depth(&line, &q).unwrap() / a as f64;
            assert!((0.3..=0.5).contains(&z), "a = {a}: {z}");
            assert!((z - 0.3194).abs() < 2e-4, "a = {a}: {z}");
        }
        // The normalised sensitivity integrates to 1 over depth (C(∞)
        // normalisation): trapezoidal sum to 2000·a, tail ∝ 1/z² beyond.
        let q = Quadrupole::new(0, 3, 1, 2);
        let (h, n) = (1e-3, 2_000_000);
        let sum: f64 =
            (1..n).map(|i| depth_sensitivity(&line, &q, i as f64 * h).unwrap()).sum::<f64>() * h;
        assert!((sum - 1.0).abs() < 1e-3, "{sum}");
    }
}
