//! The `paddock` command on the demo artifacts and store (built by `cargo xtask build`).

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).parent().unwrap().to_owned()
}

fn artifact_path(name: &str) -> PathBuf {
    let p = root().join("target/paddock/artifacts").join(format!("{name}.wasm"));
    assert!(p.exists(), "{} is missing: run `cargo xtask build` first", p.display());
    p
}

fn paddock(args: &[&str], stdin: Option<&str>) -> Output {
    use std::io::Write;
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_paddock"));
    cmd.args(args).current_dir(root());
    cmd.stdin(std::process::Stdio::piped()).stdout(std::process::Stdio::piped()).stderr(std::process::Stdio::piped());
    let mut child = cmd.spawn().unwrap();
    let mut input = child.stdin.take().unwrap();
    input.write_all(stdin.unwrap_or("").as_bytes()).unwrap();
    drop(input);
    child.wait_with_output().unwrap()
}

/// What `paddock inspect` says of an artifact, runs of spaces (table
/// padding) collapsed to one.
fn inspected(artifact: &std::path::Path) -> String {
    let o = paddock(&["inspect", artifact.to_str().unwrap()], None);
    text(&o.stdout).split(' ').filter(|w| !w.is_empty()).collect::<Vec<_>>().join(" ")
}

fn text(o: &[u8]) -> String {
    String::from_utf8_lossy(o).into_owned()
}

fn tmp(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("paddock-cli-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    dir.join(name)
}

#[test]
fn inspect_shows_digest_imports_and_the_contract_table() {
    let a = artifact_path("charge-minutes");
    let out = paddock(&["inspect", a.to_str().unwrap()], None);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let s = text(&out.stdout);
    let digest = paddock_host::Digest::of(&std::fs::read(&a).unwrap()).to_string();
    assert!(s.contains(&digest), "{s}");
    assert!(s.contains("imports  none"), "{s}");
    assert!(s.contains("section  paddock-params"), "{s}");
    let line =
        |name: &str| s.lines().rev().find(|l| l.split_whitespace().nth(1) == Some(name)).unwrap_or_default().to_owned();
    assert!(line("connector").contains("label {type2, ccs2, chademo}"), "{s}");
    assert!(line("ambient_c").contains("real [-40, 50]") && line("ambient_c").contains("°C"), "{s}");
    assert!(line("minutes").contains("[0, 2880]"), "{s}");

    let out = paddock(&["inspect", a.to_str().unwrap(), "--json"], None);
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["digest"], digest);
    assert_eq!(v["contract"]["features"].as_array().unwrap().len(), 8);
}

#[test]
fn score_names_columns_that_are_not_features_and_how_to_mark_them() {
    let a = artifact_path("charge-minutes");
    let csv = "session,plate,charger_kw,battery_kwh,soc_start,soc_target,ambient_c,hour_of_week,connector,fleet\n\
               s1,EV-1,11,64,0.2,0.8,12,40,type2,false\n";
    let input = tmp("with-extra-columns.csv");
    std::fs::write(&input, csv).unwrap();
    let out_file = tmp("with-extra-columns.out.csv");
    let _ = std::fs::remove_file(&out_file);
    let run = |extra: &[&str]| {
        let mut args = vec!["score", a.to_str().unwrap(), input.to_str().unwrap(), "--out", out_file.to_str().unwrap()];
        args.extend_from_slice(extra);
        paddock(&args, None)
    };
    let out = run(&[]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(
        err.contains("columns `session`, `plate` are not features of charge-minutes")
            && err.contains("--id NAME")
            && err.contains("--ignore NAME"),
        "{err}"
    );
    // Refused before any output was created.
    assert!(!out_file.exists());
    let out = run(&["--id", "sesion"]);
    assert!(text(&out.stderr).contains("the id column `sesion` is not in the CSV header"), "{}", text(&out.stderr));
    let out = run(&["--id", "session", "--ignore", "plate"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(text(&out.stderr).contains("1 row scored, 0 rows failed"), "{}", text(&out.stderr));
    assert!(std::fs::read_to_string(&out_file).unwrap().lines().nth(1).unwrap().starts_with("1,s1,"));
}

#[test]
fn score_reports_bad_rows_by_number_and_scores_the_rest() {
    let a = artifact_path("charge-minutes");
    let csv = "\
session,charger_kw,battery_kwh,soc_start,soc_target,ambient_c,hour_of_week,connector,fleet
s1,11,64,0.2,0.8,12,40,type2,false
s2,11,64,1.7,0.8,12,40,type2,false
s3,50,77,0.1,0.8,,100,ccs2,true
s4,11,64,0.2,0.8,12,40,tesla,false
s5,11,64
s6,7.4,40,0.5,1.0,20,150,type2,no
";
    let input = tmp("sessions.csv");
    std::fs::write(&input, csv).unwrap();
    let out = paddock(&["score", a.to_str().unwrap(), input.to_str().unwrap(), "--id", "session"], None);
    assert_eq!(out.status.code(), Some(1), "some rows failed: {}", text(&out.stderr));
    assert!(text(&out.stderr).contains("3 rows scored, 3 rows failed"));
    let lines: Vec<String> = text(&out.stdout).lines().map(str::to_owned).collect();
    assert_eq!(lines[0], "row,id,minutes,error");
    assert_eq!(lines.len(), 7);
    for (line, id) in lines[1..].iter().zip(["s1", "s2", "s3", "s4", "s5", "s6"]) {
        assert!(line.contains(&format!(",{id},")), "{line}");
    }
    assert!(lines[2].contains("row 2, feature `soc_start` = 1.7: out of bounds [0, 1]"), "{}", lines[2]);
    assert!(
        lines[4].contains("row 4, feature `connector` = \"\"tesla\"\": unknown label; allowed: type2, ccs2, chademo"),
        "{}",
        lines[4]
    );
    assert!(lines[5].contains("row 5: 3 fields but the header has 9"), "{}", lines[5]);
    for good in [1, 3, 6] {
        let minutes: f64 = lines[good].split(',').nth(2).unwrap().parse().unwrap();
        assert!((0.0..=2880.0).contains(&minutes) && minutes > 1.0, "{}", lines[good]);
    }
    // Batches of two on three threads: the same lines, in the same order.
    let args = ["score", a.to_str().unwrap(), input.to_str().unwrap(), "--id", "session", "--batch", "2"];
    let one = paddock(&[&args[..], &["--threads", "1"]].concat(), None);
    let three = paddock(&[&args[..], &["--threads", "3"]].concat(), None);
    assert_eq!(text(&three.stdout), text(&one.stdout));
    assert_eq!(text(&three.stdout), text(&out.stdout));
}

#[test]
fn score_reads_ndjson_from_stdin_and_writes_ndjson() {
    let a = artifact_path("overstay-risk");
    let input = "{\"expected_minutes\": 120, \"plugin_hour\": 18, \"member_overstay_rate\": null, \"site_occupancy\": 0.5, \"weekend\": false, \"fleet\": false}\nnot json\n";
    let out = paddock(&["score", a.to_str().unwrap(), "-", "--from", "ndjson", "--json"], Some(input));
    assert_eq!(out.status.code(), Some(1));
    let lines: Vec<serde_json::Value> = text(&out.stdout).lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    let p = lines[0]["overstay_probability"].as_f64().unwrap();
    assert!((0.0..=1.0).contains(&p));
    assert_eq!(lines[1]["row"], 2);
    assert!(lines[1]["error"].as_str().unwrap().starts_with("row 2: not JSON"));
    // Keys in a fixed order: the row, then the outputs in contract order.
    assert!(text(&out.stdout).starts_with("{\"row\":1,\"overstay_probability\":"), "{}", text(&out.stdout));
}

/// `--contributions` adds each row's baseline and per-feature
/// contributions; for the logistic overstay model they add up to the
/// log-odds, so the logistic function of their sum is the probability. A
/// model that cannot explain (the demo's trees carry no covers) is refused
/// before any row is read.
#[test]
fn score_adds_contributions_when_asked() {
    let a = artifact_path("overstay-risk");
    let input = "{\"expected_minutes\": 120, \"plugin_hour\": 18, \"member_overstay_rate\": 0.3, \"site_occupancy\": 0.5, \"weekend\": false, \"fleet\": true}\n";
    let out =
        paddock(&["score", a.to_str().unwrap(), "-", "--from", "ndjson", "--json", "--contributions"], Some(input));
    assert!(out.status.success(), "{}", text(&out.stderr));
    let line: serde_json::Value = serde_json::from_str(text(&out.stdout).lines().next().unwrap()).unwrap();
    let why = &line["contributions"]["overstay_probability"];
    let features = why["features"].as_object().unwrap();
    assert_eq!(features.keys().next().map(String::as_str), Some("expected_minutes"), "contract order: {why}");
    let margin = why["baseline"].as_f64().unwrap() + features.values().map(|v| v.as_f64().unwrap()).sum::<f64>();
    let p = line["overstay_probability"].as_f64().unwrap();
    assert!((1.0 / (1.0 + (-margin).exp()) - p).abs() <= 1e-12, "{line}");
    // CSV: a column per output's baseline and per feature.
    let csv =
        "expected_minutes,plugin_hour,member_overstay_rate,site_occupancy,weekend,fleet\n120,18,0.3,0.5,false,true\n";
    let out = paddock(&["score", a.to_str().unwrap(), "-", "--contributions"], Some(csv));
    assert!(out.status.success(), "{}", text(&out.stderr));
    let header = text(&out.stdout).lines().next().unwrap().to_owned();
    assert!(
        header.starts_with(
            "row,overstay_probability,overstay_probability.baseline,overstay_probability.expected_minutes,"
        ),
        "{header}"
    );
    let trees = artifact_path("charge-minutes");
    let out = paddock(&["score", trees.to_str().unwrap(), "-", "--contributions"], Some("x\n"));
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("these trees carry no covers"), "{}", text(&out.stderr));
}

#[test]
fn a_file_error_names_the_file_and_says_the_cause_once() {
    let out = paddock(&["check", "/nonexistent/model.wasm"], None);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(err.contains("/nonexistent/model.wasm"), "{err}");
    assert_eq!(err.matches("No such file or directory").count(), 1, "{err}");
    assert_eq!(err.lines().count(), 1, "{err}");
}

#[test]
fn check_passes_on_carried_checks_and_fails_on_altered_ones() {
    let a = artifact_path("charge-minutes");
    let out = paddock(&["check", a.to_str().unwrap(), "--json"], None);
    assert!(out.status.success(), "{}", text(&out.stdout));
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(report["passed"], report["cases"]);
    assert_eq!(report["max_abs_error"], 0.0);

    let trained = root().join("target/paddock/train/charge-minutes.checks.json");
    let mut checks: serde_json::Value = serde_json::from_slice(&std::fs::read(trained).unwrap()).unwrap();
    let first = &mut checks["cases"][0]["expect"]["minutes"];
    *first = serde_json::json!(first.as_f64().unwrap() + 0.5);
    let altered = tmp("altered.checks.json");
    std::fs::write(&altered, serde_json::to_vec(&checks).unwrap()).unwrap();
    let out = paddock(&["check", a.to_str().unwrap(), "--checks", altered.to_str().unwrap()], None);
    assert_eq!(out.status.code(), Some(1));
    let s = text(&out.stdout);
    assert!(s.contains("cases passed"), "{s}");
    assert!(s.contains("case 0: minutes ="), "{s}");
    assert!(s.contains("max abs error 5e-1"), "{s}");
}

#[test]
fn pack_makes_a_loadable_artifact_from_a_wat_module() {
    let out_path = tmp("affine.wasm");
    let wat = root().join("tests/fixtures/affine.wat");
    let out = paddock(&["pack", wat.to_str().unwrap(), "--out", out_path.to_str().unwrap(), "--json"], None);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["model"], "affine 1.0.0");
    let bytes = std::fs::read(&out_path).unwrap();
    assert_eq!(v["digest"], paddock_host::Digest::of(&bytes).to_string());
}

/// A hand-written XGBoost stump (tests/fixtures/stump.json: base 60, then
/// +30 minutes below 40 % charge, −15 at or above; absent charge goes
/// left), packed with a manifest and checks whose values are worked out by
/// hand from the file, then inspected.
#[test]
fn pack_imports_a_toolkit_file_and_inspect_says_where_the_contract_came_from() {
    let manifest = tmp("stump.toml");
    std::fs::write(&manifest, "name = \"session-minutes\"\nversion = \"1.0.0\"\n[features.arrival_soc]\nunit = \"%\"\nrequired = true\n[outputs.value]\nname = \"minutes\"\nmin = 0.0\n").unwrap();
    let checks = tmp("stump.checks.json");
    std::fs::write(
        &checks,
        r#"{"source": "worked out by hand from tests/fixtures/stump.json", "tolerance": {"abs": 0, "rel": 0}, "cases": [
            {"row": {"arrival_soc": 12.5, "kw": 11}, "expect": {"minutes": 90}},
            {"row": {"arrival_soc": 40, "kw": 11}, "expect": {"minutes": 45}}]}"#,
    )
    .unwrap();
    let out = tmp("stump.wasm");
    let o = paddock(
        &[
            "pack",
            "tests/fixtures/stump.json",
            "--overrides",
            manifest.to_str().unwrap(),
            "--checks",
            checks.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ],
        None,
    );
    assert!(o.status.success(), "{}", text(&o.stderr));
    assert!(text(&o.stdout).contains("loads as session-minutes 1.0.0\nchecks: 2/2 passed"), "{}", text(&o.stdout));
    // An artifact is a build output, not a secret: readable by all, as cargo's are.
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt as _;
        assert_eq!(std::fs::metadata(&out).unwrap().permissions().mode() & 0o777, 0o644);
    }
    let shown = inspected(&out);
    assert!(shown.contains("imported from tests/fixtures/stump.json (XGBoost JSON model, 1 trees)"), "{shown}");
    assert!(shown.contains("toolkit XGBoost 3.2.0"), "{shown}");
    assert!(shown.contains("feature arrival_soc name from feature_names in the file; real number from feature_types; optional by default: XGBoost sends an absent value its split's default way; unit, required from the overrides"), "{shown}");
    assert!(
        shown.contains(
            "output minutes (`value` as imported) the objective reg:squarederror; bounds, name from the overrides"
        ),
        "{shown}"
    );
}

