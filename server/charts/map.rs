//! Charts of the coverage page: the map of countries on the first two principal
//! components, and each indicator's spread among participants against the universe.

use plotters::prelude::*;

use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::{
    colour, draw_row_labels, failed_chart, font, headed, label_area, place_labels, render,
    with_hover_titles, Glyph, Key, GREY, SLIDE,
};
use crate::analysis::coverage::MapPoint;

/// Nominal size of axis and row labels.
const LABEL_FONT: u32 = 18;
/// Nominal size of the country codes on the map.
pub const MAP_LABEL_FONT: u32 = 17;
use crate::analysis::coverage::CoverageReport;

/// Countries on the first two components: participants as filled teal circles, absent
/// eligible countries as hollow amber triangles (shape and colour both differ), the
/// countries farthest from the centre labelled with their codes.
pub fn component_map(c: &CoverageReport) -> String {
    component_map_marked(c, &[], &[])
}

/// The same map with the plan's recruits ringed (plum diamonds) and hypothetical joiners
/// drawn as if they took part (plum squares).
pub fn component_map_marked(c: &CoverageReport, planned: &[String], joiners: &[String]) -> String {
    map_with(c, planned, joiners, &[])
}

/// The map of a completed frame (multiple imputation) with the countries whose
/// indicators were filled crossed (black ×), so that their positions are read as
/// partly filled in.
pub fn component_map_imputed(c: &CoverageReport, imputed: &[String]) -> String {
    map_with(c, &[], &[], imputed)
}

/// The report's map: the plan's recruits and joiners as in [`component_map_marked`], and
/// under multiple imputation the countries with filled values crossed as in
/// [`component_map_imputed`].
pub fn component_map_marked_imputed(
    c: &CoverageReport,
    planned: &[String],
    joiners: &[String],
    imputed: &[String],
) -> String {
    map_with(c, planned, joiners, imputed)
}

fn map_with(
    c: &CoverageReport,
    planned: &[String],
    joiners: &[String],
    imputed: &[String],
) -> String {
    const TITLE: &str =
        "Which kinds of countries are missing: the eligible universe on two components";
    if let Some(e) = &c.map_error {
        return failed_chart(TITLE, e);
    }
    let mut hover: Vec<((i32, i32), String)> = Vec::new();
    let svg = render(TITLE, SLIDE, |root| {
        let span = |f: &dyn Fn(&MapPoint) -> f64| {
            let (lo, hi) = c
                .points
                .iter()
                .map(f)
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| {
                    (l.min(v), h.max(v))
                });
            let pad = 0.08 * (hi - lo).max(1e-9);
            (lo - pad)..(hi + pad)
        };
        let (took, absent, plum) = (colour(0), colour(1), colour(2));
        let mut keys = vec![
            Key::new("Took part", Glyph::Marker(0, took)),
            Key::new("Eligible, did not take part", Glyph::HollowTriangle(absent)),
        ];
        if !planned.is_empty() {
            keys.push(Key::new(
                "In the recruitment plan",
                Glyph::RingDiamond(plum),
            ));
        }
        if !joiners.is_empty() {
            keys.push(Key::new("What if it joined", Glyph::Square(plum)));
        }
        if !imputed.is_empty() {
            keys.push(Key::new("Has filled (imputed) values", Glyph::Cross(BLACK)));
        }
        let body = headed(
            root,
            "Eligible countries on the first two components",
            &keys,
        )?;
        let mut chart = super::body_chart(&body, 24, 56, 76)
            .build_cartesian_2d(span(&|p| p.pc1), span(&|p| p.pc2))?;
        let share = |k: usize| c.components.get(k).map_or(0.0, |x| 100.0 * x.explained);
        super::component_axes(&mut chart, share(0), share(1), LABEL_FONT)?;
        chart.draw_series(
            c.points
                .iter()
                .filter(|p| !p.participated)
                .map(|p| TriangleMarker::new((p.pc1, p.pc2), 8, absent.stroke_width(2))),
        )?;
        chart.draw_series(
            c.points
                .iter()
                .filter(|p| p.participated)
                .map(|p| Circle::new((p.pc1, p.pc2), 6, took.filled())),
        )?;
        chart.draw_series(
            c.points
                .iter()
                .filter(|p| planned.contains(&p.id))
                .map(|p| {
                    EmptyElement::at((p.pc1, p.pc2))
                        + PathElement::new(
                            vec![(0, -13), (13, 0), (0, 13), (-13, 0), (0, -13)],
                            plum.stroke_width(3),
                        )
                }),
        )?;
        chart.draw_series(
            c.points
                .iter()
                .filter(|p| joiners.contains(&p.id))
                .map(|p| {
                    EmptyElement::at((p.pc1, p.pc2))
                        + Rectangle::new([(-7, -7), (7, 7)], plum.filled())
                }),
        )?;
        chart.draw_series(
            c.points
                .iter()
                .filter(|p| imputed.contains(&p.id))
                .map(|p| Cross::new((p.pc1, p.pc2), 5, BLACK.stroke_width(2))),
        )?;
        // Labels: the plan's countries first, then the countries farthest from the centre,
        // each where it collides with no other label; the rest name themselves on hover.
        let pixels: Vec<(i32, i32)> = c
            .points
            .iter()
            .map(|p| chart.backend_coord(&(p.pc1, p.pc2)))
            .collect();
        let mut wanted: Vec<(usize, String, i32)> = Vec::new();
        for pass in 0..2 {
            for (i, p) in c.points.iter().enumerate() {
                let marked = planned.contains(&p.id) || joiners.contains(&p.id);
                if pass == 0 && marked {
                    wanted.push((i, p.id.clone(), 15));
                } else if pass == 1 && !marked && p.outlier {
                    wanted.push((i, p.id.clone(), 9));
                }
            }
        }
        let (x_px, y_px) = chart.plotting_area().get_pixel_range();
        let bounds = (x_px.start, y_px.start, x_px.end, y_px.end);
        let spots = place_labels(&pixels, &wanted, MAP_LABEL_FONT, bounds);
        let style = TextStyle::from(font(MAP_LABEL_FONT)).pos(Pos::new(HPos::Left, VPos::Top));
        for ((_, text, _), spot) in wanted.iter().zip(spots) {
            if let Some(at) = spot {
                root.draw(&Text::new(text.clone(), at, style.clone()))?;
            }
        }
        hover = c
            .points
            .iter()
            .zip(&pixels)
            .map(|(p, &px)| {
                let status = if joiners.contains(&p.id) {
                    "what if it joined"
                } else if planned.contains(&p.id) {
                    "in the recruitment plan"
                } else if p.participated {
                    "took part"
                } else {
                    "eligible, did not take part"
                };
                let filled = if imputed.contains(&p.id) {
                    "; has filled values"
                } else {
                    ""
                };
                (px, format!("{} ({}): {status}{filled}", p.name, p.id))
            })
            .collect();
        Ok(())
    });
    with_hover_titles(svg, &hover)
}

