//! Embedded feature tables: a file a batch job writes (Parquet, CSV with a
//! header, or NDJSON), held in memory and keyed by one column.
//!
//! Cells are numbers, text or absent. A column whose every present cell
//! reads as a number is numeric; any other is text (labels). An optional
//! column says when each row was computed (RFC 3339, Unix seconds, or a
//! Parquet timestamp or date), so
//! a lookup can tell how old its value is. Looking a key up allocates
//! nothing: the index maps the key text to a row.

use std::collections::HashMap;
use std::path::Path;

use jiff::Timestamp;

use paddock_host::contract::row_file::RowFormat;

use crate::parquet::{Raw, format_number};

/// One cell, as a lookup sees it.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Cell<'a> {
    /// A number.
    Number(f64),
    /// Text (a label, or a yes/no word).
    Text(&'a str),
    /// No value in this row.
    Absent,
}

#[derive(Clone, Debug)]
enum Column {
    /// NaN for an absent cell.
    Numbers(Vec<f64>),
    Texts(Vec<Option<Box<str>>>),
}

/// A table held in memory.
#[derive(Clone, Debug)]
pub struct Table {
    /// Row of each key.
    index: HashMap<Box<str>, u32, foldhash::fast::RandomState>,
    /// Column names, in file order (the key column included).
    names: Vec<Box<str>>,
    columns: Vec<Column>,
    /// When each row was computed, in Unix seconds, when the table says.
    updated: Option<Vec<f64>>,
}

/// Why a table file was refused.
#[derive(Debug, thiserror::Error, PartialEq)]
#[non_exhaustive]
pub enum TableError {
    /// The file could not be read.
    #[error("{file}: {problem}")]
    Unreadable {
        /// The file.
        file: String,
        /// What the system said.
        problem: String,
    },
    /// Its extension names no format a table is read from.
    #[error("{file}: a table is Parquet (`.parquet`), CSV (`.csv`) or NDJSON (`.ndjson`, `.jsonl`), not `{extension}`")]
    Format {
        /// The file.
        file: String,
        /// Its extension.
        extension: String,
    },
    /// A row or cell does not parse.
    #[error("{file}: {}{problem}", place(*row, column.as_deref()))]
    Cell {
        /// The file.
        file: String,
        /// The row, from 1 (CSV: the line after the header is row 1; NDJSON:
        /// the line; Parquet: the row in file order; 0: the file as a whole).
        row: usize,
        /// The column, when one is to blame.
        column: Option<String>,
        /// What is wrong.
        problem: String,
    },
    /// A column the plan names is not in the file.
    #[error("{file}: no column `{column}` (the file has {})", columns.join(", "))]
    NoColumn {
        /// The file.
        file: String,
        /// The column.
        column: String,
        /// The columns it has.
        columns: Vec<String>,
    },
    /// Two rows share a key.
    #[error("{file}: rows {first} and {second} share the key `{key}`")]
    DuplicateKey {
        /// The file.
        file: String,
        /// The key.
        key: String,
        /// The first row with it.
        first: usize,
        /// The second.
        second: usize,
    },
    /// More rows than a table holds.
    #[error("{file}: more than {limit} rows")]
    TooLarge {
        /// The file.
        file: String,
        /// The limit.
        limit: usize,
    },
}

/// `row 3, column `x`: `, or what of it applies.
fn place(row: usize, column: Option<&str>) -> String {
    match (row, column) {
        (0, None) => String::new(),
        (0, Some(c)) => format!("column `{c}`: "),
        (r, None) => format!("row {r}: "),
        (r, Some(c)) => format!("row {r}, column `{c}`: "),
    }
}

/// Rows a table may hold.
pub const MAX_ROWS: usize = 50_000_000;

