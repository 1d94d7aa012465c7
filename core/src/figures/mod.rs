//! Figures: sections, pseudosections, time-series charts and electrode health
//! strips, rendered in memory as SVG text or PNG bytes.
//!
//! The same code draws the pictures of the web pages, the alert emails and the
//! command line, so everything here is pure: a figure is built from data, checked,
//! and rendered to a `String` (SVG) or a `Vec<u8>` (PNG) of a size given in pixels
//! by a [`Canvas`]. Nothing is read from or written to disk; text is drawn with the
//! DejaVu Sans font embedded in the crate (`assets/DejaVuSans.ttf`, Bitstream Vera
//! licence, `assets/DejaVuSans-LICENSE.txt`), so a PNG looks the same on every
//! machine. SVG text names the same font with `sans-serif` as fallback.
//!
//! Conventions:
//! - sections are drawn in metres, x = chainage (m) to the right, z = elevation
//!   (m, up positive) upwards, at true scale (equal metres per pixel on both
//!   axes) unless a vertical exaggeration is asked for, which is then written on
//!   the figure;
//! - resistivity ρ (Ω·m) is coloured on a logarithmic scale with the perceptually
//!   uniform viridis map (van der Walt & Smith 2015, matplotlib);
//! - change in resistivity (%) uses a diverging red–blue map centred on 0 % with
//!   symmetric limits: **blue is a drop** (wetter ground, the sign of seepage),
//!   red is a rise (drier ground), near-white is no change;
//! - cells outside the sensitivity mask are faded towards white by a stated share;
//! - times are seconds since the Unix epoch, shown as UTC dates.
//!
//! Drawing is done with the `plotters` crate and colour maps come from
//! `colorous` (a port of d3-scale-chromatic).

mod colour;
mod health;
mod layout;
mod pseudo;
mod section;
mod ticks;
mod timeseries;

use std::sync::OnceLock;

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use thiserror::Error;

pub use colour::{ColourScale, DivergingScale, LinearScale, LogScale, Rgb, SequentialMap, fade};
pub use health::{ElectrodeHealth, HealthStrip, HealthStripParams};
pub use pseudo::{
    PseudoPosition, PseudoValues, PseudosectionFigure, PseudosectionParams, pseudo_position,
};
pub use section::{PlotArea, SectionFigure, SectionParams, SectionValues, Zone, outline_edges};
pub use ticks::{UtcDateTime, date_ticks, format_number, format_utc, linear_ticks, log_ticks};
pub use timeseries::{
    Axis, Marker, Sparkline, SparklineParams, Threshold, TimeChart, TimeChartParams, TimeSeries,
};

/// The embedded font (DejaVu Sans 2.37, Bitstream Vera licence).
static FONT_BYTES: &[u8] = include_bytes!("../../assets/DejaVuSans.ttf");

/// The name under which the embedded font is registered with `plotters`. It is
/// also written verbatim as the SVG `font-family`, hence the CSS fallback.
const FONT_FAMILY: &str = "DejaVu Sans, sans-serif";

/// Why a figure cannot be drawn.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum FigureError {
    /// Width or height outside 16..=8192 pixels.
    #[error("canvas of {width} × {height} px: each side must be 16 to 8192 px")]
    CanvasSize {
        /// Width asked for, px.
        width: u32,
        /// Height asked for, px.
        height: u32,
    },
    /// Font size outside 4..=200 px or not finite.
    #[error("font size {0} px: must be 4 to 200 px")]
    FontSize(f64),
    /// A list has the wrong length.
    #[error("{what}: expected {expected} values, got {got}")]
    Length {
        /// Which list.
        what: &'static str,
        /// Length required.
        expected: usize,
        /// Length given.
        got: usize,
    },
    /// A value cannot be shown (not finite, or not positive on a log scale).
    #[error("{what} {index}: value {value} cannot be shown ({reason})")]
    BadValue {
        /// Which list.
        what: &'static str,
        /// Position in the list.
        index: usize,
        /// The value.
        value: f64,
        /// Why not.
        reason: &'static str,
    },
    /// Colour or axis limits that do not form an increasing finite range.
    #[error("limits {lo} to {hi}: {reason}")]
    BadLimits {
        /// Lower limit.
        lo: f64,
        /// Upper limit.
        hi: f64,
        /// Why they are rejected.
        reason: &'static str,
    },
    /// A zone refers to a cell the grid does not have.
    #[error("zone {zone} ({label:?}): cell {cell} is not in the grid of {cells} cells")]
    ZoneCell {
        /// Zone position in the list.
        zone: usize,
        /// Zone label.
        label: String,
        /// The cell index.
        cell: usize,
        /// Cells in the grid.
        cells: usize,
    },
    /// A parameter outside its allowed range.
    #[error("{name} = {value}: {reason}")]
    Parameter {
        /// Parameter name.
        name: &'static str,
        /// Value given.
        value: f64,
        /// The allowed range.
        reason: &'static str,
    },
    /// Times of a series are not strictly increasing.
    #[error("series {series:?}: time {index} ({time} s) is not after the previous one")]
    TimeOrder {
        /// Series label.
        series: String,
        /// Position of the offending sample.
        index: usize,
        /// Its time, s since the Unix epoch.
        time: i64,
    },
    /// The sequence and the line disagree on the number of electrodes.
    #[error("the sequence is for {sequence} electrodes but the line has {line}")]
    LineMismatch {
        /// Electrodes the sequence expects.
        sequence: usize,
        /// Electrodes on the line.
        line: usize,
    },
    /// The drawing library failed (a bug, reported with its message).
    #[error("drawing failed: {0}")]
    Draw(String),
    /// PNG encoding failed.
    #[error("PNG encoding failed: {0}")]
    Png(String),
}

