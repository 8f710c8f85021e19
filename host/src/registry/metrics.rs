//! The usage ledger and the registry's state in the OpenMetrics text format
//! (the exposition format of the OpenMetrics specification, 1.0), for any
//! scraper that reads it.
//!
//! Families (all prefixed `paddock_`; labels `model` and `version` unless
//! said otherwise):
//!
//! | family | type | what |
//! |---|---|---|
//! | `calls` | counter | calls, successful or not |
//! | `rows` | counter | rows in those calls |
//! | `errors` | counter | failed calls, label `kind` |
//! | `limit_hits` | counter | calls stopped by a limit, label `limit` |
//! | `fuel` | counter | fuel used (when the runtime meters fuel) |
//! | `call_seconds` | histogram | wall time per call |
//! | `peak_memory_bytes` | gauge | largest linear memory of any instance |
//! | `shadow_compared` | counter | requests a shadow scored and compared |
//! | `shadow_over_tolerance` | counter | values that differed by more than the tolerance |
//! | `shadow_max_abs_diff` | gauge | largest difference seen |
//! | `shadow_dropped` | counter | samples dropped, shadow queue full |
//! | `shadow_errors` | counter | shadow calls that failed, label `kind` |
//! | `generation` | gauge | the registry generation serving (no labels) |
//! | `artifacts` | gauge | artifacts by `state` (no model labels) |

use std::collections::BTreeMap;
use std::fmt::Write;

use super::ledger::{UsageReport, WALL_BUCKETS};
use super::{ArtifactState, Status};

/// The media type of the text this module writes.
pub const CONTENT_TYPE: &str = "application/openmetrics-text; version=1.0.0; charset=utf-8";

/// Escapes a label value: backslash, double quote and newline.
fn escape(value: &str) -> String {
    value.replace('\\', "\\\\").replace('"', "\\\"").replace('\n', "\\n")
}

/// Writes `{model="…",version="…"[,key="…"]}`.
fn labels(model: &str, version: &str, extra: Option<(&str, &str)>) -> String {
    let mut s = format!("{{model=\"{}\",version=\"{}\"", escape(model), escape(version));
    if let Some((k, v)) = extra {
        let _ = write!(s, ",{k}=\"{}\"", escape(v));
    }
    s.push('}');
    s
}

/// A float as OpenMetrics writes it.
fn num(v: f64) -> String {
    if v.is_nan() {
        "NaN".into()
    } else if v.is_infinite() {
        if v > 0.0 { "+Inf".into() } else { "-Inf".into() }
    } else {
        format!("{v}")
    }
}

