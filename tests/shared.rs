//! A store shared through NATS JetStream, against a real `nats-server` of
//! each test's own: publishing through the gate, compare-and-set changes,
//! hosts converging on every change and catching up after the server went
//! away, and objects refused before they reach a host's gate.
//!
//! The models are lines `y = slope·x` (computed here, by hand), so every
//! answer says which version gave it.

use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use paddock_host::{Digest, Row, Runtime};
use paddock_serve::registry::RoutesState;
use paddock_serve::shared::mirror::{Mirror, MirrorOptions};
use paddock_serve::shared::{Credentials, FileEntry, SharedError, SharedStore, StoreAddress};
use paddock_serve::{Registry, RegistryOptions, Request, RequestContext};
use paddock_tests::{NatsServer, came_true, line_artifact, padded, wait_until};

const LONG: Duration = Duration::from_secs(60);
const EVERY: Duration = Duration::from_millis(20);

/// A NATS server, a store on it, and a publisher's connection.
struct World {
    nats: NatsServer,
    address: StoreAddress,
    rt: tokio::runtime::Runtime,
    store: SharedStore,
    wasm: Runtime,
}

fn world() -> World {
    let nats = NatsServer::start();
    let address = StoreAddress::parse(&format!("{}/ev", nats.url())).unwrap();
    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(1).enable_all().build().unwrap();
    let store = rt.block_on(SharedStore::connect(&address, &Credentials::default(), true)).unwrap();
    World { nats, address, rt, store, wasm: Runtime::new().unwrap() }
}

impl World {
    /// Publishes `m` at `version` as `y = slope·x`, with honest checks.
    fn publish(&self, version: &str, slope: f64) -> Result<u64, SharedError> {
        let bytes = line_artifact("m", version, slope, 0.0, Some(true));
        self.publish_bytes(bytes)
    }

    fn publish_bytes(&self, bytes: Vec<u8>) -> Result<u64, SharedError> {
        let options = RegistryOptions::default();
        self.rt.block_on(self.store.publish(&self.wasm, bytes, None, &options, "test")).map(|p| p.revision)
    }

    /// Routes `m` to `version` by default, on top of the routes' current revision.
    fn route(&self, version: &str) -> u64 {
        let current = self.rt.block_on(self.store.file(FileEntry::Routes)).unwrap().map(|(r, _)| r);
        let text = format!("[models.m]\ndefault = \"{version}\"\n");
        self.rt.block_on(self.store.put_file(FileEntry::Routes, &text, current)).unwrap()
    }

    fn latest(&self) -> u64 {
        self.rt.block_on(self.store.latest_revision()).unwrap()
    }

    /// A host following the store, its state in `dir`.
    fn host(&self, dir: &Path, name: &str) -> (Registry, Mirror) {
        host_of(&self.wasm, &self.address, dir, name, RegistryOptions::default())
    }
}

fn host_of(
    wasm: &Runtime,
    address: &StoreAddress,
    dir: &Path,
    name: &str,
    options: RegistryOptions,
) -> (Registry, Mirror) {
    let mut mirror = MirrorOptions::default();
    mirror.host = name.to_owned();
    mirror.heartbeat = Duration::from_millis(200);
    mirror.retry = Duration::from_millis(100);
    let options = RegistryOptions { state_dir: Some(dir.to_owned()), usage_flush: None, ..options };
    Mirror::open(wasm, address, &Credentials::default(), options, mirror).unwrap()
}

/// The version answering `m` and its answers for x = 1 and x = 2, or the error.
fn ask(reg: &Registry) -> Result<(String, Vec<f64>), String> {
    let rows = [Row::new().with("x", 1.0), Row::new().with("x", 2.0)];
    let context = RequestContext::new();
    let answer = reg.score(&Request::new("m", &context, &rows)).map_err(|e| e.to_string())?;
    let ys = answer.rows().map(|r| r.map_or(f64::NAN, |v| v[0])).collect();
    Ok((answer.version.to_string(), ys))
}

