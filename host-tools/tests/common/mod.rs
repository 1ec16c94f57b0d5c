//! Helpers shared by the integration tests: scratch folders and small
//! synthetic logs.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

/// A scratch folder removed on drop.
pub struct Scratch(pub PathBuf);

static COUNTER: AtomicUsize = AtomicUsize::new(0);

impl Scratch {
    pub fn new(tag: &str) -> Self {
        let n = COUNTER.fetch_add(1, Ordering::SeqCst);
        let dir = std::env::temp_dir().join(format!("plumb-test-{}-{tag}-{n}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        Scratch(dir)
    }

    pub fn path(&self, name: &str) -> PathBuf {
        self.0.join(name)
    }

    pub fn write(&self, name: &str, text: &str) -> PathBuf {
        let p = self.path(name);
        std::fs::write(&p, text).unwrap();
        p
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// A small deterministic generator (64-bit LCG, Box–Muller normals).
pub struct Lcg(u64);

impl Lcg {
    pub fn new(seed: u64) -> Self {
        Lcg(seed
            .wrapping_mul(2862933555777941757)
            .wrapping_add(3037000493))
    }
    pub fn uniform(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((self.0 >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    pub fn normal(&mut self) -> f64 {
        let (u1, u2) = (self.uniform(), self.uniform());
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }
}

/// Header `t[s],x0[A],x1[V],...` with `d` features.
pub fn header(d: usize) -> String {
    let mut h = String::from("t[s]");
    for j in 0..d {
        h.push_str(&format!(",x{j}[{}]", if j % 2 == 0 { "A" } else { "V" }));
    }
    h
}

/// `rows` rows of `d` correlated features (two latent factors plus noise).
pub fn log_text(d: usize, rows: usize, seed: u64) -> String {
    let mut r = Lcg::new(seed);
    let mut s = header(d);
    s.push('\n');
    for i in 0..rows {
        let a = r.normal();
        let b = r.normal();
        s.push_str(&format!("{:.2}", i as f64 * 0.01));
        for j in 0..d {
            let v = 5.0 * j as f64
                + (1.0 + j as f64 * 0.1) * a
                + (j % 3) as f64 * 0.5 * b
                + 0.2 * r.normal();
            s.push_str(&format!(",{v:.5}"));
        }
        s.push('\n');
    }
    s
}

/// Lines of a log, to edit one before writing.
pub fn lines(text: &str) -> Vec<String> {
    text.lines().map(str::to_string).collect()
}

pub fn join(lines: &[String]) -> String {
    let mut s = lines.join("\n");
    s.push('\n');
    s
}

pub fn exists(p: &Path) -> bool {
    p.exists()
}

/// Runs the `plumb` binary of this package with `args`.
pub fn plumb(args: &[&str]) -> std::process::Output {
    std::process::Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args(args)
        .output()
        .expect("run plumb")
}

/// Runs `plumb` with `args` and asserts that it succeeded (exit 0), showing
/// its standard error otherwise.
pub fn plumb_ok(args: &[&str]) -> std::process::Output {
    let o = plumb(args);
    assert_eq!(
        o.status.code(),
        Some(0),
        "plumb {}: {}",
        args.join(" "),
        String::from_utf8_lossy(&o.stderr)
    );
    o
}

/// A path inside the committed demo logs.
pub fn demo(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../demo-logs")
        .join(rel)
}

/// For each label of a model file, the position of its column in a log's
/// header line (`name[unit]` or `name`); panics when one is missing.
pub fn model_columns(labels: &[plumb_model::file::Label], header_line: &str) -> Vec<usize> {
    let header: Vec<&str> = header_line.split(',').collect();
    labels
        .iter()
        .map(|l| {
            header
                .iter()
                .position(|h| h.split('[').next() == Some(l.name.as_str()))
                .unwrap_or_else(|| panic!("no column {} in {header_line}", l.name))
        })
        .collect()
}
