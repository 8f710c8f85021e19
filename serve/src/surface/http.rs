//! The HTTP surface: a [`Registry`] over loopback HTTP/1.1 (axum on tokio).
//! The API is described by an OpenAPI 3.1 document generated from the wire
//! types ([`super::openapi`]), served at `GET /openapi.json`.
//!
//! | route | does |
//! |---|---|
//! | `POST /estimate` | estimates for rows: the model is named in the body; the routes pick the version |
//! | `GET /catalogue` | every model in the store: its versions, their state, the routes that use them |
//! | `GET /contract?model=M[&version=V]` | a version's contract (default: the version the default route serves) |
//! | `GET /store` | what the store holds: every artifact, the routes file |
//! | `POST /store/rescan` | read the store again now (bearer token) |
//! | `GET /alive`, `GET /ready` | the process answers; a model is routed and requests can be served |
//! | `GET /metrics` | the usage ledger in the OpenMetrics text format |
//!
//! No path carries a version: the API's revision is a field of the
//! catalogue ([`API_REVISION`]), and a model's version is a field of the
//! request (`contract`) or of the answer (`estimate`).
//!
//! Status codes: 400 malformed request, 401/403 admin token missing or
//! wrong / admin disabled, 404 unknown model, 413 body over the size limit,
//! 415 a body declared as something other than JSON,
//! 422 rows that break the contract (every row named), 500 with kind
//! `limit` when a limit stopped the model, 502 when the model failed
//! (trapped, declined, answered outside its contract), 503 with
//! `Retry-After` when the model's queue is full or the server is not ready.
//!
//! Sandbox calls never run on the async workers that accept connections:
//! each runs on a blocking thread, at most [`ServeOptions::score_threads`]
//! at once for the whole server (by default the number of cores), and each
//! model has its own concurrency limit drawn from those and a bounded queue.
//! A model that spins until its deadline on every call holds only its own
//! permits: health and metrics answer as before, and with a concurrency
//! below `score_threads` so do the other models. A name no model has is answered 404
//! before anything is kept for it.

use std::collections::HashMap;
use std::future::Future;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, RwLock};

use axum::Router;
use axum::body::{Body, to_bytes};
use axum::extract::rejection::QueryRejection;
use axum::extract::{Query, State};
use axum::http::{HeaderMap, HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use semver::Version;
use serde::{Deserialize, Serialize};
use sha2::{Digest as _, Sha256};
use tokio::sync::Semaphore;

use super::wire::{Blame, ErrorBody, EstimateAnswer, EstimateRequest, blame};
use crate::registry::{ArtifactStatus, Registry, ReloadReport, Request, Status, metrics};

/// The revision of this API, reported by `GET /catalogue`. It goes up when
/// a route or a field changes meaning or goes away; added fields and routes
/// keep it.
pub const API_REVISION: u32 = 1;

/// How the server behaves.
#[derive(Clone, Debug)]
pub struct ServeOptions {
    /// Largest request body, in bytes. Default 1 MiB.
    pub max_body_bytes: usize,
    /// Requests scored at once per model. Default: the number of cores.
    /// Capped at `score_threads`. Set it below `score_threads` to keep
    /// threads for the other models while one spins until its deadline:
    /// by default one model may take them all, and the others wait (up to
    /// that model's deadline) rather than fail.
    pub concurrency: usize,
    /// Sandbox calls running at once across every model, each on a thread
    /// of its own (tokio's blocking pool), never on the async workers.
    /// Default: the number of cores, so that calls do not take each other's
    /// cores and miss their wall-clock deadlines
    /// ([`Limits::deadline`](paddock_host::Limits::deadline)). Feature
    /// lookups are awaited before a thread is taken: a thread is held only
    /// while the sandbox runs.
    pub score_threads: usize,
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
            concurrency: cores(),
            score_threads: cores(),
            queue: 256,
            retry_after_secs: 1,
            admin_token: None,
        }
    }
}

/// The cores this process may use (2 when that cannot be known).
fn cores() -> usize {
    std::thread::available_parallelism().map_or(2, |n| n.get())
}

