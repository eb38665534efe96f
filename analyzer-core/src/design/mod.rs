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
//!
//! The TOML grammar is `toml_parser`'s; `tree` assembles the document in a compact form
//! (a 200,000-part design reads in a fraction of a second), and this module walks it.

mod tree;

use crate::network::{
    Distribution, Network, NetworkBuilder, NetworkError, NodeId, Param, PartKind, Tolerance,
};
use crate::response::{Probe, ResponseKind, ResponseSpec};
use crate::sweep::{Grid, GridError};
use crate::units::{parse_value, Hertz, Quantity};
use num_complex::Complex64;
use smallvec::SmallVec;
use std::borrow::Cow;
use std::ops::Range;
use tree::{Key, Scalar, Table, Value};

/// The TOML tree of `text` rendered canonically (see [`crate::fuzz_targets::toml_tree`]).
pub(crate) fn render_tree(text: &str) -> Result<String, String> {
    fn show(v: Value<'_, '_>) -> String {
        match v {
            Value::Scalar { .. } => match v.scalar() {
                Some(Scalar::Str(s)) => format!("{s:?}"),
                Some(Scalar::Int(i)) => i.to_string(),
                Some(Scalar::Float(f)) => format!("{f:?}"),
                Some(Scalar::Bool(b)) => b.to_string(),
                Some(Scalar::DateTime) | None => "?".into(),
            },
            Value::Table(t) => {
                let mut inner: Vec<(String, String)> = t
                    .entries()
                    .map(|(k, v)| (format!("{:?}", k.text), show(v)))
                    .collect();
                inner.sort();
                let inner: Vec<String> =
                    inner.into_iter().map(|(k, v)| format!("{k}={v}")).collect();
                format!("{{{}}}", inner.join(","))
            }
            Value::Array(a) => {
                let inner: Vec<String> = a.items().map(show).collect();
                format!("[{}]", inner.join(","))
            }
        }
    }
    struct Keep;
    impl<'s> tree::Consumer<'s> for Keep {
        fn offer(&mut self, _: &[Cow<'s, str>], _: Key<'s>, _: Table<'_, 's>) -> tree::Offer {
            tree::Offer::Kept
        }
    }
    match tree::parse_with(text, &mut Keep) {
        Ok(doc) => Ok(show(Value::Table(doc.root()))),
        Err(tree::Failure::Syntax(e)) => Err(e.message),
        Err(tree::Failure::Stopped) => Err("stopped".into()),
    }
}

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
    /// Limits on the return loss (or VSWR) of ports, in file order.
    pub port_limits: Vec<crate::ports::PortLimit>,
    /// Ports for the N-port analysis, in file order.
    pub ports: Vec<crate::ports::Port>,
    /// Whether the design mentions a mains, high-voltage or medical use in its title or
    /// `caution` key, so reports carry the safety caution.
    pub caution: bool,
    /// Things that are legal but probably not meant (values far outside the usual range of
    /// their kind), in file order. Nothing is changed because of them.
    pub warnings: Vec<DesignWarning>,
}

/// A warning about a design file, with its position; the design is read as written.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("{line}:{column}: {message}")]
pub struct DesignWarning {
    /// 1-based line.
    pub line: usize,
    /// 1-based column, in characters.
    pub column: usize,
    /// What looks wrong.
    pub message: String,
}

/// The usual range of each passive kind's value in the networks this tool serves (signal
/// filters, crossovers, matching and EMI networks, sensor front ends): resistors 10 mΩ to
/// 1 GΩ, capacitors 0.1 pF to 1 F, inductors 1 nH to 100 H. A value outside is nearly
/// always a slip (m for M, a lost prefix); the reader warns and uses it as written.
pub const USUAL_RANGES: [(&str, Quantity, f64, f64); 3] = [
    ("resistor", Quantity::Resistance, 10e-3, 1e9),
    ("capacitor", Quantity::Capacitance, 0.1e-12, 1.0),
    ("inductor", Quantity::Inductance, 1e-9, 100.0),
];

