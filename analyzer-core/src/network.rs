//! The network as a checked, owned model: named nodes and named parts.
//!
//! Node 0 is the reference node, called `gnd`. Every two-terminal part has a first and a
//! second node; its current is counted positive flowing *through the part* from the first node
//! to the second (the passive sign convention). For a current source this means the source's
//! current leaves the network at the first node and enters it at the second.
//!
//! Networks are made by [`NetworkBuilder`], from a design file or from code; the builder checks
//! every value (positive and finite where physics says so, `0 < k ≤ 1` for a coupling) and
//! resolves references between parts (a coupling's inductors, a current-controlled source's
//! control) when [`NetworkBuilder::build`] is called.

use crate::names::NameIndex;
use crate::units::VALUE_LIMIT;
use num_complex::Complex64;
use std::collections::HashMap;

/// Index of a node; 0 is ground.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct NodeId(pub usize);

impl NodeId {
    /// The reference node.
    pub const GROUND: NodeId = NodeId(0);
    /// Whether this is the reference node.
    pub fn is_ground(self) -> bool {
        self.0 == 0
    }
}

/// Index of a part in [`Network::parts`].
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct PartId(pub usize);

/// The name of the reference node in designs.
pub const GROUND_NAME: &str = "gnd";

/// One element of the network.
#[derive(Clone, Debug, PartialEq)]
pub enum PartKind {
    /// Resistor of `ohms` between `a` and `b`.
    Resistor {
        /// First node.
        a: NodeId,
        /// Second node.
        b: NodeId,
        /// Resistance in ohms (> 0).
        ohms: f64,
    },
    /// Capacitor of `farads` between `a` and `b`.
    Capacitor {
        /// First node.
        a: NodeId,
        /// Second node.
        b: NodeId,
        /// Capacitance in farads (> 0).
        farads: f64,
    },
    /// Inductor of `henries` between `a` and `b`; `a` is the dotted end for couplings.
    Inductor {
        /// First (dotted) node.
        a: NodeId,
        /// Second node.
        b: NodeId,
        /// Inductance in henries (> 0).
        henries: f64,
    },
    /// Magnetic coupling of two inductors: M = k·√(L1·L2).
    Coupling {
        /// First inductor.
        first: PartId,
        /// Second inductor.
        second: PartId,
        /// Coupling coefficient, 0 < k ≤ 1.
        k: f64,
    },
    /// Independent voltage source: V(plus) − V(minus) = phasor.
    VoltageSource {
        /// Positive terminal.
        plus: NodeId,
        /// Negative terminal.
        minus: NodeId,
        /// Source phasor in volts.
        phasor: Complex64,
    },
    /// Independent current source: `phasor` flows through the source from `from` to `to`.
    CurrentSource {
        /// Node the current leaves the network at.
        from: NodeId,
        /// Node the current enters the network at.
        to: NodeId,
        /// Source phasor in amperes.
        phasor: Complex64,
    },
    /// Voltage-controlled voltage source: V(plus) − V(minus) = gain·(V(cp) − V(cn)).
    Vcvs {
        /// Output positive terminal.
        plus: NodeId,
        /// Output negative terminal.
        minus: NodeId,
        /// Sensed positive node.
        cp: NodeId,
        /// Sensed negative node.
        cn: NodeId,
        /// Voltage gain (V/V).
        gain: f64,
    },
    /// Voltage-controlled current source: gm·(V(cp) − V(cn)) flows through it from `from` to `to`.
    Vccs {
        /// Node the current leaves the network at.
        from: NodeId,
        /// Node the current enters the network at.
        to: NodeId,
        /// Sensed positive node.
        cp: NodeId,
        /// Sensed negative node.
        cn: NodeId,
        /// Transconductance (S).
        gm: f64,
    },
    /// Current-controlled voltage source: V(plus) − V(minus) = rm·I(control).
    Ccvs {
        /// Output positive terminal.
        plus: NodeId,
        /// Output negative terminal.
        minus: NodeId,
        /// The part whose current is sensed.
        control: PartId,
        /// Transresistance (Ω).
        rm: f64,
    },
    /// Current-controlled current source: gain·I(control) flows through it from `from` to `to`.
    Cccs {
        /// Node the current leaves the network at.
        from: NodeId,
        /// Node the current enters the network at.
        to: NodeId,
        /// The part whose current is sensed.
        control: PartId,
        /// Current gain (A/A).
        gain: f64,
    },
    /// Ideal op-amp: infinite gain, no input current, output referred to ground.
    IdealOpamp {
        /// Non-inverting input.
        noninverting: NodeId,
        /// Inverting input.
        inverting: NodeId,
        /// Output.
        output: NodeId,
    },
    /// Op-amp with finite DC gain and one pole: A(s) = A0 / (1 + s·A0/(2π·GBW)).
    SinglePoleOpamp {
        /// Non-inverting input.
        noninverting: NodeId,
        /// Inverting input.
        inverting: NodeId,
        /// Output.
        output: NodeId,
        /// DC open-loop gain A0 (V/V, > 0).
        dc_gain: f64,
        /// Gain-bandwidth product in Hz (> 0).
        gbw: f64,
    },
}

impl PartKind {
    /// The word used for this kind in designs and messages.
    pub fn word(&self) -> &'static str {
        match self {
            PartKind::Resistor { .. } => "resistor",
            PartKind::Capacitor { .. } => "capacitor",
            PartKind::Inductor { .. } => "inductor",
            PartKind::Coupling { .. } => "coupling",
            PartKind::VoltageSource { .. } => "voltage source",
            PartKind::CurrentSource { .. } => "current source",
            PartKind::Vcvs { .. } => "vcvs",
            PartKind::Vccs { .. } => "vccs",
            PartKind::Ccvs { .. } => "ccvs",
            PartKind::Cccs { .. } => "cccs",
            PartKind::IdealOpamp { .. } => "ideal op-amp",
            PartKind::SinglePoleOpamp { .. } => "single-pole op-amp",
        }
    }

    /// The nodes this part touches, in its own order.
    pub fn nodes(&self) -> Vec<NodeId> {
        match *self {
            PartKind::Resistor { a, b, .. }
            | PartKind::Capacitor { a, b, .. }
            | PartKind::Inductor { a, b, .. } => vec![a, b],
            PartKind::Coupling { .. } => vec![],
            PartKind::VoltageSource { plus, minus, .. } => vec![plus, minus],
            PartKind::CurrentSource { from, to, .. } => vec![from, to],
            PartKind::Vcvs {
                plus,
                minus,
                cp,
                cn,
                ..
            } => vec![plus, minus, cp, cn],
            PartKind::Vccs {
                from, to, cp, cn, ..
            } => vec![from, to, cp, cn],
            PartKind::Ccvs { plus, minus, .. } => vec![plus, minus],
            PartKind::Cccs { from, to, .. } => vec![from, to],
            PartKind::IdealOpamp {
                noninverting,
                inverting,
                output,
            }
            | PartKind::SinglePoleOpamp {
                noninverting,
                inverting,
                output,
                ..
            } => vec![noninverting, inverting, output],
        }
    }

    /// Whether the part's current can be sensed by a current-controlled source or a response.
    /// Current-controlled current sources are excluded so that controls cannot form a cycle.
    pub fn has_sensable_current(&self) -> bool {
        !matches!(self, PartKind::Coupling { .. } | PartKind::Cccs { .. })
    }
}

