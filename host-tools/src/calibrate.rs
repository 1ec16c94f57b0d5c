//! Calibration of the monitor limits on held-out nominal rows.
//!
//! 1. Every held-out row is scored once by the very detector the board runs
//!    ([`plumb_firmware::Detector::score`]), after rounding the row to f32.
//!    Faulted rows (non-finite, beyond `fault_z`) are counted and left out,
//!    as the detector leaves them out of its statistics.
//! 2. Per score, the monitored value is `u = (g(score) − center) / spread`
//!    with `g` = [`plumb_firmware::transform`] (cube root of SPE, of T², and
//!    of the NLL above the model's NLL floor), as the detector computes it
//!    ([`plumb_firmware::Detector::transformed`]). `center` and `spread` are
//!    the mean and standard deviation (ddof = 1) of the transformed held-out
//!    scores: plain moments, not robust estimates. The `u` of every scored
//!    row is kept (f32, computed as the detector computes it) with the place
//!    where each log starts. The SPE's EWMA runs on `v`, the transformed SPE
//!    standardised with the mean and standard deviation (ddof = 1) of the
//!    rows of the same operating mode (most likely mixture component; the
//!    global ones for a mode with fewer than two rows), stored per component
//!    in the model: the nominal SPE level differs between modes.
//!    On the demo it takes `new_floor` from 419 to 190 samples; standardising
//!    the SPE's CUSUM the same way raised its limit (2,333 against 877
//!    spreads) and delayed `bearing_wear` (BENCHMARKS.md, "Detection").
//! 3. The empirical 0.999 quantile of each raw score (inverted distribution
//!    function, R type 1: the `⌈0.999 n⌉`-th smallest value) is reported.
//!    The stored `sample_limit` is the per-sample (Shewhart) chart's limit,
//!    set like the other charts below and mapped back to the raw score.
//! 4. Allowance. The target false-alarm rate per sample is split evenly over
//!    the ten charts (three scores × upper CUSUM, upper EWMA and the
//!    per-sample chart, and the SPE's residual chart, [`crate::residual`];
//!    Bonferroni): each chart's budget is `B = rate / 10 × n`
//!    false alarms,
//!    `n` being the samples it can alarm on (those after each log's
//!    warm-up). A limit that gives `a` alarms on the held-out data gives
//!    about `a + 1` on new data of the same length (rank argument, see
//!    [`chart_allowance`]), so each chart may alarm at most `⌊B⌋ − 1` times
//!    on the held-out data; when that is 0 (or `B < 1`, which the report
//!    warns about), not at all.
//! 5. Per-chart run ([`Chart::alarms`]): one chart alone over the held-out
//!    `u`, with the detector's own arithmetic ([`plumb_firmware::stats`]):
//!    from 0 at the start of each log, no alarm during warm-up, an alarm after
//!    `raise_dwell` consecutive samples over the limit, and a restart from 0
//!    after each alarm. Held-out scores are strongly autocorrelated
//!    (operating modes last hundreds of samples; robots and days differ), so
//!    limits designed for independent input alarm far too often. Each chart's
//!    limit is therefore the smallest that meets its allowance on the held-out
//!    data, found by bisection ([`smallest_limit`], to [`SEARCH_TOL`]), and
//!    never below the design for independent N(0, 1) input: the limit whose
//!    in-control ARL is `10 / rate` (Markov chain of Brook & Evans 1972,
//!    [`crate::arl`]).
//! 6. CUSUM: for every reference value `k` of the slack grid (default
//!    [`SLACK_GRID`]) the decision limit `h` is set as in 5; the `(k, h)`
//!    kept is the one whose ARL at the design shift (`--design-shift`,
//!    default [`DESIGN_SHIFT`] spreads; Markov chain, or Siegmund's
//!    approximation for a large `h`) is shortest. Comparing the out-of-control
//!    ARL at a reference shift is the standard way to trade `k` against `h`;
//!    the value 2 is common practice, no source.
//! 7. EWMA: `L` as in 5 for the given λ (limit on `u`, or `v` for the SPE:
//!    `L √(λ / (2 − λ))`).
//! 8. End-to-end: the full [`plumb_firmware::Detector::update`] state
//!    machine runs once over the held-out logs (a fresh detector per log).
//!    Charts interact there (a flag rises when any chart is hot for
//!    `raise_dwell` samples, and holds), so the check may still count more
//!    flags than the target allows (`⌊rate × samples watched⌋`). Only then,
//!    as a fallback, every chart over its limit when a flag rose is widened by
//!    [`GROWTH`] and the run repeats, at most [`MAX_ROUNDS`] times; the report
//!    says how far and whether the target was met.
//! 9. The achieved false-alarm rate is `flags raised / samples watched` (a
//!    sample is watched when the detector is in its watching state, so warm-up
//!    and raised periods do not count), with a 95 % Wilson score interval
//!    (Wilson 1927).
//!
//! Defaults of the state machine (warm-up 50 samples, raise dwell 3, clear
//! dwell 50, minimum hold 100, clear fraction 0.5, fault at 50 scales) are
//! common practice, no source.

use crate::arl;
use crate::error::{Error, Result};
use crate::progress::Stage;
use plumb_firmware::stats::{Cusum, Ewma, Welford};
use plumb_firmware::{Detector, DriftState, Event, Score};
use plumb_model::{ModelOwned, MonitorParams, ScoreLimits};
use serde::Serialize;
use std::time::Instant;

/// Widening factor per round of the end-to-end fallback.
pub const GROWTH: f64 = 1.25;
/// Most end-to-end runs (the check and its fallback rounds).
pub const MAX_ROUNDS: usize = 25;
/// Quantile of the raw held-out score used as the per-sample limit.
pub const SAMPLE_QUANTILE: f64 = 0.999;
/// Significance of the Jackson–Mudholkar SPE limit shown beside it.
pub const JM_ALPHA: f64 = 0.001;
/// Charts sharing the false-alarm rate: three scores × CUSUM, EWMA and the
/// per-sample (Shewhart) chart, combined as in Lucas (1982), and the SPE's
/// residual chart ([`crate::residual`]).
pub const CHARTS: usize = 10;
/// CUSUM reference values `k` (spreads) tried per score by default.
pub const SLACK_GRID: [f64; 7] = [0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0];
/// Largest CUSUM reference value accepted (spreads).
pub const MAX_SLACK: f64 = 5.0;
/// Shift (spreads) at which CUSUM designs are compared by default (common
/// practice, no source).
pub const DESIGN_SHIFT: f64 = 2.0;
/// Relative precision of the limit searches.
pub const SEARCH_TOL: f64 = 1e-3;

/// Settings of the calibration and the state machine.
#[derive(Debug, Clone, PartialEq)]
pub struct CalibConfig {
    /// Target false alarms per sample, all charts together.
    pub false_alarm_rate: f64,
    /// CUSUM reference values `k` (in spreads) to choose from; a single
    /// value fixes `k`.
    pub cusum_slacks: Vec<f64>,
    /// Shift of the monitored value (in spreads) at which candidate CUSUM
    /// designs are compared.
    pub design_shift: f64,
    /// EWMA smoothing constant λ.
    pub ewma_lambda: f64,
    /// Samples of warm-up.
    pub warmup: u32,
    /// Consecutive hot samples to raise a flag.
    pub raise_dwell: u16,
    /// Consecutive calm samples to clear it.
    pub clear_dwell: u16,
    /// Fewest samples a flag stays up.
    pub min_hold: u32,
    /// Calm threshold as a fraction of each limit.
    pub clear_fraction: f64,
    /// Standardised distance beyond which a feature is a sensor fault.
    pub fault_z: f64,
    /// Threads for the limit searches (1 or 2); results do not depend on it.
    pub threads: usize,
    /// What the SPE's residual chart smooths.
    pub residual_input: ResidualInput,
}

/// What the SPE's residual chart smooths ([`crate::residual`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ResidualInput {
    /// Each feature's residual whitened by the residuals' nominal
    /// covariance (model format 4's matrix).
    Whitened,
    /// Each feature's residual as it is (no matrix; format 3's chart).
    Plain,
}

