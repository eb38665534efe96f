//! The figures a design review asks for, computed on the live network.
//!
//! The grid only brackets: every figure is refined by re-solving the network at trial
//! frequencies, so its accuracy does not depend on the grid density.
//!
//! * Level crossings of `20·log10|H|` (by default the half-power level `20·log10(1/√2)` ≈
//!   −3.0103 dB below the passband maximum) by Brent's bracketing root-finder in `ln f`, to
//!   1e-12 relative in frequency. From the crossings around the reference: lower and upper
//!   cut-off, bandwidth `f_hi − f_lo`, geometric centre `√(f_lo·f_hi)` and `Q = centre/bandwidth`.
//! * Peaks and notches of `|H|`: a grid maximum or minimum is refined as the root of the exact
//!   slope `d|H|²/dω = 2·Re(H̄·H′)` (Brent), falling back to Brent's minimiser on `|H|` when the
//!   slope does not change sign across the bracket.
//! * Resonances of impedances and admittances: where the phase crosses zero (series: `|Z|`
//!   minimum; parallel: `|Z|` maximum). Q both from the phase slope, `Q = (ω0/2)·|dφ/dω|`, and
//!   from the −3 dB bandwidth of `|Z|` (parallel) or `|Y|` (series).
//! * Group delay `τ = −dφ/dω = −Im(H′/H)` from the exact derivative (see [`crate::response`]).
//! * Loop gains: gain crossover (|L| = 0 dB) and phase margin `180° + ∠L`, phase crossover
//!   (∠L = −180° mod 360°, on the unwrapped phase) and gain margin `−20·log10|L|` there.

use crate::response::{AnalysisError, Evaluator, Point, ResponseUnit, Workspace};
use crate::sweep::Grid;
use crate::units::{Decibels, Degrees, Hertz, Seconds};
use serde::Serialize;
use std::f64::consts::PI;

/// 20·log10(1/√2): the half-power level, ≈ −3.0103 dB.
pub const HALF_POWER_DB: f64 = -3.010_299_956_639_812;

/// Relative tolerance the refinements aim for in frequency.
pub const FREQ_TOL: f64 = 1e-12;

/// Most crossings, peaks or notches reported per response.
pub const MAX_REPORTED: usize = 32;

/// What a level is measured from.
#[derive(Clone, Copy, Debug, PartialEq, Default)]
pub enum Reference {
    /// The largest magnitude over the sweep (refined where it is an interior peak).
    #[default]
    PassbandMaximum,
    /// The magnitude at this frequency.
    AtFrequency(Hertz),
    /// 0 dB: levels are absolute.
    Absolute,
}

/// Options for [`figures`].
#[derive(Clone, Debug, PartialEq)]
pub struct MetricOptions {
    /// Level relative to the reference, in dB (default: the half-power level).
    pub level_db: Decibels,
    /// What the level is measured from.
    pub reference: Reference,
}

impl Default for MetricOptions {
    fn default() -> Self {
        MetricOptions {
            level_db: HALF_POWER_DB,
            reference: Reference::PassbandMaximum,
        }
    }
}

/// A frequency where the magnitude crosses the level.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Crossing {
    /// Frequency (Hz).
    pub freq_hz: Hertz,
    /// Whether the magnitude rises through the level with frequency.
    pub rising: bool,
}

/// A refined peak or notch of |H|.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Extremum {
    /// Frequency (Hz).
    pub freq_hz: Hertz,
    /// Magnitude there (dB).
    pub magnitude_db: Decibels,
    /// For a peak: f / (−3 dB bandwidth around it), where both sides are found.
    pub q: Option<f64>,
}

/// A refined resonance of an impedance or admittance.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Resonance {
    /// Frequency (Hz) where the phase crosses zero.
    pub freq_hz: Hertz,
    /// "series" (|Z| minimum) or "parallel" (|Z| maximum).
    pub kind: &'static str,
    /// |value| there, in the response's unit.
    pub magnitude: f64,
    /// Q from the phase slope, (ω0/2)·|dφ/dω|.
    pub q_phase_slope: f64,
    /// Q from the −3 dB bandwidth of |Z| or |Y|, where both sides are found.
    pub q_bandwidth: Option<f64>,
}

