//! Change zones: connected groups of section cells whose resistivity changed,
//! their measures and outlines, the lateral-contrast rule, noise calibration,
//! seasonal envelopes and tracking across epochs.
//!
//! Conventions: `x` chainage (m), `z` elevation (m, up positive), depth below
//! the ground surface (m, down positive), areas in m². A cell's change is
//! `c = (ρ_t/ρ_0 − 1)·100` in percent against the baseline, already corrected
//! for temperature upstream; a drop in resistivity (wetting) is negative,
//! so a "drop" zone gathers cells with `c ≤ threshold < 0` and a "rise" zone
//! cells with `c ≥ threshold > 0`. Only cells inside the sensitivity mask take
//! part. Two cells are connected when they share a whole edge
//! ([`SectionGrid::neighbours`]); touching at a corner does not connect.
//!
//! **Lateral contrast.** During a flood the whole embankment gets wetter, so
//! most cells at a given depth change together. The section is cut into depth
//! bands of a fixed thickness (by cell-centroid depth). Each band's background
//! `b` is the area-weighted median change of its in-mask cells (bands with too
//! few cells have none). A cell is judged on its change relative to that
//! background, in the same multiplicative sense as the change itself:
//! `r = ((1 + c/100) / (1 + b/100) − 1)·100`, i.e. the ratio of the cell's
//! resistivity ratio to the band's. A band is *wetted* when the share of its
//! in-mask area with `c ≤ wetting threshold` reaches `extensive_share`
//! (0.5 means: its median has reached the threshold). Any wetted band makes
//! one line-wide wetting notice for the epoch ([`LineWideWetting`]); a confined
//! seepage path still stands out in `r` while everything around it changes.
//!
//! **River stage.** During a flood the ground below the river's water level
//! gets wetter: the river soaks the waterside slope and raises the phreatic
//! surface in the fill, which in a levee lies below the river stage (water
//! flows from the river into the levee). [`below_stage`] flags the cells whose
//! centroid elevation lies below the stage plus a margin (the capillary fringe
//! above the water table and the inversion's vertical smoothing). The stage
//! must be an elevation in the section's datum (the electrodes' z): a gauge
//! reading on another datum must be converted first.
//!
//! **Noise calibration.** From the change images of quiet baseline epochs each
//! cell's fluctuation is estimated robustly, σ = 1.4826·MAD (median absolute
//! deviation about the median; the factor 1/Φ⁻¹(3/4) makes it consistent with
//! the standard deviation of a Gaussian: Rousseeuw & Croux 1993, *J. Am. Stat.
//! Assoc.* 88, 1273–1283). A cell is significant when its judged change is
//! beyond k·σ. Under the assumption that the epoch noise is Gaussian,
//! zero-mean and independent between cells and epochs, a cell exceeds with
//! probability p = Φ(−k). A zone of area ≥ A needs a connected set of at least
//! m cells (m = fewest cells whose areas can reach A), and every connected set
//! of ≥ m cells contains a connected set of exactly m cells (drop leaves of a
//! spanning tree). The union bound over those sets bounds the per-epoch
//! false-zone probability by `N_m · p^m`, `N_m` the number of connected m-cell
//! sets of the in-mask cells (counted exactly by Redelmeier's method, Redelmeier
//! 1981, *Discrete Math.* 36, 191–203, generalised to a graph); a persistence
//! of n epochs needs a zone in each of n independent epochs, so the bound for a
//! raise is `(N_m p^m)^n`. Other conditions on a zone (fixed thresholds,
//! width, seasonal envelope) only remove zones, so the bound still holds. Smoothing in the inversion correlates neighbouring
//! cells, which raises the true rate: the bound holds for the stated noise
//! model, not for correlated noise.
//!
//! **Tracking.** Zones of consecutive epochs are matched by overlap area
//! (shared cells). Each track picks as heir the overlapping new zone with the
//! largest area (so on a split the larger part keeps the identity); when
//! several tracks have the same heir the oldest track survives (ties: larger
//! overlap, then smaller id) and the others are merged into it. New zones that
//! overlap a track but are nobody's heir are split-offs with a new identity.

use std::collections::HashMap;
use std::collections::VecDeque;

use thiserror::Error;

use crate::section::SectionGrid;

/// 1/Φ⁻¹(3/4): scales a median absolute deviation to a Gaussian standard deviation.
pub const MAD_TO_SIGMA: f64 = 1.482_602_218_505_602;

/// Mean length of the Gregorian year in days, used to place an epoch in its season.
pub const DAYS_PER_YEAR: f64 = 365.2425;

const SECONDS_PER_DAY: f64 = 86_400.0;

/// Why a zone computation cannot run on its input.
#[derive(Debug, Error, PartialEq)]
pub enum ZonesError {
    /// A per-cell slice does not have one value per cell.
    #[error("{what}: expected {expected} values (one per cell), got {got}")]
    LengthMismatch {
        /// Which input.
        what: &'static str,
        /// Number of cells in the grid.
        expected: usize,
        /// Values given.
        got: usize,
    },
    /// A value that must be a finite number is not.
    #[error("{what}: the value at cell {cell} is not a finite number")]
    NonFinite {
        /// Which input.
        what: &'static str,
        /// Cell index.
        cell: usize,
    },
    /// A change at or below −100 % (resistivity cannot vanish).
    #[error("change at cell {cell} is {value} %, at or below −100 % (ρ_t/ρ_0 must stay positive)")]
    ChangeBelowFloor {
        /// Cell index.
        cell: usize,
        /// The change, %.
        value: f64,
    },
    /// A parameter is outside its allowed range.
    #[error("parameter {name} = {value}: {reason}")]
    InvalidParameter {
        /// Parameter name.
        name: &'static str,
        /// The value given.
        value: f64,
        /// The allowed range.
        reason: &'static str,
    },
    /// Too few quiet epochs to calibrate the noise.
    #[error("noise calibration needs at least {need} quiet epochs, got {got}")]
    TooFewEpochs {
        /// Epochs given.
        got: usize,
        /// Epochs needed.
        need: usize,
    },
    /// Epochs must be given in increasing time.
    #[error("epoch time {time} s is not after the previous epoch at {previous} s")]
    TimeNotIncreasing {
        /// The time given, s since the Unix epoch.
        time: i64,
        /// The previous epoch's time.
        previous: i64,
    },
    /// A zone refers to a cell the grid does not have.
    #[error("zone {zone}: cell {cell} is outside the grid of {cells} cells")]
    CellOutOfRange {
        /// Zone index in the list given.
        zone: usize,
        /// The cell index.
        cell: usize,
        /// Cells in the grid.
        cells: usize,
    },
    /// A stored tracker state is inconsistent.
    #[error("tracker state: {0}")]
    InvalidState(String),
}

fn check_len(what: &'static str, expected: usize, got: usize) -> Result<(), ZonesError> {
    if expected == got { Ok(()) } else { Err(ZonesError::LengthMismatch { what, expected, got }) }
}

fn invalid(name: &'static str, value: f64, reason: &'static str) -> ZonesError {
    ZonesError::InvalidParameter { name, value, reason }
}

/// Which way a zone's resistivity moved.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Direction {
    /// Resistivity fell (change < 0): wetting, seepage.
    Drop,
    /// Resistivity rose (change > 0): drying, or loss of fines in a clay core.
    Rise,
}

impl Direction {
    /// True when `value` (%) is at or beyond `threshold` (%) in this direction.
    pub fn beyond(self, value: f64, threshold: f64) -> bool {
        match self {
            Direction::Drop => value <= threshold,
            Direction::Rise => value >= threshold,
        }
    }

    /// −1 for a drop, +1 for a rise: the sign of a change in this direction.
    pub fn sign(self) -> f64 {
        match self {
            Direction::Drop => -1.0,
            Direction::Rise => 1.0,
        }
    }
}

/// Thresholds turning normalised coverage (cumulative sensitivity scaled to a
/// maximum of 1, METHODS §3.4) into the mask and the "good sensitivity" flag.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CoverageLevels {
    /// Cells with coverage ≥ this are inside the mask (0 < mask ≤ good ≤ 1).
    pub mask: f64,
    /// Cells with coverage ≥ this have good sensitivity.
    pub good: f64,
}

impl Default for CoverageLevels {
    /// 10⁻³ and 10⁻², the ends of the range quoted in METHODS §3.4 (from memory there).
    fn default() -> Self {
        Self { mask: 1e-3, good: 1e-2 }
    }
}

/// Which cells the data constrain: inside the mask (judged at all) and with
/// good sensitivity (counted in a zone's sensitivity share). Good implies inside.
#[derive(Debug, Clone, PartialEq)]
pub struct SensitivityMask {
    in_mask: Vec<bool>,
    good: Vec<bool>,
}

impl SensitivityMask {
    /// A mask from per-cell flags; every cell inside the mask counts as good.
    pub fn from_flags(in_mask: Vec<bool>) -> Self {
        Self { good: in_mask.clone(), in_mask }
    }

    /// A mask from per-cell flags: inside the mask, and good sensitivity
    /// (a good cell outside the mask is not good).
    pub fn from_parts(in_mask: Vec<bool>, good: Vec<bool>) -> Self {
        let good = good.iter().zip(&in_mask).map(|(g, m)| *g && *m).collect();
        Self { in_mask, good }
    }

    /// A mask from normalised coverage values (one per cell, dimensionless).
    pub fn from_coverage(coverage: &[f64], levels: CoverageLevels) -> Result<Self, ZonesError> {
        if !(levels.mask > 0.0 && levels.mask <= levels.good) {
            return Err(invalid("mask", levels.mask, "needs 0 < mask ≤ good"));
        }
        if !levels.good.is_finite() {
            return Err(invalid("good", levels.good, "must be finite"));
        }
        if let Some(cell) = coverage.iter().position(|v| !v.is_finite()) {
            return Err(ZonesError::NonFinite { what: "coverage", cell });
        }
        Ok(Self {
            in_mask: coverage.iter().map(|&v| v >= levels.mask).collect(),
            good: coverage.iter().map(|&v| v >= levels.good).collect(),
        })
    }

    /// Per cell: inside the mask.
    pub fn in_mask(&self) -> &[bool] {
        &self.in_mask
    }

    /// Per cell: good sensitivity.
    pub fn good(&self) -> &[bool] {
        &self.good
    }
}

/// One epoch's change image on a grid: change (%) per cell with its mask.
/// Inside the mask every change is finite and above −100 %; outside it the
/// values are never read (NaN is fine there).
#[derive(Debug, Clone, PartialEq)]
pub struct ChangeField<'g> {
    grid: &'g SectionGrid,
    change: Vec<f64>,
    mask: SensitivityMask,
}

