//! The NDJSON stream: mixed good and bad lines, answers in input order, ids
//! echoed, and the stream going on after every kind of bad line.

use std::path::Path;

use paddock_host::Runtime;
use paddock_serve::registry::artifact_path;
use paddock_serve::surface::stream::{self, StreamOptions, StreamSummary};
use paddock_serve::{Registry, RegistryOptions};
use paddock_tests::{line_artifact, write_atomically};
use semver::Version;

fn registry(dir: &Path) -> Registry {
    for (v, slope) in [("1.0.0", 2.0), ("2.0.0", 3.0)] {
        write_atomically(
            &artifact_path(dir, "m", &Version::parse(v).unwrap()),
            &line_artifact("m", v, slope, 1.0, None),
        );
    }
    let routes = "[models.m]\ndefault = \"1.0.0\"\n[[models.m.rules]]\nname = \"north\"\nversion = \"2.0.0\"\ncontext = { region = \"north\" }\n";
    write_atomically(&dir.join("routes.toml"), routes.as_bytes());
    Registry::open(&Runtime::new().unwrap(), dir, RegistryOptions::default()).unwrap()
}

#[test]
fn mixed_good_and_bad_lines_get_answers_in_order() {
    let dir = tempfile::tempdir().unwrap();
    let reg = registry(dir.path());
    let long = format!("{{\"model\": \"m\", \"row\": {{\"x\": 1}}, \"id\": \"{}\"}}", "z".repeat(300));
    let input = [
        r#"{"id": 1, "model": "m", "row": {"x": 1}}"#,
        r#"{"id": 2, "model": "m", "context": {"region": "north"}, "rows": [{"x": 1}, {"x": 2}]}"#,
        "not json at all",
        "",
        r#"{"id": "four", "model": "nope", "row": {"x": 1}}"#,
        r#"{"id": 5, "model": "m", "row": {"x": "seven"}}"#,
        r#"{"id": 6, "model": "m", "row": {"x": 1}, "rows": [{"x": 1}]}"#,
        r#"{"id": 7, "model": "m", "row": {"x": 1}, "colour": "red"}"#,
        long.as_str(),
        r#"{"id": 9, "model": "m", "row": {"x": 4}, "at": "2026-12-05T08:27:00+01:00"}"#,
        r#"{"id": 10, "model": "m", "row": {"x": 1}, "at": "soon"}"#,
    ]
    .join("\n");
    let mut out = Vec::new();
    let summary = stream::run(&reg, input.as_bytes(), &mut out, StreamOptions { max_line_bytes: 256 }).unwrap();
    assert_eq!(summary, StreamSummary { lines: 10, answered: 3, failed: 7 });
    let lines: Vec<serde_json::Value> =
        String::from_utf8(out).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(lines.len(), 10);
    // Output order is input order: line numbers only grow (the blank line 4 gets no answer).
    let numbers: Vec<u64> = lines.iter().map(|l| l["line"].as_u64().unwrap()).collect();
    assert_eq!(numbers, vec![1, 2, 3, 5, 6, 7, 8, 9, 10, 11]);
    let kind = |i: usize| lines[i]["error"]["kind"].as_str().unwrap_or("-").to_owned();

    assert_eq!(lines[0]["id"], 1);
    assert_eq!(lines[0]["answer"]["estimates"], serde_json::json!([{"y": 3.0}]));
    assert_eq!(lines[1]["answer"]["version"], "2.0.0");
    assert_eq!(lines[1]["answer"]["route"], "north");
    assert_eq!(lines[1]["answer"]["estimates"], serde_json::json!([{"y": 4.0}, {"y": 7.0}]));
    assert_eq!(kind(2), "bad_request");
    assert_eq!((lines[3]["id"].clone(), kind(3)), ("four".into(), "unknown_model".into()));
    assert_eq!(kind(4), "invalid_rows");
    assert_eq!(lines[4]["error"]["rows"][0]["feature"], "x");
    assert_eq!(kind(5), "bad_request");
    assert!(lines[5]["error"]["message"].as_str().unwrap().contains("not both"));
    assert_eq!((lines[6]["id"].clone(), kind(6)), (7.into(), "bad_request".into()));
    assert_eq!(kind(7), "too_large");
    assert_eq!(lines[8]["answer"]["estimates"], serde_json::json!([{"y": 9.0}]));
    assert_eq!(kind(9), "bad_request");
}

/// A line asking for contributions gets them, from the version its route
/// picked (2.0.0 in the north: y = 3x + 1, so x = 2 contributes 6 on the
/// baseline 1, by hand).
#[test]
fn a_line_may_ask_for_contributions() {
    let dir = tempfile::tempdir().unwrap();
    let reg = registry(dir.path());
    let input = r#"{"model": "m", "context": {"region": "north"}, "row": {"x": 2}, "contributions": true}"#;
    let mut out = Vec::new();
    stream::run(&reg, input.as_bytes(), &mut out, StreamOptions::default()).unwrap();
    let line: serde_json::Value = serde_json::from_slice(&out).unwrap();
    assert_eq!(
        line["answer"]["contributions"],
        serde_json::json!([{"y": {"scale": "output", "baseline": 1.0, "margin": 7.0, "features": {"x": 6.0}}}])
    );
}
