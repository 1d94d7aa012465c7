//! Section figures: the cells of a [`SectionGrid`] filled by resistivity or by
//! change, at true scale, with ground surface, electrodes, faded
//! low-sensitivity cells and outlined zones.
//!
//! Coordinates are metres: x = chainage to the right, z = elevation upwards.
//! Resistivity (Ω·m) is coloured on a log scale with viridis; change (%) on the
//! diverging RdBu map with symmetric limits, drops (wetter) blue and rises
//! (drier) red. A zone outline is the set of edges of its cells that no other
//! cell of the same zone shares (the boundary of the union of the polygons).

use std::collections::HashMap;

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use crate::figures::colour::{ColourScale, DivergingScale, LogScale, Rgb, SequentialMap, fade};
use crate::figures::layout::{
    AxisSpec, Frame, PlotBox, colour_bar, colour_bar_height, framed_chart, true_scale_box,
};
use crate::figures::ticks::{format_number, linear_ticks};
use crate::figures::{Canvas, FigureError, check_finite, draw_titles, font, sealed};
use crate::geometry::LineGeometry;
use crate::section::SectionGrid;

/// The values a section is coloured by, one per cell of the grid.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum SectionValues<'a> {
    /// Resistivity per cell, Ω·m (> 0), log-scaled with viridis. `limits`
    /// (Ω·m, 0 < lo < hi) fixes the colour range, e.g. for a whole season;
    /// `None` takes the data's minimum and maximum.
    Resistivity {
        /// ρ per cell, Ω·m.
        rho: &'a [f64],
        /// Colour range, Ω·m.
        limits: Option<(f64, f64)>,
    },
    /// Change in resistivity per cell, % (−100 < v), diverging about 0 %.
    /// `limit` (%) sets the symmetric range ±limit; `None` takes the smallest
    /// 1, 2, 2.5 or 5 × 10ᵏ % covering the largest |change|.
    ChangePercent {
        /// Change per cell, %.
        change: &'a [f64],
        /// Symmetric colour limit, %.
        limit: Option<f64>,
    },
    /// Normalised cumulative sensitivity per cell (0–1, the largest 1),
    /// log-scaled with magma from `floor` (0 < floor < 1) to 1; values below
    /// the floor take its colour.
    Sensitivity {
        /// Sensitivity per cell, dimensionless.
        values: &'a [f64],
        /// Lower end of the colour range.
        floor: f64,
    },
}

/// A zone to outline: a label and the indices of its cells.
#[derive(Debug, Clone, PartialEq)]
pub struct Zone {
    /// Text drawn beside the outline (e.g. "Z3 −24 %").
    pub label: String,
    /// Cell indices into the grid.
    pub cells: Vec<usize>,
}

/// What to draw on a section figure.
#[derive(Debug, Clone, PartialEq)]
pub struct SectionParams<'a> {
    /// Title line.
    pub title: String,
    /// Optional second line (epoch time, a caution line for alerts).
    pub subtitle: Option<String>,
    /// Cell values and colour range.
    pub values: SectionValues<'a>,
    /// Electrodes to mark on the surface, if any.
    pub line: Option<&'a LineGeometry>,
    /// Per cell, true when the cell is well resolved (inside the sensitivity
    /// mask); `None` draws every cell at full colour.
    pub well_resolved: Option<&'a [bool]>,
    /// Share of white mixed into cells outside the mask, 0 < fade ≤ 1 (0.6 is
    /// common practice, no source: still readable, clearly paler).
    pub fade: f64,
    /// Zones to outline and label.
    pub zones: Vec<Zone>,
    /// Vertical exaggeration, 1 for true scale (0.1–20); any other value is
    /// written on the figure.
    pub vertical_exaggeration: f64,
}

/// A checked section figure, ready to render with [`crate::figures::Figure`].
#[derive(Debug, Clone)]
pub struct SectionFigure<'a> {
    grid: &'a SectionGrid,
    title: String,
    subtitle: Option<String>,
    line: Option<&'a LineGeometry>,
    scale: ColourScale,
    bar_title: String,
    colours: Vec<Rgb>,
    masked: bool,
    outlines: Vec<(String, Vec<[[f64; 2]; 2]>)>,
    ve: f64,
    x_extent: (f64, f64),
    z_extent: (f64, f64),
}

