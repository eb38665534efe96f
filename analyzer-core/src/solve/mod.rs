//! Solving `(G + jωC)·x = b` at one frequency: the only module that touches faer.
//!
//! Four paths sit behind one trait, [`PointSolver`], chosen by [`SolverPlan::new`]:
//!
//! * [`LaneLu`] (`small`): complex LU with partial pivoting on fixed-size stack arrays, for
//!   the tiny systems most filters produce (up to [`SMALL_MAX`] unknowns), eight frequencies
//!   per pass ([`LaneSolver`]), in a fill-reducing elimination order chosen once per plan.
//!   faer's per-call overhead dominates at these sizes; this kernel has none.
//! * [`BandLu`] (`band`): banded LU with partial pivoting after a reverse Cuthill–McKee
//!   ordering found once per sweep, for ladders, lines and chains of any length.
//! * [`DenseLu`] (`dense`): faer's dense LU with partial pivoting, factoring in place into a
//!   workspace reused point after point, for dense patterns.
//! * [`SparseLu`] (`sparse`): faer's sparse LU; the symbolic analysis (COLAMD ordering,
//!   elimination tree) is done once per sweep from the union pattern of `G` and `C` and
//!   shared by all workers; each point only refactors numerically.
//!
//! The crossovers between them were measured, not guessed; the figures are next to
//! [`SMALL_MAX`], [`BAND_MAX`] and [`DENSE_FILL`]. `--solver` overrides the choice.
//!
//! faer reports no numerical singularity. Every path therefore checks its pivots: a pivot that
//! is exactly zero or not finite is reported as [`Singular`] with the column (unknown) it
//! occurred in, so the caller can name the node or part to blame. Residuals are checked by the
//! caller ([`solve_checked`]), with one step of iterative refinement when they are poor.

mod band;
mod dense;
mod small;
mod sparse;

pub use band::{BandLayout, BandLu};
pub use dense::DenseLu;
pub use small::{LaneLu, SmallLu};
pub use sparse::SparseLu;

use crate::stamp::System;
use num_complex::Complex64;
use small::{make_small, make_small_lanes, small_order};
use sparse::SparseShared;
use std::sync::Arc;

/// Largest system the stack kernel serves. Measured with
/// `cargo bench -p analyzer-core --bench solve -- small/` on the 2-core CI machine
/// (2026-12-02). In sweeps, eight frequencies per pass on 2 threads: 9 unknowns 137 ns per
/// point, 15 unknowns 271 ns (`sweep-10k`), where the band path takes 519 ns at 17. One
/// frequency at a time (factor + solve), the band path is already the faster from 9
/// unknowns up (362 ns against 492; sparse 732, dense 1,031), but single points are only
/// the figures' refinements; the sweep decides.
pub const SMALL_MAX: usize = 16;

/// Which solver path to use.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum SolverKind {
    /// Chosen by size and structure (see [`SolverPlan::new`]).
    #[default]
    Auto,
    /// The stack kernel (only up to [`SMALL_MAX`] unknowns; above, the sparse path).
    Small,
    /// Banded LU after a bandwidth-reducing ordering.
    Band,
    /// faer dense LU.
    Dense,
    /// faer sparse LU with symbolic reuse.
    Sparse,
}

/// A zero or non-finite pivot: the system is singular (or numerically so) at this point.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Singular {
    /// The unknown whose column had no usable pivot.
    pub column: usize,
}

