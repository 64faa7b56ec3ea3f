//! The web layer: thin axum handlers over the analysis results, one module per page.

pub mod balance;
pub mod context;
pub mod coverage;
pub mod download;
pub mod error;
pub mod format;
pub mod guard;
pub mod handlers;
pub mod impact;
pub mod impact_bounds;
pub mod model;
pub mod overview;
pub mod plan;
pub mod projection;
pub mod projects;
pub mod report;
pub mod sensitivity;
pub mod state;
pub mod work;

use std::net::SocketAddr;
use std::sync::Arc;

use axum::extract::State;
use axum::http::header;
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};

use error::{AppError, AppResult};
pub use state::AppState;

/// Our stylesheet and icon, compiled into the binary so that an installed `gapwise`
/// needs no checkout.
const STYLESHEET: &str = include_str!("../../static/gapwise.css");
const ICON: &str = include_str!("../../static/favicon.svg");

async fn stylesheet() -> Response {
    (
        [
            (header::CONTENT_TYPE, "text/css; charset=utf-8"),
            (header::CACHE_CONTROL, "max-age=3600"),
        ],
        STYLESHEET,
    )
        .into_response()
}

async fn icon() -> Response {
    (
        [
            (header::CONTENT_TYPE, "image/svg+xml"),
            (header::CACHE_CONTROL, "max-age=3600"),
        ],
        ICON,
    )
        .into_response()
}

/// Every route, grouped by page.
pub fn router(state: Arc<AppState>) -> Router {
    Router::new()
        // Overview
        .route("/", get(overview::page))
        .route("/api/overview", get(overview::json))
        .route("/charts/coverage.svg", get(overview::coverage_svg))
        .route("/api/imputation", get(overview::IMPUTATION.twin(|s| s)))
        // Balance
        .route("/balance", get(balance::COMPUTATION.page(balance::page)))
        .route("/api/balance", get(balance::COMPUTATION.twin(|(_, b)| b)))
        .route(
            "/balance/{item}",
            get(balance::COMPUTATION.downloads(balance::artifact)),
        )
        // Participation model
        .route("/model", get(model::COMPUTATION.page(model::page)))
        .route("/api/model", get(model::COMPUTATION.twin(|(_, r)| r)))
        .route(
            "/model/{item}",
            get(model::COMPUTATION.downloads(model::artifact)),
        )
        // Coverage
        .route("/coverage", get(coverage::COMPUTATION.page(coverage::page)))
        .route(
            "/api/coverage",
            get(coverage::COMPUTATION.twin(coverage::twin)),
        )
        .route(
            "/coverage/{item}",
            get(coverage::COMPUTATION.downloads(coverage::artifact)),
        )
        // Recruitment plan
        .route("/plan", get(plan::COMPUTATION.page(plan::page)))
        .route("/api/plan", get(plan::COMPUTATION.twin(plan::twin)))
        .route(
            "/plan/{item}",
            get(plan::COMPUTATION.downloads(plan::artifact)),
        )
        // Impact on respondent-level findings
        .route("/impact", get(impact::page))
        .route("/api/impact", get(impact::COMPUTATION.twin(impact::twin)))
        .route(
            "/impact/{item}",
            get(impact::COMPUTATION.downloads(impact::artifact)),
        )
        .route(
            "/api/impact/bounds",
            get(impact_bounds::COMPUTATION.twin(|b| b)),
        )
        .route(
            "/impact/bounds/{item}",
            get(impact_bounds::COMPUTATION.downloads(impact_bounds::artifact)),
        )
        // Projection to the whole eligible universe
        .route(
            "/projection",
            get(projection::COMPUTATION.page(projection::page)),
        )
        .route(
            "/api/projection",
            get(projection::COMPUTATION.twin(|(_, r, _)| r)),
        )
        .route(
            "/projection/{item}",
            get(projection::COMPUTATION.downloads(projection::artifact)),
        )
        // Meeting report
        .route("/report", get(report::download))
        // Sensitivity
        .route(
            "/sensitivity",
            get(sensitivity::COMPUTATION.page(sensitivity::page)),
        )
        .route(
            "/api/sensitivity",
            get(sensitivity::COMPUTATION.twin(|(_, s)| s)),
        )
        .route(
            "/sensitivity/{item}",
            get(sensitivity::COMPUTATION.downloads(sensitivity::artifact)),
        )
        // Projects
        .route("/api/reload", post(reload))
        .route("/reload", post(reload_from_page))
        .route("/projects", get(projects::list))
        .route("/projects/open", post(projects::open))
        .route("/projects/restore", post(projects::restore))
        .route("/projects/upload", post(projects::upload))
        .route(
            "/projects/map",
            get(projects::map_form).post(projects::map_save),
        )
        // Our own CSS and icon
        .route("/static/gapwise.css", get(stylesheet))
        .route("/static/favicon.svg", get(icon))
        .fallback(not_found)
        .layer(axum::middleware::from_fn_with_state(
            Arc::clone(&state),
            download::label,
        ))
        .with_state(state)
}

