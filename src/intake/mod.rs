//! Frame intake: one file on disk to one decoded RGB frame, or a typed refusal that names the file.
//!
//! [`read_frame`] is the only way the engine's frames are read (replay, live mode, calibration,
//! segmentation scoring). In order, it
//! 1. refuses special files (directory, FIFO, socket, device) from their metadata, without opening
//!    them, and follows a symbolic link only when its target is a regular file;
//! 2. refuses a file larger than [`IntakeOptions::max_file_bytes`], then reads its bytes once (opened
//!    non-blocking and checked again on the open handle, so a file swapped for a FIFO in between
//!    cannot hang the reader);
//! 3. checks from those bytes that the image is structurally complete ([`check_complete`]): a JPEG's
//!    marker segments are walked from SOI through the entropy-coded data to an EOI at the end of the
//!    file (only zero padding may follow); a PNG's chunks are walked with their length bounds and
//!    CRC-32, IHDR first and IEND last;
//! 4. refuses header dimensions above [`IntakeOptions::max_pixels`] or different from the expected
//!    size, before any pixel is decoded;
//! 5. decodes with the decoder's allocation limit set, so that whatever slips past the header check
//!    cannot allocate more than [`IntakeOptions::max_alloc_bytes`]; any decoder error is a refusal.
//!    Whole JPEG frames go to the pure-Rust decoders ([`decode`]); with [`SYSTEM_JPEG_WHOLE_ENV`]
//!    set and the crate built with the system's libjpeg-turbo ([`SYSTEM_LIBJPEG`]) to that library
//!    (10–17 % less CPU on 1024² frames; not the default because its different rounding moved the
//!    two-layer stereo scene's 10-minute skill by 0.09: DEVELOPERS.md). With [`IntakeOptions::reduce`] above 1 a JPEG is decoded at that reduced scale
//!    ([`decode_jpeg_reduced`]), the size checked against the reduced buffer before decoding.
//!
//! Inside JPEG entropy-coded data every 0xFF byte is followed by 0x00 or a restart marker, so a file
//! cut inside the image data can never end with a false EOI there; a cut just after an EOI inside a
//! metadata segment (an embedded thumbnail) is caught because the segment walk skips whole segments.

pub mod ahead;
mod reduced;
mod structure;
use structure::check_dimensions;
pub use structure::{check_complete, sniff};

use reduced::decode_jpeg_reduced_checked;
pub use reduced::{PIXELS_PER_CELL, ReducedFrames, box_reduce, decode_jpeg_reduced, decode_jpeg_reduced_rust, frame_reduction, map_reduction, reduced_size, valid_reduction};
#[cfg(system_libjpeg)]
use reduced::system_jpeg;

/// Whether the crate was built with the system's libjpeg (libjpeg-turbo), which then decodes
/// reduced JPEG frames (and whole ones with [`SYSTEM_JPEG_WHOLE_ENV`] set); without it both go to
/// pure-Rust decoders (`build.rs`).
pub const SYSTEM_LIBJPEG: bool = cfg!(system_libjpeg);

use std::io::Read as _;
use std::path::{Path, PathBuf};

/// Limits of the intake.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct IntakeOptions {
    /// Largest file read \[bytes\]; default 64 MiB.
    pub max_file_bytes: u64,
    /// Largest image by its header \[pixels\]; default 40 Mpx.
    pub max_pixels: u64,
    /// Largest allocation the decoder may make \[bytes\]; default 128 MiB (a 40 Mpx RGB frame is
    /// 120 MB).
    pub max_alloc_bytes: u64,
    /// Width and height the frame must have (the camera's), when known \[px\].
    pub expected_size: Option<(u32, u32)>,
    /// Decode JPEG frames at 1/`reduce` of their size (1, 2, 4 or 8), scaling in the DCT domain
    /// while decoding: each output pixel stands for a `reduce` × `reduce` block of the full frame
    /// (see [`reduced_size`]). PNG frames are always decoded whole. Default 1.
    pub reduce: u32,
}

impl Default for IntakeOptions {
    fn default() -> Self {
        Self { max_file_bytes: 64 << 20, max_pixels: 40_000_000, max_alloc_bytes: 128 << 20, expected_size: None, reduce: 1 }
    }
}

impl IntakeOptions {
    /// The defaults with an expected size.
    pub fn expecting(width_px: u32, height_px: u32) -> Self {
        Self { expected_size: Some((width_px, height_px)), ..Self::default() }
    }

