//! Synthetic measurement noise for simulated data (demos and tests).
//!
//! Each transfer resistance R (Ω) becomes R·(1 + ε_rel·g₁) + ε_abs·g₂ with
//! g₁, g₂ independent standard normal deviates from a generator seeded by
//! `seed`, so the same seed gives the same noisy data.

use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Distribution, StandardNormal};
use thiserror::Error;

/// Noise levels and seed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NoiseParams {
    /// Relative standard deviation (0.02 = 2 %).
    pub relative: f64,
    /// Absolute standard deviation, Ω.
    pub absolute: f64,
    /// Seed of the random generator.
    pub seed: u64,
}

/// Why noise cannot be added.
#[derive(Debug, Error, PartialEq)]
pub enum NoiseError {
    /// A level is negative or not finite.
    #[error("noise level {name} = {value} must be finite and ≥ 0")]
    BadLevel {
        /// `relative` or `absolute`.
        name: &'static str,
        /// The value.
        value: f64,
    },
}

/// The resistances (Ω) with seeded Gaussian noise added.
pub fn add_noise(resistances: &[f64], params: &NoiseParams) -> Result<Vec<f64>, NoiseError> {
    for (name, value) in [("relative", params.relative), ("absolute", params.absolute)] {
        if !(value.is_finite() && value >= 0.0) {
            return Err(NoiseError::BadLevel { name, value });
        }
    }
    let mut rng = StdRng::seed_from_u64(params.seed);
    Ok(resistances
        .iter()
        .map(|&r| {
            let g1: f64 = StandardNormal.sample(&mut rng);
            let g2: f64 = StandardNormal.sample(&mut rng);
            r * (1.0 + params.relative * g1) + params.absolute * g2
        })
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Adds noise to n copies of 1 Ω and compares the sample statistics.
    fn check(params: NoiseParams, n: usize, mean: f64, sd: f64) {
        let out = add_noise(&vec![1.0; n], &params).unwrap();
        let m = out.iter().sum::<f64>() / n as f64;
        let s = (out.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
        // Standard errors: of the mean sd/√n, of the sd ≈ sd/√(2n); allow 4 of each.
        let n = n as f64;
        assert!((m - mean).abs() <= 4.0 * sd / n.sqrt(), "mean {m}");
        assert!((s - sd).abs() <= 4.0 * sd / (2.0 * n).sqrt(), "sd {s}");
    }

    #[test]
    fn statistics_and_reproducibility() {
        // Normal deviates: mean 0, variance σ² (definition); the two levels add
        // in quadrature for R = 1 Ω.
        check(NoiseParams { relative: 0.02, absolute: 0.0, seed: 7 }, 20_000, 1.0, 0.02);
        check(NoiseParams { relative: 0.03, absolute: 0.04, seed: 8 }, 20_000, 1.0, 0.05);
        let p = NoiseParams { relative: 0.05, absolute: 0.0, seed: 42 };
        assert_eq!(add_noise(&[1.0, 2.0], &p), add_noise(&[1.0, 2.0], &p));
        assert_ne!(
            add_noise(&[1.0, 2.0], &p),
            add_noise(&[1.0, 2.0], &NoiseParams { seed: 43, ..p })
        );
        assert_eq!(
            add_noise(&[1.0], &NoiseParams { relative: -0.1, ..p }),
            Err(NoiseError::BadLevel { name: "relative", value: -0.1 })
        );
    }
}
