//! Rows from files: CSV (a header of feature names), NDJSON (one JSON
//! object per line), or estimate requests (one request per line, as a
//! host's capture writes them: each of its rows a record). Each record is
//! read on its own, so a bad record is reported with its number and the
//! rest carry on; a file that cannot be read further (a compressed file cut
//! short) ends with one record saying so.

use std::io::{BufRead, BufReader, Read};
use std::path::Path;

use crate::contract::rows::{Row, RowJsonError};
use crate::contract::schema::Schema;

/// A file format for rows.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum RowFormat {
    /// Comma-separated, first line names the features.
    Csv,
    /// One JSON object per line.
    Ndjson,
    /// One estimate request per line (`row` or `rows`, with any other
    /// field: `model`, `context`, `captured`…), as `POST /estimate` takes
    /// it and a host's capture writes it; each row is a record, the
    /// request's `id` its id.
    Requests,
}

impl RowFormat {
    /// Guesses the format from a file's name, a `.gz` ending aside:
    /// `.csv`; `.requests.ndjson` (a capture file); `.ndjson`, `.jsonl`,
    /// `.json`.
    pub fn from_path(path: &Path) -> Option<RowFormat> {
        let name = path.file_name()?.to_str()?.to_ascii_lowercase();
        let name = name.strip_suffix(".gz").unwrap_or(&name);
        if name.ends_with(".requests.ndjson") {
            return Some(RowFormat::Requests);
        }
        match Path::new(name).extension()?.to_str()? {
            "csv" => Some(RowFormat::Csv),
            "ndjson" | "jsonl" | "json" => Some(RowFormat::Ndjson),
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
    pub row: Result<Row, RecordError>,
}

/// Why one record of a file could not be read as a row (the rest carry on).
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum RecordError {
    /// A CSV field is not UTF-8 text.
    #[error("field {field} is not UTF-8 text{}", .line.map_or(String::new(), |l| format!(" (line {l})")))]
    NotUtf8 {
        /// The field's position, from 1.
        field: usize,
        /// The line in the file, when known.
        line: Option<u64>,
    },
    /// The record could not be read (the reader's words).
    #[error("cannot read the record: {0}")]
    Unreadable(String),
    /// A CSV record with another number of fields than the header.
    #[error("{fields} fields but the header has {header}")]
    FieldCount {
        /// Fields in the record.
        fields: usize,
        /// Columns in the header.
        header: usize,
    },
    /// An NDJSON line that is not JSON (the parser's words).
    #[error("not JSON: {0}")]
    NotJson(String),
    /// An NDJSON line that is JSON but not a row.
    #[error(transparent)]
    Row(#[from] RowJsonError),
    /// A request line with neither `row` (an object) nor `rows` (a list).
    #[error("not an estimate request: it has neither `row` (one row) nor `rows` (a list)")]
    NotARequest,
}

/// Which columns (CSV) or keys (NDJSON) are not features.
#[derive(Clone, Copy, Debug, Default)]
pub struct Columns<'a> {
    /// The column or key that identifies a row: taken out of the row and
    /// returned as the record's id.
    pub id: Option<&'a str>,
    /// Columns or keys to leave out of every row.
    pub ignore: &'a [String],
}

/// Why a file cannot be read as rows at all (a bad record is not this: it
/// is reported with its number and the rest carry on).
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum RowFileError {
    /// The CSV header cannot be read.
    #[error("cannot read the CSV header: {0}")]
    Header(String),
    /// Header columns that are neither features, the id, nor ignored.
    #[error(
        "{} not {} of {model}: name the row's id column (`Columns::id`), or leave columns out (`Columns::ignore`)",
        list(.columns), if .columns.len() == 1 { "a feature" } else { "features" }
    )]
    UnknownColumns {
        /// The columns.
        columns: Vec<String>,
        /// The model (`name version`).
        model: String,
    },
    /// The id column named is not in the header.
    #[error("the id column `{column}` is not in the CSV header (columns: {})", .header.join(", "))]
    MissingId {
        /// The column asked for.
        column: String,
        /// The header.
        header: Vec<String>,
    },
}

fn list(columns: &[String]) -> String {
    let quoted: Vec<String> = columns.iter().map(|c| format!("`{c}`")).collect();
    match quoted.len() {
        1 => format!("column {} is", quoted[0]),
        _ => format!("columns {} are", quoted.join(", ")),
    }
}