/// Where the plotting area of a figure sits on its canvas, and how metres map
/// to pixels there (pixel y grows downwards).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PlotArea {
    left: f64,
    top: f64,
    width: f64,
    height: f64,
    x_range: (f64, f64),
    z_range: (f64, f64),
}

impl PlotArea {
    /// Pixel position (column, row) of the point (x, z), m.
    pub fn to_pixel(&self, x: f64, z: f64) -> (f64, f64) {
        let u = (x - self.x_range.0) / (self.x_range.1 - self.x_range.0);
        let v = (self.z_range.1 - z) / (self.z_range.1 - self.z_range.0);
        (self.left + u * self.width, self.top + v * self.height)
    }

    /// The point (x, z), m, at pixel (column, row).
    pub fn to_metres(&self, px: f64, py: f64) -> (f64, f64) {
        let u = (px - self.left) / self.width;
        let v = (py - self.top) / self.height;
        (
            self.x_range.0 + u * (self.x_range.1 - self.x_range.0),
            self.z_range.1 - v * (self.z_range.1 - self.z_range.0),
        )
    }

    /// Pixels per metre along x and along z.
    pub fn pixels_per_metre(&self) -> (f64, f64) {
        (
            self.width / (self.x_range.1 - self.x_range.0),
            self.height / (self.z_range.1 - self.z_range.0),
        )
    }
}

/// The edges of the union of `cells` of `grid`: every cell edge that no other
/// listed cell shares (vertices matched to 1 µm). Each edge is (start, end)
/// in metres; the order is unspecified.
pub fn outline_edges(grid: &SectionGrid, cells: &[usize]) -> Vec<[[f64; 2]; 2]> {
    let key = |p: [f64; 2]| ((p[0] * 1e6).round() as i64, (p[1] * 1e6).round() as i64);
    type EdgeKey = ((i64, i64), (i64, i64));
    let mut count: HashMap<EdgeKey, (usize, [[f64; 2]; 2])> = HashMap::new();
    let mut seen = vec![false; grid.len()];
    for &c in cells {
        if c >= grid.len() || std::mem::replace(&mut seen[c], true) {
            continue;
        }
        let p = grid.cells()[c].polygon();
        for k in 0..p.len() {
            let (a, b) = (p[k], p[(k + 1) % p.len()]);
            let (ka, kb) = (key(a), key(b));
            let e = if ka < kb { (ka, kb) } else { (kb, ka) };
            count.entry(e).or_insert((0, [a, b])).0 += 1;
        }
    }
    let mut edges: Vec<_> = count.into_iter().filter(|(_, (n, _))| *n == 1).collect();
    edges.sort_by_key(|(k, _)| *k);
    edges.into_iter().map(|(_, (_, e))| e).collect()
}

