//! Gaussian mixture with diagonal covariances, fitted by EM, in f64.
//!
//! The EM loop follows scikit-learn's `GaussianMixture(covariance_type =
//! "diag")` step for step, so [`em_from`] started from the same parameters
//! gives the same path:
//!
//! * each iteration is one pass over the rows that evaluates the
//!   responsibilities under the current parameters (E) and accumulates the
//!   sufficient statistics `Σ r`, `Σ r t`, `Σ r t²` per component (for M); the
//!   `n × k` responsibility matrix is never stored;
//! * the M step sets `n_c = Σ r + 10 ε`, `ν = Σ r t / n_c`,
//!   `v = Σ r t² / n_c − ν² + reg_covar`, `π = n_c / Σ n_c`; then each
//!   variance is raised to its floor, if one is given (a floor of zero
//!   leaves scikit-learn's update unchanged). The fit uses a small fraction
//!   of each latent dimension's total variance (common practice, no source):
//!   it stops a component collapsing onto repeated points;
//! * the reported log-likelihood of an iteration is the mean per-row
//!   log-likelihood under the parameters *before* its M step (scikit-learn's
//!   `lower_bound_`); EM stops when it changes by less than `tol`, or after
//!   `max_iter` iterations.
//!
//! The passes read the rows as [`Tiled`] data (tiles of `TILE` rows, one
//! array per dimension), rearranged once per fit, in place. Rows are cut into
//! fixed blocks of [`BLOCK`] rows; blocks are shared out over the threads
//! (even blocks to one, odd to the other) and their sums are added in block
//! order, so results do not depend on the thread count.
//!
//! Initialisation for [`fit`]: k-means++ seeding (Arthur & Vassilvitskii 2007,
//! greedy with `2 + ⌊ln k⌋` candidates per centre as scikit-learn does), a few
//! Lloyd iterations, then one M step from the hard assignments, all on a
//! stratified random subsample of at most [`INIT_SAMPLE`] rows.

use crate::rng::Rng;

/// Rows per block of the parallel passes.
pub const BLOCK: usize = 16_384;
/// Most rows used to initialise.
pub const INIT_SAMPLE: usize = 50_000;
/// Lloyd iterations after k-means++ seeding.
pub const LLOYD_ITER: usize = 20;

const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// A diagonal Gaussian mixture over `m` dimensions.
#[derive(Debug, Clone, PartialEq)]
pub struct Mixture {
    /// Dimensions.
    pub m: usize,
    /// Weights, `k`, summing to one.
    pub weights: Vec<f64>,
    /// Means, `k × m` row-major.
    pub means: Vec<f64>,
    /// Variances, `k × m` row-major.
    pub variances: Vec<f64>,
}

impl Mixture {
    /// Components.
    pub fn k(&self) -> usize {
        self.weights.len()
    }

    /// Free parameters (for BIC): `k m` means, `k m` variances, `k − 1`
    /// weights.
    pub fn parameters(&self) -> usize {
        2 * self.k() * self.m + self.k() - 1
    }

    /// Per component `ln π_c − ½ Σ_j ln(2π v_cj)`, and the precisions.
    fn constants(&self) -> (Vec<f64>, Vec<f64>) {
        let m = self.m;
        let norm = self
            .weights
            .iter()
            .zip(self.variances.chunks_exact(m))
            .map(|(w, v)| w.ln() - 0.5 * v.iter().map(|x| LN_2PI + x.ln()).sum::<f64>())
            .collect();
        let prec = self.variances.iter().map(|v| 1.0 / v).collect();
        (norm, prec)
    }
}

/// EM settings.
#[derive(Debug, Clone, PartialEq)]
pub struct EmOptions {
    /// Stop when the mean log-likelihood changes by less than this.
    pub tol: f64,
    /// Most iterations.
    pub max_iter: usize,
    /// Added to every variance in the M step (scikit-learn's `reg_covar`).
    pub reg_covar: f64,
    /// Per-dimension lower bound on variances after the M step (empty: none).
    pub floor: Vec<f64>,
    /// Threads (1 or 2; results do not depend on it).
    pub threads: usize,
}

impl Default for EmOptions {
    fn default() -> Self {
        EmOptions {
            tol: 1e-3,
            max_iter: 100,
            reg_covar: 1e-6,
            floor: Vec::new(),
            threads: 2,
        }
    }
}

/// The outcome of one EM run.
#[derive(Debug, Clone, PartialEq)]
pub struct EmResult {
    /// Final parameters.
    pub mixture: Mixture,
    /// Mean log-likelihood per row at the last iteration, under the
    /// parameters before its M step (scikit-learn's `lower_bound_`).
    pub lower_bound: f64,
    /// Iterations run.
    pub iterations: usize,
    /// Whether the change fell below `tol`.
    pub converged: bool,
    /// Mean log-likelihood of every iteration.
    pub history: Vec<f64>,
}

/// Sufficient statistics of a block.
#[derive(Debug, Clone)]
struct Stats {
    ll: f64,
    nk: Vec<f64>,
    sx: Vec<f64>,
    sxx: Vec<f64>,
}

impl Stats {
    fn new(k: usize, m: usize) -> Self {
        Stats {
            ll: 0.0,
            nk: vec![0.0; k],
            sx: vec![0.0; k * m],
            sxx: vec![0.0; k * m],
        }
    }

