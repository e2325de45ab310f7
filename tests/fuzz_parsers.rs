//! Stable fuzz loops over the site, calibration, measurements and cloud base height parsers:
//! seeded random mutations of valid inputs (tokens such as `nan`, `1e308`, brackets, quotes and
//! odd times inserted; spans deleted; lines duplicated, swapped and cut), each run through the
//! parser and validation, and when accepted through what uses the result. Nothing may panic.
//!
//! `NEPHOCAST_FUZZ_CASES` sets the cases per target (default 300, for CI);
//! `NEPHOCAST_FUZZ_MINUTES`, when set, runs each target for that many minutes instead (long runs);
//! `NEPHOCAST_FUZZ_SEED` the seed (default 1). A failing input is kept under
//! `target/fuzz-failures/`.
mod inputs;

use std::panic::{AssertUnwindSafe, catch_unwind};
use std::path::Path;

/// xorshift64*: small, seeded, the same on every platform.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n.max(1) as u64) as usize
    }
}

const TOKENS: &[&str] = &[
    "nan", "inf", "-inf", "1e308", "-1e308", "0", "-0", "1e-300", "4294967296", "18446744073709551616", "-1", "\"", "[", "]", "{", "}",
    "=", "\n", "#", ",", "[[plant.blocks]]", "[fit]", "[camera]", "true", "\u{0}", "é", "''", "1_000", "0x10", "2026-06-14T10:00:00Z",
    "9999-12-31T23:59:59Z", "0000-01-01T00:00:00Z", "2026-06-14T10:00:00+14:00", "\r\n", "\u{feff}", " ", "1e9", "0.000001", "-50000", "50000",
];
const NUMBERS: &[&str] = &["nan", "inf", "-inf", "1e308", "-1e308", "0", "-1", "1e-300", "99999999999", "0.5", "-273", "15001", "49"];

fn mutate(rng: &mut Rng, text: &str) -> String {
    let mut s: Vec<char> = text.chars().collect();
    for _ in 0..1 + rng.below(2) {
        let n = s.len();
        match rng.below(8) {
            0 if n > 0 => {
                let a = rng.below(n);
                let b = (a + 1 + rng.below(20)).min(n);
                s.drain(a..b);
            }
            1 => {
                let at = rng.below(n + 1);
                let t = TOKENS[rng.below(TOKENS.len())];
                s.splice(at..at, t.chars());
            }
            2 => {
                // Replace a run of digits (a number) with an interesting one.
                let starts: Vec<usize> = (0..n).filter(|&i| s[i].is_ascii_digit() && (i == 0 || !s[i - 1].is_ascii_alphanumeric())).collect();
                if let Some(&a) = starts.get(rng.below(starts.len())) {
                    let b = (a..n).find(|&i| !(s[i].is_ascii_digit() || s[i] == '.' || s[i] == 'e' || s[i] == '-')).unwrap_or(n);
                    let t = NUMBERS[rng.below(NUMBERS.len())];
                    s.splice(a..b, t.chars());
                }
            }
            3 | 4 | 7 => {
                let text: String = s.iter().collect();
                let mut lines: Vec<&str> = text.split('\n').collect();
                let (i, j) = (rng.below(lines.len()), rng.below(lines.len()));
                match rng.below(3) {
                    0 => lines.insert(i, lines[j]),
                    1 => lines.swap(i, j),
                    _ => lines[i] = lines[j],
                }
                s = lines.join("\n").chars().collect();
            }
            5 if n > 0 => s.truncate(rng.below(n)),
            _ => {
                let at = rng.below(n + 1);
                let c = char::from_u32(rng.below(0x3000) as u32).unwrap_or('?');
                s.insert(at, c);
            }
        }
    }
    s.into_iter().collect()
}

fn cases() -> usize {
    std::env::var("NEPHOCAST_FUZZ_CASES").ok().and_then(|v| v.parse().ok()).unwrap_or(300)
}

/// A run length in minutes, when one is asked for (`NEPHOCAST_FUZZ_MINUTES`): the loop runs until it
/// has passed rather than for a number of cases. A run length, not a time limit on what is tested.
fn minutes() -> Option<f64> {
    std::env::var("NEPHOCAST_FUZZ_MINUTES").ok().and_then(|v| v.parse().ok()).filter(|m: &f64| m.is_finite() && *m > 0.0)
}

