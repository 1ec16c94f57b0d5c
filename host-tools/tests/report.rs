//! `plumb report` end to end: a model fitted on the demo training logs, a
//! report over two drift logs with ground truth, checked for structure
//! (balanced tags, one timeline per score and one of the SPE's residual
//! chart per log, flag spans, onset markers, latent ellipses, explained
//! variance, labelled contributions, the residual chart's feature beside the
//! flags it was hot for, checked against the detector's own), size, exit
//! codes, and rendered by a headless browser. The same model with slow
//! charts added by hand gets a panel of them beside the residual chart's.
//!
//! The browser check needs Debian's `chromium` (`scripts/setup.sh` installs
//! it) and fails loudly without it; `PLUMB_NO_BROWSER=1` skips it on
//! purpose, and says so.

mod common;

use common::{demo, log_text, plumb, plumb_ok, Scratch};
use plumb_firmware::{Detector, Event};
use plumb_model::file::ModelFile;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::sync::OnceLock;
use std::time::{Duration, Instant};

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// One model fitted on the demo training logs, shared by the tests.
fn model() -> &'static Path {
    static DIR: OnceLock<(Scratch, PathBuf)> = OnceLock::new();
    &DIR.get_or_init(|| {
        let dir = Scratch::new("report-model");
        let out = dir.path("tugger.plumb");
        plumb_ok(&[
            "fit",
            s(&demo("train")),
            "--out",
            s(&out),
            "--mixture",
            "3",
            "--restarts",
            "1",
            "--quiet",
        ]);
        (dir, out)
    })
    .1
}

/// The report of `model` over two drift logs with truth and training rows:
/// (folder, HTML text, path, replay JSON). A flag rises in bearing_wear, so
/// the command exits 1.
fn report_of(model: &Path, tag: &str) -> (Scratch, String, PathBuf, serde_json::Value) {
    let dir = Scratch::new(tag);
    let out = dir.path("report.html");
    let o = plumb(&[
        "report",
        s(model),
        s(&demo("drift/bearing_wear.csv")),
        s(&demo("drift/sensor_dropout.csv")),
        "--out",
        s(&out),
        "--train",
        s(&demo("train")),
        "--truth",
        s(&demo("truth.csv")),
        "--json",
    ]);
    assert_eq!(
        o.status.code(),
        Some(1),
        "a flag rose in bearing_wear: exit 1; stderr: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("JSON on stdout");
    let html = std::fs::read_to_string(&out).expect("report written");
    (dir, html, out, v)
}

/// The report of the fitted model ([`report_of`]).
fn drift_report() -> &'static (Scratch, String, PathBuf, serde_json::Value) {
    static R: OnceLock<(Scratch, String, PathBuf, serde_json::Value)> = OnceLock::new();
    R.get_or_init(|| report_of(model(), "report"))
}

/// Checks that elements nest properly: every start tag is closed in order
/// (void elements are written self-closed), ignoring the style sheet.
fn assert_balanced(html: &str) {
    let body = match (html.find("<style>"), html.find("</style>")) {
        (Some(a), Some(b)) => format!("{}{}", &html[..a], &html[b + 8..]),
        _ => html.to_string(),
    };
    let mut stack: Vec<String> = Vec::new();
    let mut rest = body.as_str();
    while let Some(i) = rest.find('<') {
        rest = &rest[i + 1..];
        let end = rest.find('>').expect("unterminated tag");
        let tag = &rest[..end];
        rest = &rest[end + 1..];
        if tag.starts_with('!') {
            continue;
        }
        if let Some(name) = tag.strip_prefix('/') {
            let open = stack.pop().unwrap_or_default();
            assert_eq!(open, name.trim(), "</{name}> closes <{open}>");
        } else if !tag.ends_with('/') {
            let name = tag.split_whitespace().next().unwrap_or("").to_string();
            assert!(!name.is_empty(), "empty tag");
            stack.push(name);
        }
    }
    assert!(stack.is_empty(), "unclosed: {stack:?}");
}

fn count(h: &str, pat: &str) -> usize {
    h.matches(pat).count()
}

/// The SVG elements whose start tag begins with `start`, concatenated.
fn svgs(html: &str, start: &str) -> String {
    let mut out = String::new();
    let mut rest = html;
    while let Some(i) = rest.find(start) {
        let end = i + rest[i..].find("</svg>").expect("closed svg") + 6;
        out.push_str(&rest[i..end]);
        rest = &rest[end..];
    }
    out
}

