//! The detector: scores, streaming statistics per score, and drift states.

use crate::score::{self, Contribution, Derived, Fault, Scores, TOP_FEATURES};
use crate::stats::{Cusum, Ewma, Welford};
use plumb_model::{Capacity, Model, ModelError, ScoreLimits, MAX_FEATURES, MAX_SLOW};

/// The three monitored scores.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Score {
    /// SPE (Q).
    Spe = 0,
    /// Hotelling T².
    T2 = 1,
    /// Mixture negative log-likelihood.
    Nll = 2,
}

impl Score {
    /// All scores, in bit order.
    pub const ALL: [Score; 3] = [Score::Spe, Score::T2, Score::Nll];

    /// Short fixed name.
    pub const fn name(self) -> &'static str {
        match self {
            Score::Spe => "spe",
            Score::T2 => "t2",
            Score::Nll => "nll",
        }
    }
}

/// A set of scores, one bit each (bit 0 SPE, bit 1 T², bit 2 NLL).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct ScoreSet(pub u8);

impl ScoreSet {
    /// No score.
    pub const EMPTY: ScoreSet = ScoreSet(0);

    /// Adds a score.
    pub fn insert(&mut self, s: Score) {
        self.0 |= 1 << (s as u8);
    }

    /// Whether `s` is in the set.
    pub fn contains(self, s: Score) -> bool {
        self.0 & (1 << (s as u8)) != 0
    }

    /// Whether the set is empty.
    pub fn is_empty(self) -> bool {
        self.0 == 0
    }

    /// The scores in the set.
    pub fn iter(self) -> impl Iterator<Item = Score> {
        Score::ALL.into_iter().filter(move |s| self.contains(*s))
    }
}

/// Where the detector stands.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum DriftState {
    /// Warm-up after a reset or model switch: statistics run, no flag rises.
    Priming,
    /// Data resembles the model.
    Watching,
    /// A drift flag is up.
    Drifting,
}

/// A change of state, reported by the sample that caused it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Event {
    /// Warm-up finished.
    Primed,
    /// A drift flag rose; the scores whose limits were crossed.
    Raised {
        /// Scores over their limits when the flag rose.
        drivers: ScoreSet,
    },
    /// The drift flag cleared.
    Cleared,
}

/// Streaming statistics of one score.
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Track {
    /// Mean and variance of the raw score since the last reset.
    pub since_reset: Welford<f32>,
    /// Mean and variance of the raw score in the current window.
    pub window: Welford<f32>,
    /// Mean and variance of the raw score over the last complete window.
    pub last_window: Welford<f32>,
    /// EWMA of the standardised transformed score (for SPE, standardised
    /// within each sample's operating mode: [`Model::spe_center_by_mode`]).
    pub ewma: Ewma,
    /// Upper CUSUM of the standardised transformed score.
    pub cusum: Cusum,
    /// Samples whose score exceeded the per-sample limit.
    pub over_sample_limit: u32,
    /// The standardised transformed score `u` of the latest scored sample.
    pub last_u: f32,
    /// The per-sample limit on the same scale as `u`.
    pub sample_u: f32,
}

impl Track {
    /// All statistics at zero, with no limits (the state of a detector
    /// without a model).
    const IDLE: Track = Track {
        since_reset: Welford::new(),
        window: Welford::new(),
        last_window: Welford::new(),
        ewma: Ewma::new(0.0, 0.0),
        cusum: Cusum::new(0.0, 0.0),
        over_sample_limit: 0,
        last_u: 0.0,
        sample_u: 0.0,
    };

    fn new(lambda: f32, limits: &ScoreLimits, sample_u: f32) -> Self {
        Track {
            last_u: 0.0,
            sample_u,
            since_reset: Welford::new(),
            window: Welford::new(),
            last_window: Welford::new(),
            ewma: Ewma::new(lambda, 0.0),
            cusum: Cusum::new(limits.cusum_slack, 2.0 * limits.cusum_limit),
            over_sample_limit: 0,
        }
    }
}

