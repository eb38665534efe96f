//! Banded LU with partial pivoting, after a bandwidth-reducing ordering.
//!
//! Ladders, lines and chains (the long generated networks that stand in for a cable, an
//! on-chip line or an RC chain) have unknowns that couple only to their neighbours along the
//! chain. Once the unknowns are put in that order, every entry of `A = G + jωC` lies within
//! `kl` diagonals below and `ku` above the main one, and LU with partial pivoting keeps `L`
//! within `kl` below and `U` within `kl + ku` above (Golub & Van Loan, *Matrix Computations*,
//! §4.3; LAPACK's `gbtf2`/`gbtrs` are the same scheme). Factoring costs about
//! `n·kl·(kl + ku)` complex multiply-adds and solving `n·(2kl + ku)`, with no pattern to
//! rediscover at each point: for a ladder (`kl = ku = 1`) that is within a small factor of a
//! plain tridiagonal solve.
//!
//! The order is the reverse Cuthill–McKee ordering of the pattern of `A + Aᵀ` (sprs), found
//! once per sweep with the band's width and the storage slot of every stored entry, and
//! shared by all workers. Row `i` of the band (in the new order) keeps columns
//! `i − kl ..= i + ku + kl` at offsets `0 ..= 2kl + ku`; `L`'s multipliers stay where they
//! were computed (row interchanges are applied to the right of the pivot only), so the
//! forward solve interleaves the interchanges with the eliminations, as `gbtrs` does.

use super::{PointSolver, Singular};
use crate::stamp::System;
use num_complex::Complex64;
use std::sync::Arc;

/// The ordering and band layout of one system, shared by every worker.
#[derive(Clone, Debug, PartialEq)]
pub struct BandLayout {
    n: usize,
    /// Diagonals below the main one.
    pub kl: usize,
    /// Diagonals above the main one (before pivoting adds `kl` more).
    pub ku: usize,
    /// Old index of the unknown at each new position.
    order: Vec<usize>,
    /// `G` and `C` in the new order as bands of `kl + ku + 1` entries per row (row i holds
    /// columns i − kl ..= i + ku), so forming `G + jωC` at a point is one streaming pass.
    g: Vec<f64>,
    c: Vec<f64>,
}

impl BandLayout {
    /// The reverse Cuthill–McKee order of `sys` and its band. None when the pattern does not
    /// make a valid matrix (which assembly never produces).
    pub fn new(sys: &System) -> Option<BandLayout> {
        let n = sys.n;
        // The symmetric pattern of A + Aᵀ, diagonal included, as CSR with sorted rows,
        // built in place (counted, filled, each row sorted and deduplicated): no list of
        // pairs twice the pattern's size is ever made.
        let entries = || {
            sys.pattern
                .iter()
                .flat_map(|&(r, c)| [(r, c), (c, r)])
                .chain((0..n).map(|i| (i, i)))
                .filter(|&(r, c)| r < n && c < n)
        };
        let mut start = vec![0usize; n + 1];
        for (r, _) in entries() {
            start[r + 1] += 1;
        }
        for i in 0..n {
            start[i + 1] += start[i];
        }
        let mut fill = start.clone();
        let mut all = vec![0usize; start[n]];
        for (r, c) in entries() {
            all[fill[r]] = c;
            fill[r] += 1;
        }
        drop(fill);
        let mut indptr = vec![0usize; n + 1];
        let mut kept = 0;
        for i in 0..n {
            let row = &mut all[start[i]..start[i + 1]];
            row.sort_unstable();
            let mut last = None;
            for k in start[i]..start[i + 1] {
                let c = all[k];
                if last != Some(c) {
                    all[kept] = c;
                    kept += 1;
                    last = Some(c);
                }
            }
            indptr[i + 1] = kept;
        }
        drop(start);
        all.truncate(kept);
        let indices = all;
        let data = vec![1u8; indices.len()];
        let pattern = sprs::CsMat::try_new((n, n), indptr, indices, data).ok()?;
        let order: Vec<usize> = if n == 0 {
            Vec::new()
        } else {
            sprs::linalg::reverse_cuthill_mckee(pattern.view())
                .perm
                .vec()
        };
        let mut position = vec![usize::MAX; n];
        for (new, &old) in order.iter().enumerate() {
            *position.get_mut(old)? = new;
        }
        if position.contains(&usize::MAX) {
            return None;
        }
        let (mut kl, mut ku) = (0, 0);
        for &(r, c) in &sys.pattern {
            let (i, j) = (position[r], position[c]);
            kl = kl.max(i.saturating_sub(j));
            ku = ku.max(j.saturating_sub(i));
        }
        let wa = kl + ku + 1;
        let (mut g, mut c) = (vec![0.0; n * wa], vec![0.0; n * wa]);
        for ((&(r, col), &gv), &cv) in sys.pattern.iter().zip(&sys.g).zip(&sys.c) {
            let (i, j) = (position[r], position[col]);
            let at = i * wa + (j + kl - i);
            g[at] += gv;
            c[at] += cv;
        }
        Some(BandLayout {
            n,
            kl,
            ku,
            order,
            g,
            c,
        })
    }