/// A multinomial logistic regression from scikit-learn (iris, through
/// skl2onnx and the notebook helper, whose checks hold scikit-learn's
/// `predict_proba`) packs onto the linear guest, picked by the graph's
/// operator; an ONNX graph manifest given with it is refused, saying why.
#[test]
fn pack_imports_a_scikit_learn_linear_model_onto_the_linear_guest() {
    let dir = root().join("target/paddock/imports");
    let model = dir.join("skl-iris-logistic.onnx");
    let checks = dir.join("skl-iris-logistic.checks.json");
    assert!(model.exists(), "{}: run `python3 tests/imports/export.py target/paddock/imports`", model.display());
    let manifest = tmp("iris.toml");
    std::fs::write(&manifest, "name = \"iris-species\"\n[features.x2]\nunit = \"cm\"\nabout = \"petal length\"\n")
        .unwrap();
    let out = tmp("iris.wasm");
    let o = paddock(
        &[
            "pack",
            model.to_str().unwrap(),
            "--overrides",
            manifest.to_str().unwrap(),
            "--checks",
            checks.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ],
        None,
    );
    assert!(o.status.success(), "{}", text(&o.stderr));
    assert!(text(&o.stdout).contains("loads as iris-species 0.0.0\nchecks: 150/150 passed"), "{}", text(&o.stdout));
    let shown = inspected(&out);
    assert!(shown.contains("(scikit-learn model in ONNX (skl2onnx), linear: 3 output(s) × 4 weights)"), "{shown}");
    assert!(shown.contains("LinearClassifier: one probability per class (3) (softmax)"), "{shown}");
    assert!(shown.contains("feature x2 by position in the graph input `X`"), "{shown}");
    assert!(shown.contains("output probability_2 the model: the probability of class 2"), "{shown}");

    let evaluator_manifest = root().join("target/paddock/sklearn/onnx-linear.toml");
    let linear = root().join("target/paddock/sklearn/onnx-linear.onnx");
    let o = paddock(
        &[
            "pack",
            linear.to_str().unwrap(),
            "--manifest",
            evaluator_manifest.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ],
        None,
    );
    assert_eq!(o.status.code(), Some(2));
    let err = text(&o.stderr);
    let expected = format!(
        "--manifest is for ONNX graphs (a toolkit's model file takes --overrides); {} is a scikit-learn model in ONNX (skl2onnx)",
        linear.display()
    );
    assert!(err.contains(&expected), "{err}");
}

/// A LightGBM model LightGBM 4.7.0 saved (wine, a categorical feature;
/// tests/imports/export.py) packs from the CLI with the helper's checks —
/// LightGBM's own `predict` on all 178 rows, bit for bit — and inspect
/// names where the contract came from.
#[test]
fn pack_imports_a_lightgbm_model_from_the_cli() {
    let dir = root().join("target/paddock/imports");
    let model = dir.join("lgb-wine-categorical.txt");
    assert!(model.exists(), "{}: run `python3 tests/imports/export.py target/paddock/imports`", model.display());
    let out = tmp("wine.wasm");
    let checks = dir.join("lgb-wine-categorical.checks.json");
    let o = paddock(
        &["pack", model.to_str().unwrap(), "--checks", checks.to_str().unwrap(), "--out", out.to_str().unwrap()],
        None,
    );
    assert!(o.status.success(), "{}", text(&o.stderr));
    assert!(
        text(&o.stdout).contains(
            "loads as lgb-wine-categorical 0.0.0\nchecks: 178/178 passed (max abs error 0e0, max rel error 0e0)"
        ),
        "{}",
        text(&o.stdout)
    );
    let shown = inspected(&out);
    assert!(shown.contains("(LightGBM text model, 180 trees)"), "{shown}");
    assert!(shown.contains("feature alcohol_band name from feature_names in the file;"), "{shown}");
}

/// A training profile the notebook helper wrote (tests/imports/export.py)
/// packs with `--profile`; inspect shows it, a line per feature, and audit
/// says what it covers.
#[test]
fn pack_carries_a_training_profile_that_inspect_and_audit_show() {
    let dir = root().join("target/paddock/imports");
    let model = dir.join("lgb-diabetes-profiled.txt");
    let profile = dir.join("lgb-diabetes-profiled.profile.json");
    let out = tmp("profiled.wasm");
    let o = paddock(
        &["pack", model.to_str().unwrap(), "--profile", profile.to_str().unwrap(), "--out", out.to_str().unwrap()],
        None,
    );
    assert!(o.status.success(), "{}", text(&o.stderr));
    let shown = inspected(&out);
    assert!(shown.contains("training profile: 442 rows (paddock_handoff from 442 training rows;"), "{shown}");
    assert!(shown.contains("\n feature bmi 10 bins, 0.0 % missing, -0.09028 to 0.1706, mean "), "{shown}");
    assert!(shown.contains("\n output value 10 bins, 0.0 % missing, 53.74 to 320.0, mean 152.1 sd 64.95"), "{shown}");
    let o = paddock(&["audit", out.to_str().unwrap()], None);
    assert!(text(&o.stdout).contains("442 rows; 10 features, 1 outputs"), "{}", text(&o.stdout));
}