#[test]
fn report_has_every_part_and_is_self_contained() {
    let (_dir, html, _out, v) = drift_report();
    assert_balanced(html);
    assert_eq!(count(html, "<svg"), count(html, "</svg>"));

    // Self-contained and advisory.
    assert!(!html.contains("<script"), "no scripts");
    assert!(!html.contains("http://") && !html.contains("https://"));
    assert!(!html.contains("<img") && !html.contains("<link"));
    assert!(html.contains("not a safety function"));

    // Header: model identity.
    let file = ModelFile::from_bytes(&std::fs::read(model()).unwrap()).unwrap();
    let meta = &file.model.meta;
    assert!(html.contains(&format!("model {:08x}", meta.id)));
    assert!(html.contains(&format!("schema {:016x}", meta.schema)));

    // One timeline per score per log, and one of the SPE's residual chart
    // (the model's chart is on: `plumb fit` calibrates it from the six
    // training logs).
    assert!(file.model.resid_gain.iter().any(|g| *g > 0.0), "chart on");
    assert_eq!(count(html, "<svg class=\"timeline\""), 8);
    for log in 0..2 {
        for score in ["spe", "t2", "nll", "resid"] {
            let tag = format!("<svg class=\"timeline\" data-log=\"{log}\" data-score=\"{score}\"");
            assert_eq!(count(html, &tag), 1, "{tag}");
        }
        let panel = &html[html
            .find(&format!("<div class=\"panel\" id=\"resid-{log}\">"))
            .expect("residual chart panel")..];
        let panel = &panel[..panel.find("</svg>").expect("its plot")];
        assert!(
            panel.contains(
                "<b>SPE residual chart</b> · largest |EWMA| of a feature's scaled residual"
            ),
            "panel title"
        );
        assert!(!panel.contains("Off in this model"));
        // The limit line at the model's limit, and the peak drawn.
        assert!(panel.contains("<path class=\"lim-l\""));
        let shown: f64 = panel
            .split("limit L = ")
            .nth(1)
            .and_then(|t| t.split('<').next())
            .expect("limit label")
            .parse()
            .unwrap();
        let limit = f64::from(file.model.resid_limit);
        assert!((shown - limit).abs() <= 0.01 * limit, "{shown} vs {limit}");
        let peak = panel
            .split("<path class=\"ewma\" d=\"")
            .nth(1)
            .expect("peak line");
        assert!(peak.len() > 1000, "a drawn line, not an empty path");
    }

    // Flag spans: one shaded span per flag in each of its log's four panels.
    let logs = v["logs"].as_array().unwrap();
    let flags: usize = logs
        .iter()
        .map(|l| l["flags"].as_array().unwrap().len())
        .sum();
    assert!(flags >= 1);
    let timelines = svgs(html, "<svg class=\"timeline\"");
    assert_eq!(count(&timelines, "<rect class=\"flag\""), 4 * flags);
    assert!(logs[1]["faults"].as_u64().unwrap() > 0, "dropout faults");

    // Ground truth: an onset line in every panel of both logs; faults marked.
    assert_eq!(count(&timelines, "<path class=\"onset\""), 8);
    assert_eq!(count(&timelines, "onset (drift)"), 4);
    assert_eq!(count(&timelines, "onset (fault)"), 4);
    assert_eq!(
        count(&timelines, "<path class=\"fault\""),
        4,
        "dropout panels"
    );
    assert!(html.contains("id=\"faults\""));

    // Contributions: one chart per flag, bars labelled `name [unit]`.
    assert_eq!(count(html, "<svg class=\"contrib\""), flags);
    let labels: Vec<String> = file
        .labels
        .iter()
        .map(|l| {
            if l.unit.is_empty() {
                l.name.clone()
            } else {
                format!("{} [{}]", l.name, l.unit)
            }
        })
        .collect();
    let first = html.find("<svg class=\"contrib\"").unwrap();
    let chart = &html[first..first + html[first..].find("</svg>").unwrap()];
    let named = labels
        .iter()
        .filter(|l| chart.contains(&format!(">{l}</text>")))
        .count();
    assert_eq!(named, 10, "ten labelled bars");
    // Bearing wear acts on vib_band5/6 (ground truth): its flags' charts
    // draw those bars as named by the truth file.
    let bearing = svgs(html, "<svg class=\"contrib\" data-log=\"0\"");
    assert!(bearing.contains("class=\"bar named\""));

    // Latent plane: 1σ and 2σ ellipses for each mixture component.
    let k = file.model.weights.len();
    assert!(html.contains("<svg class=\"latent\""));
    assert_eq!(count(html, "<ellipse class=\"e1\""), k);
    assert_eq!(count(html, "<ellipse class=\"e2\""), k);
    assert!(html.contains("<path class=\"pt-train\""));
    assert!(html.contains("<path class=\"pt-drift\""));

    // Explained variance: a bar per kept component and the residual.
    let m = file.model.eigenvalues.len();
    assert!(html.contains("<svg class=\"variance\""));
    assert_eq!(count(html, "<rect class=\"ev\""), m);
    assert_eq!(count(html, "<rect class=\"ev res\""), 1);
    assert!(html.contains(&format!(">PC{m}</text>")));

    // Tables.
    assert!(html.contains("id=\"flags\""));
    assert!(html.contains(">bearing_wear.csv</a>"));

    assert!(
        html.len() < 1_000_000,
        "two 8000-sample logs: {} bytes",
        html.len()
    );
}

