//! Peaks and notches of `|H|`: found on the grid and around the response's pole and zero
//! pairs, refined on the network, and weighed by their prominence.
//!
//! The *skeleton* of a swept response is the sequence of its sweep ends, its refined extrema
//! and any grid turning points too small to refine (rounding wiggles below [`NOISE_DB`]).
//! Between two consecutive skeleton points `|H|` is monotonic, so every minimum or maximum
//! over an interval is a skeleton point: the prominence of each extremum (computed here as
//! `scipy.signal.peak_prominences` defines it, with a monotonic stack in linear time) and the
//! crossings between turning points do not depend on the grid that found them.

use super::{Points, Refiner};
use crate::poles::PoleZero;
use crate::response::AnalysisError;
use std::f64::consts::PI;

/// Grid turning points whose swing to the neighbouring turning points is below this (dB)
/// are rounding, not extrema, and are not refined.
pub const NOISE_DB: f64 = 1e-6;

/// Extrema closer than this (relative) are one extremum found twice.
const DISTINCT: f64 = 1e-7;

/// Points per decade of the auxiliary grid over the poles' and zeros' span.
const AUX_PER_DECADE: f64 = 10.0;

/// Points per side of the local scan around a pole or zero pair, and their spacing in
/// `ln f` in units of the pair's half-bandwidth `1/(2Q)`.
const SCAN_POINTS: i32 = 12;
const SCAN_STEP: f64 = 0.5;

/// Frequencies of a local scan around a pair at `f0` with quality factor `q`, within
/// `[lo, hi]`: `f0·exp(m·h)` for |m| ≤ 12 with `h = 1/(4Q)` (at most 0.5), so a narrow
/// resonance between two grid points is straddled by several scan points.
pub fn local_scan(f0: f64, q: f64, lo: f64, hi: f64) -> Vec<f64> {
    let h = (SCAN_STEP / (2.0 * q.max(0.5))).min(0.5);
    (-SCAN_POINTS..=SCAN_POINTS)
        .map(|m| f0 * (f64::from(m) * h).exp())
        .filter(|f| *f >= lo && *f <= hi && f.is_finite())
        .collect()
}

/// One point of the skeleton.
#[derive(Clone, Copy, Debug)]
struct Node {
    f: f64,
    db: f64,
    /// Some(peak) for a refined extremum.
    refined: Option<bool>,
}

/// The skeleton of a response over its sweep.
pub struct Skeleton {
    nodes: Vec<Node>,
}

