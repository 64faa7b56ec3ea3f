//! Projects from the browser: upload, map the columns, save atomically keeping previous
//! versions; bad uploads get the validator's messages and change nothing on disk; a save
//! crashed at any step leaves the previous or the new project, intact and loadable.

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

/// The upload id from the redirect to the mapping form.
fn upload_id(r: &Response) -> String {
    r.header("location")
        .and_then(|l| l.split_once("&upload="))
        .map(|(_, id)| id.to_string())
        .unwrap_or_default()
}

/// Posts the mapping form of one upload.
fn save_mapping(addr: std::net::SocketAddr, origin: &str, mapping: &str, upload: &str) -> Response {
    http_body(
        addr,
        "POST",
        "/projects/map",
        &[("Origin", origin)],
        "application/x-www-form-urlencoded",
        format!("{mapping}&upload={upload}").as_bytes(),
    )
}

/// The version folders of a saved project, oldest first.
fn versions(projects: &std::path::Path, name: &str) -> Vec<std::path::PathBuf> {
    let mut v: Vec<_> = std::fs::read_dir(projects.join(name).join("versions"))
        .map(|d| d.filter_map(Result::ok).map(|e| e.path()).collect())
        .unwrap_or_default();
    v.sort();
    v
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
    let id = upload_id(&r);
    assert_eq!(id.len(), 16, "{:?}", r.header("location"));
    let form = http(
        addr,
        "GET",
        &format!("/projects/map?name=p1&upload={id}"),
        &[],
    );
    assert_eq!(form.status, 200);
    assert!(form.body.contains("<option>took_part</option>"));
    assert!(form
        .body
        .contains(&format!("name=\"upload\" value=\"{id}\"")));

    let saved = save_mapping(addr, &origin, MAPPING, &id);
    assert_eq!(saved.status, 303, "{}", saved.body);
    let p1 = projects.path().join("p1");
    assert!(Project::load(&p1).is_ok());
    let overview: serde_json::Value =
        serde_json::from_str(&http(addr, "GET", "/api/overview", &[]).body).unwrap();
    assert_eq!(overview["title"], "Browser programme");
    assert_eq!(store::list(projects.path()), vec!["p1".to_string()]);

    // A second version keeps the first; saved twice within a second, the names differ.
    let r = upload(addr, &origin, "p1", FRAME.replace("9.5", "9.7").as_bytes());
    assert_eq!(r.status, 303);
    let saved = save_mapping(addr, &origin, MAPPING, &upload_id(&r));
    assert_eq!(saved.status, 303);
    let kept = versions(projects.path(), "p1");
    assert_eq!(kept.len(), 2, "{kept:?}");
    assert!(std::fs::read_to_string(kept[0].join("frame.csv"))
        .unwrap()
        .contains("9.5"));
    assert!(
        std::fs::read_to_string(store::resolve(&p1).join("frame.csv"))
            .unwrap()
            .contains("9.7")
    );
    // The staging folders are gone once saved.
    assert!(!std::fs::read_dir(projects.path())
        .unwrap()
        .filter_map(Result::ok)
        .any(|e| e.file_name().to_string_lossy().starts_with(".staging-")));

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
        let saved = save_mapping(addr, &origin, &mapping, &upload_id(&r));
        assert_eq!(saved.status, 422, "{name}");
        assert!(saved.body.contains(expected), "{name}: {}", saved.body);
        assert!(
            !projects.path().join(name).exists(),
            "{name} was saved despite problems"
        );
    }
    // A mapping that names a missing column.
    let r = upload(addr, &origin, "nocol", FRAME.as_bytes());
    assert_eq!(r.status, 303);
    let mapping = MAPPING
        .replace("name=p1", "name=nocol")
        .replace("participation=took_part", "participation=gdp");
    let saved = save_mapping(addr, &origin, &mapping, &upload_id(&r));
    assert_eq!(saved.status, 422);
    assert!(!projects.path().join("nocol").exists());
    // Names that would leave the folder are refused.
    assert_eq!(
        upload(addr, &origin, "../escape", FRAME.as_bytes()).status,
        400
    );
    assert!(store::list(projects.path()).is_empty());
}

/// Stages an upload of the test project (frame with `frame`) directly on disk.
fn stage(projects: &std::path::Path, name: &str, frame: &str) -> String {
    let (id, dir) = store::new_staging(projects, name).unwrap();
    std::fs::write(dir.join("project.toml"), MANIFEST).unwrap();
    std::fs::write(dir.join("frame.csv"), frame).unwrap();
    std::fs::write(dir.join("microdata.csv"), MICRODATA).unwrap();
    id
}

fn gdp_of_first_row(projects: &std::path::Path, name: &str) -> Option<String> {
    let project = Project::load(&projects.join(name)).ok()?;
    Some(project.frame.numbers("gdp")[0]?.to_string())
}

