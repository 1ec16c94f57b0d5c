//! The live view of `plumb listen`: [`LiveState`] fed a scripted session and
//! rendered to text (state words, gauges, flags, faults, counters), and the
//! real command under a pseudo-terminal (`script` from util-linux) playing
//! pre-encoded frames, its screen read back through an in-memory terminal.

mod common;
#[path = "../../shared-model/tests/support/mod.rs"]
mod support;

use common::Scratch;
use plumb::events::Names;
use plumb::link::{LinkStats, Notice, Received};
use plumb::live::{LiveState, ModelInfo, Screen};
use plumb_model::file::{Label, ModelFile};
use plumb_model::wire::{
    self, Ack, Crossing, DeviceFrame, DeviceMsg, DriftCleared, DriftRaised, FaultKind, FaultTally,
    Greeting, Level, LinkCounters, ScoreKind, ScoreReport, ScoreTriple, SensorFault, Share, Slot,
    State, Statistic, Status,
};
use plumb_model::{Capacity, Dims, MonitorParams};
use std::process::Command;
use std::time::Duration;

// ------------------------------------------------------------------ a session

const MODEL_ID: u32 = 0x1234_5678;
const FEATURES: [&str; 4] = ["wheel_rms", "motor_amps", "imu_yaw", "bearing_band"];

fn greeting() -> Greeting {
    Greeting {
        protocol: wire::PROTOCOL_VERSION,
        firmware: heapless::String::try_from("tugger-fw 0.3").unwrap(),
        model_id: MODEL_ID,
        schema: 0xfeed_beef_0000_0001,
        dims: Dims {
            features: 4,
            components: 2,
            mixture: 3,
        },
        capacity: Capacity {
            features: 64,
            components: 16,
            mixture: 8,
        },
        active: Some(Slot::A),
        generation: 2,
        status_every: 50,
    }
}

fn status(samples: u64, state: State, hot: u8, levels: [(f32, f32); 3]) -> Status {
    Status {
        samples,
        state,
        hot,
        faults: FaultTally {
            wrong_length: 0,
            non_finite: 0,
            out_of_range: 2,
            overflow: 0,
        },
        levels: levels.map(|(ewma, cusum)| Level { ewma, cusum }),
        link: LinkCounters {
            frames_ok: 7,
            crc_errors: 1,
            framing_errors: 0,
            overflows: 0,
            undecodable: 0,
        },
        last_event: None,
        model_id: MODEL_ID,
    }
}

fn raised(sample: u64) -> DriftRaised {
    let mut crossed = heapless::Vec::new();
    crossed
        .push(Crossing {
            score: ScoreKind::Spe,
            statistic: Statistic::Cusum,
            value: 6.5,
            limit: 5.0,
        })
        .unwrap();
    crossed
        .push(Crossing {
            score: ScoreKind::Spe,
            statistic: Statistic::Residual { feature: 3 },
            value: 1.5,
            limit: 1.25,
        })
        .unwrap();
    DriftRaised {
        sample,
        drivers: 0b001,
        scores: ScoreTriple {
            spe: 9.0,
            t2: 1.0,
            nll: 3.0,
        },
        crossed,
        top: [
            Share {
                feature: 3,
                value: 4.25,
            },
            Share {
                feature: 1,
                value: 1.5,
            },
            Share {
                feature: u8::MAX,
                value: 0.0,
            },
        ],
    }
}

/// A board's talk: greeting, warm-up, watching, a fault, a drift flag.
fn session() -> Vec<DeviceMsg> {
    vec![
        DeviceMsg::Greeting(greeting()),
        DeviceMsg::Status(status(5, State::Priming, 0, [(0.0, 0.0); 3])),
        DeviceMsg::Status(status(
            50,
            State::Watching,
            0,
            [(0.1, 0.5), (0.05, 0.0), (0.2, 1.0)],
        )),
        DeviceMsg::SensorFault(SensorFault {
            sample: 61,
            fault: FaultKind::OutOfRange { feature: 2 },
        }),
        DeviceMsg::DriftRaised(raised(88)),
        DeviceMsg::Status(status(
            100,
            State::Drifting,
            0b001,
            [(1.2, 10.0), (0.4, 2.5), (0.2, 1.0)],
        )),
    ]
}

