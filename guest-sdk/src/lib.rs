//! Write a paddock model in Rust.
//!
//! A paddock model is a WebAssembly component that targets the `estimator`
//! world in `wit/estimator.wit`. This crate hides the bindings. The shortest
//! model is a contract written in code plus one of the built-in estimators,
//! whose parameters (coefficients, trees) training code writes into the
//! artifact:
//!
//! ```
//! use paddock_guest::{Bounds, Contract, Declared, Feature, Fixed, Linear, Output};
//!
//! /// Probability that a car overstays, from its expected charging minutes.
//! pub struct Overstay;
//!
//! impl Declared for Overstay {
//!     type Estimator = Linear;
//!
//!     fn contract() -> Contract {
//!         Contract {
//!             name: "overstay".into(),
//!             version: "1.0.0".into(),
//!             about: "Probability of staying plugged in past full charge".into(),
//!             features: vec![
//!                 Feature::real("expected_minutes", Bounds::between(0.0, 2880.0)).unit("min"),
//!                 Feature::flag("weekend"),
//!             ],
//!             outputs: vec![Output::new("probability", Bounds::between(0.0, 1.0))],
//!         }
//!     }
//! }
//!
//! paddock_guest::export!(Fixed<Overstay>);
//!
//! // Natively, the same model runs on the params training wrote: here a
//! // score of 0 (intercept −1.5 + 0.01 × 150 min) is a probability of ½.
//! use paddock_guest::{Estimator, LinearParams, Link, ndarray::Array2};
//! let params = LinearParams { link: Link::Logistic, intercepts: vec![-1.5], weights: vec![vec![0.01, 0.0]], impute: vec![] };
//! let model = Fixed::<Overstay>::init(params)?;
//! let mut out = Array2::from_elem((1, 1), f64::NAN);
//! model.score(Array2::from_shape_vec((1, 2), vec![150.0, 0.0])?.view(), out.view_mut())?;
//! assert_eq!(out[[0, 0]], 0.5);
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```
//!
//! A model with code of its own implements [`Estimator`] instead: `init`
//! from its params, `contract`, and `score` over a row-major `ndarray` view.
//!
//! What the crate gives you:
//! - the contract types ([`Contract`], [`Feature`], [`Domain`], [`Bounds`],
//!   [`Output`], [`Fault`]), generated from the WIT file so guest and host can
//!   never disagree, with small builders ([`Feature::real`], [`Output::new`]…);
//! - params decoding: the artifact's parameter blob is bincode (standard
//!   configuration) of your `Params` type; [`encode_params`] makes one from
//!   training code;
//! - row-major views: `score` receives the rows as an `ndarray` view, one row
//!   per model row, one column per feature, absent optional features as NaN;
//! - built-in estimators driven entirely by params ([`Linear`], [`Trees`],
//!   [`Program`] for what PMML documents describe) and
//!   [`Generic`], which carries its contract in the params too, so one compiled
//!   module serves any number of trained models.
//!
//! Everything except [`export!`] compiles natively as well, so training code,
//! tests and benchmarks evaluate exactly the code that runs in the sandbox.
//!
//! What it is not: a training library. Fit models wherever you like and write
//! their parameters into these types.

#![deny(missing_docs)]

mod contract;
mod contributions;
mod exp;
mod generic;
mod lanes;
mod layout;
mod linear;
mod params;
mod program;
mod spelling;
mod trees;

#[doc(hidden)]
pub mod glue;

pub use contract::{Bounds, Contract, Contributions, Domain, Fault, Feature, MarginLink, Output};
pub use generic::{Declared, Evaluate, Fixed, Generic, Packaged, build_for};
pub use linear::{Linear, LinearParams, Link};
pub use params::{decode_params, encode_params};
pub use program::MAX_DEPTH as PROGRAM_MAX_DEPTH;
pub use program::{
    Cast, Compare, Emit, Ensemble, Expr, Function, Input, Interval, Kind, Logic, Normalize, Outliers, Predicate,
    Program, ProgramParams, RegressionTable, Rescale, Segment, Submodel, TreeNode, WhenUnknown,
};
pub use spelling::{DomainSpec, GraphFeature, GraphManifest, GraphOutput};
pub use trees::{Branch, Combine, Node, OutputLink, Precision, SplitRule, Tree, Trees, TreesParams};

/// Re-exported so model crates need no direct ndarray dependency.
pub use ndarray;

/// The bindings generated from `wit/estimator.wit`. Model authors do not
/// need them; [`export!`] wires them up.
#[doc(hidden)]
#[allow(missing_docs, unsafe_code)]
pub mod bindings {
    wit_bindgen::generate!({
        path: "../wit",
        world: "explaining-estimator",
        pub_export_macro: true,
        export_macro_name: "export_estimator",
        default_bindings_module: "paddock_guest::bindings",
        additional_derives: [serde::Serialize, serde::Deserialize, PartialEq],
    });
}

/// A model, as its author writes it.
///
/// The host creates instances of the model as it needs them; each instance
/// calls [`Estimator::init`] once with the artifact's parameters, then serves
/// any number of [`Estimator::score`] calls.
pub trait Estimator: Sized + 'static {
    /// The parameters this model reads from the artifact. Use `()` for a
    /// model with everything built in.
    type Params: serde::de::DeserializeOwned;

    /// Builds the model from its decoded parameters.
    ///
    /// # Errors
    /// Returns a message when the parameters do not describe a usable model;
    /// the host then refuses the artifact and shows the message.
    fn init(params: Self::Params) -> Result<Self, String>;

    /// The contract: features in row order, outputs in row order. Must be
    /// the same on every call.
    fn contract(&self) -> Contract;

    /// Scores rows. `rows` has one row per request row and one column per
    /// feature; `out` has one row per request row and one column per output,
    /// filled with NaN on entry.
    ///
    /// # Errors
    /// [`Fault::Rejected`] when valid rows cannot be scored by this model,
    /// [`Fault::Failed`] when the model itself failed.
    fn score(&self, rows: ndarray::ArrayView2<'_, f64>, out: ndarray::ArrayViewMut2<'_, f64>) -> Result<(), Fault>;

    /// Per-row contributions: `out` has one row per request row and, per
    /// output, one column per feature, then the baseline, then the margin
    /// (the output before its link), filled with NaN on entry. Returns
    /// each output's link. The baseline and the features' values must add
    /// up to the margin; the host checks.
    ///
    /// # Errors
    /// [`Fault::Rejected`] saying why when the model cannot explain (the
    /// default: it gives no contributions).
    fn contributions(
        &self,
        rows: ndarray::ArrayView2<'_, f64>,
        out: ndarray::ArrayViewMut2<'_, f64>,
    ) -> Result<Vec<MarginLink>, Fault> {
        let _ = (rows, out);
        Err(Fault::Rejected("this model gives no contributions".into()))
    }
}

/// Exports a type implementing [`Estimator`] as the model of this crate.
///
/// Call it once, at the top level of a `cdylib` crate built for
/// `wasm32-unknown-unknown`. On other targets it expands to nothing, so the
/// same crate also builds natively for tests and training code.
#[macro_export]
macro_rules! export {
    ($model:ty) => {
        #[cfg(target_arch = "wasm32")]
        const _: () = {
            ::std::thread_local! {
                static SLOT: $crate::glue::Slot<$model> = $crate::glue::Slot::new();
            }
            struct PaddockExports;
            impl $crate::bindings::Guest for PaddockExports {
                fn init(params: ::std::vec::Vec<u8>) -> ::std::result::Result<(), ::std::string::String> {
                    SLOT.with(|slot| slot.init(&params))
                }
                fn describe() -> $crate::Contract {
                    SLOT.with(|slot| slot.describe())
                }
                fn score(
                    rows: u32,
                    cells: ::std::vec::Vec<f64>,
                ) -> ::std::result::Result<::std::vec::Vec<f64>, $crate::Fault> {
                    SLOT.with(|slot| slot.score(rows, &cells))
                }
                fn contributions(
                    rows: u32,
                    cells: ::std::vec::Vec<f64>,
                ) -> ::std::result::Result<$crate::Contributions, $crate::bindings::ExplainFault> {
                    SLOT.with(|slot| slot.contributions(rows, &cells))
                }
            }
    $crate::bindings::export_estimator!(PaddockExports with_types_in $crate::bindings);
        };
    };
}