/// Reads records from `input`: a CSV file's header is checked at once
/// against the contract; each record is then read on its own.
///
/// # Errors
/// [`RowFileError`] for a CSV header that cannot be read, names a column
/// that is not a feature (and is neither `columns.id` nor ignored), or
/// lacks the id column.
pub fn records<'a, R: Read + 'a>(
    input: R,
    format: RowFormat,
    schema: &'a Schema,
    columns: Columns<'a>,
) -> Result<Box<dyn Iterator<Item = Record> + 'a>, RowFileError> {
    Ok(match format {
        RowFormat::Csv => Box::new(csv_records(input, schema, columns)?),
        RowFormat::Ndjson => Box::new(ndjson_records(input, columns)),
        RowFormat::Requests => Box::new(request_records(input)),
    })
}

/// The lines of `input`, numbered from 1, blank ones skipped; a line that
/// cannot be read ends them (after it is given, as the error).
fn numbered_lines<R: Read>(input: R) -> impl Iterator<Item = (usize, std::io::Result<String>)> {
    let mut ended = false;
    BufReader::new(input).lines().enumerate().map_while(move |(i, line)| {
        if ended {
            return None;
        }
        ended = line.is_err();
        Some((i + 1, line))
    })
}

fn request_records<'a, R: Read + 'a>(input: R) -> impl Iterator<Item = Record> + 'a {
    let mut number = 0usize;
    numbered_lines(input).flat_map(move |(line_number, line)| {
        request_rows(line_number, line)
            .into_iter()
            .map(|(id, row)| {
                number += 1;
                Record { number, id, row }
            })
            .collect::<Vec<_>>()
    })
}

/// The rows of one request line, each with its id (the request's, and
/// `#k` for the k-th of several); none for a blank line.
fn request_rows(line_number: usize, line: std::io::Result<String>) -> Vec<(Option<String>, Result<Row, RecordError>)> {
    let line = match line {
        Ok(l) if l.trim().is_empty() => return Vec::new(),
        Ok(l) => l,
        Err(e) => return vec![(None, Err(RecordError::Unreadable(format!("line {line_number}: {e}"))))],
    };
    let value: serde_json::Value = match serde_json::from_str(&line) {
        Ok(v) => v,
        Err(e) => return vec![(None, Err(RecordError::NotJson(e.to_string())))],
    };
    let id = value.get("id").filter(|v| !v.is_null()).map(|v| match v {
        serde_json::Value::String(s) => s.clone(),
        other => other.to_string(),
    });
    let row = |v: &serde_json::Value| Row::from_json(v.clone()).map_err(RecordError::from);
    match (value.get("row"), value.get("rows")) {
        (Some(r), None) => vec![(id, row(r))],
        (None, Some(serde_json::Value::Array(rows))) if rows.len() == 1 => vec![(id, row(&rows[0]))],
        (None, Some(serde_json::Value::Array(rows))) => {
            rows.iter().enumerate().map(|(k, r)| (id.as_ref().map(|i| format!("{i}#{}", k + 1)), row(r))).collect()
        }
        _ => vec![(id, Err(RecordError::NotARequest))],
    }
}

/// Where a file's columns go, from its header: the id column's position
/// (when `columns.id` names one), and per column whether it is a feature
/// (neither the id nor ignored). Shared by every format with a header of
/// column names (CSV here; Parquet in `paddock-serve`).
///
/// # Errors
/// [`RowFileError::MissingId`] when the id column is not in the header;
/// [`RowFileError::UnknownColumns`] for columns that are neither features,
/// the id, nor ignored.
pub fn place_columns(
    header: &[String],
    schema: &Schema,
    columns: Columns<'_>,
) -> Result<(Option<usize>, Vec<bool>), RowFileError> {
    let id_at = match columns.id {
        Some(column) => Some(
            header
                .iter()
                .position(|h| h == column)
                .ok_or_else(|| RowFileError::MissingId { column: column.to_owned(), header: header.to_vec() })?,
        ),
        None => None,
    };
    let keep: Vec<bool> =
        header.iter().enumerate().map(|(i, h)| Some(i) != id_at && !columns.ignore.contains(h)).collect();
    let unknown: Vec<String> = header
        .iter()
        .zip(&keep)
        .filter(|(h, keep)| **keep && schema.feature_index(h).is_none())
        .map(|(h, _)| h.clone())
        .collect();
    if !unknown.is_empty() {
        let c = schema.contract();
        return Err(RowFileError::UnknownColumns { columns: unknown, model: format!("{} {}", c.name, c.version) });
    }
    Ok((id_at, keep))
}