#[test]
fn a_save_crashed_at_any_step_leaves_the_old_or_the_new_project() {
    for (i, step) in store::STEPS.iter().enumerate() {
        let projects = TempDir::new(&format!("crash{i}"));
        let id = stage(projects.path(), "p1", FRAME);
        store::save(projects.path(), "p1", &id, 3).expect("first save");
        let id = stage(projects.path(), "p1", &FRAME.replace("9.5", "9.7"));
        assert!(
            store::save_with_crash(projects.path(), "p1", &id, 3, Some(*step)).is_err(),
            "{step:?}"
        );
        // The restart: recovery, then the project must load, old or new, never lost.
        store::recover(projects.path(), 3);
        assert_eq!(
            store::list(projects.path()),
            vec!["p1".to_string()],
            "{step:?}"
        );
        let gdp = gdp_of_first_row(projects.path(), "p1");
        let switched = matches!(
            step,
            store::Step::PointerSwitched | store::Step::FolderSynced | store::Step::Pruned
        );
        let expected = if switched { "9.7" } else { "9.5" };
        assert_eq!(gdp.as_deref(), Some(expected), "crash after {step:?}");
        // Nothing is left over: no staging, no half switch, no uncommitted version.
        let leftovers: Vec<String> = std::fs::read_dir(projects.path())
            .unwrap()
            .chain(std::fs::read_dir(projects.path().join("p1")).unwrap())
            .filter_map(Result::ok)
            .map(|e| e.file_name().to_string_lossy().to_string())
            .filter(|n| n.starts_with(".staging-") || n.contains(".tmp-"))
            .collect();
        assert!(leftovers.is_empty(), "{step:?}: {leftovers:?}");
        assert_eq!(
            versions(projects.path(), "p1").len(),
            if switched { 2 } else { 1 },
            "{step:?}"
        );
        // And the next save works.
        let id = stage(projects.path(), "p1", &FRAME.replace("9.5", "9.9"));
        store::save(projects.path(), "p1", &id, 3).expect("save after recovery");
        assert_eq!(
            gdp_of_first_row(projects.path(), "p1").as_deref(),
            Some("9.9")
        );
    }
    // A first save crashed before its switch: nothing was committed, nothing is listed.
    for step in &store::STEPS[..4] {
        let projects = TempDir::new("firstcrash");
        let id = stage(projects.path(), "p2", FRAME);
        let _ = store::save_with_crash(projects.path(), "p2", &id, 3, Some(*step));
        store::recover(projects.path(), 3);
        assert!(store::list(projects.path()).is_empty(), "{step:?}");
        assert!(!projects.path().join("p2").exists(), "{step:?}");
    }
}

#[test]
fn a_half_written_upload_is_refused_and_the_previous_project_stays() {
    let projects = TempDir::new("interrupted");
    let id = stage(projects.path(), "p1", FRAME);
    store::save(projects.path(), "p1", &id, 3).unwrap();
    let id = stage(projects.path(), "p1", &FRAME[..FRAME.len() / 2]);
    assert!(store::save(projects.path(), "p1", &id, 3).is_err());
    assert_eq!(
        gdp_of_first_row(projects.path(), "p1").as_deref(),
        Some("9.5")
    );
    assert_eq!(store::list(projects.path()), vec!["p1".to_string()]);
}

#[test]
fn two_uploads_under_one_name_do_not_mix_and_versions_are_bounded() {
    let projects = TempDir::new("twotabs");
    // Two tabs upload under one name before either saves.
    let a = stage(projects.path(), "p1", FRAME);
    let b = stage(projects.path(), "p1", &FRAME.replace("9.5", "9.7"));
    assert_ne!(a, b);
    store::save(projects.path(), "p1", &b, 2).unwrap();
    assert_eq!(
        gdp_of_first_row(projects.path(), "p1").as_deref(),
        Some("9.7")
    );
    store::save(projects.path(), "p1", &a, 2).unwrap();
    assert_eq!(
        gdp_of_first_row(projects.path(), "p1").as_deref(),
        Some("9.5")
    );
    // Saves in parallel, many in the same second: each gets its own version.
    let handles: Vec<_> = (0..6)
        .map(|i| {
            let id = stage(
                projects.path(),
                "p1",
                &FRAME.replace("9.5", &format!("9.{i}")),
            );
            let dir = projects.path().to_path_buf();
            std::thread::spawn(move || store::save(&dir, "p1", &id, 2).is_ok())
        })
        .collect();
    for h in handles {
        assert!(h.join().unwrap(), "a parallel save failed");
    }
    assert_eq!(versions(projects.path(), "p1").len(), 2, "keep 2 versions");
    assert!(Project::load(&projects.path().join("p1")).is_ok());
    // Stale staging folders go at start-up.
    let _ = stage(projects.path(), "p3", FRAME);
    store::recover(projects.path(), 2);
    assert!(!std::fs::read_dir(projects.path())
        .unwrap()
        .filter_map(Result::ok)
        .any(|e| e.file_name().to_string_lossy().starts_with(".staging-")));
}

