//! The cloud map: a square grid on the cloud plane at the cloud base height, centred above the
//! camera, holding each cell's cloudiness score and class.
//!
//! A ray from the camera in direction `d` meets the plane at height `h` above the camera at
//! `h · (d_e / d_u, d_n / d_u)` (ray–plane intersection). For each cell the reverse: the direction of
//! the cell's centre, projected by the camera model to its nearest pixel. This look-up table depends
//! only on the camera and `h`, so it is built once per base-height bucket and cached; each frame then
//! reads, converts and classifies only the pixels the map needs, in one pass.
//!
//! Grid: `n × n` cells, row-major, cell `(i, j)` centred at east `(i + ½ − n/2)·cell_m`, north
//! `(j + ½ − n/2)·cell_m` from the camera (rows grow northward). The grid spans
//! `2 h tan(max_zenith)`, so its angular coverage is the same at every height.

use std::collections::HashMap;
use std::path::Path;
use std::sync::Arc;

use serde::{Deserialize, Serialize};

use crate::camera::Camera;
use crate::settings::{ConfigError, check_range};
use crate::segment::{Class, PixelGeom, Reference, SegmentParams};

/// `[cloudmap]` settings (held in `[motion]` of `site.toml`, see [`crate::motion::MotionParams`]).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct MapParams {
    /// Cells along each side.
    pub cells: usize,
    /// The grid reaches out to this zenith angle \[°\].
    pub max_zenith_deg: f64,
    /// Base heights are bucketed to this step for the look-up table cache \[m\].
    pub height_bucket_m: f64,
    /// The scale the engine decodes JPEG frames at: 0 (the default) picks it from the frame and
    /// map sizes ([`crate::intake::map_reduction`]: at least four pixels per cell across the frame,
    /// so 1024² and smaller frames whole, 2048² at 1/2); 1 decodes whole frames; 2, 4 or 8 decode at
    /// 1/2, 1/4 or 1/8 in the DCT domain (faster; at 1024², 1/2 costs the two-layer scene skill,
    /// docs/speed.md). Not written when 0.
    #[serde(skip_serializing_if = "is_auto")]
    pub decode_reduction: u32,
}

fn is_auto(v: &u32) -> bool {
    *v == 0
}

impl Default for MapParams {
    fn default() -> Self {
        Self { cells: 256, max_zenith_deg: 84.0, height_bucket_m: 50.0, decode_reduction: 0 }
    }
}

impl MapParams {
    /// Check ranges.
    ///
    /// # Errors
    /// The first field out of range.
    pub fn validate(&self, file: &Path) -> Result<(), ConfigError> {
        check_range(file, "map.cells", self.cells as f64, 32.0, 2048.0)?;
        check_range(file, "map.max_zenith_deg", self.max_zenith_deg, 30.0, 85.0)?;
        check_range(file, "map.height_bucket_m", self.height_bucket_m, 1.0, 1000.0)?;
        if !matches!(self.decode_reduction, 0 | 1 | 2 | 4 | 8) {
            return Err(ConfigError::Invalid {
                file: file.into(),
                field: "map.decode_reduction".into(),
                expected: "0 (automatic), 1 (whole frames), 2, 4 or 8".into(),
                got: self.decode_reduction.to_string(),
            });
        }
        Ok(())
    }
}

/// Geometry of a cloud-map grid.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Grid {
    /// Cells along each side.
    pub n: usize,
    /// Cell size \[m\].
    pub cell_m: f64,
    /// Height of the plane above the camera \[m\].
    pub height_m: f64,
}

impl Grid {
    /// The grid for a plane height.
    pub fn new(params: &MapParams, height_m: f64) -> Grid {
        let extent = 2.0 * height_m * params.max_zenith_deg.to_radians().tan();
        Grid { n: params.cells, cell_m: extent / params.cells as f64, height_m }
    }

    /// Centre of cell (i, j), (east, north) from the camera \[m\].
    #[inline]
    pub fn cell_centre_m(&self, i: usize, j: usize) -> [f64; 2] {
        let h = self.n as f64 / 2.0;
        [(i as f64 + 0.5 - h) * self.cell_m, (j as f64 + 0.5 - h) * self.cell_m]
    }

    /// Continuous cell coordinates of a plane point (east, north) from the camera \[m\].
    #[inline]
    pub fn to_cell(&self, p: [f64; 2]) -> (f64, f64) {
        let h = self.n as f64 / 2.0;
        (p[0] / self.cell_m + h - 0.5, p[1] / self.cell_m + h - 0.5)
    }
}

