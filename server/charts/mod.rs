//! One function per chart: an analysis result in, an SVG string out (plotters).
//! Sized for slides (16:9); colour is never the only cue: series also differ by marker.

pub mod balance;
pub mod coverage;
pub mod impact;
pub mod map;
pub mod model;
pub mod plan;
pub mod selection_bounds;
pub mod sensitivity;

use plotters::coord::types::RangedCoordf64;
use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::{FontDesc, FontFamily, FontStyle, RGBColor};

/// Chart size in pixels, 16:9 for slides.
pub const SLIDE: (u32, u32) = (960, 540);

/// Our palette: six hues that stay distinct under the common colour-vision deficiencies
/// (they differ in lightness as well as hue), chosen for this project.
pub const PALETTE: [RGBColor; 8] = [
    RGBColor(0x1B, 0x6F, 0x7A), // deep teal
    RGBColor(0xD9, 0x8E, 0x04), // amber
    RGBColor(0x7B, 0x3F, 0x8C), // plum
    RGBColor(0x5A, 0xA9, 0xE6), // sky
    RGBColor(0xB5, 0x47, 0x3A), // brick
    RGBColor(0x4A, 0x4A, 0x4A), // graphite
    RGBColor(0x6E, 0x8B, 0x1F), // moss
    RGBColor(0xC2, 0x5E, 0x9A), // orchid
];

/// Neutral grey for "before" and "absent" marks.
pub const GREY: RGBColor = RGBColor(0x7A, 0x7A, 0x7A);

/// Sans-serif text of the given pixel size.
pub fn font(size: u32) -> FontDesc<'static> {
    FontDesc::new(FontFamily::SansSerif, f64::from(size), FontStyle::Normal)
}

/// Colour of series `i` (cycling).
pub fn colour(i: usize) -> RGBColor {
    PALETTE[i % PALETTE.len()]
}

/// A chart that could not be drawn becomes a short SVG saying so, never an empty box.
pub fn failed_chart(title: &str, reason: &str) -> String {
    let (w, h) = SLIDE;
    format!(
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" role="img"><title>{title}</title><text x="24" y="48" font-family="sans-serif" font-size="22">{title}</text><text x="24" y="90" font-family="sans-serif" font-size="18">{reason}</text></svg>"#,
        title = escape(title),
        reason = escape(reason)
    )
}

fn escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

/// An axis tick label with `decimals` decimals and no negative zero.
pub fn tick(x: f64, decimals: usize) -> String {
    let s = format!("{x:.decimals$}");
    if s.trim_start_matches('-')
        .chars()
        .all(|c| c == '0' || c == '.')
    {
        s.trim_start_matches('-').to_string()
    } else {
        s
    }
}

/// What a drawing step returns.
pub type DrawResult = Result<(), Box<dyn std::error::Error>>;

/// The canvas every chart draws on.
pub type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;

/// A chart on plain numeric axes.
pub type Chart<'a, 'b> =
    ChartContext<'a, SVGBackend<'b>, Cartesian2d<RangedCoordf64, RangedCoordf64>>;

/// Draws on a white SVG canvas of `size`; if drawing fails, the chart says so instead of
/// coming out empty.
pub fn render(title: &str, size: (u32, u32), draw: impl FnOnce(&Area<'_>) -> DrawResult) -> String {
    let mut svg = String::new();
    let result: DrawResult = {
        let root = SVGBackend::with_string(&mut svg, size).into_drawing_area();
        root.fill(&WHITE)
            .map_err(Into::into)
            .and_then(|()| draw(&root))
            .and_then(|()| root.present().map_err(Into::into))
    };
    match result {
        Ok(()) => svg,
        Err(e) => failed_chart(title, &format!("The chart could not be drawn: {e}")),
    }
}

/// Our legend: a light box with a thin border.
pub fn legend<'a, 'b: 'a>(
    chart: &mut Chart<'a, 'b>,
    position: SeriesLabelPosition,
    size: u32,
) -> DrawResult {
    chart
        .configure_series_labels()
        .position(position)
        .label_font(font(size))
        .background_style(WHITE.mix(0.9))
        .border_style(BLACK.mix(0.3))
        .draw()?;
    Ok(())
}

/// The label of row `y` of a chart whose rows are drawn top-down from `labels`.
pub fn row_label(labels: &[String], y: f64) -> String {
    let n = labels.len();
    let i = y.round();
    if (y - i).abs() < 1e-6 && i >= 0.0 && (i as usize) < n {
        labels[n - 1 - i as usize].clone()
    } else {
        String::new()
    }
}

/// Marker shape `i`: circle, triangle, square, cross, diamond, then hollow circle, square
/// and triangle.
pub fn marker<DB: DrawingBackend>(i: usize, c: RGBColor) -> DynElement<'static, DB, (i32, i32)> {
    let filled = ShapeStyle::from(c).filled();
    let stroke = ShapeStyle::from(c).stroke_width(3);
    match i % 8 {
        0 => Circle::new((0, 0), 7, filled).into_dyn(),
        1 => TriangleMarker::new((0, 0), 9, filled).into_dyn(),
        2 => Rectangle::new([(-6, -6), (6, 6)], filled).into_dyn(),
        3 => Cross::new((0, 0), 7, stroke).into_dyn(),
        4 => Polygon::new(vec![(0, -9), (8, 0), (0, 9), (-8, 0)], filled).into_dyn(),
        5 => Circle::new((0, 0), 7, stroke).into_dyn(),
        6 => Rectangle::new([(-6, -6), (6, 6)], stroke).into_dyn(),
        _ => TriangleMarker::new((0, 0), 9, stroke).into_dyn(),
    }
}
