//! Host cost of `Detector::update`, printed as figures (not a test).
//!
//! `cargo bench -p plumb-firmware --bench update`
//!
//! For each (d, m, k) the detector runs over a fixed set of pre-generated
//! samples many times; the figure is wall-clock nanoseconds per update,
//! best of five repetitions, beside the multiply-add count per sample
//! (2dm + 3km, see the crate docs).

#[path = "../../shared-model/tests/support/mod.rs"]
mod support;

use plumb_firmware::Detector;
use std::hint::black_box;
use std::time::Instant;
use support::{example_model, Rng};

fn main() {
    println!(
        "| d | m | k | multiply-adds 2dm+3km | ns per update (best of 5) | ns per multiply-add |"
    );
    println!("|---|---|---|---|---|---|");
    for (d, m, k) in [(8, 3, 2), (32, 8, 4), (64, 16, 8)] {
        let model = example_model(d, m, k, 1);
        let mut det = Detector::new(model.to_device().unwrap()).unwrap();
        let mut rng = Rng(5);
        let samples: Vec<Vec<f32>> = (0..4096)
            .map(|_| {
                (0..d)
                    .map(|i| model.mean[i] + model.scale[i] * rng.normal() as f32)
                    .collect()
            })
            .collect();
        let reps = 200_000 / samples.len().max(1) + 1;
        let mut best = f64::INFINITY;
        for _ in 0..5 {
            let start = Instant::now();
            for _ in 0..reps {
                for x in &samples {
                    black_box(det.update(black_box(x)));
                }
            }
            let ns = start.elapsed().as_nanos() as f64 / (reps * samples.len()) as f64;
            best = best.min(ns);
        }
        let macs = 2 * d * m + 3 * k * m;
        println!(
            "| {d} | {m} | {k} | {macs} | {best:.1} | {:.3} |",
            best / macs as f64
        );
    }
}