/// Variance-stabilising transform of a score before standardisation.
///
/// SPE and T² are chi-square-like, so they take a cube root (Wilson &
/// Hilferty 1931). The mixture NLL is, near each component, a chi-square/2
/// plus a constant; it is first shifted by `nll_floor`, the smallest NLL the
/// model can give (see [`Detector::nll_floor`]), then takes the cube root too.
pub fn transform(score: Score, value: f32, nll_floor: f32) -> f32 {
    // One cube root for all three (one copy of its code).
    let shifted = match score {
        Score::Spe | Score::T2 => value,
        Score::Nll => value - nll_floor,
    };
    crate::math::cbrt(shifted)
}

/// The monitored value of a score: `u = (g(value) − center) / spread`, with
/// `g` the [`transform`]. The detector's update and the host calibration
/// compute this same f32 expression, so they agree to the bit.
pub fn standardise(score: Score, value: f32, nll_floor: f32, lim: &ScoreLimits) -> f32 {
    (transform(score, value, nll_floor) - lim.center) / lim.spread
}

/// Statistics of the three scores at their starting point.
fn fresh_tracks(model: &Model, derived: &Derived) -> [Track; 3] {
    let mp = &model.monitor;
    let floor = derived.nll_floor();
    let track = |which: Score, lim: &ScoreLimits| {
        Track::new(
            mp.ewma_lambda,
            lim,
            standardise(which, lim.sample_limit, floor, lim),
        )
    };
    [
        track(Score::Spe, &mp.spe),
        track(Score::T2, &mp.t2),
        track(Score::Nll, &mp.nll),
    ]
}

/// Counts of faulted samples by cause.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct FaultCounts {
    /// Wrong number of features.
    pub wrong_length: u32,
    /// NaN or infinite features.
    pub non_finite: u32,
    /// Features beyond `fault_z`.
    pub out_of_range: u32,
    /// Score overflow.
    pub overflow: u32,
}

impl FaultCounts {
    /// All faults.
    pub fn total(&self) -> u32 {
        self.wrong_length
            .saturating_add(self.non_finite)
            .saturating_add(self.out_of_range)
            .saturating_add(self.overflow)
    }

    fn count(&mut self, f: Fault) {
        let slot = match f {
            Fault::WrongLength { .. } => &mut self.wrong_length,
            Fault::NonFinite { .. } => &mut self.non_finite,
            Fault::OutOfRange { .. } => &mut self.out_of_range,
            Fault::Overflow => &mut self.overflow,
        };
        *slot = slot.saturating_add(1);
    }
}

/// What one call to [`Detector::update`] found.
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Outcome {
    /// Index of this sample since the last reset (faulted samples count).
    pub index: u64,
    /// Scores, unless the sample was a fault.
    pub scores: Option<Scores>,
    /// The fault, if the sample was not scored.
    pub fault: Option<Fault>,
    /// State after this sample.
    pub state: DriftState,
    /// State change caused by this sample.
    pub event: Option<Event>,
    /// Scores hot after this sample: CUSUM over its limit, EWMA over its
    /// limit, or the last scored sample (this one, unless it is a fault) over
    /// the per-sample limit.
    pub hot: ScoreSet,
    /// Largest SPE contributions (zeros on a fault).
    pub top: [Contribution; TOP_FEATURES],
}

/// The on-device drift detector. Fixed memory, no allocation, no panics.
///
/// Replaying a log through this type on the host gives the same bits as on
/// the board: see the crate documentation.
///
/// A detector is about 7 KiB. A device keeps it in one place and loads models
/// into it ([`Detector::EMPTY`], then [`Detector::load`]); [`Detector::new`]
/// and [`Detector::from_file`] return one by value, for hosts and tests.
#[derive(Debug, Clone, PartialEq)]
pub struct Detector {
    model: Model,
    derived: Derived,
    tracks: [Track; 3],
    state: DriftState,
    index: u64,
    valid: u64,
    hot_run: u32,
    calm_run: u32,
    held: u32,
    faults: FaultCounts,
    window_len: u32,
    resid: ResidualChart,
}

