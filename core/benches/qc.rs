//! Time of one epoch's quality control on a 96-electrode line.
//!
//! Dipole–dipole (dipoles of 1, 2, 3 spacings, n = 1…8) with every reciprocal: 3 984
//! readings. Homogeneous 100 Ω·m half-space (R = ρ/K) with 1 % noise, a 10-epoch
//! history, one dead electrode. Run with `cargo bench -p ohmline-core --bench qc`.

use std::time::Instant;

use ohmline_core::geometry::{Electrode, LineGeometry};
use ohmline_core::qc::health::{ElectrodeHealth, HealthParams};
use ohmline_core::qc::{QcHistory, QcInput, QcParams, Reading, check_epoch};
use ohmline_core::sequence::{Quadrupole, Sequence, geometric_factor_flat};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::StandardNormal;

fn main() {
    let n_el = 96;
    let line = LineGeometry::new(
        (0..n_el).map(|i| Electrode::new(format!("E{i}"), i as f64, 0.0)).collect(),
    )
    .expect("valid line");
    let mut normals = Vec::new();
    for s in 1..=3 {
        for n in 1..=8 {
            for a in 0..n_el {
                let m = a + s + n * s;
                if m + s < n_el {
                    normals.push(Quadrupole::new(a, a + s, m, m + s));
                }
            }
        }
    }
    let recips: Vec<Quadrupole> = normals.iter().map(|q| q.reciprocal()).collect();
    let seq = Sequence::new(normals.into_iter().chain(recips).collect(), n_el).expect("valid");
    let k: Vec<f64> =
        seq.quadrupoles().iter().map(|q| geometric_factor_flat(&line, q).expect("K")).collect();
    let epoch = |seed: u64, dead: Option<usize>| -> Vec<Reading> {
        let mut rng = StdRng::seed_from_u64(seed);
        (0..seq.len())
            .map(|i| {
                let e: f64 = rng.sample(StandardNormal);
                let mut r = 100.0 / k[i] * (1.0 + 0.01 * e);
                if dead.is_some_and(|d| seq.quadrupoles()[i].uses(d)) {
                    r *= rng.random_range(-3.0..3.0);
                }
                Reading {
                    current_ma: Some(100.0),
                    voltage_mv: Some(100.0 * r),
                    ..Reading::new(i, r)
                }
            })
            .collect()
    };
    let params = QcParams::default();
    let mut history = QcHistory::new(seq.len(), n_el, 10).expect("history");
    let health = ElectrodeHealth::new(n_el, HealthParams::default()).expect("health");
    let run = |readings: &[Reading], history: &QcHistory| {
        let input = QcInput {
            sequence: &seq,
            geometric_factors_m: &k,
            readings,
            history,
            in_service: health.in_service(),
        };
        check_epoch(&input, &params).expect("valid input")
    };
    for s in 0..10 {
        let out = run(&epoch(s, None), &history);
        history.record(&out).expect("same sequence");
    }
    let faulty = epoch(100, Some(40));
    let mut times = Vec::new();
    let mut flagged = Vec::new();
    for _ in 0..21 {
        let t = Instant::now();
        let out = run(&faulty, &history);
        times.push(t.elapsed().as_secs_f64() * 1e3);
        flagged = out.flagged_electrodes();
    }
    times.sort_by(f64::total_cmp);
    println!(
        "qc check_epoch, {} readings, {n_el} electrodes: median {:.2} ms (min {:.2}, max {:.2}); flagged {flagged:?}",
        faulty.len(),
        times[times.len() / 2],
        times[0],
        times[times.len() - 1]
    );
}
