//! Alert rules and the alert lifecycle of one line.
//!
//! Conventions as in [`crate::zones`]: change in percent against the baseline
//! (negative = resistivity drop), lengths in metres, areas in m², times in
//! seconds since the Unix epoch (passed in; nothing here reads a clock), rates
//! in percent per day. Widths are also given in electrode spacings a (m).
//!
//! **Levels.** A [`RuleSet`] lists trigger levels, gentlest first (defaults
//! −10 %, −20 %, −35 %). A cell *qualifies* for level L when
//! 1. it belongs to the zone (connected in-mask cells beyond the gentler clear
//!    threshold, [`crate::zones::detect_zones`]),
//! 2. its judged change (relative to the depth-band background under the
//!    lateral-contrast rule, else its change) is at or beyond L's change,
//! 3. with a noise rule and a noise model: its judged change is beyond k·σ of
//!    the cell (cells without σ never qualify),
//! 4. with a seasonal rule and an envelope for the cell: its change lies beyond
//!    the range seen at the same season in earlier years by the margin
//!    (Arosio et al. 2017, *Open Geosciences*, warn beyond the seasonal extremes),
//! 5. with a river-stage rule and the epoch's river stage: the cell lies above
//!    the stage plus the rule's margin ([`crate::zones::below_stage`]; the stage
//!    is an elevation in the line's datum).
//!
//! A zone reaches level L when its qualifying cells contain a connected
//! cluster of at least L's area and width (width = horizontal extent, in
//! electrode spacings). An optional rate rule lifts a zone to a set level
//! when its peak judged change falls faster than a rate (least-squares slope
//! over a window of its history); an optional rise rule treats resistivity
//! rises the same way (loss of fines in a clay core can raise resistivity,
//! METHODS §5.3). A line-wide wetting (lateral-contrast rule) is one notice
//! for the line, never a zone alert. So is the wetting of ground below the
//! river stage: a zone that reaches a level only with cells below the stage is
//! expected wetting by the flood and joins the line's wetting notice
//! ([`WettingNotice::below_stage`], naming the stage), not a zone alert. The
//! river-stage rule suits lines across an embankment, where the river soaks the
//! waterside and the phreatic surface rises under the crest; it also hides a
//! seepage path below the stage from that line, so a line along the crest
//! (judged by lateral contrast) is what finds such a path during a flood.
//! Data-quality events raise notices.
//! Judged against a wetted band's background, the parts of the band that stay
//! unchanged look like relative rises: turn the rise rule on only where rises
//! matter (clay cores), where this is the contrast wanted.
//!
//! **Lifecycle.** Per subject (a tracked zone, the line-wide wetting, a data
//! quality kind) the engine counts consecutive epochs at or above each level.
//! It raises an alert at the highest level held for `persistence_epochs`
//! epochs, escalates when a higher level has been held that long (an
//! acknowledged alert then returns to raised), and resolves it automatically
//! after `clear_epochs` consecutive epochs in which the subject is clear
//! (for a zone: no cell beyond the gentler clear threshold, i.e. its track is
//! absent). A person can acknowledge (with a note) and resolve by hand; a
//! subject resolved by hand is not raised again at the same or a lower level
//! until it has been clear for `clear_epochs` epochs. Every change is returned
//! as a [`Transition`] (from, to, level, reason, actor, time) for the audit trail.

use std::fmt;

use thiserror::Error;

use crate::section::SectionGrid;
use crate::zones::{
    ChangeField, DetectionParams, Direction, Extent, FalseAlarmBound, FalseAlarmParams,
    LateralContrast, LateralParams, LineWideWetting, NoiseModel, SeasonalEnvelope, TrackEvent,
    TrackerParams, TrackingReport, Zone, ZoneTracker, ZonesError, below_stage,
    connected_components, detect_zones, false_alarm_bound, lateral_contrast,
};

/// The caution every alert, email, alert page and the README carries (PRODUCT.md).
pub const CAUTION: &str = "An alert only prompts an inspection by a qualified engineer. It is not an assessment of the embankment's stability and does not replace local codes, the owner's emergency action plan or licensed engineering practice.";

const SECONDS_PER_DAY: f64 = 86_400.0;

/// Why a rule set, an epoch or an action cannot be processed.
#[derive(Debug, Error, PartialEq)]
pub enum AlertsError {
    /// A rule is outside its allowed range.
    #[error("rule {field}: {reason}")]
    InvalidRule {
        /// The field, e.g. `levels[1].change_pct`.
        field: String,
        /// What is allowed.
        reason: String,
    },
    /// The electrode spacing is not a positive number.
    #[error("electrode spacing {0} m must be a positive finite number")]
    InvalidSpacing(f64),
    /// Epochs must come in increasing time.
    #[error("time {time} s is not after the previous one at {previous} s")]
    TimeNotIncreasing {
        /// Time given, s.
        time: i64,
        /// Previous time, s.
        previous: i64,
    },
    /// The section grid changed size between epochs of one line.
    #[error("the section has {got} cells but earlier epochs of this line had {expected}")]
    GridChanged {
        /// Cells before.
        expected: usize,
        /// Cells now.
        got: usize,
    },
    /// A per-cell input does not match the grid.
    #[error("{what} has {got} values for {expected} cells")]
    LengthMismatch {
        /// Which input.
        what: &'static str,
        /// Cells in the grid.
        expected: usize,
        /// Values given.
        got: usize,
    },
    /// A data-quality event carries an impossible value.
    #[error("quality event: {0}")]
    InvalidEvent(String),
    /// No active alert has this identity.
    #[error("no active alert {0}")]
    UnknownAlert(u64),
    /// The action does not apply to the alert's state.
    #[error("alert {alert} is {state}: cannot {action}")]
    NotAllowed {
        /// Alert identity.
        alert: u64,
        /// Its state.
        state: AlertState,
        /// The action tried.
        action: &'static str,
    },
    /// An action by hand needs the person's name.
    #[error("an action by hand needs the name of the person taking it")]
    NoActor,
    /// A stored engine state is inconsistent.
    #[error("alert engine state: {0}")]
    InvalidState(String),
    /// The zone computation failed.
    #[error(transparent)]
    Zones(#[from] ZonesError),
}

fn rule_err(field: impl Into<String>, reason: impl Into<String>) -> AlertsError {
    AlertsError::InvalidRule { field: field.into(), reason: reason.into() }
}

/// One trigger level of the change rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TriggerLevel {
    /// Judged change at or below which a cell qualifies, % (< 0).
    pub change_pct: f64,
    /// Smallest qualifying cluster, m².
    pub min_area_m2: f64,
    /// Smallest horizontal extent of the cluster, electrode spacings.
    pub min_width_spacings: f64,
}

/// Lateral-contrast settings in units of the line (see [`crate::zones`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LateralRule {
    /// Depth-band thickness, electrode spacings.
    pub band_thickness_spacings: f64,
    /// Change at or below which a cell counts towards a line-wide wetting, %.
    pub wetting_change_pct: f64,
    /// Share of a band's area that must reach it for a line-wide wetting (0–1].
    pub extensive_share: f64,
    /// Fewest in-mask cells for a band background.
    pub min_band_cells: usize,
}

impl LateralRule {
    /// The zone-level parameters for a line with electrode spacing `spacing_m`.
    pub fn params(&self, spacing_m: f64) -> LateralParams {
        LateralParams {
            band_thickness_m: self.band_thickness_spacings * spacing_m,
            wetting_change_pct: self.wetting_change_pct,
            extensive_share: self.extensive_share,
            min_band_cells: self.min_band_cells,
        }
    }
}

/// River-stage rule: cells below the epoch's river stage (plus a margin) do
/// not qualify for a trigger level; zones that would have reached one with
/// them are reported in the wetting notice (module docs).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StageRule {
    /// Height above the stage up to which a cell still counts as below it, m
    /// (≥ 0): the capillary fringe above the water table and the inversion's
    /// vertical smoothing.
    pub margin_m: f64,
}

/// Noise-calibrated level: a cell qualifies only beyond k·σ.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NoiseRule {
    /// Multiple of the cell's σ (> 0).
    pub k: f64,
}

/// Rate-of-change rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RateRule {
    /// A zone whose peak judged change falls faster than this qualifies, % per day (> 0).
    pub drop_pct_per_day: f64,
    /// Window of history the slope is fitted over, days (> 0); at least 3 epochs needed.
    pub window_days: f64,
    /// Level it raises (1-based index into the levels); the zone must meet
    /// that level's area and width.
    pub level: u8,
}

/// Rule for resistivity rises.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RiseRule {
    /// Judged change at or above which a cell qualifies, % (> 0).
    pub change_pct: f64,
    /// Gentler threshold the rise zone is cut at and must fall back under to clear, % (0 < clear < change).
    pub clear_change_pct: f64,
    /// Smallest qualifying cluster, m².
    pub min_area_m2: f64,
    /// Smallest horizontal extent, electrode spacings.
    pub min_width_spacings: f64,
    /// Level it raises (1-based index into the levels).
    pub level: u8,
}

/// Seasonal-envelope rule (applies where an envelope exists for the cell).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SeasonalRule {
    /// How far beyond the seasonal range a change must lie, % (≥ 0).
    pub margin_pct: f64,
}

/// Data-quality rules.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct QualityRules {
    /// A line without an epoch for this long is silent, s (> 0).
    pub silent_after_s: i64,
    /// An epoch with a larger share of rejected readings raises, 0–1.
    pub max_drop_share: f64,
    /// Raise when an electrode is out of service.
    pub electrode_out_of_service: bool,
    /// Observations without the event before a quality alert resolves (≥ 1).
    pub clear_after: u32,
}

/// Per-line alert rules (module docs). Validated by [`RuleSet::validate`].
#[derive(Debug, Clone, PartialEq)]
pub struct RuleSet {
    /// Trigger levels, gentlest first, each change below the previous one.
    pub levels: Vec<TriggerLevel>,
    /// Consecutive epochs a level must hold before it raises or escalates (≥ 1).
    pub persistence_epochs: u32,
    /// Gentler change zones are cut at and must come back above to clear, %
    /// (between the first level's change and 0).
    pub clear_change_pct: f64,
    /// Consecutive clear epochs before an alert resolves itself (≥ 1).
    pub clear_epochs: u32,
    /// Lateral-contrast rule; `None` judges every cell on its own change.
    pub lateral: Option<LateralRule>,
    /// Noise-calibrated level; applies when a noise model is given.
    pub noise: Option<NoiseRule>,
    /// Rate-of-change rule.
    pub rate: Option<RateRule>,
    /// Rule for resistivity rises.
    pub rise: Option<RiseRule>,
    /// Seasonal-envelope rule; applies where an envelope is given.
    pub seasonal: Option<SeasonalRule>,
    /// River-stage rule; applies when the epoch's river stage is given.
    pub stage: Option<StageRule>,
    /// Data-quality rules.
    pub quality: QualityRules,
}

impl Default for RuleSet {
    /// Levels −10/−20/−35 % (the range of field seepage changes, "10 to a few
    /// tens of percent": Clément et al. 2009, *C. R. Geoscience* 341, 886–898),
    /// 1 m² and 1 spacing wide; persistence 3 epochs and k = 3 (METHODS §4 and
    /// §7 design proposal: 2–3 σ, N = 3 daily epochs); clear at −5 % for 3
    /// epochs; bands of half a spacing, wetting at −10 % over half a band;
    /// seasonal margin 2 %; silent after 36 h, at most 30 % rejected readings
    /// (common practice, no source). Rate, rise and river-stage rules off (the
    /// river-stage rule needs a line across the embankment and a stage on the
    /// line's datum: module docs).
    fn default() -> Self {
        let level =
            |change_pct| TriggerLevel { change_pct, min_area_m2: 1.0, min_width_spacings: 1.0 };
        Self {
            levels: vec![level(-10.0), level(-20.0), level(-35.0)],
            persistence_epochs: 3,
            clear_change_pct: -5.0,
            clear_epochs: 3,
            lateral: Some(LateralRule {
                band_thickness_spacings: 0.5,
                wetting_change_pct: -10.0,
                extensive_share: 0.5,
                min_band_cells: 5,
            }),
            noise: Some(NoiseRule { k: 3.0 }),
            rate: None,
            rise: None,
            seasonal: Some(SeasonalRule { margin_pct: 2.0 }),
            stage: None,
            quality: QualityRules {
                silent_after_s: 36 * 3600,
                max_drop_share: 0.3,
                electrode_out_of_service: true,
                clear_after: 1,
            },
        }
    }
}

