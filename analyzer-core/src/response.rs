//! Which ratio is read out of the solved network, and its value at any ω.
//!
//! A response is a ratio of two linear read-outs of the solution (a node voltage, a node-pair
//! difference, a part's current), or a driving-point impedance or admittance between two
//! nodes. The impedance comes from a test excitation with all the design's sources off: a 1 A
//! current into the first node and out of the second, or, where an independent voltage source
//! sits across exactly that pair (it is the port's driver), that source alone at 1 V, with the
//! impedance taken as its voltage over the current it delivers. All excitations share the one
//! factorisation made at each ω.
//!
//! Derivatives with respect to ω come from the same factorisation:
//! `A·x = b` with `A = G + jωC` gives `dx/dω = −A⁻¹·(jC)·x`; group delay is
//! `τ = −Im(H′/H)` (see [`Point::group_delay`]).

use crate::network::{Network, NodeId, Param, PartId, PartKind};
use crate::noise::{Breakdown, NoisePlan};
use crate::solve::{LaneSolver, Singular, SolveFailure, SolverKind, SolverPlan, LANES};
use crate::stamp::{Readout, System};
use crate::topology::{self, TopologyError};
use crate::units::{format_eng, Hertz};
use num_complex::Complex64;
use rayon::prelude::*;
use std::f64::consts::PI;
use std::sync::{Arc, OnceLock};

/// One side of a ratio.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Probe {
    /// V(first) − V(second); `Voltage(n, GROUND)` is a node voltage.
    Voltage(NodeId, NodeId),
    /// The current of a part (see [`System::current_readout`] for its direction).
    Current(PartId),
}

impl Probe {
    fn is_current(&self) -> bool {
        matches!(self, Probe::Current(_))
    }
}

/// What a response reads.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum ResponseKind {
    /// `numerator / denominator` under the design's own sources.
    Ratio {
        /// Read-out on top.
        numerator: Probe,
        /// Read-out below.
        denominator: Probe,
    },
    /// Driving-point impedance between two nodes, sources off.
    Impedance(NodeId, NodeId),
    /// Driving-point admittance between two nodes, sources off.
    Admittance(NodeId, NodeId),
    /// Transfer impedance, sources off: the voltage between `read` per ampere injected into
    /// `inject.0` and taken out of `inject.1` (the columns of an N-port's matrices).
    Transfer {
        /// Where the test current enters and leaves.
        inject: (NodeId, NodeId),
        /// The voltage read.
        read: (NodeId, NodeId),
    },
    /// The noise density of the voltage between two nodes (see [`crate::noise`]), referred
    /// to the ratio response `referred_to` (an index into the responses) when given, with a
    /// source resistor `source` for the noise figure.
    Noise {
        /// Positive node of the output.
        plus: NodeId,
        /// Negative node of the output (gnd for a node voltage).
        minus: NodeId,
        /// The ratio response the density is divided by.
        referred_to: Option<usize>,
        /// The resistor that stands for the signal source's resistance.
        source: Option<PartId>,
    },
}

/// A named response.
#[derive(Clone, Debug, PartialEq)]
pub struct ResponseSpec {
    /// Name used for files and tables.
    pub name: String,
    /// What it reads.
    pub kind: ResponseKind,
    /// Whether it is a loop gain (margins are then reported).
    pub loop_gain: bool,
    /// Level of the crossings for this response (dB, relative to its reference), where the
    /// design sets one.
    pub level_db: Option<f64>,
    /// What this response's level is measured from, where the design sets it.
    pub reference: Option<crate::metrics::Reference>,
    /// The band a noise response is integrated over (Hz), where the design sets one; the
    /// sweep's range otherwise.
    pub band: Option<(f64, f64)>,
}

impl ResponseSpec {
    /// A response of this name and kind, not a loop gain, with the figures' defaults.
    pub fn new(name: impl Into<String>, kind: ResponseKind) -> Self {
        ResponseSpec {
            name: name.into(),
            kind,
            loop_gain: false,
            level_db: None,
            reference: None,
            band: None,
        }
    }
}

/// The unit of a response's value.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ResponseUnit {
    /// V/V or A/A.
    Ratio,
    /// V/A.
    Ohms,
    /// A/V.
    Siemens,
    /// A noise density, V/√Hz (at the output, or referred to the input of a V/V gain).
    NoiseDensity,
}

impl ResponseUnit {
    /// Short unit symbol for tables ("" for a plain ratio).
    pub fn symbol(self) -> &'static str {
        match self {
            ResponseUnit::Ratio => "",
            ResponseUnit::Ohms => "Ω",
            ResponseUnit::Siemens => "S",
            ResponseUnit::NoiseDensity => "V/√Hz",
        }
    }
    /// The unit whose [`ResponseUnit::symbol`] this is.
    pub fn from_symbol(symbol: &str) -> Option<ResponseUnit> {
        [
            ResponseUnit::Ratio,
            ResponseUnit::Ohms,
            ResponseUnit::Siemens,
            ResponseUnit::NoiseDensity,
        ]
        .into_iter()
        .find(|u| u.symbol() == symbol)
    }
    /// ASCII suffix for CSV column names ("" for a plain ratio).
    pub fn column_suffix(self) -> &'static str {
        match self {
            ResponseUnit::Ratio => "",
            ResponseUnit::Ohms => "_ohm",
            ResponseUnit::Siemens => "_siemens",
            ResponseUnit::NoiseDensity => "_v_per_rthz",
        }
    }
}

impl ResponseKind {
    /// The unit of this response's value.
    pub fn unit(&self) -> ResponseUnit {
        match self {
            ResponseKind::Impedance(..) | ResponseKind::Transfer { .. } => ResponseUnit::Ohms,
            ResponseKind::Admittance(..) => ResponseUnit::Siemens,
            ResponseKind::Noise { .. } => ResponseUnit::NoiseDensity,
            ResponseKind::Ratio {
                numerator,
                denominator,
            } => match (numerator.is_current(), denominator.is_current()) {
                (true, false) => ResponseUnit::Siemens,
                (false, true) => ResponseUnit::Ohms,
                _ => ResponseUnit::Ratio,
            },
        }
    }
}