/// The flags table's rows of the log whose cell reads `name`, in order.
fn flag_rows<'a>(html: &'a str, name: &str) -> Vec<&'a str> {
    let at = html.find("<section id=\"flags\">").expect("flags table");
    let table = &html[at..at + html[at..].find("</table>").unwrap()];
    table
        .split("<tr>")
        .filter(|r| r.contains(&format!(">{name}</a></td>")))
        .collect()
}

/// What the detector's residual chart ([0]) and slow charts ([1]) did in
/// one log.
struct Charts {
    /// Per flag, per chart: its peak's feature when the chart was over its
    /// limit at the sample that raised the flag.
    at_raise: Vec<[Option<usize>; 2]>,
    /// Per chart: scored samples on which it was over its limit.
    over: [u64; 2],
}

/// Replays a demo log through the detector, as `plumb replay` does, and
/// keeps what its residual and slow charts did.
fn chart_replay(file: &ModelFile, log: &Path) -> Charts {
    let mut det = Detector::new(file.model.to_device().unwrap()).unwrap();
    let text = std::fs::read_to_string(log).unwrap();
    let cols = common::model_columns(&file.labels, text.lines().next().unwrap());
    let mut out = Charts {
        at_raise: Vec::new(),
        over: [0; 2],
    };
    for row in text.lines().skip(1) {
        let cells: Vec<&str> = row.split(',').collect();
        let x: Vec<f32> = cols
            .iter()
            .map(|&c| cells[c].parse::<f64>().map_or(f32::NAN, |v| v as f32))
            .collect();
        let o = det.update(&x);
        let chart = det.residual_chart();
        let m = det.model();
        let hot = [
            (chart.peak > m.resid_limit).then_some(usize::from(chart.peak_feature)),
            (chart.slow_peak > m.slow_limit).then_some(usize::from(chart.slow_peak_feature)),
        ];
        if o.scores.is_some() {
            for (n, h) in out.over.iter_mut().zip(hot) {
                *n += u64::from(h.is_some());
            }
        }
        if let Some(Event::Raised { .. }) = o.event {
            out.at_raise.push(hot);
        }
    }
    out
}

/// For each flag of a demo log, the residual chart's feature when the chart
/// was over its limit at the sample that raised it.
fn resid_at_raises(file: &ModelFile, log: &Path) -> Vec<Option<usize>> {
    chart_replay(file, log)
        .at_raise
        .iter()
        .map(|h| h[0])
        .collect()
}

