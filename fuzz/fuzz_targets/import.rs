//! Any bytes as a toolkit's model file: each importer answers with params
//! or an error naming the place, never a panic; params it accepts build an
//! estimator that scores a row of absent values and a row of zeros.
#![no_main]

use libfuzzer_sys::fuzz_target;
use paddock_guest::ndarray::Array2;
use paddock_guest::{Evaluate, Trees};
use paddock_import::{Format, import};

fuzz_target!(|data: &[u8]| {
    let _ = Format::recognise(data);
    let _ = paddock_import::looks_like(data);
    for format in Format::ALL {
        let Ok(imported) = import(data, format, "fuzz", None) else { continue };
        let params = imported.packaged.params;
        let features = params.features as usize;
        if features > 4096 {
            continue;
        }
        let trees = Trees::new(params).expect("imported params build an estimator");
        let mut rows = Array2::from_elem((2, features), f64::NAN);
        rows.row_mut(1).fill(0.0);
        let mut out = Array2::from_elem((2, trees.outputs()), f64::NAN);
        trees.evaluate(rows.view(), out.view_mut());
    }
});
