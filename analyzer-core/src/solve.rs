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

/// Largest system the stack kernel serves. Measured with
/// `cargo bench -p analyzer-core --bench solve` on the 2-core CI machine, factor + solve per
/// point: 9 unknowns 0.50 µs (sparse 1.04, dense 1.37), 13 unknowns 1.28 µs (sparse 1.64),
/// 15 unknowns 1.44 µs (sparse 2.12); at 17 the sparse path takes 1.68 µs and dense 3.15.
///
/// Above it [`SolverKind::Auto`] goes straight to the sparse path: network matrices are
/// sparse (a few entries per row), and faer's sparse LU beat its dense LU at 17 unknowns
/// (1.68 µs vs 3.15 µs per factor + solve) and at 33 (3.9 µs vs 12.9 µs). The dense path
/// stays available as an override.
pub const SMALL_MAX: usize = 16;

/// Which solver path to use.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum SolverKind {
    /// Chosen by size: small kernel, dense faer, sparse faer.
    #[default]
    Auto,
    /// The stack kernel (only up to [`SMALL_MAX`] unknowns; above, the sparse path).
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
            // The stack kernel has no instance above SMALL_MAX; sparse is the faster fallback.
            SolverKind::Auto | SolverKind::Small if n > SMALL_MAX => SolverKind::Sparse,
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

/// Complex LU with partial pivoting on N×N stack arrays, real and imaginary parts kept in
/// separate row-major arrays so the elimination's inner loop runs on plain `f64` lanes and
/// vectorises. `G` and `C` are laid out densely once, so forming `G + jωC` is a copy and a
/// scaled copy.
pub struct SmallLu<const N: usize> {
    g: [[f64; N]; N],
    c: [[f64; N]; N],
    re: [[f64; N]; N],
    im: [[f64; N]; N],
    inv_re: [f64; N],
    inv_im: [f64; N],
    perm: [usize; N],
}

impl<const N: usize> SmallLu<N> {
    /// A solver for `sys`, which must have exactly N unknowns (other entries are ignored).
    pub fn new(sys: &System) -> Self {
        let mut g = [[0.0; N]; N];
        let mut c = [[0.0; N]; N];
        for (k, &(r, col)) in sys.pattern.iter().enumerate() {
            if r < N && col < N {
                g[r][col] = sys.g[k];
                c[r][col] = sys.c[k];
            }
        }
        SmallLu {
            g,
            c,
            re: [[0.0; N]; N],
            im: [[0.0; N]; N],
            inv_re: [0.0; N],
            inv_im: [0.0; N],
            perm: [0; N],
        }
    }
}

#[inline(always)]
fn norm1(z: Complex64) -> f64 {
    z.re.abs() + z.im.abs()
}

impl<const N: usize> PointSolver for SmallLu<N> {
    fn factor(&mut self, omega: f64) -> Result<(), Singular> {
        let (re, im) = (&mut self.re, &mut self.im);
        *re = self.g;
        for (row, crow) in im.iter_mut().zip(&self.c) {
            for (v, c) in row.iter_mut().zip(crow) {
                *v = omega * c;
            }
        }
        for (i, p) in self.perm.iter_mut().enumerate() {
            *p = i;
        }
        for k in 0..N {
            let mut p = k;
            let mut best = re[k][k].abs() + im[k][k].abs();
            for i in k + 1..N {
                let m = re[i][k].abs() + im[i][k].abs();
                if m > best {
                    best = m;
                    p = i;
                }
            }
            if best == 0.0 || !best.is_finite() {
                return Err(Singular { column: k });
            }
            if p != k {
                re.swap(p, k);
                im.swap(p, k);
                self.perm.swap(p, k);
            }
            let (pr, pi) = (re[k][k], im[k][k]);
            let d = 1.0 / (pr * pr + pi * pi);
            let (ir, ii) = (pr * d, -pi * d);
            self.inv_re[k] = ir;
            self.inv_im[k] = ii;
            let (re_top, re_bottom) = re.split_at_mut(k + 1);
            let (im_top, im_bottom) = im.split_at_mut(k + 1);
            let (kr, ki) = (&re_top[k], &im_top[k]);
            for (rr, ri) in re_bottom.iter_mut().zip(im_bottom.iter_mut()) {
                let (ar, ai) = (rr[k], ri[k]);
                let (lr, li) = (ar * ir - ai * ii, ar * ii + ai * ir);
                rr[k] = lr;
                ri[k] = li;
                if lr == 0.0 && li == 0.0 {
                    continue;
                }
                for j in k + 1..N {
                    rr[j] -= lr * kr[j] - li * ki[j];
                    ri[j] -= lr * ki[j] + li * kr[j];
                }
            }
        }
        Ok(())
    }