impl<'g> ChangeField<'g> {
    /// Validates `change_pct` (one value per cell, %) and `mask` against `grid`.
    pub fn new(
        grid: &'g SectionGrid,
        change_pct: Vec<f64>,
        mask: SensitivityMask,
    ) -> Result<Self, ZonesError> {
        check_len("change", grid.len(), change_pct.len())?;
        check_len("mask", grid.len(), mask.in_mask.len())?;
        for (cell, (&c, &m)) in change_pct.iter().zip(&mask.in_mask).enumerate() {
            if !m {
                continue;
            }
            if !c.is_finite() {
                return Err(ZonesError::NonFinite { what: "change", cell });
            }
            if c <= -100.0 {
                return Err(ZonesError::ChangeBelowFloor { cell, value: c });
            }
        }
        let good = mask.good.iter().zip(&mask.in_mask).map(|(&g, &m)| g && m).collect();
        Ok(Self { grid, change: change_pct, mask: SensitivityMask { in_mask: mask.in_mask, good } })
    }

    /// The grid.
    pub fn grid(&self) -> &'g SectionGrid {
        self.grid
    }

    /// Change per cell, %.
    pub fn change(&self) -> &[f64] {
        &self.change
    }

    /// The sensitivity mask.
    pub fn mask(&self) -> &SensitivityMask {
        &self.mask
    }
}

/// Geometric measures of a set of cells.
#[derive(Debug, Clone, PartialEq)]
pub struct Extent {
    area: f64,
    x_range: (f64, f64),
    z_range: (f64, f64),
    depth_range: (f64, f64),
    centroid: [f64; 2],
}

impl Extent {
    /// Measures cells `cells` (indices into `grid`, non-empty) of `grid`.
    pub fn of(grid: &SectionGrid, cells: &[usize]) -> Self {
        let mut area = 0.0;
        let (mut cx, mut cz) = (0.0, 0.0);
        let inf = f64::INFINITY;
        let (mut x, mut z, mut d) = ((inf, -inf), (inf, -inf), (inf, -inf));
        for &i in cells {
            let c = &grid.cells()[i];
            area += c.area();
            cx += c.area() * c.centroid()[0];
            cz += c.area() * c.centroid()[1];
            for p in c.polygon() {
                let depth = grid.surface().depth_below(p[0], p[1]);
                x = (x.0.min(p[0]), x.1.max(p[0]));
                z = (z.0.min(p[1]), z.1.max(p[1]));
                d = (d.0.min(depth), d.1.max(depth));
            }
        }
        Self { area, x_range: x, z_range: z, depth_range: d, centroid: [cx / area, cz / area] }
    }

    /// Area, m² (sum of the cell areas).
    pub fn area(&self) -> f64 {
        self.area
    }

    /// Chainage range (min, max), m.
    pub fn x_range(&self) -> (f64, f64) {
        self.x_range
    }

    /// Elevation range (min, max), m.
    pub fn z_range(&self) -> (f64, f64) {
        self.z_range
    }

    /// Depth below the ground surface (top, bottom), m, over the cells' vertices.
    pub fn depth_range(&self) -> (f64, f64) {
        self.depth_range
    }

    /// Area centroid (x, z), m.
    pub fn centroid(&self) -> [f64; 2] {
        self.centroid
    }

    /// Horizontal extent (max x − min x), m.
    pub fn width(&self) -> f64 {
        self.x_range.1 - self.x_range.0
    }
}

/// One connected zone of changed cells in one epoch.
#[derive(Debug, Clone, PartialEq)]
pub struct Zone {
    direction: Direction,
    cells: Vec<usize>,
    extent: Extent,
    mean_change: f64,
    peak_change: f64,
    mean_judged: f64,
    peak_judged: f64,
    good_share: f64,
}

impl Zone {
    /// Drop or rise.
    pub fn direction(&self) -> Direction {
        self.direction
    }

    /// Cell indices, ascending.
    pub fn cells(&self) -> &[usize] {
        &self.cells
    }

    /// Geometric measures (area m², ranges m, depth m, centroid m, width m).
    pub fn extent(&self) -> &Extent {
        &self.extent
    }

    /// Area-weighted mean change of the cells, %.
    pub fn mean_change(&self) -> f64 {
        self.mean_change
    }

    /// Extreme change in the zone's direction (minimum for a drop, maximum for a rise), %.
    pub fn peak_change(&self) -> f64 {
        self.peak_change
    }

    /// Area-weighted mean of the judged change (relative to the depth-band
    /// background when lateral contrast is used, else equal to the change), %.
    pub fn mean_judged(&self) -> f64 {
        self.mean_judged
    }

    /// Extreme judged change in the zone's direction, %.
    pub fn peak_judged(&self) -> f64 {
        self.peak_judged
    }

    /// Share (0–1) of the zone's area in cells with good sensitivity.
    pub fn good_share(&self) -> f64 {
        self.good_share
    }
}

/// Where and how zones are cut out of a change image.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DetectionParams {
    /// Drop or rise.
    pub direction: Direction,
    /// A cell belongs to a zone when its judged change is at or beyond this, %
    /// (negative for drops, positive for rises).
    pub threshold_pct: f64,
}

/// Connected components (edge-sharing) of the cells flagged in `member`
/// (one flag per cell). Each component is ascending; components are ordered by
/// their smallest cell.
pub fn connected_components(grid: &SectionGrid, member: &[bool]) -> Vec<Vec<usize>> {
    let mut seen = vec![false; member.len()];
    let mut out = Vec::new();
    let mut queue = VecDeque::new();
    for start in 0..member.len() {
        if !member[start] || seen[start] {
            continue;
        }
        seen[start] = true;
        queue.push_back(start);
        let mut comp = Vec::new();
        while let Some(i) = queue.pop_front() {
            comp.push(i);
            for &j in grid.neighbours(i) {
                if member[j] && !seen[j] {
                    seen[j] = true;
                    queue.push_back(j);
                }
            }
        }
        comp.sort_unstable();
        out.push(comp);
    }
    out
}

/// The change each cell is judged on: relative to the lateral background when
/// `lateral` is given, else the change itself.
fn judged<'a>(
    field: &'a ChangeField<'_>,
    lateral: Option<&'a LateralContrast>,
) -> Result<&'a [f64], ZonesError> {
    match lateral {
        Some(l) => {
            check_len("lateral contrast", field.grid.len(), l.relative.len())?;
            Ok(&l.relative)
        }
        None => Ok(&field.change),
    }
}

/// Finds the zones of one direction: connected in-mask cells whose judged
/// change is at or beyond the threshold. Zones are ordered by their smallest cell.
pub fn detect_zones(
    field: &ChangeField<'_>,
    lateral: Option<&LateralContrast>,
    params: &DetectionParams,
) -> Result<Vec<Zone>, ZonesError> {
    let t = params.threshold_pct;
    if !t.is_finite() || t * params.direction.sign() <= 0.0 {
        return Err(invalid("threshold_pct", t, "must be < 0 for drops and > 0 for rises"));
    }
    let judged = judged(field, lateral)?;
    let member: Vec<bool> = (0..field.grid.len())
        .map(|i| field.mask.in_mask[i] && params.direction.beyond(judged[i], t))
        .collect();
    Ok(connected_components(field.grid, &member)
        .into_iter()
        .map(|cells| measure_zone(field, judged, params.direction, cells))
        .collect())
}

fn measure_zone(
    field: &ChangeField<'_>,
    judged: &[f64],
    direction: Direction,
    cells: Vec<usize>,
) -> Zone {
    let extent = Extent::of(field.grid, &cells);
    let areas = field.grid.cells();
    let wmean =
        |v: &[f64]| cells.iter().map(|&i| areas[i].area() * v[i]).sum::<f64>() / extent.area;
    let peak = |v: &[f64]| {
        let s = direction.sign();
        cells
            .iter()
            .map(|&i| v[i])
            .fold(f64::NAN, |a, b| if a.is_nan() || b * s > a * s { b } else { a })
    };
    let good: f64 = cells.iter().filter(|&&i| field.mask.good[i]).map(|&i| areas[i].area()).sum();
    Zone {
        direction,
        mean_change: wmean(&field.change),
        peak_change: peak(&field.change),
        mean_judged: wmean(judged),
        peak_judged: peak(judged),
        good_share: good / extent.area,
        extent,
        cells,
    }
}

/// A vertex rounded to 1 µm, to match shared edges.
type Vertex = (i64, i64);

/// Boundary of the union of `cells` as closed rings of (x, z) vertices (m),
/// the closing vertex not repeated. Outer rings run counter-clockwise and holes
/// clockwise, so the shoelace areas of all rings add up to the cells' area.
/// Collinear vertices are dropped.
pub fn outline(grid: &SectionGrid, cells: &[usize]) -> Vec<Vec<[f64; 2]>> {
    let key = |p: [f64; 2]| ((p[0] * 1e6).round() as i64, (p[1] * 1e6).round() as i64);
    let mut count: HashMap<(Vertex, Vertex), u32> = HashMap::new();
    let mut directed = Vec::new();
    for &i in cells {
        let poly = grid.cells()[i].polygon();
        for k in 0..poly.len() {
            let (a, b) = (poly[k], poly[(k + 1) % poly.len()]);
            let (ka, kb) = (key(a), key(b));
            *count.entry(if ka < kb { (ka, kb) } else { (kb, ka) }).or_default() += 1;
            directed.push((ka, kb, a));
        }
    }
    let mut from: HashMap<(i64, i64), Vec<usize>> = HashMap::new();
    let boundary: Vec<_> = directed
        .into_iter()
        .filter(|&(ka, kb, _)| count[&if ka < kb { (ka, kb) } else { (kb, ka) }] == 1)
        .collect();
    for (e, &(ka, _, _)) in boundary.iter().enumerate() {
        from.entry(ka).or_default().push(e);
    }
    let mut used = vec![false; boundary.len()];
    let mut rings = Vec::new();
    for start in 0..boundary.len() {
        if used[start] {
            continue;
        }
        let mut ring = Vec::new();
        let mut e = start;
        loop {
            used[e] = true;
            ring.push(boundary[e].2);
            let next = from[&boundary[e].1].iter().copied().find(|&n| !used[n]);
            match next {
                Some(n) => e = n,
                None => break,
            }
        }
        rings.push(drop_collinear(ring));
    }
    rings
}

fn drop_collinear(ring: Vec<[f64; 2]>) -> Vec<[f64; 2]> {
    let n = ring.len();
    if n <= 3 {
        return ring;
    }
    let keep: Vec<bool> = (0..n)
        .map(|i| {
            let (a, b, c) = (ring[(i + n - 1) % n], ring[i], ring[(i + 1) % n]);
            let (ux, uz, vx, vz) = (b[0] - a[0], b[1] - a[1], c[0] - b[0], c[1] - b[1]);
            let cross = ux * vz - uz * vx;
            let dot = ux * vx + uz * vz;
            cross.abs() > 1e-9 * (ux.hypot(uz) * vx.hypot(vz)).max(1e-300) || dot < 0.0
        })
        .collect();
    ring.into_iter().zip(keep).filter_map(|(p, k)| k.then_some(p)).collect()
}

