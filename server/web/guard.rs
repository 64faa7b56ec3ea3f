//! Defences of a localhost server that holds study data: requests must name the bound
//! loopback host (against DNS rebinding from a malicious page), and state-changing requests
//! must come from our own pages (same origin) or carry the per-process token.

use std::net::SocketAddr;
use std::sync::Arc;

use axum::extract::{Request, State};
use axum::http::{header, Method, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};

/// What the guard accepts.
#[derive(Debug, Clone)]
pub struct Guard {
    /// Acceptable Host header values; `None` when serving beyond loopback on purpose.
    pub hosts: Option<Vec<String>>,
    /// Token for scripted state-changing requests (header `x-gapwise-token`).
    pub token: String,
}

impl Guard {
    pub fn for_address(addr: SocketAddr, allow_remote: bool) -> Guard {
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
            token: process_token(),
        }
    }

    fn host_ok(&self, host: Option<&str>) -> bool {
        match (&self.hosts, host) {
            (None, _) => true,
            (Some(allowed), Some(h)) => allowed.iter().any(|a| a.eq_ignore_ascii_case(h)),
            (Some(_), None) => false,
        }
    }
}

/// A token that differs per process: time and process id through a mixing function. It
/// only has to be unguessable by a web page in another origin, which cannot read it.
fn process_token() -> String {
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos() as u64);
    let mut rng = crate::stats::random::Rng::new(nanos ^ (u64::from(std::process::id()) << 32));
    format!("{:016x}{:016x}", rng.next_u64(), rng.next_u64())
}

pub async fn check(State(guard): State<Arc<Guard>>, request: Request, next: Next) -> Response {
    let host = request
        .headers()
        .get(header::HOST)
        .and_then(|h| h.to_str().ok());
    if !guard.host_ok(host) {
        return (StatusCode::MISDIRECTED_REQUEST, "this server answers only requests addressed to its loopback address (for example http://127.0.0.1:7878/); open it by that address").into_response();
    }
    let changes_state = !matches!(
        *request.method(),
        Method::GET | Method::HEAD | Method::OPTIONS
    );
    if changes_state {
        let token_ok = request
            .headers()
            .get("x-gapwise-token")
            .and_then(|v| v.to_str().ok())
            == Some(guard.token.as_str());
        let origin = request
            .headers()
            .get(header::ORIGIN)
            .and_then(|v| v.to_str().ok());
        let same_origin = match (origin, host) {
            (Some(o), Some(h)) => o
                .strip_prefix("http://")
                .is_some_and(|rest| rest.eq_ignore_ascii_case(h)),
            _ => false,
        };
        if !(token_ok || same_origin) {
            return (StatusCode::FORBIDDEN, "changes are accepted only from gapwise's own pages or with the x-gapwise-token header printed at start-up").into_response();
        }
    }
    next.run(request).await
}
