//! Per-sample scores: standardise, project, reconstruct, SPE, T², mixture NLL.

use crate::math;
use plumb_model::{
    Model, ModelError, MAX_COMPONENTS, MAX_FEATURES, MAX_MIXTURE, MAX_MIX_PARAMS, MAX_SLOW,
    SLOW_PARAMS,
};

/// How many features the residual contributions name.
pub const TOP_FEATURES: usize = 3;

/// Feature index of an unused contribution slot.
pub const NO_FEATURE: u8 = u8::MAX;

/// The three scores of one sample.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Scores {
    /// Squared prediction error (Q): squared norm of the residual.
    pub spe: f32,
    /// Hotelling T² of the latent scores.
    pub t2: f32,
    /// Negative log-likelihood under the diagonal Gaussian mixture.
    pub nll: f32,
}

/// One feature's share of the SPE.
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Contribution {
    /// Feature index in model order.
    pub feature: u8,
    /// Squared residual `r_i²` of that feature.
    pub value: f32,
}

/// Why a sample was not scored. A faulted sample never reaches any statistic.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Fault {
    /// The sample has the wrong number of features.
    WrongLength {
        /// Features received.
        got: u16,
    },
    /// A feature is NaN or infinite.
    NonFinite {
        /// Feature index.
        feature: u8,
    },
    /// A feature is further than the model's `fault_z` from its mean.
    OutOfRange {
        /// Feature index.
        feature: u8,
    },
    /// A score, or its standardised value, overflowed f32 (possible only with
    /// extreme models).
    Overflow,
}

/// A scored sample: scores, residual contributions and the latent scores.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Scored {
    /// The scores.
    pub scores: Scores,
    /// The largest residual contributions, largest first.
    pub top: [Contribution; TOP_FEATURES],
    /// Number of latent scores in `latent`.
    pub m: usize,
    /// Latent scores `t = Pᵀ z` (first `m` valid).
    pub latent: [f32; MAX_COMPONENTS],
    /// The most likely mixture component (the sample's operating mode): the
    /// first of the largest `ln π_c + ln N(t; ν_c, v_c)`.
    pub mode: usize,
}

/// Constants derived from a model at load time, so the per-sample path does
/// only multiply-adds plus `k` exponentials and one logarithm.
#[derive(Debug, Clone, PartialEq)]
pub struct Derived {
    inv_scale: [f32; MAX_FEATURES],
    inv_eigen: [f32; MAX_COMPONENTS],
    inv_var: [f32; MAX_MIX_PARAMS],
    log_norm: [f32; MAX_MIXTURE],
    nll_floor: f32,
}

impl Derived {
    /// All zero: the constants of no model.
    pub const ZERO: Derived = Derived {
        inv_scale: [0.0; MAX_FEATURES],
        inv_eigen: [0.0; MAX_COMPONENTS],
        inv_var: [0.0; MAX_MIX_PARAMS],
        log_norm: [0.0; MAX_MIXTURE],
        nll_floor: 0.0,
    };

    /// Precomputes reciprocals and the per-component log normalising
    /// constants `ln π_c − ½ Σ_j ln(2π v_cj)`. The model must be validated.
    pub fn new(model: &Model) -> Result<Self, ModelError> {
        let mut d = Derived::ZERO;
        d.compute(model)?;
        Ok(d)
    }

    /// [`Derived::new`] in place. On error the values are partly computed
    /// and must not be used.
    pub fn compute(&mut self, model: &Model) -> Result<(), ModelError> {
        let d = self;
        *d = Derived::ZERO;
        for (o, s) in d.inv_scale.iter_mut().zip(model.scale.iter()) {
            *o = 1.0 / s;
        }
        for (o, l) in d.inv_eigen.iter_mut().zip(model.eigenvalues.iter()) {
            *o = 1.0 / l;
        }
        for (o, v) in d.inv_var.iter_mut().zip(model.mix_variances.iter()) {
            *o = 1.0 / v;
        }
        let m = usize::from(model.dims.components);
        let two_pi = 2.0 * core::f32::consts::PI;
        for ((o, w), vars) in d
            .log_norm
            .iter_mut()
            .zip(model.weights.iter())
            .zip(model.mix_variances.chunks_exact(m.max(1)))
        {
            let mut acc = math::ln_exact(*w);
            for v in vars {
                acc -= 0.5 * math::ln_exact(two_pi * v);
            }
            *o = acc;
        }
        let k = usize::from(model.dims.mixture);
        let top = d.log_norm[..k.min(MAX_MIXTURE)]
            .iter()
            .fold(f32::NEG_INFINITY, |a, b| a.max(*b));
        let mut sum = 0.0f32;
        for ln in &d.log_norm[..k.min(MAX_MIXTURE)] {
            sum += libm::expf(ln - top);
        }
        d.nll_floor = -(top + math::ln_exact(sum));
        let all = d
            .inv_scale
            .iter()
            .chain(d.inv_eigen.iter())
            .chain(d.inv_var.iter())
            .chain(d.log_norm.iter())
            .chain(core::iter::once(&d.nll_floor));
        if all.clone().any(|v| !v.is_finite()) {
            return Err(ModelError::OutOfRange {
                field: plumb_model::Field::MixVariances,
            });
        }
        Ok(())
    }

