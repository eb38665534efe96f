//! Reference suite: checks of analyzer-core against closed forms, published prototype
//! tables and fixtures written by a reference library (scipy.signal, see
//! `tests/reference/make_fixtures.py`). This file holds the helpers the checks share.

use analyzer_core::design;
use analyzer_core::network::{Network, NodeId, PartId, PartKind};
use analyzer_core::response::{Analysis, Point};
use analyzer_core::stamp::System;
use analyzer_core::sweep::{self, Grid, Sweep, SweepOptions};
use num_complex::Complex64;
use std::f64::consts::PI;

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

/// Chebyshev prototype element values by the closed-form design equations for a doubly
/// terminated ladder (published, e.g. in the standard filter-design handbooks):
/// β = ln(coth(A/17.37)), γ = sinh(β/2n), a_k = sin((2k−1)π/2n), b_k = γ² + sin²(kπ/n),
/// g1 = 2a1/γ, g_k = 4a_{k−1}a_k/(b_{k−1}g_{k−1}).
pub fn chebyshev_g(n: usize, ripple_db: f64) -> Vec<f64> {
    let beta = (1.0 / (ripple_db / 17.371_779_276_130_07).tanh()).ln();
    let gamma = (beta / (2.0 * n as f64)).sinh();
    let a = |k: usize| ((2 * k - 1) as f64 * PI / (2 * n) as f64).sin();
    let b = |k: usize| gamma * gamma + (k as f64 * PI / n as f64).sin().powi(2);
    let mut g = vec![2.0 * a(1) / gamma];
    for k in 2..=n {
        let prev = g[k - 2];
        g.push(4.0 * a(k - 1) * a(k) / (b(k - 1) * prev));
    }
    g
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

/// Values of the quartz-crystal model of the reference checks (a 10 MHz fundamental of our
/// own choosing): motional arm R1, L1, C1 in series, shunted by the holder capacitance C0.
/// Q of the series arm (1/R1)·√(L1/C1) ≈ 43,000.
pub const CRYSTAL: (f64, f64, f64, f64) = (18.5, 12.6651e-3, 20e-15, 5e-12);

/// The crystal's impedance as a design: `z` between its terminals `x` and `gnd`.
pub fn crystal_design() -> String {
    let (r1, l1, c1, c0) = CRYSTAL;
    format!(
        r#"title = "crystal"
[parts]
R1 = {{ resistor = {r1:e}, between = ["x", "m1"] }}
L1 = {{ inductor = {l1:e}, between = ["m1", "m2"] }}
C1 = {{ capacitor = {c1:e}, between = ["m2", "gnd"] }}
C0 = {{ capacitor = {c0:e}, between = ["x", "gnd"] }}
[responses]
z = {{ impedance = ["x", "gnd"] }}
"#
    )
}

/// The crystal feeding a 50 Ω load from a 1 V source: `gain`, the voltage across the load,
/// a band-pass at the series resonance with a notch at the parallel one.
pub fn crystal_filter_design() -> String {
    let (r1, l1, c1, c0) = CRYSTAL;
    format!(
        r#"title = "crystal filter"
[parts]
V1 = {{ voltage = "1", between = ["src", "gnd"] }}
R1 = {{ resistor = {r1:e}, between = ["src", "m1"] }}
L1 = {{ inductor = {l1:e}, between = ["m1", "m2"] }}
C1 = {{ capacitor = {c1:e}, between = ["m2", "out"] }}
C0 = {{ capacitor = {c0:e}, between = ["src", "out"] }}
RL = {{ resistor = "50", between = ["out", "gnd"] }}
[responses]
gain = {{ ratio = ["out", "src"] }}
"#
    )
}

/// A third-order doubly terminated LC low-pass (about 1 MHz, 50 Ω) with tolerances on every
/// part and two limits: the design the tolerance and sensitivity checks share.
pub const LADDER_WITH_LIMITS: &str = r#"
title = "third-order ladder with limits"
[sweep]
from = "1 kHz"
to = "10 MHz"
per_decade = 30
[tolerances]
resistor = "1%"
capacitor = "5%"
inductor = "10%"
distribution = "normal"
[parts]
V1 = { voltage = "1", between = ["src", "gnd"] }
Rs = { resistor = "50", between = ["src", "a"] }
C1 = { capacitor = "3.18n", between = ["a", "gnd"] }
L2 = { inductor = "15.9u", between = ["a", "b"] }
C3 = { capacitor = "3.18n", between = ["b", "gnd"] }
RL = { resistor = "50", between = ["b", "gnd"] }
[responses]
gain = { ratio = ["b", "src"] }
zin = { impedance = ["a", "gnd"] }
[limits]
flat = { response = "gain", from = "1 kHz", to = "400 kHz", min_db = -6.6, max_db = -5.9 }
stop = { response = "gain", from = "4 MHz", to = "10 MHz", max_db = -40 }
"#;
