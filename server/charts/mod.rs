//! One function per chart: an analysis result in, an SVG string out (plotters).
//! Sized for slides (16:9); colour is never the only cue: series also differ by marker.

pub mod balance;
pub mod coverage;
pub mod impact;
pub mod imputation;
pub mod map;
pub mod model;
pub mod plan;
pub mod projection;
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

/// The pixel size an SVG viewer draws text of nominal `size` at: plotters writes
/// `font-size` as the nominal size divided by 1.24.
pub fn drawn_size(size: u32) -> f64 {
    f64::from(size) / 1.24
}

/// Estimated width in pixels of `text` at nominal `size`: 0.62 em per character, a
/// little above the average advance of the common sans-serif faces (DejaVu Sans, Liberation
/// Sans, Arial: about 0.55 em for mixed text), so that estimates err on the wide side.
pub fn text_width(text: &str, size: u32) -> i32 {
    (text.chars().count() as f64 * 0.62 * drawn_size(size)).ceil() as i32
}

/// Estimated height in pixels of one line of text at nominal `size` (1.2 em).
pub fn text_height(size: u32) -> i32 {
    (1.2 * drawn_size(size)).ceil() as i32
}

/// Room for row labels left of a plot: the widest label plus a gap, at least `min`.
pub fn label_area(labels: &[String], size: u32, min: u32) -> u32 {
    let widest = labels
        .iter()
        .map(|l| text_width(l, size))
        .max()
        .unwrap_or(0);
    (widest.max(0) as u32 + 24).max(min)
}

/// Labels every row of a chart whose rows are drawn top-down from `labels` (row `i` at
/// y = n − 1 − i): right-aligned just left of the plotting area, centred on the row.
/// Plotters' own y labels pick "nice" tick positions and can skip rows; this never does.
pub fn draw_row_labels(
    root: &Area<'_>,
    chart: &Chart<'_, '_>,
    labels: &[String],
    size: u32,
) -> DrawResult {
    use plotters::style::text_anchor::{HPos, Pos, VPos};
    let n = labels.len();
    let x0 = chart.x_range().start;
    let style = TextStyle::from(font(size)).pos(Pos::new(HPos::Right, VPos::Center));
    for (i, label) in labels.iter().enumerate() {
        let (px, py) = chart.backend_coord(&(x0, (n - 1 - i) as f64));
        root.draw(&Text::new(label.clone(), (px - 10, py), style.clone()))?;
    }
    Ok(())
}

/// Labels the x axis at the given values only (waves that are years get ticks at the
/// waves, not at plotters' round numbers), centred under each.
pub fn draw_x_labels(
    root: &Area<'_>,
    chart: &Chart<'_, '_>,
    ticks: &[(f64, String)],
    size: u32,
) -> DrawResult {
    use plotters::style::text_anchor::{HPos, Pos, VPos};
    let y0 = chart.y_range().start;
    let style = TextStyle::from(font(size)).pos(Pos::new(HPos::Center, VPos::Top));
    for (x, label) in ticks {
        let (px, py) = chart.backend_coord(&(*x, y0));
        root.draw(&PathElement::new(
            vec![(px, py), (px, py + 6)],
            BLACK.stroke_width(1),
        ))?;
        root.draw(&Text::new(label.clone(), (px, py + 9), style.clone()))?;
    }
    Ok(())
}

/// How a legend entry's key is drawn.
#[derive(Debug, Clone, Copy)]
pub enum Glyph {
    /// Marker shape `i` of [`marker`] in a colour.
    Marker(usize, RGBColor),
    /// A line with marker `i` on it (series joined across waves).
    LineMarker(usize, RGBColor),
    /// A hollow circle (the "before" marks).
    Ring(RGBColor),
    /// A filled diamond.
    Diamond(RGBColor),
    /// A hollow diamond (countries in a plan).
    RingDiamond(RGBColor),
    /// A hollow triangle.
    HollowTriangle(RGBColor),
    /// A filled bar.
    Bar(RGBColor),
    /// A filled square.
    Square(RGBColor),
    /// A plain line.
    Line(RGBColor),
    /// A cross (countries without weight).
    Cross(RGBColor),
    /// An outlined square (outlined bars).
    OutlinedSquare(RGBColor),
}

/// One legend entry.
#[derive(Debug, Clone)]
pub struct Key {
    pub label: String,
    pub glyph: Glyph,
}

impl Key {
    pub fn new(label: impl Into<String>, glyph: Glyph) -> Key {
        Key {
            label: label.into(),
            glyph,
        }
    }
}

