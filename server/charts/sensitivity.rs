//! How effective N and the largest remaining |SMD| move with the trimming level.

use plotters::prelude::*;

use super::{colour, draw_x_labels, failed_chart, font, headed, render, SLIDE};
use crate::analysis::sensitivity::Sensitivity;

pub fn trimming(s: &Sensitivity) -> String {
    const TITLE: &str = "Trimming: fewer extreme weights, less balance";
    let points: Vec<(usize, f64, f64)> = s
        .trims
        .iter()
        .enumerate()
        .filter_map(|(i, t)| Some((i, t.outcome.effective_n?, t.outcome.max_abs_smd?)))
        .collect();
    if points.is_empty() {
        return failed_chart(
            TITLE,
            "The chosen weighting failed at every trimming level.",
        );
    }
    let labels: Vec<String> = s
        .trims
        .iter()
        .map(|t| {
            t.trim
                .map_or("none".to_string(), |q| format!("{:.0}th", 100.0 * q))
        })
        .collect();
    render(TITLE, SLIDE, |root| {
        let body = headed(root, TITLE, &[])?;
        let (left, right) = body.split_horizontally(SLIDE.0 / 2);
        let last = (labels.len() - 1) as f64;
        let ticks: Vec<(f64, String)> = labels
            .iter()
            .enumerate()
            .map(|(i, l)| (i as f64, l.clone()))
            .collect();
        let panels: [(
            &DrawingArea<SVGBackend, plotters::coord::Shift>,
            &str,
            usize,
            f64,
        ); 2] = [
            (
                &left,
                "Effective number of countries",
                1,
                s.n_participants as f64 * 1.05,
            ),
            (
                &right,
                "Largest |SMD| after weighting",
                2,
                points
                    .iter()
                    .map(|p| p.2)
                    .fold(s.max_abs_smd_before, f64::max)
                    * 1.1
                    + 0.01,
            ),
        ];
        for (area, desc, field, top) in panels {
            let mut chart = ChartBuilder::on(area)
                .margin(14)
                .x_label_area_size(58)
                .y_label_area_size(64)
                .build_cartesian_2d(-0.3..last + 0.3, 0.0..top)?;
            chart
                .configure_mesh()
                .light_line_style(WHITE.mix(0.0))
                .x_labels(0)
                .x_desc("Weights capped at percentile")
                .y_label_formatter(&|y| super::tick(*y, if field == 1 { 0 } else { 2 }))
                .y_desc(desc)
                .label_style(font(17))
                .axis_desc_style(font(17))
                .draw()?;
            draw_x_labels(root, &chart, &ticks, 17)?;
            let c = colour(field - 1);
            let series: Vec<(f64, f64)> = points
                .iter()
                .map(|p| (p.0 as f64, if field == 1 { p.1 } else { p.2 }))
                .collect();
            chart.draw_series(LineSeries::new(series.clone(), c.stroke_width(3)))?;
            chart.draw_series(series.iter().map(|&p| Circle::new(p, 6, c.filled())))?;
        }
        Ok(())
    })
}