impl<'a> SectionFigure<'a> {
    /// Checks the values against the grid and prepares the colours.
    pub fn new(grid: &'a SectionGrid, params: SectionParams<'a>) -> Result<Self, FigureError> {
        let n = grid.len();
        let ve = params.vertical_exaggeration;
        if !(0.1..=20.0).contains(&ve) {
            return Err(FigureError::Parameter {
                name: "vertical_exaggeration",
                value: ve,
                reason: "must be 0.1 to 20",
            });
        }
        if !(params.fade > 0.0 && params.fade <= 1.0) {
            return Err(FigureError::Parameter {
                name: "fade",
                value: params.fade,
                reason: "share of white must be in (0, 1]",
            });
        }
        let resistivity_title = "Resistivity (Ω·m)".to_string();
        let (values, scale, bar_title): (std::borrow::Cow<'_, [f64]>, _, _) = match params.values {
            SectionValues::Resistivity { rho, limits } => {
                check_len("resistivity", n, rho.len())?;
                if let Some(index) = rho.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
                    return Err(FigureError::BadValue {
                        what: "resistivity of cell",
                        index,
                        value: rho[index],
                        reason: "resistivity must be positive and finite",
                    });
                }
                let (lo, hi) = limits.unwrap_or_else(|| data_log_range(rho));
                let scale = ColourScale::Log(LogScale::new(lo, hi, SequentialMap::Viridis)?);
                (rho.into(), scale, resistivity_title)
            }
            SectionValues::ChangePercent { change, limit } => {
                check_len("change", n, change.len())?;
                check_finite("change of cell", change)?;
                let scale = match limit {
                    Some(l) => DivergingScale::new(l)?,
                    None => {
                        DivergingScale::covering(change.iter().fold(0.0, |m, v| v.abs().max(m)))
                    }
                };
                let title =
                    "Change in resistivity (%): blue = drop (wetter), red = rise (drier)".into();
                (change.into(), ColourScale::Diverging(scale), title)
            }
            SectionValues::Sensitivity { values, floor } => {
                check_len("sensitivity", n, values.len())?;
                if let Some(index) = values.iter().position(|v| !(v.is_finite() && *v >= 0.0)) {
                    return Err(FigureError::BadValue {
                        what: "sensitivity of cell",
                        index,
                        value: values[index],
                        reason: "sensitivity must be finite and ≥ 0",
                    });
                }
                if !(floor > 0.0 && floor < 1.0) {
                    return Err(FigureError::Parameter {
                        name: "floor",
                        value: floor,
                        reason: "must lie in (0, 1)",
                    });
                }
                let scale = ColourScale::Log(LogScale::new(floor, 1.0, SequentialMap::Magma)?);
                let clamped: Vec<f64> = values.iter().map(|v| v.max(floor)).collect();
                (clamped.into(), scale, "Cumulative sensitivity (normalised, log)".into())
            }
        };
        if let Some(mask) = params.well_resolved {
            check_len("sensitivity mask", n, mask.len())?;
        }
        let colours = values
            .iter()
            .enumerate()
            .map(|(i, &v)| {
                let c = scale.colour(v);
                match params.well_resolved {
                    Some(mask) if !mask[i] => fade(c, params.fade),
                    _ => c,
                }
            })
            .collect();
        let mut outlines = Vec::with_capacity(params.zones.len());
        for (zi, zone) in params.zones.into_iter().enumerate() {
            if let Some(&cell) = zone.cells.iter().find(|&&c| c >= n) {
                return Err(FigureError::ZoneCell { zone: zi, label: zone.label, cell, cells: n });
            }
            outlines.push((zone.label.clone(), outline_edges(grid, &zone.cells)));
        }
        let (x_extent, z_extent) = extents(grid, params.line);
        Ok(Self {
            grid,
            title: params.title,
            subtitle: params.subtitle,
            line: params.line,
            scale,
            bar_title,
            colours,
            masked: params.well_resolved.is_some_and(|m| m.iter().any(|&w| !w)),
            outlines,
            ve,
            x_extent,
            z_extent,
        })
    }

    /// The colour scale in use (limits, ticks).
    pub fn scale(&self) -> &ColourScale {
        &self.scale
    }

    /// The fill colour of each cell as drawn (after fading), one per cell.
    pub fn cell_colours(&self) -> &[Rgb] {
        &self.colours
    }

    /// Where the section is drawn on `canvas`, for hover read-outs and tests.
    pub fn plot_area(&self, canvas: &Canvas) -> PlotArea {
        self.layout(canvas).area
    }

    fn layout(&self, canvas: &Canvas) -> Layout {
        let fp = canvas.font_px();
        let title_h = title_height(fp, !self.title.is_empty(), self.subtitle.is_some());
        let frame = Frame::axes(fp);
        let (w, h) = (f64::from(canvas.width()), f64::from(canvas.height()));
        let below = f64::from(colour_bar_height(fp)) + 1.6 * fp;
        let side = 0.5 * fp;
        let avail_w = w - f64::from(frame.left + frame.right) - 2.0 * side;
        let avail_h = h - title_h - f64::from(frame.top + frame.bottom) - below;
        let pb = true_scale_box(avail_w, avail_h, self.x_extent, self.z_extent, self.ve, fp);
        block_layout(canvas, title_h, frame, pb, below)
    }
}

/// Layout of a framed plot block on a canvas.
#[derive(Debug, Clone, Copy)]
pub(super) struct Layout {
    pub ox: u32,
    pub oy: u32,
    pub block_w: u32,
    pub block_h: u32,
    pub frame: Frame,
    pub pb: PlotBox,
    pub area: PlotArea,
}

