//! `plumb listen --record-samples` against the firmware's own endpoint on a
//! loopback TCP port, taking samples from its "own sensors" (rows of a demo
//! log, through `Endpoint::sample`, as a board's feature pipeline would):
//! listen turns the echo on, records every sample as a log, and that log
//! reads back to the very values the board took and refits with
//! `plumb fit --base`, closing the field loop without a host feeding the
//! board.

use plumb::logs::{BadCells, LogSet, ReadOptions, Selection};
use plumb::progress::Stage;
use plumb_firmware::endpoint::{Endpoint, RamSlots};
use plumb_model::file::ModelFile;
use std::io::{Read, Write};
use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

/// The model of the emulated board's image (24 features).
const MODEL: &[u8] = include_bytes!("../../firmware/boards/mps2-an386/default.plumb");

#[path = "../../firmware/tests/support/io.rs"]
mod io;
use io::{NoPin, Sink};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

fn read_rows(file: &ModelFile, log: &Path, rows: std::ops::Range<u64>) -> Vec<Vec<f32>> {
    let opts = ReadOptions {
        bad_cells: BadCells::PassAsNan,
        ..ReadOptions::default()
    };
    let set = LogSet::open_for_labels(&[log.to_path_buf()], &file.labels, opts).expect("open log");
    let mut out = Vec::new();
    set.for_each(&Selection(vec![rows]), &Stage::hidden(), |c| {
        for row in c.iter_rows() {
            out.push(row.iter().map(|&v| v as f32).collect());
        }
        Ok(())
    })
    .expect("read log");
    out
}

/// The board: answers the host, and once echoes are on takes one row of
/// `rows` every millisecond from its own pipeline; closes the connection
/// when every row is taken (and half a second has passed for the last
/// frames).
fn board(l: TcpListener, rows: Vec<Vec<f32>>) {
    let (mut c, _) = l.accept().unwrap();
    c.set_read_timeout(Some(Duration::from_millis(1))).unwrap();
    let mut ep = Endpoint::<RamSlots<8192>, NoPin>::boot(RamSlots::new(), NoPin, Some(MODEL))
        .expect("boots");
    let mut next = rows.iter();
    let deadline = Instant::now() + Duration::from_secs(20);
    let mut done: Option<Instant> = None;
    let mut buf = [0u8; 512];
    while Instant::now() < deadline && done.is_none_or(|d| d.elapsed() < Duration::from_millis(500))
    {
        let mut out = Sink::default();
        match c.read(&mut buf) {
            Ok(0) => return,
            Ok(n) => {
                ep.feed(&buf[..n], &mut out).expect("in-memory sink");
            }
            Err(_) => {}
        }
        if ep.echo() && done.is_none() {
            match next.next() {
                Some(x) => ep.sample(x, &mut out).expect("in-memory sink"),
                None => done = Some(Instant::now()),
            }
        }
        if c.write_all(&out.0).is_err() {
            return;
        }
    }
}

#[test]
fn listen_records_what_the_board_took_and_fit_refits_from_it() {
    let file = ModelFile::from_bytes(MODEL).expect("the board's model");
    let log = root().join("demo-logs/train/robot2_day1.csv");
    let rows = read_rows(&file, &log, 0..1500);
    assert_eq!(rows.len(), 1500);
    let l = TcpListener::bind("127.0.0.1:0").unwrap();
    let addr = l.local_addr().unwrap().to_string();
    let sent = rows.clone();
    let device = std::thread::spawn(move || board(l, sent));

    let dir = std::env::temp_dir().join(format!("plumb-listen-record-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let model = dir.join("board.plumb");
    std::fs::write(&model, MODEL).unwrap();
    let recorded = dir.join("field.csv");
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args([
            "listen",
            "--tcp",
            &addr,
            "--plain",
            "--no-reconnect",
            "--for",
            "30",
        ])
        .arg("--model")
        .arg(&model)
        .arg("--record-samples")
        .arg(&recorded)
        .output()
        .expect("run plumb listen");
    device.join().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        matches!(out.status.code(), Some(0 | 1)),
        "{stdout}\n{stderr}"
    );
    assert!(
        stderr.contains("recorded 1500 samples") && stderr.contains("(0 left out"),
        "{stderr}"
    );
    // Echo lines are per-sample data: shown only with --scores.
    assert!(!stdout.contains("features seq="), "{stdout}");

    // The log reads back, as `plumb fit` reads logs, to the values taken.
    let back = read_rows(&file, &recorded, 0..u64::MAX);
    assert_eq!(back.len(), rows.len());
    for (i, (a, b)) in back.iter().zip(&rows).enumerate() {
        let a: Vec<u32> = a.iter().map(|v| v.to_bits()).collect();
        let b: Vec<u32> = b.iter().map(|v| v.to_bits()).collect();
        assert_eq!(a, b, "row {i}");
    }
    // Times: the sample index times the model's period.
    let text = std::fs::read_to_string(&recorded).unwrap();
    let period = file.model.meta.sample_period_us;
    assert!(period > 0);
    let t2 = text.lines().nth(3).unwrap().split(',').next().unwrap();
    assert_eq!(t2.parse::<f64>().unwrap(), f64::from(2 * period) / 1e6);

    // And `plumb fit --base` takes it: same schema, a new model.
    let refit = dir.join("refit.plumb");
    let fit = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .arg("fit")
        .arg("--base")
        .arg(&model)
        .arg(&recorded)
        .arg("--out")
        .arg(&refit)
        .output()
        .expect("run plumb fit");
    assert_eq!(
        fit.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&fit.stderr)
    );
    let new = ModelFile::from_bytes(&std::fs::read(&refit).unwrap()).expect("a model");
    assert_eq!(new.model.meta.schema, file.model.meta.schema);
    let _ = std::fs::remove_dir_all(&dir);
}

/// `--record-samples` needs the board's model to name the columns.
#[test]
fn record_samples_needs_a_model() {
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args([
            "listen",
            "--tcp",
            "127.0.0.1:9",
            "--record-samples",
            "x.csv",
        ])
        .output()
        .expect("run plumb listen");
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("--model"));
}

#[test]
fn feed_past_the_end_of_the_log_is_not_a_clean_run() {
    let l = TcpListener::bind("127.0.0.1:0").unwrap();
    let addr = l.local_addr().unwrap().to_string();
    let device = std::thread::spawn(move || board(l, Vec::new()));
    let dir = std::env::temp_dir().join(format!("plumb-feed-empty-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let model = dir.join("board.plumb");
    std::fs::write(&model, MODEL).unwrap();
    let log = root().join("demo-logs/train/robot2_day1.csv");
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args([
            "feed",
            model.to_str().unwrap(),
            log.to_str().unwrap(),
            "--tcp",
            &addr,
            "--rows",
            "1000000..",
            "--quiet",
        ])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(
        err.contains("0 samples in") && err.contains("(rows 1000000..)"),
        "{err}"
    );
    assert!(err.contains("nothing was checked"), "{err}");
    device.join().unwrap();
    let _ = std::fs::remove_dir_all(&dir);
}