/// Why an analysis could not be set up or evaluated.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum AnalysisError {
    /// A singular topology.
    #[error("{0}")]
    Topology(#[from] TopologyError),
    /// A value the network cannot take (a changed or sampled value that is not positive, a
    /// coupling above 1).
    #[error("{0}")]
    Network(#[from] crate::network::NetworkError),
    /// A response asks for something that cannot be read.
    #[error("response {response:?}: {reason}")]
    BadResponse {
        /// Response name.
        response: String,
        /// Why.
        reason: String,
    },
    /// The matrix is singular at this frequency.
    #[error("the network is singular at {}: no solution determines {blame}{hint}", format_eng(*.frequency, 5, "Hz"))]
    Singular {
        /// Frequency in Hz.
        frequency: Hertz,
        /// The unknown with no usable pivot, described.
        blame: String,
        /// Advice.
        hint: String,
    },
    /// The solution failed its residual check.
    #[error("the solution at {} cannot be trusted (relative residual {residual:.1e} after refinement); the network is too ill-conditioned there", format_eng(*.frequency, 5, "Hz"))]
    Untrustworthy {
        /// Frequency in Hz.
        frequency: Hertz,
        /// Residual reached.
        residual: f64,
    },
    /// A noise density that cannot be evaluated: 0 Hz below a 1/f corner, or referred to a
    /// gain that is zero there.
    #[error("response {response:?}: the noise has no finite value at {} (a 1/f corner at 0 Hz, or a zero gain to refer it to); start the sweep above 0 Hz or refer it to another response", format_eng(*.frequency, 5, "Hz"))]
    NoiseUndefined {
        /// Response name.
        response: String,
        /// Frequency in Hz.
        frequency: Hertz,
    },
    /// A ratio's denominator is zero.
    #[error("response {response:?}: the denominator is zero at {}, so the ratio has no value there", format_eng(*.frequency, 5, "Hz"))]
    ZeroDenominator {
        /// Response name.
        response: String,
        /// Frequency in Hz.
        frequency: Hertz,
    },
}

/// The value of one response at one ω, with its ω-derivative where asked for.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Point {
    /// H(jω).
    pub value: Complex64,
    /// dH/dω (per rad/s), when derivatives were requested.
    pub derivative: Complex64,
}

impl Point {
    /// Group delay τ = −dφ/dω = −Im(H′/H), in seconds.
    pub fn group_delay(&self) -> f64 {
        -(self.derivative / self.value).im
    }
}

#[derive(Clone, Debug, PartialEq)]
enum Excitation {
    Design,
    Injection(NodeId, NodeId),
    Drive(PartId),
}

#[derive(Clone, Debug)]
struct Resolved {
    excitation: usize,
    numerator: Readout,
    denominator: Option<Readout>,
    invert: bool,
    /// A noise response: computed by a transposed solve instead (`excitation` unused).
    noise: Option<Box<NoisePlan>>,
}

/// How one response is read out of the system (see [`Analysis::readout`]):
/// `value = numerator(x) / denominator(x)` with `(G + jωC)·x = rhs`, inverted when `invert`.
#[derive(Clone, Copy, Debug)]
pub struct ResponseReadout<'a> {
    /// Right-hand side of the excitation.
    pub rhs: &'a [Complex64],
    /// The read-out on top.
    pub numerator: &'a Readout,
    /// The read-out below (None: 1).
    pub denominator: Option<&'a Readout>,
    /// Whether the ratio is inverted (an admittance from an impedance excitation).
    pub invert: bool,
    /// Whether the excitation is the design's own sources (read-out constants apply).
    pub design: bool,
}

/// Unknowns from which [`Evaluator::at_many`] solves its frequencies on several threads (a
/// solve then takes milliseconds, more than making a second workspace).
const PARALLEL_PROBE_UNKNOWNS: usize = 20_000;

/// Parts from which [`Analysis::new`] checks the topology and assembles side by side.
const PARALLEL_ASSEMBLY_PARTS: usize = 4096;

/// A network with its assembled system and resolved responses, ready to be evaluated.
#[derive(Clone, Debug)]
pub struct Analysis {
    net: Network,
    sys: System,
    specs: Vec<ResponseSpec>,
    resolved: Vec<Resolved>,
    excitations: Vec<Excitation>,
    rhs: Vec<Vec<Complex64>>,
    solver: SolverKind,
    /// The stack kernel's elimination order, chosen by the first plan made for this
    /// analysis and kept by every analysis made from it with other values
    /// ([`Analysis::with_values`]), so a study's samples make no trial factorisations.
    order: OnceLock<Arc<[usize]>>,
}

impl Analysis {
    /// Assembles the network once and resolves each response. Checks the topology for
    /// ω > 0; [`Analysis::check_dc`] adds the checks for 0 Hz.
    pub fn new(net: Network, specs: Vec<ResponseSpec>) -> Result<Self, AnalysisError> {
        // A large network is checked and assembled at once (independent passes over it).
        if net.parts().len() >= PARALLEL_ASSEMBLY_PARTS {
            let (checked, sys) =
                rayon::join(|| topology::check(&net, false), || System::assemble(&net));
            checked?;
            return Self::with_system(net, sys, specs);
        }
        topology::check(&net, false)?;
        Self::assemble(net, specs)
    }

    /// The same analysis with some part values changed (`(part, param, value)`): the
    /// structure is this one's, so the topology is not checked again, and an evaluator made
    /// with [`Analysis::evaluator_like`] reuses this one's symbolic work. The solver choice
    /// is kept.
    pub fn with_values(
        &self,
        changes: &[(crate::network::PartId, crate::network::Param, f64)],
    ) -> Result<Analysis, AnalysisError> {
        let net = self.net.with_values(changes)?;
        let changed = Self::assemble(net, self.specs.clone())?.with_solver(self.solver);
        if let Some(order) = self.order.get() {
            let _ = changed.order.set(order.clone());
        }
        Ok(changed)
    }

