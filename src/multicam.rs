//! The multi-camera cloud map: with a second camera (`[second_camera]`), each cell of the first
//! camera's map is taken from the camera that sees it best, so one camera's sun glare, mast or
//! skyline is covered by the other's view.
//!
//! # Method
//!
//! The map lies on a plane `h` above camera A (the engine's map plane). A cloud at the estimated
//! base `H = f · h` (`f`, the combined base height over the map plane, as the forecast uses it) that
//! camera A's map puts at cell `c` (from A) is at `p_A + c · f` in the world; camera B sees it in
//! the direction `p_A + c · f − p_B`. So B's table is [`Lut::build_from`] on A's grid scaled by `f`
//! (cell size and height) with B at `p_B − p_A`, and B's map on it is cell for cell A's map as B sees
//! it (at the wrong `f` the two disagree by the stereo parallax; that is why the base height is
//! taken from the combined estimate).
//!
//! A camera's cost for a cell is the cell's zenith angle from it, plus [`GLARE_PENALTY_DEG`] when
//! the cell lies within the glare zone around the sun (`SegmentParams::glare_zone_deg`); a camera
//! does not qualify where the cell is out of its view, masked (obstruction, rim) or classed unknown.
//! A cell comes from B where B qualifies and A does not, or where B's cost is lower than A's by more
//! than [`MultiParams::prefer_first_deg`] (A is the engine's camera: its map keeps its own cells
//! unless B sees them clearly better, which keeps seams few). Own choices, no source.

use crate::camera::Camera;
use crate::cloudmap::{CloudMap, Grid, Lut, build_map};
use crate::segment::{Class, Reference, SegmentParams};

/// Extra cost of a cell within the glare zone \[° of zenith\].
pub const GLARE_PENALTY_DEG: f32 = 60.0;

/// Settings of the merge (own choices, no source).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MultiParams {
    /// B's cost must be lower than A's by more than this to take a cell A sees \[°\].
    pub prefer_first_deg: f32,
    /// The scale factor's table is rebuilt when `f` moves by more than this share.
    pub rebuild_rel: f64,
}

impl Default for MultiParams {
    fn default() -> Self {
        Self { prefer_first_deg: 10.0, rebuild_rel: 0.02 }
    }
}

/// The second camera's side of the merge: its table on the first camera's grid, kept while the
/// grid and the base-height factor stay.
#[derive(Debug, Default)]
pub struct SecondView {
    /// The grid and factor the table was built for, and the table.
    table: Option<(Grid, f64, Lut)>,
}

/// What a merge took.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct MergeCount {
    /// Cells taken from the second camera.
    pub from_second: usize,
    /// Of those, cells the first camera did not qualify for (out of view, masked, unknown).
    pub filled: usize,
}

/// One camera with its frame, for [`SecondView::merge`].
#[derive(Debug, Clone, Copy)]
pub struct View<'a> {
    /// The calibrated camera.
    pub camera: &'a Camera,
    /// Obstruction mask (white = sky).
    pub obstruction: Option<&'a image::GrayImage>,
    /// Position (east, north, up) \[m\] relative to the first camera.
    pub offset_m: [f64; 3],
    /// Its clear-sky reference.
    pub reference: &'a Reference,
    /// Its frame.
    pub image: &'a image::RgbImage,
}

fn is_known(class: u8) -> bool {
    class != Class::Unknown as u8
}

/// A camera's cost of a cell (see the module docs).
fn cost(z_deg: f32, dir: [f32; 3], sun_dir: Option<[f32; 3]>, glare_deg: f32) -> f32 {
    let glare = sun_dir.is_some() && crate::segment::gamma_deg(dir, sun_dir) < glare_deg;
    z_deg + if glare { GLARE_PENALTY_DEG } else { 0.0 }
}

impl SecondView {
    /// B's table on `grid` (A's map grid) for a base `factor` times the map plane.
    fn table(&mut self, b: &View, grid: Grid, factor: f64, p: &MultiParams) -> &Lut {
        let stale = match &self.table {
            Some((g, f, _)) => *g != grid || (factor / f - 1.0).abs() > p.rebuild_rel,
            None => true,
        };
        if stale {
            let scaled = Grid { n: grid.n, cell_m: grid.cell_m * factor, height_m: grid.height_m * factor };
            self.table = Some((grid, factor, Lut::build_from(b.camera, b.obstruction, scaled, b.offset_m)));
        }
        &self.table.as_ref().expect("built above").2
    }