/// Centres a block of plot box + frame (and `below` px of colour bar and
/// notes) in the canvas under the titles.
pub(super) fn block_layout(
    canvas: &Canvas,
    title_h: f64,
    frame: Frame,
    pb: PlotBox,
    below: f64,
) -> Layout {
    let block_w = pb.width + frame.left + frame.right;
    let block_h = pb.height + frame.top + frame.bottom;
    let ox = canvas.width().saturating_sub(block_w) / 2;
    let free = f64::from(canvas.height()) - title_h - f64::from(block_h) - below;
    let oy = (title_h + (free / 2.0).max(0.0)).round() as u32;
    let area = PlotArea {
        left: f64::from(ox + frame.left),
        top: f64::from(oy + frame.top),
        width: f64::from(pb.width - 1),
        height: f64::from(pb.height - 1),
        x_range: pb.x,
        z_range: pb.z,
    };
    Layout { ox, oy, block_w, block_h, frame, pb, area }
}

/// Height of the title band drawn by `draw_titles`, px.
pub(super) fn title_height(fp: f64, title: bool, subtitle: bool) -> f64 {
    let pad = (0.5 * fp).round();
    let mut y = pad;
    if title {
        y += (1.5 * fp).round();
    }
    if subtitle {
        y += (1.3 * fp).round();
    }
    if y == pad { 0.0 } else { y + (pad / 2.0).trunc() }
}

fn check_len(what: &'static str, expected: usize, got: usize) -> Result<(), FigureError> {
    if expected == got { Ok(()) } else { Err(FigureError::Length { what, expected, got }) }
}

/// Data minimum and maximum for a log scale, widened to a factor 1.5 each way
/// when all values are equal.
fn data_log_range(v: &[f64]) -> (f64, f64) {
    let lo = v.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if hi > lo * (1.0 + 1e-9) { (lo, hi) } else { (lo / 1.5, hi * 1.5) }
}

/// Chainage and elevation extents of the cells, electrodes and the surface
/// between them, m.
fn extents(grid: &SectionGrid, line: Option<&LineGeometry>) -> ((f64, f64), (f64, f64)) {
    let mut pts: Vec<[f64; 2]> =
        grid.cells().iter().flat_map(|c| c.polygon().iter().copied()).collect();
    if let Some(l) = line {
        pts.extend(l.electrodes().iter().map(|e| [e.x(), e.z()]));
    }
    let span = |k: usize, pts: &[[f64; 2]]| {
        pts.iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), p| (lo.min(p[k]), hi.max(p[k])))
    };
    let x = span(0, &pts);
    pts.extend(surface_polyline(grid, x.0, x.1));
    (x, span(1, &pts))
}

/// The ground surface between chainages x0 and x1 as a polyline.
fn surface_polyline(grid: &SectionGrid, x0: f64, x1: f64) -> Vec<[f64; 2]> {
    let s = grid.surface();
    let mut pts = vec![[x0, s.elevation_at(x0)]];
    pts.extend(s.points().iter().filter(|p| p[0] > x0 && p[0] < x1).copied());
    pts.push([x1, s.elevation_at(x1)]);
    pts
}

pub(super) fn rgb(c: Rgb) -> RGBColor {
    RGBColor(c.0, c.1, c.2)
}