impl Table {
    /// Reads a table file: its format from its extension, rows keyed by
    /// `key`, `updated` the column saying when each row was computed.
    ///
    /// # Errors
    /// [`TableError`] naming the file, and the row and column at fault.
    pub fn read(path: &Path, key: &str, updated: Option<&str>) -> Result<Table, TableError> {
        Table::read_as(path, &path.display().to_string(), key, updated)
    }

    /// As [`Table::read`], naming the file `shown` in errors (a path
    /// relative to the store, say).
    ///
    /// # Errors
    /// As [`Table::read`].
    pub fn read_as(path: &Path, shown: &str, key: &str, updated: Option<&str>) -> Result<Table, TableError> {
        let file = shown.to_owned();
        if path.extension().is_some_and(|e| e.eq_ignore_ascii_case("parquet")) {
            let bytes = std::fs::read(path)
                .map_err(|e| TableError::Unreadable { file: file.clone(), problem: e.to_string() })?;
            let (names, rows) = parquet_rows(bytes, &file)?;
            return Table::from_rows(names, rows, &file, key, updated);
        }
        // A table is CSV or NDJSON as written (not compressed, not requests).
        let compressed = path.extension().is_some_and(|e| e.eq_ignore_ascii_case("gz"));
        let format = RowFormat::from_path(path).filter(|f| !compressed && *f != RowFormat::Requests);
        let format = format.ok_or_else(|| TableError::Format {
            file: file.clone(),
            extension: path.extension().map(|e| e.to_string_lossy().into_owned()).unwrap_or_default(),
        })?;
        let bytes =
            std::fs::read(path).map_err(|e| TableError::Unreadable { file: file.clone(), problem: e.to_string() })?;
        Table::parse(&bytes, format, &file, key, updated)
    }