/// The SPE's residual chart: one EWMA per feature of
/// `(v_i − resid_center_i) · resid_gain_i`, hot when any of them is beyond
/// `resid_limit` in absolute value. `v_i` is the feature's PCA residual `r_i`,
/// or with the model's whitening matrix `W` the whitened residual
/// `Σ_j W_ij r_j` ([`score::chart_input`]). The model's gains scale each
/// feature's smoothed input to its own nominal tail, so one limit serves
/// features of any memory (`plumb fit`'s calibration sets them all).
///
/// Beside it, the slow charts (model format 5, `plumb tailor`): for each
/// feature the model names in `slow_charts`, a second EWMA of the same `v_i`
/// with a constant, centre and gain of its own, set on one robot's own
/// nominal logs; hot when any is beyond `slow_limit` in absolute value.
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct ResidualChart {
    /// Each feature's EWMA (the first `d` values).
    pub ewma: [f32; MAX_FEATURES],
    /// The largest `|ewma_i|` after the last scored sample.
    pub peak: f32,
    /// The feature of `peak` (the first of equal ones).
    pub peak_feature: u8,
    /// Each slow chart's EWMA, in feature order (the first
    /// `slow_charts.len() / SLOW_PARAMS` values).
    pub slow: [f32; MAX_SLOW],
    /// The largest `|slow_s|` after the last scored sample (0 without slow
    /// charts).
    pub slow_peak: f32,
    /// The feature of `slow_peak` (the first of equal ones).
    pub slow_peak_feature: u8,
}

impl ResidualChart {
    /// Every EWMA at 0.
    pub const ZERO: ResidualChart = ResidualChart {
        ewma: [0.0; MAX_FEATURES],
        peak: 0.0,
        peak_feature: 0,
        slow: [0.0; MAX_SLOW],
        slow_peak: 0.0,
        slow_peak_feature: 0,
    };

    /// Whether a chart is over its limit.
    fn hot(&self, model: &Model) -> bool {
        self.peak > model.resid_limit || self.slow_peak > model.slow_limit
    }

    /// Whether every chart is at or below `f` times its limit.
    fn calm(&self, model: &Model, f: f32) -> bool {
        self.peak <= f * model.resid_limit && self.slow_peak <= f * model.slow_limit
    }
}

/// Samples per telemetry window of [`Track::window`].
pub const WINDOW: u32 = 1024;

impl Detector {
    /// A detector without a model: every sample is a wrong-length fault (it
    /// expects 0 features) and no statistic moves. A `const`, so a static can
    /// hold one from reset and [`Detector::load`] fill it in place.
    pub const EMPTY: Detector = Detector {
        model: Model::EMPTY,
        derived: Derived::ZERO,
        tracks: [Track::IDLE; 3],
        state: DriftState::Priming,
        index: 0,
        valid: 0,
        hot_run: 0,
        calm_run: 0,
        held: 0,
        faults: FaultCounts {
            wrong_length: 0,
            non_finite: 0,
            out_of_range: 0,
            overflow: 0,
        },
        window_len: 0,
        resid: ResidualChart::ZERO,
    };

    /// Validates `model` against the device capacities and starts a detector
    /// (returned by value: see [`Detector::load`] for a device).
    pub fn new(model: Model) -> Result<Self, ModelError> {
        let mut det = Detector {
            model,
            ..Detector::EMPTY
        };
        det.start()?;
        Ok(det)
    }

    /// Decodes a model file and starts a detector on it (returned by value:
    /// see [`Detector::load`] for a device).
    pub fn from_file(bytes: &[u8]) -> Result<Self, ModelError> {
        let mut det = Detector::EMPTY;
        det.load(bytes)?;
        Ok(det)
    }

    /// Decodes a model file into this detector, in place, and starts it:
    /// framing, CRC, capacity and validation ([`plumb_model::file::decode_into`]),
    /// then the detector's own checks. No model-sized value is built on the
    /// stack.
    ///
    /// Whatever model this detector held is overwritten from the first
    /// payload byte on, so load only into a detector that is not running.
    /// On success the statistics start with warm-up. On error the detector
    /// is [`Detector::EMPTY`]: no model ([`Detector::is_loaded`] is false),
    /// every sample a fault; nothing of a half-read file can be scored.
    pub fn load(&mut self, bytes: &[u8]) -> Result<(), ModelError> {
        let loaded = self.decode_model(bytes);
        if loaded.is_ok() {
            self.reset();
        } else {
            self.unload();
        }
        loaded
    }