fn frames(msgs: Vec<DeviceMsg>) -> Vec<Received> {
    msgs.into_iter()
        .enumerate()
        .map(|(i, msg)| Received {
            frame: DeviceFrame { seq: i as u32, msg },
            recovered: false,
        })
        .collect()
}

/// The monitor of `support::example_model` (EWMA limit 0.8, CUSUM limit 5,
/// per-sample limit 100, clear fraction 0.5, warm-up 10).
fn monitor() -> MonitorParams {
    support::monitor()
}

fn names() -> Names {
    Names(FEATURES.iter().map(|s| s.to_string()).collect())
}

fn state_with_model() -> LiveState {
    let mut s = LiveState::new(
        "test board",
        names(),
        Some(ModelInfo {
            id: MODEL_ID,
            monitor: monitor(),
            resid_limit: Some(1.25),
            slow_limit: None,
        }),
    );
    // 2024-01-01 10:00:00 UTC.
    s.set_start(1_704_103_200.0);
    s
}

fn feed(s: &mut LiveState, msgs: Vec<DeviceMsg>, from_s: u64) {
    for (i, r) in frames(msgs).iter().enumerate() {
        s.frame(r, Duration::from_secs(from_s + i as u64));
    }
}

fn render(s: &LiveState, at_s: u64) -> Screen {
    s.render(100, 30, Duration::from_secs(at_s))
}

/// Cells of a gauge row: the characters between the statistic's name and
/// the value (left half, limit mark, right half).
fn gauge_cells(row: &str) -> String {
    let after = row.split_once("EWMA").or_else(|| row.split_once("CUSUM"));
    let (_, rest) = after.expect("a statistic row");
    rest.trim_start()
        .chars()
        .take_while(|c| "█▉▊▋▌▍▎▏·┃▶ ".contains(*c))
        .collect::<String>()
        .trim_end()
        .to_string()
}

fn full(cells: &str) -> usize {
    cells.chars().filter(|&c| c == '█').count()
}

// ------------------------------------------------------------------ state and render

#[test]
fn before_anything_arrives_it_says_it_waits() {
    let s = LiveState::new("`cat frames`", Names::default(), None);
    let screen = render(&s, 0);
    let text = screen.text();
    assert!(
        screen.row(0).contains("plumb listen · `cat frames`"),
        "{text}"
    );
    assert!(text.contains("WAITING"), "{text}");
    assert!(text.contains("nothing from the board yet"), "{text}");
    assert!(text.contains("no greeting yet"), "{text}");
    assert!(text.contains("no status yet"), "{text}");
    assert!(text.contains("no frame yet"), "{text}");
}

