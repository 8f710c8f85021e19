//! Features looked up before scoring, through the registry: a store with a
//! features file and an embedded table, the line model `y = 2x + 1` whose
//! `x` is read from the table by the request's `site` key.
//!
//! Every expected value is the line at a table's `x`, worked out here.

use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};

use paddock_host::{Row, Runtime};
use paddock_serve::features::Outcome;
use paddock_serve::registry::FeaturesState;
use paddock_serve::{Registry, RegistryOptions, Request, RequestContext};
use paddock_tests::write_atomically;

const PLAN: &str = r#"
[sources.sites]
table = "tables/sites.csv"
key = "site"

[models.m]
keys = ["site"]

[models.m.features]
x = { source = "sites", key = "{site}", field = "x", missing = "fail" }
"#;

/// A store serving `m` 1.0.0 (`y = 2x + 1`) with the plan and a table
/// giving site `s{i}` the value `x = i·scale`, for 64 sites.
fn store(scale: f64) -> (tempfile::TempDir, Registry) {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    paddock_tests::line_store(store);
    write_table(store, scale);
    write_atomically(&store.join("features.toml"), PLAN.as_bytes());
    let options = RegistryOptions { usage_flush: None, ..RegistryOptions::default() };
    let registry = Registry::open(&Runtime::new().unwrap(), store, options).unwrap();
    (dir, registry)
}

fn write_table(store: &Path, scale: f64) {
    let mut csv = String::from("site,x\n");
    for i in 0..64 {
        csv.push_str(&format!("s{i},{}\n", f64::from(i) * scale));
    }
    write_atomically(&store.join("tables/sites.csv"), csv.as_bytes());
}

fn site(s: &str) -> RequestContext {
    [("site".to_owned(), s.to_owned())].into()
}

#[test]
fn a_request_scores_from_its_keys_alone() {
    let (_dir, reg) = store(1.0);
    assert!(
        matches!(&reg.status().features, FeaturesState::Accepted { tables, .. } if tables[0].rows == 64),
        "{:?}",
        reg.status().features
    );
    let rows = [Row::new()];
    let a = reg.score(&Request::new("m", &site("s3"), &rows)).unwrap();
    assert_eq!(a.estimates.values_at(0), [7.0], "x = 3 from the table: 2·3 + 1");
    assert!(a.lookups[0].is_empty(), "nothing fell back: the compact answer names nothing");
    let a = reg.score(&Request::new("m", &site("s3"), &rows).every_lookup()).unwrap();
    let f = &a.lookups[0][0];
    assert_eq!(
        (f.feature.as_str(), f.source.as_str(), f.key.as_str(), f.outcome),
        ("x", "sites", "s3", Outcome::Found)
    );
    // A row carrying x itself wins over the table.
    let a = reg.score(&Request::new("m", &site("s3"), &[Row::new().with("x", 10.0)]).every_lookup()).unwrap();
    assert_eq!((a.estimates.values_at(0)[0], a.lookups[0][0].outcome), (21.0, Outcome::FromRequest));
}

#[test]
fn each_row_may_carry_its_own_key_and_a_failed_lookup_names_its_row() {
    let (_dir, reg) = store(1.0);
    // 64 rows, one per site, keyed in the row; the fifth names no site the table has.
    let mut rows: Vec<Row> = (0..64).map(|i| Row::new().with("site", format!("s{i}").as_str())).collect();
    rows[4] = Row::new().with("site", "nowhere");
    let a = reg.score(&Request::new("m", &RequestContext::new(), &rows)).unwrap();
    assert_eq!(a.scored.len(), 63);
    for (k, &n) in a.scored.iter().enumerate() {
        assert_eq!(a.estimates.values_at(k)[0], 2.0 * (n - 1) as f64 + 1.0, "row {n}");
    }
    assert_eq!(a.problems.len(), 1);
    assert_eq!(
        a.problems[0].to_string(),
        "row 5, feature `x` = absent: lookup failed: feature `x`: nothing in source `sites` under key `nowhere`"
    );
    // No key at all: every row fails, naming the key.
    let err = reg.score(&Request::new("m", &RequestContext::new(), &[Row::new()])).unwrap_err().to_string();
    assert!(
        err.contains(
            "row 1, feature `site` = absent: lookup failed: the request has no key `site` (the model's keys: site)"
        ),
        "{err}"
    );
}

