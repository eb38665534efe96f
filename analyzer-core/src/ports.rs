//! Ports and N-port matrices: S (power waves with real reference impedances, after
//! Kurokawa), Z, Y, and ABCD for two-ports, from one factorisation per frequency and one
//! solve per port.
//!
//! A port is a pair of nodes, a real reference impedance `z0` and a place to drive and read.
//! For the port analysis every port is terminated by its `z0` (a resistor between its nodes)
//! and the design's own sources are off (voltage sources short, current sources open); a
//! voltage source across a port's own nodes would short it and is refused. Driving port j
//! with 1 A in parallel with its termination gives incident waves `a_j = √z0_j/2` and
//! `a_i = 0` elsewhere, so with the port voltages `V_i`:
//!
//! ```text
//! S_ij = 2·V_i/√(z0_i·z0_j) − δ_ij
//! ```
//!
//! Z follows from S as `Z = (I − S′)⁻¹(I + S′)·diag(z0)` with `S′ = diag(√z0)·S·diag(1/√z0)`
//! (where I − S′ is invertible), Y = Z⁻¹, and for two ports ABCD from Z.

use crate::network::{Network, NetworkError, NodeId, PartKind};
use crate::response::{Analysis, AnalysisError, Evaluator, ResponseKind, ResponseSpec, Workspace};
use crate::sweep::Grid;
use faer::linalg::solvers::Solve;
use faer::{c64, Mat};
use num_complex::Complex64;

/// The complex type of S-parameters (re-exported for front ends).
pub type Complex = Complex64;
use rayon::prelude::*;
use serde::Serialize;

/// A port.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Port {
    /// Its name.
    pub name: String,
    /// The node the port's current enters.
    #[serde(skip)]
    pub plus: NodeId,
    /// The node it leaves by.
    #[serde(skip)]
    pub minus: NodeId,
    /// Reference impedance (Ω, real, > 0).
    pub z0: f64,
    /// The design's sources this port stands in for: opened for the port analysis (a
    /// transmitter's EMF whose output resistance the port's z0 replaces).
    #[serde(skip)]
    pub replaces: Vec<crate::network::PartId>,
}