/// `paddock score --drift` compares a file's rows with the artifact's
/// training profile: the diabetes rows with `bmi` moved by one standard
/// deviation (tests/imports/export.py) call for action on `bmi` alone, each
/// bin's training and live shares drawn side by side. An artifact without
/// a profile is refused before any row is read.
#[test]
fn score_compares_a_files_rows_with_the_training_profile() {
    let dir = root().join("target/paddock/imports");
    let out = tmp("drifted.wasm");
    let (model, profile) = (dir.join("lgb-diabetes-profiled.txt"), dir.join("lgb-diabetes-profiled.profile.json"));
    let o = paddock(
        &["pack", model.to_str().unwrap(), "--profile", profile.to_str().unwrap(), "--out", out.to_str().unwrap()],
        None,
    );
    assert!(o.status.success(), "{}", text(&o.stderr));
    let doc: serde_json::Value = serde_json::from_slice(&std::fs::read(dir.join("drift.json")).unwrap()).unwrap();
    let names: Vec<String> = serde_json::from_value(doc["names"].clone()).unwrap();
    let case = doc["cases"].as_array().unwrap().iter().find(|c| c["case"] == "bmi-shifted").unwrap();
    let mut lines = String::new();
    for row in case["rows"].as_array().unwrap() {
        let object: serde_json::Map<String, serde_json::Value> =
            names.iter().cloned().zip(row.as_array().unwrap().iter().cloned()).collect();
        lines.push_str(&format!("{}\n", serde_json::Value::Object(object)));
    }
    let rows = tmp("shifted.ndjson");
    std::fs::write(&rows, lines).unwrap();
    let o = paddock(&["score", out.to_str().unwrap(), rows.to_str().unwrap(), "--drift"], None);
    assert!(o.status.success(), "{}", text(&o.stderr));
    let said = text(&o.stderr);
    let acting: Vec<&str> = said.lines().filter(|l| l.ends_with("values)") && l.contains(", act (")).collect();
    assert_eq!(acting.len(), 1, "{said}");
    assert!(acting[0].starts_with("feature bmi: index "), "{said}");
    assert!(said.contains(" | ") && said.contains('█'), "{said}");
    let bare = tmp("bare.wasm");
    let o = paddock(&["pack", model.to_str().unwrap(), "--out", bare.to_str().unwrap()], None);
    assert!(o.status.success(), "{}", text(&o.stderr));
    let o = paddock(&["score", bare.to_str().unwrap(), rows.to_str().unwrap(), "--drift"], None);
    assert!(!o.status.success() && text(&o.stderr).contains("carries no training profile"), "{}", text(&o.stderr));
}

/// `paddock drift` asks a running host: a store serving the diabetes model
/// with its training profile gets the `bmi`-shifted rows
/// (tests/imports/export.py) one request each; the command names `bmi` as
/// calling for action, alone, draws its bars, and exits 1. Before any
/// request, nothing has enough values and it exits 0.
#[test]
fn drift_draws_a_running_hosts_counts() {
    let dir = tempfile::tempdir().unwrap();
    let (store, state) = (dir.path().join("store"), dir.path().join("state"));
    let imports = root().join("target/paddock/imports");
    let (model, profile) =
        (imports.join("lgb-diabetes-profiled.txt"), imports.join("lgb-diabetes-profiled.profile.json"));
    let out = store.join("diabetes/1.0.0.wasm");
    std::fs::create_dir_all(out.parent().unwrap()).unwrap();
    let o = paddock(
        &[
            "pack",
            model.to_str().unwrap(),
            "--profile",
            profile.to_str().unwrap(),
            "--name",
            "diabetes",
            "--version",
            "1.0.0",
            "--out",
            out.to_str().unwrap(),
        ],
        None,
    );
    assert!(o.status.success(), "{}", text(&o.stderr));
    std::fs::write(store.join("routes.toml"), "[models.diabetes]\ndefault = \"1.0.0\"\n").unwrap();
    let served = Served::start(&store, &state);
    let o = paddock(&["drift", &served.base], None);
    assert_eq!(o.status.code(), Some(0), "{}{}", text(&o.stdout), text(&o.stderr));
    assert!(text(&o.stdout).starts_with("diabetes 1.0.0: too few values"), "{}", text(&o.stdout));
    let doc: serde_json::Value = serde_json::from_slice(&std::fs::read(imports.join("drift.json")).unwrap()).unwrap();
    let names: Vec<String> = serde_json::from_value(doc["names"].clone()).unwrap();
    let case = doc["cases"].as_array().unwrap().iter().find(|c| c["case"] == "bmi-shifted").unwrap();
    let agent = ureq::Agent::config_builder().http_status_as_error(false).build().new_agent();
    for row in case["rows"].as_array().unwrap() {
        let object: serde_json::Map<String, serde_json::Value> =
            names.iter().cloned().zip(row.as_array().unwrap().iter().cloned()).collect();
        let body = serde_json::json!({"model": "diabetes", "rows": [object]}).to_string();
        let r = agent.post(&format!("{}/estimate", served.base)).header("content-type", "application/json").send(body);
        assert_eq!(r.unwrap().status().as_u16(), 200);
    }
    let o = paddock(&["drift", &served.base], None);
    let said = text(&o.stdout);
    assert_eq!(o.status.code(), Some(1), "{said}{}", text(&o.stderr));
    assert!(said.starts_with("diabetes 1.0.0: act: bmi\n"), "{said}");
    let acting: Vec<&str> = said.lines().filter(|l| l.ends_with("values)") && l.contains(", act (")).collect();
    assert_eq!(acting, [format!("feature bmi: index {}", &acting[0]["feature bmi: index ".len()..])], "{said}");
    assert!(said.contains("(training | live, last 1 h)") && said.contains('█'), "{said}");
    let o = paddock(&["drift", &served.base, "--model", "nothing-here"], None);
    assert!(text(&o.stderr).contains("serves no model `nothing-here`"), "{}", text(&o.stderr));
}

/// Packs a LightGBM diabetes model of tests/imports/export.py as `diabetes`
/// `version` into `out`, with `extra` flags.
fn pack_diabetes(file: &str, version: &str, out: &Path, extra: &[&str]) {
    let imports = root().join("target/paddock/imports");
    let model = imports.join(file);
    let mut args = vec!["pack", model.to_str().unwrap(), "--name", "diabetes", "--version", version];
    args.extend(extra);
    args.extend(["--out", out.to_str().unwrap()]);
    std::fs::create_dir_all(out.parent().unwrap()).unwrap();
    let o = paddock(&args, None);
    assert!(o.status.success(), "{}", text(&o.stderr));
}

/// Traffic a host captured, replayed: against the artifact that answered
/// it, nothing changes; against the model retrained with 20 more trees,
/// the differences are LightGBM's own (its `predict` of both models on the
/// same 442 diabetes rows, tests/imports/export.py): the largest absolute
/// difference and NumPy's quantiles of the differences, to 1e-9, and the
/// `--max-abs-diff` bound fails the replay (exit 1). A candidate whose
/// contract takes `sex` as a label refuses every row, naming the feature.
#[test]
fn replay_compares_a_candidate_with_what_the_host_answered() {
    let dir = tempfile::tempdir().unwrap();
    let (store, captured) = (dir.path().join("store"), dir.path().join("captured"));
    let profile = root().join("target/paddock/imports/lgb-diabetes-profiled.profile.json");
    let served = store.join("diabetes/1.0.0.wasm");
    pack_diabetes("lgb-diabetes-profiled.txt", "1.0.0", &served, &["--profile", profile.to_str().unwrap()]);
    std::fs::write(store.join("routes.toml"), "[models.diabetes]\ndefault = \"1.0.0\"\n").unwrap();
    let doc: serde_json::Value =
        serde_json::from_slice(&std::fs::read(root().join("target/paddock/imports/replay.json")).unwrap()).unwrap();
    let names: Vec<String> = serde_json::from_value(doc["names"].clone()).unwrap();
    let rows: Vec<Vec<f64>> = serde_json::from_value(doc["rows"].clone()).unwrap();
    {
        let capture = paddock_serve::registry::CaptureOptions {
            share: 1.0,
            ..paddock_serve::registry::CaptureOptions::new(&captured)
        };
        let options =
            paddock_serve::RegistryOptions { usage_flush: None, capture: Some(capture), ..Default::default() };
        let registry = paddock_serve::Registry::open(&paddock_host::Runtime::new().unwrap(), &store, options).unwrap();
        let rows: Vec<paddock_host::Row> =
            rows.iter().map(|r| names.iter().cloned().zip(r.iter().copied()).collect()).collect();
        let context = paddock_serve::RequestContext::new();
        for chunk in rows.chunks(10) {
            registry.score(&paddock_serve::Request::new("diabetes", &context, chunk)).unwrap();
        }
        assert!(registry.rotate_capture(std::time::Duration::from_secs(60)));
    }
    let replay = |candidate: &Path, extra: &[&str]| {
        let mut args = vec!["replay", candidate.to_str().unwrap(), captured.to_str().unwrap(), "--json"];
        args.extend(extra);
        let o = paddock(&args, None);
        let report: serde_json::Value =
            serde_json::from_slice(&o.stdout).unwrap_or_else(|e| panic!("{e}: {}{}", text(&o.stdout), text(&o.stderr)));
        (o.status.code(), report)
    };
    let (code, same) = replay(&served, &["--max-abs-diff", "0"]);
    let value = &same["report"]["outputs"][0];
    assert_eq!((code, &value["compared"], &value["changed"]), (Some(0), &442.into(), &0.into()), "{same}");
    assert_eq!(same["report"]["drift"]["fields"].as_array().unwrap().last().unwrap()["kind"], "output");

    // `paddock score` reads the capture files as they are: every row scored again.
    let file = std::fs::read_dir(&captured).unwrap().next().unwrap().unwrap().path();
    let o = paddock(&["score", served.to_str().unwrap(), file.to_str().unwrap()], None);
    assert!(o.status.success(), "{}", text(&o.stderr));
    assert_eq!(text(&o.stdout).lines().count(), 442, "{}", text(&o.stderr));
    assert!(text(&o.stderr).contains("442 rows scored, 0 rows failed"), "{}", text(&o.stderr));

    let retrained = dir.path().join("retrained.wasm");
    pack_diabetes("lgb-diabetes-retrained.txt", "1.1.0", &retrained, &[]);
    let (code, moved) = replay(&retrained, &["--max-abs-diff", "0", "--tolerance", "1e-9"]);
    assert_eq!(code, Some(1), "the bound is crossed: {moved}");
    assert!(moved["crossed"][0].as_str().unwrap().starts_with("--max-abs-diff 0: value moved by "), "{moved}");
    let toolkit: Vec<f64> = {
        let (a, b): (Vec<f64>, Vec<f64>) = (
            serde_json::from_value(doc["original"].clone()).unwrap(),
            serde_json::from_value(doc["retrained"].clone()).unwrap(),
        );
        a.iter().zip(&b).map(|(a, b)| b - a).collect()
    };
    let value = &moved["report"]["outputs"][0];
    let changed = toolkit.iter().filter(|d| d.abs() > 1e-9).count();
    assert_eq!((&value["compared"], value["changed"].as_u64()), (&442.into(), Some(changed as u64)), "{value}");
    let largest = toolkit.iter().copied().max_by(|a, b| a.abs().total_cmp(&b.abs())).unwrap();
    let ours = value["largest_absolute"]["difference"].as_f64().unwrap();
    assert!((ours - largest).abs() < 1e-9, "{ours} against LightGBM's {largest}");
    let numpy: Vec<f64> = serde_json::from_value(doc["quantiles"].clone()).unwrap();
    for (pair, want) in value["quantiles"].as_array().unwrap().iter().zip(&numpy) {
        let got = pair[1].as_f64().unwrap();
        assert!((got - want).abs() < 1e-9, "quantile {}: {got} against NumPy's {want}", pair[0]);
    }

    let other = dir.path().join("labels.wasm");
    let overrides = root().join("target/paddock/imports/lgb-diabetes-pandas.toml");
    pack_diabetes("lgb-diabetes-pandas.txt", "2.0.0", &other, &["--overrides", overrides.to_str().unwrap()]);
    let (code, refused) = replay(&other, &["--max-refused", "0"]);
    assert_eq!((code, &refused["report"]["now_refused_count"]), (Some(1), &442.into()), "{refused}");
    let why = refused["report"]["now_refused"][0]["why"].as_str().unwrap();
    assert!(why.contains("feature `sex`"), "{why}");
}

