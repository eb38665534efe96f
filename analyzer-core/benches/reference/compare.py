#!/usr/bin/env python3
"""Side-by-side timing: analyzer-core against general-purpose reference libraries, on the
very matrices analyzer-core solves, in one run.

    pip install numpy scipy
    python3 analyzer-core/benches/reference/compare.py [--end-to-end]

It writes the systems with `cargo run --release --example dump_systems`, times analyzer-core
with `cargo bench --bench per_point` (whole solve-only sweeps, 1 and 2 threads, fastest
of several runs), then times (fastest of several runs),
with one thread each (assembly of A(ω) = G + jωC included in every figure):
* numpy's batched dense solve (numpy.linalg.solve on a stack of A(ω)) for the small systems;
* scipy's sparse LU (scipy.sparse.linalg.splu, SuperLU) per frequency for the ladders;
* the floor for a ladder's shape: the same matrix put in reverse Cuthill-McKee order
  (scipy.sparse.csgraph), where it is tridiagonal, and solved per frequency by LAPACK's
  tridiagonal solver with partial pivoting (scipy.linalg.lapack.zgtsv).
and prints ns per point with the ratios the performance targets are stated in.

Last, end to end on a very large design: a generated RC line of 100,000 sections (200,002
parts, 12 MB of TOML, the design `cargo bench --bench front_end` reads). Ours is the whole
command `analyzer sweep FILE --no-plot -q` (read, check, assemble, order, solve 19 points,
figures, CSV), wall clock; scipy's is only its sparse LU on the same 19 frequencies,
assembly of A(ω) included.
General-purpose reference libraries; not needed by the tests.
"""
import os

# One thread for the reference libraries, set before numpy loads its BLAS.
for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"
os.environ.pop("OPENBLAS_CORETYPE", None)
os.environ.pop("OPENBLAS_L2_SIZE", None)

import subprocess, sys, time, tempfile
import numpy as np
from scipy.sparse import csc_matrix, csr_matrix
from scipy.sparse.csgraph import reverse_cuthill_mckee
from scipy.sparse.linalg import splu
from scipy.linalg.lapack import zgtsv

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..", ".."))


def load(path):
    with open(path) as f:
        n, nnz = map(int, f.readline().split())
        ent = np.loadtxt([f.readline() for _ in range(nnz)], ndmin=2)
        rhs = np.loadtxt([f.readline() for _ in range(n)], ndmin=2)
    r, c = ent[:, 0].astype(int), ent[:, 1].astype(int)
    return n, r, c, ent[:, 2], ent[:, 3], rhs[:, 0] + 1j * rhs[:, 1]


def fastest(f, runs):
    # The least disturbed run: on a shared machine noise only adds time.
    return min(f() for _ in range(runs))


def dense_batched(n, r, c, g, cc, b, points=20000):
    w = 2 * np.pi * np.logspace(1, 5, points)

    def once():
        t = time.perf_counter()
        A = np.zeros((points, n, n), dtype=complex)
        A[:, r, c] = g[None, :] + 1j * w[:, None] * cc[None, :]
        x = np.linalg.solve(A, np.broadcast_to(b, (points, n))[..., None])
        dt = time.perf_counter() - t
        assert np.all(np.isfinite(x))
        return dt / points * 1e9

    return fastest(once, 5)


def sparse_per_point(n, r, c, g, cc, b, points):
    w = 2 * np.pi * np.logspace(3, 6, points)

    def once():
        t = time.perf_counter()
        for wk in w:
            A = csc_matrix((g + 1j * wk * cc, (r, c)), shape=(n, n))
            x = splu(A).solve(b)
        dt = time.perf_counter() - t
        assert np.all(np.isfinite(x))
        return dt / points * 1e9

    return fastest(once, 3)


def tridiagonal_floor(n, r, c, g, cc, b, points):
    """zgtsv on the matrix in reverse Cuthill-McKee order, assembly of the three diagonals
    and the permutation of b and x included."""
    pattern = csr_matrix((np.ones(len(r)), (r, c)), shape=(n, n))
    perm = reverse_cuthill_mckee((pattern + pattern.T).tocsr(), symmetric_mode=True)
    pos = np.empty(n, dtype=int)
    pos[perm] = np.arange(n)
    i, j = pos[r], pos[c]
    assert np.max(np.abs(i - j)) <= 1, "not tridiagonal in RCM order"
    # G and C on the three diagonals in that order (the pattern has no duplicates), laid out
    # once, as any tridiagonal code would keep them; per point only A(ω) = G + jωC is formed.
    def diagonal(mask, at, size):
        gd, cd = np.zeros(size), np.zeros(size)
        gd[at[mask]] = g[mask]
        cd[at[mask]] = cc[mask]
        return gd, cd
    (gl, cl), (gm, cm), (gu, cu) = (diagonal(j == i - 1, j, n - 1), diagonal(j == i, i, n),
                                    diagonal(j == i + 1, i, n - 1))
    bp = b[perm]
    w = 2 * np.pi * np.logspace(3, 6, points)

    def once():
        t = time.perf_counter()
        for wk in w:
            _, _, _, y, info = zgtsv(gl + 1j * wk * cl, gm + 1j * wk * cm, gu + 1j * wk * cu, bp)
            assert info == 0
            x = np.empty(n, dtype=complex)
            x[perm] = y
        dt = time.perf_counter() - t
        assert np.all(np.isfinite(x))
        return dt / points * 1e9

    return fastest(once, 3)


