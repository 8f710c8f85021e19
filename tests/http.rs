//! The HTTP surface, in process, over real loopback connections: every
//! status kind the API documents, the admin token, metrics, the OpenAPI
//! document, and a graceful shutdown that lets a request in flight finish.

use std::path::Path;
use std::sync::mpsc;
use std::time::Duration;

use paddock_host::registry::artifact_path;
use paddock_host::surface::http::{self, OPENAPI, ServeOptions};
use paddock_host::{Digest, Limits, ModelOptions, Registry, RegistryOptions, Runtime};
use paddock_tests::{fixture, line_artifact, write_atomically};
use semver::Version;

struct Server {
    base: String,
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl Server {
    fn start(registry: Registry, options: ServeOptions) -> Server {
        let (addr_tx, addr_rx) = mpsc::channel();
        let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
        let thread = std::thread::spawn(move || {
            let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap();
            rt.block_on(async move {
                let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
                addr_tx.send(listener.local_addr().unwrap()).unwrap();
                let router = http::router(registry, options);
                http::serve(listener, router, async move {
                    let _ = stop_rx.await;
                })
                .await
                .unwrap();
            });
        });
        let addr = addr_rx.recv().unwrap();
        Server { base: format!("http://{addr}"), stop: Some(stop_tx), thread: Some(thread) }
    }

    fn stop(&mut self) {
        if let Some(s) = self.stop.take() {
            let _ = s.send(());
        }
        if let Some(t) = self.thread.take() {
            t.join().unwrap();
        }
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        self.stop();
    }
}

/// Status, headers we look at, and the body.
struct Reply {
    status: u16,
    retry_after: Option<String>,
    www_authenticate: Option<String>,
    content_type: String,
    body: String,
}

impl Reply {
    fn json(&self) -> serde_json::Value {
        serde_json::from_str(&self.body).unwrap_or_else(|e| panic!("{e}: {}", self.body))
    }
    fn kind(&self) -> String {
        self.json()["error"]["kind"].as_str().unwrap_or_default().to_owned()
    }
}

fn agent() -> ureq::Agent {
    ureq::Agent::config_builder().http_status_as_error(false).build().new_agent()
}

fn call(method: &str, url: &str, body: Option<&str>, token: Option<&str>) -> Reply {
    let agent = agent();
    let mut response = match method {
        "GET" => agent.get(url).call(),
        _ => {
            let mut r = agent.post(url).header("content-type", "application/json");
            if let Some(t) = token {
                r = r.header("authorization", &format!("Bearer {t}"));
            }
            r.send(body.unwrap_or(""))
        }
    }
    .unwrap_or_else(|e| panic!("{method} {url}: {e}"));
    let header = |name: &str| response.headers().get(name).and_then(|v| v.to_str().ok()).map(str::to_owned);
    let (retry_after, www_authenticate) = (header("retry-after"), header("www-authenticate"));
    let content_type = header("content-type").unwrap_or_default();
    Reply {
        status: response.status().as_u16(),
        retry_after,
        www_authenticate,
        content_type,
        body: response.body_mut().read_to_string().unwrap(),
    }
}

fn put(store: &Path, model: &str, version: &str, bytes: &[u8]) -> Digest {
    write_atomically(&artifact_path(store, model, &Version::parse(version).unwrap()), bytes);
    Digest::of(bytes)
}

/// A store with `m` (y = 2x + 1) and `affine` (the hand-written fixture in
/// mode 1: `score` never returns), both routed when `routes` is set.
fn store(dir: &Path, routes: bool) -> Registry {
    store_with_deadline(dir, routes, Duration::from_millis(300))
}

fn store_with_deadline(dir: &Path, routes: bool, deadline: Duration) -> Registry {
    put(dir, "m", "1.0.0", &line_artifact("m", "1.0.0", 2.0, 1.0, None));
    put(dir, "affine", "1.0.0", &paddock_host::pack(&fixture("affine.wat"), Some(&[1]), None).unwrap());
    let text = "[models.m]\ndefault = \"1.0.0\"\n[models.affine]\ndefault = \"1.0.0\"\n";
    if routes {
        write_atomically(&dir.join("routes.toml"), text.as_bytes());
    }
    let limits = Limits { deadline, ..Limits::default() };
    let options = RegistryOptions { model: ModelOptions { limits, ..ModelOptions::default() }, ..RegistryOptions::default() };
    Registry::open(&Runtime::new().unwrap(), dir, options).unwrap()
}

fn score_url(s: &Server, model: &str) -> String {
    format!("{}/v1/models/{model}/score", s.base)
}

#[test]
fn scoring_answers_with_estimates_version_route_and_usage() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = call("POST", &score_url(&s, "m"), Some(r#"{"rows": [{"x": 1}, {"x": 2.5}], "context": {"site": "a"}, "at": "2026-12-05T08:27:00+01:00"}"#), None);
    assert_eq!(r.status, 200, "{}", r.body);
    assert_eq!(r.content_type, "application/json");
    let v = r.json();
    assert_eq!(v["version"], "1.0.0");
    assert_eq!(v["route"], "default");
    assert_eq!(v["reason"]["by"], "default");
    assert_eq!(v["estimates"], serde_json::json!([{"y": 3.0}, {"y": 6.0}]));
    assert_eq!(v["usage"]["rows"], 2);
    assert!(v["digest"].as_str().unwrap().starts_with("sha256:"));
}

#[test]
fn malformed_requests_are_400_naming_the_problem() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    for (body, needle) in [
        ("{not json", "not a score request"),
        (r#"{"rows": [{"x": 1}], "colour": "red"}"#, "unknown field `colour`"),
        (r#"{"rows": []}"#, "`rows` is empty"),
        (r#"{"rows": [{"x": 1}], "at": "yesterday"}"#, "`at`: `yesterday` is not an RFC 3339 time"),
        (r#"{"rows": [{"x": [1, 2]}]}"#, "not a score request"),
    ] {
        let r = call("POST", &score_url(&s, "m"), Some(body), None);
        assert_eq!((r.status, r.kind().as_str()), (400, "bad_request"), "{body}: {}", r.body);
        assert!(r.json()["error"]["message"].as_str().unwrap().contains(needle), "{body}: {}", r.body);
    }
}

#[test]
fn unknown_models_and_routes_are_404() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = call("POST", &score_url(&s, "nope"), Some(r#"{"rows": [{"x": 1}]}"#), None);
    assert_eq!((r.status, r.kind().as_str()), (404, "unknown_model"), "{}", r.body);
    assert_eq!(r.json()["error"]["details"]["served"], serde_json::json!(["affine", "m"]));
    let r = call("GET", &format!("{}/v1/models/nope/contract", s.base), None, None);
    assert_eq!(r.status, 404);
    let r = call("GET", &format!("{}/v2/anything", s.base), None, None);
    assert_eq!((r.status, r.kind().as_str()), (404, "not_found"));
}

#[test]
fn a_body_over_the_limit_is_413() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions { max_body_bytes: 1024, ..ServeOptions::default() });
    let rows: Vec<String> = (0..200).map(|i| format!("{{\"x\": {i}}}")).collect();
    let body = format!("{{\"rows\": [{}]}}", rows.join(","));
    assert!(body.len() > 1024);
    let r = call("POST", &score_url(&s, "m"), Some(&body), None);
    assert_eq!((r.status, r.kind().as_str()), (413, "too_large"), "{}", r.body);
    assert_eq!(r.json()["error"]["limit"], "body_bytes");
}

#[test]
fn rows_that_break_the_contract_are_422_with_every_row_named() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = call("POST", &score_url(&s, "m"), Some(r#"{"rows": [{"x": 1}, {"x": "seven"}, {"y": 1}]}"#), None);
    assert_eq!((r.status, r.kind().as_str()), (422, "invalid_rows"), "{}", r.body);
    let rows = r.json()["error"]["rows"].clone();
    assert_eq!(rows[0]["row"], 1);
    assert_eq!(rows[0]["feature"], "x");
    assert_eq!(rows[0]["rule"]["rule"], "wrong_kind");
    assert_eq!(rows[1]["row"], 2);
    assert_eq!(rows[1]["feature"], "y");
    assert_eq!(rows[1]["rule"]["rule"], "unknown_feature");
    assert_eq!(r.json()["error"]["version"], "1.0.0");
}

#[test]
fn a_limit_hit_is_500_and_a_model_fault_is_502() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = call("POST", &score_url(&s, "affine"), Some(r#"{"rows": [{"x": 1}]}"#), None);
    assert_eq!((r.status, r.kind().as_str()), (500, "limit"), "{}", r.body);
    assert_eq!(r.json()["error"]["limit"], "deadline");

    // The fixture's mode 3 traps on a negative x.
    let other = tempfile::tempdir().unwrap();
    put(other.path(), "affine", "1.0.0", &paddock_host::pack(&fixture("affine.wat"), Some(&[3]), None).unwrap());
    write_atomically(&other.path().join("routes.toml"), b"[models.affine]\ndefault = \"1.0.0\"\n");
    let reg = Registry::open(&Runtime::new().unwrap(), other.path(), RegistryOptions::default()).unwrap();
    let s2 = Server::start(reg, ServeOptions::default());
    let r = call("POST", &score_url(&s2, "affine"), Some(r#"{"rows": [{"x": -1}]}"#), None);
    assert_eq!((r.status, r.kind().as_str()), (502, "trap"), "{}", r.body);
    // The server goes on: the next call starts a new instance.
    let r = call("POST", &score_url(&s2, "affine"), Some(r#"{"rows": [{"x": 1}]}"#), None);
    assert_eq!(r.status, 200, "{}", r.body);
}

#[test]
fn a_full_queue_is_503_with_retry_after() {
    let dir = tempfile::tempdir().unwrap();
    let options = ServeOptions { concurrency: 1, queue: 0, retry_after_secs: 2, ..ServeOptions::default() };
    // The spinning model holds the only permit for its whole 1 s deadline;
    // of two calls started together, one must find it taken.
    let s = Server::start(store_with_deadline(dir.path(), true, Duration::from_secs(1)), options);
    let calls: Vec<_> = (0..2)
        .map(|_| {
            let url = score_url(&s, "affine");
            std::thread::spawn(move || call("POST", &url, Some(r#"{"rows": [{"x": 1}]}"#), None))
        })
        .collect();
    // Meanwhile another model has its own limit and is not held up.
    std::thread::sleep(Duration::from_millis(50));
    let r = call("POST", &score_url(&s, "m"), Some(r#"{"rows": [{"x": 1}]}"#), None);
    assert_eq!(r.status, 200);
    let mut replies: Vec<Reply> = calls.into_iter().map(|c| c.join().unwrap()).collect();
    replies.sort_by_key(|r| r.status);
    assert_eq!((replies[0].status, replies[0].kind().as_str()), (500, "limit"), "{}", replies[0].body);
    assert_eq!((replies[1].status, replies[1].kind().as_str()), (503, "overloaded"), "{}", replies[1].body);
    assert_eq!(replies[1].retry_after.as_deref(), Some("2"));
}

#[test]
fn admin_reload_needs_the_bearer_token() {
    let dir = tempfile::tempdir().unwrap();
    let url = |s: &Server| format!("{}/v1/admin/reload", s.base);
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = call("POST", &url(&s), None, Some("anything"));
    assert_eq!((r.status, r.kind().as_str()), (403, "admin_disabled"));
    drop(s);

    let token = "a-token-of-some-length";
    let s = Server::start(store(dir.path(), true), ServeOptions { admin_token: Some(token.into()), ..ServeOptions::default() });
    let r = call("POST", &url(&s), None, None);
    assert_eq!((r.status, r.kind().as_str()), (401, "unauthorized"));
    assert_eq!(r.www_authenticate.as_deref(), Some("Bearer"));
    let r = call("POST", &url(&s), None, Some("a-token-of-some-lengtH"));
    assert_eq!(r.status, 401);
    put(dir.path(), "m", "2.0.0", &line_artifact("m", "2.0.0", 1.0, 0.0, None));
    let r = call("POST", &url(&s), None, Some(token));
    assert_eq!(r.status, 200, "{}", r.body);
    assert_eq!(r.json()["loaded"], serde_json::json!(["m 2.0.0"]));
}

#[test]
fn health_readiness_status_models_and_contract() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), false), ServeOptions::default());
    assert_eq!(call("GET", &format!("{}/healthz", s.base), None, None).status, 200);
    let r = call("GET", &format!("{}/readyz", s.base), None, None);
    assert_eq!((r.status, r.kind().as_str()), (503, "not_ready"));
    assert!(r.retry_after.is_some());
    drop(s);

    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    assert_eq!(call("GET", &format!("{}/readyz", s.base), None, None).status, 200);
    let models = call("GET", &format!("{}/v1/models", s.base), None, None).json();
    let m = models["models"].as_array().unwrap().iter().find(|m| m["name"] == "m").unwrap().clone();
    assert_eq!((m["routed"].clone(), m["default_version"].clone()), (true.into(), "1.0.0".into()));
    assert_eq!(m["versions"][0]["used_by"], serde_json::json!(["default"]));
    let c = call("GET", &format!("{}/v1/models/m/contract", s.base), None, None).json();
    assert_eq!(c["name"], "m");
    assert_eq!(c["features"][0]["name"], "x");
    let c = call("GET", &format!("{}/v1/models/m/contract?version=9.0.0", s.base), None, None);
    assert_eq!(c.status, 404);
    let c = call("GET", &format!("{}/v1/models/m/contract?version=latest", s.base), None, None);
    assert_eq!(c.status, 400);
    let st = call("GET", &format!("{}/v1/status", s.base), None, None).json();
    assert_eq!(st["routes"]["state"], "accepted");
}

#[test]
fn metrics_are_openmetrics_text_with_the_calls_made() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    for _ in 0..3 {
        call("POST", &score_url(&s, "m"), Some(r#"{"rows": [{"x": 1}, {"x": 2}]}"#), None);
    }
    call("POST", &score_url(&s, "m"), Some(r#"{"rows": [{"x": "bad"}]}"#), None);
    let r = call("GET", &format!("{}/metrics", s.base), None, None);
    assert_eq!(r.content_type, "application/openmetrics-text; version=1.0.0; charset=utf-8");
    for line in [
        r#"paddock_calls_total{model="m",version="1.0.0"} 4"#,
        r#"paddock_rows_total{model="m",version="1.0.0"} 7"#,
        r#"paddock_errors_total{model="m",version="1.0.0",kind="invalid_rows"} 1"#,
        r#"paddock_call_seconds_count{model="m",version="1.0.0"} 4"#,
        r#"paddock_call_seconds_bucket{model="m",version="1.0.0",le="+Inf"} 4"#,
    ] {
        assert!(r.body.lines().any(|l| l == line), "no {line:?} in\n{}", r.body);
    }
    assert!(r.body.ends_with("# EOF\n"));
}

#[test]
fn the_openapi_document_is_served_and_names_every_route() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let served = call("GET", &format!("{}/openapi.json", s.base), None, None).json();
    let doc: serde_json::Value = serde_json::from_str(OPENAPI).unwrap();
    assert_eq!(served, doc);
    assert_eq!(doc["openapi"], "3.1.0");
    let paths: Vec<&str> = doc["paths"].as_object().unwrap().keys().map(String::as_str).collect();
    for p in ["/v1/models/{model}/score", "/v1/models", "/v1/models/{model}/contract", "/v1/status", "/v1/admin/reload", "/healthz", "/readyz", "/metrics", "/openapi.json"] {
        assert!(paths.contains(&p), "{p} is not documented");
    }
}

#[test]
fn shutdown_lets_the_request_in_flight_finish() {
    let dir = tempfile::tempdir().unwrap();
    let mut s = Server::start(store_with_deadline(dir.path(), true, Duration::from_secs(2)), ServeOptions::default());
    let url = score_url(&s, "affine");
    // This call runs for its whole 2 s deadline; shut down a quarter of the way in.
    let in_flight = std::thread::spawn(move || call("POST", &url, Some(r#"{"rows": [{"x": 1}]}"#), None));
    std::thread::sleep(Duration::from_millis(500));
    s.stop();
    let r = in_flight.join().unwrap();
    assert_eq!((r.status, r.kind().as_str()), (500, "limit"), "{}", r.body);
    // And nothing new is accepted.
    let refused = agent().get(&format!("{}/healthz", s.base)).call();
    assert!(refused.is_err(), "{:?}", refused.map(|r| r.status()));
}
