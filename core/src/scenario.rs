//! An invented flood season on an invented levee, for the demo: the ground
//! model of two monitoring lines as a function of the epoch.
//!
//! Nothing here describes a real embankment. The levee is a trapezoid 2.5 m
//! high with a 4 m crest and 1:2.5 slopes (16.5 m wide at the base), built of
//! fill of 110 Ω·m on a foundation of 35 Ω·m (everything below elevation 0).
//! Two lines watch it:
//!
//! * the **crest** line, [`DemoLine::Crest`]: 64 electrodes 1 m apart along the
//!   crest centre (elevation 2.5 m), chainage 0–63 m;
//! * the **cross** line, [`DemoLine::Cross`]: 48 electrodes 0.5 m apart laid on
//!   the ground across the levee at crest chainage [`CROSS_AT_CHAINAGE`], its own
//!   chainage measured from the waterside (river at small x), waterside toe at
//!   x = 5 m, crest from 11.25 m to 15.25 m, landside toe at 21.5 m.
//!
//! Season (epoch k of N, season fraction τ = k/(N − 1), time t = start_day +
//! k·interval_days):
//!
//! * **baseline**: the first quarter of the season is quiet (river low, no rain,
//!   no seepage);
//! * **river stage** h(τ) above the toe rises from 0.3 m to 1.8 m (raised cosine
//!   between τ = 0.25 and 0.5), holds its crest until τ = 0.65 and falls back by
//!   τ = 0.95. The stage is an elevation in the lines' datum (the toes are at
//!   elevation 0). Inside the fill the phreatic surface falls across the levee
//!   from h at the waterside toe to h_L = 0.2·h at the landside toe along the
//!   Dupuit parabola of steady unconfined flow, z² = h² − (h² − h_L²)·s/L
//!   (Dupuit 1863, *Études théoriques et pratiques sur le mouvement des eaux*;
//!   Bear 1972, *Dynamics of Fluids in Porous Media*, §8.1), which puts it at
//!   0.72·h under the crest centre. Fill below it is saturated: with Archie's
//!   saturation exponent n = 2 (Archie 1942, *Trans. AIME* 146, 54–62,
//!   ρ ∝ S⁻ⁿ) and the unsaturated fill invented at 80 % saturation it is
//!   1 − 0.8² = 36 % less resistive, with a 0.3 m capillary fringe above it
//!   taking a linear share. Along the crest line this is one layer along the
//!   whole line (a line-wide wetting); across the levee a wedge under it.
//! * **rain** (two showers, times and sizes from the seed, near τ ≈ 0.3 and 0.72)
//!   wets the top 0.5 m of the ground everywhere: the drop is amp·(1 − d/0.5) at
//!   depth d, amp 15–25 %, decaying as exp(−Δt/1.5 days). Shallow, line-wide,
//!   short-lived.
//!   A rain gauge at the site reports each shower as 100 mm per unit of its
//!   relative drop ([`RAIN_MM_PER_DROP`], 15–25 mm; invented, no source),
//!   summed over the interval ending at each epoch ([`Scenario::rain_mm`]).
//! * **seepage**: from the epoch [`Scenario::onset_epoch`] (N/2) a path opens
//!   through the lower levee and the top of the foundation (elevation −1 m to
//!   +1 m, i.e. 1.5–3.5 m below the crest) across the whole levee at crest
//!   chainage 41 m; it is 2 m wide (40–42 m) at onset and widens to 4 m (39–43 m)
//!   while its resistivity drop grows from 20 % to 45 % over
//!   [`Scenario::growth_epochs`] epochs. Laterally confined on the crest line; on
//!   the cross line (which lies inside it) a band under the whole levee.
//! * **temperature**: every value above is at the reference temperature; the
//!   ground is then warmed to the seasonal temperature T(d, t) at its depth d
//!   below the ground ([`crate::temperature::SeasonalTemperature`]) by the ratio
//!   model ρ_T = ρ_ref / [1 + α (T − T_ref)] (Hayley et al. 2007, *GRL* 34,
//!   L18402).
//!
//! All other multipliers combine by product. Deterministic for a given seed.

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use thiserror::Error;

