//! The clear-sky library: the clear sky's R/B and brightness per bin of zenith and angle to the
//! sun (2° × 2°), learnt from a clear day (`calibrate`) or from clear frames online, written to and
//! read from CSV; and a frame's reference from it (`Reference::for_frame`).
use super::{FrameReference, PixelGeom, SegmentParams, GLARE_RINGS, GLARE_RING_MIN_SAMPLES};

const LIB_BIN_DEG: f32 = 2.0;

const LIB_Z_BINS: usize = 50;
const LIB_G_BINS: usize = 90;

/// The clear-sky reference: learned library plus the parametric default with a per-frame offset.
#[derive(Debug, Clone)]
pub struct Reference {
    /// Library mean R/B per (zenith, sun angle) bin.
    pub(super) lib: Vec<f32>,
    /// Library weight per bin (0 = no data).
    pub(super) weight: Vec<f32>,
    /// Library mean clear-sky brightness per bin (largest channel; 0 = not learned): `brightness`.
    pub(super) bright: Vec<f32>,
    /// Bins where the clear day's sky clipped ([`Reference::from_clear_samples`] with
    /// [`SegmentParams::library_keeps_clipped`]): while `clipped_marks_in_use` holds their pixels
    /// are unknown, or judged by brightness ([`SegmentParams::judge_clipped_bins`]). Such a bin keeps no library value (`weight` 0), as without
    /// the setting.
    pub(super) clipped: Vec<bool>,
    /// The clear sky's R/B as read (clipped channels included) in each clipped bin, and the frames
    /// it was read in: a record, written to the CSV.
    pub(super) clipped_read: Vec<(f32, f32)>,
    /// Whether the clipped bins' marks are used (true, the default: their pixels judged by
    /// brightness, or unknown with `segment.judge_clipped_bins` off) or the bins are judged as if
    /// they held no value: the engine sets it false while pyranometers are held (unless
    /// `segment.clipped_marks_with_pyranometers`), which lets the transmittance tuning learn what
    /// the sky there means; the second camera's library follows the first's.
    pub clipped_marks_in_use: bool,
    /// Frames that updated the library.
    pub library_frames: usize,
    /// Running mean of the frames' clear-sky shift of ln(R/B) against the library (0: none found
    /// yet; [`SegmentParams::follow_colour_balance`]).
    pub ratio_shift_ln: f32,
    /// Frames whose clear sky gave a shift.
    pub ratio_shift_frames: usize,
    /// Whether the shift is followed over frames (the engine's map, which keeps it with
    /// [`Reference::keep_ratio_shift`]: a running mean) or read from each frame alone (false, the
    /// default: a second camera's map, `segment`, `verify`).
    pub follows_frames: bool,
    /// Sum of ln(exposure) over the frames whose exposure against the library's brightness was
    /// measured (`brightness::ExposureMeter`), and their count ([`Reference::mean_exposure`]).
    pub exposure_ln_sum: f64,
    /// Frames whose exposure was measured.
    pub exposure_frames: usize,
}

impl Default for Reference {
    fn default() -> Self {
        let n = LIB_Z_BINS * LIB_G_BINS;
        Self { lib: vec![0.0; n], weight: vec![0.0; n], bright: vec![0.0; n], clipped: vec![false; n], clipped_read: vec![(0.0, 0.0); n], clipped_marks_in_use: true, library_frames: 0, ratio_shift_ln: 0.0, ratio_shift_frames: 0, follows_frames: false, exposure_ln_sum: 0.0, exposure_frames: 0 }
    }
}

/// The library bin of a pixel geometry.
#[inline]
pub fn lib_index(z_deg: f32, gamma_deg: f32) -> usize {
    // Through i32: a float-to-usize conversion is a slow instruction sequence on x86-64.
    let zi = (((z_deg / LIB_BIN_DEG) as i32).max(0) as usize).min(LIB_Z_BINS - 1);
    let gi = (((gamma_deg / LIB_BIN_DEG) as i32).max(0) as usize).min(LIB_G_BINS - 1);
    zi * LIB_G_BINS + gi
}