    /// The same ordering and band for `sys`, a system with the pattern this layout was
    /// made from but other values: only the values are laid out again.
    pub fn with_values(&self, sys: &System) -> Option<BandLayout> {
        let n = self.n;
        if sys.n != n {
            return None;
        }
        let mut position = vec![usize::MAX; n];
        for (new, &old) in self.order.iter().enumerate() {
            *position.get_mut(old)? = new;
        }
        let (kl, wa) = (self.kl, self.kl + self.ku + 1);
        let (mut g, mut c) = (vec![0.0; n * wa], vec![0.0; n * wa]);
        for ((&(r, col), &gv), &cv) in sys.pattern.iter().zip(&sys.g).zip(&sys.c) {
            let (i, j) = (*position.get(r)?, *position.get(col)?);
            if j + kl < i || j > i + self.ku {
                return None;
            }
            let at = i * wa + (j + kl - i);
            *g.get_mut(at)? += gv;
            *c.get_mut(at)? += cv;
        }
        Some(BandLayout {
            n,
            kl,
            ku: self.ku,
            order: self.order.clone(),
            g,
            c,
        })
    }

    /// Entries per row of the band storage.
    pub fn width(&self) -> usize {
        2 * self.kl + self.ku + 1
    }
}

/// Banded LU with partial pivoting at one frequency, with its own band storage.
pub struct BandLu {
    layout: Arc<BandLayout>,
    /// Row-major band: row i holds columns i − kl ..= i + ku + kl.
    ab: Vec<Complex64>,
    /// Row interchanged with row k at step k.
    ipiv: Vec<usize>,
    /// 1/U(k, k).
    inv_diag: Vec<Complex64>,
    /// Vectors in the band's order.
    work: Vec<Complex64>,
    work2: Vec<Complex64>,
    ok: bool,
}

impl BandLu {
    /// A solver with its own band storage for a system laid out by `layout`.
    pub fn new(layout: Arc<BandLayout>) -> Self {
        let n = layout.n;
        BandLu {
            ab: vec![Complex64::default(); n * layout.width()],
            ipiv: vec![0; n],
            inv_diag: vec![Complex64::default(); n],
            work: vec![Complex64::default(); n],
            work2: vec![Complex64::default(); n],
            layout,
            ok: false,
        }
    }
}

/// `1/z`: one division where |z|² can neither overflow nor underflow, else scaled by the
/// larger part first (two divisions).
#[inline]
fn recip(z: Complex64) -> Complex64 {
    let m = z.re.abs().max(z.im.abs());
    if (1e-150..1e150).contains(&m) {
        let d = 1.0 / (z.re * z.re + z.im * z.im);
        return Complex64::new(z.re * d, -z.im * d);
    }
    let inv_s = 1.0 / m;
    let (a, b) = (z.re * inv_s, z.im * inv_s);
    let d = inv_s / (a * a + b * b);
    Complex64::new(a * d, -b * d)
}

