//! Inversion benchmark on the two reference lines of `benches/forward.rs`
//! (invented geometry and models, not a real site):
//!
//! * levee: 48 electrodes 0.5 m apart along the ground across a trapezoidal
//!   levee (crest 4 m wide, 1:2.5 slopes, 2.5 m high);
//! * crest: 96 electrodes 1 m apart on flat ground along a crest.
//!
//! Each runs ≈ 2,000 quadrupoles (Wenner, dipole–dipole, multiple gradient)
//! with 2 % noise on a model with a conductive layer, and a monitoring epoch
//! where a zone has become 30 % less resistive. Prints, per line: one forward
//! run, one forward + Jacobian, the cold baseline inversion (Occam λ, from the
//! median apparent resistivity), a warm-started single inversion, and the
//! warm-started ratio and difference inversions with the Jacobian updated or
//! kept from the baseline; each with iterations and time per iteration over
//! the time of one forward + Jacobian (METHODS §8 cost model). Then the dense
//! step solvers compared on one Gauss–Newton iteration. Single thread;
//! times are this thread's CPU time, wall time in brackets.
//!
//! Run: `cargo bench -p ohmline-core --bench inversion`

use std::time::{Duration, Instant};

use ohmline_core::errormodel::ErrorModel;
use ohmline_core::forward::{Forward, ForwardParams, Resistivity};
use ohmline_core::geometry::{Electrode, LineGeometry, Surface};
use ohmline_core::inversion::{
    EpochData, InversionParams, InversionReport, StartModel, StepSolver, invert,
};
use ohmline_core::mesh::{Mesh, MeshParams};
use ohmline_core::model::{Body, Layer, ModelDescription};
use ohmline_core::noise::{NoiseParams, add_noise};
use ohmline_core::sequence::{
    DipoleDipoleParams, GradientParams, Sequence, WennerParams, dipole_dipole, gradient, merge,
    wenner,
};
use ohmline_core::timelapse::{
    Baseline, Linearisation, TimeLapseMode, TimeLapseParams, invert_change,
};

/// This thread's CPU time so far (from /proc/thread-self/schedstat).
fn cpu_time() -> Duration {
    std::fs::read_to_string("/proc/thread-self/schedstat")
        .ok()
        .and_then(|s| s.split_whitespace().next().and_then(|v| v.parse::<u64>().ok()))
        .map_or(Duration::ZERO, Duration::from_nanos)
}

/// Runs `f` once; its result, CPU seconds and wall seconds.
fn timed<T>(f: impl FnOnce() -> T) -> (T, f64, f64) {
    let (c, w) = (cpu_time(), Instant::now());
    let out = f();
    (out, (cpu_time() - c).as_secs_f64(), w.elapsed().as_secs_f64())
}

fn levee_z(x: f64) -> f64 {
    if !(0.0..=16.5).contains(&x) {
        0.0
    } else if x < 6.25 {
        x / 2.5
    } else if x <= 10.25 {
        2.5
    } else {
        (16.5 - x) / 2.5
    }
}

fn levee_line() -> (LineGeometry, Surface) {
    let total = 47.0 * 0.5;
    let (mut x, step) = (8.25, 1e-4);
    let mut walked = 0.0;
    while walked < total / 2.0 {
        let nx: f64 = x - step;
        walked += (x - nx).hypot(levee_z(x) - levee_z(nx));
        x = nx;
    }
    let mut xs = vec![x];
    let mut s = 0.0;
    while xs.len() < 48 {
        let nx = x + step;
        s += (nx - x).hypot(levee_z(nx) - levee_z(x));
        x = nx;
        if s >= 0.5 {
            xs.push(x);
            s -= 0.5;
        }
    }
    let line = LineGeometry::new(
        xs.iter()
            .enumerate()
            .map(|(i, &x)| Electrode::new(format!("{}", i + 1), x, levee_z(x)))
            .collect(),
    )
    .unwrap();
    let surface =
        Surface::through_line(&line, &[[0.0, 0.0], [6.25, 2.5], [10.25, 2.5], [16.5, 0.0]])
            .unwrap();
    (line, surface)
}

fn crest_line() -> (LineGeometry, Surface) {
    let line = LineGeometry::new(
        (0..96).map(|i| Electrode::new(format!("{}", i + 1), i as f64, 5.0)).collect(),
    )
    .unwrap();
    let surface = Surface::through_line(&line, &[]).unwrap();
    (line, surface)
}

fn sequence(n: usize, w: usize, dd: (usize, usize), g: (usize, usize)) -> Sequence {
    let quads = merge(&[
        wenner(n, &WennerParams { max_a: w }),
        dipole_dipole(n, &DipoleDipoleParams { max_a: dd.0, max_n: dd.1 }),
        gradient(n, &GradientParams { max_a: g.0, s: g.1 }),
    ]);
    Sequence::new(quads, n).unwrap()
}

/// Invented models: 80 Ω·m over a 25 Ω·m layer from 4 m below `ground`
/// (elevation, m), and (monitoring) a zone (x0, x1, z0, z1 in m) at 56 Ω·m,
/// 30 % less resistive.
fn model(ground: f64, zone: Option<[f64; 4]>) -> ModelDescription {
    let bodies = zone
        .map(|[x0, x1, z0, z1]| {
            vec![Body { polygon: vec![[x0, z0], [x1, z0], [x1, z1], [x0, z1]], rho: 56.0 }]
        })
        .unwrap_or_default();
    ModelDescription::new(80.0, vec![Layer { top: ground - 4.0, rho: 25.0 }], bodies).unwrap()
}