/// A named part.
#[derive(Clone, Debug, PartialEq)]
pub struct Part {
    /// Unique name, as in the design.
    pub name: String,
    /// What it is and where it connects.
    pub kind: PartKind,
    /// Manufacturing tolerance of the part's main value ([`Param::Main`]), where given.
    pub tolerance: Option<Tolerance>,
    /// Manufacturing tolerance of a single-pole op-amp's gain-bandwidth product, where given.
    pub gbw_tolerance: Option<Tolerance>,
    /// An op-amp's input noise, where given.
    pub noise: Option<Box<OpampNoise>>,
}

/// How a toleranced value spreads over the parts built.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Distribution {
    /// Uniform over ±tolerance: every part inside, none preferred.
    #[default]
    Uniform,
    /// Normal with σ = tolerance/3, truncated at ±tolerance (common practice: a process
    /// centred in its band with 3σ at the band's edge, out-of-band parts sorted out).
    Normal,
}

/// A manufacturing tolerance: the value lies within ±`fraction` of nominal.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize)]
pub struct Tolerance {
    /// Half-width as a fraction of the nominal value (0.01 for ±1 %).
    pub fraction: f64,
    /// How values spread within it.
    pub distribution: Distribution,
}

/// Which value of a part: its main value (the resistance, capacitance, inductance, a
/// controlled source's gain, an op-amp's DC gain) or a single-pole op-amp's gain-bandwidth
/// product.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Param {
    /// R, C, L, k, a controlled source's gain, an op-amp's DC gain.
    Main,
    /// A single-pole op-amp's gain-bandwidth product.
    Gbw,
}

impl PartKind {
    /// The value of `param`, where the part has one.
    pub fn value(&self, param: Param) -> Option<f64> {
        match (self, param) {
            (PartKind::Resistor { ohms, .. }, Param::Main) => Some(*ohms),
            (PartKind::Capacitor { farads, .. }, Param::Main) => Some(*farads),
            (PartKind::Inductor { henries, .. }, Param::Main) => Some(*henries),
            (PartKind::Coupling { k, .. }, Param::Main) => Some(*k),
            (PartKind::Vcvs { gain, .. } | PartKind::Cccs { gain, .. }, Param::Main) => Some(*gain),
            (PartKind::Vccs { gm, .. }, Param::Main) => Some(*gm),
            (PartKind::Ccvs { rm, .. }, Param::Main) => Some(*rm),
            (PartKind::SinglePoleOpamp { dc_gain, .. }, Param::Main) => Some(*dc_gain),
            (PartKind::SinglePoleOpamp { gbw, .. }, Param::Gbw) => Some(*gbw),
            _ => None,
        }
    }

    /// Sets the value of `param`; false where the part has no such value.
    pub fn set_value(&mut self, param: Param, v: f64) -> bool {
        let slot = match (self, param) {
            (PartKind::Resistor { ohms, .. }, Param::Main) => ohms,
            (PartKind::Capacitor { farads, .. }, Param::Main) => farads,
            (PartKind::Inductor { henries, .. }, Param::Main) => henries,
            (PartKind::Coupling { k, .. }, Param::Main) => k,
            (PartKind::Vcvs { gain, .. } | PartKind::Cccs { gain, .. }, Param::Main) => gain,
            (PartKind::Vccs { gm, .. }, Param::Main) => gm,
            (PartKind::Ccvs { rm, .. }, Param::Main) => rm,
            (PartKind::SinglePoleOpamp { dc_gain, .. }, Param::Main) => dc_gain,
            (PartKind::SinglePoleOpamp { gbw, .. }, Param::Gbw) => gbw,
            _ => return false,
        };
        *slot = v;
        true
    }

    /// The unit of `param`'s value, for tables ("" for plain numbers).
    pub fn unit(&self, param: Param) -> &'static str {
        match (self, param) {
            (PartKind::Resistor { .. } | PartKind::Ccvs { .. }, Param::Main) => "Ω",
            (PartKind::Capacitor { .. }, Param::Main) => "F",
            (PartKind::Inductor { .. }, Param::Main) => "H",
            (PartKind::Vccs { .. }, Param::Main) => "S",
            (_, Param::Gbw) => "Hz",
            _ => "",
        }
    }
}

/// One value of a network that may vary: a part's parameter with its nominal value and, where
/// given, its tolerance.
#[derive(Clone, Debug, PartialEq)]
pub struct Varied {
    /// The part.
    pub part: PartId,
    /// Which of its values.
    pub param: Param,
    /// Its nominal value.
    pub nominal: f64,
    /// Its tolerance, where given.
    pub tolerance: Option<Tolerance>,
}

/// The input noise of an op-amp: a voltage density in series with the non-inverting input
/// and a current density from each input to ground, each white above its 1/f corner
/// (density² = white² · (1 + corner/f)). The sources are uncorrelated.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct OpampNoise {
    /// Input voltage noise density above the corner (V/√Hz).
    pub voltage: f64,
    /// 1/f corner of the voltage noise (Hz; 0 for none).
    pub voltage_corner: f64,
    /// Input current noise density above the corner (A/√Hz), at each input.
    pub current: f64,
    /// 1/f corner of the current noise (Hz; 0 for none).
    pub current_corner: f64,
}

