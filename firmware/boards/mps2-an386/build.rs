//! Link setup and the built-in model.
//!
//! * `memory.x` goes where the cortex-m-rt `link.x` script finds it, and the
//!   binaries get `-Tlink.x`.
//! * The model file compiled into `plumb-board-mps2` is `$PLUMB_MODEL` when
//!   set (a path; relative paths are taken from this directory), else the
//!   committed `default.plumb`. It is copied to `$OUT_DIR/builtin.plumb`,
//!   which `src/main.rs` includes with `include_bytes!`. The file is checked
//!   only for its magic here; the firmware validates it fully at boot.
//! * `$PLUMB_TRUSTED_KEY` (a `.pub` file from `plumb keygen`), required with
//!   the `trusted-key` feature and refused without it, makes the endpoint
//!   run only models signed by that key (`$OUT_DIR/trusted_key.rs`); off by
//!   default.

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
    // cortex-m-rt's `device` feature: its `link.x` includes `device.x`, where
    // a device crate would name its interrupt handlers. The board's one
    // interrupt vector is `mmio::__INTERRUPTS`, so nothing is named here.
    fs::write(
        out.join("device.x"),
        "/* plumb-board-mps2: no device handlers (src/mmio.rs, __INTERRUPTS) */\n",
    )
    .expect("write device.x into OUT_DIR");
    println!("cargo:rerun-if-changed=build.rs");

    println!("cargo:rustc-link-arg-bins=--nmagic");
    println!("cargo:rustc-link-arg-bins=-Tlink.x");

    println!("cargo:rerun-if-env-changed=PLUMB_MODEL");
    let model = match env::var_os("PLUMB_MODEL") {
        Some(p) if !p.is_empty() => PathBuf::from(p),
        _ => PathBuf::from("default.plumb"),
    };
    println!("cargo:rerun-if-changed={}", model.display());
    let bytes = fs::read(&model).unwrap_or_else(|e| {
        panic!(
            "cannot read the model file {} (PLUMB_MODEL, or default.plumb): {e}",
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
