//! Which part moves which figure, and by how much: normalised sensitivities by the adjoint
//! method.
//!
//! At a frequency, `S = ∂ln H/∂ln p` for every value p comes from the solve the response
//! already needs and one transposed solve ([`Evaluator::sensitivities`]); `Re S` is the
//! relative change of |H| per relative change of p (× 20/ln 10 × 0.01 for dB per %), `Im S`
//! the change of phase in radians (× 180/π × 0.01 for degrees per %).
//!
//! The figures' sensitivities follow by implicit differentiation at the refined figure,
//! never by re-solving with changed values:
//!
//! * a crossing of a level `L = reference + offset`: `g(f, p) = dB(f, p) − L(p) = 0`, so
//!   `∂f/∂ln p = −(∂dB/∂ln p − ∂L/∂ln p)/(∂dB/∂f)`, with the reference's own sensitivity at
//!   its frequency (DC, the high-frequency limit, the peak);
//! * a peak's level by the envelope theorem (`∂dB/∂ln p` at the peak); its frequency from
//!   `∂f/∂ln p = −(∂²dB/∂f∂ln p)/(∂²dB/∂f²)`, the f-derivatives by central differences of
//!   the exact adjoint quantities;
//! * a pole `s` of the pencil `(G + sC)·v = 0` from its right and left null vectors:
//!   `∂s/∂ln p = −uᵀ(∂G + s·∂C)v / (uᵀCv)`, hence its natural frequency and Q;
//! * a limit's worst margin from `∂dB/∂ln p` at the worst frequency (an extremum or an end
//!   of the range, so the frequency's own movement does not change it to first order);
//! * phase and gain margins from the crossings they are taken at.

use crate::metrics::{Figures, LimitResult};
use crate::network::{Param, PartId, Tolerance};
use crate::response::{AnalysisError, Evaluator, Point, Workspace};
use crate::stamp::System;
use faer::linalg::solvers::Solve;
use faer::{c64, Mat};
use num_complex::Complex64;
use serde::Serialize;
use std::f64::consts::{LN_10, PI};

/// A value a figure may depend on.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Value {
    /// The part.
    #[serde(skip)]
    pub part: PartId,
    /// Which of its values.
    #[serde(skip)]
    pub param: Param,
    /// The part's name, with `.gbw` for an op-amp's gain-bandwidth product.
    pub name: String,
    /// The nominal value.
    pub nominal: f64,
    /// Its tolerance, where the design gives one.
    #[serde(skip)]
    pub tolerance: Option<Tolerance>,
}

/// Every value of the analysed network that may vary (sources' phasors do not).
pub fn values(ev: &Evaluator<'_>) -> Vec<Value> {
    let net = ev.analysis().network();
    net.varied()
        .into_iter()
        .map(|v| {
            let name = net.part(v.part).map_or("?", |p| p.name.as_str());
            Value {
                part: v.part,
                param: v.param,
                name: match v.param {
                    Param::Main => name.to_string(),
                    Param::Gbw => format!("{name}.gbw"),
                },
                nominal: v.nominal,
                tolerance: v.tolerance,
            }
        })
        .collect()
}

/// dB per % of a normalised sensitivity.
pub fn db_per_percent(s: Complex64) -> f64 {
    20.0 / LN_10 * s.re * 0.01
}

/// Degrees per % of a normalised sensitivity.
pub fn deg_per_percent(s: Complex64) -> f64 {
    s.im.to_degrees() * 0.01
}

/// How a figure's sensitivity is stated.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
pub enum Per {
    /// Relative: % of the figure per % of the value (frequencies, Q).
    Relative,
    /// dB per % of the value (levels, margins in dB).
    Db,
    /// Degrees per % of the value (phase margin).
    Degrees,
}

impl Per {
    /// The unit as a table shows it.
    pub fn unit(self) -> &'static str {
        match self {
            Per::Relative => "%/%",
            Per::Db => "dB/%",
            Per::Degrees => "°/%",
        }
    }
}

/// The sensitivity of one figure to every value.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct FigureSensitivity {
    /// The figure, as the figures table names it (e.g. "upper cut-off", "pole pair 1 Q",
    /// "limit stopband margin").
    pub figure: String,
    /// The figure's nominal value (Hz, dB, degrees, or a Q).
    pub value: f64,
    /// How `per_value` is stated.
    pub per: Per,
    /// Per value (in the order of [`values`]): the figure's change per +1 % of the value.
    pub per_value: Vec<f64>,
}

impl FigureSensitivity {
    /// Values ranked by how much they move the figure, largest first: (index, sensitivity).
    pub fn ranked(&self) -> Vec<(usize, f64)> {
        let mut v: Vec<(usize, f64)> = self.per_value.iter().copied().enumerate().collect();
        v.sort_by(|a, b| b.1.abs().total_cmp(&a.1.abs()).then(a.0.cmp(&b.0)));
        v
    }
}

