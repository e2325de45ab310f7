//! Segmentation of real sky images against hand-made masks.
//!
//! Data: WSISEG (W. Xie et al., "SegCloud…", Atmos. Meas. Tech. 13:1953–1961, 2020,
//! doi:10.5194/amt-13-1953-2020): 40 full-fisheye frames with masks (255 cloud, 100 clear, 0
//! undefined), read from `$NEPHOCAST_DATASETS/wsiseg` (set by `.ci/run`; no licence is stated for
//! the database, so it is not copied into this repository). The frames come without calibration or
//! time, so the segmenter fits the image circle and finds the sun itself; the same default
//! parameters serve every image. Beside the accuracy the test prints where the wrong pixels lie
//! (see [`Regions`]), so that a change can be judged by region.
mod common;

use nephocast::calibrate::geometry_free;
use nephocast::segment::{Class, ImageGeometry, Reference, SegmentParams, gamma_deg, segment_image};

/// Wrong labelled pixels by region, each counted in the first region that holds it: unknown to the
/// segmenter (beyond the fitted image circle, or the sun's disc and glare), within 20° of the sun,
/// beyond 80° zenith, within 3 px of a labelled cloud/clear boundary, elsewhere.
#[derive(Default)]
struct Regions {
    wrong: [usize; 5],
    labelled: usize,
}

impl Regions {
    const NAMES: [&'static str; 5] = ["unknown to us", "sun < 20°", "zenith > 80°", "cloud edge ± 3 px", "elsewhere"];

    fn add(&mut self, lab: &image::GrayImage, ours: &image::GrayImage, geom: &ImageGeometry, sun: Option<[f32; 3]>) {
        let (w, h) = (lab.width() as i64, lab.height() as i64);
        let label = |x: i64, y: i64| if x >= 0 && y >= 0 && x < w && y < h { lab.get_pixel(x as u32, y as u32).0[0] } else { 0 };
        let near_edge = |x: i64, y: i64, cloud: bool| {
            (-3..=3i64).any(|dy| (-3..=3i64).any(|dx| dx * dx + dy * dy <= 9 && matches!(label(x + dx, y + dy), 100 | 255) && (label(x + dx, y + dy) == 255) != cloud))
        };
        for y in 0..h {
            for x in 0..w {
                let l = label(x, y);
                if l == 0 {
                    continue;
                }
                self.labelled += 1;
                let i = (y * w + x) as usize;
                let class = Class::from_u8(ours.get_pixel(x as u32, y as u32).0[0]);
                if matches!(class, Class::Thin | Class::Thick) == (l == 255) {
                    continue;
                }
                let region = if class == Class::Unknown {
                    0
                } else if gamma_deg(geom.dir[i], sun) < 20.0 {
                    1
                } else if geom.z_deg[i] > 80.0 {
                    2
                } else if near_edge(x, y, l == 255) {
                    3
                } else {
                    4
                };
                self.wrong[region] += 1;
            }
        }
    }
}

#[test]
fn wsiseg_pixel_accuracy() {
    let Some(root) = common::datasets() else { return };
    let dir = root.join("wsiseg");
    let mut names: Vec<_> = std::fs::read_dir(dir.join("images")).unwrap().flatten().map(|e| e.file_name()).collect();
    names.sort();
    // Every frame the folder holds (40 in the shared set; a larger held-out set of the same source
    // runs the same way), each with its annotation.
    names.retain(|n| dir.join("annotations").join(n).exists());
    assert!(!names.is_empty(), "no WSISEG frame with an annotation under {}", dir.display());
    eprintln!("WSISEG: {} frames with annotations", names.len());
    let params = SegmentParams::default();
    let mut accs = vec![];
    let mut regions = Regions::default();
    eprintln!("image                 accuracy  cloud fraction (ours / labels)");
    for n in &names {
        let img = image::open(dir.join("images").join(n)).unwrap().to_rgb8();
        let lab = image::open(dir.join("annotations").join(n)).unwrap().to_luma8();
        let (cam, sun) = geometry_free(&img).expect("image circle");
        let geom = ImageGeometry::from_camera(&cam, None);
        let seg = segment_image(&img, &geom, sun, &params, &Reference::default());
        regions.add(&lab, &seg.classes, &geom, sun);
        let (mut ok, mut total, mut lab_cloud, mut our_cloud) = (0usize, 0usize, 0usize, 0usize);
        for (p, l) in seg.classes.pixels().zip(lab.pixels()) {
            let l = l.0[0];
            if l == 0 {
                continue;
            }
            let cloud = matches!(Class::from_u8(p.0[0]), Class::Thin | Class::Thick);
            total += 1;
            lab_cloud += (l == 255) as usize;
            our_cloud += cloud as usize;
            ok += (cloud == (l == 255)) as usize;
        }
        let acc = ok as f64 / total as f64;
        eprintln!("{:<22} {:.3}     {:.3} / {:.3}", n.to_string_lossy(), acc, our_cloud as f64 / total as f64, lab_cloud as f64 / total as f64);
        accs.push(acc);
    }
    let mean = accs.iter().sum::<f64>() / accs.len() as f64;
    let min = accs.iter().cloned().fold(1.0, f64::min);
    eprintln!("WSISEG: mean pixel accuracy {mean:.4}, lowest {min:.4} over {} images", accs.len());
    eprintln!("wrong pixels by region (share of all labelled pixels):");
    for (name, n) in Regions::NAMES.iter().zip(regions.wrong) {
        eprintln!("  {name:<18} {:.4}", n as f64 / regions.labelled as f64);
    }
    // Regression floors with room for the held-out frames of the same source (measured on the
    // shared 40: 0.9460 mean, 0.9135 lowest); the target is 0.96 / 0.92.
    assert!(mean >= 0.94, "mean accuracy {mean}");
    assert!(min >= 0.90, "lowest accuracy {min}");
}
