//! Standardisation and principal component analysis, in f64.
//!
//! * Mean and covariance come from [`Moments`]: each chunk of rows is reduced
//!   two-pass (mean, then centred cross-products) and chunks are merged with
//!   the pairwise update of Chan, Golub & LeVeque (1979), so one pass over the
//!   logs gives both, without the cancellation of the sum-of-squares formula.
//! * Features are standardised with the ddof = 0 standard deviation (as
//!   scikit-learn's `StandardScaler`); PCA is the eigendecomposition of the
//!   correlation matrix.
//! * Eigenvalues are on the ddof = 1 scale of the standardised data (as
//!   scikit-learn's `PCA.explained_variance_` on standardised input): the
//!   correlation-matrix eigenvalues times `n / (n − 1)`.
//! * The eigendecomposition is cyclic Jacobi ([`symmetric_eigen`]), sorted by
//!   descending eigenvalue (stable for ties).
//! * **Sign convention**: each component (loading column) is flipped so that
//!   its entry of largest magnitude is positive (the first such entry on a
//!   tie). Loadings are thus reproducible across runs and machines.

use std::fmt;

/// Count, mean and centred cross-product matrix of a set of rows.
#[derive(Debug, Clone, PartialEq)]
pub struct Moments {
    /// Rows seen.
    pub n: u64,
    /// Per-feature mean.
    pub mean: Vec<f64>,
    /// `Σ (x − mean)(x − mean)ᵀ`, `d × d` row-major (upper triangle filled;
    /// call [`Moments::symmetric`] for the full matrix).
    pub comoment: Vec<f64>,
}

impl Moments {
    /// No rows, `d` features.
    pub fn new(d: usize) -> Self {
        Moments {
            n: 0,
            mean: vec![0.0; d],
            comoment: vec![0.0; d * d],
        }
    }

    /// Features.
    pub fn d(&self) -> usize {
        self.mean.len()
    }

    /// Moments of a block of row-major rows, two-pass within the block
    /// (compiled for AVX2 where the processor has it: same bits, see
    /// [`crate::simd`]).
    pub fn from_rows(rows: &[f64], d: usize) -> Self {
        moments_of_rows(rows, d)
    }
}

/// Rows of centred values a [`moments_of_rows`] tile runs over at a time
/// (32 features: 32 KiB, in the first- or second-level cache).
const MOMENT_ROWS: usize = 128;

crate::simd::kernel! {
/// Two-pass moments of a block: the mean, then the centred cross-products.
///
/// Each cross-product `M[i][j]` (`j ≥ i`) is the sum of `c_i c_j` over the
/// rows in row order, starting from zero. The sums are computed a tile of
/// 4 × 8 of them at a time, held in registers over up to [`MOMENT_ROWS`]
/// rows of centred values and stored back between those runs; the tiling
/// only changes which sums advance together, never the order of the terms
/// of any one sum, so every bit is the one of a row-by-row update.
fn moments_of_rows(rows: &[f64], d: usize) -> Moments {
    let mut m = Moments::new(d);
    if d == 0 || rows.is_empty() {
        return m;
    }
    let n = rows.len() / d;
    m.n = n as u64;
    for row in rows.chunks_exact(d) {
        for (a, x) in m.mean.iter_mut().zip(row) {
            *a += x;
        }
    }
    for a in m.mean.iter_mut() {
        *a /= n as f64;
    }
    let mut centred = vec![0.0; MOMENT_ROWS.min(n) * d];
    for block in rows[..n * d].chunks(MOMENT_ROWS * d) {
        let c = &mut centred[..block.len()];
        for (crow, row) in c.chunks_exact_mut(d).zip(block.chunks_exact(d)) {
            for ((ci, x), mu) in crow.iter_mut().zip(row).zip(&m.mean) {
                *ci = x - mu;
            }
        }
        cross_products(c, d, &mut m.comoment);
    }
    m
}
}

