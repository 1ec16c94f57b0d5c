//! `plumb-board-mps2-bench`: instructions per sample of `Detector::update` on
//! the emulated Cortex-M4F, for synthetic models built here and for the
//! built-in model. Run it under QEMU with `-icount shift=0,align=off,sleep=off`
//! (`bench.sh` does), where one SysTick tick is exactly 40 instructions.
//!
//! For each model: 256 updates to pass warm-up, then [`SAMPLES`] timed
//! updates of pseudo-random samples (no faults); the same for
//! `Detector::score` alone (projection and scores, no statistics). Output,
//! one line per model:
//!
//! `bench model=NAME d=N m=N k=N macs=N samples=N update_ticks=N update_instructions_per_sample=N score_instructions_per_sample=N`
//!
//! then `bench-done calib_ticks=N` (a loop of 4,000,002 instructions, which
//! must read 100000 under `-icount`), and the run ends with exit status 0.

#![no_std]
#![no_main]

use core::hint::black_box;
use cortex_m_rt::entry;
use embedded_io::Write;
use plumb_board_mps2::text::{write_dec, write_field};
use plumb_board_mps2::ticks::{Ticks, INSTRUCTIONS_PER_TICK};
use plumb_board_mps2::uart::Uart0;
use plumb_board_mps2::{semihost, Board};
use plumb_firmware::plumb_model::{Dims, Model, ModelMeta, MonitorParams, ScoreLimits};
use plumb_firmware::Detector;

/// Timed updates per model.
const SAMPLES: u32 = 2000;

static BUILTIN_MODEL: &[u8] = include_bytes!(concat!(env!("OUT_DIR"), "/builtin.plumb"));

/// A small deterministic generator (64-bit LCG, top bits).
struct Lcg(u64);

impl Lcg {
    fn next(&mut self) -> f32 {
        self.0 = self
            .0
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        // Uniform in [-2, 2).
        // 24 bits, exact in f32; through u32, so no u64 → float library call
        // shows up in the profile beside the detector's.
        (((self.0 >> 40) as u32) as f32 / (1u32 << 24) as f32) * 4.0 - 2.0
    }
}

fn limits() -> ScoreLimits {
    ScoreLimits {
        sample_limit: 10.0,
        center: 1.0,
        spread: 0.3,
        cusum_slack: 0.5,
        cusum_limit: 100.0,
        ewma_limit: 3.0,
    }
}

/// Fills `model` (in place: at the capacities a model is 22 KiB, more than
/// the stack should carry by value) with a valid dense model of the given
/// size: every loading, mean and variance non-trivial, so no arithmetic is
/// skipped.
fn synthetic(
    model: &mut Model,
    d: usize,
    m: usize,
    k: usize,
    whiten: bool,
    slow: usize,
) -> Option<()> {
    let mut rng = Lcg(0x5eed ^ (d * 1000 + m * 10 + k) as u64);
    *model = Model {
        meta: ModelMeta {
            id: 1,
            schema: 0,
            created_unix_s: 0,
            train_rows: 0,
            calib_rows: 0,
            sample_period_us: 0,
        },
        dims: Dims {
            features: d as u16,
            components: m as u16,
            mixture: k as u16,
        },
        mean: heapless::Vec::new(),
        scale: heapless::Vec::new(),
        loadings: heapless::Vec::new(),
        eigenvalues: heapless::Vec::new(),
        theta: [1.0, 0.5, 0.25],
        weights: heapless::Vec::new(),
        mix_means: heapless::Vec::new(),
        mix_variances: heapless::Vec::new(),
        monitor: MonitorParams {
            fault_z: 50.0,
            warmup: 50,
            ewma_lambda: 0.1,
            raise_dwell: 3,
            clear_dwell: 50,
            min_hold: 100,
            clear_fraction: 0.5,
            spe: limits(),
            t2: limits(),
            nll: limits(),
        },
        spe_center_by_mode: heapless::Vec::new(),
        spe_spread_by_mode: heapless::Vec::new(),
        resid_center: heapless::Vec::new(),
        resid_gain: heapless::Vec::new(),
        resid_limit: 3.0,
        resid_whiten: heapless::Vec::new(),
        slow_charts: heapless::Vec::new(),
        slow_limit: 1.0,
    };
    for _ in 0..d {
        model.mean.push(rng.next() * 0.1).ok()?;
        model.scale.push(1.0 + rng.next() * 0.1).ok()?;
    }
    let norm = 1.0 / libm::sqrtf(d as f32);
    for _ in 0..d * m {
        model.loadings.push(rng.next() * norm).ok()?;
    }
    for j in 0..m {
        model.eigenvalues.push(4.0 / (j as f32 + 1.0)).ok()?;
    }
    for _ in 0..k {
        model.weights.push(1.0 / k as f32).ok()?;
        model.spe_center_by_mode.push(1.0 + rng.next() * 0.1).ok()?;
        model.spe_spread_by_mode.push(0.3 + rng.next() * 0.1).ok()?;
    }
    for _ in 0..k * m {
        model.mix_means.push(rng.next() * 0.5).ok()?;
        model.mix_variances.push(1.0 + rng.next() * 0.2).ok()?;
    }
    // The residual chart on for every feature (fixed values, so the random
    // parameters above stay those of earlier measurements).
    for i in 0..d {
        model.resid_center.push(0.01 * i as f32).ok()?;
        model.resid_gain.push(0.5 + 0.01 * i as f32).ok()?;
    }
    // A dense whitening matrix (format 4, as `plumb fit` writes by default):
    // unit diagonal, small off-diagonal entries.
    if whiten {
        for i in 0..d {
            for j in 0..d {
                let w = if i == j { 1.0 } else { 0.1 * rng.next() };
                model.resid_whiten.push(w).ok()?;
            }
        }
    }
    // Slow charts (format 5, as `plumb tailor` adds them) on `slow`
    // features spread over the model.
    for s in 0..slow {
        let i = s * d / slow.max(1);
        for v in [i as f32, 0.005, 0.01, 2.0] {
            model.slow_charts.push(v).ok()?;
        }
    }
    Some(())
}

