//! `analyzer sensitivity`, `analyzer corners` and `analyzer variants`: which part moves
//! which figure, the worst corner of the tolerance box per limit, and the design swept once
//! per changed value (or snapped to preferred values).

use crate::output::{safe_file_name, Staging};
use crate::{load, print_warnings, Failure};
use analyzer_core::corners;
use analyzer_core::design::Design;
use analyzer_core::export::{self, LinesPlot};
use analyzer_core::metrics::{self, Assessment, Limit, MetricOptions};
use analyzer_core::preferred::{self, Series};
use analyzer_core::response::{Analysis, ResponseUnit};
use analyzer_core::review::plots::{self, PlotOptions};
use analyzer_core::sensitivity::{self, FigureSensitivity, Value};
use analyzer_core::spread::Followed;
use analyzer_core::sweep::Grid;
use analyzer_core::units::{format_eng, parse_value, Quantity};
use analyzer_core::variants;
use clap::Args;
use std::fmt::Write as _;
use std::path::PathBuf;

/// Options every what-if command shares.
#[derive(Args, Debug)]
pub struct Common {
    /// The design file (TOML).
    pub design: PathBuf,
    /// Change a value before anything else, e.g. `--set R2=4k7` or `--set U1.gbw=3MHz`
    /// (repeatable).
    #[arg(long, value_name = "NAME=VALUE")]
    pub set: Vec<String>,
    /// Log-spaced sweep with this many points per decade (overrides the design's spacing).
    #[arg(long, value_name = "N")]
    pub per_decade: Option<f64>,
    /// Output directory (default: DESIGN-COMMAND/ beside the current directory).
    #[arg(short, long, value_name = "DIR")]
    pub output: Option<PathBuf>,
    /// Skip the SVG plots.
    #[arg(long)]
    pub no_plot: bool,
    /// Print nothing but errors.
    #[arg(short, long)]
    pub quiet: bool,
}

#[derive(Args, Debug)]
pub struct SensitivityArgs {
    #[command(flatten)]
    common: Common,
    /// Also list S = ∂ln H/∂ln p of every value at these frequencies (repeatable).
    #[arg(long, value_name = "FREQ")]
    at: Vec<String>,
    /// Also write RESPONSE-sensitivity.csv (dB and degrees per % of every value at every
    /// sweep frequency) and plot the five values that move |H| most.
    #[arg(long)]
    curves: bool,
}

#[derive(Args, Debug)]
pub struct CornersArgs {
    #[command(flatten)]
    common: Common,
}

#[derive(Args, Debug)]
pub struct VariantsArgs {
    #[command(flatten)]
    common: Common,
    /// Sweep once per value: `R2=1k,2k2,4k7` or a log range `C1=1n..100n/5`.
    #[arg(long, value_name = "NAME=VALUES", conflicts_with = "snap")]
    step: Option<String>,
    /// Compare the design with every resistor, capacitor and inductor moved to the nearest
    /// value of an IEC 60063 series (E6, E12, E24, E48, E96, E192).
    #[arg(long, value_name = "SERIES")]
    snap: Option<String>,
}

/// A design read, changed by `--set`, and assembled.
pub(crate) struct Prepared {
    pub analysis: Analysis,
    pub grid: Grid,
    pub limits: Vec<Limit>,
    pub opts: Vec<MetricOptions>,
    pub caution: bool,
    pub shown: String,
    pub out_dir: PathBuf,
}