/// Per indicator, on the universe's standardised scale: the universe's interquartile range
/// (grey bar) and the participants' (teal bar), medians as ticks, ranges as whiskers.
pub fn spreads(c: &CoverageReport) -> String {
    const TITLE: &str = "Indicators among participants and in the eligible universe";
    if c.distributions.is_empty() {
        return failed_chart(TITLE, "No numeric indicators.");
    }
    let height = (170 + 64 * c.distributions.len() as u32).max(SLIDE.1);
    render(TITLE, (SLIDE.0, height), |root| {
        let n = c.distributions.len();
        let z = |d: &crate::analysis::coverage::Distribution, v: f64| {
            if d.sd > 0.0 {
                (v - d.mean) / d.sd
            } else {
                0.0
            }
        };
        let extent = c
            .distributions
            .iter()
            .flat_map(|d| [z(d, d.universe.min), z(d, d.universe.max)])
            .fold(2.0f64, |m, v| m.max(v.abs() * 1.05));
        let labels: Vec<String> = c.distributions.iter().map(|d| d.label.clone()).collect();
        let (u_colour, p_colour) = (GREY, colour(0));
        let keys = [
            Key::new("Eligible universe (upper bar)", Glyph::Bar(u_colour)),
            Key::new("Participants (lower bar)", Glyph::Bar(p_colour)),
        ];
        let body = headed(root, TITLE, &keys)?;
        let mut chart = super::body_chart(&body, 28, 56, label_area(&labels, LABEL_FONT, 160))
            .build_cartesian_2d(-extent..extent, -0.5..(n as f64 - 0.5))?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .disable_y_mesh()
            .y_labels(0)
            .x_desc("Standard deviations from the eligible universe's mean")
            .label_style(font(LABEL_FONT))
            .axis_desc_style(font(LABEL_FONT))
            .draw()?;
        draw_row_labels(root, &chart, &labels, LABEL_FONT)?;
        for (i, d) in c.distributions.iter().enumerate() {
            let y = (n - 1 - i) as f64;
            for (offset, s, col) in [
                (0.17, &d.universe, u_colour),
                (-0.17, &d.participants, p_colour),
            ] {
                let yy = y + offset;
                chart.draw_series(std::iter::once(PathElement::new(
                    vec![(z(d, s.min), yy), (z(d, s.max), yy)],
                    col.stroke_width(2),
                )))?;
                chart.draw_series(std::iter::once(Rectangle::new(
                    [(z(d, s.q1), yy - 0.12), (z(d, s.q3), yy + 0.12)],
                    col.mix(0.8).filled(),
                )))?;
                chart.draw_series(std::iter::once(PathElement::new(
                    vec![(z(d, s.median), yy - 0.16), (z(d, s.median), yy + 0.16)],
                    BLACK.stroke_width(3),
                )))?;
            }
        }
        Ok(())
    })
}
