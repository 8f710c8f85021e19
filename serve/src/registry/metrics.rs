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

use prometheus_client::collector::Collector;
use prometheus_client::encoding::{
    DescriptorEncoder, EncodeLabelValue, EncodeMetric, LabelValueEncoder, MetricEncoder,
};
use prometheus_client::metrics::MetricType;
use prometheus_client::metrics::counter::ConstCounter;
use prometheus_client::metrics::gauge::ConstGauge;

use super::ledger::{ShadowUsage, UsageReport, VersionUsage, WALL_BUCKETS};
use super::{ArtifactState, MirrorState, Status};
use crate::features::SourceUsage;
use crate::features::counts::LATENCY_BUCKETS;

/// The media type of the text this module writes.
pub const CONTENT_TYPE: &str = "application/openmetrics-text; version=1.0.0; charset=utf-8";

/// A family a surface adds of its own (`serve_gates`, `worker_events`…):
/// one sample, no labels.
#[derive(Clone, Debug, PartialEq)]
pub struct SurfaceFamily {
    /// The name after `paddock_` (a counter's sample takes `_total`).
    pub name: &'static str,
    /// What it counts.
    pub help: &'static str,
    /// A counter (else a gauge).
    pub counter: bool,
    /// The value.
    pub value: u64,
}

/// Renders the ledger, the feature sources' counters and the registry's
/// state, then the surface's own families, and the closing `# EOF`.
pub fn render(usage: UsageReport, status: &Status, sources: Vec<SourceUsage>, own: Vec<SurfaceFamily>) -> String {
    let mut artifacts: BTreeMap<&'static str, u64> =
        ["loaded", "refused", "kept_after_refusal", "kept_after_removal"].iter().map(|s| (*s, 0)).collect();
    for a in &status.artifacts {
        let state = match a.state {
            ArtifactState::Loaded => "loaded",
            ArtifactState::Refused { .. } => "refused",
            ArtifactState::KeptAfterRefusal { .. } => "kept_after_refusal",
            ArtifactState::KeptAfterRemoval => "kept_after_removal",
        };
        *artifacts.entry(state).or_default() += 1;
    }
    let mut registry = prometheus_client::registry::Registry::with_prefix("paddock");
    let mirror = status.mirror.clone();
    registry.register_collector(Box::new(Exposition {
        usage,
        sources,
        generation: status.generation,
        artifacts,
        mirror,
        capture: status.capture.as_ref().map(|c| c.counts.clone()),
        own,
        drift: drift_samples(status),
    }));
    let mut out = String::new();
    prometheus_client::encoding::text::encode(&mut out, &registry).expect("writing to a String cannot fail");
    out
}

/// Everything one scrape shows, read at one moment.
#[derive(Debug)]
struct Exposition {
    usage: UsageReport,
    sources: Vec<SourceUsage>,
    generation: u64,
    artifacts: BTreeMap<&'static str, u64>,
    mirror: Option<MirrorState>,
    capture: Option<super::CaptureCounts>,
    own: Vec<SurfaceFamily>,
    drift: DriftSamples,
}

/// Per served version and profiled field: the stability index (once there
/// are enough live values) and the live values counted.
#[derive(Debug, Default)]
struct DriftSamples {
    index: Vec<(Labels, f64)>,
    values: Vec<(Labels, u64)>,
    /// Per feature and cause, its values that were the features plan's fallback.
    fallbacks: Vec<(Labels, u64)>,
}

fn drift_samples(status: &Status) -> DriftSamples {
    let mut out = DriftSamples::default();
    for a in &status.artifacts {
        let (Some(model), Some(version), Some(report)) = (&a.model, &a.version, &a.drift) else { continue };
        for f in &report.fields {
            let l =
                labels(&[("model", model), ("version", &version.to_string()), ("kind", &f.kind), ("field", &f.name)]);
            if let Some(i) = f.index {
                out.index.push((l.clone(), i));
            }
            for (cause, n) in f.fallbacks.by_cause() {
                if n > 0 {
                    let mut with_cause = l.clone();
                    with_cause.push(("cause", Escaped(cause.to_owned())));
                    out.fallbacks.push((with_cause, n));
                }
            }
            out.values.push((l, f.count));
        }
    }
    out
}

