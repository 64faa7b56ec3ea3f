//! The handlers of an analysis page, made from its one computation: the HTML page, its
//! JSON twin and its downloads. Each runs the computation on the page's lane through the
//! result cache, so that a page, its twin and its downloads compute once per project
//! revision and settings; a page module only says how its result is presented.

use std::future::Future;
use std::pin::Pin;
use std::sync::Arc;

use axum::extract::{Path, Query as QueryString, State};
use axum::response::{Html, Response};
use axum::Json;
use serde::Serialize;

use super::context::{page_key, PageSettings, Query};
use super::error::AppResult;
use super::state::AppState;
use super::work::{CachedResult, Lane};

/// The future a page's handler answers with.
pub type Answer<R> = Pin<Box<dyn Future<Output = AppResult<R>> + Send>>;

/// A page's computation and the lane it runs on.
pub struct Computation<T> {
    pub lane: Lane,
    pub compute: fn(&AppState, &Query) -> AppResult<T>,
}

// By hand: a derive would ask `T: Copy`, but only a function of `T` is held.
impl<T> Clone for Computation<T> {
    fn clone(&self) -> Self {
        *self
    }
}

impl<T> Copy for Computation<T> {}

impl<T> Computation<T> {
    /// Light work (a model fit, a table): on tokio's blocking pool.
    pub const fn light(compute: fn(&AppState, &Query) -> AppResult<T>) -> Self {
        Computation {
            lane: Lane::Light,
            compute,
        }
    }

    /// Heavy work (bootstrap replicates, the planner, the report): on the bounded heavy
    /// pool, answering 503 when too much is queued.
    pub const fn heavy(compute: fn(&AppState, &Query) -> AppResult<T>) -> Self {
        Computation {
            lane: Lane::Heavy,
            compute,
        }
    }
}

impl<T: PageSettings + CachedResult> Computation<T> {
    /// The result for `query`: from the result cache, else computed on the lane.
    pub async fn result(self, state: &Arc<AppState>, query: &Query) -> AppResult<T> {
        let key = page_key::<T>(state, query);
        let (job_state, query, compute) = (Arc::clone(state), query.clone(), self.compute);
        Ok(state
            .work
            .run(self.lane, &state.cache, key, move || {
                compute(&job_state, &query)
            })
            .await?)
    }

    /// The HTML page: `render` presents the result (the state and the query give what the
    /// page adds to it, such as the project's labels and the presentation view).
    pub fn page(
        self,
        render: fn(&AppState, &Query, T) -> AppResult<String>,
    ) -> impl Fn(State<Arc<AppState>>, QueryString<Query>) -> Answer<Html<String>>
           + Clone
           + Send
           + Sync
           + 'static {
        move |State(state), QueryString(query)| {
            Box::pin(async move {
                let result = self.result(&state, &query).await?;
                Ok(Html(render(&state, &query, result)?))
            })
        }
    }

    /// The JSON twin: the part `pick` takes from the result.
    pub fn twin<J>(
        self,
        pick: fn(T) -> J,
    ) -> impl Fn(State<Arc<AppState>>, QueryString<Query>) -> Answer<Json<J>>
           + Clone
           + Send
           + Sync
           + 'static
    where
        J: Serialize + Send + 'static,
    {
        move |State(state), QueryString(query)| {
            Box::pin(async move { Ok(Json(pick(self.result(&state, &query).await?))) })
        }
    }

    /// The downloads (`/page/{item}`): `download` answers an item from the result, and
    /// says which items there are when asked for another.
    pub fn downloads(
        self,
        download: fn(&str, &T) -> AppResult<Response>,
    ) -> impl Fn(State<Arc<AppState>>, Path<String>, QueryString<Query>) -> Answer<Response>
           + Clone
           + Send
           + Sync
           + 'static {
        move |State(state), Path(item), QueryString(query)| {
            Box::pin(async move {
                let result = self.result(&state, &query).await?;
                download(&item, &result)
            })
        }
    }
}
