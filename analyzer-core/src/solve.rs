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
use multiversion::multiversion;
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

    /// A fresh [`LaneSolver`] with its own workspace: on the stack-kernel path [`LANES`]
    /// frequencies per pass when `wide`, else one; faer's paths take one frequency per pass.
    pub fn make_lanes(&self, wide: bool) -> Box<dyn LaneSolver + 'a> {
        let sys = self.sys;
        match self.kind {
            SolverKind::Small => make_small_lanes(sys, wide),
            _ => Box::new(OneLane::new(sys, self.make())),
        }
    }
}

macro_rules! small_dispatch {
    ($sys:expr, $lanes:literal, $fallback:expr, $($n:literal)*) => {
        match $sys.n {
            $($n => Box::new(LaneLu::<$n, $lanes>::new($sys)),)*
            _ => $fallback,
        }
    };
}

fn make_small<'a>(sys: &'a System) -> Box<dyn PointSolver + 'a> {
    small_dispatch!(sys, 1, Box::new(DenseLu::new(sys)), 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16)
}

fn make_small_lanes<'a>(sys: &'a System, wide: bool) -> Box<dyn LaneSolver + 'a> {
    let one = || Box::new(OneLane::new(sys, Box::new(DenseLu::new(sys))));
    if wide {
        small_dispatch!(sys, 8, one(), 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16)
    } else {
        small_dispatch!(sys, 1, one(), 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16)
    }
}

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
            self.sys.multiply(self.omega, x, dx, true);
            dx.iter_mut().for_each(|v| *v = -*v);
            self.solver.solve(dx);
        }
    }
}

/// The one-frequency stack kernel: [`LaneLu`] with a single lane.
pub type SmallLu<const N: usize> = LaneLu<N, 1>;

/// A complex vector of N entries in L lanes, real and imaginary parts apart.
#[derive(Clone, Copy)]
struct LaneVec<const N: usize, const L: usize> {
    re: [[f64; L]; N],
    im: [[f64; L]; N],
}

impl<const N: usize, const L: usize> LaneVec<N, L> {
    const ZERO: Self = LaneVec {
        re: [[0.0; L]; N],
        im: [[0.0; L]; N],
    };

    /// Lane-major complex slice (lane l at `l·N ..`) into lanes; missing lanes repeat lane 0.
    #[inline(always)]
    fn load(src: &[Complex64], lanes: usize) -> Self {
        let mut v = Self::ZERO;
        for l in 0..L {
            let from = if l < lanes { l } else { 0 };
            for i in 0..N {
                let z = src.get(from * N + i).copied().unwrap_or_default();
                v.re[i][l] = z.re;
                v.im[i][l] = z.im;
            }
        }
        v
    }

    /// The same vector in every lane.
    #[inline(always)]
    fn broadcast(src: &[Complex64]) -> Self {
        let mut v = Self::ZERO;
        for (i, z) in src.iter().take(N).enumerate() {
            v.re[i] = [z.re; L];
            v.im[i] = [z.im; L];
        }
        v
    }

    /// The first `lanes` lanes into a lane-major complex slice.
    #[inline(always)]
    fn store(&self, dst: &mut [Complex64], lanes: usize) {
        for (l, out) in dst.chunks_exact_mut(N).take(lanes.min(L)).enumerate() {
            for (i, z) in out.iter_mut().enumerate() {
                *z = Complex64::new(self.re[i][l], self.im[i][l]);
            }
        }
    }

    /// max over entries of |Re| + |Im|, per lane (NaN entries ignored, as `f64::max` does).
    #[allow(clippy::needless_range_loop)]
    #[inline(always)]
    fn norm(&self) -> [f64; L] {
        let mut m = [0.0f64; L];
        for i in 0..N {
            for l in 0..L {
                m[l] = m[l].max(self.re[i][l].abs() + self.im[i][l].abs());
            }
        }
        m
    }
}

