//! The drift report: one self-contained HTML file (inline SVG and CSS, no
//! scripts, nothing fetched) that shows what the firmware detector saw in a
//! set of logs.
//!
//! The logs run through [`replay::replay`], the same detector the boards
//! run; a sink keeps, in memory that does not grow with the number of rows:
//!
//! - per log, a min/max reduction of each score's `u`, EWMA and CUSUM, and of
//!   the SPE's residual chart and slow charts (each its largest `|EWMA|`),
//!   into at most `2 · PLOT_COLUMNS` buckets of equal length (pairs merge when
//!   the list fills), so spikes survive the reduction;
//! - per flag, whether the residual chart, and the slow charts, were over
//!   their limits at the sample that raised it, and for which feature;
//! - per flag, the mean squared residual `r_i²` of every feature over the first
//!   [`CONTRIB_SAMPLES`] scored samples from the sample that raised it;
//! - fixed-size uniform samples (reservoir sampling, seeded) of the latent
//!   scores `(t1, t2)` of training rows and of field rows, with the detector's
//!   state at each field row.
//!
//! `page` turns that into HTML. The file is written atomically.
//!
//! plumbline is an advisory monitor, not a safety function.

mod page;
mod plot;

use crate::error::{Error, Location, Result};
use crate::logs::{expand_paths, ReadOptions};
use crate::progress::Progress;
use crate::replay::{self, LogReplay, Step};
use crate::rng::Rng;
use plumb_firmware::{DriftState, Event, ResidualChart, Score};
use plumb_model::file::ModelFile;
use plumb_model::{ModelOwned, SLOW_PARAMS};
use std::path::{Path, PathBuf};

/// Scored samples, from the one that raised a flag, over which the feature
/// contributions of that flag are averaged.
pub const CONTRIB_SAMPLES: u32 = 50;
/// Training rows drawn in the latent plot (a uniform sample).
pub const LATENT_TRAIN_POINTS: usize = 2000;
/// Field rows drawn in the latent plot (a uniform sample over all logs).
pub const LATENT_FIELD_POINTS: usize = 3000;
/// Width of a timeline's plot area in SVG user units (pixels at 100 %); one
/// drawn column per unit.
pub const PLOT_COLUMNS: usize = 940;

/// Ground truth of a log (when its change began, drift or fault): the demo
/// scenario's own row type.
pub use plumb_scenario::{Truth as TruthRow, TruthKind};

/// Reads a ground-truth CSV (the demo scenario's format, read by
/// [`plumb_scenario::read_truth`]): header
/// `scenario,file,onset_row,onset_t_s,kind,features`, one row per log; `file`
/// is relative to the truth file's folder, `features` is `;`-separated. The
/// report places the onset by row.
pub fn read_truth(path: &Path) -> Result<Vec<TruthRow>> {
    plumb_scenario::read_truth(path).map_err(|e| {
        if e.kind() == std::io::ErrorKind::InvalidData {
            // The message already says file:line.
            Error::input(e.to_string())
        } else {
            Error::io(path, "read", &e)
        }
    })
}

/// The truth row describing `log`: the same file (canonical paths), else
/// the one row with the same file name.
pub fn truth_for<'a>(log: &Path, truth: &'a [TruthRow]) -> Option<&'a TruthRow> {
    let canon = |p: &Path| std::fs::canonicalize(p).ok();
    if let Some(c) = canon(log) {
        if let Some(t) = truth.iter().find(|t| canon(&t.file).as_ref() == Some(&c)) {
            return Some(t);
        }
    }
    let name = log.file_name()?;
    let mut same = truth.iter().filter(|t| t.file.file_name() == Some(name));
    match (same.next(), same.next()) {
        (Some(t), None) => Some(t),
        _ => None,
    }
}

/// Smallest and largest value seen (empty: `lo > hi`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Span {
    pub lo: f32,
    pub hi: f32,
}

impl Span {
    const EMPTY: Span = Span {
        lo: f32::INFINITY,
        hi: f32::NEG_INFINITY,
    };

    fn add(&mut self, v: f32) {
        if v.is_finite() {
            self.lo = self.lo.min(v);
            self.hi = self.hi.max(v);
        }
    }

    fn merge(&mut self, o: Span) {
        self.lo = self.lo.min(o.lo);
        self.hi = self.hi.max(o.hi);
    }

