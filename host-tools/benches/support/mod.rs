//! Timing helpers shared by the benches.

use std::hint::black_box;
use std::time::Instant;

/// CPU seconds of this process so far (user + system, all threads), from
/// `/proc/self/stat` (Linux; 0 elsewhere). Other jobs on the machine slow
/// the wall clock but not this.
pub fn cpu_seconds() -> f64 {
    let Ok(stat) = std::fs::read_to_string("/proc/self/stat") else {
        return 0.0;
    };
    // Fields after the command name, which ends at the last ')'.
    let rest = &stat[stat.rfind(')').map_or(0, |p| p + 2)..];
    let f: Vec<&str> = rest.split_whitespace().collect();
    let ticks: f64 = f[11].parse::<f64>().unwrap_or(0.0) + f[12].parse::<f64>().unwrap_or(0.0);
    ticks / 100.0
}

/// Best wall-clock seconds of `reps` runs, and mean CPU seconds per run.
pub fn best_of<T>(reps: usize, mut f: impl FnMut() -> T) -> (f64, f64) {
    let mut best = f64::INFINITY;
    let cpu0 = cpu_seconds();
    for _ in 0..reps {
        let t = Instant::now();
        black_box(f());
        best = best.min(t.elapsed().as_secs_f64());
    }
    (best, (cpu_seconds() - cpu0) / reps as f64)
}