def ours():
    """analyzer-core's per-point figures:
    {system: (unknowns, path, ns 1 thread, ns 2 threads, speed-up)}."""
    out = subprocess.run(
        ["cargo", "bench", "-q", "-p", "analyzer-core", "--bench", "per_point"],
        cwd=ROOT, check=True, capture_output=True, text=True).stdout
    rows = {}
    for line in out.splitlines():
        parts = line.split()
        if len(parts) == 6:
            rows[parts[0]] = (int(parts[1]), parts[2], float(parts[3]), float(parts[4]),
                              float(parts[5]))
    return rows


def rc_line(path, sections):
    """The RC line design of benches/front_end.rs, written to `path`."""
    with open(path, "w") as f:
        f.write('title = "RC line (benchmark)"\n[sweep]\nfrom = "1 kHz"\nto = "100 MHz"\n'
                'per_decade = 3.6\n[parts]\nV1 = { voltage = "1 V", between = ["n0", "gnd"] }\n')
        for k in range(sections):
            f.write(f'R{k} = {{ resistor = "10", between = ["n{k}", "n{k + 1}"] }}\n'
                    f'C{k} = {{ capacitor = "1p", between = ["n{k + 1}", "gnd"] }}\n')
        f.write(f'RL = {{ resistor = "1k", between = ["n{sections}", "gnd"] }}\n[responses]\n'
                f'gain = {{ ratio = ["n{sections}", "n0"] }}\n')


def end_to_end(out, sections=100_000):
    design = f"{out}/rc_line.toml"
    rc_line(design, sections)
    subprocess.run(["cargo", "build", "--release", "-q", "-p", "analyzer-cli"], cwd=ROOT,
                   check=True)
    subprocess.run(["cargo", "run", "--release", "-q", "-p", "analyzer-core", "--example",
                    "dump_systems", out, design, "rc_line"], cwd=ROOT, check=True,
                   capture_output=True)
    exe = os.path.join(ROOT, "target", "release", "analyzer")

    def run_ours():
        t = time.perf_counter()
        subprocess.run([exe, "sweep", design, "--no-plot", "-q", "-o", f"{out}/rc_out"],
                       check=True)
        return time.perf_counter() - t

    mine = fastest(run_ours, 7)
    n, r, c, g, cc, b = load(f"{out}/rc_line.txt")
    # The sweep's 19 frequencies: 1 kHz to 100 MHz at 3.6 per decade, both ends exact.
    w = 2 * np.pi * np.logspace(3, 8, 19)

    def run_scipy():
        t = time.perf_counter()
        for wk in w:
            A = csc_matrix((g + 1j * wk * cc, (r, c)), shape=(n, n))
            x = splu(A).solve(b)
        assert np.all(np.isfinite(x))
        return time.perf_counter() - t

    ref = fastest(run_scipy, 3)
    print(f"end to end, RC line of {sections} sections ({n} unknowns, 19 points): ours "
          f"{mine * 1e3:.0f} ms (whole command), scipy splu {ref * 1e3:.0f} ms (solve and "
          f"assembly only): {ref / mine:.1f}x")


def main():
    out = tempfile.mkdtemp()
    if "--end-to-end" in sys.argv:
        end_to_end(out)
        return

    subprocess.run(["cargo", "run", "--release", "-q", "-p", "analyzer-core", "--example",
                    "dump_systems", out], cwd=ROOT, check=True, capture_output=True)
    mine = ours()
    print("ns per frequency point (assembly of A(ω) included); reference libraries on 1 thread")
    print(f"{'system':>14} {'n':>7} {'path':>6} {'ours 1t':>12} {'ours 2t':>12} "
          f"{'reference':>12}  ratio (reference / ours 2t)")
    for name, (n, path, one, two, _) in mine.items():
        sysf = f"{out}/{name}.txt"
        if not os.path.exists(sysf):
            continue
        data = load(sysf)
        if name.startswith("u"):
            ref = dense_batched(*data)
            print(f"{name:>14} {n:>7} {path:>6} {one:>12.0f} {two:>12.0f} {ref:>12.0f}  "
                  f"{ref / two:6.1f}x numpy batched solve")
        else:
            pts = 5 if n < 100_000 else 3
            ref = sparse_per_point(*data, points=pts)
            floor = tridiagonal_floor(*data, points=pts)
            print(f"{name:>14} {n:>7} {path:>6} {one:>12.0f} {two:>12.0f} {ref:>12.0f}  "
                  f"{ref / two:6.1f}x scipy splu")
            print(f"{'':>14} {'':>7} {'':>6} {'':>12} {'':>12} {floor:>12.0f}  "
                  f"floor zgtsv (1 thread); ours/floor: 1 thread {one / floor:.2f}x, "
                  f"2 threads against floor/2 {two / (floor / 2):.2f}x")
    print("two threads against one (ours, fastest runs): " + ", ".join(
        f"{k} {v[4]:.2f}x" for k, v in mine.items()))
    end_to_end(out)


if __name__ == "__main__":
    sys.exit(main())
