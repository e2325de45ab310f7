//! Frames decoded at reduced scale: the reduction the engine picks (at least four pixels per map
//! cell), the camera and mask as reduced frames see them, and the reduced JPEG decode (the system
//! libjpeg's scaled inverse DCT when built with it, else the `jpeg-decoder` crate) with its
//! box-averaged fallback.

use super::{Format, IntakeOptions, Refusal, check_complete, decode};

/// The camera and its obstruction mask as frames decoded at 1/`reduce` see them, with the
/// per-pixel geometry for whole-image segmentation built on first use.
#[derive(Debug)]
pub struct ReducedFrames {
    /// The reduction (1, 2, 4 or 8).
    pub reduce: u32,
    /// The camera for the reduced frames ([`Camera::reduced`](crate::camera::Camera::reduced)).
    pub camera: crate::camera::Camera,
    /// The mask reduced: a pixel is sky only where its whole block is.
    pub obstruction: Option<image::GrayImage>,
    geometry: std::sync::OnceLock<crate::segment::ImageGeometry>,
}

impl ReducedFrames {
    /// For a camera and mask (white = sky).
    pub fn new(camera: &crate::camera::Camera, obstruction: Option<&image::GrayImage>, reduce: u32) -> Self {
        let r = valid_reduction(reduce);
        // Whole frames (r = 1) are stepped with the camera's own mask; no copy.
        let obstruction = obstruction.filter(|_| r > 1).map(|m| {
            let (w, h) = m.dimensions();
            let (ow, oh) = reduced_size(w, h, r);
            image::GrayImage::from_fn(ow, oh, |u, v| {
                let sky = (v * r..((v + 1) * r).min(h)).all(|y| (u * r..((u + 1) * r).min(w)).all(|x| m.get_pixel(x, y).0[0] >= 128));
                image::Luma([if sky { 255 } else { 0 }])
            })
        });
        Self { reduce: r, camera: camera.reduced(r), obstruction, geometry: std::sync::OnceLock::new() }
    }

    /// Per-pixel geometry of the reduced frames.
    pub fn geometry(&self) -> &crate::segment::ImageGeometry {
        self.geometry.get_or_init(|| crate::segment::ImageGeometry::from_camera(&self.camera, self.obstruction.as_ref()))
    }
}

/// The reduction the engine's frames are decoded at: the environment variable
/// `NEPHOCAST_FRAME_REDUCTION` when it says 1, 2, 4 or 8 (1 decodes whole frames; for comparing),
/// else `configured` (`map.decode_reduction`) when it is 1, 2, 4 or 8, else [`map_reduction`].
pub fn frame_reduction(width_px: u32, cells: usize, configured: u32) -> u32 {
    match std::env::var("NEPHOCAST_FRAME_REDUCTION").ok().and_then(|v| v.trim().parse::<u32>().ok()) {
        Some(r @ (1 | 2 | 4 | 8)) => r,
        _ => match configured {
            r @ (1 | 2 | 4 | 8) => r,
            _ => map_reduction(width_px, cells),
        },
    }
}

/// The reduction factor actually used: 1, 2, 4 or 8 (the largest of them not above `reduce`).
pub fn valid_reduction(reduce: u32) -> u32 {
    match reduce {
        0 | 1 => 1,
        2 | 3 => 2,
        4..=7 => 4,
        _ => 8,
    }
}

/// Size of a frame of `width_px` × `height_px` decoded at 1/`reduce`: each side rounded up (a
/// partial block still gives a pixel) \[px\].
pub fn reduced_size(width_px: u32, height_px: u32, reduce: u32) -> (u32, u32) {
    let r = valid_reduction(reduce);
    (width_px.div_ceil(r), height_px.div_ceil(r))
}

/// Pixels per map cell across the frame that a reduced frame keeps at least.
///
/// Measured on 1024² synthetic scenes (256² map) decoded at 1/2, i.e. two pixels per cell, against
/// whole frames: broken cumulus skill at 5/10/15 min 0.820/0.729/0.546 → 0.816/0.727/0.530, but two
/// layers 0.406/0.299/0.368 → 0.385/0.235/0.311 with the motion error 0.14 → 0.23 m/s (the thin
/// upper layer's texture is what the second layer's motion is measured on). So four.
pub const PIXELS_PER_CELL: u32 = 4;

/// The reduction a cloud map of `cells` × `cells` needs from a frame `width_px` wide: the largest of
/// 1, 2, 4, 8 that leaves at least [`PIXELS_PER_CELL`] pixels per cell across the frame. The map's
/// cells near the zenith span many pixels; near the horizon one pixel spans several cells, so
/// reducing further blurs the low-elevation cloud that long horizons advect in.
pub fn map_reduction(width_px: u32, cells: usize) -> u32 {
    let mut r = 1;
    while r < 8 && width_px / (2 * r) >= PIXELS_PER_CELL * cells as u32 {
        r *= 2;
    }
    r
}

