//! Apache Parquet copies of CSV outputs (Cargo feature `parquet`, arrow-rs), for pandas and polars.
//!
//! A table is converted from the CSV bytes the run has just written, so the Parquet file holds the
//! same columns, in the same order, with the same values: a column whose name ends in `_time_utc`
//! becomes a UTC timestamp in microseconds (`Timestamp(Microsecond, "UTC")`; the CSV's RFC 3339
//! times carry at most milliseconds), the columns named in [`U32_COLUMNS`] unsigned 32-bit
//! integers, those in [`TEXT_COLUMNS`] UTF-8 text, and every other column a 64-bit float. An empty
//! CSV cell is a null. Snappy compression; arrow-rs's default row groups.

use std::sync::Arc;

use arrow_array::{ArrayRef, Float64Array, RecordBatch, StringArray, TimestampMicrosecondArray, UInt32Array};
use arrow_schema::{DataType, Field, Schema, TimeUnit};
use parquet::arrow::ArrowWriter;
use parquet::basic::Compression;
use parquet::file::properties::WriterProperties;

/// Columns stored as unsigned 32-bit integers.
pub const U32_COLUMNS: [&str; 2] = ["horizon_s", "fallback"];
/// Columns stored as UTF-8 text.
pub const TEXT_COLUMNS: [&str; 1] = ["block"];

/// Why a CSV table could not be turned into Parquet.
#[derive(Debug, thiserror::Error)]
pub enum ParquetOutError {
    /// The CSV could not be read (line 1 is the header).
    #[error("{table}: line {line}: {source}")]
    Csv {
        /// The table's file name.
        table: String,
        /// The line.
        line: u64,
        /// The CSV reader's error.
        source: csv::Error,
    },
    /// A cell does not hold its column's type.
    #[error("{table}: line {line}, column {column}: expected {expected}, got {value:?}")]
    Cell {
        /// The table's file name.
        table: String,
        /// The line (1 is the header).
        line: u64,
        /// The column's name.
        column: String,
        /// What the column holds.
        expected: &'static str,
        /// The cell.
        value: String,
    },
    /// The arrow-rs writer failed.
    #[error("{table}: Parquet: {source}")]
    Parquet {
        /// The table's file name.
        table: String,
        /// The writer's error.
        source: parquet::errors::ParquetError,
    },
    /// The columns did not make a record batch.
    #[error("{table}: Arrow: {source}")]
    Arrow {
        /// The table's file name.
        table: String,
        /// The error.
        source: arrow_schema::ArrowError,
    },
}

/// The type a column is stored with.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    Time,
    U32,
    Text,
    F64,
}

impl Kind {
    fn of(name: &str) -> Kind {
        if name.ends_with("_time_utc") || name == "time_utc" {
            Kind::Time
        } else if U32_COLUMNS.contains(&name) {
            Kind::U32
        } else if TEXT_COLUMNS.contains(&name) {
            Kind::Text
        } else {
            Kind::F64
        }
    }

    fn data_type(self) -> DataType {
        match self {
            Kind::Time => DataType::Timestamp(TimeUnit::Microsecond, Some("UTC".into())),
            Kind::U32 => DataType::UInt32,
            Kind::Text => DataType::Utf8,
            Kind::F64 => DataType::Float64,
        }
    }

    fn expected(self) -> &'static str {
        match self {
            Kind::Time => "an RFC 3339 time",
            Kind::U32 => "a whole number from 0 to 4294967295",
            Kind::Text => "text",
            Kind::F64 => "a number",
        }
    }
}

/// One column's values as read.
enum Values {
    Time(Vec<Option<i64>>),
    U32(Vec<Option<u32>>),
    Text(Vec<String>),
    F64(Vec<Option<f64>>),
}

impl Values {
    fn new(kind: Kind) -> Values {
        match kind {
            Kind::Time => Values::Time(vec![]),
            Kind::U32 => Values::U32(vec![]),
            Kind::Text => Values::Text(vec![]),
            Kind::F64 => Values::F64(vec![]),
        }
    }

    /// Add a cell; `false` when it does not parse.
    fn push(&mut self, cell: &str) -> bool {
        let empty = cell.is_empty();
        match self {
            Values::Time(v) if empty => v.push(None),
            Values::Time(v) => match chrono::DateTime::parse_from_rfc3339(cell) {
                Ok(t) => v.push(Some(t.timestamp_micros())),
                Err(_) => return false,
            },
            Values::U32(v) if empty => v.push(None),
            Values::U32(v) => match cell.parse() {
                Ok(x) => v.push(Some(x)),
                Err(_) => return false,
            },
            Values::Text(v) => v.push(cell.to_string()),
            Values::F64(v) if empty => v.push(None),
            Values::F64(v) => match cell.parse() {
                Ok(x) => v.push(Some(x)),
                Err(_) => return false,
            },
        }
        true
    }

