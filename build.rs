//! Builds the JPEG decoder over the system's libjpeg (whole frames, and reduced-scale ones) when its
//! header is there (`libjpeg-dev` / `libjpeg62-turbo-dev`); without it the crate falls back to the
//! pure-Rust decoders and says so in a build warning.

fn main() {
    println!("cargo::rerun-if-changed=csrc/jpeg_reduced.c");
    println!("cargo::rerun-if-env-changed=NEPHOCAST_NO_SYSTEM_LIBJPEG");
    println!("cargo::rustc-check-cfg=cfg(system_libjpeg)");
    if std::env::var_os("NEPHOCAST_NO_SYSTEM_LIBJPEG").is_some() {
        return;
    }
    match cc::Build::new().file("csrc/jpeg_reduced.c").opt_level(2).warnings(true).cargo_warnings(false).try_compile("nephocast_jpeg_reduced") {
        Ok(()) => {
            println!("cargo::rustc-link-lib=jpeg");
            println!("cargo::rustc-cfg=system_libjpeg");
        }
        Err(e) => println!("cargo::warning=no system libjpeg ({e}); frames are decoded whole and at reduced scale by the slower pure-Rust decoders"),
    }
}
