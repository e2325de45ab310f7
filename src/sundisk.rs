//! The sun disk's visibility in a frame: a measurement of the direct beam along the camera's own
//! line of sight to the sun.
//!
//! # Method
//! A sky camera exposed for the sky clips the sun's disk whenever the direct beam reaches it: the
//! disk's radiance is several orders of magnitude above the sky's, so even a small fraction of it
//! saturates every channel (`calibrate` finds the sun by exactly that clipping on a clear day). The
//! disk is therefore *hidden* when most pixels within `sun_disk_radius_deg` of the sun's computed
//! direction are not clipped: the cloud in front of the sun then passes next to none of the beam
//! (an optical depth of a few or more; common practice, no source). A visible disk says only that
//! some beam passes, not how much, so it is not used as a measurement of the transmittance.
//!
//! The engine uses the disk to tell what the segmentation's *thin* class is in this sky. Thin cloud
//! (low red/blue contrast) is either a veil that passes much of the beam or the optically thick,
//! greyish edge of a cloud deck that passes none; the colour cannot tell them apart, the disk can.
//! Whenever the known cells within [`SUN_RING_DEG`] of the sun are mostly cloud, and mostly thin,
//! the frame records whether the disk showed ([`SunThroughCloud`]). The thin-cloud beam
//! transmittance is then the configured one (which assumes a veil) times the share of those frames
//! in which the disk showed, over the last [`ThinCloudVisibility::WINDOW`] of them, with
//! [`ThinCloudVisibility::PRIOR_FRAMES`] pseudo-frames in which it did (so that a few frames cannot
//! take it to zero): the probability that the beam gets through, times what it keeps when it does.
//! Pyranometers measure GHI only, which leaves the split between beam through cloud and
//! cloud-scattered diffuse free (both explain GHI); the disk decides the beam side of it.

use crate::camera::Camera;
use crate::sun::SunPosition;

/// What the frame shows at the sun's disk.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SunDisk {
    /// Share of the disk's open-sky pixels with every channel clipped.
    pub clipped_share: f64,
    /// Open-sky pixels within the disk radius that were read.
    pub pixels: usize,
}

impl SunDisk {
    /// Whether the disk is hidden: fewer than half its pixels clipped.
    pub fn hidden(&self) -> bool {
        self.clipped_share < 0.5
    }
}

/// Fewest open-sky pixels within the disk radius for an observation.
pub const MIN_DISK_PIXELS: usize = 5;

/// Read the sun's disk: the pixels within `radius_deg` of the sun's direction that see open sky
/// (inside the lens field, not obstructed: `obstruction` > 127 is open, as for
/// [`Camera::sky_mask`]), and the share of them whose three channels are all at least
/// `saturation_level`. `None` when the sun is below the horizon, outside the image, or fewer than
/// [`MIN_DISK_PIXELS`] open pixels lie within the radius (a mast in front of the sun, or a frame
/// too coarse for the radius).
pub fn observe(image: &image::RgbImage, cam: &Camera, obstruction: Option<&image::GrayImage>, sun: &SunPosition, radius_deg: f64, saturation_level: u8) -> Option<SunDisk> {
    let rings = clipped_rings(image, cam, obstruction, sun, radius_deg, saturation_level)?;
    let (n, clipped) = rings.iter().fold((0, 0), |(n, c), r| (n + r.0, c + r.1));
    (n >= MIN_DISK_PIXELS).then(|| SunDisk { clipped_share: clipped as f64 / n as f64, pixels: n })
}

/// Width of the rings [`clipped_rings`] counts in \[°\].
pub const RING_STEP_DEG: f64 = 0.1;

