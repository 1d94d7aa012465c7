//! `ohmline invert`: one-off inversion of a data file (and optionally a
//! time-lapse inversion against a baseline file) for a consultant, without a
//! database. Writes `model.json`, `summary.json` and `section.png`.
//!
//! Data files are read by the ingest parser (the same CSV a meter uploads:
//! `a,b,m,n` labels plus `resistance_ohm`, or `current_ma` and `voltage_mv`);
//! the sequence is the files' own quadrupole list.

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::Context;
use clap::{Args, ValueEnum};
use ohmline_core::errormodel::ErrorModel;
use ohmline_core::figures::{Canvas, Figure, SectionFigure, SectionParams, SectionValues};
use ohmline_core::forward::{Forward, ForwardParams};
use ohmline_core::geometry::{LineGeometry, Surface};
use ohmline_core::inversion::{EpochData, InversionParams, InversionReport, StartModel, invert};
use ohmline_core::mesh::{Mesh, MeshParams};
use ohmline_core::section::SectionGrid;
use ohmline_core::sequence::{Quadrupole, Sequence};
use ohmline_core::timelapse::{
    Baseline, Linearisation, TimeLapseMode, TimeLapseParams, invert_change,
};
use serde_json::{Value, json};

use crate::files;
use crate::ingest::{parse::parse_csv, readings_on_line};

/// Time-lapse formulation of `ohmline invert --baseline`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ChangeMode {
    /// Ratio inversion: the data ratio to the baseline times a homogeneous response.
    Ratio,
    /// Difference inversion against the baseline model.
    Difference,
}

/// Options of `ohmline invert`.
#[derive(Debug, Args)]
pub struct InvertArgs {
    /// Electrodes CSV (label,x,z).
    #[arg(long, value_name = "FILE")]
    pub electrodes: PathBuf,
    /// Readings CSV as a meter uploads it: a,b,m,n and resistance_ohm, or
    /// current_ma and voltage_mv.
    #[arg(long, value_name = "FILE")]
    pub data: PathBuf,
    /// Ground surface CSV (x,z); without it the surface runs through the electrodes.
    #[arg(long, value_name = "FILE")]
    pub surface: Option<PathBuf>,
    /// Baseline readings CSV: invert the change of --data against it.
    #[arg(long, value_name = "FILE")]
    pub baseline: Option<PathBuf>,
    /// Time-lapse formulation (with --baseline).
    #[arg(long, value_enum, default_value_t = ChangeMode::Ratio)]
    pub mode: ChangeMode,
    /// Relative error of a reading, percent (the b of δR = a + b·|R|).
    #[arg(long, value_name = "PCT", default_value_t = 2.0)]
    pub error_relative: f64,
    /// Absolute error of a reading, Ω (the a of δR = a + b·|R|).
    #[arg(long, value_name = "OHM", default_value_t = 0.001)]
    pub error_absolute: f64,
    /// Folder for model.json, summary.json and section.png (created if missing).
    #[arg(long, value_name = "DIR", default_value = ".")]
    pub out_dir: PathBuf,
}

fn read(p: &Path) -> anyhow::Result<String> {
    std::fs::read_to_string(p).with_context(|| format!("reading {}", p.display()))
}

/// Reads the electrodes and the ground surface of a line.
pub(super) fn read_line(
    electrodes: &Path,
    surface: Option<&Path>,
) -> anyhow::Result<(LineGeometry, Surface)> {
    let (_, line) = files::read_electrodes(&electrodes.display().to_string(), &read(electrodes)?)?;
    let surface = match surface {
        Some(p) => Surface::new(files::read_surface(&p.display().to_string(), &read(p)?)?)
            .with_context(|| format!("surface {}", p.display()))?,
        None => Surface::through_line(&line, &[])?,
    };
    Ok((line, surface))
}

/// Reads a readings CSV through the ingest parser: its quadrupoles with R (Ω).
/// Errors name the file, the row and the field.
fn read_readings(path: &Path, line: &LineGeometry) -> anyhow::Result<Vec<(Quadrupole, f64)>> {
    let body = std::fs::read(path).with_context(|| format!("reading {}", path.display()))?;
    let name = path.display();
    let parsed = parse_csv(&body, usize::MAX).map_err(|e| anyhow::anyhow!("{name}: {e}"))?;
    readings_on_line(&parsed, line).map_err(|e| anyhow::anyhow!("{name}: {e}"))
}

