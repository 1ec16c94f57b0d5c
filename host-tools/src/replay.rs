//! Replay: run logs through the very same firmware detector the boards run.
//!
//! Each log is replayed from a fresh detector (reset statistics, warm-up), in
//! model column order; empty and non-finite cells pass through as NaN so the
//! detector counts them as sensor faults, exactly as a board would, unless
//! the reading options skip such rows ([`BadCells::SkipRow`]): those never
//! reach the detector and are counted per log.

use crate::error::{Error, Location, Result};
use crate::events::{ChartCrossing, Names};
use crate::logs::{BadCells, LogSet, ReadOptions, Selection};
use crate::progress::Stage;
use plumb_firmware::endpoint::drift_raised;
use plumb_firmware::{Detector, DriftState, Event, Fault, Outcome, Score, ScoreSet};
use plumb_model::file::ModelFile;
use serde::Serialize;
use std::path::PathBuf;

/// A detector for a model file, refusing one over the device capacities.
pub fn detector(file: &ModelFile) -> Result<Detector> {
    let device = file.model.to_device().map_err(|e| {
        Error::input(format!(
            "the model does not fit the device: {e} (replay runs the boards' own detector, \
             with their capacities; a model fitted with --no-device-check is for `plumb \
             inspect` only)"
        ))
    })?;
    Detector::new(device).map_err(|e| Error::input(format!("the model is not usable: {e}")))
}

/// A feature and its share of the SPE when a flag rose.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FeatureShare {
    /// Feature name.
    pub name: String,
    /// Squared residual of the feature.
    pub value: f32,
}

/// The three scores of one sample.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ScoreValues {
    /// SPE (Q).
    pub spe: f32,
    /// Hotelling T².
    pub t2: f32,
    /// Mixture negative log-likelihood.
    pub nll: f32,
}

/// One raised drift flag.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Flag {
    /// 0-based sample index at which the flag rose.
    pub raised_at: u64,
    /// 0-based sample index at which it cleared; `None` while still raised.
    pub cleared_at: Option<u64>,
    /// The scores whose limits were crossed when it rose.
    pub scores: Vec<&'static str>,
    /// Every chart of those scores over its limit when it rose, as the board
    /// lists them in its drift raised message (the residual chart with its
    /// feature).
    pub crossed: Vec<ChartCrossing>,
    /// Score values of the sample that raised it.
    pub values: ScoreValues,
    /// Largest SPE contributions of that sample.
    pub top_features: Vec<FeatureShare>,
    /// Log time at which it rose (time column), when the log has one.
    pub raised_t: Option<f64>,
    /// Log time at which it cleared.
    pub cleared_t: Option<f64>,
}

/// Faults by cause.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize)]
pub struct Faults {
    /// Samples with NaN or infinite features.
    pub non_finite: u64,
    /// Samples with a feature beyond the model's `fault_z`.
    pub out_of_range: u64,
    /// Samples of the wrong length (cannot happen from a CSV log).
    pub wrong_length: u64,
    /// Score overflow.
    pub overflow: u64,
}

impl Faults {
    /// All faulted samples.
    pub fn total(&self) -> u64 {
        self.non_finite + self.out_of_range + self.wrong_length + self.overflow
    }

    fn count(&mut self, f: Fault) {
        match f {
            Fault::NonFinite { .. } => self.non_finite += 1,
            Fault::OutOfRange { .. } => self.out_of_range += 1,
            Fault::WrongLength { .. } => self.wrong_length += 1,
            Fault::Overflow => self.overflow += 1,
        }
    }
}

/// The outcome of replaying one log.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LogReplay {
    /// The log.
    pub path: PathBuf,
    /// Samples replayed.
    pub samples: u64,
    /// Rows left out for empty or non-finite cells (`--skip-bad-rows`).
    pub skipped: u64,
    /// Faulted samples (total).
    pub faults: u64,
    /// Faulted samples by cause.
    pub fault_kinds: Faults,
    /// Drift flags, in order.
    pub flags: Vec<Flag>,
    /// Samples whose raw score exceeded its per-sample limit, per score
    /// (SPE, T², NLL).
    pub over_sample_limit: [u64; 3],
    /// Sample period of the log in seconds (median time step), when known.
    pub period_s: Option<f64>,
}

/// Names of the scores in a set.
pub fn score_names(set: ScoreSet) -> Vec<&'static str> {
    set.iter().map(Score::name).collect()
}

/// [`detector`] for the model file at `path`: errors name the file.
pub fn check_model(file: &ModelFile, path: &std::path::Path) -> Result<()> {
    detector(file)
        .map(drop)
        .map_err(|e| e.with_location(Location::file(path)))
}

/// One replayed sample as handed to a sink.
#[derive(Debug, Clone, Copy)]
pub struct Step<'a> {
    /// Index of the log in the replay.
    pub log: usize,
    /// Log time of the sample, when the log has a time column.
    pub t: Option<f64>,
    /// The sample as fed, in model feature order.
    pub x: &'a [f32],
    /// What the detector said.
    pub outcome: &'a Outcome,
    /// The detector after the sample (statistics, state).
    pub detector: &'a Detector,
}

