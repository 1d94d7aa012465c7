//! Time-series charts (zone histories, river stage, rainfall, temperature) and
//! sparklines (the same lines without axes, for overview tables).
//!
//! Times are seconds since the Unix epoch (UTC) on the horizontal axis with
//! calendar ticks (see [`crate::figures::date_ticks`]). Each series is drawn as
//! straight segments between consecutive samples; a missing sample (`None`)
//! or a step longer than the chart's `max_gap_s` breaks the line, so missing
//! epochs show as gaps, and a sample with no neighbour on either side is drawn
//! as a dot. A series may instead be drawn as bars from zero (amounts per
//! interval, such as rainfall). Threshold lines are dashed horizontal lines
//! with a label; markers are solid vertical lines at a time with a label (the
//! epoch shown beside the chart). A series may be drawn against a second,
//! right-hand axis with its own range.

use plotters::coord::Shift;
use plotters::element::DashedPathElement;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use crate::figures::layout::TickAxis;
use crate::figures::ticks::{date_ticks, format_number, linear_ticks};
use crate::figures::{Canvas, FigureError, draw_titles, font, sealed};

/// Which vertical axis a series or threshold belongs to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Axis {
    /// The left axis.
    Left,
    /// The right (second) axis.
    Right,
}

/// One series: strictly increasing times (s since the Unix epoch) with a value
/// or `None` for a missing epoch.
#[derive(Debug, Clone, PartialEq)]
pub struct TimeSeries {
    label: String,
    times: Vec<i64>,
    values: Vec<Option<f64>>,
    axis: Axis,
    bars: bool,
}

impl TimeSeries {
    /// Checks that times increase strictly and values are finite.
    pub fn new(
        label: impl Into<String>,
        points: &[(i64, Option<f64>)],
        axis: Axis,
    ) -> Result<Self, FigureError> {
        let label = label.into();
        for (index, w) in points.windows(2).enumerate() {
            if w[1].0 <= w[0].0 {
                return Err(FigureError::TimeOrder {
                    series: label,
                    index: index + 1,
                    time: w[1].0,
                });
            }
        }
        if let Some(index) = points.iter().position(|p| p.1.is_some_and(|v| !v.is_finite())) {
            return Err(FigureError::BadValue {
                what: "time-series sample",
                index,
                value: points[index].1.unwrap_or(f64::NAN),
                reason: "not a finite number (use None for a missing epoch)",
            });
        }
        Ok(Self {
            label,
            times: points.iter().map(|p| p.0).collect(),
            values: points.iter().map(|p| p.1).collect(),
            axis,
            bars: false,
        })
    }

    /// The same series drawn as bars from zero (one per sample, no gaps
    /// between them needed): for amounts per interval such as rainfall.
    pub fn with_bars(self) -> Self {
        Self { bars: true, ..self }
    }

    /// Number of samples (present or missing).
    pub fn len(&self) -> usize {
        self.times.len()
    }

    /// Whether the series has no samples.
    pub fn is_empty(&self) -> bool {
        self.times.is_empty()
    }

    /// The series label (legend text).
    pub fn label(&self) -> &str {
        &self.label
    }

    /// The axis the series is drawn against.
    pub fn axis(&self) -> Axis {
        self.axis
    }

    /// Runs of consecutive present samples with no step longer than
    /// `max_gap_s` (when given): each run is a list of (t, value).
    pub fn segments(&self, max_gap_s: Option<i64>) -> Vec<Vec<(i64, f64)>> {
        let mut out: Vec<Vec<(i64, f64)>> = Vec::new();
        let mut run: Vec<(i64, f64)> = Vec::new();
        for (&t, v) in self.times.iter().zip(&self.values) {
            match v {
                Some(v) => {
                    if let (Some(&(t_prev, _)), Some(g)) = (run.last(), max_gap_s) {
                        if t - t_prev > g {
                            out.push(std::mem::take(&mut run));
                        }
                    }
                    run.push((t, *v));
                }
                None => {
                    if !run.is_empty() {
                        out.push(std::mem::take(&mut run));
                    }
                }
            }
        }
        if !run.is_empty() {
            out.push(run);
        }
        out
    }

