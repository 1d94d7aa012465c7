//! Survey planning shared by `ohmline plan` and the admin planning page: runs
//! [`ohmline_core::planning`] for one line and gathers what both show — the
//! sequence, its size and epoch duration, the median depths of investigation,
//! the cumulative-sensitivity figure and, for a described target, the
//! detectability check.

use ohmline_core::depth::median_depth;
use ohmline_core::errormodel::ErrorModel;
use ohmline_core::figures::{Canvas, Figure, SectionFigure, SectionParams, SectionValues};
use ohmline_core::forward::{Forward, ForwardParams};
use ohmline_core::geometry::{Electrode, LineGeometry, Surface};
use ohmline_core::inversion::InversionParams;
use ohmline_core::mesh::Mesh;
use ohmline_core::planning::{
    ArrayFamily, DetectabilityParams, Meter, PlannedSequence, Target, coverage, detectability,
    epoch_duration, expected_count, plan_sequence, planning_mesh,
};
use ohmline_core::sequence::Sequence;
use serde_json::{Value, json};

use crate::files;

/// Why a plan could not be made.
#[derive(Debug, thiserror::Error)]
pub enum SurveyError {
    /// An input is out of range or malformed; the message names it.
    #[error("{0}")]
    Input(String),
    /// The computation refused the line or the plan (core's message).
    #[error("{0}")]
    Compute(String),
}

fn compute_err(e: impl std::fmt::Display) -> SurveyError {
    SurveyError::Compute(e.to_string())
}

/// Everything a plan is made from.
#[derive(Debug, Clone)]
pub struct PlanRequest {
    /// The electrodes (flat or with topography).
    pub line: LineGeometry,
    /// The ground surface (through the electrodes, plus any points beyond).
    pub surface: Surface,
    /// Array families with their limits.
    pub families: Vec<ArrayFamily>,
    /// Measure the reciprocal of every quadrupole too.
    pub reciprocals: bool,
    /// The meter's channels and time per injection.
    pub meter: Meter,
    /// Expected relative error of a reading, percent.
    pub noise_relative_pct: f64,
    /// Expected absolute error of a reading, Ω.
    pub noise_absolute_ohm: f64,
    /// Resistivity of the homogeneous ground for the checks, Ω·m.
    pub background_ohm_m: f64,
    /// Seed of the synthetic noise of the detectability check.
    pub seed: u64,
    /// Target of the detectability check, if any.
    pub target: Option<Target>,
}

/// A finished plan.
#[derive(Debug, Clone)]
pub struct PlanOutcome {
    /// The plan's figures as JSON (the CLI's `plan.json`).
    pub summary: Value,
    /// The cumulative-sensitivity section as PNG.
    pub sensitivity_png: Vec<u8>,
    /// The planned sequence as a sequence CSV (`a,b,m,n`) for `line add` or the admin upload.
    pub sequence_csv: String,
}

/// Cell sensitivity below which the figure shows a cell as unseen.
pub const SENSITIVITY_FLOOR: f64 = 1e-3;

/// A straight, flat line of `n` electrodes labelled 1…n, `spacing` metres apart.
pub fn flat_line(n: usize, spacing: f64) -> Result<LineGeometry, SurveyError> {
    if !(spacing > 0.0 && spacing.is_finite()) {
        return Err(SurveyError::Input(format!(
            "spacing must be a positive number of metres, got {spacing}"
        )));
    }
    if !(4..=512).contains(&n) {
        return Err(SurveyError::Input(format!("electrodes must be 4…512, got {n}")));
    }
    LineGeometry::new(
        (0..n).map(|i| Electrode::new(format!("{}", i + 1), i as f64 * spacing, 0.0)).collect(),
    )
    .map_err(compute_err)
}

/// Parses `x=30,width=2,depth=3,height=2,change=-30`; every key is required.
pub fn parse_target(spec: &str) -> Result<Target, SurveyError> {
    const KEYS: [&str; 5] = ["x", "width", "depth", "height", "change"];
    let mut v: [Option<f64>; 5] = [None; 5];
    for part in spec.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let (k, val) = part
            .split_once('=')
            .ok_or_else(|| SurveyError::Input(format!("{part:?} is not key=value")))?;
        let k = k.trim();
        let i = KEYS.iter().position(|x| *x == k).ok_or_else(|| {
            SurveyError::Input(format!("unknown key {k:?} (keys: {})", KEYS.join(", ")))
        })?;
        let x =
            val.trim().parse::<f64>().ok().filter(|x| x.is_finite()).ok_or_else(|| {
                SurveyError::Input(format!("{k} = {val:?} is not a finite number"))
            })?;
        v[i] = Some(x);
    }
    let get = |i: usize| v[i].ok_or_else(|| SurveyError::Input(format!("{} is missing", KEYS[i])));
    Ok(Target { x: get(0)?, width: get(1)?, depth: get(2)?, height: get(3)?, change_pct: get(4)? })
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

