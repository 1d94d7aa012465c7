//! Modified Bessel functions of the second kind K0 and K1, exponentially scaled.
//!
//! The 2.5D forward model needs K0(x) and K1(x) over many decades of x (the
//! wavenumber-domain potential of a point source on a half-space is
//! φ̃ = I·K0(k r)/(2πσ)); the unscaled functions underflow for x ≳ 700, so this
//! module returns eˣ·K0(x) and eˣ·K1(x).
//!
//! Polynomial approximations of Abramowitz & Stegun, *Handbook of Mathematical
//! Functions* (1964), §9.8: 9.8.1 and 9.8.3 (I0, I1 for |x| ≤ 3.75), 9.8.5 and
//! 9.8.7 (K0, K1 for 0 < x ≤ 2, absolute error below 1e-8), 9.8.6 and 9.8.8
//! (√x·eˣ·K0, √x·eˣ·K1 for x ≥ 2, relative error below 2.2e-7). x is
//! dimensionless.

/// I0(x) for |x| ≤ 3.75 (A&S 9.8.1, |ε| < 1.6e-7).
fn i0_small(x: f64) -> f64 {
    let t = (x / 3.75).powi(2);
    1.0 + t
        * (3.5156229
            + t * (3.0899424 + t * (1.2067492 + t * (0.2659732 + t * (0.0360768 + t * 0.0045813)))))
}

/// I1(x) for |x| ≤ 3.75 (A&S 9.8.3, |ε| < 8e-9 on I1/x).
fn i1_small(x: f64) -> f64 {
    let t = (x / 3.75).powi(2);
    x * (0.5
        + t * (0.87890594
            + t * (0.51498869
                + t * (0.15084934 + t * (0.02658733 + t * (0.00301532 + t * 0.00032411))))))
}

/// eˣ·K0(x) for x > 0. Returns +∞ at x = 0 and NaN for negative or NaN x.
pub fn k0e(x: f64) -> f64 {
    if x.is_nan() || x < 0.0 {
        return f64::NAN;
    }
    if x == 0.0 {
        return f64::INFINITY;
    }
    if x <= 2.0 {
        let y = x * x / 4.0;
        let k0 = -(x / 2.0).ln() * i0_small(x)
            + (-0.57721566
                + y * (0.42278420
                    + y * (0.23069756
                        + y * (0.03488590 + y * (0.00262698 + y * (0.00010750 + y * 0.0000074))))));
        k0 * x.exp()
    } else {
        let y = 2.0 / x;
        (1.25331414
            + y * (-0.07832358
                + y * (0.02189568
                    + y * (-0.01062446 + y * (0.00587872 + y * (-0.00251540 + y * 0.00053208))))))
            / x.sqrt()
    }
}

/// eˣ·K1(x) for x > 0. Returns +∞ at x = 0 and NaN for negative or NaN x.
pub fn k1e(x: f64) -> f64 {
    if x.is_nan() || x < 0.0 {
        return f64::NAN;
    }
    if x == 0.0 {
        return f64::INFINITY;
    }
    if x <= 2.0 {
        let y = x * x / 4.0;
        let xk1 = x * (x / 2.0).ln() * i1_small(x)
            + (1.0
                + y * (0.15443144
                    + y * (-0.67278579
                        + y * (-0.18156897
                            + y * (-0.01919402 + y * (-0.00110404 + y * (-0.00004686)))))));
        xk1 / x * x.exp()
    } else {
        let y = 2.0 / x;
        (1.25331414
            + y * (0.23498619
                + y * (-0.03655620
                    + y * (0.01504268 + y * (-0.00780353 + y * (0.00325614 + y * (-0.00068245)))))))
            / x.sqrt()
    }
}

/// K0(x) for x > 0 (underflows to 0 for x ≳ 700; prefer [`k0e`]).
pub fn k0(x: f64) -> f64 {
    k0e(x) * (-x).exp()
}

/// K1(x) for x > 0 (underflows to 0 for x ≳ 700; prefer [`k1e`]).
pub fn k1(x: f64) -> f64 {
    k1e(x) * (-x).exp()
}

/// The ratio K1(x)/K0(x) for x > 0, computed from the scaled functions so it
/// stays finite for large x (where it tends to 1).
pub fn k1_over_k0(x: f64) -> f64 {
    k1e(x) / k0e(x)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Compares a computed value with a reference to a relative tolerance.
    fn check(got: f64, expected: f64, rel_tol: f64, what: &str) {
        let err = ((got - expected) / expected).abs();
        assert!(err <= rel_tol, "{what}: got {got}, expected {expected}, rel. error {err:e}");
    }

    #[test]
    fn tabulated_values() {
        // Reference values of K0 and K1: Abramowitz & Stegun (1964) Table 9.8
        // (values from memory, 8–10 significant digits). Tolerance 3e-7 relative,
        // the stated accuracy of the approximations.
        let table = [
            // x, K0(x), K1(x)
            (0.1, 2.427_069_025, 9.853_844_781),
            (0.5, 0.924_419_071_2, 1.656_441_120),
            (1.0, 0.421_024_438_2, 0.601_907_230_2),
            (2.0, 0.113_893_872_7, 0.139_865_881_8),
            (5.0, 0.003_691_098_334, 0.004_044_613_445),
            (10.0, 1.778_006_232e-5, 1.864_877_345e-5),
        ];
        for (x, k0_ref, k1_ref) in table {
            check(k0(x), k0_ref, 3e-7, &format!("K0({x})"));
            check(k1(x), k1_ref, 3e-7, &format!("K1({x})"));
        }
    }

    #[test]
    fn wronskian_holds() {
        // A&S 9.6.15: I0(x)K1(x) + I1(x)K0(x) = 1/x. Tolerance 5e-7 relative.
        for x in [0.05, 0.3, 1.0, 1.7, 2.5, 3.7] {
            let lhs = i0_small(x) * k1(x) + i1_small(x) * k0(x);
            check(lhs, 1.0 / x, 5e-7, &format!("Wronskian at {x}"));
        }
    }

    #[test]
    fn large_argument_limit_and_no_underflow() {
        // A&S 9.7.2: √x·eˣ·K_ν(x) → √(π/2) as x → ∞ (first correction (4ν²−1)/(8x)).
        let x: f64 = 1.0e4;
        let lim = (std::f64::consts::PI / 2.0).sqrt();
        check(k0e(x) * x.sqrt(), lim * (1.0 - 1.0 / (8.0 * x)), 1e-7, "K0 asymptote");
        check(k1e(x) * x.sqrt(), lim * (1.0 + 3.0 / (8.0 * x)), 1e-7, "K1 asymptote");
        assert!((k1_over_k0(800.0) - 1.0).abs() < 1e-3);
        assert!(k0e(-1.0).is_nan());
    }

    #[test]
    fn inverse_cosine_transform_identity() {
        // ∫0^∞ K0(k r) dk = π/(2r) (A&S 11.4.22 with μ = 1, ν = 0; METHODS §1.1).
        // Trapezoid rule in u = ln k; tolerance 1e-6 relative (approximation error
        // of the polynomials dominates).
        let r = 2.0;
        let (lo, hi, n) = (-30.0f64, 6.0f64, 20_000);
        let h = (hi - lo) / n as f64;
        let sum: f64 = (0..=n)
            .map(|i| {
                let u = lo + h * i as f64;
                let k = u.exp();
                let w = if i == 0 || i == n { 0.5 } else { 1.0 };
                w * k * k0(k * r)
            })
            .sum();
        check(sum * h, std::f64::consts::PI / (2.0 * r), 1e-6, "∫K0");
    }
}
