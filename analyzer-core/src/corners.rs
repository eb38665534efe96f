//! Worst case: the corner of the tolerance box that pushes each limit hardest.
//!
//! At every frequency a limit checks, the margin's sensitivity to every toleranced value
//! ([`crate::sensitivity`]) says which end of each tolerance lowers it, for each of its
//! bounds; each such corner's margin is predicted to first order. The corners with the
//! lowest predictions (at most [`MAX_ROUNDS`] distinct ones) are verified by re-solving the
//! whole sweep, and the lowest verified margin is kept. A prediction that misses the
//! verified margin by more than [`PREDICTION_SLACK_DB`] (or a tenth of the change) is
//! reported: the margin is then not linear over the box.

use crate::metrics::{self, Assessment, MetricOptions};
use crate::response::{AnalysisError, Evaluator};
use crate::sensitivity::{self, Value};
use crate::sweep::Grid;
use serde::Serialize;
use std::f64::consts::LN_10;

/// Most corners verified per limit.
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
///
/// Every grid point in the limit's range, its ends and every refined extremum inside it is a
/// candidate: there, for each bound, the margin's sensitivities give a corner and its
/// first-order margin. The [`MAX_ROUNDS`] distinct corners with the lowest predicted margins
/// are verified by re-solving the sweep; the lowest verified margin is the worst case.
pub fn worst_case(
    ev: &Evaluator<'_>,
    grid: &Grid,
    opts: &[MetricOptions],
    nominal: &Assessment,
    values: &[Value],
) -> Result<Vec<Corner>, AnalysisError> {
    let specs = ev.analysis().responses();
    let mut out = Vec::new();
    let mut ws = ev.workspace();
    for check in &nominal.checks {
        let limit = &check.limit;
        let Some(r) = specs.iter().position(|s| s.name == limit.response) else {
            continue;
        };
        let inside = |f: &f64| *f >= limit.from && *f <= limit.to;
        let mut cands: Vec<f64> = grid.points().into_iter().filter(inside).collect();
        cands.extend([limit.from, limit.to, check.worst_at_hz]);
        if let Some(f) = nominal.figures.get(r) {
            cands.extend(f.extrema.iter().map(|e| e.0).filter(inside));
        }
        cands.retain(|f| *f > 0.0 || grid.has_dc());
        // (predicted margin, deviations) per candidate and bound.
        let mut predictions: Vec<(f64, Vec<f64>)> = Vec::new();
        for &f in &cands {
            let (p, s) = sensitivity::at(ev, &mut ws, f, r, values)?;
            let db = 20.0 * p.value.norm().log10();
            let bounds = [
                limit.max_db.map(|m| (m - db, -1.0)),
                limit.min_db.map(|m| (db - m, 1.0)),
            ];
            for (margin, sign) in bounds.into_iter().flatten() {
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
                let predicted = margin
                    + slope
                        .iter()
                        .zip(&deviations)
                        .map(|(m, d)| m * d.ln_1p())
                        .sum::<f64>();
                if predicted.is_finite() {
                    predictions.push((predicted, deviations));
                }
            }
        }
        predictions.sort_by(|a, b| a.0.total_cmp(&b.0));
        let mut tried: Vec<Vec<f64>> = Vec::new();
        let mut best: Option<Corner> = None;
        for (predicted, deviations) in predictions {
            if tried.contains(&deviations) {
                continue;
            }
            if tried.len() >= MAX_ROUNDS {
                break;
            }
            tried.push(deviations.clone());
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
                continue;
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
                rounds: tried.len(),
                prediction_off: false,
            };
            if best.as_ref().is_none_or(|b| corner.margin_db < b.margin_db) {
                best = Some(corner);
            }
        }
        if let Some(mut b) = best {
            b.rounds = tried.len();
            let change = (b.margin_db - b.nominal_margin_db).abs();
            b.prediction_off =
                (b.predicted_margin_db - b.margin_db).abs() > PREDICTION_SLACK_DB.max(0.1 * change);
            out.push(b);
        }
    }
    Ok(out)
}