/// Area-weighted median of (value, weight) pairs: the smallest value whose
/// cumulative weight reaches half the total. `None` when empty.
pub fn weighted_median(pairs: &mut [(f64, f64)]) -> Option<f64> {
    if pairs.is_empty() {
        return None;
    }
    pairs.sort_by(|a, b| a.0.total_cmp(&b.0));
    let half = 0.5 * pairs.iter().map(|p| p.1).sum::<f64>();
    let mut acc = 0.0;
    for &(v, w) in pairs.iter() {
        acc += w;
        if acc >= half {
            return Some(v);
        }
    }
    pairs.last().map(|p| p.0)
}

/// Settings of the lateral-contrast rule (module docs).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LateralParams {
    /// Thickness of a depth band, m (> 0). Bands start at the ground surface.
    pub band_thickness_m: f64,
    /// Change (%) at or below which a cell counts towards a line-wide wetting (< 0).
    pub wetting_change_pct: f64,
    /// Share (0–1] of a band's in-mask area that must reach the wetting change
    /// for the band to be wetted; 0.5 means the band's median has reached it.
    pub extensive_share: f64,
    /// Bands with fewer in-mask cells get no background (their cells are judged
    /// on their own change) and are never wetted.
    pub min_band_cells: usize,
}

impl LateralParams {
    fn validate(&self) -> Result<(), ZonesError> {
        if !(self.band_thickness_m > 0.0 && self.band_thickness_m.is_finite()) {
            return Err(invalid("band_thickness_m", self.band_thickness_m, "must be > 0"));
        }
        if !(self.wetting_change_pct < 0.0 && self.wetting_change_pct > -100.0) {
            return Err(invalid(
                "wetting_change_pct",
                self.wetting_change_pct,
                "must be in (−100, 0)",
            ));
        }
        if !(self.extensive_share > 0.0 && self.extensive_share <= 1.0) {
            return Err(invalid("extensive_share", self.extensive_share, "must be in (0, 1]"));
        }
        if self.min_band_cells == 0 {
            return Err(invalid("min_band_cells", 0.0, "must be ≥ 1"));
        }
        Ok(())
    }
}

/// One depth band of the lateral-contrast rule.
#[derive(Debug, Clone, PartialEq)]
pub struct DepthBand {
    /// Top of the band below ground, m.
    pub top_m: f64,
    /// Bottom of the band below ground, m.
    pub bottom_m: f64,
    /// In-mask cells whose centroid lies in the band.
    pub cells: usize,
    /// Their area, m².
    pub area_m2: f64,
    /// Area-weighted median change of those cells, %; `None` with too few cells.
    pub background_pct: Option<f64>,
    /// Share (0–1) of the band's in-mask area at or below the wetting change.
    pub wetted_share: f64,
    /// True when the band counts as wetted along the line.
    pub wetted: bool,
}

/// The one line-wide wetting notice of an epoch.
#[derive(Debug, Clone, PartialEq)]
pub struct LineWideWetting {
    /// Top of the shallowest wetted band below ground, m.
    pub depth_top_m: f64,
    /// Bottom of the deepest wetted band below ground, m.
    pub depth_bottom_m: f64,
    /// Area-weighted median change of all in-mask cells of the wetted bands, %.
    pub median_change_pct: f64,
    /// Share (0–1) of the wetted bands' in-mask area at or below the wetting change.
    pub wetted_share: f64,
    /// Indices of the wetted bands in [`LateralContrast::bands`].
    pub bands: Vec<usize>,
    /// Chainage range (min, max) of the in-mask cells of the wetted bands, m.
    pub x_range: (f64, f64),
}

/// Result of the lateral-contrast rule for one epoch.
#[derive(Debug, Clone, PartialEq)]
pub struct LateralContrast {
    bands: Vec<DepthBand>,
    band_of_cell: Vec<Option<usize>>,
    relative: Vec<f64>,
    wetting: Option<LineWideWetting>,
}

impl LateralContrast {
    /// Depth bands from the surface down (empty bands included).
    pub fn bands(&self) -> &[DepthBand] {
        &self.bands
    }

    /// Band of each cell (`None` outside the mask).
    pub fn band_of_cell(&self) -> &[Option<usize>] {
        &self.band_of_cell
    }

    /// Change of each cell relative to its band's background, %; cells without
    /// a background (or outside the mask) keep their own change.
    pub fn relative(&self) -> &[f64] {
        &self.relative
    }

    /// The line-wide wetting notice, when any band is wetted.
    pub fn wetting(&self) -> Option<&LineWideWetting> {
        self.wetting.as_ref()
    }
}

/// Applies the lateral-contrast rule (module docs) to one epoch.
pub fn lateral_contrast(
    field: &ChangeField<'_>,
    params: &LateralParams,
) -> Result<LateralContrast, ZonesError> {
    params.validate()?;
    let cells = field.grid.cells();
    let h = params.band_thickness_m;
    let band_of_cell: Vec<Option<usize>> = (0..cells.len())
        .map(|i| field.mask.in_mask[i].then(|| (cells[i].depth().max(0.0) / h).floor() as usize))
        .collect();
    let n_bands = band_of_cell.iter().flatten().map(|b| b + 1).max().unwrap_or(0);
    let mut members: Vec<Vec<usize>> = vec![Vec::new(); n_bands];
    for (i, b) in band_of_cell.iter().enumerate() {
        if let Some(b) = b {
            members[*b].push(i);
        }
    }
    let wet = |i: usize| field.change[i] <= params.wetting_change_pct;
    let bands: Vec<DepthBand> = members
        .iter()
        .enumerate()
        .map(|(b, m)| {
            let area: f64 = m.iter().map(|&i| cells[i].area()).sum();
            let wet_area: f64 = m.iter().filter(|&&i| wet(i)).map(|&i| cells[i].area()).sum();
            let enough = m.len() >= params.min_band_cells;
            let mut pairs: Vec<(f64, f64)> =
                m.iter().map(|&i| (field.change[i], cells[i].area())).collect();
            let share = if area > 0.0 { wet_area / area } else { 0.0 };
            DepthBand {
                top_m: b as f64 * h,
                bottom_m: (b + 1) as f64 * h,
                cells: m.len(),
                area_m2: area,
                background_pct: if enough { weighted_median(&mut pairs) } else { None },
                wetted_share: share,
                wetted: enough && share >= params.extensive_share,
            }
        })
        .collect();
    let relative = (0..cells.len())
        .map(|i| match band_of_cell[i].and_then(|b| bands[b].background_pct) {
            Some(bg) => ((1.0 + field.change[i] / 100.0) / (1.0 + bg / 100.0) - 1.0) * 100.0,
            None => field.change[i],
        })
        .collect();
    let wetted: Vec<usize> = (0..bands.len()).filter(|&b| bands[b].wetted).collect();
    let wetting = (!wetted.is_empty()).then(|| {
        let all: Vec<usize> = wetted.iter().flat_map(|&b| members[b].iter().copied()).collect();
        let mut pairs: Vec<(f64, f64)> =
            all.iter().map(|&i| (field.change[i], cells[i].area())).collect();
        let area: f64 = wetted.iter().map(|&b| bands[b].area_m2).sum();
        let wet_area: f64 = all.iter().filter(|&&i| wet(i)).map(|&i| cells[i].area()).sum();
        let ext = Extent::of(field.grid, &all);
        LineWideWetting {
            depth_top_m: bands[wetted[0]].top_m,
            depth_bottom_m: bands[wetted[wetted.len() - 1]].bottom_m,
            median_change_pct: weighted_median(&mut pairs).unwrap_or(0.0),
            wetted_share: wet_area / area,
            bands: wetted,
            x_range: ext.x_range,
        }
    });
    Ok(LateralContrast { bands, band_of_cell, relative, wetting })
}

/// Cells whose centroid elevation lies below the river stage `stage_m` plus
/// `margin_m` (module docs: same elevation datum as the section), one flag per
/// cell of `grid`.
pub fn below_stage(
    grid: &SectionGrid,
    stage_m: f64,
    margin_m: f64,
) -> Result<Vec<bool>, ZonesError> {
    if !stage_m.is_finite() {
        return Err(invalid("stage_m", stage_m, "must be a finite elevation"));
    }
    if !(margin_m.is_finite() && margin_m >= 0.0) {
        return Err(invalid("margin_m", margin_m, "must be ≥ 0"));
    }
    let level = stage_m + margin_m;
    Ok(grid.cells().iter().map(|c| c.centroid()[1] < level).collect())
}

/// Robust standard deviation 1.4826·MAD of the finite values (Rousseeuw &
/// Croux 1993); `None` when there are none.
pub fn robust_sigma(values: &[f64]) -> Option<f64> {
    let mut v: Vec<f64> = values.iter().copied().filter(|x| x.is_finite()).collect();
    let med = median(&mut v)?;
    let mut dev: Vec<f64> = v.iter().map(|x| (x - med).abs()).collect();
    median(&mut dev).map(|mad| MAD_TO_SIGMA * mad)
}

fn median(v: &mut [f64]) -> Option<f64> {
    if v.is_empty() {
        return None;
    }
    v.sort_by(f64::total_cmp);
    let n = v.len();
    Some(if n % 2 == 1 { v[n / 2] } else { 0.5 * (v[n / 2 - 1] + v[n / 2]) })
}

/// Settings of the noise calibration.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NoiseParams {
    /// Fewest quiet epochs (overall and per cell) for a σ estimate.
    pub min_epochs: usize,
    /// Lower limit on σ, % (keeps a cell that never moved from becoming hair-trigger).
    pub sigma_floor_pct: f64,
}

impl Default for NoiseParams {
    /// 5 epochs and a 0.5 % floor (common practice, no source).
    fn default() -> Self {
        Self { min_epochs: 5, sigma_floor_pct: 0.5 }
    }
}

/// Per-cell change fluctuation σ (%) measured over quiet baseline epochs.
#[derive(Debug, Clone, PartialEq)]
pub struct NoiseModel {
    sigma: Vec<Option<f64>>,
}

impl NoiseModel {
    /// Calibrates from quiet epochs: `quiet[e][i]` is the judged change (%) of
    /// cell i in epoch e (the same quantity the rules judge; NaN where the cell
    /// was outside the mask). Cells with fewer finite values than
    /// `params.min_epochs` get no σ.
    pub fn calibrate<E: AsRef<[f64]>>(
        quiet: &[E],
        params: &NoiseParams,
    ) -> Result<Self, ZonesError> {
        if params.min_epochs < 2 {
            return Err(invalid("min_epochs", params.min_epochs as f64, "must be ≥ 2"));
        }
        if !(params.sigma_floor_pct > 0.0 && params.sigma_floor_pct.is_finite()) {
            return Err(invalid("sigma_floor_pct", params.sigma_floor_pct, "must be > 0"));
        }
        if quiet.len() < params.min_epochs {
            return Err(ZonesError::TooFewEpochs { got: quiet.len(), need: params.min_epochs });
        }
        let n = quiet[0].as_ref().len();
        for e in quiet {
            check_len("quiet epoch", n, e.as_ref().len())?;
        }
        let sigma = (0..n)
            .map(|i| {
                let v: Vec<f64> =
                    quiet.iter().map(|e| e.as_ref()[i]).filter(|x| x.is_finite()).collect();
                if v.len() < params.min_epochs {
                    None
                } else {
                    robust_sigma(&v).map(|s| s.max(params.sigma_floor_pct))
                }
            })
            .collect();
        Ok(Self { sigma })
    }