/// Response `index` at `f` and its normalised sensitivities to `values`.
pub fn at<'a>(
    ev: &Evaluator<'a>,
    ws: &mut Workspace<'a>,
    f: f64,
    index: usize,
    values: &[Value],
) -> Result<(Point, Vec<Complex64>), AnalysisError> {
    let params: Vec<(PartId, Param)> = values.iter().map(|v| (v.part, v.param)).collect();
    ev.sensitivities(ws, f, index, &params)
}

/// d dB/df (dB per Hz) from a point with its ω-derivative.
fn db_slope(p: &Point) -> f64 {
    20.0 / LN_10 * (p.derivative / p.value).re * 2.0 * PI
}

/// dφ/df (radians per Hz).
fn phase_slope(p: &Point) -> f64 {
    (p.derivative / p.value).im * 2.0 * PI
}

struct Probe<'e, 'a, 'w> {
    ev: &'e Evaluator<'a>,
    ws: &'w mut Workspace<'a>,
    index: usize,
    params: Vec<(PartId, Param)>,
    top: f64,
}

impl Probe<'_, '_, '_> {
    fn at(&mut self, f: f64) -> Result<(Point, Vec<Complex64>), AnalysisError> {
        self.ev.sensitivities(self.ws, f, self.index, &self.params)
    }
    /// ∂dB/∂ln p at f, per value.
    fn db(&mut self, f: f64) -> Result<Vec<f64>, AnalysisError> {
        Ok(self.at(f)?.1.iter().map(|s| 20.0 / LN_10 * s.re).collect())
    }
    /// The sensitivity of a reference level (dB per unit ln p).
    fn reference(&mut self, kind: &str, hz: Option<f64>) -> Result<Vec<f64>, AnalysisError> {
        let n = self.params.len();
        match (kind, hz) {
            ("absolute", _) => Ok(vec![0.0; n]),
            // The high-frequency limit: far above the sweep, where only the leading terms
            // of H remain.
            ("hf", _) | (_, None) => self.db(self.top * 1e4),
            // DC: at 0 Hz where the network solves there, just above otherwise.
            (_, Some(0.0)) => match self.db(0.0) {
                Ok(v) => Ok(v),
                Err(_) => self.db(self.top * 1e-9),
            },
            (_, Some(f)) => self.db(f),
        }
    }
    /// ∂f/∂ln p of a crossing at `f` of a level whose own sensitivity is `level`.
    fn crossing(&mut self, f: f64, level: &[f64]) -> Result<Vec<f64>, AnalysisError> {
        let (p, s) = self.at(f)?;
        let slope = db_slope(&p);
        Ok(s.iter()
            .zip(level)
            .map(|(s, l)| -(20.0 / LN_10 * s.re - l) / slope)
            .collect())
    }
}

