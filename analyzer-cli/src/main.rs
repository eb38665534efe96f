//! `analyzer`: sweeps a design file over frequency and writes CSV, SVG Bode plots and figures.
//!
//! A thin front end: it parses arguments, reads and writes files, and maps errors to exit
//! codes. Every computation is in `analyzer-core`.

mod nport;
mod output;
mod pages;
mod report;
mod study;
mod whatif;

use analyzer_core::design::{self, Design};
use analyzer_core::export::{self, CsvStream, Polar};
use analyzer_core::metrics::{self, MetricOptions, Trace};
use analyzer_core::response::{Analysis, AnalysisError, ResponseUnit};
use analyzer_core::review::{
    self,
    plots::{Drawn, PlotOptions},
};
use analyzer_core::solve::SolverKind;
use analyzer_core::sweep::{self, Chunk, SweepOptions};
use analyzer_core::units::{parse_value, Quantity};
use clap::{Args, Parser, Subcommand, ValueEnum};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

// The allocator of the binary: glibc's returns large freed blocks to the system and takes
// page faults to get them back, chunk after chunk, far more so with several threads (62,733
// page faults against 162 for 40 sweeps of 200,000 points on 2 threads).
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// Exit code: a figure failed a check the user asked for.
pub const EXIT_CHECK_FAILED: u8 = 1;
/// Exit code: bad input (design file, arguments) or a network that cannot be solved.
pub const EXIT_BAD_INPUT: u8 = 2;
/// Exit code: an output could not be written.
pub const EXIT_OUTPUT: u8 = 3;

#[derive(Parser, Debug)]
#[command(
    name = "analyzer",
    version,
    about = "Frequency response of linear networks: magnitude, phase, group delay and the figures a design review asks for.",
    long_about = "Frequency response of linear networks by the phasor method.\n\n\
        A design file (TOML) describes the network's parts, the sweep and the responses to read \
        (voltage ratios, transfer impedances, driving-point impedances, loop gains). `analyzer \
        sweep` solves the network at every frequency of the sweep and writes, per response, a CSV \
        of magnitude and phase and an SVG Bode plot, and prints the −3 dB points, peaks, notches, \
        resonances with their Q, group delay and loop margins.\n\n\
        Exit codes: 0 success; 1 a requested check failed; 2 bad input or usage, or a network \
        that cannot be solved; 3 an output file could not be written.",
    after_help = "Examples:\n  analyzer sweep sweeps/soil-probe-antialias.toml -o out/\n  analyzer sweep design.toml --only gain -o - > gain.csv\n  analyzer check design.toml"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Solve a design over its frequency sweep; write CSV and SVG per response and print figures.
    Sweep(Box<SweepArgs>),
    /// Read a design and check its topology without sweeping; print what it contains.
    Check {
        /// The design file (TOML).
        design: PathBuf,
    },
    /// Tolerance study: draw the toleranced values N times, solve each sample, and report
    /// the spread of every figure, each limit's yield and the envelope of each response.
    Spread(Box<study::SpreadArgs>),
    /// Combine the partial results of `spread --shard K/M` runs into the whole study.
    Merge(study::MergeArgs),
    /// Which value moves which figure: the sensitivity of every figure and limit margin to
    /// +1 % of every part value, ranked, by the adjoint method.
    Sensitivity(Box<whatif::SensitivityArgs>),
    /// Worst case per limit: the corner of the tolerance box that lowers its margin most,
    /// predicted from the sensitivities and verified by re-solving.
    Corners(Box<whatif::CornersArgs>),
    /// The design swept once per value of a part (--step) or moved to preferred values
    /// (--snap E24): overlaid plots, CSVs per variant, figures side by side.
    Variants(Box<whatif::VariantsArgs>),
    /// One self-contained HTML page for a design review (review.html), with the CSVs, plots
    /// and figures JSON beside it: verdict, parts, plots, figures, limits, tolerance study,
    /// ports, caution and provenance.
    Review(Box<pages::ReviewArgs>),
    /// The design's `[ports]` as an N-port: S-parameters (CSV and Touchstone), return loss,
    /// VSWR, insertion loss, reciprocity and passivity.
    Ports(Box<nport::PortsArgs>),
}