/// Cell → pixel look-up table for one camera and one plane height.
#[derive(Debug, Clone)]
pub struct Lut {
    /// The grid.
    pub grid: Grid,
    /// Pixel index (row-major) per cell; `u32::MAX` where the cell is out of view or masked.
    pub pixel: Vec<u32>,
    /// Zenith of the cell's direction \[°\].
    pub z_deg: Vec<f32>,
    /// Unit ENU direction of the cell's centre.
    pub dir: Vec<[f32; 3]>,
    /// The camera's position (east, north, up) \[m\] in the grid's frame, from which `dir` is taken.
    pub camera_m: [f64; 3],
    /// Per cell with a pixel: the top-left pixel index of the 2 × 2 around the exact image point
    /// and the point's offset from it (x, y in 1/256 px), for bilinear reading. Near the horizon a
    /// pixel spans several cells; read to the nearest pixel, the map there would move in whole-pixel
    /// steps and pull cloud motion toward zero. Used where [`Lut::interpolate`] says so.
    pub bilinear: Vec<(u32, [u16; 2])>,
    /// Whether the cell is read bilinearly: where it shares its nearest pixel with a neighbouring
    /// cell (the map is denser than the image there). Elsewhere the nearest pixel is read, which
    /// keeps small cloud edges sharp (measured: bilinear everywhere cost the two-layer scene 0.07
    /// of 10-minute skill).
    pub interpolate: Vec<bool>,
    /// The cells with a pixel and their pixel index, in the order of their pixels in memory (ties
    /// by cell): a frame's pixels are read in this order ([`CellPixels::gather`]), a stream through
    /// the image instead of a jump per cell.
    pub memory_order: Vec<(u32, u32)>,
    /// The cells read bilinearly ([`Lut::interpolate`]), in the memory order of their 2 × 2.
    pub bilinear_order: Vec<u32>,
}

/// Cells within this angle of the lens field's rim \[°\] are unknown: the rim blends the sky with
/// the housing and carries the strongest vignetting.
pub const RIM_MARGIN_DEG: f64 = 2.0;

/// No pixel for this cell.
pub const NO_PIXEL: u32 = u32::MAX;

impl Lut {
    /// Build for a camera (with optional obstruction mask, white = sky) and plane height above it.
    pub fn build(cam: &Camera, obstruction: Option<&image::GrayImage>, grid: Grid) -> Lut {
        Lut::build_from(cam, obstruction, grid, [0.0; 3])
    }

    /// [`Lut::build`] for a camera standing at `camera_m` (east, north, up) \[m\] from the grid's
    /// origin: the grid is centred on the origin, its plane lies `grid.height_m` above the origin,
    /// and the camera sees a plane point `x` in the direction `x − camera_m` (used by
    /// [`crate::stereo`] to put two cameras' maps on one grid). `z_deg` and `dir` are as that camera
    /// sees the cells.
    pub fn build_from(cam: &Camera, obstruction: Option<&image::GrayImage>, grid: Grid, camera_m: [f64; 3]) -> Lut {
        let n = grid.n;
        // Whether a direction whose camera-frame z is `c` lies beyond the rim: its field angle
        // `acos(c)` above `rim_rad`. The arc cosine is decreasing, so a `c` clearly above or below
        // `cos(rim_rad)` (by 1e-9, where the arc cosine's slope is at least 1 and its error a few
        // 1e-16) decides without it; near the rim it is taken as before (the same cells).
        let rim_rad = cam.max_field_angle_rad - RIM_MARGIN_DEG.to_radians();
        let cos_rim = rim_rad.cos();
        let beyond_rim = |c: f64| {
            if c > cos_rim + 1e-9 {
                false
            } else if c < cos_rim - 1e-9 {
                true
            } else {
                c.acos() > rim_rad
            }
        };
        let mut pixel = vec![NO_PIXEL; n * n];
        let mut z_deg = vec![f32::NAN; n * n];
        let mut dir = vec![[0f32; 3]; n * n];
        let mut bilinear = vec![(0u32, [0u16; 2]); n * n];
        for j in 0..n {
            for i in 0..n {
                let c = grid.cell_centre_m(i, j);
                let v = [c[0] - camera_m[0], c[1] - camera_m[1], grid.height_m - camera_m[2]];
                let norm = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
                let d = [v[0] / norm, v[1] / norm, v[2] / norm];
                let k = j * n + i;
                dir[k] = [d[0] as f32, d[1] as f32, d[2] as f32];
                z_deg[k] = d[2].acos().to_degrees() as f32;
                // Cells whose pixel lies on the rim of the imaged field (vignetting, the lens edge's
                // blur) or beyond it are unknown by construction.
                let v = cam.cam_to_enu().inverse_transform_vector(&nalgebra::Vector3::new(d[0], d[1], d[2]));
                if beyond_rim(v[2].clamp(-1.0, 1.0)) {
                    continue;
                }
                if let Some((x, y)) = cam.project_enu(d) {
                    let (xi, yi) = (x.round() as i64, y.round() as i64);
                    if xi >= 0 && yi >= 0 && xi < cam.width_px as i64 && yi < cam.height_px as i64 {
                        let free = obstruction.map(|m| m.get_pixel(xi as u32, yi as u32).0[0] >= 128).unwrap_or(true);
                        if free {
                            pixel[k] = (yi as u32) * cam.width_px + xi as u32;
                            let (x0, y0) = (x.floor().clamp(0.0, cam.width_px as f64 - 2.0), y.floor().clamp(0.0, cam.height_px as f64 - 2.0));
                            let (fx, fy) = ((x - x0).clamp(0.0, 1.0), (y - y0).clamp(0.0, 1.0));
                            bilinear[k] = ((y0 as u32) * cam.width_px + x0 as u32, [(fx * 256.0).round() as u16, (fy * 256.0).round() as u16]);
                        }
                    }
                }
            }
        }
        let mut interpolate = vec![false; n * n];
        for j in 0..n {
            for i in 0..n {
                let k = j * n + i;
                if pixel[k] == NO_PIXEL {
                    continue;
                }
                let shares = |m: usize| pixel[m] == pixel[k];
                interpolate[k] = (i + 1 < n && shares(k + 1)) || (i > 0 && shares(k - 1)) || (j + 1 < n && shares(k + n)) || (j > 0 && shares(k - n));
            }
        }
        // Sorted by (pixel, cell) as one integer each (the pairs are unique: the same order as
        // sorting the pairs, in about half the time).
        let pack = |p: u32, k: usize| (p as u64) << 32 | k as u64;
        let mut keys: Vec<u64> = (0..n * n).filter(|&k| pixel[k] != NO_PIXEL).map(|k| pack(pixel[k], k)).collect();
        keys.sort_unstable();
        let memory_order: Vec<(u32, u32)> = keys.iter().map(|&x| (x as u32, (x >> 32) as u32)).collect();
        keys.clear();
        keys.extend((0..n * n).filter(|&k| interpolate[k]).map(|k| pack(bilinear[k].0, k)));
        keys.sort_unstable();
        let bilinear_order: Vec<u32> = keys.iter().map(|&x| x as u32).collect();
        Lut { grid, pixel, z_deg, dir, bilinear, interpolate, memory_order, bilinear_order, camera_m }
    }