/// Ticks for `SAMPLES` updates (after warm-up) and for `SAMPLES` scorings.
fn measure(ticks: &Ticks, det: &mut Detector, d: usize) -> (u64, u64) {
    let mut rng = Lcg(42);
    let mut x = [0f32; 64];
    // Samples around the model's own mean, within two scales: scored, never
    // a sensor fault.
    let (mean, scale) = (det.model().mean.clone(), det.model().scale.clone());
    let fill = |x: &mut [f32; 64], rng: &mut Lcg| {
        for ((v, mu), s) in x.iter_mut().zip(&mean).zip(&scale).take(d) {
            *v = mu + s * rng.next();
        }
    };
    for _ in 0..256 {
        fill(&mut x, &mut rng);
        black_box(det.update(black_box(&x[..d])));
    }
    // Samples are generated outside the timed region.
    let mut samples = [[0f32; 64]; 16];
    let mut update = 0;
    let mut score = 0;
    for _ in 0..SAMPLES / 16 {
        for s in samples.iter_mut() {
            fill(s, &mut rng);
        }
        let ((), t) = ticks.measure(|| {
            for s in samples.iter() {
                black_box(det.update(black_box(&s[..d])));
            }
        });
        update += t;
        let ((), t) = ticks.measure(|| {
            for s in samples.iter() {
                let _ = black_box(det.score(black_box(&s[..d])));
            }
        });
        score += t;
    }
    (update, score)
}

fn report(uart: &mut Uart0, name: &str, det: &mut Detector, ticks: &Ticks) {
    let dims = det.model().dims;
    let (d, m, k) = (
        usize::from(dims.features),
        usize::from(dims.components),
        usize::from(dims.mixture),
    );
    let (update, score) = measure(ticks, det, d);
    let slow = det.model().slow_charts.len() / plumb_firmware::plumb_model::SLOW_PARAMS;
    let whitened = usize::from(!det.model().resid_whiten.is_empty());
    let per = |t: u64| t * u64::from(INSTRUCTIONS_PER_TICK) / u64::from(SAMPLES);
    let _ = uart.write_all(b"bench model=");
    let _ = uart.write_all(name.as_bytes());
    for (key, v) in [
        ("d", d as u64),
        ("m", m as u64),
        ("k", k as u64),
        ("whitened", whitened as u64),
        ("slow", slow as u64),
        // A whitening matrix adds d² multiply-adds; a slow chart adds none
        // (it takes its feature's input from the residual chart's walk,
        // `score::chart_step`).
        (
            "macs",
            (2 * d * m + 3 * k * m + det.model().resid_whiten.len()) as u64,
        ),
        ("samples", u64::from(SAMPLES)),
        ("update_ticks", update),
        ("update_instructions_per_sample", per(update)),
        ("score_instructions_per_sample", per(score)),
    ] {
        let _ = write_field(uart, key, v);
    }
    let _ = uart.write_all(b"\n");
}

#[entry]
fn main() -> ! {
    let Board {
        mut uart, ticks, ..
    } = Board::take();
    // One detector place, filled in place for each model.
    let Some(det) = cortex_m::singleton!(: Detector = Detector::EMPTY) else {
        semihost::exit_failure()
    };
    for (d, m, k, whiten, slow) in [
        (32, 8, 4, false, 0),
        (64, 16, 8, false, 0),
        (32, 8, 4, true, 0),
        (64, 16, 8, true, 0),
        (32, 8, 4, true, 8),
        (64, 16, 8, true, 16),
    ] {
        let mut built = Some(());
        match det.load_with(|model| built = synthetic(model, d, m, k, whiten, slow)) {
            Ok(()) if built.is_some() => report(&mut uart, "synthetic", det, &ticks),
            _ => {
                let _ = uart.write_all(b"bench synthetic model refused\n");
                semihost::exit_failure()
            }
        }
    }
    match det.load(BUILTIN_MODEL) {
        Ok(()) => report(&mut uart, "builtin", det, &ticks),
        Err(_) => {
            let _ = uart.write_all(b"bench built-in model refused\n");
            semihost::exit_failure()
        }
    }
    let ((), calib) = ticks.measure(|| cortex_m::asm::delay(1_999_999));
    let _ = uart.write_all(b"bench-done calib_ticks=");
    let _ = write_dec(&mut uart, calib);
    let _ = uart.write_all(b"\n");
    let _ = uart.flush();
    semihost::exit_success()
}
