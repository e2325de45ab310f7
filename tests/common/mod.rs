//! Helpers shared by the integration tests.
#![allow(dead_code)]

use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// Path of a committed fixture table.
pub fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests").join("fixtures").join(name)
}

/// Read a fixture CSV (first line a `#` comment naming its generator) as rows of name → text.
pub fn read_table(name: &str) -> Vec<HashMap<String, String>> {
    let mut rdr = csv::ReaderBuilder::new().comment(Some(b'#')).from_path(fixture(name)).expect("fixture present");
    let h = rdr.headers().unwrap().clone();
    rdr.records()
        .map(|r| {
            let r = r.unwrap();
            h.iter().zip(r.iter()).map(|(a, b)| (a.to_string(), b.to_string())).collect()
        })
        .collect()
}

/// A number from a row.
pub fn num(row: &HashMap<String, String>, k: &str) -> f64 {
    row[k].parse().unwrap_or_else(|_| panic!("column {k}: {:?}", row[k]))
}

/// The shared datasets folder, from `NEPHOCAST_DATASETS` (set by `.ci/run`), or `None` with a
/// message saying plainly that it is absent.
pub fn datasets() -> Option<PathBuf> {
    match std::env::var_os("NEPHOCAST_DATASETS") {
        Some(p) if Path::new(&p).is_dir() => Some(PathBuf::from(p)),
        Some(p) => {
            eprintln!("NEPHOCAST_DATASETS={} is not a folder: the real-data check is SKIPPED", Path::new(&p).display());
            None
        }
        None => {
            eprintln!("NEPHOCAST_DATASETS is not set: the real-data check is SKIPPED (.ci/run sets it)");
            None
        }
    }
}
