//! Average run lengths of CUSUM and EWMA charts on i.i.d. N(μ, 1) input, by
//! the Markov-chain method of Brook & Evans (1972), and the inverse problem:
//! the chart limit that gives a wanted in-control ARL.
//!
//! * **One-sided (upper) CUSUM** `C ← max(0, C + X − k)`, start 0, signal
//!   when `C > h`. The interval `[0, h]` is cut into `N` states of width
//!   `w = 2h / (2N − 1)`: state 0 is `[0, w/2)`, state `i ≥ 1` is centred on
//!   `i w`; values above `h = (N − ½) w` are absorbing (Brook & Evans 1972).
//! * **EWMA with fixed asymptotic limits** `Z ← (1 − λ) Z + λ X`, start 0,
//!   limits `±L σ_Z`, `σ_Z = √(λ / (2 − λ))` (Lucas & Saccucci 1990). The
//!   in-control interval is cut into `N` equal cells represented by their
//!   centres. The one-sided (upper) chart has no lower limit; its lower end
//!   is truncated at `−max(L, 6) σ_Z` and the lowest cell also takes all
//!   mass below (the chance of being there in control is below 10⁻⁸).
//! * In every chain the first step is taken from the exact start value 0,
//!   not from the centre of the cell holding it.
//! * ARLs solve `(I − R) ℓ = 1` by Gaussian elimination with partial
//!   pivoting; `R` is the transient part of the transition matrix.
//! * Two-sided CUSUM from two one-sided charts (Lucas & Crosier 1982):
//!   `1/ARL = 1/ARL⁺ + 1/ARL⁻`, with `ARL⁻(μ) = ARL⁺(−μ)`.
//!
//! The discretisation error falls roughly as `1/N²`; with the default
//! [`STATES`] the tests hold published values to the stated tolerances.

/// States of the Markov chains unless said otherwise.
pub const STATES: usize = 300;

/// Standard normal distribution function, through `erfc` (accurate in both
/// tails).
pub fn phi(x: f64) -> f64 {
    0.5 * libm::erfc(-x * std::f64::consts::FRAC_1_SQRT_2)
}

/// Standard normal quantile: algorithm AS 241 (PPND16) of Wichura (1988),
/// relative accuracy about 1e-16.
#[allow(clippy::excessive_precision, clippy::unreadable_literal)]
pub fn phi_inv(p: f64) -> f64 {
    // Coefficients from highest to lowest power.
    const A: [f64; 8] = [
        2509.0809287301226727,
        33430.575583588128105,
        67265.770927008700853,
        45921.953931549871457,
        13731.693765509461125,
        1971.5909503065514427,
        133.14166789178437745,
        3.387132872796366608,
    ];
    const B: [f64; 8] = [
        5226.495278852545925,
        28729.085735721942674,
        39307.89580009271061,
        21213.794301586595867,
        5394.1960214247511077,
        687.1870074920579083,
        42.313330701600911252,
        1.0,
    ];
    const C: [f64; 8] = [
        7.7454501427834140764e-4,
        0.0227238449892691845833,
        0.24178072517745061177,
        1.27045825245236838258,
        3.64784832476320460504,
        5.7694972214606914055,
        4.6303378461565452959,
        1.42343711074968357734,
    ];
    const D: [f64; 8] = [
        1.05075007164441684324e-9,
        5.475938084995344946e-4,
        0.0151986665636164571966,
        0.14810397642748007459,
        0.68976733498510000455,
        1.6763848301838038494,
        2.05319162663775882187,
        1.0,
    ];
    const E: [f64; 8] = [
        2.01033439929228813265e-7,
        2.71155556874348757815e-5,
        0.0012426609473880784386,
        0.026532189526576123093,
        0.29656057182850489123,
        1.7848265399172913358,
        5.4637849111641143699,
        6.6579046435011037772,
    ];
    const F: [f64; 8] = [
        2.04426310338993978564e-15,
        1.4215117583164458887e-7,
        1.8463183175100546818e-5,
        7.868691311456132591e-4,
        0.0148753612908506148525,
        0.13692988092273580531,
        0.59983220655588793769,
        1.0,
    ];
    fn poly(c: &[f64; 8], x: f64) -> f64 {
        c.iter().fold(0.0, |acc, k| acc * x + k)
    }
    if p <= 0.0 {
        return f64::NEG_INFINITY;
    }
    if p >= 1.0 {
        return f64::INFINITY;
    }
    let q = p - 0.5;
    if q.abs() <= 0.425 {
        let r = 0.180625 - q * q;
        return q * poly(&A, r) / poly(&B, r);
    }
    let r0 = if q < 0.0 { p } else { 1.0 - p };
    let r = (-r0.ln()).sqrt();
    let val = if r <= 5.0 {
        let r = r - 1.6;
        poly(&C, r) / poly(&D, r)
    } else {
        let r = r - 5.0;
        poly(&E, r) / poly(&F, r)
    };
    if q < 0.0 {
        -val
    } else {
        val
    }
}

