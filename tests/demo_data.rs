//! The shipped demo data can be regenerated from its seed.
use nephocast::synth::render::PixelRays;
use nephocast::synth::{Scene, encode_jpeg, encode_png_gray, scene};
use std::path::Path;

#[test]
fn demo_frames_regenerate_from_their_seed() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let scene_toml = std::fs::read_to_string(root.join("truth/scene.toml")).expect("demo-data/truth/scene.toml");
    let seed: u64 = scene_toml
        .lines()
        .find_map(|l| l.strip_prefix("seed = "))
        .and_then(|v| v.trim().parse().ok())
        .expect("seed in scene.toml");
    let spec = scene("larkspur-demo").unwrap();
    let quality = spec.jpeg_quality;
    let every = spec.truth_mask_every;
    let s = Scene::new(spec, seed).unwrap();
    let rays = PixelRays::new(&s.camera);
    let times = s.frame_times();
    let mut frames: Vec<_> = std::fs::read_dir(root.join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    frames.sort();
    assert_eq!(frames.len(), times.len());
    for i in [0, times.len() / 2, times.len() - 1] {
        let r = s.render_frame(&rays, i, &times[i]);
        let name = nephocast::io::frame_name(&times[i], "jpg");
        let committed = std::fs::read(root.join("frames").join(&name)).unwrap();
        assert!(encode_jpeg(&r.rgb, quality) == committed, "frame {name} differs from a fresh render");
        if i % every == 0 {
            let m = std::fs::read(root.join("truth/masks").join(name.replace(".jpg", ".png"))).unwrap();
            assert!(encode_png_gray(&r.truth) == m, "truth mask of {name} differs");
        }
    }
}