/// Complex LU with partial pivoting on N×N stack arrays, for L frequencies at once.
///
/// Every entry holds L lanes (one per frequency) with real and imaginary parts in separate
/// arrays, so each step of the elimination is the same plain `f64` arithmetic on L
/// neighbouring numbers and vectorises without intrinsics. Pivoting is per lane: each lane
/// picks its own pivot row and swaps its own entries. Lanes never mix, and each lane performs
/// exactly the operations of the one-lane kernel in the same order (Rust never fuses a
/// multiply and an add), so a frequency's result does not depend on which lane, or which
/// batch, it was solved in. One difference stays: a row whose multiplier is zero in one
/// lane but not in all is updated with that zero, which can only turn a −0 into +0.
///
/// `G` and `C` are laid out densely once; forming `G + jωC` is a copy and a scaled copy. The
/// residual check runs over the sparse pattern in the system's order, matching
/// [`solve_checked`] bit for bit.
pub struct LaneLu<const N: usize, const L: usize> {
    g: [[f64; N]; N],
    c: [[f64; N]; N],
    /// (row, column, g, c) of every stored entry, in the system's order.
    entries: Vec<(usize, usize, f64, f64)>,
    /// `‖G + jωC‖∞` bound per lane for the last factorisation.
    norm: [f64; L],
    omega: [f64; L],
    /// Lanes in use since the last factorisation.
    active: usize,
    re: [[[f64; L]; N]; N],
    im: [[[f64; L]; N]; N],
    inv_re: [[f64; L]; N],
    inv_im: [[f64; L]; N],
    perm: [[usize; N]; L],
    sys_norm: Vec<(f64, f64)>,
}

impl<const N: usize, const L: usize> LaneLu<N, L> {
    /// A solver for `sys`, which must have exactly N unknowns (other entries are ignored).
    pub fn new(sys: &System) -> Self {
        let mut g = [[0.0; N]; N];
        let mut c = [[0.0; N]; N];
        let mut entries = Vec::with_capacity(sys.pattern.len());
        for (k, &(r, col)) in sys.pattern.iter().enumerate() {
            if r < N && col < N {
                g[r][col] = sys.g[k];
                c[r][col] = sys.c[k];
                entries.push((r, col, sys.g[k], sys.c[k]));
            }
        }
        LaneLu {
            g,
            c,
            entries,
            norm: [0.0; L],
            omega: [0.0; L],
            active: 0,
            re: [[[0.0; L]; N]; N],
            im: [[[0.0; L]; N]; N],
            inv_re: [[0.0; L]; N],
            inv_im: [[0.0; L]; N],
            perm: [[0; N]; L],
            sys_norm: sys.row_abs().to_vec(),
        }
    }