    fn present(&self) -> impl Iterator<Item = (i64, f64)> + '_ {
        self.times.iter().zip(&self.values).filter_map(|(&t, v)| v.map(|v| (t, v)))
    }
}

/// A horizontal reference line (a trigger level) with its label.
#[derive(Debug, Clone, PartialEq)]
pub struct Threshold {
    /// Level, in the unit of its axis.
    pub value: f64,
    /// Text drawn at the right end of the line.
    pub label: String,
    /// The axis the value refers to.
    pub axis: Axis,
}

/// A vertical line at a time with a label at its top (the epoch on show).
#[derive(Debug, Clone, PartialEq)]
pub struct Marker {
    /// Time, s since the Unix epoch; outside the chart's range it is not drawn.
    pub time: i64,
    /// Text drawn beside the top of the line.
    pub label: String,
}

/// What to draw on a time-series chart.
#[derive(Debug, Clone, PartialEq)]
pub struct TimeChartParams {
    /// Title line.
    pub title: String,
    /// Optional second line.
    pub subtitle: Option<String>,
    /// The series, drawn in order with the Tableau 10 colours.
    pub series: Vec<TimeSeries>,
    /// Threshold lines.
    pub thresholds: Vec<Threshold>,
    /// Left axis title with unit, e.g. "Change (%)".
    pub left_title: String,
    /// Right axis title with unit; the right axis is drawn when a series or
    /// threshold uses it.
    pub right_title: Option<String>,
    /// A step longer than this (s) breaks a line; `None` breaks only at
    /// missing samples.
    pub max_gap_s: Option<i64>,
    /// Time range shown (s since the Unix epoch); `None`: the data's range.
    pub time_range: Option<(i64, i64)>,
    /// Left axis range; `None`: data and thresholds plus 5 % padding.
    pub left_range: Option<(f64, f64)>,
    /// Right axis range; `None`: as for the left.
    pub right_range: Option<(f64, f64)>,
}

/// A checked time-series chart, ready to render with [`crate::figures::Figure`].
#[derive(Debug, Clone)]
pub struct TimeChart {
    title: String,
    subtitle: Option<String>,
    series: Vec<TimeSeries>,
    thresholds: Vec<Threshold>,
    left_title: String,
    right_title: Option<String>,
    max_gap_s: Option<i64>,
    time_range: (i64, i64),
    left_range: (f64, f64),
    right_range: Option<(f64, f64)>,
    markers: Vec<Marker>,
}

fn check_range(r: (f64, f64)) -> Result<(), FigureError> {
    if r.0.is_finite() && r.1.is_finite() && r.1 > r.0 {
        Ok(())
    } else {
        Err(FigureError::BadLimits {
            lo: r.0,
            hi: r.1,
            reason: "axis range must be finite and increasing",
        })
    }
}

/// Time range of the data, widened to an hour either side of a single time.
fn time_extent(
    series: &[TimeSeries],
    given: Option<(i64, i64)>,
) -> Result<(i64, i64), FigureError> {
    if let Some(r) = given {
        if r.1 <= r.0 {
            return Err(FigureError::BadLimits {
                lo: r.0 as f64,
                hi: r.1 as f64,
                reason: "time range must be increasing",
            });
        }
        return Ok(r);
    }
    let lo = series.iter().filter_map(|s| s.times.first()).min().copied();
    let hi = series.iter().filter_map(|s| s.times.last()).max().copied();
    Ok(match (lo, hi) {
        (Some(lo), Some(hi)) if hi > lo => (lo, hi),
        (Some(t), _) => (t - 3600, t + 3600),
        _ => (0, 86_400),
    })
}

/// Value range of the series and thresholds on `axis`, padded by 5 % (±1
/// around a single value, 0–1 with no data).
fn value_extent(series: &[TimeSeries], thresholds: &[Threshold], axis: Axis) -> (f64, f64) {
    let vals = series
        .iter()
        .filter(|s| s.axis == axis)
        .flat_map(|s| s.present().map(|p| p.1))
        .chain(thresholds.iter().filter(|t| t.axis == axis).map(|t| t.value));
    let (lo, hi) = vals.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| (a.min(v), b.max(v)));
    if !lo.is_finite() {
        (0.0, 1.0)
    } else if hi > lo {
        let pad = 0.05 * (hi - lo);
        (lo - pad, hi + pad)
    } else {
        (lo - 1.0, hi + 1.0)
    }
}

