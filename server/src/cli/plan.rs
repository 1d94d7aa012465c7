//! `ohmline plan`: survey planning for a new line — the sequence, its size
//! and epoch duration, the cumulative sensitivity figure and a detectability
//! check for a described target (all computed by `ohmline_core::planning`).

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::Context;
use clap::{Args, ValueEnum};
use ohmline_core::depth::median_depth;
use ohmline_core::errormodel::ErrorModel;
use ohmline_core::figures::SectionValues;
use ohmline_core::forward::{Forward, ForwardParams};
use ohmline_core::geometry::{Electrode, LineGeometry, Surface};
use ohmline_core::inversion::InversionParams;
use ohmline_core::mesh::Mesh;
use ohmline_core::planning::{
    ArrayFamily, DetectabilityParams, Meter, Target, coverage, detectability, epoch_duration,
    expected_count, plan_sequence, planning_mesh,
};
use ohmline_core::sequence::Sequence;
use serde_json::{Value, json};

use super::invert::{read_line, section_png, write};
use crate::files;

/// An array family of `--arrays`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum Family {
    /// Wenner α, a = 1…max-a.
    Wenner,
    /// Dipole–dipole, a = 1…max-a, n = 1…max-n.
    DipoleDipole,
    /// Multiple gradient, a = 1…max-a, gradient-s dipoles per current pair.
    Gradient,
}

/// Options of `ohmline plan`.
#[derive(Debug, Args)]
pub struct PlanArgs {
    /// Number of electrodes of a straight, flat line (with --spacing).
    #[arg(long, value_name = "N", conflicts_with = "geometry", requires = "spacing")]
    pub electrodes: Option<usize>,
    /// Electrode spacing, m (with --electrodes).
    #[arg(long, value_name = "M", requires = "electrodes")]
    pub spacing: Option<f64>,
    /// Electrodes CSV (label,x,z) of a line with topography, instead of --electrodes.
    #[arg(long, value_name = "FILE", required_unless_present = "electrodes")]
    pub geometry: Option<PathBuf>,
    /// Ground surface CSV (x,z) beyond the electrodes (with --geometry).
    #[arg(long, value_name = "FILE", requires = "geometry")]
    pub surface: Option<PathBuf>,
    /// Array families, comma-separated.
    #[arg(
        long,
        value_enum,
        value_delimiter = ',',
        default_value = "wenner,dipole-dipole,gradient"
    )]
    pub arrays: Vec<Family>,
    /// Largest dipole length a of every family, in electrode spacings.
    #[arg(long, default_value_t = 6)]
    pub max_a: usize,
    /// Largest dipole–dipole n.
    #[arg(long, default_value_t = 6)]
    pub max_n: usize,
    /// Potential dipoles per current pair of the gradient family (s).
    #[arg(long, default_value_t = 6)]
    pub gradient_s: usize,
    /// Measure the reciprocal of every quadrupole too.
    #[arg(long)]
    pub reciprocals: bool,
    /// Potential channels the meter measures during one current injection.
    #[arg(long, default_value_t = 8)]
    pub channels: usize,
    /// Time of one current injection, s.
    #[arg(long, value_name = "S", default_value_t = 0.5)]
    pub time_per_measurement: f64,
    /// Target for the detectability check:
    /// x=CHAINAGE,width=M,depth=TOP_DEPTH_M,height=M,change=PCT.
    #[arg(long, value_name = "SPEC")]
    pub target: Option<String>,
    /// Expected relative error of a reading, percent.
    #[arg(long, value_name = "PCT", default_value_t = 2.0)]
    pub noise_relative: f64,
    /// Expected absolute error of a reading, Ω.
    #[arg(long, value_name = "OHM", default_value_t = 0.001)]
    pub noise_absolute: f64,
    /// Resistivity of the (homogeneous) ground for the checks, Ω·m.
    #[arg(long, value_name = "OHM_M", default_value_t = 100.0)]
    pub background: f64,
    /// Seed of the synthetic noise.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Folder for sequence.csv, plan.json and sensitivity.png (created if missing).
    #[arg(long, value_name = "DIR", default_value = ".")]
    pub out_dir: PathBuf,
}

/// Parses `x=30,width=2,depth=3,height=2,change=-30`; every key is required.
fn parse_target(spec: &str) -> anyhow::Result<Target> {
    let mut v: [Option<f64>; 5] = [None; 5];
    const KEYS: [&str; 5] = ["x", "width", "depth", "height", "change"];
    for part in spec.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let (k, val) =
            part.split_once('=').with_context(|| format!("--target: {part:?} is not key=value"))?;
        let k = k.trim();
        let i = KEYS
            .iter()
            .position(|x| *x == k)
            .with_context(|| format!("--target: unknown key {k:?} (keys: {})", KEYS.join(", ")))?;
        let x: f64 = val
            .trim()
            .parse()
            .ok()
            .filter(|x: &f64| x.is_finite())
            .with_context(|| format!("--target: {k} = {val:?} is not a finite number"))?;
        v[i] = Some(x);
    }
    let get = |i: usize| v[i].with_context(|| format!("--target: {} is missing", KEYS[i]));
    Ok(Target { x: get(0)?, width: get(1)?, depth: get(2)?, height: get(3)?, change_pct: get(4)? })
}