/// The sensitivities of every figure of response `index` (`figures` as computed for it) and
/// of the worst margin of each limit in `checks` on it, to every value of `values`.
pub fn figure_sensitivities(
    ev: &Evaluator<'_>,
    figures: &Figures,
    index: usize,
    values: &[Value],
    checks: &[LimitResult],
    top_hz: f64,
) -> Result<Vec<FigureSensitivity>, AnalysisError> {
    let mut ws = ev.workspace();
    let mut pr = Probe {
        ev,
        ws: &mut ws,
        index,
        params: values.iter().map(|v| (v.part, v.param)).collect(),
        top: top_hz,
    };
    let mut out = Vec::new();
    let pct =
        |v: Vec<f64>, scale: f64| -> Vec<f64> { v.iter().map(|x| x * scale * 0.01).collect() };
    let mut push = |figure: String, value: f64, per: Per, per_value: Vec<f64>| {
        if per_value.iter().all(|x| x.is_finite()) {
            out.push(FigureSensitivity {
                figure,
                value,
                per,
                per_value,
            });
        }
    };
    if let Some(db) = figures.dc_db {
        let s = pr.reference("dc", Some(0.0))?;
        push("gain at 0 Hz".into(), db, Per::Db, pct(s, 1.0));
    }
    // Crossings against their references.
    let cut = |pr: &mut Probe<'_, '_, '_>,
               f: Option<f64>,
               r: Option<&crate::metrics::ReferenceLevel>|
     -> Result<Option<Vec<f64>>, AnalysisError> {
        let (Some(f), Some(r)) = (f, r) else {
            return Ok(None);
        };
        let level = pr.reference(r.kind, r.hz)?;
        Ok(Some(pr.crossing(f, &level)?))
    };
    let lower = cut(&mut pr, figures.lower_cutoff_hz, figures.reference.as_ref())?;
    let upper = cut(
        &mut pr,
        figures.upper_cutoff_hz,
        figures
            .upper_reference
            .as_ref()
            .or(figures.reference.as_ref()),
    )?;
    if let (Some(d), Some(f)) = (&lower, figures.lower_cutoff_hz) {
        push(
            "lower cut-off".into(),
            f,
            Per::Relative,
            pct(d.iter().map(|x| x / f).collect(), 100.0),
        );
    }
    if let (Some(d), Some(f)) = (&upper, figures.upper_cutoff_hz) {
        push(
            "upper cut-off".into(),
            f,
            Per::Relative,
            pct(d.iter().map(|x| x / f).collect(), 100.0),
        );
    }
    if let (Some(dl), Some(du), Some(l), Some(u)) = (
        &lower,
        &upper,
        figures.lower_cutoff_hz,
        figures.upper_cutoff_hz,
    ) {
        if figures.bandwidth_hz.is_some() {
            let bw = u - l;
            let dbw: Vec<f64> = du.iter().zip(dl).map(|(a, b)| (a - b) / bw).collect();
            let dc: Vec<f64> = du
                .iter()
                .zip(dl)
                .map(|(a, b)| 0.5 * (a / u + b / l))
                .collect();
            let dq: Vec<f64> = dc.iter().zip(&dbw).map(|(c, b)| c - b).collect();
            push("bandwidth".into(), bw, Per::Relative, pct(dbw, 100.0));
            push(
                "centre".into(),
                (l * u).sqrt(),
                Per::Relative,
                pct(dc, 100.0),
            );
            if let Some(q) = figures.q {
                push("band Q".into(), q, Per::Relative, pct(dq, 100.0));
            }
        }
    }
    // Peaks and notches: level by the envelope theorem, frequency by the mixed derivative.
    for (kind, list) in [("peak", &figures.peaks), ("notch", &figures.notches)] {
        for (k, e) in list.iter().enumerate().take(4) {
            let f = e.freq_hz;
            push(
                format!("{kind} {} level", k + 1),
                e.magnitude_db,
                Per::Db,
                pct(pr.db(f)?, 1.0),
            );
            let h = f * 1e-4 / e.q.unwrap_or(1.0).max(1.0);
            let (p1, s1) = pr.at(f + h)?;
            let (p0, s0) = pr.at(f - h)?;
            let curvature = (db_slope(&p1) - db_slope(&p0)) / (2.0 * h);
            let d: Vec<f64> = s1
                .iter()
                .zip(&s0)
                .map(|(a, b)| -(20.0 / LN_10 * (a.re - b.re) / (2.0 * h)) / curvature / f)
                .collect();
            push(
                format!("{kind} {} frequency", k + 1),
                f,
                Per::Relative,
                pct(d, 100.0),
            );
        }
    }
    for (k, r) in figures.resonances.iter().enumerate().take(4) {
        let (p, s) = pr.at(r.freq_hz)?;
        let slope = phase_slope(&p);
        let d: Vec<f64> = s.iter().map(|s| -s.im / slope / r.freq_hz).collect();
        push(
            format!("resonance {} frequency", k + 1),
            r.freq_hz,
            Per::Relative,
            pct(d, 100.0),
        );
    }
    // Poles.
    let (mut pairs, mut reals) = (0, 0);
    for row in figures
        .poles
        .rows
        .iter()
        .filter(|r| r.what == "pole" && !r.origin)
    {
        let s = Complex64::new(row.s_re, row.s_im);
        let Some(ds) = pole_derivatives(ev, s, &pr.params) else {
            continue;
        };
        let m = s.norm();
        let df0: Vec<f64> = ds.iter().map(|d| (s.conj() * d).re / (m * m)).collect();
        if row.pair {
            pairs += 1;
            push(
                format!("pole pair {pairs} f0"),
                row.f0_hz,
                Per::Relative,
                pct(df0.clone(), 100.0),
            );
            if let Some(q) = row.q.filter(|q| q.is_finite()) {
                // Q = |s|/(−2 Re s): dQ/Q = d|s|/|s| − d(Re s)/Re s.
                let dq: Vec<f64> = ds.iter().zip(&df0).map(|(d, f)| f - d.re / s.re).collect();
                push(
                    format!("pole pair {pairs} Q"),
                    q,
                    Per::Relative,
                    pct(dq, 100.0),
                );
            }
        } else {
            reals += 1;
            push(
                format!("pole {reals}"),
                row.f0_hz,
                Per::Relative,
                pct(df0, 100.0),
            );
        }
        if pairs + reals >= 8 {
            break;
        }
    }
    // Margins of a loop gain.
    if let Some(m) = &figures.margins {
        if let (Some(f), Some(pm)) = (m.gain_crossover_hz, m.phase_margin_deg) {
            let (p, s) = pr.at(f)?;
            let (gs, ps) = (db_slope(&p), phase_slope(&p));
            let df: Vec<f64> = s.iter().map(|s| -(20.0 / LN_10 * s.re) / gs).collect();
            let dpm: Vec<f64> = s
                .iter()
                .zip(&df)
                .map(|(s, d)| (s.im + ps * d).to_degrees())
                .collect();
            push(
                "gain crossover".into(),
                f,
                Per::Relative,
                pct(df.iter().map(|d| d / f).collect(), 100.0),
            );
            push("phase margin".into(), pm, Per::Degrees, pct(dpm, 1.0));
        }
        if let (Some(f), Some(gm)) = (m.phase_crossover_hz, m.gain_margin_db) {
            let (p, s) = pr.at(f)?;
            let (gs, ps) = (db_slope(&p), phase_slope(&p));
            let dgm: Vec<f64> = s
                .iter()
                .map(|s| -(20.0 / LN_10 * s.re + gs * (-s.im / ps)))
                .collect();
            push("gain margin".into(), gm, Per::Db, pct(dgm, 1.0));
        }
    }
    // Limits on this response.
    let name = &figures.response;
    for c in checks.iter().filter(|c| &c.limit.response == name) {
        let (p, s) = pr.at(c.worst_at_hz)?;
        let db = 20.0 * p.value.norm().log10();
        let from_max = c
            .limit
            .max_db
            .is_some_and(|m| ((m - db) - c.worst_margin_db).abs() <= 1e-9 * (1.0 + m.abs()));
        let sign = if from_max { -1.0 } else { 1.0 };
        let d: Vec<f64> = s.iter().map(|s| sign * 20.0 / LN_10 * s.re).collect();
        push(
            format!("limit {} margin", c.limit.name),
            c.worst_margin_db,
            Per::Db,
            pct(d, 1.0),
        );
    }
    Ok(out)
}

