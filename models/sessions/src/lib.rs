//! A simulator of charging sessions at the co-op's sites. Invented: it
//! follows the physics loosely (energy over power, slower when cold, slower
//! above 80 %) so the demo models have something plausible to learn. Its
//! numbers are not measurements and must not drive real decisions.
//!
//! The trainer (`paddock-train-demo`) draws its training sessions here; the
//! demo (`paddock demo`) draws plug-ins from a world where the members'
//! cars got bigger batteries, to show drift.

use rand::Rng;
use rand_distr::{Distribution, Normal};

/// One simulated plug-in and how it went.
#[derive(Clone, Debug)]
pub struct Session {
    /// Rated power of the charger (kW).
    pub charger_kw: f64,
    /// Usable battery capacity (kWh).
    pub battery_kwh: f64,
    /// State of charge at plug-in (fraction).
    pub soc_start: f64,
    /// State of charge the driver asked for (fraction).
    pub soc_target: f64,
    /// `None` when the site has no temperature sensor.
    pub ambient_c: Option<f64>,
    /// Hours since Monday 00:00 local time at plug-in.
    pub hour_of_week: i64,
    /// Index into `charge_minutes::CONNECTORS`.
    pub connector: usize,
    /// Whether the car belongs to a fleet account.
    pub fleet: bool,
    /// Minutes until charging stopped.
    pub minutes: f64,
    /// Member's past overstay share; `None` for new members.
    pub member_overstay_rate: Option<f64>,
    /// Share of the site's bays in use at plug-in.
    pub site_occupancy: f64,
    /// Share of the local grid's capacity in use around the site; absent
    /// when the grid operator's figures have no cell there.
    pub grid_load: Option<f64>,
    /// Whether the car stayed plugged in past full.
    pub overstayed: bool,
}

/// Where sessions are drawn: the cars' usable battery sizes (kWh), one of
/// which each car has, give or take 5 %.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct World {
    /// The battery sizes, equally likely.
    pub batteries: [f64; 5],
}

impl World {
    /// The world the demo models were trained in.
    pub const TRAINING: World = World { batteries: [40.0, 58.0, 64.0, 77.0, 100.0] };

    /// This world with every battery `kwh` bigger.
    pub fn bigger_batteries(self, kwh: f64) -> World {
        World { batteries: self.batteries.map(|b| b + kwh) }
    }
}

/// Whether an hour of the week (0 = Monday 00:00) falls on Saturday or Sunday.
pub fn weekend(hour_of_week: i64) -> bool {
    hour_of_week >= 120
}

/// Draws one session in the training world.
pub fn session(rng: &mut impl Rng) -> Session {
    session_in(&World::TRAINING, rng)
}

/// Draws one session in `world`.
pub fn session_in(world: &World, rng: &mut impl Rng) -> Session {
    let normal = |m: f64, s: f64| Normal::new(m, s).expect("valid normal");
    let (charger_kw, connector): (f64, usize) = match rng.random_range(0..10) {
        0..=2 => (7.4, 0),
        3..=5 => (11.0, 0),
        6 => (22.0, 0),
        7 | 8 => (50.0, 1),
        _ => (150.0, if rng.random_bool(0.2) { 2 } else { 1 }),
    };
    let battery_kwh = world.batteries[rng.random_range(0..5)] * rng.random_range(0.95..1.05);
    let fleet = rng.random_bool(0.15);
    let soc_start: f64 = rng.random_range(0.05..0.7);
    let soc_target: f64 = if fleet || rng.random_bool(0.2) { 1.0 } else { rng.random_range(soc_start + 0.1..0.95) };
    let ambient: f64 = normal(12.0, 9.0).sample(rng).clamp(-25.0, 40.0);
    let ambient_c = (!rng.random_bool(0.1)).then_some((ambient * 10.0).round() / 10.0);
    let hour_of_week = rng.random_range(0..168);
    // Cars take at most 11 kW AC; DC power depends on the car.
    let car_dc_kw = battery_kwh * 1.4;
    let mut kw = if connector == 0 { charger_kw.min(11.0) } else { charger_kw.min(car_dc_kw) };
    if ambient < 5.0 {
        kw *= if connector == 0 { 0.92 } else { 0.75 };
    }
    let bulk = (soc_target.min(0.8) - soc_start).max(0.0) * battery_kwh / kw;
    let taper = (soc_target - soc_start.max(0.8)).max(0.0) * battery_kwh / (kw * 0.45);
    let noise = normal(1.0, 0.06).sample(rng).max(0.7);
    let minutes = ((bulk + taper) * 60.0 * noise + 2.0).min(2880.0);
    let member_overstay_rate = (!rng.random_bool(0.25)).then(|| rng.random_range(0.0f64..0.6));
    let site_occupancy = rng.random_range(0.0..1.0);
    let grid_load = (!rng.random_bool(0.1)).then(|| rng.random_range(0.1f64..0.95));
    let hour = hour_of_week % 24;
    let weekend = weekend(hour_of_week);
    let logit = -2.6
        + 0.004 * minutes
        + if (17..=23).contains(&hour) { 0.9 } else { 0.0 }
        + 3.0 * member_overstay_rate.unwrap_or(0.15)
        + 1.2 * site_occupancy
        + 0.9 * grid_load.unwrap_or(0.5)
        - if fleet { 0.8 } else { 0.0 }
        + if weekend { 0.4 } else { 0.0 };
    let overstayed = rng.random_bool(1.0 / (1.0 + (-logit).exp()));
    Session {
        charger_kw,
        battery_kwh: (battery_kwh * 10.0).round() / 10.0,
        soc_start: (soc_start * 100.0).round() / 100.0,
        soc_target: (soc_target * 100.0).round() / 100.0,
        ambient_c,
        hour_of_week,
        connector,
        fleet,
        minutes,
        member_overstay_rate: member_overstay_rate.map(|r| (r * 100.0).round() / 100.0),
        site_occupancy: (site_occupancy * 100.0).round() / 100.0,
        grid_load: grid_load.map(|g| (g * 100.0).round() / 100.0),
        overstayed,
    }
}

impl Session {
    /// Dense features for `charge-minutes`, in its contract order.
    pub fn minutes_features(&self) -> [f64; 8] {
        [
            self.charger_kw,
            self.battery_kwh,
            self.soc_start,
            self.soc_target,
            self.ambient_c.unwrap_or(f64::NAN),
            self.hour_of_week as f64,
            self.connector as f64,
            f64::from(u8::from(self.fleet)),
        ]
    }

    /// Dense features for `overstay-risk`, in its contract order, given the
    /// expected minutes.
    pub fn overstay_features(&self, expected_minutes: f64) -> [f64; 7] {
        [
            expected_minutes,
            (self.hour_of_week % 24) as f64,
            self.member_overstay_rate.unwrap_or(f64::NAN),
            self.site_occupancy,
            f64::from(u8::from(weekend(self.hour_of_week))),
            f64::from(u8::from(self.fleet)),
            self.grid_load.unwrap_or(f64::NAN),
        ]
    }
}
