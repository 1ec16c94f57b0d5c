//! `plumb inspect`: print what a model file holds.

use crate::cli::OutputArgs;
use crate::error::{Error, Location, Result, EXIT_CLEAN};
use crate::summary::Summary;
use clap::Args;
use plumb_model::file::ModelFile;
use std::path::{Path, PathBuf};

/// Long help of `plumb inspect`.
pub const LONG_ABOUT: &str = "\
Print what a model file holds: identity, features, PCA, mixture, limits and sizes (the
same summary `plumb fit` prints, minus what only the fit knew). A damaged or foreign file
is refused with the reason (bad magic, unknown version, CRC mismatch, ...).";

/// Arguments of `plumb inspect`.
#[derive(Debug, Clone, Args)]
pub struct InspectArgs {
    /// The model file (.plumb)
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    #[command(flatten)]
    pub output: OutputArgs,
}

/// Reads and validates a model file, naming the path on any error.
pub fn read_model(path: &Path) -> Result<ModelFile> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, "read", &e))?;
    ModelFile::from_bytes(&bytes).map_err(|e| {
        Error::at(
            Location::file(path),
            format!("not a usable model file: {e}"),
        )
    })
}

/// Runs `plumb inspect`.
pub fn run(args: InspectArgs) -> Result<u8> {
    let file = read_model(&args.model)?;
    let summary = Summary::from_file(&file)?;
    if args.output.json {
        println!("{}", summary.to_json());
    } else if !args.output.quiet {
        print!("{}", summary.to_text());
    }
    Ok(EXIT_CLEAN)
}