/// The union of the files' quadrupoles (first file's order, then new ones)
/// and each file's readings on it.
fn on_common_sequence(
    files: &[&[(Quadrupole, f64)]],
    n_electrodes: usize,
) -> anyhow::Result<(Sequence, Vec<EpochData>)> {
    let mut quads: Vec<Quadrupole> = Vec::new();
    let mut index = std::collections::HashMap::new();
    for f in files {
        for (q, _) in f.iter() {
            index.entry(*q).or_insert_with(|| {
                quads.push(*q);
                quads.len() - 1
            });
        }
    }
    let seq = Sequence::new(quads, n_electrodes)?;
    let data = files
        .iter()
        .map(|f| {
            let mut r = vec![None; seq.len()];
            for (q, v) in f.iter() {
                r[index[q]] = Some(*v);
            }
            EpochData::new(&seq, r)
        })
        .collect::<Result<Vec<_>, _>>()?;
    Ok((seq, data))
}

/// The summary of one inversion as JSON.
fn report_json(r: &InversionReport, present: usize) -> Value {
    json!({
        "chi2_per_datum": r.chi2(),
        "chi2_history": r.chi2_history(),
        "rms_pct": r.rms_pct(),
        "iterations": r.iterations(),
        "lambda": r.lambda(),
        "converged": r.converged(),
        "warnings": r.warnings(),
        "readings_present": present,
        "readings_used": r.used().len(),
        "readings_dropped": present - r.used().len(),
        "cells": r.model().len(),
        "cells_in_mask": r.mask().iter().filter(|&&m| m).count(),
    })
}

/// Cells of a section as JSON objects with their polygon, depth, coverage and
/// mask flag; `extra` adds named per-cell values.
fn cells_json(
    grid: &SectionGrid,
    coverage: &[f64],
    mask: &[bool],
    extra: &[(&str, &[f64])],
) -> Value {
    let cells: Vec<Value> = grid
        .cells()
        .iter()
        .enumerate()
        .map(|(j, c)| {
            let mut o = json!({
                "polygon": c.polygon(),
                "centroid": c.centroid(),
                "depth_m": c.depth(),
                "coverage": coverage[j],
                "in_mask": mask[j],
            });
            for (name, v) in extra {
                o[*name] = json!(v[j]);
            }
            o
        })
        .collect();
    Value::Array(cells)
}

fn electrodes_json(line: &LineGeometry) -> Value {
    Value::Array(
        line.electrodes()
            .iter()
            .map(|e| json!({"label": e.label(), "x": e.x(), "z": e.z()}))
            .collect(),
    )
}

/// Renders a section figure as PNG.
pub(super) fn section_png(
    grid: &SectionGrid,
    line: &LineGeometry,
    title: String,
    subtitle: String,
    values: SectionValues<'_>,
    mask: Option<&[bool]>,
) -> anyhow::Result<Vec<u8>> {
    let fig = SectionFigure::new(
        grid,
        SectionParams {
            title,
            subtitle: Some(subtitle),
            values,
            line: Some(line),
            well_resolved: mask,
            fade: 0.6,
            zones: Vec::new(),
            vertical_exaggeration: 1.0,
        },
    )?;
    Ok(fig.png(&Canvas::with_default_font(1400, 700)?)?)
}

pub(super) fn write(dir: &Path, name: &str, bytes: &[u8]) -> anyhow::Result<()> {
    let p = dir.join(name);
    std::fs::write(&p, bytes).with_context(|| format!("writing {}", p.display()))
}