/// Makes the plan. CPU-heavy (a forward model with Jacobian, and an inversion
/// when a target is given): call it off the async threads.
pub fn compute(req: &PlanRequest) -> Result<PlanOutcome, SurveyError> {
    for (name, v) in
        [("relative noise", req.noise_relative_pct), ("absolute noise", req.noise_absolute_ohm)]
    {
        if !(v.is_finite() && v >= 0.0) {
            return Err(SurveyError::Input(format!("{name} must be a finite number ≥ 0, got {v}")));
        }
    }
    if req.noise_relative_pct == 0.0 && req.noise_absolute_ohm == 0.0 {
        return Err(SurveyError::Input("relative and absolute noise cannot both be 0".into()));
    }
    if !(req.background_ohm_m > 0.0 && req.background_ohm_m.is_finite()) {
        return Err(SurveyError::Input(format!(
            "background resistivity must be positive, got {}",
            req.background_ohm_m
        )));
    }
    let line = &req.line;
    let errors = ErrorModel::new(req.noise_absolute_ohm, req.noise_relative_pct / 100.0)
        .map_err(compute_err)?;
    let n = line.len();
    let plan = planned(req)?;
    let duration =
        epoch_duration(plan.sequence().quadrupoles(), &req.meter).map_err(compute_err)?;
    let depths: Vec<f64> = plan.normals().iter().filter_map(|q| median_depth(line, q)).collect();
    let deepest = depths.iter().copied().fold(0.0, f64::max);
    let shallowest = depths.iter().copied().fold(f64::INFINITY, f64::min);

    let mesh = Mesh::new(line, &req.surface, &planning_mesh()).map_err(compute_err)?;
    let forward = Forward::new(mesh, &ForwardParams::default()).map_err(compute_err)?;
    let normals = Sequence::new(plan.normals().to_vec(), n).map_err(compute_err)?;
    let cov = coverage(&forward, &normals, req.background_ohm_m, &errors).map_err(compute_err)?;
    let seen = cov.iter().filter(|&&c| c >= SENSITIVITY_FLOOR).count();

    let detect_json = match &req.target {
        Some(t) => {
            let params = DetectabilityParams {
                background_ohm_m: req.background_ohm_m,
                errors,
                noise_sigmas: 2.0,
                seed: req.seed,
                inversion: InversionParams::default(),
            };
            let d = detectability(&forward, &normals, t, &params).map_err(compute_err)?;
            json!({
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
            })
        }
        None => Value::Null,
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
    let summary = json!({
        "electrodes": n,
        "spacing_m": line.nominal_spacing(),
        "line_length_m": line.extent().1 - line.extent().0,
        "arrays": families_json,
        "reciprocals": req.reciprocals,
        "quadrupoles": plan.sequence().len(),
        "normals": plan.normals().len(),
        "meter": {"channels": req.meter.channels, "seconds_per_measurement": req.meter.seconds_per_measurement},
        "current_pairs": duration.current_pairs,
        "injections": duration.injections,
        "epoch_duration_s": duration.seconds,
        "median_depth_of_investigation_m": {"shallowest": shallowest, "deepest": deepest},
        "sensitivity": {"cells": cov.len(), "cells_above_1e-3": seen},
        "error_model": {"relative_pct": req.noise_relative_pct, "absolute_ohm": req.noise_absolute_ohm},
        "background_ohm_m": req.background_ohm_m,
        "detectability": detect_json,
    });

    let fig = SectionFigure::new(
        forward.mesh().section(),
        SectionParams {
            title: "Cumulative sensitivity of the planned sequence".into(),
            subtitle: Some(format!(
                "{} quadrupoles on {n} electrodes, homogeneous {} Ω·m ground; cells below {SENSITIVITY_FLOOR} are dark",
                plan.normals().len(),
                req.background_ohm_m
            )),
            values: SectionValues::Sensitivity { values: &cov, floor: SENSITIVITY_FLOOR },
            line: Some(line),
            well_resolved: None,
            fade: 0.6,
            zones: Vec::new(),
            vertical_exaggeration: 1.0,
        },
    )
    .map_err(compute_err)?;
    let canvas = Canvas::with_default_font(1400, 700).map_err(compute_err)?;
    let sensitivity_png = fig.png(&canvas).map_err(compute_err)?;
    let sequence_csv = files::write_sequence(plan.sequence(), line);
    Ok(PlanOutcome { summary, sensitivity_png, sequence_csv })
}

/// The request's sequence (at least one family is required).
fn planned(req: &PlanRequest) -> Result<PlannedSequence, SurveyError> {
    if req.families.is_empty() {
        return Err(SurveyError::Input("choose at least one array family".into()));
    }
    plan_sequence(req.line.len(), &req.families, req.reciprocals).map_err(compute_err)
}

/// Only the planned sequence as a sequence CSV (cheap: no forward model).
pub fn sequence_csv(req: &PlanRequest) -> Result<String, SurveyError> {
    Ok(files::write_sequence(planned(req)?.sequence(), &req.line))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn targets_parse_and_bad_ones_are_named() {
        let t = parse_target("x=23.5, width=2,depth=2,height=2,change=-30").unwrap();
        assert_eq!((t.x, t.width, t.depth, t.height, t.change_pct), (23.5, 2.0, 2.0, 2.0, -30.0));
        let e = parse_target("x=1,width=2,depth=2,height=2").unwrap_err().to_string();
        assert!(e.contains("change is missing"), "{e}");
        let e = parse_target("x=1,breadth=2").unwrap_err().to_string();
        assert!(e.contains("unknown key \"breadth\""), "{e}");
        let e = parse_target("x=NaN").unwrap_err().to_string();
        assert!(e.contains("not a finite number"), "{e}");
    }

    #[test]
    fn flat_lines_refuse_bad_spacing_and_counts() {
        assert!(flat_line(48, 0.0).unwrap_err().to_string().contains("spacing"));
        assert!(flat_line(2, 1.0).unwrap_err().to_string().contains("electrodes"));
        assert_eq!(flat_line(48, 0.5).unwrap().len(), 48);
    }
}
