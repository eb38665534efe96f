//! Noise: what a front end really hears, by the adjoint method.
//!
//! Every resistor is a thermal (Johnson–Nyquist) noise current source across it, of
//! one-sided power spectral density `4kT/R` (A²/Hz), at the design's temperature T (300 K
//! unless the design says). An op-amp with noise given has a voltage source in series with
//! its non-inverting input and a current source from each input to ground, each white above
//! its 1/f corner: `S(f) = S_white·(1 + f_c/f)`. Capacitors, inductors, couplings and
//! controlled sources are noiseless. All sources are uncorrelated, so their powers add.
//!
//! The output is a node voltage or a node pair, read as `v = qᵀ·x`. One transposed solve
//! per frequency, `(G + jωC)ᵀ·y = q`, gives the transfer from every source at once: a
//! current `i` injected into node a and out of node b reaches the output as `(y_a − y_b)·i`
//! (the adjoint network; Tellegen's theorem), a voltage source in a branch row k as `y_k·e`
//! (scaled by an op-amp's A0 where the row is its internal state). So
//!
//! ```text
//! S_out(f) = Σ_sources |transfer_k(f)|²·S_k(f)      (V²/Hz)
//! ```
//!
//! with no solve per source, on the factorisation the sweep made anyway, on every solver
//! path. Referred to a ratio response H (`referred_to`), the density is divided by |H(f)|.
//! With a source resistor named (`source`), the noise figure is the IEEE one,
//! `F = 1 + N_added/N_source`, with the source's noise taken at T0 = 290 K as the IEEE
//! definition asks and every other part at the design's temperature.
//!
//! Integrated noise is `√∫S(f)df`, integrated on the live network — not from the grid — by
//! adaptive Gauss–Kronrod quadrature (QUADPACK's 7/15-point pair) in ln f, to a relative
//! error of 1e-10 (see [`integrate`]).

use crate::network::{Network, PartId, PartKind};
use crate::response::{AnalysisError, Evaluator};
use crate::stamp::{Readout, System};
use num_complex::Complex64;
use serde::Serialize;

/// Boltzmann's constant (J/K), exact in the SI since 2019.
pub const BOLTZMANN: f64 = 1.380_649e-23;

/// The IEEE reference temperature of the noise figure (K).
pub const T0: f64 = 290.0;

/// Where a noise source enters the network's equations.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Entry {
    /// A current into the first unknown (node) and out of the second (None: ground).
    Inject(Option<usize>, Option<usize>),
    /// A voltage in the right-hand side of equation row `.0`, times `.1`.
    Row(usize, f64),
}

/// One noise source of the network.
#[derive(Clone, Debug, PartialEq)]
pub struct Source {
    /// What it is, for tables: `R1`, `U1 voltage`, `U1 current at +`, `U1 current at −`.
    pub name: String,
    /// The part it belongs to.
    pub part: PartId,
    entry: Entry,
    /// One-sided power spectral density above the corner (A²/Hz or V²/Hz).
    white: f64,
    /// 1/f corner (Hz; 0 for none).
    corner: f64,
}

impl Source {
    /// Its power spectral density at `f` (infinite at 0 Hz below a 1/f corner).
    pub fn psd(&self, f: f64) -> f64 {
        if self.corner > 0.0 {
            self.white * (1.0 + self.corner / f)
        } else {
            self.white
        }
    }

    /// Its transfer to the output, from the adjoint solution `y`.
    fn transfer(&self, y: &[Complex64]) -> Complex64 {
        let at = |i: Option<usize>| i.and_then(|i| y.get(i).copied()).unwrap_or_default();
        match self.entry {
            Entry::Inject(a, b) => at(a) - at(b),
            Entry::Row(k, scale) => at(Some(k)) * scale,
        }
    }
}

/// How a noise response is computed.
#[derive(Clone, Debug, PartialEq)]
pub struct NoisePlan {
    /// The output voltage read-out `q`, as a dense vector (the adjoint's right-hand side).
    pub output: Vec<Complex64>,
    /// Every noise source of the network.
    pub sources: Vec<Source>,
    /// The ratio response the density is referred to, if any.
    pub referred_to: Option<usize>,
    /// The source resistor of the noise figure, as an index into `sources`.
    pub source: Option<usize>,
    /// The design's temperature (K).
    pub temperature: f64,
}

