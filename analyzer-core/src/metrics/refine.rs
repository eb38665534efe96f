//! Root-finding and minimisation on the live network: every figure is a root or an extremum
//! of a smooth function of `u = ln f`, found by re-solving the network at trial frequencies.
//!
//! * [`newton_root`]: a bracketed Newton iteration (Numerical Recipes' `rtsafe`): a Newton
//!   step with the exact derivative, which the solver gives from the same factorisation
//!   (`dx/dω = −A⁻¹(jC)x`), or a bisection when the step would leave the bracket or is not
//!   halving it fast enough. Level crossings and phase zeros converge in a handful of solves.
//! * [`brent_root`]: Brent's derivative-free root-finder, for the slope of `|H|` (whose own
//!   derivative would need a second derivative of the solution).
//! * [`brent_min`]: Brent's minimiser, the fallback for an extremum whose slope does not
//!   change sign across its bracket.

use crate::response::{AnalysisError, Evaluator, Point, Workspace};
use crate::units::Hertz;
use std::f64::consts::{LN_10, PI};

/// Relative tolerance the refinements aim for in frequency.
pub const FREQ_TOL: f64 = 1e-12;

/// Brent's bracketing root-finder on `[a, b]` with `f(a)`, `f(b)` of opposite sign (or one
/// zero). Stops when the bracket is below `tol` (absolute) or after 200 steps.
pub fn brent_root<E>(
    mut f: impl FnMut(f64) -> Result<f64, E>,
    a: f64,
    b: f64,
    fa: f64,
    fb: f64,
    tol: f64,
) -> Result<f64, E> {
    let (mut a, mut b, mut fa, mut fb) = (a, b, fa, fb);
    if fa == 0.0 {
        return Ok(a);
    }
    if fb == 0.0 {
        return Ok(b);
    }
    let (mut c, mut fc) = (a, fa);
    let mut d = b - a;
    let mut e = d;
    for _ in 0..200 {
        if (fb > 0.0) == (fc > 0.0) {
            c = a;
            fc = fa;
            d = b - a;
            e = d;
        }
        if fc.abs() < fb.abs() {
            a = b;
            b = c;
            c = a;
            fa = fb;
            fb = fc;
            fc = fa;
        }
        let tol1 = 2.0 * f64::EPSILON * b.abs() + 0.5 * tol;
        let xm = 0.5 * (c - b);
        if xm.abs() <= tol1 || fb == 0.0 {
            return Ok(b);
        }
        if e.abs() >= tol1 && fa.abs() > fb.abs() {
            // Inverse quadratic interpolation, or the secant step when only two points.
            let s = fb / fa;
            let (mut p, mut q);
            if a == c {
                p = 2.0 * xm * s;
                q = 1.0 - s;
            } else {
                let qq = fa / fc;
                let r = fb / fc;
                p = s * (2.0 * xm * qq * (qq - r) - (b - a) * (r - 1.0));
                q = (qq - 1.0) * (r - 1.0) * (s - 1.0);
            }
            if p > 0.0 {
                q = -q;
            }
            p = p.abs();
            let m1 = 3.0 * xm * q - (tol1 * q).abs();
            let m2 = (e * q).abs();
            if 2.0 * p < m1.min(m2) {
                e = d;
                d = p / q;
            } else {
                d = xm;
                e = d;
            }
        } else {
            d = xm;
            e = d;
        }
        a = b;
        fa = fb;
        b += if d.abs() > tol1 { d } else { tol1.copysign(xm) };
        fb = f(b)?;
    }
    Ok(b)
}

