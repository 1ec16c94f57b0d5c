//! f64 reference of the per-sample scores, written from the formulas in the
//! crate docs, independent of the f32 code path, and an a-priori bound on how
//! far the f32 path may round away from it.
#![allow(dead_code)] // each test file uses its own part
#![allow(clippy::needless_range_loop)] // index loops mirror the formulas

use crate::support::Rng;
use plumb_model::ModelOwned;

/// A sample's standardised features `z`, latent scores `t = Pᵀz` and
/// per-component log terms `ln π_c + ln N(t; ν_c, v_c)`.
pub fn reference_parts(model: &ModelOwned, x: &[f64]) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
    let d = model.dims.features as usize;
    let m = model.dims.components as usize;
    let k = model.dims.mixture as usize;
    let z: Vec<f64> = (0..d)
        .map(|i| (x[i] - model.mean[i] as f64) / model.scale[i] as f64)
        .collect();
    let t: Vec<f64> = (0..m)
        .map(|j| {
            (0..d)
                .map(|i| z[i] * model.loadings[i * m + j] as f64)
                .sum()
        })
        .collect();
    let logs: Vec<f64> = (0..k)
        .map(|c| {
            let mut a = (model.weights[c] as f64).ln();
            for j in 0..m {
                let v = model.mix_variances[c * m + j] as f64;
                let e = t[j] - model.mix_means[c * m + j] as f64;
                a -= 0.5 * ((2.0 * std::f64::consts::PI * v).ln() + e * e / v);
            }
            a
        })
        .collect();
    (z, t, logs)
}

/// The per-sample scores by the f64 formulas: `(SPE, T², NLL, ‖z‖²)`.
pub fn reference(model: &ModelOwned, x: &[f64]) -> (f64, f64, f64, f64) {
    let d = model.dims.features as usize;
    let m = model.dims.components as usize;
    let (z, t, logs) = reference_parts(model, x);
    let p = |i: usize, j: usize| model.loadings[i * m + j] as f64;
    let spe: f64 = (0..d)
        .map(|i| {
            let r = z[i] - (0..m).map(|j| p(i, j) * t[j]).sum::<f64>();
            r * r
        })
        .sum();
    let t2: f64 = (0..m)
        .map(|j| t[j] * t[j] / model.eigenvalues[j] as f64)
        .sum();
    let best = logs.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let nll = -(best + logs.iter().map(|a| (a - best).exp()).sum::<f64>().ln());
    let znorm2 = z.iter().map(|v| v * v).sum();
    (spe, t2, nll, znorm2)
}

/// Draws a sample near the model: latent point from a mixture component,
/// pushed back through the loadings, plus residual noise of size `noise`.
pub fn draw(model: &ModelOwned, rng: &mut Rng, noise: f64) -> Vec<f64> {
    let d = model.dims.features as usize;
    let m = model.dims.components as usize;
    let k = model.dims.mixture as usize;
    let c = (rng.next_u64() % k as u64) as usize;
    let t: Vec<f64> = (0..m)
        .map(|j| {
            model.mix_means[c * m + j] as f64
                + rng.normal() * (model.mix_variances[c * m + j] as f64).sqrt()
        })
        .collect();
    (0..d)
        .map(|i| {
            let z: f64 = (0..m)
                .map(|j| model.loadings[i * m + j] as f64 * t[j])
                .sum::<f64>()
                + noise * rng.normal();
            model.mean[i] as f64 + model.scale[i] as f64 * z
        })
        .collect()
}

/// Unit roundoff of f32 (round to nearest): 2⁻²⁴.
pub const U: f64 = 1.0 / 16_777_216.0;

/// γ_n = n·u / (1 − n·u): the relative forward error bound of a recursive
/// sum of n terms, or of a product of n roundings (Higham, *Accuracy and
/// Stability of Numerical Algorithms*, 2nd ed., §3.1, Lemma 3.1).
pub fn gamma(n: usize) -> f64 {
    let nu = n as f64 * U;
    nu / (1.0 - nu)
}