/// Contributions from the registry explain the rows as scored: the
/// looked-up x of each site times the slope (y = 2x + 1, worked by hand),
/// the intercept as baseline; rows that broke the contract have none.
#[test]
fn contributions_explain_the_rows_as_completed_by_the_plan() {
    let (_dir, reg) = store(1.0);
    let rows: Vec<Row> = ["s3", "nowhere", "s10"].iter().map(|s| Row::new().with("site", *s)).collect();
    let a = reg.score(&Request::new("m", &RequestContext::new(), &rows).with_contributions()).unwrap();
    assert_eq!(a.scored, vec![1, 3]);
    let c = a.contributions.as_ref().expect("asked for");
    assert_eq!(c.row_count(), 2);
    for (k, x) in [3.0, 10.0].into_iter().enumerate() {
        let why = c.of(k, 0);
        assert_eq!((why.features, why.baseline, why.margin), (&[2.0 * x][..], 1.0, 2.0 * x + 1.0));
        assert_eq!(a.estimates.values_at(k)[0], why.margin);
    }
    // Not asked: none computed.
    assert!(reg.score(&Request::new("m", &RequestContext::new(), &rows)).unwrap().contributions.is_none());
}

/// Rows that share a key take what the row before them read under it; a
/// row under another key reads its own, and a key that finds nothing fails
/// each of its rows, whatever the rows around it.
#[test]
fn rows_sharing_keys_each_get_their_own_keys_value() {
    let (_dir, reg) = store(1.0);
    let sites = ["s1", "s1", "s2", "s2", "s1", "nowhere", "nowhere", "s3", "s3"];
    let rows: Vec<Row> = sites.iter().map(|s| Row::new().with("site", *s)).collect();
    let a = reg.score(&Request::new("m", &RequestContext::new(), &rows)).unwrap();
    assert_eq!(a.scored, vec![1, 2, 3, 4, 5, 8, 9]);
    for (k, &n) in a.scored.iter().enumerate() {
        let i: f64 = sites[n - 1][1..].parse().unwrap();
        assert_eq!(a.estimates.values_at(k)[0], 2.0 * i + 1.0, "row {n}");
    }
    let problems: Vec<String> = a.problems.iter().map(ToString::to_string).collect();
    assert_eq!(problems.len(), 2, "{problems:?}");
    assert!(problems[0].starts_with("row 6,") && problems[1].starts_with("row 7,"), "{problems:?}");
}

/// Requests scoring 64 rows (one per site) run while the table is replaced
/// again and again: each answer is wholly the old table's (x = i) or the
/// new one's (x = 2i), never a mix.
#[test]
fn a_table_replaced_while_requests_run_is_seen_whole() {
    let (dir, reg) = store(1.0);
    let rows: Arc<Vec<Row>> = Arc::new((0..64).map(|i| Row::new().with("site", format!("s{i}").as_str())).collect());
    let done = Arc::new(AtomicBool::new(false));
    let seen = std::thread::scope(|s| {
        let scorer = s.spawn(|| {
            let (mut old, mut new) = (0, 0);
            while !done.load(Ordering::SeqCst) || old + new < 50 {
                let a = reg.score(&Request::new("m", &RequestContext::new(), &rows)).unwrap();
                let scale = (a.estimates.values_at(1)[0] - 1.0) / 2.0;
                for i in 0..64 {
                    assert_eq!(
                        a.estimates.values_at(i)[0],
                        2.0 * i as f64 * scale + 1.0,
                        "row {} of a table with x = {scale}·i",
                        i + 1
                    );
                }
                if scale == 1.0 { old += 1 } else { new += 1 }
            }
            (old, new)
        });
        for k in 0..20 {
            write_table(dir.path(), if k % 2 == 0 { 2.0 } else { 1.0 });
            reg.reload().unwrap();
        }
        done.store(true, Ordering::SeqCst);
        scorer.join().unwrap()
    });
    assert!(seen.0 + seen.1 >= 50, "{seen:?}");
}