#[test]
fn a_scripted_session_shows_identity_state_gauges_flags_and_faults() {
    let mut s = state_with_model();
    let msgs = session();
    // Greeting and warm-up.
    feed(&mut s, msgs[..2].to_vec(), 0);
    let text = render(&s, 2).text();
    assert!(text.contains("tugger-fw 0.3"), "{text}");
    assert!(text.contains("model 0x12345678 (slot a, gen 2)"), "{text}");
    assert!(text.contains("schema 0xfeedbeef00000001"), "{text}");
    assert!(
        text.contains("4 features, 2 components, 3 mixture (room for 64, 16, 8)"),
        "{text}"
    );
    assert!(text.contains("status every 50 samples"), "{text}");
    // Before the first status the charts say when one comes.
    let mut early = state_with_model();
    feed(&mut early, msgs[..1].to_vec(), 0);
    let e = render(&early, 1).text();
    assert!(
        e.contains("no status yet: the board sends one every 50 samples"),
        "{e}"
    );
    assert!(text.contains("PRIMING"), "{text}");
    assert!(text.contains("about 5 of 10 samples"), "{text}");
    assert_eq!(s.state(), Some(State::Priming));

    // Watching, then a fault and a flag.
    feed(&mut s, msgs[2..].to_vec(), 2);
    assert_eq!(s.state(), Some(State::Drifting));
    let screen = render(&s, 10);
    let text = screen.text();
    assert!(
        !text.contains("PRIMING") && !text.contains("WATCHING"),
        "{text}"
    );
    let banner = screen.find("DRIFTING").expect("a drifting banner");
    assert!(
        banner.contains("drift flag up since sample 88 (10:00:04, 6.0 s ago) · driven by SPE"),
        "{banner}"
    );
    let flag = screen.find("▲ raised").expect("the flag");
    assert!(flag.contains("sample 88"), "{flag}");
    assert!(flag.contains("10:00:04"), "{flag}");
    assert!(
        flag.contains("top bearing_band 4.25, motor_amps 1.50"),
        "feature names from the model: {flag}"
    );
    assert!(
        text.contains("crossed SPE CUSUM 6.50 > 5.00, SPE residual (bearing_band) 1.50 > 1.25"),
        "the newest flag's crossings, the residual chart with its feature: {text}"
    );
    assert!(text.contains("1 raised · 0 cleared"), "{text}");
    let fault = screen.find("! out of range").expect("the fault");
    assert!(
        fault.contains("imu_yaw") && fault.contains("sample 61"),
        "{fault}"
    );
    assert!(text.contains("faulted samples: out of range 2 ─"), "{text}");
    // Gauges: SPE CUSUM 10 of limit 5 (the top of the scale, over), SPE EWMA
    // 1.2 of 0.8 (over), T² CUSUM 2.5 of 5 (half of the lower half).
    let spe_cusum = screen.find("CUSUM").expect("SPE CUSUM row");
    assert!(
        spe_cusum.contains("10.0 / 5.00") && spe_cusum.contains("over"),
        "{spe_cusum}"
    );
    let cells = gauge_cells(&spe_cusum);
    let half = (cells.chars().count() - 1) / 2;
    assert_eq!(full(&cells), 2 * half, "a full gauge: {cells}");
    let rows: Vec<String> = screen.lines.iter().map(|l| l.text()).collect();
    let t2 = rows.iter().position(|r| r.contains(" T² ")).unwrap();
    let t2_cusum = &rows[t2 + 1];
    assert!(
        t2_cusum.contains("2.50 / 5.00") && !t2_cusum.contains("over"),
        "{t2_cusum}"
    );
    let cells = gauge_cells(t2_cusum);
    assert_eq!(cells.chars().nth(half), Some('┃'), "{cells}");
    let filled: usize = cells
        .chars()
        .take(half)
        .map(|c| match c {
            '█' => 8,
            '·' => 0,
            c => "▏▎▍▌▋▊▉".chars().position(|p| p == c).unwrap() + 1,
        })
        .sum();
    assert_eq!(
        filled,
        half * 4,
        "half of the lower half, in eighths: {cells}"
    );
    assert!(cells.chars().skip(half + 1).all(|c| c == '·'), "{cells}");
    let charts = screen.find("─ charts ").unwrap();
    assert!(charts.contains("levels at sample 99"), "{charts}");
    // Status age and both sides' link counters.
    let rule = screen.find("─ link ").expect("the link rule");
    assert!(
        rule.contains("last frame 5.0 s ago · last status 5.0 s ago"),
        "{rule}"
    );
    assert_eq!(
        counters(&screen, "frames ok"),
        [
            "frames",
            "ok",
            "CRC",
            "errors",
            "framing",
            "errors",
            "resends",
            "recovered",
            "lost"
        ]
    );
    assert_eq!(
        counters(&screen, "from board"),
        ["6", "0", "0", "0", "0", "0"]
    );
    assert_eq!(
        counters(&screen, "to board"),
        ["7", "1", "0", "–", "–", "–"]
    );
}

/// The words after `label` in the first row that has it.
fn counters(screen: &Screen, label: &str) -> Vec<String> {
    let row = screen.find(label).unwrap_or_else(|| panic!("{label}"));
    let at = row.find(label).unwrap();
    let rest = if label == "frames ok" {
        &row[at..]
    } else {
        &row[at + label.len()..]
    };
    rest.split_whitespace().map(String::from).collect()
}