    fn solve(&mut self, rhs: &mut [Complex64]) {
        if rhs.len() != N {
            return;
        }
        let (re, im) = (&self.re, &self.im);
        let mut yr = [0.0; N];
        let mut yi = [0.0; N];
        for i in 0..N {
            let v = rhs[self.perm[i]];
            yr[i] = v.re;
            yi[i] = v.im;
        }
        for i in 1..N {
            let (mut sr, mut si) = (yr[i], yi[i]);
            for j in 0..i {
                sr -= re[i][j] * yr[j] - im[i][j] * yi[j];
                si -= re[i][j] * yi[j] + im[i][j] * yr[j];
            }
            yr[i] = sr;
            yi[i] = si;
        }
        for i in (0..N).rev() {
            let (mut sr, mut si) = (yr[i], yi[i]);
            for j in i + 1..N {
                sr -= re[i][j] * yr[j] - im[i][j] * yi[j];
                si -= re[i][j] * yi[j] + im[i][j] * yr[j];
            }
            let (dr, di) = (self.inv_re[i], self.inv_im[i]);
            yr[i] = sr * dr - si * di;
            yi[i] = sr * di + si * dr;
        }
        for (v, (r, i)) in rhs.iter_mut().zip(yr.iter().zip(&yi)) {
            *v = Complex64::new(*r, *i);
        }
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

/// Largest acceptable normwise relative backward error `‖b − A·x‖∞ / (‖A‖∞·‖x‖∞ + ‖b‖∞)`.
pub const RESIDUAL_LIMIT: f64 = 1e-9;

/// Scratch for [`solve_checked`], reused across points.
#[derive(Clone, Debug, Default)]
pub struct CheckScratch {
    r: Vec<Complex64>,
    ax: Vec<Complex64>,
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

/// Normwise relative backward error of `x` against `b` (kept in `scratch.r`):
/// `‖b − A·x‖∞ / (‖A‖∞·‖x‖∞ + ‖b‖∞)`, entries measured as |Re| + |Im| and `‖A‖∞` from the
/// row sums of |G| and |C| kept by the system. Leaves `b − A·x` in `scratch.ax`.
fn backward_error(sys: &System, omega: f64, x: &[Complex64], scratch: &mut CheckScratch) -> f64 {
    let n = sys.n;
    scratch.ax.resize(n, Complex64::new(0.0, 0.0));
    sys.multiply(omega, x, &mut scratch.ax, false);
    let l1 = |z: Complex64| z.re.abs() + z.im.abs();
    let (mut num, mut bnorm, mut xnorm): (f64, f64, f64) = (0.0, 0.0, 0.0);
    for ((ax, b), xi) in scratch.ax.iter_mut().zip(&scratch.r).zip(x).take(n) {
        let r = *b - *ax;
        *ax = r;
        num = num.max(l1(r));
        bnorm = bnorm.max(l1(*b));
        xnorm = xnorm.max(l1(*xi));
    }
    let den = sys.norm_inf(omega) * xnorm + bnorm;
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

    /// A network with exactly `n` unknowns (all node voltages): a current source into node
    /// 1, a chain of resistors and capacitors, and a capacitor and resistor to ground at
    /// every node, with values that vary so pivoting has work to do.
    fn chain(n: usize) -> System {
        let mut b = NetworkBuilder::new("chain");
        b.current_source("I1", "gnd", "n1", Complex64::new(1e-3, 2e-4))
            .unwrap();
        for k in 1..=n {
            let node = format!("n{k}");
            b.resistor(&format!("Rg{k}"), &node, "gnd", 100.0 * (1.0 + k as f64))
                .unwrap();
            b.capacitor(
                &format!("Cg{k}"),
                &node,
                "gnd",
                1e-9 * (1.0 + (k % 3) as f64),
            )
            .unwrap();
            if k > 1 {
                let prev = format!("n{}", k - 1);
                b.resistor(&format!("R{k}"), &prev, &node, 50.0 * k as f64)
                    .unwrap();
                b.capacitor(&format!("C{k}"), &prev, &node, 2e-9 / k as f64)
                    .unwrap();
            }
        }
        System::assemble(&b.build().unwrap())
    }

    /// The stack kernel against faer's dense and sparse LU on every size it serves.
    #[test]
    fn small_kernel_matches_faer_on_every_size_it_serves() {
        for n in 1..=SMALL_MAX {
            let sys = chain(n);
            assert_eq!(sys.n, n);
            assert_eq!(SolverKind::Auto.resolve(n), SolverKind::Small);
            let mut results = Vec::new();
            for kind in [SolverKind::Small, SolverKind::Dense, SolverKind::Sparse] {
                let plan = SolverPlan::new(&sys, kind).unwrap();
                assert_eq!(plan.kind(), kind);
                let mut s = plan.make();
                let omega = 2.0 * std::f64::consts::PI * 7.3e4;
                s.factor(omega).unwrap();
                let mut x = sys.b.clone();
                solve_checked(
                    s.as_mut(),
                    &sys,
                    omega,
                    &mut x,
                    &mut CheckScratch::default(),
                )
                .unwrap();
                results.push(x);
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
        assert_eq!(SolverKind::Auto.resolve(SMALL_MAX + 1), SolverKind::Sparse);
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