impl Reference {
    /// The library as CSV: one row per bin with data
    /// (`zenith_from_deg,gamma_from_deg,rb,weight,brightness,clear_sky_clips`; brightness 0 where it
    /// was not learned; `clear_sky_clips` 1 for a bin learnt from clipped clear sky).
    pub fn to_csv(&self) -> String {
        let mut out = crate::io::CsvTable::with_header_line("zenith_from_deg,gamma_from_deg,rb,weight,brightness,clear_sky_clips");
        for i in 0..self.lib.len() {
            let (zi, gi) = (i / LIB_G_BINS, i % LIB_G_BINS);
            let (z, g) = ((zi as f32 * LIB_BIN_DEG).to_string(), (gi as f32 * LIB_BIN_DEG).to_string());
            if self.weight[i] > 0.5 {
                out.row([z, g, format!("{:.5}", self.lib[i]), format!("{:.1}", self.weight[i]), format!("{:.2}", self.bright[i]), "0".to_string()]);
            } else if self.clipped[i] {
                let (rb, w) = self.clipped_read[i];
                out.row([z, g, format!("{rb:.5}"), format!("{w:.1}"), "0.00".to_string(), "1".to_string()]);
            }
        }
        out.into_string()
    }

    /// Read a library written by [`Reference::to_csv`] (a file without the brightness or
    /// `clear_sky_clips` column, from an earlier version, reads with no brightness learned and no
    /// clipped bin).
    ///
    /// # Errors
    /// A message naming the line and what was expected.
    pub fn from_csv(text: &str) -> Result<Reference, String> {
        let mut r = Reference::default();
        let mut rdr = csv::ReaderBuilder::new().flexible(true).from_reader(text.as_bytes());
        for rec in rdr.records() {
            let rec = rec.map_err(|e| format!("line {}: {e}", e.position().map(|p| p.line()).unwrap_or(0)))?;
            let line_no = rec.position().map(|p| p.line()).unwrap_or(0);
            if rec.iter().all(|f| f.trim().is_empty()) {
                continue;
            }
            let line = rec.iter().collect::<Vec<_>>().join(",");
            let num = |k: usize| rec.get(k).and_then(|x| x.trim().parse::<f32>().ok()).filter(|x| x.is_finite());
            let (Some(z), Some(g), Some(rb), Some(w)) = (num(0), num(1), num(2), num(3)) else {
                return Err(format!("line {line_no}: expected zenith_from_deg,gamma_from_deg,rb,weight as numbers, got {line:?}"));
            };
            if !(0.0..=(LIB_Z_BINS as f32 * LIB_BIN_DEG)).contains(&z) || !(0.0..=(LIB_G_BINS as f32 * LIB_BIN_DEG)).contains(&g) || !(0.05..=3.0).contains(&rb) || w < 0.0 {
                return Err(format!("line {line_no}: a bin out of range (zenith 0–100°, sun angle 0–180°, R/B 0.05–3, weight ≥ 0), got {line:?}"));
            }
            let k = lib_index(z + 0.5 * LIB_BIN_DEG, g + 0.5 * LIB_BIN_DEG);
            let clips = match rec.get(5).map(str::trim).filter(|f| !f.is_empty()) {
                None | Some("0") => false,
                Some("1") => true,
                Some(other) => return Err(format!("line {line_no}: clear_sky_clips must be 0 or 1, got {other:?}")),
            };
            if clips {
                r.clipped[k] = true;
                r.clipped_read[k] = (rb, w.min(100.0));
                continue;
            }
            r.lib[k] = rb;
            r.weight[k] = w.min(100.0);
            if let Some(field) = rec.get(4).filter(|f| !f.trim().is_empty()) {
                match field.trim().parse::<f32>() {
                    Ok(v) if (0.0..=255.0).contains(&v) => r.bright[k] = v,
                    _ => return Err(format!("line {line_no}: brightness must be a number from 0 to 255, got {field:?}")),
                }
            }
        }
        r.library_frames = 1;
        Ok(r)
    }

