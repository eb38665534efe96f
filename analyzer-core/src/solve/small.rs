//! The stack kernel: complex LU with partial pivoting on fixed-size arrays, for the tiny
//! systems most filters produce, several frequencies per pass.

use super::{
    DenseLu, LaneFailure, LaneSolver, OneLane, PointSolver, Singular, SolveFailure, RESIDUAL_LIMIT,
};
use crate::stamp::System;
use multiversion::multiversion;
use num_complex::Complex64;

macro_rules! small_dispatch {
    ($sys:expr, $lanes:literal, $fallback:expr, $($n:literal)*) => {
        match $sys.n {
            $($n => Box::new(LaneLu::<$n, $lanes>::new($sys)),)*
            _ => $fallback,
        }
    };
}

pub(super) fn make_small<'a>(sys: &'a System) -> Box<dyn PointSolver + 'a> {
    small_dispatch!(sys, 1, Box::new(DenseLu::new(sys)), 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16)
}

pub(super) fn make_small_lanes<'a>(sys: &'a System, wide: bool) -> Box<dyn LaneSolver + 'a> {
    let one = || Box::new(OneLane::new(sys, Box::new(DenseLu::new(sys))));
    if wide {
        small_dispatch!(sys, 8, one(), 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16)
    } else {
        small_dispatch!(sys, 1, one(), 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16)
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

/// The set bits of a row or column mask, lowest first.
#[inline(always)]
fn bits(mut mask: u32) -> impl Iterator<Item = usize> {
    std::iter::from_fn(move || {
        (mask != 0).then(|| {
            let j = mask.trailing_zeros() as usize;
            mask &= mask - 1;
            j
        })
    })
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
/// The elimination and the substitutions follow the sparsity of the network: a bit mask per
/// row marks the columns that may be nonzero (the pattern, then its fill as elimination
/// proceeds, shared by all lanes), and only those entries are searched, updated and summed.
/// The entries skipped are exact zeros in every lane, so this too changes at most the sign
/// of a zero. On the fifth-order ladder (9 unknowns) it took the one-thread throughput from
/// 277 to 189 ns per point (`cargo bench -p analyzer-core --bench throughput`).
///
/// `G` and `C` are laid out densely once; forming `G + jωC` copies (and scales) the pattern's
/// entries alone, the others being zeroed only as the elimination brings them in. The
/// residual check runs over the sparse pattern in the system's order, matching
/// [`solve_checked`](super::solve_checked) bit for bit.
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
    /// Per row of `G + jωC`, a bit per column that may hold a nonzero (the pattern).
    pattern_rows: [u32; N],
    /// Per row of the last factorisation (rows in pivot order), a bit per column of L or U
    /// that may hold a nonzero: the pattern with its fill, shared by every lane.
    lu_rows: [u32; N],
    /// The same by column: bit i of `lu_cols[j]` is bit j of `lu_rows[i]`.
    lu_cols: [u32; N],
    sys_norm: Vec<(f64, f64)>,
    /// Column sums of |G| and |C| (the rows of the transpose).
    sys_norm_t: Vec<(f64, f64)>,
}

impl<const N: usize, const L: usize> LaneLu<N, L> {
    /// A solver for `sys`, which must have exactly N unknowns (other entries are ignored).
    pub fn new(sys: &System) -> Self {
        let mut g = [[0.0; N]; N];
        let mut c = [[0.0; N]; N];
        let mut entries = Vec::with_capacity(sys.pattern.len());
        let mut pattern_rows = [0u32; N];
        for (k, &(r, col)) in sys.pattern.iter().enumerate() {
            if r < N && col < N {
                g[r][col] = sys.g[k];
                c[r][col] = sys.c[k];
                entries.push((r, col, sys.g[k], sys.c[k]));
                pattern_rows[r] |= 1 << col;
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
            pattern_rows,
            lu_rows: [0; N],
            lu_cols: [0; N],
            sys_norm: sys.row_abs().to_vec(),
            sys_norm_t: sys.col_abs().to_vec(),
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
        // Row by row, every lane at once (each lane folds its rows in the same order).
        let mut w = [0.0; L];
        for (w, o) in w.iter_mut().zip(&self.omega) {
            *w = o.abs();
        }
        let mut norm = [0.0f64; L];
        for &(g, c) in &self.sys_norm {
            for l in 0..L {
                norm[l] = norm[l].max(g + w[l] * c);
            }
        }
        self.norm = norm;
        let omega = self.omega;
        let (re, im) = (&mut self.re, &mut self.im);
        // Only the pattern's entries are written. The rest may hold the last factorisation's
        // values: an entry entering a row's mask (fill, or a lane's interchange) is zeroed
        // first, and so is a pivot position outside it, so every entry read is what a fully
        // zeroed matrix would hold and the arithmetic is the same.
        let mut rows = self.pattern_rows;
        for (i, &row) in rows.iter().enumerate() {
            for j in bits(row) {
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
        // `rows`: which entries may be nonzero, row by row, kept through the interchanges
        // and the fill: entries outside it are exact zeros in every lane, so skipping them
        // changes no bit of a result except possibly the sign of a zero (as below).
        let mut failed: [Option<usize>; L] = [None; L];
        for k in 0..N {
            let bit = 1u32 << k;
            if rows[k] & bit == 0 {
                re[k][k] = [0.0; L];
                im[k][k] = [0.0; L];
            }
            let mut best = [0.0f64; L];
            let mut piv = [k; L];
            for l in 0..L {
                best[l] = re[k][k][l].abs() + im[k][k][l].abs();
            }
            for i in k + 1..N {
                if rows[i] & bit == 0 {
                    continue;
                }
                for l in 0..L {
                    let m = re[i][k][l].abs() + im[i][k][l].abs();
                    if m > best[l] {
                        best[l] = m;
                        piv[l] = i;
                    }
                }
            }
            // A zero or non-finite pivot in some lane (one vector test in the usual case
            // that there is none; `best` is a sum of magnitudes, so never negative).
            let mut bad = false;
            for b in best {
                bad |= !(b > 0.0 && b <= f64::MAX);
            }
            if bad {
                for l in 0..L {
                    if (best[l] == 0.0 || !best[l].is_finite()) && failed[l].is_none() {
                        failed[l] = Some(k);
                    }
                }
            }
            if piv.iter().all(|&p| p == piv[0]) {
                // Every lane pivots on the same row (the usual case): swap whole rows.
                let p = piv[0];
                if p > k {
                    // Entry by entry (no call to memmove for a whole row).
                    let (top, rest) = re.split_at_mut(p);
                    top[k].swap_with_slice(&mut rest[0]);
                    let (top, rest) = im.split_at_mut(p);
                    top[k].swap_with_slice(&mut rest[0]);
                    for perm in self.perm.iter_mut() {
                        perm.swap(p, k);
                    }
                    rows.swap(p, k);
                }
            } else {
                for (l, &p) in piv.iter().enumerate() {
                    if p != k {
                        // The lanes now differ in which row is where: both rows may hold
                        // either's entries (zeros where a row had none).
                        let both = rows[k] | rows[p];
                        for r in [k, p] {
                            for j in bits(both & !rows[r]) {
                                re[r][j] = [0.0; L];
                                im[r][j] = [0.0; L];
                            }
                        }
                        rows[k] = both;
                        rows[p] = both;
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
            // Network matrices are sparse: only the rows below with an entry in column k
            // change, and only in the pivot row's columns that may be nonzero. A column that
            // is zero in every lane would subtract an exact zero (an update in some lanes and
            // not others, or in a zero column, can only flip a zero's sign).
            let upper = rows[k] & !(bit | (bit - 1));
            let mut cols = [0usize; N];
            let mut ncols = 0;
            for (c, j) in cols.iter_mut().zip(bits(upper)) {
                *c = j;
                ncols += 1;
            }
            let cols = &cols[..ncols];
            for (i, (rr, ri)) in re_rest.iter_mut().zip(im_rest.iter_mut()).enumerate() {
                let row = &mut rows[k + 1 + i];
                if *row & bit == 0 {
                    continue;
                }
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
                for j in bits(upper & !*row) {
                    rr[j] = [0.0; L];
                    ri[j] = [0.0; L];
                }
                *row |= upper;
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
        self.lu_rows = rows;
        self.lu_cols = [0; N];
        for (i, &r) in rows.iter().enumerate() {
            for j in bits(r) {
                self.lu_cols[j] |= 1 << i;
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

    /// Solves `A·y = v` into `y`, every lane with its own factorisation; `v` is in natural
    /// order. Works in `y` throughout, so no vector is copied.
    #[inline(always)]
    fn solve_lanes(&self, v: &LaneVec<N, L>, y: &mut LaneVec<N, L>) {
        let (re, im) = (&self.re, &self.im);
        for (l, perm) in self.perm.iter().enumerate() {
            for (i, &p) in perm.iter().enumerate() {
                y.re[i][l] = v.re[p][l];
                y.im[i][l] = v.im[p][l];
            }
        }
        // Only the entries of L and U that may be nonzero (an exact-zero term changes at
        // most the sign of a zero sum); columns in ascending order as in a dense pass.
        for i in 1..N {
            let (mut sr, mut si) = (y.re[i], y.im[i]);
            for j in bits(self.lu_rows[i] & ((1u32 << i) - 1)) {
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
            for j in bits(self.lu_rows[i] & !((2u32 << i) - 1)) {
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
    }

    /// Solves `Aᵀ·y = v` into `y`, every lane with its own factorisation: with `PA = LU`,
    /// `Uᵀz = v` forward, `Lᵀw = z` backward, then `y = Pᵀw`.
    #[inline(always)]
    fn solve_lanes_transposed(&self, v: &LaneVec<N, L>, y: &mut LaneVec<N, L>) {
        let (re, im) = (&self.re, &self.im);
        let mut z = *v;
        for i in 0..N {
            let (mut sr, mut si) = (z.re[i], z.im[i]);
            for j in bits(self.lu_cols[i] & ((1u32 << i) - 1)) {
                for l in 0..L {
                    sr[l] -= re[j][i][l] * z.re[j][l] - im[j][i][l] * z.im[j][l];
                    si[l] -= re[j][i][l] * z.im[j][l] + im[j][i][l] * z.re[j][l];
                }
            }
            let (dr, di) = (self.inv_re[i], self.inv_im[i]);
            for l in 0..L {
                z.re[i][l] = sr[l] * dr[l] - si[l] * di[l];
                z.im[i][l] = sr[l] * di[l] + si[l] * dr[l];
            }
        }
        for i in (0..N).rev() {
            let (mut sr, mut si) = (z.re[i], z.im[i]);
            for j in bits(self.lu_cols[i] & !((2u32 << i) - 1)) {
                for l in 0..L {
                    sr[l] -= re[j][i][l] * z.re[j][l] - im[j][i][l] * z.im[j][l];
                    si[l] -= re[j][i][l] * z.im[j][l] + im[j][i][l] * z.re[j][l];
                }
            }
            z.re[i] = sr;
            z.im[i] = si;
        }
        for (l, perm) in self.perm.iter().enumerate() {
            for (i, &p) in perm.iter().enumerate() {
                y.re[p][l] = z.re[i][l];
                y.im[p][l] = z.im[i][l];
            }
        }
    }

    /// `(G + jωC)ᵀ·x` per lane, summed over the pattern in the system's order as
    /// [`System::multiply_transposed`] does.
    #[inline(always)]
    fn multiply_transposed(&self, x: &LaneVec<N, L>, y: &mut LaneVec<N, L>) {
        *y = LaneVec::ZERO;
        for &(r, c, g, cv) in &self.entries {
            if r >= N || c >= N {
                continue;
            }
            for l in 0..L {
                let (ar, ai) = (g, self.omega[l] * cv);
                let (xr, xi) = (x.re[r][l], x.im[r][l]);
                y.re[c][l] += ar * xr - ai * xi;
                y.im[c][l] += ar * xi + ai * xr;
            }
        }
    }

    /// `(G + jωC)·x` per lane (or `C·x` times j when `derivative_only`), summed over the
    /// pattern in the system's order as [`System::multiply`] does.
    #[inline(always)]
    fn multiply(&self, x: &LaneVec<N, L>, y: &mut LaneVec<N, L>, derivative_only: bool) {
        *y = LaneVec::ZERO;
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
    }

    /// Normwise backward error per lane (as `backward_error`); leaves the residual `b − A·x`
    /// in `r`.
    #[inline(always)]
    fn backward_error(
        &self,
        b: &LaneVec<N, L>,
        x: &LaneVec<N, L>,
        r: &mut LaneVec<N, L>,
        transposed: bool,
    ) -> [f64; L] {
        if transposed {
            self.multiply_transposed(x, r);
        } else {
            self.multiply(x, r, false);
        }
        for i in 0..N {
            for l in 0..L {
                r.re[i][l] = b.re[i][l] - r.re[i][l];
                r.im[i][l] = b.im[i][l] - r.im[i][l];
            }
        }
        let (num, bnorm, xnorm) = (r.norm(), b.norm(), x.norm());
        let mut err = [0.0; L];
        for l in 0..L {
            let norm = if transposed {
                let w = self.omega[l].abs();
                self.sys_norm_t
                    .iter()
                    .map(|&(g, c)| g + w * c)
                    .fold(0.0, f64::max)
            } else {
                self.norm[l]
            };
            let den = norm * xnorm[l] + bnorm[l];
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
        err
    }
}

impl<const N: usize, const L: usize> LaneLu<N, L> {
    /// Solves every lane against `rhs` with the residual check of [`LaneSolver::solve_checked`]:
    /// the same right-hand side in every lane (broadcast), or, for the transposed systems,
    /// each lane's own (lane-major).
    #[inline(always)]
    fn checked_lanes(
        &mut self,
        rhs: &[Complex64],
        out: &mut [Complex64],
        transposed: bool,
    ) -> Result<(), LaneFailure> {
        let b = if transposed {
            LaneVec::<N, L>::load(rhs, self.active)
        } else {
            LaneVec::<N, L>::broadcast(rhs)
        };
        let (mut x, mut r, mut d) = (LaneVec::ZERO, LaneVec::ZERO, LaneVec::ZERO);
        let solve = |lu: &Self, v: &LaneVec<N, L>, y: &mut LaneVec<N, L>| {
            if transposed {
                lu.solve_lanes_transposed(v, y)
            } else {
                lu.solve_lanes(v, y)
            }
        };
        solve(self, &b, &mut x);
        let mut err = self.backward_error(&b, &x, &mut r, transposed);
        let tol = RESIDUAL_LIMIT * 1e-3;
        if err.iter().take(self.active).any(|&e| e > tol) {
            // One step of refinement: d = x + A⁻¹·r, kept in the lanes that needed it.
            solve(self, &r, &mut d);
            for i in 0..N {
                for l in 0..L {
                    d.re[i][l] += x.re[i][l];
                    d.im[i][l] += x.im[i][l];
                }
            }
            let err2 = self.backward_error(&b, &d, &mut r, transposed);
            for l in 0..L {
                if err[l] > tol {
                    for i in 0..N {
                        x.re[i][l] = d.re[i][l];
                        x.im[i][l] = d.im[i][l];
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
        let (mut d, mut dx) = (LaneVec::ZERO, LaneVec::ZERO);
        self.multiply(&x, &mut d, true);
        for i in 0..N {
            for l in 0..L {
                d.re[i][l] = -d.re[i][l];
                d.im[i][l] = -d.im[i][l];
            }
        }
        self.solve_lanes(&d, &mut dx);
        dx.store(out, self.active);
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

    fn solve_transposed_checked(
        &mut self,
        rhs: &[Complex64],
        out: &mut [Complex64],
    ) -> Result<(), LaneFailure> {
        kernel_solve_transposed(self, rhs, out)
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
    lu.checked_lanes(rhs, out, false)
}

#[multiversion(targets("x86_64+avx2+fma"))]
fn kernel_solve_transposed<const N: usize, const L: usize>(
    lu: &mut LaneLu<N, L>,
    rhs: &[Complex64],
    out: &mut [Complex64],
) -> Result<(), LaneFailure> {
    lu.checked_lanes(rhs, out, true)
}

#[multiversion(targets("x86_64+avx2+fma"))]
fn kernel_solve_transposed_into<const N: usize, const L: usize>(
    lu: &LaneLu<N, L>,
    v: &LaneVec<N, L>,
    y: &mut LaneVec<N, L>,
) {
    lu.solve_lanes_transposed(v, y)
}

#[multiversion(targets("x86_64+avx2+fma"))]
fn kernel_derivative<const N: usize, const L: usize>(
    lu: &LaneLu<N, L>,
    xs: &[Complex64],
    out: &mut [Complex64],
) {
    lu.derivative_lanes(xs, out)
}

#[multiversion(targets("x86_64+avx2+fma"))]
fn kernel_solve_into<const N: usize, const L: usize>(
    lu: &LaneLu<N, L>,
    v: &LaneVec<N, L>,
    y: &mut LaneVec<N, L>,
) {
    lu.solve_lanes(v, y)
}

impl<const N: usize, const L: usize> PointSolver for LaneLu<N, L> {
    fn factor(&mut self, omega: f64) -> Result<(), Singular> {
        kernel_factor(self, &[omega]).map_err(|(_, s)| s)
    }

    fn solve(&mut self, rhs: &mut [Complex64]) {
        if rhs.len() != N {
            return;
        }
        let v = LaneVec::<N, L>::broadcast(rhs);
        let mut y = LaneVec::ZERO;
        kernel_solve_into(self, &v, &mut y);
        y.store(rhs, 1);
    }

    fn solve_transposed(&mut self, rhs: &mut [Complex64]) {
        if rhs.len() != N {
            return;
        }
        let v = LaneVec::<N, L>::broadcast(rhs);
        let mut y = LaneVec::ZERO;
        kernel_solve_transposed_into(self, &v, &mut y);
        y.store(rhs, 1);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::network::NetworkBuilder;

    /// A network whose pivot rows change with frequency: node a's column holds 1/R1 + jωC1
    /// (growing with ω) on its own row and gm1 = 10 mS on node b's row (a transconductance
    /// sensing a), so below ω ≈ gm1/C1 = 10⁴ rad/s the pivot is b's row and above it a's;
    /// a second transconductance from c back into a makes fill. Lanes spread across that
    /// crossover pivot differently, which is where the row masks take the union of two rows.
    fn crossing_pivots() -> System {
        let mut b = NetworkBuilder::new("pivots");
        b.current_source("I1", "gnd", "a", Complex64::new(1e-3, 0.0))
            .unwrap();
        b.resistor("R1", "a", "gnd", 1e3).unwrap();
        b.capacitor("C1", "a", "gnd", 1e-6).unwrap();
        b.vccs("G1", ("gnd", "b"), ("a", "gnd"), 1e-2).unwrap();
        b.resistor("R2", "b", "gnd", 1e3).unwrap();
        b.resistor("R3", "b", "c", 1e3).unwrap();
        b.capacitor("C2", "c", "gnd", 1e-8).unwrap();
        b.vccs("G2", ("gnd", "a"), ("c", "gnd"), 2e-3).unwrap();
        System::assemble(&b.build().unwrap())
    }

    /// With lanes pivoting on different rows, each lane still gives the one-lane kernel's
    /// solution and derivative, and the solution satisfies the network's equations.
    #[test]
    fn lanes_that_pivot_differently_match_one_lane() {
        let sys = crossing_pivots();
        assert_eq!(sys.n, 3);
        let omegas: Vec<f64> = (0..8)
            .map(|k| 1e2 * 10f64.powf(k as f64 * 4.0 / 7.0))
            .collect();
        let mut wide = LaneLu::<3, 8>::new(&sys);
        let mut one = LaneLu::<3, 1>::new(&sys);
        let (mut xs, mut dxs) = (
            vec![Complex64::default(); 24],
            vec![Complex64::default(); 24],
        );
        LaneSolver::factor(&mut wide, &omegas).unwrap();
        // The test is only worth its name if the lanes did pivot differently.
        assert!(
            wide.perm.iter().any(|p| *p != wide.perm[0]),
            "{:?}",
            wide.perm
        );
        wide.solve_checked(&sys.b, &mut xs).unwrap();
        wide.derivative(&xs, &mut dxs);
        for (l, &w) in omegas.iter().enumerate() {
            let (mut x, mut dx) = (vec![Complex64::default(); 3], vec![Complex64::default(); 3]);
            LaneSolver::factor(&mut one, &[w]).unwrap();
            one.solve_checked(&sys.b, &mut x).unwrap();
            one.derivative(&x, &mut dx);
            assert_eq!(&xs[l * 3..(l + 1) * 3], &x[..], "lane {l}");
            assert_eq!(&dxs[l * 3..(l + 1) * 3], &dx[..], "lane {l}");
            // (G + jωC)·x = b to rounding.
            let mut ax = vec![Complex64::default(); 3];
            sys.multiply(w, &x, &mut ax, false);
            for (u, v) in ax.iter().zip(&sys.b) {
                assert!(
                    (u - v).norm() <= 1e-12 * v.norm().max(1e-3),
                    "lane {l}: {u} vs {v}"
                );
            }
        }
    }

    /// A ladder driven by a voltage source (its branch row makes the pivot search swap
    /// rows) with a floating capacitor across two sections (fill), and a node held by a source
    /// alone: 13 unknowns.
    fn source_ladder() -> System {
        let mut b = crate::solve::tests::ladder_builder(3);
        b.capacitor("CX", "m0", "n2", 1e-7).unwrap();
        // A node held by a source and nothing else: its row and the source's are a swapped
        // pair with no diagonal, so the pivot search starts off the row's mask there.
        b.voltage_source("VB", "bias", "gnd", 2.0.into()).unwrap();
        System::assemble(&b.build().unwrap())
    }

    /// Solution, derivative and transposed solution of every lane at `omegas`, as bits.
    fn lane_bits<const N: usize, const L: usize>(
        lu: &mut LaneLu<N, L>,
        sys: &System,
        omegas: &[f64],
    ) -> Vec<u64> {
        LaneSolver::factor(lu, omegas).unwrap();
        let k = omegas.len() * N;
        let (mut x, mut dx, mut t) = (
            vec![Complex64::default(); k],
            vec![Complex64::default(); k],
            vec![Complex64::default(); k],
        );
        lu.solve_checked(&sys.b, &mut x).unwrap();
        lu.derivative(&x, &mut dx);
        lu.solve_transposed_checked(&x, &mut t).unwrap();
        x.iter()
            .chain(&dx)
            .chain(&t)
            .flat_map(|z| [z.re.to_bits(), z.im.to_bits()])
            .collect()
    }

    /// The factorisation writes only the pattern's entries, zeroing an entry as it enters
    /// a row's mask: whatever an earlier factorisation (or anything else) left in the
    /// arrays, the results are those of a fresh solver, bit for bit. Checked with every
    /// entry poisoned with NaN (an entry read before it is written would spread it) and
    /// after factorisations at other frequencies, with eight lanes and one.
    fn stale_entries_are_never_read<const N: usize>(sys: &System) {
        assert_eq!(sys.n, N);
        let omegas: Vec<f64> = (0..8).map(|k| 1e2 * 10f64.powf(k as f64 * 0.7)).collect();
        let others: Vec<f64> = omegas.iter().map(|w| w * 3.1).rev().collect();
        let fresh = lane_bits(&mut LaneLu::<N, 8>::new(sys), sys, &omegas);
        let mut poisoned = LaneLu::<N, 8>::new(sys);
        poisoned.re = [[[f64::NAN; 8]; N]; N];
        poisoned.im = [[[f64::NAN; 8]; N]; N];
        assert!(
            lane_bits(&mut poisoned, sys, &omegas) == fresh,
            "n = {N}, poisoned"
        );
        let mut reused = LaneLu::<N, 8>::new(sys);
        lane_bits(&mut reused, sys, &others);
        assert!(
            lane_bits(&mut reused, sys, &omegas) == fresh,
            "n = {N}, reused"
        );
        for &w in &omegas {
            let fresh = lane_bits(&mut LaneLu::<N, 1>::new(sys), sys, &[w]);
            let mut one = LaneLu::<N, 1>::new(sys);
            one.re = [[[f64::NAN; 1]; N]; N];
            one.im = [[[f64::NAN; 1]; N]; N];
            assert!(lane_bits(&mut one, sys, &[w]) == fresh, "n = {N}, one lane");
        }
    }

    #[test]
    fn entries_left_by_an_earlier_factorisation_are_never_read() {
        let sys = crossing_pivots();
        let mut wide = LaneLu::<3, 8>::new(&sys);
        let omegas: Vec<f64> = (0..8).map(|k| 1e2 * 10f64.powf(k as f64 * 0.7)).collect();
        LaneSolver::factor(&mut wide, &omegas).unwrap();
        assert!(
            wide.perm.iter().any(|p| *p != wide.perm[0]),
            "lanes pivot alike"
        );
        stale_entries_are_never_read::<3>(&sys);
        let sys = source_ladder();
        let mut one = LaneLu::<13, 1>::new(&sys);
        LaneSolver::factor(&mut one, &[1e3]).unwrap();
        assert!(
            one.perm[0].iter().enumerate().any(|(i, &p)| i != p),
            "no interchange"
        );
        stale_entries_are_never_read::<13>(&sys);
    }
}
