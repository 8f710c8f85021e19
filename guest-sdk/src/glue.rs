//! What [`crate::export!`] expands to call: one model instance per sandbox
//! instance, kept between calls, with its shape cached.

use std::cell::RefCell;

use ndarray::{ArrayView2, ArrayViewMut2};

use crate::{Contract, Contributions, Estimator, Fault, decode_params};

struct Ready<M> {
    model: M,
    features: usize,
    outputs: usize,
}

/// Holds the model built by `init`.
pub struct Slot<M>(RefCell<Option<Ready<M>>>);

impl<M: Estimator> Slot<M> {
    /// An empty slot, before `init`.
    pub const fn new() -> Self {
        Slot(RefCell::new(None))
    }

    /// Decodes the params and builds the model.
    ///
    /// # Errors
    /// When the params do not decode or the model refuses them.
    pub fn init(&self, params: &[u8]) -> Result<(), String> {
        let model = M::init(decode_params(params)?)?;
        let contract = model.contract();
        *self.0.borrow_mut() =
            Some(Ready { features: contract.features.len(), outputs: contract.outputs.len(), model });
        Ok(())
    }

    /// The model's contract.
    ///
    /// # Panics
    /// When called before `init` succeeded (the host never does).
    pub fn describe(&self) -> Contract {
        self.0.borrow().as_ref().expect("describe called before init").model.contract()
    }

    /// Scores row-major cells.
    ///
    /// # Errors
    /// [`Fault::Failed`] when called before `init` or with a cell count that
    /// is not `rows × features`; otherwise what the model returns.
    pub fn score(&self, rows: u32, cells: &[f64]) -> Result<Vec<f64>, Fault> {
        self.call("score", rows, cells, |ready| ready.outputs, |model, view, out| model.score(view, out))
            .map(|(out, ())| out)
    }

    /// Per-row contributions of row-major cells: for each row and output,
    /// the features' values, the baseline and the margin.
    ///
    /// # Errors
    /// As [`Slot::score`]; a model that cannot explain answers
    /// [`crate::bindings::ExplainFault::Rejected`] saying why.
    pub fn contributions(&self, rows: u32, cells: &[f64]) -> Result<Contributions, crate::bindings::ExplainFault> {
        let width = |ready: &Ready<M>| ready.outputs * (ready.features + 2);
        self.call("contributions", rows, cells, width, |model, view, out| model.contributions(view, out))
            .map(|(values, links)| Contributions { values, links })
            .map_err(|f| match f {
                Fault::Rejected(m) => crate::bindings::ExplainFault::Rejected(m),
                Fault::Failed(m) => crate::bindings::ExplainFault::Failed(m),
            })
    }

    /// Runs `f` over the cells as `rows` rows, into an output of `width`
    /// columns per row (NaN on entry); returns the output and what `f` did.
    fn call<T>(
        &self,
        name: &str,
        rows: u32,
        cells: &[f64],
        width: impl Fn(&Ready<M>) -> usize,
        f: impl FnOnce(&M, ArrayView2<'_, f64>, ArrayViewMut2<'_, f64>) -> Result<T, Fault>,
    ) -> Result<(Vec<f64>, T), Fault> {
        let guard = self.0.borrow();
        let ready = guard.as_ref().ok_or_else(|| Fault::Failed(format!("{name} called before init")))?;
        let rows = rows as usize;
        let view = ArrayView2::from_shape((rows, ready.features), cells).map_err(|_| {
            Fault::Failed(format!("{} cells do not make {rows} rows of {} features", cells.len(), ready.features))
        })?;
        let width = width(ready);
        let mut out = vec![f64::NAN; rows * width];
        let view_out =
            ArrayViewMut2::from_shape((rows, width), &mut out).map_err(|err| Fault::Failed(err.to_string()))?;
        let done = f(&ready.model, view, view_out)?;
        Ok((out, done))
    }
}

impl<M: Estimator> Default for Slot<M> {
    fn default() -> Self {
        Self::new()
    }
}