pub(crate) struct App {
    registry: Registry,
    options: ServeOptions,
    /// Sandbox calls running across every model.
    pool: Arc<Semaphore>,
    /// Requests waiting on their feature lookups now.
    gathering: AtomicUsize,
    /// One gate per model that was routed when a request named it: bounded
    /// by the store, never by what clients send.
    gates: RwLock<HashMap<String, Arc<Gate>>>,
    token_digest: Option<[u8; 32]>,
    /// The OpenAPI document, rendered once and shared by every answer.
    document: bytes::Bytes,
}

/// One model's concurrency limit and queue.
struct Gate {
    permits: Semaphore,
    waiting: AtomicUsize,
}

impl App {
    /// The gate of a routed model. Call only after checking the name.
    fn gate(&self, model: &str) -> Arc<Gate> {
        if let Some(g) = self.gates.read().unwrap_or_else(|e| e.into_inner()).get(model) {
            return g.clone();
        }
        let mut gates = self.gates.write().unwrap_or_else(|e| e.into_inner());
        gates
            .entry(model.to_owned())
            .or_insert_with(|| {
                let permits = self.options.concurrency.clamp(1, self.options.score_threads.max(1));
                Arc::new(Gate { permits: Semaphore::new(permits), waiting: AtomicUsize::new(0) })
            })
            .clone()
    }
}

/// The API as an axum router, ready to serve.
pub fn router(registry: Registry, options: ServeOptions) -> Router {
    let token_digest = options.admin_token.as_ref().map(|t| Sha256::digest(t.as_bytes()).into());
    let pool = Arc::new(Semaphore::new(options.score_threads.max(1)));
    let document = bytes::Bytes::from(super::openapi::document());
    let app = Arc::new(App {
        registry,
        options,
        pool,
        gathering: AtomicUsize::new(0),
        gates: RwLock::default(),
        token_digest,
        document,
    });
    Router::new()
        .route("/estimate", post(estimate))
        .route("/catalogue", get(catalogue))
        .route("/contract", get(contract))
        .route("/store", get(store))
        .route("/store/rescan", post(rescan))
        .route("/alive", get(alive))
        .route("/ready", get(ready))
        .route("/metrics", get(metrics_text))
        .route("/openapi.json", get(openapi))
        .fallback(not_found)
        .method_not_allowed_fallback(method_not_allowed)
        .with_state(app)
}

/// Serves `router` on `listener` until `shutdown` completes, then stops
/// accepting and lets requests in flight finish.
///
/// # Errors
/// The I/O error that stopped the server.
pub async fn serve(
    listener: tokio::net::TcpListener,
    router: Router,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
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

/// One count held (a place in a model's queue, a request gathering),
/// given back when dropped: also when the client hangs up mid-wait and
/// the request's future is dropped.
struct Held<'a>(&'a AtomicUsize);

impl<'a> Held<'a> {
    fn take(count: &'a AtomicUsize) -> Held<'a> {
        count.fetch_add(1, Ordering::SeqCst);
        Held(count)
    }
}

impl Drop for Held<'_> {
    fn drop(&mut self) {
        self.0.fetch_sub(1, Ordering::SeqCst);
    }
}

/// A place in `model`'s queue, or the 503 when it is full.
fn queue<'a>(app: &App, gate: &'a Gate, model: &str) -> Result<Held<'a>, Response> {
    if gate.waiting.fetch_add(1, Ordering::SeqCst) >= app.options.queue {
        gate.waiting.fetch_sub(1, Ordering::SeqCst);
        app.registry.count_rejected("overloaded");
        return Err(overloaded(
            app,
            format!("model {model} has {} requests waiting; try again later", app.options.queue),
        ));
    }
    Ok(Held(&gate.waiting))
}

fn overloaded(app: &App, message: String) -> Response {
    let mut r = error(StatusCode::SERVICE_UNAVAILABLE, ErrorBody::new("overloaded", message));
    r.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from(app.options.retry_after_secs));
    r
}

