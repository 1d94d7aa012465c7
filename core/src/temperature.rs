//! Ground temperature and the temperature correction of resistivity models.
//!
//! **Correction (ratio model, Hayley, Bentley, Gharibi & Nightingale 2007, *GRL* 34,
//! L18402).** Bulk conductivity rises by about 2 % per °C near 0–25 °C. A resistivity
//! ρ_T (Ω·m) observed at temperature T (°C) is brought to a reference temperature
//! T_ref by
//!
//! ρ_ref = ρ_T · [1 + α (T − T_ref)],   α ≈ 0.02 /°C,
//!
//! and a model at T_ref is "warmed" to T by the inverse, ρ_T = ρ_ref / [1 + α (T − T_ref)].
//! Warming therefore lowers resistivity (α > 0): with α = 0.02 a 10 °C rise gives
//! 1/1.2 − 1 = −16.7 %. The factor 1 + α(T − T_ref) must stay positive; where it does
//! not, the input cannot be corrected and an error names the cell.
//!
//! **Seasonal temperature (annual wave in a conducting half-space).** With a sinusoidal
//! surface temperature, the solution of the heat-conduction equation ∂T/∂t = D_h ∂²T/∂z²
//! (z depth below ground, metres, down positive) is
//!
//! T(z, t) = T_a + A0 · e^{−z/d} · sin(ω (t − t0) − z/d − π/2),   d = √(2 D_h / ω),
//!
//! with T_a the mean annual temperature (°C), A0 the surface amplitude (°C), t0 the day of
//! minimum surface temperature, ω = 2π / period (rad/day; period 365 days for the annual
//! wave), D_h the thermal diffusivity (m²/s) and d the damping depth (m). The amplitude
//! decays as e^{−z/d} and the wave lags by z/d radians, i.e. (z/d)/ω days (Hillel 1982,
//! *Introduction to Soil Physics*, Academic Press, ch. on soil temperature; Marshall &
//! Holmes 1988, *Soil Physics*).
//!
//! Depth is the depth of a cell below the local ground surface in metres (for example
//! [`crate::section::Cell::depth`], or [`crate::geometry::Surface::distance_below`] on
//! levee slopes); negative depths (above ground) are treated as 0. Time `t` is in days on
//! any origin the caller chooses, the same for `t0`.

use std::f64::consts::PI;

use thiserror::Error;

/// Seconds in a day, for converting a diffusivity in m²/s to a damping depth.
const SECONDS_PER_DAY: f64 = 86_400.0;

/// Why a temperature model or correction cannot be computed.
#[derive(Debug, Error, PartialEq)]
pub enum TemperatureError {
    /// A parameter is out of its valid range.
    #[error("{name} = {value} is not valid: {requirement}")]
    InvalidParameter {
        /// The parameter's name.
        name: &'static str,
        /// The value given.
        value: f64,
        /// What the value must satisfy.
        requirement: &'static str,
    },
    /// A measured temperature profile has fewer than one point.
    #[error("a temperature profile needs at least 1 point")]
    EmptyProfile,
    /// A profile point is not finite.
    #[error("temperature profile point {index}: depth or temperature is not a finite number")]
    NonFiniteProfile {
        /// Position of the point (0-based, after sorting by depth).
        index: usize,
    },
    /// Two profile points share a depth.
    #[error("temperature profile point {index}: depth {depth_m} m appears twice")]
    RepeatedDepth {
        /// Position of the point (0-based, after sorting by depth).
        index: usize,
        /// The repeated depth, metres.
        depth_m: f64,
    },
    /// Per-cell slices differ in length.
    #[error("{what}: {got} values for {expected} cells")]
    LengthMismatch {
        /// Which slice.
        what: &'static str,
        /// Its length.
        got: usize,
        /// The number of cells (length of the resistivity slice).
        expected: usize,
    },
    /// A cell's resistivity, depth or temperature is not usable.
    #[error("cell {cell}: {what} = {value} is not valid")]
    InvalidCell {
        /// Cell index.
        cell: usize,
        /// `resistivity`, `depth` or `temperature`.
        what: &'static str,
        /// The value.
        value: f64,
    },
    /// The observations do not determine the seasonal wave.
    #[error(
        "{n} temperature observations do not determine the mean, amplitude and phase (need at least 3, spread over the period; at least 2 depths to fit the damping depth)"
    )]
    Underdetermined {
        /// Usable observations given.
        n: usize,
    },
    /// An observation is not finite.
    #[error("temperature observation {index}: a value is not a finite number")]
    NonFiniteObservation {
        /// Position of the observation (0-based).
        index: usize,
    },
    /// The correction factor 1 + α(T − T_ref) is not positive for a cell.
    #[error(
        "cell {cell}: 1 + α(T − T_ref) = {factor} at T = {temperature_c} °C is not positive; the ratio model does not apply"
    )]
    NonPositiveFactor {
        /// Cell index.
        cell: usize,
        /// The cell's temperature, °C.
        temperature_c: f64,
        /// The factor 1 + α(T − T_ref).
        factor: f64,
    },
}