/// Decode a checked JPEG at 1/`reduce` of its size, scaling in the DCT domain: the decoder keeps
/// only the low-frequency coefficients of each 8 × 8 block and inverts them on a smaller grid, so
/// output pixel (u, v) is the block-local low-pass of the full-size pixels
/// `reduce·u … reduce·u + reduce − 1` (centre `reduce·u + (reduce − 1)/2`). Costs less than a full
/// decode: the inverse transforms, chroma upsampling and colour conversion run on 1/`reduce`² of
/// the pixels (the entropy decoding is the same).
///
/// # Errors
/// Any decoder error; the allocation limit ([`Refusal::TooManyPixels`]); a size other than
/// [`reduced_size`] of the header's.
pub fn decode_jpeg_reduced(bytes: &[u8], reduce: u32, opts: &IntakeOptions) -> Result<image::RgbImage, Refusal> {
    let (_, w, h) = check_complete(bytes)?;
    decode_jpeg_reduced_checked(bytes, (w, h), reduce, opts)
}

/// [`decode_jpeg_reduced`] of bytes already checked, with the header's (width, height).
#[cfg_attr(not(system_libjpeg), allow(unused_variables))]
pub(super) fn decode_jpeg_reduced_checked(bytes: &[u8], (w, h): (u32, u32), reduce: u32, opts: &IntakeOptions) -> Result<image::RgbImage, Refusal> {
    #[cfg(system_libjpeg)]
    {
        let (rw, rh) = reduced_size(w, h, reduce);
        let need = rw as u64 * rh as u64 * 3;
        if need > opts.max_alloc_bytes {
            return Err(Refusal::TooManyPixels(format!("decoder limit ({} bytes): {need} bytes needed", opts.max_alloc_bytes)));
        }
        let mut buf = super::take_buffer();
        match system_jpeg::decode_into(bytes, valid_reduction(reduce), rw, rh, &mut buf) {
            Ok(()) => return image::RgbImage::from_raw(rw, rh, buf).ok_or_else(|| Refusal::Corrupt(format!("decoder: wrong pixel count for {rw}x{rh} px"))),
            // CMYK frames: the general decoder's conversion, then a box average.
            Err(None) => {
                super::recycle_raw(buf);
                return decode(bytes, Format::Jpeg, opts).map(|img| box_reduce(&img, reduce));
            }
            Err(Some(m)) => {
                super::recycle_raw(buf);
                return Err(Refusal::Corrupt(format!("decoder: {m}")));
            }
        }
    }
    #[allow(unreachable_code)]
    decode_jpeg_reduced_rust(bytes, reduce, opts)
}

/// [`decode_jpeg_reduced`] with the pure-Rust decoder (used where the system's libjpeg is not
/// found at build time; measured slower at 1/2 than a whole-frame decode by the `image` crate).
///
/// # Errors
/// As [`decode_jpeg_reduced`].
pub fn decode_jpeg_reduced_rust(bytes: &[u8], reduce: u32, opts: &IntakeOptions) -> Result<image::RgbImage, Refusal> {
    use jpeg_decoder::PixelFormat;
    let r = valid_reduction(reduce);
    let mut d = jpeg_decoder::Decoder::new(std::io::Cursor::new(bytes));
    d.set_max_decoding_buffer_size(usize::try_from(opts.max_alloc_bytes).unwrap_or(usize::MAX));
    let corrupt = |e: jpeg_decoder::Error| Refusal::Corrupt(format!("decoder: {e}"));
    d.read_info().map_err(corrupt)?;
    let info = d.info().ok_or_else(|| Refusal::Corrupt("decoder: no frame header".into()))?;
    let (fw, fh) = (info.width as u32, info.height as u32);
    let (want_w, want_h) = reduced_size(fw, fh, r);
    let (w, h) = d.scale(want_w.min(u16::MAX as u32) as u16, want_h.min(u16::MAX as u32) as u16).map_err(corrupt)?;
    let (w, h) = (w as u32, h as u32);
    if (w, h) != (want_w, want_h) {
        return Err(Refusal::Corrupt(format!("decoder: reduced size {w}x{h} px, expected {want_w}x{want_h}")));
    }
    let format = d.info().map(|i| i.pixel_format).unwrap_or(PixelFormat::RGB24);
    if !matches!(format, PixelFormat::RGB24 | PixelFormat::L8) {
        // 16-bit grey and CMYK: the general decoder's conversion, then a box average.
        return decode(bytes, Format::Jpeg, opts).map(|img| box_reduce(&img, r));
    }
    let pixels = d.decode().map_err(|e| match e {
        jpeg_decoder::Error::Format(m) if m.contains("maximum allowed size") => {
            Refusal::TooManyPixels(format!("decoder limit ({} bytes): {m}", opts.max_alloc_bytes))
        }
        e => corrupt(e),
    })?;
    let rgb = match format {
        PixelFormat::L8 => pixels.iter().flat_map(|&v| [v, v, v]).collect(),
        _ => pixels,
    };
    let n = w as usize * h as usize;
    image::RgbImage::from_raw(w, h, rgb)
        .filter(|i| i.as_raw().len() == n * 3)
        .ok_or_else(|| Refusal::Corrupt(format!("decoder: wrong pixel count for {w}x{h} px")))
}