#[derive(Args, Debug)]
pub(crate) struct SweepArgs {
    /// The design file (TOML).
    design: PathBuf,
    /// Output directory for RESPONSE.csv and RESPONSE.svg, or `-` for CSV on stdout only
    /// (figures then go to stderr). Default: a directory named after the design, beside it in
    /// the current directory (`DESIGN-response/`).
    #[arg(short, long, value_name = "DIR|-")]
    output: Option<String>,
    /// First frequency, overriding the design (e.g. `20 Hz`, `1k`).
    #[arg(long, value_name = "FREQ")]
    from: Option<String>,
    /// Last frequency, overriding the design.
    #[arg(long, value_name = "FREQ")]
    to: Option<String>,
    /// Log-spaced sweep with this many points per decade (overrides the design's spacing).
    #[arg(long, value_name = "N", conflicts_with = "points")]
    per_decade: Option<f64>,
    /// Linearly spaced sweep with this many points (overrides the design's spacing).
    #[arg(long, value_name = "N")]
    points: Option<usize>,
    /// Change a value before sweeping, e.g. `--set R2=4k7` or `--set U1.gbw=3MHz`
    /// (repeatable).
    #[arg(long, value_name = "NAME=VALUE")]
    set: Vec<String>,
    /// Compute only these responses (comma-separated names from the design).
    #[arg(long, value_name = "NAMES", value_delimiter = ',')]
    only: Vec<String>,
    /// Add group delay: a CSV column and a third plot panel.
    #[arg(long)]
    delay: bool,
    /// Write phase wrapped to (−180°, 180°] instead of unwrapped along the sweep.
    #[arg(long)]
    wrapped: bool,
    /// Also draw these responses on one plot with a legend (comma-separated names, of one
    /// kind: all ratios, or all impedances), written as overlay-NAMES.svg.
    #[arg(long, value_name = "NAMES", value_delimiter = ',')]
    overlay: Vec<String>,
    /// Draw impedances and admittances in dB re 1 Ω or 1 S instead of on a log axis in Ω
    /// or S.
    #[arg(long)]
    impedance_db: bool,
    /// Level for the crossings, in dB relative to the reference (default for a ratio
    /// −3.0103, the half-power level; an impedance, admittance or loop gain gets crossings
    /// only when a level is given). A response's own `level_db` in the design wins.
    #[arg(long, value_name = "DB", allow_hyphen_values = true)]
    level: Option<f64>,
    /// What the level is measured from: `auto` (the passband of the network: DC gain of a
    /// low-pass, high-frequency gain of a high-pass, peak of a band-pass), `dc`, `hf`,
    /// `peak`, `absolute` (0 dB) or a frequency such as `1 kHz`. A response's own
    /// `reference` in the design wins.
    #[arg(long, value_name = "auto|dc|hf|peak|absolute|FREQ")]
    reference: Option<String>,
    /// Write the figures as JSON to FILE, or `-` for stdout.
    #[arg(long, value_name = "FILE|-")]
    json: Option<String>,
    /// Skip the SVG plots.
    #[arg(long)]
    no_plot: bool,
    /// For noise responses, also write RESPONSE-contributions.csv: each noise source's
    /// density at every frequency of the sweep.
    #[arg(long)]
    contributions: bool,
    /// Solver path (default: chosen by size and structure: small up to 16 unknowns, band
    /// when the reordered matrix is narrow, sparse otherwise).
    #[arg(long, value_enum, default_value_t = SolverArg::Auto)]
    solver: SolverArg,
    /// Worker threads (default: all cores).
    #[arg(long, value_name = "N")]
    threads: Option<usize>,
    /// Print nothing but errors.
    #[arg(short, long)]
    quiet: bool,
}

#[derive(Clone, Copy, Debug, ValueEnum)]
enum SolverArg {
    Auto,
    Small,
    Band,
    Dense,
    Sparse,
}

