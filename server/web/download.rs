//! What every downloaded chart and table carries, so that a file found later in a folder
//! still says what it is, which wave, and under which settings:
//!
//! - **File names** say what and which wave: the page's name for the file with
//!   `-wave4` before the extension (`balance-wave4.csv`, `balance-smd-wave4.svg`); the
//!   overview's chart, which spans every wave, gets `-all-waves`.
//! - **SVG charts** get a footnote below the drawing: the project, the wave, the tool
//!   version and every setting (model, weighting, trimming, missing values, indicators,
//!   seed, and the page's own settings such as the plan's budget or the impact view's
//!   outcome).
//! - **CSV tables stay pure data** (a header row, then rows; no comment lines that a
//!   program merging them would trip over). Their settings are in a sidecar JSON file at
//!   the same address with `.json` appended (`/balance/table.csv.json?...` describes
//!   `/balance/table.csv?...`), which the CSV response names in its `Link` header
//!   (`rel="describedby"`, RFC 8288): the file name, the wave, the typed settings, the
//!   tool version, the project's revision and its input checksums.
//!
//! One middleware does all three from the request's query (parsed by the pages' own
//! parsers), so no page can forget it.

use std::sync::Arc;

use axum::body::Body;
use axum::extract::{Request, State};
use axum::http::{header, HeaderValue, Method, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use serde::Serialize;

use super::context::{normalised_settings, own_key, Query};
use super::state::AppState;
use crate::analysis::impact::ImpactSettings;
use crate::analysis::planner::PlanSettings;
use crate::analysis::projection::ProjectionSettings;
use crate::analysis::settings::{model_label, Settings};
use crate::project::LoadedFile;

/// Every CSV download, by address (the README's table lists the same).
pub const CSV_PATHS: [&str; 12] = [
    "/model/weights.csv",
    "/model/coefficients.csv",
    "/balance/table.csv",
    "/plan/plan.csv",
    "/plan/baselines.csv",
    "/plan/candidates.csv",
    "/coverage/points.csv",
    "/coverage/loadings.csv",
    "/coverage/rates.csv",
    "/impact/table.csv",
    "/projection/table.csv",
    "/sensitivity/table.csv",
];

/// Charts that span every wave (no wave in their settings).
const ALL_WAVES: [&str; 1] = ["/charts/coverage.svg"];

/// The sidecar of a CSV download.
#[derive(Debug, Clone, Serialize)]
pub struct Sidecar {
    /// The CSV file's name as downloaded.
    pub file: String,
    /// The CSV's address with the normalised settings.
    pub url: String,
    pub tool: String,
    pub project: String,
    /// The loaded project's revision (a reload gives a new one).
    pub revision: u64,
    pub wave: i64,
    pub settings: Settings,
    /// The planner's settings (plan downloads).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub plan: Option<PlanSettings>,
    /// The impact view's settings (impact downloads).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub impact: Option<ImpactSettings>,
    /// The projection's settings (projection downloads).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub projection: Option<ProjectionSettings>,
    /// The files the project was loaded from, with their SHA-256 checksums.
    pub inputs: Vec<LoadedFile>,
}

/// `what.ext` becomes `what-waveW.ext` (or `what-all-waves.ext`).
pub fn file_name(name: &str, wave: Option<i64>) -> String {
    let suffix = wave.map_or("all-waves".to_string(), |w| format!("wave{w}"));
    match name.rsplit_once('.') {
        Some((stem, ext)) => format!("{stem}-{suffix}.{ext}"),
        None => format!("{name}-{suffix}"),
    }
}

/// The settings of one download: the typed analysis settings (wave resolved), and the
/// page's own settings.
struct Described {
    settings: Settings,
    plan: Option<PlanSettings>,
    impact: Option<ImpactSettings>,
    projection: Option<ProjectionSettings>,
    /// The page's own keys as given, for the footnote.
    own: Vec<(String, String)>,
}

fn describe(state: &AppState, path: &str, query: &Query) -> Option<Described> {
    let project = state.project();
    // The same normalised settings as the result the download renders (indicators in the
    // project's order), so the footnote and sidecar describe exactly that result.
    let mut settings = normalised_settings(&project, query).ok()?;
    if settings.wave.is_none() {
        settings.wave = project.waves.last().copied();
    }
    let page = path.trim_start_matches('/').split('/').next().unwrap_or("");
    Some(Described {
        plan: (page == "plan")
            .then(|| super::plan::plan_settings(query).ok())
            .flatten(),
        impact: (page == "impact")
            .then(|| super::impact::impact_settings(&project, query).ok())
            .flatten(),
        projection: (page == "projection")
            .then(|| super::projection::projection_settings(&project, query).ok())
            .flatten(),
        own: query.iter().filter(|(k, _)| own_key(k)).cloned().collect(),
        settings,
    })
}

/// The footnote's lines: what, which wave, every setting.
fn footnote(title: &str, d: &Described, all_waves: bool) -> Vec<String> {
    let s = &d.settings;
    let wave = match (all_waves, s.wave) {
        (true, _) | (false, None) => "all waves".to_string(),
        (false, Some(w)) => format!("wave {w}"),
    };
    let mut lines = vec![format!("{title} · {wave} · gapwise {}", crate::VERSION)];
    if !all_waves {
        let list = |l: &Option<Vec<String>>, all: &str| {
            l.as_ref().map_or(all.to_string(), |l| {
                if l.is_empty() {
                    "none".to_string()
                } else {
                    l.join(", ")
                }
            })
        };
        lines.push(format!(
            "Model: {} · weighting: {} · trimming: {} · missing values: {}{} · seed {}",
            model_label(s.model),
            s.weighting.label(),
            s.trim.map_or("none".to_string(), |t| format!(
                "cap at {:.0}th percentile",
                100.0 * t
            )),
            s.missing.as_str(),
            if s.match_variances {
                " · variances matched"
            } else {
                ""
            },
            s.seed
        ));
        lines.push(format!(
            "Indicators: {}; {}",
            list(&s.covariates, "all numeric"),
            list(&s.factors, "all categorical")
        ));
        if !d.own.is_empty() {
            let own: Vec<String> = d.own.iter().map(|(k, v)| format!("{k} {v}")).collect();
            lines.push(format!("Page settings: {}", own.join("; ")));
        }
    }
    lines.into_iter().flat_map(|l| wrap(&l, 150)).collect()
}

/// Breaks a line at spaces so that no piece is longer than `width` characters (a longer
/// word stays whole).
fn wrap(line: &str, width: usize) -> Vec<String> {
    let mut out = Vec::new();
    let mut current = String::new();
    for word in line.split(' ') {
        if !current.is_empty() && current.chars().count() + 1 + word.chars().count() > width {
            out.push(std::mem::take(&mut current));
        }
        if !current.is_empty() {
            current.push(' ');
        }
        current.push_str(word);
    }
    out.push(current);
    out
}

fn xml_escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// Pixels per footnote line.
const LINE: u32 = 15;

/// The SVG with `lines` written below the drawing: the canvas grows by the footnote's
/// height (its `height` and `viewBox`), on a white band. An SVG without a numeric
/// `height` is returned unchanged.
pub fn with_footnote(svg: &str, lines: &[String]) -> String {
    let Some(open_end) = svg
        .find("<svg")
        .and_then(|s| svg[s..].find('>').map(|e| s + e))
    else {
        return svg.to_string();
    };
    let Some(close) = svg.rfind("</svg>") else {
        return svg.to_string();
    };
    let tag = &svg[..open_end];
    let number = |name: &str| -> Option<u32> {
        let at = tag.find(&format!(" {name}=\""))? + name.len() + 3;
        let rest = &tag[at..];
        rest[..rest.find('"')?].trim_end_matches("px").parse().ok()
    };
    let (Some(width), Some(height)) = (number("width"), number("height")) else {
        return svg.to_string();
    };
    let extra = LINE * lines.len() as u32 + 10;
    let grown = height + extra;
    let mut new_tag = tag
        .replacen(
            &format!(" height=\"{height}\""),
            &format!(" height=\"{grown}\""),
            1,
        )
        .replacen(
            &format!(" height=\"{height}px\""),
            &format!(" height=\"{grown}px\""),
            1,
        );
    new_tag = new_tag.replacen(
        &format!("viewBox=\"0 0 {width} {height}\""),
        &format!("viewBox=\"0 0 {width} {grown}\""),
        1,
    );
    let mut note = format!(
        r##"<g class="gapwise-footnote"><rect x="0" y="{height}" width="{width}" height="{extra}" fill="#FFFFFF"/>"##
    );
    for (i, l) in lines.iter().enumerate() {
        note.push_str(&format!(
            r##"<text x="8" y="{}" font-family="sans-serif" font-size="11" fill="#4A4A4A">{}</text>"##,
            height + 4 + LINE * (i as u32 + 1) - 3,
            xml_escape(l)
        ));
    }
    note.push_str("</g>");
    format!("{new_tag}{}{note}{}", &svg[open_end..close], &svg[close..])
}

/// The middleware: names downloads by wave, adds the SVG footnote and the CSV's `Link`
/// to its sidecar, and answers the sidecars (`.csv.json`).
pub async fn label(State(state): State<Arc<AppState>>, request: Request, next: Next) -> Response {
    if request.method() != Method::GET {
        return next.run(request).await;
    }
    let path = request.uri().path().to_string();
    let raw_query = request.uri().query().unwrap_or("").to_string();
    let query: Query = form_urlencoded::parse(raw_query.as_bytes())
        .into_owned()
        .collect();
    if let Some(csv) = path.strip_suffix(".json").filter(|p| CSV_PATHS.contains(p)) {
        return sidecar(&state, csv, &query);
    }
    let is_svg = path.ends_with(".svg");
    let is_csv = CSV_PATHS.contains(&path.as_str());
    if !is_svg && !is_csv {
        return next.run(request).await;
    }
    let response = next.run(request).await;
    if response.status() != StatusCode::OK
        || !response.headers().contains_key(header::CONTENT_DISPOSITION)
    {
        return response;
    }
    let all_waves = ALL_WAVES.contains(&path.as_str());
    let Some(described) = describe(&state, &path, &query) else {
        return response;
    };
    let wave = (!all_waves).then_some(described.settings.wave).flatten();
    let (mut parts, body) = response.into_parts();
    if let Some(name) = parts
        .headers
        .get(header::CONTENT_DISPOSITION)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.split("filename=\"").nth(1))
        .and_then(|v| v.split('"').next())
        .map(str::to_string)
    {
        let kind = if is_csv { "attachment" } else { "inline" };
        if let Ok(v) =
            HeaderValue::from_str(&format!("{kind}; filename=\"{}\"", file_name(&name, wave)))
        {
            parts.headers.insert(header::CONTENT_DISPOSITION, v);
        }
    }
    if is_csv {
        let item = path.rsplit('/').next().unwrap_or("");
        let query_part = if raw_query.is_empty() {
            String::new()
        } else {
            format!("?{raw_query}")
        };
        if let Ok(v) = HeaderValue::from_str(&format!(
            "<{item}.json{query_part}>; rel=\"describedby\"; type=\"application/json\""
        )) {
            parts.headers.insert(header::LINK, v);
        }
        return Response::from_parts(parts, body);
    }
    let Ok(bytes) = axum::body::to_bytes(body, usize::MAX).await else {
        return (
            StatusCode::INTERNAL_SERVER_ERROR,
            "the chart could not be read",
        )
            .into_response();
    };
    let svg = String::from_utf8_lossy(&bytes);
    let title = state.project().manifest.title.clone();
    let noted = with_footnote(&svg, &footnote(&title, &described, all_waves));
    parts.headers.remove(header::CONTENT_LENGTH);
    Response::from_parts(parts, Body::from(noted))
}

