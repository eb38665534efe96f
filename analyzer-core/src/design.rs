//! The design file: a TOML document of our own schema, read into a checked [`Design`].
//!
//! ```toml
//! title = "Anti-alias stage for a soil-moisture probe ADC"
//!
//! [sweep]
//! from = "10 Hz"
//! to = "1 MHz"
//! per_decade = 100          # or: points = 201 (linear), or: at = ["50 Hz", "1 kHz"]
//!
//! [parts]
//! V1 = { voltage = "1 V", between = ["src", "gnd"] }
//! R1 = { resistor = "10k", between = ["src", "out"], tolerance = "1%" }
//! C1 = { capacitor = "2n2", between = ["out", "gnd"] }
//!
//! [responses]
//! gain = { ratio = ["out", "src"] }
//! zin  = { impedance = ["src", "gnd"] }
//! ```
//!
//! Every error carries the line and column (1-based) of the value or key at fault and says
//! what to change. The full reference of part kinds is in the README.

use crate::network::{Network, NetworkBuilder, NetworkError, NodeId, PartKind};
use crate::response::{Probe, ResponseKind, ResponseSpec};
use crate::sweep::{Grid, GridError};
use crate::units::{parse_value, Hertz, Quantity};
use num_complex::Complex64;
use serde::Deserialize;
use std::collections::BTreeMap;
use std::ops::Range;
use toml::Spanned;

/// Largest design file accepted, in bytes.
pub const MAX_DESIGN_BYTES: usize = 64 * 1024 * 1024;

/// An error in a design file, with its position.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("{line}:{column}: {message}")]
pub struct DesignError {
    /// 1-based line.
    pub line: usize,
    /// 1-based column, in characters.
    pub column: usize,
    /// What is wrong and what to change.
    pub message: String,
}

/// The sweep as the design gives it; any field may be overridden before building the grid.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct SweepSpec {
    /// First frequency.
    pub from: Option<Hertz>,
    /// Last frequency.
    pub to: Option<Hertz>,
    /// Log spacing, points per decade.
    pub per_decade: Option<f64>,
    /// Linear spacing, number of points.
    pub points: Option<usize>,
    /// Explicit list.
    pub at: Option<Vec<Hertz>>,
}

impl SweepSpec {
    /// Builds the grid: a list if `at` is given, else linear if `points`, else log.
    pub fn grid(&self) -> Result<Grid, GridError> {
        if let Some(list) = &self.at {
            return Grid::list(list.clone());
        }
        let from = self.from.unwrap_or(f64::NAN);
        let to = self.to.unwrap_or(f64::NAN);
        match (self.points, self.per_decade) {
            (Some(points), _) => Grid::linear(from, to, points),
            (None, Some(d)) => Grid::log(from, to, d),
            (None, None) => Grid::log(from, to, 50.0),
        }
    }
}

/// A read design: the network, its sweep and its responses.
#[derive(Clone, Debug)]
pub struct Design {
    /// The checked network.
    pub network: Network,
    /// The sweep as given.
    pub sweep: SweepSpec,
    /// The responses, in file order.
    pub responses: Vec<ResponseSpec>,
    /// Magnitude limits to check, in file order.
    pub limits: Vec<crate::metrics::Limit>,
    /// Whether the design mentions a mains, high-voltage or medical use in its title or
    /// `caution` key, so reports carry the safety caution.
    pub caution: bool,
}

#[derive(Deserialize, Clone, Debug)]
#[serde(untagged)]
enum Scalar {
    Text(String),
    Int(i64),
    Float(f64),
}

#[derive(Deserialize, Clone, Debug)]
#[serde(untagged)]
enum ProbeEntry {
    Node(String),
    Pair(Vec<String>),
    Current { current: String },
}

#[derive(Deserialize, Debug)]
#[serde(deny_unknown_fields)]
struct FileEntry {
    title: Option<Spanned<String>>,
    caution: Option<Spanned<bool>>,
    sweep: Option<Spanned<SweepEntry>>,
    parts: Option<Spanned<BTreeMap<String, Spanned<PartEntry>>>>,
    responses: Option<Spanned<BTreeMap<String, Spanned<ResponseEntry>>>>,
    limits: Option<Spanned<BTreeMap<String, Spanned<LimitEntry>>>>,
}

