//! Reading robot logs: CSV files with a header row of feature names, or
//! NumPy `.npy` arrays of the same columns.
//!
//! # The log convention
//!
//! * The first line is a header. A feature column is named `name[unit]`, or a
//!   bare `name` when unitless. Names may be wrapped in double quotes.
//! * One column is the time column (by default `t`, as in `t[s]`); it is not a
//!   feature. [`ReadOptions::time_column`] renames it or says there is none.
//! * Units can also come from a sidecar CSV of `name,unit` rows
//!   ([`read_units`]); a unit given there wins over the header.
//! * Cells are plain numbers (`1.5`, `-2e-3`, ...); `NaN`, `inf` and empty
//!   cells are sensor dropouts, handled by [`BadCells`]. Lines may end in
//!   `\n` or `\r\n`; blank lines are ignored (they still count for line
//!   numbers). A UTF-8 byte-order mark before the header is ignored.
//! * Columns are matched by name across files: the first file sets the order
//!   ([`LogSet::open`]), or a model's labels do ([`LogSet::open_for_labels`]).
//!
//! # Array logs
//!
//! A file whose name ends in `.npy` is a NumPy array ([`crate::npy`]) of
//! little-endian `f8` or `f4` values in C order, read without any text
//! parsing:
//!
//! * a 2-D array `(rows, columns)` takes its column names from a header
//!   file beside it with the extension `.header` (`run.npy` → `run.header`):
//!   one line, exactly as a CSV log's header, units and time column
//!   included;
//! * a 1-D structured array whose fields are all `f8` or all `f4` carries
//!   its column names (`name[unit]`) as field names.
//!
//! NaN and infinite values are dropouts as in a CSV log; errors name the
//! 0-based row (NumPy's index) and the 1-based column. A file whose size
//! does not match its shape (truncated, or with bytes after the values) is
//! refused before any row is read.
//!
//! # Streaming
//!
//! Files are read in blocks (4 MiB by default) cut at line ends; each block is
//! split at a line end near its middle and the two halves are parsed (and
//! passed through the caller's `map`) on two threads, then handed to the
//! caller's `reduce` in file order. The halves depend only on the bytes, not
//! on the thread count, so results are the same with one thread or two.
//! Memory is a few blocks, whatever the number of rows.
//!
//! Every error names `path:line:column (name)`: 1-based line, 1-based field
//! number, and the column's name (array logs: `path: row R, column C
//! (name)`).

use crate::error::{Error, Location, Result};
use crate::npy::{self, ArrayHeader, Element};
use crate::progress::Stage;
use plumb_model::file::Label;
use std::collections::BTreeMap;
use std::fs::File;
use std::io::Read;
use std::ops::Range;
use std::path::{Path, PathBuf};

/// What to do with empty, NaN or infinite cells (sensor dropouts). Text that
/// is not a number is always an error.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum BadCells {
    /// Stop with an error naming the cell (the default for fitting).
    #[default]
    Reject,
    /// Leave the row out and count it.
    SkipRow,
    /// Keep the row; the bad cell becomes NaN (replay: the detector counts
    /// the fault).
    PassAsNan,
}

/// How to read logs.
#[derive(Debug, Clone)]
pub struct ReadOptions {
    /// Name of the time column (`None`: the logs have no time column).
    pub time_column: Option<String>,
    /// Units by column name; they win over the units in the header.
    pub units: BTreeMap<String, String>,
    /// Empty and non-finite cells.
    pub bad_cells: BadCells,
    /// Parser threads: 1 or 2 (results do not depend on it).
    pub threads: usize,
    /// Read block size in bytes.
    pub block_bytes: usize,
}

impl Default for ReadOptions {
    fn default() -> Self {
        ReadOptions {
            time_column: Some("t".to_string()),
            units: BTreeMap::new(),
            bad_cells: BadCells::Reject,
            threads: 2,
            block_bytes: 4 << 20,
        }
    }
}

/// The header row of a log of samples: the time column `name[unit]` (if
/// any), then each feature as `name[unit]` (bare `name` without a unit), as
/// the log reader reads it back.
pub fn header_line(labels: &[Label], time: Option<(&str, &str)>) -> String {
    let mut cols: Vec<String> = Vec::new();
    if let Some((name, unit)) = time {
        cols.push(if unit.is_empty() {
            name.to_string()
        } else {
            format!("{name}[{unit}]")
        });
    }
    for l in labels {
        cols.push(if l.unit.is_empty() {
            l.name.clone()
        } else {
            format!("{}[{}]", l.name, l.unit)
        });
    }
    cols.join(",")
}

/// Splits a header cell `name[unit]` into name and unit (empty when absent).
pub fn split_name_unit(cell: &str) -> (&str, &str) {
    let cell = cell.trim();
    if let Some(stripped) = cell.strip_suffix(']') {
        if let Some(open) = stripped.rfind('[') {
            return (stripped[..open].trim(), stripped[open + 1..].trim());
        }
    }
    (cell, "")
}

/// Expands inputs: a file stays as given, a directory gives all its `*.csv`
/// and `*.npy` files (not recursive), sorted by name.
pub fn expand_paths(inputs: &[PathBuf]) -> Result<Vec<PathBuf>> {
    let mut out = Vec::new();
    for input in inputs {
        let meta = std::fs::metadata(input).map_err(|e| Error::io(input, "read", &e))?;
        if meta.is_dir() {
            let mut found: Vec<PathBuf> = std::fs::read_dir(input)
                .map_err(|e| Error::io(input, "list directory", &e))?
                .filter_map(|entry| entry.ok().map(|e| e.path()))
                .filter(|p| {
                    p.is_file()
                        && p.extension().is_some_and(|x| {
                            x.eq_ignore_ascii_case("csv") || x.eq_ignore_ascii_case("npy")
                        })
                })
                .collect();
            if found.is_empty() {
                return Err(Error::at(
                    Location::file(input),
                    "directory holds no *.csv or *.npy logs",
                ));
            }
            found.sort();
            out.extend(found);
        } else {
            out.push(input.clone());
        }
    }
    if out.is_empty() {
        return Err(Error::input("no logs given"));
    }
    Ok(out)
}

/// Reads a units sidecar: one `name,unit` row per column. A first row
/// `name,unit` is taken as a header and skipped. Blank lines are ignored.
pub fn read_units(path: &Path) -> Result<BTreeMap<String, String>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, "read", &e))?;
    let mut units = BTreeMap::new();
    for (i, raw) in text.lines().enumerate() {
        let line_no = i as u64 + 1;
        let raw = raw.trim_start_matches('\u{feff}');
        if raw.trim().is_empty() {
            continue;
        }
        let cells = split_header_line(raw);
        if cells.len() != 2 {
            return Err(Error::at(
                Location::line(path, line_no),
                format!("expected 2 fields (name,unit), found {}", cells.len()),
            ));
        }
        let (name, unit) = (cells[0].trim(), cells[1].trim());
        if i == 0 && name == "name" && unit == "unit" {
            continue;
        }
        if name.is_empty() {
            return Err(Error::at(
                Location::cell(path, line_no, 1, ""),
                "empty column name",
            ));
        }
        if units.insert(name.to_string(), unit.to_string()).is_some() {
            return Err(Error::at(
                Location::cell(path, line_no, 1, name),
                "column named twice in the units file",
            ));
        }
    }
    Ok(units)
}

