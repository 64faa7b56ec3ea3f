//! The one error type of the web layer: each variant maps to an HTTP status and a plain
//! message that says what to do.

use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};

use crate::project::Problem;

#[derive(Debug, thiserror::Error)]
pub enum AppError {
    #[error("{0}")]
    NotFound(String),
    #[error("{0}")]
    BadRequest(String),
    #[error("the project has problems:\n{}", .0.iter().map(Problem::to_string).collect::<Vec<_>>().join("\n"))]
    InvalidProject(Vec<Problem>),
    #[error("internal error: {0}")]
    Internal(String),
}

impl AppError {
    pub fn status(&self) -> StatusCode {
        match self {
            AppError::NotFound(_) => StatusCode::NOT_FOUND,
            AppError::BadRequest(_) => StatusCode::BAD_REQUEST,
            AppError::InvalidProject(_) => StatusCode::UNPROCESSABLE_ENTITY,
            AppError::Internal(_) => StatusCode::INTERNAL_SERVER_ERROR,
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
        (
            self.status(),
            [("content-type", "text/plain; charset=utf-8")],
            self.to_string(),
        )
            .into_response()
    }
}

pub type AppResult<T> = Result<T, AppError>;