impl Part {
    /// The part's value as a table shows it, in engineering notation with its unit:
    /// `4.7000 kΩ`, `1 V ∠30°`, `gain 10`, `A0 200k, GBW 10 MHz`, `k 0.98 (L1, L2)`.
    pub fn value_text(&self, net: &Network) -> String {
        let e = |v: f64, unit: &str| crate::units::format_eng(v, 5, unit);
        let name = |p: PartId| net.part(p).map_or("?", |x| x.name.as_str()).to_string();
        match self.kind {
            PartKind::Resistor { ohms, .. } => e(ohms, "Ω"),
            PartKind::Capacitor { farads, .. } => e(farads, "F"),
            PartKind::Inductor { henries, .. } => e(henries, "H"),
            PartKind::Coupling { first, second, k } => {
                format!("k {k} ({}, {})", name(first), name(second))
            }
            PartKind::VoltageSource { phasor, .. } => polar(phasor, "V"),
            PartKind::CurrentSource { phasor, .. } => polar(phasor, "A"),
            PartKind::Vcvs { gain, .. } => format!("gain {}", e(gain, "")),
            PartKind::Vccs { gm, .. } => e(gm, "S"),
            PartKind::Ccvs { control, rm, .. } => format!("{} × I({})", e(rm, "Ω"), name(control)),
            PartKind::Cccs { control, gain, .. } => {
                format!("{} × I({})", e(gain, ""), name(control))
            }
            PartKind::IdealOpamp { .. } => "ideal".to_string(),
            PartKind::SinglePoleOpamp { dc_gain, gbw, .. } => {
                format!("A0 {}, GBW {}", e(dc_gain, ""), e(gbw, "Hz"))
            }
        }
    }

    /// The part's tolerances as a table shows them: `±1 %`, `±5 % normal`, an op-amp's
    /// `A0 ±20 %, GBW ±30 %`; empty without.
    pub fn tolerance_text(&self) -> String {
        let one = |t: &Tolerance| {
            let pct = crate::units::format_percent(t.fraction);
            match t.distribution {
                Distribution::Uniform => format!("±{pct}"),
                Distribution::Normal => format!("±{pct} normal"),
            }
        };
        match (&self.kind, &self.tolerance, &self.gbw_tolerance) {
            (PartKind::SinglePoleOpamp { .. }, a, g) => {
                let mut v = Vec::new();
                if let Some(a) = a {
                    v.push(format!("A0 {}", one(a)));
                }
                if let Some(g) = g {
                    v.push(format!("GBW {}", one(g)));
                }
                v.join(", ")
            }
            (_, Some(t), _) => one(t),
            _ => String::new(),
        }
    }

    /// The nodes the part connects, as a table shows them: `a → b` for two-terminal parts
    /// (current counted from the first to the second), with the sensed nodes of a controlled
    /// source and the pins of an op-amp named.
    pub fn nodes_text(&self, net: &Network) -> String {
        let n = |id: NodeId| net.node_name(id).to_string();
        match self.kind {
            PartKind::Resistor { a, b, .. }
            | PartKind::Capacitor { a, b, .. }
            | PartKind::Inductor { a, b, .. } => format!("{} – {}", n(a), n(b)),
            PartKind::Coupling { .. } => String::new(),
            PartKind::VoltageSource { plus, minus, .. } => format!("+{} −{}", n(plus), n(minus)),
            PartKind::CurrentSource { from, to, .. } => format!("{} → {}", n(from), n(to)),
            PartKind::Vcvs {
                plus,
                minus,
                cp,
                cn,
                ..
            } => format!("+{} −{}, senses {} – {}", n(plus), n(minus), n(cp), n(cn)),
            PartKind::Vccs {
                from, to, cp, cn, ..
            } => format!("{} → {}, senses {} – {}", n(from), n(to), n(cp), n(cn)),
            PartKind::Ccvs { plus, minus, .. } => format!("+{} −{}", n(plus), n(minus)),
            PartKind::Cccs { from, to, .. } => format!("{} → {}", n(from), n(to)),
            PartKind::IdealOpamp {
                noninverting,
                inverting,
                output,
            }
            | PartKind::SinglePoleOpamp {
                noninverting,
                inverting,
                output,
                ..
            } => format!("+{} −{} out {}", n(noninverting), n(inverting), n(output)),
        }
    }
}

fn polar(z: Complex64, unit: &str) -> String {
    let m = crate::units::format_eng(z.norm(), 5, unit);
    let deg = z.arg().to_degrees();
    if deg == 0.0 {
        m
    } else {
        format!(
            "{m} ∠{}°",
            crate::units::format_eng(deg, 4, "").replace(' ', "")
        )
    }
}

/// A checked network: every node reference valid, every value in range, names unique.
#[derive(Clone, Debug, PartialEq)]
pub struct Network {
    /// Design title.
    pub title: String,
    /// Temperature of every part (K), for thermal noise.
    pub temperature: f64,
    nodes: Vec<String>,
    parts: Vec<Part>,
    node_index: NameIndex,
    part_index: NameIndex,
}

impl Network {
    /// Node names; index 0 is `gnd`.
    pub fn node_names(&self) -> &[String] {
        &self.nodes
    }
    /// Name of a node.
    pub fn node_name(&self, node: NodeId) -> &str {
        self.nodes.get(node.0).map_or("?", String::as_str)
    }
    /// Looks a node up by name.
    pub fn node(&self, name: &str) -> Option<NodeId> {
        self.node_index
            .find(name, |p| {
                self.nodes.get(p as usize).map_or("", String::as_str)
            })
            .map(|p| NodeId(p as usize))
    }
    /// All parts in order of definition.
    pub fn parts(&self) -> &[Part] {
        &self.parts
    }
    /// One part.
    pub fn part(&self, id: PartId) -> Option<&Part> {
        self.parts.get(id.0)
    }
    /// Looks a part up by name.
    pub fn part_id(&self, name: &str) -> Option<PartId> {
        self.part_index
            .find(name, |p| {
                self.parts.get(p as usize).map_or("", |x| x.name.as_str())
            })
            .map(|p| PartId(p as usize))
    }
    /// Number of nodes including ground.
    pub fn node_count(&self) -> usize {
        self.nodes.len()
    }

    /// Every value that may vary: each part's main value (and an op-amp's gain-bandwidth
    /// product), with its tolerance where the design gives one, in part order.
    pub fn varied(&self) -> Vec<Varied> {
        let mut out = Vec::new();
        for (i, p) in self.parts.iter().enumerate() {
            for (param, tol) in [(Param::Main, p.tolerance), (Param::Gbw, p.gbw_tolerance)] {
                if let Some(nominal) = p.kind.value(param) {
                    out.push(Varied {
                        part: PartId(i),
                        param,
                        nominal,
                        tolerance: tol,
                    });
                }
            }
        }
        out
    }