fn serves(reg: &Registry, version: &str) -> bool {
    ask(reg).is_ok_and(|(v, _)| v == version)
}

#[test]
fn a_published_version_and_a_route_switch_reach_every_host_and_roll_back() {
    let w = world();
    w.publish("1.0.0", 1.0).unwrap();
    let first = w.route("1.0.0");
    let dirs: Vec<_> = (0..3).map(|_| tempfile::tempdir().unwrap()).collect();
    let hosts: Vec<(Registry, Mirror)> =
        dirs.iter().enumerate().map(|(i, d)| w.host(d.path(), &format!("host-{i}"))).collect();
    for (reg, _) in &hosts {
        assert!(serves(reg, "1.0.0"), "{:?}", ask(reg));
    }
    // A client per host, asking all along.
    let stop = Arc::new(AtomicBool::new(false));
    let clients: Vec<_> = hosts
        .iter()
        .map(|(reg, _)| {
            let (reg, stop) = (reg.clone(), stop.clone());
            std::thread::spawn(move || {
                let mut answers = Vec::new();
                while !stop.load(Ordering::Relaxed) {
                    answers.push(ask(&reg));
                }
                answers
            })
        })
        .collect();
    w.publish("2.0.0", 2.0).unwrap();
    w.route("2.0.0");
    for (reg, _) in &hosts {
        wait_until("every host answers from 2.0.0", LONG, EVERY, || serves(reg, "2.0.0"));
    }
    // Roll the routes back to the first revision's text.
    w.rt.block_on(w.store.restore(FileEntry::Routes, first, None)).unwrap();
    for (reg, _) in &hosts {
        wait_until("every host answers from 1.0.0 again", LONG, EVERY, || serves(reg, "1.0.0"));
    }
    stop.store(true, Ordering::Relaxed);
    let mut seen = std::collections::BTreeSet::new();
    for c in clients {
        for answer in c.join().unwrap() {
            let (version, ys) = answer.expect("no request fails while versions and routes change");
            // Both rows of one request come from one version.
            let expected = match version.as_str() {
                "1.0.0" => vec![1.0, 2.0],
                "2.0.0" => vec![2.0, 4.0],
                other => panic!("answered by {other}"),
            };
            assert_eq!(ys, expected, "{version}");
            seen.insert(version);
        }
    }
    assert!(seen.contains("1.0.0"), "{seen:?}");
    // Every host reports itself, at the store's latest revision, with nothing wrong.
    let latest = w.latest();
    wait_until("every host reports the latest revision", LONG, EVERY, || {
        let (l, list) = w.rt.block_on(w.store.hosts()).unwrap();
        l == latest && list.len() == 3 && list.iter().all(|h| h.presence.revision == latest && h.flags.is_empty())
    });
    for (reg, _) in &hosts {
        let m = reg.status().mirror.expect("a mirror's status says so");
        assert_eq!((m.revision, m.latest, m.connected, m.stale_since), (latest, latest, true, None));
    }
}

#[test]
fn of_two_changes_based_on_one_revision_exactly_one_is_written() {
    let w = world();
    w.publish("1.0.0", 1.0).unwrap();
    w.publish("2.0.0", 2.0).unwrap();
    let base = w.route("1.0.0");
    let (a, b) = w.rt.block_on(async {
        tokio::join!(
            w.store.put_file(FileEntry::Routes, "[models.m]\ndefault = \"2.0.0\"\n", Some(base)),
            w.store.put_file(FileEntry::Routes, "[models.m]\ndefault = \"1.0.0\"\n# the other\n", Some(base)),
        )
    });
    let (won, lost) = match (a, b) {
        (Ok(r), Err(e)) | (Err(e), Ok(r)) => (r, e),
        other => panic!("exactly one must win: {other:?}"),
    };
    match lost {
        SharedError::Conflict { entry: FileEntry::Routes, based_on, current } => {
            assert_eq!((based_on, current), (Some(base), Some(won)));
        }
        other => panic!("{other}"),
    }
    // A change based on nothing, when there is an entry, is a conflict too.
    let e = w.rt.block_on(w.store.put_file(FileEntry::Routes, "[models.m]\ndefault = \"1.0.0\"\n", None)).unwrap_err();
    assert!(matches!(e, SharedError::Conflict { based_on: None, current: Some(r), .. } if r == won), "{e}");
    // Routes naming a version the store does not have are refused before anything is written.
    let e =
        w.rt.block_on(w.store.put_file(FileEntry::Routes, "[models.m]\ndefault = \"9.0.0\"\n", Some(won))).unwrap_err();
    assert!(e.to_string().contains("9.0.0"), "{e}");
    let history = w.rt.block_on(w.store.history(FileEntry::Routes)).unwrap();
    assert_eq!(history.iter().map(|r| r.revision).collect::<Vec<_>>(), vec![base, won]);
}