impl PointSolver for BandLu {
    fn factor(&mut self, omega: f64) -> Result<(), Singular> {
        let BandLayout {
            n,
            kl,
            ku,
            ref order,
            ref g,
            ref c,
        } = *self.layout;
        let (w, wa) = (2 * kl + ku + 1, kl + ku + 1);
        self.ok = false;
        // Row i of G + jωC goes into the band (with zeros where pivoting may fill in) just
        // before step i − kl first reads it, while the band's neighbourhood is in cache.
        let fill = |ab: &mut [Complex64], i: usize| {
            let (row, gr, cr) = (
                &mut ab[i * w..(i + 1) * w],
                &g[i * wa..(i + 1) * wa],
                &c[i * wa..(i + 1) * wa],
            );
            let (a, rest) = row.split_at_mut(wa);
            for ((v, &g), &c) in a.iter_mut().zip(gr).zip(cr) {
                *v = Complex64::new(g, omega * c);
            }
            rest.fill(Complex64::default());
        };
        for i in 0..kl.min(n) {
            fill(&mut self.ab, i);
        }
        let ab = &mut self.ab;
        let blame = |k: usize| Singular {
            column: order.get(k).copied().unwrap_or(k),
        };
        // Last column that row k may reach after the interchanges so far.
        let mut ju = 0;
        for k in 0..n {
            let last_row = (k + kl).min(n - 1);
            if k + kl < n {
                fill(ab, k + kl);
            }
            // Pivot: the largest |Re| + |Im| in column k on or below the diagonal (a NaN on
            // the diagonal stays the pivot and is reported).
            let d = ab[k * w + kl];
            let (mut p, mut best) = (k, d.re.abs() + d.im.abs());
            for i in k + 1..=last_row {
                let v = ab[i * w + k + kl - i];
                let m = v.re.abs() + v.im.abs();
                if m > best {
                    (p, best) = (i, m);
                }
            }
            if best == 0.0 || !best.is_finite() {
                return Err(blame(k));
            }
            self.ipiv[k] = p;
            ju = ju.max((p + ku).min(n - 1));
            if p != k {
                for j in k..=ju {
                    ab.swap(k * w + j + kl - k, p * w + j + kl - p);
                }
            }
            let inv = recip(ab[k * w + kl]);
            self.inv_diag[k] = inv;
            let (upper, lower) = ab.split_at_mut((k + 1) * w);
            let pivot_row = &upper[k * w + kl..k * w + kl + (ju - k) + 1];
            for i in k + 1..=last_row {
                let row = &mut lower[(i - k - 1) * w..(i - k) * w];
                let at = k + kl - i;
                let m = row[at] * inv;
                row[at] = m;
                if m.re == 0.0 && m.im == 0.0 {
                    continue;
                }
                // Columns k + 1 ..= ju of row i start at offset at + 1.
                for (x, &u) in row[at + 1..=at + (ju - k)].iter_mut().zip(&pivot_row[1..]) {
                    *x -= m * u;
                }
            }
        }
        self.ok = true;
        Ok(())
    }

    fn solve(&mut self, rhs: &mut [Complex64]) {
        let BandLayout {
            n,
            kl,
            ku,
            ref order,
            ..
        } = *self.layout;
        if !self.ok || rhs.len() != n {
            return;
        }
        let w = 2 * kl + ku + 1;
        let (ab, y) = (&self.ab, &mut self.work);
        for (v, &old) in y.iter_mut().zip(order) {
            *v = rhs[old];
        }
        // L: interchanges and eliminations in the order they were made.
        for k in 0..n {
            let p = self.ipiv[k];
            if p != k {
                y.swap(k, p);
            }
            let (head, tail) = y.split_at_mut(k + 1);
            let yk = head[k];
            if yk.re == 0.0 && yk.im == 0.0 {
                continue;
            }
            // Column k's multipliers sit in rows k + 1 ..= k + kl, one slot further left in
            // each row.
            for (t, yi) in tail.iter_mut().take(kl).enumerate() {
                *yi -= ab[(k + 1 + t) * w + kl - 1 - t] * yk;
            }
        }
        // U: back substitution over the widened upper band (diagonal at offset kl).
        for k in (0..n).rev() {
            let row = &ab[k * w + kl..(k + 1) * w];
            let (head, tail) = y.split_at_mut(k + 1);
            let mut s = head[k];
            for (u, &yj) in row[1..].iter().zip(tail.iter()) {
                s -= u * yj;
            }
            head[k] = s * self.inv_diag[k];
        }
        for (&v, &old) in y.iter().zip(order) {
            rhs[old] = v;
        }
    }

