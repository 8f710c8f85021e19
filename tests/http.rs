//! The HTTP surface, in process, over real loopback connections: every
//! status kind the API documents, the admin token, metrics, the OpenAPI
//! document, and a graceful shutdown that lets a request in flight finish.

use std::path::Path;
use std::sync::mpsc;
use std::time::Duration;

use paddock_host::{Digest, Limits, ModelOptions, Runtime};
use paddock_serve::registry::artifact_path;
use paddock_serve::surface::http::{self, ServeOptions};
use paddock_serve::surface::openapi;
use paddock_serve::{Registry, RegistryOptions};
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
    let options =
        RegistryOptions { model: ModelOptions { limits, ..ModelOptions::default() }, ..RegistryOptions::default() };
    Registry::open(&Runtime::new().unwrap(), dir, options).unwrap()
}

fn estimate_url(s: &Server) -> String {
    format!("{}/estimate", s.base)
}

/// `POST /estimate` for `model` with the other fields of `rest` (a JSON object).
fn estimate(s: &Server, model: &str, rest: &str) -> Reply {
    call("POST", &estimate_url(s), Some(&with_model(model, rest)), None)
}

fn with_model(model: &str, rest: &str) -> String {
    let mut v: serde_json::Value = serde_json::from_str(rest).unwrap();
    v["model"] = model.into();
    v.to_string()
}

#[test]
fn scoring_answers_with_estimates_version_route_and_usage() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = estimate(
        &s,
        "m",
        r#"{"rows": [{"x": 1}, {"x": 2.5}], "context": {"site": "a"}, "at": "2026-12-05T08:27:00+01:00"}"#,
    );
    assert_eq!(r.status, 200, "{}", r.body);
    assert_eq!(r.content_type, "application/json");
    let v = r.json();
    assert_eq!(v["version"], "1.0.0");
    assert_eq!(v["route"], "default");
    assert_eq!(v["reason"]["picked_by"], "default");
    assert_eq!(v["estimates"], serde_json::json!([{"y": 3.0}, {"y": 6.0}]));
    assert_eq!(v["usage"]["rows"], 2);
    // Durations carry their unit in the field's name.
    assert!(v["usage"]["wall_us"].as_f64().unwrap() > 0.0, "{v}");
    assert!(v["digest"].as_str().unwrap().starts_with("sha256:"));
}

