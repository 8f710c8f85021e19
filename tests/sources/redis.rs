//! Features looked up in a real Redis (Debian's `redis-server`, started
//! here on a loopback port of its own for each test, and stopped after):
//! the line model `y = 2x + 1` whose `x` is the field `x` of the hash
//! `site:{site}`.

use std::path::Path;
use std::time::Duration;

use paddock_host::{Row, Runtime};
use paddock_serve::features::Outcome;
use paddock_serve::registry::FeaturesState;
use paddock_serve::{Registry, RegistryOptions, Request, RequestContext};
use paddock_tests::{RedisServer as Server, unhurried, write_atomically};

use super::{ask, assert_resumes};

/// A store serving `m` with `x` from Redis, `missing` its fallback.
fn store(server: &Server, missing: &str, budget_ms: u64) -> (tempfile::TempDir, Registry) {
    store_with(server, missing, budget_ms, None)
}

/// As [`store`], the line packed with `profile` when one is given.
fn store_with(
    server: &Server,
    missing: &str,
    budget_ms: u64,
    profile: Option<&paddock_host::Profile>,
) -> (tempfile::TempDir, Registry) {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    paddock_tests::line_store(store);
    if let Some(profile) = profile {
        let line = paddock_tests::line_artifact("m", "1.0.0", 2.0, 1.0, Some(true));
        write_atomically(&store.join("m/1.0.0.wasm"), &paddock_tests::profiled(&line, profile));
    }
    plan(store, server, missing, budget_ms);
    // Minute-long deadlines: a busy machine must not make a lookup late.
    let options = RegistryOptions { usage_flush: None, model: unhurried(), ..RegistryOptions::default() };
    let registry = Registry::open(&Runtime::new().unwrap(), store, options).unwrap();
    assert!(matches!(registry.status().features, FeaturesState::Accepted { .. }), "{:?}", registry.status().features);
    (dir, registry)
}

fn plan(store: &Path, server: &Server, missing: &str, budget_ms: u64) {
    let text = format!(
        "[sources.live]\nredis = \"{}\"\nbudget_ms = {budget_ms}\nupdated = \"updated_at\"\n[models.m]\nkeys = [\"site\"]\n\
         [models.m.features]\nx = {{ source = \"live\", key = \"site:{{site}}\", field = \"x\", max_age = \"1h\", missing = {missing} }}\n",
        server.url()
    );
    write_atomically(&store.join("features.toml"), text.as_bytes());
}

#[test]
fn sixty_four_rows_are_one_round_trip() {
    let server = Server::start();
    for i in 0..64 {
        server.cmd(&["HSET", &format!("site:s{i}"), "x", &i.to_string()]);
    }
    let (_dir, reg) = store(&server, "\"fail\"", 2000);
    // Connected first, so that what follows counts the request alone.
    assert_eq!(ask(&reg, "s1"), (3.0, Outcome::Found));
    server.cmd(&["CONFIG", "RESETSTAT"]);
    // What reading the figures costs the server: one read of one command
    // (measured, not assumed).
    let (r0, r1) = (server.stat("total_reads_processed"), server.stat("total_reads_processed"));
    let rows: Vec<Row> = (0..64).map(|i| Row::new().with("site", format!("s{i}").as_str())).collect();
    let a = reg.score(&Request::new("m", &RequestContext::new(), &rows)).unwrap();
    let r2 = server.stat("total_reads_processed");
    for i in 0..64 {
        assert_eq!(a.estimates.values_at(i)[0], 2.0 * i as f64 + 1.0, "row {}", i + 1);
    }
    // On the server (Redis's own counters): 64 HMGETs, read off the socket
    // in one read: one round trip.
    let redis::Value::BulkString(info) = server.cmd(&["INFO", "commandstats"]) else { panic!() };
    let info = String::from_utf8(info).unwrap();
    assert!(info.contains("cmdstat_hmget:calls=64,"), "{info}");
    assert_eq!((r2 - r1) - (r1 - r0), 1, "reads: {r0}, {r1}, {r2}");
    // And in the host's counters: two round trips in all, 65 features found.
    let usage = reg.source_usage();
    assert_eq!((usage[0].source.as_str(), usage[0].round_trips, usage[0].lookups["found"]), ("live", 2, 65));
}

