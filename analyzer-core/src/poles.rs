//! Poles and zeros of every response, from the pencil of the network itself.
//!
//! The network obeys `(G + sC)·x = b`. Its natural frequencies are the values of `s` where
//! `det(G + sC) = 0`: the finite generalized eigenvalues of the pencil `(G, −C)`. A response
//! read as `q(s)ᵀ·x + k` (a node voltage, a part's current, possibly with a constant) under
//! excitation `b` has, by the Schur complement,
//!
//! ```text
//! det [ G + sC    b ]  =  det(G + sC) · (k + q(s)ᵀ (G + sC)⁻¹ b)
//!     [ −q(s)ᵀ    k ]
//! ```
//!
//! so its zeros are the finite eigenvalues of this bordered pencil (the invariant zeros of
//! that input/output pair). A ratio `N/D` of two read-outs of one excitation has the zeros of
//! `N` as zeros and the zeros of `D` as poles (for a voltage ratio against an ideal source,
//! `D` is constant and its bordered pencil gives back the natural frequencies); a
//! driving-point impedance under a test current has the natural frequencies as poles; an
//! admittance swaps the two. Pole–zero pairs that coincide within [`CANCEL_TOL`] (relative)
//! are modes the response cannot see: they are dropped, and counted.
//!
//! The eigenvalues come from a shifted and inverted standard eigenproblem: on the scaled
//! pencil `A + λB`, with a real shift σ where `A + σB` is regular, the eigenvalues μ of
//! `(A + σB)⁻¹B` give `λ = σ − 1/μ`, and μ = 0 are the infinite eigenvalues MNA pencils have
//! many of (every branch row without a `C` term). Columns of `B` that are zero (unknowns no
//! capacitor or inductor touches) are zero columns of `(A + σB)⁻¹B` too, whose eigenvalues
//! are then those of the square block on the other columns and exact zeros: the eigensolver
//! works on that block alone (half the order on a ladder). faer's LU and its standard
//! eigensolver do the work (its generalized QZ, tried first, left eigenvalues unset without
//! eigenvectors and took seconds with them on MNA pencils of 90 unknowns). Frequency is
//! measured in units of `ω_s` (the sweep's geometric centre), and rows and columns are
//! equilibrated by powers of two first, which changes no eigenvalue but puts entries as
//! different as 1/R ≈ 1e-4 S, ωC ≈ 1e-9 and an op-amp's 1e5 on one footing. A root of the
//! scaled pencil is
//!
//! * infinite when `|λ| > 1/INFINITE_TOL` (six decades above ω_s: a block of k infinite
//!   eigenvalues comes out of any backward-stable eigensolver perturbed to about ε^(−1/k));
//! * at the origin when `|λ| ≤ ORIGIN_TOL` (six decades below ω_s: a root of multiplicity m
//!   at the origin comes out split by about ε^(1/m), 1e-8 for a double root).
//!
//! So the tool sees roots within six decades of the sweep's centre; further ones are taken
//! as at the origin or at infinity. The number of finite zeros is checked against the
//! response's slope measured three decades above its poles, and candidates beyond it (the
//! largest) are counted as at infinity.
//!
//! A read-out that is zero at every frequency (a balanced bridge) makes its pencil singular
//! for every `s`; that is found by solving the network at two frequencies instead, and such a
//! response is reported as identically zero, with no poles or zeros.
//!
//! Dense eigenvalues cost O(n³): networks above [`MAX_UNKNOWNS`] unknowns are refused with
//! the reason (measured, see the constant), and their figures rely on the sweep and the
//! solver alone.

use crate::response::Analysis;
use crate::stamp::{Readout, System};
use faer::c64;
use num_complex::Complex64;
use serde::Serialize;
use std::f64::consts::PI;

/// Largest system (unknowns) whose poles and zeros are computed: a response's two dense
/// eigenproblems (its numerator's and denominator's bordered pencils) took 0.97 s at 753
/// unknowns on the 2-core CI machine, 0.51 s at 603 and 0.11 s at 303
/// (`cargo bench -p analyzer-core --bench poles`, 2026-12-03); with the eigensolver on the
/// storage columns alone (2026-12-04) 0.25 s at 603 and 0.06 s at 303. The limit was left
/// where it was (it decides which designs get a pole table).
pub const MAX_UNKNOWNS: usize = 750;

/// Relative distance within which a pole and a zero cancel.
pub const CANCEL_TOL: f64 = 1e-6;

/// `|β| ≤ INFINITE_TOL·|α|`: the eigenvalue is infinite.
pub const INFINITE_TOL: f64 = 1e-6;

/// `|λ| ≤ ORIGIN_TOL` (scaled): the eigenvalue is at `s = 0`.
pub const ORIGIN_TOL: f64 = 1e-6;

/// `|Re s| ≤ AXIS_TOL·|s|` (Q ≥ 5·10⁸): a complex pair is on the jω axis. A lossless
/// resonator's poles (an LC network with no resistance in its loop) or a balanced notch's
/// zeros come out of the eigensolver with a real part of a few ε·|s| and either sign
/// (measured: 5e-16 and 8e-16 of |s| on a lossless two-section LC ladder), which would read
/// as a Q of 10¹⁵ and, half the time, as an unstable pole. No physical resonator comes near
/// this Q (a quartz crystal's is about 10⁶, common practice), so the margin to the roots'
/// accuracy is wide on both sides.
pub const AXIS_TOL: f64 = 1e-9;