/// `"contributions": true` puts each scored row's contributions in the
/// answer (y = 2x + 1: x contributes 2x on the baseline 1, by hand), `null`
/// for a row that broke the contract; not asked, they are left out. A
/// model without the export (the hand-written fixture) is 422
/// `cannot_explain`, naming why.
#[test]
fn contributions_come_when_asked_and_a_model_that_cannot_explain_is_422() {
    let dir = tempfile::tempdir().unwrap();
    put(dir.path(), "m", "1.0.0", &line_artifact("m", "1.0.0", 2.0, 1.0, None));
    put(dir.path(), "affine", "1.0.0", &paddock_host::pack(&fixture("affine.wat"), Some(&[0]), None).unwrap());
    let routes = "[models.m]\ndefault = \"1.0.0\"\n[models.affine]\ndefault = \"1.0.0\"\n";
    write_atomically(&dir.path().join("routes.toml"), routes.as_bytes());
    let registry = Registry::open(&Runtime::new().unwrap(), dir.path(), RegistryOptions::default()).unwrap();
    let s = Server::start(registry, ServeOptions::default());
    let r = estimate(&s, "m", r#"{"rows": [{"x": 1}, {"x": "one"}, {"x": 2.5}], "contributions": true}"#);
    assert_eq!(r.status, 200, "{}", r.body);
    let why = |margin: f64, x: f64| serde_json::json!({"y": {"scale": "output", "baseline": 1.0, "margin": margin, "features": {"x": x}}});
    assert_eq!(r.json()["contributions"], serde_json::json!([why(3.0, 2.0), null, why(6.0, 5.0)]));
    let plain = estimate(&s, "m", r#"{"rows": [{"x": 1}]}"#).json();
    assert!(plain.get("contributions").is_none(), "{plain}");
    let r = estimate(&s, "affine", r#"{"row": {"x": 1}, "contributions": true}"#);
    assert_eq!(r.status, 422, "{}", r.body);
    let e = r.json();
    assert_eq!(e["error"]["kind"], "cannot_explain", "{e}");
    assert!(e["error"]["message"].as_str().unwrap().contains("no `contributions` export"), "{e}");
}

#[test]
fn malformed_requests_are_400_naming_the_problem() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    for (body, needle) in [
        ("{not json", "not an estimate request"),
        (r#"{"model": "m", "rows": [{"x": 1}], "colour": "red"}"#, "unknown field `colour`"),
        (r#"{"model": "m", "rows": []}"#, "rows is empty"),
        (r#"{"model": "m"}"#, "give `row` (one row) or `rows` (a list)"),
        (r#"{"model": "m", "rows": [{"x": 1}], "at": "yesterday"}"#, "`at`: `yesterday` is not an RFC 3339 time"),
        (r#"{"model": "m", "rows": [{"x": [1, 2]}]}"#, "not an estimate request"),
        (r#"[2, 3]"#, "expected an object {\"model\": …, \"rows\": […]}, got an array"),
        (r#""m""#, "got a string"),
    ] {
        let r = call("POST", &estimate_url(&s), Some(body), None);
        assert_eq!((r.status, r.kind().as_str()), (400, "bad_request"), "{body}: {}", r.body);
        assert!(r.json()["error"]["message"].as_str().unwrap().contains(needle), "{body}: {}", r.body);
    }
}

#[test]
fn unknown_models_and_routes_are_404() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = estimate(&s, "nope", r#"{"rows": [{"x": 1}]}"#);
    assert_eq!((r.status, r.kind().as_str()), (404, "unknown_model"), "{}", r.body);
    assert_eq!(r.json()["error"]["details"]["served"], serde_json::json!(["affine", "m"]));
    let r = call("GET", &format!("{}/contract?model=nope", s.base), None, None);
    assert_eq!(r.status, 404);
    // No path names a model or a version.
    let r = call("GET", &format!("{}/m/contract", s.base), None, None);
    assert_eq!((r.status, r.kind().as_str()), (404, "not_found"));
}

#[test]
fn a_body_over_the_limit_is_413() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions { max_body_bytes: 1024, ..ServeOptions::default() });
    let rows: Vec<String> = (0..200).map(|i| format!("{{\"x\": {i}}}")).collect();
    let body = format!("{{\"rows\": [{}]}}", rows.join(","));
    assert!(body.len() > 1024);
    let r = estimate(&s, "m", &body);
    assert_eq!((r.status, r.kind().as_str()), (413, "too_large"), "{}", r.body);
    assert_eq!(r.json()["error"]["limit"], "body_bytes");
    let message = r.json()["error"]["message"].as_str().unwrap().to_owned();
    assert!(
        message.contains("split the rows over several requests") && message.contains("limit of 1024 bytes"),
        "{message}"
    );
}

/// The OpenAPI document declares the body as `application/json`: a body
/// declared as anything else is 415, naming what it was declared as.
#[test]
fn a_body_that_is_not_json_is_415() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let body = with_model("m", r#"{"rows": [{"x": 1}]}"#);
    for declared in ["application/x-www-form-urlencoded", "text/plain; charset=utf-8"] {
        let mut response =
            agent().post(&estimate_url(&s)).header("content-type", declared).send(body.as_str()).unwrap();
        assert_eq!(response.status().as_u16(), 415, "{declared}");
        let text = response.body_mut().read_to_string().unwrap();
        let v: serde_json::Value = serde_json::from_str(&text).unwrap();
        assert_eq!(v["error"]["kind"], "unsupported_media_type", "{text}");
        assert!(v["error"]["message"].as_str().unwrap().contains(declared), "{text}");
    }
    let ok =
        agent().post(&estimate_url(&s)).header("content-type", "application/json; charset=utf-8").send(body.as_str());
    assert_eq!(ok.unwrap().status().as_u16(), 200);
}

#[test]
fn valid_rows_are_answered_beside_invalid_ones_and_422_only_when_none_is_valid() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    // Rows are numbered from 1; row 3 has two problems, both reported.
    let r = estimate(&s, "m", r#"{"rows": [{"x": 1}, {"x": "seven"}, {"y": 1}, {"x": 2}]}"#);
    assert_eq!(r.status, 200, "{}", r.body);
    let v = r.json();
    assert_eq!(v["estimates"], serde_json::json!([{"y": 3.0}, null, null, {"y": 5.0}]));
    let problems: Vec<(u64, String, String)> = v["problems"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| {
            (
                p["row"].as_u64().unwrap(),
                p["feature"].as_str().unwrap().into(),
                p["rule"]["rule"].as_str().unwrap().into(),
            )
        })
        .collect();
    assert_eq!(
        problems,
        [
            (2, "x".into(), "wrong_kind".into()),
            (3, "y".into(), "unknown_feature".into()),
            (3, "x".into(), "missing_required".into())
        ]
    );
    assert_eq!(v["usage"]["rows"], 2);

    let r = estimate(&s, "m", r#"{"rows": [{"x": "seven"}, {"y": 1}]}"#);
    assert_eq!((r.status, r.kind().as_str()), (422, "invalid_rows"), "{}", r.body);
    let rows = r.json()["error"]["rows"].clone();
    assert_eq!(rows.as_array().unwrap().len(), 3);
    assert_eq!((rows[0]["row"].clone(), rows[0]["feature"].clone()), (1.into(), "x".into()));
    assert_eq!((rows[1]["row"].clone(), rows[1]["feature"].clone()), (2.into(), "y".into()));
    assert_eq!(r.json()["error"]["version"], "1.0.0");
}

#[test]
fn a_limit_hit_is_500_and_a_model_fault_is_502() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = estimate(&s, "affine", r#"{"rows": [{"x": 1}]}"#);
    assert_eq!((r.status, r.kind().as_str()), (500, "limit"), "{}", r.body);
    assert_eq!(r.json()["error"]["limit"], "deadline");

    // The fixture's mode 3 traps on a negative x.
    let other = tempfile::tempdir().unwrap();
    put(other.path(), "affine", "1.0.0", &paddock_host::pack(&fixture("affine.wat"), Some(&[3]), None).unwrap());
    write_atomically(&other.path().join("routes.toml"), b"[models.affine]\ndefault = \"1.0.0\"\n");
    let reg = Registry::open(&Runtime::new().unwrap(), other.path(), RegistryOptions::default()).unwrap();
    let s2 = Server::start(reg, ServeOptions::default());
    let r = estimate(&s2, "affine", r#"{"rows": [{"x": -1}]}"#);
    assert_eq!((r.status, r.kind().as_str()), (502, "trap"), "{}", r.body);
    // The server goes on: the next call starts a new instance.
    let r = estimate(&s2, "affine", r#"{"rows": [{"x": 1}]}"#);
    assert_eq!(r.status, 200, "{}", r.body);
}

/// A gauge or counter sample from `/metrics`, 0 when absent.
fn metric(s: &Server, sample: &str) -> f64 {
    let r = call("GET", &format!("{}/metrics", s.base), None, None);
    r.body
        .lines()
        .find_map(|l| l.strip_prefix(sample).and_then(|v| v.strip_prefix(' ')))
        .map_or(0.0, |v| v.parse().unwrap())
}

/// Waits until `/metrics` shows `sample` at `value` (the server's own
/// account of what is running), failing after a minute.
fn wait_for(s: &Server, sample: &str, value: f64) {
    paddock_tests::wait_until(
        &format!("{sample} at {value}"),
        Duration::from_secs(60),
        Duration::from_millis(5),
        || metric(s, sample) == value,
    );
}

const AFFINE_IN_FLIGHT: &str = r#"paddock_in_flight{model="affine",version="1.0.0"}"#;

#[test]
fn a_full_queue_is_503_with_retry_after() {
    let dir = tempfile::tempdir().unwrap();
    let options = ServeOptions { concurrency: 1, queue: 0, retry_after_secs: 2, ..ServeOptions::default() };
    // The spinning model holds the only permit for its whole deadline.
    let s = Server::start(store_with_deadline(dir.path(), true, Duration::from_secs(5)), options);
    let url = estimate_url(&s);
    let first =
        std::thread::spawn(move || call("POST", &url, Some(&with_model("affine", r#"{"rows": [{"x": 1}]}"#)), None));
    wait_for(&s, AFFINE_IN_FLIGHT, 1.0);
    // The permit is taken and nothing may wait: 503 at once.
    let r = estimate(&s, "affine", r#"{"rows": [{"x": 1}]}"#);
    assert_eq!((r.status, r.kind().as_str()), (503, "overloaded"), "{}", r.body);
    assert_eq!(r.retry_after.as_deref(), Some("2"));
    // Another model has its own limit and is not held up.
    let r = estimate(&s, "m", r#"{"rows": [{"x": 1}]}"#);
    assert_eq!(r.status, 200);
    let r = first.join().unwrap();
    assert_eq!((r.status, r.kind().as_str()), (500, "limit"), "{}", r.body);
    assert_eq!(metric(&s, r#"paddock_rejected_requests_total{kind="overloaded"}"#), 1.0);
}

#[test]
fn a_model_spinning_with_all_its_permits_leaves_the_others_their_workers() {
    let dir = tempfile::tempdir().unwrap();
    // 2 async workers (Server::start); the spinning model may take 2 calls.
    let options = ServeOptions { concurrency: 2, score_threads: 4, ..ServeOptions::default() };
    let s = Server::start(store_with_deadline(dir.path(), true, Duration::from_secs(5)), options);
    let spinning: Vec<_> = (0..2)
        .map(|_| {
            let url = estimate_url(&s);
            std::thread::spawn(move || call("POST", &url, Some(&with_model("affine", r#"{"rows": [{"x": 1}]}"#)), None))
        })
        .collect();
    // Metrics answer while both calls spin (that is how we know they do).
    wait_for(&s, AFFINE_IN_FLIGHT, 2.0);
    let r = estimate(&s, "m", r#"{"rows": [{"x": 1}]}"#);
    assert_eq!(r.status, 200, "{}", r.body);
    assert_eq!(r.json()["estimates"], serde_json::json!([{"y": 3.0}]));
    assert_eq!(call("GET", &format!("{}/alive", s.base), None, None).status, 200);
    assert_eq!(call("GET", &format!("{}/ready", s.base), None, None).status, 200);
    // All of that happened while the spinning calls were still running.
    assert_eq!(metric(&s, AFFINE_IN_FLIGHT), 2.0);
    assert!(spinning.iter().all(|t| !t.is_finished()));
    for t in spinning {
        let r = t.join().unwrap();
        assert_eq!((r.status, r.kind().as_str()), (500, "limit"), "{}", r.body);
    }
    assert_eq!(metric(&s, AFFINE_IN_FLIGHT), 0.0);
}

#[test]
fn names_no_model_has_keep_no_state() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    estimate(&s, "m", r#"{"rows": [{"x": 1}]}"#);
    let versions_before = metric(&s, r#"paddock_calls_total{model="m",version="1.0.0"}"#);
    for i in 0..500 {
        let r = estimate(&s, &format!("random-{i}"), r#"{"rows": [{"x": 1}]}"#);
        assert_eq!((r.status, r.kind().as_str()), (404, "unknown_model"));
    }
    // One gate (for m), whatever was asked; the refusals are counted by kind only.
    assert_eq!(metric(&s, "paddock_serve_gates"), 1.0);
    assert_eq!(metric(&s, r#"paddock_rejected_requests_total{kind="unknown_model"}"#), 500.0);
    assert_eq!(metric(&s, r#"paddock_calls_total{model="m",version="1.0.0"}"#), versions_before);
    let text = call("GET", &format!("{}/metrics", s.base), None, None).body;
    assert!(!text.contains("random-"), "{text}");
}

#[test]
fn framework_errors_have_the_same_json_body() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = call("POST", &format!("{}/alive", s.base), None, None);
    assert_eq!((r.status, r.kind().as_str()), (405, "method_not_allowed"), "{}", r.body);
    assert_eq!(r.content_type, "application/json");
    let r = call("GET", &estimate_url(&s), None, None);
    assert_eq!((r.status, r.kind().as_str()), (405, "method_not_allowed"), "{}", r.body);
    let r = call("GET", &format!("{}/contract", s.base), None, None);
    assert_eq!((r.status, r.kind().as_str()), (400, "bad_request"), "{}", r.body);
    assert!(r.json()["error"]["message"].as_str().unwrap().contains("model"), "{}", r.body);
    let r = call("GET", &format!("{}/contract?model=m&version=1&version=2", s.base), None, None);
    assert_eq!((r.status, r.kind().as_str()), (400, "bad_request"), "{}", r.body);
    assert_eq!(r.content_type, "application/json", "{}", r.body);
}

#[test]
fn a_store_rescan_needs_the_bearer_token() {
    let dir = tempfile::tempdir().unwrap();
    let url = |s: &Server| format!("{}/store/rescan", s.base);
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = call("POST", &url(&s), None, Some("anything"));
    assert_eq!((r.status, r.kind().as_str()), (403, "admin_disabled"));
    drop(s);

    let token = "a-token-of-some-length";
    let s = Server::start(
        store(dir.path(), true),
        ServeOptions { admin_token: Some(token.into()), ..ServeOptions::default() },
    );
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
fn alive_ready_store_catalogue_and_contract() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), false), ServeOptions::default());
    let r = call("GET", &format!("{}/alive", s.base), None, None);
    assert_eq!((r.status, r.json()["state"].clone()), (200, "alive".into()), "{}", r.body);
    let r = call("GET", &format!("{}/ready", s.base), None, None);
    assert_eq!((r.status, r.kind().as_str()), (503, "not_ready"));
    assert!(r.retry_after.is_some());
    drop(s);

    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    assert_eq!(call("GET", &format!("{}/ready", s.base), None, None).status, 200);
    let catalogue = call("GET", &format!("{}/catalogue", s.base), None, None).json();
    assert_eq!(catalogue["api_revision"], http::API_REVISION);
    let m = catalogue["models"].as_array().unwrap().iter().find(|m| m["name"] == "m").unwrap().clone();
    assert_eq!((m["routed"].clone(), m["default_version"].clone()), (true.into(), "1.0.0".into()));
    assert_eq!(m["versions"][0]["used_by"], serde_json::json!(["default"]));
    let c = call("GET", &format!("{}/contract?model=m", s.base), None, None).json();
    assert_eq!(c["name"], "m");
    assert_eq!(c["features"][0]["name"], "x");
    // Domains are spelt as manifests and `inspect` spell them.
    assert!(c["features"][0]["domain"].get("real").is_some(), "{c}");
    let c = call("GET", &format!("{}/contract?model=m&version=9.0.0", s.base), None, None);
    assert_eq!((c.status, c.kind().as_str()), (404, "unknown_version"), "{}", c.body);
    assert_eq!(c.json()["error"]["details"]["loaded"], serde_json::json!(["1.0.0"]));
    let c = call("GET", &format!("{}/contract?model=nope&version=1.0.0", s.base), None, None);
    assert_eq!((c.status, c.kind().as_str()), (404, "unknown_model"), "{}", c.body);
    let c = call("GET", &format!("{}/contract?model=m&version=latest", s.base), None, None);
    assert_eq!(c.status, 400);
    let st = call("GET", &format!("{}/store", s.base), None, None).json();
    assert_eq!(st["routes"]["state"], "accepted");
    drop(s);

    // Routes naming a version that is not there: that model is named by
    // /ready and /store, the other one serves.
    write_atomically(
        &dir.path().join("routes.toml"),
        b"[models.m]\ndefault = \"9.9.9\"\n[models.affine]\ndefault = \"1.0.0\"\n",
    );
    let s = Server::start(store(dir.path(), false), ServeOptions::default());
    let r = call("GET", &format!("{}/ready", s.base), None, None);
    assert_eq!((r.status, r.json()["not_routed"].clone()), (200, serde_json::json!(["m"])), "{}", r.body);
    let st = call("GET", &format!("{}/store", s.base), None, None).json();
    assert_eq!(st["routes"]["state"], "partly_taken", "{st}");
    assert!(st["routes"]["problems"][0].as_str().unwrap().contains("model `m`: version 9.9.9"), "{st}");
    drop(s);

    // Nothing routable: /ready says why.
    write_atomically(&dir.path().join("routes.toml"), b"[models.m]\ndefault = \"9.9.9\"\n");
    let s = Server::start(store(dir.path(), false), ServeOptions::default());
    let r = call("GET", &format!("{}/ready", s.base), None, None);
    assert_eq!((r.status, r.kind().as_str()), (503, "not_ready"));
    let message = r.json()["error"]["message"].as_str().unwrap().to_owned();
    assert!(message.contains("routes.toml is refused: model `m`: version 9.9.9"), "{message}");
}

#[test]
fn metrics_are_openmetrics_text_with_the_calls_made() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    for _ in 0..3 {
        estimate(&s, "m", r#"{"rows": [{"x": 1}, {"x": 2}]}"#);
    }
    estimate(&s, "m", r#"{"rows": [{"x": "bad"}]}"#);
    estimate(&s, "nope", r#"{"rows": [{"x": 1}]}"#);
    let r = call("GET", &format!("{}/metrics", s.base), None, None);
    assert_eq!(r.content_type, "application/openmetrics-text; version=1.0.0; charset=utf-8");
    // The invalid request is the client's fault: counted apart, not as a
    // call or an error of the version.
    for line in [
        r#"paddock_calls_total{model="m",version="1.0.0"} 3"#,
        r#"paddock_rows_total{model="m",version="1.0.0"} 6"#,
        r#"paddock_refused_rows_total{model="m",version="1.0.0",kind="invalid_rows"} 1"#,
        r#"paddock_call_seconds_count{model="m",version="1.0.0"} 3"#,
        r#"paddock_call_seconds_bucket{le="+Inf",model="m",version="1.0.0"} 3"#,
        r#"paddock_rejected_requests_total{kind="unknown_model"} 1"#,
        r#"paddock_in_flight{model="m",version="1.0.0"} 0"#,
    ] {
        assert!(r.body.lines().any(|l| l == line), "no {line:?} in\n{}", r.body);
    }
    assert!(!r.body.lines().any(|l| l.starts_with("paddock_errors_total")), "{}", r.body);
    assert!(r.body.ends_with("# EOF\n"));
}

#[test]
fn the_openapi_document_is_served_and_names_every_route() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let served = call("GET", &format!("{}/openapi.json", s.base), None, None).json();
    let doc: serde_json::Value = serde_json::from_str(&openapi::document()).unwrap();
    assert_eq!(served, doc);
    assert_eq!(doc["openapi"], "3.1.0");
    let mut paths: Vec<&str> = doc["paths"].as_object().unwrap().keys().map(String::as_str).collect();
    paths.sort();
    assert_eq!(
        paths,
        [
            "/alive",
            "/catalogue",
            "/contract",
            "/estimate",
            "/metrics",
            "/openapi.json",
            "/ready",
            "/store",
            "/store/rescan"
        ]
    );
    // Every documented route answers something other than "no such route".
    for p in &paths {
        let method = if doc["paths"][p]["post"].is_object() { "POST" } else { "GET" };
        let r = call(method, &format!("{}{p}", s.base), None, None);
        assert!(!r.body.contains(r#""kind":"not_found""#), "{method} {p}: {}", r.body);
    }
}

#[test]
fn the_id_is_echoed_and_a_single_row_may_be_given_as_row() {
    let dir = tempfile::tempdir().unwrap();
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    let r = estimate(&s, "m", r#"{"id": {"event": 7}, "row": {"x": 2}}"#);
    assert_eq!(r.status, 200, "{}", r.body);
    assert_eq!(r.json()["id"], serde_json::json!({"event": 7}));
    assert_eq!(r.json()["estimates"], serde_json::json!([{"y": 5.0}]));
    let r = estimate(&s, "m", r#"{"row": {"x": 2}, "rows": [{"x": 2}]}"#);
    assert_eq!((r.status, r.kind().as_str()), (400, "bad_request"), "{}", r.body);
    let r = call("POST", &estimate_url(&s), Some(r#"{"rows": [{"x": 2}]}"#), None);
    assert_eq!((r.status, r.kind().as_str()), (400, "bad_request"), "{}", r.body);
    assert!(r.body.contains("missing field `model`"), "{}", r.body);
}

#[test]
fn shutdown_lets_the_request_in_flight_finish() {
    let dir = tempfile::tempdir().unwrap();
    let mut s = Server::start(store_with_deadline(dir.path(), true, Duration::from_secs(5)), ServeOptions::default());
    let url = estimate_url(&s);
    // This call runs for its whole deadline; shut down once it is running.
    let in_flight =
        std::thread::spawn(move || call("POST", &url, Some(&with_model("affine", r#"{"rows": [{"x": 1}]}"#)), None));
    wait_for(&s, AFFINE_IN_FLIGHT, 1.0);
    s.stop();
    let r = in_flight.join().unwrap();
    assert_eq!((r.status, r.kind().as_str()), (500, "limit"), "{}", r.body);
    // And nothing new is accepted.
    let refused = agent().get(&format!("{}/alive", s.base)).call();
    assert!(refused.is_err(), "{:?}", refused.map(|r| r.status()));
}

/// A model whose `x` is looked up: the request gives the key (in the
/// context, or in the row), and the answer says where `x` came from.
#[test]
fn estimates_are_scored_from_keys_and_say_what_was_looked_up() {
    let dir = tempfile::tempdir().unwrap();
    write_atomically(&dir.path().join("tables/sites.csv"), b"site,x\nnorth-1,3\n");
    write_atomically(
        &dir.path().join("features.toml"),
        b"[sources.sites]\ntable = \"tables/sites.csv\"\nkey = \"site\"\n[models.m]\nkeys = [\"site\"]\n[models.m.features]\nx = { source = \"sites\", key = \"{site}\", field = \"x\", missing = { default = 0.5 } }\n",
    );
    let s = Server::start(store(dir.path(), true), ServeOptions::default());
    // y = 2·3 + 1 from the table; everything said with "lookups": "all".
    let r = estimate(&s, "m", r#"{"context": {"site": "north-1"}, "row": {}, "lookups": "all"}"#);
    assert_eq!(r.status, 200, "{}", r.body);
    let a = r.json();
    assert_eq!(a["estimates"][0]["y"], 7.0);
    assert_eq!(
        a["lookups"][0][0],
        serde_json::json!({"feature": "x", "source": "sites", "key": "north-1", "outcome": "found"})
    );
    // Keys in the rows; an unknown site falls back to the default 0.5 (y = 2),
    // and the compact answer names only that fallback.
    let r = estimate(&s, "m", r#"{"rows": [{"site": "north-1"}, {"site": "west-9"}]}"#);
    let a = r.json();
    assert_eq!(
        (a["estimates"][0]["y"].as_f64(), a["estimates"][1]["y"].as_f64()),
        (Some(7.0), Some(2.0)),
        "{}",
        r.body
    );
    assert_eq!(
        a["lookups"],
        serde_json::json!([[], [{"feature": "x", "source": "sites", "key": "west-9", "outcome": "missing"}]])
    );
}

/// A request waiting on its Redis lookups holds no scoring thread: with
/// one scoring thread and the Redis server frozen (SIGSTOP), a request for
/// `m` waits on its lookup (the server says one request is gathering, no
/// thread busy) while `n`, which looks nothing up, is answered; once
/// Redis goes on, `m` is answered from its lookup.
#[test]
fn a_request_waiting_on_its_lookups_holds_no_scoring_thread() {
    let redis = paddock_tests::RedisServer::start();
    redis.cmd(&["HSET", "site:a", "x", "3"]);
    let dir = tempfile::tempdir().unwrap();
    let plan = format!(
        "[sources.live]\nredis = \"{}\"\nbudget_ms = 30000\n[models.m]\nkeys = [\"site\"]\n\
         [models.m.features]\nx = {{ source = \"live\", key = \"site:{{site}}\", field = \"x\", missing = \"fail\" }}\n",
        redis.url()
    );
    write_atomically(&dir.path().join("features.toml"), plan.as_bytes());
    // `m` looks `x` up; `n` (the same line) looks nothing up. Deadlines past
    // the lookup's budget (a plan whose budget exceeds them is refused).
    put(dir.path(), "m", "1.0.0", &line_artifact("m", "1.0.0", 2.0, 1.0, None));
    put(dir.path(), "n", "1.0.0", &line_artifact("n", "1.0.0", 2.0, 1.0, None));
    write_atomically(
        &dir.path().join("routes.toml"),
        b"[models.m]\ndefault = \"1.0.0\"\n[models.n]\ndefault = \"1.0.0\"\n",
    );
    let limits = Limits { deadline: Duration::from_secs(60), ..Limits::default() };
    let options =
        RegistryOptions { model: ModelOptions { limits, ..ModelOptions::default() }, ..RegistryOptions::default() };
    let registry = Registry::open(&Runtime::new().unwrap(), dir.path(), options).unwrap();
    let options = ServeOptions { score_threads: 1, concurrency: 1, ..ServeOptions::default() };
    let s = Server::start(registry, options);
    // Connected and answering first.
    let r = estimate(&s, "m", r#"{"context": {"site": "a"}, "row": {}}"#);
    assert_eq!((r.status, r.json()["estimates"][0]["y"].as_f64()), (200, Some(7.0)), "{}", r.body);

    redis.pause();
    let url = estimate_url(&s);
    let waiting = std::thread::spawn(move || {
        call("POST", &url, Some(&with_model("m", r#"{"context": {"site": "a"}, "row": {}}"#)), None)
    });
    wait_for(&s, "paddock_serve_gathering", 1.0);
    assert_eq!(metric(&s, "paddock_serve_score_threads_busy"), 0.0);
    let r = estimate(&s, "n", r#"{"rows": [{"x": 1}]}"#);
    assert_eq!((r.status, r.json()["estimates"][0]["y"].as_f64()), (200, Some(3.0)), "{}", r.body);
    // Still waiting on Redis all along.
    assert_eq!(metric(&s, "paddock_serve_gathering"), 1.0);
    assert!(!waiting.is_finished());
    redis.resume();
    let r = waiting.join().unwrap();
    assert_eq!((r.status, r.json()["estimates"][0]["y"].as_f64()), (200, Some(7.0)), "{}", r.body);
    assert_eq!(metric(&s, "paddock_serve_gathering"), 0.0);
}