/// The system's libjpeg through `csrc/jpeg_reduced.c`.
#[cfg(system_libjpeg)]
pub(super) mod system_jpeg {
    use std::os::raw::{c_char, c_int, c_uchar, c_uint, c_ulong};

    unsafe extern "C" {
        fn nc_jpeg_decode_reduced(
            data: *const c_uchar,
            len: c_ulong,
            denom: c_int,
            dct_method: c_int,
            out: *mut c_uchar,
            width: c_uint,
            height: c_uint,
            msg: *mut c_char,
            msg_len: c_ulong,
        ) -> c_int;
    }

    /// The library's accurate integer inverse DCT (`JDCT_ISLOW`, its default; `dct_method` 0 of
    /// `csrc/jpeg_reduced.c`). Its fast integer one (1) took 5–7 % less CPU on 1024² frames but
    /// moved the pixels by −0.6 level on average (up to 8); the floating-point one (2) was slower.
    const ACCURATE_IDCT: c_int = 0;

    /// Decode at 1/`reduce` into `out` (its length set to `width` × `height` × 3 bytes, every byte
    /// written); `Err(None)` for a CMYK frame.
    pub(in crate::intake) fn decode_into(bytes: &[u8], reduce: u32, width: u32, height: u32, out: &mut Vec<u8>) -> Result<(), Option<String>> {
        let n = width as usize * height as usize * 3;
        // Not zero-filled: the decoder writes every byte before the length is set.
        out.clear();
        out.reserve(n);
        let mut msg = [0 as c_char; 256];
        // SAFETY: `bytes` is live for the call with the length passed, and `out` has capacity for
        // `width * height * 3` bytes, at most which the C side writes (it checks the decoded size
        // first); at most `msg.len()` bytes, NUL-terminated, go to `msg`.
        let rc = unsafe {
            nc_jpeg_decode_reduced(
                bytes.as_ptr(),
                bytes.len() as c_ulong,
                reduce as c_int,
                ACCURATE_IDCT,
                out.as_mut_ptr(),
                width,
                height,
                msg.as_mut_ptr(),
                msg.len() as c_ulong,
            )
        };
        match rc {
            0 => {
                // SAFETY: return code 0 means every output row was decoded, i.e. all `n` bytes
                // written (rows of `width * 3` bytes, `height` of them).
                unsafe { out.set_len(n) };
                Ok(())
            }
            2 => Err(None),
            _ => {
                // SAFETY: the C side wrote a NUL-terminated string within `msg` (snprintf).
                let m = unsafe { std::ffi::CStr::from_ptr(msg.as_ptr()) };
                Err(Some(m.to_string_lossy().into_owned()))
            }
        }
    }
}

/// Average `r` × `r` blocks (partial blocks at the right and bottom edges over the pixels they
/// have): the reduction of frames that cannot be scaled while decoding (PNG, CMYK JPEG).
pub fn box_reduce(img: &image::RgbImage, reduce: u32) -> image::RgbImage {
    let r = valid_reduction(reduce);
    if r == 1 {
        return img.clone();
    }
    let (w, h) = img.dimensions();
    let (ow, oh) = reduced_size(w, h, r);
    image::RgbImage::from_fn(ow, oh, |u, v| {
        let (mut acc, mut n) = ([0u32; 3], 0u32);
        for y in v * r..((v + 1) * r).min(h) {
            for x in u * r..((u + 1) * r).min(w) {
                let p = img.get_pixel(x, y).0;
                for c in 0..3 {
                    acc[c] += p[c] as u32;
                }
                n += 1;
            }
        }
        image::Rgb(acc.map(|a| ((a + n / 2) / n) as u8))
    })
}