#[test]
fn host_link_counters_and_the_end_show() {
    let mut s = state_with_model();
    feed(&mut s, session(), 0);
    let stats = LinkStats {
        frames: LinkCounters {
            frames_ok: 40,
            crc_errors: 3,
            framing_errors: 2,
            overflows: 0,
            undecodable: 0,
        },
        bytes: 900,
        gaps: 1,
        missing: 2,
        resend_requests: 4,
        recovered: 1,
        duplicates: 5,
        lost: 1,
        ..LinkStats::default()
    };
    s.link(&stats);
    let screen = render(&s, 7);
    let text = screen.text();
    assert_eq!(
        counters(&screen, "from board"),
        ["40", "3", "2", "4", "1", "1"],
        "{text}"
    );
    let rule = screen.find("─ link ").unwrap();
    assert!(
        rule.contains("last frame 2.0 s ago · last status 2.0 s ago · 1 gap · 5 duplicates"),
        "{rule}"
    );
    assert!(text.contains("Ctrl-C stops"), "{text}");
    // A restart comes first among the extras.
    s.link(&LinkStats {
        restarts: 1,
        ..stats
    });
    let rule = render(&s, 7).find("─ link ").unwrap();
    assert!(
        rule.contains("last status 2.0 s ago · 1 restart · 1 gap"),
        "{rule}"
    );
    s.end(&stats);
    let text = render(&s, 7).text();
    assert!(text.contains("the session ended"), "{text}");
    assert!(text.lines().next().unwrap().contains("ended ·"), "{text}");
}

#[test]
fn a_cleared_flag_and_a_recovered_one_take_their_places() {
    let mut s = state_with_model();
    feed(&mut s, session(), 0);
    let more = vec![
        Received {
            frame: DeviceFrame {
                seq: 8,
                msg: DeviceMsg::DriftCleared(DriftCleared { sample: 140 }),
            },
            recovered: false,
        },
        // Seq 7 was lost and came back through a resend, after seq 8.
        Received {
            frame: DeviceFrame {
                seq: 7,
                msg: DeviceMsg::DriftCleared(DriftCleared { sample: 120 }),
            },
            recovered: true,
        },
    ];
    for r in &more {
        s.frame(r, Duration::from_secs(9));
    }
    assert_eq!(
        s.state(),
        Some(State::Watching),
        "a recovered old flag does not rule"
    );
    let screen = render(&s, 10);
    let text = screen.text();
    assert!(text.contains("WATCHING"), "{text}");
    let rows: Vec<&str> = text.lines().collect();
    let c140 = rows
        .iter()
        .position(|r| r.contains("cleared  sample 140"))
        .unwrap();
    let c120 = rows
        .iter()
        .position(|r| r.contains("cleared  sample 120"))
        .unwrap();
    let r88 = rows
        .iter()
        .position(|r| r.contains("raised   sample 88"))
        .unwrap();
    assert!(c140 < c120 && c120 < r88, "newest sample first:\n{text}");
    assert!(rows[c120].contains("(recovered)"), "{}", rows[c120]);
    assert!(text.contains("1 raised · 2 cleared"), "{text}");
}

#[test]
fn without_a_model_limits_come_from_crossings_only() {
    let mut s = LiveState::new("x", Names::default(), None);
    feed(&mut s, session(), 0);
    let screen = render(&s, 7);
    let text = screen.text();
    assert!(text.contains("limit unknown: give --model"), "{text}");
    // The flag reported SPE's CUSUM limit: that gauge is drawn.
    let spe_cusum = screen.find("CUSUM").unwrap();
    assert!(spe_cusum.contains("10.0 / 5.00"), "{spe_cusum}");
    // Top features by index.
    assert!(text.contains("top #3 4.25, #1 1.50"), "{text}");
    // Hot without a known limit.
    let spe_ewma = screen.find("EWMA").unwrap();
    assert!(spe_ewma.contains("hot"), "{spe_ewma}");
}

#[test]
fn a_model_file_the_board_does_not_run_is_named_and_its_limits_unused() {
    let mut s = LiveState::new(
        "x",
        names(),
        Some(ModelInfo {
            id: 0xdead_0001,
            monitor: monitor(),
            resid_limit: Some(1.25),
            slow_limit: None,
        }),
    );
    feed(&mut s, session(), 0);
    let text = render(&s, 7).text();
    assert!(
        text.contains("the model file is 0xdead0001 but the board runs 0x12345678"),
        "{text}"
    );
    assert!(
        text.contains("limit unknown: not the board's model"),
        "{text}"
    );
}