use crate::geometry::{Electrode, GeometryError, LineGeometry, Surface};
use crate::mesh::Mesh;
use crate::temperature::{
    SeasonalParams, SeasonalTemperature, TemperatureCorrection, TemperatureError,
};

/// Resistivity of the embankment fill at the reference temperature, Ω·m.
pub const FILL_RHO: f64 = 110.0;
/// Resistivity of the foundation (below elevation 0) at the reference temperature, Ω·m.
pub const FOUNDATION_RHO: f64 = 35.0;
/// Crest elevation above the toes, m.
pub const CREST_Z: f64 = 2.5;
/// Crest chainage (m) of the crest line where the cross line crosses the levee.
pub const CROSS_AT_CHAINAGE: f64 = 41.0;
/// Crest chainage of the seepage path's centre, m.
pub const SEEPAGE_CENTRE: f64 = 41.0;
/// Width of the seepage path at onset and fully grown, m.
pub const SEEPAGE_WIDTH: [f64; 2] = [2.0, 4.0];
/// Elevations of the seepage path's bottom and top, m.
pub const SEEPAGE_Z: [f64; 2] = [-1.0, 1.0];
/// Relative resistivity drop of the seepage path at onset and fully grown.
pub const SEEPAGE_DROP: [f64; 2] = [0.20, 0.45];
/// Relative drop of saturated fill below the phreatic surface: 1 − S², S = 0.8
/// the invented saturation of the fill above it (Archie's law with n = 2).
pub const STAGE_DROP: f64 = 0.36;
/// Phreatic surface at the landside toe as a share of the river stage.
const LANDSIDE_HEAD: f64 = 0.2;
/// River stage above the toe outside the flood and at its peak, m.
pub const STAGE_M: [f64; 2] = [0.3, 1.8];
/// Rain of a shower in millimetres per unit of its relative drop at the
/// surface (invented for the demo's rain gauge).
pub const RAIN_MM_PER_DROP: f64 = 100.0;
/// Capillary fringe above the phreatic surface, m.
const FRINGE_M: f64 = 0.3;
/// Depth wetted by rain, m.
const RAIN_DEPTH_M: f64 = 0.5;
/// Decay time of rain wetting, days.
const RAIN_DECAY_DAYS: f64 = 1.5;
/// Cross-section coordinates of the levee on the cross line: waterside toe,
/// crest edges, landside toe (x, z), m.
const PROFILE: [[f64; 2]; 4] = [[5.0, 0.0], [11.25, CREST_Z], [15.25, CREST_Z], [21.5, 0.0]];

/// Which of the two demo lines.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DemoLine {
    /// 64 electrodes at 1 m along the crest.
    Crest,
    /// 48 electrodes at 0.5 m across the levee.
    Cross,
}

/// Settings of a season.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ScenarioParams {
    /// Epochs per line (≥ 4).
    pub n_epochs: usize,
    /// Time between epochs, days (> 0; 0.25 = every 6 h).
    pub interval_days: f64,
    /// Day of the first epoch on the temperature model's time origin.
    pub start_day: f64,
    /// Seed of the rain showers.
    pub seed: u64,
    /// Seasonal ground temperature.
    pub temperature: SeasonalParams,
    /// α of the ratio model, 1/°C.
    pub alpha_per_c: f64,
    /// Reference temperature of the resistivities above, °C.
    pub reference_c: f64,
    /// Open the seepage path at [`Scenario::onset_epoch`]; `false` gives a
    /// season with river stage, rain and temperature but no seepage (for
    /// counting false alarms).
    pub seepage: bool,
}

