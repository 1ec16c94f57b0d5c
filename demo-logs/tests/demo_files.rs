//! File-level checks of the demo set: determinism, CSV convention, ground
//! truth, injected effects.

use std::fs;
use std::path::{Path, PathBuf};

use plumb_scenario::{
    drift_robot, feature_table, header_line, read_truth, write_bulk_holdout, write_demo,
    write_robot_logs, Config, Manifest, TruthKind, DEMO_SEED, SAMPLE_PERIOD_S,
};

fn scratch(name: &str) -> PathBuf {
    let dir =
        std::env::temp_dir().join(format!("plumb-scenario-test-{}-{name}", std::process::id()));
    let _ = fs::remove_dir_all(&dir);
    fs::create_dir_all(&dir).unwrap();
    dir
}

/// All checks on the default demo set share one generated copy, removed at
/// the end.
#[test]
fn default_demo_set() {
    let dir = scratch("default");
    let m = write_demo(&dir, &Config::default()).unwrap();
    let d = (dir.clone(), m);
    header_follows_the_convention(&d);
    time_column_counts_tenths(&d);
    nominal_logs_contain_no_nan(&d);
    truth_table_points_at_real_rows(&d);
    dropout_is_nan_only_from_onset_and_only_in_its_features(&d);
    gain_change_shifts_the_left_right_current_ratio_by_four_percent(&d);
    drift_logs_ramp_or_step_where_declared(&d);
    committed_demo_matches_the_generator(&d);
    fs::remove_dir_all(&dir).unwrap();
}

type Demo = (PathBuf, Manifest);

struct Log {
    header: Vec<String>,
    rows: Vec<Vec<f32>>,
}

fn read_log(path: &Path) -> Log {
    let text = fs::read_to_string(path).unwrap();
    assert!(!text.contains('\r'), "{}: CR in file", path.display());
    assert!(text.ends_with('\n'), "{}: no final newline", path.display());
    let mut lines = text.lines();
    let header: Vec<String> = lines
        .next()
        .unwrap()
        .split(',')
        .map(str::to_string)
        .collect();
    let rows = lines
        .enumerate()
        .map(|(i, l)| {
            let cells: Vec<f32> = l
                .split(',')
                .map(|c| {
                    c.parse::<f32>()
                        .unwrap_or_else(|_| panic!("{}: row {i}: bad cell `{c}`", path.display()))
                })
                .collect();
            assert_eq!(
                cells.len(),
                header.len(),
                "{}: row {i} has {} cells",
                path.display(),
                cells.len()
            );
            cells
        })
        .collect();
    Log { header, rows }
}

fn col(log: &Log, name: &str) -> usize {
    log.header
        .iter()
        .position(|h| h == name || h.starts_with(&format!("{name}[")))
        .unwrap_or_else(|| panic!("no column {name}"))
}

fn all_files(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for sub in ["train", "holdout", "drift"] {
        let mut v: Vec<PathBuf> = fs::read_dir(dir.join(sub))
            .unwrap()
            .map(|e| e.unwrap().path())
            .collect();
        v.sort();
        out.extend(v);
    }
    out.push(dir.join("truth.csv"));
    out
}

#[test]
fn same_seed_gives_identical_bytes_and_other_seed_differs() {
    let small = Config {
        seed: 99,
        train_rows_per_log: 700,
        holdout_rows_per_log: 500,
        drift_rows: 900,
        drift_onset: 400,
        gain_change_bp: 400,
    };
    let a = scratch("det-a");
    let b = scratch("det-b");
    let c = scratch("det-c");
    write_demo(&a, &small).unwrap();
    write_demo(&b, &small).unwrap();
    write_demo(
        &c,
        &Config {
            seed: 100,
            ..small.clone()
        },
    )
    .unwrap();
    let fa = all_files(&a);
    assert_eq!(fa.len(), 6 + 2 + 5 + 1);
    for p in &fa {
        let rel = p.strip_prefix(&a).unwrap();
        let x = fs::read(p).unwrap();
        assert_eq!(
            x,
            fs::read(b.join(rel)).unwrap(),
            "{} differs between runs",
            rel.display()
        );
        if rel.extension().is_some_and(|e| e == "csv") && !rel.ends_with("truth.csv") {
            assert_ne!(
                x,
                fs::read(c.join(rel)).unwrap(),
                "{} does not depend on the seed",
                rel.display()
            );
        }
    }
    for d in [a, b, c] {
        fs::remove_dir_all(d).unwrap();
    }
}

