//! Pseudosections: one marker per quadrupole at (x, pseudo-depth), coloured by
//! apparent resistivity (Ω·m, log scale, viridis) or reciprocal error (%,
//! linear, magma).
//!
//! Plotting position: x is the mean chainage of the electrodes in use (remote
//! electrodes left out); the pseudo-depth is the median depth of investigation
//! of Edwards (1977, *Geophysics* 42, 1020–1036): the depth above which a thin
//! horizontal layer of a homogeneous half-space contributes half of the
//! measured potential. For a pole–pole pair at separation L the layer at depth
//! z contributes in proportion to 4z/(L² + 4z²)^{3/2} (Roy & Apparao 1971,
//! *Geophysics* 36, 943–959), whose integral from 0 to z is
//! 1/L − 1/√(L² + 4z²). A quadrupole sums its pairs AM, AN, BM, BN with signs
//! +, −, −, + (distances in the x–z plane), and the median depth solves
//! Σ sᵢ(1/Lᵢ − 1/√(Lᵢ² + 4z²)) = ½ Σ sᵢ/Lᵢ. Depth is positive downwards, in
//! metres.

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use crate::figures::colour::{ColourScale, DivergingScale, LinearScale, LogScale, SequentialMap};
use crate::figures::layout::{
    AxisSpec, Frame, colour_bar, colour_bar_height, framed_chart, true_scale_box,
};
use crate::figures::section::{Layout, PlotArea, block_layout, rgb, ticks_for, title_height};
use crate::figures::ticks::{format_number, linear_ticks};
use crate::figures::{Canvas, FigureError, draw_titles, font, sealed};
use crate::geometry::LineGeometry;
use crate::sequence::{Quadrupole, Sequence};

/// Where a quadrupole is plotted on a pseudosection.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PseudoPosition {
    /// Mean chainage of the electrodes in use, m.
    pub x: f64,
    /// Median depth of investigation (Edwards 1977), m, positive down.
    pub depth: f64,
}

/// The plotting position of `q` on `line`, or `None` when an electrode index
/// is not on the line or the array measures nothing on a homogeneous earth
/// (Σ ±1/L = 0, infinite geometric factor).
pub fn pseudo_position(line: &LineGeometry, q: &Quadrupole) -> Option<PseudoPosition> {
    let n = line.len();
    if q.electrodes().any(|e| e >= n) {
        return None;
    }
    let xs: Vec<f64> = q.electrodes().map(|e| line.electrodes()[e].x()).collect();
    let x = xs.iter().sum::<f64>() / xs.len() as f64;
    let mut pairs: Vec<(f64, f64)> = vec![(1.0, line.distance(q.a, q.m))];
    if let Some(nn) = q.n {
        pairs.push((-1.0, line.distance(q.a, nn)));
    }
    if let Some(b) = q.b {
        pairs.push((-1.0, line.distance(b, q.m)));
        if let Some(nn) = q.n {
            pairs.push((1.0, line.distance(b, nn)));
        }
    }
    if pairs.iter().any(|&(_, l)| l <= 0.0) {
        return None;
    }
    let total: f64 = pairs.iter().map(|&(s, l)| s / l).sum();
    let l_min = pairs.iter().map(|p| p.1).fold(f64::INFINITY, f64::min);
    let l_max = pairs.iter().map(|p| p.1).fold(0.0, f64::max);
    if total.abs() <= 1e-12 / l_min {
        return None;
    }
    let share = |z: f64| {
        pairs.iter().map(|&(s, l)| s * (1.0 / l - 1.0 / (l * l + 4.0 * z * z).sqrt())).sum::<f64>()
            / total
            - 0.5
    };
    // Bracket the first crossing on a geometric grid, then bisect to 1e-12 m·L.
    let (mut lo, mut z) = (0.0, 1e-3 * l_min);
    while share(z) < 0.0 {
        lo = z;
        z *= 1.1;
        if z > 1e3 * l_max {
            return None;
        }
    }
    let mut hi = z;
    while hi - lo > 1e-12 * l_max {
        let mid = 0.5 * (lo + hi);
        if share(mid) < 0.0 { lo = mid } else { hi = mid }
    }
    Some(PseudoPosition { x, depth: 0.5 * (lo + hi) })
}

