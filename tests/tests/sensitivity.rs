//! Sensitivities by the adjoint method against closed forms (an RC low-pass's cut-off, the
//! unity-gain Sallen–Key section's f0 and Q) and against finite differences of the system
//! itself (every element kind's derivative stamp; every value's S on a network with every
//! kind; limit margins re-solved).

use analyzer_core::design;
use analyzer_core::metrics::{self, MetricOptions};
use analyzer_core::network::Param;
use analyzer_core::response::Analysis;
use analyzer_core::sensitivity::{self, Per};
use analyzer_core::stamp::System;
use analyzer_core::sweep::Grid;
use num_complex::Complex64;

/// Every element kind, with current-controlled sources reading a resistor and a capacitor
/// (whose read-outs scale with their values) and a coupling between two inductors.
const EVERY_KIND: &str = r#"
[parts]
V1 = { voltage = "1 V", between = ["a", "gnd"] }
R1 = { resistor = "100", between = ["a", "b"] }
L1 = { inductor = "1m", between = ["b", "c"] }
C1 = { capacitor = "1u", between = ["c", "gnd"] }
R2 = { resistor = "220", between = ["b", "d"] }
L2 = { inductor = "2m", between = ["d", "gnd"] }
coil_coupling = { coupling = ["L1", "L2"], k = 0.6 }
C2 = { capacitor = "470n", between = ["d", "e"] }
R3 = { resistor = "1k", between = ["e", "gnd"] }
doubler = { vcvs = "2", between = ["f", "gnd"], control = ["c", "gnd"] }
R4 = { resistor = "330", between = ["f", "e"] }
gm_stage = { vccs = "1m", between = ["e", "gnd"], control = ["b", "gnd"] }
sense_amp = { ccvs = "50", between = ["g", "gnd"], control = "R1" }
R5 = { resistor = "680", between = ["g", "c"] }
mirror = { cccs = "0.5", between = ["gnd", "c"], control = "C2" }
U2 = { opamp = "single-pole", noninverting = "e", inverting = "p", output = "p", dc_gain = "100k", gbw = "1 MHz" }
R8 = { resistor = "1k", between = ["p", "gnd"] }
[responses]
out = { ratio = ["p", "a"] }
through_r2 = { ratio = [{ current = "R2" }, "a"] }
into_c2 = { ratio = ["e", { current = "C2" }] }
zin = { impedance = ["b", "gnd"] }
yin = { admittance = ["d", "gnd"] }
"#;

fn dense(sys: &System) -> (Vec<f64>, Vec<f64>) {
    let n = sys.n;
    let (mut g, mut c) = (vec![0.0; n * n], vec![0.0; n * n]);
    for (k, &(r, col)) in sys.pattern.iter().enumerate() {
        g[r * n + col] += sys.g[k];
        c[r * n + col] += sys.c[k];
    }
    (g, c)
}

#[test]
fn derivative_stamps_equal_finite_differences_of_the_assembly_for_every_kind() {
    // ∂(G, C, b)/∂ln p against the central difference of System::assemble at p·e^{±h}
    // (error O(h²) ≈ 1e-12 relative; stamps linear in p, 1/p or √p).
    let d = design::parse(EVERY_KIND).unwrap();
    let net = d.network;
    let sys = System::assemble(&net);
    let n = sys.n;
    let h: f64 = 1e-6;
    let varied = net.varied();
    assert!(varied.len() >= 15);
    for v in &varied {
        let at = |x: f64| System::assemble(&net.with_values(&[(v.part, v.param, x)]).unwrap());
        let (up, down) = (at(v.nominal * h.exp()), at(v.nominal * (-h).exp()));
        let ((gu, cu), (gd, cd)) = (dense(&up), dense(&down));
        let (entries, rhs) = sys.derivative(&net, v.part, v.param);
        let (mut dg, mut dc) = (vec![0.0; n * n], vec![0.0; n * n]);
        for (r, c, a, b) in entries {
            dg[r * n + c] += a;
            dc[r * n + c] += b;
        }
        let name = &net.part(v.part).unwrap().name;
        for i in 0..n * n {
            let (fg, fc) = ((gu[i] - gd[i]) / (2.0 * h), (cu[i] - cd[i]) / (2.0 * h));
            let scale_g = gu[i].abs().max(1e-300);
            let scale_c = cu[i].abs().max(1e-300);
            assert!(
                (dg[i] - fg).abs() <= 1e-7 * scale_g,
                "{name} G[{i}]: {} vs {fg}",
                dg[i]
            );
            assert!(
                (dc[i] - fc).abs() <= 1e-7 * scale_c,
                "{name} C[{i}]: {} vs {fc}",
                dc[i]
            );
        }
        let mut db = vec![Complex64::default(); n];
        for (i, x) in rhs {
            db[i] += x;
        }
        for (i, d) in db.iter().enumerate() {
            let fd = (up.b[i] - down.b[i]) / (2.0 * h);
            assert!(
                (d - fd).norm() <= 1e-7 * (1.0 + up.b[i].norm()),
                "{name} b[{i}]"
            );
        }
    }
}

