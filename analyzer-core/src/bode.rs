//! Bode plots of our own drawing: SVG written directly, with every coordinate to a tenth of a
//! pixel (no stair steps on shallow slopes), limit masks as shaded forbidden regions, marker
//! labels placed where they collide with nothing, several responses or variants overlaid with
//! a legend, |Z| and |Y| on a log axis in Ω and S, phase ticks at multiples of 45° or 90°, and
//! engineering units on every tick.
//!
//! Axis rules (the plot states what it shows; these decide what range it shows):
//! * limits: the forbidden side of each bound shaded to the panel's edge; a two-sided limit
//!   whose window is under 24 px high is shaded as 12 px strips beyond each bound instead.
//! * magnitude in dB: the data (and any limit level within 40 dB of it) plus headroom of
//!   8 % of the span, at least 3 dB, above the highest point and 5 % below the lowest; the
//!   span is at least 20 dB (widened downwards), so a 2 dB ripple reads as ripple and a 0 dB
//!   passband never lies on the top edge; ends rounded out to the tick step.
//! * magnitude on a log axis (|Z| in Ω, |Y| in S): whole decades around the data with at
//!   least a tenth of a decade of room at each end, and at least one decade in all.
//! * phase: at least 90°, ticks at multiples of 45° (spans to 360°), 90° (to 720°) or 180°;
//!   wrapped phase always shows −180° … 180° and breaks its trace at each jump.
//! * group delay: the data and zero, ticks in s, ms, µs or ns.
//! * frequency: decades labelled; the sweep's ends labelled too when they are round values
//!   (two significant digits) and clear of the decade labels.
//!
//! The document is written with no `id` attributes, no scripts and no external references, so
//! several plots can be inlined in one HTML page.

use crate::response::ResponseUnit;
use crate::units::format_eng;
use std::fmt::Write;

/// How the magnitude panel is drawn.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum MagnitudeScale {
    /// In dB on a linear axis.
    Decibels,
    /// |value| on a log axis in this unit (Ω for impedance, S for admittance); the series'
    /// magnitudes are still given in dB (re 1 unit) and converted for drawing.
    Log(&'static str),
    /// A plain level on a linear axis (a sensitivity in dB per %): the data with 8 % of room
    /// at each end, plain-number ticks (the axis label carries the unit) and the zero line
    /// emphasised when it is in view.
    Level,
}

impl MagnitudeScale {
    /// How a response of this unit is drawn, and its magnitude axis label: |Z| and |Y| on
    /// log axes in Ω and S (in dB re 1 Ω or 1 S when `impedance_db`), everything else in dB.
    pub fn of(unit: ResponseUnit, impedance_db: bool) -> (MagnitudeScale, String) {
        match (unit, impedance_db) {
            (ResponseUnit::Ohms, false) => (MagnitudeScale::Log("Ω"), "|Z| (Ω)".into()),
            (ResponseUnit::Siemens, false) => (MagnitudeScale::Log("S"), "|Y| (S)".into()),
            (ResponseUnit::Ohms, true) => (MagnitudeScale::Decibels, "|Z| (dB re 1 Ω)".into()),
            (ResponseUnit::Siemens, true) => (MagnitudeScale::Decibels, "|Y| (dB re 1 S)".into()),
            (ResponseUnit::NoiseDensity, _) => (
                MagnitudeScale::Decibels,
                "noise density (dB re 1 V/√Hz)".into(),
            ),
            (ResponseUnit::Ratio, _) => (MagnitudeScale::Decibels, "magnitude".into()),
        }
    }
}

/// Which panel a marker belongs to.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum PanelKind {
    /// The magnitude panel (values in dB).
    Magnitude,
    /// The phase panel (degrees).
    Phase,
    /// The group delay panel (seconds).
    Delay,
}

/// One trace of an overlay: a response or a variant.
#[derive(Clone, Debug, Default)]
pub struct Series {
    /// Legend text (not shown when the plot has only one series).
    pub name: String,
    /// (frequency, dB) points ascending in frequency.
    pub magnitude: Vec<(f64, f64)>,
    /// (frequency, degrees) points ascending in frequency.
    pub phase: Vec<(f64, f64)>,
    /// (frequency, seconds) points, when group delay is shown.
    pub delay: Option<Vec<(f64, f64)>>,
}

/// A labelled point.
#[derive(Clone, Debug, PartialEq)]
pub struct Mark {
    /// Frequency (Hz).
    pub freq: f64,
    /// Panel.
    pub panel: PanelKind,
    /// Value in the panel's quantity (dB, degrees, seconds).
    pub value: f64,
    /// What the point is, with its numbers ("−40 dB at 102 kHz").
    pub label: String,
}

/// A shaded band between two curves (a tolerance study's spread), drawn under the traces
/// with a legend swatch.
#[derive(Clone, Debug, Default)]
pub struct Band {
    /// Legend text.
    pub name: String,
    /// (frequency, lower, upper) ascending in frequency, in the magnitude panel's quantity.
    pub points: Vec<(f64, f64, f64)>,
    /// Opacity of the fill (0–1); bands drawn later lie on top.
    pub opacity: f64,
}

/// A limit drawn as a forbidden region of the magnitude panel.
#[derive(Clone, Debug, PartialEq)]
pub struct Mask {
    /// The limit's name.
    pub name: String,
    /// Frequency range (Hz).
    pub from: f64,
    /// Frequency range (Hz).
    pub to: f64,
    /// The magnitude must stay at or above this (dB); below is forbidden.
    pub min_db: Option<f64>,
    /// The magnitude must stay at or below this (dB); above is forbidden.
    pub max_db: Option<f64>,
}

impl Mask {
    /// A design limit's forbidden regions.
    pub fn of(limit: &crate::metrics::Limit) -> Self {
        Mask {
            name: limit.name.clone(),
            from: limit.from,
            to: limit.to,
            min_db: limit.min_db,
            max_db: limit.max_db,
        }
    }
}

/// What to draw.
#[derive(Clone, Debug)]
pub struct Bode<'a> {
    /// Title line.
    pub title: String,
    /// The frequency axis (Hz, both > 0).
    pub range: (f64, f64),
    /// The traces, drawn in order (the first on top of the legend).
    pub series: &'a [Series],
    /// How magnitude is drawn.
    pub scale: MagnitudeScale,
    /// Axis label of the magnitude panel, with its unit.
    pub magnitude_label: String,
    /// Phase wrapped to (−180°, 180°].
    pub wrapped: bool,
    /// Points to mark.
    pub marks: &'a [Mark],
    /// Limits to draw.
    pub masks: &'a [Mask],
    /// Bands to shade on the magnitude panel, under the traces.
    pub bands: &'a [Band],
    /// A loop gain: 0 dB and −180° drawn as emphasised lines.
    pub loop_gain: bool,
}

