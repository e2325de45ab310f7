//! The structure of a frame file before any decoding: its format by signature, a JPEG's markers
//! from SOI to EOI, a PNG's chunks with their CRCs, the header's dimensions against the limits.

use super::{Format, IntakeOptions, PNG_SIGNATURE, Refusal};

/// The format by the file's first bytes.
///
/// # Errors
/// Too short to tell ([`Refusal::Truncated`]) or neither format.
pub fn sniff(bytes: &[u8]) -> Result<Format, Refusal> {
    if bytes.is_empty() {
        return Err(Refusal::Truncated("empty file".into()));
    }
    let jpeg = [0xFF, 0xD8];
    if bytes.len() < jpeg.len() && jpeg.starts_with(bytes) || bytes.len() < PNG_SIGNATURE.len() && PNG_SIGNATURE.starts_with(bytes) {
        return Err(Refusal::Truncated(format!("{} bytes, shorter than a signature", bytes.len())));
    }
    if bytes.starts_with(&jpeg) {
        return Ok(Format::Jpeg);
    }
    if bytes.starts_with(&PNG_SIGNATURE) {
        return Ok(Format::Png);
    }
    let head: Vec<String> = bytes.iter().take(4).map(|b| format!("{b:02X}")).collect();
    Err(Refusal::UnknownFormat(format!("starts with {}", head.join(" "))))
}

/// Check that the bytes hold one whole JPEG or PNG; its format and header dimensions.
///
/// # Errors
/// [`Refusal::Truncated`] when the data end before the image does, [`Refusal::Corrupt`] for a
/// broken structure, [`Refusal::UnknownFormat`].
pub fn check_complete(bytes: &[u8]) -> Result<(Format, u32, u32), Refusal> {
    let f = sniff(bytes)?;
    let (w, h) = match f {
        Format::Jpeg => jpeg_structure(bytes)?,
        Format::Png => png_structure(bytes)?,
    };
    Ok((f, w, h))
}

pub(super) fn check_dimensions(w: u32, h: u32, opts: &IntakeOptions) -> Result<(), Refusal> {
    if w == 0 || h == 0 {
        return Err(Refusal::Corrupt(format!("header says {w}x{h} px")));
    }
    let px = w as u64 * h as u64;
    if px > opts.max_pixels {
        return Err(Refusal::TooManyPixels(format!("header says {w}x{h} px ({px} pixels), the limit is {}", opts.max_pixels)));
    }
    if let Some((ew, eh)) = opts.expected_size
        && (w, h) != (ew, eh)
    {
        return Err(Refusal::WrongSize { got_w: w, got_h: h, want_w: ew, want_h: eh });
    }
    Ok(())
}

/// Only zero bytes after the end marker.
fn trailing_ok(rest: &[u8], what: &str, at: usize) -> Result<(), Refusal> {
    match rest.iter().position(|&b| b != 0) {
        None => Ok(()),
        Some(k) => Err(Refusal::Corrupt(format!("{} bytes of data after {what} (first non-zero at byte {})", rest.len(), at + k))),
    }
}