fn finite_in(field: String, v: f64, lo: f64, hi: f64, what: &str) -> Result<(), AlertsError> {
    if v.is_finite() && v > lo && v < hi {
        Ok(())
    } else {
        Err(rule_err(field, format!("{v} must be {what}")))
    }
}

fn non_negative(field: String, v: f64) -> Result<(), AlertsError> {
    if v.is_finite() && v >= 0.0 {
        Ok(())
    } else {
        Err(rule_err(field, format!("{v} must be ≥ 0")))
    }
}

impl RuleSet {
    /// The stated false-alarm rate of the noise-calibrated level on a line
    /// ([`crate::zones`] module docs): k of the noise rule, the smallest minimum
    /// area of the levels, the persistence; `in_mask` one flag per cell of
    /// `grid`. Width rules are left out, which keeps it an upper bound. `None`
    /// without a noise rule. `max_steps` caps the exact count of cell sets.
    pub fn false_alarm_bound(
        &self,
        grid: &SectionGrid,
        in_mask: &[bool],
        max_steps: u64,
    ) -> Result<Option<FalseAlarmBound>, AlertsError> {
        self.validate()?;
        let Some(noise) = &self.noise else { return Ok(None) };
        let min_area_m2 = self.levels.iter().map(|l| l.min_area_m2).fold(f64::INFINITY, f64::min);
        let params = FalseAlarmParams {
            k: noise.k,
            min_area_m2,
            persistence: self.persistence_epochs,
            max_steps,
        };
        Ok(Some(false_alarm_bound(grid, in_mask, &params)?))
    }

    /// Checks every field; the error names the first one out of range.
    pub fn validate(&self) -> Result<(), AlertsError> {
        if self.levels.is_empty() || self.levels.len() > 9 {
            return Err(rule_err("levels", "1 to 9 levels needed"));
        }
        let mut previous = 0.0;
        for (i, l) in self.levels.iter().enumerate() {
            finite_in(
                format!("levels[{i}].change_pct"),
                l.change_pct,
                -100.0,
                previous,
                "in (−100, previous level)",
            )?;
            non_negative(format!("levels[{i}].min_area_m2"), l.min_area_m2)?;
            non_negative(format!("levels[{i}].min_width_spacings"), l.min_width_spacings)?;
            previous = l.change_pct;
        }
        if self.persistence_epochs == 0 {
            return Err(rule_err("persistence_epochs", "must be ≥ 1"));
        }
        if self.clear_epochs == 0 {
            return Err(rule_err("clear_epochs", "must be ≥ 1"));
        }
        finite_in(
            "clear_change_pct".into(),
            self.clear_change_pct,
            self.levels[0].change_pct,
            0.0,
            "between the first level's change and 0",
        )?;
        let n_levels = self.levels.len() as u8;
        if let Some(l) = &self.lateral {
            finite_in(
                "lateral.band_thickness_spacings".into(),
                l.band_thickness_spacings,
                0.0,
                f64::INFINITY,
                "> 0",
            )?;
            finite_in(
                "lateral.wetting_change_pct".into(),
                l.wetting_change_pct,
                -100.0,
                0.0,
                "in (−100, 0)",
            )?;
            finite_in(
                "lateral.extensive_share".into(),
                l.extensive_share,
                0.0,
                1.0 + 1e-12,
                "in (0, 1]",
            )?;
            if l.min_band_cells == 0 {
                return Err(rule_err("lateral.min_band_cells", "must be ≥ 1"));
            }
        }
        if let Some(n) = &self.noise {
            finite_in("noise.k".into(), n.k, 0.0, f64::INFINITY, "> 0")?;
        }
        if let Some(r) = &self.rate {
            finite_in(
                "rate.drop_pct_per_day".into(),
                r.drop_pct_per_day,
                0.0,
                f64::INFINITY,
                "> 0",
            )?;
            finite_in("rate.window_days".into(), r.window_days, 0.0, f64::INFINITY, "> 0")?;
            if r.level == 0 || r.level > n_levels {
                return Err(rule_err("rate.level", format!("must be 1..={n_levels}")));
            }
        }
        if let Some(r) = &self.rise {
            finite_in("rise.change_pct".into(), r.change_pct, 0.0, f64::INFINITY, "> 0")?;
            finite_in(
                "rise.clear_change_pct".into(),
                r.clear_change_pct,
                0.0,
                r.change_pct,
                "between 0 and rise.change_pct",
            )?;
            non_negative("rise.min_area_m2".into(), r.min_area_m2)?;
            non_negative("rise.min_width_spacings".into(), r.min_width_spacings)?;
            if r.level == 0 || r.level > n_levels {
                return Err(rule_err("rise.level", format!("must be 1..={n_levels}")));
            }
        }
        if let Some(s) = &self.seasonal {
            non_negative("seasonal.margin_pct".into(), s.margin_pct)?;
        }
        if let Some(s) = &self.stage {
            non_negative("stage.margin_m".into(), s.margin_m)?;
        }
        let q = &self.quality;
        if q.silent_after_s <= 0 {
            return Err(rule_err("quality.silent_after_s", "must be > 0"));
        }
        finite_in(
            "quality.max_drop_share".into(),
            q.max_drop_share,
            0.0,
            1.0 + 1e-12,
            "in (0, 1]",
        )?;
        if q.clear_after == 0 {
            return Err(rule_err("quality.clear_after", "must be ≥ 1"));
        }
        Ok(())
    }
}

/// Alert level: a notice (line-wide wetting, data quality) or a trigger level
/// (1-based index into [`RuleSet::levels`]). Ordered by severity.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Level {
    /// Information for the duty engineer, not a zone alert.
    Notice,
    /// Trigger level n (1 = gentlest).
    Trigger(u8),
}

impl Level {
    fn rank(self) -> usize {
        match self {
            Level::Notice => 0,
            Level::Trigger(n) => n as usize,
        }
    }

    fn from_rank(r: usize) -> Level {
        if r == 0 { Level::Notice } else { Level::Trigger(r as u8) }
    }
}

impl fmt::Display for Level {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Level::Notice => write!(f, "notice"),
            Level::Trigger(n) => write!(f, "level {n}"),
        }
    }
}

/// Kinds of data-quality alert.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum QualityKind {
    /// No epoch arrived for too long.
    LineSilent,
    /// Too many readings rejected.
    HighDropShare,
    /// An electrode is out of service.
    ElectrodeOutOfService {
        /// Electrode index in cable order.
        electrode: usize,
    },
}

/// A data-quality event as the quality-control code reports it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum QualityEvent {
    /// The line's last epoch arrived at this time (s since the Unix epoch).
    LineSilent {
        /// Time of the last epoch received, s.
        last_epoch: i64,
    },
    /// Share of the epoch's readings rejected by quality control (0–1).
    DropShare {
        /// The share.
        share: f64,
    },
    /// An electrode was taken out of service.
    ElectrodeOutOfService {
        /// Electrode index in cable order.
        electrode: usize,
    },
}

/// What an alert is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Subject {
    /// A tracked change zone.
    Zone {
        /// Track identity ([`crate::zones::Track::id`]).
        track: u64,
        /// Drop or rise.
        direction: Direction,
    },
    /// The line's wetting notice: wetting along the line, or below the river stage.
    LineWideWetting,
    /// A data-quality problem.
    Quality(QualityKind),
}

/// Which observations a subject belongs to: section epochs or quality reports.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scope {
    /// Zones and the line-wide wetting, observed once per processed section.
    Section,
    /// Data-quality subjects, observed with every quality report.
    Quality,
}

impl Subject {
    /// The scope it is observed in.
    pub fn scope(&self) -> Scope {
        match self {
            Subject::Quality(_) => Scope::Quality,
            _ => Scope::Section,
        }
    }
}

/// Measures of a zone for messages and pages.
#[derive(Debug, Clone, PartialEq)]
pub struct ZoneDetail {
    /// Drop or rise.
    pub direction: Direction,
    /// Chainage range, m.
    pub x_range: (f64, f64),
    /// Elevation range, m.
    pub z_range: (f64, f64),
    /// Depth below ground (top, bottom), m.
    pub depth_range: (f64, f64),
    /// Area centroid (x, z), m.
    pub centroid: [f64; 2],
    /// Area, m².
    pub area_m2: f64,
    /// Horizontal extent, m.
    pub width_m: f64,
    /// Extreme change (minimum for a drop), %.
    pub peak_change_pct: f64,
    /// Area-weighted mean change, %.
    pub mean_change_pct: f64,
    /// Extreme judged change (relative to the line-wide background), %.
    pub peak_judged_pct: f64,
    /// Share of the area with good sensitivity, 0–1.
    pub good_share: f64,
    /// Area of the cluster that met the level, m² (`None` below every level).
    pub core_area_m2: Option<f64>,
    /// Fitted rate of the peak judged change, % per day (with a rate rule and enough history).
    pub rate_pct_per_day: Option<f64>,
}

/// Zones of an epoch that reached a trigger level only with cells below the
/// river stage (river-stage rule): expected wetting by the flood.
#[derive(Debug, Clone, PartialEq)]
pub struct StageWetting {
    /// River stage of the epoch (elevation in the line's datum), m.
    pub stage_m: f64,
    /// The rule's margin above it, m.
    pub margin_m: f64,
    /// How many zones.
    pub zones: usize,
    /// Their total area, m².
    pub area_m2: f64,
    /// Chainage range over them, m.
    pub x_range: (f64, f64),
    /// Depth range below ground over them, m.
    pub depth_range: (f64, f64),
    /// Their extreme change, %.
    pub peak_change_pct: f64,
}

/// The facts of a line's wetting notice in one epoch: depth bands wetted
/// along the line (lateral-contrast rule), zones explained by the river stage
/// (river-stage rule), or both.
#[derive(Debug, Clone, PartialEq)]
pub struct WettingNotice {
    /// Wetting along most of the line, if found.
    pub line_wide: Option<LineWideWetting>,
    /// Wetting below the river stage, if found.
    pub below_stage: Option<StageWetting>,
}

/// The latest facts behind an alert.
#[derive(Debug, Clone, PartialEq)]
pub enum Detail {
    /// A zone.
    Zone(ZoneDetail),
    /// The line's wetting notice.
    LineWideWetting(WettingNotice),
    /// A data-quality event.
    Quality(QualityEvent),
}

/// State of an alert.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum AlertState {
    /// Raised and waiting for a person.
    Raised,
    /// Seen by a person.
    Acknowledged,
    /// Over.
    Resolved,
}

impl fmt::Display for AlertState {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            AlertState::Raised => "raised",
            AlertState::Acknowledged => "acknowledged",
            AlertState::Resolved => "resolved",
        })
    }
}

/// Who made a transition.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Actor {
    /// The rules.
    System,
    /// A person, by name.
    Person(String),
}

impl fmt::Display for Actor {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Actor::System => f.write_str("system"),
            Actor::Person(name) => f.write_str(name),
        }
    }
}

/// Why a transition happened.
#[derive(Debug, Clone, PartialEq)]
pub enum Reason {
    /// The level held for this many consecutive epochs.
    Persisted {
        /// Epochs.
        epochs: u32,
    },
    /// A higher level held long enough; the previous level.
    Escalated {
        /// Level before.
        from: Level,
    },
    /// A person acknowledged it.
    Acknowledged {
        /// Their note.
        note: String,
    },
    /// A person resolved it.
    ResolvedByHand {
        /// Their note.
        note: String,
    },
    /// The subject was clear for this many consecutive epochs.
    Cleared {
        /// Epochs.
        epochs: u32,
    },
    /// Its zone merged into the zone of another alert, which lives on.
    MergedInto {
        /// The surviving alert.
        alert: u64,
    },
    /// Its zone merged into another zone; the alert follows that zone.
    Moved {
        /// The subject before.
        from: Subject,
    },
}

