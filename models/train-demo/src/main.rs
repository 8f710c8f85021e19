//! Trains the two demo models on simulated sessions and writes, for each,
//! its params blob and its checks:
//!
//! ```text
//! cargo run -p paddock-train-demo -- OUT_DIR
//! ```
//!
//! writes `OUT_DIR/charge-minutes.params`, `OUT_DIR/charge-minutes.checks.json`,
//! `OUT_DIR/overstay-risk.params`, `OUT_DIR/overstay-risk.checks.json`, and
//! the versions of the demo store under `OUT_DIR/store/<model>/<version>.*`
//! (params, checks and the training profile of each),
//! and the tables its features are looked up in (`OUT_DIR/store/tables/`)
//! (params carrying their contract, for the generic `trees` and `linear`
//! guests; see `routes.toml` beside this crate for how they are routed).
//! The sessions are invented (see `simulate.rs`): demo only. The checks'
//! expected values come from evaluating the trained params natively, with
//! the same estimator code the sandbox runs, so a packed artifact that
//! passes them computes what this program computed.

mod boost;

use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use paddock_guest::ndarray::Array2;
use paddock_guest::{Contract, Evaluate, Linear, LinearParams, Link, Packaged, Trees, encode_params};
use paddock_host::artifact::checks::{Case, Checks, Tolerance};
use paddock_host::{Profile, Row, Value};
use rand::SeedableRng;
use smartcore::linalg::basic::arrays::Array;
use smartcore::linalg::basic::matrix::DenseMatrix;
use smartcore::linear::logistic_regression::LogisticRegression;

use paddock_demo_sessions as simulate;
use simulate::Session;

const TRAIN: usize = 20_000;
const CHECKS: usize = 40;

fn main() -> Result<()> {
    let out = PathBuf::from(std::env::args().nth(1).context("usage: paddock-train-demo OUT_DIR")?);
    std::fs::create_dir_all(&out).with_context(|| format!("creating {}", out.display()))?;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2026);
    let train: Vec<Session> = (0..TRAIN).map(|_| simulate::session(&mut rng)).collect();
    let held_out: Vec<Session> = (0..CHECKS).map(|_| simulate::session(&mut rng)).collect();

    let minutes = train_minutes(&train)?;
    let overstay = train_overstay(&train, &minutes)?;

    let source = "paddock-train-demo: native evaluation of the trained params on held-out simulated sessions";
    let minutes_checks = record(&held_out, source, minutes_row, |s| predict(&minutes, &s.minutes_features()));
    let overstay_checks = record(
        &held_out,
        source,
        |s| overstay_row(s, &minutes),
        |s| predict(&overstay, &s.overstay_features(predict(&minutes, &s.minutes_features()))),
    );
    write(&out, "charge-minutes", &encode_params(&minutes.1), &minutes_checks)?;
    write(&out, "overstay-risk", &encode_params(&overstay.1), &overstay_checks)?;
    store_versions(&out.join("store"), &train, &held_out, &minutes)?;
    feature_tables(&out.join("store/tables"))?;
    println!("trained on {TRAIN} simulated sessions; params and checks in {}", out.display());
    Ok(())
}

/// The tables the demo's features are looked up in, as a nightly job of
/// the co-op would write them (invented values: demo only): each site's
/// share of bays in use, each member's share of past sessions that
/// overstayed, and the local grid's load by H3 cell around the sites.
/// Members who joined lately are not in the table yet.
fn feature_tables(dir: &Path) -> Result<()> {
    const UPDATED: &str = "2026-11-30T02:00:00+01:00";
    let sites = [
        ("Harbour Lot", 0.38),
        ("Market Hall", 0.72),
        ("Depot North", 0.22),
        ("Library Green", 0.92),
        ("Station Road", 0.41),
    ];
    let members = [
        ("m-1041", 0.10),
        ("m-0307", 0.45),
        ("m-1877", 0.05),
        ("m-3120", 0.02),
        ("m-0988", 0.30),
        ("m-0012", 0.55),
        ("m-2754", 0.12),
    ];
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let mut csv = String::from("site,occupancy,updated_at\n");
    for (site, occupancy) in sites {
        csv.push_str(&format!("{site},{occupancy},{UPDATED}\n"));
    }
    std::fs::write(dir.join("sites.csv"), csv).context("writing tables/sites.csv")?;
    let mut csv = String::from("member,overstay_rate,updated_at\n");
    for (member, rate) in members {
        csv.push_str(&format!("{member},{rate},{UPDATED}\n"));
    }
    std::fs::write(dir.join("members.csv"), csv).context("writing tables/members.csv")?;
    grid_table(dir, UPDATED)
}