/// The design as the common options make it: read (warnings printed unless quiet), changed
/// by `--set`, its sweep respaced by `--per-decade`; with its grid, its name for messages and
/// the output directory (DESIGN-COMMAND/ unless `-o`).
pub(crate) fn read_design(
    c: &Common,
    command: &str,
) -> Result<(Design, Grid, String, PathBuf), Failure> {
    let mut d: Design = if command == "ports" {
        crate::load_any(&c.design)?
    } else {
        load(&c.design)?
    };
    if !c.quiet {
        print_warnings(&d, &c.design);
    }
    let shown = c.design.display().to_string();
    crate::apply_sets(&mut d, &c.set)?;
    if let Some(n) = c.per_decade {
        d.sweep.per_decade = Some(n);
        d.sweep.points = None;
        d.sweep.at = None;
    }
    let grid = d
        .sweep
        .grid()
        .map_err(|e| Failure::input(format!("{shown}: sweep: {e}")))?;
    let out_dir = c.output.clone().unwrap_or_else(|| {
        let stem = c
            .design
            .file_stem()
            .map_or_else(|| "design".into(), |s| s.to_string_lossy().to_string());
        PathBuf::from(format!("{stem}-{command}"))
    });
    if out_dir.is_file() {
        return Err(Failure::input(format!(
            "-o {}: that is a file; -o takes a directory (made if missing)",
            out_dir.display()
        )));
    }
    Ok((d, grid, shown, out_dir))
}

pub(crate) fn prepare(c: &Common, command: &str) -> Result<Prepared, Failure> {
    let (d, grid, shown, out_dir) = read_design(c, command)?;
    let limits = d.limits.clone();
    let caution = d.caution;
    let analysis = Analysis::new(d.network, d.responses)
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    let opts = analysis
        .responses()
        .iter()
        .map(|s| MetricOptions {
            level_db: s.level_db,
            reference: s.reference.unwrap_or_default(),
        })
        .collect();
    Ok(Prepared {
        analysis,
        grid,
        limits,
        opts,
        caution,
        shown,
        out_dir,
    })
}

fn finish(staging: Staging, text: String, quiet: bool, caution: bool) -> Result<(), Failure> {
    let written = staging.commit()?;
    if !quiet {
        print!("{text}");
        if caution {
            println!("\n{}", crate::report::CAUTION);
        }
        let files: Vec<String> = written.iter().map(|p| p.display().to_string()).collect();
        if !files.is_empty() {
            println!("wrote {}", files.join(", "));
        }
    }
    Ok(())
}

fn figure_value(f: &FigureSensitivity) -> String {
    match f.per {
        sensitivity::Per::Relative if f.figure.ends_with(" Q") => format!("{:.4}", f.value),
        sensitivity::Per::Relative => format_eng(f.value, 5, "Hz"),
        sensitivity::Per::Db => format!("{:.3} dB", zeroed(f.value)),
        sensitivity::Per::Degrees => format!("{:.2}°", f.value),
    }
}

/// The ranked table of one response's figure sensitivities.
fn ranked_table(out: &mut String, values: &[Value], figs: &[FigureSensitivity]) {
    for f in figs {
        let ranked = f.ranked();
        let top: Vec<String> = ranked
            .iter()
            .take(5)
            .filter(|(_, s)| s.abs() >= 5e-4)
            .map(|(k, s)| format!("{} {s:+.3}", values[*k].name))
            .collect();
        let _ = writeln!(
            out,
            "  {:<24}{:>14}  {}  {}",
            f.figure,
            figure_value(f),
            f.per.unit(),
            if top.is_empty() {
                "no value moves it".to_string()
            } else {
                top.join(", ")
            }
        );
    }
}