    /// Cells with a pixel.
    pub fn valid_cells(&self) -> usize {
        self.pixel.iter().filter(|p| **p != NO_PIXEL).count()
    }
}

/// Look-up tables cached by base-height bucket.
#[derive(Debug, Default)]
pub struct LutCache {
    /// By (image width \[px\], height bucket): frames decoded at reduced scale have tables of their own.
    tables: HashMap<(u32, i64), Arc<Lut>>,
}

impl LutCache {
    /// The grid [`LutCache::get`] gives a table for at a plane height above the camera: the height
    /// rounded to the bucket.
    pub fn grid_for(params: &MapParams, height_m: f64) -> Grid {
        Grid::new(params, (height_m / params.height_bucket_m).round() * params.height_bucket_m)
    }

    /// The table for a plane height above the camera (built on first use).
    pub fn get(&mut self, cam: &Camera, obstruction: Option<&image::GrayImage>, params: &MapParams, height_m: f64) -> Arc<Lut> {
        let bucket = (height_m / params.height_bucket_m).round() as i64;
        let key = (cam.width_px, bucket);
        // Bounded: a varying cloud base height would otherwise keep a table per bucket it visits.
        // Tables of another image size go first, then the farthest in height.
        if !self.tables.contains_key(&key) && self.tables.len() >= MAX_LUT_TABLES
            && let Some(far) = self.tables.keys().copied().max_by_key(|&(w, b)| (w != key.0, (b - bucket).abs()))
        {
            self.tables.remove(&far);
        }
        self.tables
            .entry(key)
            .or_insert_with(|| Arc::new(Lut::build(cam, obstruction, Grid::new(params, bucket as f64 * params.height_bucket_m))))
            .clone()
    }

    /// Tables built so far.
    pub fn len(&self) -> usize {
        self.tables.len()
    }

    /// Whether no table was built yet.
    pub fn is_empty(&self) -> bool {
        self.tables.is_empty()
    }
}

/// Most cell→pixel tables a [`LutCache`] keeps (the one farthest in height goes first).
pub const MAX_LUT_TABLES: usize = 8;

/// One frame's cloud map. Its per-cell buffers come from and go back to per-thread pools (the
/// map's `Drop` and `Clone`): a map is built every frame at the same size, and fresh buffers from
/// the system allocator cost page faults and zeroing.
#[derive(Debug)]
pub struct CloudMap {
    /// The grid.
    pub grid: Grid,
    /// Cloudiness score per cell (NaN unknown); see [`crate::segment`].
    pub score: Vec<f32>,
    /// Class per cell ([`Class`] as u8).
    pub class: Vec<u8>,
    /// Whether the camera sees the cell (unknown cells in view are e.g. the sun's glare).
    pub in_view: Vec<bool>,
    /// The frame's reference offset.
    pub offset: f32,
    /// Each cloudy cell's brightness feature (see [`CloudMap::brightness_feature`]); 0 elsewhere,
    /// and may be empty in hand-made maps.
    pub brightness: Vec<f32>,
    /// Each thin cell's place in the thin class's score band (see [`CloudMap::thin_depth`]); may
    /// be empty in hand-made maps.
    pub thin_depth: Vec<f32>,
}

impl Drop for CloudMap {
    fn drop(&mut self) {
        pool::give_f32(std::mem::take(&mut self.score));
        pool::give_f32(std::mem::take(&mut self.brightness));
        pool::give_f32(std::mem::take(&mut self.thin_depth));
        pool::give_u8(std::mem::take(&mut self.class));
        pool::give_bool(std::mem::take(&mut self.in_view));
    }
}