async fn not_found() -> AppError {
    AppError::NotFound("no such page; start from / (the overview)".to_string())
}

#[derive(serde::Serialize)]
struct Reloaded {
    title: String,
    waves: Vec<i64>,
    warnings: usize,
    /// What changed since the project was loaded before.
    changes: Vec<String>,
}

#[derive(serde::Deserialize)]
struct ReloadQuery {
    #[serde(default)]
    confirm: Option<String>,
}

/// Reloads the project from disk; the old project stays when the files have problems,
/// and when they hold less than before unless the reload is confirmed (`?confirm=1`).
async fn reload(
    State(state): State<Arc<AppState>>,
    axum::extract::Query(q): axum::extract::Query<ReloadQuery>,
) -> AppResult<Json<Reloaded>> {
    let state = Arc::clone(&state);
    let confirmed = q.confirm.as_deref() == Some("1");
    let fresh = tokio::task::spawn_blocking(move || state.reload(confirmed))
        .await
        .map_err(|e| AppError::Internal(e.to_string()))?
        .map_err(|refused| match refused {
            state::ReloadRefused::Problems(p) => AppError::InvalidProject(p),
            state::ReloadRefused::Loses(lost) => AppError::Conflict(format!(
                "the files on disk hold less than the loaded project: {}. The loaded project is kept. If a program is still writing the files, wait and reload; if the loss is intended, reload with confirmation (POST /api/reload?confirm=1).",
                lost.join("; ")
            )),
        })?;
    Ok(Json(Reloaded {
        title: fresh.manifest.title.clone(),
        waves: fresh.waves.clone(),
        warnings: fresh.warnings.len(),
        changes: fresh.changes.clone(),
    }))
}

#[derive(serde::Deserialize)]
struct ReloadForm {
    #[serde(default)]
    back: String,
}

/// The pages' "Reload project" button: reloads as `POST /api/reload` does (keeping the
/// loaded project when the files have problems or hold less), then returns to the page it
/// was pressed on, with its settings.
async fn reload_from_page(
    State(state): State<Arc<AppState>>,
    axum::Form(form): axum::Form<ReloadForm>,
) -> AppResult<Response> {
    let _reloaded = reload(
        State(state),
        axum::extract::Query(ReloadQuery { confirm: None }),
    )
    .await?;
    Ok(axum::response::Redirect::to(&local_path(&form.back)).into_response())
}

/// `back` when it is a path of this server (one leading `/`, no scheme or host), else `/`.
fn local_path(back: &str) -> String {
    let local = back.starts_with('/')
        && !back.starts_with("//")
        && !back.contains('\\')
        && !back.chars().any(char::is_control);
    if local {
        back.to_string()
    } else {
        "/".to_string()
    }
}

/// The router behind the guard (host check, access key, same origin or key header for
/// changes), a limit on request bodies, and protective headers on every response.
pub fn app(state: Arc<AppState>, guard: guard::Guard) -> Router {
    router(state)
        .layer(axum::middleware::from_fn(error::html_errors))
        .layer(axum::middleware::from_fn_with_state(
            Arc::new(guard),
            guard::check,
        ))
        .layer(axum::extract::DefaultBodyLimit::max(MAX_BODY_BYTES))
        .layer(axum::middleware::from_fn(error::explain_body_limit))
        .layer(axum::middleware::from_fn(guard::protective_headers))
}

