//! Arbitrary bytes as a CSV log, read with `LogSet::open` (the file sets the
//! columns) and `LogSet::open_for_labels` (a model's labels do), then
//! scanned whole, counted, and scanned by head and tail (twice, so the
//! resume hints are used).
//!
//! The first input byte picks the options: time column `t` or none, what
//! to do with bad cells, the labels for `open_for_labels`, and whether the
//! rows are repeated past two read blocks.
//!
//! * Nothing panics.
//! * Every error names the file (and a line or cell where the header or
//!   a row is at fault).
//! * Rows come out in line order, `d` values each, finite unless bad cells
//!   pass as NaN.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plumb::logs::{BadCells, LogSet, ReadOptions};
use plumb_fuzz::logs::{exercise, located, scratch_dir, Kind};
use plumb_model::file::Label;

fuzz_target!(|data: &[u8]| {
    let Some((&mode, text)) = data.split_first() else {
        return;
    };
    let path = &scratch_dir().join("log.csv");
    if mode & 0x20 == 0 {
        std::fs::write(path, text).expect("scratch file");
    } else {
        // The rows again and again past two read blocks (4 KiB each), so
        // lines and carries cross block boundaries.
        let cut = text
            .iter()
            .position(|&b| b == b'\n')
            .map_or(text.len(), |p| p + 1);
        let (head, rows) = text.split_at(cut);
        let mut long = head.to_vec();
        while !rows.is_empty() && long.len() < 9000 {
            long.extend_from_slice(rows);
        }
        std::fs::write(path, long).expect("scratch file");
    }
    let paths = vec![path.to_path_buf()];
    let bad = match mode & 3 {
        0 => BadCells::Reject,
        1 => BadCells::SkipRow,
        _ => BadCells::PassAsNan,
    };
    let opts = ReadOptions {
        time_column: (mode & 4 == 0).then(|| "t".to_string()),
        bad_cells: bad,
        threads: 1,
        block_bytes: 1,
        ..ReadOptions::default()
    };

    match LogSet::open(&paths, opts.clone()) {
        Ok(set) => {
            exercise(&set, path, bad, Kind::Text);
        }
        Err(e) => located(&e, path),
    }

    let labels: Vec<Label> = match mode >> 3 & 3 {
        0 => vec![Label {
            name: "a".into(),
            unit: "V".into(),
        }],
        1 => vec![
            Label {
                name: "b".into(),
                unit: String::new(),
            },
            Label {
                name: "a".into(),
                unit: "V".into(),
            },
        ],
        2 => vec![Label {
            name: "t".into(),
            unit: "s".into(),
        }],
        _ => vec![Label {
            name: "x y".into(),
            unit: "m/s".into(),
        }],
    };
    match LogSet::open_for_labels(&paths, &labels, opts) {
        Ok(set) => {
            exercise(&set, path, bad, Kind::Text);
        }
        Err(e) => located(&e, path),
    }
});
