//! faer's dense LU with partial pivoting, factoring in place into a reused workspace.

use super::{PointSolver, Singular};
use crate::stamp::System;
use faer::dyn_stack::{MemBuffer, MemStack, StackReq};
use faer::linalg::lu::partial_pivoting::{factor as dfactor, solve as dsolve};
use faer::{c64, Conj, MatMut, Par};
use num_complex::Complex64;

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
            dsolve::solve_transpose_in_place_scratch::<usize, c64>(n, 1, Par::Seq),
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

    fn solve_transposed(&mut self, rhs: &mut [Complex64]) {
        let n = self.sys.n;
        if rhs.len() != n {
            return;
        }
        let lu = faer::MatRef::from_column_major_slice(&self.a, n, n);
        let perm = faer::perm::PermRef::new_checked(&self.perm, &self.perm_inv, n);
        let stack = MemStack::new(&mut self.mem);
        let b = MatMut::from_column_major_slice_mut(rhs, n, 1);
        dsolve::solve_transpose_in_place_with_conj(lu, lu, perm, Conj::No, b, Par::Seq, stack);
    }
}
