//! `forecasts.parquet` (Cargo feature `parquet`): a replay and each day of a batch write it beside
//! `forecasts.csv`, with the same columns and values, read back here with the arrow-rs reader.
//! Run with `cargo test --release --features parquet --test parquet`.
#![cfg(feature = "parquet")]

use std::path::Path;
use std::process::Command;

use arrow_array::{Array, Float64Array, RecordBatch, StringArray, TimestampMicrosecondArray, UInt32Array};
use arrow_schema::{DataType, TimeUnit};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;

fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_nephocast"))
}

fn demo() -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
}

/// Copy the first `n` demo frames into `dir`.
fn demo_frames(dir: &Path, skip: usize, n: usize) {
    std::fs::create_dir_all(dir).unwrap();
    let mut f: Vec<_> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    f.sort();
    for p in f.iter().skip(skip).take(n) {
        std::fs::copy(p, dir.join(p.file_name().unwrap())).unwrap();
    }
}

/// One cell of the Parquet table as the CSV would print it, for the comparison: times in RFC 3339
/// (compared as instants), numbers compared as numbers, null as empty.
fn check_cell(batch: &RecordBatch, col: usize, row: usize, csv: &str, what: &str) {
    let a = batch.column(col);
    if a.is_null(row) {
        assert_eq!(csv, "", "{what}: null in Parquet");
        return;
    }
    match a.data_type() {
        DataType::Timestamp(TimeUnit::Microsecond, Some(tz)) => {
            assert_eq!(tz.as_ref(), "UTC", "{what}");
            let v = a.as_any().downcast_ref::<TimestampMicrosecondArray>().unwrap().value(row);
            let t = chrono::DateTime::parse_from_rfc3339(csv).unwrap_or_else(|e| panic!("{what}: {csv:?}: {e}"));
            assert_eq!(v, t.timestamp_micros(), "{what}");
        }
        DataType::UInt32 => assert_eq!(a.as_any().downcast_ref::<UInt32Array>().unwrap().value(row), csv.parse::<u32>().unwrap(), "{what}"),
        DataType::Utf8 => assert_eq!(a.as_any().downcast_ref::<StringArray>().unwrap().value(row), csv, "{what}"),
        DataType::Float64 => assert_eq!(a.as_any().downcast_ref::<Float64Array>().unwrap().value(row), csv.parse::<f64>().unwrap(), "{what}"),
        t => panic!("{what}: unexpected type {t}"),
    }
}

/// `dir/forecasts.parquet` holds exactly `dir/forecasts.csv`: same column names in the same order,
/// the expected types, the same number of rows and every value equal. Returns the row count.
fn parquet_equals_csv(dir: &Path) -> usize {
    let file = std::fs::File::open(dir.join("forecasts.parquet")).unwrap();
    let batches: Vec<RecordBatch> = ParquetRecordBatchReaderBuilder::try_new(file).unwrap().build().unwrap().map(Result::unwrap).collect();
    let mut rdr = csv::Reader::from_path(dir.join("forecasts.csv")).unwrap();
    let header: Vec<String> = rdr.headers().unwrap().iter().map(str::to_string).collect();
    let schema = batches[0].schema();
    let names: Vec<&str> = schema.fields().iter().map(|f| f.name().as_str()).collect();
    assert_eq!(names, header, "column names and order");
    let ty = |n: &str| schema.field_with_name(n).unwrap().data_type().clone();
    assert_eq!(ty("issue_time_utc"), DataType::Timestamp(TimeUnit::Microsecond, Some("UTC".into())));
    assert_eq!(ty("target_time_utc"), DataType::Timestamp(TimeUnit::Microsecond, Some("UTC".into())));
    assert_eq!(ty("horizon_s"), DataType::UInt32);
    assert_eq!(ty("fallback"), DataType::UInt32);
    assert_eq!(ty("block"), DataType::Utf8);
    assert_eq!(ty("ghi_wm2"), DataType::Float64);
    assert_eq!(ty("ghi_p10_wm2"), DataType::Float64);
    let rows: Vec<csv::StringRecord> = rdr.records().map(Result::unwrap).collect();
    assert_eq!(batches.iter().map(RecordBatch::num_rows).sum::<usize>(), rows.len());
    let mut it = rows.iter().enumerate();
    for b in &batches {
        for r in 0..b.num_rows() {
            let (line, rec) = it.next().unwrap();
            for (c, cell) in rec.iter().enumerate() {
                check_cell(b, c, r, cell, &format!("{}: line {}, column {}", dir.display(), line + 2, header[c]));
            }
        }
    }
    rows.len()
}