fn seed() -> u64 {
    std::env::var("NEPHOCAST_FUZZ_SEED").ok().and_then(|v| v.parse().ok()).unwrap_or(1)
}

/// Run `n` mutated cases of `base` through `run`; on a panic keep the input and fail.
fn fuzz(target: &str, salt: u64, base: &str, run: impl Fn(&str) -> bool) {
    let until = minutes().map(|m| std::time::Instant::now() + std::time::Duration::from_secs_f64(m * 60.0));
    let n = if until.is_some() { usize::MAX } else { cases() };
    let mut rng = Rng(seed().wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ salt | 1);
    let mut accepted = 0;
    let t0 = std::time::Instant::now();
    let mut done = 0;
    for k in 0..n {
        if k % 256 == 0 && until.is_some_and(|u| std::time::Instant::now() >= u) {
            break;
        }
        done += 1;
        let text = mutate(&mut rng, base);
        match catch_unwind(AssertUnwindSafe(|| run(&text))) {
            Ok(ok) => accepted += usize::from(ok),
            Err(_) => {
                let dir = Path::new(env!("CARGO_TARGET_TMPDIR")).join("fuzz-failures");
                std::fs::create_dir_all(&dir).unwrap();
                let p = dir.join(format!("{target}-{k}.txt"));
                std::fs::write(&p, &text).unwrap();
                panic!("{target}: case {k} panicked; input kept in {}", p.display());
            }
        }
    }
    println!(
        "fuzz {target}: {done} cases (seed {}) in {:.1} min, {accepted} accepted, {} refused, no panic",
        seed(),
        t0.elapsed().as_secs_f64() / 60.0,
        done - accepted
    );
}

#[test]
fn fuzz_site_parser() {
    fuzz("site", 1, inputs::SITE, |t| match inputs::site(t) {
        Ok(s) => {
            // Validated work must stay bounded: lay the plant out.
            let plant = nephocast::plant::Plant::from_section(&s.plant);
            assert!(plant.point_count() as u64 <= 2 * nephocast::config::MAX_PLANT_POINTS + s.plant.blocks.len() as u64);
            let _ = s.memory_estimate();
            true
        }
        Err(e) => {
            assert!(e.to_string().starts_with("site.toml"), "{e}");
            false
        }
    });
}

#[test]
fn fuzz_calibration_parser() {
    fuzz("calibration", 2, inputs::CALIBRATION, |t| match inputs::calibration(t) {
        Ok(c) => {
            let cam = c.validate(Path::new("cam.toml")).unwrap();
            for z in [0.0f64, 30.0, 60.0, 89.0] {
                if let Some((x, y)) = cam.project(z.to_radians(), 1.0) {
                    let _ = cam.unproject(x, y);
                }
            }
            true
        }
        Err(e) => {
            assert!(e.to_string().starts_with("cam.toml"), "{e}");
            false
        }
    });
}

#[test]
fn fuzz_measurements_parser() {
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("m.csv");
    fuzz("measurements", 3, &inputs::measurements(), |t| {
        std::fs::write(&p, t).unwrap();
        match inputs::measurements_file(&p) {
            Ok(_) => {
                let m = nephocast::io::Measurements::read_csv(&p).unwrap();
                if let Some(&t0) = m.times.first() {
                    for c in 0..m.names.len() {
                        let _ = m.at(c, &t0);
                        let _ = m.completed_at(c, &(t0 + chrono::Duration::minutes(5)));
                        let _ = m.stuck_at(c, &t0, 10);
                    }
                }
                true
            }
            Err(e) => {
                assert!(e.to_string().contains("m.csv"), "{e}");
                false
            }
        }
    });
}

#[test]
fn fuzz_series_parser() {
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("cbh.csv");
    fuzz("cbh-series", 4, &inputs::series(), |t| {
        std::fs::write(&p, t).unwrap();
        match inputs::series_file(&p) {
            Ok(s) => {
                let t0 = s.times[0];
                for k in [-5i64, 0, 3, 61] {
                    let _ = s.at(&(t0 + chrono::Duration::minutes(k)), 600.0);
                }
                true
            }
            Err(e) => {
                assert!(e.to_string().contains("cbh.csv"), "{e}");
                false
            }
        }
    });
}