/// The value shown for each quadrupole of the sequence (`None`: no marker).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum PseudoValues<'a> {
    /// Apparent resistivity, Ω·m, log scale. Values ≤ 0 are not shown and
    /// are counted in [`PseudosectionFigure::not_shown`]. `limits` fixes the
    /// colour range (Ω·m); `None` takes the shown data's range.
    ApparentResistivity {
        /// ρa per quadrupole, Ω·m.
        rho_a: &'a [Option<f64>],
        /// Colour range, Ω·m.
        limits: Option<(f64, f64)>,
    },
    /// Reciprocal error, % (≥ 0), linear from 0 to `max` (%; `None`: the
    /// smallest 1, 2, 2.5 or 5 × 10ᵏ % covering the data).
    ReciprocalErrorPercent {
        /// Error per quadrupole, %.
        error: &'a [Option<f64>],
        /// Top of the colour range, %.
        max: Option<f64>,
    },
}

/// What to draw on a pseudosection.
#[derive(Debug, Clone, PartialEq)]
pub struct PseudosectionParams<'a> {
    /// Title line.
    pub title: String,
    /// Optional second line.
    pub subtitle: Option<String>,
    /// Values per quadrupole, in sequence order.
    pub values: PseudoValues<'a>,
    /// Vertical exaggeration of pseudo-depth, 1 for true scale (0.1–20).
    pub vertical_exaggeration: f64,
}

/// A checked pseudosection, ready to render with [`crate::figures::Figure`].
#[derive(Debug, Clone)]
pub struct PseudosectionFigure {
    title: String,
    subtitle: Option<String>,
    points: Vec<(PseudoPosition, f64)>,
    scale: ColourScale,
    bar_title: &'static str,
    not_shown: usize,
    spacing: f64,
    ve: f64,
    x_extent: (f64, f64),
    depth_max: f64,
}