impl fmt::Display for Reason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Reason::Persisted { epochs } => write!(f, "held for {epochs} consecutive epochs"),
            Reason::Escalated { from } => write!(f, "escalated from {from}"),
            Reason::Acknowledged { note } => write!(f, "acknowledged: {note}"),
            Reason::ResolvedByHand { note } => write!(f, "resolved by hand: {note}"),
            Reason::Cleared { epochs } => write!(f, "clear for {epochs} consecutive epochs"),
            Reason::MergedInto { alert } => write!(f, "zone merged into the zone of alert {alert}"),
            Reason::Moved { from } => write!(f, "zone merged; alert moved from {from:?}"),
        }
    }
}

/// One change of an alert, for the audit trail.
#[derive(Debug, Clone, PartialEq)]
pub struct Transition {
    /// Alert identity.
    pub alert: u64,
    /// Its subject (after the transition).
    pub subject: Subject,
    /// State before (`None` when raised).
    pub from: Option<AlertState>,
    /// State after.
    pub to: AlertState,
    /// Level after.
    pub level: Level,
    /// Why.
    pub reason: Reason,
    /// Who.
    pub actor: Actor,
    /// When, s since the Unix epoch.
    pub time: i64,
}

/// An active alert with its summary for messages.
#[derive(Debug, Clone, PartialEq)]
pub struct Alert {
    /// Identity, unique within the line's engine.
    pub id: u64,
    /// What it is about.
    pub subject: Subject,
    /// Raised or acknowledged.
    pub state: AlertState,
    /// Highest level reached.
    pub level: Level,
    /// When it was raised, s.
    pub raised_at: i64,
    /// Start of the run of qualifying epochs that raised it, s ("since when").
    pub since: i64,
    /// Latest update, s.
    pub updated_at: i64,
    /// Consecutive epochs the subject has held its level up to the latest update.
    pub persistence: u32,
    /// Latest facts.
    pub detail: Detail,
}

/// What the rules made of one subject in one observation.
#[derive(Debug, Clone, PartialEq)]
pub struct Observation {
    /// Subject.
    pub subject: Subject,
    /// Level it qualifies for now, if any.
    pub level: Option<Level>,
    /// True when the subject is back beyond the gentler clear threshold.
    pub clear: bool,
    /// Facts for the alert summary.
    pub detail: Detail,
}

/// Persistence and hysteresis counts for one kind of observation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Persistence {
    /// Consecutive qualifying observations before raising or escalating (≥ 1).
    pub raise_after: u32,
    /// Consecutive clear observations before resolving (≥ 1).
    pub clear_after: u32,
}

/// The engine's memory of one subject.
#[derive(Debug, Clone, PartialEq)]
pub struct SubjectRecord {
    /// Subject.
    pub subject: Subject,
    /// Consecutive observations at or above each level, by rank (0 = notice, n = trigger n).
    pub runs: Vec<u32>,
    /// Time the current qualifying run began, s.
    pub run_start: Option<i64>,
    /// Consecutive clear observations.
    pub clear_run: u32,
    /// Resolved by hand at this level: not raised again at or below it until clear.
    pub suppressed: Option<Level>,
}

/// Stored state of an [`AlertEngine`].
#[derive(Debug, Clone, PartialEq)]
pub struct EngineState {
    /// Next alert identity.
    pub next_id: u64,
    /// Active alerts.
    pub alerts: Vec<Alert>,
    /// Subjects being counted.
    pub subjects: Vec<SubjectRecord>,
}

/// The alert state machine of one line (module docs).
#[derive(Debug, Clone, PartialEq)]
pub struct AlertEngine {
    state: EngineState,
}

impl Default for AlertEngine {
    fn default() -> Self {
        Self::new()
    }
}

impl AlertEngine {
    /// An engine with no alerts.
    pub fn new() -> Self {
        Self { state: EngineState { next_id: 1, alerts: Vec::new(), subjects: Vec::new() } }
    }

    /// An engine resuming from a stored state.
    pub fn from_state(state: EngineState) -> Result<Self, AlertsError> {
        for (i, a) in state.alerts.iter().enumerate() {
            if a.id >= state.next_id {
                return Err(AlertsError::InvalidState(format!("alert {} ≥ next_id", a.id)));
            }
            if a.state == AlertState::Resolved {
                return Err(AlertsError::InvalidState(format!("alert {} is resolved", a.id)));
            }
            if state.alerts[..i].iter().any(|b| b.id == a.id || b.subject == a.subject) {
                return Err(AlertsError::InvalidState(format!("alert {} repeated", a.id)));
            }
            if !state.subjects.iter().any(|s| s.subject == a.subject) {
                return Err(AlertsError::InvalidState(format!("alert {} has no subject", a.id)));
            }
        }
        Ok(Self { state })
    }

    /// The current state (to store).
    pub fn state(&self) -> &EngineState {
        &self.state
    }

    /// Active (raised or acknowledged) alerts.
    pub fn alerts(&self) -> &[Alert] {
        &self.state.alerts
    }

    /// The active alert with this identity.
    pub fn alert(&self, id: u64) -> Option<&Alert> {
        self.state.alerts.iter().find(|a| a.id == id)
    }

    fn record_index(&mut self, subject: Subject) -> usize {
        match self.state.subjects.iter().position(|s| s.subject == subject) {
            Some(i) => i,
            None => {
                self.state.subjects.push(SubjectRecord {
                    subject,
                    runs: Vec::new(),
                    run_start: None,
                    clear_run: 0,
                    suppressed: None,
                });
                self.state.subjects.len() - 1
            }
        }
    }

    /// Feeds one observation round of `scope` at `time`: subjects of that scope
    /// missing from `observations` count as clear and not qualifying.
    pub fn observe(
        &mut self,
        time: i64,
        scope: Scope,
        observations: Vec<Observation>,
        timing: Persistence,
    ) -> Vec<Transition> {
        let n_raise = timing.raise_after.max(1);
        let n_clear = timing.clear_after.max(1);
        let mut observations: Vec<Option<Observation>> =
            observations.into_iter().filter(|o| o.subject.scope() == scope).map(Some).collect();
        for o in observations.iter().flatten() {
            self.record_index(o.subject);
        }
        let mut out = Vec::new();
        for r in 0..self.state.subjects.len() {
            let subject = self.state.subjects[r].subject;
            if subject.scope() != scope {
                continue;
            }
            let obs = observations
                .iter_mut()
                .find(|o| o.as_ref().is_some_and(|o| o.subject == subject))
                .and_then(Option::take);
            let rank = obs.as_ref().and_then(|o| o.level).map(Level::rank);
            let clear = obs.as_ref().is_none_or(|o| o.clear);
            let rec = &mut self.state.subjects[r];
            if let Some(k) = rank.filter(|&k| rec.runs.len() <= k) {
                rec.runs.resize(k + 1, 0);
            }
            for (i, run) in rec.runs.iter_mut().enumerate() {
                *run = if rank.is_some_and(|k| i <= k) { *run + 1 } else { 0 };
            }
            rec.run_start = match rank {
                Some(_) => Some(rec.run_start.unwrap_or(time)),
                None => None,
            };
            rec.clear_run = if clear { rec.clear_run + 1 } else { 0 };
            if rec.clear_run >= n_clear {
                rec.suppressed = None;
            }
            let candidate = rec.runs.iter().rposition(|&n| n >= n_raise).map(Level::from_rank);
            let runs = rec.runs.clone();
            let (clear_run, suppressed, since) = (rec.clear_run, rec.suppressed, rec.run_start);
            let run_at = |l: Level| runs.get(l.rank()).copied().unwrap_or(0);
            match self.state.alerts.iter().position(|a| a.subject == subject) {
                None => {
                    let Some(level) = candidate else { continue };
                    if suppressed.is_some_and(|s| level <= s) {
                        continue;
                    }
                    let Some(obs) = obs else { continue };
                    self.state.subjects[r].suppressed = None;
                    let id = self.state.next_id;
                    self.state.next_id += 1;
                    self.state.alerts.push(Alert {
                        id,
                        subject,
                        state: AlertState::Raised,
                        level,
                        raised_at: time,
                        since: since.unwrap_or(time),
                        updated_at: time,
                        persistence: run_at(level),
                        detail: obs.detail,
                    });
                    out.push(Transition {
                        alert: id,
                        subject,
                        from: None,
                        to: AlertState::Raised,
                        level,
                        reason: Reason::Persisted { epochs: run_at(level) },
                        actor: Actor::System,
                        time,
                    });
                }
                Some(ai) => {
                    let a = &mut self.state.alerts[ai];
                    if let Some(obs) = obs {
                        a.detail = obs.detail;
                    }
                    a.updated_at = time;
                    if let Some(level) = candidate.filter(|&c| c > a.level) {
                        let (from_state, from_level) = (a.state, a.level);
                        a.level = level;
                        a.state = AlertState::Raised;
                        a.persistence = run_at(level);
                        out.push(Transition {
                            alert: a.id,
                            subject,
                            from: Some(from_state),
                            to: AlertState::Raised,
                            level,
                            reason: Reason::Escalated { from: from_level },
                            actor: Actor::System,
                            time,
                        });
                    } else if clear_run >= n_clear {
                        let a = self.state.alerts.remove(ai);
                        out.push(Transition {
                            alert: a.id,
                            subject,
                            from: Some(a.state),
                            to: AlertState::Resolved,
                            level: a.level,
                            reason: Reason::Cleared { epochs: clear_run },
                            actor: Actor::System,
                            time,
                        });
                    } else {
                        a.persistence = run_at(a.level);
                    }
                }
            }
        }
        let alerts = &self.state.alerts;
        self.state.subjects.retain(|s| {
            alerts.iter().any(|a| a.subject == s.subject)
                || s.suppressed.is_some()
                || s.runs.iter().any(|&n| n > 0)
        });
        out
    }

    fn person(actor: &str) -> Result<Actor, AlertsError> {
        let name = actor.trim();
        if name.is_empty() {
            Err(AlertsError::NoActor)
        } else {
            Ok(Actor::Person(name.to_string()))
        }
    }

    /// A person acknowledges a raised alert, with a note.
    pub fn acknowledge(
        &mut self,
        id: u64,
        actor: &str,
        note: &str,
        time: i64,
    ) -> Result<Transition, AlertsError> {
        let actor = Self::person(actor)?;
        let a = self
            .state
            .alerts
            .iter_mut()
            .find(|a| a.id == id)
            .ok_or(AlertsError::UnknownAlert(id))?;
        if a.state != AlertState::Raised {
            return Err(AlertsError::NotAllowed {
                alert: id,
                state: a.state,
                action: "acknowledge",
            });
        }
        a.state = AlertState::Acknowledged;
        a.updated_at = time;
        Ok(Transition {
            alert: id,
            subject: a.subject,
            from: Some(AlertState::Raised),
            to: AlertState::Acknowledged,
            level: a.level,
            reason: Reason::Acknowledged { note: note.to_string() },
            actor,
            time,
        })
    }

    /// A person resolves an active alert, with a note. The subject is not
    /// raised again at the same or a lower level until it has been clear.
    pub fn resolve(
        &mut self,
        id: u64,
        actor: &str,
        note: &str,
        time: i64,
    ) -> Result<Transition, AlertsError> {
        let actor = Self::person(actor)?;
        let ai = self
            .state
            .alerts
            .iter()
            .position(|a| a.id == id)
            .ok_or(AlertsError::UnknownAlert(id))?;
        let a = self.state.alerts.remove(ai);
        let r = self.record_index(a.subject);
        let rec = &mut self.state.subjects[r];
        rec.suppressed = Some(a.level);
        rec.clear_run = 0;
        Ok(Transition {
            alert: id,
            subject: a.subject,
            from: Some(a.state),
            to: AlertState::Resolved,
            level: a.level,
            reason: Reason::ResolvedByHand { note: note.to_string() },
            actor,
            time,
        })
    }