/// A label value, escaped as OpenMetrics 1.0 asks (its ABNF: backslash,
/// double quote and newline), which prometheus-client leaves to the caller.
#[derive(Clone, Debug)]
struct Escaped(String);

impl EncodeLabelValue for Escaped {
    fn encode(&self, encoder: &mut LabelValueEncoder<'_>) -> Result<(), std::fmt::Error> {
        use std::fmt::Write as _;
        for c in self.0.chars() {
            match c {
                '\\' => encoder.write_str("\\\\")?,
                '"' => encoder.write_str("\\\"")?,
                '\n' => encoder.write_str("\\n")?,
                c => encoder.write_char(c)?,
            }
        }
        Ok(())
    }
}

type Labels = Vec<(&'static str, Escaped)>;

fn labels(pairs: &[(&'static str, &str)]) -> Labels {
    pairs.iter().map(|&(k, v)| (k, Escaped(v.to_owned()))).collect()
}

/// A family's samples: one per label set.
enum Samples {
    Counter(Vec<(Labels, u64)>),
    Gauge(Vec<(Labels, u64)>),
    GaugeFloat(Vec<(Labels, f64)>),
    /// (labels, sum, count, cumulative counts at each bound).
    Histogram(&'static [f64], Vec<(Labels, f64, u64, Vec<u64>)>),
}

fn family(
    encoder: &mut DescriptorEncoder<'_>,
    name: &str,
    help: &str,
    samples: Samples,
) -> Result<(), std::fmt::Error> {
    let kind = match &samples {
        Samples::Counter(_) => MetricType::Counter,
        Samples::Gauge(_) | Samples::GaugeFloat(_) => MetricType::Gauge,
        Samples::Histogram(..) => MetricType::Histogram,
    };
    let mut metric = encoder.encode_descriptor(name, help, None, kind)?;
    // A family of one sample without labels is written as `name value`.
    match &samples {
        Samples::Counter(s) if s.len() == 1 && s[0].0.is_empty() => return ConstCounter::new(s[0].1).encode(metric),
        Samples::Gauge(s) if s.len() == 1 && s[0].0.is_empty() => return ConstGauge::new(s[0].1 as i64).encode(metric),
        Samples::GaugeFloat(s) if s.len() == 1 && s[0].0.is_empty() => return ConstGauge::new(s[0].1).encode(metric),
        _ => {}
    }
    let one =
        |metric: &mut MetricEncoder<'_>, l: &Labels, f: &dyn Fn(MetricEncoder<'_>) -> Result<(), std::fmt::Error>| {
            f(metric.encode_family(l)?)
        };
    match samples {
        Samples::Counter(s) => {
            for (l, v) in &s {
                one(&mut metric, l, &|m| ConstCounter::new(*v).encode(m))?;
            }
        }
        Samples::Gauge(s) => {
            for (l, v) in &s {
                one(&mut metric, l, &|m| ConstGauge::new(*v as i64).encode(m))?;
            }
        }
        Samples::GaugeFloat(s) => {
            for (l, v) in &s {
                one(&mut metric, l, &|m| ConstGauge::new(*v).encode(m))?;
            }
        }
        Samples::Histogram(bounds, s) => {
            for (l, sum, count, cumulative) in &s {
                // prometheus-client takes each bucket's own count, +Inf last.
                let mut buckets = Vec::with_capacity(bounds.len() + 1);
                let mut below = 0;
                for (&le, &c) in bounds.iter().zip(cumulative) {
                    buckets.push((le, c.saturating_sub(below)));
                    below = below.max(c);
                }
                buckets.push((f64::MAX, count.saturating_sub(below)));
                let mut m = metric.encode_family(l)?;
                m.encode_histogram::<prometheus_client::encoding::NoLabelSet>(*sum, *count, &buckets, None)?;
            }
        }
    }
    Ok(())
}

fn version_labels(u: &VersionUsage) -> Labels {
    labels(&[("model", &u.model), ("version", &u.version.to_string())])
}

fn shadow_labels(s: &ShadowUsage) -> Labels {
    labels(&[("model", &s.model), ("version", &s.version.to_string())])
}

/// One sample per item and key of a count map, the key as label `key`.
fn keyed<T>(items: &[T], id: fn(&T) -> Labels, key: &'static str, map: fn(&T) -> &BTreeMap<String, u64>) -> Samples {
    let mut out = Vec::new();
    for item in items {
        for (k, n) in map(item) {
            let mut l = id(item);
            l.push((key, Escaped(k.clone())));
            out.push((l, *n));
        }
    }
    Samples::Counter(out)
}

impl Collector for Exposition {
    fn encode(&self, mut e: DescriptorEncoder<'_>) -> Result<(), std::fmt::Error> {
        let v = &self.usage.versions;
        let per = |f: fn(&VersionUsage) -> u64| v.iter().map(|u| (version_labels(u), f(u))).collect::<Vec<_>>();
        family(&mut e, "calls", "Calls to a model version, successful or not.", Samples::Counter(per(|u| u.calls)))?;
        family(&mut e, "rows", "Rows in the calls to a model version.", Samples::Counter(per(|u| u.rows)))?;
        let fuel = v.iter().filter_map(|u| u.fuel.map(|f| (version_labels(u), f))).collect();
        family(
            &mut e,
            "fuel",
            "Fuel (WebAssembly instructions, roughly) used by successful calls.",
            Samples::Counter(fuel),
        )?;
        family(
            &mut e,
            "peak_memory_bytes",
            "Largest linear memory any instance of the version reached.",
            Samples::Gauge(per(|u| u.peak_memory_bytes)),
        )?;
        family(&mut e, "in_flight", "Calls to a model version running now.", Samples::Gauge(per(|u| u.in_flight)))?;
        family(
            &mut e,
            "errors",
            "Failed calls to a model version, by kind of error: the model's own failures.",
            keyed(v, version_labels, "kind", |u| &u.errors),
        )?;
        family(
            &mut e,
            "refused_rows",
            "Rows refused before the sandbox, by kind: the request's fault, not the model's.",
            keyed(v, version_labels, "kind", |u| &u.refused_rows),
        )?;
        family(
            &mut e,
            "limit_hits",
            "Calls stopped by a limit, by limit.",
            keyed(v, version_labels, "limit", |u| &u.limit_hits),
        )?;
        let wall =
            v.iter().map(|u| (version_labels(u), u.wall_us.sum_seconds, u.calls, u.wall_us.buckets.clone())).collect();
        family(
            &mut e,
            "call_seconds",
            "Wall time per call, from taking an instance to checking the outputs.",
            Samples::Histogram(&WALL_BUCKETS, wall),
        )?;
        self.shadows(&mut e)?;
        let rejected = self.usage.rejected.iter().map(|(k, n)| (labels(&[("kind", k)]), *n)).collect();
        family(
            &mut e,
            "rejected_requests",
            "Requests refused before a model version was chosen, by kind.",
            Samples::Counter(rejected),
        )?;
        self.feature_sources(&mut e)?;
        family(
            &mut e,
            "drift_index",
            "Population Stability Index of a field's live values against the training profile, per served version.",
            Samples::GaugeFloat(self.drift.index.clone()),
        )?;
        family(
            &mut e,
            "drift_values",
            "Live values of a profiled field counted in the drift window.",
            Samples::Gauge(self.drift.values.clone()),
        )?;
        family(
            &mut e,
            "drift_fallbacks",
            "Live values of a feature in the drift window that were the features plan's fallback, by cause.",
            Samples::Gauge(self.drift.fallbacks.clone()),
        )?;
        family(
            &mut e,
            "generation",
            "The registry generation serving.",
            Samples::Gauge(vec![(Vec::new(), self.generation)]),
        )?;
        let states = self.artifacts.iter().map(|(s, n)| (labels(&[("state", s)]), *n)).collect();
        family(&mut e, "artifacts", "Artifacts in the store, by state.", Samples::Gauge(states))?;
        if let Some(m) = &self.mirror {
            mirror_families(&mut e, m)?;
        }
        if let Some(c) = &self.capture {
            let outcomes = [
                ("written", c.written),
                ("dropped_queue_full", c.dropped_queue_full),
                ("dropped_too_long", c.dropped_too_long),
                ("lost_write_failed", c.lost_write_failed),
            ];
            let samples = outcomes.iter().map(|(o, n)| (labels(&[("outcome", o)]), *n)).collect();
            family(
                &mut e,
                "capture_lines",
                "Requests sampled for capture, by what became of their line.",
                Samples::Counter(samples),
            )?;
        }
        for f in &self.own {
            let sample = vec![(Vec::new(), f.value)];
            family(&mut e, f.name, f.help, if f.counter { Samples::Counter(sample) } else { Samples::Gauge(sample) })?;
        }
        Ok(())
    }
}

/// A shared store's mirror: how far it has caught up.
fn mirror_families(e: &mut DescriptorEncoder<'_>, m: &MirrorState) -> Result<(), std::fmt::Error> {
    let one = |v: u64| Samples::Gauge(vec![(Vec::new(), v)]);
    family(e, "store_revision", "The shared store's revision this host's mirror has applied.", one(m.revision))?;
    family(e, "store_latest_revision", "The shared store's latest revision, as last seen.", one(m.latest))?;
    family(
        e,
        "store_connected",
        "1 while the host is connected to the shared store's server.",
        one(u64::from(m.connected)),
    )?;
    let stale = m
        .stale_since
        .as_deref()
        .and_then(|s| s.parse::<jiff::Timestamp>().ok())
        .map_or(0.0, |t| jiff::Timestamp::now().duration_since(t).as_secs_f64().max(0.0));
    family(
        e,
        "store_stale_seconds",
        "Seconds since the mirror may have fallen behind the shared store (0 while up to date).",
        Samples::GaugeFloat(vec![(Vec::new(), stale)]),
    )?;
    family(
        e,
        "store_sync_problems",
        "Entries of the shared store the mirror refused (digest mismatch, over the size cap, missing object).",
        one(m.problems.len() as u64),
    )
}

impl Exposition {
    fn shadows(&self, e: &mut DescriptorEncoder<'_>) -> Result<(), std::fmt::Error> {
        let s = &self.usage.shadows;
        let per = |f: fn(&ShadowUsage) -> u64| s.iter().map(|x| (shadow_labels(x), f(x))).collect::<Vec<_>>();
        family(
            e,
            "shadow_compared",
            "Requests a shadow version scored and compared with the served answer.",
            Samples::Counter(per(|x| x.compared)),
        )?;
        family(
            e,
            "shadow_over_tolerance",
            "Output values where the shadow differed from the served answer by more than the tolerance.",
            Samples::Counter(per(|x| x.over_tolerance)),
        )?;
        family(
            e,
            "shadow_max_abs_diff",
            "Largest absolute difference between a shadow's and the served answer.",
            Samples::GaugeFloat(s.iter().map(|x| (shadow_labels(x), x.max_abs_diff)).collect()),
        )?;
        family(
            e,
            "shadow_dropped",
            "Shadow samples dropped because the shadow queue was full.",
            Samples::Counter(per(|x| x.dropped)),
        )?;
        family(
            e,
            "shadow_errors",
            "Shadow calls that failed, by kind of error.",
            keyed(s, shadow_labels, "kind", |x| &x.errors),
        )
    }

    fn feature_sources(&self, e: &mut DescriptorEncoder<'_>) -> Result<(), std::fmt::Error> {
        let mut lookups = Vec::new();
        for s in &self.sources {
            for (outcome, n) in &s.lookups {
                lookups.push((labels(&[("source", &s.source), ("outcome", outcome)]), *n));
            }
        }
        family(e, "lookups", "Features of rows looked up in a source, by outcome.", Samples::Counter(lookups))?;
        let servers: Vec<&SourceUsage> =
            self.sources.iter().filter(|s| s.kind != crate::features::SourceKind::Table).collect();
        type Count = (&'static str, &'static str, fn(&SourceUsage) -> u64);
        let counters: [Count; 4] = [
            ("source_round_trips", "Round trips to a feature server.", |s| s.round_trips),
            ("source_timeouts", "Round trips to a feature server not answered within the source's budget.", |s| {
                s.timeouts
            }),
            ("source_errors", "Round trips to a feature server that failed.", |s| s.errors),
            ("source_skipped", "Reads of a feature server not tried while its circuit breaker was open.", |s| {
                s.skipped
            }),
        ];
        for (name, help, value) in counters {
            let samples = servers.iter().map(|s| (labels(&[("source", &s.source)]), value(s))).collect();
            family(e, name, help, Samples::Counter(samples))?;
        }
        let times = servers
            .iter()
            .map(|s| {
                (labels(&[("source", &s.source)]), s.latency_sum_seconds, s.round_trips, s.latency_buckets.clone())
            })
            .collect();
        family(
            e,
            "source_round_trip_seconds",
            "Time per round trip to a feature server, from sending to the answer or giving up.",
            Samples::Histogram(&LATENCY_BUCKETS, times),
        )
    }
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
                version: semver::Version::new(1, 0, 0),
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
        let status = empty_status(7, None);
        let c = crate::features::SourceCounts::default();
        c.lookup(crate::features::Outcome::Found);
        c.round_trip(crate::features::counts::Ended::TimedOut, std::time::Duration::from_millis(3));
        let sources = [c.report("live \"site\"", crate::features::SourceKind::Redis)];
        let own = vec![SurfaceFamily { name: "test_things", help: "Things.", counter: false, value: 3 }];
        let text = render(usage, &status, sources.to_vec(), own);
        assert!(text.contains("paddock_lookups_total{source=\"live \\\"site\\\"\",outcome=\"found\"} 1\n"), "{text}");
        assert!(text.contains("paddock_source_timeouts_total{source=\"live \\\"site\\\"\"} 1\n"), "{text}");
        assert!(
            text.contains("paddock_source_round_trip_seconds_bucket{le=\"0.0025\",source=\"live \\\"site\\\"\"} 0\n"),
            "{text}"
        );
        assert!(
            text.contains("paddock_source_round_trip_seconds_bucket{le=\"0.005\",source=\"live \\\"site\\\"\"} 1\n"),
            "{text}"
        );
        // OpenMetrics 1.0, "ABNF" section: label values escape \ " and newline.
        assert!(text.contains(r#"paddock_calls_total{model="a\"b\\c\nd",version="1.0.0"} 3"#), "{text}");
        assert!(
            text.contains(r#"paddock_call_seconds_bucket{le="+Inf",model="a\"b\\c\nd",version="1.0.0"} 3"#),
            "{text}"
        );
        assert!(
            text.contains(r#"paddock_call_seconds_bucket{le="0.0025",model="a\"b\\c\nd",version="1.0.0"} 1"#),
            "{text}"
        );
        assert!(text.contains("paddock_call_seconds_sum{model=\"a\\\"b\\\\c\\nd\",version=\"1.0.0\"} 0.5"), "{text}");
        assert!(text.contains("paddock_generation 7\n"), "{text}");
        assert!(text.ends_with("paddock_test_things 3\n# EOF\n"), "the surface's own families come last: {text}");
        // Every family is declared once, before its samples.
        assert_eq!(text.matches("# TYPE paddock_calls counter").count(), 1);
    }

    /// The status of a store with nothing in it.
    fn empty_status(generation: u64, mirror: Option<MirrorState>) -> Status {
        Status {
            store: "s".into(),
            generation,
            since: String::new(),
            artifacts: vec![],
            routes: crate::registry::RoutesState::Missing,
            limits: crate::registry::LimitsState::Missing,
            features: crate::registry::FeaturesState::Missing,
            unrouted: vec![],
            mirror,
            capture: None,
        }
    }

    #[test]
    fn a_mirror_says_how_far_it_has_caught_up() {
        let mut mirror = MirrorState::new("nats://127.0.0.1:4222/ev".into());
        (mirror.revision, mirror.latest, mirror.connected) = (5, 7, true);
        let status = empty_status(2, Some(mirror));
        let text = render(UsageReport::default(), &status, vec![], vec![]);
        for line in [
            "paddock_store_revision 5\n",
            "paddock_store_latest_revision 7\n",
            "paddock_store_connected 1\n",
            "paddock_store_stale_seconds 0.0\n",
            "paddock_store_sync_problems 0\n",
        ] {
            assert!(text.contains(line), "{line} in {text}");
        }
    }
}
