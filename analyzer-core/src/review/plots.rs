//! From a response's trace and figures to a Bode plot: the traces, the marked figures with
//! labels that say what they are, and the design's limits as masks.

use crate::bode::{self, Bode, BodeError, MagnitudeScale, Mark, Mask, PanelKind, Series};
use crate::export::decimate;
use crate::metrics::{Figures, Limit, Trace};
use crate::response::{ResponseSpec, ResponseUnit};
use crate::sweep::Grid;
use crate::units::{format_eng, format_q};

/// How plots are drawn.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct PlotOptions {
    /// Phase wrapped to (−180°, 180°] (the trace breaks at each jump).
    pub wrapped: bool,
    /// Impedances and admittances in dB re 1 Ω or 1 S instead of on a log axis in Ω or S.
    pub impedance_db: bool,
}

fn hz(f: f64) -> String {
    format_eng(f, 4, "Hz").replace('-', "−")
}

fn db_text(v: f64) -> String {
    let v = if v.abs() < 0.05 { 0.0 } else { v };
    format!("{v:.1} dB")
        .replace(".0 dB", " dB")
        .replace('-', "−")
}

/// A magnitude in the response's own terms: "−40 dB" for a ratio, "120 Ω" for an impedance.
fn level_text(db: f64, unit: ResponseUnit) -> String {
    match unit {
        ResponseUnit::Ohms => format_eng(10f64.powf(db / 20.0), 3, "Ω"),
        ResponseUnit::Siemens => format_eng(10f64.powf(db / 20.0), 3, "S"),
        _ => db_text(db),
    }
}

/// The trace of one response as a plot series (decimated to what the plot width can show).
pub fn series(name: &str, grid: &Grid, trace: &Trace, wrapped: bool) -> Series {
    let n = grid.len().min(trace.db.len());
    let wrap = |p: f64| {
        if wrapped {
            p - 360.0 * (p / 360.0).round()
        } else {
            p
        }
    };
    Series {
        name: name.to_string(),
        magnitude: decimate(n, |k| grid.at(k), |k| trace.db[k]),
        phase: decimate(n, |k| grid.at(k), |k| wrap(f64::from(trace.phase_deg[k]))),
        delay: trace
            .delay_s
            .as_ref()
            .map(|d| decimate(n.min(d.len()), |k| grid.at(k), |k| f64::from(d[k]))),
    }
}

/// The value of a plotted trace at `f`, by linear interpolation in log frequency.
fn value_at(points: &[(f64, f64)], f: f64) -> Option<f64> {
    let k = points.partition_point(|p| p.0 < f);
    match (k.checked_sub(1).and_then(|j| points.get(j)), points.get(k)) {
        (Some(a), Some(b)) if b.0 > a.0 => {
            let t = (f.ln() - a.0.ln()) / (b.0.ln() - a.0.ln());
            Some(a.1 + t * (b.1 - a.1))
        }
        (_, Some(b)) => Some(b.1),
        (Some(a), None) => Some(a.1),
        _ => None,
    }
}