fn rejected(app: &App, kind: &'static str, status: StatusCode, body: ErrorBody) -> Response {
    app.registry.count_rejected(kind);
    error(status, body)
}

/// Estimates for rows.
///
/// The routes pick the version from the request's context and time; the
/// answer names it and says why. Every valid row is scored; every invalid
/// one is `null` in `estimates`, with its problems in `problems`.
#[utoipa::path(
    post,
    path = "/estimate",
    tag = "estimates",
    request_body(
        content = EstimateRequest,
        content_type = "application/json",
        description = "The model, its rows (`row` for one) and the context the routes read.",
        examples(
            ("charge-minutes" = (
                summary = "A plug-in at a 22 kW charger on a Saturday morning (demo store)",
                value = json!({
                    "id": "plug-in 4411",
                    "model": "charge-minutes",
                    "rows": [{"charger_kw": 22, "battery_kwh": 58, "soc_start": 0.3, "soc_target": 0.8, "ambient_c": null,
                              "hour_of_week": 128, "connector": "type2", "fleet": false}],
                    "context": {"site": "Library Green", "region": "centre"},
                    "at": "2026-12-05T08:27:00+01:00"
                })
            )),
            ("overstay-risk" = (
                summary = "The same plug-in's overstay risk (demo store)",
                value = json!({
                    "model": "overstay-risk",
                    "row": {"expected_minutes": 142, "plugin_hour": 8, "member_overstay_rate": 0.3, "site_occupancy": 0.9,
                            "weekend": true, "fleet": false},
                    "context": {"site": "Library Green", "region": "centre"}
                })
            ))
        )
    ),
    responses(
        (status = 200, description = "Estimates, one entry per row (`null` for a row that broke the contract).", body = EstimateAnswer),
        (status = 400, description = "Malformed request (`bad_request`).", body = ErrorBody),
        (status = 404, description = "No model of that name is served (`unknown_model`), or it is loaded but no route serves it (`not_routed`, with the loaded versions and why).", body = ErrorBody),
        (status = 413, description = "The body is over the size limit (`too_large`).", body = ErrorBody),
        (status = 415, description = "The body is declared as something other than JSON (`unsupported_media_type`).", body = ErrorBody),
        (status = 422, description = "No row is valid for the contract (`invalid_rows`, every problem listed), or too many rows.", body = ErrorBody),
        (status = 500, description = "A limit stopped the model (`limit`), or the server failed.", body = ErrorBody),
        (status = 502, description = "The model failed: trapped, declined, or answered outside its contract.", body = ErrorBody),
        (status = 503, description = "The model's queue is full (`overloaded`); see `Retry-After`.", body = ErrorBody,
            headers(("Retry-After" = u32, description = "Seconds to wait before trying again."))),
    )
)]
pub(crate) async fn estimate(State(app): State<Arc<App>>, headers: HeaderMap, body: Body) -> Response {
    if let Some(declared) = not_json(&headers) {
        let b = ErrorBody::new(
            "unsupported_media_type",
            format!("the body is declared as `{declared}`; send JSON with `content-type: application/json`"),
        );
        return rejected(&app, "unsupported_media_type", StatusCode::UNSUPPORTED_MEDIA_TYPE, b);
    }
    let limit = app.options.max_body_bytes;
    let bytes = match to_bytes(body, limit).await {
        Ok(b) => b,
        Err(e) => {
            // axum reports the size limit as a length-limit error in the chain.
            let too_large = std::error::Error::source(&e).is_some_and(|s| s.to_string().contains("length limit"))
                || e.to_string().contains("length limit");
            return if too_large {
                let mut b = ErrorBody::new(
                    "too_large",
                    format!(
                        "the request body is over the server's limit of {limit} bytes: split the rows over several \
                         requests"
                    ),
                );
                b.error.limit = Some("body_bytes".into());
                rejected(&app, "too_large", StatusCode::PAYLOAD_TOO_LARGE, b)
            } else {
                let b = ErrorBody::bad_request(format!("cannot read the request body: {e}"));
                rejected(&app, "bad_request", StatusCode::BAD_REQUEST, b)
            };
        }
    };
    let mut request: EstimateRequest = match serde_json::from_slice(&bytes) {
        Ok(r) => r,
        Err(e) => {
            let b = match json_kind(&bytes) {
                Some(kind) if kind != "an object" => ErrorBody::bad_request(format!(
                    "not an estimate request: expected an object {{\"model\": …, \"rows\": […]}}, got {kind}"
                )),
                _ => ErrorBody::bad_request(format!("not an estimate request: {e}")),
            };
            return rejected(&app, "bad_request", StatusCode::BAD_REQUEST, b);
        }
    };
    let (rows, at) = match request.take_rows() {
        Ok(r) => r,
        Err(b) => return rejected(&app, "bad_request", StatusCode::BAD_REQUEST, b),
    };
    let model = request.model.clone();
    // A name no model has gets its 404 here, before any state is kept for it.
    if app.registry.routes().model(&model).is_none() {
        let e = app.registry.score(&Request::new(&model, &request.context, &[]).at(at));
        return match e {
            Err(e) => answer_error(e),
            // Routed in the meantime: ask again.
            Ok(_) => overloaded(&app, format!("model {model} was just added; try again")),
        };
    }

    let gate = app.gate(&model);
    // Lookups wait on their sources here, on the async worker, before a
    // scoring thread is taken; meanwhile the request counts against the
    // model's queue, so the requests waiting stay bounded.
    let prepared = if app.registry.looks_up(&model) {
        let queued = match queue(&app, &gate, &model) {
            Ok(q) => q,
            Err(r) => return r,
        };
        let gathering = Held::take(&app.gathering);
        let prepared = app.registry.prepare(&request.request(&rows, at)).await;
        drop((gathering, queued));
        match prepared {
            Ok(p) => Some(p),
            Err(e) => return answer_error(e),
        }
    } else {
        None
    };
    let _permit = match gate.permits.try_acquire() {
        Ok(p) => p,
        Err(_) => {
            let queued = match queue(&app, &gate, &model) {
                Ok(q) => q,
                Err(r) => return r,
            };
            let permit = gate.permits.acquire().await;
            drop(queued);
            match permit {
                Ok(p) => p,
                Err(_) => return overloaded(&app, "the server is shutting down".into()),
            }
        }
    };
    // A thread of the scoring pool: the call never holds an async worker.
    let Ok(thread) = app.pool.clone().acquire_owned().await else {
        return overloaded(&app, "the server is shutting down".into());
    };
    let registry = app.registry.clone();
    let call = tokio::task::spawn_blocking(move || {
        let _thread = thread;
        let id = request.id.take();
        let request = request.request(&rows, at);
        match prepared {
            Some(prepared) => registry.score_prepared(&request, prepared),
            None => registry.score(&request),
        }
        .map(|a| EstimateAnswer::new(a, id))
    });
    match call.await {
        Ok(Ok(answer)) => json(StatusCode::OK, &answer),
        Ok(Err(e)) => answer_error(e),
        Err(e) => error(
            StatusCode::INTERNAL_SERVER_ERROR,
            ErrorBody::new("server", format!("the scoring thread failed: {e}")),
        ),
    }
}