    fn solve_transposed(&mut self, rhs: &mut [Complex64]) {
        // LAPACK gbtrs with trans = 'T': Uᵀ forward, then Lᵀ backward with the interchanges
        // undone in reverse order. Aᵀ in band order is the band order of A transposed, so
        // the ordering maps vectors as in `solve`.
        let BandLayout {
            n,
            kl,
            ku,
            ref order,
            ..
        } = *self.layout;
        if !self.ok || rhs.len() != n {
            return;
        }
        let w = 2 * kl + ku + 1;
        let (ab, y) = (&self.ab, &mut self.work);
        for (v, &old) in y.iter_mut().zip(order) {
            *v = rhs[old];
        }
        // Uᵀ: column k of U, rows k − (kl + ku) ..= k − 1, is U(j, k) at row j, offset
        // kl + (k − j).
        for k in 0..n {
            let mut s = y[k];
            for j in k.saturating_sub(kl + ku)..k {
                s -= ab[j * w + kl + (k - j)] * y[j];
            }
            y[k] = s * self.inv_diag[k];
        }
        // Lᵀ: the multipliers of column k sit in rows k + 1 ..= k + kl.
        for k in (0..n).rev() {
            let mut s = y[k];
            for t in 0..kl.min(n - 1 - k) {
                s -= ab[(k + 1 + t) * w + kl - 1 - t] * y[k + 1 + t];
            }
            y[k] = s;
            let p = self.ipiv[k];
            if p != k {
                y.swap(k, p);
            }
        }
        for (&v, &old) in y.iter().zip(order) {
            rhs[old] = v;
        }
    }

