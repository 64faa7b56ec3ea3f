//! Charts a projector can show: every row labelled exactly once, legends outside the
//! plotting area, no two placed country labels overlapping, nothing outside the canvas,
//! waves that are years ticked at the waves. Checked on the demo and on the real-indicator
//! frame (tests/fixtures/real_frame: 142 countries, waves 1992–2007). The layout rules are
//! our own ("common practice" for legible charts); text boxes use the charts' own width
//! estimate, which errs on the wide side.

mod common;

use std::path::{Path, PathBuf};

use gapwise::analysis::settings::Settings;
use gapwise::charts;
use gapwise::project::Project;

fn real_frame() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/real_frame")
}

fn projects() -> Vec<(&'static str, Project)> {
    vec![
        (
            "demo",
            Project::load(&common::demo_dir()).expect("demo loads"),
        ),
        (
            "real_frame",
            Project::load(&real_frame()).expect("real frame loads"),
        ),
    ]
}

/// One `<text>` element of an SVG: position, anchor, vertical shift, size, content.
#[derive(Debug, Clone)]
struct SvgText {
    x: f64,
    y: f64,
    anchor: String,
    dy: String,
    size: f64,
    /// Turned by a quarter (vertical axis titles).
    rotated: bool,
    text: String,
}

fn attr(tag: &str, name: &str) -> Option<String> {
    let key = format!(" {name}=\"");
    let start = tag.find(&key)? + key.len();
    let end = tag[start..].find('"')? + start;
    Some(tag[start..end].to_string())
}

fn unescape(s: &str) -> String {
    s.replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&quot;", "\"")
        .replace("&#39;", "'")
        .replace("&amp;", "&")
}

fn texts(svg: &str) -> Vec<SvgText> {
    let mut out = Vec::new();
    let mut rest = svg;
    while let Some(start) = rest.find("<text") {
        let after = &rest[start..];
        let Some(close) = after.find('>') else { break };
        let tag = &after[..close];
        let Some(end) = after.find("</text>") else {
            break;
        };
        let text = unescape(after[close + 1..end].trim());
        out.push(SvgText {
            x: attr(tag, "x")
                .and_then(|v| v.parse().ok())
                .unwrap_or(f64::NAN),
            y: attr(tag, "y")
                .and_then(|v| v.parse().ok())
                .unwrap_or(f64::NAN),
            anchor: attr(tag, "text-anchor").unwrap_or_else(|| "start".into()),
            dy: attr(tag, "dy").unwrap_or_default(),
            size: attr(tag, "font-size")
                .and_then(|v| v.parse().ok())
                .unwrap_or(12.0),
            rotated: attr(tag, "transform")
                .is_some_and(|t| t.starts_with("rotate(90") || t.starts_with("rotate(270")),
            text,
        });
        rest = &after[end..];
    }
    out
}

/// The box a text covers, from its anchor and shift, with the charts' width estimate
/// (0.62 em a character) and a line height of 1.2 em.
fn text_box(t: &SvgText) -> (f64, f64, f64, f64) {
    let w = t.text.chars().count() as f64 * 0.62 * t.size;
    let h = 1.2 * t.size;
    if t.rotated {
        // Turned about its anchor: as tall as the text is long, centred on y.
        return (t.x - h / 2.0, t.y - w / 2.0, t.x + h, t.y + w / 2.0);
    }
    let left = match t.anchor.as_str() {
        "end" => t.x - w,
        "middle" => t.x - w / 2.0,
        _ => t.x,
    };
    let top = match t.dy.as_str() {
        "0.76em" => t.y,
        "0.5ex" => t.y - h / 2.0,
        _ => t.y - h,
    };
    (left, top, left + w, top + h)
}

fn overlap(a: (f64, f64, f64, f64), b: (f64, f64, f64, f64)) -> bool {
    a.0 < b.2 && b.0 < a.2 && a.1 < b.3 && b.1 < a.3
}

fn canvas(svg: &str) -> (f64, f64) {
    let tag = &svg[..svg.find('>').unwrap_or(0)];
    (
        attr(tag, "width")
            .and_then(|v| v.parse().ok())
            .unwrap_or(0.0),
        attr(tag, "height")
            .and_then(|v| v.parse().ok())
            .unwrap_or(0.0),
    )
}