/// The gain change option changes the one log it names, and only after its
/// onset, by the factor asked for: each reading after the onset is the
/// default log's times 1.10 / 1.04, within the rounding of the written
/// values (three decimals: ±0.0005 on each side).
#[test]
fn the_gain_change_option_scales_one_reading_after_the_onset() {
    let small = Config {
        seed: 5,
        train_rows_per_log: 50,
        holdout_rows_per_log: 50,
        drift_rows: 900,
        drift_onset: 400,
        ..Config::default()
    };
    let a = scratch("gain-a");
    let b = scratch("gain-b");
    write_demo(&a, &small).unwrap();
    write_demo(
        &b,
        &Config {
            gain_change_bp: 1_000,
            ..small.clone()
        },
    )
    .unwrap();
    for p in all_files(&a) {
        let rel = p.strip_prefix(&a).unwrap();
        if !rel.ends_with("gain_change.csv") {
            assert_eq!(
                fs::read(&p).unwrap(),
                fs::read(b.join(rel)).unwrap(),
                "{}",
                rel.display()
            );
        }
    }
    let rows = |dir: &std::path::Path| -> Vec<Vec<String>> {
        fs::read_to_string(dir.join("drift").join("gain_change.csv"))
            .unwrap()
            .lines()
            .map(|l| l.split(',').map(str::to_string).collect())
            .collect()
    };
    let (ra, rb) = (rows(&a), rows(&b));
    let col = ra[0]
        .iter()
        .position(|c| c == "motor_current_left[A]")
        .unwrap();
    assert_eq!(ra.len(), 901);
    let ratio = 1.10 / 1.04;
    let mut checked = 0;
    for (i, (x, y)) in ra.iter().zip(&rb).enumerate().skip(1) {
        let row = i - 1;
        for (j, (u, v)) in x.iter().zip(y).enumerate() {
            if j != col || row < small.drift_onset {
                assert_eq!(u, v, "row {row} column {j}");
            }
        }
        if row >= small.drift_onset {
            let (u, v): (f64, f64) = (x[col].parse().unwrap(), y[col].parse().unwrap());
            // |v - ratio u| <= 0.0005 (v's rounding) + ratio * 0.0005 (u's).
            assert!(
                (v - ratio * u).abs() <= 0.0005 * (1.0 + ratio) + 1e-12,
                "row {row}: {u} {v}"
            );
            checked += usize::from(u > 1.0);
        }
    }
    assert!(checked > 50, "only {checked} rows with a current above 1 A");
    let e = write_demo(
        &a,
        &Config {
            gain_change_bp: 0,
            ..small.clone()
        },
    )
    .unwrap_err();
    assert!(e.to_string().contains("gain_change_bp (0)"), "{e}");
    for d in [a, b] {
        fs::remove_dir_all(d).unwrap();
    }
}

fn header_follows_the_convention(demo: &Demo) {
    let (_, m) = demo;
    let expected = header_line();
    assert!(expected.starts_with("t[s],"));
    let cols: Vec<&str> = expected.split(',').collect();
    assert_eq!(cols.len(), 1 + feature_table().len());
    for (c, (name, unit, _)) in cols[1..].iter().zip(feature_table()) {
        let want = if unit.is_empty() {
            name.to_string()
        } else {
            format!("{name}[{unit}]")
        };
        assert_eq!(*c, want);
        assert!(name
            .bytes()
            .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'_'));
    }
    assert!(
        feature_table().iter().any(|f| f.1.is_empty()),
        "no unitless feature"
    );
    let files = m
        .train
        .iter()
        .chain(&m.holdout)
        .cloned()
        .chain(m.drift.iter().map(|t| t.file.clone()));
    for f in files {
        let text = fs::read_to_string(&f).unwrap();
        assert_eq!(text.lines().next().unwrap(), expected, "{}", f.display());
    }
}

fn time_column_counts_tenths(demo: &Demo) {
    let (_, m) = demo;
    let log = read_log(&m.train[0]);
    assert_eq!(log.rows.len(), Config::default().train_rows_per_log);
    for (i, r) in log.rows.iter().enumerate() {
        assert_eq!(r[0], (i as f64 * SAMPLE_PERIOD_S) as f32);
    }
}

