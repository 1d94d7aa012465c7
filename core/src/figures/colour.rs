//! Colour maps and the scales that turn values into colours.
//!
//! - [`SequentialMap`]: perceptually uniform sequential maps — viridis, magma
//!   (van der Walt & Smith 2015, matplotlib) — and the single-hue ColorBrewer
//!   Oranges (Harrower & Brewer 2003), as ported by `colorous`. (d3's cividis
//!   is a polynomial fit that strays up to 13/255 from matplotlib's table, so
//!   it is not offered.)
//! - [`LogScale`]: position t = ln(v/lo) / ln(hi/lo) on the map, clamped to
//!   [0, 1] (resistivity in Ω·m, apparent resistivity).
//! - [`LinearScale`]: t = (v − lo)/(hi − lo), clamped (errors in %, shares).
//! - [`DivergingScale`]: change in % on ColorBrewer RdBu with symmetric limits
//!   ±L: t = ½ − v/(2L), so 0 % sits at the neutral centre, **a drop (wetter)
//!   is blue** and a rise (drier) is red.
//! - [`fade`]: mixes a colour with white, `c + s·(255 − c)`, for cells of low
//!   sensitivity.

use crate::figures::FigureError;
use crate::figures::ticks::{linear_ticks, log_ticks};

/// An sRGB colour, 8 bits per channel.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Rgb(pub u8, pub u8, pub u8);

impl Rgb {
    /// The channels as an array `[r, g, b]`.
    pub fn to_array(self) -> [u8; 3] {
        [self.0, self.1, self.2]
    }
}

impl From<colorous::Color> for Rgb {
    fn from(c: colorous::Color) -> Self {
        Rgb(c.r, c.g, c.b)
    }
}

/// A sequential colour map, evaluated at t ∈ [0, 1] (clamped).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SequentialMap {
    /// Dark purple → blue → green → yellow (matplotlib's default).
    Viridis,
    /// Black → purple → orange → pale yellow.
    Magma,
    /// Near-white → dark orange (single hue; 0 is almost white).
    Oranges,
}

impl SequentialMap {
    /// The colour at position `t` (0 = low end, 1 = high end; clamped).
    pub fn at(self, t: f64) -> Rgb {
        let g = match self {
            SequentialMap::Viridis => colorous::VIRIDIS,
            SequentialMap::Magma => colorous::MAGMA,
            SequentialMap::Oranges => colorous::ORANGES,
        };
        let t = if t.is_nan() { 0.0 } else { t.clamp(0.0, 1.0) };
        g.eval_continuous(t).into()
    }
}

/// Mixes `c` with white: share 0 keeps the colour, 1 gives white.
pub fn fade(c: Rgb, share: f64) -> Rgb {
    let s = share.clamp(0.0, 1.0);
    let f = |v: u8| (f64::from(v) + s * (255.0 - f64::from(v))).round() as u8;
    Rgb(f(c.0), f(c.1), f(c.2))
}

fn check_range(lo: f64, hi: f64) -> Result<(), FigureError> {
    if !lo.is_finite() || !hi.is_finite() {
        return Err(FigureError::BadLimits { lo, hi, reason: "limits must be finite" });
    }
    if hi <= lo {
        return Err(FigureError::BadLimits {
            lo,
            hi,
            reason: "the upper limit must exceed the lower",
        });
    }
    Ok(())
}

/// A logarithmic colour scale from `lo` to `hi` (same unit as the values).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LogScale {
    lo: f64,
    hi: f64,
    map: SequentialMap,
}

impl LogScale {
    /// A scale on `[lo, hi]` with 0 < lo < hi.
    pub fn new(lo: f64, hi: f64, map: SequentialMap) -> Result<Self, FigureError> {
        check_range(lo, hi)?;
        if lo <= 0.0 {
            return Err(FigureError::BadLimits {
                lo,
                hi,
                reason: "a log scale needs positive limits",
            });
        }
        Ok(Self { lo, hi, map })
    }

    /// Limits (lo, hi).
    pub fn limits(&self) -> (f64, f64) {
        (self.lo, self.hi)
    }

    /// Position on the map: ln(v/lo)/ln(hi/lo), clamped to [0, 1].
    pub fn position(&self, v: f64) -> f64 {
        ((v / self.lo).ln() / (self.hi / self.lo).ln()).clamp(0.0, 1.0)
    }

    /// The colour of value `v`.
    pub fn colour(&self, v: f64) -> Rgb {
        self.map.at(self.position(v))
    }
}

/// A linear colour scale from `lo` to `hi`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LinearScale {
    lo: f64,
    hi: f64,
    map: SequentialMap,
}