impl Skeleton {
    /// Finds and refines the extrema of response `probe` over the usable grid `pts`, seeded
    /// also by the pole and zero pairs of `pz` with Q > 0.5 inside the sweep.
    pub(super) fn find(
        probe: &mut Refiner<'_, '_>,
        pts: &Points<'_>,
        pz: Option<&PoleZero>,
    ) -> Result<Skeleton, AnalysisError> {
        let Some((lo, hi)) = pts.range() else {
            return Ok(Skeleton { nodes: Vec::new() });
        };
        // Turning points of the grid (grid indices), with the two ends.
        let idx: Vec<usize> = pts.indices().collect();
        let db = |k: usize| pts.db[k];
        let mut turning: Vec<usize> = Vec::new();
        for w in idx.windows(3) {
            let (i, j, k) = (w[0], w[1], w[2]);
            let peak = db(j) > db(i) && db(j) >= db(k);
            let notch = db(j) < db(i) && db(j) <= db(k);
            if peak || notch {
                turning.push(j);
            }
        }
        // Swing of each turning point to its neighbours in the turning sequence (ends
        // included): rounding wiggles have none worth refining.
        let (first, last) = (idx[0], idx[idx.len() - 1]);
        let seq: Vec<usize> = std::iter::once(first)
            .chain(turning.iter().copied())
            .chain(std::iter::once(last))
            .collect();
        let mut nodes: Vec<Node> = Vec::new();
        let mut refined: Vec<(f64, f64, bool)> = Vec::new();
        // An extremum of the same kind already refined inside a bracket (or within
        // [`DISTINCT`] of its ends: a scan point can sit on the peak itself) is the one that
        // bracket holds: the grid, the auxiliary grid and the seeds' scans often bracket the
        // same peak, and each refinement is a dozen solves.
        let known = |refined: &[(f64, f64, bool)], a: f64, b: f64, peak: bool| {
            let (a, b) = (a.min(b) * (1.0 - DISTINCT), a.max(b) * (1.0 + DISTINCT));
            refined
                .iter()
                .any(|&(f, _, p)| p == peak && f >= a && f <= b)
        };
        // Grid indices of each turning point's neighbours, to bracket it.
        let pos = |k: usize| idx.binary_search(&k).unwrap_or(0);
        for t in 1..seq.len().saturating_sub(1) {
            let (a, j, b) = (seq[t - 1], seq[t], seq[t + 1]);
            let swing = (db(j) - db(a)).abs().max((db(j) - db(b)).abs());
            let peak = db(j) > db(a);
            if swing < NOISE_DB {
                nodes.push(Node {
                    f: pts.freq(j),
                    db: db(j),
                    refined: None,
                });
                continue;
            }
            let p = pos(j);
            let (fl, fm, fh) = (
                pts.freq(idx[p.saturating_sub(1)]),
                pts.freq(j),
                pts.freq(idx[(p + 1).min(idx.len() - 1)]),
            );
            if known(&refined, fl, fh, peak) {
                continue;
            }
            let f = probe.extremum(fl, fm, fh, peak)?;
            refined.push((f, probe.db(f)?, peak));
        }
        // A grid of the network's own: 10 points per decade over the span of its poles and
        // zeros (a decade beyond each end, within the sweep), so an extremum that a coarse
        // sweep steps over is found whatever the sweep's density.
        if let Some((slo, shi)) = pz.and_then(PoleZero::span) {
            let a = lo.max(slo / (2.0 * PI) / 10.0);
            let b = hi.min(shi / (2.0 * PI) * 10.0);
            if b > a {
                let m = ((b / a).log10() * AUX_PER_DECADE).ceil().max(2.0) as usize;
                let freqs: Vec<f64> = (0..=m)
                    .map(|k| a * (b / a).powf(k as f64 / m as f64))
                    .collect();
                let dbs = probe.db_many(&freqs)?;
                let aux: Vec<(f64, f64)> = freqs.into_iter().zip(dbs).collect();
                for w in aux.windows(3) {
                    let (x, y, z) = (w[0], w[1], w[2]);
                    let peak = y.1 > x.1 && y.1 >= z.1;
                    let notch = y.1 < x.1 && y.1 <= z.1;
                    let swing = (y.1 - x.1).abs().max((y.1 - z.1).abs());
                    if (peak || notch) && swing >= NOISE_DB && !known(&refined, x.0, z.0, peak) {
                        let f = probe.extremum(x.0, y.0, z.0, peak)?;
                        refined.push((f, probe.db(f)?, peak));
                    }
                }
            }
        }
        // Seeds: a local scan of the slope's sign around each pair.
        if let Some(pz) = pz {
            for (f0, q, _) in pz.seeds(0.5) {
                if f0 < lo || f0 > hi {
                    continue;
                }
                let scan = local_scan(f0, q, lo, hi);
                let mut prev: Option<(f64, f64)> = None;
                let slopes: Vec<(f64, f64)> =
                    scan.iter().copied().zip(probe.slopes(&scan)?).collect();
                for (k, &(f, s)) in slopes.iter().enumerate() {
                    if let Some((fp, sp)) = prev.replace((f, s)) {
                        let peak = sp > 0.0;
                        if (sp > 0.0) != (s > 0.0)
                            && sp != 0.0
                            && s != 0.0
                            && !known(&refined, fp, f, peak)
                        {
                            let mid = slopes.get(k.saturating_sub(1)).map_or(f, |x| x.0);
                            // The scan's slopes at the ends are those a probe there gives.
                            let fe = probe.extremum_from(fp, mid, f, peak, Some((sp, s)))?;
                            refined.push((fe, probe.db(fe)?, peak));
                        }
                    }
                }
            }
        }
        // One entry per extremum (a grid turning point and a seed may find the same one).
        refined.sort_by(|a, b| a.0.total_cmp(&b.0));
        refined.dedup_by(|b, a| (b.0 - a.0).abs() <= DISTINCT * a.0);
        nodes.extend(refined.iter().map(|&(f, db, peak)| Node {
            f,
            db,
            refined: Some(peak),
        }));
        nodes.push(Node {
            f: pts.freq(first),
            db: db(first),
            refined: None,
        });
        if last != first {
            nodes.push(Node {
                f: pts.freq(last),
                db: db(last),
                refined: None,
            });
        }
        nodes.sort_by(|a, b| a.f.total_cmp(&b.f));
        // Keep a refined extremum over anything at the same frequency; drop extrema found
        // at the very ends (they are the ends).
        nodes.dedup_by(|b, a| {
            if b.f == a.f {
                if a.refined.is_none() {
                    *a = *b;
                }
                true
            } else {
                false
            }
        });
        Ok(Skeleton { nodes })
    }