/// A root of `f` in `[a, b]`, where `f(a)` and `f(b)` have opposite signs (or one is zero),
/// by Newton steps with the derivative `f` returns alongside its value, kept inside the
/// bracket by bisection. Stops when the step is below `tol` (absolute) or after 100 steps.
pub fn newton_root<E>(
    mut f: impl FnMut(f64) -> Result<(f64, f64), E>,
    a: f64,
    b: f64,
    fa: f64,
    fb: f64,
    tol: f64,
) -> Result<f64, E> {
    if fa == 0.0 {
        return Ok(a);
    }
    if fb == 0.0 {
        return Ok(b);
    }
    // Oriented so that f(lo) < 0 < f(hi).
    let (mut lo, mut hi) = if fa < 0.0 { (a, b) } else { (b, a) };
    // Start from the secant through the bracket's ends.
    let mut x = a - fa * (b - a) / (fb - fa);
    if !(x.is_finite() && (x - a) * (x - b) <= 0.0) {
        x = 0.5 * (a + b);
    }
    let mut dx_old = (b - a).abs();
    let mut dx = dx_old;
    let (mut fx, mut dfx) = f(x)?;
    for _ in 0..100 {
        if fx == 0.0 {
            return Ok(x);
        }
        let outside = ((x - hi) * dfx - fx) * ((x - lo) * dfx - fx) > 0.0;
        let slow = (2.0 * fx).abs() > (dx_old * dfx).abs();
        if outside || slow || !dfx.is_finite() || dfx == 0.0 {
            dx_old = dx;
            dx = 0.5 * (hi - lo);
            x = lo + dx;
        } else {
            dx_old = dx;
            dx = fx / dfx;
            x -= dx;
        }
        if dx.abs() < tol {
            return Ok(x);
        }
        (fx, dfx) = f(x)?;
        if fx < 0.0 {
            lo = x;
        } else {
            hi = x;
        }
    }
    Ok(x)
}

/// Brent's minimiser of `f` on `[a, b]` starting from `x`, to relative tolerance `tol`.
pub fn brent_min<E>(
    mut f: impl FnMut(f64) -> Result<f64, E>,
    a: f64,
    b: f64,
    x: f64,
    tol: f64,
) -> Result<(f64, f64), E> {
    const GOLD: f64 = 0.381_966_011_250_105_1;
    let (mut a, mut b) = (a.min(b), a.max(b));
    let (mut x, mut w, mut v) = (x, x, x);
    let mut fx = f(x)?;
    let (mut fw, mut fv) = (fx, fx);
    let (mut d, mut e): (f64, f64) = (0.0, 0.0);
    for _ in 0..200 {
        let xm = 0.5 * (a + b);
        let tol1 = tol * x.abs() + 1e-300;
        let tol2 = 2.0 * tol1;
        if (x - xm).abs() <= tol2 - 0.5 * (b - a) {
            break;
        }
        let mut golden = true;
        if e.abs() > tol1 {
            let r = (x - w) * (fx - fv);
            let mut q = (x - v) * (fx - fw);
            let mut p = (x - v) * q - (x - w) * r;
            q = 2.0 * (q - r);
            if q > 0.0 {
                p = -p;
            }
            q = q.abs();
            if p.abs() < (0.5 * q * e).abs() && p > q * (a - x) && p < q * (b - x) {
                e = d;
                d = p / q;
                let u = x + d;
                if u - a < tol2 || b - u < tol2 {
                    d = tol1.copysign(xm - x);
                }
                golden = false;
            }
        }
        if golden {
            e = if x >= xm { a - x } else { b - x };
            d = GOLD * e;
        }
        let u = if d.abs() >= tol1 {
            x + d
        } else {
            x + tol1.copysign(d)
        };
        let fu = f(u)?;
        if fu <= fx {
            if u >= x {
                a = x;
            } else {
                b = x;
            }
            v = w;
            fv = fw;
            w = x;
            fw = fx;
            x = u;
            fx = fu;
        } else {
            if u < x {
                a = u;
            } else {
                b = u;
            }
            if fu <= fw || w == x {
                v = w;
                fv = fw;
                w = u;
                fw = fu;
            } else if fu <= fv || v == x || v == w {
                v = u;
                fv = fu;
            }
        }
    }
    Ok((x, fx))
}

/// dB per unit of ln|H|: 20/ln 10.
const DB_PER_NEPER: f64 = 20.0 / LN_10;

/// Evaluates one response at any frequency, re-solving the network.
pub struct Refiner<'e, 'a> {
    ev: &'e Evaluator<'a>,
    ws: Workspace<'a>,
    index: usize,
    /// Solves made so far (for the benches and the notes).
    pub solves: usize,
}

impl<'e, 'a> Refiner<'e, 'a> {
    /// A probe of response `index`.
    pub fn new(ev: &'e Evaluator<'a>, index: usize) -> Self {
        Refiner {
            ev,
            ws: ev.workspace_for(index),
            index,
            solves: 0,
        }
    }

    /// The evaluator it probes.
    pub fn evaluator(&self) -> &'e Evaluator<'a> {
        self.ev
    }

    /// The response it probes.
    pub fn index(&self) -> usize {
        self.index
    }

