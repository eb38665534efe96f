#!/usr/bin/env python3
"""Writes the reference fixtures in tests/fixtures/ from scipy.signal (a general-purpose
reference library). The tests read the committed CSV files; this script is needed only to
write them again:  pip install scipy numpy && python3 tests/reference/make_fixtures.py

Each fixture is an analog prototype from scipy.signal at the cut-off the tests use, with the
magnitude of H(jω) and the group delay τ(ω) = −dφ/dω computed analytically from the
transfer-function polynomials (numpy.polyder), not by differencing.
"""
import os
import numpy as np
from scipy import signal

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "..", "fixtures")


def analytic(b, a, w):
    s = 1j * w
    h = np.polyval(b, s) / np.polyval(a, s)
    # dH/dω = j·(b'(s)·a(s) − b(s)·a'(s)) / a(s)²
    db, da = np.polyder(b) if len(b) > 1 else np.array([0.0]), np.polyder(a)
    dh = 1j * (np.polyval(db, s) * np.polyval(a, s) - np.polyval(b, s) * np.polyval(da, s)) / np.polyval(a, s) ** 2
    tau = -np.imag(dh / h)
    return h, tau


def write(name, header, rows, note):
    path = os.path.join(OUT, name)
    with open(path, "w") as f:
        f.write(f"# {note}\n")
        f.write(",".join(header) + "\n")
        for r in rows:
            f.write(",".join(repr(float(x)) for x in r) + "\n")
    print("wrote", path)


def main():
    os.makedirs(OUT, exist_ok=True)
    fc = 1000.0
    wc = 2 * np.pi * fc
    f = np.logspace(np.log10(fc / 31.6), np.log10(fc * 31.6), 61)  # three decades around fc
    w = 2 * np.pi * f

    b, a = signal.butter(5, wc, btype="low", analog=True)
    h, tau = analytic(b, a, w)
    write("butterworth5_1khz.csv", ["frequency_hz", "magnitude", "group_delay_s"],
          zip(f, np.abs(h), tau),
          f"scipy.signal.butter(5, 2*pi*1000, analog=True), scipy {__import__('scipy').__version__}")

    b, a = signal.cheby1(3, 0.5, wc, btype="low", analog=True)
    h, tau = analytic(b, a, w)
    # cheby1 of odd order has |H(0)| = 1; the ripple band ends at wc, where |H| = -0.5 dB.
    write("chebyshev3_0p5db_1khz.csv", ["frequency_hz", "magnitude", "group_delay_s"],
          zip(f, np.abs(h), tau),
          f"scipy.signal.cheby1(3, 0.5, 2*pi*1000, analog=True), scipy {__import__('scipy').__version__}")


def write_roots(name, z, p, note):
    rows = [("pole", r.real, r.imag) for r in sorted(p, key=lambda r: (abs(r), r.imag))]
    rows += [("zero", r.real, r.imag) for r in sorted(z, key=lambda r: (abs(r), r.imag))]
    path = os.path.join(OUT, name)
    with open(path, "w") as f:
        f.write(f"# {note}\n")
        f.write("what,re_rad_per_s,im_rad_per_s\n")
        for w, re, im in rows:
            f.write(f"{w},{float(re)!r},{float(im)!r}\n")
    print("wrote", path)


def roots():
    """Poles and zeros (rad/s) of the analog prototypes the pole/zero checks realise."""
    wc = 2 * np.pi * 1000.0
    ver = __import__('scipy').__version__
    z, p, _ = signal.butter(5, wc, btype="low", analog=True, output="zpk")
    write_roots("butterworth5_1khz_roots.csv", z, p,
                f"scipy.signal.butter(5, 2*pi*1000, analog=True, output='zpk'), scipy {ver}")
    z, p, _ = signal.cheby1(3, 0.5, wc, btype="low", analog=True, output="zpk")
    write_roots("chebyshev3_0p5db_1khz_roots.csv", z, p,
                f"scipy.signal.cheby1(3, 0.5, 2*pi*1000, analog=True, output='zpk'), scipy {ver}")
    for n in (2, 3, 4, 5):
        z, p, _ = signal.bessel(n, 1.0, btype="low", analog=True, output="zpk", norm="delay")
        write_roots(f"bessel{n}_delay_roots.csv", z, p,
                    f"scipy.signal.bessel({n}, 1, analog=True, output='zpk', norm='delay') "
                    f"(normalised to 1 s of group delay at DC), scipy {ver}")


def two_port():
    """A lossy two-port solved by nodal analysis in scipy.linalg, independently of the
    project: ports at nodes a (z0 50 Ω) and b (z0 75 Ω) to ground; L1 = 2.2 µH from a to m,
    R1 = 4.7 Ω from m to x, C1 = 1 nF from x to ground, L2 = 3.3 µH from m to b,
    R2 = 330 Ω from b to ground. Y-parameters by eliminating the inner nodes m and x from the
    nodal admittance matrix (scipy.linalg.solve), Z = Y⁻¹, S by Kurokawa's power waves with
    real references, S = F·(Z − R)·(Z + R)⁻¹·F⁻¹ with F = diag(1/(2√z0)), R = diag(z0), and
    ABCD from Z (A = Z11/Z21, B = det Z/Z21, C = 1/Z21, D = Z22/Z21)."""
    from scipy import linalg
    l1, r1, c1, l2, r2 = 2.2e-6, 4.7, 1e-9, 3.3e-6, 330.0
    z0 = np.array([50.0, 75.0])
    rows = []
    for f in [1e5, 1e6, 3.3e6, 1e7, 4.7e7]:
        w = 2 * np.pi * f
        y1, y2, yr, yc, yr2 = 1 / (1j * w * l1), 1 / (1j * w * l2), 1 / r1, 1j * w * c1, 1 / r2
        # Node order: a, b (ports), m, x (inner).
        Y = np.array([
            [y1, 0, -y1, 0],
            [0, y2 + yr2, -y2, 0],
            [-y1, -y2, y1 + y2 + yr, -yr],
            [0, 0, -yr, yr + yc],
        ], dtype=complex)
        ypp, ypi, yip, yii = Y[:2, :2], Y[:2, 2:], Y[2:, :2], Y[2:, 2:]
        yparam = ypp - ypi @ linalg.solve(yii, yip)
        z = linalg.inv(yparam)
        fm = np.diag(1 / (2 * np.sqrt(z0)))
        rm = np.diag(z0)
        sm = fm @ (z - rm) @ linalg.inv(z + rm) @ linalg.inv(fm)
        abcd = np.array([z[0, 0] / z[1, 0], linalg.det(z) / z[1, 0], 1 / z[1, 0], z[1, 1] / z[1, 0]])
        row = [f]
        for m in (sm.flatten(), z.flatten(), yparam.flatten(), abcd):
            for v in m:
                row += [v.real, v.imag]
        rows.append(row)
    header = ["frequency_hz"]
    for name in ("s", "z", "y", "abcd"):
        for k in (["11", "12", "21", "22"] if name != "abcd" else ["a", "b", "c", "d"]):
            header += [f"{name}{k}_re", f"{name}{k}_im"]
    write("two_port_lossy_tee.csv", header, rows,
          "scipy.linalg nodal analysis of a lossy two-port (see two_port() in make_fixtures.py): S (power waves, z0 50/75), Z, Y, ABCD")


if __name__ == "__main__":
    roots()
    main()
    two_port()