    fn into_array(self) -> ArrayRef {
        match self {
            Values::Time(v) => Arc::new(TimestampMicrosecondArray::from(v).with_timezone("UTC")),
            Values::U32(v) => Arc::new(UInt32Array::from(v)),
            Values::Text(v) => Arc::new(StringArray::from(v)),
            Values::F64(v) => Arc::new(Float64Array::from(v)),
        }
    }
}

/// The Parquet file (bytes) holding the CSV table `csv` (with its header line); `table` names it in
/// errors.
///
/// # Errors
/// A CSV line that cannot be read or a cell not of its column's type (line and column named), or a
/// failure of the writer.
pub fn csv_to_parquet(table: &str, csv: &[u8]) -> Result<Vec<u8>, ParquetOutError> {
    let mut rdr = csv::ReaderBuilder::new().has_headers(true).from_reader(csv);
    let csv_err = |line: u64, source| ParquetOutError::Csv { table: table.to_string(), line, source };
    let names: Vec<String> = rdr.headers().map_err(|e| csv_err(1, e))?.iter().map(str::to_string).collect();
    let kinds: Vec<Kind> = names.iter().map(|n| Kind::of(n)).collect();
    let mut cols: Vec<Values> = kinds.iter().map(|k| Values::new(*k)).collect();
    for (i, rec) in rdr.records().enumerate() {
        let line = i as u64 + 2;
        let rec = rec.map_err(|e| csv_err(line, e))?;
        for ((col, cell), (name, kind)) in cols.iter_mut().zip(rec.iter()).zip(names.iter().zip(&kinds)) {
            if !col.push(cell) {
                return Err(ParquetOutError::Cell { table: table.to_string(), line, column: name.clone(), expected: kind.expected(), value: cell.to_string() });
            }
        }
    }
    let schema = Arc::new(Schema::new(names.iter().zip(&kinds).map(|(n, k)| Field::new(n, k.data_type(), *k != Kind::Text)).collect::<Vec<_>>()));
    let batch = RecordBatch::try_new(schema.clone(), cols.into_iter().map(Values::into_array).collect())
        .map_err(|source| ParquetOutError::Arrow { table: table.to_string(), source })?;
    let pq = |source| ParquetOutError::Parquet { table: table.to_string(), source };
    let props = WriterProperties::builder().set_compression(Compression::SNAPPY).build();
    let mut w = ArrowWriter::try_new(Vec::new(), schema, Some(props)).map_err(pq)?;
    w.write(&batch).map_err(pq)?;
    w.into_inner().map_err(pq)
}

#[cfg(test)]
mod tests {
    use super::*;
    use arrow_array::Array;
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;

    #[test]
    fn types_nulls_and_values_survive() {
        let csv = b"issue_time_utc,horizon_s,block,ghi_wm2,ghi_p10_wm2\n2026-06-14T08:30:00Z,60,plant,512.25,\n2026-06-14T08:30:00.500Z,120,\"a,b\",-1.5,3\n";
        let mut f = tempfile::tempfile().unwrap();
        std::io::Write::write_all(&mut f, &csv_to_parquet("t.csv", csv).unwrap()).unwrap();
        let mut r = ParquetRecordBatchReaderBuilder::try_new(f).unwrap().build().unwrap();
        let b = r.next().unwrap().unwrap();
        assert_eq!(b.num_rows(), 2);
        let t = b.column(0).as_any().downcast_ref::<TimestampMicrosecondArray>().unwrap();
        assert_eq!(t.value(1) - t.value(0), 500_000);
        assert_eq!(b.column(1).as_any().downcast_ref::<UInt32Array>().unwrap().value(1), 120);
        assert_eq!(b.column(2).as_any().downcast_ref::<StringArray>().unwrap().value(1), "a,b");
        let g = b.column(4).as_any().downcast_ref::<Float64Array>().unwrap();
        assert!(g.is_null(0) && g.value(1) == 3.0);
    }

    #[test]
    fn a_bad_cell_is_named() {
        let e = csv_to_parquet("f.csv", b"horizon_s,ghi_wm2\n60,1\n-3,2\n").unwrap_err().to_string();
        assert!(e.contains("f.csv: line 3, column horizon_s"), "{e}");
    }
}