    /// The same with JPEG frames decoded at 1/`reduce` of their size (clamped to 1, 2, 4 or 8).
    pub fn reduced(self, reduce: u32) -> Self {
        Self { reduce: valid_reduction(reduce), ..self }
    }
}

/// Why a frame was refused at intake.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum Refusal {
    /// Not a regular file (or a link to one).
    #[error("not a regular file: {0}")]
    SpecialFile(String),
    /// The file could not be read.
    #[error("cannot read: {0}")]
    Unreadable(String),
    /// Larger than the cap.
    #[error("file of {bytes} bytes is larger than the limit of {limit} bytes")]
    TooLarge {
        /// Size found \[bytes\].
        bytes: u64,
        /// The limit \[bytes\].
        limit: u64,
    },
    /// Neither JPEG nor PNG.
    #[error("not a JPEG or PNG file ({0})")]
    UnknownFormat(String),
    /// The image ends before its end marker.
    #[error("incomplete: {0}")]
    Truncated(String),
    /// The structure is broken (bad CRC, bad segment, decoder error).
    #[error("corrupt: {0}")]
    Corrupt(String),
    /// The header's dimensions exceed the pixel cap, or the decoder its allocation limit.
    #[error("too large an image: {0}")]
    TooManyPixels(String),
    /// The header's dimensions differ from the expected size.
    #[error("wrong size: {got_w}x{got_h} px, expected {want_w}x{want_h}")]
    WrongSize {
        /// Width found.
        got_w: u32,
        /// Height found.
        got_h: u32,
        /// Width expected.
        want_w: u32,
        /// Height expected.
        want_h: u32,
    },
}

impl Refusal {
    /// A short code for CSV files and counters.
    pub fn code(&self) -> &'static str {
        match self {
            Refusal::SpecialFile(_) => "special_file",
            Refusal::Unreadable(_) => "unreadable",
            Refusal::TooLarge { .. } => "file_too_large",
            Refusal::UnknownFormat(_) => "unknown_format",
            Refusal::Truncated(_) => "truncated",
            Refusal::Corrupt(_) => "corrupt",
            Refusal::TooManyPixels(_) => "too_many_pixels",
            Refusal::WrongSize { .. } => "wrong_size",
        }
    }
}

/// A refusal with the file it concerns.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{}: {refusal}", file.display())]
pub struct IntakeError {
    /// The file.
    pub file: PathBuf,
    /// Why.
    pub refusal: Refusal,
}

impl IntakeError {
    /// The refusal's short code.
    pub fn code(&self) -> &'static str {
        self.refusal.code()
    }
}

/// The two formats taken.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// JPEG (baseline or progressive).
    Jpeg,
    /// PNG.
    Png,
}

const PNG_SIGNATURE: [u8; 8] = [0x89, b'P', b'N', b'G', 0x0D, 0x0A, 0x1A, 0x0A];

/// Read one frame file: checks, then [`decode`].
///
/// # Errors
/// An [`IntakeError`] naming the file and saying why.
pub fn read_frame(path: &Path, opts: &IntakeOptions) -> Result<image::RgbImage, IntakeError> {
    let err = |refusal| IntakeError { file: path.to_path_buf(), refusal };
    let bytes = read_bytes(path, opts.max_file_bytes).map_err(err)?;
    from_bytes(&bytes, opts).map_err(err)
}

/// Check and decode a frame's bytes (the entry point the fuzz loop drives).
///
/// # Errors
/// Why the bytes are refused.
pub fn from_bytes(bytes: &[u8], opts: &IntakeOptions) -> Result<image::RgbImage, Refusal> {
    if bytes.len() as u64 > opts.max_file_bytes {
        return Err(Refusal::TooLarge { bytes: bytes.len() as u64, limit: opts.max_file_bytes });
    }
    let (format, w, h) = check_complete(bytes)?;
    check_dimensions(w, h, opts)?;
    match (format, valid_reduction(opts.reduce)) {
        (Format::Jpeg, 1) => decode_jpeg_whole(bytes, (w, h), opts),
        (Format::Png, 1) => decode(bytes, format, opts),
        (Format::Jpeg, r) => decode_jpeg_reduced_checked(bytes, (w, h), r, opts),
        (Format::Png, r) => decode(bytes, format, opts).map(|img| box_reduce(&img, r)),
    }
}

