//! Whole-frame JPEG decoders compared on frames: CPU time per frame on this thread (median) and
//! pixel differences against the pure-Rust decoder (`zune-jpeg`, the `image` crate's own, which
//! the engine's figures are recorded with). The intake uses libjpeg-turbo for whole frames only
//! with `NEPHOCAST_SYSTEM_JPEG_WHOLE` set, so set it to compare:
//!
//! ```sh
//! NEPHOCAST_SYSTEM_JPEG_WHOLE=1 cargo run --release --example decode_compare -- FRAME.jpg … | FOLDER_OF_JPEGS
//! ```

use nephocast::intake::{Format, IntakeOptions, SYSTEM_LIBJPEG, decode, decode_general, from_bytes, recycle};

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// CPU time of this thread [ms] (the machine's load does not inflate it).
fn thread_cpu_ms() -> f64 {
    let mut ts = libc::timespec { tv_sec: 0, tv_nsec: 0 };
    // SAFETY: a valid clock id and a live timespec.
    unsafe { libc::clock_gettime(libc::CLOCK_THREAD_CPUTIME_ID, &mut ts) };
    ts.tv_sec as f64 * 1e3 + ts.tv_nsec as f64 / 1e6
}

fn main() {
    let mut files = vec![];
    for a in std::env::args().skip(1) {
        let p = std::path::PathBuf::from(a);
        if p.is_dir() {
            let mut v: Vec<_> = std::fs::read_dir(&p).expect("readable folder").filter_map(|e| e.ok().map(|e| e.path())).filter(|p| p.extension().is_some_and(|x| x == "jpg" || x == "jpeg")).collect();
            v.sort();
            files.extend(v);
        } else {
            files.push(p);
        }
    }
    assert!(!files.is_empty(), "usage: decode_compare FRAME.jpg … | FOLDER_OF_JPEGS");
    let jpegs: Vec<Vec<u8>> = files.iter().map(|p| std::fs::read(p).expect("readable frame")).collect();
    let o = IntakeOptions::default();
    // At least 100 decodes of each kind.
    let rounds = 100usize.div_ceil(jpegs.len()).max(3);
    let (mut t_gen, mut t_rust, mut t_intake) = (vec![], vec![], vec![]);
    let (mut differ, mut max_diff, mut signed, mut total) = (0usize, 0u8, 0i64, 0usize);
    for round in 0..rounds {
        for j in &jpegs {
            let c = thread_cpu_ms();
            let general = decode_general(j, Format::Jpeg, &o).expect("decodes");
            t_gen.push(thread_cpu_ms() - c);
            let c = thread_cpu_ms();
            let rust = decode(j, Format::Jpeg, &o).expect("decodes");
            t_rust.push(thread_cpu_ms() - c);
            let c = thread_cpu_ms();
            let intake = from_bytes(j, &o).expect("decodes");
            t_intake.push(thread_cpu_ms() - c);
            if round == 0 {
                assert!(general.as_raw() == rust.as_raw(), "zune-jpeg called directly gives the image crate's pixels");
                total += rust.as_raw().len();
                for (a, b) in rust.as_raw().iter().zip(intake.as_raw()) {
                    if a != b {
                        differ += 1;
                        max_diff = max_diff.max(a.abs_diff(*b));
                        signed += *b as i64 - *a as i64;
                    }
                }
            }
            recycle(rust);
            recycle(intake);
        }
    }
    println!("{} frames, {rounds} rounds, median CPU ms per frame on this thread:", jpegs.len());
    println!("  image crate (general decoder):           {:.3} ms", median(t_gen));
    println!("  zune-jpeg called directly (pure Rust):   {:.3} ms", median(t_rust));
    let by = match (SYSTEM_LIBJPEG, std::env::var_os(nephocast::intake::SYSTEM_JPEG_WHOLE_ENV).is_some()) {
        (true, true) => "libjpeg-turbo",
        (true, false) => "zune-jpeg: NEPHOCAST_SYSTEM_JPEG_WHOLE not set",
        (false, _) => "zune-jpeg: no system libjpeg built in",
    };
    println!("  intake, whole frames ({by}): {:.3} ms", median(t_intake));
    println!("  samples differing from zune-jpeg: {differ} of {total} ({:.3} %), largest difference {max_diff}, mean {:+.4} level", 100.0 * differ as f64 / total as f64, signed as f64 / total as f64);
}