    fn add(&mut self, o: &Stats) {
        self.ll += o.ll;
        for (a, b) in self.nk.iter_mut().zip(&o.nk) {
            *a += b;
        }
        for (a, b) in self.sx.iter_mut().zip(&o.sx) {
            *a += b;
        }
        for (a, b) in self.sxx.iter_mut().zip(&o.sxx) {
            *a += b;
        }
    }
}

/// `f(0), …, f(n − 1)` in order, computed on two threads when `threads`
/// allows (even indices on one, odd on the other).
fn per_item<T: Send>(n: usize, threads: usize, f: impl Fn(usize) -> T + Sync) -> Vec<T> {
    if threads < 2 || n < 2 {
        return (0..n).map(f).collect();
    }
    let (even, odd) = std::thread::scope(|s| {
        let h = s.spawn(|| (1..n).step_by(2).map(&f).collect::<Vec<_>>());
        let even: Vec<T> = (0..n).step_by(2).map(&f).collect();
        (even, h.join().expect("worker thread panicked"))
    });
    let mut out = Vec::with_capacity(n);
    let mut odd = odd.into_iter();
    for e in even {
        out.push(e);
        out.extend(odd.next());
    }
    out
}

/// Runs `f` on every block of `data` (blocks of `block` values) with its
/// index, through [`per_item`], and returns the results in block order.
fn per_block<T: Send>(
    data: &[f64],
    block: usize,
    threads: usize,
    f: impl Fn(usize, &[f64]) -> T + Sync,
) -> Vec<T> {
    let blocks: Vec<&[f64]> = data.chunks(block.max(1)).collect();
    per_item(blocks.len(), threads, |i| f(i, blocks[i]))
}

/// Rows per tile of [`block_stats`]: a tile's scores are transposed to one
/// array per dimension, so every step below is a loop over rows that the
/// compiler turns into vector instructions.
const TILE: usize = 128;
/// Independent partial sums per accumulated statistic within a tile.
const LANES: usize = 8;

/// Rows of `m` values stored tile by tile for the EM passes: tile `t` holds
/// rows `t·TILE .. (t+1)·TILE`, one array of `TILE` values per dimension
/// (`data[(t·m + j)·TILE + i]` is dimension `j` of row `t·TILE + i`), the
/// last tile padded with zero rows. Every loop of a pass then runs over
/// consecutive values, and the layout is made once per fit instead of once
/// per iteration.
#[derive(Debug, Clone, PartialEq)]
pub struct Tiled {
    m: usize,
    n: usize,
    data: Vec<f64>,
}

impl Tiled {
    /// Takes row-major `rows` (`m` values per row) and rearranges them in
    /// place, tile by tile; the only extra memory is one tile and the
    /// padding of the last.
    pub fn from_rows(mut rows: Vec<f64>, m: usize) -> Tiled {
        assert!(m > 0 && rows.len() % m == 0, "whole rows of {m} values");
        let n = rows.len() / m;
        rows.resize(n.div_ceil(TILE) * TILE * m, 0.0);
        let mut scratch = vec![0.0; TILE * m];
        for t in rows.chunks_exact_mut(TILE * m) {
            scratch.copy_from_slice(t);
            for (i, row) in scratch.chunks_exact(m).enumerate() {
                for (j, x) in row.iter().enumerate() {
                    t[j * TILE + i] = *x;
                }
            }
        }
        Tiled { m, n, data: rows }
    }

    /// [`Tiled::from_rows`] on a copy.
    pub fn copy_rows(rows: &[f64], m: usize) -> Tiled {
        Tiled::from_rows(rows.to_vec(), m)
    }

    /// Rows.
    pub fn rows(&self) -> usize {
        self.n
    }

    /// Values per row.
    pub fn dims(&self) -> usize {
        self.m
    }

    /// Index in `data` of row `i`'s first value; its value `j` is `TILE`
    /// further on per `j`.
    fn row_base(&self, i: usize) -> usize {
        (i / TILE) * TILE * self.m + i % TILE
    }

    /// Row `i` into `out` (`m` values).
    pub fn row_into(&self, i: usize, out: &mut [f64]) {
        let base = self.row_base(i);
        for (j, o) in out.iter_mut().enumerate().take(self.m) {
            *o = self.data[base + j * TILE];
        }
    }

    /// Asks row `i` into the cache ([`crate::simd::prefetch`]).
    pub fn prefetch_row(&self, i: usize) {
        let base = self.row_base(i);
        for j in 0..self.m {
            crate::simd::prefetch(&self.data[base + j * TILE..base + j * TILE + 1]);
        }
    }
}

/// fdlibm's split of ln 2: the high part has 32 trailing zero bits, so its
/// product with an integer of up to 32 bits is exact.
const LN2_HI: f64 = 6.931_471_803_691_238e-1;
/// `ln 2 − LN2_HI`.
const LN2_LO: f64 = 1.908_214_929_270_587_7e-10;

