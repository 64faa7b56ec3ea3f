//! A localhost server that holds study data: loopback only, Host header checked, changes
//! only from our pages or with the token, no path out of the static folder, many
//! concurrent clients served without error, clear messages at start-up.

mod common;
use common::*;

#[test]
fn requests_for_another_host_are_refused() {
    let addr = start_server(&demo_dir());
    assert_eq!(get(addr, "/").status, 200);
    for host in ["evil.example", "evil.example:7878", "127.0.0.1.nip.io", ""] {
        let r = http(addr, "GET", "/api/overview", &[("Host", host)]);
        assert_eq!(r.status, 421, "Host {host:?} got {}", r.status);
    }
    let localhost = format!("localhost:{}", addr.port());
    assert_eq!(
        http(addr, "GET", "/", &[("Host", localhost.as_str())]).status,
        200
    );
}

#[test]
fn no_path_leaves_the_static_folder() {
    let addr = start_server(&demo_dir());
    let attempts = [
        "/static/../Cargo.toml",
        "/static/..%2fCargo.toml",
        "/static/%2e%2e/Cargo.toml",
        "/static/%2e%2e%2fCargo.toml",
        "/static/%252e%252e%252fCargo.toml",
        "/static/..%5cCargo.toml",
        "/static/....//Cargo.toml",
        "/static/%2e%2e/%2e%2e/%2e%2e/etc/passwd",
        "/static//etc/passwd",
        "/..%2f..%2fetc%2fpasswd",
        "/balance/..%2f..%2fCargo.toml",
    ];
    for path in attempts {
        let r = get(addr, path);
        assert_ne!(r.status, 200, "{path} answered 200");
        assert!(
            !r.body.contains("[package]") && !r.body.contains("root:"),
            "{path} leaked a file"
        );
    }
}

#[test]
fn fifty_clients_two_thousand_requests() {
    let addr = start_server(&demo_dir());
    let paths = [
        "/",
        "/api/overview",
        "/coverage",
        "/api/balance?wave=2",
        "/static/gapwise.css",
        "/charts/coverage.svg",
        "/api/coverage?wave=3",
        "/model?wave=1&model=probit",
    ];
    let rss = || {
        std::fs::read_to_string("/proc/self/status")
            .ok()
            .and_then(|s| {
                s.lines()
                    .find(|l| l.starts_with("VmRSS:"))
                    .and_then(|l| l.split_whitespace().nth(1)?.parse::<u64>().ok())
            })
    };
    // Warm up, then measure memory across the load.
    for p in paths {
        assert_eq!(get(addr, p).status, 200, "{p}");
    }
    let before = rss();
    let started = std::time::Instant::now();
    let handles: Vec<_> = (0..50)
        .map(|c| {
            std::thread::spawn(move || {
                let mut failures = Vec::new();
                for r in 0..40 {
                    let p = paths[(c + r) % paths.len()];
                    let resp = get(addr, p);
                    if resp.status != 200 {
                        failures.push(format!("{p}: {}", resp.status));
                    }
                }
                failures
            })
        })
        .collect();
    let failures: Vec<String> = handles
        .into_iter()
        .flat_map(|h| h.join().expect("client thread"))
        .collect();
    assert!(failures.is_empty(), "{failures:?}");
    assert!(
        started.elapsed().as_secs() < 120,
        "2,000 requests took {:?}",
        started.elapsed()
    );
    if let (Some(b), Some(a)) = (before, rss()) {
        assert!(
            a < b + 300_000,
            "resident memory grew from {b} kB to {a} kB"
        );
    }
}

#[test]
fn start_up_messages() {
    let out = gapwise(&["serve", demo_dir().to_str().unwrap(), "--addr", "0.0.0.0:0"]);
    assert_eq!(out.code, 2);
    assert!(
        out.stderr.contains("refusing to listen on 0.0.0.0:0"),
        "{}",
        out.stderr
    );
    // A second instance on a taken port.
    let taken = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    let port = taken.local_addr().unwrap().port();
    let out = gapwise(&[
        "serve",
        demo_dir().to_str().unwrap(),
        "--addr",
        &format!("127.0.0.1:{port}"),
    ]);
    assert_eq!(out.code, 1);
    assert!(out.stderr.contains("already in use"), "{}", out.stderr);
}

