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
use plumb::error::Error;
use plumb::logs::{BadCells, LogSet, ReadOptions, Selection};
use plumb::progress::Stage;
use plumb_model::file::Label;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

fn scratch() -> &'static Path {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| {
        let dir = if Path::new("/dev/shm").is_dir() {
            PathBuf::from("/dev/shm")
        } else {
            std::env::temp_dir()
        };
        dir.join(format!("plumb-fuzz-csv-{}.csv", std::process::id()))
    })
}

fn located(e: &Error, path: &Path) {
    let loc = e
        .location
        .as_ref()
        .unwrap_or_else(|| panic!("error without a location: {e}"));
    assert_eq!(loc.path, path, "error names another file: {e}");
}

fn scan(set: &LogSet, sel: &Selection, path: &Path, bad: BadCells) -> Option<Vec<u64>> {
    let d = set.features();
    let mut lines = Vec::new();
    let r = set.for_each(sel, &Stage::hidden(), |c| {
        assert_eq!(c.d, d);
        assert_eq!(c.values.len(), c.rows() * d);
        assert!(c.times.is_empty() || c.times.len() == c.rows());
        if bad != BadCells::PassAsNan {
            assert!(c.values.iter().all(|v| v.is_finite()));
        }
        lines.extend_from_slice(&c.lines);
        Ok(())
    });
    match r {
        Ok(stats) => {
            assert_eq!(stats.total_rows(), lines.len() as u64);
            assert!(lines.windows(2).all(|w| w[0] < w[1]), "lines out of order");
            assert!(
                lines.iter().all(|&l| l >= 2),
                "a data row on the header line"
            );
            Some(lines)
        }
        Err(e) => {
            located(&e, path);
            let loc = e.location.as_ref().expect("checked");
            assert!(
                loc.line.is_some_and(|l| l >= 2),
                "row error without a line: {e}"
            );
            None
        }
    }
}

fn exercise(set: &LogSet, path: &Path, bad: BadCells) {
    let Some(all) = scan(set, &Selection::all(1), path, bad) else {
        return;
    };
    let counts = match set.count_lines(&Stage::hidden()) {
        Ok(c) => c,
        Err(e) => return located(&e, path),
    };
    assert_eq!(counts.len(), 1);
    let (head, tail) = Selection::split_tail(&counts, 0.3);
    let h = scan(set, &head, path, bad).expect("the whole file read");
    let t = scan(set, &tail, path, bad).expect("the whole file read");
    let t2 = scan(set, &tail, path, bad).expect("the whole file read");
    assert_eq!(t, t2, "a resumed scan differs");
    let joined: Vec<u64> = h.into_iter().chain(t).collect();
    assert_eq!(joined, all, "head + tail differ from the whole");
}

fuzz_target!(|data: &[u8]| {
    let Some((&mode, text)) = data.split_first() else {
        return;
    };
    let path = scratch();
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
        Ok(set) => exercise(&set, path, bad),
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
        Ok(set) => exercise(&set, path, bad),
        Err(e) => located(&e, path),
    }
});
