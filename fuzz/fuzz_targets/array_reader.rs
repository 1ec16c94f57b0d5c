//! Arbitrary bytes as a NumPy `.npy` array log, with a header file of three
//! names (`t[s],a,b`) beside it, read with `LogSet::open`, counted, and
//! scanned whole and by head and tail. The last input byte picks what to do
//! with non-finite values.
//!
//! * Nothing panics, whatever the header text, shape or size says.
//! * Every error names the file.
//! * Rows come out in order, `d` values each, finite unless bad values pass
//!   as NaN, and the head and tail together are the whole.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plumb::logs::{BadCells, LogSet, ReadOptions};
use plumb_fuzz::logs::{exercise, located, scratch_dir, Kind};
use std::path::PathBuf;
use std::sync::OnceLock;

/// `a.npy` in the scratch folder, with its header file written once.
fn array_path() -> &'static PathBuf {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| {
        let dir = scratch_dir();
        std::fs::write(dir.join("a.header"), "t[s],a,b\n").expect("header file");
        dir.join("a.npy")
    })
}

fuzz_target!(|data: &[u8]| {
    let path = array_path();
    if std::fs::write(path, data).is_err() {
        return;
    }
    let bad = match data.last().map(|b| b % 3) {
        Some(0) | None => BadCells::Reject,
        Some(1) => BadCells::SkipRow,
        _ => BadCells::PassAsNan,
    };
    let opts = ReadOptions {
        bad_cells: bad,
        block_bytes: 4096,
        ..ReadOptions::default()
    };
    match LogSet::open(std::slice::from_ref(path), opts) {
        Ok(set) => {
            if let Some((rows, all)) = exercise(&set, path, bad, Kind::Array) {
                if bad != BadCells::SkipRow {
                    assert_eq!(all.len() as u64, rows, "rows read differ from the shape");
                }
            }
        }
        Err(e) => located(&e, path),
    }
});
