//! What counts as clipped when the sun is found: every channel at the level, or the luma.
//!
//! The sensor clips the sun's core in every channel, and JPEG keeps that core's luma close (full
//! resolution, fine quantization), but its colour is subsampled 2:1 and quantized more coarsely, so
//! near the clipped edge each of R, G and B wanders by about the chroma quantizer. A test "every
//! channel at least 250" has a margin of 5 levels below full scale: while the chroma table's DC
//! step is within that margin (quality about 85 and up) it holds; beyond it the colour noise takes
//! clipped pixels out of the region on one side and lets bright sky in on the other, and the
//! centroid leans. Measured on the independent cameras' clear days re-encoded at quality 75
//! (OpenCV): bare discs leaned +0.35 px outward (+0.01 px as shipped, quality ~90) and the
//! calibration's p95 error went 0.075° → 0.278° (camera1). There the luma (BT.601 weights) at
//! least 253 judges the core: 0.056°, and 0.049° at quality 60 (0.256° by channels).
//! [`ClipTest::for_chroma_quantizer`] chooses by the frames' own chroma table; the channels test is
//! kept where its margin holds, because on parts of a clear day (camera2's morning or afternoon)
//! the luma test measured worse (0.30° / 0.22° against 0.09° / 0.16°; DEVELOPERS.md).
//!
//! Sources: the JPEG quantization tables and their DQT segment, ITU-T T.81 (1992), Annex B.2.4.1
//! and K.1 (from memory); BT.601 luma weights (common practice).

/// How a pixel's clipping is judged.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum ClipTest {
    /// Every channel at least the level (250 for the sun's core).
    #[default]
    Channels,
    /// The BT.601 luma at least the level (253 for the sun's core).
    Luma,
}

/// The channels test's margin below full scale \[levels\] (255 − 250).
pub const CHANNELS_MARGIN: u16 = 5;

impl ClipTest {
    /// The value compared with a level: the darkest channel, or the luma.
    #[inline]
    pub fn value(self, p: [u8; 3]) -> u8 {
        match self {
            ClipTest::Channels => p[0].min(p[1]).min(p[2]),
            ClipTest::Luma => ((77 * p[0] as u32 + 150 * p[1] as u32 + 29 * p[2] as u32 + 128) >> 8) as u8,
        }
    }

    /// The level of the sun's clipped core.
    pub fn core_level(self) -> u8 {
        match self {
            ClipTest::Channels => 255 - CHANNELS_MARGIN as u8,
            ClipTest::Luma => 253,
        }
    }

    /// Whether a pixel belongs to the sun's clipped core.
    #[inline]
    pub fn clipped(self, p: [u8; 3]) -> bool {
        self.value(p) >= self.core_level()
    }

    /// The test for frames whose chroma table has this DC quantizer (`None`: no chroma table, e.g.
    /// PNG or greyscale frames): the channels while the step is within their margin, else the luma.
    pub fn for_chroma_quantizer(dc: Option<u16>) -> ClipTest {
        match dc {
            Some(q) if q > CHANNELS_MARGIN => ClipTest::Luma,
            _ => ClipTest::Channels,
        }
    }

    /// Name as printed.
    pub fn name(self) -> &'static str {
        match self {
            ClipTest::Channels => "every channel",
            ClipTest::Luma => "luma",
        }
    }
}

/// The DC quantizer of a baseline JPEG's chroma table: the first entry of the table the second
/// component (Cb) uses. `None` when the bytes are not a JPEG, have fewer than three components, or
/// the frame header or table is not found before the scan.
pub fn chroma_dc_quantizer(bytes: &[u8]) -> Option<u16> {
    if bytes.len() < 4 || bytes[0] != 0xFF || bytes[1] != 0xD8 {
        return None;
    }
    let mut tables: [Option<u16>; 4] = [None; 4];
    let mut chroma_table = None;
    let mut i = 2;
    while i + 4 <= bytes.len() {
        if bytes[i] != 0xFF {
            return None;
        }
        let marker = bytes[i + 1];
        if marker == 0xFF {
            i += 1;
            continue;
        }
        let len = u16::from_be_bytes([bytes[i + 2], bytes[i + 3]]) as usize;
        let seg = bytes.get(i + 4..i + 2 + len)?;
        match marker {
            // DQT: (precision << 4 | id), then 64 entries of 1 or 2 bytes, repeated.
            0xDB => {
                let mut j = 0;
                while j < seg.len() {
                    let (pq, tq) = (seg[j] >> 4, (seg[j] & 0x0F) as usize);
                    let dc = if pq == 0 { *seg.get(j + 1)? as u16 } else { u16::from_be_bytes([*seg.get(j + 1)?, *seg.get(j + 2)?]) };
                    if tq < 4 {
                        tables[tq] = Some(dc);
                    }
                    j += 1 + 64 * (1 + pq as usize);
                }
            }
            // SOF0–SOF2: components (id, sampling, table); the second one's table (the tables may
            // come before or after it, so the answer waits for the scan).
            0xC0..=0xC2 => {
                let n = *seg.get(5)? as usize;
                if n < 3 {
                    return None;
                }
                chroma_table = Some((*seg.get(6 + 3 + 2)? & 0x03) as usize);
            }
            0xDA => return chroma_table.and_then(|t| tables[t]),
            0xD9 => return None,
            _ => {}
        }
        i += 2 + len;
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    fn jpeg(quality: u8) -> Vec<u8> {
        let img = image::RgbImage::from_fn(64, 64, |x, y| image::Rgb([(x * 4) as u8, (y * 4) as u8, 200]));
        let mut out = vec![];
        image::codecs::jpeg::JpegEncoder::new_with_quality(&mut out, quality).encode_image(&img).unwrap();
        out
    }

    /// The chroma table's DC step of the standard tables scaled to a quality (ITU-T T.81 K.1: 17 at
    /// quality 50; scale 200 − 2q percent above 50): 3 at 90, 9 at 75 (with rounding), and the
    /// choice of test that follows.
    #[test]
    fn chroma_quantizer_read_from_the_tables_and_the_test_chosen() {
        let q90 = chroma_dc_quantizer(&jpeg(90)).unwrap();
        let q75 = chroma_dc_quantizer(&jpeg(75)).unwrap();
        assert!((3..=4).contains(&q90), "{q90}");
        assert!((8..=9).contains(&q75), "{q75}");
        assert_eq!(ClipTest::for_chroma_quantizer(Some(q90)), ClipTest::Channels);
        assert_eq!(ClipTest::for_chroma_quantizer(Some(q75)), ClipTest::Luma);
        assert_eq!(ClipTest::for_chroma_quantizer(None), ClipTest::Channels);
        assert_eq!(chroma_dc_quantizer(b"\x89PNG\r\n\x1a\n"), None);
        assert_eq!(chroma_dc_quantizer(&jpeg(90)[..40]), None);
    }

    /// White is clipped either way; a bright blue-white glare pixel (R held under the margin by
    /// its colour) by the luma only.
    #[test]
    fn luma_and_channels_judge_the_glare_differently() {
        assert!(ClipTest::Channels.clipped([255, 255, 255]) && ClipTest::Luma.clipped([255, 255, 255]));
        assert!(!ClipTest::Channels.clipped([249, 255, 255]));
        assert!(ClipTest::Luma.clipped([249, 255, 255]));
        assert!(!ClipTest::Luma.clipped([230, 255, 255]));
        assert_eq!(ClipTest::Luma.value([100, 100, 100]), 100);
    }
}
