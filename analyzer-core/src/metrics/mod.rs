//! The figures a design review asks for, computed on the live network, not read off a grid.
//!
//! The sweep only brackets; every figure is refined by re-solving the network at trial
//! frequencies ([`refine`]), and the poles and zeros of the response ([`crate::poles`]) seed
//! the searches the grid could step over. A figure is therefore the same, to its tolerance,
//! on any grid that contains it.
//!
//! * **Extrema** (`extrema`): every turning point of `|H|` on the grid, and a local search
//!   around every pole pair and every zero pair with Q > 0.5 inside the sweep, is refined as a
//!   root of the exact slope `Re(ω·H′/H)` (Brent). Peaks and notches are reported when their
//!   prominence — the rise above (or fall below) the higher of the two lowest points between
//!   them and the nearest higher (lower) point on either side, as `scipy.signal`'s
//!   `peak_prominences` defines it — is at least [`MIN_PROMINENCE_DB`].
//! * **The passband reference** (`passband`): a ratio is classified by its asymptotes
//!   (from its poles and zeros, or the exact slope far outside the sweep): low-pass → the DC
//!   gain, high-pass → the high-frequency gain, band-pass → its peak, band-stop → each side
//!   to its own asymptote, flat or all-pass → no cut-off (common practice in filter design).
//!   `Reference` overrides it.
//! * **Level crossings** of `20·log10|H|` (by default the half-power level,
//!   `20·log10(1/√2)` ≈ −3.0103 dB below the reference) between consecutive turning points,
//!   where `|H|` is monotonic so each crossing is unique, refined by Newton steps in `ln f`
//!   with the exact derivative: lower and upper cut-off, bandwidth, centre `√(f_lo·f_hi)` and
//!   `Q = centre/bandwidth` for band-pass and band-stop responses.
//! * **Resonances** of impedances and admittances: where the phase crosses zero (series:
//!   `|Z|` minimum; parallel: maximum), from the grid and from the response's pole and zero
//!   pairs. Q is reported by the half-power bandwidth of `|Z|` (parallel) or `|Y|` (series),
//!   `Q = f0/(f₊ − f₋)`, the definition the trade uses for a resonator's response; the
//!   phase-slope Q `(ω0/2)·|dφ/dω|` is given beside it (they agree for a simple RLC and
//!   differ where other parts load the resonance).
//! * **Group delay** `τ = −dφ/dω = −Im(H′/H)` from the exact derivative.
//! * **Loop gains**: gain crossover (|L| = 0 dB) and phase margin `180° + ∠L`, phase
//!   crossover (∠L = −180° mod 360°, on the unwrapped phase) and gain margin `−20·log10|L|`.

mod extrema;
mod passband;
pub mod refine;

pub use refine::{brent_min, brent_root, newton_root, Refiner, FREQ_TOL};

use crate::poles::{PoleZero, RootRow};
use crate::response::{AnalysisError, Evaluator, ResponseUnit};
use crate::sweep::Grid;
use crate::units::{Decibels, Degrees, Hertz, Seconds};
use extrema::Skeleton;
use serde::Serialize;
use std::f64::consts::PI;

/// 20·log10(1/√2): the half-power level, ≈ −3.0103 dB.
pub const HALF_POWER_DB: f64 = -3.010_299_956_639_812;

/// Most crossings, peaks or notches reported per response.
pub const MAX_REPORTED: usize = 32;

/// Smallest prominence (dB) of a reported peak or notch of a ratio: below it a bump is a
/// flat floor's drift or rounding, not a figure (a 0.1 dB Chebyshev ripple still shows).
pub const MIN_PROMINENCE_DB: f64 = 0.05;

/// Smallest prominence (dB) of a reported maximum or minimum of an impedance or admittance:
/// a 12 % rise or fall; shallower ones are the slow drift of a driving-point impedance
/// between its corners, while resonances are reported as such.
pub const MIN_PROMINENCE_IMMITTANCE_DB: f64 = 1.0;

/// What a level is measured from.
#[derive(Clone, Copy, Debug, PartialEq, Default)]
pub enum Reference {
    /// The passband of the network: chosen from the response's asymptotes (see
    /// `passband`): DC gain, high-frequency gain, peak, or none.
    #[default]
    Auto,
    /// The gain at 0 Hz (or its limit).
    Dc,
    /// The gain as f → ∞ (its limit).
    Hf,
    /// The largest refined peak.
    Peak,
    /// The magnitude at this frequency.
    AtFrequency(Hertz),
    /// 0 dB: levels are absolute.
    Absolute,
}