/// Why a season cannot be built.
#[derive(Debug, Error, PartialEq)]
pub enum ScenarioError {
    /// Too few epochs or a bad interval.
    #[error("{0}")]
    Invalid(String),
    /// The temperature model or correction is invalid.
    #[error("temperature: {0}")]
    Temperature(#[from] TemperatureError),
}

/// A rain shower: day and size (relative drop at the surface).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Shower {
    /// Day it falls (same origin as `start_day`).
    pub day: f64,
    /// Relative resistivity drop at the surface right after it.
    pub amplitude: f64,
}

/// The seepage path at one epoch.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Seepage {
    /// Crest chainage range, m.
    pub chainage_m: [f64; 2],
    /// Depth below the crest of its top and bottom, m.
    pub depth_m: [f64; 2],
    /// Relative resistivity drop (0.45 = 45 % less resistive).
    pub drop: f64,
}

/// What the season is doing at one epoch.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EpochState {
    /// Epoch index (0-based).
    pub epoch: usize,
    /// Day (temperature model's origin).
    pub day: f64,
    /// River stage above the toe, m.
    pub stage_m: f64,
    /// Relative drop at the surface from rain.
    pub wetting: f64,
    /// Surface ground temperature, °C.
    pub surface_temperature_c: f64,
    /// The seepage path, once open.
    pub seepage: Option<Seepage>,
}

/// A validated season.
#[derive(Debug, Clone, PartialEq)]
pub struct Scenario {
    p: ScenarioParams,
    seasonal: SeasonalTemperature,
    correction: TemperatureCorrection,
    showers: Vec<Shower>,
    cross_surface: Surface,
}

/// Raised-cosine step from 0 at `a` to 1 at `b`.
fn smooth_step(t: f64, a: f64, b: f64) -> f64 {
    let u = ((t - a) / (b - a)).clamp(0.0, 1.0);
    0.5 * (1.0 - (std::f64::consts::PI * u).cos())
}

impl Scenario {
    /// Validates the settings and draws the rain showers from the seed.
    pub fn new(p: ScenarioParams) -> Result<Self, ScenarioError> {
        if p.n_epochs < 4 {
            return Err(ScenarioError::Invalid(format!(
                "a season needs at least 4 epochs, got {}",
                p.n_epochs
            )));
        }
        if !(p.interval_days.is_finite() && p.interval_days > 0.0 && p.start_day.is_finite()) {
            return Err(ScenarioError::Invalid(format!(
                "interval {} days and start day {} must be finite, the interval positive",
                p.interval_days, p.start_day
            )));
        }
        let seasonal = SeasonalTemperature::new(p.temperature)?;
        let correction = TemperatureCorrection::new(p.alpha_per_c, p.reference_c)?;
        let mut rng = StdRng::seed_from_u64(p.seed);
        let span = (p.n_epochs - 1) as f64 * p.interval_days;
        let showers = [0.30, 0.72]
            .iter()
            .map(|&tau: &f64| Shower {
                day: p.start_day + (tau + rng.random_range(-0.04..0.04)) * span,
                amplitude: rng.random_range(0.15..0.25),
            })
            .collect();
        let mut pts = vec![[-1e4, 0.0]];
        pts.extend(PROFILE);
        pts.push([1e4, 0.0]);
        let cross_surface = Surface::new(pts).expect("the levee profile is increasing in x");
        Ok(Self { p, seasonal, correction, showers, cross_surface })
    }

    /// The settings.
    pub fn params(&self) -> &ScenarioParams {
        &self.p
    }

    /// The rain showers.
    pub fn showers(&self) -> &[Shower] {
        &self.showers
    }

    /// First epoch (0-based) with the seepage path open: N/2.
    pub fn onset_epoch(&self) -> usize {
        self.p.n_epochs / 2
    }

    /// Epochs the seepage path takes to grow to full size: max(2, N/6).
    pub fn growth_epochs(&self) -> usize {
        (self.p.n_epochs / 6).max(2)
    }

    /// Day of epoch `k`.
    pub fn day(&self, k: usize) -> f64 {
        self.p.start_day + k as f64 * self.p.interval_days
    }