/// Why poles and zeros were not computed.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum PoleError {
    /// The system is too large for the dense eigenproblems.
    #[error("poles and zeros are not computed for {unknowns} unknowns: the dense eigenproblems are limited to {limit} unknowns (about 1 s per response on a 2-core machine); the figures come from the sweep and re-solves alone")]
    TooLarge {
        /// Unknowns of the system.
        unknowns: usize,
        /// The limit.
        limit: usize,
    },
    /// The eigenvalue iteration did not converge.
    #[error("the eigenvalue iteration did not converge")]
    NoConvergence,
    /// The pencil is singular for every s (found while shifting).
    #[error("the pencil is singular at every frequency")]
    Singular,
    /// No such response.
    #[error("no response {0}")]
    NoResponse(usize),
}

/// The finite roots of one pencil, and what was left out.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Roots {
    /// Finite roots (rad/s), ascending in |s| then in imaginary part.
    pub finite: Vec<Complex64>,
    /// Eigenvalues found infinite.
    pub infinite: usize,
    /// Eigenvalues found indeterminate (α and β both at rounding level).
    pub indeterminate: usize,
}

/// Poles and zeros of one response.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct PoleZero {
    /// Poles (rad/s) after cancellation.
    pub poles: Vec<Complex64>,
    /// Zeros (rad/s) after cancellation.
    pub zeros: Vec<Complex64>,
    /// Pole–zero pairs dropped as cancelling.
    pub cancelled: usize,
    /// Whether the response is zero at every frequency (its numerator pencil is singular).
    pub identically_zero: bool,
    /// Large candidate roots dropped as perturbed roots at infinity (see [`pole_zero`]).
    pub at_infinity: usize,
    /// Whether the count of finite roots could not be checked against the measured slope
    /// (the response is below the double range three decades above its poles): zeros at
    /// infinity may then show as large finite ones.
    pub unverified: bool,
}

/// One pole or zero as a table shows it: a real root as a corner frequency, a complex pair
/// once with its natural frequency and Q.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct RootRow {
    /// "pole" or "zero".
    pub what: &'static str,
    /// Real part of s (rad/s); for a pair, of its upper member.
    pub s_re: f64,
    /// Imaginary part of s (rad/s), ≥ 0.
    pub s_im: f64,
    /// |s|/2π (Hz): the corner of a real root, the natural frequency f0 of a pair.
    pub f0_hz: f64,
    /// Q = |s|/(2|Re s|) of a pair as computed (None for a real root; infinite when Re s
    /// is exactly 0). Above 5·10⁸ it is rounding, not a quality factor: see `on_axis`.
    pub q: Option<f64>,
    /// Whether it is a complex pair.
    pub pair: bool,
    /// A pair whose real part is within [`AXIS_TOL`] of |s|: on the jω axis (a lossless
    /// resonance, a perfect notch), where the computed sign of Re s means nothing.
    pub on_axis: bool,
    /// Re s > 0 beyond the jω axis's tolerance: an unstable pole, or a right-half-plane zero.
    pub right_half_plane: bool,
    /// At s = 0.
    pub origin: bool,
}

impl PoleZero {
    /// The rows of the table: poles first, then zeros, each ascending in frequency.
    pub fn rows(&self) -> Vec<RootRow> {
        let mut out = rows("pole", &self.poles);
        out.extend(rows("zero", &self.zeros));
        out
    }

    /// Complex pole pairs with Q above `q_min` and zero pairs with Q above `q_min` (near the
    /// jω axis), as (natural frequency in Hz, Q, is a pole): the seeds of the figures'
    /// searches for peaks, notches and resonances. A pole pair on the jω axis is left out:
    /// the response is infinite there (a ratio's denominator vanishes, and a probe at that
    /// very frequency is refused), so a scan around it has nothing to refine.
    pub fn seeds(&self, q_min: f64) -> Vec<(f64, f64, bool)> {
        let mut out = Vec::new();
        for (set, pole) in [(&self.poles, true), (&self.zeros, false)] {
            for r in rows("", set) {
                if pole && r.on_axis {
                    continue;
                }
                if let Some(q) = r.q {
                    if q > q_min {
                        out.push((r.f0_hz, q, pole));
                    }
                }
            }
        }
        out
    }

    /// Roots at s = 0: zeros minus poles (the low-frequency slope in units of 20 dB/decade).
    pub fn slope_at_dc(&self) -> i64 {
        let count = |v: &[Complex64]| v.iter().filter(|s| s.norm() == 0.0).count() as i64;
        count(&self.zeros) - count(&self.poles)
    }

    /// Finite zeros minus finite poles (the slope as ω → ∞, in units of 20 dB/decade).
    pub fn slope_at_infinity(&self) -> i64 {
        self.zeros.len() as i64 - self.poles.len() as i64
    }

    /// The largest and smallest nonzero |s| (rad/s) among poles and zeros, if any.
    pub fn span(&self) -> Option<(f64, f64)> {
        let m: Vec<f64> = self
            .poles
            .iter()
            .chain(&self.zeros)
            .map(|s| s.norm())
            .filter(|&m| m > 0.0)
            .collect();
        let lo = m.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = m.iter().copied().fold(0.0, f64::max);
        (hi > 0.0).then_some((lo, hi))
    }
}

fn rows(what: &'static str, set: &[Complex64]) -> Vec<RootRow> {
    let mut out: Vec<RootRow> = set
        .iter()
        .filter(|s| s.im >= 0.0)
        .map(|s| {
            let pair = s.im > 0.0;
            let m = s.norm();
            let on_axis = pair && s.re.abs() <= AXIS_TOL * m;
            RootRow {
                what,
                s_re: s.re,
                s_im: s.im,
                f0_hz: m / (2.0 * PI),
                q: pair.then(|| {
                    if s.re == 0.0 {
                        f64::INFINITY
                    } else {
                        m / (2.0 * s.re.abs())
                    }
                }),
                pair,
                on_axis,
                right_half_plane: s.re > 0.0 && !on_axis,
                origin: m == 0.0,
            }
        })
        .collect();
    out.sort_by(|a, b| a.f0_hz.total_cmp(&b.f0_hz));
    out
}

