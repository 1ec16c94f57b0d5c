//! `plumb tailor`: slow charts set on one robot's own logs (model format 5).

mod common;

use common::{demo, plumb, plumb_ok, Scratch};
use plumb::logs::ReadOptions;
use plumb::progress::Stage;
use plumb::tailor::{design_delay, tailor, TailorConfig, CANDIDATES};
use plumb_model::file::ModelFile;
use plumb_model::{MAX_SLOW, SLOW_PARAMS};
use std::path::{Path, PathBuf};

/// The board's model: a fleet model `plumb fit` wrote, with labels and the
/// residual chart on.
fn fleet() -> ModelFile {
    let p =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../firmware/boards/mps2-an386/default.plumb");
    ModelFile::from_bytes(&std::fs::read(p).unwrap()).unwrap()
}

/// Nominal logs of the demo's robots (seed 424242, days of their own),
/// `files` logs of `rows / files` rows.
fn nominal(dir: &Scratch, rows: usize, files: usize) -> PathBuf {
    let p = dir.path("own");
    plumb_scenario::write_bulk_holdout(&p, 424_242, rows, files).unwrap();
    p
}

/// Step 3's design delay is when an EWMA of a step of `shift` from 0 first
/// exceeds `limit · scale`: checked against the recursion itself, for every
/// candidate constant and thresholds from a tenth to nearly all of the
/// step (the delay rounds up to the first sample over).
#[test]
fn the_design_delay_is_when_an_ewma_of_a_step_crosses() {
    for lam in CANDIDATES {
        for q in [0.1, 0.5, 0.9, 0.99] {
            let (limit, scale, shift) = (2.0, q / 2.0 * 1.5, 1.5);
            let n = design_delay(limit, scale, shift, lam).unwrap();
            let (mut e, mut steps) = (0.0f64, 0u32);
            while e <= limit * scale {
                e += lam * (shift - e);
                steps += 1;
            }
            // (At an integer n the EWMA meets the threshold exactly there
            // and is over it one step later.)
            assert!(
                f64::from(steps) - 1.0 <= n && n <= f64::from(steps),
                "λ {lam}, q {q}: design {n}, recursion {steps}"
            );
        }
        // A threshold at or beyond the step is never crossed.
        assert_eq!(design_delay(2.0, 0.75, 1.5, lam), None);
        assert_eq!(design_delay(2.0, 1.0, 1.5, lam), None);
    }
}

/// Tailoring keeps every part of the base model but the slow charts, adds
/// at most 16 with slower constants than the model's own, packs them as
/// FORMAT.md says (feature, λ, centre, gain; features ascending), and sets
/// one limit at or above 1 that meets the allowance on the given rows.
#[test]
fn tailoring_adds_slow_charts_and_keeps_the_rest() {
    let dir = Scratch::new("tailor");
    let logs = nominal(&dir, 200_000, 8);
    let base = fleet();
    let mut file = base.clone();
    let report = tailor(
        &mut file,
        &[logs],
        ReadOptions::default(),
        &TailorConfig::default(),
        &Stage::hidden(),
    )
    .unwrap();
    assert_eq!(report.logs, 8);
    assert!(report.rows > 190_000, "{}", report.rows);
    assert!(!report.charts.is_empty(), "{report:?}");
    assert!(report.charts.len() <= MAX_SLOW);
    let base_lambda = f64::from(base.model.monitor.ewma_lambda);
    let m = &file.model;
    assert_eq!(m.slow_charts.len(), SLOW_PARAMS * report.charts.len());
    for (c, p) in report
        .charts
        .iter()
        .zip(m.slow_charts.chunks_exact(SLOW_PARAMS))
    {
        assert!(
            c.lambda < base_lambda && CANDIDATES.contains(&c.lambda),
            "{c:?}"
        );
        assert_eq!(
            p,
            &[c.feature as f32, c.lambda as f32, c.center as f32, c.gain][..]
        );
        assert_eq!(file.labels[c.feature].name, c.name);
        assert!(c.gain > 0.0 && c.design_delay > 0.0);
        // Chosen for a shorter design delay than the model's own constant.
        if let Some(b) = c.base_design_delay {
            assert!(c.design_delay < b, "{c:?}");
        }
    }
    assert!(report
        .charts
        .windows(2)
        .all(|w| w[0].feature < w[1].feature));
    assert!(m.slow_limit >= 1.0 && m.slow_limit == report.limit);
    assert!(report.alarms <= report.allowed, "{report:?}");
    // Everything else is the base model's.
    let mut rest = m.clone();
    rest.slow_charts = base.model.slow_charts.clone();
    rest.slow_limit = base.model.slow_limit;
    assert_eq!(rest, base.model);
    m.to_device().unwrap();
    // Tailoring again on the same logs gives the same model.
    let mut again = file.clone();
    tailor(
        &mut again,
        &[dir.path("own")],
        ReadOptions::default(),
        &TailorConfig::default(),
        &Stage::hidden(),
    )
    .unwrap();
    assert_eq!(again.model, file.model);
}

