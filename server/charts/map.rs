//! Charts of the coverage page: the map of countries on the first two principal
//! components, and each indicator's spread among participants against the universe.

use plotters::prelude::*;

use super::{colour, failed_chart, font, legend, render, row_label, GREY, SLIDE};
use crate::analysis::coverage::CoverageReport;

/// Countries on the first two components: participants as filled teal circles, absent
/// eligible countries as hollow amber triangles (shape and colour both differ), the
/// countries farthest from the centre labelled with their codes.
pub fn component_map(c: &CoverageReport) -> String {
    component_map_marked(c, &[], &[])
}

/// The same map with the plan's recruits ringed (plum diamonds) and hypothetical joiners
/// drawn as if they took part (plum squares).
pub fn component_map_marked(c: &CoverageReport, planned: &[String], joiners: &[String]) -> String {
    const TITLE: &str =
        "Which kinds of countries are missing: the eligible universe on two components";
    if let Some(e) = &c.map_error {
        return failed_chart(TITLE, e);
    }
    render(TITLE, SLIDE, |root| {
        let span = |f: &dyn Fn(&crate::analysis::coverage::MapPoint) -> f64| {
            let (lo, hi) = c
                .points
                .iter()
                .map(f)
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| {
                    (l.min(v), h.max(v))
                });
            let pad = 0.08 * (hi - lo).max(1e-9);
            (lo - pad)..(hi + pad)
        };
        // Room above the points for the legend.
        let with_headroom = |r: std::ops::Range<f64>| {
            let h = r.end - r.start;
            r.start..(r.end + 0.22 * h)
        };
        let mut chart = ChartBuilder::on(root)
            .caption("Eligible countries on the first two components", font(24))
            .margin(16)
            .x_label_area_size(50)
            .y_label_area_size(70)
            .build_cartesian_2d(span(&|p| p.pc1), with_headroom(span(&|p| p.pc2)))?;
        let share = |k: usize| c.components.get(k).map_or(0.0, |x| 100.0 * x.explained);
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .x_desc(format!("Component 1 ({:.0}% of variance)", share(0)))
            .y_desc(format!("Component 2 ({:.0}% of variance)", share(1)))
            .x_label_formatter(&|x| super::tick(*x, 1))
            .y_label_formatter(&|y| super::tick(*y, 1))
            .label_style(font(15))
            .axis_desc_style(font(16))
            .draw()?;
        let (took, absent) = (colour(0), colour(1));
        chart
            .draw_series(
                c.points
                    .iter()
                    .filter(|p| !p.participated)
                    .map(|p| TriangleMarker::new((p.pc1, p.pc2), 8, absent.stroke_width(2))),
            )?
            .label("Eligible, did not take part")
            .legend(move |(x, y)| TriangleMarker::new((x, y), 8, absent.stroke_width(2)));
        chart
            .draw_series(
                c.points
                    .iter()
                    .filter(|p| p.participated)
                    .map(|p| Circle::new((p.pc1, p.pc2), 6, took.filled())),
            )?
            .label("Took part")
            .legend(move |(x, y)| Circle::new((x, y), 6, took.filled()));
        let plum = colour(2);
        if !planned.is_empty() {
            chart
                .draw_series(
                    c.points
                        .iter()
                        .filter(|p| planned.contains(&p.id))
                        .map(|p| {
                            EmptyElement::at((p.pc1, p.pc2))
                                + PathElement::new(
                                    vec![(0, -13), (13, 0), (0, 13), (-13, 0), (0, -13)],
                                    plum.stroke_width(3),
                                )
                        }),
                )?
                .label("In the recruitment plan")
                .legend(move |(x, y)| {
                    PathElement::new(
                        vec![(x, y - 8), (x + 8, y), (x, y + 8), (x - 8, y), (x, y - 8)],
                        plum.stroke_width(3),
                    )
                });
        }
        if !joiners.is_empty() {
            chart
                .draw_series(
                    c.points
                        .iter()
                        .filter(|p| joiners.contains(&p.id))
                        .map(|p| {
                            EmptyElement::at((p.pc1, p.pc2))
                                + Rectangle::new([(-7, -7), (7, 7)], plum.filled())
                        }),
                )?
                .label("What if it joined")
                .legend(move |(x, y)| {
                    Rectangle::new([(x - 6, y - 6), (x + 6, y + 6)], plum.filled())
                });
        }
        let labelled = |p: &&crate::analysis::coverage::MapPoint| {
            p.outlier || planned.contains(&p.id) || joiners.contains(&p.id)
        };
        chart.draw_series(c.points.iter().filter(labelled).map(|p| {
            EmptyElement::at((p.pc1, p.pc2)) + Text::new(p.id.clone(), (9, -18), font(14))
        }))?;
        legend(&mut chart, SeriesLabelPosition::UpperRight, 15)?;
        Ok(())
    })
}

