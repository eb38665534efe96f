//! Variants of a design: one-off value changes (`R2=4k7`) and steps through a list or a log
//! range of values (`R2=1k,2k2,4k7`, `C1=1n..100n/5`), each part value read with the unit
//! rules of the design file.

use crate::network::{Network, Param, PartId, PartKind};
use crate::units::{parse_value, Quantity};

/// One value of a part to change: `NAME` (the main value) or `NAME.gbw`.
#[derive(Clone, Debug, PartialEq)]
pub struct Target {
    /// The part.
    pub part: PartId,
    /// Which value.
    pub param: Param,
    /// As written (`R2`, `U1.gbw`).
    pub name: String,
}

fn quantity(kind: &PartKind, param: Param) -> Quantity {
    match (kind, param) {
        (_, Param::Gbw) => Quantity::Frequency,
        (PartKind::Resistor { .. } | PartKind::Ccvs { .. }, _) => Quantity::Resistance,
        (PartKind::Capacitor { .. }, _) => Quantity::Capacitance,
        (PartKind::Inductor { .. }, _) => Quantity::Inductance,
        (PartKind::Vccs { .. }, _) => Quantity::Conductance,
        _ => Quantity::Ratio,
    }
}

/// Finds the value `name` names.
pub fn target(net: &Network, name: &str) -> Result<Target, String> {
    let (part_name, param) = match name.strip_suffix(".gbw") {
        Some(p) => (p, Param::Gbw),
        None => (name, Param::Main),
    };
    let part = net
        .part_id(part_name.trim())
        .ok_or_else(|| format!("the design has no part {:?}", part_name.trim()))?;
    let kind = &net.part(part).ok_or("no such part")?.kind;
    if kind.value(param).is_none() {
        return Err(match param {
            Param::Gbw => {
                format!("{part_name} has no gain-bandwidth product (only a single-pole op-amp has)")
            }
            Param::Main => format!("{part_name} ({}) has no value to change", kind.word()),
        });
    }
    Ok(Target {
        part,
        param,
        name: name.trim().to_string(),
    })
}

fn value(net: &Network, t: &Target, text: &str) -> Result<f64, String> {
    let kind = &net.part(t.part).ok_or("no such part")?.kind;
    parse_value(text.trim(), quantity(kind, t.param)).map_err(|e| format!("{}: {e}", t.name))
}

/// Reads `NAME=VALUE`.
pub fn parse_set(net: &Network, text: &str) -> Result<(Target, f64), String> {
    let (name, v) = text
        .split_once('=')
        .ok_or_else(|| format!("{text:?}: expected NAME=VALUE, e.g. R2=4k7"))?;
    let t = target(net, name)?;
    let x = value(net, &t, v)?;
    Ok((t, x))
}

/// Reads `NAME=V1,V2,…` or `NAME=FROM..TO/N` (N values log-spaced from FROM to TO).
pub fn parse_step(net: &Network, text: &str) -> Result<(Target, Vec<f64>), String> {
    let (name, rest) = text.split_once('=').ok_or_else(|| {
        format!("{text:?}: expected NAME=V1,V2,… or NAME=FROM..TO/N, e.g. R2=1k,2k2,4k7")
    })?;
    let t = target(net, name)?;
    let values = if let Some((range, n)) = rest.split_once('/').filter(|_| rest.contains("..")) {
        let (a, b) = range
            .split_once("..")
            .ok_or_else(|| format!("{text:?}: a range reads FROM..TO/N"))?;
        let (a, b) = (value(net, &t, a)?, value(net, &t, b)?);
        let n: usize = n
            .trim()
            .parse()
            .ok()
            .filter(|n| (2..=50).contains(n))
            .ok_or_else(|| format!("{text:?}: N after / must be a whole number from 2 to 50"))?;
        if !(a > 0.0 && b > 0.0) {
            return Err(format!("{text:?}: a log range needs positive ends"));
        }
        (0..n)
            .map(|k| a * (b / a).powf(k as f64 / (n - 1) as f64))
            .collect()
    } else {
        rest.split(',')
            .map(|v| value(net, &t, v))
            .collect::<Result<Vec<f64>, String>>()?
    };
    if values.is_empty() || values.len() > 50 {
        return Err(format!("{text:?}: give 1 to 50 values"));
    }
    Ok((t, values))
}
