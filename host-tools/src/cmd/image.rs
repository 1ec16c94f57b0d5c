//! `plumb image`: a flashable image of a board's model slot.

use crate::boards::{self, SlotImage, DATA_OFFSET};
use crate::error::{Error, Location, Result, EXIT_CLEAN};
use crate::files::{self, Input, Output};
use clap::{Args, ValueEnum};
use plumb_model::file::ModelFile;
use plumb_model::wire::Slot;
use std::path::PathBuf;

/// Long help of `plumb image`.
pub const LONG_ABOUT: &str = "\
Write a flashable image of one model slot of a board: the slot record (generation, length
and CRC-32 of the file, and a CRC of those) at the slot's address and the model file 256
bytes after it, at the addresses the board reserves (see its README and memory.x). At reset
the board runs the valid slot with the highest generation, so an image with a generation
above the other slot's takes over.

Formats: Intel HEX (addresses included, extended linear address records; the gap between
record and file is left out) or raw binary (from the slot's address, gap filled with the
board's erased value; give the tool that flashes it the base address printed here).";

/// Slot names on the command line.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum SlotArg {
    /// Slot A.
    A,
    /// Slot B.
    B,
}

/// Image formats.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ImageFormat {
    /// Intel HEX.
    Hex,
    /// Raw binary from the slot's base address.
    Bin,
}

/// Arguments of `plumb image`.
#[derive(Debug, Clone, Args)]
pub struct ImageArgs {
    /// The model file (.plumb)
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// The board: mps2-an386 or blackpill-f411
    #[arg(long, value_name = "BOARD")]
    pub board: String,

    /// The slot
    #[arg(long, value_enum)]
    pub slot: SlotArg,

    /// Where to write the image (written atomically; not the model file)
    #[arg(short, long, value_name = "FILE")]
    pub out: PathBuf,

    /// Image format (default: hex, or bin when FILE ends in .bin)
    #[arg(long, value_enum)]
    pub format: Option<ImageFormat>,

    /// Generation written in the record (the board boots the highest valid one)
    #[arg(long, value_name = "N", default_value_t = 1)]
    pub generation: u32,
}

/// Runs `plumb image`.
pub fn run(args: ImageArgs) -> Result<u8> {
    files::check_outputs(
        &[Output {
            option: "--out",
            path: &args.out,
        }],
        &[Input {
            what: "model",
            path: &args.model,
        }],
    )?;
    let bytes = std::fs::read(&args.model).map_err(|e| Error::io(&args.model, "read", &e))?;
    ModelFile::from_bytes(&bytes).map_err(|e| {
        Error::at(
            Location::file(&args.model),
            format!("not a usable model file: {e}"),
        )
    })?;
    // What the board itself will accept.
    plumb_model::file::decode(&bytes, &plumb_model::Capacity::DEVICE).map_err(|e| {
        Error::at(
            Location::file(&args.model),
            format!("a board would refuse this model: {e}"),
        )
    })?;
    let board = boards::board(&args.board)?;
    let slot = match args.slot {
        SlotArg::A => Slot::A,
        SlotArg::B => Slot::B,
    };
    let image = SlotImage::new(board, slot, &bytes, args.generation)
        .map_err(|e| Error::at(Location::file(&args.model), e.message))?;
    let format = args.format.unwrap_or_else(|| {
        if args
            .out
            .extension()
            .is_some_and(|e| e.eq_ignore_ascii_case("bin"))
        {
            ImageFormat::Bin
        } else {
            ImageFormat::Hex
        }
    });
    let data = match format {
        ImageFormat::Hex => image.to_hex().into_bytes(),
        ImageFormat::Bin => image.to_bin(),
    };
    files::write_atomic(&args.out, &data)?;
    crate::outln!(
        "wrote {} ({} image, {} bytes): board {} slot {} at {:#010x} (record) and {:#010x} (file, {} bytes), generation {}",
        args.out.display(),
        match format {
            ImageFormat::Hex => "Intel HEX",
            ImageFormat::Bin => "raw binary",
        },
        data.len(),
        board.name,
        match slot {
            Slot::A => "a",
            Slot::B => "b",
        },
        image.base,
        image.base + DATA_OFFSET,
        bytes.len(),
        args.generation
    );
    crate::outln!("load it with: {}", board.how);
    Ok(EXIT_CLEAN)
}
