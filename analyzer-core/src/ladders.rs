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
    Some(ResponseSpec::new(
        "gain",
        ResponseKind::Ratio {
            numerator: Probe::Voltage(out, NodeId::GROUND),
            denominator: Probe::Voltage(src, NodeId::GROUND),
        },
    ))
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
    let spec = ResponseSpec::new(
        "gain",
        ResponseKind::Ratio {
            numerator: Probe::Voltage(b.node(&out)?, NodeId::GROUND),
            denominator: Probe::Voltage(b.node("src")?, NodeId::GROUND),
        },
    );
    let net = b.build()?;
    Ok((net, spec))
}

/// An RC mesh `width` nodes across and `length` along: resistors `r` between neighbours in
/// both directions and a capacitor `c` from every node to ground, driven by a 1 V source
/// through `r` at one corner and loaded by `r` at the opposite one. It stands in for a
/// resistive sheet or a bundle of coupled lines; ordered along its length its band is
/// `width` wide, so it is the family on which the band and sparse paths are weighed.
/// Nodes are `m{i}_{j}` (`i < width`, `j < length`).
pub fn rc_mesh(width: usize, length: usize, r: f64, c: f64) -> Result<Network, NetworkError> {
    let mut b = NetworkBuilder::new(format!("{width}×{length} RC mesh"));
    let name = |i: usize, j: usize| format!("m{i}_{j}");
    b.voltage_source("V1", "src", "gnd", 1.0.into())?;
    b.resistor("Rs", "src", &name(0, 0), r)?;
    for j in 0..length {
        for i in 0..width {
            b.capacitor(&format!("C{i}_{j}"), &name(i, j), "gnd", c)?;
            if i + 1 < width {
                b.resistor(&format!("Ra{i}_{j}"), &name(i, j), &name(i + 1, j), r)?;
            }
            if j + 1 < length {
                b.resistor(&format!("Rb{i}_{j}"), &name(i, j), &name(i, j + 1), r)?;
            }
        }
    }
    let last = name(width.saturating_sub(1), length.saturating_sub(1));
    b.resistor("RL", &last, "gnd", r)?;
    b.build()
}

/// A network with every pair of its `nodes` nodes joined by a resistor (values spread from
/// `r` upward) and a capacitor `c` from each node to ground, driven by a 1 V source at the
/// first: a dense matrix, the family on which faer's dense LU is weighed against the band
/// and sparse paths. Nodes are `n0` … `n{nodes − 1}`.
pub fn full_mesh(nodes: usize, r: f64, c: f64) -> Result<Network, NetworkError> {
    let mut b = NetworkBuilder::new(format!("{nodes}-node full mesh"));
    b.voltage_source("V1", "n0", "gnd", 1.0.into())?;
    for i in 0..nodes {
        for j in i + 1..nodes {
            let spread = 1.0 + ((7 * i + 3 * j) % 11) as f64 / 10.0;
            b.resistor(
                &format!("R{i}_{j}"),
                &format!("n{i}"),
                &format!("n{j}"),
                r * spread,
            )?;
        }
        b.capacitor(&format!("C{i}"), &format!("n{i}"), "gnd", c)?;
    }
    b.build()
}

/// An RC chain with exactly `nodes` unknowns (all node voltages `n1` … `n{nodes}`): a current
/// source of 1 mA ∠11° into `n1`, a resistor and a capacitor to ground at every node and a
/// resistor and a capacitor between neighbours, with values that vary along the chain so
/// pivoting has work to do. It stands in for an RC line; tests use it to reach every size the
/// stack kernel serves.
pub fn rc_chain(nodes: usize) -> Result<Network, NetworkError> {
    let mut b = NetworkBuilder::new(format!("{nodes}-node RC chain"));
    b.current_source("I1", "gnd", "n1", num_complex::Complex64::new(1e-3, 2e-4))?;
    for k in 1..=nodes {
        let node = format!("n{k}");
        b.resistor(&format!("Rg{k}"), &node, "gnd", 100.0 * (1.0 + k as f64))?;
        let cg = 1e-9 * (1.0 + (k % 3) as f64);
        b.capacitor(&format!("Cg{k}"), &node, "gnd", cg)?;
        if k > 1 {
            let prev = format!("n{}", k - 1);
            b.resistor(&format!("R{k}"), &prev, &node, 50.0 * k as f64)?;
            b.capacitor(&format!("C{k}"), &prev, &node, 2e-9 / k as f64)?;
        }
    }
    b.build()
}