    /// A model from stored σ values (%, one per cell, each > 0 or `None`).
    pub fn from_sigma(sigma: Vec<Option<f64>>) -> Result<Self, ZonesError> {
        if let Some(cell) =
            sigma.iter().position(|s| s.is_some_and(|s| !(s > 0.0 && s.is_finite())))
        {
            return Err(ZonesError::NonFinite { what: "sigma (must be finite and > 0)", cell });
        }
        Ok(Self { sigma })
    }

    /// σ per cell, %; `None` where it could not be measured.
    pub fn sigma(&self) -> &[Option<f64>] {
        &self.sigma
    }
}

/// Upper tail of the standard normal distribution, Q(k) = Φ(−k) = ½·erfc(k/√2).
pub fn normal_tail(k: f64) -> f64 {
    0.5 * libm::erfc(k / std::f64::consts::SQRT_2)
}

/// Number of connected sets of exactly `size` cells among the cells flagged in
/// `member` (edge-sharing connection), by Redelmeier's enumeration. `None` when
/// the enumeration would take more than `limit` steps.
pub fn count_connected_sets(
    grid: &SectionGrid,
    member: &[bool],
    size: usize,
    limit: u64,
) -> Option<u64> {
    if size == 0 {
        return Some(1);
    }
    struct Walk<'a> {
        grid: &'a SectionGrid,
        member: &'a [bool],
        seen: Vec<bool>,
        root: usize,
        size: usize,
        count: u64,
        steps: u64,
        limit: u64,
    }
    impl Walk<'_> {
        // Redelmeier: take each untried cell in turn; cells added to the
        // frontier stay marked for the rest of this branch, so no set repeats.
        fn grow(&mut self, mut untried: Vec<usize>, filled: usize) -> bool {
            while let Some(u) = untried.pop() {
                self.steps += 1;
                if self.steps > self.limit {
                    return false;
                }
                if filled + 1 == self.size {
                    self.count += 1;
                    continue;
                }
                let fresh: Vec<usize> = self
                    .grid
                    .neighbours(u)
                    .iter()
                    .copied()
                    .filter(|&w| w > self.root && self.member[w] && !self.seen[w])
                    .collect();
                for &w in &fresh {
                    self.seen[w] = true;
                }
                let mut next = untried.clone();
                next.extend_from_slice(&fresh);
                let ok = self.grow(next, filled + 1);
                for &w in &fresh {
                    self.seen[w] = false;
                }
                if !ok {
                    return false;
                }
            }
            true
        }
    }
    let mut walk = Walk {
        grid,
        member,
        seen: vec![false; member.len()],
        root: 0,
        size,
        count: 0,
        steps: 0,
        limit,
    };
    for root in (0..member.len()).filter(|&i| member[i]) {
        walk.root = root;
        walk.seen[root] = true;
        let ok = walk.grow(vec![root], 0);
        walk.seen[root] = false;
        if !ok {
            return None;
        }
    }
    Some(walk.count)
}

/// Settings of the false-alarm bound.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FalseAlarmParams {
    /// Multiple k of σ a cell's change must exceed (> 0).
    pub k: f64,
    /// Minimum zone area, m² (≥ 0).
    pub min_area_m2: f64,
    /// Consecutive epochs a zone must last before it raises (≥ 1).
    pub persistence: u32,
    /// Most enumeration steps before falling back to the analytic bound on
    /// the number of connected sets.
    pub max_steps: u64,
}

/// How the number of connected cell sets entered a [`FalseAlarmBound`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum SetCount {
    /// Counted exactly.
    Exact(u64),
    /// Too many to count; `n·(e(Δ−1))^(m−1)` used instead (n in-mask cells,
    /// Δ ≥ 2 the largest number of in-mask neighbours: the number of connected
    /// m-sets through a vertex is at most (e(Δ−1))^(m−1), Bollobás 2006,
    /// *The Art of Mathematics*, problem 45, from memory).
    UpperBound(f64),
}

impl SetCount {
    /// The count (or its bound) as a number.
    pub fn value(&self) -> f64 {
        match *self {
            SetCount::Exact(n) => n as f64,
            SetCount::UpperBound(b) => b,
        }
    }
}

/// The stated false-alarm rate of a line under independent Gaussian cell noise.
#[derive(Debug, Clone, PartialEq)]
pub struct FalseAlarmBound {
    /// p = Φ(−k): chance that one cell exceeds k·σ in one epoch.
    pub per_cell: f64,
    /// m: fewest in-mask cells whose area reaches the minimum area (0 when no
    /// set of in-mask cells can reach it).
    pub min_cells: usize,
    /// N_m: connected m-cell sets among the in-mask cells.
    pub connected_sets: SetCount,
    /// Bound on the chance of at least one false zone in one epoch, min(1, N_m·p^m).
    pub per_epoch: f64,
    /// Bound on the chance that a false zone raises at a given epoch after
    /// `persistence` epochs, per_epoch^persistence.
    pub per_raise: f64,
}

/// States the false-alarm bound of the module docs for the in-mask cells
/// (`in_mask`, one flag per cell) of `grid`.
pub fn false_alarm_bound(
    grid: &SectionGrid,
    in_mask: &[bool],
    params: &FalseAlarmParams,
) -> Result<FalseAlarmBound, ZonesError> {
    check_len("mask", grid.len(), in_mask.len())?;
    if !(params.k > 0.0 && params.k.is_finite()) {
        return Err(invalid("k", params.k, "must be > 0"));
    }
    if !(params.min_area_m2 >= 0.0 && params.min_area_m2.is_finite()) {
        return Err(invalid("min_area_m2", params.min_area_m2, "must be ≥ 0"));
    }
    if params.persistence == 0 {
        return Err(invalid("persistence", 0.0, "must be ≥ 1"));
    }
    let p = normal_tail(params.k);
    let mut areas: Vec<f64> =
        (0..grid.len()).filter(|&i| in_mask[i]).map(|i| grid.cells()[i].area()).collect();
    areas.sort_by(|a, b| b.total_cmp(a));
    let mut acc = 0.0;
    let mut m = 0;
    for a in &areas {
        m += 1;
        acc += a;
        if acc >= params.min_area_m2 * (1.0 - 1e-12) {
            break;
        }
    }
    if acc < params.min_area_m2 * (1.0 - 1e-12) || areas.is_empty() {
        return Ok(FalseAlarmBound {
            per_cell: p,
            min_cells: 0,
            connected_sets: SetCount::Exact(0),
            per_epoch: 0.0,
            per_raise: 0.0,
        });
    }
    let connected_sets = match count_connected_sets(grid, in_mask, m, params.max_steps) {
        Some(n) => SetCount::Exact(n),
        None => {
            let delta = (0..grid.len())
                .filter(|&i| in_mask[i])
                .map(|i| grid.neighbours(i).iter().filter(|&&j| in_mask[j]).count())
                .max()
                .unwrap_or(0)
                .max(2) as f64;
            let e = std::f64::consts::E;
            SetCount::UpperBound(areas.len() as f64 * (e * (delta - 1.0)).powi(m as i32 - 1))
        }
    };
    let per_epoch = (connected_sets.value() * p.powi(m as i32)).min(1.0);
    Ok(FalseAlarmBound {
        per_cell: p,
        min_cells: m,
        connected_sets,
        per_epoch,
        per_raise: per_epoch.powi(params.persistence as i32),
    })
}

/// Position of a time in its year, days in [0, 365.2425), from seconds since the Unix epoch.
pub fn season_day(time: i64) -> f64 {
    (time as f64 / SECONDS_PER_DAY).rem_euclid(DAYS_PER_YEAR)
}

/// Circular distance between two season days, days (0 to half a year).
pub fn season_distance(a: f64, b: f64) -> f64 {
    let d = (a - b).rem_euclid(DAYS_PER_YEAR);
    d.min(DAYS_PER_YEAR - d)
}

/// Settings for the seasonal envelope.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EnvelopeParams {
    /// Epochs within this many days of the same season day count, days (0–182).
    pub half_window_days: f64,
    /// Only epochs at least this old count ("earlier years"), days.
    pub min_age_days: f64,
    /// Fewest samples a cell needs for an envelope.
    pub min_samples: usize,
}

impl Default for EnvelopeParams {
    /// ±15 days, at least 350 days old, 3 samples (common practice, no source).
    fn default() -> Self {
        Self { half_window_days: 15.0, min_age_days: 350.0, min_samples: 3 }
    }
}

/// A past epoch's change image for the seasonal envelope.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PastEpoch<'a> {
    /// Time, s since the Unix epoch.
    pub time: i64,
    /// Change per cell, % (NaN where outside the mask).
    pub change_pct: &'a [f64],
}

/// Per-cell range of change (%) seen at the same season in earlier years
/// (Arosio et al. 2017, *Open Geosciences*: warn beyond the expected seasonal extremes).
#[derive(Debug, Clone, PartialEq)]
pub struct SeasonalEnvelope {
    lower: Vec<Option<f64>>,
    upper: Vec<Option<f64>>,
    samples: Vec<usize>,
}

impl SeasonalEnvelope {
    /// Builds the envelope for an epoch at `now` (s since the Unix epoch) from
    /// past epochs of `cells` cells.
    pub fn from_history(
        now: i64,
        cells: usize,
        history: &[PastEpoch<'_>],
        params: &EnvelopeParams,
    ) -> Result<Self, ZonesError> {
        let hw = params.half_window_days;
        if !(0.0..=DAYS_PER_YEAR / 2.0).contains(&hw) {
            return Err(invalid("half_window_days", hw, "must be in [0, 182.6]"));
        }
        if !(params.min_age_days >= 0.0 && params.min_age_days.is_finite()) {
            return Err(invalid("min_age_days", params.min_age_days, "must be ≥ 0"));
        }
        if params.min_samples == 0 {
            return Err(invalid("min_samples", 0.0, "must be ≥ 1"));
        }
        let day = season_day(now);
        let mut lower = vec![f64::INFINITY; cells];
        let mut upper = vec![f64::NEG_INFINITY; cells];
        let mut samples = vec![0usize; cells];
        for past in history {
            check_len("past epoch", cells, past.change_pct.len())?;
            let age = (now - past.time) as f64 / SECONDS_PER_DAY;
            if age < params.min_age_days || season_distance(season_day(past.time), day) > hw {
                continue;
            }
            for (i, &c) in past.change_pct.iter().enumerate() {
                if c.is_finite() {
                    lower[i] = lower[i].min(c);
                    upper[i] = upper[i].max(c);
                    samples[i] += 1;
                }
            }
        }
        let pick = |v: Vec<f64>| {
            v.into_iter()
                .zip(&samples)
                .map(|(x, &n)| (n >= params.min_samples).then_some(x))
                .collect::<Vec<_>>()
        };
        Ok(Self { lower: pick(lower), upper: pick(upper), samples })
    }

    /// Lowest change per cell at this season in earlier years, %.
    pub fn lower(&self) -> &[Option<f64>] {
        &self.lower
    }

    /// Highest change per cell at this season in earlier years, %.
    pub fn upper(&self) -> &[Option<f64>] {
        &self.upper
    }

    /// Samples per cell that went into the envelope.
    pub fn samples(&self) -> &[usize] {
        &self.samples
    }
}

/// Settings of the zone tracker.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TrackerParams {
    /// A track missing for more consecutive epochs than this ends; until then
    /// a zone overlapping its last cells resumes it.
    pub max_missed_epochs: u32,
}

