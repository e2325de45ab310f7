//! What the fit vouches for: the direction-error bound by zenith band (parameter covariance carried
//! to each sky direction, the spread of lens families that predict as well, a radial-scale
//! allowance), the part of the sky the detections cover, and the warnings that say where the map
//! reaches beyond them.

use nalgebra::DMatrix;

use super::fit::{Problem, angle_deg, perturbed, project_unchecked};
use super::{BOUND_BANDS_DEG, BandBound, CalibrateOptions, Coverage, Detection, FREE_FIT_PARAMETERS, Fit, HELD_CENTRE_SIGMA_PX, UNCONSTRAINED_BOUND_DEG};
use crate::camera::Camera;
use crate::sun::{direction_enu, zenith_azimuth_of};

/// Direction of a pixel of `cam` seen through `other` \[°\]: the angle between where `cam` and `other`
/// say the pixel looks, for the pixel `cam` puts at `dir`.
fn direction_gap_deg(cam: &Camera, other: &Camera, dir: [f64; 3]) -> Option<f64> {
    let (x, y) = project_unchecked(cam, dir);
    let d2 = other.unproject_enu(x, y)?;
    Some(angle_deg(dir, d2))
}

/// The bound of step 7 over the sky, tabulated by band.
pub(super) fn bound_table(fit: &Fit, prob: &Problem, competitors: &[Camera], scale_sys: f64) -> Vec<BandBound> {
    let cam = &fit.camera;
    let Some((p, cov)) = &fit.cov else {
        return BOUND_BANDS_DEG.iter().map(|&(a, b)| BandBound { zenith_from_deg: a, zenith_to_deg: b, bound_deg: f64::INFINITY }).collect();
    };
    let max_z = cam.max_field_angle_rad.to_degrees();
    let mut out = vec![];
    for &(za, zb) in &BOUND_BANDS_DEG {
        let mut worst: f64 = 0.0;
        let mut any = false;
        let steps = ((zb - za) / 2.5).ceil().max(1.0) as usize;
        for si in 0..=steps {
            let z = (za + (zb - za) * si as f64 / steps as f64).min(zb - 0.01).max(0.5);
            for ai in 0..24 {
                let a = (ai as f64 * 15.0).to_radians();
                let dir = direction_enu(z.to_radians(), a);
                // Field angle of this direction in the camera.
                let v = cam.cam_to_enu().inverse_transform_vector(&nalgebra::Vector3::new(dir[0], dir[1], dir[2]));
                if v[2].clamp(-1.0, 1.0).acos().to_degrees() > max_z {
                    continue;
                }
                any = true;
                // Covariance of the image position.
                let mut jp = DMatrix::zeros(2, p.len());
                for k in 0..p.len() {
                    let (pa, pb, h) = perturbed(p, k);
                    let (xa, ya) = project_unchecked(&prob.camera(&pa), dir);
                    let (xb, yb) = project_unchecked(&prob.camera(&pb), dir);
                    jp[(0, k)] = (xa - xb) / (2.0 * h);
                    jp[(1, k)] = (ya - yb) / (2.0 * h);
                }
                let c = &jp * cov * jp.transpose();
                let sigma_px = (c[(0, 0)] + c[(1, 1)]).max(0.0).sqrt();
                // Local scale: degrees per pixel along the radius (the larger of radial and tangential).
                let theta = v[2].clamp(-1.0, 1.0).acos();
                let radial = cam.f_px * cam.projection.radial_derivative(theta);
                let tangential = cam.f_px * cam.projection.radial(theta) / theta.sin().max(1e-6);
                let deg_per_px = (1.0 / radial.min(tangential).max(1e-6)).to_degrees();
                let spread = competitors.iter().filter_map(|o| direction_gap_deg(cam, o, dir)).fold(0.0, f64::max);
                worst = worst.max(2.0 * sigma_px * deg_per_px + spread + scale_sys * theta.to_degrees());
            }
        }
        if any {
            out.push(BandBound { zenith_from_deg: za, zenith_to_deg: zb, bound_deg: worst });
        }
    }
    out
}