fn require(
    ok: bool,
    name: &'static str,
    value: f64,
    requirement: &'static str,
) -> Result<(), TemperatureError> {
    if ok { Ok(()) } else { Err(TemperatureError::InvalidParameter { name, value, requirement }) }
}

/// Damping depth d = √(2 D_h / ω) in metres for thermal diffusivity `diffusivity_m2_per_s`
/// (m²/s) and a temperature wave of period `period_days` (days; 365 for the annual wave,
/// 1 for the diurnal). NaN for non-positive inputs.
pub fn damping_depth_m(diffusivity_m2_per_s: f64, period_days: f64) -> f64 {
    if diffusivity_m2_per_s <= 0.0 || period_days <= 0.0 {
        return f64::NAN;
    }
    let omega_per_s = 2.0 * PI / (period_days * SECONDS_PER_DAY);
    (2.0 * diffusivity_m2_per_s / omega_per_s).sqrt()
}

/// Parameters of the seasonal temperature wave (see the module docs for the formula).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SeasonalParams {
    /// Mean annual temperature T_a, °C.
    pub mean_c: f64,
    /// Surface amplitude A0, °C (≥ 0).
    pub amplitude_c: f64,
    /// Day t0 of minimum surface temperature, days on the caller's time origin.
    pub t_min_day: f64,
    /// Damping depth d, metres (> 0); see [`damping_depth_m`].
    pub damping_depth_m: f64,
    /// Period of the wave, days (> 0; 365 for the annual wave).
    pub period_days: f64,
}

/// A validated seasonal temperature model T(z, t).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SeasonalTemperature {
    p: SeasonalParams,
}

impl SeasonalTemperature {
    /// Validates the parameters: all finite, amplitude ≥ 0, damping depth and period > 0.
    pub fn new(p: SeasonalParams) -> Result<Self, TemperatureError> {
        require(p.mean_c.is_finite(), "mean_c", p.mean_c, "a finite temperature")?;
        require(
            p.amplitude_c.is_finite() && p.amplitude_c >= 0.0,
            "amplitude_c",
            p.amplitude_c,
            "finite and ≥ 0",
        )?;
        require(p.t_min_day.is_finite(), "t_min_day", p.t_min_day, "a finite day")?;
        require(
            p.damping_depth_m.is_finite() && p.damping_depth_m > 0.0,
            "damping_depth_m",
            p.damping_depth_m,
            "finite and > 0",
        )?;
        require(
            p.period_days.is_finite() && p.period_days > 0.0,
            "period_days",
            p.period_days,
            "finite and > 0",
        )?;
        Ok(Self { p })
    }

    /// The parameters.
    pub fn params(&self) -> &SeasonalParams {
        &self.p
    }

    /// Angular frequency ω = 2π / period, rad/day.
    pub fn omega_per_day(&self) -> f64 {
        2.0 * PI / self.p.period_days
    }

    /// Ratio of the wave's amplitude at `depth_m` to the surface amplitude, e^{−z/d}.
    pub fn amplitude_ratio(&self, depth_m: f64) -> f64 {
        (-depth_m.max(0.0) / self.p.damping_depth_m).exp()
    }

    /// Delay of the wave at `depth_m` behind the surface, days: (z/d)/ω.
    pub fn lag_days(&self, depth_m: f64) -> f64 {
        depth_m.max(0.0) / self.p.damping_depth_m / self.omega_per_day()
    }

    /// Temperature (°C) at `depth_m` below ground on day `t_day`.
    pub fn temperature_c(&self, depth_m: f64, t_day: f64) -> f64 {
        let z = depth_m.max(0.0) / self.p.damping_depth_m;
        let phase = self.omega_per_day() * (t_day - self.p.t_min_day) - z - PI / 2.0;
        self.p.mean_c + self.p.amplitude_c * (-z).exp() * phase.sin()
    }
}