/// `e^x` for `x ≤ 0` (or NaN), written so that a loop over it vectorises:
/// `x = k ln 2 + r` with `k` the nearest integer to `x / ln 2` and
/// `|r| ≤ ½ ln 2 + ε`, ln 2 split in two (Cody & Waite) so `k ln 2` is exact;
/// `e^r` by its Taylor series to degree 13 in Horner form (the first omitted
/// term is below `0.35¹⁴ / 14! ≈ 4 · 10⁻¹⁸`, a thirtieth of an ulp); then
/// `2^k` applied as two exact powers of two, so results down to the
/// subnormal range round once, and below `−746` the result is 0, as
/// `f64::exp` gives. Within 2 ulp of the correctly rounded value (tested);
/// `exp_nonpositive(0.0)` is exactly 1.
#[inline(always)]
pub fn exp_nonpositive(x: f64) -> f64 {
    const LOG2E: f64 = std::f64::consts::LOG2_E;
    // 1.5 · 2⁵²: adding it rounds to an integer held in the low mantissa bits.
    const SHIFT: f64 = 6_755_399_441_055_744.0;
    const C: [f64; 14] = [
        1.0,
        1.0,
        1.0 / 2.0,
        1.0 / 6.0,
        1.0 / 24.0,
        1.0 / 120.0,
        1.0 / 720.0,
        1.0 / 5_040.0,
        1.0 / 40_320.0,
        1.0 / 362_880.0,
        1.0 / 3_628_800.0,
        1.0 / 39_916_800.0,
        1.0 / 479_001_600.0,
        1.0 / 6_227_020_800.0,
    ];
    let x = if x < -746.0 { -746.0 } else { x };
    let t = x * LOG2E + SHIFT;
    let kf = t - SHIFT;
    let r = (x - kf * LN2_HI) - kf * LN2_LO;
    let mut p = C[13];
    for c in C[..13].iter().rev() {
        p = p * r + c;
    }
    // −k as an integer (k ≤ 0 here), halved so each power of two is normal.
    let nk = SHIFT.to_bits().wrapping_sub(t.to_bits());
    let h = nk >> 1;
    let s1 = f64::from_bits((1023u64.wrapping_sub(h)) << 52);
    let s2 = f64::from_bits((1023u64.wrapping_sub(nk - h)) << 52);
    p * s1 * s2
}

/// `ln x` for `1 ≤ x < 2¹⁰²⁴` (the sum of a row's exponentials, whose
/// largest term is exactly 1), written so that a loop over it vectorises and
/// gives the same bits on every machine (the system's `ln` picks a fused
/// multiply-add version at run time where the processor has one). The
/// method of fdlibm's `log`: `x = 2^k (1 + f)` with `1 + f` in `[√½, √2)`;
/// `s = f / (2 + f)`, `ln(1 + f) = 2 atanh s = f − (f²/2 − s (f²/2 + R))`
/// with `R = Σ 2 s²ʲ/(2j + 1)` for `j = 1 … 10` (`|s| ≤ 0.172`: the first
/// omitted term is below `2 · 0.172²²/23 ≈ 1.4 · 10⁻¹⁸` of `f`); `k ln 2`
/// with ln 2 split in two so `k · LN2_HI` is exact. Within 2 ulp of the
/// correctly rounded value (tested); `ln_at_least_one(1.0)` is exactly 0.
#[inline(always)]
pub fn ln_at_least_one(x: f64) -> f64 {
    // 2 / (2j + 1) for j = 10 down to 1.
    const C: [f64; 10] = [
        2.0 / 21.0,
        2.0 / 19.0,
        2.0 / 17.0,
        2.0 / 15.0,
        2.0 / 13.0,
        2.0 / 11.0,
        2.0 / 9.0,
        2.0 / 7.0,
        2.0 / 5.0,
        2.0 / 3.0,
    ];
    let bits = x.to_bits();
    let m = f64::from_bits((bits & ((1u64 << 52) - 1)) | (1023u64 << 52));
    let big = m > std::f64::consts::SQRT_2;
    let m = if big { m * 0.5 } else { m };
    let k = ((bits >> 52) as i64 - 1023 + i64::from(big)) as f64;
    let f = m - 1.0;
    let s = f / (2.0 + f);
    let z = s * s;
    let mut r = C[0];
    for c in &C[1..] {
        r = r * z + c;
    }
    let r = r * z;
    let hfsq = 0.5 * f * f;
    k * LN2_HI - ((hfsq - (s * (hfsq + r) + k * LN2_LO)) - f)
}

/// Sum of eight partial sums, pairwise.
#[inline(always)]
fn fold(a: [f64; LANES]) -> f64 {
    ((a[0] + a[1]) + (a[2] + a[3])) + ((a[4] + a[5]) + (a[6] + a[7]))
}

/// `Σ r` over a tile.
#[inline(always)]
fn tile_sum(r: &[f64; TILE]) -> f64 {
    let mut a = [0.0; LANES];
    for rc in r.chunks_exact(LANES) {
        for l in 0..LANES {
            a[l] += rc[l];
        }
    }
    fold(a)
}

/// `Σ r x` and `Σ r x²` over a tile, each in [`LANES`] interleaved partial
/// sums. Two passes over the tile (the product `r x` computed again in the
/// second, the same value) give the compiler two plain vector reductions;
/// one pass interleaving both spilled its sixteen accumulators.
#[inline(always)]
fn tile_sums2(r: &[f64; TILE], x: &[f64; TILE]) -> (f64, f64) {
    let mut a = [0.0; LANES];
    for (rc, xc) in r.chunks_exact(LANES).zip(x.chunks_exact(LANES)) {
        for l in 0..LANES {
            a[l] += rc[l] * xc[l];
        }
    }
    let mut b = [0.0; LANES];
    for (rc, xc) in r.chunks_exact(LANES).zip(x.chunks_exact(LANES)) {
        for l in 0..LANES {
            b[l] += rc[l] * xc[l] * xc[l];
        }
    }
    (fold(a), fold(b))
}

#[inline(always)]
fn tile(v: &[f64], i: usize) -> &[f64; TILE] {
    v[i * TILE..(i + 1) * TILE].try_into().expect("tile")
}