#[derive(Deserialize, Debug)]
#[serde(deny_unknown_fields)]
struct LimitEntry {
    response: Spanned<String>,
    from: Spanned<Scalar>,
    to: Spanned<Scalar>,
    min_db: Option<Spanned<Scalar>>,
    max_db: Option<Spanned<Scalar>>,
}

#[derive(Deserialize, Debug)]
#[serde(deny_unknown_fields)]
struct SweepEntry {
    from: Option<Spanned<Scalar>>,
    to: Option<Spanned<Scalar>>,
    per_decade: Option<Spanned<Scalar>>,
    points: Option<Spanned<i64>>,
    at: Option<Spanned<Vec<Spanned<Scalar>>>>,
}

#[derive(Deserialize, Debug)]
#[serde(deny_unknown_fields)]
struct PartEntry {
    resistor: Option<Spanned<Scalar>>,
    capacitor: Option<Spanned<Scalar>>,
    inductor: Option<Spanned<Scalar>>,
    voltage: Option<Spanned<Scalar>>,
    current: Option<Spanned<Scalar>>,
    vcvs: Option<Spanned<Scalar>>,
    vccs: Option<Spanned<Scalar>>,
    ccvs: Option<Spanned<Scalar>>,
    cccs: Option<Spanned<Scalar>>,
    opamp: Option<Spanned<String>>,
    coupling: Option<Spanned<Vec<String>>>,
    between: Option<Spanned<Vec<String>>>,
    control: Option<Spanned<ProbeEntry>>,
    k: Option<Spanned<Scalar>>,
    tolerance: Option<Spanned<Scalar>>,
    phase: Option<Spanned<Scalar>>,
    noninverting: Option<Spanned<String>>,
    inverting: Option<Spanned<String>>,
    output: Option<Spanned<String>>,
    dc_gain: Option<Spanned<Scalar>>,
    gbw: Option<Spanned<Scalar>>,
}

#[derive(Deserialize, Debug)]
#[serde(deny_unknown_fields)]
struct ResponseEntry {
    ratio: Option<Spanned<Vec<ProbeEntry>>>,
    impedance: Option<Spanned<Vec<String>>>,
    admittance: Option<Spanned<Vec<String>>>,
    loop_gain: Option<Spanned<bool>>,
}

/// Maps byte offsets to 1-based line and column.
struct Positions<'a> {
    text: &'a str,
}

impl Positions<'_> {
    fn at(&self, offset: usize) -> (usize, usize) {
        let offset = offset.min(self.text.len());
        let mut line = 1;
        let mut col = 1;
        for (i, ch) in self.text.char_indices() {
            if i >= offset {
                break;
            }
            if ch == '\n' {
                line += 1;
                col = 1;
            } else {
                col += 1;
            }
        }
        (line, col)
    }

    fn err(&self, span: Range<usize>, message: impl Into<String>) -> DesignError {
        let (line, column) = self.at(span.start);
        DesignError {
            line,
            column,
            message: message.into(),
        }
    }
}

const KINDS: &[&str] = &[
    "resistor",
    "capacitor",
    "inductor",
    "voltage",
    "current",
    "vcvs",
    "vccs",
    "ccvs",
    "cccs",
    "opamp",
    "coupling",
];