#[test]
fn an_earlier_releases_interrupted_save_is_restored() {
    // Only NAME.previous-SECONDS and a staging folder remained of a project.
    let projects = TempDir::new("legacy");
    let previous = projects.path().join("p1.previous-1700000000");
    std::fs::create_dir_all(&previous).unwrap();
    for (file, text) in [
        ("project.toml", MANIFEST),
        ("frame.csv", FRAME),
        ("microdata.csv", MICRODATA),
    ] {
        std::fs::write(previous.join(file), text).unwrap();
    }
    std::fs::create_dir_all(projects.path().join(".staging-p1")).unwrap();
    assert!(store::list(projects.path()).is_empty());
    let repairs = store::recover(projects.path(), 3);
    assert_eq!(repairs.len(), 2, "{repairs:?}");
    assert_eq!(store::list(projects.path()), vec!["p1".to_string()]);
    // A folder of the earlier layout takes new versions.
    let id = stage(projects.path(), "p1", &FRAME.replace("9.5", "9.7"));
    store::save(projects.path(), "p1", &id, 3).unwrap();
    assert_eq!(
        gdp_of_first_row(projects.path(), "p1").as_deref(),
        Some("9.7")
    );
}

#[test]
fn reserved_names_case_clashes_and_symlinks_are_refused() {
    let projects = TempDir::new("names");
    let (addr, _) = start_server_full(&demo_dir(), Some(projects.path().to_path_buf()));
    let origin = format!("http://{addr}");
    for name in ["CON", "nul", "Com1"] {
        let r = upload(addr, &origin, name, FRAME.as_bytes());
        assert_eq!(r.status, 400, "{name}");
        assert!(r.body.contains("reserves it"), "{}", r.body);
    }
    let id = stage(projects.path(), "Survey", FRAME);
    store::save(projects.path(), "Survey", &id, 3).unwrap();
    let id = stage(projects.path(), "survey", FRAME);
    let refused = store::save(projects.path(), "survey", &id, 3).unwrap_err();
    assert!(
        refused[0].to_string().contains("differ only in case"),
        "{refused:?}"
    );
    let open = |name: &str| {
        http_body(
            addr,
            "POST",
            "/projects/open",
            &[("Origin", origin.as_str())],
            "application/x-www-form-urlencoded",
            format!("name={name}").as_bytes(),
        )
    };
    assert_eq!(open("survey").status, 400);
    assert_eq!(open("Survey").status, 303);
    #[cfg(unix)]
    {
        let outside = valid_project("outside");
        std::os::unix::fs::symlink(outside.path(), projects.path().join("linked")).unwrap();
        assert!(!store::list(projects.path()).contains(&"linked".to_string()));
        let r = open("linked");
        assert_eq!(r.status, 400, "{}", r.body);
        let id = stage(projects.path(), "linked2", FRAME);
        std::os::unix::fs::symlink(outside.path(), projects.path().join("linked2")).unwrap();
        assert!(store::save(projects.path(), "linked2", &id, 3).is_err());
    }
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

#[test]
fn a_parquet_bomb_is_refused_from_its_metadata() {
    use polars::prelude::*;
    let projects = TempDir::new("bomb");
    let (addr, _) = start_server_full(&demo_dir(), Some(projects.path().to_path_buf()));
    let origin = format!("http://{addr}");
    // 3 million identical rows compress to a few kilobytes.
    let n = 3_000_000;
    let mut frame = df!(
        "iso" => vec!["XAA"; n],
        "wave" => vec![1i64; n],
        "took_part" => vec![1i64; n],
    )
    .unwrap();
    let mut bytes = Vec::new();
    ParquetWriter::new(&mut bytes).finish(&mut frame).unwrap();
    assert!(bytes.len() < 1_000_000, "{} bytes", bytes.len());
    let (ct, body) = multipart(
        &[("name", "bomb")],
        &[("frame", "frame.parquet", bytes.as_slice())],
    );
    let started = std::time::Instant::now();
    let r = http_body(
        addr,
        "POST",
        "/projects/upload",
        &[("Origin", origin.as_str())],
        &ct,
        &body,
    );
    assert_eq!(r.status, 400, "{}", r.body);
    assert!(
        r.body
            .contains("3000000 rows and 3 columns; the limits are 100000 rows"),
        "{}",
        r.body
    );
    assert!(started.elapsed().as_secs() < 5, "{:?}", started.elapsed());
    // Nothing was staged.
    assert_eq!(std::fs::read_dir(projects.path()).unwrap().count(), 0);
}
