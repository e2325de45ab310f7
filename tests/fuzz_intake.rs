//! A stable, seeded fuzz loop over frame intake (`intake::from_bytes`, whole and at reduced scale, and `intake::read_frame`
//! for a share of the cases): real JPEG and PNG bytes mutated (cut, bits flipped, bytes overwritten
//! with marker values, ranges inserted, deleted or duplicated, two frames spliced; PNG chunk CRCs
//! often recomputed so that the decoder is reached). Properties: no panic; a pure cut of a whole
//! frame is `truncated`; an accepted frame has the size its header says and is within the caps.
//!
//! `NEPHOCAST_FUZZ_CASES` sets the number of cases (default 400, for CI), `NEPHOCAST_FUZZ_SEED` the
//! seed (default 1). A failing input is written to `target/fuzz-intake-failure.bin`.
use std::collections::BTreeMap;
use std::path::Path;

use nephocast::intake::{IntakeOptions, check_complete, from_bytes, read_frame};

/// SplitMix64.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    fn below(&mut self, n: usize) -> usize {
        if n == 0 { 0 } else { (self.next() % n as u64) as usize }
    }
}

fn seeds() -> Vec<(&'static str, Vec<u8>)> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/frames");
    let mut frames: Vec<_> = std::fs::read_dir(dir).unwrap().flatten().map(|e| e.path()).collect();
    frames.sort();
    let real = std::fs::read(&frames[10]).unwrap();
    let img = image::load_from_memory(&real).unwrap().to_rgb8();
    let small = image::imageops::resize(&img, 96, 96, image::imageops::FilterType::Triangle);
    let enc = |d: image::DynamicImage, f: image::ImageFormat| {
        let mut out = vec![];
        d.write_to(&mut std::io::Cursor::new(&mut out), f).unwrap();
        out
    };
    let mut jq = vec![];
    image::codecs::jpeg::JpegEncoder::new_with_quality(&mut jq, 60).encode_image(&small).unwrap();
    vec![
        ("real camera JPEG 1024²", real),
        ("JPEG 96²", jq),
        ("PNG RGB 96²", enc(image::DynamicImage::ImageRgb8(small.clone()), image::ImageFormat::Png)),
        ("PNG grey 96²", enc(image::DynamicImage::ImageRgb8(small.clone()).grayscale(), image::ImageFormat::Png)),
        ("PNG RGBA16 96²", enc(image::DynamicImage::ImageRgb8(small.clone()).to_rgba16().into(), image::ImageFormat::Png)),
    ]
}

/// Recompute every PNG chunk's CRC that can be found by walking the lengths.
fn fix_png_crcs(b: &mut [u8]) {
    let mut pos = 8;
    while pos + 12 <= b.len() {
        let len = u32::from_be_bytes([b[pos], b[pos + 1], b[pos + 2], b[pos + 3]]) as usize;
        let Some(end) = pos.checked_add(12 + len).filter(|&e| e <= b.len()) else { return };
        let c = crc32fast::hash(&b[pos + 4..end - 4]);
        b[end - 4..end].copy_from_slice(&c.to_be_bytes());
        pos = end;
    }
}

fn mutate(rng: &mut Rng, seeds: &[(&str, Vec<u8>)]) -> (String, Vec<u8>, bool) {
    // The real frame is slow to decode: one case in eight.
    let k = if rng.below(8) == 0 { 0 } else { 1 + rng.below(seeds.len() - 1) };
    let (name, base) = &seeds[k];
    let mut b = base.clone();
    let is_png = b.starts_with(&[0x89, b'P']);
    let mut ops = vec![];
    let n_ops = 1 + rng.below(4);
    let mut pure_cut = true;
    for _ in 0..n_ops {
        let len = b.len().max(1);
        match rng.below(9) {
            0 => {
                let at = rng.below(len);
                b.truncate(at);
                ops.push(format!("cut@{at}"));
            }
            1 => {
                for _ in 0..1 + rng.below(8) {
                    let at = rng.below(len);
                    if at < b.len() {
                        b[at] ^= 1 << rng.below(8);
                    }
                }
                ops.push("flip".into());
                pure_cut = false;
            }
            2 => {
                let at = rng.below(len);
                let v = [0x00, 0xFF, 0xD8, 0xD9, 0xDA, 0xC0, 0xC4, 0x7F, 0x80][rng.below(9)];
                if at < b.len() {
                    b[at] = v;
                }
                ops.push(format!("set@{at}={v:02X}"));
                pure_cut = false;
            }
            3 => {
                let at = rng.below(len + 1).min(b.len());
                let n = rng.below(64);
                let ins: Vec<u8> = (0..n).map(|_| rng.next() as u8).collect();
                b.splice(at..at, ins);
                ops.push(format!("insert@{at}+{n}"));
                pure_cut = false;
            }
            4 => {
                let at = rng.below(len);
                let n = rng.below(256).min(b.len().saturating_sub(at));
                b.drain(at..at + n);
                ops.push(format!("delete@{at}-{n}"));
                pure_cut = false;
            }
            5 => {
                let at = rng.below(len);
                let n = rng.below(512).min(b.len().saturating_sub(at));
                let dup = b[at..at + n].to_vec();
                let to = rng.below(b.len() + 1);
                b.splice(to..to, dup);
                ops.push(format!("dup@{at}-{n}"));
                pure_cut = false;
            }
            6 => {
                let (_, other) = &seeds[1 + rng.below(seeds.len() - 1)];
                let at = rng.below(len).min(b.len());
                let from = rng.below(other.len());
                b.truncate(at);
                b.extend_from_slice(&other[from..]);
                ops.push(format!("splice@{at}"));
                pure_cut = false;
            }
            7 => {
                // Header dimensions: a PNG's IHDR or the first JPEG frame header.
                let v = [0u8, 1, 0x7F, 0xFF][rng.below(4)];
                let at = if is_png { 16 + rng.below(8) } else { b.windows(2).position(|w| w == [0xFF, 0xC0]).map(|p| p + 5 + rng.below(4)).unwrap_or(0) };
                if at < b.len() {
                    b[at] = v;
                }
                ops.push(format!("dims@{at}={v:02X}"));
                pure_cut = false;
            }
            _ => {
                let n = rng.below(40);
                b.extend(std::iter::repeat_n(if rng.below(2) == 0 { 0 } else { rng.next() as u8 }, n));
                ops.push(format!("append+{n}"));
                pure_cut = false;
            }
        }
    }
    if is_png && !pure_cut && rng.below(4) != 0 {
        fix_png_crcs(&mut b);
        ops.push("crc".into());
    }
    let cut = pure_cut && b.len() < base.len();
    (format!("{name}: {}", ops.join(" ")), b, cut)
}