    /// Factors at `omegas` (lanes past its length repeat its first value). On failure, the
    /// lowest failing lane and the column where its pivot vanished.
    #[inline(always)]
    fn factor_lanes(&mut self, omegas: &[f64]) -> Result<(), (usize, Singular)> {
        let first = omegas.first().copied().unwrap_or(0.0);
        for (l, w) in self.omega.iter_mut().enumerate() {
            *w = omegas.get(l).copied().unwrap_or(first);
        }
        self.active = omegas.len().clamp(1, L);
        for (l, norm) in self.norm.iter_mut().enumerate() {
            let w = self.omega[l].abs();
            *norm = self
                .sys_norm
                .iter()
                .map(|&(g, c)| g + w * c)
                .fold(0.0, f64::max);
        }
        let omega = self.omega;
        let (re, im) = (&mut self.re, &mut self.im);
        for i in 0..N {
            for j in 0..N {
                re[i][j] = [self.g[i][j]; L];
                for l in 0..L {
                    im[i][j][l] = omega[l] * self.c[i][j];
                }
            }
        }
        for p in self.perm.iter_mut() {
            for (i, v) in p.iter_mut().enumerate() {
                *v = i;
            }
        }
        let mut failed: [Option<usize>; L] = [None; L];
        for k in 0..N {
            let mut best = [0.0f64; L];
            let mut piv = [k; L];
            for l in 0..L {
                best[l] = re[k][k][l].abs() + im[k][k][l].abs();
            }
            for i in k + 1..N {
                for l in 0..L {
                    let m = re[i][k][l].abs() + im[i][k][l].abs();
                    if m > best[l] {
                        best[l] = m;
                        piv[l] = i;
                    }
                }
            }
            for l in 0..L {
                if (best[l] == 0.0 || !best[l].is_finite()) && failed[l].is_none() {
                    failed[l] = Some(k);
                }
            }
            if piv.iter().all(|&p| p == piv[0]) {
                // Every lane pivots on the same row (the usual case): swap whole rows.
                let p = piv[0];
                if p != k {
                    re.swap(p, k);
                    im.swap(p, k);
                    for perm in self.perm.iter_mut() {
                        perm.swap(p, k);
                    }
                }
            } else {
                for (l, &p) in piv.iter().enumerate() {
                    if p != k {
                        for j in 0..N {
                            let t = re[k][j][l];
                            re[k][j][l] = re[p][j][l];
                            re[p][j][l] = t;
                            let t = im[k][j][l];
                            im[k][j][l] = im[p][j][l];
                            im[p][j][l] = t;
                        }
                        self.perm[l].swap(p, k);
                    }
                }
            }
            if failed.iter().take(self.active).all(Option::is_some) {
                break;
            }
            let (mut ir, mut ii) = ([0.0; L], [0.0; L]);
            for l in 0..L {
                let (pr, pi) = (re[k][k][l], im[k][k][l]);
                let d = 1.0 / (pr * pr + pi * pi);
                ir[l] = pr * d;
                ii[l] = -pi * d;
            }
            self.inv_re[k] = ir;
            self.inv_im[k] = ii;
            let (re_top, re_rest) = re.split_at_mut(k + 1);
            let (im_top, im_rest) = im.split_at_mut(k + 1);
            let (kr, ki) = (&re_top[k], &im_top[k]);
            // Network matrices are sparse: only the pivot row's nonzero columns (in any lane)
            // change the rows below. A column that is zero in every lane would subtract an
            // exact zero (an update in some lanes and not others can only flip a zero's sign).
            let mut cols = [0usize; N];
            let mut ncols = 0;
            for j in k + 1..N {
                if kr[j].iter().chain(&ki[j]).any(|&v| v != 0.0) {
                    cols[ncols] = j;
                    ncols += 1;
                }
            }
            let cols = &cols[..ncols];
            for (rr, ri) in re_rest.iter_mut().zip(im_rest.iter_mut()) {
                let (mut lr, mut li) = ([0.0; L], [0.0; L]);
                let mut any = false;
                for l in 0..L {
                    let (ar, ai) = (rr[k][l], ri[k][l]);
                    lr[l] = ar * ir[l] - ai * ii[l];
                    li[l] = ar * ii[l] + ai * ir[l];
                    any |= lr[l] != 0.0 || li[l] != 0.0;
                }
                rr[k] = lr;
                ri[k] = li;
                if !any {
                    continue;
                }
                for &j in cols {
                    let (xr, xi) = (&mut rr[j], &mut ri[j]);
                    let (pr, pi) = (&kr[j], &ki[j]);
                    for l in 0..L {
                        xr[l] -= lr[l] * pr[l] - li[l] * pi[l];
                        xi[l] -= lr[l] * pi[l] + li[l] * pr[l];
                    }
                }
            }
        }
        match failed
            .iter()
            .take(self.active)
            .enumerate()
            .find_map(|(l, f)| f.map(|column| (l, Singular { column })))
        {
            Some(e) => Err(e),
            None => Ok(()),
        }
    }