/// Why the streamed sweep stopped: the network, or an output.
enum Streamed {
    Analysis(AnalysisError),
    Out(Failure),
}

impl From<AnalysisError> for Streamed {
    fn from(e: AnalysisError) -> Self {
        Streamed::Analysis(e)
    }
}

/// An error with the exit code it maps to.
#[derive(Debug)]
pub struct Failure {
    code: u8,
    message: String,
}

impl Failure {
    fn input(message: impl Into<String>) -> Self {
        Failure {
            code: EXIT_BAD_INPUT,
            message: message.into(),
        }
    }
    /// An output that could not be written.
    pub fn output(message: impl Into<String>) -> Self {
        Failure {
            code: EXIT_OUTPUT,
            message: message.into(),
        }
    }
}

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { EXIT_BAD_INPUT } else { 0 };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    let result = match cli.command {
        Command::Sweep(args) => run_sweep(&args, None),
        Command::Review(args) => run_sweep(&args.sweep, Some(&args)),
        Command::Check { design } => run_check(&design),
        Command::Spread(args) => study::run_spread(&args),
        Command::Merge(args) => study::run_merge(&args),
        Command::Sensitivity(args) => whatif::run_sensitivity(&args),
        Command::Corners(args) => whatif::run_corners(&args),
        Command::Variants(args) => whatif::run_variants(&args),
        Command::Ports(args) => nport::run_ports(&args),
    };
    match result {
        Ok(code) => ExitCode::from(code),
        Err(f) => {
            eprintln!("error: {}", f.message);
            ExitCode::from(f.code)
        }
    }
}

/// Reads a design for an analysis of its responses (every command but `ports`).
pub(crate) fn load(path: &Path) -> Result<Design, Failure> {
    let d = load_any(path)?;
    if d.responses.is_empty() {
        return Err(Failure::input(format!(
            "{}:1:1: {}",
            path.display(),
            design::NO_RESPONSES
        )));
    }
    Ok(d)
}

/// Reads a design, which may hold `[ports]` and no responses.
pub(crate) fn load_any(path: &Path) -> Result<Design, Failure> {
    let shown = path.display();
    let meta = std::fs::metadata(path).map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    if meta.len() > design::MAX_DESIGN_BYTES as u64 {
        return Err(Failure::input(format!(
            "{shown}: the file is {} bytes, more than the limit of 64 MiB for a design",
            meta.len()
        )));
    }
    let text =
        std::fs::read_to_string(path).map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    design::parse(&text).map_err(|e| Failure::input(format!("{shown}:{e}")))
}

pub(crate) fn print_warnings(d: &Design, path: &Path) {
    for w in &d.warnings {
        eprintln!("warning: {}:{w}", path.display());
    }
}

