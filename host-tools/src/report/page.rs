//! The HTML page: header, per-log timelines and contribution charts, the
//! latent plane, explained variance, and the tables of flags and faults.

use super::plot::{count, esc, line, nice_ticks, pt, rect, sig, text, tick, vtext, Scale};
use super::{
    Bucket, Chart, Collected, FlagContrib, LatentPoint, LogData, PointClass, Span, TruthKind,
    CONTRIB_SAMPLES, LATENT_FIELD_POINTS, LATENT_TRAIN_POINTS, PLOT_COLUMNS,
};
use crate::replay::{Flag, LogReplay};
use crate::summary::utc_string;
use plumb_firmware::Score;
use plumb_model::{ScoreLimits, SLOW_PARAMS};
use std::fmt::Write as _;

/// Display names of the scores, in [`Score::ALL`] order.
const SCORE_NAMES: [&str; 3] = ["SPE (Q)", "Hotelling T²", "Mixture NLL"];
/// Short names (tables, chips).
const SCORE_SHORT: [&str; 3] = ["SPE", "T²", "NLL"];
/// One line on what each score measures.
const SCORE_WHAT: [&str; 3] = [
    "squared residual off the PCA plane",
    "distance within the PCA plane",
    "negative log-likelihood under the Gaussian mixture",
];
/// Display name of the SPE's residual chart (the panel's title, flag notes).
const RESID_NAME: &str = "SPE residual chart";
/// One line on what the residual chart follows.
const RESID_WHAT: &str = "largest |EWMA| of a feature's scaled residual";
/// Display name of the SPE's slow charts (model format 5).
const SLOW_NAME: &str = "SPE slow charts";
/// One line on what the slow charts follow.
const SLOW_WHAT: &str = "largest |EWMA| of a chosen feature's slower second EWMA";

/// How the panel of one of the SPE's feature charts is labelled.
struct ChartText {
    /// Title (panel, plot's label).
    name: &'static str,
    /// What its line follows.
    what: &'static str,
    /// The panel's id prefix and the plot's `data-score`.
    key: &'static str,
    /// After the count of samples over the limit.
    over: &'static str,
    /// The limit line's label, before its value.
    limit: &'static str,
    /// The right axis' label.
    axis: &'static str,
}

/// The labels of `ch`'s panel.
fn chart_text(ch: Chart) -> ChartText {
    match ch {
        Chart::Residual => ChartText {
            name: RESID_NAME,
            what: RESID_WHAT,
            key: "resid",
            over: "over its limit",
            limit: "limit L",
            axis: "residual",
        },
        Chart::Slow => ChartText {
            name: SLOW_NAME,
            what: SLOW_WHAT,
            key: "slow",
            over: "over their limit",
            limit: "slow limit",
            axis: "slow",
        },
    }
}

