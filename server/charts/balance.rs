//! The dot chart of standardised mean differences before and after weighting.

use plotters::prelude::*;

use super::{
    colour, draw_row_labels, failed_chart, font, headed, label_area, render, Area, DrawResult,
    Glyph, Key, GREY, SLIDE,
};
use crate::analysis::balance::BalanceComparison;

/// Nominal size of axis and row labels (drawn at about 14.5 px).
const LABEL_FONT: u32 = 18;

const TITLE: &str = "Standardised mean differences, before and after weighting";

/// One row per indicator (and category level): a hollow grey circle before weighting, a
/// filled diamond after the chosen method; dashed lines at 0.1 and 0.25 (common
/// thresholds: Austin 2009; Stuart 2010).
pub fn smd_dots(b: &BalanceComparison) -> String {
    if b.rows.is_empty() {
        return failed_chart(TITLE, "No indicators chosen.");
    }
    render(
        TITLE,
        (SLIDE.0, (150 + 34 * b.rows.len() as u32).max(SLIDE.1)),
        |root| draw(b, root),
    )
}

fn draw(b: &BalanceComparison, root: &Area<'_>) -> DrawResult {
    let n = b.rows.len();
    let extent = b
        .rows
        .iter()
        .flat_map(|r| [r.smd_before, r.smd_after])
        .flatten()
        .fold(0.3f64, |m, v| m.max(v.abs() * 1.1));
    let method = b.methods.get(b.chosen).map_or("", |m| m.label);
    let labels: Vec<String> = b.rows.iter().map(|r| r.label.clone()).collect();
    let after = colour(0);
    let keys = [
        Key::new("Before weighting", Glyph::Ring(GREY)),
        Key::new(format!("After: {method}"), Glyph::Diamond(after)),
    ];
    let body = headed(root, TITLE, &keys)?;
    {
        let mut chart = super::body_chart(&body, 28, 56, label_area(&labels, LABEL_FONT, 160))
            .build_cartesian_2d(-extent..extent, -0.6..(n as f64 - 0.4))?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .disable_y_mesh()
            .y_labels(0)
            .x_label_formatter(&|x| super::tick(*x, 1))
            .x_desc("SMD: participants − eligible universe, in the universe's SDs")
            .label_style(font(LABEL_FONT))
            .axis_desc_style(font(LABEL_FONT))
            .draw()?;
        draw_row_labels(root, &chart, &labels, LABEL_FONT)?;
        for (threshold, shade) in [(0.1, 0.35), (0.25, 0.7)] {
            for sign in [-1.0, 1.0] {
                let x = sign * threshold;
                chart.draw_series(DashedLineSeries::new(
                    vec![(x, -0.5), (x, n as f64 - 0.5)],
                    6,
                    4,
                    GREY.mix(shade).stroke_width(2),
                ))?;
            }
        }
        chart.draw_series(LineSeries::new(
            vec![(0.0, -0.5), (0.0, n as f64 - 0.5)],
            BLACK.stroke_width(1),
        ))?;
        let y_of = |i: usize| (n - 1 - i) as f64;
        // A thin line joins before and after, so the movement reads at a glance.
        chart.draw_series(b.rows.iter().enumerate().filter_map(|(i, r)| {
            let (Some(a), Some(z)) = (r.smd_before, r.smd_after) else {
                return None;
            };
            Some(PathElement::new(
                vec![(a, y_of(i)), (z, y_of(i))],
                GREY.mix(0.5).stroke_width(2),
            ))
        }))?;
        chart.draw_series(b.rows.iter().enumerate().filter_map(|(i, r)| {
            r.smd_before
                .map(|v| Circle::new((v, y_of(i)), 7, GREY.stroke_width(3)))
        }))?;
        chart.draw_series(b.rows.iter().enumerate().filter_map(|(i, r)| {
            r.smd_after.map(|v| {
                EmptyElement::at((v, y_of(i)))
                    + Polygon::new(vec![(0, -8), (8, 0), (0, 8), (-8, 0)], after.filled())
            })
        }))?;
    }
    Ok(())
}