    /// Subject `from` (a zone) merged into `into`: counts combine, and an alert
    /// of `from` moves to `into`, or is resolved when `into` has its own
    /// (which then takes the higher level).
    pub fn merge(&mut self, from: Subject, into: Subject, time: i64) -> Vec<Transition> {
        let Some(fi) = self.state.subjects.iter().position(|s| s.subject == from) else {
            return Vec::new();
        };
        let f = self.state.subjects.remove(fi);
        let ii = self.record_index(into);
        let rec = &mut self.state.subjects[ii];
        if rec.runs.len() < f.runs.len() {
            rec.runs.resize(f.runs.len(), 0);
        }
        for (a, b) in rec.runs.iter_mut().zip(&f.runs) {
            *a = (*a).max(*b);
        }
        rec.run_start = match (rec.run_start, f.run_start) {
            (Some(a), Some(b)) => Some(a.min(b)),
            (a, b) => a.or(b),
        };
        rec.clear_run = rec.clear_run.min(f.clear_run);
        rec.suppressed = rec.suppressed.max(f.suppressed);
        let mut out = Vec::new();
        let from_alert = self.state.alerts.iter().position(|a| a.subject == from);
        let into_alert = self.state.alerts.iter().position(|a| a.subject == into);
        match (from_alert, into_alert) {
            (Some(fa), None) => {
                let a = &mut self.state.alerts[fa];
                a.subject = into;
                a.updated_at = time;
                out.push(Transition {
                    alert: a.id,
                    subject: into,
                    from: Some(a.state),
                    to: a.state,
                    level: a.level,
                    reason: Reason::Moved { from },
                    actor: Actor::System,
                    time,
                });
            }
            (Some(fa), Some(ia)) => {
                let gone = self.state.alerts[fa].clone();
                let keep = &mut self.state.alerts[ia];
                keep.since = keep.since.min(gone.since);
                out.push(Transition {
                    alert: gone.id,
                    subject: from,
                    from: Some(gone.state),
                    to: AlertState::Resolved,
                    level: gone.level,
                    reason: Reason::MergedInto { alert: keep.id },
                    actor: Actor::System,
                    time,
                });
                if gone.level > keep.level {
                    let (from_state, from_level) = (keep.state, keep.level);
                    keep.level = gone.level;
                    keep.state = AlertState::Raised;
                    keep.updated_at = time;
                    out.push(Transition {
                        alert: keep.id,
                        subject: into,
                        from: Some(from_state),
                        to: AlertState::Raised,
                        level: keep.level,
                        reason: Reason::Escalated { from: from_level },
                        actor: Actor::System,
                        time,
                    });
                }
                self.state.alerts.remove(fa);
            }
            _ => {}
        }
        out
    }
}

/// How the rules judged one zone in one epoch.
#[derive(Debug, Clone, PartialEq)]
pub struct ZoneAssessment {
    /// Track identity of the zone.
    pub track: u64,
    /// Level the zone qualifies for now.
    pub level: Option<Level>,
    /// The cluster that met the level (largest one), if any.
    pub core: Option<Extent>,
    /// Fitted rate of the peak judged change, % per day.
    pub rate_pct_per_day: Option<f64>,
    /// True when the zone would have reached a higher level with its cells
    /// below the river stage (river-stage rule): reported in the wetting notice.
    pub below_stage: bool,
}

/// Something the caller should know about an epoch's evaluation.
#[derive(Debug, Clone, PartialEq)]
pub enum MonitorWarning {
    /// The rules ask for a noise-calibrated level but no noise model was given:
    /// fixed thresholds only.
    NoNoiseModel,
    /// In-mask cells without a measured σ; they cannot qualify under the noise rule.
    CellsWithoutNoise {
        /// How many.
        cells: usize,
    },
    /// The rules have a river-stage rule but no river stage was given for the
    /// epoch: every cell was judged without it.
    NoRiverStage,
}

/// One epoch for [`LineMonitor::process`].
#[derive(Debug, Clone, Copy)]
pub struct EpochInput<'a, 'g> {
    /// Epoch time, s since the Unix epoch.
    pub time: i64,
    /// The epoch's change image.
    pub field: &'a ChangeField<'g>,
    /// Per-cell noise from quiet baseline epochs, if calibrated.
    pub noise: Option<&'a NoiseModel>,
    /// Seasonal envelope for this epoch, where history exists.
    pub envelope: Option<&'a SeasonalEnvelope>,
    /// Data-quality events of this epoch.
    pub quality: &'a [QualityEvent],
    /// River stage at the epoch's time (elevation in the line's datum), m, if known.
    pub river_stage_m: Option<f64>,
}

/// Everything one epoch produced.
#[derive(Debug, Clone, PartialEq)]
pub struct EpochOutcome {
    /// Lateral-contrast result (bands, relative change, wetting notice).
    pub lateral: Option<LateralContrast>,
    /// Zones found: drops, then rises.
    pub zones: Vec<Zone>,
    /// Track identities and events.
    pub tracking: TrackingReport,
    /// One assessment per zone, same order.
    pub assessments: Vec<ZoneAssessment>,
    /// The epoch's wetting notice (along the line, below the river stage), if any.
    pub wetting: Option<WettingNotice>,
    /// Alert transitions, in the order they happened.
    pub transitions: Vec<Transition>,
    /// Warnings.
    pub warnings: Vec<MonitorWarning>,
}

/// The rules, tracker and alert engine of one line.
#[derive(Debug, Clone, PartialEq)]
pub struct LineMonitor {
    rules: RuleSet,
    spacing_m: f64,
    tracker: ZoneTracker,
    engine: AlertEngine,
    cells: Option<usize>,
    last_time: Option<i64>,
}

fn check_events(events: &[QualityEvent]) -> Result<(), AlertsError> {
    for e in events {
        if let QualityEvent::DropShare { share } = *e {
            if !(0.0..=1.0).contains(&share) {
                return Err(AlertsError::InvalidEvent(format!(
                    "drop share {share} is not in [0, 1]"
                )));
            }
        }
    }
    Ok(())
}

/// The river stage for an epoch at `time` from a gauge's (time s, stage m)
/// samples in increasing time: the latest reading at or before `time`, if it
/// is at most `max_age_s` old. Readings after the epoch are not used, so
/// processing an epoch again later gives the same stage.
pub fn stage_at(samples: &[(i64, f64)], time: i64, max_age_s: i64) -> Option<f64> {
    let i = samples.partition_point(|s| s.0 <= time);
    let s = samples[..i].last()?;
    (time - s.0 <= max_age_s).then_some(s.1)
}

/// Least-squares slope of (time s, value %) points, % per day; `None` with
/// fewer than 3 points or no spread in time.
pub fn slope_per_day(points: &[(i64, f64)]) -> Option<f64> {
    if points.len() < 3 {
        return None;
    }
    let t0 = points[0].0;
    let n = points.len() as f64;
    let ts: Vec<f64> = points.iter().map(|p| (p.0 - t0) as f64 / SECONDS_PER_DAY).collect();
    let mt = ts.iter().sum::<f64>() / n;
    let mv = points.iter().map(|p| p.1).sum::<f64>() / n;
    let sxx: f64 = ts.iter().map(|t| (t - mt).powi(2)).sum();
    let sxy: f64 = ts.iter().zip(points).map(|(t, p)| (t - mt) * (p.1 - mv)).sum();
    (sxx > 0.0).then(|| sxy / sxx)
}

impl LineMonitor {
    /// A monitor for a line with electrode spacing `spacing_m` (m), with
    /// validated rules.
    pub fn new(rules: RuleSet, spacing_m: f64) -> Result<Self, AlertsError> {
        Self::resume(
            rules,
            spacing_m,
            ZoneTracker::new(TrackerParams::default()),
            AlertEngine::new(),
        )
    }

    /// A monitor resuming a stored tracker and engine.
    pub fn resume(
        rules: RuleSet,
        spacing_m: f64,
        tracker: ZoneTracker,
        engine: AlertEngine,
    ) -> Result<Self, AlertsError> {
        rules.validate()?;
        if !(spacing_m > 0.0 && spacing_m.is_finite()) {
            return Err(AlertsError::InvalidSpacing(spacing_m));
        }
        let last_time = tracker.state().last_time;
        Ok(Self { rules, spacing_m, tracker, engine, cells: None, last_time })
    }

    /// The rules.
    pub fn rules(&self) -> &RuleSet {
        &self.rules
    }

    /// The zone tracker (histories).
    pub fn tracker(&self) -> &ZoneTracker {
        &self.tracker
    }

    /// The alert engine.
    pub fn engine(&self) -> &AlertEngine {
        &self.engine
    }

    /// Active alerts.
    pub fn alerts(&self) -> &[Alert] {
        self.engine.alerts()
    }

    /// A person acknowledges an alert.
    pub fn acknowledge(
        &mut self,
        id: u64,
        actor: &str,
        note: &str,
        time: i64,
    ) -> Result<Transition, AlertsError> {
        self.engine.acknowledge(id, actor, note, time)
    }

    /// A person resolves an alert.
    pub fn resolve(
        &mut self,
        id: u64,
        actor: &str,
        note: &str,
        time: i64,
    ) -> Result<Transition, AlertsError> {
        self.engine.resolve(id, actor, note, time)
    }

    /// Data-quality events outside an epoch (e.g. a silent line found by the
    /// scheduler). Each call is one quality observation: kinds not reported
    /// count as clear. Calls are taken in the order made.
    pub fn observe_quality(
        &mut self,
        time: i64,
        events: &[QualityEvent],
    ) -> Result<Vec<Transition>, AlertsError> {
        check_events(events)?;
        let mut obs = Vec::new();
        for e in events {
            let (kind, qualifies) = match *e {
                QualityEvent::LineSilent { last_epoch } => (
                    QualityKind::LineSilent,
                    time - last_epoch >= self.rules.quality.silent_after_s,
                ),
                QualityEvent::DropShare { share } => {
                    (QualityKind::HighDropShare, share > self.rules.quality.max_drop_share)
                }
                QualityEvent::ElectrodeOutOfService { electrode } => (
                    QualityKind::ElectrodeOutOfService { electrode },
                    self.rules.quality.electrode_out_of_service,
                ),
            };
            if qualifies {
                obs.push(Observation {
                    subject: Subject::Quality(kind),
                    level: Some(Level::Notice),
                    clear: false,
                    detail: Detail::Quality(*e),
                });
            }
        }
        let timing = Persistence { raise_after: 1, clear_after: self.rules.quality.clear_after };
        Ok(self.engine.observe(time, Scope::Quality, obs, timing))
    }