/// The largest request body accepted (uploads included).
pub const MAX_BODY_BYTES: usize = 64 * 1024 * 1024;

/// A CSV table, offered for download under `filename`.
pub fn csv_response(filename: &str, text: String) -> Response {
    (
        [
            (header::CONTENT_TYPE, "text/csv; charset=utf-8".to_string()),
            (
                header::CONTENT_DISPOSITION,
                format!("attachment; filename=\"{filename}\""),
            ),
        ],
        text,
    )
        .into_response()
}

/// An SVG chart, shown inline and saved under `filename`.
pub fn svg_response(filename: &str, svg: String) -> Response {
    (
        [
            (header::CONTENT_TYPE, "image/svg+xml".to_string()),
            (
                header::CONTENT_DISPOSITION,
                format!("inline; filename=\"{filename}\""),
            ),
        ],
        svg,
    )
        .into_response()
}

/// Binds `addr` and serves until Ctrl-C. A taken port gets a clear message.
pub async fn serve(
    state: Arc<AppState>,
    addr: SocketAddr,
    allow_remote: bool,
    access: guard::Access,
) -> Result<(), String> {
    let listener = tokio::net::TcpListener::bind(addr).await.map_err(|e| {
        if e.kind() == std::io::ErrorKind::AddrInUse {
            format!("{addr} is already in use (another gapwise, or another program, is listening there); stop it or choose another port with --addr 127.0.0.1:PORT")
        } else {
            format!("cannot listen on {addr}: {e}")
        }
    })?;
    let local = listener.local_addr().map_err(|e| e.to_string())?;
    let guard = if access.no_key {
        guard::Guard::with_key(local, allow_remote, None)
    } else {
        guard::Guard::for_address(local, allow_remote)?
    };
    if let (Some(path), Some(key)) = (&access.key_file, &guard.key) {
        guard::write_key_file(path, key)?;
    }
    // Listen for Ctrl-C before announcing the address, so an early Ctrl-C also stops
    // the server gracefully.
    let stop = stop_signal()?;
    if guard.key.is_none() {
        eprintln!("warning: started with --no-key: every user and program on this machine can read the project's data at http://{local}/");
    }
    println!(
        "gapwise {} serving \"{}\" at {}  (Ctrl-C stops)",
        crate::VERSION,
        state.project().manifest.title,
        guard.start_url(local)
    );
    if guard.key.is_some() {
        println!(
            "open that address once: it hands this run's access key to the browser; scripts send it in the header {}{}",
            guard::KEY_HEADER,
            access
                .key_file
                .as_ref()
                .map(|p| format!(" (also in {})", p.display()))
                .unwrap_or_default()
        );
    }
    let served = axum::serve(listener, app(state, guard))
        .with_graceful_shutdown(stop)
        .await
        .map_err(|e| format!("the server stopped: {e}"));
    // The key dies with the process; so does its file.
    if let Some(path) = &access.key_file {
        let _ = std::fs::remove_file(path);
    }
    served
}

/// A future that completes on Ctrl-C (SIGINT) or SIGTERM; the handlers are installed now.
#[cfg(unix)]
fn stop_signal() -> Result<impl std::future::Future<Output = ()>, String> {
    use tokio::signal::unix::{signal, SignalKind};
    let mut interrupt =
        signal(SignalKind::interrupt()).map_err(|e| format!("cannot listen for Ctrl-C: {e}"))?;
    let mut terminate = signal(SignalKind::terminate())
        .map_err(|e| format!("cannot listen for termination: {e}"))?;
    Ok(async move {
        tokio::select! {
            _ = interrupt.recv() => {}
            _ = terminate.recv() => {}
        }
    })
}

/// A future that completes on Ctrl-C.
#[cfg(not(unix))]
fn stop_signal() -> Result<impl std::future::Future<Output = ()>, String> {
    Ok(async {
        let _ = tokio::signal::ctrl_c().await;
    })
}