    /// The same network with resistors added (name, first node, second node, ohms): the
    /// terminations of an N-port analysis. Names must be new (the port analysis uses names
    /// with a space, which a design cannot write).
    pub fn with_resistors(
        &self,
        added: &[(String, NodeId, NodeId, f64)],
    ) -> Result<Network, NetworkError> {
        let mut net = self.clone();
        for (name, a, b, ohms) in added {
            check_positive(name, "value", *ohms)?;
            if net.part_id(name).is_some() {
                return Err(NetworkError::DuplicateName { name: name.clone() });
            }
            let position = net.parts.len() as u32;
            net.parts.push(Part {
                name: name.clone(),
                kind: PartKind::Resistor {
                    a: *a,
                    b: *b,
                    ohms: *ohms,
                },
                tolerance: None,
                gbw_tolerance: None,
                noise: None,
            });
            let parts = &net.parts;
            net.part_index.insert(name, position, |p| {
                parts.get(p as usize).map_or("", |x| x.name.as_str())
            });
        }
        Ok(net)
    }

    /// The same network with the given voltage sources opened (each becomes a current source
    /// of 0 A between its nodes, so it no longer holds them together) and current sources
    /// set to 0 A. Refused where another part senses such a source's current.
    pub fn with_sources_opened(&self, parts: &[PartId]) -> Result<Network, NetworkError> {
        let mut net = self.clone();
        for &id in parts {
            let Some(p) = net.parts.get(id.0) else {
                continue;
            };
            let name = p.name.clone();
            if let Some(sensor) = net.parts.iter().find(|q| {
                matches!(q.kind, PartKind::Ccvs { control, .. } | PartKind::Cccs { control, .. } if control == id)
            }) {
                return Err(NetworkError::CannotReplace {
                    part: name,
                    reason: format!(
                        "{} senses its current, so it cannot be opened for the port",
                        sensor.name
                    ),
                });
            }
            let kind = match p.kind {
                PartKind::VoltageSource { plus, minus, .. } => PartKind::CurrentSource {
                    from: plus,
                    to: minus,
                    phasor: Complex64::new(0.0, 0.0),
                },
                PartKind::CurrentSource { from, to, .. } => PartKind::CurrentSource {
                    from,
                    to,
                    phasor: Complex64::new(0.0, 0.0),
                },
                // A termination resistor the port's own z0 stands in for.
                PartKind::Resistor { a, b, .. } => PartKind::CurrentSource {
                    from: a,
                    to: b,
                    phasor: Complex64::new(0.0, 0.0),
                },
                _ => {
                    return Err(NetworkError::CannotReplace {
                        part: name,
                        reason: "it is not a source or a resistor; a port replaces a source or the termination resistor its z0 stands in for"
                            .into(),
                    })
                }
            };
            if let Some(p) = net.parts.get_mut(id.0) {
                p.kind = kind;
            }
        }
        Ok(net)
    }

    /// The same network with some values changed: `(part, param, value)`. The structure (and
    /// so the pattern of the system) stays the same. Fails, naming the part, on a value the
    /// part cannot take (not positive and finite where it must be, a coupling outside (0, 1]).
    pub fn with_values(&self, changes: &[(PartId, Param, f64)]) -> Result<Network, NetworkError> {
        let mut net = self.clone();
        for &(id, param, v) in changes {
            let Some(p) = net.parts.get_mut(id.0) else {
                continue;
            };
            let name = p.name.clone();
            let positive = !matches!(
                p.kind,
                PartKind::Vcvs { .. }
                    | PartKind::Vccs { .. }
                    | PartKind::Ccvs { .. }
                    | PartKind::Cccs { .. }
            );
            if positive {
                check_positive(&name, "value", v)?;
            } else {
                check_range(&name, "value", v)?;
            }
            if matches!(p.kind, PartKind::Coupling { .. }) && v > 1.0 {
                return Err(NetworkError::CouplingOutOfRange { part: name, k: v });
            }
            p.kind.set_value(param, v);
        }
        Ok(net)
    }
}

/// Why a network could not be built. Each names the part (and node or value) at fault.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum NetworkError {
    /// Two parts share a name.
    #[error("part name {name:?} is used twice; give each part its own name")]
    DuplicateName {
        /// The name.
        name: String,
    },
    /// A value that must be positive and finite is not.
    #[error("{part}: {what} must be positive and finite, got {value}")]
    NotPositive {
        /// Part name.
        part: String,
        /// Which value.
        what: &'static str,
        /// The value given.
        value: f64,
    },
    /// A value is outside the sane range.
    #[error("{part}: {what} {value} is outside 1e-30 … 1e30 in magnitude")]
    OutOfRange {
        /// Part name.
        part: String,
        /// Which value.
        what: &'static str,
        /// The value given.
        value: f64,
    },
    /// A part a port cannot stand in for.
    #[error("{part}: {reason}")]
    CannotReplace {
        /// Part name.
        part: String,
        /// Why not.
        reason: String,
    },
    /// A tolerance outside [0 %, 100 %).
    #[error("{part}: tolerance {percent}% is outside 0 % … 100 % (a value must stay positive); write e.g. \"1%\"")]
    ToleranceOutOfRange {
        /// Part name.
        part: String,
        /// The tolerance given, in %.
        percent: f64,
    },
    /// A coupling coefficient outside (0, 1].
    #[error("{part}: coupling coefficient k = {k} is outside 0 < k ≤ 1")]
    CouplingOutOfRange {
        /// Part name.
        part: String,
        /// The value given.
        k: f64,
    },
    /// A reference to a part that does not exist.
    #[error("{part}: {role} {target:?} is not a part of this design")]
    MissingPart {
        /// Part that refers.
        part: String,
        /// What the reference is for.
        role: &'static str,
        /// Name referred to.
        target: String,
    },
    /// A reference to a part of the wrong kind.
    #[error("{part}: {role} {target:?} is a {found}, expected {expected}")]
    WrongKind {
        /// Part that refers.
        part: String,
        /// What the reference is for.
        role: &'static str,
        /// Name referred to.
        target: String,
        /// Its kind.
        found: &'static str,
        /// What would do.
        expected: &'static str,
    },
    /// A coupling joining an inductor to itself, or one inductor pair coupled twice.
    #[error("{part}: {reason}")]
    BadCoupling {
        /// Part name.
        part: String,
        /// What is wrong.
        reason: String,
    },
    /// A two-terminal part with both ends on one node.
    #[error("{part}: both ends are on node {node:?}; connect it between two different nodes")]
    ShortedPart {
        /// Part name.
        part: String,
        /// The node.
        node: String,
    },
    /// An empty or otherwise unusable name.
    #[error("{what} name {name:?} is not usable: {reason}")]
    BadName {
        /// "part" or "node".
        what: &'static str,
        /// The name.
        name: String,
        /// Why.
        reason: &'static str,
    },
    /// An op-amp whose output is the reference node.
    #[error("{part}: the output is on gnd; an op-amp output must drive a node of its own")]
    GroundedOutput {
        /// Part name.
        part: String,
    },
    /// A temperature that is not a positive number of kelvin below 10,000 K.
    #[error("temperature {kelvin} K is not a temperature the parts could have; give it in K or °C, e.g. \"300 K\" or \"27 °C\"")]
    BadTemperature {
        /// The value given (K).
        kelvin: f64,
    },
    /// Limits on size.
    #[error("the network has more than {limit} {what}")]
    TooLarge {
        /// What is counted.
        what: &'static str,
        /// The limit.
        limit: usize,
    },
}