/// `∂s/∂ln p` of a pole s of the network (a root of det(G + sC)) for each value, from the
/// null vectors of G + sC: `−uᵀ(∂G + s·∂C)v / (uᵀ C v)`. None where the pole is not simple
/// enough for that (uᵀCv vanishes) or the system is too large for a dense factorisation.
pub fn pole_derivatives(
    ev: &Evaluator<'_>,
    s: Complex64,
    params: &[(PartId, Param)],
) -> Option<Vec<Complex64>> {
    let a = ev.analysis();
    let sys: &System = a.system();
    let n = sys.n;
    if n == 0 || n > crate::poles::MAX_UNKNOWNS {
        return None;
    }
    // Inverse iteration with a shift a hair off the pole, so the factorisation stays finite.
    let shift = s * (1.0 + 1e-10) + Complex64::new(1e-300, 0.0);
    let mut m = Mat::<c64>::zeros(n, n);
    for (k, &(r, c)) in sys.pattern.iter().enumerate() {
        let v = Complex64::new(sys.g[k], 0.0) + shift * sys.c[k];
        m[(r, c)] += c64::new(v.re, v.im);
    }
    let lu = m.partial_piv_lu();
    let start = |k: usize| c64::new(1.0 + 0.37 * (k as f64).sin(), 0.21 * (k as f64).cos());
    let normalise = |x: &mut Mat<c64>| {
        let norm = (0..n).map(|i| x[(i, 0)].norm_sqr()).sum::<f64>().sqrt();
        if norm > 0.0 && norm.is_finite() {
            for i in 0..n {
                x[(i, 0)] /= c64::new(norm, 0.0);
            }
        }
    };
    let mut v = Mat::<c64>::from_fn(n, 1, |i, _| start(i));
    let mut u = Mat::<c64>::from_fn(n, 1, |i, _| start(n - 1 - i));
    for _ in 0..3 {
        v = lu.solve(&v);
        normalise(&mut v);
        u = lu.solve_transpose(&u);
        normalise(&mut u);
    }
    let get = |x: &Mat<c64>, i: usize| {
        let z = x[(i, 0)];
        Complex64::new(z.re, z.im)
    };
    // uᵀ C v.
    let mut denom = Complex64::default();
    for (k, &(r, c)) in sys.pattern.iter().enumerate() {
        denom += get(&u, r) * sys.c[k] * get(&v, c);
    }
    if !(denom.norm() > 1e-12 && denom.re.is_finite() && denom.im.is_finite()) {
        return None;
    }
    let net = a.network();
    Some(
        params
            .iter()
            .map(|&(part, param)| {
                let (entries, _) = sys.derivative(net, part, param);
                let mut t = Complex64::default();
                for (r, c, dg, dc) in entries {
                    t += get(&u, r) * (s * dc + dg) * get(&v, c);
                }
                -t / denom
            })
            .collect(),
    )
}
