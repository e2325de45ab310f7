//! Experimental: whole-frame decoders' thread CPU time.
use nephocast::intake::{IntakeOptions, check_complete, from_bytes, recycle, system_jpeg};

fn cpu_ms() -> f64 {
    let mut ts = libc::timespec { tv_sec: 0, tv_nsec: 0 };
    unsafe { libc::clock_gettime(libc::CLOCK_THREAD_CPUTIME_ID, &mut ts) };
    ts.tv_sec as f64 * 1e3 + ts.tv_nsec as f64 / 1e6
}
fn med(mut v: Vec<f64>) -> f64 { v.sort_by(f64::total_cmp); v[v.len() / 2] }

fn main() {
    let files: Vec<String> = std::env::args().skip(1).collect();
    let jpegs: Vec<Vec<u8>> = files.iter().map(|p| std::fs::read(p).unwrap()).collect();
    let o = IntakeOptions::default();
    let reps = if jpegs.len() < 10 { 40 } else { 3 };
    let mut t = vec![vec![]; 4];
    let mut diff = [(0usize, 0u8, 0f64); 4];
    let mut total = 0;
    let mut buf = Vec::new();
    for r in 0..reps {
        for j in &jpegs {
            let (_, w, h) = check_complete(j).unwrap();
            let c = cpu_ms();
            let z = from_bytes(j, &o).unwrap();
            t[0].push(cpu_ms() - c);
            if r == 0 { total += z.as_raw().len(); }
            for (k, idct) in [(1, system_jpeg::Idct::Accurate), (2, system_jpeg::Idct::Fast), (3, system_jpeg::Idct::Float)] {
                let c = cpu_ms();
                system_jpeg::decode_into(j, 1, idct, w, h, &mut buf).unwrap();
                t[k].push(cpu_ms() - c);
                if r == 0 {
                    for (a, b) in z.as_raw().iter().zip(&buf) {
                        if a != b { diff[k].0 += 1; diff[k].1 = diff[k].1.max(a.abs_diff(*b)); }
                        diff[k].2 += *b as f64 - *a as f64;
                    }
                }
            }
            recycle(z);
        }
    }
    for (k, name) in ["zune-jpeg (intake)", "libjpeg ISLOW", "libjpeg IFAST", "libjpeg FLOAT"].iter().enumerate() {
        println!("{name:20} cpu median {:.3} ms  differ {} of {} (max {}, mean signed {:.4})", med(t[k].clone()), diff[k].0, total, diff[k].1, diff[k].2 / total as f64);
    }
}