#[test]
fn a_bad_table_or_plan_is_refused_whole_and_the_previous_keeps_serving() {
    let (dir, reg) = store(1.0);
    let store = dir.path();
    let ask =
        |reg: &Registry| reg.score(&Request::new("m", &site("s3"), &[Row::new()])).unwrap().estimates.values_at(0)[0];
    // A table with a repeated key.
    write_atomically(&store.join("tables/sites.csv"), b"site,x\ns3,100\ns3,200\n");
    let report = reg.reload().unwrap();
    assert_eq!(report.features_refused, ["tables/sites.csv: rows 1 and 2 share the key `s3`"]);
    assert_eq!(ask(&reg), 7.0, "the previous table keeps serving");
    // A plan naming a column the table lacks, and a feature the contract lacks.
    write_table(store, 1.0);
    let plan = PLAN.replace("field = \"x\"", "field = \"speed\"")
        + "wind = { source = \"sites\", key = \"{site}\", field = \"x\" }\n";
    write_atomically(&store.join("features.toml"), plan.as_bytes());
    reg.reload().unwrap();
    let FeaturesState::Refused { problems } = reg.status().features else { panic!("{:?}", reg.status().features) };
    assert_eq!(
        problems,
        [
            "m 1.0.0: the plan sources `wind`, which its contract does not have",
            "m 1.0.0: feature `x`: source `sites` has no column `speed` (it has site, x)",
        ]
    );
    assert_eq!(ask(&reg), 7.0);
    // A private name that is neither a key nor a feature (a misspelt key
    // would leave the key in captured traffic as it is), and a word that
    // is neither "drop" nor "hash".
    let plan = format!("{PLAN}\n[models.m.private]\nsiet = \"hash\"\nx = \"blur\"\n");
    write_atomically(&store.join("features.toml"), plan.as_bytes());
    reg.reload().unwrap();
    let FeaturesState::Refused { problems } = reg.status().features else { panic!("{:?}", reg.status().features) };
    assert_eq!(problems, ["features.toml: models.m.private.x: say \"drop\" or \"hash\", not `blur`"]);
    let plan = format!("{PLAN}\n[models.m.private]\nsiet = \"hash\"\n");
    write_atomically(&store.join("features.toml"), plan.as_bytes());
    reg.reload().unwrap();
    let FeaturesState::Refused { problems } = reg.status().features else { panic!("{:?}", reg.status().features) };
    assert_eq!(
        problems,
        ["m 1.0.0: `private` names `siet`, which is neither a key of the model (site) nor a feature of its contract"]
    );
    // Mended: served again, and a file that does not parse names its place.
    write_atomically(&store.join("features.toml"), b"[models.m\n");
    reg.reload().unwrap();
    let FeaturesState::Refused { problems } = reg.status().features else { panic!() };
    assert!(problems[0].starts_with("features.toml: TOML parse error at line 1"), "{problems:?}");
    write_atomically(&store.join("features.toml"), PLAN.as_bytes());
    reg.reload().unwrap();
    assert!(matches!(reg.status().features, FeaturesState::Accepted { .. }));
}

/// The NDJSON stream carries keys as the library does: in the context or
/// in each row, with `"lookups": "all"` naming what was read.
#[test]
fn the_stream_scores_from_keys() {
    let (_dir, reg) = store(1.0);
    let input = [
        r#"{"id": 1, "model": "m", "context": {"site": "s3"}, "row": {}}"#,
        r#"{"id": 2, "model": "m", "rows": [{"site": "s1"}, {"site": "nowhere"}], "lookups": "all"}"#,
    ]
    .join("\n");
    let mut out = Vec::new();
    paddock_serve::surface::stream::run(
        &reg,
        input.as_bytes(),
        &mut out,
        paddock_serve::surface::stream::StreamOptions::default(),
    )
    .unwrap();
    let lines: Vec<serde_json::Value> =
        String::from_utf8(out).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(lines[0]["answer"]["estimates"][0]["y"], 7.0, "{}", lines[0]);
    let second = &lines[1]["answer"];
    assert_eq!(second["estimates"][0]["y"], 3.0, "{}", lines[1]);
    assert_eq!(second["lookups"][0][0]["outcome"], "found", "{}", lines[1]);
    assert_eq!(second["lookups"][0][0]["key"], "s1", "{}", lines[1]);
    let problem = second["problems"][0].to_string();
    assert!(problem.contains("nothing in source `sites` under key `nowhere`"), "{}", lines[1]);
}

