//! Projects from the browser: upload, map the columns, save atomically keeping previous
//! versions; bad uploads get the validator's messages and change nothing on disk; a save
//! crashed at any step leaves the previous or the new project, intact and loadable.

mod common;
use common::*;

use gapwise::project::{store, Project};

const MAPPING: &str = "name=p1&title=Browser+programme&code=iso&country_name=name&wave=wave&participation=took_part&group=region&numeric=gdp&numeric=democracy&categorical=region&rule_indicator=democracy&rule_at_least=lowest-participant&micro_country=iso&micro_wave=wave&micro_weight=dweight&micro_variable=trust";

/// A server on the demo with an empty folder of projects: the folder, the address and
/// the Origin our pages send.
fn projects_server(tag: &str) -> (TempDir, std::net::SocketAddr, String) {
    let projects = TempDir::new(tag);
    let (addr, _) = start_server_full(&demo_dir(), Some(projects.path().to_path_buf()));
    let origin = format!("http://{addr}");
    (projects, addr, origin)
}

fn upload(addr: std::net::SocketAddr, origin: &str, name: &str, frame: &[u8]) -> Response {
    let (ct, body) = multipart(
        &[("name", name), ("title", "Browser programme")],
        &[
            ("frame", "frame.csv", frame),
            ("microdata", "microdata.csv", MICRODATA.as_bytes()),
        ],
    );
    post_from(addr, origin, "/projects/upload", &ct, &body)
}

/// The upload id from the redirect to the mapping form.
fn upload_id(r: &Response) -> String {
    r.header("location")
        .and_then(|l| l.split_once("&upload="))
        .map(|(_, id)| id.split('&').next().unwrap_or_default().to_string())
        .unwrap_or_default()
}

