//! The `plumb` binary end to end: bad input (exit code 2, the message names
//! `path:line:column (column)`, no output file), help, determinism, inspect.

mod common;

use common::{demo, join, lines, log_text, plumb, plumb_ok, Scratch};
use std::path::{Path, PathBuf};
use std::process::Output;

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Fast fit options for small logs.
const FAST: [&str; 6] = [
    "--mixture",
    "2",
    "--restarts",
    "1",
    "--quiet",
    "--threads=2",
];

/// Runs `plumb fit LOGS --out OUT FAST`, expects exit 2, a message
/// containing every `needle`, and no output file.
fn fit_fails(dir: &Scratch, logs: &[&Path], extra: &[&str], needles: &[&str]) -> String {
    let out = dir.path("model.plumb");
    let mut args: Vec<&str> = vec!["fit"];
    args.extend(logs.iter().map(|p| s(p)));
    args.extend(["--out", s(&out)]);
    args.extend(FAST);
    args.extend(extra);
    let o = plumb(&args);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "stderr: {err}");
    for n in needles {
        assert!(err.contains(n), "expected {n:?} in: {err}");
    }
    assert!(!out.exists(), "output written despite the error");
    let leftovers: Vec<PathBuf> = std::fs::read_dir(&dir.0)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.to_string_lossy().contains(".plumb.tmp"))
        .collect();
    assert!(leftovers.is_empty(), "temporary files left: {leftovers:?}");
    err
}

fn edited(dir: &Scratch, name: &str, line: usize, f: impl Fn(&str) -> String) -> PathBuf {
    let mut ls = lines(&log_text(4, 1000, 1));
    ls[line - 1] = f(&ls[line - 1]);
    dir.write(name, &join(&ls))
}

/// Replaces field `col` (1-based) of a CSV line.
fn set_field(line: &str, col: usize, value: &str) -> String {
    let mut f: Vec<&str> = line.split(',').collect();
    f[col - 1] = value;
    f.join(",")
}

#[test]
fn ragged_row() {
    let d = Scratch::new("ragged");
    let p = edited(&d, "a.csv", 5, |l| {
        l.rsplit_once(',').unwrap().0.to_string()
    });
    let want = format!(
        "{}:5:5 (x3): expected 5 fields as in the header, found 4",
        p.display()
    );
    fit_fails(&d, &[&p], &[], &[&want]);
    let p = edited(&d, "b.csv", 6, |l| format!("{l},1.0"));
    let want = format!("{}:6:6 (beyond the header): expected 5 fields", p.display());
    fit_fails(&d, &[&p], &[], &[&want]);
}

#[test]
fn non_numeric_cell() {
    let d = Scratch::new("text");
    let p = edited(&d, "a.csv", 1207 % 1000, |l| set_field(l, 5, "12..3"));
    let want = format!(
        "{}:207:5 (x3): expected a number, found \"12..3\"",
        p.display()
    );
    fit_fails(&d, &[&p], &[], &[&want]);
}

#[test]
fn empty_cell() {
    let d = Scratch::new("empty");
    let p = edited(&d, "a.csv", 9, |l| set_field(l, 2, ""));
    let want = format!(
        "{}:9:2 (x0): expected a number, found an empty cell",
        p.display()
    );
    fit_fails(&d, &[&p], &[], &[&want, "--skip-bad-rows"]);
}

#[test]
fn nan_and_inf_cells() {
    let d = Scratch::new("nan");
    let p = edited(&d, "a.csv", 12, |l| set_field(l, 3, "NaN"));
    let want = format!(
        "{}:12:3 (x1): expected a finite number, found \"NaN\"",
        p.display()
    );
    fit_fails(&d, &[&p], &[], &[&want]);
    let p = edited(&d, "b.csv", 13, |l| set_field(l, 4, "-inf"));
    let want = format!(
        "{}:13:4 (x2): expected a finite number, found \"-inf\"",
        p.display()
    );
    fit_fails(&d, &[&p], &[], &[&want]);
}

#[test]
fn skip_bad_rows_counts_them() {
    let d = Scratch::new("skip");
    let mut ls = lines(&log_text(4, 1000, 1));
    ls[11] = set_field(&ls[11], 3, "NaN");
    ls[900] = set_field(&ls[900], 2, "");
    let p = d.write("a.csv", &join(&ls));
    let out = d.path("m.plumb");
    let o = plumb_ok(&[
        "fit",
        s(&p),
        "--out",
        s(&out),
        "--mixture",
        "2",
        "--restarts",
        "1",
        "--skip-bad-rows",
        "--json",
    ]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["fit"]["rows"]["train_skipped"], 1);
    assert_eq!(v["fit"]["rows"]["holdout_skipped"], 1);
    assert_eq!(v["fit"]["rows"]["train"], 799);
    // EM never stops at its first iteration (the change from no bound is
    // infinite), so a run has a fastest iteration, within the EM time.
    let mx = &v["fit"]["mixture"];
    let fastest = mx["em_fastest_iteration_seconds"].as_f64().unwrap();
    assert!(
        fastest > 0.0 && fastest <= mx["em_seconds"].as_f64().unwrap(),
        "{mx}"
    );
    assert!(mx["em_iterations"].as_u64().unwrap() >= 2, "{mx}");
}

#[test]
fn header_errors() {
    let d = Scratch::new("header");
    let p = edited(&d, "dup.csv", 1, |_| "t[s],x0[A],x1[V],x0[A],x3[V]".into());
    let want = format!(
        "{}:1:4 (x0): duplicate column name (first at column 2)",
        p.display()
    );
    fit_fails(&d, &[&p], &[], &[&want]);
    let p = edited(&d, "blank.csv", 1, |_| "t[s],x0[A],,x2[A],x3[V]".into());
    let want = format!(
        "{}:1:3 (unnamed column): expected a column name",
        p.display()
    );
    fit_fails(&d, &[&p], &[], &[&want]);
    let p = edited(&d, "unit_only.csv", 1, |_| {
        "t[s],x0[A],[V],x2[A],x3[V]".into()
    });
    let want = format!(
        "{}:1:3 (unnamed column): expected a column name, found \"[V]\"",
        p.display()
    );
    fit_fails(&d, &[&p], &[], &[&want]);
    let p = d.write("empty.csv", "");
    let want = format!("{}:1: expected a header row", p.display());
    fit_fails(&d, &[&p], &[], &[&want]);
    let p = edited(&d, "no_time.csv", 1, |_| {
        "time[s],x0[A],x1[V],x2[A],x3[V]".into()
    });
    let want = format!("{}:1 (t): no time column \"t\"", p.display());
    fit_fails(&d, &[&p], &[], &[&want, "--time-column"]);
}