#[inline(always)]
fn tile_mut(v: &mut [f64], i: usize) -> &mut [f64; TILE] {
    (&mut v[i * TILE..(i + 1) * TILE]).try_into().expect("tile")
}

crate::simd::kernel! {
/// One fused E + M-statistics pass over a block of [`Tiled`] data holding
/// `rows` real rows, one tile at a time. Per row the arithmetic is the
/// textbook one in a fixed order (quadratic forms, the largest log-density,
/// exponentials of the differences, their sum, the responsibilities); the
/// quadratic forms of [`LANES`] rows at a time stay in registers over the
/// dimensions; the statistics of a tile are summed in [`LANES`] interleaved
/// partial sums, then added to the block's in tile order. Padding rows are
/// zeros with responsibility zero, so they add nothing.
///
/// On an x86-64 processor with AVX2 the same code runs compiled for it
/// ([`crate::simd`]): wider vectors over the same lanes, the same
/// operations in the same order (no fused multiply-add), so the same bits.
fn block_stats(block: &[f64], rows: usize, mix: &Mixture, norm: &[f64], prec: &[f64]) -> Stats {
    let (k, m) = (mix.k(), mix.m);
    let mut st = Stats::new(k, m);
    let mut lp = vec![0.0; k * TILE];
    for (t, xs) in block.chunks_exact(m * TILE).enumerate() {
        if let Some(ahead) = block.get((t + 1) * m * TILE..(t + 2) * m * TILE) {
            crate::simd::prefetch(ahead);
        }
        let rows = rows.saturating_sub(t * TILE).min(TILE);
        let mut best = [f64::NEG_INFINITY; TILE];
        for c in 0..k {
            let (u, p) = (&mix.means[c * m..(c + 1) * m], &prec[c * m..(c + 1) * m]);
            let l = tile_mut(&mut lp, c);
            for i0 in (0..TILE).step_by(LANES) {
                let mut q = [0.0; LANES];
                for j in 0..m {
                    let x = &xs[j * TILE + i0..j * TILE + i0 + LANES];
                    for lane in 0..LANES {
                        let e = x[lane] - u[j];
                        q[lane] += e * e * p[j];
                    }
                }
                for lane in 0..LANES {
                    let v = norm[c] - 0.5 * q[lane];
                    l[i0 + lane] = v;
                    best[i0 + lane] = best[i0 + lane].max(v);
                }
            }
        }
        let mut sum = [0.0; TILE];
        for c in 0..k {
            let l = tile_mut(&mut lp, c);
            for i in 0..TILE {
                l[i] = exp_nonpositive(l[i] - best[i]);
                sum[i] += l[i];
            }
        }
        let mut ln_sum = [0.0; TILE];
        for i in 0..TILE {
            ln_sum[i] = ln_at_least_one(sum[i]);
        }
        for i in 0..rows {
            st.ll += best[i] + ln_sum[i];
        }
        let mut inv = [0.0; TILE];
        for i in 0..TILE {
            inv[i] = 1.0 / sum[i];
        }
        for c in 0..k {
            let r = tile_mut(&mut lp, c);
            for i in 0..TILE {
                r[i] *= inv[i];
            }
            r[rows..].fill(0.0);
            let r = tile(&lp, c);
            st.nk[c] += tile_sum(r);
            for j in 0..m {
                let (a, b) = tile_sums2(r, tile(xs, j));
                st.sx[c * m + j] += a;
                st.sxx[c * m + j] += b;
            }
        }
    }
    st
}
}

fn pass(data: &Tiled, mix: &Mixture, threads: usize) -> Stats {
    assert_eq!(data.m, mix.m, "data and mixture dimensions");
    let (norm, prec) = mix.constants();
    let parts = per_block(&data.data, BLOCK * data.m, threads, |b, block| {
        let rows = data.n.saturating_sub(b * BLOCK).min(BLOCK);
        block_stats(block, rows, mix, &norm, &prec)
    });
    let mut total = Stats::new(mix.k(), mix.m);
    for p in &parts {
        total.add(p);
    }
    total
}

/// The M step from accumulated statistics.
fn m_step(st: &Stats, m: usize, reg_covar: f64, floor: &[f64]) -> Mixture {
    let k = st.nk.len();
    let nk: Vec<f64> = st.nk.iter().map(|v| v + 10.0 * f64::EPSILON).collect();
    let mut means = vec![0.0; k * m];
    let mut variances = vec![0.0; k * m];
    for c in 0..k {
        for j in 0..m {
            let i = c * m + j;
            let mu = st.sx[i] / nk[c];
            means[i] = mu;
            let mut v = st.sxx[i] / nk[c] - mu * mu + reg_covar;
            if let Some(f) = floor.get(j) {
                v = v.max(*f);
            }
            variances[i] = v;
        }
    }
    let total: f64 = nk.iter().sum();
    Mixture {
        m,
        weights: nk.iter().map(|v| v / total).collect(),
        means,
        variances,
    }
}

/// Mean log-likelihood per row of `data` (row-major, `mix.m` columns).
pub fn mean_log_likelihood(data: &[f64], mix: &Mixture, threads: usize) -> f64 {
    mean_log_likelihood_tiled(&Tiled::copy_rows(data, mix.m), mix, threads)
}

/// [`mean_log_likelihood`] of [`Tiled`] rows.
pub fn mean_log_likelihood_tiled(data: &Tiled, mix: &Mixture, threads: usize) -> f64 {
    if data.n == 0 {
        return f64::NAN;
    }
    pass(data, mix, threads).ll / data.n as f64
}