fn epoch(fwd: &Forward, seq: &Sequence, m: &ModelDescription, seed: u64) -> EpochData {
    let rho = m.on_triangles(fwd.mesh());
    let r = fwd.simulate(Resistivity::Triangles(&rho), seq).unwrap().resistances().to_vec();
    let r = add_noise(&r, &NoiseParams { relative: 0.02, absolute: 0.0, seed }).unwrap();
    EpochData::new(seq, r.into_iter().map(Some).collect()).unwrap()
}

fn row(name: &str, r: &InversionReport, cpu: f64, wall: f64, unit: f64) {
    let it = r.iterations().max(1) as f64;
    println!(
        "| {name} | {} | {:.2} | {} | {:.1} s ({:.1} s wall) | {:.2} s | {:.2} |",
        r.iterations(),
        r.chi2(),
        r.converged(),
        cpu,
        wall,
        cpu / it,
        cpu / it / unit
    );
}

fn main() {
    let errors = ErrorModel::new(0.0, 0.02).unwrap();
    let params = InversionParams::default();
    for (name, (line, surface), seq, ground, zone) in [
        (
            "levee, 48 × 0.5 m",
            levee_line(),
            sequence(48, 15, (3, 8), (3, 7)),
            0.0,
            [6.5, 9.5, 0.5, 2.0],
        ),
        (
            "crest, 96 × 1 m",
            crest_line(),
            sequence(96, 12, (1, 6), (1, 6)),
            5.0,
            [45.0, 49.0, 2.0, 4.0],
        ),
    ] {
        let mesh = Mesh::new(&line, &surface, &MeshParams::default()).unwrap();
        let fwd = Forward::new(mesh, &ForwardParams::default()).unwrap();
        let p = fwd.mesh().section().len();
        let rho = vec![80.0; p];
        let (_, f_cpu, _) = timed(|| fwd.simulate(Resistivity::Cells(&rho), &seq).unwrap());
        let (_, j_cpu, _) =
            timed(|| fwd.simulate_with_jacobian(Resistivity::Cells(&rho), &seq).unwrap());
        println!(
            "\n### {name}: {} quadrupoles, {} cells, {} nodes; forward {:.2} s, forward + Jacobian {:.2} s\n",
            seq.len(),
            p,
            fwd.mesh().nodes().len(),
            f_cpu,
            j_cpu
        );
        println!(
            "| run | iterations | χ²/N | converged | time | per iteration | per iteration ÷ (forward + Jacobian) |"
        );
        println!("|---|---|---|---|---|---|---|");
        let quiet = model(ground, None);
        let changed = model(ground, Some(zone));
        let base_epoch = epoch(&fwd, &seq, &quiet, 1);
        let (baseline, cpu, wall) = timed(|| {
            Baseline::new(&fwd, &seq, std::slice::from_ref(&base_epoch), &errors, &params).unwrap()
        });
        row("cold baseline (Occam λ, with time-lapse set-up)", baseline.report(), cpu, wall, j_cpu);
        let (_, cpu, wall) = timed(|| {
            for mode in [TimeLapseMode::Ratio, TimeLapseMode::Difference] {
                baseline.prepare(&fwd, mode, &params).unwrap();
            }
        });
        println!(
            "| J H⁻¹ Jᵀ of the baseline's two Jacobians (once per baseline) | – | – | – | {cpu:.1} s ({wall:.1} s wall) | – | {:.2} |",
            cpu / j_cpu
        );
        let previous = epoch(&fwd, &seq, &quiet, 2);
        let current = epoch(&fwd, &seq, &changed, 3);
        let (single, cpu, wall) = timed(|| {
            invert(
                &fwd,
                &seq,
                &current,
                &errors,
                StartModel::Model(baseline.report().model()),
                &params,
            )
            .unwrap()
        });
        row("single epoch, warm start (Occam λ)", &single, cpu, wall, j_cpu);
        for mode in [TimeLapseMode::Ratio, TimeLapseMode::Difference] {
            for linearisation in [Linearisation::Update, Linearisation::Baseline] {
                let tl = TimeLapseParams { mode, linearisation, inversion: params.clone() };
                let prev = invert_change(
                    &fwd,
                    &seq,
                    &baseline,
                    &previous,
                    &errors,
                    StartModel::MedianApparent,
                    &tl,
                )
                .unwrap();
                let (r, cpu, wall) = timed(|| {
                    invert_change(
                        &fwd,
                        &seq,
                        &baseline,
                        &current,
                        &errors,
                        StartModel::Model(prev.inversion().model()),
                        &tl,
                    )
                    .unwrap()
                });
                let strongest = r
                    .percent_change()
                    .iter()
                    .zip(r.mask())
                    .filter(|(_, m)| **m)
                    .fold(0.0f64, |a, (v, _)| a.min(*v));
                row(
                    &format!(
                        "{mode:?}, Jacobian {linearisation:?}, warm (strongest change {strongest:.0} %)"
                    ),
                    r.inversion(),
                    cpu,
                    wall,
                    j_cpu,
                );
            }
        }
        for solver in [StepSolver::DataSpace, StepSolver::ModelSpace] {
            let one = InversionParams { max_iterations: 1, solver, ..params.clone() };
            let (r, cpu, wall) = timed(|| {
                invert(&fwd, &seq, &current, &errors, StartModel::MedianApparent, &one).unwrap()
            });
            row(&format!("one iteration, {solver:?} step"), &r, cpu, wall, j_cpu);
        }
    }
}