/// What a path is, from its metadata, when it is not a regular file.
fn special_kind(ft: &std::fs::FileType) -> Option<&'static str> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileTypeExt as _;
        if ft.is_fifo() {
            return Some("a FIFO");
        }
        if ft.is_socket() {
            return Some("a socket");
        }
        if ft.is_block_device() {
            return Some("a block device");
        }
        if ft.is_char_device() {
            return Some("a character device");
        }
    }
    if ft.is_dir() {
        return Some("a directory");
    }
    if ft.is_symlink() {
        return Some("a symbolic link");
    }
    (!ft.is_file()).then_some("not a regular file")
}

/// The bytes of a regular file (or a link to one) of at most `max_bytes`.
fn read_bytes(path: &Path, max_bytes: u64) -> Result<Vec<u8>, Refusal> {
    let meta = std::fs::symlink_metadata(path).map_err(|e| Refusal::Unreadable(e.to_string()))?;
    let meta = if meta.file_type().is_symlink() {
        let target = std::fs::metadata(path).map_err(|e| Refusal::SpecialFile(format!("a symbolic link whose target cannot be read ({e})")))?;
        if let Some(k) = special_kind(&target.file_type()) {
            return Err(Refusal::SpecialFile(format!("a symbolic link to {k}")));
        }
        target
    } else {
        if let Some(k) = special_kind(&meta.file_type()) {
            return Err(Refusal::SpecialFile(k.into()));
        }
        meta
    };
    if meta.len() > max_bytes {
        return Err(Refusal::TooLarge { bytes: meta.len(), limit: max_bytes });
    }
    let mut oo = std::fs::OpenOptions::new();
    oo.read(true);
    #[cfg(target_os = "linux")]
    {
        use std::os::unix::fs::OpenOptionsExt as _;
        // O_NONBLOCK: should the path have become a FIFO since the check, opening it must not wait
        // for a writer. It has no effect on reading a regular file.
        const O_NONBLOCK: i32 = 0o4000;
        oo.custom_flags(O_NONBLOCK);
    }
    let file = oo.open(path).map_err(|e| Refusal::Unreadable(e.to_string()))?;
    let meta = file.metadata().map_err(|e| Refusal::Unreadable(e.to_string()))?;
    if let Some(k) = special_kind(&meta.file_type()) {
        return Err(Refusal::SpecialFile(format!("{k} (changed while opened)")));
    }
    let mut bytes = Vec::with_capacity(meta.len().min(max_bytes) as usize);
    file.take(max_bytes + 1).read_to_end(&mut bytes).map_err(|e| Refusal::Unreadable(e.to_string()))?;
    if bytes.len() as u64 > max_bytes {
        return Err(Refusal::TooLarge { bytes: bytes.len() as u64, limit: max_bytes });
    }
    Ok(bytes)
}

/// A whole-frame decode of checked JPEG bytes with the header's (width, height): by the system's
/// libjpeg (libjpeg-turbo) when the crate was built with it, into a recycled buffer, else (and for
/// CMYK frames) by [`decode`].
///
/// libjpeg-turbo's accurate integer inverse DCT with its SIMD paths takes 10–17 % less CPU than
/// `zune-jpeg` on 1024² frames; the pixels differ from `zune-jpeg`'s by its different rounding (on
/// the 90 frames of a 1024² broken-cumulus replay 0.5 % of the samples, by at most 3 levels, mean
/// −0.003 level; DEVELOPERS.md, "Where the design changed").
///
/// # Errors
/// Any decoder error, and the allocation limit ([`Refusal::TooManyPixels`]).
#[cfg_attr(not(system_libjpeg), allow(unused_variables))]
fn decode_jpeg_whole(bytes: &[u8], (w, h): (u32, u32), opts: &IntakeOptions) -> Result<image::RgbImage, Refusal> {
    #[cfg(system_libjpeg)]
    if system_jpeg_whole() {
        let need = w as u64 * h as u64 * 3;
        if need > opts.max_alloc_bytes {
            return Err(Refusal::TooManyPixels(format!("decoder limit ({} bytes): {need} bytes needed", opts.max_alloc_bytes)));
        }
        let mut buf = take_buffer();
        match system_jpeg::decode_into(bytes, 1, w, h, &mut buf) {
            Ok(()) => return image::RgbImage::from_raw(w, h, buf).ok_or_else(|| Refusal::Corrupt(format!("decoder: wrong pixel count for {w}x{h} px"))),
            // CMYK: the general decoder's conversion.
            Err(None) => recycle_raw(buf),
            Err(Some(m)) => {
                recycle_raw(buf);
                return Err(Refusal::Corrupt(format!("decoder: {m}")));
            }
        }
    }
    decode(bytes, Format::Jpeg, opts)
}