/// Stability margins of a loop gain.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Margins {
    /// Where |L| = 0 dB (first such frequency).
    pub gain_crossover_hz: Option<Hertz>,
    /// 180° + ∠L at the gain crossover.
    pub phase_margin_deg: Option<Degrees>,
    /// Where the unwrapped ∠L = −180° (mod 360°), first such frequency.
    pub phase_crossover_hz: Option<Hertz>,
    /// −20·log10|L| at the phase crossover.
    pub gain_margin_db: Option<Decibels>,
}

/// All figures of one response.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Figures {
    /// Response name.
    pub response: String,
    /// Unit symbol of the value ("" for a ratio).
    pub unit: &'static str,
    /// Reference magnitude (dB).
    pub reference_db: Decibels,
    /// Where the reference was taken (Hz), if at a frequency.
    pub reference_hz: Option<Hertz>,
    /// Level searched for (dB, absolute).
    pub level_db: Decibels,
    /// All crossings of the level, ascending.
    pub crossings: Vec<Crossing>,
    /// The crossing below the reference frequency nearest to it.
    pub lower_cutoff_hz: Option<Hertz>,
    /// The crossing above the reference frequency nearest to it.
    pub upper_cutoff_hz: Option<Hertz>,
    /// upper − lower.
    pub bandwidth_hz: Option<Hertz>,
    /// √(lower·upper).
    pub centre_hz: Option<Hertz>,
    /// centre / bandwidth.
    pub q: Option<f64>,
    /// Interior peaks of |H|.
    pub peaks: Vec<Extremum>,
    /// Interior notches of |H|.
    pub notches: Vec<Extremum>,
    /// Resonances (impedances and admittances only).
    pub resonances: Vec<Resonance>,
    /// Group delay at the reference frequency (or the first point).
    pub group_delay_s: Option<Seconds>,
    /// Margins (loop gains only).
    pub margins: Option<Margins>,
}

/// A magnitude limit: the response must stay within `[min_db, max_db]` over `[from, to]`.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Limit {
    /// Name of the limit.
    pub name: String,
    /// Name of the response it checks.
    pub response: String,
    /// Lower end of the range (Hz).
    pub from: Hertz,
    /// Upper end of the range (Hz).
    pub to: Hertz,
    /// Lowest allowed magnitude (dB).
    pub min_db: Option<Decibels>,
    /// Highest allowed magnitude (dB).
    pub max_db: Option<Decibels>,
}

/// The outcome of one limit.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct LimitResult {
    /// The limit checked.
    pub limit: Limit,
    /// Whether the response stays inside everywhere checked.
    pub pass: bool,
    /// The smallest distance to a bound (dB); negative where the bound is crossed.
    pub worst_margin_db: Decibels,
    /// Where that happens (Hz).
    pub worst_at_hz: Hertz,
}

/// Checks a limit at every grid point in its range, at both ends of the range and at every
/// refined peak and notch inside it (so a narrow peak between grid points is not missed).
pub fn check_limit(
    ev: &Evaluator<'_>,
    grid: &Grid,
    trace: &Trace,
    index: usize,
    figures: &Figures,
    limit: &Limit,
) -> Result<LimitResult, AnalysisError> {
    let mut probe = Refiner::new(ev, index);
    let inside = |f: f64| f >= limit.from && f <= limit.to;
    let mut worst = (f64::INFINITY, limit.from);
    let mut consider = |m: f64, f: f64| {
        // A NaN margin (an exact zero of |H| against a min_db) is a failure.
        let m = if m.is_nan() { f64::NEG_INFINITY } else { m };
        if m < worst.0 {
            worst = (m, f);
        }
    };
    let margins_of = |db: f64| {
        [
            limit.max_db.map(|hi| hi - db),
            limit.min_db.map(|lo| db - lo),
        ]
        .into_iter()
        .flatten()
    };
    // Grid points from the trace; refined points and the range ends re-solved.
    for (k, &db) in trace.db.iter().enumerate().take(grid.len()) {
        let f = grid.at(k);
        if inside(f) {
            margins_of(db).for_each(|m| consider(m, f));
        }
    }
    let mut freqs: Vec<f64> = Vec::new();
    freqs.extend(
        figures
            .peaks
            .iter()
            .chain(&figures.notches)
            .map(|e| e.freq_hz)
            .filter(|f| inside(*f)),
    );
    freqs.push(limit.from);
    freqs.push(limit.to);
    let mut worst = (f64::INFINITY, limit.from);
    for f in freqs {
        let db = probe.db(f)?;
        for m in [
            limit.max_db.map(|hi| hi - db),
            limit.min_db.map(|lo| db - lo),
        ]
        .into_iter()
        .flatten()
        {
            // A NaN margin (an exact zero of |H| against a min_db) is a failure.
            let m = if m.is_nan() { f64::NEG_INFINITY } else { m };
            if m < worst.0 {
                worst = (m, f);
            }
        }
    }
    Ok(LimitResult {
        limit: limit.clone(),
        pass: worst.0 >= 0.0,
        worst_margin_db: worst.0,
        worst_at_hz: worst.1,
    })
}

