//! Charts of the participation model: propensity against weight, and the overlap of the
//! propensity distributions.

use plotters::prelude::*;

use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::{colour, font, headed, place_labels, render, Glyph, Key, GREY, SLIDE};

/// Nominal size of axis labels.
const LABEL_FONT: u32 = 18;
use crate::analysis::participation::FitReport;

/// Each country's estimated probability of taking part against its weight: participants
/// as filled circles (the ten heaviest labelled), non-participants as grey crosses on the
/// zero line (they carry no weight).
pub fn propensity_vs_weight(r: &FitReport) -> String {
    const TITLE: &str = "Estimated participation probability and weight";
    render(TITLE, SLIDE, |root| {
        let max_weight = r.units.iter().map(|u| u.weight).fold(1.0f64, f64::max) * 1.12;
        let mut heaviest: Vec<&crate::analysis::participation::UnitReport> =
            r.units.iter().filter(|u| u.participated).collect();
        heaviest.sort_by(|a, b| b.weight.total_cmp(&a.weight));
        let labelled: Vec<&str> = heaviest.iter().take(10).map(|u| u.id.as_str()).collect();
        let c = colour(0);
        let keys = [
            Key::new("Took part", Glyph::Marker(0, c)),
            Key::new("Did not take part (no weight)", Glyph::Cross(GREY)),
        ];
        let body = headed(root, TITLE, &keys)?;
        let mut chart = super::body_chart(&body, 28, 56, 76)
            .build_cartesian_2d(0.0..1.0, -0.04 * max_weight..max_weight)?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .x_desc("Estimated probability of taking part")
            .y_desc(format!("Weight ({} weighting)", r.weighting.kind.as_str()))
            .label_style(font(LABEL_FONT))
            .axis_desc_style(font(LABEL_FONT))
            .draw()?;
        chart.draw_series(
            r.units
                .iter()
                .filter(|u| !u.participated)
                .map(|u| Cross::new((u.propensity, 0.0), 5, GREY.stroke_width(2))),
        )?;
        chart.draw_series(
            r.units
                .iter()
                .filter(|u| u.participated)
                .map(|u| Circle::new((u.propensity, u.weight), 6, c.filled())),
        )?;
        // The heaviest participants named where their labels do not collide.
        let pixels: Vec<(i32, i32)> = r
            .units
            .iter()
            .map(|u| {
                chart.backend_coord(&(u.propensity, if u.participated { u.weight } else { 0.0 }))
            })
            .collect();
        let wanted: Vec<(usize, String, i32)> = labelled
            .iter()
            .filter_map(|id| {
                r.units
                    .iter()
                    .position(|u| u.id == *id)
                    .map(|i| (i, id.to_string(), 9))
            })
            .collect();
        let (x_px, y_px) = chart.plotting_area().get_pixel_range();
        let spots = place_labels(
            &pixels,
            &wanted,
            16,
            (x_px.start, y_px.start, x_px.end, y_px.end),
        );
        let style = TextStyle::from(font(16)).pos(Pos::new(HPos::Left, VPos::Top));
        for ((_, text, _), spot) in wanted.iter().zip(spots) {
            if let Some(at) = spot {
                root.draw(&Text::new(text.clone(), at, style.clone()))?;
            }
        }
        Ok(())
    })
}

/// Mirrored histograms of the estimated probability: participants above the axis,
/// non-participants below. Little overlap means some kinds of countries have no
/// counterpart among participants.
pub fn overlap(r: &FitReport) -> String {
    const TITLE: &str = "Overlap of participation probabilities";
    const BINS: usize = 20;
    render(TITLE, SLIDE, |root| {
        let mut up = [0usize; BINS];
        let mut down = [0usize; BINS];
        for u in &r.units {
            let b = ((u.propensity * BINS as f64) as usize).min(BINS - 1);
            if u.participated {
                up[b] += 1;
            } else {
                down[b] += 1;
            }
        }
        let top = up.iter().chain(&down).copied().max().unwrap_or(1).max(1) as f64 * 1.08;
        let (c_up, c_down) = (colour(0), colour(1));
        let keys = [
            Key::new("Took part", Glyph::Square(c_up)),
            Key::new(
                "Did not take part (outlined)",
                Glyph::OutlinedSquare(c_down),
            ),
        ];
        let body = headed(root, TITLE, &keys)?;
        let mut chart =
            super::body_chart(&body, 28, 56, 76).build_cartesian_2d(0.0..1.0, -top..top)?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .x_desc("Estimated probability of taking part")
            .y_desc("Countries (took part above, absent below)")
            .y_label_formatter(&|y| format!("{:.0}", y.abs()))
            .label_style(font(LABEL_FONT))
            .axis_desc_style(font(LABEL_FONT))
            .draw()?;
        let width = 1.0 / BINS as f64;
        chart.draw_series(
            up.iter()
                .enumerate()
                .filter(|(_, &k)| k > 0)
                .map(|(b, &k)| {
                    Rectangle::new(
                        [
                            (b as f64 * width + 0.002, 0.0),
                            ((b + 1) as f64 * width - 0.002, k as f64),
                        ],
                        c_up.filled(),
                    )
                }),
        )?;
        chart.draw_series(
            down.iter()
                .enumerate()
                .filter(|(_, &k)| k > 0)
                .map(|(b, &k)| {
                    Rectangle::new(
                        [
                            (b as f64 * width + 0.002, -(k as f64)),
                            ((b + 1) as f64 * width - 0.002, 0.0),
                        ],
                        ShapeStyle::from(c_down).stroke_width(3),
                    )
                }),
        )?;
        chart.draw_series(LineSeries::new(
            vec![(0.0, 0.0), (1.0, 0.0)],
            BLACK.stroke_width(1),
        ))?;
        Ok(())
    })
}