    /// Runs one epoch through lateral contrast, zone detection, tracking, the
    /// rules and the alert engine.
    pub fn process(&mut self, input: &EpochInput<'_, '_>) -> Result<EpochOutcome, AlertsError> {
        let field = input.field;
        let grid = field.grid();
        let n = grid.len();
        if let Some(previous) = self.last_time.filter(|&p| input.time <= p) {
            return Err(AlertsError::TimeNotIncreasing { time: input.time, previous });
        }
        check_events(input.quality)?;
        if let Some(expected) = self.cells.filter(|&c| c != n) {
            return Err(AlertsError::GridChanged { expected, got: n });
        }
        if let Some(m) = input.noise.filter(|m| m.sigma().len() != n) {
            return Err(AlertsError::LengthMismatch {
                what: "noise model",
                expected: n,
                got: m.sigma().len(),
            });
        }
        if let Some(e) = input.envelope.filter(|e| e.lower().len() != n) {
            return Err(AlertsError::LengthMismatch {
                what: "seasonal envelope",
                expected: n,
                got: e.lower().len(),
            });
        }
        let mut warnings = Vec::new();
        if self.rules.noise.is_some() {
            match input.noise {
                None => warnings.push(MonitorWarning::NoNoiseModel),
                Some(m) => {
                    let cells = (0..n)
                        .filter(|&i| field.mask().in_mask()[i] && m.sigma()[i].is_none())
                        .count();
                    if cells > 0 {
                        warnings.push(MonitorWarning::CellsWithoutNoise { cells });
                    }
                }
            }
        }
        let below = match (&self.rules.stage, input.river_stage_m) {
            (Some(r), Some(h)) => Some(below_stage(grid, h, r.margin_m)?),
            (Some(_), None) => {
                warnings.push(MonitorWarning::NoRiverStage);
                None
            }
            (None, _) => None,
        };
        let lateral = match &self.rules.lateral {
            Some(l) => Some(lateral_contrast(field, &l.params(self.spacing_m))?),
            None => None,
        };
        let drop = DetectionParams {
            direction: Direction::Drop,
            threshold_pct: self.rules.clear_change_pct,
        };
        let mut zones = detect_zones(field, lateral.as_ref(), &drop)?;
        if let Some(r) = &self.rules.rise {
            let rise =
                DetectionParams { direction: Direction::Rise, threshold_pct: r.clear_change_pct };
            zones.extend(detect_zones(field, lateral.as_ref(), &rise)?);
        }
        let tracking = self.tracker.update(input.time, &zones, grid)?;
        self.cells = Some(n);
        self.last_time = Some(input.time);
        let mut transitions = Vec::new();
        for ev in &tracking.events {
            if let TrackEvent::Merged { from, into } = *ev {
                let dir = self.tracker.track(into).map(|t| t.direction).unwrap_or(Direction::Drop);
                transitions.extend(self.engine.merge(
                    Subject::Zone { track: from, direction: dir },
                    Subject::Zone { track: into, direction: dir },
                    input.time,
                ));
            }
        }
        let judged: &[f64] = match &lateral {
            Some(l) => l.relative(),
            None => field.change(),
        };
        let mut assessments = Vec::with_capacity(zones.len());
        let mut observations = Vec::new();
        for (zone, &track) in zones.iter().zip(&tracking.ids) {
            let a = self.assess(zone, track, judged, input, below.as_deref());
            let e = zone.extent();
            observations.push(Observation {
                subject: Subject::Zone { track, direction: zone.direction() },
                level: a.level,
                clear: false,
                detail: Detail::Zone(ZoneDetail {
                    direction: zone.direction(),
                    x_range: e.x_range(),
                    z_range: e.z_range(),
                    depth_range: e.depth_range(),
                    centroid: e.centroid(),
                    area_m2: e.area(),
                    width_m: e.width(),
                    peak_change_pct: zone.peak_change(),
                    mean_change_pct: zone.mean_change(),
                    peak_judged_pct: zone.peak_judged(),
                    good_share: zone.good_share(),
                    core_area_m2: a.core.as_ref().map(Extent::area),
                    rate_pct_per_day: a.rate_pct_per_day,
                }),
            });
            assessments.push(a);
        }
        let line_wide = lateral.as_ref().and_then(LateralContrast::wetting).cloned();
        let stage_part = match (&self.rules.stage, input.river_stage_m) {
            (Some(r), Some(h)) => stage_wetting(h, r.margin_m, &zones, &assessments),
            _ => None,
        };
        let wetting = (line_wide.is_some() || stage_part.is_some())
            .then_some(WettingNotice { line_wide, below_stage: stage_part });
        if let Some(w) = &wetting {
            observations.push(Observation {
                subject: Subject::LineWideWetting,
                level: Some(Level::Notice),
                clear: false,
                detail: Detail::LineWideWetting(w.clone()),
            });
        }
        let timing = Persistence {
            raise_after: self.rules.persistence_epochs,
            clear_after: self.rules.clear_epochs,
        };
        transitions.extend(self.engine.observe(input.time, Scope::Section, observations, timing));
        transitions.extend(self.observe_quality(input.time, input.quality)?);
        Ok(EpochOutcome { lateral, zones, tracking, assessments, wetting, transitions, warnings })
    }

    fn assess(
        &self,
        zone: &Zone,
        track: u64,
        judged: &[f64],
        input: &EpochInput<'_, '_>,
        below: Option<&[bool]>,
    ) -> ZoneAssessment {
        let field = input.field;
        let grid = field.grid();
        let dir = zone.direction();
        let s = dir.sign();
        let change = field.change();
        let sigma = match (&self.rules.noise, input.noise) {
            (Some(r), Some(m)) => Some((r.k, m.sigma())),
            _ => None,
        };
        let envelope = match (&self.rules.seasonal, input.envelope) {
            (Some(r), Some(e)) => Some((r.margin_pct, e)),
            _ => None,
        };
        let qualifies = |i: usize, threshold: f64, below: Option<&[bool]>| {
            below.is_none_or(|b| !b[i])
                && dir.beyond(judged[i], threshold)
                && sigma.is_none_or(|(k, sg)| sg[i].is_some_and(|sd| judged[i] * s >= k * sd))
                && envelope.is_none_or(|(margin, env)| {
                    let bound = match dir {
                        Direction::Drop => env.lower()[i],
                        Direction::Rise => env.upper()[i],
                    };
                    bound.is_none_or(|b| (change[i] - b) * s > margin)
                })
        };
        let spacing = self.spacing_m;
        let meets = |e: &Extent, area: f64, width_spacings: f64| {
            e.area() >= area * (1.0 - 1e-12)
                && e.width() >= width_spacings * spacing * (1.0 - 1e-12)
        };
        let core_at =
            |threshold: f64, area: f64, width: f64, below: Option<&[bool]>| -> Option<Extent> {
                let mut member = vec![false; grid.len()];
                for &i in zone.cells() {
                    member[i] = qualifies(i, threshold, below);
                }
                connected_components(grid, &member)
                    .iter()
                    .map(|c| Extent::of(grid, c))
                    .filter(|e| meets(e, area, width))
                    .max_by(|a, b| a.area().total_cmp(&b.area()))
            };
        let level_of = |below: Option<&[bool]>| -> (Option<Level>, Option<Extent>) {
            match dir {
                Direction::Drop => {
                    for (i, l) in self.rules.levels.iter().enumerate().rev() {
                        let core =
                            core_at(l.change_pct, l.min_area_m2, l.min_width_spacings, below);
                        if core.is_some() {
                            return (Some(Level::Trigger(i as u8 + 1)), core);
                        }
                    }
                    (None, None)
                }
                Direction::Rise => match self.rules.rise.as_ref().and_then(|r| {
                    core_at(r.change_pct, r.min_area_m2, r.min_width_spacings, below)
                        .map(|e| (r, e))
                }) {
                    Some((r, e)) => (Some(Level::Trigger(r.level)), Some(e)),
                    None => (None, None),
                },
            }
        };
        // Only a drop is wetting: a rise below the stage is judged as ever.
        let below = below.filter(|_| dir == Direction::Drop);
        let (mut level, mut core) = level_of(below);
        let below_stage = below.is_some() && level_of(None).0 > level;
        let wholly_below = below.is_some_and(|b| zone.cells().iter().all(|&i| b[i]));
        let mut rate_pct_per_day = None;
        if let (Some(r), Direction::Drop, Some(t)) =
            (&self.rules.rate, dir, self.tracker.track(track))
        {
            let from = input.time - (r.window_days * SECONDS_PER_DAY).round() as i64;
            let pts: Vec<(i64, f64)> = t
                .history
                .iter()
                .filter(|h| h.time >= from)
                .map(|h| (h.time, h.peak_judged_pct))
                .collect();
            rate_pct_per_day = slope_per_day(&pts);
            let l = &self.rules.levels[r.level as usize - 1];
            let lifted = Level::Trigger(r.level);
            if rate_pct_per_day.is_some_and(|v| v <= -r.drop_pct_per_day)
                && !wholly_below
                && meets(zone.extent(), l.min_area_m2, l.min_width_spacings)
                && level.is_none_or(|cur| cur < lifted)
            {
                level = Some(lifted);
                core = core.or_else(|| Some(zone.extent().clone()));
            }
        }
        ZoneAssessment { track, level, core, rate_pct_per_day, below_stage }
    }
}

