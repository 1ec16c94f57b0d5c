//! Throughput of the CSV passes of `plumb fit`, printed as figures (not a
//! test).
//!
//! `cargo bench -p plumb --bench csv -- FILE.csv [threads]`
//!
//! `FILE.csv` is any log without a time column, e.g. the 10⁶ × 32 rows that
//! `bench/fit_vs_sklearn.py --keep DIR` leaves in `DIR/rows.csv`. Each pass
//! reads the whole file: counting lines, parsing only, parsing with the
//! moments of pass 1, parsing with the projection of pass 2 (8 components).
//! Figures: MiB/s of wall clock (best of three) and CPU seconds per pass
//! (all threads; other jobs on the machine slow the first, not the second).

use plumb::logs::{LogSet, ReadOptions, Selection};
use plumb::pca::{Moments, Pca};
use plumb::progress::Progress;
use std::hint::black_box;
use std::path::PathBuf;

mod support;
use support::best_of;

/// Moments of every row of `set`, as pass 1 computes them.
fn moments(set: &LogSet, all: &Selection, stage: &plumb::progress::Stage) -> Moments {
    let d = set.features();
    let mut mo = Moments::new(d);
    set.scan(
        all,
        stage,
        |c| Ok(Moments::from_rows(&c.values, d)),
        |m, _| {
            mo.merge(&m);
            Ok(())
        },
    )
    .expect("scan");
    mo
}

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| a != "--bench")
        .collect();
    let Some(path) = args.first() else {
        eprintln!("usage: cargo bench -p plumb --bench csv -- FILE.csv [threads]");
        return;
    };
    let threads: usize = args.get(1).and_then(|t| t.parse().ok()).unwrap_or(2);
    let opts = ReadOptions {
        time_column: None,
        threads,
        ..ReadOptions::default()
    };
    let set = LogSet::open(&[PathBuf::from(path)], opts).expect("open");
    let mib = set.total_bytes() as f64 / f64::from(1 << 20);
    let d = set.features();
    let all = Selection::all(1);
    let progress = Progress::hidden();
    let stage = || progress.stage("bench", set.total_bytes(), true);
    let pca = Pca::from_moments(&moments(&set, &all, &stage())).expect("pca");
    let m = 8.min(d - 1);
    println!("{path}: {mib:.0} MiB, {d} features, {threads} threads");
    println!("| pass | MiB/s (best of 3) | CPU s per pass |");
    println!("|---|---|---|");
    let run = |name: &str, f: &mut dyn FnMut()| {
        let (best, cpu) = best_of(3, f);
        println!("| {name} | {:.0} | {cpu:.2} |", mib / best);
    };
    run("count lines", &mut || {
        black_box(set.count_lines(&stage()).expect("count"));
    });
    run("parse", &mut || {
        let mut rows = 0;
        set.scan(
            &all,
            &stage(),
            |c| Ok(c.rows()),
            |r, _| {
                rows += r;
                Ok(())
            },
        )
        .expect("scan");
        black_box(rows);
    });
    run("parse + moments", &mut || {
        black_box(moments(&set, &all, &stage()));
    });
    run("parse + projection", &mut || {
        let latent = plumb::fit::project_rows(&set, &all, &stage(), &pca, m, 0).expect("scan");
        black_box(latent);
    });
}