/// Factors `G + jωC` at one frequency and solves against right-hand sides.
pub trait PointSolver: Send {
    /// Forms and factors the matrix at `omega`. On `Err`, the factorisation is unusable.
    fn factor(&mut self, omega: f64) -> Result<(), Singular>;
    /// Solves in place with the last factorisation; `rhs` has length n.
    fn solve(&mut self, rhs: &mut [Complex64]);
    /// Solves `(G + jωC)ᵀ·y = rhs` in place with the last factorisation (the transpose, not
    /// the conjugate transpose): the adjoint system whose solution holds the transfer from
    /// every injection point to the read-out `rhs`.
    fn solve_transposed(&mut self, rhs: &mut [Complex64]);
    /// `y = (G + jωC)ᵀ·x`, for the residuals of transposed solves.
    fn multiply_transposed(
        &mut self,
        sys: &System,
        omega: f64,
        x: &[Complex64],
        y: &mut [Complex64],
    ) {
        sys.multiply_transposed(omega, x, y);
    }
    /// `y = (G + jωC)·x`, or `y = jC·x` with `derivative_only` (residual checks and
    /// derivatives): by default over the system's stored pattern; a path with a layout of
    /// its own may stream over that instead.
    fn multiply(
        &mut self,
        sys: &System,
        omega: f64,
        x: &[Complex64],
        y: &mut [Complex64],
        derivative_only: bool,
    ) {
        sys.multiply(omega, x, y, derivative_only);
    }
}

/// Shared, once-per-sweep data that a solver path needs (the band's ordering, the sparse
/// symbolic analysis).
#[derive(Clone)]
pub struct SolverPlan<'a> {
    sys: &'a System,
    kind: SolverKind,
    band: Option<Arc<BandLayout>>,
    sparse: Option<Arc<SparseShared>>,
    /// The stack kernel's elimination order, chosen at the values the plan was made for.
    small: Arc<[usize]>,
}

impl<'a> SolverPlan<'a> {
    /// Prepares the chosen path for `sys`: the band path finds its ordering here, the sparse
    /// path does its symbolic analysis here. [`SolverKind::Auto`] takes the stack kernel up
    /// to [`SMALL_MAX`] unknowns; above, faer's dense LU when the pattern is dense
    /// ([`DENSE_FILL`]), the band path when the reordered matrix is narrow ([`BAND_MAX`]),
    /// and faer's sparse LU otherwise. Fails with [`Singular`] if the pattern is
    /// structurally singular.
    pub fn new(sys: &'a System, kind: SolverKind) -> Result<Self, Singular> {
        Self::with_order(sys, kind, None)
    }

    /// [`SolverPlan::new`] with the stack kernel's elimination order given (one found by
    /// another plan for the same pattern, [`SolverPlan::elimination_order`]) instead of
    /// chosen by trial factorisations at `sys`'s values; an order of the wrong length is
    /// chosen afresh.
    pub fn with_order(
        sys: &'a System,
        kind: SolverKind,
        order: Option<Arc<[usize]>>,
    ) -> Result<Self, Singular> {
        let n = sys.n;
        let mut band = None;
        let kind = match kind {
            SolverKind::Auto if n <= SMALL_MAX => SolverKind::Small,
            SolverKind::Auto
                if sys.pattern.len() as f64 >= DENSE_FILL * (n as f64) * (n as f64) =>
            {
                SolverKind::Dense
            }
            SolverKind::Auto => {
                band = BandLayout::new(sys).map(Arc::new);
                match &band {
                    Some(layout) if layout.kl + layout.ku <= BAND_MAX => SolverKind::Band,
                    _ => SolverKind::Sparse,
                }
            }
            // The stack kernel has no instance above SMALL_MAX; sparse is the fallback.
            SolverKind::Small if n > SMALL_MAX => SolverKind::Sparse,
            k => k,
        };
        if kind == SolverKind::Band && band.is_none() {
            band = Some(Arc::new(
                BandLayout::new(sys).ok_or(Singular { column: 0 })?,
            ));
        }
        let sparse = if kind == SolverKind::Sparse {
            Some(Arc::new(SparseShared::new(sys)?))
        } else {
            None
        };
        if kind != SolverKind::Band {
            band = None;
        }
        let small = match kind {
            SolverKind::Small => order
                .filter(|o| o.len() == n)
                .unwrap_or_else(|| small_order(sys).into()),
            _ => Arc::from([]),
        };
        Ok(SolverPlan {
            sys,
            kind,
            band,
            sparse,
            small,
        })
    }

