//! What [`crate::export!`] expands to call: one model instance per sandbox
//! instance, kept between calls, with its shape cached.

use std::cell::RefCell;

use ndarray::{ArrayView2, ArrayViewMut2};

use crate::{Contract, Estimator, Fault, decode_params};

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
        let guard = self.0.borrow();
        let ready = guard.as_ref().ok_or_else(|| Fault::Failed("score called before init".into()))?;
        let rows = rows as usize;
        let view = ArrayView2::from_shape((rows, ready.features), cells).map_err(|_| {
            Fault::Failed(format!("{} cells do not make {rows} rows of {} features", cells.len(), ready.features))
        })?;
        let mut out = vec![f64::NAN; rows * ready.outputs];
        let view_out =
            ArrayViewMut2::from_shape((rows, ready.outputs), &mut out).map_err(|err| Fault::Failed(err.to_string()))?;
        ready.model.score(view, view_out)?;
        Ok(out)
    }
}

impl<M: Estimator> Default for Slot<M> {
    fn default() -> Self {
        Self::new()
    }
}