/// Why a port analysis cannot be made.
#[derive(Debug, thiserror::Error)]
pub enum PortError {
    /// No ports.
    #[error(
        "the design has no [ports]; add e.g. p1 = {{ between = [\"in\", \"gnd\"], z0 = \"50\" }}"
    )]
    NoPorts,
    /// A voltage source across a port.
    #[error("port {port} sits across voltage source {voltage_source}, which shorts it when the design's sources are off; drive the port instead of the source (remove it) or put the port elsewhere")]
    Shorted {
        /// The port.
        port: String,
        /// The source.
        voltage_source: String,
    },
    /// The terminated network.
    #[error(transparent)]
    Network(#[from] NetworkError),
    /// The analysis.
    #[error(transparent)]
    Analysis(#[from] AnalysisError),
}

/// An N-port view of a network.
pub struct NPort {
    analysis: Analysis,
    ports: Vec<Port>,
}

/// The scattering matrix at one frequency.
#[derive(Clone, Debug, PartialEq)]
pub struct SPoint {
    /// Frequency (Hz).
    pub freq: f64,
    /// S, row-major N×N.
    pub s: Vec<Complex64>,
    /// dS/dω, row-major.
    pub ds: Vec<Complex64>,
}

impl NPort {
    /// Terminates `net` at every port and prepares one transfer read-out per port pair.
    pub fn new(net: &Network, ports: Vec<Port>) -> Result<Self, PortError> {
        if ports.is_empty() {
            return Err(PortError::NoPorts);
        }
        for p in &ports {
            for (k, part) in net.parts().iter().enumerate() {
                if p.replaces.contains(&crate::network::PartId(k)) {
                    continue;
                }
                if let PartKind::VoltageSource { plus, minus, .. } = part.kind {
                    if (plus, minus) == (p.plus, p.minus) || (plus, minus) == (p.minus, p.plus) {
                        return Err(PortError::Shorted {
                            port: p.name.clone(),
                            voltage_source: part.name.clone(),
                        });
                    }
                }
            }
        }
        let replaced: Vec<crate::network::PartId> = ports
            .iter()
            .flat_map(|p| p.replaces.iter().copied())
            .collect();
        let net = net.with_sources_opened(&replaced)?;
        let net = &net;
        let terms: Vec<(String, NodeId, NodeId, f64)> = ports
            .iter()
            .map(|p| (format!("port {}", p.name), p.plus, p.minus, p.z0))
            .collect();
        let terminated = net.with_resistors(&terms)?;
        let mut specs = Vec::with_capacity(ports.len() * ports.len());
        for (j, pj) in ports.iter().enumerate() {
            for (i, pi) in ports.iter().enumerate() {
                specs.push(ResponseSpec::new(
                    format!("v{}_{}", i + 1, j + 1),
                    ResponseKind::Transfer {
                        inject: (pj.plus, pj.minus),
                        read: (pi.plus, pi.minus),
                    },
                ));
            }
        }
        let analysis = Analysis::new(terminated, specs)?;
        Ok(NPort { analysis, ports })
    }

    /// The ports.
    pub fn ports(&self) -> &[Port] {
        &self.ports
    }

    /// The terminated network's analysis.
    pub fn analysis(&self) -> &Analysis {
        &self.analysis
    }

    /// S at `f` (with its ω-derivative), from `ev` (an evaluator of [`NPort::analysis`]).
    pub fn at<'a>(
        &self,
        ev: &Evaluator<'a>,
        ws: &mut Workspace<'a>,
        f: f64,
    ) -> Result<SPoint, AnalysisError> {
        let n = self.ports.len();
        let pts = ev.at(ws, f, true)?;
        let mut s = vec![Complex64::default(); n * n];
        let mut ds = vec![Complex64::default(); n * n];
        for j in 0..n {
            for i in 0..n {
                let p = pts[j * n + i];
                let k = 2.0 / (self.ports[i].z0 * self.ports[j].z0).sqrt();
                s[i * n + j] = p.value * k - if i == j { 1.0 } else { 0.0 };
                ds[i * n + j] = p.derivative * k;
            }
        }
        Ok(SPoint { freq: f, s, ds })
    }

    /// S at every point of `grid`, in parallel.
    pub fn sweep(&self, grid: &Grid) -> Result<Vec<SPoint>, AnalysisError> {
        let ev = self.analysis.evaluator()?;
        let freqs = grid.points();
        freqs
            .par_iter()
            .map_init(|| ev.workspace(), |ws, &f| self.at(&ev, ws, f))
            .collect()
    }
}

fn to_mat(n: usize, v: &[Complex64]) -> Mat<c64> {
    Mat::from_fn(n, n, |i, j| {
        let z = v[i * n + j];
        c64::new(z.re, z.im)
    })
}

fn from_mat(m: &Mat<c64>) -> Vec<Complex64> {
    let n = m.nrows();
    let mut out = Vec::with_capacity(n * n);
    for i in 0..n {
        for j in 0..n {
            let z = m[(i, j)];
            out.push(Complex64::new(z.re, z.im));
        }
    }
    out
}

fn finite(v: &[Complex64]) -> bool {
    v.iter().all(|z| z.re.is_finite() && z.im.is_finite())
}

/// Z from S (row-major), for real reference impedances `z0`; None where I − S′ is singular
/// (a network with no impedance matrix, e.g. a through connection).
pub fn z_from_s(s: &[Complex64], z0: &[f64]) -> Option<Vec<Complex64>> {
    let n = z0.len();
    let sq: Vec<f64> = z0.iter().map(|z| z.sqrt()).collect();
    let sp = |i: usize, j: usize| s[i * n + j] * sq[i] / sq[j];
    let a = Mat::<c64>::from_fn(n, n, |i, j| {
        let v = Complex64::new(if i == j { 1.0 } else { 0.0 }, 0.0) - sp(i, j);
        c64::new(v.re, v.im)
    });
    let b = Mat::<c64>::from_fn(n, n, |i, j| {
        let v = (Complex64::new(if i == j { 1.0 } else { 0.0 }, 0.0) + sp(i, j)) * z0[j];
        c64::new(v.re, v.im)
    });
    let z = from_mat(&a.partial_piv_lu().solve(&b));
    // A singular I − S′ shows as a huge or non-finite result; check the residual.
    let back = s_from_z(&z, z0)?;
    let err = back
        .iter()
        .zip(s)
        .map(|(x, y)| (x - y).norm())
        .fold(0.0, f64::max);
    (finite(&z) && err < 1e-6).then_some(z)
}