pub(super) fn coverage_of(dets: &[Detection]) -> Coverage {
    let used: Vec<(f64, f64)> = dets.iter().filter(|d| d.weight >= 0.3).map(|d| zenith_azimuth_of(d.dir)).map(|(z, a)| (z.to_degrees(), a.to_degrees())).collect();
    if used.is_empty() {
        return Coverage::default();
    }
    let zmin = used.iter().map(|u| u.0).fold(f64::INFINITY, f64::min);
    let zmax = used.iter().map(|u| u.0).fold(0.0, f64::max);
    // Smallest arc holding all azimuths: 360° minus the largest gap between sorted azimuths.
    let mut az: Vec<f64> = used.iter().map(|u| u.1.rem_euclid(360.0)).collect();
    az.sort_by(f64::total_cmp);
    let mut gap: f64 = 360.0 - (az[az.len() - 1] - az[0]);
    let mut from = az[0];
    for w in az.windows(2) {
        if w[1] - w[0] > gap {
            gap = w[1] - w[0];
            from = w[1];
        }
    }
    Coverage { zenith_min_deg: zmin, zenith_max_deg: zmax, azimuth_span_deg: 360.0 - gap, azimuth_from_deg: from }
}

/// Detections over less than this span of zenith angle \[°\] see the lens's radial function over a
/// narrow band only (a winter day's single low arc): the calibration says which part of the sky
/// they constrain.
pub const NARROW_ZENITH_SPAN_DEG: f64 = 20.0;

/// Say which part of the sky the detections constrain when they are few (the fit held to the image
/// circle) or cover a narrow band of zenith angle; `None` otherwise.
pub(super) fn sky_warning(fit: &Fit, n: usize, options: &CalibrateOptions) -> Option<String> {
    let c = &fit.coverage;
    let narrow = c.zenith_max_deg - c.zenith_min_deg < NARROW_ZENITH_SPAN_DEG;
    if !(narrow || options.hold_centre) {
        return None;
    }
    let held = if options.hold_centre {
        format!(
            "calibrated from {n} sun detections, fewer than a free fit needs ({}): the principal point is held at the image circle's centre (±{:.1} px in the bound) and the lens to an ideal family ({}); ",
            options.min_detections.max(FREE_FIT_PARAMETERS * crate::config::MIN_DETECTIONS_PER_PARAMETER),
            options.centre_prior_px.unwrap_or(HELD_CENTRE_SIGMA_PX),
            fit.family.name()
        )
    } else {
        String::new()
    };
    let az_to = (c.azimuth_from_deg + c.azimuth_span_deg).rem_euclid(360.0);
    let worst = fit.bounds.iter().filter(|b| b.zenith_from_deg < options.map_max_zenith_deg).map(|b| b.bound_deg).fold(0.0, f64::max);
    Some(format!(
        "{held}the detections constrain the lens only at zenith {:.0}–{:.0}° and azimuth {:.0}–{az_to:.0}° (clockwise from north); elsewhere the camera is extrapolated from them (stated direction-error bound up to {worst:.2}° where the map reaches): calibrate again from a clear day of another season when one comes",
        c.zenith_min_deg, c.zenith_max_deg, c.azimuth_from_deg
    ))
}

/// Warn where the map reaches beyond what the detections constrain, or beyond the lens field.
pub(super) fn reach_warnings(fit: &mut Fit, options: &CalibrateOptions) {
    let reach = options.map_max_zenith_deg;
    if let Some(b) = fit.bounds.iter().filter(|b| b.zenith_from_deg < reach && b.bound_deg > UNCONSTRAINED_BOUND_DEG).map(|b| b.zenith_from_deg).reduce(f64::min) {
        let worst = fit.bounds.iter().filter(|b| b.zenith_from_deg < reach).map(|b| b.bound_deg).fold(0.0, f64::max);
        fit.warnings.push(format!(
            "the detections cover zenith {:.0}–{:.0}° over {:.0}° of azimuth; from zenith {b:.0}° the stated direction-error bound exceeds {UNCONSTRAINED_BOUND_DEG}° (up to {worst:.2}° where the map reaches, zenith {reach:.0}°): add frames from another season, or lower map.max_zenith_deg",
            fit.coverage.zenith_min_deg, fit.coverage.zenith_max_deg, fit.coverage.azimuth_span_deg
        ));
    }
    if fit.camera.max_field_angle_rad.to_degrees() < options.map_max_zenith_deg {
        fit.warnings.push(format!(
            "the lens images only {:.1}° from its axis, less than the map's {:.0}°: cells beyond the image circle are unknown",
            fit.camera.max_field_angle_rad.to_degrees(),
            options.map_max_zenith_deg
        ));
    }
}