    /// The solver plan for this analysis (its path, symbolic work and elimination order).
    pub fn plan(&self) -> Result<SolverPlan<'_>, Singular> {
        let plan = SolverPlan::with_order(&self.sys, self.solver, self.order.get().cloned())?;
        let _ = self.order.set(plan.elimination_order());
        Ok(plan)
    }

    fn assemble(net: Network, specs: Vec<ResponseSpec>) -> Result<Self, AnalysisError> {
        let sys = System::assemble(&net);
        Self::with_system(net, sys, specs)
    }

    fn with_system(
        net: Network,
        sys: System,
        specs: Vec<ResponseSpec>,
    ) -> Result<Self, AnalysisError> {
        let mut excitations: Vec<Excitation> = Vec::new();
        let mut slot = |e: Excitation| match excitations.iter().position(|x| *x == e) {
            Some(i) => i,
            None => {
                excitations.push(e);
                excitations.len() - 1
            }
        };
        let mut resolved = Vec::with_capacity(specs.len());
        let has_sources = net.parts().iter().any(|p| {
            matches!(
                p.kind,
                PartKind::VoltageSource { .. } | PartKind::CurrentSource { .. }
            )
        });
        for spec in &specs {
            let bad = |reason: String| AnalysisError::BadResponse {
                response: spec.name.clone(),
                reason,
            };
            let readout = |probe: &Probe| -> Result<Readout, AnalysisError> {
                match *probe {
                    Probe::Voltage(a, b) => Ok(System::voltage_readout(a, b)),
                    Probe::Current(p) => sys.current_readout(&net, p).ok_or_else(|| {
                        bad(format!(
                            "part {} has no current of its own to read",
                            net.part(p).map_or("?", |p| p.name.as_str())
                        ))
                    }),
                }
            };
            let r = match &spec.kind {
                ResponseKind::Ratio {
                    numerator,
                    denominator,
                } => {
                    if !has_sources {
                        return Err(bad(
                            "a ratio needs the design to have an independent source; add one"
                                .into(),
                        ));
                    }
                    if numerator == denominator {
                        return Err(bad("numerator and denominator are the same".into()));
                    }
                    Resolved {
                        excitation: slot(Excitation::Design),
                        numerator: readout(numerator)?,
                        denominator: Some(readout(denominator)?),
                        invert: false,
                        noise: None,
                    }
                }
                ResponseKind::Impedance(a, b) | ResponseKind::Admittance(a, b) => {
                    if a == b {
                        return Err(bad("the two nodes are the same".into()));
                    }
                    let invert = matches!(spec.kind, ResponseKind::Admittance(..));
                    let driver = net.parts().iter().position(|p| match p.kind {
                        PartKind::VoltageSource { plus, minus, .. } => {
                            (plus, minus) == (*a, *b) || (plus, minus) == (*b, *a)
                        }
                        _ => false,
                    });
                    match driver {
                        Some(i) => {
                            let id = PartId(i);
                            let mut den = sys.current_readout(&net, id).unwrap_or_default();
                            // Branch current flows plus → minus inside the source, so the
                            // current it delivers into node a is −i when a is its plus.
                            if matches!(net.parts()[i].kind, PartKind::VoltageSource { plus, .. } if plus == *a)
                            {
                                for t in &mut den.g {
                                    t.1 = -t.1;
                                }
                            }
                            Resolved {
                                excitation: slot(Excitation::Drive(id)),
                                numerator: System::voltage_readout(*a, *b),
                                denominator: Some(den),
                                invert,
                                noise: None,
                            }
                        }
                        None => Resolved {
                            excitation: slot(Excitation::Injection(*a, *b)),
                            numerator: System::voltage_readout(*a, *b),
                            denominator: None,
                            invert,
                            noise: None,
                        },
                    }
                }
                ResponseKind::Transfer { inject, read } => {
                    if inject.0 == inject.1 || read.0 == read.1 {
                        return Err(bad("the two nodes are the same".into()));
                    }
                    Resolved {
                        excitation: slot(Excitation::Injection(inject.0, inject.1)),
                        numerator: System::voltage_readout(read.0, read.1),
                        denominator: None,
                        invert: false,
                        noise: None,
                    }
                }
                ResponseKind::Noise {
                    plus,
                    minus,
                    referred_to,
                    source,
                } => {
                    if plus == minus {
                        return Err(bad("the two nodes are the same".into()));
                    }
                    if let Some(r) = referred_to {
                        let ok = specs.get(*r).is_some_and(|t| {
                            matches!(t.kind, ResponseKind::Ratio { .. })
                                && t.kind.unit() == ResponseUnit::Ratio
                        });
                        if !ok {
                            return Err(bad(
                                "noise can be referred to a voltage or current ratio only".into(),
                            ));
                        }
                    }
                    if let Some(p) = source {
                        if !matches!(
                            net.part(*p).map(|x| &x.kind),
                            Some(PartKind::Resistor { .. })
                        ) {
                            return Err(bad(
                                "the noise figure's source must be a resistor (the signal source's resistance)".into(),
                            ));
                        }
                    }
                    let q = System::voltage_readout(*plus, *minus);
                    let plan = NoisePlan::new(&net, &sys, &q, *referred_to, *source);
                    Resolved {
                        excitation: usize::MAX,
                        numerator: q,
                        denominator: None,
                        invert: false,
                        noise: Some(Box::new(plan)),
                    }
                }
            };
            resolved.push(r);
        }
        let rhs = excitations
            .iter()
            .map(|e| match *e {
                Excitation::Design => sys.b.clone(),
                Excitation::Injection(a, b) => sys.injection_rhs(a, b),
                Excitation::Drive(p) => sys.source_drive_rhs(p).unwrap_or_default(),
            })
            .collect();
        Ok(Analysis {
            net,
            sys,
            specs,
            resolved,
            excitations,
            rhs,
            solver: SolverKind::Auto,
            order: OnceLock::new(),
        })
    }

    /// Chooses the solver path (default: by size).
    pub fn with_solver(mut self, kind: SolverKind) -> Self {
        if kind != self.solver {
            self.order = OnceLock::new();
        }
        self.solver = kind;
        self
    }

    /// Runs the topology checks that apply at 0 Hz (capacitor cut-sets, inductor loops).
    pub fn check_dc(&self) -> Result<(), AnalysisError> {
        Ok(topology::check(&self.net, true)?)
    }

    /// The network.
    pub fn network(&self) -> &Network {
        &self.net
    }
    /// The assembled system.
    pub fn system(&self) -> &System {
        &self.sys
    }
    /// The responses, in order.
    pub fn responses(&self) -> &[ResponseSpec] {
        &self.specs
    }

    /// How response `index` is read: the right-hand side of its excitation, its numerator
    /// and denominator read-outs (no denominator: the numerator alone, under a 1 A test
    /// current), whether the value is inverted (an admittance), and whether the excitation
    /// is the design's own sources (so read-out constants apply).
    pub fn readout(&self, index: usize) -> Option<ResponseReadout<'_>> {
        let r = self.resolved.get(index).filter(|r| r.noise.is_none())?;
        Some(ResponseReadout {
            rhs: self.rhs.get(r.excitation)?,
            numerator: &r.numerator,
            denominator: r.denominator.as_ref(),
            invert: r.invert,
            design: self.excitations.get(r.excitation) == Some(&Excitation::Design),
        })
    }

    /// An evaluator that reuses the solver path and symbolic work (band ordering, sparse
    /// analysis) of `like`, an evaluator of an analysis with the same structure (one made
    /// by [`Analysis::with_values`]); where the patterns differ, prepares afresh.
    pub fn evaluator_like(&self, like: &Evaluator<'_>) -> Result<Evaluator<'_>, AnalysisError> {
        match like.plan.rebind(&self.sys) {
            Some(plan) => Ok(Evaluator {
                analysis: self,
                plan,
            }),
            None => self.evaluator(),
        }
    }

    /// Prepares the solver (the sparse path does its symbolic analysis here).
    pub fn evaluator(&self) -> Result<Evaluator<'_>, AnalysisError> {
        let plan = self.plan().map_err(|s| AnalysisError::Singular {
            frequency: 0.0,
            blame: self.sys.describe_unknown(&self.net, s.column),
            hint: " (structurally: no pattern of entries makes the matrix regular)".into(),
        })?;
        Ok(Evaluator {
            analysis: self,
            plan,
        })
    }
}

