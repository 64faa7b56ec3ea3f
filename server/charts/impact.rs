//! Charts of the impact view: coefficients with intervals per variant, and the pooled
//! estimate per variant.

use plotters::prelude::*;

use super::{
    colour, draw_row_labels, failed_chart, font, headed, label_area, render, tick, Glyph, Key,
    SLIDE,
};

/// Nominal size of axis and row labels.
const LABEL_FONT: u32 = 18;
use crate::analysis::impact::ImpactReport;

/// One row per variant (top: unweighted), a dot at the pooled estimate and a 95% interval.
pub fn pooled(r: &ImpactReport) -> String {
    let title = format!("Pooled mean of {} by correction", r.impact.outcome);
    let rows: Vec<(&str, f64, f64, f64)> = r
        .variants
        .iter()
        .filter_map(|v| {
            v.pooled
                .as_ref()
                .map(|p| (v.label.as_str(), p.estimate, p.low, p.high))
        })
        .collect();
    if rows.is_empty() {
        return failed_chart(&title, "No variant could be estimated.");
    }
    render(&title, SLIDE, |root| {
        let n = rows.len();
        let (lo, hi) = rows
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), r| {
                (l.min(r.2), h.max(r.3))
            });
        let pad = 0.1 * (hi - lo).max(1e-9);
        let labels: Vec<String> = rows.iter().map(|r| r.0.to_string()).collect();
        let body = headed(root, &title, &[])?;
        let mut chart = super::body_chart(&body, 40, 56, label_area(&labels, LABEL_FONT, 160))
            .build_cartesian_2d((lo - pad)..(hi + pad), -0.5..(n as f64 - 0.5))?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .disable_y_mesh()
            .y_labels(0)
            .x_label_formatter(&|x| tick(*x, 2))
            .x_desc(format!(
                "Mean of {}, 95% interval (clustered by country)",
                r.impact.outcome
            ))
            .label_style(font(LABEL_FONT))
            .axis_desc_style(font(LABEL_FONT))
            .draw()?;
        draw_row_labels(root, &chart, &labels, LABEL_FONT)?;
        for (i, (_, est, low, high)) in rows.iter().enumerate() {
            let y = (n - 1 - i) as f64;
            let c = colour(i);
            chart.draw_series(std::iter::once(PathElement::new(
                vec![(*low, y), (*high, y)],
                c.stroke_width(3),
            )))?;
            chart.draw_series(std::iter::once(
                EmptyElement::at((*est, y)) + super::marker(i, c),
            ))?;
        }
        Ok(())
    })
}

/// Per term (rows), one dot and 95% interval per variant, offset vertically and told apart
/// by colour and marker.
pub fn coefficients(r: &ImpactReport) -> String {
    const TITLE: &str = "Coefficients by correction (95% intervals)";
    let k = r.terms.len().saturating_sub(1); // substantive terms without the Mills ratio
    let terms: Vec<usize> = (1..k).collect();
    if terms.is_empty() {
        return failed_chart(TITLE, "The model has no predictors.");
    }
    let height = (200 + 90 * terms.len() as u32).max(SLIDE.1);
    render(TITLE, (SLIDE.0, height), |root| {
        let nt = terms.len();
        let nv = r.variants.len();
        let mut extent: f64 = 1e-9;
        for v in r
            .variants
            .iter()
            .filter(|v| v.error.is_none() && v.coef.len() > k)
        {
            for &j in &terms {
                extent = extent
                    .max((v.coef[j] - 1.96 * v.se[j]).abs())
                    .max((v.coef[j] + 1.96 * v.se[j]).abs());
            }
        }
        // Terms are column names: shown with their readable label, never raw.
        let labels: Vec<String> = terms
            .iter()
            .map(|&j| {
                r.term_labels
                    .get(j)
                    .cloned()
                    .unwrap_or_else(|| crate::project::manifest::readable_label(&r.terms[j]))
            })
            .collect();
        let keys: Vec<Key> = r
            .variants
            .iter()
            .enumerate()
            .filter(|(_, v)| v.error.is_none() && v.coef.len() > k)
            .map(|(vi, v)| Key::new(v.label.clone(), Glyph::Marker(vi, colour(vi))))
            .collect();
        let body = headed(root, TITLE, &keys)?;
        let mut chart = super::body_chart(&body, 40, 56, label_area(&labels, LABEL_FONT, 160))
            .build_cartesian_2d(-extent * 1.1..extent * 1.1, -0.5..(nt as f64 - 0.5))?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .disable_y_mesh()
            .y_labels(0)
            .x_label_formatter(&|x| tick(*x, 3))
            .x_desc("Coefficient")
            .label_style(font(LABEL_FONT))
            .axis_desc_style(font(LABEL_FONT))
            .draw()?;
        draw_row_labels(root, &chart, &labels, LABEL_FONT)?;
        chart.draw_series(LineSeries::new(
            vec![(0.0, -0.5), (0.0, nt as f64 - 0.5)],
            BLACK.stroke_width(1),
        ))?;
        for (vi, v) in r.variants.iter().enumerate() {
            // Failed variants, and the projection (a pooled mean without terms).
            if v.error.is_some() || v.coef.len() <= k {
                continue;
            }
            let c = colour(vi);
            let offset = |row: usize| {
                (nt - 1 - row) as f64 + 0.35 - 0.7 * vi as f64 / (nv.max(2) - 1) as f64
            };
            chart.draw_series(terms.iter().enumerate().map(|(row, &j)| {
                let y = offset(row);
                PathElement::new(
                    vec![
                        (v.coef[j] - 1.96 * v.se[j], y),
                        (v.coef[j] + 1.96 * v.se[j], y),
                    ],
                    c.stroke_width(2),
                )
            }))?;
            chart.draw_series(terms.iter().enumerate().map(|(row, &j)| {
                EmptyElement::at((v.coef[j], offset(row))) + super::marker(vi, c)
            }))?;
        }
        Ok(())
    })
}
