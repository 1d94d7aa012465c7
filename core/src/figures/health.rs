//! Electrode health strips: a matrix of electrodes (rows, cable order from the
//! top) by epochs (columns, on a UTC time axis), each cell coloured by the
//! electrode's state in that epoch.
//!
//! The share of an electrode's readings that failed quality control (0–1) is
//! shown in % on the ColorBrewer Oranges map (0 % near-white, 100 % dark
//! orange); an electrode out of service is near-black and an epoch without
//! data for it is light grey. Epoch k's column spans from the midpoint with
//! the previous epoch to the midpoint with the next (the first and last
//! columns extend by half their one neighbouring interval; a lone epoch spans
//! one hour).

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use crate::figures::colour::{ColourScale, LinearScale, Rgb, SequentialMap};
use crate::figures::layout::{
    AxisSpec, Frame, PlotBox, colour_bar, colour_bar_height, framed_chart,
};
use crate::figures::section::{Layout, PlotArea, block_layout, rgb, title_height};
use crate::figures::ticks::date_ticks;
use crate::figures::{Canvas, FigureError, draw_titles, font, sealed};

/// The state of one electrode in one epoch.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ElectrodeHealth {
    /// No readings used the electrode in this epoch.
    NoData,
    /// Share (0–1) of the electrode's readings that failed quality control.
    Share(f64),
    /// Marked out of service.
    OutOfService,
}

const NO_DATA: Rgb = Rgb(210, 210, 210);
const OUT_OF_SERVICE: Rgb = Rgb(40, 40, 40);

/// What to draw on a health strip.
#[derive(Debug, Clone, PartialEq)]
pub struct HealthStripParams {
    /// Title line.
    pub title: String,
    /// Optional second line.
    pub subtitle: Option<String>,
    /// Electrode labels in cable order (one row each, first at the top).
    pub electrodes: Vec<String>,
    /// Epoch times, s since the Unix epoch, strictly increasing (one column each).
    pub epochs: Vec<i64>,
    /// States, row-major: `states[e * epochs.len() + k]` is electrode e in epoch k.
    pub states: Vec<ElectrodeHealth>,
}

/// A checked health strip, ready to render with [`crate::figures::Figure`].
#[derive(Debug, Clone)]
pub struct HealthStrip {
    title: String,
    subtitle: Option<String>,
    electrodes: Vec<String>,
    edges: Vec<f64>,
    epochs: Vec<i64>,
    states: Vec<ElectrodeHealth>,
    scale: ColourScale,
}

impl HealthStrip {
    /// Checks sizes, time order and shares.
    pub fn new(p: HealthStripParams) -> Result<Self, FigureError> {
        let (ne, nk) = (p.electrodes.len(), p.epochs.len());
        if ne == 0 || nk == 0 {
            return Err(FigureError::Length {
                what: "electrodes × epochs (both non-zero)",
                expected: 1,
                got: 0,
            });
        }
        if p.states.len() != ne * nk {
            return Err(FigureError::Length {
                what: "electrode states",
                expected: ne * nk,
                got: p.states.len(),
            });
        }
        if let Some(i) = p.epochs.windows(2).position(|w| w[1] <= w[0]) {
            return Err(FigureError::TimeOrder {
                series: "epochs".into(),
                index: i + 1,
                time: p.epochs[i + 1],
            });
        }
        let bad_share = p.states.iter().enumerate().find_map(|(i, s)| match s {
            ElectrodeHealth::Share(v) if !(0.0..=1.0).contains(v) => Some((i, *v)),
            _ => None,
        });
        if let Some((index, value)) = bad_share {
            return Err(FigureError::BadValue {
                what: "electrode state",
                index,
                value,
                reason: "a share must be between 0 and 1",
            });
        }
        let t: Vec<f64> = p.epochs.iter().map(|&t| t as f64).collect();
        let mut edges = Vec::with_capacity(nk + 1);
        if nk == 1 {
            edges.extend([t[0] - 1800.0, t[0] + 1800.0]);
        } else {
            edges.push(t[0] - 0.5 * (t[1] - t[0]));
            edges.extend(t.windows(2).map(|w| 0.5 * (w[0] + w[1])));
            edges.push(t[nk - 1] + 0.5 * (t[nk - 1] - t[nk - 2]));
        }
        Ok(Self {
            title: p.title,
            subtitle: p.subtitle,
            electrodes: p.electrodes,
            edges,
            epochs: p.epochs,
            states: p.states,
            scale: ColourScale::Linear(LinearScale::new(0.0, 100.0, SequentialMap::Oranges)?),
        })
    }

