//! Forward-model benchmark on two reference lines (numbers invented for the
//! benchmark, not a real site):
//!
//! * levee: 48 electrodes 0.5 m apart along the ground across a trapezoidal
//!   levee (crest 4 m wide, 1:2.5 slopes, 2.5 m high);
//! * crest: 96 electrodes 1 m apart on flat ground along a crest.
//!
//! Each runs ≈ 2,000 quadrupoles (Wenner, dipole–dipole, multiple gradient).
//! Prints a table: mesh size, wavenumbers, time for all potentials, for
//! potentials + Jacobian, and for the bare assembly + factorisation + solves
//! of all wavenumbers, and the process's peak memory (VmHWM). Single thread;
//! times are this thread's CPU time (median), wall time in brackets.
//!
//! Run: `cargo bench -p ohmline-core --bench forward`

use std::time::{Duration, Instant};

use ohmline_core::forward::{Forward, ForwardParams, Resistivity};
use ohmline_core::geometry::{Electrode, LineGeometry, Surface};
use ohmline_core::mesh::{Mesh, MeshParams};
use ohmline_core::sequence::{
    DipoleDipoleParams, GradientParams, Sequence, WennerParams, dipole_dipole, gradient, merge,
    wenner,
};

/// This thread's CPU time so far (from /proc/thread-self/schedstat), so
/// that other processes competing for the cores do not inflate the figures.
fn cpu_time() -> Duration {
    std::fs::read_to_string("/proc/thread-self/schedstat")
        .ok()
        .and_then(|s| s.split_whitespace().next().and_then(|v| v.parse::<u64>().ok()))
        .map_or(Duration::ZERO, Duration::from_nanos)
}

/// Median CPU time and median wall time of `runs` calls.
fn time(runs: usize, mut f: impl FnMut()) -> (Duration, Duration) {
    let (mut cpu, mut wall): (Vec<Duration>, Vec<Duration>) = (0..runs)
        .map(|_| {
            let (c, w) = (cpu_time(), Instant::now());
            f();
            (cpu_time() - c, w.elapsed())
        })
        .unzip();
    cpu.sort();
    wall.sort();
    (cpu[runs / 2], wall[runs / 2])
}

fn ms(d: (Duration, Duration)) -> String {
    format!("{:.0} ms ({:.0} ms wall)", d.0.as_secs_f64() * 1e3, d.1.as_secs_f64() * 1e3)
}

fn peak_memory_mib() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1).and_then(|v| v.parse::<f64>().ok()))
        })
        .map_or(f64::NAN, |kib| kib / 1024.0)
}

/// The invented levee: toe at x = 0, crest 6.25–10.25 m at 2.5 m, toe at 16.5 m.
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
    // 48 electrodes every 0.5 m of ground length, centred on the crest.
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

fn main() {
    println!(
        "| line | electrodes | quadrupoles | nodes | triangles | cells | wavenumbers | factor nnz | setup | all potentials | potentials + Jacobian | bare factorise + solve | total / bare |"
    );
    println!("|---|---|---|---|---|---|---|---|---|---|---|---|---|");
    for (name, (line, surface), seq) in [
        ("levee, 0.5 m", levee_line(), sequence(48, 15, (3, 8), (3, 7))),
        ("crest, 1 m", crest_line(), sequence(96, 12, (1, 6), (1, 6))),
    ] {
        let t0 = Instant::now();
        let mesh = Mesh::new(&line, &surface, &MeshParams::default()).unwrap();
        let fwd = Forward::new(mesh, &ForwardParams::default()).unwrap();
        let setup = t0.elapsed();
        let rho = vec![100.0; fwd.mesh().section().len()];
        let model = Resistivity::Cells(&rho);
        let fwd_t = time(5, || {
            fwd.simulate(model, &seq).unwrap();
        });
        let jac_t = time(3, || {
            fwd.simulate_with_jacobian(model, &seq).unwrap();
        });
        let bare = time(5, || {
            for k in 0..fwd.wavenumbers().len() {
                fwd.wavenumber_fields(model, k).unwrap();
            }
        });
        println!(
            "| {name} | {} | {} | {} | {} | {} | {} | {} | {:.0} ms | {} | {} | {} | {:.2} |",
            line.len(),
            seq.len(),
            fwd.mesh().nodes().len(),
            fwd.mesh().triangles().len(),
            fwd.mesh().section().len(),
            fwd.wavenumbers().len(),
            fwd.factor_nonzeros(),
            setup.as_secs_f64() * 1e3,
            ms(fwd_t),
            ms(jac_t),
            ms(bare),
            fwd_t.0.as_secs_f64() / bare.0.as_secs_f64(),
        );
    }
    println!("\npeak memory (VmHWM): {:.0} MiB", peak_memory_mib());
}
