//! The model: one layout, two storages.
//!
//! [`Model`] keeps every array in a fixed-capacity [`heapless::Vec`]; it is what
//! a device decodes into. [`ModelOwned`] (feature `alloc`) has the same fields in
//! the same order with `alloc::vec::Vec`; the host fills it in. Postcard encodes
//! both vector kinds identically (a varint length, then the elements), so the
//! two give the same bytes. Validation is written once, on [`ModelView`].

use crate::error::{Field, ModelError};
use crate::{
    MAX_COMPONENTS, MAX_FEATURES, MAX_LOADINGS, MAX_MIXTURE, MAX_MIX_PARAMS, MAX_SLOW, MAX_WHITEN,
    SLOW_PARAMS,
};
use serde::{Deserialize, Serialize};

/// Identity and provenance of a model. Encoded first, so a reader can learn
/// what a file is before decoding the arrays.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct ModelMeta {
    /// Model id, chosen by the fit (derived from the payload unless given).
    pub id: u32,
    /// Schema fingerprint: hash of feature names, order and units
    /// ([`crate::schema::fingerprint`]).
    pub schema: u64,
    /// When the model was fitted, seconds since the Unix epoch (0 if unknown).
    pub created_unix_s: u64,
    /// Rows used for the fit.
    pub train_rows: u64,
    /// Rows used for calibration.
    pub calib_rows: u64,
    /// Nominal sample period of the logs in microseconds (0 if unknown).
    pub sample_period_us: u32,
}

/// The dimensions of a model.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Dims {
    /// Features per sample, `d`.
    pub features: u16,
    /// Latent components kept, `m` (1 ≤ m ≤ d).
    pub components: u16,
    /// Mixture components, `k`.
    pub mixture: u16,
}

/// Limits and smoothing constants for one score.
///
/// The monitored quantity is the score passed through a variance-stabilising
/// transform (cube root for SPE and T², after Wilson & Hilferty 1931; for the
/// mixture NLL, cube root of its excess over the model's floor, the smallest
/// NLL the model can give), then standardised:
/// `u = (g(score) - center) / spread`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct ScoreLimits {
    /// Per-sample limit on the raw score: a sample whose score exceeds it is
    /// hot for this score (a Shewhart chart beside the CUSUM and EWMA, as in
    /// combined Shewhart–CUSUM schemes, Lucas 1982). Finite; may be ≤ 0 for the
    /// NLL.
    pub sample_limit: f32,
    /// In-control mean of the transformed score.
    pub center: f32,
    /// In-control standard deviation of the transformed score (> 0).
    pub spread: f32,
    /// CUSUM reference value `k`, in units of `spread` (≥ 0).
    pub cusum_slack: f32,
    /// CUSUM decision limit `h`, in units of `spread` (> 0).
    pub cusum_limit: f32,
    /// Upper limit of the EWMA of `u` (> 0).
    pub ewma_limit: f32,
}

/// Parameters of the streaming monitor and its drift states.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct MonitorParams {
    /// A standardised feature with `|z|` above this is a sensor fault (> 0).
    pub fault_z: f32,
    /// Valid samples after a reset or model switch before a flag may rise.
    pub warmup: u32,
    /// EWMA smoothing constant λ, in (0, 1].
    pub ewma_lambda: f32,
    /// Consecutive samples over a limit before a flag rises (≥ 1).
    pub raise_dwell: u16,
    /// Consecutive calm samples before a flag clears (≥ 1).
    pub clear_dwell: u16,
    /// Fewest samples a raised flag stays raised.
    pub min_hold: u32,
    /// Calm means every CUSUM at or below `clear_fraction · h`, every EWMA at
    /// or below `clear_fraction · L`, and no score of the last scored sample
    /// over its per-sample limit; in (0, 1].
    pub clear_fraction: f32,
    /// Limits for SPE (Q). Its per-sample chart and CUSUM run on `u` with
    /// this `center` and `spread`; its EWMA runs on the SPE standardised
    /// within each sample's operating mode (`spe_center_by_mode`,
    /// `spe_spread_by_mode`), and `ewma_limit` is on that scale.
    pub spe: ScoreLimits,
    /// Limits for Hotelling T².
    pub t2: ScoreLimits,
    /// Limits for the mixture negative log-likelihood.
    pub nll: ScoreLimits,
}