fn run_check(path: &Path) -> Result<u8, Failure> {
    let d = load_any(path)?;
    let shown = path.display();
    print_warnings(&d, path);
    let names: Vec<String> = d.responses.iter().map(|r| r.name.clone()).collect();
    let port_names: Vec<String> = d.ports.iter().map(|p| p.name.clone()).collect();
    let grid = d.sweep.grid();
    let analysis = Analysis::new(d.network, d.responses)
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    // Every check a sweep makes before it writes anything: the 0 Hz checks when the sweep
    // includes 0 Hz, the solver's structural analysis, and the network solved at the
    // sweep's first, middle and last frequencies (an op-amp without feedback, a singular
    // or untrustworthy solution, a ratio with a zero denominator show there).
    if grid.as_ref().is_ok_and(|g| g.has_dc()) {
        analysis
            .check_dc()
            .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    }
    let ev = analysis
        .evaluator()
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    let trial: Vec<f64> = match &grid {
        Ok(g) => {
            let mut v = vec![g.at(0), g.at(g.len() / 2), g.at(g.len().saturating_sub(1))];
            v.dedup();
            v
        }
        Err(_) => vec![1e3],
    };
    let mut ws = ev.workspace();
    for f in trial {
        ev.at(&mut ws, f, false)
            .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    }
    let net = analysis.network();
    println!("{shown}: {}", net.title);
    println!(
        "  {} parts, {} nodes besides gnd, {} unknowns",
        net.parts().len(),
        net.node_count() - 1,
        analysis.system().n
    );
    if !names.is_empty() {
        println!("  responses: {}", names.join(", "));
    }
    if !port_names.is_empty() {
        println!("  ports: {}", port_names.join(", "));
    }
    match &grid {
        Ok(g) => println!("  sweep: {}", g.describe()),
        Err(e) => println!("  sweep: {e}"),
    }
    println!(
        "  topology: no floating nodes, no loops of voltage sources; solved at the sweep's ends and middle"
    );
    // The parts, as read (a long generated network shows its first and last ones).
    const SHOWN: usize = 40;
    let parts = net.parts();
    let rows: Vec<[String; 5]> = parts
        .iter()
        .enumerate()
        .filter(|(i, _)| parts.len() <= SHOWN || *i < SHOWN / 2 || *i >= parts.len() - SHOWN / 2)
        .map(|(_, p)| {
            [
                p.name.clone(),
                p.kind.word().to_string(),
                p.value_text(net),
                p.tolerance_text(),
                p.nodes_text(net),
            ]
        })
        .collect();
    let width = |c: usize| rows.iter().map(|r| r[c].chars().count()).max().unwrap_or(0);
    let w: Vec<usize> = (0..4).map(width).collect();
    println!("  parts:");
    for (k, r) in rows.iter().enumerate() {
        if parts.len() > SHOWN && k == SHOWN / 2 {
            println!("    … {} more …", parts.len() - SHOWN);
        }
        let pad =
            |s: &str, n: usize| format!("{s}{}", " ".repeat(n.saturating_sub(s.chars().count())));
        println!(
            "    {}  {}  {}  {}  {}",
            pad(&r[0], w[0]),
            pad(&r[1], w[1]),
            pad(&r[2], w[2]),
            pad(&r[3], w[3]),
            r[4]
        );
    }
    if d.caution {
        println!("\n{}", report::CAUTION);
    }
    Ok(0)
}

/// Applies `--set NAME=VALUE` changes to a design's network.
pub(crate) fn apply_sets(d: &mut Design, sets: &[String]) -> Result<(), Failure> {
    let mut changes = Vec::new();
    for s in sets {
        let (t, v) = analyzer_core::variants::parse_set(&d.network, s)
            .map_err(|e| Failure::input(format!("--set {s}: {e}")))?;
        changes.push((t.part, t.param, v));
    }
    if !changes.is_empty() {
        d.network = d
            .network
            .with_values(&changes)
            .map_err(|e| Failure::input(format!("--set: {e}")))?;
    }
    Ok(())
}

/// Sets the size of rayon's pool (None: all cores).
pub(crate) fn set_threads(threads: Option<usize>) -> Result<(), Failure> {
    if let Some(n) = threads {
        if n == 0 {
            return Err(Failure::input("--threads must be at least 1"));
        }
        // Only fails if the pool was already built, which it is not at this point.
        let _ = rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build_global();
    }
    Ok(())
}