/// The river-stage part of the wetting notice: the zones the stage explained
/// ([`ZoneAssessment::below_stage`]), `None` when there are none.
fn stage_wetting(
    stage_m: f64,
    margin_m: f64,
    zones: &[Zone],
    assessments: &[ZoneAssessment],
) -> Option<StageWetting> {
    let explained: Vec<&Zone> =
        zones.iter().zip(assessments).filter(|(_, a)| a.below_stage).map(|(z, _)| z).collect();
    if explained.is_empty() {
        return None;
    }
    let lo_hi = |f: &dyn Fn(&Zone) -> (f64, f64)| {
        explained
            .iter()
            .map(|z| f(z))
            .fold((f64::INFINITY, f64::NEG_INFINITY), |a, b| (a.0.min(b.0), a.1.max(b.1)))
    };
    Some(StageWetting {
        stage_m,
        margin_m,
        zones: explained.len(),
        area_m2: explained.iter().map(|z| z.extent().area()).sum(),
        x_range: lo_hi(&|z| z.extent().x_range()),
        depth_range: lo_hi(&|z| z.extent().depth_range()),
        peak_change_pct: explained.iter().map(|z| z.peak_change()).fold(f64::INFINITY, f64::min),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geometry::Surface;
    use crate::section::SectionGrid;
    use crate::zones::{EnvelopeParams, PastEpoch, SensitivityMask};
    use rand::{Rng, SeedableRng, rngs::StdRng};
    use rand_distr::StandardNormal;

    const DAY: i64 = 86_400;

    /// `nx` × `nz` rectangles of `dx` × `dz` m under flat ground at z = 0;
    /// cell (column i, row j from the top) has index j·nx + i.
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

    /// Fixed thresholds only (no lateral, noise or seasonal rule), persistence
    /// and hysteresis of 2 epochs, 1 m² / 1 spacing per level.
    fn plain_rules() -> RuleSet {
        RuleSet {
            persistence_epochs: 2,
            clear_epochs: 2,
            lateral: None,
            noise: None,
            seasonal: None,
            ..RuleSet::default()
        }
    }

    /// 20 × 4 grid of 1 m cells; the patch is columns 8–10 of rows 1–2.
    fn patch_grid() -> SectionGrid {
        grid(20, 4, 1.0, 1.0)
    }

    fn patch(v: f64) -> Vec<f64> {
        let mut c = vec![0.0; 80];
        for j in 1..3 {
            for i in 8..11 {
                c[j * 20 + i] = v;
            }
        }
        c
    }

    /// Feeds `frames` as daily epochs (line spacing 1 m) and returns the monitor
    /// and the transitions of each epoch.
    fn check(
        rules: RuleSet,
        g: &SectionGrid,
        frames: &[Vec<f64>],
    ) -> (LineMonitor, Vec<Vec<Transition>>) {
        let mut m = LineMonitor::new(rules, 1.0).unwrap();
        let out = run(&mut m, g, frames, 0);
        (m, out)
    }

    fn run(
        m: &mut LineMonitor,
        g: &SectionGrid,
        frames: &[Vec<f64>],
        day0: i64,
    ) -> Vec<Vec<Transition>> {
        frames
            .iter()
            .enumerate()
            .map(|(d, f)| {
                let field = ChangeField::new(
                    g,
                    f.clone(),
                    SensitivityMask::from_flags(vec![true; g.len()]),
                )
                .unwrap();
                let input = EpochInput {
                    time: (day0 + d as i64) * DAY,
                    field: &field,
                    noise: None,
                    envelope: None,
                    quality: &[],
                    river_stage_m: None,
                };
                m.process(&input).unwrap().transitions
            })
            .collect()
    }

    fn kinds(ts: &[Transition]) -> Vec<(Option<AlertState>, AlertState, Level)> {
        ts.iter().map(|t| (t.from, t.to, t.level)).collect()
    }

    #[test]
    fn a_change_lasting_one_epoch_does_not_raise_with_persistence_2() {
        let g = patch_grid();
        let (_, out) = check(plain_rules(), &g, &[patch(-15.0), patch(0.0), patch(0.0)]);
        assert!(out.iter().all(Vec::is_empty), "{out:?}");
        let (m, out) =
            check(plain_rules(), &g, &[patch(-15.0), patch(0.0), patch(-15.0), patch(-15.0)]);
        assert!(out[..3].iter().all(Vec::is_empty));
        assert_eq!(kinds(&out[3]), vec![(None, AlertState::Raised, Level::Trigger(1))]);
        assert_eq!(out[3][0].reason, Reason::Persisted { epochs: 2 });
        assert_eq!(out[3][0].actor, Actor::System);
        let a = &m.alerts()[0];
        assert_eq!((a.since, a.raised_at, a.persistence), (2 * DAY, 3 * DAY, 2));
        let Detail::Zone(d) = &a.detail else { panic!("zone detail expected") };
        assert_eq!((d.x_range, d.depth_range, d.area_m2), ((8.0, 11.0), (1.0, 3.0), 6.0));
        assert_eq!(d.peak_change_pct, -15.0);
    }

    #[test]
    fn hysteresis_prevents_flapping_around_the_threshold() {
        // Transition counts worked out by hand: 5 crossings down, 4 back up.
        let g = patch_grid();
        let series: Vec<Vec<f64>> =
            [-12.0, -12.0, -9.0, -11.0, -9.0, -11.0, -9.0, -11.0, -9.0, -11.0].map(patch).to_vec();
        let with = RuleSet { persistence_epochs: 1, ..plain_rules() };
        let (_, out) = check(with, &g, &series);
        let all: Vec<Transition> = out.into_iter().flatten().collect();
        assert_eq!(kinds(&all), vec![(None, AlertState::Raised, Level::Trigger(1))]);
        // Without hysteresis (clear just above the trigger, after one epoch) the
        // same series raises and resolves over and over.
        let without = RuleSet {
            persistence_epochs: 1,
            clear_change_pct: -9.99,
            clear_epochs: 1,
            ..plain_rules()
        };
        let (_, out) = check(without, &g, &series);
        let all: Vec<Transition> = out.into_iter().flatten().collect();
        let raised = all.iter().filter(|t| t.to == AlertState::Raised).count();
        let resolved = all.iter().filter(|t| t.to == AlertState::Resolved).count();
        assert_eq!((raised, resolved), (5, 4));
    }

    #[test]
    fn escalation_acknowledgement_and_automatic_resolution() {
        // Expected transitions worked out by hand from the lifecycle in the module docs.
        let g = patch_grid();
        let mut m = LineMonitor::new(plain_rules(), 1.0).unwrap();
        let out = run(&mut m, &g, &[patch(-12.0), patch(-12.0), patch(-22.0), patch(-22.0)], 0);
        assert!(out[0].is_empty() && out[2].is_empty());
        assert_eq!(kinds(&out[1]), vec![(None, AlertState::Raised, Level::Trigger(1))]);
        assert_eq!(
            kinds(&out[3]),
            vec![(Some(AlertState::Raised), AlertState::Raised, Level::Trigger(2))]
        );
        assert_eq!(out[3][0].reason, Reason::Escalated { from: Level::Trigger(1) });
        let id = out[1][0].alert;
        assert_eq!(out[3][0].alert, id, "escalation keeps the alert");
        let ack = m.acknowledge(id, "R. Duty", "crew sent", 3 * DAY + 3600).unwrap();
        assert_eq!(
            ack,
            Transition {
                alert: id,
                subject: out[1][0].subject,
                from: Some(AlertState::Raised),
                to: AlertState::Acknowledged,
                level: Level::Trigger(2),
                reason: Reason::Acknowledged { note: "crew sent".into() },
                actor: Actor::Person("R. Duty".into()),
                time: 3 * DAY + 3600,
            }
        );
        let out = run(&mut m, &g, &[patch(-40.0), patch(-40.0), patch(0.0), patch(0.0)], 4);
        assert!(out[0].is_empty());
        // Climbing a level re-opens an acknowledged alert.
        assert_eq!(
            kinds(&out[1]),
            vec![(Some(AlertState::Acknowledged), AlertState::Raised, Level::Trigger(3))]
        );
        assert!(out[2].is_empty(), "one clear epoch is not enough");
        assert_eq!(
            kinds(&out[3]),
            vec![(Some(AlertState::Raised), AlertState::Resolved, Level::Trigger(3))]
        );
        assert_eq!(out[3][0].reason, Reason::Cleared { epochs: 2 });
        assert!(m.alerts().is_empty());
        assert_eq!(
            format!("{} / {}", out[3][0].actor, out[3][0].reason),
            "system / clear for 2 consecutive epochs"
        );
    }

    #[test]
    fn resolving_by_hand_holds_until_clear_or_a_higher_level() {
        let g = patch_grid();
        let rules = RuleSet { persistence_epochs: 1, ..plain_rules() };
        let mut m = LineMonitor::new(rules, 1.0).unwrap();
        let out = run(&mut m, &g, &[patch(-12.0)], 0);
        let first = out[0][0].alert;
        let t = m.resolve(first, "E. Field", "known culvert leak", DAY / 2).unwrap();
        assert_eq!((t.from, t.to), (Some(AlertState::Raised), AlertState::Resolved));
        assert_eq!(t.reason, Reason::ResolvedByHand { note: "known culvert leak".into() });
        let out = run(&mut m, &g, &[patch(-12.0), patch(-25.0)], 1);
        assert!(out[0].is_empty(), "same level stays quiet");
        assert_eq!(kinds(&out[1]), vec![(None, AlertState::Raised, Level::Trigger(2))]);
        let second = out[1][0].alert;
        assert_ne!(first, second);
        assert_eq!(m.acknowledge(first, "A", "", 0), Err(AlertsError::UnknownAlert(first)));
        assert_eq!(m.acknowledge(second, "  ", "", 0), Err(AlertsError::NoActor));
        m.acknowledge(second, "A", "", 2 * DAY).unwrap();
        assert_eq!(
            m.acknowledge(second, "A", "", 2 * DAY),
            Err(AlertsError::NotAllowed {
                alert: second,
                state: AlertState::Acknowledged,
                action: "acknowledge"
            })
        );
        m.resolve(second, "A", "inspected", 2 * DAY).unwrap();
        // Clear for two epochs lifts the hold.
        let out = run(&mut m, &g, &[patch(0.0), patch(0.0), patch(-12.0)], 3);
        assert!(out[0].is_empty() && out[1].is_empty());
        assert_eq!(kinds(&out[2]), vec![(None, AlertState::Raised, Level::Trigger(1))]);
    }

    /// 40 × 6 cells of 1 m × 0.5 m: the whole line at −15 % with a −35 % path
    /// in columns 20–22, rows 1–4.
    fn flood() -> Vec<f64> {
        let mut c = vec![-15.0; 240];
        for j in 1..5 {
            for i in 20..23 {
                c[j * 40 + i] = -35.0;
            }
        }
        c
    }

    /// Feeds `frames` as daily epochs with the river stage `stage` (m) and
    /// returns the outcomes.
    fn run_with_stage(
        m: &mut LineMonitor,
        g: &SectionGrid,
        frames: &[Vec<f64>],
        stage: Option<f64>,
    ) -> Vec<EpochOutcome> {
        frames
            .iter()
            .enumerate()
            .map(|(d, f)| {
                let mask = SensitivityMask::from_flags(vec![true; g.len()]);
                let field = ChangeField::new(g, f.clone(), mask).unwrap();
                let input = EpochInput {
                    time: d as i64 * DAY,
                    field: &field,
                    noise: None,
                    envelope: None,
                    quality: &[],
                    river_stage_m: stage,
                };
                m.process(&input).unwrap()
            })
            .collect()
    }

    /// 20 × 4 grid of 1 m cells (centroids at z = −0.5, −1.5, −2.5, −3.5 m):
    /// −30 % in rows 2–3 under chainage 0–8 m (the waterside wedge a flood
    /// soaks) and, when `shallow`, −30 % in row 0 under 14–17 m.
    fn wedge(shallow: bool) -> Vec<f64> {
        let mut c = vec![0.0; 80];
        for j in 2..4 {
            for i in 0..8 {
                c[j * 20 + i] = -30.0;
            }
        }
        if shallow {
            c[14..17].fill(-30.0);
        }
        c
    }

    #[test]
    fn wetting_below_the_river_stage_is_a_notice_not_a_zone_alert() {
        let g = patch_grid();
        let rules = RuleSet { stage: Some(StageRule { margin_m: 0.5 }), ..plain_rules() };
        // Stage at −1.5 m plus 0.5 m margin: cells with centroids below −1.0 m
        // (rows 1–3) are below it; the wedge lies wholly below.
        let mut m = LineMonitor::new(rules.clone(), 1.0).unwrap();
        let out =
            run_with_stage(&mut m, &g, &[wedge(false), wedge(false), wedge(false)], Some(-1.5));
        let raised: Vec<&Transition> = out.iter().flat_map(|o| &o.transitions).collect();
        assert_eq!(raised.len(), 1, "{raised:?}");
        // Persistence 2: the notice is raised on the second epoch.
        assert_eq!(
            (raised[0].subject, raised[0].level, raised[0].time),
            (Subject::LineWideWetting, Level::Notice, DAY)
        );
        assert!(out.iter().all(|o| o.warnings.is_empty()));
        assert!(out[0].assessments.iter().all(|a| a.level.is_none() && a.below_stage));
        let Detail::LineWideWetting(n) = &m.alerts()[0].detail else {
            panic!("wetting detail expected")
        };
        assert_eq!(n.line_wide, None);
        let w = n.below_stage.as_ref().expect("wetting below the stage");
        assert_eq!((w.stage_m, w.margin_m, w.zones), (-1.5, 0.5, 1));
        assert_eq!(
            (w.x_range, w.depth_range, w.area_m2, w.peak_change_pct),
            ((0.0, 8.0), (2.0, 4.0), 16.0, -30.0)
        );

        // A zone above the stage is judged as ever: the shallow patch raises
        // level 3 (−35 % is not reached: level 2, −20 %), the wedge stays a notice.
        let mut m = LineMonitor::new(rules.clone(), 1.0).unwrap();
        let out = run_with_stage(&mut m, &g, &[wedge(true), wedge(true)], Some(-1.5));
        let mut raised: Vec<(Subject, Level)> =
            out[1].transitions.iter().map(|t| (t.subject, t.level)).collect();
        raised.sort();
        assert_eq!(raised.len(), 2, "{raised:?}");
        assert!(matches!(
            raised[0],
            (Subject::Zone { direction: Direction::Drop, .. }, Level::Trigger(2))
        ));
        assert_eq!(raised[1], (Subject::LineWideWetting, Level::Notice));
        let zone = m.alerts().iter().find(|a| a.level == Level::Trigger(2)).unwrap();
        let Detail::Zone(d) = &zone.detail else { panic!("zone detail expected") };
        assert_eq!(d.x_range, (14.0, 17.0));

        // With the stage low (−3.2 m + 0.5 m: only row 3 below), row 2 of the
        // wedge is above it and the wedge is a zone alert.
        let mut m = LineMonitor::new(rules.clone(), 1.0).unwrap();
        let out = run_with_stage(&mut m, &g, &[wedge(false), wedge(false)], Some(-3.2));
        let raised: Vec<Level> = out[1].transitions.iter().map(|t| t.level).collect();
        assert_eq!(raised, [Level::Trigger(2)]);

        // Without a stage for the epochs the rule cannot apply: a warning,
        // and the wedge is a zone alert.
        let mut m = LineMonitor::new(rules, 1.0).unwrap();
        let out = run_with_stage(&mut m, &g, &[wedge(false), wedge(false)], None);
        assert_eq!(out[0].warnings, [MonitorWarning::NoRiverStage]);
        let raised: Vec<Level> = out[1].transitions.iter().map(|t| t.level).collect();
        assert_eq!(raised, [Level::Trigger(2)]);

        // A stage that is not a number is refused.
        let mut m = LineMonitor::new(
            RuleSet { stage: Some(StageRule { margin_m: 0.5 }), ..plain_rules() },
            1.0,
        )
        .unwrap();
        let field = ChangeField::new(&g, wedge(false), SensitivityMask::from_flags(vec![true; 80]))
            .unwrap();
        let input = EpochInput {
            time: 0,
            field: &field,
            noise: None,
            envelope: None,
            quality: &[],
            river_stage_m: Some(f64::NAN),
        };
        assert!(matches!(m.process(&input), Err(AlertsError::Zones(_))));
    }

    #[test]
    fn river_stage_at_an_epoch_from_gauge_readings() {
        let h = 3600;
        let samples = [(0, 1.0), (6 * h, 2.0), (12 * h, 1.4)];
        // The latest reading at or before the epoch, never a later one.
        assert_eq!(stage_at(&samples, h / 3, 24 * h), Some(1.0));
        assert_eq!(stage_at(&samples, 6 * h, 24 * h), Some(2.0));
        assert_eq!(stage_at(&samples, 6 * h - 1, 24 * h), Some(1.0));
        // Older than the limit: none.
        assert_eq!(stage_at(&samples, 13 * h, 6 * h), Some(1.4));
        assert_eq!(stage_at(&samples, 18 * h, 6 * h), Some(1.4));
        assert_eq!(stage_at(&samples, 18 * h + 1, 6 * h), None);
        // Before the first reading: none.
        assert_eq!(stage_at(&samples, -1, 6 * h), None);
        assert_eq!(stage_at(&[], 0, h), None);
    }

    #[test]
    fn line_wide_wetting_is_one_notice_and_the_path_one_zone_alert() {
        let g = grid(40, 6, 1.0, 0.5);
        let rules =
            RuleSet { noise: None, seasonal: None, persistence_epochs: 2, ..RuleSet::default() };
        let (m, out) = check(rules, &g, &[flood(), flood()]);
        assert!(out[0].is_empty());
        let mut raised = out[1].clone();
        raised.sort_by_key(|t| t.level);
        assert_eq!(raised.len(), 2);
        assert_eq!((raised[0].subject, raised[0].level), (Subject::LineWideWetting, Level::Notice));
        assert!(matches!(raised[1].subject, Subject::Zone { direction: Direction::Drop, .. }));
        // Relative change (0.65/0.85 − 1)·100 = −23.5 % reaches level 2 (−20 %), not 3.
        assert_eq!(raised[1].level, Level::Trigger(2));
        let zone = m.alerts().iter().find(|a| a.level == Level::Trigger(2)).unwrap();
        let Detail::Zone(d) = &zone.detail else { panic!("zone detail expected") };
        assert_eq!(d.x_range, (20.0, 23.0));
        assert_eq!(d.depth_range, (0.5, 2.5));
        assert!((d.peak_judged_pct - (0.65 / 0.85 - 1.0) * 100.0).abs() < 1e-9);
        assert_eq!(d.peak_change_pct, -35.0);
        let wet = m.alerts().iter().find(|a| a.level == Level::Notice).unwrap();
        let Detail::LineWideWetting(n) = &wet.detail else { panic!("wetting detail expected") };
        let w = n.line_wide.as_ref().expect("wetting along the line");
        assert_eq!((w.median_change_pct, w.x_range), (-15.0, (0.0, 40.0)));
        assert_eq!(n.below_stage, None, "no river-stage rule");
        // Judged on raw change instead, the whole line is one zone alert.
        let raw = RuleSet {
            lateral: None,
            noise: None,
            seasonal: None,
            persistence_epochs: 2,
            ..RuleSet::default()
        };
        let (m, out) = check(raw, &g, &[flood(), flood()]);
        assert_eq!(out[1].len(), 1);
        let Detail::Zone(d) = &m.alerts()[0].detail else { panic!("zone detail expected") };
        assert_eq!((d.x_range, m.alerts()[0].level), ((0.0, 40.0), Level::Trigger(3)));
    }

    /// Seeded simulation through the monitor with the noise-calibrated level:
    /// independent Gaussian noise σ_i ∈ [1, 4] % per cell, k = 2, 2 m² minimum.
    #[test]
    fn noise_calibrated_false_alarms_stay_within_the_stated_bound() {
        let g = grid(24, 6, 1.0, 1.0);
        let n = g.len();
        let mut rng = StdRng::seed_from_u64(99);
        let sigma: Vec<f64> = (0..n).map(|_| rng.random_range(1.0..4.0)).collect();
        let noise = NoiseModel::from_sigma(sigma.iter().map(|&s| Some(s)).collect()).unwrap();
        // Fixed level −1 % is gentler than every 2σ, so the noise gate decides.
        let rules = RuleSet {
            levels: vec![TriggerLevel {
                change_pct: -1.0,
                min_area_m2: 2.0,
                min_width_spacings: 0.0,
            }],
            clear_change_pct: -0.5,
            persistence_epochs: 2,
            clear_epochs: 1,
            lateral: None,
            noise: Some(NoiseRule { k: 2.0 }),
            seasonal: None,
            ..RuleSet::default()
        };
        let bound = rules.false_alarm_bound(&g, &vec![true; n], 10_000_000).unwrap().unwrap();
        assert_eq!((bound.min_cells, bound.connected_sets.value()), (2, 258.0));
        let mut m = LineMonitor::new(rules, 1.0).unwrap();
        let epochs = 20_000;
        let (mut hits, mut raises) = (0usize, 0usize);
        for e in 0..epochs {
            let change: Vec<f64> = sigma
                .iter()
                .map(|s| (s * rng.sample::<f64, _>(StandardNormal)).max(-99.0))
                .collect();
            let field =
                ChangeField::new(&g, change, SensitivityMask::from_flags(vec![true; n])).unwrap();
            let input = EpochInput {
                time: e * 3600,
                field: &field,
                noise: Some(&noise),
                envelope: None,
                quality: &[],
                river_stage_m: None,
            };
            let out = m.process(&input).unwrap();
            assert!(out.warnings.is_empty());
            hits += usize::from(out.assessments.iter().any(|a| a.level.is_some()));
            raises += out.transitions.iter().filter(|t| t.from.is_none()).count();
        }
        let (rate, raise_rate) = (hits as f64 / epochs as f64, raises as f64 / epochs as f64);
        // Bound N₂·Q(2)² = 0.1335 per epoch; (0.1335)² = 0.0178 per raise. Slack:
        // 3 binomial standard errors.
        let se = |p: f64| (p * (1.0 - p) / epochs as f64).sqrt();
        assert!(
            rate <= bound.per_epoch + 3.0 * se(bound.per_epoch),
            "{rate} vs {}",
            bound.per_epoch
        );
        assert!(rate > 0.7 * bound.per_epoch, "{rate}");
        assert!(
            raise_rate <= bound.per_raise + 3.0 * se(bound.per_raise),
            "{raise_rate} vs {}",
            bound.per_raise
        );
    }

    #[test]
    fn a_bad_quality_event_leaves_the_line_untouched() {
        let g = patch_grid();
        let mut m =
            LineMonitor::new(RuleSet { persistence_epochs: 1, ..plain_rules() }, 1.0).unwrap();
        let field = ChangeField::new(&g, patch(-12.0), SensitivityMask::from_flags(vec![true; 80]))
            .unwrap();
        let bad = [QualityEvent::DropShare { share: -0.1 }];
        let input = EpochInput {
            time: 0,
            field: &field,
            noise: None,
            envelope: None,
            quality: &bad,
            river_stage_m: None,
        };
        assert!(matches!(m.process(&input), Err(AlertsError::InvalidEvent(_))));
        assert!(m.tracker().tracks().is_empty() && m.alerts().is_empty());
        let input = EpochInput { quality: &[], ..input };
        assert_eq!(m.process(&input).unwrap().transitions.len(), 1, "same epoch, now accepted");
    }

    #[test]
    fn missing_noise_model_is_a_warning() {
        let g = patch_grid();
        let mut m =
            LineMonitor::new(RuleSet { seasonal: None, ..RuleSet::default() }, 1.0).unwrap();
        let field = ChangeField::new(&g, patch(-12.0), SensitivityMask::from_flags(vec![true; 80]))
            .unwrap();
        let input = EpochInput {
            time: 0,
            field: &field,
            noise: None,
            envelope: None,
            quality: &[],
            river_stage_m: None,
        };
        assert_eq!(m.process(&input).unwrap().warnings, vec![MonitorWarning::NoNoiseModel]);
        let mut sigma = vec![Some(1.0); 80];
        sigma[3] = None;
        let noise = NoiseModel::from_sigma(sigma).unwrap();
        let input = EpochInput { time: 1, noise: Some(&noise), ..input };
        assert_eq!(
            m.process(&input).unwrap().warnings,
            vec![MonitorWarning::CellsWithoutNoise { cells: 1 }]
        );
        assert_eq!(m.process(&input), Err(AlertsError::TimeNotIncreasing { time: 1, previous: 1 }));
    }

    #[test]
    fn least_squares_slope_of_a_line() {
        // Exactly linear data: the least-squares slope is the line's slope.
        let pts = [(0, -5.5), (DAY, -7.5), (2 * DAY, -9.5), (3 * DAY, -11.5)];
        assert!((slope_per_day(&pts).unwrap() + 2.0).abs() < 1e-12);
        assert_eq!(slope_per_day(&pts[..2]), None);
    }

    #[test]
    fn rate_rule_raises_before_the_threshold_is_reached() {
        let g = patch_grid();
        let frames = [-5.5, -7.5, -9.5, -9.9].map(patch).to_vec();
        let rate = RateRule { drop_pct_per_day: 1.0, window_days: 3.0, level: 1 };
        let (m, out) = check(RuleSet { rate: Some(rate), ..plain_rules() }, &g, &frames);
        assert!(out[..3].iter().all(Vec::is_empty));
        assert_eq!(kinds(&out[3]), vec![(None, AlertState::Raised, Level::Trigger(1))]);
        let Detail::Zone(d) = &m.alerts()[0].detail else { panic!("zone detail expected") };
        // Slope over the 4 epochs of the 3-day window: −7.6/5 = −1.52 %/day (hand-computed).
        assert!((d.rate_pct_per_day.unwrap() + 1.52).abs() < 1e-12);
        let (_, out) = check(plain_rules(), &g, &frames);
        assert!(out.iter().all(Vec::is_empty), "no rate rule, no alert");
    }

    #[test]
    fn rise_rule_raises_on_resistivity_rises() {
        let g = patch_grid();
        let rise = RiseRule {
            change_pct: 20.0,
            clear_change_pct: 10.0,
            min_area_m2: 1.0,
            min_width_spacings: 1.0,
            level: 2,
        };
        let rules = RuleSet { persistence_epochs: 1, rise: Some(rise), ..plain_rules() };
        let (_, out) = check(rules, &g, &[patch(30.0)]);
        assert_eq!(out[0].len(), 1);
        assert_eq!(out[0][0].level, Level::Trigger(2));
        assert!(matches!(out[0][0].subject, Subject::Zone { direction: Direction::Rise, .. }));
        let (_, out) =
            check(RuleSet { persistence_epochs: 1, ..plain_rules() }, &g, &[patch(30.0)]);
        assert!(out[0].is_empty());
    }

    #[test]
    fn seasonal_envelope_holds_back_changes_seen_in_earlier_years() {
        let g = patch_grid();
        let year = 365 * DAY + DAY / 4;
        let now = 3 * year;
        let last_year = patch(-30.0);
        let history = [PastEpoch { time: now - year, change_pct: &last_year }];
        let params = EnvelopeParams { min_samples: 1, ..EnvelopeParams::default() };
        let env = SeasonalEnvelope::from_history(now, g.len(), &history, &params).unwrap();
        let rules = RuleSet {
            persistence_epochs: 1,
            seasonal: Some(SeasonalRule { margin_pct: 2.0 }),
            ..plain_rules()
        };
        let mask = SensitivityMask::from_flags(vec![true; 80]);
        let within = ChangeField::new(&g, patch(-25.0), mask.clone()).unwrap();
        let beyond = ChangeField::new(&g, patch(-40.0), mask).unwrap();
        let mut m = LineMonitor::new(rules.clone(), 1.0).unwrap();
        let input = EpochInput {
            time: now,
            field: &within,
            noise: None,
            envelope: Some(&env),
            quality: &[],
            river_stage_m: None,
        };
        assert!(
            m.process(&input).unwrap().transitions.is_empty(),
            "−25 % is within last year's −30 %"
        );
        let mut m = LineMonitor::new(rules, 1.0).unwrap();
        let input = EpochInput { field: &beyond, ..input };
        let out = m.process(&input).unwrap();
        assert_eq!(kinds(&out.transitions), vec![(None, AlertState::Raised, Level::Trigger(3))]);
    }

    #[test]
    fn data_quality_events_raise_notices() {
        let mut m = LineMonitor::new(RuleSet::default(), 1.0).unwrap();
        let t0 = 100 * DAY;
        let out = m
            .observe_quality(t0, &[QualityEvent::LineSilent { last_epoch: t0 - 40 * 3600 }])
            .unwrap();
        assert_eq!(kinds(&out), vec![(None, AlertState::Raised, Level::Notice)]);
        assert_eq!(out[0].subject, Subject::Quality(QualityKind::LineSilent));
        let out = m.observe_quality(t0 + 3600, &[]).unwrap();
        assert_eq!(
            kinds(&out),
            vec![(Some(AlertState::Raised), AlertState::Resolved, Level::Notice)]
        );
        let out = m
            .observe_quality(
                t0 + 7200,
                &[
                    QualityEvent::LineSilent { last_epoch: t0 },
                    QualityEvent::DropShare { share: 0.1 },
                    QualityEvent::ElectrodeOutOfService { electrode: 7 },
                ],
            )
            .unwrap();
        let subjects: Vec<Subject> = out.iter().map(|t| t.subject).collect();
        assert_eq!(
            subjects,
            vec![Subject::Quality(QualityKind::ElectrodeOutOfService { electrode: 7 })]
        );
        let out = m.observe_quality(t0 + 7300, &[QualityEvent::DropShare { share: 0.5 }]).unwrap();
        assert_eq!(out.len(), 2, "high drop share raised, electrode notice cleared");
        assert!(matches!(
            m.observe_quality(t0 + 7400, &[QualityEvent::DropShare { share: 1.5 }]),
            Err(AlertsError::InvalidEvent(_))
        ));
    }

    /// Two patches on a 20 × 1 line: columns `a` at `va` and `b` at `vb`.
    fn two(a: std::ops::Range<usize>, va: f64, b: std::ops::Range<usize>, vb: f64) -> Vec<f64> {
        let mut c = vec![0.0; 20];
        a.for_each(|i| c[i] = va);
        b.for_each(|i| c[i] = vb);
        c
    }

    #[test]
    fn merging_zones_merge_their_alerts() {
        let g = grid(20, 1, 1.0, 1.0);
        // A (3 cells, −25 %) and B (5 cells, −12 %) both alert, then join:
        // B is larger, equally old, and survives; A's alert ends, B's escalates.
        let apart = two(2..5, -25.0, 8..13, -12.0);
        let joined = two(2..5, -25.0, 5..13, -12.0);
        let (m, out) = check(plain_rules(), &g, &[apart.clone(), apart, joined]);
        assert_eq!(out[1].len(), 2);
        let (a_alert, b_alert) = (out[1][0].alert, out[1][1].alert);
        assert_eq!(out[2][0].alert, a_alert);
        assert_eq!(out[2][0].to, AlertState::Resolved);
        assert_eq!(out[2][0].reason, Reason::MergedInto { alert: b_alert });
        assert_eq!(out[2][1].alert, b_alert);
        assert_eq!(out[2][1].reason, Reason::Escalated { from: Level::Trigger(1) });
        assert_eq!(m.alerts().len(), 1);
        assert_eq!(m.alerts()[0].level, Level::Trigger(2));
        // An alerting young zone joining an older quiet zone: the alert moves.
        let rules = RuleSet { persistence_epochs: 1, ..plain_rules() };
        let frames = [
            two(8..13, -7.0, 0..0, 0.0),
            two(2..5, -25.0, 8..13, -7.0),
            two(2..13, -25.0, 0..0, 0.0),
        ];
        let (m, out) = check(rules, &g, &frames);
        let moved = &out[2][0];
        assert!(matches!(moved.reason, Reason::Moved { .. }));
        assert_eq!(m.alerts()[0].subject, Subject::Zone { track: 1, direction: Direction::Drop });
    }

    #[test]
    fn rules_are_validated_with_the_field_named() {
        assert_eq!(RuleSet::default().validate(), Ok(()));
        let field = |r: RuleSet| match r.validate() {
            Err(AlertsError::InvalidRule { field, .. }) => field,
            other => panic!("expected an invalid rule, got {other:?}"),
        };
        let mut r = RuleSet::default();
        r.levels[1].change_pct = -5.0;
        assert_eq!(field(r), "levels[1].change_pct");
        assert_eq!(
            field(RuleSet { clear_change_pct: -12.0, ..RuleSet::default() }),
            "clear_change_pct"
        );
        assert_eq!(
            field(RuleSet { persistence_epochs: 0, ..RuleSet::default() }),
            "persistence_epochs"
        );
        let rate = RateRule { drop_pct_per_day: 1.0, window_days: 3.0, level: 4 };
        assert_eq!(field(RuleSet { rate: Some(rate), ..RuleSet::default() }), "rate.level");
        assert_eq!(
            LineMonitor::new(RuleSet::default(), 0.0),
            Err(AlertsError::InvalidSpacing(0.0))
        );
    }

    #[test]
    fn every_rule_out_of_range_is_refused_with_its_field() {
        // The ranges are the ones stated on each field of RuleSet.
        let field = |r: RuleSet| match r.validate() {
            Err(AlertsError::InvalidRule { field, .. }) => field,
            other => panic!("expected an invalid rule, got {other:?}"),
        };
        let with = |f: &dyn Fn(&mut RuleSet)| {
            let mut r = RuleSet::default();
            f(&mut r);
            field(r)
        };
        assert_eq!(with(&|r| r.levels.clear()), "levels");
        assert_eq!(with(&|r| r.levels = vec![r.levels[0]; 10]), "levels");
        // Drops are negative, each level beyond the one before.
        assert_eq!(with(&|r| r.levels[0].change_pct = 5.0), "levels[0].change_pct");
        assert_eq!(with(&|r| r.levels[0].change_pct = 0.0), "levels[0].change_pct");
        assert_eq!(with(&|r| r.levels[2].change_pct = -20.0), "levels[2].change_pct");
        assert_eq!(with(&|r| r.levels[2].change_pct = -100.0), "levels[2].change_pct");
        assert_eq!(with(&|r| r.levels[1].change_pct = f64::NAN), "levels[1].change_pct");
        assert_eq!(with(&|r| r.levels[1].min_area_m2 = -1.0), "levels[1].min_area_m2");
        assert_eq!(
            with(&|r| r.levels[2].min_width_spacings = f64::INFINITY),
            "levels[2].min_width_spacings"
        );
        // Persistence and hysteresis.
        assert_eq!(with(&|r| r.persistence_epochs = 0), "persistence_epochs");
        assert_eq!(with(&|r| r.clear_epochs = 0), "clear_epochs");
        assert_eq!(with(&|r| r.clear_change_pct = 0.0), "clear_change_pct");
        assert_eq!(with(&|r| r.clear_change_pct = -10.0), "clear_change_pct");
        assert_eq!(with(&|r| r.clear_change_pct = 2.0), "clear_change_pct");
        // Lateral contrast.
        let lat = |f: &dyn Fn(&mut LateralRule)| {
            with(&|r| {
                let mut l = r.lateral.unwrap();
                f(&mut l);
                r.lateral = Some(l);
            })
        };
        assert_eq!(lat(&|l| l.band_thickness_spacings = 0.0), "lateral.band_thickness_spacings");
        assert_eq!(lat(&|l| l.wetting_change_pct = 3.0), "lateral.wetting_change_pct");
        assert_eq!(lat(&|l| l.extensive_share = 0.0), "lateral.extensive_share");
        assert_eq!(lat(&|l| l.extensive_share = 1.5), "lateral.extensive_share");
        assert_eq!(lat(&|l| l.min_band_cells = 0), "lateral.min_band_cells");
        // Noise, rate, rise, seasonal.
        assert_eq!(with(&|r| r.noise = Some(NoiseRule { k: 0.0 })), "noise.k");
        let rate = RateRule { drop_pct_per_day: 2.0, window_days: 3.0, level: 1 };
        assert_eq!(
            with(&|r| r.rate = Some(RateRule { drop_pct_per_day: -1.0, ..rate })),
            "rate.drop_pct_per_day"
        );
        assert_eq!(
            with(&|r| r.rate = Some(RateRule { window_days: 0.0, ..rate })),
            "rate.window_days"
        );
        assert_eq!(with(&|r| r.rate = Some(RateRule { level: 0, ..rate })), "rate.level");
        let rise = RiseRule {
            change_pct: 20.0,
            clear_change_pct: 10.0,
            min_area_m2: 1.0,
            min_width_spacings: 1.0,
            level: 1,
        };
        assert_eq!(
            with(&|r| r.rise = Some(RiseRule { change_pct: -20.0, ..rise })),
            "rise.change_pct"
        );
        assert_eq!(
            with(&|r| r.rise = Some(RiseRule { clear_change_pct: 25.0, ..rise })),
            "rise.clear_change_pct"
        );
        assert_eq!(
            with(&|r| r.rise = Some(RiseRule { min_area_m2: -0.5, ..rise })),
            "rise.min_area_m2"
        );
        assert_eq!(with(&|r| r.rise = Some(RiseRule { level: 4, ..rise })), "rise.level");
        assert_eq!(
            with(&|r| r.seasonal = Some(SeasonalRule { margin_pct: -1.0 })),
            "seasonal.margin_pct"
        );
        // Data quality.
        assert_eq!(with(&|r| r.quality.silent_after_s = 0), "quality.silent_after_s");
        assert_eq!(with(&|r| r.quality.max_drop_share = 0.0), "quality.max_drop_share");
        assert_eq!(with(&|r| r.quality.max_drop_share = 1.2), "quality.max_drop_share");
        assert_eq!(with(&|r| r.quality.clear_after = 0), "quality.clear_after");
        // Within range: every optional rule on, one level, no rule off.
        let full = RuleSet {
            levels: vec![TriggerLevel {
                change_pct: -15.0,
                min_area_m2: 0.0,
                min_width_spacings: 0.0,
            }],
            clear_change_pct: -14.9,
            rate: Some(rate),
            rise: Some(rise),
            ..RuleSet::default()
        };
        assert_eq!(full.validate(), Ok(()));
        let bare = RuleSet { lateral: None, noise: None, seasonal: None, ..RuleSet::default() };
        assert_eq!(bare.validate(), Ok(()));
    }

    #[test]
    fn engine_state_round_trips() {
        let g = patch_grid();
        let (m, out) =
            check(RuleSet { persistence_epochs: 1, ..plain_rules() }, &g, &[patch(-12.0)]);
        let id = out[0][0].alert;
        let mut e = AlertEngine::from_state(m.engine().state().clone()).unwrap();
        assert_eq!(e.acknowledge(id, "B", "ok", DAY).unwrap().to, AlertState::Acknowledged);
        let mut bad = m.engine().state().clone();
        bad.next_id = id;
        assert!(matches!(AlertEngine::from_state(bad), Err(AlertsError::InvalidState(_))));
        let resumed = LineMonitor::resume(plain_rules(), 1.0, m.tracker().clone(), e).unwrap();
        assert_eq!(resumed.alerts()[0].state, AlertState::Acknowledged);
    }
}