/// What the figures need of a swept response, kept compactly so a sweep of millions of
/// points can be summarised without holding its complex values: magnitude in dB (f64) and
/// the phase unwrapped along the sweep (f32; only used to bracket, every figure is then
/// re-solved), and optionally the group delay (f32, for plots). Built chunk by chunk.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Trace {
    /// 20·log10|H| per point.
    pub db: Vec<f64>,
    /// Unwrapped phase in degrees per point (see [`crate::export::Unwrapper`]).
    pub phase_deg: Vec<f32>,
    /// Group delay (s) per point, if it was computed.
    pub delay_s: Option<Vec<f32>>,
    unwrap: crate::export::Unwrapper,
}

impl Trace {
    /// An empty trace, with room for a delay column when `delay` is set.
    pub fn new(delay: bool) -> Self {
        Trace {
            delay_s: delay.then(Vec::new),
            ..Trace::default()
        }
    }

    /// Appends the next points, in sweep order, and returns their polar form (the phase
    /// unwrapped continuing this trace's previous points) for other writers to share.
    pub fn push(
        &mut self,
        values: &[num_complex::Complex64],
        delays: Option<&[f64]>,
    ) -> crate::export::Polar {
        let polar = crate::export::Polar::compute(values, &mut self.unwrap);
        self.db.extend_from_slice(&polar.db);
        self.phase_deg
            .extend(polar.unwrapped_deg.iter().map(|&p| p as f32));
        if let (Some(d), Some(src)) = (self.delay_s.as_mut(), delays) {
            d.extend(src.iter().map(|&x| x as f32));
        }
        polar
    }

    /// A trace of a whole column at once.
    pub fn from_values(values: &[num_complex::Complex64], delays: Option<&[f64]>) -> Self {
        let mut t = Trace::new(delays.is_some());
        t.push(values, delays);
        t
    }
}

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

/// Evaluates one response at any frequency, re-solving the network.
pub struct Refiner<'e, 'a> {
    ev: &'e Evaluator<'a>,
    ws: Workspace<'a>,
    index: usize,
}

impl<'e, 'a> Refiner<'e, 'a> {
    /// A probe of response `index`.
    pub fn new(ev: &'e Evaluator<'a>, index: usize) -> Self {
        Refiner {
            ev,
            ws: ev.workspace(),
            index,
        }
    }

    /// Value and derivative at `f`.
    pub fn point(&mut self, f: Hertz) -> Result<Point, AnalysisError> {
        let pts = self.ev.at(&mut self.ws, f, true)?;
        Ok(pts.get(self.index).copied().unwrap_or_default())
    }

    /// Magnitude in dB at `f`.
    pub fn db(&mut self, f: Hertz) -> Result<f64, AnalysisError> {
        let v = self.ev.at(&mut self.ws, f, false)?;
        Ok(20.0 * v.get(self.index).map_or(0.0, |p| p.value.norm()).log10())
    }

    /// Slope sign function Re(H̄·H′)/|H|² (d ln|H| / dω) at `f`.
    fn log_slope(&mut self, f: Hertz) -> Result<f64, AnalysisError> {
        let p = self.point(f)?;
        Ok((p.value.conj() * p.derivative).re / p.value.norm_sqr().max(f64::MIN_POSITIVE))
    }

    /// The frequency in `[lo, hi]` where `g(f) = 0`, given g's values at the ends.
    fn root_in(
        &mut self,
        lo: Hertz,
        hi: Hertz,
        glo: f64,
        ghi: f64,
        mut g: impl FnMut(&mut Self, Hertz) -> Result<f64, AnalysisError>,
    ) -> Result<Hertz, AnalysisError> {
        let u = brent_root(
            |u: f64| g(self, u.exp()),
            lo.ln(),
            hi.ln(),
            glo,
            ghi,
            FREQ_TOL * 0.1,
        )?;
        Ok(u.exp())
    }