pub fn run_sensitivity(args: &SensitivityArgs) -> Result<u8, Failure> {
    let p = prepare(&args.common, "sensitivity")?;
    let shown = &p.shown;
    let err = |e: &dyn std::fmt::Display| Failure::input(format!("{shown}: {e}"));
    let ev = p.analysis.evaluator().map_err(|e| err(&e))?;
    let nominal = metrics::assess(&ev, &p.grid, &p.opts, &p.limits).map_err(|e| err(&e))?;
    let values = sensitivity::values(&ev);
    if values.is_empty() {
        return Err(err(&"the design has no part value to be sensitive to"));
    }
    let top = p.grid.bounds().1;
    let mut text = String::new();
    let _ = writeln!(text, "{}", p.analysis.network().title);
    let _ = writeln!(
        text,
        "sensitivity of every figure to +1 % of each value, by the adjoint method (largest first)"
    );
    let mut json = Vec::new();
    let mut staging = Staging::default();
    let at: Vec<f64> = args
        .at
        .iter()
        .map(|s| {
            parse_value(s, Quantity::Frequency)
                .map_err(|e| Failure::input(format!("--at {s}: {e}")))
        })
        .collect::<Result<_, _>>()?;
    for (r, spec) in p.analysis.responses().iter().enumerate() {
        if spec.kind.unit() == ResponseUnit::NoiseDensity {
            continue;
        }
        let figs = sensitivity::figure_sensitivities(
            &ev,
            &nominal.figures[r],
            r,
            &values,
            &nominal.checks,
            top,
        )
        .map_err(|e| err(&e))?;
        let _ = writeln!(text, "\n{}", spec.name);
        ranked_table(&mut text, &values, &figs);
        let mut ws = ev.workspace();
        let mut points = Vec::new();
        for &f in &at {
            let (pt, s) = sensitivity::at(&ev, &mut ws, f, r, &values).map_err(|e| err(&e))?;
            let _ = writeln!(
                text,
                "  at {}: |H| {:.3} dB; per +1 %: {}",
                format_eng(f, 5, "Hz"),
                20.0 * pt.value.norm().log10(),
                values
                    .iter()
                    .zip(&s)
                    .map(|(v, s)| format!(
                        "{} {:+.4} dB {:+.3}°",
                        v.name,
                        sensitivity::db_per_percent(*s),
                        sensitivity::deg_per_percent(*s)
                    ))
                    .collect::<Vec<_>>()
                    .join(", ")
            );
            points.push(serde_json::json!({
                "frequency_hz": f,
                "db_per_percent": s.iter().map(|s| sensitivity::db_per_percent(*s)).collect::<Vec<_>>(),
                "deg_per_percent": s.iter().map(|s| sensitivity::deg_per_percent(*s)).collect::<Vec<_>>(),
            }));
        }
        json.push(serde_json::json!({
            "response": spec.name,
            "figures": figs,
            "at": points,
        }));
        if args.curves {
            let freqs = p.grid.points();
            let mut rows: Vec<Vec<f64>> = Vec::with_capacity(freqs.len());
            for &f in &freqs {
                let (_, s) = sensitivity::at(&ev, &mut ws, f, r, &values).map_err(|e| err(&e))?;
                let mut row = vec![f];
                for s in &s {
                    row.push(sensitivity::db_per_percent(*s));
                    row.push(sensitivity::deg_per_percent(*s));
                }
                rows.push(row);
            }
            let mut csv = String::from("frequency_hz");
            for v in &values {
                let _ = write!(csv, ",{}_db_per_pct,{}_deg_per_pct", v.name, v.name);
            }
            csv.push('\n');
            for row in &rows {
                let cells: Vec<String> = row.iter().map(|x| format!("{x}")).collect();
                csv.push_str(&cells.join(","));
                csv.push('\n');
            }
            let stem = safe_file_name(&spec.name);
            staging.bytes(
                &p.out_dir.join(format!("{stem}-sensitivity.csv")),
                csv.as_bytes(),
            )?;
            if !args.common.no_plot {
                let mut order: Vec<(usize, f64)> = (0..values.len())
                    .map(|k| {
                        let peak = rows.iter().map(|r| r[1 + 2 * k].abs()).fold(0.0, f64::max);
                        (k, peak)
                    })
                    .collect();
                order.sort_by(|a, b| b.1.total_cmp(&a.1));
                let series: Vec<(String, Vec<(f64, f64)>)> = order
                    .iter()
                    .take(5)
                    .map(|&(k, _)| {
                        (
                            values[k].name.clone(),
                            rows.iter().map(|r| (r[0], r[1 + 2 * k])).collect(),
                        )
                    })
                    .collect();
                let svg = export::render_lines_svg(&LinesPlot {
                    title: format!(
                        "{} — {}: the five values that move |H| most",
                        p.analysis.network().title,
                        spec.name
                    ),
                    label: "change of |H| per +1 % (dB)".into(),
                    series: &series,
                })
                .map_err(|e| err(&e))?;
                staging.bytes(
                    &p.out_dir.join(format!("{stem}-sensitivity.svg")),
                    svg.as_bytes(),
                )?;
            }
        }
    }
    let doc = serde_json::json!({
        "title": p.analysis.network().title,
        "values": values,
        "responses": json,
    });
    let body = serde_json::to_string_pretty(&doc).map_err(|e| Failure::output(e.to_string()))?;
    staging.bytes(&p.out_dir.join("sensitivity.json"), body.as_bytes())?;
    finish(staging, text, args.common.quiet, p.caution)?;
    Ok(0)
}

