//! Link setup: put `memory.x` where the cortex-m-rt `link.x` script can find
//! it and pass the linker scripts (cortex-m-rt and defmt) to the binaries;
//! copy the built-in model (`PLUMB_MODEL`, default
//! `../mps2-an386/default.plumb`) to `$OUT_DIR/builtin.plumb`; with
//! `PLUMB_TRUSTED_KEY` (a `.pub` file from `plumb keygen`; required with the
//! `trusted-key` feature and refused without it) the endpoint runs
//! only models signed by that key (`$OUT_DIR/trusted_key.rs`).

use std::env;
use std::fs;
use std::path::PathBuf;

#[path = "../build-support/trusted_key.rs"]
mod trusted_key;

fn main() {
    let out = PathBuf::from(env::var_os("OUT_DIR").expect("OUT_DIR is set by cargo"));
    fs::copy("memory.x", out.join("memory.x")).expect("copy memory.x into OUT_DIR");
    println!("cargo:rustc-link-search={}", out.display());
    println!("cargo:rerun-if-changed=memory.x");
    println!("cargo:rerun-if-changed=build.rs");

    println!("cargo:rustc-link-arg-bins=--nmagic");
    println!("cargo:rustc-link-arg-bins=-Tlink.x");
    println!("cargo:rustc-link-arg-bins=-Tdefmt.x");

    // The model compiled into the image: $PLUMB_MODEL when set (relative
    // paths from this directory), else the emulator board's default model.
    println!("cargo:rerun-if-env-changed=PLUMB_MODEL");
    let model = match env::var_os("PLUMB_MODEL") {
        Some(p) if !p.is_empty() => PathBuf::from(p),
        _ => PathBuf::from("../mps2-an386/default.plumb"),
    };
    println!("cargo:rerun-if-changed={}", model.display());
    let bytes = fs::read(&model).unwrap_or_else(|e| {
        panic!(
            "cannot read the model file {} (PLUMB_MODEL, or ../mps2-an386/default.plumb): {e}",
            model.display()
        )
    });
    assert!(
        bytes.starts_with(b"PLMD"),
        "{} is not a plumbline model file (no PLMD magic)",
        model.display()
    );
    fs::write(out.join("builtin.plumb"), &bytes).expect("write the model into OUT_DIR");

    trusted_key::trusted_key(&out);
}
