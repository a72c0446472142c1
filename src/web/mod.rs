//! The web view: an HTTP listener beside gRPC (`web_listen`) with server-rendered pages of
//! runs, datasets and schedules. A transport like `rpc/`: each page reads the request,
//! calls the service ([`crate::service`], core types) and renders the answer.
//!
//! - [`pages`] the HTML (maud templates, checked at compile time), plots and tree inline SVG
//! - [`live`]  a running run's progress as server-sent events, from the same event log that
//!   FollowRun reads, resuming after a sequence number
//!
//! Access: the same tokens and role table as gRPC ([`crate::access`]). With tokens on, a
//! reader signs in once with a token on `/sign-in`; it is kept in an HttpOnly, SameSite
//! cookie and looked up on every request, so a withdrawn token stops working at once. Pages
//! are read-only; cancelling a run needs what CancelRun needs.
//!
//! Failures of the service become HTTP statuses in [`status_of`], the one map of this
//! transport (the gRPC one is `rpc/error.rs`).

pub mod live;
pub mod pages;

use std::collections::HashMap;
use std::sync::Arc;

use axum::extract::{Form, Path, Query, State};
use axum::http::{header, HeaderMap, StatusCode};
use axum::response::{IntoResponse, Redirect, Response};
use axum::routing::{get, post};
use axum::Router;
use tokio::net::TcpListener;

use crate::access::layer::Gate;
use crate::access::{Caller, Rpc};
use crate::service::models::{ModelFile, ModelFormat};
use crate::service::{Service, ServiceError};
use crate::store::RunFilter;

/// The cookie that holds a signed-in token.
pub const COOKIE: &str = "pollard_token";
/// Rows per page of the listings.
pub const PAGE: usize = 50;

/// What every page handler shares.
#[derive(Clone)]
pub struct Web {
    pub service: Arc<Service>,
    pub gate: Arc<Gate>,
}

/// Serves the web view on `listener` until the service's shutdown flag flips; open live
/// streams end themselves then (see [`live`]).
pub async fn serve(listener: TcpListener, service: Arc<Service>, gate: Arc<Gate>) -> Result<(), String> {
    let mut stop = service.shutdown.subscribe();
    let app = router(Web { service, gate });
    axum::serve(listener, app)
        .with_graceful_shutdown(async move {
            let _ = stop.wait_for(|s| *s).await;
        })
        .await
        .map_err(|e| format!("web view: {e}"))
}

pub fn router(web: Web) -> Router {
    Router::new()
        .route("/", get(|| async { Redirect::to("/runs") }))
        .route("/sign-in", get(sign_in_page).post(sign_in))
        .route("/sign-out", post(sign_out))
        .route("/runs", get(runs))
        .route("/runs/{id}", get(run))
        .route("/runs/{id}/events", get(live::events))
        .route("/runs/{id}/cancel", post(cancel))
        .route("/runs/{id}/folds.csv", get(folds_csv))
        .route("/runs/{id}/model/{file}", get(model))
        .route("/datasets", get(datasets))
        .route("/schedules", get(schedules))
        .route("/schedules/{id}", get(schedule))
        .route("/metrics", get(metrics))
        .fallback(|| async { failure(StatusCode::NOT_FOUND, "no such page") })
        .with_state(web)
}

/// A page's refusal or failure, rendered.
pub struct Failure(Response);

impl IntoResponse for Failure {
    fn into_response(self) -> Response {
        self.0
    }
}

impl From<ServiceError> for Failure {
    fn from(e: ServiceError) -> Failure {
        Failure(failure(status_of(&e), &e.to_string()))
    }
}

/// The HTTP status of a service failure.
pub fn status_of(e: &ServiceError) -> StatusCode {
    match e {
        ServiceError::NotFound(_) => StatusCode::NOT_FOUND,
        ServiceError::Invalid { .. } => StatusCode::BAD_REQUEST,
        ServiceError::TooLarge { .. } => StatusCode::PAYLOAD_TOO_LARGE,
        ServiceError::Busy(_) => StatusCode::SERVICE_UNAVAILABLE,
        ServiceError::Precondition(_) | ServiceError::Conflict(_) => StatusCode::CONFLICT,
        ServiceError::Denied(_) => StatusCode::FORBIDDEN,
        ServiceError::Storage(_) | ServiceError::Internal(_) => StatusCode::INTERNAL_SERVER_ERROR,
    }
}

fn failure(status: StatusCode, message: &str) -> Response {
    (status, pages::failure(status, message)).into_response()
}

type Page = Result<Response, Failure>;

/// The token a request carries in its cookie.
fn cookie_token(headers: &HeaderMap) -> Option<String> {
    headers.get_all(header::COOKIE).iter().filter_map(|v| v.to_str().ok()).flat_map(|v| v.split(';')).find_map(|c| {
        let (k, v) = c.trim().split_once('=')?;
        (k == COOKIE).then(|| v.to_string())
    })
}

