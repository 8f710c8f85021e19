//! `charge-minutes`: expected minutes a charging session lasts, estimated at
//! plug-in. A boosted tree ensemble; the trees are the artifact's params,
//! written by `models/train-demo` from simulated sessions (invented data,
//! demo only). The contract is written here, by hand, because it is the
//! promise the model makes to the services that call it.

use paddock_guest::{Bounds, Contract, Declared, Feature, Output, Trees};

/// Connector types the co-op's chargers have, in the index order the model sees.
pub const CONNECTORS: [&str; 3] = ["type2", "ccs2", "chademo"];

/// The contract of `charge-minutes`.
pub fn contract() -> Contract {
    Contract {
        name: "charge-minutes".into(),
        version: env!("CARGO_PKG_VERSION").into(),
        about: "Expected minutes from plug-in until charging stops, for the co-op's public chargers. \
                Trained on simulated sessions: demo only."
            .into(),
        features: vec![
            Feature::real("charger_kw", Bounds::between(1.0, 400.0)).unit("kW").about("Rated power of the charger"),
            Feature::real("battery_kwh", Bounds::between(5.0, 250.0))
                .unit("kWh")
                .about("Usable battery capacity of the vehicle"),
            Feature::real("soc_start", Bounds::between(0.0, 1.0)).unit("fraction").about("State of charge at plug-in"),
            Feature::real("soc_target", Bounds::between(0.0, 1.0))
                .unit("fraction")
                .about("State of charge the driver asked for"),
            Feature::real("ambient_c", Bounds::between(-40.0, 50.0))
                .unit("°C")
                .optional()
                .about("Outside temperature at the site; absent when the site has no sensor"),
            Feature::whole("hour_of_week", Bounds::between(0.0, 167.0))
                .unit("h")
                .about("Hours since Monday 00:00 local time at plug-in"),
            Feature::label("connector", &CONNECTORS).about("Connector used"),
            Feature::flag("fleet").about("Vehicle belongs to a fleet account"),
        ],
        outputs: vec![
            Output::new("minutes", Bounds::between(0.0, 2880.0))
                .unit("min")
                .about("Expected minutes until charging stops"),
        ],
    }
}

/// The model: a tree ensemble over the features above; its params are the artifact's.
pub struct ChargeMinutes;

impl Declared for ChargeMinutes {
    type Estimator = Trees;

    fn contract() -> Contract {
        contract()
    }
}

paddock_guest::export!(paddock_guest::Fixed<ChargeMinutes>);