fn answer_error(e: crate::registry::RequestError) -> Response {
    let status = match blame(&e) {
        Blame::Request => StatusCode::UNPROCESSABLE_ENTITY,
        Blame::NotFound => StatusCode::NOT_FOUND,
        Blame::Limit | Blame::Server => StatusCode::INTERNAL_SERVER_ERROR,
        Blame::Model => StatusCode::BAD_GATEWAY,
    };
    error(status, ErrorBody::from_request(e))
}

/// The store's catalogue: every model, its versions and the routes that use
/// them.
#[derive(Serialize, utoipa::ToSchema)]
pub struct Catalogue {
    /// The revision of this API ([`API_REVISION`]).
    pub api_revision: u32,
    /// The registry generation this listing was taken from.
    pub generation: u64,
    /// Every model with at least one artifact, by name.
    pub models: Vec<CatalogueEntry>,
}

/// One model in the catalogue.
#[derive(Serialize, utoipa::ToSchema)]
pub struct CatalogueEntry {
    /// The model's name.
    pub name: String,
    /// Whether the routes serve it.
    pub routed: bool,
    /// The version its default route serves, when it is routed.
    #[schema(value_type = Option<String>)]
    pub default_version: Option<Version>,
    /// Its artifacts.
    pub versions: Vec<ArtifactStatus>,
}

