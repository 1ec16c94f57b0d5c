//! Output files: never one of the command's inputs, and never left
//! half-written.
//!
//! [`check_outputs`] runs before any work and refuses an output that is the
//! same file as an input (or as another output). [`TempOutput`] writes an
//! output to a temporary file beside it and renames it into place when
//! [`TempOutput::commit`] is called; dropped without a commit (any error),
//! the temporary file is removed and an existing file at the path is left
//! as it was.

use crate::error::{Error, Location, Result};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

/// A file the command writes: the option that names it and the path.
#[derive(Debug, Clone, Copy)]
pub struct Output<'a> {
    /// The option, e.g. `--out`.
    pub option: &'a str,
    /// The path given.
    pub path: &'a Path,
}

/// A file the command reads: what it is (`model`, `log`, `key`, ...) and
/// the path.
#[derive(Debug, Clone, Copy)]
pub struct Input<'a> {
    /// What the file is to the command.
    pub what: &'a str,
    /// The path given (or found in a folder given).
    pub path: &'a Path,
}

/// Whether `a` and `b` name the same file: equal as given, or the same file
/// once symbolic links and `.`/`..` are resolved (both must exist for
/// that), or, on Unix, the same inode (hard links).
pub fn same_file(a: &Path, b: &Path) -> bool {
    if a == b {
        return true;
    }
    match (std::fs::canonicalize(a), std::fs::canonicalize(b)) {
        (Ok(x), Ok(y)) if x == y => return true,
        _ => {}
    }
    #[cfg(unix)]
    {
        use std::os::unix::fs::MetadataExt;
        if let (Ok(x), Ok(y)) = (std::fs::metadata(a), std::fs::metadata(b)) {
            return x.dev() == y.dev() && x.ino() == y.ino();
        }
    }
    false
}

/// Refuses, before any work, an output that is the same file as an input
/// or as another output (exit code 2, naming the option and the input).
pub fn check_outputs(outputs: &[Output<'_>], inputs: &[Input<'_>]) -> Result<()> {
    for (i, out) in outputs.iter().enumerate() {
        for input in inputs {
            if same_file(out.path, input.path) {
                return Err(Error::input(format!(
                    "{} {} is also an input ({}{}); choose another file",
                    out.option,
                    out.path.display(),
                    input.what,
                    if input.path == out.path {
                        String::new()
                    } else {
                        format!(" {}", input.path.display())
                    }
                )));
            }
        }
        for other in &outputs[..i] {
            if same_file(out.path, other.path) {
                return Err(Error::input(format!(
                    "{} {} is also the file of {}; choose another file",
                    out.option,
                    out.path.display(),
                    other.option
                )));
            }
        }
    }
    Ok(())
}

/// A folder given where a file to write is expected.
pub fn refuse_folder(option: &str, path: &Path) -> Result<()> {
    if path.is_dir() {
        return Err(Error::input(format!(
            "{option} {} is a folder; expected a file name",
            path.display()
        )));
    }
    Ok(())
}

static COUNTER: AtomicUsize = AtomicUsize::new(0);

/// An output being written to a temporary file beside it (same folder, so
/// the rename is atomic). [`commit`](TempOutput::commit) renames it into
/// place; dropping it uncommitted removes the temporary file.
#[derive(Debug)]
pub struct TempOutput {
    path: PathBuf,
    tmp: PathBuf,
    done: bool,
}

impl TempOutput {
    /// Creates the temporary file for `path` and opens it for writing. A
    /// folder at `path`, or a folder for it that does not exist, is refused
    /// here, before any work.
    pub fn create(path: &Path) -> Result<(TempOutput, std::fs::File)> {
        TempOutput::open(path, false)
    }

    /// As [`create`](TempOutput::create), the temporary file readable and
    /// writable by its owner only (on Unix), for secrets.
    pub fn create_private(path: &Path) -> Result<(TempOutput, std::fs::File)> {
        TempOutput::open(path, true)
    }

    fn open(path: &Path, private: bool) -> Result<(TempOutput, std::fs::File)> {
        if path.is_dir() {
            return Err(Error::at(
                Location::file(path),
                "is a folder; expected a file name",
            ));
        }
        if path.file_name().is_none() {
            return Err(Error::at(Location::file(path), "expected a file name"));
        }
        let dir = match path.parent() {
            Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
            _ => PathBuf::from("."),
        };
        // Short and fixed in length: a name that fits its folder gets a
        // temporary name that fits too.
        let n = COUNTER.fetch_add(1, Ordering::Relaxed);
        let tmp = dir.join(format!(".{}-{n}.plumb.tmp", std::process::id()));
        let mut opts = std::fs::OpenOptions::new();
        opts.write(true).create_new(true);
        #[cfg(unix)]
        if private {
            use std::os::unix::fs::OpenOptionsExt;
            opts.mode(0o600);
        }
        #[cfg(not(unix))]
        let _ = private;
        let f = opts.open(&tmp).map_err(|e| Error::io(path, "create", &e))?;
        Ok((
            TempOutput {
                path: path.to_path_buf(),
                tmp,
                done: false,
            },
            f,
        ))
    }