    /// Parses a table from bytes in `format`; `file` names it in errors.
    ///
    /// # Errors
    /// As [`Table::read`].
    pub fn parse(
        bytes: &[u8],
        format: RowFormat,
        file: &str,
        key: &str,
        updated: Option<&str>,
    ) -> Result<Table, TableError> {
        let cell_error = |row: usize, column: Option<&str>, problem: String| TableError::Cell {
            file: file.to_owned(),
            row,
            column: column.map(str::to_owned),
            problem,
        };
        let (names, rows) = match format {
            RowFormat::Requests => return Err(cell_error(0, None, "estimate requests are not a table".into())),
            RowFormat::Csv => {
                let mut reader = csv::ReaderBuilder::new().flexible(false).from_reader(bytes);
                let names: Vec<String> = reader
                    .headers()
                    .map_err(|e| cell_error(0, None, format!("the header does not parse: {e}")))?
                    .iter()
                    .map(str::to_owned)
                    .collect();
                let mut rows = Vec::new();
                for (i, record) in reader.records().enumerate() {
                    let record = record.map_err(|e| cell_error(i + 1, None, e.to_string()))?;
                    rows.push(
                        record
                            .iter()
                            .map(|c| {
                                if c.is_empty() {
                                    Raw::Absent
                                } else {
                                    c.parse::<f64>().map_or_else(|_| Raw::Text(c.to_owned()), Raw::Number)
                                }
                            })
                            .collect::<Vec<_>>(),
                    );
                    if rows.len() > MAX_ROWS {
                        return Err(TableError::TooLarge { file: file.to_owned(), limit: MAX_ROWS });
                    }
                }
                (names, rows)
            }
            RowFormat::Ndjson => {
                let text = std::str::from_utf8(bytes).map_err(|e| cell_error(0, None, format!("not UTF-8: {e}")))?;
                let mut names: Vec<String> = Vec::new();
                let mut rows: Vec<Vec<Raw>> = Vec::new();
                for (i, line) in text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty()) {
                    let object: serde_json::Map<String, serde_json::Value> = serde_json::from_str(line)
                        .map_err(|e| cell_error(i + 1, None, format!("not a JSON object: {e}")))?;
                    let mut row: Vec<Raw> = (0..names.len()).map(|_| Raw::Absent).collect();
                    for (name, value) in object {
                        let raw = match value {
                            serde_json::Value::Null => Raw::Absent,
                            serde_json::Value::Number(n) => Raw::Number(n.as_f64().unwrap_or(f64::NAN)),
                            serde_json::Value::String(s) => Raw::Text(s),
                            serde_json::Value::Bool(b) => Raw::Text(b.to_string()),
                            _ => return Err(cell_error(i + 1, Some(&name), "an array or object, not a value".into())),
                        };
                        let at = match names.iter().position(|n| *n == name) {
                            Some(at) => at,
                            None => {
                                names.push(name);
                                row.push(Raw::Absent);
                                names.len() - 1
                            }
                        };
                        row[at] = raw;
                    }
                    rows.push(row);
                    if rows.len() > MAX_ROWS {
                        return Err(TableError::TooLarge { file: file.to_owned(), limit: MAX_ROWS });
                    }
                }
                (names, rows)
            }
        };
        Table::from_rows(names, rows, file, key, updated)
    }

    /// A table from rows of cells under `names`.
    fn from_rows(
        names: Vec<String>,
        rows: Vec<Vec<Raw>>,
        file: &str,
        key: &str,
        updated: Option<&str>,
    ) -> Result<Table, TableError> {
        let cell_error = |row: usize, column: Option<&str>, problem: String| TableError::Cell {
            file: file.to_owned(),
            row,
            column: column.map(str::to_owned),
            problem,
        };
        let column_of = |name: &str| {
            names.iter().position(|n| n == name).ok_or_else(|| TableError::NoColumn {
                file: file.to_owned(),
                column: name.to_owned(),
                columns: names.clone(),
            })
        };
        let key_at = column_of(key)?;
        let updated_at = updated.map(column_of).transpose()?;
        let width = names.len();
        let cell = raw_cell;
        // Keys.
        // foldhash: lookups are the request path. Keys come from the batch
        // job's file, not from clients, so a fast hasher is safe here.
        let mut index: HashMap<Box<str>, u32, foldhash::fast::RandomState> =
            HashMap::with_capacity_and_hasher(rows.len(), foldhash::fast::RandomState::default());
        for (r, row) in rows.iter().enumerate() {
            let text = match cell(row, key_at) {
                Raw::Text(t) => t.clone(),
                Raw::Number(n) => format_number(*n),
                Raw::Absent => return Err(cell_error(r + 1, Some(key), "no key".into())),
            };
            if let Some(first) = index.insert(text.clone().into_boxed_str(), r as u32) {
                return Err(TableError::DuplicateKey {
                    file: file.to_owned(),
                    key: text,
                    first: first as usize + 1,
                    second: r + 1,
                });
            }
        }
        // Freshness.
        let updated = match updated_at {
            None => None,
            Some(c) => {
                let mut times = Vec::with_capacity(rows.len());
                for (r, row) in rows.iter().enumerate() {
                    times.push(match cell(row, c) {
                        Raw::Number(n) => *n,
                        Raw::Text(t) => {
                            t.parse::<Timestamp>()
                                .map_err(|e| {
                                    cell_error(
                                        r + 1,
                                        Some(&names[c]),
                                        format!("`{t}` is not a time (RFC 3339, or Unix seconds): {e}"),
                                    )
                                })?
                                .as_millisecond() as f64
                                / 1000.0
                        }
                        Raw::Absent => f64::NAN,
                    });
                }
                Some(times)
            }
        };
        // Columns: numeric when every present cell is a number.
        let columns = (0..width)
            .map(|c| {
                if rows.iter().all(|row| !matches!(cell(row, c), Raw::Text(_))) {
                    Column::Numbers(
                        rows.iter().map(|row| if let Raw::Number(n) = cell(row, c) { *n } else { f64::NAN }).collect(),
                    )
                } else {
                    Column::Texts(
                        rows.iter()
                            .map(|row| match cell(row, c) {
                                Raw::Text(t) => Some(t.clone().into_boxed_str()),
                                Raw::Number(n) => Some(format_number(*n).into_boxed_str()),
                                Raw::Absent => None,
                            })
                            .collect(),
                    )
                }
            })
            .collect();
        Ok(Table { index, names: names.into_iter().map(String::into_boxed_str).collect(), columns, updated })
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        self.index.len()
    }

    /// Whether the table has no rows.
    pub fn is_empty(&self) -> bool {
        self.index.is_empty()
    }

    /// The column named `name`, for [`Table::get`].
    pub fn column(&self, name: &str) -> Option<usize> {
        self.names.iter().position(|n| &**n == name)
    }

    /// The columns' names.
    pub fn columns(&self) -> impl Iterator<Item = &str> {
        self.names.iter().map(|n| &**n)
    }

    /// The row of `key`: its cell in `column`, and when the row was
    /// computed (Unix seconds) if the table says. `None` for a key not in
    /// the table.
    pub fn get(&self, key: &str, column: usize) -> Option<(Cell<'_>, Option<f64>)> {
        if column >= self.columns.len() {
            return None;
        }
        Some(self.at(self.row(key)?, column))
    }

    /// The row of `key`, for [`Table::at`]; `None` for a key not in the table.
    pub fn row(&self, key: &str) -> Option<usize> {
        self.index.get(key).map(|&r| r as usize)
    }

    /// Row `row`'s cell in `column`, and when the row was computed.
    ///
    /// # Panics
    /// When `row` or `column` is not in the table: take them from
    /// [`Table::row`] and [`Table::column`].
    pub fn at(&self, row: usize, column: usize) -> (Cell<'_>, Option<f64>) {
        let cell = match &self.columns[column] {
            Column::Numbers(v) if v[row].is_nan() => Cell::Absent,
            Column::Numbers(v) => Cell::Number(v[row]),
            Column::Texts(v) => v[row].as_deref().map_or(Cell::Absent, Cell::Text),
        };
        let updated = self.updated.as_ref().map(|u| u[row]).filter(|t| !t.is_nan());
        (cell, updated)
    }
}