impl NetworkError {
    /// The part the error is about, where it names one.
    pub fn part_name(&self) -> Option<&str> {
        match self {
            NetworkError::DuplicateName { name } => Some(name),
            NetworkError::NotPositive { part, .. }
            | NetworkError::OutOfRange { part, .. }
            | NetworkError::CouplingOutOfRange { part, .. }
            | NetworkError::ToleranceOutOfRange { part, .. }
            | NetworkError::CannotReplace { part, .. }
            | NetworkError::MissingPart { part, .. }
            | NetworkError::WrongKind { part, .. }
            | NetworkError::BadCoupling { part, .. }
            | NetworkError::ShortedPart { part, .. }
            | NetworkError::GroundedOutput { part } => Some(part),
            NetworkError::BadName { .. }
            | NetworkError::TooLarge { .. }
            | NetworkError::BadTemperature { .. } => None,
        }
    }
}

/// The temperature of a network's parts unless a design sets one (K): 300 K, about 27 °C.
pub const DEFAULT_TEMPERATURE: f64 = 300.0;

/// Largest number of parts a network may have (memory safety against absurd inputs).
pub const MAX_PARTS: usize = 20_000_000;

/// Control references resolved at build time.
#[derive(Clone, Debug)]
enum Pending {
    Coupling {
        first: String,
        second: String,
        k: f64,
    },
    Ccvs {
        plus: NodeId,
        minus: NodeId,
        control: String,
        rm: f64,
    },
    Cccs {
        from: NodeId,
        to: NodeId,
        control: String,
        gain: f64,
    },
}

/// Builds a [`Network`] part by part. Node names are created on first use; `gnd` is ground.
///
/// ```
/// use analyzer_core::network::NetworkBuilder;
/// let mut b = NetworkBuilder::new("RC low-pass");
/// b.voltage_source("V1", "in", "gnd", 1.0.into())?;
/// b.resistor("R1", "in", "out", 1e3)?;
/// b.capacitor("C1", "out", "gnd", 100e-9)?;
/// let net = b.build()?;
/// assert_eq!(net.parts().len(), 3);
/// # Ok::<(), analyzer_core::network::NetworkError>(())
/// ```
#[derive(Clone, Debug)]
pub struct NetworkBuilder {
    title: String,
    temperature: f64,
    nodes: Vec<String>,
    node_index: NameIndex,
    /// Parts in order; a part whose references are resolved by `build` holds a stand-in
    /// kind until then (its entry in `pending` says what it will be).
    parts: Vec<Part>,
    pending: HashMap<usize, Pending>,
    part_index: NameIndex,
}

fn check_positive(part: &str, what: &'static str, value: f64) -> Result<f64, NetworkError> {
    if !(value.is_finite() && value > 0.0) {
        return Err(NetworkError::NotPositive {
            part: part.to_string(),
            what,
            value,
        });
    }
    check_range(part, what, value)
}

fn check_range(part: &str, what: &'static str, value: f64) -> Result<f64, NetworkError> {
    let m = value.abs();
    if !value.is_finite() || m > VALUE_LIMIT || (m != 0.0 && m < 1.0 / VALUE_LIMIT) {
        return Err(NetworkError::OutOfRange {
            part: part.to_string(),
            what,
            value,
        });
    }
    Ok(value)
}

fn check_phasor(part: &str, value: Complex64) -> Result<Complex64, NetworkError> {
    check_range(part, "source value", value.re)?;
    check_range(part, "source value", value.im)?;
    Ok(value)
}

impl NetworkBuilder {
    /// A new, empty network with a title.
    pub fn new(title: impl Into<String>) -> Self {
        let nodes = vec![GROUND_NAME.to_string()];
        let mut node_index = NameIndex::default();
        node_index.insert(GROUND_NAME, 0, |_| GROUND_NAME);
        NetworkBuilder {
            title: title.into(),
            temperature: DEFAULT_TEMPERATURE,
            nodes,
            node_index,
            parts: Vec::new(),
            pending: HashMap::new(),
            part_index: NameIndex::default(),
        }
    }

    /// The node of this name, created if new.
    pub fn node(&mut self, name: &str) -> Result<NodeId, NetworkError> {
        let nodes = &self.nodes;
        if let Some(p) = self
            .node_index
            .find(name, |p| nodes.get(p as usize).map_or("", String::as_str))
        {
            return Ok(NodeId(p as usize));
        }
        if name.trim().is_empty() {
            return Err(NetworkError::BadName {
                what: "node",
                name: name.to_string(),
                reason: "it is empty",
            });
        }
        if name.chars().any(char::is_whitespace) {
            return Err(NetworkError::BadName {
                what: "node",
                name: name.to_string(),
                reason: "it contains white space",
            });
        }
        let id = NodeId(self.nodes.len());
        self.nodes.push(name.to_string());
        let nodes = &self.nodes;
        self.node_index.insert(name, id.0 as u32, |p| {
            nodes.get(p as usize).map_or("", String::as_str)
        });
        Ok(id)
    }

