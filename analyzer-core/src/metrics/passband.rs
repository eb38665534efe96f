//! The passband reference of a ratio, from the network rather than the grid.
//!
//! A ratio's asymptotes are read from its poles and zeros (roots at `s = 0` give the slope as
//! ω → 0, the count of finite zeros minus poles the slope as ω → ∞, in units of
//! 20 dB/decade), or, where they were not computed, from the exact slope
//! `Re(ω·H′/H)` six decades outside the sweep (rounded when within 0.02 of a whole number).
//! Then (common practice in filter design):
//!
//! | slope at 0 | slope at ∞ | class | reference |
//! |---|---|---|---|
//! | 0 | < 0 | low-pass | the DC gain |
//! | > 0 | 0 | high-pass | the high-frequency gain |
//! | > 0 | < 0 | band-pass | the peak |
//! | 0 | 0, with a notch at least 3 dB below both | band-stop | each side's asymptote |
//! | 0 | 0, within 0.01 dB throughout | flat (all-pass if the phase turns) | none |
//! | 0 | 0, otherwise | shelf | the higher asymptote |
//! | anything else | | other | none (give `--reference`) |
//!
//! except that where the straight-line (Bode) approximation built from the poles and zeros
//! has a flat stretch between two corners standing more than 1 dB above any flat stretch
//! reaching DC or infinity, that plateau is the passband: the response is a band-pass and
//! its reference is its peak (a stage with gain in its band and unity gain at DC is not a
//! low-pass of its DC gain).
//!
//! The DC gain is solved at 0 Hz where the network allows, else at a frequency seven decades
//! below every pole and zero; the high-frequency gain seven decades above them. The peak of a
//! band-pass is the highest refined peak in the sweep, or found by a scan around the poles
//! and zeros when the sweep does not contain it.

use super::{MetricOptions, Reference, ReferenceLevel, Refiner, HALF_POWER_DB};
use crate::poles::PoleZero;
use crate::response::AnalysisError;
use std::f64::consts::PI;

/// The reference and the shape of the crossing search it implies.
pub(super) struct Plan {
    pub class: &'static str,
    pub dc_db: Option<f64>,
    pub hf_db: Option<f64>,
    pub reference: Option<ReferenceLevel>,
    pub upper_reference: Option<ReferenceLevel>,
    /// The level relative to the reference (dB).
    pub level_rel: f64,
    /// The lower cut-off is the last crossing below `.0`, the upper the first above `.1`.
    pub split_at: (Option<f64>, Option<f64>),
    /// Whether bandwidth, centre and Q apply (band-pass, band-stop).
    pub band: bool,
    /// Where the group delay is reported.
    pub delay_at: Option<f64>,
}

/// Decades outside the sweep (or the poles and zeros) where asymptotes are taken.
const FAR_DECADES: f64 = 7.0;
/// Decades outside the sweep where a slope is read when no poles and zeros are known.
const SLOPE_DECADES: f64 = 6.0;

fn rounded(s: f64) -> Option<i64> {
    let r = s.round();
    ((s - r).abs() <= 0.02 && s.is_finite()).then_some(r as i64)
}

/// The highest point of `|H|` found by a scan at 20 points per decade over `[lo, hi]`,
/// refined.
fn scan_peak(probe: &mut Refiner<'_, '_>, lo: f64, hi: f64) -> Result<(f64, f64), AnalysisError> {
    let decades = (hi / lo).log10().max(0.1);
    let n = (decades * 20.0).ceil() as usize + 1;
    let f = |k: usize| lo * (hi / lo).powf(k as f64 / (n - 1) as f64);
    let mut best = (lo, f64::NEG_INFINITY, 0usize);
    for k in 0..n {
        let db = probe.db(f(k))?;
        if db > best.1 {
            best = (f(k), db, k);
        }
    }
    let k = best.2;
    if k == 0 || k + 1 == n {
        return Ok((best.0, best.1));
    }
    let fp = probe.extremum(f(k - 1), f(k), f(k + 1), true)?;
    Ok((fp, probe.db(fp)?))
}

