//! A localhost server that holds study data: loopback only, Host header checked, changes
//! only from our pages or with the token, no path out of the static folder, many
//! concurrent clients served without error, clear messages at start-up.

mod common;
use common::*;

#[test]
fn requests_for_another_host_are_refused() {
    let addr = start_server(&demo_dir());
    assert_eq!(http(addr, "GET", "/", &[]).status, 200);
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
        let r = http(addr, "GET", path, &[]);
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
        assert_eq!(http(addr, "GET", p, &[]).status, 200, "{p}");
    }
    let before = rss();
    let started = std::time::Instant::now();
    let handles: Vec<_> = (0..50)
        .map(|c| {
            std::thread::spawn(move || {
                let mut failures = Vec::new();
                for r in 0..40 {
                    let p = paths[(c + r) % paths.len()];
                    let resp = http(addr, "GET", p, &[]);
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

#[test]
fn ctrl_c_stops_the_server_gracefully() {
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_gapwise"))
        .args([
            "serve",
            demo_dir().to_str().unwrap(),
            "--addr",
            "127.0.0.1:0",
        ])
        .stdout(std::process::Stdio::piped())
        .spawn()
        .expect("start the server");
    // Wait for the "serving" line, then send SIGINT as Ctrl-C does.
    let mut stdout = std::io::BufReader::new(child.stdout.take().unwrap());
    let mut line = String::new();
    std::io::BufRead::read_line(&mut stdout, &mut line).unwrap();
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