/// Bayesian information criterion as scikit-learn computes it:
/// `−2 n · mean_ll + parameters · ln n`.
pub fn bic(n: usize, mean_ll: f64, parameters: usize) -> f64 {
    let n = n as f64;
    -2.0 * mean_ll * n + parameters as f64 * n.ln()
}

/// Runs EM from `init` on row-major `data` (`init.m` columns). The hook is
/// called after every iteration with the iteration number and its mean
/// log-likelihood.
pub fn em_from(data: &[f64], init: Mixture, opts: &EmOptions) -> EmResult {
    let m = init.m;
    em_with_hook(&Tiled::copy_rows(data, m), init, opts, &mut |_, _| {})
}

/// [`em_from`] on [`Tiled`] rows.
pub fn em_tiled(data: &Tiled, init: Mixture, opts: &EmOptions) -> EmResult {
    em_with_hook(data, init, opts, &mut |_, _| {})
}

/// [`em_tiled`] with a per-iteration hook (for progress display).
pub fn em_with_hook(
    data: &Tiled,
    init: Mixture,
    opts: &EmOptions,
    hook: &mut dyn FnMut(usize, f64),
) -> EmResult {
    let m = init.m;
    let n = data.n.max(1) as f64;
    let mut mix = init;
    let mut lower = f64::NEG_INFINITY;
    let mut history = Vec::new();
    let mut converged = false;
    let mut iterations = 0;
    for it in 1..=opts.max_iter.max(1) {
        iterations = it;
        let prev = lower;
        let st = pass(data, &mix, opts.threads);
        mix = m_step(&st, m, opts.reg_covar, &opts.floor);
        lower = st.ll / n;
        history.push(lower);
        hook(it, lower);
        if (lower - prev).abs() < opts.tol {
            converged = true;
            break;
        }
    }
    EmResult {
        mixture: mix,
        lower_bound: lower,
        iterations,
        converged,
        history,
    }
}

/// Settings of a full fit.
#[derive(Debug, Clone, PartialEq)]
pub struct FitOptions {
    /// Mixture components.
    pub k: usize,
    /// EM runs from different seeds; the best lower bound wins.
    pub restarts: usize,
    /// Seed of the first run (run `r` uses a stream derived from it).
    pub seed: u64,
    /// EM settings.
    pub em: EmOptions,
}

/// One EM run of a fit.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct RunInfo {
    /// Final lower bound.
    pub lower_bound: f64,
    /// Iterations.
    pub iterations: usize,
    /// Converged within `max_iter`.
    pub converged: bool,
}

/// The outcome of [`fit`].
#[derive(Debug, Clone, PartialEq)]
pub struct FitResult {
    /// The winning run, components sorted by descending weight.
    pub best: EmResult,
    /// Every run, in order.
    pub runs: Vec<RunInfo>,
    /// Mean log-likelihood of the final parameters.
    pub mean_ll: f64,
    /// BIC of the final parameters.
    pub bic: f64,
}

/// Per-dimension variances (ddof = 0) of row-major data.
pub fn column_variances(data: &[f64], m: usize) -> Vec<f64> {
    let n = (data.len() / m.max(1)).max(1) as f64;
    let mut mean = vec![0.0; m];
    for row in data.chunks_exact(m) {
        for (a, x) in mean.iter_mut().zip(row) {
            *a += x;
        }
    }
    mean.iter_mut().for_each(|a| *a /= n);
    let mut var = vec![0.0; m];
    for row in data.chunks_exact(m) {
        for ((v, x), mu) in var.iter_mut().zip(row).zip(&mean) {
            *v += (x - mu) * (x - mu);
        }
    }
    var.iter_mut().for_each(|v| *v /= n);
    var
}

/// Fits a `k`-component mixture with `restarts` initialisations.
pub fn fit(
    data: &[f64],
    m: usize,
    opts: &FitOptions,
    hook: &mut dyn FnMut(usize, usize, f64),
) -> FitResult {
    fit_tiled(&Tiled::copy_rows(data, m), opts, hook)
}

/// [`fit`] on [`Tiled`] rows.
pub fn fit_tiled(
    data: &Tiled,
    opts: &FitOptions,
    hook: &mut dyn FnMut(usize, usize, f64),
) -> FitResult {
    let n = data.n;
    let mut best: Option<EmResult> = None;
    let mut runs = Vec::new();
    // Each restart starts from its own random stream, so the starts can be
    // drawn side by side (they run on one thread each) before EM, which
    // uses every thread, runs them one after another.
    let restarts = opts.restarts.max(1);
    let inits = per_item(restarts, opts.em.threads, |r| {
        initialise_tiled(data, opts.k, &mut Rng::new(opts.seed, r as u64), &opts.em)
    });
    for (r, init) in inits.into_iter().enumerate() {
        let res = em_with_hook(data, init, &opts.em, &mut |it, ll| hook(r, it, ll));
        runs.push(RunInfo {
            lower_bound: res.lower_bound,
            iterations: res.iterations,
            converged: res.converged,
        });
        // Strictly greater: on a tie the earlier run wins.
        if best
            .as_ref()
            .is_none_or(|b| res.lower_bound > b.lower_bound)
        {
            best = Some(res);
        }
    }
    let mut best = best.expect("at least one run");
    sort_by_weight(&mut best.mixture);
    let mean_ll = mean_log_likelihood_tiled(data, &best.mixture, opts.em.threads);
    let bic = bic(n, mean_ll, best.mixture.parameters());
    FitResult {
        best,
        runs,
        mean_ll,
        bic,
    }
}

