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
use plumb::logs::{BadCells, LogSet, ReadOptions, Selection};
use plumb::progress::Stage;
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
        let dir = dir.join(format!("plumb-fuzz-npy-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("scratch folder");
        std::fs::write(dir.join("a.header"), "t[s],a,b\n").expect("header file");
        dir.join("a.npy")
    })
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
            assert!(lines.windows(2).all(|w| w[0] < w[1]), "rows out of order");
            Some(lines)
        }
        Err(e) => {
            let loc = e.location.as_ref().expect("error without a location");
            assert_eq!(loc.path, path, "error names another file: {e}");
            assert!(loc.row.is_some(), "value error without a row: {e}");
            None
        }
    }
}

fuzz_target!(|data: &[u8]| {
    let path = scratch();
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
    let set = match LogSet::open(&[path.to_path_buf()], opts) {
        Ok(set) => set,
        Err(e) => {
            let loc = e.location.as_ref().expect("error without a location");
            assert!(
                loc.path == path || loc.path == path.with_extension("header"),
                "error names another file: {e}"
            );
            return;
        }
    };
    let rows = set
        .count_lines(&Stage::hidden())
        .expect("rows from the shape");
    let Some(all) = scan(&set, &Selection::all(1), path, bad) else {
        return;
    };
    if bad != BadCells::SkipRow {
        assert_eq!(all.len() as u64, rows[0]);
    }
    let (head, tail) = Selection::split_tail(&rows, 0.3);
    let h = scan(&set, &head, path, bad).expect("head of a readable file");
    let t = scan(&set, &tail, path, bad).expect("tail of a readable file");
    assert_eq!([h, t].concat(), all);
});
