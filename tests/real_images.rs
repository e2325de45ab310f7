//! Segmentation of real sky images against hand-made masks.
//!
//! Data: WSISEG (W. Xie et al., "SegCloud…", Atmos. Meas. Tech. 13:1953–1961, 2020,
//! doi:10.5194/amt-13-1953-2020): 40 full-fisheye frames with masks (255 cloud, 100 clear, 0
//! undefined), read from `$NEPHOCAST_DATASETS/wsiseg` (set by `.ci/run`; no licence is stated for
//! the database, so it is not copied into this repository). The frames come without calibration or
//! time, so the segmenter fits the image circle and finds the sun itself; the same default
//! parameters serve every image.
mod common;

use nephocast::calibrate::geometry_free;
use nephocast::segment::{Class, ImageGeometry, Reference, SegmentParams, segment_image};

#[test]
fn wsiseg_pixel_accuracy() {
    let Some(root) = common::datasets() else { return };
    let dir = root.join("wsiseg");
    let mut names: Vec<_> = std::fs::read_dir(dir.join("images")).unwrap().flatten().map(|e| e.file_name()).collect();
    names.sort();
    assert_eq!(names.len(), 40, "expected the 40 WSISEG frames");
    let params = SegmentParams::default();
    let mut accs = vec![];
    eprintln!("image                 accuracy  cloud fraction (ours / labels)");
    for n in &names {
        let img = image::open(dir.join("images").join(n)).unwrap().to_rgb8();
        let lab = image::open(dir.join("annotations").join(n)).unwrap().to_luma8();
        let (cam, sun) = geometry_free(&img).expect("image circle");
        let geom = ImageGeometry::from_camera(&cam, None);
        let seg = segment_image(&img, &geom, sun, &params, &Reference::default());
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
    assert!(mean >= 0.94, "mean accuracy {mean}");
    assert!(min >= 0.85, "lowest accuracy {min}");
}
