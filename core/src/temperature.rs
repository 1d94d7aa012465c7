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