/// `P(a < X < b)` for `X ~ N(0, 1)`, accurate when both ends are far in a tail.
fn prob_between(a: f64, b: f64) -> f64 {
    if a >= b {
        return 0.0;
    }
    if a > 0.0 {
        // Upper tail: difference of survival functions.
        phi(-a) - phi(-b)
    } else {
        phi(b) - phi(a)
    }
}

/// Solves `(I − R) ℓ = 1` and returns `ℓ`; `R` is `n × n` row-major.
fn solve_arl(r: &[f64], n: usize) -> Vec<f64> {
    let mut a = vec![0.0; n * n];
    for i in 0..n {
        for j in 0..n {
            a[i * n + j] = if i == j { 1.0 } else { 0.0 } - r[i * n + j];
        }
    }
    let mut b = vec![1.0; n];
    for col in 0..n {
        let mut piv = col;
        for row in col + 1..n {
            if a[row * n + col].abs() > a[piv * n + col].abs() {
                piv = row;
            }
        }
        if piv != col {
            for j in 0..n {
                a.swap(col * n + j, piv * n + j);
            }
            b.swap(col, piv);
        }
        let p = a[col * n + col];
        for row in col + 1..n {
            let f = a[row * n + col] / p;
            if f == 0.0 {
                continue;
            }
            for j in col..n {
                a[row * n + j] -= f * a[col * n + j];
            }
            b[row] -= f * b[col];
        }
    }
    let mut x = vec![0.0; n];
    for i in (0..n).rev() {
        let mut s = b[i];
        for j in i + 1..n {
            s -= a[i * n + j] * x[j];
        }
        x[i] = s / a[i * n + i];
    }
    x
}

/// ARL of the one-sided upper CUSUM with reference value `k` and decision
/// limit `h`, for input N(`shift`, 1), with `states` Markov states.
pub fn cusum_arl_with(k: f64, h: f64, shift: f64, states: usize) -> f64 {
    let n = states.max(2);
    let w = 2.0 * h / (2.0 * n as f64 - 1.0);
    // From value c, the next value is c + X − k; X ~ N(shift, 1).
    let row = |c: f64, out: &mut [f64]| {
        // To state 0: c + X − k < w/2.
        out[0] = phi(w / 2.0 + k - c - shift);
        for (j, o) in out.iter_mut().enumerate().skip(1) {
            let lo = (j as f64 - 0.5) * w + k - c - shift;
            let hi = (j as f64 + 0.5) * w + k - c - shift;
            *o = prob_between(lo, hi);
        }
    };
    let mut r = vec![0.0; n * n];
    for i in 0..n {
        row(i as f64 * w, &mut r[i * n..(i + 1) * n]);
    }
    let l = solve_arl(&r, n);
    // State 0 is centred on 0, the start value: no extra step needed.
    l[0]
}

/// [`cusum_arl_with`] at [`STATES`] states.
pub fn cusum_arl(k: f64, h: f64, shift: f64) -> f64 {
    cusum_arl_with(k, h, shift, STATES)
}

/// Siegmund's approximation to the ARL of the one-sided upper CUSUM
/// (Siegmund 1985): with `Δ = shift − k` and `b = h + 1.166`,
/// `ARL = (e^(−2Δb) + 2Δb − 1) / (2Δ²)`, and `b²` when `Δ = 0`. A Brownian-motion approximation with an overshoot correction:
/// within a few percent for `h ≥ 3` and better as `h` grows.
pub fn cusum_arl_siegmund(k: f64, h: f64, shift: f64) -> f64 {
    let delta = shift - k;
    let b = h + 1.166;
    if delta.abs() < 1e-9 {
        return b * b;
    }
    let x = 2.0 * delta * b;
    ((-x).exp() + x - 1.0) / (2.0 * delta * delta)
}