/// Adds `c_i c_j` of every row of `c` (centred, `d` per row) to the upper
/// triangle of `out`, each sum in row order; see [`moments_of_rows`].
#[inline(always)]
fn cross_products(c: &[f64], d: usize, out: &mut [f64]) {
    const TI: usize = 4;
    const TJ: usize = 8;
    for i0 in (0..d).step_by(TI) {
        let ie = (i0 + TI).min(d);
        for j0 in ((i0 / TJ) * TJ..d).step_by(TJ) {
            let je = (j0 + TJ).min(d);
            if ie - i0 == TI && je - j0 == TJ {
                let mut acc = [[0.0; TJ]; TI];
                for (a, acc_a) in acc.iter_mut().enumerate() {
                    acc_a.copy_from_slice(&out[(i0 + a) * d + j0..(i0 + a) * d + je]);
                }
                for crow in c.chunks_exact(d) {
                    let cj: [f64; TJ] = crow[j0..je].try_into().expect("TJ columns");
                    let ci: [f64; TI] = crow[i0..ie].try_into().expect("TI rows");
                    for a in 0..TI {
                        for b in 0..TJ {
                            acc[a][b] += ci[a] * cj[b];
                        }
                    }
                }
                // Only the upper triangle is kept: the sums left of the
                // diagonal were computed with the tile and are dropped.
                for (a, acc_a) in acc.iter().enumerate() {
                    let i = i0 + a;
                    for j in j0.max(i)..je {
                        out[i * d + j] = acc_a[j - j0];
                    }
                }
            } else {
                for crow in c.chunks_exact(d) {
                    for i in i0..ie {
                        let ci = crow[i];
                        for j in j0.max(i)..je {
                            out[i * d + j] += ci * crow[j];
                        }
                    }
                }
            }
        }
    }
}

impl Moments {
    /// Merges `other` into `self` (Chan, Golub & LeVeque 1979):
    /// `δ = mean_b − mean_a`, `mean = mean_a + δ n_b / n`,
    /// `M = M_a + M_b + δ δᵀ n_a n_b / n`.
    pub fn merge(&mut self, other: &Moments) {
        if other.n == 0 {
            return;
        }
        if self.n == 0 {
            *self = other.clone();
            return;
        }
        let d = self.d();
        let (na, nb) = (self.n as f64, other.n as f64);
        let n = na + nb;
        let delta: Vec<f64> = other
            .mean
            .iter()
            .zip(&self.mean)
            .map(|(b, a)| b - a)
            .collect();
        let f = na * nb / n;
        for i in 0..d {
            for j in i..d {
                let k = i * d + j;
                self.comoment[k] += other.comoment[k] + delta[i] * delta[j] * f;
            }
        }
        for (a, dl) in self.mean.iter_mut().zip(&delta) {
            *a += dl * nb / n;
        }
        self.n += other.n;
    }

    /// The full symmetric cross-product matrix.
    pub fn symmetric(&self) -> Vec<f64> {
        let d = self.d();
        let mut s = self.comoment.clone();
        for i in 0..d {
            for j in 0..i {
                s[i * d + j] = s[j * d + i];
            }
        }
        s
    }

    /// Covariance with the given delta degrees of freedom (full matrix).
    pub fn covariance(&self, ddof: u64) -> Vec<f64> {
        let div = (self.n.saturating_sub(ddof)).max(1) as f64;
        self.symmetric().into_iter().map(|v| v / div).collect()
    }
}

/// Why a PCA cannot be fitted.
#[derive(Debug, Clone, PartialEq)]
pub enum PcaError {
    /// Fewer than two rows.
    TooFewRows {
        /// Rows given.
        n: u64,
    },
    /// A feature does not vary.
    Constant {
        /// Feature index.
        feature: usize,
        /// Its value.
        value: f64,
    },
}

impl fmt::Display for PcaError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            PcaError::TooFewRows { n } => write!(f, "PCA needs at least 2 rows, got {n}"),
            PcaError::Constant { feature, value } => {
                write!(f, "feature {feature} is constant ({value})")
            }
        }
    }
}

impl std::error::Error for PcaError {}

/// A fitted PCA on standardised features (all `d` components kept here; the
/// model keeps the first `m`).
#[derive(Debug, Clone, PartialEq)]
pub struct Pca {
    /// Rows fitted.
    pub n: u64,
    /// Per-feature mean.
    pub mean: Vec<f64>,
    /// Per-feature scale: standard deviation with ddof = 0.
    pub scale: Vec<f64>,
    /// Eigenvalues, descending, ddof = 1 scale of the standardised data.
    pub eigenvalues: Vec<f64>,
    /// Loadings, `d × d` row-major: `loadings[i * d + j]` is feature `i` in
    /// component `j`.
    pub loadings: Vec<f64>,
    /// Explained variance ratio of each component.
    pub ratios: Vec<f64>,
}

