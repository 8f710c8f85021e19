//! The ONNX evaluator: one compiled guest for every ONNX model. The
//! artifact's params carry the manifest (as JSON: the contract, and which
//! graph output feeds which contract output) and the ONNX bytes; `paddock
//! pack MODEL.onnx --manifest MANIFEST.toml` writes them. The graph runs in
//! the sandbox with tract (pure Rust, no native code, no threads).
//!
//! What it is not: a training or conversion tool. Export to ONNX with your
//! toolkit (skl2onnx, torch.onnx…); operators tract does not implement are
//! refused at load with tract's message.

use paddock_guest::ndarray::{ArrayView2, ArrayViewMut2};
use paddock_guest::{Contract, Estimator, Fault, GraphManifest};
use std::sync::Arc;

use tract_onnx::prelude::*;
use tract_onnx::tract_hir::infer::Factoid;

/// The params: the manifest as JSON, and the ONNX bytes.
pub type Params = (String, Vec<u8>);

/// An ONNX model ready to run.
pub struct Onnx {
    contract: Contract,
    plan: Arc<TypedSimplePlan>,
    /// The element type the graph input takes.
    input_type: DatumType,
    /// Per contract output: (graph output index, column).
    picks: Vec<(usize, usize)>,
}

fn fail(what: &str) -> impl Fn(TractError) -> String + '_ {
    move |e| format!("{what}: {e:#}")
}

impl Onnx {
    /// Parses the manifest, loads and optimises the graph, and maps the
    /// contract onto its input and outputs.
    ///
    /// # Errors
    /// A message naming the manifest field, the graph input or output, or
    /// tract's reason (an operator it does not implement, a bad graph).
    pub fn new((manifest, onnx): Params) -> Result<Self, String> {
        let manifest: GraphManifest = serde_json::from_str(&manifest).map_err(|e| format!("manifest: {e}"))?;
        let contract = manifest.contract();
        let mut model =
            tract_onnx::onnx().model_for_read(&mut &onnx[..]).map_err(fail("the ONNX model does not load"))?;
        let input = match &manifest.input {
            None => 0,
            Some(name) => model
                .input_outlets()
                .map_err(fail("graph inputs"))?
                .iter()
                .position(|o| model.node(o.node).name == *name)
                .ok_or_else(|| format!("manifest input `{name}`: the graph has no input of that name"))?,
        };
        if model.input_outlets().map_err(fail("graph inputs"))?.len() != 1 {
            return Err("the graph must have exactly one input (the rows)".into());
        }
        let fact = model.input_fact(input).map_err(fail("graph input"))?.clone();
        let input_type = fact.datum_type.concretize().unwrap_or(f32::datum_type());
        if !matches!(input_type, DatumType::F32 | DatumType::F64) {
            return Err(format!("the graph input takes {input_type:?}; only float and double inputs are supported"));
        }
        let width = contract.features.len();
        let batch = model.symbols.sym("rows");
        model
            .set_input_fact(input, InferenceFact::dt_shape(input_type, tvec!(batch.to_dim(), width.to_dim())))
            .map_err(fail("setting the input shape"))?;
        let names: Vec<String> = model
            .output_outlets()
            .map_err(fail("graph outputs"))?
            .iter()
            .map(|o| model.outlet_label(*o).unwrap_or(&model.node(o.node).name).to_owned())
            .collect();
        let mut picks = Vec::new();
        for o in &manifest.outputs {
            let index = match &o.tensor {
                None => 0,
                Some(t) => names.iter().position(|n| n == t).ok_or_else(|| {
                    format!("manifest output `{}`: the graph has no output `{t}` (it has {names:?})", o.name)
                })?,
            };
            picks.push((index, o.column));
        }
        let plan = model
            .into_optimized()
            .map_err(fail("the ONNX graph cannot be prepared"))?
            .into_runnable()
            .map_err(fail("the ONNX graph cannot be planned"))?;
        Ok(Onnx { contract, plan, input_type, picks })
    }

    /// Runs the graph on row-major cells; writes rows × outputs values.
    ///
    /// # Errors
    /// tract's message when the run fails, or a column outside an output.
    pub fn run(&self, rows: ArrayView2<'_, f64>, mut out: ArrayViewMut2<'_, f64>) -> Result<(), String> {
        let (n, width) = rows.dim();
        let input: Tensor = match self.input_type {
            DatumType::F64 => tract_ndarray::Array2::from_shape_fn((n, width), |(r, c)| rows[[r, c]]).into(),
            _ => tract_ndarray::Array2::from_shape_fn((n, width), |(r, c)| rows[[r, c]] as f32).into(),
        };
        let results = self.plan.run(tvec!(input.into())).map_err(fail("the ONNX graph failed"))?;
        for (k, &(index, column)) in self.picks.iter().enumerate() {
            let t = results[index].cast_to::<f64>().map_err(fail("reading an output"))?;
            let view = t.to_plain_array_view::<f64>().map_err(fail("reading an output"))?;
            let shape = view.shape().to_vec();
            let per_row = view.len().checked_div(n).unwrap_or(0);
            if shape.first().copied() != Some(n) && !(shape.is_empty() && n == 1) || column >= per_row.max(1) {
                return Err(format!(
                    "output {} reads column {column} of graph output {index}, whose shape is {shape:?} for {n} rows",
                    self.contract.outputs[k].name
                ));
            }
            let flat: Vec<f64> = view.iter().copied().collect();
            for r in 0..n {
                out[[r, k]] = flat[r * per_row + column];
            }
        }
        Ok(())
    }
}

impl Estimator for Onnx {
    type Params = Params;

    fn init(params: Params) -> Result<Self, String> {
        Onnx::new(params)
    }

    fn contract(&self) -> Contract {
        self.contract.clone()
    }

    fn score(&self, rows: ArrayView2<'_, f64>, out: ArrayViewMut2<'_, f64>) -> Result<(), Fault> {
        self.run(rows, out).map_err(Fault::Failed)
    }
}

paddock_guest::export!(Onnx);