#[test]
fn a_version_is_immutable_checked_before_publishing_and_kept_while_routed() {
    let w = world();
    let first = line_artifact("m", "1.0.0", 1.0, 0.0, Some(true));
    let digest = Digest::of(&first);
    w.publish_bytes(first.clone()).unwrap();
    // The same bytes again: nothing changes.
    let again = w.rt.block_on(w.store.publish(&w.wasm, first, None, &RegistryOptions::default(), "test")).unwrap();
    assert!(again.already);
    // Other bytes under the same version: refused, naming both digests.
    let other = line_artifact("m", "1.0.0", 3.0, 0.0, Some(true));
    let e = w.publish_bytes(other.clone()).unwrap_err();
    assert!(
        matches!(&e, SharedError::VersionExists { published, offered, .. } if *published == digest && *offered == Digest::of(&other)),
        "{e}"
    );
    assert!(e.to_string().contains(&digest.to_string()) && e.to_string().contains(&Digest::of(&other).to_string()));
    // An artifact whose own checks fail never reaches the store.
    let before = w.latest();
    let e = w.publish_bytes(line_artifact("m", "1.1.0", 1.0, 0.0, Some(false))).unwrap_err();
    assert!(matches!(e, SharedError::Refused { .. }), "{e}");
    assert!(e.to_string().contains("checks"), "{e}");
    assert_eq!(w.latest(), before);
    // A routed version cannot be withdrawn; an unrouted one can.
    w.route("1.0.0");
    let v1 = semver::Version::new(1, 0, 0);
    let e = w.rt.block_on(w.store.withdraw("m", &v1)).unwrap_err();
    assert!(matches!(&e, SharedError::VersionRouted { uses, .. } if uses == &["default".to_owned()]), "{e}");
    w.publish("1.2.0", 1.2).unwrap();
    let v12 = semver::Version::new(1, 2, 0);
    w.rt.block_on(w.store.withdraw("m", &v12)).unwrap();
    let listed: Vec<String> =
        w.rt.block_on(w.store.versions()).unwrap().iter().map(|(_, v, _)| v.to_string()).collect();
    assert_eq!(listed, ["1.0.0"]);
    // Withdrawn, its version still names its bytes: other bytes stay refused.
    let e = w.publish_bytes(line_artifact("m", "1.2.0", 9.0, 0.0, Some(true))).unwrap_err();
    assert!(matches!(e, SharedError::VersionExists { .. }), "{e}");
}

