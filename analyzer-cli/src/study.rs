//! `analyzer spread` and `analyzer merge`: tolerance studies, run whole or in shards.

use crate::output::{safe_file_name, Staging};
use crate::Failure;
use analyzer_core::export::{self, EnvelopePlot};
use analyzer_core::spread::{self, Outcome, SpreadState, SpreadSummary, Study};
use analyzer_core::units::format_eng;
use clap::Args;
use std::fmt::Write as _;
use std::io::{BufRead, IsTerminal, Write};
use std::path::{Path, PathBuf};

#[derive(Args, Debug)]
pub struct SpreadArgs {
    /// The design (its parts need tolerances: a part's `tolerance`, or defaults per kind in a
    /// `tolerances` table), --set, the sweep's spacing, output and verbosity.
    #[command(flatten)]
    common: crate::whatif::Common,
    /// Number of samples in the whole study.
    #[arg(long, value_name = "N", default_value_t = 1000)]
    samples: u64,
    /// Seed of the generator: sample i's values depend on (seed, i) alone.
    #[arg(long, value_name = "S", default_value_t = 1)]
    seed: u64,
    /// Run only samples i ≡ K (mod M), K from 0 to M−1, and write a partial result for
    /// `analyzer merge` (default output DESIGN-spread-K-of-M/).
    #[arg(long, value_name = "K/M")]
    shard: Option<String>,
    /// Worker threads (default: all cores).
    #[arg(long, value_name = "N")]
    threads: Option<usize>,
}

#[derive(Args, Debug)]
pub struct MergeArgs {
    /// Directories written by `analyzer spread --shard K/M` (each holds partial.json and
    /// samples.csv).
    #[arg(required = true, value_name = "SHARD_DIR")]
    parts: Vec<PathBuf>,
    /// Output directory for the merged study.
    #[arg(short, long, value_name = "DIR")]
    output: PathBuf,
    /// Skip the SVG plots.
    #[arg(long)]
    no_plot: bool,
    /// Print nothing but errors.
    #[arg(short, long)]
    quiet: bool,
}