impl PseudosectionFigure {
    /// Places every quadrupole with a value and prepares the colours.
    pub fn new(
        line: &LineGeometry,
        sequence: &Sequence,
        params: PseudosectionParams<'_>,
    ) -> Result<Self, FigureError> {
        if sequence.n_electrodes() != line.len() {
            return Err(FigureError::LineMismatch {
                sequence: sequence.n_electrodes(),
                line: line.len(),
            });
        }
        let ve = params.vertical_exaggeration;
        if !(0.1..=20.0).contains(&ve) {
            return Err(FigureError::Parameter {
                name: "vertical_exaggeration",
                value: ve,
                reason: "must be 0.1 to 20",
            });
        }
        let (values, what) = match params.values {
            PseudoValues::ApparentResistivity { rho_a, .. } => (rho_a, "apparent resistivity"),
            PseudoValues::ReciprocalErrorPercent { error, .. } => (error, "reciprocal error"),
        };
        if values.len() != sequence.len() {
            return Err(FigureError::Length { what, expected: sequence.len(), got: values.len() });
        }
        let mut points = Vec::new();
        let mut not_shown = 0;
        for (i, (q, v)) in sequence.quadrupoles().iter().zip(values).enumerate() {
            let Some(v) = *v else { continue };
            if !v.is_finite() {
                return Err(FigureError::BadValue {
                    what,
                    index: i,
                    value: v,
                    reason: "not a finite number",
                });
            }
            let shown = match params.values {
                PseudoValues::ApparentResistivity { .. } => v > 0.0,
                PseudoValues::ReciprocalErrorPercent { .. } => v >= 0.0,
            };
            match pseudo_position(line, q) {
                Some(p) if shown => points.push((p, v)),
                _ => not_shown += 1,
            }
        }
        let (scale, bar_title) = match params.values {
            PseudoValues::ApparentResistivity { limits, .. } => {
                let (lo, hi) = limits.unwrap_or_else(|| {
                    let lo = points.iter().map(|p| p.1).fold(f64::INFINITY, f64::min);
                    let hi = points.iter().map(|p| p.1).fold(f64::NEG_INFINITY, f64::max);
                    if !lo.is_finite() {
                        (1.0, 1000.0)
                    } else if hi > lo * (1.0 + 1e-9) {
                        (lo, hi)
                    } else {
                        (lo / 1.5, hi * 1.5)
                    }
                });
                (
                    ColourScale::Log(LogScale::new(lo, hi, SequentialMap::Viridis)?),
                    "Apparent resistivity (Ω·m)",
                )
            }
            PseudoValues::ReciprocalErrorPercent { max, .. } => {
                let top = match max {
                    Some(m) => m,
                    None => {
                        DivergingScale::covering(points.iter().map(|p| p.1).fold(0.0, f64::max))
                            .limit()
                    }
                };
                (
                    ColourScale::Linear(LinearScale::new(0.0, top, SequentialMap::Magma)?),
                    "Reciprocal error (%)",
                )
            }
        };
        let depth_max = points.iter().map(|p| p.0.depth).fold(0.0, f64::max);
        let spacing = line.nominal_spacing();
        let depth_max = if depth_max > 0.0 { depth_max } else { spacing };
        Ok(Self {
            title: params.title,
            subtitle: params.subtitle,
            points,
            scale,
            bar_title,
            not_shown,
            spacing,
            ve,
            x_extent: line.extent(),
            depth_max,
        })
    }

    /// The markers: position and value, in sequence order.
    pub fn points(&self) -> &[(PseudoPosition, f64)] {
        &self.points
    }

    /// Readings with a value that are not drawn (ρa ≤ 0, negative error, or
    /// no defined pseudo-depth).
    pub fn not_shown(&self) -> usize {
        self.not_shown
    }

    /// The colour scale in use.
    pub fn scale(&self) -> &ColourScale {
        &self.scale
    }

    /// Where the pseudosection is drawn: x chainage, z = −pseudo-depth, m.
    pub fn plot_area(&self, canvas: &Canvas) -> PlotArea {
        self.layout(canvas).area
    }

    fn layout(&self, canvas: &Canvas) -> Layout {
        let fp = canvas.font_px();
        let title_h = title_height(fp, !self.title.is_empty(), self.subtitle.is_some());
        let frame = Frame::axes(fp);
        let (w, h) = (f64::from(canvas.width()), f64::from(canvas.height()));
        let below = f64::from(colour_bar_height(fp)) + 1.6 * fp;
        let avail_w = w - f64::from(frame.left + frame.right) - fp;
        let avail_h = h - title_h - f64::from(frame.top + frame.bottom) - below;
        let z = (-1.05 * self.depth_max, 0.0);
        let pb = true_scale_box(avail_w, avail_h, self.x_extent, z, self.ve, fp);
        block_layout(canvas, title_h, frame, pb, below)
    }
}