impl TimeChart {
    /// Checks ranges and thresholds; series were checked when built.
    pub fn new(p: TimeChartParams) -> Result<Self, FigureError> {
        if let Some(i) = p.thresholds.iter().position(|t| !t.value.is_finite()) {
            return Err(FigureError::BadValue {
                what: "threshold",
                index: i,
                value: p.thresholds[i].value,
                reason: "not a finite number",
            });
        }
        if let Some(g) = p.max_gap_s.filter(|g| *g <= 0) {
            return Err(FigureError::Parameter {
                name: "max_gap_s",
                value: g as f64,
                reason: "must be positive",
            });
        }
        let time_range = time_extent(&p.series, p.time_range)?;
        let left_range =
            p.left_range.unwrap_or_else(|| value_extent(&p.series, &p.thresholds, Axis::Left));
        check_range(left_range)?;
        let uses_right = p.series.iter().any(|s| s.axis == Axis::Right)
            || p.thresholds.iter().any(|t| t.axis == Axis::Right);
        let right_range = if uses_right {
            let r = p
                .right_range
                .unwrap_or_else(|| value_extent(&p.series, &p.thresholds, Axis::Right));
            check_range(r)?;
            Some(r)
        } else {
            None
        };
        Ok(Self {
            title: p.title,
            subtitle: p.subtitle,
            series: p.series,
            thresholds: p.thresholds,
            left_title: p.left_title,
            right_title: p.right_title,
            max_gap_s: p.max_gap_s,
            time_range,
            left_range,
            right_range,
            markers: Vec::new(),
        })
    }

    /// Adds a marker (drawn over the series).
    pub fn with_marker(mut self, m: Marker) -> Self {
        self.markers.push(m);
        self
    }

    /// The time range shown, s since the Unix epoch.
    pub fn time_range(&self) -> (i64, i64) {
        self.time_range
    }
}

/// The colour of series `i` (Tableau 10, repeating).
pub(super) fn series_colour(i: usize) -> RGBColor {
    let c = colorous::TABLEAU10[i % colorous::TABLEAU10.len()];
    RGBColor(c.r, c.g, c.b)
}

const THRESHOLD_COLOUR: RGBColor = RGBColor(170, 30, 30);
/// Colour of markers: near-black, apart from the Tableau 10 series colours.
pub(super) const MARKER_COLOUR: RGBColor = RGBColor(20, 20, 20);

/// Maps a value on the right axis to the left axis' coordinates.
fn to_left(v: f64, left: (f64, f64), right: (f64, f64)) -> f64 {
    left.0 + (v - right.0) / (right.1 - right.0) * (left.1 - left.0)
}