    /// A library from clear frames, as a clear day for calibration gives: each bin the plain mean
    /// R/B of the unclipped pixels that fell in it (at least `min_frames` frames with 3 such pixels
    /// each). Where the clear sky itself clips (the circumsolar sky low toward the horizon, on a
    /// camera exposed for the zenith), a bin holds too few unclipped pixels. With
    /// [`SegmentParams::library_keeps_clipped`] such a bin, when it held at least 3 pixels outside
    /// the sun's exclusion in `min_frames` frames, is marked clipped (with their mean ratio *as
    /// read*, clipped channels included, kept as a record), so segmentation leaves its pixels
    /// unknown; either way such a bin has no library value. The brightness is learnt from unclipped pixels only (0, not
    /// learned, in a clipped bin).
    pub fn from_clear_samples<I>(params: &SegmentParams, frames: impl Iterator<Item = I>, min_frames: u32) -> Reference
    where
        I: Iterator<Item = ([u8; 3], PixelGeom)>,
    {
        let nb = LIB_Z_BINS * LIB_G_BINS;
        // Unclipped pixels' ratio and brightness; all pixels' ratio as read.
        let (mut sum, mut sum_v, mut sum_read) = (vec![0f64; nb], vec![0f64; nb], vec![0f64; nb]);
        let (mut frames_in, mut frames_read) = (vec![0u32; nb], vec![0u32; nb]);
        let mut n_frames = 0;
        let (mut fsum, mut fsum_v, mut fsum_read) = (vec![0f64; nb], vec![0f64; nb], vec![0f64; nb]);
        let (mut fcnt, mut fcnt_read) = (vec![0u32; nb], vec![0u32; nb]);
        for sample in frames {
            n_frames += 1;
            for v in [&mut fsum, &mut fsum_v, &mut fsum_read] {
                v.fill(0.0);
            }
            fcnt.fill(0);
            fcnt_read.fill(0);
            for (rgb, g) in sample {
                if g.gamma_deg < params.sun_exclusion_deg as f32 || rgb[2] < 10 {
                    continue;
                }
                let i = lib_index(g.z_deg, g.gamma_deg);
                let rb = rgb[0] as f64 / rgb[2] as f64;
                fsum_read[i] += rb;
                fcnt_read[i] += 1;
                if rgb.iter().any(|c| *c >= params.saturation_level) {
                    continue;
                }
                fsum[i] += rb;
                fsum_v[i] += f64::from(crate::segment::brightness::reading(rgb));
                fcnt[i] += 1;
            }
            for i in 0..nb {
                if fcnt[i] >= 3 {
                    sum[i] += fsum[i] / fcnt[i] as f64;
                    sum_v[i] += fsum_v[i] / fcnt[i] as f64;
                    frames_in[i] += 1;
                }
                if fcnt_read[i] >= 3 {
                    sum_read[i] += fsum_read[i] / fcnt_read[i] as f64;
                    frames_read[i] += 1;
                }
            }
        }
        let mut r = Reference::default();
        let min_frames = min_frames.max(1);
        for i in 0..nb {
            if frames_in[i] >= min_frames {
                r.lib[i] = (sum[i] / frames_in[i] as f64) as f32;
                r.bright[i] = (sum_v[i] / frames_in[i] as f64) as f32;
                r.weight[i] = (frames_in[i] as f32).min(100.0);
            } else if params.library_keeps_clipped && frames_read[i] >= min_frames {
                r.clipped[i] = true;
                r.clipped_read[i] = ((sum_read[i] / frames_read[i] as f64) as f32, (frames_read[i] as f32).min(100.0));
            }
        }
        r.library_frames = n_frames;
        r
    }

    /// How many bins are marked as clipped clear sky ([`SegmentParams::library_keeps_clipped`]).
    pub fn clipped_bins(&self) -> usize {
        self.clipped.iter().filter(|c| **c).count()
    }

    /// How many library bins hold data.
    pub fn library_bins(&self) -> usize {
        self.weight.iter().filter(|w| **w > 0.5).count()
    }

    /// The learned clear sky's brightness in library bin `bin` (largest channel, 8 bit), when that
    /// bin has been learned.
    pub fn clear_brightness(&self, bin: usize) -> Option<f32> {
        (self.weight.get(bin).is_some_and(|w| *w > 0.5) && self.bright[bin] > 0.0).then(|| self.bright[bin])
    }

    /// The reference for one frame from a sample of its sky pixels.
    pub fn for_frame<'a>(&'a self, params: &'a SegmentParams, sample: impl Iterator<Item = ([u8; 3], PixelGeom)>) -> FrameReference<'a> {
        self.for_frame_with(params, sample.map(|(rgb, g)| (rgb, g, params.default_reference(g.z_deg, g.gamma_deg))))
    }