/// Evaluates an [`Analysis`] at any ω; cheap to share between threads.
#[derive(Clone)]
pub struct Evaluator<'a> {
    analysis: &'a Analysis,
    plan: SolverPlan<'a>,
}

/// Per-thread scratch for an [`Evaluator`].
pub struct Workspace<'a> {
    /// One frequency per pass (single points, and the fallback that names a failure); made
    /// when first needed.
    one: Option<Box<dyn LaneSolver + 'a>>,
    /// Several frequencies per pass, where the solver path has such a kernel; made when
    /// first needed (None until then, Some(None) on a path without one).
    wide: Option<Option<Box<dyn LaneSolver + 'a>>>,
    buf: Buffers,
    points: Vec<Point>,
    /// Groups the wide solver failed on, so they were evaluated one frequency at a time.
    regrouped: usize,
    /// Workspaces of the other threads, for a large system's shares of
    /// [`Evaluator::at_many`]; made when first needed, kept for the next call.
    helpers: Vec<Workspace<'a>>,
}

/// The vectors a group of frequencies is evaluated in.
struct Buffers {
    /// Per excitation, the solutions of the current group, lane-major.
    xs: Vec<Vec<Complex64>>,
    /// Per excitation, their ω-derivatives.
    dxs: Vec<Vec<Complex64>>,
    /// Noise: the output read-out in every lane, and the adjoint solutions.
    noise_rhs: Vec<Complex64>,
    ys: Vec<Complex64>,
    /// Per response, whether it is evaluated (all, unless the workspace serves one
    /// response: [`Evaluator::workspace_for`]); the others' points are left as they were.
    wanted: Vec<bool>,
    /// Per excitation, whether a wanted response reads its solution.
    solved: Vec<bool>,
}

/// The solver and buffers one group of frequencies is evaluated with.
struct Group<'w, 'a> {
    solver: &'w mut (dyn LaneSolver + 'a),
    buf: &'w mut Buffers,
}

impl<'a> Evaluator<'a> {
    /// The solver path in use.
    pub fn solver_kind(&self) -> SolverKind {
        self.plan.kind()
    }