/// S from Z for real reference impedances: `S = F(Z − G)(Z + G)⁻¹F⁻¹`, `F = diag(1/(2√z0))`,
/// `G = diag(z0)` (Kurokawa's power waves).
pub fn s_from_z(z: &[Complex64], z0: &[f64]) -> Option<Vec<Complex64>> {
    let n = z0.len();
    let zm = to_mat(n, z);
    let plus = Mat::<c64>::from_fn(n, n, |i, j| {
        zm[(i, j)]
            + if i == j {
                c64::new(z0[i], 0.0)
            } else {
                c64::new(0.0, 0.0)
            }
    });
    let minus = Mat::<c64>::from_fn(n, n, |i, j| {
        zm[(i, j)]
            - if i == j {
                c64::new(z0[i], 0.0)
            } else {
                c64::new(0.0, 0.0)
            }
    });
    // X = (Z − G)(Z + G)⁻¹  ⇔  (Z + G)ᵀ Xᵀ = (Z − G)ᵀ.
    let xt = plus
        .transpose()
        .to_owned()
        .partial_piv_lu()
        .solve(minus.transpose().to_owned());
    let sq: Vec<f64> = z0.iter().map(|z| z.sqrt()).collect();
    let mut out = Vec::with_capacity(n * n);
    for i in 0..n {
        for j in 0..n {
            let x = xt[(j, i)];
            out.push(Complex64::new(x.re, x.im) * sq[j] / sq[i]);
        }
    }
    finite(&out).then_some(out)
}

/// Y = Z⁻¹; None where Z is singular.
pub fn y_from_z(z: &[Complex64]) -> Option<Vec<Complex64>> {
    let n = (z.len() as f64).sqrt() as usize;
    let eye = Mat::<c64>::from_fn(n, n, |i, j| c64::new(if i == j { 1.0 } else { 0.0 }, 0.0));
    let y = from_mat(&to_mat(n, z).partial_piv_lu().solve(&eye));
    finite(&y).then_some(y)
}

/// ABCD of a two-port from its Z: A = Z11/Z21, B = det Z/Z21, C = 1/Z21, D = Z22/Z21.
pub fn abcd_from_z(z: &[Complex64]) -> Option<[Complex64; 4]> {
    if z.len() != 4 || z[2].norm() == 0.0 {
        return None;
    }
    let det = z[0] * z[3] - z[1] * z[2];
    let out = [z[0] / z[2], det / z[2], z[2].inv(), z[3] / z[2]];
    finite(&out).then_some(out)
}

/// One port's reflection figures from Γ.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Reflection {
    /// |Γ|.
    pub gamma: f64,
    /// Return loss, −20·log10|Γ| (positive dB; infinite for a perfect match).
    pub return_loss_db: f64,
    /// VSWR, (1 + |Γ|)/(1 − |Γ|) (infinite for |Γ| = 1).
    pub vswr: f64,
    /// Mismatch loss, −10·log10(1 − |Γ|²) (dB).
    pub mismatch_loss_db: f64,
}

/// The reflection figures of Γ.
pub fn reflection(gamma: Complex64) -> Reflection {
    let g = gamma.norm();
    Reflection {
        gamma: g,
        return_loss_db: -20.0 * g.log10(),
        vswr: if g >= 1.0 {
            f64::INFINITY
        } else {
            (1.0 + g) / (1.0 - g)
        },
        mismatch_loss_db: if g >= 1.0 {
            f64::INFINITY
        } else {
            -10.0 * (1.0 - g * g).log10()
        },
    }
}

/// The largest |S_ij − S_ji| (0 for a reciprocal network).
pub fn reciprocity_error(s: &[Complex64]) -> f64 {
    let n = (s.len() as f64).sqrt() as usize;
    let mut worst = 0.0f64;
    for i in 0..n {
        for j in 0..i {
            worst = worst.max((s[i * n + j] - s[j * n + i]).norm());
        }
    }
    worst
}

