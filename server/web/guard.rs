//! Defences of a localhost server that holds study data.
//!
//! - Every request must name the bound loopback host (against DNS rebinding from a
//!   malicious page).
//! - Every request must carry the per-process access key: 128 random bits from the
//!   operating system, handed over once in the start-up URL (`/?key=...` sets an HttpOnly,
//!   SameSite=Strict cookie and redirects to the same address without the key) or sent by
//!   scripts in the `x-gapwise-key` header. Keys are compared in constant time.
//! - The cookie is accepted only on requests that the browser marks as coming from our own
//!   pages (or typed in), never from another site or another localhost port.
//! - State-changing requests authenticated by the cookie must also come from our own
//!   origin; the header alone suffices (a foreign page cannot set it).
//! - Every response carries protective headers (see [`protective_headers`]).

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use axum::extract::{Request, State};
use axum::http::{header, HeaderMap, HeaderValue, Method, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};

/// The header in which scripts send the access key.
pub const KEY_HEADER: &str = "x-gapwise-key";
/// The query parameter of the start-up URL that hands the key to the browser.
pub const KEY_PARAM: &str = "key";

/// How the server is protected and keeps data, chosen at start-up.
#[derive(Debug, Clone)]
pub struct Access {
    /// Serve without a key (the behaviour before keys, for a single-user machine).
    pub no_key: bool,
    /// Also write the key to this file, readable only by its owner.
    pub key_file: Option<PathBuf>,
    /// Versions kept of each project saved from the browser.
    pub keep_versions: usize,
}

impl Default for Access {
    fn default() -> Self {
        Access {
            no_key: false,
            key_file: None,
            keep_versions: crate::project::store::DEFAULT_KEEP,
        }
    }
}

/// What the guard accepts.
#[derive(Debug, Clone)]
pub struct Guard {
    /// Acceptable Host header values; `None` when serving beyond loopback on purpose.
    pub hosts: Option<Vec<String>>,
    /// The per-process access key (32 hexadecimal digits); `None` with `--no-key`.
    pub key: Option<String>,
    /// Name of the cookie that holds the key; it includes the port, because browsers
    /// share cookies between the ports of one host.
    pub cookie: String,
}

/// 128 random bits from the operating system, as 32 hexadecimal digits.
pub fn generate_key() -> Result<String, String> {
    let mut bytes = [0u8; 16];
    getrandom::fill(&mut bytes)
        .map_err(|e| format!("cannot draw a random access key from the operating system: {e}"))?;
    Ok(bytes.iter().map(|b| format!("{b:02x}")).collect())
}

/// Equality of two byte strings whose running time does not depend on where they differ
/// (it depends on the lengths only, and the length of a key is public).
pub fn constant_time_eq(a: &[u8], b: &[u8]) -> bool {
    if a.len() != b.len() {
        return false;
    }
    a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y)) == 0
}

/// Writes the key to `path`, readable and writable by its owner only (mode 0600 on Unix);
/// an existing file is replaced, never reused with its old permissions.
pub fn write_key_file(path: &Path, key: &str) -> Result<(), String> {
    let fail = |e: std::io::Error| format!("cannot write the key file {}: {e}", path.display());
    match std::fs::remove_file(path) {
        Ok(()) => {}
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
        Err(e) => return Err(fail(e)),
    }
    let mut options = std::fs::OpenOptions::new();
    options.write(true).create_new(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        options.mode(0o600);
    }
    let mut file = options.open(path).map_err(fail)?;
    std::io::Write::write_all(&mut file, format!("{key}\n").as_bytes()).map_err(fail)?;
    file.sync_all().map_err(fail)
}

impl Guard {
    /// The guard of a server bound to `addr`, with a fresh access key.
    pub fn for_address(addr: SocketAddr, allow_remote: bool) -> Result<Guard, String> {
        Ok(Guard::with_key(addr, allow_remote, Some(generate_key()?)))
    }