    /// The refined extrema as (frequency, dB), ascending.
    pub fn refined(&self) -> impl Iterator<Item = (f64, f64)> + '_ {
        self.nodes
            .iter()
            .filter(|n| n.refined.is_some())
            .map(|n| (n.f, n.db))
    }

    /// The refined peaks (`peak`) or notches as (frequency, dB), ascending.
    pub fn of_kind(&self, peak: bool) -> impl Iterator<Item = (f64, f64)> + '_ {
        self.nodes
            .iter()
            .filter(move |n| n.refined == Some(peak))
            .map(|n| (n.f, n.db))
    }

    /// Refined extrema with at least `min_db` of prominence: (frequency, dB, is a peak,
    /// prominence in dB), ascending in frequency.
    pub fn prominent(&self, min_db: f64) -> Vec<(f64, f64, bool, f64)> {
        let v: Vec<f64> = self.nodes.iter().map(|n| n.db).collect();
        let peaks = prominences(&v);
        let neg: Vec<f64> = v.iter().map(|x| -x).collect();
        let notches = prominences(&neg);
        self.nodes
            .iter()
            .enumerate()
            .filter_map(|(i, n)| {
                let peak = n.refined?;
                let p = if peak { peaks[i] } else { notches[i] };
                (p >= min_db).then_some((n.f, n.db, peak, p))
            })
            .collect()
    }
}

/// For every index i of `v`, `v[i]` minus the higher of the lowest values between i and the
/// nearest strictly higher value on each side (or the sequence's end): the prominence of i
/// as a peak (zero where a neighbour is not lower). Linear time with a monotonic stack.
pub fn prominences(v: &[f64]) -> Vec<f64> {
    let left = bases(v.iter().copied());
    let mut right = bases(v.iter().rev().copied());
    right.reverse();
    v.iter()
        .zip(left.iter().zip(&right))
        .map(|(&x, (&l, &r))| (x - l.max(r)).max(0.0))
        .collect()
}