impl Clone for CloudMap {
    /// The same map, its buffers taken from the pools (the same entries).
    fn clone(&self) -> CloudMap {
        fn copy<T: Copy>(mut v: Vec<T>, from: &[T]) -> Vec<T> {
            v.clear();
            v.extend_from_slice(from);
            v
        }
        CloudMap {
            grid: self.grid,
            score: copy(pool::take_f32_sized(0, 0.0), &self.score),
            class: copy(pool::take_u8_sized(0, 0), &self.class),
            in_view: copy(pool::take_bool_sized(0, false), &self.in_view),
            offset: self.offset,
            brightness: copy(pool::take_f32_sized(0, 0.0), &self.brightness),
            thin_depth: copy(pool::take_f32_sized(0, 0.0), &self.thin_depth),
        }
    }
}

impl CloudMap {
    /// The same map on another grid (its buffers copied from the pools).
    pub fn on_grid(&self, grid: Grid) -> CloudMap {
        let mut m = self.clone();
        m.grid = grid;
        m
    }

    /// A cloudy cell's brightness relative to the frame's cloudy cells: `(blue − mean) / 255`, the
    /// mean over all cloudy cells of the frame (0 for other cells, and where the map carries
    /// none). A thick cloud's base grows darker as its optical depth grows (Mejia et al. 2016, from
    /// memory), so among cloudy cells the darker pass less light. Taken relative to the frame's own
    /// mean, a change of exposure shifts no class's mean transmittance. Cloud also brightens
    /// toward the horizon; the coefficient is learnt from look-ups in the part of the sky the
    /// plant's sun rays cross, so that trend is learnt with it (comparing within 5° zenith rings
    /// instead was tried: independent breaking overcast pooled skill 0.27 → 0.20).
    #[inline]
    pub fn brightness_feature(&self, k: usize) -> f32 {
        self.brightness.get(k).copied().unwrap_or(0.0)
    }

    /// A thin cell's place in the thin class's band of cloudiness score, from 0 where thin cloud
    /// begins (`thin_score`) to 1 where thick begins (`thick_at(z)`); 0.5, the band's middle,
    /// where the map carries none. Thin cloud lets the sky's blue through, so its red/blue ratio
    /// (the score) moves from the clear sky's toward white cloud's as its optical depth grows
    /// (Long et al. 2006, in [`crate::segment`]): within the class, a higher score is more cloud.
    #[inline]
    pub fn thin_depth(&self, k: usize) -> f32 {
        self.thin_depth.get(k).copied().unwrap_or(0.5)
    }

    /// Class shares `[clear, thin, thick]` of a cell of class `c` when thin cells are made
    /// continuous ([`crate::forecast::IrradianceParams::thin_beam_from_score`]), for the class
    /// beam transmittances in use `[clear, thin, thick]`. A thin cell at depth `u`
    /// ([`CloudMap::thin_depth`]) is taken to hold an optical depth `2u` times the band middle's,
    /// so by Beer–Lambert its beam is `thin^(2u)` (clear sky's 1 where thin cloud begins, the
    /// thin class's at the middle, its square where thick cloud begins), never below the thick
    /// class's; written as the mix of the two classes either side that gives that beam at the
    /// values in use, so the tables stay linear in the class values (the tuning and the ensemble
    /// vary them about these shares). The score is taken as linear in optical depth across the
    /// band (a first-order assumption, own choice). Other classes are their own class.
    #[inline]
    pub fn continuous_shares(c: Class, u: f32, beams: [f64; 3]) -> [f32; 3] {
        match c {
            Class::Clear => [1.0, 0.0, 0.0],
            Class::Thick => [0.0, 0.0, 1.0],
            Class::Thin => {
                let [clear, thin, thick] = beams;
                let u = if u.is_finite() { u.clamp(0.0, 1.0) as f64 } else { 0.5 };
                if !(thin > 0.0 && thin < clear && thick < thin) {
                    return [0.0, 1.0, 0.0];
                }
                let t = thin.powf(2.0 * u).min(clear);
                if u < 0.5 {
                    let a = ((t - thin) / (clear - thin)).clamp(0.0, 1.0) as f32;
                    [a, 1.0 - a, 0.0]
                } else {
                    let b = ((thin - t) / (thin - thick)).clamp(0.0, 1.0) as f32;
                    [0.0, 1.0 - b, b]
                }
            }
            Class::Unknown => [0.0, 0.0, 0.0],
        }
    }

    /// Class at continuous cell coordinates (nearest cell); `None` outside or unknown.
    #[inline]
    pub fn class_at(&self, cx: f64, cy: f64) -> Option<Class> {
        let (i, j) = (cx.round(), cy.round());
        if i < 0.0 || j < 0.0 || i >= self.grid.n as f64 || j >= self.grid.n as f64 {
            return None;
        }
        match Class::from_u8(self.class[j as usize * self.grid.n + i as usize]) {
            Class::Unknown => None,
            c => Some(c),
        }
    }