/// With this environment variable set (to anything), whole JPEG frames are decoded by the
/// system's libjpeg-turbo where it is built in ([`SYSTEM_LIBJPEG`]) instead of the pure-Rust
/// decoder ([`decode`]): faster, but not yet the default (the module docs say why).
pub const SYSTEM_JPEG_WHOLE_ENV: &str = "NEPHOCAST_SYSTEM_JPEG_WHOLE";

/// [`SYSTEM_JPEG_WHOLE_ENV`] is set (read once).
#[cfg(system_libjpeg)]
fn system_jpeg_whole() -> bool {
    static SET: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *SET.get_or_init(|| std::env::var_os(SYSTEM_JPEG_WHOLE_ENV).is_some())
}

/// Decode checked bytes to RGB with the decoder's limits set, by the pure-Rust decoders (whole
/// JPEG frames of the engine go through libjpeg first when it is built in: [`from_bytes`]).
///
/// # Errors
/// Any decoder error, and the allocation limit ([`Refusal::TooManyPixels`]).
pub fn decode(bytes: &[u8], format: Format, opts: &IntakeOptions) -> Result<image::RgbImage, Refusal> {
    if format == Format::Jpeg
        && let Some(img) = decode_jpeg_direct(bytes, opts)?
    {
        return Ok(img);
    }
    decode_general(bytes, format, opts)
}

/// Buffers of decoded frames given back ([`recycle`]) for the next whole-frame decode: a 1024²
/// frame is 3 MB, and a fresh zeroed one each frame cost its zeroing and page faults. Shared by
/// threads (replay decodes on any worker of the engine's pool, [`ahead`]).
static FRAME_BUFFERS: std::sync::Mutex<Vec<Vec<u8>>> = std::sync::Mutex::new(Vec::new());

/// Give a frame's pixels back once the engine is done with them, for a later decode to reuse.
pub fn recycle(img: image::RgbImage) {
    recycle_raw(img.into_raw());
}

/// A whole-frame JPEG decode by the decoder the `image` crate uses (`zune-jpeg`), called directly
/// with the same options (lenient, RGB out), so the pixels are the general decoder's byte for byte
/// (unit test `direct_jpeg_decode_gives_the_general_decoders_pixels`), into a recycled buffer and
/// without the general path's copy of the input and second header parse. `None` for a colour space
/// it does not take (grey, CMYK, …): the general decoder converts those.
///
/// # Errors
/// Any decoder error, and the allocation limit ([`Refusal::TooManyPixels`]).
fn decode_jpeg_direct(bytes: &[u8], opts: &IntakeOptions) -> Result<Option<image::RgbImage>, Refusal> {
    use zune_jpeg::zune_core::colorspace::ColorSpace;
    let options = zune_jpeg::zune_core::options::DecoderOptions::default().set_strict_mode(false).set_max_width(usize::MAX).set_max_height(usize::MAX);
    let mut d = zune_jpeg::JpegDecoder::new_with_options(zune_jpeg::zune_core::bytestream::ZCursor::new(bytes), options);
    let corrupt = |e: zune_jpeg::errors::DecodeErrors| Refusal::Corrupt(format!("decoder: {e}"));
    d.decode_headers().map_err(corrupt)?;
    if !matches!(d.input_colorspace(), Some(ColorSpace::YCbCr | ColorSpace::RGB)) {
        return Ok(None);
    }
    d.set_options(d.options().jpeg_set_out_colorspace(ColorSpace::RGB));
    let Some((w, h)) = d.dimensions() else { return Ok(None) };
    let need = w as u64 * h as u64 * 3;
    if need > opts.max_alloc_bytes {
        return Err(Refusal::TooManyPixels(format!("decoder limit ({} bytes): {need} bytes needed", opts.max_alloc_bytes)));
    }
    check_dimensions(w as u32, h as u32, opts)?;
    let mut buf = take_buffer();
    // Every byte is written by the decoder; a recycled buffer of the same size is not cleared.
    buf.resize(need as usize, 0);
    if let Err(e) = d.decode_into(&mut buf) {
        recycle_raw(buf);
        return Err(corrupt(e));
    }
    Ok(image::RgbImage::from_raw(w as u32, h as u32, buf))
}