    fn tau(&self, k: usize) -> f64 {
        k as f64 / (self.p.n_epochs - 1) as f64
    }

    /// River stage above the toe at epoch `k`, m.
    pub fn stage_m(&self, k: usize) -> f64 {
        let t = self.tau(k);
        let rise = smooth_step(t, 0.25, 0.5) * (1.0 - smooth_step(t, 0.65, 0.95));
        STAGE_M[0] + (STAGE_M[1] - STAGE_M[0]) * rise
    }

    /// Elevation (m) of the phreatic surface in the fill at cross-section
    /// position `s` (cross-line chainage) at epoch `k`: the Dupuit parabola
    /// from the stage at the waterside toe to [`LANDSIDE_HEAD`] of it at the
    /// landside toe (module docs), the stage itself waterside of the toe.
    pub fn phreatic_m(&self, s: f64, k: usize) -> f64 {
        let h = self.stage_m(k);
        let frac = ((s - PROFILE[0][0]) / (PROFILE[3][0] - PROFILE[0][0])).clamp(0.0, 1.0);
        let hl = LANDSIDE_HEAD * h;
        (h * h - (h * h - hl * hl) * frac).sqrt()
    }

    /// Relative drop at the surface from rain at epoch `k`.
    pub fn wetting(&self, k: usize) -> f64 {
        let day = self.day(k);
        let w: f64 = self
            .showers
            .iter()
            .filter(|s| day >= s.day)
            .map(|s| s.amplitude * (-(day - s.day) / RAIN_DECAY_DAYS).exp())
            .sum();
        w.min(0.5)
    }

    /// Rain (mm) the site's gauge collected in the interval ending at epoch
    /// `k` (from one interval before it): the showers that fell in it, each
    /// [`RAIN_MM_PER_DROP`] times its size.
    pub fn rain_mm(&self, k: usize) -> f64 {
        let (from, to) = (self.day(k) - self.p.interval_days, self.day(k));
        self.showers
            .iter()
            .filter(|s| s.day > from && s.day <= to)
            .map(|s| s.amplitude * RAIN_MM_PER_DROP)
            .sum()
    }

    /// The seepage path at epoch `k`, if open (never in a season without seepage).
    pub fn seepage(&self, k: usize) -> Option<Seepage> {
        if !self.p.seepage {
            return None;
        }
        self.path(k)
    }

    /// The seepage path at epoch `k` as it would be from the onset on.
    fn path(&self, k: usize) -> Option<Seepage> {
        let on = self.onset_epoch();
        if k < on {
            return None;
        }
        let g = ((k - on) as f64 / self.growth_epochs() as f64).min(1.0);
        let w = SEEPAGE_WIDTH[0] + (SEEPAGE_WIDTH[1] - SEEPAGE_WIDTH[0]) * g;
        Some(Seepage {
            chainage_m: [SEEPAGE_CENTRE - w / 2.0, SEEPAGE_CENTRE + w / 2.0],
            depth_m: [CREST_Z - SEEPAGE_Z[1], CREST_Z - SEEPAGE_Z[0]],
            drop: SEEPAGE_DROP[0] + (SEEPAGE_DROP[1] - SEEPAGE_DROP[0]) * g,
        })
    }

    /// Everything the season is doing at epoch `k`.
    pub fn state(&self, k: usize) -> EpochState {
        EpochState {
            epoch: k,
            day: self.day(k),
            stage_m: self.stage_m(k),
            wetting: self.wetting(k),
            surface_temperature_c: self.seasonal.temperature_c(0.0, self.day(k)),
            seepage: self.seepage(k),
        }
    }

    /// The fully grown seepage path (the ground truth the pipeline should
    /// find; in a season without seepage, where it would have been).
    pub fn seepage_truth(&self) -> Seepage {
        self.path(self.onset_epoch() + self.growth_epochs()).expect("open after onset")
    }