/// Borrowed, storage-independent view of a model; validation lives here.
#[derive(Debug, Clone, Copy)]
pub struct ModelView<'a> {
    /// Identity.
    pub meta: &'a ModelMeta,
    /// Dimensions.
    pub dims: &'a Dims,
    /// Per-feature mean, `d`.
    pub mean: &'a [f32],
    /// Per-feature scale, `d`.
    pub scale: &'a [f32],
    /// Loadings, `d × m` row-major.
    pub loadings: &'a [f32],
    /// Eigenvalues of the kept components, `m`.
    pub eigenvalues: &'a [f32],
    /// θ1, θ2, θ3 of the discarded eigenvalues.
    pub theta: &'a [f32; 3],
    /// Mixture weights, `k`.
    pub weights: &'a [f32],
    /// Mixture means, `k × m` row-major.
    pub mix_means: &'a [f32],
    /// Mixture variances, `k × m` row-major.
    pub mix_variances: &'a [f32],
    /// Monitor parameters.
    pub monitor: &'a MonitorParams,
    /// Centre of the transformed SPE per mixture component, `k`.
    pub spe_center_by_mode: &'a [f32],
    /// Spread of the transformed SPE per mixture component, `k`.
    pub spe_spread_by_mode: &'a [f32],
    /// Centre of each feature's residual, `d`.
    pub resid_center: &'a [f32],
    /// Gain of each feature's residual chart, `d` (0: that feature's chart
    /// is off).
    pub resid_gain: &'a [f32],
    /// Limit of the residual chart.
    pub resid_limit: f32,
    /// The residual chart's whitening matrix, `d × d` row-major, or empty
    /// (the identity).
    pub resid_whiten: &'a [f32],
    /// The slow charts, [`SLOW_PARAMS`] values each (feature, λ, centre,
    /// gain), or empty.
    pub slow_charts: &'a [f32],
    /// Limit of the slow charts.
    pub slow_limit: f32,
}

/// Largest `|r_i|` of a feature's PCA residual in a sample the detector
/// scores: its square is a term of the SPE, which the detector requires
/// finite, so `r_i² ≤ f32::MAX` and `|r_i| ≤ √f32::MAX ≈ 1.8447e19` (rounded
/// up here).
pub const RESIDUAL_MAX: f32 = 1.845e19;

/// Largest value validation lets the residual chart's input `v_i` and its
/// scaled form `(v_i − center_i) · gain_i` reach for any residual within
/// [`RESIDUAL_MAX`] (see [`ModelView::validate`]): far under `f32::MAX`
/// (3.4e38), so the chart's EWMA, a convex combination of such values, stays
/// finite and the detector can step it in place without a check.
pub const CHART_INPUT_MAX: f32 = 1e37;

fn check_len(field: Field, slice: &[f32], expected: usize) -> Result<(), ModelError> {
    if slice.len() != expected {
        return Err(ModelError::Inconsistent {
            field,
            expected: expected as u32,
            found: slice.len() as u32,
        });
    }
    Ok(())
}

fn check_finite(field: Field, slice: &[f32]) -> Result<(), ModelError> {
    match slice.iter().position(|v| !v.is_finite()) {
        Some(i) => Err(ModelError::NonFinite {
            field,
            index: i as u16,
        }),
        None => Ok(()),
    }
}

fn check_positive(field: Field, slice: &[f32]) -> Result<(), ModelError> {
    check_finite(field, slice)?;
    match slice.iter().position(|v| *v <= 0.0) {
        Some(i) => Err(ModelError::NotPositive {
            field,
            index: i as u16,
        }),
        None => Ok(()),
    }
}