/// FNV-1a of the design text and the settings that shape a study: shards of one study must
/// agree on it. An identity check, not a security one.
fn fingerprint(text: &[u8], per_decade: Option<f64>, sets: &[String]) -> String {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    let extra = format!("{per_decade:?}{sets:?}");
    for &b in text.iter().chain(extra.as_bytes()) {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    format!("{h:016x}")
}

fn parse_shard(s: &str) -> Result<(u64, u64), Failure> {
    let bad = || {
        Failure::input(format!(
            "--shard {s}: expected K/M with 0 ≤ K < M, e.g. 0/4 … 3/4 for four shards"
        ))
    };
    let (k, m) = s.split_once('/').ok_or_else(bad)?;
    let k: u64 = k.trim().parse().map_err(|_| bad())?;
    let m: u64 = m.trim().parse().map_err(|_| bad())?;
    if m == 0 || k >= m {
        return Err(bad());
    }
    Ok((k, m))
}

pub fn run_spread(args: &SpreadArgs) -> Result<u8, Failure> {
    crate::set_threads(args.threads)?;
    if args.samples == 0 {
        return Err(Failure::input("--samples must be at least 1"));
    }
    let (shard, shards) = match &args.shard {
        Some(s) => parse_shard(s)?,
        None => (0, 1),
    };
    let text = std::fs::read(&args.common.design)
        .map_err(|e| Failure::input(format!("{}: {e}", args.common.design.display())))?;
    let command = if shards > 1 {
        format!("spread-{shard}-of-{shards}")
    } else {
        "spread".to_string()
    };
    let p = crate::whatif::prepare(&args.common, &command)?;
    let shown = &p.shown;
    let ev = p
        .analysis
        .evaluator()
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    let study = Study::new(&ev, &p.grid, p.opts.clone(), &p.limits, args.seed)
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    let mut state = study.state(
        &fingerprint(&text, args.common.per_decade, &args.common.set),
        args.samples,
        shard,
        shards,
    );
    let out_dir = p.out_dir.clone();
    let mut staging = Staging::default();
    let samples_path = out_dir.join("samples.csv");
    let h = staging.create(&samples_path)?;
    let target = staging.target(h);
    let mut head = Vec::new();
    spread::write_samples_header(&mut head, &state)
        .map_err(|e| Failure::output(format!("{target}: {e}")))?;
    let in_shard = (args.samples - shard).div_ceil(shards);
    let bar = (!args.common.quiet && std::io::stderr().is_terminal()).then(|| {
        let b = indicatif::ProgressBar::new(in_shard);
        b.set_style(
            indicatif::ProgressStyle::with_template(
                "{bar:40} {pos}/{len} samples · {elapsed} elapsed, {eta} to go",
            )
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
        );
        b
    });
    let started = std::time::Instant::now();
    {
        let w = staging
            .writer(h)
            .ok_or_else(|| Failure::output("internal: no output"))?;
        w.write_all(&head)
            .map_err(|e| Failure::output(format!("{target}: {e}")))?;
        study.run(&mut state, |block: &[Outcome]| {
            spread::write_sample_rows(&mut *w, block)
                .map_err(|e| Failure::output(format!("{target}: {e}")))?;
            if let Some(b) = &bar {
                b.inc(block.len() as u64);
            }
            Ok::<(), Failure>(())
        })?;
    }
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    let took = started.elapsed();
    if shards > 1 {
        let json = serde_json::to_vec(&state)
            .map_err(|e| Failure::output(format!("partial.json: {e}")))?;
        staging.bytes(&out_dir.join("partial.json"), &json)?;
        let written = staging.commit()?;
        if !args.common.quiet {
            println!(
                "shard {shard}/{shards}: {} of {} samples in {:.2} s; merge the shards with `analyzer merge DIR... -o OUT`",
                state.done,
                args.samples,
                took.as_secs_f64()
            );
            print_written(&written);
        }
        return Ok(0);
    }
    finish(
        &state,
        staging,
        &out_dir,
        args.common.no_plot,
        args.common.quiet,
        Some(took),
    )
}

fn print_written(written: &[PathBuf]) {
    let files: Vec<String> = written.iter().map(|p| p.display().to_string()).collect();
    if !files.is_empty() {
        println!("wrote {}", files.join(", "));
    }
}

/// The outputs of a whole study (one run, or merged shards): summary JSON, envelope CSV and
/// SVG per response, the table on stdout.
fn finish(
    state: &SpreadState,
    mut staging: Staging,
    out_dir: &Path,
    no_plot: bool,
    quiet: bool,
    took: Option<std::time::Duration>,
) -> Result<u8, Failure> {
    let summary = state.summary();
    let json = serde_json::to_string_pretty(&summary)
        .map_err(|e| Failure::output(format!("spread.json: {e}")))?;
    staging.bytes(&out_dir.join("spread.json"), json.as_bytes())?;
    for (r, env) in state.responses.iter().enumerate() {
        let stem = safe_file_name(&env.name);
        let mut csv = Vec::new();
        state
            .write_envelope_csv(&mut csv, r)
            .map_err(|e| Failure::output(format!("{stem}-envelope.csv: {e}")))?;
        staging.bytes(&out_dir.join(format!("{stem}-envelope.csv")), &csv)?;
        if no_plot || env.unit == "V/√Hz" {
            continue;
        }
        let Some(traces) = state.envelope_db(r) else {
            continue;
        };
        let limits: Vec<_> = state
            .limits
            .iter()
            .filter(|l| l.limit.response == env.name)
            .map(|l| l.limit.clone())
            .collect();
        let plot = EnvelopePlot {
            title: format!(
                "{} — {}: spread of {} samples",
                state.title, env.name, state.done
            ),
            unit: &env.unit,
            envelope: &traces,
            limits: &limits,
        };
        match export::render_envelope_svg(&plot) {
            Ok(svg) => staging.bytes(
                &out_dir.join(format!("{stem}-envelope.svg")),
                svg.as_bytes(),
            )?,
            Err(e) if !quiet => eprintln!("note: no envelope plot of {}: {e}", env.name),
            Err(_) => {}
        }
    }
    let written = staging.commit()?;
    if !quiet {
        print!("{}", table(&summary, took));
        print_written(&written);
    }
    Ok(0)
}

fn value(v: Option<f64>, unit: &str) -> String {
    match v {
        None => "—".into(),
        // No "-0.000 dB" for a level that rounds to zero.
        Some(x) if unit == "dB" || unit == "°" => {
            format!("{:.3} {unit}", if x.abs() < 5e-4 { 0.0 } else { x })
        }
        Some(x) => format_eng(x, 4, unit),
    }
}

/// The summary as a table: yields first, then each figure's spread.
pub fn table(s: &SpreadSummary, took: Option<std::time::Duration>) -> String {
    let mut out = String::new();
    let _ = writeln!(out, "{}", s.title);
    let _ = write!(
        out,
        "tolerance study · {} samples · seed {} · varied: {}",
        s.samples,
        s.seed,
        s.varied.join(", ")
    );
    if let Some(t) = took {
        let _ = write!(out, " · {:.2} s", t.as_secs_f64());
    }
    let _ = writeln!(out);
    if s.unsolved > 0 {
        let _ = writeln!(
            out,
            "{} samples could not be solved (counted as failing); see the note column of samples.csv",
            s.unsolved
        );
    }
    if !s.limits.is_empty() {
        let _ = writeln!(out, "\nyield (95 % Wilson interval)");
        for y in s.limits.iter().chain(s.overall.iter()) {
            let _ = writeln!(
                out,
                "  {:<22}{:>7.2} %  [{:.2} %, {:.2} %]  {} of {}{}",
                y.name,
                100.0 * y.fraction,
                100.0 * y.wilson_low,
                100.0 * y.wilson_high,
                y.passed,
                y.samples,
                if y.nominal_pass {
                    ""
                } else {
                    " · the nominal design fails it"
                }
            );
        }
    }
    let _ = writeln!(
        out,
        "\n  {:<34}{:>13}{:>13}{:>12}{:>13}{:>13}{:>13}",
        "figure", "nominal", "mean", "σ", "1 %", "median", "99 %"
    );
    for f in &s.figures {
        let sigma = match f.std_dev {
            Some(x) if f.unit == "dB" || f.unit == "°" => format!("{x:.3}"),
            Some(x) => match f.mean {
                Some(m) if m != 0.0 => format!("{:.3} %", 100.0 * x / m.abs()),
                _ => format_eng(x, 3, &f.unit),
            },
            None => "—".into(),
        };
        let _ = writeln!(
            out,
            "  {:<34}{:>13}{:>13}{:>12}{:>13}{:>13}{:>13}{}",
            f.name,
            value(f.nominal, &f.unit),
            value(f.mean, &f.unit),
            sigma,
            value(f.p1, &f.unit),
            value(f.p50, &f.unit),
            value(f.p99, &f.unit),
            if f.missing > 0 {
                format!("  (absent in {})", f.missing)
            } else {
                String::new()
            }
        );
    }
    let _ = writeln!(
        out,
        "percentiles from a binned sketch: within half a bin, about 1/4096 of each figure's spread (spread.json gives each bound)"
    );
    out
}

pub fn run_merge(args: &MergeArgs) -> Result<u8, Failure> {
    let mut state: Option<SpreadState> = None;
    for dir in &args.parts {
        let path = dir.join("partial.json");
        let text =
            std::fs::read(&path).map_err(|e| Failure::input(format!("{}: {e}", path.display())))?;
        let part: SpreadState = serde_json::from_slice(&text).map_err(|e| {
            Failure::input(format!(
                "{}: not a partial result of `analyzer spread --shard` ({e})",
                path.display()
            ))
        })?;
        match state.as_mut() {
            None => state = Some(part),
            Some(s) => s
                .merge(&part)
                .map_err(|e| Failure::input(format!("{}: {e}", path.display())))?,
        }
    }
    let Some(state) = state else {
        return Err(Failure::input("merge: no shard directories given"));
    };
    let missing = state.missing_shards();
    if !missing.is_empty() {
        let list: Vec<String> = missing
            .iter()
            .map(|k| format!("{k}/{}", state.shards))
            .collect();
        return Err(Failure::input(format!(
            "merge: shards {} are missing; run them with --shard and merge all {} together",
            list.join(", "),
            state.shards
        )));
    }
    if args.output.is_file() {
        return Err(Failure::input(format!(
            "-o {}: that is a file; -o takes a directory (made if missing)",
            args.output.display()
        )));
    }
    // The samples files, merged by sample index (each shard's rows ascend).
    let mut staging = Staging::default();
    let out_path = args.output.join("samples.csv");
    let h = staging.create(&out_path)?;
    let target = staging.target(h);
    let mut readers = Vec::new();
    let mut header: Option<String> = None;
    for dir in &args.parts {
        let path = dir.join("samples.csv");
        let f = std::fs::File::open(&path)
            .map_err(|e| Failure::input(format!("{}: {e}", path.display())))?;
        let mut lines = std::io::BufReader::new(f).lines();
        let head = lines
            .next()
            .transpose()
            .map_err(|e| Failure::input(format!("{}: {e}", path.display())))?
            .unwrap_or_default();
        match &header {
            None => header = Some(head),
            Some(h0) if *h0 != head => {
                return Err(Failure::input(format!(
                    "{}: its columns differ from the other shards'",
                    path.display()
                )))
            }
            Some(_) => {}
        }
        readers.push((path, lines));
    }
    let w = staging
        .writer(h)
        .ok_or_else(|| Failure::output("internal: no output"))?;
    let io = |e: std::io::Error| Failure::output(format!("{target}: {e}"));
    writeln!(w, "{}", header.unwrap_or_default()).map_err(io)?;
    let index_of = |line: &str| line.split(',').next().and_then(|s| s.parse::<u64>().ok());
    let mut heads: Vec<Option<(u64, String)>> = Vec::new();
    for (path, lines) in readers.iter_mut() {
        heads.push(next_row(path, lines, index_of)?);
    }
    let mut rows = 0u64;
    while let Some(k) = (0..heads.len())
        .filter(|&k| heads[k].is_some())
        .min_by_key(|&k| heads[k].as_ref().map_or(u64::MAX, |h| h.0))
    {
        if let Some((_, line)) = heads[k].take() {
            writeln!(w, "{line}").map_err(io)?;
            rows += 1;
        }
        let (path, lines) = &mut readers[k];
        heads[k] = next_row(path, lines, index_of)?;
    }
    if rows != state.done {
        return Err(Failure::input(format!(
            "merge: the samples files hold {rows} rows but the partial results {} samples; a shard directory is incomplete",
            state.done
        )));
    }
    finish(
        &state,
        staging,
        &args.output,
        args.no_plot,
        args.quiet,
        None,
    )
}

type Lines = std::io::Lines<std::io::BufReader<std::fs::File>>;

fn next_row(
    path: &Path,
    lines: &mut Lines,
    index_of: impl Fn(&str) -> Option<u64>,
) -> Result<Option<(u64, String)>, Failure> {
    match lines.next() {
        None => Ok(None),
        Some(Err(e)) => Err(Failure::input(format!("{}: {e}", path.display()))),
        Some(Ok(line)) => {
            let k = index_of(&line).ok_or_else(|| {
                Failure::input(format!(
                    "{}: a row does not start with a sample index",
                    path.display()
                ))
            })?;
            Ok(Some((k, line)))
        }
    }
}
