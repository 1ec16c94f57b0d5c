//! `plumb keygen`: a new ed25519 key pair for signing model files.

use crate::error::{Result, EXIT_CLEAN};
use crate::keys::{self, SigningKey};
use clap::Args;
use std::path::PathBuf;

/// Long help of `plumb keygen`.
pub const LONG_ABOUT: &str = "\
Make a new ed25519 key pair for signing model files: the secret key goes to KEY (readable by
its owner only; keep it off the robots) and the public key to KEY.pub. Sign models with
`plumb sign MODEL --key KEY --out SIGNED`; build a board that runs only models signed by
this key with PLUMB_TRUSTED_KEY=KEY.pub and --features trusted-key (see the board's README). Prints the key id (the
first 8 bytes of SHA-512 of the public key, as `plumb inspect` and board refusals show it).
Existing files are not overwritten unless --force.";

/// Arguments of `plumb keygen`.
#[derive(Debug, Clone, Args)]
pub struct KeygenArgs {
    /// Secret key file to write (the public key goes to the same path plus .pub)
    #[arg(long, value_name = "KEY")]
    pub out: PathBuf,

    /// Replace existing key files
    #[arg(long)]
    pub force: bool,

    /// Print nothing
    #[arg(short, long)]
    pub quiet: bool,
}

/// Runs `plumb keygen`.
pub fn run(args: KeygenArgs) -> Result<u8> {
    let key = SigningKey::generate()?;
    let public = keys::write_pair(&key, &args.out, args.force)?;
    if !args.quiet {
        crate::outln!("key id {}", key.id());
        crate::outln!("secret key {} (keep it private)", args.out.display());
        crate::outln!(
            "public key {} (build a board with PLUMB_TRUSTED_KEY={} \
             and --features trusted-key)",
            public.display(),
            public.display()
        );
    }
    Ok(EXIT_CLEAN)
}