    /// Refines an extremum of |H| bracketed by `[lo, hi]` around grid point `mid`.
    fn extremum(
        &mut self,
        lo: Hertz,
        mid: Hertz,
        hi: Hertz,
        peak: bool,
    ) -> Result<Hertz, AnalysisError> {
        let (slo, shi) = (self.log_slope(lo)?, self.log_slope(hi)?);
        if (slo > 0.0) != (shi > 0.0) && slo != 0.0 && shi != 0.0 {
            return self.root_in(lo, hi, slo, shi, |p, f| p.log_slope(f));
        }
        let sign = if peak { -1.0 } else { 1.0 };
        let (u, _) = brent_min(
            |u: f64| Ok::<f64, AnalysisError>(sign * self.db(u.exp())?),
            lo.ln(),
            hi.ln(),
            mid.ln(),
            1e-10,
        )?;
        Ok(u.exp())
    }
}

/// Computes every figure of response `index` from its trace over `grid`.
pub fn figures(
    ev: &Evaluator<'_>,
    grid: &Grid,
    trace: &Trace,
    index: usize,
    opts: &MetricOptions,
) -> Result<Figures, AnalysisError> {
    let spec = &ev.analysis().responses()[index];
    let mut probe = Refiner::new(ev, index);
    let db = &trace.db;
    let n = grid.len().min(db.len());
    let freq = |k: usize| grid.at(k);
    // Grid points at 0 Hz cannot sit on a log axis; refinements work in ln f. Grids ascend,
    // so only a first point can be 0 Hz (found once, not by evaluating every point).
    let k0 = usize::from(n > 0 && freq(0) <= 0.0);
    let usable = move || (k0..n).filter(move |&k| db[k].is_finite());

    let mut peaks = Vec::new();
    let mut notches = Vec::new();
    let mut window: [usize; 3] = [0; 3];
    for (count, k) in usable().enumerate() {
        window = [window[1], window[2], k];
        if count < 2 {
            continue;
        }
        let [i, j, k] = window;
        let is_peak = db[j] > db[i] && db[j] >= db[k];
        let is_notch = db[j] < db[i] && db[j] <= db[k];
        // Rounding wiggles deep in a stopband are not extrema worth a name.
        let prominence = (db[j] - db[i]).abs().max((db[j] - db[k]).abs());
        if !(is_peak || is_notch) || prominence < 1e-6 {
            continue;
        }
        let f = probe.extremum(freq(i), freq(j), freq(k), is_peak)?;
        let e = Extremum {
            freq_hz: f,
            magnitude_db: probe.db(f)?,
            q: None,
        };
        if is_peak {
            peaks.push(e);
        } else {
            notches.push(e);
        }
    }

    // The reference level.
    let (reference_db, reference_hz) = match opts.reference {
        Reference::Absolute => (0.0, None),
        Reference::AtFrequency(f) => (probe.db(f)?, Some(f)),
        Reference::PassbandMaximum => {
            // The first point within rounding (1e-9 dB) of the largest, so a flat passband
            // is referred to its start rather than to wherever rounding peaks.
            let top = usable().map(|k| db[k]).fold(f64::NEG_INFINITY, f64::max);
            let kmax = usable().find(|&k| db[k] >= top - 1e-9);
            match kmax {
                None => (0.0, None),
                Some(k) => match peaks.iter().find(|p| p.magnitude_db >= db[k]) {
                    Some(p) => (p.magnitude_db, Some(p.freq_hz)),
                    None => (db[k], Some(freq(k))),
                },
            }
        }
    };
    let level = reference_db + opts.level_db;
    // Refined extrema join the grid as bracketing points, so a narrow peak between two grid
    // points still yields its crossings.
    let mut extra: Vec<(f64, f64)> = peaks
        .iter()
        .chain(&notches)
        .map(|e| (e.freq_hz, e.magnitude_db))
        .chain(reference_hz.map(|f| (f, reference_db)))
        .filter(|p| p.1.is_finite())
        .collect();
    extra.sort_by(|a, b| a.0.total_cmp(&b.0));
    let pts = || merged(usable().map(|k| (freq(k), db[k])), &extra);
    let crossings = crossings_at(&mut probe, pts(), level)?;
    let first = usable().next();
    let rf = reference_hz.unwrap_or_else(|| first.map_or(1.0, freq));
    let lower = crossings
        .iter()
        .rev()
        .find(|c| c.freq_hz < rf)
        .map(|c| c.freq_hz);
    let upper = crossings.iter().find(|c| c.freq_hz > rf).map(|c| c.freq_hz);
    let (bandwidth, centre, q) = match (lower, upper) {
        (Some(l), Some(u)) => {
            let c = (l * u).sqrt();
            (Some(u - l), Some(c), Some(c / (u - l)))
        }
        _ => (None, None, None),
    };

    // Q of each peak from its own −3 dB points.
    for p in peaks.iter_mut() {
        let cs = crossings_at(&mut probe, pts(), p.magnitude_db + HALF_POWER_DB)?;
        let l = cs.iter().rev().find(|c| c.freq_hz < p.freq_hz);
        let u = cs.iter().find(|c| c.freq_hz > p.freq_hz);
        if let (Some(l), Some(u)) = (l, u) {
            p.q = Some(p.freq_hz / (u.freq_hz - l.freq_hz));
        }
    }
    peaks.truncate(MAX_REPORTED);
    notches.truncate(MAX_REPORTED);

    // Any response in ohms or siemens is an impedance or admittance, driving-point or
    // written as a ratio of a voltage and a current.
    let resonances = match spec.kind.unit() {
        ResponseUnit::Ohms | ResponseUnit::Siemens => {
            let wrapped = |k: usize| {
                let p = f64::from(trace.phase_deg[k]);
                p - 360.0 * (p / 360.0).round()
            };
            let phase_pts = usable().map(|k| (freq(k), wrapped(k)));
            resonances(&mut probe, phase_pts, &pts, spec.kind.unit())?
        }
        ResponseUnit::Ratio => Vec::new(),
    };
    let group_delay_s = match first {
        Some(k) => Some(probe.point(reference_hz.unwrap_or(freq(k)))?.group_delay()),
        None => None,
    };
    let margins = if spec.loop_gain {
        let phase_pts = usable().map(|k| (freq(k), f64::from(trace.phase_deg[k])));
        Some(margins(&mut probe, phase_pts, pts())?)
    } else {
        None
    };
    Ok(Figures {
        response: spec.name.clone(),
        unit: spec.kind.unit().symbol(),
        reference_db,
        reference_hz,
        level_db: level,
        crossings,
        lower_cutoff_hz: lower,
        upper_cutoff_hz: upper,
        bandwidth_hz: bandwidth,
        centre_hz: centre,
        q,
        peaks,
        notches,
        resonances,
        group_delay_s,
        margins,
    })
}