#[test]
fn a_tampered_object_and_an_artifact_over_the_size_cap_are_refused_and_the_old_version_serves() {
    let w = world();
    let v1 = line_artifact("m", "1.0.0", 1.0, 0.0, Some(true));
    w.publish_bytes(v1.clone()).unwrap();
    w.route("1.0.0");
    let dir = tempfile::tempdir().unwrap();
    let cap = v1.len() as u64 + 4096;
    let options = RegistryOptions { size_cap: cap, ..RegistryOptions::default() };
    let (reg, _mirror) = host_of(&w.wasm, &w.address, dir.path(), "capped", options);
    assert!(serves(&reg, "1.0.0"));

    // Someone with write access to the buckets swaps an object's bytes: the
    // entry names the digest of `claimed`, the object holds other bytes.
    let claimed = line_artifact("m", "2.0.0", 2.0, 0.0, Some(true));
    let swapped = line_artifact("m", "2.0.0", 5.0, 0.0, Some(true));
    let object = format!("artifact/{}", Digest::of(&claimed).hex());
    w.rt.block_on(async {
        let js = async_nats::jetstream::new(async_nats::connect(w.nats.url()).await.unwrap());
        let files = js.get_object_store("paddock-ev-files").await.unwrap();
        files.put(object.as_str(), &mut swapped.as_slice()).await.unwrap();
        let entries = js.get_key_value("paddock-ev").await.unwrap();
        let record = serde_json::json!({
            "digest": Digest::of(&claimed), "bytes": claimed.len(), "published": "2026-12-05T00:00:00Z", "by": "intruder"
        });
        entries.put("version.m.2.0.0", serde_json::to_vec(&record).unwrap().into()).await.unwrap();
    });
    // And a version over the host's size cap, published properly.
    let big = padded(line_artifact("m", "3.0.0", 3.0, 0.0, Some(true)), 64 << 10);
    w.publish_bytes(big.clone()).unwrap();
    let latest = w.latest();
    if !came_true(LONG, EVERY, || reg.status().mirror.is_some_and(|m| m.revision == latest && m.problems.len() == 2)) {
        panic!("the host has not looked at both (latest {latest}): {:#?}", reg.status().mirror);
    }
    let problems = reg.status().mirror.unwrap().problems;
    let tampered = problems.iter().find(|p| p.key == "version.m.2.0.0").expect("the tampered entry is named");
    assert!(
        tampered.reason.contains(&object) && tampered.reason.contains(&Digest::of(&swapped).to_string()),
        "{tampered:?}"
    );
    let over = problems.iter().find(|p| p.key == "version.m.3.0.0").expect("the over-size entry is named");
    assert!(
        over.reason.contains(&format!("{} bytes, over the size cap of {cap} bytes; not fetched", big.len())),
        "{over:?}"
    );
    // Neither reached the mirror; 1.0.0 serves on.
    assert!(!dir.path().join("mirror/m/2.0.0.wasm").exists() && !dir.path().join("mirror/m/3.0.0.wasm").exists());
    assert!(serves(&reg, "1.0.0"));
    // Routing to the tampered version is refused by the host, which keeps the old routes.
    let text = "[models.m]\ndefault = \"2.0.0\"\n";
    let current = w.rt.block_on(w.store.file(FileEntry::Routes)).unwrap().map(|(r, _)| r);
    w.rt.block_on(w.store.put_file(FileEntry::Routes, text, current)).unwrap();
    let latest = w.latest();
    wait_until("the host has taken the new routes' revision", LONG, EVERY, || {
        reg.status().mirror.is_some_and(|m| m.revision == latest)
            && matches!(reg.status().routes, RoutesState::Refused { .. } | RoutesState::PartlyTaken { .. })
    });
    assert!(serves(&reg, "1.0.0"), "{:?}", ask(&reg));
    // The list of hosts shows it.
    wait_until("the host's presence names what it could not take", LONG, EVERY, || {
        let (_, list) = w.rt.block_on(w.store.hosts()).unwrap();
        list.iter().any(|h| h.presence.host == "capped" && h.flags.iter().any(|f| f.contains("version.m.2.0.0")))
    });
}