impl sealed::Draw for TimeChart {
    fn draw<DB: DrawingBackend>(
        &self,
        root: &DrawingArea<DB, Shift>,
        canvas: &Canvas,
        _raster: bool,
    ) -> Result<(), FigureError>
    where
        DB::ErrorType: 'static,
    {
        let fp = canvas.font_px();
        let mut top = draw_titles(root, canvas, &self.title, self.subtitle.as_deref())?;
        // Legend row.
        let labelled: Vec<(usize, &TimeSeries)> =
            self.series.iter().enumerate().filter(|(_, s)| !s.label.is_empty()).collect();
        if !labelled.is_empty() {
            let y = top as i32 + (0.7 * fp) as i32;
            let mut x = (fp) as i32;
            let style = font(0.9 * fp).pos(Pos::new(HPos::Left, VPos::Center));
            for (i, s) in labelled {
                let c = series_colour(i);
                root.draw(&PathElement::new(
                    vec![(x, y), (x + (1.6 * fp) as i32, y)],
                    c.stroke_width(3),
                ))?;
                x += (2.0 * fp) as i32;
                let text = match (s.axis, &self.right_title) {
                    (Axis::Right, _) => format!("{} (right axis)", s.label),
                    _ => s.label.clone(),
                };
                let (tw, _) = root.estimate_text_size(&text, &style)?;
                root.draw(&Text::new(text, (x, y), style.clone()))?;
                x += tw as i32 + (1.5 * fp) as i32;
            }
            top += (1.6 * fp) as u32;
        }
        let area =
            root.clone().shrink((0, top), (canvas.width(), canvas.height().saturating_sub(top)));
        let right_area =
            if self.right_range.is_some() { (4.6 * fp) as u32 } else { (1.5 * fp) as u32 };
        let (aw, ah) = area.dim_in_pixel();
        let plot_w = aw.saturating_sub((4.6 * fp) as u32 + right_area).max(10);
        let plot_h = ah.saturating_sub((3.2 * fp) as u32 + (0.5 * fp) as u32).max(10);
        let (t0, t1) = self.time_range;
        let ticks = date_ticks(t0, t1, ((f64::from(plot_w) / (7.0 * fp)) as usize).clamp(2, 10));
        let tick_values: Vec<f64> = ticks.iter().map(|t| t.0 as f64).collect();
        let y_ticks = linear_ticks(
            self.left_range.0,
            self.left_range.1,
            ((f64::from(plot_h) / (2.5 * fp)) as usize).clamp(2, 10),
        );
        let mut chart = ChartBuilder::on(&area)
            .margin_top((0.5 * fp) as u32)
            .x_label_area_size((3.2 * fp) as u32)
            .y_label_area_size((4.6 * fp) as u32)
            .margin_right(right_area)
            .build_cartesian_2d(
                TickAxis::new((t0 as f64, t1 as f64), tick_values),
                TickAxis::new(self.left_range, y_ticks),
            )?;
        let labels = ticks.clone();
        chart
            .configure_mesh()
            .light_line_style(TRANSPARENT)
            .bold_line_style(RGBColor(225, 225, 225).stroke_width(1))
            .x_desc("Date (UTC)")
            .y_desc(self.left_title.as_str())
            .x_label_formatter(&|v| {
                labels
                    .iter()
                    .find(|t| (t.0 as f64 - v).abs() < 0.5)
                    .map(|t| t.1.clone())
                    .unwrap_or_default()
            })
            .y_label_formatter(&|v| format_number(*v))
            .label_style(font(0.85 * fp))
            .axis_desc_style(font(fp))
            .draw()?;
        let left = self.left_range;
        let map = |axis: Axis, v: f64| match (axis, self.right_range) {
            (Axis::Right, Some(r)) => to_left(v, left, r),
            _ => v,
        };
        // Thresholds first, so series draw over them.
        for th in &self.thresholds {
            let y = map(th.axis, th.value);
            chart.draw_series(std::iter::once(DashedPathElement::new(
                vec![(t0 as f64, y), (t1 as f64, y)],
                (0.6 * fp) as u32,
                (0.4 * fp) as u32,
                THRESHOLD_COLOUR.stroke_width(1),
            )))?;
            let (px, py) = chart.backend_coord(&(t1 as f64, y));
            let style =
                font(0.8 * fp).color(&THRESHOLD_COLOUR).pos(Pos::new(HPos::Right, VPos::Bottom));
            root.draw(&Text::new(th.label.clone(), (px - 3, py - 2), style))?;
        }
        // Width of a bar: 80 % of the plot width per sample of the densest
        // bar series, 1 to 12 px, as seconds.
        let bar_px = self
            .series
            .iter()
            .filter(|s| s.bars && !s.is_empty())
            .map(|s| {
                let inside = s.times.iter().filter(|t| (t0..=t1).contains(*t)).count().max(1);
                (0.8 * f64::from(plot_w) / inside as f64).clamp(1.0, 12.0)
            })
            .fold(f64::INFINITY, f64::min);
        let bar_s = bar_px * (t1 - t0) as f64 / f64::from(plot_w);
        for (i, s) in self.series.iter().enumerate() {
            let c = series_colour(i);
            if s.bars {
                let r = match (s.axis, self.right_range) {
                    (Axis::Right, Some(r)) => r,
                    _ => left,
                };
                let base = map(s.axis, 0.0f64.clamp(r.0, r.1));
                let bars = s.present().filter(|(t, _)| (t0..=t1).contains(t)).map(|(t, v)| {
                    let (x, y) = (t as f64, map(s.axis, v.clamp(r.0, r.1)));
                    Rectangle::new([(x - bar_s / 2.0, base), (x + bar_s / 2.0, y)], c.filled())
                });
                chart.draw_series(bars)?;
                continue;
            }
            for seg in s.segments(self.max_gap_s) {
                let pts: Vec<(f64, f64)> =
                    seg.iter().map(|&(t, v)| (t as f64, map(s.axis, v))).collect();
                if pts.len() == 1 {
                    chart.draw_series(std::iter::once(Circle::new(pts[0], 2, c.filled())))?;
                } else {
                    chart.draw_series(std::iter::once(PathElement::new(pts, c.stroke_width(2))))?;
                }
            }
        }
        for m in self.markers.iter().filter(|m| (t0..=t1).contains(&m.time)) {
            let x = m.time as f64;
            chart.draw_series(std::iter::once(PathElement::new(
                vec![(x, left.0), (x, left.1)],
                MARKER_COLOUR.stroke_width(2),
            )))?;
            let (px, py) = chart.backend_coord(&(x, left.1));
            // The label sits on the side with more room.
            let (mid, _) = chart.backend_coord(&(0.5 * (t0 + t1) as f64, left.1));
            let h = if px > mid { HPos::Right } else { HPos::Left };
            let dx = if px > mid { -4 } else { 4 };
            let style = font(0.85 * fp).color(&MARKER_COLOUR).pos(Pos::new(h, VPos::Top));
            root.draw(&Text::new(m.label.clone(), (px + dx, py + 2), style))?;
        }
        // Right axis: ticks of the right range placed through the same mapping.
        if let Some(r) = self.right_range {
            let rt =
                linear_ticks(r.0, r.1, ((f64::from(plot_h) / (2.5 * fp)) as usize).clamp(2, 10));
            let style = font(0.85 * fp).pos(Pos::new(HPos::Left, VPos::Center));
            let (x_edge, _) = chart.backend_coord(&(t1 as f64, left.0));
            let (_, y_top) = chart.backend_coord(&(t1 as f64, left.1));
            let (_, y_bot) = chart.backend_coord(&(t1 as f64, left.0));
            root.draw(&PathElement::new(
                vec![(x_edge, y_top), (x_edge, y_bot)],
                BLACK.stroke_width(1),
            ))?;
            for v in rt {
                let (_, py) = chart.backend_coord(&(t1 as f64, to_left(v, left, r)));
                root.draw(&PathElement::new(
                    vec![(x_edge, py), (x_edge + 5, py)],
                    BLACK.stroke_width(1),
                ))?;
                root.draw(&Text::new(format_number(v), (x_edge + 7, py), style.clone()))?;
            }
            if let Some(title) = &self.right_title {
                let style = font(fp)
                    .transform(FontTransform::Rotate90)
                    .pos(Pos::new(HPos::Center, VPos::Top));
                let x = (canvas.width() as f64 - 1.4 * fp) as i32;
                root.draw(&Text::new(title.clone(), (x, (y_top + y_bot) / 2), style))?;
            }
        }
        if self.series.iter().all(|s| s.present().next().is_none()) {
            let (px, py) = chart.backend_coord(&(0.5 * (t0 + t1) as f64, 0.5 * (left.0 + left.1)));
            let style =
                font(fp).color(&RGBColor(110, 110, 110)).pos(Pos::new(HPos::Center, VPos::Center));
            root.draw(&Text::new("No data", (px, py), style))?;
        }
        Ok(())
    }
}