    /// The smallest NLL the model can give (computed at load time).
    pub fn nll_floor(&self) -> f32 {
        self.nll_floor
    }
}

fn insert_top(top: &mut [Contribution; TOP_FEATURES], feature: usize, value: f32) {
    // Strictly greater: ties keep the lower feature index first.
    if value > top[TOP_FEATURES - 1].value {
        let mut at = TOP_FEATURES - 1;
        while at > 0 && value > top[at - 1].value {
            top[at] = top[at - 1];
            at -= 1;
        }
        top[at] = Contribution {
            feature: feature as u8,
            value,
        };
    }
}

/// The fault of a sample whose feature `at` standardised to NaN or beyond
/// the fault limit: the first non-finite feature if there is one, else `at`.
#[cold]
#[inline(never)]
fn input_fault(x: &[f32], at: usize) -> Fault {
    match x.iter().position(|v| !v.is_finite()) {
        Some(j) => Fault::NonFinite { feature: j as u8 },
        None => Fault::OutOfRange { feature: at as u8 },
    }
}

/// One feature's residual chart EWMA after input `v`:
/// `e + λ ((v − center) · gain − e)`. The detector ([`chart_step`]) and the
/// host calibration both step the chart through this function.
#[inline(always)]
pub fn chart_next(e: f32, v: f32, center: f32, gain: f32, lambda: f32) -> f32 {
    e + lambda * ((v - center) * gain - e)
}

/// The residual chart's input for feature `i` from the residuals `r` (the
/// first `d` of a scored sample's): `v_i = Σ_j W_ij r_j`, summed in index
/// order, with the model's whitening matrix `W` (`d × d`, row-major), or
/// `r_i` itself when the model has none. 0 for an `i` out of range. The
/// detector and the host calibration both compute it here.
#[inline(always)]
pub fn chart_input(whiten: &[f32], r: &[f32], i: usize) -> f32 {
    let d = r.len();
    if whiten.is_empty() {
        return r.get(i).copied().unwrap_or(0.0);
    }
    let mut v = 0.0f32;
    if let Some(row) = whiten.get(i * d..(i + 1) * d) {
        for (w, rj) in row.iter().zip(r) {
            v += w * rj;
        }
    }
    v
}

/// The residual chart's step on a scored sample (see [`chart_step`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ChartStep {
    /// The largest `|next EWMA|` over the features.
    pub peak: f32,
    /// Its feature (the first of equal ones).
    pub feature: u8,
    /// The largest `|next EWMA|` over the slow charts (0 without any).
    pub slow_peak: f32,
    /// Its feature (the first of equal ones).
    pub slow_feature: u8,
}

