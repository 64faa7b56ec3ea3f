//! One function per chart: an analysis result in, an SVG string out (plotters).
//! Sized for slides (16:9); colour is never the only cue: series also differ by marker.

pub mod balance;
pub mod coverage;
pub mod impact;
pub mod map;
pub mod model;
pub mod plan;
pub mod sensitivity;

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
