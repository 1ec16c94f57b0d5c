//! # plumb-scenario
//!
//! Deterministic demo data for plumbline: 10 Hz feature logs of an invented
//! warehouse tugger's drive module, nominal and with injected drifts and
//! faults, in the plumbline CSV convention.
//!
//! * [`write_demo`] writes the committed demo set (`train/`, `holdout/`,
//!   `drift/`, and `truth.csv` giving each drift onset);
//! * [`write_bulk_holdout`] writes any amount of extra nominal data;
//! * [`write_robot_logs`] writes nominal logs of one robot on days of its
//!   own, and [`drift_robot`] tells which robot a scenario's log comes from;
//! * [`read_truth`] parses the ground-truth table;
//! * [`feature_table`] lists the columns.
//!
//! The output depends only on the seed and the row counts: the generator uses
//! its own xoshiro256** generator and its own `ln`/`exp`, so the bytes are the
//! same on every platform and compiler version.
//!
//! CSV convention: a header row; the first column is `t[s]` (seconds since the
//! log start, one decimal); a feature column is `name[unit]`, or `name` when
//! unitless; `.` decimal separator, `\n` line endings, no quoting; a missing
//! reading is `NaN`. Each value is the channel's reading at its logging
//! resolution (fixed decimals, or four significant digits for the vibration
//! energies) and the text is exactly that value.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

mod csv;
mod features;
mod rng;
mod sim;

use std::fmt::Write as _;
use std::fs;
use std::io::{self, Write};
use std::path::{Path, PathBuf};

use sim::{Drift, Sim};

/// Time between two rows (seconds): one row per 100 ms window.
pub const SAMPLE_PERIOD_S: f64 = 0.1;

/// Sizes and seed of the demo set.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Config {
    /// Master seed; every log derives its own streams from it.
    pub seed: u64,
    /// Rows in each `train/` log.
    pub train_rows_per_log: usize,
    /// Rows in each `holdout/` log.
    pub holdout_rows_per_log: usize,
    /// Rows in each `drift/` log.
    pub drift_rows: usize,
    /// 0-based data row at which every drift or fault starts.
    pub drift_onset: usize,
    /// The `gain_change` scenario's change of the left motor current's gain,
    /// in hundredths of a percent (400: the reading becomes 1.04 times the
    /// current). Only that log depends on it.
    pub gain_change_bp: i32,
}

/// The committed demo's gain change: +4 %.
pub const DEMO_GAIN_CHANGE_BP: i32 = 400;

/// Gain changes [`Config::validate`] accepts, in hundredths of a percent:
/// from −50 % to +100 %, not 0.
pub const GAIN_CHANGE_BP_RANGE: core::ops::RangeInclusive<i32> = -5000..=10000;

/// Seed of the committed demo set.
pub const DEMO_SEED: u64 = 424_242;

impl Default for Config {
    /// The committed demo: 6 training logs and 2 held-out logs of 6000 rows
    /// (10 minutes each), 5 drift logs of 8000 rows with the onset at row 3000.
    fn default() -> Self {
        Config {
            seed: DEMO_SEED,
            train_rows_per_log: 6000,
            holdout_rows_per_log: 6000,
            drift_rows: 8000,
            drift_onset: 3000,
            gain_change_bp: DEMO_GAIN_CHANGE_BP,
        }
    }
}

impl Config {
    /// Checks the sizes; the error says what is wrong.
    pub fn validate(&self) -> io::Result<()> {
        let bad = |msg: String| Err(io::Error::new(io::ErrorKind::InvalidInput, msg));
        if self.train_rows_per_log == 0 {
            return bad("train_rows_per_log must be at least 1".into());
        }
        if self.holdout_rows_per_log == 0 {
            return bad("holdout_rows_per_log must be at least 1".into());
        }
        if self.drift_onset == 0 || self.drift_onset >= self.drift_rows {
            return bad(format!(
                "drift_onset ({}) must be at least 1 and below drift_rows ({})",
                self.drift_onset, self.drift_rows
            ));
        }
        if self.gain_change_bp == 0 || !GAIN_CHANGE_BP_RANGE.contains(&self.gain_change_bp) {
            return bad(format!(
                "gain_change_bp ({}) must be from {} to {} and not 0",
                self.gain_change_bp,
                GAIN_CHANGE_BP_RANGE.start(),
                GAIN_CHANGE_BP_RANGE.end()
            ));
        }
        Ok(())
    }