/// One ground-temperature observation (a thermistor reading).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TemperatureObservation {
    /// Depth below ground, metres.
    pub depth_m: f64,
    /// Day of the observation, on the same origin as the model's `t_min_day`.
    pub t_day: f64,
    /// Temperature, °C.
    pub temperature_c: f64,
}

/// A seasonal model fitted to observations, with its residual.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SeasonalFit {
    model: SeasonalTemperature,
    rms_c: f64,
    n: usize,
}

impl SeasonalFit {
    /// The fitted model.
    pub fn model(&self) -> &SeasonalTemperature {
        &self.model
    }

    /// Root-mean-square residual of the observations, °C.
    pub fn rms_c(&self) -> f64 {
        self.rms_c
    }

    /// Observations used.
    pub fn n_observations(&self) -> usize {
        self.n
    }
}

/// Fits T_a, A0 and t0 of the seasonal wave to observations at a known damping depth
/// `damping_depth_m` (m) and period `period_days`. The model is linear in
/// (T_a, c1, c2) after writing the wave as e^{−z/d}[c1 sin θ + c2 cos θ], θ = ωt − z/d,
/// so this is ordinary least squares; then A0 = √(c1² + c2²) and t0 follows from the
/// phase. `t_min_day` is returned within [0, period).
pub fn fit_seasonal(
    observations: &[TemperatureObservation],
    damping_depth_m: f64,
    period_days: f64,
) -> Result<SeasonalFit, TemperatureError> {
    require(
        damping_depth_m.is_finite() && damping_depth_m > 0.0,
        "damping_depth_m",
        damping_depth_m,
        "finite and > 0",
    )?;
    require(period_days.is_finite() && period_days > 0.0, "period_days", period_days, "> 0")?;
    if let Some(index) = observations.iter().position(|o| {
        !(o.depth_m.is_finite() && o.t_day.is_finite() && o.temperature_c.is_finite())
    }) {
        return Err(TemperatureError::NonFiniteObservation { index });
    }
    let n = observations.len();
    let omega = 2.0 * PI / period_days;
    let basis = |o: &TemperatureObservation| {
        let z = o.depth_m.max(0.0) / damping_depth_m;
        let theta = omega * o.t_day - z;
        [1.0, (-z).exp() * theta.sin(), (-z).exp() * theta.cos()]
    };
    let mut ata = [[0.0; 3]; 3];
    let mut atb = [0.0; 3];
    for o in observations {
        let g = basis(o);
        for i in 0..3 {
            for j in 0..3 {
                ata[i][j] += g[i] * g[j];
            }
            atb[i] += g[i] * o.temperature_c;
        }
    }
    let c = solve3(ata, atb).ok_or(TemperatureError::Underdetermined { n })?;
    let amplitude = c[1].hypot(c[2]);
    let phi = (-c[2]).atan2(c[1]);
    let t_min_day = ((phi - PI / 2.0) / omega).rem_euclid(period_days);
    let model = SeasonalTemperature::new(SeasonalParams {
        mean_c: c[0],
        amplitude_c: amplitude,
        t_min_day,
        damping_depth_m,
        period_days,
    })?;
    let rss: f64 = observations
        .iter()
        .map(|o| (model.temperature_c(o.depth_m, o.t_day) - o.temperature_c).powi(2))
        .sum();
    Ok(SeasonalFit { model, rms_c: (rss / n as f64).sqrt(), n })
}

/// Fits T_a, A0, t0 and the damping depth d: [`fit_seasonal`] at each trial d, with d
/// chosen by golden-section search on the residual over ln d in
/// the range from `d_min_m` to `d_max_m` (m). Needs observations at two or more depths.
pub fn fit_seasonal_with_depth(
    observations: &[TemperatureObservation],
    d_min_m: f64,
    d_max_m: f64,
    period_days: f64,
) -> Result<SeasonalFit, TemperatureError> {
    require(d_min_m.is_finite() && d_min_m > 0.0, "d_min_m", d_min_m, "finite and > 0")?;
    require(d_max_m.is_finite() && d_max_m > d_min_m, "d_max_m", d_max_m, "finite and > d_min_m")?;
    let first = observations.first().map(|o| o.depth_m);
    if !observations.iter().any(|o| Some(o.depth_m) != first) {
        return Err(TemperatureError::Underdetermined { n: observations.len() });
    }
    let rms = |ln_d: f64| fit_seasonal(observations, ln_d.exp(), period_days).map(|f| f.rms_c);
    // Golden-section search; 60 steps shrink the bracket by 0.618⁶⁰ ≈ 3e-13.
    let g = (5f64.sqrt() - 1.0) / 2.0;
    let (mut a, mut b) = (d_min_m.ln(), d_max_m.ln());
    let (mut x1, mut x2) = (b - g * (b - a), a + g * (b - a));
    let (mut f1, mut f2) = (rms(x1)?, rms(x2)?);
    for _ in 0..60 {
        if f1 <= f2 {
            b = x2;
            (x2, f2) = (x1, f1);
            x1 = b - g * (b - a);
            f1 = rms(x1)?;
        } else {
            a = x1;
            (x1, f1) = (x2, f2);
            x2 = a + g * (b - a);
            f2 = rms(x2)?;
        }
    }
    fit_seasonal(observations, (0.5 * (a + b)).exp(), period_days)
}