    /// Makes room for about `parts` parts and as many nodes, so a large network is built
    /// without growing its tables step by step.
    pub fn reserve(&mut self, parts: usize) {
        let parts = parts.min(MAX_PARTS);
        self.parts.reserve(parts);
        let list = &self.parts;
        self.part_index.reserve(parts, |p| {
            list.get(p as usize).map_or("", |x| x.name.as_str())
        });
        self.nodes.reserve(parts);
        let nodes = &self.nodes;
        self.node_index
            .reserve(parts, |p| nodes.get(p as usize).map_or("", String::as_str));
    }

    /// The part of this name added so far, if any.
    pub fn position(&self, name: &str) -> Option<PartId> {
        self.find_part(name).map(PartId)
    }

    fn find_part(&self, name: &str) -> Option<usize> {
        let parts = &self.parts;
        self.part_index
            .find(name, |p| {
                parts.get(p as usize).map_or("", |x| x.name.as_str())
            })
            .map(|p| p as usize)
    }

    fn add(&mut self, name: &str, kind: Option<PartKind>) -> Result<usize, NetworkError> {
        if name.trim().is_empty() || name.chars().any(char::is_whitespace) {
            return Err(NetworkError::BadName {
                what: "part",
                name: name.to_string(),
                reason: "it is empty or contains white space",
            });
        }
        if self.find_part(name).is_some() {
            return Err(NetworkError::DuplicateName {
                name: name.to_string(),
            });
        }
        if self.parts.len() >= MAX_PARTS {
            return Err(NetworkError::TooLarge {
                what: "parts",
                limit: MAX_PARTS,
            });
        }
        let index = self.parts.len();
        self.parts.push(Part {
            name: name.to_string(),
            // Stand-in for a part resolved at build time (see `pending`).
            kind: kind.unwrap_or(PartKind::Coupling {
                first: PartId(usize::MAX),
                second: PartId(usize::MAX),
                k: 0.0,
            }),
            tolerance: None,
            gbw_tolerance: None,
            noise: None,
        });
        let parts = &self.parts;
        self.part_index.insert(name, index as u32, |p| {
            parts.get(p as usize).map_or("", |x| x.name.as_str())
        });
        Ok(index)
    }

    fn two(&mut self, part: &str, a: &str, b: &str) -> Result<(NodeId, NodeId), NetworkError> {
        let (na, nb) = (self.node(a)?, self.node(b)?);
        if na == nb {
            return Err(NetworkError::ShortedPart {
                part: part.to_string(),
                node: a.to_string(),
            });
        }
        Ok((na, nb))
    }

    /// Sets the temperature of every part (K), for thermal noise.
    pub fn temperature(&mut self, kelvin: f64) -> Result<(), NetworkError> {
        if !(kelvin.is_finite() && kelvin > 0.0 && kelvin < 1e4) {
            return Err(NetworkError::BadTemperature { kelvin });
        }
        self.temperature = kelvin;
        Ok(())
    }

    /// Sets the input noise of op-amp `name` (every density ≥ 0 and finite, corners ≥ 0).
    pub fn opamp_noise(&mut self, name: &str, noise: OpampNoise) -> Result<(), NetworkError> {
        for (what, v) in [
            ("noise voltage", noise.voltage),
            ("noise voltage corner", noise.voltage_corner),
            ("noise current", noise.current),
            ("noise current corner", noise.current_corner),
        ] {
            if !(v.is_finite() && v >= 0.0) {
                return Err(NetworkError::OutOfRange {
                    part: name.to_string(),
                    what,
                    value: v,
                });
            }
            check_range(name, what, v)?;
        }
        let Some(i) = self.find_part(name) else {
            return Err(NetworkError::MissingPart {
                part: name.to_string(),
                role: "noise of",
                target: name.to_string(),
            });
        };
        match self.parts.get_mut(i) {
            Some(p)
                if matches!(
                    p.kind,
                    PartKind::IdealOpamp { .. } | PartKind::SinglePoleOpamp { .. }
                ) =>
            {
                p.noise = Some(Box::new(noise));
                Ok(())
            }
            _ => Err(NetworkError::WrongKind {
                part: name.to_string(),
                role: "noise of",
                target: name.to_string(),
                found: "part",
                expected: "an op-amp",
            }),
        }
    }

    /// Gives every part that has a value of `param` but no tolerance for it the tolerance
    /// `pick` chooses for its kind (None: leave it without).
    pub fn default_tolerances(&mut self, pick: impl Fn(&PartKind, Param) -> Option<Tolerance>) {
        for p in &mut self.parts {
            for param in [Param::Main, Param::Gbw] {
                if p.kind.value(param).is_none() {
                    continue;
                }
                let slot = match param {
                    Param::Main => &mut p.tolerance,
                    Param::Gbw => &mut p.gbw_tolerance,
                };
                if slot.is_none() {
                    *slot = pick(&p.kind, param);
                }
            }
        }
    }

    /// Sets the distribution of the tolerance of `param` of part `name`, where it has one.
    pub fn distribution(&mut self, name: &str, param: Param, d: Distribution) {
        if let Some(p) = self.find_part(name).and_then(|i| self.parts.get_mut(i)) {
            let slot = match param {
                Param::Main => &mut p.tolerance,
                Param::Gbw => &mut p.gbw_tolerance,
            };
            if let Some(t) = slot.as_mut() {
                t.distribution = d;
            }
        }
    }

    /// Sets the tolerance of `param` of part `name` (fraction in [0, 1)).
    pub fn tolerance(
        &mut self,
        name: &str,
        param: Param,
        tolerance: Tolerance,
    ) -> Result<(), NetworkError> {
        let fraction = tolerance.fraction;
        if !(fraction.is_finite() && (0.0..1.0).contains(&fraction)) {
            return Err(NetworkError::ToleranceOutOfRange {
                part: name.to_string(),
                percent: 100.0 * fraction,
            });
        }
        if let Some(i) = self.find_part(name) {
            if let Some(p) = self.parts.get_mut(i) {
                match param {
                    Param::Main => p.tolerance = Some(tolerance),
                    Param::Gbw => p.gbw_tolerance = Some(tolerance),
                }
            }
        }
        Ok(())
    }

    /// Adds a resistor.
    pub fn resistor(
        &mut self,
        name: &str,
        a: &str,
        b: &str,
        ohms: f64,
    ) -> Result<PartId, NetworkError> {
        let ohms = check_positive(name, "resistance", ohms)?;
        let (a, b) = self.two(name, a, b)?;
        self.add(name, Some(PartKind::Resistor { a, b, ohms }))
            .map(PartId)
    }