#[test]
fn fuzz_frame_intake() {
    // `NEPHOCAST_FUZZ_MINUTES`, when set, runs for that many minutes instead of a number of cases.
    let until = std::env::var("NEPHOCAST_FUZZ_MINUTES")
        .ok()
        .and_then(|v| v.parse::<f64>().ok())
        .filter(|m| m.is_finite() && *m > 0.0)
        .map(|m| std::time::Instant::now() + std::time::Duration::from_secs_f64(m * 60.0));
    let cases: usize = if until.is_some() { usize::MAX } else { std::env::var("NEPHOCAST_FUZZ_CASES").ok().and_then(|v| v.parse().ok()).unwrap_or(400) };
    let seed: u64 = std::env::var("NEPHOCAST_FUZZ_SEED").ok().and_then(|v| v.parse().ok()).unwrap_or(1);
    let seeds = seeds();
    let whole = IntakeOptions::default();
    let mut rng = Rng(seed);
    let dir = tempfile::tempdir().unwrap();
    let mut outcomes: BTreeMap<String, usize> = BTreeMap::new();
    let t0 = std::time::Instant::now();
    let mut done = 0usize;
    for case in 0..cases {
        if case % 256 == 0 && until.is_some_and(|u| std::time::Instant::now() >= u) {
            break;
        }
        done += 1;
        let (what, bytes, pure_cut) = mutate(&mut rng, &seeds);
        let via_file = case % 16 == 0;
        // Every other case through the reduced-scale decode the engine's frames take.
        let opts = if case % 2 == 1 { whole.reduced(2) } else { whole };
        let run = std::panic::catch_unwind(|| {
            if via_file {
                let p = dir.path().join("frame.bin");
                std::fs::write(&p, &bytes).unwrap();
                read_frame(&p, &opts).map_err(|e| e.refusal)
            } else {
                from_bytes(&bytes, &opts)
            }
        });
        let fail = |msg: String| -> ! {
            let p = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/fuzz-intake-failure.bin");
            let _ = std::fs::write(&p, &bytes);
            panic!("case {case} (seed {seed}, {what}): {msg}; input in {}", p.display());
        };
        let outcome = match run {
            Err(_) => fail("panicked".into()),
            Ok(Ok(img)) => {
                if pure_cut {
                    fail("a cut frame was accepted".into());
                }
                let (_, w, h) = check_complete(&bytes).unwrap_or_else(|e| fail(format!("accepted but its structure is refused: {e}")));
                if img.dimensions() != nephocast::intake::reduced_size(w, h, opts.reduce) || w as u64 * h as u64 > opts.max_pixels {
                    fail(format!("accepted {}x{} against a header of {w}x{h}", img.width(), img.height()));
                }
                "ok".to_string()
            }
            Ok(Err(e)) => {
                if pure_cut && e.code() != "truncated" {
                    fail(format!("a cut frame gave {e}"));
                }
                e.code().to_string()
            }
        };
        *outcomes.entry(outcome).or_default() += 1;
    }
    println!("fuzz_frame_intake: {done} cases (seed {seed}) in {:.1} s, outcomes {outcomes:?}", t0.elapsed().as_secs_f64());
}