/// The grid operator's load figures (invented: demo only), per H3 cell at
/// resolution 8, for the cell of each site and the ring around it: the
/// share of the local grid's capacity in use. Station Road lies outside
/// the operator's figures, so its lookup finds nothing.
fn grid_table(dir: &Path, updated: &str) -> Result<()> {
    use h3o::{LatLng, Resolution};
    // Positions (degrees) as the plug-in events carry them (cli/src/demo/plugins.csv;
    // Station Road, at 59.872, 10.810, is not among them).
    let sites = [
        ("Harbour Lot", 59.9075, 10.7380, 0.55),
        ("Market Hall", 59.9139, 10.7522, 0.81),
        ("Depot North", 59.9490, 10.7680, 0.34),
        ("Library Green", 59.9210, 10.7345, 0.62),
    ];
    let mut loads = std::collections::BTreeMap::new();
    for (site, lat, lon, base) in sites {
        let at = LatLng::new(lat, lon).with_context(|| format!("{site}'s position"))?;
        let ring: Vec<h3o::CellIndex> = at.to_cell(Resolution::Eight).grid_disk(1);
        for (i, cell) in ring.into_iter().enumerate() {
            let load: f64 = base + 0.02 * (i as f64 - 3.0);
            loads.entry(cell.to_string()).or_insert((load * 100.0).round() / 100.0);
        }
    }
    let mut csv = String::from("cell,load,updated_at\n");
    for (cell, load) in loads {
        csv.push_str(&format!("{cell},{load},{updated}\n"));
    }
    std::fs::write(dir.join("grid.csv"), csv).context("writing tables/grid.csv")
}

/// The demo store's versions. Every one is trained on the same invented
/// sessions, cut or tuned differently, so the versions really differ:
/// - `charge-minutes` 1.0.0 on weekday sessions, 1.1.0 on weekend ones,
///   1.2.0 (the canary) on all with more, slower-learning trees, and
///   2.0.0-rc.1 (the shadow candidate) with deeper trees;
/// - `overstay-risk` 1.0.0 on every session, 1.1.0 refit on a second
///   simulated sample that stands in for the north region's data.
fn store_versions(dir: &Path, train: &[Session], held_out: &[Session], served_minutes: &Trained<Trees>) -> Result<()> {
    let base = boost::Settings { trees: 80, depth: 5, learning_rate: 0.15, min_leaf: 20, bins: 64, lambda: 1.0 };
    let weekday: Vec<Session> = train.iter().filter(|s| !simulate::weekend(s.hour_of_week)).cloned().collect();
    let weekend: Vec<Session> = train.iter().filter(|s| simulate::weekend(s.hour_of_week)).cloned().collect();
    let minutes_versions = [
        ("1.0.0", weekday.as_slice(), base.clone()),
        ("1.1.0", weekend.as_slice(), base.clone()),
        ("1.2.0", train, boost::Settings { trees: 140, learning_rate: 0.1, ..base.clone() }),
        ("2.0.0-rc.1", train, boost::Settings { trees: 60, depth: 7, ..base.clone() }),
    ];
    let source = "paddock-train-demo: native evaluation of the trained params on held-out simulated sessions";
    for (version, sessions, settings) in minutes_versions {
        let mut contract = charge_minutes::contract();
        contract.version = version.into();
        let trained = fit_minutes(sessions, &settings, &contract)?;
        let checks = record(held_out, source, minutes_row, |s| predict(&trained, &s.minutes_features()));
        let profile = profile_of(
            sessions,
            &contract,
            |s| s.minutes_features().to_vec(),
            |s| predict(&trained, &s.minutes_features()),
        )?;
        let packaged = Packaged { contract, params: trained.1 };
        write(&dir.join("charge-minutes"), version, &encode_params(&packaged), &checks)?;
        write_profile(&dir.join("charge-minutes"), version, &profile)?;
    }
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
    let north: Vec<Session> = (0..TRAIN).map(|_| simulate::session(&mut rng)).collect();
    for (version, sessions) in [("1.0.0", train), ("1.1.0", north.as_slice())] {
        let mut contract = overstay_risk::contract();
        contract.version = version.into();
        let trained = train_overstay(sessions, served_minutes)?;
        let checks = record(
            held_out,
            source,
            |s| overstay_row(s, served_minutes),
            |s| predict(&trained, &s.overstay_features(predict(served_minutes, &s.minutes_features()))),
        );
        let profile = profile_of(
            sessions,
            &contract,
            |s| s.overstay_features(predict(served_minutes, &s.minutes_features())).to_vec(),
            |s| predict(&trained, &s.overstay_features(predict(served_minutes, &s.minutes_features()))),
        )?;
        let packaged = Packaged { contract, params: trained.1 };
        write(&dir.join("overstay-risk"), version, &encode_params(&packaged), &checks)?;
        write_profile(&dir.join("overstay-risk"), version, &profile)?;
    }
    Ok(())
}