    /// The colour a state is drawn in.
    pub fn colour(&self, s: ElectrodeHealth) -> Rgb {
        match s {
            ElectrodeHealth::NoData => NO_DATA,
            ElectrodeHealth::OutOfService => OUT_OF_SERVICE,
            ElectrodeHealth::Share(v) => self.scale.colour(100.0 * v),
        }
    }

    /// Where the matrix is drawn: x = time (s), z = −row (electrode e spans
    /// z from −(e + 1) to −e).
    pub fn plot_area(&self, canvas: &Canvas) -> PlotArea {
        self.layout(canvas).area
    }

    fn layout(&self, canvas: &Canvas) -> Layout {
        let fp = canvas.font_px();
        let title_h = title_height(fp, !self.title.is_empty(), self.subtitle.is_some());
        let frame = Frame::axes(fp);
        let below = f64::from(colour_bar_height(fp)) + 0.5 * fp;
        let w = f64::from(canvas.width()) - f64::from(frame.left + frame.right) - fp;
        let h = f64::from(canvas.height()) - title_h - f64::from(frame.top + frame.bottom) - below;
        let (width, height) = (w.max(8.0).floor(), h.max(8.0).floor());
        let x = (self.edges[0], self.edges[self.edges.len() - 1]);
        let pb = PlotBox {
            x,
            z: (-(self.electrodes.len() as f64), 0.0),
            width: width as u32,
            height: height as u32,
        };
        block_layout(canvas, title_h, frame, pb, below)
    }
}