fn csv_records<'a, R: Read + 'a>(
    input: R,
    schema: &'a Schema,
    columns: Columns<'a>,
) -> Result<impl Iterator<Item = Record> + 'a, RowFileError> {
    let mut reader = csv::ReaderBuilder::new().flexible(true).trim(csv::Trim::All).from_reader(input);
    let header: Vec<String> = reader
        .headers()
        .map(|h| h.iter().map(str::to_owned).collect())
        .map_err(|e| RowFileError::Header(e.to_string()))?;
    let (id_at, keep) = place_columns(&header, schema, columns)?;
    let mut records = reader.into_records().enumerate();
    Ok(std::iter::from_fn(move || {
        let (i, result) = records.next()?;
        let number = i + 1;
        let record = match result {
            Ok(r) => r,
            Err(e) => return Some(Record { number, id: None, row: Err(csv_problem(e)) }),
        };
        let id_value = id_at.and_then(|i| record.get(i)).map(str::to_owned);
        if record.len() != header.len() {
            let row = Err(RecordError::FieldCount { fields: record.len(), header: header.len() });
            return Some(Record { number, id: id_value, row });
        }
        let row = header
            .iter()
            .zip(record.iter())
            .zip(&keep)
            .filter(|(_, keep)| **keep)
            .map(|((name, cell), _)| (name.clone(), schema.value_from_text(name, cell)))
            .collect();
        Some(Record { number, id: id_value, row: Ok(row) })
    }))
}

/// A CSV record's problem in words, naming the field.
fn csv_problem(e: csv::Error) -> RecordError {
    match e.kind() {
        csv::ErrorKind::Utf8 { pos, err } => {
            RecordError::NotUtf8 { field: err.field() + 1, line: pos.as_ref().map(|p| p.line()) }
        }
        csv::ErrorKind::Io(io) => RecordError::Unreadable(io.to_string()),
        _ => RecordError::Unreadable(e.to_string()),
    }
}

