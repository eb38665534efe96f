//! The review page: one self-contained HTML file a reviewer opens — the verdict, the design
//! at a glance, per response its plots, figures and poles and zeros, the limits, the
//! tolerance results, the safety caution where it applies, and where it all came from.
//!
//! The page has inline SVG and CSS only: no script, no request to any network or file outside
//! itself. Every piece of user text (titles, part, node, response and limit names) is
//! escaped. The page is a sequence of sheets (`section.sheet`), each made to fit one printed
//! page of A4 or Letter; a sheet starts a new page and no plot is split across pages.
//!
//! Each figure the page shows carries `data-json="PATH"`, the dotted path of the same value
//! in the figures JSON written beside the page, so a test can compare the two.

pub mod plots;

use crate::bode::escape;
use crate::metrics::{Figures, Limit, LimitResult};
use crate::network::Network;
use crate::response::Analysis;
use crate::sensitivity::FigureSensitivity;
use crate::spread::SpreadSummary;
use crate::sweep::Grid;
use crate::units::format_eng;
use std::fmt::Write;

/// The safety caution for mains-connected, high-voltage or medical designs.
pub const CAUTION: &str = "This design names a mains-connected, high-voltage or medical use. \
A frequency-response simulation is no substitute for safety testing of the built unit; \
local codes, the applicable safety standards and licensed practice decide.";

/// Parts listed on the first sheet; the rest go on parts sheets of [`PARTS_PER_SHEET`].
const PARTS_FIRST: usize = 24;
/// Parts per continuation sheet.
const PARTS_PER_SHEET: usize = 44;
/// Parts listed at most (a generated network of thousands of sections lists its first ones).
const PARTS_SHOWN: usize = 400;

/// A plot of one response, with a caption.
#[derive(Clone, Debug)]
pub struct Plot {
    /// What it shows.
    pub caption: String,
    /// The SVG document.
    pub svg: String,
}

/// The tolerance part of a review.
#[derive(Clone, Debug)]
pub enum Tolerances {
    /// The design gives no tolerances.
    None,
    /// Not computed, and why.
    NotComputed(String),
    /// A tolerance study and the sensitivities.
    Computed(Box<ToleranceResults>),
}

/// What the tolerance study found.
#[derive(Clone, Debug)]
pub struct ToleranceResults {
    /// Yields and the spread of each figure.
    pub summary: SpreadSummary,
    /// Envelope plots.
    pub envelopes: Vec<Plot>,
    /// Names of the varied values, in the order of the sensitivities.
    pub values: Vec<String>,
    /// Per response: its name and its figures' sensitivities.
    pub sensitivities: Vec<(String, Vec<FigureSensitivity>)>,
}

/// Where the page came from.
#[derive(Clone, Debug, Default)]
pub struct Provenance {
    /// Tool name and version.
    pub tool: String,
    /// The design file as given.
    pub design_path: String,
    /// SHA-256 of the design file's bytes, hex.
    pub design_sha256: String,
    /// The command line, as run.
    pub command: String,
    /// Date and time of the run (RFC 3339, UTC).
    pub generated: String,
    /// Files written beside the page.
    pub files: Vec<String>,
}

/// Everything the page shows.
#[derive(Clone, Debug)]
pub struct ReviewInput<'a> {
    /// The analysis (network, responses).
    pub analysis: &'a Analysis,
    /// The sweep.
    pub grid: &'a Grid,
    /// Each response's figures.
    pub figures: &'a [Figures],
    /// Each limit's outcome.
    pub checks: &'a [LimitResult],
    /// The design's limits (for those not checked, e.g. on responses left out).
    pub limits: &'a [Limit],
    /// Whether the safety caution applies.
    pub caution: bool,
    /// Per response (in order): its plots (Bode first).
    pub plots: &'a [Vec<Plot>],
    /// Overlay plots of several responses.
    pub overlays: &'a [Plot],
    /// Charts of the ports analysis (Smith chart), with a short table, where the design has
    /// ports: (caption lines, plots).
    pub ports: PortsSection,
    /// The tolerance results.
    pub tolerances: &'a Tolerances,
    /// Provenance.
    pub provenance: &'a Provenance,
}

