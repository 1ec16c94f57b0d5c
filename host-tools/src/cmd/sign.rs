//! `plumb sign`: sign a model file with a secret key.

use crate::cmd::inspect::read_model;
use crate::error::{Error, Location, Result, EXIT_CLEAN};
use crate::files::{self, Input, Output};
use crate::keys::{self, SigningKey};
use clap::Args;
use std::path::PathBuf;

/// Long help of `plumb sign`.
pub const LONG_ABOUT: &str = "\
Sign a model file with an ed25519 secret key from `plumb keygen`: the output is the same
model with flag bit 0 set, the key id and the signature of everything before it, and a new
CRC-32 (shared-model/FORMAT.md, \"Signature\"). A board built with PLUMB_TRUSTED_KEY runs
only models signed by that key; other boards and the host tools read signed files like
unsigned ones. Signing is deterministic; signing a signed file replaces its signature. The
model is checked before it is signed, and the signature is checked before it is written.";

/// Arguments of `plumb sign`.
#[derive(Debug, Clone, Args)]
pub struct SignArgs {
    /// The model file (.plumb)
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Secret key file from `plumb keygen`
    #[arg(long, value_name = "KEY")]
    pub key: PathBuf,

    /// Where to write the signed model, atomically (may be MODEL itself, not KEY)
    #[arg(long, value_name = "SIGNED")]
    pub out: PathBuf,

    /// Print nothing
    #[arg(short, long)]
    pub quiet: bool,
}

/// Runs `plumb sign`.
pub fn run(args: SignArgs) -> Result<u8> {
    // MODEL itself may be the output (it is replaced atomically); the key may not.
    files::check_outputs(
        &[Output {
            option: "--out",
            path: &args.out,
        }],
        &[Input {
            what: "secret key",
            path: &args.key,
        }],
    )?;
    // The whole file must be a valid model (framing, CRC, values, labels).
    read_model(&args.model)?;
    let bytes = std::fs::read(&args.model).map_err(|e| Error::io(&args.model, "read", &e))?;
    let key: SigningKey = keys::read_secret(&args.key)?;
    let signed = key
        .sign(&bytes)
        .map_err(|e| e.with_location(Location::file(&args.model)))?;
    let trusted = plumb_model::signature::TrustedKey::new(key.public());
    if let Err(e) = keys::verify(&signed, &trusted)? {
        return Err(Error::input(format!(
            "the signature just made does not verify ({e}); nothing written"
        )));
    }
    files::write_atomic(&args.out, &signed)?;
    if !args.quiet {
        crate::outln!(
            "signed {} with key id {} -> {} ({} bytes)",
            args.model.display(),
            key.id(),
            args.out.display(),
            signed.len()
        );
    }
    Ok(EXIT_CLEAN)
}