    /// [`Reference::for_frame`] from samples that carry their parametric default reference.
    ///
    /// With [`SegmentParams::follow_colour_balance`] the frame's own clear-sky shift
    /// ([`clear_ratio_shift`]) is folded into
    /// the running mean ([`FrameReference::ratio_shift_ln`], kept for the next frames by
    /// [`Reference::keep_ratio_shift`]), and the frame is classified at that mean's scale. The
    /// offset, the glare rings and the exposure meter, gathered in the same pass that measures the
    /// shift, read the ratios at the earlier frames' scale ([`Reference::ratio_scale`]).
    pub fn for_frame_with<'a>(&'a self, params: &'a SegmentParams, sample: impl Iterator<Item = ([u8; 3], PixelGeom, f32)>) -> FrameReference<'a> {
        let mut d = vec![];
        let mut n = 0usize;
        // The near sky's samples (zenith within `cloud_fraction_zenith_deg`) and their departures
        // that qualify, for when the whole sample shows too little clear sky.
        let (mut d_near, mut n_near) = (vec![], 0usize);
        let near_zenith = params.cloud_fraction_zenith_deg as f32;
        let (mut ring_n, mut ring_clipped) = ([0u32; GLARE_RINGS], [0u32; GLARE_RINGS]);
        let glare_zone = GLARE_RINGS as f32;
        let mut meter = crate::segment::brightness::ExposureMeter::default();
        let metering = params.dark_cloud_margin > 0.0;
        let follow = params.follow_colour_balance;
        // Ratios are read in the library's own colour balance: the frame's divided by its scale
        // (here the earlier frames').
        let inv_earlier_scale = 1.0 / if follow { self.ratio_scale() } else { 1.0 };
        // The colour balance's candidates: (ln(R/B ÷ library), ln library).
        let mut shifts: Vec<(f32, f32)> = vec![];
        for (rgb, g, default_rb) in sample {
            if g.z_deg > params.max_zenith_deg as f32 || g.gamma_deg < params.sun_exclusion_deg as f32 {
                continue;
            }
            n += 1;
            let rb_read = rgb[0] as f32 / (rgb[2] as f32).max(1.0);
            let rb = rb_read * inv_earlier_scale;
            if g.gamma_deg < glare_zone {
                // Clipped and not provably clear (the library is not consulted: a bound suffices).
                let r = (g.gamma_deg as usize).min(GLARE_RINGS - 1);
                ring_n[r] += 1;
                let clear_bound = default_rb + params.thin_score as f32 * (params.cloud_rb as f32 - default_rb).max(0.03);
                ring_clipped[r] += (rgb[2] >= params.saturation_level && rb >= clear_bound) as u32;
            }
            let dd = rb - default_rb;
            let near = g.z_deg <= near_zenith;
            n_near += near as usize;
            if dd < params.offset_band as f32 {
                d.push(dd);
                if near {
                    d_near.push(dd);
                }
            }
            if (metering || follow) && g.gamma_deg >= params.glare_zone_deg as f32 {
                let bin = lib_index(g.z_deg, g.gamma_deg);
                if self.weight[bin] > 0.5 {
                    let r = self.lib[bin];
                    if metering && self.bright[bin] > 0.0 && rb < r + 0.5 * params.thin_score as f32 * (params.cloud_rb as f32 - r).max(0.03) {
                        // Clear by a margin against the learned ratio: the frame's clear sky, for its exposure.
                        meter.add(rgb, self.bright[bin], params.saturation_level);
                    }
                    if follow && r > 0.0 && rgb[0] > 0 && g.z_deg <= SHIFT_MAX_ZENITH_DEG && rgb[2] >= 10 && rgb.iter().all(|c| *c < params.saturation_level) {
                        shifts.push(((rb_read / r).ln(), r.ln()));
                    }
                }
            }
        }
        // The colour balance: this frame's clear-sky shift, folded into the running mean.
        let ratio_shift_measured = if follow { clear_ratio_shift(&shifts) } else { None };
        let ratio_shift_ln = match ratio_shift_measured {
            Some(e) if self.follows_frames => self.ratio_shift_ln + SHIFT_RATE * (e - self.ratio_shift_ln),
            Some(e) => e,
            None => self.ratio_shift_ln,
        };
        let ratio_scale = ratio_scale_of(ratio_shift_ln);
        let inv_ratio_scale = 1.0 / ratio_scale;
        // The frame's own clear sky: over the whole sample, or, when too little of it qualifies,
        // over the near sky alone. The far field's haze lifts the clear sky's ratio above the
        // default there, and a map's cells, spaced evenly on the cloud plane, are mostly far field
        // (a cell's solid angle falls as cos³ z): a hazy camera's map then showed "no clear sky"
        // (2 % of its cells within `offset_band`, 24–27 % of those within zenith 70°) and took
        // offset 0, which called its clear circumsolar sky thin cloud.
        let enough = |m: usize, of: usize| of > 0 && m > 0 && m as f64 >= params.offset_min_share * of as f64;
        let qualified = if enough(d.len(), n) {
            Some(&mut d)
        } else if enough(d_near.len(), n_near) {
            Some(&mut d_near)
        } else {
            None
        };
        let offset = match qualified {
            Some(d) => {
                let k = ((d.len() - 1) as f64 * params.offset_quantile).round() as usize;
                let (_, q, _) = d.select_nth_unstable_by(k, f32::total_cmp);
                (*q).clamp(params.offset_min as f32, params.offset_max as f32)
            }
            None => 0.0,
        };
        let mut glare_ring = [true; GLARE_RINGS];
        for r in 0..GLARE_RINGS {
            if ring_n[r] >= GLARE_RING_MIN_SAMPLES {
                glare_ring[r] = ring_clipped[r] as f64 >= params.glare_ring_share * ring_n[r] as f64;
            }
        }
        // The bloom's extent: the first sampled ring outside the sun's exclusion that is not mostly
        // clipped. Clipped pixels inside it are glare wherever it reaches.
        let first = (params.sun_exclusion_deg.ceil() as usize).min(GLARE_RINGS - 1);
        let glare_extent_deg = (first..GLARE_RINGS).find(|&r| ring_n[r] >= GLARE_RING_MIN_SAMPLES && !glare_ring[r]).unwrap_or(first) as f32;
        let glare_zone_deg = (params.glare_zone_deg as f32).max(glare_extent_deg);
        let exposure = if metering { meter.exposure() } else { None };
        let clip_exposure = if params.exposure_past_clipping { exposure.or_else(|| self.mean_exposure().map(|m| m.0 as f32)) } else { None };
        FrameReference { reference: self, params, offset, glare_ring, glare_extent_deg, glare_zone_deg, exposure, ratio_scale, inv_ratio_scale, ratio_shift_measured, ratio_shift_ln, clip_exposure }
    }