    /// The analysis.
    pub fn analysis(&self) -> &'a Analysis {
        self.analysis
    }

    /// A workspace for one thread. Its solvers are made on first use (a study's many short
    /// evaluations often need only one of the two).
    pub fn workspace(&self) -> Workspace<'a> {
        let a = self.analysis;
        // Only the stack kernel takes several frequencies per pass.
        let lanes = if self.plan.kind() == SolverKind::Small {
            LANES
        } else {
            1
        };
        Workspace {
            one: None,
            wide: None,
            buf: Buffers {
                xs: vec![vec![Complex64::default(); a.sys.n * lanes]; a.rhs.len()],
                dxs: vec![vec![Complex64::default(); a.sys.n * lanes]; a.rhs.len()],
                noise_rhs: Vec::new(),
                ys: Vec::new(),
                wanted: vec![true; a.specs.len()],
                solved: vec![true; a.rhs.len()],
            },
            points: vec![Point::default(); a.specs.len()],
            regrouped: 0,
            helpers: Vec::new(),
        }
    }

    /// A workspace that evaluates response `index` alone (and the ratio a noise response is
    /// referred to): the others' points are not computed, so a response that cannot be
    /// evaluated at some frequency (an impedance that is infinite at DC) does not fail
    /// another's evaluation there, and excitations no wanted response reads are not solved.
    pub fn workspace_for(&self, index: usize) -> Workspace<'a> {
        let a = self.analysis;
        let mut ws = self.workspace();
        let mut wanted = vec![false; a.specs.len()];
        if let Some(w) = wanted.get_mut(index) {
            *w = true;
        }
        if let Some(j) = a
            .resolved
            .get(index)
            .and_then(|r| r.noise.as_deref())
            .and_then(|n| n.referred_to)
        {
            if let Some(w) = wanted.get_mut(j) {
                *w = true;
            }
        }
        let mut solved = vec![false; a.rhs.len()];
        for (r, _) in a.resolved.iter().zip(&wanted).filter(|(_, &w)| w) {
            if r.noise.is_none() {
                if let Some(s) = solved.get_mut(r.excitation) {
                    *s = true;
                }
            }
        }
        ws.buf.wanted = wanted;
        ws.buf.solved = solved;
        ws
    }

    /// The workspace's one-frequency solver, made on first use.
    fn one<'w>(
        &self,
        one: &'w mut Option<Box<dyn LaneSolver + 'a>>,
    ) -> &'w mut (dyn LaneSolver + 'a) {
        one.get_or_insert_with(|| self.plan.make_lanes(false))
            .as_mut()
    }

    /// The solution vector under the design's own sources from the last [`Evaluator::at`]
    /// call on this workspace (None if no response uses the design's sources).
    pub fn design_solution<'w>(&self, ws: &'w Workspace<'a>) -> Option<&'w [Complex64]> {
        let e = self
            .analysis
            .excitations
            .iter()
            .position(|e| *e == Excitation::Design)
            .filter(|&e| ws.buf.solved.get(e) != Some(&false))?;
        ws.buf.xs.get(e).and_then(|x| x.get(..self.analysis.sys.n))
    }

    /// All responses at frequency `f` (Hz), with ω-derivatives when `derivatives` is set
    /// (the wanted one alone on a [`Evaluator::workspace_for`] workspace). Fails, naming the
    /// frequency, when the system is singular there or the solution fails
    /// its residual check. The slice is valid until the next call on this workspace.
    pub fn at<'w>(
        &self,
        ws: &'w mut Workspace<'a>,
        f: Hertz,
        derivatives: bool,
    ) -> Result<&'w [Point], AnalysisError> {
        self.at_many(ws, &[f], derivatives)
    }

    /// All responses at every frequency of `freqs` (Hz): point-major, response `r` at
    /// `freqs[k]` is element `k·R + r` for R responses. Small systems are solved several
    /// frequencies per pass, large ones (from `PARALLEL_PROBE_UNKNOWNS`) on several threads;
    /// the values are those one frequency at a time gives. Fails with the error of the first
    /// frequency (in the order given) that fails.
    pub fn at_many<'w>(
        &self,
        ws: &'w mut Workspace<'a>,
        freqs: &[Hertz],
        derivatives: bool,
    ) -> Result<&'w [Point], AnalysisError> {
        let nr = self.analysis.specs.len();
        // Taken out while the solvers fill it, so the workspace lends them its vectors.
        let mut points = std::mem::take(&mut ws.points);
        points.resize(freqs.len() * nr, Point::default());
        let solved = self.fill_many(ws, freqs, derivatives, &mut points);
        ws.points = points;
        solved?;
        Ok(&ws.points)
    }

    /// [`Evaluator::at_many`]'s work, into `points` (taken out of the workspace).
    fn fill_many(
        &self,
        ws: &mut Workspace<'a>,
        freqs: &[Hertz],
        derivatives: bool,
        points: &mut [Point],
    ) -> Result<(), AnalysisError> {
        let nr = self.analysis.specs.len();
        let threads = rayon::current_num_threads();
        if freqs.len() > 1
            && threads > 1
            && self.plan.kind() != SolverKind::Small
            && self.analysis.sys.n >= PARALLEL_PROBE_UNKNOWNS
        {
            // A large system: the frequencies are shared among the threads, this workspace
            // taking the first share and a helper workspace each of the others.
            let per = freqs.len().div_ceil(threads);
            let (mine, rest) = freqs.split_at(per);
            let (head, tail) = points.split_at_mut(per * nr);
            let mut helpers = std::mem::take(&mut ws.helpers);
            while helpers.len() < rest.len().div_ceil(per) {
                let mut helper = self.workspace();
                helper.buf.wanted.clone_from(&ws.buf.wanted);
                helper.buf.solved.clone_from(&ws.buf.solved);
                helpers.push(helper);
            }
            let (first, others) = rayon::join(
                || self.one_by_one(ws, mine, derivatives, head),
                || {
                    rest.par_chunks(per)
                        .zip(tail.par_chunks_mut(per * nr))
                        .zip(helpers.par_iter_mut())
                        .map(|((fs, out), w)| self.one_by_one(w, fs, derivatives, out))
                        .collect::<Vec<_>>()
                },
            );
            ws.helpers = helpers;
            // The first failure in the order of `freqs`.
            return std::iter::once(first).chain(others).collect();
        }
        if freqs.len() < 2 {
            // A single point ([`Evaluator::at`]) never makes the wide solver.
            return self.one_by_one(ws, freqs, derivatives, points);
        }
        // A large system's second solver would be costly to make for nothing.
        let wide = ws.wide.get_or_insert_with(|| {
            (self.plan.kind() == SolverKind::Small)
                .then(|| self.plan.make_lanes(true))
                .filter(|w| w.lanes() > 1)
        });
        let lanes = wide.as_ref().map_or(1, |w| w.lanes());
        for (fs, out) in freqs
            .chunks(lanes)
            .zip(points.chunks_mut(lanes * nr.max(1)))
        {
            if fs.len() > 1 {
                if let Some(Some(wide)) = ws.wide.as_mut() {
                    let mut group = Group {
                        solver: wide.as_mut(),
                        buf: &mut ws.buf,
                    };
                    if self.eval_group(&mut group, fs, derivatives, out).is_ok() {
                        continue;
                    }
                    ws.regrouped += 1;
                }
            }
            // One at a time: the fallback that finds which frequency failed, and why.
            self.one_by_one(ws, fs, derivatives, out)?;
        }
        Ok(())
    }

    /// Every response at each of `freqs`, one frequency at a time, into `out`
    /// (point-major); fails with the first failing frequency's error.
    fn one_by_one(
        &self,
        ws: &mut Workspace<'a>,
        freqs: &[Hertz],
        derivatives: bool,
        out: &mut [Point],
    ) -> Result<(), AnalysisError> {
        let nr = self.analysis.specs.len();
        for (k, &f) in freqs.iter().enumerate() {
            let mut group = Group {
                solver: self.one(&mut ws.one),
                buf: &mut ws.buf,
            };
            let slot = out.get_mut(k * nr..(k + 1) * nr).unwrap_or_default();
            self.eval_group(&mut group, &[f], derivatives, slot)?;
        }
        Ok(())
    }

    /// Evaluates every response at `freqs` (at most the solver's lane count) into `out`
    /// (point-major); fails with the first failing frequency's error.
    fn eval_group(
        &self,
        g: &mut Group<'_, 'a>,
        freqs: &[Hertz],
        derivatives: bool,
        out: &mut [Point],
    ) -> Result<(), AnalysisError> {
        let a = self.analysis;
        let n = a.sys.n;
        let mut omegas = [0.0; LANES];
        let count = freqs.len().min(g.solver.lanes()).min(LANES);
        for (w, f) in omegas.iter_mut().zip(freqs).take(count) {
            *w = 2.0 * PI * f;
        }
        let omegas = &omegas[..count];
        let freq = |lane: usize| freqs.get(lane).copied().unwrap_or(f64::NAN);
        let singular = |lane: usize, column: usize, with_hint: bool| {
            let blame = a.sys.describe_unknown(&a.net, column);
            let hint = if with_hint && blame.contains("op-amp") {
                "; give the op-amp feedback from its output to an input".to_string()
            } else {
                String::new()
            };
            AnalysisError::Singular {
                frequency: freq(lane),
                blame,
                hint,
            }
        };
        let lane_error = |e: crate::solve::LaneFailure| match e.failure {
            SolveFailure::Singular(s) => singular(e.lane, s.column, false),
            SolveFailure::Untrustworthy { residual } => AnalysisError::Untrustworthy {
                frequency: freq(e.lane),
                residual,
            },
        };
        g.solver.factor(omegas).map_err(|e| match e.failure {
            SolveFailure::Singular(s) => singular(e.lane, s.column, true),
            SolveFailure::Untrustworthy { residual } => AnalysisError::Untrustworthy {
                frequency: freq(e.lane),
                residual,
            },
        })?;
        for (e, rhs) in a.rhs.iter().enumerate() {
            if g.buf.solved.get(e) == Some(&false) {
                continue;
            }
            let (Some(x), Some(dx)) = (g.buf.xs.get_mut(e), g.buf.dxs.get_mut(e)) else {
                continue;
            };
            g.solver.solve_checked(rhs, x).map_err(lane_error)?;
            if derivatives {
                g.solver.derivative(x, dx);
            }
        }
        let nr = a.specs.len();
        for (lane, (&omega, slot)) in omegas.iter().zip(out.chunks_mut(nr.max(1))).enumerate() {
            let span = lane * n..(lane + 1) * n;
            for ((k, r), point) in a.resolved.iter().enumerate().zip(slot.iter_mut()) {
                if r.noise.is_some() || g.buf.wanted.get(k) == Some(&false) {
                    continue;
                }
                let x = g.buf.xs[r.excitation].get(span.clone()).unwrap_or_default();
                let dx = g.buf.dxs[r.excitation]
                    .get(span.clone())
                    .unwrap_or_default();
                let design = a.excitations[r.excitation] == Excitation::Design;
                *point = r.point(x, dx, omega, design, derivatives).ok_or_else(|| {
                    AnalysisError::ZeroDenominator {
                        response: a.specs[k].name.clone(),
                        frequency: freq(lane),
                    }
                })?;
            }
        }
        // Noise responses: one transposed solve per response and lane gives the transfer
        // from every source.
        for (k, r) in a.resolved.iter().enumerate() {
            let Some(plan) = r.noise.as_deref() else {
                continue;
            };
            if g.buf.wanted.get(k) == Some(&false) {
                continue;
            }
            let count = omegas.len();
            g.buf.noise_rhs.clear();
            for _ in 0..count {
                g.buf.noise_rhs.extend_from_slice(&plan.output);
            }
            g.buf.ys.resize(n * count, Complex64::default());
            g.solver
                .solve_transposed_checked(&g.buf.noise_rhs, &mut g.buf.ys)
                .map_err(lane_error)?;
            for lane in 0..count {
                let f = freq(lane);
                let scale = match plan.referred_to {
                    Some(j) => out.get(lane * nr + j).map_or(f64::NAN, |p| p.value.norm()),
                    None => 1.0,
                };
                let y = g.buf.ys.get(lane * n..(lane + 1) * n).unwrap_or_default();
                let total = plan.total(f, y, scale);
                if scale == 0.0 || !total.is_finite() {
                    return Err(AnalysisError::NoiseUndefined {
                        response: a.specs[k].name.clone(),
                        frequency: f,
                    });
                }
                if let Some(p) = out.get_mut(lane * nr + k) {
                    *p = Point {
                        value: Complex64::new(total.sqrt(), 0.0),
                        derivative: Complex64::default(),
                    };
                }
            }
        }
        Ok(())
    }

    /// The noise of response `index` at `f`, source by source (power spectral densities,
    /// V²/Hz at the output, or referred as the response is). Fails as [`Evaluator::at`]
    /// does, or when `index` is not a noise response.
    pub fn noise_at(
        &self,
        ws: &mut Workspace<'a>,
        f: Hertz,
        index: usize,
    ) -> Result<Breakdown, AnalysisError> {
        let a = self.analysis;
        let not_noise = || AnalysisError::BadResponse {
            response: a
                .specs
                .get(index)
                .map_or_else(String::new, |s| s.name.clone()),
            reason: "is not a noise response".into(),
        };
        let plan = a
            .resolved
            .get(index)
            .and_then(|r| r.noise.as_deref())
            .ok_or_else(not_noise)?;
        // Every response at f (the referred-to gain among them), which leaves the one-lane
        // solver factored at f.
        let scale = {
            let pts = self.at(ws, f, false)?;
            match plan.referred_to {
                Some(j) => pts.get(j).map_or(f64::NAN, |p| p.value.norm()),
                None => 1.0,
            }
        };
        let n = a.sys.n;
        ws.buf.ys.resize(n, Complex64::default());
        self.one(&mut ws.one)
            .solve_transposed_checked(&plan.output, &mut ws.buf.ys)
            .map_err(|e| match e.failure {
                SolveFailure::Singular(_) | SolveFailure::Untrustworthy { .. } => {
                    AnalysisError::Untrustworthy {
                        frequency: f,
                        residual: f64::INFINITY,
                    }
                }
            })?;
        let mut parts = Vec::with_capacity(plan.sources.len());
        let total = plan.contributions(f, &ws.buf.ys, scale, &mut parts);
        Ok(Breakdown { total, parts })
    }

    /// Response `index` at `f` (with its ω-derivative) and its normalised sensitivity
    /// `∂ln H/∂ln p` to each value of `params`, by the adjoint method: the solve at `f` that
    /// every response shares, one transposed solve `(G + jωC)ᵀ·y = q_N/N − q_D/D` (the
    /// read-outs over their values), then per value only sparse products:
    /// `∂ln H/∂ln p = yᵀ·(∂b − ∂A·x)` plus the change of a read-out that is the value's own
    /// current. `Re S` is the relative change of |H| per relative change of p, `Im S` the
    /// change of phase in radians. Noise responses have none.
    pub fn sensitivities(
        &self,
        ws: &mut Workspace<'a>,
        f: Hertz,
        index: usize,
        params: &[(PartId, Param)],
    ) -> Result<(Point, Vec<Complex64>), AnalysisError> {
        let a = self.analysis;
        let spec = a.specs.get(index);
        let bad = |reason: &str| AnalysisError::BadResponse {
            response: spec.map_or_else(String::new, |s| s.name.clone()),
            reason: reason.into(),
        };
        let r = a
            .resolved
            .get(index)
            .ok_or_else(|| bad("is not a response of this analysis"))?;
        if r.noise.is_some() {
            return Err(bad(
                "is a noise response; sensitivities are computed for ratios, impedances and admittances",
            ));
        }
        let point = self.at(ws, f, true)?[index];
        let n = a.sys.n;
        let omega = 2.0 * PI * f;
        let x: Vec<Complex64> = ws.buf.xs[r.excitation]
            .get(..n)
            .unwrap_or_default()
            .to_vec();
        let design = a.excitations.get(r.excitation) == Some(&Excitation::Design);
        let num = r.numerator.eval(&x, omega, design);
        let den = r
            .denominator
            .as_ref()
            .map_or(Complex64::new(1.0, 0.0), |d| d.eval(&x, omega, design));
        let mut w = vec![Complex64::default(); n];
        let jw = Complex64::new(0.0, omega);
        let mut put = |ro: &Readout, scale: Complex64| {
            for &(i, g) in &ro.g {
                if let Some(slot) = w.get_mut(i) {
                    *slot += scale * g;
                }
            }
            for &(i, c) in &ro.c {
                if let Some(slot) = w.get_mut(i) {
                    *slot += scale * jw * c;
                }
            }
        };
        put(&r.numerator, num.inv());
        if let Some(d) = &r.denominator {
            put(d, -den.inv());
        }
        ws.buf.ys.resize(n, Complex64::default());
        self.one(&mut ws.one)
            .solve_transposed_checked(&w, &mut ws.buf.ys)
            .map_err(|_| AnalysisError::Untrustworthy {
                frequency: f,
                residual: f64::INFINITY,
            })?;
        let y = &ws.buf.ys;
        let probes = match spec.map(|s| &s.kind) {
            Some(ResponseKind::Ratio {
                numerator,
                denominator,
            }) => (Some(numerator), Some(denominator)),
            _ => (None, None),
        };
        // The share of a read-out that is not a source's constant (it scales with p).
        let varying = |ro: &Readout, v: Complex64| {
            let c = if design {
                ro.constant
            } else {
                Complex64::default()
            };
            v - c
        };
        let mut out = Vec::with_capacity(params.len());
        for &(part, param) in params {
            let (entries, rhs) = a.sys.derivative(&a.net, part, param);
            let mut t = Complex64::default();
            if design {
                for (i, v) in rhs {
                    t += y.get(i).copied().unwrap_or_default() * v;
                }
            }
            for (row, col, dg, dc) in entries {
                let (yi, xj) = (
                    y.get(row).copied().unwrap_or_default(),
                    x.get(col).copied().unwrap_or_default(),
                );
                t -= yi * Complex64::new(dg, omega * dc) * xj;
            }
            let e = System::readout_exponent(&a.net, part, param);
            if e != 0.0 {
                if probes.0 == Some(&Probe::Current(part)) {
                    t += e * varying(&r.numerator, num) / num;
                }
                if let (Some(Probe::Current(q)), Some(d)) = (probes.1, &r.denominator) {
                    if *q == part {
                        t -= e * varying(d, den) / den;
                    }
                }
            }
            out.push(if r.invert { -t } else { t });
        }
        Ok((point, out))
    }

    /// The noise plan of response `index`, if it is a noise response.
    pub fn noise_plan(&self, index: usize) -> Option<&'a NoisePlan> {
        self.analysis
            .resolved
            .get(index)
            .and_then(|r| r.noise.as_deref())
    }
}

