//! Test support shared by the crates' tests: small valid models built by hand.
//! Included with `#[path = ...] mod support;` from other crates' tests.
#![allow(dead_code)]

use plumb_model::{Dims, ModelMeta, ModelOwned, MonitorParams, ScoreLimits};

/// SplitMix64 (Steele, Lea & Flood 2014): a tiny deterministic generator.
pub struct Rng(pub u64);

impl Rng {
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }
    /// Uniform in [0, 1).
    pub fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }
    /// Standard normal by Box–Muller.
    pub fn normal(&mut self) -> f64 {
        let u1 = 1.0 - self.uniform();
        let u2 = self.uniform();
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }
}

pub fn limits(center: f32, spread: f32) -> ScoreLimits {
    ScoreLimits {
        sample_limit: 100.0,
        center,
        spread,
        cusum_slack: 0.5,
        cusum_limit: 5.0,
        ewma_limit: 0.8,
    }
}

pub fn monitor() -> MonitorParams {
    MonitorParams {
        fault_z: 50.0,
        warmup: 10,
        ewma_lambda: 0.1,
        raise_dwell: 3,
        clear_dwell: 20,
        min_hold: 30,
        clear_fraction: 0.5,
        spe: limits(0.5, 0.3),
        t2: limits(1.2, 0.4),
        nll: limits(3.0, 1.0),
    }
}

/// A valid model with `d` features, `m` orthonormal loading columns
/// (Gram–Schmidt on a random matrix) and `k` mixture components.
pub fn example_model(d: usize, m: usize, k: usize, seed: u64) -> ModelOwned {
    let mut rng = Rng(seed);
    let mut cols: Vec<Vec<f64>> = Vec::new();
    while cols.len() < m {
        let mut v: Vec<f64> = (0..d).map(|_| rng.normal()).collect();
        for c in &cols {
            let dot: f64 = v.iter().zip(c).map(|(a, b)| a * b).sum();
            for (vi, ci) in v.iter_mut().zip(c) {
                *vi -= dot * ci;
            }
        }
        let norm = v.iter().map(|x| x * x).sum::<f64>().sqrt();
        if norm > 1e-6 {
            cols.push(v.iter().map(|x| x / norm).collect());
        }
    }
    let mut loadings = vec![0.0f32; d * m];
    for i in 0..d {
        for j in 0..m {
            loadings[i * m + j] = cols[j][i] as f32;
        }
    }
    let eigenvalues: Vec<f32> = (0..m).map(|j| (d as f32) / (2.0 + j as f32)).collect();
    let raw: Vec<f64> = (0..k).map(|_| 0.5 + rng.uniform()).collect();
    let total: f64 = raw.iter().sum();
    let weights: Vec<f32> = raw.iter().map(|w| (w / total) as f32).collect();
    let mix_means: Vec<f32> = (0..k * m).map(|_| (2.0 * rng.normal()) as f32).collect();
    let mix_variances: Vec<f32> = (0..k * m).map(|_| (0.3 + rng.uniform()) as f32).collect();
    ModelOwned {
        meta: ModelMeta {
            id: 0x1234_5678,
            schema: 0xfeed_beef_0000_0001,
            created_unix_s: 1_700_000_000,
            train_rows: 1000,
            calib_rows: 250,
            sample_period_us: 100_000,
        },
        dims: Dims {
            features: d as u16,
            components: m as u16,
            mixture: k as u16,
        },
        mean: (0..d).map(|i| i as f32 * 0.5 - 1.0).collect(),
        scale: (0..d).map(|i| 1.0 + i as f32 * 0.1).collect(),
        loadings,
        eigenvalues,
        theta: [1.0, 0.5, 0.25],
        weights,
        mix_means,
        mix_variances,
        monitor: monitor(),
        // Every mode as the global SPE centre and spread of `monitor()`.
        spe_center_by_mode: vec![0.5; k],
        spe_spread_by_mode: vec![0.3; k],
        // A residual chart with a gain per feature (one off) and a limit.
        resid_center: (0..d).map(|i| i as f32 * 0.01 - 0.05).collect(),
        resid_gain: (0..d)
            .map(|i| if i == 1 { 0.0 } else { 0.5 + i as f32 * 0.05 })
            .collect(),
        resid_limit: 1.75,
        resid_whiten: Vec::new(),
        slow_charts: Vec::new(),
        slow_limit: 1.0,
    }
}