#[test]
fn each_flag_caption_names_the_charts_that_raised_it() {
    // The first log's flags (bearing wear): each caption lists the score
    // charts over their limits as replay's `crossed` has them (the
    // residual chart is named by its own note, tested below).
    let (_dir, html, _out, v) = drift_report();
    let flags = v["logs"][0]["flags"].as_array().unwrap();
    assert!(!flags.is_empty());
    let mut listed = 0;
    for (fi, f) in flags.iter().enumerate() {
        let caption = html
            .split(&format!("<figcaption><b>Flag {}</b>", fi + 1))
            .nth(1)
            .expect("its contribution chart");
        let caption = &caption[..caption.find("</figcaption>").unwrap()];
        let charts: Vec<&serde_json::Value> = f["crossed"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|c| c["statistic"] != "residual")
            .collect();
        assert_eq!(
            caption.contains("class=\"charts muted\""),
            !charts.is_empty(),
            "{caption}"
        );
        for c in charts {
            let score = match c["score"].as_str().unwrap() {
                "spe" => "SPE",
                "t2" => "T²",
                _ => "NLL",
            };
            let chart = match c["statistic"].as_str().unwrap() {
                "ewma" => "EWMA",
                "cusum" => "CUSUM",
                _ => "per-sample limit",
            };
            assert!(
                caption.contains(&format!("{score} {chart} ")),
                "{caption} lacks {c}"
            );
            listed += 1;
        }
    }
    assert!(listed > 0, "no flag of this log raised by a score chart");
}

#[test]
fn flags_the_residual_chart_raised_name_its_feature() {
    let (_dir, html, _out, v) = drift_report();
    let file = ModelFile::from_bytes(&std::fs::read(model()).unwrap()).unwrap();
    let raises = resid_at_raises(&file, &demo("drift/bearing_wear.csv"));
    let flags = v["logs"][0]["flags"].as_array().unwrap();
    assert_eq!(raises.len(), flags.len(), "the same flags as the report's");
    // This model's residual chart is over its limit as some of bearing
    // wear's flags rise (vib_band5/6 wear shows in their own residuals).
    let named: Vec<(usize, usize)> = raises
        .iter()
        .enumerate()
        .filter_map(|(fi, r)| r.map(|f| (fi, f)))
        .collect();
    assert!(!named.is_empty(), "no flag raised by the residual chart");
    let rows = flag_rows(html, "bearing_wear.csv");
    assert_eq!(rows.len(), flags.len());
    for (fi, row) in rows.iter().enumerate() {
        match raises[fi] {
            Some(f) => {
                let name = &file.labels[f].name;
                assert!(
                    row.contains(&format!(
                        "<span class=\"chip up\">SPE residual chart</span> {name} "
                    )),
                    "flag {}: {row}",
                    fi + 1
                );
            }
            None => assert!(!row.contains("SPE residual chart"), "flag {}", fi + 1),
        }
    }
    // The contribution chart's caption of such a flag names it too, and so
    // does the residual chart's panel where there is room.
    let (fi, f) = named[0];
    let name = &file.labels[f].name;
    let caption = html
        .split(&format!("<figcaption><b>Flag {}</b>", fi + 1))
        .nth(1)
        .expect("its contribution chart");
    let caption = &caption[..caption.find("</figcaption>").unwrap()];
    assert!(
        caption.contains(&format!("SPE residual chart</span> {name} ")),
        "{caption}"
    );
    let panel = svgs(
        html,
        "<svg class=\"timeline\" data-log=\"0\" data-score=\"resid\"",
    );
    assert!(
        panel.contains(&format!(">{name}</text>")),
        "panel names {name}"
    );
    // The dropout log's flags: none raised by the chart, none named.
    let raises = resid_at_raises(&file, &demo("drift/sensor_dropout.csv"));
    for (fi, row) in flag_rows(html, "sensor_dropout.csv").iter().enumerate() {
        assert_eq!(
            raises[fi].is_some(),
            row.contains("SPE residual chart"),
            "sensor_dropout flag {}",
            fi + 1
        );
    }
}

/// The test's model with slow charts added by hand, as `plumb tailor` would
/// add them: on vib_band5 and vib_band6 (the features bearing wear acts on),
/// λ 0.05, each with its residual chart's centre and gain, and a limit of
/// half the residual chart's, low enough that they cross on bearing wear.
fn slow_model() -> &'static (Scratch, PathBuf, ModelFile) {
    static M: OnceLock<(Scratch, PathBuf, ModelFile)> = OnceLock::new();
    M.get_or_init(|| {
        let mut file = ModelFile::from_bytes(&std::fs::read(model()).unwrap()).unwrap();
        assert!(file.model.slow_charts.is_empty(), "plumb fit adds none");
        let m = &mut file.model;
        m.slow_charts.clear();
        for name in ["vib_band5", "vib_band6"] {
            let f = file.labels.iter().position(|l| l.name == name).unwrap();
            m.slow_charts
                .extend([f as f32, 0.05, m.resid_center[f], m.resid_gain[f]]);
        }
        m.slow_limit = 0.5 * m.resid_limit;
        let dir = Scratch::new("report-slow-model");
        let out = dir.path("slow.plumb");
        std::fs::write(&out, file.to_bytes().unwrap()).unwrap();
        (dir, out, file)
    })
}