impl Default for CalibConfig {
    fn default() -> Self {
        CalibConfig {
            false_alarm_rate: 1e-5,
            cusum_slacks: SLACK_GRID.to_vec(),
            design_shift: DESIGN_SHIFT,
            ewma_lambda: 0.1,
            warmup: 50,
            raise_dwell: 3,
            clear_dwell: 50,
            min_hold: 100,
            clear_fraction: 0.5,
            fault_z: 50.0,
            threads: 2,
            residual_input: ResidualInput::Whitened,
        }
    }
}

impl CalibConfig {
    /// Checks ranges, naming the option at fault.
    pub fn validate(&self) -> Result<()> {
        let r = self.false_alarm_rate;
        if !(r > 0.0 && r < 0.1) {
            return Err(Error::input(format!(
                "--false-alarm-rate must be in (0, 0.1), got {r}"
            )));
        }
        if self.cusum_slacks.is_empty()
            || self
                .cusum_slacks
                .iter()
                .any(|k| !(*k >= 0.0 && *k <= MAX_SLACK))
        {
            return Err(Error::input(format!(
                "--cusum-slack must be `auto` or values in [0, {MAX_SLACK}]"
            )));
        }
        if !(self.design_shift > 0.0 && self.design_shift <= 10.0) {
            return Err(Error::input("--design-shift must be in (0, 10]"));
        }
        if !(self.ewma_lambda > 0.0 && self.ewma_lambda <= 1.0) {
            return Err(Error::input("--ewma-lambda must be in (0, 1]"));
        }
        if self.raise_dwell == 0 || self.clear_dwell == 0 {
            return Err(Error::input(
                "--raise-dwell and --clear-dwell must be at least 1",
            ));
        }
        if !(self.clear_fraction > 0.0 && self.clear_fraction <= 1.0) {
            return Err(Error::input("--clear-fraction must be in (0, 1]"));
        }
        if !(self.fault_z > 0.0 && self.fault_z.is_finite()) {
            return Err(Error::input("--fault-z must be a positive number"));
        }
        Ok(())
    }

    /// Monitor parameters with placeholder limits, for scoring.
    pub fn placeholder(&self) -> MonitorParams {
        let lim = ScoreLimits {
            sample_limit: 1.0,
            center: 0.0,
            spread: 1.0,
            cusum_slack: self.cusum_slacks.first().copied().unwrap_or(0.5) as f32,
            cusum_limit: 1.0,
            ewma_limit: 1.0,
        };
        MonitorParams {
            fault_z: self.fault_z as f32,
            warmup: self.warmup,
            ewma_lambda: self.ewma_lambda as f32,
            raise_dwell: self.raise_dwell,
            clear_dwell: self.clear_dwell,
            min_hold: self.min_hold,
            clear_fraction: self.clear_fraction as f32,
            spe: lim,
            t2: lim,
            nll: lim,
        }
    }
}

/// Held-out rows, replayable: calls `f(file, row)` for every row in order.
pub trait RowSource {
    /// Units a pass advances a progress stage by (bytes for logs, rows in
    /// memory).
    fn progress_total(&self) -> u64;
    /// One pass over all rows; returns the rows left out for empty or
    /// non-finite cells.
    fn for_each_row(&self, stage: &Stage, f: &mut dyn FnMut(usize, &[f64])) -> Result<u64>;
}

/// Rows held in memory, one row-major vector per log (tests, small data).
#[derive(Debug, Clone)]
pub struct MemoryRows {
    /// Features per row.
    pub d: usize,
    /// One row-major vector per log.
    pub files: Vec<Vec<f64>>,
}

impl RowSource for MemoryRows {
    fn progress_total(&self) -> u64 {
        self.files.iter().map(|f| (f.len() / self.d) as u64).sum()
    }

    fn for_each_row(&self, stage: &Stage, f: &mut dyn FnMut(usize, &[f64])) -> Result<u64> {
        for (i, file) in self.files.iter().enumerate() {
            for row in file.chunks_exact(self.d) {
                f(i, row);
            }
            stage.advance((file.len() / self.d) as u64);
        }
        Ok(0)
    }
}

/// The held-out monitored values of one score, as its charts see them.
#[derive(Debug, Clone, Copy)]
pub struct Series<'a> {
    /// `u` of every scored row, the logs one after the other.
    pub u: &'a [f32],
    /// Where each log starts in `u`: ascending, the first is 0.
    pub starts: &'a [usize],
    /// Samples at the start of each log that cannot alarm (warm-up).
    pub warmup: u32,
    /// Consecutive samples over the limit that make an alarm (≥ 1).
    pub dwell: u16,
}

impl<'a> Series<'a> {
    /// The logs, one slice each.
    pub fn logs(&self) -> impl Iterator<Item = &'a [f32]> + '_ {
        (0..self.starts.len()).map(move |i| {
            let a = self.starts[i].min(self.u.len());
            let b = self
                .starts
                .get(i + 1)
                .copied()
                .unwrap_or(self.u.len())
                .min(self.u.len());
            &self.u[a..b.max(a)]
        })
    }

    /// Samples a chart can alarm on (after each log's warm-up).
    pub fn eligible(&self) -> u64 {
        self.logs()
            .map(|l| l.len().saturating_sub(self.warmup as usize) as u64)
            .sum()
    }
}

/// One chart on a monitored value, as the detector runs it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Chart {
    /// Upper CUSUM with reference value `k` (capped at twice its limit).
    Cusum {
        /// Reference value `k`, in spreads.
        slack: f32,
    },
    /// Upper EWMA with smoothing constant λ.
    Ewma {
        /// λ in (0, 1].
        lambda: f32,
    },
    /// The sample itself against a per-sample limit (Shewhart).
    Sample,
}

/// The detector's statistic for a chart, restartable.
enum Stat {
    Cusum(Cusum),
    Ewma(Ewma),
    Sample,
}

impl Stat {
    /// `limit`: the chart's limit (the CUSUM cap is twice it, as on the
    /// device); `None` for no cap.
    fn new(chart: Chart, limit: Option<f32>) -> Stat {
        match chart {
            Chart::Cusum { slack } => {
                Stat::Cusum(Cusum::new(slack, limit.map_or(f32::INFINITY, |h| 2.0 * h)))
            }
            Chart::Ewma { lambda } => Stat::Ewma(Ewma::new(lambda, 0.0)),
            Chart::Sample => Stat::Sample,
        }
    }

    #[inline]
    fn push(&mut self, u: f32) -> f32 {
        match self {
            Stat::Cusum(c) => c.push(u),
            Stat::Ewma(e) => e.push(u),
            Stat::Sample => u,
        }
    }
}

impl Chart {
    /// Alarms of this chart alone over `s` with limit `limit`: each log from
    /// 0, no alarm in warm-up, an alarm after `dwell` consecutive samples
    /// over the limit, and a restart from 0 after each alarm.
    pub fn alarms(self, s: &Series<'_>, limit: f32) -> u64 {
        let warmup = s.warmup as usize;
        let dwell = u32::from(s.dwell.max(1));
        let mut alarms = 0;
        for log in s.logs() {
            let mut stat = Stat::new(self, Some(limit));
            let mut run = 0u32;
            for (i, &u) in log.iter().enumerate() {
                let v = stat.push(u);
                if i < warmup {
                    continue;
                }
                if v > limit {
                    run += 1;
                    if run >= dwell {
                        alarms += 1;
                        stat = Stat::new(self, Some(limit));
                        run = 0;
                    }
                } else {
                    run = 0;
                }
            }
        }
        alarms
    }

    /// The highest value the statistic takes, with no limit (so no restart
    /// and no cap), at a sample that may alarm; any limit at or above it
    /// gives no alarm. `−∞` when no sample may alarm.
    pub fn peak(self, s: &Series<'_>) -> f32 {
        let warmup = s.warmup as usize;
        let mut peak = f32::NEG_INFINITY;
        for log in s.logs() {
            let mut stat = Stat::new(self, None);
            for (i, &u) in log.iter().enumerate() {
                let v = stat.push(u);
                if i >= warmup && v > peak {
                    peak = v;
                }
            }
        }
        peak
    }
}

/// What a limit search found.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct LimitSearch {
    /// The limit, as the model stores it.
    pub limit: f32,
    /// Alarms of the chart alone on the held-out data at that limit.
    pub alarms: u64,
    /// Whether the design for independent input already met the allowance.
    pub at_floor: bool,
    /// Passes over the held-out data.
    pub passes: u32,
}

