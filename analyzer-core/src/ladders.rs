//! Generated networks: long ladders that stand in for a cable, an on-chip line or an RC chain,
//! and prototype filters, built through [`NetworkBuilder`] with no design file.

use crate::network::{Network, NetworkBuilder, NetworkError, NodeId};
use crate::response::{Probe, ResponseKind, ResponseSpec};
use std::f64::consts::PI;

/// A uniform RLC ladder: a 1 V source with `r_source`, then `sections` of series R and L
/// with a shunt C, ending in `r_load`. Nodes are `n0` (after the source resistor) to
/// `n{sections}`; it has `3·sections + 3` unknowns.
pub fn rlc_ladder(
    sections: usize,
    r: f64,
    l: f64,
    c: f64,
    r_source: f64,
    r_load: f64,
) -> Result<Network, NetworkError> {
    let mut b = NetworkBuilder::new(format!("{sections}-section RLC ladder"));
    b.voltage_source("V1", "src", "gnd", 1.0.into())?;
    b.resistor("Rs", "src", "n0", r_source)?;
    for k in 0..sections {
        let (a, m, z) = (format!("n{k}"), format!("m{k}"), format!("n{}", k + 1));
        b.resistor(&format!("R{k}"), &a, &m, r)?;
        b.inductor(&format!("L{k}"), &m, &z, l)?;
        b.capacitor(&format!("C{k}"), &z, "gnd", c)?;
    }
    b.resistor("RL", &format!("n{sections}"), "gnd", r_load)?;
    b.build()
}

/// The response V(last node)/V(src) of a ladder with `sections` sections.
pub fn ladder_gain(net: &Network, sections: usize) -> Option<ResponseSpec> {
    let out = net.node(&format!("n{sections}"))?;
    let src = net.node("src")?;
    Some(ResponseSpec {
        name: "gain".into(),
        kind: ResponseKind::Ratio {
            numerator: Probe::Voltage(out, NodeId::GROUND),
            denominator: Probe::Voltage(src, NodeId::GROUND),
        },
        loop_gain: false,
    })
}

/// A doubly terminated Butterworth low-pass ladder of order `n` (series inductor first),
/// from the prototype values g_k = 2·sin((2k−1)π/2n), with terminations `r0` and cut-off
/// `fc`. Its output node is `n{⌈n/2⌉}`.
pub fn butterworth_ladder(
    n: usize,
    r0: f64,
    fc: f64,
) -> Result<(Network, ResponseSpec), NetworkError> {
    let wc = 2.0 * PI * fc;
    let mut b = NetworkBuilder::new(format!("order-{n} Butterworth ladder"));
    b.voltage_source("V1", "src", "gnd", 1.0.into())?;
    b.resistor("Rs", "src", "n0", r0)?;
    let mut node = 0;
    for k in 1..=n {
        let g = 2.0 * ((2 * k - 1) as f64 * PI / (2 * n) as f64).sin();
        if k % 2 == 1 {
            b.inductor(
                &format!("L{k}"),
                &format!("n{node}"),
                &format!("n{}", node + 1),
                g * r0 / wc,
            )?;
            node += 1;
        } else {
            b.capacitor(&format!("C{k}"), &format!("n{node}"), "gnd", g / (r0 * wc))?;
        }
    }
    let out = format!("n{node}");
    b.resistor("RL", &out, "gnd", r0)?;
    let spec = ResponseSpec {
        name: "gain".into(),
        kind: ResponseKind::Ratio {
            numerator: Probe::Voltage(b.node(&out)?, NodeId::GROUND),
            denominator: Probe::Voltage(b.node("src")?, NodeId::GROUND),
        },
        loop_gain: false,
    };
    let net = b.build()?;
    Ok((net, spec))
}
