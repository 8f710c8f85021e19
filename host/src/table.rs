//! Rows from files: CSV (a header of feature names) or NDJSON (one JSON
//! object per line). Each record is read on its own, so a bad record is
//! reported with its number and the rest carry on.

use std::io::{BufRead, BufReader, Read};
use std::path::Path;

use crate::contract::Schema;
use crate::rows::Row;

/// A file format for rows.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    /// Comma-separated, first line names the features.
    Csv,
    /// One JSON object per line.
    Ndjson,
}

impl Format {
    /// Guesses the format from a file extension (`.csv`, `.ndjson`, `.jsonl`, `.json`).
    pub fn from_path(path: &Path) -> Option<Format> {
        match path.extension()?.to_str()?.to_ascii_lowercase().as_str() {
            "csv" => Some(Format::Csv),
            "ndjson" | "jsonl" | "json" => Some(Format::Ndjson),
            _ => None,
        }
    }
}

/// One input record.
#[derive(Clone, Debug, PartialEq)]
pub struct Record {
    /// 1-based record number (CSV: data row after the header; NDJSON: line).
    pub number: usize,
    /// The value of the id column or key, when one was named.
    pub id: Option<String>,
    /// The row, or why the record could not be read as one.
    pub row: Result<Row, String>,
}

/// Reads records from `input`. With `id`, that column (CSV) or key (NDJSON)
/// is taken out of the row and returned as the record's id.
pub fn records<'a, R: Read + 'a>(
    input: R,
    format: Format,
    schema: &'a Schema,
    id: Option<&'a str>,
) -> Box<dyn Iterator<Item = Record> + 'a> {
    match format {
        Format::Csv => Box::new(csv_records(input, schema, id)),
        Format::Ndjson => Box::new(ndjson_records(input, id)),
    }
}

fn csv_records<'a, R: Read + 'a>(input: R, schema: &'a Schema, id: Option<&'a str>) -> impl Iterator<Item = Record> + 'a {
    let mut reader = csv::ReaderBuilder::new().flexible(true).trim(csv::Trim::All).from_reader(input);
    let header: Result<Vec<String>, String> = reader
        .headers()
        .map(|h| h.iter().map(str::to_owned).collect())
        .map_err(|e| format!("cannot read the CSV header: {e}"));
    let mut header_failed = false;
    let mut records = reader.into_records().enumerate();
    std::iter::from_fn(move || {
        let header = match &header {
            Ok(h) => h,
            Err(e) if !header_failed => {
                header_failed = true;
                return Some(Record { number: 0, id: None, row: Err(e.clone()) });
            }
            Err(_) => return None,
        };
        let (i, result) = records.next()?;
        let number = i + 1;
        let record = match result {
            Ok(r) => r,
            Err(e) => return Some(Record { number, id: None, row: Err(format!("unreadable CSV record: {e}")) }),
        };
        let id_value = id.and_then(|id| header.iter().position(|h| h == id)).and_then(|i| record.get(i)).map(str::to_owned);
        if record.len() != header.len() {
            let row = Err(format!("{} fields but the header has {}", record.len(), header.len()));
            return Some(Record { number, id: id_value, row });
        }
        let row = header
            .iter()
            .zip(record.iter())
            .filter(|(name, _)| Some(name.as_str()) != id)
            .map(|(name, cell)| (name.clone(), schema.value_from_text(name, cell)))
            .collect();
        Some(Record { number, id: id_value, row: Ok(row) })
    })
}

fn ndjson_records<'a, R: Read + 'a>(input: R, id: Option<&'a str>) -> impl Iterator<Item = Record> + 'a {
    BufReader::new(input).lines().enumerate().filter_map(move |(i, line)| {
        let number = i + 1;
        let line = match line {
            Ok(l) => l,
            Err(e) => return Some(Record { number, id: None, row: Err(format!("unreadable line: {e}")) }),
        };
        if line.trim().is_empty() {
            return None;
        }
        let mut value: serde_json::Value = match serde_json::from_str(&line) {
            Ok(v) => v,
            Err(e) => return Some(Record { number, id: None, row: Err(format!("not JSON: {e}")) }),
        };
        let id_value = id.and_then(|key| value.as_object_mut()?.remove(key)).map(|v| match v {
            serde_json::Value::String(s) => s,
            other => other.to_string(),
        });
        Some(Record { number, id: id_value, row: Row::from_json(value) })
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::contract::{Bounds, Contract, Domain, Feature, Output};
    use crate::rows::Value;

    fn schema() -> Schema {
        Schema::new(Contract {
            name: "t".into(),
            version: "1.0.0".into(),
            about: String::new(),
            features: vec![Feature {
                name: "kw".into(),
                domain: Domain::Real(Bounds { min: None, max: None }),
                unit: None,
                required: true,
                about: String::new(),
            }],
            outputs: vec![Output { name: "y".into(), unit: None, bounds: Bounds { min: None, max: None }, about: String::new() }],
        })
        .unwrap()
    }

    #[test]
    fn csv_bad_records_are_numbered_and_the_rest_read() {
        let s = schema();
        let input = "id,kw\na,7.4\nb\nc,11\n";
        let got: Vec<Record> = records(input.as_bytes(), Format::Csv, &s, Some("id")).collect();
        assert_eq!(got.len(), 3);
        assert_eq!(got[0].id.as_deref(), Some("a"));
        assert_eq!(got[0].row.as_ref().unwrap().fields(), &[("kw".to_owned(), Value::Number(7.4))]);
        assert_eq!(got[1].number, 2);
        assert_eq!(got[1].row.as_ref().unwrap_err(), "1 fields but the header has 2");
        assert_eq!(got[2].number, 3);
    }

    #[test]
    fn ndjson_bad_lines_are_numbered_and_the_rest_read() {
        let s = schema();
        let input = "{\"id\": 7, \"kw\": 3}\n\nnot json\n[1]\n";
        let got: Vec<Record> = records(input.as_bytes(), Format::Ndjson, &s, Some("id")).collect();
        assert_eq!(got.len(), 3);
        assert_eq!(got[0].id.as_deref(), Some("7"));
        assert_eq!(got[0].row.as_ref().unwrap().fields(), &[("kw".to_owned(), Value::Integer(3))]);
        assert_eq!(got[1].number, 3);
        assert!(got[1].row.as_ref().unwrap_err().starts_with("not JSON"));
        assert_eq!(got[2].row.as_ref().unwrap_err(), "a row must be a JSON object, not an array");
    }
}