/// A dense pencil `A + s·B` of order m (column-major), complex in general.
struct Pencil {
    m: usize,
    a: Vec<c64>,
    b: Vec<c64>,
}

impl Pencil {
    /// `G + sC` of the system, bordered (when given) by the excitation `rhs` as a last column
    /// and `−q(s)ᵀ` as a last row with the constant `k` in the corner.
    fn new(sys: &System, border: Option<(&[Complex64], &Readout, Complex64)>) -> Pencil {
        let n = sys.n;
        let m = n + usize::from(border.is_some());
        let mut a = vec![c64::new(0.0, 0.0); m * m];
        let mut b = vec![c64::new(0.0, 0.0); m * m];
        for (k, &(r, c)) in sys.pattern.iter().enumerate() {
            if r < n && c < n {
                a[c * m + r] += sys.g[k];
                b[c * m + r] += sys.c[k];
            }
        }
        if let Some((rhs, q, k)) = border {
            for (r, v) in rhs.iter().enumerate().take(n) {
                a[n * m + r] = *v;
            }
            for &(c, w) in &q.g {
                if c < n {
                    a[c * m + n] -= w;
                }
            }
            for &(c, w) in &q.c {
                if c < n {
                    b[c * m + n] -= w;
                }
            }
            a[n * m + n] = k;
        }
        Pencil { m, a, b }
    }

    fn is_real(&self) -> bool {
        self.a.iter().chain(&self.b).all(|z| z.im == 0.0)
    }

    /// Scales B by ω_s and equilibrates rows and columns of |A| + |B| by powers of two.
    fn scale(&mut self, omega_s: f64) {
        let m = self.m;
        for v in &mut self.b {
            *v *= omega_s;
        }
        let mag = |z: c64| z.re.abs() + z.im.abs();
        let pow2 = |x: f64| {
            if x > 0.0 && x.is_finite() {
                (2f64).powi(-(x.log2().round() as i32))
            } else {
                1.0
            }
        };
        for _ in 0..8 {
            let mut row = vec![0.0f64; m];
            for c in 0..m {
                for (r, rv) in row.iter_mut().enumerate() {
                    let k = c * m + r;
                    *rv = rv.max(mag(self.a[k]) + mag(self.b[k]));
                }
            }
            for rv in row.iter_mut() {
                *rv = pow2(*rv);
            }
            let mut changed = row.iter().any(|&f| f != 1.0);
            if changed {
                for c in 0..m {
                    for (r, &f) in row.iter().enumerate() {
                        self.a[c * m + r] *= f;
                        self.b[c * m + r] *= f;
                    }
                }
            }
            for c in 0..m {
                let col = (0..m)
                    .map(|r| mag(self.a[c * m + r]) + mag(self.b[c * m + r]))
                    .fold(0.0, f64::max);
                let f = pow2(col);
                if f != 1.0 {
                    changed = true;
                    for r in 0..m {
                        self.a[c * m + r] *= f;
                        self.b[c * m + r] *= f;
                    }
                }
            }
            // Scaling by 1 changes nothing: a pass that moved nothing ends the balancing.
            if !changed {
                break;
            }
        }
    }

    /// The finite eigenvalues of the pencil, `det(A + λB) = 0`, by a shifted and inverted
    /// standard eigenproblem: with a shift σ where `A + σB` is regular,
    /// `(A + λB)v = 0 ⇔ (A + σB)⁻¹B·v = μ·v` with `μ = −1/(λ − σ)`, so the finite
    /// eigenvalues are `λ = σ − 1/μ` and the infinite ones are `μ = 0`. The shift is real
    /// and in the right half-plane (σ = 1, i.e. ω_s, or nearby should that be an
    /// eigenvalue), so a real pencil stays a real problem. Returns the λ of every μ (infinite
    /// ones as non-finite values) and whether the pencil is singular for every λ.
    fn eigenvalues(&self) -> Result<Vec<c64>, PoleError> {
        use faer::linalg::solvers::Solve;
        let m = self.m;
        if m == 0 {
            return Ok(Vec::new());
        }
        // The columns J of B holding a nonzero. K = (A + σB)⁻¹B is zero in every other
        // column, so with J first K is block lower triangular, [[K_JJ, 0], [K_IJ, 0]]: its
        // eigenvalues are those of K_JJ and m − |J| exact zeros (infinite λ). MNA pencils
        // have many such columns (every unknown no capacitor or inductor touches), and the
        // eigensolver then works on the dynamic part alone.
        let cols: Vec<usize> = (0..m)
            .filter(|&c| {
                self.b[c * m..(c + 1) * m]
                    .iter()
                    .any(|z| z.re != 0.0 || z.im != 0.0)
            })
            .collect();
        let r = cols.len();
        for sigma in [1.0, 1.37, 0.61, 2.3, 0.29] {
            let shifted: Vec<c64> = self
                .a
                .iter()
                .zip(&self.b)
                .map(|(a, b)| a + b * sigma)
                .collect();
            let mut mu = if self.is_real() {
                let s = faer::Mat::<f64>::from_fn(m, m, |r, c| shifted[c * m + r].re);
                let lu = s.partial_piv_lu();
                if !regular(lu.U().diagonal().column_vector().iter().map(|d| d.abs())) {
                    continue;
                }
                if r == 0 {
                    Vec::new()
                } else {
                    let b = faer::Mat::<f64>::from_fn(m, r, |i, k| self.b[cols[k] * m + i].re);
                    let x = lu.solve(&b);
                    let k = faer::Mat::<f64>::from_fn(r, r, |i, j| x[(cols[i], j)]);
                    k.eigenvalues().map_err(|_| PoleError::NoConvergence)?
                }
            } else {
                let s = faer::Mat::<c64>::from_fn(m, m, |r, c| shifted[c * m + r]);
                let lu = s.partial_piv_lu();
                if !regular(lu.U().diagonal().column_vector().iter().map(|d| d.norm())) {
                    continue;
                }
                if r == 0 {
                    Vec::new()
                } else {
                    let b = faer::Mat::<c64>::from_fn(m, r, |i, k| self.b[cols[k] * m + i]);
                    let x = lu.solve(&b);
                    let k = faer::Mat::<c64>::from_fn(r, r, |i, j| x[(cols[i], j)]);
                    k.eigenvalues().map_err(|_| PoleError::NoConvergence)?
                }
            };
            mu.resize(m, c64::new(0.0, 0.0));
            return Ok(mu
                .into_iter()
                .map(|mu| {
                    if mu.norm() == 0.0 {
                        c64::new(f64::INFINITY, 0.0)
                    } else {
                        c64::new(sigma, 0.0) - mu.inv()
                    }
                })
                .collect());
        }
        // Singular at every shift tried: a pencil singular for every λ.
        Err(PoleError::Singular)
    }
}