impl NoisePlan {
    /// The noise sources of `net` and the output read-out `output`.
    pub fn new(
        net: &Network,
        sys: &System,
        output: &Readout,
        referred_to: Option<usize>,
        source_part: Option<PartId>,
    ) -> NoisePlan {
        let t = net.temperature;
        let mut sources = Vec::new();
        let node = |n: crate::network::NodeId| System::node_index(n);
        for (i, p) in net.parts().iter().enumerate() {
            let id = PartId(i);
            match p.kind {
                PartKind::Resistor { a, b, ohms } => sources.push(Source {
                    name: p.name.clone(),
                    part: id,
                    entry: Entry::Inject(node(a), node(b)),
                    white: 4.0 * BOLTZMANN * t / ohms,
                    corner: 0.0,
                }),
                PartKind::IdealOpamp {
                    noninverting,
                    inverting,
                    ..
                }
                | PartKind::SinglePoleOpamp {
                    noninverting,
                    inverting,
                    ..
                } => {
                    let Some(n) = p.noise.as_deref().copied() else {
                        continue;
                    };
                    // The input voltage noise enters the op-amp's own equation: the ideal
                    // op-amp's v+ − v− = e_n, or the single-pole state's A0·(v+ + e_n − v−).
                    let row = match p.kind {
                        PartKind::SinglePoleOpamp { dc_gain, .. } => sys
                            .branch_of(id)
                            .and_then(|k| k.checked_sub(1))
                            .map(|s| Entry::Row(s, dc_gain)),
                        _ => sys.branch_of(id).map(|k| Entry::Row(k, 1.0)),
                    };
                    if let (Some(row), true) = (row, n.voltage > 0.0) {
                        sources.push(Source {
                            name: format!("{} voltage", p.name),
                            part: id,
                            entry: row,
                            white: n.voltage * n.voltage,
                            corner: n.voltage_corner,
                        });
                    }
                    if n.current > 0.0 {
                        for (input, label) in [(noninverting, "+"), (inverting, "−")] {
                            if input.is_ground() {
                                continue;
                            }
                            sources.push(Source {
                                name: format!("{} current at {label}", p.name),
                                part: id,
                                entry: Entry::Inject(node(input), None),
                                white: n.current * n.current,
                                corner: n.current_corner,
                            });
                        }
                    }
                }
                _ => {}
            }
        }
        let source = source_part.and_then(|sp| sources.iter().position(|s| s.part == sp));
        let mut q = vec![Complex64::new(0.0, 0.0); sys.n];
        for &(i, w) in &output.g {
            if let Some(v) = q.get_mut(i) {
                *v += w;
            }
        }
        NoisePlan {
            output: q,
            sources,
            referred_to,
            source,
            temperature: t,
        }
    }

    /// The output PSD of every source at `f` from the adjoint solution `y`, divided by
    /// `scale²` (|H|² of the referred-to response, or 1), into `out`; returns the total.
    pub fn contributions(&self, f: f64, y: &[Complex64], scale: f64, out: &mut Vec<f64>) -> f64 {
        out.clear();
        let s2 = scale * scale;
        let mut total = 0.0;
        for src in &self.sources {
            let p = src.psd(f) * src.transfer(y).norm_sqr() / s2;
            out.push(p);
            total += p;
        }
        total
    }

    /// The total output PSD at `f` (V²/Hz, or referred), as [`NoisePlan::contributions`]
    /// without keeping the parts.
    pub fn total(&self, f: f64, y: &[Complex64], scale: f64) -> f64 {
        let s2 = scale * scale;
        self.sources
            .iter()
            .map(|src| src.psd(f) * src.transfer(y).norm_sqr())
            .sum::<f64>()
            / s2
    }
}

