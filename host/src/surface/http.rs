//! The HTTP surface: a [`Registry`] over loopback HTTP/1.1 (axum on tokio).
//! The API is described by `surface/openapi.json` (OpenAPI 3.1), served at
//! `GET /openapi.json`.
//!
//! | route | does |
//! |---|---|
//! | `POST /v1/models/{model}/score` | score rows: estimates, version, route, usage |
//! | `GET /v1/models` | every model: its versions, their state and the routes that use them |
//! | `GET /v1/models/{model}/contract` | a version's contract (`?version=`; default: the default route's) |
//! | `GET /v1/status` | the registry's status: every artifact, the routes file |
//! | `GET /healthz`, `GET /readyz` | alive; ready to serve (a routed model) |
//! | `GET /metrics` | the usage ledger in the OpenMetrics text format |
//! | `POST /v1/admin/reload` | reload the store now (bearer token) |
//!
//! Status codes: 400 malformed request, 401/403 admin token missing or
//! wrong / admin disabled, 404 unknown model, 413 body over the size limit,
//! 422 rows that break the contract (every row named), 500 with kind
//! `limit` when a limit stopped the model, 502 when the model failed
//! (trapped, declined, answered outside its contract), 503 with
//! `Retry-After` when the model's queue is full or the server is not ready.
//!
//! Each model has its own concurrency limit and a bounded queue: a burst on
//! one model cannot take every worker from the others. Scoring runs on the
//! request's worker thread (a call takes microseconds; handing it to
//! another thread would cost more than the call).

use std::collections::HashMap;
use std::future::Future;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, RwLock};

use axum::Router;
use axum::body::{Body, to_bytes};
use axum::extract::{Path, Query, State};
use axum::http::{HeaderMap, HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use serde::Serialize;
use sha2::{Digest as _, Sha256};
use tokio::sync::Semaphore;

use super::wire::{Blame, ErrorBody, ScoreAnswer, ScoreRequest, blame, parse_at};
use crate::registry::{ArtifactStatus, Registry, Request, metrics};

/// The OpenAPI document of this API.
pub const OPENAPI: &str = include_str!("openapi.json");

/// How the server behaves.
#[derive(Clone, Debug)]
pub struct ServeOptions {
    /// Largest request body, in bytes. Default 1 MiB.
    pub max_body_bytes: usize,
    /// Requests scored at once per model. Default: the number of cores.
    pub concurrency: usize,
    /// Requests waiting per model beyond those; more get 503. Default 256.
    pub queue: usize,
    /// Seconds a client is told to wait (`Retry-After`) after a 503. Default 1.
    pub retry_after_secs: u32,
    /// Bearer token for administrative routes; `None` disables them.
    pub admin_token: Option<String>,
}

impl Default for ServeOptions {
    fn default() -> Self {
        ServeOptions {
            max_body_bytes: 1 << 20,
            concurrency: std::thread::available_parallelism().map_or(2, |n| n.get()),
            queue: 256,
            retry_after_secs: 1,
            admin_token: None,
        }
    }
}

struct App {
    registry: Registry,
    options: ServeOptions,
    gates: RwLock<HashMap<String, Arc<Gate>>>,
    token_digest: Option<[u8; 32]>,
}

/// One model's concurrency limit and queue.
struct Gate {
    permits: Semaphore,
    waiting: AtomicUsize,
}

impl App {
    fn gate(&self, model: &str) -> Arc<Gate> {
        if let Some(g) = self.gates.read().unwrap_or_else(|e| e.into_inner()).get(model) {
            return g.clone();
        }
        let mut gates = self.gates.write().unwrap_or_else(|e| e.into_inner());
        gates
            .entry(model.to_owned())
            .or_insert_with(|| {
                Arc::new(Gate { permits: Semaphore::new(self.options.concurrency.max(1)), waiting: AtomicUsize::new(0) })
            })
            .clone()
    }
}

/// The API as an axum router, ready to serve.
pub fn router(registry: Registry, options: ServeOptions) -> Router {
    let token_digest = options.admin_token.as_ref().map(|t| Sha256::digest(t.as_bytes()).into());
    let app = Arc::new(App { registry, options, gates: RwLock::default(), token_digest });
    Router::new()
        .route("/v1/models/{model}/score", post(score))
        .route("/v1/models", get(models))
        .route("/v1/models/{model}/contract", get(contract))
        .route("/v1/status", get(status))
        .route("/v1/admin/reload", post(reload))
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .route("/metrics", get(metrics_text))
        .route("/openapi.json", get(openapi))
        .fallback(not_found)
        .with_state(app)
}

/// Serves `router` on `listener` until `shutdown` completes, then stops
/// accepting and lets requests in flight finish.
///
/// # Errors
/// The I/O error that stopped the server.
pub async fn serve(listener: tokio::net::TcpListener, router: Router, shutdown: impl Future<Output = ()> + Send + 'static) -> std::io::Result<()> {
    axum::serve(listener, router).with_graceful_shutdown(shutdown).await
}

fn json<T: Serialize>(status: StatusCode, value: &T) -> Response {
    match serde_json::to_vec(value) {
        Ok(body) => (status, [(header::CONTENT_TYPE, "application/json")], body).into_response(),
        Err(e) => (StatusCode::INTERNAL_SERVER_ERROR, format!("cannot encode the answer: {e}")).into_response(),
    }
}

fn error(status: StatusCode, body: ErrorBody) -> Response {
    json(status, &body)
}

fn overloaded(app: &App, message: String) -> Response {
    let mut r = error(StatusCode::SERVICE_UNAVAILABLE, ErrorBody::new("overloaded", message));
    r.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from(app.options.retry_after_secs));
    r
}