/// Whether LU pivots (magnitudes) show a regular matrix: none zero or below 1e-13 of the
/// largest.
fn regular(pivots: impl Iterator<Item = f64>) -> bool {
    let p: Vec<f64> = pivots.collect();
    let top = p.iter().copied().fold(0.0, f64::max);
    top > 0.0 && p.iter().all(|&x| x.is_finite() && x > 1e-13 * top)
}

/// The finite roots of `det(pencil) = 0` in rad/s, with infinite ones counted, on a pencil
/// scaled to `omega_s`.
fn roots(mut p: Pencil, omega_s: f64) -> Result<Roots, PoleError> {
    let real = p.is_real();
    p.scale(omega_s);
    let mut out = Roots::default();
    let lambdas = match p.eigenvalues() {
        Ok(l) => l,
        Err(PoleError::Singular) => {
            out.indeterminate = p.m;
            return Ok(out);
        }
        Err(e) => return Err(e),
    };
    for lambda in lambdas {
        if !(lambda.re.is_finite() && lambda.im.is_finite()) || lambda.norm() * INFINITE_TOL > 1.0 {
            out.infinite += 1;
            continue;
        }
        let mut s = if lambda.norm() <= ORIGIN_TOL {
            Complex64::new(0.0, 0.0)
        } else {
            lambda * omega_s
        };
        // A real pencil's roots come in exact conjugate pairs; a real root is real.
        if real && s.im.abs() <= 1e-14 * s.norm() {
            s.im = 0.0;
        }
        out.finite.push(s);
    }
    if real {
        // Make pairs exactly conjugate (the eigensolver returns them so to rounding).
        let upper: Vec<Complex64> = out.finite.iter().copied().filter(|s| s.im > 0.0).collect();
        out.finite.retain(|s| s.im == 0.0);
        for s in upper {
            out.finite.push(s);
            out.finite.push(s.conj());
        }
    }
    out.finite
        .sort_by(|a, b| a.norm().total_cmp(&b.norm()).then(a.im.total_cmp(&b.im)));
    Ok(out)
}

/// A frequency scale for the pencil: the geometric mean of ‖G‖/‖C‖ row by row where both
/// are present, or 1 rad/s.
fn matrix_scale(sys: &System) -> f64 {
    let (mut sum, mut count) = (0.0, 0usize);
    for &(g, c) in sys.row_abs() {
        if g > 0.0 && c > 0.0 {
            sum += (g / c).ln();
            count += 1;
        }
    }
    if count == 0 {
        1.0
    } else {
        (sum / count as f64).exp()
    }
}

/// The natural frequencies of the network (all sources off), in rad/s.
pub fn natural_frequencies(sys: &System, omega_s: Option<f64>) -> Result<Roots, PoleError> {
    if sys.n > MAX_UNKNOWNS {
        return Err(PoleError::TooLarge {
            unknowns: sys.n,
            limit: MAX_UNKNOWNS,
        });
    }
    let w = omega_s.unwrap_or_else(|| matrix_scale(sys));
    roots(Pencil::new(sys, None), w)
}

/// The zeros of the read-out `q(s)ᵀ·x + k` under excitation `rhs`, in rad/s.
fn readout_zeros(
    sys: &System,
    rhs: &[Complex64],
    q: &Readout,
    design: bool,
    omega_s: f64,
) -> Result<Roots, PoleError> {
    let k = if design {
        q.constant
    } else {
        Complex64::new(0.0, 0.0)
    };
    roots(Pencil::new(sys, Some((rhs, q, k))), omega_s)
}

/// Whether read-out `q` vanishes at two frequencies away from any special point (0.37·ω_s
/// and 2.9·ω_s): |q·x + k| within 1e-12 of the sum of the magnitudes it is made of. The
/// network is solved on its own solver path (a network singular there does not vanish).
fn vanishes(
    analysis: &Analysis,
    rhs: &[Complex64],
    q: &Readout,
    design: bool,
    omega_s: f64,
) -> bool {
    let Ok(plan) = analysis.plan() else {
        return false;
    };
    let mut solver = plan.make();
    [0.37, 2.9].iter().all(|&f| {
        let w = f * omega_s;
        if solver.factor(w).is_err() {
            return false;
        }
        let mut x = rhs.to_vec();
        solver.solve(&mut x);
        if x.iter().any(|v| !v.re.is_finite() || !v.im.is_finite()) {
            return false;
        }
        let value = q.eval(&x, w, design);
        let j = Complex64::new(0.0, w);
        let scale: f64 = q.g.iter().map(|&(i, c)| (x[i] * c).norm()).sum::<f64>()
            + q.c.iter().map(|&(i, c)| (j * x[i] * c).norm()).sum::<f64>()
            + if design { q.constant.norm() } else { 0.0 };
        value.norm() <= 1e-12 * scale
    })
}