/// Widest Markov-chain cell (in standard deviations of the input) that
/// [`cusum_arl_any`] accepts before it switches to Siegmund's approximation.
pub const MAX_CELL: f64 = 0.25;

/// ARL of the one-sided upper CUSUM for any `h`: the Markov chain at
/// [`STATES`] states while its cells are at most [`MAX_CELL`] wide (`h` up to
/// about 75), else [`cusum_arl_siegmund`] (a chain fine enough for a larger `h`
/// costs O(N³); the approximation is then within a fraction of a percent).
pub fn cusum_arl_any(k: f64, h: f64, shift: f64) -> f64 {
    let cell = 2.0 * h / (2.0 * STATES as f64 - 1.0);
    if cell <= MAX_CELL {
        cusum_arl(k, h, shift)
    } else {
        cusum_arl_siegmund(k, h, shift)
    }
}

/// Largest ARL reported by [`capped`]. Beyond about 10¹² the chains' linear
/// systems are singular to double precision and their solutions are noise.
pub const ARL_CEILING: f64 = 1e9;

/// `arl` limited to [`ARL_CEILING`]; a value that is not a finite number of
/// at least one sample (a lost solution) also reads as the ceiling.
pub fn capped(arl: f64) -> f64 {
    if arl.is_finite() && arl >= 1.0 {
        arl.min(ARL_CEILING)
    } else {
        ARL_CEILING
    }
}

/// Two-sided tabular CUSUM (upper and lower, same `k` and `h`) from the
/// one-sided ARLs: `1/ARL = 1/ARL⁺(μ) + 1/ARL⁺(−μ)`.
pub fn cusum_arl_two_sided(k: f64, h: f64, shift: f64) -> f64 {
    let up = cusum_arl(k, h, shift);
    let down = cusum_arl(k, h, -shift);
    1.0 / (1.0 / up + 1.0 / down)
}

/// Which limits an EWMA chart has.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Sides {
    /// Upper limit only (as the detector uses it).
    Upper,
    /// Upper and lower limits.
    Both,
}

/// ARL of an EWMA chart with smoothing `lambda`, limits at `L` asymptotic
/// standard deviations, input N(`shift`, 1), `states` cells.
pub fn ewma_arl_with(lambda: f64, l: f64, shift: f64, sides: Sides, states: usize) -> f64 {
    let n = states.max(3);
    let sigma = (lambda / (2.0 - lambda)).sqrt();
    let ucl = l * sigma;
    let lo = match sides {
        Sides::Both => -ucl,
        Sides::Upper => -(l.max(6.0)) * sigma,
    };
    let w = (ucl - lo) / n as f64;
    let edge = |j: usize| lo + j as f64 * w;
    // From value c: Z' = (1 − λ) c + λ X, X ~ N(shift, 1).
    let row = |c: f64, out: &mut [f64]| {
        let a = (1.0 - lambda) * c;
        let to_x = |z: f64| (z - a) / lambda - shift;
        for (j, o) in out.iter_mut().enumerate() {
            let hi = to_x(edge(j + 1));
            *o = if j == 0 && sides == Sides::Upper {
                phi(hi)
            } else {
                prob_between(to_x(edge(j)), hi)
            };
        }
    };
    let mut r = vec![0.0; n * n];
    for i in 0..n {
        row(lo + (i as f64 + 0.5) * w, &mut r[i * n..(i + 1) * n]);
    }
    let l_vec = solve_arl(&r, n);
    let mut first = vec![0.0; n];
    row(0.0, &mut first);
    1.0 + first.iter().zip(&l_vec).map(|(p, v)| p * v).sum::<f64>()
}

/// [`ewma_arl_with`] at [`STATES`] states.
pub fn ewma_arl(lambda: f64, l: f64, shift: f64, sides: Sides) -> f64 {
    ewma_arl_with(lambda, l, shift, sides, STATES)
}