impl Default for TrackerParams {
    /// 2 epochs (common practice, no source).
    fn default() -> Self {
        Self { max_missed_epochs: 2 }
    }
}

/// A zone's measures in one epoch, kept in its track's history.
#[derive(Debug, Clone, PartialEq)]
pub struct ZoneSnapshot {
    /// Epoch time, s since the Unix epoch.
    pub time: i64,
    /// Area, m².
    pub area_m2: f64,
    /// Area-weighted mean change, %.
    pub mean_change_pct: f64,
    /// Extreme change in the zone's direction (the minimum for a drop), %.
    pub peak_change_pct: f64,
    /// Extreme judged (relative) change, %.
    pub peak_judged_pct: f64,
    /// Area centroid (x, z), m.
    pub centroid: [f64; 2],
    /// Chainage range, m.
    pub x_range: (f64, f64),
}

/// A zone's identity across epochs with its history.
#[derive(Debug, Clone, PartialEq)]
pub struct Track {
    /// Identity, unique within the tracker.
    pub id: u64,
    /// Drop or rise.
    pub direction: Direction,
    /// Identity of the track it split from, if any.
    pub parent: Option<u64>,
    /// Cells in the epoch it was last seen.
    pub cells: Vec<usize>,
    /// Consecutive epochs it has been missing.
    pub missed: u32,
    /// One snapshot per epoch it was seen, oldest first.
    pub history: Vec<ZoneSnapshot>,
}

impl Track {
    /// Time it was first seen, s.
    pub fn born(&self) -> i64 {
        self.history[0].time
    }

    /// Its latest snapshot.
    pub fn latest(&self) -> &ZoneSnapshot {
        &self.history[self.history.len() - 1]
    }
}

/// What happened to tracks in one epoch.
#[derive(Debug, Clone, PartialEq)]
pub enum TrackEvent {
    /// A zone overlapping no track got a new identity.
    Born {
        /// New identity.
        id: u64,
    },
    /// A zone split off track `parent` and got identity `id`.
    Split {
        /// Track it split from.
        parent: u64,
        /// New identity.
        id: u64,
    },
    /// Track `from` ran into the same zone as the older track `into` and ended.
    Merged {
        /// The track that ended.
        from: u64,
        /// The track that lives on.
        into: u64,
    },
    /// A missing track's zone came back.
    Resumed {
        /// Identity.
        id: u64,
    },
    /// A track matched no zone this epoch.
    Missed {
        /// Identity.
        id: u64,
    },
    /// A track was missing for too long and ended.
    Ended {
        /// Identity.
        id: u64,
    },
}

/// The tracker's answer for one epoch.
#[derive(Debug, Clone, PartialEq)]
pub struct TrackingReport {
    /// Track identity of each zone given, in the same order.
    pub ids: Vec<u64>,
    /// Births, splits, merges, misses and ends.
    pub events: Vec<TrackEvent>,
    /// Tracks that ended this epoch (merged or missing too long), with their history.
    pub ended: Vec<Track>,
}

/// The tracker's state, to store and restore between runs.
#[derive(Debug, Clone, PartialEq)]
pub struct TrackerState {
    /// Next identity to hand out.
    pub next_id: u64,
    /// Time of the last epoch, s.
    pub last_time: Option<i64>,
    /// Live tracks (seen or missing for a while).
    pub tracks: Vec<Track>,
}

/// Keeps zone identities across epochs by overlap (module docs).
#[derive(Debug, Clone, PartialEq)]
pub struct ZoneTracker {
    params: TrackerParams,
    state: TrackerState,
}

impl ZoneTracker {
    /// An empty tracker.
    pub fn new(params: TrackerParams) -> Self {
        Self { params, state: TrackerState { next_id: 1, last_time: None, tracks: Vec::new() } }
    }

    /// A tracker resuming from a stored state.
    pub fn from_state(params: TrackerParams, state: TrackerState) -> Result<Self, ZonesError> {
        let mut ids = std::collections::HashSet::new();
        for t in &state.tracks {
            if t.id >= state.next_id || !ids.insert(t.id) {
                return Err(ZonesError::InvalidState(format!(
                    "track {} is repeated or not below next_id {}",
                    t.id, state.next_id
                )));
            }
            if t.history.is_empty() || t.cells.is_empty() {
                return Err(ZonesError::InvalidState(format!("track {} has no history", t.id)));
            }
        }
        Ok(Self { params, state })
    }

    /// The current state (to store).
    pub fn state(&self) -> &TrackerState {
        &self.state
    }

    /// Live tracks.
    pub fn tracks(&self) -> &[Track] {
        &self.state.tracks
    }

    /// The live track with this identity.
    pub fn track(&self, id: u64) -> Option<&Track> {
        self.state.tracks.iter().find(|t| t.id == id)
    }