/// Step from a candidate root to the points its read-out is compared at, relative to |s|.
const ROOT_PROBE_STEP: f64 = 1e-2;

/// The candidate zeros of response `r` that are zeros on the network itself or could not
/// be decided, and how many could not (None if the network has no solver plan). At a zero
/// z the response vanishes: |H(z)| is below its value at four points 1 % of |z| away by the
/// ratio of the zero's error to that step (1e-4 for an error of 1e-6 of |z|, less for a
/// multiple zero), while at a spurious candidate the response is as large as around it.
/// Kept below 1e-3 of the smallest of the four, dropped above 0.1 of it; between, or where
/// the network cannot be solved or the response is zero all around (below the double
/// range), undecided and kept. The network is solved at complex s = σ + jω as `G + σC` at
/// ω on its own solver path. A complex pair is decided by its upper member.
fn confirm_zeros(
    analysis: &Analysis,
    r: &crate::response::ResponseReadout<'_>,
    candidates: &[Complex64],
) -> Option<(Vec<Complex64>, usize)> {
    let plan = analysis.plan().ok()?;
    let at = |s: Complex64| -> Option<f64> {
        let shifted = analysis.system().shifted(s.re);
        let plan = plan.rebind(&shifted)?;
        let mut solver = plan.make();
        solver.factor(s.im).ok()?;
        let mut x = r.rhs.to_vec();
        solver.solve(&mut x);
        let num = r.numerator.eval_at(&x, s, r.design);
        let den = r
            .denominator
            .map_or(Complex64::new(1.0, 0.0), |d| d.eval_at(&x, s, r.design));
        let m = if r.invert {
            den.norm() / num.norm()
        } else {
            num.norm() / den.norm()
        };
        (!m.is_nan()).then_some(m)
    };
    let verdict = |z: Complex64| -> Option<bool> {
        let h0 = at(z)?;
        let step = ROOT_PROBE_STEP * z.norm();
        let mut around = f64::INFINITY;
        for d in [
            Complex64::new(step, 0.0),
            Complex64::new(-step, 0.0),
            Complex64::new(0.0, step),
            Complex64::new(0.0, -step),
        ] {
            around = around.min(at(z + d)?);
        }
        if !(around > 0.0 && around.is_finite()) {
            None
        } else if h0 <= 1e-3 * around {
            Some(true)
        } else if h0 >= 0.1 * around {
            Some(false)
        } else {
            None
        }
    };
    let verdicts: Vec<(Complex64, Option<bool>)> = candidates
        .iter()
        .filter(|z| z.im >= 0.0)
        .map(|&z| (z, verdict(z)))
        .collect();
    let undecided = verdicts.iter().filter(|v| v.1.is_none()).count();
    // Kept: the confirmed and the undecided (which leave the count unverified).
    let keep = |s: &Complex64| {
        let upper = if s.im < 0.0 { s.conj() } else { *s };
        verdicts
            .iter()
            .any(|&(z, k)| k != Some(false) && z == upper)
    };
    Some((candidates.iter().copied().filter(keep).collect(), undecided))
}

/// Drops pole–zero pairs that coincide within [`CANCEL_TOL`]; returns how many.
fn cancel(poles: &mut Vec<Complex64>, zeros: &mut Vec<Complex64>) -> usize {
    let mut dropped = 0;
    let mut i = 0;
    while i < zeros.len() {
        let z = zeros[i];
        let best = poles
            .iter()
            .enumerate()
            .map(|(j, p)| (j, (z - p).norm()))
            .min_by(|a, b| a.1.total_cmp(&b.1));
        match best {
            Some((j, d)) if d <= CANCEL_TOL * z.norm().max(poles[j].norm()) => {
                poles.remove(j);
                zeros.remove(i);
                dropped += 1;
            }
            _ => i += 1,
        }
    }
    dropped
}

