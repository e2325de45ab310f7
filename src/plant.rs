//! The plant: blocks, their footprints and the forecast points inside them.

use crate::config::{BlockSpec, MountKind, PlantSection};

/// A block of the plant with its forecast points.
#[derive(Debug, Clone)]
pub struct Block {
    /// Name.
    pub name: String,
    /// DC capacity \[kW\].
    pub capacity_kw: f64,
    /// AC rating \[kW\], if given.
    pub ac_capacity_kw: Option<f64>,
    /// Mounting.
    pub mount: Mount,
    /// Footprint (east, north) \[m\].
    pub polygon_m: Vec<[f64; 2]>,
    /// Forecast points (east, north) \[m\] from the site origin.
    pub points_m: Vec<[f64; 2]>,
}

/// Module mounting with its angles \[rad\].
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Mount {
    /// Fixed tilt and azimuth.
    Fixed {
        /// Tilt from horizontal \[rad\].
        tilt_rad: f64,
        /// Azimuth clockwise from north \[rad\].
        azimuth_rad: f64,
    },
    /// Horizontal single-axis tracker.
    SingleAxis {
        /// Axis azimuth \[rad\].
        axis_azimuth_rad: f64,
        /// Largest rotation \[rad\].
        max_angle_rad: f64,
    },
}

/// The whole plant.
#[derive(Debug, Clone)]
pub struct Plant {
    /// Its blocks.
    pub blocks: Vec<Block>,
}

/// Whether a point is inside a polygon (even–odd rule).
pub fn point_in_polygon(p: [f64; 2], poly: &[[f64; 2]]) -> bool {
    let mut inside = false;
    let n = poly.len();
    let mut j = n - 1;
    for i in 0..n {
        let (a, b) = (poly[i], poly[j]);
        if (a[1] > p[1]) != (b[1] > p[1]) && p[0] < (b[0] - a[0]) * (p[1] - a[1]) / (b[1] - a[1]) + a[0] {
            inside = !inside;
        }
        j = i;
    }
    inside
}

/// Points on a square grid of `spacing_m` (cell centres) inside a polygon; at least the centroid
/// of the vertices when the polygon is smaller than one cell.
pub fn grid_points(poly: &[[f64; 2]], spacing_m: f64) -> Vec<[f64; 2]> {
    let (mut x0, mut y0, mut x1, mut y1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
    for v in poly {
        x0 = x0.min(v[0]);
        y0 = y0.min(v[1]);
        x1 = x1.max(v[0]);
        y1 = y1.max(v[1]);
    }
    let mut pts = vec![];
    let nx = ((x1 - x0) / spacing_m).ceil() as usize;
    let ny = ((y1 - y0) / spacing_m).ceil() as usize;
    for j in 0..ny {
        for i in 0..nx {
            let p = [x0 + (i as f64 + 0.5) * spacing_m, y0 + (j as f64 + 0.5) * spacing_m];
            if point_in_polygon(p, poly) {
                pts.push(p);
            }
        }
    }
    if pts.is_empty() {
        let n = poly.len() as f64;
        pts.push([poly.iter().map(|v| v[0]).sum::<f64>() / n, poly.iter().map(|v| v[1]).sum::<f64>() / n]);
    }
    pts
}

impl Block {
    /// Build from its file section (already validated).
    pub fn from_spec(b: &BlockSpec, spacing_m: f64) -> Block {
        let mount = match b.mount {
            MountKind::Fixed => Mount::Fixed {
                tilt_rad: b.tilt_deg.unwrap_or(0.0).to_radians(),
                azimuth_rad: b.azimuth_deg.unwrap_or(180.0).to_radians(),
            },
            MountKind::SingleAxis => Mount::SingleAxis {
                axis_azimuth_rad: b.axis_azimuth_deg.unwrap_or(0.0).to_radians(),
                max_angle_rad: b.max_angle_deg.unwrap_or(60.0).to_radians(),
            },
        };
        Block {
            name: b.name.clone(),
            capacity_kw: b.capacity_kw,
            ac_capacity_kw: b.ac_capacity_kw,
            mount,
            polygon_m: b.polygon_m.clone(),
            points_m: grid_points(&b.polygon_m, spacing_m),
        }
    }
}

impl Plant {
    /// Build from the `[plant]` section.
    pub fn from_section(p: &PlantSection) -> Plant {
        Plant { blocks: p.blocks.iter().map(|b| Block::from_spec(b, p.point_spacing_m)).collect() }
    }

    /// Total number of forecast points.
    pub fn point_count(&self) -> usize {
        self.blocks.iter().map(|b| b.points_m.len()).sum()
    }

    /// Total DC capacity \[kW\].
    pub fn capacity_kw(&self) -> f64 {
        self.blocks.iter().map(|b| b.capacity_kw).sum()
    }

    /// Mean of all points (east, north) \[m\].
    pub fn centre_m(&self) -> [f64; 2] {
        let (mut s, mut n) = ([0.0, 0.0], 0.0);
        for b in &self.blocks {
            for p in &b.points_m {
                s[0] += p[0];
                s[1] += p[1];
                n += 1.0;
            }
        }
        if n == 0.0 { [0.0, 0.0] } else { [s[0] / n, s[1] / n] }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grid_fills_rectangle() {
        let poly = [[0.0, 0.0], [100.0, 0.0], [100.0, 50.0], [0.0, 50.0]];
        let pts = grid_points(&poly, 10.0);
        assert_eq!(pts.len(), 50);
        assert!(pts.iter().all(|p| point_in_polygon(*p, &poly)));
    }

    #[test]
    fn triangle_and_tiny_polygon() {
        let tri = [[0.0, 0.0], [100.0, 0.0], [0.0, 100.0]];
        let n = grid_points(&tri, 10.0).len();
        // About half the 100 cells of the bounding square (geometry).
        assert!((40..=55).contains(&n), "{n}");
        assert_eq!(grid_points(&[[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]], 10.0).len(), 1);
    }
}