/// Options for [`figures`].
#[derive(Clone, Debug, PartialEq, Default)]
pub struct MetricOptions {
    /// Level relative to the reference, in dB. None: the half-power level for a ratio,
    /// no crossings for an impedance, admittance or loop gain.
    pub level_db: Option<Decibels>,
    /// What the level is measured from.
    pub reference: Reference,
}

/// A frequency where the magnitude crosses the level.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Crossing {
    /// Frequency (Hz).
    pub freq_hz: Hertz,
    /// Whether the magnitude rises through the level with frequency.
    pub rising: bool,
    /// The level crossed (dB).
    pub level_db: Decibels,
}

/// A refined peak or notch of |H|.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Extremum {
    /// Frequency (Hz).
    pub freq_hz: Hertz,
    /// Magnitude there (dB re 1 of the response's unit).
    pub magnitude_db: Decibels,
    /// Magnitude there in the response's unit (Ω for an impedance).
    pub magnitude: f64,
    /// How far it stands out from its neighbourhood (dB).
    pub prominence_db: Decibels,
    /// For a peak: f / (−3 dB bandwidth around it), where both sides are in the sweep.
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
    /// Q by the definition named in `q_definition`.
    pub q: f64,
    /// "half-power bandwidth" (f0 over the −3 dB bandwidth of |Z| or |Y|), or "phase slope"
    /// ((ω0/2)·|dφ/dω|) where a half-power point is outside the sweep.
    pub q_definition: &'static str,
    /// Q from the phase slope, (ω0/2)·|dφ/dω|.
    pub q_phase_slope: f64,
    /// Q from the half-power bandwidth, where both sides are in the sweep.
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

/// The level a response's crossings are measured from.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ReferenceLevel {
    /// "dc", "hf", "peak", "frequency" or "absolute".
    pub kind: &'static str,
    /// The reference magnitude (dB).
    pub db: Decibels,
    /// Where it was taken (Hz): 0 for DC, None for the high-frequency limit and absolute.
    pub hz: Option<Hertz>,
    /// Why this reference, in a few words.
    pub why: String,
}

/// Poles and zeros as the figures show them.
#[derive(Clone, Debug, PartialEq, Serialize, Default)]
pub struct PoleTable {
    /// Poles then zeros, ascending in frequency; pairs once.
    pub rows: Vec<RootRow>,
    /// Pole–zero pairs dropped as cancelling (modes the response cannot see).
    pub cancelled: usize,
    /// Why they were not computed, when they were not.
    pub note: Option<String>,
}

/// All figures of one response.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Figures {
    /// Response name.
    pub response: String,
    /// Unit symbol of the value ("" for a ratio).
    pub unit: &'static str,
    /// What kind of response it is: "low-pass", "high-pass", "band-pass", "band-stop",
    /// "shelf", "flat", "all-pass", "other", "impedance", "admittance" or "loop gain".
    pub class: &'static str,
    /// The gain as f → 0 (dB), where it is finite.
    pub dc_db: Option<Decibels>,
    /// The gain as f → ∞ (dB), where it is finite.
    pub hf_db: Option<Decibels>,
    /// What the crossings are measured from (None: no crossings were searched).
    pub reference: Option<ReferenceLevel>,
    /// For a band-stop: the high-frequency side's reference (the upper cut-off's).
    pub upper_reference: Option<ReferenceLevel>,
    /// Level searched for (dB, absolute), where crossings were searched.
    pub level_db: Option<Decibels>,
    /// All crossings of the level(s) in the sweep, ascending.
    pub crossings: Vec<Crossing>,
    /// The crossing below the reference (the lower edge of a pass- or stopband).
    pub lower_cutoff_hz: Option<Hertz>,
    /// The crossing above the reference.
    pub upper_cutoff_hz: Option<Hertz>,
    /// upper − lower (band-pass and band-stop).
    pub bandwidth_hz: Option<Hertz>,
    /// √(lower·upper).
    pub centre_hz: Option<Hertz>,
    /// centre / bandwidth.
    pub q: Option<f64>,
    /// Peaks of |H| in the sweep with at least [`MIN_PROMINENCE_DB`] of prominence
    /// ([`MIN_PROMINENCE_IMMITTANCE_DB`] for an impedance or admittance).
    pub peaks: Vec<Extremum>,
    /// Notches of |H|, likewise.
    pub notches: Vec<Extremum>,
    /// Resonances (impedances and admittances only).
    pub resonances: Vec<Resonance>,
    /// Group delay (s) at `group_delay_hz` (ratios only).
    pub group_delay_s: Option<Seconds>,
    /// Where the group delay was taken (Hz): the reference frequency, 0 for DC.
    pub group_delay_hz: Option<Hertz>,
    /// Margins (loop gains only).
    pub margins: Option<Margins>,
    /// Poles and zeros of the response.
    pub poles: PoleTable,
    /// Noise figures (noise responses only).
    pub noise: Option<crate::noise::NoiseFigures>,
    /// Every refined extremum in the sweep, however small, as (frequency, dB): limits are
    /// checked there, with the value the refinement found (a probe there gives the same).
    #[serde(skip)]
    pub extrema: Vec<(Hertz, f64)>,
}

