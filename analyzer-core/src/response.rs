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

use crate::network::{Network, NodeId, PartId, PartKind};
use crate::solve::{
    solve_checked, CheckScratch, PointSolver, SolveFailure, SolverKind, SolverPlan,
};
use crate::stamp::{Readout, System};
use crate::topology::{self, TopologyError};
use crate::units::{format_eng, Hertz};
use num_complex::Complex64;
use std::f64::consts::PI;

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
}

/// A named response.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ResponseSpec {
    /// Name used for files and tables.
    pub name: String,
    /// What it reads.
    pub kind: ResponseKind,
    /// Whether it is a loop gain (margins are then reported).
    pub loop_gain: bool,
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
}

impl ResponseUnit {
    /// Short unit symbol for tables ("" for a plain ratio).
    pub fn symbol(self) -> &'static str {
        match self {
            ResponseUnit::Ratio => "",
            ResponseUnit::Ohms => "Ω",
            ResponseUnit::Siemens => "S",
        }
    }
    /// ASCII suffix for CSV column names ("" for a plain ratio).
    pub fn column_suffix(self) -> &'static str {
        match self {
            ResponseUnit::Ratio => "",
            ResponseUnit::Ohms => "_ohm",
            ResponseUnit::Siemens => "_siemens",
        }
    }
}

impl ResponseKind {
    /// The unit of this response's value.
    pub fn unit(&self) -> ResponseUnit {
        match self {
            ResponseKind::Impedance(..) => ResponseUnit::Ohms,
            ResponseKind::Admittance(..) => ResponseUnit::Siemens,
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
}

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
}

impl Analysis {
    /// Assembles the network once and resolves each response. Checks the topology for
    /// ω > 0; [`Analysis::check_dc`] adds the checks for 0 Hz.
    pub fn new(net: Network, specs: Vec<ResponseSpec>) -> Result<Self, AnalysisError> {
        topology::check(&net, false)?;
        let sys = System::assemble(&net);
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
                            }
                        }
                        None => Resolved {
                            excitation: slot(Excitation::Injection(*a, *b)),
                            numerator: System::voltage_readout(*a, *b),
                            denominator: None,
                            invert,
                        },
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
        })
    }

    /// Chooses the solver path (default: by size).
    pub fn with_solver(mut self, kind: SolverKind) -> Self {
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

    /// Prepares the solver (the sparse path does its symbolic analysis here).
    pub fn evaluator(&self) -> Result<Evaluator<'_>, AnalysisError> {
        let plan =
            SolverPlan::new(&self.sys, self.solver).map_err(|s| AnalysisError::Singular {
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
    solver: Box<dyn PointSolver + 'a>,
    xs: Vec<Vec<Complex64>>,
    dxs: Vec<Vec<Complex64>>,
    check: CheckScratch,
    points: Vec<Point>,
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

    /// A workspace for one thread.
    pub fn workspace(&self) -> Workspace<'a> {
        let a = self.analysis;
        Workspace {
            solver: self.plan.make(),
            xs: vec![vec![Complex64::default(); a.sys.n]; a.rhs.len()],
            dxs: vec![vec![Complex64::default(); a.sys.n]; a.rhs.len()],
            check: CheckScratch::default(),
            points: vec![Point::default(); a.specs.len()],
        }
    }

    /// The solution vector under the design's own sources from the last [`Evaluator::at`]
    /// call on this workspace (None if no response uses the design's sources).
    pub fn design_solution<'w>(&self, ws: &'w Workspace<'a>) -> Option<&'w [Complex64]> {
        let e = self
            .analysis
            .excitations
            .iter()
            .position(|e| *e == Excitation::Design)?;
        ws.xs.get(e).map(Vec::as_slice)
    }

    /// All responses at frequency `f` (Hz), with ω-derivatives when `derivatives` is set.
    /// Fails, naming the frequency, when the system is singular there or the solution fails
    /// its residual check. The slice is valid until the next call on this workspace.
    pub fn at<'w>(
        &self,
        ws: &'w mut Workspace<'a>,
        f: Hertz,
        derivatives: bool,
    ) -> Result<&'w [Point], AnalysisError> {
        let a = self.analysis;
        let omega = 2.0 * PI * f;
        ws.solver.factor(omega).map_err(|s| {
            let blame = a.sys.describe_unknown(&a.net, s.column);
            let hint = if blame.contains("op-amp") {
                "; give the op-amp feedback from its output to an input".to_string()
            } else {
                String::new()
            };
            AnalysisError::Singular {
                frequency: f,
                blame,
                hint,
            }
        })?;
        for (e, rhs) in a.rhs.iter().enumerate() {
            let x = &mut ws.xs[e];
            x.copy_from_slice(rhs);
            solve_checked(ws.solver.as_mut(), &a.sys, omega, x, &mut ws.check).map_err(|fail| {
                match fail {
                    SolveFailure::Singular(s) => AnalysisError::Singular {
                        frequency: f,
                        blame: a.sys.describe_unknown(&a.net, s.column),
                        hint: String::new(),
                    },
                    SolveFailure::Untrustworthy { residual } => AnalysisError::Untrustworthy {
                        frequency: f,
                        residual,
                    },
                }
            })?;
            if derivatives {
                // dx/dω = −A⁻¹·(jC)·x
                let dx = &mut ws.dxs[e];
                a.sys.multiply(omega, x, dx, true);
                dx.iter_mut().for_each(|v| *v = -*v);
                ws.solver.solve(dx);
            }
        }
        for (k, r) in a.resolved.iter().enumerate() {
            let x = &ws.xs[r.excitation];
            let design = a.excitations[r.excitation] == Excitation::Design;
            let num = r.numerator.eval(x, omega, design);
            let den = match &r.denominator {
                Some(d) => d.eval(x, omega, design),
                None => Complex64::new(1.0, 0.0),
            };
            let zero = |z: Complex64| z.norm() == 0.0 || !z.re.is_finite() || !z.im.is_finite();
            if zero(den) || (r.invert && zero(num)) {
                return Err(AnalysisError::ZeroDenominator {
                    response: a.specs[k].name.clone(),
                    frequency: f,
                });
            }
            let mut value = num / den;
            let mut derivative = Complex64::default();
            if derivatives {
                let dx = &ws.dxs[r.excitation];
                let dnum = r.numerator.eval_derivative(x, dx, omega);
                let dden = match &r.denominator {
                    Some(d) => d.eval_derivative(x, dx, omega),
                    None => Complex64::default(),
                };
                derivative = (dnum * den - num * dden) / (den * den);
            }
            if r.invert {
                // d(1/H)/dω = −H′/H²
                derivative = -derivative / (value * value);
                value = value.inv();
            }
            ws.points[k] = Point { value, derivative };
        }
        Ok(&ws.points)
    }
}