/// The token of a request: `authorization: Bearer` (scrapers, scripts), else the cookie.
fn request_token(headers: &HeaderMap) -> Option<String> {
    let bearer = headers.get(header::AUTHORIZATION).and_then(|v| v.to_str().ok()).and_then(|v| v.strip_prefix("Bearer ")).map(|t| t.trim().to_string());
    bearer.or_else(|| cookie_token(headers))
}

/// The caller of a request that needs what `rpc` needs: without a known token, the sign-in
/// page; with too small a role, 403.
fn admit(web: &Web, headers: &HeaderMap, rpc: Rpc) -> Result<Caller, Failure> {
    let Some(caller) = web.gate.caller(request_token(headers).as_deref()) else {
        return Err(Failure(Redirect::to("/sign-in").into_response()));
    };
    let needed = rpc.needs();
    if caller.role < needed {
        let (_, method) = rpc.name();
        return Err(Failure(failure(StatusCode::FORBIDDEN, &format!("this needs the {needed} role (as {method} does); token '{}' has the {} role", caller.label(), caller.role))));
    }
    Ok(caller)
}

async fn sign_in_page(State(web): State<Web>) -> Response {
    pages::sign_in(web.gate.needs_tokens(), None).into_response()
}

async fn sign_in(State(web): State<Web>, Form(form): Form<HashMap<String, String>>) -> Response {
    let token = form.get("token").map(|t| t.trim().to_string()).unwrap_or_default();
    // Only a token the table knows is kept, and only its own characters (no cookie syntax).
    let known = web.gate.needs_tokens() && !token.is_empty() && token.chars().all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-') && web.gate.caller(Some(&token)).is_some();
    if !known {
        return (StatusCode::UNAUTHORIZED, pages::sign_in(web.gate.needs_tokens(), Some("That token is not one this server knows."))).into_response();
    }
    let cookie = format!("{COOKIE}={token}; HttpOnly; SameSite=Strict; Path=/");
    ([(header::SET_COOKIE, cookie)], Redirect::to("/runs")).into_response()
}

async fn sign_out() -> Response {
    let cookie = format!("{COOKIE}=; HttpOnly; SameSite=Strict; Path=/; Max-Age=0");
    ([(header::SET_COOKIE, cookie)], Redirect::to("/sign-in")).into_response()
}

/// The listing filters a query string gives: empty fields are no filter.
fn query_value(q: &HashMap<String, String>, key: &str) -> Option<String> {
    q.get(key).map(|v| v.trim().to_string()).filter(|v| !v.is_empty())
}

async fn runs(State(web): State<Web>, headers: HeaderMap, Query(q): Query<HashMap<String, String>>) -> Page {
    let caller = admit(&web, &headers, Rpc::ListRuns)?;
    let state = match query_value(&q, "state") {
        None => None,
        Some(s) => Some(crate::job::RunState::parse(&s).ok_or_else(|| ServiceError::invalid("state", format!("'{}' is not a run state", crate::service::error::echo(&s))))?),
    };
    let label = match query_value(&q, "label") {
        None => None,
        Some(l) => {
            let (k, v) = l.split_once('=').ok_or_else(|| ServiceError::invalid("label", format!("'{}' is not key=value", crate::service::error::echo(&l))))?;
            Some((k.trim().to_string(), v.trim().to_string()))
        }
    };
    let filter = RunFilter { dataset_name: query_value(&q, "dataset"), state, label, schedule_id: query_value(&q, "schedule"), ..RunFilter::default() };
    let (list, next) = web.service.list_runs(&filter, query_value(&q, "page").as_deref(), PAGE)?;
    Ok(pages::runs(&caller, &q, &list, next.as_deref()).into_response())
}

async fn run(State(web): State<Web>, headers: HeaderMap, Path(id): Path<String>) -> Page {
    let caller = admit(&web, &headers, Rpc::GetRun)?;
    let (run, outcome) = web.service.run_with_outcome(&id)?;
    // Drawing plots and the tree is CPU work: the calls pool, as every call's CPU work.
    let page = crate::service::cpu(&web.service, move || pages::run(&caller, &run, outcome.as_deref())).await?;
    Ok(page.into_response())
}

async fn cancel(State(web): State<Web>, headers: HeaderMap, Path(id): Path<String>) -> Page {
    let caller = admit(&web, &headers, Rpc::CancelRun)?;
    web.service.cancel_run(&caller, &id)?;
    Ok(Redirect::to(&format!("/runs/{id}")).into_response())
}

