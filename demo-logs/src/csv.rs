//! Writing logs in the plumbline CSV convention.

use std::fmt::Write as _;
use std::fs::{self, File};
use std::io::{self, BufWriter, Write};
use std::path::{Path, PathBuf};

use crate::features::{self, Res, FEATURES, N};
use crate::sim::Sim;

/// Appends `v` printed at resolution `res` (`NaN` for a missing reading).
pub(crate) fn push_value(buf: &mut String, v: f64, res: Res) {
    if v.is_nan() {
        buf.push_str("NaN");
        return;
    }
    let decimals = match res {
        Res::Fixed(d) => d,
        Res::Sig(s) => sig_decimals(v, s),
    };
    let start = buf.len();
    write!(buf, "{v:.decimals$}").expect("writing to a String cannot fail");
    // A tiny negative value prints as "-0.000": drop the sign.
    if buf[start..].starts_with('-') && buf[start + 1..].bytes().all(|b| b == b'0' || b == b'.') {
        buf.remove(start);
    }
}

/// Decimals needed to show `sig` significant digits of `v`.
fn sig_decimals(v: f64, sig: usize) -> usize {
    let a = v.abs();
    if a == 0.0 || !a.is_finite() {
        return sig;
    }
    // Decimal exponent by exact comparisons (no platform log10).
    let mut e: i32 = 0;
    let mut p = 1.0;
    if a >= 1.0 {
        while a >= p * 10.0 && e < 300 {
            p *= 10.0;
            e += 1;
        }
    } else {
        while a < p && e > -300 {
            p /= 10.0;
            e -= 1;
        }
    }
    (sig as i32 - 1 - e).max(0) as usize
}

/// Appends the time cell for data row `row` (exact tenths of a second).
pub(crate) fn push_time(buf: &mut String, row: usize) {
    write!(buf, "{}.{}", row / 10, row % 10).expect("writing to a String cannot fail");
}

/// Writes `rows` rows of `sim` to `path` (through a temporary file that is
/// renamed into place, so a reader never sees half a log).
pub(crate) fn write_log(path: &Path, sim: &mut Sim, rows: usize) -> io::Result<()> {
    if let Some(dir) = path.parent() {
        if !dir.as_os_str().is_empty() {
            fs::create_dir_all(dir).map_err(|e| with_path(e, dir))?;
        }
    }
    let mut tmp_name = path.file_name().unwrap_or_default().to_os_string();
    tmp_name.push(".plumb.tmp");
    let tmp: PathBuf = path.with_file_name(tmp_name);
    let result = (|| {
        let file = File::create(&tmp)?;
        let mut w = BufWriter::with_capacity(1 << 16, file);
        w.write_all(features::header().as_bytes())?;
        w.write_all(b"\n")?;
        let mut line = String::with_capacity(256);
        let mut x = [0.0; N];
        for row in 0..rows {
            sim.step(&mut x);
            line.clear();
            push_time(&mut line, row);
            for (v, f) in x.iter().zip(FEATURES) {
                line.push(',');
                push_value(&mut line, *v, f.res);
            }
            line.push('\n');
            w.write_all(line.as_bytes())?;
        }
        w.flush()?;
        drop(w);
        fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    result.map_err(|e| with_path(e, path))
}

/// Adds the path to an I/O error's message.
pub(crate) fn with_path(e: io::Error, path: &Path) -> io::Error {
    io::Error::new(e.kind(), format!("{}: {e}", path.display()))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fmt(v: f64, res: Res) -> String {
        let mut s = String::new();
        push_value(&mut s, v, res);
        s
    }

    #[test]
    fn formatting() {
        assert_eq!(fmt(1.23456, Res::Fixed(3)), "1.235");
        assert_eq!(fmt(-0.0001, Res::Fixed(3)), "0.000");
        assert_eq!(fmt(-0.5, Res::Fixed(2)), "-0.50");
        assert_eq!(fmt(f64::NAN, Res::Fixed(2)), "NaN");
        assert_eq!(fmt(0.0123456, Res::Sig(4)), "0.01235");
        assert_eq!(fmt(0.000051234, Res::Sig(4)), "0.00005123");
        assert_eq!(fmt(0.1, Res::Sig(4)), "0.1000");
        assert_eq!(fmt(12.5, Res::Sig(4)), "12.50");
        assert_eq!(fmt(12345.0, Res::Sig(4)), "12345");
        let mut s = String::new();
        push_time(&mut s, 123);
        assert_eq!(s, "12.3");
    }
}