/// A recycled frame buffer (any size; the caller resizes it), or a new empty one.
fn take_buffer() -> Vec<u8> {
    FRAME_BUFFERS.lock().ok().and_then(|mut p| p.pop()).unwrap_or_default()
}

/// Bytes of decoded frames that readers may hold ahead of the engine, and that the recycled
/// buffers may keep: 64 MiB.
pub const READ_AHEAD_BYTES: u64 = 64 << 20;

/// How many decoded frames replay may hold ahead of the engine ([`ahead::Ahead`]'s depth): as
/// many as fit in [`READ_AHEAD_BYTES`], from 2 to 8. Deeper than the two frames of old so that
/// decoding goes on while the engine's first step builds its tables (tens of milliseconds) and
/// during the steps that recompute the cells' sun geometry, instead of waiting.
pub fn read_ahead_frames(opts: &IntakeOptions) -> usize {
    let frame_bytes = match opts.expected_size {
        Some((w, h)) => {
            let (w, h) = reduced_size(w, h, opts.reduce);
            (w as u64 * h as u64 * 3).max(1)
        }
        None => return 2,
    };
    (READ_AHEAD_BYTES / frame_bytes).clamp(2, 8) as usize
}

fn recycle_raw(v: Vec<u8>) {
    if let Ok(mut pool) = FRAME_BUFFERS.lock() {
        let held: usize = pool.iter().map(Vec::capacity).sum();
        if pool.len() < 10 && (held + v.capacity()) as u64 <= READ_AHEAD_BYTES {
            pool.push(v);
        }
    }
}