    /// The factor the `gain_change` scenario multiplies its reading by:
    /// `(10000 + gain_change_bp) / 10000`, correctly rounded (1.04 for the
    /// committed demo, the same double as the literal).
    pub fn gain_change_factor(&self) -> f64 {
        f64::from(10_000 + self.gain_change_bp) / 10_000.0
    }
}

/// What [`write_demo`] wrote.
#[derive(Debug, Clone, PartialEq)]
pub struct Manifest {
    /// Training logs, in order.
    pub train: Vec<PathBuf>,
    /// Held-out nominal logs.
    pub holdout: Vec<PathBuf>,
    /// Drift logs and their ground truth (as written to `truth.csv`).
    pub drift: Vec<Truth>,
}

/// Whether a scenario is a change of the process (drift) or a broken sensor
/// (fault).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TruthKind {
    /// The process or a sensor's calibration changed; readings stay plausible.
    Drift,
    /// Readings are missing or invalid.
    Fault,
}

impl TruthKind {
    /// `drift` or `fault`, as written in `truth.csv`.
    pub fn as_str(self) -> &'static str {
        match self {
            TruthKind::Drift => "drift",
            TruthKind::Fault => "fault",
        }
    }
}

/// One row of `truth.csv`.
#[derive(Debug, Clone, PartialEq)]
pub struct Truth {
    /// Scenario name, e.g. `bearing_wear`.
    pub scenario: String,
    /// The log (resolved against the truth file's folder when read).
    pub file: PathBuf,
    /// 0-based data row (header not counted) of the first affected row.
    pub onset_row: usize,
    /// `t[s]` of that row.
    pub onset_t_s: f64,
    /// Drift or fault.
    pub kind: TruthKind,
    /// Names (without units) of the features the scenario acts on.
    pub features: Vec<String>,
}

/// The columns after `t[s]`, in order: `(name, unit, description)`; the unit
/// is `""` for a unitless feature.
pub fn feature_table() -> &'static [(&'static str, &'static str, &'static str)] {
    features::TABLE
}

/// The header line of every log (without the line ending).
pub fn header_line() -> String {
    features::header()
}

/// Training logs: `(robot, day)`.
const TRAIN: [(u32, u32); 6] = [(1, 1), (1, 2), (2, 1), (2, 2), (3, 1), (3, 2)];
/// Held-out logs: a robot never trained on, and a known robot on a new day.
const HOLDOUT: [(u32, u32); 2] = [(4, 1), (1, 3)];
/// First day number used by [`write_bulk_holdout`].
const BULK_FIRST_DAY: u32 = 1000;

struct DriftLog {
    scenario: &'static str,
    drift: Drift,
    robot: u32,
    day: u32,
    kind: TruthKind,
    features: &'static [&'static str],
}

const DRIFT_LOGS: [DriftLog; 5] = [
    DriftLog {
        scenario: "bearing_wear",
        drift: Drift::BearingWear,
        robot: 1,
        day: 4,
        kind: TruthKind::Drift,
        features: &["vib_band5", "vib_band6", "gearbox_temp"],
    },
    DriftLog {
        scenario: "gain_change",
        drift: Drift::GainChange,
        robot: 2,
        day: 4,
        kind: TruthKind::Drift,
        features: &["motor_current_left"],
    },
    DriftLog {
        scenario: "loose_mount",
        drift: Drift::LooseMount,
        robot: 3,
        day: 4,
        kind: TruthKind::Drift,
        features: &[
            "accel_rms_x",
            "accel_rms_y",
            "accel_rms_z",
            "jerk_rms",
            "vib_band3",
            "vib_band4",
            "vib_band5",
            "vib_band6",
        ],
    },
    DriftLog {
        scenario: "new_floor",
        drift: Drift::NewFloor,
        robot: 1,
        day: 5,
        kind: TruthKind::Drift,
        features: &[
            "vib_band1",
            "vib_band2",
            "vib_band3",
            "accel_rms_z",
            "jerk_rms",
        ],
    },
    DriftLog {
        scenario: "sensor_dropout",
        drift: Drift::SensorDropout,
        robot: 2,
        day: 5,
        kind: TruthKind::Fault,
        features: &[
            "accel_rms_x",
            "accel_rms_y",
            "accel_rms_z",
            "gyro_rms",
            "jerk_rms",
            "tilt",
        ],
    },
];

/// `t[s]` of data row `row`, exactly as printed.
fn row_time(row: usize) -> f64 {
    row as f64 / 10.0
}