/// A-priori bounds on `|f32 score − f64 score|` for one sample `x` (given
/// as the f32 values widened), `[SPE, T², NLL]`, for the libm path of
/// `plumb_firmware::score::score` (sums in index order, no fused
/// multiply-add, reciprocals of scale, eigenvalues and variances and the log
/// normalising constants rounded to f32 once at load time). Worst-case
/// forward error analysis with u = 2⁻²⁴, Higham §3.1; squares keep their
/// second-order term so that a score near zero is not given a zero bound:
///
/// * `z_i = (x_i − μ_i)·(1/s_i)`: three roundings, |Δz_i| ≤ 3u|z_i|.
/// * `t_j = Σ_i z_i p_ij` (d terms): |Δt_j| ≤ δ_j = γ_{d+3}·S_j with
///   S_j = Σ_i |z_i p_ij|, so the error scales with the energy of z, not
///   with t_j (which may cancel to near zero).
/// * T² = Σ_j t_j²·(1/λ_j): |ΔT²| ≤ Σ_j (2|t_j|δ_j + δ_j²)/λ_j + γ_{m+3}·T²
///   (two products, the rounded reciprocal, m-term sum).
/// * SPE = Σ_i r_i², r_i = z_i − Σ_j p_ij t_j: |Δr_i| ≤ ρ_i = 3u|z_i| +
///   Σ_j |p_ij|δ_j + γ_m Σ_j |p_ij t_j| + u|r_i|, and |ΔSPE| ≤
///   Σ_i (2|r_i|ρ_i + ρ_i²) + γ_{d+1}·SPE. The residual cancels (r ≪ z),
///   so this scales with |r|·‖z‖, not with SPE.
/// * a_c = ln π_c − ½Σ_j ln(2π v_cj) − ½Σ_j e_j²/v_cj, e_j = t_j − ν_cj:
///   the constant has m + 1 libm `logf` calls (each within 1 ulp, 2u
///   relative) and m + 1 additions, |Δ| ≤ γ_{m+4}·L_c + m·u with
///   L_c = |ln π_c| + ½Σ_j |ln(2π v_cj)| (the last term: 2π·v rounded, u
///   relative, is u absolute in the log, halved, per j, with 2π itself);
///   |Δe_j| ≤ η_j = δ_j + u(|e_j| + δ_j); the quadratic form errs by at most
///   Σ_j (2|e_j|η_j + η_j² + γ_{m+3} e_j²)/v_cj; the final subtraction adds
///   u·(|constant| + ½ quad).
/// * NLL = −(a_max + ln Σ_c e^{a_c − a_max}): log-sum-exp moves by at most
///   max_c |Δa_c| (it is 1-Lipschitz in the largest change); the shifted
///   exponents round (u|x|, and |x|·e^x ≤ 1/e), each `expf` is within 1 ulp
///   and the k-term sum within γ_k, so the sum is within γ_{k+3} relative
///   and its log within γ_{k+3} + 2u·ln k absolute; the last addition and
///   negation add u·(|a_max| + ln k).
pub fn rounding_bounds(model: &ModelOwned, x: &[f64]) -> [f64; 3] {
    let d = model.dims.features as usize;
    let m = model.dims.components as usize;
    let k = model.dims.mixture as usize;
    let (z, t, logs) = reference_parts(model, x);
    let p = |i: usize, j: usize| model.loadings[i * m + j] as f64;
    let delta: Vec<f64> = (0..m)
        .map(|j| gamma(d + 3) * (0..d).map(|i| (z[i] * p(i, j)).abs()).sum::<f64>())
        .collect();
    let mut t2 = 0.0;
    let mut b_t2 = 0.0;
    for j in 0..m {
        let inv = 1.0 / model.eigenvalues[j] as f64;
        t2 += t[j] * t[j] * inv;
        b_t2 += (2.0 * t[j].abs() * delta[j] + delta[j] * delta[j]) * inv;
    }
    b_t2 += gamma(m + 3) * t2;
    let mut spe = 0.0;
    let mut b_spe = 0.0;
    for i in 0..d {
        let recon: f64 = (0..m).map(|j| p(i, j) * t[j]).sum();
        let r = z[i] - recon;
        let rho = 3.0 * U * z[i].abs()
            + (0..m).map(|j| p(i, j).abs() * delta[j]).sum::<f64>()
            + gamma(m) * (0..m).map(|j| (p(i, j) * t[j]).abs()).sum::<f64>()
            + U * r.abs();
        spe += r * r;
        b_spe += 2.0 * r.abs() * rho + rho * rho;
    }
    b_spe += gamma(d + 1) * spe;
    let mut worst_a = 0.0f64;
    for c in 0..k {
        let lw = (model.weights[c] as f64).ln();
        let mut l_c = lw.abs();
        let mut constant = lw;
        let mut b_quad = 0.0;
        let mut quad = 0.0;
        for j in 0..m {
            let v = model.mix_variances[c * m + j] as f64;
            let ln2pv = (2.0 * std::f64::consts::PI * v).ln();
            l_c += 0.5 * ln2pv.abs();
            constant -= 0.5 * ln2pv;
            let e = t[j] - model.mix_means[c * m + j] as f64;
            let eta = delta[j] + U * (e.abs() + delta[j]);
            quad += e * e / v;
            b_quad += (2.0 * e.abs() * eta + eta * eta + gamma(m + 3) * e * e) / v;
        }
        let b_const = gamma(m + 4) * l_c + m as f64 * U;
        let b_a = b_const + 0.5 * b_quad + U * (constant.abs() + 0.5 * quad);
        worst_a = worst_a.max(b_a);
    }
    let best = logs.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let lnk = (k as f64).ln();
    let b_nll = worst_a + gamma(k + 3) + 2.0 * U * lnk + U * (best.abs() + lnk);
    [b_spe, b_t2, b_nll]
}