fn draw_glyph(area: &Area<'_>, glyph: Glyph, (x, y): (i32, i32)) -> DrawResult {
    match glyph {
        Glyph::Marker(i, c) => area.draw(&(EmptyElement::at((x, y)) + marker(i, c)))?,
        Glyph::LineMarker(i, c) => {
            area.draw(&PathElement::new(
                vec![(x - 12, y), (x + 12, y)],
                c.stroke_width(3),
            ))?;
            area.draw(&(EmptyElement::at((x, y)) + marker(i, c)))?;
        }
        Glyph::Ring(c) => area.draw(&Circle::new((x, y), 7, c.stroke_width(3)))?,
        Glyph::Diamond(c) => area.draw(&Polygon::new(
            vec![(x, y - 8), (x + 8, y), (x, y + 8), (x - 8, y)],
            c.filled(),
        ))?,
        Glyph::RingDiamond(c) => area.draw(&PathElement::new(
            vec![(x, y - 8), (x + 8, y), (x, y + 8), (x - 8, y), (x, y - 8)],
            c.stroke_width(3),
        ))?,
        Glyph::HollowTriangle(c) => {
            area.draw(&TriangleMarker::new((x, y), 8, c.stroke_width(2)))?
        }
        Glyph::Bar(c) => area.draw(&Rectangle::new(
            [(x - 10, y - 6), (x + 10, y + 6)],
            c.filled(),
        ))?,
        Glyph::Square(c) => area.draw(&Rectangle::new(
            [(x - 6, y - 6), (x + 6, y + 6)],
            c.filled(),
        ))?,
        Glyph::Line(c) => area.draw(&PathElement::new(
            vec![(x - 12, y), (x + 12, y)],
            c.stroke_width(3),
        ))?,
        Glyph::Cross(c) => area.draw(&Cross::new((x, y), 5, c.stroke_width(2)))?,
        Glyph::OutlinedSquare(c) => area.draw(&Rectangle::new(
            [(x - 6, y - 6), (x + 6, y + 6)],
            ShapeStyle::from(c).stroke_width(3),
        ))?,
    }
    Ok(())
}

/// Nominal size of legend text.
pub const LEGEND_FONT: u32 = 17;
const LEGEND_ROW: i32 = 28;
const KEY_ROOM: i32 = 34;
const KEY_GAP: i32 = 28;

/// The legend's entries laid out left to right in rows no wider than `width`:
/// (row, x of the key's centre) per entry.
fn legend_layout(keys: &[Key], width: i32) -> Vec<(i32, i32)> {
    let mut placed = Vec::with_capacity(keys.len());
    let (mut row, mut x) = (0, 16);
    for k in keys {
        let w = KEY_ROOM + text_width(&k.label, LEGEND_FONT);
        if x > 16 && x + w > width - 16 {
            row += 1;
            x = 16;
        }
        placed.push((row, x + 12));
        x += w + KEY_GAP;
    }
    placed
}

/// Nominal size of chart titles.
pub const TITLE_FONT: u32 = 26;

/// Draws the title and, under it, the legend (never over the data), and returns the area
/// left for the chart. Use with a chart built without a caption.
pub fn headed<'b>(
    root: &Area<'b>,
    title: &str,
    keys: &[Key],
) -> Result<Area<'b>, Box<dyn std::error::Error>> {
    use plotters::style::text_anchor::{HPos, Pos, VPos};
    let width = root.dim_in_pixel().0 as i32;
    let layout = legend_layout(keys, width);
    let rows = layout.last().map_or(0, |l| l.0 + 1);
    let title_h = text_height(TITLE_FONT) + 16;
    let head = title_h + rows * LEGEND_ROW + if rows > 0 { 8 } else { 0 };
    let (top, body) = root.split_vertically(head.max(0) as u32);
    top.draw(&Text::new(
        title.to_string(),
        (width / 2, 10),
        TextStyle::from(font(TITLE_FONT)).pos(Pos::new(HPos::Center, VPos::Top)),
    ))?;
    let text = TextStyle::from(font(LEGEND_FONT)).pos(Pos::new(HPos::Left, VPos::Center));
    for (k, (row, x)) in keys.iter().zip(layout) {
        let y = title_h + row * LEGEND_ROW + LEGEND_ROW / 2;
        draw_glyph(&top, k.glyph, (x, y))?;
        top.draw(&Text::new(k.label.clone(), (x + 20, y), text.clone()))?;
    }
    Ok(body)
}

