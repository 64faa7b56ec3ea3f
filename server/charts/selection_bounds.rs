//! The sensitivity bounds of a weighted mean against Λ: the band of values an unmeasured
//! cause of taking part of strength Λ allows, with the bootstrap interval around it.

use plotters::prelude::*;

use super::{colour, failed_chart, font, legend, render, tick, GREY, SLIDE};
use crate::analysis::selection_bounds::SelectionBounds;

pub fn bounds(r: &SelectionBounds) -> String {
    let title = format!(
        "How far the weighted mean of {} can move",
        r.bounds_settings.outcome
    );
    if r.rows.is_empty() {
        return failed_chart(&title, "No value of Λ was asked for.");
    }
    let lambdas: Vec<f64> = r.rows.iter().map(|b| b.lambda).collect();
    let (x_lo, x_hi) = (
        lambdas.iter().copied().fold(f64::INFINITY, f64::min),
        lambdas.iter().copied().fold(f64::NEG_INFINITY, f64::max),
    );
    let mut values: Vec<f64> = vec![r.reference_value, r.weighted_mean];
    for b in &r.rows {
        values.extend([b.lower, b.upper]);
        values.extend(b.interval_low);
        values.extend(b.interval_high);
    }
    let (lo, hi) = values
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| {
            (l.min(*v), h.max(*v))
        });
    let pad = 0.08 * (hi - lo).max(1e-9);
    let x_pad = 0.05 * (x_hi - x_lo).max(0.5);
    render(&title, SLIDE, |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(&title, font(24))
            .margin(16)
            .x_label_area_size(50)
            .y_label_area_size(70)
            .build_cartesian_2d((x_lo - x_pad)..(x_hi + x_pad), (lo - pad)..(hi + pad))?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .x_label_formatter(&|x| tick(*x, 2))
            .y_label_formatter(&|y| tick(*y, 3))
            .x_desc("Λ: how much an unmeasured factor may change a country's odds of taking part")
            .y_desc(format!("Mean of {}", r.bounds_settings.outcome))
            .label_style(font(15))
            .axis_desc_style(font(16))
            .draw()?;
        let band = colour(0);
        let upper: Vec<(f64, f64)> = r.rows.iter().map(|b| (b.lambda, b.upper)).collect();
        let lower: Vec<(f64, f64)> = r.rows.iter().map(|b| (b.lambda, b.lower)).collect();
        let mut polygon = upper.clone();
        polygon.extend(lower.iter().rev().copied());
        chart.draw_series(std::iter::once(Polygon::new(
            polygon,
            band.mix(0.25).filled(),
        )))?;
        chart
            .draw_series(LineSeries::new(upper.clone(), band.stroke_width(3)))?
            .label("bounds")
            .legend(move |(x, y)| {
                PathElement::new(vec![(x, y), (x + 20, y)], band.stroke_width(3))
            });
        chart.draw_series(LineSeries::new(lower, band.stroke_width(3)))?;
        if r.bootstrap.is_some() {
            let c = colour(1);
            let high: Vec<(f64, f64)> = r
                .rows
                .iter()
                .filter_map(|b| Some((b.lambda, b.interval_high?)))
                .collect();
            let low: Vec<(f64, f64)> = r
                .rows
                .iter()
                .filter_map(|b| Some((b.lambda, b.interval_low?)))
                .collect();
            chart
                .draw_series(DashedLineSeries::new(high, 8, 5, c.stroke_width(2)))?
                .label("bootstrap interval")
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 20, y)], c.stroke_width(2))
                });
            chart.draw_series(DashedLineSeries::new(low, 8, 5, c.stroke_width(2)))?;
        }
        let reference = vec![
            (x_lo - x_pad, r.reference_value),
            (x_hi + x_pad, r.reference_value),
        ];
        chart
            .draw_series(LineSeries::new(reference, GREY.stroke_width(2)))?
            .label("reference")
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], GREY.stroke_width(2)));
        if let Some(l) = r.breakdown.filter(|l| *l <= x_hi + x_pad) {
            chart.draw_series(std::iter::once(Circle::new(
                (l, r.reference_value),
                7,
                BLACK.filled(),
            )))?;
        }
        legend(&mut chart, SeriesLabelPosition::UpperLeft, 15)?;
        Ok(())
    })
}