/// Splits a header line at commas, honouring double quotes (`""` inside
/// quotes is one quote).
fn split_header_line(line: &str) -> Vec<String> {
    let mut cells = Vec::new();
    let mut cur = String::new();
    let mut quoted = false;
    let mut chars = line.chars().peekable();
    while let Some(c) = chars.next() {
        match c {
            '"' if quoted && chars.peek() == Some(&'"') => {
                cur.push('"');
                chars.next();
            }
            '"' => quoted = !quoted,
            ',' if !quoted => cells.push(std::mem::take(&mut cur)),
            _ => cur.push(c),
        }
    }
    cells.push(cur);
    cells
}

/// What a field of a file feeds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Target {
    Time,
    Feature(usize),
    Ignore,
}

/// One log file of a [`LogSet`]: its path, size and column layout.
#[derive(Debug, Clone)]
pub struct LogFile {
    /// The file.
    pub path: PathBuf,
    /// Size in bytes.
    pub bytes: u64,
    /// Byte offset of the first data line.
    data_offset: u64,
    /// Header names (unit stripped), one per field.
    names: Vec<String>,
    /// What each field feeds.
    targets: Vec<Target>,
    /// Field index of each feature, in label order.
    feature_fields: Vec<usize>,
    /// Where the column names were read.
    names_at: NamesAt,
    /// Shape and element type of an array log (`None`: a CSV log).
    array: Option<ArrayHeader>,
}

/// Where a file's column names come from.
#[derive(Debug, Clone, PartialEq, Eq)]
enum NamesAt {
    /// Line 1 of this text file (the log itself, or an array's header file).
    Line1(PathBuf),
    /// The field names of a structured array.
    Fields(PathBuf),
}

impl NamesAt {
    /// Where the names are, as a whole.
    fn whole(&self) -> Location {
        match self {
            NamesAt::Line1(p) => Location::line(p, 1),
            NamesAt::Fields(p) => Location::file(p),
        }
    }

    /// Where field `f` (0-based) is named.
    fn cell(&self, f: usize, name: &str) -> Location {
        match self {
            NamesAt::Line1(p) => Location::cell(p, 1, f + 1, name),
            NamesAt::Fields(p) => Location {
                column: Some(f + 1),
                name: Some(name.to_string()),
                ..Location::file(p)
            },
        }
    }
}

impl LogFile {
    /// Fields per line.
    pub fn fields(&self) -> usize {
        self.names.len()
    }

    /// Where the column names of this file are.
    pub fn header_location(&self) -> Location {
        self.names_at.whole()
    }

    /// Where feature `j`'s column is named.
    pub fn feature_location(&self, j: usize, name: &str) -> Location {
        self.names_at.cell(self.feature_fields[j], name)
    }

    /// Rows of an array log (`None` for a CSV log, whose lines must be
    /// counted).
    pub fn array_rows(&self) -> Option<u64> {
        self.array.as_ref().map(|a| a.rows)
    }

    /// 1-based field number of feature `j` in this file.
    pub fn feature_column(&self, j: usize) -> usize {
        self.feature_fields[j] + 1
    }
}

/// Rows of a scan, per file: a range of 0-based data-line indices (data line
/// `i` is line `i + 2` of the file).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Selection(pub Vec<Range<u64>>);

impl Selection {
    /// Every row of `files` files.
    pub fn all(files: usize) -> Self {
        Selection(vec![0..u64::MAX; files])
    }

    /// Splits each file into a head and its last `fraction` of data lines
    /// (rounded to the nearest line). `lines` comes from
    /// [`LogSet::count_lines`].
    pub fn split_tail(lines: &[u64], fraction: f64) -> (Selection, Selection) {
        let mut head = Vec::with_capacity(lines.len());
        let mut tail = Vec::with_capacity(lines.len());
        for &n in lines {
            let hold = ((n as f64) * fraction).round().clamp(0.0, n as f64) as u64;
            head.push(0..n - hold);
            tail.push(n - hold..n);
        }
        (Selection(head), Selection(tail))
    }
}

/// A run of consecutive rows of one file, features in label order.
#[derive(Debug, Clone, Default)]
pub struct Chunk {
    /// Index of the file in the [`LogSet`].
    pub file: usize,
    /// Features per row.
    pub d: usize,
    /// Row-major values, `rows × d`.
    pub values: Vec<f64>,
    /// Time of each row (empty when there is no time column).
    pub times: Vec<f64>,
    /// 1-based line number of each row (array logs: the 0-based row + 2,
    /// the line the row would have in a CSV log).
    pub lines: Vec<u64>,
    /// Rows left out because of empty or non-finite cells.
    pub skipped: u64,
}

impl Chunk {
    /// Rows in the chunk.
    pub fn rows(&self) -> usize {
        self.lines.len()
    }

    /// Row `i`.
    pub fn row(&self, i: usize) -> &[f64] {
        &self.values[i * self.d..(i + 1) * self.d]
    }

    /// Iterator over rows.
    pub fn iter_rows(&self) -> std::slice::ChunksExact<'_, f64> {
        self.values.chunks_exact(self.d.max(1))
    }
}

/// Counts from a scan.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ScanStats {
    /// Rows delivered, per file.
    pub rows: Vec<u64>,
    /// Rows skipped for empty or non-finite cells, per file.
    pub skipped: Vec<u64>,
}

impl ScanStats {
    /// Rows delivered in all files.
    pub fn total_rows(&self) -> u64 {
        self.rows.iter().sum()
    }

    /// Rows skipped in all files.
    pub fn total_skipped(&self) -> u64 {
        self.skipped.iter().sum()
    }
}

/// A set of logs with one column layout.
#[derive(Debug, Clone)]
pub struct LogSet {
    files: Vec<LogFile>,
    labels: Vec<Label>,
    time_unit: String,
    opts: ReadOptions,
    hints: Hints,
}

/// Where a scan of a file may resume: byte offset of a span start, bytes
/// carried over into it, and the line number there. Keyed by file, first
/// selected data line and block size, so a repeated scan of a file's tail
/// (calibration rounds) seeks instead of reading the head again, and still
/// sees the very same spans.
type Hints = std::sync::Arc<std::sync::Mutex<BTreeMap<(usize, u64, usize), (u64, usize, u64)>>>;

/// Header of one file as read.
struct RawHeader {
    cells: Vec<String>,
    data_offset: u64,
    bytes: u64,
    names_at: NamesAt,
    array: Option<ArrayHeader>,
}

/// Whether `path` names an array log (`.npy`).
pub fn is_array_log(path: &Path) -> bool {
    path.extension()
        .is_some_and(|x| x.eq_ignore_ascii_case("npy"))
}

fn read_header(path: &Path) -> Result<RawHeader> {
    if is_array_log(path) {
        read_array_header(path)
    } else {
        read_text_header(path)
    }
}