/// Every text lies inside the canvas (nothing clipped), allowing 1 px of rounding.
fn assert_inside(svg: &str, what: &str) {
    let (w, h) = canvas(svg);
    assert!(w > 0.0 && h > 0.0, "{what}: no canvas size");
    for t in texts(svg) {
        let b = text_box(&t);
        assert!(
            b.0 >= -1.0 && b.2 <= w + 1.0 && b.1 >= -1.0 && b.3 <= h + 1.0,
            "{what}: '{}' at {b:?} leaves the {w}x{h} canvas",
            t.text
        );
    }
}

fn count(svg: &str, label: &str) -> usize {
    texts(svg).iter().filter(|t| t.text == label).count()
}

#[test]
fn every_balance_row_is_labelled_once_and_nothing_is_clipped() {
    for (name, project) in projects() {
        let view = project.wave(*project.waves.last().unwrap()).unwrap();
        let b = gapwise::analysis::balance::compare(&view, &Settings::default()).unwrap();
        assert!(b.rows.len() >= 3, "{name}: {} rows", b.rows.len());
        let svg = charts::balance::smd_dots(&b);
        for r in &b.rows {
            assert_eq!(
                count(&svg, &r.label),
                1,
                "{name}: row '{}' in\n{svg}",
                r.label
            );
        }
        assert_inside(&svg, name);
        // The legend sits above the plot: its texts are above every row label.
        let legend_y = texts(&svg)
            .iter()
            .find(|t| t.text == "Before weighting")
            .map(|t| t.y)
            .expect("legend");
        let first_row = texts(&svg)
            .iter()
            .find(|t| t.text == b.rows[0].label)
            .map(|t| t.y)
            .unwrap();
        assert!(
            legend_y + 20.0 < first_row,
            "{name}: legend at {legend_y}, top row at {first_row}"
        );
    }
}

#[test]
fn every_spread_is_labelled_once() {
    for (name, project) in projects() {
        let view = project.wave(*project.waves.last().unwrap()).unwrap();
        let c = gapwise::analysis::coverage::coverage(&view);
        assert!(!c.distributions.is_empty(), "{name}");
        let svg = charts::map::spreads(&c);
        for d in &c.distributions {
            assert_eq!(count(&svg, &d.label), 1, "{name}: '{}'", d.label);
        }
        assert_inside(&svg, name);
    }
}

#[test]
fn country_labels_never_collide_and_every_country_has_a_hover_title() {
    for (name, project) in projects() {
        for &wave in &project.waves {
            let view = project.wave(wave).unwrap();
            let c = gapwise::analysis::coverage::coverage(&view);
            if c.map_error.is_some() {
                continue;
            }
            let planned: Vec<String> = c.points.iter().take(6).map(|p| p.id.clone()).collect();
            for svg in [
                charts::map::component_map(&c),
                charts::map::component_map_marked(&c, &planned, &planned[..2]),
            ] {
                let codes: Vec<&String> = c.points.iter().map(|p| &p.id).collect();
                let placed: Vec<SvgText> = texts(&svg)
                    .into_iter()
                    .filter(|t| codes.contains(&&t.text))
                    .collect();
                assert!(
                    !placed.is_empty(),
                    "{name} wave {wave}: no country labelled"
                );
                for (i, a) in placed.iter().enumerate() {
                    for b in &placed[i + 1..] {
                        assert!(
                            !overlap(text_box(a), text_box(b)),
                            "{name} wave {wave}: '{}' {:?} and '{}' {:?} overlap",
                            a.text,
                            text_box(a),
                            b.text,
                            text_box(b)
                        );
                    }
                }
                assert_eq!(
                    svg.matches("<title>").count(),
                    c.points.len(),
                    "{name} wave {wave}: one hover title per country"
                );
                assert_inside(&svg, name);
            }
        }
    }
}