    /// The factor the library's ratios are read with ([`SegmentParams::follow_colour_balance`]):
    /// the running clear-sky shift's, 1 within its dead band.
    pub fn ratio_scale(&self) -> f32 {
        ratio_scale_of(self.ratio_shift_ln)
    }

    /// Keep a frame's running clear-sky shift ([`FrameReference::ratio_shift_ln`]) for the next
    /// frames.
    pub fn keep_ratio_shift(&mut self, fr_shift_ln: f32, measured: bool) {
        self.ratio_shift_ln = fr_shift_ln;
        self.ratio_shift_frames += usize::from(measured);
    }

    /// Count a frame's measured exposure ([`FrameReference::exposure`]) into
    /// [`Reference::mean_exposure`].
    pub fn keep_exposure(&mut self, exposure: Option<f32>) {
        if let Some(e) = exposure.filter(|e| *e > 0.0) {
            self.exposure_ln_sum += f64::from(e).ln();
            self.exposure_frames += 1;
        }
    }

    /// The frames' exposure against the library's clear-sky brightness (geometric mean over the
    /// frames that measured it), with their count; `None` before any did.
    pub fn mean_exposure(&self) -> Option<(f64, usize)> {
        (self.exposure_frames > 0).then(|| ((self.exposure_ln_sum / self.exposure_frames as f64).exp(), self.exposure_frames))
    }

    /// Learn from a frame only when it is judged clear: its cloud fraction at most
    /// [`SegmentParams::library_max_cloud_fraction`] (the one rule for the engine's map and for
    /// `verify`). Returns whether it learnt.
    pub fn learn_if_clear(&mut self, params: &SegmentParams, cloud_fraction: f64, sample: impl Iterator<Item = ([u8; 3], PixelGeom)>) -> bool {
        let clear = cloud_fraction <= params.library_max_cloud_fraction;
        if clear {
            self.learn(params, sample);
        }
        clear
    }