/// Chooses the reference of a response: `ratio` is false for impedances, admittances and
/// loop gains (no passband; a reference only when a level is asked for). `peaks` and
/// `notches` are the refined extrema in the sweep `range`.
pub(super) fn plan(
    probe: &mut Refiner<'_, '_>,
    opts: &MetricOptions,
    pz: Option<&PoleZero>,
    range: (f64, f64),
    peaks: &[(f64, f64)],
    notches: &[(f64, f64)],
    ratio: bool,
) -> Result<Plan, AnalysisError> {
    let mut plan = Plan {
        class: "other",
        dc_db: None,
        hf_db: None,
        reference: None,
        upper_reference: None,
        level_rel: opts.level_db.unwrap_or(HALF_POWER_DB),
        split_at: (None, None),
        band: false,
        delay_at: None,
    };
    // The span of the network's own frequencies (Hz), or the sweep's.
    let span = pz
        .and_then(PoleZero::span)
        .map_or(range, |(lo, hi)| (lo / (2.0 * PI), hi / (2.0 * PI)));
    let (slope_lo, slope_hi) = match pz {
        Some(p) if !p.identically_zero => (Some(p.slope_at_dc()), Some(p.slope_at_infinity())),
        _ => {
            // Both ends in one call (a large system solves them side by side).
            let s = probe.slopes(&[
                range.0 * 10f64.powf(-SLOPE_DECADES),
                range.1 * 10f64.powf(SLOPE_DECADES),
            ])?;
            (
                s.first().copied().and_then(rounded),
                s.get(1).copied().and_then(rounded),
            )
        }
    };
    let far_lo = span.0.min(range.0) * 10f64.powf(-FAR_DECADES);
    let far_hi = span.1.max(range.1) * 10f64.powf(FAR_DECADES);
    let finite = |d: f64| d.is_finite().then_some(d);
    // The levels at DC (or far below) and far above, where flat; both in one call when
    // both are wanted and both solve.
    let both = (slope_lo == Some(0) && slope_hi == Some(0))
        .then(|| probe.db_many(&[0.0, far_hi]).ok())
        .flatten();
    if let Some([dc, hf]) = both.as_deref() {
        plan.dc_db = match finite(*dc) {
            Some(d) => Some(d),
            None => probe.db(far_lo).ok().and_then(finite),
        };
        plan.hf_db = finite(*hf);
    } else {
        if slope_lo == Some(0) {
            plan.dc_db = match probe.db(0.0) {
                Ok(d) if d.is_finite() => Some(d),
                _ => probe.db(far_lo).ok().and_then(finite),
            };
        }
        if slope_hi == Some(0) {
            plan.hf_db = probe.db(far_hi).ok().and_then(finite);
        }
    }
    if !ratio {
        if opts.level_db.is_none() {
            return Ok(plan);
        }
        // An impedance, admittance or loop gain: levels are absolute unless told otherwise.
        let reference = match opts.reference {
            Reference::Auto => Reference::Absolute,
            r => r,
        };
        return explicit(probe, &plan, reference, range, peaks);
    }
    let (dc, hf) = (plan.dc_db, plan.hf_db);
    let top_peak = peaks.iter().copied().max_by(|a, b| a.1.total_cmp(&b.1));
    let low_notch = notches.iter().copied().min_by(|a, b| a.1.total_cmp(&b.1));
    // Where the asymptotic (straight-line) response is flat and highest: a passband at DC,
    // at high frequencies, or a plateau between corners (a wide band-pass whose skirts
    // level off, such as a stage with gain in its band and unity gain at DC).
    let top = match pz {
        Some(p) if !p.identically_zero => plateau(probe, p, dc, hf)?,
        _ => Plateau::Unknown,
    };
    plan.class = match (slope_lo, slope_hi) {
        _ if top == Plateau::Interior => "band-pass",
        (Some(0), Some(h)) if h < 0 => "low-pass",
        (Some(l), Some(0)) if l > 0 => "high-pass",
        (Some(l), Some(h)) if l > 0 && h < 0 => "band-pass",
        (Some(0), Some(0)) => match (dc, hf) {
            (Some(d), Some(h)) => {
                let floor = d.min(h);
                let flat = (d - h).abs() < 0.01
                    && top_peak.is_none_or(|p| p.1 - d.max(h) < 0.01)
                    && low_notch.is_none_or(|n| floor - n.1 < 0.01);
                if flat {
                    let turns = pz.is_some_and(|p| !p.poles.is_empty());
                    if turns {
                        "all-pass"
                    } else {
                        "flat"
                    }
                } else if low_notch.is_some_and(|n| floor - n.1 >= 3.0) {
                    "band-stop"
                } else {
                    "shelf"
                }
            }
            _ => "other",
        },
        _ => "other",
    };
    if opts.reference != Reference::Auto {
        return explicit(probe, &plan, opts.reference, range, peaks);
    }
    let level = |kind: &'static str, db: f64, hz: Option<f64>, why: &str| ReferenceLevel {
        kind,
        db,
        hz,
        why: why.to_string(),
    };
    match plan.class {
        "low-pass" => {
            if let Some(d) = dc {
                plan.reference = Some(level("dc", d, Some(0.0), "low-pass: the DC gain"));
                plan.split_at = (None, Some(0.0));
                plan.delay_at = Some(0.0);
            }
        }
        "high-pass" => {
            if let Some(h) = hf {
                plan.reference = Some(level("hf", h, None, "high-pass: the high-frequency gain"));
                plan.split_at = (Some(f64::INFINITY), None);
                plan.delay_at = Some(range.1);
            }
        }
        "band-pass" => {
            let (fp, dp) = match top_peak.filter(|p| p.0 > range.0 && p.0 < range.1) {
                Some(p) => p,
                None => scan_peak(
                    probe,
                    span.0.min(range.0) / 10.0,
                    span.1.max(range.1) * 10.0,
                )?,
            };
            plan.reference = Some(level("peak", dp, Some(fp), "band-pass: its peak"));
            plan.split_at = (Some(fp), Some(fp));
            plan.band = true;
            plan.delay_at = Some(fp);
        }
        "band-stop" => {
            if let (Some(d), Some(h), Some((fnotch, _))) = (dc, hf, low_notch) {
                plan.reference = Some(level(
                    "dc",
                    d,
                    Some(0.0),
                    "band-stop: below the notch, the DC gain",
                ));
                plan.upper_reference = Some(level(
                    "hf",
                    h,
                    None,
                    "band-stop: above the notch, the high-frequency gain",
                ));
                plan.split_at = (Some(fnotch), Some(fnotch));
                plan.band = true;
                plan.delay_at = Some(0.0);
            }
        }
        // No passband to measure crossings from, but the delay is what an all-pass is
        // for: its group delay at DC, where a delay equaliser's is quoted (common practice).
        "all-pass" if dc.is_some() => plan.delay_at = Some(0.0),
        "shelf" => match (dc, hf) {
            (Some(d), Some(h)) if d >= h => {
                plan.reference = Some(level("dc", d, Some(0.0), "shelf: the higher asymptote, DC"));
                plan.split_at = (None, Some(0.0));
                plan.delay_at = Some(0.0);
            }
            (Some(_), Some(h)) => {
                plan.reference = Some(level(
                    "hf",
                    h,
                    None,
                    "shelf: the higher asymptote, high frequencies",
                ));
                plan.split_at = (Some(f64::INFINITY), None);
                plan.delay_at = Some(range.1);
            }
            _ => {}
        },
        _ => {}
    }
    Ok(plan)
}