impl LinearScale {
    /// A scale on `[lo, hi]`, lo < hi, both finite.
    pub fn new(lo: f64, hi: f64, map: SequentialMap) -> Result<Self, FigureError> {
        check_range(lo, hi)?;
        Ok(Self { lo, hi, map })
    }

    /// Limits (lo, hi).
    pub fn limits(&self) -> (f64, f64) {
        (self.lo, self.hi)
    }

    /// Position on the map: (v − lo)/(hi − lo), clamped to [0, 1].
    pub fn position(&self, v: f64) -> f64 {
        ((v - self.lo) / (self.hi - self.lo)).clamp(0.0, 1.0)
    }

    /// The colour of value `v`.
    pub fn colour(&self, v: f64) -> Rgb {
        self.map.at(self.position(v))
    }
}

/// A diverging scale for change in percent, symmetric about 0 %.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DivergingScale {
    limit: f64,
}

impl DivergingScale {
    /// Limits −`limit` … +`limit` %, `limit` > 0.
    pub fn new(limit: f64) -> Result<Self, FigureError> {
        check_range(-limit, limit)?;
        Ok(Self { limit })
    }

    /// The smallest limit of the form 1, 2, 2.5 or 5 × 10ᵏ % that covers
    /// `max_abs` (at least 1 %).
    pub fn covering(max_abs: f64) -> Self {
        let x = if max_abs.is_finite() { max_abs.abs().max(1.0) } else { 1.0 };
        let e = x.log10().floor();
        let p = 10f64.powf(e);
        let m = [1.0, 2.0, 2.5, 5.0, 10.0].into_iter().find(|m| m * p >= x * (1.0 - 1e-12));
        Self { limit: m.unwrap_or(10.0) * p }
    }

    /// The symmetric limit L, %.
    pub fn limit(&self) -> f64 {
        self.limit
    }

    /// Position on the RdBu map: ½ − v/(2L), clamped (0 = red end, 1 = blue end).
    pub fn position(&self, v: f64) -> f64 {
        (0.5 - v / (2.0 * self.limit)).clamp(0.0, 1.0)
    }

    /// The colour of a change of `v` % (drops blue, rises red).
    pub fn colour(&self, v: f64) -> Rgb {
        colorous::RED_BLUE.eval_continuous(self.position(v)).into()
    }
}

/// Any of the colour scales, with what a colour bar needs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ColourScale {
    /// Logarithmic.
    Log(LogScale),
    /// Linear.
    Linear(LinearScale),
    /// Diverging about zero.
    Diverging(DivergingScale),
}

impl ColourScale {
    /// The colour of value `v`.
    pub fn colour(&self, v: f64) -> Rgb {
        match self {
            ColourScale::Log(s) => s.colour(v),
            ColourScale::Linear(s) => s.colour(v),
            ColourScale::Diverging(s) => s.colour(v),
        }
    }

    /// Where `v` sits along the colour bar, 0 (left/low) to 1 (right/high).
    /// For the diverging scale this runs from −L to +L.
    pub fn bar_position(&self, v: f64) -> f64 {
        match self {
            ColourScale::Log(s) => s.position(v),
            ColourScale::Linear(s) => s.position(v),
            ColourScale::Diverging(s) => 1.0 - s.position(v),
        }
    }

    /// The value at bar position `u` ∈ [0, 1].
    pub fn value_at(&self, u: f64) -> f64 {
        match self {
            ColourScale::Log(s) => s.lo * (s.hi / s.lo).powf(u),
            ColourScale::Linear(s) => s.lo + u * (s.hi - s.lo),
            ColourScale::Diverging(s) => (2.0 * u - 1.0) * s.limit,
        }
    }