/// The header of an array log: shape and element type from the file, names
/// from its fields or its header file; the size checked against the shape.
fn read_array_header(path: &Path) -> Result<RawHeader> {
    use std::io::{Seek, SeekFrom};
    let io = |e: std::io::Error| Error::io(path, "read", &e);
    let bad = |e: npy::HeaderError| Error::at(Location::file(path), e.0);
    let mut f = File::open(path).map_err(io)?;
    let bytes = f.metadata().map_err(io)?.len();
    let mut start = [0u8; 12];
    let n = read_full(&mut f, &mut start).map_err(io)?;
    let (pre, len) = npy::prefix(&start[..n]).map_err(bad)?;
    let mut text = vec![0u8; len];
    f.seek(SeekFrom::Start(pre as u64)).map_err(io)?;
    if read_full(&mut f, &mut text).map_err(io)? < len {
        return Err(bad(npy::HeaderError(
            "file ends inside the .npy header".into(),
        )));
    }
    let data_offset = (pre + len) as u64;
    let h = npy::parse_header(&text, data_offset).map_err(bad)?;
    let expected = h
        .rows
        .checked_mul(h.row_bytes())
        .and_then(|b| b.checked_add(data_offset));
    if expected != Some(bytes) {
        return Err(Error::at(
            Location::file(path),
            format!(
                "expected {} bytes ({} rows of {} bytes after a {data_offset}-byte header), \
                 found {bytes}: the file is cut short or has bytes after its values",
                expected.map_or_else(|| "more than 2^64".to_string(), |b| b.to_string()),
                h.rows,
                h.row_bytes(),
            ),
        ));
    }
    let (cells, names_at) = match &h.names {
        Some(names) => (names.clone(), NamesAt::Fields(path.to_path_buf())),
        None => {
            let side = path.with_extension("header");
            if !side.is_file() {
                return Err(Error::at(
                    Location::file(path),
                    format!(
                        "a 2-D array log takes its column names from a header file beside \
                         it: expected {}, one line of names as in a CSV log's header",
                        side.display()
                    ),
                ));
            }
            let raw = read_text_header(&side)?;
            if raw.cells.len() != h.columns {
                return Err(Error::at(
                    Location::line(&side, 1),
                    format!(
                        "expected {} column names for the {} columns of {}, found {}",
                        h.columns,
                        h.columns,
                        path.display(),
                        raw.cells.len()
                    ),
                ));
            }
            (raw.cells, NamesAt::Line1(side))
        }
    };
    Ok(RawHeader {
        cells,
        data_offset,
        bytes,
        names_at,
        array: Some(h),
    })
}

fn read_text_header(path: &Path) -> Result<RawHeader> {
    let mut f = File::open(path).map_err(|e| Error::io(path, "read", &e))?;
    let bytes = f.metadata().map_err(|e| Error::io(path, "read", &e))?.len();
    let mut buf = Vec::new();
    let mut block = vec![0u8; 64 << 10];
    let end = loop {
        let n = f
            .read(&mut block)
            .map_err(|e| Error::io(path, "read", &e))?;
        buf.extend_from_slice(&block[..n]);
        if let Some(pos) = memchr::memchr(b'\n', &buf) {
            break pos;
        }
        if n == 0 {
            break buf.len();
        }
        if buf.len() > 16 << 20 {
            return Err(Error::at(
                Location::line(path, 1),
                "header line longer than 16 MiB (is this a CSV log?)",
            ));
        }
    };
    let data_offset = (end + 1).min(buf.len()) as u64;
    let mut line = &buf[..end];
    if line.ends_with(b"\r") {
        line = &line[..line.len() - 1];
    }
    if line.starts_with(&[0xEF, 0xBB, 0xBF]) {
        line = &line[3..];
    }
    let text = std::str::from_utf8(line).map_err(|_| {
        Error::at(
            Location::line(path, 1),
            "header is not UTF-8 text (is this a CSV log?)",
        )
    })?;
    if text.trim().is_empty() {
        return Err(Error::at(
            Location::line(path, 1),
            "expected a header row of column names, found an empty line",
        ));
    }
    Ok(RawHeader {
        cells: split_header_line(text),
        data_offset,
        bytes,
        names_at: NamesAt::Line1(path.to_path_buf()),
        array: None,
    })
}

/// A parsed header: names and units per field, time field, checked for
/// empty and duplicate names.
struct Header {
    raw: RawHeader,
    names: Vec<String>,
    units: Vec<String>,
    time: Option<usize>,
}

fn parse_header(path: &Path, opts: &ReadOptions) -> Result<Header> {
    let raw = read_header(path)?;
    let mut names = Vec::with_capacity(raw.cells.len());
    let mut units = Vec::with_capacity(raw.cells.len());
    let mut seen: BTreeMap<String, usize> = BTreeMap::new();
    for (f, cell) in raw.cells.iter().enumerate() {
        let (name, unit) = split_name_unit(cell);
        if name.is_empty() {
            return Err(Error::at(
                raw.names_at.cell(f, ""),
                format!("expected a column name, found {:?}", cell.trim()),
            ));
        }
        if let Some(first) = seen.insert(name.to_string(), f) {
            return Err(Error::at(
                raw.names_at.cell(f, name),
                format!("duplicate column name (first at column {})", first + 1),
            ));
        }
        let unit = opts.units.get(name).map(String::as_str).unwrap_or(unit);
        names.push(name.to_string());
        units.push(unit.to_string());
    }
    let time = match &opts.time_column {
        None => None,
        Some(t) => match seen.get(t.as_str()) {
            Some(&f) => Some(f),
            None => {
                return Err(Error::at(
                    raw.names_at.whole().named(t),
                    format!(
                        "no time column {t:?} in the header (name it with --time-column NAME, \
                         or say --time-column none)"
                    ),
                ))
            }
        },
    };
    Ok(Header {
        raw,
        names,
        units,
        time,
    })
}

impl LogSet {
    /// Opens logs whose columns are matched by name; the first file sets the
    /// feature order. A later file missing a column, or with a column the
    /// first lacks, or with a different unit, is an error.
    pub fn open(paths: &[PathBuf], opts: ReadOptions) -> Result<LogSet> {
        let first = paths.first().ok_or_else(|| Error::input("no logs given"))?;
        let h = parse_header(first, &opts)?;
        let labels: Vec<Label> = h
            .names
            .iter()
            .zip(&h.units)
            .enumerate()
            .filter(|(f, _)| Some(*f) != h.time)
            .map(|(_, (n, u))| Label {
                name: n.clone(),
                unit: u.clone(),
            })
            .collect();
        if labels.is_empty() {
            return Err(Error::at(
                h.raw.names_at.whole(),
                "expected at least one feature column besides the time column",
            ));
        }
        Self::check_units(&opts, paths, &h.names)?;
        let time_unit = h.time.map(|t| h.units[t].clone()).unwrap_or_default();
        let mut set = LogSet {
            files: Vec::with_capacity(paths.len()),
            labels,
            time_unit,
            opts,
            hints: Hints::default(),
        };
        set.files.push(set.layout(first, h, false)?);
        for p in &paths[1..] {
            let h = parse_header(p, &set.opts)?;
            let file = set.layout(p, h, false).map_err(|e| {
                let msg = format!(
                    "{} (the first log, {}, sets the columns)",
                    e.message,
                    first.display()
                );
                Error { message: msg, ..e }
            })?;
            set.files.push(file);
        }
        Ok(set)
    }

    /// Opens logs mapped to a model's labels: features come out in label
    /// order; extra columns are ignored; a missing column, or a unit in the
    /// header that differs from the label's, is an error.
    pub fn open_for_labels(
        paths: &[PathBuf],
        labels: &[Label],
        opts: ReadOptions,
    ) -> Result<LogSet> {
        if paths.is_empty() {
            return Err(Error::input("no logs given"));
        }
        if labels.is_empty() {
            return Err(Error::input(
                "the model has no labels: its feature names are unknown",
            ));
        }
        let mut set = LogSet {
            files: Vec::with_capacity(paths.len()),
            labels: labels.to_vec(),
            time_unit: String::new(),
            opts,
            hints: Hints::default(),
        };
        for p in paths {
            let h = parse_header(p, &set.opts)?;
            if set.files.is_empty() {
                set.time_unit = h.time.map(|t| h.units[t].clone()).unwrap_or_default();
            }
            let file = set.layout(p, h, true)?;
            set.files.push(file);
        }
        Ok(set)
    }