#[test]
fn hosts_catch_up_after_the_server_went_away_and_serve_their_mirror_meanwhile() {
    let mut w = world();
    w.publish("1.0.0", 1.0).unwrap();
    w.route("1.0.0");
    let dir = tempfile::tempdir().unwrap();
    let (reg, mirror) = w.host(dir.path(), "steady");
    assert!(serves(&reg, "1.0.0"));

    // The server stops: the host serves what it has and says it is stale.
    w.nats.stop_gracefully();
    wait_until("the host notices", LONG, EVERY, || {
        reg.status().mirror.is_some_and(|m| !m.connected && m.stale_since.is_some())
    });
    assert!(serves(&reg, "1.0.0"));

    // A host started now, with no mirror of its own, waits for the server
    // rather than serve an empty store; one started on the first host's
    // mirror serves it at once, stale.
    drop(mirror);
    drop(reg);
    let (wasm, address) = (w.wasm.clone(), w.address.clone());
    let (reg, mirror) = host_of(&wasm, &address, dir.path(), "from-its-mirror", RegistryOptions::default());
    let m = reg.status().mirror.unwrap();
    assert!(!m.connected && m.stale_since.is_some(), "{m:?}");
    assert!(serves(&reg, "1.0.0"));
    let fresh = tempfile::tempdir().unwrap();
    let path = fresh.path().to_owned();
    let waiting =
        std::thread::spawn(move || host_of(&wasm, &address, &path, "without-a-mirror", RegistryOptions::default()));

    // The server comes back; a version is published and routed.
    w.nats.restart();
    w.store = w.rt.block_on(SharedStore::connect(&w.address, &Credentials::default(), false)).unwrap();
    w.publish("2.0.0", 2.0).unwrap();
    w.route("2.0.0");
    wait_until("the host on its mirror catches up", LONG, EVERY, || serves(&reg, "2.0.0"));
    let (late, _late_mirror) = waiting.join().unwrap();
    // It opened only once the store could be read: never empty.
    assert!(ask(&late).is_ok(), "{:?}", ask(&late));
    assert!(came_true(LONG, EVERY, || serves(&late, "2.0.0")), "{:?}", ask(&late));
    let latest = w.latest();
    wait_until("both report themselves up to date", LONG, EVERY, || {
        [&reg, &late]
            .iter()
            .all(|r| r.status().mirror.is_some_and(|m| m.connected && m.stale_since.is_none() && m.revision == latest))
    });
    drop(mirror);
}

/// A Python guest (about 18 MiB, componentize-py) is published once and
/// served by three hosts, each answering as the same artifact loaded on
/// its own does.
#[test]
fn a_python_guest_is_published_once_and_served_by_every_host() {
    let w = world();
    let artifact = paddock_tests::foreign_artifact("charge-taper-py");
    assert!(artifact.bytes().len() > 16 << 20, "{} bytes", artifact.bytes().len());
    let wasi = paddock_host::ModelOptions { wasi: Some(paddock_host::WasiPolicy::default()), ..Default::default() };
    // One code cache for the publisher and the hosts, as hosts on one
    // machine may share (the one the other tests' Python loads use).
    let cache = paddock_tests::root().join("target/paddock/test-code-cache");
    let options = RegistryOptions { model: wasi.clone(), code_cache_dir: Some(cache), ..RegistryOptions::default() };
    let published = w.rt.block_on(w.store.publish(&w.wasm, artifact.bytes().to_vec(), None, &options, "test")).unwrap();
    assert_eq!(
        (published.passed.model.as_str(), published.passed.version.to_string().as_str()),
        ("charge-taper", "1.0.0")
    );
    let text = "[models.charge-taper]\ndefault = \"1.0.0\"\n";
    w.rt.block_on(w.store.put_file(FileEntry::Routes, text, None)).unwrap();
    let row =
        Row::new().with("charger_kw", 11.0).with("battery_kwh", 64.0).with("soc_start", 0.2).with("soc_target", 0.9);
    let expected = paddock_tests::load_foreign(&w.wasm, "charge-taper-py", wasi)
        .unwrap()
        .score(std::slice::from_ref(&row))
        .unwrap();
    let dirs: Vec<_> = (0..3).map(|_| tempfile::tempdir().unwrap()).collect();
    for (i, d) in dirs.iter().enumerate() {
        let (reg, _mirror) = host_of(&w.wasm, &w.address, d.path(), &format!("py-{i}"), options.clone());
        let context = RequestContext::new();
        let rows = [row.clone()];
        let answer = reg.score(&Request::new("charge-taper", &context, &rows)).unwrap();
        assert_eq!(answer.rows().next().unwrap().unwrap(), expected.values_at(0), "host {i}");
        assert_eq!(std::fs::read(d.path().join("mirror/charge-taper/1.0.0.wasm")).unwrap(), artifact.bytes());
    }
}