    /// The final path.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The temporary file.
    pub fn temp_path(&self) -> &Path {
        &self.tmp
    }

    /// Renames the temporary file into place. Writes through a handle still
    /// open go on to the file at its new name.
    pub fn commit(mut self) -> Result<()> {
        std::fs::rename(&self.tmp, &self.path).map_err(|e| Error::io(&self.path, "write", &e))?;
        self.done = true;
        Ok(())
    }
}

impl Drop for TempOutput {
    fn drop(&mut self) {
        if !self.done {
            let _ = std::fs::remove_file(&self.tmp);
        }
    }
}

/// Writes `bytes` to `path` atomically: a temporary file in the same
/// folder, flushed to disk, then renamed over `path`. On any error the
/// temporary file is removed and `path` is untouched.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    use std::io::Write;
    let (out, mut f) = TempOutput::create(path)?;
    f.write_all(bytes)
        .and_then(|()| f.sync_all())
        .map_err(|e| Error::io(path, "write", &e))?;
    drop(f);
    out.commit()
}

/// A buffered output written atomically: [`finish`](AtomicWriter::finish)
/// flushes it and renames it into place; dropped unfinished, nothing is
/// left.
#[derive(Debug)]
pub struct AtomicWriter {
    place: TempOutput,
    w: std::io::BufWriter<std::fs::File>,
}

impl AtomicWriter {
    /// Starts writing `path` (to a temporary file beside it).
    pub fn create(path: &Path) -> Result<AtomicWriter> {
        let (place, f) = TempOutput::create(path)?;
        Ok(AtomicWriter {
            place,
            w: std::io::BufWriter::new(f),
        })
    }

    /// The final path.
    pub fn path(&self) -> &Path {
        self.place.path()
    }

    /// Flushes to disk and renames into place.
    pub fn finish(self) -> Result<()> {
        use std::io::Write;
        let AtomicWriter { place, mut w } = self;
        let path = place.path().to_path_buf();
        w.flush().map_err(|e| Error::io(&path, "write", &e))?;
        let f = w
            .into_inner()
            .map_err(|e| Error::io(&path, "write", e.error()))?;
        f.sync_all().map_err(|e| Error::io(&path, "write", &e))?;
        drop(f);
        place.commit()
    }
}

impl std::io::Write for AtomicWriter {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.w.write(buf)
    }
    fn flush(&mut self) -> std::io::Result<()> {
        self.w.flush()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Write;

    fn scratch(tag: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("plumb-files-{}-{tag}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        d
    }

    #[test]
    fn an_output_that_is_an_input_is_refused_by_any_name() {
        let d = scratch("same");
        let a = d.join("a.csv");
        std::fs::write(&a, "x\n").unwrap();
        let dotted = d.join(".").join("a.csv");
        let other = d.join("b.csv");
        let log = Input {
            what: "log",
            path: &a,
        };
        let e = check_outputs(
            &[Output {
                option: "--trace",
                path: &dotted,
            }],
            &[log],
        )
        .unwrap_err();
        assert!(
            e.to_string().contains("--trace") && e.to_string().contains("is also an input (log"),
            "{e}"
        );
        assert_eq!(e.code, 2);
        check_outputs(
            &[Output {
                option: "--out",
                path: &other,
            }],
            &[log],
        )
        .unwrap();
        // Two outputs on one file.
        let e = check_outputs(
            &[
                Output {
                    option: "--trace",
                    path: &other,
                },
                Output {
                    option: "--record",
                    path: &other,
                },
            ],
            &[],
        )
        .unwrap_err();
        assert!(e.to_string().contains("--record"), "{e}");
        #[cfg(unix)]
        {
            let link = d.join("hard.csv");
            std::fs::hard_link(&a, &link).unwrap();
            assert!(same_file(&a, &link));
        }
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn an_unfinished_output_leaves_the_old_file_and_no_temporary() {
        let d = scratch("atomic");
        let p = d.join("keep.csv");
        std::fs::write(&p, "old\n").unwrap();
        {
            let mut w = AtomicWriter::create(&p).unwrap();
            writeln!(w, "partial").unwrap();
            w.flush().unwrap();
        }
        assert_eq!(std::fs::read_to_string(&p).unwrap(), "old\n");
        let mut w = AtomicWriter::create(&p).unwrap();
        writeln!(w, "new").unwrap();
        w.finish().unwrap();
        assert_eq!(std::fs::read_to_string(&p).unwrap(), "new\n");
        let left: Vec<_> = std::fs::read_dir(&d)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .filter(|n| n.to_string_lossy().ends_with(".plumb.tmp"))
            .collect();
        assert!(left.is_empty(), "{left:?}");
        let _ = std::fs::remove_dir_all(&d);
    }
}