/// Open-sky pixels within `radius_deg` of the sun's direction and how many of them have all
/// three channels at least `saturation_level` (as [`observe`] reads them), by rings of
/// [`RING_STEP_DEG`] out from the sun, innermost first; `None` when the sun is below the horizon
/// or outside the image, or the frame is not the camera's size.
fn clipped_rings(image: &image::RgbImage, cam: &Camera, obstruction: Option<&image::GrayImage>, sun: &SunPosition, radius_deg: f64, saturation_level: u8) -> Option<Vec<(usize, usize)>> {
    if sun.apparent_zenith_rad >= std::f64::consts::FRAC_PI_2 || image.width() != cam.width_px || image.height() != cam.height_px {
        return None;
    }
    let d_sun = crate::sun::direction_enu(sun.apparent_zenith_rad, sun.azimuth_rad);
    let (sx, sy) = cam.project_enu(d_sun)?;
    // Pixels per radian near the sun, taken generously so the search box holds the whole disk: the
    // tangential scale `f g(θ) / sin θ` of the fisheye lenses stays within 1.5 f below 90°, the
    // radial one is `f g'(θ)`.
    let theta = cam.projection.inverse_radial((sx - cam.cx_px).hypot(sy - cam.cy_px) / cam.f_px).unwrap_or(0.0);
    let scale = 1.5 * cam.f_px * cam.projection.radial_derivative(theta.min(cam.max_field_angle_rad)).max(1.0);
    let radius_rad = radius_deg.to_radians();
    let reach = (scale * radius_rad).ceil() as i64 + 1;
    let cos_max = radius_rad.cos();
    let mut rings = vec![(0usize, 0usize); (radius_deg / RING_STEP_DEG).ceil().max(1.0) as usize];
    let last = rings.len() - 1;
    let (cx, cy) = (sx.round() as i64, sy.round() as i64);
    for y in (cy - reach).max(0)..=(cy + reach).min(cam.height_px as i64 - 1) {
        for x in (cx - reach).max(0)..=(cx + reach).min(cam.width_px as i64 - 1) {
            let Some(d) = cam.unproject_enu(x as f64, y as f64) else { continue };
            let cos_g = d[0] * d_sun[0] + d[1] * d_sun[1] + d[2] * d_sun[2];
            if cos_g < cos_max {
                continue;
            }
            if obstruction.is_some_and(|m| m.get_pixel_checked(x as u32, y as u32).map(|p| p.0[0] <= 127).unwrap_or(true)) {
                continue;
            }
            let r = &mut rings[((cos_g.clamp(-1.0, 1.0).acos().to_degrees() / RING_STEP_DEG) as usize).min(last)];
            r.0 += 1;
            let p = image.get_pixel(x as u32, y as u32).0;
            r.1 += (p[0] >= saturation_level && p[1] >= saturation_level && p[2] >= saturation_level) as usize;
        }
    }
    Some(rings)
}

/// Angle from the sun \[°\] out to which [`observe_glare`] reads the clipped glare: wide enough to
/// hold the clipped glare of a clear sun on the project's cameras (1.5–3° across), so that its
/// growth with the beam is seen.
pub const GLARE_READ_DEG: f64 = 4.0;

/// The clipped glare's radius around the sun \[°\]: rings of [`RING_STEP_DEG`] out from the sun's
/// direction count as clipped while at least half of each ring's open-sky pixels are, out to
/// [`GLARE_READ_DEG`] (`None` as for [`observe`]: fewer than [`MIN_DISK_PIXELS`] open pixels).
/// Read by rings, a bright cloud edge clipped on one side of the sun does not widen the glare:
/// only what surrounds the sun does. A measure of the direct beam along the camera's line of
/// sight ([`SunLineBeam`]).
pub fn observe_glare(image: &image::RgbImage, cam: &Camera, obstruction: Option<&image::GrayImage>, sun: &SunPosition, saturation_level: u8) -> Option<f64> {
    let rings = clipped_rings(image, cam, obstruction, sun, GLARE_READ_DEG, saturation_level)?;
    if rings.iter().map(|r| r.0).sum::<usize>() < MIN_DISK_PIXELS {
        return None;
    }
    // A ring with no pixel (finer than the pixels near the sun) goes with the ring outside it.
    let mut radius = 0.0;
    for (i, (n, c)) in rings.into_iter().enumerate() {
        if n == 0 {
            continue;
        }
        if 2 * c < n {
            break;
        }
        radius = (i + 1) as f64 * RING_STEP_DEG;
    }
    Some(radius)
}

