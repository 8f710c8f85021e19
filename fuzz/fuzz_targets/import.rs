//! Any bytes as a toolkit's model file: each importer answers with params
//! or an error naming the place, never a panic; params it accepts build an
//! estimator that scores a row of absent values and a row of zeros.
#![no_main]

use libfuzzer_sys::fuzz_target;
use paddock_guest::ndarray::Array2;
use paddock_guest::{Evaluate, Linear, Program, Trees};
use paddock_import::{EstimatorParams, Format, import};

fuzz_target!(|data: &[u8]| {
    let _ = Format::recognise(data);
    let _ = paddock_import::looks_like(data);
    for format in Format::ALL {
        let Ok(imported) = import(data, format, "fuzz", None) else { continue };
        let features = imported.contract.features.len();
        if features > 4096 {
            continue;
        }
        match imported.estimator {
            EstimatorParams::Trees(params) => {
                score(Trees::new(params).expect("imported params build an estimator"), features)
            }
            EstimatorParams::Linear(params) => {
                score(Linear::new(params).expect("imported params build an estimator"), features)
            }
            EstimatorParams::Program(params) => {
                score(Program::new(params).expect("imported params build an estimator"), features)
            }
            _ => {}
        }
    }
});

/// Scores a row of absent values and a row of zeros.
fn score(estimator: impl Evaluate, features: usize) {
    let mut rows = Array2::from_elem((2, features), f64::NAN);
    rows.row_mut(1).fill(0.0);
    let mut out = Array2::from_elem((2, estimator.outputs()), f64::NAN);
    estimator.evaluate(rows.view(), out.view_mut());
}