/// How many components to keep.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Keep {
    /// Exactly this many.
    Count(usize),
    /// The fewest whose cumulative explained variance reaches this fraction.
    Variance(f64),
}

/// PCA of row-major `rows` (`d` features per row) in one call; the same
/// arithmetic as the streaming path with one chunk.
pub fn fit(rows: &[f64], d: usize) -> Result<Pca, PcaError> {
    Pca::from_moments(&Moments::from_rows(rows, d))
}

impl Pca {
    /// PCA from accumulated moments.
    pub fn from_moments(m: &Moments) -> Result<Pca, PcaError> {
        let d = m.d();
        if m.n < 2 {
            return Err(PcaError::TooFewRows { n: m.n });
        }
        let n = m.n as f64;
        let mut scale = vec![0.0; d];
        for i in 0..d {
            let var = m.comoment[i * d + i] / n;
            let mu = m.mean[i];
            // Constant up to rounding of the mean.
            if !(var > (1e-12 * mu.abs()).powi(2)) || var <= f64::MIN_POSITIVE {
                return Err(PcaError::Constant {
                    feature: i,
                    value: mu,
                });
            }
            scale[i] = var.sqrt();
        }
        // Correlation matrix from the cross-products.
        let full = m.symmetric();
        let mut corr = vec![0.0; d * d];
        for i in 0..d {
            for j in 0..d {
                corr[i * d + j] = full[i * d + j] / n / (scale[i] * scale[j]);
            }
        }
        let (values, vectors) = symmetric_eigen(&corr, d);
        let ddof1 = n / (n - 1.0);
        let eigenvalues: Vec<f64> = values.iter().map(|v| v * ddof1).collect();
        let total: f64 = eigenvalues.iter().map(|v| v.max(0.0)).sum();
        let ratios = eigenvalues.iter().map(|v| v.max(0.0) / total).collect();
        Ok(Pca {
            n: m.n,
            mean: m.mean.clone(),
            scale,
            eigenvalues,
            loadings: vectors,
            ratios,
        })
    }

    /// Features.
    pub fn d(&self) -> usize {
        self.mean.len()
    }

    /// Components kept under `keep` (at least 1, at most `d`).
    pub fn choose(&self, keep: Keep) -> usize {
        let d = self.d();
        match keep {
            Keep::Count(m) => m.clamp(1, d),
            Keep::Variance(f) => {
                let mut cum = 0.0;
                for (j, r) in self.ratios.iter().enumerate() {
                    cum += r;
                    if cum >= f - 1e-12 {
                        return j + 1;
                    }
                }
                d
            }
        }
    }

    /// θ1, θ2, θ3: sums of the first three powers of the eigenvalues past
    /// the first `m` (negative rounding residue counts as zero).
    pub fn theta(&self, m: usize) -> [f64; 3] {
        let mut t = [0.0; 3];
        for &l in &self.eigenvalues[m.min(self.d())..] {
            let l = l.max(0.0);
            t[0] += l;
            t[1] += l * l;
            t[2] += l * l * l;
        }
        t
    }

    /// The first `m` loading columns, `d × m` row-major.
    pub fn loadings_kept(&self, m: usize) -> Vec<f64> {
        let d = self.d();
        let mut out = Vec::with_capacity(d * m);
        for i in 0..d {
            out.extend_from_slice(&self.loadings[i * d..i * d + m]);
        }
        out
    }

