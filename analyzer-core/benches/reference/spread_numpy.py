#!/usr/bin/env python3
"""The tolerance-study benchmark's first case done by numpy, for the ratio in the closing note.

    pip install numpy
    python3 analyzer-core/benches/reference/spread_numpy.py [SAMPLES]

The fifth-order Butterworth ladder of `cargo bench --bench spread` (9 unknowns, modified
nodal analysis written out here by hand: 5 nodes, the source's and three inductors' branch
currents), 1 % resistors and 5 % L and C drawn uniformly, 501 log points from 10 kHz to
100 MHz. Per sample: assemble G + jωC at every point and solve the stack with
numpy.linalg.solve (batched LAPACK zgesv), then |H| in dB and the two limits checked at the
grid points. No refined figures, no residual check: numpy does less work than the study.
Two threads for BLAS, as the study uses two. A general-purpose reference; not a test.
"""
import os
import sys
import time

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "2"
import numpy as np  # noqa: E402


def main():
    samples = int(sys.argv[1]) if len(sys.argv) > 1 else 10_000
    r0, fc = 50.0, 1e6
    wc = 2 * np.pi * fc
    g = [2 * np.sin((2 * k - 1) * np.pi / 10) for k in range(1, 6)]
    L1, C2, L3, C4, L5 = g[0] * r0 / wc, g[1] / (r0 * wc), g[2] * r0 / wc, g[3] / (r0 * wc), g[4] * r0 / wc
    f = np.logspace(4, 8, 501)
    w = 2 * np.pi * f
    rng = np.random.default_rng(1)
    # Unknowns: v_src, v_n0, v_n1, v_n2, v_n3, i_V1, i_L1, i_L3, i_L5.
    n = 9
    t0 = time.perf_counter()
    passed = 0
    block = 500
    for start in range(0, samples, block):
        m = min(block, samples - start)
        rs = r0 * (1 + rng.uniform(-0.01, 0.01, m))
        rl = r0 * (1 + rng.uniform(-0.01, 0.01, m))
        l1, l3, l5 = (x * (1 + rng.uniform(-0.05, 0.05, m)) for x in (L1, L3, L5))
        c2, c4 = (x * (1 + rng.uniform(-0.05, 0.05, m)) for x in (C2, C4))
        a = np.zeros((m, len(w), n, n), dtype=complex)
        jw = 1j * w[None, :]

        def add(r, c, v):
            a[:, :, r, c] += v

        gs = (1 / rs)[:, None]
        add(0, 0, gs); add(1, 1, gs); add(0, 1, -gs); add(1, 0, -gs)
        gl = (1 / rl)[:, None]
        add(4, 4, gl)
        add(0, 5, 1); add(5, 0, 1)  # source branch: v_src = 1
        for k, (p, q, l) in enumerate([(1, 2, l1), (2, 3, l3), (3, 4, l5)]):
            b = 6 + k
            add(p, b, 1); add(q, b, -1); add(b, p, 1); add(b, q, -1)
            add(b, b, -jw * l[:, None])
        add(2, 2, jw * c2[:, None])
        add(3, 3, jw * c4[:, None])
        rhs = np.zeros((m, len(w), n, 1), dtype=complex)
        rhs[:, :, 5, 0] = 1.0
        x = np.linalg.solve(a, rhs)[..., 0]
        db = 20 * np.log10(np.abs(x[:, :, 4] / x[:, :, 0]))
        ok_pass = ((db[:, f <= 5e5] >= -6.5) & (db[:, f <= 5e5] <= -5.5)).all(axis=1)
        ok_stop = (db[:, f >= 3e6] <= -45).all(axis=1)
        passed += int((ok_pass & ok_stop).sum())
    secs = time.perf_counter() - t0
    print(
        f"numpy: {samples} samples x {len(w)} points: {secs:.2f} s "
        f"({secs / (samples * len(w)) * 1e6:.2f} us per point); yield {passed} of {samples}"
    )


if __name__ == "__main__":
    main()