#[test]
fn adjoint_sensitivities_equal_finite_differences_for_every_value_and_response() {
    // S = ∂ln H/∂ln p from one transposed solve, against (ln H(p·e^h) − ln H(p·e^−h))/2h
    // with each value changed in turn and everything re-solved.
    let d = design::parse(EVERY_KIND).unwrap();
    let a = Analysis::new(d.network, d.responses).unwrap();
    let ev = a.evaluator().unwrap();
    let values = sensitivity::values(&ev);
    let mut ws = ev.workspace();
    let h: f64 = 1e-5;
    for f in [30.0, 1.1e3, 47e3] {
        for r in 0..a.responses().len() {
            let (p, s) = sensitivity::at(&ev, &mut ws, f, r, &values).unwrap();
            for (k, v) in values.iter().enumerate() {
                let lnh = |x: f64| {
                    let b = a.with_values(&[(v.part, v.param, x)]).unwrap();
                    let e = b.evaluator().unwrap();
                    let mut w = e.workspace();
                    e.at(&mut w, f, false).unwrap()[r].value.ln()
                };
                let up = lnh(v.nominal * h.exp());
                let down = lnh(v.nominal * (-h).exp());
                let mut fd = (up - down) / (2.0 * h);
                // The phase may wrap between the two; S's imaginary part is a slope.
                fd.im = ((up.im - down.im + std::f64::consts::PI)
                    .rem_euclid(2.0 * std::f64::consts::PI)
                    - std::f64::consts::PI)
                    / (2.0 * h);
                assert!(
                    (s[k] - fd).norm() <= 1e-6 * (1.0 + fd.norm()),
                    "{} of {} at {f} Hz: {} vs {fd} (|H| {})",
                    a.responses()[r].name,
                    v.name,
                    s[k],
                    p.value.norm()
                );
            }
        }
    }
}

fn analysis(text: &str) -> (Analysis, Grid, Vec<metrics::Limit>) {
    let d = design::parse(text).unwrap();
    let grid = d.sweep.grid().unwrap();
    (
        Analysis::new(d.network, d.responses).unwrap(),
        grid,
        d.limits,
    )
}

fn figure<'f>(
    list: &'f [sensitivity::FigureSensitivity],
    name: &str,
) -> &'f sensitivity::FigureSensitivity {
    list.iter()
        .find(|f| f.figure == name)
        .unwrap_or_else(|| panic!("no figure {name}"))
}