/// A PMML document packs onto the program guest; the checks are worked
/// out by hand from the document (tests/pmml.rs shows the steps).
#[test]
fn pack_imports_a_pmml_document_onto_the_program_guest() {
    let checks = tmp("minutes.checks.json");
    std::fs::write(
        &checks,
        r#"{"source": "worked out by hand from tests/pmml/charge-session-minutes.pmml", "tolerance": {"abs": 0, "rel": 0}, "cases": [
            {"row": {"arrival_soc": 20, "kw": 50, "plug": "ccs2", "hour": 8}, "expect": {"minutes": 58}},
            {"row": {"kw": 11, "plug": "type2", "hour": 22}, "expect": {"minutes": 342}}]}"#,
    )
    .unwrap();
    let out = tmp("minutes.wasm");
    let o = paddock(
        &[
            "pack",
            "tests/pmml/charge-session-minutes.pmml",
            "--checks",
            checks.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ],
        None,
    );
    assert!(o.status.success(), "{}", text(&o.stderr));
    assert!(
        text(&o.stdout).contains("loads as charge-session-minutes 0.0.0\nchecks: 2/2 passed"),
        "{}",
        text(&o.stdout)
    );
    let shown = inspected(&out);
    assert!(
        shown.contains("imported from tests/pmml/charge-session-minutes.pmml (PMML document, scoring program:"),
        "{shown}"
    );
    assert!(
        shown.contains("feature plug the DataDictionary (line 15): categorical string; labels ccs2, type2, chademo"),
        "{shown}"
    );
    // A label outside the DataDictionary's Values is refused by the contract.
    let rows = tmp("minutes.ndjson");
    std::fs::write(&rows, "{\"arrival_soc\": 20, \"kw\": 50, \"plug\": \"gb-t\", \"hour\": 8}\n").unwrap();
    let o = paddock(&["score", out.to_str().unwrap(), rows.to_str().unwrap()], None);
    assert_eq!(o.status.code(), Some(1), "{}", text(&o.stdout));
    assert!(text(&o.stdout).contains("plug") && text(&o.stdout).contains("gb-t"), "{}", text(&o.stdout));
}

#[test]
fn pack_leaves_nothing_when_the_params_do_not_decode_or_the_checks_fail() {
    let dir = tempfile::tempdir().unwrap();
    let guest = root().join("target/paddock/guests/paddock-model-linear.wasm");
    let params = dir.path().join("junk.params");
    std::fs::write(&params, b"these bytes are not linear params").unwrap();
    let out_path = dir.path().join("broken.wasm");
    let args =
        ["pack", guest.to_str().unwrap(), "--params", params.to_str().unwrap(), "--out", out_path.to_str().unwrap()];
    let out = paddock(&args, None);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stdout));
    let err = text(&out.stderr);
    assert!(
        err.starts_with(&format!("error: {} was not written: the packed artifact does not load", out_path.display())),
        "{err}"
    );
    assert_eq!(err.lines().count(), 1, "{err}");
    // Nothing at --out, and no temporary file left beside it.
    let left: Vec<_> = std::fs::read_dir(dir.path()).unwrap().map(|e| e.unwrap().file_name()).collect();
    assert_eq!(left, vec![std::ffi::OsString::from("junk.params")]);

    // Checks that fail: not written either.
    let wat = root().join("tests/fixtures/affine.wat");
    let checks = dir.path().join("wrong.checks.json");
    std::fs::write(&checks, r#"{"source": "by hand, wrong on purpose", "tolerance": {"abs": 0, "rel": 0}, "cases": [{"row": {"x": 1}, "expect": {"y": 99}}]}"#).unwrap();
    let args =
        ["pack", wat.to_str().unwrap(), "--checks", checks.to_str().unwrap(), "--out", out_path.to_str().unwrap()];
    let out = paddock(&args, None);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("was not written: 1 of 1 checks fail; first: case 0"), "{}", text(&out.stderr));
    assert!(!out_path.exists());
}

#[test]
fn demo_routes_each_plug_in_and_says_which_version_answered_and_why() {
    let store = root().join("target/paddock/store");
    let out = paddock(&["demo", "--store", store.to_str().unwrap()], None);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let s = text(&out.stdout);
    let line = |needle: &str| {
        s.lines().find(|l| l.contains(needle)).unwrap_or_else(|| panic!("no {needle:?} in {s}")).to_owned()
    };
    // Weekday default, weekend rule, the site in the 10 % canary, the north rule.
    assert!(line("Harbour Lot    coast   Mon 08:12").contains("1.0.0 · default"), "{s}");
    assert!(line("Station Road   north   Sun 17:44").contains("1.1.0 · rule weekend"), "{s}");
    assert!(
        line("Library Green  centre  Sat 08:27").contains("1.2.0 · canary: site in its 10% (else rule weekend)"),
        "{s}"
    );
    assert!(line("Depot North    north   Thu 01:50").ends_with("1.1.0 · rule north"), "{s}");
    // Monday 00:20 in Oslo is still Sunday in UTC: the weekday version answers.
    assert!(line("Mon 00:20").contains("1.0.0 · default"), "{s}");
    assert!(line("shadow charge-minutes 2.0.0-rc.1").contains("10 requests compared"), "{s}");
    // Weekday plug-ins with bigger batteries than the weekday version
    // trained on: its drift report names that feature alone, with its bars.
    assert!(line("drift: 400 weekday plug-ins").ends_with("its drift report says act: battery_kwh"), "{s}");
    let features: Vec<&str> = s.lines().filter(|l| l.starts_with("feature ") && !l.contains(": index")).collect();
    assert_eq!(features.len(), 8, "{s}");
    assert!(features.iter().all(|l| l.contains("battery_kwh") || l.ends_with("steady")), "{s}");
    assert!(line("feature battery_kwh   ").ends_with("act"), "{s}");
    assert!(line("feature battery_kwh: index ").ends_with("act (407 values)"), "{s}");

    let out = paddock(&["demo", "--store", store.to_str().unwrap(), "--json"], None);
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["answers"].as_array().unwrap().len(), 10);
    let acting: Vec<&serde_json::Value> =
        v["drift"]["report"]["fields"].as_array().unwrap().iter().filter(|f| f["level"] == "act").collect();
    assert_eq!(acting.len(), 1, "{}", v["drift"]);
    assert_eq!((&acting[0]["kind"], &acting[0]["name"]), (&"feature".into(), &"battery_kwh".into()));
    // Machine-readable fields carry names, not prose with backticks.
    let canary =
        v["answers"].as_array().unwrap().iter().find(|a| a["minutes_reason"]["picked_by"] == "canary").unwrap();
    assert_eq!(canary["minutes_reason"]["instead_of"], "weekend", "{canary}");
    assert!(!v.to_string().contains('`'), "{v}");

    // A host keeps its ledger across runs; `paddock usage` reads it.
    let state = tempfile::tempdir().unwrap();
    let line = r#"{"model": "overstay-risk", "row": {"expected_minutes": 95, "plugin_hour": 18, "site_occupancy": 0.7, "weekend": false, "fleet": false}}"#;
    let input = format!("{line}\n{line}\n{line}\n");
    for _ in 0..2 {
        let out = paddock(
            &["stream", "--store", store.to_str().unwrap(), "--state", state.path().to_str().unwrap()],
            Some(&input),
        );
        assert!(out.status.success(), "{}", text(&out.stderr));
    }
    let out = paddock(
        &["usage", "--store", store.to_str().unwrap(), "--state", state.path().to_str().unwrap(), "--json"],
        None,
    );
    assert!(out.status.success(), "{}", text(&out.stderr));
    let u: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let calls: u64 = u["usage"]["versions"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|v| v["model"] == "overstay-risk")
        .map(|v| v["calls"].as_u64().unwrap())
        .sum();
    assert_eq!(calls, 6, "two runs of three calls each: {u}");
    let out = paddock(&["usage", "--store", store.to_str().unwrap(), "--state", state.path().to_str().unwrap()], None);
    assert!(text(&out.stdout).contains("p99 µs"), "{}", text(&out.stdout));
}

/// `paddock usage` on a state directory no host has written names the
/// commands that write it; `paddock stream` is one (above, it writes the
/// file `usage` then reads), and `paddock demo` is not.
#[test]
fn usage_without_a_usage_file_names_the_commands_that_write_one() {
    let store = root().join("target/paddock/store");
    let state = tempfile::tempdir().unwrap();
    let out = paddock(&["usage", "--store", store.to_str().unwrap(), "--state", state.path().to_str().unwrap()], None);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(err.contains("`paddock stream`") && !err.contains("demo"), "{err}");
    // The demo keeps no usage file: after it, there is still none.
    let out = paddock(&["demo", "--store", store.to_str().unwrap(), "--json"], None);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(!paddock_serve::registry::usage_path(state.path()).exists());
}