impl Resolved {
    /// The response's value (and ω-derivative) from solution `x` (and `dx/dω`); None when
    /// the denominator, or the value to be inverted, is zero or not finite.
    fn point(
        &self,
        x: &[Complex64],
        dx: &[Complex64],
        omega: f64,
        design: bool,
        derivatives: bool,
    ) -> Option<Point> {
        let num = self.numerator.eval(x, omega, design);
        let den = match &self.denominator {
            Some(d) => d.eval(x, omega, design),
            None => Complex64::new(1.0, 0.0),
        };
        // |z| = 0 exactly when both parts are (no square root needed to see it).
        let zero =
            |z: Complex64| (z.re == 0.0 && z.im == 0.0) || !z.re.is_finite() || !z.im.is_finite();
        if zero(den) || (self.invert && zero(num)) {
            return None;
        }
        let mut value = num / den;
        let mut derivative = Complex64::default();
        if derivatives {
            let dnum = self.numerator.eval_derivative(x, dx, omega);
            let dden = match &self.denominator {
                Some(d) => d.eval_derivative(x, dx, omega),
                None => Complex64::default(),
            };
            derivative = (dnum * den - num * dden) / (den * den);
        }
        if self.invert {
            // d(1/H)/dω = −H′/H²
            derivative = -derivative / (value * value);
            value = value.inv();
        }
        Some(Point { value, derivative })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::network::NetworkBuilder;

    /// On a large system the frequencies of one call are shared among threads: every
    /// value is the very one a call per frequency gives, and a failure is the first
    /// frequency's (in the order given) to fail, whichever thread met it.
    #[test]
    fn large_systems_share_frequencies_among_threads_and_change_nothing() {
        let a = chain(PARALLEL_PROBE_UNKNOWNS);
        let ev = a.evaluator().unwrap();
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(2)
            .build()
            .unwrap();
        let bad = f64::INFINITY;
        let mut ws = ev.workspace();
        assert!(ev.at(&mut ws, bad, false).is_err());
        let good = [3e2, 1e4, 7e5, 2e6, 3e7];
        for derivatives in [false, true] {
            let one: Vec<Point> = good
                .iter()
                .flat_map(|&f| ev.at(&mut ev.workspace(), f, derivatives).unwrap().to_vec())
                .collect();
            let many = pool.install(|| {
                assert_eq!(rayon::current_num_threads(), 2);
                ev.at_many(&mut ws, &good, derivatives).unwrap().to_vec()
            });
            assert_eq!(many, one);
        }
        for freqs in [
            vec![1e3, 2e3, bad, 5e3],
            vec![bad, 1e3, 2e3],
            vec![1e3, 2e3, 4e3, bad],
        ] {
            let k = freqs.iter().position(|&f| f == bad).unwrap();
            let expected = ev.at(&mut ev.workspace(), freqs[k], false).unwrap_err();
            let got = pool.install(|| ev.at_many(&mut ws, &freqs, false).unwrap_err());
            assert_eq!(got.to_string(), expected.to_string(), "{freqs:?}");
        }
    }

    /// A network large enough to be checked and assembled side by side gives the very
    /// system of assembly alone, and the topology check's own error when it has a fault.
    #[test]
    fn large_networks_check_and_assemble_as_small_ones() {
        let net = crate::ladders::rc_chain(PARALLEL_ASSEMBLY_PARTS / 2).unwrap();
        assert!(net.parts().len() >= PARALLEL_ASSEMBLY_PARTS);
        let a = Analysis::new(net.clone(), Vec::new()).unwrap();
        let sys = System::assemble(&net);
        assert_eq!(
            (&a.system().pattern, &a.system().g, &a.system().c),
            (&sys.pattern, &sys.g, &sys.c)
        );
        // A long chain with an island (two nodes joined only to each other).
        let mut b = NetworkBuilder::new("chain with an island");
        b.current_source("I1", "gnd", "n0", Complex64::new(1e-3, 0.0))
            .unwrap();
        for k in 1..PARALLEL_ASSEMBLY_PARTS {
            let (a, z) = (format!("n{}", k - 1), format!("n{k}"));
            b.resistor(&format!("R{k}"), &a, &z, 10.0).unwrap();
            b.capacitor(&format!("C{k}"), &z, "gnd", 1e-9).unwrap();
        }
        b.capacitor("Cx", "island1", "island2", 1e-9).unwrap();
        let faulty = b.build().unwrap();
        assert!(faulty.parts().len() >= PARALLEL_ASSEMBLY_PARTS);
        let expected = topology::check(&faulty, false).unwrap_err().to_string();
        let got = Analysis::new(faulty, Vec::new()).unwrap_err().to_string();
        assert_eq!(got, expected);
    }

    /// A chain with exactly `n` node unknowns driven by a current source, read out as its
    /// input impedance (a test injection) and as a transfer ratio (the design's own source),
    /// so two right-hand sides share each factorisation.
    fn chain(n: usize) -> Analysis {
        let net = crate::ladders::rc_chain(n).unwrap();
        let first = net.node("n1").unwrap();
        let last = net.node(&format!("n{n}")).unwrap();
        let specs = vec![
            ResponseSpec::new("zin", ResponseKind::Impedance(first, NodeId::GROUND)),
            ResponseSpec::new(
                "transfer",
                ResponseKind::Ratio {
                    numerator: Probe::Voltage(last, NodeId::GROUND),
                    denominator: Probe::Current(net.part_id("Rg1").unwrap()),
                },
            ),
        ];
        Analysis::new(net, specs).unwrap()
    }

    /// Several frequencies per pass give the very numbers one frequency per pass gives, on
    /// every size the stack kernel serves, for a full group of lanes and a partial one.
    #[test]
    fn lanes_give_the_numbers_of_single_points() {
        let freqs: Vec<f64> = (0..LANES + 3)
            .map(|k| 37.0 * 1.9f64.powi(k as i32))
            .collect();
        for n in 1..=crate::solve::SMALL_MAX {
            let a = chain(n);
            let ev = a.evaluator().unwrap();
            assert_eq!(ev.solver_kind(), SolverKind::Small);
            let mut wide = ev.workspace();
            let mut one = ev.workspace();
            let many = ev.at_many(&mut wide, &freqs, true).unwrap().to_vec();
            assert_eq!(many.len(), freqs.len() * 2);
            // The wide kernel served every group: the fallback would hide a wrong lane.
            assert_eq!(wide.regrouped, 0, "n = {n}");
            for (k, &f) in freqs.iter().enumerate() {
                let single = ev.at(&mut one, f, true).unwrap();
                assert_eq!(&many[2 * k..2 * k + 2], single, "n = {n}, f = {f}");
            }
        }
    }

    /// A frequency that fails inside a group is named, whichever lane it sat in.
    #[test]
    fn a_failing_lane_is_named() {
        let mut b = NetworkBuilder::new("floats at 0 Hz");
        b.voltage_source("V1", "a", "gnd", 1.0.into()).unwrap();
        b.capacitor("C1", "a", "b", 1e-6).unwrap();
        b.capacitor("C2", "b", "gnd", 1e-6).unwrap();
        let net = b.build().unwrap();
        let (nb, na) = (net.node("b").unwrap(), net.node("a").unwrap());
        let spec = ResponseSpec::new(
            "gain",
            ResponseKind::Ratio {
                numerator: Probe::Voltage(nb, NodeId::GROUND),
                denominator: Probe::Voltage(na, NodeId::GROUND),
            },
        );
        let a = Analysis::new(net, vec![spec]).unwrap();
        let ev = a.evaluator().unwrap();
        let mut ws = ev.workspace();
        let ok = ev.at_many(&mut ws, &[1.0, 2.0, 3.0], false).unwrap();
        // A capacitive divider of equal halves.
        assert!((ok[0].value - Complex64::new(0.5, 0.0)).norm() < 1e-12);
        for lane in 0..LANES {
            let mut freqs: Vec<f64> = (1..=LANES).map(|k| k as f64).collect();
            freqs[lane] = 0.0;
            match ev.at_many(&mut ws, &freqs, false) {
                Err(AnalysisError::Singular {
                    frequency, blame, ..
                }) => {
                    assert_eq!(frequency, 0.0);
                    assert_eq!(blame, "node b");
                    assert!(ws.regrouped > 0);
                }
                other => panic!("lane {lane}: {other:?}"),
            }
        }
    }
}