/// The reference cells (tests/cells/export.py, from the H3 library's own
/// Python binding, PyPI `h3` 4.5.0; `cargo xtask test` writes them).
fn reference_cells() -> serde_json::Value {
    let path = paddock_tests::root().join("target/paddock/cells/cells.json");
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| {
        panic!("{}: {e}: `python3 tests/cells/export.py target/paddock/cells` writes it (needs h3)", path.display())
    });
    serde_json::from_str(&text).unwrap()
}

/// A plan whose feature `fR` is keyed by the cell at resolution R of the
/// request's `lat` and `lon`, for every resolution.
fn cell_plan() -> paddock_serve::features::Plan {
    let mut text = String::from(
        "[sources.cells]\ntable = \"cells.csv\"\nkey = \"cell\"\n[models.m]\nkeys = [\"lat\", \"lon\"]\n[models.m.features]\n",
    );
    for r in 0..16 {
        text.push_str(&format!("f{r} = {{ source = \"cells\", key = \"{{h3(lat, lon, {r})}}\", field = \"x\" }}\n"));
    }
    paddock_serve::features::Plan::parse(&text, "features.toml", Path::new(".")).unwrap()
}

fn position(lat: f64, lon: f64) -> std::collections::BTreeMap<String, String> {
    // Rust writes the shortest text that reads back to the same double.
    [("lat".to_owned(), lat.to_string()), ("lon".to_owned(), lon.to_string())].into()
}

/// Keys computed from a position are the H3 library's cells: every
/// resolution, at the poles, on both sides of the antimeridian, at and
/// beside every pentagon's centre, and 2 000 positions spread over the
/// sphere; and the cells within k rings are the library's grid disk.
#[test]
fn grid_cells_are_the_h3_librarys() {
    use paddock_serve::features::Supply;
    let reference = reference_cells();
    let plan = cell_plan();
    let model = &plan.models["m"];
    let template = |r: usize| match &model.features[&format!("f{r}")] {
        Supply::Lookup(l) => l.key.clone(),
        _ => unreachable!(),
    };
    let templates: Vec<_> = (0..16).map(template).collect();
    let cases = reference["cases"].as_array().unwrap();
    let (mut cells, mut disks) = (0, 0);
    let mut buf = String::new();
    for case in cases {
        let (lat, lon) = (case["lat"].as_f64().unwrap(), case["lon"].as_f64().unwrap());
        let keys = position(lat, lon);
        for (r, want) in case["cells"].as_array().unwrap().iter().enumerate() {
            assert_eq!(templates[r].render(&keys, &mut buf).unwrap(), want.as_str().unwrap(), "({lat}, {lon}) at {r}");
            cells += 1;
        }
        if let Some(disk) = case.get("disk") {
            let (r, k) = (disk["resolution"].as_u64().unwrap() as usize, disk["k"].as_u64().unwrap() as u32);
            let mut got = Vec::new();
            templates[r].render_around(&keys, k, &mut got).unwrap();
            assert_eq!(got[0], case["cells"][r].as_str().unwrap(), "the cell itself comes first");
            got.sort();
            let want: Vec<&str> = disk["cells"].as_array().unwrap().iter().map(|c| c.as_str().unwrap()).collect();
            assert_eq!(got, want, "({lat}, {lon}) at {r}, {k} rings");
            disks += 1;
        }
    }
    assert!(cells >= 2000 * 16 && disks >= 50, "{cells} cells, {disks} disks checked");
}

