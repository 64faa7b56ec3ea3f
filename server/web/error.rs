//! The one error type of the web layer: each variant maps to an HTTP status and a plain
//! message that says what to do.

use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};

use crate::project::Problem;

#[derive(Debug, thiserror::Error)]
pub enum AppError {
    /// No such page, download, wave or project (404).
    #[error("{0}")]
    NotFound(String),
    /// Settings that cannot be read or are not allowed (400).
    #[error("{0}")]
    BadRequest(String),
    /// Well-formed settings that this project's data cannot answer: a design without
    /// variation, a model that cannot be fitted, a weighting that fails (422).
    #[error("{0}")]
    Unprocessable(String),
    /// The request would lose data; it says how to confirm.
    #[error("{0}")]
    Conflict(String),
    #[error("the project has problems:\n{}", .0.iter().map(Problem::to_string).collect::<Vec<_>>().join("\n"))]
    InvalidProject(Vec<Problem>),
    #[error("internal error: {0}")]
    Internal(String),
    /// Too much heavy work at once, or still computing: come back after some seconds.
    #[error("{message}")]
    Busy {
        message: String,
        retry_after_seconds: u64,
    },
}

impl AppError {
    pub fn status(&self) -> StatusCode {
        match self {
            AppError::NotFound(_) => StatusCode::NOT_FOUND,
            AppError::BadRequest(_) => StatusCode::BAD_REQUEST,
            AppError::Unprocessable(_) => StatusCode::UNPROCESSABLE_ENTITY,
            AppError::Conflict(_) => StatusCode::CONFLICT,
            AppError::InvalidProject(_) => StatusCode::UNPROCESSABLE_ENTITY,
            AppError::Internal(_) => StatusCode::INTERNAL_SERVER_ERROR,
            AppError::Busy { .. } => StatusCode::SERVICE_UNAVAILABLE,
        }
    }
}

// The analyses' errors, by what the reader can do about them: change a setting (400),
// or accept that the data cannot answer this question (422); a missing wave is 404.

impl From<crate::analysis::settings::SettingsError> for AppError {
    fn from(e: crate::analysis::settings::SettingsError) -> Self {
        AppError::BadRequest(e.to_string())
    }
}

impl From<crate::project::UnknownWave> for AppError {
    fn from(e: crate::project::UnknownWave) -> Self {
        AppError::NotFound(e.to_string())
    }
}

impl From<crate::analysis::participation::AnalysisError> for AppError {
    fn from(e: crate::analysis::participation::AnalysisError) -> Self {
        AppError::Unprocessable(e.to_string())
    }
}

impl From<crate::analysis::imputed::ImputedError> for AppError {
    fn from(e: crate::analysis::imputed::ImputedError) -> Self {
        // Multiple imputation that cannot complete or combine the frames: settings to change
        // (fewer indicators, another missing-value rule).
        AppError::BadRequest(e.to_string())
    }
}

impl From<crate::analysis::impact::ImpactError> for AppError {
    fn from(e: crate::analysis::impact::ImpactError) -> Self {
        use crate::analysis::impact::ImpactError;
        match e {
            ImpactError::Analysis(a) => a.into(),
            ImpactError::Request(m) => AppError::BadRequest(m),
        }
    }
}

impl From<crate::analysis::planner::PlanError> for AppError {
    fn from(e: crate::analysis::planner::PlanError) -> Self {
        use crate::analysis::planner::PlanError;
        match e {
            PlanError::Analysis(a) => a.into(),
            PlanError::Request(m) => AppError::BadRequest(m),
        }
    }
}

impl From<crate::analysis::projection::ProjectionError> for AppError {
    fn from(e: crate::analysis::projection::ProjectionError) -> Self {
        // Every projection error is a request the settings can change.
        AppError::BadRequest(e.to_string())
    }
}

impl From<crate::analysis::selection_bounds::SelectionBoundsError> for AppError {
    fn from(e: crate::analysis::selection_bounds::SelectionBoundsError) -> Self {
        use crate::analysis::selection_bounds::SelectionBoundsError;
        match e {
            SelectionBoundsError::Request(m) => AppError::BadRequest(m),
            // As on every other page: a design or model this wave cannot give is 422.
            SelectionBoundsError::Design(d) => {
                crate::analysis::participation::AnalysisError::from(d).into()
            }
            SelectionBoundsError::Model(_) | SelectionBoundsError::Data(_) => {
                AppError::Unprocessable(e.to_string())
            }
        }
    }
}