#[test]
fn present_missing_and_stale_keys_follow_each_policy() {
    let server = Server::start();
    let now = jiff::Timestamp::now().as_second();
    server.cmd(&["HSET", "site:fresh", "x", "3", "updated_at", &now.to_string()]);
    server.cmd(&["HSET", "site:old", "x", "5", "updated_at", &(now - 7200).to_string()]);
    let rows: Vec<Row> = ["fresh", "old", "nowhere"].iter().map(|s| Row::new().with("site", *s)).collect();
    // Default: the old (2 h > 1 h) and the missing row take x = 0.5, y = 2.
    let (_dir, reg) = store(&server, "{ default = 0.5 }", 2000);
    let a = reg.score(&Request::new("m", &RequestContext::new(), &rows).every_lookup()).unwrap();
    let ys: Vec<f64> = a.rows().map(|r| r.unwrap()[0]).collect();
    assert_eq!(ys, [7.0, 2.0, 2.0]);
    let outcomes: Vec<Outcome> = a.lookups.iter().map(|l| l[0].outcome).collect();
    assert_eq!(outcomes, [Outcome::Found, Outcome::Stale, Outcome::Missing]);
    assert!(a.lookups[1][0].age.is_some_and(|age| age >= 7200.0), "{:?}", a.lookups[1][0]);
    // Fail: those rows get no estimate, each naming what failed.
    let (_dir2, reg) = store(&server, "\"fail\"", 2000);
    let a = reg.score(&Request::new("m", &RequestContext::new(), &rows)).unwrap();
    assert_eq!(a.scored, [1]);
    let problems: Vec<String> = a.problems.iter().map(ToString::to_string).collect();
    assert_eq!(
        problems,
        [
            "row 2, feature `x` = absent: lookup failed: feature `x`: too old in source `live` under key `site:old`",
            "row 3, feature `x` = absent: lookup failed: feature `x`: nothing in source `live` under key `site:nowhere`",
        ]
    );
}

/// Redis stopped mid-run: requests answer by the fallback (none hangs on
/// the dead socket), and reads resume by themselves once it is back. The
/// drift report counts the defaults as the source's being down, not as the
/// world moving: the model's profile of `x` has it between 1 and 5 most
/// of the time; the default 0.5 lands below.
#[test]
fn a_stopped_redis_falls_back_and_is_read_again_when_it_returns() {
    use paddock_host::{Bins, FallbackCounts, FieldProfile, Profile};
    let mut server = Server::start();
    server.cmd(&["HSET", "site:a", "x", "3"]);
    let field = FieldProfile { bins: Bins::Edges(vec![1.0, 5.0]), shares: vec![0.1, 0.8, 0.1, 0.0], summary: None };
    let profile = Profile {
        source: "by hand".into(),
        rows: 10,
        features: [("x".to_owned(), field)].into(),
        outputs: Default::default(),
    };
    let (_dir, reg) = store_with(&server, "{ default = 0.5 }", 1000, Some(&profile));
    assert_eq!(ask(&reg, "a"), (7.0, Outcome::Found));
    server.stop();
    for _ in 0..20 {
        assert_eq!(ask(&reg, "a"), (2.0, Outcome::Unavailable), "down: the default");
    }
    let drift = reg.status().artifacts[0].drift.clone().expect("a profile");
    assert_eq!(drift.fields[0].fallbacks, FallbackCounts { missing: 0, stale: 0, unavailable: 20 }, "{drift:?}");
    let named = "features plan fallbacks: 95.2 % of live values (unavailable 95.2 %)";
    assert!(drift.fields[0].notes.iter().any(|n| n.starts_with(named)), "{:?}", drift.fields[0].notes);
    server.restart();
    server.cmd(&["HSET", "site:a", "x", "4"]);
    assert_resumes(&reg);
}