impl sealed::Draw for HealthStrip {
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
        let ne = self.electrodes.len();
        let nk = self.epochs.len();
        let ticks = date_ticks(
            pb.x.0.ceil() as i64,
            pb.x.1.floor() as i64,
            ((f64::from(pb.width) / (7.0 * fp)) as usize).clamp(2, 10),
        );
        // Label every k-th electrode so labels are at least 1.3 em apart.
        let every = ((1.3 * fp) / (f64::from(pb.height) / ne as f64)).ceil().max(1.0) as usize;
        let y_ticks: Vec<f64> = (0..ne).step_by(every).map(|e| -(e as f64) - 0.5).collect();
        let labels = &self.electrodes;
        let y_format = |v: f64| {
            let e = (-v - 0.5).round();
            if e >= 0.0 && (e as usize) < labels.len() {
                labels[e as usize].clone()
            } else {
                String::new()
            }
        };
        let x_format = |v: f64| {
            ticks
                .iter()
                .find(|t| (t.0 as f64 - v).abs() < 0.5)
                .map(|t| t.1.clone())
                .unwrap_or_default()
        };
        let block = root.clone().shrink((lay.ox, lay.oy), (lay.block_w, lay.block_h));
        let mut chart = framed_chart(
            &block,
            canvas,
            lay.frame,
            AxisSpec {
                x_range: pb.x,
                y_range: pb.z,
                x_ticks: ticks.iter().map(|t| t.0 as f64).collect(),
                y_ticks,
                x_title: "Date (UTC)",
                y_title: "Electrode",
                x_format: &x_format,
                y_format: &y_format,
            },
        )?;
        chart.draw_series((0..ne).flat_map(|e| {
            (0..nk).map(move |k| {
                let c = self.colour(self.states[e * nk + k]);
                let (z0, z1) = (-(e as f64) - 1.0, -(e as f64));
                Rectangle::new([(self.edges[k], z1), (self.edges[k + 1], z0)], rgb(c).filled())
            })
        }))?;
        // Colour bar with two swatches for the other states on the right.
        let bar_h = colour_bar_height(fp);
        let bar_top = lay.oy + lay.block_h;
        let bar_area = root.clone().shrink((0, bar_top), (canvas.width(), bar_h));
        let bar_w = (0.4 * f64::from(canvas.width())) as u32;
        colour_bar(&bar_area, canvas, &self.scale, bar_w, "Readings failing quality control (%)")?;
        let style = font(0.85 * fp).pos(Pos::new(HPos::Left, VPos::Center));
        let mut x = ((f64::from(canvas.width()) + f64::from(bar_w)) / 2.0 + 1.5 * fp) as i32;
        let y = (f64::from(bar_top) + 0.85 * fp) as i32;
        let s = (0.9 * fp) as i32;
        for (c, text) in [(OUT_OF_SERVICE, "out of service"), (NO_DATA, "no data")] {
            root.draw(&Rectangle::new([(x, y - s / 2), (x + s, y + s / 2)], rgb(c).filled()))?;
            root.draw(&Rectangle::new(
                [(x, y - s / 2), (x + s, y + s / 2)],
                BLACK.stroke_width(1),
            ))?;
            let (tw, _) = root.estimate_text_size(text, &style)?;
            root.draw(&Text::new(text, (x + s + (0.4 * fp) as i32, y), style.clone()))?;
            x += s + tw as i32 + (1.5 * fp) as i32;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::figures::Figure;
    use crate::figures::testutil::{Image, diff};

    fn strip(ne: usize, nk: usize) -> (HealthStripParams, Vec<i64>) {
        let t0 = 1_709_251_200; // 2024-03-01 00:00 UTC
        let epochs: Vec<i64> = (0..nk as i64).map(|k| t0 + k * 6 * 3600).collect();
        let states = (0..ne * nk)
            .map(|i| {
                let (e, k) = (i / nk, i % nk);
                match (e, k) {
                    (7, k) if k >= 10 => ElectrodeHealth::OutOfService,
                    (_, 5) => ElectrodeHealth::NoData,
                    _ => ElectrodeHealth::Share(((e * 7 + k * 3) % 11) as f64 / 10.0),
                }
            })
            .map(|s| match s {
                ElectrodeHealth::Share(v) if v > 1.0 => ElectrodeHealth::Share(1.0),
                s => s,
            })
            .collect();
        let params = HealthStripParams {
            title: "Electrode health".into(),
            subtitle: None,
            electrodes: (1..=ne).map(|i| format!("E{i}")).collect(),
            epochs: epochs.clone(),
            states,
        };
        (params, epochs)
    }

    /// Checks the pixel at the centre of (electrode e, epoch k).
    fn check(fig: &HealthStrip, canvas: &Canvas, img: &Image, (e, k): (usize, usize), want: Rgb) {
        let t = fig.epochs[k] as f64;
        let (px, py) = fig.plot_area(canvas).to_pixel(t, -(e as f64) - 0.5);
        let got = img.at(px.round() as i32, py.round() as i32);
        assert!(diff(got, want.to_array()) == 0, "({e}, {k}): got {got:?}, want {want:?}");
    }

    #[test]
    fn cells_take_their_state_colour() {
        let (p, _) = strip(24, 30);
        let states = p.states.clone();
        let fig = HealthStrip::new(p).unwrap();
        let canvas = Canvas::new(900, 420, 12.0).unwrap();
        let img = Image::decode(&fig.png(&canvas).unwrap());
        let oranges = LinearScale::new(0.0, 100.0, SequentialMap::Oranges).unwrap();
        check(&fig, &canvas, &img, (7, 12), OUT_OF_SERVICE);
        check(&fig, &canvas, &img, (3, 5), NO_DATA);
        for (e, k) in [(0, 0), (2, 9), (20, 29), (15, 17)] {
            let ElectrodeHealth::Share(v) = states[e * 30 + k] else {
                panic!("a share at ({e}, {k})")
            };
            check(&fig, &canvas, &img, (e, k), oranges.colour(100.0 * v));
        }
        let svg = fig.svg(&canvas).unwrap();
        for text in [
            "Readings failing quality control (%)",
            "out of service",
            "no data",
            "Electrode",
            "E1",
            "2 Mar",
        ] {
            assert!(svg.contains(text), "{text}");
        }
    }

    #[test]
    fn bad_strips_are_named() {
        let (mut p, _) = strip(4, 3);
        p.states.pop();
        assert!(matches!(
            HealthStrip::new(p),
            Err(FigureError::Length { expected: 12, got: 11, .. })
        ));
        let (mut p, _) = strip(4, 3);
        p.states[2] = ElectrodeHealth::Share(1.5);
        assert!(matches!(HealthStrip::new(p), Err(FigureError::BadValue { index: 2, .. })));
        let (mut p, _) = strip(4, 3);
        p.epochs[2] = p.epochs[1];
        assert!(matches!(HealthStrip::new(p), Err(FigureError::TimeOrder { index: 2, .. })));
    }
}