/// A host whose own trust policy admits only 1.0.0 (pinned) refuses 2.0.0
/// when it is published and routed: it serves 1.0.0 on, reports the
/// refusal, and the list of hosts shows it; a host without the policy
/// serves 2.0.0. An entry whose object never arrived (an upload that did
/// not finish) is refused naming the object, and taken once it arrives.
#[test]
fn a_host_refusing_a_version_by_its_own_trust_policy_serves_the_previous_one_and_says_so() {
    let w = world();
    let v1 = line_artifact("m", "1.0.0", 1.0, 0.0, Some(true));
    w.publish_bytes(v1.clone()).unwrap();
    w.route("1.0.0");
    let strict_dir = tempfile::tempdir().unwrap();
    let trust = paddock_host::TrustPolicy { trusted: vec![], pinned: vec![Digest::of(&v1)], required: true };
    let (strict, _m1) = host_of(
        &w.wasm,
        &w.address,
        strict_dir.path(),
        "strict",
        RegistryOptions { trust, ..RegistryOptions::default() },
    );
    let open_dir = tempfile::tempdir().unwrap();
    let (open, _m2) = w.host(open_dir.path(), "open");
    w.publish("2.0.0", 2.0).unwrap();
    w.route("2.0.0");
    wait_until("the open host serves 2.0.0", LONG, EVERY, || serves(&open, "2.0.0"));
    let latest = w.latest();
    wait_until("the strict host has looked at 2.0.0", LONG, EVERY, || {
        reg_revision(&strict) == Some(latest) && !matches!(strict.status().routes, RoutesState::Accepted)
    });
    assert!(serves(&strict, "1.0.0"), "{:?}", ask(&strict));
    let refused = strict.status().artifacts.into_iter().find(|a| a.path == Path::new("m/2.0.0.wasm")).unwrap();
    assert!(matches!(refused.state, paddock_serve::registry::ArtifactState::Refused { .. }), "{refused:?}");
    wait_until("the list shows the strict host's refusal", LONG, EVERY, || {
        let (_, list) = w.rt.block_on(w.store.hosts()).unwrap();
        list.iter().any(|h| h.presence.host == "strict" && h.flags.iter().any(|f| f == "refused 1"))
            && list.iter().any(|h| h.presence.host == "open" && h.flags.is_empty())
    });

    // An entry whose object is not there: named, then taken when it comes.
    let v3 = line_artifact("m", "3.0.0", 3.0, 0.0, Some(true));
    let object = format!("artifact/{}", Digest::of(&v3).hex());
    let (entries, files) = w.rt.block_on(async {
        let js = async_nats::jetstream::new(async_nats::connect(w.nats.url()).await.unwrap());
        (js.get_key_value("paddock-ev").await.unwrap(), js.get_object_store("paddock-ev-files").await.unwrap())
    });
    let record = serde_json::json!({
        "digest": Digest::of(&v3), "bytes": v3.len(), "published": "2026-12-05T00:00:00Z", "by": "an interrupted upload"
    });
    w.rt.block_on(entries.put("version.m.3.0.0", serde_json::to_vec(&record).unwrap().into())).unwrap();
    wait_until("the open host names the missing object", LONG, EVERY, || {
        open.status()
            .mirror
            .is_some_and(|m| m.problems.iter().any(|p| p.key == "version.m.3.0.0" && p.reason.contains(&object)))
    });
    w.rt.block_on(files.put(object.as_str(), &mut v3.as_slice())).unwrap();
    wait_until("the open host takes it once it is whole", LONG, EVERY, || {
        open.status().mirror.is_some_and(|m| m.problems.is_empty())
            && open_dir.path().join("mirror/m/3.0.0.wasm").exists()
    });
}

fn reg_revision(reg: &Registry) -> Option<u64> {
    reg.status().mirror.map(|m| m.revision)
}