/// Poles and zeros of response `index`, with frequencies scaled to `omega_s` (rad/s; the
/// sweep's geometric centre is a good choice) or, when None, to the network's own scale.
/// Fails when the system is above [`MAX_UNKNOWNS`] or the eigensolver does not converge.
pub fn pole_zero(
    analysis: &Analysis,
    index: usize,
    omega_s: Option<f64>,
) -> Result<PoleZero, PoleError> {
    let sys = analysis.system();
    if sys.n > MAX_UNKNOWNS {
        return Err(PoleError::TooLarge {
            unknowns: sys.n,
            limit: MAX_UNKNOWNS,
        });
    }
    let r = analysis
        .readout(index)
        .ok_or(PoleError::NoResponse(index))?;
    let w = omega_s.unwrap_or_else(|| matrix_scale(sys));
    let num = readout_zeros(sys, r.rhs, r.numerator, r.design, w)?;
    let den = match r.denominator {
        Some(d) => readout_zeros(sys, r.rhs, d, r.design, w)?,
        None => roots(Pencil::new(sys, None), w)?,
    };
    let identically_zero =
        num.indeterminate > 0 || vanishes(analysis, r.rhs, r.numerator, r.design, w);
    if identically_zero {
        return Ok(PoleZero {
            identically_zero,
            ..PoleZero::default()
        });
    }
    let (mut zeros, mut poles) = (num.finite, den.finite);
    if r.invert {
        std::mem::swap(&mut zeros, &mut poles);
    }
    let cancelled = cancel(&mut poles, &mut zeros);
    let mut dropped = 0;
    let slope = asymptotic_slope(analysis, index, &poles, &zeros, w);
    let mut unverified = slope.is_none() && !poles.is_empty();
    if slope.is_none() {
        // The count cannot be checked against the slope (a long ladder falls below the
        // double range above its poles). A block of k infinite eigenvalues comes out as a
        // ring of radius about ε^(−1/k) in units of ω_s, inside the band when k is large
        // (1.35 for k = 120), so each candidate root of a read-out is tested on the network
        // itself instead: kept where the response vanishes, dropped where it does not.
        // (The poles are the natural frequencies or a read-out's roots under a source,
        // whose count is not in question the same way.)
        let before = zeros.len();
        if let Some((kept, undecided)) = confirm_zeros(analysis, &r, &zeros) {
            zeros = kept;
            dropped += before - zeros.len();
            unverified = undecided > 0;
        }
    }
    if let Some(slope) = slope {
        // A block of k infinite eigenvalues comes out perturbed to |λ| ≈ ε^(−1/k): a
        // response falling many decades per decade at high frequency (a long ladder) shows
        // them as a ring of large "roots". Their number is fixed by the measured slope:
        // the largest candidates beyond it are zeros (or poles) at infinity.
        let excess = zeros.len() as i64 - poles.len() as i64 - slope;
        let set = if excess > 0 { &mut zeros } else { &mut poles };
        for _ in 0..excess.unsigned_abs() {
            let Some(k) = set
                .iter()
                .enumerate()
                .max_by(|a, b| a.1.norm().total_cmp(&b.1.norm()))
                .map(|(k, _)| k)
            else {
                break;
            };
            set.remove(k);
            dropped += 1;
        }
        if dropped > 0 {
            // A pair loses both members or neither.
            let unpaired = |v: &Vec<Complex64>| {
                v.iter()
                    .filter(|s| s.im != 0.0)
                    .any(|s| !v.contains(&s.conj()))
            };
            if unpaired(&zeros) || unpaired(&poles) {
                return Err(PoleError::NoConvergence);
            }
        }
    }
    Ok(PoleZero {
        poles,
        zeros,
        cancelled,
        identically_zero,
        at_infinity: dropped,
        unverified,
    })
}