    /// The same path and symbolic work for `sys`, a system with the same pattern as this
    /// plan's (the same network with other values); None if the patterns differ.
    pub fn rebind<'b>(&self, sys: &'b System) -> Option<SolverPlan<'b>> {
        if sys.n != self.sys.n || sys.pattern != self.sys.pattern {
            return None;
        }
        // The band layout holds the values in its order: lay them out again; the sparse
        // analysis is of the pattern alone.
        let band = match &self.band {
            Some(layout) => Some(Arc::new(layout.with_values(sys)?)),
            None => None,
        };
        Some(SolverPlan {
            sys,
            kind: self.kind,
            band,
            sparse: self.sparse.clone(),
            small: self.small.clone(),
        })
    }

    /// The path in use.
    pub fn kind(&self) -> SolverKind {
        self.kind
    }

    /// The stack kernel's elimination order (the system's unknown at each position; empty
    /// on the other paths).
    pub fn elimination_order(&self) -> Arc<[usize]> {
        self.small.clone()
    }

    /// A fresh solver with its own workspace (one per worker thread).
    pub fn make(&self) -> Box<dyn PointSolver + 'a> {
        let sys = self.sys;
        match (self.kind, &self.band, &self.sparse) {
            (SolverKind::Sparse, _, Some(shared)) => Box::new(SparseLu::new(sys, shared.clone())),
            (SolverKind::Band, Some(layout), _) => Box::new(BandLu::new(layout.clone())),
            (SolverKind::Small, _, _) => make_small(sys, &self.small),
            _ => Box::new(DenseLu::new(sys)),
        }
    }

    /// A fresh [`LaneSolver`] with its own workspace: on the stack-kernel path [`LANES`]
    /// frequencies per pass when `wide`, else one; the other paths take one frequency per
    /// pass.
    pub fn make_lanes(&self, wide: bool) -> Box<dyn LaneSolver + 'a> {
        let sys = self.sys;
        match self.kind {
            SolverKind::Small => make_small_lanes(sys, wide, &self.small),
            _ => Box::new(OneLane::new(sys, self.make())),
        }
    }
}

/// Widest band (`kl + ku` after ordering) that [`SolverKind::Auto`] gives to the band path.
///
/// Measured with `cargo bench -p analyzer-core --bench solve -- mesh/` (factor + solve, RC
/// meshes of about 20,000 unknowns whose band grows with their width): the band path took
/// 0.91 / 1.65 / 3.59 / 11.6 / 36.6 ms at kl + ku = 6 / 10 / 18 / 34 / 66, faer's sparse LU
/// 2.09 / 3.01 / 7.61 / 16.1 / 52.0 ms; the band still won at 98 (58 ms against 75) and
/// lost at 130 (83 ms against 34, where the sparse ordering finds a far better
/// elimination). On 2,000 and 200 unknowns the band path won by 1.3–2.6× at every width
/// tried. 64 keeps a margin below the measured crossover.
pub const BAND_MAX: usize = 64;

/// Share of nonzero entries above which [`SolverKind::Auto`] takes faer's dense LU for a
/// system above [`SMALL_MAX`] unknowns. Measured (`-- full/`, every pair of nodes
/// connected): dense 5.7 / 21 / 81 / 481 / 2,773 µs at 21 / 41 / 81 / 161 / 321 unknowns,
/// against band 6.2 / 35 / 236 / 1,667 / 13,880 and sparse 13.9 / 79 / 537 / 636 / 3,940.
/// Network matrices are rarely this full (a ladder has about 3 entries per row).
pub const DENSE_FILL: f64 = 0.25;

/// Frequencies the wide stack kernel factors in one pass ([`SolverPlan::make_lanes`]).
///
/// Eight lanes of `f64` are two AVX-512, four AVX or eight SSE2 registers wide, so every
/// elimination step is a handful of full vector operations whatever the system's size.
/// Measured with `cargo bench -p analyzer-core --bench solve -- small/sweep-10k` on the
/// 2-core CI machine; the figures are in the README's Performance section.
pub const LANES: usize = 8;

/// Why one lane of a [`LaneSolver`] failed: the lowest failing lane and its failure.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct LaneFailure {
    /// Index of the lane (position in the `omegas` given to [`LaneSolver::factor`]).
    pub lane: usize,
    /// What went wrong there.
    pub failure: SolveFailure,
}

