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
//! | `errors` | counter | failed calls (the model's own failures), label `kind` |
//! | `limit_hits` | counter | calls stopped by a limit, label `limit` |
//! | `fuel` | counter | fuel used (when the runtime meters fuel) |
//! | `call_seconds` | histogram | wall time per call |
//! | `peak_memory_bytes` | gauge | largest linear memory of any instance |
//! | `in_flight` | gauge | calls running now |
//! | `refused_rows` | counter | rows refused before the sandbox (the request's fault), label `kind` |
//! | `rejected_requests` | counter | requests refused before a version was chosen, label `kind` only |
//! | `shadow_compared` | counter | requests a shadow scored and compared |
//! | `shadow_over_tolerance` | counter | values that differed by more than the tolerance |
//! | `shadow_max_abs_diff` | gauge | largest difference seen |
//! | `shadow_dropped` | counter | samples dropped, shadow queue full |
//! | `shadow_errors` | counter | shadow calls that failed, label `kind` |
//! | `lookups` | counter | features of rows looked up, labels `source` and `outcome` (no model labels) |
//! | `source_round_trips` | counter | round trips to a feature server, label `source` only |
//! | `source_timeouts` | counter | round trips not answered within the source's budget, label `source` only |
//! | `source_errors` | counter | round trips that failed, label `source` only |
//! | `source_skipped` | counter | reads not tried while the source's circuit breaker was open, label `source` only |
//! | `source_round_trip_seconds` | histogram | time per round trip, label `source` only |
//! | `generation` | gauge | the registry generation serving (no labels) |
//! | `artifacts` | gauge | artifacts by `state` (no model labels) |

use std::collections::BTreeMap;
use std::fmt::Write;

use super::ledger::{UsageReport, WALL_BUCKETS};
use super::{ArtifactState, Status};
use crate::features::SourceUsage;
use crate::features::counts::LATENCY_BUCKETS;

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

