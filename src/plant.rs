//! The plant: blocks, their footprints and the forecast points inside them.

use serde::{Deserialize, Serialize};

/// `[plant]`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PlantSection {
    /// Spacing of the forecast points inside each block's footprint \[m\].
    #[serde(default = "default_spacing")]
    pub point_spacing_m: f64,
    /// The plant's blocks.
    #[serde(default)]
    pub blocks: Vec<BlockSpec>,
}

impl Default for PlantSection {
    fn default() -> Self {
        Self { point_spacing_m: default_spacing(), blocks: vec![] }
    }
}

fn default_spacing() -> f64 {
    25.0
}

/// Mounting of a block's modules.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum MountKind {
    /// Fixed tilt and azimuth.
    Fixed,
    /// Horizontal single-axis tracker.
    SingleAxis,
}

/// `[[plant.blocks]]`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BlockSpec {
    /// Block name.
    pub name: String,
    /// Footprint polygon vertices (east, north) \[m\] from the site origin.
    #[serde(deserialize_with = "crate::settings::exact::points")]
    pub polygon_m: Vec<[f64; 2]>,
    /// DC capacity \[kW\].
    pub capacity_kw: f64,
    /// AC (inverter) rating \[kW\]; default the DC capacity over `power.dc_ac_ratio`.
    #[serde(default)]
    pub ac_capacity_kw: Option<f64>,
    /// `"fixed"` or `"single-axis"`.
    pub mount: MountKind,
    /// Fixed: module tilt from horizontal \[°\].
    #[serde(default)]
    pub tilt_deg: Option<f64>,
    /// Fixed: module azimuth, clockwise from north \[°\].
    #[serde(default)]
    pub azimuth_deg: Option<f64>,
    /// Tracker: axis azimuth \[°\] (e.g. 0 for a north–south axis).
    #[serde(default)]
    pub axis_azimuth_deg: Option<f64>,
    /// Tracker: largest rotation \[°\]; default 60.
    #[serde(default)]
    pub max_angle_deg: Option<f64>,
}

/// The name of the whole plant in forecast outputs (the `block` column of `forecasts.csv`); no
/// block may take it.
pub const PLANT_TARGET: &str = "plant";

/// Check a block's name: not empty (nor only spaces), no control characters (line breaks, tabs…),
/// not the plant aggregate's name [`PLANT_TARGET`] (in any case), and not the name of an
/// `earlier` block (in any case). On failure, what was expected and what was found.
pub fn check_block_name(name: &str, earlier: &[BlockSpec]) -> Result<(), (String, String)> {
    if name.trim().is_empty() {
        return Err(("a non-empty name".into(), format!("{name:?}")));
    }
    if name.chars().any(char::is_control) {
        return Err(("a name without control characters (line breaks, tabs)".into(), format!("{name:?}")));
    }
    if name.to_lowercase() == PLANT_TARGET {
        return Err((format!("a name other than {PLANT_TARGET:?}, which names the whole plant in the outputs"), format!("{name:?}")));
    }
    if let Some(j) = earlier.iter().position(|b| b.name.to_lowercase() == name.to_lowercase()) {
        return Err((format!("a name unique among the blocks (ignoring case); plant.blocks[{j}] is {:?}", earlier[j].name), format!("{name:?}")));
    }
    Ok(())
}

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

/// A polygon's bounding box `[x_min, y_min, x_max, y_max]` \[m\].
pub fn bounding_box(poly: &[[f64; 2]]) -> [f64; 4] {
    let (mut x0, mut y0, mut x1, mut y1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
    for v in poly {
        x0 = x0.min(v[0]);
        y0 = y0.min(v[1]);
        x1 = x1.max(v[0]);
        y1 = y1.max(v[1]);
    }
    [x0, y0, x1, y1]
}

/// Points on a square grid of `spacing_m` (cell centres) inside a polygon; at least the centroid
/// of the vertices when the polygon is smaller than one cell.
pub fn grid_points(poly: &[[f64; 2]], spacing_m: f64) -> Vec<[f64; 2]> {
    let [x0, y0, x1, y1] = bounding_box(poly);
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

    const SITE: &str = r#"
[site]
name = "t"
latitude_deg = 45.0
longitude_deg = 7.0
elevation_m = 300.0
[camera]
calibration = "cam.toml"
[clouds]
base_height_m = 1500.0
[plant]
point_spacing_m = 25.0
[[plant.blocks]]
name = "A"
polygon_m = [[0.0, 0.0], [100.0, 0.0], [100.0, 100.0], [0.0, 100.0]]
capacity_kw = 100.0
mount = "fixed"
tilt_deg = 20.0
azimuth_deg = 180.0
[[plant.blocks]]
name = "B"
polygon_m = [[0.0, 0.0], [100.0, 0.0], [100.0, 100.0], [0.0, 100.0]]
capacity_kw = 100.0
mount = "fixed"
tilt_deg = 20.0
azimuth_deg = 180.0
"#;

    fn site_error(second_name: &str) -> Option<String> {
        let text = SITE.replace("name = \"B\"", &format!("name = {}", toml::Value::String(second_name.into())));
        let s: crate::config::SiteFile = crate::config::parse_toml(&text, std::path::Path::new("site.toml")).unwrap();
        s.validate(std::path::Path::new("site.toml")).err().map(|e| e.to_string())
    }

    #[test]
    fn block_names_are_checked_with_the_field_named() {
        assert_eq!(site_error("B"), None);
        // Commas, quotes and spaces are fine: the CSV writer quotes them.
        assert_eq!(site_error("south, \"east\" row"), None);
        for (name, why) in [
            ("", "non-empty"),
            ("   ", "non-empty"),
            ("row\n2", "control characters"),
            ("row\t2", "control characters"),
            ("row\r", "control characters"),
            ("plant", "whole plant"),
            ("Plant", "whole plant"),
            ("PLANT", "whole plant"),
            ("A", "unique"),
            ("a", "unique"),
        ] {
            let e = site_error(name).unwrap_or_else(|| panic!("{name:?} accepted"));
            assert!(e.starts_with("site.toml: field plant.blocks[1].name:"), "{name:?}: {e}");
            assert!(e.contains(why), "{name:?}: {e}");
        }
        // Not only `plant` itself: a name that merely contains it is fine.
        assert_eq!(site_error("plant-east"), None);
    }
}
