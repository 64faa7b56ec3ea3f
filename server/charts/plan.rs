//! The recruitment plan against its baselines, as countries are added one by one.

use plotters::prelude::*;

use super::{colour, failed_chart, font, legend, render, tick, GREY, SLIDE};
use crate::analysis::planner::Plan;

/// Effective number of countries (left) and mean |SMD| (right) after 0, 1, ... k recruits:
/// the greedy plan, the k likeliest to join, and k at random (mean over draws).
pub fn paths(p: &Plan) -> String {
    const TITLE: &str = "Recruiting by plan, by likelihood, at random";
    if p.steps.is_empty() {
        return failed_chart(
            TITLE,
            "The plan picked nobody (no candidate fits the budget).",
        );
    }
    let k = p.steps.len();
    let with_start = |start: f64, v: Vec<f64>| {
        std::iter::once(start)
            .chain(v)
            .enumerate()
            .map(|(i, y)| (i as f64, y))
            .collect::<Vec<_>>()
    };
    let series = |field: usize| -> Vec<(&'static str, Vec<(f64, f64)>)> {
        let (start, plan, likeliest, random) = if field == 0 {
            (
                p.current.effective_n,
                p.steps.iter().map(|s| s.effective_n).collect(),
                p.baselines.likeliest.effective_n.clone(),
                p.baselines.random.effective_n.clone(),
            )
        } else {
            (
                p.current.mean_abs_smd,
                p.steps.iter().map(|s| s.mean_abs_smd).collect(),
                p.baselines.likeliest.mean_abs_smd.clone(),
                p.baselines.random.mean_abs_smd.clone(),
            )
        };
        vec![
            ("Plan (greedy)", with_start(start, plan)),
            ("Likeliest to join", with_start(start, likeliest)),
            ("At random (mean)", with_start(start, random)),
        ]
    };
    render(TITLE, SLIDE, |root| {
        let root = &root.titled(TITLE, font(24))?;
        let (left, right) = root.split_horizontally(SLIDE.0 / 2);
        for (field, area, desc) in [
            (0, &left, "Effective number of countries"),
            (1, &right, "Mean |SMD| of participants (unweighted)"),
        ] {
            let all = series(field);
            let (lo, hi) = all
                .iter()
                .flat_map(|(_, s)| s.iter().map(|p| p.1))
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| {
                    (l.min(v), h.max(v))
                });
            let pad = 0.1 * (hi - lo).max(1e-6);
            let mut chart = ChartBuilder::on(area)
                .margin(14)
                .x_label_area_size(50)
                .y_label_area_size(60)
                .build_cartesian_2d(-0.2..k as f64 + 0.2, (lo - pad).max(0.0)..hi + 3.0 * pad)?;
            chart
                .configure_mesh()
                .light_line_style(WHITE.mix(0.0))
                .x_labels(k + 1)
                .x_label_formatter(&|x| tick(*x, 0))
                .y_label_formatter(&|y| tick(*y, if field == 0 { 0 } else { 3 }))
                .x_desc("Countries recruited")
                .y_desc(desc)
                .label_style(font(15))
                .axis_desc_style(font(16))
                .draw()?;
            for (i, (name, points)) in all.into_iter().enumerate() {
                let c = if i == 2 { GREY } else { colour(i) };
                let style = c.stroke_width(3);
                chart
                    .draw_series(LineSeries::new(points.clone(), style))?
                    .label(name)
                    .legend(move |(x, y)| {
                        PathElement::new(vec![(x - 10, y), (x + 10, y)], c.stroke_width(3))
                    });
                chart.draw_series(
                    points
                        .iter()
                        .map(move |&pt| EmptyElement::at(pt) + super::marker(i, c)),
                )?;
            }
            legend(&mut chart, SeriesLabelPosition::UpperLeft, 14)?;
        }
        Ok(())
    })
}