/// Posts the mapping form of one upload.
fn save_mapping(addr: std::net::SocketAddr, origin: &str, mapping: &str, upload: &str) -> Response {
    post_form(
        addr,
        origin,
        "/projects/map",
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
    let (projects, addr, origin) = projects_server("projects");

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
    let form = get(addr, &format!("/projects/map?name=p1&upload={id}"));
    assert_eq!(form.status, 200);
    assert!(
        form.body
            .contains("<option value=\"took_part\" selected>took_part (0/1 flag)</option>"),
        "{}",
        form.body
    );
    assert!(form
        .body
        .contains(&format!("name=\"upload\" value=\"{id}\"")));

    let saved = save_mapping(addr, &origin, MAPPING, &id);
    assert_eq!(saved.status, 303, "{}", saved.body);
    let p1 = projects.path().join("p1");
    assert!(Project::load(&p1).is_ok());
    let overview: serde_json::Value = get_json(addr, "/api/overview");
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
    let list = get(addr, "/projects");
    assert!(list.body.contains("p1"));
    let open = post_form(addr, &origin, "/projects/open", b"name=p1");
    assert_eq!(open.status, 303);
}

/// An upload the validators refuse: the frame posted, the mapping form saved (its `name=p1`
/// becomes the case's name) and what the refusal says, as `gapwise check` prints it. A
/// bad frame may already be refused at the upload; a bad mapping only at the save.
struct Refusal {
    name: &'static str,
    frame: String,
    mapping: String,
    says: &'static str,
    at_upload_too: bool,
}

impl Refusal {
    /// A bad frame under the good mapping.
    fn frame(name: &'static str, frame: String, says: &'static str) -> Self {
        Refusal {
            name,
            frame,
            mapping: MAPPING.to_string(),
            says,
            at_upload_too: true,
        }
    }

    /// The test frame with its line `line` (1: the header) replaced by `text`, under the
    /// good mapping.
    fn frame_line(name: &'static str, line: usize, text: &str, says: &'static str) -> Self {
        let frame = FRAME
            .lines()
            .enumerate()
            .flat_map(|(j, l)| [if j + 1 == line { text } else { l }, "\n"])
            .collect();
        Refusal::frame(name, frame, says)
    }

    /// The good frame under a bad mapping.
    fn mapping(name: &'static str, mapping: String, says: &'static str) -> Self {
        Refusal {
            name,
            frame: FRAME.to_string(),
            mapping,
            says,
            at_upload_too: false,
        }
    }
}

/// The uploads the validators refuse. The mappings that give one column two roles are
/// the crash of issue 19: the country-name column also ticked as a numeric indicator was
/// saved and then panicked every page and `gapwise check`.
fn refusals() -> Vec<Refusal> {
    vec![
        Refusal::frame_line(
            "ragged",
            3,
            "XAB,Bland,1,0,8.1",
            "frame.csv:3:democracy: the row has 5 fields",
        ),
        Refusal::frame_line(
            "flag",
            3,
            "XAB,Bland,1,2,8.1,6.5,South",
            "frame.csv:3:took_part:",
        ),
        Refusal::frame_line(
            "text",
            5,
            "XAD,Dland,1,0,low,3.0,North",
            "frame.csv:5:gdp: \"low\" is not a number",
        ),
        Refusal::frame(
            "duplicate",
            format!("{FRAME}XAB,Bland,2,0,8.2,6.6,South\n"),
            "appears twice in wave 2",
        ),
        Refusal::frame("empty", String::new(), "choose a frame file"),
        Refusal::mapping(
            "crash-numeric",
            MAPPING.replace("numeric=gdp", "numeric=gdp&numeric=name"),
            "listed both in columns.name",
        ),
        Refusal::mapping(
            "crash-categorical",
            MAPPING.replace("categorical=region", "categorical=region&categorical=name"),
            "listed both in columns.name",
        ),
        Refusal::mapping(
            "crash-rule",
            MAPPING.replace("rule_indicator=democracy", "rule_indicator=region"),
            "one column cannot be both",
        ),
        Refusal::mapping(
            "crash-cost",
            format!("{MAPPING}&cost=region"),
            "one column cannot be both",
        ),
        Refusal::mapping(
            "crash-wave-rule",
            MAPPING.replace("rule_indicator=democracy", "rule_indicator=wave"),
            "one column cannot be both",
        ),
    ]
}

/// Posts `case` through the upload and mapping forms: refused, at the upload (400; a bad
/// frame only) or at the save (422), with its message, and nothing saved. When it gets as
/// far as a mapping, `gapwise check` on the same manifest and files refuses it too: exit
/// 1, the same message, no panic.
fn assert_refused_by_the_form_and_by_check(
    projects: &TempDir,
    addr: std::net::SocketAddr,
    origin: &str,
    case: &Refusal,
) {
    let name = case.name;
    // The pages escape quotes (no message here holds another character they escape).
    let on_page = case.says.replace('"', "&#34;");
    let r = upload(addr, origin, name, case.frame.as_bytes());
    if r.status == 400 && case.at_upload_too {
        assert!(r.body.contains(&on_page), "{name}: {}", r.body);
        return;
    }
    assert_eq!(r.status, 303, "{name}: {}", r.body);
    let mapping = case.mapping.replace("name=p1", &format!("name={name}"));
    let saved = save_mapping(addr, origin, &mapping, &upload_id(&r));
    assert_eq!(saved.status, 422, "{name}: {}", saved.body);
    assert!(saved.body.contains(&on_page), "{name}: {}", saved.body);
    assert!(
        !projects.path().join(name).exists(),
        "{name} was saved despite problems"
    );
    let form: Vec<(String, String)> = form_urlencoded::parse(mapping.as_bytes())
        .map(|(k, v)| (k.to_string(), v.to_string()))
        .collect();
    let manifest = gapwise::web::projects::manifest_from_form(&form).expect("a manifest");
    let dir = TempDir::new(&format!("check-{name}"));
    dir.write("project.toml", toml::to_string(&manifest).unwrap());
    dir.write("frame.csv", &case.frame);
    dir.write("microdata.csv", MICRODATA);
    let out = gapwise(&["check", dir.path().to_str().unwrap()]);
    assert_eq!(out.code, 1, "{name}: {} {}", out.stdout, out.stderr);
    assert!(!out.stderr.contains("panicked"), "{name}: {}", out.stderr);
    assert!(out.stderr.contains(case.says), "{name}: {}", out.stderr);
}

#[test]
fn bad_uploads_get_the_validators_messages_and_change_nothing() {
    let (projects, addr, origin) = projects_server("badprojects");
    for case in &refusals() {
        assert_refused_by_the_form_and_by_check(&projects, addr, &origin, case);
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
    // Pages still answer (the open project is untouched).
    assert_eq!(get(addr, "/").status, 200);
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
    let (projects, addr, origin) = projects_server("names");
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
        post_form(
            addr,
            &origin,
            "/projects/open",
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
    let (projects, addr, origin) = projects_server("limits");
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
    let (projects, addr, origin) = projects_server("bomb");
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
    let r = post_from(addr, &origin, "/projects/upload", &ct, &body);
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

/// Uploads a frame and, when given, microdata; `extra` adds form fields.
fn upload_with(
    addr: std::net::SocketAddr,
    origin: &str,
    name: &str,
    frame: &[u8],
    microdata: Option<&[u8]>,
    extra: &[(&str, &str)],
) -> Response {
    let mut fields = vec![("name", name), ("title", "Browser programme")];
    fields.extend_from_slice(extra);
    let mut files: Vec<(&str, &str, &[u8])> = vec![("frame", "frame.csv", frame)];
    if let Some(m) = microdata {
        files.push(("microdata", "microdata.csv", m));
    }
    let (ct, body) = multipart(&fields, &files);
    post_from(addr, origin, "/projects/upload", &ct, &body)
}

/// A small seeded generator for the property test (xorshift64*, Vigna 2016).
struct Draws(u64);

impl Draws {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n as u64) as usize
    }
    fn chance(&mut self, percent: u64) -> bool {
        self.next() % 100 < percent
    }
}

/// Every manifest the mapping form can produce either saves and loads (and then every
/// page's analysis runs without a panic) or is refused with a message: forms drawn at
/// random over the form's own choices (any column or none in every select, any subset of
/// ticks, rules with any direction, cut-off and waves).
#[test]
fn every_form_either_saves_and_loads_or_is_refused_with_a_message() {
    let frame_columns = [
        "iso",
        "name",
        "wave",
        "took_part",
        "gdp",
        "democracy",
        "region",
    ];
    let micro_columns = ["iso", "wave", "dweight", "trust"];
    let cuts = [
        "",
        "lowest-participant",
        "highest-participant",
        "7",
        "-1e3",
        "abc",
        "1,5",
        "NaN",
    ];
    let mut draws = Draws(0x9E37_79B9_7F4A_7C15);
    let (mut saved, mut refused) = (0, 0);
    let mut reasons: Vec<String> = Vec::new();
    for case in 0..400 {
        let mut form: Vec<(String, String)> = Vec::new();
        let pick = |draws: &mut Draws,
                    form: &mut Vec<(String, String)>,
                    key: &str,
                    list: &[&str],
                    none: bool| {
            let i = draws.below(list.len() + usize::from(none));
            let v = list.get(i).copied().unwrap_or("");
            form.push((key.to_string(), v.to_string()));
        };
        form.push(("title".into(), format!("case {case}")));
        // Mostly the right roles, so that many forms get as far as the data checks.
        let right = draws.chance(80);
        for (key, good) in [
            ("code", "iso"),
            ("wave", "wave"),
            ("participation", "took_part"),
        ] {
            if right && draws.chance(95) {
                form.push((key.into(), good.into()));
            } else {
                pick(&mut draws, &mut form, key, &frame_columns, false);
            }
        }
        // As the form offers them (indicators other than the roles) or anything at all.
        let offered = draws.chance(70);
        if offered {
            form.push(("country_name".into(), ["name", ""][draws.below(2)].into()));
            form.push(("group".into(), ["region", ""][draws.below(2)].into()));
        } else {
            pick(&mut draws, &mut form, "country_name", &frame_columns, true);
            pick(&mut draws, &mut form, "group", &frame_columns, true);
        }
        for c in frame_columns {
            let numeric_ok = !offered || ["gdp", "democracy"].contains(&c);
            let categorical_ok = !offered || c == "region";
            if numeric_ok && draws.chance(if offered { 70 } else { 30 }) {
                form.push(("numeric".into(), c.into()));
            }
            if categorical_ok && draws.chance(if offered { 80 } else { 15 }) {
                form.push(("categorical".into(), c.into()));
            }
            if draws.chance(20) {
                form.push((format!("label.{c}"), format!("Label of {c}")));
            }
            if draws.chance(10) {
                form.push((
                    format!("reference.{c}"),
                    ["North", "South", "XAA", "nope"][draws.below(4)].into(),
                ));
            }
        }
        for row in 0..4 {
            let empty = draws.chance(if row == 0 { 50 } else { 90 });
            if empty {
                form.push(("rule_indicator".into(), String::new()));
            } else if offered {
                form.push((
                    "rule_indicator".into(),
                    ["gdp", "democracy"][draws.below(2)].into(),
                ));
            } else {
                pick(
                    &mut draws,
                    &mut form,
                    "rule_indicator",
                    &frame_columns,
                    true,
                );
            }
            let direction = if draws.chance(50) {
                "at_least"
            } else {
                "at_most"
            };
            form.push(("rule_direction".into(), direction.into()));
            let cut = if (empty && draws.chance(95)) || draws.chance(5) {
                ""
            } else if draws.chance(75) {
                cuts[1 + draws.below(4)]
            } else {
                cuts[draws.below(cuts.len())]
            };
            form.push(("rule_cut".into(), cut.into()));
            let waves = ["", "1", "2", "1, 2", "3", "x"];
            let n = if offered { 4 } else { waves.len() };
            form.push(("rule_waves".into(), waves[draws.below(n)].into()));
        }
        for key in ["cost", "feasibility", "population"] {
            if offered && draws.chance(50) {
                form.push((key.into(), ["gdp", "democracy", ""][draws.below(3)].into()));
            } else if draws.chance(30) {
                pick(&mut draws, &mut form, key, &frame_columns, true);
            }
        }
        if draws.chance(50) {
            form.extend([
                ("micro_country".to_string(), "iso".to_string()),
                ("micro_wave".to_string(), "wave".to_string()),
                ("micro_weight".to_string(), "dweight".to_string()),
            ]);
        } else if draws.chance(50) {
            pick(&mut draws, &mut form, "micro_country", &micro_columns, true);
            pick(&mut draws, &mut form, "micro_wave", &micro_columns, false);
            pick(&mut draws, &mut form, "micro_weight", &micro_columns, false);
        }
        if draws.chance(80) {
            for c in micro_columns {
                if (!offered || c == "trust") && draws.chance(if offered { 80 } else { 40 }) {
                    form.push(("micro_variable".into(), c.into()));
                }
            }
            if offered {
                form.push(("micro_outcome".into(), String::new()));
            } else {
                pick(&mut draws, &mut form, "micro_outcome", &micro_columns, true);
            }
        }
        let manifest = match gapwise::web::projects::manifest_from_form(&form) {
            Err(message) => {
                assert!(
                    message.len() > 10,
                    "case {case}: a bare refusal {message:?}"
                );
                reasons.push(message);
                refused += 1;
                continue;
            }
            Ok(m) => m,
        };
        let dir = TempDir::new(&format!("prop-{case}"));
        dir.write("project.toml", toml::to_string(&manifest).unwrap());
        dir.write("frame.csv", FRAME);
        dir.write("microdata.csv", MICRODATA);
        let outcome = std::panic::catch_unwind(|| match Project::load(dir.path()) {
            Err(problems) => {
                assert!(!problems.is_empty());
                for p in &problems {
                    assert!(p.message.len() > 10, "a bare problem {p:?}");
                }
                false
            }
            Ok(project) => {
                // What `gapwise check` and the pages run on a loaded project.
                let _ = gapwise::analysis::overview::overview(&project);
                let _ =
                    gapwise::cli::summary_text(&gapwise::analysis::overview::overview(&project));
                for &w in &project.waves {
                    let view = project.wave(w).expect("a wave of the project");
                    let _ = gapwise::analysis::coverage::coverage(&view);
                    let _ = gapwise::analysis::balance::compare(
                        &view,
                        &gapwise::analysis::settings::Settings::default(),
                    );
                }
                true
            }
        });
        match outcome {
            Ok(true) => saved += 1,
            Ok(false) => refused += 1,
            Err(_) => panic!("case {case} panicked; the form was {form:?}"),
        }
        // The inverse: a saved manifest comes back into the form as it was.
        let again = gapwise::web::projects::manifest_from_form(
            &gapwise::web::projects::manifest_to_form(&manifest),
        )
        .expect("a manifest read back into the form saves again");
        assert_eq!(
            toml::to_string(&again).unwrap(),
            toml::to_string(&manifest).unwrap(),
            "case {case}"
        );
    }
    // Both branches are exercised.
    eprintln!("{saved} forms saved and loaded, {refused} refused");
    reasons.sort();
    reasons.dedup();
    assert!(
        saved >= 30 && refused >= 30,
        "saved {saved}, refused {refused}: {}",
        reasons
            .iter()
            .take(30)
            .cloned()
            .collect::<Vec<_>>()
            .join("\n")
    );
}

/// After an error every entry stays as typed; the form covers labels, references,
/// `at_most` rules and rules per wave.
#[test]
fn after_an_error_the_form_keeps_every_entry() {
    let (projects, addr, origin) = projects_server("kept");
    let r = upload(addr, &origin, "k1", FRAME.as_bytes());
    let id = upload_id(&r);
    let typed = "name=k1&title=Typed+title&code=iso&country_name=name&wave=wave&participation=took_part&group=region&numeric=gdp&numeric=democracy&label.gdp=GDP+per+head+%28log%29&categorical=region&reference.region=South&rule_indicator=democracy&rule_direction=at_most&rule_cut=abc&rule_waves=2&micro_country=iso&micro_wave=wave&micro_weight=dweight&micro_variable=trust";
    let failed = save_mapping(addr, &origin, typed, &id);
    assert_eq!(failed.status, 422, "{}", failed.body);
    let body = &failed.body;
    assert!(
        body.contains("the cut-off &#39;abc&#39;")
            || body.contains("the cut-off &#x27;abc&#x27;")
            || body.contains("cut-off 'abc'"),
        "{body}"
    );
    for kept in [
        r#"name="title" value="Typed title""#,
        r#"value="gdp" checked"#,
        r#"value="democracy" checked"#,
        r#"name="label.gdp" value="GDP per head (log)""#,
        r#"value="South" selected"#,
        r#"value="at_most" selected"#,
        r#"name="rule_cut" value="abc""#,
        r#"name="rule_waves" value="2""#,
        r#"value="trust" checked"#,
    ] {
        assert!(body.contains(kept), "lost {kept}: {body}");
    }
    // The code, wave and flag columns are never offered as indicators.
    for role in ["iso", "wave", "took_part"] {
        assert!(
            !body.contains(&format!(r#"name="numeric" value="{role}""#)),
            "{role} offered"
        );
    }
    // Fixed, the same entries save: labels, reference, an at_most rule for wave 2.
    let fixed = typed.replace("rule_cut=abc", "rule_cut=7.05");
    let saved = save_mapping(addr, &origin, &fixed, &id);
    assert_eq!(saved.status, 303, "{}", saved.body);
    let text =
        std::fs::read_to_string(store::resolve(&projects.path().join("k1")).join("project.toml"))
            .unwrap();
    let m = gapwise::project::Manifest::parse(&text).unwrap();
    assert_eq!(m.title, "Typed title");
    assert_eq!(
        m.indicators.labels.get("gdp").map(String::as_str),
        Some("GDP per head (log)")
    );
    assert_eq!(
        m.indicators.reference.get("region").map(String::as_str),
        Some("South")
    );
    assert_eq!(m.eligibility.len(), 1);
    assert_eq!(m.eligibility[0].waves, Some(vec![2]));
    assert!(m.eligibility[0].at_least.is_none() && m.eligibility[0].at_most.is_some());
    // No stray files in a saved project.
    let mut files: Vec<String> = std::fs::read_dir(store::resolve(&projects.path().join("k1")))
        .unwrap()
        .filter_map(Result::ok)
        .map(|e| e.file_name().to_string_lossy().to_string())
        .collect();
    files.sort();
    assert_eq!(files, ["frame.csv", "microdata.csv", "project.toml"]);
}

/// A re-upload starts from the previous mapping and title, keeps the microdata when none
/// is uploaded (unless asked), and earlier versions can be restored.
#[test]
fn new_versions_start_from_the_old_mapping_and_old_versions_can_be_restored() {
    let (projects, addr, origin) = projects_server("versions");
    let r = upload(addr, &origin, "p1", FRAME.as_bytes());
    let mapping = format!("{MAPPING}&label.gdp=GDP+per+head");
    assert_eq!(
        save_mapping(addr, &origin, &mapping, &upload_id(&r)).status,
        303
    );

    let frame2 = FRAME.replace("9.5", "9.7");
    let r = upload_with(addr, &origin, "p1", frame2.as_bytes(), None, &[]);
    assert_eq!(r.status, 303, "{}", r.body);
    let location = r.header("location").unwrap_or_default().to_string();
    assert!(location.contains("kept=1"), "{location}");
    let form = get(addr, &location);
    assert_eq!(form.status, 200, "{}", form.body);
    for prefilled in [
        r#"id="from-previous""#,
        r#"id="kept-microdata""#,
        r#"name="title" value="Browser programme""#,
        r#"value="gdp" checked"#,
        r#"name="label.gdp" value="GDP per head""#,
        r#"name="rule_cut" value="lowest-participant""#,
    ] {
        assert!(
            form.body.contains(prefilled),
            "missing {prefilled}: {}",
            form.body
        );
    }
    let id = upload_id(&r);
    let saved = save_mapping(addr, &origin, &format!("{mapping}&kept=1"), &id);
    assert_eq!(saved.status, 303, "{}", saved.body);
    let current = store::resolve(&projects.path().join("p1"));
    assert!(
        current.join("microdata.csv").is_file(),
        "the microdata was not kept"
    );
    assert!(!current.join("title.txt").exists());

    // Removal asked for: the new version has no microdata (and says so as a warning).
    let r = upload_with(
        addr,
        &origin,
        "p1",
        frame2.as_bytes(),
        None,
        &[("remove_microdata", "1")],
    );
    assert!(!r.header("location").unwrap_or_default().contains("kept=1"));
    let no_micro = MAPPING.split("&micro_").next().unwrap().to_string();
    assert_eq!(
        save_mapping(addr, &origin, &no_micro, &upload_id(&r)).status,
        303
    );
    assert!(!store::resolve(&projects.path().join("p1"))
        .join("microdata.csv")
        .exists());

    // The projects page lists the versions; restoring the first makes it current again.
    let list = store::versions(projects.path(), "p1");
    assert_eq!(list.len(), 3, "{list:?}");
    assert!(list[0].current && !list[2].current);
    let page = get(addr, "/projects");
    assert!(
        page.body
            .contains(&format!(r#"name="version" value="{}""#, list[2].id)),
        "{}",
        page.body
    );
    let restored = post_form(
        addr,
        &origin,
        "/projects/restore",
        format!("name=p1&version={}", list[2].id).as_bytes(),
    );
    assert_eq!(restored.status, 303, "{}", restored.body);
    let current = store::resolve(&projects.path().join("p1"));
    assert!(std::fs::read_to_string(current.join("frame.csv"))
        .unwrap()
        .contains("9.5"));
    assert!(current.join("microdata.csv").is_file());
    assert_eq!(store::versions(projects.path(), "p1").len(), 4);
    // An unknown version is refused with a message.
    let bad = post_form(
        addr,
        &origin,
        "/projects/restore",
        b"name=p1&version=0000000000000-00000000",
    );
    assert_eq!(bad.status, 400);
    assert!(bad.body.contains("has no version"), "{}", bad.body);
}

/// Files with semicolons and decimal commas, and codes that differ only in case, get a
/// precise hint on the mapping page.
#[test]
fn separators_decimal_commas_and_code_case_get_hints() {
    let (_projects, addr, origin) = projects_server("hints");
    let semicolons = "iso;name;wave;took_part;gdp\nXAA;Aland;1;1;9,5\nXAB;Bland;1;0;8,1\n";
    let r = upload_with(addr, &origin, "semi", semicolons.as_bytes(), None, &[]);
    let form = get(addr, r.header("location").unwrap_or_default());
    assert!(
        form.body
            .contains("seems to use &#39;;&#39; between fields")
            || form
                .body
                .contains("seems to use &#x27;;&#x27; between fields"),
        "{}",
        form.body
    );
    assert!(form.body.contains("decimal comma"), "{}", form.body);

    let lower = MICRODATA.replace("XAA,", "xaa,");
    let r = upload_with(
        addr,
        &origin,
        "case",
        FRAME.as_bytes(),
        Some(lower.as_bytes()),
        &[],
    );
    let saved = save_mapping(
        addr,
        &origin,
        &MAPPING.replace("name=p1", "name=case"),
        &upload_id(&r),
    );
    assert_eq!(saved.status, 422, "{}", saved.body);
    assert!(
        saved.body.contains("only when case is ignored"),
        "{}",
        saved.body
    );
    assert!(saved.body.contains("xaa"), "{}", saved.body);
}

/// A browser posts our forms with `Origin: null` (our pages send no referrer); its
/// `Sec-Fetch-Site: same-origin`, which no page can set, lets the post through. Without it
/// a null origin is refused, and a cross-site fetch stays refused.
#[test]
fn a_form_post_from_our_own_page_with_a_null_origin_is_accepted() {
    let projects = TempDir::new("nullorigin");
    let (addr, _) = start_server_full(&demo_dir(), Some(projects.path().to_path_buf()));
    let (ct, body) = multipart(
        &[("name", "n1")],
        &[("frame", "frame.csv", FRAME.as_bytes())],
    );
    let post = |headers: &[(&str, &str)]| {
        http_body(addr, "POST", "/projects/upload", headers, &ct, &body).status
    };
    assert_eq!(
        post(&[("Origin", "null"), ("Sec-Fetch-Site", "same-origin")]),
        303
    );
    assert_eq!(post(&[("Origin", "null")]), 403);
    assert_eq!(
        post(&[("Origin", "null"), ("Sec-Fetch-Site", "cross-site")]),
        401
    );
}

/// A Parquet frame gets the same column guesses as the same frame in CSV (numbers, codes,
/// flags, categories), read from its values; booleans count as flags and whole floats as
/// whole numbers, as their CSV text would (our own rule).
#[test]
fn parquet_columns_get_the_same_guesses_as_csv() {
    use gapwise::web::projects::{profile_columns, ColumnGuess};
    use polars::prelude::*;
    let dir = TempDir::new("parquet-guess");
    dir.write("frame.csv", FRAME);
    let csv = profile_columns(&dir.path().join("frame.csv"));
    let mut df = CsvReadOptions::default()
        .try_into_reader_with_file_path(Some(dir.path().join("frame.csv")))
        .unwrap()
        .finish()
        .unwrap();
    let n = df.height();
    df.with_column(Column::new(
        "member".into(),
        (0..n).map(|i| i % 2 == 0).collect::<Vec<bool>>(),
    ))
    .unwrap();
    df.with_column(Column::new(
        "year".into(),
        (0..n).map(|i| 2000.0 + i as f64).collect::<Vec<f64>>(),
    ))
    .unwrap();
    let path = dir.path().join("frame.parquet");
    ParquetWriter::new(std::fs::File::create(&path).unwrap())
        .finish(&mut df)
        .unwrap();
    let parquet = profile_columns(&path);
    assert_eq!(parquet.len(), csv.len() + 2);
    for (c, p) in csv.iter().zip(&parquet) {
        assert_eq!(c.name, p.name);
        assert_eq!(c.kind, p.kind, "{}", c.name);
        if matches!(c.kind, ColumnGuess::Code | ColumnGuess::Category) {
            assert_eq!(c.levels, p.levels, "{}", c.name);
        }
    }
    let kind = |name: &str| parquet.iter().find(|c| c.name == name).unwrap().kind;
    assert_eq!(kind("iso"), ColumnGuess::Code);
    assert_eq!(kind("took_part"), ColumnGuess::Flag);
    assert_eq!(kind("wave"), ColumnGuess::Whole);
    assert_eq!(kind("gdp"), ColumnGuess::Number);
    assert_eq!(kind("region"), ColumnGuess::Category);
    assert_eq!(kind("member"), ColumnGuess::Flag);
    assert_eq!(kind("year"), ColumnGuess::Whole);
    assert!(parquet.iter().all(|c| c.kind != ColumnGuess::Unknown));
}