    /// [`Detector::load`] without the reset: decodes and checks a model
    /// file over this detector's model and its derived constants, in place,
    /// and leaves every statistic and the state as they are. On error the
    /// model is cleared ([`Detector::is_loaded`] is false) and the statistics
    /// are still untouched.
    ///
    /// For a device with one detector place that decodes a candidate model
    /// over the running one: on success it calls [`Detector::reset`]; on
    /// refusal it decodes the file of the model that was running again, which
    /// gives the same model and constants bit for bit, and the detector goes
    /// on exactly as if the candidate had never been decoded.
    pub fn decode_model(&mut self, bytes: &[u8]) -> Result<(), ModelError> {
        // `decode_into` with the device capacities has admitted the
        // dimensions (the same bytes `check` would read again) and validated
        // the model, so of `check` only the constants are left to derive.
        let decoded = plumb_model::file::decode_into(bytes, &Capacity::DEVICE, &mut self.model)
            .and_then(|()| self.derived.compute(&self.model));
        if decoded.is_err() {
            self.model.clear();
            self.derived = Derived::ZERO;
        }
        decoded
    }

    /// [`Detector::load`] for a model built rather than read: `fill` writes
    /// it into this detector's own model, from [`Model::EMPTY`], then it is
    /// checked and the statistics start with warm-up. No model-sized value
    /// (22 KiB at the capacities) is built on the stack. On error the
    /// detector is [`Detector::EMPTY`], as after a failed load.
    pub fn load_with(&mut self, fill: impl FnOnce(&mut Model)) -> Result<(), ModelError> {
        self.model.clear();
        fill(&mut self.model);
        let loaded = self.check();
        if loaded.is_ok() {
            self.reset();
        } else {
            self.unload();
        }
        loaded
    }

    /// Drops the model: back to [`Detector::EMPTY`], in place.
    pub fn unload(&mut self) {
        self.model.clear();
        self.derived = Derived::ZERO;
        self.reset();
    }

    /// Whether a model is loaded (false for [`Detector::EMPTY`] and after a
    /// failed [`Detector::load`]).
    pub fn is_loaded(&self) -> bool {
        !self.model.is_empty()
    }

    /// Checks the model in place, derives its constants and resets the
    /// statistics. On error the model is left as it is: `new` drops it.
    fn start(&mut self) -> Result<(), ModelError> {
        self.check()?;
        self.reset();
        Ok(())
    }

    /// Checks the model in place and derives its constants.
    fn check(&mut self) -> Result<(), ModelError> {
        Capacity::DEVICE.admits(&self.model.dims)?;
        self.model.validate()?;
        self.derived.compute(&self.model)
    }

    /// Replaces the model. On error the running model and its statistics are
    /// untouched; on success the statistics restart with warm-up. (A second
    /// detector is built by value: a device decodes in place instead, with
    /// [`Detector::decode_model`], as the endpoint does.)
    pub fn install(&mut self, model: Model) -> Result<(), ModelError> {
        let fresh = Detector::new(model)?;
        *self = fresh;
        Ok(())
    }

    /// Forgets all statistics and restarts warm-up.
    pub fn reset(&mut self) {
        if !self.is_loaded() {
            self.tracks = [Track::IDLE; 3];
        } else {
            self.tracks = fresh_tracks(&self.model, &self.derived);
        }
        self.state = if self.model.monitor.warmup == 0 && self.is_loaded() {
            DriftState::Watching
        } else {
            DriftState::Priming
        };
        self.index = 0;
        self.valid = 0;
        self.hot_run = 0;
        self.calm_run = 0;
        self.held = 0;
        self.faults = FaultCounts::default();
        self.window_len = 0;
        self.resid = ResidualChart::ZERO;
    }

    /// The running model.
    pub fn model(&self) -> &Model {
        &self.model
    }

    /// Current state.
    pub fn state(&self) -> DriftState {
        self.state
    }

    /// Statistics of one score.
    pub fn track(&self, s: Score) -> &Track {
        &self.tracks[s as usize]
    }

    /// The SPE's residual chart.
    pub fn residual_chart(&self) -> &ResidualChart {
        &self.resid
    }

    /// Faults since the last reset.
    pub fn faults(&self) -> FaultCounts {
        self.faults
    }

    /// Samples seen since the last reset (faults included).
    pub fn samples(&self) -> u64 {
        self.index
    }