/// The direct beam's transmittance along the camera's line of sight to the sun, from the size of
/// the clipped glare around it.
///
/// # Method
/// The circumsolar radiance a few degrees from the sun is light scattered forward out of the
/// direct beam (by aerosol, and by a veil of thin cloud), so at a given angle it scales with the
/// beam that reaches the scatterers: `L(θ) = T · L₁(θ)` with `T` the beam transmittance of what
/// lies in front of the sun. Over the few degrees that clip, that profile falls roughly as `θ⁻²`
/// (the aureole's usual slope; from memory, no source). The pixels clip where `L(θ)` exceeds
/// the sensor's saturation, out to `θ_c ∝ T^½`, so the clipped solid angle `∝ θ_c² ∝ T`: the
/// beam's transmittance is the clipped area over the clear sun's. The clear sun's radius is the
/// median over the last [`SunLineBeam::WINDOW`] frames with clear sky around the sun (the sun's
/// height changes slowly within them); the estimate is capped at 1. Behind thick cloud nothing
/// clips and `T` is 0; under a veil the clipped region shrinks with the veil's optical depth
/// (Beer–Lambert: the beam `T = exp(−τ / cos z)`), so the measurement follows a veil's
/// transmittance continuously where the disk's own visibility ([`SunDisk::hidden`]) only says
/// whether any beam passes. Without frames of clear sky around the sun there is no estimate.
#[derive(Debug, Clone, Default)]
pub struct SunLineBeam {
    /// Clipped radii \[°\] of the recent frames with clear sky around the sun.
    clear_radius_deg: std::collections::VecDeque<f64>,
}

impl SunLineBeam {
    /// Frames with clear sky around the sun kept for the reference.
    pub const WINDOW: usize = 120;
    /// Frames with clear sky around the sun needed for a reference.
    pub const MIN_CLEAR_FRAMES: usize = 3;
    /// Most cloudy share of the known cells within [`SUN_RING_DEG`] of the sun for a frame to
    /// count as clear there.
    pub const CLEAR_RING_MAX_CLOUD: f64 = 0.1;

    /// Add a frame's clipped radius ([`observe_glare`]) with the cloudy share of the known cells
    /// around the sun ([`ring_cloud_share`]), and give this frame's beam transmittance (`None`
    /// before [`Self::MIN_CLEAR_FRAMES`] frames with clear sky at the sun are held).
    pub fn observe(&mut self, radius_deg: f64, ring_cloud: Option<f64>) -> Option<f64> {
        if ring_cloud.is_some_and(|c| c <= Self::CLEAR_RING_MAX_CLOUD) {
            self.clear_radius_deg.push_back(radius_deg);
            while self.clear_radius_deg.len() > Self::WINDOW {
                self.clear_radius_deg.pop_front();
            }
        }
        self.transmittance(radius_deg)
    }

    /// Beam transmittance of a frame whose glare clipped out to `radius_deg`: the clipped solid
    /// angle over the clear sun's, `(r / r_clear)²`, at most 1, with `r_clear` the median radius
    /// of the kept frames with clear sky around the sun (bright cloud around the sun widens the
    /// clipped region too, by raising what the glare adds to, so the reference is taken where
    /// there is none).
    pub fn transmittance(&self, radius_deg: f64) -> Option<f64> {
        if self.clear_radius_deg.len() < Self::MIN_CLEAR_FRAMES {
            return None;
        }
        let mut v: Vec<f64> = self.clear_radius_deg.iter().copied().collect();
        v.sort_by(f64::total_cmp);
        let reference = v[v.len() / 2];
        (reference > 0.0).then(|| (radius_deg / reference).powi(2).min(1.0))
    }
}

/// Cloudy share (thin or thick) of the map's known cells within [`SUN_RING_DEG`] of the sun;
/// `None` with fewer than [`MIN_RING_CELLS`] known cells there.
pub fn ring_cloud_share(map: &crate::cloudmap::CloudMap, lut: &crate::cloudmap::Lut, sun: &SunPosition) -> Option<f64> {
    let RingCounts { known, thin, thick } = ring_counts(map, lut, sun);
    let cloudy = thin + thick;
    (known >= MIN_RING_CELLS).then(|| cloudy as f64 / known as f64)
}

/// The map's known cells within [`SUN_RING_DEG`] of the sun, and the thin and thick ones among them.
struct RingCounts {
    known: usize,
    thin: usize,
    thick: usize,
}

