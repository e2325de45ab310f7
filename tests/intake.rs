//! Frame intake through replay, run as a user would: truncated and corrupt frames, a
//! decompression bomb, special files and links. Every frame is made inside the test from the demo
//! data.
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

fn demo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
}

fn demo_frame() -> Vec<u8> {
    let mut frames: Vec<PathBuf> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    frames.sort();
    std::fs::read(&frames[4]).unwrap()
}

/// A frame name `k` seconds after 09:00 UTC on the demo day.
fn name(k: u32, ext: &str) -> String {
    format!("frame_20260614T{:02}{:02}{:02}.000Z.{ext}", 9 + k / 3600, k / 60 % 60, k % 60)
}

/// Replay `frames` with the demo site, guarded against a hang; the rows of `frames.csv` as (file,
/// status, reason).
fn replay(frames: &Path, out: &Path) -> Vec<(String, String, String)> {
    let mut child = Command::new(env!("CARGO_BIN_EXE_nephocast"))
        .args(["replay", "--quiet", "--site"])
        .arg(demo().join("site.toml"))
        .arg("--frames")
        .arg(frames)
        .arg("--out")
        .arg(out)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let t = Instant::now();
    let status = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        if t.elapsed() > Duration::from_secs(300) {
            let _ = child.kill();
            panic!("replay hung (killed after the guard of 300 s)");
        }
        std::thread::sleep(Duration::from_millis(20));
    };
    let mut err = String::new();
    std::io::Read::read_to_string(child.stderr.as_mut().unwrap(), &mut err).unwrap();
    assert!(status.success(), "replay failed: {err}");
    let text = std::fs::read_to_string(out.join("frames.csv")).unwrap();
    text.lines().skip(1).map(|l| {
        let c: Vec<&str> = l.split(',').collect();
        (c[1].to_string(), c[2].to_string(), c[3].to_string())
    }).collect()
}

fn png_of(img: &image::RgbImage) -> Vec<u8> {
    let mut out = vec![];
    img.write_to(&mut std::io::Cursor::new(&mut out), image::ImageFormat::Png).unwrap();
    out
}

/// A JPEG or PNG cut to 2 %, 3 %, …, 99 % of its bytes is never processed: each is `truncated`,
/// and the reason names the file. The whole frames before them are processed.
#[test]
fn truncated_jpeg_and_png_are_rejected_at_every_cut() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    std::fs::create_dir_all(&frames).unwrap();
    let jpeg = demo_frame();
    let png = png_of(&image::load_from_memory(&jpeg).unwrap().to_rgb8());
    std::fs::write(frames.join(name(0, "jpg")), &jpeg).unwrap();
    std::fs::write(frames.join(name(1, "png")), &png).unwrap();
    let mut k = 2;
    for (ext, bytes) in [("jpg", &jpeg), ("png", &png)] {
        for pct in 2..=99 {
            std::fs::write(frames.join(name(k, ext)), &bytes[..bytes.len() * pct / 100]).unwrap();
            k += 1;
        }
    }
    let rows = replay(&frames, &d.path().join("out"));
    assert_eq!(rows.len(), 2 + 2 * 98);
    assert_eq!(rows[0].1, "ok", "{:?}", rows[0]);
    assert_eq!(rows[1].1, "ok", "{:?}", rows[1]);
    let mut counts = std::collections::BTreeMap::new();
    for (file, status, reason) in &rows[2..] {
        assert_eq!(status, "truncated", "{file}: {reason}");
        assert!(reason.contains(file.as_str()), "the reason names the file: {reason}");
        *counts.entry(file.rsplit('.').next().unwrap().to_string()).or_insert(0) += 1;
    }
    println!("truncated cuts rejected: {counts:?} (JPEG {} bytes, PNG {} bytes)", jpeg.len(), png.len());
}

