//! Whole-frame JPEG decoders compared on a folder of frames: time per frame (median, one thread)
//! and pixel differences against the `image` crate's general decoder, which the engine's figures
//! were recorded with.
//!
//! ```sh
//! cargo run --release --example decode_compare -- FOLDER_OF_JPEGS
//! ```

use std::time::Instant;

use nephocast::intake::{Format, IntakeOptions, decode_general, decode_jpeg_reduced, from_bytes, recycle};

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let dir = std::env::args().nth(1).expect("usage: decode_compare FOLDER_OF_JPEGS");
    let mut files: Vec<_> = std::fs::read_dir(&dir).expect("readable folder").filter_map(|e| e.ok().map(|e| e.path())).filter(|p| p.extension().is_some_and(|x| x == "jpg" || x == "jpeg")).collect();
    files.sort();
    let jpegs: Vec<Vec<u8>> = files.iter().map(|p| std::fs::read(p).expect("readable frame")).collect();
    let o = IntakeOptions::default();
    let (mut t_gen, mut t_int, mut t_lib) = (vec![], vec![], vec![]);
    let (mut differ_int, mut differ_lib, mut max_lib, mut total) = (0usize, 0usize, 0u8, 0usize);
    for _round in 0..3 {
        for j in &jpegs {
            let t = Instant::now();
            let general = decode_general(j, Format::Jpeg, &o).expect("decodes");
            t_gen.push(t.elapsed().as_secs_f64() * 1e3);
            let t = Instant::now();
            let intake = from_bytes(j, &o).expect("decodes");
            t_int.push(t.elapsed().as_secs_f64() * 1e3);
            let t = Instant::now();
            let lib = decode_jpeg_reduced(j, 1, &o).expect("decodes");
            t_lib.push(t.elapsed().as_secs_f64() * 1e3);
            if _round == 0 {
                total += general.as_raw().len();
                differ_int += general.as_raw().iter().zip(intake.as_raw()).filter(|(a, b)| a != b).count();
                for (a, b) in general.as_raw().iter().zip(lib.as_raw()) {
                    if a != b {
                        differ_lib += 1;
                        max_lib = max_lib.max(a.abs_diff(*b));
                    }
                }
            }
            recycle(intake);
        }
    }
    println!("{} frames from {dir}, 3 rounds, median ms per frame:", jpegs.len());
    println!("  image crate (general decoder):      {:.2} ms", median(t_gen));
    println!("  intake, whole (zune-jpeg directly): {:.2} ms, samples differing from the general decoder: {differ_int} of {total}", median(t_int));
    println!("  libjpeg at 1/1 (decode_jpeg_reduced): {:.2} ms, samples differing: {differ_lib} of {total} (largest difference {max_lib})", median(t_lib));
}
