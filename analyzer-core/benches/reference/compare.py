#!/usr/bin/env python3
"""Side-by-side reference timing on the very matrices analyzer-core solves.

    pip install numpy scipy
    python3 analyzer-core/benches/reference/compare.py

It writes the systems with `cargo run --release --example dump_systems`, then times
* numpy's batched dense solve (numpy.linalg.solve on a stack of A(ω) = G + jωC, one per
  frequency, assembly included) for the small systems, and
* scipy's sparse LU (scipy.sparse.linalg.splu, SuperLU, per frequency) for the ladders,
and prints ns per point next to analyzer-core's own figures from `cargo bench --bench solve`
(the "point" and "sweep-10k" rows). General-purpose reference libraries; not needed by tests.
"""
import os, subprocess, sys, time, tempfile
import numpy as np
from scipy.sparse import csc_matrix
from scipy.sparse.linalg import splu

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..", ".."))


def load(path):
    with open(path) as f:
        n, nnz = map(int, f.readline().split())
        ent = np.loadtxt([f.readline() for _ in range(nnz)], ndmin=2)
        rhs = np.loadtxt([f.readline() for _ in range(n)], ndmin=2)
    r, c = ent[:, 0].astype(int), ent[:, 1].astype(int)
    return n, r, c, ent[:, 2], ent[:, 3], rhs[:, 0] + 1j * rhs[:, 1]


def dense_batched(n, r, c, g, cc, b, points=20000):
    w = 2 * np.pi * np.logspace(1, 5, points)
    t = time.perf_counter()
    A = np.zeros((points, n, n), dtype=complex)
    A[:, r, c] = g[None, :] + 1j * w[:, None] * cc[None, :]
    x = np.linalg.solve(A, np.broadcast_to(b, (points, n))[..., None])
    dt = time.perf_counter() - t
    assert np.all(np.isfinite(x))
    return dt / points * 1e9


def sparse_per_point(n, r, c, g, cc, b, points=5):
    w = 2 * np.pi * np.logspace(3, 6, points)
    t = time.perf_counter()
    for wk in w:
        A = csc_matrix((g + 1j * wk * cc, (r, c)), shape=(n, n))
        x = splu(A).solve(b)
    dt = time.perf_counter() - t
    assert np.all(np.isfinite(x))
    return dt / points * 1e9


def main():
    out = tempfile.mkdtemp()
    subprocess.run(["cargo", "run", "--release", "-q", "-p", "analyzer-core", "--example", "dump_systems", out],
                   cwd=ROOT, check=True)
    print("reference timings, ns per frequency point (assembly of A(ω) included)")
    for n in [3, 5, 9, 17, 33]:
        print(f"  {n:>3} unknowns  numpy batched solve      {dense_batched(*load(f'{out}/u{n}.txt')):12.0f}")
    for s in [1000, 10000, 100000]:
        print(f"  {s:>6} sections  scipy splu (SuperLU)   {sparse_per_point(*load(f'{out}/ladder{s}.txt')):12.0f}")
    print("compare with: cargo bench -p analyzer-core --bench solve -- 'point|sweep-10k'")


if __name__ == "__main__":
    sys.exit(main())
