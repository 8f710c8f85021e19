//! What looking features up adds to a request, through the registry.
//!
//! One model, `m`: a linear model over 8 features, of which a request
//! carries 2 and the features plan looks up 6 by the request's `site` key
//! (10 000 sites). Four stores serve it, measured in the same run, in
//! interleaved rounds:
//! - `assembled`: no features file; the request carries all 8 features
//!   (the baseline: scoring the assembled row);
//! - `table`: the 6 from an embedded CSV table;
//! - `redis`: the 6 from Redis hashes on a `redis-server` this bench starts
//!   on loopback (one `HMGET` pipeline per request);
//! - `postgres`: the 6 from a PostgreSQL table on a server this bench
//!   starts on loopback (one prepared query per request, keys as an array).
//!
//! At 1 row per request (the context names the site) and 64 rows (each
//! row names its own). Each request is timed alone; the figures are the
//! p50 and p99 per request, and what each source adds over `assembled` at
//! the same percentile. Writes target/paddock/bench-features.md and prints
//! it. Needs `cargo xtask build` (the linear guest), `redis-server` and
//! PostgreSQL's programs.

use std::fmt::Write as _;
use std::hint::black_box;
use std::path::Path;
use std::time::Instant;

use paddock_guest::{LinearParams, Link, Packaged, encode_params};
use paddock_host::{Row, Runtime};
use paddock_serve::registry::artifact_path;
use paddock_serve::{Registry, RegistryOptions, Request, RequestContext};
use paddock_tests::{PostgresServer, RedisServer, guest, open_contract, root, write_atomically};
use semver::Version;

const SITES: usize = 10_000;
const LOOKED_UP: [&str; 6] = ["f2", "f3", "f4", "f5", "f6", "f7"];

/// The value of feature `f` at site `s` (any numbers will do: the table and
/// Redis hold the same, and the assembled rows carry them).
fn value(s: usize, f: usize) -> f64 {
    ((s * 7 + f * 13) % 101) as f64 / 10.0
}

fn store(dir: &Path, plan: Option<String>) {
    let features: Vec<String> = (0..8).map(|i| format!("f{i}")).collect();
    let contract = open_contract("m", &features, "y");
    let params = LinearParams {
        link: Link::Identity,
        intercepts: vec![1.0],
        weights: vec![(0..8).map(|i| 0.5 + f64::from(i)).collect()],
        impute: vec![],
    };
    let blob = encode_params(&Packaged { contract, params });
    let artifact = paddock_host::pack(&guest("paddock-model-linear"), Some(&blob), None).expect("packs");
    write_atomically(&artifact_path(dir, "m", &Version::new(1, 0, 0)), &artifact);
    write_atomically(&dir.join("routes.toml"), b"[models.m]\ndefault = \"1.0.0\"\n");
    if let Some(plan) = plan {
        write_atomically(&dir.join("features.toml"), plan.as_bytes());
    }
}

fn plan(source: &str, key: &str) -> String {
    let mut p =
        format!("{source}\n[models.m]\nkeys = [\"site\"]\n[models.m.features]\nf0 = \"request\"\nf1 = \"request\"\n");
    for f in LOOKED_UP {
        let _ = writeln!(
            p,
            "{f} = {{ source = \"sites\", key = \"{key}\", field = \"{f}\", max_age = \"7d\", missing = \"fail\" }}"
        );
    }
    p
}

fn open(dir: &Path) -> Registry {
    let registry = Registry::open(
        &Runtime::new().unwrap(),
        dir,
        // Minute-long deadlines and budgets: a read is timed, never cut
        // short, however busy the machine (in `cargo test` mode beside others).
        RegistryOptions { usage_flush: None, model: paddock_tests::unhurried(), ..RegistryOptions::default() },
    )
    .unwrap();
    assert!(
        registry.status().artifacts.iter().all(|a| matches!(a.state, paddock_serve::registry::ArtifactState::Loaded))
    );
    registry
}