#[test]
fn rc_cutoff_moves_exactly_against_r_and_c() {
    // f_c = 1/(2πRC) (closed form): ∂ln f_c/∂ln R = ∂ln f_c/∂ln C = −1; the DC gain does
    // not move.
    let (a, grid, _) = analysis(
        r#"
[sweep]
from = "10 Hz"
to = "1 MHz"
[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
R1 = { resistor = "3.3k", between = ["in", "out"] }
C1 = { capacitor = "47n", between = ["out", "gnd"] }
[responses]
gain = { ratio = ["out", "in"] }
"#,
    );
    let ev = a.evaluator().unwrap();
    let asmt = metrics::assess(&ev, &grid, &[MetricOptions::default()], &[]).unwrap();
    let values = sensitivity::values(&ev);
    let figs =
        sensitivity::figure_sensitivities(&ev, &asmt.figures[0], 0, &values, &[], 1e6).unwrap();
    let fc = figure(&figs, "upper cut-off");
    assert_eq!(fc.per, Per::Relative);
    for s in &fc.per_value {
        assert!((s + 1.0).abs() < 1e-7, "{s}");
    }
    let pole = figure(&figs, "pole 1");
    for s in &pole.per_value {
        assert!((s + 1.0).abs() < 1e-9, "{s}");
    }
    for s in &figure(&figs, "gain at 0 Hz").per_value {
        assert!(s.abs() < 1e-12);
    }
}

#[test]
fn sallen_key_unity_gain_f0_and_q_sensitivities_match_the_closed_form() {
    // Unity-gain Sallen–Key low-pass, C1 from the middle node to the output, C2 to ground:
    // ω0 = 1/√(R1R2C1C2), Q = √(R1R2C1C2)/(C2(R1 + R2)) (the standard closed form of this
    // section; common practice). Differentiating: S(f0) = −1/2 for each part;
    // S(Q, R1) = 1/2 − R1/(R1+R2), S(Q, R2) = 1/2 − R2/(R1+R2), S(Q, C1) = 1/2,
    // S(Q, C2) = −1/2.
    let (r1, r2) = (12e3, 27e3);
    let (a, grid, _) = analysis(&format!(
        r#"
[sweep]
from = "10 Hz"
to = "100 kHz"
[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
R1 = {{ resistor = "{r1}", between = ["in", "m"] }}
R2 = {{ resistor = "{r2}", between = ["m", "p"] }}
C1 = {{ capacitor = "22n", between = ["m", "out"] }}
C2 = {{ capacitor = "4.7n", between = ["p", "gnd"] }}
U1 = {{ opamp = "ideal", noninverting = "p", inverting = "out", output = "out" }}
[responses]
gain = {{ ratio = ["out", "in"] }}
"#
    ));
    let ev = a.evaluator().unwrap();
    let asmt = metrics::assess(&ev, &grid, &[MetricOptions::default()], &[]).unwrap();
    let values = sensitivity::values(&ev);
    let names: Vec<&str> = values.iter().map(|v| v.name.as_str()).collect();
    assert_eq!(names, ["R1", "R2", "C1", "C2"]);
    let figs =
        sensitivity::figure_sensitivities(&ev, &asmt.figures[0], 0, &values, &[], 1e5).unwrap();
    let f0 = figure(&figs, "pole pair 1 f0");
    for s in &f0.per_value {
        assert!((s + 0.5).abs() < 1e-8, "f0: {s}");
    }
    let q = figure(&figs, "pole pair 1 Q");
    let want = [0.5 - r1 / (r1 + r2), 0.5 - r2 / (r1 + r2), 0.5, -0.5];
    for (s, w) in q.per_value.iter().zip(want) {
        assert!((s - w).abs() < 1e-8, "Q: {s} vs {w}");
    }
}

#[test]
fn limit_margin_sensitivities_predict_the_re_solved_margins() {
    // First order: margin(p·1.001) − margin(p) ≈ 0.1 × (dB per %), checked against the
    // margin of the re-solved network to within the second-order remainder.
    let (a, grid, limits) = analysis(reference_suite::LADDER_WITH_LIMITS);
    let ev = a.evaluator().unwrap();
    let opts = [MetricOptions::default()];
    let asmt = metrics::assess(&ev, &grid, &opts, &limits).unwrap();
    let values = sensitivity::values(&ev);
    let figs =
        sensitivity::figure_sensitivities(&ev, &asmt.figures[0], 0, &values, &asmt.checks, 1e7)
            .unwrap();
    for (l, check) in limits.iter().zip(&asmt.checks) {
        let s = figure(&figs, &format!("limit {} margin", l.name));
        for (k, v) in values.iter().enumerate() {
            let b = a
                .with_values(&[(v.part, v.param, v.nominal * 1.001)])
                .unwrap();
            let e = b.evaluator().unwrap();
            let moved = metrics::assess(&e, &grid, &opts, &limits).unwrap();
            let actual =
                moved.checks[check_index(&limits, &l.name)].worst_margin_db - check.worst_margin_db;
            let predicted = 0.1 * s.per_value[k];
            assert!(
                (actual - predicted).abs() <= 0.02 * predicted.abs() + 1e-6,
                "{} margin, {}: predicted {predicted} actual {actual}",
                l.name,
                v.name
            );
        }
    }
    let _ = Param::Main;
}

fn check_index(limits: &[metrics::Limit], name: &str) -> usize {
    limits.iter().position(|l| l.name == name).unwrap()
}
