//! `paddock score --to parquet`: results written as a Parquet file, the
//! columns a CSV result has (`row`, `id`, the outputs, the contributions,
//! `error`), a row group at a time so memory holds one group.

use std::io::Write;
use std::sync::Arc;

use anyhow::{Context, Result};
use arrow_array::builder::{Float64Builder, StringBuilder, UInt64Builder};
use arrow_array::{ArrayRef, RecordBatch};
use arrow_schema::{DataType, Field, Schema};
use parquet::arrow::ArrowWriter;
use parquet::basic::Compression;
use parquet::file::properties::WriterProperties;

/// Result rows per row group: what the writer holds before it writes.
const GROUP_ROWS: usize = 65_536;

/// A Parquet file of results being written.
pub struct ParquetOut {
    writer: ArrowWriter<Box<dyn Write + Send>>,
    schema: Arc<Schema>,
    with_id: bool,
    row: UInt64Builder,
    id: StringBuilder,
    /// One per output, then one per contribution column.
    values: Vec<Float64Builder>,
    error: StringBuilder,
    pending: usize,
}

impl ParquetOut {
    /// A results file with the id column when `with_id`, `outputs`, and
    /// `why` (contribution columns, named as in CSV), written to `out`.
    pub fn new(out: Box<dyn Write + Send>, with_id: bool, outputs: &[String], why: &[String]) -> Result<ParquetOut> {
        let mut fields = vec![Field::new("row", DataType::UInt64, false)];
        if with_id {
            fields.push(Field::new("id", DataType::Utf8, true));
        }
        fields.extend(outputs.iter().chain(why).map(|name| Field::new(name, DataType::Float64, true)));
        fields.push(Field::new("error", DataType::Utf8, true));
        let schema = Arc::new(Schema::new(fields));
        let properties = WriterProperties::builder()
            .set_compression(Compression::SNAPPY)
            .set_max_row_group_row_count(Some(GROUP_ROWS))
            .build();
        let writer =
            ArrowWriter::try_new(out, schema.clone(), Some(properties)).context("starting the Parquet file")?;
        let values = (0..outputs.len() + why.len()).map(|_| Float64Builder::new()).collect();
        Ok(ParquetOut {
            writer,
            schema,
            with_id,
            row: UInt64Builder::new(),
            id: StringBuilder::new(),
            values,
            error: StringBuilder::new(),
            pending: 0,
        })
    }

    /// Adds one result: its row number, id, and either its values (the
    /// outputs, then the contributions if any) or its error.
    pub fn push(&mut self, number: usize, id: Option<&str>, result: Result<&[f64], &str>) -> Result<()> {
        self.row.append_value(number as u64);
        if self.with_id {
            self.id.append_option(id);
        }
        match result {
            Ok(values) => {
                for (i, column) in self.values.iter_mut().enumerate() {
                    column.append_option(values.get(i).copied());
                }
                self.error.append_null();
            }
            Err(e) => {
                self.values.iter_mut().for_each(Float64Builder::append_null);
                self.error.append_value(e);
            }
        }
        self.pending += 1;
        if self.pending == GROUP_ROWS { self.flush() } else { Ok(()) }
    }

    /// Writes what is pending as a batch (the writer closes a row group at
    /// [`GROUP_ROWS`]).
    fn flush(&mut self) -> Result<()> {
        if self.pending == 0 {
            return Ok(());
        }
        let mut columns: Vec<ArrayRef> = vec![Arc::new(self.row.finish())];
        if self.with_id {
            columns.push(Arc::new(self.id.finish()));
        }
        columns.extend(self.values.iter_mut().map(|c| Arc::new(c.finish()) as ArrayRef));
        columns.push(Arc::new(self.error.finish()));
        let batch = RecordBatch::try_new(self.schema.clone(), columns).context("a batch of results")?;
        self.writer.write(&batch).context("writing results")?;
        self.pending = 0;
        Ok(())
    }

    /// Writes what is pending and the file's footer.
    pub fn finish(mut self) -> Result<()> {
        self.flush()?;
        self.writer.close().context("finishing the Parquet file")?;
        Ok(())
    }
}
