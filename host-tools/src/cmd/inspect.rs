//! `plumb inspect`: print what a model file holds.

use crate::cli::OutputArgs;
use crate::error::{Error, Location, Result, EXIT_CLEAN};
use crate::keys::{self, SignatureInfo};
use crate::summary::Summary;
use clap::Args;
use plumb_model::file::ModelFile;
use std::path::{Path, PathBuf};

/// Long help of `plumb inspect`.
pub const LONG_ABOUT: &str = "\
Print what a model file holds: identity, features, PCA, mixture, limits and sizes (the
same summary `plumb fit` prints, minus what only the fit knew), and whether it is signed
and by which key id. Per feature it also gives the constant bias on that feature alone that
moves the SPE's residual chart to its limit (flagged within a few times 1/lambda samples
from that size on; smaller ones only when the nominal wander adds the rest), and that bias as
a share of the feature's mean: about what a sensor offset or gain change must reach to
be flagged promptly. A damaged or foreign file is refused with the reason (bad magic,
unknown version, CRC mismatch, ...). With --trust KEY.pub the signature is checked too:
exit code 2 when the file is unsigned, signed by another key, or its signature does not
verify.";

/// Arguments of `plumb inspect`.
#[derive(Debug, Clone, Args)]
pub struct InspectArgs {
    /// The model file (.plumb)
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Check the signature against this public key file (from `plumb keygen`)
    #[arg(long, value_name = "KEY.pub")]
    pub trust: Option<PathBuf>,

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
    let bytes = std::fs::read(&args.model).map_err(|e| Error::io(&args.model, "read", &e))?;
    let info =
        SignatureInfo::of(&bytes).map_err(|e| e.with_location(Location::file(&args.model)))?;
    let check = match &args.trust {
        Some(p) => {
            let key = keys::read_public(p)?;
            Some((p, keys::verify(&bytes, &key)?))
        }
        None => None,
    };
    let mut summary = Summary::from_file(&file)?;
    // What the header says (a version 1 or 2 file is read as the current one).
    if let Ok(s) = plumb_model::file::split_host(&bytes) {
        summary.model.format_version = s.version;
    }
    if args.output.json {
        let mut v: serde_json::Value =
            serde_json::from_str(&summary.to_json()).map_err(|e| Error::input(e.to_string()))?;
        if let Some(o) = v.as_object_mut() {
            o.insert("signature".into(), signature_json(info, check.as_ref()));
        }
        crate::outln!(
            "{}",
            serde_json::to_string_pretty(&v).map_err(|e| Error::input(e.to_string()))?
        );
    } else if !args.output.quiet {
        crate::out!("{}", summary.to_text());
        crate::outln!("{}", signature_text(info, check.as_ref()));
    }
    match check {
        Some((p, Err(e))) => Err(Error::at(
            Location::file(&args.model),
            format!("signature check against {}: {e}", p.display()),
        )),
        _ => Ok(EXIT_CLEAN),
    }
}

type Check<'a> = (
    &'a PathBuf,
    std::result::Result<(), plumb_model::signature::SignatureError>,
);

/// The signature lines of the text summary.
pub fn signature_text(info: SignatureInfo, check: Option<&Check<'_>>) -> String {
    let mut s = String::from("\nSignature\n");
    s.push_str(&match info {
        SignatureInfo::Unsigned => {
            "  none (unsigned: boards built with a trusted key refuse it)".into()
        }
        SignatureInfo::Signed(id) => format!("  ed25519, key id {id}"),
    });
    if let Some((p, r)) = check {
        s.push_str(&match r {
            Ok(()) => format!("\n  verified with {}", p.display()),
            Err(e) => format!("\n  NOT verified with {}: {e}", p.display()),
        });
    }
    s
}

fn signature_json(info: SignatureInfo, check: Option<&Check<'_>>) -> serde_json::Value {
    let (signed, key_id) = match info {
        SignatureInfo::Unsigned => (false, None),
        SignatureInfo::Signed(id) => (true, Some(id.to_string())),
    };
    serde_json::json!({
        "signed": signed,
        "key_id": key_id,
        "verified": check.map(|(_, r)| r.is_ok()),
        "problem": check.and_then(|(_, r)| r.err().map(|e| e.to_string())),
    })
}