#[test]
fn score_reports_draw_a_line_of_recent_scores() {
    let mut s = state_with_model();
    feed(&mut s, session(), 0);
    let reports: Vec<DeviceMsg> = (0..5)
        .map(|i| {
            DeviceMsg::ScoreReport(ScoreReport {
                sample: 100 + i,
                scores: if i == 3 {
                    None
                } else {
                    Some(ScoreTriple {
                        spe: 50.0 * i as f32,
                        t2: 1.0,
                        nll: 2.0,
                    })
                },
                state: State::Drifting,
            })
        })
        .collect();
    let mut r = frames(reports);
    for (k, f) in r.iter_mut().enumerate() {
        f.frame.seq = 10 + k as u32;
        s.frame(f, Duration::from_secs(8));
    }
    let screen = render(&s, 8);
    let text = screen.text();
    let rows: Vec<&str> = text.lines().filter(|l| l.contains("sample ")).collect();
    let spe = rows
        .iter()
        .find(|r| r.trim_start().starts_with("sample"))
        .expect("a score row");
    // 0, 50, 100 on a scale to 200 (twice the per-sample limit), a faulted
    // sample, then 200.
    assert!(spe.contains("▁▃▅×█"), "{spe}");
    assert!(spe.contains("200 / 100"), "{spe}");
}

#[test]
fn a_flag_raised_by_a_per_sample_limit_names_it_and_teaches_the_limit() {
    // No model file: the crossing is the only word on the per-sample limit.
    let mut s = LiveState::new("test board", names(), None);
    s.set_start(1_704_103_200.0);
    let mut flag = raised(88);
    flag.crossed.clear();
    flag.crossed
        .push(Crossing {
            score: ScoreKind::Spe,
            statistic: Statistic::Sample,
            value: 12.5,
            limit: 10.0,
        })
        .unwrap();
    let reports: Vec<DeviceMsg> = [5.0f32, 20.0]
        .into_iter()
        .enumerate()
        .map(|(i, spe)| {
            DeviceMsg::ScoreReport(ScoreReport {
                sample: 89 + i as u64,
                scores: Some(ScoreTriple {
                    spe,
                    t2: 1.0,
                    nll: 2.0,
                }),
                state: State::Drifting,
            })
        })
        .collect();
    let mut msgs = vec![
        DeviceMsg::Greeting(greeting()),
        DeviceMsg::DriftRaised(flag),
    ];
    msgs.extend(reports);
    feed(&mut s, msgs, 0);
    let text = render(&s, 5).text();
    assert!(
        text.contains("crossed SPE per-sample 12.5 > 10.0"),
        "the chart by name: {text}"
    );
    // The SPE score row is scaled to twice the learnt limit and shows it.
    let spe = text
        .lines()
        .find(|r| r.trim_start().starts_with("sample"))
        .expect("a score row");
    assert!(spe.contains("20.0 / 10.0"), "{spe}");
    assert!(spe.contains("▃█"), "5 and 20 on a scale to 20: {spe}");
}

#[test]
fn a_restart_is_noted_and_forgets_the_standing_flag() {
    let mut s = state_with_model();
    feed(&mut s, session(), 0);
    let again = Received {
        frame: DeviceFrame {
            seq: 0,
            msg: DeviceMsg::Greeting(greeting()),
        },
        recovered: false,
    };
    s.frame(&again, Duration::from_secs(20));
    let text = render(&s, 21).text();
    assert!(text.contains("WAITING"), "{text}");
    assert!(text.contains("the board restarted"), "{text}");
    assert!(
        text.contains("1 raised"),
        "the flag stays in the list: {text}"
    );
    let switched = Received {
        frame: DeviceFrame {
            seq: 1,
            msg: DeviceMsg::Ack(Ack::ModelSwitched {
                slot: Slot::B,
                model_id: 0x0bad_cafe,
                generation: 3,
            }),
        },
        recovered: false,
    };
    s.frame(&switched, Duration::from_secs(22));
    let text = render(&s, 22).text();
    assert!(
        text.contains("switched to model 0x0badcafe from slot b (generation 3)"),
        "{text}"
    );
    assert!(
        text.contains("the model file is 0x12345678 but the board runs 0x0badcafe"),
        "{text}"
    );
}