    fn check_units(opts: &ReadOptions, paths: &[PathBuf], names: &[String]) -> Result<()> {
        for name in opts.units.keys() {
            if !names.iter().any(|n| n == name) {
                return Err(Error::input(format!(
                    "the units file names a column {name:?} that {} does not have",
                    paths[0].display()
                )));
            }
        }
        Ok(())
    }

    /// Maps one file's header onto the labels.
    fn layout(&self, path: &Path, h: Header, ignore_extra: bool) -> Result<LogFile> {
        let mut targets = vec![Target::Ignore; h.names.len()];
        if let Some(t) = h.time {
            targets[t] = Target::Time;
        }
        let mut feature_fields = Vec::with_capacity(self.labels.len());
        for (j, label) in self.labels.iter().enumerate() {
            let Some(f) = h.names.iter().position(|n| *n == label.name) else {
                return Err(Error::at(
                    h.raw.names_at.whole().named(&label.name),
                    format!("expected a column named {:?}, found none", label.name),
                ));
            };
            if Some(f) == h.time {
                return Err(Error::at(
                    h.raw.names_at.cell(f, &label.name),
                    "this column is the time column here but a feature elsewhere",
                ));
            }
            let unit = &h.units[f];
            if *unit != label.unit && !(ignore_extra && unit.is_empty()) {
                return Err(Error::at(
                    h.raw.names_at.cell(f, &label.name),
                    format!("expected unit {:?}, found {:?}", label.unit, unit),
                ));
            }
            targets[f] = Target::Feature(j);
            feature_fields.push(f);
        }
        if !ignore_extra {
            if let Some(f) = targets
                .iter()
                .enumerate()
                .position(|(f, t)| *t == Target::Ignore && Some(f) != h.time)
            {
                return Err(Error::at(
                    h.raw.names_at.cell(f, &h.names[f]),
                    "unexpected column: not in the first log",
                ));
            }
        }
        Ok(LogFile {
            path: path.to_path_buf(),
            bytes: h.raw.bytes,
            data_offset: h.raw.data_offset,
            names: h.names,
            targets,
            feature_fields,
            names_at: h.raw.names_at,
            array: h.raw.array,
        })
    }

    /// Feature labels, in output order.
    pub fn labels(&self) -> &[Label] {
        &self.labels
    }

    /// Features per row.
    pub fn features(&self) -> usize {
        self.labels.len()
    }

    /// The files, in reading order.
    pub fn files(&self) -> &[LogFile] {
        &self.files
    }

    /// The reading options.
    pub fn options(&self) -> &ReadOptions {
        &self.opts
    }

    /// Unit of the time column in the first file (empty when not given).
    pub fn time_unit(&self) -> &str {
        &self.time_unit
    }

    /// Microseconds per unit of the time column: `s` (or no unit) 1e6,
    /// `ms` 1e3, `us`/`µs` 1, `ns` 1e-3, `min` 6e7, `h` 3.6e9; `None` for any
    /// other unit.
    pub fn time_unit_us(&self) -> Option<f64> {
        match self.time_unit.as_str() {
            "" | "s" | "sec" => Some(1e6),
            "ms" => Some(1e3),
            "us" | "µs" | "μs" => Some(1.0),
            "ns" => Some(1e-3),
            "min" => Some(6e7),
            "h" => Some(3.6e9),
            _ => None,
        }
    }

    /// Whether rows carry a time.
    pub fn has_time(&self) -> bool {
        self.opts.time_column.is_some()
    }

    /// Total size of the files in bytes.
    pub fn total_bytes(&self) -> u64 {
        self.files.iter().map(|f| f.bytes).sum()
    }

    /// Counts data lines per file (blank lines included), reading every byte.
    pub fn count_lines(&self, stage: &Stage) -> Result<Vec<u64>> {
        let mut out = Vec::with_capacity(self.files.len());
        let mut block = vec![0u8; self.opts.block_bytes.max(1 << 12)];
        for file in &self.files {
            if let Some(rows) = file.array_rows() {
                out.push(rows);
                stage.advance(file.bytes);
                continue;
            }
            let mut f = open_at(file)?;
            let mut lines = 0u64;
            let mut last = b'\n';
            loop {
                let n = f
                    .read(&mut block)
                    .map_err(|e| Error::io(&file.path, "read", &e))?;
                if n == 0 {
                    break;
                }
                lines += memchr::memchr_iter(b'\n', &block[..n]).count() as u64;
                last = block[n - 1];
                stage.advance(n as u64);
            }
            if last != b'\n' {
                lines += 1;
            }
            out.push(lines);
        }
        Ok(out)
    }

    /// Reads the selected rows and calls `reduce` on every chunk in file
    /// order.
    pub fn for_each(
        &self,
        select: &Selection,
        stage: &Stage,
        mut f: impl FnMut(&Chunk) -> Result<()>,
    ) -> Result<ScanStats> {
        self.scan(select, stage, |_| Ok(()), |(), c| f(c))
    }

    /// Reads the selected rows. `map` runs on the parser threads, once per
    /// chunk; `reduce` runs on the calling thread with each chunk and its
    /// `map` result, in file order. Chunk boundaries depend only on the bytes
    /// and [`ReadOptions::block_bytes`].
    pub fn scan<T: Send>(
        &self,
        select: &Selection,
        stage: &Stage,
        map: impl Fn(&Chunk) -> Result<T> + Sync,
        mut reduce: impl FnMut(T, &Chunk) -> Result<()>,
    ) -> Result<ScanStats> {
        let mut stats = ScanStats {
            rows: vec![0; self.files.len()],
            skipped: vec![0; self.files.len()],
        };
        let block = self.opts.block_bytes.max(1 << 12);
        for (fi, file) in self.files.iter().enumerate() {
            let range = select.0.get(fi).cloned().unwrap_or(0..0);
            if range.is_empty() {
                stage.advance(file.bytes);
                continue;
            }
            if let Some(a) = &file.array {
                self.scan_array(fi, file, a, &range, stage, &map, &mut reduce, &mut stats)?;
                continue;
            }
            let mut reader = open_at(file)?;
            let mut buf: Vec<u8> = Vec::with_capacity(block * 2);
            let mut next_line = 2u64;
            let mut done = file.data_offset;
            let key = (fi, range.start, block);
            let hint = self.hints.lock().ok().and_then(|h| h.get(&key).copied());
            if let Some((offset, carry, line)) = hint {
                use std::io::{Seek, SeekFrom};
                reader
                    .seek(SeekFrom::Start(offset))
                    .map_err(|e| Error::io(&file.path, "read", &e))?;
                buf.resize(carry, 0);
                let n = read_full(&mut reader, &mut buf)
                    .map_err(|e| Error::io(&file.path, "read", &e))?;
                buf.truncate(n);
                stage.advance(offset - done);
                done = offset;
                next_line = line;
            }
            let mut candidate = None;
            let mut eof = false;
            while !eof {
                if range.start > 0 && next_line - 2 <= range.start {
                    candidate = Some((done, buf.len(), next_line));
                }
                let start = buf.len();
                buf.resize(start + block, 0);
                let n = read_full(&mut reader, &mut buf[start..])
                    .map_err(|e| Error::io(&file.path, "read", &e))?;
                buf.truncate(start + n);
                eof = n == 0;
                let cut = if eof {
                    buf.len()
                } else {
                    match memchr::memrchr(b'\n', &buf) {
                        Some(p) => p + 1,
                        None => continue,
                    }
                };
                let span = &buf[..cut];
                let lines_in_span = memchr::memchr_iter(b'\n', span).count() as u64
                    + u64::from(eof && !span.is_empty() && !span.ends_with(b"\n"));
                let span_first = next_line;
                // Past the selection: stop reading this file.
                let past = span_first.saturating_sub(2) >= range.end;
                if !past {
                    self.process_span(
                        fi,
                        file,
                        span,
                        span_first,
                        &range,
                        &map,
                        &mut reduce,
                        &mut stats,
                    )?;
                }
                next_line += lines_in_span;
                stage.advance(cut as u64);
                done += cut as u64;
                buf.drain(..cut);
                if past {
                    break;
                }
            }
            stage.advance(file.bytes.saturating_sub(done));
            if let (None, Some(c)) = (hint, candidate) {
                if let Ok(mut h) = self.hints.lock() {
                    h.insert(key, c);
                }
            }
        }
        Ok(stats)
    }

