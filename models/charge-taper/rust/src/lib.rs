//! charge-taper in Rust: the same model as `../python/charge_taper.py` and
//! `../js/charge-taper.js` (minutes a plug-in session needs to reach its
//! target state of charge, with the car's power taper), line for line, so
//! the three guests can be measured against each other. Its params
//! (`../params.json`) are compiled in; the artifact carries none.

// Built natively (tests, clippy), the guest's export is not compiled in.
#![cfg_attr(not(target_arch = "wasm32"), allow(dead_code))]

use paddock_guest::ndarray::{ArrayView2, ArrayViewMut2};
use paddock_guest::{Bounds, Contract, Estimator, Fault, Feature, Output};
use serde::Deserialize;

#[derive(Deserialize)]
struct Params {
    version: String,
    efficiency: f64,
    taper: Vec<(f64, f64)>,
}

struct Taper(Params);

impl Taper {
    /// Integral of 1 / taper(s) ds over [lo, hi], exact per linear segment.
    fn inverse_integral(&self, lo: f64, hi: f64) -> f64 {
        let mut total = 0.0;
        for w in self.0.taper.windows(2) {
            let ((s0, f0), (s1, f1)) = (w[0], w[1]);
            let (a, b) = (s0.max(lo), s1.min(hi));
            if b <= a {
                continue;
            }
            let slope = (f1 - f0) / (s1 - s0);
            let (fa, fb) = (f0 + slope * (a - s0), f0 + slope * (b - s0));
            total += if slope == 0.0 { (b - a) / fa } else { (fb / fa).ln() / slope };
        }
        total
    }
}

impl Estimator for Taper {
    type Params = ();

    fn init((): ()) -> Result<Self, String> {
        let p: Params =
            serde_json::from_str(include_str!("../../params.json")).map_err(|e| format!("params.json: {e}"))?;
        let rising = p.taper.windows(2).all(|w| w[1].0 > w[0].0 && w[0].1 > 0.0 && w[1].1 > 0.0);
        if p.taper.len() < 2 || p.taper[0].0 != 0.0 || p.taper[p.taper.len() - 1].0 != 1.0 || !rising {
            return Err("taper knots must rise from state of charge 0 to 1, fractions above 0".into());
        }
        Ok(Taper(p))
    }

    fn contract(&self) -> Contract {
        Contract {
            name: "charge-taper".into(),
            version: self.0.version.clone(),
            features: vec![
                Feature::real("charger_kw", Bounds::between(1.0, 350.0))
                    .unit("kW")
                    .about("power the charger can deliver"),
                Feature::real("battery_kwh", Bounds::between(5.0, 250.0)).unit("kWh").about("usable battery capacity"),
                Feature::real("soc_start", Bounds::between(0.0, 1.0)).about("state of charge at plug-in, 0-1"),
                Feature::real("soc_target", Bounds::between(0.0, 1.0)).about("state of charge wanted, 0-1"),
            ],
            outputs: vec![
                Output::new("session_minutes", Bounds::at_least(0.0)).unit("min").about("minutes to reach the target"),
            ],
            about: "Minutes a session needs to reach its target charge, with the car's power taper (Rust guest)."
                .into(),
        }
    }

    fn score(&self, rows: ArrayView2<'_, f64>, mut out: ArrayViewMut2<'_, f64>) -> Result<(), Fault> {
        for (row, mut o) in rows.rows().into_iter().zip(out.rows_mut()) {
            let (kw, kwh, start, target) = (row[0], row[1], row[2], row[3]);
            o[0] = if target <= start {
                0.0
            } else {
                60.0 * kwh / (kw * self.0.efficiency) * self.inverse_integral(start, target)
            };
        }
        Ok(())
    }
}

paddock_guest::export!(Taper);