/// A magnitude limit: the response must stay within `[min_db, max_db]` over `[from, to]`.
#[derive(Clone, Debug, PartialEq, Serialize, serde::Deserialize)]
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
/// refined extremum inside it. Between those points `|H|` is monotonic, so the worst margin
/// found is the worst anywhere in the range, however coarse the grid.
pub fn check_limit(
    ev: &Evaluator<'_>,
    grid: &Grid,
    trace: &Trace,
    index: usize,
    figures: &Figures,
    limit: &Limit,
) -> Result<LimitResult, AnalysisError> {
    // Made only if an edge is to be probed (a workspace each).
    let mut probe = None;
    check_limit_probed(grid, trace, figures, limit, &mut |f| {
        probe.get_or_insert_with(|| Refiner::new(ev, index)).db(f)
    })
}

/// [`check_limit`] with `db_at(f)`, the response's magnitude at a band edge off the grid,
/// from a probe the caller keeps.
fn check_limit_probed(
    grid: &Grid,
    trace: &Trace,
    figures: &Figures,
    limit: &Limit,
    db_at: &mut dyn FnMut(Hertz) -> Result<f64, AnalysisError>,
) -> Result<LimitResult, AnalysisError> {
    let inside = |f: f64| f >= limit.from && f <= limit.to;
    let mut worst = (f64::INFINITY, limit.from);
    let mut consider = |db: f64, f: f64| {
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
    };
    // A band edge on a grid point has been considered with the grid's value, which is the
    // value a probe there gives (the same solve, bit for bit): not probed again.
    let mut on_grid = (false, false);
    for (k, &db) in trace.db.iter().enumerate().take(grid.len()) {
        let f = grid.at(k);
        if inside(f) {
            consider(db, f);
            on_grid.0 |= f == limit.from;
            on_grid.1 |= f == limit.to;
        }
    }
    for &(f, db) in &figures.extrema {
        if inside(f) {
            consider(db, f);
        }
    }
    for (f, seen) in [(limit.from, on_grid.0), (limit.to, on_grid.1)] {
        if !seen {
            let db = db_at(f)?;
            consider(db, f);
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

/// The grid points of a trace that sit on a log axis: above 0 Hz with a finite magnitude.
/// Grids ascend, so only a first point can be 0 Hz.
pub(crate) struct Points<'t> {
    grid: &'t Grid,
    db: &'t [f64],
    first: usize,
    n: usize,
}

impl<'t> Points<'t> {
    fn new(grid: &'t Grid, trace: &'t Trace) -> Self {
        let n = grid.len().min(trace.db.len());
        let first = usize::from(n > 0 && grid.at(0) <= 0.0);
        Points {
            grid,
            db: &trace.db,
            first,
            n,
        }
    }
    /// Indices of the usable points, ascending.
    fn indices(&self) -> impl Iterator<Item = usize> + '_ {
        (self.first..self.n).filter(move |&k| self.db[k].is_finite())
    }
    /// (frequency, dB) of the usable points, ascending.
    fn iter(&self) -> impl Iterator<Item = (f64, f64)> + '_ {
        self.indices().map(move |k| (self.grid.at(k), self.db[k]))
    }
    fn freq(&self, k: usize) -> f64 {
        self.grid.at(k)
    }
    /// First and last usable frequency.
    fn range(&self) -> Option<(f64, f64)> {
        let lo = self.indices().next()?;
        let hi = (self.first..self.n)
            .rev()
            .find(|&k| self.db[k].is_finite())?;
        Some((self.grid.at(lo), self.grid.at(hi)))
    }
}

