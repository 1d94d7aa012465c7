//! Shared layout for the figures: true-scale plot boxes, framed charts with
//! given ticks, and horizontal colour bars.
//!
//! A true-scale box has equal pixels per metre on both axes (times the vertical
//! exaggeration on z): with s px/m horizontally, the plot is X·s + 2p by
//! Z·VE·s + 2p pixels for data extents X × Z m and a padding of p px, and s is
//! the largest scale that fits the space available.

use std::ops::Range;

use plotters::coord::Shift;
use plotters::coord::ranged1d::{DefaultFormatting, KeyPointHint, Ranged};
use plotters::prelude::*;

use crate::figures::colour::ColourScale;
use crate::figures::ticks::format_number;
use crate::figures::{Canvas, FigureError, font};

/// The chart type used for sections and pseudosections.
pub(super) type XyChart<'a, DB> = ChartContext<'a, DB, Cartesian2d<TickAxis, TickAxis>>;

/// A linear axis on `[lo, hi]` whose ticks are given. It maps value v to pixel
/// `p0 + round((v − lo)/(hi − lo) · (p1 − p0))` for the pixel limits (p0, p1)
/// plotters passes (first and last pixel of the plotting area).
#[derive(Debug, Clone)]
pub(super) struct TickAxis {
    lo: f64,
    hi: f64,
    ticks: Vec<f64>,
}

impl TickAxis {
    pub fn new(range: (f64, f64), ticks: Vec<f64>) -> Self {
        Self { lo: range.0, hi: range.1, ticks }
    }
}

impl Ranged for TickAxis {
    type FormatOption = DefaultFormatting;
    type ValueType = f64;

    fn map(&self, v: &f64, limit: (i32, i32)) -> i32 {
        let u = (v - self.lo) / (self.hi - self.lo);
        let p = f64::from(limit.0) + (u * f64::from(limit.1 - limit.0)).round();
        p.clamp(-1e6, 1e6) as i32
    }

    fn key_points<Hint: KeyPointHint>(&self, hint: Hint) -> Vec<f64> {
        if hint.weight().allow_light_points() { Vec::new() } else { self.ticks.clone() }
    }

    fn range(&self) -> Range<f64> {
        self.lo..self.hi
    }
}

/// Space around a chart's plotting area, px.
#[derive(Debug, Clone, Copy)]
pub(super) struct Frame {
    pub left: u32,
    pub right: u32,
    pub top: u32,
    pub bottom: u32,
}

impl Frame {
    /// Axis label areas sized from the body font: y labels and the rotated
    /// axis title on the left, x labels and title below.
    pub fn axes(fp: f64) -> Self {
        Self {
            left: (4.6 * fp).round() as u32,
            right: (1.2 * fp).round() as u32,
            top: (0.4 * fp).round() as u32,
            bottom: (3.2 * fp).round() as u32,
        }
    }
}

/// A plot box at true scale (see the module docs).
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct PlotBox {
    /// Plotted chainage range, m.
    pub x: (f64, f64),
    /// Plotted elevation range, m.
    pub z: (f64, f64),
    /// Plot width, px.
    pub width: u32,
    /// Plot height, px.
    pub height: u32,
}

/// The largest true-scale box (times `ve` vertically) for data extents `x`, `z`
/// that fits `avail_w` × `avail_h` px with `pad` px of padding on every side.
pub(super) fn true_scale_box(
    avail_w: f64,
    avail_h: f64,
    x: (f64, f64),
    z: (f64, f64),
    ve: f64,
    pad: f64,
) -> PlotBox {
    let dx = (x.1 - x.0).max(1e-9);
    let dz = (z.1 - z.0).max(1e-9);
    let s = ((avail_w - 2.0 * pad).max(4.0) / dx).min((avail_h - 2.0 * pad).max(4.0) / (dz * ve));
    let width = (dx * s + 2.0 * pad).floor().max(4.0);
    let height = (dz * ve * s + 2.0 * pad).floor().max(4.0);
    // Widen the ranges so that both axes have exactly s (and s·ve) px per metre
    // between the first and the last pixel of the plot.
    let (cx, cz) = (0.5 * (x.0 + x.1), 0.5 * (z.0 + z.1));
    let (hx, hz) = (0.5 * (width - 1.0) / s, 0.5 * (height - 1.0) / (s * ve));
    PlotBox {
        x: (cx - hx, cx + hx),
        z: (cz - hz, cz + hz),
        width: width as u32,
        height: height as u32,
    }
}

/// Ranges, ticks and titles of a framed chart.
pub(super) struct AxisSpec<'s> {
    pub x_range: (f64, f64),
    pub y_range: (f64, f64),
    pub x_ticks: Vec<f64>,
    pub y_ticks: Vec<f64>,
    pub x_title: &'s str,
    pub y_title: &'s str,
    /// Formats x tick labels.
    pub x_format: &'s dyn Fn(f64) -> String,
    /// Formats y tick labels (e.g. depth shown positive).
    pub y_format: &'s dyn Fn(f64) -> String,
}