/// Every subcommand that writes to standard output ends quietly, with 0,
/// when its reader has already closed the pipe (`paddock inspect A | head`):
/// no panic, no "Broken pipe" error.
#[test]
fn a_closed_pipe_ends_every_command_quietly() {
    let store = root().join("target/paddock/store");
    let store = store.to_str().unwrap();
    let artifact = artifact_path("charge-minutes");
    let a = artifact.to_str().unwrap();
    let wat = root().join("tests/fixtures/affine.wat");
    let packed = tmp("closed-pipe.wasm");
    let keys = tempfile::tempdir().unwrap();
    let state = tempfile::tempdir().unwrap();
    let state = state.path().to_str().unwrap();
    let line = r#"{"model": "overstay-risk", "row": {"expected_minutes": 95, "plugin_hour": 18, "site_occupancy": 0.7, "weekend": false, "fleet": false}}"#;
    let lines = format!("{line}\n").repeat(50);
    // A usage file for `usage` to print.
    assert!(paddock(&["stream", "--store", store, "--state", state], Some(&lines)).status.success());
    let csv = "charger_kw,battery_kwh,soc_start,soc_target,ambient_c,hour_of_week,connector,fleet\n11,64,0.2,0.8,12,40,type2,false\n";
    let cases: Vec<(Vec<&str>, Option<&str>)> = vec![
        (vec!["inspect", a], None),
        (vec!["inspect", a, "--json"], None),
        (vec!["audit", a], None),
        (vec!["check", a], None),
        (vec!["score", a, "-"], Some(csv)),
        (vec!["status", "--store", store], None),
        (vec!["usage", "--store", store, "--state", state], None),
        (vec!["usage", "--store", store, "--state", state, "--json"], None),
        (vec!["demo", "--store", store], None),
        (vec!["stream", "--store", store], Some(&lines)),
        (vec!["pack", wat.to_str().unwrap(), "--out", packed.to_str().unwrap()], None),
        (vec!["voucher", "reviewer", "--dir", keys.path().to_str().unwrap()], None),
    ];
    for (args, input) in cases {
        use std::io::Write;
        let (reader, writer) = std::io::pipe().unwrap();
        drop(reader);
        let mut child = Command::new(env!("CARGO_BIN_EXE_paddock"))
            .args(&args)
            .current_dir(root())
            .stdin(std::process::Stdio::piped())
            .stdout(writer)
            .stderr(std::process::Stdio::piped())
            .spawn()
            .unwrap();
        let mut stdin = child.stdin.take().unwrap();
        // The command may stop reading once it cannot write: a refused write here is fine.
        let _ = stdin.write_all(input.unwrap_or("").as_bytes());
        drop(stdin);
        let out = child.wait_with_output().unwrap();
        let err = text(&out.stderr);
        assert_eq!(out.status.code(), Some(0), "paddock {args:?}: {err}");
        assert!(!err.contains("panicked") && !err.contains("Broken pipe"), "paddock {args:?}: {err}");
    }
}

#[test]
fn a_missing_demo_store_says_how_to_build_it() {
    let out = paddock(&["demo", "--store", "/nonexistent"], None);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("run `cargo xtask demo`"), "{}", text(&out.stderr));
}

#[test]
fn status_lists_every_artifact_and_fails_when_one_is_refused() {
    let demo = root().join("target/paddock/store");
    let out = paddock(&["status", "--store", demo.to_str().unwrap()], None);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let s = text(&out.stdout);
    assert!(s.contains("charge-minutes/2.0.0-rc.1.wasm") && s.contains("shadow") && s.contains("40/40 passed"), "{s}");
    assert!(s.contains("routes: routes.toml accepted"), "{s}");

    // A copy of 1.0.0 filed as 9.9.9: its contract disagrees with its place.
    let store = tmp("store");
    std::fs::create_dir_all(store.join("charge-minutes")).unwrap();
    std::fs::copy(demo.join("charge-minutes/1.0.0.wasm"), store.join("charge-minutes/9.9.9.wasm")).unwrap();
    std::fs::write(store.join("routes.toml"), "[models.charge-minutes]\ndefault = \"9.9.9\"\n").unwrap();
    let out = paddock(&["status", "--store", store.to_str().unwrap(), "--json"], None);
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["artifacts"][0]["state"], "refused");
    assert_eq!(v["artifacts"][0]["refusal"]["stage"], "identity");
    assert_eq!(v["routes"]["state"], "refused");
}

#[test]
fn voucher_vouch_and_admit_follow_the_policy() {
    let dir = tmp("trust");
    let _ = std::fs::remove_dir_all(&dir);
    let keys = dir.join("keys");
    let other = dir.join("other");
    for (d, name) in [(&keys, "alice"), (&other, "mallory")] {
        let out = paddock(&["voucher", name, "--dir", d.to_str().unwrap()], None);
        assert!(out.status.success(), "{}", text(&out.stderr));
    }
    let again = paddock(&["voucher", "alice", "--dir", keys.to_str().unwrap()], None);
    assert_eq!(again.status.code(), Some(2), "never overwrites a voucher");
    assert!(text(&again.stderr).contains("alice.vouching-key exists"), "{}", text(&again.stderr));

    let artifact = dir.join("overstay.wasm");
    std::fs::copy(artifact_path("overstay-risk"), &artifact).unwrap();
    let a = artifact.to_str().unwrap();
    let trust = ["--trust", keys.to_str().unwrap()];

    // Unvouched: refused under --trust, admitted without a policy.
    let out = paddock(&[&["admit", a][..], &trust[..]].concat(), None);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        text(&out.stdout).contains("refused: ") && text(&out.stdout).contains("nobody vouched for the artifact"),
        "{}",
        text(&out.stdout)
    );
    assert!(paddock(&["admit", a], None).status.success());

    // Vouched for by a trusted voucher: admitted, and `score` loads it.
    let key = keys.join("alice.vouching-key");
    assert!(paddock(&["vouch", a, "--as", key.to_str().unwrap()], None).status.success());
    assert!(dir.join("overstay.wasm.vouch").exists());
    let out = paddock(&[&["admit", a, "--json"][..], &trust[..]].concat(), None);
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["admitted"], true, "{v}");
    assert_eq!(v["admission"]["admitted_by"], "vouch");
    assert_eq!(v["admission"]["name"], "alice");
    let row = "{\"expected_minutes\": 90, \"plugin_hour\": 9, \"member_overstay_rate\": 0.1, \"site_occupancy\": 0.2, \"weekend\": false, \"fleet\": false}\n";
    let out = paddock(&[&["score", a, "-", "--from", "ndjson"][..], &trust[..]].concat(), Some(row));
    assert!(out.status.success(), "{}", text(&out.stderr));

    // Vouched for by a voucher that is not trusted: refused naming it.
    let mallory = other.join("mallory.vouching-key");
    assert!(paddock(&["vouch", a, "--as", mallory.to_str().unwrap()], None).status.success());
    let out = paddock(&[&["score", a, "-", "--from", "ndjson"][..], &trust[..]].concat(), Some(row));
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("who is not among the trusted vouchers"), "{}", text(&out.stderr));

    // Tampered after vouching: refused naming both digests.
    assert!(paddock(&["vouch", a, "--as", key.to_str().unwrap()], None).status.success());
    let mut bytes = std::fs::read(&artifact).unwrap();
    let last = bytes.len() - 1;
    bytes[last] ^= 1;
    std::fs::write(&artifact, &bytes).unwrap();
    let out = paddock(&[&["admit", a][..], &trust[..]].concat(), None);
    assert_eq!(out.status.code(), Some(1));
    assert!(text(&out.stdout).contains("the vouch is for sha256:"), "{}", text(&out.stdout));

    // A pin admits exactly its digest.
    let digest = paddock_host::Digest::of(&bytes).to_string();
    let _ = std::fs::remove_file(paddock_host::Vouch::path_for(&artifact));
    assert!(paddock(&["admit", a, "--pin", &digest], None).status.success());
    let wrong = paddock_host::Digest::of(b"other").to_string();
    let out = paddock(&["admit", a, "--pin", &wrong], None);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        text(&out.stdout).contains(&format!("the artifact is {digest}, which is not pinned (pinned: {wrong})")),
        "{}",
        text(&out.stdout)
    );
}

#[test]
fn audit_passes_the_example_models_and_reports_the_limits_and_probe() {
    for name in ["charge-minutes", "overstay-risk"] {
        let a = artifact_path(name);
        let out = paddock(&["audit", a.to_str().unwrap()], None);
        let s = text(&out.stdout);
        assert!(out.status.success(), "{s}");
        assert!(s.contains("imports      none"), "{s}");
        assert!(s.contains("deadline     50ms per call"), "{s}");
        assert!(s.contains("40/40 checks passed"), "{s}");
        // No policy was given: the report says trust was not checked, not that it passed.
        assert!(s.contains("trust        unvouched: not checked (no --trust or --pin given)"), "{s}");
        assert!(
            s.contains("verdict: passes its limits and checks; trust was not checked (give --trust or --pin)"),
            "{s}"
        );
        let digest = paddock_host::Digest::of(&std::fs::read(&a).unwrap()).to_string();
        let pinned = text(&paddock(&["audit", a.to_str().unwrap(), "--pin", &digest], None).stdout).to_owned();
        assert!(pinned.contains("trust        pinned") && pinned.contains("verdict: passes\n"), "{pinned}");
        let out = paddock(&["audit", a.to_str().unwrap(), "--json"], None);
        let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
        assert!(v["probe"]["fuel_per_row"].as_f64().unwrap() > 0.0, "{v}");
        assert!(v["probe"]["peak_memory_bytes"].as_u64().unwrap() > 0, "{v}");
        assert_eq!(v["inventory"]["memories"].as_array().unwrap().len(), 1, "{v}");
        assert_eq!(v["violations"].as_array().unwrap().len(), 0);
    }
}

