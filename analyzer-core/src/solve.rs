//! Solving `(G + jωC)·x = b` at one frequency: the only module that touches faer.
//!
//! Three paths sit behind one trait, [`PointSolver`]:
//!
//! * [`SmallLu`]: complex LU with partial pivoting on fixed-size stack arrays, for the tiny
//!   systems most filters produce (up to [`SMALL_MAX`] unknowns). faer's per-call overhead
//!   dominates below about 20 unknowns; this kernel has none.
//! * [`DenseLu`]: faer's dense LU with partial pivoting, factoring in place into a workspace
//!   that is reused point after point.
//! * [`SparseLu`]: faer's sparse LU; the symbolic analysis (COLAMD ordering, elimination tree)
//!   is done once per sweep from the union pattern of `G` and `C` and shared by all workers;
//!   each point only refactors numerically.
//!
//! faer reports no numerical singularity. Every path therefore checks its pivots: a pivot that
//! is exactly zero or not finite is reported as [`Singular`] with the column (unknown) it
//! occurred in, so the caller can name the node or part to blame. Residuals are checked by the
//! caller ([`solve_checked`]), with one step of iterative refinement when they are poor.

use crate::stamp::System;
use faer::dyn_stack::{MemBuffer, MemStack, StackReq};
use faer::linalg::lu::partial_pivoting::{factor as dfactor, solve as dsolve};
use faer::sparse::linalg::lu::{factorize_symbolic_lu, LuSymbolicParams, NumericLu, SymbolicLu};
use faer::sparse::{SparseColMatRef, SymbolicSparseColMat};
use faer::{c64, Conj, MatMut, Par};
use num_complex::Complex64;
use std::sync::Arc;

/// Largest system the stack kernel serves. Crossover measured with
/// `cargo bench -p analyzer-core --bench solve` (see DEVELOPERS.md): the stack kernel is
/// faster than faer's dense LU up to at least 16 unknowns on this machine.
pub const SMALL_MAX: usize = 16;

/// Largest system the dense faer path serves under [`SolverKind::Auto`]; above it the sparse
/// path is used. Networks are sparse (a few entries per row), so sparse LU wins early.
pub const DENSE_MAX: usize = 48;

/// Which solver path to use.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum SolverKind {
    /// Chosen by size: small kernel, dense faer, sparse faer.
    #[default]
    Auto,
    /// The stack kernel (only up to [`SMALL_MAX`] unknowns).
    Small,
    /// faer dense LU.
    Dense,
    /// faer sparse LU with symbolic reuse.
    Sparse,
}

impl SolverKind {
    /// The path Auto resolves to for `n` unknowns.
    pub fn resolve(self, n: usize) -> SolverKind {
        match self {
            SolverKind::Auto if n <= SMALL_MAX => SolverKind::Small,
            SolverKind::Auto if n <= DENSE_MAX => SolverKind::Dense,
            SolverKind::Auto => SolverKind::Sparse,
            SolverKind::Small if n > SMALL_MAX => SolverKind::Dense,
            k => k,
        }
    }
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
}

/// Shared, once-per-sweep data that a solver path needs (the sparse symbolic analysis).
#[derive(Clone)]
pub struct SolverPlan<'a> {
    sys: &'a System,
    kind: SolverKind,
    sparse: Option<Arc<SparseShared>>,
}

struct SparseShared {
    pattern: SymbolicSparseColMat<usize>,
    symbolic: SymbolicLu<usize>,
}

impl<'a> SolverPlan<'a> {
    /// Prepares the chosen path for `sys`; the sparse path does its symbolic analysis here.
    /// Fails with [`Singular`] if the pattern is structurally singular.
    pub fn new(sys: &'a System, kind: SolverKind) -> Result<Self, Singular> {
        let kind = kind.resolve(sys.n);
        let sparse = if kind == SolverKind::Sparse {
            Some(Arc::new(SparseShared::new(sys)?))
        } else {
            None
        };
        Ok(SolverPlan { sys, kind, sparse })
    }

    /// The path in use.
    pub fn kind(&self) -> SolverKind {
        self.kind
    }