/// The smallest limit, not below `floor`, at which `chart` alarms at most
/// `allowed` times on `s`, by bisection to a relative [`SEARCH_TOL`].
///
/// The search keeps a limit known to meet the allowance as its upper end: the
/// chart's [`Chart::peak`] gives no alarm at all, so the result always meets
/// it even where the count is not monotone in the limit (a restart after an
/// alarm can change later counts).
pub fn smallest_limit(chart: Chart, s: &Series<'_>, floor: f64, allowed: u64) -> LimitSearch {
    smallest_limit_with(
        |l| chart.alarms(s, l),
        || chart.peak(s),
        floor as f32,
        allowed,
    )
}

/// [`smallest_limit`] for any chart: `alarms(limit)` counts its alarms on the
/// held-out data, `peak()` gives the highest value it takes there (a limit
/// at or above it gives no alarm). Each call of either is one pass.
pub fn smallest_limit_with(
    alarms: impl Fn(f32) -> u64,
    peak: impl FnOnce() -> f32,
    floor: f32,
    allowed: u64,
) -> LimitSearch {
    let mut passes = 1;
    let at_floor = alarms(floor);
    if at_floor <= allowed {
        return LimitSearch {
            limit: floor,
            alarms: at_floor,
            at_floor: true,
            passes,
        };
    }
    let mut lo = floor;
    let mut hi = peak().max(floor);
    passes += 1;
    // The peak gives no alarm; step up should rounding have it otherwise.
    let mut hi_alarms = alarms(hi);
    passes += 1;
    while hi_alarms > allowed && hi.is_finite() {
        lo = hi;
        hi = if hi > 0.0 { hi * 2.0 } else { 1.0 };
        hi_alarms = alarms(hi);
        passes += 1;
    }
    while f64::from(hi - lo) > SEARCH_TOL * f64::from(hi) {
        let mid = lo + 0.5 * (hi - lo);
        if !(mid > lo && mid < hi) {
            break;
        }
        let a = alarms(mid);
        passes += 1;
        if a <= allowed {
            hi = mid;
            hi_alarms = a;
        } else {
            lo = mid;
        }
    }
    LimitSearch {
        limit: hi,
        alarms: hi_alarms,
        at_floor: false,
        passes,
    }
}

/// Each chart's false-alarm budget on `samples` held-out samples,
/// `B = rate / 10 × samples` ([`CHARTS`]), and the alarms it may give there,
/// `⌊B⌋ − 1` (at least 0).
///
/// Why one fewer than the budget: a limit at which a chart alarms `a` times
/// on the held-out data sits at the `(a + 1)`-th highest of its excursion
/// peaks there. If the excursions of new data are exchangeable with those,
/// each exceeds that peak with probability `(a + 1) / (N + 1)` (N peaks held
/// out), so new data of the same length alarm about `a + 1` times: the rank
/// argument behind empirical quantile limits. `a + 1 ≤ B` keeps the expected
/// count on new data within the budget. With `B < 1` no allowance can; 0 is
/// used and the calibration warns.
pub fn chart_allowance(rate: f64, samples: u64) -> (f64, u64) {
    let budget = rate / CHARTS as f64 * samples as f64;
    (budget, (budget.floor() as u64).saturating_sub(1))
}

/// Maps `f` over `items` on up to `threads` threads; results in item order.
fn par_map<T: Sync, R: Send>(items: &[T], threads: usize, f: impl Fn(&T) -> R + Sync) -> Vec<R> {
    let threads = threads.clamp(1, items.len().max(1));
    if threads == 1 {
        return items.iter().map(&f).collect();
    }
    let next = std::sync::atomic::AtomicUsize::new(0);
    let mut out: Vec<(usize, R)> = std::thread::scope(|scope| {
        let workers: Vec<_> = (0..threads)
            .map(|_| {
                scope.spawn(|| {
                    let mut mine = Vec::new();
                    loop {
                        let i = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        let Some(item) = items.get(i) else { break };
                        mine.push((i, f(item)));
                    }
                    mine
                })
            })
            .collect();
        workers
            .into_iter()
            .flat_map(|w| w.join().expect("limit search thread"))
            .collect()
    });
    out.sort_by_key(|(i, _)| *i);
    out.into_iter().map(|(_, r)| r).collect()
}

/// One candidate reference value of a score's CUSUM.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SlackCandidate {
    /// Reference value `k` (spreads).
    pub k: f64,
    /// Decision limit for independent N(0, 1) input at the chart ARL.
    pub h_iid: f64,
    /// Decision limit set on the held-out data (≥ `h_iid`).
    pub h: f64,
    /// Alarms of this CUSUM alone on the held-out data at `h`.
    pub alarms: u64,
    /// ARL at the design shift for independent input (the delay estimate).
    pub arl_at_shift: f64,
}

/// Calibration of one score.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ScoreCalib {
    /// `spe`, `t2` or `nll`.
    pub score: &'static str,
    /// Mean of the transformed score.
    pub center: f64,
    /// Standard deviation of the transformed score.
    pub spread: f64,
    /// Empirical 0.999 quantile of the raw score (the per-sample limit).
    pub quantile_999: f64,
    /// CUSUM reference value `k` chosen (spreads).
    pub cusum_slack: f64,
    /// CUSUM decision limit for independent input at that `k`.
    pub cusum_limit_iid: f64,
    /// CUSUM decision limit `h` set on the held-out data (before any
    /// widening; spreads).
    pub cusum_limit: f64,
    /// Alarms of the CUSUM alone on the held-out data at `cusum_limit`.
    pub cusum_alarms: u64,
    /// ARL of the CUSUM at the design shift, independent input, at the
    /// stored limit (after any widening).
    pub cusum_arl_at_shift: f64,
    /// Every `k` tried.
    pub cusum_candidates: Vec<SlackCandidate>,
    /// EWMA `L` for independent input (asymptotic standard deviations).
    pub ewma_l_iid: f64,
    /// EWMA `L` set on the held-out data (before any widening).
    pub ewma_l: f64,
    /// EWMA limit on `u` (`L σ_Z`, before any widening).
    pub ewma_limit: f64,
    /// Alarms of the EWMA alone on the held-out data at `ewma_limit`.
    pub ewma_alarms: u64,
    /// ARL of the EWMA at the design shift, independent input, at the stored
    /// limit.
    pub ewma_arl_at_shift: f64,
    /// Per-sample limit on `u` for independent N(0, 1) input: one sample
    /// over it raises a flag, with the chart's in-control ARL.
    pub sample_u_iid: f64,
    /// Per-sample limit on `u` set on the held-out data (before widening).
    pub sample_u: f64,
    /// Alarms (samples over it) of the per-sample chart alone on the
    /// held-out data.
    pub sample_alarms: u64,
    /// The per-sample limit as stored, on the raw score.
    pub sample_limit: f64,
    /// Steps of 0.25 the per-sample limit on `u` was raised by in the
    /// end-to-end fallback.
    pub sample_widened: u32,
    /// Factor the CUSUM limit was widened by in the end-to-end fallback.
    pub cusum_widened: f64,
    /// Factor the EWMA limit was widened by.
    pub ewma_widened: f64,
}

impl ScoreCalib {
    /// The CUSUM limit as stored (after widening).
    pub fn cusum_stored(&self) -> f32 {
        (self.cusum_limit * self.cusum_widened) as f32
    }

    /// The EWMA limit on `u` as stored (after widening).
    pub fn ewma_stored(&self) -> f32 {
        (self.ewma_limit * self.ewma_widened) as f32
    }

    /// The per-sample limit on `u` after widening.
    pub fn sample_u_stored(&self) -> f64 {
        self.sample_u + 0.25 * f64::from(self.sample_widened)
    }

    /// The per-sample limit on the raw score for a limit `u` on the
    /// standardised scale: the inverse of the detector's transform.
    fn raw_limit(&self, u: f64, nll_floor: f64) -> f64 {
        let g = self.center + self.spread * u;
        let cube = g * g * g;
        if self.score == "nll" {
            cube + nll_floor
        } else {
            cube.max(0.0)
        }
    }
}

