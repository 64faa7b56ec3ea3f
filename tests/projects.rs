//! Projects from the browser: upload, map the columns, save atomically keeping the previous
//! version; bad uploads get the validator's messages and change nothing on disk; an
//! interrupted save leaves the previous project intact and loadable.

mod common;
use common::*;

use gapwise::project::{store, Project};

const MAPPING: &str = "name=p1&title=Browser+programme&code=iso&country_name=name&wave=wave&participation=took_part&group=region&numeric=gdp&numeric=democracy&categorical=region&rule_indicator=democracy&rule_at_least=lowest-participant&micro_country=iso&micro_wave=wave&micro_weight=dweight&micro_variable=trust";

fn upload(addr: std::net::SocketAddr, origin: &str, name: &str, frame: &[u8]) -> Response {
    let (ct, body) = multipart(
        &[("name", name), ("title", "Browser programme")],
        &[
            ("frame", "frame.csv", frame),
            ("microdata", "microdata.csv", MICRODATA.as_bytes()),
        ],
    );
    http_body(
        addr,
        "POST",
        "/projects/upload",
        &[("Origin", origin)],
        &ct,
        &body,
    )
}

#[test]
fn upload_map_save_and_keep_previous_version() {
    let projects = TempDir::new("projects");
    let (addr, _) = start_server_full(&demo_dir(), Some(projects.path().to_path_buf()));
    let origin = format!("http://{addr}");

    // Changes need our own origin (or the token).
    let (ct, body) = multipart(
        &[("name", "p1")],
        &[("frame", "frame.csv", FRAME.as_bytes())],
    );
    assert_eq!(
        http_body(addr, "POST", "/projects/upload", &[], &ct, &body).status,
        403
    );

    let r = upload(addr, &origin, "p1", FRAME.as_bytes());
    assert_eq!(r.status, 303, "{}", r.body);
    assert_eq!(r.header("location"), Some("/projects/map?name=p1"));
    let form = http(addr, "GET", "/projects/map?name=p1", &[]);
    assert_eq!(form.status, 200);
    assert!(form.body.contains("<option>took_part</option>"));

    let saved = http_body(
        addr,
        "POST",
        "/projects/map",
        &[("Origin", origin.as_str())],
        "application/x-www-form-urlencoded",
        MAPPING.as_bytes(),
    );
    assert_eq!(saved.status, 303, "{}", saved.body);
    let p1 = projects.path().join("p1");
    assert!(Project::load(&p1).is_ok());
    let overview: serde_json::Value =
        serde_json::from_str(&http(addr, "GET", "/api/overview", &[]).body).unwrap();
    assert_eq!(overview["title"], "Browser programme");
    assert_eq!(store::list(projects.path()), vec!["p1".to_string()]);

    // A second version keeps the first.
    assert_eq!(
        upload(addr, &origin, "p1", FRAME.replace("9.5", "9.7").as_bytes()).status,
        303
    );
    let saved = http_body(
        addr,
        "POST",
        "/projects/map",
        &[("Origin", origin.as_str())],
        "application/x-www-form-urlencoded",
        MAPPING.as_bytes(),
    );
    assert_eq!(saved.status, 303);
    let previous: Vec<_> = std::fs::read_dir(projects.path())
        .unwrap()
        .filter_map(Result::ok)
        .filter(|e| e.file_name().to_string_lossy().starts_with("p1.previous-"))
        .collect();
    assert_eq!(previous.len(), 1);
    assert!(
        std::fs::read_to_string(previous[0].path().join("frame.csv"))
            .unwrap()
            .contains("9.5")
    );
    assert!(std::fs::read_to_string(p1.join("frame.csv"))
        .unwrap()
        .contains("9.7"));

    // The projects page lists it, and opening it works.
    let list = http(addr, "GET", "/projects", &[]);
    assert!(list.body.contains("p1"));
    let open = http_body(
        addr,
        "POST",
        "/projects/open",
        &[("Origin", origin.as_str())],
        "application/x-www-form-urlencoded",
        b"name=p1",
    );
    assert_eq!(open.status, 303);
}