impl<'a> Bode<'a> {
    /// A plot of `series` with nothing else drawn: phase unwrapped, no marks, limits or bands,
    /// not a loop gain. Callers set the rest with struct update syntax.
    pub fn new(
        title: String,
        range: (f64, f64),
        series: &'a [Series],
        scale: MagnitudeScale,
        magnitude_label: String,
    ) -> Self {
        Bode {
            title,
            range,
            series,
            scale,
            magnitude_label,
            wrapped: false,
            marks: &[],
            masks: &[],
            bands: &[],
            loop_gain: false,
        }
    }
}

/// Why nothing could be drawn.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("plot: {0}")]
pub struct BodeError(pub String);

/// Width of the drawing (px).
pub const WIDTH: f64 = 880.0;
/// The least room left of the panels (more when tick labels are wide).
const LEFT: f64 = 84.0;
const RIGHT: f64 = 22.0;
const PANEL_H: f64 = 210.0;
const GAP: f64 = 24.0;
const TICK_FONT: f64 = 15.0;
const LABEL_FONT: f64 = 15.0;
const TITLE_FONT: f64 = 20.0;

/// The palette: five traces told apart by lightness and dash as well as hue, so they stay
/// distinct in greyscale and for the common colour-vision deficiencies (blue–orange axis,
/// no red–green pair).
pub const PALETTE: [(&str, &str); 5] = [
    ("#1d4e89", ""),
    ("#d9822b", "8 4"),
    ("#6c3483", "2 3"),
    ("#63b3d9", "12 3 3 3"),
    ("#3b3b3b", "4 2 1 2"),
];
const INK: &str = "#1f2a36";
const GRID: &str = "#c9d1da";
const GRID_MINOR: &str = "#eaeef2";
const MARK: &str = "#a4243b";
const MASK_FILL: &str = "#a4243b";
/// A two-sided limit whose window is narrower than this (px) is shaded as strips.
const NARROW_WINDOW: f64 = 24.0;
/// Height of those strips (px).
const MASK_STRIP: f64 = 12.0;

/// Escapes text for SVG and HTML content and attribute values.
pub fn escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c if (c as u32) < 0x20 && c != '\n' && c != '\t' => out.push(' '),
            c => out.push(c),
        }
    }
    out
}

/// Estimated width of `text` at font size `size` (px): a sans-serif face's average advance
/// with a margin, so estimated boxes contain the rendered text in the common faces.
pub fn text_width(text: &str, size: f64) -> f64 {
    text.chars()
        .map(|c| match c {
            'i' | 'l' | 'j' | '.' | ',' | ':' | ';' | '\'' | '|' | '!' | ' ' | 'I' | 'f' | 't'
            | 'r' => 0.36,
            'm' | 'w' | 'M' | 'W' | '@' | '%' => 0.95,
            c if c.is_ascii_uppercase() => 0.72,
            '°' => 0.45,
            _ => 0.62,
        })
        .sum::<f64>()
        * size
}

/// Minus sign for display (U+2212) in place of a hyphen.
fn minus(s: String) -> String {
    s.replace('-', "−")
}

/// A value with a unit on a tick: "−20 dB", "12 ms", "1 kΩ", "45°".
fn tick_text(v: f64, unit: &str) -> String {
    let v = if v.abs() < 1e-12 { 0.0 } else { v };
    let s = match unit {
        "dB" => format!("{} dB", trim(v, 2)),
        "°" => format!("{}°", trim(v, 0)),
        _ => crate::export::tidy_label(format_eng(v, 3, unit)),
    };
    minus(s)
}

fn trim(v: f64, decimals: usize) -> String {
    let s = format!("{v:.decimals$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// A step of 1, 2, 2.5 or 5 × 10^k giving about `target` intervals over `span`.
fn nice_step(span: f64, target: f64) -> f64 {
    let raw = (span / target).max(f64::MIN_POSITIVE);
    let mag = 10f64.powf(raw.log10().floor());
    let m = raw / mag;
    let f = if m <= 1.0 {
        1.0
    } else if m <= 2.0 {
        2.0
    } else if m <= 2.5 {
        2.5
    } else if m <= 5.0 {
        5.0
    } else {
        10.0
    };
    f * mag
}

/// A vertical axis: its range in drawing units (dB, log10 of |Z|, degrees, seconds) and ticks.
#[derive(Clone, Debug)]
struct Axis {
    lo: f64,
    hi: f64,
    /// (position in axis units, label; empty label = grid line only).
    ticks: Vec<(f64, String)>,
}

fn linear_ticks(lo: f64, hi: f64, step: f64, unit: &str) -> Vec<(f64, String)> {
    let mut ticks = Vec::new();
    let mut k = (lo / step).ceil();
    while k * step <= hi + step * 1e-9 && ticks.len() < 64 {
        let v = k * step;
        ticks.push((v, tick_text(v, unit)));
        k += 1.0;
    }
    ticks
}

fn span_of(values: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    let (lo, hi) = values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
            (a.min(v), b.max(v))
        });
    lo.is_finite().then_some((lo, hi))
}

fn db_axis(lo: f64, hi: f64) -> Axis {
    let span = hi - lo;
    let top = hi + (0.08 * span).max(3.0);
    let mut bottom = lo - 0.05 * span;
    if top - bottom < 20.0 {
        bottom = top - 20.0;
    }
    let step = nice_step(top - bottom, 8.0);
    let (lo, hi) = ((bottom / step).floor() * step, (top / step).ceil() * step);
    Axis {
        lo,
        hi,
        ticks: linear_ticks(lo, hi, step, "dB"),
    }
}