    /// The guard of a server bound to `addr` with the given key (`None`: no key needed).
    pub fn with_key(addr: SocketAddr, allow_remote: bool, key: Option<String>) -> Guard {
        let port = addr.port();
        let hosts = (!allow_remote).then(|| {
            let mut h = vec![
                format!("127.0.0.1:{port}"),
                format!("localhost:{port}"),
                format!("[::1]:{port}"),
                addr.to_string(),
            ];
            if port == 80 {
                h.extend(["127.0.0.1".to_string(), "localhost".to_string()]);
            }
            h
        });
        Guard {
            hosts,
            key,
            cookie: format!("gapwise_key_{port}"),
        }
    }

    fn host_ok(&self, host: Option<&str>) -> bool {
        match (&self.hosts, host) {
            (None, _) => true,
            (Some(allowed), Some(h)) => allowed.iter().any(|a| a.eq_ignore_ascii_case(h)),
            (Some(_), None) => false,
        }
    }

    fn matches(&self, candidate: &str) -> bool {
        self.key
            .as_deref()
            .is_some_and(|k| constant_time_eq(k.as_bytes(), candidate.as_bytes()))
    }

    /// The key from the header, if it is there and right.
    fn header_ok(&self, headers: &HeaderMap) -> bool {
        headers
            .get_all(KEY_HEADER)
            .iter()
            .filter_map(|v| v.to_str().ok())
            .any(|v| self.matches(v.trim()))
    }

    /// The key from our cookie, if it is there and right.
    fn cookie_ok(&self, headers: &HeaderMap) -> bool {
        headers
            .get_all(header::COOKIE)
            .iter()
            .filter_map(|v| v.to_str().ok())
            .flat_map(|v| v.split(';'))
            .filter_map(|pair| pair.trim().split_once('='))
            .any(|(name, value)| name == self.cookie && self.matches(value))
    }

    /// The URL to open first: it hands the key to the browser.
    pub fn start_url(&self, local: SocketAddr) -> String {
        match &self.key {
            Some(key) => format!("http://{local}/?{KEY_PARAM}={key}"),
            None => format!("http://{local}/"),
        }
    }
}

/// Whether the browser says the request comes from a page of another origin (another site
/// or another port of this host). Requests without the header (scripts, old browsers) and
/// typed-in addresses (`none`) are not foreign.
fn foreign_fetch(headers: &HeaderMap) -> bool {
    headers
        .get("sec-fetch-site")
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| !matches!(v, "same-origin" | "none"))
}

/// The query string without the key parameter (`None` when the key was not there).
fn strip_key(query: &str) -> Option<(String, String)> {
    let mut key = None;
    let rest: Vec<&str> = query
        .split('&')
        .filter(|pair| {
            let (name, value) = pair.split_once('=').unwrap_or((pair, ""));
            if name == KEY_PARAM {
                key = Some(value.to_string());
                false
            } else {
                !pair.is_empty()
            }
        })
        .collect();
    key.map(|k| (k, rest.join("&")))
}

const NEED_KEY: &str = "this server needs its access key: open the address printed when it started (it ends in ?key=...), or send the key in the x-gapwise-key header (it is also in the --key-file, if one was given). Start the server with --no-key to switch keys off on a single-user machine.";