async fn score(State(app): State<Arc<App>>, Path(model): Path<String>, body: Body) -> Response {
    let limit = app.options.max_body_bytes;
    let bytes = match to_bytes(body, limit).await {
        Ok(b) => b,
        Err(e) => {
            // axum reports the size limit as a length-limit error in the chain.
            let too_large = std::error::Error::source(&e).is_some_and(|s| s.to_string().contains("length limit"))
                || e.to_string().contains("length limit");
            return if too_large {
                let mut b = ErrorBody::new("too_large", format!("the request body is over the limit of {limit} bytes"));
                b.error.limit = Some("body_bytes".into());
                error(StatusCode::PAYLOAD_TOO_LARGE, b)
            } else {
                error(StatusCode::BAD_REQUEST, ErrorBody::bad_request(format!("cannot read the request body: {e}")))
            };
        }
    };
    let request: ScoreRequest = match serde_json::from_slice(&bytes) {
        Ok(r) => r,
        Err(e) => return error(StatusCode::BAD_REQUEST, ErrorBody::bad_request(format!("not a score request: {e}"))),
    };
    if request.rows.is_empty() {
        return error(StatusCode::BAD_REQUEST, ErrorBody::bad_request("`rows` is empty: give at least one row"));
    }
    let at = match parse_at(request.at.as_deref()) {
        Ok(at) => at,
        Err(e) => return error(StatusCode::BAD_REQUEST, e),
    };

    let gate = app.gate(&model);
    let _permit = match gate.permits.try_acquire() {
        Ok(p) => p,
        Err(_) => {
            if gate.waiting.fetch_add(1, Ordering::SeqCst) >= app.options.queue {
                gate.waiting.fetch_sub(1, Ordering::SeqCst);
                return overloaded(&app, format!("model `{model}` has {} requests waiting; try again later", app.options.queue));
            }
            let permit = gate.permits.acquire().await;
            gate.waiting.fetch_sub(1, Ordering::SeqCst);
            match permit {
                Ok(p) => p,
                Err(_) => return overloaded(&app, "the server is shutting down".into()),
            }
        }
    };
    let result = app.registry.score(&Request { model: &model, context: &request.context, at, rows: &request.rows });
    match result {
        Ok(answer) => json(StatusCode::OK, &ScoreAnswer::new(answer)),
        Err(e) => {
            let status = match blame(&e) {
                Blame::Request => StatusCode::UNPROCESSABLE_ENTITY,
                Blame::NotFound => StatusCode::NOT_FOUND,
                Blame::Limit | Blame::Server => StatusCode::INTERNAL_SERVER_ERROR,
                Blame::Model => StatusCode::BAD_GATEWAY,
            };
            error(status, ErrorBody::from_request(e))
        }
    }
}

#[derive(Serialize)]
struct ModelList {
    generation: u64,
    models: Vec<ModelEntry>,
}

#[derive(Serialize)]
struct ModelEntry {
    name: String,
    routed: bool,
    default_version: Option<String>,
    versions: Vec<ArtifactStatus>,
}