/// Solves a symmetric 3×3 system by Gaussian elimination with partial pivoting; None
/// when it is (numerically) singular.
fn solve3(mut m: [[f64; 3]; 3], mut v: [f64; 3]) -> Option<[f64; 3]> {
    let scale = m.iter().flatten().fold(0.0f64, |s, x| s.max(x.abs()));
    for col in 0..3 {
        let p = (col..3).max_by(|&i, &j| m[i][col].abs().total_cmp(&m[j][col].abs()))?;
        if m[p][col].abs() <= 1e-12 * scale {
            return None;
        }
        m.swap(col, p);
        v.swap(col, p);
        let pivot = m[col];
        for row in col + 1..3 {
            let f = m[row][col] / pivot[col];
            for (x, p) in m[row][col..].iter_mut().zip(&pivot[col..]) {
                *x -= f * p;
            }
            v[row] -= f * v[col];
        }
    }
    let mut x = [0.0; 3];
    for row in (0..3).rev() {
        let s: f64 = (row + 1..3).map(|k| m[row][k] * x[k]).sum();
        x[row] = (v[row] - s) / m[row][row];
    }
    Some(x)
}

/// A measured temperature profile (for example a thermistor string uploaded with an
/// epoch): temperature (°C) at depths (m below ground), interpolated linearly in depth
/// and held constant above the shallowest and below the deepest sensor.
#[derive(Debug, Clone, PartialEq)]
pub struct TemperatureProfile {
    points: Vec<[f64; 2]>,
}

impl TemperatureProfile {
    /// A profile through `(depth m, temperature °C)` points in any order. Needs at least
    /// one point, finite values and distinct depths.
    pub fn new(mut points: Vec<[f64; 2]>) -> Result<Self, TemperatureError> {
        if points.is_empty() {
            return Err(TemperatureError::EmptyProfile);
        }
        points.sort_by(|p, q| p[0].total_cmp(&q[0]));
        for (index, p) in points.iter().enumerate() {
            if !p[0].is_finite() || !p[1].is_finite() {
                return Err(TemperatureError::NonFiniteProfile { index });
            }
            if index > 0 && p[0] <= points[index - 1][0] {
                return Err(TemperatureError::RepeatedDepth { index, depth_m: p[0] });
            }
        }
        Ok(Self { points })
    }

    /// The `(depth m, temperature °C)` points, increasing in depth.
    pub fn points(&self) -> &[[f64; 2]] {
        &self.points
    }

    /// Temperature (°C) at `depth_m`.
    pub fn temperature_c(&self, depth_m: f64) -> f64 {
        let p = &self.points;
        if depth_m <= p[0][0] {
            return p[0][1];
        }
        if depth_m >= p[p.len() - 1][0] {
            return p[p.len() - 1][1];
        }
        let i = p.partition_point(|q| q[0] <= depth_m);
        let (a, b) = (p[i - 1], p[i]);
        a[1] + (b[1] - a[1]) * (depth_m - a[0]) / (b[0] - a[0])
    }
}

/// Where a line's ground temperature comes from.
#[derive(Debug, Clone, PartialEq)]
pub enum GroundTemperature {
    /// The seasonal wave, damped and lagged with depth.
    Seasonal(SeasonalTemperature),
    /// A measured profile for the epoch (time is ignored).
    Measured(TemperatureProfile),
}

impl GroundTemperature {
    /// Temperature (°C) at `depth_m` below ground on day `t_day`.
    pub fn temperature_c(&self, depth_m: f64, t_day: f64) -> f64 {
        match self {
            GroundTemperature::Seasonal(s) => s.temperature_c(depth_m, t_day),
            GroundTemperature::Measured(p) => p.temperature_c(depth_m),
        }
    }