    /// The smallest NLL the model can produce: `−ln Σ_c exp(ln π_c − ½ Σ_j ln(2π v_cj))`,
    /// the log of the sum of the component densities at their modes (an upper
    /// bound on the mixture density). NLL minus this floor is ≥ 0.
    pub fn nll_floor(&self) -> f32 {
        self.derived.nll_floor()
    }

    /// Transformed scores `[g(SPE), g(T²), g(NLL)]` (see [`transform`]), the
    /// values the monitor standardises; used by calibration.
    pub fn transformed(&self, s: &Scores) -> [f32; 3] {
        let floor = self.derived.nll_floor();
        [
            transform(Score::Spe, s.spe, floor),
            transform(Score::T2, s.t2, floor),
            transform(Score::Nll, s.nll, floor),
        ]
    }

    /// The SPE as its EWMA sees it: `(g − center_c) / spread_c`, `g` the
    /// transformed SPE ([`Detector::transformed`]), with the centre and
    /// spread of the sample's operating mode `c` ([`score::Scored::mode`]).
    /// The calibration computes the same f32 expression.
    fn spe_by_mode(&self, g: f32, mode: usize) -> f32 {
        let m = &self.model;
        // A validated model has both values for every component; the
        // fallback (the global ones) only keeps this free of panics.
        let center = m.spe_center_by_mode.get(mode).copied();
        let spread = m.spe_spread_by_mode.get(mode).copied();
        let (c, s) = center
            .zip(spread)
            .unwrap_or((m.monitor.spe.center, m.monitor.spe.spread));
        (g - c) / s
    }

    /// Scores one sample without touching any statistic (used by calibration).
    pub fn score(&self, x: &[f32]) -> Result<score::Scored, Fault> {
        self.score_residuals(x, &mut [0.0; MAX_FEATURES])
    }

    /// [`Detector::score`], leaving each feature's PCA residual
    /// `r_i = z_i − (P Pᵀ z)_i` in `resid[i]` (used by calibration).
    pub fn score_residuals(
        &self,
        x: &[f32],
        resid: &mut [f32; MAX_FEATURES],
    ) -> Result<score::Scored, Fault> {
        score::score(&self.model, &self.derived, x, resid)
    }

    /// Feeds one sample: score it, update the statistics, step the states.
    pub fn update(&mut self, x: &[f32]) -> Outcome {
        let index = self.index;
        self.index = self.index.wrapping_add(1);
        // The standardised sample, then its residuals.
        let mut buf = [0.0f32; MAX_FEATURES];
        let scored = match score::score(&self.model, &self.derived, x, &mut buf) {
            Ok(s) => s,
            Err(fault) => return self.faulted(index, fault),
        };
        let s = scored.scores;
        let mp = &self.model.monitor;
        let limits = [&mp.spe, &mp.t2, &mp.nll];
        let values = [s.spe, s.t2, s.nll];
        // Standardised scores. One that overflows (a model with a tiny
        // spread), or would carry its EWMA out of the f32 range, makes the
        // sample a score overflow before any statistic moves: a non-finite
        // EWMA would stay NaN and the flag could never clear.
        // (As [`standardise`], with each transform computed once.)
        let gs = self.transformed(&s);
        let mut us = [0.0f32; 3];
        for ((u, lim), g) in us.iter_mut().zip(limits).zip(gs) {
            *u = (g - lim.center) / lim.spread;
        }
        // The EWMAs smooth the same values, except the SPE's, which smooths
        // the SPE standardised within the sample's operating mode.
        let mut smoothed = us;
        smoothed[0] = self.spe_by_mode(gs[0], scored.mode);
        // Each EWMA's next value, computed once and kept only if all three
        // are finite.
        let mut ewmas = [Ewma::new(0.0, 0.0); 3];
        for ((next, track), x) in ewmas.iter_mut().zip(&self.tracks).zip(smoothed) {
            *next = track.ewma;
            next.push(x);
        }
        if !ewmas.iter().all(|e| e.value().is_finite()) {
            return self.faulted(index, Fault::Overflow);
        }
        // The sample is kept: the residual chart steps in place (its values
        // cannot leave the f32 range, `score::chart_step`).
        let chart = score::chart_step(
            &self.model,
            &buf,
            &mut self.resid.ewma,
            &mut self.resid.slow,
        );
        self.resid.peak = chart.peak;
        self.resid.peak_feature = chart.feature;
        self.resid.slow_peak = chart.slow_peak;
        self.resid.slow_peak_feature = chart.slow_feature;
        self.valid += 1;
        self.window_len += 1;
        let roll = self.window_len >= WINDOW;
        if roll {
            self.window_len = 0;
        }
        for ((track, ewma), (value, u)) in self
            .tracks
            .iter_mut()
            .zip(ewmas)
            .zip(values.into_iter().zip(us))
        {
            track.since_reset.push(value);
            track.window.push(value);
            if roll {
                track.last_window = track.window;
                track.window = Welford::new();
            }
            track.last_u = u;
            if u > track.sample_u {
                track.over_sample_limit = track.over_sample_limit.saturating_add(1);
            }
            track.ewma = ewma;
            track.cusum.push(u);
        }
        let hot = self.hot_set();
        let event = self.step(hot);
        Outcome {
            index,
            scores: Some(s),
            fault: None,
            state: self.state,
            event,
            hot,
            top: scored.top,
        }
    }