/// Factors `G + jωC` at several frequencies at once and solves against one right-hand side
/// that does not depend on ω. Vectors are lane-major: lane `l`'s solution is
/// `out[l·n .. (l + 1)·n]`.
pub trait LaneSolver: Send {
    /// How many frequencies one [`LaneSolver::factor`] call takes at most.
    fn lanes(&self) -> usize;
    /// Forms and factors the matrix at each of `omegas` (1 ..= `lanes()` values).
    fn factor(&mut self, omegas: &[f64]) -> Result<(), LaneFailure>;
    /// Solves `A(ω_l)·x_l = rhs` for every factored lane, checks each lane's normwise
    /// backward error with one step of iterative refinement above `RESIDUAL_LIMIT / 1000`
    /// (as [`solve_checked`]), and writes the solutions to `out`.
    fn solve_checked(
        &mut self,
        rhs: &[Complex64],
        out: &mut [Complex64],
    ) -> Result<(), LaneFailure>;
    /// `dx_l/dω = −A(ω_l)⁻¹·(jC)·x_l` for each lane's solution `x_l` in `xs`, into `out`.
    fn derivative(&mut self, xs: &[Complex64], out: &mut [Complex64]);
    /// Solves the transposed systems `A(ω_l)ᵀ·y_l = rhs_l` for every factored lane, each lane
    /// with its own right-hand side (lane-major in `rhs`: a read-out may depend on ω), with
    /// the residual check of [`LaneSolver::solve_checked`], into `out`.
    fn solve_transposed_checked(
        &mut self,
        rhs: &[Complex64],
        out: &mut [Complex64],
    ) -> Result<(), LaneFailure>;
}

/// A [`PointSolver`] (faer's dense or sparse LU) seen as a one-lane [`LaneSolver`].
struct OneLane<'a> {
    sys: &'a System,
    solver: Box<dyn PointSolver + 'a>,
    omega: f64,
    check: CheckScratch,
}

impl<'a> OneLane<'a> {
    fn new(sys: &'a System, solver: Box<dyn PointSolver + 'a>) -> Self {
        OneLane {
            sys,
            solver,
            omega: 0.0,
            check: CheckScratch::default(),
        }
    }
}

fn lane0(failure: SolveFailure) -> LaneFailure {
    LaneFailure { lane: 0, failure }
}

impl LaneSolver for OneLane<'_> {
    fn lanes(&self) -> usize {
        1
    }

    fn factor(&mut self, omegas: &[f64]) -> Result<(), LaneFailure> {
        self.omega = omegas.first().copied().unwrap_or(0.0);
        self.solver
            .factor(self.omega)
            .map_err(|s| lane0(SolveFailure::Singular(s)))
    }

    fn solve_checked(
        &mut self,
        rhs: &[Complex64],
        out: &mut [Complex64],
    ) -> Result<(), LaneFailure> {
        let n = self.sys.n;
        let (Some(x), Some(b)) = (out.get_mut(..n), rhs.get(..n)) else {
            return Err(lane0(SolveFailure::Untrustworthy {
                residual: f64::INFINITY,
            }));
        };
        x.copy_from_slice(b);
        solve_checked(
            self.solver.as_mut(),
            self.sys,
            self.omega,
            x,
            &mut self.check,
        )
        .map_err(lane0)
    }

    fn derivative(&mut self, xs: &[Complex64], out: &mut [Complex64]) {
        let n = self.sys.n;
        if let (Some(x), Some(dx)) = (xs.get(..n), out.get_mut(..n)) {
            self.solver.multiply(self.sys, self.omega, x, dx, true);
            dx.iter_mut().for_each(|v| *v = -*v);
            self.solver.solve(dx);
        }
    }

    fn solve_transposed_checked(
        &mut self,
        rhs: &[Complex64],
        out: &mut [Complex64],
    ) -> Result<(), LaneFailure> {
        let n = self.sys.n;
        let (Some(y), Some(b)) = (out.get_mut(..n), rhs.get(..n)) else {
            return Err(lane0(SolveFailure::Untrustworthy {
                residual: f64::INFINITY,
            }));
        };
        y.copy_from_slice(b);
        checked(
            self.solver.as_mut(),
            self.sys,
            self.omega,
            y,
            &mut self.check,
            true,
        )
        .map_err(lane0)
    }
}