#[test]
fn columns_across_files() {
    let d = Scratch::new("across");
    let a = d.write("a.csv", &log_text(4, 1000, 1));
    let b = edited(&d, "b.csv", 1, |_| "t[s],x0[A],x1[V],x3[V]".into());
    // b now also has ragged rows, but the header is checked first.
    let want = format!(
        "{}:1 (x2): expected a column named \"x2\", found none",
        b.display()
    );
    fit_fails(&d, &[&a, &b], &[], &[&want, &a.display().to_string()]);
    let c = edited(&d, "c.csv", 1, |_| {
        "t[s],x0[A],x1[V],x2[A],x3[V],x9[V]".into()
    });
    let want = format!(
        "{}:1:6 (x9): unexpected column: not in the first log",
        c.display()
    );
    fit_fails(&d, &[&a, &c], &[], &[&want]);
    let u = edited(&d, "u.csv", 1, |_| "t[s],x0[mA],x1[V],x2[A],x3[V]".into());
    let want = format!(
        "{}:1:2 (x0): expected unit \"A\", found \"mA\"",
        u.display()
    );
    fit_fails(&d, &[&a, &u], &[], &[&want]);
}

#[test]
fn constant_column() {
    let d = Scratch::new("const");
    let mut ls = lines(&log_text(4, 1000, 1));
    for l in ls.iter_mut().skip(1) {
        *l = set_field(l, 3, "7.25");
    }
    let p = d.write("a.csv", &join(&ls));
    let want = format!(
        "{}:1:3 (x1): column is constant over the training rows (always 7.25)",
        p.display()
    );
    fit_fails(&d, &[&p], &[], &[&want]);
}

#[test]
fn too_few_rows() {
    let d = Scratch::new("few");
    let p = d.write("a.csv", &log_text(4, 90, 1));
    let want = format!("{}: expected at least 100 training rows", p.display());
    fit_fails(&d, &[&p], &[], &[&want, "give 72"]);
    // Enough to train, too few to calibrate.
    let p = d.write("b.csv", &log_text(4, 400, 1));
    fit_fails(
        &d,
        &[&p],
        &[],
        &[
            &p.display().to_string(),
            "calibration needs at least 150 valid held-out rows",
            "found 80",
        ],
    );
}

#[test]
fn unreadable_inputs() {
    let d = Scratch::new("unreadable");
    let missing = d.path("nope.csv");
    let want = format!("{}: cannot read:", missing.display());
    fit_fails(&d, &[&missing], &[], &[&want]);
    let sub = d.path("empty_dir");
    std::fs::create_dir_all(&sub).unwrap();
    let want = format!("{}: directory holds no *.csv or *.npy logs", sub.display());
    fit_fails(&d, &[&sub], &[], &[&want]);
    let units = d.path("units.csv");
    let a = d.write("a.csv", &log_text(4, 1000, 1));
    let want = format!("{}: cannot read:", units.display());
    fit_fails(&d, &[&a], &["--units", s(&units)], &[&want]);
}