impl ScoreLimits {
    fn validate(&self, field: Field) -> Result<(), ModelError> {
        // (value, must be > 0), in field order; the index reported is the
        // field's position in the struct.
        let values = [
            (self.sample_limit, false),
            (self.center, false),
            (self.spread, true),
            (self.cusum_slack, false),
            (self.cusum_limit, true),
            (self.ewma_limit, true),
        ];
        for (i, (v, positive)) in values.iter().enumerate() {
            if !v.is_finite() {
                return Err(ModelError::NonFinite {
                    field,
                    index: i as u16,
                });
            }
            if *positive && *v <= 0.0 {
                return Err(ModelError::NotPositive {
                    field,
                    index: i as u16,
                });
            }
        }
        if self.cusum_slack < 0.0 {
            return Err(ModelError::OutOfRange { field });
        }
        Ok(())
    }
}

impl MonitorParams {
    /// Checks every parameter for finiteness and range.
    pub fn validate(&self) -> Result<(), ModelError> {
        let field = Field::Monitor;
        check_positive(
            field,
            &[self.fault_z, self.ewma_lambda, self.clear_fraction],
        )?;
        if self.ewma_lambda > 1.0
            || self.clear_fraction > 1.0
            || self.raise_dwell == 0
            || self.clear_dwell == 0
        {
            return Err(ModelError::OutOfRange { field });
        }
        self.spe.validate(Field::SpeLimits)?;
        self.t2.validate(Field::T2Limits)?;
        self.nll.validate(Field::NllLimits)
    }
}

impl ModelView<'_> {
    /// Checks that the model is internally consistent and numerically
    /// meaningful. It does not check capacities (see [`crate::Capacity`]).
    pub fn validate(&self) -> Result<(), ModelError> {
        let d = usize::from(self.dims.features);
        let m = usize::from(self.dims.components);
        let k = usize::from(self.dims.mixture);
        if d == 0 || m == 0 || k == 0 || m > d {
            return Err(ModelError::BadDimensions);
        }
        check_len(Field::Mean, self.mean, d)?;
        check_len(Field::Scale, self.scale, d)?;
        check_len(Field::Loadings, self.loadings, d * m)?;
        check_len(Field::Eigenvalues, self.eigenvalues, m)?;
        check_len(Field::Weights, self.weights, k)?;
        check_len(Field::MixMeans, self.mix_means, k * m)?;
        check_len(Field::MixVariances, self.mix_variances, k * m)?;

        check_finite(Field::Mean, self.mean)?;
        check_positive(Field::Scale, self.scale)?;
        check_finite(Field::Loadings, self.loadings)?;
        check_positive(Field::Eigenvalues, self.eigenvalues)?;
        check_finite(Field::Theta, self.theta)?;
        if self.theta.iter().any(|t| *t < 0.0) {
            return Err(ModelError::OutOfRange {
                field: Field::Theta,
            });
        }
        check_positive(Field::Weights, self.weights)?;
        let total: f32 = self.weights.iter().sum();
        if (total - 1.0).abs() > 1e-3 {
            return Err(ModelError::OutOfRange {
                field: Field::Weights,
            });
        }
        check_finite(Field::MixMeans, self.mix_means)?;
        check_positive(Field::MixVariances, self.mix_variances)?;
        self.monitor.validate()?;
        check_len(Field::SpeByMode, self.spe_center_by_mode, k)?;
        check_len(Field::SpeByMode, self.spe_spread_by_mode, k)?;
        check_finite(Field::SpeByMode, self.spe_center_by_mode)?;
        check_positive(Field::SpeByMode, self.spe_spread_by_mode)?;
        check_len(Field::ResidualChart, self.resid_center, d)?;
        check_len(Field::ResidualChart, self.resid_gain, d)?;
        check_finite(Field::ResidualChart, self.resid_center)?;
        check_finite(Field::ResidualChart, self.resid_gain)?;
        if self.resid_gain.iter().any(|g| *g < 0.0) {
            return Err(ModelError::OutOfRange {
                field: Field::ResidualChart,
            });
        }
        check_positive(Field::ResidualChart, &[self.resid_limit])?;
        // The whitening matrix: none (the identity) or d × d, finite.
        if !self.resid_whiten.is_empty() {
            check_len(Field::ResidualChart, self.resid_whiten, d * d)?;
            check_finite(Field::ResidualChart, self.resid_whiten)?;
        }
        // The chart's input for feature i is v_i = Σ_j W_ij r_j (r_i without
        // a matrix), summed in f32; with every |r_j| ≤ RESIDUAL_MAX, |v_i| is
        // at most Σ_j |W_ij| · RESIDUAL_MAX up to rounding (a relative
        // d·ε ≈ 4e-6 at 64 features, far inside the bound's margin). The
        // model is refused unless that bound plus |center_i|, and the same
        // times gain_i, stay within CHART_INPUT_MAX: then no sample can take
        // the chart out of the f32 range (a non-finite sum of |W_ij| fails
        // the comparison too).
        //
        // The slow charts (format 5) are checked in the same pass: whole
        // quadruples (feature, λ, centre, gain), each met at its feature, so
        // the features must be integers under d in ascending order (one that
        // is not, a repeat or NaN is never met and is refused after the
        // pass); λ in (0, 1], gain ≥ 0, and the same range check on the
        // same input as that feature's residual chart.
        check_positive(Field::ResidualChart, &[self.slow_limit])?;
        let bad = Err(ModelError::OutOfRange {
            field: Field::ResidualChart,
        });
        let mut slow = self.slow_charts.chunks_exact(SLOW_PARAMS);
        if !slow.remainder().is_empty() {
            return bad;
        }
        let mut next_slow = slow.next();
        let mut rows = self
            .resid_whiten
            .chunks_exact(d.max(1))
            .map(|row| row.iter().map(|w| w.abs()).sum::<f32>());
        for (i, (c, g)) in self.resid_center.iter().zip(self.resid_gain).enumerate() {
            let reach = if self.resid_whiten.is_empty() {
                1.0
            } else {
                rows.next().unwrap_or(f32::INFINITY)
            };
            in_range(reach, *c, *g)?;
            if let Some(&[f, l, sc, sg]) = next_slow {
                if f == i as f32 {
                    // Written so that NaN fails.
                    let in_bounds = l > 0.0 && l <= 1.0 && sg >= 0.0;
                    if !in_bounds {
                        return bad;
                    }
                    in_range(reach, sc, sg)?;
                    next_slow = slow.next();
                }
            }
        }
        if next_slow.is_some() {
            return bad;
        }
        Ok(())
    }
}