/// Why a checked solve failed.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum SolveFailure {
    /// No usable pivot in this column.
    Singular(Singular),
    /// The solution is not finite or its residual stays poor after refinement.
    Untrustworthy {
        /// Relative backward error reached.
        residual: f64,
    },
}

/// Largest acceptable normwise relative backward error `‖b − A·x‖∞ / (‖A‖∞·‖x‖∞ + ‖b‖∞)`.
pub const RESIDUAL_LIMIT: f64 = 1e-9;

/// Scratch for [`solve_checked`], reused across points.
#[derive(Clone, Debug, Default)]
pub struct CheckScratch {
    r: Vec<Complex64>,
    ax: Vec<Complex64>,
    d: Vec<Complex64>,
}

/// Solves `rhs` in place with an already factored solver, checks the scaled residual, and
/// does one step of iterative refinement when it exceeds `RESIDUAL_LIMIT / 1000`. Fails with
/// [`SolveFailure::Untrustworthy`] when the result is not finite or the residual stays above
/// [`RESIDUAL_LIMIT`]; on failure `rhs` holds no meaningful values.
pub fn solve_checked(
    solver: &mut dyn PointSolver,
    sys: &System,
    omega: f64,
    rhs: &mut [Complex64],
    scratch: &mut CheckScratch,
) -> Result<(), SolveFailure> {
    checked(solver, sys, omega, rhs, scratch, false)
}

/// As [`solve_checked`], for the transposed system `(G + jωC)ᵀ·y = rhs`.
pub fn solve_checked_transposed(
    solver: &mut dyn PointSolver,
    sys: &System,
    omega: f64,
    rhs: &mut [Complex64],
    scratch: &mut CheckScratch,
) -> Result<(), SolveFailure> {
    checked(solver, sys, omega, rhs, scratch, true)
}

fn checked(
    solver: &mut dyn PointSolver,
    sys: &System,
    omega: f64,
    rhs: &mut [Complex64],
    scratch: &mut CheckScratch,
    transposed: bool,
) -> Result<(), SolveFailure> {
    let n = sys.n;
    scratch.r.clear();
    scratch.r.extend_from_slice(rhs);
    let solve = |s: &mut dyn PointSolver, v: &mut [Complex64]| {
        if transposed {
            s.solve_transposed(v)
        } else {
            s.solve(v)
        }
    };
    solve(solver, rhs);
    let mut err = backward_error(solver, sys, omega, rhs, scratch, transposed);
    if err > RESIDUAL_LIMIT * 1e-3 {
        // One step of refinement: r = b − A·x was left in scratch.ax by backward_error.
        let mut d = std::mem::take(&mut scratch.d);
        d.clear();
        d.extend_from_slice(&scratch.ax);
        solve(solver, &mut d);
        for (x, dx) in rhs.iter_mut().zip(&d) {
            *x += dx;
        }
        scratch.d = d;
        err = backward_error(solver, sys, omega, rhs, scratch, transposed);
    }
    if err.is_nan()
        || err > RESIDUAL_LIMIT
        || rhs
            .iter()
            .take(n)
            .any(|v| !v.re.is_finite() || !v.im.is_finite())
    {
        return Err(SolveFailure::Untrustworthy { residual: err });
    }
    Ok(())
}

