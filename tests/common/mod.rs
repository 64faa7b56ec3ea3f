//! Helpers shared by the integration tests: temporary project folders, running the
//! binary, and a minimal HTTP client over loopback.
#![allow(dead_code)]

use std::io::{Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::atomic::{AtomicUsize, Ordering};

static COUNTER: AtomicUsize = AtomicUsize::new(0);

/// The access key of each test server, by address: the HTTP helpers send it in the
/// server's cookie, as a browser does after the start-up URL, unless told not to. (The
/// cookie alone does not authorise changes: those also need the Origin header of our
/// pages, or the key in the `x-gapwise-key` header.)
static KEYS: std::sync::Mutex<Vec<(std::net::SocketAddr, String)>> =
    std::sync::Mutex::new(Vec::new());

/// The access key of the test server at `addr`.
pub fn key_of(addr: std::net::SocketAddr) -> Option<String> {
    KEYS.lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
        .iter()
        .find(|(a, _)| *a == addr)
        .map(|(_, k)| k.clone())
}

/// A fresh empty folder under the system temp dir, removed when dropped.
pub struct TempDir(pub PathBuf);

impl TempDir {
    pub fn new(tag: &str) -> Self {
        let n = COUNTER.fetch_add(1, Ordering::SeqCst);
        let dir =
            std::env::temp_dir().join(format!("gapwise-test-{}-{tag}-{n}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).expect("create temp dir");
        TempDir(dir)
    }

    pub fn path(&self) -> &Path {
        &self.0
    }

    pub fn write(&self, name: &str, contents: impl AsRef<[u8]>) {
        std::fs::write(self.0.join(name), contents).expect("write test file");
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// The `[columns]` section over the test frames' columns (ISO code, name, wave, the 0/1
/// participation flag). A macro, so that the constant [`MANIFEST`] is made of it too.
macro_rules! frame_columns_section {
    () => {
        r#"[columns]
code = "iso"
name = "name"
wave = "wave"
participation = "took_part"
"#
    };
}

/// A manifest titled `title` over a frame with the test frames' columns: `sections` the
/// TOML after `[columns]` (indicators, eligibility, microdata).
pub fn manifest_with(title: &str, sections: &str) -> String {
    format!(
        "\ntitle = \"{title}\"\n{}{sections}",
        frame_columns_section!()
    )
}

pub const MANIFEST: &str = concat!(
    "\ntitle = \"Test programme\"\n",
    frame_columns_section!(),
    r#"[indicators]
numeric = ["gdp", "democracy"]
categorical = ["region"]
[[eligibility]]
indicator = "democracy"
at_least = "lowest-participant"
[microdata]
country = "iso"
wave = "wave"
design_weight = "dweight"
variables = ["trust"]
"#
);

pub const FRAME: &str = "iso,name,wave,took_part,gdp,democracy,region
XAA,Aland,1,1,9.5,8.0,North
XAB,Bland,1,0,8.1,6.5,South
XAC,Cland,1,1,,7.0,South
XAD,Dland,1,0,7.0,3.0,North
XAA,Aland,2,1,9.6,8.1,North
XAB,Bland,2,1,8.2,6.6,South
XAC,Cland,2,0,8.8,7.1,South
XAD,Dland,2,0,7.1,3.2,North
";

pub const MICRODATA: &str = "iso,wave,dweight,trust
XAA,1,1.0,5
XAA,1,0.8,6
XAC,1,1.2,4
XAA,2,1.0,7
XAB,2,1.1,3
";

/// A valid small project; tests overwrite one file to make it invalid.
pub fn valid_project(tag: &str) -> TempDir {
    let dir = TempDir::new(tag);
    dir.write("project.toml", MANIFEST);
    dir.write("frame.csv", FRAME);
    dir.write("microdata.csv", MICRODATA);
    dir
}

pub struct Output {
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
}

/// Runs the gapwise binary with arguments.
pub fn gapwise(args: &[&str]) -> Output {
    let out = Command::new(env!("CARGO_BIN_EXE_gapwise"))
        .args(args)
        .output()
        .expect("run gapwise");
    Output {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).to_string(),
        stderr: String::from_utf8_lossy(&out.stderr).to_string(),
    }
}

pub fn demo_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
}

/// A response: status code, headers (lower-case names) and body.
pub struct Response {
    pub status: u16,
    pub headers: Vec<(String, String)>,
    pub body: String,
}

impl Response {
    pub fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n == name)
            .map(|(_, v)| v.as_str())
    }
}

/// One HTTP/1.1 request over a fresh connection (Connection: close), without a body,
/// with the server's access key in its cookie.
pub fn http(
    addr: std::net::SocketAddr,
    method: &str,
    path: &str,
    extra_headers: &[(&str, &str)],
) -> Response {
    request(addr, method, path, extra_headers, None, true)
}

/// The same without the access key (only the headers given).
pub fn http_without_key(
    addr: std::net::SocketAddr,
    method: &str,
    path: &str,
    extra_headers: &[(&str, &str)],
) -> Response {
    request(addr, method, path, extra_headers, None, false)
}

/// One HTTP/1.1 request with a body of the given content type.
pub fn http_body(
    addr: std::net::SocketAddr,
    method: &str,
    path: &str,
    headers: &[(&str, &str)],
    content_type: &str,
    body: &[u8],
) -> Response {
    request(
        addr,
        method,
        path,
        headers,
        Some((content_type, body)),
        true,
    )
}

/// A Host header among the extra headers replaces the default one (the bound address);
/// with `with_key`, the server's key is sent in its cookie unless the extra headers carry
/// a cookie.
fn request(
    addr: std::net::SocketAddr,
    method: &str,
    path: &str,
    extra_headers: &[(&str, &str)],
    body: Option<(&str, &[u8])>,
    with_key: bool,
) -> Response {
    let mut stream = TcpStream::connect(addr).expect("connect");
    let host = extra_headers
        .iter()
        .find(|(k, _)| k.eq_ignore_ascii_case("host"))
        .map_or_else(|| addr.to_string(), |(_, v)| v.to_string());
    let length = body.map_or(0, |b| b.1.len());
    let mut head = format!("{method} {path} HTTP/1.1\r\nHost: {host}\r\nConnection: close\r\nContent-Length: {length}\r\n");
    if let Some((content_type, _)) = body {
        head.push_str(&format!("Content-Type: {content_type}\r\n"));
    }
    for (k, v) in extra_headers
        .iter()
        .filter(|(k, _)| !k.eq_ignore_ascii_case("host"))
    {
        head.push_str(&format!("{k}: {v}\r\n"));
    }
    let has_cookie = extra_headers
        .iter()
        .any(|(k, _)| k.eq_ignore_ascii_case("cookie"));
    if with_key && !has_cookie {
        if let Some(key) = key_of(addr) {
            head.push_str(&format!("Cookie: gapwise_key_{}={key}\r\n", addr.port()));
        }
    }
    head.push_str("\r\n");
    stream.write_all(head.as_bytes()).expect("send");
    if let Some((_, bytes)) = body {
        stream.write_all(bytes).expect("send body");
    }
    let mut raw = Vec::new();
    stream.read_to_end(&mut raw).expect("read");
    let text = String::from_utf8_lossy(&raw).to_string();
    let (head, body) = text.split_once("\r\n\r\n").unwrap_or((&text, ""));
    let mut lines = head.lines();
    let status = lines
        .next()
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|s| s.parse().ok())
        .unwrap_or(0);
    let headers: Vec<(String, String)> = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(k, v)| (k.trim().to_ascii_lowercase(), v.trim().to_string()))
        .collect();
    let body = if headers
        .iter()
        .any(|(k, v)| k == "transfer-encoding" && v.contains("chunked"))
    {
        dechunk(body)
    } else {
        body.to_string()
    };
    Response {
        status,
        headers,
        body,
    }
}