/// p50 and p99 of `times` (ns).
fn percentiles(times: &mut [u64]) -> (f64, f64) {
    times.sort_unstable();
    let at = |q: f64| times[((times.len() - 1) as f64 * q).round() as usize] as f64;
    (at(0.5), at(0.99))
}

fn main() {
    // `cargo bench` passes `--bench`; under `cargo test` one short round
    // checks that every case runs and agrees.
    let full = std::env::args().any(|a| a == "--bench");
    let (rounds, singles_per_round, batches_per_round) = if full { (20, 2_000, 100) } else { (1, 20, 2) };
    let now = jiff::Timestamp::now().as_second();
    let names = ["assembled", "table", "redis", "postgres"];
    let dirs: Vec<tempfile::TempDir> = names.iter().map(|_| tempfile::tempdir().unwrap()).collect();
    // The table, and the same values in Redis.
    let mut csv = String::from("site,f2,f3,f4,f5,f6,f7,updated_at\n");
    for s in 0..SITES {
        let _ = writeln!(
            csv,
            "s{s},{},{},{},{},{},{},{now}",
            value(s, 2),
            value(s, 3),
            value(s, 4),
            value(s, 5),
            value(s, 6),
            value(s, 7)
        );
    }
    write_atomically(&dirs[1].path().join("sites.csv"), csv.as_bytes());
    let server = RedisServer::start();
    {
        let mut c = server.connection().unwrap();
        let mut pipe = redis::pipe();
        for s in 0..SITES {
            let mut cmd = redis::cmd("HSET");
            cmd.arg(format!("site:s{s}"));
            for (i, f) in LOOKED_UP.iter().enumerate() {
                cmd.arg(*f).arg(value(s, i + 2));
            }
            cmd.arg("updated_at").arg(now);
            pipe.add_command(cmd).ignore();
        }
        pipe.query::<()>(&mut c).unwrap();
    }
    let postgres = PostgresServer::start();
    postgres.execute(&format!(
        "CREATE TABLE sites (site text PRIMARY KEY, f2 float8, f3 float8, f4 float8, f5 float8, f6 float8, f7 float8, updated_at timestamptz);
         INSERT INTO sites SELECT 's' || s, {}, to_timestamp({now}) FROM generate_series(0, {}) s;",
        (2..8).map(|f| format!("((s * 7 + {f} * 13) % 101)::float8 / 10")).collect::<Vec<_>>().join(", "),
        SITES - 1
    ));
    store(dirs[0].path(), None);
    store(
        dirs[1].path(),
        Some(plan("[sources.sites]\ntable = \"sites.csv\"\nkey = \"site\"\nupdated = \"updated_at\"", "{site}")),
    );
    store(
        dirs[2].path(),
        Some(plan(
            &format!("[sources.sites]\nredis = \"{}\"\nbudget_ms = 30000\nupdated = \"updated_at\"", server.url()),
            "site:{site}",
        )),
    );
    store(
        dirs[3].path(),
        Some(plan(
            &format!(
                "[sources.sites]\npostgres = \"{}\"\nquery = \"SELECT * FROM sites WHERE site = ANY($1)\"\nkey = \"site\"\nbudget_ms = 30000\nupdated = \"updated_at\"",
                postgres.url()
            ),
            "{site}",
        )),
    );
    let registries: Vec<Registry> = dirs.iter().map(|d| open(d.path())).collect();
    let stores = names.len();

    // Requests: per store, 1 row and 64 rows, cycling over the sites.
    let assembled = |s: usize| {
        let mut r = Row::new().with("f0", 1.5).with("f1", 2.5);
        for (i, f) in LOOKED_UP.iter().enumerate() {
            r = r.with(f, value(s, i + 2));
        }
        r
    };
    let keyed = |s: usize| Row::new().with("f0", 1.5).with("f1", 2.5).with("site", format!("s{s}").as_str());
    let contexts: Vec<RequestContext> = (0..SITES).map(|s| [("site".to_owned(), format!("s{s}"))].into()).collect();
    let one_row =
        |store: usize, s: usize| if store == 0 { assembled(s) } else { Row::new().with("f0", 1.5).with("f1", 2.5) };
    let singles: Vec<Vec<Vec<Row>>> =
        (0..stores).map(|store| (0..SITES).map(|s| vec![one_row(store, s)]).collect()).collect();
    let batches: Vec<Vec<Vec<Row>>> = (0..stores)
        .map(|store| {
            (0..SITES / 64)
                .map(|b| (0..64).map(|i| if store == 0 { assembled(b * 64 + i) } else { keyed(b * 64 + i) }).collect())
                .collect()
        })
        .collect();

    // Every store answers the same.
    for s in [0, 17, SITES - 1] {
        let ys: Vec<f64> = (0..stores)
            .map(|k| {
                registries[k].score(&Request::new("m", &contexts[s], &singles[k][s])).unwrap().estimates.values_at(0)[0]
            })
            .collect();
        assert!(ys.iter().all(|y| *y == ys[0]), "site {s}: {ys:?}");
    }

    let emptiness = RequestContext::new();
    let (mut single_times, mut batch_times): (Vec<Vec<u64>>, Vec<Vec<u64>>) =
        (vec![Vec::new(); stores], vec![Vec::new(); stores]);
    for round in 0..rounds {
        for k in 0..stores {
            for i in 0..singles_per_round {
                let s = (round * singles_per_round + i) % SITES;
                let t = Instant::now();
                black_box(registries[k].score(&Request::new("m", &contexts[s], &singles[k][s])).unwrap());
                single_times[k].push(t.elapsed().as_nanos() as u64);
            }
            for i in 0..batches_per_round {
                let b = (round * batches_per_round + i) % batches[k].len();
                let t = Instant::now();
                let a = black_box(registries[k].score(&Request::new("m", &emptiness, &batches[k][b])).unwrap());
                batch_times[k].push(t.elapsed().as_nanos() as u64);
                assert_eq!(a.scored.len(), 64);
            }
        }
    }
    let mut trips = 0;
    for server in [2, 3] {
        let usage = registries[server].source_usage();
        trips = usage.iter().map(|u| u.round_trips).sum::<u64>();
        let fallbacks: u64 =
            usage.iter().flat_map(|u| u.lookups.iter()).filter(|(o, _)| *o != "found").map(|(_, n)| n).sum();
        assert_eq!(fallbacks, 0, "every {} lookup found its value: {usage:?}", names[server]);
        assert_eq!(trips as usize, rounds * (singles_per_round + batches_per_round) + 3, "one round trip per request");
    }

    let mut out = String::new();
    let _ = writeln!(out, "| source | rows per request | p50 per request | p99 per request | p50 added | p99 added |");
    let _ = writeln!(out, "|---|---|---|---|---|---|");
    for (label, times) in [("1", &mut single_times), ("64", &mut batch_times)] {
        let p: Vec<(f64, f64)> = times.iter_mut().map(|t| percentiles(t)).collect();
        for k in 0..stores {
            let added = if k == 0 {
                ("—".to_owned(), "—".to_owned())
            } else {
                (show(p[k].0 - p[0].0), show(p[k].1 - p[0].1))
            };
            let _ = writeln!(
                out,
                "| {} | {label} | {} | {} | {} | {} |",
                names[k],
                show(p[k].0),
                show(p[k].1),
                added.0,
                added.1
            );
        }
    }
    if !full {
        return;
    }
    let _ = writeln!(
        out,
        "\n{} single-row and {} 64-row requests per source; round trips to Redis, and to PostgreSQL: {trips} each for {} requests (one per request).",
        rounds * singles_per_round,
        rounds * batches_per_round,
        rounds * (singles_per_round + batches_per_round) + 3
    );
    let path = root().join("target/paddock/bench-features.md");
    std::fs::write(&path, &out).unwrap();
    print!("{out}");
}

fn show(ns: f64) -> String {
    if ns.abs() >= 1_000_000.0 {
        format!("{:.2} ms", ns / 1e6)
    } else if ns.abs() >= 1_000.0 {
        format!("{:.2} µs", ns / 1e3)
    } else {
        format!("{ns:.0} ns")
    }
}