/// Reads a design from TOML text. Never panics; every problem is a [`DesignError`].
pub fn parse(text: &str) -> Result<Design, DesignError> {
    let pos = Positions { text };
    if text.len() > MAX_DESIGN_BYTES {
        return Err(pos.err(
            0..0,
            format!(
                "the design is {} bytes, more than the limit of {MAX_DESIGN_BYTES} (64 MiB)",
                text.len()
            ),
        ));
    }
    let file: FileEntry = toml::from_str(text).map_err(|e| {
        let span = e.span().unwrap_or(0..0);
        pos.err(span, tidy_toml_message(e.message()))
    })?;
    let title = file
        .title
        .as_ref()
        .map_or_else(|| "untitled design".to_string(), |t| t.get_ref().clone());
    let mut builder = NetworkBuilder::new(title.clone());

    let parts = file.parts.ok_or_else(|| {
        pos.err(
            0..0,
            "the design has no [parts] table; add the network's parts",
        )
    })?;
    let parts_span = parts.span();
    let parts = parts.into_inner();
    if parts.is_empty() {
        return Err(pos.err(
            parts_span,
            "the [parts] table is empty; add the network's parts",
        ));
    }
    // File order, so the first error reported is the first in the file.
    let mut entries: Vec<(String, Spanned<PartEntry>)> = parts.into_iter().collect();
    entries.sort_by_key(|(_, e)| e.span().start);
    let mut part_spans: BTreeMap<String, Range<usize>> = BTreeMap::new();
    let mut node_spans: BTreeMap<String, Range<usize>> = BTreeMap::new();
    for (name, entry) in &entries {
        part_spans.insert(name.clone(), entry.span());
        add_part(&pos, &mut builder, name, entry, &mut node_spans)?;
    }
    let network = builder.build().map_err(|e| {
        let span = network_error_part(&e)
            .and_then(|p| part_spans.get(p).cloned())
            .unwrap_or(parts_span.clone());
        pos.err(span, e.to_string())
    })?;

    let sweep = match &file.sweep {
        Some(s) => read_sweep(&pos, s.get_ref())?,
        None => SweepSpec::default(),
    };

    let mut responses = Vec::new();
    if let Some(rs) = file.responses {
        let mut list: Vec<(String, Spanned<ResponseEntry>)> = rs.into_inner().into_iter().collect();
        list.sort_by_key(|(_, e)| e.span().start);
        for (name, entry) in &list {
            responses.push(read_response(&pos, &network, name, entry)?);
        }
    }
    if responses.is_empty() {
        return Err(pos.err(
            0..0,
            "the design has no [responses]; name at least one, e.g. gain = { ratio = [\"out\", \"in\"] }",
        ));
    }
    let mut limits = Vec::new();
    if let Some(ls) = file.limits {
        let mut list: Vec<(String, Spanned<LimitEntry>)> = ls.into_inner().into_iter().collect();
        list.sort_by_key(|(_, e)| e.span().start);
        for (name, entry) in &list {
            limits.push(read_limit(&pos, &responses, name, entry)?);
        }
    }
    let lower = title.to_lowercase();
    let caution = file.caution.as_ref().is_some_and(|c| *c.get_ref())
        || [
            "mains",
            "high-voltage",
            "high voltage",
            "medical",
            "patient",
            "line filter",
            "230 v",
            "120 v",
        ]
        .iter()
        .any(|w| lower.contains(w));
    Ok(Design {
        network,
        sweep,
        responses,
        limits,
        caution,
    })
}

fn tidy_toml_message(message: &str) -> String {
    // One line per error: the parser's own line breaks become "; ".
    let m = message
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty())
        .collect::<Vec<_>>()
        .join("; ");
    if let Some(rest) = m.strip_prefix("unknown field ") {
        let key = rest.split(',').next().unwrap_or(rest);
        if rest.contains("`resistor`") {
            return format!(
                "unknown part kind or key {key}; a part takes one kind ({}) and the keys of that kind ({})",
                KINDS.join(", "),
                PART_KEYS.join(", ")
            );
        }
        return format!("unknown key {rest}");
    }
    m
}

const PART_KEYS: &[&str] = &[
    "between",
    "control",
    "k",
    "tolerance",
    "phase",
    "noninverting",
    "inverting",
    "output",
    "dc_gain",
    "gbw",
];

fn network_error_part(e: &NetworkError) -> Option<&str> {
    match e {
        NetworkError::DuplicateName { name } => Some(name),
        NetworkError::NotPositive { part, .. }
        | NetworkError::OutOfRange { part, .. }
        | NetworkError::CouplingOutOfRange { part, .. }
        | NetworkError::MissingPart { part, .. }
        | NetworkError::WrongKind { part, .. }
        | NetworkError::BadCoupling { part, .. }
        | NetworkError::ShortedPart { part, .. }
        | NetworkError::GroundedOutput { part } => Some(part),
        _ => None,
    }
}

fn scalar_value(
    pos: &Positions<'_>,
    s: &Spanned<Scalar>,
    q: Quantity,
    what: &str,
) -> Result<f64, DesignError> {
    let v = match s.get_ref() {
        Scalar::Text(t) => {
            parse_value(t, q).map_err(|e| pos.err(s.span(), format!("{what}: {e}")))?
        }
        Scalar::Int(i) => *i as f64,
        Scalar::Float(f) => *f,
    };
    if !v.is_finite() {
        return Err(pos.err(s.span(), format!("{what}: {v} is not a finite number")));
    }
    if q == Quantity::Percent && !matches!(s.get_ref(), Scalar::Text(_)) {
        return Err(pos.err(
            s.span(),
            format!("{what}: write a tolerance as text with a % sign, e.g. \"1%\""),
        ));
    }
    Ok(v)
}

