//! Logs stored as NumPy `.npy` arrays: read exactly as the same values in a
//! CSV log, with shape, element type and size checked and every bad value
//! named by row and column. (Files written by NumPy itself are read in
//! tests/tests/reference.rs.)

mod common;

use common::{log_text, plumb, Scratch};
use plumb::logs::{BadCells, LogSet, ReadOptions, Selection};
use plumb::progress::Stage;
use std::path::{Path, PathBuf};

/// An `.npy` file as NumPy's format description lays it out: magic,
/// version 1.0, header length, a dictionary literal padded with spaces to a
/// multiple of 64 bytes and ended by a newline, then the values.
fn npy_bytes(descr: &str, shape: &str, payload: &[u8]) -> Vec<u8> {
    let mut h = format!("{{'descr': {descr}, 'fortran_order': False, 'shape': {shape}, }}");
    let pad = (64 - (10 + h.len() + 1) % 64) % 64;
    h.push_str(&" ".repeat(pad));
    h.push('\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend_from_slice(&(h.len() as u16).to_le_bytes());
    out.extend_from_slice(h.as_bytes());
    out.extend_from_slice(payload);
    out
}

/// The header line and the rows of a CSV text.
fn csv_rows(text: &str) -> (String, Vec<Vec<f64>>) {
    let mut lines = text.lines();
    let header = lines.next().unwrap().to_string();
    let rows = lines
        .map(|l| l.split(',').map(|c| c.parse().unwrap()).collect())
        .collect();
    (header, rows)
}

/// Writes `rows` as a 2-D `<f8` array with its `.header` file.
fn write_f8(dir: &Scratch, stem: &str, header: &str, rows: &[Vec<f64>]) -> PathBuf {
    let payload: Vec<u8> = rows
        .iter()
        .flatten()
        .flat_map(|v| v.to_le_bytes())
        .collect();
    let shape = format!("({}, {})", rows.len(), rows[0].len());
    let p = dir.path(&format!("{stem}.npy"));
    std::fs::write(&p, npy_bytes("'<f8'", &shape, &payload)).unwrap();
    dir.write(&format!("{stem}.header"), &format!("{header}\n"));
    p
}

type Read = (Vec<f64>, Vec<u64>, Vec<f64>, u64);

fn read_all(set: &LogSet, sel: &Selection) -> plumb::error::Result<Read> {
    let mut values = Vec::new();
    let mut lines = Vec::new();
    let mut times = Vec::new();
    let stats = set.for_each(sel, &Stage::hidden(), |c| {
        values.extend_from_slice(&c.values);
        lines.extend_from_slice(&c.lines);
        times.extend_from_slice(&c.times);
        Ok(())
    })?;
    Ok((values, lines, times, stats.total_skipped()))
}

fn open(paths: &[PathBuf], opts: ReadOptions) -> plumb::error::Result<LogSet> {
    LogSet::open(paths, opts)
}

#[test]
fn an_array_reads_as_its_csv() {
    let d = Scratch::new("npy-same");
    let text = log_text(6, 5000, 3);
    let csv = d.write("a.csv", &text);
    let (header, rows) = csv_rows(&text);
    let npy = write_f8(&d, "a", &header, &rows);
    let from_csv = read_all(
        &open(std::slice::from_ref(&csv), ReadOptions::default()).unwrap(),
        &Selection::all(1),
    )
    .unwrap();
    assert_eq!(from_csv.1.len(), 5000);
    // Any block size and thread count: the same rows, times, and the line
    // numbers the CSV would give.
    for (threads, block) in [(1, 4096), (2, 4096), (2, 65_536), (2, 1 << 22)] {
        let opts = ReadOptions {
            threads,
            block_bytes: block,
            ..ReadOptions::default()
        };
        let set = open(std::slice::from_ref(&npy), opts).unwrap();
        assert_eq!(set.labels().len(), 6);
        assert_eq!(set.labels()[1].unit, "V");
        let got = read_all(&set, &Selection::all(1)).unwrap();
        assert_eq!(got, from_csv, "threads {threads}, block {block}");
    }
    // Without a time column every column is a feature: the layout the
    // array reader copies a block at a time.
    let no_time = |threads, block_bytes| ReadOptions {
        time_column: None,
        threads,
        block_bytes,
        ..ReadOptions::default()
    };
    let csv_all = read_all(
        &open(std::slice::from_ref(&csv), no_time(2, 1 << 22)).unwrap(),
        &Selection::all(1),
    )
    .unwrap();
    assert_eq!(csv_all.0.len(), 5000 * 7);
    for (threads, block) in [(1, 4096), (2, 65_536)] {
        let set = open(std::slice::from_ref(&npy), no_time(threads, block)).unwrap();
        let got = read_all(&set, &Selection::all(1)).unwrap();
        assert_eq!(
            got, csv_all,
            "no time column: threads {threads}, block {block}"
        );
    }
    // A CSV log and an array log with the same columns in one set.
    let both = open(&[csv, npy.clone()], ReadOptions::default()).unwrap();
    assert_eq!(
        read_all(&both, &Selection::all(2)).unwrap().0.len(),
        2 * 5000 * 6
    );
    // The rows of an array are counted from its shape; a tail split reads
    // the same rows as from the CSV.
    let set = open(&[npy], ReadOptions::default()).unwrap();
    let rows = set.count_lines(&Stage::hidden()).unwrap();
    assert_eq!(rows, vec![5000]);
    let (head, tail) = Selection::split_tail(&rows, 0.2);
    let t = read_all(&set, &tail).unwrap();
    assert_eq!(t.1.first(), Some(&(4000 + 2)));
    assert_eq!(t.0[..], from_csv.0[4000 * 6..]);
    assert_eq!(read_all(&set, &head).unwrap().0[..], from_csv.0[..4000 * 6]);
}

#[test]
fn structured_and_single_precision_arrays() {
    let d = Scratch::new("npy-struct");
    // Fields carry the names and units; f4 values widen exactly.
    let vals: [[f32; 3]; 3] = [[0.0, 1.5, -2.25], [0.1, 3.0, 4.0e-3], [0.2, -7.0, 8.5]];
    let payload: Vec<u8> = vals
        .iter()
        .flatten()
        .flat_map(|v| v.to_le_bytes())
        .collect();
    let p = d.path("s.npy");
    std::fs::write(
        &p,
        npy_bytes(
            "[('t[s]', '<f4'), ('a[A]', '<f4'), ('b', '<f4')]",
            "(3,)",
            &payload,
        ),
    )
    .unwrap();
    let set = open(std::slice::from_ref(&p), ReadOptions::default()).unwrap();
    let names: Vec<_> = set
        .labels()
        .iter()
        .map(|l| (l.name.as_str(), l.unit.as_str()))
        .collect();
    assert_eq!(names, [("a", "A"), ("b", "")]);
    assert_eq!(set.time_unit(), "s");
    let (v, l, t, _) = read_all(&set, &Selection::all(1)).unwrap();
    let want: Vec<f64> = vals
        .iter()
        .flat_map(|r| [r[1] as f64, r[2] as f64])
        .collect();
    assert_eq!(v, want);
    assert_eq!(l, [2, 3, 4]);
    assert_eq!(t, [0.0, f64::from(0.1f32), f64::from(0.2f32)]);
}

fn err(paths: &[PathBuf], opts: ReadOptions) -> String {
    match open(paths, opts.clone()) {
        Err(e) => e.to_string(),
        Ok(set) => read_all(&set, &Selection::all(paths.len()))
            .expect_err("expected an error")
            .to_string(),
    }
}

fn name(p: &Path) -> String {
    p.display().to_string()
}

#[test]
fn bad_arrays_are_refused_with_where_and_what() {
    let d = Scratch::new("npy-bad");
    let rows = vec![
        vec![0.0, 1.0, 2.0],
        vec![0.1, f64::NAN, 3.0],
        vec![0.2, 4.0, 5.0],
    ];
    let p = write_f8(&d, "nan", "t[s],a,b", &rows);
    // A non-finite value: row (NumPy's 0-based index), column and name.
    let e = err(std::slice::from_ref(&p), ReadOptions::default());
    assert!(
        e.contains(&format!(
            "{}: row 1, column 2 (a): expected a finite number, found NaN",
            name(&p)
        )),
        "{e}"
    );
    // ... or skipped and counted, or passed on as NaN.
    let skip = ReadOptions {
        bad_cells: BadCells::SkipRow,
        ..ReadOptions::default()
    };
    let set = open(std::slice::from_ref(&p), skip).unwrap();
    let (v, l, _, skipped) = read_all(&set, &Selection::all(1)).unwrap();
    assert_eq!((v, l, skipped), (vec![1.0, 2.0, 4.0, 5.0], vec![2, 4], 1));
    let pass = ReadOptions {
        bad_cells: BadCells::PassAsNan,
        ..ReadOptions::default()
    };
    let set = open(std::slice::from_ref(&p), pass).unwrap();
    assert!(read_all(&set, &Selection::all(1)).unwrap().0[2].is_nan());
    // The same without a time column: every column a feature, the layout
    // the reader copies a block at a time before it looks at single rows.
    let no_time = |bad_cells| ReadOptions {
        time_column: None,
        bad_cells,
        ..ReadOptions::default()
    };
    let e = err(std::slice::from_ref(&p), no_time(BadCells::Reject));
    assert!(
        e.contains(&format!(
            "{}: row 1, column 2 (a): expected a finite number, found NaN",
            name(&p)
        )),
        "{e}"
    );
    let set = open(std::slice::from_ref(&p), no_time(BadCells::SkipRow)).unwrap();
    let (v, l, _, skipped) = read_all(&set, &Selection::all(1)).unwrap();
    assert_eq!(
        (v, l, skipped),
        (vec![0.0, 1.0, 2.0, 0.2, 4.0, 5.0], vec![2, 4], 1)
    );

    // No header file beside a 2-D array.
    std::fs::remove_file(d.path("nan.header")).unwrap();
    let e = err(std::slice::from_ref(&p), ReadOptions::default());
    assert!(
        e.contains("takes its column names from a header file") && e.contains("nan.header"),
        "{e}"
    );
    // A header file with the wrong number of names.
    d.write("nan.header", "t[s],a\n");
    let e = err(std::slice::from_ref(&p), ReadOptions::default());
    assert!(
        e.contains("nan.header:1: expected 3 column names for the 3 columns"),
        "{e}"
    );
    // Duplicate names in the header file: named there.
    d.write("nan.header", "t[s],a,a\n");
    let e = err(std::slice::from_ref(&p), ReadOptions::default());
    assert!(
        e.contains("nan.header:1:3 (a): duplicate column name"),
        "{e}"
    );

    // Cut short by one byte: refused before any row is read.
    let good = write_f8(&d, "cut", "t[s],a,b", &rows[..1]);
    let mut bytes = std::fs::read(&good).unwrap();
    bytes.pop();
    std::fs::write(&good, &bytes).unwrap();
    let e = err(std::slice::from_ref(&good), ReadOptions::default());
    assert!(
        e.contains("expected 152 bytes (1 rows of 24 bytes after a 128-byte header), found 151"),
        "{e}"
    );

    // Not an array at all, and an array of integers.
    let text = d.write("text.npy", "t,a,b\n1,2,3\n");
    let e = err(&[text], ReadOptions::default());
    assert!(e.contains("expected a NumPy .npy file"), "{e}");
    let ints = d.path("ints.npy");
    std::fs::write(&ints, npy_bytes("'<i8'", "(1, 3)", &[0u8; 24])).unwrap();
    d.write("ints.header", "t,a,b\n");
    let e = err(&[ints], ReadOptions::default());
    assert!(e.contains("found element type \"<i8\""), "{e}");
}

#[test]
fn fit_and_replay_take_array_logs() {
    let d = Scratch::new("npy-cli");
    let text = log_text(6, 3000, 9);
    let csv = d.write("train.csv", &text);
    let (header, rows) = csv_rows(&text);
    let npy = write_f8(&d, "train", &header, &rows);
    let fit = |log: &Path, out: &str| {
        let o = plumb(&[
            "fit",
            log.to_str().unwrap(),
            "--out",
            d.path(out).to_str().unwrap(),
            "--json",
            "--quiet",
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        serde_json::from_slice::<serde_json::Value>(&o.stdout).unwrap()
    };
    let (a, b) = (fit(&csv, "a.plumb"), fit(&npy, "b.plumb"));
    // Same values, other chunk boundaries: the moments are summed in another
    // order, so the fits agree to rounding, not bit for bit. The model stores
    // f32 values (unit 6e-8), and a loading one unit off moves a calibrated
    // limit by a few units: 1e-5 relative leaves a margin of about 100.
    let limits = |v: &serde_json::Value| -> Vec<f64> {
        v["limits"]
            .as_array()
            .unwrap()
            .iter()
            .flat_map(|l| {
                [
                    "sample_limit",
                    "center",
                    "spread",
                    "cusum_limit",
                    "ewma_limit",
                ]
                .map(|k| l[k].as_f64().unwrap())
            })
            .collect()
    };
    let (la, lb) = (limits(&a), limits(&b));
    assert_eq!(la.len(), 15);
    for (x, y) in la.iter().zip(&lb) {
        assert!((x - y).abs() <= 1e-5 * x.abs(), "limit {x} vs {y}");
    }
    let ev = |v: &serde_json::Value| -> Vec<f64> {
        v["fit"]["pca"]["eigenvalues"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect()
    };
    let (ea, eb) = (ev(&a), ev(&b));
    assert_eq!(ea.len(), 6);
    // Eigenvalues in f64 from sums over 2,400 rows in two orders: 1e-9 of
    // the largest is about 10⁷ double-precision units, far above the
    // difference of two summation orders and far below any real change.
    for (x, y) in ea.iter().zip(&eb) {
        assert!((x - y).abs() <= 1e-9 * ea[0], "eigenvalue {x} vs {y}");
    }
    // Replay: the detector sees the same numbers, so its flags are the same.
    let replay = |log: &Path| {
        let o = plumb(&[
            "replay",
            d.path("a.plumb").to_str().unwrap(),
            log.to_str().unwrap(),
            "--json",
        ]);
        let mut v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        v["logs"][0]["path"] = serde_json::Value::Null;
        (o.status.code(), v)
    };
    assert_eq!(replay(&csv), replay(&npy));
    // Bad input: exit code 2 with the place.
    let mut bad = rows.clone();
    bad[17][3] = f64::INFINITY;
    let p = write_f8(&d, "bad", &header, &bad);
    let o = plumb(&[
        "fit",
        p.to_str().unwrap(),
        "--out",
        d.path("c.plumb").to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(2));
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("bad.npy: row 17, column 4 (x2): expected a finite number, found inf"),
        "{e}"
    );
    assert!(!d.path("c.plumb").exists());
}
