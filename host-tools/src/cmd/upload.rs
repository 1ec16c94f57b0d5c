//! `plumb upload`: send a model file to a board over the link.

use crate::cmd::connect::{self, LinkArgs};
use crate::device::{self, UploadConfig, UploadOutcome};
use crate::error::{Error, Location, Result, EXIT_BAD_INPUT, EXIT_CLEAN};
use crate::events::{EventSink, Fan, LineFormat, LinePrinter, Names};
use crate::link::Received;
use crate::progress::Progress;
use clap::Args;
use plumb_model::file::ModelFile;
use plumb_model::wire::{DeviceMsg, Slot};
use std::path::PathBuf;

/// Long help of `plumb upload`.
pub const LONG_ABOUT: &str = "\
Upload a model file to a board over the link, in acknowledged chunks, into the slot that is
not running. The board keeps running its current model until the whole file has arrived
and passed every check (transfer CRC-32, the file's own CRC, format, dimensions against the
board's capacity, numeric validation); only then does it switch, and it says which slot,
model id and generation now run. A refusal names the reason, and the old model keeps
running. A lost chunk or acknowledgement is sent again; an interrupted upload changes
nothing on the board. A board built to trust a signing key (PLUMB_TRUSTED_KEY) also refuses
a file that is unsigned, signed by another key, or changed after signing (`plumb sign`).

The file is checked on the host first, and against the capacity (features, components,
mixture components) the board states in its greeting, before anything is sent; --unchecked
sends it anyway (to test a board).
Exit code 0 when the board switched, 2 when it refused or on a link error.";

/// Arguments of `plumb upload`.
#[derive(Debug, Clone, Args)]
pub struct UploadArgs {
    /// The model file (.plumb)
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    #[command(flatten)]
    pub link: LinkArgs,

    /// Bytes per chunk (1 to 128)
    #[arg(long, value_name = "N", default_value_t = 128, value_parser = clap::value_parser!(u16).range(1..=128))]
    pub chunk: u16,

    /// Send the file even if the host's own checks refuse it
    #[arg(long)]
    pub unchecked: bool,

    /// Print every message from the board, not just the verdict
    #[arg(short, long)]
    pub verbose: bool,

    /// One JSON object per line
    #[arg(long)]
    pub json: bool,
}

fn slot_name(s: Slot) -> &'static str {
    match s {
        Slot::A => "a",
        Slot::B => "b",
    }
}

/// Runs `plumb upload`.
pub fn run(args: UploadArgs) -> Result<u8> {
    let bytes = std::fs::read(&args.model).map_err(|e| Error::io(&args.model, "read", &e))?;
    // The board's framing check first: a file only the host reads (an older
    // format) would be refused by the board, so say so here.
    let names = match plumb_model::file::split(&bytes).and_then(|_| ModelFile::from_bytes(&bytes)) {
        Ok(f) => Names::from_labels(&f.labels),
        Err(e) if args.unchecked => {
            eprintln!("plumb: note: sending a file the host refuses ({e})");
            Names::default()
        }
        Err(e) => {
            return Err(Error::at(
                Location::file(&args.model),
                format!("not a usable model file: {e} (--unchecked sends it anyway)"),
            ))
        }
    };
    // What a board holds, as `plumb image` checks it, before the link is
    // opened; then against the capacity the board states in its greeting.
    let fits = |cap: &plumb_model::Capacity, whose: &str| -> Result<()> {
        match plumb_model::file::decode(&bytes, cap) {
            Ok(_) => Ok(()),
            Err(e) if args.unchecked => {
                eprintln!("plumb: note: sending a model {whose} refuses ({e})");
                Ok(())
            }
            Err(e) => Err(Error::at(
                Location::file(&args.model),
                format!(
                    "{whose} would refuse this model: {e} (it holds at most {} features, {} \
                     components and {} mixture components; --unchecked sends it anyway)",
                    cap.features, cap.components, cap.mixture
                ),
            )),
        }
    };
    fits(&plumb_model::Capacity::DEVICE, "a board")?;
    let format = if args.json {
        LineFormat::Json
    } else {
        LineFormat::Text
    };
    let mut printer = LinePrinter::new(std::io::stdout(), format, names);
    let mut link = args.link.open()?;
    let patience = args.link.patience();
    let verbose = args.verbose;
    let stage = Progress::stderr(args.json).stage("upload", bytes.len() as u64, true);
    let outcome = {
        let mut sinks: Vec<&mut dyn EventSink> = Vec::new();
        if verbose {
            sinks.push(&mut printer);
        }
        let mut fan = Fan(sinks);
        let res = (|| {
            let mut sink = |r: &Received| {
                // Events keep their place even when not verbose.
                if verbose
                    || matches!(
                        r.frame.msg,
                        DeviceMsg::DriftRaised(_)
                            | DeviceMsg::DriftCleared(_)
                            | DeviceMsg::SensorFault(_)
                    )
                {
                    fan.frame(r);
                }
            };
            let g = device::greeting(&mut link, patience, &mut sink)?;
            device::check_protocol(&g)?;
            fits(&g.capacity, "the board")?;
            let mut done = 0u64;
            let cfg = UploadConfig {
                chunk: usize::from(args.chunk),
                stop_after: None,
                patience,
            };
            device::upload(&mut link, &bytes, cfg, &mut sink, &mut |n| {
                stage.advance(n - done);
                done = n;
            })
        })();
        let fin = connect::finish(&mut link, &mut fan, format, !verbose);
        res.and_then(|o| fin.map(|()| o))
    };
    drop(stage);
    match outcome? {
        UploadOutcome::Switched {
            slot,
            model_id,
            generation,
        } => {
            if args.json {
                crate::outln!(
                    "{}",
                    serde_json::json!({"event": "switched", "slot": slot_name(slot), "model": model_id,
                        "generation": generation, "bytes": bytes.len()})
                );
            } else {
                crate::outln!(
                    "switched slot={} model={model_id:#010x} generation={generation} bytes={}",
                    slot_name(slot),
                    bytes.len()
                );
            }
            Ok(EXIT_CLEAN)
        }
        UploadOutcome::Refused { request, reason } => {
            let req = match request {
                plumb_model::wire::Request::UploadBegin => "upload-begin",
                plumb_model::wire::Request::UploadChunk => "upload-chunk",
                plumb_model::wire::Request::UploadCommit => "upload-commit",
            };
            if args.json {
                crate::outln!(
                    "{}",
                    serde_json::json!({"event": "refused", "request": req, "code": reason.code(),
                        "reason": reason.to_string()})
                );
            } else {
                crate::outln!(
                    "refused request={req} code={} reason={:?}",
                    reason.code(),
                    reason.to_string()
                );
            }
            eprintln!(
                "plumb: the board refused the model: {reason}; the running model is unchanged"
            );
            Ok(EXIT_BAD_INPUT)
        }
        UploadOutcome::Interrupted { acknowledged } => Err(Error::input(format!(
            "upload stopped after {acknowledged} bytes"
        ))),
    }
}