    /// A fresh solver with its own workspace (one per worker thread).
    pub fn make(&self) -> Box<dyn PointSolver + 'a> {
        let sys = self.sys;
        match (self.kind, &self.sparse) {
            (SolverKind::Sparse, Some(shared)) => Box::new(SparseLu::new(sys, shared.clone())),
            (SolverKind::Small, _) => make_small(sys),
            _ => Box::new(DenseLu::new(sys)),
        }
    }
}

macro_rules! small_dispatch {
    ($sys:expr, $($n:literal)*) => {
        match $sys.n {
            $($n => Box::new(SmallLu::<$n>::new($sys)),)*
            _ => Box::new(DenseLu::new($sys)),
        }
    };
}

fn make_small<'a>(sys: &'a System) -> Box<dyn PointSolver + 'a> {
    small_dispatch!(sys, 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16)
}

/// Complex LU with partial pivoting on an N×N stack array (row-major).
pub struct SmallLu<'a, const N: usize> {
    sys: &'a System,
    a: [[Complex64; N]; N],
    perm: [usize; N],
}

impl<'a, const N: usize> SmallLu<'a, N> {
    /// A solver for `sys`, which must have exactly N unknowns.
    pub fn new(sys: &'a System) -> Self {
        SmallLu {
            sys,
            a: [[Complex64::new(0.0, 0.0); N]; N],
            perm: [0; N],
        }
    }
}

#[inline(always)]
fn norm1(z: Complex64) -> f64 {
    z.re.abs() + z.im.abs()
}

impl<const N: usize> PointSolver for SmallLu<'_, N> {
    fn factor(&mut self, omega: f64) -> Result<(), Singular> {
        let a = &mut self.a;
        *a = [[Complex64::new(0.0, 0.0); N]; N];
        for (k, &(r, c)) in self.sys.pattern.iter().enumerate() {
            if r < N && c < N {
                a[r][c] = Complex64::new(self.sys.g[k], omega * self.sys.c[k]);
            }
        }
        for (i, p) in self.perm.iter_mut().enumerate() {
            *p = i;
        }
        for k in 0..N {
            let mut p = k;
            let mut best = norm1(a[k][k]);
            for (i, row) in a.iter().enumerate().skip(k + 1) {
                let m = norm1(row[k]);
                if m > best {
                    best = m;
                    p = i;
                }
            }
            if best == 0.0 || !best.is_finite() {
                return Err(Singular { column: k });
            }
            if p != k {
                a.swap(p, k);
                self.perm.swap(p, k);
            }
            let pivot = a[k][k];
            let inv = pivot.conj() / pivot.norm_sqr();
            let (top, bottom) = a.split_at_mut(k + 1);
            let rowk = &top[k];
            for row in bottom.iter_mut() {
                let l = row[k] * inv;
                row[k] = l;
                if l != Complex64::new(0.0, 0.0) {
                    for j in k + 1..N {
                        row[j] -= l * rowk[j];
                    }
                }
            }
        }
        Ok(())
    }

    fn solve(&mut self, rhs: &mut [Complex64]) {
        if rhs.len() != N {
            return;
        }
        let mut y = [Complex64::new(0.0, 0.0); N];
        for i in 0..N {
            y[i] = rhs[self.perm[i]];
        }
        let a = &self.a;
        for i in 1..N {
            let mut s = y[i];
            for j in 0..i {
                s -= a[i][j] * y[j];
            }
            y[i] = s;
        }
        for i in (0..N).rev() {
            let mut s = y[i];
            for j in i + 1..N {
                s -= a[i][j] * y[j];
            }
            let d = a[i][i];
            y[i] = s * (d.conj() / d.norm_sqr());
        }
        rhs.copy_from_slice(&y);
    }
}

/// faer's dense LU with partial pivoting into a reused workspace.
pub struct DenseLu<'a> {
    sys: &'a System,
    a: Vec<c64>,
    perm: Vec<usize>,
    perm_inv: Vec<usize>,
    mem: MemBuffer,
}

impl<'a> DenseLu<'a> {
    /// A solver for `sys` with its own workspace.
    pub fn new(sys: &'a System) -> Self {
        let n = sys.n;
        let req = StackReq::any_of(&[
            dfactor::lu_in_place_scratch::<usize, c64>(n, n, Par::Seq, Default::default()),
            dsolve::solve_in_place_scratch::<usize, c64>(n, 1, Par::Seq),
        ]);
        DenseLu {
            sys,
            a: vec![c64::new(0.0, 0.0); n * n],
            perm: vec![0; n],
            perm_inv: vec![0; n],
            mem: MemBuffer::new(req),
        }
    }
}

