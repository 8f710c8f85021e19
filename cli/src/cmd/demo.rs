//! `paddock demo`: the built-in demo. Serves the demo store — several
//! versions of two models, and routes — and scores ten invented plug-ins at
//! the EV-charging co-op's sites: `charge-minutes` estimates how long each
//! session charges, and its estimate feeds `overstay-risk`. Each answer
//! says which version produced it and why (the weekend rule, the north
//! region's rule, the 10 % canary by site…); a candidate version runs in
//! the shadow of every `charge-minutes` request. Then simulated plug-ins
//! with bigger batteries than the model trained on show the host's drift
//! report naming that one feature.

use std::collections::HashMap;
use std::path::PathBuf;
use std::time::Duration;

use anyhow::{Context, Result};
use jiff::Timestamp;
use jiff::tz::TimeZone;
use paddock_host::{Model, Row, Runtime};
use paddock_serve::{Registry, Request};
use serde::Serialize;

use crate::Outcome;
use crate::common::{print_json, text_table};
use crate::place::{NatsArgs, Place};

/// The demo plug-ins (invented data).
const PLUGINS: &str = include_str!("../demo/plugins.csv");

const DAYS: [&str; 7] = ["Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun"];

/// The co-op's time zone: `hour_of_week` is local time.
const ZONE: &str = "Europe/Oslo";

/// Serve the demo store and score the built-in EV-charging plug-ins.
#[derive(clap::Args)]
pub struct Args {
    /// The demo store: a directory, or a shared store the demo store was
    /// published to (nats://HOST:PORT/NAME) [default: target/paddock/store of
    /// the paddock clone this binary was built in, as `cargo xtask demo`
    /// assembles it].
    #[arg(long, value_name = "DIR|ADDRESS", value_parser = Place::parse)]
    store: Option<Place>,
    #[command(flatten)]
    nats: NatsArgs,
    /// Print the results as JSON.
    #[arg(long)]
    json: bool,
}

#[derive(Serialize)]
struct Answer {
    site: String,
    region: String,
    member: String,
    plugged_in: String,
    minutes: f64,
    minutes_version: String,
    /// Why that version (structured: `picked_by`, and the rule or canary).
    minutes_reason: std::sync::Arc<paddock_serve::registry::Reason>,
    overstay_probability: f64,
    overstay_version: String,
    overstay_reason: std::sync::Arc<paddock_serve::registry::Reason>,
    /// Why that risk: the baseline and each feature's contribution, in
    /// log-odds (the logistic model's margin).
    overstay_why: Why,
}

/// An estimate's baseline and each feature's contribution to its margin.
#[derive(Serialize)]
struct Why {
    scale: paddock_host::ContributionScale,
    baseline: f64,
    contributions: Vec<(String, f64)>,
}

/// Builds a model's row from named text cells, taking only its features.
fn row_for(model: &Model, cells: &HashMap<String, String>) -> Row {
    model
        .contract()
        .features
        .iter()
        .filter_map(|f| cells.get(&f.name).map(|text| (f.name.clone(), model.schema().value_from_text(&f.name, text))))
        .collect()
}

/// The model version a request would get, to build its row by its contract.
fn routed_model(
    registry: &Registry,
    name: &str,
    context: &paddock_serve::RequestContext,
    at: Timestamp,
) -> Result<Model> {
    let (version, _) =
        registry.route(name, context, Some(at)).with_context(|| format!("the demo store serves no `{name}`"))?;
    registry.model(name, &version).with_context(|| format!("{name} {version} is not loaded"))
}