fn sort_by_weight(mix: &mut Mixture) {
    let m = mix.m;
    let mut order: Vec<usize> = (0..mix.k()).collect();
    order.sort_by(|&a, &b| mix.weights[b].total_cmp(&mix.weights[a]));
    let pick = |v: &[f64], width: usize| -> Vec<f64> {
        order
            .iter()
            .flat_map(|&c| v[c * width..(c + 1) * width].iter().copied())
            .collect()
    };
    *mix = Mixture {
        m,
        weights: pick(&mix.weights, 1),
        means: pick(&mix.means, m),
        variances: pick(&mix.variances, m),
    };
}

fn sq_dist(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// k-means++ seeding, Lloyd iterations and a hard-assignment M step on a
/// subsample.
pub fn initialise(data: &[f64], m: usize, k: usize, rng: &mut Rng, em: &EmOptions) -> Mixture {
    initialise_with(
        data.len() / m,
        m,
        k,
        rng,
        em,
        |i, out| out.copy_from_slice(&data[i * m..(i + 1) * m]),
        |i| crate::simd::prefetch(&data[i * m..(i + 1) * m]),
    )
}

/// [`initialise`] on [`Tiled`] rows (the same subsample and result).
pub fn initialise_tiled(data: &Tiled, k: usize, rng: &mut Rng, em: &EmOptions) -> Mixture {
    initialise_with(
        data.n,
        data.m,
        k,
        rng,
        em,
        |i, out| data.row_into(i, out),
        |i| data.prefetch_row(i),
    )
}

fn initialise_with(
    n: usize,
    m: usize,
    k: usize,
    rng: &mut Rng,
    em: &EmOptions,
    row: impl Fn(usize, &mut [f64]),
    touch: impl Fn(usize),
) -> Mixture {
    // Stratified random subsample: one row from each of `s` equal strata,
    // the rows drawn first so each can be asked into the cache (`touch`) a
    // few rows before it is copied.
    const AHEAD: usize = 16;
    let s = n.min(INIT_SAMPLE);
    let picks: Vec<usize> = (0..s)
        .map(|i| {
            let lo = i * n / s;
            let hi = ((i + 1) * n / s).max(lo + 1);
            lo + (rng.below((hi - lo) as u64) as usize)
        })
        .collect();
    let mut sample = vec![0.0; s * m];
    for (i, out) in sample.chunks_exact_mut(m).enumerate() {
        if let Some(&ahead) = picks.get(i + AHEAD) {
            touch(ahead);
        }
        row(picks[i], out);
    }
    let centres = kmeans_pp(&sample, m, k, rng);
    let labels = lloyd(&sample, m, centres, LLOYD_ITER);
    let mut st = Stats::new(k, m);
    for (row, &c) in sample.chunks_exact(m).zip(&labels) {
        st.nk[c] += 1.0;
        for j in 0..m {
            st.sx[c * m + j] += row[j];
            st.sxx[c * m + j] += row[j] * row[j];
        }
    }
    m_step(&st, m, em.reg_covar, &em.floor)
}

/// Greedy k-means++ seeding; returns `k × m` centres.
pub fn kmeans_pp(data: &[f64], m: usize, k: usize, rng: &mut Rng) -> Vec<f64> {
    let n = data.len() / m;
    let mut centres = Vec::with_capacity(k * m);
    let first = rng.below(n as u64) as usize;
    centres.extend_from_slice(&data[first * m..(first + 1) * m]);
    let mut closest: Vec<f64> = data
        .chunks_exact(m)
        .map(|r| sq_dist(r, &centres[..m]))
        .collect();
    let trials = 2 + (k as f64).ln().floor() as usize;
    for _ in 1..k {
        let pot: f64 = closest.iter().sum();
        let mut best: Option<(f64, usize, Vec<f64>)> = None;
        for _ in 0..trials {
            let target = rng.uniform() * pot;
            let mut acc = 0.0;
            let mut cand = n - 1;
            for (i, d) in closest.iter().enumerate() {
                acc += d;
                if acc > target {
                    cand = i;
                    break;
                }
            }
            let c = &data[cand * m..(cand + 1) * m];
            let dist: Vec<f64> = data
                .chunks_exact(m)
                .zip(&closest)
                .map(|(r, old)| sq_dist(r, c).min(*old))
                .collect();
            let p: f64 = dist.iter().sum();
            if best.as_ref().is_none_or(|b| p < b.0) {
                best = Some((p, cand, dist));
            }
        }
        let (_, cand, dist) = best.expect("at least one trial");
        centres.extend_from_slice(&data[cand * m..(cand + 1) * m]);
        closest = dist;
    }
    centres
}

/// Lloyd iterations from `centres`; returns the final labels. An empty
/// cluster keeps its centre.
pub fn lloyd(data: &[f64], m: usize, mut centres: Vec<f64>, iters: usize) -> Vec<usize> {
    let k = centres.len() / m;
    let n = data.len() / m;
    let mut labels = vec![usize::MAX; n];
    for _ in 0..iters {
        let mut changed = false;
        for (row, l) in data.chunks_exact(m).zip(labels.iter_mut()) {
            let mut best = (f64::INFINITY, 0);
            for c in 0..k {
                let d = sq_dist(row, &centres[c * m..(c + 1) * m]);
                if d < best.0 {
                    best = (d, c);
                }
            }
            if *l != best.1 {
                *l = best.1;
                changed = true;
            }
        }
        if !changed {
            break;
        }
        let mut sums = vec![0.0; k * m];
        let mut counts = vec![0usize; k];
        for (row, &l) in data.chunks_exact(m).zip(&labels) {
            counts[l] += 1;
            for j in 0..m {
                sums[l * m + j] += row[j];
            }
        }
        for c in 0..k {
            if counts[c] > 0 {
                for j in 0..m {
                    centres[c * m + j] = sums[c * m + j] / counts[c] as f64;
                }
            }
        }
    }
    labels
}

#[cfg(test)]
mod tests {
    use super::*;

    fn two_blobs(n: usize, seed: u64) -> Vec<f64> {
        let mut rng = Rng::new(seed, 0);
        let mut v = Vec::new();
        for i in 0..n {
            let (cx, cy) = if i % 3 == 0 { (4.0, -1.0) } else { (-2.0, 0.5) };
            v.push(cx + rng.normal());
            v.push(cy + 0.5 * rng.normal());
        }
        v
    }

    /// Distance in units in the last place between two non-negative floats.
    fn ulps(a: f64, b: f64) -> u64 {
        a.to_bits().abs_diff(b.to_bits())
    }

    #[test]
    fn exp_nonpositive_is_within_two_ulp() {
        assert_eq!(exp_nonpositive(0.0), 1.0);
        assert_eq!(exp_nonpositive(-0.0), 1.0);
        for x in [-746.0, -1e4, -1e300, f64::NEG_INFINITY] {
            assert_eq!(exp_nonpositive(x), 0.0, "{x}");
        }
        assert!(exp_nonpositive(f64::NAN).is_nan());
        // Uniform over the whole range, over the range of typical
        // log-density gaps, and near the subnormal and underflow edges;
        // against the system's exp (itself within about half an ulp: from
        // memory, not checked here).
        let mut rng = Rng::new(9, 0);
        let mut worst = (0, 0.0);
        for i in 0..600_000 {
            let u = rng.uniform();
            let x = match i % 4 {
                0 => -746.0 * u,
                1 => -u,
                2 => -40.0 * u,
                _ => -708.0 - 38.0 * u,
            };
            let d = ulps(exp_nonpositive(x), x.exp());
            if d > worst.0 {
                worst = (d, x);
            }
        }
        assert!(worst.0 <= 2, "{} ulp at {}", worst.0, worst.1);
    }

    #[test]
    fn ln_at_least_one_is_within_two_ulp() {
        assert_eq!(ln_at_least_one(1.0), 0.0);
        assert_eq!(ln_at_least_one(2.0), std::f64::consts::LN_2);
        // Sums of up to 8 exponentials (a quarter of the values), just above 1,
        // around the reduction's edge at √2, and far out; against the
        // system's ln (glibc's, documented within about half an ulp: from
        // memory, not checked here).
        let mut rng = Rng::new(11, 0);
        let mut worst = (0, 0.0);
        for i in 0..600_000 {
            let u = rng.uniform();
            let x = match i % 4 {
                0 => 1.0 + 7.0 * u,
                1 => 1.0 + 1e-6 * u,
                2 => std::f64::consts::SQRT_2 * (1.0 + 1e-9 * (u - 0.5)),
                _ => (700.0 * u).exp(),
            };
            let d = ulps(ln_at_least_one(x), x.ln());
            if d > worst.0 {
                worst = (d, x);
            }
        }
        assert!(worst.0 <= 2, "{} ulp at {}", worst.0, worst.1);
    }

    /// The statistics of one block the plain way: row by row, the system's
    /// exp, sums in row order.
    fn block_stats_plain(block: &[f64], mix: &Mixture) -> Stats {
        let (k, m) = (mix.k(), mix.m);
        let (norm, prec) = mix.constants();
        let mut st = Stats::new(k, m);
        for row in block.chunks_exact(m) {
            let lp: Vec<f64> = (0..k)
                .map(|c| {
                    let q: f64 = (0..m)
                        .map(|j| (row[j] - mix.means[c * m + j]).powi(2) * prec[c * m + j])
                        .sum();
                    norm[c] - 0.5 * q
                })
                .collect();
            let best = lp.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
            let e: Vec<f64> = lp.iter().map(|l| (l - best).exp()).collect();
            let sum: f64 = e.iter().sum();
            st.ll += best + sum.ln();
            for c in 0..k {
                let r = e[c] / sum;
                st.nk[c] += r;
                for j in 0..m {
                    st.sx[c * m + j] += r * row[j];
                    st.sxx[c * m + j] += r * row[j] * row[j];
                }
            }
        }
        st
    }

    #[test]
    fn tiled_statistics_match_the_plain_computation() {
        // Three dimensions, three components, a partial last tile; one
        // component far from every row (responsibilities about 1e-90 to
        // 1e-110), where only relative accuracy keeps its mean right.
        let mut rng = Rng::new(4, 0);
        let (m, n) = (3, 5 * TILE + 37);
        let data: Vec<f64> = (0..n * m)
            .map(|i| rng.normal() + if (i / m) % 2 == 0 { 3.0 } else { -1.0 })
            .collect();
        let mix = Mixture {
            m,
            weights: vec![0.5, 0.3, 0.2],
            means: vec![3.0, 3.0, 3.0, -1.0, -1.0, -1.0, 30.0, -20.0, 25.0],
            variances: vec![1.0, 1.5, 0.8, 1.2, 1.0, 0.9, 4.0, 4.0, 4.0],
        };
        let (norm, prec) = mix.constants();
        let tiled = Tiled::copy_rows(&data, m);
        let got = block_stats(&tiled.data, n, &mix, &norm, &prec);
        let want = block_stats_plain(&data, &mix);
        // Summation orders differ and exp differs by at most 2 ulp: every
        // sum of n non-negative terms agrees to about n ε relative; sums of
        // signed terms to n ε of the sum of magnitudes (Σ r|x| ≤ Σ r x² + Σ r).
        let close = |a: f64, b: f64, scale: f64| (a - b).abs() <= 1e-12 * scale;
        assert!(
            close(got.ll, want.ll, want.ll.abs()),
            "{} {}",
            got.ll,
            want.ll
        );
        for c in 0..3 {
            assert!(close(got.nk[c], want.nk[c], want.nk[c]), "nk {c}");
            assert!(want.nk[c] > 0.0);
            for j in 0..m {
                let i = c * m + j;
                let mag = want.sxx[i] + want.nk[c];
                assert!(close(got.sx[i], want.sx[i], mag), "sx {c} {j}");
                assert!(close(got.sxx[i], want.sxx[i], want.sxx[i]), "sxx {c} {j}");
            }
        }
    }

    #[test]
    fn tiled_rows_round_trip_with_zero_padding() {
        for (m, n) in [
            (3, 0),
            (3, 1),
            (3, TILE - 1),
            (3, TILE),
            (2, 2 * TILE + 5),
            (1, 7),
        ] {
            let rows: Vec<f64> = (0..n * m).map(|i| i as f64 + 0.5).collect();
            let t = Tiled::copy_rows(&rows, m);
            assert_eq!((t.rows(), t.dims()), (n, m));
            assert_eq!(t.data.len(), n.div_ceil(TILE) * TILE * m);
            let mut out = vec![0.0; m];
            for i in 0..n {
                t.row_into(i, &mut out);
                assert_eq!(out, rows[i * m..(i + 1) * m], "row {i} of {n} x {m}");
            }
            // Every stored value is a row's value or a zero of padding.
            let real = t.data.iter().filter(|x| **x != 0.0).count();
            assert_eq!(real, n * m);
        }
    }

    #[test]
    fn em_is_monotone() {
        let data = two_blobs(3000, 7);
        let init = Mixture {
            m: 2,
            weights: vec![0.5, 0.5],
            means: vec![0.0, 0.0, 1.0, 1.0],
            variances: vec![1.0, 1.0, 1.0, 1.0],
        };
        let opts = EmOptions {
            tol: 1e-12,
            max_iter: 200,
            reg_covar: 0.0,
            floor: vec![1e-3, 1e-3],
            threads: 2,
        };
        let res = em_from(&data, init, &opts);
        for w in res.history.windows(2) {
            assert!(w[1] >= w[0] - 1e-12, "{:?}", res.history);
        }
        let mut w = res.mixture.weights.clone();
        w.sort_by(f64::total_cmp);
        // One row in three is drawn from the smaller blob, so its weight is
        // 1/3; the 0.03 tolerance is common practice, no source.
        assert!((w[0] - 1.0 / 3.0).abs() < 0.03, "{w:?}");
    }

    #[test]
    fn threads_do_not_change_results() {
        let data = two_blobs(3 * BLOCK + 17, 3);
        let opts = FitOptions {
            k: 3,
            restarts: 2,
            seed: 1,
            em: EmOptions::default(),
        };
        let a = fit(&data, 2, &opts, &mut |_, _, _| {});
        let one = FitOptions {
            em: EmOptions {
                threads: 1,
                ..EmOptions::default()
            },
            ..opts
        };
        let b = fit(&data, 2, &one, &mut |_, _, _| {});
        assert_eq!(a, b);
    }

    #[test]
    fn floor_prevents_collapse_on_duplicates() {
        // 500 copies of one point plus a spread cloud: without a floor one
        // component sits on the duplicates with variance reg_covar.
        let mut rng = Rng::new(5, 0);
        let mut data = Vec::new();
        for _ in 0..500 {
            data.extend_from_slice(&[1.0, 1.0]);
        }
        for _ in 0..500 {
            data.push(rng.normal() * 2.0);
            data.push(rng.normal() * 2.0);
        }
        let init = Mixture {
            m: 2,
            weights: vec![0.5, 0.5],
            means: vec![1.0, 1.0, 0.0, 0.0],
            variances: vec![1.0, 1.0, 4.0, 4.0],
        };
        let bare = EmOptions {
            floor: Vec::new(),
            ..EmOptions::default()
        };
        let collapsed = em_from(&data, init.clone(), &bare);
        let min_bare = collapsed
            .mixture
            .variances
            .iter()
            .cloned()
            .fold(f64::MAX, f64::min);
        assert!(min_bare < 1e-5, "{min_bare}");
        let var = column_variances(&data, 2);
        let floor: Vec<f64> = var.iter().map(|v| 1e-3 * v).collect();
        let floored = em_from(
            &data,
            init,
            &EmOptions {
                floor: floor.clone(),
                ..EmOptions::default()
            },
        );
        for (i, v) in floored.mixture.variances.iter().enumerate() {
            assert!(*v >= floor[i % 2], "{v} < {}", floor[i % 2]);
        }
        assert!(floored.lower_bound.is_finite());
    }
}