/// The range check of one chart's input (see [`ModelView::validate`]):
/// `reach · RESIDUAL_MAX + |center|`, and the same times `gain`, within
/// [`CHART_INPUT_MAX`] (NaN fails).
fn in_range(reach: f32, center: f32, gain: f32) -> Result<(), ModelError> {
    let v = reach * RESIDUAL_MAX + center.abs();
    if v <= CHART_INPUT_MAX && v * gain <= CHART_INPUT_MAX {
        Ok(())
    } else {
        Err(ModelError::OutOfRange {
            field: Field::ResidualChart,
        })
    }
}

macro_rules! model_type {
    (
        $(#[$attr:meta])*
        $name:ident,
        feat = $feat:ty, load = $load:ty, comp = $comp:ty, mix = $mix:ty, mixp = $mixp:ty,
        whiten = $whiten:ty, slow = $slow:ty
    ) => {
        $(#[$attr])*
        #[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
        pub struct $name {
            /// Identity and provenance.
            pub meta: ModelMeta,
            /// Dimensions.
            pub dims: Dims,
            /// Per-feature mean μ, `d` values.
            pub mean: $feat,
            /// Per-feature scale s (standard deviation, ddof = 0), `d` values.
            pub scale: $feat,
            /// PCA loadings P, `d × m`, row-major (`loadings[i * m + j]`).
            pub loadings: $load,
            /// Eigenvalues λ of the kept components, `m` values, descending.
            pub eigenvalues: $comp,
            /// θ1, θ2, θ3: sums of the first three powers of the discarded
            /// eigenvalues (Jackson & Mudholkar 1979).
            pub theta: [f32; 3],
            /// Mixture weights π, `k` values summing to one.
            pub weights: $mix,
            /// Mixture means ν, `k × m`, row-major.
            pub mix_means: $mixp,
            /// Mixture variances v (diagonal), `k × m`, row-major.
            pub mix_variances: $mixp,
            /// Streaming monitor parameters and limits.
            pub monitor: MonitorParams,
            /// Centre of the transformed SPE (its cube root) among the
            /// calibration samples whose most likely mixture component is
            /// `c`, `k` values: the operating modes differ in how well PCA
            /// reconstructs them.
            pub spe_center_by_mode: $mix,
            /// Spread (standard deviation, ddof = 1) of the same, `k`
            /// values, > 0. The SPE's EWMA smooths
            /// `(g(SPE) − center_c) / spread_c`, `c` the sample's most likely
            /// component.
            pub spe_spread_by_mode: $mix,
            /// Centre of each feature's chart input `v_i` on the calibration
            /// samples, `d` values: `v_i` is the residual
            /// `r_i = z_i − (P Pᵀ z)_i`, whitened when the model has a
            /// matrix (`resid_whiten`).
            pub resid_center: $feat,
            /// Gain of each feature's residual chart, `d` values, ≥ 0: the
            /// chart of feature `i` smooths `(v_i − center_i) · gain_i` by
            /// an EWMA (the monitor's λ). The gain scales each feature's
            /// smoothed input to its own nominal tail, so one limit serves
            /// features of any memory; 0 turns that feature's chart off.
            pub resid_gain: $feat,
            /// Limit on the absolute value of every feature's residual EWMA
            /// (> 0).
            pub resid_limit: f32,
            /// The residual chart's whitening matrix W, `d × d` row-major,
            /// or empty for the identity (format 3's chart). The chart of
            /// feature `i` then smooths `(v_i − center_i) · gain_i` with
            /// `v_i = Σ_j W_ij r_j` (the sum in index order): with
            /// `W_ij = S⁺_ij / √S⁺_ii`, `S⁺` the pseudo-inverse of the
            /// residuals' nominal covariance, `v_i` is the standardised test
            /// statistic of a bias in sensor `i` alone (format 4).
            pub resid_whiten: $whiten,
            /// The slow charts (format 5; empty: none), [`SLOW_PARAMS`]
            /// values each: the feature `i` (an integer, ascending), the
            /// EWMA constant λ in (0, 1], the centre `c` and the gain `g` ≥ 0.
            /// A slow chart is a second EWMA of feature `i`'s residual chart
            /// input `v_i`: it smooths `(v_i − c) · g` with its own λ, all set
            /// by `plumb tailor` on one robot's own nominal logs. At most
            /// [`crate::MAX_SLOW`] on a device. (Packed in one vector so a
            /// device decodes and checks them with the code it has.)
            pub slow_charts: $slow,
            /// Limit on the absolute value of every slow chart's EWMA (> 0).
            pub slow_limit: f32,
        }

        impl $name {
            /// A borrowed view, for validation and arithmetic.
            pub fn view(&self) -> ModelView<'_> {
                ModelView {
                    meta: &self.meta,
                    dims: &self.dims,
                    mean: &self.mean,
                    scale: &self.scale,
                    loadings: &self.loadings,
                    eigenvalues: &self.eigenvalues,
                    theta: &self.theta,
                    weights: &self.weights,
                    mix_means: &self.mix_means,
                    mix_variances: &self.mix_variances,
                    monitor: &self.monitor,
                    spe_center_by_mode: &self.spe_center_by_mode,
                    spe_spread_by_mode: &self.spe_spread_by_mode,
                    resid_center: &self.resid_center,
                    resid_gain: &self.resid_gain,
                    resid_limit: self.resid_limit,
                    resid_whiten: &self.resid_whiten,
                    slow_charts: &self.slow_charts,
                    slow_limit: self.slow_limit,
                }
            }

            /// Checks consistency and numeric sanity; see [`ModelView::validate`].
            pub fn validate(&self) -> Result<(), ModelError> {
                self.view().validate()
            }
        }
    };
}

model_type!(
    /// A model in fixed-capacity storage, as a device holds it.
    ///
    /// Capacities: [`MAX_FEATURES`], [`MAX_COMPONENTS`], [`MAX_MIXTURE`].
    Model,
    feat = heapless::Vec<f32, MAX_FEATURES>,
    load = heapless::Vec<f32, MAX_LOADINGS>,
    comp = heapless::Vec<f32, MAX_COMPONENTS>,
    mix = heapless::Vec<f32, MAX_MIXTURE>,
    mixp = heapless::Vec<f32, MAX_MIX_PARAMS>,
    whiten = heapless::Vec<f32, MAX_WHITEN>,
    slow = heapless::Vec<f32, { SLOW_PARAMS * MAX_SLOW }>
);

impl ModelMeta {
    /// All zero.
    pub const ZERO: ModelMeta = ModelMeta {
        id: 0,
        schema: 0,
        created_unix_s: 0,
        train_rows: 0,
        calib_rows: 0,
        sample_period_us: 0,
    };
}

impl Dims {
    /// No dimensions (not a valid model's).
    pub const ZERO: Dims = Dims {
        features: 0,
        components: 0,
        mixture: 0,
    };
}

impl MonitorParams {
    /// All zero (not valid parameters).
    pub const ZERO: MonitorParams = MonitorParams {
        fault_z: 0.0,
        warmup: 0,
        ewma_lambda: 0.0,
        raise_dwell: 0,
        clear_dwell: 0,
        min_hold: 0,
        clear_fraction: 0.0,
        spe: ScoreLimits::ZERO,
        t2: ScoreLimits::ZERO,
        nll: ScoreLimits::ZERO,
    };
}

impl ScoreLimits {
    /// All zero (not a valid set of limits).
    pub const ZERO: ScoreLimits = ScoreLimits {
        sample_limit: 0.0,
        center: 0.0,
        spread: 0.0,
        cusum_slack: 0.0,
        cusum_limit: 0.0,
        ewma_limit: 0.0,
    };
}

impl Model {
    /// No model: zero dimensions, empty vectors, zero parameters. It fails
    /// [`Model::validate`], so nothing runs it by mistake; it is the starting
    /// point of [`crate::file::decode_into`] and of a detector place that
    /// holds no model yet. A `const`, so a static can start from it without
    /// building a model on the stack.
    pub const EMPTY: Model = Model {
        meta: ModelMeta::ZERO,
        dims: Dims::ZERO,
        mean: heapless::Vec::new(),
        scale: heapless::Vec::new(),
        loadings: heapless::Vec::new(),
        eigenvalues: heapless::Vec::new(),
        theta: [0.0; 3],
        weights: heapless::Vec::new(),
        mix_means: heapless::Vec::new(),
        mix_variances: heapless::Vec::new(),
        monitor: MonitorParams::ZERO,
        spe_center_by_mode: heapless::Vec::new(),
        spe_spread_by_mode: heapless::Vec::new(),
        resid_center: heapless::Vec::new(),
        resid_gain: heapless::Vec::new(),
        resid_limit: 0.0,
        resid_whiten: heapless::Vec::new(),
        slow_charts: heapless::Vec::new(),
        slow_limit: 0.0,
    };

    /// Returns to [`Model::EMPTY`] in place (no 22 KiB value is built).
    pub fn clear(&mut self) {
        let Model {
            meta,
            dims,
            mean,
            scale,
            loadings,
            eigenvalues,
            theta,
            weights,
            mix_means,
            mix_variances,
            monitor,
            spe_center_by_mode,
            spe_spread_by_mode,
            resid_center,
            resid_gain,
            resid_limit,
            resid_whiten,
            slow_charts,
            slow_limit,
        } = self;
        *meta = ModelMeta::ZERO;
        *dims = Dims::ZERO;
        mean.clear();
        scale.clear();
        loadings.clear();
        eigenvalues.clear();
        *theta = [0.0; 3];
        weights.clear();
        mix_means.clear();
        mix_variances.clear();
        *monitor = MonitorParams::ZERO;
        spe_center_by_mode.clear();
        spe_spread_by_mode.clear();
        resid_center.clear();
        resid_gain.clear();
        *resid_limit = 0.0;
        resid_whiten.clear();
        slow_charts.clear();
        *slow_limit = 0.0;
    }

    /// Whether this is [`Model::EMPTY`]'s state: no features.
    pub fn is_empty(&self) -> bool {
        self.dims.features == 0
    }
}

#[cfg(feature = "alloc")]
model_type!(
    /// A model in growable storage, as the host builds it. Encodes to the same
    /// bytes as [`Model`].
    ModelOwned,
    feat = alloc::vec::Vec<f32>,
    load = alloc::vec::Vec<f32>,
    comp = alloc::vec::Vec<f32>,
    mix = alloc::vec::Vec<f32>,
    mixp = alloc::vec::Vec<f32>,
    whiten = alloc::vec::Vec<f32>,
    slow = alloc::vec::Vec<f32>
);

#[cfg(feature = "alloc")]
impl ModelOwned {
    /// Copies into fixed-capacity storage, refusing a model over the device
    /// capacities.
    pub fn to_device(&self) -> Result<Model, ModelError> {
        crate::Capacity::DEVICE.admits(&self.dims)?;
        self.validate()?;
        // More slow charts than a device holds (its decoder would refuse
        // the vector as undecodable; named here).
        if self.slow_charts.len() > SLOW_PARAMS * MAX_SLOW {
            return Err(ModelError::Inconsistent {
                field: Field::ResidualChart,
                expected: (SLOW_PARAMS * MAX_SLOW) as u32,
                found: self.slow_charts.len() as u32,
            });
        }
        fn copy<const N: usize>(src: &[f32]) -> heapless::Vec<f32, N> {
            // Lengths were checked by `admits` and `validate` above.
            src.iter().copied().take(N).collect()
        }
        Ok(Model {
            meta: self.meta,
            dims: self.dims,
            mean: copy(&self.mean),
            scale: copy(&self.scale),
            loadings: copy(&self.loadings),
            eigenvalues: copy(&self.eigenvalues),
            theta: self.theta,
            weights: copy(&self.weights),
            mix_means: copy(&self.mix_means),
            mix_variances: copy(&self.mix_variances),
            monitor: self.monitor,
            spe_center_by_mode: copy(&self.spe_center_by_mode),
            spe_spread_by_mode: copy(&self.spe_spread_by_mode),
            resid_center: copy(&self.resid_center),
            resid_gain: copy(&self.resid_gain),
            resid_limit: self.resid_limit,
            resid_whiten: copy(&self.resid_whiten),
            slow_charts: copy(&self.slow_charts),
            slow_limit: self.slow_limit,
        })
    }
}

#[cfg(feature = "alloc")]
impl From<&Model> for ModelOwned {
    fn from(m: &Model) -> Self {
        ModelOwned {
            meta: m.meta,
            dims: m.dims,
            mean: m.mean.to_vec(),
            scale: m.scale.to_vec(),
            loadings: m.loadings.to_vec(),
            eigenvalues: m.eigenvalues.to_vec(),
            theta: m.theta,
            weights: m.weights.to_vec(),
            mix_means: m.mix_means.to_vec(),
            mix_variances: m.mix_variances.to_vec(),
            monitor: m.monitor,
            spe_center_by_mode: m.spe_center_by_mode.to_vec(),
            spe_spread_by_mode: m.spe_spread_by_mode.to_vec(),
            resid_center: m.resid_center.to_vec(),
            resid_gain: m.resid_gain.to_vec(),
            resid_limit: m.resid_limit,
            resid_whiten: m.resid_whiten.to_vec(),
            slow_charts: m.slow_charts.to_vec(),
            slow_limit: m.slow_limit,
        }
    }
}