/// Per indicator, on the universe's standardised scale: the universe's interquartile range
/// (grey bar) and the participants' (teal bar), medians as ticks, ranges as whiskers.
pub fn spreads(c: &CoverageReport) -> String {
    const TITLE: &str = "Indicators among participants and in the eligible universe";
    if c.distributions.is_empty() {
        return failed_chart(TITLE, "No numeric indicators.");
    }
    let height = (110 + 60 * c.distributions.len() as u32).max(SLIDE.1);
    render(TITLE, (SLIDE.0, height), |root| {
        let n = c.distributions.len();
        let z = |d: &crate::analysis::coverage::Distribution, v: f64| {
            if d.sd > 0.0 {
                (v - d.mean) / d.sd
            } else {
                0.0
            }
        };
        let extent = c
            .distributions
            .iter()
            .flat_map(|d| [z(d, d.universe.min), z(d, d.universe.max)])
            .fold(2.0f64, |m, v| m.max(v.abs() * 1.05));
        let labels: Vec<String> = c.distributions.iter().map(|d| d.label.clone()).collect();
        let mut chart = ChartBuilder::on(root)
            .caption(TITLE, font(24))
            .margin(16)
            .x_label_area_size(50)
            .y_label_area_size(290)
            .build_cartesian_2d(-extent..extent, -0.5..(n as f64 + 0.6))?;
        chart
            .configure_mesh()
            .light_line_style(WHITE.mix(0.0))
            .disable_y_mesh()
            .y_labels(n)
            .y_label_formatter(&|y| row_label(&labels, *y))
            .x_desc("Standard deviations from the eligible universe's mean")
            .label_style(font(15))
            .axis_desc_style(font(16))
            .draw()?;
        let (u_colour, p_colour) = (GREY, colour(0));
        for (i, d) in c.distributions.iter().enumerate() {
            let y = (n - 1 - i) as f64;
            for (offset, s, col) in [
                (0.17, &d.universe, u_colour),
                (-0.17, &d.participants, p_colour),
            ] {
                let yy = y + offset;
                chart.draw_series(std::iter::once(PathElement::new(
                    vec![(z(d, s.min), yy), (z(d, s.max), yy)],
                    col.stroke_width(2),
                )))?;
                chart.draw_series(std::iter::once(Rectangle::new(
                    [(z(d, s.q1), yy - 0.12), (z(d, s.q3), yy + 0.12)],
                    col.mix(0.8).filled(),
                )))?;
                chart.draw_series(std::iter::once(PathElement::new(
                    vec![(z(d, s.median), yy - 0.16), (z(d, s.median), yy + 0.16)],
                    BLACK.stroke_width(3),
                )))?;
            }
        }
        chart
            .draw_series(std::iter::empty::<Circle<(f64, f64), i32>>())?
            .label("Eligible universe (upper bar)")
            .legend(move |(x, y)| {
                Rectangle::new([(x - 8, y - 5), (x + 8, y + 5)], u_colour.filled())
            });
        chart
            .draw_series(std::iter::empty::<Circle<(f64, f64), i32>>())?
            .label("Participants (lower bar)")
            .legend(move |(x, y)| {
                Rectangle::new([(x - 8, y - 5), (x + 8, y + 5)], p_colour.filled())
            });
        legend(&mut chart, SeriesLabelPosition::UpperRight, 15)?;
        Ok(())
    })
}