#[test]
fn the_link_going_away_and_coming_back_shows() {
    let mut s = state_with_model();
    feed(&mut s, session(), 0);
    s.link_notice(
        &Notice::Disconnected {
            what: "/dev/ttyUSB0".into(),
        },
        Duration::from_secs(10),
    );
    s.link_notice(
        &Notice::Reconnecting {
            attempt: 2,
            wait: Duration::from_millis(400),
            error: "no such file".into(),
        },
        Duration::from_secs(11),
    );
    let screen = render(&s, 13);
    let banner = screen.find("LINK DOWN").expect("a link-down banner");
    assert!(
        banner.contains("since 10:00:10 (3.0 s ago), 2 attempts to reopen · last word: drifting"),
        "{banner}"
    );
    let text = screen.text();
    assert!(
        text.contains("reopening failed (no such file); attempt 3 in 0.4 s"),
        "{text}"
    );
    s.link_notice(
        &Notice::Reconnected {
            what: "/dev/ttyUSB0".into(),
            attempts: 3,
            after: Duration::from_millis(4200),
        },
        Duration::from_secs(14),
    );
    s.link(&LinkStats {
        reconnects: 1,
        ..LinkStats::default()
    });
    let screen = render(&s, 15);
    let text = screen.text();
    assert!(
        !text.contains("LINK DOWN") && text.contains("DRIFTING"),
        "{text}"
    );
    assert!(text.contains("back on /dev/ttyUSB0 after 4.2 s"), "{text}");
    assert!(
        screen.find("─ link ").unwrap().contains("1 reconnect"),
        "{text}"
    );

    // A restart the link saw (a status numbered behind): the board's state
    // is forgotten until it speaks again; the flags seen stay.
    s.link_notice(
        &Notice::Restarted {
            seq: 2,
            last: 40,
            by_greeting: false,
        },
        Duration::from_secs(16),
    );
    let text = render(&s, 16).text();
    assert!(text.contains("WAITING"), "{text}");
    assert!(
        text.contains("the board restarted: frame 2 came after 40"),
        "{text}"
    );
    assert!(text.contains("1 raised"), "{text}");
    s.link_notice(
        &Notice::Garbage {
            bytes: 37,
            frames: 1,
        },
        Duration::from_secs(17),
    );
    let text = render(&s, 17).text();
    assert!(
        text.contains("37 bytes of noise before the first frame (1 damaged frame dropped)"),
        "{text}"
    );
}

#[test]
fn every_size_fits_the_terminal() {
    let mut s = state_with_model();
    feed(&mut s, session(), 0);
    for i in 0..30u64 {
        let r = Received {
            frame: DeviceFrame {
                seq: 100 + i as u32,
                msg: DeviceMsg::SensorFault(SensorFault {
                    sample: 200 + i,
                    fault: FaultKind::WrongLength { got: 3 },
                }),
            },
            recovered: false,
        };
        s.frame(&r, Duration::from_secs(9));
    }
    for (cols, rows) in [(80, 24), (60, 18), (100, 30), (200, 60), (20, 5)] {
        let screen = s.render(cols, rows, Duration::from_secs(10));
        assert!(screen.lines.len() <= rows, "{cols}x{rows}");
        for l in &screen.lines {
            assert!(l.width() <= cols, "{cols}x{rows}: {:?}", l.text());
        }
        if rows >= 24 {
            let text = screen.text();
            assert!(text.contains("DRIFTING"), "{cols}x{rows}\n{text}");
            assert!(text.contains("▲ raised"), "{cols}x{rows}\n{text}");
            assert!(text.contains("wrong length"), "{cols}x{rows}\n{text}");
            assert!(text.contains("frames ok"), "{cols}x{rows}\n{text}");
        }
    }
    // The picture printed at the end holds every section.
    let all = s.render(100, usize::MAX, Duration::from_secs(10));
    assert!(all.text().contains("3 values"), "{}", all.text());
}

// ------------------------------------------------------------------ under a terminal

fn have_script() -> bool {
    Command::new("script")
        .arg("--version")
        .output()
        .is_ok_and(|o| o.status.success())
}

fn quote(s: &str) -> String {
    format!("'{}'", s.replace('\'', "'\\''"))
}

/// Writes the labelled example model the session's board "runs".
fn write_model(dir: &Scratch) -> std::path::PathBuf {
    let labels: Vec<Label> = FEATURES
        .iter()
        .map(|n| Label {
            name: n.to_string(),
            unit: String::new(),
        })
        .collect();
    let mut model = support::example_model(4, 2, 3, 7);
    model.meta.id = MODEL_ID;
    model.meta.schema =
        plumb_model::schema::fingerprint(labels.iter().map(|l| (l.name.as_str(), l.unit.as_str())));
    let bytes = ModelFile { model, labels }.to_bytes().unwrap();
    let p = dir.path("tugger.plumb");
    std::fs::write(&p, bytes).unwrap();
    p
}