/// The catalogue: every model in the store, its versions, their state and
/// the routes that use them.
#[utoipa::path(get, path = "/catalogue",
    tag = "catalogue", responses((status = 200, description = "The catalogue.", body = Catalogue)))]
pub(crate) async fn catalogue(State(app): State<Arc<App>>) -> Response {
    let status = app.registry.status();
    let routes = app.registry.routes();
    let mut entries: Vec<CatalogueEntry> = Vec::new();
    for a in status.artifacts {
        let Some(name) = a.model.clone() else { continue };
        match entries.iter_mut().find(|e| e.name == name) {
            Some(e) => e.versions.push(a),
            None => {
                let default_version = routes.model(&name).map(|r| r.default_version().clone());
                entries.push(CatalogueEntry {
                    routed: default_version.is_some(),
                    default_version,
                    name,
                    versions: vec![a],
                });
            }
        }
    }
    json(StatusCode::OK, &Catalogue { api_revision: API_REVISION, generation: status.generation, models: entries })
}

/// Which contract `GET /contract` returns.
#[derive(Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Query)]
pub(crate) struct ContractQuery {
    /// The model's name.
    #[param(example = "charge-minutes")]
    model: String,
    /// A loaded version (semver); default: the version the model's default
    /// route serves.
    #[param(example = "1.0.0")]
    version: Option<String>,
}

/// A version's contract: the features it reads (names, domains, units,
/// whether required) and the outputs it writes (names, units, bounds).
#[utoipa::path(
    get,
    path = "/contract",
    tag = "catalogue",
    params(ContractQuery),
    responses(
        (status = 200, description = "The contract.", body = super::openapi::ContractDoc),
        (status = 400, description = "No model named, or a version that is not semver (`bad_request`).", body = ErrorBody),
        (status = 404, description = "No such model (`unknown_model`) or version (`unknown_version`, with the loaded versions).", body = ErrorBody),
    )
)]
pub(crate) async fn contract(
    State(app): State<Arc<App>>,
    query: Result<Query<ContractQuery>, QueryRejection>,
) -> Response {
    let q = match query {
        Ok(Query(q)) => q,
        Err(e) => {
            return rejected(
                &app,
                "bad_request",
                StatusCode::BAD_REQUEST,
                ErrorBody::bad_request(format!("the query: {e}")),
            );
        }
    };
    let model = q.model;
    let version = match &q.version {
        Some(v) => match semver::Version::parse(v) {
            Ok(v) => v,
            Err(e) => {
                return error(
                    StatusCode::BAD_REQUEST,
                    ErrorBody::bad_request(format!("version: {v:?} is not a semver version ({e})")),
                );
            }
        },
        None => match app.registry.routes().model(&model) {
            Some(r) => r.default_version().clone(),
            None => {
                let mut b = ErrorBody::new("unknown_model", format!("no model {model} is served"));
                b.error.model = Some(model);
                return error(StatusCode::NOT_FOUND, b);
            }
        },
    };
    if let Some(m) = app.registry.model(&model, &version) {
        return json(StatusCode::OK, &super::openapi::ContractDoc::from(m.contract()));
    }
    let loaded = app.registry.versions(&model);
    let mut b = if loaded.is_empty() {
        ErrorBody::new("unknown_model", format!("no model {model} is loaded"))
    } else {
        let list: Vec<String> = loaded.iter().map(ToString::to_string).collect();
        let mut b = ErrorBody::new(
            "unknown_version",
            format!("model {model} has no version {version} loaded (loaded: {})", list.join(", ")),
        );
        b.error.details.insert("loaded".into(), list.into());
        b.error.version = Some(version.clone());
        b
    };
    b.error.model = Some(model);
    error(StatusCode::NOT_FOUND, b)
}

