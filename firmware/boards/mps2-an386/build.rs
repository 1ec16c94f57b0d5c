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

fn main() {
    let out = PathBuf::from(env::var_os("OUT_DIR").expect("OUT_DIR is set by cargo"));
    fs::copy("memory.x", out.join("memory.x")).expect("copy memory.x into OUT_DIR");
    println!("cargo:rustc-link-search={}", out.display());
    println!("cargo:rerun-if-changed=memory.x");
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

    trusted_key(&out);
}

/// The signing key the endpoint trusts: `$PLUMB_TRUSTED_KEY`, a public key
/// file from `plumb keygen` (one line `plumb-ed25519-public` and 64 hex
/// digits; relative paths from this directory). Needed exactly when the
/// `trusted-key` feature is on (one without the other stops the build, so
/// a key is never silently ignored). Written to `$OUT_DIR/trusted_key.rs`
/// as `TRUSTED_KEY: [u8; 32]`.
fn trusted_key(out: &std::path::Path) {
    println!("cargo:rerun-if-env-changed=PLUMB_TRUSTED_KEY");
    let feature = env::var_os("CARGO_FEATURE_TRUSTED_KEY").is_some();
    let path = match env::var_os("PLUMB_TRUSTED_KEY") {
        Some(p) if !p.is_empty() => PathBuf::from(p),
        _ => {
            assert!(
                !feature,
                "the trusted-key feature needs PLUMB_TRUSTED_KEY=FILE.pub (from `plumb keygen`)"
            );
            return;
        }
    };
    assert!(
        feature,
        "PLUMB_TRUSTED_KEY is set: build with `--features trusted-key` so the board checks \
         signatures (without it the key would be ignored)"
    );
    println!("cargo:rerun-if-changed={}", path.display());
    let text = fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("cannot read PLUMB_TRUSTED_KEY={}: {e}", path.display()));
    let hex = text
        .trim()
        .strip_prefix("plumb-ed25519-public ")
        .unwrap_or_else(|| {
            panic!(
                "{} is not a public key file from `plumb keygen` \
                 (expected `plumb-ed25519-public HEX`)",
                path.display()
            )
        })
        .trim();
    let bytes: Vec<u8> = (0..hex.len() / 2)
        .map(|i| u8::from_str_radix(&hex[2 * i..2 * i + 2], 16))
        .collect::<Result<_, _>>()
        .ok()
        .filter(|b: &Vec<u8>| b.len() == 32 && hex.len() == 64)
        .unwrap_or_else(|| panic!("{}: the key is not 64 hex digits", path.display()));
    fs::write(
        out.join("trusted_key.rs"),
        format!(
            "/// Public key whose signatures this build requires (PLUMB_TRUSTED_KEY).\n\
             pub const TRUSTED_KEY: [u8; 32] = {bytes:?};\n"
        ),
    )
    .expect("write trusted_key.rs into OUT_DIR");
}
