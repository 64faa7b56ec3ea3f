//! The server: the overview answers with its tables, chart and cautions; the JSON twin
//! carries the same numbers; reload swaps the project and keeps the old one on errors.

mod common;
use common::*;

#[test]
fn overview_page_and_json_twin_agree() {
    let addr = start_server(&demo_dir());
    let page = get(addr, "/");
    assert_eq!(page.status, 200);
    assert!(page
        .header("content-type")
        .unwrap_or("")
        .starts_with("text/html"));
    for needle in [
        "<svg",
        "Coverage by region",
        "Eligible and participating countries per wave",
        "Weights correct only for what the indicators measure",
        "/static/gapwise.css",
    ] {
        assert!(page.body.contains(needle), "page lacks {needle}");
    }
    let api = get(addr, "/api/overview");
    assert_eq!(api.status, 200);
    let v: serde_json::Value = serde_json::from_str(&api.body).unwrap();
    for w in v["waves"].as_array().unwrap() {
        let row = format!(
            "<tr><th scope=\"row\">{}</th><td>{}</td><td>{}</td><td>{}</td>",
            w["wave"], w["rows"], w["eligible"], w["participating"]
        );
        assert!(page.body.contains(&row), "page lacks {row}");
    }
    let svg = get(addr, "/charts/coverage.svg");
    assert_eq!(svg.status, 200);
    assert_eq!(svg.header("content-type"), Some("image/svg+xml"));
    assert!(svg.body.contains("Savanna Belt"));
    let css = get(addr, "/static/gapwise.css");
    assert_eq!(css.status, 200);
    assert_eq!(get(addr, "/nowhere").status, 404);
}

#[test]
fn reload_swaps_project_and_keeps_old_on_error() {
    let dir = valid_project("reload");
    let (addr, token) = start_server_with_token(dir.path());
    // Without the key header or a same-origin header a change is refused.
    assert_eq!(http(addr, "POST", "/api/reload", &[]).status, 403);
    assert_eq!(
        http(
            addr,
            "POST",
            "/api/reload",
            &[("Origin", "http://evil.example")]
        )
        .status,
        403
    );
    let auth = [("x-gapwise-key", token.as_str())];
    let before: serde_json::Value = get_json(addr, "/api/overview");
    assert_eq!(before["title"], "Test programme");

    dir.write(
        "project.toml",
        MANIFEST.replace("Test programme", "Renamed programme"),
    );
    let r = http(addr, "POST", "/api/reload", &auth);
    assert_eq!(r.status, 200, "{}", r.body);
    let after: serde_json::Value = get_json(addr, "/api/overview");
    assert_eq!(after["title"], "Renamed programme");

    dir.write("frame.csv", "");
    let origin = format!("http://{addr}");
    let r = http(addr, "POST", "/api/reload", &[("Origin", origin.as_str())]);
    assert_eq!(r.status, 422);
    assert!(
        r.body.contains("frame.csv:-:-: the file is empty"),
        "{}",
        r.body
    );
    let kept: serde_json::Value = get_json(addr, "/api/overview");
    assert_eq!(kept["title"], "Renamed programme");
}

#[test]
fn page_errors_show_in_the_layout_while_twins_and_downloads_stay_plain_text() {
    // Common practice: people get a page with a way back; programs get a status and text.
    let addr = start_server(&demo_dir());
    let page = get(addr, "/balance?wave=99");
    assert_eq!(page.status, 404, "no such wave: {}", page.body);
    assert!(page
        .header("content-type")
        .unwrap_or("")
        .starts_with("text/html"));
    assert!(page.body.contains("<nav"), "inside the layout");
    assert!(
        page.body.contains("wave 99") || page.body.contains("99"),
        "{}",
        page.body
    );
    for path in ["/api/balance?wave=99", "/balance/balance.csv?wave=99"] {
        let r = get(addr, path);
        assert_eq!(r.status, 404, "{path}: {}", r.body);
        let kind = r.header("content-type").unwrap_or("");
        assert!(kind.starts_with("text/plain"), "{path}: {kind}");
        assert!(!r.body.contains("<html"), "{path}");
        assert!(r.body.contains("99"), "{path}: {}", r.body);
    }
    // A page that does not exist: 404 in the layout too.
    let missing = get(addr, "/no-such-page");
    assert_eq!(missing.status, 404);
}

#[test]
fn every_page_title_is_plain_text() {
    // Common practice: a <title> holds text only; markup there means a template's blocks
    // were crossed (the browser tab would show raw HTML).
    let addr = start_server(&demo_dir());
    for page in [
        "/",
        "/coverage",
        "/model",
        "/balance",
        "/plan?replicates=0",
        "/impact?replicates=0",
        "/projection",
        "/sensitivity",
    ] {
        let r = get(addr, page);
        assert_eq!(r.status, 200, "{page}");
        let title = r
            .body
            .split("<title>")
            .nth(1)
            .and_then(|t| t.split("</title>").next())
            .unwrap_or("");
        assert!(!title.is_empty(), "{page} has a title");
        assert!(!title.contains('<'), "{page}: {title}");
    }
}

/// The text of an HTML fragment without its tags (attribute values such as a checkbox's
/// `value="log_gdp_pc"` are not shown, so they do not count).
fn shown_text(html: &str) -> String {
    let mut out = String::new();
    let mut in_tag = false;
    for ch in html.chars() {
        match ch {
            '<' => in_tag = true,
            '>' => {
                in_tag = false;
                out.push(' ');
            }
            c if !in_tag => out.push(c),
            _ => {}
        }
    }
    out
}