    /// Share of known cells that are cloudy (thin or thick) within a zenith angle \[°\] of the
    /// camera.
    pub fn cloud_fraction(&self, lut: &Lut, max_zenith_deg: f32) -> f64 {
        self.cover(lut, max_zenith_deg)[0]
    }

    /// Cloudy (thin or thick) and thin shares of the known cells within a zenith angle (NaN
    /// when none is known).
    pub fn cover(&self, lut: &Lut, max_zenith_deg: f32) -> [f64; 2] {
        let (mut cloudy, mut thin, mut n) = (0usize, 0usize, 0usize);
        for k in 0..self.class.len() {
            if lut.z_deg[k] <= max_zenith_deg && self.class[k] != Class::Unknown as u8 {
                n += 1;
                cloudy += (self.class[k] != Class::Clear as u8) as usize;
                thin += (self.class[k] == Class::Thin as u8) as usize;
            }
        }
        if n == 0 { [f64::NAN; 2] } else { [cloudy as f64 / n as f64, thin as f64 / n as f64] }
    }
}

/// Per-cell segmentation inputs that change only with the sun (the segmentation's
/// [`SkyGeometry`](crate::segment::SkyGeometry) for a map's cells). They change slowly and are
/// reused for a few frames.
pub type CellSky = crate::segment::SkyGeometry;

impl CellSky {
    /// For a table, a sun direction and the segmentation settings. Cells the camera does not see
    /// are never classified: they keep placeholders.
    pub fn new(lut: &Lut, sun_dir: Option<[f32; 3]>, params: &SegmentParams) -> CellSky {
        crate::segment::SkyGeometry::from_directions(&lut.z_deg, &lut.dir, |k| lut.pixel[k] != NO_PIXEL, sun_dir, params)
    }
}

/// A frame's pixels as a map's cells read them, gathered once per frame in the image's memory order
/// ([`Lut::memory_order`]): the exposure check, the frame's reference and the classification then
/// read these per-cell buffers (a quarter of a megabyte at 256² cells) instead of jumping through
/// the image (3 MB at 1024²) three times.
#[derive(Debug)]
pub struct CellPixels {
    /// Per cell: its nearest pixel (`[0; 3]` where it has none).
    pub nearest: Vec<[u8; 3]>,
    /// Per cell: the reading of plain sky, bilinear where [`Lut::interpolate`] says so, else the
    /// nearest pixel.
    pub plain: Vec<[u8; 3]>,
}

mod pool {
    crate::pool::typed_pool!(take_rgb, give_rgb, [u8; 3], RGB);
    crate::pool::typed_pool!(give_u8, u8, U8, sized = take_u8_sized);
    crate::pool::typed_pool!(give_bool, bool, BOOL, sized = take_bool_sized);
    crate::pool::typed_pool!(give_f32, f32, F32, sized = take_f32_sized);
}

impl Drop for CellPixels {
    fn drop(&mut self) {
        pool::give_rgb(std::mem::take(&mut self.nearest));
        pool::give_rgb(std::mem::take(&mut self.plain));
    }
}

impl CellPixels {
    /// Read each cell's pixels of an image (the one the table was built for), in memory order.
    pub fn gather(img: &image::RgbImage, lut: &Lut) -> CellPixels {
        let raw = img.as_raw();
        let n = lut.pixel.len();
        let w = img.width() as usize;
        // Bilinear reading of the 2 × 2 around the cell's exact image point (weights in 1/256).
        let px = |k: usize| {
            let (p, [fx, fy]) = lut.bilinear[k];
            let i = p as usize * 3;
            let j = i + 3 * w;
            let (fx, fy) = (fx as u32, fy as u32);
            // The two pixels of each row as one slice (two bounds checks, not twelve).
            let (t, b) = (&raw[i..i + 6], &raw[j..j + 6]);
            let mut out = [0u8; 3];
            for (c, o) in out.iter_mut().enumerate() {
                let top = t[c] as u32 * (256 - fx) + t[3 + c] as u32 * fx;
                let bottom = b[c] as u32 * (256 - fx) + b[3 + c] as u32 * fx;
                *o = ((top * (256 - fy) + bottom * fy + 32768) >> 16) as u8;
            }
            out
        };
        let (mut nearest, mut plain) = (pool::take_rgb(), pool::take_rgb());
        nearest.resize(n, [0; 3]);
        plain.resize(n, [0; 3]);
        // Two passes without a branch per cell (a mispredicted branch would stall the reads
        // waiting on memory): every cell's nearest pixel, then the bilinear readings.
        let order = &lut.memory_order;
        for (m, &(k, p)) in order.iter().enumerate() {
            // The reads wait on memory (the image is 3 MB at 1024², the cells' pixels are spread
            // over it): ask for the pixel of the cell `PREFETCH_AHEAD` further on meanwhile.
            #[cfg(target_arch = "x86_64")]
            if let Some(&(_, q)) = order.get(m + PREFETCH_AHEAD) {
                prefetch(raw, q as usize * 3);
            }
            let i = p as usize * 3;
            let rgb: [u8; 3] = raw[i..i + 3].try_into().expect("three bytes");
            nearest[k as usize] = rgb;
            plain[k as usize] = rgb;
        }
        for &k in &lut.bilinear_order {
            plain[k as usize] = px(k as usize);
        }
        CellPixels { nearest, plain }
    }
}