/// The grid's (frequency, dB) points with refined extra points (sorted) merged in, ascending,
/// without copying the grid.
pub(crate) fn merged<'x>(
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
                level_db: level,
            });
            continue;
        }
        if (gi < 0.0) == (gj < 0.0) || gj == 0.0 {
            continue;
        }
        let f = probe.crossing(fi, fj, gi, gj, level)?;
        out.push(Crossing {
            freq_hz: f,
            rising: gj > gi,
            level_db: level,
        });
        if out.len() >= MAX_REPORTED {
            break;
        }
    }
    Ok(out)
}

/// Computes every figure of response `index` from its trace over `grid`, with the
/// response's poles and zeros (`pz`, where computed; `pz_note` says why not, otherwise) to
/// seed the searches and choose the passband reference.
pub fn figures(
    ev: &Evaluator<'_>,
    grid: &Grid,
    trace: &Trace,
    index: usize,
    opts: &MetricOptions,
    pz: Option<&PoleZero>,
    pz_note: Option<String>,
) -> Result<Figures, AnalysisError> {
    let mut probe = Refiner::new(ev, index);
    figures_probed(&mut probe, grid, trace, opts, pz, pz_note)
}

/// [`figures`] with a probe of the response made by the caller (which may use it again).
fn figures_probed(
    probe: &mut Refiner<'_, '_>,
    grid: &Grid,
    trace: &Trace,
    opts: &MetricOptions,
    pz: Option<&PoleZero>,
    pz_note: Option<String>,
) -> Result<Figures, AnalysisError> {
    let (ev, index) = (probe.evaluator(), probe.index());
    let spec = &ev.analysis().responses()[index];
    let unit = spec.kind.unit();
    let pts = Points::new(grid, trace);
    let poles = PoleTable {
        rows: pz.map(PoleZero::rows).unwrap_or_default(),
        cancelled: pz.map_or(0, |p| p.cancelled),
        note: pz_note.or_else(|| match pz {
            Some(p) if p.identically_zero => Some("the response is zero at every frequency".into()),
            Some(p) if p.unverified => Some(
                "the largest zeros may be zeros at infinity: the response falls below the double range where its slope would tell".into(),
            ),
            _ => None,
        }),
    };
    let mut out = Figures {
        response: spec.name.clone(),
        unit: unit.symbol(),
        class: "other",
        dc_db: None,
        hf_db: None,
        reference: None,
        upper_reference: None,
        level_db: None,
        crossings: Vec::new(),
        lower_cutoff_hz: None,
        upper_cutoff_hz: None,
        bandwidth_hz: None,
        centre_hz: None,
        q: None,
        peaks: Vec::new(),
        notches: Vec::new(),
        resonances: Vec::new(),
        group_delay_s: None,
        group_delay_hz: None,
        margins: None,
        poles,
        noise: None,
        extrema: Vec::new(),
    };
    let Some(range) = pts.range() else {
        return Ok(out);
    };
    if unit == ResponseUnit::NoiseDensity {
        out.class = "noise";
        let band = spec.band.unwrap_or(range);
        out.noise = Some(crate::noise::figures(ev, index, band)?);
        return Ok(out);
    }

    // Extrema: refined turning points of the grid and of the pole/zero seeds.
    let skeleton = Skeleton::find(probe, &pts, pz)?;
    out.extrema = skeleton.refined().collect();
    let extra = out.extrema.clone();
    let all_pts = || merged(pts.iter(), &extra);
    let to_unit = |db: f64| 10f64.powf(db / 20.0);
    let min_prominence = if unit == ResponseUnit::Ratio {
        MIN_PROMINENCE_DB
    } else {
        MIN_PROMINENCE_IMMITTANCE_DB
    };
    for (f, db, peak, prominence) in skeleton.prominent(min_prominence) {
        let e = Extremum {
            freq_hz: f,
            magnitude_db: db,
            magnitude: to_unit(db),
            prominence_db: prominence,
            q: None,
        };
        if peak {
            out.peaks.push(e);
        } else {
            out.notches.push(e);
        }
    }
    out.peaks.truncate(MAX_REPORTED);
    out.notches.truncate(MAX_REPORTED);
    // Q of each peak from its own −3 dB points.
    for p in out.peaks.iter_mut() {
        let level = p.magnitude_db + HALF_POWER_DB;
        let lo = nearest_crossing(probe, all_pts(), p.freq_hz, level, false)?;
        let hi = nearest_crossing(probe, all_pts(), p.freq_hz, level, true)?;
        if let (Some(l), Some(u)) = (lo, hi) {
            p.q = Some(p.freq_hz / (u - l));
        }
    }

    // The passband reference and the crossings.
    let is_ratio = unit == ResponseUnit::Ratio;
    let peaks: Vec<(f64, f64)> = skeleton.of_kind(true).collect();
    let notches: Vec<(f64, f64)> = skeleton.of_kind(false).collect();
    let plan = passband::plan(
        probe,
        opts,
        pz,
        range,
        &peaks,
        &notches,
        is_ratio && !spec.loop_gain,
    )?;
    out.class = match unit {
        _ if spec.loop_gain => "loop gain",
        ResponseUnit::Ohms => "impedance",
        ResponseUnit::Siemens => "admittance",
        ResponseUnit::Ratio | ResponseUnit::NoiseDensity => plan.class,
    };
    out.dc_db = plan.dc_db;
    out.hf_db = plan.hf_db;
    if let Some(r) = &plan.reference {
        let level = r.db + plan.level_rel;
        let upper_level = plan
            .upper_reference
            .as_ref()
            .map_or(level, |u| u.db + plan.level_rel);
        out.level_db = Some(level);
        let mut crossings = crossings_at(probe, all_pts(), level)?;
        if upper_level != level {
            crossings.extend(crossings_at(probe, all_pts(), upper_level)?);
            crossings.sort_by(|a, b| a.freq_hz.total_cmp(&b.freq_hz));
        }
        let (below, above) = plan.split_at;
        if r.kind != "absolute" {
            out.lower_cutoff_hz = below.and_then(|rf| {
                crossings
                    .iter()
                    .rev()
                    .find(|c| c.freq_hz < rf && c.level_db == level)
                    .map(|c| c.freq_hz)
            });
            out.upper_cutoff_hz = above.and_then(|rf| {
                crossings
                    .iter()
                    .find(|c| c.freq_hz > rf && c.level_db == upper_level)
                    .map(|c| c.freq_hz)
            });
        }
        if plan.band {
            if let (Some(l), Some(u)) = (out.lower_cutoff_hz, out.upper_cutoff_hz) {
                let c = (l * u).sqrt();
                out.bandwidth_hz = Some(u - l);
                out.centre_hz = Some(c);
                out.q = Some(c / (u - l));
            }
        }
        out.crossings = crossings;
    }
    out.reference = plan.reference;
    out.upper_reference = plan.upper_reference;

    // Resonances of impedances and admittances.
    if matches!(unit, ResponseUnit::Ohms | ResponseUnit::Siemens) {
        out.resonances = resonances(probe, grid, trace, &pts, pz, unit, all_pts)?;
    }
    // Group delay at the reference (ratios only: an impedance's "delay" means nothing).
    if is_ratio && !spec.loop_gain {
        if let Some(f) = plan.delay_at {
            let at = if f == 0.0 && probe.point(0.0).is_err() {
                range.0
            } else {
                f
            };
            out.group_delay_s = Some(probe.point(at)?.group_delay());
            out.group_delay_hz = Some(at);
        }
    }
    if spec.loop_gain {
        let phase_pts = pts
            .indices()
            .map(|k| (pts.freq(k), f64::from(trace.phase_deg[k])));
        out.margins = Some(margins(probe, phase_pts, all_pts())?);
    }
    Ok(out)
}