/// What the store holds: every artifact file and what the gate made of it,
/// and the routes file.
#[utoipa::path(get, path = "/store",
    tag = "store", responses((status = 200, description = "The store's state.", body = Status)))]
pub(crate) async fn store(State(app): State<Arc<App>>) -> Response {
    json(StatusCode::OK, &app.registry.status())
}

/// The answer of `GET /alive` and `GET /ready`.
#[derive(Serialize, utoipa::ToSchema)]
pub struct Liveness {
    /// `alive`, or `ready`.
    pub state: &'static str,
    /// The registry generation serving.
    pub generation: u64,
    /// Models the routes file names whose routes were not taken (a version
    /// they name did not load); absent when there are none.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub not_routed: Vec<String>,
}

/// The models whose routes were not taken.
fn not_routed(status: &Status) -> Vec<String> {
    match &status.routes {
        crate::registry::RoutesState::PartlyTaken { models, .. } => models.clone(),
        _ => Vec::new(),
    }
}

/// The process is up and answering.
#[utoipa::path(get, path = "/alive",
    tag = "operations", responses((status = 200, description = "Alive.", body = Liveness)))]
pub(crate) async fn alive(State(app): State<Arc<App>>) -> Response {
    json(StatusCode::OK, &Liveness { state: "alive", generation: app.registry.generation(), not_routed: Vec::new() })
}

/// Requests can be served: at least one model is routed.
#[utoipa::path(
    get,
    path = "/ready",
    tag = "operations",
    responses(
        (status = 200, description = "Ready.", body = Liveness),
        (status = 503, description = "No model is routed yet (`not_ready`); see `Retry-After`.", body = ErrorBody,
            headers(("Retry-After" = u32, description = "Seconds to wait before asking again."))),
    )
)]
pub(crate) async fn ready(State(app): State<Arc<App>>) -> Response {
    let routes = app.registry.routes();
    if routes.models().next().is_some() {
        let not_routed = not_routed(&app.registry.status());
        json(StatusCode::OK, &Liveness { state: "ready", generation: app.registry.generation(), not_routed })
    } else {
        let why = match &app.registry.status().routes {
            crate::registry::RoutesState::Refused { problems } => {
                format!(": {} is refused: {}", crate::registry::ROUTES_FILE, problems.join("; "))
            }
            crate::registry::RoutesState::Missing => format!(": the store has no {}", crate::registry::ROUTES_FILE),
            _ => String::new(),
        };
        let message = format!("no model is routed yet{why}");
        let mut r = error(StatusCode::SERVICE_UNAVAILABLE, ErrorBody::new("not_ready", message));
        r.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from(app.options.retry_after_secs));
        r
    }
}

/// The media type a request declares when it is not JSON (`application/json`
/// or a `+json` type); `None` when it is JSON or declares none.
fn not_json(headers: &HeaderMap) -> Option<String> {
    let declared = headers.get(header::CONTENT_TYPE)?;
    let text = declared.to_str().unwrap_or("(not text)");
    let essence = text.split(';').next().unwrap_or("").trim().to_ascii_lowercase();
    let json = essence == "application/json" || (essence.starts_with("application/") && essence.ends_with("+json"));
    (!json).then(|| text.to_owned())
}

/// What kind of JSON value a body holds, from its first byte.
fn json_kind(bytes: &[u8]) -> Option<&'static str> {
    Some(match bytes.trim_ascii_start().first()? {
        b'{' => "an object",
        b'[' => "an array",
        b'"' => "a string",
        b't' | b'f' => "a boolean",
        b'n' => "null",
        b'-' | b'0'..=b'9' => "a number",
        _ => return None,
    })
}