    /// Value and ω-derivative at `f`.
    pub fn point(&mut self, f: Hertz) -> Result<Point, AnalysisError> {
        self.solves += 1;
        let pts = self.ev.at(&mut self.ws, f, true)?;
        Ok(pts.get(self.index).copied().unwrap_or_default())
    }

    /// Magnitude in dB at `f`.
    pub fn db(&mut self, f: Hertz) -> Result<f64, AnalysisError> {
        self.solves += 1;
        let v = self.ev.at(&mut self.ws, f, false)?;
        Ok(20.0 * v.get(self.index).map_or(0.0, |p| p.value.norm()).log10())
    }

    /// Magnitude in dB at each of `freqs`, several frequencies per solver pass where the
    /// solver path has a wide kernel (the values are those [`Refiner::db`] gives, bit for
    /// bit). Fails with the first failing frequency's error, as one at a time would.
    pub fn db_many(&mut self, freqs: &[Hertz]) -> Result<Vec<f64>, AnalysisError> {
        self.solves += freqs.len();
        let (nr, index) = (self.ev.analysis().responses().len(), self.index);
        let pts = self.ev.at_many(&mut self.ws, freqs, false)?;
        Ok((0..freqs.len())
            .map(|k| {
                let v = pts.get(k * nr + index).map_or(0.0, |p| p.value.norm());
                20.0 * v.log10()
            })
            .collect())
    }

    /// [`Refiner::slope`] at each of `freqs`, several frequencies per solver pass (the same
    /// bits as one at a time; the first failing frequency's error).
    pub fn slopes(&mut self, freqs: &[Hertz]) -> Result<Vec<f64>, AnalysisError> {
        self.solves += freqs.len();
        let (nr, index) = (self.ev.analysis().responses().len(), self.index);
        let pts = self.ev.at_many(&mut self.ws, freqs, true)?;
        Ok(freqs
            .iter()
            .enumerate()
            .map(|(k, &f)| log_slope(&pts.get(k * nr + index).copied().unwrap_or_default(), f))
            .collect())
    }

    /// Magnitude in dB at `f` and its derivative with respect to `ln f`:
    /// `d(dB)/d ln f = (20/ln 10)·Re(ω·H′/H)`.
    pub fn db_and_slope(&mut self, f: Hertz) -> Result<(f64, f64), AnalysisError> {
        let p = self.point(f)?;
        Ok((
            20.0 * p.value.norm().log10(),
            DB_PER_NEPER * log_slope(&p, f),
        ))
    }

    /// `d ln|H| / d ln ω = Re(ω·H′/H)` at `f`: the local slope in units of 20 dB/decade.
    pub fn slope(&mut self, f: Hertz) -> Result<f64, AnalysisError> {
        let p = self.point(f)?;
        Ok(log_slope(&p, f))
    }

    /// The principal phase (radians) at `f` and its derivative with respect to `ln f`,
    /// `ω·Im(H′/H)`.
    pub fn phase_and_slope(&mut self, f: Hertz) -> Result<(f64, f64), AnalysisError> {
        let p = self.point(f)?;
        let w = 2.0 * PI * f;
        let r = p.derivative / p.value;
        Ok((p.value.arg(), w * r.im))
    }

    /// The frequency in `[lo, hi]` where `|H|` crosses `level` dB, given `dB − level` at the
    /// ends (of opposite signs), by Newton steps in `ln f`.
    pub fn crossing(
        &mut self,
        lo: Hertz,
        hi: Hertz,
        glo: f64,
        ghi: f64,
        level: f64,
    ) -> Result<Hertz, AnalysisError> {
        let u = newton_root(
            |u: f64| {
                let (d, s) = self.db_and_slope(u.exp())?;
                Ok::<_, AnalysisError>((d - level, s))
            },
            lo.ln(),
            hi.ln(),
            glo,
            ghi,
            FREQ_TOL * 0.1,
        )?;
        Ok(u.exp())
    }

    /// The frequency in `[lo, hi]` where the phase crosses zero, given the phases (radians,
    /// principal values within ±π/2) at the ends, by Newton steps in `ln f`.
    pub fn phase_zero(
        &mut self,
        lo: Hertz,
        hi: Hertz,
        plo: f64,
        phi: f64,
    ) -> Result<Hertz, AnalysisError> {
        let u = newton_root(
            |u: f64| self.phase_and_slope(u.exp()),
            lo.ln(),
            hi.ln(),
            plo,
            phi,
            FREQ_TOL * 0.1,
        )?;
        Ok(u.exp())
    }