fn flat_line(n: usize, spacing: f64) -> anyhow::Result<LineGeometry> {
    if !(spacing > 0.0 && spacing.is_finite()) {
        anyhow::bail!("--spacing must be a positive number of metres, got {spacing}");
    }
    Ok(LineGeometry::new(
        (0..n).map(|i| Electrode::new(format!("{}", i + 1), i as f64 * spacing, 0.0)).collect(),
    )?)
}

fn electrodes_csv(line: &LineGeometry) -> String {
    let mut s = String::from("label,x,z\n");
    for e in line.electrodes() {
        s.push_str(&format!("{},{},{}\n", e.label(), e.x(), e.z()));
    }
    s
}

fn family(f: Family, a: &PlanArgs) -> ArrayFamily {
    match f {
        Family::Wenner => ArrayFamily::Wenner { max_a: a.max_a },
        Family::DipoleDipole => ArrayFamily::DipoleDipole { max_a: a.max_a, max_n: a.max_n },
        Family::Gradient => ArrayFamily::Gradient { max_a: a.max_a, s: a.gradient_s },
    }
}

fn family_json(f: &ArrayFamily) -> Value {
    match *f {
        ArrayFamily::Wenner { max_a } => json!({"family": f.name(), "max_a": max_a}),
        ArrayFamily::DipoleDipole { max_a, max_n } => {
            json!({"family": f.name(), "max_a": max_a, "max_n": max_n})
        }
        ArrayFamily::Gradient { max_a, s } => json!({"family": f.name(), "max_a": max_a, "s": s}),
    }
}

/// Plans the survey and writes the output files.
pub fn run(args: PlanArgs) -> anyhow::Result<()> {
    let started = Instant::now();
    let (line, surface, generated) = match (&args.geometry, args.electrodes, args.spacing) {
        (Some(g), _, _) => {
            let (line, surface) = read_line(g, args.surface.as_deref())?;
            (line, surface, false)
        }
        (None, Some(n), Some(a)) => {
            let line = flat_line(n, a)?;
            let surface = Surface::through_line(&line, &[])?;
            (line, surface, true)
        }
        _ => anyhow::bail!("give --electrodes N with --spacing M, or --geometry FILE"),
    };
    for (name, v) in
        [("--noise-relative", args.noise_relative), ("--noise-absolute", args.noise_absolute)]
    {
        if !(v.is_finite() && v >= 0.0) {
            anyhow::bail!("{name} must be a finite number ≥ 0, got {v}");
        }
    }
    if args.noise_relative == 0.0 && args.noise_absolute == 0.0 {
        anyhow::bail!("--noise-relative and --noise-absolute cannot both be 0");
    }
    let target = args.target.as_deref().map(parse_target).transpose()?;
    let errors = ErrorModel::new(args.noise_absolute, args.noise_relative / 100.0)?;
    let families: Vec<ArrayFamily> = args.arrays.iter().map(|f| family(*f, &args)).collect();
    let n = line.len();
    let plan = plan_sequence(n, &families, args.reciprocals)?;
    let meter =
        Meter { channels: args.channels, seconds_per_measurement: args.time_per_measurement };
    let duration = epoch_duration(plan.sequence().quadrupoles(), &meter)?;
    let depths: Vec<f64> = plan.normals().iter().filter_map(|q| median_depth(&line, q)).collect();
    let deepest = depths.iter().copied().fold(0.0, f64::max);
    let shallowest = depths.iter().copied().fold(f64::INFINITY, f64::min);

    std::fs::create_dir_all(&args.out_dir)
        .with_context(|| format!("creating {}", args.out_dir.display()))?;
    let mesh = Mesh::new(&line, &surface, &planning_mesh())?;
    let forward = Forward::new(mesh, &ForwardParams::default())?;
    let normals = Sequence::new(plan.normals().to_vec(), n)?;
    let cov = coverage(&forward, &normals, args.background, &errors)?;
    let floor = 1e-3;
    let seen = cov.iter().filter(|&&c| c >= floor).count();

    let detect = match &target {
        Some(t) => {
            let params = DetectabilityParams {
                background_ohm_m: args.background,
                errors,
                noise_sigmas: 2.0,
                seed: args.seed,
                inversion: InversionParams::default(),
            };
            Some(detectability(&forward, &normals, t, &params)?)
        }
        None => None,
    };

    let families_json: Vec<Value> = plan
        .families()
        .iter()
        .map(|f| {
            let mut o = family_json(&f.family);
            o["generated"] = json!(f.generated);
            o["expected_count"] = json!(expected_count(n, &f.family));
            o["kept"] = json!(f.kept);
            o
        })
        .collect();
    let detect_json = match (&target, &detect) {
        (Some(t), Some(d)) => json!({
            "target": {"x_m": t.x, "width_m": t.width, "top_depth_m": t.depth, "height_m": t.height, "change_pct": t.change_pct},
            "max_signal_pct": d.max_signal_pct,
            "quadrupoles_above_noise": d.n_above_noise,
            "quadrupoles": d.n_data,
            "median_noise_threshold_pct": d.noise_threshold_pct,
            "recovered_change_pct": d.recovered_change_pct,
            "strongest_change_pct": d.strongest_change_pct,
            "no_change_noise_bound_pct": d.noise_bound_pct,
            "recovered_centroid": d.centroid,
            "centroid_offset_m": d.centroid_offset_m,
            "target_share_in_mask": d.target_in_mask,
            "detected": d.detected,
        }),
        _ => Value::Null,
    };
    let plan_json = json!({
        "electrodes": n,
        "spacing_m": line.nominal_spacing(),
        "line_length_m": line.extent().1 - line.extent().0,
        "arrays": families_json,
        "reciprocals": args.reciprocals,
        "quadrupoles": plan.sequence().len(),
        "normals": plan.normals().len(),
        "meter": {"channels": args.channels, "seconds_per_measurement": args.time_per_measurement},
        "current_pairs": duration.current_pairs,
        "injections": duration.injections,
        "epoch_duration_s": duration.seconds,
        "median_depth_of_investigation_m": {"shallowest": shallowest, "deepest": deepest},
        "sensitivity": {"cells": cov.len(), "cells_above_1e-3": seen},
        "error_model": {"relative_pct": args.noise_relative, "absolute_ohm": args.noise_absolute},
        "background_ohm_m": args.background,
        "detectability": detect_json,
        "elapsed_s": started.elapsed().as_secs_f64(),
    });
    let png = section_png(
        forward.mesh().section(),
        &line,
        "Cumulative sensitivity of the planned sequence".into(),
        format!(
            "{} quadrupoles on {n} electrodes, homogeneous {} Ω·m ground; cells below {floor} are dark",
            plan.normals().len(),
            args.background
        ),
        SectionValues::Sensitivity { values: &cov, floor },
        None,
    )?;
    let out = &args.out_dir;
    write(out, "sequence.csv", files::write_sequence(plan.sequence(), &line).as_bytes())?;
    if generated {
        write(out, "electrodes.csv", electrodes_csv(&line).as_bytes())?;
    }
    write(out, "plan.json", serde_json::to_string_pretty(&plan_json)?.as_bytes())?;
    write(out, "sensitivity.png", &png)?;
    print_summary(&args, &plan_json, out, generated);
    Ok(())
}