impl From<askama::Error> for AppError {
    fn from(e: askama::Error) -> Self {
        AppError::Internal(format!("a page template failed: {e}"))
    }
}

impl IntoResponse for AppError {
    fn into_response(self) -> Response {
        let mut response = (
            self.status(),
            [("content-type", "text/plain; charset=utf-8")],
            self.to_string(),
        )
            .into_response();
        if let AppError::Busy {
            retry_after_seconds,
            ..
        } = &self
        {
            if let Ok(v) = axum::http::HeaderValue::from_str(&retry_after_seconds.to_string()) {
                response
                    .headers_mut()
                    .insert(axum::http::header::RETRY_AFTER, v);
            }
        }
        response
    }
}

impl<E: Into<AppError>> From<super::work::WorkError<E>> for AppError {
    fn from(e: super::work::WorkError<E>) -> Self {
        use super::work::WorkError;
        match e {
            WorkError::Failed(e) => e.into(),
            WorkError::Busy {
                retry_after_seconds,
            } => AppError::Busy {
                message: format!(
                    "the server is busy with other analyses; try again in {retry_after_seconds} seconds"
                ),
                retry_after_seconds,
            },
            WorkError::StillComputing {
                retry_after_seconds,
            } => AppError::Busy {
                message: format!(
                    "still computing this analysis; it will be ready shortly (try again in {retry_after_seconds} seconds)"
                ),
                retry_after_seconds,
            },
            WorkError::Lost(m) => AppError::Internal(format!("the computation stopped: {m}")),
        }
    }
}

pub type AppResult<T> = Result<T, AppError>;

#[derive(askama::Template)]
#[template(path = "error.html")]
struct ErrorPage<'a> {
    page: &'static str,
    nav_query: String,
    heading: &'static str,
    message: String,
    retry: String,
    /// Seconds after which the page reloads itself (0: never), for work still under way.
    refresh_seconds: u64,
    cautions: &'a [crate::analysis::cautions::Caution],
}

/// Shows errors of pages (not of `/api/` twins or downloads) inside the usual layout, so a
/// reader keeps the navigation and can go back or retry with default settings.
pub async fn html_errors(
    request: axum::extract::Request,
    next: axum::middleware::Next,
) -> Response {
    let path = request.uri().path().to_string();
    // "This page with default settings" makes sense only for a page read with settings:
    // not for a page that does not exist, nor for a form's post (a GET of it fails).
    let has_settings = request.method() == axum::http::Method::GET
        && request.uri().query().is_some_and(|q| !q.is_empty());
    let path_and_query = request
        .uri()
        .path_and_query()
        .map_or_else(|| path.clone(), |pq| pq.as_str().to_string());
    let is_page = !path.starts_with("/api/")
        && !path.starts_with("/static/")
        && !path.rsplit('/').next().unwrap_or("").contains('.');
    let response = next.run(request).await;
    let status = response.status();
    let plain = response
        .headers()
        .get(axum::http::header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.starts_with("text/plain"));
    if !is_page
        || !plain
        || !(status.is_client_error() || status.is_server_error())
        || status == StatusCode::MISDIRECTED_REQUEST
        || status == StatusCode::FORBIDDEN
    {
        return response;
    }
    let retry_after = response
        .headers()
        .get(axum::http::header::RETRY_AFTER)
        .cloned();
    let body = axum::body::to_bytes(response.into_body(), 1 << 20)
        .await
        .unwrap_or_default();
    let busy = status == StatusCode::SERVICE_UNAVAILABLE;
    let page = ErrorPage {
        page: "",
        nav_query: String::new(),
        heading: if status == StatusCode::NOT_FOUND {
            "Not found"
        } else if busy {
            "Still working on it"
        } else {
            "This cannot be shown with these settings"
        },
        message: String::from_utf8_lossy(&body).to_string(),
        retry: if busy {
            path_and_query
        } else if path == "/" || !has_settings {
            String::new()
        } else {
            path
        },
        refresh_seconds: if busy {
            retry_after
                .as_ref()
                .and_then(|v| v.to_str().ok())
                .and_then(|v| v.parse().ok())
                .unwrap_or(3)
        } else {
            0
        },
        cautions: &crate::analysis::cautions::STANDING,
    };
    let mut response = match askama::Template::render(&page) {
        Ok(html) => (status, axum::response::Html(html)).into_response(),
        Err(_) => (status, String::from_utf8_lossy(&body).to_string()).into_response(),
    };
    if let Some(v) = retry_after {
        response
            .headers_mut()
            .insert(axum::http::header::RETRY_AFTER, v);
    }
    response
}