/// Where the highest flat stretch of the asymptotic response lies.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Plateau {
    /// It reaches down to DC (or to the high-frequency end, or both: see `Ends`).
    Ends,
    /// Between two corners, a clear 1 dB above any flat stretch reaching an end.
    Interior,
    /// Not known (no poles and zeros), or no flat stretch at all.
    Unknown,
}

/// Where the asymptotic response of a pole–zero set is flat, and whether the highest flat
/// stretch is between corners: the straight-line (Bode) approximation has slope
/// (zeros − poles at the origin) below the lowest corner, and changes by +1 at each zero's
/// |s| and −1 at each pole's (a pair counts twice). Each flat stretch's level is solved at
/// its geometric middle (the ends use the DC and high-frequency gains).
fn plateau(
    probe: &mut Refiner<'_, '_>,
    pz: &PoleZero,
    dc: Option<f64>,
    hf: Option<f64>,
) -> Result<Plateau, AnalysisError> {
    let mut corners: Vec<(f64, i64)> = pz
        .zeros
        .iter()
        .map(|s| (s.norm(), 1))
        .chain(pz.poles.iter().map(|s| (s.norm(), -1)))
        .filter(|c| c.0 > 0.0)
        .map(|(w, d)| (w / (2.0 * PI), d))
        .collect();
    corners.sort_by(|a, b| a.0.total_cmp(&b.0));
    let mut slope = pz.slope_at_dc();
    let mut best_end = f64::NEG_INFINITY;
    let mut best_inner = f64::NEG_INFINITY;
    if slope == 0 {
        best_end = best_end.max(dc.unwrap_or(f64::NEG_INFINITY));
    }
    let mut k = 0;
    while k < corners.len() {
        let f = corners[k].0;
        while k < corners.len() && corners[k].0 <= f * (1.0 + 1e-9) {
            slope += corners[k].1;
            k += 1;
        }
        let next = corners.get(k).map(|c| c.0);
        if slope == 0 {
            match next {
                Some(g) => best_inner = best_inner.max(probe.db((f * g).sqrt())?),
                None => best_end = best_end.max(hf.unwrap_or(f64::NEG_INFINITY)),
            }
        }
    }
    Ok(if best_inner > best_end + 1.0 {
        Plateau::Interior
    } else if best_end.is_finite() {
        Plateau::Ends
    } else {
        Plateau::Unknown
    })
}