/// The report of [`drift_report`] with the slow model ([`report_of`]).
fn slow_report() -> &'static (Scratch, String, PathBuf, serde_json::Value) {
    static R: OnceLock<(Scratch, String, PathBuf, serde_json::Value)> = OnceLock::new();
    R.get_or_init(|| report_of(&slow_model().1, "report-slow"))
}

/// The number written after the first `marker` in `text`, up to `end`.
fn number_after(text: &str, marker: &str, end: char) -> f64 {
    text.split(marker)
        .nth(1)
        .and_then(|t| t.split(end).next())
        .unwrap_or_else(|| panic!("no number after {marker:?}"))
        .parse()
        .unwrap()
}

/// A count as the report writes it: narrow no-break spaces between
/// thousands.
fn grouped(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::new();
    for (i, ch) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i) % 3 == 0 {
            out.push('\u{202f}');
        }
        out.push(ch);
    }
    out
}

/// The `y` of the first `<path class="{class}" d="M.. y..">` line in `svg`.
fn line_y(svg: &str, class: &str) -> f64 {
    let d = svg
        .split(&format!("<path class=\"{class}\" d=\"M"))
        .nth(1)
        .unwrap_or_else(|| panic!("no {class} line"));
    let d = &d[..d.find('"').unwrap()];
    d.split(|c: char| c == ' ' || c.is_ascii_alphabetic())
        .nth(1)
        .unwrap()
        .parse()
        .unwrap()
}

