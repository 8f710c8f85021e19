//! Any text as rows: NDJSON and CSV reading, then validation and encoding
//! against a contract with every domain, must answer with rows or errors,
//! never a panic, and never leave partial cells behind.
#![no_main]

use libfuzzer_sys::fuzz_target;
use paddock_host::contract::row_file::{Columns, RowFileError, RowFormat, records};
use paddock_host::{Bounds, Contract, Domain, Feature, Output, Schema};

fn schema() -> Schema {
    let f = |name: &str, domain, required| Feature {
        name: name.into(),
        domain,
        unit: None,
        required,
        about: String::new(),
    };
    Schema::new(Contract {
        name: "fuzz".into(),
        version: "1.0.0".into(),
        about: String::new(),
        features: vec![
            f("kw", Domain::Real(Bounds { min: Some(0.0), max: Some(400.0) }), true),
            f("hour", Domain::Whole(Bounds { min: Some(0.0), max: Some(167.0) }), false),
            f("plug", Domain::Label(vec!["type2".into(), "ccs2".into()]), false),
            f("fleet", Domain::Flag, false),
        ],
        outputs: vec![Output {
            name: "y".into(),
            unit: None,
            bounds: Bounds { min: None, max: None },
            about: String::new(),
        }],
    })
    .expect("valid contract")
}

fuzz_target!(|data: &[u8]| {
    let schema = schema();
    for format in [RowFormat::Ndjson, RowFormat::Csv] {
        let mut cells = Vec::new();
        // Columns that are not features are refused whole; ignore them and
        // read on, so the records themselves are still fuzzed.
        let ignore = match records(data, format, &schema, Columns::default()) {
            Err(RowFileError::UnknownColumns { columns, .. }) => columns,
            _ => Vec::new(),
        };
        let Ok(records) = records(data, format, &schema, Columns { id: None, ignore: &ignore }) else { continue };
        for (i, record) in records.enumerate() {
            if let Ok(row) = record.row {
                let before = cells.len();
                match schema.encode_row(i, &row, &mut cells) {
                    Ok(()) => assert_eq!(cells.len(), before + schema.width()),
                    Err(errors) => {
                        assert!(!errors.is_empty());
                        assert_eq!(cells.len(), before);
                    }
                }
            }
        }
    }
});