    pub fn is_empty(&self) -> bool {
        self.lo > self.hi
    }
}

/// Consecutive samples reduced to their extremes.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Bucket {
    /// First sample index.
    pub start: u64,
    /// Samples.
    pub n: u64,
    /// Log time of the first sample.
    pub t: Option<f64>,
    /// Faulted samples.
    pub faults: u32,
    /// Samples in the drifting state.
    pub drifting: u32,
    /// `u` of each score, per sample (faulted samples have none).
    pub raw: [Span; 3],
    /// The detector's EWMA of `u` (for SPE, of the SPE standardised within
    /// each sample's operating mode).
    pub ewma: [Span; 3],
    /// The detector's CUSUM of `u` over its limit `h`.
    pub cusum: [Span; 3],
    /// The SPE's feature charts, in [`Chart::ALL`] order: each one's
    /// largest `|EWMA|`.
    pub charts: [Span; 2],
}

impl Bucket {
    fn merge(&mut self, o: &Bucket) {
        self.n += o.n;
        self.faults += o.faults;
        self.drifting += o.drifting;
        for s in 0..3 {
            self.raw[s].merge(o.raw[s]);
            self.ewma[s].merge(o.ewma[s]);
            self.cusum[s].merge(o.cusum[s]);
        }
        for (a, b) in self.charts.iter_mut().zip(o.charts) {
            a.merge(b);
        }
    }
}

/// Min/max reduction of a stream into at most `2 · columns` buckets of equal
/// length (the last may be short); memory does not grow with the stream.
#[derive(Debug, Clone)]
pub(crate) struct Reducer {
    cap: usize,
    per: u64,
    pub buckets: Vec<Bucket>,
}

/// One sample for the [`Reducer`].
pub(crate) struct Sample {
    pub index: u64,
    pub t: Option<f64>,
    pub raw: Option<[f32; 3]>,
    pub ewma: [f32; 3],
    pub cusum: [f32; 3],
    /// The largest `|EWMA|` of each feature chart, in [`Chart::ALL`] order
    /// ([`Chart::peak`]).
    pub charts: [f32; 2],
    pub drifting: bool,
}

impl Reducer {
    pub fn new(columns: usize) -> Self {
        Reducer {
            cap: 2 * columns.max(1),
            per: 1,
            buckets: Vec::new(),
        }
    }

    pub fn push(&mut self, s: &Sample) {
        let open = matches!(self.buckets.last(), Some(b) if b.n < self.per);
        if !open {
            if self.buckets.len() == self.cap {
                let old = std::mem::take(&mut self.buckets);
                for pair in old.chunks(2) {
                    let mut b = pair[0].clone();
                    if let Some(o) = pair.get(1) {
                        b.merge(o);
                    }
                    self.buckets.push(b);
                }
                self.per *= 2;
                return self.push(s);
            }
            self.buckets.push(Bucket {
                start: s.index,
                n: 0,
                t: s.t,
                faults: 0,
                drifting: 0,
                raw: [Span::EMPTY; 3],
                ewma: [Span::EMPTY; 3],
                cusum: [Span::EMPTY; 3],
                charts: [Span::EMPTY; 2],
            });
        }
        let Some(b) = self.buckets.last_mut() else {
            return;
        };
        b.n += 1;
        match s.raw {
            Some(r) => {
                for (span, v) in b.raw.iter_mut().zip(r) {
                    span.add(v);
                }
            }
            None => b.faults += 1,
        }
        if s.drifting {
            b.drifting += 1;
        }
        for i in 0..3 {
            b.ewma[i].add(s.ewma[i]);
            b.cusum[i].add(s.cusum[i]);
        }
        for (span, v) in b.charts.iter_mut().zip(s.charts) {
            span.add(v);
        }
    }
}

/// Mean squared residuals after one flag rose.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct FlagContrib {
    /// Scored samples averaged (≤ [`CONTRIB_SAMPLES`]; fewer when the log
    /// ended or the flag cleared first).
    pub samples: u32,
    /// Mean `r_i²` per feature, model order.
    pub mean: Vec<f64>,
}