/// The columns and rows of a Parquet file: numbers (integers, floats,
/// decimals), text (strings, dictionaries of strings, booleans as
/// `true`/`false`), and times (timestamps and dates, as Unix seconds).
fn parquet_rows(bytes: Vec<u8>, file: &str) -> Result<(Vec<String>, Vec<Vec<Raw>>), TableError> {
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    let whole = |problem: String| TableError::Cell { file: file.to_owned(), row: 0, column: None, problem };
    let builder = ParquetRecordBatchReaderBuilder::try_new(bytes::Bytes::from(bytes))
        .map_err(|e| whole(format!("not a Parquet file: {e}")))?;
    let total = usize::try_from(builder.metadata().file_metadata().num_rows()).unwrap_or(usize::MAX);
    if total > MAX_ROWS {
        return Err(TableError::TooLarge { file: file.to_owned(), limit: MAX_ROWS });
    }
    let names: Vec<String> = builder.schema().fields().iter().map(|f| f.name().clone()).collect();
    let reader = builder.build().map_err(|e| whole(e.to_string()))?;
    let mut rows: Vec<Vec<Raw>> = Vec::with_capacity(total);
    for batch in reader {
        let batch = batch.map_err(|e| TableError::Cell {
            file: file.to_owned(),
            row: rows.len() + 1,
            column: None,
            problem: e.to_string(),
        })?;
        let first = rows.len();
        rows.extend((0..batch.num_rows()).map(|_| Vec::with_capacity(names.len())));
        for (c, array) in batch.columns().iter().enumerate() {
            let cells = crate::parquet::cells(array.as_ref()).map_err(|problem| TableError::Cell {
                file: file.to_owned(),
                row: first + 1,
                column: Some(names[c].clone()),
                problem,
            })?;
            for (row, cell) in rows[first..].iter_mut().zip(cells) {
                row.push(cell);
            }
        }
        if rows.len() > MAX_ROWS {
            return Err(TableError::TooLarge { file: file.to_owned(), limit: MAX_ROWS });
        }
    }
    Ok((names, rows))
}