    /// Ground temperature (°C) at `depth_m` below ground on epoch `k`.
    pub fn temperature_c(&self, depth_m: f64, k: usize) -> f64 {
        self.seasonal.temperature_c(depth_m, self.day(k))
    }

    /// The factor 1 + α(T − T_ref) of the ratio model at temperature `t_c`.
    pub fn temperature_factor(&self, t_c: f64) -> f64 {
        self.correction.factor(t_c)
    }

    /// Resistivity at the reference temperature (Ω·m) at crest chainage
    /// `chainage`, cross-section position `s` (cross-line chainage) and
    /// elevation `z`, at epoch `k`; `depth` is the depth below the ground.
    fn rho_reference(&self, chainage: f64, s: f64, z: f64, depth: f64, k: usize) -> f64 {
        let mut rho = if z > 0.0 { FILL_RHO } else { FOUNDATION_RHO };
        if z > 0.0 {
            let phreatic = self.phreatic_m(s, k);
            let share = (1.0 - (z - phreatic) / FRINGE_M).clamp(0.0, 1.0);
            rho *= 1.0 - STAGE_DROP * share;
        }
        let wet = self.wetting(k);
        if wet > 0.0 && depth < RAIN_DEPTH_M {
            rho *= 1.0 - wet * (1.0 - depth.max(0.0) / RAIN_DEPTH_M);
        }
        if let Some(sp) = self.seepage(k) {
            let inside_levee = (PROFILE[0][0]..=PROFILE[3][0]).contains(&s);
            if inside_levee
                && (sp.chainage_m[0]..=sp.chainage_m[1]).contains(&chainage)
                && (SEEPAGE_Z[0]..=SEEPAGE_Z[1]).contains(&z)
            {
                rho *= 1.0 - sp.drop;
            }
        }
        rho
    }

    /// Resistivity (Ω·m) at (x, z) on `line` at epoch `k`, at the ground's
    /// temperature. Depth below ground is measured to the nearest point of the
    /// ground profile (vertical on the flat crest line).
    pub fn resistivity_at(&self, line: DemoLine, x: f64, z: f64, k: usize) -> f64 {
        let (chainage, s, depth) = match line {
            DemoLine::Crest => (x, (PROFILE[1][0] + PROFILE[2][0]) / 2.0, CREST_Z - z),
            DemoLine::Cross => (CROSS_AT_CHAINAGE, x, self.cross_surface.distance_below(x, z)),
        };
        let rho = self.rho_reference(chainage, s, z, depth, k);
        let t = self.temperature_c(depth, k);
        rho / self.correction.factor(t)
    }

    /// Resistivity at each triangle centroid of a mesh of `line`, Ω·m, for
    /// [`crate::forward::Resistivity::Triangles`].
    pub fn on_triangles(&self, line: DemoLine, mesh: &Mesh, k: usize) -> Vec<f64> {
        (0..mesh.triangles().len())
            .map(|t| {
                let p = mesh.triangle_centroid(t);
                self.resistivity_at(line, p[0], p[1], k)
            })
            .collect()
    }
}

/// Electrodes labelled 1…n.
fn electrodes(points: impl Iterator<Item = [f64; 2]>) -> Result<LineGeometry, GeometryError> {
    LineGeometry::new(
        points.enumerate().map(|(i, p)| Electrode::new(format!("{}", i + 1), p[0], p[1])).collect(),
    )
}

/// The crest line: 64 electrodes 1 m apart at elevation [`CREST_Z`], x = 0…63 m.
pub fn crest_line() -> LineGeometry {
    electrodes((0..64).map(|i| [i as f64, CREST_Z])).expect("valid crest line")
}

