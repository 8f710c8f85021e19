//! Parquet files as rows: a column's cells as numbers, text or absent (for
//! feature tables), and a file read as a model's records one batch of rows
//! at a time, so a file far larger than memory streams through.
//!
//! Columns map to features by name, as a CSV header's do: the id column
//! and ignored columns are left out, and any other column that is not a
//! feature refuses the file before a row is read. Numbers stay numbers
//! (an integral one fits a whole-number feature), booleans and text read
//! as a CSV cell's text does, and a null is an absent value. What this is
//! not: a writer (results are written by the command that scores), or a
//! reader of nested columns (lists, structs, maps are refused naming the
//! column).

use std::fs::File;

use arrow_array::Array;
use paddock_host::contract::Domain;
use paddock_host::contract::row_file::{self, Columns, Record, RecordError, RowFileError};
use paddock_host::contract::rows::{Row, Value};
use paddock_host::contract::schema::Schema;
use parquet::arrow::arrow_reader::{ParquetRecordBatchReader, ParquetRecordBatchReaderBuilder};

/// A cell as a file holds it, before its column is typed.
pub(crate) enum Raw {
    Number(f64),
    Text(String),
    Absent,
}

/// One Parquet (Arrow) column's cells.
pub(crate) fn cells(array: &dyn Array) -> Result<Vec<Raw>, String> {
    use arrow_array::cast::AsArray;
    use arrow_array::types::{
        Date32Type, Decimal128Type, Float32Type, Float64Type, Int8Type, Int16Type, Int32Type, Int64Type,
        TimestampMicrosecondType, TimestampMillisecondType, TimestampNanosecondType, TimestampSecondType, UInt8Type,
        UInt16Type, UInt32Type, UInt64Type,
    };
    use arrow_schema::{DataType, TimeUnit};
    fn numbers<T: arrow_array::ArrowPrimitiveType>(array: &dyn Array, f: impl Fn(T::Native) -> f64) -> Vec<Raw> {
        array.as_primitive::<T>().iter().map(|v| v.map_or(Raw::Absent, |v| Raw::Number(f(v)))).collect()
    }
    let texts = |it: &mut dyn Iterator<Item = Option<&str>>| {
        it.map(|v| v.map_or(Raw::Absent, |t| Raw::Text(t.to_owned()))).collect()
    };
    Ok(match array.data_type() {
        DataType::Null => (0..array.len()).map(|_| Raw::Absent).collect(),
        DataType::Float64 => numbers::<Float64Type>(array, |v| v),
        DataType::Float32 => numbers::<Float32Type>(array, f64::from),
        DataType::Int8 => numbers::<Int8Type>(array, f64::from),
        DataType::Int16 => numbers::<Int16Type>(array, f64::from),
        DataType::Int32 => numbers::<Int32Type>(array, f64::from),
        DataType::Int64 => numbers::<Int64Type>(array, |v| v as f64),
        DataType::UInt8 => numbers::<UInt8Type>(array, f64::from),
        DataType::UInt16 => numbers::<UInt16Type>(array, f64::from),
        DataType::UInt32 => numbers::<UInt32Type>(array, f64::from),
        DataType::UInt64 => numbers::<UInt64Type>(array, |v| v as f64),
        DataType::Decimal128(_, scale) => {
            let scale = 10f64.powi(i32::from(*scale));
            numbers::<Decimal128Type>(array, |v| v as f64 / scale)
        }
        DataType::Timestamp(TimeUnit::Second, _) => numbers::<TimestampSecondType>(array, |v| v as f64),
        DataType::Timestamp(TimeUnit::Millisecond, _) => numbers::<TimestampMillisecondType>(array, |v| v as f64 / 1e3),
        DataType::Timestamp(TimeUnit::Microsecond, _) => numbers::<TimestampMicrosecondType>(array, |v| v as f64 / 1e6),
        DataType::Timestamp(TimeUnit::Nanosecond, _) => numbers::<TimestampNanosecondType>(array, |v| v as f64 / 1e9),
        DataType::Date32 => numbers::<Date32Type>(array, |d| f64::from(d) * 86_400.0),
        DataType::Boolean => {
            array.as_boolean().iter().map(|v| v.map_or(Raw::Absent, |b| Raw::Text(b.to_string()))).collect()
        }
        DataType::Utf8 => texts(&mut array.as_string::<i32>().iter()),
        DataType::LargeUtf8 => texts(&mut array.as_string::<i64>().iter()),
        DataType::Utf8View => texts(&mut array.as_string_view().iter()),
        DataType::Dictionary(..) => {
            let dictionary = array.as_any_dictionary();
            let values = cells(dictionary.values().as_ref())?;
            let keys = dictionary.keys();
            dictionary
                .normalized_keys()
                .into_iter()
                .enumerate()
                .map(|(i, k)| match (keys.is_null(i), values.get(k)) {
                    (false, Some(Raw::Number(n))) => Raw::Number(*n),
                    (false, Some(Raw::Text(t))) => Raw::Text(t.clone()),
                    _ => Raw::Absent,
                })
                .collect()
        }
        other => return Err(format!("a column of type {other}, not numbers, text, booleans, timestamps or dates")),
    })
}