/// A Redis busy past the source's budget (`DEBUG SLEEP`): the request
/// gives up on it at the budget and the row takes its fallback.
#[test]
fn a_slow_redis_hits_the_budget() {
    let server = Server::start();
    server.cmd(&["HSET", "site:a", "x", "3"]);
    let (_dir, reg) = store(&server, "{ default = 0.5 }", 1000);
    assert_eq!(ask(&reg, "a"), (7.0, Outcome::Found));
    // The server blocks for 6 s on one connection; the test waits until it
    // is blocked (another client's PING gets no answer in a second), not
    // for a time.
    // The probe connects first: connecting while the server sleeps would
    // wait out the sleep, and every PING after it would answer.
    let mut probe = server.connection().unwrap();
    probe.set_read_timeout(Some(Duration::from_secs(1))).unwrap();
    let url = server.url();
    let sleeper = std::thread::spawn(move || {
        let mut c = redis::Client::open(url).unwrap().get_connection().unwrap();
        redis::cmd("DEBUG").arg("SLEEP").arg("6").query::<()>(&mut c).unwrap();
    });
    while !sleeper.is_finished() && redis::cmd("PING").query::<String>(&mut probe).is_ok() {}
    assert!(!sleeper.is_finished(), "the server never blocked");
    let timeouts = reg.source_usage()[0].timeouts;
    assert_eq!(ask(&reg, "a"), (2.0, Outcome::Unavailable));
    assert_eq!(reg.source_usage()[0].timeouts, timeouts + 1, "{:?}", reg.source_usage());
    sleeper.join().unwrap();
}

/// A budget longer than the version's deadline (50 ms by default) cannot
/// be inside the request's time: the plan is refused naming both.
#[test]
fn a_budget_past_the_deadline_is_refused() {
    let server = Server::unstarted();
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    paddock_tests::line_store(store);
    plan(store, &server, "\"fail\"", 80);
    let registry = Registry::open(
        &Runtime::new().unwrap(),
        store,
        RegistryOptions { usage_flush: None, ..RegistryOptions::default() },
    )
    .unwrap();
    let FeaturesState::Refused { problems } = registry.status().features else {
        panic!("{:?}", registry.status().features)
    };
    assert_eq!(
        problems,
        [
            "m 1.0.0: feature `x`: source `live` has a budget of 80 ms, longer than the version's deadline of 50 ms: a lookup must fit inside the call's time"
        ]
    );
}

/// Sources on one server share its connections: one for the reads of
/// plain threads, one per async runtime that reads (counted by Redis's own
/// `total_connections_received`, each count taken on a connection of its
/// own). A runtime that stops leaves its connection behind; the next
/// runtime reads on one of its own.
#[test]
fn sources_on_one_server_share_a_connection_per_runtime() {
    use paddock_serve::features::{Got, RedisSource, ServerRead, SourceCounts};
    let server = Server::start();
    server.cmd(&["HSET", "site:a", "x", "3"]);
    server.cmd(&["HSET", "member:m", "rate", "0.25"]);
    let budget = Duration::from_secs(60);
    let sites = RedisSource::new(&server.url(), budget, std::sync::Arc::new(SourceCounts::default())).unwrap();
    let members = RedisSource::new(&server.url(), budget, std::sync::Arc::new(SourceCounts::default())).unwrap();
    let site = [("site:a".to_owned(), vec!["x".to_owned()])];
    let member = [("member:m".to_owned(), vec!["rate".to_owned()])];
    let read = |s: &RedisSource, asks: &[(String, Vec<String>)]| s.fetch(asks).unwrap();
    let opened = || server.stat("total_connections_received");
    let c0 = opened();
    for _ in 0..3 {
        assert_eq!(read(&sites, &site), vec![vec![Some(Got::Text("3".into()))]]);
        assert_eq!(read(&members, &member), vec![vec![Some(Got::Text("0.25".into()))]]);
    }
    let c1 = opened();
    assert_eq!(c1 - c0, 2, "one connection for both sources' blocking reads (and the count's own)");
    let on_runtime = |c: &mut dyn FnMut() -> u64| {
        let runtime = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap();
        runtime.block_on(async {
            for _ in 0..3 {
                let (a, b) = (sites.send_async(&site), members.send_async(&member));
                assert_eq!(a.wait().await.unwrap(), vec![vec![Some(Got::Text("3".into()))]]);
                assert_eq!(b.wait().await.unwrap(), vec![vec![Some(Got::Text("0.25".into()))]]);
            }
        });
        c()
    };
    let c2 = on_runtime(&mut || opened());
    assert_eq!(c2 - c1, 2, "one more connection for the runtime's reads");
    let c3 = on_runtime(&mut || opened());
    assert_eq!(c3 - c2, 2, "a new runtime reads on a connection of its own");
    assert_eq!(read(&sites, &site), vec![vec![Some(Got::Text("3".into()))]], "blocking reads carry on");
}