/// A PNG with one flipped byte in its image data fails the chunk's CRC (`corrupt`); a JPEG with
/// data after its end marker is `corrupt`; a file that is neither is `unknown_format`.
#[test]
fn bad_crc_and_trailing_data_are_corrupt() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    std::fs::create_dir_all(&frames).unwrap();
    let jpeg = demo_frame();
    let mut png = png_of(&image::load_from_memory(&jpeg).unwrap().to_rgb8());
    let idat = png.windows(4).position(|w| w == b"IDAT").unwrap();
    png[idat + 100] ^= 0x10;
    std::fs::write(frames.join(name(0, "png")), &png).unwrap();
    let mut j = jpeg.clone();
    j.extend(b"appended by a faulty writer");
    std::fs::write(frames.join(name(1, "jpg")), &j).unwrap();
    std::fs::write(frames.join(name(2, "jpg")), b"GIF89a not a frame").unwrap();
    let rows = replay(&frames, &d.path().join("out"));
    let status: Vec<&str> = rows.iter().map(|r| r.1.as_str()).collect();
    assert_eq!(status, ["corrupt", "corrupt", "unknown_format"], "{rows:?}");
    assert!(rows[0].2.contains("CRC"), "{rows:?}");
}

/// A 20000 × 20000 grey PNG of zeros, deflated by hand with fixed Huffman codes (one literal, then
/// matches of 258 bytes at distance 1): 400 MB of pixels in a 2.5 MB file.
fn bomb_png() -> Vec<u8> {
    const SIDE: u32 = 20_000;
    struct Bits {
        out: Vec<u8>,
        acc: u64,
        n: u32,
    }
    impl Bits {
        fn put(&mut self, v: u64, n: u32) {
            self.acc |= v << self.n;
            self.n += n;
            while self.n >= 8 {
                self.out.push(self.acc as u8);
                self.acc >>= 8;
                self.n -= 8;
            }
        }
        /// A Huffman code, most significant bit first.
        fn code(&mut self, c: u32, n: u32) {
            self.put((c.reverse_bits() >> (32 - n)) as u64, n);
        }
    }
    let total = SIDE as u64 * (SIDE as u64 + 1);
    let mut b = Bits { out: vec![0x78, 0x01], acc: 0, n: 0 };
    b.put(1, 1); // final block
    b.put(1, 2); // fixed Huffman
    b.code(0x30, 8); // literal 0
    let matches = (total - 1) / 258;
    for _ in 0..matches {
        b.code(0xC5, 8); // length 258 (symbol 285)
        b.code(0, 5); // distance 1
    }
    for _ in 0..(total - 1 - matches * 258) {
        b.code(0x30, 8);
    }
    b.code(0, 7); // end of block
    if b.n > 0 {
        b.put(0, 8 - b.n);
    }
    let adler = ((total % 65521) << 16 | 1) as u32;
    b.out.extend(adler.to_be_bytes());
    let chunk = |ty: &[u8], data: &[u8], out: &mut Vec<u8>| {
        out.extend((data.len() as u32).to_be_bytes());
        let mut c = ty.to_vec();
        c.extend(data);
        out.extend(&c);
        out.extend(crc32fast::hash(&c).to_be_bytes());
    };
    let mut png = vec![0x89, b'P', b'N', b'G', 0x0D, 0x0A, 0x1A, 0x0A];
    let mut ihdr = vec![];
    ihdr.extend(SIDE.to_be_bytes());
    ihdr.extend(SIDE.to_be_bytes());
    ihdr.extend([8, 0, 0, 0, 0]);
    chunk(b"IHDR", &ihdr, &mut png);
    chunk(b"IDAT", &b.out, &mut png);
    chunk(b"IEND", &[], &mut png);
    png
}