/// The demo's kind of lookup: a table keyed by cell, read at the cell a
/// request's position falls in and the ring around it, combined by mean
/// (the cells and their ring from the H3 library); a position that places
/// no cell falls back, and says why.
#[test]
fn a_lookup_keyed_by_a_cell_reads_the_cells_around_a_position() {
    let reference = reference_cells();
    let case =
        reference["cases"].as_array().unwrap().iter().find(|c| c.get("disk").is_some_and(|d| d["k"] == 1)).unwrap();
    let r = case["disk"]["resolution"].as_u64().unwrap();
    let ring: Vec<&str> = case["disk"]["cells"].as_array().unwrap().iter().map(|c| c.as_str().unwrap()).collect();
    let center = case["cells"][r as usize].as_str().unwrap();
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    paddock_tests::line_store(store);
    // x = 10 at the centre, 1..6 around it (all but one neighbour: it is missing).
    let mut table = format!("cell,x\n{center},10\n");
    let mut around = 0.0;
    for (i, cell) in ring.iter().filter(|c| **c != center).enumerate().skip(1) {
        table.push_str(&format!("{cell},{i}\n"));
        around += i as f64;
    }
    write_atomically(&store.join("cells.csv"), table.as_bytes());
    let plan = format!(
        "[sources.cells]\ntable = \"cells.csv\"\nkey = \"cell\"\n[models.m]\nkeys = [\"lat\", \"lon\"]\n[models.m.features]\n\
         x = {{ source = \"cells\", key = \"{{h3(lat, lon, {r})}}\", field = \"x\", around = 1, combine = \"mean\", missing = {{ default = 0.5 }} }}\n"
    );
    write_atomically(&store.join("features.toml"), plan.as_bytes());
    let reg = Registry::open(&Runtime::new().unwrap(), store, RegistryOptions::default()).unwrap();
    assert!(matches!(reg.status().features, FeaturesState::Accepted { .. }), "{:?}", reg.status().features);
    let ask = |lat: &str, lon: &str| {
        let context: RequestContext = [("lat".to_owned(), lat.to_owned()), ("lon".to_owned(), lon.to_owned())].into();
        let a = reg.score(&Request::new("m", &context, &[Row::new()]).every_lookup()).unwrap();
        (a.rows().next().unwrap().unwrap()[0], a.lookups[0][0].clone())
    };
    let (lat, lon) = (case["lat"].as_f64().unwrap(), case["lon"].as_f64().unwrap());
    let (y, fetched) = ask(&lat.to_string(), &lon.to_string());
    let mean = (10.0 + around) / 6.0;
    assert_eq!(y, 2.0 * mean + 1.0, "{fetched:?}");
    assert_eq!((fetched.outcome, fetched.key.as_str()), (Outcome::Found, format!("{center} (and 6 around)").as_str()));
    // Positions that place nothing: the default, and why.
    for (lat, lon, why) in [
        ("91", "0", "h3(lat, lon, R): lat 91 is outside -90 to 90 degrees"),
        ("10", "east", "h3(lat, lon, R): lon `east` is not a number"),
    ] {
        let (y, fetched) = ask(lat, lon);
        assert_eq!((y, fetched.outcome), (2.0, Outcome::Missing));
        assert_eq!(fetched.key, format!("(no key: {})", why.replace('R', &r.to_string())));
    }
}