fn ring_counts(map: &crate::cloudmap::CloudMap, lut: &crate::cloudmap::Lut, sun: &SunPosition) -> RingCounts {
    use crate::segment::Class;
    let d = sun.direction_enu().map(|v| v as f32);
    let cos_ring = SUN_RING_DEG.to_radians().cos();
    let mut n = RingCounts { known: 0, thin: 0, thick: 0 };
    let side = lut.grid.n;
    let cells = map.class.len().min(lut.dir.len());
    // Only the cells in the ring's bounding box are tested (the whole map was 1 % of a replay's
    // instructions); the same test, so the same counts.
    let ([i0, i1], [j0, j1]) = ring_box(lut, sun.direction_enu()).unwrap_or(([0, side.saturating_sub(1)], [0, side.saturating_sub(1)]));
    for j in j0..=j1 {
        for k in (j * side + i0..=j * side + i1).filter(|k| *k < cells) {
            let u = lut.dir[k];
            if u[0] * d[0] + u[1] * d[1] + u[2] * d[2] < cos_ring {
                continue;
            }
            match Class::from_u8(map.class[k]) {
                Class::Unknown => continue,
                Class::Clear => {}
                Class::Thin => n.thin += 1,
                Class::Thick => n.thick += 1,
            }
            n.known += 1;
        }
    }
    n
}

/// The cells (columns `[i0, i1]`, rows `[j0, j1]`, inclusive) that hold every cell whose direction
/// lies within [`SUN_RING_DEG`] of the sun's: the ring's edge, 90 directions around the sun,
/// carried to the plane (a cone about the camera meets a plane in a convex conic, so the edge's box
/// holds it), padded by 2 cells. Empty ranges when the ring misses the grid; `None` (test every
/// cell) when the ring reaches within 3° of the horizon or the grid is empty.
fn ring_box(lut: &crate::cloudmap::Lut, s: [f64; 3]) -> Option<([usize; 2], [usize; 2])> {
    let g = &lut.grid;
    let height_m = g.height_m - lut.camera_m[2];
    if g.n == 0 || height_m <= 0.0 {
        return None;
    }
    // Two unit vectors across the sun's direction.
    let a = if s[2].abs() < 0.9 { [0.0, 0.0, 1.0] } else { [1.0, 0.0, 0.0] };
    let cross = |p: [f64; 3], q: [f64; 3]| [p[1] * q[2] - p[2] * q[1], p[2] * q[0] - p[0] * q[2], p[0] * q[1] - p[1] * q[0]];
    let unit = |p: [f64; 3]| {
        let l = (p[0] * p[0] + p[1] * p[1] + p[2] * p[2]).sqrt();
        p.map(|v| v / l)
    };
    let e1 = unit(cross(s, a));
    let e2 = cross(s, e1);
    let (sin_r, cos_r) = f64::from(SUN_RING_DEG).to_radians().sin_cos();
    let min_up = 3f64.to_radians().sin();
    let (mut lo, mut hi) = ([f64::INFINITY; 2], [f64::NEG_INFINITY; 2]);
    for step in 0..90 {
        let (sp, cp) = (step as f64 * 4.0).to_radians().sin_cos();
        let b: [f64; 3] = std::array::from_fn(|q| cos_r * s[q] + sin_r * (cp * e1[q] + sp * e2[q]));
        if b[2] < min_up {
            return None;
        }
        let (ci, cj) = g.to_cell([lut.camera_m[0] + height_m * b[0] / b[2], lut.camera_m[1] + height_m * b[1] / b[2]]);
        lo = [lo[0].min(ci), lo[1].min(cj)];
        hi = [hi[0].max(ci), hi[1].max(cj)];
    }
    let last = (g.n - 1) as f64;
    let range = |l: f64, h: f64| -> [usize; 2] {
        let (l, h) = ((l - 2.0).floor().max(0.0), (h + 2.0).ceil().min(last));
        // An empty range (l > h) when the ring misses the grid.
        if l > h { [1, 0] } else { [l as usize, h as usize] }
    };
    Some((range(lo[0], hi[0]), range(lo[1], hi[1])))
}

/// Angle from the sun \[°\] within which the map's known cells say what cloud the sun is in.
pub const SUN_RING_DEG: f32 = 10.0;

/// Fewest known map cells within [`SUN_RING_DEG`] of the sun for a record.
pub const MIN_RING_CELLS: usize = 8;

/// A frame in which the sun sat in mostly thin cloud, and whether its disk showed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SunThroughCloud {
    /// Whether the disk was hidden.
    pub hidden: bool,
    /// Share of the known cells within [`SUN_RING_DEG`] of the sun that are cloud (thin or thick).
    pub cloud_share: f64,
    /// Share of those cloudy cells that are thin.
    pub thin_share: f64,
}

