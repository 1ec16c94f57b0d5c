//! `plumb-scenario`: writes the plumbline demo logs.

use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

use plumb_scenario::{write_bulk_holdout, write_demo, Config, GAIN_CHANGE_BP_RANGE};

const USAGE: &str = "\
plumb-scenario: write the plumbline demo logs (invented warehouse tugger drive module)

USAGE:
    plumb-scenario --out <DIR> [OPTIONS]
    plumb-scenario --holdout-rows <N> --holdout-out <DIR> [OPTIONS]

Writes train/, holdout/ and drift/ (and truth.csv) under --out, and/or
a large nominal held-out set of --holdout-rows rows under --holdout-out.
The same seed and sizes always give byte-identical files.

OPTIONS:
    --out <DIR>              Folder for the demo set (train/, holdout/, drift/)
    --seed <N>               Master seed [default: the committed demo's seed]
    --train-rows <N>         Rows per training log [default: 6000]
    --holdout-log-rows <N>   Rows per committed held-out log [default: 6000]
    --drift-rows <N>         Rows per drift log [default: 8000]
    --drift-onset <N>        0-based row where drifts and faults start [default: 3000]
    --gain-change <PERCENT>  Gain change of the gain_change log's current reading,
                             from -50 to 100, not 0, in steps of 0.01 [default: 4]
    --holdout-rows <N>       Also write N rows of extra nominal held-out data
    --holdout-out <DIR>      Folder for that data [default: <out>/generated]
    --holdout-files <N>      Number of files to split it into
                             [default: one per 125000 rows, at least 1]
    -q, --quiet              Print nothing but errors
    -h, --help               Print this help
";

struct Args {
    out: Option<PathBuf>,
    cfg: Config,
    holdout_rows: Option<usize>,
    holdout_out: Option<PathBuf>,
    holdout_files: Option<usize>,
    quiet: bool,
}

fn parse_count(flag: &str, value: &str) -> Result<usize, String> {
    let cleaned: String = value.chars().filter(|&c| c != '_').collect();
    cleaned
        .parse::<usize>()
        .map_err(|_| format!("{flag} expects a non-negative whole number, got `{value}`"))
}

/// A percentage with at most two decimals, in hundredths of a percent
/// (`4` → 400, `-2.5` → -250), within [`GAIN_CHANGE_BP_RANGE`] and not 0.
fn parse_percent(flag: &str, value: &str) -> Result<i32, String> {
    let (lo, hi) = (GAIN_CHANGE_BP_RANGE.start(), GAIN_CHANGE_BP_RANGE.end());
    let expected = || {
        format!(
            "{flag} expects a percentage from {} to {}, not 0, with at most two decimals, got `{value}`",
            lo / 100,
            hi / 100
        )
    };
    let (neg, digits) = match value.strip_prefix('-') {
        Some(rest) => (true, rest),
        None => (false, value.strip_prefix('+').unwrap_or(value)),
    };
    let (whole, frac) = digits.split_once('.').unwrap_or((digits, ""));
    let all_digits = |s: &str| s.bytes().all(|b| b.is_ascii_digit());
    if whole.is_empty()
        || whole.len() > 3
        || frac.len() > 2
        || !all_digits(whole)
        || !all_digits(frac)
    {
        return Err(expected());
    }
    let whole: i32 = whole.parse().map_err(|_| expected())?;
    let frac: i32 = format!("{frac:0<2}").parse().map_err(|_| expected())?;
    let bp = (whole * 100 + frac) * if neg { -1 } else { 1 };
    if bp == 0 || !GAIN_CHANGE_BP_RANGE.contains(&bp) {
        return Err(expected());
    }
    Ok(bp)
}

fn parse_args(mut it: impl Iterator<Item = String>) -> Result<Option<Args>, String> {
    let mut a = Args {
        out: None,
        cfg: Config::default(),
        holdout_rows: None,
        holdout_out: None,
        holdout_files: None,
        quiet: false,
    };
    while let Some(arg) = it.next() {
        let (flag, inline) = match arg.split_once('=') {
            Some((f, v)) if f.starts_with("--") => (f.to_string(), Some(v.to_string())),
            _ => (arg.clone(), None),
        };
        let mut value = |flag: &str| -> Result<String, String> {
            match inline.clone() {
                Some(v) => Ok(v),
                None => it.next().ok_or_else(|| format!("{flag} needs a value")),
            }
        };
        match flag.as_str() {
            "-h" | "--help" => return Ok(None),
            "-q" | "--quiet" => a.quiet = true,
            "--out" => a.out = Some(PathBuf::from(value(&flag)?)),
            "--seed" => {
                let v = value(&flag)?;
                a.cfg.seed = v.parse::<u64>().map_err(|_| {
                    format!(
                        "--seed expects a whole number from 0 to {}, got `{v}`",
                        u64::MAX
                    )
                })?;
            }
            "--train-rows" => a.cfg.train_rows_per_log = parse_count(&flag, &value(&flag)?)?,
            "--holdout-log-rows" => {
                a.cfg.holdout_rows_per_log = parse_count(&flag, &value(&flag)?)?
            }
            "--drift-rows" => a.cfg.drift_rows = parse_count(&flag, &value(&flag)?)?,
            "--drift-onset" => a.cfg.drift_onset = parse_count(&flag, &value(&flag)?)?,
            "--gain-change" => a.cfg.gain_change_bp = parse_percent(&flag, &value(&flag)?)?,
            "--holdout-rows" => a.holdout_rows = Some(parse_count(&flag, &value(&flag)?)?),
            "--holdout-out" => a.holdout_out = Some(PathBuf::from(value(&flag)?)),
            "--holdout-files" => a.holdout_files = Some(parse_count(&flag, &value(&flag)?)?),
            other => return Err(format!("unknown argument `{other}` (see --help)")),
        }
    }
    check_sizes(&a)?;
    if a.out.is_none() && a.holdout_rows.is_none() {
        return Err(
            "nothing to do: give --out <DIR> and/or --holdout-rows <N> (see --help)".into(),
        );
    }
    if a.holdout_rows.is_none() && (a.holdout_out.is_some() || a.holdout_files.is_some()) {
        return Err("--holdout-out and --holdout-files need --holdout-rows <N>".into());
    }
    if a.holdout_rows.is_some() && a.holdout_out.is_none() && a.out.is_none() {
        return Err(
            "--holdout-rows needs --holdout-out <DIR> (or --out <DIR>, to use <DIR>/generated)"
                .into(),
        );
    }
    Ok(Some(a))
}

/// The sizes, checked before anything is written; errors name the option.
fn check_sizes(a: &Args) -> Result<(), String> {
    let c = &a.cfg;
    if c.train_rows_per_log == 0 {
        return Err("--train-rows must be at least 1".into());
    }
    if c.holdout_rows_per_log == 0 {
        return Err("--holdout-log-rows must be at least 1".into());
    }
    if c.drift_onset == 0 || c.drift_onset >= c.drift_rows {
        return Err(format!(
            "--drift-onset ({}) must be at least 1 and below --drift-rows ({})",
            c.drift_onset, c.drift_rows
        ));
    }
    if a.holdout_rows == Some(0) {
        return Err("--holdout-rows must be at least 1".into());
    }
    match (a.holdout_files, a.holdout_rows) {
        (Some(0), _) => return Err("--holdout-files must be at least 1".into()),
        (Some(f), Some(r)) if f > r => {
            return Err(format!(
                "--holdout-files ({f}) must not exceed --holdout-rows ({r}): each file needs a row"
            ))
        }
        _ => {}
    }
    Ok(())
}

fn file_summary(path: &std::path::Path) -> String {
    let size = std::fs::metadata(path).map(|m| m.len()).unwrap_or(0);
    format!("{} ({:.2} MB)", path.display(), size as f64 / 1e6)
}

fn run(a: Args) -> Result<(), String> {
    if let Some(out) = &a.out {
        let start = Instant::now();
        let m = write_demo(out, &a.cfg)
            .map_err(|e| format!("writing the demo set under {}: {e}", out.display()))?;
        if !a.quiet {
            println!("demo set (seed {}):", a.cfg.seed);
            for p in m.train.iter().chain(&m.holdout) {
                println!("  {}", file_summary(p));
            }
            for t in &m.drift {
                println!(
                    "  {}  [{} from row {}]",
                    file_summary(&t.file),
                    t.kind.as_str(),
                    t.onset_row
                );
            }
            println!("  {}", out.join("truth.csv").display());
            println!("done in {:.2} s", start.elapsed().as_secs_f64());
        }
    }
    if let Some(rows) = a.holdout_rows {
        let dir = match (&a.holdout_out, &a.out) {
            (Some(d), _) => d.clone(),
            (None, Some(o)) => o.join("generated"),
            (None, None) => unreachable!("checked while parsing"),
        };
        let files = a
            .holdout_files
            .unwrap_or_else(|| rows.div_ceil(125_000).max(1));
        let start = Instant::now();
        let paths = write_bulk_holdout(&dir, a.cfg.seed, rows, files)
            .map_err(|e| format!("writing {rows} held-out rows under {}: {e}", dir.display()))?;
        if !a.quiet {
            let plural = if paths.len() == 1 { "" } else { "s" };
            println!(
                "bulk held-out set: {rows} rows in {} file{plural}",
                paths.len()
            );
            for p in &paths {
                println!("  {}", file_summary(p));
            }
            println!("done in {:.2} s", start.elapsed().as_secs_f64());
        }
    }
    Ok(())
}

fn main() -> ExitCode {
    match parse_args(std::env::args().skip(1)) {
        Ok(None) => {
            print!("{USAGE}");
            ExitCode::SUCCESS
        }
        Ok(Some(a)) => match run(a) {
            Ok(()) => ExitCode::SUCCESS,
            Err(e) => {
                eprintln!("plumb-scenario: error: {e}");
                ExitCode::FAILURE
            }
        },
        Err(e) => {
            eprintln!("plumb-scenario: error: {e}");
            ExitCode::from(2)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn err(args: &[&str]) -> String {
        match parse_args(args.iter().map(|s| s.to_string())) {
            Err(e) => e,
            Ok(_) => panic!("{args:?} accepted"),
        }
    }

    #[test]
    fn bad_sizes_name_the_option() {
        let cases: [(&[&str], &str); 7] = [
            (
                &["--out", "d", "--train-rows", "0"],
                "--train-rows must be at least 1",
            ),
            (
                &["--out", "d", "--holdout-log-rows=0"],
                "--holdout-log-rows",
            ),
            (
                &["--out", "d", "--drift-onset", "9000"],
                "--drift-onset (9000)",
            ),
            (&["--out", "d", "--drift-onset", "0"], "--drift-onset"),
            (
                &["--holdout-rows", "0", "--holdout-out", "d"],
                "--holdout-rows",
            ),
            (
                &[
                    "--holdout-rows",
                    "10",
                    "--holdout-out",
                    "d",
                    "--holdout-files",
                    "0",
                ],
                "--holdout-files must be at least 1",
            ),
            (
                &[
                    "--holdout-rows",
                    "3",
                    "--holdout-out",
                    "d",
                    "--holdout-files",
                    "4",
                ],
                "--holdout-files (4)",
            ),
        ];
        for (args, want) in cases {
            let e = err(args);
            assert!(e.contains(want), "{args:?}: {e}");
            assert!(!e.contains("_per_log"), "{e}");
        }
        assert!(parse_args(["--out", "d"].iter().map(|s| s.to_string())).is_ok());
    }

    #[test]
    fn gain_change_is_read_in_hundredths_of_a_percent() {
        let bp = |v: &str| parse_percent("--gain-change", v);
        assert_eq!(bp("4"), Ok(400));
        assert_eq!(bp("+4"), Ok(400));
        assert_eq!(bp("6.5"), Ok(650));
        assert_eq!(bp("0.01"), Ok(1));
        assert_eq!(bp("-2.25"), Ok(-225));
        assert_eq!(bp("100"), Ok(10_000));
        assert_eq!(bp("-50"), Ok(-5_000));
        for bad in [
            "0", "0.00", "-0", "100.01", "-50.5", "1.234", "", ".5", "4%", "1e1", "--4", "x",
        ] {
            let e = bp(bad).unwrap_err();
            assert!(
                e.contains("--gain-change expects a percentage from -50 to 100"),
                "{bad}: {e}"
            );
        }
        let a = parse_args(
            ["--out", "d", "--gain-change=10"]
                .iter()
                .map(|s| s.to_string()),
        )
        .unwrap()
        .unwrap();
        assert_eq!(a.cfg.gain_change_bp, 1_000);
        assert_eq!(a.cfg.gain_change_factor(), 1.1);
        assert_eq!(Config::default().gain_change_factor(), 1.04);
    }
}