fn sidecar(state: &AppState, csv: &str, query: &Query) -> Response {
    let project = state.project();
    let Some(d) = describe(state, csv, query) else {
        return (
            StatusCode::BAD_REQUEST,
            "the settings in the address do not parse; open the table's page and download again",
        )
            .into_response();
    };
    let name = csv_name(csv);
    let mut url = form_urlencoded::Serializer::new(d.settings.to_query());
    url.extend_pairs(d.own.iter());
    let body = Sidecar {
        file: file_name(&name, d.settings.wave),
        url: format!("{csv}?{}", url.finish()),
        tool: format!("gapwise {}", crate::VERSION),
        project: project.manifest.title.clone(),
        revision: project.revision,
        wave: d.settings.wave.unwrap_or_default(),
        settings: d.settings,
        plan: d.plan,
        impact: d.impact,
        projection: d.projection,
        inputs: project.inputs.clone(),
    };
    axum::Json(body).into_response()
}

/// The file name each CSV download is saved under, before its wave is added.
pub fn csv_name(path: &str) -> String {
    match path {
        "/model/weights.csv" => "country-weights.csv",
        "/model/coefficients.csv" => "participation-model.csv",
        "/balance/table.csv" => "balance.csv",
        "/plan/plan.csv" => "recruitment-plan.csv",
        "/plan/baselines.csv" => "recruitment-baselines.csv",
        "/plan/candidates.csv" => "recruitment-candidates.csv",
        "/coverage/points.csv" => "component-scores.csv",
        "/coverage/loadings.csv" => "component-loadings.csv",
        "/coverage/rates.csv" => "coverage-rates.csv",
        "/impact/table.csv" => "impact.csv",
        "/projection/table.csv" => "projection.csv",
        "/sensitivity/table.csv" => "sensitivity.csv",
        other => other.rsplit('/').next().unwrap_or("table.csv"),
    }
    .to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_carry_the_wave() {
        assert_eq!(file_name("balance.csv", Some(4)), "balance-wave4.csv");
        assert_eq!(
            file_name("coverage-by-region.svg", None),
            "coverage-by-region-all-waves.svg"
        );
    }

    #[test]
    fn the_footnote_grows_the_canvas() {
        let svg = r#"<svg width="960" height="540" viewBox="0 0 960 540" xmlns="http://www.w3.org/2000/svg"><rect/></svg>"#;
        let noted = with_footnote(svg, &["a & b".to_string(), "c".to_string()]);
        assert!(
            noted.starts_with(r#"<svg width="960" height="580" viewBox="0 0 960 580""#),
            "{noted}"
        );
        assert!(noted.contains("a &amp; b"));
        assert!(noted.ends_with("</g></svg>"));
        // Not an SVG with a size: unchanged.
        assert_eq!(
            with_footnote("<svg><g/></svg>", &["x".into()]),
            "<svg><g/></svg>"
        );
    }

    #[test]
    fn long_lines_wrap_at_spaces() {
        let lines = wrap("aaa bbb ccc", 7);
        assert_eq!(lines, vec!["aaa bbb", "ccc"]);
    }
}