impl SunThroughCloud {
    /// The record of one frame: `None` unless at least [`MIN_RING_CELLS`] of the map's known cells
    /// lie within [`SUN_RING_DEG`] of the sun (the glare's unknown cells do not count), at least
    /// half of them cloudy and at least half of the cloudy ones thin.
    pub fn read(disk: SunDisk, map: &crate::cloudmap::CloudMap, lut: &crate::cloudmap::Lut, sun: &SunPosition) -> Option<SunThroughCloud> {
        let RingCounts { known, thin, thick } = ring_counts(map, lut, sun);
        let cloudy = thin + thick;
        (known >= MIN_RING_CELLS && 2 * cloudy >= known && 2 * thin >= cloudy).then(|| SunThroughCloud {
            hidden: disk.hidden(),
            cloud_share: cloudy as f64 / known as f64,
            thin_share: thin as f64 / cloudy as f64,
        })
    }
}

/// The recent frames in which the sun sat in mostly thin cloud ([`SunThroughCloud`]): how often its
/// disk showed.
#[derive(Debug, Clone, Default)]
pub struct ThinCloudVisibility {
    hidden: std::collections::VecDeque<bool>,
}

impl ThinCloudVisibility {
    /// Records kept (at one frame every 30 s, an hour of thin cloud at the sun).
    pub const WINDOW: usize = 120;
    /// Pseudo-records in which the disk showed (the configured transmittance's own weight).
    pub const PRIOR_FRAMES: f64 = 4.0;

    /// Add a frame's record.
    pub fn observe(&mut self, o: SunThroughCloud) {
        self.hidden.push_back(o.hidden);
        while self.hidden.len() > Self::WINDOW {
            self.hidden.pop_front();
        }
    }

    /// Records held.
    pub fn len(&self) -> usize {
        self.hidden.len()
    }

    /// No records held.
    pub fn is_empty(&self) -> bool {
        self.hidden.is_empty()
    }