fn nominal_log(path: &Path, seed: u64, robot: u32, day: u32, rows: usize) -> io::Result<()> {
    let mut sim = Sim::new(seed, robot, day, rows, Drift::None, rows);
    csv::write_log(path, &mut sim, rows)
}

/// Writes the demo set under `dir`: `train/robot{r}_day{d}.csv`,
/// `holdout/robot{r}_day{d}.csv`, `drift/<scenario>.csv` and
/// `truth.csv`. Existing files of the same names are replaced; nothing
/// else is touched. The returned paths start with `dir`.
pub fn write_demo(dir: &Path, cfg: &Config) -> io::Result<Manifest> {
    cfg.validate()?;
    let mut manifest = Manifest {
        train: Vec::new(),
        holdout: Vec::new(),
        drift: Vec::new(),
    };
    for (robot, day) in TRAIN {
        let path = dir.join("train").join(format!("robot{robot}_day{day}.csv"));
        nominal_log(&path, cfg.seed, robot, day, cfg.train_rows_per_log)?;
        manifest.train.push(path);
    }
    for (robot, day) in HOLDOUT {
        let path = dir
            .join("holdout")
            .join(format!("robot{robot}_day{day}.csv"));
        nominal_log(&path, cfg.seed, robot, day, cfg.holdout_rows_per_log)?;
        manifest.holdout.push(path);
    }
    let drift_dir = dir.join("drift");
    let mut table = String::from("scenario,file,onset_row,onset_t_s,kind,features\n");
    for d in &DRIFT_LOGS {
        let name = format!("{}.csv", d.scenario);
        let path = drift_dir.join(&name);
        let mut sim = Sim::new(
            cfg.seed,
            d.robot,
            d.day,
            cfg.drift_rows,
            d.drift,
            cfg.drift_onset,
        );
        sim.set_gain_change(cfg.gain_change_factor());
        csv::write_log(&path, &mut sim, cfg.drift_rows)?;
        table.push_str(d.scenario);
        table.push_str(",drift/");
        table.push_str(&name);
        table.push(',');
        write!(table, "{},", cfg.drift_onset).expect("String write");
        csv::push_time(&mut table, cfg.drift_onset);
        table.push(',');
        table.push_str(d.kind.as_str());
        table.push(',');
        table.push_str(&d.features.join(";"));
        table.push('\n');
        manifest.drift.push(Truth {
            scenario: d.scenario.to_string(),
            file: path,
            onset_row: cfg.drift_onset,
            onset_t_s: row_time(cfg.drift_onset),
            kind: d.kind,
            features: d.features.iter().map(|s| s.to_string()).collect(),
        });
    }
    // Beside the folders, not inside drift/: a folder of logs holds only logs.
    let truth_path = dir.join("truth.csv");
    let tmp = dir.join("truth.csv.plumb.tmp");
    fs::File::create(&tmp)
        .and_then(|mut f| f.write_all(table.as_bytes()))
        .and_then(|()| fs::rename(&tmp, &truth_path))
        .map_err(|e| {
            let _ = fs::remove_file(&tmp);
            csv::with_path(e, &truth_path)
        })?;
    Ok(manifest)
}

/// Writes `total_rows` rows of nominal held-out data, split as evenly as
/// possible over `files` logs named `holdout_{i:03}_robot{r}_day{d}.csv` in
/// `dir` (created if needed). The logs cycle over robots 1–4 (three trained
/// on, one not) on days never used by the demo set. Returns the paths in
/// order.
pub fn write_bulk_holdout(
    dir: &Path,
    seed: u64,
    total_rows: usize,
    files: usize,
) -> io::Result<Vec<PathBuf>> {
    if files == 0 {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            "the number of files must be at least 1",
        ));
    }
    if total_rows < files {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            format!("{total_rows} rows cannot fill {files} files (each needs at least one row)"),
        ));
    }
    let mut out = Vec::with_capacity(files);
    for i in 0..files {
        let rows = total_rows / files + usize::from(i < total_rows % files);
        let robot = 1 + (i % 4) as u32;
        let day = BULK_FIRST_DAY + i as u32;
        let path = dir.join(format!("holdout_{i:03}_robot{robot}_day{day}.csv"));
        nominal_log(&path, seed, robot, day, rows)?;
        out.push(path);
    }
    Ok(out)
}