/// A family with one sample per model version (or shadow): its name, type,
/// help, and the sample's value (none: no sample).
type Single<T> = (&'static str, &'static str, &'static str, fn(&T) -> Option<String>);

/// A family with one sample per model version (or shadow) and key of a
/// count map: its name, help, the extra label's name, and the map.
type Keyed<T> = (&'static str, &'static str, &'static str, fn(&T) -> &BTreeMap<String, u64>);

/// Writes `# TYPE` and `# HELP` for a family.
fn declare(out: &mut String, name: &str, kind: &str, help: &str) {
    let _ = writeln!(out, "# TYPE paddock_{name} {kind}\n# HELP paddock_{name} {help}");
}

/// Writes the families of `singles` and `keyed` for `items`, each named by
/// its model and version. Counter samples take the `_total` suffix.
fn families<T>(out: &mut String, items: &[T], id: fn(&T) -> (&str, &str), singles: &[Single<T>], keyed: &[Keyed<T>]) {
    for (name, kind, help, value) in singles {
        declare(out, name, kind, help);
        let suffix = if *kind == "counter" { "_total" } else { "" };
        for item in items {
            if let Some(v) = value(item) {
                let (model, version) = id(item);
                let _ = writeln!(out, "paddock_{name}{suffix}{} {v}", labels(model, version, None));
            }
        }
    }
    for (name, help, label, counts) in keyed {
        declare(out, name, "counter", help);
        for item in items {
            let (model, version) = id(item);
            for (key, n) in counts(item) {
                let _ = writeln!(out, "paddock_{name}_total{} {n}", labels(model, version, Some((label, key))));
            }
        }
    }
}

/// Writes the feature sources' families.
fn sources(out: &mut String, sources: &[SourceUsage]) {
    declare(out, "lookups", "counter", "Features of rows looked up in a source, by outcome.");
    for s in sources {
        for (outcome, n) in &s.lookups {
            let _ =
                writeln!(out, "paddock_lookups_total{{source=\"{}\",outcome=\"{outcome}\"}} {n}", escape(&s.source));
        }
    }
    let servers: Vec<&SourceUsage> = sources.iter().filter(|s| s.kind == crate::features::SourceKind::Redis).collect();
    type Counter = (&'static str, &'static str, fn(&SourceUsage) -> u64);
    let counters: [Counter; 4] = [
        ("source_round_trips", "Round trips to a feature server.", |s| s.round_trips),
        ("source_timeouts", "Round trips to a feature server not answered within the source's budget.", |s| s.timeouts),
        ("source_errors", "Round trips to a feature server that failed.", |s| s.errors),
        ("source_skipped", "Reads of a feature server not tried while its circuit breaker was open.", |s| s.skipped),
    ];
    for (name, help, value) in counters {
        declare(out, name, "counter", help);
        for s in &servers {
            let _ = writeln!(out, "paddock_{name}_total{{source=\"{}\"}} {}", escape(&s.source), value(s));
        }
    }
    declare(
        out,
        "source_round_trip_seconds",
        "histogram",
        "Time per round trip to a feature server, from sending to the answer or giving up.",
    );
    for s in &servers {
        let base = format!("source=\"{}\"", escape(&s.source));
        for (le, count) in LATENCY_BUCKETS.iter().zip(&s.latency_buckets) {
            let _ = writeln!(out, "paddock_source_round_trip_seconds_bucket{{{base},le=\"{}\"}} {count}", num(*le));
        }
        let _ = writeln!(out, "paddock_source_round_trip_seconds_bucket{{{base},le=\"+Inf\"}} {}", s.round_trips);
        let _ = writeln!(out, "paddock_source_round_trip_seconds_count{{{base}}} {}", s.round_trips);
        let _ = writeln!(out, "paddock_source_round_trip_seconds_sum{{{base}}} {}", num(s.latency_sum_seconds));
    }
}

/// Renders the ledger, the feature sources' counters and the registry's
/// state, then `surface`: the families of the surface serving them (whole
/// `# TYPE` … lines, each ending in a newline), before the closing `# EOF`.
pub fn render(usage: &UsageReport, status: &Status, source_usage: &[SourceUsage], surface: &str) -> String {
    let mut out = String::new();
    families(
        &mut out,
        &usage.versions,
        |u| (&u.model, &u.version),
        &[
            ("calls", "counter", "Calls to a model version, successful or not.", |u| Some(u.calls.to_string())),
            ("rows", "counter", "Rows in the calls to a model version.", |u| Some(u.rows.to_string())),
            ("fuel", "counter", "Fuel (WebAssembly instructions, roughly) used by successful calls.", |u| {
                u.fuel.map(|f| f.to_string())
            }),
            ("peak_memory_bytes", "gauge", "Largest linear memory any instance of the version reached.", |u| {
                Some(u.peak_memory_bytes.to_string())
            }),
            ("in_flight", "gauge", "Calls to a model version running now.", |u| Some(u.in_flight.to_string())),
        ],
        &[
            ("errors", "Failed calls to a model version, by kind of error: the model's own failures.", "kind", |u| {
                &u.errors
            }),
            (
                "refused_rows",
                "Rows refused before the sandbox, by kind: the request's fault, not the model's.",
                "kind",
                |u| &u.refused_rows,
            ),
            ("limit_hits", "Calls stopped by a limit, by limit.", "limit", |u| &u.limit_hits),
        ],
    );
    declare(
        &mut out,
        "call_seconds",
        "histogram",
        "Wall time per call, from taking an instance to checking the outputs.",
    );
    for u in &usage.versions {
        let base = format!("model=\"{}\",version=\"{}\"", escape(&u.model), escape(&u.version));
        for (le, count) in WALL_BUCKETS.iter().zip(&u.wall_us.buckets) {
            let _ = writeln!(out, "paddock_call_seconds_bucket{{{base},le=\"{}\"}} {count}", num(*le));
        }
        let _ = writeln!(out, "paddock_call_seconds_bucket{{{base},le=\"+Inf\"}} {}", u.calls);
        let _ = writeln!(out, "paddock_call_seconds_count{{{base}}} {}", u.calls);
        let _ = writeln!(out, "paddock_call_seconds_sum{{{base}}} {}", num(u.wall_us.sum_seconds));
    }
    families(
        &mut out,
        &usage.shadows,
        |s| (&s.model, &s.version),
        &[
            (
                "shadow_compared",
                "counter",
                "Requests a shadow version scored and compared with the served answer.",
                |s| Some(s.compared.to_string()),
            ),
            (
                "shadow_over_tolerance",
                "counter",
                "Output values where the shadow differed from the served answer by more than the tolerance.",
                |s| Some(s.over_tolerance.to_string()),
            ),
            (
                "shadow_max_abs_diff",
                "gauge",
                "Largest absolute difference between a shadow's and the served answer.",
                |s| Some(num(s.max_abs_diff)),
            ),
            ("shadow_dropped", "counter", "Shadow samples dropped because the shadow queue was full.", |s| {
                Some(s.dropped.to_string())
            }),
        ],
        &[("shadow_errors", "Shadow calls that failed, by kind of error.", "kind", |s| &s.errors)],
    );

    declare(&mut out, "rejected_requests", "counter", "Requests refused before a model version was chosen, by kind.");
    for (kind, n) in &usage.rejected {
        let _ = writeln!(out, "paddock_rejected_requests_total{{kind=\"{}\"}} {n}", escape(kind));
    }
    sources(&mut out, source_usage);
    declare(&mut out, "generation", "gauge", "The registry generation serving.");
    let _ = writeln!(out, "paddock_generation {}", status.generation);
    declare(&mut out, "artifacts", "gauge", "Artifacts in the store, by state.");
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
    out.push_str(surface);
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
                in_flight: 0,
                errors: [("trap".to_owned(), 1)].into_iter().collect(),
                refused_rows: BTreeMap::new(),
                limit_hits: BTreeMap::new(),
                fuel: None,
                wall_us: Wall { sum_seconds: 0.5, buckets: vec![1; WALL_BUCKETS.len()], ..Wall::default() },
                peak_memory_bytes: 65536,
            }],
            shadows: vec![],
            rejected: BTreeMap::new(),
        };
        let status = Status {
            store: "s".into(),
            generation: 7,
            since: String::new(),
            artifacts: vec![],
            routes: crate::registry::RoutesState::Missing,
            features: crate::registry::FeaturesState::Missing,
            unrouted: vec![],
        };
        let c = crate::features::SourceCounts::default();
        c.lookup(crate::features::Outcome::Found);
        c.round_trip(crate::features::counts::Ended::TimedOut, std::time::Duration::from_millis(3));
        let sources = [c.report("live \"site\"", crate::features::SourceKind::Redis)];
        let text = render(&usage, &status, &sources, "# TYPE paddock_test_things gauge\npaddock_test_things 3\n");
        assert!(text.contains("paddock_lookups_total{source=\"live \\\"site\\\"\",outcome=\"found\"} 1\n"), "{text}");
        assert!(text.contains("paddock_source_timeouts_total{source=\"live \\\"site\\\"\"} 1\n"), "{text}");
        assert!(
            text.contains("paddock_source_round_trip_seconds_bucket{source=\"live \\\"site\\\"\",le=\"0.0025\"} 0\n"),
            "{text}"
        );
        assert!(
            text.contains("paddock_source_round_trip_seconds_bucket{source=\"live \\\"site\\\"\",le=\"0.005\"} 1\n"),
            "{text}"
        );
        // OpenMetrics 1.0, "ABNF" section: label values escape \ " and newline.
        assert!(text.contains(r#"paddock_calls_total{model="a\"b\\c\nd",version="1.0.0"} 3"#), "{text}");
        assert!(
            text.contains(r#"paddock_call_seconds_bucket{model="a\"b\\c\nd",version="1.0.0",le="+Inf"} 3"#),
            "{text}"
        );
        assert!(text.contains(r#"le="0.0025"} 1"#), "{text}");
        assert!(text.contains("paddock_call_seconds_sum{model=\"a\\\"b\\\\c\\nd\",version=\"1.0.0\"} 0.5"), "{text}");
        assert!(text.contains("paddock_generation 7\n"), "{text}");
        assert!(text.ends_with("paddock_test_things 3\n# EOF\n"), "the surface's own families come last: {text}");
        // Every family is declared once, before its samples.
        assert_eq!(text.matches("# TYPE paddock_calls counter").count(), 1);
    }
}