/// A reference the user chose.
fn explicit(
    probe: &mut Refiner<'_, '_>,
    plan: &Plan,
    reference: Reference,
    range: (f64, f64),
    peaks: &[(f64, f64)],
) -> Result<Plan, AnalysisError> {
    let mut p = Plan {
        class: plan.class,
        dc_db: plan.dc_db,
        hf_db: plan.hf_db,
        reference: None,
        upper_reference: None,
        level_rel: plan.level_rel,
        split_at: (None, None),
        band: false,
        delay_at: None,
    };
    let chosen = |kind: &'static str, db: f64, hz: Option<f64>, why: String| ReferenceLevel {
        kind,
        db,
        hz,
        why,
    };
    match reference {
        Reference::Absolute => {
            p.reference = Some(chosen("absolute", 0.0, None, "as asked: 0 dB".into()));
        }
        Reference::Dc => {
            let d = match plan.dc_db {
                Some(d) => d,
                None => probe.db(0.0).or_else(|_| probe.db(range.0 * 1e-7))?,
            };
            p.reference = Some(chosen("dc", d, Some(0.0), "as asked: the DC gain".into()));
            p.split_at = (None, Some(0.0));
            p.delay_at = Some(0.0);
        }
        Reference::Hf => {
            let h = match plan.hf_db {
                Some(h) => h,
                None => probe.db(range.1 * 1e7)?,
            };
            p.reference = Some(chosen(
                "hf",
                h,
                None,
                "as asked: the high-frequency gain".into(),
            ));
            p.split_at = (Some(f64::INFINITY), None);
            p.delay_at = Some(range.1);
        }
        Reference::Peak => {
            let (fp, dp) = match peaks.iter().copied().max_by(|a, b| a.1.total_cmp(&b.1)) {
                Some(pk) => pk,
                None => scan_peak(probe, range.0, range.1)?,
            };
            p.reference = Some(chosen("peak", dp, Some(fp), "as asked: the peak".into()));
            p.split_at = (Some(fp), Some(fp));
            p.band = true;
            p.delay_at = Some(fp);
        }
        Reference::AtFrequency(f) => {
            let d = probe.db(f)?;
            p.reference = Some(chosen("frequency", d, Some(f), "as asked".into()));
            p.split_at = (Some(f), Some(f));
            p.delay_at = Some(f);
        }
        Reference::Auto => {}
    }
    Ok(p)
}