/// How many cells ahead [`CellPixels::gather`] asks for a pixel (about a kilobyte of the image
/// ahead at 1024²).
#[cfg(target_arch = "x86_64")]
const PREFETCH_AHEAD: usize = 24;

/// Ask the CPU to bring the cache line of `buf[i]` in (a hint: no effect on any value; nothing when
/// `i` is out of range).
#[cfg(target_arch = "x86_64")]
#[inline(always)]
fn prefetch(buf: &[u8], i: usize) {
    use std::arch::x86_64::{_MM_HINT_T0, _mm_prefetch};
    if let Some(b) = buf.get(i) {
        // SAFETY: a prefetch reads nothing and writes nothing (and SSE is part of x86-64); the
        // address is of a live byte.
        unsafe { _mm_prefetch::<_MM_HINT_T0>((b as *const u8).cast()) };
    }
}

/// Build a frame's cloud map: read each cell's pixel, estimate the frame's reference offset from
/// them, and classify.
pub fn build_map(img: &image::RgbImage, lut: &Lut, sun_dir: Option<[f32; 3]>, params: &SegmentParams, reference: &Reference) -> CloudMap {
    build_map_with(img, lut, &CellSky::new(lut, sun_dir, params), params, reference)
}

/// [`build_map`] with the cells' sun angles and default references given.
pub fn build_map_with(img: &image::RgbImage, lut: &Lut, sky: &CellSky, params: &SegmentParams, reference: &Reference) -> CloudMap {
    build_map_from(&CellPixels::gather(img, lut), lut, sky, params, reference)
}

/// [`build_map_with`] from the frame's pixels already gathered.
pub fn build_map_from(pixels: &CellPixels, lut: &Lut, sky: &CellSky, params: &SegmentParams, reference: &Reference) -> CloudMap {
    build_map_exposed(pixels, lut, sky, params, reference).0
}

/// What a frame's map read of the camera's settings against the clear-sky library
/// ([`build_map_exposed`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FrameSettings {
    /// The frame's exposure against the library's brightness (`brightness::ExposureMeter`; `None`
    /// when it was not measured).
    pub exposure: Option<f32>,
    /// The running clear-sky shift of ln(R/B) after this frame ([`crate::segment::FrameReference::ratio_shift_ln`]).
    pub ratio_shift_ln: f32,
    /// This frame's own shift, when its clear sky gave one.
    pub ratio_shift_measured: Option<f32>,
}