/// Runs the inversion and writes the three output files.
pub fn run(args: InvertArgs) -> anyhow::Result<()> {
    let started = Instant::now();
    let (line, surface) = read_line(&args.electrodes, args.surface.as_deref())?;
    for (name, v) in
        [("--error-relative", args.error_relative), ("--error-absolute", args.error_absolute)]
    {
        if !(v.is_finite() && v >= 0.0) {
            anyhow::bail!("{name} must be a finite number ≥ 0, got {v}");
        }
    }
    if args.error_relative == 0.0 && args.error_absolute == 0.0 {
        anyhow::bail!("--error-relative and --error-absolute cannot both be 0");
    }
    let errors = ErrorModel::new(args.error_absolute, args.error_relative / 100.0)?;
    let data = read_readings(&args.data, &line)?;
    let baseline = args.baseline.as_deref().map(|p| read_readings(p, &line)).transpose()?;
    std::fs::create_dir_all(&args.out_dir)
        .with_context(|| format!("creating {}", args.out_dir.display()))?;
    let mesh = Mesh::new(&line, &surface, &MeshParams::default())?;
    let forward = Forward::new(mesh, &ForwardParams::default())?;
    let grid = forward.mesh().section();
    let params = InversionParams::default();
    let error_json =
        json!({"relative_pct": args.error_relative, "absolute_ohm": args.error_absolute});
    let (model, summary, png) = match &baseline {
        None => {
            let (seq, epochs) = on_common_sequence(&[&data], line.len())?;
            let r =
                invert(&forward, &seq, &epochs[0], &errors, StartModel::MedianApparent, &params)?;
            let model = json!({
                "kind": "resistivity",
                "electrodes": electrodes_json(&line),
                "cells": cells_json(grid, r.coverage(), r.mask(), &[("rho_ohm_m", r.model())]),
            });
            let mut summary = report_json(&r, data.len());
            summary["kind"] = json!("resistivity");
            summary["error_model"] = error_json;
            summary["elapsed_s"] = json!(started.elapsed().as_secs_f64());
            let png = section_png(
                grid,
                &line,
                "Resistivity section".into(),
                format!(
                    "{}: χ²/N {:.2}, RMS {:.1} %, {} iterations; pale cells are poorly resolved",
                    args.data.display(),
                    r.chi2(),
                    r.rms_pct(),
                    r.iterations()
                ),
                SectionValues::Resistivity { rho: r.model(), limits: None },
                Some(r.mask()),
            )?;
            (model, summary, png)
        }
        Some(base) => {
            let (seq, epochs) = on_common_sequence(&[base, &data], line.len())?;
            let b = Baseline::new(&forward, &seq, &epochs[..1], &errors, &params)?;
            let mode = match args.mode {
                ChangeMode::Ratio => TimeLapseMode::Ratio,
                ChangeMode::Difference => TimeLapseMode::Difference,
            };
            let tl =
                TimeLapseParams { mode, linearisation: Linearisation::Update, inversion: params };
            let c = invert_change(
                &forward,
                &seq,
                &b,
                &epochs[1],
                &errors,
                StartModel::MedianApparent,
                &tl,
            )?;
            let rho_t: Vec<f64> =
                b.report().model().iter().zip(c.ratio()).map(|(r0, q)| r0 * q).collect();
            let mode_name = match args.mode {
                ChangeMode::Ratio => "ratio",
                ChangeMode::Difference => "difference",
            };
            let ci = c.inversion();
            let model = json!({
                "kind": "change",
                "mode": mode_name,
                "electrodes": electrodes_json(&line),
                "cells": cells_json(grid, ci.coverage(), c.mask(), &[
                    ("change_pct", c.percent_change()),
                    ("baseline_rho_ohm_m", b.report().model()),
                    ("rho_ohm_m", &rho_t),
                ]),
            });
            let summary = json!({
                "kind": "change",
                "mode": mode_name,
                "error_model": error_json,
                "baseline": report_json(b.report(), base.len()),
                "change": report_json(ci, data.len()),
                "elapsed_s": started.elapsed().as_secs_f64(),
            });
            let png = section_png(
                grid,
                &line,
                format!("Change against the baseline ({mode_name} inversion)"),
                format!(
                    "{} against {}: χ²/N {:.2}, {} iterations; pale cells are poorly resolved",
                    args.data.display(),
                    base_name(&args),
                    ci.chi2(),
                    ci.iterations()
                ),
                SectionValues::ChangePercent { change: c.percent_change(), limit: None },
                Some(c.mask()),
            )?;
            (model, summary, png)
        }
    };
    write(&args.out_dir, "model.json", serde_json::to_string_pretty(&model)?.as_bytes())?;
    write(&args.out_dir, "summary.json", serde_json::to_string_pretty(&summary)?.as_bytes())?;
    write(&args.out_dir, "section.png", &png)?;
    let part = if summary["kind"] == "change" { &summary["change"] } else { &summary };
    println!(
        "{}: χ²/N {:.2}, RMS {:.2} %, {} iterations, converged {}, {} of {} readings used, {:.1} s; wrote model.json, summary.json, section.png in {}",
        summary["kind"].as_str().unwrap_or_default(),
        part["chi2_per_datum"].as_f64().unwrap_or(f64::NAN),
        part["rms_pct"].as_f64().unwrap_or(f64::NAN),
        part["iterations"],
        part["converged"],
        part["readings_used"],
        part["readings_present"],
        started.elapsed().as_secs_f64(),
        args.out_dir.display()
    );
    for w in part["warnings"].as_array().into_iter().flatten() {
        println!("warning: {}", w.as_str().unwrap_or_default());
    }
    Ok(())
}

fn base_name(args: &InvertArgs) -> String {
    args.baseline.as_ref().map(|p| p.display().to_string()).unwrap_or_default()
}