fn read_sweep(pos: &Positions<'_>, s: &SweepEntry) -> Result<SweepSpec, DesignError> {
    let mut spec = SweepSpec::default();
    if let Some(v) = &s.from {
        spec.from = Some(scalar_value(pos, v, Quantity::Frequency, "sweep from")?);
    }
    if let Some(v) = &s.to {
        spec.to = Some(scalar_value(pos, v, Quantity::Frequency, "sweep to")?);
    }
    if let Some(v) = &s.per_decade {
        spec.per_decade = Some(scalar_value(pos, v, Quantity::Ratio, "per_decade")?);
    }
    if let Some(v) = &s.points {
        let p = *v.get_ref();
        if p < 1 {
            return Err(pos.err(v.span(), format!("points must be at least 2, got {p}")));
        }
        spec.points = Some(usize::try_from(p).unwrap_or(usize::MAX));
    }
    let given = [s.per_decade.is_some(), s.points.is_some(), s.at.is_some()]
        .iter()
        .filter(|b| **b)
        .count();
    if given > 1 {
        let span =
            s.at.as_ref()
                .map(|a| a.span())
                .or(s.points.as_ref().map(|p| p.span()))
                .unwrap_or(0..0);
        return Err(pos.err(
            span,
            "give only one of per_decade (log), points (linear) or at (a list)",
        ));
    }
    if let Some(at) = &s.at {
        if s.from.is_some() || s.to.is_some() {
            return Err(pos.err(at.span(), "a list sweep (at) takes no from or to"));
        }
        let mut list = Vec::with_capacity(at.get_ref().len());
        for v in at.get_ref() {
            list.push(scalar_value(pos, v, Quantity::Frequency, "sweep at")?);
        }
        spec.at = Some(list);
    }
    // Build once here so range errors point at the sweep table.
    if spec.at.is_some() || (spec.from.is_some() && spec.to.is_some()) {
        spec.grid().map_err(|e| {
            let span = s
                .from
                .as_ref()
                .map(|f| f.span())
                .or(s.at.as_ref().map(|a| a.span()))
                .unwrap_or(0..0);
            pos.err(span, e.to_string())
        })?;
    }
    Ok(spec)
}

fn two_nodes(
    pos: &Positions<'_>,
    v: &Spanned<Vec<String>>,
    what: &str,
) -> Result<(String, String), DesignError> {
    match v.get_ref().as_slice() {
        [a, b] => Ok((a.clone(), b.clone())),
        other => Err(pos.err(
            v.span(),
            format!(
                "{what} takes two node names, e.g. [\"a\", \"gnd\"]; got {}",
                other.len()
            ),
        )),
    }
}