    /// Temperature (°C) of each cell, from its depth (m) below ground, on day `t_day`.
    /// The result has the length of `depths_m`.
    pub fn cell_temperatures(&self, depths_m: &[f64], t_day: f64) -> Vec<f64> {
        depths_m.iter().map(|&z| self.temperature_c(z, t_day)).collect()
    }
}

/// The ratio model ρ_ref = ρ_T · [1 + α (T − T_ref)] with its coefficient and reference.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TemperatureCorrection {
    alpha_per_c: f64,
    reference_c: f64,
}

impl TemperatureCorrection {
    /// Typical α: 0.02 /°C (Hayley et al. 2007 found 1.8–2.2 % per °C for 0–25 °C).
    pub const TYPICAL_ALPHA_PER_C: f64 = 0.02;

    /// A correction with coefficient `alpha_per_c` (1/°C, 0 ≤ α < 0.1) to the reference
    /// temperature `reference_c` (°C, finite).
    pub fn new(alpha_per_c: f64, reference_c: f64) -> Result<Self, TemperatureError> {
        require(
            alpha_per_c.is_finite() && (0.0..0.1).contains(&alpha_per_c),
            "alpha_per_c",
            alpha_per_c,
            "finite, 0 ≤ α < 0.1 per °C",
        )?;
        require(reference_c.is_finite(), "reference_c", reference_c, "a finite temperature")?;
        Ok(Self { alpha_per_c, reference_c })
    }

    /// The coefficient α, 1/°C.
    pub fn alpha_per_c(&self) -> f64 {
        self.alpha_per_c
    }

    /// The reference temperature T_ref, °C.
    pub fn reference_c(&self) -> f64 {
        self.reference_c
    }

    /// The factor 1 + α (T − T_ref) at `temperature_c` (dimensionless).
    pub fn factor(&self, temperature_c: f64) -> f64 {
        1.0 + self.alpha_per_c * (temperature_c - self.reference_c)
    }

    /// Brings a model observed at per-cell temperatures to the reference temperature:
    /// `out[i] = rho_ohm_m[i] · (1 + α (temperatures_c[i] − T_ref))`, Ω·m.
    pub fn to_reference(
        &self,
        rho_ohm_m: &[f64],
        temperatures_c: &[f64],
    ) -> Result<Vec<f64>, TemperatureError> {
        self.apply(rho_ohm_m, temperatures_c, |rho, f| rho * f)
    }

    /// Warms (or cools) a model at the reference temperature to per-cell temperatures:
    /// `out[i] = rho_ref_ohm_m[i] / (1 + α (temperatures_c[i] − T_ref))`, Ω·m. Exact
    /// inverse of [`Self::to_reference`].
    pub fn from_reference(
        &self,
        rho_ref_ohm_m: &[f64],
        temperatures_c: &[f64],
    ) -> Result<Vec<f64>, TemperatureError> {
        self.apply(rho_ref_ohm_m, temperatures_c, |rho, f| rho / f)
    }

    fn apply(
        &self,
        rho: &[f64],
        temps: &[f64],
        op: impl Fn(f64, f64) -> f64,
    ) -> Result<Vec<f64>, TemperatureError> {
        if temps.len() != rho.len() {
            return Err(TemperatureError::LengthMismatch {
                what: "temperatures",
                got: temps.len(),
                expected: rho.len(),
            });
        }
        rho.iter()
            .zip(temps)
            .enumerate()
            .map(|(cell, (&r, &t))| {
                if !(r.is_finite() && r > 0.0) {
                    return Err(TemperatureError::InvalidCell {
                        cell,
                        what: "resistivity",
                        value: r,
                    });
                }
                if !t.is_finite() {
                    return Err(TemperatureError::InvalidCell {
                        cell,
                        what: "temperature",
                        value: t,
                    });
                }
                let factor = self.factor(t);
                if factor <= 0.0 {
                    return Err(TemperatureError::NonPositiveFactor {
                        cell,
                        temperature_c: t,
                        factor,
                    });
                }
                Ok(op(r, factor))
            })
            .collect()
    }

    /// Corrects a per-cell model (Ω·m) at cells of the given depths (m below ground) to
    /// the reference temperature, with temperatures from `ground` on day `t_day`.
    pub fn correct_model(
        &self,
        rho_ohm_m: &[f64],
        depths_m: &[f64],
        ground: &GroundTemperature,
        t_day: f64,
    ) -> Result<Vec<f64>, TemperatureError> {
        let temps = cell_temperatures_checked(rho_ohm_m.len(), depths_m, ground, t_day)?;
        self.to_reference(rho_ohm_m, &temps)
    }