/// Every figure of response `index`, as [`figures`] computes them, with the response's poles
/// and zeros computed here (scaled to the grid's geometric centre; noise responses have
/// none). The entry point for a sweep's figures.
pub fn response_figures(
    ev: &Evaluator<'_>,
    grid: &Grid,
    trace: &Trace,
    index: usize,
    opts: &MetricOptions,
) -> Result<Figures, AnalysisError> {
    response_figures_probed(&mut Refiner::new(ev, index), grid, trace, opts)
}

/// [`response_figures`] with a probe of the response made by the caller.
fn response_figures_probed(
    probe: &mut Refiner<'_, '_>,
    grid: &Grid,
    trace: &Trace,
    opts: &MetricOptions,
) -> Result<Figures, AnalysisError> {
    let (ev, index) = (probe.evaluator(), probe.index());
    let analysis = ev.analysis();
    let noise = analysis
        .responses()
        .get(index)
        .is_some_and(|r| r.kind.unit() == ResponseUnit::NoiseDensity);
    let (pz, note) = if noise {
        (None, None)
    } else {
        let (lo, hi) = grid.bounds();
        let lo = if lo > 0.0 { lo } else { hi * 1e-6 };
        let omega_s = 2.0 * PI * (lo * hi).sqrt();
        match crate::poles::pole_zero(analysis, index, Some(omega_s)) {
            Ok(p) => (Some(p), None),
            Err(e) => (None, Some(e.to_string())),
        }
    };
    figures_probed(probe, grid, trace, opts, pz.as_ref(), note)
}