/// A number as text: whole numbers without a fraction (`42`, not `42.0`).
pub(crate) fn format_number(n: f64) -> String {
    if n.fract() == 0.0 && n.abs() < 1e15 { format!("{}", n as i64) } else { n.to_string() }
}

/// Rows read from a Parquet file per batch: a row group is read a batch at
/// a time, so memory holds one batch of one row group's columns.
pub const BATCH_ROWS: usize = 8192;

/// Why a Parquet file cannot be read as rows at all (a bad record is not
/// this: it is reported with its number and the rest carry on).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ParquetRowsError {
    /// The file is not Parquet, or its footer cannot be read.
    #[error("not a Parquet file: {0}")]
    NotParquet(String),
    /// Its columns do not fit the contract (as a CSV header's would not).
    #[error(transparent)]
    Columns(#[from] RowFileError),
    /// A column of a type rows cannot hold (lists, structs, maps…).
    #[error("column `{column}`: {problem}")]
    ColumnType {
        /// The column.
        column: String,
        /// What is wrong with it.
        problem: String,
    },
}

/// The records of a Parquet file, numbered from 1 in file order.
pub struct Records<'a> {
    reader: ParquetRecordBatchReader,
    schema: &'a Schema,
    /// Per file column: the feature it fills, or none (the id, ignored).
    features: Vec<Option<String>>,
    /// Per file column: whether its feature takes labels (a number there
    /// reads as its text), looked up once.
    labelled: Vec<bool>,
    id_at: Option<usize>,
    /// The current batch's records, in reverse (taken from the end).
    pending: Vec<Record>,
    /// Records given or pending so far.
    read: usize,
    /// After a batch could not be read: nothing more is.
    ended: bool,
    total: u64,
}

