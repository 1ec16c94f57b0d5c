//! Writes a synthetic log for timing `plumb fit` on big inputs:
//! `cargo run --release -p plumb --example synth_log -- OUT.csv ROWS FEATURES [SEED]`.
//! Four autocorrelated latent factors (AR(1), φ = 0.95) drive the features
//! through fixed random loadings, plus independent noise; 100 Hz time stamps.

use plumb::rng::Rng;
use std::io::{BufWriter, Write};

fn main() -> std::io::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    if args.len() < 4 {
        eprintln!("usage: synth_log OUT.csv ROWS FEATURES [SEED]");
        std::process::exit(2);
    }
    let rows: usize = args[2].parse().expect("ROWS");
    let d: usize = args[3].parse().expect("FEATURES");
    let seed: u64 = args.get(4).map_or(1, |s| s.parse().expect("SEED"));
    let mut rng = Rng::new(seed, 0);
    let factors = 4;
    let load: Vec<f64> = (0..d * factors).map(|_| rng.normal()).collect();
    let mut lat = vec![0.0f64; factors];
    let phi = 0.95f64;
    let innov = (1.0 - phi * phi).sqrt();
    let mut w = BufWriter::with_capacity(1 << 20, std::fs::File::create(&args[1])?);
    write!(w, "t[s]")?;
    for j in 0..d {
        write!(w, ",f{j:02}[V]")?;
    }
    writeln!(w)?;
    let mut line = String::with_capacity(16 * d);
    for i in 0..rows {
        for l in lat.iter_mut() {
            *l = phi * *l + innov * rng.normal();
        }
        line.clear();
        use std::fmt::Write as _;
        let _ = write!(line, "{}.{:02}", i / 100, i % 100);
        for j in 0..d {
            let mut v = 10.0 * j as f64 + 0.3 * rng.normal();
            for (f, l) in lat.iter().enumerate() {
                v += load[j * factors + f] * l;
            }
            let _ = write!(line, ",{v:.4}");
        }
        line.push('\n');
        w.write_all(line.as_bytes())?;
    }
    w.flush()
}