/// The largest singular value of S (≤ 1 for a passive network).
pub fn largest_singular_value(s: &[Complex64]) -> f64 {
    let n = (s.len() as f64).sqrt() as usize;
    let m = to_mat(n, s);
    m.singular_values()
        .ok()
        .and_then(|v| v.first().copied())
        .unwrap_or(f64::NAN)
}

/// The figures a report shows of an N-port over a sweep: each port's worst match, the
/// largest reciprocity error and the largest singular value of S (one computation for the
/// `ports` command and the review page).
#[derive(Clone, Debug, PartialEq)]
pub struct Summary {
    /// Per port (in port order): the frequency of its lowest return loss and its
    /// reflection figures there; None for an empty sweep.
    pub worst_match: Vec<Option<(f64, Reflection)>>,
    /// The largest |S_ij − S_ji| over the sweep.
    pub reciprocity_error: f64,
    /// The largest singular value of S over the sweep.
    pub largest_singular_value: f64,
}

impl Summary {
    /// The summary of an `n`-port's sweep.
    pub fn of(points: &[SPoint], n: usize) -> Summary {
        let worst_match = (0..n)
            .map(|i| {
                points
                    .iter()
                    .filter_map(|q| q.s.get(i * n + i).map(|&g| (q.freq, reflection(g))))
                    .min_by(|a, b| a.1.return_loss_db.total_cmp(&b.1.return_loss_db))
            })
            .collect();
        Summary {
            worst_match,
            reciprocity_error: points
                .iter()
                .map(|q| reciprocity_error(&q.s))
                .fold(0.0, f64::max),
            largest_singular_value: points
                .iter()
                .map(|q| largest_singular_value(&q.s))
                .fold(0.0, f64::max),
        }
    }

    /// Reciprocal to rounding (largest |S_ij − S_ji| below 1e-9; common practice for a
    /// numerical check).
    pub fn reciprocal(&self) -> bool {
        self.reciprocity_error < 1e-9
    }

    /// Passive to rounding (largest singular value of S at most 1 + 1e-9).
    pub fn passive(&self) -> bool {
        self.largest_singular_value <= 1.0 + 1e-9
    }
}

/// ABCD of a two-port from its S with one real reference impedance `z0` on both ports
/// (the usual conversion; it exists wherever S21 ≠ 0, also for a bare series element):
/// A = ((1+S11)(1−S22) + S12S21)/(2S21), B = z0((1+S11)(1+S22) − S12S21)/(2S21),
/// C = ((1−S11)(1−S22) − S12S21)/(2z0·S21), D = ((1−S11)(1+S22) + S12S21)/(2S21).
pub fn abcd_from_s(s: &[Complex64], z0: f64) -> Option<[Complex64; 4]> {
    if s.len() != 4 || s[2].norm() == 0.0 {
        return None;
    }
    let (s11, s12, s21, s22) = (s[0], s[1], s[2], s[3]);
    let one = Complex64::new(1.0, 0.0);
    let d = 2.0 * s21;
    let out = [
        ((one + s11) * (one - s22) + s12 * s21) / d,
        z0 * ((one + s11) * (one + s22) - s12 * s21) / d,
        ((one - s11) * (one - s22) - s12 * s21) / (d * z0),
        ((one - s11) * (one + s22) + s12 * s21) / d,
    ];
    finite(&out).then_some(out)
}

/// Insertion loss (dB) of a two-port between a source resistance `zs` and a load `zl`: the
/// load voltage without the two-port (source straight into load) over the load voltage with
/// it, `20·log10|(A·zl + B + C·zs·zl + D·zs)/(zs + zl)|`.
pub fn insertion_loss_db(abcd: &[Complex64; 4], zs: f64, zl: f64) -> f64 {
    let [a, b, c, d] = *abcd;
    let with = a * zl + b + c * zs * zl + d * zs;
    20.0 * (with.norm() / (zs + zl)).log10()
}