/// Opens `file` as records for `schema`'s contract: each column is a
/// feature, `columns.id`, or one of `columns.ignore`.
///
/// # Errors
/// [`ParquetRowsError`] for a file that is not Parquet, a column that is
/// not a feature (and neither the id nor ignored), a missing id column, or
/// a column of a type rows cannot hold.
pub fn records<'a>(file: File, schema: &'a Schema, columns: Columns<'_>) -> Result<Records<'a>, ParquetRowsError> {
    let builder = ParquetRecordBatchReaderBuilder::try_new(file)
        .map_err(|e| ParquetRowsError::NotParquet(e.to_string()))?
        .with_batch_size(BATCH_ROWS);
    let header: Vec<String> = builder.schema().fields().iter().map(|f| f.name().clone()).collect();
    for field in builder.schema().fields() {
        if field.data_type().is_nested() {
            let problem = format!("a column of type {}, not numbers, text or booleans", field.data_type());
            return Err(ParquetRowsError::ColumnType { column: field.name().clone(), problem });
        }
    }
    let (id_at, keep) = row_file::place_columns(&header, schema, columns)?;
    let features: Vec<Option<String>> = header.into_iter().zip(keep).map(|(h, keep)| keep.then_some(h)).collect();
    let domain = |name: &str| schema.feature_index(name).map(|i| &schema.contract().features[i].domain);
    let labelled = features.iter().map(|f| matches!(f.as_deref().and_then(domain), Some(Domain::Label(_)))).collect();
    let total = u64::try_from(builder.metadata().file_metadata().num_rows()).unwrap_or(0);
    let reader = builder.build().map_err(|e| ParquetRowsError::NotParquet(e.to_string()))?;
    Ok(Records { reader, schema, features, labelled, id_at, pending: Vec::new(), read: 0, ended: false, total })
}

impl Records<'_> {
    /// Rows in the file, as its footer counts them.
    pub fn total(&self) -> u64 {
        self.total
    }

    /// The next batch's records (reversed into `pending`); `false` at the
    /// end. A batch that cannot be read or converted gives one record
    /// saying so, numbered as its first row, and ends the file.
    fn next_batch(&mut self) -> bool {
        let batch = match self.reader.next() {
            None => return false,
            Some(Ok(batch)) => batch,
            Some(Err(e)) => return self.fail(format!("cannot read rows {} onwards: {e}", self.read + 1)),
        };
        let mut columns = Vec::with_capacity(batch.num_columns());
        for (c, array) in batch.columns().iter().enumerate() {
            match cells(array.as_ref()) {
                Ok(cells) => columns.push(cells.into_iter()),
                Err(problem) => {
                    let name = self.features[c].clone().unwrap_or_default();
                    return self.fail(format!("column `{name}`: {problem}"));
                }
            }
        }
        let first = self.read + 1;
        self.read += batch.num_rows();
        let mut records = Vec::with_capacity(batch.num_rows());
        for number in first..=self.read {
            let mut row = Row::with_capacity(columns.len());
            let mut id = None;
            for (c, cells) in columns.iter_mut().enumerate() {
                let cell = cells.next().unwrap_or(Raw::Absent);
                if Some(c) == self.id_at {
                    id = match cell {
                        Raw::Number(n) => Some(format_number(n)),
                        Raw::Text(t) => Some(t),
                        Raw::Absent => None,
                    };
                } else if let Some(feature) = &self.features[c] {
                    row.insert(feature.clone(), self.value(feature, self.labelled[c], cell));
                }
            }
            records.push(Record { number, id, row: Ok(row) });
        }
        records.reverse();
        self.pending = records;
        true
    }

    /// A cell as the value of `feature`: a number of a `labelled` feature
    /// reads as its text, as a CSV cell would.
    fn value(&self, feature: &str, labelled: bool, cell: Raw) -> Value {
        match cell {
            Raw::Absent => Value::Absent,
            Raw::Text(t) => self.schema.value_from_text(feature, &t),
            Raw::Number(n) if labelled => self.schema.value_from_text(feature, &format_number(n)),
            Raw::Number(n) => Value::Number(n),
        }
    }

    /// Ends the file with one record saying why.
    fn fail(&mut self, problem: String) -> bool {
        self.ended = true;
        self.pending = vec![Record { number: self.read + 1, id: None, row: Err(RecordError::Unreadable(problem)) }];
        true
    }
}

impl Iterator for Records<'_> {
    type Item = Record;

    fn next(&mut self) -> Option<Record> {
        loop {
            if let Some(record) = self.pending.pop() {
                return Some(record);
            }
            if self.ended || !self.next_batch() {
                return None;
            }
        }
    }
}