/// The noise of a response at one frequency, source by source.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Breakdown {
    /// Total power spectral density (V²/Hz, or referred to the input).
    pub total: f64,
    /// Each source's part of it, in the order of [`NoisePlan::sources`].
    pub parts: Vec<f64>,
}

/// The noise figures of one noise response.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct NoiseFigures {
    /// The band integrated over (Hz).
    pub band_hz: (f64, f64),
    /// √∫S df over the band (V rms, or referred).
    pub rms: f64,
    /// The estimated error of the integral (relative), from the quadrature.
    pub relative_error: f64,
    /// The density at the band's geometric centre (V/√Hz, or referred).
    pub spot_density: f64,
    /// Where the spot density is taken (Hz).
    pub spot_hz: f64,
    /// Sources by their share of the integrated power, largest first: (name, share in %).
    pub contributors: Vec<(String, f64)>,
    /// The noise figure over the band (dB), `10·log10(1 + N_added/N_source(T0))` with
    /// integrated powers, where a source resistor is named.
    pub noise_figure_db: Option<f64>,
    /// The spot noise figure at `spot_hz` (dB), likewise.
    pub spot_noise_figure_db: Option<f64>,
}

/// The noise figures of response `index` (a noise response) over `band` (Hz, > 0): the
/// integrated rms noise, the density at the band's geometric centre, the sources' shares of
/// the integrated power, and the noise figure where a source resistor is named.
pub fn figures(
    ev: &Evaluator<'_>,
    index: usize,
    band: (f64, f64),
) -> Result<NoiseFigures, AnalysisError> {
    let plan = ev
        .noise_plan(index)
        .ok_or_else(|| AnalysisError::BadResponse {
            response: format!("#{index}"),
            reason: "is not a noise response".into(),
        })?;
    let (lo, hi) = band;
    let mut ws = ev.workspace();
    // ∫ S(f) df = ∫ S(e^u)·e^u du, every source at once.
    let pieces = (((hi / lo).log10() * 2.0).ceil() as usize).clamp(4, 64);
    let (ints, relative_error) = integrate(
        |u: f64, out: &mut Vec<f64>| {
            let f = u.exp();
            let b = ev.noise_at(&mut ws, f, index)?;
            out.clear();
            out.push(b.total * f);
            out.extend(b.parts.iter().map(|p| p * f));
            Ok::<(), AnalysisError>(())
        },
        lo.ln(),
        hi.ln(),
        pieces,
        1e-10,
        200_000,
    )?;
    let total = ints.first().copied().unwrap_or(0.0);
    let mut contributors: Vec<(String, f64)> = plan
        .sources
        .iter()
        .zip(ints.iter().skip(1))
        .map(|(s, p)| {
            (
                s.name.clone(),
                if total > 0.0 { 100.0 * p / total } else { 0.0 },
            )
        })
        .collect();
    contributors.sort_by(|a, b| b.1.total_cmp(&a.1));
    let spot_hz = (lo * hi).sqrt();
    let spot = ev.noise_at(&mut ws, spot_hz, index)?;
    let t = plan.temperature;
    let (noise_figure_db, spot_noise_figure_db) = match plan.source {
        Some(k) => (
            ints.get(1 + k)
                .and_then(|&src| noise_figure_db(total, src, t)),
            spot.parts
                .get(k)
                .and_then(|&src| noise_figure_db(spot.total, src, t)),
        ),
        None => (None, None),
    };
    Ok(NoiseFigures {
        band_hz: band,
        rms: total.sqrt(),
        relative_error,
        spot_density: spot.total.sqrt(),
        spot_hz,
        contributors,
        noise_figure_db,
        spot_noise_figure_db,
    })
}