/// A feature whose source has nothing for most keys gets its default from
/// the plan: its live values move (every default lands in the profile's
/// lowest bin), and the drift report says the plan's fallback moved them,
/// by cause, rather than letting it look like the world moved. The line's
/// profile of `x` is the table's own spread (quarters of 0‥63); sixteen
/// requests find their site, forty-eight name one the table lacks.
#[test]
fn drift_from_a_plans_fallback_is_named_as_such() {
    use paddock_host::{Bins, DriftLevel, DriftWindow, FallbackCounts, FieldProfile, ModelOptions, Profile};
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    let field = FieldProfile {
        bins: Bins::Edges(vec![15.5, 31.5, 47.5]),
        shares: vec![0.25; 4].into_iter().chain([0.0]).collect(),
        summary: None,
    };
    let profile = Profile {
        source: "the table".into(),
        rows: 64,
        features: [("x".to_owned(), field)].into(),
        outputs: Default::default(),
    };
    let line = paddock_tests::line_artifact("m", "1.0.0", 2.0, 1.0, Some(true));
    write_atomically(&store.join("m/1.0.0.wasm"), &paddock_tests::profiled(&line, &profile));
    write_atomically(&store.join("routes.toml"), b"[models.m]\ndefault = \"1.0.0\"\n");
    write_table(store, 1.0);
    let plan = PLAN.replace("missing = \"fail\"", "missing = { default = 0.0 }");
    write_atomically(&store.join("features.toml"), plan.as_bytes());
    let model = ModelOptions {
        drift: Some(DriftWindow { min_count: 64, ..DriftWindow::default() }),
        ..paddock_tests::unhurried()
    };
    let options = RegistryOptions { usage_flush: None, model, ..RegistryOptions::default() };
    let reg = Registry::open(&Runtime::new().unwrap(), store, options).unwrap();
    for i in 0..64 {
        let s = if i % 4 == 0 { format!("s{i}") } else { format!("gone-{i}") };
        let a = reg.score(&Request::new("m", &site(&s), &[Row::new()])).unwrap();
        let expected = if i % 4 == 0 { 2.0 * f64::from(i) + 1.0 } else { 1.0 };
        assert_eq!(a.estimates.values_at(0), [expected], "{s}: the table's x, or the default 0");
    }
    let report = reg.status().artifacts[0].drift.clone().expect("a profile");
    let x = &report.fields[0];
    assert_eq!(x.fallbacks, FallbackCounts { missing: 48, stale: 0, unavailable: 0 });
    assert_eq!((x.count, x.level), (64, DriftLevel::Act), "{x:?}");
    assert!(
        x.notes.iter().any(|n| n.starts_with("features plan fallbacks: 75.0 % of live values (missing 75.0 %)")),
        "{:?}",
        x.notes
    );
    assert_eq!(report.summary(), "act: x; plan fallbacks on x; see notes on x");
    let text = paddock_serve::registry::metrics::render(reg.usage(), &reg.status(), reg.source_usage(), Vec::new());
    let sample =
        "paddock_drift_fallbacks{model=\"m\",version=\"1.0.0\",kind=\"feature\",field=\"x\",cause=\"missing\"} 48";
    assert!(text.contains(sample), "{sample} not in\n{text}");
}

/// The plan with `site` written as a hash in captured traffic.
fn capturing_store(capture: paddock_serve::registry::CaptureOptions) -> (tempfile::TempDir, Registry) {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path();
    paddock_tests::line_store(store);
    write_table(store, 1.0);
    let plan = format!("{PLAN}\n[models.m.private]\nsite = \"hash\"\n");
    write_atomically(&store.join("features.toml"), plan.as_bytes());
    let options = RegistryOptions { usage_flush: None, capture: Some(capture), ..RegistryOptions::default() };
    let registry = Registry::open(&Runtime::new().unwrap(), store, options).unwrap();
    (dir, registry)
}

/// Every line of every closed capture file in `dir`, oldest file first.
fn captured_lines(dir: &Path) -> Vec<serde_json::Value> {
    use std::io::BufRead;
    let mut files: Vec<_> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.to_str().unwrap().ends_with(".ndjson.gz"))
        .collect();
    files.sort();
    files
        .iter()
        .flat_map(|f| {
            let reader = std::io::BufReader::new(flate2::read::GzDecoder::new(std::fs::File::open(f).unwrap()));
            reader.lines().map(|l| serde_json::from_str(&l.unwrap()).unwrap()).collect::<Vec<_>>()
        })
        .collect()
}

