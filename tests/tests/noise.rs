//! Noise by the adjoint method against closed forms: Johnson–Nyquist thermal noise, the kT/C
//! result, a divider, and the textbook noise sum of a non-inverting amplifier; and the
//! adjoint transfers against one direct solve per source on random networks.

use analyzer_core::metrics::{response_figures, MetricOptions, Trace};
use analyzer_core::network::{NetworkBuilder, NodeId};
use analyzer_core::noise::{BOLTZMANN, T0};
use analyzer_core::response::{Analysis, Probe, ResponseKind, ResponseSpec};
use analyzer_core::solve::SolverKind;
use analyzer_core::sweep::{self, Grid, SweepOptions};
use proptest::prelude::*;
use reference_suite::{analysis, rel};
use std::f64::consts::PI;

/// The noise density (V/√Hz) of response `i` at `f`.
fn density(a: &Analysis, i: usize, f: f64) -> f64 {
    let ev = a.evaluator().unwrap();
    let mut ws = ev.workspace();
    ev.at(&mut ws, f, false).unwrap()[i].value.re
}

#[test]
fn a_resistor_alone_has_johnson_nyquist_noise() {
    // Johnson–Nyquist (closed form): open-circuit density √(4kTR), at 300 K and at 77 K.
    for (t, text) in [
        (300.0, "300 K"),
        (273.15 + 26.85, "26.85 °C"),
        (77.0, "77 K"),
    ] {
        let a = analysis(&format!(
            r#"temperature = "{text}"
[parts]
R1 = {{ resistor = "47k", between = ["x", "gnd"] }}
[responses]
n = {{ noise = "x" }}"#
        ));
        for f in [1.0, 1e3, 1e6] {
            let want = (4.0 * BOLTZMANN * t * 47e3).sqrt();
            assert!(rel(density(&a, 0, f), want) < 1e-12, "{t} K at {f} Hz");
        }
    }
}

#[test]
fn a_divider_is_as_noisy_as_its_two_resistors_in_parallel() {
    // Closed form: the Thévenin resistance R1‖R2 is what the output sees: √(4kT·R1R2/(R1+R2)).
    let (r1, r2) = (10e3, 3.3e3);
    let a = analysis(
        r#"[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
R1 = { resistor = "10k", between = ["in", "out"] }
R2 = { resistor = "3.3k", between = ["out", "gnd"] }
[responses]
n = { noise = "out" }"#,
    );
    let want = (4.0 * BOLTZMANN * 300.0 * r1 * r2 / (r1 + r2)).sqrt();
    assert!(rel(density(&a, 0, 1e3), want) < 1e-12);
}

#[test]
fn rc_low_pass_integrates_to_kt_over_c_whatever_the_resistor() {
    // The kT/C result (closed form): ∫₀^∞ 4kTR/(1 + (2πfRC)²) df = kT/C, for any R. Over
    // [fc·1e-9, fc·1e9] the tails left out are below 1e-9 of it: the upper tail is about
    // (2/π)·fc/f_max, the lower f_min/(π/2·fc).
    for r in [100.0, 10e3, 1e6] {
        let c: f64 = 1e-9;
        let a = analysis(&format!(
            r#"[parts]
R1 = {{ resistor = {r:e}, between = ["x", "gnd"] }}
C1 = {{ capacitor = {c:e}, between = ["x", "gnd"] }}
[responses]
n = {{ noise = "x" }}"#
        ));
        let fc = 1.0 / (2.0 * PI * r * c);
        let grid = Grid::log(fc * 1e-9, fc * 1e9, 5.0).unwrap();
        let f = figures(&a, &grid, 0);
        let n = f.noise.unwrap();
        let want = (BOLTZMANN * 300.0 / c).sqrt();
        assert!(rel(n.rms, want) < 1e-8, "R = {r}: {} vs {want}", n.rms);
        assert_eq!(n.contributors[0].0, "R1");
        assert!((n.contributors[0].1 - 100.0).abs() < 1e-9);
    }
}

fn figures(a: &Analysis, grid: &Grid, i: usize) -> analyzer_core::metrics::Figures {
    let ev = a.evaluator().unwrap();
    let s = sweep::run(&ev, grid, &SweepOptions::default()).unwrap();
    let trace = Trace::from_values(&s.values[i], None);
    response_figures(&ev, grid, &trace, i, &MetricOptions::default()).unwrap()
}

