//! `plumb demo`, the README's main command, end to end on a copy of the
//! committed demo logs with small generated sets (the real run uses 2 × 10⁶
//! rows each; `scripts/demo.sh` runs it in CI).

mod common;

use common::{demo, plumb, Scratch};
use serde_json::Value;
use std::path::Path;

/// Copies the committed demo set (train/, holdout/, drift/, truth.csv).
fn copy_demo(to: &Path) {
    for dir in ["train", "holdout", "drift"] {
        std::fs::create_dir_all(to.join(dir)).unwrap();
        for e in std::fs::read_dir(demo(dir)).unwrap() {
            let p = e.unwrap().path();
            std::fs::copy(&p, to.join(dir).join(p.file_name().unwrap())).unwrap();
        }
    }
    std::fs::copy(demo("truth.csv"), to.join("truth.csv")).unwrap();
}

/// The JSON summary and what went to standard error (40 000 nominal rows).
fn run_demo(logs: &Path, out: &Path, train_rows: &str, robot_rows: &str) -> (Value, String) {
    run_demo_with(logs, out, "40000", train_rows, robot_rows)
}

fn run_demo_with(
    logs: &Path,
    out: &Path,
    nominal_rows: &str,
    train_rows: &str,
    robot_rows: &str,
) -> (Value, String) {
    let o = plumb(&[
        "demo",
        "--logs",
        logs.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
        "--nominal-rows",
        nominal_rows,
        "--train-rows",
        train_rows,
        "--robot-rows",
        robot_rows,
        "--no-report",
        "--json",
    ]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "plumb demo failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    (
        serde_json::from_slice(&o.stdout).expect("demo --json prints JSON"),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

fn scenario<'a>(r: &'a Value, name: &str) -> &'a Value {
    r["scenarios"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["scenario"] == name)
        .unwrap_or_else(|| panic!("no scenario {name} in {r}"))
}