/// A plain linear axis: the data with 8 % of room at each end (a flat trace gets ±10 % of its
/// size, or ±1), ticks as plain numbers.
fn level_axis(lo: f64, hi: f64) -> Axis {
    let span = hi - lo;
    let (lo, hi) = if span > 0.0 {
        (lo - 0.08 * span, hi + 0.08 * span)
    } else {
        let r = if lo == 0.0 { 1.0 } else { 0.1 * lo.abs() };
        (lo - r, hi + r)
    };
    let step = nice_step(hi - lo, 6.0);
    let (a, b) = ((lo / step).floor() * step, (hi / step).ceil() * step);
    // Enough decimals to tell the ticks apart (2.5 × 10^k needs one more).
    let decimals = (-(step.log10().floor())
        + if (step / 10f64.powf(step.log10().floor()) - 2.5).abs() < 1e-9 {
            1.0
        } else {
            0.0
        })
    .max(0.0) as usize;
    let mut ticks = Vec::new();
    let mut k = (a / step).round();
    while k * step <= b + step * 1e-9 && ticks.len() < 64 {
        let v = k * step;
        let v = if v.abs() < step * 1e-9 { 0.0 } else { v };
        ticks.push((v, minus(trim(v, decimals))));
        k += 1.0;
    }
    Axis {
        lo: a,
        hi: b,
        ticks,
    }
}

/// `lo`, `hi` in log10 of the magnitude.
fn log_axis(lo: f64, hi: f64, unit: &str) -> Axis {
    let mut a = (lo - 0.1).floor();
    let mut b = (hi + 0.1).ceil();
    if b - a < 1.0 {
        b = a + 1.0;
    }
    // Keep the axis to at most ten decades of labels: thin them on wider spans.
    if b - a > 30.0 {
        a = b - 30.0;
    }
    let every = ((b - a) / 8.0).ceil().max(1.0);
    let mut ticks = Vec::new();
    let mut d = a;
    while d <= b + 1e-9 {
        let label = if ((d - a) / every).round() * every == d - a {
            tick_text(10f64.powf(d), unit)
        } else {
            String::new()
        };
        ticks.push((d, label));
        if b - a <= 3.0 {
            for m in [2.0f64, 5.0] {
                let p = d + m.log10();
                if p < b {
                    ticks.push((p, tick_text(10f64.powf(p), unit)));
                }
            }
        }
        d += 1.0;
    }
    Axis {
        lo: a,
        hi: b,
        ticks,
    }
}

fn phase_axis(lo: f64, hi: f64, wrapped: bool) -> Axis {
    if wrapped {
        return Axis {
            lo: -180.0,
            hi: 180.0,
            ticks: linear_ticks(-180.0, 180.0, 90.0, "°"),
        };
    }
    // A little room beyond the data, so a trace ending at −180° does not lie on the frame.
    let pad = 0.04 * (hi - lo).max(90.0);
    let (lo, hi) = (lo - pad, hi + pad);
    let mid = 0.5 * (lo + hi);
    let (lo, hi) = if hi - lo < 90.0 {
        (mid - 45.0, mid + 45.0)
    } else {
        (lo, hi)
    };
    let span = hi - lo;
    let step = if span <= 360.0 {
        45.0
    } else if span <= 720.0 {
        90.0
    } else {
        180.0 * (span / 1440.0).ceil()
    };
    let (a, b) = ((lo / step).floor() * step, (hi / step).ceil() * step);
    Axis {
        lo: a,
        hi: b,
        ticks: linear_ticks(a, b, step, "°"),
    }
}

fn delay_axis(lo: f64, hi: f64) -> Axis {
    let (lo, hi) = (lo.min(0.0), hi.max(0.0));
    let span = if hi - lo > 0.0 { hi - lo } else { 1e-9 };
    let hi = hi + 0.08 * span;
    let step = nice_step(hi - lo, 5.0);
    let (a, b) = ((lo / step).floor() * step, (hi / step).ceil() * step);
    Axis {
        lo: a,
        hi: b,
        ticks: linear_ticks(a, b, step, "s"),
    }
}

/// A placed rectangle (x, y, w, h) in drawing coordinates.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Boxed(
    pub(crate) f64,
    pub(crate) f64,
    pub(crate) f64,
    pub(crate) f64,
);

impl Boxed {
    pub(crate) fn overlaps(&self, o: &Boxed) -> bool {
        self.0 < o.0 + o.2 && o.0 < self.0 + self.2 && self.1 < o.1 + o.3 && o.1 < self.1 + self.3
    }
    fn inside(&self, o: &Boxed) -> bool {
        self.0 >= o.0
            && self.1 >= o.1
            && self.0 + self.2 <= o.0 + o.2
            && self.1 + self.3 <= o.1 + o.3
    }
    fn contains(&self, x: f64, y: f64) -> bool {
        x >= self.0 && x <= self.0 + self.2 && y >= self.1 && y <= self.1 + self.3
    }
}

/// One panel's geometry.
struct Frame {
    left: f64,
    top: f64,
    axis: Axis,
}

impl Frame {
    fn y(&self, v: f64) -> f64 {
        let t = (v - self.axis.lo) / (self.axis.hi - self.axis.lo);
        self.top + PANEL_H * (1.0 - t.clamp(-0.02, 1.02))
    }
    fn area(&self) -> Boxed {
        Boxed(self.left, self.top, WIDTH - self.left - RIGHT, PANEL_H)
    }
}

/// A label the placer has put somewhere, in the caller's colour type.
pub(crate) struct Placed<C> {
    pub(crate) text: String,
    pub(crate) at: Boxed,
    pub(crate) point: (f64, f64),
    pub(crate) colour: C,
}

/// A label with no free place: numbered at its point and listed under the plot.
pub(crate) struct Footnote<C> {
    pub(crate) number: usize,
    pub(crate) text: String,
    pub(crate) point: (f64, f64),
    /// Whether the number itself was placed as a label (else it is drawn at the point).
    pub(crate) number_placed: bool,
    pub(crate) colour: C,
}

/// Puts each label next to its point where it overlaps no other label, no reserved box (a
/// fixed text), no marked point and stays inside the panel, preferring places the traces do
/// not pass through; a label with no free place becomes a [`Footnote`].
pub(crate) struct Placer<C> {
    pub(crate) placed: Vec<Placed<C>>,
    reserved: Vec<Boxed>,
    pub(crate) points: Vec<(f64, f64)>,
    pub(crate) footnotes: Vec<Footnote<C>>,
    /// Font size of the labels (px).
    font: f64,
}

impl<C: Copy> Placer<C> {
    pub(crate) fn new(font: f64) -> Self {
        Placer {
            placed: Vec::new(),
            reserved: Vec::new(),
            points: Vec::new(),
            footnotes: Vec::new(),
            font,
        }
    }

    /// Keeps labels off a box already drawn (fixed text).
    pub(crate) fn reserve(&mut self, at: Boxed) {
        self.reserved.push(at);
    }