#[test]
fn non_inverting_amplifier_follows_the_textbook_noise_sum() {
    // The standard op-amp noise sum for a non-inverting stage with an ideal op-amp (common
    // practice, as in the op-amp makers' noise application notes), G = 1 + Rf/Rg:
    //   E² = G²·(e_n²(1 + f_e/f) + 4kT·Rs + i_n²(1 + f_i/f)·Rs²)
    //        + i_n²(1 + f_i/f)·Rf² + 4kT·Rf + 4kT·Rg·(Rf/Rg)²
    let (rs, rf, rg) = (2.2e3, 47e3, 4.7e3);
    let (en, ien, fe, fi) = (6e-9, 0.8e-12, 20.0, 150.0);
    let a = analysis(&format!(
        r#"temperature = "300 K"
[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
Rs = {{ resistor = {rs:e}, between = ["in", "p"] }}
Rf = {{ resistor = {rf:e}, between = ["out", "n"] }}
Rg = {{ resistor = {rg:e}, between = ["n", "gnd"] }}
U1 = {{ opamp = "ideal", noninverting = "p", inverting = "n", output = "out", noise_voltage = "{en:e}", noise_voltage_corner = "{fe}", noise_current = "{ien:e}", noise_current_corner = "{fi}" }}
[responses]
gain = {{ ratio = ["out", "in"] }}
n = {{ noise = "out" }}
n_in = {{ noise = "out", referred_to = "gain", source = "Rs" }}"#
    ));
    let kt4 = 4.0 * BOLTZMANN * 300.0;
    let g = 1.0 + rf / rg;
    let textbook = |f: f64| {
        let e2 = en * en * (1.0 + fe / f);
        let i2 = ien * ien * (1.0 + fi / f);
        g * g * (e2 + kt4 * rs + i2 * rs * rs)
            + i2 * rf * rf
            + kt4 * rf
            + kt4 * rg * (rf / rg).powi(2)
    };
    for f in [1.0, 20.0, 150.0, 1e3, 1e5] {
        let out2 = textbook(f);
        assert!(rel(density(&a, 1, f), out2.sqrt()) < 1e-12, "{f} Hz");
        // Referred to the input: divided by the gain G.
        assert!(rel(density(&a, 2, f), out2.sqrt() / g) < 1e-12, "{f} Hz");
    }
    // The IEEE noise figure with the source resistor at T0 = 290 K and the rest at 300 K:
    // F = 1 + (E² − G²·4kT·Rs)/(G²·4kT0·Rs).
    let grid = Grid::log(10.0, 1e5, 10.0).unwrap();
    let fig = figures(&a, &grid, 2).noise.unwrap();
    let out2 = textbook(fig.spot_hz);
    let src = g * g * kt4 * rs;
    let nf = 10.0 * (1.0 + (out2 - src) / (src * T0 / 300.0)).log10();
    assert!(
        (fig.spot_noise_figure_db.unwrap() - nf).abs() < 1e-9,
        "{:?} vs {nf}",
        fig.spot_noise_figure_db
    );
}

#[test]
fn noise_is_the_same_on_every_solver_path() {
    // A 30-section RC line (band and sparse paths) and a small filter (stack kernel): every
    // path gives the same densities, in lanes and one frequency at a time.
    let mut b = NetworkBuilder::new("line");
    for k in 0..30 {
        b.resistor(
            &format!("R{k}"),
            &format!("n{k}"),
            &format!("n{}", k + 1),
            100.0,
        )
        .unwrap();
        b.capacitor(&format!("C{k}"), &format!("n{}", k + 1), "gnd", 1e-9)
            .unwrap();
    }
    b.resistor("Rg", "n0", "gnd", 50.0).unwrap();
    let net = b.build().unwrap();
    let out = net.node("n30").unwrap();
    let spec = ResponseSpec::new(
        "n",
        ResponseKind::Noise {
            plus: out,
            minus: NodeId::GROUND,
            referred_to: None,
            source: None,
        },
    );
    let grid = Grid::log(1e3, 1e8, 20.0).unwrap();
    let mut reference: Option<Vec<f64>> = None;
    for kind in [
        SolverKind::Dense,
        SolverKind::Band,
        SolverKind::Sparse,
        SolverKind::Small,
    ] {
        let a = Analysis::new(net.clone(), vec![spec.clone()])
            .unwrap()
            .with_solver(kind);
        let ev = a.evaluator().unwrap();
        let s = sweep::run(&ev, &grid, &SweepOptions::default()).unwrap();
        let d: Vec<f64> = s.values[0].iter().map(|v| v.re).collect();
        match &reference {
            None => reference = Some(d),
            Some(r) => {
                for (x, y) in d.iter().zip(r) {
                    assert!(rel(*x, *y) < 1e-10, "{kind:?}");
                }
            }
        }
    }
    // Lanes of the stack kernel against single points, on a small system.
    let a = analysis(
        r#"[parts]
R1 = { resistor = "1k", between = ["a", "b"] }
C1 = { capacitor = "10n", between = ["b", "gnd"] }
R2 = { resistor = "2k", between = ["a", "gnd"] }
L1 = { inductor = "1m", between = ["b", "c"] }
R3 = { resistor = "50", between = ["c", "gnd"] }
[responses]
n = { noise = "c" }"#,
    );
    let ev = a.evaluator().unwrap();
    let s = sweep::run(&ev, &grid, &SweepOptions::default()).unwrap();
    let mut ws = ev.workspace();
    for (k, f) in s.freqs.iter().enumerate() {
        let one = ev.at(&mut ws, *f, false).unwrap()[0].value.re;
        assert_eq!(one, s.values[0][k].re, "{f} Hz");
    }
}

/// A random passive network: a resistor tree to ground and random R, L, C.
fn random_net(
    nodes: usize,
    tree: &[f64],
    els: &[(u8, usize, usize, f64)],
) -> Option<NetworkBuilder> {
    let node = |i: usize| {
        if i == 0 {
            "gnd".to_string()
        } else {
            format!("n{i}")
        }
    };
    let mut b = NetworkBuilder::new("random");
    for i in 1..nodes {
        let parent = (tree[i - 1] * i as f64) as usize % i;
        b.resistor(
            &format!("T{i}"),
            &node(i),
            &node(parent),
            10f64.powf(1.0 + 4.0 * tree[i - 1]),
        )
        .ok()?;
    }
    for (k, &(kind, a, c, e)) in els.iter().enumerate() {
        let (a, c) = (a % nodes, c % nodes);
        if a == c {
            continue;
        }
        match kind % 3 {
            0 => b.resistor(
                &format!("R{k}"),
                &node(a),
                &node(c),
                10f64.powf(1.0 + 4.0 * e),
            ),
            1 => b.inductor(
                &format!("L{k}"),
                &node(a),
                &node(c),
                10f64.powf(-6.0 + 4.0 * e),
            ),
            _ => b.capacitor(
                &format!("C{k}"),
                &node(a),
                &node(c),
                10f64.powf(-10.0 + 4.0 * e),
            ),
        }
        .ok()?;
    }
    Some(b)
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]

    /// Each source's output noise from the one adjoint solve equals |Z_transfer|²·4kT/R from
    /// a direct solve with a 1 A source across that resistor (reciprocity and Tellegen's
    /// theorem make the adjoint the transfer from every injection at once).
    #[test]
    fn adjoint_transfers_equal_direct_solves(
        nodes in 2usize..7,
        tree in prop::collection::vec(0.0f64..1.0, 6),
        els in prop::collection::vec((0u8..3, 0usize..7, 0usize..7, 0.0f64..1.0), 0..8),
        out in 1usize..7,
        f in 1.0f64..7.0,
    ) {
        let f = 10f64.powf(f);
        let Some(b) = random_net(nodes, &tree, &els) else { return Ok(()) };
        let Ok(net) = b.clone().build() else { return Ok(()) };
        let out_node = net.node(&format!("n{}", 1 + out % (nodes - 1))).unwrap();
        let spec = ResponseSpec::new("n", ResponseKind::Noise { plus: out_node, minus: NodeId::GROUND, referred_to: None, source: None });
        let a = Analysis::new(net.clone(), vec![spec]).unwrap();
        let ev = a.evaluator().unwrap();
        let mut ws = ev.workspace();
        let breakdown = ev.noise_at(&mut ws, f, 0).unwrap();
        let plan = ev.noise_plan(0).unwrap();
        for (src, part) in plan.sources.iter().zip(&breakdown.parts) {
            let p = &net.parts()[src.part.0];
            let analyzer_core::network::PartKind::Resistor { a: na, b: nb, ohms } = p.kind else { continue };
            // A 1 A test source across the resistor, and the output over its current.
            let mut b2 = b.clone();
            b2.current_source("Itest", net.node_name(na), net.node_name(nb), 1.0.into()).unwrap();
            let net2 = b2.build().unwrap();
            let src_id = net2.part_id("Itest").unwrap();
            let ratio = ResponseSpec::new("z", ResponseKind::Ratio {
                numerator: Probe::Voltage(out_node, NodeId::GROUND),
                denominator: Probe::Current(src_id),
            });
            let a2 = Analysis::new(net2, vec![ratio]).unwrap();
            let z = reference_suite::value(&a2, 0, f);
            let direct = z.norm_sqr() * 4.0 * BOLTZMANN * 300.0 / ohms;
            prop_assert!((part - direct).abs() <= 1e-9 * direct.max(breakdown.total * 1e-6),
                "{}: adjoint {part} vs direct {direct}", p.name);
        }
    }
}