    /// Warms a per-cell model at the reference temperature (Ω·m) to the ground
    /// temperature of day `t_day` at the given cell depths (m); inverse of
    /// [`Self::correct_model`].
    pub fn warm_model(
        &self,
        rho_ref_ohm_m: &[f64],
        depths_m: &[f64],
        ground: &GroundTemperature,
        t_day: f64,
    ) -> Result<Vec<f64>, TemperatureError> {
        let temps = cell_temperatures_checked(rho_ref_ohm_m.len(), depths_m, ground, t_day)?;
        self.from_reference(rho_ref_ohm_m, &temps)
    }
}

fn cell_temperatures_checked(
    n_cells: usize,
    depths_m: &[f64],
    ground: &GroundTemperature,
    t_day: f64,
) -> Result<Vec<f64>, TemperatureError> {
    if depths_m.len() != n_cells {
        return Err(TemperatureError::LengthMismatch {
            what: "depths",
            got: depths_m.len(),
            expected: n_cells,
        });
    }
    if let Some(cell) = depths_m.iter().position(|z| !z.is_finite()) {
        return Err(TemperatureError::InvalidCell { cell, what: "depth", value: depths_m[cell] });
    }
    require(t_day.is_finite(), "t_day", t_day, "a finite day")?;
    Ok(ground.cell_temperatures(depths_m, t_day))
}

#[cfg(test)]
mod tests {
    use rand::rngs::StdRng;
    use rand::{Rng, SeedableRng};

    use super::*;

    fn seasonal(d: f64) -> SeasonalTemperature {
        SeasonalTemperature::new(SeasonalParams {
            mean_c: 11.0,
            amplitude_c: 9.0,
            t_min_day: 20.0,
            damping_depth_m: d,
            period_days: 365.0,
        })
        .unwrap()
    }

    /// Checks relative agreement of `got` with `expected` within `rel_tol`.
    fn check(what: &str, got: f64, expected: f64, rel_tol: f64) {
        let rel = (got - expected).abs() / expected.abs().max(1e-300);
        assert!(rel <= rel_tol, "{what}: got {got}, expected {expected} (rel. error {rel:.2e})");
    }

    #[test]
    fn effect_sizes_match_methods_table() {
        // METHODS §5.1 [C]: α = 0.02 and ΔT = 2, 5, 10, 15 °C give −3.8, −9.1, −16.7,
        // −23.1 % resistivity change. These are reproduced by the ratio model's warming
        // direction ρ_T = ρ_ref / (1 + αΔT) (Hayley et al. 2007): 1/1.04 − 1 = −3.85 %,
        // 1/1.1 − 1 = −9.09 %, 1/1.2 − 1 = −16.67 %, 1/1.3 − 1 = −23.08 %. The linear form
        // ρ_ref·(1 − αΔT) would give −4/−10/−20/−30 % and does not match.
        let c = TemperatureCorrection::new(0.02, 10.0).unwrap();
        for (dt, pct) in [(2.0, -3.8), (5.0, -9.1), (10.0, -16.7), (15.0, -23.1)] {
            let warm = c.from_reference(&[100.0], &[10.0 + dt]).unwrap()[0];
            let change = (warm / 100.0 - 1.0) * 100.0;
            // Table values are rounded to 0.1 %.
            assert!((change - pct).abs() <= 0.05 + 1e-9, "ΔT = {dt}: {change:.3} % vs {pct} %");
        }
    }

    #[test]
    fn warmed_then_corrected_model_returns_to_reference() {
        // Issue acceptance: a model warmed by 10 °C then corrected returns within 0.5 %.
        // The ratio model's two directions are exact inverses, so the round trip is also
        // checked to 1e-12.
        let mut rng = StdRng::seed_from_u64(11);
        let rho_ref: Vec<f64> = (0..200).map(|_| 10f64.powf(rng.random_range(0.5..3.0))).collect();
        let c = TemperatureCorrection::new(0.02, 12.0).unwrap();
        let temps = vec![22.0; rho_ref.len()];
        let warm = c.from_reference(&rho_ref, &temps).unwrap();
        let back = c.to_reference(&warm, &temps).unwrap();
        for (i, (&b, &r)) in back.iter().zip(&rho_ref).enumerate() {
            check(&format!("cell {i}"), warm[i], r / 1.2, 1e-12);
            check(&format!("cell {i}"), b, r, 1e-12); // well inside the 0.5 % bound
        }
        // Depth-dependent warming with the seasonal model, then correction.
        let ground = GroundTemperature::Seasonal(seasonal(2.24));
        let depths: Vec<f64> = (0..rho_ref.len()).map(|i| 0.05 * i as f64).collect();
        let warm = c.warm_model(&rho_ref, &depths, &ground, 200.0).unwrap();
        let back = c.correct_model(&warm, &depths, &ground, 200.0).unwrap();
        for (&b, &r) in back.iter().zip(&rho_ref) {
            check("seasonal round trip", b, r, 1e-12);
        }
    }