/// The store to serve: the one given, else the demo store of the clone
/// this binary was built in (found from its own path, so the demo runs from
/// any directory), else the current directory's.
fn demo_store(given: Option<Place>) -> Result<Place> {
    let given = match given {
        Some(Place::Shared(address)) => return Ok(Place::Shared(address)),
        Some(Place::Dir(dir)) => Some(dir),
        None => None,
    };
    let has_routes = |p: &std::path::Path| p.join(paddock_serve::registry::ROUTES_FILE).exists();
    if let Some(store) = given {
        anyhow::ensure!(
            has_routes(&store),
            "{} is not a store with routes: run `cargo xtask demo` in a paddock clone to build the demo store there",
            store.display()
        );
        return Ok(Place::Dir(store));
    }
    // The binary lives in <clone>/target/<profile>/paddock.
    let beside_binary =
        std::env::current_exe().ok().and_then(|exe| Some(exe.parent()?.parent()?.join("paddock/store")));
    let candidates: Vec<PathBuf> = beside_binary.into_iter().chain([PathBuf::from("target/paddock/store")]).collect();
    match candidates.iter().find(|c| has_routes(c)) {
        Some(found) => Ok(Place::Dir(found.clone())),
        None => anyhow::bail!(
            "the demo store is not built yet: run `cargo xtask demo` in the paddock clone (it builds the store into target/paddock/store), or pass --store DIR"
        ),
    }
}