impl<E: std::error::Error + Send + Sync> From<DrawingAreaErrorKind<E>> for FigureError {
    fn from(e: DrawingAreaErrorKind<E>) -> Self {
        FigureError::Draw(e.to_string())
    }
}

/// The pixel size of a rendered figure and the size of its body text.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Canvas {
    width: u32,
    height: u32,
    font_px: f64,
}

impl Canvas {
    /// A canvas of `width` × `height` pixels (each 16..=8192) with body text of
    /// `font_px` pixels (4..=200; titles are 1.25× larger, tick labels 0.85×).
    pub fn new(width: u32, height: u32, font_px: f64) -> Result<Self, FigureError> {
        if !(16..=8192).contains(&width) || !(16..=8192).contains(&height) {
            return Err(FigureError::CanvasSize { width, height });
        }
        if !(4.0..=200.0).contains(&font_px) {
            return Err(FigureError::FontSize(font_px));
        }
        Ok(Self { width, height, font_px })
    }

    /// A canvas whose body text is 1/36 of the smaller side, clamped to 11–18 px
    /// (common practice, no source: legible on screens and in emails).
    pub fn with_default_font(width: u32, height: u32) -> Result<Self, FigureError> {
        let side = f64::from(width.min(height));
        Self::new(width, height, (side / 36.0).clamp(11.0, 18.0))
    }

    /// Width, px.
    pub fn width(&self) -> u32 {
        self.width
    }

    /// Height, px.
    pub fn height(&self) -> u32 {
        self.height
    }

    /// Body text size, px.
    pub fn font_px(&self) -> f64 {
        self.font_px
    }
}

mod sealed {
    use super::{Canvas, FigureError};
    use plotters::coord::Shift;
    use plotters::prelude::{DrawingArea, DrawingBackend};

    /// Draws a figure onto any plotters backend. `raster` is true for bitmaps,
    /// where touching polygons get a same-colour edge so no seams show.
    pub trait Draw {
        fn draw<DB: DrawingBackend>(
            &self,
            root: &DrawingArea<DB, Shift>,
            canvas: &Canvas,
            raster: bool,
        ) -> Result<(), FigureError>
        where
            DB::ErrorType: 'static;
    }
}

/// A figure that renders to SVG and PNG. Implemented by [`SectionFigure`],
/// [`PseudosectionFigure`], [`TimeChart`], [`Sparkline`] and [`HealthStrip`].
pub trait Figure: sealed::Draw {
    /// The figure as an SVG document (UTF-8 text), `canvas` pixels in size.
    fn svg(&self, canvas: &Canvas) -> Result<String, FigureError> {
        register_font()?;
        let mut out = String::new();
        {
            let root = SVGBackend::with_string(&mut out, (canvas.width, canvas.height))
                .into_drawing_area();
            root.fill(&WHITE)?;
            self.draw(&root, canvas, false)?;
            root.present()?;
        }
        Ok(out)
    }

    /// The figure as PNG bytes (8-bit RGB), `canvas` pixels in size.
    fn png(&self, canvas: &Canvas) -> Result<Vec<u8>, FigureError> {
        register_font()?;
        let (w, h) = (canvas.width, canvas.height);
        let mut rgb = vec![255u8; w as usize * h as usize * 3];
        {
            let root = BitMapBackend::with_buffer(&mut rgb, (w, h)).into_drawing_area();
            self.draw(&root, canvas, true)?;
            root.present()?;
        }
        encode_png(&rgb, w, h)
    }
}

impl<T: sealed::Draw> Figure for T {}

fn encode_png(rgb: &[u8], w: u32, h: u32) -> Result<Vec<u8>, FigureError> {
    let png_err = |e: png::EncodingError| FigureError::Png(e.to_string());
    let mut out = Vec::new();
    let mut enc = png::Encoder::new(&mut out, w, h);
    enc.set_color(png::ColorType::Rgb);
    enc.set_depth(png::BitDepth::Eight);
    enc.set_compression(png::Compression::Fast);
    let mut writer = enc.write_header().map_err(png_err)?;
    writer.write_image_data(rgb).map_err(png_err)?;
    writer.finish().map_err(png_err)?;
    Ok(out)
}