/// Group delay (s) of one S-parameter from its value and its exact derivative with respect to
/// ω at one frequency: τ = −d(arg S)/dω = −Im((dS/dω)/S); NaN where S is zero.
pub fn group_delay(s: Complex64, ds_domega: Complex64) -> f64 {
    if s.norm() == 0.0 {
        return f64::NAN;
    }
    -(ds_domega / s).im
}

/// The terminations an EMI filter's insertion loss is judged between: 50 Ω/50 Ω and the
/// asymmetric 0.1 Ω/100 Ω and 100 Ω/0.1 Ω (source/load), as in the published insertion-loss
/// method for suppression filters (CISPR 17; from memory).
pub const EMI_TERMINATIONS: [(f64, f64); 3] = [(50.0, 50.0), (0.1, 100.0), (100.0, 0.1)];

impl NPort {
    /// Where port `port`'s return loss crosses `level_db` between `lo` and `hi` (Hz), the
    /// return loss being on opposite sides of the level there: bisection in log frequency on
    /// the live network to a relative 1e-12 (the return loss of a passive port need not be
    /// smooth enough for Newton steps near a perfect match).
    pub fn return_loss_crossing<'a>(
        &self,
        ev: &Evaluator<'a>,
        ws: &mut Workspace<'a>,
        port: usize,
        level_db: f64,
        lo: f64,
        hi: f64,
    ) -> Result<f64, AnalysisError> {
        let n = self.ports.len();
        let mut g = |f: f64| -> Result<f64, AnalysisError> {
            let p = self.at(ev, ws, f)?;
            Ok(reflection(p.s[port * n + port]).return_loss_db - level_db)
        };
        let (mut a, mut b) = (lo.ln(), hi.ln());
        let ga = g(lo)?;
        for _ in 0..64 {
            if (b - a).abs() <= 1e-12 {
                break;
            }
            let m = 0.5 * (a + b);
            let gm = g(m.exp())?;
            if (gm >= 0.0) == (ga >= 0.0) {
                a = m;
            } else {
                b = m;
            }
        }
        Ok((0.5 * (a + b)).exp())
    }
}

/// A limit on a port's match: its return loss at least `min_return_loss_db` over a band
/// (given in the design as `min_return_loss_db`, or as `max_vswr`, converted by
/// RL = −20·log10((S − 1)/(S + 1))).
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct PortLimit {
    /// The limit's name.
    pub name: String,
    /// The port's name.
    pub port: String,
    /// Frequency range (Hz).
    pub from: f64,
    /// Frequency range (Hz).
    pub to: f64,
    /// Least return loss allowed (dB, positive).
    pub min_return_loss_db: f64,
    /// The VSWR it was given as, where it was.
    pub max_vswr: Option<f64>,
}

/// Return loss (dB) of a VSWR: −20·log10((S − 1)/(S + 1)).
pub fn return_loss_of_vswr(vswr: f64) -> f64 {
    -20.0 * ((vswr - 1.0) / (vswr + 1.0)).log10()
}

/// VSWR of a return loss (dB): (1 + |Γ|)/(1 − |Γ|) with |Γ| = 10^(−RL/20); the inverse of
/// [`return_loss_of_vswr`].
pub fn vswr_of_return_loss(rl_db: f64) -> f64 {
    let g = 10f64.powf(-rl_db / 20.0);
    (1.0 + g) / (1.0 - g)
}

/// The outcome of a [`PortLimit`].
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct PortLimitResult {
    /// The limit.
    pub limit: PortLimit,
    /// Whether the return loss stays at or above the limit over the whole range.
    pub pass: bool,
    /// Least return loss over the range minus the limit (dB; negative when failing).
    pub worst_margin_db: f64,
    /// Where the least return loss is (Hz).
    pub worst_at_hz: f64,
    /// The least return loss (dB).
    pub worst_return_loss_db: f64,
}

