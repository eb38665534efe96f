//! Reference suite: checks of analyzer-core against closed forms, published prototype
//! tables and fixtures written by a reference library (scipy.signal, see
//! `tests/reference/make_fixtures.py`). This file holds the helpers the checks share.

use analyzer_core::design;
use analyzer_core::network::{Network, NodeId, PartId, PartKind};
use analyzer_core::response::{Analysis, Point};
use analyzer_core::stamp::System;
use analyzer_core::sweep::{self, Grid, Sweep, SweepOptions};
use num_complex::Complex64;

/// Parses a design and sets up its analysis; panics with the error text on bad input.
pub fn analysis(toml: &str) -> Analysis {
    let d = design::parse(toml).unwrap_or_else(|e| panic!("design: {e}"));
    Analysis::new(d.network, d.responses).unwrap_or_else(|e| panic!("analysis: {e}"))
}

/// All responses at one frequency, with derivatives.
pub fn at(a: &Analysis, f: f64) -> Vec<Point> {
    let ev = a.evaluator().expect("evaluator");
    let mut ws = ev.workspace();
    ev.at(&mut ws, f, true).expect("solve").to_vec()
}

/// Value of response `i` at `f`.
pub fn value(a: &Analysis, i: usize, f: f64) -> Complex64 {
    at(a, f)[i].value
}

/// A full sweep.
pub fn run(a: &Analysis, grid: &Grid, derivatives: bool) -> Sweep {
    let ev = a.evaluator().expect("evaluator");
    sweep::run(
        &ev,
        grid,
        &SweepOptions {
            derivatives,
            sequential: false,
        },
    )
    .expect("sweep")
}

/// Every figure of response `i` swept over `grid`, with its poles and zeros computed as the
/// CLI does (scaled to the sweep's geometric centre).
pub fn figures(
    a: &Analysis,
    grid: &Grid,
    i: usize,
    opts: &analyzer_core::metrics::MetricOptions,
) -> analyzer_core::metrics::Figures {
    let ev = a.evaluator().expect("evaluator");
    let s = sweep::run(&ev, grid, &SweepOptions::default()).expect("sweep");
    let trace = analyzer_core::metrics::Trace::from_values(&s.values[i], None);
    let (lo, hi) = grid.bounds();
    let lo = if lo > 0.0 { lo } else { hi * 1e-6 };
    let w = 2.0 * std::f64::consts::PI * (lo * hi).sqrt();
    let (pz, note) = match analyzer_core::poles::pole_zero(a, i, Some(w)) {
        Ok(p) => (Some(p), None),
        Err(e) => (None, Some(e.to_string())),
    };
    analyzer_core::metrics::figures(&ev, grid, &trace, i, opts, pz.as_ref(), note).expect("figures")
}

/// Relative difference |a − b| / |b|.
pub fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs()
}

/// Reads a fixture CSV (comment lines start with '#', then a header) into rows of numbers.
pub fn fixture(name: &str) -> Vec<Vec<f64>> {
    let path = format!("{}/fixtures/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    text.lines()
        .filter(|l| !l.starts_with('#'))
        .skip(1)
        .map(|l| l.split(',').map(|x| x.parse().expect("number")).collect())
        .collect()
}

/// A doubly terminated LC ladder from low-pass prototype values `g` (series inductor first),
/// source and load `r0`, cut-off `fc`, as a design file.
pub fn ladder_design(title: &str, g: &[f64], r0: f64, rload: f64, fc: f64) -> String {
    let wc = 2.0 * std::f64::consts::PI * fc;
    let mut s = format!(
        "title = \"{title}\"\n[parts]\nV1 = {{ voltage = \"1\", between = [\"src\", \"gnd\"] }}\nRs = {{ resistor = {r0:e}, between = [\"src\", \"n0\"] }}\n"
    );
    let mut node = 0;
    for (k, gk) in g.iter().enumerate() {
        if k % 2 == 0 {
            let l = gk * r0 / wc;
            s += &format!(
                "L{k} = {{ inductor = {l:e}, between = [\"n{node}\", \"n{}\"] }}\n",
                node + 1
            );
            node += 1;
        } else {
            let c = gk / (r0 * wc);
            s += &format!("C{k} = {{ capacitor = {c:e}, between = [\"n{node}\", \"gnd\"] }}\n");
        }
    }
    s += &format!("RL = {{ resistor = {rload:e}, between = [\"n{node}\", \"gnd\"] }}\n");
    s += &format!("[responses]\ngain = {{ ratio = [\"n{node}\", \"src\"] }}\n");
    s
}

/// Every part as branches (first node, second node, current flowing through it from the
/// first to the second) on solution `x` at angular frequency `w`: two-terminal parts and
/// source outputs as they are, a cccs with its controlled current, an op-amp output as a
/// branch from gnd into its output node. Controlled sources' sensing ports carry no current.
pub fn branches(
    net: &Network,
    sys: &System,
    x: &[Complex64],
    w: f64,
) -> Vec<(NodeId, NodeId, Complex64)> {
    let current = |id: PartId| sys.current_readout(net, id).map(|r| r.eval(x, w, true));
    let mut out = Vec::new();
    for (k, p) in net.parts().iter().enumerate() {
        let id = PartId(k);
        let branch = match p.kind {
            PartKind::Resistor { a, b, .. }
            | PartKind::Capacitor { a, b, .. }
            | PartKind::Inductor { a, b, .. } => current(id).map(|i| (a, b, i)),
            PartKind::VoltageSource { plus, minus, .. }
            | PartKind::Vcvs { plus, minus, .. }
            | PartKind::Ccvs { plus, minus, .. } => current(id).map(|i| (plus, minus, i)),
            PartKind::CurrentSource { from, to, .. } | PartKind::Vccs { from, to, .. } => {
                current(id).map(|i| (from, to, i))
            }
            PartKind::Cccs {
                from,
                to,
                control,
                gain,
            } => current(control).map(|i| (from, to, i * gain)),
            PartKind::IdealOpamp { output, .. } | PartKind::SinglePoleOpamp { output, .. } => {
                current(id).map(|i| (NodeId::GROUND, output, i))
            }
            PartKind::Coupling { .. } => None,
        };
        out.extend(branch);
    }
    out
}
