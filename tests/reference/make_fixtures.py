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


if __name__ == "__main__":
    roots()
    main()