impl NPort {
    /// Checks `limit` on the live network: at the range's ends and every point of `pts`
    /// (a sweep of this N-port) inside it, the least return loss then refined by golden-
    /// section search in log frequency between the neighbours of the worst point.
    pub fn check_limit<'a>(
        &self,
        ev: &Evaluator<'a>,
        ws: &mut Workspace<'a>,
        pts: &[SPoint],
        limit: &PortLimit,
    ) -> Result<Option<PortLimitResult>, AnalysisError> {
        let Some(i) = self.ports.iter().position(|p| p.name == limit.port) else {
            return Ok(None);
        };
        let n = self.ports.len();
        let mut rl = |f: f64| -> Result<f64, AnalysisError> {
            let p = self.at(ev, ws, f)?;
            Ok(reflection(p.s[i * n + i]).return_loss_db)
        };
        let mut cand: Vec<f64> = pts
            .iter()
            .map(|p| p.freq)
            .filter(|f| *f > limit.from && *f < limit.to)
            .collect();
        cand.insert(0, limit.from);
        if limit.to > limit.from {
            cand.push(limit.to);
        }
        let mut vals = Vec::with_capacity(cand.len());
        for &f in &cand {
            vals.push(rl(f)?);
        }
        let Some(k) = (0..vals.len()).min_by(|&a, &b| vals[a].total_cmp(&vals[b])) else {
            return Ok(None);
        };
        let (mut best_f, mut best) = (cand[k], vals[k]);
        if k > 0 && k + 1 < cand.len() && cand[k - 1] > 0.0 {
            // Golden-section search for the minimum between the neighbours.
            let (mut a, mut b) = (cand[k - 1].ln(), cand[k + 1].ln());
            let g = 0.5 * (5f64.sqrt() - 1.0);
            let (mut c, mut d) = (b - g * (b - a), a + g * (b - a));
            let (mut fc, mut fd) = (rl(c.exp())?, rl(d.exp())?);
            for _ in 0..80 {
                if (b - a).abs() < 1e-12 {
                    break;
                }
                if fc < fd {
                    b = d;
                    d = c;
                    fd = fc;
                    c = b - g * (b - a);
                    fc = rl(c.exp())?;
                } else {
                    a = c;
                    c = d;
                    fc = fd;
                    d = a + g * (b - a);
                    fd = rl(d.exp())?;
                }
            }
            let (f, v) = if fc < fd {
                (c.exp(), fc)
            } else {
                (d.exp(), fd)
            };
            if v < best {
                best = v;
                best_f = f;
            }
        }
        let margin = best - limit.min_return_loss_db;
        Ok(Some(PortLimitResult {
            limit: limit.clone(),
            pass: margin >= 0.0,
            worst_margin_db: margin,
            worst_at_hz: best_f,
            worst_return_loss_db: best,
        }))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn point(freq: f64, s: [(f64, f64); 4]) -> SPoint {
        SPoint {
            freq,
            s: s.iter().map(|&(re, im)| Complex64::new(re, im)).collect(),
            ds: vec![Complex64::default(); 4],
        }
    }

    #[test]
    fn summary_picks_each_ports_worst_match_and_the_largest_errors() {
        // At 1 and 2 MHz S is diagonal, so its singular values are the |S_ii| (closed
        // form); at 3 MHz they are below 0.11 + 0.02. S11 = 0.5 gives a return loss of
        // 20·log10 2 = 6.0206 dB and VSWR 3 (closed form).
        let pts = [
            point(1e6, [(0.2, 0.0), (0.0, 0.0), (0.0, 0.0), (0.0, -0.3)]),
            point(2e6, [(0.0, 0.5), (0.0, 0.0), (0.0, 0.0), (0.1, 0.0)]),
            point(3e6, [(0.1, 0.0), (0.02, 0.0), (0.0, 0.0), (0.1, 0.0)]),
        ];
        let s = Summary::of(&pts, 2);
        let (f1, r1) = s.worst_match[0].unwrap();
        assert_eq!(f1, 2e6);
        assert!((r1.return_loss_db - 20.0 * 2f64.log10()).abs() < 1e-12);
        assert!((r1.vswr - 3.0).abs() < 1e-12);
        assert_eq!(s.worst_match[1].unwrap().0, 1e6);
        // |S12 − S21| = 0.02 at 3 MHz only.
        assert!((s.reciprocity_error - 0.02).abs() < 1e-15);
        assert!(!s.reciprocal());
        assert!((s.largest_singular_value - 0.5).abs() < 1e-12);
        assert!(s.passive());
        assert_eq!(Summary::of(&[], 2).worst_match, vec![None, None]);
    }
}