/// The cross line: 48 electrodes 0.5 m apart measured along the ground,
/// centred on the crest, and the extra ground points (levee edges and toes)
/// the mesh needs beyond the electrodes.
pub fn cross_line() -> (LineGeometry, Vec<[f64; 2]>) {
    let centre = (PROFILE[1][0] + PROFILE[2][0]) / 2.0;
    let mut pts = vec![[-1e4, 0.0]];
    pts.extend(PROFILE);
    pts.push([1e4, 0.0]);
    // Arc length along the profile from the crest centre to each vertex.
    let at = |arc: f64| -> [f64; 2] {
        let (mut p, dir) = ([centre, CREST_Z], arc.signum());
        let mut left = arc.abs();
        let verts: Vec<[f64; 2]> = if dir >= 0.0 {
            pts.iter().copied().filter(|v| v[0] > centre).collect()
        } else {
            pts.iter().rev().copied().filter(|v| v[0] < centre).collect()
        };
        for v in verts {
            let d = (v[0] - p[0]).hypot(v[1] - p[1]);
            if d >= left {
                let f = left / d;
                return [p[0] + f * (v[0] - p[0]), p[1] + f * (v[1] - p[1])];
            }
            left -= d;
            p = v;
        }
        p
    };
    let line = electrodes((0..48).map(|i| at((i as f64 - 23.5) * 0.5))).expect("valid cross line");
    (line, PROFILE.to_vec())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn scenario(n: usize) -> Scenario {
        Scenario::new(ScenarioParams {
            n_epochs: n,
            interval_days: 0.25,
            start_day: 100.0,
            seed: 1,
            temperature: SeasonalParams {
                mean_c: 10.0,
                amplitude_c: 8.0,
                t_min_day: 17.5,
                damping_depth_m: 2.5,
                period_days: 365.0,
            },
            alpha_per_c: 0.02,
            reference_c: 10.0,
            seepage: true,
        })
        .unwrap()
    }

    /// ρ at (x, z) on the crest line with temperature removed, Ω·m.
    fn reference(s: &Scenario, x: f64, z: f64, k: usize) -> f64 {
        let t = s.temperature_c(CREST_Z - z, k);
        s.resistivity_at(DemoLine::Crest, x, z, k) * s.temperature_factor(t)
    }

    #[test]
    fn temperature_factor_follows_the_ratio_model() {
        // Hayley et al. 2007, GRL 34, L18402: ρ_T = ρ_ref / (1 + α(T − T_ref));
        // with α = 0.02 a 10 °C rise lowers ρ by 1 − 1/1.2 = 16.7 %.
        let s = scenario(30);
        assert!((s.temperature_factor(20.0) - 1.2).abs() < 1e-12);
        assert!((s.temperature_factor(10.0) - 1.0).abs() < 1e-12);
        // Deep in the foundation (10 m, 4 damping depths) the temperature is the
        // annual mean 10 °C = T_ref within 8·e⁻⁴ = 0.15 °C.
        let rho = s.resistivity_at(DemoLine::Crest, 5.0, CREST_Z - 10.0, 0);
        let t = s.temperature_c(10.0, 0);
        assert!((t - 10.0).abs() < 0.15, "{t}");
        assert!((rho - FOUNDATION_RHO / (1.0 + 0.02 * (t - 10.0))).abs() < 1e-9);
    }

    #[test]
    fn seepage_absent_before_onset_and_confined_after() {
        let s = scenario(30);
        assert_eq!(s.onset_epoch(), 15);
        let (x_in, x_out, z) = (SEEPAGE_CENTRE, 20.0, 0.0);
        for k in 0..s.onset_epoch() {
            assert!(s.seepage(k).is_none());
            // Same ground at both chainages before onset.
            assert_eq!(reference(&s, x_in, z, k), reference(&s, x_out, z, k), "epoch {k}");
        }
        let full = s.onset_epoch() + s.growth_epochs();
        let sp = s.seepage(full).unwrap();
        assert_eq!(sp.chainage_m, [39.0, 43.0]);
        assert_eq!(sp.depth_m, [1.5, 3.5]);
        let ratio = reference(&s, x_in, z, full) / reference(&s, x_out, z, full);
        assert!((ratio - (1.0 - 0.45)).abs() < 1e-12, "{ratio}");
        // Above the path (elevation 1.5 m) nothing changes laterally.
        assert_eq!(reference(&s, x_in, 1.5, full), reference(&s, x_out, 1.5, full));
        // The drop grows with time.
        let drops: Vec<f64> = (s.onset_epoch()..30).map(|k| s.seepage(k).unwrap().drop).collect();
        assert!(drops.windows(2).all(|w| w[1] >= w[0]));
    }

    #[test]
    fn a_season_without_seepage_has_the_same_stage_rain_and_temperature() {
        let with = scenario(30);
        let without = Scenario::new(ScenarioParams { seepage: false, ..*with.params() }).unwrap();
        let full = with.onset_epoch() + with.growth_epochs();
        assert!((0..30).all(|k| without.seepage(k).is_none()));
        assert_eq!(without.seepage_truth(), with.seepage_truth());
        for k in [0, with.onset_epoch(), full, 29] {
            assert_eq!(without.stage_m(k), with.stage_m(k));
            assert_eq!(without.wetting(k), with.wetting(k));
            // Laterally uniform at the path's depth: the path is the only difference.
            let (x_in, x_out) = (SEEPAGE_CENTRE, 20.0);
            assert_eq!(reference(&without, x_in, 0.0, k), reference(&without, x_out, 0.0, k));
            assert_eq!(reference(&without, x_out, 0.0, k), reference(&with, x_out, 0.0, k));
        }
    }

    #[test]
    fn stage_effect_is_confined_below_the_water_level() {
        let s = scenario(30);
        let (quiet, flood) = (0, (0.55f64 * 29.0).round() as usize);
        assert!((s.stage_m(quiet) - STAGE_M[0]).abs() < 1e-12);
        assert!(s.stage_m(flood) > 1.75);
        // The crest line sits over the crest centre, half-way across the base,
        // where the Dupuit parabola z² = h² − (h² − (0.2h)²)·s/L gives
        // z = h·√(1 − 0.96·0.5) = h·√0.52.
        let water = 0.52f64.sqrt() * s.stage_m(flood);
        assert!((s.phreatic_m(13.25, flood) - water).abs() < 1e-12);
        // No rain at either epoch in this comparison: check the wetting is tiny
        // deeper than the rain depth anyway (z ≤ 2 m is ≥ 0.5 m deep).
        for z in [water + FRINGE_M + 0.05, 2.0] {
            assert_eq!(reference(&s, 10.0, z, flood), reference(&s, 10.0, z, quiet), "z {z}");
        }
        let below = reference(&s, 10.0, water - 0.1, flood) / reference(&s, 10.0, water - 0.1, 0);
        assert!((below - (1.0 - STAGE_DROP)).abs() < 1e-12, "{below}");
        // The same along the whole line: laterally extensive.
        assert_eq!(reference(&s, 3.0, water - 0.1, flood), reference(&s, 60.0, water - 0.1, flood));
    }

    #[test]
    fn the_flood_rises_holds_its_crest_and_falls() {
        let s = scenario(30);
        let tau = |k: usize| k as f64 / 29.0;
        for k in 0..30 {
            let h = s.stage_m(k);
            if tau(k) <= 0.25 || tau(k) >= 0.95 {
                assert!((h - STAGE_M[0]).abs() < 1e-12, "epoch {k}: {h}");
            }
            if (0.5..=0.65).contains(&tau(k)) {
                assert!((h - STAGE_M[1]).abs() < 1e-12, "epoch {k}: {h}");
            }
        }
        // Dupuit parabola across the base (Bear 1972, §8.1): z² falls linearly
        // with s from h² at the waterside toe (s = 5 m) to (0.2h)² at the
        // landside toe (s = 21.5 m); at the waterside of the toe the stage itself.
        let k = 16;
        let h = s.stage_m(k);
        assert!((s.phreatic_m(5.0, k) - h).abs() < 1e-12);
        assert!((s.phreatic_m(0.0, k) - h).abs() < 1e-12);
        assert!((s.phreatic_m(21.5, k) - 0.2 * h).abs() < 1e-12);
        let z2 = |x: f64| s.phreatic_m(x, k).powi(2);
        assert!((z2(9.125) - (z2(5.0) + z2(13.25)) / 2.0).abs() < 1e-12);
        // Never above the river: water flows from the river into the levee.
        assert!((0..=40).all(|i| s.phreatic_m(i as f64 * 0.6, k) <= h + 1e-12));
    }

    #[test]
    fn rain_wets_only_the_top_and_fades() {
        let s = scenario(30);
        let shower = s.showers()[0];
        let k = (0..30).find(|&k| s.day(k) >= shower.day).unwrap();
        assert!(s.wetting(k) > 0.1);
        // One day later (before the second shower) it has faded by exp(−1/1.5)
        // from the value at the same delay after the shower.
        let expect = shower.amplitude * (-(s.day(k + 4) - shower.day) / RAIN_DECAY_DAYS).exp();
        assert!((s.wetting(k + 4) - expect).abs() < 1e-12);
        // At 0.6 m depth (elevation 1.9 m, above the phreatic surface and its
        // fringe at every stage) the ground is as in the dry baseline.
        let z = CREST_Z - 0.6;
        assert_eq!(reference(&s, 10.0, z, k), reference(&s, 10.0, z, 0));
        // Near the surface it is wetter by the shower's share.
        let shallow =
            reference(&s, 10.0, CREST_Z - 0.05, k) / reference(&s, 10.0, CREST_Z - 0.05, 0);
        assert!((shallow - (1.0 - s.wetting(k) * 0.9)).abs() < 1e-12, "{shallow}");
        for k in 0..4 {
            assert_eq!(s.wetting(k), 0.0, "the baseline is dry");
        }
    }

    #[test]
    fn the_rain_gauge_collects_each_shower_once_when_it_falls() {
        let s = scenario(30);
        let per_epoch: Vec<f64> = (0..30).map(|k| s.rain_mm(k)).collect();
        let total: f64 = per_epoch.iter().sum();
        let showers: f64 = s.showers().iter().map(|x| x.amplitude * RAIN_MM_PER_DROP).sum();
        assert!((total - showers).abs() < 1e-9, "{total} vs {showers}");
        for sh in s.showers() {
            // The shower is counted at the first epoch at or after it, whose
            // wetting it starts.
            let k = (0..30).find(|&k| s.day(k) >= sh.day).unwrap();
            assert!(per_epoch[k] >= sh.amplitude * RAIN_MM_PER_DROP - 1e-9);
            assert!(s.wetting(k) > 0.0);
        }
        assert_eq!(per_epoch[..4], [0.0; 4], "the baseline is dry");
    }

    #[test]
    fn lines_have_the_stated_geometry() {
        let crest = crest_line();
        assert_eq!((crest.len(), crest.extent()), (64, (0.0, 63.0)));
        let (cross, extra) = cross_line();
        assert_eq!(cross.len(), 48);
        // Consecutive electrodes are 0.5 m apart along the ground (the crest
        // edges lie between electrodes, so the straight distance is ≤ 0.5 m).
        for i in 1..48 {
            let d = cross.distance(i - 1, i);
            assert!(d <= 0.5 + 1e-9 && d > 0.49, "{i}: {d}");
        }
        let z_max = cross.electrodes().iter().map(|e| e.z()).fold(0.0, f64::max);
        assert_eq!(z_max, CREST_Z);
        assert_eq!(extra.len(), 4);
        // Both ends lie on the flat ground beyond the toes.
        assert_eq!(cross.electrodes()[0].z(), 0.0);
        assert_eq!(cross.electrodes()[47].z(), 0.0);
    }

    #[test]
    fn same_seed_same_season() {
        assert_eq!(scenario(30), scenario(30));
        assert!(Scenario::new(ScenarioParams { n_epochs: 3, ..*scenario(30).params() }).is_err());
    }
}