fn add_part(
    pos: &Positions<'_>,
    b: &mut NetworkBuilder,
    name: &str,
    entry: &Spanned<PartEntry>,
    node_spans: &mut BTreeMap<String, Range<usize>>,
) -> Result<(), DesignError> {
    let e = entry.get_ref();
    let span = entry.span();
    let kinds: Vec<(&str, Range<usize>)> = [
        ("resistor", e.resistor.as_ref().map(Spanned::span)),
        ("capacitor", e.capacitor.as_ref().map(Spanned::span)),
        ("inductor", e.inductor.as_ref().map(Spanned::span)),
        ("voltage", e.voltage.as_ref().map(Spanned::span)),
        ("current", e.current.as_ref().map(Spanned::span)),
        ("vcvs", e.vcvs.as_ref().map(Spanned::span)),
        ("vccs", e.vccs.as_ref().map(Spanned::span)),
        ("ccvs", e.ccvs.as_ref().map(Spanned::span)),
        ("cccs", e.cccs.as_ref().map(Spanned::span)),
        ("opamp", e.opamp.as_ref().map(Spanned::span)),
        ("coupling", e.coupling.as_ref().map(Spanned::span)),
    ]
    .into_iter()
    .filter_map(|(k, s)| s.map(|s| (k, s)))
    .collect();
    let kind = match kinds.as_slice() {
        [] => {
            return Err(pos.err(
                span,
                format!("part {name} has no kind; give one of {}", KINDS.join(", ")),
            ))
        }
        [one] => one.0,
        [_, second, ..] => {
            return Err(pos.err(
                second.1.clone(),
                format!(
                    "part {name} has two kinds ({} and {}); give exactly one",
                    kinds[0].0, second.0
                ),
            ))
        }
    };
    // Keys each kind allows besides its own.
    let allowed: &[&str] = match kind {
        "resistor" | "capacitor" | "inductor" => &["between", "tolerance"],
        "voltage" | "current" => &["between", "phase"],
        "vcvs" | "vccs" | "ccvs" | "cccs" => &["between", "control"],
        "opamp" => &["noninverting", "inverting", "output", "dc_gain", "gbw"],
        _ => &["k"],
    };
    let present: [(&str, Option<Range<usize>>); 10] = [
        ("between", e.between.as_ref().map(Spanned::span)),
        ("control", e.control.as_ref().map(Spanned::span)),
        ("k", e.k.as_ref().map(Spanned::span)),
        ("tolerance", e.tolerance.as_ref().map(Spanned::span)),
        ("phase", e.phase.as_ref().map(Spanned::span)),
        ("noninverting", e.noninverting.as_ref().map(Spanned::span)),
        ("inverting", e.inverting.as_ref().map(Spanned::span)),
        ("output", e.output.as_ref().map(Spanned::span)),
        ("dc_gain", e.dc_gain.as_ref().map(Spanned::span)),
        ("gbw", e.gbw.as_ref().map(Spanned::span)),
    ];
    for (key, s) in &present {
        if let Some(s) = s {
            if !allowed.contains(key) {
                return Err(pos.err(
                    s.clone(),
                    format!(
                        "key {key} does not apply to a {kind} (part {name}); it takes {}",
                        allowed.join(", ")
                    ),
                ));
            }
        }
    }
    let between = || -> Result<&Spanned<Vec<String>>, DesignError> {
        e.between.as_ref().ok_or_else(|| {
            pos.err(
                span.clone(),
                format!("part {name} ({kind}) needs between = [\"node\", \"node\"]"),
            )
        })
    };
    let mut note_nodes = |nodes: &[&str], s: Range<usize>| {
        for n in nodes {
            node_spans
                .entry((*n).to_string())
                .or_insert_with(|| s.clone());
        }
    };
    let net_err = |e: NetworkError| pos.err(span.clone(), e.to_string());
    let value = |v: &Spanned<Scalar>, q: Quantity| scalar_value(pos, v, q, &format!("part {name}"));
    match kind {
        "resistor" | "capacitor" | "inductor" => {
            let nodes = between()?;
            let (a, bb) = two_nodes(pos, nodes, "between")?;
            note_nodes(&[&a, &bb], nodes.span());
            let (v, q) = match kind {
                "resistor" => (e.resistor.as_ref(), Quantity::Resistance),
                "capacitor" => (e.capacitor.as_ref(), Quantity::Capacitance),
                _ => (e.inductor.as_ref(), Quantity::Inductance),
            };
            let spanned = v.ok_or_else(|| pos.err(span.clone(), "missing value"))?;
            let x = value(spanned, q)?;
            let r = match kind {
                "resistor" => b.resistor(name, &a, &bb, x),
                "capacitor" => b.capacitor(name, &a, &bb, x),
                _ => b.inductor(name, &a, &bb, x),
            };
            r.map_err(|e| match e {
                NetworkError::NotPositive { .. } | NetworkError::OutOfRange { .. } => {
                    pos.err(spanned.span(), e.to_string())
                }
                other => net_err(other),
            })?;
            if let Some(t) = &e.tolerance {
                let frac = value(t, Quantity::Percent)?;
                b.tolerance(name, frac)
                    .map_err(|e| pos.err(t.span(), e.to_string()))?;
            }
        }
        "voltage" | "current" => {
            let nodes = between()?;
            let (a, bb) = two_nodes(pos, nodes, "between")?;
            let (v, q) = if kind == "voltage" {
                (e.voltage.as_ref(), Quantity::Voltage)
            } else {
                (e.current.as_ref(), Quantity::Current)
            };
            let spanned = v.ok_or_else(|| pos.err(span.clone(), "missing value"))?;
            let magnitude = value(spanned, q)?;
            let phase = match &e.phase {
                Some(p) => value(p, Quantity::Angle)?,
                None => 0.0,
            };
            let phasor = Complex64::from_polar(magnitude, phase.to_radians());
            let r = if kind == "voltage" {
                b.voltage_source(name, &a, &bb, phasor)
            } else {
                b.current_source(name, &a, &bb, phasor)
            };
            r.map_err(net_err)?;
        }
        "vcvs" | "vccs" | "ccvs" | "cccs" => {
            let nodes = between()?;
            let (a, bb) = two_nodes(pos, nodes, "between")?;
            let control = e.control.as_ref().ok_or_else(|| {
                pos.err(
                    span.clone(),
                    if kind.starts_with('v') {
                        format!("part {name} ({kind}) needs control = [\"node\", \"node\"], the voltage it senses")
                    } else {
                        format!("part {name} ({kind}) needs control = \"PART\", the part whose current it senses")
                    },
                )
            })?;
            let (vq, what) = match kind {
                "vcvs" => (Quantity::Ratio, "gain"),
                "vccs" => (Quantity::Conductance, "transconductance"),
                "ccvs" => (Quantity::Resistance, "transresistance"),
                _ => (Quantity::Ratio, "current gain"),
            };
            let spanned = match kind {
                "vcvs" => e.vcvs.as_ref(),
                "vccs" => e.vccs.as_ref(),
                "ccvs" => e.ccvs.as_ref(),
                _ => e.cccs.as_ref(),
            }
            .ok_or_else(|| pos.err(span.clone(), format!("missing {what}")))?;
            let g = value(spanned, vq)?;
            let r = match (kind, control.get_ref()) {
                ("vcvs" | "vccs", ProbeEntry::Pair(p)) if p.len() == 2 => {
                    note_nodes(&[&p[0], &p[1]], control.span());
                    if kind == "vcvs" {
                        b.vcvs(name, (&a, &bb), (&p[0], &p[1]), g)
                    } else {
                        b.vccs(name, (&a, &bb), (&p[0], &p[1]), g)
                    }
                }
                ("vcvs" | "vccs", _) => {
                    return Err(pos.err(
                        control.span(),
                        format!("part {name} ({kind}) senses a voltage: control takes two node names, e.g. [\"in\", \"gnd\"]"),
                    ))
                }
                ("ccvs" | "cccs", ProbeEntry::Node(part)) => {
                    if kind == "ccvs" {
                        b.ccvs(name, (&a, &bb), part, g)
                    } else {
                        b.cccs(name, (&a, &bb), part, g)
                    }
                }
                _ => {
                    return Err(pos.err(
                        control.span(),
                        format!("part {name} ({kind}) senses a current: control takes the name of a part, e.g. \"V1\""),
                    ))
                }
            };
            r.map_err(net_err)?;
        }
        "opamp" => {
            let model = e.opamp.as_ref().map(|m| m.get_ref().as_str()).unwrap_or("");
            let pin = |v: &Option<Spanned<String>>, key: &str| {
                v.as_ref().map(|s| s.get_ref().clone()).ok_or_else(|| {
                    pos.err(
                        span.clone(),
                        format!("op-amp {name} needs {key} = \"node\""),
                    )
                })
            };
            let (np, nm, out) = (
                pin(&e.noninverting, "noninverting")?,
                pin(&e.inverting, "inverting")?,
                pin(&e.output, "output")?,
            );
            match model {
                "ideal" => {
                    for (k, s) in [("dc_gain", &e.dc_gain), ("gbw", &e.gbw)] {
                        if let Some(s) = s {
                            return Err(pos.err(s.span(), format!("an ideal op-amp takes no {k}; use opamp = \"single-pole\" for a finite one")));
                        }
                    }
                    b.ideal_opamp(name, &np, &nm, &out).map_err(net_err)?;
                }
                "single-pole" => {
                    let dc = e.dc_gain.as_ref().ok_or_else(|| pos.err(span.clone(), format!("op-amp {name} (single-pole) needs dc_gain, e.g. dc_gain = \"200k\"")))?;
                    let gbw = e.gbw.as_ref().ok_or_else(|| {
                        pos.err(
                            span.clone(),
                            format!("op-amp {name} (single-pole) needs gbw, e.g. gbw = \"10 MHz\""),
                        )
                    })?;
                    let (dcv, gv) = (
                        value(dc, Quantity::Ratio)?,
                        value(gbw, Quantity::Frequency)?,
                    );
                    b.single_pole_opamp(name, &np, &nm, &out, dcv, gv)
                        .map_err(net_err)?;
                }
                other => {
                    let s = e.opamp.as_ref().map_or(span.clone(), Spanned::span);
                    return Err(pos.err(
                        s,
                        format!("unknown op-amp model {other:?}; use \"ideal\" or \"single-pole\""),
                    ));
                }
            }
        }
        _ => {
            let pair = e
                .coupling
                .as_ref()
                .ok_or_else(|| pos.err(span.clone(), "missing coupling"))?;
            let (l1, l2) = match pair.get_ref().as_slice() {
                [a, bb] => (a.clone(), bb.clone()),
                _ => {
                    return Err(pos.err(
                        pair.span(),
                        "coupling takes the names of two inductors, e.g. [\"L1\", \"L2\"]",
                    ))
                }
            };
            let kv = e.k.as_ref().ok_or_else(|| {
                pos.err(
                    span.clone(),
                    format!("coupling {name} needs k, the coupling coefficient (0 < k ≤ 1)"),
                )
            })?;
            let k = value(kv, Quantity::Ratio)?;
            b.coupling(name, &l1, &l2, k)
                .map_err(|e| pos.err(kv.span(), e.to_string()))?;
        }
    }
    Ok(())
}