/// Crossings of `level` along `pts` (frequency, dB), ascending, each refined on the network.
fn crossings_at(
    probe: &mut Refiner<'_, '_>,
    pts: impl Iterator<Item = (f64, f64)>,
    level: f64,
) -> Result<Vec<Crossing>, AnalysisError> {
    let mut out = Vec::new();
    let mut prev: Option<(f64, f64)> = None;
    for (fj, dj) in pts {
        let Some((fi, di)) = prev.replace((fj, dj)) else {
            continue;
        };
        let (gi, gj) = (di - level, dj - level);
        if gi == 0.0 && out.last().map(|c: &Crossing| c.freq_hz) != Some(fi) {
            out.push(Crossing {
                freq_hz: fi,
                rising: gj > 0.0,
            });
            continue;
        }
        if (gi < 0.0) == (gj < 0.0) || gj == 0.0 {
            continue;
        }
        let f = probe.root_in(fi, fj, gi, gj, |p, f| Ok(p.db(f)? - level))?;
        out.push(Crossing {
            freq_hz: f,
            rising: gj > gi,
        });
        if out.len() >= MAX_REPORTED {
            break;
        }
    }
    Ok(out)
}

/// The grid's (frequency, dB) points with refined extra points (sorted) merged in, ascending,
/// without copying the grid.
fn merged<'x>(
    grid: impl Iterator<Item = (f64, f64)> + 'x,
    extra: &'x [(f64, f64)],
) -> impl Iterator<Item = (f64, f64)> + 'x {
    let mut extra = extra.iter().copied().peekable();
    let mut grid = grid.peekable();
    let mut last = f64::NAN;
    std::iter::from_fn(move || loop {
        let next = match (grid.peek(), extra.peek()) {
            (Some(g), Some(e)) if e.0 < g.0 => extra.next(),
            (Some(_), _) => grid.next(),
            (None, Some(_)) => extra.next(),
            (None, None) => None,
        }?;
        if next.0 != last {
            last = next.0;
            return Some(next);
        }
    })
}

