//! How `plumb listen` shows a drift raised message's crossings: the text
//! line, the JSON object and the `--record` CSV row name each chart (EWMA,
//! CUSUM, per-sample limit) of each score with its value and limit.

use plumb::events::{json_line, text_line, EventSink, Names, Recorder, RECORD_HEADER};
use plumb::link::Received;
use plumb_model::wire::{
    Crossing, DeviceFrame, DeviceMsg, DriftRaised, ScoreKind, ScoreTriple, Share, Statistic,
};

fn crossing(score: ScoreKind, statistic: Statistic, value: f32, limit: f32) -> Crossing {
    Crossing {
        score,
        statistic,
        value,
        limit,
    }
}

/// Sample 88 raised by SPE (CUSUM and per-sample limit) and T² (per-sample
/// limit alone).
fn raised(crossed: &[Crossing]) -> Received {
    Received {
        frame: DeviceFrame {
            seq: 4,
            msg: DeviceMsg::DriftRaised(DriftRaised {
                sample: 88,
                drivers: 0b011,
                scores: ScoreTriple {
                    spe: 12.5,
                    t2: 30.25,
                    nll: 3.0,
                },
                crossed: heapless::Vec::from_slice(crossed).unwrap(),
                top: [
                    Share {
                        feature: 1,
                        value: 8.0,
                    },
                    Share {
                        feature: u8::MAX,
                        value: 0.0,
                    },
                    Share {
                        feature: u8::MAX,
                        value: 0.0,
                    },
                ],
            }),
        },
        recovered: false,
    }
}

fn three() -> Vec<Crossing> {
    vec![
        crossing(ScoreKind::Spe, Statistic::Cusum, 6.5, 5.0),
        crossing(ScoreKind::Spe, Statistic::Sample, 12.5, 10.0),
        crossing(ScoreKind::T2, Statistic::Sample, 30.25, 20.0),
    ]
}

fn names() -> Names {
    Names(vec!["wheel_rms".into(), "motor_amps".into()])
}

#[test]
fn the_text_line_names_every_chart() {
    let line = text_line(&raised(&three()), &names());
    assert_eq!(
        line,
        "raised seq=4 sample=88 drivers=spe+t2 spe=12.5 t2=30.25 nll=3 top=motor_amps:8 \
         crossed=spe/cusum:6.5>5,spe/per-sample:12.5>10,t2/per-sample:30.25>20"
    );
    // A flag raised by a per-sample limit alone.
    let alone = [crossing(ScoreKind::Nll, Statistic::Sample, -1.5, -2.0)];
    let line = text_line(&raised(&alone), &names());
    assert!(line.ends_with(" crossed=nll/per-sample:-1.5>-2"), "{line}");
    let line = text_line(
        &raised(&[crossing(ScoreKind::T2, Statistic::Ewma, 2.0, 1.5)]),
        &names(),
    );
    assert!(line.ends_with(" crossed=t2/ewma:2>1.5"), "{line}");
    assert!(text_line(&raised(&[]), &names()).ends_with(" crossed=none"));
}

#[test]
fn the_json_object_names_every_chart() {
    let v = json_line(&raised(&three()), &names());
    let crossed = v["crossed"].as_array().expect("a list");
    let charts: Vec<(&str, &str, f64, f64)> = crossed
        .iter()
        .map(|c| {
            (
                c["score"].as_str().unwrap(),
                c["statistic"].as_str().unwrap(),
                c["value"].as_f64().unwrap(),
                c["limit"].as_f64().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        charts,
        [
            ("spe", "cusum", 6.5, 5.0),
            ("spe", "per-sample", 12.5, 10.0),
            ("t2", "per-sample", 30.25, 20.0),
        ]
    );
    assert_eq!(v["event"], "raised");
    assert_eq!(v["drivers"], "spe+t2");
}

#[test]
fn the_record_row_keeps_the_crossings() {
    let mut out = Vec::new();
    {
        let mut rec = Recorder::new(&mut out, names()).unwrap();
        rec.frame(&raised(&three()));
        assert!(rec.take_error().is_none());
    }
    let text = String::from_utf8(out).unwrap();
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some(RECORD_HEADER));
    let row = lines.next().expect("one row");
    assert!(row.starts_with("4,raised,88,,12.5,30.25,3,\""), "{row}");
    assert!(
        row.contains("crossed=spe/cusum:6.5>5,spe/per-sample:12.5>10,t2/per-sample:30.25>20\""),
        "{row}"
    );
    assert!(row.ends_with(",0"), "{row}");
}

#[test]
fn the_residual_chart_crossing_names_its_feature() {
    let c = [crossing(
        ScoreKind::Spe,
        Statistic::Residual { feature: 1 },
        2.5,
        2.0,
    )];
    let line = text_line(&raised(&c), &names());
    assert!(
        line.ends_with(" crossed=spe/residual(motor_amps):2.5>2"),
        "{line}"
    );
    let v = json_line(&raised(&c), &names());
    let x = &v["crossed"][0];
    assert_eq!(x["score"], "spe");
    assert_eq!(x["statistic"], "residual");
    assert_eq!(x["feature"], "motor_amps");
    assert_eq!(x["index"], 1);
    assert_eq!(x["value"], 2.5);
    // The other charts carry no feature.
    let v = json_line(&raised(&three()), &names());
    assert!(v["crossed"][0].get("feature").is_none(), "{v}");
}

/// A slow chart's crossing (protocol 5) names its feature as the residual
/// chart's does, under its own chart name.
#[test]
fn the_slow_chart_crossing_names_its_feature() {
    let c = [
        crossing(ScoreKind::Spe, Statistic::Residual { feature: 0 }, 2.5, 2.0),
        crossing(ScoreKind::Spe, Statistic::Slow { feature: 1 }, 1.5, 1.25),
    ];
    let line = text_line(&raised(&c), &names());
    assert!(line.ends_with(",spe/slow(motor_amps):1.5>1.25"), "{line}");
    let v = json_line(&raised(&c), &names());
    let x = &v["crossed"][1];
    assert_eq!(x["statistic"], "slow");
    assert_eq!(x["feature"], "motor_amps");
    assert_eq!(x["index"], 1);
    assert_eq!(x["limit"], 1.25);
}