    /// Solves in place, every lane with its own factorisation; `v` is in natural order.
    #[inline(always)]
    fn solve_lanes(&self, v: &mut LaneVec<N, L>) {
        let (re, im) = (&self.re, &self.im);
        let mut y = LaneVec::<N, L>::ZERO;
        for (l, perm) in self.perm.iter().enumerate() {
            for (i, &p) in perm.iter().enumerate() {
                y.re[i][l] = v.re[p][l];
                y.im[i][l] = v.im[p][l];
            }
        }
        for i in 1..N {
            let (mut sr, mut si) = (y.re[i], y.im[i]);
            for j in 0..i {
                for l in 0..L {
                    sr[l] -= re[i][j][l] * y.re[j][l] - im[i][j][l] * y.im[j][l];
                    si[l] -= re[i][j][l] * y.im[j][l] + im[i][j][l] * y.re[j][l];
                }
            }
            y.re[i] = sr;
            y.im[i] = si;
        }
        for i in (0..N).rev() {
            let (mut sr, mut si) = (y.re[i], y.im[i]);
            for j in i + 1..N {
                for l in 0..L {
                    sr[l] -= re[i][j][l] * y.re[j][l] - im[i][j][l] * y.im[j][l];
                    si[l] -= re[i][j][l] * y.im[j][l] + im[i][j][l] * y.re[j][l];
                }
            }
            let (dr, di) = (self.inv_re[i], self.inv_im[i]);
            for l in 0..L {
                y.re[i][l] = sr[l] * dr[l] - si[l] * di[l];
                y.im[i][l] = sr[l] * di[l] + si[l] * dr[l];
            }
        }
        *v = y;
    }

    /// `(G + jωC)·x` per lane (or `C·x` times j when `derivative_only`), summed over the
    /// pattern in the system's order as [`System::multiply`] does.
    #[inline(always)]
    fn multiply(&self, x: &LaneVec<N, L>, derivative_only: bool) -> LaneVec<N, L> {
        let mut y = LaneVec::<N, L>::ZERO;
        for &(r, c, g, cv) in &self.entries {
            if r >= N || c >= N {
                continue;
            }
            for l in 0..L {
                let (ar, ai) = if derivative_only {
                    (0.0, cv)
                } else {
                    (g, self.omega[l] * cv)
                };
                let (xr, xi) = (x.re[c][l], x.im[c][l]);
                y.re[r][l] += ar * xr - ai * xi;
                y.im[r][l] += ar * xi + ai * xr;
            }
        }
        y
    }

    /// Normwise backward error per lane (as `backward_error`), and the residual `b − A·x`.
    #[inline(always)]
    fn backward_error(&self, b: &LaneVec<N, L>, x: &LaneVec<N, L>) -> ([f64; L], LaneVec<N, L>) {
        let mut r = self.multiply(x, false);
        for i in 0..N {
            for l in 0..L {
                r.re[i][l] = b.re[i][l] - r.re[i][l];
                r.im[i][l] = b.im[i][l] - r.im[i][l];
            }
        }
        let (num, bnorm, xnorm) = (r.norm(), b.norm(), x.norm());
        let mut err = [0.0; L];
        for l in 0..L {
            let den = self.norm[l] * xnorm[l] + bnorm[l];
            err[l] = if num[l].is_nan() || den.is_nan() {
                f64::INFINITY
            } else if den == 0.0 {
                if num[l] == 0.0 {
                    0.0
                } else {
                    f64::INFINITY
                }
            } else {
                num[l] / den
            };
        }
        (err, r)
    }
}

impl<const N: usize, const L: usize> LaneLu<N, L> {
    /// Solves every lane against `rhs` with the residual check of [`LaneSolver::solve_checked`].
    #[inline(always)]
    fn checked_lanes(
        &mut self,
        rhs: &[Complex64],
        out: &mut [Complex64],
    ) -> Result<(), LaneFailure> {
        let b = LaneVec::<N, L>::broadcast(rhs);
        let mut x = b;
        self.solve_lanes(&mut x);
        let (mut err, mut r) = self.backward_error(&b, &x);
        if err
            .iter()
            .take(self.active)
            .any(|&e| e > RESIDUAL_LIMIT * 1e-3)
        {
            self.solve_lanes(&mut r);
            let mut refined = x;
            for i in 0..N {
                for l in 0..L {
                    refined.re[i][l] += r.re[i][l];
                    refined.im[i][l] += r.im[i][l];
                }
            }
            let (err2, _) = self.backward_error(&b, &refined);
            for l in 0..L {
                if err[l] > RESIDUAL_LIMIT * 1e-3 {
                    for i in 0..N {
                        x.re[i][l] = refined.re[i][l];
                        x.im[i][l] = refined.im[i][l];
                    }
                    err[l] = err2[l];
                }
            }
        }
        x.store(out, self.active);
        for (lane, &e) in err.iter().enumerate().take(self.active) {
            let finite = (0..N).all(|i| x.re[i][lane].is_finite() && x.im[i][lane].is_finite());
            if e.is_nan() || e > RESIDUAL_LIMIT || !finite {
                return Err(LaneFailure {
                    lane,
                    failure: SolveFailure::Untrustworthy { residual: e },
                });
            }
        }
        Ok(())
    }

