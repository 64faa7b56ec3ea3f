//! Multiple imputation's two diagnostics: observed against filled values per indicator,
//! and the convergence traces of the chained equations.

use plotters::prelude::*;

use super::{
    colour, draw_row_labels, failed_chart, font, headed, label_area, render, Glyph, Key, GREY,
    SLIDE,
};
use crate::analysis::imputed::ImputationSummary;

/// Per numeric indicator with filled values, one panel: observed values as grey ticks on
/// the left strip and every filled value of every imputation on the right strip, so that
/// filled values far from the observed ones stand out.
pub fn observed_vs_imputed(s: &ImputationSummary) -> String {
    const TITLE: &str = "Observed (grey) and filled values (colour) per indicator";
    let panels: Vec<_> = s
        .observed_vs_imputed
        .iter()
        .filter(|p| !p.observed.is_empty() && !p.imputed.is_empty())
        .take(6)
        .collect();
    if panels.is_empty() {
        return failed_chart(
            TITLE,
            "No numeric indicator has filled values in this wave.",
        );
    }
    render(TITLE, SLIDE, |root| {
        let body = headed(
            root,
            TITLE,
            &[
                Key::new("observed", Glyph::Cross(GREY)),
                Key::new("filled (every imputation)", Glyph::Cross(colour(0))),
            ],
        )?;
        let areas = body.split_evenly((1, panels.len()));
        for (area, p) in areas.iter().zip(&panels) {
            let lo = p
                .observed
                .iter()
                .chain(&p.imputed)
                .copied()
                .fold(f64::INFINITY, f64::min);
            let hi = p
                .observed
                .iter()
                .chain(&p.imputed)
                .copied()
                .fold(f64::NEG_INFINITY, f64::max);
            let pad = ((hi - lo) * 0.05).max(1e-6);
            let mut chart = ChartBuilder::on(area)
                .margin(10)
                .caption(short(&p.label), font(15))
                .x_label_area_size(30)
                .y_label_area_size(52)
                .build_cartesian_2d(-0.5f64..1.5f64, (lo - pad)..(hi + pad))?;
            chart
                .configure_mesh()
                .light_line_style(WHITE.mix(0.0))
                .x_labels(0)
                .y_labels(5)
                .y_label_formatter(&|y| super::tick(*y, 1))
                .label_style(font(13))
                .draw()?;
            // A fixed horizontal spread so that equal values do not hide each other.
            let jitter = |k: usize| ((k * 37) % 29) as f64 / 29.0 * 0.5 - 0.25;
            chart.draw_series(
                p.observed
                    .iter()
                    .enumerate()
                    .map(|(k, &v)| Cross::new((jitter(k), v), 3, GREY.stroke_width(1))),
            )?;
            chart.draw_series(
                p.imputed
                    .iter()
                    .enumerate()
                    .map(|(k, &v)| Cross::new((1.0 + jitter(k), v), 3, colour(0).stroke_width(1))),
            )?;
        }
        Ok(())
    })
}