/// The total density and each source's density (V/√Hz, or referred) of noise response
/// `index` at every frequency of `freqs`, solved in parallel: (totals, one column per
/// source in the order of [`NoisePlan::sources`]).
pub fn densities(
    ev: &Evaluator<'_>,
    index: usize,
    freqs: &[f64],
) -> Result<(Vec<f64>, Vec<Vec<f64>>), AnalysisError> {
    use rayon::prelude::*;
    let rows: Vec<Breakdown> = freqs
        .par_iter()
        .map_init(|| ev.workspace(), |ws, &f| ev.noise_at(ws, f, index))
        .collect::<Result<_, _>>()?;
    let m = ev.noise_plan(index).map_or(0, |p| p.sources.len());
    let mut cols = vec![Vec::with_capacity(freqs.len()); m];
    let mut totals = Vec::with_capacity(freqs.len());
    for r in rows {
        totals.push(r.total.sqrt());
        for (c, p) in cols.iter_mut().zip(&r.parts) {
            c.push(p.sqrt());
        }
    }
    Ok((totals, cols))
}

/// The noise figure `F = 1 + N_added / N_source(T0)` in dB from the source's and the total
/// output noise powers at the design temperature `t`.
pub fn noise_figure_db(total: f64, source: f64, t: f64) -> Option<f64> {
    if source <= 0.0 || !total.is_finite() {
        return None;
    }
    let at_t0 = source * T0 / t;
    Some(10.0 * (1.0 + (total - source) / at_t0).log10())
}

/// QUADPACK's 15-point Kronrod nodes (positive half, the last is 0) and weights, with the
/// weights of the embedded 7-point Gauss rule on nodes 1, 3, 5, 7 (Piessens et al.,
/// *QUADPACK*, 1983, routine qk15).
const XGK: [f64; 8] = [
    0.991_455_371_120_812_6,
    0.949_107_912_342_758_5,
    0.864_864_423_359_769_1,
    0.741_531_185_599_394_4,
    0.586_087_235_467_691_1,
    0.405_845_151_377_397_2,
    0.207_784_955_007_898_5,
    0.0,
];
const WGK: [f64; 8] = [
    0.022_935_322_010_529_22,
    0.063_092_092_629_978_55,
    0.104_790_010_322_250_2,
    0.140_653_259_715_525_9,
    0.169_004_726_639_267_9,
    0.190_350_578_064_785_4,
    0.204_432_940_075_298_9,
    0.209_482_141_084_727_8,
];
const WG: [f64; 4] = [
    0.129_484_966_168_869_7,
    0.279_705_391_489_276_7,
    0.381_830_050_505_118_9,
    0.417_959_183_673_469_4,
];

/// One Gauss–Kronrod 7/15 step on `[a, b]` of a vector-valued integrand `g`, whose first
/// component steers the error: (Kronrod estimate, |Kronrod − Gauss| of the first component).
fn gk15<E>(
    g: &mut impl FnMut(f64, &mut Vec<f64>) -> Result<(), E>,
    a: f64,
    b: f64,
    scratch: &mut Vec<f64>,
) -> Result<(Vec<f64>, f64), E> {
    let (c, h) = (0.5 * (a + b), 0.5 * (b - a));
    let mut k: Vec<f64> = Vec::new();
    let mut gauss = 0.0;
    for i in 0..15 {
        let (x, wk, wg) = if i < 7 {
            (
                c - h * XGK[i],
                WGK[i],
                if i % 2 == 1 { WG[i / 2] } else { 0.0 },
            )
        } else if i == 7 {
            (c, WGK[7], WG[3])
        } else {
            let j = 14 - i;
            (
                c + h * XGK[j],
                WGK[j],
                if j % 2 == 1 { WG[j / 2] } else { 0.0 },
            )
        };
        g(x, scratch)?;
        if k.is_empty() {
            k = vec![0.0; scratch.len()];
        }
        for (acc, v) in k.iter_mut().zip(scratch.iter()) {
            *acc += wk * v * h;
        }
        gauss += wg * scratch.first().copied().unwrap_or(0.0) * h;
    }
    let err = (k.first().copied().unwrap_or(0.0) - gauss).abs();
    Ok((k, err))
}