fn nominal_logs_contain_no_nan(demo: &Demo) {
    let (_, m) = demo;
    for f in m.train.iter().chain(&m.holdout) {
        let log = read_log(f);
        assert!(
            log.rows.iter().flatten().all(|v| v.is_finite()),
            "{}",
            f.display()
        );
    }
    for t in m.drift.iter().filter(|t| t.kind == TruthKind::Drift) {
        let log = read_log(&t.file);
        assert!(
            log.rows.iter().flatten().all(|v| v.is_finite()),
            "{}",
            t.file.display()
        );
    }
}

fn truth_table_points_at_real_rows(demo: &Demo) {
    let (dir, m) = demo;
    let truth = read_truth(&dir.join("truth.csv")).unwrap();
    assert_eq!(truth, m.drift);
    let names: Vec<&str> = truth.iter().map(|t| t.scenario.as_str()).collect();
    assert_eq!(
        names,
        [
            "bearing_wear",
            "gain_change",
            "loose_mount",
            "new_floor",
            "sensor_dropout"
        ]
    );
    for t in &truth {
        assert!(t.file.is_file(), "{}", t.file.display());
        let log = read_log(&t.file);
        assert!(t.onset_row > 0 && t.onset_row < log.rows.len());
        assert_eq!(log.rows[t.onset_row][0], t.onset_t_s as f32);
        assert!((t.onset_t_s - t.onset_row as f64 * SAMPLE_PERIOD_S).abs() < 1e-9);
        assert!(!t.features.is_empty());
        for f in &t.features {
            col(&log, f);
        }
        let expect_kind = if t.scenario == "sensor_dropout" {
            TruthKind::Fault
        } else {
            TruthKind::Drift
        };
        assert_eq!(t.kind, expect_kind);
    }
    let text = fs::read_to_string(dir.join("truth.csv")).unwrap();
    assert!(text.starts_with("scenario,file,onset_row,onset_t_s,kind,features\n"));
    assert!(
        text.contains("\ngain_change,drift/gain_change.csv,3000,300.0,drift,motor_current_left\n")
    );
}

fn dropout_is_nan_only_from_onset_and_only_in_its_features(demo: &Demo) {
    let (_, m) = demo;
    let t = m
        .drift
        .iter()
        .find(|t| t.scenario == "sensor_dropout")
        .unwrap();
    let log = read_log(&t.file);
    let affected: Vec<usize> = t.features.iter().map(|f| col(&log, f)).collect();
    let mut nan_rows = 0;
    for (i, r) in log.rows.iter().enumerate() {
        let nan: Vec<usize> = (0..r.len()).filter(|&k| r[k].is_nan()).collect();
        if i < t.onset_row {
            assert!(nan.is_empty(), "NaN before onset at row {i}");
        } else if !nan.is_empty() {
            assert_eq!(nan, affected, "row {i}: NaN in other columns");
            nan_rows += 1;
        }
    }
    assert!(
        log.rows[t.onset_row][affected[0]].is_nan(),
        "the first burst starts at the onset"
    );
    let post = log.rows.len() - t.onset_row;
    assert!(
        nan_rows > 20 && nan_rows < post / 4,
        "{nan_rows} NaN rows of {post}"
    );
}

fn gain_change_shifts_the_left_right_current_ratio_by_four_percent(demo: &Demo) {
    let (_, m) = demo;
    let t = m
        .drift
        .iter()
        .find(|t| t.scenario == "gain_change")
        .unwrap();
    let log = read_log(&t.file);
    let (l, r) = (
        col(&log, "motor_current_left"),
        col(&log, "motor_current_right"),
    );
    let ratio = |rows: &[Vec<f32>]| {
        let sl: f64 = rows.iter().map(|x| f64::from(x[l])).sum();
        let sr: f64 = rows.iter().map(|x| f64::from(x[r])).sum();
        sl / sr
    };
    let before = ratio(&log.rows[..t.onset_row]);
    let after = ratio(&log.rows[t.onset_row..]);
    let change = after / before - 1.0;
    assert!(
        (change - 0.04).abs() < 0.01,
        "ratio changed by {:.2}%",
        100.0 * change
    );
}