#[test]
fn slow_charts_have_a_panel_beside_the_residual_chart() {
    let (_dir, html, _out, v) = slow_report();
    let (_, _, file) = slow_model();
    assert_balanced(html);
    let limit = f64::from(file.model.slow_limit);
    let clear = f64::from(file.model.monitor.clear_fraction);
    let logs = v["logs"].as_array().unwrap();
    let names: Vec<&str> = ["vib_band5", "vib_band6"].into();
    for (li, log) in ["drift/bearing_wear.csv", "drift/sensor_dropout.csv"]
        .iter()
        .enumerate()
    {
        let replay = chart_replay(file, &demo(log));
        let flags = logs[li]["flags"].as_array().unwrap();
        assert_eq!(replay.at_raise.len(), flags.len(), "{log}: the same flags");
        // The panel follows the residual chart's, titled with its features
        // and the detector's count of samples over the limit.
        let resid = html
            .find(&format!("<div class=\"panel\" id=\"resid-{li}\">"))
            .expect("residual chart panel");
        let at = html
            .find(&format!("<div class=\"panel\" id=\"slow-{li}\">"))
            .expect("slow charts panel");
        assert!(at > resid);
        assert!(
            !html[resid + 1..at].contains("<div class=\"panel\""),
            "right after the residual chart's"
        );
        let panel = &html[at..at + html[at..].find("</svg>").expect("its plot") + 6];
        let over = replay.over[1];
        assert!(
            panel.contains(&format!(
                "<b>SPE slow charts</b> · largest |EWMA| of a chosen feature's slower second EWMA \
                 · on vib_band5, vib_band6 · {} sample{} over their limit</div>",
                grouped(over),
                if over == 1 { "" } else { "s" }
            )),
            "{}",
            &panel[..400]
        );
        assert!(panel.contains(&format!(
            "<svg class=\"timeline\" data-log=\"{li}\" data-score=\"slow\""
        )));
        // The limit, labelled with the model's, and the clear level at its
        // fraction of it (heights above the plot's zero line).
        let shown = number_after(panel, "slow limit = ", '<');
        assert!((shown - limit).abs() <= 0.01 * limit, "{shown} vs {limit}");
        let zero = 18.0 + 132.0;
        let ratio = (zero - line_y(panel, "lim-c")) / (zero - line_y(panel, "lim-l"));
        assert!((ratio - clear).abs() < 0.02, "clear level at {ratio} of L");
        let peak = panel
            .split("<path class=\"ewma\" d=\"")
            .nth(1)
            .expect("peak line");
        assert!(peak.len() > 1000, "a drawn line, not an empty path");
        // A flag span per flag, the onset, and the dropout log's faults.
        assert_eq!(count(panel, "<rect class=\"flag\""), flags.len());
        assert_eq!(count(panel, "<path class=\"onset\""), 1);
        let faulted = logs[li]["faults"].as_u64().unwrap() > 0;
        assert_eq!(count(panel, "<path class=\"fault\""), usize::from(faulted));
        // Flags the slow charts were over at their raise name the feature
        // of the largest slow EWMA (where there is room); no other feature
        // is named.
        let labels: Vec<&str> = replay
            .at_raise
            .iter()
            .filter_map(|h| h[1])
            .map(|f| file.labels[f].name.as_str())
            .collect();
        for name in &names {
            if panel.contains(&format!(">{name}</text>")) {
                assert!(labels.contains(name), "{log}: {name} named by no flag");
            }
        }
        if li == 0 {
            assert!(over > 0, "bearing wear crosses the slow limit");
            assert!(
                !labels.is_empty(),
                "bearing wear: no flag raised while the slow charts were over"
            );
            assert!(
                labels
                    .iter()
                    .any(|l| panel.contains(&format!(">{l}</text>"))),
                "bearing wear: the panel names no flag's feature"
            );
        }
    }
    // Five panels per log, each with every flag's span.
    let flags: usize = logs
        .iter()
        .map(|l| l["flags"].as_array().unwrap().len())
        .sum();
    let timelines = svgs(html, "<svg class=\"timeline\"");
    assert_eq!(count(html, "<svg class=\"timeline\""), 10);
    assert_eq!(count(&timelines, "<rect class=\"flag\""), 5 * flags);
    // The reading section explains them and lists their constants.
    let reading = &html[html.find("<section id=\"reading\">").unwrap()..];
    let reading = &reading[..reading.find("</section>").unwrap()];
    assert!(reading.contains("<code>plumb tailor</code>"));
    let shown = number_after(reading, "<i>L<sub>s</sub></i> = ", ' ');
    assert!((shown - limit).abs() <= 0.01 * limit, "{shown} vs {limit}");
    for name in &names {
        assert!(
            reading.contains(&format!(
                "<tr><td>{name} [g^2]</td><td class=\"n\">0.05</td>"
            )),
            "{name} in the table"
        );
    }
}

#[test]
fn a_model_without_slow_charts_has_no_slow_panel() {
    let (_dir, html, _out, _) = drift_report();
    let file = ModelFile::from_bytes(&std::fs::read(model()).unwrap()).unwrap();
    assert!(file.model.slow_charts.is_empty());
    assert!(!html.contains("id=\"slow-"), "no slow charts panel");
    assert!(!html.contains("data-score=\"slow\""));
    assert!(!html.contains("SPE slow charts"));
    assert!(!html.contains("plumb tailor"));
}

#[test]
fn same_inputs_same_bytes() {
    let (_dir, html, _, _) = drift_report();
    let (_again, again, _, _) = report_of(model(), "again");
    assert!(again == *html);
}