    /// Adds a capacitor.
    pub fn capacitor(
        &mut self,
        name: &str,
        a: &str,
        b: &str,
        farads: f64,
    ) -> Result<PartId, NetworkError> {
        let farads = check_positive(name, "capacitance", farads)?;
        let (a, b) = self.two(name, a, b)?;
        self.add(name, Some(PartKind::Capacitor { a, b, farads }))
            .map(PartId)
    }

    /// Adds an inductor; `a` is its dotted end.
    pub fn inductor(
        &mut self,
        name: &str,
        a: &str,
        b: &str,
        henries: f64,
    ) -> Result<PartId, NetworkError> {
        let henries = check_positive(name, "inductance", henries)?;
        let (a, b) = self.two(name, a, b)?;
        self.add(name, Some(PartKind::Inductor { a, b, henries }))
            .map(PartId)
    }

    /// Couples two inductors (named; they may be added later) with coefficient `k`.
    pub fn coupling(
        &mut self,
        name: &str,
        first: &str,
        second: &str,
        k: f64,
    ) -> Result<PartId, NetworkError> {
        if !(k.is_finite() && k > 0.0 && k <= 1.0) {
            return Err(NetworkError::CouplingOutOfRange {
                part: name.to_string(),
                k,
            });
        }
        let i = self.add(name, None)?;
        self.pending.insert(
            i,
            Pending::Coupling {
                first: first.to_string(),
                second: second.to_string(),
                k,
            },
        );
        Ok(PartId(i))
    }

    /// Adds an independent voltage source, V(plus) − V(minus) = phasor.
    pub fn voltage_source(
        &mut self,
        name: &str,
        plus: &str,
        minus: &str,
        phasor: Complex64,
    ) -> Result<PartId, NetworkError> {
        let phasor = check_phasor(name, phasor)?;
        let (plus, minus) = self.two(name, plus, minus)?;
        self.add(
            name,
            Some(PartKind::VoltageSource {
                plus,
                minus,
                phasor,
            }),
        )
        .map(PartId)
    }

    /// Adds an independent current source; the current flows through it from `from` to `to`.
    pub fn current_source(
        &mut self,
        name: &str,
        from: &str,
        to: &str,
        phasor: Complex64,
    ) -> Result<PartId, NetworkError> {
        let phasor = check_phasor(name, phasor)?;
        let (from, to) = self.two(name, from, to)?;
        self.add(name, Some(PartKind::CurrentSource { from, to, phasor }))
            .map(PartId)
    }

    /// Adds a voltage-controlled voltage source.
    pub fn vcvs(
        &mut self,
        name: &str,
        out: (&str, &str),
        sense: (&str, &str),
        gain: f64,
    ) -> Result<PartId, NetworkError> {
        let gain = check_range(name, "gain", gain)?;
        let (plus, minus) = self.two(name, out.0, out.1)?;
        let (cp, cn) = self.two(name, sense.0, sense.1)?;
        self.add(
            name,
            Some(PartKind::Vcvs {
                plus,
                minus,
                cp,
                cn,
                gain,
            }),
        )
        .map(PartId)
    }

    /// Adds a voltage-controlled current source.
    pub fn vccs(
        &mut self,
        name: &str,
        out: (&str, &str),
        sense: (&str, &str),
        gm: f64,
    ) -> Result<PartId, NetworkError> {
        let gm = check_range(name, "transconductance", gm)?;
        let (from, to) = self.two(name, out.0, out.1)?;
        let (cp, cn) = self.two(name, sense.0, sense.1)?;
        self.add(
            name,
            Some(PartKind::Vccs {
                from,
                to,
                cp,
                cn,
                gm,
            }),
        )
        .map(PartId)
    }

    /// Adds a current-controlled voltage source sensing the current of part `control`.
    pub fn ccvs(
        &mut self,
        name: &str,
        out: (&str, &str),
        control: &str,
        rm: f64,
    ) -> Result<PartId, NetworkError> {
        let rm = check_range(name, "transresistance", rm)?;
        let (plus, minus) = self.two(name, out.0, out.1)?;
        let i = self.add(name, None)?;
        self.pending.insert(
            i,
            Pending::Ccvs {
                plus,
                minus,
                control: control.to_string(),
                rm,
            },
        );
        Ok(PartId(i))
    }

    /// Adds a current-controlled current source sensing the current of part `control`.
    pub fn cccs(
        &mut self,
        name: &str,
        out: (&str, &str),
        control: &str,
        gain: f64,
    ) -> Result<PartId, NetworkError> {
        let gain = check_range(name, "current gain", gain)?;
        let (from, to) = self.two(name, out.0, out.1)?;
        let i = self.add(name, None)?;
        self.pending.insert(
            i,
            Pending::Cccs {
                from,
                to,
                control: control.to_string(),
                gain,
            },
        );
        Ok(PartId(i))
    }

    /// Adds an ideal op-amp.
    pub fn ideal_opamp(
        &mut self,
        name: &str,
        noninverting: &str,
        inverting: &str,
        output: &str,
    ) -> Result<PartId, NetworkError> {
        let (noninverting, inverting) = self.two(name, noninverting, inverting)?;
        let output = self.node(output)?;
        if output.is_ground() {
            return Err(NetworkError::GroundedOutput {
                part: name.to_string(),
            });
        }
        self.add(
            name,
            Some(PartKind::IdealOpamp {
                noninverting,
                inverting,
                output,
            }),
        )
        .map(PartId)
    }

    /// Adds an op-amp with DC gain `dc_gain` and gain-bandwidth product `gbw` (Hz).
    pub fn single_pole_opamp(
        &mut self,
        name: &str,
        noninverting: &str,
        inverting: &str,
        output: &str,
        dc_gain: f64,
        gbw: f64,
    ) -> Result<PartId, NetworkError> {
        let dc_gain = check_positive(name, "DC gain", dc_gain)?;
        let gbw = check_positive(name, "gain-bandwidth product", gbw)?;
        let (noninverting, inverting) = self.two(name, noninverting, inverting)?;
        let output = self.node(output)?;
        if output.is_ground() {
            return Err(NetworkError::GroundedOutput {
                part: name.to_string(),
            });
        }
        self.add(
            name,
            Some(PartKind::SinglePoleOpamp {
                noninverting,
                inverting,
                output,
                dc_gain,
                gbw,
            }),
        )
        .map(PartId)
    }

