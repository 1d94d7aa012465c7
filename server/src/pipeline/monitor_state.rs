//! Stored form (JSON) of a line's monitor state: the zone tracker and the alert
//! engine of `ohmline_core`. Core types carry no serialisation; these DTOs mirror
//! them field for field and convert both ways.

use ohmline_core::alerts::{
    Alert, AlertState, Detail, EngineState, Level, QualityEvent, QualityKind, StageWetting,
    Subject, SubjectRecord, WettingNotice, ZoneDetail,
};
use ohmline_core::zones::{Direction, LineWideWetting, Track, TrackerState, ZoneSnapshot};
use serde::{Deserialize, Serialize};

/// Tracker and engine state of one line.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MonitorState {
    /// Zone tracker.
    pub tracker: TrackerDto,
    /// Alert engine.
    pub engine: EngineDto,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DirectionDto {
    Drop,
    Rise,
}

impl From<Direction> for DirectionDto {
    fn from(d: Direction) -> Self {
        match d {
            Direction::Drop => DirectionDto::Drop,
            Direction::Rise => DirectionDto::Rise,
        }
    }
}

impl From<DirectionDto> for Direction {
    fn from(d: DirectionDto) -> Self {
        match d {
            DirectionDto::Drop => Direction::Drop,
            DirectionDto::Rise => Direction::Rise,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SnapshotDto {
    pub time: i64,
    pub area_m2: f64,
    pub mean_change_pct: f64,
    pub peak_change_pct: f64,
    pub peak_judged_pct: f64,
    pub centroid: [f64; 2],
    pub x_range: (f64, f64),
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrackDto {
    pub id: u64,
    pub direction: DirectionDto,
    pub parent: Option<u64>,
    pub cells: Vec<usize>,
    pub missed: u32,
    pub history: Vec<SnapshotDto>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrackerDto {
    pub next_id: u64,
    pub last_time: Option<i64>,
    pub tracks: Vec<TrackDto>,
}

impl From<&TrackerState> for TrackerDto {
    fn from(s: &TrackerState) -> Self {
        TrackerDto {
            next_id: s.next_id,
            last_time: s.last_time,
            tracks: s
                .tracks
                .iter()
                .map(|t| TrackDto {
                    id: t.id,
                    direction: t.direction.into(),
                    parent: t.parent,
                    cells: t.cells.clone(),
                    missed: t.missed,
                    history: t
                        .history
                        .iter()
                        .map(|h| SnapshotDto {
                            time: h.time,
                            area_m2: h.area_m2,
                            mean_change_pct: h.mean_change_pct,
                            peak_change_pct: h.peak_change_pct,
                            peak_judged_pct: h.peak_judged_pct,
                            centroid: h.centroid,
                            x_range: h.x_range,
                        })
                        .collect(),
                })
                .collect(),
        }
    }
}

impl From<TrackerDto> for TrackerState {
    fn from(s: TrackerDto) -> Self {
        TrackerState {
            next_id: s.next_id,
            last_time: s.last_time,
            tracks: s
                .tracks
                .into_iter()
                .map(|t| Track {
                    id: t.id,
                    direction: t.direction.into(),
                    parent: t.parent,
                    cells: t.cells,
                    missed: t.missed,
                    history: t
                        .history
                        .into_iter()
                        .map(|h| ZoneSnapshot {
                            time: h.time,
                            area_m2: h.area_m2,
                            mean_change_pct: h.mean_change_pct,
                            peak_change_pct: h.peak_change_pct,
                            peak_judged_pct: h.peak_judged_pct,
                            centroid: h.centroid,
                            x_range: h.x_range,
                        })
                        .collect(),
                })
                .collect(),
        }
    }
}

/// A level: 0 = notice, n = trigger level n.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct LevelDto(pub u8);

impl From<Level> for LevelDto {
    fn from(l: Level) -> Self {
        match l {
            Level::Notice => LevelDto(0),
            Level::Trigger(n) => LevelDto(n),
        }
    }
}

impl From<LevelDto> for Level {
    fn from(l: LevelDto) -> Self {
        if l.0 == 0 { Level::Notice } else { Level::Trigger(l.0) }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum SubjectDto {
    Zone { track: u64, direction: DirectionDto },
    LineWideWetting,
    LineSilent,
    HighDropShare,
    ElectrodeOutOfService { electrode: usize },
}

impl From<Subject> for SubjectDto {
    fn from(s: Subject) -> Self {
        match s {
            Subject::Zone { track, direction } => {
                SubjectDto::Zone { track, direction: direction.into() }
            }
            Subject::LineWideWetting => SubjectDto::LineWideWetting,
            Subject::Quality(QualityKind::LineSilent) => SubjectDto::LineSilent,
            Subject::Quality(QualityKind::HighDropShare) => SubjectDto::HighDropShare,
            Subject::Quality(QualityKind::ElectrodeOutOfService { electrode }) => {
                SubjectDto::ElectrodeOutOfService { electrode }
            }
        }
    }
}

impl From<SubjectDto> for Subject {
    fn from(s: SubjectDto) -> Self {
        match s {
            SubjectDto::Zone { track, direction } => {
                Subject::Zone { track, direction: direction.into() }
            }
            SubjectDto::LineWideWetting => Subject::LineWideWetting,
            SubjectDto::LineSilent => Subject::Quality(QualityKind::LineSilent),
            SubjectDto::HighDropShare => Subject::Quality(QualityKind::HighDropShare),
            SubjectDto::ElectrodeOutOfService { electrode } => {
                Subject::Quality(QualityKind::ElectrodeOutOfService { electrode })
            }
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ZoneDetailDto {
    pub direction: DirectionDto,
    pub x_range: (f64, f64),
    pub z_range: (f64, f64),
    pub depth_range: (f64, f64),
    pub centroid: [f64; 2],
    pub area_m2: f64,
    pub width_m: f64,
    pub peak_change_pct: f64,
    pub mean_change_pct: f64,
    pub peak_judged_pct: f64,
    pub good_share: f64,
    pub core_area_m2: Option<f64>,
    pub rate_pct_per_day: Option<f64>,
}

/// Wetting along the line (lateral-contrast rule).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LineWideDto {
    pub depth_top_m: f64,
    pub depth_bottom_m: f64,
    pub median_change_pct: f64,
    pub wetted_share: f64,
    pub bands: Vec<usize>,
    pub x_range: (f64, f64),
}

/// Zones explained by the river stage (river-stage rule).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StageWettingDto {
    pub stage_m: f64,
    pub margin_m: f64,
    pub zones: usize,
    pub area_m2: f64,
    pub x_range: (f64, f64),
    pub depth_range: (f64, f64),
    pub peak_change_pct: f64,
}

/// The wetting notice: the line-wide part's fields at the top level (as
/// stored before the river-stage part existed), the river-stage part beside
/// them; either may be absent.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WettingDto {
    #[serde(flatten)]
    pub line_wide: Option<LineWideDto>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub below_stage: Option<StageWettingDto>,
}

impl From<&WettingNotice> for WettingDto {
    fn from(n: &WettingNotice) -> Self {
        WettingDto {
            line_wide: n.line_wide.as_ref().map(|w| LineWideDto {
                depth_top_m: w.depth_top_m,
                depth_bottom_m: w.depth_bottom_m,
                median_change_pct: w.median_change_pct,
                wetted_share: w.wetted_share,
                bands: w.bands.clone(),
                x_range: w.x_range,
            }),
            below_stage: n.below_stage.as_ref().map(|b| StageWettingDto {
                stage_m: b.stage_m,
                margin_m: b.margin_m,
                zones: b.zones,
                area_m2: b.area_m2,
                x_range: b.x_range,
                depth_range: b.depth_range,
                peak_change_pct: b.peak_change_pct,
            }),
        }
    }
}

impl From<WettingDto> for WettingNotice {
    fn from(d: WettingDto) -> Self {
        WettingNotice {
            line_wide: d.line_wide.map(|w| LineWideWetting {
                depth_top_m: w.depth_top_m,
                depth_bottom_m: w.depth_bottom_m,
                median_change_pct: w.median_change_pct,
                wetted_share: w.wetted_share,
                bands: w.bands,
                x_range: w.x_range,
            }),
            below_stage: d.below_stage.map(|b| StageWetting {
                stage_m: b.stage_m,
                margin_m: b.margin_m,
                zones: b.zones,
                area_m2: b.area_m2,
                x_range: b.x_range,
                depth_range: b.depth_range,
                peak_change_pct: b.peak_change_pct,
            }),
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum DetailDto {
    Zone(ZoneDetailDto),
    LineWideWetting(WettingDto),
    LineSilent { last_epoch: i64 },
    DropShare { share: f64 },
    ElectrodeOutOfService { electrode: usize },
}

impl From<&Detail> for DetailDto {
    fn from(d: &Detail) -> Self {
        match d {
            Detail::Zone(z) => DetailDto::Zone(ZoneDetailDto {
                direction: z.direction.into(),
                x_range: z.x_range,
                z_range: z.z_range,
                depth_range: z.depth_range,
                centroid: z.centroid,
                area_m2: z.area_m2,
                width_m: z.width_m,
                peak_change_pct: z.peak_change_pct,
                mean_change_pct: z.mean_change_pct,
                peak_judged_pct: z.peak_judged_pct,
                good_share: z.good_share,
                core_area_m2: z.core_area_m2,
                rate_pct_per_day: z.rate_pct_per_day,
            }),
            Detail::LineWideWetting(n) => DetailDto::LineWideWetting(n.into()),
            Detail::Quality(QualityEvent::LineSilent { last_epoch }) => {
                DetailDto::LineSilent { last_epoch: *last_epoch }
            }
            Detail::Quality(QualityEvent::DropShare { share }) => {
                DetailDto::DropShare { share: *share }
            }
            Detail::Quality(QualityEvent::ElectrodeOutOfService { electrode }) => {
                DetailDto::ElectrodeOutOfService { electrode: *electrode }
            }
        }
    }
}

impl From<DetailDto> for Detail {
    fn from(d: DetailDto) -> Self {
        match d {
            DetailDto::Zone(z) => Detail::Zone(ZoneDetail {
                direction: z.direction.into(),
                x_range: z.x_range,
                z_range: z.z_range,
                depth_range: z.depth_range,
                centroid: z.centroid,
                area_m2: z.area_m2,
                width_m: z.width_m,
                peak_change_pct: z.peak_change_pct,
                mean_change_pct: z.mean_change_pct,
                peak_judged_pct: z.peak_judged_pct,
                good_share: z.good_share,
                core_area_m2: z.core_area_m2,
                rate_pct_per_day: z.rate_pct_per_day,
            }),
            DetailDto::LineWideWetting(w) => Detail::LineWideWetting(w.into()),
            DetailDto::LineSilent { last_epoch } => {
                Detail::Quality(QualityEvent::LineSilent { last_epoch })
            }
            DetailDto::DropShare { share } => Detail::Quality(QualityEvent::DropShare { share }),
            DetailDto::ElectrodeOutOfService { electrode } => {
                Detail::Quality(QualityEvent::ElectrodeOutOfService { electrode })
            }
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum AlertStateDto {
    Raised,
    Acknowledged,
    Resolved,
}

impl From<AlertState> for AlertStateDto {
    fn from(s: AlertState) -> Self {
        match s {
            AlertState::Raised => AlertStateDto::Raised,
            AlertState::Acknowledged => AlertStateDto::Acknowledged,
            AlertState::Resolved => AlertStateDto::Resolved,
        }
    }
}

impl From<AlertStateDto> for AlertState {
    fn from(s: AlertStateDto) -> Self {
        match s {
            AlertStateDto::Raised => AlertState::Raised,
            AlertStateDto::Acknowledged => AlertState::Acknowledged,
            AlertStateDto::Resolved => AlertState::Resolved,
        }
    }
}

impl AlertStateDto {
    /// The stored text form.
    pub fn as_str(self) -> &'static str {
        match self {
            AlertStateDto::Raised => "raised",
            AlertStateDto::Acknowledged => "acknowledged",
            AlertStateDto::Resolved => "resolved",
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AlertDto {
    pub id: u64,
    pub subject: SubjectDto,
    pub state: AlertStateDto,
    pub level: LevelDto,
    pub raised_at: i64,
    pub since: i64,
    pub updated_at: i64,
    pub persistence: u32,
    pub detail: DetailDto,
}

impl From<&Alert> for AlertDto {
    fn from(a: &Alert) -> Self {
        AlertDto {
            id: a.id,
            subject: a.subject.into(),
            state: a.state.into(),
            level: a.level.into(),
            raised_at: a.raised_at,
            since: a.since,
            updated_at: a.updated_at,
            persistence: a.persistence,
            detail: (&a.detail).into(),
        }
    }
}

impl From<AlertDto> for Alert {
    fn from(a: AlertDto) -> Self {
        Alert {
            id: a.id,
            subject: a.subject.into(),
            state: a.state.into(),
            level: a.level.into(),
            raised_at: a.raised_at,
            since: a.since,
            updated_at: a.updated_at,
            persistence: a.persistence,
            detail: a.detail.into(),
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SubjectRecordDto {
    pub subject: SubjectDto,
    pub runs: Vec<u32>,
    pub run_start: Option<i64>,
    pub clear_run: u32,
    pub suppressed: Option<LevelDto>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EngineDto {
    pub next_id: u64,
    pub alerts: Vec<AlertDto>,
    pub subjects: Vec<SubjectRecordDto>,
}

impl From<&EngineState> for EngineDto {
    fn from(s: &EngineState) -> Self {
        EngineDto {
            next_id: s.next_id,
            alerts: s.alerts.iter().map(AlertDto::from).collect(),
            subjects: s
                .subjects
                .iter()
                .map(|r| SubjectRecordDto {
                    subject: r.subject.into(),
                    runs: r.runs.clone(),
                    run_start: r.run_start,
                    clear_run: r.clear_run,
                    suppressed: r.suppressed.map(Into::into),
                })
                .collect(),
        }
    }
}

impl From<EngineDto> for EngineState {
    fn from(s: EngineDto) -> Self {
        EngineState {
            next_id: s.next_id,
            alerts: s.alerts.into_iter().map(Alert::from).collect(),
            subjects: s
                .subjects
                .into_iter()
                .map(|r| SubjectRecord {
                    subject: r.subject.into(),
                    runs: r.runs,
                    run_start: r.run_start,
                    clear_run: r.clear_run,
                    suppressed: r.suppressed.map(Into::into),
                })
                .collect(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn states_round_trip_through_json() {
        let tracker = TrackerState {
            next_id: 3,
            last_time: Some(1_700_000_000),
            tracks: vec![Track {
                id: 2,
                direction: Direction::Drop,
                parent: Some(1),
                cells: vec![4, 5, 9],
                missed: 1,
                history: vec![ZoneSnapshot {
                    time: 1_700_000_000,
                    area_m2: 3.5,
                    mean_change_pct: -18.0,
                    peak_change_pct: -31.0,
                    peak_judged_pct: -22.0,
                    centroid: [12.5, -2.0],
                    x_range: (11.0, 14.0),
                }],
            }],
        };
        let engine = EngineState {
            next_id: 2,
            alerts: vec![Alert {
                id: 1,
                subject: Subject::Zone { track: 2, direction: Direction::Drop },
                state: AlertState::Acknowledged,
                level: Level::Trigger(2),
                raised_at: 10,
                since: 5,
                updated_at: 20,
                persistence: 3,
                detail: Detail::Quality(QualityEvent::DropShare { share: 0.3 }),
            }],
            subjects: vec![SubjectRecord {
                subject: Subject::Quality(QualityKind::ElectrodeOutOfService { electrode: 7 }),
                runs: vec![1, 2],
                run_start: Some(4),
                clear_run: 0,
                suppressed: Some(Level::Notice),
            }],
        };
        let s = MonitorState { tracker: (&tracker).into(), engine: (&engine).into() };
        let back: MonitorState = serde_json::from_str(&serde_json::to_string(&s).unwrap()).unwrap();
        assert_eq!(TrackerState::from(back.tracker), tracker);
        assert_eq!(EngineState::from(back.engine), engine);
    }

    #[test]
    fn wetting_notices_round_trip_and_earlier_ones_still_read() {
        let line_wide = LineWideWetting {
            depth_top_m: 1.0,
            depth_bottom_m: 3.0,
            median_change_pct: -12.5,
            wetted_share: 0.8,
            bands: vec![2, 3, 4, 5],
            x_range: (0.0, 63.0),
        };
        let below = StageWetting {
            stage_m: 1.8,
            margin_m: 0.5,
            zones: 1,
            area_m2: 5.1,
            x_range: (6.1, 12.0),
            depth_range: (0.2, 2.1),
            peak_change_pct: -35.4,
        };
        for n in [
            WettingNotice { line_wide: Some(line_wide.clone()), below_stage: None },
            WettingNotice { line_wide: None, below_stage: Some(below.clone()) },
            WettingNotice { line_wide: Some(line_wide.clone()), below_stage: Some(below) },
        ] {
            let d = Detail::LineWideWetting(n);
            let json = serde_json::to_string(&DetailDto::from(&d)).unwrap();
            let back: DetailDto = serde_json::from_str(&json).unwrap();
            assert_eq!(Detail::from(back), d, "{json}");
        }
        // As stored before the river-stage part existed.
        let old = r#"{"kind":"line_wide_wetting","depth_top_m":1.0,"depth_bottom_m":3.0,"median_change_pct":-12.5,"wetted_share":0.8,"bands":[2,3,4,5],"x_range":[0.0,63.0]}"#;
        let back: DetailDto = serde_json::from_str(old).unwrap();
        assert_eq!(
            Detail::from(back),
            Detail::LineWideWetting(WettingNotice {
                line_wide: Some(line_wide),
                below_stage: None
            })
        );
    }
}