#[test]
fn audit_fails_hostile_and_untrusted_artifacts_naming_why() {
    let dir = tmp("audit");
    std::fs::create_dir_all(&dir).unwrap();
    let checks = dir.join("affine.checks.json");
    std::fs::write(
        &checks,
        r#"{"source": "by hand: y = 2x + 1", "tolerance": {"abs": 0, "rel": 0}, "cases": [{"row": {"x": 1}, "expect": {"y": 3}}]}"#,
    )
    .unwrap();
    let fixture = root().join("tests/fixtures/affine.wat");
    let pack = |mode: u8, out: &str| {
        let params = dir.join(format!("mode{mode}.params"));
        std::fs::write(&params, [mode]).unwrap();
        let out_path = dir.join(out);
        let status = paddock(
            &[
                "pack",
                fixture.to_str().unwrap(),
                "--params",
                params.to_str().unwrap(),
                "--checks",
                checks.to_str().unwrap(),
                "--out",
                out_path.to_str().unwrap(),
                "--no-verify",
            ],
            None,
        );
        assert!(status.status.success(), "{}", text(&status.stderr));
        out_path
    };
    let audit = |path: &Path, extra: &[&str]| {
        let out = paddock(&[&["audit", path.to_str().unwrap()][..], extra].concat(), None);
        assert_eq!(out.status.code(), Some(1), "{}", text(&out.stdout));
        text(&out.stdout)
    };

    let healthy = pack(0, "affine.wasm");
    let ok = paddock(&["audit", healthy.to_str().unwrap()], None);
    assert!(ok.status.success(), "{}", text(&ok.stdout));

    let spinner = pack(1, "spinner.wasm");
    assert!(audit(&spinner, &["--deadline-ms", "20"]).contains("its checks do not run: deadline of 20ms exceeded"));

    let nan = pack(4, "nan.wasm");
    assert!(audit(&nan, &[]).contains(
        "its checks do not run: the answer breaks the contract: row 1, output `y` = NaN: not a finite number"
    ));

    let importer = dir.join("importer.wasm");
    let wat = root().join("tests/hostile/import-made-up-host-function.wat");
    let out = paddock(&["pack", wat.to_str().unwrap(), "--out", importer.to_str().unwrap(), "--no-verify"], None);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let s = audit(&importer, &[]);
    assert!(s.contains("imports      phone-home, read-secrets") && s.contains("- imports `phone-home`"), "{s}");

    let keys = dir.join("keys");
    assert!(paddock(&["voucher", "reviewer", "--dir", keys.to_str().unwrap()], None).status.success());
    let s = audit(&healthy, &["--trust", keys.to_str().unwrap()]);
    assert!(
        s.contains("nobody vouched for the artifact") && s.contains("the policy requires a trusted voucher or a pin"),
        "{s}"
    );
}

#[test]
fn stream_answers_each_line_in_order_and_exits_1_when_one_failed() {
    let store = root().join("target/paddock/store");
    let row = r#""row": {"expected_minutes": 95, "plugin_hour": 18, "site_occupancy": 0.7, "weekend": false, "fleet": false}"#;
    let input = format!(
        "{{\"id\": \"a\", \"model\": \"overstay-risk\", \"context\": {{\"region\": \"north\"}}, {row}}}\nnonsense\n{{\"id\": \"c\", \"model\": \"overstay-risk\", {row}}}\n"
    );
    let out = paddock(&["stream", "--store", store.to_str().unwrap()], Some(&input));
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    let lines: Vec<serde_json::Value> = text(&out.stdout).lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(lines.len(), 3);
    assert_eq!((lines[0]["id"].clone(), lines[0]["answer"]["route"].clone()), ("a".into(), "north".into()));
    assert_eq!(lines[1]["error"]["kind"], "bad_request");
    assert_eq!((lines[2]["id"].clone(), lines[2]["answer"]["route"].clone()), ("c".into(), "default".into()));
    assert!(text(&out.stderr).contains("3 lines: 2 answered, 1 failed"), "{}", text(&out.stderr));
}