fn print_summary(args: &PlanArgs, p: &Value, out: &Path, generated: bool) {
    println!(
        "line: {} electrodes at {:.2} m ({:.1} m long)",
        p["electrodes"],
        p["spacing_m"].as_f64().unwrap_or(0.0),
        p["line_length_m"].as_f64().unwrap_or(0.0)
    );
    for f in p["arrays"].as_array().into_iter().flatten() {
        println!(
            "  {}: {} quadrupoles ({} kept after removing repeats)",
            f["family"].as_str().unwrap_or_default(),
            f["generated"],
            f["kept"]
        );
    }
    println!(
        "sequence: {} quadrupoles{}; {} current pairs, {} injections on {} channels",
        p["quadrupoles"],
        if args.reciprocals { " with reciprocals" } else { "" },
        p["current_pairs"],
        p["injections"],
        args.channels
    );
    let s = p["epoch_duration_s"].as_f64().unwrap_or(0.0);
    println!(
        "epoch duration: {:.0} s ({:.1} min) at {} s per injection",
        s,
        s / 60.0,
        args.time_per_measurement
    );
    let d = &p["median_depth_of_investigation_m"];
    println!(
        "median depth of investigation: {:.2}–{:.2} m",
        d["shallowest"].as_f64().unwrap_or(0.0),
        d["deepest"].as_f64().unwrap_or(0.0)
    );
    let t = &p["detectability"];
    if !t.is_null() {
        println!(
            "target: largest signal {:.2} %, {} of {} quadrupoles above 2σ noise (median {:.1} %)",
            t["max_signal_pct"].as_f64().unwrap_or(0.0),
            t["quadrupoles_above_noise"],
            t["quadrupoles"],
            t["median_noise_threshold_pct"].as_f64().unwrap_or(0.0)
        );
        println!(
            "  recovered change in the target {:.1} % (no-change noise bound {:.1} %, strongest {:.1} %){}",
            t["recovered_change_pct"].as_f64().unwrap_or(0.0),
            t["no_change_noise_bound_pct"].as_f64().unwrap_or(0.0),
            t["strongest_change_pct"].as_f64().unwrap_or(0.0),
            match t["centroid_offset_m"].as_f64() {
                Some(o) => format!(", centroid {o:.1} m from the target"),
                None => String::new(),
            }
        );
        println!("  detected: {}", if t["detected"] == true { "yes" } else { "no" });
    }
    println!(
        "wrote sequence.csv{}, plan.json, sensitivity.png in {}",
        if generated { ", electrodes.csv" } else { "" },
        out.display()
    );
}
