//! `ohmline plan`: survey planning for a new line — the sequence, its size
//! and epoch duration, the cumulative sensitivity figure and a detectability
//! check for a described target (computed by `crate::survey`, which the admin
//! planning page shares).

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::Context;
use clap::{Args, ValueEnum};
use ohmline_core::geometry::{LineGeometry, Surface};
use ohmline_core::planning::{ArrayFamily, Meter};
use serde_json::{Value, json};

use super::invert::{read_line, write};
use crate::survey::{self, PlanRequest};

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

/// Plans the survey and writes the output files.
pub fn run(args: PlanArgs) -> anyhow::Result<()> {
    let started = Instant::now();
    let (line, surface, generated) = match (&args.geometry, args.electrodes, args.spacing) {
        (Some(g), _, _) => {
            let (line, surface) = read_line(g, args.surface.as_deref())?;
            (line, surface, false)
        }
        (None, Some(n), Some(a)) => {
            let line = survey::flat_line(n, a).context("--electrodes/--spacing")?;
            let surface = Surface::through_line(&line, &[])?;
            (line, surface, true)
        }
        _ => anyhow::bail!("give --electrodes N with --spacing M, or --geometry FILE"),
    };
    let target =
        args.target.as_deref().map(survey::parse_target).transpose().context("--target")?;
    let req = PlanRequest {
        line,
        surface,
        families: args.arrays.iter().map(|f| family(*f, &args)).collect(),
        reciprocals: args.reciprocals,
        meter: Meter {
            channels: args.channels,
            seconds_per_measurement: args.time_per_measurement,
        },
        noise_relative_pct: args.noise_relative,
        noise_absolute_ohm: args.noise_absolute,
        background_ohm_m: args.background,
        seed: args.seed,
        target,
    };
    let mut outcome = survey::compute(&req)?;
    outcome.summary["elapsed_s"] = json!(started.elapsed().as_secs_f64());
    let out = &args.out_dir;
    std::fs::create_dir_all(out).with_context(|| format!("creating {}", out.display()))?;
    write(out, "sequence.csv", outcome.sequence_csv.as_bytes())?;
    if generated {
        write(out, "electrodes.csv", electrodes_csv(&req.line).as_bytes())?;
    }
    write(out, "plan.json", serde_json::to_string_pretty(&outcome.summary)?.as_bytes())?;
    write(out, "sensitivity.png", &outcome.sensitivity_png)?;
    print_summary(&args, &outcome.summary, out, generated);
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