/// What to draw on a sparkline.
#[derive(Debug, Clone, PartialEq)]
pub struct SparklineParams {
    /// The series (all on one vertical scale).
    pub series: Vec<TimeSeries>,
    /// Threshold levels drawn as faint dashed lines.
    pub thresholds: Vec<f64>,
    /// A step longer than this (s) breaks a line.
    pub max_gap_s: Option<i64>,
    /// Time range shown; `None`: the data's range.
    pub time_range: Option<(i64, i64)>,
}

/// A tiny chart without axes or text: lines, thresholds and a dot on each
/// series' last value.
#[derive(Debug, Clone)]
pub struct Sparkline {
    series: Vec<TimeSeries>,
    thresholds: Vec<f64>,
    max_gap_s: Option<i64>,
    time_range: (i64, i64),
    range: (f64, f64),
}

impl Sparkline {
    /// Checks thresholds and ranges.
    pub fn new(p: SparklineParams) -> Result<Self, FigureError> {
        if let Some(i) = p.thresholds.iter().position(|t| !t.is_finite()) {
            return Err(FigureError::BadValue {
                what: "threshold",
                index: i,
                value: p.thresholds[i],
                reason: "not a finite number",
            });
        }
        let time_range = time_extent(&p.series, p.time_range)?;
        let th: Vec<Threshold> = p
            .thresholds
            .iter()
            .map(|&value| Threshold { value, label: String::new(), axis: Axis::Left })
            .collect();
        let series: Vec<TimeSeries> =
            p.series.into_iter().map(|s| TimeSeries { axis: Axis::Left, ..s }).collect();
        let range = value_extent(&series, &th, Axis::Left);
        Ok(Self { series, thresholds: p.thresholds, max_gap_s: p.max_gap_s, time_range, range })
    }
}