/// Per categorical indicator with filled values (up to three), one panel of paired bars:
/// for each level, the share of the wave's observed countries at that level (grey, upper
/// bar) and the share of the filled values at it over every imputation (colour, lower
/// bar), so that filled levels out of line with the observed ones stand out.
pub fn observed_vs_imputed_levels(s: &ImputationSummary) -> String {
    const TITLE: &str = "Observed (grey) and filled levels (colour): share of each level";
    const LABEL_FONT: u32 = 13;
    let panels: Vec<_> = s
        .observed_vs_imputed_levels
        .iter()
        .filter(|p| {
            !p.levels.is_empty()
                && p.observed.len() == p.levels.len()
                && p.imputed.len() == p.levels.len()
                && p.imputed.iter().sum::<usize>() > 0
        })
        .take(3)
        .collect();
    if panels.is_empty() {
        return failed_chart(
            TITLE,
            "No categorical indicator has filled values in this wave.",
        );
    }
    render(TITLE, SLIDE, |root| {
        let grey = GREY;
        let filled = colour(0);
        let body = headed(
            root,
            TITLE,
            &[
                Key::new("observed countries", Glyph::Bar(grey)),
                Key::new("filled values (every imputation)", Glyph::Bar(filled)),
            ],
        )?;
        let areas = body.split_evenly((1, panels.len()));
        for (area, p) in areas.iter().zip(&panels) {
            let n = p.levels.len();
            let share = |counts: &[usize]| -> Vec<f64> {
                let total = counts.iter().sum::<usize>().max(1) as f64;
                counts.iter().map(|&c| c as f64 / total).collect()
            };
            let (obs, imp) = (share(&p.observed), share(&p.imputed));
            let top = obs
                .iter()
                .chain(&imp)
                .copied()
                .fold(0.05f64, f64::max)
                .min(1.0)
                * 1.1;
            let labels: Vec<String> = p.levels.iter().map(|l| short(l)).collect();
            let mut chart = ChartBuilder::on(area)
                .margin(10)
                .caption(short(&p.label), font(15))
                .x_label_area_size(30)
                .y_label_area_size(label_area(&labels, LABEL_FONT, 40))
                .build_cartesian_2d(0f64..top, -0.6..(n as f64 - 0.4))?;
            chart
                .configure_mesh()
                .light_line_style(WHITE.mix(0.0))
                .disable_y_mesh()
                .y_labels(0)
                .x_labels(4)
                .x_label_formatter(&|x| format!("{:.0}%", 100.0 * x))
                .label_style(font(LABEL_FONT))
                .draw()?;
            draw_row_labels(root, &chart, &labels, LABEL_FONT)?;
            let y_of = |i: usize| (n - 1 - i) as f64;
            chart.draw_series(obs.iter().enumerate().map(|(i, &v)| {
                Rectangle::new([(0.0, y_of(i) + 0.02), (v, y_of(i) + 0.36)], grey.filled())
            }))?;
            chart.draw_series(imp.iter().enumerate().map(|(i, &v)| {
                Rectangle::new(
                    [(0.0, y_of(i) - 0.36), (v, y_of(i) - 0.02)],
                    filled.filled(),
                )
            }))?;
        }
        Ok(())
    })
}

/// Per imputed indicator, the mean of its filled values after each cycle, one line per
/// imputation: lines that mix and show no trend suggest the chains have converged.
pub fn convergence(s: &ImputationSummary) -> String {
    const TITLE: &str = "Convergence: mean of the filled values by cycle, one line per imputation";
    let panels: Vec<_> = s
        .traces
        .iter()
        .filter(|t| t.means.iter().any(|m| !m.is_empty()))
        .take(6)
        .collect();
    if panels.is_empty() {
        return failed_chart(TITLE, "Nothing was filled, so there is nothing to trace.");
    }
    render(TITLE, SLIDE, |root| {
        let body = headed(root, TITLE, &[])?;
        let cols = panels.len().min(3);
        let rows = panels.len().div_ceil(cols);
        let areas = body.split_evenly((rows, cols));
        for (area, t) in areas.iter().zip(&panels) {
            let all = t.means.iter().flatten().copied();
            let lo = all.clone().fold(f64::INFINITY, f64::min);
            let hi = all.fold(f64::NEG_INFINITY, f64::max);
            let pad = ((hi - lo) * 0.08).max(1e-6);
            let cycles = t.means.iter().map(Vec::len).max().unwrap_or(1);
            let caption = match &t.level {
                Some(l) => format!("{} (share {})", short(&t.label), short(l)),
                None => short(&t.label),
            };
            let mut chart = ChartBuilder::on(area)
                .margin(10)
                .caption(caption, font(15))
                .x_label_area_size(34)
                .y_label_area_size(56)
                .build_cartesian_2d(0.5f64..(cycles as f64 + 0.5), (lo - pad)..(hi + pad))?;
            chart
                .configure_mesh()
                .light_line_style(WHITE.mix(0.0))
                .x_labels(cycles.min(10))
                .x_label_formatter(&|x| format!("{x:.0}"))
                .y_labels(4)
                .y_label_formatter(&|y| super::tick(*y, 2))
                .label_style(font(13))
                .draw()?;
            for (m, means) in t.means.iter().enumerate() {
                chart.draw_series(LineSeries::new(
                    means.iter().enumerate().map(|(c, &v)| ((c + 1) as f64, v)),
                    colour(m).mix(0.7).stroke_width(1),
                ))?;
            }
        }
        Ok(())
    })
}

/// A panel caption short enough for a third of the slide.
fn short(label: &str) -> String {
    if label.chars().count() <= 30 {
        label.to_string()
    } else {
        format!("{}…", label.chars().take(29).collect::<String>())
    }
}