/// A warning for a passive value outside [`USUAL_RANGES`], with a hint at the likely slip.
fn unusual_value(kind: &str, name: &str, value: f64, text: Option<&str>) -> Option<String> {
    let &(_, q, lo, hi) = USUAL_RANGES.iter().find(|r| r.0 == kind)?;
    if (lo..=hi).contains(&value) {
        return None;
    }
    let unit = match q {
        Quantity::Resistance => "Ω",
        Quantity::Capacitance => "F",
        _ => "H",
    };
    let eng = |v: f64| crate::units::format_short(v, 4, unit);
    let text = text.unwrap_or("");
    let hint = if text.contains('m') && (lo..=hi).contains(&(value * 1e9)) {
        " (m is milli; for mega write M)"
    } else if text.contains('M') && (lo..=hi).contains(&(value * 1e-9)) {
        " (M is mega; for milli write m)"
    } else if text
        .chars()
        .all(|c| c.is_ascii_digit() || c == '.' || c == ' ')
    {
        " (is a prefix missing?)"
    } else {
        ""
    };
    Some(format!(
        "part {name}: {} is outside the usual {} … {} of a {kind}; it is used as written{hint}",
        eng(value),
        eng(lo),
        eng(hi)
    ))
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

/// The keys an op-amp takes besides its kind.
const OPAMP_KEYS: &[&str] = &[
    "noninverting",
    "inverting",
    "output",
    "dc_gain",
    "gbw",
    "noise_voltage",
    "noise_voltage_corner",
    "noise_current",
    "noise_current_corner",
    "dc_gain_tolerance",
    "gbw_tolerance",
    "distribution",
];

const PART_KEYS: &[&str] = &[
    "between",
    "control",
    "k",
    "tolerance",
    "distribution",
    "dc_gain_tolerance",
    "gbw_tolerance",
    "phase",
    "noninverting",
    "inverting",
    "output",
    "dc_gain",
    "gbw",
    "noise_voltage",
    "noise_voltage_corner",
    "noise_current",
    "noise_current_corner",
];

const TOP_KEYS: &[&str] = &[
    "title",
    "caution",
    "temperature",
    "tolerances",
    "sweep",
    "parts",
    "responses",
    "limits",
    "ports",
];
const SWEEP_KEYS: &[&str] = &["from", "to", "per_decade", "points", "at"];
const RESPONSE_KEYS: &[&str] = &[
    "ratio",
    "impedance",
    "admittance",
    "loop_gain",
    "level_db",
    "reference",
    "noise",
    "referred_to",
    "source",
    "band",
];
const LIMIT_KEYS: &[&str] = &["response", "from", "to", "min_db", "max_db"];
const PORT_KEYS: &[&str] = &["between", "z0", "replaces"];
const PORT_LIMIT_KEYS: &[&str] = &["port", "from", "to", "min_return_loss_db", "max_vswr"];

fn backticked(list: &[&str]) -> String {
    list.iter()
        .map(|k| format!("`{k}`"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// A table's entries by name, checked against the keys it may have.
struct Fields<'d, 's> {
    /// Entries in file order (a part has a handful: kept inline).
    entries: SmallVec<[(Key<'s>, Value<'d, 's>); 8]>,
}

impl<'d, 's> Fields<'d, 's> {
    /// The entries of `table`; a key outside `allowed` is an error made by `unknown`.
    fn of(
        table: Table<'d, 's>,
        allowed: &[&str],
        pos: &Positions<'_>,
        unknown: impl Fn(&str) -> String,
    ) -> Result<Self, DesignError> {
        Self::of_any(table, &[allowed], pos, unknown)
    }

    /// As [`Fields::of`], with the allowed keys in several lists.
    fn of_any(
        table: Table<'d, 's>,
        allowed: &[&[&str]],
        pos: &Positions<'_>,
        unknown: impl Fn(&str) -> String,
    ) -> Result<Self, DesignError> {
        let entries: SmallVec<[_; 8]> = table.entries().collect();
        let known = |k: &str| allowed.iter().any(|list| list.contains(&k));
        if let Some((k, _)) = entries.iter().find(|(k, _)| !known(&k.text)) {
            return Err(pos.err(k.span.clone(), unknown(&k.text)));
        }
        Ok(Fields { entries })
    }

    /// The entries in file order.
    fn entries(&self) -> impl Iterator<Item = &(Key<'s>, Value<'d, 's>)> + '_ {
        self.entries.iter()
    }

    fn get(&self, key: &str) -> Option<&(Key<'s>, Value<'d, 's>)> {
        self.entries.iter().find(|(k, _)| k.text == key)
    }

    fn value(&self, key: &str) -> Option<Value<'d, 's>> {
        self.get(key).map(|e| e.1)
    }
}

fn unknown_key(allowed: &'static [&'static str]) -> impl Fn(&str) -> String {
    move |k| format!("unknown key `{k}`, expected one of {}", backticked(allowed))
}

/// A value that must be a table (`what` names it in the message).
fn table<'d, 's>(
    pos: &Positions<'_>,
    v: Value<'d, 's>,
    what: impl FnOnce() -> String,
) -> Result<Table<'d, 's>, DesignError> {
    match v {
        Value::Table(t) => Ok(t),
        other => Err(pos.err(
            other.span(),
            format!("{} must be a table, got a {}", what(), other.type_name()),
        )),
    }
}

/// A value that must be a string.
fn string(pos: &Positions<'_>, v: Value<'_, '_>, what: &str) -> Result<String, DesignError> {
    match v.scalar() {
        Some(Scalar::Str(s)) => Ok(s.into_owned()),
        _ => Err(pos.err(
            v.span(),
            format!("{what} must be a string, got a {}", v.type_name()),
        )),
    }
}

fn boolean(pos: &Positions<'_>, v: Value<'_, '_>, what: &str) -> Result<bool, DesignError> {
    match v.scalar() {
        Some(Scalar::Bool(b)) => Ok(b),
        _ => Err(pos.err(
            v.span(),
            format!("{what} must be true or false, got a {}", v.type_name()),
        )),
    }
}

/// A list of strings (node names, part names); None if `v` is anything else.
fn strings<'s>(v: Value<'_, 's>) -> Option<Vec<Cow<'s, str>>> {
    let Value::Array(a) = v else { return None };
    a.items()
        .map(|x| match x.scalar() {
            Some(Scalar::Str(s)) => Some(s),
            _ => None,
        })
        .collect()
}

/// A number given as text with an optional prefix and unit (`"10 kHz"`), or as a TOML number.
fn number(
    pos: &Positions<'_>,
    v: Value<'_, '_>,
    q: Quantity,
    what: &dyn std::fmt::Display,
) -> Result<f64, DesignError> {
    let x = match v.scalar() {
        Some(Scalar::Str(t)) => {
            parse_value(&t, q).map_err(|e| pos.err(v.span(), format!("{what}: {e}")))?
        }
        Some(Scalar::Int(i)) => i as f64,
        Some(Scalar::Float(f)) => f,
        _ => {
            return Err(pos.err(
                v.span(),
                format!(
                    "{what}: expected a number or a value such as \"10k\", got a {}",
                    v.type_name()
                ),
            ))
        }
    };
    if !x.is_finite() {
        return Err(pos.err(v.span(), format!("{what}: {x} is not a finite number")));
    }
    if q == Quantity::Percent && !matches!(v.scalar(), Some(Scalar::Str(_))) {
        return Err(pos.err(
            v.span(),
            format!("{what}: write a tolerance as text with a % sign, e.g. \"1%\""),
        ));
    }
    Ok(x)
}

/// What a design without `[responses]` is told by an analysis that reads responses (a design
/// with `[ports]` alone parses, for the N-port analysis).
pub const NO_RESPONSES: &str =
    "the design has no [responses]; name at least one, e.g. gain = { ratio = [\"out\", \"in\"] }";

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
    // Parts written as `NAME = { … }` below `[parts]` are added as the parser reaches them,
    // so a generated design of 200,000 parts is never held as a tree.
    let mut builder = NetworkBuilder::new("");
    // About one part per line: room for them all at once (a guess too high costs address
    // space, not memory).
    builder.reserve(text.bytes().filter(|&c| c == b'\n').count() + 1);
    let mut reader = PartsReader {
        pos: &pos,
        builder,
        spans: Vec::new(),
        error: None,
        warnings: Vec::new(),
        inherit: Vec::new(),
    };
    let doc = match tree::parse_with(text, &mut reader) {
        Ok(doc) => doc,
        Err(tree::Failure::Syntax(e)) => return Err(pos.err(e.span, e.message)),
        Err(tree::Failure::Stopped) => {
            return Err(reader
                .error
                .unwrap_or_else(|| pos.err(0..0, "the design could not be read")))
        }
    };
    let top = Fields::of(doc.root(), TOP_KEYS, &pos, unknown_key(TOP_KEYS))?;
    let title = match top.value("title") {
        Some(v) => string(&pos, v, "title")?,
        None => "untitled design".to_string(),
    };
    let caution_key = match top.value("caution") {
        Some(v) => boolean(&pos, v, "caution")?,
        None => false,
    };
    if let Some(v) = top.value("temperature") {
        let k = temperature(&pos, v)?;
        reader
            .builder
            .temperature(k)
            .map_err(|e| pos.err(v.span(), e.to_string()))?;
    }
    let parts = top.value("parts").ok_or_else(|| {
        pos.err(
            0..0,
            "the design has no [parts] table; add the network's parts",
        )
    })?;
    let parts_span = parts.span();
    let parts = table(&pos, parts, || "[parts]".into())?;
    if parts.len() == 0 && reader.spans.is_empty() {
        return Err(pos.err(
            parts_span,
            "the [parts] table is empty; add the network's parts",
        ));
    }
    // Parts written in other forms (`[parts.NAME]` tables, dotted keys, an inline [parts]).
    for (key, value) in parts.entries() {
        let entry = table(&pos, value, || format!("part {}", key.text))?;
        reader.add(&key.text, entry)?;
    }
    let PartsReader {
        mut builder,
        spans,
        warnings,
        inherit,
        ..
    } = reader;
    if let Some(t) = top.value("tolerances") {
        let t = table(&pos, t, || "[tolerances]".into())?;
        default_tolerances(&pos, &mut builder, t, &inherit)?;
    }
    let mut network = builder.build_locating().map_err(|(e, at)| {
        let span = at
            .and_then(|i| spans.get(i.0).cloned())
            .unwrap_or(parts_span.clone());
        pos.err(span, e.to_string())
    })?;
    network.title = title.clone();

    let sweep = match top.value("sweep") {
        Some(s) => read_sweep(&pos, table(&pos, s, || "[sweep]".into())?)?,
        None => SweepSpec::default(),
    };

    let mut responses: Vec<ResponseSpec> = Vec::new();
    // Noise responses referred to another response, resolved once all are read.
    let mut referred: Vec<(usize, String, Range<usize>)> = Vec::new();
    if let Some(rs) = top.value("responses") {
        for (key, value) in table(&pos, rs, || "[responses]".into())?.entries() {
            let entry = table(&pos, value, || format!("response {}", key.text))?;
            if let Some(v) = Fields::of(entry, RESPONSE_KEYS, &pos, unknown_key(RESPONSE_KEYS))?
                .value("referred_to")
            {
                let target = string(&pos, v, &format!("response {}: referred_to", key.text))?;
                referred.push((responses.len(), target, v.span()));
            }
            responses.push(read_response(&pos, &network, &key.text, entry)?);
        }
    }
    for (i, target, span) in referred {
        let name = responses[i].name.clone();
        let Some(j) = responses.iter().position(|r| r.name == target) else {
            let known: Vec<&str> = responses.iter().map(|x| x.name.as_str()).collect();
            return Err(pos.err(
                span,
                format!(
                    "response {name} is referred to {target:?}, which the design does not define (it has: {})",
                    known.join(", ")
                ),
            ));
        };
        if !matches!(responses[j].kind, ResponseKind::Ratio { .. })
            || responses[j].kind.unit() != crate::response::ResponseUnit::Ratio
        {
            return Err(pos.err(
                span,
                format!("response {name} is referred to {target:?}, which is not a voltage or current ratio; noise is referred to a gain"),
            ));
        }
        if let ResponseKind::Noise { referred_to, .. } = &mut responses[i].kind {
            *referred_to = Some(j);
        }
    }
    let mut ports = Vec::new();
    if let Some(ps) = top.value("ports") {
        for (key, value) in table(&pos, ps, || "[ports]".into())?.entries() {
            let entry = table(&pos, value, || format!("port {}", key.text))?;
            ports.push(read_port(&pos, &network, &key.text, entry)?);
        }
    }
    // A design of ports alone (an attenuator, a matching network) is whole for the N-port
    // analysis; every other analysis asks for responses ([`NO_RESPONSES`]).
    if responses.is_empty() && ports.is_empty() {
        return Err(pos.err(0..0, NO_RESPONSES));
    }
    let mut limits = Vec::new();
    let mut port_limits = Vec::new();
    if let Some(ls) = top.value("limits") {
        for (key, value) in table(&pos, ls, || "[limits]".into())?.entries() {
            let entry = table(&pos, value, || format!("limit {}", key.text))?;
            if entry.entries().any(|(k, _)| k.text == "port") {
                port_limits.push(read_port_limit(&pos, &ports, &key.text, entry)?);
            } else {
                limits.push(read_limit(&pos, &responses, &key.text, entry)?);
            }
        }
    }
    let lower = title.to_lowercase();
    let caution = caution_key
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
        ports,
        port_limits,
        caution,
        warnings,
    })
}

fn read_port(
    pos: &Positions<'_>,
    net: &Network,
    name: &str,
    entry: Table<'_, '_>,
) -> Result<crate::ports::Port, DesignError> {
    let span = entry.span();
    let e = Fields::of(entry, PORT_KEYS, pos, unknown_key(PORT_KEYS))?;
    let bv = e.value("between").ok_or_else(|| {
        pos.err(
            span.clone(),
            format!("port {name} needs between = [\"node\", \"node\"]"),
        )
    })?;
    let (a, b) = two_nodes(pos, bv, "between")?;
    let node = |n: &str| {
        net.node(n).ok_or_else(|| {
            let mut known: Vec<&str> = net.node_names().iter().map(String::as_str).collect();
            known.sort_unstable();
            pos.err(
                bv.span(),
                format!(
                    "port {name} is on node {n:?}, which no part connects to (nodes: {})",
                    known.join(", ")
                ),
            )
        })
    };
    let (plus, minus) = (node(&a)?, node(&b)?);
    if plus == minus {
        return Err(pos.err(
            bv.span(),
            format!("port {name}: the two nodes are the same"),
        ));
    }
    let z0 = match e.value("z0") {
        Some(v) => {
            let z = number(pos, v, Quantity::Resistance, &format!("port {name}: z0"))?;
            if !(z > 0.0 && z.is_finite()) {
                return Err(pos.err(
                    v.span(),
                    format!(
                        "port {name}: z0 must be a positive real impedance in ohms, e.g. \"50\""
                    ),
                ));
            }
            z
        }
        None => 50.0,
    };
    let mut replaces = Vec::new();
    if let Some(v) = e.value("replaces") {
        let shape = || {
            pos.err(
                v.span(),
                format!("port {name}: replaces takes a list of source names, e.g. [\"Vtx\"]"),
            )
        };
        let Value::Array(a) = v else {
            return Err(shape());
        };
        for item in a.items() {
            let Some(Scalar::Str(part)) = item.scalar() else {
                return Err(shape());
            };
            let id = net.part_id(&part).ok_or_else(|| {
                pos.err(
                    item.span(),
                    format!("port {name} replaces {part:?}, which is not a part of this design"),
                )
            })?;
            // A source the port stands in for, or the termination resistor across the
            // port's own nodes that its z0 takes the place of.
            let across = |a: NodeId, b: NodeId| (a, b) == (plus, minus) || (a, b) == (minus, plus);
            match net.part(id).map(|p| &p.kind) {
                Some(PartKind::VoltageSource { .. } | PartKind::CurrentSource { .. }) => {}
                Some(PartKind::Resistor { a, b, .. }) if across(*a, *b) => {}
                Some(PartKind::Resistor { .. }) => {
                    return Err(pos.err(
                        item.span(),
                        format!(
                            "port {name} replaces {part}, a resistor that is not across the port's nodes; a port replaces a source, or the termination resistor across its own nodes"
                        ),
                    ))
                }
                _ => {
                    return Err(pos.err(
                        item.span(),
                        format!(
                            "port {name} replaces {part}, which is not a source or a termination resistor across the port"
                        ),
                    ))
                }
            }
            replaces.push(id);
        }
    }
    Ok(crate::ports::Port {
        name: name.to_string(),
        plus,
        minus,
        z0,
        replaces,
    })
}

fn read_sweep(pos: &Positions<'_>, t: Table<'_, '_>) -> Result<SweepSpec, DesignError> {
    let s = Fields::of(t, SWEEP_KEYS, pos, unknown_key(SWEEP_KEYS))?;
    let mut spec = SweepSpec::default();
    if let Some(v) = s.value("from") {
        spec.from = Some(number(pos, v, Quantity::Frequency, &"sweep from")?);
    }
    if let Some(v) = s.value("to") {
        spec.to = Some(number(pos, v, Quantity::Frequency, &"sweep to")?);
    }
    if let Some(v) = s.value("per_decade") {
        spec.per_decade = Some(number(pos, v, Quantity::Ratio, &"per_decade")?);
    }
    if let Some(v) = s.value("points") {
        let p = match v.scalar() {
            Some(Scalar::Int(p)) => p,
            _ => {
                return Err(pos.err(
                    v.span(),
                    format!("points must be a whole number, got a {}", v.type_name()),
                ))
            }
        };
        if p < 1 {
            return Err(pos.err(v.span(), format!("points must be at least 2, got {p}")));
        }
        spec.points = Some(usize::try_from(p).unwrap_or(usize::MAX));
    }
    let given = ["per_decade", "points", "at"]
        .iter()
        .filter(|k| s.get(k).is_some())
        .count();
    if given > 1 {
        let span = s
            .value("at")
            .or(s.value("points"))
            .map_or(0..0, |v| v.span());
        return Err(pos.err(
            span,
            "give only one of per_decade (log), points (linear) or at (a list)",
        ));
    }
    if let Some(at) = s.value("at") {
        if s.get("from").is_some() || s.get("to").is_some() {
            return Err(pos.err(at.span(), "a list sweep (at) takes no from or to"));
        }
        let Value::Array(items) = at else {
            return Err(pos.err(
                at.span(),
                "at takes a list of frequencies, e.g. at = [\"50 Hz\", \"1 kHz\"]",
            ));
        };
        let mut list = Vec::with_capacity(items.len());
        for v in items.items() {
            list.push(number(pos, v, Quantity::Frequency, &"sweep at")?);
        }
        spec.at = Some(list);
    }
    // Build once here so range errors point at the sweep table.
    if spec.at.is_some() || (spec.from.is_some() && spec.to.is_some()) {
        spec.grid().map_err(|e| {
            let span = s.value("from").or(s.value("at")).map_or(0..0, |v| v.span());
            pos.err(span, e.to_string())
        })?;
    }
    Ok(spec)
}

fn two_nodes<'s>(
    pos: &Positions<'_>,
    v: Value<'_, 's>,
    what: &str,
) -> Result<(Cow<'s, str>, Cow<'s, str>), DesignError> {
    let shape = |got: Option<usize>| {
        let got = got.map(|n| format!("; got {n}")).unwrap_or_default();
        pos.err(
            v.span(),
            format!("{what} takes two node names, e.g. [\"a\", \"gnd\"]{got}"),
        )
    };
    let Value::Array(a) = v else {
        return Err(shape(None));
    };
    if a.len() != 2 {
        return Err(shape(Some(a.len())));
    }
    let mut items = a.items().map(|x| match x.scalar() {
        Some(Scalar::Str(s)) => Some(s),
        _ => None,
    });
    match (items.next().flatten(), items.next().flatten()) {
        (Some(p), Some(q)) => Ok((p, q)),
        _ => Err(shape(None)),
    }
}

/// Adds parts to the network as they are read, recording where each was written.
struct PartsReader<'p, 't> {
    pos: &'p Positions<'t>,
    builder: NetworkBuilder,
    /// Span of each part added, in the builder's order.
    spans: Vec<Range<usize>>,
    /// The error that stopped the parse.
    error: Option<DesignError>,
    warnings: Vec<DesignWarning>,
    /// Tolerances given without a distribution, for `[tolerances]` to set.
    inherit: Vec<(String, Param)>,
}

impl PartsReader<'_, '_> {
    fn add(&mut self, name: &str, entry: Table<'_, '_>) -> Result<(), DesignError> {
        self.spans.push(entry.span());
        add_part(
            self.pos,
            &mut self.builder,
            name,
            entry,
            &mut self.warnings,
            &mut self.inherit,
        )
    }
}

impl<'s> tree::Consumer<'s> for PartsReader<'_, '_> {
    fn offer(
        &mut self,
        header: &[Cow<'s, str>],
        key: Key<'s>,
        value: Table<'_, 's>,
    ) -> tree::Offer {
        if header.len() != 1 || header[0] != "parts" {
            return tree::Offer::Kept;
        }
        match self.add(&key.text, value) {
            Ok(()) => tree::Offer::Taken,
            Err(e) => {
                self.error = Some(e);
                tree::Offer::Stop
            }
        }
    }
}

/// A noise density such as `"4 nV"`, `"4 nV/√Hz"` or `"0.5 pA/rtHz"` (the per-root-hertz
/// is implied and may be written).
fn noise_density(
    pos: &Positions<'_>,
    v: Value<'_, '_>,
    q: Quantity,
    what: &dyn std::fmt::Display,
) -> Result<f64, DesignError> {
    if let Some(Scalar::Str(t)) = v.scalar() {
        let trimmed = ["/√Hz", "/rtHz", "/sqrt(Hz)", "/√(Hz)"]
            .iter()
            .find_map(|suffix| t.trim_end().strip_suffix(suffix))
            .unwrap_or(&t);
        let x = parse_value(trimmed, q).map_err(|e| pos.err(v.span(), format!("{what}: {e}")))?;
        if x < 0.0 {
            return Err(pos.err(
                v.span(),
                format!("{what}: a noise density cannot be negative"),
            ));
        }
        return Ok(x);
    }
    number(pos, v, q, what)
}

/// A temperature such as `"27 °C"`, `"300 K"`, `"27 degC"`, or a number of kelvin.
fn temperature(pos: &Positions<'_>, v: Value<'_, '_>) -> Result<f64, DesignError> {
    let bad = |m: &str| {
        pos.err(
            v.span(),
            format!("temperature: {m}; give it in K or °C, e.g. \"300 K\" or \"27 °C\""),
        )
    };
    match v.scalar() {
        Some(Scalar::Str(t)) => {
            let t = t.trim();
            let (num, celsius) = if let Some(n) = t
                .strip_suffix("°C")
                .or_else(|| t.strip_suffix("degC"))
                .or_else(|| t.strip_suffix('C'))
            {
                (n, true)
            } else if let Some(n) = t.strip_suffix('K') {
                (n, false)
            } else {
                return Err(bad(&format!("{t:?} has no unit")));
            };
            let x: f64 = num
                .trim()
                .parse()
                .map_err(|_| bad(&format!("{:?} is not a number", num.trim())))?;
            Ok(if celsius { x + 273.15 } else { x })
        }
        Some(Scalar::Int(i)) => Ok(i as f64),
        Some(Scalar::Float(f)) => Ok(f),
        _ => Err(bad("expected text such as \"300 K\"")),
    }
}

/// "part NAME" in messages, written only when one is.
struct PartName<'a>(&'a str);

impl std::fmt::Display for PartName<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "part {}", self.0)
    }
}