    /// Counts a faulted sample; no statistic moves. Inlined into both callers:
    /// left to itself LLVM moved it out of line on the boards, 148 bytes more
    /// of flash (BENCHMARKS.md, "Model slots out of RAM").
    #[inline(always)]
    fn faulted(&mut self, index: u64, fault: Fault) -> Outcome {
        self.faults.count(fault);
        Outcome {
            index,
            scores: None,
            fault: Some(fault),
            state: self.state,
            event: None,
            hot: self.hot_set(),
            top: [Contribution {
                feature: score::NO_FEATURE,
                value: 0.0,
            }; TOP_FEATURES],
        }
    }

    fn hot_set(&self) -> ScoreSet {
        let mp = &self.model.monitor;
        let limits = [&mp.spe, &mp.t2, &mp.nll];
        let mut set = ScoreSet::EMPTY;
        for ((track, lim), which) in self.tracks.iter().zip(limits).zip(Score::ALL) {
            if track.cusum.value() > lim.cusum_limit
                || track.ewma.value() > lim.ewma_limit
                || track.last_u > track.sample_u
            {
                set.insert(which);
            }
        }
        if self.resid.hot(&self.model) {
            set.insert(Score::Spe);
        }
        set
    }

    fn calm(&self) -> bool {
        let mp = &self.model.monitor;
        let f = mp.clear_fraction;
        let limits = [&mp.spe, &mp.t2, &mp.nll];
        self.resid.calm(&self.model, f)
            && self.tracks.iter().zip(limits).all(|(track, lim)| {
                track.cusum.value() <= f * lim.cusum_limit
                    && track.ewma.value() <= f * lim.ewma_limit
                    && track.last_u <= track.sample_u
            })
    }

    fn step(&mut self, hot: ScoreSet) -> Option<Event> {
        let mp = self.model.monitor;
        match self.state {
            DriftState::Priming => {
                if self.valid >= u64::from(mp.warmup) {
                    self.state = DriftState::Watching;
                    self.hot_run = 0;
                    return Some(Event::Primed);
                }
                None
            }
            DriftState::Watching => {
                self.hot_run = if hot.is_empty() {
                    0
                } else {
                    self.hot_run.saturating_add(1)
                };
                // A sample over a per-sample limit raises at once (the
                // Shewhart part of a combined scheme); the CUSUM and EWMA
                // must stay over their limits for `raise_dwell` samples.
                let spike = self.tracks.iter().any(|t| t.last_u > t.sample_u);
                if spike || self.hot_run >= u32::from(mp.raise_dwell) {
                    self.state = DriftState::Drifting;
                    self.held = 0;
                    self.calm_run = 0;
                    return Some(Event::Raised { drivers: hot });
                }
                None
            }
            DriftState::Drifting => {
                self.held = self.held.saturating_add(1);
                self.calm_run = if self.calm() {
                    self.calm_run.saturating_add(1)
                } else {
                    0
                };
                if self.calm_run >= u32::from(mp.clear_dwell) && self.held >= mp.min_hold {
                    self.state = DriftState::Watching;
                    self.hot_run = 0;
                    return Some(Event::Cleared);
                }
                None
            }
        }
    }
}