    /// Matches this epoch's zones (of either direction, cells of `grid`) to the
    /// live tracks and updates their histories.
    pub fn update(
        &mut self,
        time: i64,
        zones: &[Zone],
        grid: &SectionGrid,
    ) -> Result<TrackingReport, ZonesError> {
        if let Some(previous) = self.state.last_time.filter(|&p| time <= p) {
            return Err(ZonesError::TimeNotIncreasing { time, previous });
        }
        for (z, zone) in zones.iter().enumerate() {
            if let Some(&cell) = zone.cells.iter().find(|&&c| c >= grid.len()) {
                return Err(ZonesError::CellOutOfRange { zone: z, cell, cells: grid.len() });
            }
        }
        for t in &self.state.tracks {
            if let Some(&cell) = t.cells.iter().find(|&&c| c >= grid.len()) {
                return Err(ZonesError::InvalidState(format!(
                    "track {} holds cell {cell}, outside the grid of {} cells",
                    t.id,
                    grid.len()
                )));
            }
        }
        self.state.last_time = Some(time);
        let area = |i: usize| grid.cells()[i].area();
        let mut owner: Vec<Vec<usize>> = vec![Vec::new(); grid.len()];
        for (z, zone) in zones.iter().enumerate() {
            for &c in &zone.cells {
                owner[c].push(z);
            }
        }
        let tracks = &self.state.tracks;
        // overlap[t] = (zone, shared area) for zones of the same direction
        let overlap: Vec<Vec<(usize, f64)>> = tracks
            .iter()
            .map(|t| {
                let mut acc: HashMap<usize, f64> = HashMap::new();
                for &c in &t.cells {
                    for &z in &owner[c] {
                        if zones[z].direction == t.direction {
                            *acc.entry(z).or_default() += area(c);
                        }
                    }
                }
                let mut v: Vec<(usize, f64)> = acc.into_iter().collect();
                v.sort_by_key(|p| p.0);
                v
            })
            .collect();
        // Each track's heir: the overlapping zone with the largest area.
        let heir: Vec<Option<usize>> = overlap
            .iter()
            .map(|o| {
                o.iter()
                    .copied()
                    .max_by(|a, b| {
                        zones[a.0]
                            .extent
                            .area
                            .total_cmp(&zones[b.0].extent.area)
                            .then(a.1.total_cmp(&b.1))
                            .then(b.0.cmp(&a.0))
                    })
                    .map(|p| p.0)
            })
            .collect();
        let shared =
            |t: usize, z: usize| overlap[t].iter().find(|p| p.0 == z).map(|p| p.1).unwrap_or(0.0);
        let mut ids: Vec<Option<u64>> = vec![None; zones.len()];
        let mut events = Vec::new();
        let mut survivor_of: Vec<Option<usize>> = vec![None; tracks.len()];
        for (z, id) in ids.iter_mut().enumerate() {
            let claimants: Vec<usize> = (0..tracks.len()).filter(|&t| heir[t] == Some(z)).collect();
            let Some(&keep) = claimants.iter().min_by(|&&a, &&b| {
                tracks[a]
                    .born()
                    .cmp(&tracks[b].born())
                    .then(shared(b, z).total_cmp(&shared(a, z)))
                    .then(tracks[a].id.cmp(&tracks[b].id))
            }) else {
                continue;
            };
            *id = Some(tracks[keep].id);
            for &t in &claimants {
                survivor_of[t] = Some(keep);
                if t != keep {
                    events.push(TrackEvent::Merged { from: tracks[t].id, into: tracks[keep].id });
                }
            }
            if tracks[keep].missed > 0 {
                events.push(TrackEvent::Resumed { id: tracks[keep].id });
            }
        }
        let mut next_id = self.state.next_id;
        let mut new_tracks: Vec<Track> = Vec::new();
        for z in 0..zones.len() {
            if ids[z].is_some() {
                continue;
            }
            let id = next_id;
            next_id += 1;
            ids[z] = Some(id);
            let parent = (0..tracks.len())
                .filter(|&t| shared(t, z) > 0.0)
                .max_by(|&a, &b| shared(a, z).total_cmp(&shared(b, z)).then(b.cmp(&a)))
                .map(|t| tracks[t].id);
            events.push(match parent {
                Some(parent) => TrackEvent::Split { parent, id },
                None => TrackEvent::Born { id },
            });
            new_tracks.push(Track {
                id,
                direction: zones[z].direction,
                parent,
                cells: Vec::new(),
                missed: 0,
                history: Vec::new(),
            });
        }
        self.state.next_id = next_id;
        let ids: Vec<u64> =
            ids.into_iter().map(|i| i.expect("every zone has an identity")).collect();
        let mut ended = Vec::new();
        let mut live = Vec::new();
        for (t, mut track) in std::mem::take(&mut self.state.tracks).into_iter().enumerate() {
            match survivor_of[t] {
                Some(k) if k != t => ended.push(track),
                Some(_) => live.push(track),
                None => {
                    track.missed += 1;
                    if track.missed > self.params.max_missed_epochs {
                        events.push(TrackEvent::Ended { id: track.id });
                        ended.push(track);
                    } else {
                        events.push(TrackEvent::Missed { id: track.id });
                        live.push(track);
                    }
                }
            }
        }
        live.extend(new_tracks);
        for (z, zone) in zones.iter().enumerate() {
            let track = live.iter_mut().find(|t| t.id == ids[z]).expect("assigned track is live");
            track.cells = zone.cells.clone();
            track.missed = 0;
            track.history.push(ZoneSnapshot {
                time,
                area_m2: zone.extent.area,
                mean_change_pct: zone.mean_change,
                peak_change_pct: zone.peak_change,
                peak_judged_pct: zone.peak_judged,
                centroid: zone.extent.centroid,
                x_range: zone.extent.x_range,
            });
        }
        live.sort_by_key(|t| t.id);
        self.state.tracks = live;
        Ok(TrackingReport { ids, events, ended })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geometry::Surface;
    use crate::section::signed_area;
    use rand::{Rng, SeedableRng, rngs::StdRng};
    use rand_distr::StandardNormal;

    /// `nx` × `nz` grid of `dx` × `dz` rectangles under flat ground at z = 0;
    /// cell (i, j) (column i from x = 0, row j from the top) has index j·nx + i.
    fn grid(nx: usize, nz: usize, dx: f64, dz: f64) -> SectionGrid {
        let mut polys = Vec::new();
        for j in 0..nz {
            for i in 0..nx {
                let (x, z) = (i as f64 * dx, -(j as f64) * dz);
                polys.push(vec![[x, z], [x, z - dz], [x + dx, z - dz], [x + dx, z]]);
            }
        }
        SectionGrid::new(polys, Surface::new(vec![[0.0, 0.0], [nx as f64 * dx, 0.0]]).unwrap())
            .unwrap()
    }

    /// A field from a picture: one string per row, '#' = −30 %, '+' = −12 %,
    /// '.' = 0 %, 'x' = outside the mask, '^' = +30 %.
    fn field_from<'g>(g: &'g SectionGrid, rows: &[&str]) -> ChangeField<'g> {
        let mut change = Vec::new();
        let mut mask = Vec::new();
        for r in rows {
            for ch in r.chars() {
                let (c, m) = match ch {
                    '#' => (-30.0, true),
                    '+' => (-12.0, true),
                    '.' => (0.0, true),
                    '^' => (30.0, true),
                    'x' => (f64::NAN, false),
                    _ => panic!("bad picture character {ch}"),
                };
                change.push(c);
                mask.push(m);
            }
        }
        ChangeField::new(g, change, SensitivityMask::from_flags(mask)).unwrap()
    }

    fn drops(threshold_pct: f64) -> DetectionParams {
        DetectionParams { direction: Direction::Drop, threshold_pct }
    }

    /// Detects drop zones at −10 % in a picture and compares their cell lists.
    fn check(rows: &[&str], expected: &[&[usize]]) {
        let g = grid(rows[0].len(), rows.len(), 1.0, 1.0);
        let f = field_from(&g, rows);
        let zones = detect_zones(&f, None, &drops(-10.0)).unwrap();
        let got: Vec<&[usize]> = zones.iter().map(|z| z.cells()).collect();
        assert_eq!(got, expected, "{rows:?}");
    }

    #[test]
    fn labelling_follows_shared_edges_and_the_mask() {
        // Expected zones drawn by hand from the pictures (edge-sharing connection).
        // Two separate blobs.
        check(&["##..#", "#...#", "....."], &[&[0, 1, 5], &[4, 9]]);
        // Corner contact only: two zones.
        check(&["#....", ".#...", "....."], &[&[0], &[6]]);
        // A masked-out cell cuts a strip in two.
        check(&["##x##"], &[&[0, 1], &[3, 4]]);
        // A ring encloses an unchanged cell: one zone of 8 cells.
        check(&["###", "#.#", "###"], &[&[0, 1, 2, 3, 5, 6, 7, 8]]);
        // Rises are not drops.
        check(&["^^..."], &[]);
    }

    #[test]
    fn zone_measures() {
        // Expected values hand-computed from the 2 m × 0.5 m rectangles.
        let g = grid(6, 4, 2.0, 0.5);
        let f = field_from(&g, &["......", ".##+..", ".#+...", "......"]);
        let zones = detect_zones(&f, None, &drops(-10.0)).unwrap();
        assert_eq!(zones.len(), 1);
        let z = &zones[0];
        assert_eq!(z.cells(), &[7, 8, 9, 13, 14]);
        let e = z.extent();
        assert!((e.area() - 5.0).abs() < 1e-12); // five 2 m × 0.5 m cells
        assert_eq!(e.x_range(), (2.0, 8.0));
        assert_eq!(e.z_range(), (-1.5, -0.5));
        assert_eq!(e.depth_range(), (0.5, 1.5));
        assert!((e.width() - 6.0).abs() < 1e-12);
        // Centroid: mean of the cell centres (equal areas).
        let cx = (3.0 + 5.0 + 7.0 + 3.0 + 5.0) / 5.0;
        let cz = (-0.75 * 3.0 - 1.25 * 2.0) / 5.0;
        assert!((e.centroid()[0] - cx).abs() < 1e-12 && (e.centroid()[1] - cz).abs() < 1e-12);
        assert!((z.mean_change() - (-30.0 * 3.0 - 12.0 * 2.0) / 5.0).abs() < 1e-12);
        assert_eq!(z.peak_change(), -30.0);
        assert_eq!(z.good_share(), 1.0);
    }

    #[test]
    fn good_sensitivity_share_is_by_area() {
        let g = grid(4, 1, 1.0, 1.0);
        let mask =
            SensitivityMask::from_coverage(&[0.5, 0.005, 0.0001, 0.02], CoverageLevels::default())
                .unwrap();
        assert_eq!(mask.in_mask(), &[true, true, false, true]);
        let f = ChangeField::new(&g, vec![-20.0, -20.0, -20.0, 0.0], mask).unwrap();
        let z = detect_zones(&f, None, &drops(-10.0)).unwrap();
        assert_eq!(z.len(), 1);
        assert!((z[0].good_share() - 0.5).abs() < 1e-12);
    }

    #[test]
    fn zone_area_matches_the_shoelace_formula() {
        // Shoelace (surveyor's) formula A = ½|Σ (x_i z_{i+1} − x_{i+1} z_i)|
        // (Braden 1986, "The surveyor's area formula", College Math. J. 17, 326–337,
        // from memory). Cells: trapezoids under a sloping ground line z = 0.25 x,
        // columns 1 m wide, rows 1 m thick measured down from the ground.
        let surface = Surface::new(vec![[0.0, 0.0], [8.0, 2.0]]).unwrap();
        let top = |x: f64| 0.25 * x;
        let mut polys = Vec::new();
        for j in 0..3 {
            for i in 0..8 {
                let (x0, x1) = (i as f64, i as f64 + 1.0);
                let (d0, d1) = (j as f64, j as f64 + 1.0);
                polys.push(vec![
                    [x0, top(x0) - d0],
                    [x0, top(x0) - d1],
                    [x1, top(x1) - d1],
                    [x1, top(x1) - d0],
                ]);
            }
        }
        let g = SectionGrid::new(polys, surface).unwrap();
        let mut change = vec![0.0; 24];
        // An L-shaped zone: columns 2..6 of row 0 and column 5 of rows 1 and 2.
        for c in [2, 3, 4, 5, 13, 21] {
            change[c] = -25.0;
        }
        let f = ChangeField::new(&g, change, SensitivityMask::from_flags(vec![true; 24])).unwrap();
        let z = &detect_zones(&f, None, &drops(-10.0)).unwrap()[0];
        // Each parallelogram cell is 1 m wide with 1 m vertical sides: area 1 m².
        assert!((z.extent().area() - 6.0).abs() < 1e-12);
        let rings = outline(&g, z.cells());
        assert_eq!(rings.len(), 1);
        let a = signed_area(&rings[0]);
        assert!((a - 6.0).abs() < 1e-12, "outline area {a}");
        // Six corners of the L plus the bends of the ground line: the top edge
        // runs straight along z = 0.25 x, so it keeps only its two ends.
        assert_eq!(rings[0].len(), 6, "{:?}", rings[0]);
        // Depth: top of the zone at the ground, bottom 3 m down.
        let (top_d, bottom_d) = z.extent().depth_range();
        assert!(top_d.abs() < 1e-12 && (bottom_d - 3.0).abs() < 1e-12);
    }

    #[test]
    fn outline_of_a_ring_has_a_hole() {
        let g = grid(3, 3, 1.0, 1.0);
        let f = field_from(&g, &["###", "#.#", "###"]);
        let z = &detect_zones(&f, None, &drops(-10.0)).unwrap()[0];
        let mut areas: Vec<f64> = outline(&g, z.cells()).iter().map(|r| signed_area(r)).collect();
        areas.sort_by(f64::total_cmp);
        // Outer square 9 m² counter-clockwise, hole 1 m² clockwise.
        assert_eq!(areas.len(), 2);
        assert!((areas[0] + 1.0).abs() < 1e-12 && (areas[1] - 9.0).abs() < 1e-12);
        assert!((areas.iter().sum::<f64>() - z.extent().area()).abs() < 1e-12);
    }

    #[test]
    fn bad_inputs_are_named() {
        let g = grid(3, 1, 1.0, 1.0);
        let m = SensitivityMask::from_flags(vec![true; 3]);
        assert_eq!(
            ChangeField::new(&g, vec![0.0; 2], m.clone()),
            Err(ZonesError::LengthMismatch { what: "change", expected: 3, got: 2 })
        );
        assert_eq!(
            ChangeField::new(&g, vec![0.0, f64::NAN, 0.0], m.clone()),
            Err(ZonesError::NonFinite { what: "change", cell: 1 })
        );
        assert_eq!(
            ChangeField::new(&g, vec![0.0, 0.0, -100.0], m.clone()),
            Err(ZonesError::ChangeBelowFloor { cell: 2, value: -100.0 })
        );
        let f = ChangeField::new(&g, vec![0.0; 3], m).unwrap();
        assert!(matches!(
            detect_zones(&f, None, &drops(5.0)),
            Err(ZonesError::InvalidParameter { name: "threshold_pct", .. })
        ));
        assert!(matches!(
            NoiseModel::calibrate(&vec![vec![0.0; 3]; 2], &NoiseParams::default()),
            Err(ZonesError::TooFewEpochs { got: 2, need: 5 })
        ));
    }

    /// A line-wide −15 % change with a confined −35 % path: 40 columns of 1 m,
    /// 6 rows of 0.5 m; the path is columns 20–22 in rows 1–4.
    fn flood_field(g: &SectionGrid) -> ChangeField<'_> {
        let mut change = vec![-15.0; g.len()];
        for j in 1..5 {
            for i in 20..23 {
                change[j * 40 + i] = -35.0;
            }
        }
        ChangeField::new(g, change, SensitivityMask::from_flags(vec![true; g.len()])).unwrap()
    }

    fn lateral_defaults() -> LateralParams {
        LateralParams {
            band_thickness_m: 0.5,
            wetting_change_pct: -10.0,
            extensive_share: 0.5,
            min_band_cells: 5,
        }
    }

    #[test]
    fn lateral_contrast_separates_line_wide_wetting_from_a_path() {
        let g = grid(40, 6, 1.0, 0.5);
        let f = flood_field(&g);
        let lat = lateral_contrast(&f, &lateral_defaults()).unwrap();
        assert_eq!(lat.bands().len(), 6);
        for b in lat.bands() {
            assert_eq!(b.background_pct, Some(-15.0), "band median is the line-wide change");
            assert!(b.wetted);
        }
        let w = lat.wetting().expect("one line-wide wetting notice");
        assert_eq!((w.depth_top_m, w.depth_bottom_m), (0.0, 3.0));
        assert_eq!(w.median_change_pct, -15.0);
        assert_eq!(w.x_range, (0.0, 40.0));
        // Relative change of the path: 0.65 / 0.85 − 1 = −23.53 % (exact ratio).
        let r = lat.relative()[40 + 20];
        assert!((r - (0.65 / 0.85 - 1.0) * 100.0).abs() < 1e-12);
        assert!(lat.relative()[0].abs() < 1e-12);
        let zones = detect_zones(&f, Some(&lat), &drops(-10.0)).unwrap();
        assert_eq!(zones.len(), 1);
        assert_eq!(zones[0].extent().x_range(), (20.0, 23.0));
        assert_eq!(zones[0].extent().depth_range(), (0.5, 2.5));
        // Without the rule the whole section is one zone.
        let raw = detect_zones(&f, None, &drops(-10.0)).unwrap();
        assert_eq!(raw.len(), 1);
        assert_eq!(raw[0].cells().len(), 240);
    }

    #[test]
    fn a_confined_path_alone_makes_no_wetting_notice() {
        let g = grid(40, 6, 1.0, 0.5);
        let mut change = vec![0.0; g.len()];
        for j in 1..5 {
            for i in 20..23 {
                change[j * 40 + i] = -35.0;
            }
        }
        let f =
            ChangeField::new(&g, change, SensitivityMask::from_flags(vec![true; g.len()])).unwrap();
        let lat = lateral_contrast(&f, &lateral_defaults()).unwrap();
        assert!(lat.wetting().is_none());
        assert!((lat.bands()[1].wetted_share - 3.0 / 40.0).abs() < 1e-12);
        assert!((lat.relative()[40 + 20] + 35.0).abs() < 1e-12);
    }

    #[test]
    fn cells_below_the_river_stage_by_centroid_elevation() {
        // Rows of 0.5 m cells under flat ground at z = 0: centroids at
        // z = −0.25, −0.75, −1.25, −1.75 (hand-computed).
        let g = grid(3, 4, 1.0, 0.5);
        let rows = |flags: Vec<bool>| -> Vec<bool> { flags.chunks(3).map(|r| r[0]).collect() };
        assert_eq!(rows(below_stage(&g, -1.0, 0.0).unwrap()), [false, false, true, true]);
        // A margin of 0.3 m raises the level to −0.7 m: the second row joins.
        assert_eq!(rows(below_stage(&g, -1.0, 0.3).unwrap()), [false, true, true, true]);
        // A stage above the ground puts every cell below it.
        assert!(below_stage(&g, 0.5, 0.0).unwrap().iter().all(|&b| b));
        // Below the deepest centroid, none.
        assert!(below_stage(&g, -2.0, 0.0).unwrap().iter().all(|&b| !b));
        assert!(below_stage(&g, f64::NAN, 0.0).is_err());
        assert!(below_stage(&g, 0.0, -0.1).is_err());
    }

    #[test]
    fn weighted_median_by_area() {
        // Hand-computed: total weight 10, half 5 reached at value 3.
        let mut v = vec![(5.0, 1.0), (1.0, 2.0), (3.0, 3.0), (9.0, 4.0)];
        assert_eq!(weighted_median(&mut v), Some(3.0));
        assert_eq!(weighted_median(&mut []), None);
    }

    #[test]
    fn robust_sigma_matches_gaussian_sigma_and_ignores_outliers() {
        // Rousseeuw & Croux 1993: 1.4826·MAD is consistent for σ of a Gaussian;
        // Φ⁻¹(3/4) = 0.674489750196 (standard normal table, from memory).
        assert!((MAD_TO_SIGMA - 1.0 / 0.674_489_750_196_081_7).abs() < 1e-12);
        let mut rng = StdRng::seed_from_u64(7);
        let sigma = 3.0;
        let mut v: Vec<f64> =
            (0..20_000).map(|_| sigma * rng.sample::<f64, _>(StandardNormal)).collect();
        let s = robust_sigma(&v).unwrap();
        // Standard error of the MAD estimate ≈ 1.17 σ/√n ≈ 0.025 (Rousseeuw & Croux 1993: 37 % efficiency).
        assert!((s - sigma).abs() < 0.1, "{s}");
        // 5 % gross outliers move it by little (breakdown point 50 %).
        for x in v.iter_mut().step_by(20) {
            *x = 500.0;
        }
        let s2 = robust_sigma(&v).unwrap();
        assert!((s2 - sigma).abs() < 0.3, "{s2}");
        // Small hand example: values 1..=5, median 3, deviations 2,1,0,1,2 → MAD 1.
        assert!((robust_sigma(&[1.0, 2.0, 3.0, 4.0, 5.0]).unwrap() - MAD_TO_SIGMA).abs() < 1e-12);
    }

    #[test]
    fn noise_model_from_quiet_epochs() {
        let mut rng = StdRng::seed_from_u64(11);
        let sig = [1.0, 2.0, 4.0, 0.01];
        let quiet: Vec<Vec<f64>> = (0..4000)
            .map(|_| {
                let mut e: Vec<f64> =
                    sig.iter().map(|s| s * rng.sample::<f64, _>(StandardNormal)).collect();
                e.push(f64::NAN); // a cell never inside the mask
                e
            })
            .collect();
        let m = NoiseModel::calibrate(&quiet, &NoiseParams::default()).unwrap();
        for (k, s) in sig.iter().enumerate().take(3) {
            // 4000 samples: standard error ≈ 1.17 σ/√4000 ≈ 0.019 σ; allow 6 %.
            let got = m.sigma()[k].unwrap();
            assert!((got / s - 1.0).abs() < 0.06, "cell {k}: {got}");
        }
        assert_eq!(m.sigma()[3], Some(0.5), "floor");
        assert_eq!(m.sigma()[4], None);
    }

    #[test]
    fn normal_tail_matches_tables() {
        // Standard normal upper-tail values (Abramowitz & Stegun 1964, table 26.1,
        // from memory): Q(1) = 0.158655254, Q(2) = 0.022750132, Q(3) = 0.001349898.
        for (k, q) in
            [(0.0, 0.5), (1.0, 0.158_655_253_9), (2.0, 0.022_750_131_9), (3.0, 0.001_349_898_0)]
        {
            assert!((normal_tail(k) - q).abs() < 1e-9, "Q({k})");
        }
    }

    #[test]
    fn connected_set_counts_match_polyomino_placements() {
        // On an r × c grid the connected m-sets are the placements of the fixed
        // polyominoes of size m: 1, 2, 6, 19 fixed polyominoes for m = 1..4
        // (OEIS A001168). Placements by bounding box:
        // m = 2: r(c−1) + c(r−1);
        // m = 3: r(c−2) + c(r−2) + 4(r−1)(c−1);
        // m = 4: r(c−3) + c(r−3) + (r−1)(c−1) + 8(r−1)(c−2) + 8(r−2)(c−1).
        let (r, c) = (5u64, 7u64);
        let g = grid(c as usize, r as usize, 1.0, 1.0);
        let all = vec![true; g.len()];
        let count = |m| count_connected_sets(&g, &all, m, u64::MAX).unwrap();
        assert_eq!(count(1), r * c);
        assert_eq!(count(2), r * (c - 1) + c * (r - 1));
        assert_eq!(count(3), r * (c - 2) + c * (r - 2) + 4 * (r - 1) * (c - 1));
        assert_eq!(
            count(4),
            r * (c - 3)
                + c * (r - 3)
                + (r - 1) * (c - 1)
                + 8 * (r - 1) * (c - 2)
                + 8 * (r - 2) * (c - 1)
        );
        // On a large grid the count per cell approaches the number of fixed
        // polyominoes: 63 for m = 5 (OEIS A001168); boundary cells have fewer.
        let big = grid(40, 40, 1.0, 1.0);
        let n5 = count_connected_sets(&big, &vec![true; 1600], 5, u64::MAX).unwrap() as f64;
        assert!(n5 / 1600.0 < 63.0 && n5 / 1600.0 > 63.0 * 0.85, "{}", n5 / 1600.0);
        // The analytic bound n(e(Δ−1))^(m−1) is above the exact count.
        assert!(
            count(4) as f64 <= 35.0 * (std::f64::consts::E * 3.0).powi(3),
            "Bollobás bound holds"
        );
        assert_eq!(count_connected_sets(&g, &all, 4, 10), None, "step limit");
    }

    /// Seeded simulation of independent Gaussian cell noise through the real
    /// detection: the share of epochs with a zone of ≥ `min_area` m² beyond k·σ
    /// must stay under the stated bound.
    #[test]
    fn false_alarm_rate_by_simulation_stays_within_the_bound() {
        let g = grid(24, 6, 1.0, 1.0);
        let n = g.len();
        let k = 2.0;
        let params =
            FalseAlarmParams { k, min_area_m2: 2.0, persistence: 1, max_steps: 10_000_000 };
        let bound = false_alarm_bound(&g, &vec![true; n], &params).unwrap();
        assert_eq!(bound.min_cells, 2);
        assert_eq!(bound.connected_sets, SetCount::Exact(23 * 6 + 24 * 5));
        let mut rng = StdRng::seed_from_u64(2024);
        let trials = 20_000;
        let mut epochs_with_zone = 0;
        let mut counts = Vec::with_capacity(trials);
        for _ in 0..trials {
            // Change of cell i is σ_i·z_i, so "beyond k·σ_i" is z_i ≤ −k for every
            // cell: detecting on z at −k applies each cell's own noise level.
            let z: Vec<f64> = (0..n).map(|_| rng.sample::<f64, _>(StandardNormal)).collect();
            let beyond: Vec<bool> = z.iter().map(|&v| v <= -k).collect();
            let change = z.iter().map(|v| v.max(-99.0)).collect();
            let f =
                ChangeField::new(&g, change, SensitivityMask::from_flags(vec![true; n])).unwrap();
            let zones = detect_zones(&f, None, &drops(-k)).unwrap();
            if zones.iter().any(|zn| zn.extent().area() >= 2.0) {
                epochs_with_zone += 1;
            }
            let pairs = (0..n)
                .flat_map(|i| g.neighbours(i).iter().map(move |&j| (i, j)))
                .filter(|&(i, j)| i < j && beyond[i] && beyond[j])
                .count();
            counts.push(pairs as f64);
        }
        let rate = epochs_with_zone as f64 / trials as f64;
        // Union bound N₂·Q(2)² = 258 · 0.02275² = 0.1335; the simulated rate must
        // be below it (plus 3 binomial standard errors, ≈ 0.007).
        let se = (bound.per_epoch * (1.0 - bound.per_epoch) / trials as f64).sqrt();
        assert!(rate <= bound.per_epoch + 3.0 * se, "rate {rate} bound {}", bound.per_epoch);
        assert!(rate > 0.7 * bound.per_epoch, "the bound is close for sparse exceedances: {rate}");
        // The expected number of exceeding connected pairs is exactly N₂·p²
        // (linearity of expectation): the sample mean agrees within 4 standard errors.
        let mean = counts.iter().sum::<f64>() / trials as f64;
        let var = counts.iter().map(|c| (c - mean).powi(2)).sum::<f64>() / (trials - 1) as f64;
        let se_mean = (var / trials as f64).sqrt();
        assert!((mean - bound.per_epoch).abs() < 4.0 * se_mean, "{mean} vs {}", bound.per_epoch);
    }

    #[test]
    fn false_alarm_bound_shrinks_with_persistence_and_area() {
        let g = grid(48, 10, 0.5, 0.5);
        let all = vec![true; g.len()];
        let p =
            FalseAlarmParams { k: 3.0, min_area_m2: 1.0, persistence: 3, max_steps: 50_000_000 };
        let b = false_alarm_bound(&g, &all, &p).unwrap();
        // 1 m² needs four 0.25 m² cells: N₄ tetromino placements on 10 × 48.
        let (r, c) = (10.0, 48.0);
        let n4 = r * (c - 3.0)
            + c * (r - 3.0)
            + (r - 1.0) * (c - 1.0)
            + 8.0 * (r - 1.0) * (c - 2.0)
            + 8.0 * (r - 2.0) * (c - 1.0);
        assert_eq!(b.min_cells, 4);
        assert_eq!(b.connected_sets.value(), n4);
        let q3: f64 = 0.001_349_898_0; // Q(3), tables (from memory)
        assert!((b.per_epoch / (n4 * q3.powi(4)) - 1.0).abs() < 1e-6);
        assert!((b.per_raise - b.per_epoch.powi(3)).abs() < 1e-30);
        // An area no set of cells can reach: no false zone possible.
        let none =
            false_alarm_bound(&g, &all, &FalseAlarmParams { min_area_m2: 1e6, ..p }).unwrap();
        assert_eq!((none.min_cells, none.per_epoch), (0, 0.0));
        // Past the step limit the analytic count bound is used.
        let rough = false_alarm_bound(&g, &all, &FalseAlarmParams { max_steps: 100, ..p }).unwrap();
        assert!(matches!(rough.connected_sets, SetCount::UpperBound(_)));
        assert!(rough.per_epoch >= b.per_epoch);
    }

    #[test]
    fn seasonal_envelope_uses_the_same_season_of_earlier_years() {
        let day = 86_400i64;
        let year = (DAYS_PER_YEAR * 86_400.0) as i64;
        let now = 10 * year + 100 * day;
        let a = [-5.0, 1.0];
        let b = [-9.0, f64::NAN];
        let c = [-30.0, 4.0];
        let d = [-50.0, -50.0];
        let hist = [
            PastEpoch { time: now - year - 10 * day, change_pct: &a }, // last year, 10 d earlier
            PastEpoch { time: now - 2 * year + 5 * day, change_pct: &b }, // two years ago
            PastEpoch { time: now - year - 60 * day, change_pct: &c }, // wrong season
            PastEpoch { time: now - 3 * day, change_pct: &d },         // this year
        ];
        let params = EnvelopeParams { half_window_days: 15.0, min_age_days: 350.0, min_samples: 1 };
        let env = SeasonalEnvelope::from_history(now, 2, &hist, &params).unwrap();
        assert_eq!(env.lower(), &[Some(-9.0), Some(1.0)]);
        assert_eq!(env.upper(), &[Some(-5.0), Some(1.0)]);
        assert_eq!(env.samples(), &[2, 1]);
        let strict = EnvelopeParams { min_samples: 2, ..params };
        let env = SeasonalEnvelope::from_history(now, 2, &hist, &strict).unwrap();
        assert_eq!(env.lower(), &[Some(-9.0), None]);
        // Season distance wraps around the new year.
        assert!((season_distance(1.0, DAYS_PER_YEAR - 1.0) - 2.0).abs() < 1e-9);
    }

    fn zones_at(g: &SectionGrid, rows: &[&str]) -> Vec<Zone> {
        detect_zones(&field_from(g, rows), None, &drops(-10.0)).unwrap()
    }

    #[test]
    fn tracking_keeps_identity_through_drift_growth_and_shrinking() {
        // Expected identities follow the overlap rule of the module docs, by hand.
        let g = grid(10, 2, 1.0, 1.0);
        let mut t = ZoneTracker::new(TrackerParams::default());
        let r = t.update(0, &zones_at(&g, &["##........", ".........."]), &g).unwrap();
        assert_eq!(r.ids, vec![1]);
        assert_eq!(r.events, vec![TrackEvent::Born { id: 1 }]);
        // Drifts right by one cell each epoch and grows, then shrinks.
        let frames = [
            [".##.......", ".........."],
            ["..###.....", "...#......"],
            ["...####...", "...##....."],
            [".....#....", ".........."],
        ];
        for (e, f) in frames.iter().enumerate() {
            let r = t.update(e as i64 + 1, &zones_at(&g, f), &g).unwrap();
            assert_eq!(r.ids, vec![1], "frame {e}");
            assert!(r.events.is_empty());
        }
        let h = &t.track(1).unwrap().history;
        let areas: Vec<f64> = h.iter().map(|s| s.area_m2).collect();
        assert_eq!(areas, vec![2.0, 2.0, 4.0, 6.0, 1.0]);
        assert_eq!(h[4].peak_change_pct, -30.0);
        // Missing for two epochs keeps it; the third ends it.
        let empty = ["..........", ".........."];
        for e in 5..7 {
            let r = t.update(e, &zones_at(&g, &empty), &g).unwrap();
            assert_eq!(r.events, vec![TrackEvent::Missed { id: 1 }]);
        }
        let r = t.update(7, &zones_at(&g, &empty), &g).unwrap();
        assert_eq!(r.events, vec![TrackEvent::Ended { id: 1 }]);
        assert_eq!(r.ended.len(), 1);
        assert!(t.tracks().is_empty());
        assert_eq!(
            t.update(7, &[], &g),
            Err(ZonesError::TimeNotIncreasing { time: 7, previous: 7 })
        );
    }

    #[test]
    fn a_missing_zone_resumes_its_identity() {
        let g = grid(6, 1, 1.0, 1.0);
        let mut t = ZoneTracker::new(TrackerParams::default());
        t.update(0, &zones_at(&g, &[".##..."]), &g).unwrap();
        t.update(1, &zones_at(&g, &["......"]), &g).unwrap();
        let r = t.update(2, &zones_at(&g, &["..##.."]), &g).unwrap();
        assert_eq!(r.ids, vec![1]);
        assert_eq!(r.events, vec![TrackEvent::Resumed { id: 1 }]);
        assert_eq!(t.track(1).unwrap().history.len(), 2);
    }

    #[test]
    fn on_a_split_the_larger_part_keeps_the_identity() {
        let g = grid(10, 1, 1.0, 1.0);
        let mut t = ZoneTracker::new(TrackerParams::default());
        t.update(0, &zones_at(&g, &["#########."]), &g).unwrap();
        let r = t.update(1, &zones_at(&g, &["##...####."]), &g).unwrap();
        assert_eq!(r.ids, vec![2, 1]);
        assert_eq!(r.events, vec![TrackEvent::Split { parent: 1, id: 2 }]);
        assert_eq!(t.track(2).unwrap().parent, Some(1));
        assert_eq!(t.track(1).unwrap().history.len(), 2);
        assert_eq!(t.track(2).unwrap().history.len(), 1);
    }

    #[test]
    fn on_a_merge_the_older_identity_survives() {
        let g = grid(10, 1, 1.0, 1.0);
        let mut t = ZoneTracker::new(TrackerParams::default());
        t.update(0, &zones_at(&g, &["##........"]), &g).unwrap();
        // A second, larger zone appears later.
        let r = t.update(1, &zones_at(&g, &["##...####."]), &g).unwrap();
        assert_eq!(r.ids, vec![1, 2]);
        // They grow into one: the older (1) survives though 2 is larger.
        let r = t.update(2, &zones_at(&g, &["#########."]), &g).unwrap();
        assert_eq!(r.ids, vec![1]);
        assert_eq!(r.events, vec![TrackEvent::Merged { from: 2, into: 1 }]);
        assert_eq!(r.ended.len(), 1);
        assert_eq!(r.ended[0].id, 2);
        assert_eq!(t.tracks().len(), 1);
    }

    #[test]
    fn drops_and_rises_are_tracked_apart() {
        let g = grid(4, 1, 1.0, 1.0);
        let f = field_from(&g, &["##^^"]);
        let mut zones = detect_zones(&f, None, &drops(-10.0)).unwrap();
        let rises = DetectionParams { direction: Direction::Rise, threshold_pct: 10.0 };
        zones.extend(detect_zones(&f, None, &rises).unwrap());
        let mut t = ZoneTracker::new(TrackerParams::default());
        t.update(0, &zones, &g).unwrap();
        let f2 = field_from(&g, &["^^##"]);
        let mut z2 = detect_zones(&f2, None, &drops(-10.0)).unwrap();
        z2.extend(detect_zones(&f2, None, &rises).unwrap());
        let r = t.update(1, &z2, &g).unwrap();
        // Drop zone moved onto the old rise cells: no overlap with its own kind.
        assert_eq!(r.ids, vec![3, 4]);
    }

    #[test]
    fn tracker_state_round_trips() {
        let g = grid(6, 1, 1.0, 1.0);
        let mut t = ZoneTracker::new(TrackerParams::default());
        t.update(0, &zones_at(&g, &["##...."]), &g).unwrap();
        let mut u = ZoneTracker::from_state(TrackerParams::default(), t.state().clone()).unwrap();
        let r = u.update(1, &zones_at(&g, &[".##..."]), &g).unwrap();
        assert_eq!(r.ids, vec![1]);
        let mut bad = t.state().clone();
        bad.next_id = 1;
        assert!(matches!(
            ZoneTracker::from_state(TrackerParams::default(), bad),
            Err(ZonesError::InvalidState(_))
        ));
    }
}