fn ndjson_records<'a, R: Read + 'a>(input: R, columns: Columns<'a>) -> impl Iterator<Item = Record> + 'a {
    let id = columns.id;
    numbered_lines(input).filter_map(move |(number, line)| {
        let line = match line {
            Ok(l) => l,
            Err(e) => return Some(Record { number, id: None, row: Err(RecordError::Unreadable(e.to_string())) }),
        };
        if line.trim().is_empty() {
            return None;
        }
        let mut value: serde_json::Value = match serde_json::from_str(&line) {
            Ok(v) => v,
            Err(e) => return Some(Record { number, id: None, row: Err(RecordError::NotJson(e.to_string())) }),
        };
        let id_value = id.and_then(|key| value.as_object_mut()?.remove(key)).map(|v| match v {
            serde_json::Value::String(s) => s,
            other => other.to_string(),
        });
        if let Some(map) = value.as_object_mut() {
            for key in columns.ignore {
                map.remove(key);
            }
        }
        Some(Record { number, id: id_value, row: Row::from_json(value).map_err(RecordError::from) })
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::contract::rows::Value;
    use crate::contract::{Bounds, Contract, Domain, Feature, Output};

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
            outputs: vec![Output {
                name: "y".into(),
                unit: None,
                bounds: Bounds { min: None, max: None },
                about: String::new(),
            }],
        })
        .unwrap()
    }

    fn id(name: &str) -> Columns<'_> {
        Columns { id: Some(name), ignore: &[] }
    }

    #[test]
    fn csv_columns_that_are_not_features_are_named_with_the_way_out() {
        let s = schema();
        let err = records("site,kw,plate\na,1,b\n".as_bytes(), RowFormat::Csv, &s, Columns::default()).err().unwrap();
        assert_eq!(
            err.to_string(),
            "columns `site`, `plate` are not features of t 1.0.0: name the row's id column (`Columns::id`), or leave columns out (`Columns::ignore`)"
        );
        let ignore = ["plate".to_owned()];
        let got: Vec<Record> = records(
            "site,kw,plate\na,1,b\n".as_bytes(),
            RowFormat::Csv,
            &s,
            Columns { id: Some("site"), ignore: &ignore },
        )
        .unwrap()
        .collect();
        assert_eq!(got[0].id.as_deref(), Some("a"));
        assert_eq!(got[0].row.as_ref().unwrap().fields(), &[("kw".to_owned(), Value::Number(1.0))]);
        let err = records("kw\n1\n".as_bytes(), RowFormat::Csv, &s, id("site")).err().unwrap();
        assert_eq!(err.to_string(), "the id column `site` is not in the CSV header (columns: kw)");
    }

    #[test]
    fn a_field_that_is_not_utf8_is_named_in_words() {
        let s = schema();
        let got: Vec<Record> =
            records(&b"kw\n1\n\xff\n"[..], RowFormat::Csv, &s, Columns::default()).unwrap().collect();
        assert_eq!(got[1].row.as_ref().unwrap_err(), &RecordError::NotUtf8 { field: 1, line: Some(3) });
        assert_eq!(got[1].row.as_ref().unwrap_err().to_string(), "field 1 is not UTF-8 text (line 3)");
    }

    #[test]
    fn csv_bad_records_are_numbered_and_the_rest_read() {
        let s = schema();
        let input = "id,kw\na,7.4\nb\nc,11\n";
        let got: Vec<Record> = records(input.as_bytes(), RowFormat::Csv, &s, id("id")).unwrap().collect();
        assert_eq!(got.len(), 3);
        assert_eq!(got[0].id.as_deref(), Some("a"));
        assert_eq!(got[0].row.as_ref().unwrap().fields(), &[("kw".to_owned(), Value::Number(7.4))]);
        assert_eq!(got[1].number, 2);
        assert_eq!(got[1].row.as_ref().unwrap_err(), &RecordError::FieldCount { fields: 1, header: 2 });
        assert_eq!(got[2].number, 3);
    }

    #[test]
    fn ndjson_bad_lines_are_numbered_and_the_rest_read() {
        let s = schema();
        let input = "{\"id\": 7, \"kw\": 3}\n\nnot json\n[1]\n";
        let got: Vec<Record> = records(input.as_bytes(), RowFormat::Ndjson, &s, id("id")).unwrap().collect();
        assert_eq!(got.len(), 3);
        assert_eq!(got[0].id.as_deref(), Some("7"));
        assert_eq!(got[0].row.as_ref().unwrap().fields(), &[("kw".to_owned(), Value::Integer(3))]);
        assert_eq!(got[1].number, 3);
        assert!(matches!(got[1].row.as_ref().unwrap_err(), RecordError::NotJson(_)));
        assert_eq!(got[2].row.as_ref().unwrap_err(), &RecordError::Row(RowJsonError::NotAnObject { kind: "an array" }));
        assert_eq!(got[2].row.as_ref().unwrap_err().to_string(), "a row must be a JSON object, not an array");
    }

    #[test]
    fn request_lines_give_each_row_with_its_requests_id() {
        let s = schema();
        let input = concat!(
            "{\"id\": \"a\", \"model\": \"t\", \"row\": {\"kw\": 1}, \"captured\": {\"answers\": [[2]]}}\n",
            "\n",
            "{\"model\": \"t\", \"rows\": [{\"kw\": 2}, {\"kw\": 3}], \"id\": 9}\n",
            "{\"model\": \"t\"}\n",
        );
        let got: Vec<Record> =
            records(input.as_bytes(), RowFormat::Requests, &s, Columns::default()).unwrap().collect();
        let ids: Vec<Option<&str>> = got.iter().map(|r| r.id.as_deref()).collect();
        assert_eq!(ids, [Some("a"), Some("9#1"), Some("9#2"), None]);
        assert_eq!(got.iter().map(|r| r.number).collect::<Vec<_>>(), [1, 2, 3, 4]);
        assert_eq!(got[2].row.as_ref().unwrap().fields(), &[("kw".to_owned(), Value::Integer(3))]);
        assert_eq!(got[3].row.as_ref().unwrap_err(), &RecordError::NotARequest);
        for (name, format) in [
            ("capture-1.requests.ndjson.gz", RowFormat::Requests),
            ("rows.ndjson.gz", RowFormat::Ndjson),
            ("rows.CSV", RowFormat::Csv),
        ] {
            assert_eq!(RowFormat::from_path(Path::new(name)), Some(format), "{name}");
        }
    }

    /// A reader that fails after its first line, as a compressed file cut
    /// short does: the failure is one record, and the file ends there.
    #[test]
    fn a_file_that_cannot_be_read_further_ends_with_one_error() {
        struct CutShort(bool);
        impl Read for CutShort {
            fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
                if std::mem::replace(&mut self.0, true) {
                    return Err(std::io::Error::new(std::io::ErrorKind::UnexpectedEof, "cut short"));
                }
                let line = b"{\"kw\": 1}\n";
                buf[..line.len()].copy_from_slice(line);
                Ok(line.len())
            }
        }
        let s = schema();
        let got: Vec<Record> = records(CutShort(false), RowFormat::Ndjson, &s, Columns::default()).unwrap().collect();
        assert_eq!(got.len(), 2);
        assert!(got[0].row.is_ok());
        assert!(matches!(got[1].row.as_ref().unwrap_err(), RecordError::Unreadable(e) if e.contains("cut short")));
    }
}