    /// Projects every row of row-major `x` (`d` per row) onto the first `m`
    /// components into `out` (`m` per row), each score bit for bit the one
    /// of [`Pca::project`]: four rows and eight scores at a time are held in
    /// registers over the features, each score still summed in feature
    /// order from zero.
    #[inline(always)]
    pub fn project_rows(&self, x: &[f64], m: usize, out: &mut [f64]) {
        const R: usize = 4;
        const TJ: usize = 8;
        let d = self.d();
        if d == 0 || m == 0 {
            return;
        }
        let mut z = vec![0.0; R * d];
        for (xb, ob) in x.chunks(R * d).zip(out.chunks_mut(R * m)) {
            if xb.len() < R * d {
                for (row, t) in xb.chunks_exact(d).zip(ob.chunks_exact_mut(m)) {
                    self.project(row, m, t);
                }
                continue;
            }
            for (zr, xr) in z.chunks_exact_mut(d).zip(xb.chunks_exact(d)) {
                for (((zi, xi), mu), s) in zr.iter_mut().zip(xr).zip(&self.mean).zip(&self.scale) {
                    *zi = (xi - mu) / s;
                }
            }
            for j0 in (0..m).step_by(TJ) {
                let je = (j0 + TJ).min(m);
                if je - j0 == TJ {
                    let mut acc = [[0.0; TJ]; R];
                    for i in 0..d {
                        let p: &[f64; TJ] = self.loadings[i * d + j0..i * d + je]
                            .try_into()
                            .expect("TJ scores");
                        for (r, acc_r) in acc.iter_mut().enumerate() {
                            let zi = z[r * d + i];
                            for b in 0..TJ {
                                acc_r[b] += zi * p[b];
                            }
                        }
                    }
                    for (r, acc_r) in acc.iter().enumerate() {
                        ob[r * m + j0..r * m + je].copy_from_slice(acc_r);
                    }
                } else {
                    for r in 0..R {
                        for j in j0..je {
                            let mut t = 0.0;
                            for i in 0..d {
                                t += z[r * d + i] * self.loadings[i * d + j];
                            }
                            ob[r * m + j] = t;
                        }
                    }
                }
            }
        }
    }

    /// Projects one row onto the first `m` components: `t = Pᵀ (x − μ) / s`.
    #[inline(always)]
    pub fn project(&self, x: &[f64], m: usize, t: &mut [f64]) {
        let d = self.d();
        t[..m].iter_mut().for_each(|v| *v = 0.0);
        for (i, ((xi, mu), s)) in x.iter().zip(&self.mean).zip(&self.scale).enumerate() {
            let z = (xi - mu) / s;
            let row = &self.loadings[i * d..i * d + m];
            for (tj, p) in t[..m].iter_mut().zip(row) {
                *tj += z * p;
            }
        }
    }
}