#[test]
fn listen_live_under_a_terminal_draws_and_gives_the_terminal_back() {
    if !have_script() {
        panic!("this test needs `script` (util-linux, Debian's bsdutils)");
    }
    let dir = Scratch::new("live");
    let model = write_model(&dir);
    let msgs = session();
    let encode = |range: std::ops::Range<usize>| -> Vec<u8> {
        let mut out = vec![0u8];
        for (i, m) in msgs.iter().enumerate().filter(|(i, _)| range.contains(i)) {
            out.extend(wire::encode_frame_vec(&DeviceFrame {
                seq: i as u32,
                msg: m.clone(),
            }));
        }
        out
    };
    let first = dir.path("first.bin");
    let second = dir.path("second.bin");
    std::fs::write(&first, encode(0..3)).unwrap();
    std::fs::write(&second, encode(3..msgs.len())).unwrap();
    // The scripted board: greeting and warm-up, a pause, the rest, and a
    // moment for the screen to be drawn before the stream ends.
    let board = format!(
        "cat {}; sleep 0.4; cat {}; sleep 0.6",
        quote(first.to_str().unwrap()),
        quote(second.to_str().unwrap())
    );
    let plumb = env!("CARGO_BIN_EXE_plumb");
    let inner = format!(
        "stty cols 100 rows 30; exec {} listen --live --model {} --exec {}",
        quote(plumb),
        quote(model.to_str().unwrap()),
        quote(&board)
    );
    let out = Command::new("script")
        .args(["-qfec", &inner, "/dev/null"])
        .env("TERM", "xterm-256color")
        .env_remove("NO_COLOR")
        .output()
        .expect("run script");
    let bytes = out.stdout;
    let code = out.status.code();
    let shown = String::from_utf8_lossy(&bytes);
    assert_eq!(
        code,
        Some(1),
        "exit 1: a drift flag was raised\n{}\n{shown:?}",
        String::from_utf8_lossy(&out.stderr)
    );

    // The live screen as a terminal shows it, just before the view gave the
    // terminal back (line wrap on, cursor shown, normal screen).
    const LEAVE: &[u8] = b"\x1b[?7h\x1b[?25h\x1b[?1049l";
    let leave = bytes
        .windows(LEAVE.len())
        .rposition(|w| w == LEAVE)
        .unwrap_or_else(|| panic!("the alternate screen was never left: {shown:?}"));
    assert!(
        bytes.windows(8).any(|w| w == b"\x1b[?1049h"),
        "the view took the alternate screen: {shown:?}"
    );
    let mut term = vt100::Parser::new(30, 100, 0);
    term.process(&bytes[..leave]);
    let live = term.screen().contents();
    assert!(term.screen().alternate_screen(), "{live}");
    assert!(term.screen().hide_cursor(), "{live}");
    for want in [
        "tugger-fw 0.3",
        "model 0x12345678 (slot a, gen 2)",
        "DRIFTING",
        "▲ raised",
        "sample 88",
        "bearing_band 4.25",
        "out of range",
        "imu_yaw",
        "10.0 / 5.00",
    ] {
        assert!(
            live.contains(want),
            "{want:?} not on the live screen:\n{live}"
        );
    }
    // The drifting banner is drawn in colour.
    let row = live.lines().position(|l| l.contains("DRIFTING")).unwrap();
    let col = live.lines().nth(row).unwrap().find("DRIFTING").unwrap();
    let cell = term.screen().cell(row as u16, col as u16).unwrap();
    assert_eq!(cell.bgcolor(), vt100::Color::Idx(1), "a red banner");

    // Afterwards: the normal screen, the cursor back, the last picture
    // printed once with the session marked as ended.
    term.process(&bytes[leave..]);
    let after = term.screen().contents();
    assert!(!term.screen().alternate_screen());
    assert!(!term.screen().hide_cursor());
    assert!(after.contains("DRIFTING"), "{after}");
    assert!(after.contains("the session ended"), "{after}");
    let tail = &bytes[leave..];
    assert!(
        !tail.windows(4).any(|w| w == b"\x1b[?7l"),
        "line wrap stays on after the view"
    );
}

