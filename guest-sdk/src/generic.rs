//! One compiled module for many trained models: the contract travels in the
//! params next to the estimator's own parameters.

use ndarray::{ArrayView2, ArrayViewMut2};
use serde::{Deserialize, Serialize, de::DeserializeOwned};

use crate::{Contract, Estimator, Fault, MarginLink};

/// A built-in estimator: built from params, evaluates dense rows.
pub trait Evaluate: Sized + 'static {
    /// The parameters training code writes.
    type Params: Serialize + DeserializeOwned;

    /// Checks the parameters and builds the estimator.
    ///
    /// # Errors
    /// A message naming what is wrong with the parameters.
    fn build(params: Self::Params) -> Result<Self, String>;

    /// Columns each row must have.
    fn features(&self) -> usize;

    /// Values produced per row.
    fn outputs(&self) -> usize;

    /// Evaluates `rows` (rows × features) into `out` (rows × outputs).
    fn evaluate(&self, rows: ArrayView2<'_, f64>, out: ArrayViewMut2<'_, f64>);

    /// Per-row contributions with their margins, laid out as
    /// [`Estimator::contributions`] says; returns each output's link.
    ///
    /// # Errors
    /// A message saying why the estimator cannot explain (the default:
    /// it gives no contributions).
    fn explain(&self, rows: ArrayView2<'_, f64>, out: ArrayViewMut2<'_, f64>) -> Result<Vec<MarginLink>, String> {
        let _ = (rows, out);
        Err("this estimator gives no contributions".into())
    }
}

/// The params of a [`Generic`] model: its contract and its estimator's params.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Packaged<P> {
    /// The contract the model declares.
    pub contract: Contract,
    /// The estimator's parameters.
    pub params: P,
}

/// A model whose contract and parameters both come from the artifact.
pub struct Generic<E> {
    contract: Contract,
    estimator: E,
}

impl<E: Evaluate> Generic<E> {
    /// Builds the estimator and checks that its shape matches the contract.
    ///
    /// # Errors
    /// When the estimator refuses its params, or its feature or output count
    /// differs from the contract's.
    pub fn new(packaged: Packaged<E::Params>) -> Result<Self, String> {
        let estimator = E::build(packaged.params)?;
        let contract = packaged.contract;
        shape_matches(&contract, estimator.features(), estimator.outputs())?;
        Ok(Generic { contract, estimator })
    }
}

/// Checks an estimator's shape against a contract.
///
/// # Errors
/// A message giving both counts when features or outputs differ.
pub(crate) fn shape_matches(contract: &Contract, features: usize, outputs: usize) -> Result<(), String> {
    if features != contract.features.len() {
        return Err(format!(
            "estimator reads {features} features but the contract declares {}",
            contract.features.len()
        ));
    }
    if outputs != contract.outputs.len() {
        return Err(format!("estimator writes {outputs} outputs but the contract declares {}", contract.outputs.len()));
    }
    Ok(())
}

impl<E: Evaluate> Estimator for Generic<E> {
    type Params = Packaged<E::Params>;

    fn init(params: Self::Params) -> Result<Self, String> {
        Generic::new(params)
    }

    fn contract(&self) -> Contract {
        self.contract.clone()
    }

    fn score(&self, rows: ArrayView2<'_, f64>, out: ArrayViewMut2<'_, f64>) -> Result<(), Fault> {
        self.estimator.evaluate(rows, out);
        Ok(())
    }

    fn contributions(&self, rows: ArrayView2<'_, f64>, out: ArrayViewMut2<'_, f64>) -> Result<Vec<MarginLink>, Fault> {
        self.estimator.explain(rows, out).map_err(Fault::Rejected)
    }
}

/// Builds an estimator for a model whose contract is written in code,
/// checking the estimator's shape against that contract.
///
/// # Errors
/// When the estimator refuses its params or its shape differs from the contract.
pub fn build_for<E: Evaluate>(contract: &Contract, params: E::Params) -> Result<E, String> {
    let estimator = E::build(params)?;
    shape_matches(contract, estimator.features(), estimator.outputs())?;
    Ok(estimator)
}

/// A model whose contract is written in code and whose estimator is one of
/// the built-in ones: implement this, then export [`Fixed<Self>`](Fixed).
///
/// ```
/// use paddock_guest::{Bounds, Contract, Declared, Feature, Fixed, Linear, Output};
///
/// /// Minutes of queueing at a site, from how many cars wait.
/// pub struct QueueMinutes;
///
/// impl Declared for QueueMinutes {
///     type Estimator = Linear;
///
///     fn contract() -> Contract {
///         Contract {
///             name: "queue-minutes".into(),
///             version: "1.0.0".into(),
///             about: "Minutes a car waits for a free bay".into(),
///             features: vec![Feature::whole("cars_waiting", Bounds::between(0.0, 50.0))],
///             outputs: vec![Output::new("minutes", Bounds::between(0.0, 600.0)).unit("min")],
///         }
///     }
/// }
///
/// paddock_guest::export!(Fixed<QueueMinutes>);
/// ```
pub trait Declared: 'static {
    /// The built-in estimator that scores the rows ([`Linear`](crate::Linear),
    /// [`Trees`](crate::Trees)); its params are the artifact's params.
    type Estimator: Evaluate;

    /// The contract: the promise the model makes to its callers.
    fn contract() -> Contract;
}

/// The [`Estimator`] of a [`Declared`] model: builds the built-in estimator
/// from the artifact's params, checks its shape against the contract, and
/// scores with it.
pub struct Fixed<M: Declared> {
    estimator: M::Estimator,
}

impl<M: Declared> Estimator for Fixed<M> {
    type Params = <M::Estimator as Evaluate>::Params;

    fn init(params: Self::Params) -> Result<Self, String> {
        build_for::<M::Estimator>(&M::contract(), params).map(|estimator| Fixed { estimator })
    }

    fn contract(&self) -> Contract {
        M::contract()
    }

    fn score(&self, rows: ArrayView2<'_, f64>, out: ArrayViewMut2<'_, f64>) -> Result<(), Fault> {
        self.estimator.evaluate(rows, out);
        Ok(())
    }

    fn contributions(&self, rows: ArrayView2<'_, f64>, out: ArrayViewMut2<'_, f64>) -> Result<Vec<MarginLink>, Fault> {
        self.estimator.explain(rows, out).map_err(Fault::Rejected)
    }
}