async fn folds_csv(State(web): State<Web>, headers: HeaderMap, Path(id): Path<String>) -> Page {
    admit(&web, &headers, Rpc::GetRun)?;
    let (run, outcome) = web.service.run_with_outcome(&id)?;
    let Some(outcome) = outcome else {
        return Err(ServiceError::Precondition(format!("run '{id}' is {}; its fold assignment is kept once it has finished", run.state.as_str())).into());
    };
    let mut csv = String::from("row,repeat,fold\n");
    for (rep, fold_of) in outcome.fold_assignment.iter().enumerate() {
        for (row, fold) in fold_of.iter().enumerate() {
            csv.push_str(&format!("{},{rep},{fold}\n", row + 1));
        }
    }
    Ok(download(&format!("{id}-folds.csv"), "text/csv; charset=utf-8", csv.into_bytes()))
}

/// The model downloads by file name: `model.json`, `model.onnx`, `model.dot`, `model.txt`.
pub const MODEL_FILES: [(&str, ModelFormat, &str); 4] = [
    ("model.json", ModelFormat::Json, "application/json"),
    ("model.onnx", ModelFormat::Onnx, "application/octet-stream"),
    ("model.dot", ModelFormat::Dot, "text/vnd.graphviz; charset=utf-8"),
    ("model.txt", ModelFormat::Text, "text/plain; charset=utf-8"),
];

async fn model(State(web): State<Web>, headers: HeaderMap, Path((id, file)): Path<(String, String)>) -> Page {
    admit(&web, &headers, Rpc::GetModel)?;
    let Some((_, format, mime)) = MODEL_FILES.iter().find(|(name, _, _)| *name == file) else {
        return Err(Failure(failure(StatusCode::NOT_FOUND, "the model comes as model.json, model.onnx, model.dot or model.txt")));
    };
    let bytes = match web.service.model_file(&id, *format)? {
        ModelFile::Text(t) => t.into_bytes(),
        ModelFile::Bytes(b) => b,
        ModelFile::Native(_) => unreachable!("the web view asks for file formats only"),
    };
    Ok(download(&format!("{id}-{file}"), mime, bytes))
}

fn download(name: &str, mime: &str, bytes: Vec<u8>) -> Response {
    ([(header::CONTENT_TYPE, mime.to_string()), (header::CONTENT_DISPOSITION, format!("attachment; filename=\"{name}\""))], bytes).into_response()
}

async fn datasets(State(web): State<Web>, headers: HeaderMap, Query(q): Query<HashMap<String, String>>) -> Page {
    let caller = admit(&web, &headers, Rpc::ListDatasets)?;
    let (list, next) = web.service.list_datasets(query_value(&q, "name").as_deref(), query_value(&q, "page").as_deref(), PAGE)?;
    Ok(pages::datasets(&caller, &q, &list, next.as_deref()).into_response())
}

async fn schedules(State(web): State<Web>, headers: HeaderMap, Query(q): Query<HashMap<String, String>>) -> Page {
    let caller = admit(&web, &headers, Rpc::ListSchedules)?;
    let (list, next) = web.service.list_schedules(query_value(&q, "page").as_deref(), PAGE)?;
    Ok(pages::schedules(&caller, &q, &list, next.as_deref()).into_response())
}

async fn schedule(State(web): State<Web>, headers: HeaderMap, Path(id): Path<String>, Query(q): Query<HashMap<String, String>>) -> Page {
    let caller = admit(&web, &headers, Rpc::ListFires)?;
    let view = web.service.schedule_view(web.service.schedule("id", &id)?)?;
    let (fires, next) = web.service.list_fires(&id, query_value(&q, "page").as_deref(), PAGE)?;
    let filter = RunFilter { schedule_id: Some(id.clone()), ..RunFilter::default() };
    let (runs, _) = web.service.list_runs(&filter, None, PAGE)?;
    // The drift history: the picked setting of each finished run, oldest first.
    let mut history = Vec::new();
    for run in runs.into_iter().rev().filter(|r| r.state == crate::job::RunState::Finished) {
        let Some(o) = web.service.outcomes.get(web.service.store.as_ref(), &run.id).map_err(ServiceError::from)? else { continue };
        let Some(s) = o.scores.get(o.picked as usize) else { continue };
        let se = s.valid_sd / (s.fold_scores.len().max(1) as f64).sqrt();
        history.push(pages::NightScore { valid: s.valid_mean, se, leaves: s.mean_leaves, run });
    }
    Ok(pages::schedule(&caller, &view, &fires, next.as_deref(), &history).into_response())
}

/// `/metrics` in the Prometheus text format; with tokens on, it needs a reader's token (as
/// `authorization: Bearer`, the way scrapers send one).
async fn metrics(State(web): State<Web>, headers: HeaderMap) -> Page {
    admit(&web, &headers, Rpc::ListRuns)?;
    let service = web.service.clone();
    let queued = service.store.queued_count().map_err(ServiceError::from)?;
    let running = service.cancels.lock().unwrap_or_else(|e| e.into_inner()).len();
    // Walking the data directory is disk work: off the runtime's threads.
    let text = crate::service::cpu(&web.service, move || service.metrics.render(queued, running, &service.config.data_dir)).await?;
    Ok(([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], text).into_response())
}
