//! Coverage rate by group (region) across waves.

use plotters::prelude::*;

use super::{colour, failed_chart, render, Area, DrawResult, SLIDE};
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
    let group_label = overview.group_label.as_deref().unwrap_or("Group");
    {
        let title = format!("Coverage by {} across waves", group_label.to_lowercase());
        let mut chart = ChartBuilder::on(root)
            .caption(title, ("sans-serif", 26))
            .margin(16)
            .x_label_area_size(50)
            .y_label_area_size(70)
            .build_cartesian_2d((first - 0.3)..(last + 1.6), 0.0..100.0)?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .disable_x_mesh()
            .x_desc("Wave")
            .y_desc("Eligible countries that took part (%)")
            .x_labels(waves.len() + 2)
            .x_label_formatter(&|x| {
                if (x.fract()).abs() < 1e-9 && *x >= first && *x <= last {
                    format!("{x:.0}")
                } else {
                    String::new()
                }
            })
            .y_label_formatter(&|y| format!("{y:.0}"))
            .label_style(("sans-serif", 18))
            .axis_desc_style(("sans-serif", 18))
            .draw()?;
        for (i, g) in overview.coverage.iter().enumerate() {
            let points: Vec<(f64, f64)> = waves
                .iter()
                .zip(&g.coverage)
                .filter_map(|(&w, c)| c.map(|c| (w as f64, 100.0 * c)))
                .collect();
            let style = ShapeStyle::from(colour(i)).stroke_width(3);
            let c = colour(i);
            chart
                .draw_series(LineSeries::new(points.clone(), style))?
                .label(g.group.clone())
                .legend(move |(x, y)| {
                    EmptyElement::at((x + 10, y))
                        + PathElement::new(vec![(-10, 0), (10, 0)], c.stroke_width(3))
                        + super::marker(i, c)
                });
            chart.draw_series(
                points
                    .iter()
                    .map(|&p| EmptyElement::at(p) + super::marker(i, colour(i))),
            )?;
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .label_font(("sans-serif", 17))
            .background_style(WHITE.mix(0.9))
            .border_style(BLACK.mix(0.3))
            .draw()?;
    }
    Ok(())
}
