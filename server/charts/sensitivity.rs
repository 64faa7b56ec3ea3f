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

/// The participation model's own uncertainty: per quantity, the 2.5-97.5% range of the
/// coefficient draws, the median (dot) and the value at the estimate (bar).
pub fn model_draws(s: &Sensitivity) -> String {
    const TITLE: &str = "How far the results move with the participation model's estimates";
    let Some(m) = &s.model_uncertainty else {
        return failed_chart(TITLE, "Not computed.");
    };
    if let Some(why) = &m.not_estimable {
        return failed_chart(TITLE, &format!("Not estimable: {why}."));
    }
    let panels: Vec<(String, &crate::analysis::sensitivity::Spread, usize)> = [
        (
            "Effective number of countries".to_string(),
            m.effective_n.as_ref(),
            1,
        ),
        (
            "Largest weight's share (%)".to_string(),
            m.max_weight_share.as_ref(),
            1,
        ),
        (
            format!(
                "Pooled mean of {}",
                m.outcome.as_deref().unwrap_or("the outcome")
            ),
            m.pooled_mean.as_ref(),
            3,
        ),
    ]
    .into_iter()
    .filter_map(|(l, s, d)| Some((l, s?, d)))
    .collect();
    if panels.is_empty() {
        return failed_chart(TITLE, "Every draw failed.");
    }
    render(TITLE, SLIDE, |root| {
        let root = &root.titled(TITLE, font(22))?;
        let areas = root.split_evenly((1, panels.len()));
        for (i, ((label, spread, decimals), area)) in panels.iter().zip(&areas).enumerate() {
            let scale = if label.starts_with("Largest") {
                100.0
            } else {
                1.0
            };
            let (lo, hi) = (
                spread.low.min(spread.at_estimate) * scale,
                spread.high.max(spread.at_estimate) * scale,
            );
            let pad = 0.15 * (hi - lo).max(1e-6 * (1.0 + hi.abs()));
            let mut chart = ChartBuilder::on(area)
                .margin(14)
                .x_label_area_size(60)
                .y_label_area_size(60)
                .build_cartesian_2d(-1.0..1.0, (lo - pad)..(hi + pad))?;
            let d = *decimals;
            chart
                .configure_mesh()
                .light_line_style(WHITE.mix(0.0))
                .disable_x_mesh()
                .x_labels(0)
                .x_desc(label.as_str())
                .y_label_formatter(&|y| super::tick(*y, d))
                .label_style(font(14))
                .axis_desc_style(font(15))
                .draw()?;
            let c = colour(i);
            chart.draw_series(std::iter::once(PathElement::new(
                vec![(0.0, spread.low * scale), (0.0, spread.high * scale)],
                c.stroke_width(4),
            )))?;
            chart.draw_series(std::iter::once(Circle::new(
                (0.0, spread.median * scale),
                7,
                c.filled(),
            )))?;
            chart.draw_series(std::iter::once(PathElement::new(
                vec![
                    (-0.3, spread.at_estimate * scale),
                    (0.3, spread.at_estimate * scale),
                ],
                BLACK.stroke_width(2),
            )))?;
        }
        Ok(())
    })
}