impl sealed::Draw for SectionFigure<'_> {
    fn draw<DB: DrawingBackend>(
        &self,
        root: &DrawingArea<DB, Shift>,
        canvas: &Canvas,
        raster: bool,
    ) -> Result<(), FigureError>
    where
        DB::ErrorType: 'static,
    {
        let fp = canvas.font_px();
        draw_titles(root, canvas, &self.title, self.subtitle.as_deref())?;
        let lay = self.layout(canvas);
        let pb = lay.pb;
        let block = root.clone().shrink((lay.ox, lay.oy), (lay.block_w, lay.block_h));
        let mut chart = framed_chart(
            &block,
            canvas,
            lay.frame,
            AxisSpec {
                x_range: pb.x,
                y_range: pb.z,
                x_ticks: linear_ticks(pb.x.0, pb.x.1, ticks_for(pb.width, 5.0 * fp)),
                y_ticks: linear_ticks(pb.z.0, pb.z.1, ticks_for(pb.height, 2.5 * fp)),
                x_title: "Chainage (m)",
                y_title: "Elevation (m)",
                x_format: &format_number,
                y_format: &format_number,
            },
        )?;
        // Cells.
        chart.draw_series(self.grid.cells().iter().zip(&self.colours).map(|(cell, &c)| {
            let pts: Vec<(f64, f64)> = cell.polygon().iter().map(|p| (p[0], p[1])).collect();
            Polygon::new(pts, rgb(c).filled())
        }))?;
        if raster {
            chart.draw_series(self.grid.cells().iter().zip(&self.colours).map(|(cell, &c)| {
                let mut pts: Vec<(f64, f64)> =
                    cell.polygon().iter().map(|p| (p[0], p[1])).collect();
                pts.push(pts[0]);
                PathElement::new(pts, rgb(c).stroke_width(1))
            }))?;
        }
        // Ground surface.
        let surface: Vec<(f64, f64)> =
            surface_polyline(self.grid, self.x_extent.0, self.x_extent.1)
                .into_iter()
                .map(|p| (p[0], p[1]))
                .collect();
        chart.draw_series(std::iter::once(PathElement::new(
            surface,
            RGBColor(40, 40, 40).stroke_width(2),
        )))?;
        // Zone outlines: a white under-stroke keeps them visible on dark cells.
        for (width, colour) in [(4, WHITE), (2, BLACK)] {
            chart.draw_series(self.outlines.iter().flat_map(|(_, edges)| {
                edges.iter().map(move |e| {
                    PathElement::new(
                        vec![(e[0][0], e[0][1]), (e[1][0], e[1][1])],
                        colour.stroke_width(width),
                    )
                })
            }))?;
        }
        // Electrodes: small triangles pointing down at the electrode.
        if let Some(line) = self.line {
            let (hw, ht) = ((0.35 * fp).round() as i32, (0.7 * fp).round() as i32);
            chart.draw_series(line.electrodes().iter().map(|e| {
                EmptyElement::at((e.x(), e.z()))
                    + Polygon::new(vec![(0, 0), (-hw, -ht), (hw, -ht)], BLACK.filled())
            }))?;
        }
        // Zone labels above each zone's highest point, on a white backdrop.
        for (label, edges) in &self.outlines {
            // Centre the label over the zone's highest vertices.
            let z_top = edges.iter().flatten().map(|p| p[1]).fold(f64::NEG_INFINITY, f64::max);
            let xs: Vec<f64> =
                edges.iter().flatten().filter(|p| p[1] >= z_top - 1e-9).map(|p| p[0]).collect();
            if xs.is_empty() {
                continue;
            }
            let x_mid = 0.5
                * (xs.iter().copied().fold(f64::INFINITY, f64::min)
                    + xs.iter().copied().fold(f64::NEG_INFINITY, f64::max));
            let (px, py) = chart.backend_coord(&(x_mid, z_top));
            label_box(root, label, (px, py - (0.4 * fp) as i32), fp)?;
        }
        // Colour bar and notes.
        let bar_h = colour_bar_height(fp);
        let bar_top = lay.oy + lay.block_h;
        let bar_area = root.clone().shrink((0, bar_top), (canvas.width(), bar_h));
        let bar_w = ((0.45 * f64::from(canvas.width())) as u32).max(lay.pb.width.min(240));
        colour_bar(&bar_area, canvas, &self.scale, bar_w, &self.bar_title())?;
        let mut notes = Vec::new();
        if (self.ve - 1.0).abs() > 1e-9 {
            notes.push(format!("Vertical exaggeration {}×", format_number(self.ve)));
        } else {
            notes.push("True scale (no vertical exaggeration)".to_string());
        }
        if self.masked {
            notes.push("pale cells: low sensitivity".to_string());
        }
        let style =
            font(0.85 * fp).color(&RGBColor(60, 60, 60)).pos(Pos::new(HPos::Left, VPos::Top));
        root.draw(&Text::new(
            notes.join("; "),
            ((lay.area.left) as i32, (bar_top + bar_h) as i32 + (0.2 * fp) as i32),
            style,
        ))?;
        Ok(())
    }
}

impl SectionFigure<'_> {
    fn bar_title(&self) -> String {
        self.bar_title.clone()
    }
}

/// How many ticks fit `px` pixels at one per `per_tick` pixels (2–12).
pub(super) fn ticks_for(px: u32, per_tick: f64) -> usize {
    ((f64::from(px) / per_tick) as usize).clamp(2, 12)
}