/// The slope of `|H|` (in units of 20 dB/decade) three decades above the largest root,
/// measured by a solve with the exact derivative, where it is a whole number and the
/// response is representable there; within the view of six decades around `omega_s`.
fn asymptotic_slope(
    analysis: &Analysis,
    index: usize,
    poles: &[Complex64],
    zeros: &[Complex64],
    omega_s: f64,
) -> Option<i64> {
    // Above the poles, which are the well-conditioned roots (natural frequencies, or the
    // zeros of a denominator read-out); the candidate zeros may include the perturbed ones.
    let top = poles.iter().map(|s| s.norm()).fold(0.0, f64::max);
    let top = if top > 0.0 {
        top
    } else {
        zeros.iter().map(|s| s.norm()).fold(0.0, f64::max)
    };
    // Every root at the origin (an integrator): the slope is the same at every frequency,
    // so it is read at the sweep's centre.
    let w = if top == 0.0 {
        omega_s
    } else {
        (top * 1e3).min(omega_s / INFINITE_TOL)
    };
    let ev = analysis.evaluator().ok()?;
    let mut ws = ev.workspace_for(index);
    let p = ev
        .at(&mut ws, w / (2.0 * PI), true)
        .ok()?
        .get(index)
        .copied()?;
    let m = p.value.norm();
    if m == 0.0 || !m.is_finite() {
        return None;
    }
    // Re(ω·H′/H) with H and H′ scaled by 1/|H| first, so a response of 1e-250 there does
    // not underflow on the way.
    let slope = w * ((p.derivative / m) * (p.value / m).conj()).re;
    let r = slope.round();
    ((slope - r).abs() <= 0.05).then_some(r as i64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::design;

    fn pz(toml: &str) -> PoleZero {
        let d = design::parse(toml).unwrap();
        let a = Analysis::new(d.network, d.responses).unwrap();
        pole_zero(&a, 0, Some(2.0 * PI * 1e3)).unwrap()
    }

    /// The driving-point impedance of R, L and C in series.
    fn series_rlc_impedance(r: f64, l: f64, c: f64) -> PoleZero {
        pz(&format!(
            r#"[parts]
L1 = {{ inductor = {l:e}, between = ["in", "m"] }}
C1 = {{ capacitor = {c:e}, between = ["m", "n"] }}
R1 = {{ resistor = {r:e}, between = ["n", "gnd"] }}
[responses]
z = {{ impedance = ["in", "gnd"] }}"#
        ))
    }

    fn close(a: Complex64, b: Complex64, tol: f64) -> bool {
        (a - b).norm() <= tol * b.norm().max(1.0)
    }

    /// The eigensolver the poles rest on returns every eigenvalue, on pencils of the sizes
    /// networks give (diag(1..n) plus a superdiagonal against the identity: eigenvalues
    /// 1..n). (faer 0.24.4's QZ without eigenvectors left most unset above about 30, and with
    /// them took seconds on MNA pencils of 90: hence the shift-and-invert formulation.)
    #[test]
    fn eigenvalues_are_all_found() {
        for m in [5usize, 20, 40, 90, 160] {
            let mut p = Pencil {
                m,
                a: vec![c64::new(0.0, 0.0); m * m],
                b: vec![c64::new(0.0, 0.0); m * m],
            };
            for i in 0..m {
                p.a[i * m + i] = c64::new((i + 1) as f64, 0.0);
                p.b[i * m + i] = c64::new(-1.0, 0.0);
                if i + 1 < m {
                    p.a[(i + 1) * m + i] = c64::new(0.5, 0.0);
                }
            }
            let mut ev: Vec<f64> = p.eigenvalues().unwrap().iter().map(|l| l.re).collect();
            ev.sort_by(f64::total_cmp);
            for (k, v) in ev.iter().enumerate() {
                assert!((v - (k + 1) as f64).abs() < 1e-9, "m = {m}: {ev:?}");
            }
        }
    }

    /// A pencil with columns of B that are zero (unknowns no storage element touches): the
    /// eigensolver works on the other columns alone and the rest count as infinite. Upper
    /// triangular A with diagonal 1..m, B = −1 on four of the diagonal's places, columns
    /// rotated: det(A + λB) is ±Π(a_ii + λb_ii), so the finite eigenvalues are exactly the
    /// a_ii of those four places and the other eight are infinite (closed form).
    #[test]
    fn columns_without_storage_are_infinite_eigenvalues() {
        let m = 12;
        let dynamic = [1usize, 4, 5, 9];
        let mut p = Pencil {
            m,
            a: vec![c64::new(0.0, 0.0); m * m],
            b: vec![c64::new(0.0, 0.0); m * m],
        };
        // Column c of the pencil is column (c + 5) mod m of the triangular one.
        let at = |r: usize, c: usize| ((c + m - 5) % m) * m + r;
        for i in 0..m {
            p.a[at(i, i)] = c64::new((i + 1) as f64, 0.0);
            for j in i + 1..m {
                p.a[at(i, j)] = c64::new(0.3 * (i + j) as f64, 0.0);
            }
        }
        for &i in &dynamic {
            p.b[at(i, i)] = c64::new(-1.0, 0.0);
        }
        let ev = p.eigenvalues().unwrap();
        let mut finite: Vec<f64> = ev
            .iter()
            .filter(|l| l.re.is_finite())
            .map(|l| l.re)
            .collect();
        finite.sort_by(f64::total_cmp);
        assert_eq!(finite.len(), dynamic.len(), "{ev:?}");
        for (v, &i) in finite.iter().zip(&dynamic) {
            assert!((v - (i + 1) as f64).abs() < 1e-12, "{ev:?}");
        }
        assert!(
            ev.iter().all(|l| l.im.abs() < 1e-12 || !l.re.is_finite()),
            "{ev:?}"
        );
        assert_eq!(ev.len(), m);
    }

    /// A bridge of two RC dividers with equal time constants (1 kΩ·100 nF = 2 kΩ·50 nF): both
    /// midpoints are V·1/(1 + jωRC), so their difference is zero at every frequency (closed
    /// reasoning). The check by solving finds it (as does, here, the pencil singular at
    /// every shift) and the response is reported as identically zero; with one arm 1 % off
    /// it is not, and has the two dividers' poles.
    #[test]
    fn a_balanced_bridge_reads_identically_zero() {
        let bridge = |r2: &str| {
            let d = design::parse(&format!(
                r#"[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
R1 = {{ resistor = "1k", between = ["in", "a"] }}
C1 = {{ capacitor = "100n", between = ["a", "gnd"] }}
R2 = {{ resistor = "{r2}", between = ["in", "b"] }}
C2 = {{ capacitor = "50n", between = ["b", "gnd"] }}
[responses]
diff = {{ ratio = [["a", "b"], "in"] }}
"#
            ))
            .unwrap();
            let a = Analysis::new(d.network, d.responses).unwrap();
            let r = a.readout(0).unwrap();
            let w = 2.0 * PI * 1e3;
            let zero = vanishes(&a, r.rhs, r.numerator, r.design, w);
            (zero, pole_zero(&a, 0, Some(w)).unwrap())
        };
        let (zero, balanced) = bridge("2k");
        assert!(zero && balanced.identically_zero, "{balanced:?}");
        assert!(balanced.poles.is_empty() && balanced.zeros.is_empty());
        let (zero, off) = bridge("2.02k");
        assert!(!zero && !off.identically_zero, "{off:?}");
        let mut p: Vec<f64> = off.poles.iter().map(|s| -s.re).collect();
        p.sort_by(f64::total_cmp);
        let expect = [1.0 / (2.02e3 * 50e-9), 1.0 / (1e3 * 100e-9)];
        assert_eq!(p.len(), 2, "{off:?}");
        for (a, b) in p.iter().zip(expect) {
            assert!((a / b - 1.0).abs() < 1e-9, "{p:?} against {expect:?}");
        }
    }

    /// RC low-pass: one pole at −1/RC, no zero (closed form).
    #[test]
    fn rc_low_pass_has_one_real_pole() {
        let p = pz(r#"[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
R1 = { resistor = "1k", between = ["in", "out"] }
C1 = { capacitor = "100n", between = ["out", "gnd"] }
[responses]
gain = { ratio = ["out", "in"] }"#);
        assert_eq!(p.zeros.len(), 0, "{p:?}");
        assert_eq!(p.poles.len(), 1, "{p:?}");
        assert!(close(p.poles[0], Complex64::new(-1e4, 0.0), 1e-12), "{p:?}");
        assert_eq!((p.slope_at_dc(), p.slope_at_infinity()), (0, -1));
    }

    /// RC high-pass: a zero at the origin and a pole at −1/RC (closed form).
    #[test]
    fn rc_high_pass_has_a_zero_at_the_origin() {
        let p = pz(r#"[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
C1 = { capacitor = "100n", between = ["in", "out"] }
R1 = { resistor = "1k", between = ["out", "gnd"] }
[responses]
gain = { ratio = ["out", "in"] }"#);
        assert_eq!(p.zeros, vec![Complex64::new(0.0, 0.0)], "{p:?}");
        assert!(close(p.poles[0], Complex64::new(-1e4, 0.0), 1e-12), "{p:?}");
        assert_eq!((p.slope_at_dc(), p.slope_at_infinity()), (1, 0));
    }

    /// Series RLC impedance: zeros at the resonance pair, a pole at the origin, Q = √(L/C)/R
    /// (closed forms).
    #[test]
    fn series_rlc_impedance_has_its_resonance_as_zeros() {
        let (r, l, c): (f64, f64, f64) = (47.0, 10e-3, 22e-9);
        let p = series_rlc_impedance(r, l, c);
        let rows = p.rows();
        let zero = rows.iter().find(|x| x.what == "zero" && x.pair).unwrap();
        let f0 = 1.0 / (2.0 * PI * (l * c).sqrt());
        assert!((zero.f0_hz / f0 - 1.0).abs() < 1e-12, "{rows:?}");
        assert!((zero.q.unwrap() / ((l / c).sqrt() / r) - 1.0).abs() < 1e-12);
        assert_eq!(p.poles, vec![Complex64::new(0.0, 0.0)], "{p:?}");
    }

    /// A lossless two-section LC ladder driven by a voltage source: its poles are the roots
    /// of ω⁴·L1C1L2C2 − ω²·(L1C1 + L2C2 + L1C2) + 1 = 0 (closed form, the determinant of the
    /// two loops with the source shorted), on the jω axis. They come out with real parts of a
    /// few ε·|s| and either sign; they must read as on the axis, not as Q ≈ 10¹⁵ or as an
    /// unstable pole. A series RLC of Q = 10⁴ (closed form √(L/C)/R) stays a pair with its Q.
    #[test]
    fn lossless_resonances_are_on_the_axis_and_high_q_ones_are_not() {
        let (l1, c1, l2, c2): (f64, f64, f64, f64) = (2.2e-3, 47e-9, 1e-3, 10e-9);
        let p = pz(&format!(
            r#"[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
L1 = {{ inductor = {l1:e}, between = ["in", "a"] }}
C1 = {{ capacitor = {c1:e}, between = ["a", "gnd"] }}
L2 = {{ inductor = {l2:e}, between = ["a", "b"] }}
C2 = {{ capacitor = {c2:e}, between = ["b", "gnd"] }}
[responses]
h = {{ ratio = ["b", "in"] }}"#
        ));
        let (a, b) = (l1 * c1 * l2 * c2, l1 * c1 + l2 * c2 + l1 * c2);
        let disc = (b * b - 4.0 * a).sqrt();
        let mut expect = [
            ((b - disc) / (2.0 * a)).sqrt(),
            ((b + disc) / (2.0 * a)).sqrt(),
        ];
        expect.sort_by(f64::total_cmp);
        let rows = p.rows();
        let poles: Vec<&RootRow> = rows.iter().filter(|r| r.what == "pole").collect();
        assert_eq!(poles.len(), 2, "{rows:?}");
        for (r, w) in poles.iter().zip(expect) {
            assert!(r.pair && r.on_axis && !r.right_half_plane, "{r:?}");
            assert!(
                (r.f0_hz / (w / (2.0 * PI)) - 1.0).abs() < 1e-12,
                "{r:?} {w}"
            );
        }
        let (r, l, c): (f64, f64, f64) = (1e-2, 10e-3, 1e-6);
        let q = (l / c).sqrt() / r;
        let p = series_rlc_impedance(r, l, c);
        let rows = p.rows();
        let zero = rows.iter().find(|x| x.what == "zero" && x.pair).unwrap();
        assert!(!zero.on_axis && !zero.right_half_plane, "{zero:?}");
        assert!((zero.q.unwrap() / q - 1.0).abs() < 1e-9, "{zero:?} {q}");
    }

    /// An ideal op-amp integrator, H = −1/(sRC) (closed form): one pole at the origin, no
    /// zeros, and the count verified by the slope (−20 dB/decade everywhere), not flagged
    /// as unverified for want of a nonzero root to measure above.
    #[test]
    fn an_integrator_has_its_pole_at_the_origin_and_a_verified_count() {
        let p = pz(r#"[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
R1 = { resistor = "10k", between = ["in", "n"] }
C1 = { capacitor = "10n", between = ["n", "out"] }
U1 = { opamp = "ideal", noninverting = "gnd", inverting = "n", output = "out" }
[responses]
i = { ratio = ["out", "in"] }"#);
        assert_eq!(p.poles, vec![Complex64::new(0.0, 0.0)], "{p:?}");
        assert!(
            p.zeros.is_empty() && !p.unverified && p.at_infinity == 0,
            "{p:?}"
        );
    }

    /// A 60-section RLC ladder (series R and L, shunt C) read end to end has 120 poles and
    /// no finite zeros: a ladder's transmission zeros are where a series arm opens or a shunt
    /// arm shorts, here only at infinity (common practice). Its numerator pencil's block of
    /// infinite eigenvalues comes out as a ring of spurious roots inside the band, and its
    /// response is below the double range where the slope would count them; tested on the
    /// network at complex frequencies, none may stay in or near the band.
    #[test]
    fn a_long_ladder_keeps_no_spurious_zeros_in_its_band() {
        let net = crate::ladders::rlc_ladder(60, 1.0, 1e-6, 1e-9, 50.0, 50.0).unwrap();
        let spec = crate::ladders::ladder_gain(&net, 60).unwrap();
        let a = Analysis::new(net, vec![spec]).unwrap();
        for fs in [1e5, 1e6] {
            let p = pole_zero(&a, 0, Some(2.0 * PI * fs)).unwrap();
            assert_eq!(p.poles.len(), 120, "{fs}");
            let top = p.poles.iter().map(|s| s.norm()).fold(0.0, f64::max);
            let near: Vec<&Complex64> = p.zeros.iter().filter(|z| z.norm() < 100.0 * top).collect();
            assert!(near.is_empty(), "{fs}: {near:?}");
            assert_eq!(p.unverified, !p.zeros.is_empty(), "{fs}: {p:?}");
        }
    }
}