fn toleranced(values: Vec<Value>) -> Vec<Value> {
    values
        .into_iter()
        .filter(|v| v.tolerance.is_some_and(|t| t.fraction > 0.0))
        .collect()
}

pub fn run_corners(args: &CornersArgs) -> Result<u8, Failure> {
    let p = prepare(&args.common, "corners")?;
    let shown = &p.shown;
    let err = |e: &dyn std::fmt::Display| Failure::input(format!("{shown}: {e}"));
    let ev = p.analysis.evaluator().map_err(|e| err(&e))?;
    if p.limits.is_empty() {
        return Err(err(&"the design has no [limits] to take the worst case of"));
    }
    let values = toleranced(sensitivity::values(&ev));
    if values.is_empty() {
        return Err(err(&"no part has a tolerance: give parts one (tolerance = \"1%\") or set defaults per kind in a [tolerances] table"));
    }
    let nominal = metrics::assess(&ev, &p.grid, &p.opts, &p.limits).map_err(|e| err(&e))?;
    let found =
        corners::worst_case(&ev, &p.grid, &p.opts, &nominal, &values).map_err(|e| err(&e))?;
    let mut text = String::new();
    let _ = writeln!(text, "{}", p.analysis.network().title);
    let _ = writeln!(
        text,
        "worst case per limit: each toleranced value at the end of its tolerance that lowers the margin, verified by re-solving the sweep\n"
    );
    let _ = writeln!(
        text,
        "  {:<18}{:>12}{:>12}{:>12}{:>14}  corner",
        "limit", "nominal", "predicted", "verified", "at"
    );
    let mut failed = false;
    for c in &found {
        failed |= !c.pass;
        let corner: Vec<String> = values
            .iter()
            .zip(&c.deviations)
            .map(|(v, d)| {
                let sign = if *d < 0.0 { "−" } else { "+" };
                format!("{} {sign}{}%", v.name, trim(100.0 * d.abs()))
            })
            .collect();
        let _ = writeln!(
            text,
            "  {:<18}{:>9.3} dB{:>9.3} dB{:>9.3} dB{:>14}  {}{}{}",
            c.limit,
            c.nominal_margin_db,
            c.predicted_margin_db,
            c.margin_db,
            format_eng(c.worst_hz, 4, "Hz"),
            corner.join(", "),
            if c.pass {
                ""
            } else {
                " · FAILS at this corner"
            },
            if c.prediction_off {
                " · the linear prediction missed: the margin is not linear over the tolerance box"
            } else {
                ""
            }
        );
    }
    let mut staging = Staging::default();
    let doc = serde_json::json!({
        "title": p.analysis.network().title,
        "values": values,
        "corners": found,
    });
    let body = serde_json::to_string_pretty(&doc).map_err(|e| Failure::output(e.to_string()))?;
    staging.bytes(&p.out_dir.join("corners.json"), body.as_bytes())?;
    finish(staging, text, args.common.quiet, p.caution)?;
    Ok(if failed { crate::EXIT_CHECK_FAILED } else { 0 })
}