    /// Update the library with a frame's clear pixels (call only for frames judged clear; see
    /// [`Reference::learn_if_clear`]).
    pub fn learn(&mut self, params: &SegmentParams, sample: impl Iterator<Item = ([u8; 3], PixelGeom)>) {
        let nb = LIB_Z_BINS * LIB_G_BINS;
        let (mut sum, mut sum_v) = (vec![0f64; nb], vec![0f64; nb]);
        let (mut cnt, mut cnt_v) = (vec![0u32; nb], vec![0u32; nb]);
        // Ratios learnt in the library's own colour balance (the frames' read back by its scale).
        let unscale = 1.0 / f64::from(self.ratio_scale());
        for (rgb, g) in sample {
            if g.z_deg > params.max_zenith_deg as f32 || g.gamma_deg < params.sun_exclusion_deg as f32 {
                continue;
            }
            let i = lib_index(g.z_deg, g.gamma_deg);
            sum[i] += rgb[0] as f64 / (rgb[2] as f64).max(1.0) * unscale;
            cnt[i] += 1;
            // Brightness from unclipped pixels only, as from a clear day (`from_clear_samples`).
            if rgb.iter().all(|c| *c < params.saturation_level) {
                sum_v[i] += f64::from(crate::segment::brightness::reading(rgb));
                cnt_v[i] += 1;
            }
        }
        let rate = params.library_rate as f32;
        for i in 0..sum.len() {
            if cnt[i] >= 3 {
                blend(&mut self.lib[i], (sum[i] / cnt[i] as f64) as f32, rate, self.weight[i] == 0.0);
                self.weight[i] = (self.weight[i] + 1.0).min(100.0);
            }
            if cnt_v[i] >= 3 {
                let fresh = self.bright[i] == 0.0;
                blend(&mut self.bright[i], (sum_v[i] / cnt_v[i] as f64) as f32, rate, fresh);
            }
        }
        self.library_frames += 1;
    }
}

/// A library bin's exponential mean: the new frame's value `v` when the bin is `fresh`, else moved
/// toward it by `rate`.
fn blend(slot: &mut f32, v: f32, rate: f32, fresh: bool) {
    if fresh {
        *slot = v;
    } else {
        *slot += rate * (v - *slot);
    }
}

/// Clear-sky samples for the colour balance lie within this zenith angle \[°\] (the far field's
/// haze whitens the sky with distance; `distance`).
const SHIFT_MAX_ZENITH_DEG: f32 = 75.0;
/// Fewest samples for a frame's clear-sky shift.
const SHIFT_MIN_SAMPLES: usize = 300;
/// Histogram step of the shift \[ln(R/B)\].
const SHIFT_STEP: f32 = 0.005;
/// The histogram's reach either side of 0 \[ln(R/B)\].
const SHIFT_REACH: f32 = 0.6;
/// Width of the window that holds the clear sky's samples \[ln(R/B)\]: the spread of a clear
/// sky's ratio about its bin's mean (JPEG noise, the bins' 2° width).
const SHIFT_WINDOW: f32 = 0.04;
/// The window is looked for from the lowest samples' shift (their [`SHIFT_LOW_QUANTILE`]) to this
/// far above it \[ln(R/B)\]: clear sky is the bluest sky there is, cloud only adds red.
const SHIFT_SEARCH: f32 = 0.12;
/// The lowest samples: this quantile of the shifts.
const SHIFT_LOW_QUANTILE: f32 = 0.02;
/// Least share of the samples in the clear sky's window.
const SHIFT_MIN_SHARE: f32 = 0.15;
/// The window's samples must span at least this share of the library's ratios (interquartile
/// range of ln(R/B), against all samples'): a change of colour balance moves every clear ratio
/// alike, where a veil, which reddens the blue sky more than the white, gives one shift only over
/// a narrow range of them.
const SHIFT_MIN_SPAN: f32 = 0.5;
/// Largest shift followed \[ln(R/B)\] (±35 %).
const SHIFT_MAX: f32 = 0.3;
/// Weight of a frame's shift in the running mean.
const SHIFT_RATE: f32 = 0.3;
/// A running shift within this of 0 \[ln(R/B)\] reads the library as learnt: the day-to-day
/// spread of the clear sky's own colour (haze), not the camera's (the shipped independent scenes'
/// running shift stays within ±0.015).
const SHIFT_DEAD_BAND: f32 = 0.03;