/// The figures of a response as marked points: every crossing the table lists, peaks,
/// notches, resonances with their Q, loop margins at their crossovers, and the group delay
/// figure; `prefix` names the response on an overlay.
pub fn marks(spec: &ResponseSpec, figures: &Figures, s: &Series, prefix: &str) -> Vec<Mark> {
    let unit = spec.kind.unit();
    let f = figures;
    let mut out = Vec::new();
    let absolute = f.reference.as_ref().is_none_or(|r| r.kind == "absolute");
    for c in &f.crossings {
        let rel = f
            .reference
            .as_ref()
            .map_or(c.level_db, |r| c.level_db - r.db);
        let half_power = !absolute && (rel + 3.0103).abs() < 0.01;
        let level = if absolute {
            level_text(c.level_db, unit)
        } else if half_power {
            "−3 dB".to_string()
        } else {
            db_text(rel)
        };
        let side = if absolute {
            ""
        } else if Some(c.freq_hz) == f.lower_cutoff_hz {
            "lower "
        } else if Some(c.freq_hz) == f.upper_cutoff_hz {
            "upper "
        } else {
            ""
        };
        out.push(Mark {
            freq: c.freq_hz,
            panel: PanelKind::Magnitude,
            value: c.level_db,
            label: format!("{prefix}{side}{level} at {}", hz(c.freq_hz)),
        });
    }
    for p in &f.peaks {
        let q =
            p.q.map_or(String::new(), |q| format!(", Q {}", format_q(q, 3)));
        out.push(Mark {
            freq: p.freq_hz,
            panel: PanelKind::Magnitude,
            value: p.magnitude_db,
            label: format!(
                "{prefix}peak {} at {}{q}",
                level_text(p.magnitude_db, unit),
                hz(p.freq_hz)
            ),
        });
    }
    for e in &f.notches {
        // An exact null has no finite dB value: mark it at the bottom of the trace.
        let bottom = s
            .magnitude
            .iter()
            .map(|p| p.1)
            .fold(f64::INFINITY, f64::min);
        let (value, level) = if e.magnitude_db.is_finite() {
            (e.magnitude_db, level_text(e.magnitude_db, unit))
        } else {
            (bottom, "null".to_string())
        };
        out.push(Mark {
            freq: e.freq_hz,
            panel: PanelKind::Magnitude,
            value,
            label: format!("{prefix}notch {level} at {}", hz(e.freq_hz)),
        });
    }
    for r in &f.resonances {
        if let Some(v) = value_at(&s.magnitude, r.freq_hz) {
            out.push(Mark {
                freq: r.freq_hz,
                panel: PanelKind::Magnitude,
                value: v,
                label: format!(
                    "{prefix}{} resonance {}, Q {}",
                    r.kind,
                    hz(r.freq_hz),
                    format_q(r.q, 3)
                ),
            });
        }
    }
    if let Some(m) = &f.margins {
        if let (Some(fc), Some(pm)) = (m.gain_crossover_hz, m.phase_margin_deg) {
            out.push(Mark {
                freq: fc,
                panel: PanelKind::Magnitude,
                value: 0.0,
                label: format!("{prefix}gain crossover {}, PM {pm:.1}°", hz(fc)).replace('-', "−"),
            });
        }
        if let (Some(fp), Some(gm)) = (m.phase_crossover_hz, m.gain_margin_db) {
            if let Some(v) = value_at(&s.phase, fp) {
                out.push(Mark {
                    freq: fp,
                    panel: PanelKind::Phase,
                    value: v,
                    label: format!("{prefix}phase crossover {}, GM {}", hz(fp), db_text(gm)),
                });
            }
        }
    }
    if let (Some(d), Some(at), Some(delay)) = (f.group_delay_s, f.group_delay_hz, &s.delay) {
        if let Some(v) = value_at(delay, at) {
            out.push(Mark {
                freq: at,
                panel: PanelKind::Delay,
                value: v,
                label: format!("{prefix}delay {} at {}", format_eng(d, 3, "s"), hz(at)),
            });
        }
    }
    out
}

/// The limits on response `name` as masks.
pub fn masks(limits: &[Limit], name: &str) -> Vec<Mask> {
    limits
        .iter()
        .filter(|l| l.response == name)
        .map(Mask::of)
        .collect()
}

/// How a response of this unit is drawn, and its magnitude axis label
/// ([`MagnitudeScale::of`] with the plot options).
pub fn scale(unit: ResponseUnit, opts: PlotOptions) -> (MagnitudeScale, String) {
    MagnitudeScale::of(unit, opts.impedance_db)
}

/// One response of a sweep: what to overlay.
#[derive(Clone, Copy, Debug)]
pub struct Drawn<'a> {
    /// The response.
    pub spec: &'a ResponseSpec,
    /// Its trace over the grid.
    pub trace: &'a Trace,
    /// Its figures.
    pub figures: &'a Figures,
}

/// The Bode plot of one response, or of several overlaid (with a legend; their figures
/// marked with the response's name), with the limits on them drawn as masks. None when the
/// sweep has no frequency above 0 Hz.
pub fn bode_svg(
    title: &str,
    grid: &Grid,
    drawn: &[Drawn<'_>],
    limits: &[Limit],
    opts: PlotOptions,
) -> Result<Option<String>, BodeError> {
    let Some(first) = drawn.first() else {
        return Ok(None);
    };
    let n = grid.len();
    let Some(lo) = (0..n).map(|k| grid.at(k)).find(|f| *f > 0.0) else {
        return Ok(None);
    };
    let overlay = drawn.len() > 1;
    let units: Vec<ResponseUnit> = drawn.iter().map(|d| d.spec.kind.unit()).collect();
    if units.iter().any(|u| *u != units[0]) {
        return Err(BodeError(
            "an overlay needs responses of one kind (all ratios, or all impedances, ...)".into(),
        ));
    }
    let series: Vec<Series> = drawn
        .iter()
        .map(|d| series(&d.spec.name, grid, d.trace, opts.wrapped))
        .collect();
    let mut all_marks = Vec::new();
    let mut all_masks = Vec::new();
    for (d, s) in drawn.iter().zip(&series) {
        let prefix = if overlay {
            format!("{}: ", d.spec.name)
        } else {
            String::new()
        };
        all_marks.extend(marks(d.spec, d.figures, s, &prefix));
        all_masks.extend(masks(limits, &d.spec.name));
    }
    let (scale, label) = scale(units[0], opts);
    let names: Vec<&str> = drawn.iter().map(|d| d.spec.name.as_str()).collect();
    let plot = Bode {
        wrapped: opts.wrapped,
        marks: &all_marks,
        masks: &all_masks,
        loop_gain: first.spec.loop_gain,
        ..Bode::new(
            format!("{title} — {}", names.join(", ")),
            (lo, grid.bounds().1),
            &series,
            scale,
            label,
        )
    };
    bode::render(&plot).map(Some)
}