#[test]
fn pack_takes_an_onnx_model_with_its_manifest_and_names_what_is_wrong() {
    // The skl2onnx export of an MLPRegressor on scikit-learn's diabetes data
    // (tests/sklearn/export.py, run by `cargo xtask test`).
    let dir = root().join("target/paddock/sklearn");
    let onnx = dir.join("onnx-mlp.onnx");
    assert!(
        onnx.exists(),
        "{} is missing: run `python3 tests/sklearn/export.py target/paddock/sklearn`",
        onnx.display()
    );
    let manifest = dir.join("onnx-mlp.toml");
    let out = tmp("onnx-mlp.wasm");
    let (onnx, manifest, out) = (onnx.to_str().unwrap(), manifest.to_str().unwrap(), out.to_str().unwrap());
    let packed = paddock(&["pack", onnx, "--manifest", manifest, "--out", out], None);
    assert!(packed.status.success(), "{}", text(&packed.stderr));
    assert!(text(&packed.stdout).contains("loads as onnx-mlp 1.0.0"), "{}", text(&packed.stdout));

    let features = ["age", "sex", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6"];
    let csv = format!("{}\n{}\n", features.join(","), ["0.01"; 10].join(","));
    let scored = paddock(&["score", out, "-", "--to", "ndjson"], Some(&csv));
    assert!(scored.status.success(), "{}", text(&scored.stderr));
    let line: serde_json::Value = serde_json::from_str(text(&scored.stdout).lines().next().unwrap()).unwrap();
    assert!(line["progression"].as_f64().is_some_and(f64::is_finite), "{line}");

    let missing = paddock(&["pack", onnx, "--out", out], None);
    assert!(!missing.status.success());
    assert!(text(&missing.stderr).contains("needs its manifest (--manifest FILE)"), "{}", text(&missing.stderr));
    // Told it is a scikit-learn export, the importer says how to pack a
    // graph; the command line shows the flags, not the library's name.
    let forced = paddock(&["pack", onnx, "--format", "sklearn-onnx", "--out", out], None);
    assert!(!forced.status.success());
    let err = text(&forced.stderr);
    assert!(err.contains("pack it as an ONNX graph with a manifest (`--format onnx-graph --manifest FILE`;"), "{err}");
    assert!(!err.contains("InputKind"), "{err}");

    let wrong = tmp("wrong.toml");
    std::fs::write(
        &wrong,
        std::fs::read_to_string(manifest).unwrap().replace("tensor = \"variable\"", "tensor = \"nope\""),
    )
    .unwrap();
    let refused = paddock(&["pack", onnx, "--manifest", wrong.to_str().unwrap(), "--out", out], None);
    assert!(!refused.status.success());
    let err = text(&refused.stderr);
    assert!(err.contains("manifest output `progression`: the graph has no output `nope`"), "{err}");
}

#[test]
fn a_python_guest_scores_only_under_wasi() {
    let py = root().join("target/paddock/artifacts/charge-taper-py.wasm");
    assert!(py.exists(), "{} is missing: run `cargo xtask guests`", py.display());
    let py = py.to_str().unwrap();
    let csv = "charger_kw,battery_kwh,soc_start,soc_target\n11,64,0.2,0.95\n";
    let refused = paddock(&["score", py, "-"], Some(csv));
    assert!(!refused.status.success());
    let err = text(&refused.stderr);
    assert!(err.contains("wasi:cli/stdout@0.2.") && err.contains("WASI policy"), "{err}");
    // The audit says so too, as its first finding.
    let audit = paddock(&["audit", py], None);
    let findings = text(&audit.stdout);
    assert!(findings.contains("needs the WASI policy") && findings.contains("--wasi"), "{findings}");
    let scored = paddock(&["score", "--wasi", py, "-", "--to", "ndjson"], Some(csv));
    assert!(scored.status.success(), "{}", text(&scored.stderr));
    let line: serde_json::Value = serde_json::from_str(text(&scored.stdout).lines().next().unwrap()).unwrap();
    // SciPy's quad gives 398.21580754150… for this row (tests/guests/taper_reference.py, its first row).
    assert!((line["session_minutes"].as_f64().unwrap() - 398.215_807_541_5).abs() < 1e-6, "{line}");
}

/// `paddock serve` on a copy of the demo store's overstay-risk versions,
/// its address read from its first line.
struct Served {
    child: std::process::Child,
    base: String,
}

impl Served {
    fn start(store: &Path, state: &Path) -> Served {
        use std::io::BufRead;
        let mut child = Command::new(env!("CARGO_BIN_EXE_paddock"))
            .args(["serve", "--listen", "127.0.0.1:0", "--usage-every-secs", "1", "--store"])
            .arg(store)
            .arg("--state")
            .arg(state)
            .stdout(std::process::Stdio::piped())
            .stderr(std::process::Stdio::null())
            .spawn()
            .unwrap();
        let mut line = String::new();
        std::io::BufReader::new(child.stdout.take().unwrap()).read_line(&mut line).unwrap();
        let base = line.trim().strip_prefix("listening on ").unwrap_or_else(|| panic!("{line:?}")).to_owned();
        Served { child, base }
    }

    fn score(&self) {
        let body = r#"{"model": "overstay-risk", "rows": [{"expected_minutes": 95, "plugin_hour": 18, "site_occupancy": 0.7, "weekend": false, "fleet": false}]}"#;
        let agent = ureq::Agent::config_builder().http_status_as_error(false).build().new_agent();
        let mut r = agent
            .post(&format!("{}/estimate", self.base))
            .header("content-type", "application/json")
            .send(body)
            .unwrap();
        assert_eq!(r.status().as_u16(), 200, "{}", r.body_mut().read_to_string().unwrap());
    }
}

impl Drop for Served {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// Calls of overstay-risk in a usage file, 0 while there is none.
fn calls_in(state: &Path) -> u64 {
    let Ok(bytes) = std::fs::read(state.join("usage.json")) else { return 0 };
    let saved: serde_json::Value = serde_json::from_slice(&bytes).unwrap();
    saved["usage"]["versions"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|v| v["model"] == "overstay-risk")
        .map(|v| v["calls"].as_u64().unwrap())
        .sum()
}

#[test]
fn a_killed_server_loses_at_most_one_flush_of_usage_and_a_second_one_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    let state = dir.path().join("state");
    let demo = root().join("target/paddock/store/overstay-risk");
    std::fs::create_dir_all(store.join("overstay-risk")).unwrap();
    std::fs::copy(demo.join("1.0.0.wasm"), store.join("overstay-risk/1.0.0.wasm")).unwrap();
    std::fs::write(store.join("routes.toml"), "[models.overstay-risk]\ndefault = \"1.0.0\"\n").unwrap();

    let first = Served::start(&store, &state);
    // A second server on the same state directory is refused, naming the first.
    let second = Command::new(env!("CARGO_BIN_EXE_paddock"))
        .args(["serve", "--listen", "127.0.0.1:0", "--store"])
        .arg(&store)
        .arg("--state")
        .arg(&state)
        .output()
        .unwrap();
    assert_eq!(second.status.code(), Some(2));
    let err = text(&second.stderr);
    assert!(err.contains(&format!("held by process {}", first.child.id())), "{err}");

    for _ in 0..5 {
        first.score();
    }
    // Wait for the flush that carries all five (the server's own event: the
    // file it writes every second), then kill it without a chance to write.
    let (minute, often) = (std::time::Duration::from_secs(60), std::time::Duration::from_millis(20));
    paddock_tests::wait_until("the usage file showing the 5 calls", minute, often, || calls_in(&state) >= 5);
    let mut first = first;
    kill_9(&mut first.child);
    assert_eq!(calls_in(&state), 5);

    // Restarted, the server adds what the file holds: usage accumulates.
    let again = Served::start(&store, &state);
    again.score();
    paddock_tests::wait_until("the restarted server's usage file showing 6 calls", minute, often, || {
        calls_in(&state) >= 6
    });
    assert_eq!(calls_in(&state), 6);
}

/// SIGKILL: the process gets no chance to flush anything.
fn kill_9(child: &mut std::process::Child) {
    // std's `Child::kill` sends SIGKILL on Unix.
    child.kill().unwrap();
    child.wait().unwrap();
}

/// Every message that names another command, checked against what that
/// command does: each step gets the message, then runs the command it
/// names the way it names it.
#[test]
fn every_message_naming_a_command_tells_the_truth() {
    let dir = tempfile::tempdir().unwrap();
    let path = |name: &str| dir.path().join(name);
    let s = |p: &Path| p.to_str().unwrap().to_owned();

    // "this is a core WebAssembly module, not a component: pack it first (`paddock pack`)"
    let core = path("affine-core.wasm");
    std::fs::write(&core, wat::parse_file(root().join("tests/fixtures/affine.wat")).unwrap()).unwrap();
    let out = paddock(&["check", &s(&core)], None);
    assert!(text(&out.stderr).contains("pack it first (`paddock pack`)"), "{}", text(&out.stderr));
    let packed = path("affine.wasm");
    assert!(
        paddock(&["pack", &s(&core), "--params", &s(&write(&path("p"), &[1])), "--out", &s(&packed)], None)
            .status
            .success()
    );
    let out = paddock(&["inspect", &s(&packed)], None);
    assert!(out.status.success(), "the packed module loads: {}", text(&out.stderr));

    // "the paddock-model-trees guest (build it with `cargo xtask build`, or pass --evaluator)"
    let model = root().join("tests/fixtures/stump.json");
    let out = Command::new(env!("CARGO_BIN_EXE_paddock"))
        .args(["pack", &s(&model), "--out", &s(&path("stump.wasm"))])
        .current_dir(dir.path())
        .output()
        .unwrap();
    let err = text(&out.stderr);
    assert!(err.contains("(build it with `cargo xtask build`, or pass --evaluator)"), "{err}");
    let built = root().join("target/paddock/guests/paddock-model-trees.wasm");
    assert!(built.exists(), "`cargo xtask build` leaves the guest at {}", built.display());
    let out = Command::new(env!("CARGO_BIN_EXE_paddock"))
        .args(["pack", &s(&model), "--evaluator", &s(&built), "--out", &s(&path("stump.wasm"))])
        .current_dir(dir.path())
        .output()
        .unwrap();
    assert!(out.status.success(), "with --evaluator it packs: {}", text(&out.stderr));

    // "the demo store is not built yet: run `cargo xtask demo` … (it builds the store into target/paddock/store)"
    let out = paddock(&["demo", "--store", &s(&path("nowhere"))], None);
    assert!(text(&out.stderr).contains("run `cargo xtask demo`"), "{}", text(&out.stderr));
    assert!(root().join("target/paddock/store/routes.toml").exists(), "the demo store is where the message says");

    // "`paddock serve --store S` serves the same store over HTTP"
    let demo = root().join("target/paddock/store");
    let out = paddock(&["demo", "--store", &s(&demo)], None);
    let said = text(&out.stdout);
    let named =
        said.split("`paddock serve --store ").nth(1).and_then(|r| r.split('`').next()).expect("the demo names serve");
    let state = path("serve-state");
    Served::start(Path::new(named), &state).score();

    // A store with a refused artifact: demo says "see `paddock status --store S`", serve warns
    // "see GET /store or `paddock status`"; both name the refused file.
    let store = path("store");
    std::fs::create_dir_all(store.join("overstay-risk")).unwrap();
    let v1 = demo.join("overstay-risk/1.0.0.wasm");
    std::fs::copy(&v1, store.join("overstay-risk/1.0.0.wasm")).unwrap();
    std::fs::copy(&v1, store.join("overstay-risk/9.9.9.wasm")).unwrap();
    std::fs::write(store.join("routes.toml"), "[models.overstay-risk]\ndefault = \"1.0.0\"\n").unwrap();
    let out = paddock(&["demo", "--store", &s(&store)], None);
    let err = text(&out.stderr);
    let named = err.split("(see `paddock ").nth(1).and_then(|r| r.split('`').next()).expect("demo names status");
    let args: Vec<&str> = named.split(' ').collect();
    assert_eq!(args[..2], ["status", "--store"], "{err}");
    let status = paddock(&args, None);
    assert_eq!(status.status.code(), Some(1));
    assert!(text(&status.stdout).contains("9.9.9.wasm"), "{}", text(&status.stdout));
    let served = Served::start(&store, &path("refused-state"));
    let agent = ureq::Agent::config_builder().http_status_as_error(false).build().new_agent();
    let listing = agent.get(&format!("{}/store", served.base)).call().unwrap().body_mut().read_to_string().unwrap();
    assert!(listing.contains("9.9.9.wasm") && listing.contains("refused"), "{listing}");
}

fn write(path: &Path, bytes: &[u8]) -> std::path::PathBuf {
    std::fs::write(path, bytes).unwrap();
    path.to_owned()
}

/// Log lines written to a file (here a pipe) carry no colour codes.
#[test]
fn logs_written_to_a_file_are_plain_text() {
    let store = root().join("target/paddock/store");
    let state = tempfile::tempdir().unwrap();
    std::fs::write(state.path().join("usage.json"), "not json").unwrap();
    let line = r#"{"model": "overstay-risk", "row": {"expected_minutes": 95, "plugin_hour": 18, "site_occupancy": 0.7, "weekend": false, "fleet": false}}"#;
    let out = paddock(
        &["stream", "--store", store.to_str().unwrap(), "--state", state.path().to_str().unwrap()],
        Some(&format!("{line}\n")),
    );
    assert!(out.status.success(), "{}", text(&out.stderr));
    let err = text(&out.stderr);
    assert!(err.contains("WARN the usage file does not parse"), "the bad usage file is logged: {err}");
    assert!(!err.contains('\u{1b}'), "no escape codes in {err:?}");
}

/// Checks recorded with the model file's names (as the notebook helper
/// records them) pack when the overrides rename features and outputs: the
/// checks are renamed with them, and inspect says so. `--name` and
/// `--version` set the contract's name and version over the overrides'.
/// Expected values worked out by hand from tests/fixtures/stump.json.
#[test]
fn pack_renames_the_checks_as_the_overrides_rename_the_contract() {
    let overrides = tmp("rename.toml");
    std::fs::write(
        &overrides,
        "name = \"ignored\"\n[features.arrival_soc]\nname = \"soc_pct\"\n[outputs.value]\nname = \"minutes\"\n",
    )
    .unwrap();
    let checks = tmp("rename.checks.json");
    std::fs::write(
        &checks,
        r#"{"source": "worked out by hand from tests/fixtures/stump.json", "tolerance": {"abs": 0, "rel": 0}, "cases": [
            {"row": {"arrival_soc": 12.5, "kw": 11}, "expect": {"value": 90}},
            {"row": {"arrival_soc": 40, "kw": 11}, "expect": {"value": 45}}]}"#,
    )
    .unwrap();
    let out = tmp("rename.wasm");
    let args = [
        "pack",
        "tests/fixtures/stump.json",
        "--overrides",
        overrides.to_str().unwrap(),
        "--checks",
        checks.to_str().unwrap(),
        "--name",
        "session-minutes",
        "--version",
        "2.1.0",
        "--out",
        out.to_str().unwrap(),
    ];
    let o = paddock(&args, None);
    assert!(o.status.success(), "{}", text(&o.stderr));
    assert!(text(&o.stdout).contains("loads as session-minutes 2.1.0\nchecks: 2/2 passed"), "{}", text(&o.stdout));
    let shown = inspected(&out);
    assert!(
        shown.contains("checks recorded with the file's names, renamed as the overrides rename them (arrival_soc → soc_pct, value → minutes)"),
        "{shown}"
    );
    // The artifact's checks use the contract's names: `check` passes them again.
    let o = paddock(&["check", out.to_str().unwrap()], None);
    assert!(o.status.success(), "{}", text(&o.stdout));
}

/// A trust folder that is not there, or holds no voucher, is named with
/// its cause said once (`admit` prints the refusal on stdout).
#[test]
fn admit_names_a_missing_or_empty_trust_folder_once() {
    let a = artifact_path("charge-minutes");
    let out = paddock(&["admit", a.to_str().unwrap(), "--trust", "/nonexistent-trust"], None);
    assert_eq!(out.status.code(), Some(1));
    let said = text(&out.stdout);
    assert!(said.contains("refused: /nonexistent-trust: No such file or directory (os error 2)\n"), "{said}");
    assert_eq!(said.matches("No such file").count(), 1, "{said}");
    let empty = tempfile::tempdir().unwrap();
    let out = paddock(&["admit", a.to_str().unwrap(), "--trust", empty.path().to_str().unwrap()], None);
    assert!(
        text(&out.stdout).contains("holds no `.voucher` file, so no vouch could be trusted"),
        "{}",
        text(&out.stdout)
    );
}