/// Captured lines are estimate requests (`paddock stream` and `POST
/// /estimate` take them as they are) with the answer beside them: the rows
/// as scored — completed by the plan, `x` from the table — each row's
/// values as the registry answered, a private key hashed (the same site,
/// the same hash; never the site itself). Files close at their size and
/// only the newest are kept.
#[test]
fn captured_traffic_reads_back_as_requests_with_their_answers() {
    let capture = tempfile::tempdir().unwrap();
    let options = paddock_serve::registry::CaptureOptions {
        share: 1.0,
        file_bytes: 4000,
        keep_files: 100,
        ..paddock_serve::registry::CaptureOptions::new(capture.path())
    };
    let (_dir, reg) = capturing_store(options);
    let mut answers = Vec::new();
    for i in 0..120 {
        let rows = [Row::new(), Row::new().with("x", 0.5)];
        let a = reg.score(&Request::new("m", &site(&format!("s{}", i % 8)), &rows)).unwrap();
        answers.push([a.estimates.values_at(0)[0], a.estimates.values_at(1)[0]]);
    }
    assert!(reg.rotate_capture(std::time::Duration::from_secs(60)), "the file closes");
    let counts = reg.status().capture.unwrap().counts;
    assert_eq!((counts.sampled, counts.written, counts.dropped_queue_full), (120, 120, 0), "{counts:?}");
    assert!(counts.files > 2, "{counts:?}: lines of about 300 bytes, files of 4000");
    let lines = captured_lines(capture.path());
    assert_eq!(lines.len(), 120);
    let mut hashes = std::collections::BTreeMap::new();
    for (i, (line, answer)) in lines.iter().zip(&answers).enumerate() {
        let request: paddock_serve::surface::wire::EstimateRequest = serde_json::from_value(line.clone()).unwrap();
        assert_eq!(request.model, "m");
        let rows = request.rows.as_ref().unwrap();
        let looked_up = (i % 8) as f64;
        assert_eq!(rows.len(), 2);
        assert_eq!(line["rows"][0]["x"].as_f64(), Some(looked_up), "row 1 as scored: {line}");
        assert_eq!(line["rows"][1]["x"].as_f64(), Some(0.5), "row 2 carried its own: {line}");
        let values: Vec<f64> =
            line["captured"]["answers"].as_array().unwrap().iter().map(|a| a[0].as_f64().unwrap()).collect();
        assert_eq!(values, answer, "{line}");
        assert_eq!(line["captured"]["version"], "1.0.0");
        assert_eq!(line["captured"]["outputs"], serde_json::json!(["y"]));
        assert_eq!(line["captured"]["private"], serde_json::json!({"site": "hashed"}));
        let hashed = request.context["site"].clone();
        assert!(hashed.starts_with("sha256:") && hashed.len() == 39, "{hashed}");
        assert_eq!(hashes.entry(i % 8).or_insert_with(|| hashed.clone()), &hashed, "one site, one hash");
    }
    assert_eq!(hashes.values().collect::<std::collections::BTreeSet<_>>().len(), 8, "eight sites, eight hashes");
    // Only the newest files are kept.
    let options = paddock_serve::registry::CaptureOptions {
        share: 1.0,
        file_bytes: 1000,
        keep_files: 2,
        ..paddock_serve::registry::CaptureOptions::new(capture.path().join("kept"))
    };
    let (_dir, reg) = capturing_store(options);
    for i in 0..40 {
        reg.score(&Request::new("m", &site(&format!("s{i}")), &[Row::new()])).unwrap();
    }
    assert!(reg.rotate_capture(std::time::Duration::from_secs(60)));
    let counts = reg.status().capture.unwrap().counts;
    assert!(counts.files > 2, "{counts:?}");
    let kept = captured_lines(&capture.path().join("kept"));
    assert!(!kept.is_empty() && kept.len() < 40, "{} lines kept of 40", kept.len());
    assert_eq!(kept.last().unwrap()["rows"][0]["x"].as_f64(), Some(39.0), "the newest lines are the ones kept");
}