fn read_limit(
    pos: &Positions<'_>,
    responses: &[ResponseSpec],
    name: &str,
    entry: &Spanned<LimitEntry>,
) -> Result<crate::metrics::Limit, DesignError> {
    let e = entry.get_ref();
    let r = e.response.get_ref();
    if !responses.iter().any(|x| &x.name == r) {
        let known: Vec<&str> = responses.iter().map(|x| x.name.as_str()).collect();
        return Err(pos.err(
            e.response.span(),
            format!(
                "limit {name} checks response {r:?}, which the design does not define (it has: {})",
                known.join(", ")
            ),
        ));
    }
    let what = format!("limit {name}");
    let from = scalar_value(pos, &e.from, Quantity::Frequency, &what)?;
    let to = scalar_value(pos, &e.to, Quantity::Frequency, &what)?;
    if !(from >= 0.0 && to >= from) {
        return Err(pos.err(e.to.span(), format!("limit {name}: the range must run upwards from 0 Hz or more, got {from} Hz to {to} Hz")));
    }
    let db = |v: &Option<Spanned<Scalar>>| -> Result<Option<f64>, DesignError> {
        match v {
            Some(s) => Ok(Some(scalar_value(pos, s, Quantity::Ratio, &what)?)),
            None => Ok(None),
        }
    };
    let (min_db, max_db) = (db(&e.min_db)?, db(&e.max_db)?);
    match (min_db, max_db) {
        (None, None) => {
            return Err(pos.err(
                entry.span(),
                format!("limit {name} needs min_db, max_db or both"),
            ))
        }
        (Some(a), Some(b)) if a > b => {
            return Err(pos.err(
                entry.span(),
                format!("limit {name}: min_db ({a}) is above max_db ({b})"),
            ))
        }
        _ => {}
    }
    Ok(crate::metrics::Limit {
        name: name.to_string(),
        response: r.clone(),
        from,
        to,
        min_db,
        max_db,
    })
}