/// `gapwise serve <demo> --addr 127.0.0.1:0 EXTRA...` as a child process with its output
/// streams piped: the process, its standard output (kept open: a server writing to a
/// closed pipe fails) and the first line it printed.
fn serve_demo_process(
    extra: &[&str],
) -> (
    std::process::Child,
    std::io::BufReader<std::process::ChildStdout>,
    String,
) {
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_gapwise"))
        .args([
            "serve",
            demo_dir().to_str().unwrap(),
            "--addr",
            "127.0.0.1:0",
        ])
        .args(extra)
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .expect("start the server");
    let mut stdout = std::io::BufReader::new(child.stdout.take().unwrap());
    let mut line = String::new();
    std::io::BufRead::read_line(&mut stdout, &mut line).unwrap();
    (child, stdout, line)
}

#[test]
fn ctrl_c_stops_the_server_gracefully() {
    // Wait for the "serving" line, then send SIGINT as Ctrl-C does.
    let (mut child, _stdout, line) = serve_demo_process(&[]);
    assert!(line.contains("serving"), "{line}");
    let status = std::process::Command::new("kill")
        .args(["-INT", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let started = std::time::Instant::now();
    loop {
        if let Some(code) = child.try_wait().unwrap() {
            assert!(code.success(), "exit status {code:?}");
            break;
        }
        assert!(
            started.elapsed().as_secs() < 10,
            "the server did not stop within 10 s"
        );
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
}

#[test]
fn every_read_needs_the_key() {
    let (addr, key) = start_server_with_token(&demo_dir());
    assert_eq!(key.len(), 32, "a key of 128 bits in hexadecimal");
    for path in [
        "/",
        "/api/overview",
        "/balance/table.csv",
        "/report",
        "/static/gapwise.css",
        "/charts/coverage.svg",
        "/nowhere",
    ] {
        let r = http_without_key(addr, "GET", path, &[]);
        assert_eq!(r.status, 401, "{path} without a key answered {}", r.status);
        assert!(!r.body.contains("XAA"), "{path} leaked data");
        assert!(r.body.contains("?key="), "{}", r.body);
        // A wrong key of the right length, in the header and in the cookie.
        let wrong = "0".repeat(32);
        let cookie = format!("gapwise_key_{}={wrong}", addr.port());
        for headers in [
            [("x-gapwise-key", wrong.as_str())],
            [("Cookie", cookie.as_str())],
        ] {
            assert_eq!(http_without_key(addr, "GET", path, &headers).status, 401);
        }
    }
    // The right key in the header (scripts) and in the cookie (browsers).
    let r = http_without_key(addr, "GET", "/api/overview", &[("x-gapwise-key", &key)]);
    assert_eq!(r.status, 200);
    let cookie = format!("other=1; gapwise_key_{}={key}", addr.port());
    let r = http_without_key(addr, "GET", "/api/overview", &[("Cookie", &cookie)]);
    assert_eq!(r.status, 200);
    // The cookie of another port (another gapwise) is not ours.
    let elsewhere = format!("gapwise_key_{}={key}", addr.port().wrapping_add(1));
    let r = http_without_key(addr, "GET", "/api/overview", &[("Cookie", &elsewhere)]);
    assert_eq!(r.status, 401);
    // A request the browser marks as coming from another site or port: the cookie is
    // not enough (a page on another localhost port is "same-site" for cookies).
    for site in ["cross-site", "same-site"] {
        let r = http_without_key(
            addr,
            "GET",
            "/api/overview",
            &[("Cookie", &cookie), ("Sec-Fetch-Site", site)],
        );
        assert_eq!(r.status, 401, "Sec-Fetch-Site: {site}");
    }
    let r = http_without_key(
        addr,
        "GET",
        "/",
        &[("Cookie", &cookie), ("Sec-Fetch-Site", "same-origin")],
    );
    assert_eq!(r.status, 200);
}

#[test]
fn the_start_up_url_sets_the_cookie_and_drops_the_key() {
    let (addr, key) = start_server_with_token(&demo_dir());
    let r = http_without_key(addr, "GET", &format!("/?key={key}"), &[]);
    assert_eq!(r.status, 303);
    assert_eq!(r.header("location"), Some("/"));
    let cookie = r.header("set-cookie").expect("a cookie");
    assert!(
        cookie.starts_with(&format!("gapwise_key_{}={key};", addr.port())),
        "{cookie}"
    );
    for attribute in ["HttpOnly", "SameSite=Strict", "Path=/"] {
        assert!(cookie.contains(attribute), "{cookie}");
    }
    // Other parameters stay.
    let r = http_without_key(addr, "GET", &format!("/balance?wave=2&key={key}"), &[]);
    assert_eq!(r.header("location"), Some("/balance?wave=2"));
    // A wrong key sets nothing.
    let r = http_without_key(addr, "GET", &format!("/?key={}", "f".repeat(32)), &[]);
    assert_eq!(r.status, 401);
    assert!(r.header("set-cookie").is_none());
}

#[test]
fn changes_need_our_origin_or_the_key_header() {
    let (addr, key) = start_server_with_token(&demo_dir());
    // The cookie alone (a form on a foreign page would send it if the site matched).
    assert_eq!(http(addr, "POST", "/api/reload", &[]).status, 403);
    let foreign = [("Origin", "http://127.0.0.1:9")];
    assert_eq!(http(addr, "POST", "/api/reload", &foreign).status, 403);
    let origin = format!("http://{addr}");
    let r = http(addr, "POST", "/api/reload", &[("Origin", origin.as_str())]);
    assert_eq!(r.status, 200, "{}", r.body);
    let r = http_without_key(addr, "POST", "/api/reload", &[("x-gapwise-key", &key)]);
    assert_eq!(r.status, 200, "{}", r.body);
    // Our origin without the key is still refused.
    let r = http_without_key(addr, "POST", "/api/reload", &[("Origin", origin.as_str())]);
    assert_eq!(r.status, 401);
}

#[test]
fn without_a_key_the_old_behaviour() {
    let (addr, key) = start_server_keyed(&demo_dir(), None, false);
    assert!(key.is_none());
    assert_eq!(
        http_without_key(addr, "GET", "/api/overview", &[]).status,
        200
    );
    // Changes still need our origin.
    assert_eq!(
        http_without_key(addr, "POST", "/api/reload", &[]).status,
        403
    );
}

#[test]
fn protective_headers_on_every_response() {
    let addr = start_server(&demo_dir());
    for (path, no_store) in [
        ("/", true),
        ("/api/overview", true),
        ("/balance/table.csv", true),
        ("/charts/coverage.svg", true),
        ("/report", true),
        ("/projects", true),
        ("/nowhere", true),
        ("/static/gapwise.css", false),
    ] {
        let r = get(addr, path);
        let csp = r.header("content-security-policy").unwrap_or_default();
        assert!(csp.contains("frame-ancestors 'none'"), "{path}: {csp}");
        assert!(
            !csp.contains("script-src 'unsafe-inline'") && !csp.contains("*"),
            "{path}: {csp}"
        );
        assert_eq!(
            r.header("x-content-type-options"),
            Some("nosniff"),
            "{path}"
        );
        assert_eq!(r.header("referrer-policy"), Some("no-referrer"), "{path}");
        assert_eq!(r.header("x-frame-options"), Some("DENY"), "{path}");
        if no_store {
            assert_eq!(r.header("cache-control"), Some("no-store"), "{path}");
        }
    }
    // Even the refusals carry them.
    let r = http_without_key(addr, "GET", "/", &[]);
    assert!(r.header("content-security-policy").is_some());
    // Pages have no inline script or style for the policy to block.
    for path in [
        "/",
        "/coverage",
        "/model",
        "/balance",
        "/plan?replicates=20",
        "/impact?bootstrap=20",
        "/sensitivity",
        "/projects",
    ] {
        let body = get(addr, path).body;
        assert!(
            !body.contains("<script>") && !body.contains("<style"),
            "{path}"
        );
        assert!(!body.contains(" style=\""), "{path} has a style attribute");
        assert!(!body.contains(" onclick="), "{path} has an inline handler");
    }
}

#[test]
fn the_key_file_is_private_and_the_url_hands_over_the_key() {
    let dir = TempDir::new("keyfile");
    let key_file = dir.path().join("key");
    let (mut child, _stdout, line) =
        serve_demo_process(&["--key-file", key_file.to_str().unwrap()]);
    let url = line
        .split_whitespace()
        .find(|w| w.starts_with("http://"))
        .unwrap_or_default()
        .to_string();
    let key = url.rsplit_once("?key=").map(|(_, k)| k.to_string());
    let written = std::fs::read_to_string(&key_file).unwrap_or_default();
    #[cfg(unix)]
    let mode = {
        use std::os::unix::fs::PermissionsExt;
        std::fs::metadata(&key_file).map(|m| m.permissions().mode() & 0o777)
    };
    let _ = std::process::Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status();
    let _ = child.wait();
    let key = key.expect("the start-up URL carries the key");
    assert_eq!(key.len(), 32, "{line}");
    assert_eq!(written.trim(), key);
    #[cfg(unix)]
    assert_eq!(mode.unwrap(), 0o600);
    assert!(!key_file.exists(), "the key file outlives the server");
}

#[test]
fn csv_exports_neutralise_formulas_and_keep_numbers() {
    let dir = TempDir::new("formula");
    for file in ["project.toml", "microdata.csv"] {
        std::fs::copy(demo_dir().join(file), dir.path().join(file)).unwrap();
    }
    let frame = std::fs::read_to_string(demo_dir().join("frame.csv")).unwrap();
    dir.write(
        "frame.csv",
        frame
            .replace(
                "Tirrovy",
                "\"=HYPERLINK(\"\"http://evil.example\"\";\"\"x\"\")\"",
            )
            .replace("Zelleth", "@SUM(1+1)"),
    );
    let addr = start_server(dir.path());
    let r = get(addr, "/coverage/points.csv?wave=1");
    assert_eq!(r.status, 200, "{}", r.body);
    assert!(r.body.contains("\"'=HYPERLINK("), "{}", r.body);
    assert!(r.body.contains("'@SUM(1+1)"), "{}", r.body);
    // No line has a cell that starts with a formula character unless it is a number.
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .from_reader(r.body.as_bytes());
    let mut negative_numbers = 0;
    for record in reader.records() {
        for cell in record.unwrap().iter() {
            if cell.starts_with(['=', '+', '-', '@', '\t', '\r']) {
                assert!(cell.parse::<f64>().is_ok(), "{cell:?} left as a formula");
                negative_numbers += 1;
            }
        }
    }
    assert!(
        negative_numbers > 0,
        "component scores include negative numbers"
    );
}

/// The first `n` lines of `text`, each ending in a newline.
fn first_lines(text: &str, n: usize) -> String {
    text.lines().take(n).map(|l| format!("{l}\n")).collect()
}

/// A reload the server holds back (409) with a message that says `says`.
fn reload_is_held(addr: std::net::SocketAddr, auth: &[(&str, &str)], says: &str) -> Response {
    let r = http(addr, "POST", "/api/reload", auth);
    assert_eq!(r.status, 409, "{}", r.body);
    assert!(r.body.contains(says), "not said: {says}\n{}", r.body);
    r
}

#[test]
fn a_reload_that_loses_rows_keeps_the_old_project_until_confirmed() {
    let dir = valid_project("halfwritten");
    let (addr, key) = start_server_with_token(dir.path());
    let auth = [("x-gapwise-key", key.as_str())];
    let overview = |addr| -> serde_json::Value { get_json(addr, "/api/overview") };
    let before = overview(addr);
    let loaded = before["loaded"].as_array().expect("loaded files");
    assert_eq!(loaded.len(), 3);
    assert_eq!(loaded[1]["name"], "frame.csv");
    assert_eq!(loaded[1]["rows"], 8);
    assert_eq!(loaded[2]["rows"], 5);
    assert!(loaded[0]["rows"].is_null(), "the manifest has no rows");
    // SHA-256 of the bytes (FIPS 180-4), here from sha2 over the test's own copy.
    use sha2::Digest;
    let digest: String = sha2::Sha256::digest(FRAME.as_bytes())
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect();
    assert_eq!(loaded[1]["sha256"], digest.as_str());
    let page = get(addr, "/").body;
    assert!(
        page.contains("Files loaded") && page.contains(&digest),
        "overview shows the files"
    );

    // The microdata cut at a line end, as while a program rewrites it: valid, but fewer rows.
    let cut: String = first_lines(MICRODATA, 3);
    dir.write("microdata.csv", &cut);
    let r = reload_is_held(
        addr,
        &auth,
        "microdata.csv now has 2 rows instead of 5 (3 fewer)",
    );
    assert!(r.body.contains("/api/reload?confirm=1"), "{}", r.body);
    assert_eq!(
        overview(addr)["loaded"][2]["rows"],
        5,
        "the old project stays"
    );
    // The frame losing its latest wave (and the microdata its respondents of wave 2).
    let wave_one: String = first_lines(MICRODATA, 4);
    dir.write("microdata.csv", &wave_one);
    let one_wave: String = first_lines(FRAME, 5);
    dir.write("frame.csv", &one_wave);
    reload_is_held(addr, &auth, "wave 2 no longer in the frame");
    // Confirmed, the reload goes through and the overview says what changed.
    let r = http(addr, "POST", "/api/reload?confirm=1", &auth);
    assert_eq!(r.status, 200, "{}", r.body);
    let after = overview(addr);
    assert_eq!(after["loaded"][1]["rows"], 4);
    let changes = after["changes"].to_string();
    assert!(
        changes.contains("frame.csv: changed, 8 rows before, 4 now"),
        "{changes}"
    );
    // A reload of unchanged files says so.
    let r = http(addr, "POST", "/api/reload", &auth);
    assert_eq!(r.status, 200, "{}", r.body);
    assert!(r.body.contains("no file changed"), "{}", r.body);
}

#[test]
fn a_file_that_changes_while_it_is_read_is_refused() {
    let dir = TempDir::new("growing");
    let path = dir.path().join("frame.csv");
    let line = "XAA,Aland,1,1,9.5,8.0,North\n";
    std::fs::write(&path, line.repeat(200_000)).unwrap();
    let stop = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    let writer = {
        let (path, stop) = (path.clone(), std::sync::Arc::clone(&stop));
        std::thread::spawn(move || {
            let mut file = std::fs::OpenOptions::new().append(true).open(path).unwrap();
            while !stop.load(std::sync::atomic::Ordering::Relaxed) {
                std::io::Write::write_all(&mut file, line.as_bytes()).unwrap();
            }
        })
    };
    let mut refused = None;
    for _ in 0..200 {
        if let Err(p) = gapwise::project::table::read_stable(&path, "frame.csv") {
            refused = Some(p.to_string());
            break;
        }
    }
    stop.store(true, std::sync::atomic::Ordering::Relaxed);
    writer.join().unwrap();
    let refused = refused.expect("a growing file was read as if complete");
    assert!(
        refused.contains("frame.csv:-:-: the file changed while it was read"),
        "{refused}"
    );
    // Once the writer is done, the file reads.
    assert!(gapwise::project::table::read_stable(&path, "frame.csv").is_ok());
}

#[test]
fn messages_quote_short_prefixes_and_state_limits() {
    // A header with a 50,000-byte mangled name, then a frame: the column is quoted
    // in a short prefix only.
    let dir = valid_project("longheader");
    let long = "x".repeat(50_000);
    dir.write("frame.csv", FRAME.replacen("iso,", &format!("{long},"), 1));
    let out = gapwise(&["check", dir.path().to_str().unwrap()]);
    assert_eq!(out.code, 1);
    assert!(
        out.stderr.len() + out.stdout.len() < 20_000,
        "{} bytes of messages",
        out.stderr.len() + out.stdout.len()
    );
    assert!(
        out.stdout.contains("characters)") || out.stderr.contains("characters)"),
        "{}{}",
        out.stdout,
        out.stderr
    );
    // Line endings of CR alone get their own message.
    dir.write("frame.csv", FRAME.replace('\n', "\r"));
    let out = gapwise(&["check", dir.path().to_str().unwrap()]);
    let text = format!("{}{}", out.stdout, out.stderr);
    assert!(
        text.contains("frame.csv:1:-: the lines end in a carriage return alone"),
        "{text}"
    );
    // A single very long line is refused early, with its place.
    let mut one_line = String::from("iso,name,wave,took_part,gdp,democracy,region\n");
    one_line.push_str(&"1,".repeat(3_000_000));
    dir.write("frame.csv", &one_line);
    let started = std::time::Instant::now();
    let out = gapwise(&["check", dir.path().to_str().unwrap()]);
    let text = format!("{}{}", out.stdout, out.stderr);
    assert!(
        text.contains("frame.csv:2:-: this line is longer than 1 MiB"),
        "{text}"
    );
    assert!(started.elapsed().as_secs() < 5, "{:?}", started.elapsed());
    // An unclosed quote: the cell limit names the column.
    let mut open_quote = String::from("iso,name,wave,took_part,gdp,democracy,region\nXAA,\"");
    open_quote.push_str(&"a\n".repeat(40_000));
    dir.write("frame.csv", &open_quote);
    let out = gapwise(&["check", dir.path().to_str().unwrap()]);
    let text = format!("{}{}", out.stdout, out.stderr);
    assert!(
        text.contains(":name: this cell is longer than 64 KiB"),
        "{text}"
    );
    // A bare CSV names the option, not project.toml.
    let bare = TempDir::new("bare");
    bare.write(
        "units.csv",
        "id,flag,gdp\nXAA,1,1\nXAB,0,2\nXAC,1,3\nXAD,0,4\n",
    );
    let out = gapwise(&[
        "fit",
        bare.path().join("units.csv").to_str().unwrap(),
        "--id",
        "id",
        "--flag",
        "flag",
        "--covariates",
        "nosuch",
    ]);
    let text = format!("{}{}", out.stdout, out.stderr);
    assert!(!text.contains("project.toml"), "{text}");
    assert!(
        text.contains("the option --covariates names 'nosuch'"),
        "{text}"
    );
}

#[test]
fn a_body_over_the_limit_says_the_limit() {
    let projects = TempDir::new("bodylimit");
    let (addr, _) = start_server_full(&demo_dir(), Some(projects.path().to_path_buf()));
    let origin = format!("http://{addr}");
    let big = vec![b'a'; gapwise::web::MAX_BODY_BYTES + 1024];
    let r = post_form(addr, &origin, "/projects/map", &big);
    assert_eq!(r.status, 413, "{}", r.body);
    assert!(r.body.contains("limit of 64 MB"), "{}", r.body);
}

#[test]
fn a_binary_outcome_that_is_not_0_or_1_is_placed() {
    let dir = TempDir::new("binary");
    let mut csv = String::from("y,x,country\n");
    for i in 0..40 {
        let y = if i == 17 { 35 } else { i % 2 };
        csv.push_str(&format!("{y},{},{}\n", i % 7, ["XAA", "XAB", "XAC"][i % 3]));
    }
    dir.write("people.csv", &csv);
    let result = gapwise::analysis::microdata::pooled_file(
        &dir.path().join("people.csv"),
        "y",
        &["x".to_string()],
        "country",
        None,
        gapwise::stats::regression::Kind::Logistic,
    );
    let Err(e) = result else {
        panic!("an outcome of 35 was accepted for a binomial model")
    };
    // Data row 18 (0-based 17) is line 19, the header being line 1.
    assert!(
        e.to_string()
            .starts_with("people.csv:19:y: the outcome is 35; a binomial outcome must be 0 or 1"),
        "{e}"
    );
}

#[test]
fn no_key_warns_at_start_up() {
    let (child, _stdout, line) = serve_demo_process(&["--no-key"]);
    let _ = std::process::Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status();
    let out = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        line.contains("serving") && !line.contains("?key="),
        "{line}"
    );
    assert!(
        stderr.contains("warning: started with --no-key"),
        "{stderr}"
    );
}