#[test]
fn clean_log_exits_0_and_bad_input_exits_2_without_output() {
    let dir = Scratch::new("codes");
    let out = dir.path("clean.html");
    // Fewer rows than the warm-up: no flag can rise, whatever the limits.
    let file = ModelFile::from_bytes(&std::fs::read(model()).unwrap()).unwrap();
    let rows = (file.model.monitor.warmup as usize)
        .saturating_sub(1)
        .max(1);
    let text = std::fs::read_to_string(demo("holdout/robot4_day1.csv")).unwrap();
    let head: Vec<&str> = text.lines().take(rows + 1).collect();
    let short = dir.write("short.csv", &(head.join("\n") + "\n"));
    plumb_ok(&["report", s(model()), s(&short), "--out", s(&out), "--quiet"]);
    let html = std::fs::read_to_string(&out).unwrap();
    assert_balanced(&html);
    assert!(html.contains("No drift flag was raised."));
    assert!(html.contains("no --train logs given"));

    let truth = dir.write(
        "truth.csv",
        "scenario,file,onset_row,onset_t_s,kind,features\nx,a.csv,soon,1.0,drift,\n",
    );
    let bad = dir.path("bad.html");
    let o = plumb(&[
        "report",
        s(model()),
        s(&demo("holdout/robot4_day1.csv")),
        "--out",
        s(&bad),
        "--truth",
        s(&truth),
    ]);
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("truth.csv:2:") && err.contains("onset_row"),
        "{err}"
    );
    assert!(!bad.exists());

    let o = plumb(&[
        "report",
        s(&dir.path("none.plumb")),
        s(&demo("holdout/robot4_day1.csv")),
        "--out",
        s(&bad),
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(!bad.exists());
    // No temporary file left behind.
    let left: Vec<_> = std::fs::read_dir(&dir.0)
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().contains(".tmp"))
        .collect();
    assert!(left.is_empty());
}

#[test]
fn contributions_sum_to_the_detector_spe() {
    let file = ModelFile::from_bytes(&std::fs::read(model()).unwrap()).unwrap();
    let det = Detector::new(file.model.to_device().unwrap()).unwrap();
    let d = file.model.mean.len();
    let text = std::fs::read_to_string(demo("drift/loose_mount.csv")).unwrap();
    let (mut z, mut r2) = (vec![0f64; d], vec![0f64; d]);
    let cols = common::model_columns(&file.labels, text.lines().next().unwrap());
    for row in text.lines().skip(1).step_by(97).take(60) {
        let cells: Vec<&str> = row.split(',').collect();
        let x: Vec<f32> = cols
            .iter()
            .map(|&c| cells[c].parse::<f64>().unwrap() as f32)
            .collect();
        let spe = det.score(&x).unwrap().scores.spe;
        plumb::report::residual_sq(&file.model, &x, &mut z, &mut r2);
        let sum: f64 = r2.iter().sum();
        // f32 detector arithmetic against f64: relative error of a few ulp
        // times d, with an absolute floor for tiny SPE.
        assert!(
            (sum - f64::from(spe)).abs() <= 1e-4 * sum.max(1.0),
            "{sum} vs {spe}"
        );
    }
}