/// Normwise relative backward error of `x` against `b` (kept in `scratch.r`):
/// `‖b − A·x‖∞ / (‖A‖∞·‖x‖∞ + ‖b‖∞)`, entries measured as |Re| + |Im| and `‖A‖∞` from the
/// row sums of |G| and |C| kept by the system (of `Aᵀ` when `transposed`). Leaves `b − A·x`
/// in `scratch.ax`.
fn backward_error(
    solver: &mut dyn PointSolver,
    sys: &System,
    omega: f64,
    x: &[Complex64],
    scratch: &mut CheckScratch,
    transposed: bool,
) -> f64 {
    let n = sys.n;
    scratch.ax.resize(n, Complex64::new(0.0, 0.0));
    if transposed {
        solver.multiply_transposed(sys, omega, x, &mut scratch.ax);
    } else {
        solver.multiply(sys, omega, x, &mut scratch.ax, false);
    }
    let l1 = |z: Complex64| z.re.abs() + z.im.abs();
    let (mut num, mut bnorm, mut xnorm): (f64, f64, f64) = (0.0, 0.0, 0.0);
    for ((ax, b), xi) in scratch.ax.iter_mut().zip(&scratch.r).zip(x).take(n) {
        let r = *b - *ax;
        *ax = r;
        num = num.max(l1(r));
        bnorm = bnorm.max(l1(*b));
        xnorm = xnorm.max(l1(*xi));
    }
    let norm = if transposed {
        sys.norm_inf_transposed(omega)
    } else {
        sys.norm_inf(omega)
    };
    let den = norm * xnorm + bnorm;
    if num.is_nan() || den.is_nan() {
        return f64::INFINITY;
    }
    if den == 0.0 {
        return if num == 0.0 { 0.0 } else { f64::INFINITY };
    }
    num / den
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::network::NetworkBuilder;

    const ALL_PATHS: [SolverKind; 4] = [
        SolverKind::Small,
        SolverKind::Band,
        SolverKind::Dense,
        SolverKind::Sparse,
    ];

    /// The design's solution of `sys` at `omega` on `plan`'s path, residual checked.
    fn solution(plan: &SolverPlan<'_>, sys: &System, omega: f64) -> Vec<Complex64> {
        let mut s = plan.make();
        s.factor(omega).unwrap();
        let mut x = sys.b.clone();
        solve_checked(s.as_mut(), sys, omega, &mut x, &mut CheckScratch::default()).unwrap();
        x
    }

    fn ladder(sections: usize) -> System {
        System::assemble(&ladder_builder(sections).build().unwrap())
    }

    /// An R–L–C ladder of `sections` driven by a voltage source, loaded by 50 Ω.
    pub(super) fn ladder_builder(sections: usize) -> NetworkBuilder {
        let mut b = NetworkBuilder::new("ladder");
        b.voltage_source("V1", "n0", "gnd", 1.0.into()).unwrap();
        for k in 0..sections {
            let (a, m, z) = (format!("n{k}"), format!("m{k}"), format!("n{}", k + 1));
            b.resistor(&format!("R{k}"), &a, &m, 10.0 + k as f64)
                .unwrap();
            b.inductor(&format!("L{k}"), &m, &z, 1e-3 * (1.0 + 0.1 * k as f64))
                .unwrap();
            b.capacitor(&format!("C{k}"), &z, "gnd", 1e-6).unwrap();
        }
        b.resistor("RL", &format!("n{sections}"), "gnd", 50.0)
            .unwrap();
        b
    }

    /// Every path gives the same solution on every size the small kernel serves and beyond.
    #[test]
    fn all_paths_agree() {
        for sections in [1, 2, 3, 4, 5, 8, 12, 20] {
            let sys = ladder(sections);
            let mut reference: Option<Vec<Complex64>> = None;
            for kind in ALL_PATHS {
                let plan = SolverPlan::new(&sys, kind).unwrap();
                let x = solution(&plan, &sys, 2.0 * std::f64::consts::PI * 3e3);
                match &reference {
                    None => reference = Some(x),
                    Some(r) => {
                        for (a, b) in r.iter().zip(&x) {
                            assert!(
                                (a - b).norm() <= 1e-12 * (1.0 + a.norm()),
                                "{kind:?} n={}",
                                sys.n
                            );
                        }
                    }
                }
            }
        }
    }

    /// A network with exactly `n` unknowns (all node voltages), see
    /// [`crate::ladders::rc_chain`].
    fn chain(n: usize) -> System {
        System::assemble(&crate::ladders::rc_chain(n).unwrap())
    }

    /// The stack kernel against faer's dense and sparse LU on every size it serves.
    #[test]
    fn small_kernel_matches_faer_on_every_size_it_serves() {
        for n in 1..=SMALL_MAX {
            let sys = chain(n);
            assert_eq!(sys.n, n);
            assert_eq!(
                SolverPlan::new(&sys, SolverKind::Auto).unwrap().kind(),
                SolverKind::Small
            );
            let mut results = Vec::new();
            for kind in ALL_PATHS {
                let plan = SolverPlan::new(&sys, kind).unwrap();
                assert_eq!(plan.kind(), kind);
                results.push(solution(&plan, &sys, 2.0 * std::f64::consts::PI * 7.3e4));
            }
            for other in &results[1..] {
                for (a, b) in results[0].iter().zip(other) {
                    assert!(
                        (a - b).norm() <= 1e-12 * a.norm().max(1e-30),
                        "n = {n}: {a} vs {b}"
                    );
                }
            }
        }
        // Above the stack kernel a chain is banded (kl = ku = 1 in its natural order).
        let chain17 = chain(SMALL_MAX + 1);
        let plan = SolverPlan::new(&chain17, SolverKind::Auto).unwrap();
        assert_eq!(plan.kind(), SolverKind::Band);
        assert_eq!(
            SolverPlan::new(&chain17, SolverKind::Small).unwrap().kind(),
            SolverKind::Sparse
        );
    }

    /// The wide stack kernel, lane by lane, gives the very solution and derivative of the
    /// one-lane kernel, on every size it serves, for a full and a partial group of lanes.
    #[test]
    fn wide_kernel_matches_one_lane_bit_for_bit() {
        for n in 1..=SMALL_MAX {
            let sys = chain(n);
            let plan = SolverPlan::new(&sys, SolverKind::Small).unwrap();
            let mut wide = plan.make_lanes(true);
            let mut one = plan.make_lanes(false);
            assert_eq!((wide.lanes(), one.lanes()), (LANES, 1));
            for count in [LANES, 3] {
                let omegas: Vec<f64> = (0..count).map(|k| 2e3 * 2.3f64.powi(k as i32)).collect();
                let mut xs = vec![Complex64::default(); n * LANES];
                let mut dxs = xs.clone();
                wide.factor(&omegas).unwrap();
                wide.solve_checked(&sys.b, &mut xs).unwrap();
                wide.derivative(&xs, &mut dxs);
                for (l, &w) in omegas.iter().enumerate() {
                    let (mut x, mut dx) =
                        (vec![Complex64::default(); n], vec![Complex64::default(); n]);
                    one.factor(&[w]).unwrap();
                    one.solve_checked(&sys.b, &mut x).unwrap();
                    one.derivative(&x, &mut dx);
                    assert_eq!(&xs[l * n..(l + 1) * n], &x[..], "n = {n}, lane {l}");
                    assert_eq!(&dxs[l * n..(l + 1) * n], &dx[..], "n = {n}, lane {l}");
                }
            }
        }
    }

    /// A right-hand side with every entry distinct (a read-out touching every unknown).
    fn spread(n: usize) -> Vec<Complex64> {
        (0..n)
            .map(|i| Complex64::new(1.0 + 0.37 * i as f64, -0.5 + 0.11 * i as f64))
            .collect()
    }

    /// The transposed solve of every path gives `Aᵀ·y = b` with a backward error at rounding
    /// level, and the same `y` on every path, on chains of every small size and on ladders
    /// long enough for the band and sparse paths; a mutation that skipped the band's
    /// interchanges or solved `A` instead of `Aᵀ` fails here.
    #[test]
    fn transposed_solves_agree_on_every_path() {
        let systems: Vec<System> = (1..=SMALL_MAX)
            .map(chain)
            .chain([3usize, 40, 300].into_iter().map(ladder))
            .collect();
        for sys in &systems {
            let omega = 2.0 * std::f64::consts::PI * 4.1e3;
            let b = spread(sys.n);
            let mut reference: Option<Vec<Complex64>> = None;
            for kind in ALL_PATHS {
                let plan = SolverPlan::new(sys, kind).unwrap();
                let mut s = plan.make();
                s.factor(omega).unwrap();
                let mut y = b.clone();
                solve_checked_transposed(
                    s.as_mut(),
                    sys,
                    omega,
                    &mut y,
                    &mut CheckScratch::default(),
                )
                .unwrap();
                // Aᵀ·y reproduces b.
                let mut aty = vec![Complex64::default(); sys.n];
                sys.multiply_transposed(omega, &y, &mut aty);
                for (u, v) in aty.iter().zip(&b) {
                    assert!(
                        (u - v).norm() <= 1e-9 * v.norm().max(1.0),
                        "{kind:?} n = {}",
                        sys.n
                    );
                }
                match &reference {
                    None => reference = Some(y),
                    Some(r) => {
                        let scale = r.iter().map(|v| v.norm()).fold(0.0, f64::max);
                        for (u, v) in r.iter().zip(&y) {
                            assert!((u - v).norm() <= 1e-10 * scale, "{kind:?} n = {}", sys.n);
                        }
                    }
                }
            }
        }
    }

    /// The wide kernel's transposed solve gives, lane by lane, the very bits of the one-lane
    /// kernel, each lane with its own right-hand side.
    #[test]
    fn wide_transposed_solve_matches_one_lane_bit_for_bit() {
        for n in 1..=SMALL_MAX {
            let sys = chain(n);
            let plan = SolverPlan::new(&sys, SolverKind::Small).unwrap();
            let (mut wide, mut one) = (plan.make_lanes(true), plan.make_lanes(false));
            let omegas: Vec<f64> = (0..LANES).map(|k| 3e3 * 1.7f64.powi(k as i32)).collect();
            let rhs: Vec<Complex64> = (0..LANES)
                .flat_map(|l| spread(n).into_iter().map(move |v| v * (1.0 + l as f64)))
                .collect();
            let mut ys = vec![Complex64::default(); n * LANES];
            wide.factor(&omegas).unwrap();
            wide.solve_transposed_checked(&rhs, &mut ys).unwrap();
            for (l, &w) in omegas.iter().enumerate() {
                let mut y = vec![Complex64::default(); n];
                one.factor(&[w]).unwrap();
                one.solve_transposed_checked(&rhs[l * n..(l + 1) * n], &mut y)
                    .unwrap();
                assert_eq!(&ys[l * n..(l + 1) * n], &y[..], "n = {n}, lane {l}");
            }
        }
    }

    #[test]
    fn zero_pivot_names_the_column() {
        let mut b = NetworkBuilder::new("t");
        b.voltage_source("V1", "a", "gnd", 1.0.into()).unwrap();
        b.capacitor("C1", "a", "b", 1e-6).unwrap();
        let net = b.build().unwrap();
        let sys = System::assemble(&net);
        let node_b = System::node_index(net.node("b").unwrap()).unwrap();
        for kind in [SolverKind::Small, SolverKind::Band, SolverKind::Dense] {
            let plan = SolverPlan::new(&sys, kind).unwrap();
            let mut s = plan.make();
            // At DC node b floats: its column is all zero, whatever the elimination order.
            assert_eq!(s.factor(0.0), Err(Singular { column: node_b }), "{kind:?}");
        }
    }

    /// A ladder is a path of unknowns (node, branch current, node, …) however assembly
    /// numbered them: once ordered its band is one diagonal each side, and the band path
    /// agrees with faer's sparse LU over thousands of sections.
    #[test]
    fn a_ladder_orders_to_a_tridiagonal_band() {
        let sys = ladder(2000);
        let layout = BandLayout::new(&sys).unwrap();
        assert_eq!((layout.kl, layout.ku), (1, 1));
        let plan = SolverPlan::new(&sys, SolverKind::Auto).unwrap();
        assert_eq!(plan.kind(), SolverKind::Band);
        let sparse = SolverPlan::new(&sys, SolverKind::Sparse).unwrap();
        for f in [10.0, 3e3, 1e6] {
            let omega = 2.0 * std::f64::consts::PI * f;
            let xs = [solution(&plan, &sys, omega), solution(&sparse, &sys, omega)];
            let scale = xs[1].iter().map(|v| v.norm()).fold(0.0, f64::max);
            for (a, b) in xs[0].iter().zip(&xs[1]) {
                assert!((a - b).norm() <= 1e-10 * scale, "f = {f}: {a} vs {b}");
            }
        }
    }
}
