//! Per-epoch cost of the change-zone and alert code on a line-sized grid.
//!
//! Run with `cargo bench -p ohmline-core --bench zones`. A 96-electrode line at
//! 1 m spacing imaged on 0.5 m cells, 15 m deep (192 × 30 = 5760 cells), with
//! invented noise (σ = 2 %), a line-wide −12 % wetting and a −35 % path.
//! Prints the median wall time of each step over repeated runs.

use std::hint::black_box;
use std::time::{Duration, Instant};

use ohmline_core::alerts::{EpochInput, LineMonitor, RuleSet};
use ohmline_core::geometry::Surface;
use ohmline_core::section::SectionGrid;
use ohmline_core::zones::{
    ChangeField, DetectionParams, Direction, NoiseModel, SensitivityMask, detect_zones,
    lateral_contrast,
};
use rand::{Rng, SeedableRng, rngs::StdRng};
use rand_distr::StandardNormal;

const NX: usize = 192;
const NZ: usize = 30;

fn grid() -> SectionGrid {
    let mut polys = Vec::with_capacity(NX * NZ);
    for j in 0..NZ {
        for i in 0..NX {
            let (x, z) = (i as f64 * 0.5, -(j as f64) * 0.5);
            polys.push(vec![[x, z], [x, z - 0.5], [x + 0.5, z - 0.5], [x + 0.5, z]]);
        }
    }
    SectionGrid::new(polys, Surface::new(vec![[0.0, 0.0], [96.0, 0.0]]).unwrap()).unwrap()
}

fn epoch(rng: &mut StdRng) -> Vec<f64> {
    let mut c = Vec::with_capacity(NX * NZ);
    for j in 0..NZ {
        for i in 0..NX {
            let path = (90..96).contains(&i) && (2..14).contains(&j);
            let base = if path { -35.0 } else { -12.0 };
            c.push(base + 2.0 * rng.sample::<f64, _>(StandardNormal));
        }
    }
    c
}

fn median(mut v: Vec<Duration>) -> Duration {
    v.sort();
    v[v.len() / 2]
}

fn time<F: FnMut()>(name: &str, runs: usize, mut f: F) {
    let mut t = Vec::with_capacity(runs);
    for _ in 0..runs {
        let s = Instant::now();
        f();
        t.push(s.elapsed());
    }
    println!("{name:<44} median {:>10.3?} over {runs} runs", median(t));
}

fn main() {
    let g = grid();
    let n = g.len();
    let mut rng = StdRng::seed_from_u64(1);
    let rules = RuleSet::default();
    let lateral = rules.lateral.unwrap().params(1.0);
    let mask = SensitivityMask::from_flags(vec![true; n]);
    let noise = NoiseModel::from_sigma(vec![Some(2.0); n]).unwrap();
    let frames: Vec<Vec<f64>> = (0..64).map(|_| epoch(&mut rng)).collect();

    let field = ChangeField::new(&g, frames[0].clone(), mask.clone()).unwrap();
    time("lateral contrast (5760 cells)", 50, || {
        black_box(lateral_contrast(&field, &lateral).unwrap());
    });
    let lat = lateral_contrast(&field, &lateral).unwrap();
    let drop = DetectionParams { direction: Direction::Drop, threshold_pct: -5.0 };
    time("zone detection at -5 % (relative)", 50, || {
        black_box(detect_zones(&field, Some(&lat), &drop).unwrap());
    });

    let mut monitor = LineMonitor::new(rules.clone(), 1.0).unwrap();
    let mut k = 0usize;
    time("monitor: one full epoch (default rules)", 64, || {
        let field = ChangeField::new(&g, frames[k].clone(), mask.clone()).unwrap();
        let input = EpochInput {
            time: k as i64 * 86_400,
            field: &field,
            noise: Some(&noise),
            envelope: None,
            quality: &[],
            river_stage_m: None,
        };
        black_box(monitor.process(&input).unwrap());
        k += 1;
    });
    println!("  alerts active after 64 epochs: {}", monitor.alerts().len());

    let all = vec![true; n];
    time("false-alarm bound (1 m² = 4 cells, exact count)", 5, || {
        black_box(rules.false_alarm_bound(&g, &all, 100_000_000).unwrap());
    });
    let b = rules.false_alarm_bound(&g, &all, 100_000_000).unwrap().unwrap();
    println!(
        "  k = 3: N_4 = {:?}, per epoch {:.3e}, per raise (3 epochs) {:.3e}",
        b.connected_sets, b.per_epoch, b.per_raise
    );
}
