//! The recruitment plan against its baselines, as countries are added one by one.

use plotters::prelude::*;

use super::{colour, failed_chart, font, headed, render, tick, Glyph, Key, GREY, SLIDE};
use crate::analysis::planner::Plan;

/// Expected effective number of countries (left) and expected mean |SMD| (right) after 0,
/// 1, ... k invitations, over who joins: the plan, the k likeliest to join, the k most
/// different from the participants, and k at random (mean over random plans).
pub fn paths(p: &Plan) -> String {
    const TITLE: &str = "Expected balance: the plan against simple rules";
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
        let b = &p.baselines;
        let (start, plan, likeliest, different, random) = if field == 0 {
            (
                p.current.effective_n,
                p.steps.iter().map(|s| s.expected_effective_n).collect(),
                b.likeliest.expected_effective_n.clone(),
                b.most_different.expected_effective_n.clone(),
                b.random.expected_effective_n.clone(),
            )
        } else {
            (
                p.current.mean_abs_smd,
                p.steps.iter().map(|s| s.expected_mean_abs_smd).collect(),
                b.likeliest.expected_mean_abs_smd.clone(),
                b.most_different.expected_mean_abs_smd.clone(),
                b.random.expected_mean_abs_smd.clone(),
            )
        };
        vec![
            ("Plan", with_start(start, plan)),
            ("Likeliest to join", with_start(start, likeliest)),
            ("Most different", with_start(start, different)),
            ("At random (mean)", with_start(start, random)),
        ]
    };
    render(TITLE, SLIDE, |root| {
        let keys: Vec<Key> = [
            "Plan",
            "Likeliest to join",
            "Most different",
            "At random (mean)",
        ]
        .iter()
        .enumerate()
        .map(|(i, name)| {
            let c = if i == 3 { GREY } else { colour(i) };
            Key::new(*name, Glyph::LineMarker(i, c))
        })
        .collect();
        let body = headed(root, TITLE, &keys)?;
        let (left, right) = body.split_horizontally(SLIDE.0 / 2);
        for (field, area, desc) in [
            (0, &left, "Expected effective number of countries"),
            (1, &right, "Expected mean |SMD| (unweighted)"),
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
                .build_cartesian_2d(-0.2..k as f64 + 0.2, (lo - pad).max(0.0)..hi + pad)?;
            chart
                .configure_mesh()
                .light_line_style(WHITE.mix(0.0))
                .x_labels(k + 1)
                .x_label_formatter(&|x| tick(*x, 0))
                .y_label_formatter(&|y| tick(*y, if field == 0 { 0 } else { 3 }))
                .x_desc("Countries recruited")
                .y_desc(desc)
                .label_style(font(17))
                .axis_desc_style(font(17))
                .draw()?;
            for (i, (_, points)) in all.into_iter().enumerate() {
                let c = if i == 3 { GREY } else { colour(i) };
                let style = c.stroke_width(3);
                chart.draw_series(LineSeries::new(points.clone(), style))?;
                chart.draw_series(
                    points
                        .iter()
                        .map(move |&pt| EmptyElement::at(pt) + super::marker(i, c)),
                )?;
            }
        }
        Ok(())
    })
}