/// Replays logs one after the other, each from a fresh detector; `sink` sees
/// every sample. Returns one [`LogReplay`] per log.
pub fn replay(
    file: &ModelFile,
    paths: &[PathBuf],
    mut read: ReadOptions,
    stage: &Stage,
    mut sink: impl FnMut(Step<'_>) -> Result<()>,
) -> Result<Vec<LogReplay>> {
    let template = detector(file)?;
    if read.bad_cells != BadCells::SkipRow {
        read.bad_cells = BadCells::PassAsNan;
    }
    let set = LogSet::open_for_labels(paths, &file.labels, read)?;
    let names = Names::from_labels(&file.labels);
    let time_scale = set.time_unit_us().map(|us| us / 1e6);
    let mut out = Vec::with_capacity(paths.len());
    let mut x = vec![0f32; set.features()];
    for (fi, log) in set.files().iter().enumerate() {
        let mut det = template.clone();
        let mut rep = LogReplay {
            path: log.path.clone(),
            samples: 0,
            skipped: 0,
            faults: 0,
            fault_kinds: Faults::default(),
            flags: Vec::new(),
            over_sample_limit: [0; 3],
            period_s: None,
        };
        let mut steps: Vec<f64> = Vec::new();
        let mut last_t: Option<f64> = None;
        let mut select = Selection(vec![0..0; set.files().len()]);
        select.0[fi] = 0..u64::MAX;
        set.for_each(&select, stage, |chunk| {
            rep.skipped += chunk.skipped;
            for (i, row) in chunk.iter_rows().enumerate() {
                for (xi, v) in x.iter_mut().zip(row) {
                    *xi = *v as f32;
                }
                let t = chunk.times.get(i).map(|t| t * time_scale.unwrap_or(1.0));
                if let (Some(a), Some(b)) = (last_t, t) {
                    if steps.len() < 10_000 {
                        steps.push(b - a);
                    }
                }
                last_t = t;
                let o = det.update(&x);
                rep.samples += 1;
                if let Some(f) = o.fault {
                    rep.fault_kinds.count(f);
                }
                match o.event {
                    Some(Event::Raised { drivers }) => {
                        let s = o.scores.unwrap_or_default();
                        let crossed = drift_raised(&det, &o, drivers).crossed;
                        rep.flags.push(Flag {
                            raised_at: o.index,
                            cleared_at: None,
                            scores: score_names(drivers),
                            crossed: crossed
                                .iter()
                                .map(|c| ChartCrossing::new(c, &names))
                                .collect(),
                            values: ScoreValues {
                                spe: s.spe,
                                t2: s.t2,
                                nll: s.nll,
                            },
                            top_features: o
                                .top
                                .iter()
                                .filter_map(|c| {
                                    names.0.get(usize::from(c.feature)).map(|n| FeatureShare {
                                        name: n.clone(),
                                        value: c.value,
                                    })
                                })
                                .collect(),
                            raised_t: t,
                            cleared_t: None,
                        });
                    }
                    Some(Event::Cleared) => {
                        if let Some(f) = rep.flags.last_mut() {
                            f.cleared_at = Some(o.index);
                            f.cleared_t = t;
                        }
                    }
                    _ => {}
                }
                sink(Step {
                    log: fi,
                    t,
                    x: &x,
                    outcome: &o,
                    detector: &det,
                })?;
            }
            Ok(())
        })
        .map_err(|e| {
            if e.location.is_none() {
                e.with_location(Location::file(&log.path))
            } else {
                e
            }
        })?;
        rep.faults = rep.fault_kinds.total();
        for (o, s) in rep.over_sample_limit.iter_mut().zip(Score::ALL) {
            *o = u64::from(det.track(s).over_sample_limit);
        }
        if !steps.is_empty() {
            steps.sort_by(f64::total_cmp);
            rep.period_s = Some(steps[steps.len() / 2]);
        }
        out.push(rep);
    }
    Ok(out)
}

/// Warns on standard error about every log that gave no sample, or whose
/// every sample was faulted (nothing scored), and refuses a replay that
/// gave no sample at all: nothing was checked (exit code 2).
pub fn require_samples(reps: &[LogReplay]) -> Result<()> {
    for r in reps {
        if r.samples == 0 {
            eprintln!(
                "plumb: warning: 0 samples in {}{}",
                r.path.display(),
                if r.skipped > 0 {
                    format!(
                        " ({} rows skipped for empty or non-finite cells)",
                        r.skipped
                    )
                } else {
                    String::new()
                }
            );
        } else if r.faults == r.samples {
            eprintln!(
                "plumb: warning: all {} samples in {} are sensor faults: nothing was scored",
                r.samples,
                r.path.display()
            );
        }
    }
    if reps.iter().all(|r| r.samples == 0) {
        return Err(Error::input(
            "0 samples replayed: nothing was checked (the logs have no data rows, or every row was skipped)",
        ));
    }
    Ok(())
}

/// Short fixed name of a state (trace files, tables).
pub fn state_name(s: DriftState) -> &'static str {
    match s {
        DriftState::Priming => "priming",
        DriftState::Watching => "watching",
        DriftState::Drifting => "drifting",
    }
}

/// Short fixed name of an event (trace files, tables).
pub fn event_name(e: Option<Event>) -> &'static str {
    match e {
        None => "",
        Some(Event::Primed) => "primed",
        Some(Event::Raised { .. }) => "raised",
        Some(Event::Cleared) => "cleared",
    }
}

/// Short fixed name of a fault.
pub fn fault_name(f: Option<Fault>) -> &'static str {
    match f {
        None => "",
        Some(Fault::NonFinite { .. }) => "non-finite",
        Some(Fault::OutOfRange { .. }) => "out-of-range",
        Some(Fault::WrongLength { .. }) => "wrong-length",
        Some(Fault::Overflow) => "overflow",
    }
}