/// The crossing of `level` nearest to `from`, above it (`up`) or below it, searched outward
/// from `from` along `pts`.
fn nearest_crossing(
    probe: &mut Refiner<'_, '_>,
    pts: impl Iterator<Item = (f64, f64)>,
    from: f64,
    level: f64,
    up: bool,
) -> Result<Option<f64>, AnalysisError> {
    let all: Vec<(f64, f64)> = if up {
        pts.filter(|p| p.0 >= from).collect()
    } else {
        let mut v: Vec<(f64, f64)> = pts.filter(|p| p.0 <= from).collect();
        v.reverse();
        v
    };
    for w in all.windows(2) {
        let ((fa, da), (fb, db)) = (w[0], w[1]);
        let (ga, gb) = (da - level, db - level);
        if ga == 0.0 && fa != from {
            return Ok(Some(fa));
        }
        if (ga < 0.0) != (gb < 0.0) || gb == 0.0 {
            let (lo, hi, glo, ghi) = if fa < fb {
                (fa, fb, ga, gb)
            } else {
                (fb, fa, gb, ga)
            };
            return Ok(Some(probe.crossing(lo, hi, glo, ghi, level)?));
        }
    }
    Ok(None)
}

fn resonances<'p, I: Iterator<Item = (f64, f64)> + 'p>(
    probe: &mut Refiner<'_, '_>,
    grid: &Grid,
    trace: &Trace,
    pts: &Points<'_>,
    pz: Option<&PoleZero>,
    unit: ResponseUnit,
    all_pts: impl Fn() -> I,
) -> Result<Vec<Resonance>, AnalysisError> {
    let _ = grid;
    let wrapped = |k: usize| {
        let p = f64::from(trace.phase_deg[k]);
        (p - 360.0 * (p / 360.0).round()).to_radians()
    };
    // Brackets of a zero crossing with the value in the right half-plane (|φ| < 90°): from
    // the grid, and from local scans around the pole and zero pairs of the response.
    let mut brackets: Vec<(f64, f64, f64, f64)> = Vec::new();
    let mut prev: Option<(f64, f64)> = None;
    for k in pts.indices() {
        let (fj, pj) = (pts.freq(k), wrapped(k));
        if let Some((fi, pi)) = prev.replace((fj, pj)) {
            if (pi < 0.0) != (pj < 0.0) && pi.abs() < PI / 2.0 && pj.abs() < PI / 2.0 {
                brackets.push((fi, fj, pi, pj));
            }
        }
    }
    if let (Some(pz), Some((lo, hi))) = (pz, pts.range()) {
        for (f0, q, _) in pz.seeds(0.5) {
            if f0 < lo || f0 > hi {
                continue;
            }
            let scan = extrema::local_scan(f0, q, lo, hi);
            let mut prev: Option<(f64, f64)> = None;
            for f in scan {
                let p = probe.point(f)?.value.arg();
                if let Some((fi, pi)) = prev.replace((f, p)) {
                    if (pi < 0.0) != (p < 0.0) && pi.abs() < PI / 2.0 && p.abs() < PI / 2.0 {
                        brackets.push((fi, f, pi, p));
                    }
                }
            }
        }
    }
    let mut found: Vec<f64> = Vec::new();
    for (fi, fj, pi, pj) in brackets {
        let f0 = probe.phase_zero(fi, fj, pi, pj)?;
        if !found.iter().any(|&g| (g - f0).abs() <= 1e-9 * f0) {
            found.push(f0);
        }
    }
    found.sort_by(f64::total_cmp);
    let mut out = Vec::new();
    for f0 in found {
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
        let extra = [(f0, here)];
        let lo = nearest_crossing(probe, merged(all_pts(), &extra), f0, level, false)?;
        let hi = nearest_crossing(probe, merged(all_pts(), &extra), f0, level, true)?;
        let q_bandwidth = match (lo, hi) {
            (Some(l), Some(u)) => Some(f0 / (u - l)),
            _ => None,
        };
        let (q, q_definition) = match q_bandwidth {
            Some(q) => (q, "half-power bandwidth"),
            None => (q_phase, "phase slope"),
        };
        out.push(Resonance {
            freq_hz: f0,
            kind,
            magnitude: pt.value.norm(),
            q,
            q_definition,
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
                let u = brent_root(
                    |u: f64| local_phase(probe, u.exp(), near).map(|p| p - level),
                    fi.ln(),
                    fj.ln(),
                    a - level,
                    b - level,
                    FREQ_TOL * 0.1,
                )?;
                let f = u.exp();
                m.phase_crossover_hz = Some(f);
                m.gain_margin_db = Some(-probe.db(f)?);
                break 'outer;
            }
            level += 360.0;
        }
    }
    Ok(m)
}