/// Decode by the `image` crate's general decoders (PNG; JPEG in colour spaces other than YCbCr and
/// RGB; and for comparison in the benchmark).
///
/// # Errors
/// Any decoder error, and the allocation limit ([`Refusal::TooManyPixels`]).
pub fn decode_general(bytes: &[u8], format: Format, opts: &IntakeOptions) -> Result<image::RgbImage, Refusal> {
    let fmt = match format {
        Format::Jpeg => image::ImageFormat::Jpeg,
        Format::Png => image::ImageFormat::Png,
    };
    let mut limits = image::Limits::default();
    let side = u32::try_from(opts.max_pixels).unwrap_or(u32::MAX);
    limits.max_image_width = Some(side);
    limits.max_image_height = Some(side);
    limits.max_alloc = Some(opts.max_alloc_bytes);
    let mut reader = image::ImageReader::with_format(std::io::Cursor::new(bytes), fmt);
    reader.limits(limits);
    let img = reader.decode().map_err(|e| match e {
        image::ImageError::Limits(l) => Refusal::TooManyPixels(format!("decoder limit ({} bytes): {l}", opts.max_alloc_bytes)),
        e => Refusal::Corrupt(format!("decoder: {e}")),
    })?;
    let (w, h) = (img.width(), img.height());
    check_dimensions(w, h, opts)?;
    // RGB frames pass without a copy.
    Ok(img.into_rgb8())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn jpeg(w: u32, h: u32) -> Vec<u8> {
        let img = image::RgbImage::from_fn(w, h, |x, y| image::Rgb([(x * 7 % 256) as u8, (y * 5 % 256) as u8, ((x ^ y) % 256) as u8]));
        let mut out = vec![];
        image::codecs::jpeg::JpegEncoder::new_with_quality(&mut out, 90).encode_image(&img).unwrap();
        out
    }

    fn png(w: u32, h: u32) -> Vec<u8> {
        let img = image::RgbImage::from_fn(w, h, |x, y| image::Rgb([(x * 3 % 256) as u8, (y * 11 % 256) as u8, 40]));
        let mut out = vec![];
        img.write_to(&mut std::io::Cursor::new(&mut out), image::ImageFormat::Png).unwrap();
        out
    }

    /// The direct JPEG decode against the `image` crate's general decoder (the reference: the
    /// engine's figures were recorded with it): the same pixels, byte for byte, also into a
    /// recycled buffer of another frame's size and content.
    #[test]
    fn direct_jpeg_decode_gives_the_general_decoders_pixels() {
        let o = IntakeOptions::default();
        for (w, h, q) in [(64u32, 48u32, 90u8), (333, 257, 85), (256, 256, 75)] {
            let img = image::RgbImage::from_fn(w, h, |x, y| image::Rgb([(x * 7 % 256) as u8, ((x * y) % 251) as u8, (((x ^ y) * 3) % 256) as u8]));
            let mut j = vec![];
            image::codecs::jpeg::JpegEncoder::new_with_quality(&mut j, q).encode_image(&img).unwrap();
            let direct = decode_jpeg_direct(&j, &o).unwrap().expect("YCbCr is decoded directly");
            let general = decode_general(&j, Format::Jpeg, &o).unwrap();
            assert_eq!(direct.dimensions(), general.dimensions());
            assert!(direct.as_raw() == general.as_raw(), "{w}x{h} q{q}: pixels differ");
            recycle(direct);
            assert!(decode(&j, Format::Jpeg, &o).unwrap().as_raw() == general.as_raw());
        }
        // Grey JPEGs go through the general decoder's conversion.
        let grey = image::GrayImage::from_fn(40, 30, |x, y| image::Luma([(x * 5 + y) as u8]));
        let mut j = vec![];
        image::codecs::jpeg::JpegEncoder::new_with_quality(&mut j, 90).encode_image(&grey).unwrap();
        assert!(decode_jpeg_direct(&j, &o).unwrap().is_none());
        assert_eq!(decode(&j, Format::Jpeg, &o).unwrap().dimensions(), (40, 30));
    }

    #[test]
    fn whole_frames_pass_and_keep_their_size() {
        let o = IntakeOptions::expecting(64, 48);
        assert_eq!(from_bytes(&jpeg(64, 48), &o).unwrap().dimensions(), (64, 48));
        assert_eq!(from_bytes(&png(64, 48), &o).unwrap().dimensions(), (64, 48));
        // Zero padding after the end marker is allowed; other trailing data is not.
        let mut j = jpeg(64, 48);
        j.extend([0u8; 100]);
        assert!(from_bytes(&j, &o).is_ok());
        j.push(1);
        assert_eq!(from_bytes(&j, &o).unwrap_err().code(), "corrupt");
    }

    #[test]
    fn every_cut_is_truncated() {
        let o = IntakeOptions::default();
        for (name, b) in [("jpeg", jpeg(40, 30)), ("png", png(40, 30))] {
            for cut in 0..b.len() {
                let r = from_bytes(&b[..cut], &o);
                assert_eq!(r.as_ref().map(|_| ()).unwrap_err().code(), "truncated", "{name} cut at {cut} of {}: {r:?}", b.len());
            }
        }
    }

    #[test]
    fn wrong_size_and_pixel_cap_before_decoding() {
        let o = IntakeOptions { max_pixels: 1000, ..IntakeOptions::expecting(64, 48) };
        assert_eq!(from_bytes(&jpeg(64, 48), &o).unwrap_err().code(), "too_many_pixels");
        let o = IntakeOptions::expecting(64, 49);
        assert_eq!(from_bytes(&png(64, 48), &o).unwrap_err(), Refusal::WrongSize { got_w: 64, got_h: 48, want_w: 64, want_h: 49 });
    }

    #[test]
    fn decoder_allocation_limit_is_a_refusal() {
        // Pass the header check with a large pixel cap; the decoder's own limit stops it.
        let o = IntakeOptions { max_alloc_bytes: 1000, ..IntakeOptions::default() };
        assert_eq!(from_bytes(&png(64, 48), &o).unwrap_err().code(), "too_many_pixels");
    }

    #[test]
    fn unknown_and_empty() {
        let o = IntakeOptions::default();
        assert_eq!(from_bytes(b"GIF89a....", &o).unwrap_err().code(), "unknown_format");
        assert_eq!(from_bytes(b"", &o).unwrap_err().code(), "truncated");
    }

    /// A smooth frame (sky-like gradients) with a few sharp edges.
    fn sky_jpeg(w: u32, h: u32) -> (Vec<u8>, image::RgbImage) {
        let img = image::RgbImage::from_fn(w, h, |x, y| {
            let edge = if (x / 37 + y / 29) % 3 == 0 { 60 } else { 0 };
            image::Rgb([(60 + x * 120 / w + edge) as u8, (90 + y * 100 / h) as u8, (200 - x * 40 / w) as u8])
        });
        let mut out = vec![];
        image::codecs::jpeg::JpegEncoder::new_with_quality(&mut out, 90).encode_image(&img).unwrap();
        (out, img)
    }

    fn mean_abs_diff(a: &image::RgbImage, b: &image::RgbImage) -> f64 {
        assert_eq!(a.dimensions(), b.dimensions());
        a.as_raw().iter().zip(b.as_raw()).map(|(&p, &q)| (p as f64 - q as f64).abs()).sum::<f64>() / a.as_raw().len() as f64
    }

    #[test]
    fn reduction_factors() {
        assert_eq!(map_reduction(512, 256), 1);
        assert_eq!(map_reduction(1024, 256), 1);
        assert_eq!(map_reduction(2048, 256), 2);
        assert_eq!(map_reduction(4096, 256), 4);
        assert_eq!(map_reduction(16384, 256), 8);
        assert_eq!(map_reduction(2047, 256), 1);
        assert_eq!([0, 1, 2, 3, 4, 7, 8, 100].map(valid_reduction), [1, 1, 2, 2, 4, 4, 8, 8]);
        assert_eq!(reduced_size(1001, 750, 4), (251, 188));
    }

    #[test]
    fn reduced_decode_is_the_block_average_of_the_whole_frame() {
        let (j, _) = sky_jpeg(203, 150);
        let whole = from_bytes(&j, &IntakeOptions::default()).unwrap();
        for r in [2, 4, 8] {
            let o = IntakeOptions::expecting(203, 150).reduced(r);
            let img = from_bytes(&j, &o).unwrap();
            assert_eq!(img.dimensions(), reduced_size(203, 150, r), "1/{r}");
            // The DCT-domain reduction is a low-pass of each block: close to the block mean.
            let d = mean_abs_diff(&img, &box_reduce(&whole, r));
            assert!(d < 3.0, "1/{r}: mean difference {d:.2} levels from the block average");
            let rust = decode_jpeg_reduced_rust(&j, r, &o).unwrap();
            let d = mean_abs_diff(&img, &rust);
            assert!(d < 2.0, "1/{r}: the two decoders differ by {d:.2} levels");
        }
        // PNG frames are box-averaged to the same size.
        let p = png(64, 48);
        assert_eq!(from_bytes(&p, &IntakeOptions::default().reduced(4)).unwrap().dimensions(), (16, 12));
    }

    #[test]
    fn reduced_decode_refuses_as_the_whole_one_does() {
        let o = IntakeOptions::default().reduced(2);
        let b = jpeg(40, 30);
        for cut in 0..b.len() {
            assert_eq!(from_bytes(&b[..cut], &o).map(|_| ()).unwrap_err().code(), "truncated", "cut at {cut}");
        }
        // Entropy-coded data damaged (the structure walk still passes): an error or an image of
        // the right size, never a crash.
        let mut bad = b.clone();
        let n = bad.len();
        for k in (n / 2..n - 4).step_by(7) {
            bad[k] = 0x00;
        }
        if let Ok(img) = from_bytes(&bad, &o) {
            assert_eq!(img.dimensions(), (20, 15));
        }
        let o = IntakeOptions { max_alloc_bytes: 100, ..IntakeOptions::default().reduced(2) };
        assert_eq!(from_bytes(&b, &o).unwrap_err().code(), "too_many_pixels");
    }

    #[test]
    fn reduced_camera_sees_the_same_directions() {
        let cam = crate::camera::Camera::ideal(1024);
        for r in [2u32, 4] {
            let red = cam.reduced(r);
            assert_eq!((red.width_px, red.height_px), reduced_size(1024, 1024, r));
            for d in [[0.0, 0.0, 1.0], [0.3, -0.2, 0.93], [-0.7, 0.5, 0.5]] {
                let n: f64 = d[0] * d[0] + d[1] * d[1] + d[2] * d[2];
                let d = [d[0] / n.sqrt(), d[1] / n.sqrt(), d[2] / n.sqrt()];
                let (x, y) = cam.project_enu(d).unwrap();
                let (u, v) = red.project_enu(d).unwrap();
                let rf = r as f64;
                assert!((u - (x - (rf - 1.0) / 2.0) / rf).abs() < 1e-9 && (v - (y - (rf - 1.0) / 2.0) / rf).abs() < 1e-9);
            }
        }
    }
}