    #[allow(clippy::too_many_arguments)]
    fn process_span<T: Send>(
        &self,
        fi: usize,
        file: &LogFile,
        span: &[u8],
        first_line: u64,
        range: &Range<u64>,
        map: &(impl Fn(&Chunk) -> Result<T> + Sync),
        reduce: &mut impl FnMut(T, &Chunk) -> Result<()>,
        stats: &mut ScanStats,
    ) -> Result<()> {
        if span.is_empty() {
            return Ok(());
        }
        // Cut near the middle at a line end (depends only on the bytes).
        let mid = span.len() / 2;
        let cut = match memchr::memchr(b'\n', &span[mid..]) {
            Some(p) if span.len() >= 1 << 16 => mid + p + 1,
            _ => span.len(),
        };
        let (a, b) = span.split_at(cut);
        let b_first = first_line + memchr::memchr_iter(b'\n', a).count() as u64;
        let job = |bytes: &[u8], line: u64| -> Result<Option<(Chunk, T)>> {
            if bytes.is_empty() {
                return Ok(None);
            }
            let chunk = self.parse(fi, file, bytes, line, range)?;
            let t = map(&chunk)?;
            Ok(Some((chunk, t)))
        };
        let parts = self.in_two(|| job(a, first_line), || job(b, b_first))?;
        deliver(fi, parts, reduce, stats)
    }

    /// Runs two jobs, on two threads when the options allow and the second
    /// has work; the second is not run when the first fails on one thread.
    fn in_two<R: Send>(
        &self,
        first: impl FnOnce() -> Result<Option<R>>,
        second: impl FnOnce() -> Result<Option<R>> + Send,
    ) -> Result<[Option<R>; 2]> {
        let (ra, rb) = if self.opts.threads >= 2 {
            std::thread::scope(|s| {
                let hb = s.spawn(second);
                let ra = first();
                let rb = hb.join().unwrap_or_else(|_| {
                    Err(Error::input("internal error: a parser thread panicked"))
                });
                (ra, rb)
            })
        } else {
            let ra = first();
            let rb = if ra.is_ok() { second() } else { Ok(None) };
            (ra, rb)
        };
        Ok([ra?, rb?])
    }

    /// Reads the selected rows of an array log in blocks of whole rows; each
    /// block is split into two halves at a row as a text span is (by the
    /// block size only, whatever the thread count).
    #[allow(clippy::too_many_arguments)]
    fn scan_array<T: Send>(
        &self,
        fi: usize,
        file: &LogFile,
        a: &ArrayHeader,
        range: &Range<u64>,
        stage: &Stage,
        map: &(impl Fn(&Chunk) -> Result<T> + Sync),
        reduce: &mut impl FnMut(T, &Chunk) -> Result<()>,
        stats: &mut ScanStats,
    ) -> Result<()> {
        use std::io::{Seek, SeekFrom};
        let io = |e: std::io::Error| Error::io(&file.path, "read", &e);
        let rb = a.row_bytes().max(1);
        let (first, end) = (range.start.min(a.rows), range.end.min(a.rows));
        let start = file.data_offset + first * rb;
        let mut f = File::open(&file.path).map_err(io)?;
        f.seek(SeekFrom::Start(start)).map_err(io)?;
        stage.advance(start);
        let block_rows = (self.opts.block_bytes.max(1 << 12) as u64 / rb).max(1);
        let mut buf = vec![0u8; (block_rows.min(end - first) * rb) as usize];
        let mut row = first;
        while row < end {
            let n = (end - row).min(block_rows);
            let bytes = &mut buf[..(n * rb) as usize];
            if read_full(&mut f, bytes).map_err(io)? < bytes.len() {
                return Err(Error::at(
                    Location::file(&file.path),
                    format!(
                        "the file ended before row {} of {}: was it changed while being read?",
                        row + n - 1,
                        a.rows
                    ),
                ));
            }
            let half = if bytes.len() >= 1 << 16 { n / 2 } else { n };
            let (x, y) = bytes.split_at((half * rb) as usize);
            let job = |bytes: &[u8], first_row: u64| -> Result<Option<(Chunk, T)>> {
                if bytes.is_empty() {
                    return Ok(None);
                }
                let chunk = self.convert(fi, file, a, bytes, first_row)?;
                let t = map(&chunk)?;
                Ok(Some((chunk, t)))
            };
            let parts = self.in_two(|| job(x, row), || job(y, row + half))?;
            deliver(fi, parts, reduce, stats)?;
            row += n;
            stage.advance(n * rb);
        }
        stage.advance(file.bytes.saturating_sub(file.data_offset + end * rb));
        Ok(())
    }

