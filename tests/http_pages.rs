//! The server: the overview answers with its tables, chart and cautions; the JSON twin
//! carries the same numbers; reload swaps the project and keeps the old one on errors.

mod common;
use common::*;

#[test]
fn overview_page_and_json_twin_agree() {
    let addr = start_server(&demo_dir());
    let page = http(addr, "GET", "/", &[]);
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
    let api = http(addr, "GET", "/api/overview", &[]);
    assert_eq!(api.status, 200);
    let v: serde_json::Value = serde_json::from_str(&api.body).unwrap();
    for w in v["waves"].as_array().unwrap() {
        let row = format!(
            "<tr><th scope=\"row\">{}</th><td>{}</td><td>{}</td><td>{}</td>",
            w["wave"], w["rows"], w["eligible"], w["participating"]
        );
        assert!(page.body.contains(&row), "page lacks {row}");
    }
    let svg = http(addr, "GET", "/charts/coverage.svg", &[]);
    assert_eq!(svg.status, 200);
    assert_eq!(svg.header("content-type"), Some("image/svg+xml"));
    assert!(svg.body.contains("Savanna Belt"));
    let css = http(addr, "GET", "/static/gapwise.css", &[]);
    assert_eq!(css.status, 200);
    assert_eq!(http(addr, "GET", "/nowhere", &[]).status, 404);
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
    let before: serde_json::Value =
        serde_json::from_str(&http(addr, "GET", "/api/overview", &[]).body).unwrap();
    assert_eq!(before["title"], "Test programme");

    dir.write(
        "project.toml",
        MANIFEST.replace("Test programme", "Renamed programme"),
    );
    let r = http(addr, "POST", "/api/reload", &auth);
    assert_eq!(r.status, 200, "{}", r.body);
    let after: serde_json::Value =
        serde_json::from_str(&http(addr, "GET", "/api/overview", &[]).body).unwrap();
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
    let kept: serde_json::Value =
        serde_json::from_str(&http(addr, "GET", "/api/overview", &[]).body).unwrap();
    assert_eq!(kept["title"], "Renamed programme");
}

#[test]
fn page_errors_show_in_the_layout_while_twins_and_downloads_stay_plain_text() {
    // Common practice: people get a page with a way back; programs get a status and text.
    let addr = start_server(&demo_dir());
    let page = http(addr, "GET", "/balance?wave=99", &[]);
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
        let r = http(addr, "GET", path, &[]);
        assert_eq!(r.status, 404, "{path}: {}", r.body);
        let kind = r.header("content-type").unwrap_or("");
        assert!(kind.starts_with("text/plain"), "{path}: {kind}");
        assert!(!r.body.contains("<html"), "{path}");
        assert!(r.body.contains("99"), "{path}: {}", r.body);
    }
    // A page that does not exist: 404 in the layout too.
    let missing = http(addr, "GET", "/no-such-page", &[]);
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
        let r = http(addr, "GET", page, &[]);
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