    fn multiply(
        &mut self,
        _sys: &System,
        omega: f64,
        x: &[Complex64],
        y: &mut [Complex64],
        derivative_only: bool,
    ) {
        // In the band's order, streaming over the band of G and C.
        let layout = &*self.layout;
        let (n, kl, order) = (layout.n, layout.kl, &layout.order);
        let wa = kl + layout.ku + 1;
        let (g, c) = (&layout.g, &layout.c);
        if x.len() != n || y.len() != n {
            return;
        }
        let (xs, ys) = (&mut self.work, &mut self.work2);
        for (v, &old) in xs.iter_mut().zip(order) {
            *v = x[old];
        }
        for (i, ((out, g), c)) in ys
            .iter_mut()
            .zip(g.chunks_exact(wa))
            .zip(c.chunks_exact(wa))
            .enumerate()
        {
            // Row i holds columns i − kl ..= i + ku; those outside 0..n are not stored.
            let first = kl.saturating_sub(i);
            let last = wa.min(n + kl - i);
            let mut s = Complex64::default();
            for t in first..last {
                let a = if derivative_only {
                    Complex64::new(0.0, c[t])
                } else {
                    Complex64::new(g[t], omega * c[t])
                };
                s += a * xs[i + t - kl];
            }
            *out = s;
        }
        for (&v, &old) in ys.iter().zip(order) {
            y[old] = v;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::network::NetworkBuilder;
    use crate::solve::{PointSolver, SolverKind, SolverPlan};

    /// An LC grid three nodes across: inductors between neighbours, capacitors to ground,
    /// values spread so that near its many resonances a diagonal entry nearly cancels and
    /// partial pivoting must interchange rows all along the band (kl > 1).
    fn lc_grid(length: usize) -> System {
        let mut b = NetworkBuilder::new("lc grid");
        let name = |i: usize, j: usize| format!("g{i}_{j}");
        b.voltage_source("V1", "src", "gnd", 1.0.into()).unwrap();
        b.resistor("Rs", "src", &name(0, 0), 5.0).unwrap();
        for j in 0..length {
            for i in 0..3 {
                let k = (3 * j + i) as f64;
                b.capacitor(
                    &format!("C{i}_{j}"),
                    &name(i, j),
                    "gnd",
                    1e-9 * (1.0 + (k * 0.7).sin().abs()),
                )
                .unwrap();
                if i + 1 < 3 {
                    b.inductor(
                        &format!("La{i}_{j}"),
                        &name(i, j),
                        &name(i + 1, j),
                        1e-6 * (1.3 + (k * 1.1).cos()),
                    )
                    .unwrap();
                }
                if j + 1 < length {
                    b.inductor(
                        &format!("Lb{i}_{j}"),
                        &name(i, j),
                        &name(i, j + 1),
                        2e-6 * (1.2 + (k * 0.3).sin()),
                    )
                    .unwrap();
                }
            }
        }
        b.resistor("RL", &name(2, length - 1), "gnd", 50.0).unwrap();
        System::assemble(&b.build().unwrap())
    }

    /// Band LU with many row interchanges on a band wider than one diagonal solves `A·x = b`
    /// and `Aᵀ·y = b` as faer's dense LU does (the reference), at frequencies either side
    /// of and among the grid's resonances.
    #[test]
    fn interchanges_across_a_wide_band_match_dense_lu() {
        let sys = lc_grid(40);
        let layout = Arc::new(BandLayout::new(&sys).unwrap());
        assert!(layout.kl >= 2, "kl = {}", layout.kl);
        let dense = SolverPlan::new(&sys, SolverKind::Dense).unwrap();
        let b: Vec<Complex64> = (0..sys.n)
            .map(|i| Complex64::new(1.0 + 0.3 * i as f64, 0.2 - 0.05 * i as f64))
            .collect();
        let mut interchanges = 0;
        for f in [1e5, 2.1e6, 3.3e6, 4.7e6, 6.2e6, 9.9e6, 3e7] {
            let omega = 2.0 * std::f64::consts::PI * f;
            let mut band = BandLu::new(layout.clone());
            band.factor(omega).unwrap();
            interchanges += (0..sys.n).filter(|&k| band.ipiv[k] != k).count();
            let mut reference = dense.make();
            reference.factor(omega).unwrap();
            for transposed in [false, true] {
                let (mut x, mut r) = (b.clone(), b.clone());
                if transposed {
                    band.solve_transposed(&mut x);
                    reference.solve_transposed(&mut r);
                } else {
                    band.solve(&mut x);
                    reference.solve(&mut r);
                }
                let scale = r.iter().map(|v| v.norm()).fold(0.0, f64::max);
                for (u, v) in x.iter().zip(&r) {
                    assert!(
                        (u - v).norm() <= 1e-9 * scale,
                        "f = {f}, transposed = {transposed}: {u} vs {v}"
                    );
                }
            }
        }
        assert!(interchanges > 20, "only {interchanges} interchanges");
    }

    /// z · (1/z) = 1 across the whole double range, the scaled branch included: an
    /// unscaled |z|² would overflow above 1e154 and underflow below 1e-154.
    #[test]
    fn reciprocal_holds_over_the_double_range() {
        for scale in [1e-300, 1e-200, 1e-152, 1e-3, 1.0, 7e4, 1e152, 1e200, 1e300] {
            for (re, im) in [
                (1.0, 2.0),
                (-3.0, 0.5),
                (0.0, 1.0),
                (1.0, 0.0),
                (1.0, -1e-9),
            ] {
                let z = Complex64::new(re * scale, im * scale);
                let one = z * recip(z);
                assert!(
                    (one - Complex64::new(1.0, 0.0)).norm() < 4.0 * f64::EPSILON,
                    "{z}: {one}"
                );
            }
        }
    }
}