/// The SPE's charts of single features, each drawn in a panel of its own.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Chart {
    /// The residual chart: one EWMA per feature.
    Residual,
    /// The slow charts (model format 5, `plumb tailor`): a second, slower
    /// EWMA of the same input for each of some features.
    Slow,
}

impl Chart {
    pub const ALL: [Chart; 2] = [Chart::Residual, Chart::Slow];

    /// Position in [`Chart::ALL`] (and in every array kept per chart).
    pub fn index(self) -> usize {
        self as usize
    }

    /// The limit on the chart's `|EWMA|`.
    pub fn limit(self, m: &ModelOwned) -> f32 {
        match self {
            Chart::Residual => m.resid_limit,
            Chart::Slow => m.slow_limit,
        }
    }

    /// Whether the model has the chart: a residual chart with a gain that is
    /// not 0, or at least one slow chart.
    pub fn on(self, m: &ModelOwned) -> bool {
        match self {
            Chart::Residual => m.resid_gain.iter().any(|g| *g != 0.0),
            Chart::Slow => !m.slow_charts.is_empty(),
        }
    }

    /// The largest `|EWMA|` after the detector's last sample, its feature
    /// (model order) and that EWMA (signed).
    fn peak(self, m: &ModelOwned, chart: &ResidualChart) -> (f32, usize, f32) {
        match self {
            Chart::Residual => {
                let f = usize::from(chart.peak_feature);
                (
                    chart.peak,
                    f,
                    chart.ewma.get(f).copied().unwrap_or(chart.peak),
                )
            }
            Chart::Slow => {
                let f = usize::from(chart.slow_peak_feature);
                // The slow charts are kept in feature order; find its slot.
                let ewma = m
                    .slow_charts
                    .chunks_exact(SLOW_PARAMS)
                    .position(|p| p[0] == f as f32)
                    .and_then(|s| chart.slow.get(s).copied())
                    .unwrap_or(chart.slow_peak);
                (chart.slow_peak, f, ewma)
            }
        }
    }
}

/// One of the SPE's feature charts at the sample that raised a flag, when it
/// was over its limit there (so it is one of the reasons the SPE drove the
/// flag).
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct ChartAtRaise {
    /// The feature whose EWMA was the largest in absolute value (model order).
    pub feature: usize,
    /// That EWMA (signed).
    pub ewma: f32,
}

/// What the sink kept of one feature chart in one log.
#[derive(Debug, Clone, Default, PartialEq)]
pub(crate) struct ChartLog {
    /// Per flag: the chart, when it was over its limit as the flag rose.
    pub at_raise: Vec<Option<ChartAtRaise>>,
    /// Scored samples on which the chart was over its limit.
    pub over: u64,
}

/// Where a field row stood.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum PointClass {
    Train,
    Watching,
    Drifting,
}

/// One row in the latent plane.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct LatentPoint {
    pub t1: f32,
    pub t2: f32,
    pub class: PointClass,
}

/// A uniform sample of fixed size from a stream (Vitter's algorithm R),
/// seeded, so the same inputs draw the same points.
struct Reservoir {
    k: usize,
    seen: u64,
    rng: Rng,
    items: Vec<LatentPoint>,
}

impl Reservoir {
    fn new(k: usize, stream: u64) -> Self {
        Reservoir {
            k,
            seen: 0,
            rng: Rng::new(0x706c_756d_6272_6570, stream),
            items: Vec::new(),
        }
    }

    /// The slot a new item goes to, if any; the caller makes the item only
    /// then (computing latent scores for every row would double the cost).
    fn slot(&mut self) -> Option<usize> {
        self.seen += 1;
        if self.items.len() < self.k {
            return Some(self.items.len());
        }
        let j = self.rng.below(self.seen) as usize;
        (j < self.k).then_some(j)
    }

    fn put(&mut self, slot: usize, p: LatentPoint) {
        if slot == self.items.len() {
            self.items.push(p);
        } else {
            self.items[slot] = p;
        }
    }
}