#[test]
fn ctrl_c_gives_the_terminal_back() {
    if !have_script() {
        panic!("this test needs `script` (util-linux, Debian's bsdutils)");
    }
    let dir = Scratch::new("live-ctrl-c");
    let mut bytes = vec![0u8];
    for (i, m) in session().into_iter().enumerate() {
        bytes.extend(wire::encode_frame_vec(&DeviceFrame {
            seq: i as u32,
            msg: m,
        }));
    }
    let frames = dir.path("frames.bin");
    std::fs::write(&frames, bytes).unwrap();
    // A board that says its piece and then stays on the line.
    let board = format!("cat {}; sleep 30", quote(frames.to_str().unwrap()));
    let inner = format!(
        "stty cols 90 rows 28; exec {} listen --live --exec {}",
        quote(env!("CARGO_BIN_EXE_plumb")),
        quote(&board)
    );
    let mut child = Command::new("script")
        .args(["-qfec", &inner, "/dev/null"])
        .env("TERM", "xterm-256color")
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .expect("run script");
    // Read the terminal as it goes; type Ctrl-C once the view shows the
    // flag (so the view, and its Ctrl-C handler, are up whatever the load).
    let seen = std::sync::Arc::new(std::sync::Mutex::new(Vec::<u8>::new()));
    let reader = {
        let seen = std::sync::Arc::clone(&seen);
        let mut out = child.stdout.take().unwrap();
        std::thread::spawn(move || {
            use std::io::Read;
            let mut buf = [0u8; 4096];
            while let Ok(n) = out.read(&mut buf) {
                if n == 0 {
                    break;
                }
                seen.lock().unwrap().extend_from_slice(&buf[..n]);
            }
        })
    };
    let start = std::time::Instant::now();
    while !String::from_utf8_lossy(&seen.lock().unwrap()).contains("DRIFTING") {
        if start.elapsed() > Duration::from_secs(30) {
            let _ = child.kill();
            panic!(
                "the view never showed the flag: {:?}",
                String::from_utf8_lossy(&seen.lock().unwrap())
            );
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    // Ctrl-C typed at the terminal: the line discipline makes it SIGINT.
    {
        use std::io::Write;
        let stdin = child.stdin.as_mut().unwrap();
        stdin.write_all(&[0x03]).unwrap();
        stdin.flush().unwrap();
    }
    let start = std::time::Instant::now();
    let status = loop {
        if let Some(st) = child.try_wait().unwrap() {
            break st;
        }
        if start.elapsed() > Duration::from_secs(20) {
            let _ = child.kill();
            panic!("plumb listen did not stop on Ctrl-C");
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    reader.join().unwrap();
    let stdout = seen.lock().unwrap().clone();
    let shown = String::from_utf8_lossy(&stdout);
    let mut term = vt100::Parser::new(28, 90, 0);
    term.process(&stdout);
    let after = term.screen().contents();
    assert!(!term.screen().alternate_screen(), "{shown:?}");
    assert!(!term.screen().hide_cursor(), "{shown:?}");
    assert!(after.contains("DRIFTING"), "{after}");
    assert!(after.contains("the session ended"), "{after}");
    assert_eq!(status.code(), Some(1), "{after}");
}

#[test]
fn listen_on_a_pipe_prints_lines() {
    let dir = Scratch::new("live-pipe");
    let mut bytes = vec![0u8];
    for (i, m) in session().into_iter().enumerate() {
        bytes.extend(wire::encode_frame_vec(&DeviceFrame {
            seq: i as u32,
            msg: m,
        }));
    }
    let frames = dir.path("frames.bin");
    std::fs::write(&frames, bytes).unwrap();
    let board = format!("cat {}; sleep 0.3", quote(frames.to_str().unwrap()));
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args(["listen", "--live", "--exec", &board])
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{text}\n{err}");
    assert!(!text.contains('\x1b'), "no escapes on a pipe: {text:?}");
    assert!(text.lines().any(|l| l.starts_with("greeting ")), "{text}");
    assert!(text.lines().any(|l| l.starts_with("raised ")), "{text}");
    assert!(text.lines().any(|l| l.starts_with("link ")), "{text}");
    assert!(err.contains("not a terminal"), "{err}");
}