/// A request body over the limit gets a message that states the limit (the framework's
/// own says only "length limit exceeded").
pub async fn explain_body_limit(
    request: axum::extract::Request,
    next: axum::middleware::Next,
) -> Response {
    let response = next.run(request).await;
    if response.status() != StatusCode::PAYLOAD_TOO_LARGE {
        return response;
    }
    (
        StatusCode::PAYLOAD_TOO_LARGE,
        [("content-type", "text/plain; charset=utf-8")],
        format!(
            "the request is larger than the limit of {} MB; upload smaller files (Parquet is more compact than CSV), or open a larger project from a folder with gapwise serve DIR",
            super::MAX_BODY_BYTES / 1024 / 1024
        ),
    )
        .into_response()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::design::DesignError;
    use crate::analysis::impact::ImpactError;
    use crate::analysis::participation::AnalysisError;
    use crate::analysis::planner::PlanError;
    use crate::analysis::settings::SettingsError;

    #[test]
    fn analysis_errors_answer_with_what_the_reader_can_do() {
        // RFC 9110: 400 for a request the server will not process as sent (bad settings),
        // 404 for a resource it does not have (a wave), 422 for well-formed content it
        // cannot process (data that cannot answer).
        let status = |e: AppError| e.status().as_u16();
        assert_eq!(status(SettingsError("trim".into()).into()), 400);
        assert_eq!(
            status(crate::project::UnknownWave("no wave 9".into()).into()),
            404
        );
        let design = || AnalysisError::Design(DesignError("constant".into()));
        assert_eq!(status(design().into()), 422);
        assert_eq!(
            status(
                AnalysisError::Weighting {
                    method: "entropy",
                    message: "infeasible".into()
                }
                .into()
            ),
            422
        );
        assert_eq!(status(ImpactError::Analysis(design()).into()), 422);
        assert_eq!(status(ImpactError::Request("outcome".into()).into()), 400);
        assert_eq!(status(PlanError::Analysis(design()).into()), 422);
        assert_eq!(status(PlanError::Request("budget".into()).into()), 400);
        // The message is kept as it was.
        let e: AppError = PlanError::Request("budget must be positive".into()).into();
        assert_eq!(e.to_string(), "budget must be positive");
    }

    /// The sensitivity bounds' errors follow the same rule as the other analyses' (RFC
    /// 9110 as above): a setting to change is 400, data that cannot answer is 422.
    #[test]
    fn selection_bounds_errors_answer_like_the_other_analyses() {
        use crate::analysis::selection_bounds::{Reference, SelectionBoundsError};
        use crate::stats::binary::FitError;
        use crate::stats::selection_bounds::BoundsError;
        let status = |e: SelectionBoundsError| AppError::from(e).status().as_u16();
        let bad_reference = Reference::parse("abc").expect_err("not a reference");
        assert_eq!(status(bad_reference.clone()), 400);
        assert!(AppError::from(bad_reference)
            .to_string()
            .contains("the reference must be zero, unweighted or a number, not 'abc'"));
        assert_eq!(
            status(SelectionBoundsError::Request(
                "'x' is not an indicator".into()
            )),
            400
        );
        assert_eq!(
            status(SelectionBoundsError::Design(DesignError("constant".into()))),
            422
        );
        assert_eq!(status(FitError::Singular.into()), 422);
        assert_eq!(status(BoundsError::Empty.into()), 422);
        assert_eq!(
            status(SelectionBoundsError::Data("population missing".into())),
            422
        );
    }
}