fn run_sweep(args: &SweepArgs, review: Option<&pages::ReviewArgs>) -> Result<u8, Failure> {
    set_threads(args.threads)?;
    if review.is_some() && args.output.as_deref() == Some("-") {
        return Err(Failure::input(
            "-o -: a review is a page with files beside it; give a directory (e.g. -o review/)",
        ));
    }
    if args.output.as_deref() == Some("-") && args.json.as_deref() == Some("-") {
        return Err(Failure::input(
            "-o - and --json - would both write to stdout; send one of them to a file (e.g. --json figures.json)",
        ));
    }
    if let Some(o) = args.output.as_deref().filter(|o| *o != "-") {
        if Path::new(o).is_file() {
            return Err(Failure::input(format!(
                "-o {o}: that is a file; -o takes a directory for RESPONSE.csv and RESPONSE.svg (made if missing), or - for CSV on stdout"
            )));
        }
    }
    let mut d = load(&args.design)?;
    if !args.quiet {
        print_warnings(&d, &args.design);
    }
    apply_sets(&mut d, &args.set)?;
    let shown = args.design.display().to_string();
    let freq = |s: &str, flag: &str| {
        parse_value(s, Quantity::Frequency).map_err(|e| Failure::input(format!("--{flag}: {e}")))
    };
    if let Some(f) = &args.from {
        d.sweep.from = Some(freq(f, "from")?);
        d.sweep.at = None;
    }
    if let Some(t) = &args.to {
        d.sweep.to = Some(freq(t, "to")?);
        d.sweep.at = None;
    }
    if let Some(n) = args.per_decade {
        d.sweep.per_decade = Some(n);
        d.sweep.points = None;
        d.sweep.at = None;
    }
    if let Some(n) = args.points {
        d.sweep.points = Some(n);
        d.sweep.at = None;
    }
    if d.sweep.at.is_none() && (d.sweep.from.is_none() || d.sweep.to.is_none()) {
        return Err(Failure::input(format!(
            "{shown}: the sweep range is not given: add [sweep] from and to, or pass --from and --to"
        )));
    }
    let grid = d
        .sweep
        .grid()
        .map_err(|e| Failure::input(format!("{shown}: sweep: {e}")))?;
    if !args.only.is_empty() {
        for name in &args.only {
            if !d.responses.iter().any(|r| &r.name == name) {
                let known: Vec<&str> = d.responses.iter().map(|r| r.name.as_str()).collect();
                return Err(Failure::input(format!(
                    "--only: the design has no response {name:?} (it has: {})",
                    known.join(", ")
                )));
            }
        }
        d.responses.retain(|r| args.only.contains(&r.name));
    }
    let cli_reference = match &args.reference {
        Some(r) => Some(
            design::parse_reference(r).map_err(|m| Failure::input(format!("--reference: {m}")))?,
        ),
        None => None,
    };
    if args.level.is_some_and(|l| !l.is_finite()) {
        return Err(Failure::input("--level must be a finite number of dB"));
    }
    let solver = match args.solver {
        SolverArg::Auto => SolverKind::Auto,
        SolverArg::Small => SolverKind::Small,
        SolverArg::Band => SolverKind::Band,
        SolverArg::Dense => SolverKind::Dense,
        SolverArg::Sparse => SolverKind::Sparse,
    };
    let caution = d.caution;
    let limits = d.limits.clone();
    let design_ports = d.ports.clone();
    let port_limits = d.port_limits.clone();
    let ports_network = (review.is_some() && !design_ports.is_empty()).then(|| d.network.clone());
    let analysis = Analysis::new(d.network, d.responses)
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?
        .with_solver(solver);
    let ev = analysis
        .evaluator()
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    let opts = SweepOptions {
        derivatives: args.delay,
        sequential: false,
    };
    let to_stdout = args.output.as_deref() == Some("-");
    let out_dir = match &args.output {
        Some(o) if o != "-" => PathBuf::from(o),
        _ => {
            let stem = args
                .design
                .file_stem()
                .map_or_else(|| "design".into(), |s| s.to_string_lossy().to_string());
            let what = if review.is_some() {
                "review"
            } else {
                "response"
            };
            PathBuf::from(format!("{stem}-{what}"))
        }
    };
    let specs = analysis.responses();
    let nr = specs.len();

    // Stream: each chunk of the sweep goes to the CSVs and into the compact traces the
    // figures and plots are computed from, so memory stays flat however long the sweep.
    let mut staging = output::Staging::default();
    let mut csv = Vec::with_capacity(nr);
    if !to_stdout {
        for spec in specs {
            let path = out_dir.join(format!("{}.csv", output::safe_file_name(&spec.name)));
            let h = staging.create(&path)?;
            let w = staging
                .writer(h)
                .ok_or_else(|| Failure::output("internal: no output"))?;
            let meta = [(
                spec.name.as_str(),
                spec.kind.unit(),
                args.delay,
                !args.wrapped,
            )];
            let stream = CsvStream::start(w, &meta)
                .map_err(|e| Failure::output(format!("{}: {e}", path.display())))?;
            csv.push((h, stream));
        }
    }
    // Not locked for the whole run: the sink may run on any of rayon's threads, and the
    // buffer takes the lock once per megabyte.
    let mut stdout = std::io::BufWriter::with_capacity(1 << 20, std::io::stdout());
    let mut stdout_csv = if to_stdout {
        let meta: Vec<(&str, ResponseUnit, bool, bool)> = specs
            .iter()
            .map(|s| (s.name.as_str(), s.kind.unit(), args.delay, !args.wrapped))
            .collect();
        Some(
            CsvStream::start(&mut stdout, &meta)
                .map_err(|e| Failure::output(format!("stdout: {e}")))?,
        )
    } else {
        None
    };
    let mut traces: Vec<Trace> = (0..nr).map(|_| Trace::new(args.delay)).collect();
    let started = std::time::Instant::now();
    let streamed = sweep::run_chunks(&ev, &grid, &opts, sweep::CHUNK_POINTS, |c: Chunk<'_>| {
        let delay = |r: usize| c.delays.map(|d| d[r].as_slice());
        // Magnitude and phase once per response, shared by the trace and every CSV.
        let polar: Vec<Polar> = traces
            .iter_mut()
            .enumerate()
            .map(|(r, t)| t.push(&c.values[r], delay(r)))
            .collect();
        if let Some(stream) = stdout_csv.as_mut() {
            let values: Vec<&[_]> = c.values.iter().map(Vec::as_slice).collect();
            let polar: Vec<&Polar> = polar.iter().collect();
            let delays: Vec<Option<&[f64]>> = (0..nr).map(delay).collect();
            stream
                .rows(&mut stdout, c.freqs, &values, &polar, &delays)
                .map_err(|e| Streamed::Out(Failure::output(format!("stdout: {e}"))))?;
        }
        for (r, (h, stream)) in csv.iter_mut().enumerate() {
            let target = staging.target(*h);
            let w = staging
                .writer(*h)
                .ok_or_else(|| Streamed::Out(Failure::output("internal: no output")))?;
            stream
                .rows(w, c.freqs, &[&c.values[r]], &[&polar[r]], &[delay(r)])
                .map_err(|e| Streamed::Out(Failure::output(format!("{target}: {e}"))))?;
        }
        Ok::<(), Streamed>(())
    });
    match streamed {
        Ok(()) => {}
        Err(Streamed::Analysis(e)) => return Err(Failure::input(format!("{shown}: {e}"))),
        Err(Streamed::Out(f)) => return Err(f),
    }
    stdout
        .flush()
        .map_err(|e| Failure::output(format!("stdout: {e}")))?;
    let solve_time = started.elapsed();

    let figures = (0..nr)
        .map(|i| {
            let spec = &specs[i];
            let opts = MetricOptions {
                level_db: spec.level_db.or(args.level),
                reference: spec.reference.or(cli_reference).unwrap_or_default(),
            };
            metrics::response_figures(&ev, &grid, &traces[i], i, &opts)
        })
        .collect::<Result<Vec<_>, _>>()
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    // Limits on responses left out by --only are not checked.
    let mut checks = Vec::new();
    for limit in &limits {
        if let Some(i) = specs.iter().position(|r| r.name == limit.response) {
            let r = metrics::check_limit(&ev, &grid, &traces[i], i, &figures[i], limit)
                .map_err(|e| Failure::input(format!("{shown}: limit {}: {e}", limit.name)))?;
            checks.push(r);
        }
    }
    // Poles and zeros of each response where they were computed: a CSV beside the plots.
    if !to_stdout {
        for (spec, f) in specs.iter().zip(&figures) {
            if f.poles.rows.is_empty() {
                continue;
            }
            let stem = output::safe_file_name(&spec.name);
            let mut csv_text = Vec::new();
            export::write_poles_csv(&mut csv_text, &f.poles.rows)
                .map_err(|e| Failure::output(format!("{}-poles.csv: {e}", spec.name)))?;
            staging.bytes(&out_dir.join(format!("{stem}-poles.csv")), &csv_text)?;
        }
    }
    // Noise: each source's density over the sweep, on request.
    if !to_stdout && args.contributions {
        for (i, spec) in specs.iter().enumerate() {
            if let Some(plan) = ev.noise_plan(i) {
                let path = out_dir.join(format!(
                    "{}-contributions.csv",
                    output::safe_file_name(&spec.name)
                ));
                let text = output::contributions_csv(&ev, i, plan, &grid)
                    .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
                staging.bytes(&path, &text)?;
            }
        }
    }
    // The plots of each response (Bode or noise plot first, then its Nyquist chart and its
    // pole-zero chart), and the overlay, kept for the review page as well as written.
    let plot_opts = PlotOptions {
        wrapped: args.wrapped,
        impedance_db: args.impedance_db,
    };
    let mut plots: Vec<Vec<(PathBuf, review::Plot)>> = vec![Vec::new(); nr];
    let mut overlays: Vec<(PathBuf, review::Plot)> = Vec::new();
    if !to_stdout && (!args.no_plot || review.is_some()) {
        let title = &analysis.network().title;
        for (i, spec) in specs.iter().enumerate() {
            let stem = output::safe_file_name(&spec.name);
            let drawn = [Drawn {
                spec,
                trace: &traces[i],
                figures: &figures[i],
            }];
            let main = if ev.noise_plan(i).is_some() {
                output::noise_svg(title, &ev, i, &grid, &figures[i])
                    .map_err(|e| Failure::input(format!("{shown}: {e}")))?
                    .map(|svg| (svg, "noise density and its largest contributors"))
            } else {
                output::svg(title, &grid, &drawn, &limits, plot_opts)?
                    .map(|svg| (svg, "Bode plot: magnitude and phase over frequency, figures marked, limits shaded"))
            };
            match main {
                Some((svg, caption)) => plots[i].push((
                    out_dir.join(format!("{stem}.svg")),
                    review::Plot {
                        caption: caption.into(),
                        svg,
                    },
                )),
                None if !args.quiet => eprintln!(
                    "note: no plot of {}: the sweep has no frequency above 0 Hz",
                    spec.name
                ),
                None => {}
            }
            if spec.loop_gain {
                if let Some(svg) = output::nyquist_svg(title, spec, &grid, &traces[i], &figures[i])
                {
                    plots[i].push((
                        out_dir.join(format!("{stem}-nyquist.svg")),
                        review::Plot {
                            caption: "Nyquist chart (radius log-compressed beyond the unit circle)"
                                .into(),
                            svg,
                        },
                    ));
                }
            }
            if !figures[i].poles.rows.is_empty() {
                let svg = export::render_pole_zero_svg(
                    &format!("{title} — {}: poles × and zeros ○", spec.name),
                    &figures[i].poles.rows,
                )
                .map_err(|e| Failure::input(format!("response {}: {e}", spec.name)))?;
                plots[i].push((
                    out_dir.join(format!("{stem}-poles.svg")),
                    review::Plot {
                        caption: "poles × and zeros ○ in the s-plane".into(),
                        svg,
                    },
                ));
            }
        }
        if !args.overlay.is_empty() {
            let mut drawn = Vec::new();
            for name in &args.overlay {
                let i = specs.iter().position(|s| &s.name == name).ok_or_else(|| {
                    let known: Vec<&str> = specs.iter().map(|r| r.name.as_str()).collect();
                    Failure::input(format!(
                        "--overlay: no response {name:?} was computed (there are: {})",
                        known.join(", ")
                    ))
                })?;
                drawn.push(Drawn {
                    spec: &specs[i],
                    trace: &traces[i],
                    figures: &figures[i],
                });
            }
            if let Some(svg) = output::svg(title, &grid, &drawn, &limits, plot_opts)? {
                let stem: Vec<String> = args
                    .overlay
                    .iter()
                    .map(|n| output::safe_file_name(n))
                    .collect();
                overlays.push((
                    out_dir.join(format!("overlay-{}.svg", stem.join("-"))),
                    review::Plot {
                        caption: format!("{} overlaid", args.overlay.join(", ")),
                        svg,
                    },
                ));
            }
        }
        if !args.no_plot {
            for (path, p) in plots.iter().flatten().chain(&overlays) {
                staging.bytes(path, p.svg.as_bytes())?;
            }
        }
    }
    let json_text = (args.json.is_some() || review.is_some())
        .then(|| report::json(&analysis, &grid, &figures, &checks, caution));
    if let (Some(j), Some(text)) = (&args.json, &json_text) {
        if j != "-" {
            staging.bytes(Path::new(j), text.as_bytes())?;
        }
    }
    let mut port_failed: Vec<String> = Vec::new();
    if let (Some(r), Some(text)) = (review, &json_text) {
        staging.bytes(&out_dir.join("figures.json"), text.as_bytes())?;
        let opts: Vec<MetricOptions> = specs
            .iter()
            .map(|spec| MetricOptions {
                level_db: spec.level_db.or(args.level),
                reference: spec.reference.or(cli_reference).unwrap_or_default(),
            })
            .collect();
        let tolerances = review::tolerance_results(
            &ev, &grid, opts, &limits, &figures, &checks, r.samples, r.seed,
        )
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
        let ports = match &ports_network {
            Some(net) => review::ports_section(net, &design_ports, &port_limits, &grid)
                .map_err(|e| Failure::input(format!("{shown}: {e}")))?,
            None => None,
        };
        if let Some(p) = &ports {
            port_failed.extend(
                p.limits
                    .iter()
                    .filter(|c| !c.pass)
                    .map(|c| c.limit.name.clone()),
            );
        }
        let mut files: Vec<String> = staging
            .targets()
            .iter()
            .filter_map(|p| p.file_name().map(|n| n.to_string_lossy().to_string()))
            .collect();
        files.sort();
        let provenance = pages::provenance(&args.design, files)?;
        let per_response: Vec<Vec<review::Plot>> = plots
            .into_iter()
            .map(|v| v.into_iter().map(|(_, p)| p).collect())
            .collect();
        let overlay_plots: Vec<review::Plot> = overlays.into_iter().map(|(_, p)| p).collect();
        let html = review::page(&review::ReviewInput {
            analysis: &analysis,
            grid: &grid,
            figures: &figures,
            checks: &checks,
            limits: &limits,
            caution,
            plots: &per_response,
            overlays: &overlay_plots,
            ports,
            tolerances: &tolerances,
            provenance: &provenance,
        });
        staging.bytes(&out_dir.join("review.html"), html.as_bytes())?;
    }
    let written = staging.commit()?;
    if let (Some("-"), Some(text)) = (args.json.as_deref(), &json_text) {
        println!("{text}");
    }
    if !args.quiet {
        let table = report::table(
            &analysis,
            &grid,
            &figures,
            &checks,
            caution,
            solve_time,
            ev.solver_kind(),
        );
        let files: Vec<String> = written.iter().map(|p| p.display().to_string()).collect();
        let text = if files.is_empty() {
            table
        } else {
            format!("{table}\nwrote {}\n", files.join(", "))
        };
        if to_stdout || args.json.as_deref() == Some("-") {
            eprint!("{text}");
        } else {
            print!("{text}");
        }
    }
    let failed: Vec<&str> = checks
        .iter()
        .filter(|c| !c.pass)
        .map(|c| c.limit.name.as_str())
        .chain(port_failed.iter().map(String::as_str))
        .collect();
    if !failed.is_empty() {
        eprintln!("check failed: {}", failed.join(", "));
        return Ok(EXIT_CHECK_FAILED);
    }
    Ok(0)
}