impl sealed::Draw for Sparkline {
    fn draw<DB: DrawingBackend>(
        &self,
        root: &DrawingArea<DB, Shift>,
        _canvas: &Canvas,
        _raster: bool,
    ) -> Result<(), FigureError>
    where
        DB::ErrorType: 'static,
    {
        let (t0, t1) = (self.time_range.0 as f64, self.time_range.1 as f64);
        let mut chart = ChartBuilder::on(root).margin(3).build_cartesian_2d(
            TickAxis::new((t0, t1), vec![]),
            TickAxis::new(self.range, vec![]),
        )?;
        for &v in &self.thresholds {
            chart.draw_series(std::iter::once(DashedPathElement::new(
                vec![(t0, v), (t1, v)],
                3,
                3,
                RGBColor(200, 120, 120).stroke_width(1),
            )))?;
        }
        for (i, s) in self.series.iter().enumerate() {
            let c = series_colour(i);
            for seg in s.segments(self.max_gap_s) {
                let pts: Vec<(f64, f64)> = seg.iter().map(|&(t, v)| (t as f64, v)).collect();
                chart.draw_series(std::iter::once(PathElement::new(pts, c.stroke_width(1))))?;
            }
            if let Some((t, v)) = s.present().last() {
                chart.draw_series(std::iter::once(Circle::new((t as f64, v), 2, c.filled())))?;
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::figures::Figure;
    use crate::figures::testutil::Image;
    use crate::figures::ticks::UtcDateTime;

    const DAY: i64 = 86_400;

    fn series(label: &str, t0: i64, vals: &[Option<f64>], axis: Axis) -> TimeSeries {
        let pts: Vec<(i64, Option<f64>)> =
            vals.iter().enumerate().map(|(i, v)| (t0 + i as i64 * 6 * 3600, *v)).collect();
        TimeSeries::new(label, &pts, axis).unwrap()
    }

    /// Checks the runs of a series against the expected run lengths.
    fn check(s: &TimeSeries, max_gap: Option<i64>, lengths: &[usize]) {
        let got: Vec<usize> = s.segments(max_gap).iter().map(|r| r.len()).collect();
        assert_eq!(got, lengths);
    }

    #[test]
    fn missing_epochs_and_long_steps_break_lines() {
        let s = series(
            "a",
            0,
            &[Some(1.0), Some(2.0), None, Some(4.0), Some(5.0), Some(6.0)],
            Axis::Left,
        );
        check(&s, None, &[2, 3]);
        let pts =
            [(0, Some(1.0)), (3600, Some(1.0)), (10 * 3600, Some(2.0)), (11 * 3600, Some(2.0))];
        let s = TimeSeries::new("b", &pts, Axis::Left).unwrap();
        check(&s, None, &[4]);
        check(&s, Some(2 * 3600), &[2, 2]);
        assert!(matches!(
            TimeSeries::new("c", &[(5, Some(1.0)), (5, Some(2.0))], Axis::Left),
            Err(FigureError::TimeOrder { index: 1, time: 5, .. })
        ));
        assert!(matches!(
            TimeSeries::new("d", &[(5, Some(f64::INFINITY))], Axis::Left),
            Err(FigureError::BadValue { index: 0, .. })
        ));
    }

    fn zone_history() -> TimeChart {
        let t0 = UtcDateTime::midnight(2024, 3, 1);
        let change: Vec<Option<f64>> = (0..40)
            .map(|i| if (20..24).contains(&i) { None } else { Some(-0.8 * i as f64) })
            .collect();
        let area: Vec<Option<f64>> = (0..40).map(|i| Some(0.5 * i as f64)).collect();
        TimeChart::new(TimeChartParams {
            title: "Zone Z2 <north toe>".into(),
            subtitle: Some("min change and area".into()),
            series: vec![
                series("Minimum change", t0, &change, Axis::Left),
                series("Area", t0, &area, Axis::Right),
            ],
            thresholds: vec![
                Threshold { value: -10.0, label: "level 1 (−10 %)".into(), axis: Axis::Left },
                Threshold { value: -20.0, label: "level 2 (−20 %)".into(), axis: Axis::Left },
            ],
            left_title: "Change (%)".into(),
            right_title: Some("Area (m²)".into()),
            max_gap_s: None,
            time_range: None,
            left_range: None,
            right_range: None,
        })
        .unwrap()
    }

    #[test]
    fn chart_has_dates_axes_thresholds_and_gaps() {
        let chart = zone_history();
        let canvas = Canvas::new(800, 360, 12.0).unwrap();
        let svg = chart.svg(&canvas).unwrap();
        for text in [
            "Date (UTC)",
            "Change (%)",
            "Area (m²)",
            "level 2 (−20 %)",
            "Minimum change",
            "Area (right axis)",
            "2 Mar 2024",
            "4 Mar",
            "Zone Z2 &lt;north toe&gt;",
        ] {
            assert!(svg.contains(text), "{text} missing");
        }
        assert!(Image::decode(&chart.png(&canvas).unwrap()).colours() > 20, "not blank");
    }

    #[test]
    fn missing_epochs_show_as_gaps() {
        let t0 = UtcDateTime::midnight(2024, 3, 1);
        let vals: Vec<Option<f64>> =
            (0..40).map(|i| if (20..24).contains(&i) { None } else { Some(1.0) }).collect();
        let chart = TimeChart::new(TimeChartParams {
            series: vec![series("", t0, &vals, Axis::Left)],
            ..empty_params()
        })
        .unwrap();
        let canvas = Canvas::new(800, 300, 12.0).unwrap();
        let img = Image::decode(&chart.png(&canvas).unwrap());
        // Without a legend or right axis the plot spans from the 4.6-em left
        // label area to 1.5 em from the right edge; the value 1 is the middle
        // row of the ±1 padded range.
        let (x0, x1) = ((4.6 * 12.0) as i32, 800 - (1.5 * 12.0) as i32 - 1);
        let c = series_colour(0);
        let on_line = |f: f64| {
            let x = x0 + ((x1 - x0) as f64 * f).round() as i32;
            (0..img.height as i32).any(|y| img.at(x, y) == [c.0, c.1, c.2])
        };
        assert!(on_line(10.0 / 39.0), "line before the gap");
        assert!(!on_line(21.5 / 39.0), "gap where epochs 20–23 are missing");
        assert!(on_line(30.0 / 39.0), "line after the gap");
    }

    #[test]
    fn sparkline_and_empty_chart_render() {
        let t0 = UtcDateTime::midnight(2024, 3, 1);
        let vals: Vec<Option<f64>> = (0..50).map(|i| Some((i as f64 / 5.0).sin() * 10.0)).collect();
        let sp = Sparkline::new(SparklineParams {
            series: vec![series("", t0, &vals, Axis::Left)],
            thresholds: vec![-10.0],
            max_gap_s: Some(DAY),
            time_range: None,
        })
        .unwrap();
        let canvas = Canvas::new(120, 28, 11.0).unwrap();
        let img = Image::decode(&sp.png(&canvas).unwrap());
        let c = series_colour(0);
        let n = img.rgb.chunks(3).filter(|p| p == &[c.0, c.1, c.2]).count();
        assert!(n > 60, "{n} pixels of the line");
        assert!(!sp.svg(&canvas).unwrap().contains("<text"), "no text on a sparkline");
        let empty = TimeChart::new(TimeChartParams {
            title: "River stage".into(),
            subtitle: None,
            series: vec![],
            thresholds: vec![],
            left_title: "Stage (m)".into(),
            right_title: None,
            max_gap_s: None,
            time_range: Some((t0, t0 + 7 * DAY)),
            left_range: None,
            right_range: None,
        })
        .unwrap();
        assert!(empty.svg(&Canvas::new(600, 300, 12.0).unwrap()).unwrap().contains("No data"));
        assert!(matches!(
            TimeChart::new(TimeChartParams { time_range: Some((5, 5)), ..empty_params() }),
            Err(FigureError::BadLimits { .. })
        ));
    }

    #[test]
    fn marker_and_bars_are_drawn_where_their_times_are() {
        let t0 = UtcDateTime::midnight(2024, 3, 1);
        // Rain of 2 mm every 6 h for 5 days, drawn as bars on 0–4 mm.
        let rain: Vec<Option<f64>> = (0..21).map(|_| Some(2.0)).collect();
        let chart = TimeChart::new(TimeChartParams {
            series: vec![series("", t0, &rain, Axis::Left).with_bars()],
            time_range: Some((t0, t0 + 5 * DAY)),
            left_range: Some((0.0, 4.0)),
            ..empty_params()
        })
        .unwrap()
        .with_marker(Marker { time: t0 + 4 * DAY, label: "epoch 3 Mar".into() })
        .with_marker(Marker { time: t0 + 9 * DAY, label: "outside".into() });
        let canvas = Canvas::new(800, 300, 12.0).unwrap();
        let svg = chart.svg(&canvas).unwrap();
        assert!(svg.contains("epoch 3 Mar") && !svg.contains("outside"), "marker label");
        let img = Image::decode(&chart.png(&canvas).unwrap());
        // Plot from the 4.6-em left label area to 1.5 em from the right edge
        // (as in `missing_epochs_show_as_gaps`); the marker at 4/5 of the range.
        let (x0, x1) = ((4.6 * 12.0) as i32, 800 - (1.5 * 12.0) as i32 - 1);
        let column = |f: f64, c: [u8; 3]| {
            let x = x0 + ((x1 - x0) as f64 * f).round() as i32;
            (x - 1..=x + 1)
                .map(|x| (0..img.height as i32).filter(|&y| img.at(x, y) == c).count())
                .max()
                .unwrap_or(0)
        };
        let m = [MARKER_COLOUR.0, MARKER_COLOUR.1, MARKER_COLOUR.2];
        assert!(column(0.8, m) > 100, "a full-height marker line at 4/5 of the range");
        assert!(column(0.3, m) < 20, "no marker elsewhere");
        // A bar reaches half the plot height (2 of 4 mm): many pixels of the
        // series colour in the column of the sample at 1/5 of the range.
        let c = series_colour(0);
        assert!(column(0.2, [c.0, c.1, c.2]) > 60, "bar at day 1");
    }

    fn empty_params() -> TimeChartParams {
        TimeChartParams {
            title: String::new(),
            subtitle: None,
            series: vec![],
            thresholds: vec![],
            left_title: String::new(),
            right_title: None,
            max_gap_s: None,
            time_range: None,
            left_range: None,
            right_range: None,
        }
    }
}