    /// Colour-bar ticks: log decades, or nice linear steps (at most `max`);
    /// the diverging scale shows −L, −L/2, 0, L/2, L (or −L, 0, L when fewer
    /// than five fit) so its limits are always labelled.
    pub fn ticks(&self, max: usize) -> Vec<f64> {
        match self {
            ColourScale::Log(s) => log_ticks(s.lo, s.hi, max),
            ColourScale::Linear(s) => linear_ticks(s.lo, s.hi, max),
            ColourScale::Diverging(s) => {
                let l = s.limit;
                if max >= 5 { vec![-l, -0.5 * l, 0.0, 0.5 * l, l] } else { vec![-l, 0.0, l] }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Checks a colour against a reference within `tol` per channel.
    fn check(got: Rgb, expected: [u8; 3], tol: u8, what: &str) {
        let d = (0..3).map(|i| got.to_array()[i].abs_diff(expected[i])).max().unwrap();
        assert!(d <= tol, "{what}: got {got:?}, expected {expected:?} (tolerance {tol})");
    }

    #[test]
    fn sequential_maps_match_matplotlib() {
        // Reference: matplotlib 3.11 `colormaps[name](t)` × 255, rounded
        // (viridis #440154 / #21918c / #fde725 are also the published endpoints
        // and midpoint of the listed map). colorous samples d3's 256-entry copy
        // of the same tables: tolerance 2 per channel.
        let cases: [(SequentialMap, f64, [u8; 3], u8); 10] = [
            (SequentialMap::Viridis, 0.0, [68, 1, 84], 2),
            (SequentialMap::Viridis, 0.25, [59, 82, 139], 2),
            (SequentialMap::Viridis, 0.5, [33, 145, 140], 2),
            (SequentialMap::Viridis, 0.75, [94, 201, 98], 2),
            (SequentialMap::Viridis, 1.0, [253, 231, 37], 2),
            (SequentialMap::Magma, 0.0, [0, 0, 4], 2),
            (SequentialMap::Magma, 0.5, [183, 55, 121], 2),
            (SequentialMap::Magma, 1.0, [252, 253, 191], 2),
            // ColorBrewer Oranges, 9-class ends #fff5eb and #7f2704 (Brewer, from memory).
            (SequentialMap::Oranges, 0.0, [255, 245, 235], 2),
            (SequentialMap::Oranges, 1.0, [127, 39, 4], 2),
        ];
        for (map, t, rgb, tol) in cases {
            check(map.at(t), rgb, tol, &format!("{map:?}({t})"));
        }
        // Clamped outside [0, 1].
        assert_eq!(SequentialMap::Viridis.at(-3.0), SequentialMap::Viridis.at(0.0));
        assert_eq!(SequentialMap::Viridis.at(7.0), SequentialMap::Viridis.at(1.0));
    }

    #[test]
    fn diverging_scale_is_centred_and_blue_for_drops() {
        let s = DivergingScale::new(20.0).unwrap();
        // matplotlib 3.11 RdBu: (0) #67001f, (0.5) #f6f7f7, (1) #053061. d3's
        // RdBu (used by colorous) is a B-spline through the same eleven
        // ColorBrewer colours, so the centre is a near-white within 10.
        check(s.colour(0.0), [246, 247, 247], 10, "0 %");
        check(s.colour(-20.0), [5, 48, 97], 3, "−20 % (drop): blue end");
        check(s.colour(20.0), [103, 0, 31], 3, "+20 % (rise): red end");
        check(s.colour(-100.0), [5, 48, 97], 3, "clamped");
        let c = s.colour(-10.0);
        assert!(c.2 > c.0, "a drop is bluish: {c:?}");
        assert_eq!(s.position(0.0), 0.5);
        let cs = ColourScale::Diverging(s);
        assert_eq!(cs.bar_position(-20.0), 0.0);
        assert_eq!(cs.value_at(0.75), 10.0);
        assert_eq!(cs.ticks(7), vec![-20.0, -10.0, 0.0, 10.0, 20.0]);
        assert_eq!(cs.ticks(4), vec![-20.0, 0.0, 20.0]);
        assert_eq!(DivergingScale::covering(23.0).limit(), 25.0);
        assert_eq!(DivergingScale::covering(0.2).limit(), 1.0);
        assert_eq!(DivergingScale::covering(50.0).limit(), 50.0);
        assert_eq!(DivergingScale::covering(51.0).limit(), 100.0);
        assert!(DivergingScale::new(0.0).is_err());
    }

    #[test]
    fn log_and_linear_positions() {
        let s = LogScale::new(10.0, 1000.0, SequentialMap::Viridis).unwrap();
        // 100 Ω·m is one decade of two: the middle of the map.
        assert!((s.position(100.0) - 0.5).abs() < 1e-12);
        assert_eq!(s.colour(100.0), SequentialMap::Viridis.at(0.5));
        let cs = ColourScale::Log(s);
        assert!((cs.value_at(0.5) - 100.0).abs() < 1e-9);
        assert_eq!(cs.ticks(8), vec![10.0, 100.0, 1000.0]);
        assert!(matches!(
            LogScale::new(0.0, 10.0, SequentialMap::Viridis),
            Err(FigureError::BadLimits { .. })
        ));
        let l = LinearScale::new(0.0, 8.0, SequentialMap::Magma).unwrap();
        assert_eq!(l.position(2.0), 0.25);
        assert!(LinearScale::new(1.0, 1.0, SequentialMap::Magma).is_err());
        // Fading: share 0.6 of white.
        assert_eq!(fade(Rgb(0, 100, 255), 0.6), Rgb(153, 193, 255));
        assert_eq!(fade(Rgb(10, 20, 30), 0.0), Rgb(10, 20, 30));
    }
}