    /// An extremum of `|H|` in `[lo, hi]` (a peak when `peak`): the root of the slope where
    /// it changes sign across the bracket, else Brent's minimiser from `mid`.
    pub fn extremum(
        &mut self,
        lo: Hertz,
        mid: Hertz,
        hi: Hertz,
        peak: bool,
    ) -> Result<Hertz, AnalysisError> {
        self.extremum_from(lo, mid, hi, peak, None)
    }

    /// [`Refiner::extremum`], given the slopes at `lo` and `hi` when the caller has them
    /// (from [`Refiner::slopes`], which gives the bits a probe there would).
    pub fn extremum_from(
        &mut self,
        lo: Hertz,
        mid: Hertz,
        hi: Hertz,
        peak: bool,
        ends: Option<(f64, f64)>,
    ) -> Result<Hertz, AnalysisError> {
        let (slo, shi) = match ends {
            Some(s) => s,
            None => (self.slope(lo)?, self.slope(hi)?),
        };
        if (slo > 0.0) != (shi > 0.0) && slo != 0.0 && shi != 0.0 {
            let u = brent_root(
                |u: f64| self.slope(u.exp()),
                lo.ln(),
                hi.ln(),
                slo,
                shi,
                FREQ_TOL * 0.1,
            )?;
            return Ok(u.exp());
        }
        let sign = if peak { -1.0 } else { 1.0 };
        let (u, _) = brent_min(
            |u: f64| Ok::<f64, AnalysisError>(sign * self.db(u.exp())?),
            lo.ln(),
            hi.ln(),
            mid.ln(),
            1e-10,
        )?;
        // The minimiser stops near √ε of a flat extremum; where the slope changes sign just
        // around its answer, polish it as the slope's root.
        let d = (1e-6 * (hi.ln() - lo.ln()).abs()).max(1e-9 * u.abs().max(1.0));
        let (a, b) = ((u - d).max(lo.ln()), (u + d).min(hi.ln()));
        let (sa, sb) = (self.slope(a.exp())?, self.slope(b.exp())?);
        if (sa > 0.0) != (sb > 0.0) && sa != 0.0 && sb != 0.0 {
            let r = brent_root(|x: f64| self.slope(x.exp()), a, b, sa, sb, FREQ_TOL * 0.1)?;
            return Ok(r.exp());
        }
        Ok(u.exp())
    }
}

/// `Re(ω·H′/H)` of a point at `f`.
fn log_slope(p: &Point, f: Hertz) -> f64 {
    let w = 2.0 * PI * f;
    (w * p.value.conj() * p.derivative).re / p.value.norm_sqr().max(f64::MIN_POSITIVE)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn brent_finds_roots_and_minima() {
        let r = brent_root(
            |x: f64| Ok::<f64, ()>(x * x - 2.0),
            0.0,
            2.0,
            -2.0,
            2.0,
            1e-15,
        )
        .unwrap();
        assert!((r - 2f64.sqrt()).abs() < 1e-14);
        let (x, _) = brent_min(
            |x: f64| Ok::<f64, ()>((x - 1.25).powi(2) + 3.0),
            0.0,
            3.0,
            2.0,
            1e-10,
        )
        .unwrap();
        assert!((x - 1.25).abs() < 1e-7);
    }

    /// Newton with bisection finds √2 in a few steps, and stays in its bracket on a function
    /// whose Newton steps alone would leave it (atan, started far out).
    #[test]
    fn newton_finds_roots_inside_the_bracket() {
        let mut calls = 0;
        let r = newton_root(
            |x: f64| {
                calls += 1;
                Ok::<_, ()>((x * x - 2.0, 2.0 * x))
            },
            0.0,
            2.0,
            -2.0,
            2.0,
            1e-15,
        )
        .unwrap();
        assert!((r - 2f64.sqrt()).abs() < 1e-14);
        assert!(calls <= 8, "{calls}");
        let r = newton_root(
            |x: f64| Ok::<_, ()>(((x - 0.3).atan(), 1.0 / (1.0 + (x - 0.3).powi(2)))),
            -20.0,
            30.0,
            (-20.3f64).atan(),
            (29.7f64).atan(),
            1e-14,
        )
        .unwrap();
        assert!((r - 0.3).abs() < 1e-13, "{r}");
    }
}
