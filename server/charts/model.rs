//! Charts of the participation model: propensity against weight, and the overlap of the
//! propensity distributions.

use plotters::prelude::*;

use super::{colour, font, legend, render, GREY, SLIDE};
use crate::analysis::participation::FitReport;

/// Each country's estimated probability of taking part against its weight: participants
/// as filled circles (the ten heaviest labelled), non-participants as grey crosses on the
/// zero line (they carry no weight).
pub fn propensity_vs_weight(r: &FitReport) -> String {
    const TITLE: &str = "Estimated participation probability and weight";
    render(TITLE, SLIDE, |root| {
        let max_weight = r.units.iter().map(|u| u.weight).fold(1.0f64, f64::max) * 1.12;
        let mut heaviest: Vec<&crate::analysis::participation::UnitReport> =
            r.units.iter().filter(|u| u.participated).collect();
        heaviest.sort_by(|a, b| b.weight.total_cmp(&a.weight));
        let labelled: Vec<&str> = heaviest.iter().take(10).map(|u| u.id.as_str()).collect();
        let mut chart = ChartBuilder::on(root)
            .caption(TITLE, font(24))
            .margin(16)
            .x_label_area_size(50)
            .y_label_area_size(70)
            .build_cartesian_2d(0.0..1.0, -0.04 * max_weight..max_weight)?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .x_desc("Estimated probability of taking part")
            .y_desc(format!("Weight ({} weighting)", r.weighting.kind))
            .label_style(font(15))
            .axis_desc_style(font(16))
            .draw()?;
        chart
            .draw_series(
                r.units
                    .iter()
                    .filter(|u| !u.participated)
                    .map(|u| Cross::new((u.propensity, 0.0), 5, GREY.stroke_width(2))),
            )?
            .label("Did not take part (no weight)")
            .legend(|(x, y)| Cross::new((x, y), 5, GREY.stroke_width(2)));
        let c = colour(0);
        chart
            .draw_series(
                r.units
                    .iter()
                    .filter(|u| u.participated)
                    .map(|u| Circle::new((u.propensity, u.weight), 6, c.filled())),
            )?
            .label("Took part")
            .legend(move |(x, y)| Circle::new((x, y), 6, c.filled()));
        chart.draw_series(
            r.units
                .iter()
                .filter(|u| labelled.contains(&u.id.as_str()))
                .map(|u| {
                    EmptyElement::at((u.propensity, u.weight))
                        + Text::new(u.id.clone(), (8, -16), font(14))
                }),
        )?;
        legend(&mut chart, SeriesLabelPosition::UpperRight, 15)?;
        Ok(())
    })
}

/// Mirrored histograms of the estimated probability: participants above the axis,
/// non-participants below. Little overlap means some kinds of countries have no
/// counterpart among participants.
pub fn overlap(r: &FitReport) -> String {
    const TITLE: &str = "Overlap of participation probabilities";
    const BINS: usize = 20;
    render(TITLE, SLIDE, |root| {
        let mut up = [0usize; BINS];
        let mut down = [0usize; BINS];
        for u in &r.units {
            let b = ((u.propensity * BINS as f64) as usize).min(BINS - 1);
            if u.participated {
                up[b] += 1;
            } else {
                down[b] += 1;
            }
        }
        let top = up.iter().chain(&down).copied().max().unwrap_or(1).max(1) as f64 * 1.15;
        let mut chart = ChartBuilder::on(root)
            .caption(TITLE, font(24))
            .margin(16)
            .x_label_area_size(50)
            .y_label_area_size(70)
            .build_cartesian_2d(0.0..1.0, -top..top)?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .x_desc("Estimated probability of taking part")
            .y_desc("Countries (took part above, absent below)")
            .y_label_formatter(&|y| format!("{:.0}", y.abs()))
            .label_style(font(15))
            .axis_desc_style(font(16))
            .draw()?;
        let width = 1.0 / BINS as f64;
        let (c_up, c_down) = (colour(0), colour(1));
        chart
            .draw_series(
                up.iter()
                    .enumerate()
                    .filter(|(_, &k)| k > 0)
                    .map(|(b, &k)| {
                        Rectangle::new(
                            [
                                (b as f64 * width + 0.002, 0.0),
                                ((b + 1) as f64 * width - 0.002, k as f64),
                            ],
                            c_up.filled(),
                        )
                    }),
            )?
            .label("Took part")
            .legend(move |(x, y)| Rectangle::new([(x - 6, y - 6), (x + 6, y + 6)], c_up.filled()));
        chart
            .draw_series(
                down.iter()
                    .enumerate()
                    .filter(|(_, &k)| k > 0)
                    .map(|(b, &k)| {
                        Rectangle::new(
                            [
                                (b as f64 * width + 0.002, -(k as f64)),
                                ((b + 1) as f64 * width - 0.002, 0.0),
                            ],
                            ShapeStyle::from(c_down).stroke_width(3),
                        )
                    }),
            )?
            .label("Did not take part (outlined)")
            .legend(move |(x, y)| {
                Rectangle::new(
                    [(x - 6, y - 6), (x + 6, y + 6)],
                    ShapeStyle::from(c_down).stroke_width(3),
                )
            });
        chart.draw_series(LineSeries::new(
            vec![(0.0, 0.0), (1.0, 0.0)],
            BLACK.stroke_width(1),
        ))?;
        legend(&mut chart, SeriesLabelPosition::UpperLeft, 15)?;
        Ok(())
    })
}