fn resonances<'p, I: Iterator<Item = (f64, f64)> + 'p>(
    probe: &mut Refiner<'_, '_>,
    phase_pts: impl Iterator<Item = (f64, f64)>,
    pts: &impl Fn() -> I,
    unit: ResponseUnit,
) -> Result<Vec<Resonance>, AnalysisError> {
    let mut out = Vec::new();
    let mut prev: Option<(f64, f64)> = None;
    for (fj, pj) in phase_pts {
        let Some((fi, pi)) = prev.replace((fj, pj)) else {
            continue;
        };
        // A zero crossing of the phase with the value in the right half-plane (|φ| < 90°).
        if (pi < 0.0) == (pj < 0.0) || pi.abs() >= 90.0 || pj.abs() >= 90.0 {
            continue;
        }
        let f0 = probe.root_in(fi, fj, pi, pj, |p, f| Ok(p.point(f)?.value.arg()))?;
        let pt = probe.point(f0)?;
        let omega0 = 2.0 * PI * f0;
        let slope = (pt.derivative / pt.value).im;
        let q_phase = 0.5 * omega0 * slope.abs();
        // Falling phase through zero means |value| passes a maximum, for Z and Y alike
        // (the reactance or susceptance rises with frequency in a passive network).
        let magnitude_max = slope < 0.0;
        let kind = if magnitude_max == (unit == ResponseUnit::Ohms) {
            "parallel"
        } else {
            "series"
        };
        let here = 20.0 * pt.value.norm().log10();
        let level = if magnitude_max {
            here + HALF_POWER_DB
        } else {
            here - HALF_POWER_DB
        };
        let cs = crossings_at(probe, merged(pts(), &[(f0, here)]), level)?;
        let l = cs.iter().rev().find(|c| c.freq_hz < f0);
        let u = cs.iter().find(|c| c.freq_hz > f0);
        let q_bandwidth = match (l, u) {
            (Some(l), Some(u)) => Some(f0 / (u.freq_hz - l.freq_hz)),
            _ => None,
        };
        out.push(Resonance {
            freq_hz: f0,
            kind,
            magnitude: pt.value.norm(),
            q_phase_slope: q_phase,
            q_bandwidth,
        });
        if out.len() >= MAX_REPORTED {
            break;
        }
    }
    Ok(out)
}

fn margins(
    probe: &mut Refiner<'_, '_>,
    phase_pts: impl Iterator<Item = (f64, f64)>,
    db_pts: impl Iterator<Item = (f64, f64)>,
) -> Result<Margins, AnalysisError> {
    // Unwrapped phase near a grid point: the principal value moved by whole turns to lie
    // closest to the grid's unwrapped value.
    let local_phase = |p: &mut Refiner<'_, '_>, f: f64, near: f64| -> Result<f64, AnalysisError> {
        let a = p.point(f)?.value.arg().to_degrees();
        Ok(a + 360.0 * ((near - a) / 360.0).round())
    };
    let mut m = Margins {
        gain_crossover_hz: None,
        phase_margin_deg: None,
        phase_crossover_hz: None,
        gain_margin_db: None,
    };
    let phases: Vec<(f64, f64)> = phase_pts.collect();
    let gc = crossings_at(probe, db_pts, 0.0)?;
    if let Some(c) = gc.first() {
        let k = phases
            .partition_point(|p| p.0 < c.freq_hz)
            .min(phases.len().saturating_sub(1));
        if let Some(&(_, near)) = phases.get(k) {
            let ph = local_phase(probe, c.freq_hz, near)?;
            m.gain_crossover_hz = Some(c.freq_hz);
            m.phase_margin_deg = Some(180.0 + ph);
        }
    }
    'outer: for w in phases.windows(2) {
        let ((fi, a), (fj, b)) = (w[0], w[1]);
        // Levels −180 − 360·k between the two grid phases.
        let (lo, hi) = (a.min(b), a.max(b));
        let mut level = -180.0 + 360.0 * ((lo + 180.0) / 360.0).ceil();
        while level <= hi {
            if (a - level) * (b - level) < 0.0 || b == level {
                let near = 0.5 * (a + b);
                let f = probe.root_in(fi, fj, a - level, b - level, |p, f| {
                    Ok(local_phase(p, f, near)? - level)
                })?;
                m.phase_crossover_hz = Some(f);
                m.gain_margin_db = Some(-probe.db(f)?);
                break 'outer;
            }
            level += 360.0;
        }
    }
    Ok(m)
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
}