    #[test]
    fn damping_depth_and_lag_match_hillel_solution_table() {
        // Annual wave, d = √(2D_h/ω), ω = 2π/365 d⁻¹ (Hillel 1982, Introduction to Soil
        // Physics). Values from METHODS §5.2 [C] (computed from that solution):
        // D_h → d; amplitude ratio at 1/2/5 m; lag at 1/2/5 m in days; diurnal d in cm.
        let table = [
            (2e-7, 1.42, [0.49, 0.24, 0.03], [41.0, 82.0, 205.0], 7.4),
            (5e-7, 2.24, [0.64, 0.41, 0.11], [26.0, 52.0, 130.0], 11.7),
            (1e-6, 3.17, [0.73, 0.53, 0.21], [18.0, 37.0, 92.0], 16.6),
        ];
        for (dh, d_tab, amp, lag, diurnal_cm) in table {
            let d = damping_depth_m(dh, 365.0);
            assert!((d - d_tab).abs() <= 0.005 + 1e-9, "D_h {dh}: d = {d}"); // table to 0.01 m
            let diurnal = damping_depth_m(dh, 1.0) * 100.0;
            assert!((diurnal - diurnal_cm).abs() <= 0.05 + 1e-9, "diurnal d = {diurnal} cm");
            let s = seasonal(d);
            for (k, z) in [1.0, 2.0, 5.0].into_iter().enumerate() {
                // Table rounded to 0.01 and to whole days.
                assert!((s.amplitude_ratio(z) - amp[k]).abs() <= 0.005 + 1e-9, "amp {z} m");
                assert!((s.lag_days(z) - lag[k]).abs() <= 0.5 + 1e-9, "lag {z} m");
            }
        }
    }

    #[test]
    fn seasonal_wave_solves_the_heat_equation() {
        // Analytic check: T(z, t) must satisfy ∂T/∂t = D_h ∂²T/∂z² (Fourier's heat
        // conduction equation; Hillel 1982), with D_h = ω d²/2 in m²/day. Central
        // differences with h = 1e-2 m, 1e-2 day; truncation error O(h²) ≈ 1e-5 relative.
        let s = seasonal(2.0);
        let dh = s.omega_per_day() * 4.0 / 2.0;
        let (hz, ht) = (1e-2, 1e-2);
        for z in [0.3, 1.0, 2.5, 4.0] {
            for t in [0.0, 73.0, 150.0, 300.0] {
                let dtdt = (s.temperature_c(z, t + ht) - s.temperature_c(z, t - ht)) / (2.0 * ht);
                let d2tdz2 = (s.temperature_c(z + hz, t) - 2.0 * s.temperature_c(z, t)
                    + s.temperature_c(z - hz, t))
                    / (hz * hz);
                let scale = s.params().amplitude_c * s.amplitude_ratio(z) * s.omega_per_day();
                assert!((dtdt - dh * d2tdz2).abs() <= 1e-4 * scale, "z {z} t {t}");
            }
        }
        // Surface minimum at t0, mean T_a at t0 + period/4, maximum at t0 + period/2.
        check("min", s.temperature_c(0.0, 20.0), 11.0 - 9.0, 1e-12);
        check("mean", s.temperature_c(0.0, 20.0 + 365.0 / 4.0), 11.0, 1e-12);
        check("max", s.temperature_c(0.0, 20.0 + 365.0 / 2.0), 11.0 + 9.0, 1e-12);
        // At depth z the minimum arrives lag_days later, damped by e^{−z/d}.
        let z = 1.5;
        let tmin = 20.0 + s.lag_days(z);
        check("damped min", s.temperature_c(z, tmin), 11.0 - 9.0 * s.amplitude_ratio(z), 1e-12);
    }

