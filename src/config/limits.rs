//! Limits on a site configuration (plant size, points, pyranometers) and the memory it needs,
//! estimated before anything is allocated.
use super::SiteFile;

/// Most blocks in a plant.
pub const MAX_BLOCKS: usize = 10_000;
/// Most vertices of one block's footprint.
pub const MAX_POLYGON_VERTICES: usize = 10_000;
/// Most grid cells (of `plant.point_spacing_m`) in the bounding boxes of all footprints: the
/// work of laying out the forecast points.
pub const MAX_LAYOUT_CELLS: u64 = 20_000_000;
/// Most forecast points of the whole plant.
pub const MAX_PLANT_POINTS: u64 = 1_000_000;
/// Most pyranometers.
pub const MAX_PYRANOMETERS: usize = 1_000;
/// Largest memory a configuration may need, by [`SiteFile::memory_estimate`] \[bytes\].
pub const MEMORY_CAP_BYTES: u64 = 2_000_000_000;
/// Bytes per forecast point: its position and block index.
const BYTES_PER_POINT: u64 = 24;
/// Bytes per cloud-map cell: the cell→pixel tables (29 B each, up to
/// [`crate::cloudmap::MAX_LUT_TABLES`] plane heights), the map (6 B) and motion features (about
/// 16 B) of each of up to 8 maps held for motion.
const BYTES_PER_MAP_CELL: u64 = 29 * crate::cloudmap::MAX_LUT_TABLES as u64 + 8 * 22;

/// The memory a site configuration needs, estimated from above before anything is allocated:
/// points × 24 B + points × horizons × (members + 1) × 8 B (one value per point, horizon and
/// member) + cells × 408 B (cell→pixel tables and the maps held for motion).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MemoryEstimate {
    /// Forecast points (footprint area over spacing², per block).
    pub points: u64,
    /// Forecast horizons.
    pub horizons: u64,
    /// Ensemble members.
    pub members: u64,
    /// Cloud-map cells.
    pub cells: u64,
    /// The estimate \[bytes\].
    pub bytes: u64,
}

impl std::fmt::Display for MemoryEstimate {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{} points × {} horizons × {} members, {} map cells", self.points, self.horizons, self.members + 1, self.cells)
    }
}

/// Grid cells of `spacing_m` in a footprint's bounding box (the work of laying out its points).
pub fn layout_cells_of(poly: &[[f64; 2]], spacing_m: f64) -> f64 {
    let [x0, y0, x1, y1] = crate::plant::bounding_box(poly);
    let c = ((x1 - x0) / spacing_m).ceil().max(1.0) * ((y1 - y0) / spacing_m).ceil().max(1.0);
    if c.is_finite() { c } else { f64::INFINITY }
}

/// Area of a simple polygon \[m²\] (shoelace formula).
pub fn polygon_area_m2(poly: &[[f64; 2]]) -> f64 {
    let n = poly.len();
    let mut s = 0.0;
    for i in 0..n {
        let (a, b) = (poly[i], poly[(i + 1) % n]);
        s += a[0] * b[1] - b[0] * a[1];
    }
    (s / 2.0).abs()
}

impl SiteFile {
    /// How much memory the configuration needs (an upper estimate, see [`MemoryEstimate`]).
    pub fn memory_estimate(&self) -> MemoryEstimate {
        let p = &self.plant;
        let points: f64 = p.blocks.iter().map(|b| (polygon_area_m2(&b.polygon_m) / (p.point_spacing_m * p.point_spacing_m)).ceil().max(1.0)).sum();
        let points = if points.is_finite() { points.min(u64::MAX as f64 / 2.0) as u64 } else { u64::MAX / 2 };
        let horizons = (u64::from(self.forecast.horizon_min) * 60).div_ceil(u64::from(self.forecast.step_s.max(1)));
        let members = self.irradiance.ensemble_members as u64;
        let cells = (self.map.cells as u64).pow(2);
        let bytes = points
            .saturating_mul(BYTES_PER_POINT)
            .saturating_add(points.saturating_mul(horizons).saturating_mul(members + 1).saturating_mul(8))
            .saturating_add(cells.saturating_mul(BYTES_PER_MAP_CELL));
        MemoryEstimate { points, horizons, members, cells, bytes }
    }
}