/// A built estimator with the params it was built from.
type Trained<E> = (E, <E as Evaluate>::Params);

fn predict<E: Evaluate>(model: &Trained<E>, features: &[f64]) -> f64 {
    let rows = Array2::from_shape_vec((1, features.len()), features.to_vec()).expect("one row");
    let mut out = Array2::zeros((1, 1));
    model.0.evaluate(rows.view(), out.view_mut());
    out[[0, 0]]
}

fn train_minutes(train: &[Session]) -> Result<Trained<Trees>> {
    let settings = boost::Settings { trees: 80, depth: 5, learning_rate: 0.15, min_leaf: 20, bins: 64, lambda: 1.0 };
    fit_minutes(train, &settings, &charge_minutes::contract())
}

/// Boosted trees fitted to the logarithm of the minutes, read through the
/// exponential: an estimate is never negative, as the contract's bounds
/// promise, however far a plug-in is from the training sessions.
fn fit_minutes(train: &[Session], settings: &boost::Settings, contract: &Contract) -> Result<Trained<Trees>> {
    let x: Vec<Vec<f64>> = train.iter().map(|s| s.minutes_features().to_vec()).collect();
    let y: Vec<f64> = train.iter().map(|s| s.minutes.ln()).collect();
    let mut params = boost::fit(&x, &y, 8, settings);
    params.link = paddock_guest::OutputLink::Exp;
    let trees = paddock_guest::build_for::<Trees>(contract, params.clone()).map_err(anyhow::Error::msg)?;
    Ok((trees, params))
}

fn train_overstay(train: &[Session], minutes: &Trained<Trees>) -> Result<Trained<Linear>> {
    let raw: Vec<[f64; 7]> =
        train.iter().map(|s| s.overstay_features(predict(minutes, &s.minutes_features()))).collect();
    // Mean imputation for the optional member rate and grid load, then
    // standardise so the optimiser behaves; the scaling is folded back into
    // the coefficients.
    let k = 7;
    let mean: Vec<f64> = (0..k)
        .map(|j| {
            let v: Vec<f64> = raw.iter().map(|r| r[j]).filter(|v| !v.is_nan()).collect();
            v.iter().sum::<f64>() / v.len() as f64
        })
        .collect();
    let filled: Vec<Vec<f64>> =
        raw.iter().map(|r| (0..k).map(|j| if r[j].is_nan() { mean[j] } else { r[j] }).collect()).collect();
    let sd: Vec<f64> = (0..k)
        .map(|j| (filled.iter().map(|r| (r[j] - mean[j]).powi(2)).sum::<f64>() / filled.len() as f64).sqrt().max(1e-12))
        .collect();
    let z: Vec<Vec<f64>> = filled.iter().map(|r| (0..k).map(|j| (r[j] - mean[j]) / sd[j]).collect()).collect();
    let x = DenseMatrix::from_2d_vec(&z).map_err(|e| anyhow::anyhow!("{e}"))?;
    let y: Vec<i32> = train.iter().map(|s| i32::from(s.overstayed)).collect();
    let fit = LogisticRegression::fit(&x, &y, Default::default()).map_err(|e| anyhow::anyhow!("logistic fit: {e}"))?;
    let coef: Vec<f64> = (0..k).map(|j| *fit.coefficients().get((0, j))).collect();
    let intercept = *fit.intercept().get((0, 0));
    let weights: Vec<f64> = (0..k).map(|j| coef[j] / sd[j]).collect();
    let intercept = intercept - (0..k).map(|j| coef[j] * mean[j] / sd[j]).sum::<f64>();
    let params =
        LinearParams { link: Link::Logistic, intercepts: vec![intercept], weights: vec![weights], impute: mean };
    let linear =
        paddock_guest::build_for::<Linear>(&overstay_risk::contract(), params.clone()).map_err(anyhow::Error::msg)?;
    Ok((linear, params))
}