/// The usage ledger (calls, rows, errors, refused rows, wall time, fuel,
/// in-flight calls, shadow differences per model version) and the server's
/// own gauges, in the OpenMetrics text format.
#[utoipa::path(
    get,
    path = "/metrics",
    tag = "operations",
    responses((status = 200, description = "OpenMetrics text.", body = String, content_type = "application/openmetrics-text; version=1.0.0; charset=utf-8"))
)]
pub(crate) async fn metrics_text(State(app): State<Arc<App>>) -> Response {
    // The server's own state.
    let gates = app.gates.read().unwrap_or_else(|e| e.into_inner()).len();
    let busy = app.options.score_threads.max(1) - app.pool.available_permits();
    let own = vec![
        metrics::SurfaceFamily {
            name: "serve_gates",
            help: "Models holding a concurrency gate: only models routed when a request named them.",
            counter: false,
            value: gates as u64,
        },
        metrics::SurfaceFamily {
            name: "serve_score_threads_busy",
            help: "Scoring threads running a sandbox call now.",
            counter: false,
            value: busy as u64,
        },
        metrics::SurfaceFamily {
            name: "serve_gathering",
            help: "Requests waiting on their feature lookups now, holding no scoring thread.",
            counter: false,
            value: app.gathering.load(Ordering::SeqCst) as u64,
        },
    ];
    let text = metrics::render(app.registry.usage(), &app.registry.status(), app.registry.source_usage(), own);
    (StatusCode::OK, [(header::CONTENT_TYPE, metrics::CONTENT_TYPE)], text).into_response()
}

/// This document.
#[utoipa::path(get, path = "/openapi.json",
    tag = "operations", responses((status = 200, description = "The OpenAPI 3.1 document of this API.", body = Object)))]
pub(crate) async fn openapi(State(app): State<Arc<App>>) -> Response {
    (StatusCode::OK, [(header::CONTENT_TYPE, "application/json")], app.document.clone()).into_response()
}

/// Reads the store again now (new, changed and removed artifacts, the
/// routes file), as the watcher would.
#[utoipa::path(
    post,
    path = "/store/rescan",
    tag = "store",
    security(("bearer" = [])),
    responses(
        (status = 200, description = "What the rescan did.", body = ReloadReport),
        (status = 401, description = "No valid bearer token (`unauthorized`).", body = ErrorBody,
            headers(("WWW-Authenticate" = String, description = "`Bearer`."))),
        (status = 403, description = "The server has no admin token: administrative routes are off (`admin_disabled`).", body = ErrorBody),
        (status = 500, description = "The store could not be read (`store`).", body = ErrorBody),
    )
)]
pub(crate) async fn rescan(State(app): State<Arc<App>>, headers: HeaderMap) -> Response {
    let Some(expected) = app.token_digest else {
        return error(
            StatusCode::FORBIDDEN,
            ErrorBody::new("admin_disabled", "administrative routes are off: start the server with an admin token"),
        );
    };
    let given = headers
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.strip_prefix("Bearer "))
        .map(|t| <[u8; 32]>::from(Sha256::digest(t.trim().as_bytes())));
    if given != Some(expected) {
        let mut r = error(
            StatusCode::UNAUTHORIZED,
            ErrorBody::new("unauthorized", "a valid `Authorization: Bearer <token>` header is required"),
        );
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

async fn not_found(State(app): State<Arc<App>>) -> Response {
    app.registry.count_rejected("not_found");
    error(StatusCode::NOT_FOUND, ErrorBody::new("not_found", "no such route; the API is described at /openapi.json"))
}

async fn method_not_allowed(State(app): State<Arc<App>>, method: axum::http::Method) -> Response {
    app.registry.count_rejected("method_not_allowed");
    error(
        StatusCode::METHOD_NOT_ALLOWED,
        ErrorBody::new(
            "method_not_allowed",
            format!("{method} is not allowed on this route; the API is described at /openapi.json"),
        ),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    /// More scoring threads than cores make calls miss wall-clock deadlines
    /// while descheduled; the default pool is the cores (issue: four per
    /// core before).
    #[test]
    fn scoring_threads_do_not_outnumber_the_cores_by_default() {
        let cores = std::thread::available_parallelism().unwrap().get();
        let options = ServeOptions::default();
        assert_eq!(options.score_threads, cores);
        assert!(options.concurrency <= options.score_threads);
    }
}