/// A row's cell `c`, absent past its end.
fn raw_cell(row: &[Raw], c: usize) -> &Raw {
    static ABSENT: Raw = Raw::Absent;
    row.get(c).unwrap_or(&ABSENT)
}

#[cfg(test)]
mod tests {
    use super::*;

    const CSV: &str = "site,avg_minutes_7d,plug,updated_at\nnorth-1,42.5,ccs2,2026-12-01T00:00:00Z\nsouth-2,,type2,1796083200\n17,30,,\n";

    #[test]
    fn a_csv_table_is_keyed_typed_and_dated() {
        let t = Table::parse(CSV.as_bytes(), RowFormat::Csv, "sites.csv", "site", Some("updated_at")).unwrap();
        assert_eq!(t.len(), 3);
        let minutes = t.column("avg_minutes_7d").unwrap();
        let plug = t.column("plug").unwrap();
        // 2026-12-01T00:00:00Z is 1 796 083 200 s after the Unix epoch (365 + 334 days after 2026-01-01 at 1 767 225 600).
        assert_eq!(t.get("north-1", minutes), Some((Cell::Number(42.5), Some(1_796_083_200.0))));
        assert_eq!(t.get("south-2", minutes), Some((Cell::Absent, Some(1_796_083_200.0))));
        assert_eq!(t.get("south-2", plug), Some((Cell::Text("type2"), Some(1_796_083_200.0))));
        assert_eq!(t.get("17", minutes), Some((Cell::Number(30.0), None)), "a numeric key reads as its text");
        assert_eq!(t.get("west-9", minutes), None);
    }

    #[test]
    fn an_ndjson_table_reads_the_same() {
        let text = "{\"site\": \"north-1\", \"avg_minutes_7d\": 42.5, \"fleet\": true}\n\n{\"site\": \"south-2\", \"avg_minutes_7d\": null}\n";
        let t = Table::parse(text.as_bytes(), RowFormat::Ndjson, "sites.ndjson", "site", None).unwrap();
        assert_eq!(t.get("north-1", t.column("fleet").unwrap()), Some((Cell::Text("true"), None)));
        assert_eq!(t.get("south-2", t.column("fleet").unwrap()), Some((Cell::Absent, None)));
        assert_eq!(t.get("south-2", t.column("avg_minutes_7d").unwrap()), Some((Cell::Absent, None)));
    }

    #[test]
    fn bad_tables_are_refused_naming_row_and_column() {
        let err = |text: &str, format, updated| {
            Table::parse(text.as_bytes(), format, "t", "site", updated).unwrap_err().to_string()
        };
        assert_eq!(err("site,x\na,1\na,2\n", RowFormat::Csv, None), "t: rows 1 and 2 share the key `a`");
        assert_eq!(err("site,x\na,1\n,2\n", RowFormat::Csv, None), "t: row 2, column `site`: no key");
        assert_eq!(err("place,x\na,1\n", RowFormat::Csv, None), "t: no column `site` (the file has place, x)");
        assert!(err("site,x\na,1,3\n", RowFormat::Csv, None).starts_with("t: row 1: "));
        assert!(
            err("site,when\na,yesterday\n", RowFormat::Csv, Some("when"))
                .starts_with("t: row 1, column `when`: `yesterday` is not a time")
        );
        assert!(
            err("{\"site\": \"a\"}\n{\"site\": [1]}\n", RowFormat::Ndjson, None)
                .starts_with("t: row 2, column `site`: an array or object")
        );
        assert!(
            err("{\"site\": \"a\"}\nnot json\n", RowFormat::Ndjson, None).starts_with("t: row 2: not a JSON object")
        );
    }
}