#[test]
fn demo_fits_replays_and_reports_every_scenario() {
    let dir = Scratch::new("demo");
    let logs = dir.path("logs");
    copy_demo(&logs);
    let out = dir.path("out");
    let (r, stderr) = run_demo(&logs, &out, "20000", "8000");

    // 40 000 held-out rows are far too few for ten charts at 10⁻⁵ (a budget
    // of 0.04 alarms each): the fit's warning is said, not swallowed.
    let warnings = r["warnings"].as_array().unwrap();
    assert!(
        warnings.iter().any(|w| w
            .as_str()
            .unwrap()
            .starts_with("the held-out data are too few")),
        "{warnings:?}"
    );
    assert!(
        stderr.contains("demo: warning: the held-out data are too few"),
        "{stderr}"
    );

    // The model is written and readable.
    let model = out.join("tugger.plumb");
    let o = plumb(&["inspect", model.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(0));

    // Nominal sets: the generated evaluation set and the committed held-out logs.
    let nominal = r["nominal"].as_array().unwrap();
    assert_eq!(nominal.len(), 2);
    assert_eq!(nominal[0]["samples"], 40000);
    assert_eq!(nominal[1]["samples"], 12000);

    // Every scenario of truth.csv, in its order.
    let names: Vec<&str> = r["scenarios"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["scenario"].as_str().unwrap())
        .collect();
    let truth = std::fs::read_to_string(logs.join("truth.csv")).unwrap();
    let want: Vec<&str> = truth
        .lines()
        .skip(1)
        .map(|l| l.split(',').next().unwrap())
        .collect();
    assert_eq!(names, want);

    // The loosened mount is a step of several spreads in the SPE (the
    // scenario's design): flagged within a few seconds, driven by the SPE,
    // with a vibration band it changes among the top features.
    let lm = scenario(&r, "loose_mount");
    let delay = lm["delay"].as_u64().expect("loose_mount flagged");
    assert!(delay < 100, "loose_mount delay {delay}");
    assert_eq!(lm["false_alarms"], 0);
    assert!(lm["drivers"].as_array().unwrap().iter().any(|d| d == "spe"));
    // The charts that raised it, each of a driving score and over its limit.
    let crossed = lm["crossed"].as_array().unwrap();
    assert!(!crossed.is_empty(), "{lm}");
    for c in crossed {
        assert!(
            lm["drivers"].as_array().unwrap().contains(&c["score"]),
            "{c}"
        );
        assert!(
            c["value"].as_f64().unwrap() > c["limit"].as_f64().unwrap(),
            "{c}"
        );
    }
    assert!(lm["top_in_truth"].as_u64().unwrap() >= 1, "{lm}");
    // The Lorden bound is ln(ARL0) / (δ²/2) with ARL0 = 1 / target rate
    // and δ the shift the output reports (Lorden 1971; KL divergence δ²/2 of
    // a unit-variance normal shifted by δ). serde_json prints f64 so that it
    // reads back exactly, so the two agree to the rounding of this formula
    // (a few ulps: 8 ε relative allows it).
    let target = r["target_rate"].as_f64().unwrap();
    let delta = lm["shift"].as_f64().expect("shift reported");
    assert!(delta > 0.0, "{lm}");
    let bound = lm["lorden_bound"].as_f64().expect("lorden_bound reported");
    let want = (1.0 / target).ln() / (delta * delta / 2.0);
    assert!(
        (bound - want).abs() <= 8.0 * f64::EPSILON * want,
        "lorden_bound {bound} vs ln(1/{target}) / ({delta}²/2) = {want}"
    );

    // Sensor dropout is a fault, not drift: faults counted, no flag.
    let sd = scenario(&r, "sensor_dropout");
    assert_eq!(sd["kind"], "fault");
    assert!(sd["faults"].as_u64().unwrap() > 0);
    assert!(sd["first_flag"].is_null(), "{sd}");

    // The generated training set is made once and reused.
    let marker = logs.join("generated/training/complete");
    assert_eq!(
        std::fs::read_to_string(&marker).unwrap(),
        "seed 3003 rows 20000 files 1\n"
    );

    // 40 000 calibration rows are one log: the fleet model's residual chart
    // is off, so there is nothing to tailor; the per-robot step says so and
    // is skipped.
    let skipped = "the per-robot step is skipped: the fleet model's residual chart is off";
    assert!(
        warnings
            .iter()
            .any(|w| w.as_str().unwrap().starts_with(skipped)),
        "{warnings:?}"
    );
    assert!(
        stderr.contains(&format!("demo: warning: {skipped}")),
        "{stderr}"
    );
    assert_eq!(r["robot_rows"], 8000);
    assert_eq!(r["robots"].as_array().unwrap().len(), 0);
    assert!(!logs.join("generated/robot1").exists());
}

/// The per-robot step with `--robot-rows 40000` (calibration on two logs, so
/// the residual chart is on): four days of 10 000 rows per robot, the 1st
/// and 3rd to tailor on, the 2nd and 4th to count false alarms on.
#[test]
fn demo_tailors_the_model_to_each_robot_a_drift_log_comes_from() {
    let dir = Scratch::new("demo-robots");
    let logs = dir.path("logs");
    copy_demo(&logs);
    let out = dir.path("out");
    let (r, _) = run_demo_with(&logs, &out, "125001", "0", "40000");
    let (r, logs, out) = (&r, logs.as_path(), out.as_path());
    assert_eq!(r["robot_rows"], 40000);
    let robots = r["robots"].as_array().unwrap();
    let ids: Vec<u64> = robots
        .iter()
        .map(|m| m["robot"].as_u64().unwrap())
        .collect();
    // One per robot a drift (not a fault) log comes from, as each scenario
    // says; every scenario of those robots is listed under its robot.
    let scenarios = r["scenarios"].as_array().unwrap();
    let mut want: Vec<u64> = scenarios
        .iter()
        .filter(|s| s["kind"] == "drift")
        .map(|s| s["robot"].as_u64().expect("robot of a drift log"))
        .collect();
    want.sort_unstable();
    want.dedup();
    assert_eq!(ids, want);
    assert!(ids.len() >= 2, "{ids:?}");
    for m in robots {
        let robot = m["robot"].as_u64().unwrap();
        let listed: Vec<&str> = m["scenarios"]
            .as_array()
            .unwrap()
            .iter()
            .map(|s| s.as_str().unwrap())
            .collect();
        let mine: Vec<&str> = scenarios
            .iter()
            .filter(|s| s["robot"] == robot)
            .map(|s| s["scenario"].as_str().unwrap())
            .collect();
        assert_eq!(listed, mine, "robot {robot}");

        // Its own logs: generated once under generated/robot<N>, one per day.
        let dir = logs.join(format!("generated/robot{robot}"));
        assert_eq!(
            std::fs::read_to_string(dir.join("complete")).unwrap(),
            format!("seed 424242 robot {robot} days 2000-2003 rows 40000\n")
        );
        for day in 2000..2004 {
            let text =
                std::fs::read_to_string(dir.join(format!("robot{robot}_day{day}.csv"))).unwrap();
            assert_eq!(text.lines().count(), 1 + 10_000, "robot {robot} day {day}");
        }
        assert_eq!(m["tailor_days"], serde_json::json!([2000, 2002]));
        assert_eq!(m["count_days"], serde_json::json!([2001, 2003]));

        // The tailored model is written, reads back, and holds the slow
        // charts and limit the summary reports.
        let path = out.join(format!("robot{robot}.plumb"));
        assert_eq!(m["model"].as_str().unwrap(), path.to_str().unwrap());
        let o = plumb(&["inspect", path.to_str().unwrap()]);
        assert_eq!(
            o.status.code(),
            Some(0),
            "{}",
            String::from_utf8_lossy(&o.stderr)
        );
        let file =
            plumb_model::file::ModelFile::from_bytes(&std::fs::read(&path).unwrap()).unwrap();
        let t = &m["tailoring"];
        assert_eq!(t["logs"], 2);
        let rows = t["rows"].as_u64().unwrap();
        assert!(rows > 0 && rows <= 20_000, "{t}");
        let charts = t["charts"].as_array().unwrap();
        assert_eq!(file.model.slow_charts.len(), 4 * charts.len(), "{t}");
        // (An f32 in the JSON is its shortest text: it reads back as that f32.)
        assert_eq!(file.model.slow_limit, t["limit"].as_f64().unwrap() as f32);
        for (c, stored) in charts.iter().zip(file.model.slow_charts.chunks_exact(4)) {
            assert_eq!(c["feature"].as_u64().unwrap(), stored[0] as u64, "{c}");
            assert_eq!(c["lambda"].as_f64().unwrap() as f32, stored[1], "{c}");
        }

        // The robot's other days: every flag a false alarm, counted as the
        // fleet model's nominal sets are.
        let n = &m["nominal"];
        assert_eq!(n["samples"], 20_000);
        let flags = n["flags"].as_u64().unwrap();
        assert_eq!(
            n["per_1e5"].as_f64().unwrap(),
            flags as f64 * 1e5 / 20_000.0
        );
        assert!(m["slow_flags"].as_u64().unwrap() <= flags);
    }

    // At this size some robot gets a slow chart (else the checks of the
    // stored charts above check nothing).
    assert!(
        robots
            .iter()
            .any(|m| !m["tailoring"]["charts"].as_array().unwrap().is_empty()),
        "no slow chart on any robot: {robots:?}"
    );

    // Every scenario of those robots went through its robot's model.
    for s in scenarios {
        let Some(robot) = s["robot"].as_u64().filter(|r| ids.contains(r)) else {
            assert!(s["tailored"].is_null(), "{s}");
            continue;
        };
        let t = &s["tailored"];
        assert_eq!(
            t["model"].as_str().unwrap(),
            out.join(format!("robot{robot}.plumb")).to_str().unwrap()
        );
        for c in t["crossed"].as_array().unwrap() {
            assert!(
                c["value"].as_f64().unwrap() > c["limit"].as_f64().unwrap(),
                "{c}"
            );
        }
        if s["kind"] == "fault" {
            // A fault stays a fault: faults counted as by the fleet model,
            // no flag.
            assert_eq!(t["faults"], s["faults"]);
            assert!(t["first_flag"].is_null(), "{t}");
            continue;
        }
        // The tailored model keeps every chart of the fleet model and adds
        // slow ones: with no flag before the onset, it flags no later.
        if let (Some(fleet), Some(0)) = (s["first_flag"].as_u64(), t["false_alarms"].as_u64()) {
            let mine = t["first_flag"]
                .as_u64()
                .expect("flagged by the tailored model");
            assert!(mine <= fleet, "{}: {mine} > {fleet}", s["scenario"]);
            assert_eq!(
                t["delay"].as_u64().unwrap(),
                mine - s["onset"].as_u64().unwrap()
            );
        }
    }
}

#[test]
fn demo_without_generated_training_rows_uses_the_committed_logs_alone() {
    let dir = Scratch::new("demo0");
    let logs = dir.path("logs");
    copy_demo(&logs);
    let out = dir.path("out");
    let (r, _) = run_demo(&logs, &out, "0", "0");
    assert!(!logs.join("generated/training").exists());
    let file =
        plumb_model::file::ModelFile::from_bytes(&std::fs::read(out.join("tugger.plumb")).unwrap())
            .unwrap();
    // 6 committed logs of 6000 rows, all used for the fit (calibration has
    // its own generated set).
    assert_eq!(file.model.meta.train_rows, 36_000);
    assert_eq!(r["scenarios"].as_array().unwrap().len(), 5);
    // --robot-rows 0: no per-robot step, nothing generated or written for it.
    assert_eq!(r["robot_rows"], 0);
    assert_eq!(r["robots"].as_array().unwrap().len(), 0);
    for s in r["scenarios"].as_array().unwrap() {
        assert!(s["tailored"].is_null(), "{s}");
    }
    for robot in 1..=4 {
        assert!(!logs.join(format!("generated/robot{robot}")).exists());
        assert!(!out.join(format!("robot{robot}.plumb")).exists());
    }
}

#[test]
fn too_few_rows_are_refused_before_the_cache_is_touched() {
    let dir = Scratch::new("demo-rows");
    let logs = dir.path("logs");
    let cached = logs.join("generated/calibration");
    std::fs::create_dir_all(&cached).unwrap();
    std::fs::write(cached.join("complete"), "seed 1001 rows 1000000 files 8\n").unwrap();
    for (option, values) in [
        ("--nominal-rows", ["10", "0", "-5", "many"]),
        ("--robot-rows", ["1", "3999", "-1", "many"]),
    ] {
        for rows in values {
            let rows_arg = format!("{option}={rows}");
            let o = plumb(&[
                "demo",
                "--logs",
                logs.to_str().unwrap(),
                "--out",
                dir.path("out").to_str().unwrap(),
                &rows_arg,
            ]);
            let err = String::from_utf8_lossy(&o.stderr);
            assert_eq!(o.status.code(), Some(2), "{rows_arg}: {err}");
            assert!(err.contains(option), "{err}");
            assert!(
                cached.join("complete").exists(),
                "{rows_arg}: the cached set was removed"
            );
            assert!(!dir.path("out").exists(), "{rows_arg}: output folder made");
            assert!(
                !logs.join("train").exists(),
                "{rows_arg}: demo logs generated"
            );
        }
    }
}
