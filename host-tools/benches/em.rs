//! Cost of the mixture fit on latent scores, printed as figures (not a test).
//!
//! `cargo bench -p plumb --bench em`
//!
//! 10⁶ rows × 8 latent dimensions drawn from 4 well separated diagonal
//! Gaussians (the shape of `bench/fit_vs_sklearn.py`). Figures: wall-clock
//! milliseconds per EM iteration (fixed iteration count, `tol` = 0), per
//! initialisation (k-means++, Lloyd, hard M step) and per full
//! `gmm::fit` with 4 restarts, best of three, on one and two threads.

use plumb::gmm::{self, EmOptions, FitOptions};
use plumb::rng::Rng;

mod support;
use support::best_of;

fn main() {
    let (n, m, k) = (1_000_000usize, 8usize, 4usize);
    let mut rng = Rng::new(11, 0);
    let centres: Vec<f64> = (0..k * m).map(|_| 3.0 * rng.normal()).collect();
    let mut data = Vec::with_capacity(n * m);
    for _ in 0..n {
        let c = rng.below(k as u64) as usize;
        for j in 0..m {
            data.push(centres[c * m + j] + (1.0 + 0.2 * j as f64) * rng.normal());
        }
    }
    let floor: Vec<f64> = gmm::column_variances(&data, m)
        .iter()
        .map(|v| 1e-3 * v)
        .collect();
    println!("{n} rows x {m} dimensions, k = {k}; best of 3, wall-clock");
    println!("| threads | ms per EM iteration (CPU ms) | ms per initialisation (CPU ms) | s per fit, 4 restarts (CPU s) | iterations per fit |");
    println!("|---|---|---|---|---|");
    for threads in [1, 2] {
        let em = EmOptions {
            tol: 0.0,
            max_iter: 5,
            floor: floor.clone(),
            threads,
            ..EmOptions::default()
        };
        let init = gmm::initialise(&data, m, k, &mut Rng::new(1, 0), &em);
        let tiled = gmm::Tiled::copy_rows(&data, m);
        let (iter, iter_cpu) = best_of(3, || gmm::em_tiled(&tiled, init.clone(), &em));
        let per = 1e3 / em.max_iter as f64;
        let (t_init, init_cpu) =
            best_of(3, || gmm::initialise(&data, m, k, &mut Rng::new(1, 0), &em));
        let opts = FitOptions {
            k,
            restarts: 4,
            seed: 7,
            em: EmOptions {
                tol: 1e-3,
                max_iter: 100,
                ..em.clone()
            },
        };
        let mut iters = 0;
        let (t_fit, fit_cpu) = best_of(3, || {
            iters = 0;
            gmm::fit_tiled(&tiled, &opts, &mut |_, _, _| iters += 1)
        });
        println!(
            "| {threads} | {:.1} ({:.0}) | {:.1} ({:.0}) | {:.3} ({:.2}) | {iters} |",
            iter * per,
            iter_cpu * per,
            t_init * 1e3,
            init_cpu * 1e3,
            t_fit,
            fit_cpu
        );
    }
}
