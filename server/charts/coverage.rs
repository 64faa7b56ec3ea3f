//! Coverage rate by group (region) across waves.

use plotters::prelude::*;

use super::{
    colour, draw_x_labels, failed_chart, font, headed, render, Area, DrawResult, Glyph, Key, SLIDE,
};

/// Nominal size of axis labels.
const LABEL_FONT: u32 = 18;
use crate::analysis::overview::Overview;

const TITLE: &str = "Coverage by region across waves";

/// Lines of the share of eligible countries that took part, one per group, with a
/// distinct marker per group.
pub fn coverage_by_group(overview: &Overview) -> String {
    if overview.coverage.is_empty() || overview.waves.is_empty() {
        return failed_chart(
            TITLE,
            "No grouping indicator (columns.group) or no waves: nothing to draw.",
        );
    }
    render(TITLE, SLIDE, |root| draw(overview, root))
}

fn draw(overview: &Overview, root: &Area<'_>) -> DrawResult {
    let waves: Vec<i64> = overview.waves.iter().map(|w| w.wave).collect();
    let (first, last) = (waves[0] as f64, waves[waves.len() - 1] as f64);
    // Half the smallest gap between waves on each side, so end markers are not cut.
    let gap = waves
        .windows(2)
        .map(|w| (w[1] - w[0]) as f64)
        .fold(f64::INFINITY, f64::min);
    let pad = if gap.is_finite() { 0.3 * gap } else { 0.5 };
    let group_label = overview.group_label.as_deref().unwrap_or("Group");
    let title = format!("Coverage by {} across waves", group_label.to_lowercase());
    let keys: Vec<Key> = overview
        .coverage
        .iter()
        .enumerate()
        .map(|(i, g)| Key::new(g.group.clone(), Glyph::LineMarker(i, colour(i))))
        .collect();
    let body = headed(root, &title, &keys)?;
    let mut chart = super::body_chart(&body, 28, 60, 76)
        .build_cartesian_2d((first - pad)..(last + pad), -2.0..104.0)?;
    chart
        .configure_mesh()
        .light_line_style(WHITE.mix(0.0))
        .disable_x_mesh()
        .x_labels(0)
        .x_desc("Wave")
        .y_desc("Eligible countries that took part (%)")
        .y_label_formatter(&|y| format!("{y:.0}"))
        .label_style(font(LABEL_FONT))
        .axis_desc_style(font(LABEL_FONT))
        .draw()?;
    let ticks: Vec<(f64, String)> = waves.iter().map(|&w| (w as f64, w.to_string())).collect();
    draw_x_labels(root, &chart, &ticks, LABEL_FONT)?;
    for (i, g) in overview.coverage.iter().enumerate() {
        let points: Vec<(f64, f64)> = waves
            .iter()
            .zip(&g.coverage)
            .filter_map(|(&w, c)| c.map(|c| (w as f64, 100.0 * c)))
            .collect();
        let style = ShapeStyle::from(colour(i)).stroke_width(3);
        chart.draw_series(LineSeries::new(points.clone(), style))?;
        chart.draw_series(
            points
                .iter()
                .map(|&p| EmptyElement::at(p) + super::marker(i, colour(i))),
        )?;
    }
    Ok(())
}