    /// Converts whole rows of an array log (`first_row` is the 0-based
    /// index of the first) to features in label order, checking every value
    /// as the text reader checks a cell.
    fn convert(
        &self,
        fi: usize,
        file: &LogFile,
        a: &ArrayHeader,
        bytes: &[u8],
        first_row: u64,
    ) -> Result<Chunk> {
        let d = self.labels.len();
        let rb = a.row_bytes() as usize;
        let rows = bytes.len() / rb.max(1);
        let time = file.targets.iter().position(|t| *t == Target::Time);
        let mut chunk = Chunk {
            file: fi,
            d,
            ..Chunk::default()
        };
        chunk.values.reserve(rows * d);
        chunk.lines.reserve(rows);
        if time.is_some() {
            chunk.times.reserve(rows);
        }
        // The common layout first: `<f8` values with the features side by
        // side in label order and no time column, copied a row at a time
        // (the loop below takes every other layout, and any block with a
        // value that is not finite, to name or skip its row).
        let from = file.feature_fields.first().copied().unwrap_or(0);
        let side_by_side = matches!(a.element, Element::F64)
            && time.is_none()
            && (from + d) * 8 <= rb
            && file
                .feature_fields
                .iter()
                .enumerate()
                .all(|(i, &f)| f == from + i);
        if side_by_side {
            for rec in bytes.chunks_exact(rb.max(1)) {
                chunk.values.extend(
                    rec[from * 8..(from + d) * 8]
                        .chunks_exact(8)
                        .map(|b| f64::from_le_bytes(b.try_into().expect("8 bytes"))),
                );
            }
            if chunk.values.iter().fold(true, |ok, v| ok & v.is_finite()) {
                chunk
                    .lines
                    .extend((first_row..first_row + rows as u64).map(|r| r + 2));
                return Ok(chunk);
            }
            chunk.values.clear();
        }
        let get = |rec: &[u8], f: usize| -> f64 {
            match a.element {
                Element::F64 => rec
                    .get(f * 8..f * 8 + 8)
                    .and_then(|b| b.try_into().ok())
                    .map_or(f64::NAN, f64::from_le_bytes),
                Element::F32 => rec
                    .get(f * 4..f * 4 + 4)
                    .and_then(|b| b.try_into().ok())
                    .map_or(f64::NAN, |b| f64::from(f32::from_le_bytes(b))),
            }
        };
        for (i, rec) in bytes.chunks_exact(rb.max(1)).enumerate() {
            let index = first_row + i as u64;
            let start = chunk.values.len();
            chunk
                .values
                .extend(file.feature_fields.iter().map(|&f| get(rec, f)));
            let t = time.map_or(0.0, |f| get(rec, f));
            let finite = t.is_finite() && chunk.values[start..].iter().all(|v| v.is_finite());
            if !finite {
                match self.opts.bad_cells {
                    BadCells::Reject => {
                        let f = (0..file.fields())
                            .find(|&f| {
                                file.targets[f] != Target::Ignore && !get(rec, f).is_finite()
                            })
                            .unwrap_or(0);
                        return Err(Error::at(
                            Location::row_cell(&file.path, index, f + 1, &file.names[f]),
                            format!(
                                "expected a finite number, found {} (rows with empty or \
                                 non-finite cells can be skipped with --skip-bad-rows)",
                                get(rec, f)
                            ),
                        ));
                    }
                    BadCells::SkipRow => {
                        chunk.values.truncate(start);
                        chunk.skipped += 1;
                        continue;
                    }
                    BadCells::PassAsNan => {
                        for v in &mut chunk.values[start..] {
                            if !v.is_finite() {
                                *v = f64::NAN;
                            }
                        }
                    }
                }
            }
            chunk.lines.push(index + 2);
            if time.is_some() {
                chunk.times.push(if t.is_finite() { t } else { f64::NAN });
            }
        }
        Ok(chunk)
    }

    /// Parses complete lines; `first_line` is the 1-based number of the
    /// first.
    fn parse(
        &self,
        fi: usize,
        file: &LogFile,
        bytes: &[u8],
        first_line: u64,
        range: &Range<u64>,
    ) -> Result<Chunk> {
        let d = self.labels.len();
        let nf = file.fields();
        let has_time = self.opts.time_column.is_some();
        let mut chunk = Chunk {
            file: fi,
            d,
            ..Chunk::default()
        };
        let estimate = bytes.len() / (nf * 4).max(8) + 1;
        chunk.values.reserve(estimate * d);
        chunk.lines.reserve(estimate);
        if has_time {
            chunk.times.reserve(estimate);
        }
        let mut row = vec![0.0f64; d];
        let mut line_no = first_line;
        let mut rest = bytes;
        while !rest.is_empty() {
            let (mut line, next) = match memchr::memchr(b'\n', rest) {
                Some(p) => (&rest[..p], &rest[p + 1..]),
                None => (rest, &rest[rest.len()..]),
            };
            rest = next;
            let this = line_no;
            line_no += 1;
            let index = this - 2;
            if index < range.start {
                continue;
            }
            if index >= range.end {
                break;
            }
            if let Some(stripped) = line.strip_suffix(b"\r") {
                line = stripped;
            }
            if line.iter().all(|b| b.is_ascii_whitespace()) {
                continue;
            }
            // The common case first: every cell a plain decimal number. Any
            // other line (other number forms, blanks, bad cells, a wrong
            // field count) goes the general way below, with its messages.
            if let Some(time) = fast_line(line, &file.targets, &mut row) {
                chunk.values.extend_from_slice(&row);
                chunk.lines.push(this);
                if has_time {
                    chunk.times.push(time);
                }
                continue;
            }
            let found = memchr::memchr_iter(b',', line).count() + 1;
            if found != nf {
                let (col, name) = if found < nf {
                    (found + 1, file.names[found].as_str())
                } else {
                    (nf + 1, "beyond the header")
                };
                return Err(Error::at(
                    Location::cell(&file.path, this, col, name),
                    format!("expected {nf} fields as in the header, found {found}"),
                ));
            }
            let mut bad = false;
            let mut time = f64::NAN;
            for (f, cell) in line.split(|&b| b == b',').enumerate() {
                let target = file.targets[f];
                if target == Target::Ignore {
                    continue;
                }
                let v = match parse_cell(cell) {
                    Cell::Number(v) => v,
                    Cell::Empty | Cell::NonFinite if self.opts.bad_cells != BadCells::Reject => {
                        bad = true;
                        f64::NAN
                    }
                    other => {
                        return Err(Error::at(
                            Location::cell(&file.path, this, f + 1, &file.names[f]),
                            other.describe(cell),
                        ))
                    }
                };
                match target {
                    Target::Time => time = v,
                    Target::Feature(j) => row[j] = v,
                    Target::Ignore => {}
                }
            }
            if bad && self.opts.bad_cells == BadCells::SkipRow {
                chunk.skipped += 1;
                continue;
            }
            chunk.values.extend_from_slice(&row);
            chunk.lines.push(this);
            if has_time {
                chunk.times.push(time);
            }
        }
        Ok(chunk)
    }
}

/// A binary copy of the rows of a scan, written as they are read, so a
/// second pass reads it instead of parsing the logs again: a NumPy `.npy`
/// file of `<f8` values in label order in a folder of the caller's choice
/// (8 bytes per value). The file is removed when the `Spill` is dropped.
#[derive(Debug)]
pub struct Spill {
    path: PathBuf,
    out: Option<std::io::BufWriter<File>>,
    d: usize,
    rows: u64,
}

impl Spill {
    /// Bytes before the values: the `.npy` header, written last.
    const HEADER: u64 = 128;