/// The builder of a chart in the area `headed` leaves: the margins every slide chart
/// shares (16 px, 4 px under the legend, `right` px on the right for the last tick label),
/// `x_area` px for the x axis labels and `y_area` px for the y axis labels.
pub fn body_chart<'a, 'b, 'c>(
    body: &'a Area<'c>,
    right: u32,
    x_area: u32,
    y_area: u32,
) -> ChartBuilder<'a, 'b, SVGBackend<'c>> {
    let mut builder = ChartBuilder::on(body);
    builder
        .margin(16)
        .margin_top(4)
        .margin_right(right)
        .x_label_area_size(x_area)
        .y_label_area_size(y_area);
    builder
}

/// The axes of a map on the first two principal components: no grid, each axis named
/// with the share of variance (in percent) its component explains.
pub fn component_axes(
    chart: &mut Chart<'_, '_>,
    share_1: f64,
    share_2: f64,
    label_font: u32,
) -> DrawResult {
    chart
        .configure_mesh()
        .light_line_style(WHITE.mix(0.0))
        .x_desc(format!("Component 1 ({share_1:.0}% of variance)"))
        .y_desc(format!("Component 2 ({share_2:.0}% of variance)"))
        .x_label_formatter(&|x| tick(*x, 1))
        .y_label_formatter(&|y| tick(*y, 1))
        .label_style(font(label_font))
        .axis_desc_style(font(label_font))
        .draw()?;
    Ok(())
}

/// A box in pixels: left, top, right, bottom.
pub type PixelBox = (i32, i32, i32, i32);

/// Whether two boxes overlap (touching edges do not).
pub fn overlaps(a: PixelBox, b: PixelBox) -> bool {
    a.0 < b.2 && b.0 < a.2 && a.1 < b.3 && b.1 < a.3
}

/// Places point labels so that no two collide and none leaves `bounds`: each label tries
/// eight spots around its point (right, left, above, below, then the corners), takes the
/// first free one that covers the fewest other points, and is dropped when none is free.
/// `points` are pixel positions; `wanted` lists (point index, text, gap between the
/// point and its label: larger for larger marks) in order of priority. Returns the
/// top-left corner of each placed label, by the order of `wanted`.
pub fn place_labels(
    points: &[(i32, i32)],
    wanted: &[(usize, String, i32)],
    size: u32,
    bounds: PixelBox,
) -> Vec<Option<(i32, i32)>> {
    let h = text_height(size);
    let mut placed: Vec<PixelBox> = Vec::new();
    wanted
        .iter()
        .map(|(i, text, gap)| {
            let (x, y) = *points.get(*i)?;
            let gap = *gap;
            let w = text_width(text, size);
            let spots = [
                (x + gap, y - h / 2),
                (x - gap - w, y - h / 2),
                (x - w / 2, y - gap - h),
                (x - w / 2, y + gap),
                (x + gap - 2, y - gap - h + 2),
                (x + gap - 2, y + gap - 2),
                (x - gap - w + 2, y - gap - h + 2),
                (x - gap - w + 2, y + gap - 2),
            ];
            let best = spots
                .iter()
                .map(|&(l, t)| (l, t, l + w, t + h))
                .filter(|b| {
                    b.0 >= bounds.0 && b.1 >= bounds.1 && b.2 <= bounds.2 && b.3 <= bounds.3
                })
                .filter(|b| !placed.iter().any(|p| overlaps(*p, *b)))
                .min_by_key(|b| {
                    points
                        .iter()
                        .filter(|&&(px, py)| overlaps(*b, (px - 7, py - 7, px + 7, py + 7)))
                        .count()
                })?;
            placed.push(best);
            Some((best.0, best.1))
        })
        .collect()
}

/// Adds a hover title (`<title>`, no script) to each point: an invisible circle of
/// radius 9 per point, appended to the SVG so that it lies on top of the marks.
pub fn with_hover_titles(svg: String, points: &[((i32, i32), String)]) -> String {
    let Some(end) = svg.rfind("</svg>") else {
        return svg;
    };
    let mut out = String::with_capacity(svg.len() + points.len() * 80);
    out.push_str(&svg[..end]);
    out.push_str(r#"<g class="hover" fill="transparent">"#);
    for ((x, y), title) in points {
        out.push_str(&format!(
            r#"<circle cx="{x}" cy="{y}" r="9"><title>{}</title></circle>"#,
            escape(title)
        ));
    }
    out.push_str("</g>");
    out.push_str(&svg[end..]);
    out
}
