//! The demo's invented world: its two lines with their sequences, and the
//! simulated meter that feeds them through the public ingest API.
//!
//! Everything here is invented (the levee, the river, the town, the readings);
//! the scenario itself is [`ohmline_core::scenario`].

pub mod meter;

use ohmline_core::scenario::DemoLine;
use ohmline_core::sequence::{
    DipoleDipoleParams, GradientParams, Sequence, WennerParams, dipole_dipole, gradient, merge,
    wenner, with_reciprocals,
};

/// Slug of the crest line.
pub const CREST_LINE: &str = "pellingford-crest";
/// Slug of the cross line.
pub const CROSS_LINE: &str = "pellingford-cross";

/// The measurement sequence of a demo line: Wenner (a = 1…7), dipole–dipole
/// (a = 1, n = 1…4) and multiple gradient (a = 1…2, s = 4) quadrupoles, each
/// followed by its reciprocal.
pub fn sequence(line: DemoLine) -> Sequence {
    let n = match line {
        DemoLine::Crest => 64,
        DemoLine::Cross => 48,
    };
    let forward = merge(&[
        wenner(n, &WennerParams { max_a: 7 }),
        dipole_dipole(n, &DipoleDipoleParams { max_a: 1, max_n: 4 }),
        gradient(n, &GradientParams { max_a: 2, s: 4 }),
    ]);
    Sequence::new(with_reciprocals(&forward), n).expect("generated sequences are valid")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sequences_have_the_generator_counts_and_reciprocals() {
        // Counts from the generators' formulas (core::sequence): Wenner
        // Σ_{a=1}^{7} (N − 3a), dipole–dipole Σ_{n=1}^{4} (N − n − 2), gradient
        // Σ_{a=1}^{2} s·(N − (s + 2)·a) with s = 4; the lists share no
        // quadrupole (different electrode spacing patterns), so merge keeps them all.
        for (line, n) in [(DemoLine::Crest, 64usize), (DemoLine::Cross, 48)] {
            let wenner = 7 * n - 3 * 28;
            let dd = 4 * n - 18;
            let grad = 4 * (n - 6) + 4 * (n - 12);
            let s = sequence(line);
            assert_eq!(s.len(), 2 * (wenner + dd + grad), "{line:?}");
            assert_eq!(s.reciprocal_pairs().count(), wenner + dd + grad);
        }
    }
}