/// Renders the ledger and the registry's state.
pub fn render(usage: &UsageReport, status: &Status) -> String {
    let mut out = String::new();
    let family = |out: &mut String, name: &str, kind: &str, help: &str| {
        let _ = writeln!(out, "# TYPE paddock_{name} {kind}\n# HELP paddock_{name} {help}");
    };
    let v = &usage.versions;

    family(&mut out, "calls", "counter", "Calls to a model version, successful or not.");
    for u in v {
        let _ = writeln!(out, "paddock_calls_total{} {}", labels(&u.model, &u.version, None), u.calls);
    }
    family(&mut out, "rows", "counter", "Rows in the calls to a model version.");
    for u in v {
        let _ = writeln!(out, "paddock_rows_total{} {}", labels(&u.model, &u.version, None), u.rows);
    }
    family(&mut out, "errors", "counter", "Failed calls to a model version, by kind of error.");
    for u in v {
        for (kind, n) in &u.errors {
            let _ = writeln!(out, "paddock_errors_total{} {n}", labels(&u.model, &u.version, Some(("kind", kind))));
        }
    }
    family(&mut out, "limit_hits", "counter", "Calls stopped by a limit, by limit.");
    for u in v {
        for (limit, n) in &u.limit_hits {
            let _ = writeln!(out, "paddock_limit_hits_total{} {n}", labels(&u.model, &u.version, Some(("limit", limit))));
        }
    }
    family(&mut out, "fuel", "counter", "Fuel (WebAssembly instructions, roughly) used by successful calls.");
    for u in v {
        if let Some(f) = u.fuel {
            let _ = writeln!(out, "paddock_fuel_total{} {f}", labels(&u.model, &u.version, None));
        }
    }
    family(&mut out, "call_seconds", "histogram", "Wall time per call, from taking an instance to checking the outputs.");
    for u in v {
        let base = format!("model=\"{}\",version=\"{}\"", escape(&u.model), escape(&u.version));
        for (le, count) in WALL_BUCKETS.iter().zip(&u.wall_us.buckets) {
            let _ = writeln!(out, "paddock_call_seconds_bucket{{{base},le=\"{}\"}} {count}", num(*le));
        }
        let _ = writeln!(out, "paddock_call_seconds_bucket{{{base},le=\"+Inf\"}} {}", u.calls);
        let _ = writeln!(out, "paddock_call_seconds_count{{{base}}} {}", u.calls);
        let _ = writeln!(out, "paddock_call_seconds_sum{{{base}}} {}", num(u.wall_us.sum_seconds));
    }
    family(&mut out, "peak_memory_bytes", "gauge", "Largest linear memory any instance of the version reached.");
    for u in v {
        let _ = writeln!(out, "paddock_peak_memory_bytes{} {}", labels(&u.model, &u.version, None), u.peak_memory_bytes);
    }

    let s = &usage.shadows;
    family(&mut out, "shadow_compared", "counter", "Requests a shadow version scored and compared with the served answer.");
    for u in s {
        let _ = writeln!(out, "paddock_shadow_compared_total{} {}", labels(&u.model, &u.version, None), u.compared);
    }
    family(&mut out, "shadow_over_tolerance", "counter", "Output values where the shadow differed from the served answer by more than the tolerance.");
    for u in s {
        let _ = writeln!(out, "paddock_shadow_over_tolerance_total{} {}", labels(&u.model, &u.version, None), u.over_tolerance);
    }
    family(&mut out, "shadow_max_abs_diff", "gauge", "Largest absolute difference between a shadow's and the served answer.");
    for u in s {
        let _ = writeln!(out, "paddock_shadow_max_abs_diff{} {}", labels(&u.model, &u.version, None), num(u.max_abs_diff));
    }
    family(&mut out, "shadow_dropped", "counter", "Shadow samples dropped because the shadow queue was full.");
    for u in s {
        let _ = writeln!(out, "paddock_shadow_dropped_total{} {}", labels(&u.model, &u.version, None), u.dropped);
    }
    family(&mut out, "shadow_errors", "counter", "Shadow calls that failed, by kind of error.");
    for u in s {
        for (kind, n) in &u.errors {
            let _ = writeln!(out, "paddock_shadow_errors_total{} {n}", labels(&u.model, &u.version, Some(("kind", kind))));
        }
    }

    family(&mut out, "generation", "gauge", "The registry generation serving.");
    let _ = writeln!(out, "paddock_generation {}", status.generation);
    family(&mut out, "artifacts", "gauge", "Artifacts in the store, by state.");
    let mut states: BTreeMap<&str, u64> =
        ["loaded", "refused", "kept_after_refusal", "kept_after_removal"].iter().map(|s| (*s, 0)).collect();
    for a in &status.artifacts {
        let state = match a.state {
            ArtifactState::Loaded => "loaded",
            ArtifactState::Refused { .. } => "refused",
            ArtifactState::KeptAfterRefusal { .. } => "kept_after_refusal",
            ArtifactState::KeptAfterRemoval => "kept_after_removal",
        };
        *states.entry(state).or_default() += 1;
    }
    for (state, n) in states {
        let _ = writeln!(out, "paddock_artifacts{{state=\"{state}\"}} {n}");
    }
    out.push_str("# EOF\n");
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::registry::ledger::{VersionUsage, Wall};

    #[test]
    fn label_values_are_escaped_and_the_text_ends_with_eof() {
        let usage = UsageReport {
            versions: vec![VersionUsage {
                model: "a\"b\\c\nd".into(),
                version: "1.0.0".into(),
                calls: 3,
                rows: 5,
                errors: [("trap".to_owned(), 1)].into_iter().collect(),
                limit_hits: BTreeMap::new(),
                fuel: None,
                wall_us: Wall { sum_seconds: 0.5, buckets: vec![1; WALL_BUCKETS.len()], ..Wall::default() },
                peak_memory_bytes: 65536,
            }],
            shadows: vec![],
        };
        let status = Status {
            store: "s".into(),
            generation: 7,
            since: String::new(),
            artifacts: vec![],
            routes: crate::registry::RoutesState::Missing,
            unrouted: vec![],
        };
        let text = render(&usage, &status);
        // OpenMetrics 1.0, "ABNF" section: label values escape \ " and newline.
        assert!(text.contains(r#"paddock_calls_total{model="a\"b\\c\nd",version="1.0.0"} 3"#), "{text}");
        assert!(text.contains(r#"paddock_call_seconds_bucket{model="a\"b\\c\nd",version="1.0.0",le="+Inf"} 3"#), "{text}");
        assert!(text.contains(r#"le="0.0025"} 1"#), "{text}");
        assert!(text.contains("paddock_call_seconds_sum{model=\"a\\\"b\\\\c\\nd\",version=\"1.0.0\"} 0.5"), "{text}");
        assert!(text.contains("paddock_generation 7\n"), "{text}");
        assert!(text.ends_with("# EOF\n"));
        // Every family is declared once, before its samples.
        assert_eq!(text.matches("# TYPE paddock_calls counter").count(), 1);
    }
}