/// Finds `x` in `[lo, hi]` with `f(x) = 0` for an increasing `f`, by
/// bisection safeguarding the secant step (Illinois variant of regula
/// falsi), to an absolute tolerance `tol` on `x`.
pub fn find_root(f: impl Fn(f64) -> f64, mut lo: f64, mut hi: f64, tol: f64) -> Option<f64> {
    let mut flo = f(lo);
    let mut fhi = f(hi);
    if !(flo <= 0.0 && fhi >= 0.0) {
        return None;
    }
    let mut side = 0i8;
    for _ in 0..200 {
        if hi - lo <= tol {
            break;
        }
        let mut x = (lo * fhi - hi * flo) / (fhi - flo);
        if !(x > lo && x < hi) {
            x = 0.5 * (lo + hi);
        }
        let fx = f(x);
        if fx == 0.0 {
            return Some(x);
        }
        if fx < 0.0 {
            lo = x;
            flo = fx;
            if side == -1 {
                fhi *= 0.5;
            }
            side = -1;
        } else {
            hi = x;
            fhi = fx;
            if side == 1 {
                flo *= 0.5;
            }
            side = 1;
        }
    }
    Some(0.5 * (lo + hi))
}

/// Grows `hi` from `start` until `arl(hi) ≥ target`; returns the bracket.
fn bracket(arl: &impl Fn(f64) -> f64, start: f64, target: f64) -> Option<(f64, f64)> {
    let mut lo = start;
    let mut hi = start;
    for _ in 0..60 {
        if arl(hi) >= target {
            return Some((lo, hi));
        }
        lo = hi;
        hi *= 1.5;
    }
    None
}

/// Decision limit `h` of the one-sided CUSUM with reference `k` whose
/// in-control ARL is `target` (to 1e-6 in `h`).
pub fn cusum_limit_for(k: f64, target: f64) -> Option<f64> {
    let arl = |h: f64| cusum_arl(k, h, 0.0);
    let (lo, hi) = bracket(&arl, 0.25, target)?;
    find_root(|h| arl(h).ln() - target.ln(), lo, hi, 1e-6)
}

/// `L` of the upper EWMA chart with smoothing `lambda` whose in-control ARL
/// is `target` (to 1e-6 in `L`).
pub fn ewma_limit_for(lambda: f64, target: f64) -> Option<f64> {
    let arl = |l: f64| ewma_arl(lambda, l, 0.0, Sides::Upper);
    let (lo, hi) = bracket(&arl, 0.5, target)?;
    find_root(|l| arl(l).ln() - target.ln(), lo, hi, 1e-6)
}

/// Student's t distribution function with `df` degrees of freedom, through
/// the regularised incomplete beta function:
/// `P(T ≤ t) = 1 − ½ I_{df/(df + t²)}(df/2, ½)` for `t ≥ 0` (Abramowitz &
/// Stegun 26.7.1, 26.5.27), the other half by symmetry.
pub fn student_t(t: f64, df: f64) -> f64 {
    let tail = 0.5 * incomplete_beta(df / 2.0, 0.5, df / (df + t * t));
    if t >= 0.0 {
        1.0 - tail
    } else {
        tail
    }
}