async fn models(State(app): State<Arc<App>>) -> Response {
    let status = app.registry.status();
    let routes = app.registry.routes();
    let mut entries: Vec<ModelEntry> = Vec::new();
    for a in status.artifacts {
        let Some(name) = a.model.clone() else { continue };
        match entries.iter_mut().find(|e| e.name == name) {
            Some(e) => e.versions.push(a),
            None => {
                let default_version = routes.model(&name).map(|r| r.default_version().to_string());
                entries.push(ModelEntry { routed: default_version.is_some(), default_version, name, versions: vec![a] });
            }
        }
    }
    json(StatusCode::OK, &ModelList { generation: status.generation, models: entries })
}

#[derive(serde::Deserialize)]
struct VersionQuery {
    version: Option<String>,
}

async fn contract(State(app): State<Arc<App>>, Path(model): Path<String>, Query(q): Query<VersionQuery>) -> Response {
    let version = match &q.version {
        Some(v) => match semver::Version::parse(v) {
            Ok(v) => v,
            Err(e) => return error(StatusCode::BAD_REQUEST, ErrorBody::bad_request(format!("`version`: `{v}` is not semver ({e})"))),
        },
        None => match app.registry.routes().model(&model) {
            Some(r) => r.default_version().clone(),
            None => {
                let mut b = ErrorBody::new("unknown_model", format!("no model `{model}` is served"));
                b.error.model = Some(model);
                return error(StatusCode::NOT_FOUND, b);
            }
        },
    };
    match app.registry.model(&model, &version) {
        Some(m) => json(StatusCode::OK, m.contract()),
        None => {
            let mut b = ErrorBody::new("unknown_model", format!("no version {version} of `{model}` is loaded"));
            b.error.model = Some(model);
            b.error.version = Some(version.to_string());
            error(StatusCode::NOT_FOUND, b)
        }
    }
}

async fn status(State(app): State<Arc<App>>) -> Response {
    json(StatusCode::OK, &app.registry.status())
}

async fn healthz() -> Response {
    json(StatusCode::OK, &serde_json::json!({ "status": "ok" }))
}

async fn readyz(State(app): State<Arc<App>>) -> Response {
    let routes = app.registry.routes();
    if routes.models().next().is_some() {
        json(StatusCode::OK, &serde_json::json!({ "status": "ready", "generation": app.registry.generation() }))
    } else {
        let mut r = error(StatusCode::SERVICE_UNAVAILABLE, ErrorBody::new("not_ready", "no model is routed yet"));
        r.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from(app.options.retry_after_secs));
        r
    }
}

async fn metrics_text(State(app): State<Arc<App>>) -> Response {
    let text = metrics::render(&app.registry.usage(), &app.registry.status());
    (StatusCode::OK, [(header::CONTENT_TYPE, metrics::CONTENT_TYPE)], text).into_response()
}

async fn openapi() -> Response {
    (StatusCode::OK, [(header::CONTENT_TYPE, "application/json")], OPENAPI).into_response()
}

async fn reload(State(app): State<Arc<App>>, headers: HeaderMap) -> Response {
    let Some(expected) = app.token_digest else {
        return error(StatusCode::FORBIDDEN, ErrorBody::new("admin_disabled", "administrative routes are off: start the server with an admin token"));
    };
    let given = headers
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.strip_prefix("Bearer "))
        .map(|t| <[u8; 32]>::from(Sha256::digest(t.trim().as_bytes())));
    if given != Some(expected) {
        let mut r = error(StatusCode::UNAUTHORIZED, ErrorBody::new("unauthorized", "a valid `Authorization: Bearer <token>` header is required"));
        r.headers_mut().insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer"));
        return r;
    }
    let registry = app.registry.clone();
    match tokio::task::spawn_blocking(move || registry.reload()).await {
        Ok(Ok(report)) => json(StatusCode::OK, &report),
        Ok(Err(e)) => error(StatusCode::INTERNAL_SERVER_ERROR, ErrorBody::new("store", e.to_string())),
        Err(e) => error(StatusCode::INTERNAL_SERVER_ERROR, ErrorBody::new("store", e.to_string())),
    }
}

async fn not_found() -> Response {
    error(StatusCode::NOT_FOUND, ErrorBody::new("not_found", "no such route; the API is described at /openapi.json"))
}