impl PointSolver for DenseLu<'_> {
    fn factor(&mut self, omega: f64) -> Result<(), Singular> {
        let n = self.sys.n;
        self.sys.fill_dense(omega, &mut self.a);
        let mat = MatMut::from_column_major_slice_mut(&mut self.a, n, n);
        let stack = MemStack::new(&mut self.mem);
        dfactor::lu_in_place(
            mat,
            &mut self.perm,
            &mut self.perm_inv,
            Par::Seq,
            stack,
            Default::default(),
        );
        for k in 0..n {
            let d = self.a[k * n + k];
            if norm1(d) == 0.0 || !d.re.is_finite() || !d.im.is_finite() {
                return Err(Singular { column: k });
            }
        }
        Ok(())
    }

    fn solve(&mut self, rhs: &mut [Complex64]) {
        let n = self.sys.n;
        if rhs.len() != n {
            return;
        }
        let lu = faer::MatRef::from_column_major_slice(&self.a, n, n);
        // Safety of the permutation is faer's: perm/perm_inv were written by lu_in_place.
        let perm = faer::perm::PermRef::new_checked(&self.perm, &self.perm_inv, n);
        let stack = MemStack::new(&mut self.mem);
        let b = MatMut::from_column_major_slice_mut(rhs, n, 1);
        dsolve::solve_in_place_with_conj(lu, lu, perm, Conj::No, b, Par::Seq, stack);
    }
}

impl SparseShared {
    fn new(sys: &System) -> Result<Self, Singular> {
        let pairs: Vec<faer::sparse::Pair<usize, usize>> = sys
            .pattern
            .iter()
            .map(|&(r, c)| faer::sparse::Pair { row: r, col: c })
            .collect();
        let (pattern, _argsort) = SymbolicSparseColMat::try_new_from_indices(sys.n, sys.n, &pairs)
            .map_err(|_| Singular { column: 0 })?;
        let symbolic = factorize_symbolic_lu(pattern.as_ref(), LuSymbolicParams::default())
            .map_err(|_| Singular { column: 0 })?;
        Ok(SparseShared { pattern, symbolic })
    }
}

/// faer's sparse LU: shared symbolic analysis, numeric factorisation per point.
pub struct SparseLu<'a> {
    sys: &'a System,
    shared: Arc<SparseShared>,
    values: Vec<c64>,
    numeric: NumericLu<usize, c64>,
    mem: MemBuffer,
    ok: bool,
}

impl<'a> SparseLu<'a> {
    fn new(sys: &'a System, shared: Arc<SparseShared>) -> Self {
        let req = StackReq::any_of(&[
            shared
                .symbolic
                .factorize_numeric_lu_scratch::<c64>(Par::Seq, Default::default()),
            shared.symbolic.solve_in_place_scratch::<c64>(1, Par::Seq),
        ]);
        SparseLu {
            sys,
            values: vec![c64::new(0.0, 0.0); sys.pattern.len()],
            shared,
            numeric: NumericLu::new(),
            mem: MemBuffer::new(req),
            ok: false,
        }
    }
}