/// Steps the SPE's residual chart in place: each `ewma[i]` (the first `d`)
/// becomes [`chart_next`] of its [`chart_input`] from the sample's residuals
/// `r` (the first `d` values [`score`] left in its buffer); and each slow
/// chart `slow[s]` (model format 5: the model's `slow_charts`, in feature
/// order) becomes [`chart_next`] of the same input
/// with its own constant, centre and gain. Call it only for a scored sample
/// (every `r_i` finite and `r_i²` within `f32::MAX`) of a validated model:
/// the validation then keeps every input and every EWMA value finite
/// ([`plumb_model::CHART_INPUT_MAX`]), which is why the step needs no check
/// and no second buffer, and its slow charts' features ascend, so each is
/// met where the walk over the features reaches it.
///
/// With a whitening matrix the inputs are summed four rows at a time: each
/// `r_j` is loaded once for the four rows, and each row's sum still runs
/// over `j` in index order, so every input has [`chart_input`]'s bits. A
/// slow chart takes its feature's input as the walk passes it (not a second
/// sum).
///
/// The peaks are found on the bit patterns of the absolute values, whose
/// integer order is the order of the values for every non-negative float:
/// one integer comparison per chart.
#[inline(always)]
pub fn chart_step(
    model: &Model,
    r: &[f32],
    ewma: &mut [f32; MAX_FEATURES],
    slow: &mut [f32; MAX_SLOW],
) -> ChartStep {
    let d = usize::from(model.dims.features).min(r.len());
    let r = r.get(..d).unwrap_or(&[]);
    let ewma = ewma.get_mut(..d).unwrap_or_default();
    let (center, gain) = (&model.resid_center[..], &model.resid_gain[..]);
    let lambda = model.monitor.ewma_lambda;
    let params = &model.slow_charts[..];
    let (mut peak, mut at, mut slow_peak, mut slow_at) = (0u32, 0usize, 0u32, 0usize);
    // The next slow chart to meet, and its feature.
    let mut next = 0;
    let mut next_feature = slow_feature(params, next);
    let mut step = |i: usize, e: &mut f32, v: f32, c: f32, g: f32| {
        *e = chart_next(*e, v, c, g, lambda);
        keep_peak(&mut peak, &mut at, *e, i);
        while i == next_feature {
            keep_peak(
                &mut slow_peak,
                &mut slow_at,
                slow_next(slow, params, next, v),
                i,
            );
            next += 1;
            next_feature = slow_feature(params, next);
        }
    };
    let w = &model.resid_whiten[..];
    let whitened = !w.is_empty();
    let mut four = [0.0f32; 4];
    for (i, (((e, c), g), ri)) in ewma.iter_mut().zip(center).zip(gain).zip(r).enumerate() {
        let v = if whitened {
            if i % 4 == 0 {
                four = four_rows(w, r, i);
            }
            four[i % 4]
        } else {
            *ri
        };
        step(i, e, v, *c, *g);
    }
    ChartStep {
        peak: f32::from_bits(peak),
        feature: at as u8,
        slow_peak: f32::from_bits(slow_peak),
        slow_feature: slow_at as u8,
    }
}

/// The whitened inputs of rows `i..i + 4` ([`chart_input`]'s, 0 past the
/// last row). Each is summed over `j` in index order as [`chart_input`]
/// sums, so it has its bits; four whole rows go together, each `r_j` loaded
/// once for the four. Out of line, so that the loop has the registers to
/// itself.
#[inline(never)]
fn four_rows(w: &[f32], r: &[f32], i: usize) -> [f32; 4] {
    let d = r.len();
    let Some(block) = w.get(i * d..(i + 4) * d) else {
        return [0, 1, 2, 3].map(|k| chart_input(w, r, i + k));
    };
    let (r0, rest) = block.split_at(d);
    let (r1, rest) = rest.split_at(d);
    let (r2, r3) = rest.split_at(d);
    dot4([r0, r1, r2, r3], r)
}

/// Four dot products `rows[k] · x`, each summed over `j` in index order
/// (`rows[k][j] * x[j]` added to a sum that starts at 0), with each `x_j`
/// loaded once for the four. The reconstruction and the residual chart's
/// whitening both sum through it.
#[inline(always)]
fn dot4(rows: [&[f32]; 4], x: &[f32]) -> [f32; 4] {
    let [r0, r1, r2, r3] = rows;
    let (mut a0, mut a1, mut a2, mut a3) = (0.0f32, 0.0f32, 0.0f32, 0.0f32);
    for ((((p0, p1), p2), p3), xj) in r0.iter().zip(r1).zip(r2).zip(r3).zip(x) {
        a0 += p0 * xj;
        a1 += p1 * xj;
        a2 += p2 * xj;
        a3 += p3 * xj;
    }
    [a0, a1, a2, a3]
}

/// The feature of slow chart `s` (`usize::MAX` past the last one).
#[inline(always)]
fn slow_feature(params: &[f32], s: usize) -> usize {
    match params.get(SLOW_PARAMS * s..SLOW_PARAMS * (s + 1)) {
        Some(&[f, ..]) if s < MAX_SLOW => f as usize,
        _ => usize::MAX,
    }
}