#[test]
fn output_folder_must_exist() {
    let d = Scratch::new("outdir");
    let a = d.write("a.csv", &log_text(4, 1000, 1));
    let out = d.path("missing/m.plumb");
    let o = plumb(&["fit", s(&a), "--out", s(&out), "--quiet"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("does not exist"), "{}", stderr(&o));
}

#[test]
fn over_device_capacity() {
    let d = Scratch::new("capacity");
    let p = d.write("a.csv", &log_text(65, 1000, 1));
    fit_fails(
        &d,
        &[&p],
        &[],
        &["this build holds at most 64", "--no-device-check"],
    );
}

#[test]
fn failed_fit_keeps_an_existing_output() {
    let d = Scratch::new("keep");
    let out = d.write("model.plumb", "old");
    let p = edited(&d, "a.csv", 9, |l| set_field(l, 2, "x"));
    let o = plumb(&["fit", s(&p), "--out", s(&out), "--quiet"]);
    assert_eq!(o.status.code(), Some(2));
    assert_eq!(std::fs::read_to_string(&out).unwrap(), "old");
}

#[test]
fn usage_errors_exit_2() {
    assert_eq!(plumb(&[]).status.code(), Some(2));
    assert_eq!(plumb(&["fit"]).status.code(), Some(2));
    // A readable log, so that only the mixture count is wrong.
    let d = Scratch::new("usage");
    let log = demo("train/robot1_day1.csv");
    assert!(log.is_file(), "{}", log.display());
    let out = d.path("m.plumb");
    let o = plumb(&["fit", s(&log), "--out", s(&out), "--mixture", "0"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("--mixture"), "{}", stderr(&o));
    assert!(!out.exists());
    assert_eq!(plumb(&["frobnicate"]).status.code(), Some(2));
}

#[test]
fn help_teaches_and_states_safety() {
    for args in [&["--help"][..], &["-h"], &["fit", "--help"]] {
        let o = plumb(args);
        assert_eq!(o.status.code(), Some(0));
        let text = String::from_utf8_lossy(&o.stdout);
        assert!(
            text.contains("advisory monitor, not a safety function"),
            "{text}"
        );
        assert!(
            text.contains("safety system, local codes and licensed practice"),
            "{text}"
        );
    }
    let o = plumb(&["--help"]);
    let text = String::from_utf8_lossy(&o.stdout);
    for needle in ["fit", "inspect", "Exit codes", "2 bad input"] {
        assert!(text.contains(needle), "{needle}: {text}");
    }
    let o = plumb(&["fit", "--help"]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("8·m bytes per training row"), "{text}");
}

#[test]
fn fit_is_byte_identical_and_inspectable() {
    let d = Scratch::new("identical");
    let a = d.write("a.csv", &log_text(5, 1500, 1));
    let b = d.write("b.csv", &log_text(5, 1500, 2));
    let m1 = d.path("m1.plumb");
    let m2 = d.path("m2.plumb");
    for (out, threads) in [(&m1, "2"), (&m2, "1")] {
        plumb_ok(&[
            "fit",
            s(&a),
            s(&b),
            "--out",
            s(out),
            "--mixture",
            "auto",
            "--restarts",
            "2",
            "--quiet",
            "--threads",
            threads,
        ]);
    }
    let (x, y) = (std::fs::read(&m1).unwrap(), std::fs::read(&m2).unwrap());
    assert_eq!(x, y, "same logs and seed must give the same bytes");

    let o = plumb_ok(&["inspect", s(&m1), "--json"]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["model"]["d"], 5);
    assert_eq!(v["model"]["sample_period_us"], 10_000);
    assert_eq!(v["features"][0]["name"], "x0");
    assert_eq!(v["features"][0]["unit"], "A");
    assert_eq!(v["model"]["train_rows"], 2400);
    assert!(v.get("fit").is_none());
    let o = plumb(&["inspect", s(&m1)]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("Principal components") && text.contains("Jackson-Mudholkar"),
        "{text}"
    );
}

#[test]
fn holdout_logs_and_units_sidecar() {
    let d = Scratch::new("holdout");
    let a = d.write("a.csv", &log_text(4, 800, 1));
    // Hold-out log with its columns in another order and an extra column.
    let mut ls = lines(&log_text(4, 400, 3));
    for l in ls.iter_mut() {
        let f: Vec<&str> = l.split(',').collect();
        let extra = if f[0] == "t[s]" { "note" } else { "1" };
        *l = [f[0], f[4], f[2], f[3], f[1], extra].join(",");
    }
    let h = d.write("h.csv", &join(&ls));
    let units = d.write("units.csv", "name,unit\nx1,mV\n");
    let out = d.path("m.plumb");
    let o = plumb_ok(&[
        "fit",
        s(&a),
        "--holdout",
        s(&h),
        "--out",
        s(&out),
        "--mixture",
        "1",
        "--json",
        "--units",
        s(&units),
    ]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["model"]["train_rows"], 800);
    assert_eq!(v["model"]["calib_rows"], 400);
    assert_eq!(v["features"][1]["unit"], "mV");
}

#[test]
fn inspect_refuses_bad_files() {
    let d = Scratch::new("inspect");
    let p = d.write("bad.plumb", "definitely not a model");
    let o = plumb(&["inspect", s(&p)]);
    assert_eq!(o.status.code(), Some(2));
    let want = format!(
        "{}: not a usable model file: not a plumbline model file (bad magic)",
        p.display()
    );
    assert!(stderr(&o).contains(&want), "{}", stderr(&o));
    // A real model with one byte flipped: CRC mismatch.
    let a = d.write("a.csv", &log_text(4, 1000, 1));
    let m = d.path("m.plumb");
    plumb_ok(&["fit", s(&a), "--out", s(&m), "--mixture", "1", "--quiet"]);
    let mut bytes = std::fs::read(&m).unwrap();
    bytes[20] ^= 0x40;
    std::fs::write(&m, &bytes).unwrap();
    let o = plumb(&["inspect", s(&m)]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("CRC-32 mismatch"), "{}", stderr(&o));
    let o = plumb(&["inspect", s(&d.path("missing.plumb"))]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("missing.plumb: cannot read"));
}

#[test]
fn model_id_is_the_crc_of_the_payload_with_id_zero() {
    let d = Scratch::new("id");
    let a = d.write("a.csv", &log_text(4, 1000, 1));
    let m = d.path("m.plumb");
    plumb_ok(&["fit", s(&a), "--out", s(&m), "--mixture", "1", "--quiet"]);
    let bytes = std::fs::read(&m).unwrap();
    let mut file = plumb_model::file::ModelFile::from_bytes(&bytes).unwrap();
    let id = file.model.meta.id;
    file.model.meta.id = 0;
    let zeroed = file.to_bytes().unwrap();
    let payload = plumb_model::file::split(&zeroed).unwrap().payload;
    assert_eq!(plumb_model::file::crc32(payload), id);
    // The schema fingerprint ties the model to the log columns.
    let want =
        plumb_model::schema::fingerprint([("x0", "A"), ("x1", "V"), ("x2", "A"), ("x3", "V")]);
    assert_eq!(file.model.meta.schema, want);
    // Created time is the log's modification time, not the clock.
    let mtime = std::fs::metadata(&a).unwrap().modified().unwrap();
    let secs = mtime
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_secs();
    assert_eq!(file.model.meta.created_unix_s, secs);
}

#[test]
fn no_device_check_writes_a_host_only_model() {
    let d = Scratch::new("hostonly");
    let p = d.write("a.csv", &log_text(66, 1000, 1));
    let m = d.path("m.plumb");
    let o = plumb_ok(&[
        "fit",
        s(&p),
        "--out",
        s(&m),
        "--mixture",
        "1",
        "--no-device-check",
        "--json",
    ]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["model"]["d"], 66);
    assert_eq!(v["fit"]["calibration"]["end_to_end"], false);
    let warnings = v["fit"]["warnings"].to_string();
    assert!(
        warnings.contains("end-to-end detector check did not run"),
        "{warnings}"
    );
    plumb_ok(&["inspect", s(&m)]);
    // Replay and report run the boards' detector: refused, naming the model.
    let html = d.path("r.html");
    for args in [
        vec!["replay", s(&m), s(&p)],
        vec!["report", s(&m), s(&p), "--out", s(&html)],
    ] {
        let err = refused(
            &args,
            &[&format!("{}: the model does not fit the device", s(&m))],
        );
        assert!(err.contains("--no-device-check"), "{err}");
    }
    // Upload checks what a board holds before it opens the link.
    let port = d.path("no-such-port");
    refused(
        &["upload", s(&m), "--port", s(&port)],
        &[
            &format!("{}: a board would refuse this model", s(&m)),
            "at most 64 features",
            "--unchecked",
        ],
    );
    let o = plumb(&["fit", "--help"]);
    let help = String::from_utf8_lossy(&o.stdout);
    assert!(help.contains("`plumb inspect` reads it"), "{help}");
    assert!(!help.contains("for host use"), "{help}");
}

#[test]
fn calibration_reports_every_chart() {
    let d = Scratch::new("charts");
    let a = d.write("a.csv", &log_text(5, 1500, 1));
    let b = d.write("b.csv", &log_text(5, 1500, 2));
    let out = d.path("m.plumb");
    let fit = |extra: &[&str]| {
        let mut args = vec!["fit", s(&a), s(&b), "--out", s(&out), "--json"];
        args.extend(FAST);
        args.extend(extra);
        plumb(&args)
    };
    let o = fit(&[]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let c = &v["fit"]["calibration"];
    let allowed = c["allowed_per_chart"].as_u64().unwrap();
    assert_eq!(c["design_shift"], 2.0);
    assert!(c["rounds"].as_u64().unwrap() >= 1);
    // One entry per score (SPE, T², NLL) in both lists.
    assert_eq!(c["scores"].as_array().unwrap().len(), 3, "{c}");
    assert_eq!(v["limits"].as_array().unwrap().len(), 3, "{}", v["limits"]);
    for (i, sc) in c["scores"].as_array().unwrap().iter().enumerate() {
        let f = |k: &str| sc[k].as_f64().unwrap();
        // Never below the design for independent input; within the allowance.
        assert!(
            f("cusum_limit") >= f("cusum_limit_iid") * (1.0 - 1e-6),
            "{sc}"
        );
        assert!(f("ewma_l") >= f("ewma_l_iid") * (1.0 - 1e-6), "{sc}");
        assert!(sc["cusum_alarms"].as_u64().unwrap() <= allowed, "{sc}");
        assert!(sc["ewma_alarms"].as_u64().unwrap() <= allowed, "{sc}");
        let cands = sc["cusum_candidates"].as_array().unwrap();
        assert_eq!(cands.len(), 7);
        // The kept k has the shortest delay at the design shift.
        let best = cands
            .iter()
            .map(|c| c["arl_at_shift"].as_f64().unwrap())
            .fold(f64::INFINITY, f64::min);
        assert_eq!(f("cusum_arl_at_shift"), best, "{sc}");
        // The model stores what the report says.
        let lim = &v["limits"][i];
        assert_eq!(lim["cusum_slack"].as_f64().unwrap(), f("cusum_slack"));
        let stored = (f("cusum_limit") * f("cusum_widened")) as f32;
        assert_eq!(lim["cusum_limit"].as_f64().unwrap() as f32, stored);
        let stored = (f("ewma_limit") * f("ewma_widened")) as f32;
        assert_eq!(lim["ewma_limit"].as_f64().unwrap() as f32, stored);
    }
    // The text summary (no --quiet) shows the per-chart table.
    let mut args = vec!["fit", s(&a), s(&b), "--out", s(&out)];
    args.extend(&FAST[..4]);
    let o = plumb_ok(&args);
    let text = String::from_utf8_lossy(&o.stdout);
    for needle in ["CUSUM h by reference value k", "EWMA L iid", "limit search"] {
        assert!(text.contains(needle), "{needle}: {text}");
    }

    // One reference value fixes k.
    let o = fit(&["--cusum-slack", "0.75", "--design-shift", "1.5"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let scores = v["fit"]["calibration"]["scores"].as_array().unwrap();
    assert_eq!(scores.len(), 3, "{}", v["fit"]["calibration"]);
    for sc in scores {
        assert_eq!(sc["cusum_slack"], 0.75);
        assert_eq!(sc["cusum_candidates"].as_array().unwrap().len(), 1);
    }
    assert_eq!(v["limits"].as_array().unwrap().len(), 3, "{}", v["limits"]);
    for lim in v["limits"].as_array().unwrap() {
        assert_eq!(lim["cusum_slack"], 0.75);
    }
    for bad in [
        &["--cusum-slack", "7"][..],
        &["--cusum-slack", "0.5,x"],
        &["--design-shift", "0"],
    ] {
        let o = fit(bad);
        assert_eq!(o.status.code(), Some(2), "{bad:?}");
    }
}

#[test]
fn refit_keeps_the_base_schema_and_reports_changes() {
    let d = Scratch::new("refit");
    let a = d.write("a.csv", &log_text(4, 1000, 1));
    let b = d.write("b.csv", &log_text(4, 1000, 2));
    let c = d.write("c.csv", &log_text(4, 1200, 3));
    let base = d.path("base.plumb");
    plumb_ok(&[
        "fit",
        s(&a),
        s(&b),
        "--out",
        s(&base),
        "--quiet",
        "--mixture",
        "2",
    ]);
    let new = d.path("new.plumb");
    let refit = |extra: &[&str]| {
        let mut args = vec!["fit", s(&c), "--base", s(&base), "--out", s(&new)];
        args.extend(["--mixture", "3", "--restarts", "1"]);
        args.extend(extra);
        plumb(&args)
    };
    let o = refit(&["--json"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let ch = &v["changes"];
    assert_eq!(ch["base"], s(&base));
    assert_eq!(ch["schema"][0], ch["schema"][1]);
    assert_eq!(ch["schema"][1], v["model"]["schema"]);
    assert_eq!(ch["id"][1], v["model"]["id"]);
    assert_ne!(ch["id"][0], ch["id"][1]);
    assert_eq!(ch["train_rows"][0], 1600);
    assert_eq!(ch["train_rows"][1], 960);
    assert_eq!(ch["mixture"][0], 2);
    assert_eq!(ch["mixture"][1], 3);
    assert_eq!(ch["weights"][1].as_array().unwrap().len(), 3);
    let m = ch["components"][0]
        .as_u64()
        .unwrap()
        .max(ch["components"][1].as_u64().unwrap());
    assert_eq!(ch["explained"].as_array().unwrap().len() as u64, m);
    assert_eq!(ch["limits"].as_array().unwrap().len(), 3);
    assert_eq!(ch["limits"][0]["score"], "spe");
    assert_eq!(
        ch["limits"][2]["new"]["cusum_limit"],
        v["limits"][2]["cusum_limit"]
    );
    assert_eq!(ch["features"].as_array().unwrap().len(), 4);
    // The residual chart's limit and the features it watches, old and new,
    // as each model's own summary gives them.
    assert_eq!(ch["residual_chart"][1][0], v["resid_limit"]);
    let on = v["features"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|f| f["resid_gain"].as_f64().unwrap() > 0.0)
        .count();
    assert_eq!(ch["residual_chart"][1][1].as_u64(), Some(on as u64));
    assert_eq!(ch["residual_chart"][1][2], v["resid_whitened"]);
    // Each feature a chart watches says which constant bias moves the chart
    // to its limit (`residual::bias_at_limit`, checked against the detector
    // in its own test).
    for f in v["features"].as_array().unwrap() {
        if f["resid_gain"].as_f64().unwrap() > 0.0 {
            let b = f["bias_at_limit"].as_f64();
            assert!(b.is_some_and(|b| b > 0.0 && b.is_finite()), "{f}");
        }
    }
    // The text ends with the changes.
    let o = refit(&[]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    for needle in [
        "bias at limit",
        "Changes from the base model",
        "kept (4 features, same names, order and units)",
        "old explained",
        "mixture: k 2 -> 3",
        "limits (old -> new)",
        "spe residual chart: ",
        "drift-state settings unchanged",
    ] {
        assert!(text.contains(needle), "{needle}: {text}");
    }
    let o = refit(&["--raise-dwell", "5", "--quiet"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let o = refit(&["--raise-dwell", "5"]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("raise dwell 3 -> 5"), "{text}");

    // Logs that do not match the base schema: refused, naming file and column.
    let base_s = base.display().to_string();
    let with = ["--base", base_s.as_str()];
    let cases = [
        (
            "missing.csv",
            "t[s],x0[A],x1[V],x2[A]",
            ":1 (x3): expected a column named \"x3\" (feature 4 of the base model",
            "), found none",
        ),
        (
            "unit.csv",
            "t[s],x0[mA],x1[V],x2[A],x3[V]",
            ":1:2 (x0): expected unit \"A\" as in the base model",
            "",
        ),
        (
            "order.csv",
            "t[s],x1[V],x0[A],x2[A],x3[V]",
            ":1:2 (x1): feature 1 of the base model",
            "",
        ),
        (
            "extra.csv",
            "t[s],x0[A],x1[V],x2[A],x3[V],x9[V]",
            ":1:6 (x9): unexpected column: the base model",
            "",
        ),
    ];
    for (name, header, needle, tail) in cases {
        let p = edited(&d, name, 1, |_| header.to_string());
        let want = format!("{}{needle}", p.display());
        fit_fails(&d, &[&p], &with, &[&want, &base_s, tail]);
    }
    // A damaged base model.
    let bad = d.write("bad.plumb", "not a model");
    let bad_s = bad.display().to_string();
    fit_fails(
        &d,
        &[&c],
        &["--base", &bad_s],
        &["not a usable model file", &bad_s],
    );
}

#[test]
fn a_closed_pipe_ends_output_quietly() {
    // `plumb inspect model | head -1`: the reader goes away. The read end is
    // closed before plumb starts, so its first write fails whatever the
    // timing; plumb must end with 141 (128 + SIGPIPE, as a Unix tool killed
    // by that signal) and no panic message.
    let model =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../firmware/boards/mps2-an386/default.plumb");
    let (reader, writer) = std::io::pipe().unwrap();
    drop(reader);
    let o = std::process::Command::new(env!("CARGO_BIN_EXE_plumb"))
        .arg("inspect")
        .arg(&model)
        .stdout(writer)
        .stderr(std::process::Stdio::piped())
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(141), "{}", stderr(&o));
    assert!(o.stderr.is_empty(), "{}", stderr(&o));
}

#[test]
fn fit_is_the_same_with_and_without_avx2() {
    // The numeric kernels run compiled for AVX2 where the processor has it
    // (plumb::simd); PLUMB_SIMD=baseline keeps the baseline build. Same
    // operations in the same order: the model files must be the same bytes.
    // 9,000 rows of 12 features: many 128-row tiles and a partial one.
    let d = Scratch::new("simd");
    let a = d.write("a.csv", &log_text(12, 9000, 5));
    let mut files = Vec::new();
    for mode in ["baseline", "native"] {
        let out = d.path(&format!("{mode}.plumb"));
        let o = std::process::Command::new(env!("CARGO_BIN_EXE_plumb"))
            .args(["fit", s(&a), "--out", s(&out), "--mixture", "3", "--quiet"])
            .env("PLUMB_SIMD", mode)
            .output()
            .unwrap();
        assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
        files.push(std::fs::read(&out).unwrap());
    }
    if !plumb::simd::avx2() {
        // Then both runs took the baseline path and the comparison below
        // proves nothing: in CI (.ci/run sets CI=true) that is a failure,
        // elsewhere a note.
        assert!(
            std::env::var("CI").as_deref() != Ok("true"),
            "CI=true but this processor has no AVX2: the AVX2 path was not tested"
        );
        eprintln!("this processor has no AVX2: both runs took the baseline path");
    }
    assert!(files[0] == files[1], "AVX2 and baseline fits differ");
}

#[test]
fn spill_file_spares_a_parse_and_changes_nothing() {
    // The training rows of CSV logs go to a binary spill file in pass 1 and
    // the projection reads it back: the model must be the very bytes of a
    // fit that parses the logs twice, and the spill file must be gone.
    let d = Scratch::new("spill");
    let a = d.write("a.csv", &log_text(6, 4000, 8));
    let b = d.write("b.csv", &log_text(6, 3000, 9));
    let spill = d.path("spill");
    std::fs::create_dir(&spill).unwrap();
    let fit = |out: &str, extra: &[&str]| {
        let out = d.path(out);
        let mut args = vec!["fit", s(&a), s(&b), "--out", s(&out), "--quiet", "--json"];
        args.extend_from_slice(extra);
        let o = plumb_ok(&args);
        let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        (
            std::fs::read(&out).unwrap(),
            v["fit"]["warnings"].to_string(),
        )
    };
    let (twice, _) = fit("twice.plumb", &["--no-spill"]);
    let (once, warnings) = fit("once.plumb", &["--spill-dir", s(&spill)]);
    assert!(once == twice, "the spill changed the model");
    assert!(!warnings.contains("spill"), "{warnings}");
    assert_eq!(
        std::fs::read_dir(&spill).unwrap().count(),
        0,
        "spill file left behind"
    );
    // A spill folder that cannot be written: a warning, and the fit goes on.
    let (fallback, warnings) = fit("fallback.plumb", &["--spill-dir", s(&d.path("missing"))]);
    assert!(fallback == twice);
    assert!(warnings.contains("no spill file"), "{warnings}");
}

/// `plumb fit` stores, per mixture component, the mean and standard
/// deviation (ddof = 1) of ∛SPE over the held-out rows whose most likely
/// component it is: recomputed here in f64 from the stored model with the
/// formulas of FORMAT.md (standardise, project, residual, diagonal Gaussian
/// log-densities), independent of the f32 detector.
#[test]
fn spe_by_mode_is_the_held_out_moments_of_each_mode() {
    let dir = Scratch::new("modes");
    let a = dir.write("a.csv", &log_text(5, 1500, 1));
    let h = dir.write("h.csv", &log_text(5, 2000, 7));
    let out = dir.path("m.plumb");
    plumb_ok(&[
        "fit",
        s(&a),
        "--holdout",
        s(&h),
        "--out",
        s(&out),
        "--mixture",
        "3",
        "--restarts",
        "1",
        "--quiet",
        "--threads=2",
    ]);
    let file = plumb_model::file::ModelFile::from_bytes(&std::fs::read(&out).unwrap()).unwrap();
    let md = &file.model;
    let (d, m, k) = (
        usize::from(md.dims.features),
        usize::from(md.dims.components),
        usize::from(md.dims.mixture),
    );
    let f = |v: f32| f64::from(v);
    // (n, Σg, Σg²) per mode.
    let mut acc = vec![(0u64, 0.0f64, 0.0f64); k];
    for line in std::fs::read_to_string(&h).unwrap().lines().skip(1) {
        // Column 0 is the time; the features follow in model order. The
        // tool rounds each value to f32 before scoring.
        let x: Vec<f64> = line
            .split(',')
            .skip(1)
            .map(|c| f(c.parse::<f64>().unwrap() as f32))
            .collect();
        assert_eq!(x.len(), d);
        let z: Vec<f64> = (0..d)
            .map(|i| (x[i] - f(md.mean[i])) / f(md.scale[i]))
            .collect();
        let t: Vec<f64> = (0..m)
            .map(|j| (0..d).map(|i| z[i] * f(md.loadings[i * m + j])).sum())
            .collect();
        let spe: f64 = (0..d)
            .map(|i| {
                let r = z[i]
                    - (0..m)
                        .map(|j| f(md.loadings[i * m + j]) * t[j])
                        .sum::<f64>();
                r * r
            })
            .sum();
        let logp = |c: usize| -> f64 {
            (0..m).fold(f(md.weights[c]).ln(), |a, j| {
                let v = f(md.mix_variances[c * m + j]);
                let e = t[j] - f(md.mix_means[c * m + j]);
                a - 0.5 * ((2.0 * std::f64::consts::PI * v).ln() + e * e / v)
            })
        };
        let mode = (0..k).fold(0, |b, c| if logp(c) > logp(b) { c } else { b });
        let g = spe.cbrt();
        acc[mode].0 += 1;
        acc[mode].1 += g;
        acc[mode].2 += g * g;
    }
    // Tolerance: the detector's f32 SPE is within 1e-4 · ‖z‖² of the f64 one
    // (firmware/tests/detector.rs, f32_scores_match_f64_reference), which
    // moves ∛SPE by at most about 1e-3 here (∛ of SPE ≥ 0.01 for these
    // rows); a mean or standard deviation moves no more than its terms.
    let mut own = 0;
    for (c, &(n, s1, s2)) in acc.iter().enumerate() {
        let (centre, spread) = (f(md.spe_center_by_mode[c]), f(md.spe_spread_by_mode[c]));
        if n < 2 {
            // Too few rows: the global centre and spread.
            assert_eq!(centre, f(md.monitor.spe.center), "mode {c}");
            assert_eq!(spread, f(md.monitor.spe.spread), "mode {c}");
            continue;
        }
        own += 1;
        let mean = s1 / n as f64;
        let sd = ((s2 - n as f64 * mean * mean) / (n - 1) as f64).sqrt();
        assert!(
            (centre - mean).abs() < 1e-3,
            "mode {c}: centre {centre} vs {mean}"
        );
        assert!(
            (spread - sd).abs() < 1e-3,
            "mode {c}: spread {spread} vs {sd}"
        );
    }
    assert!(own >= 2, "at least two modes hold rows: {acc:?}");
}

/// Format 1–4 files (FORMAT.md, history): the host reads them, says so, and
/// replays each exactly as the same model written in the current format
/// with the residual chart off (format 3: without a whitening matrix;
/// format 1: every mode at the global SPE centre and spread too; format 4:
/// without slow charts); `plumb upload` refuses them before sending, since
/// boards read the current format only.
#[test]
fn format_1_to_4_models_are_read_by_the_host_and_refused_for_a_board() {
    let dir = Scratch::new("format1");
    let a = dir.write("a.csv", &log_text(4, 1200, 1));
    let b = dir.write("b.csv", &log_text(4, 1200, 2));
    let v3 = dir.path("v3.plumb");
    let mut args = vec!["fit", s(&a), "--out", s(&v3)];
    args.extend(FAST); // --mixture 2
    plumb_ok(&args);
    let bytes = std::fs::read(&v3).unwrap();
    let word = |at: usize| u32::from_le_bytes(bytes[at..at + 4].try_into().unwrap()) as usize;
    let (payload, labels) = (word(8), word(12));
    // Downgrade: drop fields 34–35 (no slow charts: a length byte and the
    // f32 limit) for version 4, field 33 too (one log: the chart off, no
    // matrix, a length byte) for version 3, fields 30–32 too (d = 4: two × (length byte + 4
    // f32) and one f32) for version 2, and fields 28–29 too (k = 2: two ×
    // (length byte + 2 f32)) for version 1.
    let older = |version: u8, cut: usize| {
        let body = &bytes[16..16 + payload - cut];
        let mut out = b"PLMD".to_vec();
        out.extend_from_slice(&[version, 0, 0, 0]);
        out.extend_from_slice(&(body.len() as u32).to_le_bytes());
        out.extend_from_slice(&(labels as u32).to_le_bytes());
        out.extend_from_slice(body);
        out.extend_from_slice(&bytes[16 + payload..16 + payload + labels]);
        out.extend_from_slice(&plumb_model::file::crc32(&out).to_le_bytes());
        out
    };
    // A shifted log, so the replays have flags to compare.
    let mut rows = lines(&log_text(4, 1500, 3));
    for r in rows.iter_mut().skip(800) {
        let mut cells: Vec<String> = r.split(',').map(str::to_string).collect();
        let v: f64 = cells[2].parse().unwrap();
        cells[2] = format!("{:.5}", v + 3.0);
        *r = cells.join(",");
    }
    let log = dir.write("shifted.csv", &join(&rows));
    let replay = |m: &Path| {
        let o = plumb(&["replay", s(m), s(&log), s(&b), "--json"]);
        assert!(o.status.code() == Some(1), "{}", stderr(&o));
        String::from_utf8_lossy(&o.stdout).into_owned()
    };
    for (version, cut) in [(1u8, 5 + 1 + 38 + 18), (2, 5 + 1 + 38), (3, 5 + 1), (4, 5)] {
        let old_bytes = older(version, cut);
        let old = dir.path(&format!("v{version}.plumb"));
        std::fs::write(&old, &old_bytes).unwrap();
        // The same model in the current format, the residual chart off and
        // (version 1) the modes at the global values.
        let file = plumb_model::file::ModelFile::from_bytes(&old_bytes).unwrap();
        let m = &file.model;
        assert!(m.resid_gain.iter().all(|g| *g == 0.0), "{version}");
        if version == 1 {
            let spe = m.monitor.spe;
            assert_eq!(m.spe_center_by_mode, vec![spe.center; 2]);
            assert_eq!(m.spe_spread_by_mode, vec![spe.spread; 2]);
        }
        let same = dir.path(&format!("same{version}.plumb"));
        std::fs::write(&same, file.to_bytes().unwrap()).unwrap();

        let o = plumb_ok(&["inspect", s(&old)]);
        let text = String::from_utf8_lossy(&o.stdout);
        assert!(text.contains(&format!("format {version})")), "{text}");
        let how = match version {
            3 => "residual chart on unwhitened residuals",
            4 => "without slow charts",
            _ => "residual chart off",
        };
        assert!(text.contains(how), "{text}");
        assert!(text.contains("boards read format 5 only"), "{text}");

        assert_eq!(replay(&old), replay(&same), "version {version}");

        let o = plumb(&["upload", s(&old), "--port", "/dev/null"]);
        assert_eq!(o.status.code(), Some(2));
        assert!(
            stderr(&o).contains(&format!("version {version}")),
            "{}",
            stderr(&o)
        );
    }
}

/// Expects exit code 2 and every needle on stderr.
fn refused(args: &[&str], needles: &[&str]) -> String {
    let o = plumb(args);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "{args:?}: {err}");
    for n in needles {
        assert!(err.contains(n), "{args:?}: expected {n:?} in: {err}");
    }
    assert!(!err.contains("panicked"), "{err}");
    err
}

#[test]
fn listen_for_takes_a_sane_number_of_seconds() {
    // `inf` and `1e20` used to panic with the program still running.
    for v in ["inf", "1e20", "1e10", "0", "-1", "nan", "soon"] {
        let arg = format!("--for={v}");
        refused(
            &["listen", "--exec", "cat", "--no-greeting", "--plain", &arg],
            &["--for", "expected"],
        );
    }
    plumb_ok(&[
        "listen",
        "--exec",
        "cat",
        "--no-greeting",
        "--plain",
        "--for",
        "0.2",
    ]);
}

#[test]
fn link_counts_are_checked() {
    let link = ["--exec", "cat"];
    for (cmd, bad) in [
        ("listen", ["--reply-ms", "0"]),
        ("listen", ["--reply-ms", "18446744073709551615"]),
        ("listen", ["--tries", "0"]),
        ("listen", ["--baud", "0"]),
        ("upload", ["--tries", "0"]),
        ("feed", ["--window", "0"]),
    ] {
        let mut args = vec![cmd];
        if cmd != "listen" {
            args.push("m.plumb");
        }
        if cmd == "feed" {
            args.push("log.csv");
        }
        args.extend(link);
        args.extend(bad);
        refused(&args, &[bad[0]]);
    }
}

/// The emulated board's model (24 features, the demo logs' columns).
fn board_model(dir: &Scratch) -> PathBuf {
    let bytes = std::fs::read(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../firmware/boards/mps2-an386/default.plumb"),
    )
    .unwrap();
    let p = dir.path("m.plumb");
    std::fs::write(&p, bytes).unwrap();
    p
}

/// The first `rows` rows of a demo log.
fn demo_head(dir: &Scratch, name: &str, rel: &str, rows: usize) -> PathBuf {
    let text = std::fs::read_to_string(common::demo(rel)).unwrap();
    let head: Vec<String> = text.lines().take(rows + 1).map(str::to_string).collect();
    dir.write(name, &join(&head))
}

fn no_temporaries(dir: &Scratch) {
    let left: Vec<PathBuf> = std::fs::read_dir(&dir.0)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.to_string_lossy().ends_with(".tmp"))
        .collect();
    assert!(left.is_empty(), "temporary files left: {left:?}");
}

#[test]
fn an_output_that_is_an_input_is_refused_before_any_work() {
    let d = Scratch::new("same-file");
    let m = board_model(&d);
    let log = demo_head(&d, "a.csv", "holdout/robot1_day3.csv", 300);
    let key = d.write("k", "plumb-ed25519-secret 00\n");
    let before = |p: &Path| std::fs::read(p).unwrap();
    let (m0, log0, key0) = (before(&m), before(&log), before(&key));
    let (m, log, key) = (s(&m), s(&log), s(&key));
    // The same file by another spelling counts too.
    let dotted = format!("{}/./a.csv", d.0.display());
    let link = ["--exec", "cat"];
    let cases: Vec<(Vec<&str>, &str, &str)> = vec![
        (vec!["fit", log, "--out", log], "--out", "input (log"),
        (vec!["fit", log, "--out", &dotted], "--out", "input (log"),
        (vec!["report", m, log, "--out", m], "--out", "input (model"),
        (vec!["report", m, log, "--out", log], "--out", "input (log"),
        (
            vec![
                "image",
                m,
                "--board",
                "mps2-an386",
                "--slot",
                "a",
                "--out",
                m,
            ],
            "--out",
            "input (model",
        ),
        (
            vec!["replay", m, log, "--trace", m],
            "--trace",
            "input (model",
        ),
        (
            vec!["replay", m, log, "--trace", log],
            "--trace",
            "input (log",
        ),
        (
            vec!["feed", m, log, "--trace", log],
            "--trace",
            "input (log",
        ),
        (
            vec!["feed", m, log, "--record-samples", log],
            "--record-samples",
            "input (log",
        ),
        (
            vec!["feed", m, log, "--record", m],
            "--record",
            "input (model",
        ),
        (
            vec!["listen", "--model", m, "--record", m],
            "--record",
            "input (model",
        ),
        (
            vec!["listen", "--model", m, "--record-samples", m],
            "--record-samples",
            "input (model",
        ),
        (
            vec!["sign", m, "--key", key, "--out", key],
            "--out",
            "input (secret key",
        ),
    ];
    for (mut args, option, what) in cases {
        if matches!(args[0], "feed" | "listen") {
            args.extend(link);
        }
        let err = refused(&args, &[option, what, "choose another file"]);
        assert!(err.contains("is also an input"), "{err}");
        assert_eq!(before(Path::new(m)), m0, "{args:?} changed the model");
        assert_eq!(before(Path::new(log)), log0, "{args:?} changed the log");
        assert_eq!(before(Path::new(key)), key0, "{args:?} changed the key");
    }
    // Two outputs on one file.
    let t = d.path("t.csv");
    refused(
        &[
            "feed",
            m,
            log,
            "--trace",
            s(&t),
            "--record",
            s(&t),
            "--exec",
            "cat",
        ],
        &["--record", "also the file of --trace"],
    );
    no_temporaries(&d);
}

#[test]
fn a_failed_replay_or_feed_leaves_an_existing_output_as_it_was() {
    let d = Scratch::new("keep");
    let m = board_model(&d);
    let good = demo_head(&d, "good.csv", "holdout/robot1_day3.csv", 300);
    let mut bad = lines(&std::fs::read_to_string(&good).unwrap());
    bad[200] = bad[200].rsplit_once(',').unwrap().0.to_string();
    let bad = d.write("bad.csv", &join(&bad));
    let keep = d.write("keep.csv", "old\n");
    refused(
        &[
            "replay",
            s(&m),
            s(&good),
            s(&bad),
            "--trace",
            s(&keep),
            "--quiet",
        ],
        &["bad.csv:201"],
    );
    assert_eq!(std::fs::read_to_string(&keep).unwrap(), "old\n");
    // A replay that succeeds replaces it.
    let o = plumb(&["replay", s(&m), s(&good), "--trace", s(&keep), "--quiet"]);
    assert!(matches!(o.status.code(), Some(0 | 1)), "{}", stderr(&o));
    assert!(std::fs::read_to_string(&keep)
        .unwrap()
        .starts_with("log,sample,"));
    // Feed: a link that cannot be opened touches no output.
    for option in ["--trace", "--record", "--record-samples"] {
        let keep = d.write("keep2.csv", "old\n");
        let port = d.path("no-such-port");
        refused(
            &[
                "feed",
                s(&m),
                s(&good),
                option,
                s(&keep),
                "--port",
                s(&port),
            ],
            &["no-such-port"],
        );
        assert_eq!(std::fs::read_to_string(&keep).unwrap(), "old\n", "{option}");
    }
    // A feed that fails on the link: the trace is all or nothing.
    let keep = d.write("keep3.csv", "old\n");
    refused(
        &[
            "feed",
            s(&m),
            s(&good),
            "--trace",
            s(&keep),
            "--exec",
            "true",
            "--reply-ms",
            "50",
            "--tries",
            "2",
            "--quiet",
        ],
        &[],
    );
    assert_eq!(std::fs::read_to_string(&keep).unwrap(), "old\n");
    // Listen: a link that cannot be opened touches no recording.
    let keep = d.write("keep4.csv", "old\n");
    let port = d.path("no-such-port");
    refused(
        &[
            "listen",
            "--record",
            s(&keep),
            "--port",
            s(&port),
            "--plain",
        ],
        &["no-such-port"],
    );
    assert_eq!(std::fs::read_to_string(&keep).unwrap(), "old\n");
    // Image: written whole.
    let img = d.write("slot.hex", "old\n");
    plumb_ok(&[
        "image",
        s(&m),
        "--board",
        "mps2-an386",
        "--slot",
        "a",
        "--out",
        s(&img),
    ]);
    assert!(std::fs::read_to_string(&img).unwrap().starts_with(':'));
    no_temporaries(&d);
}

#[test]
fn keygen_says_a_folder_is_a_folder_and_leaves_no_half_pair() {
    let d = Scratch::new("keygen");
    refused(&["keygen", "--out", s(&d.0)], &["is a folder"]);
    let k = d.path("k");
    std::fs::create_dir(d.path("k.pub")).unwrap();
    refused(
        &["keygen", "--out", s(&k), "--force"],
        &["k.pub: is a folder"],
    );
    assert!(!k.exists(), "a secret key without its public key");
    let long = d.path(&"s".repeat(252));
    refused(&["keygen", "--out", s(&long)], &[".pub"]);
    assert!(!long.exists(), "a secret key without its public key");
    no_temporaries(&d);
}

#[test]
fn no_sample_at_all_is_not_a_clean_run() {
    let d = Scratch::new("empty");
    let m = board_model(&d);
    let full = demo_head(&d, "full.csv", "holdout/robot1_day3.csv", 200);
    let empty = demo_head(&d, "empty.csv", "holdout/robot1_day3.csv", 0);
    let trace = d.path("t.csv");
    let err = refused(
        &["replay", s(&m), s(&empty), "--trace", s(&trace)],
        &[
            &format!("warning: 0 samples in {}", s(&empty)),
            "nothing was checked",
        ],
    );
    assert!(!trace.exists(), "{err}");
    refused(
        &["report", s(&m), s(&empty), "--out", s(&d.path("r.html"))],
        &["0 samples in", "nothing was checked"],
    );
    assert!(!d.path("r.html").exists());
    // One empty log among others: warned about, the rest is checked.
    let o = plumb(&["replay", s(&m), s(&empty), s(&full), "--quiet"]);
    assert!(matches!(o.status.code(), Some(0 | 1)), "{}", stderr(&o));
    assert!(stderr(&o).contains("0 samples in"), "{}", stderr(&o));
    // Every row faulted: warned about.
    let text = std::fs::read_to_string(&full).unwrap();
    let mut ls = lines(&text);
    for l in ls.iter_mut().skip(1) {
        *l = set_field(l, 2, "");
    }
    let faulted = d.write("faulted.csv", &join(&ls));
    let o = plumb(&["replay", s(&m), s(&faulted), "--quiet"]);
    assert!(
        stderr(&o).contains("all 200 samples in") && stderr(&o).contains("sensor faults"),
        "{}",
        stderr(&o)
    );
}

#[test]
fn skip_bad_rows_leaves_rows_out_of_replay_and_report() {
    let d = Scratch::new("skip-replay");
    let m = board_model(&d);
    let full = demo_head(&d, "full.csv", "holdout/robot1_day3.csv", 300);
    let mut ls = lines(&std::fs::read_to_string(&full).unwrap());
    for i in [10, 20, 30] {
        ls[i] = set_field(&ls[i], 3, "NaN");
    }
    let holes = d.write("holes.csv", &join(&ls));
    let run = |extra: &[&str]| {
        let mut args = vec!["replay", s(&m), s(&holes), "--json"];
        args.extend(extra);
        let o = plumb(&args);
        assert!(matches!(o.status.code(), Some(0 | 1)), "{}", stderr(&o));
        let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        v["logs"][0].clone()
    };
    let passed = run(&[]);
    assert_eq!(passed["samples"], 300);
    assert_eq!(passed["skipped"], 0);
    assert!(passed["faults"].as_u64().unwrap() >= 3, "{passed}");
    let skipped = run(&["--skip-bad-rows"]);
    assert_eq!(skipped["samples"], 297);
    assert_eq!(skipped["skipped"], 3);
    assert_eq!(
        skipped["faults"].as_u64().unwrap() + 3,
        passed["faults"].as_u64().unwrap(),
        "{skipped}"
    );
    let o = plumb(&["replay", s(&m), s(&holes), "--skip-bad-rows"]);
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(out.contains("3 rows skipped"), "{out}");
    let html = d.path("r.html");
    let o = plumb(&[
        "report",
        s(&m),
        s(&holes),
        "--out",
        s(&html),
        "--skip-bad-rows",
        "--json",
    ]);
    assert!(matches!(o.status.code(), Some(0 | 1)), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["logs"][0]["skipped"], 3, "{v}");
}

#[test]
fn em_settings_name_the_offending_option() {
    let d = Scratch::new("em-settings");
    let p = d.write("a.csv", &log_text(4, 1000, 1));
    for (opt, v, want) in [
        ("--tol", "0", "--tol must be a number above 0, found 0"),
        ("--reg-covar", "-1", "--reg-covar must be a number ≥ 0"),
        ("--var-floor", "2", "--var-floor is a fraction"),
        ("--var-floor", "-0.5", "expected 0 to 1"),
    ] {
        let arg = format!("{opt}={v}");
        let err = fit_fails(&d, &[&p], &[&arg], &[want]);
        let others = ["--tol", "--reg-covar", "--var-floor"];
        for o in others.iter().filter(|o| **o != opt) {
            assert!(!err.contains(o), "{opt}: {err}");
        }
    }
}

/// The SPE's residual chart needs held-out logs of more than one robot or
/// day to bound each feature's level in a new one (host-tools/src/
/// residual.rs, step 2): with one held-out log `plumb fit` leaves it off and
/// says why; with two it is on.
#[test]
fn the_residual_chart_is_off_with_one_held_out_log_and_on_with_two() {
    let dir = Scratch::new("resid-logs");
    let a = dir.write("a.csv", &log_text(4, 1200, 1));
    let h1 = dir.write("h1.csv", &log_text(4, 1500, 5));
    let h2 = dir.write("h2.csv", &log_text(4, 1500, 6));
    let gains = |out: &Path| {
        let file = plumb_model::file::ModelFile::from_bytes(&std::fs::read(out).unwrap()).unwrap();
        file.model.resid_gain
    };
    // Not quiet: the warnings are part of the summary.
    let opts = ["--mixture", "2", "--restarts", "1", "--threads=2"];
    let said =
        |o: &std::process::Output| format!("{}{}", String::from_utf8_lossy(&o.stdout), stderr(o));
    let one = dir.path("one.plumb");
    let mut args = vec!["fit", s(&a), "--holdout", s(&h1), "--out", s(&one)];
    args.extend(opts);
    let o = plumb_ok(&args);
    assert!(
        said(&o).contains("held-out rows come from one log, so the SPE's residual chart is off"),
        "{}",
        said(&o)
    );
    assert!(gains(&one).iter().all(|g| *g == 0.0));
    let o = plumb(&["inspect", s(&one)]);
    assert!(
        String::from_utf8_lossy(&o.stdout).contains("spe residual chart: off"),
        "{}",
        String::from_utf8_lossy(&o.stdout)
    );

    let held = dir.path("held");
    std::fs::create_dir_all(&held).unwrap();
    std::fs::copy(&h1, held.join("h1.csv")).unwrap();
    std::fs::copy(&h2, held.join("h2.csv")).unwrap();
    let two = dir.path("two.plumb");
    let mut args = vec!["fit", s(&a), "--holdout", s(&held), "--out", s(&two)];
    args.extend(opts);
    let o = plumb_ok(&args);
    assert!(!said(&o).contains("residual chart is off"), "{}", said(&o));
    assert!(
        said(&o).contains("from the 2 held-out logs"),
        "{}",
        said(&o)
    );
    assert!(gains(&two).iter().any(|g| *g > 0.0), "{:?}", gains(&two));
    // On by default, the chart smooths whitened residuals (format 4: a 4 × 4
    // matrix); `--residual-input plain` keeps format 3's chart (no matrix).
    let matrix = |out: &Path| {
        let file = plumb_model::file::ModelFile::from_bytes(&std::fs::read(out).unwrap()).unwrap();
        file.model.resid_whiten
    };
    assert_eq!(matrix(&two).len(), 16);
    let text = String::from_utf8_lossy(&plumb_ok(&["inspect", s(&two)]).stdout).into_owned();
    assert!(text.contains("v the whitened residual"), "{text}");
    let plain = dir.path("plain.plumb");
    let mut args = vec!["fit", s(&a), "--holdout", s(&held), "--out", s(&plain)];
    args.extend(opts);
    args.extend(["--residual-input", "plain"]);
    plumb_ok(&args);
    assert!(matrix(&plain).is_empty());
    assert!(
        gains(&plain).iter().any(|g| *g > 0.0),
        "{:?}",
        gains(&plain)
    );
    let text = String::from_utf8_lossy(&plumb_ok(&["inspect", s(&plain)]).stdout).into_owned();
    assert!(text.contains("v the plain residual"), "{text}");
    refused(
        &["fit", s(&a), "--residual-input", "sideways"],
        &["--residual-input", "sideways"],
    );
}
