//! Every page, JSON twin and download is computed once per project revision and settings,
//! and shared: a second request with the same settings (in any spelling of the query)
//! is answered from the cache; a reload computes afresh.

mod common;
use common::route;

use std::sync::Arc;

use axum::http::StatusCode;
use gapwise::project::Project;
use gapwise::web::AppState;

/// The status of a GET answered in this process.
async fn get(state: &Arc<AppState>, uri: &str) -> StatusCode {
    route(state, uri).await.0
}

const ROUTES: [&str; 12] = [
    "/",
    "/coverage",
    "/model",
    "/balance",
    "/plan",
    "/impact",
    "/sensitivity",
    "/report",
    "/api/model",
    "/api/plan",
    "/model/coefficients.csv",
    "/plan/plan.csv",
];

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn no_page_recomputes_what_an_earlier_request_computed() {
    let project = Project::load(&gapwise::demo_dir()).expect("demo loads");
    let latest = *project.waves.last().expect("waves");
    let state = Arc::new(AppState::new(project));
    for route in ROUTES {
        assert_eq!(get(&state, route).await, StatusCode::OK, "{route}");
    }
    let first = state.cache.stats();
    assert!(first.misses > 0 && first.entries > 0, "{first:?}");
    for route in ROUTES {
        assert_eq!(get(&state, route).await, StatusCode::OK, "{route}");
    }
    // The latest wave spelled out, and the defaults spelled out, are the same settings.
    let same = format!("/plan?wave={latest}&model=logit&weighting=entropy");
    assert_eq!(get(&state, &same).await, StatusCode::OK);
    let second = state.cache.stats();
    assert_eq!(second.misses, first.misses, "{first:?} then {second:?}");
    assert!(second.hits > first.hits + ROUTES.len() as u64);

    // Other settings are another result.
    assert_eq!(get(&state, "/model?model=probit").await, StatusCode::OK);
    assert_eq!(state.cache.stats().misses, second.misses + 1);

    // A reload is a new revision: computed afresh, the old results forgotten.
    state.reload(false).expect("reload");
    assert_eq!(state.cache.stats().entries, 0);
    assert_eq!(get(&state, "/model").await, StatusCode::OK);
    assert_eq!(state.cache.stats().misses, second.misses + 2);
}

/// Work settings above their limits are refused with the limit, on pages and on the
/// command line alike (common practice: bound every work knob).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn work_settings_are_capped_on_pages_and_command_line() {
    let state = Arc::new(AppState::new(
        Project::load(&gapwise::demo_dir()).expect("demo loads"),
    ));
    for uri in [
        "/plan?replicates=2000",
        "/api/plan?budget=500",
        "/impact?bootstrap=99999",
    ] {
        assert_eq!(get(&state, uri).await, StatusCode::BAD_REQUEST, "{uri}");
    }
    let demo = gapwise::demo_dir();
    let demo = demo.to_str().expect("path");
    for args in [
        vec!["plan", demo, "--replicates", "2000"],
        vec!["plan", demo, "--budget", "500"],
        vec![
            "impact",
            demo,
            "--outcome",
            "trust_parliament",
            "--bootstrap",
            "99999",
        ],
    ] {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_gapwise"))
            .args(&args)
            .output()
            .expect("run gapwise");
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        assert!(
            String::from_utf8_lossy(&out.stderr).contains("above the limit"),
            "{args:?}"
        );
    }
}

/// Two spellings of the same settings are one result: the second request is answered
/// from the cache (reordered and repeated indicators, a number written two ways, older key
/// names, defaults spelled out, keys in another order); a changed setting is computed.
/// Our own rule (issue 12: one cache keyed by the normalised settings).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_spelling_of_the_same_settings_is_one_cached_result() {
    let state = Arc::new(AppState::new(
        Project::load(&gapwise::demo_dir()).expect("demo loads"),
    ));
    let pairs = [
        (
            "/model?covariates=literacy,log_gdp_pc&trim=0.90",
            "/api/model?trim=0.9&covariates=log_gdp_pc,literacy,literacy&model=logit",
        ),
        (
            "/api/impact?outcome=trust_parliament&predictor=age&family=linear&bootstrap=0&replicates=0",
            "/api/impact?replicates=0&wild_replicates=0&kind=linear&predictor=age&outcome=trust_parliament&shares=equal",
        ),
        (
            "/api/plan?budget=3&replicates=0",
            "/api/plan?replicates=0&objective=effective-n&feasibility=auto&budget=%203&support=offer",
        ),
    ];
    for (first, second) in pairs {
        let before = state.cache.stats();
        assert_eq!(get(&state, first).await, StatusCode::OK, "{first}");
        let computed = state.cache.stats();
        assert_eq!(computed.misses, before.misses + 1, "{first}");
        assert_eq!(get(&state, second).await, StatusCode::OK, "{second}");
        let after = state.cache.stats();
        assert_eq!(after.misses, computed.misses, "{second} was computed again");
        assert_eq!(after.hits, computed.hits + 1, "{second}");
    }
    let before = state.cache.stats();
    assert_eq!(
        get(&state, "/api/model?covariates=literacy&trim=0.9").await,
        StatusCode::OK
    );
    assert_eq!(
        state.cache.stats().misses,
        before.misses + 1,
        "other settings"
    );
}
