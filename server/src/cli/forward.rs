//! `ohmline forward`: simulated readings of a sequence over a described ground,
//! with the project's 2.5D finite-element model.

use std::path::PathBuf;

use anyhow::Context;
use clap::Args;
use ohmline_core::forward::{Forward, ForwardParams, Resistivity};
use ohmline_core::geometry::Surface;
use ohmline_core::mesh::{Mesh, MeshParams};
use ohmline_core::noise::{NoiseParams, add_noise};

use crate::files;

/// Options of `ohmline forward`.
#[derive(Debug, Args)]
pub struct ForwardArgs {
    /// Electrodes CSV (label,x,z).
    #[arg(long, value_name = "FILE")]
    pub electrodes: PathBuf,
    /// Sequence CSV (a,b,m,n labels; empty b or n = remote electrode).
    #[arg(long, value_name = "FILE")]
    pub sequence: PathBuf,
    /// Model JSON ({"background", "layers", "bodies"}; z is elevation, m).
    #[arg(long, value_name = "FILE")]
    pub model: PathBuf,
    /// Ground surface CSV (x,z). Without it the surface runs through the
    /// electrodes; with it, electrodes below the surface are buried and
    /// electrodes above it are an error.
    #[arg(long, value_name = "FILE")]
    pub surface: Option<PathBuf>,
    /// Gaussian noise added to each resistance, percent (standard deviation).
    #[arg(long, value_name = "PCT", default_value_t = 0.0)]
    pub noise: f64,
    /// Seed of the noise.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Output CSV (default: standard output).
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
}

fn read(p: &PathBuf) -> anyhow::Result<String> {
    std::fs::read_to_string(p).with_context(|| format!("reading {}", p.display()))
}

/// Runs the forward model and writes `a,b,m,n,k_factor,resistance_ohm,rho_app_ohm_m`.
pub fn run(args: ForwardArgs) -> anyhow::Result<()> {
    let (_, line) =
        files::read_electrodes(&args.electrodes.display().to_string(), &read(&args.electrodes)?)?;
    let seq =
        files::read_sequence(&args.sequence.display().to_string(), &read(&args.sequence)?, &line)?;
    let model = files::read_model(&args.model.display().to_string(), &read(&args.model)?)?;
    let surface = match &args.surface {
        Some(p) => Surface::new(files::read_surface(&p.display().to_string(), &read(p)?)?)
            .with_context(|| format!("surface {}", p.display()))?,
        None => Surface::through_line(&line, &[])?,
    };
    if !(args.noise.is_finite() && (0.0..100.0).contains(&args.noise)) {
        anyhow::bail!("--noise must be a percentage in 0…100, got {}", args.noise);
    }
    let mesh = Mesh::new(&line, &surface, &MeshParams::default())?;
    let forward = Forward::new(mesh, &ForwardParams::default())?;
    let rho = model.on_triangles(forward.mesh());
    let sim = forward.simulate(Resistivity::Triangles(&rho), &seq)?;
    let mut r = sim.resistances().to_vec();
    if args.noise > 0.0 {
        r = add_noise(
            &r,
            &NoiseParams { relative: args.noise / 100.0, absolute: 0.0, seed: args.seed },
        )?;
    }
    let k = forward.geometric_factors(&seq)?;
    let label =
        |i: Option<usize>| i.map(|i| line.electrodes()[i].label().to_string()).unwrap_or_default();
    let mut out = String::from("a,b,m,n,k_factor,resistance_ohm,rho_app_ohm_m\n");
    for (i, q) in seq.quadrupoles().iter().enumerate() {
        let (kf, ra) = match k[i] {
            Some(kf) => (format!("{kf:.6}"), format!("{:.6}", kf * r[i])),
            None => (String::new(), String::new()),
        };
        out.push_str(&format!(
            "{},{},{},{},{kf},{:.9e},{ra}\n",
            label(Some(q.a)),
            label(q.b),
            label(Some(q.m)),
            label(q.n),
            r[i]
        ));
    }
    match &args.out {
        Some(p) => std::fs::write(p, out).with_context(|| format!("writing {}", p.display()))?,
        None => print!("{out}"),
    }
    Ok(())
}