    /// Whether `b` overlaps a placed label or a reserved box.
    pub(crate) fn taken(&self, b: &Boxed) -> bool {
        self.placed.iter().any(|p| p.at.overlaps(b)) || self.reserved.iter().any(|r| r.overlaps(b))
    }

    pub(crate) fn place(
        &mut self,
        text: &str,
        point: (f64, f64),
        within: Boxed,
        traces: &[(f64, f64)],
        colour: C,
    ) {
        match self.find(text, point, within, traces) {
            Some(b) => self.placed.push(Placed {
                text: text.to_string(),
                at: b,
                point,
                colour,
            }),
            None => {
                // Numbered at its point (the number placed like a label, where there is
                // room) and listed under the plot.
                let number = self.footnotes.len() + 1;
                let at = self.find(&number.to_string(), point, within, traces);
                if let Some(b) = at {
                    self.placed.push(Placed {
                        text: number.to_string(),
                        at: b,
                        point,
                        colour,
                    });
                }
                self.footnotes.push(Footnote {
                    number,
                    text: text.to_string(),
                    point,
                    number_placed: at.is_some(),
                    colour,
                });
            }
        }
    }

    /// The best free place for a label next to `point`, if any.
    fn find(
        &self,
        text: &str,
        point: (f64, f64),
        within: Boxed,
        traces: &[(f64, f64)],
    ) -> Option<Boxed> {
        let h = self.font + 4.0;
        let w = text_width(text, self.font) + 6.0;
        let mut best: Option<(usize, Boxed)> = None;
        'search: for dist in [10.0, 26.0, 44.0, 64.0, 86.0] {
            for (sx, sy) in [(1.0, -1.0), (-1.0, -1.0), (1.0, 1.0), (-1.0, 1.0)] {
                let x = if sx > 0.0 {
                    point.0 + 6.0
                } else {
                    point.0 - 6.0 - w
                };
                let y = if sy < 0.0 {
                    point.1 - dist - h
                } else {
                    point.1 + dist
                };
                let b = Boxed(x, y, w, h);
                if !b.inside(&within)
                    || self.taken(&b)
                    || self.points.iter().any(|&(px, py)| {
                        Boxed(b.0 - 4.0, b.1 - 4.0, b.2 + 8.0, b.3 + 8.0).contains(px, py)
                    })
                {
                    continue;
                }
                let cost = traces.iter().filter(|&&(x, y)| b.contains(x, y)).count();
                if best.is_none_or(|(c, _)| cost < c) {
                    best = Some((cost, b));
                }
                if cost == 0 {
                    break 'search;
                }
            }
        }
        best.map(|(_, b)| b)
    }
}

fn path(points: impl Iterator<Item = Option<(f64, f64)>>) -> String {
    let mut d = String::new();
    let mut pen_down = false;
    for p in points {
        match p {
            Some((x, y)) => {
                let _ = write!(d, "{}{x:.1} {y:.1}", if pen_down { "L" } else { "M" });
                pen_down = true;
            }
            None => pen_down = false,
        }
    }
    d
}