    /// Creates an empty spill file for rows of `d` values in `dir`.
    pub fn create(dir: &Path, d: usize) -> Result<Spill> {
        let stamp = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |t| t.as_nanos());
        let path = dir.join(format!("plumb-spill-{}-{stamp}.npy", std::process::id()));
        let file = std::fs::OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&path)
            .map_err(|e| Error::io(&path, "create", &e))?;
        let mut spill = Spill {
            path,
            out: Some(std::io::BufWriter::with_capacity(1 << 20, file)),
            d,
            rows: 0,
        };
        spill.write(&[0; Self::HEADER as usize])?;
        Ok(spill)
    }

    /// The bytes of `values` as the spill stores them (little-endian
    /// `f64`); meant for the parser threads.
    pub fn encode(values: &[f64]) -> Vec<u8> {
        let mut out = Vec::with_capacity(values.len() * 8);
        for v in values {
            out.extend_from_slice(&v.to_le_bytes());
        }
        out
    }

    /// Appends rows given as [`Spill::encode`] bytes.
    pub fn push(&mut self, bytes: &[u8]) -> Result<()> {
        self.write(bytes)?;
        self.rows += (bytes.len() / (8 * self.d.max(1))) as u64;
        Ok(())
    }

    fn write(&mut self, bytes: &[u8]) -> Result<()> {
        use std::io::Write;
        let out = self
            .out
            .as_mut()
            .ok_or_else(|| Error::input("internal error: the spill file is closed"))?;
        out.write_all(bytes)
            .map_err(|e| Error::io(&self.path, "write", &e))
    }

    /// Rows written so far.
    pub fn rows(&self) -> u64 {
        self.rows
    }

    /// Writes the header and opens the spill as a log set of `labels` (one
    /// column each, no time column), read with `opts`' threads and block
    /// size.
    pub fn finish(&mut self, labels: &[Label], opts: &ReadOptions) -> Result<LogSet> {
        use std::io::{Seek, SeekFrom, Write};
        let io = |e: std::io::Error| Error::io(&self.path, "write", &e);
        let mut file = self
            .out
            .take()
            .ok_or_else(|| Error::input("internal error: the spill file is closed"))?
            .into_inner()
            .map_err(|e| io(e.into_error()))?;
        let mut h = format!(
            "{{'descr': '<f8', 'fortran_order': False, 'shape': ({}, {}), }}",
            self.rows, self.d
        );
        let room = Self::HEADER as usize - 10 - 1;
        if h.len() > room || labels.len() != self.d {
            return Err(Error::input("internal error: spill header"));
        }
        h.push_str(&" ".repeat(room - h.len()));
        h.push('\n');
        let mut head = npy::MAGIC.to_vec();
        head.extend_from_slice(&[1, 0]);
        head.extend_from_slice(&(h.len() as u16).to_le_bytes());
        head.extend_from_slice(h.as_bytes());
        file.seek(SeekFrom::Start(0)).map_err(io)?;
        file.write_all(&head).map_err(io)?;
        file.flush().map_err(io)?;
        let array = ArrayHeader {
            element: Element::F64,
            rows: self.rows,
            columns: self.d,
            names: None,
            data_offset: Self::HEADER,
        };
        Ok(LogSet {
            files: vec![LogFile {
                path: self.path.clone(),
                bytes: Self::HEADER + self.rows * array.row_bytes(),
                data_offset: Self::HEADER,
                names: labels.iter().map(|l| l.name.clone()).collect(),
                targets: (0..self.d).map(Target::Feature).collect(),
                feature_fields: (0..self.d).collect(),
                names_at: NamesAt::Fields(self.path.clone()),
                array: Some(array),
            }],
            labels: labels.to_vec(),
            time_unit: String::new(),
            opts: ReadOptions {
                time_column: None,
                units: BTreeMap::new(),
                bad_cells: BadCells::Reject,
                threads: opts.threads,
                block_bytes: opts.block_bytes,
            },
            hints: Hints::default(),
        })
    }
}

impl Drop for Spill {
    fn drop(&mut self) {
        self.out = None;
        let _ = std::fs::remove_file(&self.path);
    }
}

fn open_at(file: &LogFile) -> Result<File> {
    use std::io::{Seek, SeekFrom};
    let mut f = File::open(&file.path).map_err(|e| Error::io(&file.path, "read", &e))?;
    f.seek(SeekFrom::Start(file.data_offset))
        .map_err(|e| Error::io(&file.path, "read", &e))?;
    Ok(f)
}

/// Hands parsed parts to the caller's `reduce`, in order, and counts them.
fn deliver<T>(
    fi: usize,
    parts: [Option<(Chunk, T)>; 2],
    reduce: &mut impl FnMut(T, &Chunk) -> Result<()>,
    stats: &mut ScanStats,
) -> Result<()> {
    for (chunk, t) in parts.into_iter().flatten() {
        stats.rows[fi] += chunk.rows() as u64;
        stats.skipped[fi] += chunk.skipped;
        reduce(t, &chunk)?;
    }
    Ok(())
}