fn trim(x: f64) -> String {
    let s = format!("{x:.3}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    s.to_string()
}

/// One value change: the part, which value, the new value.
type Change = (
    analyzer_core::network::PartId,
    analyzer_core::network::Param,
    f64,
);

pub fn run_variants(args: &VariantsArgs) -> Result<u8, Failure> {
    let p = prepare(&args.common, "variants")?;
    let shown = &p.shown;
    let err = |e: &dyn std::fmt::Display| Failure::input(format!("{shown}: {e}"));
    let net = p.analysis.network();
    // (label, changes) per variant.
    let mut list: Vec<(String, Vec<Change>)> = Vec::new();
    let mut snapped = Vec::new();
    // A short form of each label for file names.
    let mut files: Vec<String> = Vec::new();
    if let Some(step) = &args.step {
        let (t, vals) = variants::parse_step(net, step)
            .map_err(|e| Failure::input(format!("--step {step}: {e}")))?;
        let unit = net.part(t.part).map_or("", |q| q.kind.unit(t.param));
        for v in vals {
            list.push((
                format!("{}={}", t.name, format_eng(v, 4, unit)),
                vec![(t.part, t.param, v)],
            ));
            files.push(format!(
                "{}={}",
                t.name,
                format_eng(v, 4, "").replace(' ', "")
            ));
        }
    } else if let Some(series) = &args.snap {
        let s: Series = series
            .parse()
            .map_err(|e: String| Failure::input(format!("--snap: {e}")))?;
        snapped = preferred::snap(net, s);
        list.push(("as designed".into(), Vec::new()));
        files.extend(["designed".to_string(), series.to_ascii_uppercase()]);
        list.push((
            format!("{series} values"),
            snapped
                .iter()
                .map(|c| (c.part, analyzer_core::network::Param::Main, c.to))
                .collect(),
        ));
    } else {
        return Err(Failure::input(
            "variants: give --step NAME=VALUES (e.g. --step R2=1k,2k2,4k7) or --snap SERIES (e.g. --snap E24)",
        ));
    }
    let base = p.analysis.evaluator().map_err(|e| err(&e))?;
    let mut assessed: Vec<Assessment> = Vec::new();
    for (label, changes) in &list {
        let a = p
            .analysis
            .with_values(changes)
            .map_err(|e| Failure::input(format!("{label}: {e}")))?;
        let ev = a
            .evaluator_like(&base)
            .map_err(|e| Failure::input(format!("{shown}: {label}: {e}")))?;
        assessed.push(
            metrics::assess(&ev, &p.grid, &p.opts, &p.limits)
                .map_err(|e| Failure::input(format!("{shown}: {label}: {e}")))?,
        );
    }
    let followed = Followed::of(&assessed[0]);
    let table: Vec<Vec<f64>> = assessed.iter().map(|a| followed.values(a)).collect();
    let mut text = String::new();
    let _ = writeln!(text, "{}", net.title);
    if !snapped.is_empty() || args.snap.is_some() {
        let _ = writeln!(
            text,
            "moved to {} values:",
            args.snap.as_deref().unwrap_or("")
        );
        if snapped.is_empty() {
            let _ = writeln!(text, "  every R, L and C is already a preferred value");
        }
        for c in &snapped {
            let _ = writeln!(
                text,
                "  {:<10}{:>12} → {:<12} ({:+.2} %)",
                c.name,
                format_eng(c.from, 4, c.unit),
                format_eng(c.to, 4, c.unit),
                100.0 * (c.to / c.from - 1.0)
            );
        }
    }
    let width = list
        .iter()
        .map(|l| l.0.chars().count())
        .max()
        .unwrap_or(10)
        .max(12)
        + 2;
    let _ = write!(text, "\n  {:<34}", "figure");
    for (label, _) in &list {
        let _ = write!(text, "{label:>width$}");
    }
    if args.snap.is_some() {
        let _ = write!(text, "{:>width$}", "shift");
    }
    let _ = writeln!(text);
    let units = followed.units();
    for (k, name) in followed.names().iter().enumerate() {
        let _ = write!(text, "  {name:<34}");
        for row in &table {
            let _ = write!(text, "{:>width$}", show(row[k], units[k]));
        }
        if args.snap.is_some() {
            let (a, b) = (table[0][k], table[1][k]);
            let shift = match units[k] {
                "dB" | "°" => format!("{:+.3} {}", b - a, units[k]),
                _ => format!("{:+.3} %", 100.0 * (b / a - 1.0)),
            };
            let _ = write!(text, "{shift:>width$}");
        }
        let _ = writeln!(text);
    }
    for (label, a) in list.iter().map(|l| &l.0).zip(&assessed) {
        let failed: Vec<&str> = a
            .checks
            .iter()
            .filter(|c| !c.pass)
            .map(|c| c.limit.name.as_str())
            .collect();
        if !failed.is_empty() {
            let _ = writeln!(text, "  {label}: fails {}", failed.join(", "));
        }
    }
    // Files: a CSV per variant and response, an overlay plot per response, the table as JSON.
    let mut staging = Staging::default();
    let freqs = p.grid.points();
    for (r, spec) in p.analysis.responses().iter().enumerate() {
        let stem = safe_file_name(&spec.name);
        for (file, a) in files.iter().zip(&assessed) {
            let mut csv = Vec::new();
            export::write_csv(
                &mut csv,
                &freqs,
                &[export::Columns {
                    name: &spec.name,
                    unit: spec.kind.unit(),
                    values: &a.values[r],
                    delay: None,
                    unwrap: true,
                }],
            )
            .map_err(|e| Failure::output(e.to_string()))?;
            staging.bytes(
                &p.out_dir
                    .join(format!("{stem}@{}.csv", safe_file_name(file))),
                &csv,
            )?;
        }
        if !args.common.no_plot && spec.kind.unit() != ResponseUnit::NoiseDensity {
            // One Bode plot, the variants overlaid with a legend, the limits as masks.
            let series: Vec<_> = list
                .iter()
                .zip(&assessed)
                .map(|((label, _), a)| plots::series(label, &p.grid, &a.traces[r], false))
                .collect();
            let masks = plots::masks(&p.limits, &spec.name);
            let (scale, label) = plots::scale(spec.kind.unit(), PlotOptions::default());
            let lo = freqs.iter().copied().find(|f| *f > 0.0).unwrap_or(0.0);
            if let Ok(svg) = analyzer_core::bode::render(&analyzer_core::bode::Bode {
                masks: &masks,
                loop_gain: spec.loop_gain,
                ..analyzer_core::bode::Bode::new(
                    format!("{} — {}: variants", net.title, spec.name),
                    (lo, p.grid.bounds().1),
                    &series,
                    scale,
                    label,
                )
            }) {
                staging.bytes(
                    &p.out_dir.join(format!("{stem}-variants.svg")),
                    svg.as_bytes(),
                )?;
            }
        }
    }
    let doc = serde_json::json!({
        "title": net.title,
        "variants": list.iter().map(|l| l.0.clone()).collect::<Vec<_>>(),
        "figures": followed.names(),
        "units": units,
        "values": table.iter().map(|row| row.iter().map(|x| x.is_finite().then_some(*x)).collect::<Vec<_>>()).collect::<Vec<_>>(),
        "snapped": snapped.iter().map(|c| serde_json::json!({"part": c.name, "from": c.from, "to": c.to})).collect::<Vec<_>>(),
    });
    let body = serde_json::to_string_pretty(&doc).map_err(|e| Failure::output(e.to_string()))?;
    staging.bytes(&p.out_dir.join("variants.json"), body.as_bytes())?;
    let any_failed = assessed.iter().any(|a| a.checks.iter().any(|c| !c.pass));
    finish(staging, text, args.common.quiet, p.caution)?;
    Ok(if any_failed {
        crate::EXIT_CHECK_FAILED
    } else {
        0
    })
}

fn show(v: f64, unit: &str) -> String {
    if !v.is_finite() {
        return "—".into();
    }
    match unit {
        "dB" | "°" => format!("{:.3} {unit}", zeroed(v)),
        _ => format_eng(v, 5, unit),
    }
}

/// No "-0.000" for a level that rounds to zero at three decimals.
fn zeroed(v: f64) -> f64 {
    if v.abs() < 5e-4 {
        0.0
    } else {
        v
    }
}
