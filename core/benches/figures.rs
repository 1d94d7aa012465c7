//! Rendering times of the figures (run with `cargo bench -p ohmline-core --bench figures`).
//!
//! The section is an invented demo levee: 100 columns × 20 layers = 2,000
//! cells under a 50 m line (crest 30 m wide at 5 m, 1:2 slopes), with 51
//! electrodes, a sensitivity mask and two zones. Prints the median and the
//! fastest of the timed runs for SVG and PNG at 1200 × 500 px. With
//! `OHMLINE_FIGURE_DIR` set, the figures are also written there as PNG files
//! (for looking at them and for the README).

use std::hint::black_box;
use std::time::{Duration, Instant};

use ohmline_core::figures::{
    Axis, Canvas, ElectrodeHealth, Figure, HealthStrip, HealthStripParams, PseudoValues,
    PseudosectionFigure, PseudosectionParams, SectionFigure, SectionParams, SectionValues,
    Threshold, TimeChart, TimeChartParams, TimeSeries, Zone,
};
use ohmline_core::geometry::{Electrode, LineGeometry, Surface};
use ohmline_core::section::SectionGrid;
use ohmline_core::sequence::{Quadrupole, Sequence};

fn levee_z(x: f64) -> f64 {
    // Toe at 0 m and 50 m, crest from 10 m to 40 m at 5 m.
    (x / 2.0).min((50.0 - x) / 2.0).clamp(0.0, 5.0)
}

fn levee() -> (SectionGrid, LineGeometry) {
    let (nx, nz, bottom) = (100, 20, -10.0);
    let xs: Vec<f64> = (0..=nx).map(|i| i as f64 * 0.5).collect();
    let depth = |x: f64, j: usize| {
        let top = levee_z(x);
        top + (bottom - top) * j as f64 / nz as f64
    };
    let mut polys = Vec::with_capacity(nx * nz);
    for j in 0..nz {
        for i in 0..nx {
            let (x0, x1) = (xs[i], xs[i + 1]);
            polys.push(vec![
                [x0, depth(x0, j)],
                [x0, depth(x0, j + 1)],
                [x1, depth(x1, j + 1)],
                [x1, depth(x1, j)],
            ]);
        }
    }
    let surface = Surface::new(vec![[0.0, 0.0], [10.0, 5.0], [40.0, 5.0], [50.0, 0.0]]).unwrap();
    let line = LineGeometry::new(
        (0..=50)
            .map(|i| Electrode::new(format!("{}", i + 1), i as f64, levee_z(i as f64)))
            .collect(),
    )
    .unwrap();
    (SectionGrid::new(polys, surface).unwrap(), line)
}

fn time(label: &str, runs: usize, mut f: impl FnMut() -> usize) {
    let mut times: Vec<Duration> = Vec::with_capacity(runs);
    let mut bytes = 0;
    for _ in 0..runs {
        let t = Instant::now();
        bytes = black_box(f());
        times.push(t.elapsed());
    }
    times.sort();
    println!(
        "{label:<44} median {:>8.2} ms   fastest {:>8.2} ms   ({bytes} bytes)",
        times[runs / 2].as_secs_f64() * 1e3,
        times[0].as_secs_f64() * 1e3
    );
}