fn opt(v: Option<f64>) -> Value {
    v.map_or(Value::Absent, Value::Number)
}

/// The request row a caller would send for `charge-minutes`.
pub fn minutes_row(s: &Session) -> Row {
    Row::new()
        .with("charger_kw", s.charger_kw)
        .with("battery_kwh", s.battery_kwh)
        .with("soc_start", s.soc_start)
        .with("soc_target", s.soc_target)
        .with("ambient_c", opt(s.ambient_c))
        .with("hour_of_week", s.hour_of_week)
        .with("connector", charge_minutes::CONNECTORS[s.connector])
        .with("fleet", s.fleet)
}

fn overstay_row(s: &Session, minutes: &Trained<Trees>) -> Row {
    Row::new()
        .with("expected_minutes", predict(minutes, &s.minutes_features()))
        .with("plugin_hour", s.hour_of_week % 24)
        .with("member_overstay_rate", opt(s.member_overstay_rate))
        .with("site_occupancy", s.site_occupancy)
        .with("weekend", simulate::weekend(s.hour_of_week))
        .with("fleet", s.fleet)
        .with("grid_load", opt(s.grid_load))
}

fn record(
    sessions: &[Session],
    source: &str,
    row: impl Fn(&Session) -> Row,
    expect: impl Fn(&Session) -> f64,
) -> Checks {
    Checks {
        source: source.to_owned(),
        // The sandbox runs the same code on the same params, so the results
        // are expected bit for bit; 1e-12 relative leaves room only for a
        // different summation order, never for a different model.
        tolerance: Tolerance { abs: 0.0, rel: 1e-12 },
        cases: sessions
            .iter()
            .map(|s| {
                let model = row(s);
                let name = if model.fields().iter().any(|(k, _)| k == "charger_kw") {
                    "minutes"
                } else {
                    "overstay_probability"
                };
                Case { row: model, expect: [(name.to_owned(), expect(s))].into() }
            })
            .collect(),
    }
}

/// The training profile of `sessions` as `contract`'s features (`cells`)
/// and the trained model's answers (`answer`): what `paddock pack
/// --profile` carries so hosts can tell when live plug-ins stop looking
/// like these.
fn profile_of(
    sessions: &[Session],
    contract: &Contract,
    cells: impl Fn(&Session) -> Vec<f64>,
    answer: impl Fn(&Session) -> f64,
) -> Result<Profile> {
    // The guest's contract and the host's are the same WIT record, bound twice.
    let contract: paddock_host::Contract = serde_json::from_value(serde_json::to_value(contract)?)?;
    let cells: Vec<f64> = sessions.iter().flat_map(&cells).collect();
    let values: Vec<f64> = sessions.iter().map(answer).collect();
    let source = format!("paddock-train-demo: {} simulated training sessions (demo only)", sessions.len());
    Ok(Profile::of_rows(&source, &contract, sessions.len(), &cells, &values))
}

fn write_profile(dir: &Path, name: &str, profile: &Profile) -> Result<()> {
    let p = dir.join(format!("{name}.profile.json"));
    std::fs::write(&p, profile.to_json()).with_context(|| format!("writing {}", p.display()))
}

fn write(dir: &Path, name: &str, params: &[u8], checks: &Checks) -> Result<()> {
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let p = dir.join(format!("{name}.params"));
    std::fs::write(&p, params).with_context(|| format!("writing {}", p.display()))?;
    let c = dir.join(format!("{name}.checks.json"));
    std::fs::write(&c, checks.to_json()).with_context(|| format!("writing {}", c.display()))?;
    Ok(())
}