/// The bomb is refused from its header (`too_many_pixels`) with the replay's peak memory far
/// below 200 MB (measured with `/usr/bin/time -v` when present). With the header cap lifted, the
/// decoder's allocation limit refuses it instead, before it allocates the 400 MB.
#[test]
fn decompression_bomb_is_refused_with_low_peak_memory() {
    let png = bomb_png();
    // The bomb is a valid PNG: the structure check passes it.
    assert_eq!(nephocast::intake::check_complete(&png).unwrap(), (nephocast::intake::Format::Png, 20_000, 20_000));
    let lifted = nephocast::intake::IntakeOptions { max_pixels: u64::MAX, ..Default::default() };
    let e = nephocast::intake::from_bytes(&png, &lifted).unwrap_err();
    assert_eq!(e.code(), "too_many_pixels", "{e}");
    assert!(e.to_string().contains("decoder limit"), "{e}");

    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    std::fs::create_dir_all(&frames).unwrap();
    std::fs::write(frames.join(name(0, "png")), &png).unwrap();
    let rows = replay(&frames, &d.path().join("out"));
    assert_eq!(rows[0].1, "too_many_pixels", "{rows:?}");
    let time = Path::new("/usr/bin/time");
    if !time.exists() {
        println!("peak memory not measured: /usr/bin/time is absent");
        return;
    }
    let out = Command::new(time)
        .arg("-v")
        .arg(env!("CARGO_BIN_EXE_nephocast"))
        .args(["replay", "--quiet", "--site"])
        .arg(demo().join("site.toml"))
        .arg("--frames")
        .arg(&frames)
        .arg("--out")
        .arg(d.path().join("out2"))
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let err = String::from_utf8_lossy(&out.stderr);
    let kb: u64 = err.lines().find_map(|l| l.trim().strip_prefix("Maximum resident set size (kbytes): ")).unwrap().trim().parse().unwrap();
    println!("bomb PNG of {} bytes (20000x20000 grey): replay peak resident memory {:.1} MB", png.len(), kb as f64 / 1024.0);
    assert!(kb < 200 * 1024, "peak {kb} kB");
}

/// A FIFO, a link to /dev/zero, a directory and a link to a missing file, all named like frames,
/// are refused as `special_file` (or `unreadable`) without hanging; the good frame beside them is
/// processed.
#[test]
fn special_files_are_refused_without_opening() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    std::fs::create_dir_all(&frames).unwrap();
    std::fs::write(frames.join(name(0, "jpg")), demo_frame()).unwrap();
    let fifo = frames.join(name(1, "jpg"));
    let ok = Command::new("mkfifo").arg(&fifo).status().map(|s| s.success()).unwrap_or(false);
    std::os::unix::fs::symlink("/dev/zero", frames.join(name(2, "jpg"))).unwrap();
    std::fs::create_dir(frames.join(name(3, "png"))).unwrap();
    std::os::unix::fs::symlink(d.path().join("missing.jpg"), frames.join(name(4, "jpg"))).unwrap();
    let rows = replay(&frames, &d.path().join("out"));
    let get = |k: u32, ext: &str| rows.iter().find(|r| r.0 == name(k, ext)).cloned().unwrap();
    assert_eq!(get(0, "jpg").1, "ok");
    if ok {
        let r = get(1, "jpg");
        assert_eq!(r.1, "special_file", "{r:?}");
        assert!(r.2.contains("FIFO"), "{r:?}");
    } else {
        println!("mkfifo unavailable: the FIFO case is skipped");
    }
    let r = get(2, "jpg");
    assert_eq!(r.1, "special_file", "{r:?}");
    assert!(r.2.contains("symbolic link to a character device"), "{r:?}");
    assert_eq!(get(3, "png").1, "special_file");
    assert_eq!(get(4, "jpg").1, "special_file");
}

/// A frame dated a day ahead of the system clock is rejected (`ahead_of_clock`) and does not make
/// the good frames after it out of order.
#[test]
fn future_dated_frame_does_not_block_replay() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    std::fs::create_dir_all(&frames).unwrap();
    let jpeg = demo_frame();
    let mut list: Vec<PathBuf> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    list.sort();
    for f in &list[..3] {
        std::fs::copy(f, frames.join(f.file_name().unwrap())).unwrap();
    }
    let future = chrono::Utc::now() + chrono::Duration::days(1);
    let fname = nephocast::io::frame_name(&future, "jpg");
    std::fs::write(frames.join(&fname), &jpeg).unwrap();
    // In a recorded sequence the future frame sorts last; live mode's test drops it first.
    let rows = replay(&frames, &d.path().join("out"));
    let status: Vec<&str> = rows.iter().map(|r| r.1.as_str()).collect();
    assert_eq!(status, ["ok", "ok", "ok", "ahead_of_clock"], "{rows:?}");
}