/// Eigendecomposition of a symmetric `d × d` row-major matrix by cyclic
/// Jacobi rotations. Returns eigenvalues in descending order and the
/// eigenvectors as the columns of a `d × d` row-major matrix, each with its
/// largest-magnitude entry positive.
pub fn symmetric_eigen(a: &[f64], d: usize) -> (Vec<f64>, Vec<f64>) {
    let mut a = a.to_vec();
    let mut v = vec![0.0; d * d];
    for i in 0..d {
        v[i * d + i] = 1.0;
    }
    let scale: f64 = a.iter().map(|x| x * x).sum::<f64>().sqrt();
    for _sweep in 0..100 {
        let mut off = 0.0;
        for p in 0..d {
            for q in p + 1..d {
                off += a[p * d + q] * a[p * d + q];
            }
        }
        if off.sqrt() <= 1e-15 * scale || off == 0.0 {
            break;
        }
        for p in 0..d {
            for q in p + 1..d {
                let apq = a[p * d + q];
                if apq == 0.0 {
                    continue;
                }
                let theta = (a[q * d + q] - a[p * d + p]) / (2.0 * apq);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..d {
                    let akp = a[k * d + p];
                    let akq = a[k * d + q];
                    a[k * d + p] = c * akp - s * akq;
                    a[k * d + q] = s * akp + c * akq;
                }
                for k in 0..d {
                    let apk = a[p * d + k];
                    let aqk = a[q * d + k];
                    a[p * d + k] = c * apk - s * aqk;
                    a[q * d + k] = s * apk + c * aqk;
                }
                for k in 0..d {
                    let vkp = v[k * d + p];
                    let vkq = v[k * d + q];
                    v[k * d + p] = c * vkp - s * vkq;
                    v[k * d + q] = s * vkp + c * vkq;
                }
            }
        }
    }
    let mut order: Vec<usize> = (0..d).collect();
    order.sort_by(|&x, &y| a[y * d + y].total_cmp(&a[x * d + x]));
    let values: Vec<f64> = order.iter().map(|&j| a[j * d + j]).collect();
    let mut vectors = vec![0.0; d * d];
    for (jn, &jo) in order.iter().enumerate() {
        let mut big = 0usize;
        for i in 0..d {
            if v[i * d + jo].abs() > v[big * d + jo].abs() {
                big = i;
            }
        }
        let sign = if v[big * d + jo] < 0.0 { -1.0 } else { 1.0 };
        for i in 0..d {
            vectors[i * d + jn] = sign * v[i * d + jo];
        }
    }
    (values, vectors)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn eigen_of_known_matrix() {
        // [[2,1,0],[1,2,0],[0,0,5]]: eigenvalues 5, 3, 1 exactly.
        let a = [2.0, 1.0, 0.0, 1.0, 2.0, 0.0, 0.0, 0.0, 5.0];
        let (vals, vecs) = symmetric_eigen(&a, 3);
        for (got, want) in vals.iter().zip([5.0, 3.0, 1.0]) {
            assert!((got - want).abs() < 1e-13, "{vals:?}");
        }
        // Component 0 is e3; component 1 is (1,1,0)/√2; component 2 is
        // ±(1,−1,0)/√2 (its two entries tie in magnitude, so rounding picks
        // which one is made positive).
        let h = 0.5f64.sqrt();
        let want = [0.0, h, h, 0.0, h, -h, 1.0, 0.0, 0.0];
        let sign2 = vecs[2].signum();
        for (i, (g, w)) in vecs.iter().zip(want).enumerate() {
            let w = if i % 3 == 2 { w * sign2 } else { w };
            assert!((g - w).abs() < 1e-13, "{vecs:?}");
        }
    }

    /// The row-by-row update the tiled kernel must reproduce bit for bit.
    fn moments_row_by_row(rows: &[f64], d: usize) -> Moments {
        let mut m = Moments::new(d);
        let n = rows.len() / d;
        m.n = n as u64;
        for row in rows.chunks_exact(d) {
            for (a, x) in m.mean.iter_mut().zip(row) {
                *a += x;
            }
        }
        for a in m.mean.iter_mut() {
            *a /= n as f64;
        }
        for row in rows.chunks_exact(d) {
            let c: Vec<f64> = row.iter().zip(&m.mean).map(|(x, mu)| x - mu).collect();
            for i in 0..d {
                for j in i..d {
                    m.comoment[i * d + j] += c[i] * c[j];
                }
            }
        }
        m
    }

    fn bits(v: &[f64]) -> Vec<u64> {
        v.iter().map(|x| x.to_bits()).collect()
    }

    #[test]
    fn tiled_moments_are_the_row_by_row_bits() {
        let mut rng = crate::rng::Rng::new(99, 0);
        let mut next = || rng.uniform() * 10.0 - 3.0;
        // Widths around the 4 × 8 tile, row counts around the 128-row runs.
        for d in [1, 3, 4, 7, 8, 9, 12, 13, 16, 32, 37] {
            for n in [1, 2, 5, 127, 128, 129, 300] {
                let rows: Vec<f64> = (0..n * d).map(|_| next()).collect();
                let (tiled, plain) = (Moments::from_rows(&rows, d), moments_row_by_row(&rows, d));
                assert_eq!(tiled.n, plain.n);
                assert_eq!(bits(&tiled.mean), bits(&plain.mean), "d {d} n {n}");
                assert_eq!(bits(&tiled.comoment), bits(&plain.comoment), "d {d} n {n}");
            }
        }
    }

    #[test]
    fn projecting_many_rows_is_projecting_each() {
        let mut rng = crate::rng::Rng::new(7, 0);
        let mut next = || rng.uniform() * 4.0 - 1.0;
        for d in [2, 5, 8, 13, 32] {
            let fit_rows: Vec<f64> = (0..50 * d).map(|_| next()).collect();
            let pca = fit(&fit_rows, d).expect("PCA");
            for m in [1, d.min(3), d.min(8), d.min(9), d] {
                for n in [1, 3, 4, 5, 11] {
                    let x: Vec<f64> = (0..n * d).map(|_| next()).collect();
                    let mut many = vec![f64::NAN; n * m];
                    pca.project_rows(&x, m, &mut many);
                    let mut each = vec![f64::NAN; n * m];
                    for (row, t) in x.chunks_exact(d).zip(each.chunks_exact_mut(m)) {
                        pca.project(row, m, t);
                    }
                    assert_eq!(bits(&many), bits(&each), "d {d} m {m} n {n}");
                }
            }
        }
    }

    #[test]
    fn chan_merge_matches_one_shot() {
        // Large offset to make the naive formula fail; uneven chunk sizes.
        let d = 3;
        let mut rows = Vec::new();
        let mut s = 12345u64;
        for _ in 0..1000 {
            for j in 0..d {
                s = s
                    .wrapping_mul(6364136223846793005)
                    .wrapping_add(1442695040888963407);
                let u = (s >> 11) as f64 / (1u64 << 53) as f64;
                rows.push(1e8 + (j as f64) * u + u * u);
            }
        }
        let whole = Moments::from_rows(&rows, d);
        let mut merged = Moments::new(d);
        for part in [0..7usize, 7..300, 300..301, 301..1000] {
            merged.merge(&Moments::from_rows(&rows[part.start * d..part.end * d], d));
        }
        assert_eq!(merged.n, 1000);
        for (a, b) in merged.mean.iter().zip(&whole.mean) {
            assert!((a - b).abs() <= 1e-14 * b.abs(), "{a} {b}");
        }
        // At an offset of 1e8 the inputs themselves are resolved to 1.5e-8,
        // which bounds how closely two summation orders can agree: allow
        // 1e-6 of the geometric mean of the two diagonal entries.
        for i in 0..d {
            for j in i..d {
                let (a, b) = (merged.comoment[i * d + j], whole.comoment[i * d + j]);
                let s = (whole.comoment[i * d + i] * whole.comoment[j * d + j]).sqrt();
                assert!((a - b).abs() <= 1e-6 * s, "{a} {b}");
            }
        }
        // The sum-of-squares formula loses everything at this offset.
        let n = 1000.0;
        let s: f64 = rows.iter().step_by(d).sum();
        let ss: f64 = rows.iter().step_by(d).map(|x| x * x).sum();
        let naive = ss - s * s / n;
        assert!((naive - whole.comoment[0]).abs() > 1.0, "{naive}");
    }

    #[test]
    fn pca_exact_eigenvalues() {
        // Four rows, two features: x = (−3, −1, 1, 3), y = (1, −1, −1, 1),
        // both centred and x ⟂ y, so the correlation matrix is the identity:
        // eigenvalues 1, 1 (ddof 0) → 4/3, 4/3 on the ddof = 1 scale.
        let rows = [-3.0, 1.0, -1.0, -1.0, 1.0, -1.0, 3.0, 1.0];
        let p = fit(&rows, 2).unwrap();
        assert_eq!(p.scale[1], 1.0);
        for l in &p.eigenvalues {
            assert!((l - 4.0 / 3.0).abs() < 1e-14);
        }
        // Perfectly correlated pair plus noise-free third: x, 2x, and z ⟂ x.
        // Correlation [[1,1,0],[1,1,0],[0,0,1]] has eigenvalues 2, 1, 0.
        let rows = [
            -3.0, -6.0, 1.0, -1.0, -2.0, -1.0, 1.0, 2.0, -1.0, 3.0, 6.0, 1.0,
        ];
        let p = fit(&rows, 3).unwrap();
        let want = [2.0 * 4.0 / 3.0, 4.0 / 3.0, 0.0];
        for (g, w) in p.eigenvalues.iter().zip(want) {
            assert!((g - w).abs() < 1e-13, "{:?}", p.eigenvalues);
        }
        assert!((p.ratios[0] - 2.0 / 3.0).abs() < 1e-14);
        assert_eq!(p.choose(Keep::Variance(0.95)), 2);
        assert_eq!(p.choose(Keep::Variance(0.5)), 1);
        let th = p.theta(1);
        assert!((th[0] - 4.0 / 3.0).abs() < 1e-13);
    }

    #[test]
    fn constant_feature_is_refused() {
        let rows = [1.0, 5.0, 2.0, 5.0, 3.0, 5.0];
        assert_eq!(
            fit(&rows, 2),
            Err(PcaError::Constant {
                feature: 1,
                value: 5.0
            })
        );
    }
}