/// The robot whose log a drift or fault scenario of [`write_demo`] is
/// (`bearing_wear` → 1), or `None` for a name that is not a scenario.
pub fn drift_robot(scenario: &str) -> Option<u32> {
    DRIFT_LOGS
        .iter()
        .find(|d| d.scenario == scenario)
        .map(|d| d.robot)
}

/// Writes `total_rows` rows of nominal data of robot `robot` alone, one log
/// per day of `days` (in order), split as evenly as possible (the first logs
/// take one row more), named `robot{r}_day{d}.csv` in `dir` (created if
/// needed). A log is the one [`write_demo`] or [`write_bulk_holdout`] writes
/// for the same seed, robot, day and row count; the caller picks days no
/// other set of the same seed uses. Returns the paths in day order.
pub fn write_robot_logs(
    dir: &Path,
    seed: u64,
    robot: u32,
    days: core::ops::Range<u32>,
    total_rows: usize,
) -> io::Result<Vec<PathBuf>> {
    let bad = |msg: String| Err(io::Error::new(io::ErrorKind::InvalidInput, msg));
    if robot == 0 {
        return bad("robots are numbered from 1; robot 0 does not exist".into());
    }
    if days.is_empty() {
        return bad(format!(
            "the range of days {}..{} is empty (one log per day: give at least one day)",
            days.start, days.end
        ));
    }
    let files = (days.end - days.start) as usize;
    if total_rows < files {
        return bad(format!(
            "{total_rows} rows cannot fill {files} logs (one per day, each needs at least one row)"
        ));
    }
    let mut out = Vec::with_capacity(files);
    for (i, day) in days.enumerate() {
        let rows = total_rows / files + usize::from(i < total_rows % files);
        let path = dir.join(format!("robot{robot}_day{day}.csv"));
        nominal_log(&path, seed, robot, day, rows)?;
        out.push(path);
    }
    Ok(out)
}

/// Parses a `truth.csv`; each `file` is resolved against the truth file's
/// folder.
pub fn read_truth(path: &Path) -> io::Result<Vec<Truth>> {
    let text = fs::read_to_string(path).map_err(|e| csv::with_path(e, path))?;
    let base = path.parent().unwrap_or_else(|| Path::new(""));
    let bad = |line: usize, msg: String| {
        io::Error::new(
            io::ErrorKind::InvalidData,
            format!("{}:{line}: {msg}", path.display()),
        )
    };
    let mut lines = text.lines().enumerate();
    const HEADER: &str = "scenario,file,onset_row,onset_t_s,kind,features";
    match lines.next() {
        Some((_, h)) if h.trim_end_matches('\r') == HEADER => {}
        Some((_, h)) => return Err(bad(1, format!("expected header `{HEADER}`, found `{h}`"))),
        None => return Err(bad(1, "empty file".into())),
    }
    let mut out = Vec::new();
    for (i, line) in lines {
        let n = i + 1;
        let line = line.trim_end_matches('\r');
        if line.trim().is_empty() {
            continue;
        }
        let cells: Vec<&str> = line.split(',').collect();
        if cells.len() != 6 {
            return Err(bad(n, format!("expected 6 cells, found {}", cells.len())));
        }
        if cells[0].is_empty() || cells[1].is_empty() {
            return Err(bad(n, "scenario and file must not be empty".into()));
        }
        let onset_row = cells[2]
            .parse::<usize>()
            .map_err(|_| bad(n, format!("onset_row `{}` is not a row number", cells[2])))?;
        let onset_t_s = cells[3]
            .parse::<f64>()
            .ok()
            .filter(|t| t.is_finite() && *t >= 0.0)
            .ok_or_else(|| {
                bad(
                    n,
                    format!("onset_t_s `{}` is not a time in seconds", cells[3]),
                )
            })?;
        let kind = match cells[4] {
            "drift" => TruthKind::Drift,
            "fault" => TruthKind::Fault,
            other => {
                return Err(bad(
                    n,
                    format!("kind `{other}` is neither `drift` nor `fault`"),
                ))
            }
        };
        let features = if cells[5].is_empty() {
            Vec::new()
        } else {
            cells[5].split(';').map(str::to_string).collect::<Vec<_>>()
        };
        if features.iter().any(|f| f.is_empty()) {
            return Err(bad(n, "empty feature name in the features list".into()));
        }
        out.push(Truth {
            scenario: cells[0].to_string(),
            file: base.join(cells[1]),
            onset_row,
            onset_t_s,
            kind,
            features,
        });
    }
    Ok(out)
}

#[cfg(test)]
mod tests;