fn add_part(
    pos: &Positions<'_>,
    b: &mut NetworkBuilder,
    name: &str,
    entry: Table<'_, '_>,
    warnings: &mut Vec<DesignWarning>,
    inherit: &mut Vec<(String, Param)>,
) -> Result<(), DesignError> {
    let span = entry.span();
    let e = Fields::of_any(entry, &[KINDS, PART_KEYS], pos, |k| {
        format!(
            "unknown part kind or key `{k}`; a part takes one kind ({}) and the keys of that kind (the README's table of part kinds lists them)",
            KINDS.join(", "),
        )
    })?;
    // One pass over the entries: the kinds given, in file order.
    let mut kinds: [Option<(&str, Range<usize>)>; 2] = [None, None];
    for (k, _) in e.entries() {
        if let Some(kind) = KINDS.iter().find(|x| **x == k.text) {
            let slot = if kinds[0].is_none() { 0 } else { 1 };
            let earlier = kinds[slot]
                .as_ref()
                .is_some_and(|(_, s)| s.start < k.span.start);
            if !earlier {
                kinds[slot] = Some((kind, k.span.clone()));
            }
        }
    }
    if let [Some(a), Some(b)] = &kinds {
        let (first, second) = if a.1.start <= b.1.start {
            (a, b)
        } else {
            (b, a)
        };
        return Err(pos.err(
            second.1.clone(),
            format!(
                "part {name} has two kinds ({} and {}); give exactly one",
                first.0, second.0
            ),
        ));
    }
    let Some((kind, _)) = kinds[0].clone() else {
        return Err(pos.err(
            span,
            format!("part {name} has no kind; give one of {}", KINDS.join(", ")),
        ));
    };
    // Keys each kind allows besides its own.
    let allowed: &[&str] = match kind {
        "resistor" | "capacitor" | "inductor" => &["between", "tolerance", "distribution"],
        "voltage" | "current" => &["between", "phase"],
        "vcvs" | "vccs" | "ccvs" | "cccs" => &["between", "control", "tolerance", "distribution"],
        "opamp" => OPAMP_KEYS,
        _ => &["k"],
    };
    if let Some((k, _)) = e
        .entries()
        .find(|(k, _)| PART_KEYS.contains(&&*k.text) && !allowed.contains(&&*k.text))
    {
        return Err(pos.err(
            k.span.clone(),
            format!(
                "key {} does not apply to a {kind} (part {name}); it takes {}",
                k.text,
                allowed.join(", ")
            ),
        ));
    }
    let between = || -> Result<Value<'_, '_>, DesignError> {
        e.value("between").ok_or_else(|| {
            pos.err(
                span.clone(),
                format!("part {name} ({kind}) needs between = [\"node\", \"node\"]"),
            )
        })
    };
    let net_err = |e: NetworkError| pos.err(span.clone(), e.to_string());
    let what = PartName(name);
    let value = |v: Value<'_, '_>, q: Quantity| number(pos, v, q, &what);
    let kind_value = e
        .value(kind)
        .ok_or_else(|| pos.err(span.clone(), "missing value"))?;
    match kind {
        "resistor" | "capacitor" | "inductor" => {
            let (a, bb) = two_nodes(pos, between()?, "between")?;
            let q = match kind {
                "resistor" => Quantity::Resistance,
                "capacitor" => Quantity::Capacitance,
                _ => Quantity::Inductance,
            };
            let x = value(kind_value, q)?;
            let text = match kind_value.scalar() {
                Some(Scalar::Str(t)) => Some(t),
                _ => None,
            };
            if let Some(message) = unusual_value(kind, name, x, text.as_deref()) {
                let (line, column) = pos.at(kind_value.span().start);
                warnings.push(DesignWarning {
                    line,
                    column,
                    message,
                });
            }
            let r = match kind {
                "resistor" => b.resistor(name, &a, &bb, x),
                "capacitor" => b.capacitor(name, &a, &bb, x),
                _ => b.inductor(name, &a, &bb, x),
            };
            r.map_err(|e| match e {
                NetworkError::NotPositive { .. } | NetworkError::OutOfRange { .. } => {
                    pos.err(kind_value.span(), e.to_string())
                }
                other => net_err(other),
            })?;
        }
        "voltage" | "current" => {
            let (a, bb) = two_nodes(pos, between()?, "between")?;
            let q = if kind == "voltage" {
                Quantity::Voltage
            } else {
                Quantity::Current
            };
            let magnitude = value(kind_value, q)?;
            let phase = match e.value("phase") {
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
            let (a, bb) = two_nodes(pos, between()?, "between")?;
            let control = e.value("control").ok_or_else(|| {
                pos.err(
                    span.clone(),
                    if kind.starts_with('v') {
                        format!("part {name} ({kind}) needs control = [\"node\", \"node\"], the voltage it senses")
                    } else {
                        format!("part {name} ({kind}) needs control = \"PART\", the part whose current it senses")
                    },
                )
            })?;
            let vq = match kind {
                "vcvs" | "cccs" => Quantity::Ratio,
                "vccs" => Quantity::Conductance,
                _ => Quantity::Resistance,
            };
            let g = value(kind_value, vq)?;
            let r = if kind.starts_with('v') {
                let pair = strings(control).filter(|p| p.len() == 2);
                let Some(p) = pair else {
                    return Err(pos.err(
                        control.span(),
                        format!("part {name} ({kind}) senses a voltage: control takes two node names, e.g. [\"in\", \"gnd\"]"),
                    ));
                };
                if kind == "vcvs" {
                    b.vcvs(name, (&a, &bb), (&p[0], &p[1]), g)
                } else {
                    b.vccs(name, (&a, &bb), (&p[0], &p[1]), g)
                }
            } else {
                let Some(Scalar::Str(part)) = control.scalar() else {
                    return Err(pos.err(
                        control.span(),
                        format!("part {name} ({kind}) senses a current: control takes the name of a part, e.g. \"V1\""),
                    ));
                };
                if kind == "ccvs" {
                    b.ccvs(name, (&a, &bb), &part, g)
                } else {
                    b.cccs(name, (&a, &bb), &part, g)
                }
            };
            r.map_err(net_err)?;
        }
        "opamp" => {
            let model = string(pos, kind_value, &format!("op-amp {name}: opamp"))?;
            let pin = |key: &str| -> Result<String, DesignError> {
                match e.value(key) {
                    Some(v) => string(pos, v, &format!("op-amp {name}: {key}")),
                    None => Err(pos.err(
                        span.clone(),
                        format!("op-amp {name} needs {key} = \"node\""),
                    )),
                }
            };
            let (np, nm, out) = (pin("noninverting")?, pin("inverting")?, pin("output")?);
            match model.as_str() {
                "ideal" => {
                    for k in ["dc_gain", "gbw"] {
                        if let Some(s) = e.value(k) {
                            return Err(pos.err(s.span(), format!("an ideal op-amp takes no {k}; use opamp = \"single-pole\" for a finite one")));
                        }
                    }
                    b.ideal_opamp(name, &np, &nm, &out).map_err(net_err)?;
                }
                "single-pole" => {
                    let dc = e.value("dc_gain").ok_or_else(|| pos.err(span.clone(), format!("op-amp {name} (single-pole) needs dc_gain, e.g. dc_gain = \"200k\"")))?;
                    let gbw = e.value("gbw").ok_or_else(|| {
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
                    return Err(pos.err(
                        kind_value.span(),
                        format!("unknown op-amp model {other:?}; use \"ideal\" or \"single-pole\""),
                    ));
                }
            }
            let noise_keys = [
                "noise_voltage",
                "noise_voltage_corner",
                "noise_current",
                "noise_current_corner",
            ];
            if noise_keys.iter().any(|k| e.get(k).is_some()) {
                let density = |key: &str, q: Quantity| -> Result<f64, DesignError> {
                    match e.value(key) {
                        Some(v) => noise_density(pos, v, q, &what),
                        None => Ok(0.0),
                    }
                };
                let corner = |key: &str| -> Result<f64, DesignError> {
                    match e.value(key) {
                        Some(v) => value(v, Quantity::Frequency),
                        None => Ok(0.0),
                    }
                };
                let n = crate::network::OpampNoise {
                    voltage: density("noise_voltage", Quantity::Voltage)?,
                    voltage_corner: corner("noise_voltage_corner")?,
                    current: density("noise_current", Quantity::Current)?,
                    current_corner: corner("noise_current_corner")?,
                };
                b.opamp_noise(name, n).map_err(net_err)?;
            }
        }
        _ => {
            let pair = strings(kind_value).filter(|p| p.len() == 2);
            let Some(p) = pair else {
                return Err(pos.err(
                    kind_value.span(),
                    "coupling takes the names of two inductors, e.g. [\"L1\", \"L2\"]",
                ));
            };
            let kv = e.value("k").ok_or_else(|| {
                pos.err(
                    span.clone(),
                    format!("coupling {name} needs k, the coupling coefficient (0 < k ≤ 1)"),
                )
            })?;
            let k = value(kv, Quantity::Ratio)?;
            b.coupling(name, &p[0], &p[1], k)
                .map_err(|e| pos.err(kv.span(), e.to_string()))?;
        }
    }
    part_tolerances(pos, b, name, &e, kind_value, inherit)
}

/// A part's own tolerances (`tolerance`, or an op-amp's `dc_gain_tolerance` and
/// `gbw_tolerance`) and their `distribution`. A tolerance given without a distribution is
/// listed in `inherit`, to take the design's default distribution.
fn part_tolerances(
    pos: &Positions<'_>,
    b: &mut NetworkBuilder,
    name: &str,
    e: &Fields<'_, '_>,
    kind_value: Value<'_, '_>,
    inherit: &mut Vec<(String, Param)>,
) -> Result<(), DesignError> {
    let ideal = matches!(kind_value.scalar(), Some(Scalar::Str(m)) if m == "ideal");
    let distribution = match e.value("distribution") {
        Some(v) => Some(read_distribution(
            pos,
            v,
            &format!("part {name}: distribution"),
        )?),
        None => None,
    };
    let mut any = false;
    for (key, param) in [
        ("tolerance", Param::Main),
        ("dc_gain_tolerance", Param::Main),
        ("gbw_tolerance", Param::Gbw),
    ] {
        let Some(t) = e.value(key) else {
            continue;
        };
        if ideal {
            return Err(pos.err(
                t.span(),
                format!("an ideal op-amp has no values to vary; {key} applies to opamp = \"single-pole\""),
            ));
        }
        let fraction = number(pos, t, Quantity::Percent, &PartName(name))?;
        let tol = Tolerance {
            fraction,
            distribution: distribution.unwrap_or_default(),
        };
        b.tolerance(name, param, tol)
            .map_err(|e| pos.err(t.span(), e.to_string()))?;
        if distribution.is_none() {
            inherit.push((name.to_string(), param));
        }
        any = true;
    }
    if let (Some(v), false) = (e.value("distribution"), any) {
        return Err(pos.err(
            v.span(),
            format!("part {name}: distribution applies to a tolerance; give tolerance = \"1%\" (or the like) too"),
        ));
    }
    Ok(())
}

/// `"uniform"` or `"normal"`.
fn read_distribution(
    pos: &Positions<'_>,
    v: Value<'_, '_>,
    what: &str,
) -> Result<Distribution, DesignError> {
    match string(pos, v, what)?.as_str() {
        "uniform" => Ok(Distribution::Uniform),
        "normal" => Ok(Distribution::Normal),
        other => Err(pos.err(
            v.span(),
            format!("{what}: unknown distribution {other:?}; use \"uniform\" (every value inside ±tolerance, equally likely) or \"normal\" (σ = tolerance/3, cut at ±tolerance)"),
        )),
    }
}

/// The keys of `[tolerances]`: a default tolerance per kind, and the default distribution.
const TOLERANCE_KEYS: &[&str] = &[
    "resistor",
    "capacitor",
    "inductor",
    "controlled",
    "dc_gain",
    "gbw",
    "distribution",
];

/// Reads `[tolerances]` and gives its defaults to every part without a tolerance of its own;
/// tolerances given without a distribution take its `distribution`.
fn default_tolerances(
    pos: &Positions<'_>,
    b: &mut NetworkBuilder,
    table: Table<'_, '_>,
    inherit: &[(String, Param)],
) -> Result<(), DesignError> {
    let e = Fields::of(table, TOLERANCE_KEYS, pos, unknown_key(TOLERANCE_KEYS))?;
    let distribution = match e.value("distribution") {
        Some(v) => read_distribution(pos, v, "[tolerances] distribution")?,
        None => Distribution::Uniform,
    };
    let mut by_key = [None; 6];
    for (slot, key) in by_key.iter_mut().zip(TOLERANCE_KEYS) {
        if let Some(v) = e.value(key) {
            let what = format!("[tolerances] {key}");
            let fraction = number(pos, v, Quantity::Percent, &what)?;
            if !(0.0..1.0).contains(&fraction) {
                return Err(pos.err(
                    v.span(),
                    format!(
                        "{what}: {} is outside 0 % to 100 %",
                        crate::units::format_percent(fraction)
                    ),
                ));
            }
            *slot = Some(Tolerance {
                fraction,
                distribution,
            });
        }
    }
    for (name, param) in inherit {
        b.distribution(name, *param, distribution);
    }
    let [resistor, capacitor, inductor, controlled, dc_gain, gbw] = by_key;
    b.default_tolerances(|kind, param| match (kind, param) {
        (PartKind::Resistor { .. }, Param::Main) => resistor,
        (PartKind::Capacitor { .. }, Param::Main) => capacitor,
        (PartKind::Inductor { .. }, Param::Main) => inductor,
        (
            PartKind::Vcvs { .. }
            | PartKind::Vccs { .. }
            | PartKind::Ccvs { .. }
            | PartKind::Cccs { .. },
            Param::Main,
        ) => controlled,
        (PartKind::SinglePoleOpamp { .. }, Param::Main) => dc_gain,
        (PartKind::SinglePoleOpamp { .. }, Param::Gbw) => gbw,
        _ => None,
    });
    Ok(())
}

fn read_limit(
    pos: &Positions<'_>,
    responses: &[ResponseSpec],
    name: &str,
    entry: Table<'_, '_>,
) -> Result<crate::metrics::Limit, DesignError> {
    let span = entry.span();
    let e = Fields::of(entry, LIMIT_KEYS, pos, unknown_key(LIMIT_KEYS))?;
    let need = |key: &str| {
        e.value(key)
            .ok_or_else(|| pos.err(span.clone(), format!("limit {name} needs {key}")))
    };
    let rv = need("response")?;
    let r = string(pos, rv, &format!("limit {name}: response"))?;
    if !responses.iter().any(|x| x.name == r) {
        let known: Vec<&str> = responses.iter().map(|x| x.name.as_str()).collect();
        return Err(pos.err(
            rv.span(),
            format!(
                "limit {name} checks response {r:?}, which the design does not define (it has: {})",
                known.join(", ")
            ),
        ));
    }
    let what = format!("limit {name}");
    let from = number(pos, need("from")?, Quantity::Frequency, &what)?;
    let tov = need("to")?;
    let to = number(pos, tov, Quantity::Frequency, &what)?;
    if !(from >= 0.0 && to >= from) {
        return Err(pos.err(tov.span(), format!("limit {name}: the range must run upwards from 0 Hz or more, got {from} Hz to {to} Hz")));
    }
    let db = |key: &str| -> Result<Option<f64>, DesignError> {
        match e.value(key) {
            Some(s) => Ok(Some(number(pos, s, Quantity::Ratio, &what)?)),
            None => Ok(None),
        }
    };
    let (min_db, max_db) = (db("min_db")?, db("max_db")?);
    match (min_db, max_db) {
        (None, None) => {
            return Err(pos.err(span, format!("limit {name} needs min_db, max_db or both")))
        }
        (Some(a), Some(b)) if a > b => {
            return Err(pos.err(
                span,
                format!("limit {name}: min_db ({a}) is above max_db ({b})"),
            ))
        }
        _ => {}
    }
    Ok(crate::metrics::Limit {
        name: name.to_string(),
        response: r,
        from,
        to,
        min_db,
        max_db,
    })
}

fn read_port_limit(
    pos: &Positions<'_>,
    ports: &[crate::ports::Port],
    name: &str,
    entry: Table<'_, '_>,
) -> Result<crate::ports::PortLimit, DesignError> {
    let span = entry.span();
    let e = Fields::of(entry, PORT_LIMIT_KEYS, pos, unknown_key(PORT_LIMIT_KEYS))?;
    let need = |key: &str| {
        e.value(key)
            .ok_or_else(|| pos.err(span.clone(), format!("limit {name} needs {key}")))
    };
    let pv = need("port")?;
    let port = string(pos, pv, &format!("limit {name}: port"))?;
    if !ports.iter().any(|p| p.name == port) {
        let known: Vec<&str> = ports.iter().map(|p| p.name.as_str()).collect();
        return Err(pos.err(
            pv.span(),
            format!(
                "limit {name} checks port {port:?}, which the design's [ports] does not define (it has: {})",
                if known.is_empty() { "none".to_string() } else { known.join(", ") }
            ),
        ));
    }
    let what = format!("limit {name}");
    let from = number(pos, need("from")?, Quantity::Frequency, &what)?;
    let tov = need("to")?;
    let to = number(pos, tov, Quantity::Frequency, &what)?;
    if !(from > 0.0 && to >= from) {
        return Err(pos.err(tov.span(), format!("limit {name}: the range must run upwards from above 0 Hz, got {from} Hz to {to} Hz")));
    }
    let (min_rl, max_vswr) = match (e.value("min_return_loss_db"), e.value("max_vswr")) {
        (Some(v), None) => {
            let rl = number(pos, v, Quantity::Ratio, &what)?;
            if !(rl > 0.0 && rl.is_finite()) {
                return Err(pos.err(v.span(), format!("limit {name}: min_return_loss_db is a positive number of dB (return loss as a positive number), e.g. 14")));
            }
            (rl, None)
        }
        (None, Some(v)) => {
            let s = number(pos, v, Quantity::Ratio, &what)?;
            if !(s > 1.0 && s.is_finite()) {
                return Err(pos.err(
                    v.span(),
                    format!("limit {name}: max_vswr must be above 1, e.g. 2"),
                ));
            }
            (crate::ports::return_loss_of_vswr(s), Some(s))
        }
        _ => {
            return Err(pos.err(
                span,
                format!("limit {name} on a port needs one of min_return_loss_db or max_vswr"),
            ))
        }
    };
    Ok(crate::ports::PortLimit {
        name: name.to_string(),
        port,
        from,
        to,
        min_return_loss_db: min_rl,
        max_vswr,
    })
}

fn read_response(
    pos: &Positions<'_>,
    net: &Network,
    name: &str,
    entry: Table<'_, '_>,
) -> Result<ResponseSpec, DesignError> {
    let entry_span = entry.span();
    let e = Fields::of(entry, RESPONSE_KEYS, pos, unknown_key(RESPONSE_KEYS))?;
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
    let given = ["ratio", "impedance", "admittance", "noise"]
        .iter()
        .filter(|k| e.get(k).is_some())
        .count();
    if given != 1 {
        return Err(pos.err(
            entry_span,
            format!("response {name} needs exactly one of ratio, impedance, admittance or noise"),
        ));
    }
    for key in ["referred_to", "source", "band"] {
        if let (Some((k, _)), None) = (e.get(key), e.get("noise")) {
            return Err(pos.err(
                k.span.clone(),
                format!("key {key} belongs to a noise response (response {name} is not one)"),
            ));
        }
    }
    let kind = if let Some(v) = e.value("noise") {
        let (a, b) = match v {
            Value::Array(_) => {
                let (a, b) = two_nodes(pos, v, "noise")?;
                (node(&a, v.span())?, node(&b, v.span())?)
            }
            _ => {
                let n = string(pos, v, &format!("response {name}: noise"))?;
                (node(&n, v.span())?, NodeId::GROUND)
            }
        };
        if a == b {
            return Err(pos.err(
                v.span(),
                format!("response {name}: the two nodes are the same"),
            ));
        }
        let source = match e.value("source") {
            Some(sv) => {
                let part = string(pos, sv, &format!("response {name}: source"))?;
                let id = net.part_id(&part).ok_or_else(|| {
                    pos.err(
                        sv.span(),
                        format!("response {name}: source {part:?} is not a part of this design"),
                    )
                })?;
                if !matches!(
                    net.part(id).map(|p| &p.kind),
                    Some(PartKind::Resistor { .. })
                ) {
                    return Err(pos.err(
                        sv.span(),
                        format!("response {name}: source {part:?} must be a resistor (the signal source's resistance, for the noise figure)"),
                    ));
                }
                Some(id)
            }
            None => None,
        };
        ResponseKind::Noise {
            plus: a,
            minus: b,
            referred_to: None,
            source,
        }
    } else if let Some(r) = e.value("ratio") {
        let rspan = r.span();
        let probe = |p: Value<'_, '_>| -> Result<Probe, DesignError> {
            match p {
                Value::Scalar { .. } => match p.scalar() {
                    Some(Scalar::Str(n)) => Ok(Probe::Voltage(node(&n, rspan.clone())?, NodeId::GROUND)),
                    _ => Err(pos.err(rspan.clone(), "a read-out is a node \"out\", a pair [\"a\", \"b\"] or { current = \"R1\" }")),
                },
                Value::Array(_) => match strings(p) {
                    Some(v) if v.len() == 2 => Ok(Probe::Voltage(
                        node(&v[0], rspan.clone())?,
                        node(&v[1], rspan.clone())?,
                    )),
                    _ => Err(pos.err(
                        rspan.clone(),
                        "a voltage between two nodes is written [\"a\", \"b\"]",
                    )),
                },
                Value::Table(t) => {
                    let f = Fields::of(t, &["current"], pos, |k| {
                        format!("unknown key `{k}` in a read-out; a current is written {{ current = \"R1\" }}")
                    })?;
                    let Some(cv) = f.value("current") else {
                        return Err(pos.err(rspan.clone(), "a current read-out is written { current = \"R1\" }"));
                    };
                    let current = string(pos, cv, &format!("response {name}: current"))?;
                    let id = net.part_id(&current).ok_or_else(|| {
                        pos.err(rspan.clone(), format!("response {name} reads the current of {current:?}, which is not a part of this design"))
                    })?;
                    if net.part(id).is_some_and(|p| !p.kind.has_sensable_current()) {
                        return Err(pos.err(
                            rspan.clone(),
                            format!(
                                "response {name}: part {current} has no current of its own to read"
                            ),
                        ));
                    }
                    Ok(Probe::Current(id))
                }
            }
        };
        let items: Vec<Value<'_, '_>> = match r {
            Value::Array(a) => a.items().collect(),
            _ => Vec::new(),
        };
        match items.as_slice() {
            [num, den] => ResponseKind::Ratio {
                numerator: probe(*num)?,
                denominator: probe(*den)?,
            },
            _ => {
                return Err(pos.err(
                    rspan,
                    "ratio takes two read-outs, [numerator, denominator]: a node \"out\", a pair [\"a\", \"b\"] or { current = \"R1\" }",
                ))
            }
        }
    } else {
        let (v, admittance) = match (e.value("impedance"), e.value("admittance")) {
            (Some(v), _) => (v, false),
            (None, Some(v)) => (v, true),
            _ => return Err(pos.err(entry_span, "missing impedance")),
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
                entry_span,
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
            return Err(pos.err(entry_span, format!("response {name} is a ratio, which needs an independent source in [parts]; add one")));
        }
    }
    let loop_gain = match e.value("loop_gain") {
        Some(v) => boolean(pos, v, &format!("response {name}: loop_gain"))?,
        None => false,
    };
    let level_db = match e.value("level_db") {
        Some(v) => Some(number(
            pos,
            v,
            Quantity::Ratio,
            &format!("response {name}: level_db"),
        )?),
        None => None,
    };
    let reference = match e.value("reference") {
        Some(v) => {
            let text = string(pos, v, &format!("response {name}: reference"))?;
            Some(
                parse_reference(&text)
                    .map_err(|m| pos.err(v.span(), format!("response {name}: {m}")))?,
            )
        }
        None => None,
    };
    let band = match e.value("band") {
        Some(v) => {
            let what = format!("response {name}: band");
            let items: Vec<Value<'_, '_>> = match v {
                Value::Array(a) => a.items().collect(),
                _ => Vec::new(),
            };
            let [lo, hi] = items.as_slice() else {
                return Err(pos.err(
                    v.span(),
                    format!("{what} takes two frequencies, e.g. [\"20 Hz\", \"20 kHz\"]"),
                ));
            };
            let (lo, hi) = (
                number(pos, *lo, Quantity::Frequency, &what)?,
                number(pos, *hi, Quantity::Frequency, &what)?,
            );
            if !(lo > 0.0 && hi > lo) {
                return Err(pos.err(
                    v.span(),
                    format!("{what} must run upwards from above 0 Hz, got {lo} Hz to {hi} Hz"),
                ));
            }
            Some((lo, hi))
        }
        None => None,
    };
    Ok(ResponseSpec {
        name: name.to_string(),
        kind,
        loop_gain,
        level_db,
        reference,
        band,
    })
}

/// Reads a reference for the figures' levels: `auto`, `dc`, `hf`, `peak`, `absolute` or a
/// frequency such as `1 kHz`. The error lists the accepted words.
pub fn parse_reference(text: &str) -> Result<crate::metrics::Reference, String> {
    use crate::metrics::Reference;
    Ok(match text.trim() {
        "auto" => Reference::Auto,
        "dc" => Reference::Dc,
        "hf" => Reference::Hf,
        "peak" => Reference::Peak,
        "absolute" => Reference::Absolute,
        f if f.starts_with(|c: char| c.is_ascii_digit() || c == '.') => {
            Reference::AtFrequency(parse_value(f, Quantity::Frequency).map_err(|e| e.to_string())?)
        }
        other => {
            return Err(format!(
                "reference {other:?} is not one of auto, dc, hf, peak, absolute or a frequency such as 1 kHz"
            ))
        }
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
        assert_eq!(
            d.network.parts()[1].tolerance,
            Some(Tolerance {
                fraction: 0.01,
                distribution: Distribution::Uniform
            })
        );
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
