//! faer's sparse LU: the symbolic analysis once per sweep, shared by every worker; only the
//! numeric factorisation per point.

use super::{PointSolver, Singular};
use crate::stamp::System;
use faer::dyn_stack::{MemBuffer, MemStack, StackReq};
use faer::sparse::linalg::lu::{factorize_symbolic_lu, LuSymbolicParams, NumericLu, SymbolicLu};
use faer::sparse::{SparseColMatRef, SymbolicSparseColMat};
use faer::{c64, Conj, MatMut, Par};
use num_complex::Complex64;
use std::sync::Arc;

pub(super) struct SparseShared {
    pattern: SymbolicSparseColMat<usize>,
    symbolic: SymbolicLu<usize>,
}

impl SparseShared {
    pub(super) fn new(sys: &System) -> Result<Self, Singular> {
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
    pub(super) fn new(sys: &'a System, shared: Arc<SparseShared>) -> Self {
        let req = StackReq::any_of(&[
            shared
                .symbolic
                .factorize_numeric_lu_scratch::<c64>(Par::Seq, Default::default()),
            shared.symbolic.solve_in_place_scratch::<c64>(1, Par::Seq),
            shared
                .symbolic
                .solve_transpose_in_place_scratch::<c64>(1, Par::Seq),
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

    fn solve_transposed(&mut self, rhs: &mut [Complex64]) {
        let n = self.sys.n;
        if !self.ok || rhs.len() != n {
            return;
        }
        let stack = MemStack::new(&mut self.mem);
        let lu =
            faer::sparse::linalg::lu::LuRef::new_unchecked(&self.shared.symbolic, &self.numeric);
        let b = MatMut::from_column_major_slice_mut(rhs, n, 1);
        lu.solve_transpose_in_place_with_conj(Conj::No, b, Par::Seq, stack);
    }
}