/// Draws `label` centred above `(x, y)` on a white box.
pub(super) fn label_box<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    label: &str,
    (x, y): (i32, i32),
    fp: f64,
) -> Result<(), FigureError> {
    if label.is_empty() {
        return Ok(());
    }
    let style = font(0.9 * fp);
    let (tw, th) = root.estimate_text_size(label, &style)?;
    let pad = (0.25 * fp) as i32;
    let (x0, y0) = (x - tw as i32 / 2 - pad, y - th as i32 - 2 * pad);
    root.draw(&Rectangle::new([(x0, y0), (x + tw as i32 / 2 + pad, y)], WHITE.mix(0.85).filled()))?;
    root.draw(&Rectangle::new([(x0, y0), (x + tw as i32 / 2 + pad, y)], BLACK.stroke_width(1)))?;
    root.draw(&Text::new(
        label.to_string(),
        (x, y - pad),
        style.pos(Pos::new(HPos::Center, VPos::Bottom)),
    ))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::figures::Figure;
    use crate::figures::testutil::{Image, diff};
    use crate::geometry::{Electrode, Surface};

    /// An nx × nz grid of square cells of side `h` m under flat ground at z = 0,
    /// chainage from 0; cell (i, j) has index j·nx + i (j counted downwards).
    fn grid(nx: usize, nz: usize, h: f64) -> SectionGrid {
        let mut polys = Vec::new();
        for j in 0..nz {
            for i in 0..nx {
                let (x, z) = (i as f64 * h, -(j as f64) * h);
                polys.push(vec![[x, z], [x, z - h], [x + h, z - h], [x + h, z]]);
            }
        }
        SectionGrid::new(polys, Surface::new(vec![[0.0, 0.0], [nx as f64 * h, 0.0]]).unwrap())
            .unwrap()
    }

    fn line(n: usize, a: f64) -> LineGeometry {
        LineGeometry::new(
            (0..n).map(|i| Electrode::new(format!("{}", i + 1), i as f64 * a, 0.0)).collect(),
        )
        .unwrap()
    }

    fn params<'a>(values: SectionValues<'a>) -> SectionParams<'a> {
        SectionParams {
            title: "Line A — resistivity".into(),
            subtitle: Some("2024-03-14 06:00 UTC".into()),
            values,
            line: None,
            well_resolved: None,
            fade: 0.6,
            zones: vec![],
            vertical_exaggeration: 1.0,
        }
    }

    /// Renders `fig` to PNG and checks the pixel at the centre of `cell`
    /// against `expected` (tolerance 1 per channel: colours are exact, the
    /// tolerance only covers rounding in fading).
    fn check(fig: &SectionFigure, canvas: &Canvas, img: &Image, cell: usize, expected: Rgb) {
        let c = fig.grid.cells()[cell].centroid();
        let (px, py) = fig.plot_area(canvas).to_pixel(c[0], c[1]);
        let got = img.at(px.round() as i32, py.round() as i32);
        assert!(
            diff(got, expected.to_array()) <= 1,
            "cell {cell}: got {got:?}, expected {expected:?}"
        );
    }

    #[test]
    fn resistivity_cells_take_the_log_viridis_colour() {
        let g = grid(24, 8, 1.0);
        // Seeded random resistivities between 5 and 500 Ω·m.
        use rand::{Rng, SeedableRng};
        let mut rng = rand::rngs::StdRng::seed_from_u64(7);
        let rho: Vec<f64> = (0..g.len()).map(|_| 5.0 * 100f64.powf(rng.random::<f64>())).collect();
        let canvas = Canvas::new(1000, 480, 13.0).unwrap();
        let fig = SectionFigure::new(
            &g,
            params(SectionValues::Resistivity { rho: &rho, limits: Some((5.0, 500.0)) }),
        )
        .unwrap();
        let img = Image::decode(&fig.png(&canvas).unwrap());
        assert_eq!((img.width, img.height), (1000, 480));
        let scale = LogScale::new(5.0, 500.0, SequentialMap::Viridis).unwrap();
        for cell in [0, 25, 60, 100, 191] {
            check(&fig, &canvas, &img, cell, scale.colour(rho[cell]));
        }
        // Not blank: most of the plot is coloured and many colours appear.
        assert!(img.colours() > 100, "{} colours", img.colours());
    }

    #[test]
    fn true_scale_makes_square_cells_square() {
        let g = grid(30, 6, 1.0);
        let rho: Vec<f64> = (0..g.len()).map(|i| 10.0 + i as f64).collect();
        for (ve, canvas) in [
            (1.0, Canvas::new(1200, 500, 14.0).unwrap()),
            (1.0, Canvas::new(500, 700, 12.0).unwrap()),
            (2.5, Canvas::new(1200, 500, 14.0).unwrap()),
        ] {
            let mut p = params(SectionValues::Resistivity { rho: &rho, limits: None });
            p.vertical_exaggeration = ve;
            let fig = SectionFigure::new(&g, p).unwrap();
            let img = Image::decode(&fig.png(&canvas).unwrap());
            // Measure cell 75 (row 2, column 15) by walking from its centre to
            // where the colour changes.
            let c = g.cells()[75].centroid();
            let (px, py) = fig.plot_area(&canvas).to_pixel(c[0], c[1]);
            let (px, py) = (px.round() as i32, py.round() as i32);
            let colour = img.at(px, py);
            let run = |dx: i32, dy: i32| {
                let mut k = 0;
                while img.at(px + (k + 1) * dx, py + (k + 1) * dy) == colour {
                    k += 1;
                }
                k
            };
            let w = run(1, 0) + run(-1, 0) + 1;
            let h = run(0, 1) + run(0, -1) + 1;
            assert!(w > 10, "cell is {w} px wide");
            let expected_h = ve * f64::from(w);
            assert!(
                (f64::from(h) - expected_h).abs() <= 1.0 * ve.max(1.0),
                "VE {ve}: cell {w} × {h} px, expected height {expected_h}"
            );
            let svg = fig.svg(&canvas).unwrap();
            if ve == 1.0 {
                assert!(svg.contains("True scale"));
            } else {
                assert!(svg.contains("Vertical exaggeration 2.5×"), "VE written on the figure");
            }
        }
    }

    #[test]
    fn masked_cells_are_faded_and_zero_change_is_neutral() {
        let g = grid(20, 6, 1.0);
        let change: Vec<f64> = (0..g.len()).map(|i| (i % 20) as f64 * 3.0 - 30.0).collect();
        let mask: Vec<bool> = (0..g.len()).map(|i| i < 80).collect();
        let mut p = params(SectionValues::ChangePercent { change: &change, limit: None });
        p.well_resolved = Some(&mask);
        let fig = SectionFigure::new(&g, p).unwrap();
        let canvas = Canvas::new(900, 420, 12.0).unwrap();
        let img = Image::decode(&fig.png(&canvas).unwrap());
        // Change spans −30…+27 %: the covering limit is 50 %.
        let scale = DivergingScale::new(50.0).unwrap();
        assert_eq!(fig.scale(), &ColourScale::Diverging(scale));
        // Cell 10 has 0 % change: the centre of the diverging map.
        assert_eq!(change[10], 0.0);
        check(&fig, &canvas, &img, 10, Rgb::from(colorous::RED_BLUE.eval_continuous(0.5)));
        // A drop inside the mask is blue, at full colour.
        check(&fig, &canvas, &img, 22, scale.colour(-24.0));
        let drop = img.at(0, 0);
        assert_eq!(drop, [255, 255, 255], "background is white");
        // Cells 80+ are outside the mask: 60 % white mixed in.
        for cell in [83, 90, 119] {
            check(&fig, &canvas, &img, cell, fade(scale.colour(change[cell]), 0.6));
        }
        let svg = fig.svg(&canvas).unwrap();
        assert!(svg.contains("Change in resistivity (%)"));
        assert!(svg.contains("pale cells: low sensitivity"));
        for label in [">-50<", ">-25<", ">0<", ">25<", ">50<"] {
            assert!(svg.replace('\n', "").contains(label), "bar label {label}");
        }
    }

    #[test]
    fn svg_has_axes_units_and_escaped_text() {
        let g = grid(12, 4, 1.0);
        let rho = vec![100.0; g.len()];
        let l = line(13, 1.0);
        let mut p = params(SectionValues::Resistivity { rho: &rho, limits: Some((10.0, 1000.0)) });
        p.title = "Levee <North> & \"Dike\"".into();
        p.line = Some(&l);
        p.zones = vec![Zone { label: "Z1 <script>".into(), cells: vec![5, 6, 17, 18] }];
        let fig = SectionFigure::new(&g, p).unwrap();
        let svg = fig.svg(&Canvas::new(800, 400, 12.0).unwrap()).unwrap();
        assert!(svg.starts_with("<svg"));
        for text in ["Chainage (m)", "Elevation (m)", "Resistivity (Ω·m)", "DejaVu Sans"] {
            assert!(svg.contains(text), "{text} missing");
        }
        let flat = svg.replace('\n', "");
        for label in [">10<", ">100<", ">1000<"] {
            assert!(flat.contains(label), "log tick {label}");
        }
        assert!(svg.contains("Levee &lt;North&gt; &amp; &quot;Dike&quot;"));
        assert!(svg.contains("Z1 &lt;script&gt;"));
        assert!(!svg.contains("<script>") && !svg.contains("<North>"));
    }

    #[test]
    fn zones_are_outlined_and_electrodes_marked() {
        let g = grid(12, 4, 1.0);
        // A 2 × 2 block has 8 boundary edges (its 4 inner edges are shared).
        assert_eq!(outline_edges(&g, &[5, 6, 17, 18]).len(), 8);
        // An L of three cells: 8 edges; repeats and unknown cells are ignored.
        assert_eq!(outline_edges(&g, &[0, 1, 12, 1, 999]).len(), 8);
        let rho = vec![100.0; g.len()];
        let l = line(13, 1.0);
        let mut p = params(SectionValues::Resistivity { rho: &rho, limits: Some((10.0, 1000.0)) });
        p.line = Some(&l);
        p.zones = vec![Zone { label: String::new(), cells: vec![5, 6, 17, 18] }];
        let fig = SectionFigure::new(&g, p).unwrap();
        let canvas = Canvas::new(900, 400, 12.0).unwrap();
        let img = Image::decode(&fig.png(&canvas).unwrap());
        let area = fig.plot_area(&canvas);
        // The zone's left edge at x = 5 m, z = −1.5 m is drawn black.
        let (px, py) = area.to_pixel(5.0, -1.5);
        let near: Vec<[u8; 3]> =
            (-1..=1).map(|d| img.at(px.round() as i32 + d, py.round() as i32)).collect();
        assert!(near.contains(&[0, 0, 0]), "outline at the zone edge: {near:?}");
        // Inside the zone away from edges the fill is unchanged.
        let (px, py) = area.to_pixel(6.0, -1.5);
        let inner = img.at(px.round() as i32, py.round() as i32);
        let expected = LogScale::new(10.0, 1000.0, SequentialMap::Viridis).unwrap().colour(100.0);
        assert_eq!(inner, expected.to_array(), "x = 6 m is an inner edge: not outlined");
        // Electrode 4 at (3 m, 0 m): its marker is black just above the surface.
        let (px, py) = area.to_pixel(3.0, 0.0);
        assert_eq!(img.at(px.round() as i32, py.round() as i32 - 3), [0, 0, 0]);
    }

    #[test]
    fn bad_input_is_named() {
        let g = grid(4, 2, 1.0);
        let short = vec![10.0; 3];
        assert_eq!(
            SectionFigure::new(
                &g,
                params(SectionValues::Resistivity { rho: &short, limits: None })
            )
            .unwrap_err(),
            FigureError::Length { what: "resistivity", expected: 8, got: 3 }
        );
        let mut rho = vec![10.0; 8];
        rho[5] = -1.0;
        assert!(matches!(
            SectionFigure::new(&g, params(SectionValues::Resistivity { rho: &rho, limits: None })),
            Err(FigureError::BadValue { index: 5, .. })
        ));
        let rho = vec![10.0; 8];
        let mut p = params(SectionValues::Resistivity { rho: &rho, limits: None });
        p.zones = vec![Zone { label: "Z".into(), cells: vec![1, 8] }];
        assert!(matches!(SectionFigure::new(&g, p), Err(FigureError::ZoneCell { cell: 8, .. })));
        let mut p = params(SectionValues::Resistivity { rho: &rho, limits: None });
        p.vertical_exaggeration = 0.0;
        assert!(matches!(
            SectionFigure::new(&g, p),
            Err(FigureError::Parameter { name: "vertical_exaggeration", .. })
        ));
        let change = vec![f64::NAN; 8];
        assert!(matches!(
            SectionFigure::new(
                &g,
                params(SectionValues::ChangePercent { change: &change, limit: None })
            ),
            Err(FigureError::BadValue { index: 0, .. })
        ));
        // Equal resistivities get a usable range around them.
        let fig =
            SectionFigure::new(&g, params(SectionValues::Resistivity { rho: &rho, limits: None }))
                .unwrap();
        assert!(
            matches!(fig.scale(), ColourScale::Log(s) if (s.limits().0 - 10.0 / 1.5).abs() < 1e-12)
        );
    }
}