/// [`build_map_from`] with what the frame read of the camera's settings ([`FrameSettings`]): its
/// exposure against the clear-sky library's brightness, which the far-field learner (`farfield`)
/// reads its brightness feature against, and the colour balance's shift, which the engine keeps
/// for the next frame ([`Reference::keep_ratio_shift`]).
pub fn build_map_exposed(pixels: &CellPixels, lut: &Lut, sky: &CellSky, params: &SegmentParams, reference: &Reference) -> (CloudMap, FrameSettings) {
    let n = lut.pixel.len();
    let geom = |k: usize| PixelGeom { z_deg: lut.z_deg[k], gamma_deg: sky.gamma_deg[k] };
    // Nearest-pixel reading where clipping is judged (the sample's glare rings, and cells near the
    // sun): interpolation would blur the clipped disc's edge into near-white unclipped values.
    let (nearest, plain) = (&pixels.nearest[..n], &pixels.plain[..n]);
    let sample = (0..n).step_by(3).filter(|&k| lut.pixel[k] != NO_PIXEL).map(|k| (nearest[k], geom(k), sky.default_rb[k]));
    let fr = reference.for_frame_with(params, sample);
    // The map's buffers from the pools: every entry is written below (the cells out of view get
    // what fresh buffers held: NaN, 0, false, 0).
    let mut score = pool::take_f32_sized(n, f32::NAN);
    let mut class = pool::take_u8_sized(n, 0);
    let mut in_view = pool::take_bool_sized(n, false);
    let mut blue = pool::take_u8_sized(n, 0);
    let mut dark = vec![false; if fr.exposure.is_some() { n } else { 0 }];
    // Every per-cell buffer as a slice of length n: no bounds check per cell and buffer.
    let (pixel, z_deg, cells) = (&lut.pixel[..n], &lut.z_deg[..n], sky.slices(n));
    let (score_s, class_s, in_view_s, blue_s) = (&mut score[..n], &mut class[..n], &mut in_view[..n], &mut blue[..n]);
    for k in 0..n {
        if pixel[k] == NO_PIXEL {
            (score_s[k], class_s[k], in_view_s[k], blue_s[k]) = (f32::NAN, 0, false, 0);
            continue;
        }
        in_view_s[k] = true;
        let g = cells.get(k);
        let (rgb, s, c) = fr.classify_at(g, z_deg[k], || plain[k], || nearest[k]);
        score_s[k] = s;
        class_s[k] = c;
        blue_s[k] = rgb[2];
        if let Some(d) = dark.get_mut(k) {
            *d = fr.darker_than_clear_at(g, rgb);
        }
    }
    if params.distant_contrast {
        // Each cell's judgement once (the correction asks for most cells).
        let learned = fr.plain_and_learned_all(sky, n);
        crate::segment::distance::correct(&score, &lut.z_deg, &learned, &mut class, |z| params.thick_at(z));
    }
    crate::segment::distance::far_thickness(&mut class, &score, &lut.z_deg, params);
    crate::segment::brightness::promote_dark(&mut class, &lut.z_deg, &dark);
    let cloudy = |c: u8| c == Class::Thin as u8 || c == Class::Thick as u8;
    // Over zipped slices (no bounds checks, so the second pass vectorizes).
    // In blocks of 2¹⁶ cells counted in u32 (255 · 2¹⁶ fits), so that the sums vectorise.
    let (mut cloudy_blue, mut cloudy_cells) = (0u64, 0u64);
    for (cs, bs) in class.chunks(1 << 16).zip(blue[..n].chunks(1 << 16)) {
        let (mut sb, mut sc) = (0u32, 0u32);
        for (c, b) in cs.iter().zip(bs) {
            let is = cloudy(*c) as u32;
            sb += is * *b as u32;
            sc += is;
        }
        cloudy_blue += sb as u64;
        cloudy_cells += sc as u64;
    }
    let mean = if cloudy_cells > 0 { cloudy_blue as f32 / cloudy_cells as f32 } else { 0.0 };
    // Each value computed for every cell and then chosen (the same values; without a branch per
    // cell the divisions vectorise).
    // Every entry written below.
    let mut brightness = pool::take_f32_sized(n, 0.0);
    for ((o, c), b) in brightness.iter_mut().zip(&class[..n]).zip(&blue[..n]) {
        let v = (*b as f32 - mean) / 255.0;
        *o = if cloudy(*c) { v } else { 0.0 };
    }
    pool::give_u8(blue);
    let thin = Class::Thin as u8;
    let lo = params.thin_score as f32;
    // Every entry written below.
    let mut thin_depth = pool::take_f32_sized(n, 0.0);
    for (((o, c), s), z) in thin_depth.iter_mut().zip(&class[..n]).zip(&score[..n]).zip(&lut.z_deg[..n]) {
        let hi = params.thick_at(*z);
        let v = (s - lo) / (hi - lo);
        // A cell made thin by the distance or darkness rules keeps the class's middle.
        *o = if (*c == thin) & (*s >= lo) & (*s < hi) { v } else { 0.5 };
    }
    let settings = FrameSettings { exposure: fr.exposure, ratio_shift_ln: fr.ratio_shift_ln, ratio_shift_measured: fr.ratio_shift_measured };
    (CloudMap { grid: lut.grid, score, class, in_view, offset: fr.offset, brightness, thin_depth }, settings)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The grid reaches the same zenith angle at every plane height (its extent is
    /// `2 h tan(max_zenith)`), so cell `(i, j)` looks the same way at any height: a plane `r` times
    /// higher maps the same sky with cells `r` times larger, scaled about the camera's nadir. The
    /// tables at two heights are then the same cell by cell, which is what lets the engine move
    /// its plane by relabelling the kept maps (`nowcast::plane`). Common practice, no source
    /// (a flat plane's central projection).
    #[test]
    fn a_plane_at_another_height_sees_the_same_directions() {
        let cam = Camera::ideal(256);
        let p = MapParams { cells: 128, ..Default::default() };
        let (lo, hi) = (Lut::build(&cam, None, LutCache::grid_for(&p, 1000.0)), Lut::build(&cam, None, LutCache::grid_for(&p, 1610.0)));
        assert_eq!(hi.grid.height_m, 1600.0);
        assert!((hi.grid.cell_m / lo.grid.cell_m - 1.6).abs() < 1e-12);
        assert_eq!(lo.pixel, hi.pixel);
        assert_eq!(lo.interpolate, hi.interpolate);
        for k in 0..lo.pixel.len() {
            assert!((lo.z_deg[k] - hi.z_deg[k]).abs() < 1e-4 || lo.z_deg[k].is_nan(), "cell {k}");
            assert_eq!(lo.bilinear[k].0, hi.bilinear[k].0, "cell {k}");
            assert!(lo.bilinear[k].1.iter().zip(hi.bilinear[k].1).all(|(a, b)| a.abs_diff(b) <= 1), "cell {k}");
        }
    }

    /// One segmentation path: the map's class of a cell read from one pixel is the image
    /// segmentation's class of that pixel (patches of clear, thin and thick sky, with a clipped sun
    /// disc). Only the frame's reference comes from different samples (cells against pixels).
    #[test]
    fn map_cells_and_image_pixels_are_classified_alike() {
        let cam = Camera::ideal(256);
        let g = Grid::new(&MapParams { cells: 96, ..Default::default() }, 1000.0);
        let lut = Lut::build(&cam, None, g);
        let colours = [[70u8, 110, 200], [160, 175, 210], [230, 232, 240]];
        let sun = {
            let (z, a) = (35f32.to_radians(), 120f32.to_radians());
            [z.sin() * a.sin(), z.sin() * a.cos(), z.cos()]
        };
        let img = image::RgbImage::from_fn(256, 256, |x, y| {
            let near_sun = cam.unproject_enu(x as f64, y as f64).is_some_and(|d| crate::segment::gamma_deg([d[0] as f32, d[1] as f32, d[2] as f32], Some(sun)) < 4.0);
            image::Rgb(if near_sun { [255, 255, 255] } else { colours[((x / 12 + 2 * (y / 12)) % 3) as usize] })
        });
        let sun = Some(sun);
        let params = SegmentParams::default();
        let reference = Reference::default();
        let map = build_map(&img, &lut, sun, &params, &reference);
        let seg = crate::segment::segment_image(&img, &crate::segment::ImageGeometry::from_camera(&cam, None), sun, &params, &reference);
        let sky = CellSky::new(&lut, sun, &params);
        let (mut same, mut n, mut near_sun_differ) = (0usize, 0usize, 0usize);
        for k in (0..lut.pixel.len()).filter(|&k| lut.pixel[k] != NO_PIXEL && !lut.interpolate[k]) {
            let alike = map.class[k] == seg.classes.as_raw()[lut.pixel[k] as usize];
            if !alike && sky.gamma_deg[k] < params.glare_zone_deg as f32 {
                // The glare rings are judged from each path's own sample: the edge may differ.
                near_sun_differ += 1;
                continue;
            }
            n += 1;
            same += usize::from(alike);
        }
        assert!(near_sun_differ <= 3, "{near_sun_differ} cells near the sun differ");
        let classes: std::collections::BTreeSet<u8> = map.class.iter().copied().collect();
        assert!(n > 1000 && classes.len() >= 3, "{n} cells, classes {classes:?}");
        assert_eq!(same, n, "{} of {n} cells differ from their pixel", n - same);
    }

    #[test]
    fn cell_coordinates_round_trip() {
        let g = Grid::new(&MapParams::default(), 1500.0);
        let c = g.cell_centre_m(10, 200);
        let (x, y) = g.to_cell(c);
        assert!((x - 10.0).abs() < 1e-9 && (y - 200.0).abs() < 1e-9);
        // Extent 2 h tan 84° (ray–plane geometry).
        assert!((g.cell_m * g.n as f64 - 2.0 * 1500.0 * 84f64.to_radians().tan()).abs() < 1e-6);
    }

    #[test]
    fn lut_points_cells_at_the_pixels_that_see_them() {
        let cam = Camera::ideal(256);
        let g = Grid::new(&MapParams { cells: 64, ..Default::default() }, 1000.0);
        let lut = Lut::build(&cam, None, g);
        assert!(lut.valid_cells() > 64 * 64 / 2);
        // The cell straight above the camera maps to the image centre.
        let k = 32 * 64 + 32;
        let p = lut.pixel[k];
        let (x, y) = ((p % 256) as f64, (p / 256) as f64);
        let (ex, ey) = cam.project_enu([g.cell_centre_m(32, 32)[0], g.cell_centre_m(32, 32)[1], 1000.0]).unwrap();
        assert!((x - ex).abs() <= 0.5 && (y - ey).abs() <= 0.5);
    }

    /// A camera standing away from the grid's origin sees the cell above it where a camera at the
    /// origin sees the cell above the origin.
    #[test]
    fn lut_from_an_offset_camera() {
        let cam = Camera::ideal(256);
        let g = Grid::new(&MapParams { cells: 64, ..Default::default() }, 1000.0);
        // The camera stands where cell (40, 25) lies as (32, 32) lies from the origin.
        let (a, b) = (g.cell_centre_m(40, 25), g.cell_centre_m(32, 32));
        let shifted = Lut::build_from(&cam, None, g, [a[0] - b[0], a[1] - b[1], 0.0]);
        let centred = Lut::build(&cam, None, g);
        assert_eq!(shifted.pixel[25 * 64 + 40], centred.pixel[32 * 64 + 32]);
        assert!((shifted.z_deg[25 * 64 + 40] - centred.z_deg[32 * 64 + 32]).abs() < 1e-3 && shifted.z_deg[32 * 64 + 32] > 60.0);
        // Standing 200 m up, the plane is 800 m above the camera.
        let raised = Lut::build_from(&cam, None, g, [0.0, 0.0, 200.0]);
        let d = raised.dir[32 * 64 + 40];
        let c = g.cell_centre_m(40, 32);
        assert!((d[0] as f64 / d[2] as f64 - c[0] / 800.0).abs() < 1e-5);
    }

    #[test]
    fn cache_reuses_tables_per_bucket() {
        let cam = Camera::ideal(64);
        let p = MapParams { cells: 32, ..Default::default() };
        let mut c = LutCache::default();
        let a = c.get(&cam, None, &p, 1010.0);
        let b = c.get(&cam, None, &p, 1020.0);
        assert!(Arc::ptr_eq(&a, &b));
        c.get(&cam, None, &p, 1500.0);
        assert_eq!(c.len(), 2);
    }
}