fn dechunk(mut body: &str) -> String {
    let mut out = String::new();
    while let Some((size, rest)) = body.split_once("\r\n") {
        let n = usize::from_str_radix(size.trim(), 16).unwrap_or(0);
        if n == 0 || rest.len() < n {
            break;
        }
        out.push_str(&rest[..n]);
        body = rest[n..].trim_start_matches("\r\n");
    }
    out
}

/// Starts the server on an ephemeral loopback port in a background thread.
pub fn start_server(dir: &Path) -> std::net::SocketAddr {
    start_server_with_token(dir).0
}

/// The same, also returning the per-process access key.
pub fn start_server_with_token(dir: &Path) -> (std::net::SocketAddr, String) {
    start_server_full(dir, None)
}

/// The server with a folder of projects to open and create from the browser; returns
/// its address and access key.
pub fn start_server_full(dir: &Path, projects: Option<PathBuf>) -> (std::net::SocketAddr, String) {
    let (addr, key) = start_server_keyed(dir, projects, true);
    (addr, key.unwrap_or_default())
}

/// The server with or without an access key (`--no-key`).
pub fn start_server_keyed(
    dir: &Path,
    projects: Option<PathBuf>,
    keyed: bool,
) -> (std::net::SocketAddr, Option<String>) {
    let project = gapwise::project::Project::load(dir).expect("project loads");
    let state = std::sync::Arc::new(gapwise::web::AppState::with_projects(project, projects));
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        let runtime = tokio::runtime::Runtime::new().expect("runtime");
        runtime.block_on(async move {
            let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
                .await
                .expect("bind");
            let local = listener.local_addr().expect("addr");
            let guard = if keyed {
                gapwise::web::guard::Guard::for_address(local, false).expect("a key")
            } else {
                gapwise::web::guard::Guard::with_key(local, false, None)
            };
            if let Some(key) = &guard.key {
                KEYS.lock()
                    .unwrap_or_else(std::sync::PoisonError::into_inner)
                    .push((local, key.clone()));
            }
            tx.send((local, guard.key.clone())).expect("send addr");
            axum::serve(listener, gapwise::web::app(state, guard))
                .await
                .expect("serve");
        });
    });
    rx.recv().expect("server address")
}