/// Squared residuals `r_i²`, `r = z − P Pᵀ z`, `z = (x − μ)/s`, in f64: the
/// per-feature breakdown of the SPE the detector computed (their sum is the
/// detector's SPE to f32 rounding). `z` is scratch space; `x`, `z` and `out`
/// hold `d` values.
pub fn residual_sq(model: &ModelOwned, x: &[f32], z: &mut [f64], out: &mut [f64]) {
    let d = model.mean.len();
    let m = model.eigenvalues.len();
    for i in 0..d {
        z[i] = (f64::from(x[i]) - f64::from(model.mean[i])) / f64::from(model.scale[i]);
    }
    let mut t = [0f64; plumb_model::MAX_COMPONENTS];
    for j in 0..m {
        t[j] = (0..d)
            .map(|i| f64::from(model.loadings[i * m + j]) * z[i])
            .sum();
    }
    for i in 0..d {
        let back: f64 = (0..m)
            .map(|j| f64::from(model.loadings[i * m + j]) * t[j])
            .sum();
        let r = z[i] - back;
        out[i] = r * r;
    }
}

/// Everything the page is drawn from.
pub(crate) struct Collected<'a> {
    pub model_path: &'a Path,
    pub file: &'a ModelFile,
    pub reps: &'a [LogReplay],
    pub logs: Vec<LogData>,
    pub train_points: Vec<LatentPoint>,
    pub field_points: Vec<LatentPoint>,
    /// Mean `r_i²` per feature over all scored training rows.
    pub nominal_r2: Option<Vec<f64>>,
    pub train_files: usize,
    pub train_rows: u64,
    pub nll_floor: f32,
}

/// What the sink kept of one log.
pub(crate) struct LogData {
    pub buckets: Vec<Bucket>,
    pub contribs: Vec<FlagContrib>,
    /// The SPE's feature charts, in [`Chart::ALL`] order.
    pub charts: [ChartLog; 2],
    pub truth: Option<TruthRow>,
    /// Whether the log has a time column.
    pub timed: bool,
    /// First and last faulted sample.
    pub first_fault: Option<u64>,
    pub last_fault: Option<u64>,
}

fn total_bytes(paths: &[PathBuf]) -> u64 {
    paths
        .iter()
        .map(|p| std::fs::metadata(p).map(|m| m.len()).unwrap_or(0))
        .sum()
}

/// Accumulates the contributions of the flags of the current log.
struct ContribState {
    sums: Vec<Vec<f64>>,
    counts: Vec<u32>,
    active: Option<usize>,
    charts: [ChartLog; 2],
}