impl PointSolver for SparseLu<'_> {
    fn factor(&mut self, omega: f64) -> Result<(), Singular> {
        // The pattern was built from sys.pattern, which is already sorted by column then row
        // without duplicates, so values line up entry by entry.
        for (k, v) in self.values.iter_mut().enumerate() {
            *v = c64::new(self.sys.g[k], omega * self.sys.c[k]);
        }
        let a = SparseColMatRef::new(self.shared.pattern.as_ref(), &self.values);
        let stack = MemStack::new(&mut self.mem);
        self.ok = false;
        self.shared
            .symbolic
            .factorize_numeric_lu(&mut self.numeric, a, Par::Seq, stack, Default::default())
            .map_err(|e| match e {
                faer::sparse::linalg::LuError::SymbolicSingular { index } => {
                    Singular { column: index }
                }
                _ => Singular { column: 0 },
            })?;
        self.ok = true;
        Ok(())
    }

    fn solve(&mut self, rhs: &mut [Complex64]) {
        let n = self.sys.n;
        if !self.ok || rhs.len() != n {
            return;
        }
        let stack = MemStack::new(&mut self.mem);
        // `ok` guarantees `numeric` came from factorize_numeric_lu with this symbolic.
        let lu =
            faer::sparse::linalg::lu::LuRef::new_unchecked(&self.shared.symbolic, &self.numeric);
        let b = MatMut::from_column_major_slice_mut(rhs, n, 1);
        lu.solve_in_place_with_conj(Conj::No, b, Par::Seq, stack);
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

/// Largest acceptable relative backward error `‖b − A·x‖∞ / (‖|A|·|x|‖∞ + ‖b‖∞)` (entries
/// measured as |Re| + |Im|).
pub const RESIDUAL_LIMIT: f64 = 1e-9;

/// Scratch for [`solve_checked`], reused across points.
#[derive(Clone, Debug, Default)]
pub struct CheckScratch {
    r: Vec<Complex64>,
    ax: Vec<Complex64>,
    abs: Vec<f64>,
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
    let n = sys.n;
    scratch.r.clear();
    scratch.r.extend_from_slice(rhs);
    solver.solve(rhs);
    let mut err = backward_error(sys, omega, rhs, scratch);
    if err > RESIDUAL_LIMIT * 1e-3 {
        // One step of refinement: r = b − A·x was left in scratch.ax by backward_error.
        let mut d = scratch.ax.clone();
        solver.solve(&mut d);
        for (x, dx) in rhs.iter_mut().zip(&d) {
            *x += dx;
        }
        err = backward_error(sys, omega, rhs, scratch);
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

/// Relative backward error of `x` against `b` (kept in `scratch.r`), in the 1-norm of each
/// complex entry; leaves the residual vector `b − A·x` in `scratch.ax`.
fn backward_error(sys: &System, omega: f64, x: &[Complex64], scratch: &mut CheckScratch) -> f64 {
    let n = sys.n;
    scratch.ax.resize(n, Complex64::new(0.0, 0.0));
    scratch.abs.resize(n, 0.0);
    sys.multiply_with_bound(omega, x, &mut scratch.ax, &mut scratch.abs);
    let l1 = |z: Complex64| z.re.abs() + z.im.abs();
    let mut num: f64 = 0.0;
    let mut den: f64 = 0.0;
    for i in 0..n {
        let r = scratch.r[i] - scratch.ax[i];
        scratch.ax[i] = r;
        num = num.max(l1(r));
        den = den.max(scratch.abs[i] + l1(scratch.r[i]));
    }
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

    fn ladder(sections: usize) -> System {
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
        System::assemble(&b.build().unwrap())
    }

    /// Every path gives the same solution on every size the small kernel serves and beyond.
    #[test]
    fn all_paths_agree() {
        for sections in [1, 2, 3, 4, 5, 8, 12, 20] {
            let sys = ladder(sections);
            let mut reference: Option<Vec<Complex64>> = None;
            for kind in [SolverKind::Small, SolverKind::Dense, SolverKind::Sparse] {
                let plan = SolverPlan::new(&sys, kind).unwrap();
                let mut s = plan.make();
                let omega = 2.0 * std::f64::consts::PI * 3e3;
                s.factor(omega).unwrap();
                let mut x = sys.b.clone();
                let mut scratch = CheckScratch::default();
                solve_checked(s.as_mut(), &sys, omega, &mut x, &mut scratch).unwrap();
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

    #[test]
    fn zero_pivot_names_the_column() {
        let mut b = NetworkBuilder::new("t");
        b.voltage_source("V1", "a", "gnd", 1.0.into()).unwrap();
        b.capacitor("C1", "a", "b", 1e-6).unwrap();
        let net = b.build().unwrap();
        let sys = System::assemble(&net);
        for kind in [SolverKind::Small, SolverKind::Dense] {
            let plan = SolverPlan::new(&sys, kind).unwrap();
            let mut s = plan.make();
            // At DC node b floats: its column is all zero.
            assert!(s.factor(0.0).is_err());
        }
    }
}