    /// Factor on the configured thin-cloud beam transmittance: the share of records in which the
    /// disk showed, with [`Self::PRIOR_FRAMES`] pseudo-records in which it did (1 with none).
    pub fn beam_factor(&self) -> f64 {
        let shown = self.hidden.iter().filter(|h| !**h).count() as f64;
        (shown + Self::PRIOR_FRAMES) / (self.hidden.len() as f64 + Self::PRIOR_FRAMES)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sun_at(zenith_deg: f64, azimuth_deg: f64) -> SunPosition {
        SunPosition { zenith_rad: zenith_deg.to_radians(), apparent_zenith_rad: zenith_deg.to_radians(), azimuth_rad: azimuth_deg.to_radians(), earth_sun_distance_au: 1.0 }
    }

    /// The ring's counts from the bounding box equal the whole map's test, cell for cell, for
    /// suns from overhead to near the horizon, on the main camera's grid and on one offset from it
    /// (a second camera's), including a ring that misses the grid.
    #[test]
    fn ring_counts_in_the_box_are_the_whole_maps() {
        use crate::cloudmap::{Grid, Lut, MapParams};
        use crate::segment::Class;
        let cam = Camera::ideal(512);
        for (height_m, camera_m) in [(1500.0, [0.0, 0.0, 0.0]), (1200.0, [900.0, -400.0, 30.0]), (800.0, [-20_000.0, 0.0, 0.0])] {
            let grid = Grid::new(&MapParams { cells: 96, ..Default::default() }, height_m);
            let lut = Lut::build_from(&cam, None, grid, camera_m);
            let n = grid.n * grid.n;
            let class: Vec<u8> = (0..n as u64).map(|k| (crate::rng::hash64(k ^ 3) % 4) as u8).collect();
            let map = crate::cloudmap::CloudMap { grid, score: vec![0.0; n], class, in_view: vec![true; n], offset: 0.0, brightness: vec![], thin_depth: vec![0.5; n] };
            for zenith in [0.0, 5.0, 20.0, 45.0, 60.0, 75.0, 80.0, 86.0] {
                for azimuth in [0.0, 37.0, 135.0, 250.0] {
                    let sun = sun_at(zenith, azimuth);
                    let d = sun.direction_enu().map(|v| v as f32);
                    let cos_ring = SUN_RING_DEG.to_radians().cos();
                    let mut want = [0usize; 3];
                    for (k, c) in map.class.iter().enumerate() {
                        let u = lut.dir[k];
                        if u[0] * d[0] + u[1] * d[1] + u[2] * d[2] >= cos_ring && Class::from_u8(*c) != Class::Unknown {
                            want[0] += 1;
                            want[1] += (Class::from_u8(*c) == Class::Thin) as usize;
                            want[2] += (Class::from_u8(*c) == Class::Thick) as usize;
                        }
                    }
                    let got = ring_counts(&map, &lut, &sun);
                    assert_eq!([got.known, got.thin, got.thick], want, "zenith {zenith}, azimuth {azimuth}, camera {camera_m:?}");
                }
            }
        }
    }

    /// A frame with a clipped disc drawn at the sun's pixel (radius in degrees through the camera).
    fn frame_with_disc(cam: &Camera, sun: &SunPosition, disc_deg: f64, level: u8) -> image::RgbImage {
        let d_sun = crate::sun::direction_enu(sun.apparent_zenith_rad, sun.azimuth_rad);
        image::RgbImage::from_fn(cam.width_px, cam.height_px, |x, y| match cam.unproject_enu(x as f64, y as f64) {
            Some(d) if (d[0] * d_sun[0] + d[1] * d_sun[1] + d[2] * d_sun[2]).clamp(-1.0, 1.0).acos().to_degrees() <= disc_deg => image::Rgb([level; 3]),
            _ => image::Rgb([90, 120, 180]),
        })
    }

    #[test]
    fn a_clipped_disc_is_visible_and_a_grey_one_hidden() {
        let cam = Camera::ideal(512);
        let sun = sun_at(40.0, 135.0);
        let seen = observe(&frame_with_disc(&cam, &sun, 2.0, 255), &cam, None, &sun, 1.0, 250).unwrap();
        assert!(seen.clipped_share > 0.95 && !seen.hidden(), "{seen:?}");
        assert!(seen.pixels >= MIN_DISK_PIXELS);
        // The same disc under cloud: bright grey, not clipped.
        let behind = observe(&frame_with_disc(&cam, &sun, 2.0, 235), &cam, None, &sun, 1.0, 250).unwrap();
        assert!(behind.clipped_share < 0.05 && behind.hidden(), "{behind:?}");
    }

    #[test]
    fn a_disc_away_from_the_computed_sun_does_not_count() {
        let cam = Camera::ideal(512);
        let sun = sun_at(40.0, 135.0);
        // The clipped disc is drawn 5° away from where the sun is computed to be.
        let elsewhere = frame_with_disc(&cam, &sun_at(45.0, 135.0), 1.5, 255);
        assert!(observe(&elsewhere, &cam, None, &sun, 1.0, 250).unwrap().hidden());
    }

    #[test]
    fn an_obstructed_or_set_sun_gives_no_observation() {
        let cam = Camera::ideal(512);
        let sun = sun_at(40.0, 135.0);
        let img = frame_with_disc(&cam, &sun, 2.0, 255);
        let mast = image::GrayImage::from_pixel(512, 512, image::Luma([0]));
        assert_eq!(observe(&img, &cam, Some(&mast), &sun, 1.0, 250), None);
        assert_eq!(observe(&img, &cam, None, &sun_at(95.0, 135.0), 1.0, 250), None);
        // A frame of the wrong size is not read.
        assert_eq!(observe(&image::RgbImage::new(100, 100), &cam, None, &sun, 1.0, 250), None);
    }

    /// The clipped radius grows with the clipped disc, and the beam is the clipped area over the
    /// clear sun's (the median of the frames with clear sky around the sun).
    #[test]
    fn the_clipped_glare_measures_the_beam() {
        let cam = Camera::ideal(512);
        let sun = sun_at(40.0, 135.0);
        let r = |deg: f64| observe_glare(&frame_with_disc(&cam, &sun, deg, 255), &cam, None, &sun, 250).unwrap();
        let (small, large) = (r(1.0), r(2.5));
        assert!((small - 1.0).abs() <= 0.2 && (large - 2.5).abs() <= 0.2, "{small} {large}");
        assert_eq!(r(-1.0), 0.0, "nothing clipped: the sun hidden");
        let mut b = SunLineBeam::default();
        assert_eq!(b.observe(2.0, Some(0.5)), None, "no clear frame yet");
        for _ in 0..3 {
            b.observe(2.0, Some(0.0));
        }
        assert_eq!(b.transmittance(2.0), Some(1.0));
        assert!((b.transmittance(1.0).unwrap() - 0.25).abs() < 1e-12);
        assert_eq!(b.transmittance(3.0), Some(1.0), "capped at 1");
    }

    #[test]
    fn thin_cloud_that_never_shows_the_disk_passes_little_beam() {
        let rec = |hidden| SunThroughCloud { hidden, cloud_share: 0.9, thin_share: 0.8 };
        let mut v = ThinCloudVisibility::default();
        assert_eq!(v.beam_factor(), 1.0, "no records: the configured transmittance");
        for _ in 0..36 {
            v.observe(rec(true));
        }
        // 4 pseudo-records shown out of 40.
        assert!((v.beam_factor() - 0.1).abs() < 1e-12, "{}", v.beam_factor());
        // A veil: the disk shows every time.
        let mut veil = ThinCloudVisibility::default();
        for _ in 0..36 {
            veil.observe(rec(false));
        }
        assert_eq!(veil.beam_factor(), 1.0);
        // The window forgets: after WINDOW records of a veil the deck's records are gone.
        for _ in 0..ThinCloudVisibility::WINDOW {
            v.observe(rec(false));
        }
        assert_eq!(v.len(), ThinCloudVisibility::WINDOW);
        assert_eq!(v.beam_factor(), 1.0);
    }

    /// The record reads the map's cells around the sun: a frame painted with thin cloud within 12°
    /// of the sun gives a record whose disk is hidden; painted clear blue, none (the sun is not
    /// in cloud); with a clipped disc inside the grey, a record whose disk showed.
    #[test]
    fn the_record_reads_the_cloud_around_the_sun() {
        use crate::cloudmap::{Grid, Lut, MapParams, build_map};
        use crate::segment::{Reference, SegmentParams};
        let cam = Camera::ideal(512);
        let lut = Lut::build(&cam, None, Grid::new(&MapParams { cells: 256, ..Default::default() }, 1000.0));
        let sun = sun_at(35.0, 120.0);
        let d_sun = sun.direction_enu();
        let paint = |around: [u8; 3], disc: Option<f64>| {
            image::RgbImage::from_fn(512, 512, |x, y| {
                let Some(d) = cam.unproject_enu(x as f64, y as f64) else { return image::Rgb([0, 0, 0]) };
                let g = (d[0] * d_sun[0] + d[1] * d_sun[1] + d[2] * d_sun[2]).clamp(-1.0, 1.0).acos().to_degrees();
                if disc.is_some_and(|r| g <= r) {
                    image::Rgb([255; 3])
                } else if g <= 12.0 {
                    image::Rgb(around)
                } else {
                    image::Rgb([70, 110, 200])
                }
            })
        };
        let (sp, reference) = (SegmentParams::default(), Reference::default());
        // A colour the segmentation calls thin cloud 6° from this sun.
        let fr = reference.for_frame(&sp, std::iter::empty());
        let geom = crate::segment::PixelGeom { z_deg: 35.0, gamma_deg: 6.0 };
        let thin = (60u8..200).map(|r| [r, r, 200]).find(|c| fr.classify(*c, geom).1 == crate::segment::Class::Thin).expect("a thin colour");
        let record = |img: &image::RgbImage| {
            let map = build_map(img, &lut, Some(d_sun.map(|v| v as f32)), &sp, &reference);
            let disk = observe(img, &cam, None, &sun, 1.0, sp.saturation_level).unwrap();
            SunThroughCloud::read(disk, &map, &lut, &sun)
        };
        let clear = paint([70, 110, 200], None);
        assert_eq!(record(&clear), None, "clear sky at the sun: no record");
        let deck = paint(thin, None);
        let hidden = record(&deck).expect("cloud at the sun: a record");
        assert!(hidden.hidden && hidden.cloud_share > 0.9, "{hidden:?}");
        let veil = paint(thin, Some(2.0));
        let shown = record(&veil).expect("cloud at the sun: a record");
        assert!(!shown.hidden, "{shown:?}");
    }
}