/// ∫ g over `[a, b]` for a vector-valued `g` (its first component is the one whose error is
/// controlled), by globally adaptive Gauss–Kronrod 7/15: start from `pieces` equal
/// sub-intervals, split the one with the largest error estimate until the summed estimate is
/// below `rel_tol` of the integral or `max_evals` evaluations are spent. Returns the
/// integral and its estimated relative error.
pub fn integrate<E>(
    mut g: impl FnMut(f64, &mut Vec<f64>) -> Result<(), E>,
    a: f64,
    b: f64,
    pieces: usize,
    rel_tol: f64,
    max_evals: usize,
) -> Result<(Vec<f64>, f64), E> {
    let pieces = pieces.max(1);
    let mut scratch = Vec::new();
    // (a, b, estimate, error)
    let mut parts: Vec<(f64, f64, Vec<f64>, f64)> = Vec::new();
    for k in 0..pieces {
        let x0 = a + (b - a) * k as f64 / pieces as f64;
        let x1 = a + (b - a) * (k + 1) as f64 / pieces as f64;
        let (v, e) = gk15(&mut g, x0, x1, &mut scratch)?;
        parts.push((x0, x1, v, e));
    }
    let mut evals = 15 * pieces;
    loop {
        let total: f64 = parts
            .iter()
            .map(|p| p.2.first().copied().unwrap_or(0.0))
            .sum();
        let err: f64 = parts.iter().map(|p| p.3).sum();
        if err <= rel_tol * total.abs() || evals + 30 > max_evals {
            let n = parts.first().map_or(0, |p| p.2.len());
            let mut sum = vec![0.0; n];
            for p in &parts {
                for (s, v) in sum.iter_mut().zip(&p.2) {
                    *s += v;
                }
            }
            let rel = if total != 0.0 { err / total.abs() } else { 0.0 };
            return Ok((sum, rel));
        }
        let Some(worst) = parts
            .iter()
            .enumerate()
            .max_by(|x, y| x.1 .3.total_cmp(&y.1 .3))
            .map(|(i, _)| i)
        else {
            return Ok((Vec::new(), 0.0));
        };
        let (x0, x1, _, _) = parts.swap_remove(worst);
        let m = 0.5 * (x0 + x1);
        let (v0, e0) = gk15(&mut g, x0, m, &mut scratch)?;
        let (v1, e1) = gk15(&mut g, m, x1, &mut scratch)?;
        parts.push((x0, m, v0, e0));
        parts.push((m, x1, v1, e1));
        evals += 30;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The 15-point Kronrod rule is exact for polynomials up to degree 22 and the embedded
    /// 7-point Gauss rule up to degree 13 (their defining property), on [−1, 1].
    #[test]
    fn gauss_kronrod_rules_are_exact_on_polynomials() {
        for degree in 0..=22 {
            let exact = if degree % 2 == 1 {
                0.0
            } else {
                2.0 / (degree as f64 + 1.0)
            };
            let mut g = |x: f64, out: &mut Vec<f64>| {
                out.clear();
                out.push(x.powi(degree));
                Ok::<(), ()>(())
            };
            let (k, err) = gk15(&mut g, -1.0, 1.0, &mut Vec::new()).unwrap();
            assert!(
                (k[0] - exact).abs() < 1e-14,
                "Kronrod, degree {degree}: {}",
                k[0]
            );
            if degree <= 13 {
                assert!(err < 1e-14, "Gauss, degree {degree}: {err}");
            }
        }
    }

    /// Adaptive integration of a sharp Lorentzian: ∫ 1/(1 + (x/ε)²) over [−1, 1] is
    /// 2ε·atan(1/ε) (closed form).
    #[test]
    fn adaptive_integration_resolves_a_sharp_peak() {
        let eps: f64 = 1e-4;
        let (v, rel) = integrate(
            |x: f64, out: &mut Vec<f64>| {
                out.clear();
                out.push(1.0 / (1.0 + (x / eps).powi(2)));
                Ok::<(), ()>(())
            },
            -1.0,
            1.0,
            4,
            1e-12,
            100_000,
        )
        .unwrap();
        let exact = 2.0 * eps * (1.0 / eps).atan();
        assert!(
            (v[0] / exact - 1.0).abs() < 1e-11,
            "{} vs {exact} ({rel})",
            v[0]
        );
    }
}