pub async fn check(State(guard): State<Arc<Guard>>, request: Request, next: Next) -> Response {
    let headers = request.headers();
    let host = headers.get(header::HOST).and_then(|h| h.to_str().ok());
    if !guard.host_ok(host) {
        return (StatusCode::MISDIRECTED_REQUEST, "this server answers only requests addressed to its loopback address (for example http://127.0.0.1:7878/); open it by that address").into_response();
    }
    let reads = matches!(
        *request.method(),
        Method::GET | Method::HEAD | Method::OPTIONS
    );
    // The start-up URL: the key in the query sets the cookie, once, and is then removed
    // from the address bar (and so from the history and from links).
    if guard.key.is_some() && reads {
        if let Some((offered, rest)) = request.uri().query().and_then(strip_key) {
            if !guard.matches(&offered) {
                return (StatusCode::UNAUTHORIZED, NEED_KEY).into_response();
            }
            let path = request.uri().path();
            let location = if rest.is_empty() {
                path.to_string()
            } else {
                format!("{path}?{rest}")
            };
            let cookie = format!(
                "{}={offered}; Path=/; HttpOnly; SameSite=Strict",
                guard.cookie
            );
            let mut response = StatusCode::SEE_OTHER.into_response();
            for (name, value) in [(header::LOCATION, location), (header::SET_COOKIE, cookie)] {
                if let Ok(v) = HeaderValue::from_str(&value) {
                    response.headers_mut().insert(name, v);
                }
            }
            return response;
        }
    }
    let by_header = guard.key.is_none() || guard.header_ok(headers);
    let by_cookie = !by_header && !foreign_fetch(headers) && guard.cookie_ok(headers);
    if !(by_header || by_cookie) {
        return (StatusCode::UNAUTHORIZED, NEED_KEY).into_response();
    }
    // Changes: from our own pages (same origin) or with the key in the header. Without a
    // key at all, the Origin check is the only defence, as before keys.
    if !reads {
        let origin = headers.get(header::ORIGIN).and_then(|v| v.to_str().ok());
        // Under `Referrer-Policy: no-referrer` a browser sends `Origin: null` with a form
        // post, even from our own page; its `Sec-Fetch-Site: same-origin` (which a page
        // cannot set) then says where the post came from.
        let fetched_here = headers
            .get("sec-fetch-site")
            .and_then(|v| v.to_str().ok())
            .is_some_and(|v| v == "same-origin");
        let same_origin = match (origin, host) {
            (Some("null"), Some(_)) => fetched_here,
            (Some(o), Some(h)) => o
                .strip_prefix("http://")
                .is_some_and(|rest| rest.eq_ignore_ascii_case(h)),
            _ => false,
        };
        let header_key = guard.key.is_some() && by_header;
        if !(header_key || same_origin) {
            return (StatusCode::FORBIDDEN, "changes are accepted only from gapwise's own pages or with the access key in the x-gapwise-key header").into_response();
        }
    }
    next.run(request).await
}

/// The Content-Security-Policy of our pages: scripts, styles and images from our own
/// origin only (no inline script or style), forms only to us, never inside a frame.
pub const PAGE_POLICY: &str = "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; font-src 'self'; connect-src 'self'; form-action 'self'; base-uri 'none'; frame-ancestors 'none'";
/// The meeting report is a standalone file with its style inside; it may use that style,
/// nothing else, and never runs script.
pub const REPORT_POLICY: &str = "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; form-action 'none'; frame-ancestors 'none'; sandbox";

/// Headers on every response: a Content-Security-Policy, no MIME sniffing, no referrer,
/// no framing, and `Cache-Control: no-store` on everything but our static files (pages,
/// JSON, charts and exports all carry study data).
pub async fn protective_headers(request: Request, next: Next) -> Response {
    let path = request.uri().path().to_string();
    let mut response = next.run(request).await;
    let h = response.headers_mut();
    let policy = if path == "/report" {
        REPORT_POLICY
    } else {
        PAGE_POLICY
    };
    h.insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static(policy),
    );
    h.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    h.insert(
        header::REFERRER_POLICY,
        HeaderValue::from_static("no-referrer"),
    );
    h.insert(header::X_FRAME_OPTIONS, HeaderValue::from_static("DENY"));
    if !path.starts_with("/static/") {
        h.insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    }
    response
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keys_are_128_random_bits() {
        let a = generate_key().unwrap();
        let b = generate_key().unwrap();
        assert_eq!(a.len(), 32);
        assert!(a.chars().all(|c| c.is_ascii_hexdigit()));
        assert_ne!(a, b);
    }

    #[test]
    fn constant_time_comparison() {
        assert!(constant_time_eq(b"abcd", b"abcd"));
        assert!(!constant_time_eq(b"abcd", b"abce"));
        assert!(!constant_time_eq(b"abcd", b"abc"));
        assert!(!constant_time_eq(b"", b"a"));
    }

    #[test]
    fn the_key_leaves_the_query() {
        assert_eq!(strip_key("key=1"), Some(("1".into(), String::new())));
        assert_eq!(
            strip_key("wave=2&key=1&model=probit"),
            Some(("1".into(), "wave=2&model=probit".into()))
        );
        assert_eq!(strip_key("wave=2"), None);
        assert_eq!(strip_key("keys=1"), None);
    }
}