/// Wall time of the calibration steps, seconds.
#[derive(Debug, Clone, PartialEq, Serialize, Default)]
pub struct CalibSeconds {
    /// Scoring the held-out rows.
    pub score: f64,
    /// Designs for independent input and the per-chart searches.
    pub design: f64,
    /// End-to-end detector runs.
    pub check: f64,
}

/// The transformed SPE within one operating mode (mixture component).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ModeCalib {
    /// Held-out rows whose most likely component this is.
    pub rows: u64,
    /// Mean of their transformed SPE (the global one under two rows).
    pub center: f64,
    /// Standard deviation (ddof = 1) of the same (the global one under two
    /// rows).
    pub spread: f64,
}

/// What the calibration found.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CalibReport {
    /// Held-out rows scored.
    pub scored: u64,
    /// Held-out rows faulted (not scored).
    pub faults: u64,
    /// Held-out rows left out for empty or non-finite cells.
    pub skipped: u64,
    /// In-control ARL each chart is designed for with independent input
    /// (`10 / rate`).
    pub chart_arl: f64,
    /// Held-out samples a chart can alarm on (after each log's warm-up).
    pub chart_samples: u64,
    /// False alarms each chart may raise on them by the target
    /// (`rate / 10 × samples`).
    pub chart_budget: f64,
    /// Alarms each chart may give on the held-out data (`⌊budget⌋ − 1`, at
    /// least 0; see [`chart_allowance`]).
    pub allowed_per_chart: u64,
    /// Shift (spreads) at which delays are estimated and `k` is chosen.
    pub design_shift: f64,
    /// EWMA `L` for independent input.
    pub ewma_l_iid: f64,
    /// Passes of single charts over the held-out data in the searches.
    pub search_passes: u64,
    /// Per score.
    pub scores: Vec<ScoreCalib>,
    /// The SPE's residual chart (`None`, chart off, for a model over the
    /// device capacities).
    pub residual: Option<crate::residual::ResidualCalib>,
    /// Per mixture component: the transformed SPE's centre and spread among
    /// the held-out rows it is the most likely component of.
    pub spe_modes: Vec<ModeCalib>,
    /// Whether the end-to-end check ran through the device detector.
    pub end_to_end: bool,
    /// End-to-end runs (1: the per-chart limits passed the check).
    pub rounds: usize,
    /// Whether the fallback widened any limit.
    pub widened: bool,
    /// Flags raised on the held-out logs in the final run.
    pub flags: u64,
    /// Samples watched in the final run.
    pub watched: u64,
    /// Flags the target allows on those samples.
    pub allowed: u64,
    /// Whether the final run met the target.
    pub met_target: bool,
    /// Target false-alarm rate per sample.
    pub target_rate: f64,
    /// Achieved false-alarm rate per watched sample.
    pub rate: f64,
    /// 95 % Wilson score interval of the achieved rate.
    pub rate_ci95: [f64; 2],
    /// Name of the interval method.
    pub ci_method: &'static str,
    /// Jackson–Mudholkar SPE limit at α = 0.001 (None when θ1 = 0).
    pub spe_limit_jm: Option<f64>,
    /// Wall time of the steps.
    pub seconds: CalibSeconds,
    /// Warnings for the summary.
    pub warnings: Vec<String>,
}

/// Wilson score interval for `x` successes in `n` trials at normal quantile
/// `z` (Wilson 1927).
pub fn wilson(x: u64, n: u64, z: f64) -> [f64; 2] {
    if n == 0 {
        return [0.0, 1.0];
    }
    let n = n as f64;
    let p = x as f64 / n;
    let z2 = z * z;
    let denom = 1.0 + z2 / n;
    let centre = (p + z2 / (2.0 * n)) / denom;
    let half = z / denom * (p * (1.0 - p) / n + z2 / (4.0 * n * n)).sqrt();
    let lo = if x == 0 {
        0.0
    } else {
        (centre - half).max(0.0)
    };
    [lo, (centre + half).min(1.0)]
}

/// Jackson & Mudholkar (1979) SPE limit at significance `alpha` from θ1..θ3
/// (None when undefined: no residual variance, or `h0` ≈ 0).
pub fn jackson_mudholkar(theta: [f64; 3], alpha: f64) -> Option<f64> {
    let [t1, t2, t3] = theta;
    if !(t1 > 0.0 && t2 > 0.0) {
        return None;
    }
    let h0 = 1.0 - 2.0 * t1 * t3 / (3.0 * t2 * t2);
    if h0.abs() < 1e-3 {
        return None;
    }
    // (Q/θ1)^h0 is taken as normal. When one discarded eigenvalue dominates,
    // h0 < 0 and that power decreases in Q: the upper tail of Q is then the
    // lower tail of the power, so the normal quantile enters with its sign
    // flipped.
    let c = arl::phi_inv(1.0 - alpha) * h0.signum();
    let inner = c * (2.0 * t2 * h0 * h0).sqrt() / t1 + 1.0 + t2 * h0 * (h0 - 1.0) / (t1 * t1);
    let q = t1 * inner.powf(1.0 / h0);
    q.is_finite().then_some(q)
}

/// Inverted-CDF quantile (R type 1) of unsorted `v`: the `⌈p n⌉`-th
/// smallest value. Sorts `v`.
pub fn quantile_type1(v: &mut [f32], p: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f32::total_cmp);
    let rank = ((p * v.len() as f64).ceil() as usize).clamp(1, v.len());
    f64::from(v[rank - 1])
}

/// Raw and transformed scores of one sample by the host model (f64
/// arithmetic on the stored f32 parameters), for models over the device
/// capacities; mirrors the detector's definitions.
/// The model's smallest NLL in f64 (the device computes it in f32 at load):
/// `−ln Σ_c exp(ln π_c − ½ Σ_j ln(2π v_cj))`.
fn host_nll_floor(model: &ModelOwned) -> f64 {
    let m = usize::from(model.dims.components).max(1);
    let logs: Vec<f64> = model
        .weights
        .iter()
        .zip(model.mix_variances.chunks_exact(m))
        .map(|(w, v)| {
            f64::from(*w).ln()
                - 0.5
                    * v.iter()
                        .map(|x| (2.0 * std::f64::consts::PI * f64::from(*x)).ln())
                        .sum::<f64>()
        })
        .collect();
    let top = logs.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    -(top + logs.iter().map(|l| (l - top).exp()).sum::<f64>().ln())
}

fn host_scores(model: &ModelOwned, x: &[f64], fault_z: f64) -> Option<([[f32; 3]; 2], usize)> {
    let d = usize::from(model.dims.features);
    let m = usize::from(model.dims.components);
    let k = usize::from(model.dims.mixture);
    let mut z = vec![0.0; d];
    for i in 0..d {
        let v = (x[i] as f32 as f64 - f64::from(model.mean[i])) / f64::from(model.scale[i]);
        if !v.is_finite() || v.abs() > fault_z {
            return None;
        }
        z[i] = v;
    }
    let mut t = vec![0.0; m];
    for i in 0..d {
        for j in 0..m {
            t[j] += z[i] * f64::from(model.loadings[i * m + j]);
        }
    }
    let mut spe = 0.0;
    for i in 0..d {
        let recon: f64 = (0..m)
            .map(|j| f64::from(model.loadings[i * m + j]) * t[j])
            .sum();
        spe += (z[i] - recon).powi(2);
    }
    let t2: f64 = (0..m)
        .map(|j| t[j] * t[j] / f64::from(model.eigenvalues[j]))
        .sum();
    let mut lp = vec![0.0; k];
    let mut norms = vec![0.0; k];
    for c in 0..k {
        let mut norm = f64::from(model.weights[c]).ln();
        let mut quad = 0.0;
        for j in 0..m {
            let v = f64::from(model.mix_variances[c * m + j]);
            let e = t[j] - f64::from(model.mix_means[c * m + j]);
            norm -= 0.5 * (2.0 * std::f64::consts::PI * v).ln();
            quad += e * e / v;
        }
        norms[c] = norm;
        lp[c] = norm - 0.5 * quad;
    }
    let lse = |v: &[f64]| {
        let best = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        best + v.iter().map(|x| (x - best).exp()).sum::<f64>().ln()
    };
    let nll = -lse(&lp);
    let floor = -lse(&norms);
    // The first of the most likely components, as the detector picks it.
    let mode = lp
        .iter()
        .enumerate()
        .fold(
            (0, f64::NEG_INFINITY),
            |b, (c, l)| if *l > b.1 { (c, *l) } else { b },
        )
        .0;
    Some((
        [
            [spe as f32, t2 as f32, nll as f32],
            [
                spe.cbrt() as f32,
                t2.cbrt() as f32,
                (nll - floor).max(0.0).cbrt() as f32,
            ],
        ],
        mode,
    ))
}