/// Builds a chart whose plotting area is `frame` inside `area`, with the given
/// key points as ticks, and draws its axes.
pub(super) fn framed_chart<'a, 'b, DB: DrawingBackend>(
    area: &'a DrawingArea<DB, Shift>,
    canvas: &Canvas,
    frame: Frame,
    spec: AxisSpec<'_>,
) -> Result<XyChart<'b, DB>, FigureError>
where
    'a: 'b,
{
    let fp = canvas.font_px();
    let mut chart = ChartBuilder::on(area)
        .margin_left(0)
        .margin_right(frame.right)
        .margin_top(frame.top)
        .margin_bottom(0)
        .x_label_area_size(frame.bottom)
        .y_label_area_size(frame.left)
        .build_cartesian_2d(
            TickAxis::new(spec.x_range, spec.x_ticks),
            TickAxis::new(spec.y_range, spec.y_ticks),
        )?;
    let (x_format, y_format) = (spec.x_format, spec.y_format);
    chart
        .configure_mesh()
        .disable_mesh()
        .x_desc(spec.x_title)
        .y_desc(spec.y_title)
        .x_label_formatter(&|v| x_format(*v))
        .y_label_formatter(&|v| y_format(*v))
        .label_style(font(0.85 * fp))
        .axis_desc_style(font(fp))
        .axis_style(BLACK.stroke_width(1))
        .draw()?;
    Ok(chart)
}

/// Draws a horizontal colour bar for `scale` centred in `area` (bar `width`
/// px), with ticks, labels and `title` below it.
pub(super) fn colour_bar<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    canvas: &Canvas,
    scale: &ColourScale,
    width: u32,
    title: &str,
) -> Result<(), FigureError> {
    let fp = canvas.font_px();
    let (aw, ah) = area.dim_in_pixel();
    let width = width.min(aw.saturating_sub(2 * (2.0 * fp) as u32)).max(20);
    let side = (aw.saturating_sub(width)) / 2;
    let thick = (0.9 * fp).round().max(4.0) as u32;
    let label_area = ah.saturating_sub(thick + (0.4 * fp) as u32).max(4);
    let ticks: Vec<f64> = scale.ticks(((f64::from(width) / (4.0 * fp)) as usize).clamp(2, 9));
    let positions: Vec<f64> = ticks.iter().map(|&t| scale.bar_position(t)).collect();
    let scale_copy = *scale;
    let mut chart = ChartBuilder::on(area)
        .margin_left(side)
        .margin_right(aw - side - width)
        .margin_top((0.4 * fp) as u32)
        .x_label_area_size(label_area)
        .build_cartesian_2d(
            TickAxis::new((0.0, 1.0), positions),
            TickAxis::new((0.0, 1.0), vec![]),
        )?;
    let steps = width.clamp(2, 256) as usize;
    chart.draw_series((0..steps).map(|i| {
        let (u0, u1) = (i as f64 / steps as f64, (i + 1) as f64 / steps as f64);
        let c = scale_copy.colour(scale_copy.value_at(0.5 * (u0 + u1)));
        Rectangle::new([(u0, 0.0), (u1, 1.0)], RGBColor(c.0, c.1, c.2).filled())
    }))?;
    chart.draw_series(std::iter::once(Rectangle::new(
        [(0.0, 0.0), (1.0, 1.0)],
        BLACK.stroke_width(1),
    )))?;
    chart
        .configure_mesh()
        .disable_mesh()
        .disable_y_axis()
        .x_desc(title)
        .x_label_formatter(&|u| format_number(scale_copy.value_at(*u)))
        .label_style(font(0.85 * fp))
        .axis_desc_style(font(fp))
        .draw()?;
    Ok(())
}

/// The height a colour bar row needs, px.
pub(super) fn colour_bar_height(fp: f64) -> u32 {
    (4.2 * fp).round() as u32
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn true_scale_box_has_equal_metres_per_pixel() {
        // A 47 m × 8 m section in 1000 × 400 px: width-limited.
        let b = true_scale_box(1000.0, 400.0, (0.0, 47.0), (-8.0, 0.0), 1.0, 10.0);
        let sx = f64::from(b.width - 1) / (b.x.1 - b.x.0);
        let sz = f64::from(b.height - 1) / (b.z.1 - b.z.0);
        assert!((sx - sz).abs() < 1e-9 * sx, "{sx} vs {sz}");
        assert!(b.width <= 1000 && b.width >= 999 && b.height <= 400);
        // With exaggeration 3 the vertical scale is three times the horizontal.
        let b = true_scale_box(1000.0, 400.0, (0.0, 47.0), (-8.0, 0.0), 3.0, 10.0);
        let sx = f64::from(b.width - 1) / (b.x.1 - b.x.0);
        let sz = f64::from(b.height - 1) / (b.z.1 - b.z.0);
        assert!((sz / sx - 3.0).abs() < 1e-9);
        // Height-limited: a deep narrow section.
        let b = true_scale_box(1000.0, 400.0, (0.0, 10.0), (-30.0, 0.0), 1.0, 10.0);
        assert!(b.height >= 399 && b.width < 200);
    }
}