    /// Merge B's view into A's map (`a`, built on `lut_a`), for a base `factor` times the map plane;
    /// the merged map and what it took from B.
    pub fn merge(&mut self, (a, lut_a): (&CloudMap, &Lut), b: &View, factor: f64, sun_dir: Option<[f32; 3]>, seg: &SegmentParams, p: &MultiParams) -> (CloudMap, MergeCount) {
        let lut_b = self.table(b, a.grid, factor, p);
        let mut map_b = build_map(b.image, lut_b, sun_dir, seg, b.reference);
        map_b.grid = a.grid;
        let glare = seg.glare_zone_deg as f32;
        let mut out = a.clone();
        let mut count = MergeCount::default();
        for k in 0..a.score.len() {
            if !(map_b.in_view[k] && is_known(map_b.class[k])) {
                continue;
            }
            let a_ok = a.in_view[k] && is_known(a.class[k]);
            let take = !a_ok || cost(lut_b.z_deg[k], lut_b.dir[k], sun_dir, glare) + p.prefer_first_deg < cost(lut_a.z_deg[k], lut_a.dir[k], sun_dir, glare);
            if !take {
                continue;
            }
            out.score[k] = map_b.score[k];
            out.class[k] = map_b.class[k];
            out.in_view[k] = true;
            if let (Some(o), Some(v)) = (out.brightness.get_mut(k), map_b.brightness.get(k)) {
                *o = *v;
            }
            count.from_second += 1;
            count.filled += usize::from(!a_ok);
        }
        (out, count)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cloudmap::MapParams;

    /// Two ideal cameras 800 m apart under uniform grey skies of two shades (every cell known to
    /// both, each camera's cells told apart by their score): with the
    /// sun in the first camera's view, cells in its glare zone come from the second camera, cells
    /// masked in the first come from the second, and cells both see alike stay the first's.
    #[test]
    fn takes_glare_and_masked_cells_from_the_second_camera() {
        let cam = Camera::ideal(256);
        let grid = Grid::new(&MapParams { cells: 64, ..Default::default() }, 1000.0);
        let lut_a = Lut::build(&cam, None, grid);
        let seg = SegmentParams::default();
        let r = Reference::default();
        let grey = image::RgbImage::from_pixel(256, 256, image::Rgb([200, 200, 205]));
        // The sun 40° from the zenith toward the east.
        let sun = Some([40f32.to_radians().sin(), 0.0, 40f32.to_radians().cos()]);
        let mut a = build_map(&grey, &lut_a, sun, &seg, &r);
        // Mask a block of the first camera's cells to the north-west (a mast, say).
        let n = grid.n;
        for j in 40..48 {
            for i in 20..28 {
                a.in_view[j * n + i] = false;
                a.class[j * n + i] = 0;
            }
        }
        let darker = image::RgbImage::from_pixel(256, 256, image::Rgb([150, 150, 175]));
        let b = View { camera: &cam, obstruction: None, offset_m: [800.0, 0.0, 0.0], reference: &r, image: &darker };
        let mut sv = SecondView::default();
        let (m, count) = sv.merge((&a, &lut_a), &b, 1.0, sun, &seg, &MultiParams::default());
        assert!(count.filled >= 64, "{count:?}");
        assert!((40..48).all(|j| (20..28).all(|i| m.in_view[j * n + i])), "masked cells filled");
        // The cell nearest the sun from A (in its glare zone) comes from B.
        let glare_cell = (0..n * n).filter(|&k| a.in_view[k]).min_by(|&x, &y| crate::segment::gamma_deg(lut_a.dir[x], sun).total_cmp(&crate::segment::gamma_deg(lut_a.dir[y], sun))).unwrap();
        assert!(crate::segment::gamma_deg(lut_a.dir[glare_cell], sun) < 10.0);
        let lut_b = sv.table.as_ref().unwrap().2.clone();
        assert!(crate::segment::gamma_deg(lut_b.dir[glare_cell], sun) > seg.glare_zone_deg as f32, "B sees the cell outside its glare");
        let from_b = |k: usize| m.class[k] != a.class[k] || !a.in_view[k] || m.score[k].to_bits() != a.score[k].to_bits();
        assert!(from_b(glare_cell) && from_b(44 * n + 24), "glare and masked cells from B");
        // West of A, away from the sun: B sees it lower than A does, it stays A's.
        let west = (n / 2) * n + n / 2 - 8;
        assert!(a.in_view[west] && !from_b(west), "{count:?}");
        assert!(count.from_second > count.filled && count.from_second < n * n, "{count:?}");
    }
}