    #[test]
    fn seasonal_fit_recovers_the_wave_from_a_thermistor_string() {
        // Synthetic thermistor string (0.5, 1, 2, 4 m; weekly for two years) from the
        // Hillel 1982 solution with d = 2.24 m (D_h = 5e-7 m²/s, METHODS §5.2), plus
        // 0.1 °C Gaussian noise. The fits must recover the generating values.
        use rand_distr::StandardNormal;
        let truth = SeasonalTemperature::new(SeasonalParams {
            mean_c: 10.5,
            amplitude_c: 8.0,
            t_min_day: 25.0,
            damping_depth_m: 2.24,
            period_days: 365.0,
        })
        .unwrap();
        let mut rng = StdRng::seed_from_u64(21);
        let mut obs = Vec::new();
        for week in 0..104 {
            for z in [0.5, 1.0, 2.0, 4.0] {
                let t = 7.0 * week as f64;
                let e: f64 = rng.sample(StandardNormal);
                obs.push(TemperatureObservation {
                    depth_m: z,
                    t_day: t,
                    temperature_c: truth.temperature_c(z, t) + 0.1 * e,
                });
            }
        }
        for fit in [
            fit_seasonal(&obs, 2.24, 365.0).unwrap(),
            fit_seasonal_with_depth(&obs, 0.3, 10.0, 365.0).unwrap(),
        ] {
            let p = fit.model().params();
            // Tolerances: a few standard errors of 416 readings with 0.1 °C noise.
            assert!((p.mean_c - 10.5).abs() < 0.03, "{p:?}");
            assert!((p.amplitude_c - 8.0).abs() < 0.1, "{p:?}");
            assert!((p.t_min_day - 25.0).abs() < 1.0, "{p:?}");
            assert!((p.damping_depth_m - 2.24).abs() < 0.05, "{p:?}");
            assert!((fit.rms_c() - 0.1).abs() < 0.02, "rms {}", fit.rms_c());
        }
        // One depth, one day: nothing to fit.
        assert_eq!(
            fit_seasonal(&obs[..1], 2.0, 365.0),
            Err(TemperatureError::Underdetermined { n: 1 })
        );
        let one_depth: Vec<_> = obs.iter().filter(|o| o.depth_m == 1.0).copied().collect();
        assert!(matches!(
            fit_seasonal_with_depth(&one_depth, 0.3, 10.0, 365.0),
            Err(TemperatureError::Underdetermined { .. })
        ));
    }

    #[test]
    fn measured_profile_interpolates_linearly() {
        let p = TemperatureProfile::new(vec![[2.0, 10.0], [0.5, 16.0], [5.0, 10.6]]).unwrap();
        check("above", p.temperature_c(0.0), 16.0, 1e-15);
        check("between", p.temperature_c(1.25), 13.0, 1e-12);
        check("between", p.temperature_c(3.5), 10.3, 1e-12);
        check("below", p.temperature_c(9.0), 10.6, 1e-15);
        let g = GroundTemperature::Measured(p);
        assert_eq!(g.cell_temperatures(&[0.5, 2.0], 123.0), vec![16.0, 10.0]);
    }

    #[test]
    fn invalid_inputs_are_named() {
        assert!(matches!(
            TemperatureCorrection::new(-0.01, 10.0),
            Err(TemperatureError::InvalidParameter { name: "alpha_per_c", .. })
        ));
        assert_eq!(TemperatureProfile::new(vec![]), Err(TemperatureError::EmptyProfile));
        assert_eq!(
            TemperatureProfile::new(vec![[1.0, 5.0], [1.0, 6.0]]),
            Err(TemperatureError::RepeatedDepth { index: 1, depth_m: 1.0 })
        );
        let c = TemperatureCorrection::new(0.02, 10.0).unwrap();
        assert_eq!(
            c.to_reference(&[100.0, 100.0], &[10.0]),
            Err(TemperatureError::LengthMismatch { what: "temperatures", got: 1, expected: 2 })
        );
        // 1 + 0.02·(−60 − 10) = −0.4: the ratio model does not apply.
        assert!(matches!(
            c.to_reference(&[100.0, 100.0], &[10.0, -60.0]),
            Err(TemperatureError::NonPositiveFactor { cell: 1, .. })
        ));
        assert_eq!(
            c.to_reference(&[100.0, -1.0], &[10.0, 10.0]),
            Err(TemperatureError::InvalidCell { cell: 1, what: "resistivity", value: -1.0 })
        );
        assert!(matches!(
            SeasonalTemperature::new(SeasonalParams {
                mean_c: 10.0,
                amplitude_c: 5.0,
                t_min_day: 0.0,
                damping_depth_m: 0.0,
                period_days: 365.0
            }),
            Err(TemperatureError::InvalidParameter { name: "damping_depth_m", .. })
        ));
        assert!(damping_depth_m(-1.0, 365.0).is_nan());
    }
}