/// Opens the store, scores the plug-ins, prints a table.
pub fn run(args: Args) -> Result<Outcome> {
    let runtime = Runtime::new()?;
    let store = demo_store(args.store.clone())?;
    // The demo shows this run's figures: it keeps no usage file (and so
    // also runs beside a host serving the same store).
    let options = paddock_serve::RegistryOptions { usage_flush: None, ..paddock_serve::RegistryOptions::default() };
    // A shared store is followed through a scratch mirror for this run.
    let opened = crate::place::open(&store, &runtime, options, &args.nats, None, true)?;
    let registry = &opened.registry;
    let refused: Vec<String> = registry.status().problems().map(|a| a.path.display().to_string()).collect();
    anyhow::ensure!(
        refused.is_empty(),
        "the demo store has refused artifacts: {} (see `paddock status --store {}`)",
        refused.join(", "),
        store
    );
    let zone = TimeZone::get(ZONE)?;
    let mut reader = csv::Reader::from_reader(PLUGINS.as_bytes());
    let header = reader.headers()?.clone();
    let mut answers = Vec::new();
    let mut first: Option<(paddock_serve::RequestContext, Timestamp)> = None;
    let mut looked_up: std::collections::BTreeMap<paddock_serve::features::Outcome, usize> =
        std::collections::BTreeMap::new();
    for record in reader.records() {
        let mut cells: HashMap<String, String> =
            header.iter().zip(record?.iter()).map(|(k, v)| (k.to_owned(), v.to_owned())).collect();
        let at: Timestamp =
            cells["plugged_in"].parse().with_context(|| format!("plugged_in {}", cells["plugged_in"]))?;
        let local = zone.to_datetime(at);
        let hour_of_week = i64::from(local.weekday().to_monday_zero_offset()) * 24 + i64::from(local.hour());
        cells.insert("hour_of_week".into(), hour_of_week.to_string());
        // The keys: routes read the site and region; the overstay model's
        // site and member features are looked up by site and member, and
        // the grid's load by the cell the plug-in's position falls in.
        let context: paddock_serve::RequestContext =
            ["site", "region", "member", "lat", "lon"].iter().map(|k| ((*k).to_owned(), cells[*k].clone())).collect();

        first.get_or_insert_with(|| (context.clone(), at));
        let minutes_model = routed_model(registry, "charge-minutes", &context, at)?;
        let rows = [row_for(&minutes_model, &cells)];
        let m = registry.score(&Request::new("charge-minutes", &context, &rows).at(Some(at)))?;
        let minutes = m.estimates.values_at(0)[0];
        cells.insert("expected_minutes".into(), minutes.to_string());
        cells.insert("plugin_hour".into(), local.hour().to_string());
        cells.insert("weekend".into(), paddock_demo_sessions::weekend(hour_of_week).to_string());
        let overstay_model = routed_model(registry, "overstay-risk", &context, at)?;
        let rows = [row_for(&overstay_model, &cells)];
        // Site occupancy and the member's overstay rate are not in the
        // plug-in event: they are looked up by key (the store's features.toml).
        let o = registry
            .score(&Request::new("overstay-risk", &context, &rows).at(Some(at)).every_lookup().with_contributions())?;
        let explained = o.contributions.as_ref().context("contributions were asked for")?;
        let attribution = explained.of(0, 0);
        let names = overstay_model.contract().features.iter().map(|f| f.name.clone());
        let overstay_why = Why {
            scale: explained.scale(0),
            baseline: attribution.baseline,
            contributions: names.zip(attribution.features.iter().copied()).collect(),
        };
        for f in o.lookups.iter().flatten() {
            *looked_up.entry(f.outcome).or_insert(0) += 1;
        }
        answers.push(Answer {
            site: cells["site"].clone(),
            region: cells["region"].clone(),
            member: cells["member"].clone(),
            plugged_in: format!("{} {:02}:{:02}", DAYS[hour_of_week as usize / 24], local.hour(), local.minute()),
            minutes,
            minutes_version: m.version.to_string(),
            minutes_reason: m.reason.clone(),
            overstay_probability: o.estimates.values_at(0)[0],
            overstay_version: o.version.to_string(),
            overstay_reason: o.reason.clone(),
            overstay_why,
        });
    }
    registry.drain_shadows(Duration::from_secs(10));
    let usage = registry.usage();
    let drift = match &first {
        Some((context, at)) => drifted(registry, context, *at)?,
        None => None,
    };
    if args.json {
        #[derive(Serialize)]
        struct Demo<'a> {
            answers: &'a [Answer],
            usage: &'a paddock_serve::registry::UsageReport,
            drift: Option<&'a Drifted>,
        }
        print_json(&Demo { answers: &answers, usage: &usage, drift: drift.as_ref() })?;
        return Ok(Outcome::Ok);
    }
    let rows: Vec<Vec<String>> = answers
        .iter()
        .map(|a| {
            vec![
                a.site.clone(),
                a.region.clone(),
                a.plugged_in.clone(),
                format!("{:.0} min", a.minutes),
                format!("{} · {}", a.minutes_version, a.minutes_reason),
                format!("{:.0} %", a.overstay_probability * 100.0),
                format!("{} · {}", a.overstay_version, a.overstay_reason),
            ]
        })
        .collect();
    outln!("EV-charging co-op demo: estimates at plug-in (models trained on simulated sessions; demo only)")?;
    outln!("times in {ZONE}; store {}\n", store)?;
    out!(
        "{}",
        text_table(&["site", "region", "plug-in", "charging", "answered by", "overstay risk", "answered by"], &rows)
    )?;
    if let Some(first) = answers.first() {
        outln!("\n{}", why_line(first))?;
    }
    for s in &usage.shadows {
        outln!(
            "\nshadow {} {}: {} requests compared, largest difference {:.1} min, {} over the {} min tolerance",
            s.model,
            s.version,
            s.compared,
            s.max_abs_diff,
            s.over_tolerance,
            registry.routes().model(&s.model).and_then(|r| r.shadow()).map_or(0.0, |sh| sh.tolerance)
        )?;
    }
    if !looked_up.is_empty() {
        let count = |o| looked_up.get(&o).copied().unwrap_or(0);
        use paddock_serve::features::Outcome;
        outln!(
            "overstay-risk read site occupancy, member overstay rate and the grid's load around the plug-in's position (H3 cells) from the store's feature sources: {} found, {} missing (members not known yet, a site outside the grid operator's figures: the feature is absent), {} stale",
            count(Outcome::Found),
            count(Outcome::Missing),
            count(Outcome::Stale)
        )?;
    }
    if let Some(d) = &drift {
        outln!("\n{}", drift_part(d))?;
    }
    let status = registry.status();
    outln!(
        "{} versions loaded, each in its own sandbox; `paddock serve --store {store}{}` serves the same store over HTTP",
        status.artifacts.len(),
        if matches!(store, Place::Shared(_)) { " --state DIR" } else { "" }
    )?;
    Ok(Outcome::Ok)
}

