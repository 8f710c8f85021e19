//! `overstay-risk`: probability that a car stays plugged in after charging
//! has finished, estimated at plug-in. Logistic regression; the coefficients
//! are the artifact's params, written by `models/train-demo` from simulated
//! sessions (invented data, demo only).

use paddock_guest::{Bounds, Contract, Declared, Feature, Linear, Output};

/// The contract of `overstay-risk`.
pub fn contract() -> Contract {
    Contract {
        name: "overstay-risk".into(),
        version: env!("CARGO_PKG_VERSION").into(),
        about: "Probability that the car stays plugged in past full charge. \
                Trained on simulated sessions: demo only."
            .into(),
        features: vec![
            Feature::real("expected_minutes", Bounds::between(0.0, 2880.0))
                .unit("min")
                .about("Expected charging minutes (from charge-minutes)"),
            Feature::whole("plugin_hour", Bounds::between(0.0, 23.0)).unit("h").about("Local hour of day at plug-in"),
            Feature::real("member_overstay_rate", Bounds::between(0.0, 1.0))
                .unit("fraction")
                .optional()
                .about("Share of the member's past sessions that overstayed; absent for new members"),
            Feature::real("site_occupancy", Bounds::between(0.0, 1.0))
                .unit("fraction")
                .about("Share of the site's bays in use at plug-in"),
            Feature::flag("weekend").about("Plug-in on Saturday or Sunday"),
            Feature::flag("fleet").about("Vehicle belongs to a fleet account"),
            Feature::real("grid_load", Bounds::between(0.0, 1.0)).unit("fraction").optional().about(
                "Mean share of the local grid's capacity in use around the site (its grid cell and the ring about it)",
            ),
        ],
        outputs: vec![
            Output::new("overstay_probability", Bounds::between(0.0, 1.0))
                .unit("probability")
                .about("Probability of staying plugged in past full"),
        ],
    }
}

/// The model: logistic regression over the features above; its params are the artifact's.
pub struct OverstayRisk;

impl Declared for OverstayRisk {
    type Estimator = Linear;

    fn contract() -> Contract {
        contract()
    }
}

paddock_guest::export!(paddock_guest::Fixed<OverstayRisk>);