/// `paddock serve` says at start, on stderr, what it serves (each version
/// and the routes using it) and what it refused, before the address line.
#[test]
fn serve_says_at_start_what_it_serves_and_what_it_refused() {
    use std::io::{BufRead, Read};
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    std::fs::create_dir_all(store.join("overstay-risk")).unwrap();
    let v1 = root().join("target/paddock/store/overstay-risk/1.0.0.wasm");
    std::fs::copy(&v1, store.join("overstay-risk/1.0.0.wasm")).unwrap();
    // A copy filed under another version: its contract says 1.0.0.
    std::fs::copy(&v1, store.join("overstay-risk/9.9.9.wasm")).unwrap();
    std::fs::write(store.join("routes.toml"), "[models.overstay-risk]\ndefault = \"1.0.0\"\n").unwrap();
    let mut child = Command::new(env!("CARGO_BIN_EXE_paddock"))
        .args(["serve", "--listen", "127.0.0.1:0", "--store"])
        .arg(&store)
        .arg("--state")
        .arg(dir.path().join("state"))
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    // The address line comes after the summary: once it is read, the summary is written.
    let mut line = String::new();
    std::io::BufReader::new(child.stdout.take().unwrap()).read_line(&mut line).unwrap();
    assert!(line.starts_with("listening on "), "{line}");
    let _ = child.kill();
    let mut err = String::new();
    child.stderr.take().unwrap().read_to_string(&mut err).unwrap();
    let _ = child.wait();
    assert!(err.contains("serving overstay-risk: 1.0.0 (default)\n"), "{err}");
    assert!(err.contains("refused overstay-risk/9.9.9.wasm: "), "{err}");
    assert!(err.contains("see GET /store or `paddock status` for every artifact"), "{err}");
}

/// A PostgreSQL source's password read from the environment variable its
/// plan names: without it the server refuses the login, and `status` says
/// the query could not be checked and why; with it the query is prepared
/// and checked. The password shows nowhere (a PostgreSQL cluster of our
/// own, `initdb` in a temporary directory).
#[test]
fn a_postgres_password_comes_from_the_environment_and_never_shows() {
    let server = paddock_tests::PostgresServer::start();
    server.execute("CREATE TABLE grid (site text PRIMARY KEY, x float8); INSERT INTO grid VALUES ('a', 3);");
    let dir = tempfile::tempdir().unwrap();
    paddock_tests::line_store(dir.path());
    let plan = format!(
        "[sources.grid]\npostgres = \"{}\"\nquery = \"SELECT site, x FROM grid WHERE site = ANY($1)\"\nkey = \"site\"\npassword_env = \"GRID_DB_PASSWORD\"\n\
         [models.m]\nkeys = [\"site\"]\n[models.m.features]\nx = {{ source = \"grid\", key = \"{{site}}\", field = \"x\", missing = \"fail\" }}\n",
        server.url_without_password()
    );
    std::fs::write(dir.path().join("features.toml"), plan).unwrap();
    let status = |password: Option<&str>| {
        let mut cmd = Command::new(env!("CARGO_BIN_EXE_paddock"));
        cmd.args(["status", "--json", "--store"])
            .arg(dir.path())
            .env_remove("GRID_DB_PASSWORD")
            .env_remove("PGPASSWORD");
        if let Some(p) = password {
            cmd.env("GRID_DB_PASSWORD", p);
        }
        let out = cmd.output().unwrap();
        let shown = format!("{}{}", text(&out.stdout), text(&out.stderr));
        assert!(!shown.contains(paddock_tests::PostgresServer::PASSWORD), "{shown}");
        let status: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap_or_else(|e| panic!("{e}: {shown}"));
        status["features"]["servers"][0].clone()
    };
    let without = status(None);
    assert_eq!(without["kind"], "postgres", "{without}");
    let why = without["unchecked"].as_str().unwrap_or_else(|| panic!("checked without a password? {without}"));
    assert!(why.contains("password"), "{why}");
    let with = status(Some(paddock_tests::PostgresServer::PASSWORD));
    assert_eq!(with["unchecked"], serde_json::Value::Null, "{with}");
    assert_eq!(with["url"].as_str().unwrap(), server.url_without_password());
}

/// A Parquet file in, a Parquet file out: LightGBM's own predictions on
/// scikit-learn's diabetes rows (the fidelity export's checks,
/// tests/imports/export.py), bit for bit, row numbers and ids kept, an
/// absent value (null) scored as the model scores NaN. Then the files it
/// refuses: a column that is not a feature, a nested column — each named.
#[test]
fn score_reads_and_writes_parquet_row_groups() {
    use std::sync::Arc;

    use arrow_array::{ArrayRef, Float64Array, Int64Array, ListArray, RecordBatch};
    use parquet::arrow::ArrowWriter;
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    use parquet::file::properties::WriterProperties;

    let exports = root().join("target/paddock/imports");
    let artifact = tmp("diabetes.paddock");
    let out = paddock(
        &["pack", exports.join("lgb-diabetes-regression.txt").to_str().unwrap(), "--out", artifact.to_str().unwrap()],
        None,
    );
    assert!(out.status.success(), "{}", text(&out.stderr));
    let checks: serde_json::Value =
        serde_json::from_slice(&std::fs::read(exports.join("lgb-diabetes-regression.checks.json")).unwrap()).unwrap();
    let cases = checks["cases"].as_array().unwrap();
    let features: Vec<String> = cases[0]["row"].as_object().unwrap().keys().cloned().collect();
    // Row 3's `bmi` absent: LightGBM's prediction for it is not in the checks, so that row is held to
    // the same model scoring the row from CSV with the cell empty.
    let column = |name: &str| -> ArrayRef {
        Arc::new(Float64Array::from_iter(
            cases.iter().enumerate().map(|(i, c)| c["row"][name].as_f64().filter(|_| i != 2 || name != "bmi")),
        ))
    };
    let mut columns: Vec<(String, ArrayRef)> = features.iter().map(|f| (f.clone(), column(f))).collect();
    columns.push(("patient".into(), Arc::new(Int64Array::from_iter_values(1000..1000 + cases.len() as i64))));
    let write = |path: &Path, columns: Vec<(String, ArrayRef)>| {
        let batch = RecordBatch::try_from_iter(columns).unwrap();
        // Small row groups: the file is read a group (and batch) at a time.
        let props = WriterProperties::builder().set_max_row_group_row_count(Some(100)).build();
        let mut writer =
            ArrowWriter::try_new(std::fs::File::create(path).unwrap(), batch.schema(), Some(props)).unwrap();
        writer.write(&batch).unwrap();
        writer.close().unwrap();
    };
    let input = tmp("diabetes.parquet");
    write(&input, columns.clone());
    let results = tmp("diabetes-scored.parquet");
    let args = ["score", artifact.to_str().unwrap(), input.to_str().unwrap(), "--id", "patient", "--threads", "2"];
    let out = paddock(&[&args[..], &["--batch", "64", "--out", results.to_str().unwrap()]].concat(), None);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(
        text(&out.stderr).contains(&format!("{} rows scored, 0 rows failed", cases.len())),
        "{}",
        text(&out.stderr)
    );
    let reader =
        ParquetRecordBatchReaderBuilder::try_new(std::fs::File::open(&results).unwrap()).unwrap().build().unwrap();
    let (mut rows, mut ids, mut values) = (Vec::new(), Vec::new(), Vec::new());
    for batch in reader {
        let batch = batch.unwrap();
        let names: Vec<&str> = batch.schema_ref().fields().iter().map(|f| f.name().as_str()).collect();
        assert_eq!(names, ["row", "id", "value", "error"]);
        use arrow_array::cast::AsArray;
        rows.extend(batch.column(0).as_primitive::<arrow_array::types::UInt64Type>().values().iter().copied());
        ids.extend(batch.column(1).as_string::<i32>().iter().map(|s| s.unwrap().to_owned()));
        values.extend(batch.column(2).as_primitive::<arrow_array::types::Float64Type>().values().iter().copied());
        assert_eq!(batch.column(3).null_count(), batch.num_rows(), "no errors");
    }
    assert_eq!(rows, (1..=cases.len() as u64).collect::<Vec<_>>());
    assert_eq!(ids[0], "1000");
    for (i, (case, got)) in cases.iter().zip(&values).enumerate().filter(|(i, _)| *i != 2) {
        let want = case["expect"]["value"].as_f64().unwrap();
        assert_eq!(got.to_bits(), want.to_bits(), "row {}: {got} against LightGBM's {want}", i + 1);
    }
    let csv = format!(
        "{}\n{}\n",
        features.join(","),
        features
            .iter()
            .map(|f| if f == "bmi" { String::new() } else { cases[2]["row"][f].to_string() })
            .collect::<Vec<_>>()
            .join(",")
    );
    let out = paddock(&["score", artifact.to_str().unwrap(), "-", "--json"], Some(&csv));
    let line: serde_json::Value = serde_json::from_str(text(&out.stdout).lines().next().unwrap()).unwrap();
    assert_eq!(line["value"].as_f64().unwrap().to_bits(), values[2].to_bits(), "the absent bmi, as CSV scores it");

    // A column that is no feature, and a nested one: refused before any row, each named.
    let out = paddock(&["score", artifact.to_str().unwrap(), input.to_str().unwrap()], None);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("column `patient` is not a feature"), "{}", text(&out.stderr));
    let nested = tmp("nested.parquet");
    let mut with_list = columns;
    with_list.pop();
    let lists = ListArray::from_iter_primitive::<arrow_array::types::Float64Type, _, _>(
        (0..cases.len()).map(|i| Some(vec![Some(i as f64)])),
    );
    with_list.push(("s6".into(), Arc::new(lists)));
    with_list.retain(|(name, array)| name != "s6" || array.data_type().is_nested());
    write(&nested, with_list);
    let out = paddock(&["score", artifact.to_str().unwrap(), nested.to_str().unwrap()], None);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("column `s6`: a column of type List"), "{}", text(&out.stderr));
}