/// Walk a JPEG's markers from SOI to EOI; the frame's (width, height).
///
/// One piece on purpose: a state machine over the byte stream whose position, frame header and
/// scan state every marker case reads and moves.
fn jpeg_structure(b: &[u8]) -> Result<(u32, u32), Refusal> {
    let n = b.len();
    let trunc = |at: usize, what: &str| Refusal::Truncated(format!("JPEG of {n} bytes ends inside {what} (from byte {at}) before its end marker"));
    let mut pos = 2; // after SOI
    let mut dims: Option<(u32, u32)> = None;
    let mut scans = 0usize;
    loop {
        // A marker: 0xFF (fill bytes allowed), then its code.
        if pos >= n {
            return Err(trunc(pos, "the marker stream"));
        }
        if b[pos] != 0xFF {
            return Err(Refusal::Corrupt(format!("JPEG: expected a marker at byte {pos}, found {:02X}", b[pos])));
        }
        while pos < n && b[pos] == 0xFF {
            pos += 1;
        }
        if pos >= n {
            return Err(trunc(pos, "a marker"));
        }
        let m = b[pos];
        let at = pos - 1;
        pos += 1;
        match m {
            0xD9 => {
                if dims.is_none() || scans == 0 {
                    return Err(Refusal::Corrupt(format!("JPEG: end marker at byte {at} before any frame header and scan")));
                }
                trailing_ok(&b[pos..], "the JPEG end marker", pos)?;
                return dims.ok_or_else(|| Refusal::Corrupt("JPEG without a frame header".into()));
            }
            0xD8 => return Err(Refusal::Corrupt(format!("JPEG: a second start marker at byte {at}"))),
            0x01 | 0xD0..=0xD7 => continue,
            0x00 => return Err(Refusal::Corrupt(format!("JPEG: stuffed zero where a marker was expected at byte {at}"))),
            _ => {}
        }
        if pos + 2 > n {
            return Err(trunc(at, "a segment length"));
        }
        let len = u16::from_be_bytes([b[pos], b[pos + 1]]) as usize;
        if len < 2 {
            return Err(Refusal::Corrupt(format!("JPEG: segment {m:02X} at byte {at} has length {len}")));
        }
        let seg = pos + 2..pos + len;
        if seg.end > n {
            return Err(trunc(at, &format!("segment {m:02X}")));
        }
        let body = &b[seg.clone()];
        pos = seg.end;
        match m {
            // Start of frame (not DHT C4, JPG C8, DAC CC).
            0xC0..=0xCF if !matches!(m, 0xC4 | 0xC8 | 0xCC) => {
                if body.len() < 6 {
                    return Err(Refusal::Corrupt(format!("JPEG: frame header at byte {at} is {} bytes", body.len())));
                }
                if dims.is_some() {
                    return Err(Refusal::Corrupt(format!("JPEG: a second frame header at byte {at}")));
                }
                let h = u16::from_be_bytes([body[1], body[2]]) as u32;
                let w = u16::from_be_bytes([body[3], body[4]]) as u32;
                dims = Some((w, h));
            }
            0xDA => {
                if dims.is_none() {
                    return Err(Refusal::Corrupt(format!("JPEG: scan at byte {at} before the frame header")));
                }
                scans += 1;
                // Entropy-coded data up to the next marker that is not a restart.
                loop {
                    let Some(k) = memchr::memchr(0xFF, &b[pos..]) else {
                        return Err(trunc(at, "the image data"));
                    };
                    let f = pos + k;
                    if f + 1 >= n {
                        return Err(trunc(at, "the image data"));
                    }
                    match b[f + 1] {
                        0x00 | 0xD0..=0xD7 => pos = f + 2,
                        0xFF => pos = f + 1,
                        _ => {
                            pos = f;
                            break;
                        }
                    }
                }
            }
            _ => {}
        }
    }
}

/// Walk a PNG's chunks with their CRCs; IHDR's (width, height).
fn png_structure(b: &[u8]) -> Result<(u32, u32), Refusal> {
    let n = b.len();
    let mut pos = PNG_SIGNATURE.len();
    let mut dims = None;
    let mut idat = false;
    loop {
        if pos + 8 > n {
            return Err(Refusal::Truncated(format!("PNG of {n} bytes ends at byte {pos} before its IEND chunk")));
        }
        let len = u32::from_be_bytes([b[pos], b[pos + 1], b[pos + 2], b[pos + 3]]) as usize;
        let ty = &b[pos + 4..pos + 8];
        let name = String::from_utf8_lossy(ty).into_owned();
        if len > 0x7FFF_FFFF {
            return Err(Refusal::Corrupt(format!("PNG: chunk {name:?} at byte {pos} has length {len}")));
        }
        let end = pos + 12 + len;
        if end > n {
            return Err(Refusal::Truncated(format!("PNG of {n} bytes ends inside chunk {name:?} (from byte {pos}, {len} data bytes)")));
        }
        let stored = u32::from_be_bytes([b[end - 4], b[end - 3], b[end - 2], b[end - 1]]);
        let crc = crc32fast::hash(&b[pos + 4..end - 4]);
        if crc != stored {
            return Err(Refusal::Corrupt(format!("PNG: chunk {name:?} at byte {pos} fails its CRC (stored {stored:08X}, computed {crc:08X})")));
        }
        let data = &b[pos + 8..end - 4];
        match ty {
            b"IHDR" => {
                if dims.is_some() || pos != PNG_SIGNATURE.len() || len != 13 {
                    return Err(Refusal::Corrupt(format!("PNG: IHDR at byte {pos} must come first, once, with 13 bytes")));
                }
                let w = u32::from_be_bytes([data[0], data[1], data[2], data[3]]);
                let h = u32::from_be_bytes([data[4], data[5], data[6], data[7]]);
                dims = Some((w, h));
            }
            _ if dims.is_none() => return Err(Refusal::Corrupt(format!("PNG: chunk {name:?} at byte {pos} comes before IHDR"))),
            b"IDAT" => idat = true,
            b"IEND" => {
                if !idat {
                    return Err(Refusal::Corrupt("PNG: no image data before IEND".into()));
                }
                trailing_ok(&b[end..], "the PNG IEND chunk", end)?;
                return dims.ok_or_else(|| Refusal::Corrupt("PNG without IHDR".into()));
            }
            _ => {}
        }
        pos = end;
    }
}