/// Registers the embedded font with plotters once per process (in memory).
fn register_font() -> Result<(), FigureError> {
    static DONE: OnceLock<bool> = OnceLock::new();
    let ok = *DONE.get_or_init(|| {
        plotters::style::register_font(FONT_FAMILY, FontStyle::Normal, FONT_BYTES).is_ok()
    });
    if ok { Ok(()) } else { Err(FigureError::Draw("the embedded font is not readable".into())) }
}

/// Text style in the embedded font with an em of about `px` pixels, black.
/// (plotters scales glyphs to 1/1.24 of its size in SVG and to the ascent +
/// descent in bitmaps; 1.2 × px gives an em close to `px` in both.)
fn font(px: f64) -> TextStyle<'static> {
    TextStyle::from((FONT_FAMILY, 1.2 * px).into_font()).color(&BLACK)
}

/// Draws the title (1.25× body size) and optional subtitle at the top of `area`
/// and returns the height used, px.
fn draw_titles<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    canvas: &Canvas,
    title: &str,
    subtitle: Option<&str>,
) -> Result<u32, FigureError>
where
    DB::ErrorType: 'static,
{
    let fp = canvas.font_px;
    let pad = (0.5 * fp).round() as i32;
    let mut y = pad;
    if !title.is_empty() {
        let style = font(1.25 * fp).pos(Pos::new(HPos::Left, VPos::Top));
        area.draw(&Text::new(title.to_string(), (pad * 2, y), style))?;
        y += (1.5 * fp).round() as i32;
    }
    if let Some(sub) = subtitle.filter(|s| !s.is_empty()) {
        let style = font(fp).color(&RGBColor(60, 60, 60)).pos(Pos::new(HPos::Left, VPos::Top));
        area.draw(&Text::new(sub.to_string(), (pad * 2, y), style))?;
        y += (1.3 * fp).round() as i32;
    }
    Ok(if y == pad { 0 } else { (y + pad / 2) as u32 })
}

/// Checks that every value is finite.
fn check_finite(what: &'static str, values: &[f64]) -> Result<(), FigureError> {
    match values.iter().position(|v| !v.is_finite()) {
        Some(index) => Err(FigureError::BadValue {
            what,
            index,
            value: values[index],
            reason: "not a finite number",
        }),
        None => Ok(()),
    }
}

#[cfg(test)]
pub(crate) mod testutil {
    //! PNG decoding and pixel look-ups for the figure tests.

    /// A decoded RGB image.
    pub struct Image {
        pub width: u32,
        pub height: u32,
        pub rgb: Vec<u8>,
    }

    impl Image {
        pub fn decode(bytes: &[u8]) -> Image {
            let decoder = png::Decoder::new(std::io::Cursor::new(bytes));
            let mut reader = decoder.read_info().expect("a PNG header");
            let mut buf = vec![0; reader.output_buffer_size().expect("buffer size")];
            let info = reader.next_frame(&mut buf).expect("a PNG frame");
            assert_eq!(info.color_type, png::ColorType::Rgb);
            buf.truncate(info.buffer_size());
            Image { width: info.width, height: info.height, rgb: buf }
        }

        pub fn at(&self, x: i32, y: i32) -> [u8; 3] {
            assert!(x >= 0 && y >= 0 && (x as u32) < self.width && (y as u32) < self.height);
            let i = (y as usize * self.width as usize + x as usize) * 3;
            [self.rgb[i], self.rgb[i + 1], self.rgb[i + 2]]
        }

        /// Number of distinct colours.
        pub fn colours(&self) -> usize {
            let mut set = std::collections::HashSet::new();
            for p in self.rgb.chunks(3) {
                set.insert([p[0], p[1], p[2]]);
            }
            set.len()
        }
    }

    /// Largest channel difference between two colours.
    pub fn diff(a: [u8; 3], b: [u8; 3]) -> u8 {
        (0..3).map(|i| a[i].abs_diff(b[i])).max().unwrap_or(0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn canvas_limits_are_checked() {
        assert_eq!(
            Canvas::new(8, 100, 12.0),
            Err(FigureError::CanvasSize { width: 8, height: 100 })
        );
        assert!(
            matches!(Canvas::new(100, 100, f64::NAN), Err(FigureError::FontSize(v)) if v.is_nan())
        );
        assert_eq!(Canvas::new(100, 100, 2.0), Err(FigureError::FontSize(2.0)));
        // 1/36 of 500 px ≈ 13.9 px; the clamp holds small and large canvases.
        assert!(
            (Canvas::with_default_font(1200, 500).unwrap().font_px() - 500.0 / 36.0).abs() < 1e-12
        );
        assert_eq!(Canvas::with_default_font(120, 30).unwrap().font_px(), 11.0);
        assert_eq!(Canvas::with_default_font(4000, 4000).unwrap().font_px(), 18.0);
    }

    #[test]
    fn the_embedded_font_registers() {
        assert_eq!(register_font(), Ok(()));
        assert!(FONT_BYTES.len() > 100_000, "the TTF is embedded whole");
    }
}