#[test]
fn replay_writes_forecasts_parquet_equal_to_the_csv() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    demo_frames(&frames, 0, 12);
    let out = d.path().join("out");
    let o = bin()
        .args(["replay", "--quiet", "--site", demo().join("site.toml").to_str().unwrap(), "--frames", frames.to_str().unwrap(), "--out", out.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(String::from_utf8_lossy(&o.stdout).contains("forecasts.parquet"));
    let n = parquet_equals_csv(&out);
    assert!(n > 100, "{n} rows");
    // Committed with the set: listed in the manifest, no staging left behind.
    let manifest = std::fs::read_to_string(out.join("manifest.json")).unwrap();
    assert!(manifest.contains("forecasts.parquet"), "{manifest}");
    assert!(std::fs::read_dir(d.path()).unwrap().flatten().all(|e| !e.file_name().to_string_lossy().contains("staging")));
}

/// Without ensemble members the rows carry no band: the band cells are empty in the CSV and null
/// in the Parquet file, while the other columns stay filled.
#[test]
fn bands_without_members_are_null() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    demo_frames(&frames, 0, 6);
    // The demo site with no ensemble members, its calibration beside it.
    let site = d.path().join("site");
    std::fs::create_dir_all(site.join("calibration")).unwrap();
    std::fs::copy(demo().join("calibration").join("larkspur-sky1.toml"), site.join("calibration").join("larkspur-sky1.toml")).unwrap();
    let text = std::fs::read_to_string(demo().join("site.toml")).unwrap();
    assert!(text.contains("ensemble_members = 20"), "the demo site's ensemble size moved");
    std::fs::write(site.join("site.toml"), text.replace("ensemble_members = 20", "ensemble_members = 0")).unwrap();
    let out = d.path().join("out");
    let o = bin()
        .args(["replay", "--quiet", "--site", site.join("site.toml").to_str().unwrap(), "--frames", frames.to_str().unwrap(), "--out", out.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(parquet_equals_csv(&out) > 0);
    let file = std::fs::File::open(out.join("forecasts.parquet")).unwrap();
    let batches: Vec<RecordBatch> = ParquetRecordBatchReaderBuilder::try_new(file).unwrap().build().unwrap().map(Result::unwrap).collect();
    for b in &batches {
        let schema = b.schema();
        for (i, field) in schema.fields().iter().enumerate() {
            let nulls = b.column(i).null_count();
            if field.name().contains("_p10_") || field.name().contains("_p50_") || field.name().contains("_p90_") {
                assert_eq!(nulls, b.num_rows(), "{}: every band cell null", field.name());
            } else {
                assert_eq!(nulls, 0, "{}: no null", field.name());
            }
        }
    }
}

#[test]
fn each_batch_day_writes_forecasts_parquet() {
    let d = tempfile::tempdir().unwrap();
    let days = d.path().join("days");
    demo_frames(&days.join("2026-06-14a"), 0, 8);
    demo_frames(&days.join("2026-06-14b"), 8, 8);
    let out = d.path().join("out");
    let o = bin()
        .args(["replay", "--batch", "--quiet", "--site", demo().join("site.toml").to_str().unwrap(), "--frames", days.to_str().unwrap(), "--out", out.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    for day in ["2026-06-14a", "2026-06-14b"] {
        assert!(parquet_equals_csv(&out.join("days").join(day)) > 0, "{day}");
    }
}
