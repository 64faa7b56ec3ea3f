//! The projection's chart: the countries' predicted means on the map of the first two
//! principal components of the indicators.

use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::{
    colour, failed_chart, font, headed, place_labels, render, with_hover_titles, Glyph, Key, SLIDE,
};
use crate::analysis::projection::{ProjectedCountry, ProjectionReport};

/// Nominal size of axis labels.
const LABEL_FONT: u32 = 18;
/// Nominal size of the country labels.
const POINT_FONT: u32 = 16;
/// How many countries get a label (flagged ones first).
const LABELLED: usize = 12;

/// A country on the map: the country, its two components and its prediction.
type Shown<'a> = (&'a ProjectedCountry, f64, f64, f64);

const LIGHT: RGBColor = RGBColor(0xE4, 0xF1, 0xF3);
const DARK: RGBColor = RGBColor(0x0B, 0x3C, 0x44);

/// A colour on the light-to-dark ramp at `t` in [0, 1].
fn ramp(t: f64) -> RGBColor {
    let t = if t.is_finite() {
        t.clamp(0.0, 1.0)
    } else {
        0.5
    };
    let mix = |a: u8, b: u8| (f64::from(a) + t * (f64::from(b) - f64::from(a))).round() as u8;
    RGBColor(
        mix(LIGHT.0, DARK.0),
        mix(LIGHT.1, DARK.1),
        mix(LIGHT.2, DARK.2),
    )
}

/// Eligible countries on the first two components, shaded by their predicted mean outcome
/// (darker is higher; the legend gives the ends): participants as circles, absent countries
/// (projected) as diamonds, those outside the participants' support ringed in brick. The
/// flagged countries and the most extreme predictions are labelled where a label fits;
/// every point names itself on hover.
pub fn component_map(r: &ProjectionReport) -> String {
    let title = format!(
        "Projected {} on the map of the eligible universe",
        r.outcome_label
    );
    if let Some(e) = &r.map_error {
        return failed_chart(&title, e);
    }
    let shown: Vec<Shown> = r
        .countries
        .iter()
        .filter_map(|c| Some((c, c.pc1?, c.pc2?, c.prediction?)))
        .collect();
    if shown.is_empty() {
        return failed_chart(
            &title,
            "No country has a projection and a place on the map.",
        );
    }
    let (lo, hi) = shown
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), s| {
            (l.min(s.3), h.max(s.3))
        });
    let shade = |v: f64| {
        if hi > lo {
            ramp((v - lo) / (hi - lo))
        } else {
            ramp(0.5)
        }
    };
    let digits = if r.fit.kind == "logistic" { 3 } else { 2 };
    let mut hover: Vec<((i32, i32), String)> = Vec::new();
    let svg = render(&title, SLIDE, |root| {
        let span = |f: &dyn Fn(&Shown) -> f64| {
            let (l, h) = shown
                .iter()
                .map(f)
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| {
                    (l.min(v), h.max(v))
                });
            let pad = 0.08 * (h - l).max(1e-9);
            (l - pad)..(h + pad)
        };
        let ring = colour(4);
        let mut keys = vec![
            Key::new("Took part", Glyph::Marker(0, ramp(0.6))),
            Key::new("Did not take part (projected)", Glyph::Diamond(ramp(0.6))),
        ];
        if shown.iter().any(|s| s.0.flagged()) {
            keys.push(Key::new(
                "Outside the participants' support",
                Glyph::Ring(ring),
            ));
        }
        keys.push(Key::new(
            format!("Lightest {}", super::tick(lo, digits)),
            Glyph::Square(ramp(0.0)),
        ));
        keys.push(Key::new(
            format!("Darkest {}", super::tick(hi, digits)),
            Glyph::Square(ramp(1.0)),
        ));
        let body = headed(root, &title, &keys)?;
        let mut chart = super::body_chart(&body, 24, 56, 76)
            .build_cartesian_2d(span(&|s| s.1), span(&|s| s.2))?;
        let share = |k: usize| r.map_explained.get(k).map_or(0.0, |x| 100.0 * x);
        super::component_axes(&mut chart, share(0), share(1), LABEL_FONT)?;
        let outline = BLACK.mix(0.6).stroke_width(1);
        for &(c, x, y, v) in &shown {
            let fill = shade(v).filled();
            if c.participated {
                chart.draw_series(std::iter::once(Circle::new((x, y), 7, fill)))?;
                chart.draw_series(std::iter::once(Circle::new((x, y), 7, outline)))?;
            } else {
                let diamond = vec![(0, -9), (9, 0), (0, 9), (-9, 0)];
                chart.draw_series(std::iter::once(
                    EmptyElement::at((x, y)) + Polygon::new(diamond.clone(), fill),
                ))?;
                let mut closed = diamond;
                closed.push((0, -9));
                chart.draw_series(std::iter::once(
                    EmptyElement::at((x, y)) + PathElement::new(closed, outline),
                ))?;
            }
            if c.flagged() {
                chart.draw_series(std::iter::once(Circle::new(
                    (x, y),
                    14,
                    ring.stroke_width(3),
                )))?;
            }
        }
        let pixels: Vec<(i32, i32)> = shown
            .iter()
            .map(|s| chart.backend_coord(&(s.1, s.2)))
            .collect();
        // Labels: flagged countries, then the highest and lowest predictions.
        let mut order: Vec<usize> = (0..shown.len()).collect();
        order.sort_by(|&a, &b| {
            shown[b].0.flagged().cmp(&shown[a].0.flagged()).then(
                (shown[b].3 - (lo + hi) / 2.0)
                    .abs()
                    .total_cmp(&(shown[a].3 - (lo + hi) / 2.0).abs()),
            )
        });
        let wanted: Vec<(usize, String, i32)> = order
            .into_iter()
            .take(LABELLED)
            .map(|i| {
                let gap = if shown[i].0.flagged() { 16 } else { 10 };
                (
                    i,
                    format!("{} {}", shown[i].0.code, super::tick(shown[i].3, digits)),
                    gap,
                )
            })
            .collect();
        let (x_px, y_px) = chart.plotting_area().get_pixel_range();
        let bounds = (x_px.start, y_px.start, x_px.end, y_px.end);
        let spots = place_labels(&pixels, &wanted, POINT_FONT, bounds);
        let style = TextStyle::from(font(POINT_FONT)).pos(Pos::new(HPos::Left, VPos::Top));
        for ((_, text, _), spot) in wanted.iter().zip(spots) {
            if let Some(at) = spot {
                root.draw(&Text::new(text.clone(), at, style.clone()))?;
            }
        }
        hover = shown
            .iter()
            .zip(&pixels)
            .map(|(s, &px)| {
                let c = s.0;
                let status = if c.participated {
                    "took part"
                } else if c.flagged() {
                    "did not take part, projected outside the participants' support"
                } else {
                    "did not take part, projected"
                };
                let interval = match (c.low, c.high) {
                    (Some(l), Some(h)) => format!(
                        " (95% {} to {})",
                        super::tick(l, digits + 1),
                        super::tick(h, digits + 1)
                    ),
                    _ => String::new(),
                };
                (
                    px,
                    format!(
                        "{} ({}): {status}; predicted {} {}{interval}",
                        c.name,
                        c.code,
                        r.outcome_label,
                        super::tick(s.3, digits + 1)
                    ),
                )
            })
            .collect();
        Ok(())
    });
    with_hover_titles(svg, &hover)
}