#[test]
fn a_million_samples_stay_under_two_megabytes() {
    let dir = Scratch::new("big");
    let train = dir.write("train.csv", &log_text(4, 3000, 11));
    let model = dir.path("small.plumb");
    plumb_ok(&[
        "fit",
        s(&train),
        "--out",
        s(&model),
        "--mixture",
        "2",
        "--restarts",
        "1",
        "--quiet",
    ]);
    let big = dir.write("big.csv", &log_text(4, 1_000_000, 12));
    let out = dir.path("big.html");
    let o = plumb(&[
        "report",
        s(&model),
        s(&big),
        "--train",
        s(&train),
        "--out",
        s(&out),
        "--quiet",
    ]);
    assert!(
        matches!(o.status.code(), Some(0) | Some(1)),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let html = std::fs::read_to_string(&out).unwrap();
    assert_balanced(&html);
    assert!(html.contains("1\u{202f}000\u{202f}000 samples"));
    // One training log: `plumb fit` leaves the residual chart off, and the
    // chart's panel says so in place of a plot.
    let file = ModelFile::from_bytes(&std::fs::read(&model).unwrap()).unwrap();
    assert!(file.model.resid_gain.iter().all(|g| *g == 0.0), "chart off");
    let panel = &html[html
        .find("<div class=\"panel\" id=\"resid-0\">")
        .expect("residual chart panel")..];
    let panel = &panel[..panel.find("</p>").expect("its note")];
    assert!(panel.contains("<b>SPE residual chart</b>"));
    assert!(panel.contains("Off in this model"), "{panel}");
    assert!(!html.contains("data-score=\"resid\""), "no plot when off");
    assert!(html.len() < 2_000_000, "10^6 samples: {} bytes", html.len());
}

/// Runs a command with a deadline; kills it when the deadline passes.
fn run_with_deadline(cmd: &mut Command, limit: Duration) -> Output {
    let child = cmd
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start chromium");
    let id = child.id();
    let start = Instant::now();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        let _ = tx.send(child.wait_with_output());
    });
    loop {
        if let Ok(out) = rx.try_recv() {
            return out.expect("chromium output");
        }
        if start.elapsed() > limit {
            let _ = Command::new("kill").arg(id.to_string()).status();
            panic!("chromium did not finish in {limit:?}");
        }
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn chromium() -> Option<PathBuf> {
    let path = std::env::var_os("PATH")?;
    std::env::split_paths(&path)
        .map(|d| d.join("chromium"))
        .find(|p| p.is_file())
}

fn chromium_args(profile: &Path) -> Vec<String> {
    [
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
    ]
    .iter()
    .map(|s| s.to_string())
    .chain([format!("--user-data-dir={}", profile.display())])
    .collect()
}

#[test]
fn a_browser_renders_the_report() {
    if std::env::var_os("PLUMB_NO_BROWSER").is_some_and(|v| v == "1") {
        println!("browser check skipped: PLUMB_NO_BROWSER=1");
        return;
    }
    let Some(chrome) = chromium() else {
        panic!(
            "chromium not found on PATH: the browser check needs it (scripts/setup.sh installs it; \
             or apt-get install -y chromium). Set PLUMB_NO_BROWSER=1 to skip this check on purpose."
        );
    };
    let (_d, html, out, _) = drift_report();
    let dir = Scratch::new("browser");
    let url = format!("file://{}", out.canonicalize().unwrap().display());

    // The parsed DOM keeps every SVG element (none dropped as invalid).
    // The page as Chromium parsed it, with a profile of its own.
    let dump_dom = |profile: &str, url: &str| -> String {
        let out = run_with_deadline(
            Command::new(&chrome)
                .args(chromium_args(&dir.path(profile)))
                .arg("--dump-dom")
                .arg(url),
            Duration::from_secs(120),
        );
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8_lossy(&out.stdout).into_owned()
    };
    let dom = dump_dom("profile-dom", &url);
    for tag in [
        "<svg",
        "<ellipse",
        "<rect class=\"flag\"",
        "<path class=\"onset\"",
        "class=\"timeline\"",
        "data-score=\"resid\"",
        "class=\"resid-at\"",
    ] {
        assert_eq!(
            count(&dom, tag),
            count(html, tag),
            "{tag} in the parsed DOM"
        );
    }
    // The residual chart's panel of each log, drawn.
    assert_eq!(
        count(&dom, "data-score=\"resid\""),
        2,
        "residual chart panels"
    );

    // The model with slow charts: their panel of each log, drawn, with its
    // flag spans.
    let (_d, slow_html, slow_out, _) = slow_report();
    let dom = dump_dom(
        "profile-slow",
        &format!("file://{}", slow_out.canonicalize().unwrap().display()),
    );
    let slow = svgs(
        &dom,
        "<svg class=\"timeline\" data-log=\"0\" data-score=\"slow\"",
    );
    assert_eq!(
        count(&slow, "<rect class=\"flag\""),
        count(
            &svgs(
                slow_html,
                "<svg class=\"timeline\" data-log=\"0\" data-score=\"slow\""
            ),
            "<rect class=\"flag\""
        ),
        "flag spans in the parsed slow charts panel"
    );
    for tag in ["data-score=\"slow\"", "id=\"slow-", "<table class=\"slow\""] {
        assert_eq!(
            count(&dom, tag),
            count(slow_html, tag),
            "{tag} in the parsed DOM"
        );
    }
    assert_eq!(count(&dom, "data-score=\"slow\""), 2, "slow charts panels");

    // A screenshot: a blank page compresses to a few kilobytes. The
    // 60,000-byte floor is common practice, no source (a rendered report is
    // far above it, a blank or error page far below).
    let png = dir.path("report.png");
    let shot = run_with_deadline(
        Command::new(&chrome)
            .args(chromium_args(&dir.path("profile-shot")))
            .arg(format!("--screenshot={}", png.display()))
            .arg("--window-size=1400,3000")
            .arg(&url),
        Duration::from_secs(120),
    );
    assert!(
        shot.status.success(),
        "{}",
        String::from_utf8_lossy(&shot.stderr)
    );
    let bytes = std::fs::read(&png).expect("screenshot written");
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n");
    assert!(
        bytes.len() > 60_000,
        "screenshot looks blank: {} bytes",
        bytes.len()
    );
}