/// The first element of `html` that starts with `start`, up to `end`.
fn fragment<'a>(html: &'a str, start: &str, end: &str) -> &'a str {
    let from = html
        .find(start)
        .unwrap_or_else(|| panic!("no {start} in the page"));
    let rest = &html[from..];
    &rest[..rest.find(end).map_or(rest.len(), |e| e + end.len())]
}

#[test]
fn raw_column_names_never_reach_the_missing_note_or_the_predictor_list() {
    // The demo with its [indicators.labels] removed: every label is then derived from the
    // column name (`internet_use` -> "Internet use"), and no raw name with an underscore
    // may be shown in the balance page's note on missing values or in the impact page's
    // outcome and predictor lists (our own rule, README "[indicators.labels]").
    let dir = TempDir::new("no-labels");
    for f in ["frame.csv", "microdata.csv"] {
        std::fs::copy(demo_dir().join(f), dir.path().join(f)).unwrap();
    }
    let manifest = std::fs::read_to_string(demo_dir().join("project.toml")).unwrap();
    let start = manifest.find("[indicators.labels]").unwrap();
    let end = start + manifest[start..].find("\n\n").unwrap();
    let stripped = format!("{}{}", &manifest[..start], &manifest[end..]);
    assert!(!stripped.contains("GDP per head"));
    dir.write("project.toml", &stripped);
    let m: toml::Value = toml::from_str(&stripped).unwrap();
    let names: Vec<String> = ["numeric", "categorical"]
        .iter()
        .flat_map(|k| m["indicators"][*k].as_array().unwrap().clone())
        .chain(m["microdata"]["variables"].as_array().unwrap().clone())
        .map(|v| v.as_str().unwrap().to_string())
        .filter(|n| n.contains('_'))
        .collect();
    assert!(names.len() >= 5, "{names:?}");
    let raw_in = |text: &str| -> Vec<String> {
        names
            .iter()
            .filter(|n| text.contains(n.as_str()))
            .cloned()
            .collect()
    };
    let addr = start_server(dir.path());
    let mut notes_with_indicators = 0;
    for wave in 1..=4 {
        for missing in ["complete-cases", "median-fill", "fill-and-balance"] {
            let page = get(addr, &format!("/balance?wave={wave}&missing={missing}"));
            assert_eq!(page.status, 200, "wave {wave} {missing}");
            let note = shown_text(fragment(&page.body, "<p class=\"lead\">", "</p>"));
            assert!(raw_in(&note).is_empty(), "wave {wave} {missing}: {note}");
            if note.contains("Internet use") || note.contains("Literacy") {
                notes_with_indicators += 1;
            }
        }
    }
    // The check can fail: some notes name indicators (the demo has missing values).
    assert!(notes_with_indicators > 0);
    let page = get(addr, "/impact?wave=4&bootstrap=0");
    assert_eq!(page.status, 200);
    let form = fragment(&page.body, "aria-label=\"Model settings\"", "</form>");
    let predictors = fragment(form, "<legend>Predictors</legend>", "</fieldset>");
    assert!(predictors.contains("value=\"log_gdp_pc\""), "{predictors}");
    assert!(
        predictors.contains("value=\"income_decile\""),
        "{predictors}"
    );
    let shown = shown_text(form);
    assert!(raw_in(&shown).is_empty(), "{:?} in {shown}", raw_in(&shown));
    assert!(shown.contains("GDP pc (log) (country)"), "{shown}");
    assert!(shown.contains("Income decile"), "{shown}");
    let headings = shown_text(fragment(&page.body, "<section id=\"pooled\">", "</h2>"));
    assert!(raw_in(&headings).is_empty(), "{headings}");
}

#[path = "../benches/common/routes.rs"]
mod routes;

#[test]
fn the_benchmarks_request_every_route_of_the_router() {
    // Our own rule: `cargo bench --bench pages` and `--bench load` time every GET route
    // of the router (the projects pages need --projects and are left out), and every
    // route they request answers.
    let source = std::fs::read_to_string(
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("server/web/mod.rs"),
    )
    .unwrap();
    let compact: String = source.split_whitespace().collect();
    let mut patterns = Vec::new();
    for piece in compact.split(".route(\"").skip(1) {
        let Some((path, rest)) = piece.split_once("\",") else {
            continue;
        };
        if rest.starts_with("get(") && !path.starts_with("/projects") {
            patterns.push(path.to_string());
        }
    }
    assert!(patterns.len() >= 25, "{patterns:?}");
    let matches = |pattern: &str, route: &str| {
        let path = route.split('?').next().unwrap_or(route);
        let (p, r): (Vec<&str>, Vec<&str>) =
            (pattern.split('/').collect(), path.split('/').collect());
        p.len() == r.len()
            && p.iter()
                .zip(&r)
                .all(|(a, b)| a == b || (a.starts_with('{') && !b.is_empty()))
    };
    for pattern in &patterns {
        assert!(
            routes::ROUTES.iter().any(|r| matches(pattern, r)),
            "{pattern} is not in benches/common/routes.rs"
        );
    }
    for needed in [
        "/api/impact/bounds",
        "/impact/bounds/bounds.svg",
        "/impact/bounds/bounds.csv",
    ] {
        assert!(routes::ROUTES.contains(&needed), "{needed}");
    }
    let addr = start_server(&demo_dir());
    for route in routes::ROUTES {
        let r = get(addr, route);
        assert_eq!(r.status, 200, "{route}: {}", r.body);
    }
}