/// Renders the plot into an SVG document.
pub fn render(b: &Bode<'_>) -> Result<String, BodeError> {
    let (mut f0, mut f1) = b.range;
    if !(f0.is_finite() && f0 > 0.0 && f1.is_finite() && f1 >= f0) {
        return Err(BodeError(
            "a Bode plot needs frequencies above 0 Hz on its log axis; start the sweep above 0 Hz"
                .into(),
        ));
    }
    if b.series.is_empty() {
        return Err(BodeError("nothing to draw".into()));
    }
    if f1 <= f0 {
        f0 /= 1.5;
        f1 *= 1.5;
    }
    let (l0, l1) = (f0.log10(), f1.log10());
    let in_range = |f: f64| f >= f0 * (1.0 - 1e-12) && f <= f1 * (1.0 + 1e-12);

    // Magnitude in the axis' own units.
    let log_scale = matches!(b.scale, MagnitudeScale::Log(_));
    let mag_v = |db: f64| if log_scale { db / 20.0 } else { db };
    let data = span_of(
        b.series
            .iter()
            .flat_map(|s| s.magnitude.iter())
            .filter(|p| in_range(p.0))
            .map(|p| mag_v(p.1))
            .chain(
                b.bands
                    .iter()
                    .flat_map(|band| band.points.iter())
                    .filter(|p| in_range(p.0))
                    .flat_map(|p| [mag_v(p.1), mag_v(p.2)]),
            ),
    )
    .ok_or_else(|| {
        BodeError(
            "no finite magnitude to draw: the response is zero (or not finite) at every \
             frequency shown; check its read-out nodes and that a source drives them"
                .into(),
        )
    })?;
    let near =
        |v: f64| v >= data.0 - 40.0 * (1.0 - 0.95 * f64::from(log_scale)) && v <= data.1 + 40.0;
    let levels = b
        .masks
        .iter()
        .flat_map(|m| m.min_db.into_iter().chain(m.max_db))
        .map(mag_v)
        .filter(|v| near(*v));
    let (mlo, mhi) = levels.fold(data, |(a, c), v| (a.min(v), c.max(v)));
    let mag_axis = match b.scale {
        MagnitudeScale::Decibels => db_axis(mlo, mhi),
        MagnitudeScale::Log(unit) => log_axis(mlo, mhi, unit),
        MagnitudeScale::Level => level_axis(mlo, mhi),
    };
    let phase_data = span_of(
        b.series
            .iter()
            .flat_map(|s| s.phase.iter())
            .filter(|p| in_range(p.0))
            .map(|p| p.1),
    )
    .unwrap_or((-90.0, 0.0));
    let mut panels = vec![(PanelKind::Magnitude, mag_axis, b.magnitude_label.clone())];
    // A quantity with no phase (a noise density) has no phase panel.
    if b.series.iter().any(|s| !s.phase.is_empty()) {
        panels.push((
            PanelKind::Phase,
            phase_axis(phase_data.0, phase_data.1, b.wrapped),
            "phase".to_string(),
        ));
    }
    if b.series.iter().any(|s| s.delay.is_some()) {
        let d = span_of(
            b.series
                .iter()
                .filter_map(|s| s.delay.as_ref())
                .flat_map(|d| d.iter())
                .filter(|p| in_range(p.0))
                .map(|p| p.1),
        )
        .unwrap_or((0.0, 1e-3));
        panels.push((PanelKind::Delay, delay_axis(d.0, d.1), "group delay".into()));
    }

    // Room on the left for the widest tick label and the rotated axis label.
    let widest = panels
        .iter()
        .flat_map(|p| p.1.ticks.iter())
        .map(|t| text_width(&t.1, TICK_FONT))
        .fold(0.0, f64::max);
    let left = (widest + 6.0 + 34.0).max(LEFT);
    let plot_w = WIDTH - left - RIGHT;
    let x = |f: f64| left + plot_w * (f.log10() - l0) / (l1 - l0);

    // Title, legend rows, then the panels.
    let mut title_size = TITLE_FONT;
    while title_size > 12.0 && text_width(&b.title, title_size) > WIDTH - 32.0 {
        title_size -= 1.0;
    }
    let mut title = b.title.clone();
    while text_width(&title, title_size) > WIDTH - 32.0 && title.chars().count() > 4 {
        title.pop();
        title = format!("{}…", title.trim_end_matches('…'));
    }
    // Legend entries: (x, y, series index) for traces, (x, y, band index + series count)
    // for bands.
    let mut legend: Vec<(f64, f64, usize)> = Vec::new();
    let mut lx = left;
    let mut ly = 30.0 + title_size;
    if b.series.len() > 1 || !b.bands.is_empty() {
        let names = b
            .series
            .iter()
            .map(|s| s.name.as_str())
            .chain(b.bands.iter().map(|band| band.name.as_str()));
        for (k, name) in names.enumerate() {
            let w = 34.0 + text_width(name, LABEL_FONT) + 18.0;
            if lx + w > WIDTH - RIGHT && lx > left {
                lx = left;
                ly += 20.0;
            }
            legend.push((lx, ly, k));
            lx += w;
        }
        ly += 20.0;
    }
    let first_top = ly + 6.0;
    let frames: Vec<Frame> = panels
        .iter()
        .enumerate()
        .map(|(i, p)| Frame {
            left,
            top: first_top + i as f64 * (PANEL_H + GAP),
            axis: p.1.clone(),
        })
        .collect();
    let bottom = frames.last().map_or(first_top, |f| f.top + PANEL_H);

    let mut body = String::new();
    let mut placer = Placer::new(LABEL_FONT);
    // Frequency ticks: decades labelled, minor lines, round ends labelled when clear.
    let mut xticks: Vec<(f64, String, bool)> = Vec::new();
    for d in (l0.floor() as i32)..=(l1.ceil() as i32) {
        for m in 1..=9 {
            let f = f64::from(m) * 10f64.powi(d);
            if !in_range(f) {
                continue;
            }
            let labelled = m == 1 || (l1 - l0 < 1.2 && (m == 2 || m == 5));
            xticks.push((f, String::new(), m == 1));
            if labelled {
                if let Some(t) = xticks.last_mut() {
                    t.1 = tick_text(f, "Hz");
                }
            }
        }
    }
    for end in [f0, f1] {
        let mant = end / 10f64.powf(end.log10().floor());
        let round = ((mant * 10.0).round() - mant * 10.0).abs() < 1e-6;
        let label = tick_text(end, "Hz");
        let w = text_width(&label, TICK_FONT);
        let clear = xticks
            .iter()
            .filter(|t| !t.1.is_empty())
            .all(|t| (x(t.0) - x(end)).abs() > 0.5 * (w + text_width(&t.1, TICK_FONT)) + 6.0);
        if round
            && clear
            && !xticks
                .iter()
                .any(|t| (t.0 / end - 1.0).abs() < 1e-9 && !t.1.is_empty())
        {
            xticks.push((end, label, false));
        }
    }

    let traces_px: Vec<Vec<(f64, f64)>> = frames
        .iter()
        .zip(&panels)
        .map(|(fr, p)| {
            b.series
                .iter()
                .flat_map(|s| {
                    let pts: &[(f64, f64)] = match p.0 {
                        PanelKind::Magnitude => &s.magnitude,
                        PanelKind::Phase => &s.phase,
                        PanelKind::Delay => s.delay.as_deref().unwrap_or(&[]),
                    };
                    let step = (pts.len() / 300).max(1);
                    pts.iter()
                        .step_by(step)
                        .filter(|p| in_range(p.0))
                        .map(|q| {
                            let v = if p.0 == PanelKind::Magnitude {
                                mag_v(q.1)
                            } else {
                                q.1
                            };
                            (x(q.0), fr.y(v))
                        })
                        .collect::<Vec<_>>()
                })
                .collect()
        })
        .collect();

    for (i, (fr, (kind, axis, label))) in frames.iter().zip(&panels).enumerate() {
        let area = fr.area();
        let _ = writeln!(
            body,
            r##"<rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="#ffffff" stroke="{INK}" stroke-width="1"/>"##,
            area.0, area.1, area.2, area.3
        );
        // Grid.
        for (f, _, major) in &xticks {
            let xx = x(*f);
            let _ = writeln!(
                body,
                r#"<line x1="{xx:.1}" y1="{:.1}" x2="{xx:.1}" y2="{:.1}" stroke="{}" stroke-width="1"/>"#,
                fr.top,
                fr.top + PANEL_H,
                if *major { GRID } else { GRID_MINOR }
            );
        }
        for (v, text) in &axis.ticks {
            let yy = fr.y(*v);
            let _ = writeln!(
                body,
                r#"<line x1="{left:.1}" y1="{yy:.1}" x2="{:.1}" y2="{yy:.1}" stroke="{}" stroke-width="1"/>"#,
                WIDTH - RIGHT,
                if text.is_empty() { GRID_MINOR } else { GRID }
            );
            if !text.is_empty() {
                let _ = writeln!(
                    body,
                    r#"<text x="{:.1}" y="{:.1}" font-size="{TICK_FONT}" text-anchor="end" fill="{INK}">{}</text>"#,
                    left - 6.0,
                    yy + 4.5,
                    escape(text)
                );
            }
        }
        let _ = writeln!(
            body,
            r#"<text transform="translate(18 {:.1}) rotate(-90)" font-size="{LABEL_FONT}" text-anchor="middle" fill="{INK}">{}</text>"#,
            fr.top + PANEL_H / 2.0,
            escape(label)
        );
        // Emphasised reference lines of a loop gain.
        if b.loop_gain {
            let refs: Vec<(f64, &str)> = match kind {
                PanelKind::Magnitude if !log_scale => vec![(0.0, "0 dB")],
                PanelKind::Phase => {
                    let mut v = Vec::new();
                    let mut p = -180.0;
                    while p >= axis.lo {
                        p -= 360.0;
                    }
                    p += 360.0;
                    while p <= axis.hi {
                        v.push((p, "−180° + k·360°"));
                        p += 360.0;
                    }
                    if v.len() == 1 {
                        v[0].1 = "";
                    }
                    v
                }
                _ => vec![],
            };
            for (v, _) in refs.iter().filter(|r| r.0 >= axis.lo && r.0 <= axis.hi) {
                let yy = fr.y(*v);
                let _ = writeln!(
                    body,
                    r#"<line x1="{left:.1}" y1="{yy:.1}" x2="{:.1}" y2="{yy:.1}" stroke="{INK}" stroke-width="1.6" stroke-dasharray="6 3"/>"#,
                    WIDTH - RIGHT
                );
            }
        }
        // Bands, then the zero line of a plain level.
        if *kind == PanelKind::Magnitude {
            let (colour, _) = PALETTE[0];
            for band in b.bands {
                let pts: Vec<(f64, f64, f64)> = band
                    .points
                    .iter()
                    .filter(|p| in_range(p.0) && p.1.is_finite() && p.2.is_finite())
                    .map(|p| (x(p.0), fr.y(mag_v(p.1)), fr.y(mag_v(p.2))))
                    .collect();
                if pts.len() < 2 {
                    continue;
                }
                let upper = pts.iter().map(|p| Some((p.0, p.2)));
                let mut d = path(upper);
                for p in pts.iter().rev() {
                    let _ = write!(d, "L{:.1} {:.1}", p.0, p.1);
                }
                let _ = writeln!(
                    body,
                    r#"<path d="{d}Z" fill="{colour}" fill-opacity="{:.2}" stroke="none"/>"#,
                    band.opacity.clamp(0.0, 1.0)
                );
            }
            if b.scale == MagnitudeScale::Level && axis.lo < 0.0 && axis.hi > 0.0 {
                let yy = fr.y(0.0);
                let _ = writeln!(
                    body,
                    r#"<line x1="{left:.1}" y1="{yy:.1}" x2="{:.1}" y2="{yy:.1}" stroke="{INK}" stroke-width="1.4"/>"#,
                    WIDTH - RIGHT
                );
            }
        }
        // Limit masks on the magnitude panel.
        if *kind == PanelKind::Magnitude {
            for m in b.masks {
                let (a, c) = (m.from.max(f0), m.to.min(f1));
                if a >= c {
                    continue;
                }
                let (xa, xc) = (x(a), x(c));
                // A window narrower than NARROW_WINDOW px between two bounds (a ±0.5 dB
                // passband on a 100 dB axis) shades only a strip of MASK_STRIP px beyond
                // each bound: shading everything outside it would cover the panel.
                let narrow = match (m.min_db, m.max_db) {
                    (Some(lo), Some(hi)) => {
                        (fr.y(mag_v(lo)) - fr.y(mag_v(hi))).abs() < NARROW_WINDOW
                    }
                    _ => false,
                };
                for (level, above) in [(m.max_db, true), (m.min_db, false)] {
                    let Some(level) = level else { continue };
                    let yy = fr.y(mag_v(level));
                    let (y_from, y_to) = match (above, narrow) {
                        (true, false) => (fr.top, yy),
                        (false, false) => (yy, fr.top + PANEL_H),
                        (true, true) => ((yy - MASK_STRIP).max(fr.top), yy),
                        (false, true) => (yy, (yy + MASK_STRIP).min(fr.top + PANEL_H)),
                    };
                    if y_to - y_from > 0.05 {
                        let _ = writeln!(
                            body,
                            r#"<rect x="{xa:.1}" y="{y_from:.1}" width="{:.1}" height="{:.1}" fill="{MASK_FILL}" fill-opacity="0.13"/>"#,
                            xc - xa,
                            y_to - y_from
                        );
                    }
                    let _ = writeln!(
                        body,
                        r#"<line x1="{xa:.1}" y1="{yy:.1}" x2="{xc:.1}" y2="{yy:.1}" stroke="{MASK_FILL}" stroke-width="1.8"/>"#
                    );
                }
            }
        }
        // Traces.
        for (k, s) in b.series.iter().enumerate() {
            let (colour, dash) = PALETTE[k % PALETTE.len()];
            let pts: &[(f64, f64)] = match kind {
                PanelKind::Magnitude => &s.magnitude,
                PanelKind::Phase => &s.phase,
                PanelKind::Delay => s.delay.as_deref().unwrap_or(&[]),
            };
            let mut prev: Option<f64> = None;
            let mut seq: Vec<Option<(f64, f64)>> = Vec::with_capacity(pts.len() + 8);
            for &(f, v) in pts {
                let v = if *kind == PanelKind::Magnitude {
                    mag_v(v)
                } else {
                    v
                };
                if !(in_range(f) && v.is_finite()) {
                    seq.push(None);
                    prev = None;
                    continue;
                }
                // Wrapped phase: lift the pen at each jump.
                if b.wrapped
                    && *kind == PanelKind::Phase
                    && prev.is_some_and(|p| (v - p).abs() > 180.0)
                {
                    seq.push(None);
                }
                prev = Some(v);
                seq.push(Some((x(f), fr.y(v))));
            }
            let d = path(seq.into_iter());
            if d.is_empty() {
                continue;
            }
            let dash_attr = if dash.is_empty() {
                String::new()
            } else {
                format!(r#" stroke-dasharray="{dash}""#)
            };
            let _ = writeln!(
                body,
                r#"<path d="{d}" fill="none" stroke="{colour}" stroke-width="{}" stroke-linejoin="round" stroke-linecap="round"{dash_attr}/>"#,
                if k == 0 { 2.2 } else { 2.0 }
            );
        }
        // Marked points, then their labels.
        let marked: Vec<(&Mark, (f64, f64))> = b
            .marks
            .iter()
            .filter(|m| m.panel == *kind && in_range(m.freq))
            .filter_map(|m| {
                let v = if *kind == PanelKind::Magnitude {
                    mag_v(m.value)
                } else {
                    m.value
                };
                v.is_finite().then(|| (m, (x(m.freq), fr.y(v))))
            })
            .collect();
        for (_, p) in &marked {
            placer.points.push(*p);
            let _ = writeln!(
                body,
                r##"<circle cx="{:.1}" cy="{:.1}" r="3.6" fill="{MARK}" stroke="#ffffff" stroke-width="1"/>"##,
                p.0, p.1
            );
        }
        for (m, p) in &marked {
            placer.place(&m.label, *p, area, &traces_px[i], MARK);
        }
        if *kind == PanelKind::Magnitude {
            for m in b.masks {
                let (a, c) = (m.from.max(f0), m.to.min(f1));
                if a >= c {
                    continue;
                }
                if let Some(level) = m.max_db.or(m.min_db) {
                    let p = (0.5 * (x(a) + x(c)), fr.y(mag_v(level)));
                    placer.place(&m.name, p, area, &traces_px[i], MASK_FILL);
                }
            }
        }
    }
    // Frequency labels under the last panel.
    let axis_y = bottom + 24.0;
    for (f, text, _) in xticks.iter().filter(|t| !t.1.is_empty()) {
        // Centred under the tick, but kept inside the drawing at either end.
        let half = 0.5 * text_width(text, TICK_FONT);
        let cx = x(*f).clamp(half + 2.0, WIDTH - half - 2.0);
        let _ = writeln!(
            body,
            r#"<text x="{cx:.1}" y="{axis_y:.1}" font-size="{TICK_FONT}" text-anchor="middle" fill="{INK}">{}</text>"#,
            escape(text)
        );
    }
    let _ = writeln!(
        body,
        r#"<text x="{:.1}" y="{:.1}" font-size="{LABEL_FONT}" text-anchor="middle" fill="{INK}">frequency</text>"#,
        left + plot_w / 2.0,
        axis_y + 20.0
    );
    // Labels last, on a white ground, with a leader to their point.
    for p in &placer.placed {
        let Boxed(bx, by, bw, bh) = p.at;
        let (cx, cy) = (
            bx.max(p.point.0.min(bx + bw)),
            by.max(p.point.1.min(by + bh)),
        );
        if (cx - p.point.0).hypot(cy - p.point.1) > 8.0 {
            let _ = writeln!(
                body,
                r#"<line x1="{:.1}" y1="{:.1}" x2="{cx:.1}" y2="{cy:.1}" stroke="{}" stroke-width="0.9"/>"#,
                p.point.0, p.point.1, p.colour
            );
        }
        let _ = writeln!(
            body,
            r##"<rect x="{bx:.1}" y="{by:.1}" width="{bw:.1}" height="{bh:.1}" fill="#ffffff" fill-opacity="0.88"/><text x="{:.1}" y="{:.1}" font-size="{LABEL_FONT}" fill="{}">{}</text>"##,
            bx + 3.0,
            by + bh - 4.5,
            p.colour,
            escape(&p.text)
        );
    }
    let mut height = axis_y + 32.0;
    for f in &placer.footnotes {
        let (n, colour) = (f.number, f.colour);
        if !f.number_placed {
            let _ = writeln!(
                body,
                r#"<text x="{:.1}" y="{:.1}" font-size="{LABEL_FONT}" font-weight="bold" fill="{colour}">{n}</text>"#,
                f.point.0 + 5.0,
                f.point.1 - 5.0
            );
        }
        let _ = writeln!(
            body,
            r#"<text x="{left:.1}" y="{:.1}" font-size="{LABEL_FONT}" fill="{colour}">{n}: {}</text>"#,
            height + 4.0,
            escape(&f.text)
        );
        height += 18.0;
    }
    height += 4.0;

    let mut svg = String::with_capacity(body.len() + 2048);
    let _ = writeln!(
        svg,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH:.0}" height="{height:.0}" viewBox="0 0 {WIDTH:.0} {height:.0}" font-family="DejaVu Sans, Helvetica, Arial, sans-serif" role="img">"#
    );
    let _ = writeln!(svg, "<title>{}</title>", escape(&b.title));
    let _ = writeln!(
        svg,
        r##"<rect x="0" y="0" width="{WIDTH:.0}" height="{height:.0}" fill="#ffffff"/>"##
    );
    let _ = writeln!(
        svg,
        r#"<text x="16" y="{:.1}" font-size="{title_size}" fill="{INK}">{}</text>"#,
        12.0 + title_size,
        escape(&title)
    );
    for (lx, ly, k) in &legend {
        if let Some(band) = k.checked_sub(b.series.len()).and_then(|j| b.bands.get(j)) {
            let _ = writeln!(
                svg,
                r#"<rect x="{lx:.1}" y="{:.1}" width="28" height="10" fill="{}" fill-opacity="{:.2}"/><text x="{:.1}" y="{:.1}" font-size="{LABEL_FONT}" fill="{INK}">{}</text>"#,
                ly - 9.5,
                PALETTE[0].0,
                band.opacity.clamp(0.0, 1.0),
                lx + 34.0,
                ly,
                escape(&band.name)
            );
            continue;
        }
        let (colour, dash) = PALETTE[k % PALETTE.len()];
        let _ = writeln!(
            svg,
            r#"<line x1="{lx:.1}" y1="{:.1}" x2="{:.1}" y2="{:.1}" stroke="{colour}" stroke-width="2.4" stroke-dasharray="{dash}"/><text x="{:.1}" y="{:.1}" font-size="{LABEL_FONT}" fill="{INK}">{}</text>"#,
            ly - 4.5,
            lx + 28.0,
            ly - 4.5,
            lx + 34.0,
            ly,
            escape(&b.series[*k].name)
        );
    }
    svg.push_str(&body);
    svg.push_str("</svg>\n");
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn line(n: usize) -> Series {
        // A first-order low-pass at 1 kHz: −20 dB/decade above it (closed form).
        let pts: Vec<f64> = (0..n)
            .map(|k| 10f64.powf(1.0 + 4.0 * k as f64 / (n - 1) as f64))
            .collect();
        Series {
            name: "gain".into(),
            magnitude: pts
                .iter()
                .map(|&f| (f, -10.0 * (1.0 + (f / 1e3).powi(2)).log10()))
                .collect(),
            phase: pts
                .iter()
                .map(|&f| (f, -(f / 1e3).atan().to_degrees()))
                .collect(),
            delay: None,
        }
    }

    fn plot<'a>(s: &'a [Series], marks: &'a [Mark], masks: &'a [Mask]) -> Bode<'a> {
        Bode {
            marks,
            masks,
            ..Bode::new(
                "test".into(),
                (10.0, 1e5),
                s,
                MagnitudeScale::Decibels,
                "magnitude (dB)".into(),
            )
        }
    }

    #[test]
    fn coordinates_have_sub_pixel_precision() {
        let s = [line(200)];
        let svg = render(&plot(&s, &[], &[])).unwrap();
        let d = svg.split("<path d=\"").nth(1).unwrap();
        let fractional = d
            .split(['M', 'L', ' ', '"'])
            .take(100)
            .filter(|t| t.contains('.') && !t.ends_with(".0"))
            .count();
        assert!(fractional > 50, "{fractional}");
    }

    #[test]
    fn phase_ticks_are_multiples_of_45_and_magnitude_has_headroom() {
        let a = phase_axis(-90.0, 0.0, false);
        assert!(a.ticks.iter().all(|t| t.0 % 45.0 == 0.0));
        assert!(a.ticks.iter().any(|t| t.1 == "−90°"));
        let m = db_axis(-2.0, 0.0);
        assert!(m.hi >= 3.0 && m.hi - m.lo >= 20.0, "{m:?}");
        let w = phase_axis(-10.0, 10.0, true);
        assert_eq!(w.ticks.first().map(|t| t.1.as_str()), Some("−180°"));
    }

    #[test]
    fn ticks_carry_engineering_units() {
        let a = delay_axis(0.0, 0.012);
        assert!(a.ticks.iter().any(|t| t.1.ends_with(" ms")), "{a:?}");
        let z = log_axis(1.0, 3.5, "Ω");
        assert!(z.ticks.iter().any(|t| t.1 == "1 kΩ"), "{z:?}");
    }

    #[test]
    fn labels_never_overlap_and_markup_is_escaped() {
        let s = [line(400)];
        let marks: Vec<Mark> = (0..12)
            .map(|k| Mark {
                freq: 900.0 + 20.0 * k as f64,
                panel: PanelKind::Magnitude,
                value: -3.0,
                label: format!("<b>{k}</b> −3 dB at 1 kHz"),
            })
            .collect();
        let svg = render(&plot(&s, &marks, &[])).unwrap();
        assert!(!svg.contains("<b>"));
        let mut boxes = Vec::new();
        for part in svg.split(r#"<rect x=""#).skip(1) {
            if part.contains(r##"fill-opacity="0.88""##) {
                let nums: Vec<f64> = part
                    .split('"')
                    .filter_map(|t| t.parse().ok())
                    .take(4)
                    .collect();
                boxes.push(Boxed(nums[0], nums[1], nums[2], nums[3]));
            }
        }
        assert!(!boxes.is_empty());
        for (i, a) in boxes.iter().enumerate() {
            for b in &boxes[i + 1..] {
                assert!(!a.overlaps(b), "{a:?} {b:?}");
            }
        }
    }

    #[test]
    fn a_narrow_window_is_shaded_as_strips_and_a_one_sided_limit_to_the_edge() {
        let s = [line(200)];
        let heights = |masks: &[Mask]| -> Vec<f64> {
            let svg = render(&plot(&s, &[], masks)).unwrap();
            svg.split("<rect ")
                .filter(|r| r.contains(r#"fill-opacity="0.13""#))
                .map(|r| {
                    let h = r.split("height=\"").nth(1).unwrap();
                    h[..h.find('"').unwrap()].parse().unwrap()
                })
                .collect()
        };
        let window = Mask {
            name: "pass".into(),
            from: 10.0,
            to: 500.0,
            min_db: Some(-0.5),
            max_db: Some(0.5),
        };
        let h = heights(std::slice::from_ref(&window));
        assert_eq!(h.len(), 2);
        assert!(h.iter().all(|&v| v <= MASK_STRIP + 1e-9), "{h:?}");
        let stop = Mask {
            name: "stop".into(),
            from: 1e4,
            to: 1e5,
            min_db: None,
            max_db: Some(-30.0),
        };
        let h = heights(&[stop]);
        assert_eq!(h.len(), 1);
        assert!(h[0] > 3.0 * MASK_STRIP, "{h:?}");
    }

    #[test]
    fn bands_shade_under_the_trace_and_a_level_axis_has_plain_ticks_and_its_zero_line() {
        let mut s = line(100);
        s.phase.clear();
        let band = Band {
            name: "spread".into(),
            points: s
                .magnitude
                .iter()
                .map(|&(f, v)| (f, v - 1.0, v + 1.0))
                .collect(),
            opacity: 0.3,
        };
        let series = [s];
        let mut b = plot(&series, &[], &[]);
        let bands = [band];
        b.bands = &bands;
        let svg = render(&b).unwrap();
        assert!(
            svg.contains(r#"fill-opacity="0.30" stroke="none""#),
            "no band"
        );
        assert!(svg.contains(">spread</text>"), "no legend entry");
        assert!(
            !svg.contains(">phase<"),
            "a series without phase has no phase panel"
        );

        // Sensitivity-like values through zero: plain numbers, zero line emphasised.
        let level: Vec<(f64, f64)> = (0..50)
            .map(|k| {
                (
                    10f64.powf(1.0 + 4.0 * k as f64 / 49.0),
                    0.3 - 0.012 * k as f64,
                )
            })
            .collect();
        let series = [Series {
            name: "R1".into(),
            magnitude: level,
            phase: Vec::new(),
            delay: None,
        }];
        let mut b = plot(&series, &[], &[]);
        b.scale = MagnitudeScale::Level;
        let svg = render(&b).unwrap();
        assert!(svg.contains(r#"stroke-width="1.4""#), "no zero line");
        assert!(!svg.contains(" dB</text>"), "level ticks carry no unit");
        let a = level_axis(-0.288, 0.3);
        assert!(a.lo <= -0.288 && a.hi >= 0.3, "{a:?}");
        assert!(a.ticks.iter().any(|t| t.1 == "0"), "{a:?}");
    }

    #[test]
    fn wrapped_phase_breaks_at_jumps() {
        let mut s = line(100);
        s.phase = (0..100)
            .map(|k| (10f64.powf(1.0 + 4.0 * k as f64 / 99.0), -(k as f64) * 7.0))
            .map(|(f, p)| (f, p - 360.0 * (p / 360.0).round()))
            .collect();
        let s = [s];
        let mut b = plot(&s, &[], &[]);
        b.wrapped = true;
        let svg = render(&b).unwrap();
        let phase_path = svg.split("<path d=\"").nth(2).unwrap();
        let d = phase_path.split('"').next().unwrap();
        assert!(d.matches('M').count() >= 2, "{d}");
    }
}
