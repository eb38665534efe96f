//! The stack kernel: complex LU with partial pivoting on fixed-size arrays, for the tiny
//! systems most filters produce, several frequencies per pass.

use super::{
    DenseLu, LaneFailure, LaneSolver, OneLane, PointSolver, Singular, SolveFailure, RESIDUAL_LIMIT,
};
use crate::stamp::System;
use multiversion::multiversion;
use num_complex::Complex64;

/// `$body` with the const `$N` set to `$n` for each size the kernel is built for (1 to 16),
/// `$fallback` for any other size.
macro_rules! by_size {
    ($n:expr, $N:ident => $body:expr, _ => $fallback:expr) => {
        by_size!(@ $n, $N, $body, $fallback, 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16)
    };
    (@ $n:expr, $N:ident, $body:expr, $fallback:expr, $($k:literal)*) => {
        match $n {
            $($k => {
                const $N: usize = $k;
                $body
            })*
            _ => $fallback,
        }
    };
}

/// The elimination order the stack kernel takes for `sys` ([`LaneLu::new`]'s choice), found
/// once per plan; empty above the kernel's sizes.
pub(super) fn small_order(sys: &System) -> Vec<usize> {
    by_size!(sys.n, N => best_order::<N>(sys).to_vec(), _ => Vec::new())
}

pub(super) fn make_small<'a>(sys: &'a System, order: &[usize]) -> Box<dyn PointSolver + 'a> {
    by_size!(sys.n, N => Box::new(LaneLu::<N, 1>::with_order(sys, order)),
        _ => Box::new(DenseLu::new(sys)))
}