/// Refusals say what is wrong: one log (no day-to-day spread), a model
/// whose residual chart is off, logs without the model's columns, and
/// settings out of range.
#[test]
fn tailoring_refuses_what_it_cannot_use() {
    let dir = Scratch::new("tailor-refuse");
    let one = dir.path("one");
    plumb_scenario::write_bulk_holdout(&one, 424_242, 2_000, 1).unwrap();
    let run = |file: &mut ModelFile, logs: &[PathBuf], cfg: &TailorConfig| {
        tailor(file, logs, ReadOptions::default(), cfg, &Stage::hidden())
            .unwrap_err()
            .to_string()
    };
    let cfg = TailorConfig::default();
    let e = run(&mut fleet(), std::slice::from_ref(&one), &cfg);
    assert!(e.contains("several logs"), "{e}");
    let mut off = fleet();
    off.model.resid_gain.iter_mut().for_each(|g| *g = 0.0);
    let e = run(&mut off, std::slice::from_ref(&one), &cfg);
    assert!(e.contains("residual chart is off"), "{e}");
    let bad = dir.write("bad.csv", "t[s],speed[m/s]\n0,1\n");
    let e = run(&mut fleet(), &[bad], &cfg);
    assert!(e.contains("bad.csv"), "{e}");
    for cfg in [
        TailorConfig {
            rate: 0.0,
            ..cfg.clone()
        },
        TailorConfig {
            shift: -1.0,
            ..cfg.clone()
        },
    ] {
        let e = run(&mut fleet(), std::slice::from_ref(&one), &cfg);
        assert!(e.contains("--"), "{e}");
    }
}

/// The command: writes the tailored model (which `plumb replay` runs, and
/// which names a slow chart's crossing as `spe/slow(feature)` when it
/// raises), prints its report as JSON, and refuses an output over an input.
#[test]
fn plumb_tailor_writes_a_model_replay_runs() {
    let dir = Scratch::new("tailor-cli");
    let logs = nominal(&dir, 200_000, 8);
    let base = dir.path("base.plumb");
    std::fs::write(&base, fleet().to_bytes().unwrap()).unwrap();
    let out = dir.path("robot.plumb");
    let o = plumb_ok(&[
        "tailor",
        base.to_str().unwrap(),
        logs.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
        "--json",
        "-q",
    ]);
    let j: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(j["logs"], 8);
    // 200,000 rows give a budget under one false alarm: the report says so.
    assert!(
        j["warnings"][0].as_str().unwrap().contains("budget"),
        "{}",
        j["warnings"]
    );
    let charts = j["charts"].as_array().unwrap();
    let file = ModelFile::from_bytes(&std::fs::read(&out).unwrap()).unwrap();
    assert_eq!(file.model.slow_charts.len(), SLOW_PARAMS * charts.len());
    assert_eq!(j["limit"].as_f64().unwrap() as f32, file.model.slow_limit);
    assert_ne!(file.model.meta.id, fleet().model.meta.id, "a new model id");
    // The tailored model replays; with its slow limit lowered to the floor
    // of the range check's sense (a tiny positive value), the slow charts
    // raise the first flag and replay names them.
    let mut low = file.clone();
    low.model.slow_limit = 1e-6;
    let low_path = dir.path("low.plumb");
    std::fs::write(&low_path, low.to_bytes().unwrap()).unwrap();
    let o = plumb(&[
        "replay",
        low_path.to_str().unwrap(),
        demo("drift/gain_change.csv").to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(1), "a flag was raised");
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("spe/slow("), "{text}");
    // The output may not overwrite an input.
    let o = plumb(&[
        "tailor",
        base.to_str().unwrap(),
        logs.to_str().unwrap(),
        "--out",
        base.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(2));
}