/// The ratio scale of a running shift: 1 within [`SHIFT_DEAD_BAND`], the whole shift from twice
/// that, and a linear ramp between (no step in the classification as the shift crosses the band).
fn ratio_scale_of(shift_ln: f32) -> f32 {
    let s = shift_ln.clamp(-SHIFT_MAX, SHIFT_MAX);
    let ramp = ((s.abs() - SHIFT_DEAD_BAND) / SHIFT_DEAD_BAND).clamp(0.0, 1.0);
    if ramp == 0.0 { 1.0 } else { (s * ramp).exp() }
}

/// A frame's clear-sky shift of ln(R/B) against the library, from its samples
/// `(ln(rb / library rb), ln(library rb))`; `None` unless the frame shows clear sky.
///
/// # Method
/// A change of the camera's white balance (or of its colour gains) multiplies every pixel's red and
/// blue by fixed factors, so every clear-sky sample's ratio moves by the same factor against the
/// library learnt before it: their shifts gather in one narrow peak, whatever the library's ratio.
/// Cloud only adds red (its ratio nears white), so the clear sky's peak is the lowest one. The shift
/// is the mean of the samples in the fullest [`SHIFT_WINDOW`] found from the lowest samples up
/// ([`SHIFT_SEARCH`]), provided that window holds [`SHIFT_MIN_SHARE`] of the samples (a frame with
/// little clear sky gives none) and spans the library's ratios ([`SHIFT_MIN_SPAN`]; a veil over
/// the whole sky does not). Common practice, no source.
pub fn clear_ratio_shift(xs: &[(f32, f32)]) -> Option<f32> {
    let n = xs.len();
    if n < SHIFT_MIN_SAMPLES {
        return None;
    }
    let bins = (2.0 * SHIFT_REACH / SHIFT_STEP).round() as usize;
    let mut hist = vec![0u32; bins];
    let bin_of = |x: f32| ((x + SHIFT_REACH) / SHIFT_STEP).floor();
    for (x, _) in xs.iter() {
        let b = bin_of(*x);
        if b >= 0.0 && (b as usize) < bins {
            hist[b as usize] += 1;
        }
    }
    // The lowest samples' shift (values below the histogram count toward it).
    let below = xs.iter().filter(|(x, _)| bin_of(*x) < 0.0).count() as u32;
    let need = (SHIFT_LOW_QUANTILE * n as f32).ceil() as u32;
    let mut seen = below;
    let mut low = 0usize;
    while low < bins && seen + hist[low] < need {
        seen += hist[low];
        low += 1;
    }
    let w = (SHIFT_WINDOW / SHIFT_STEP).round() as usize;
    let last = (low + (SHIFT_SEARCH / SHIFT_STEP).round() as usize).min(bins.saturating_sub(w));
    let first = low.saturating_sub(w / 2).min(last);
    let (mut best, mut best_n) = (first, 0u32);
    for s in first..=last {
        let c: u32 = hist[s..s + w].iter().sum();
        if c > best_n {
            (best, best_n) = (s, c);
        }
    }
    if (best_n as f32) < SHIFT_MIN_SHARE * n as f32 {
        return None;
    }
    let lo = best as f32 * SHIFT_STEP - SHIFT_REACH;
    let hi = lo + w as f32 * SHIFT_STEP;
    let mut inside: Vec<f32> = vec![];
    let mut sum = 0f64;
    for (x, l) in xs.iter() {
        if *x >= lo && *x < hi {
            sum += f64::from(*x);
            inside.push(*l);
        }
    }
    let mut all: Vec<f32> = xs.iter().map(|(_, l)| *l).collect();
    if iqr(&mut inside) < SHIFT_MIN_SPAN * iqr(&mut all) {
        return None;
    }
    Some(((sum / inside.len() as f64) as f32).clamp(-SHIFT_MAX, SHIFT_MAX))
}

/// Interquartile range (nearest rank) of `v`, 0 when empty.
fn iqr(v: &mut [f32]) -> f32 {
    if v.is_empty() {
        return 0.0;
    }
    let k = |q: f32| ((v.len() - 1) as f32 * q).round() as usize;
    let (k1, k3) = (k(0.25), k(0.75));
    let q3 = *v.select_nth_unstable_by(k3, f32::total_cmp).1;
    let q1 = *v.select_nth_unstable_by(k1, f32::total_cmp).1;
    q3 - q1
}