const STYLE: &str = r#"
:root{--ink:#1d2731;--muted:#5a6672;--rule:#d9dee3;--panel:#ffffff;--ground:#f2f0eb}
*{box-sizing:border-box}
body{margin:0;background:var(--ground);color:var(--ink);font:14px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,"Noto Sans",sans-serif}
main{max-width:1160px;margin:0 auto;padding:18px 22px 40px}
.top{background:#233140;color:#f4f2ec;border-radius:6px;padding:16px 20px 14px}
.top h1{margin:0 0 4px;font-size:21px;font-weight:650;letter-spacing:.2px}
.top .id{font-family:ui-monospace,"DejaVu Sans Mono",monospace;font-size:13px;color:#cfd8e0}
.top dl{display:grid;grid-template-columns:repeat(4,auto);gap:2px 18px;margin:10px 0 0;font-size:13px;justify-content:start}
.top dt{color:#9fb0bf}.top dd{margin:0 0 4px}
.safety{margin:12px 0 0;background:#fff1cf;color:#3b2a00;border-left:6px solid #c98a0b;padding:8px 12px;border-radius:3px;font-weight:600}
section{background:var(--panel);border:1px solid var(--rule);border-radius:6px;padding:14px 18px 16px;margin:16px 0}
h2{font-size:18px;margin:0 0 6px;font-weight:650}
h3{font-size:15px;margin:14px 0 4px;font-weight:600}
p{margin:4px 0 8px}
.muted{color:var(--muted)}
.path{font-family:ui-monospace,"DejaVu Sans Mono",monospace;font-size:15px}
table{border-collapse:collapse;font-size:13px;margin:6px 0}
th{font-weight:600;text-align:left;border-bottom:2px solid #c3cad1;padding:4px 10px 4px 0}
td{padding:4px 10px 4px 0;border-bottom:1px solid #e6e9ec;vertical-align:top}
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums}
.chip{display:inline-block;padding:0 6px;border-radius:9px;font-size:12px;font-weight:600;background:#e8edf2;margin-right:3px}
.chip.up{background:#fbe3c6;color:#7a3b00}
.chip.ok{background:#dcefe3;color:#1d5a33}
.keys{display:flex;flex-wrap:wrap;gap:4px 18px;font-size:12.5px;color:var(--muted);margin:4px 0 6px}
.keys span{display:inline-flex;align-items:center;gap:5px}
.keys svg{width:26px;height:12px;display:inline}
.panel{margin:10px 0 2px}
.ptitle{font-size:13px;margin:0 0 0 2px}
.ptitle b{font-size:14px}
.pnote{margin:2px 0 4px 2px;font-size:12.5px;color:var(--muted)}
.contribs{display:flex;flex-wrap:wrap;gap:10px 22px}
figure{margin:6px 0;flex:1 1 520px;max-width:560px}
figcaption{font-size:12.5px;color:var(--muted)}
svg{display:block;width:100%;height:auto}
svg text{font:11px system-ui,-apple-system,"Segoe UI",Roboto,"Noto Sans",sans-serif;fill:#3b4652}
svg text.t{font-size:12px;fill:#1d2731;font-weight:600}
svg text.s{font-size:10px}
svg text.in{fill:#fff;font-weight:600}
td.nw{white-space:nowrap}
.scroll{overflow-x:auto}
.lbl{paint-order:stroke;stroke:#fff;stroke-width:3px;stroke-linejoin:round}
.frame{fill:none;stroke:#9aa6b1;stroke-width:1}
.grid{stroke:#eceff2;stroke-width:1;fill:none}
.raw{stroke:#b7c8da;fill:none}
.raw-line{stroke:#a3b8cf;stroke-width:1.1;fill:none;stroke-linejoin:round}
.ewma{stroke:#173f66;stroke-width:1.6;fill:none;stroke-linejoin:round}
.cus{stroke:#7b4aa6;stroke-width:1.4;fill:none;stroke-linejoin:round}
.lim-s{stroke:#56626d;stroke-width:1.2;stroke-dasharray:5 3;fill:none}
.lim-l{stroke:#d2601a;stroke-width:1.7;fill:none}
.lim-c{stroke:#d2601a;stroke-width:1.1;stroke-dasharray:1.5 3;fill:none}
.flag{fill:#f3c04a;opacity:.3}
.fault{stroke:#c0187a;stroke-width:1.4;fill:none}
.off{stroke:#1d2731;stroke-width:1;fill:none}
.onset{stroke:#111;stroke-width:1.5;stroke-dasharray:6 3;fill:none}
text.onset-t{fill:#111;font-weight:600}
text.flag-t{fill:#7a4a00;font-weight:600}
text.lim-l-t{fill:#b04e10}
text.lim-s-t{fill:#46515b}
.bar{fill:#3f7cab}
.bar.named{fill:#c8642a}
.nom{stroke:#111;stroke-width:2;fill:none}
.pt-train{stroke:#a9afb5;stroke-width:3.2;stroke-linecap:round;fill:none;opacity:.7}
.pt-watch{stroke:#2a7f9e;stroke-width:3.4;stroke-linecap:round;fill:none;opacity:.75}
.pt-drift{stroke:#d3372f;stroke-width:3.4;stroke-linecap:round;fill:none;opacity:.8}
.e1{fill:none;stroke:#1d2731;stroke-width:1.6}
.e2{fill:none;stroke:#1d2731;stroke-width:1.2;stroke-dasharray:6 4}
.ev{fill:#3f7cab}
.ev.res{fill:#b8b0a2}
.cum{stroke:#d2601a;stroke-width:1.8;fill:none}
.cum-d{fill:#d2601a}
footer{font-size:12px;color:var(--muted);margin-top:18px}
"#;

/// The page.
pub(crate) fn render(c: &Collected<'_>) -> String {
    let mut o = String::with_capacity(256 * 1024);
    let title = format!(
        "plumbline drift report · model {:08x}",
        c.file.model.meta.id
    );
    let _ = write!(
        o,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\"/>\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"/>\n\
         <title>{}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n<main>\n",
        esc(&title)
    );
    header(&mut o, c);
    overview(&mut o, c);
    legend(&mut o, c);
    for li in 0..c.reps.len() {
        log_section(&mut o, c, li);
    }
    latent_section(&mut o, c);
    variance_section(&mut o, c);
    flag_table(&mut o, c);
    fault_table(&mut o, c);
    notes(&mut o, c);
    let _ = write!(
        o,
        "<footer>Written by plumb {}. Advisory monitor, not a safety function: \
         defer to the machine's own safety system, local codes and licensed practice.</footer>\n\
         </main>\n</body>\n</html>\n",
        env!("CARGO_PKG_VERSION")
    );
    o
}

fn feature_name(c: &Collected<'_>, i: usize) -> String {
    c.file
        .labels
        .get(i)
        .map(|l| l.name.clone())
        .filter(|n| !n.is_empty())
        .unwrap_or_else(|| format!("feature {}", i + 1))
}

fn feature_label(c: &Collected<'_>, i: usize) -> String {
    let name = feature_name(c, i);
    match c.file.labels.get(i).map(|l| l.unit.as_str()) {
        Some(u) if !u.is_empty() => format!("{name} [{u}]"),
        _ => name,
    }
}

/// Whether the model's residual chart is on (some feature's gain is not 0).
fn resid_on(c: &Collected<'_>) -> bool {
    Chart::Residual.on(&c.file.model)
}

/// Whether the model has slow charts (format 5, `plumb tailor`).
fn slow_on(c: &Collected<'_>) -> bool {
    Chart::Slow.on(&c.file.model)
}

/// The model's slow charts: (feature, λ, centre, gain), in feature order.
fn slow_charts<'a>(c: &'a Collected<'_>) -> impl Iterator<Item = (usize, f32, f32, f32)> + 'a {
    c.file
        .model
        .slow_charts
        .chunks_exact(SLOW_PARAMS)
        .map(|p| (p[0] as usize, p[1], p[2], p[3]))
}

/// Beside flag `fi` of log `li`: the residual chart and the feature of its
/// largest EWMA, when the chart was over its limit as the flag rose; empty
/// otherwise.
fn resid_note(c: &Collected<'_>, li: usize, fi: usize) -> String {
    match c.logs[li].charts[Chart::Residual.index()]
        .at_raise
        .get(fi)
        .copied()
        .flatten()
    {
        Some(r) => format!(
            " <span class=\"resid-at\"><span class=\"chip up\">{RESID_NAME}</span> {} \
             <span class=\"muted\">(EWMA {}; limit ±{})</span></span>",
            esc(&feature_name(c, r.feature)),
            sig(f64::from(r.ewma)),
            sig(f64::from(c.file.model.resid_limit))
        ),
        None => String::new(),
    }
}

fn limits(c: &Collected<'_>) -> [ScoreLimits; 3] {
    let mp = &c.file.model.monitor;
    [mp.spe, mp.t2, mp.nll]
}

fn log_name(rep: &LogReplay) -> String {
    rep.path.display().to_string()
}

/// A table cell naming log `li`: its file name when no other log has the
/// same one, else its path; links to the log's section.
fn log_cell(c: &Collected<'_>, li: usize) -> String {
    let rep = &c.reps[li];
    let base = rep.path.file_name();
    let unique =
        base.is_some() && c.reps.iter().filter(|r| r.path.file_name() == base).count() == 1;
    let shown = match base {
        Some(b) if unique => b.to_string_lossy().to_string(),
        _ => log_name(rep),
    };
    format!(
        "<td class=\"nw\"><a href=\"#log-{li}\" title=\"{}\">{}</a></td>",
        esc(&log_name(rep)),
        esc(&shown)
    )
}

fn at(idx: u64, t: Option<f64>) -> String {
    match t {
        Some(t) => format!("{} <span class=\"muted\">({} s)</span>", count(idx), sig(t)),
        None => count(idx),
    }
}

fn driver_chips(f: &Flag) -> String {
    f.scores
        .iter()
        .map(|s| format!("<span class=\"chip up\">{}</span>", score_short(s)))
        .collect::<Vec<_>>()
        .join("")
}

/// The short label of a score named as in replay's output (`spe` → `SPE`).
fn score_short(name: &str) -> &'static str {
    let i = Score::ALL
        .iter()
        .position(|x| x.name() == name)
        .unwrap_or(0);
    SCORE_SHORT[i]
}

/// The charts of the scores over their limits when flag `f` rose, as the
/// board's drift raised message lists them (`plumb replay`'s `crossed`):
/// "SPE per-sample limit 50 > 42.9, SPE EWMA 3.1 > 2.9". The residual
/// chart is left to [`resid_note`], which gives its signed EWMA.
fn charts_note(f: &Flag) -> String {
    let parts: Vec<String> = f
        .crossed
        .iter()
        .filter(|c| c.statistic != "residual")
        .map(|c| {
            let chart = match c.statistic {
                "ewma" => "EWMA",
                "cusum" => "CUSUM",
                "per-sample" => "per-sample limit",
                other => other,
            };
            format!(
                "{} {chart} {} > {}",
                score_short(c.score),
                sig(f64::from(c.value)),
                sig(f64::from(c.limit))
            )
        })
        .collect();
    if parts.is_empty() {
        return String::new();
    }
    format!(
        " <span class=\"charts muted\">({})</span>",
        esc(&parts.join(", "))
    )
}

fn header(o: &mut String, c: &Collected<'_>) {
    let m = &c.file.model;
    let meta = &m.meta;
    let period = if meta.sample_period_us > 0 {
        format!(
            "{} ms ({} Hz)",
            sig(f64::from(meta.sample_period_us) / 1e3),
            sig(1e6 / f64::from(meta.sample_period_us))
        )
    } else {
        "unknown".to_string()
    };
    let _ = write!(
        o,
        "<header class=\"top\">\n<h1>Drift report</h1>\n\
         <div class=\"id\">model {:08x} · schema {:016x} · {}</div>\n<dl>\
         <dt>features → components → mixture</dt><dt>fitted on</dt><dt>calibrated on</dt><dt>fit logs dated (UTC)</dt>\
         <dd>{} → {} → {}</dd><dd>{} rows</dd><dd>{} held-out rows</dd><dd>{}</dd>\
         <dt>sample period</dt><dt>logs in this report</dt><dt>training logs</dt><dt>EWMA λ · warm-up</dt>\
         <dd>{}</dd><dd>{}</dd><dd>{}</dd><dd>{} · {} samples</dd></dl>\n\
         <p class=\"safety\">Advisory monitor, not a safety function. Flags inform people and \
         maintenance systems; they must not stop, start or limit a machine on their own.</p>\n</header>\n",
        meta.id,
        meta.schema,
        esc(&c.model_path.display().to_string()),
        m.dims.features,
        m.dims.components,
        m.dims.mixture,
        count(meta.train_rows),
        count(meta.calib_rows),
        if meta.created_unix_s > 0 {
            utc_string(meta.created_unix_s)
        } else {
            "unknown".to_string()
        },
        period,
        c.reps.len(),
        if c.train_files > 0 {
            format!("{} ({} rows)", c.train_files, count(c.train_rows))
        } else {
            "none given".to_string()
        },
        sig(f64::from(m.monitor.ewma_lambda)),
        m.monitor.warmup
    );
}

fn overview(o: &mut String, c: &Collected<'_>) {
    let flagged = c.reps.iter().filter(|r| !r.flags.is_empty()).count();
    let _ = write!(
        o,
        "<section id=\"overview\">\n<h2>Overview</h2>\n<p>{} of {} logs raised a drift flag.</p>\n\
         <div class=\"scroll\"><table><thead><tr><th>log</th><th class=\"n\">samples</th><th class=\"n\">faulted</th>\
         <th class=\"n\">flags</th><th>first flag raised at</th><th>ground truth</th>\
         <th class=\"n\">first flag − onset</th></tr></thead><tbody>\n",
        flagged,
        c.reps.len()
    );
    for (li, rep) in c.reps.iter().enumerate() {
        let data = &c.logs[li];
        let first = rep.flags.first();
        let truth = data.truth.as_ref();
        let delay = match (first, truth) {
            (Some(f), Some(t)) => {
                let d = f.raised_at as i64 - t.onset_row as i64;
                match rep.period_s {
                    Some(p) => {
                        format!("{d} <span class=\"muted\">({} s)</span>", sig(d as f64 * p))
                    }
                    None => d.to_string(),
                }
            }
            _ => "–".to_string(),
        };
        let _ = writeln!(
            o,
            "<tr>{}<td class=\"n\">{}</td><td class=\"n\">{}</td>\
             <td class=\"n\">{}</td><td class=\"nw\">{}</td><td>{}</td><td class=\"n nw\">{}</td></tr>",
            log_cell(c, li),
            count(rep.samples),
            count(rep.faults),
            rep.flags.len(),
            first
                .map(|f| format!(
                    "{} {}{}",
                    at(f.raised_at, f.raised_t),
                    driver_chips(f),
                    resid_note(c, li, 0)
                ))
                .unwrap_or_else(|| "<span class=\"chip ok\">none</span>".to_string()),
            truth
                .map(|t| format!(
                    "{} from sample {}{}",
                    t.kind.as_str(),
                    count(t.onset_row as u64),
                    if t.scenario.is_empty() {
                        String::new()
                    } else {
                        format!(" <span class=\"muted\">({})</span>", esc(&t.scenario))
                    }
                ))
                .unwrap_or_else(|| "–".to_string()),
            delay
        );
    }
    o.push_str("</tbody></table></div>\n</section>\n");
}

/// The reading section's paragraph on the slow charts, and their constants.
fn slow_explained(o: &mut String, c: &Collected<'_>) {
    let _ = writeln!(
        o,
        "<p>Below it, the {SLOW_NAME}, which <code>plumb tailor</code> set on this robot's own \
         nominal logs: for each feature in the table, a second, slower EWMA of the same input as \
         that feature's residual chart, with a λ, centre and gain of its own. Averaging more \
         samples, it shows a small lasting shift in that feature sooner against the robot's own, \
         narrower nominal band. The line is the largest |EWMA| over them; above the limit \
         <i>L<sub>s</sub></i> = {} they are hot and make the SPE a driver, and a flag clears only \
         when they too are calm. A flag raised while they were hot is labelled in their panel with \
         the feature of the largest EWMA.</p>",
        sig(f64::from(c.file.model.slow_limit))
    );
    o.push_str(
        "<div class=\"scroll\"><table class=\"slow\"><thead><tr><th>slow chart of</th>\
         <th class=\"n\">λ</th><th class=\"n\">centre</th><th class=\"n\">gain</th></tr></thead><tbody>\n",
    );
    for (f, lambda, centre, gain) in slow_charts(c) {
        let _ = writeln!(
            o,
            "<tr><td>{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>",
            esc(&feature_label(c, f)),
            lambda,
            sig(f64::from(centre)),
            sig(f64::from(gain))
        );
    }
    o.push_str("</tbody></table></div>\n");
}

/// A tiny SVG swatch for the legend.
fn key(o: &mut String, body: &str, label: &str) {
    let _ = write!(
        o,
        "<span><svg class=\"key\" viewBox=\"0 0 26 12\" aria-hidden=\"true\">{body}</svg>{label}</span>"
    );
}

fn legend(o: &mut String, c: &Collected<'_>) {
    let mp = &c.file.model.monitor;
    let _ = write!(
        o,
        "<section id=\"reading\">\n<h2>Reading the timelines</h2>\n<p>Each score is drawn on the \
         detector's own scale, <i>u</i> = (∛score − centre)/spread (for the NLL, ∛ of its excess over \
         the model's floor); the right axis gives the raw score at the same heights. The dark line \
         is the detector's EWMA of <i>u</i> (λ = {}; for SPE, of ∛SPE standardised with the centre \
         and spread of each sample's operating mode, its most likely mixture component, so it can sit \
         above or below the points); it, not the raw score, raises flags, together \
         with the CUSUM in the strip below (drawn as CUSUM/<i>h</i>). A flag rises after {} hot \
         samples in a row and clears after {} calm ones (every chart below {} of its limit) and at \
         least {} samples up. Long logs are reduced to one column per pixel, keeping each \
         column's minimum and maximum, so short spikes stay visible.</p>\n",
        sig(f64::from(mp.ewma_lambda)),
        mp.raise_dwell,
        mp.clear_dwell,
        sig(f64::from(mp.clear_fraction)),
        mp.min_hold
    );
    if resid_on(c) {
        let _ = writeln!(
            o,
            "<p>Below the three scores, the {RESID_NAME}: one EWMA per feature (the same λ) of \
             (<i>v<sub>i</sub></i> − centre<sub><i>i</i></sub>) · gain<sub><i>i</i></sub>, \
             <i>v<sub>i</sub></i> the feature's PCA residual{}, each gain scaling the feature to its \
             own nominal tail. The line is the largest |EWMA| over the features; above the limit \
             <i>L</i> = {} the chart is hot and makes the SPE a driver. A flag raised while it was \
             hot is labelled in that panel, and in the tables, with the feature of the largest \
             EWMA.</p>",
            if c.file.model.resid_whiten.is_empty() {
                ""
            } else {
                " whitened by the residuals' nominal covariance (it stands for a bias in that \
                 sensor alone)"
            },
            sig(f64::from(c.file.model.resid_limit))
        );
    } else {
        o.push_str(
            "<p>The model's SPE residual chart (one EWMA per feature of its scaled PCA residual) \
             is off: every feature's gain is 0.</p>\n",
        );
    }
    if slow_on(c) {
        slow_explained(o, c);
    }
    o.push_str("<div class=\"keys\">");
    key(
        o,
        r#"<path class="raw" stroke-width="8" d="M2 6H24"/>"#,
        "per-sample <i>u</i> (min–max per column)",
    );
    key(
        o,
        r#"<path class="ewma" d="M2 8L9 4L16 7L24 3"/>"#,
        "EWMA of <i>u</i>",
    );
    key(o, r#"<path class="lim-l" d="M2 6H24"/>"#, "EWMA limit L");
    key(
        o,
        r#"<path class="lim-c" d="M2 6H24"/>"#,
        "clear level (fraction of the limit)",
    );
    key(
        o,
        r#"<path class="lim-s" d="M2 6H24"/>"#,
        "per-sample limit",
    );
    key(o, r#"<path class="cus" d="M2 10L12 8L24 2"/>"#, "CUSUM/h");
    key(
        o,
        r#"<rect class="flag" x="1" y="0" width="24" height="12"/>"#,
        "flag raised → cleared",
    );
    key(
        o,
        r#"<path class="onset" d="M13 0V12"/>"#,
        "ground-truth onset",
    );
    key(
        o,
        r#"<path class="fault" d="M9 12V4M17 12V4"/>"#,
        "faulted samples",
    );
    key(
        o,
        r#"<path class="off" d="M9 0V5M13 0V5M17 0V5"/>"#,
        "per-sample <i>u</i> above the scale",
    );
    o.push_str("</div>\n</section>\n");
}

fn log_section(o: &mut String, c: &Collected<'_>, li: usize) {
    let rep = &c.reps[li];
    let data = &c.logs[li];
    let _ = write!(
        o,
        "<section class=\"log\" id=\"log-{li}\">\n<h2 class=\"path\">{}</h2>\n<p class=\"muted\">{} samples",
        esc(&log_name(rep)),
        count(rep.samples)
    );
    if let Some(p) = rep.period_s {
        let _ = write!(o, " · period {} s", sig(p));
    }
    let _ = write!(
        o,
        " · {} faulted · {} flag{}",
        count(rep.faults),
        rep.flags.len(),
        if rep.flags.len() == 1 { "" } else { "s" }
    );
    if let Some(t) = &data.truth {
        let _ = write!(
            o,
            " · ground truth: {} from sample {}",
            t.kind.as_str(),
            count(t.onset_row as u64)
        );
        if !t.features.is_empty() {
            let _ = write!(o, " on {}", esc(&t.features.join(", ")));
        }
    }
    o.push_str("</p>\n");
    for si in 0..3 {
        let _ = writeln!(
            o,
            "<div class=\"panel\"><div class=\"ptitle\"><b>{}</b> · {} · {} sample{} over the per-sample limit</div>",
            SCORE_NAMES[si],
            SCORE_WHAT[si],
            count(rep.over_sample_limit[si]),
            if rep.over_sample_limit[si] == 1 { "" } else { "s" }
        );
        timeline(o, c, li, si);
        o.push_str("</div>\n");
    }
    if resid_on(c) {
        chart_panel(o, c, li, Chart::Residual);
    } else {
        let _ = writeln!(
            o,
            "<div class=\"panel\" id=\"resid-{li}\"><div class=\"ptitle\"><b>{RESID_NAME}</b> · {RESID_WHAT}</div>\n\
             <p class=\"pnote\">Off in this model (every feature's gain is 0), so it raises no flag.</p>"
        );
        o.push_str("</div>\n");
    }
    if slow_on(c) {
        chart_panel(o, c, li, Chart::Slow);
    }
    if !rep.flags.is_empty() {
        let _ = write!(
            o,
            "<h3>Feature contributions per flag</h3>\n<p class=\"muted\">Mean squared residual \
             <i>r<sub>i</sub></i>² of each feature over the first {CONTRIB_SAMPLES} scored samples \
             from the one that raised the flag (fewer if the flag cleared or the log ended first); \
             the ten largest. {}{}</p>\n<div class=\"contribs\">\n",
            if c.nominal_r2.is_some() {
                "The black tick is the same mean over the training rows. "
            } else {
                ""
            },
            if data.truth.as_ref().is_some_and(|t| !t.features.is_empty()) {
                "Orange bars: features the ground truth names."
            } else {
                ""
            }
        );
        for (fi, f) in rep.flags.iter().enumerate() {
            match data.contribs.get(fi) {
                Some(fc) if fc.samples > 0 => contrib_chart(o, c, li, fi, f, fc),
                _ => {
                    let _ = writeln!(
                        o,
                        "<figure><figcaption>Flag {}: no scored sample after it rose.</figcaption></figure>",
                        fi + 1
                    );
                }
            }
        }
        o.push_str("</div>\n");
    }
    o.push_str("</section>\n");
}

/// Timeline geometry (SVG user units).
const TW: f64 = 1100.0;
const ML: f64 = 58.0;
const PW: f64 = PLOT_COLUMNS as f64;
const MT: f64 = 18.0;
const MH: f64 = 132.0;
const ST: f64 = MT + MH + 8.0;
const SH: f64 = 34.0;
const TH: f64 = ST + SH + 32.0;

/// The columns of a timeline: buckets merged by pixel column.
fn columns(buckets: &[Bucket], samples: u64) -> (Vec<Option<Bucket>>, usize) {
    let n = samples.max(1);
    let cols = (PLOT_COLUMNS as u64).min(n).max(1) as usize;
    let mut out: Vec<Option<Bucket>> = vec![None; cols];
    for b in buckets {
        let ci = ((u128::from(b.start) * cols as u128) / u128::from(n)) as usize;
        let ci = ci.min(cols - 1);
        match &mut out[ci] {
            Some(a) => a.merge(b),
            slot @ None => *slot = Some(b.clone()),
        }
    }
    (out, cols)
}

fn timeline(o: &mut String, c: &Collected<'_>, li: usize, si: usize) {
    let rep = &c.reps[li];
    let data = &c.logs[li];
    let lim = limits(c)[si];
    let mp = &c.file.model.monitor;
    let n = rep.samples.max(1);
    let (cols, ncol) = columns(&data.buckets, rep.samples);
    let colw = PW / ncol as f64;
    let xc = |ci: usize| ML + colw * (ci as f64 + 0.5);
    let xs = Scale::new(0.0, n as f64, ML, ML + PW);

    let score = Score::ALL[si];
    let floor = c.nll_floor;
    let u_of = |v: f64| -> f64 {
        let g = match score {
            Score::Nll => (v - f64::from(floor)).cbrt(),
            _ => v.cbrt(),
        };
        (g - f64::from(lim.center)) / f64::from(lim.spread)
    };
    let u_sample = f64::from(
        (plumb_firmware::transform(score, lim.sample_limit, floor) - lim.center) / lim.spread,
    );
    let big_l = f64::from(lim.ewma_limit);

    // Vertical range.
    let mut raw = Span::EMPTY;
    let mut ewma = Span::EMPTY;
    for b in cols.iter().flatten() {
        raw.merge(b.raw[si]);
        ewma.merge(b.ewma[si]);
    }
    let lim_hi = u_sample.max(big_l);
    let mut hi = (lim_hi * 1.15 + 0.5).max(if ewma.is_empty() {
        0.0
    } else {
        f64::from(ewma.hi) * 1.08
    });
    if !raw.is_empty() && f64::from(raw.hi) > hi {
        hi = hi.max((f64::from(raw.hi) * 1.03).min(2.5 * hi));
    }
    let mut lo = -1.0f64;
    if !raw.is_empty() {
        lo = lo.min(f64::from(raw.lo));
    }
    if !ewma.is_empty() {
        lo = lo.min(f64::from(ewma.lo));
    }
    let lo = (lo - 0.04 * (hi - lo)).max(-20.0);
    let ys = Scale::new(lo, hi, MT + MH, MT);
    let cs = Scale::new(0.0, 2.0, ST + SH, ST);

    let _ = write!(
        o,
        "<svg class=\"timeline\" data-log=\"{li}\" data-score=\"{}\" viewBox=\"0 0 {} {}\" \
         role=\"img\" aria-label=\"{} of {}\">",
        score.name(),
        pt(TW),
        pt(TH),
        SCORE_NAMES[si],
        esc(&log_name(rep))
    );

    // Grid and left axis (u).
    let (uticks, ustep) = nice_ticks(lo, hi, 5);
    for &u in &uticks {
        let y = ys.at(u);
        line(o, ML, y, ML + PW, y, "grid");
        text(o, ML - 5.0, y + 3.5, "", "end", &tick(u, ustep));
    }
    vtext(
        o,
        14.0,
        MT + MH / 2.0,
        "",
        "<tspan font-style=\"italic\">u</tspan>",
    );
    let (xticks, xstep) = nice_ticks(0.0, n as f64, 8);
    for &s in &xticks {
        let x = xs.at(s);
        line(o, x, MT, x, MT + MH, "grid");
        line(o, x, ST, x, ST + SH, "grid");
    }

    // Flag spans, under everything else.
    flag_spans(o, rep, &xs, ST + SH, |fi, span, room| {
        let full = format!("flag {}", fi + 1);
        if si == 0 || span > 30.0 {
            fitted(room, [full, (fi + 1).to_string()])
        } else {
            None
        }
    });

    // Per-sample u: one vertical stroke per column, clipped to the scale;
    // when every column is a single sample, a thin line through them.
    let single = n <= PLOT_COLUMNS as u64;
    let mut d = String::new();
    let mut off = String::new();
    let mut faults = String::new();
    let mut joined = false;
    for (ci, b) in cols.iter().enumerate() {
        let Some(b) = b else {
            joined = false;
            continue;
        };
        let x = xc(ci);
        if b.faults > 0 {
            let _ = write!(faults, "M{} {}v-7", pt(x), pt(MT + MH));
        }
        let r = b.raw[si];
        if r.is_empty() {
            joined = false;
            continue;
        }
        if f64::from(r.hi) > hi {
            let _ = write!(off, "M{} {}v5", pt(x), pt(MT));
        }
        if single {
            let cmd = if joined { "L" } else { "M" };
            let _ = write!(d, "{cmd}{} {}", pt(x), pt(ys.clamped(f64::from(r.hi))));
            joined = true;
            continue;
        }
        let y1 = ys.clamped(f64::from(r.hi));
        let y2 = ys.clamped(f64::from(r.lo));
        let (y1, y2) = if y2 - y1 < 1.0 {
            let m = (y1 + y2) / 2.0;
            (m - 0.5, m + 0.5)
        } else {
            (y1, y2)
        };
        let _ = write!(d, "M{} {}V{}", pt(x), pt(y1), pt(y2));
    }
    if single {
        let _ = write!(o, r#"<path class="raw-line" d="{d}"/>"#);
    } else {
        let _ = write!(
            o,
            r#"<path class="raw" stroke-width="{}" d="{d}"/>"#,
            pt(colw.max(1.0))
        );
    }

    // Limits.
    let clear = f64::from(mp.clear_fraction) * big_l;
    line(o, ML, ys.at(clear), ML + PW, ys.at(clear), "lim-c");
    line(o, ML, ys.at(big_l), ML + PW, ys.at(big_l), "lim-l");
    if u_sample <= hi {
        line(o, ML, ys.at(u_sample), ML + PW, ys.at(u_sample), "lim-s");
    }
    // Labels: the higher line's label above it, the lower one's below.
    let (l_dy, s_dy) = if u_sample > big_l {
        (11.5, -3.5)
    } else {
        (-3.5, 11.5)
    };
    text(
        o,
        ML + PW - 4.0,
        ys.at(big_l) + l_dy,
        "s lim-l-t lbl",
        "end",
        &format!("EWMA limit L = {}", sig(big_l)),
    );
    if u_sample <= hi {
        text(
            o,
            ML + PW - 4.0,
            ys.at(u_sample) + s_dy,
            "s lim-s-t lbl",
            "end",
            &format!("per-sample limit {}", sig(f64::from(lim.sample_limit))),
        );
    }

    // EWMA: through each column's extremes.
    let pts = extremes_path(&cols, xc, |v| ys.at(v), |b| b.ewma[si]);
    let _ = write!(o, r#"<path class="ewma" d="{pts}"/>"#);
    if !off.is_empty() {
        let _ = write!(o, r#"<path class="off" d="{off}"/>"#);
    }
    if !faults.is_empty() {
        let _ = write!(o, r#"<path class="fault" d="{faults}"/>"#);
    }

    // CUSUM strip.
    line(o, ML, cs.at(1.0), ML + PW, cs.at(1.0), "lim-l");
    let cf = f64::from(mp.clear_fraction);
    line(o, ML, cs.at(cf), ML + PW, cs.at(cf), "lim-c");
    let pts = extremes_path(&cols, xc, |v| cs.clamped(v), |b| b.cusum[si]);
    let _ = write!(o, r#"<path class="cus" d="{pts}"/>"#);
    text(o, ML - 5.0, cs.at(1.0) + 3.5, "s", "end", "h");
    text(o, ML - 5.0, cs.at(0.0) + 3.5, "s", "end", "0");
    text(o, ML - 5.0, cs.at(2.0) + 7.0, "s", "end", "2h");
    text(o, 4.0, ST + SH / 2.0 + 4.0, "s", "start", "CUSUM");

    // Ground truth.
    onset_marker(o, data, &xs, n, ST + SH);

    // Frames.
    rect(o, ML, MT, PW, MH, "frame");
    rect(o, ML, ST, PW, SH, "frame");

    // Right axis: raw score at round values; powers of ten first, then 2
    // and 5 times them where there is room.
    let mut kept: Vec<(f64, f64)> = Vec::new();
    for mults in [&[1.0][..], &[2.0, 5.0][..]] {
        let mut cand: Vec<f64> = Vec::new();
        for k in -4..=8 {
            for m in mults {
                let v = m * 10f64.powi(k);
                cand.push(v);
                if score == Score::Nll {
                    cand.push(-v);
                }
            }
        }
        if mults.len() == 1 {
            cand.push(0.0);
        }
        for v in cand {
            let u = u_of(v);
            if !(u >= lo && u <= hi) {
                continue;
            }
            let y = ys.at(u);
            if kept.iter().all(|(_, ky)| (ky - y).abs() >= 14.0) {
                kept.push((v, y));
            }
        }
    }
    for (v, y) in kept {
        line(o, ML + PW, y, ML + PW + 4.0, y, "frame");
        text(o, ML + PW + 7.0, y + 3.5, "", "start", &round_label(v));
    }
    vtext(o, TW - 12.0, MT + MH / 2.0, "", SCORE_SHORT[si]);

    sample_axis(o, rep, data, &xs, (&xticks, xstep), ST + SH);
    o.push_str("</svg>\n");
}

/// The shaded span of each flag, from the top of the plot area to `bottom`;
/// `label(flag, span, room)` gives the text at its start, if any: `span` is
/// the shaded width, `room` the width up to the next flag or the plot's end.
fn flag_spans(
    o: &mut String,
    rep: &LogReplay,
    xs: &Scale,
    bottom: f64,
    label: impl Fn(usize, f64, f64) -> Option<String>,
) {
    let n = rep.samples.max(1);
    for (fi, f) in rep.flags.iter().enumerate() {
        let x0 = xs.at(f.raised_at as f64);
        let x1 = xs.at(f.cleared_at.unwrap_or(n) as f64).max(x0 + 1.0);
        rect(o, x0, MT, x1 - x0, bottom - MT, "flag");
        let next = rep
            .flags
            .get(fi + 1)
            .map_or(ML + PW, |g| xs.at(g.raised_at as f64));
        if let Some(body) = label(fi, x1 - x0, next - x0) {
            text(o, x0 + 3.0, MT + 11.0, "s flag-t lbl", "start", &body);
        }
    }
}

/// The first of `labels` (plain text, 10-unit bold type) that fits in
/// `room` units after a flag's start, if any.
fn fitted<const N: usize>(room: f64, labels: [String; N]) -> Option<String> {
    // About 5.8 units per character of the labels' type, and a gap.
    labels
        .into_iter()
        .find(|l| 5.8 * l.chars().count() as f64 + 8.0 <= room)
}

/// The ground-truth onset of a log, from above the plot area to `bottom`.
fn onset_marker(o: &mut String, data: &LogData, xs: &Scale, n: u64, bottom: f64) {
    if let Some(t) = &data.truth {
        if t.onset_row as u64 <= n {
            let x = xs.at(t.onset_row as f64);
            line(o, x, MT - 4.0, x, bottom, "onset");
            let label = match t.kind {
                TruthKind::Drift => "onset (drift)",
                TruthKind::Fault => "onset (fault)",
            };
            let anchor = if x > ML + PW - 90.0 { "end" } else { "start" };
            let dx = if anchor == "end" { -4.0 } else { 4.0 };
            text(o, x + dx, MT - 6.0, "s onset-t", anchor, label);
        }
    }
}

/// Bottom axis below `y`: sample index, and log time when known.
fn sample_axis(
    o: &mut String,
    rep: &LogReplay,
    data: &LogData,
    xs: &Scale,
    (xticks, xstep): (&[f64], f64),
    y: f64,
) {
    for &s in xticks {
        let x = xs.at(s);
        text(o, x, y + 13.0, "s", "middle", &tick(s, xstep));
        if data.timed {
            if let Some(t) = time_at(&data.buckets, s as u64, rep.period_s) {
                text(o, x, y + 25.0, "s", "middle", &format!("{} s", seconds(t)));
            }
        }
    }
    text(o, 4.0, y + 13.0, "s", "start", "sample");
    if data.timed {
        text(o, 4.0, y + 25.0, "s", "start", "time");
    }
}

/// Height of a feature chart's panel: the plot area and the sample axis.
const RH: f64 = MT + MH + 32.0;

/// The panel of one of the SPE's feature charts of log `li` (the model has
/// the chart): its title, with the samples over the limit, and its plot.
fn chart_panel(o: &mut String, c: &Collected<'_>, li: usize, ch: Chart) {
    let t = chart_text(ch);
    let over = c.logs[li].charts[ch.index()].over;
    let _ = write!(
        o,
        "<div class=\"panel\" id=\"{}-{li}\"><div class=\"ptitle\"><b>{}</b> · {}",
        t.key, t.name, t.what
    );
    if ch == Chart::Slow {
        let on: Vec<String> = slow_charts(c)
            .map(|(f, ..)| esc(&feature_name(c, f)))
            .collect();
        let _ = write!(o, " · on {}", on.join(", "));
    }
    let _ = writeln!(
        o,
        " · {} sample{} {}</div>",
        count(over),
        if over == 1 { "" } else { "s" },
        t.over
    );
    chart_timeline(o, c, li, ch);
    o.push_str("</div>\n");
}

/// One of the SPE's feature charts of log `li`: per column the smallest and
/// largest peak `|EWMA|`, the limit and the clear level, flag spans (named
/// with the chart's feature where the chart was over its limit as the flag
/// rose), ground truth and faulted samples.
fn chart_timeline(o: &mut String, c: &Collected<'_>, li: usize, ch: Chart) {
    let rep = &c.reps[li];
    let data = &c.logs[li];
    let mp = &c.file.model.monitor;
    let t = chart_text(ch);
    let at_raise = &data.charts[ch.index()].at_raise;
    let n = rep.samples.max(1);
    let (cols, ncol) = columns(&data.buckets, rep.samples);
    let colw = PW / ncol as f64;
    let xc = |ci: usize| ML + colw * (ci as f64 + 0.5);
    let xs = Scale::new(0.0, n as f64, ML, ML + PW);
    let big_l = f64::from(ch.limit(&c.file.model));

    let mut peak = Span::EMPTY;
    for b in cols.iter().flatten() {
        peak.merge(b.charts[ch.index()]);
    }
    let hi = (big_l * 1.25).max(if peak.is_empty() {
        0.0
    } else {
        f64::from(peak.hi) * 1.08
    });
    let ys = Scale::new(0.0, hi, MT + MH, MT);

    let _ = write!(
        o,
        "<svg class=\"timeline\" data-log=\"{li}\" data-score=\"{}\" viewBox=\"0 0 {} {}\" \
         role=\"img\" aria-label=\"{} of {}\">",
        t.key,
        pt(TW),
        pt(RH),
        t.name,
        esc(&log_name(rep))
    );
    let (yticks, ystep) = nice_ticks(0.0, hi, 5);
    for &v in &yticks {
        let y = ys.at(v);
        line(o, ML, y, ML + PW, y, "grid");
        text(o, ML - 5.0, y + 3.5, "", "end", &tick(v, ystep));
    }
    vtext(o, 14.0, MT + MH / 2.0, "", "max |EWMA|");
    let (xticks, xstep) = nice_ticks(0.0, n as f64, 8);
    for &s in &xticks {
        let x = xs.at(s);
        line(o, x, MT, x, MT + MH, "grid");
    }

    // Flags; one the chart was hot for names its feature on a second line.
    flag_spans(o, rep, &xs, MT + MH, |fi, span, room| {
        let named = at_raise.get(fi).is_some_and(Option::is_some);
        if named || span > 30.0 {
            fitted(room, [format!("flag {}", fi + 1), (fi + 1).to_string()])
        } else {
            None
        }
    });
    for (fi, f) in rep.flags.iter().enumerate() {
        let Some(r) = at_raise.get(fi).copied().flatten() else {
            continue;
        };
        let x0 = xs.at(f.raised_at as f64);
        let next = rep
            .flags
            .get(fi + 1)
            .map_or(ML + PW, |g| xs.at(g.raised_at as f64));
        if let Some(name) = fitted(next - x0, [feature_name(c, r.feature)]) {
            text(o, x0 + 3.0, MT + 23.0, "s flag-t lbl", "start", &esc(&name));
        }
    }

    // Limits.
    let clear = f64::from(mp.clear_fraction) * big_l;
    line(o, ML, ys.at(clear), ML + PW, ys.at(clear), "lim-c");
    line(o, ML, ys.at(big_l), ML + PW, ys.at(big_l), "lim-l");
    text(
        o,
        ML + PW - 4.0,
        ys.at(big_l) - 3.5,
        "s lim-l-t lbl",
        "end",
        &format!("{} = {}", t.limit, sig(big_l)),
    );

    // The peak: through each column's extremes.
    let pts = extremes_path(&cols, xc, |v| ys.at(v), |b| b.charts[ch.index()]);
    let mut faults = String::new();
    for (ci, b) in cols.iter().enumerate() {
        if b.as_ref().is_some_and(|b| b.faults > 0) {
            let _ = write!(faults, "M{} {}v-7", pt(xc(ci)), pt(MT + MH));
        }
    }
    let _ = write!(o, r#"<path class="ewma" d="{pts}"/>"#);
    if !faults.is_empty() {
        let _ = write!(o, r#"<path class="fault" d="{faults}"/>"#);
    }

    onset_marker(o, data, &xs, n, MT + MH);
    rect(o, ML, MT, PW, MH, "frame");
    vtext(o, TW - 12.0, MT + MH / 2.0, "", t.axis);
    sample_axis(o, rep, data, &xs, (&xticks, xstep), MT + MH);
    o.push_str("</svg>\n");
}

/// A column's two extremes, the one nearer the previous point first, so a
/// reduced line stays a line.
/// An SVG path through each column's extremes of one series (`span` of the
/// column's bucket, placed by `y`): a vertical stroke per column from the end
/// nearer the previous column's, so the line stays continuous.
fn extremes_path(
    cols: &[Option<Bucket>],
    xc: impl Fn(usize) -> f64,
    y: impl Fn(f64) -> f64,
    span: impl Fn(&Bucket) -> Span,
) -> String {
    let mut pts = String::new();
    let mut prev = f64::NAN;
    for (ci, b) in cols.iter().enumerate() {
        let Some(b) = b else { continue };
        let e = span(b);
        if e.is_empty() {
            continue;
        }
        let x = xc(ci);
        let (a, z) = near_first(prev, y(f64::from(e.lo)), y(f64::from(e.hi)));
        prev = z;
        let sep = if pts.is_empty() { "M" } else { "L" };
        if (a - z).abs() < 0.5 {
            let _ = write!(pts, "{sep}{} {}", pt(x), pt(a));
        } else {
            let _ = write!(pts, "{sep}{} {}V{}", pt(x), pt(a), pt(z));
        }
    }
    pts
}

fn near_first(prev: f64, a: f64, b: f64) -> (f64, f64) {
    if (prev - b).abs() < (prev - a).abs() {
        (b, a)
    } else {
        (a, b)
    }
}

/// A log time for an axis: tenths of a second, no trailing `.0`.
fn seconds(t: f64) -> String {
    let r = format!("{:.1}", (t * 10.0).round() / 10.0);
    r.strip_suffix(".0").map(str::to_string).unwrap_or(r)
}

/// A round number as written by hand: `0.05`, `2`, `500`, `1e6`.
fn round_label(v: f64) -> String {
    if v.abs() >= 1e5 {
        format!("{v:e}")
    } else {
        let r = format!("{:.6}", v);
        let r = r.trim_end_matches('0').trim_end_matches('.');
        if r == "-0" {
            "0".to_string()
        } else {
            r.to_string()
        }
    }
}

/// Log time at sample `s`: the time of the bucket holding it plus the steps
/// since its first sample.
fn time_at(buckets: &[Bucket], s: u64, period: Option<f64>) -> Option<f64> {
    let i = buckets.partition_point(|b| b.start <= s).checked_sub(1)?;
    let b = &buckets[i];
    Some(b.t? + (s - b.start) as f64 * period.unwrap_or(0.0))
}

/// Bars of the largest mean contributions after a flag rose.
fn contrib_chart(
    o: &mut String,
    c: &Collected<'_>,
    li: usize,
    fi: usize,
    f: &Flag,
    fc: &FlagContrib,
) {
    const SHOW: usize = 10;
    const W: f64 = 560.0;
    const LX: f64 = 218.0;
    const BW: f64 = 270.0;
    const ROW: f64 = 19.0;
    const TOP: f64 = 8.0;
    let named: Vec<String> = c.logs[li]
        .truth
        .as_ref()
        .map(|t| t.features.clone())
        .unwrap_or_default();
    let mut order: Vec<usize> = (0..fc.mean.len()).collect();
    order.sort_by(|a, b| fc.mean[*b].total_cmp(&fc.mean[*a]));
    order.truncate(SHOW);
    let nominal = c.nominal_r2.as_ref();
    let vmax = order
        .iter()
        .map(|&i| fc.mean[i].max(nominal.map_or(0.0, |n| n[i])))
        .fold(0.0f64, f64::max)
        .max(1e-12);
    let (ticks, step) = nice_ticks(0.0, vmax, 4);
    let top_tick = ticks.last().copied().unwrap_or(vmax);
    let xmax = if top_tick < vmax {
        top_tick + step
    } else {
        top_tick
    };
    let xs = Scale::new(0.0, xmax, LX, LX + BW);
    let h = TOP + ROW * order.len() as f64 + 30.0;
    let _ = write!(
        o,
        "<figure><svg class=\"contrib\" data-log=\"{li}\" data-flag=\"{}\" viewBox=\"0 0 {} {}\" role=\"img\" \
         aria-label=\"feature contributions of flag {}\">",
        fi + 1,
        pt(W),
        pt(h),
        fi + 1
    );
    let bottom = TOP + ROW * order.len() as f64;
    let (ticks, _) = nice_ticks(0.0, xmax, 4);
    for &v in &ticks {
        let x = xs.at(v);
        line(o, x, TOP - 2.0, x, bottom, "grid");
        text(o, x, bottom + 13.0, "s", "middle", &tick(v, step));
    }
    text(
        o,
        LX + BW / 2.0,
        bottom + 26.0,
        "s",
        "middle",
        "mean r² (standardised units²)",
    );
    for (row, &i) in order.iter().enumerate() {
        let y = TOP + ROW * row as f64;
        let is_named = named.iter().any(|n| *n == feature_name(c, i));
        let cls = if is_named { "bar named" } else { "bar" };
        let w = xs.at(fc.mean[i]) - LX;
        rect(o, LX, y + 3.0, w.max(0.5), ROW - 6.0, cls);
        text(
            o,
            LX - 6.0,
            y + ROW / 2.0 + 4.0,
            "",
            "end",
            &esc(&feature_label(c, i)),
        );
        let mut end = LX + w;
        if let Some(nom) = nominal {
            let x = xs.at(nom[i]);
            line(o, x, y + 1.0, x, y + ROW - 1.0, "nom");
            end = end.max(x + 1.0);
        }
        text(
            o,
            end + 5.0,
            y + ROW / 2.0 + 4.0,
            "s",
            "start",
            &sig(fc.mean[i]),
        );
    }
    line(o, LX, TOP - 2.0, LX, bottom, "frame");
    o.push_str("</svg>\n");
    let _ = writeln!(
        o,
        "<figcaption><b>Flag {}</b> raised at sample {} by {}{}{} · mean over {} sample{}</figcaption></figure>",
        fi + 1,
        at(f.raised_at, f.raised_t),
        driver_chips(f),
        charts_note(f),
        resid_note(c, li, fi),
        fc.samples,
        if fc.samples == 1 { "" } else { "s" }
    );
}

fn latent_section(o: &mut String, c: &Collected<'_>) {
    let m = &c.file.model;
    let mm = m.eigenvalues.len();
    let k = m.weights.len();
    let _ = write!(
        o,
        "<section id=\"latent\">\n<h2>Latent plane (t1, t2)</h2>\n<p class=\"muted\">The first two \
         latent scores <i>t</i> = Pᵀ<i>z</i> of up to {} training rows and {} field rows (uniform \
         random samples, seeded), with each mixture component's 1σ (solid) and 2σ (dashed) ellipse \
         in this plane: centre ν<sub>c</sub>, half-axes √v<sub>c1</sub> and √v<sub>c2</sub> \
         (diagonal variances, so the ellipses are axis-aligned). Field rows are coloured by the \
         detector's state at that sample. The two axes have their own scales.</p>\n",
        count(LATENT_TRAIN_POINTS as u64),
        count(LATENT_FIELD_POINTS as u64)
    );
    if mm < 2 {
        o.push_str(
            "<p>The model keeps one component: there is no plane to draw.</p>\n</section>\n",
        );
        return;
    }
    const W: f64 = 900.0;
    const H: f64 = 560.0;
    const L: f64 = 62.0;
    const R: f64 = 700.0;
    const T: f64 = 14.0;
    const B: f64 = 510.0;

    // Range: training rows and 2σ ellipses, widened for field rows by at
    // most half the base span on each side.
    let mut bx = Span::EMPTY;
    let mut by = Span::EMPTY;
    for p in &c.train_points {
        bx.add(p.t1);
        by.add(p.t2);
    }
    for j in 0..k {
        let (cx, cy) = (m.mix_means[j * mm], m.mix_means[j * mm + 1]);
        let (rx, ry) = (
            2.0 * m.mix_variances[j * mm].sqrt(),
            2.0 * m.mix_variances[j * mm + 1].sqrt(),
        );
        bx.add(cx - rx);
        bx.add(cx + rx);
        by.add(cy - ry);
        by.add(cy + ry);
    }
    let mut fx = bx;
    let mut fy = by;
    for p in &c.field_points {
        fx.add(p.t1);
        fy.add(p.t2);
    }
    let widen = |base: Span, all: Span| -> (f64, f64) {
        let (b0, b1) = (f64::from(base.lo), f64::from(base.hi));
        let span = (b1 - b0).max(1e-6);
        let lo = f64::from(all.lo).max(b0 - 0.5 * span);
        let hi = f64::from(all.hi).min(b1 + 0.5 * span);
        let pad = 0.03 * (hi - lo);
        (lo - pad, hi + pad)
    };
    let (x0, x1) = widen(bx, fx);
    let (y0, y1) = widen(by, fy);
    let xs = Scale::new(x0, x1, L, R);
    let ys = Scale::new(y0, y1, B, T);
    let inside = |p: &LatentPoint| {
        let (x, y) = (f64::from(p.t1), f64::from(p.t2));
        x >= x0 && x <= x1 && y >= y0 && y <= y1
    };
    let outside = c.field_points.iter().filter(|p| !inside(p)).count();

    let _ = write!(
        o,
        "<svg class=\"latent\" viewBox=\"0 0 {} {}\" role=\"img\" aria-label=\"latent plane\">",
        pt(W),
        pt(H)
    );
    let (xt, xstep) = nice_ticks(x0, x1, 8);
    let (yt, ystep) = nice_ticks(y0, y1, 7);
    for &v in &xt {
        let x = xs.at(v);
        line(o, x, T, x, B, "grid");
        text(o, x, B + 15.0, "", "middle", &tick(v, xstep));
    }
    for &v in &yt {
        let y = ys.at(v);
        line(o, L, y, R, y, "grid");
        text(o, L - 6.0, y + 4.0, "", "end", &tick(v, ystep));
    }
    let total = total_variance(c);
    text(
        o,
        (L + R) / 2.0,
        B + 34.0,
        "t",
        "middle",
        &format!(
            "t1 ({} % of the variance)",
            sig(100.0 * f64::from(m.eigenvalues[0]) / total)
        ),
    );
    vtext(
        o,
        16.0,
        (T + B) / 2.0,
        "t",
        &format!(
            "t2 ({} % of the variance)",
            sig(100.0 * f64::from(m.eigenvalues[1]) / total)
        ),
    );
    let _ = write!(
        o,
        "<clipPath id=\"latent-clip\"><rect x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\"/></clipPath><g clip-path=\"url(#latent-clip)\">",
        pt(L),
        pt(T),
        pt(R - L),
        pt(B - T)
    );
    for (class, want) in [
        ("pt-train", PointClass::Train),
        ("pt-watch", PointClass::Watching),
        ("pt-drift", PointClass::Drifting),
    ] {
        let src = if want == PointClass::Train {
            &c.train_points
        } else {
            &c.field_points
        };
        let mut d = String::new();
        for p in src.iter().filter(|p| p.class == want && inside(p)) {
            let _ = write!(
                d,
                "M{} {}h0",
                pt(xs.at(f64::from(p.t1))),
                pt(ys.at(f64::from(p.t2)))
            );
        }
        if !d.is_empty() {
            let _ = write!(o, r#"<path class="{class}" d="{d}"/>"#);
        }
    }
    for j in 0..k {
        let (cx, cy) = (
            f64::from(m.mix_means[j * mm]),
            f64::from(m.mix_means[j * mm + 1]),
        );
        let (sx, sy) = (
            f64::from(m.mix_variances[j * mm]).sqrt(),
            f64::from(m.mix_variances[j * mm + 1]).sqrt(),
        );
        let px = xs.at(cx);
        let py = ys.at(cy);
        let kx = (xs.p1 - xs.p0) / (xs.d1 - xs.d0);
        let ky = (ys.p0 - ys.p1) / (ys.d1 - ys.d0);
        for (mult, class) in [(1.0, "e1"), (2.0, "e2")] {
            let _ = write!(
                o,
                r#"<ellipse class="{class}" data-component="{}" cx="{}" cy="{}" rx="{}" ry="{}"/>"#,
                j + 1,
                pt(px),
                pt(py),
                pt(mult * sx * kx),
                pt(mult * sy * ky)
            );
        }
        text(o, px, py + 4.0, "t lbl", "middle", &format!("c{}", j + 1));
    }
    o.push_str("</g>");
    rect(o, L, T, R - L, B - T, "frame");

    // Legend.
    let lx = R + 22.0;
    let mut y = T + 14.0;
    let drifting = c
        .field_points
        .iter()
        .filter(|p| p.class == PointClass::Drifting)
        .count();
    let watching = c.field_points.len() - drifting;
    for (class, label) in [
        (
            "pt-train",
            format!("training rows ({})", count(c.train_points.len() as u64)),
        ),
        (
            "pt-watch",
            format!("field, no flag up ({})", count(watching as u64)),
        ),
        (
            "pt-drift",
            format!("field, flag up ({})", count(drifting as u64)),
        ),
    ] {
        let _ = write!(
            o,
            r#"<path class="{class}" d="M{} {}h0"/>"#,
            pt(lx + 5.0),
            pt(y - 4.0)
        );
        text(o, lx + 16.0, y, "", "start", &label);
        y += 20.0;
    }
    line(o, lx - 2.0, y - 4.0, lx + 12.0, y - 4.0, "e1");
    text(o, lx + 16.0, y, "", "start", "component, 1σ");
    y += 20.0;
    line(o, lx - 2.0, y - 4.0, lx + 12.0, y - 4.0, "e2");
    text(o, lx + 16.0, y, "", "start", "component, 2σ");
    y += 28.0;
    text(o, lx, y, "t", "start", "mixture weights");
    y += 18.0;
    for j in 0..k {
        text(
            o,
            lx,
            y,
            "",
            "start",
            &format!("c{}: {}", j + 1, sig(f64::from(m.weights[j]))),
        );
        y += 16.0;
    }
    if c.train_points.is_empty() {
        y += 10.0;
        text(o, lx, y, "s", "start", "no --train logs given");
    }
    o.push_str("</svg>\n");
    if outside > 0 {
        let _ = writeln!(
            o,
            "<p class=\"muted\">{} of the {} sampled field rows lie outside the drawn area.</p>",
            count(outside as u64),
            count(c.field_points.len() as u64)
        );
    }
    o.push_str("</section>\n");
}

/// Total variance of the standardised training data: `d · n/(n − 1)`, since
/// each feature has unit variance at ddof = 0 and the eigenvalues are on the
/// ddof = 1 scale.
fn total_variance(c: &Collected<'_>) -> f64 {
    let m = &c.file.model;
    let d = m.mean.len() as f64;
    let n = m.meta.train_rows as f64;
    if n > 1.0 {
        d * n / (n - 1.0)
    } else {
        d
    }
}

fn variance_section(o: &mut String, c: &Collected<'_>) {
    let m = &c.file.model;
    let total = total_variance(c);
    let ratios: Vec<f64> = m
        .eigenvalues
        .iter()
        .map(|l| f64::from(*l) / total)
        .collect();
    let kept: f64 = ratios.iter().sum();
    let residual = (1.0 - kept).max(0.0);
    let theta_share = f64::from(m.theta[0]) / total;
    let _ = write!(
        o,
        "<section id=\"variance\">\n<h2>Explained variance</h2>\n<p class=\"muted\">Share of the \
         total variance of the standardised training data held by each kept component: \
         λ<sub>j</sub> / (<i>d</i> · <i>n</i>/(<i>n</i> − 1)), with <i>d</i> = {} features and \
         <i>n</i> = {} training rows (each feature has unit variance with the ddof = 0 scale; \
         the eigenvalues are on the ddof = 1 scale), so the total is {}. The residual bar is \
         1 − Σ kept = {} %; the model's θ1 (sum of the discarded eigenvalues) gives {} %. The \
         line is the cumulative share.</p>\n",
        m.mean.len(),
        count(m.meta.train_rows),
        sig(total),
        sig(100.0 * residual),
        sig(100.0 * theta_share)
    );
    const W: f64 = 900.0;
    const H: f64 = 300.0;
    const L: f64 = 56.0;
    const T: f64 = 16.0;
    const B: f64 = 250.0;
    let bars = ratios.len() + 1;
    let slot = ((W - L - 20.0) / bars as f64).min(90.0);
    let ys = Scale::new(0.0, 100.0, B, T);
    let _ = write!(
        o,
        "<svg class=\"variance\" viewBox=\"0 0 {} {}\" role=\"img\" aria-label=\"explained variance\">",
        pt(W),
        pt(H)
    );
    for v in [0.0, 20.0, 40.0, 60.0, 80.0, 100.0] {
        let y = ys.at(v);
        line(o, L, y, L + slot * bars as f64, y, "grid");
        text(o, L - 6.0, y + 4.0, "", "end", &format!("{v:.0} %"));
    }
    let mut cum = 0.0;
    let mut cum_pts = String::new();
    for (j, r) in ratios.iter().chain(std::iter::once(&residual)).enumerate() {
        let is_res = j == ratios.len();
        let x = L + slot * j as f64;
        let y = ys.at(100.0 * r);
        rect(
            o,
            x + slot * 0.18,
            y,
            slot * 0.64,
            B - y,
            if is_res { "ev res" } else { "ev" },
        );
        if B - y > 26.0 {
            text(
                o,
                x + slot / 2.0,
                y + 15.0,
                "s in",
                "middle",
                &format!("{} %", sig(100.0 * r)),
            );
        } else {
            text(
                o,
                x + slot / 2.0,
                y - 5.0,
                "s lbl",
                "middle",
                &format!("{} %", sig(100.0 * r)),
            );
        }
        text(
            o,
            x + slot / 2.0,
            B + 15.0,
            "",
            "middle",
            &if is_res {
                "residual".to_string()
            } else {
                format!("PC{}", j + 1)
            },
        );
        if !is_res {
            cum += r;
            let cy = ys.at(100.0 * cum);
            let sep = if cum_pts.is_empty() { "M" } else { "L" };
            let _ = write!(cum_pts, "{sep}{} {}", pt(x + slot / 2.0), pt(cy));
            let _ = write!(
                o,
                r#"<circle class="cum-d" cx="{}" cy="{}" r="3"/>"#,
                pt(x + slot / 2.0),
                pt(cy)
            );
        }
    }
    let _ = write!(o, r#"<path class="cum" d="{cum_pts}"/>"#);
    let lx = L + slot * bars as f64 + 10.0;
    if lx < W - 120.0 {
        text(o, lx, T + 12.0, "", "start", "bars: share per component");
        text(o, lx, T + 28.0, "", "start", "line: cumulative share");
        text(
            o,
            lx,
            T + 44.0,
            "",
            "start",
            &format!("kept: {} %", sig(100.0 * kept)),
        );
    }
    rect(o, L, T, slot * bars as f64, B - T, "frame");
    text(
        o,
        L + slot * bars as f64 / 2.0,
        B + 36.0,
        "t",
        "middle",
        "component (eigenvalues of the standardised training data)",
    );
    o.push_str("</svg>\n</section>\n");
}

fn flag_table(o: &mut String, c: &Collected<'_>) {
    o.push_str("<section id=\"flags\">\n<h2>Flags</h2>\n");
    let total: usize = c.reps.iter().map(|r| r.flags.len()).sum();
    if total == 0 {
        o.push_str("<p>No drift flag was raised.</p>\n</section>\n");
        return;
    }
    o.push_str(
        "<div class=\"scroll\"><table><thead><tr><th>log</th><th class=\"n\">flag</th><th>raised at sample</th>\
         <th>cleared at sample</th><th class=\"n\">samples up</th><th>drivers</th>\
         <th>top residuals at the raise (r²)</th><th>top mean contributions</th>\
         <th class=\"n\">after onset</th></tr></thead><tbody>\n",
    );
    for (li, rep) in c.reps.iter().enumerate() {
        let data = &c.logs[li];
        for (fi, f) in rep.flags.iter().enumerate() {
            let cleared = match f.cleared_at {
                Some(x) => at(x, f.cleared_t),
                None => "<span class=\"muted\">still up at the end</span>".to_string(),
            };
            let up = f.cleared_at.unwrap_or(rep.samples) - f.raised_at;
            let top = f
                .top_features
                .iter()
                .map(|t| format!("{} {}", esc(&t.name), sig(f64::from(t.value))))
                .collect::<Vec<_>>()
                .join(", ");
            let mean_top = data
                .contribs
                .get(fi)
                .filter(|fc| fc.samples > 0)
                .map(|fc| {
                    let mut order: Vec<usize> = (0..fc.mean.len()).collect();
                    order.sort_by(|a, b| fc.mean[*b].total_cmp(&fc.mean[*a]));
                    order
                        .iter()
                        .take(3)
                        .map(|&i| format!("{} {}", esc(&feature_name(c, i)), sig(fc.mean[i])))
                        .collect::<Vec<_>>()
                        .join(", ")
                })
                .unwrap_or_else(|| "–".to_string());
            let after = data
                .truth
                .as_ref()
                .map(|t| (f.raised_at as i64 - t.onset_row as i64).to_string())
                .unwrap_or_else(|| "–".to_string());
            let _ = writeln!(
                o,
                "<tr>{}<td class=\"n\">{}</td><td class=\"nw\">{}</td><td class=\"nw\">{}</td>\
                 <td class=\"n\">{}</td><td>{}{}</td><td>{}</td><td>{}</td><td class=\"n\">{}</td></tr>",
                log_cell(c, li),
                fi + 1,
                at(f.raised_at, f.raised_t),
                cleared,
                count(up),
                driver_chips(f),
                resid_note(c, li, fi),
                top,
                mean_top,
                after
            );
        }
    }
    o.push_str(
        "</tbody></table></div>\n<p class=\"muted\">“After onset” is the raise sample minus the \
         ground-truth onset sample; a negative value is a flag before the known change.</p>\n</section>\n",
    );
}

fn fault_table(o: &mut String, c: &Collected<'_>) {
    o.push_str("<section id=\"faults\">\n<h2>Faulted samples</h2>\n");
    if c.reps.iter().all(|r| r.faults == 0) {
        o.push_str("<p>No faulted sample in any log.</p>\n</section>\n");
        return;
    }
    o.push_str(
        "<p class=\"muted\">A faulted sample is never scored and never reaches a statistic.</p>\n\
         <div class=\"scroll\"><table><thead><tr><th>log</th><th class=\"n\">faulted</th><th class=\"n\">non-finite</th>\
         <th class=\"n\">out of range</th><th class=\"n\">wrong length</th><th class=\"n\">overflow</th>\
         <th class=\"n\">first at sample</th><th class=\"n\">last at sample</th></tr></thead><tbody>\n",
    );
    for (li, rep) in c.reps.iter().enumerate() {
        if rep.faults == 0 {
            continue;
        }
        let data = &c.logs[li];
        let fk = &rep.fault_kinds;
        let at_opt = |v: Option<u64>| v.map(count).unwrap_or_else(|| "–".to_string());
        let _ = writeln!(
            o,
            "<tr>{}<td class=\"n\">{}</td><td class=\"n\">{}</td>\
             <td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td>\
             <td class=\"n\">{}</td></tr>",
            log_cell(c, li),
            count(rep.faults),
            count(fk.non_finite),
            count(fk.out_of_range),
            count(fk.wrong_length),
            count(fk.overflow),
            at_opt(data.first_fault),
            at_opt(data.last_fault)
        );
    }
    o.push_str("</tbody></table></div>\n</section>\n");
}

fn notes(o: &mut String, c: &Collected<'_>) {
    let lim = limits(c);
    let _ = write!(
        o,
        "<section id=\"notes\">\n<h2>How this report was made</h2>\n<ul>\n\
         <li>Every log ran through the firmware detector (the same code the boards run, built for \
         this computer), each from a fresh start with warm-up; flags, drivers and faults are the \
         detector's own.</li>\n\
         <li>Per sample: <i>z</i> = (<i>x</i> − μ)/<i>s</i>, <i>t</i> = Pᵀ<i>z</i>, \
         <i>r</i> = <i>z</i> − P<i>t</i>; SPE = Σ<i>r<sub>i</sub></i>², T² = Σ<i>t<sub>j</sub></i>²/λ<sub>j</sub>, \
         NLL = −log of the mixture density of <i>t</i>. The charts follow <i>u</i>; its centre and \
         spread per score: SPE {} / {}, T² {} / {}, NLL {} / {} (NLL floor {}).</li>\n\
         <li>Timelines: one drawn column per pixel; each column shows the smallest and largest \
         per-sample <i>u</i>, EWMA and CUSUM of the samples it covers. Marks along the top of a \
         panel are columns whose per-sample <i>u</i> goes above the drawn scale.</li>\n\
         <li>{}</li>\n{}\
         <li>Contributions: <i>r<sub>i</sub></i>² recomputed from the model in double precision; \
         their sum is the SPE the detector reported, to rounding.</li>\n\
         <li>Latent plane: reservoir samples (fixed seed), so the same inputs give the same picture.</li>\n\
         </ul>\n</section>\n",
        sig(f64::from(lim[0].center)),
        sig(f64::from(lim[0].spread)),
        sig(f64::from(lim[1].center)),
        sig(f64::from(lim[1].spread)),
        sig(f64::from(lim[2].center)),
        sig(f64::from(lim[2].spread)),
        sig(f64::from(c.nll_floor)),
        resid_sentence(c),
        slow_sentence(c),
    );
}

/// The notes' sentence on the residual chart.
fn resid_sentence(c: &Collected<'_>) -> String {
    let m = &c.file.model;
    let on = m.resid_gain.iter().filter(|g| **g != 0.0).count();
    if on == 0 {
        return format!("{RESID_NAME}: off in this model (every feature's gain is 0).");
    }
    format!(
        "{RESID_NAME}: the detector's own per-feature EWMAs; each panel column shows the smallest \
         and largest of their peak |EWMA| over its samples. On for {on} of {} features, limit \
         <i>L</i> = {}. A flag's feature is the one whose EWMA was the largest in absolute value \
         at the sample that raised it, named only when that EWMA was beyond <i>L</i>.",
        m.resid_gain.len(),
        sig(f64::from(m.resid_limit))
    )
}

/// The notes' item on the slow charts (empty without them).
fn slow_sentence(c: &Collected<'_>) -> String {
    if !slow_on(c) {
        return String::new();
    }
    format!(
        "<li>{SLOW_NAME}: the detector's own {} slower EWMAs (their constants are listed under \
         “Reading the timelines”); each panel column shows the smallest and largest of their peak \
         |EWMA| over its samples, \
         against their limit <i>L<sub>s</sub></i> = {}. A flag's feature is named as for the \
         residual chart.</li>\n",
        slow_charts(c).count(),
        sig(f64::from(c.file.model.slow_limit))
    )
}