impl sealed::Draw for PseudosectionFigure {
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
                y_ticks: linear_ticks(pb.z.0, pb.z.1.min(0.0), ticks_for(pb.height, 2.5 * fp)),
                x_title: "Chainage (m)",
                y_title: "Pseudo-depth (m)",
                x_format: &format_number,
                y_format: &|v| format_number(-v),
            },
        )?;
        let (sx, _) = lay.area.pixels_per_metre();
        let r = (0.45 * self.spacing * sx).clamp(2.0, 0.6 * fp).round() as i32;
        let scale = self.scale;
        chart.draw_series(self.points.iter().map(|(p, v)| {
            let c = scale.colour(*v);
            EmptyElement::at((p.x, -p.depth))
                + Circle::new((0, 0), r, rgb(c).filled())
                + Circle::new((0, 0), r, RGBColor(90, 90, 90).stroke_width(1))
        }))?;
        let bar_h = colour_bar_height(fp);
        let bar_top = lay.oy + lay.block_h;
        let bar_area = root.clone().shrink((0, bar_top), (canvas.width(), bar_h));
        let bar_w = ((0.45 * f64::from(canvas.width())) as u32).max(pb.width.min(240));
        colour_bar(&bar_area, canvas, &self.scale, bar_w, self.bar_title)?;
        let mut notes = vec![format!("Pseudo-depth: median depth of investigation (Edwards 1977)")];
        if (self.ve - 1.0).abs() > 1e-9 {
            notes.push(format!("vertical exaggeration {}×", format_number(self.ve)));
        }
        if self.not_shown > 0 {
            notes.push(format!("{} readings not shown", self.not_shown));
        }
        let style =
            font(0.85 * fp).color(&RGBColor(60, 60, 60)).pos(Pos::new(HPos::Left, VPos::Top));
        root.draw(&Text::new(
            notes.join("; "),
            (lay.area.to_pixel(pb.x.0, 0.0).0 as i32, (bar_top + bar_h) as i32 + (0.2 * fp) as i32),
            style,
        ))?;
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::figures::Figure;
    use crate::figures::testutil::{Image, diff};
    use crate::geometry::Electrode;

    fn line(n: usize, a: f64) -> LineGeometry {
        LineGeometry::new(
            (0..n).map(|i| Electrode::new(format!("{}", i + 1), i as f64 * a, 0.0)).collect(),
        )
        .unwrap()
    }

    /// Checks the median depth of `q` on a 2 m line against `expected` × a.
    fn check(q: Quadrupole, x: f64, expected_over_a: f64) {
        let a = 2.0;
        let p = pseudo_position(&line(16, a), &q).expect("a position");
        assert!((p.x - x).abs() < 1e-12, "{q:?}: x = {}", p.x);
        // Edwards' table gives three decimals: tolerance 0.0006·a.
        assert!((p.depth / a - expected_over_a).abs() < 6e-4, "{q:?}: z/a = {}", p.depth / a);
    }

    #[test]
    fn median_depths_match_edwards_1977() {
        // Edwards (1977), table of median depths of investigation z/a
        // (from memory; recomputed here to 4 decimals from the formula above
        // with an independent Python bisection: 0.5190, 0.4159, 0.6972,
        // 0.9617, 1.2202, 0.8660, 0.9249).
        check(Quadrupole::new(0, 3, 1, 2), 3.0, 0.519); // Wenner α
        for (n, z) in [(1, 0.416), (2, 0.697), (3, 0.962), (4, 1.220)] {
            // Dipole–dipole: B A … M N with dipole a and separation n·a.
            check(
                Quadrupole::new(1, 0, 1 + n, 2 + n),
                (1 + 1 + n + 2 + n) as f64 * 2.0 / 4.0, // B = 0, A = 1, M, N
                z,
            );
        }
        // Pole–pole, separation a: closed form 1 − L/√(L² + 4z²) = ½ gives
        // z = (√3/2)·L = 0.8660·a exactly (Edwards lists 0.867).
        let p =
            pseudo_position(&line(8, 2.0), &Quadrupole { a: 4, b: None, m: 5, n: None }).unwrap();
        assert!((p.depth - 3f64.sqrt() / 2.0 * 2.0).abs() < 1e-9, "{p:?}");
        assert_eq!(p.x, 9.0);
        // Pole–dipole n = 2.
        check(Quadrupole { a: 0, b: None, m: 2, n: Some(3) }, 10.0 / 3.0, 0.925);
        // Off the line.
        assert_eq!(pseudo_position(&line(8, 1.0), &Quadrupole::new(0, 9, 1, 2)), None);
    }

    fn wenner_sequence(n: usize) -> Sequence {
        let mut qs = Vec::new();
        for s in 1..=(n - 1) / 3 {
            for i in 0..n - 3 * s {
                qs.push(Quadrupole::new(i, i + 3 * s, i + s, i + 2 * s));
            }
        }
        Sequence::new(qs, n).unwrap()
    }

    #[test]
    fn markers_take_the_scale_colour() {
        let l = line(32, 1.0);
        let seq = wenner_sequence(32);
        use rand::{Rng, SeedableRng};
        let mut rng = rand::rngs::StdRng::seed_from_u64(11);
        let mut rho: Vec<Option<f64>> =
            (0..seq.len()).map(|_| Some(20.0 * 10f64.powf(rng.random::<f64>()))).collect();
        rho[3] = None;
        rho[4] = Some(-5.0);
        let fig = PseudosectionFigure::new(
            &l,
            &seq,
            PseudosectionParams {
                title: "Apparent resistivity".into(),
                subtitle: None,
                values: PseudoValues::ApparentResistivity {
                    rho_a: &rho,
                    limits: Some((20.0, 200.0)),
                },
                vertical_exaggeration: 1.0,
            },
        )
        .unwrap();
        assert_eq!(fig.not_shown(), 1, "the negative ρa");
        assert_eq!(fig.points().len(), seq.len() - 2);
        let canvas = Canvas::new(900, 400, 12.0).unwrap();
        let img = Image::decode(&fig.png(&canvas).unwrap());
        let area = fig.plot_area(&canvas);
        let scale = LogScale::new(20.0, 200.0, SequentialMap::Viridis).unwrap();
        for (p, v) in fig.points().iter().step_by(17) {
            let (px, py) = area.to_pixel(p.x, -p.depth);
            let got = img.at(px.round() as i32, py.round() as i32);
            let want = scale.colour(*v).to_array();
            assert!(diff(got, want) <= 1, "marker at {p:?}: {got:?} vs {want:?}");
        }
        assert!(img.colours() > 50);
        let svg = fig.svg(&canvas).unwrap();
        for text in [
            "Apparent resistivity (Ω·m)",
            "Pseudo-depth (m)",
            "Chainage (m)",
            "1 readings not shown",
        ] {
            assert!(svg.contains(text), "{text}");
        }
    }

    #[test]
    fn reciprocal_errors_on_a_linear_scale() {
        let l = line(16, 1.0);
        let seq = wenner_sequence(16);
        let err: Vec<Option<f64>> = (0..seq.len()).map(|i| Some((i % 7) as f64)).collect();
        let fig = PseudosectionFigure::new(
            &l,
            &seq,
            PseudosectionParams {
                title: "Reciprocal error".into(),
                subtitle: None,
                values: PseudoValues::ReciprocalErrorPercent { error: &err, max: None },
                vertical_exaggeration: 2.0,
            },
        )
        .unwrap();
        // Largest error 6 %: the covering top is 10 %.
        assert_eq!(
            fig.scale(),
            &ColourScale::Linear(LinearScale::new(0.0, 10.0, SequentialMap::Magma).unwrap())
        );
        let svg = fig.svg(&Canvas::new(700, 350, 12.0).unwrap()).unwrap();
        assert!(svg.contains("Reciprocal error (%)") && svg.contains("vertical exaggeration 2×"));
        assert_eq!(
            PseudosectionFigure::new(
                &line(20, 1.0),
                &seq,
                PseudosectionParams {
                    title: String::new(),
                    subtitle: None,
                    values: PseudoValues::ReciprocalErrorPercent { error: &err, max: None },
                    vertical_exaggeration: 1.0,
                },
            )
            .unwrap_err(),
            FigureError::LineMismatch { sequence: 16, line: 20 }
        );
    }
}