/// Reads until `buf` is full or the end of the file.
fn read_full(r: &mut impl Read, buf: &mut [u8]) -> std::io::Result<usize> {
    let mut n = 0;
    while n < buf.len() {
        match r.read(&mut buf[n..]) {
            Ok(0) => break,
            Ok(k) => n += k,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
    Ok(n)
}

/// One parsed cell.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Cell {
    Number(f64),
    Empty,
    NonFinite,
    Garbage,
}

impl Cell {
    fn describe(self, raw: &[u8]) -> String {
        let shown = String::from_utf8_lossy(raw.trim_ascii());
        match self {
            Cell::Number(_) => String::new(),
            Cell::Empty => "expected a number, found an empty cell \
                 (rows with empty or non-finite cells can be skipped with --skip-bad-rows)"
                .to_string(),
            Cell::NonFinite => format!(
                "expected a finite number, found {shown:?} \
                 (rows with empty or non-finite cells can be skipped with --skip-bad-rows)"
            ),
            Cell::Garbage => format!("expected a number, found {shown:?}"),
        }
    }
}

/// Exact powers of ten in `f64`.
const POW10: [f64; 23] = [
    1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16,
    1e17, 1e18, 1e19, 1e20, 1e21, 1e22,
];

/// Reads a number of the plain decimal form `[+-]digits[.digits][(e|E)[+-]digits]`
/// (at least one digit before the point) at the start of `b`, when its
/// value is one exactly rounded operation away: at most 19 significant
/// digits, a digit string `w ≤ 2⁵³` and a decimal exponent `q` with
/// `|q| ≤ 22`, so `w · 10^q` (or `w / 10^−q`) multiplies or divides two
/// exact values and rounds once: the correctly rounded value, as
/// `str::parse::<f64>` gives (Clinger 1990, the fast path). Returns the
/// value and the bytes read; `None` for anything else, which the caller
/// parses the general way.
/// Reads the decimal digits of `b` from `*i` on into the mantissa `w`
/// (wrapping: the caller refuses more than 19 significant digits), counting
/// significant digits (those after leading zeros) in `digits`.
#[inline(always)]
fn digit_run(b: &[u8], i: &mut usize, w: &mut u64, digits: &mut u32) {
    while let Some(&c) = b.get(*i) {
        let v = c.wrapping_sub(b'0');
        if v > 9 {
            break;
        }
        *w = w.wrapping_mul(10).wrapping_add(u64::from(v));
        *digits += u32::from(*w != 0);
        *i += 1;
    }
}

#[inline]
fn plain_decimal(b: &[u8]) -> Option<(f64, usize)> {
    let mut i = 0;
    let neg = match b.first() {
        Some(b'-') => {
            i = 1;
            true
        }
        Some(b'+') => {
            i = 1;
            false
        }
        _ => false,
    };
    let mut w: u64 = 0;
    let mut digits = 0u32; // significant digits (after leading zeros)
    let start = i;
    digit_run(b, &mut i, &mut w, &mut digits);
    if i == start {
        return None;
    }
    let mut q: i64 = 0;
    if b.get(i) == Some(&b'.') {
        i += 1;
        let frac = i;
        digit_run(b, &mut i, &mut w, &mut digits);
        q = -((i - frac) as i64);
    }
    if digits > 19 {
        return None;
    }
    if let Some(b'e' | b'E') = b.get(i) {
        i += 1;
        let eneg = match b.get(i) {
            Some(b'-') => {
                i += 1;
                true
            }
            Some(b'+') => {
                i += 1;
                false
            }
            _ => false,
        };
        let estart = i;
        let mut e: i64 = 0;
        while let Some(&c) = b.get(i) {
            let v = c.wrapping_sub(b'0');
            if v > 9 || i - estart >= 6 {
                break;
            }
            e = e * 10 + i64::from(v);
            i += 1;
        }
        if i == estart || b.get(i).is_some_and(u8::is_ascii_digit) {
            return None;
        }
        q += if eneg { -e } else { e };
    }
    if w > 1 << 53 || !(-22..=22).contains(&q) {
        return None;
    }
    let x = w as f64;
    let v = if q >= 0 {
        x * POW10[q as usize]
    } else {
        x / POW10[(-q) as usize]
    };
    Some((if neg { -v } else { v }, i))
}

/// Parses a whole line whose cells are all plain decimal numbers
/// ([`plain_decimal`]) with nothing around them, `targets.len()` of them
/// separated by commas: fills `row` and returns the time cell (NaN without
/// one). `None` for any other line, with `row` partly overwritten.
#[inline]
fn fast_line(line: &[u8], targets: &[Target], row: &mut [f64]) -> Option<f64> {
    let mut time = f64::NAN;
    let mut pos = 0;
    let last = targets.len().checked_sub(1)?;
    for (f, target) in targets.iter().enumerate() {
        let rest = &line[pos..];
        let used = match target {
            Target::Ignore => memchr::memchr(b',', rest).unwrap_or(rest.len()),
            Target::Time | Target::Feature(_) => {
                let (v, used) = plain_decimal(rest)?;
                match target {
                    Target::Time => time = v,
                    Target::Feature(j) => row[*j] = v,
                    Target::Ignore => {}
                }
                used
            }
        };
        pos += used;
        if f < last {
            if line.get(pos) != Some(&b',') {
                return None;
            }
            pos += 1;
        } else if pos != line.len() {
            return None;
        }
    }
    Some(time)
}

fn parse_cell(raw: &[u8]) -> Cell {
    let cell = raw.trim_ascii();
    if cell.is_empty() {
        return Cell::Empty;
    }
    match fast_float2::parse::<f64, _>(cell) {
        Ok(v) if v.is_finite() => Cell::Number(v),
        Ok(_) => Cell::NonFinite,
        Err(_) => Cell::Garbage,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cells() {
        assert_eq!(parse_cell(b" 1.5 "), Cell::Number(1.5));
        assert_eq!(parse_cell(b"-2e-3"), Cell::Number(-2e-3));
        assert_eq!(parse_cell(b""), Cell::Empty);
        assert_eq!(parse_cell(b"NaN"), Cell::NonFinite);
        assert_eq!(parse_cell(b"nan"), Cell::NonFinite);
        assert_eq!(parse_cell(b"-inf"), Cell::NonFinite);
        assert_eq!(parse_cell(b"Infinity"), Cell::NonFinite);
        assert_eq!(parse_cell(b"12..3"), Cell::Garbage);
        assert_eq!(parse_cell(b"1.0x"), Cell::Garbage);
        assert_eq!(parse_cell(b"\"1\""), Cell::Garbage);
    }

    /// Decimal strings of many shapes: signs, leading zeros, points,
    /// exponents, up to 25 digits, values from 1e-40 to 1e40.
    fn decimal_strings(n: usize) -> Vec<String> {
        let mut s = 0x2545_f491_4f6c_dd1du64;
        let mut next = move |k: u64| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            s % k
        };
        let mut out = Vec::with_capacity(n);
        for _ in 0..n {
            let mut t = String::new();
            match next(4) {
                0 => t.push('-'),
                1 => t.push('+'),
                _ => {}
            }
            let int = 1 + next(12) as usize;
            for i in 0..int {
                let lead_zero = i == 0 && next(4) == 0;
                t.push(char::from(
                    b'0' + if lead_zero { 0 } else { next(10) as u8 },
                ));
            }
            if next(3) > 0 {
                t.push('.');
                for _ in 0..next(14) {
                    t.push(char::from(b'0' + next(10) as u8));
                }
            }
            if next(3) == 0 {
                t.push(if next(2) == 0 { 'e' } else { 'E' });
                match next(3) {
                    0 => t.push('-'),
                    1 => t.push('+'),
                    _ => {}
                }
                t.push_str(&next(41).to_string());
            }
            out.push(t);
        }
        out
    }

    #[test]
    fn plain_decimals_are_correctly_rounded() {
        // Every string the fast path takes gives the bits of the standard
        // library's (correctly rounded) parse, and consumes the whole string.
        let mut taken = 0;
        for t in decimal_strings(400_000).iter().map(String::as_str).chain([
            "0",
            "-0",
            "+0.0",
            "9007199254740992",
            "9007199254740993",
            "1e22",
            "1e23",
            "1e-22",
            "1e-23",
            "123456789.0123456789",
            "0.000000000000000000001",
            "4.9406564584124654e-324",
            "1.7976931348623157e308",
            "00000000000000000000001",
        ]) {
            let want: f64 = t.parse().expect(t);
            if let Some((v, used)) = plain_decimal(t.as_bytes()) {
                taken += 1;
                assert_eq!(used, t.len(), "{t}");
                assert_eq!(v.to_bits(), want.to_bits(), "{t}: {v} vs {want}");
            }
            assert_eq!(parse_cell(t.as_bytes()), Cell::Number(want), "{t}");
        }
        // The fast path must carry the common case, not just be safe.
        assert!(taken > 200_000, "{taken}");
        assert_eq!(plain_decimal(b"-1.25e-3x"), Some((-1.25e-3, 8)));
        for no in [
            &b""[..],
            b"-",
            b".5",
            b"e5",
            b"1e",
            b"1e+",
            b"nan",
            b"inf",
            b"1e1234567",
        ] {
            assert_eq!(plain_decimal(no), None, "{}", String::from_utf8_lossy(no));
        }
    }

    #[test]
    fn fast_lines_take_only_plain_cells() {
        let t = [
            Target::Time,
            Target::Feature(1),
            Target::Ignore,
            Target::Feature(0),
        ];
        let mut row = [0.0; 2];
        assert_eq!(fast_line(b"1.5,2,x y,-3e1", &t, &mut row), Some(1.5));
        assert_eq!(row, [-30.0, 2.0]);
        for bad in [
            &b"1.5,2,x,-3e1,"[..],
            b"1.5,2,x",
            b"1.5, 2,x,3",
            b"1.5,,x,3",
            b"1.5,2,x,3 ",
            b"1.5,NaN,x,3",
            b"1.5,2;x,3",
        ] {
            assert_eq!(
                fast_line(bad, &t, &mut row),
                None,
                "{}",
                String::from_utf8_lossy(bad)
            );
        }
    }

    #[test]
    fn names_and_units() {
        assert_eq!(split_name_unit("t[s]"), ("t", "s"));
        assert_eq!(
            split_name_unit(" motor_current_left[A] "),
            ("motor_current_left", "A")
        );
        assert_eq!(split_name_unit("ratio"), ("ratio", ""));
        assert_eq!(split_name_unit("a[b][m/s]"), ("a[b]", "m/s"));
        assert_eq!(
            split_header_line("a,\"b,c[V]\",\"d\"\"\""),
            vec!["a", "b,c[V]", "d\""]
        );
    }

    #[test]
    fn split_tail_rounds() {
        let (h, t) = Selection::split_tail(&[10, 3, 0], 0.2);
        assert_eq!(h.0, vec![0..8, 0..2, 0..0]);
        assert_eq!(t.0, vec![8..10, 2..3, 0..0]);
    }
}
