//! The board build scripts' shared part: the trusted signing key.
//!
//! Included by each board's `build.rs` with `#[path]` (the boards are separate
//! cargo projects, so this is a file, not a crate).

use std::env;
use std::fs;
use std::path::{Path, PathBuf};

/// The signing key the endpoint trusts: `$PLUMB_TRUSTED_KEY`, a public key
/// file from `plumb keygen` (one line `plumb-ed25519-public` and 64 hex
/// digits; relative paths from this directory). Needed exactly when the
/// `trusted-key` feature is on (one without the other stops the build, so
/// a key is never silently ignored). Written to `$OUT_DIR/trusted_key.rs`
/// as `TRUSTED_KEY: [u8; 32]`.
pub fn trusted_key(out: &Path) {
    println!("cargo:rerun-if-changed=../build-support/trusted_key.rs");
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