    /// `dx/dω` per lane, as [`LaneSolver::derivative`].
    #[inline(always)]
    fn derivative_lanes(&self, xs: &[Complex64], out: &mut [Complex64]) {
        let x = LaneVec::<N, L>::load(xs, self.active);
        let mut d = self.multiply(&x, true);
        for i in 0..N {
            for l in 0..L {
                d.re[i][l] = -d.re[i][l];
                d.im[i][l] = -d.im[i][l];
            }
        }
        self.solve_lanes(&mut d);
        d.store(out, self.active);
    }
}

impl<const N: usize, const L: usize> LaneSolver for LaneLu<N, L> {
    fn lanes(&self) -> usize {
        L
    }

    fn factor(&mut self, omegas: &[f64]) -> Result<(), LaneFailure> {
        kernel_factor(self, omegas).map_err(|(lane, s)| LaneFailure {
            lane,
            failure: SolveFailure::Singular(s),
        })
    }

    fn solve_checked(
        &mut self,
        rhs: &[Complex64],
        out: &mut [Complex64],
    ) -> Result<(), LaneFailure> {
        kernel_solve(self, rhs, out)
    }

    fn derivative(&mut self, xs: &[Complex64], out: &mut [Complex64]) {
        kernel_derivative(self, xs, out)
    }
}

// The stack kernel's entry points, compiled for the baseline and again for AVX2, picked at
// run time by what the processor has (multiversion). Each version performs the same IEEE
// operations in the same order (Rust fuses no multiply-add unless asked), so the results are
// the same bits on every processor; only the vector width of the lane arithmetic changes.
// An AVX-512 version measured slower on this 2-core EPYC (`cargo bench --bench throughput`,
// 9 unknowns, 1 thread: 354-361 ns/point against 277 with AVX2), so it is not built.
#[multiversion(targets("x86_64+avx2+fma"))]
fn kernel_factor<const N: usize, const L: usize>(
    lu: &mut LaneLu<N, L>,
    omegas: &[f64],
) -> Result<(), (usize, Singular)> {
    lu.factor_lanes(omegas)
}

#[multiversion(targets("x86_64+avx2+fma"))]
fn kernel_solve<const N: usize, const L: usize>(
    lu: &mut LaneLu<N, L>,
    rhs: &[Complex64],
    out: &mut [Complex64],
) -> Result<(), LaneFailure> {
    lu.checked_lanes(rhs, out)
}

#[multiversion(targets("x86_64+avx2+fma"))]
fn kernel_derivative<const N: usize, const L: usize>(
    lu: &LaneLu<N, L>,
    xs: &[Complex64],
    out: &mut [Complex64],
) {
    lu.derivative_lanes(xs, out)
}

impl<const N: usize, const L: usize> PointSolver for LaneLu<N, L> {
    fn factor(&mut self, omega: f64) -> Result<(), Singular> {
        kernel_factor(self, &[omega]).map_err(|(_, s)| s)
    }

    fn solve(&mut self, rhs: &mut [Complex64]) {
        if rhs.len() != N {
            return;
        }
        let mut v = LaneVec::<N, L>::broadcast(rhs);
        self.solve_lanes(&mut v);
        v.store(rhs, 1);
    }
}

#[inline(always)]
fn norm1(z: Complex64) -> f64 {
    z.re.abs() + z.im.abs()
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