const STYLE: &str = r#"
:root { --ink: #1f2a36; --mute: #5b6672; --rule: #d5dbe1; --pass: #1d6b3a; --fail: #a4243b; }
* { box-sizing: border-box; }
body { font-family: "DejaVu Sans", Helvetica, Arial, sans-serif; color: var(--ink); margin: 0;
  background: #f4f6f8; font-size: 14px; line-height: 1.45; }
main { max-width: 940px; margin: 0 auto; padding: 12px; }
section.sheet { background: #fff; border: 1px solid var(--rule); border-radius: 4px;
  padding: 18px 22px; margin: 14px 0; }
h1 { font-size: 22px; margin: 0 0 6px; }
h2 { font-size: 18px; margin: 0 0 10px; border-bottom: 1px solid var(--rule); padding-bottom: 4px; }
h3 { font-size: 15px; margin: 14px 0 6px; }
.verdict { font-size: 16px; font-weight: bold; padding: 6px 10px; border-radius: 3px; display: inline-block; }
.verdict.pass { color: var(--pass); border: 2px solid var(--pass); }
.verdict.fail { color: var(--fail); border: 2px solid var(--fail); }
.verdict.none { color: var(--mute); border: 2px solid var(--rule); }
.caution { border: 2px solid #b35c00; background: #fff6ec; padding: 10px 14px; margin: 12px 0; }
.note { color: var(--mute); }
table { border-collapse: collapse; margin: 6px 0 10px; font-size: 13px; }
th, td { text-align: left; padding: 3px 10px 3px 0; border-bottom: 1px solid var(--rule); vertical-align: top; }
th { font-weight: bold; }
td.num { font-variant-numeric: tabular-nums; white-space: nowrap; }
td { overflow-wrap: anywhere; }
td.pass { color: var(--pass); font-weight: bold; }
td.fail { color: var(--fail); font-weight: bold; }
figure { margin: 8px 0; break-inside: avoid; page-break-inside: avoid; }
figure svg { width: 100%; height: auto; display: block; }
figcaption { color: var(--mute); font-size: 12px; }
code { font-size: 12px; word-break: break-all; }
@media print {
  @page { margin: 12mm; }
  body { background: #fff; font-size: 11px; }
  main { max-width: none; padding: 0; }
  section.sheet { border: none; padding: 0; margin: 0; break-before: page; page-break-before: always; }
  section.sheet:first-child { break-before: auto; page-break-before: auto; }
  table { font-size: 10px; }
  figure svg { max-height: 150mm; }
  figure.small svg { max-height: 110mm; }
}
"#;

fn hz(f: f64) -> String {
    format_eng(f, 5, "Hz").replace('-', "−")
}

fn db(v: f64) -> String {
    if v.is_finite() {
        let v = if v.abs() < 0.005 { 0.0 } else { v };
        format!("{v:.2} dB").replace('-', "−")
    } else {
        format!("{v} dB").replace("inf", "∞").replace('-', "−")
    }
}

/// A plain number (a Q, a value in rad/s) to `digits` significant digits: fixed point from
/// 0.001 to 10⁶, scientific beyond; never an SI prefix standing alone as if it were a unit.
fn sig(v: f64, digits: usize) -> String {
    let a = v.abs();
    let s = if v == 0.0 {
        "0".to_string()
    } else if !v.is_finite() {
        return if v > 0.0 {
            "∞".into()
        } else {
            "−∞".into()
        };
    } else if (1e-3..1e6).contains(&a) {
        let decimals = (digits as i32 - 1 - a.log10().floor() as i32).max(0) as usize;
        format!("{v:.decimals$}")
    } else {
        format!("{:.*e}", digits.saturating_sub(1), v)
    };
    s.replace('-', "−")
}

fn num(v: f64, digits: usize, unit: &str) -> String {
    format_eng(v, digits, unit).replace('-', "−")
}

/// A row of a figures table whose value cell carries its JSON path.
fn row(out: &mut String, label: &str, value: &str, path: Option<&str>) {
    // Figures keep their number and unit on one line; text rows wrap.
    let attr = path.map_or(String::new(), |p| {
        format!(r#" class="num" data-json="{}""#, escape(p))
    });
    let _ = writeln!(
        out,
        r#"<tr><th>{}</th><td{attr}>{}</td></tr>"#,
        escape(label),
        escape(value)
    );
}

fn figure(out: &mut String, plot: &Plot, class: &str) {
    let _ = writeln!(
        out,
        "<figure class=\"{class}\">{}<figcaption>{}</figcaption></figure>",
        inline_svg(&plot.svg),
        escape(&plot.caption)
    );
}

/// An SVG document made fit to inline in HTML: no XML declaration or doctype, and no
/// namespace attribute (HTML puts `<svg>` in its namespace itself), so the page carries no
/// URL at all.
fn inline_svg(svg: &str) -> String {
    let body = svg.find("<svg").map_or(svg, |i| &svg[i..]);
    body.replacen(r#" xmlns="http://www.w3.org/2000/svg""#, "", 1)
}

/// The figures of one response as a table (the values of the JSON's `responses.R`).
fn figures_table(out: &mut String, f: &Figures, r: usize) {
    let p = |k: &str| format!("responses.{r}.{k}");
    let unit = f.unit;
    out.push_str("<table class=\"figures\">\n");
    row(out, "class", f.class, None);
    if let (Some(reference), Some(level)) = (&f.reference, f.level_db) {
        row(
            out,
            "reference",
            &format!("{} ({})", db(reference.db), reference.why),
            Some(&p("reference.db")),
        );
        row(
            out,
            "level",
            &format!("{} below the reference", db(reference.db - level)),
            None,
        );
    }
    if let Some(v) = f.dc_db {
        row(out, "at DC", &db(v), Some(&p("dc_db")));
    }
    if let Some(v) = f.lower_cutoff_hz {
        row(out, "lower cut-off", &hz(v), Some(&p("lower_cutoff_hz")));
    }
    if let Some(v) = f.upper_cutoff_hz {
        row(out, "upper cut-off", &hz(v), Some(&p("upper_cutoff_hz")));
    }
    if let Some(v) = f.bandwidth_hz {
        row(out, "bandwidth", &hz(v), Some(&p("bandwidth_hz")));
    }
    if let Some(v) = f.centre_hz {
        row(out, "centre", &hz(v), Some(&p("centre_hz")));
    }
    if let Some(v) = f.q {
        row(out, "Q", &sig(v, 5), Some(&p("q")));
    }
    for (k, c) in f.crossings.iter().enumerate() {
        row(
            out,
            &format!(
                "crossing {} ({})",
                k + 1,
                if c.rising { "rising" } else { "falling" }
            ),
            &hz(c.freq_hz),
            Some(&p(&format!("crossings.{k}.freq_hz"))),
        );
    }
    for (k, e) in f.peaks.iter().enumerate() {
        row(
            out,
            &format!("peak {}", k + 1),
            &hz(e.freq_hz),
            Some(&p(&format!("peaks.{k}.freq_hz"))),
        );
        row(
            out,
            &format!("peak {} level", k + 1),
            &db(e.magnitude_db),
            Some(&p(&format!("peaks.{k}.magnitude_db"))),
        );
    }
    for (k, e) in f.notches.iter().enumerate() {
        row(
            out,
            &format!("notch {}", k + 1),
            &hz(e.freq_hz),
            Some(&p(&format!("notches.{k}.freq_hz"))),
        );
    }
    for (k, res) in f.resonances.iter().enumerate() {
        row(
            out,
            &format!("{} resonance", res.kind),
            &hz(res.freq_hz),
            Some(&p(&format!("resonances.{k}.freq_hz"))),
        );
        row(
            out,
            &format!("{} resonance |value|", res.kind),
            &num(res.magnitude, 5, unit),
            Some(&p(&format!("resonances.{k}.magnitude"))),
        );
        row(
            out,
            &format!("{} resonance Q ({})", res.kind, res.q_definition),
            &sig(res.q, 5),
            Some(&p(&format!("resonances.{k}.q"))),
        );
    }
    if let (Some(d), Some(at)) = (f.group_delay_s, f.group_delay_hz) {
        row(
            out,
            "group delay",
            &num(d, 5, "s"),
            Some(&p("group_delay_s")),
        );
        row(out, "group delay at", &hz(at), Some(&p("group_delay_hz")));
    }
    if let Some(m) = &f.margins {
        match (m.gain_crossover_hz, m.phase_margin_deg) {
            (Some(fc), Some(pm)) => {
                row(
                    out,
                    "gain crossover",
                    &hz(fc),
                    Some(&p("margins.gain_crossover_hz")),
                );
                row(
                    out,
                    "phase margin",
                    &format!("{pm:.2}°").replace('-', "−"),
                    Some(&p("margins.phase_margin_deg")),
                );
            }
            _ => row(out, "phase margin", "no gain crossover in the sweep", None),
        }
        match (m.phase_crossover_hz, m.gain_margin_db) {
            (Some(fp), Some(gm)) => {
                row(
                    out,
                    "phase crossover",
                    &hz(fp),
                    Some(&p("margins.phase_crossover_hz")),
                );
                row(
                    out,
                    "gain margin",
                    &db(gm),
                    Some(&p("margins.gain_margin_db")),
                );
            }
            _ => row(out, "gain margin", "no phase crossover in the sweep", None),
        }
    }
    if let Some(n) = &f.noise {
        row(
            out,
            "integrated noise",
            &format!(
                "{} over {} … {}",
                num(n.rms, 5, "V"),
                hz(n.band_hz.0),
                hz(n.band_hz.1)
            ),
            None,
        );
        row(
            out,
            "noise (rms)",
            &num(n.rms, 5, "V"),
            Some(&p("noise.rms")),
        );
        row(
            out,
            "spot density",
            &format!("{}/√Hz at {}", num(n.spot_density, 5, "V"), hz(n.spot_hz)),
            None,
        );
        let top: Vec<String> = n
            .contributors
            .iter()
            .take(5)
            .map(|(name, share)| format!("{name} {share:.1} %"))
            .collect();
        if !top.is_empty() {
            row(out, "largest contributors", &top.join(", "), None);
        }
    }
    out.push_str("</table>\n");
}

fn poles_table(out: &mut String, f: &Figures) {
    let rows = &f.poles.rows;
    if rows.is_empty() {
        if let Some(note) = &f.poles.note {
            let _ = writeln!(
                out,
                "<p class=\"note\">Poles and zeros: {}</p>",
                escape(note)
            );
        }
        return;
    }
    out.push_str("<h3>Poles and zeros</h3>\n<table class=\"poles\"><tr><th>kind</th><th>f0</th><th>Q</th><th>s (rad/s)</th></tr>\n");
    for r in rows.iter().take(24) {
        let s = if r.s_im == 0.0 {
            sig(r.s_re, 5)
        } else {
            format!("{} ± j{}", sig(r.s_re, 5), sig(r.s_im.abs(), 5))
        };
        let q = match r.q {
            _ if r.on_axis => "∞ (on the jω axis)".to_string(),
            Some(q) => sig(q, 4),
            None => "—".to_string(),
        };
        let _ = writeln!(
            out,
            "<tr><td>{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td></tr>",
            escape(r.what),
            hz(r.f0_hz),
            q,
            escape(&s)
        );
    }
    out.push_str("</table>\n");
    if rows.len() > 24 {
        let _ = writeln!(
            out,
            "<p class=\"note\">{} more in the poles CSV.</p>",
            rows.len() - 24
        );
    }
}

fn parts_rows(out: &mut String, net: &Network, range: std::ops::Range<usize>) {
    out.push_str("<table class=\"parts\"><tr><th>name</th><th>kind</th><th>value</th><th>tolerance</th><th>nodes</th></tr>\n");
    for p in &net.parts()[range] {
        let _ = writeln!(
            out,
            "<tr><td>{}</td><td>{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td>{}</td></tr>",
            escape(&p.name),
            escape(p.kind.word()),
            escape(&p.value_text(net)),
            escape(&p.tolerance_text()),
            escape(&p.nodes_text(net))
        );
    }
    out.push_str("</table>\n");
}

/// The one-line verdict over the magnitude limits and the limits on the ports' match.
fn verdict(checks: &[LimitResult], ports: &PortsSection) -> (&'static str, String) {
    let port_checks = ports.as_ref().map_or(&[][..], |p| p.limits.as_slice());
    let all: Vec<(&str, bool)> = checks
        .iter()
        .map(|c| (c.limit.name.as_str(), c.pass))
        .chain(port_checks.iter().map(|c| (c.limit.name.as_str(), c.pass)))
        .collect();
    if all.is_empty() {
        return ("none", "No limits given: nothing checked.".into());
    }
    let failed: Vec<&str> = all.iter().filter(|c| !c.1).map(|c| c.0).collect();
    if failed.is_empty() {
        (
            "pass",
            format!("Every limit passed ({} of {}).", all.len(), all.len()),
        )
    } else {
        (
            "fail",
            format!(
                "{} of {} limits failed: {}.",
                failed.len(),
                all.len(),
                failed.join(", ")
            ),
        )
    }
}

fn tolerance_sheets(out: &mut String, t: &Tolerances) {
    out.push_str("<section class=\"sheet\" id=\"tolerances\">\n<h2>Tolerances</h2>\n");
    match t {
        Tolerances::None => out.push_str(
            "<p class=\"note\">Not computed: the design gives no tolerances (a part's <code>tolerance</code>, or a <code>[tolerances]</code> table of defaults per kind).</p>\n",
        ),
        Tolerances::NotComputed(why) => {
            let _ = writeln!(out, "<p class=\"note\">Not computed: {}</p>", escape(why));
        }
        Tolerances::Computed(r) => {
            let s = &r.summary;
            let _ = writeln!(
                out,
                "<p>{} samples (seed {}), {} unsolved; varied: {}.</p>",
                s.samples,
                s.seed,
                s.unsolved,
                escape(&s.varied.join(", "))
            );
            if !s.limits.is_empty() {
                out.push_str("<h3>Yield</h3>\n<table class=\"yield\"><tr><th>limit</th><th>yield</th><th>95 % interval (Wilson)</th><th>nominal</th></tr>\n");
                for (k, y) in s.limits.iter().chain(s.overall.iter()).enumerate() {
                    let path = if k < s.limits.len() {
                        format!("limits.{k}.fraction")
                    } else {
                        "overall.fraction".into()
                    };
                    let _ = writeln!(
                        out,
                        "<tr><td>{}</td><td class=\"num\" data-spread=\"{}\">{:.2} %</td><td class=\"num\">{:.2} … {:.2} %</td><td>{}</td></tr>",
                        escape(&y.name),
                        escape(&path),
                        100.0 * y.fraction,
                        100.0 * y.wilson_low,
                        100.0 * y.wilson_high,
                        if y.nominal_pass { "passes" } else { "fails" }
                    );
                }
                out.push_str("</table>\n");
            }
            out.push_str("<h3>Spread of the figures</h3>\n<table class=\"spread\"><tr><th>figure</th><th>nominal</th><th>1 %</th><th>median</th><th>99 %</th><th>σ</th></tr>\n");
            for fs in &s.figures {
                let v = |x: Option<f64>| x.map_or("—".to_string(), |x| num(x, 5, &fs.unit));
                let _ = writeln!(
                    out,
                    "<tr><td>{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td></tr>",
                    escape(&fs.name),
                    escape(&v(fs.nominal)),
                    escape(&v(fs.p1)),
                    escape(&v(fs.p50)),
                    escape(&v(fs.p99)),
                    escape(&v(fs.std_dev))
                );
            }
            out.push_str("</table>\n</section>\n");
            for e in &r.envelopes {
                out.push_str("<section class=\"sheet\">\n<h2>Tolerance envelope</h2>\n");
                figure(out, e, "");
                out.push_str("</section>\n");
            }
            out.push_str("<section class=\"sheet\">\n<h2>What moves each figure most</h2>\n<p class=\"note\">Change of each figure per +1 % of each value (adjoint sensitivities), the three largest.</p>\n<table class=\"sens\"><tr><th>response</th><th>figure</th><th>value</th><th>largest effects per +1 %</th></tr>\n");
            let mut rows = 0;
            for (name, figs) in &r.sensitivities {
                for fsens in figs {
                    if rows >= 36 {
                        break;
                    }
                    rows += 1;
                    let top: Vec<String> = fsens
                        .ranked()
                        .into_iter()
                        .take(3)
                        .filter_map(|(i, s)| {
                            r.values
                                .get(i)
                                .map(|n| format!("{n} {s:+.4} {}", fsens.per.unit()))
                        })
                        .collect();
                    let _ = writeln!(
                        out,
                        "<tr><td>{}</td><td>{}</td><td class=\"num\">{}</td><td>{}</td></tr>",
                        escape(name),
                        escape(&fsens.figure),
                        escape(&sig(fsens.value, 5)),
                        escape(&top.join(", ").replace('-', "−"))
                    );
                }
            }
            out.push_str("</table>\n");
        }
    }
    out.push_str("</section>\n");
}

/// The review page.
pub fn page(input: &ReviewInput<'_>) -> String {
    let a = input.analysis;
    let net = a.network();
    let mut out = String::with_capacity(1 << 20);
    let _ = writeln!(
        out,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\"/>\n<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"/>\n<title>{} — design review</title>\n<style>{STYLE}</style>\n</head>\n<body>\n<main>",
        escape(&net.title)
    );
    // Sheet 1: title, verdict, caution, the design at a glance.
    let (class, text) = verdict(input.checks, &input.ports);
    out.push_str("<section class=\"sheet\" id=\"summary\">\n");
    let _ = writeln!(out, "<h1>{}</h1>", escape(&net.title));
    let _ = writeln!(
        out,
        "<p><span class=\"verdict {class}\" id=\"verdict\">{}</span></p>",
        escape(&text)
    );
    if input.caution {
        let _ = writeln!(
            out,
            "<div class=\"caution\" role=\"note\"><strong>Caution.</strong> {}</div>",
            escape(CAUTION)
        );
    }
    out.push_str("<h2>The design at a glance</h2>\n");
    let names: Vec<&str> = a.responses().iter().map(|r| r.name.as_str()).collect();
    let _ = writeln!(
        out,
        "<p>{} parts, {} nodes besides ground, {} unknowns. Sweep: {}. Responses: {}.</p>",
        net.parts().len(),
        net.node_count().saturating_sub(1),
        a.system().n,
        escape(&input.grid.describe()),
        escape(&names.join(", "))
    );
    let total = net.parts().len();
    let shown = total.min(PARTS_SHOWN);
    parts_rows(&mut out, net, 0..shown.min(PARTS_FIRST));
    out.push_str("</section>\n");
    let mut start = PARTS_FIRST;
    while start < shown {
        let end = (start + PARTS_PER_SHEET).min(shown);
        let _ = writeln!(
            out,
            "<section class=\"sheet\">\n<h2>Parts {} to {} of {total}</h2>",
            start + 1,
            end
        );
        parts_rows(&mut out, net, start..end);
        if end == shown && shown < total {
            let _ = writeln!(
                out,
                "<p class=\"note\">{} more parts are not listed.</p>",
                total - shown
            );
        }
        out.push_str("</section>\n");
        start = end;
    }
    // Per response: its Bode plot and figures; further plots and poles on their own sheets.
    for (r, (spec, f)) in a.responses().iter().zip(input.figures).enumerate() {
        let _ = writeln!(
            out,
            "<section class=\"sheet response\" data-response=\"{}\">\n<h2>{} <span class=\"note\">({}{})</span></h2>",
            escape(&spec.name),
            escape(&spec.name),
            escape(f.class),
            if f.unit.is_empty() {
                String::new()
            } else {
                format!(", {}", escape(f.unit))
            }
        );
        let plots = input.plots.get(r).map_or(&[][..], Vec::as_slice);
        if let Some(p) = plots.first() {
            figure(&mut out, p, "");
        } else {
            out.push_str("<p class=\"note\">No plot: the sweep has no frequency above 0 Hz.</p>\n");
        }
        figures_table(&mut out, f, r);
        if f.poles.rows.is_empty() {
            // Only the note saying why there are none.
            poles_table(&mut out, f);
        }
        out.push_str("</section>\n");
        for p in plots.iter().skip(1) {
            let _ = writeln!(
                out,
                "<section class=\"sheet\">\n<h2>{} — {}</h2>",
                escape(&spec.name),
                escape(&p.caption)
            );
            figure(&mut out, p, "small");
            if p.caption.contains("poles") {
                poles_table(&mut out, f);
            }
            out.push_str("</section>\n");
        }
        if !f.poles.rows.is_empty() && !plots.iter().any(|p| p.caption.contains("poles")) {
            out.push_str("<section class=\"sheet\">\n");
            let _ = writeln!(out, "<h2>{} — poles and zeros</h2>", escape(&spec.name));
            poles_table(&mut out, f);
            out.push_str("</section>\n");
        }
    }
    for p in input.overlays {
        out.push_str("<section class=\"sheet\">\n<h2>Responses overlaid</h2>\n");
        figure(&mut out, p, "");
        out.push_str("</section>\n");
    }
    if let Some(ports) = &input.ports {
        out.push_str("<section class=\"sheet\" id=\"ports\">\n<h2>Ports</h2>\n<table>\n");
        for (k, v) in &ports.rows {
            row(&mut out, k, v, None);
        }
        for r in &ports.limits {
            row(
                &mut out,
                &format!("limit {} (port {})", r.limit.name, r.limit.port),
                &format!(
                    "{}: return loss ≥ {:.2} dB over {} … {}; worst {:.2} dB at {} (margin {})",
                    if r.pass { "pass" } else { "FAIL" },
                    r.limit.min_return_loss_db,
                    hz(r.limit.from),
                    hz(r.limit.to),
                    r.worst_return_loss_db,
                    hz(r.worst_at_hz),
                    db(r.worst_margin_db)
                ),
                None,
            );
        }
        out.push_str("</table>\n");
        // One chart on the ports sheet, each further one on a sheet of its own.
        for (k, p) in ports.plots.iter().enumerate() {
            if k > 0 {
                out.push_str("</section>\n<section class=\"sheet\">\n<h2>Ports (continued)</h2>\n");
            }
            figure(&mut out, p, "small");
        }
        out.push_str("</section>\n");
    }
    // Limits.
    out.push_str("<section class=\"sheet\" id=\"limits\">\n<h2>Limits</h2>\n");
    if input.limits.is_empty() {
        let has_port_limits = input.ports.as_ref().is_some_and(|p| !p.limits.is_empty());
        out.push_str(if has_port_limits {
            "<p class=\"note\">No limits on the responses; the limits on the ports' match are in the Ports section.</p>\n"
        } else {
            "<p class=\"note\">The design gives no limits.</p>\n"
        });
    } else {
        out.push_str("<table class=\"limits\"><tr><th>limit</th><th>response</th><th>range</th><th>bound</th><th>result</th><th>worst margin</th><th>at</th></tr>\n");
        for l in input.limits {
            let bound = match (l.min_db, l.max_db) {
                (Some(a), Some(b)) => format!("{} … {}", db(a), db(b)),
                (Some(a), None) => format!("≥ {}", db(a)),
                (None, Some(b)) => format!("≤ {}", db(b)),
                (None, None) => "—".into(),
            };
            let _ = write!(
                out,
                "<tr><td>{}</td><td>{}</td><td class=\"num\">{} … {}</td><td class=\"num\">{}</td>",
                escape(&l.name),
                escape(&l.response),
                hz(l.from),
                hz(l.to),
                escape(&bound)
            );
            match input.checks.iter().position(|c| c.limit.name == l.name) {
                Some(k) => {
                    let c = &input.checks[k];
                    let _ = writeln!(
                        out,
                        "<td class=\"{}\">{}</td><td class=\"num\" data-json=\"limits.{k}.worst_margin_db\">{}</td><td class=\"num\" data-json=\"limits.{k}.worst_at_hz\">{}</td></tr>",
                        if c.pass { "pass" } else { "fail" },
                        if c.pass { "pass" } else { "FAIL" },
                        db(c.worst_margin_db),
                        hz(c.worst_at_hz)
                    );
                }
                None => out.push_str(
                    "<td colspan=\"3\" class=\"note\">not checked (its response was not computed)</td></tr>\n",
                ),
            }
        }
        out.push_str("</table>\n<p class=\"note\">Margin: how far the response stays inside the bound (negative: by how much it is outside), at the worst frequency of the range.</p>\n");
    }
    out.push_str("</section>\n");
    tolerance_sheets(&mut out, input.tolerances);
    // Provenance.
    let p = input.provenance;
    out.push_str("<section class=\"sheet\" id=\"provenance\">\n<h2>Provenance</h2>\n<table>\n");
    row(&mut out, "tool", &p.tool, None);
    row(&mut out, "design file", &p.design_path, None);
    row(&mut out, "design SHA-256", &p.design_sha256, None);
    row(&mut out, "command", &p.command, None);
    row(&mut out, "generated", &p.generated, None);
    if !p.files.is_empty() {
        row(
            &mut out,
            "files beside this page",
            &p.files.join(", "),
            None,
        );
    }
    out.push_str("</table>\n");
    if input.caution {
        let _ = writeln!(
            out,
            "<div class=\"caution\"><strong>Caution.</strong> {}</div>",
            escape(CAUTION)
        );
    }
    out.push_str("</section>\n</main>\n</body>\n</html>\n");
    out
}

/// Why the review's tolerance or ports part could not be computed.
#[derive(Debug, thiserror::Error)]
pub enum ReviewError {
    /// The network failed to solve.
    #[error(transparent)]
    Analysis(#[from] crate::response::AnalysisError),
    /// The ports could not be set up.
    #[error("ports: {0}")]
    Ports(String),
}

/// The tolerance part of a review: a study of `samples` samples from `seed` (none when 0),
/// and the adjoint sensitivities of every figure of every response to every varied value.
#[allow(clippy::too_many_arguments)]
pub fn tolerance_results(
    ev: &crate::response::Evaluator<'_>,
    grid: &Grid,
    opts: Vec<crate::metrics::MetricOptions>,
    limits: &[Limit],
    figures: &[Figures],
    checks: &[LimitResult],
    samples: u64,
    seed: u64,
) -> Result<Tolerances, ReviewError> {
    use crate::spread::{SpreadError, Study};
    let net = ev.analysis().network();
    if !net
        .varied()
        .iter()
        .any(|v| v.tolerance.is_some_and(|t| t.fraction > 0.0))
    {
        return Ok(Tolerances::None);
    }
    if samples == 0 {
        return Ok(Tolerances::NotComputed(
            "the review was run with --samples 0; `analyzer spread` runs the study on its own"
                .into(),
        ));
    }
    let study = match Study::new(ev, grid, opts, limits, seed) {
        Ok(s) => s,
        Err(SpreadError::Nominal(e)) => return Err(e.into()),
        Err(e) => return Ok(Tolerances::NotComputed(e.to_string())),
    };
    let mut state = study.state("review", samples, 0, 1);
    study.run(&mut state, |_| Ok::<(), ()>(())).ok();
    let summary = state.summary();
    let mut envelopes = Vec::new();
    for (r, env) in state.responses.iter().enumerate() {
        if env.unit == "V/√Hz" {
            continue;
        }
        let Some(traces) = state.envelope_db(r) else {
            continue;
        };
        let on_it: Vec<Limit> = limits
            .iter()
            .filter(|l| l.response == env.name)
            .cloned()
            .collect();
        let plot = crate::export::EnvelopePlot {
            title: format!(
                "{} — {}: spread of {} samples",
                net.title, env.name, state.done
            ),
            unit: &env.unit,
            envelope: &traces,
            limits: &on_it,
        };
        if let Ok(svg) = crate::export::render_envelope_svg(&plot) {
            envelopes.push(Plot {
                caption: format!(
                    "{}: nominal trace over the min–max and 5–95 % bands of the samples",
                    env.name
                ),
                svg,
            });
        }
    }
    let values = crate::sensitivity::values(ev);
    let top = grid.bounds().1;
    let mut sensitivities = Vec::new();
    for (r, spec) in ev.analysis().responses().iter().enumerate() {
        if spec.kind.unit() == crate::response::ResponseUnit::NoiseDensity {
            continue;
        }
        let Some(f) = figures.get(r) else { continue };
        let figs = crate::sensitivity::figure_sensitivities(ev, f, r, &values, checks, top)?;
        sensitivities.push((spec.name.clone(), figs));
    }
    Ok(Tolerances::Computed(Box::new(ToleranceResults {
        summary,
        envelopes,
        values: values.iter().map(|v| v.name.clone()).collect(),
        sensitivities,
    })))
}

/// The ports part of a review: per port its worst return loss and a Smith chart, the
/// reciprocity and passivity figures, and the limits on the ports' match.
#[derive(Clone, Debug, Default)]
pub struct Ports {
    /// (label, text) rows.
    pub rows: Vec<(String, String)>,
    /// Smith charts.
    pub plots: Vec<Plot>,
    /// Each port limit's outcome.
    pub limits: Vec<crate::ports::PortLimitResult>,
}

/// [`Ports`], or None when the design has no ports.
pub type PortsSection = Option<Ports>;

/// Computes [`PortsSection`] for `ports` of `net` over `grid`.
pub fn ports_section(
    net: &Network,
    ports: &[crate::ports::Port],
    port_limits: &[crate::ports::PortLimit],
    grid: &Grid,
) -> Result<PortsSection, ReviewError> {
    use crate::ports::{self as p, NPort};
    if ports.is_empty() {
        return Ok(None);
    }
    let nport = NPort::new(net, ports.to_vec()).map_err(|e| ReviewError::Ports(e.to_string()))?;
    let pts = nport.sweep(grid)?;
    let list = nport.ports();
    let n = list.len();
    let mut rows = Vec::new();
    let mut plots = Vec::new();
    let summary = p::Summary::of(&pts, n);
    for (i, port) in list.iter().enumerate() {
        if let Some(Some((f, r))) = summary.worst_match.get(i) {
            rows.push((
                format!("port {} (z0 {})", port.name, num(port.z0, 4, "Ω")),
                format!(
                    "worst return loss {} at {} (|Γ| {:.4}, VSWR {})",
                    if r.return_loss_db.is_finite() {
                        format!("{:.2} dB", r.return_loss_db)
                    } else {
                        "∞ (matched)".into()
                    },
                    hz(*f),
                    r.gamma,
                    if r.vswr.is_finite() {
                        format!("{:.3}", r.vswr)
                    } else {
                        "∞".into()
                    }
                ),
            ));
        }
        let gamma: Vec<(f64, p::Complex)> = pts.iter().map(|q| (q.freq, q.s[i * n + i])).collect();
        if let Ok(svg) = crate::export::render_smith_svg(&crate::export::SmithPlot {
            title: format!(
                "{} — port {}: Γ against {}",
                net.title,
                port.name,
                num(port.z0, 4, "Ω")
            ),
            gamma: &gamma,
            vswr_circle: Some(2.0),
        }) {
            plots.push(Plot {
                caption: format!("Smith chart of port {} (VSWR 2 circle drawn)", port.name),
                svg,
            });
        }
    }
    let (recip, sigma) = (summary.reciprocity_error, summary.largest_singular_value);
    rows.push((
        "reciprocity".into(),
        format!("max |Sij − Sji| = {recip:.2e}"),
    ));
    rows.push((
        "passivity".into(),
        format!(
            "largest singular value of S = {sigma:.6}{}",
            if summary.passive() { " (passive)" } else { "" }
        ),
    ));
    let ev = nport.analysis().evaluator()?;
    let mut ws = ev.workspace();
    let mut limits = Vec::new();
    for l in port_limits {
        if let Some(r) = nport.check_limit(&ev, &mut ws, &pts, l)? {
            limits.push(r);
        }
    }
    Ok(Some(Ports {
        rows,
        plots,
        limits,
    }))
}