/// A multipart/form-data body: text fields, then files (field, file name, contents).
pub fn multipart(fields: &[(&str, &str)], files: &[(&str, &str, &[u8])]) -> (String, Vec<u8>) {
    let boundary = "gapwise-test-boundary-7d1";
    let mut body = Vec::new();
    for (k, v) in fields {
        body.extend_from_slice(
            format!("--{boundary}\r\nContent-Disposition: form-data; name=\"{k}\"\r\n\r\n{v}\r\n")
                .as_bytes(),
        );
    }
    for (k, name, data) in files {
        body.extend_from_slice(format!("--{boundary}\r\nContent-Disposition: form-data; name=\"{k}\"; filename=\"{name}\"\r\nContent-Type: text/csv\r\n\r\n").as_bytes());
        body.extend_from_slice(data);
        body.extend_from_slice(b"\r\n");
    }
    body.extend_from_slice(format!("--{boundary}--\r\n").as_bytes());
    (format!("multipart/form-data; boundary={boundary}"), body)
}

/// A GET without extra headers (with the server's key in its cookie).
pub fn get(addr: std::net::SocketAddr, path: &str) -> Response {
    http(addr, "GET", path, &[])
}

/// A GET whose body must be JSON: parsed, or a failure naming the path and the body.
pub fn get_json(addr: std::net::SocketAddr, path: &str) -> serde_json::Value {
    let r = get(addr, path);
    serde_json::from_str(&r.body)
        .unwrap_or_else(|e| panic!("{path} ({}) is not JSON: {e}\n{}", r.status, r.body))
}

/// The folder of committed fixtures, tests/fixtures.
pub fn fixtures() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures")
}

/// `gapwise COMMAND <demo project> OPTIONS...`, which must succeed: its standard output
/// parsed as JSON (the options ask for `--json`).
pub fn demo_json(command: &str, options: &[&str]) -> serde_json::Value {
    let demo = demo_dir();
    let mut args = vec![command, demo.to_str().unwrap()];
    args.extend_from_slice(options);
    let out = gapwise(&args);
    assert_eq!(out.code, 0, "gapwise {args:?}: {}", out.stderr);
    serde_json::from_str(&out.stdout)
        .unwrap_or_else(|e| panic!("gapwise {args:?} printed no JSON: {e}\n{}", out.stdout))
}

/// A POST as our own pages send it: the given Origin header and a body of the given
/// content type (with the server's key in its cookie).
pub fn post_from(
    addr: std::net::SocketAddr,
    origin: &str,
    path: &str,
    content_type: &str,
    body: &[u8],
) -> Response {
    http_body(
        addr,
        "POST",
        path,
        &[("Origin", origin)],
        content_type,
        body,
    )
}

/// The same with a URL-encoded form.
pub fn post_form(addr: std::net::SocketAddr, origin: &str, path: &str, form: &[u8]) -> Response {
    post_from(
        addr,
        origin,
        path,
        "application/x-www-form-urlencoded",
        form,
    )
}

/// Runs the binary once per case (its arguments, what standard error must say) and
/// asserts that each is refused (a non-zero exit) with that message; a failure names the
/// case by its number. Returns the outputs, in order.
pub fn assert_refused(cases: &[(Vec<&str>, &str)]) -> Vec<Output> {
    cases
        .iter()
        .enumerate()
        .map(|(k, (args, said))| {
            let out = gapwise(args);
            assert_ne!(out.code, 0, "case {k} ({said}) was not refused");
            assert!(out.stderr.contains(said), "case {k}: {}", out.stderr);
            out
        })
        .collect()
}

/// A GET answered by the router in this process (no socket, no key): status and body.
pub async fn route(
    state: &std::sync::Arc<gapwise::web::AppState>,
    uri: &str,
) -> (axum::http::StatusCode, String) {
    use tower::ServiceExt;
    let request = axum::http::Request::get(uri)
        .body(axum::body::Body::empty())
        .expect("request");
    let response = gapwise::web::router(std::sync::Arc::clone(state))
        .oneshot(request)
        .await
        .expect("router answers");
    let status = response.status();
    let body = axum::body::to_bytes(response.into_body(), usize::MAX)
        .await
        .expect("body");
    (status, String::from_utf8_lossy(&body).to_string())
}

/// The default settings with each participation model and each weighting, every pairing
/// once (models in the order logit, Firth, probit).
pub fn every_model_and_weighting() -> Vec<gapwise::analysis::settings::Settings> {
    use gapwise::analysis::settings::{ModelKind, Settings, WeightingKind};
    [ModelKind::Logit, ModelKind::Firth, ModelKind::Probit]
        .into_iter()
        .flat_map(|model| {
            WeightingKind::ALL
                .into_iter()
                .map(move |weighting| Settings {
                    model,
                    weighting,
                    ..Settings::default()
                })
        })
        .collect()
}