/// Calibrates `model.monitor` in place on `rows`. The model's PCA and
/// mixture must be final.
pub fn calibrate(
    model: &mut ModelOwned,
    rows: &dyn RowSource,
    cfg: &CalibConfig,
    device: bool,
    stage: &dyn Fn(&str, u64) -> Stage,
) -> Result<CalibReport> {
    cfg.validate()?;
    let mut warnings = Vec::new();
    let mut seconds = CalibSeconds::default();
    let clock = Instant::now();
    model.monitor = cfg.placeholder();
    let d = usize::from(model.dims.features);
    let k = usize::from(model.dims.mixture);
    model.spe_center_by_mode = vec![0.0; k];
    model.spe_spread_by_mode = vec![1.0; k];
    crate::residual::off(model);

    // 1. Score every held-out row once: raw scores (for the quantiles) and
    // transformed scores (for the charts), with where each log starts.
    let mut raw: [Vec<f32>; 3] = [Vec::new(), Vec::new(), Vec::new()];
    let mut u: [Vec<f32>; 3] = [Vec::new(), Vec::new(), Vec::new()];
    let mut starts: Vec<usize> = Vec::new();
    // The most likely mixture component of each scored row.
    let mut modes: Vec<u16> = Vec::new();
    let mut moments = [Welford::<f64>::new(); 3];
    let mut faults = 0u64;
    // Each scored row's PCA residuals, `d` per row (device models only).
    let mut resid_rows: Vec<f32> = Vec::new();
    let skipped: u64;
    let nll_floor: f64;
    {
        let det = if device {
            Some(
                Detector::new(model.to_device().map_err(|e| {
                    Error::input(format!("model does not fit the device detector: {e}"))
                })?)
                .map_err(|e| Error::input(format!("model refused by the detector: {e}")))?,
            )
        } else {
            None
        };
        nll_floor = match &det {
            Some(det) => f64::from(det.nll_floor()),
            None => host_nll_floor(model),
        };
        let mut x32 = vec![0.0f32; d];
        let mut current = usize::MAX;
        let bar = stage("score", rows.progress_total());
        skipped = rows.for_each_row(&bar, &mut |file, row| {
            if file != current {
                starts.push(raw[0].len());
                current = file;
            }
            let scores = match &det {
                Some(det) => {
                    for (o, v) in x32.iter_mut().zip(row) {
                        *o = *v as f32;
                    }
                    let mut resid = [0.0f32; plumb_model::MAX_FEATURES];
                    det.score_residuals(&x32, &mut resid).ok().map(|s| {
                        resid_rows.extend_from_slice(&resid[..d]);
                        let mode = s.mode;
                        let s = s.scores;
                        ([[s.spe, s.t2, s.nll], det.transformed(&s)], mode)
                    })
                }
                None => host_scores(model, row, cfg.fault_z),
            };
            match scores {
                Some(([s, g], mode)) => {
                    modes.push(mode as u16);
                    for i in 0..3 {
                        raw[i].push(s[i]);
                        u[i].push(g[i]);
                        moments[i].push(f64::from(g[i]));
                    }
                }
                None => faults += 1,
            }
        })?;
    }
    let scored = raw[0].len() as u64;
    let needed = u64::from(cfg.warmup) + 100;
    if scored < needed {
        return Err(Error::input(format!(
            "calibration needs at least {needed} valid held-out rows (warm-up {} + 100), \
             found {scored} ({faults} faulted)",
            cfg.warmup
        )));
    }

    // 2. Centre and spread; u in the detector's f32 arithmetic. The SPE's
    // EWMA runs on v, the transformed SPE standardised within each row's
    // operating mode (its most likely mixture component): modes differ in
    // how well PCA reconstructs them. A mode with fewer than two rows keeps
    // the global centre and spread.
    let mut by_mode = vec![Welford::<f64>::new(); k];
    for (m, g) in modes.iter().zip(&u[0]) {
        by_mode[usize::from(*m)].push(f64::from(*g));
    }
    let global = (moments[0].mean(), moments[0].sample_variance().sqrt());
    let spe_modes: Vec<ModeCalib> = by_mode
        .iter()
        .map(|w| {
            let spread = w.sample_variance().sqrt();
            let own = w.count() >= 2 && spread > 0.0 && spread.is_finite();
            let (center, spread) = if own { (w.mean(), spread) } else { global };
            ModeCalib {
                rows: w.count(),
                center,
                spread,
            }
        })
        .collect();
    let v: Vec<f32> = modes
        .iter()
        .zip(&u[0])
        .map(|(m, g)| {
            let mc = &spe_modes[usize::from(*m)];
            (*g - mc.center as f32) / mc.spread as f32
        })
        .collect();
    drop(modes);
    let mut centre = [0.0f64; 3];
    let mut spread = [0.0f64; 3];
    let mut quantile = [0.0f64; 3];
    for (i, which) in Score::ALL.into_iter().enumerate() {
        centre[i] = moments[i].mean();
        spread[i] = moments[i].sample_variance().sqrt();
        if !(spread[i] > 0.0) || !spread[i].is_finite() {
            return Err(Error::input(format!(
                "the held-out {} scores do not vary: cannot set its limits",
                which.name()
            )));
        }
        let (c, s) = (centre[i] as f32, spread[i] as f32);
        for v in u[i].iter_mut() {
            *v = (*v - c) / s;
        }
        quantile[i] = quantile_type1(&mut raw[i], SAMPLE_QUANTILE);
    }
    drop(raw);
    seconds.score = clock.elapsed().as_secs_f64();

    // 3. Designs for independent input, then the per-chart searches.
    let clock = Instant::now();
    let chart_arl = CHARTS as f64 / cfg.false_alarm_rate;
    let series = |i: usize| Series {
        u: &u[i],
        starts: &starts,
        warmup: cfg.warmup,
        dwell: cfg.raise_dwell,
    };
    // What a score's EWMA smooths (v for the SPE).
    let smoothed = |i: usize| Series {
        u: if i == 0 { &v } else { &u[i] },
        ..series(i)
    };
    let chart_samples = series(0).eligible();
    let (chart_budget, allowed_per_chart) = chart_allowance(cfg.false_alarm_rate, chart_samples);
    if chart_budget < 1.0 {
        warnings.push(format!(
            "the held-out data are too few to hold each chart to its share of the target on \
             new data: a chart may raise {chart_budget:.4} false alarms in its {chart_samples} \
             samples, but its limit can only sit at its highest held-out peak, which new data \
             of that length exceed about once. Expect up to about one false alarm per chart \
             per {chart_samples} samples, or hold out at least {:.0} rows{}",
            2.0 * CHARTS as f64 / cfg.false_alarm_rate,
            if cfg.residual_input == ResidualInput::Whitened {
                ". The whitened residual chart leans most on what the held-out rows show: \
                 calibrated on 3 x 10^5 rows of three robots it flagged a fourth robot's \
                 nominal log (BENCHMARKS.md, Detection, attempt 12); `--residual-input plain` \
                 is less sensitive and less specific to the robots held out"
            } else {
                ""
            }
        ));
    }
    // Work items: the EWMA design, then the CUSUM design for each k.
    let ks = &cfg.cusum_slacks;
    let theory: Vec<Option<f64>> =
        par_map(&(0..=ks.len()).collect::<Vec<_>>(), cfg.threads, |&j| {
            if j == 0 {
                arl::ewma_limit_for(cfg.ewma_lambda, chart_arl)
            } else {
                arl::cusum_limit_for(ks[j - 1], chart_arl)
            }
        });
    let l_iid = theory[0].ok_or_else(|| Error::input("no EWMA limit reaches the chart ARL"))?;
    let h_iid: Vec<f64> = theory[1..]
        .iter()
        .zip(ks)
        .map(|(h, k)| {
            h.ok_or_else(|| {
                Error::input(format!("no CUSUM limit reaches the chart ARL for k = {k}"))
            })
        })
        .collect::<Result<_>>()?;
    let sigma_z = (cfg.ewma_lambda / (2.0 - cfg.ewma_lambda)).sqrt();
    // (score, chart): chart 0 is the EWMA, chart j ≥ 1 the CUSUM with ks[j − 1].
    let jobs: Vec<(usize, usize)> = (0..3)
        .flat_map(|i| (0..=ks.len()).map(move |j| (i, j)))
        .collect();
    let found: Vec<(LimitSearch, f64)> = par_map(&jobs, cfg.threads, |&(i, j)| {
        if j == 0 {
            let s = smoothed(i);
            let chart = Chart::Ewma {
                lambda: cfg.ewma_lambda as f32,
            };
            let r = smallest_limit(chart, &s, l_iid * sigma_z, allowed_per_chart);
            let l = f64::from(r.limit) / sigma_z;
            (
                r,
                arl::capped(arl::ewma_arl(
                    cfg.ewma_lambda,
                    l,
                    cfg.design_shift,
                    arl::Sides::Upper,
                )),
            )
        } else {
            let s = series(i);
            let k = ks[j - 1];
            let chart = Chart::Cusum { slack: k as f32 };
            let r = smallest_limit(chart, &s, h_iid[j - 1], allowed_per_chart);
            (
                r,
                arl::capped(arl::cusum_arl_any(k, f64::from(r.limit), cfg.design_shift)),
            )
        }
    });
    // The per-sample (Shewhart) chart of each score: one sample over the
    // limit raises a flag (no dwell). For independent N(0, 1) input the
    // design limit is Φ⁻¹(1 − 1/ARL).
    let sample_iid = arl::phi_inv(1.0 - 1.0 / chart_arl);
    let sample_found: Vec<LimitSearch> = par_map(&[0usize, 1, 2], cfg.threads, |&i| {
        let s = Series {
            dwell: 1,
            ..series(i)
        };
        smallest_limit(Chart::Sample, &s, sample_iid, allowed_per_chart)
    });
    let search_passes = found.iter().map(|(r, _)| u64::from(r.passes)).sum::<u64>()
        + sample_found
            .iter()
            .map(|r| u64::from(r.passes))
            .sum::<u64>();
    let mut scores = Vec::new();
    for (i, which) in Score::ALL.into_iter().enumerate() {
        let row = &found[i * (ks.len() + 1)..(i + 1) * (ks.len() + 1)];
        let candidates: Vec<SlackCandidate> = row[1..]
            .iter()
            .zip(ks.iter().zip(&h_iid))
            .map(|((r, a), (k, h0))| SlackCandidate {
                k: *k,
                h_iid: *h0,
                h: f64::from(r.limit),
                alarms: r.alarms,
                arl_at_shift: *a,
            })
            .collect();
        // Shortest delay at the design shift; ties go to the smaller k.
        let best = candidates
            .iter()
            .enumerate()
            .min_by(|a, b| a.1.arl_at_shift.total_cmp(&b.1.arl_at_shift))
            .map(|(j, _)| j)
            .unwrap_or(0);
        let c = &candidates[best];
        let (ewma, ewma_arl) = row[0];
        scores.push(ScoreCalib {
            score: which.name(),
            center: centre[i],
            spread: spread[i],
            quantile_999: quantile[i],
            cusum_slack: c.k,
            cusum_limit_iid: c.h_iid,
            cusum_limit: c.h,
            cusum_alarms: c.alarms,
            cusum_arl_at_shift: c.arl_at_shift,
            ewma_l_iid: l_iid,
            ewma_l: f64::from(ewma.limit) / sigma_z,
            ewma_limit: f64::from(ewma.limit),
            ewma_alarms: ewma.alarms,
            ewma_arl_at_shift: ewma_arl,
            cusum_candidates: candidates,
            sample_u_iid: sample_iid,
            sample_u: f64::from(sample_found[i].limit),
            sample_alarms: sample_found[i].alarms,
            sample_limit: 0.0,
            sample_widened: 0,
            cusum_widened: 1.0,
            ewma_widened: 1.0,
        });
    }
    drop(u);
    drop(v);
    seconds.design = clock.elapsed().as_secs_f64();

    let apply = |model: &mut ModelOwned, scores: &mut [ScoreCalib]| {
        for s in scores.iter_mut() {
            s.sample_limit = s.raw_limit(s.sample_u_stored(), nll_floor);
        }
        let lim = |s: &ScoreCalib| ScoreLimits {
            sample_limit: s.sample_limit as f32,
            center: s.center as f32,
            spread: s.spread as f32,
            cusum_slack: s.cusum_slack as f32,
            cusum_limit: s.cusum_stored(),
            ewma_limit: s.ewma_stored(),
        };
        model.monitor.spe = lim(&scores[0]);
        model.monitor.t2 = lim(&scores[1]);
        model.monitor.nll = lim(&scores[2]);
    };
    model.spe_center_by_mode = spe_modes.iter().map(|m| m.center as f32).collect();
    model.spe_spread_by_mode = spe_modes.iter().map(|m| m.spread as f32).collect();
    apply(model, &mut scores);
    // The SPE's residual chart (device models: the residuals come from the
    // device detector).
    let clock = Instant::now();
    // A chart of each feature's level needs more than one log to see how the
    // levels differ between logs (robots, days): with one, it stays off.
    let mut residual = if device && starts.len() >= 2 {
        fn rows<'a>(
            d: usize,
            rows: &'a [f32],
            starts: &'a [usize],
            cfg: &CalibConfig,
        ) -> crate::residual::Residuals<'a> {
            crate::residual::Residuals {
                d,
                rows,
                starts,
                warmup: cfg.warmup,
                dwell: cfg.raise_dwell,
            }
        }
        // The whitening matrix, then the rows whitened in place.
        model.resid_whiten = match cfg.residual_input {
            ResidualInput::Whitened => {
                crate::residual::whitening(&rows(d, &resid_rows, &starts, cfg))
            }
            ResidualInput::Plain => Vec::new(),
        };
        if !model.resid_whiten.is_empty() {
            crate::residual::whiten_rows(&mut resid_rows, d, &model.resid_whiten);
        }
        let r = rows(d, &resid_rows, &starts, cfg);
        Some(crate::residual::calibrate(model, &r, allowed_per_chart)?)
    } else {
        if device {
            warnings.push(
                "the held-out rows come from one log, so the SPE's residual chart is off: it \
                 needs logs of several robots or days to see how each feature's level differs \
                 between them"
                    .to_string(),
            );
        }
        crate::residual::off(model);
        None
    };
    drop(resid_rows);
    seconds.design += clock.elapsed().as_secs_f64();

    let mut report = CalibReport {
        scored,
        faults,
        skipped,
        chart_arl,
        chart_samples,
        chart_budget,
        allowed_per_chart,
        design_shift: cfg.design_shift,
        ewma_l_iid: l_iid,
        search_passes: search_passes + residual.as_ref().map_or(0, |r| u64::from(r.passes)),
        scores: Vec::new(),
        residual: None,
        spe_modes,
        end_to_end: device,
        rounds: 0,
        widened: false,
        flags: 0,
        watched: 0,
        allowed: 0,
        met_target: false,
        target_rate: cfg.false_alarm_rate,
        rate: 0.0,
        rate_ci95: [0.0, 1.0],
        ci_method: "Wilson score, 95 %",
        spe_limit_jm: jackson_mudholkar(model.theta.map(f64::from), JM_ALPHA),
        seconds: CalibSeconds::default(),
        warnings: Vec::new(),
    };

    if !device {
        warnings.push(
            "the model is over the device capacities: limits were set from the scores, \
             but the end-to-end detector check did not run"
                .to_string(),
        );
        report.scores = scores;
        report.residual = residual;
        report.seconds = seconds;
        report.warnings = warnings;
        return Ok(report);
    }

    // 4. End-to-end: the full state machine over the held-out logs; widening
    // only as a fallback.
    let clock = Instant::now();
    for round in 1..=MAX_ROUNDS {
        let dev = model
            .to_device()
            .map_err(|e| Error::input(format!("calibrated model is invalid: {e}")))?;
        let mut det = Detector::new(dev)
            .map_err(|e| Error::input(format!("calibrated model refused: {e}")))?;
        let mut current = usize::MAX;
        let mut flags = 0u64;
        let mut watched = 0u64;
        let mut widen = [[false; 3]; 3];
        let mut widen_resid = false;
        let mut x32 = vec![0.0f32; d];
        let label = if round == 1 {
            "check".to_string()
        } else {
            format!("widen {}", round - 1)
        };
        let bar = stage(&label, rows.progress_total());
        rows.for_each_row(&bar, &mut |file, row| {
            if file != current {
                det.reset();
                current = file;
            }
            for (o, v) in x32.iter_mut().zip(row) {
                *o = *v as f32;
            }
            let before = det.state();
            let out = det.update(&x32);
            if out.scores.is_some() && before == DriftState::Watching {
                watched += 1;
            }
            if let Some(Event::Raised { drivers }) = out.event {
                flags += 1;
                let mp = det.model().monitor;
                let limits = [mp.spe, mp.t2, mp.nll];
                for s in drivers.iter() {
                    let tr = det.track(s);
                    let i = s as usize;
                    if tr.cusum.value() > limits[i].cusum_limit {
                        widen[i][0] = true;
                    }
                    if tr.ewma.value() > limits[i].ewma_limit {
                        widen[i][1] = true;
                    }
                    if tr.last_u > tr.sample_u {
                        widen[i][2] = true;
                    }
                }
                if det.residual_chart().peak > det.model().resid_limit {
                    widen_resid = true;
                }
            }
        })?;
        let allowed = (cfg.false_alarm_rate * watched as f64).floor() as u64;
        report.rounds = round;
        report.flags = flags;
        report.watched = watched;
        report.allowed = allowed;
        report.met_target = flags <= allowed;
        if report.met_target || round == MAX_ROUNDS {
            break;
        }
        report.widened = true;
        for (s, w) in scores.iter_mut().zip(widen) {
            if w[0] {
                s.cusum_widened *= GROWTH;
            }
            if w[1] {
                s.ewma_widened *= GROWTH;
            }
            if w[2] {
                s.sample_widened += 1;
            }
        }
        apply(model, &mut scores);
        if let (true, Some(r)) = (widen_resid, residual.as_mut()) {
            r.widened *= GROWTH;
            model.resid_limit = r.stored();
        }
    }
    seconds.check = clock.elapsed().as_secs_f64();
    if report.widened {
        warnings.push(format!(
            "the per-chart limits raised more flags on the held-out logs than the target \
             allows; the fallback widened them over {} more run{}",
            report.rounds - 1,
            if report.rounds == 2 { "" } else { "s" }
        ));
        for s in scores.iter_mut() {
            let h = f64::from(s.cusum_stored());
            s.cusum_arl_at_shift =
                arl::capped(arl::cusum_arl_any(s.cusum_slack, h, cfg.design_shift));
            let l = f64::from(s.ewma_stored()) / sigma_z;
            s.ewma_arl_at_shift = arl::capped(arl::ewma_arl(
                cfg.ewma_lambda,
                l,
                cfg.design_shift,
                arl::Sides::Upper,
            ));
        }
    }
    if !report.met_target {
        warnings.push(format!(
            "the held-out logs still raised {} flags after {} runs (target allows {}): \
             the logs may not be nominal",
            report.flags, report.rounds, report.allowed
        ));
    }
    report.rate = if report.watched > 0 {
        report.flags as f64 / report.watched as f64
    } else {
        0.0
    };
    report.rate_ci95 = wilson(report.flags, report.watched, arl::phi_inv(0.975));
    report.scores = scores;
    report.residual = residual;
    report.seconds = seconds;
    report.warnings = warnings;
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn jackson_mudholkar_reference_values() {
        // Jackson & Mudholkar (1979) formula; values computed with scipy
        // 1.17.1 (norm.ppf for the quantile) in Python: discarded
        // {0.14675688, 0.02071484} (standardised iris, 2 kept):
        // 0.584851695676 (α = 0.05) and 1.030202668854 (α = 0.01);
        // {0.8, 0.5, 0.3, 0.2, 0.1, 0.07, 0.03}: 4.908963724242 and
        // 7.393988748698. Within 1e-12: 12 printed decimals (5e-13), the
        // quantile (AS 241, ~1e-16 relative) and ~20 f64 operations (~1e-14
        // relative of values up to 7.4). This checks the formula on given
        // eigenvalues; tests/tests/published.rs checks it on θ from the fit.
        let th = |ls: &[f64]| {
            let mut t = [0.0; 3];
            for l in ls {
                t[0] += l;
                t[1] += l * l;
                t[2] += l * l * l;
            }
            t
        };
        let a = th(&[0.14675688, 0.02071484]);
        assert!((jackson_mudholkar(a, 0.05).unwrap() - 0.584_851_695_676).abs() < 1e-12);
        assert!((jackson_mudholkar(a, 0.01).unwrap() - 1.030_202_668_854).abs() < 1e-12);
        let b = th(&[0.8, 0.5, 0.3, 0.2, 0.1, 0.07, 0.03]);
        assert!((jackson_mudholkar(b, 0.05).unwrap() - 4.908_963_724_242).abs() < 1e-12);
        assert!((jackson_mudholkar(b, 0.01).unwrap() - 7.393_988_748_698).abs() < 1e-12);
        // One dominant eigenvalue among many small ones: h0 < 0. The limit
        // must still lie above the mean θ1 and grow as α shrinks.
        let mut ls = vec![0.2];
        ls.extend(std::iter::repeat_n(0.03, 27));
        let c = th(&ls);
        assert!(1.0 - 2.0 * c[0] * c[2] / (3.0 * c[1] * c[1]) < 0.0);
        let q05 = jackson_mudholkar(c, 0.05).unwrap();
        let q001 = jackson_mudholkar(c, 0.001).unwrap();
        assert!(q05 > c[0] && q001 > q05, "{q05} {q001}");
    }

    #[test]
    fn quantile_definition() {
        // On 1..100 the 0.95 quantile is 95 by the inverted empirical CDF
        // (type 1 of Hyndman & Fan 1996; the linear type 7, numpy's default,
        // gives 95.05).
        let mut v: Vec<f32> = (1..=100).map(|i| i as f32).collect();
        assert_eq!(quantile_type1(&mut v, 0.95), 95.0);
        let mut v: Vec<f32> = (1..=1000).rev().map(|i| i as f32).collect();
        assert_eq!(quantile_type1(&mut v, 0.999), 999.0);
    }

    #[test]
    fn wilson_interval() {
        // Wilson (1927) score interval at z = Φ⁻¹(0.975) = 1.959963984540054
        // (computed with scipy 1.17.1 norm.ppf).
        let z = 1.959_963_984_540_054;
        // 0 of 1000: the formula reduces to [0, z²/(n + z²)] exactly; what is
        // left is rounding, a few ulps.
        let [lo, hi] = wilson(0, 1000, z);
        assert_eq!(lo, 0.0);
        let want = z * z / (1000.0 + z * z);
        assert!(
            (hi - want).abs() <= 4.0 * f64::EPSILON * want,
            "{hi} vs {want}"
        );
        // 50 of 100: [0.403831530366, 0.596168469634] (the Wilson formula
        // evaluated in Python with that z; statsmodels, which has it, is not
        // in the reference venv). Within 1e-12: 12 printed decimals (5e-13)
        // and a dozen f64 operations on values below 1.
        let [lo, hi] = wilson(50, 100, z);
        assert!((lo - 0.403_831_530_366).abs() < 1e-12, "{lo}");
        assert!((hi - 0.596_168_469_634).abs() < 1e-12, "{hi}");
    }
    /// AR(1) with unit marginal variance: `x ← φ x + √(1 − φ²) e`, one log
    /// after another, each from a stationary start.
    fn ar1(phi: f64, logs: usize, len: usize, seed: u64) -> (Vec<f32>, Vec<usize>) {
        let mut rng = crate::rng::Rng::new(seed, 0);
        let mut u = Vec::with_capacity(logs * len);
        let mut starts = Vec::new();
        let g = (1.0 - phi * phi).sqrt();
        for _ in 0..logs {
            starts.push(u.len());
            let mut x = rng.normal();
            for _ in 0..len {
                u.push(x as f32);
                x = phi * x + g * rng.normal();
            }
        }
        (u, starts)
    }

    #[test]
    fn per_chart_search_holds_the_allowance_on_autocorrelated_data() {
        // Autocorrelated input (AR(1), φ = 0.9): the designs for independent
        // input alarm far more often than their ARL promises (the variance of
        // a sum of n values grows about (1 + φ)/(1 − φ) = 19 times faster).
        // The per-chart search meets the allowance, and the limit just below
        // it does not (so it is the smallest, to the search precision).
        let (u, starts) = ar1(0.9, 4, 50_000, 7);
        let s = Series {
            u: &u,
            starts: &starts,
            warmup: 50,
            dwell: 3,
        };
        assert_eq!(s.eligible(), 4 * (50_000 - 50));
        let chart_arl = 1e4;
        let allowed = (s.eligible() as f64 / chart_arl).floor() as u64; // 19
        for (chart, floor) in [
            (
                Chart::Cusum { slack: 0.5 },
                arl::cusum_limit_for(0.5, chart_arl).unwrap(),
            ),
            (
                Chart::Ewma { lambda: 0.1 },
                arl::ewma_limit_for(0.1, chart_arl).unwrap() * (0.1f64 / 1.9).sqrt(),
            ),
        ] {
            let iid = chart.alarms(&s, floor as f32);
            assert!(
                iid > 3 * allowed,
                "{chart:?}: {iid} alarms at the iid limit"
            );
            let r = smallest_limit(chart, &s, floor, allowed);
            assert!(!r.at_floor && f64::from(r.limit) > floor, "{chart:?} {r:?}");
            assert_eq!(r.alarms, chart.alarms(&s, r.limit));
            assert!(r.alarms <= allowed, "{chart:?} {r:?}");
            let below = r.limit * (1.0 - 2.0 * SEARCH_TOL as f32);
            assert!(chart.alarms(&s, below) > allowed, "{chart:?} {r:?}");
            // On independent input of the same length the i.i.d. design is
            // already within the allowance, and the search keeps it.
            let mut rng = crate::rng::Rng::new(11, 0);
            let white: Vec<f32> = (0..u.len()).map(|_| rng.normal() as f32).collect();
            let w = Series { u: &white, ..s };
            let r = smallest_limit(chart, &w, floor, allowed);
            assert!(r.at_floor && r.alarms <= allowed, "{chart:?} {r:?}");
        }
    }

    #[test]
    fn limit_search_edge_cases() {
        let starts = [0usize];
        let cusum = Chart::Cusum { slack: 0.5 };
        // Nothing can alarm: every value far below the slack.
        let low = vec![-1.0f32; 1000];
        let s = Series {
            u: &low,
            starts: &starts,
            warmup: 10,
            dwell: 1,
        };
        let r = smallest_limit(cusum, &s, 4.0, 0);
        assert_eq!((r.limit, r.alarms, r.at_floor, r.passes), (4.0, 0, true, 1));
        // Allowance 0: no alarm at all on the held-out data. A run of 20
        // values of 1.5 lifts the CUSUM to 20; the limit lands just at or
        // above it and the whole series gives no alarm.
        let mut v = vec![0.0f32; 1000];
        for x in &mut v[500..520] {
            *x = 1.5;
        }
        let s = Series { u: &v, ..s };
        assert_eq!(cusum.peak(&s), 20.0);
        let r = smallest_limit(cusum, &s, 4.0, 0);
        assert_eq!(r.alarms, 0);
        assert!(r.limit >= 19.9 && r.limit <= 20.0, "{r:?}");
        // Allowance 1: at the floor the excursion alarms 4 times (over 4
        // after 5 samples, restart, ...). From a limit of 10 on it alarms
        // once (after 11 samples; the 9 left do not reach 10 again); just
        // below 10 it alarms twice.
        assert_eq!(cusum.alarms(&s, 4.0), 4);
        let r = smallest_limit(cusum, &s, 4.0, 1);
        assert!(!r.at_floor && r.alarms == 1, "{r:?}");
        assert!(r.limit >= 9.98 && r.limit <= 10.0, "{r:?}");
        assert_eq!(cusum.alarms(&s, 9.9), 2);
        // Warm-up: the same excursion inside the first 600 samples of the
        // log never alarms.
        let s = Series { warmup: 600, ..s };
        assert_eq!(cusum.peak(&s), 0.0);
        assert!(smallest_limit(cusum, &s, 4.0, 0).at_floor);
        // No sample may alarm at all (every log inside its warm-up).
        assert_eq!(s.logs().count(), 1);
        let short = Series {
            u: &v[..100],
            warmup: 600,
            ..s
        };
        assert_eq!(short.eligible(), 0);
        assert_eq!(cusum.peak(&short), f32::NEG_INFINITY);
        let r = smallest_limit(cusum, &short, 4.0, 0);
        assert!(r.at_floor && r.alarms == 0);
        // Dwell: a single sample over the limit is no alarm with dwell 3.
        let mut spike = vec![0.0f32; 200];
        spike[100] = 10.0;
        let ewma = Chart::Ewma { lambda: 1.0 };
        let s1 = Series {
            u: &spike,
            starts: &starts,
            warmup: 0,
            dwell: 1,
        };
        assert_eq!(ewma.alarms(&s1, 5.0), 1);
        assert_eq!(ewma.alarms(&Series { dwell: 3, ..s1 }, 5.0), 0);
        // Restart at each log start: two halves of an excursion in two logs
        // stay below a limit their sum would cross.
        let mut two = vec![0.0f32; 400];
        for x in &mut two[180..220] {
            *x = 1.5;
        }
        let one_log = Series {
            u: &two,
            starts: &[0],
            warmup: 0,
            dwell: 1,
        };
        let two_logs = Series {
            starts: &[0, 200],
            ..one_log
        };
        assert_eq!(cusum.alarms(&one_log, 30.0), 1);
        assert_eq!(cusum.alarms(&two_logs, 30.0), 0);
        assert_eq!(cusum.peak(&two_logs), 20.0);
        // A restart after each alarm: a long excursion alarms repeatedly.
        let long = vec![1.5f32; 100];
        let s = Series {
            u: &long,
            starts: &starts,
            warmup: 0,
            dwell: 1,
        };
        // The CUSUM climbs by 1 per sample: over 10 after 11 samples, then
        // restarts from 0: 100 / 11 = 9 alarms.
        assert_eq!(cusum.alarms(&s, 10.0), 9);
    }

    #[test]
    fn chart_runs_match_the_detector_statistics() {
        // The per-chart run uses the detector's own statistics: the CUSUM is
        // capped at twice its limit, the EWMA starts at 0.
        let mut c = Cusum::new(0.5, 2.0 * 3.0);
        let mut e = Ewma::new(0.25, 0.0);
        let u = [4.0f32, 4.0, 4.0, -10.0, 4.0];
        let mut sc = Stat::new(Chart::Cusum { slack: 0.5 }, Some(3.0));
        let mut se = Stat::new(Chart::Ewma { lambda: 0.25 }, Some(3.0));
        for x in u {
            assert_eq!(sc.push(x), c.push(x));
            assert_eq!(se.push(x), e.push(x));
        }
    }

    #[test]
    fn allowance_is_the_budget_less_one() {
        // 1e-5 over 10 charts on 1 111 000 samples: budget 1.111; one alarm
        // on the held-out data would mean about two on new data, so none.
        let (b, a) = chart_allowance(1e-5, 1_111_000);
        assert!((b - 1.111).abs() < 1e-12 && a == 0, "{b} {a}");
        assert_eq!(CHARTS, 10);
        assert_eq!(chart_allowance(1e-3, 200_000).1, 19);
        assert_eq!(chart_allowance(1e-3, 199_999).1, 18);
        assert_eq!(chart_allowance(1e-5, 7_000).1, 0);
        assert_eq!(chart_allowance(1e-5, 0), (0.0, 0));
    }

    #[test]
    fn parallel_map_keeps_order() {
        let items: Vec<u64> = (0..37).collect();
        let one = par_map(&items, 1, |x| x * x);
        let two = par_map(&items, 2, |x| x * x);
        assert_eq!(one, two);
        assert_eq!(two[36], 36 * 36);
        assert!(par_map(&Vec::<u64>::new(), 2, |x| *x).is_empty());
    }
}