    fn resolve(
        &self,
        part: &str,
        role: &'static str,
        target: &str,
    ) -> Result<PartId, NetworkError> {
        match self.find_part(target) {
            Some(i) => Ok(PartId(i)),
            None => Err(NetworkError::MissingPart {
                part: part.to_string(),
                role,
                target: target.to_string(),
            }),
        }
    }

    /// The kind of part `i` while part `current` is being resolved: None for a part whose
    /// references are not resolved yet (pending parts are resolved in order of definition).
    fn kind_at(&self, i: usize, current: usize) -> Option<&PartKind> {
        if i >= current && self.pending.contains_key(&i) {
            return None;
        }
        self.parts.get(i).map(|p| &p.kind)
    }

    /// Resolves references and returns the checked network.
    pub fn build(self) -> Result<Network, NetworkError> {
        self.build_locating().map_err(|(e, _)| e)
    }

    /// As [`NetworkBuilder::build`]; on failure also the position of the part the error
    /// names (for messages that point at where the part was written).
    pub fn build_locating(self) -> Result<Network, (NetworkError, Option<PartId>)> {
        let mut this = self;
        this.resolve_all().map_err(|e| {
            let at = e.part_name().and_then(|p| this.position(p));
            (e, at)
        })?;
        Ok(Network {
            title: this.title,
            temperature: this.temperature,
            nodes: this.nodes,
            parts: this.parts,
            node_index: this.node_index,
            part_index: this.part_index,
        })
    }

    fn resolve_all(&mut self) -> Result<(), NetworkError> {
        let mut pending: Vec<usize> = self.pending.keys().copied().collect();
        pending.sort_unstable();
        let mut coupled: Vec<(PartId, PartId)> = Vec::new();
        for &i in &pending {
            let Some(p) = self.pending.get(&i) else {
                continue;
            };
            let name = self.parts[i].name.clone();
            let kind = match p {
                Pending::Coupling { first, second, k } => {
                    let f = self.resolve(&name, "coupled inductor", first)?;
                    let s = self.resolve(&name, "coupled inductor", second)?;
                    for (id, target) in [(f, first), (s, second)] {
                        if !matches!(self.kind_at(id.0, i), Some(PartKind::Inductor { .. })) {
                            return Err(NetworkError::WrongKind {
                                part: name,
                                role: "coupled inductor",
                                target: target.clone(),
                                found: self.kind_word(id.0, i),
                                expected: "an inductor",
                            });
                        }
                    }
                    if f == s {
                        return Err(NetworkError::BadCoupling {
                            part: name,
                            reason: format!("couples inductor {first:?} to itself"),
                        });
                    }
                    let key = (f.min(s), f.max(s));
                    if coupled.contains(&key) {
                        return Err(NetworkError::BadCoupling {
                            part: name,
                            reason: format!(
                                "inductors {first:?} and {second:?} are already coupled"
                            ),
                        });
                    }
                    coupled.push(key);
                    PartKind::Coupling {
                        first: f,
                        second: s,
                        k: *k,
                    }
                }
                Pending::Ccvs {
                    plus,
                    minus,
                    control,
                    rm,
                } => PartKind::Ccvs {
                    plus: *plus,
                    minus: *minus,
                    control: self.sensable(&name, control, i)?,
                    rm: *rm,
                },
                Pending::Cccs {
                    from,
                    to,
                    control,
                    gain,
                } => PartKind::Cccs {
                    from: *from,
                    to: *to,
                    control: self.sensable(&name, control, i)?,
                    gain: *gain,
                },
            };
            self.parts[i].kind = kind;
        }
        Ok(())
    }

    fn sensable(&self, name: &str, control: &str, current: usize) -> Result<PartId, NetworkError> {
        let id = self.resolve(name, "control", control)?;
        let ok = match self.kind_at(id.0, current) {
            Some(k) => k.has_sensable_current(),
            // A pending CCVS is fine (its current is a branch unknown); a CCCS or coupling is not.
            None => matches!(self.pending.get(&id.0), Some(Pending::Ccvs { .. })),
        };
        if !ok {
            return Err(NetworkError::WrongKind {
                part: name.to_string(),
                role: "control",
                target: control.to_string(),
                found: self.kind_word(id.0, current),
                expected: "a part with a current of its own (not a coupling or a cccs)",
            });
        }
        Ok(id)
    }

    fn kind_word(&self, i: usize, current: usize) -> &'static str {
        match self.kind_at(i, current) {
            Some(k) => k.word(),
            None => match self.pending.get(&i) {
                Some(Pending::Coupling { .. }) => "coupling",
                Some(Pending::Ccvs { .. }) => "ccvs",
                Some(Pending::Cccs { .. }) => "cccs",
                None => "part",
            },
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn refuses_bad_values_and_references() {
        let mut b = NetworkBuilder::new("t");
        assert!(matches!(
            b.resistor("R1", "a", "gnd", 0.0),
            Err(NetworkError::NotPositive { .. })
        ));
        assert!(matches!(
            b.capacitor("C1", "a", "gnd", f64::NAN),
            Err(NetworkError::NotPositive { .. })
        ));
        b.resistor("R1", "a", "gnd", 1.0).unwrap();
        assert!(matches!(
            b.resistor("R1", "a", "b", 1.0),
            Err(NetworkError::DuplicateName { .. })
        ));
        assert!(matches!(
            b.coupling("coil_coupling", "L1", "L2", 1.5),
            Err(NetworkError::CouplingOutOfRange { .. })
        ));
        b.coupling("coil_coupling", "L1", "R1", 0.5).unwrap();
        let err = b.clone().build().unwrap_err();
        assert_eq!(
            err.to_string(),
            "coil_coupling: coupled inductor \"L1\" is not a part of this design"
        );
        let mut b = NetworkBuilder::new("t");
        b.resistor("R1", "a", "gnd", 1.0).unwrap();
        b.inductor("L1", "a", "gnd", 1.0).unwrap();
        b.coupling("coil_coupling", "L1", "R1", 0.5).unwrap();
        assert_eq!(
            b.build().unwrap_err().to_string(),
            "coil_coupling: coupled inductor \"R1\" is a resistor, expected an inductor"
        );
        let mut b = NetworkBuilder::new("t");
        b.cccs("mirror_a", ("a", "gnd"), "mirror_b", 2.0).unwrap();
        b.cccs("mirror_b", ("a", "gnd"), "mirror_a", 2.0).unwrap();
        assert!(matches!(b.build(), Err(NetworkError::WrongKind { .. })));
    }
}