fn drift_logs_ramp_or_step_where_declared(demo: &Demo) {
    let (_, m) = demo;
    let mean = |log: &Log, c: usize, a: usize, b: usize| {
        log.rows[a..b].iter().map(|x| f64::from(x[c])).sum::<f64>() / (b - a) as f64
    };
    for t in &m.drift {
        let log = read_log(&t.file);
        let n = log.rows.len();
        let o = t.onset_row;
        match t.scenario.as_str() {
            "bearing_wear" => {
                // Slow growth: the last stretch is clearly higher than the
                // first one after onset, which is itself above nominal.
                let c = col(&log, "vib_band5");
                let pre = mean(&log, c, 0, o);
                let early = mean(&log, c, o, o + 1000);
                let late = mean(&log, c, n - 1000, n);
                assert!(late > 2.0 * pre, "vib_band5 {pre} -> {late}");
                assert!(
                    late > 1.5 * early,
                    "vib_band5 does not grow: {early} -> {late}"
                );
            }
            "loose_mount" => {
                let c = col(&log, "accel_rms_z");
                assert!(mean(&log, c, o, n) > 1.3 * mean(&log, c, 0, o));
            }
            "new_floor" => {
                let c = col(&log, "vib_band2");
                assert!(mean(&log, c, o, n) > 2.0 * mean(&log, c, 0, o));
            }
            _ => {}
        }
    }
}