/// Replays `logs` (files or folders of `*.csv`) through the firmware detector
/// and writes the HTML report to `out` (atomically). `train` (optional,
/// files or folders) supplies the training rows of the latent plot and the
/// nominal contribution level; `truth` rows that name a log add its onset.
/// Returns the replay of each log (flags, faults), as `plumb replay` does.
#[allow(clippy::too_many_arguments)]
pub fn write_report(
    model_path: &Path,
    file: &ModelFile,
    logs: &[PathBuf],
    train: &[PathBuf],
    truth: &[TruthRow],
    read: ReadOptions,
    out: &Path,
    progress: &Progress,
) -> Result<Vec<LogReplay>> {
    let model = &file.model;
    let d = model.mean.len();
    let m = model.eigenvalues.len();
    let logs = expand_paths(logs)?;
    let train = if train.is_empty() {
        Vec::new()
    } else {
        expand_paths(train)?
    };
    if out.is_dir() {
        return Err(Error::at(
            Location::file(out),
            "is a folder; expected the report's file name, e.g. report.html",
        ));
    }
    let mut z = vec![0f64; d];
    let mut r2 = vec![0f64; d];

    // Training rows: latent sample and nominal contributions.
    let mut train_res = Reservoir::new(LATENT_TRAIN_POINTS, 1);
    let mut nominal = vec![0f64; d];
    let mut nominal_n = 0u64;
    if !train.is_empty() {
        let stage = progress.stage("training", total_bytes(&train), true);
        replay::replay(file, &train, read.clone(), &stage, |step| {
            if step.outcome.scores.is_none() {
                return Ok(());
            }
            residual_sq(model, step.x, &mut z, &mut r2);
            for (a, b) in nominal.iter_mut().zip(&r2) {
                *a += b;
            }
            nominal_n += 1;
            if m >= 2 {
                if let Some(slot) = train_res.slot() {
                    if let Ok(s) = step.detector.score(step.x) {
                        train_res.put(
                            slot,
                            LatentPoint {
                                t1: s.latent[0],
                                t2: s.latent[1],
                                class: PointClass::Train,
                            },
                        );
                    }
                }
            }
            Ok(())
        })?;
    }

    // Field logs.
    let stage = progress.stage("replay", total_bytes(&logs), true);
    let mut field_res = Reservoir::new(LATENT_FIELD_POINTS, 2);
    let mut reducers: Vec<Reducer> = Vec::new();
    let mut contribs: Vec<ContribState> = Vec::new();
    let mut timed: Vec<bool> = Vec::new();
    let mut fault_at: Vec<(Option<u64>, Option<u64>)> = Vec::new();
    let mut nll_floor = f32::NAN;
    let reps = replay::replay(file, &logs, read, &stage, |step: Step<'_>| {
        while reducers.len() <= step.log {
            reducers.push(Reducer::new(PLOT_COLUMNS));
            contribs.push(ContribState {
                sums: Vec::new(),
                counts: Vec::new(),
                active: None,
                charts: Default::default(),
            });
            timed.push(false);
            fault_at.push((None, None));
        }
        let o = step.outcome;
        let det = step.detector;
        nll_floor = det.nll_floor();
        if step.t.is_some() {
            timed[step.log] = true;
        }
        if o.fault.is_some() {
            let fa = &mut fault_at[step.log];
            fa.0.get_or_insert(o.index);
            fa.1 = Some(o.index);
        }
        let mp = &det.model().monitor;
        let limits = [&mp.spe, &mp.t2, &mp.nll];
        let raw = o.scores.map(|s| {
            let g = det.transformed(&s);
            let mut u = [0f32; 3];
            for i in 0..3 {
                u[i] = (g[i] - limits[i].center) / limits[i].spread;
            }
            u
        });
        let mut ewma = [0f32; 3];
        let mut cusum = [0f32; 3];
        for (i, sc) in Score::ALL.into_iter().enumerate() {
            let tr = det.track(sc);
            ewma[i] = tr.ewma.value();
            cusum[i] = tr.cusum.value() / limits[i].cusum_limit;
        }
        // The feature charts (the residual chart's peak stays 0 when every
        // gain is 0, the slow charts' without any).
        let chart = det.residual_chart();
        let peaks = Chart::ALL.map(|ch| ch.peak(model, chart));
        let hot = Chart::ALL.map(|ch| peaks[ch.index()].0 > ch.limit(model));
        reducers[step.log].push(&Sample {
            index: o.index,
            t: step.t,
            raw,
            ewma,
            cusum,
            charts: peaks.map(|p| p.0),
            drifting: o.state == DriftState::Drifting,
        });

        let cs = &mut contribs[step.log];
        for ((log, (_, feature, ewma)), hot) in cs.charts.iter_mut().zip(peaks).zip(hot) {
            if o.scores.is_some() && hot {
                log.over += 1;
            }
            if let Some(Event::Raised { .. }) = o.event {
                log.at_raise
                    .push(hot.then_some(ChartAtRaise { feature, ewma }));
            }
        }
        if let Some(Event::Raised { .. }) = o.event {
            cs.sums.push(vec![0.0; d]);
            cs.counts.push(0);
            cs.active = Some(cs.sums.len() - 1);
        }
        if matches!(o.event, Some(Event::Cleared)) {
            cs.active = None;
        }
        if o.scores.is_some() {
            if let Some(a) = cs.active {
                residual_sq(model, step.x, &mut z, &mut r2);
                for (s, v) in cs.sums[a].iter_mut().zip(&r2) {
                    *s += v;
                }
                cs.counts[a] += 1;
                if cs.counts[a] >= CONTRIB_SAMPLES {
                    cs.active = None;
                }
            }
            if m >= 2 {
                if let Some(slot) = field_res.slot() {
                    if let Ok(s) = det.score(step.x) {
                        field_res.put(
                            slot,
                            LatentPoint {
                                t1: s.latent[0],
                                t2: s.latent[1],
                                class: if o.state == DriftState::Drifting {
                                    PointClass::Drifting
                                } else {
                                    PointClass::Watching
                                },
                            },
                        );
                    }
                }
            }
        }
        Ok(())
    })?;
    if !nll_floor.is_finite() {
        nll_floor = replay::detector(file)?.nll_floor();
    }

    let mut data = Vec::with_capacity(reps.len());
    for (i, rep) in reps.iter().enumerate() {
        let (buckets, contrib, charts) = match (reducers.get(i), contribs.get(i)) {
            (Some(r), Some(c)) => (
                r.buckets.clone(),
                c.sums
                    .iter()
                    .zip(&c.counts)
                    .map(|(s, n)| FlagContrib {
                        samples: *n,
                        mean: s.iter().map(|v| v / f64::from((*n).max(1))).collect(),
                    })
                    .collect(),
                c.charts.clone(),
            ),
            _ => (Vec::new(), Vec::new(), Default::default()),
        };
        data.push(LogData {
            buckets,
            contribs: contrib,
            charts,
            truth: truth_for(&rep.path, truth).cloned(),
            timed: timed.get(i).copied().unwrap_or(false),
            first_fault: fault_at.get(i).and_then(|f| f.0),
            last_fault: fault_at.get(i).and_then(|f| f.1),
        });
    }
    let collected = Collected {
        model_path,
        file,
        reps: &reps,
        logs: data,
        train_points: train_res.items,
        field_points: field_res.items,
        nominal_r2: (nominal_n > 0).then(|| nominal.iter().map(|v| v / nominal_n as f64).collect()),
        train_files: train.len(),
        train_rows: nominal_n,
        nll_floor,
    };
    replay::require_samples(&reps)?;
    let html = page::render(&collected);
    crate::files::write_atomic(out, html.as_bytes())?;
    Ok(reps)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample(i: u64, v: f32) -> Sample {
        Sample {
            index: i,
            t: Some(i as f64 * 0.1),
            raw: Some([v, -v, v * 2.0]),
            ewma: [v; 3],
            cusum: [0.0; 3],
            charts: [v, 0.0],
            drifting: false,
        }
    }

    #[test]
    fn reducer_keeps_extremes_in_bounded_buckets() {
        let mut r = Reducer::new(10);
        for i in 0..1000u64 {
            let v = if i == 537 { 99.0 } else { (i % 7) as f32 };
            r.push(&sample(i, v));
        }
        assert!(r.buckets.len() <= 20 && r.buckets.len() >= 10);
        let n: u64 = r.buckets.iter().map(|b| b.n).sum();
        assert_eq!(n, 1000);
        let hi = r.buckets.iter().map(|b| b.raw[0].hi).fold(0f32, f32::max);
        assert_eq!(hi, 99.0, "a one-sample spike survives");
        // Buckets are contiguous.
        for w in r.buckets.windows(2) {
            assert_eq!(w[0].start + w[0].n, w[1].start);
        }
    }

    #[test]
    fn reservoir_is_bounded_and_seeded() {
        let draw = || {
            let mut r = Reservoir::new(5, 7);
            for i in 0..100 {
                if let Some(s) = r.slot() {
                    r.put(
                        s,
                        LatentPoint {
                            t1: i as f32,
                            t2: 0.0,
                            class: PointClass::Train,
                        },
                    );
                }
            }
            r.items
        };
        let a = draw();
        assert_eq!(a.len(), 5);
        assert_eq!(a, draw());
    }

    #[test]
    fn truth_rows_parse_and_errors_name_the_cell() {
        let dir = std::env::temp_dir().join(format!("plumb-truth-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let p = dir.join("truth.csv");
        std::fs::write(
            &p,
            "scenario,file,onset_row,onset_t_s,kind,features\na,a.csv,10,1.0,drift,x;y\nb,b.csv,5,0.5,fault,\n",
        )
        .unwrap();
        let t = read_truth(&p).unwrap();
        assert_eq!(t.len(), 2);
        assert_eq!(t[0].file, dir.join("a.csv"));
        assert_eq!(t[0].features, vec!["x", "y"]);
        assert_eq!(t[1].kind, TruthKind::Fault);
        assert!(truth_for(Path::new("elsewhere/b.csv"), &t).is_some());
        std::fs::write(
            &p,
            "scenario,file,onset_row,onset_t_s,kind,features\na,a.csv,ten,1.0,drift,x\n",
        )
        .unwrap();
        let e = read_truth(&p).unwrap_err().to_string();
        assert!(e.contains("truth.csv:2:") && e.contains("onset_row"), "{e}");
        let _ = std::fs::remove_dir_all(&dir);
    }
}