pub(super) fn make_small_lanes<'a>(
    sys: &'a System,
    wide: bool,
    order: &[usize],
) -> Box<dyn LaneSolver + 'a> {
    by_size!(sys.n, N => if wide {
        Box::new(LaneLu::<N, 8>::with_order(sys, order))
    } else {
        Box::new(LaneLu::<N, 1>::with_order(sys, order))
    }, _ => Box::new(OneLane::new(sys, Box::new(DenseLu::new(sys)))))
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

    /// Lane-major complex slice (lane l at `l·N ..`, the system's order) into lanes in the
    /// kernel's `order`; missing lanes repeat lane 0.
    #[inline(always)]
    fn load(src: &[Complex64], lanes: usize, order: &[usize; N]) -> Self {
        let mut v = Self::ZERO;
        for l in 0..L {
            let from = if l < lanes { l } else { 0 };
            for (i, &o) in order.iter().enumerate() {
                let z = src.get(from * N + o).copied().unwrap_or_default();
                v.re[i][l] = z.re;
                v.im[i][l] = z.im;
            }
        }
        v
    }

    /// The same vector (the system's order) in every lane, in the kernel's `order`.
    #[inline(always)]
    fn broadcast(src: &[Complex64], order: &[usize; N]) -> Self {
        let mut v = Self::ZERO;
        for (i, &o) in order.iter().enumerate() {
            let z = src.get(o).copied().unwrap_or_default();
            v.re[i] = [z.re; L];
            v.im[i] = [z.im; L];
        }
        v
    }

    /// The first `lanes` lanes into a lane-major complex slice in the system's order.
    #[inline(always)]
    fn store(&self, dst: &mut [Complex64], lanes: usize, order: &[usize; N]) {
        for (l, out) in dst.chunks_exact_mut(N).take(lanes.min(L)).enumerate() {
            for (i, &o) in order.iter().enumerate() {
                out[o] = Complex64::new(self.re[i][l], self.im[i][l]);
            }
        }
    }

    /// Per lane, whether every entry is finite.
    #[allow(clippy::needless_range_loop)]
    #[inline(always)]
    fn finite(&self) -> [bool; L] {
        let mut ok = [true; L];
        for i in 0..N {
            for l in 0..L {
                ok[l] &= self.re[i][l].is_finite() & self.im[i][l].is_finite();
            }
        }
        ok
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

/// Minimum-degree order of a graph given as a bit mask of neighbours per vertex (lowest
/// index first among equals): the vertex of fewest remaining neighbours goes next, and its
/// neighbours become one clique (the fill its elimination makes).
fn minimum_degree<const N: usize>(mut adj: [u32; N]) -> [usize; N] {
    let mut left: u32 = if N >= 32 { u32::MAX } else { (1u32 << N) - 1 };
    let mut order = [0usize; N];
    for slot in order.iter_mut() {
        let v = bits(left)
            .min_by_key(|&j| ((adj[j] & left).count_ones(), j))
            .unwrap_or(0);
        *slot = v;
        left &= !(1 << v);
        let clique = adj[v] & left;
        for u in bits(clique) {
            adj[u] |= clique & !(1 << u);
        }
    }
    order
}

/// The elimination orders tried for a pattern (`rows`, a bit per column): the system's own;
/// minimum degree on the pattern of AᵀA, whose Cholesky factor bounds the pattern of U
/// whatever rows partial pivoting picks (George and Ng, 1985); and minimum degree on
/// A + Aᵀ, the better guess when the pivots stay mostly on the diagonal.
fn candidate_orders<const N: usize>(rows: &[u32; N]) -> [[usize; N]; 3] {
    let (mut normal, mut sym) = ([0u32; N], *rows);
    for (i, &r) in rows.iter().enumerate() {
        for j in bits(r) {
            normal[j] |= r;
            sym[j] |= 1 << i;
        }
    }
    for j in 0..N {
        normal[j] &= !(1 << j);
        sym[j] &= !(1 << j);
    }
    [
        std::array::from_fn(|i| i),
        minimum_degree(normal),
        minimum_degree(sym),
    ]
}

/// The order of [`candidate_orders`] whose trial factorisation costs least: one pass of
/// eight frequencies spread log-evenly over ten times the range of the rows' corner
/// frequencies Σ|G|/Σ|C| each way, at `sys`'s values, scored by the multiply-adds of the
/// elimination and of a solve. The first (the system's own) wins ties; a system the trial
/// cannot factor keeps it.
fn best_order<const N: usize>(sys: &System) -> [usize; N] {
    let mut rows = [0u32; N];
    for &(r, c) in &sys.pattern {
        if r < N && c < N {
            rows[r] |= 1 << c;
        }
    }
    let corners = sys
        .row_abs()
        .iter()
        .filter(|&&(g, c)| g > 0.0 && c > 0.0)
        .map(|&(g, c)| g / c)
        .filter(|w| w.is_finite() && *w > 0.0);
    let (lo, hi) = corners.fold((f64::INFINITY, 0.0f64), |(lo, hi), w| {
        (lo.min(w), hi.max(w))
    });
    let (lo, hi) = if lo <= hi {
        (lo / 10.0, hi * 10.0)
    } else {
        (1.0, 1.0)
    };
    let omegas: [f64; 8] = std::array::from_fn(|k| lo * (hi / lo).powf(k as f64 / 7.0));
    let mut best: Option<(u64, [usize; N])> = None;
    for order in candidate_orders(&rows) {
        let mut lu = LaneLu::<N, 8>::with_order(sys, &order);
        if kernel_factor(&mut lu, &omegas).is_err() {
            continue;
        }
        let cost = lu.elimination_cost();
        if best.is_none_or(|(c, _)| cost < c) {
            best = Some((cost, order));
        }
    }
    best.map_or_else(|| std::array::from_fn(|i| i), |(_, order)| order)
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
/// The unknowns are eliminated in an order of their own (`order`, the system's unknown at
/// each position, rows and columns alike), chosen by [`LaneLu::new`] or given by the plan:
/// partial pivoting is as stable in any column order, but the fill, and so the work, is
/// not (on the fifth-order ladder the chosen order halves the elimination's multiply-adds).
/// Vectors are permuted on the way in and out; the residual check sums in the system's
/// order as before.
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
    /// Per lane, whether the last factorisation's growth bounds the backward error of every
    /// solve with it below the refinement threshold ([`LaneLu::certify`]).
    certified: [bool; L],
    /// Per lane, `‖|L̂|·|Û|‖∞` of the last factorisation (entries as |Re| + |Im|).
    growth: [f64; L],
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
    /// Whether every lane of the last factorisation interchanged its rows alike.
    same_perm: bool,
    /// The system's unknown (and equation) at each of the kernel's positions.
    order: [usize; N],
    sys_norm: Vec<(f64, f64)>,
    /// Column sums of |G| and |C| (the rows of the transpose).
    sys_norm_t: Vec<(f64, f64)>,
}

impl<const N: usize, const L: usize> LaneLu<N, L> {
    /// A solver for `sys`, which must have exactly N unknowns (other entries are ignored).
    pub fn new(sys: &System) -> Self {
        Self::with_order(sys, &best_order::<N>(sys))
    }

    /// A solver for `sys` that eliminates its unknowns in `order` (the system's unknown at
    /// each position; anything but a permutation of 0..N is taken as the natural order).
    pub fn with_order(sys: &System, order: &[usize]) -> Self {
        let mut order: [usize; N] = std::array::from_fn(|i| order.get(i).copied().unwrap_or(i));
        // A permutation of 0..N sets each of the N low bits once (N ≤ 16).
        let seen = order
            .iter()
            .fold(0u32, |m, &o| m | 1u32.checked_shl(o as u32).unwrap_or(0));
        if seen != (1u32 << N) - 1 {
            order = std::array::from_fn(|i| i);
        }
        let mut pos = [0usize; N];
        for (i, &o) in order.iter().enumerate() {
            pos[o] = i;
        }
        let mut g = [[0.0; N]; N];
        let mut c = [[0.0; N]; N];
        let mut entries = Vec::with_capacity(sys.pattern.len());
        let mut pattern_rows = [0u32; N];
        for (k, &(r, col)) in sys.pattern.iter().enumerate() {
            if r < N && col < N {
                let (r, col) = (pos[r], pos[col]);
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
            certified: [false; L],
            growth: [0.0; L],
            re: [[[0.0; L]; N]; N],
            im: [[[0.0; L]; N]; N],
            inv_re: [[0.0; L]; N],
            inv_im: [[0.0; L]; N],
            perm: [[0; N]; L],
            pattern_rows,
            lu_rows: [0; N],
            same_perm: true,
            order,
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
        // For the certificate: ‖|L̂|·|Û|‖∞ row by row as the rows become final (row k of L̂
        // and Û is, once step k has chosen its pivot). `lsum[i]`: Σ |l_ik|·(row sum of |Û|
        // row k) over the steps so far, for the row now at position i (moved with it).
        let mut lsum = [[0.0f64; L]; N];
        let (mut growth, mut nan) = ([0.0f64; L], [false; L]);
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
                    let better = m > best[l];
                    best[l] = if better { m } else { best[l] };
                    piv[l] = if better { i } else { piv[l] };
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
                    lsum.swap(p, k);
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
                        let t = lsum[k][l];
                        lsum[k][l] = lsum[p][l];
                        lsum[p][l] = t;
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
            // Row k of Û is final: its sum of |Re| + |Im| (the pivot's is `best`), and row k
            // of |L̂|·|Û| with it.
            let mut usum = best;
            for &j in cols {
                for l in 0..L {
                    usum[l] += kr[j][l].abs() + ki[j][l].abs();
                }
            }
            for l in 0..L {
                let s = usum[l] + lsum[k][l];
                growth[l] = growth[l].max(s);
                nan[l] |= s.is_nan();
            }
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
                let below = &mut lsum[k + 1 + i];
                for l in 0..L {
                    below[l] += (lr[l].abs() + li[l].abs()) * usum[l];
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
        self.same_perm = self.perm.iter().all(|p| *p == self.perm[0]);
        for l in 0..L {
            if nan[l] {
                growth[l] = f64::NAN;
            }
        }
        self.growth = growth;
        self.certified = self.certify(&failed);
        match failed
            .iter()
            .take(self.active)
            .enumerate()
            .find_map(|(l, f)| {
                f.map(|k| {
                    let column = self.order[k];
                    (l, Singular { column })
                })
            }) {
            Some(e) => Err(e),
            None => Ok(()),
        }
    }

    /// Per lane, whether the last factorisation alone guarantees that every solve with it has
    /// a normwise backward error (as [`LaneLu::backward_error`] computes it) of at most the
    /// refinement threshold `RESIDUAL_LIMIT / 1000`, so that the residual need not be formed.
    ///
    /// LU with partial pivoting followed by the two substitutions solves `(A + ΔA)·x̂ = b`
    /// with `|ΔA| ≤ γ₃ₙ·|L̂|·|Û|` entrywise (Higham, *Accuracy and Stability of Numerical
    /// Algorithms*, 2nd ed., Thm 9.4; γₖ = k·u/(1 − k·u), u = 2⁻⁵³). In complex arithmetic
    /// every multiply-add costs at most 2√2·u + u of relative error and the reciprocal of a
    /// pivot a few u more (ibid. §3.6), so γ₃ₙ grows to below 16·(n + 1)·u; we take twice
    /// that, 32·(n + 1)·u. Measuring entries as |Re| + |Im| (within √2 of the modulus) the
    /// residual then obeys ‖b − A·x̂‖ ≤ √2·32·(n + 1)·u·‖|L̂|·|Û|‖∞·‖x̂‖, and the backward
    /// error ≤ √2·32·(n + 1)·u·‖|L̂|·|Û|‖∞ / ‖A‖∞ — the growth of the factorisation. The
    /// rounding of the residual's own computation adds at most √2·4·(n + 2)·u ≈ 1e-14 for
    /// n ≤ 16. A lane is certified when the first part is at most half the threshold
    /// (5e-13), i.e. growth up to about 10·‖A‖∞ at n = 9: every lane of the networks in
    /// `the_certificate_covers_networks_and_refuses_growth` is.
    ///
    /// The bound ignores underflow, so `‖A‖∞` must lie in [1e-150, 1e150] (and the solve
    /// checks its vectors' norms likewise). The growth is summed during the elimination, row
    /// by row as each row of L̂ and Û becomes final (a few operations per entry of L̂ and Û);
    /// a failed or non-finite lane is never certified.
    #[inline(always)]
    fn certify(&self, failed: &[Option<usize>; L]) -> [bool; L] {
        let growth = self.growth;
        let allowed = 0.5 * RESIDUAL_LIMIT * 1e-3;
        let mut ok = [false; L];
        for l in 0..L {
            let norm = self.norm[l];
            ok[l] = failed[l].is_none()
                && (1e-150..=1e150).contains(&norm)
                && growth[l] * Self::GROWTH_TO_ERROR <= allowed * norm;
        }
        ok
    }

    /// The backward error per unit of growth: √2·32·(n + 1)·u (see [`LaneLu::certify`]).
    const GROWTH_TO_ERROR: f64 =
        std::f64::consts::SQRT_2 * 32.0 * (N + 1) as f64 * (f64::EPSILON / 2.0);

    /// Multiply-adds per lane of the last factorisation and of one solve with it, from the
    /// masks of L and U: row i of L meets row k of U for every k in its mask.
    fn elimination_cost(&self) -> u64 {
        let upper = |k: usize| (self.lu_rows[k] & !((2u32 << k) - 1)).count_ones() as u64;
        let mut cost = 0;
        for (i, &row) in self.lu_rows.iter().enumerate() {
            cost += row.count_ones() as u64;
            for k in bits(row & ((1u32 << i) - 1)) {
                cost += 1 + upper(k);
            }
        }
        cost
    }

    /// Solves `A·y = v` into `y`, every lane with its own factorisation; `v` and `y` are in
    /// the kernel's order. Works in `y` throughout, so no vector is copied.
    #[inline(always)]
    fn solve_lanes(&self, v: &LaneVec<N, L>, y: &mut LaneVec<N, L>) {
        let (re, im) = (&self.re, &self.im);
        self.interchange(v, y, false);
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
        // The masks by column: bit i of `lu_cols[j]` is bit j of `lu_rows[i]`.
        let mut lu_cols = [0u32; N];
        for (i, &r) in self.lu_rows.iter().enumerate() {
            for j in bits(r) {
                lu_cols[j] |= 1 << i;
            }
        }
        let mut z = *v;
        for i in 0..N {
            let (mut sr, mut si) = (z.re[i], z.im[i]);
            for j in bits(lu_cols[i] & ((1u32 << i) - 1)) {
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
            for j in bits(lu_cols[i] & !((2u32 << i) - 1)) {
                for l in 0..L {
                    sr[l] -= re[j][i][l] * z.re[j][l] - im[j][i][l] * z.im[j][l];
                    si[l] -= re[j][i][l] * z.im[j][l] + im[j][i][l] * z.re[j][l];
                }
            }
            z.re[i] = sr;
            z.im[i] = si;
        }
        self.interchange(&z, y, true);
    }

    /// The row interchanges of the last factorisation: `to[i] = from[perm[i]]` in each
    /// lane, or undone (`to[perm[i]] = from[i]`) when `back`. Whole rows, every lane at once,
    /// when every lane interchanged alike (the usual case).
    #[inline(always)]
    fn interchange(&self, from: &LaneVec<N, L>, to: &mut LaneVec<N, L>, back: bool) {
        let pair = |i: usize, p: usize| if back { (p, i) } else { (i, p) };
        if self.same_perm {
            for (i, &p) in self.perm[0].iter().enumerate() {
                let (t, f) = pair(i, p);
                to.re[t] = from.re[f];
                to.im[t] = from.im[f];
            }
        } else {
            for (l, perm) in self.perm.iter().enumerate() {
                for (i, &p) in perm.iter().enumerate() {
                    let (t, f) = pair(i, p);
                    to.re[t][l] = from.re[f][l];
                    to.im[t][l] = from.im[f][l];
                }
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
            LaneVec::<N, L>::load(rhs, self.active, &self.order)
        } else {
            LaneVec::<N, L>::broadcast(rhs, &self.order)
        };
        let mut x = LaneVec::ZERO;
        let solve = |lu: &Self, v: &LaneVec<N, L>, y: &mut LaneVec<N, L>| {
            if transposed {
                lu.solve_lanes_transposed(v, y)
            } else {
                lu.solve_lanes(v, y)
            }
        };
        solve(self, &b, &mut x);
        // A lane whose factorisation is certified, whose vectors stay clear of underflow and
        // overflow and whose solution is finite has a backward error below the refinement
        // threshold: its residual would change nothing. The residual is formed (for every
        // lane, as before) only when some active lane is not such a lane.
        if !transposed {
            let (bnorm, xnorm, finite) = (b.norm(), x.norm(), x.finite());
            let mut certified = true;
            for l in 0..self.active.min(L) {
                certified &= self.certified[l]
                    & (bnorm[l] == 0.0 || (1e-150..=1e150).contains(&bnorm[l]))
                    & (xnorm[l] <= 1e150)
                    & finite[l];
            }
            if certified {
                x.store(out, self.active, &self.order);
                return Ok(());
            }
        }
        let mut r = LaneVec::ZERO;
        let mut err = self.backward_error(&b, &x, &mut r, transposed);
        let tol = RESIDUAL_LIMIT * 1e-3;
        if err.iter().take(self.active).any(|&e| e > tol) {
            // One step of refinement: d = x + A⁻¹·r, kept in the lanes that needed it.
            let mut d = LaneVec::ZERO;
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
        x.store(out, self.active, &self.order);
        let finite = x.finite();
        for (lane, &e) in err.iter().enumerate().take(self.active) {
            if e.is_nan() || e > RESIDUAL_LIMIT || !finite[lane] {
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
        let x = LaneVec::<N, L>::load(xs, self.active, &self.order);
        let (mut d, mut dx) = (LaneVec::ZERO, LaneVec::ZERO);
        self.multiply(&x, &mut d, true);
        for i in 0..N {
            for l in 0..L {
                d.re[i][l] = -d.re[i][l];
                d.im[i][l] = -d.im[i][l];
            }
        }
        self.solve_lanes(&d, &mut dx);
        dx.store(out, self.active, &self.order);
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
        let v = LaneVec::<N, L>::broadcast(rhs, &self.order);
        let mut y = LaneVec::ZERO;
        kernel_solve_into(self, &v, &mut y);
        y.store(rhs, 1, &self.order);
    }

    fn solve_transposed(&mut self, rhs: &mut [Complex64]) {
        if rhs.len() != N {
            return;
        }
        let v = LaneVec::<N, L>::broadcast(rhs, &self.order);
        let mut y = LaneVec::ZERO;
        kernel_solve_transposed_into(self, &v, &mut y);
        y.store(rhs, 1, &self.order);
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

    /// A star: a current source into a hub joined by a resistor to each of seven nodes,
    /// each with its own resistor and capacitor to ground. Its matrix is an arrowhead (the
    /// hub's row and column full, a diagonal elsewhere), the hub first.
    fn star() -> System {
        let mut b = NetworkBuilder::new("star");
        b.current_source("I1", "gnd", "hub", Complex64::new(1e-3, 0.0))
            .unwrap();
        for k in 0..7 {
            let leaf = format!("n{k}");
            let r = 1e3 * (1.0 + k as f64);
            b.resistor(&format!("R{k}"), "hub", &leaf, r).unwrap();
            b.resistor(&format!("G{k}"), &leaf, "gnd", 2.0 * r).unwrap();
            b.capacitor(&format!("C{k}"), &leaf, "gnd", 1e-9 * (1.0 + k as f64))
                .unwrap();
        }
        System::assemble(&b.build().unwrap())
    }

    /// Entries of L and U the last factorisation may have held.
    fn stored<const N: usize, const L: usize>(lu: &LaneLu<N, L>) -> u32 {
        lu.lu_rows.iter().map(|r| r.count_ones()).sum()
    }

    /// The arrowhead is the classic case for ordering (common practice): eliminating the
    /// hub first fills the whole matrix (64 entries of 8×8), eliminating it (nearly) last
    /// fills nothing (3·8 − 2 = 22). Pivots stay on the diagonal at every frequency here (each
    /// diagonal entry outweighs the rest of its column), so the counts are exact.
    #[test]
    fn the_chosen_order_leaves_an_arrowhead_without_fill() {
        let sys = star();
        assert_eq!(sys.n, 8);
        let omegas: Vec<f64> = (0..8).map(|k| 1e2 * 10f64.powf(k as f64)).collect();
        let mut natural = LaneLu::<8, 8>::with_order(&sys, &[]);
        LaneSolver::factor(&mut natural, &omegas).unwrap();
        assert_eq!(stored(&natural), 64);
        let mut chosen = LaneLu::<8, 8>::new(&sys);
        LaneSolver::factor(&mut chosen, &omegas).unwrap();
        assert_eq!(stored(&chosen), 22);
        // The hub among the last two (with one leaf left, either order fills nothing).
        assert!(!chosen.order[..6].contains(&0), "{:?}", chosen.order);
        assert!(chosen.elimination_cost() < natural.elimination_cost() / 2);
    }

    /// Solution, derivative and transposed solution at `omegas` with each of `orders`
    /// agree with the natural order's to rounding, and satisfy the network's equations; an
    /// order that is not a permutation is taken as the natural one, bit for bit.
    fn any_order_solves_alike<const N: usize>(sys: &System, orders: &[[usize; N]]) {
        let omegas: Vec<f64> = (0..8).map(|k| 3e1 * 10f64.powf(k as f64 * 0.8)).collect();
        let natural: [usize; N] = std::array::from_fn(|i| i);
        let reference = lane_bits(&mut LaneLu::<N, 8>::with_order(sys, &natural), sys, &omegas);
        let mut twice = natural;
        twice[N - 1] = 0;
        let invalid = lane_bits(&mut LaneLu::<N, 8>::with_order(sys, &twice), sys, &omegas);
        assert!(invalid == reference, "n = {N}: an invalid order");
        let value = |bits: &[u64], k: usize| f64::from_bits(bits[k]);
        for order in orders {
            let got = lane_bits(&mut LaneLu::<N, 8>::with_order(sys, order), sys, &omegas);
            // Per solution vector (x, dx, y of each lane): max-norm error against max norm.
            for (a, b) in reference.chunks(2 * N).zip(got.chunks(2 * N)) {
                let scale = (0..2 * N).map(|k| value(a, k).abs()).fold(0.0, f64::max);
                for k in 0..2 * N {
                    let d = (value(a, k) - value(b, k)).abs();
                    assert!(
                        d <= 1e-12 * scale,
                        "n = {N}, order {order:?}: {d} of {scale}"
                    );
                }
            }
            let mut lu = LaneLu::<N, 1>::with_order(sys, order);
            for &w in &omegas {
                LaneSolver::factor(&mut lu, &[w]).unwrap();
                let (mut x, mut ax) =
                    (vec![Complex64::default(); N], vec![Complex64::default(); N]);
                lu.solve_checked(&sys.b, &mut x).unwrap();
                sys.multiply(w, &x, &mut ax, false);
                let bn = sys.b.iter().map(|v| v.norm()).fold(0.0, f64::max);
                for (u, v) in ax.iter().zip(&sys.b) {
                    assert!(
                        (u - v).norm() <= 1e-12 * bn,
                        "order {order:?} at {w}: {u} vs {v}"
                    );
                }
            }
        }
    }

    #[test]
    fn any_elimination_order_gives_the_same_solution() {
        let sys = crossing_pivots();
        any_order_solves_alike::<3>(&sys, &[[2, 1, 0], [1, 2, 0], best_order::<3>(&sys)]);
        let sys = star();
        any_order_solves_alike::<8>(
            &sys,
            &[
                [7, 6, 5, 4, 3, 2, 1, 0],
                [3, 0, 5, 1, 7, 2, 6, 4],
                best_order::<8>(&sys),
            ],
        );
        let sys = source_ladder();
        let reversed: [usize; 13] = std::array::from_fn(|i| 12 - i);
        let rotated: [usize; 13] = std::array::from_fn(|i| (i + 5) % 13);
        any_order_solves_alike::<13>(&sys, &[reversed, rotated, best_order::<13>(&sys)]);
    }

    /// Per lane: whether it is certified, and the residual check's backward error of the
    /// solution against `rhs` (every lane).
    fn certified_and_error<const N: usize, const L: usize>(
        lu: &LaneLu<N, L>,
        rhs: &[Complex64],
    ) -> ([bool; L], [f64; L]) {
        let b = LaneVec::<N, L>::broadcast(rhs, &lu.order);
        let (mut x, mut r) = (LaneVec::ZERO, LaneVec::ZERO);
        lu.solve_lanes(&b, &mut x);
        let err = lu.backward_error(&b, &x, &mut r, false);
        // The error analysis behind the certificate, lane by lane: growth times
        // √2·32·(n + 1)·u over ‖A‖, plus the residual's own rounding.
        let growth = lu.growth;
        for l in 0..lu.active {
            let bound = LaneLu::<N, L>::GROWTH_TO_ERROR * growth[l] / lu.norm[l]
                + std::f64::consts::SQRT_2 * 4.0 * (N + 2) as f64 * f64::EPSILON;
            assert!(err[l] <= bound, "n = {N}, lane {l}: {} > {bound}", err[l]);
        }
        (lu.certified, err)
    }

    /// Wilkinson's matrix, the classic worst case of partial pivoting (common practice): 1
    /// on the diagonal and in the last column, −1 below the diagonal. Eliminated in the
    /// natural order it keeps its pivots and doubles the last column at every step, a growth
    /// of 2ⁿ⁻¹. Built as n nodes with 1 Ω to ground and transconductances of 1 S.
    fn wilkinson(n: usize) -> System {
        perturbed_wilkinson(n, &[0.0])
    }

    /// Wilkinson's matrix with every entry scaled by 1 + δ, δ taken in turn from `deltas`
    /// (small: the pivots and the growth stay, and now the arithmetic rounds).
    fn perturbed_wilkinson(n: usize, deltas: &[f64]) -> System {
        let mut b = NetworkBuilder::new("growth");
        let node = |k: usize| format!("w{k}");
        let mut d = deltas.iter().cycle().map(|d| 1.0 + d);
        for k in 0..n {
            let g = d.next().unwrap_or(1.0);
            b.resistor(&format!("R{k}"), &node(k), "gnd", 1.0 / g)
                .unwrap();
        }
        for i in 0..n {
            for j in 0..i {
                let g = d.next().unwrap_or(1.0);
                b.vccs(
                    &format!("M{i}_{j}"),
                    ("gnd", &node(i)),
                    (&node(j), "gnd"),
                    g,
                )
                .unwrap();
            }
            if i + 1 < n {
                let g = d.next().unwrap_or(1.0);
                b.vccs(
                    &format!("P{i}"),
                    (&node(i), "gnd"),
                    (&node(n - 1), "gnd"),
                    g,
                )
                .unwrap();
            }
        }
        b.current_source("I1", "gnd", &node(0), Complex64::new(1.0, 0.0))
            .unwrap();
        System::assemble(&b.build().unwrap())
    }

    /// The certificate is not idle: the networks above are certified in every lane from
    /// 1 rad/s to 10 Grad/s, in the chosen order and in the natural one. Wilkinson's matrix
    /// is not (its growth is 2¹¹), and its solve still passes the residual check that then
    /// runs.
    #[test]
    fn the_certificate_covers_networks_and_refuses_growth() {
        let omegas: Vec<f64> = (0..8).map(|k| 10f64.powf(k as f64 * 10.0 / 7.0)).collect();
        fn all_certified<const N: usize>(sys: &System, omegas: &[f64]) {
            for order in [best_order::<N>(sys), std::array::from_fn(|i| i)] {
                let mut lu = LaneLu::<N, 8>::with_order(sys, &order);
                LaneSolver::factor(&mut lu, omegas).unwrap();
                let (certified, err) = certified_and_error(&lu, &sys.b);
                assert!(certified.iter().all(|&c| c), "n = {N}, {order:?}: {err:?}");
            }
        }
        all_certified::<3>(&crossing_pivots(), &omegas);
        all_certified::<8>(&star(), &omegas);
        all_certified::<13>(&source_ladder(), &omegas);
        let sys = wilkinson(12);
        assert_eq!(sys.n, 12);
        let mut lu = LaneLu::<12, 8>::with_order(&sys, &[]);
        LaneSolver::factor(&mut lu, &omegas).unwrap();
        assert_eq!(lu.re[11][11][0], 2048.0, "no growth");
        let (certified, _) = certified_and_error(&lu, &sys.b);
        assert!(certified.iter().all(|&c| !c), "{certified:?}");
        let mut x = vec![Complex64::default(); 8 * 12];
        lu.solve_checked(&sys.b, &mut x).unwrap();
        let mut ax = vec![Complex64::default(); 12];
        sys.multiply(omegas[0], &x[..12], &mut ax, false);
        for (u, v) in ax.iter().zip(&sys.b) {
            assert!((u - v).norm() <= 1e-12, "{u} vs {v}");
        }
    }

    /// A random network of `nodes` nodes: a resistor from each node to ground (values
    /// over six decades), then random resistors, capacitors, inductors and
    /// transconductances between random nodes, and a source into node 0.
    fn random_network(nodes: usize, parts: &[(u8, usize, usize, f64)], vsource: bool) -> System {
        let mut b = NetworkBuilder::new("random");
        let node = |k: usize| format!("r{}", k % nodes);
        for k in 0..nodes {
            let r = 10f64.powf((k as f64 * 0.77) % 6.0);
            b.resistor(&format!("RG{k}"), &node(k), "gnd", r).unwrap();
        }
        for (k, &(kind, a, c, x)) in parts.iter().enumerate() {
            let (a, c) = (node(a), node(c));
            if a == c {
                continue;
            }
            let name = format!("P{k}");
            match kind % 4 {
                0 => b.resistor(&name, &a, &c, 10f64.powf(6.0 * x)).map(|_| ()),
                1 => b
                    .capacitor(&name, &a, &c, 10f64.powf(-12.0 + 6.0 * x))
                    .map(|_| ()),
                2 => b
                    .inductor(&name, &a, &c, 10f64.powf(-9.0 + 8.0 * x))
                    .map(|_| ()),
                _ => b
                    .vccs(&name, (&a, "gnd"), (&c, "gnd"), 10f64.powf(-4.0 + 4.0 * x))
                    .map(|_| ()),
            }
            .unwrap();
        }
        if vsource {
            b.voltage_source("V1", &node(0), "gnd", 1.0.into()).unwrap();
        } else {
            b.current_source("I1", "gnd", &node(0), Complex64::new(1e-3, 0.0))
                .unwrap();
        }
        System::assemble(&b.build().unwrap())
    }

    /// Every certified lane's residual, formed anyway, is below the refinement threshold:
    /// the certificate (a bound from the error analysis of LU) never lets through a solve
    /// the residual check would have refined or refused. Random networks, random
    /// frequencies, the chosen and the natural elimination orders, lanes of eight and one.
    fn certified_lanes_are_below_the_threshold<const N: usize>(
        sys: &System,
        omegas: &[f64],
        rhs: &[Complex64],
    ) {
        for order in [best_order::<N>(sys), std::array::from_fn(|i| i)] {
            let mut wide = LaneLu::<N, 8>::with_order(sys, &order);
            if LaneSolver::factor(&mut wide, omegas).is_ok() {
                let (certified, err) = certified_and_error(&wide, rhs);
                for l in 0..8 {
                    if certified[l] {
                        assert!(
                            err[l] <= RESIDUAL_LIMIT * 1e-3,
                            "n = {N}, ω = {}: {}",
                            omegas[l],
                            err[l]
                        );
                    }
                }
            }
            let mut one = LaneLu::<N, 1>::with_order(sys, &order);
            for &w in omegas {
                if LaneSolver::factor(&mut one, &[w]).is_ok() {
                    let (certified, err) = certified_and_error(&one, rhs);
                    assert!(!certified[0] || err[0] <= RESIDUAL_LIMIT * 1e-3);
                }
            }
        }
    }

    proptest::proptest! {
        #![proptest_config(proptest::prelude::ProptestConfig::with_cases(300))]
        #[test]
        fn a_certified_lane_needs_no_residual(
            nodes in 2usize..14,
            parts in proptest::collection::vec(
                (0u8..4, 0usize..14, 0usize..14, 0.0f64..1.0), 0..30),
            vsource in proptest::bool::ANY,
            exps in proptest::collection::vec(0.0f64..12.0, 8),
            rhs in proptest::collection::vec((-1.0f64..1.0, -1.0f64..1.0), 16),
        ) {
            let sys = random_network(nodes, &parts, vsource);
            let omegas: Vec<f64> = exps.iter().map(|e| 10f64.powf(*e)).collect();
            let rhs: Vec<Complex64> =
                rhs.iter().take(sys.n).map(|&(a, b)| Complex64::new(a, b)).collect();
            by_size!(sys.n, N => {
                certified_lanes_are_below_the_threshold::<N>(&sys, &omegas, &rhs);
            }, _ => {});
        }

        /// The same on Wilkinson's matrix with rounding (growth up to 2¹⁵): the bound holds
        /// where it matters, with errors far above the random networks'.
        #[test]
        fn the_growth_bound_holds_where_growth_is_large(
            n in 4usize..17,
            deltas in proptest::collection::vec(-0.05f64..0.05, 1..40),
            rhs in proptest::collection::vec((-1.0f64..1.0, -1.0f64..1.0), 16),
        ) {
            let sys = perturbed_wilkinson(n, &deltas);
            let rhs: Vec<Complex64> =
                rhs.iter().take(n).map(|&(a, b)| Complex64::new(a, b)).collect();
            let omegas = [1.0; 8];
            by_size!(n, N => {
                let mut lu = LaneLu::<N, 8>::with_order(&sys, &[]);
                LaneSolver::factor(&mut lu, &omegas).unwrap();
                certified_and_error(&lu, &rhs);
            }, _ => {});
        }
    }
}