/// Student's t quantile: the `t` with `student_t(t, df) = p`, by bisection
/// on the distribution function to its f64 resolution. `p` in (0, 1),
/// `df` ≥ 1.
pub fn student_t_inv(p: f64, df: f64) -> f64 {
    if p == 0.5 {
        return 0.0;
    }
    let upper = p > 0.5;
    let q = if upper { p } else { 1.0 - p };
    // The t quantile is above the normal one; double until bracketed.
    let (mut lo, mut hi) = (0.0f64, phi_inv(q).max(1.0));
    while student_t(hi, df) < q {
        lo = hi;
        hi *= 2.0;
    }
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if !(mid > lo && mid < hi) {
            break;
        }
        if student_t(mid, df) < q {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let t = 0.5 * (lo + hi);
    if upper {
        t
    } else {
        -t
    }
}

/// Regularised incomplete beta function `I_x(a, b)`, by its continued
/// fraction evaluated with the modified Lentz method (Press et al.,
/// *Numerical Recipes*, 3rd ed., §6.4), using the symmetry
/// `I_x(a, b) = 1 − I_{1−x}(b, a)` where the fraction converges slowly.
fn incomplete_beta(a: f64, b: f64, x: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if x >= 1.0 {
        return 1.0;
    }
    let ln_front =
        libm::lgamma(a + b) - libm::lgamma(a) - libm::lgamma(b) + a * x.ln() + b * (1.0 - x).ln();
    if x < (a + 1.0) / (a + b + 2.0) {
        ln_front.exp() * beta_fraction(a, b, x) / a
    } else {
        1.0 - ln_front.exp() * beta_fraction(b, a, 1.0 - x) / b
    }
}

/// The continued fraction of `I_x(a, b)` (Numerical Recipes §6.4, `betacf`).
fn beta_fraction(a: f64, b: f64, x: f64) -> f64 {
    const TINY: f64 = 1e-300;
    let away_from_zero = |v: f64| if v.abs() < TINY { TINY } else { v };
    let (qab, qap, qam) = (a + b, a + 1.0, a - 1.0);
    let mut c = 1.0;
    let mut d = 1.0 / away_from_zero(1.0 - qab * x / qap);
    let mut h = d;
    // One step of the modified Lentz method with partial numerator `aa`:
    // the factor it multiplies the fraction by.
    let mut step = |aa: f64| {
        d = 1.0 / away_from_zero(1.0 + aa * d);
        c = away_from_zero(1.0 + aa / c);
        d * c
    };
    for m in 1..=300 {
        let m = f64::from(m);
        let m2 = 2.0 * m;
        h *= step(m * (b - m) * x / ((qam + m2) * (a + m2)));
        let del = step(-(a + m) * (qab + m) * x / ((a + m2) * (qap + m2)));
        h *= del;
        if (del - 1.0).abs() < 1e-15 {
            break;
        }
    }
    h
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn normal_quantiles() {
        // Φ⁻¹(0.975) = 1.959963984540054, Φ⁻¹(0.999) = 3.090232306167813,
        // Φ⁻¹(1e-10) = −6.361340902404056 (computed with scipy 1.17.1
        // scipy.stats.norm.ppf; AS 241 is accurate to ~1e-16).
        assert!((phi_inv(0.975) - 1.959_963_984_540_054).abs() < 1e-12);
        assert!((phi_inv(0.999) - 3.090_232_306_167_813).abs() < 1e-12);
        assert!((phi_inv(1e-10) + 6.361_340_902_404_056).abs() < 1e-9);
        for p in [1e-12, 1e-5, 0.01, 0.3, 0.5, 0.8, 0.99999] {
            assert!((phi(phi_inv(p)) - p).abs() <= 1e-14 * p.max(1e-3), "{p}");
        }
    }

    // Tolerances. The Brook–Evans chain converges to the exact ARL as the
    // state count grows (a Nyström solution of the integral equation with
    // 800 Simpson intervals gives one-sided k = 0.5 ARL0 of 117.5957, 335.3676
    // and 930.8870 for h = 3, 4, 5; the chain at 300 states is within 0.002 %
    // of them). The EWMA chain, with cells represented by their centres,
    // converges more slowly: at 300 states it is about 0.1 % below its limit.
    // Published values are rounded (ARL to 3–4 significant digits, L to
    // 3 decimals, which alone moves ARL0 ≈ 500 by ±0.15 %), so the checks
    // allow half a unit in the last published digit, or 0.5 % for the EWMA.

    #[test]
    fn cusum_one_sided_brook_evans() {
        // Brook & Evans (1972), k = 0.5, h = 3: ARL0 = 117.59, ARL(1.5σ) = 3.75
        // (published there; also computed).
        assert!((cusum_arl(0.5, 3.0, 0.0) - 117.59).abs() < 0.01);
        assert!((cusum_arl(0.5, 3.0, 1.5) - 3.75).abs() < 0.005);
    }

    #[test]
    fn cusum_two_sided_lucas_crosier() {
        // Lucas & Crosier (1982) Table 1, k = 0.5: h = 4 → 168, shift 1σ →
        // 8.38 (8.38 is the true two-sided value; the one-sided combination
        // is exact enough away from zero shift); h = 5 → 465 and shift 1σ →
        // 10.4 (Montgomery, Introduction to Statistical Quality Control, CUSUM
        // chapter; also computed by integral equation and Monte Carlo).
        assert!((cusum_arl_two_sided(0.5, 4.0, 0.0) - 168.0).abs() < 0.5);
        assert!((cusum_arl_two_sided(0.5, 5.0, 0.0) - 465.0).abs() < 0.5);
        assert!((cusum_arl_two_sided(0.5, 4.0, 1.0) - 8.38).abs() < 0.01);
        assert!((cusum_arl_two_sided(0.5, 5.0, 1.0) - 10.4).abs() < 0.05);
    }

    #[test]
    fn ewma_two_sided_lucas_saccucci() {
        // Lucas & Saccucci (1990): λ = 0.1, L = 2.814 → 500, 1σ → 10.3;
        // λ = 0.5, L = 3.071 → 500, 1σ → 17.5 (Table 3) (published; also
        // computed). Fixed asymptotic limits, start at 0.
        let a = ewma_arl(0.1, 2.814, 0.0, Sides::Both);
        assert!((a - 500.0).abs() < 2.5, "{a}");
        let b = ewma_arl(0.5, 3.071, 0.0, Sides::Both);
        assert!((b - 500.0).abs() < 2.5, "{b}");
        assert!((ewma_arl(0.1, 2.814, 1.0, Sides::Both) - 10.3).abs() < 0.05);
        assert!((ewma_arl(0.5, 3.071, 1.0, Sides::Both) - 17.5).abs() < 0.05);
        // Computed row (not published): λ = 0.1, L = 2.7 → 369.
        assert!((ewma_arl(0.1, 2.7, 0.0, Sides::Both) - 369.0).abs() < 2.0);
    }

    #[test]
    fn one_sided_ewma_doubles_in_control_arl_roughly() {
        // With one limit instead of two, the in-control ARL is close to (a
        // little under) twice the two-sided one (signals are rare and nearly
        // independent across sides). The 1.8–2.05 range around 2 is common
        // practice, no source.
        let both = ewma_arl(0.1, 3.0, 0.0, Sides::Both);
        let up = ewma_arl(0.1, 3.0, 0.0, Sides::Upper);
        assert!(up > 1.8 * both && up < 2.05 * both, "{up} {both}");
    }

    #[test]
    fn limits_for_target_arl() {
        // Computed, not published: one-sided CUSUM k = 0.5 with ARL0 = 10⁴
        // needs h = 7.3608, 10⁵ needs h = 9.6617.
        let h4 = cusum_limit_for(0.5, 1e4).unwrap();
        assert!((h4 - 7.3608).abs() < 2e-3, "{h4}");
        let h5 = cusum_limit_for(0.5, 1e5).unwrap();
        assert!((h5 - 9.6617).abs() < 2e-3, "{h5}");
        let l = ewma_limit_for(0.1, 1e4).unwrap();
        let back = ewma_arl(0.1, l, 0.0, Sides::Upper);
        assert!((back / 1e4 - 1.0).abs() < 1e-5);
    }

    #[test]
    fn one_sided_charts_against_simulation() {
        // Independent check of the one-sided chains the calibration uses:
        // 10 000 simulated runs of each chart, as the detector runs it (start
        // at 0, signal when the statistic exceeds the limit). The standard
        // error of a mean run length near 500 is about 1 %, so 4 % is over
        // 3.5 standard errors.
        let mut rng = crate::rng::Rng::new(2024, 0);
        let runs = 10_000;
        let l = ewma_limit_for(0.1, 500.0).unwrap();
        let limit = l * (0.1f64 / 1.9).sqrt();
        let mut total = 0u64;
        for _ in 0..runs {
            let mut z = 0.0;
            let mut n = 0u64;
            loop {
                n += 1;
                z += 0.1 * (rng.normal() - z);
                if z > limit {
                    break;
                }
            }
            total += n;
        }
        let mc = total as f64 / runs as f64;
        assert!(
            (mc / 500.0 - 1.0).abs() < 0.04,
            "EWMA L = {l}: simulated ARL {mc}"
        );
        let h = cusum_limit_for(0.5, 500.0).unwrap();
        let mut total = 0u64;
        for _ in 0..runs {
            let mut c: f64 = 0.0;
            let mut n = 0u64;
            loop {
                n += 1;
                c = (c + rng.normal() - 0.5).max(0.0);
                if c > h {
                    break;
                }
            }
            total += n;
        }
        let mc = total as f64 / runs as f64;
        assert!(
            (mc / 500.0 - 1.0).abs() < 0.04,
            "CUSUM h = {h}: simulated ARL {mc}"
        );
    }

    #[test]
    fn siegmund_against_the_chain() {
        // Siegmund's approximation (Siegmund 1985). Against the
        // Brook–Evans chain (k = 0.5, h = 3: 117.59 in control, 3.75 at
        // 1.5σ, published): within 4 % at h = 3, and closer as h grows,
        // which is where `cusum_arl_any` uses it.
        let s0 = cusum_arl_siegmund(0.5, 3.0, 0.0);
        assert!((s0 / 117.59 - 1.0).abs() < 0.04, "{s0}");
        let s1 = cusum_arl_siegmund(0.5, 3.0, 1.5);
        assert!((s1 / 3.75 - 1.0).abs() < 0.04, "{s1}");
        for (k, h, shift) in [(0.5, 60.0, 2.0), (1.5, 70.0, 2.0), (0.25, 70.0, 1.0)] {
            let chain = cusum_arl_with(k, h, shift, 1200);
            let approx = cusum_arl_siegmund(k, h, shift);
            assert!(
                (approx / chain - 1.0).abs() < 0.005,
                "{k} {h}: {approx} vs {chain}"
            );
        }
        // Δ = 0: b².
        assert!((cusum_arl_siegmund(1.0, 3.834, 1.0) - 25.0).abs() < 1e-9);
        // The switch: chain below, approximation above.
        assert_eq!(cusum_arl_any(0.5, 3.0, 0.0), cusum_arl(0.5, 3.0, 0.0));
        assert_eq!(
            cusum_arl_any(0.5, 200.0, 2.0),
            cusum_arl_siegmund(0.5, 200.0, 2.0)
        );
    }

    #[test]
    fn huge_run_lengths_are_capped() {
        // k = 3 far above a shift of 2 with h = 45: the true ARL is
        // astronomically large (Siegmund: about e^(2·46)/2); the chain cannot
        // resolve it, and the capped value reads as the ceiling.
        assert_eq!(capped(cusum_arl_any(3.0, 45.0, 2.0)), ARL_CEILING);
        assert_eq!(capped(ewma_arl(0.1, 20.0, 2.0, Sides::Upper)), ARL_CEILING);
        assert_eq!(capped(f64::NAN), ARL_CEILING);
        assert_eq!(capped(-5.0), ARL_CEILING);
        assert_eq!(capped(117.59), 117.59);
    }

    #[test]
    fn root_finder() {
        let r = find_root(|x| x * x * x - 2.0, 0.0, 2.0, 1e-12).unwrap();
        assert!((r - 2f64.cbrt()).abs() < 1e-11);
    }

    #[test]
    fn student_t_matches_scipy() {
        // scipy 1.17.1, scipy.stats.t.ppf(0.995, df) and t.cdf. Within 1e-9
        // relative: the continued fraction converges to 1e-15 per term and
        // the bisection runs to the f64 resolution; lgamma adds a few ulp.
        for (df, want) in [
            (1.0, 63.656741162871526),
            (2.0, 9.924843200918287),
            (3.0, 5.840909309733355),
            (5.0, 4.032142983555228),
            (7.0, 3.4994832973504924),
            (10.0, 3.16927267261695),
            (30.0, 2.7499956535672254),
            (100.0, 2.6258905214380173),
        ] {
            let got = student_t_inv(0.995, df);
            assert!(
                (got - want).abs() <= 1e-9 * want,
                "df {df}: {got} vs {want}"
            );
            let lower = student_t_inv(0.005, df);
            assert!((lower + want).abs() <= 1e-9 * want, "df {df}: {lower}");
        }
        for (t, df, want) in [
            (2.0, 3.0, 0.9303370157205785),
            (-1.5, 7.0, 0.088649243494985),
            (0.3, 1.0, 0.5927735790777423),
        ] {
            let got = student_t(t, df);
            assert!(
                (got - want).abs() <= 1e-12,
                "t {t}, df {df}: {got} vs {want}"
            );
        }
    }
}
