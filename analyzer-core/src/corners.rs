//! Worst case: the corner of the tolerance box that pushes each limit hardest.
//!
//! At a limit's worst frequency the margin's sensitivity to every toleranced value
//! ([`crate::sensitivity`]) says which end of each tolerance lowers it; that corner's margin
//! is predicted to first order and then verified by re-solving the whole sweep at the corner.
//! Where the corner's own worst frequency lies elsewhere, the signs are taken again there
//! (at most [`MAX_ROUNDS`] corners per limit) and the lowest verified margin is kept. A
//! prediction that misses the verified margin by more than [`PREDICTION_SLACK_DB`] (or a
//! tenth of the change) is reported: the margin is then not linear over the box.

use crate::metrics::{self, Assessment, Limit, MetricOptions};
use crate::response::{AnalysisError, Evaluator};
use crate::sensitivity::{self, Value};
use crate::sweep::Grid;
use serde::Serialize;
use std::f64::consts::LN_10;

/// Most corners tried per limit.
pub const MAX_ROUNDS: usize = 3;
/// A prediction within this of the verified margin (dB) counts as right.
pub const PREDICTION_SLACK_DB: f64 = 0.05;

/// The worst corner found for one limit.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Corner {
    /// The limit's name.
    pub limit: String,
    /// The nominal design's worst margin (dB) and where.
    pub nominal_margin_db: f64,
    /// Where the nominal design is worst (Hz).
    pub nominal_worst_hz: f64,
    /// Each toleranced value's end of its tolerance at the corner, as a relative deviation
    /// (+0.01 for +1 %), in the order of the values given.
    pub deviations: Vec<f64>,
    /// The first-order prediction of the corner's margin at the worst frequency (dB).
    pub predicted_margin_db: f64,
    /// The margin verified by re-solving the sweep at the corner (dB).
    pub margin_db: f64,
    /// Where the corner is worst (Hz).
    pub worst_hz: f64,
    /// Whether the limit passes at the corner.
    pub pass: bool,
    /// Corners re-solved.
    pub rounds: usize,
    /// Whether the linear prediction missed the verified margin.
    pub prediction_off: bool,
}

/// The worst-case corner of every limit in `nominal.checks`, over the values of `values`
/// that have a tolerance (the others stay nominal).
pub fn worst_case(
    ev: &Evaluator<'_>,
    grid: &Grid,
    opts: &[MetricOptions],
    nominal: &Assessment,
    values: &[Value],
) -> Result<Vec<Corner>, AnalysisError> {
    let specs = ev.analysis().responses();
    let mut out = Vec::new();
    for (li, check) in nominal.checks.iter().enumerate() {
        let limit = &check.limit;
        let Some(r) = specs.iter().position(|s| s.name == limit.response) else {
            continue;
        };
        let mut ws = ev.workspace();
        let mut at = check.worst_at_hz;
        let mut best: Option<Corner> = None;
        let mut tried: Vec<Vec<f64>> = Vec::new();
        for round in 1..=MAX_ROUNDS {
            let (p, s) = sensitivity::at(ev, &mut ws, at, r, values)?;
            let db = 20.0 * p.value.norm().log10();
            // The bound that binds at this frequency, and the margin's slope per ln p.
            let (margin, sign) = binding(limit, db);
            let slope: Vec<f64> = s.iter().map(|s| sign * 20.0 / LN_10 * s.re).collect();
            let deviations: Vec<f64> = values
                .iter()
                .zip(&slope)
                .map(|(v, m)| {
                    let t = v.tolerance.map_or(0.0, |t| t.fraction);
                    if *m > 0.0 {
                        -t
                    } else {
                        t
                    }
                })
                .collect();
            if tried.contains(&deviations) {
                break;
            }
            tried.push(deviations.clone());
            let predicted = margin
                + slope
                    .iter()
                    .zip(&deviations)
                    .map(|(m, d)| m * d.ln_1p())
                    .sum::<f64>();
            let changes: Vec<_> = values
                .iter()
                .zip(&deviations)
                .filter(|(_, d)| **d != 0.0)
                .map(|(v, d)| (v.part, v.param, v.nominal * (1.0 + d)))
                .collect();
            let moved = ev.analysis().with_values(&changes)?;
            let mev = moved.evaluator_like(ev)?;
            let a = metrics::assess(&mev, grid, opts, std::slice::from_ref(limit))?;
            let Some(c) = a.checks.first() else {
                break;
            };
            let corner = Corner {
                limit: limit.name.clone(),
                nominal_margin_db: check.worst_margin_db,
                nominal_worst_hz: check.worst_at_hz,
                deviations,
                predicted_margin_db: predicted,
                margin_db: c.worst_margin_db,
                worst_hz: c.worst_at_hz,
                pass: c.pass,
                rounds: round,
                prediction_off: false,
            };
            let moved_on = (c.worst_at_hz / at - 1.0).abs() > 1e-6;
            at = c.worst_at_hz;
            if best.as_ref().is_none_or(|b| corner.margin_db < b.margin_db) {
                best = Some(corner);
            } else if let Some(b) = best.as_mut() {
                b.rounds = round;
            }
            if !moved_on {
                break;
            }
        }
        if let Some(mut b) = best {
            let change = (b.margin_db - b.nominal_margin_db).abs();
            b.prediction_off =
                (b.predicted_margin_db - b.margin_db).abs() > PREDICTION_SLACK_DB.max(0.1 * change);
            out.push(b);
        }
        let _ = li;
    }
    Ok(out)
}

/// The margin at level `db` against the limit's tighter bound, and the sign of the margin's
/// change with the level (−1 under a ceiling, +1 over a floor).
fn binding(limit: &Limit, db: f64) -> (f64, f64) {
    let hi = limit.max_db.map(|m| m - db);
    let lo = limit.min_db.map(|m| db - m);
    match (hi, lo) {
        (Some(h), Some(l)) if l < h => (l, 1.0),
        (Some(h), _) => (h, -1.0),
        (None, Some(l)) => (l, 1.0),
        (None, None) => (f64::INFINITY, 0.0),
    }
}
