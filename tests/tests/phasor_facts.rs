//! The facts the phasor method rests on (common practice, any circuit-theory text):
//! element impedances, their phase, and Kirchhoff's laws on solved networks.

use num_complex::Complex64;
use reference_suite::{analysis, at};
use std::f64::consts::PI;

fn one_part(kind: &str, value: &str) -> String {
    format!(
        "[parts]\nV1 = {{ voltage = \"1\", between = [\"a\", \"gnd\"] }}\nX = {{ {kind} = \"{value}\", between = [\"a\", \"gnd\"] }}\n[responses]\nz = {{ impedance = [\"a\", \"gnd\"] }}\ni = {{ ratio = [{{ current = \"X\" }}, \"a\"] }}\n"
    )
}

#[test]
fn resistor_impedance_is_r() {
    // Common practice: Z_R = R at every frequency, in phase.
    let a = analysis(&one_part("resistor", "4k7"));
    for f in [1.0, 1e3, 1e6] {
        let z = at(&a, f)[0].value;
        assert!((z - Complex64::new(4700.0, 0.0)).norm() < 1e-9 * 4700.0);
    }
}

#[test]
fn inductor_impedance_is_j_omega_l_leading_by_90_degrees() {
    // Common practice: Z_L = jωL, reactance ωL, voltage leads current by 90°.
    let a = analysis(&one_part("inductor", "10m"));
    for f in [10.0, 1e3, 1e5] {
        let w = 2.0 * PI * f;
        let z = at(&a, f)[0].value;
        assert!((z - Complex64::new(0.0, w * 10e-3)).norm() <= 1e-12 * w * 10e-3);
        assert!((z.arg().to_degrees() - 90.0).abs() < 1e-9);
        // Current over voltage lags by 90°.
        let y = at(&a, f)[1].value;
        assert!((y.arg().to_degrees() + 90.0).abs() < 1e-9);
    }
}

#[test]
fn capacitor_impedance_is_one_over_j_omega_c_lagging_by_90_degrees() {
    // Common practice: Z_C = 1/(jωC), reactance −1/(ωC), voltage lags current by 90°.
    let a = analysis(&one_part("capacitor", "2n2"));
    for f in [10.0, 1e3, 1e5] {
        let w = 2.0 * PI * f;
        let z = at(&a, f)[0].value;
        let expect = Complex64::new(0.0, -1.0 / (w * 2.2e-9));
        assert!((z - expect).norm() <= 1e-12 * expect.norm());
        assert!((z.arg().to_degrees() + 90.0).abs() < 1e-9);
    }
}

/// A network with every element kind; KCL at every node and the element laws around loops.
const MIXED: &str = r#"
[parts]
V1 = { voltage = "1 V", phase = "20 deg", between = ["a", "gnd"] }
R1 = { resistor = "100", between = ["a", "b"] }
L1 = { inductor = "1m", between = ["b", "c"] }
C1 = { capacitor = "1u", between = ["c", "gnd"] }
R2 = { resistor = "220", between = ["b", "d"] }
L2 = { inductor = "2m", between = ["d", "gnd"] }
coil_coupling = { coupling = ["L1", "L2"], k = 0.6 }
C2 = { capacitor = "470n", between = ["d", "e"] }
I1 = { current = "2 mA", between = ["gnd", "e"] }
R3 = { resistor = "1k", between = ["e", "gnd"] }
doubler = { vcvs = "2", between = ["f", "gnd"], control = ["c", "gnd"] }
R4 = { resistor = "330", between = ["f", "e"] }
gm_stage = { vccs = "1m", between = ["e", "gnd"], control = ["b", "gnd"] }
sense_amp = { ccvs = "50", between = ["g", "gnd"], control = "R1" }
R5 = { resistor = "680", between = ["g", "c"] }
mirror = { cccs = "0.5", between = ["gnd", "c"], control = "L2" }
U1 = { opamp = "ideal", noninverting = "c", inverting = "h", output = "o" }
R6 = { resistor = "10k", between = ["o", "h"] }
R7 = { resistor = "10k", between = ["h", "gnd"] }
U2 = { opamp = "single-pole", noninverting = "e", inverting = "p", output = "p", dc_gain = "100k", gbw = "1 MHz" }
R8 = { resistor = "1k", between = ["p", "gnd"] }
[responses]
out = { ratio = ["o", "a"] }
"#;

#[test]
fn currents_into_every_node_sum_to_zero() {
    // Kirchhoff's current law for phasors (common practice), within 1e-12 relative.
    let an = analysis(MIXED);
    let net = an.network();
    let sys = an.system();
    let ev = an.evaluator().unwrap();
    let mut ws = ev.workspace();
    for f in [10.0, 1.3e3, 77e3] {
        ev.at(&mut ws, f, false).unwrap();
        let x = ev.design_solution(&ws).unwrap().to_vec();
        let w = 2.0 * PI * f;
        let mut sum = vec![Complex64::new(0.0, 0.0); net.node_count()];
        let mut scale = vec![0.0f64; net.node_count()];
        for (a, b, i) in reference_suite::branches(net, sys, &x, w) {
            for (node, flow) in [(a.0, -i), (b.0, i)] {
                sum[node] += flow;
                scale[node] = scale[node].max(flow.norm());
            }
        }
        for n in 1..net.node_count() {
            assert!(
                sum[n].norm() <= 1e-12 * scale[n].max(1e-30),
                "node {} at {f} Hz: {} vs {}",
                net.node_name(analyzer_core::network::NodeId(n)),
                sum[n].norm(),
                scale[n]
            );
        }
    }
}

#[test]
fn element_voltages_around_a_loop_sum_to_zero() {
    // Kirchhoff's voltage law for phasors with each voltage from its element law (Z·I),
    // not from node potentials: V1 − Z_R1·I_R1 − (jωL1·I_L1 + jωM·I_L2) − I_C1/(jωC1) = 0.
    let an = analysis(MIXED);
    let net = an.network();
    let sys = an.system();
    let ev = an.evaluator().unwrap();
    let mut ws = ev.workspace();
    let id = |n: &str| net.part_id(n).unwrap();
    let m = 0.6 * (1e-3f64 * 2e-3).sqrt();
    for f in [50.0, 2e3, 40e3] {
        ev.at(&mut ws, f, false).unwrap();
        let x = ev.design_solution(&ws).unwrap().to_vec();
        let w = 2.0 * PI * f;
        let j = Complex64::new(0.0, 1.0);
        let i = |n: &str| sys.current_readout(net, id(n)).unwrap().eval(&x, w, true);
        let v1 = Complex64::from_polar(1.0, 20f64.to_radians());
        let drops = [
            i("R1") * 100.0,
            j * w * (1e-3 * i("L1") + m * i("L2")),
            i("C1") / (j * w * 1e-6),
        ];
        let total = v1 - drops.iter().sum::<Complex64>();
        let scale = drops.iter().map(|d| d.norm()).fold(1.0, f64::max);
        assert!(
            total.norm() <= 1e-12 * scale,
            "{f} Hz: residual {}",
            total.norm()
        );
    }
}