fn read_response(
    pos: &Positions<'_>,
    net: &Network,
    name: &str,
    entry: &Spanned<ResponseEntry>,
) -> Result<ResponseSpec, DesignError> {
    let e = entry.get_ref();
    let node = |n: &str, span: Range<usize>| -> Result<NodeId, DesignError> {
        net.node(n).ok_or_else(|| {
            let mut known: Vec<&str> = net.node_names().iter().map(String::as_str).collect();
            known.sort_unstable();
            pos.err(
                span,
                format!(
                    "response {name} reads node {n:?}, which no part connects to (nodes: {})",
                    known.join(", ")
                ),
            )
        })
    };
    let given = [
        e.ratio.is_some(),
        e.impedance.is_some(),
        e.admittance.is_some(),
    ]
    .iter()
    .filter(|b| **b)
    .count();
    if given != 1 {
        return Err(pos.err(
            entry.span(),
            format!("response {name} needs exactly one of ratio, impedance or admittance"),
        ));
    }
    let kind = if let Some(r) = &e.ratio {
        let probe = |p: &ProbeEntry| -> Result<Probe, DesignError> {
            match p {
                ProbeEntry::Node(n) => Ok(Probe::Voltage(node(n, r.span())?, NodeId::GROUND)),
                ProbeEntry::Pair(v) if v.len() == 2 => Ok(Probe::Voltage(
                    node(&v[0], r.span())?,
                    node(&v[1], r.span())?,
                )),
                ProbeEntry::Pair(_) => Err(pos.err(
                    r.span(),
                    "a voltage between two nodes is written [\"a\", \"b\"]",
                )),
                ProbeEntry::Current { current } => {
                    let id = net.part_id(current).ok_or_else(|| {
                        pos.err(r.span(), format!("response {name} reads the current of {current:?}, which is not a part of this design"))
                    })?;
                    if net.part(id).is_some_and(|p| !p.kind.has_sensable_current()) {
                        return Err(pos.err(
                            r.span(),
                            format!(
                                "response {name}: part {current} has no current of its own to read"
                            ),
                        ));
                    }
                    Ok(Probe::Current(id))
                }
            }
        };
        match r.get_ref().as_slice() {
            [num, den] => ResponseKind::Ratio {
                numerator: probe(num)?,
                denominator: probe(den)?,
            },
            _ => {
                return Err(pos.err(
                    r.span(),
                    "ratio takes two read-outs, [numerator, denominator]: a node \"out\", a pair [\"a\", \"b\"] or { current = \"R1\" }",
                ))
            }
        }
    } else {
        let (v, admittance) = match (&e.impedance, &e.admittance) {
            (Some(v), _) => (v, false),
            (None, Some(v)) => (v, true),
            _ => return Err(pos.err(entry.span(), "missing impedance")),
        };
        let (a, b) = two_nodes(
            pos,
            v,
            if admittance {
                "admittance"
            } else {
                "impedance"
            },
        )?;
        let (na, nb) = (node(&a, v.span())?, node(&b, v.span())?);
        if na == nb {
            return Err(pos.err(
                v.span(),
                format!("response {name}: the two nodes are the same"),
            ));
        }
        if admittance {
            ResponseKind::Admittance(na, nb)
        } else {
            ResponseKind::Impedance(na, nb)
        }
    };
    if let ResponseKind::Ratio {
        numerator,
        denominator,
    } = &kind
    {
        if numerator == denominator {
            return Err(pos.err(
                entry.span(),
                format!("response {name}: numerator and denominator are the same"),
            ));
        }
        let has_source = net.parts().iter().any(|p| {
            matches!(
                p.kind,
                PartKind::VoltageSource { .. } | PartKind::CurrentSource { .. }
            )
        });
        if !has_source {
            return Err(pos.err(entry.span(), format!("response {name} is a ratio, which needs an independent source in [parts]; add one")));
        }
    }
    Ok(ResponseSpec {
        name: name.to_string(),
        kind,
        loop_gain: e.loop_gain.as_ref().is_some_and(|l| *l.get_ref()),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
title = "t"
[sweep]
from = "10 Hz"
to = "1 MHz"
per_decade = 10
[parts]
V1 = { voltage = "1 V", between = ["in", "gnd"] }
R1 = { resistor = "1k", between = ["in", "out"], tolerance = "1%" }
C1 = { capacitor = "100n", between = ["out", "gnd"] }
[responses]
gain = { ratio = ["out", "in"] }
zin = { impedance = ["in", "gnd"] }
"#;

    #[test]
    fn reads_a_good_design() {
        let d = parse(GOOD).unwrap();
        assert_eq!(d.network.parts().len(), 3);
        assert_eq!(d.responses.len(), 2);
        assert_eq!(d.sweep.grid().unwrap().len(), 51);
        assert_eq!(d.network.parts()[1].tolerance, Some(0.01));
    }

    fn err(text: &str) -> String {
        parse(text).unwrap_err().to_string()
    }

    #[test]
    fn errors_point_at_line_and_column() {
        let bad = GOOD.replace("\"1k\"", "\"1kk\"");
        assert_eq!(
            err(&bad),
            "9:19: part R1: two prefixes in \"1kk\"; expected a resistance such as 4k7, 10 kΩ or 1R5"
        );
        let bad = GOOD.replace("[\"out\", \"in\"]", "[\"outt\", \"in\"]");
        assert!(
            err(&bad).starts_with("12:18: response gain reads node \"outt\""),
            "{}",
            err(&bad)
        );
    }
}