#[test]
fn waves_that_are_years_are_ticked_at_the_waves() {
    let project = Project::load(&real_frame()).unwrap();
    let o = gapwise::analysis::overview::overview(&project);
    let svg = charts::coverage::coverage_by_group(&o);
    for wave in ["1992", "1997", "2002", "2007"] {
        assert_eq!(count(&svg, wave), 1, "tick {wave}");
    }
    for round in ["1995", "2000", "2005"] {
        assert_eq!(count(&svg, round), 0, "a round-number tick {round}");
    }
    for g in &o.coverage {
        assert_eq!(count(&svg, &g.group), 1, "legend entry {}", g.group);
    }
    assert_inside(&svg, "coverage");
}

/// The impact charts, served for the real frame: each coefficient row and each variant
/// labelled exactly once, nothing outside the canvas.
#[test]
fn impact_rows_are_all_labelled() {
    let addr = common::start_server(&real_frame());
    let json: serde_json::Value =
        serde_json::from_str(&common::get(addr, "/api/impact?bootstrap=0").body)
            .expect("impact JSON");
    let terms: Vec<String> = json["terms"]
        .as_array()
        .expect("terms")
        .iter()
        .filter_map(|t| t.as_str().map(str::to_string))
        .collect();
    // The first term is the intercept and the last the Mills ratio: neither is a row.
    assert!(terms.len() > 3, "{terms:?}");
    let svg = common::get(addr, "/impact/coefficients.svg?bootstrap=0").body;
    assert!(svg.starts_with("<svg"), "{}", &svg[..svg.len().min(200)]);
    let shown: Vec<String> = texts(&svg).into_iter().map(|t| t.text).collect();
    for t in &terms[1..terms.len() - 1] {
        assert_eq!(
            shown
                .iter()
                .filter(|s| *s == t || s.starts_with(&format!("{t} ")))
                .count()
                + shown
                    .iter()
                    .filter(|s| **s == gapwise::project::manifest::readable_label(t))
                    .count(),
            1,
            "coefficient row '{t}' in {shown:?}"
        );
    }
    assert_inside(&svg, "coefficients");
    let pooled = common::get(addr, "/impact/pooled.svg?bootstrap=0").body;
    for v in json["variants"].as_array().expect("variants") {
        if v["pooled"].is_null() {
            continue;
        }
        let label = v["label"].as_str().unwrap();
        assert_eq!(count(&pooled, label), 1, "variant '{label}'");
    }
    assert_inside(&pooled, "pooled");
}

#[test]
fn projection_map_labels_never_collide_and_every_country_has_a_hover_title() {
    use gapwise::analysis::projection::{projection, ProjectionSettings};
    let project = Project::load(&common::demo_dir()).expect("demo loads");
    let ps = ProjectionSettings {
        outcome: "trust_parliament".into(),
        predictors: vec!["age".into()],
    };
    for &wave in &project.waves {
        let view = project.wave(wave).unwrap();
        let settings = Settings {
            wave: Some(wave),
            ..Settings::default()
        };
        let Ok(r) = projection(&project, &view, &settings, &ps) else {
            continue;
        };
        let svg = charts::projection::component_map(&r);
        let shown: Vec<&String> = r
            .countries
            .iter()
            .filter(|c| c.pc1.is_some() && c.prediction.is_some())
            .map(|c| &c.code)
            .collect();
        assert!(!shown.is_empty(), "wave {wave}: nothing on the map");
        let placed: Vec<SvgText> = texts(&svg)
            .into_iter()
            .filter(|t| {
                t.text
                    .split(' ')
                    .next()
                    .is_some_and(|code| shown.contains(&&code.to_string()))
            })
            .collect();
        assert!(!placed.is_empty(), "wave {wave}: no country labelled");
        for (i, a) in placed.iter().enumerate() {
            for b in &placed[i + 1..] {
                assert!(
                    !overlap(text_box(a), text_box(b)),
                    "wave {wave}: '{}' and '{}' overlap",
                    a.text,
                    b.text
                );
            }
        }
        assert_eq!(
            svg.matches("<title>").count(),
            shown.len(),
            "wave {wave}: one hover title per country"
        );
        assert!(svg.contains("Did not take part (projected)"));
        assert_inside(&svg, "projection map");
    }
}