/// Steps slow chart `s` on input `v` and returns its new value (0 for a
/// chart that is not there).
#[cold]
#[inline(never)]
fn slow_next(slow: &mut [f32; MAX_SLOW], params: &[f32], s: usize, v: f32) -> f32 {
    match (
        slow.get_mut(s),
        params.get(SLOW_PARAMS * s..SLOW_PARAMS * (s + 1)),
    ) {
        (Some(e), Some(&[_, l, c, g])) => {
            *e = chart_next(*e, v, c, g, l);
            *e
        }
        _ => 0.0,
    }
}

/// Keeps `|value|`'s bits and `i` when they beat `peak` (strictly: ties keep
/// the first).
#[inline(always)]
fn keep_peak(peak: &mut u32, at: &mut usize, value: f32, i: usize) {
    let bits = value.to_bits() & 0x7fff_ffff;
    if bits > *peak {
        *peak = bits;
        *at = i;
    }
}

/// Scores one sample. `x` must have `d` features in model order. `buf` is
/// the working space of the standardised sample, then holds each feature's
/// PCA residual `r_i = z_i − (P t)_i` in its first `d` values (on a fault,
/// whatever was reached).
///
/// Operation order is fixed (sums run in index order, no fused multiply-add),
/// so the host and the board produce the same bits.
pub fn score(
    model: &Model,
    derived: &Derived,
    x: &[f32],
    buf: &mut [f32; MAX_FEATURES],
) -> Result<Scored, Fault> {
    let d = usize::from(model.dims.features);
    let m = usize::from(model.dims.components);
    let k = usize::from(model.dims.mixture);
    // d = 0 only without a model (`Model::EMPTY`): nothing can be scored.
    // A validated model is within the capacities; saying so here lets the
    // compiler drop the bounds checks (and their panics) of the slices below.
    if x.len() != d
        || d == 0
        || m == 0
        || k == 0
        || d > MAX_FEATURES
        || m > MAX_COMPONENTS
        || k > MAX_MIXTURE
    {
        return Err(Fault::WrongLength {
            got: x.len().min(u16::MAX as usize) as u16,
        });
    }
    let fault_z = model.monitor.fault_z;
    for (i, (((zi, xi), mu), inv)) in buf
        .iter_mut()
        .zip(x)
        .zip(model.mean.iter())
        .zip(derived.inv_scale.iter())
        .enumerate()
    {
        let v = (xi - mu) * inv;
        // A non-finite feature makes v NaN or infinite, so it stops here
        // too; only then is the sample scanned for one, which keeps the
        // precedence of the fault kinds (any non-finite feature before the
        // first out-of-range one) without a second pass over every sample.
        // One comparison: NaN is never within any limit.
        let within = v.abs() <= fault_z;
        if !within {
            return Err(input_fault(x, i));
        }
        *zi = v;
    }
    let z = &buf[..d];

    // t = Pᵀ z (P is d × m, row-major). Each t_j is summed over the
    // features in index order; eight of them at a time (then four), so that
    // their sums stay in registers while the rows stream past and each z_i
    // is loaded once per group.
    let mut latent = [0.0f32; MAX_COMPONENTS];
    let mut j = 0;
    while j + 8 <= m {
        let mut a = [0.0f32; 8];
        for (zi, row) in z.iter().zip(model.loadings.chunks_exact(m)) {
            if let Some(&[p0, p1, p2, p3, p4, p5, p6, p7]) = row.get(j..j + 8) {
                a[0] += zi * p0;
                a[1] += zi * p1;
                a[2] += zi * p2;
                a[3] += zi * p3;
                a[4] += zi * p4;
                a[5] += zi * p5;
                a[6] += zi * p6;
                a[7] += zi * p7;
            }
        }
        if let Some(out) = latent.get_mut(j..j + 8) {
            out.copy_from_slice(&a);
        }
        j += 8;
    }
    while j + 4 <= m {
        let (mut a0, mut a1, mut a2, mut a3) = (0.0f32, 0.0f32, 0.0f32, 0.0f32);
        for (zi, row) in z.iter().zip(model.loadings.chunks_exact(m)) {
            if let Some(&[p0, p1, p2, p3]) = row.get(j..j + 4) {
                a0 += zi * p0;
                a1 += zi * p1;
                a2 += zi * p2;
                a3 += zi * p3;
            }
        }
        if let Some(out) = latent.get_mut(j..j + 4) {
            out.copy_from_slice(&[a0, a1, a2, a3]);
        }
        j += 4;
    }
    latent_tail(z, &model.loadings, m, &mut latent, j);
    let t = &latent[..m];

    // r = z − P t; SPE = Σ r_i²; keep the top contributions; the residual
    // goes where z_i was.
    let mut spe = 0.0f32;
    // Sentinel below any real contribution; slots still unused after the loop
    // (only when d < TOP_FEATURES) name feature NO_FEATURE with value 0.
    let mut top = [Contribution {
        feature: NO_FEATURE,
        value: -1.0,
    }; TOP_FEATURES];
    // Feature i's residual, taken into the SPE and the top contributions in
    // index order, and left where z_i was.
    let mut residual = |i: usize, zi: &mut f32, recon: f32| {
        let r = *zi - recon;
        let c = r * r;
        spe += c;
        insert_top(&mut top, i, c);
        *zi = r;
    };
    // (P t)_i for four rows at a time, each summed over j in index order:
    // every t_j is loaded once for the four rows, and the four residuals are
    // used at once (no buffer of reconstructions).
    let rows4 = model.loadings.chunks_exact(4 * m);
    let done = 4 * rows4.len();
    for ((b, block), zs) in rows4.enumerate().zip(buf.chunks_exact_mut(4)) {
        let (Some(r0), Some(r1), Some(r2), Some(r3)) = (
            block.get(..m),
            block.get(m..2 * m),
            block.get(2 * m..3 * m),
            block.get(3 * m..4 * m),
        ) else {
            continue;
        };
        for (k, (zi, a)) in zs.iter_mut().zip(dot4([r0, r1, r2, r3], t)).enumerate() {
            residual(4 * b + k, zi, a);
        }
    }
    for (i, (zi, row)) in buf
        .iter_mut()
        .zip(model.loadings.chunks_exact(m))
        .enumerate()
        .skip(done)
    {
        let mut a = 0.0f32;
        for (p, tj) in row.iter().zip(t) {
            a += p * tj;
        }
        residual(i, zi, a);
    }

    for c in top.iter_mut().filter(|c| c.feature == NO_FEATURE) {
        c.value = 0.0;
    }

    let mut t2 = 0.0f32;
    for (tj, inv) in t.iter().zip(derived.inv_eigen.iter()) {
        t2 += tj * tj * inv;
    }

    // Mixture NLL by log-sum-exp over components.
    let mut logp = [0.0f32; MAX_MIXTURE];
    let mut best = f32::NEG_INFINITY;
    let mut mode = 0;
    for (c, (((lp, norm), mu), inv)) in logp
        .iter_mut()
        .zip(derived.log_norm.iter())
        .zip(model.mix_means.chunks_exact(m))
        .zip(derived.inv_var.chunks_exact(m))
        .take(k)
        .enumerate()
    {
        let mut quad = 0.0f32;
        for ((tj, mj), ij) in t.iter().zip(mu).zip(inv) {
            let e = tj - mj;
            quad += e * e * ij;
        }
        *lp = norm - 0.5 * quad;
        if *lp > best {
            best = *lp;
            mode = c;
        }
    }
    let mut sum = 0.0f32;
    for lp in &logp[..k] {
        sum += math::exp(lp - best);
    }
    let nll = -(best + math::ln(sum));

    let scores = Scores { spe, t2, nll };
    if !(spe.is_finite() && t2.is_finite() && nll.is_finite()) {
        return Err(Fault::Overflow);
    }
    Ok(Scored {
        scores,
        top,
        m,
        latent,
        mode,
    })
}

/// The latent scores `t_j` for `j` in `from..m` (those the groups of eight
/// and four left), each summed over the features in index order. Out of
/// line: a call here keeps the scoring loops' registers as they were, and
/// the columns go by a subslice (`enumerate().take(m).skip(from)` linked a
/// 104-byte `Take::nth`).
#[inline(never)]
fn latent_tail(z: &[f32], loadings: &[f32], m: usize, latent: &mut [f32], from: usize) {
    // (With no column left, `m` may be 0, which `chunks_exact` refuses.)
    let Some(rest) = latent.get_mut(from..m).filter(|r| !r.is_empty()) else {
        return;
    };
    for (jj, tj) in (from..).zip(rest) {
        let mut a = 0.0f32;
        for (zi, row) in z.iter().zip(loadings.chunks_exact(m)) {
            if let Some(p) = row.get(jj) {
                a += zi * p;
            }
        }
        *tj = a;
    }
}