#[test]
fn bulk_holdout_splits_rows_and_rejects_bad_sizes() {
    let dir = scratch("bulk");
    let paths = write_bulk_holdout(&dir, 5, 1001, 3).unwrap();
    assert_eq!(paths.len(), 3);
    let counts: Vec<usize> = paths.iter().map(|p| read_log(p).rows.len()).collect();
    assert_eq!(counts, [334, 334, 333]);
    for p in &paths {
        assert!(p.starts_with(&dir));
        assert!(read_log(p).rows.iter().flatten().all(|v| v.is_finite()));
    }
    let err = write_bulk_holdout(&dir, 5, 10, 0).unwrap_err();
    assert_eq!(err.kind(), std::io::ErrorKind::InvalidInput);
    assert!(write_bulk_holdout(&dir, 5, 2, 3).is_err());
    fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn robot_logs_are_that_robots_logs_on_those_days() {
    let dir = scratch("robot");
    // One log per day, in day order, named by robot and day; rows split as
    // evenly as possible.
    let paths = write_robot_logs(&dir.join("a"), 5, 2, 1001..1004, 1001).unwrap();
    let names: Vec<&str> = paths
        .iter()
        .map(|p| p.file_name().unwrap().to_str().unwrap())
        .collect();
    assert_eq!(
        names,
        [
            "robot2_day1001.csv",
            "robot2_day1002.csv",
            "robot2_day1003.csv"
        ]
    );
    let counts: Vec<usize> = paths.iter().map(|p| read_log(p).rows.len()).collect();
    assert_eq!(counts, [334, 334, 333]);
    // Deterministic for the seed, and the seed matters.
    let again = write_robot_logs(&dir.join("b"), 5, 2, 1001..1004, 1001).unwrap();
    let other = write_robot_logs(&dir.join("c"), 6, 2, 1001..1004, 1001).unwrap();
    for ((p, q), r) in paths.iter().zip(&again).zip(&other) {
        assert_eq!(
            fs::read(p).unwrap(),
            fs::read(q).unwrap(),
            "{}",
            q.display()
        );
        assert_ne!(
            fs::read(p).unwrap(),
            fs::read(r).unwrap(),
            "{}",
            r.display()
        );
    }
    // The same log as the bulk held-out set's for that robot and day: its
    // second file (4 files of 334 rows) is robot 2 on day 1001.
    let bulk = write_bulk_holdout(&dir.join("bulk"), 5, 4 * 334, 4).unwrap();
    assert!(bulk[1].ends_with("holdout_001_robot2_day1001.csv"));
    assert_eq!(fs::read(&bulk[1]).unwrap(), fs::read(&paths[0]).unwrap());
    // And the committed held-out log of robot 1 on day 3 (6000 rows).
    let committed = Path::new(env!("CARGO_MANIFEST_DIR")).join("holdout/robot1_day3.csv");
    if committed.exists() {
        let p = write_robot_logs(&dir.join("d"), DEMO_SEED, 1, 3..4, 6000).unwrap();
        assert_eq!(fs::read(&p[0]).unwrap(), fs::read(&committed).unwrap());
    }
    fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn robot_logs_refuse_bad_arguments_and_write_nothing() {
    let dir = scratch("robot-bad");
    let out = dir.join("out");
    for (robot, days, rows, says) in [
        (0, 2000..2002, 100, "robot 0"),
        (1, 2000..2000, 100, "empty"),
        (
            1,
            std::ops::Range {
                start: 2001,
                end: 2000,
            },
            100,
            "empty",
        ),
        (3, 2000..2004, 3, "3 rows cannot fill 4 logs"),
    ] {
        let e = write_robot_logs(&out, 7, robot, days.clone(), rows).unwrap_err();
        assert_eq!(e.kind(), std::io::ErrorKind::InvalidInput, "{e}");
        assert!(e.to_string().contains(says), "{robot} {days:?} {rows}: {e}");
        assert!(!out.exists(), "{robot} {days:?} {rows}: wrote something");
    }
    fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn drift_robot_names_the_robot_whose_nominal_log_the_drift_log_starts_as() {
    // Before its onset a drift log is its robot's nominal log of that day
    // (row for row): find, among robots 1-4 on the drift logs' days, the one
    // log each scenario's first rows are, and compare its robot.
    let dir = scratch("drift-robot");
    let cfg = Config::default();
    let m = write_demo(&dir.join("demo"), &cfg).unwrap();
    let mut twins = Vec::new();
    for robot in 1..=4 {
        let p = write_robot_logs(
            &dir.join("twins"),
            cfg.seed,
            robot,
            4..6,
            2 * cfg.drift_rows,
        )
        .unwrap();
        for path in p {
            let text = fs::read_to_string(&path).unwrap();
            let head: Vec<String> = text
                .lines()
                .take(1 + cfg.drift_onset)
                .map(str::to_string)
                .collect();
            twins.push((robot, head));
        }
    }
    for t in &m.drift {
        let text = fs::read_to_string(&t.file).unwrap();
        let head: Vec<String> = text
            .lines()
            .take(1 + t.onset_row)
            .map(str::to_string)
            .collect();
        let found: Vec<u32> = twins
            .iter()
            .filter(|(_, h)| *h == head)
            .map(|(r, _)| *r)
            .collect();
        assert_eq!(found.len(), 1, "{}: twins {found:?}", t.scenario);
        assert_eq!(drift_robot(&t.scenario), Some(found[0]), "{}", t.scenario);
    }
    assert_eq!(drift_robot("no_such_scenario"), None);
    fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn bad_config_and_bad_truth_are_reported() {
    let dir = scratch("bad");
    let cfg = Config {
        drift_onset: 8000,
        ..Config::default()
    };
    let e = write_demo(&dir, &cfg).unwrap_err();
    assert_eq!(e.kind(), std::io::ErrorKind::InvalidInput);
    assert!(e.to_string().contains("drift_onset"));
    let p = dir.join("truth.csv");
    fs::write(
        &p,
        "scenario,file,onset_row,onset_t_s,kind,features\nx,x.csv,12,1.2,broken,a\n",
    )
    .unwrap();
    let e = read_truth(&p).unwrap_err();
    assert_eq!(e.kind(), std::io::ErrorKind::InvalidData);
    assert!(e.to_string().contains(":2:"), "{e}");
    fs::write(
        &p,
        "scenario,file,onset_row,onset_t_s,kind,features\nx,x.csv,12,1.2,fault,a;b\n",
    )
    .unwrap();
    let t = read_truth(&p).unwrap();
    assert_eq!(t[0].file, dir.join("x.csv"));
    assert_eq!(t[0].features, ["a", "b"]);
    fs::remove_dir_all(&dir).unwrap();
}

fn committed_demo_matches_the_generator(demo: &Demo) {
    // The files committed beside this crate must be exactly what the default
    // configuration writes (regenerate with the command in README.md).
    let committed = Path::new(env!("CARGO_MANIFEST_DIR"));
    if !committed.join("truth.csv").exists() {
        eprintln!("no committed demo set found; skipping");
        return;
    }
    let (dir, _) = demo;
    for p in all_files(dir) {
        let rel = p.strip_prefix(dir).unwrap();
        let want = fs::read(&p).unwrap();
        let have = fs::read(committed.join(rel)).unwrap_or_default();
        assert!(
            have == want,
            "{} is out of date: regenerate with `cargo run -p plumb-scenario --release -- --out demo-logs`",
            rel.display()
        );
    }
}

#[test]
fn readme_lists_every_feature() {
    let readme =
        fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("README.md")).unwrap();
    for (name, unit, meaning) in feature_table() {
        let unit = if unit.is_empty() { "(none)" } else { unit };
        let row = format!("| `{name}` | {unit} |");
        let line = readme.lines().find(|l| l.starts_with(&row));
        let line = line.unwrap_or_else(|| panic!("README.md has no row for {name}"));
        assert!(
            line.ends_with(&format!("| {meaning} |")),
            "README.md row for {name} is out of date"
        );
    }
}