/// A full disk: the capture file is the system's always-full device
/// (`/dev/full`, every write fails with "no space left"). Every request is
/// answered; the lines are counted lost, none written.
#[test]
fn a_full_disk_loses_captured_lines_and_fails_no_request() {
    let capture = tempfile::tempdir().unwrap();
    let options = paddock_serve::registry::CaptureOptions {
        share: 1.0,
        ..paddock_serve::registry::CaptureOptions::new(capture.path())
    };
    let (_dir, reg) = capturing_store(options);
    std::os::unix::fs::symlink("/dev/full", capture.path().join(paddock_serve::registry::capture::PARTIAL_FILE))
        .unwrap();
    for i in 0..50 {
        let a = reg.score(&Request::new("m", &site(&format!("s{i}")), &[Row::new()])).unwrap();
        assert_eq!(a.estimates.values_at(0), [2.0 * f64::from(i) + 1.0]);
    }
    assert!(reg.rotate_capture(std::time::Duration::from_secs(60)));
    let counts = reg.status().capture.unwrap().counts;
    assert_eq!((counts.sampled, counts.written, counts.lost_write_failed), (50, 0, 50), "{counts:?}");
    let text = paddock_serve::registry::metrics::render(reg.usage(), &reg.status(), reg.source_usage(), Vec::new());
    assert!(text.contains("paddock_capture_lines_total{outcome=\"lost_write_failed\"} 50\n"), "{text}");
}

/// A disk that does not take writes at all: the capture file is a named
/// pipe nobody reads, so the writing thread waits on it. Requests go on
/// being answered; the queue fills — here its bytes bind first: 2 000
/// bytes hold five of these lines (about 350 bytes each, as estimated) —
/// and the lines past it are dropped and counted. Once something reads
/// the pipe, what was queued is written.
#[test]
fn a_stuck_disk_drops_captured_lines_and_holds_up_no_request() {
    let capture = tempfile::tempdir().unwrap();
    let queue = 16;
    let options = paddock_serve::registry::CaptureOptions {
        share: 1.0,
        queue,
        queue_bytes: 2_000,
        ..paddock_serve::registry::CaptureOptions::new(capture.path())
    };
    let (_dir, reg) = capturing_store(options);
    let pipe = capture.path().join(paddock_serve::registry::capture::PARTIAL_FILE);
    assert!(std::process::Command::new("mkfifo").arg(&pipe).status().unwrap().success());
    let requests: u32 = 100;
    for i in 0..requests {
        let a = reg.score(&Request::new("m", &site(&format!("s{}", i % 64)), &[Row::new()])).unwrap();
        assert_eq!(a.estimates.values_at(0), [2.0 * f64::from(i % 64) + 1.0]);
    }
    let counts = reg.status().capture.unwrap().counts;
    // The writer holds at most one line while it waits; the queue the next.
    assert_eq!(counts.sampled, u64::from(requests));
    assert!(counts.dropped_queue_full >= u64::from(requests) - queue as u64 - 1, "{counts:?}");
    // A reader: the writer goes on, and what it kept is in the pipe.
    let reader = std::thread::spawn(move || {
        let mut bytes = Vec::new();
        std::io::Read::read_to_end(&mut std::fs::File::open(pipe).unwrap(), &mut bytes).unwrap();
        bytes
    });
    assert!(reg.rotate_capture(std::time::Duration::from_secs(60)));
    let bytes = reader.join().unwrap();
    let text = std::io::read_to_string(flate2::read::GzDecoder::new(&bytes[..])).unwrap();
    let counts = reg.status().capture.unwrap().counts;
    assert_eq!(text.lines().count() as u64, counts.written, "{counts:?}");
    assert_eq!(counts.written + counts.dropped_queue_full, u64::from(requests), "{counts:?}");
    assert!(counts.written <= 6, "five lines queued and one in the writer's hands at most: {counts:?}");
}

/// A line longer than the limit is dropped and counted, before it is queued.
#[test]
fn a_captured_line_past_its_limit_is_dropped_and_counted() {
    let capture = tempfile::tempdir().unwrap();
    let options = paddock_serve::registry::CaptureOptions {
        share: 1.0,
        line_bytes: 200,
        ..paddock_serve::registry::CaptureOptions::new(capture.path())
    };
    let (_dir, reg) = capturing_store(options);
    reg.score(&Request::new("m", &site("s1"), &[Row::new()])).unwrap();
    assert!(reg.rotate_capture(std::time::Duration::from_secs(60)));
    let counts = reg.status().capture.unwrap().counts;
    assert_eq!((counts.sampled, counts.dropped_too_long, counts.written), (1, 1, 0), "{counts:?}");
}