/// A network's response over a grid with its figures and limit checks: what a sweep prints,
/// computed in one call from an evaluator (the pipeline a tolerance study, a variant and a
/// worst-case check run per network).
#[derive(Clone, Debug)]
pub struct Assessment {
    /// The complex value of each response at each grid point (response-major).
    pub values: Vec<Vec<num_complex::Complex64>>,
    /// Each response's trace.
    pub traces: Vec<Trace>,
    /// Each response's principal phase at each grid point (degrees, in (−180, 180]).
    pub principal_deg: Vec<Vec<f64>>,
    /// Each response's figures.
    pub figures: Vec<Figures>,
    /// Each limit's outcome, in the order given (limits on responses the analysis does not
    /// have are left out).
    pub checks: Vec<LimitResult>,
}

/// Solves `ev` at every point of `grid` and computes every response's figures (with
/// `opts[r]` for response r) and every limit's outcome.
pub fn assess(
    ev: &Evaluator<'_>,
    grid: &Grid,
    opts: &[MetricOptions],
    limits: &[Limit],
) -> Result<Assessment, AnalysisError> {
    let specs = ev.analysis().responses();
    let nr = specs.len();
    let freqs = grid.points();
    let mut ws = ev.workspace();
    let pts = ev.at_many(&mut ws, &freqs, false)?;
    let mut values = vec![Vec::with_capacity(freqs.len()); nr];
    for k in 0..freqs.len() {
        for (r, v) in values.iter_mut().enumerate() {
            v.push(pts[k * nr + r].value);
        }
    }
    let (traces, principal_deg): (Vec<Trace>, Vec<Vec<f64>>) = values
        .iter()
        .map(|v| {
            let mut t = Trace::new(false);
            let polar = t.push(v, None);
            (t, polar.principal_deg)
        })
        .unzip();
    let default = MetricOptions::default();
    // One probe per response, for its figures and then its limits (a workspace each).
    let mut probes: Vec<Refiner<'_, '_>> = (0..nr).map(|r| Refiner::new(ev, r)).collect();
    let figures = probes
        .iter_mut()
        .enumerate()
        .map(|(r, probe)| {
            response_figures_probed(probe, grid, &traces[r], opts.get(r).unwrap_or(&default))
        })
        .collect::<Result<Vec<_>, _>>()?;
    let mut checks = Vec::new();
    for limit in limits {
        if let Some(r) = specs.iter().position(|s| s.name == limit.response) {
            let probe = &mut probes[r];
            checks.push(check_limit_probed(
                grid,
                &traces[r],
                &figures[r],
                limit,
                &mut |f| probe.db(f),
            )?);
        }
    }
    Ok(Assessment {
        values,
        traces,
        principal_deg,
        figures,
        checks,
    })
}