fn main() {
    let (grid, line) = levee();
    let n = grid.len();
    let rho: Vec<f64> = grid
        .cells()
        .iter()
        .map(|c| {
            let [x, z] = c.centroid();
            let body = if z > 0.0 { 90.0 } else { 25.0 };
            let seep = 1.0 - 0.6 * (-((x - 32.0).powi(2) + (z - 1.0).powi(2)) / 4.0).exp();
            body * seep
        })
        .collect();
    let change: Vec<f64> = grid
        .cells()
        .iter()
        .map(|c| {
            let [x, z] = c.centroid();
            -45.0 * (-((x - 32.0).powi(2) / 6.0 + (z - 1.0).powi(2) / 3.0)).exp()
                + 2.0 * (x / 7.0).sin()
        })
        .collect();
    let mask: Vec<bool> = grid.cells().iter().map(|c| c.depth() < 7.0).collect();
    let zone_cells: Vec<usize> = (0..n).filter(|&i| change[i] < -20.0).collect();
    let canvas = Canvas::with_default_font(1200, 500).unwrap();
    let make = |values| {
        SectionFigure::new(
            &grid,
            SectionParams {
                title: "Demo levee, line L1".into(),
                subtitle: Some("2024-03-14 06:00 UTC".into()),
                values,
                line: Some(&line),
                well_resolved: Some(&mask),
                fade: 0.6,
                zones: vec![Zone { label: "Z1".into(), cells: zone_cells.clone() }],
                vertical_exaggeration: 1.0,
            },
        )
        .unwrap()
    };
    println!("section: {n} cells, canvas {} × {} px", canvas.width(), canvas.height());
    let res = make(SectionValues::Resistivity { rho: &rho, limits: None });
    let chg = make(SectionValues::ChangePercent { change: &change, limit: None });
    let dump = std::env::var_os("OHMLINE_FIGURE_DIR").map(std::path::PathBuf::from);
    if let Some(dir) = &dump {
        std::fs::write(dir.join("section-resistivity.png"), res.png(&canvas).unwrap()).unwrap();
        std::fs::write(dir.join("section-change.png"), chg.png(&canvas).unwrap()).unwrap();
    }
    time("section resistivity SVG", 30, || res.svg(&canvas).unwrap().len());
    time("section resistivity PNG", 30, || res.png(&canvas).unwrap().len());
    time("section change SVG", 30, || chg.svg(&canvas).unwrap().len());
    time("section change PNG", 30, || chg.png(&canvas).unwrap().len());
    time("section: build (checks, colours, outlines)", 30, || {
        make(SectionValues::Resistivity { rho: &rho, limits: None }).cell_colours().len()
    });

    // A season of 6-hourly epochs (730) on a 900 × 300 chart.
    let t0 = 1_709_251_200;
    let pts: Vec<(i64, Option<f64>)> =
        (0..730).map(|k| (t0 + k * 6 * 3600, Some(-10.0 * (k as f64 / 90.0).sin()))).collect();
    let chart = TimeChart::new(TimeChartParams {
        title: "Zone history".into(),
        subtitle: None,
        series: vec![TimeSeries::new("min change", &pts, Axis::Left).unwrap()],
        thresholds: vec![Threshold { value: -10.0, label: "level 1".into(), axis: Axis::Left }],
        left_title: "Change (%)".into(),
        right_title: None,
        max_gap_s: None,
        time_range: None,
        left_range: None,
        right_range: None,
    })
    .unwrap();
    let c2 = Canvas::with_default_font(900, 300).unwrap();
    if let Some(dir) = &dump {
        std::fs::write(dir.join("time-chart.png"), chart.png(&c2).unwrap()).unwrap();
    }
    time("time chart, 730 epochs, 900 × 300, SVG", 30, || chart.svg(&c2).unwrap().len());
    time("time chart, 730 epochs, 900 × 300, PNG", 30, || chart.png(&c2).unwrap().len());

    // Wenner pseudosection on the 51 electrodes (408 readings).
    let mut qs = Vec::new();
    for a in 1..=16 {
        for i in 0..51 - 3 * a {
            qs.push(Quadrupole::new(i, i + 3 * a, i + a, i + 2 * a));
        }
    }
    let seq = Sequence::new(qs, 51).unwrap();
    let rho_a: Vec<Option<f64>> = seq
        .quadrupoles()
        .iter()
        .map(|q| {
            Some(30.0 + 60.0 / (1.0 + ((q.a + q.b.unwrap()) as f64 / 2.0 - 32.0).powi(2) / 20.0))
        })
        .collect();
    let pseudo = PseudosectionFigure::new(
        &line,
        &seq,
        PseudosectionParams {
            title: "Apparent resistivity".into(),
            subtitle: None,
            values: PseudoValues::ApparentResistivity { rho_a: &rho_a, limits: None },
            vertical_exaggeration: 1.0,
        },
    )
    .unwrap();
    let c3 = Canvas::with_default_font(1000, 400).unwrap();
    time("pseudosection, 408 readings, 1000 × 400, PNG", 30, || pseudo.png(&c3).unwrap().len());
    // Health of 51 electrodes over 120 epochs.
    let epochs: Vec<i64> = (0..120).map(|k| t0 + k * 6 * 3600).collect();
    let states: Vec<ElectrodeHealth> = (0..51 * 120)
        .map(|i| match (i / 120, i % 120) {
            (17, k) if k > 80 => ElectrodeHealth::OutOfService,
            (_, 40) => ElectrodeHealth::NoData,
            (e, k) => ElectrodeHealth::Share(if e == 17 && k > 60 {
                0.8
            } else {
                ((e * 13 + k * 7) % 17) as f64 / 170.0
            }),
        })
        .collect();
    let health = HealthStrip::new(HealthStripParams {
        title: "Electrode health".into(),
        subtitle: None,
        electrodes: (1..=51).map(|i| format!("{i}")).collect(),
        epochs,
        states,
    })
    .unwrap();
    time("health strip, 51 × 120, 1000 × 400, PNG", 30, || health.png(&c3).unwrap().len());
    if let Some(dir) = &dump {
        std::fs::write(dir.join("pseudosection.png"), pseudo.png(&c3).unwrap()).unwrap();
        std::fs::write(dir.join("health.png"), health.png(&c3).unwrap()).unwrap();
    }
}