/// For each position, the lowest value strictly between it and the nearest earlier value
/// strictly higher than it (from the start when there is none), or its own value when
/// nothing lies between.
fn bases(v: impl Iterator<Item = f64>) -> Vec<f64> {
    // Stack of (value, lowest value between it and the entry above it or the scan point).
    let mut stack: Vec<(f64, f64)> = Vec::new();
    let mut out = Vec::new();
    // The lowest of all values so far: the base when no earlier value is higher.
    let mut prefix_min = f64::INFINITY;
    for x in v {
        let mut low = f64::INFINITY;
        while let Some(&(tv, tl)) = stack.last() {
            if tv > x {
                break;
            }
            low = low.min(tv).min(tl);
            stack.pop();
        }
        let base = match stack.last_mut() {
            Some(top) => {
                let b = top.1.min(low);
                top.1 = b;
                b
            }
            None => prefix_min,
        };
        out.push(if base.is_finite() { base } else { x });
        prefix_min = prefix_min.min(x);
        stack.push((x, f64::INFINITY));
        // Values pushed later lie between this entry and the scan point: they reach the
        // entries below through `low` when this one is popped.
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metrics::Trace;
    use crate::response::Analysis;
    use crate::sweep::Grid;

    /// A series R–L–C read across R (R = 10 Ω, L = 1 mH, C = 1 µF) peaks at
    /// f0 = 1/(2π√(LC)) = 5,032.92 Hz at 0 dB, Q = √(L/C)/R = 3.16 (closed form). The sweep's
    /// grid, the auxiliary grid over the poles and the scan around the pole pair all bracket
    /// that peak; it is refined once, so the skeleton costs one refinement beside the
    /// auxiliary grid and the scan (55 solves here; refining it again from the other two
    /// brackets took 62).
    #[test]
    fn a_peak_bracketed_three_ways_is_refined_once() {
        let d = crate::design::parse(
            r#"[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
L1 = { inductor = "1m", between = ["in", "a"] }
C1 = { capacitor = "1u", between = ["a", "out"] }
R1 = { resistor = "10", between = ["out", "gnd"] }
[responses]
gain = { ratio = ["out", "in"] }
"#,
        )
        .unwrap();
        let a = Analysis::new(d.network, d.responses).unwrap();
        let ev = a.evaluator().unwrap();
        let grid = Grid::log(100.0, 1e5, 20.0).unwrap();
        let freqs = grid.points();
        let mut ws = ev.workspace();
        let values: Vec<_> = ev
            .at_many(&mut ws, &freqs, false)
            .unwrap()
            .iter()
            .map(|p| p.value)
            .collect();
        let trace = Trace::from_values(&values, None);
        let pts = Points::new(&grid, &trace);
        let pz = crate::poles::pole_zero(&a, 0, Some(2.0 * PI * 1e4)).unwrap();
        let mut probe = Refiner::new(&ev, 0);
        let skeleton = Skeleton::find(&mut probe, &pts, Some(&pz)).unwrap();
        let f0 = 1.0 / (2.0 * PI * (1e-3f64 * 1e-6).sqrt());
        let peaks: Vec<(f64, f64)> = skeleton.of_kind(true).collect();
        assert_eq!(peaks.len(), 1, "{peaks:?}");
        assert!(
            (peaks[0].0 / f0 - 1.0).abs() < 1e-11,
            "{peaks:?} against {f0}"
        );
        assert!(peaks[0].1.abs() < 1e-9, "{peaks:?}");
        // What the skeleton must spend besides refining: the auxiliary grid and the scan.
        let (slo, shi) = pz.span().unwrap();
        let (lo, hi) = (
            100.0f64.max(slo / (2.0 * PI) / 10.0),
            1e5f64.min(shi / (2.0 * PI) * 10.0),
        );
        let aux = ((hi / lo).log10() * AUX_PER_DECADE).ceil() as usize + 1;
        let scans: usize = pz
            .seeds(0.5)
            .iter()
            .map(|&(f, q, _)| local_scan(f, q, 100.0, 1e5).len())
            .sum();
        assert!(scans > 0 && aux > 2, "{scans} {aux}");
        // One refinement of the grid's bracket (its highest point and the two beside it).
        let k = (1..freqs.len() - 1)
            .max_by(|&i, &j| trace.db[i].total_cmp(&trace.db[j]))
            .unwrap();
        let mut one = Refiner::new(&ev, 0);
        let f = one
            .extremum(freqs[k - 1], freqs[k], freqs[k + 1], true)
            .unwrap();
        one.db(f).unwrap();
        assert!(one.solves >= 6, "{}", one.solves);
        assert!(
            probe.solves <= aux + scans + one.solves,
            "{} solves against {aux} + {scans} + {}",
            probe.solves,
            one.solves
        );
    }

    /// The prominences of a small sequence, against the definition worked by hand (the
    /// one `scipy.signal.peak_prominences` documents): 3 stands 2 above the higher base
    /// (1); the middle 2 stands 1 above its bases (1 and 1); 5 is the highest, so its
    /// prominence reaches the lowest point on its lower side (0).
    #[test]
    fn prominence_follows_its_definition() {
        let v = [0.0, 3.0, 1.0, 2.0, 1.0, 5.0, 4.0, 4.5, 0.0];
        let p = prominences(&v);
        assert_eq!(p[1], 2.0);
        assert_eq!(p[3], 1.0);
        assert_eq!(p[5], 5.0);
        assert_eq!(p[7], 0.5);
        // A brute-force check on a longer wiggly sequence.
        let w: Vec<f64> = (0..200)
            .map(|k| (k as f64 * 0.37).sin() * (1.0 + (k as f64 * 0.11).cos()))
            .collect();
        let fast = prominences(&w);
        for i in 0..w.len() {
            let side = |it: &mut dyn Iterator<Item = usize>| {
                let mut low = f64::INFINITY;
                for j in it {
                    if w[j] > w[i] {
                        break;
                    }
                    low = low.min(w[j]);
                }
                if low.is_finite() {
                    low
                } else {
                    w[i]
                }
            };
            let l = side(&mut (0..i).rev());
            let r = side(&mut (i + 1..w.len()));
            let slow = (w[i] - l.max(r)).max(0.0);
            assert!((fast[i] - slow).abs() < 1e-12, "{i}: {} vs {slow}", fast[i]);
        }
    }
}