/// Simulated plug-ins scored on a version, and its drift report after them.
#[derive(Serialize)]
struct Drifted {
    model: String,
    version: String,
    plugins: usize,
    moved: &'static str,
    by: f64,
    report: paddock_host::DriftReport,
}

/// Weekday plug-ins simulated as the training sessions were, but in a
/// world where every car's battery is 25 kWh bigger, scored on the first
/// plug-in's `charge-minutes` version (the weekday one); its drift report
/// after them. `None` when the version carries no profile.
fn drifted(registry: &Registry, context: &paddock_serve::RequestContext, at: Timestamp) -> Result<Option<Drifted>> {
    use rand::SeedableRng;
    const PLUGINS: usize = 400;
    let (moved, by) = ("battery_kwh", 25.0);
    let model = routed_model(registry, "charge-minutes", context, at)?;
    if model.profile().is_none() {
        return Ok(None);
    }
    let world = paddock_demo_sessions::World::TRAINING.bigger_batteries(by);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2027);
    // The first plug-in is on a weekday: its version learnt from weekday
    // sessions alone, so weekday plug-ins are what it should see.
    let rows: Vec<Row> = std::iter::repeat_with(|| paddock_demo_sessions::session_in(&world, &mut rng))
        .filter(|s| !paddock_demo_sessions::weekend(s.hour_of_week))
        .take(PLUGINS)
        .map(|s| model.schema().decode_row(&s.minutes_features()))
        .collect();
    for chunk in rows.chunks(50) {
        model.score(chunk)?;
    }
    Ok(model.drift().map(|report| Drifted {
        model: model.contract().name.clone(),
        version: model.contract().version.clone(),
        plugins: PLUGINS,
        moved,
        by,
        report,
    }))
}

/// The drift part: each field's index and level, then the bars of those
/// that call for action.
fn drift_part(d: &Drifted) -> String {
    let rows: Vec<Vec<String>> = d
        .report
        .fields
        .iter()
        .map(|f| {
            vec![
                format!("{} {}", f.kind, f.name),
                f.index.map_or("-".into(), |i| format!("{i:.3}")),
                f.level.to_string(),
            ]
        })
        .collect();
    let acting = paddock_host::DriftReport {
        window: d.report.window,
        fields: d.report.fields.iter().filter(|f| f.level == paddock_host::DriftLevel::Act).cloned().collect(),
    };
    format!(
        "drift: {} weekday plug-ins simulated as {} {}'s training sessions were, but with every {} {} kWh bigger \
         (members' cars getting bigger batteries; invented, demo only), scored on it; its drift report says {}\n\n{}{}\n\
         (a high index says the inputs changed, not that the model is wrong; `paddock drift HOST` shows a running host's)",
        d.plugins,
        d.model,
        d.version,
        d.moved,
        d.by,
        d.report.summary(),
        text_table(&["field", "stability index", "level"], &rows),
        crate::bars::drift_text(&acting, "simulated plug-ins"),
    )
}

/// Why the first plug-in's overstay risk is what it is: the features that
/// moved it most, with their signs, in log-odds.
fn why_line(a: &Answer) -> String {
    let mut top: Vec<&(String, f64)> = a.overstay_why.contributions.iter().filter(|(_, v)| *v != 0.0).collect();
    top.sort_by(|x, y| y.1.abs().total_cmp(&x.1.abs()));
    let parts: Vec<String> = top.iter().take(4).map(|(name, v)| format!("{name} {v:+.2}")).collect();
    format!(
        "why {} at {} ({}) has a {:.0} % overstay risk, in log-odds: baseline {:+.2}, {} \
         (contributions describe the model, not what causes an overstay)",
        a.member,
        a.site,
        a.plugged_in,
        a.overstay_probability * 100.0,
        a.overstay_why.baseline,
        parts.join(", ")
    )
}