#[test]
fn bad_uploads_get_the_validators_messages_and_change_nothing() {
    let projects = TempDir::new("badprojects");
    let (addr, _) = start_server_full(&demo_dir(), Some(projects.path().to_path_buf()));
    let origin = format!("http://{addr}");
    let cases: Vec<(&str, String, &str)> = vec![
        (
            "ragged",
            FRAME.replace("XAB,Bland,1,0,8.1,6.5,South", "XAB,Bland,1,0,8.1"),
            "frame.csv:3:democracy: the row has 5 fields",
        ),
        (
            "flag",
            FRAME.replace("XAB,Bland,1,0,", "XAB,Bland,1,2,"),
            "frame.csv:3:took_part:",
        ),
        (
            "text",
            FRAME.replace("XAD,Dland,1,0,7.0,", "XAD,Dland,1,0,low,"),
            "frame.csv:5:gdp: &#34;low&#34; is not a number",
        ),
        (
            "duplicate",
            format!("{FRAME}XAB,Bland,2,0,8.2,6.6,South\n"),
            "appears twice in wave 2",
        ),
        ("empty", String::new(), "choose a frame file"),
    ];
    for (name, frame, expected) in cases {
        let r = upload(addr, &origin, name, frame.as_bytes());
        if r.status == 400 {
            assert!(r.body.contains(expected), "{name}: {}", r.body);
            continue;
        }
        assert_eq!(r.status, 303, "{name}: {}", r.body);
        let mapping = MAPPING.replace("name=p1", &format!("name={name}"));
        let saved = http_body(
            addr,
            "POST",
            "/projects/map",
            &[("Origin", origin.as_str())],
            "application/x-www-form-urlencoded",
            mapping.as_bytes(),
        );
        assert_eq!(saved.status, 422, "{name}");
        assert!(saved.body.contains(expected), "{name}: {}", saved.body);
        assert!(
            !projects.path().join(name).exists(),
            "{name} was saved despite problems"
        );
    }
    // A mapping that names a missing column.
    assert_eq!(upload(addr, &origin, "nocol", FRAME.as_bytes()).status, 303);
    let mapping = MAPPING
        .replace("name=p1", "name=nocol")
        .replace("participation=took_part", "participation=gdp");
    let saved = http_body(
        addr,
        "POST",
        "/projects/map",
        &[("Origin", origin.as_str())],
        "application/x-www-form-urlencoded",
        mapping.as_bytes(),
    );
    assert_eq!(saved.status, 422);
    assert!(!projects.path().join("nocol").exists());
    // Names that would leave the folder are refused.
    assert_eq!(
        upload(addr, &origin, "../escape", FRAME.as_bytes()).status,
        400
    );
    assert!(store::list(projects.path()).is_empty());
}

#[test]
fn an_interrupted_save_leaves_the_previous_project_intact() {
    let projects = TempDir::new("interrupted");
    let p1 = projects.path().join("p1");
    std::fs::create_dir_all(&p1).unwrap();
    for (file, text) in [
        ("project.toml", MANIFEST),
        ("frame.csv", FRAME),
        ("microdata.csv", MICRODATA),
    ] {
        std::fs::write(p1.join(file), text).unwrap();
    }
    // A save that stopped midway: the staging folder holds a half-written frame.
    let staging = store::staging(projects.path(), "p1", true).unwrap();
    std::fs::write(staging.join("project.toml"), MANIFEST).unwrap();
    std::fs::write(staging.join("frame.csv"), &FRAME[..FRAME.len() / 2]).unwrap();
    assert!(
        Project::load(&p1).is_ok(),
        "the previous project must stay loadable"
    );
    // Finishing that save is refused, and the previous project is untouched.
    assert!(store::save(projects.path(), "p1").is_err());
    assert_eq!(
        std::fs::read_to_string(p1.join("frame.csv")).unwrap(),
        FRAME
    );
    assert!(Project::load(&p1).is_ok());
    assert_eq!(store::list(projects.path()), vec!["p1".to_string()]);
}

#[test]
fn uploads_over_the_limits_get_clear_errors() {
    let projects = TempDir::new("limits");
    let (addr, _) = start_server_full(&demo_dir(), Some(projects.path().to_path_buf()));
    let origin = format!("http://{addr}");
    let mut big = String::from("iso,name,wave,took_part,gdp,democracy,region\n");
    for i in 0..100_001 {
        big.push_str(&format!("X{i},N,1,0,1,1,R\n"));
    }
    let r = upload(addr, &origin, "big", big.as_bytes());
    assert_eq!(r.status, 400);
    assert!(r.body.contains("the limits are 100000 rows"), "{}", r.body);
    let wide = format!(
        "{}\n",
        (0..1_001)
            .map(|i| format!("c{i}"))
            .collect::<Vec<_>>()
            .join(",")
    );
    let r = upload(addr, &origin, "wide", wide.as_bytes());
    assert_eq!(r.status, 400);
    assert!(r.body.contains("1001 columns"), "{}", r.body);
    assert!(store::list(projects.path()).is_empty());
}
