//! What the two log-reader targets (`csv_reader`, `array_reader`) share: a
//! scratch folder, the error checks, a scan that checks every chunk, and
//! the whole / head / tail comparison.

use plumb::error::Error;
use plumb::logs::{BadCells, LogSet, Selection};
use plumb::progress::Stage;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

/// A scratch folder of this process (in `/dev/shm` where there is one).
pub fn scratch_dir() -> &'static Path {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| {
        let dir = if Path::new("/dev/shm").is_dir() {
            PathBuf::from("/dev/shm")
        } else {
            std::env::temp_dir()
        };
        let dir = dir.join(format!("plumb-fuzz-logs-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("scratch folder");
        dir
    })
}

/// How a log names the place of a bad value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// A CSV log: a line (the header is line 1, rows from line 2).
    Text,
    /// An array log: a row.
    Array,
}

/// The error names `path` (or, for an array log, the header file beside
/// it).
pub fn located(e: &Error, path: &Path) {
    let loc = e
        .location
        .as_ref()
        .unwrap_or_else(|| panic!("error without a location: {e}"));
    assert!(
        loc.path == path || loc.path == path.with_extension("header"),
        "error names another file: {e}"
    );
}

/// Reads the selected rows, checking every chunk; the line numbers of the
/// rows, or `None` after an error (which must name the row's place).
pub fn scan(
    set: &LogSet,
    sel: &Selection,
    path: &Path,
    bad: BadCells,
    kind: Kind,
) -> Option<Vec<u64>> {
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
            assert_eq!(
                e.location.as_ref().map(|l| l.path.as_path()),
                Some(path),
                "{e}"
            );
            let loc = e.location.as_ref().expect("checked");
            match kind {
                Kind::Text => assert!(
                    loc.line.is_some_and(|l| l >= 2),
                    "row error without a line: {e}"
                ),
                Kind::Array => assert!(loc.row.is_some(), "value error without a row: {e}"),
            }
            None
        }
    }
}

/// Scans the whole file, counts its rows, then its head and tail (the tail
/// twice, so the second goes through the resume hints): head + tail must
/// be the whole. Returns the row count and the whole file's line numbers
/// when everything read.
pub fn exercise(set: &LogSet, path: &Path, bad: BadCells, kind: Kind) -> Option<(u64, Vec<u64>)> {
    let all = scan(set, &Selection::all(1), path, bad, kind)?;
    let counts = match set.count_lines(&Stage::hidden()) {
        Ok(c) => c,
        Err(e) => {
            located(&e, path);
            return None;
        }
    };
    assert_eq!(counts.len(), 1);
    let (head, tail) = Selection::split_tail(&counts, 0.3);
    let h = scan(set, &head, path, bad, kind).expect("the whole file read");
    let t = scan(set, &tail, path, bad, kind).expect("the whole file read");
    let t2 = scan(set, &tail, path, bad, kind).expect("the whole file read");
    assert_eq!(t, t2, "a resumed scan differs");
    let joined: Vec<u64> = h.into_iter().chain(t).collect();
    assert_eq!(joined, all, "head + tail differ from the whole");
    Some((counts[0], all))
}
