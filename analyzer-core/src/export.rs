//! Writers: CSV to any `impl Write`, SVG Bode plots into a `String`. Pure: no file paths.
//!
//! CSV columns (one response): `frequency_hz, magnitude_db, phase_deg, real, imag` and, with
//! group delay, `group_delay_s`. `real`/`imag` carry the unit of the response as a suffix
//! (`real_ohm`, `real_siemens`; none for a plain ratio) and magnitude is in dB relative to
//! 1 of that unit. With several responses in one file every column but the first is prefixed
//! with the response name and a dot (`gain.magnitude_db`). Numbers are written in the
//! shortest form that reads back to the same double (ryu), formatted in parallel blocks and
//! written in order.
//!
//! Phase is unwrapped along the sweep unless asked otherwise: the first point is in
//! (−180°, 180°], and every later point differs from the one before by at most 180°.

use crate::response::ResponseUnit;
use crate::units::format_eng;
use num_complex::Complex64;
use plotters::prelude::*;
use rayon::prelude::*;
use std::io::{self, Write};

/// Magnitude in dB of each value.
pub fn magnitudes_db(values: &[Complex64]) -> Vec<f64> {
    values.iter().map(|v| 20.0 * v.norm().log10()).collect()
}

/// Phase in degrees of each value, unwrapped along the slice when `unwrap` is set.
pub fn phases_deg(values: &[Complex64], unwrap: bool) -> Vec<f64> {
    let mut out: Vec<f64> = values.iter().map(|v| v.arg().to_degrees()).collect();
    if unwrap {
        let mut offset = 0.0;
        for i in 1..out.len() {
            let prev = out[i - 1];
            let mut cur = out[i] + offset;
            while cur - prev > 180.0 {
                cur -= 360.0;
                offset -= 360.0;
            }
            while cur - prev <= -180.0 {
                cur += 360.0;
                offset += 360.0;
            }
            out[i] = cur;
        }
    }
    out
}

/// One response's columns, ready to be written.
#[derive(Clone, Debug)]
pub struct Columns<'a> {
    /// Response name (used as a prefix when several share a file).
    pub name: &'a str,
    /// Unit of the values.
    pub unit: ResponseUnit,
    /// The values.
    pub values: &'a [Complex64],
    /// Group delay in seconds, if computed.
    pub delay: Option<&'a [f64]>,
    /// Whether to unwrap the phase.
    pub unwrap: bool,
}

const BLOCK: usize = 16_384;

/// Writes a CSV of one or more responses over `freqs`. Errors only from the writer.
pub fn write_csv<W: Write>(out: &mut W, freqs: &[f64], cols: &[Columns<'_>]) -> io::Result<()> {
    let prefix = cols.len() > 1;
    let mut header = csv::Writer::from_writer(Vec::new());
    let mut names = vec!["frequency_hz".to_string()];
    for c in cols {
        let p = if prefix {
            format!("{}.", c.name)
        } else {
            String::new()
        };
        let s = c.unit.column_suffix();
        names.push(format!("{p}magnitude_db"));
        names.push(format!("{p}phase_deg"));
        names.push(format!("{p}real{s}"));
        names.push(format!("{p}imag{s}"));
        if c.delay.is_some() {
            names.push(format!("{p}group_delay_s"));
        }
    }
    header.write_record(&names).map_err(io::Error::other)?;
    out.write_all(
        &header
            .into_inner()
            .map_err(|e| io::Error::other(e.to_string()))?,
    )?;

    let derived: Vec<(Vec<f64>, Vec<f64>)> = cols
        .iter()
        .map(|c| (magnitudes_db(c.values), phases_deg(c.values, c.unwrap)))
        .collect();
    let n = freqs.len();
    let blocks: Vec<Vec<u8>> = (0..n.div_ceil(BLOCK))
        .into_par_iter()
        .map(|b| {
            let mut buf = Vec::with_capacity(BLOCK * 24 * (1 + 5 * cols.len()));
            let mut r = ryu::Buffer::new();
            for k in b * BLOCK..((b + 1) * BLOCK).min(n) {
                buf.extend_from_slice(r.format(freqs[k]).as_bytes());
                for (c, (mag, ph)) in cols.iter().zip(&derived) {
                    for v in [mag[k], ph[k], c.values[k].re, c.values[k].im] {
                        buf.push(b',');
                        buf.extend_from_slice(r.format(v).as_bytes());
                    }
                    if let Some(d) = c.delay {
                        buf.push(b',');
                        buf.extend_from_slice(r.format(d[k]).as_bytes());
                    }
                }
                buf.push(b'\n');
            }
            buf
        })
        .collect();
    for b in blocks {
        out.write_all(&b)?;
    }
    Ok(())
}

/// A labelled point to mark on a plot.
#[derive(Clone, Debug, PartialEq)]
pub struct Marker {
    /// Frequency (Hz).
    pub freq: f64,
    /// Which panel: 0 magnitude, 1 phase, 2 group delay.
    pub panel: usize,
    /// Value on that panel's axis.
    pub value: f64,
    /// Short label.
    pub label: String,
}

/// What to draw.
#[derive(Clone, Debug)]
pub struct PlotInput<'a> {
    /// Title line (design title and response name).
    pub title: String,
    /// Frequencies (Hz), ascending, > 0 for the log axis.
    pub freqs: &'a [f64],
    /// Magnitude (dB).
    pub magnitude_db: &'a [f64],
    /// Magnitude axis label.
    pub magnitude_label: String,
    /// Phase (degrees).
    pub phase_deg: &'a [f64],
    /// Group delay (s), drawn as a third panel when present.
    pub delay_s: Option<&'a [f64]>,
    /// Points to mark.
    pub markers: &'a [Marker],
}

/// Error while drawing (plotters' own errors, as text).
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("plot: {0}")]
pub struct PlotError(pub String);

/// Points of a trace to draw: all of them when there are few; otherwise, per one of
/// `TRACE_BUCKETS` equal steps of log-frequency, the first, lowest and highest point, so the
/// drawn curve keeps every excursion a pixel could show while the SVG stays small.
fn decimate(freqs: &[f64], ys: &[f64], f0: f64, f1: f64) -> Vec<(f64, f64)> {
    let finite = freqs
        .iter()
        .zip(ys)
        .filter(|(_, y)| y.is_finite())
        .map(|(f, y)| (*f, *y));
    if freqs.len() <= 2 * TRACE_BUCKETS {
        return finite.collect();
    }
    let (l0, span) = (f0.ln(), (f1.ln() - f0.ln()).max(f64::MIN_POSITIVE));
    let mut out = Vec::with_capacity(3 * TRACE_BUCKETS);
    let mut bucket = usize::MAX;
    let mut group: Vec<(f64, f64)> = Vec::new();
    let flush = |group: &mut Vec<(f64, f64)>, out: &mut Vec<(f64, f64)>| {
        if let Some(&first) = group.first() {
            let lo = group
                .iter()
                .copied()
                .fold(first, |a, p| if p.1 < a.1 { p } else { a });
            let hi = group
                .iter()
                .copied()
                .fold(first, |a, p| if p.1 > a.1 { p } else { a });
            let mut three = [first, lo, hi];
            three.sort_by(|a, b| a.0.total_cmp(&b.0));
            for p in three {
                if out.last() != Some(&p) {
                    out.push(p);
                }
            }
        }
        group.clear();
    };
    for (f, y) in finite {
        let b = (((f.ln() - l0) / span) * TRACE_BUCKETS as f64) as usize;
        if b != bucket {
            flush(&mut group, &mut out);
            bucket = b;
        }
        group.push((f, y));
    }
    flush(&mut group, &mut out);
    out
}

const TRACE_BUCKETS: usize = 1500;

/// "10.0 Hz" → "10 Hz", "-20.0" → "-20": axis labels without idle zeros.
fn tidy_label(s: String) -> String {
    let (num, unit) = match s.find(' ') {
        Some(i) => (&s[..i], &s[i..]),
        None => (s.as_str(), ""),
    };
    if num.contains('.') && !num.contains('e') {
        let t = num.trim_end_matches('0').trim_end_matches('.');
        return format!("{t}{unit}");
    }
    s
}

fn perr<E: std::fmt::Display>(e: E) -> PlotError {
    PlotError(e.to_string())
}

fn padded_range(values: &[f64], min_span: f64) -> (f64, f64) {
    let finite = values.iter().copied().filter(|v| v.is_finite());
    let (lo, hi) = finite.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
        (a.min(v), b.max(v))
    });
    if !lo.is_finite() {
        return (-1.0, 1.0);
    }
    let span = (hi - lo).max(min_span);
    let mid = 0.5 * (hi + lo);
    (mid - 0.55 * span, mid + 0.55 * span)
}

const INK: RGBColor = RGBColor(0x1f, 0x3b, 0x57);
const TRACE: RGBColor = RGBColor(0x0b, 0x6e, 0x4f);
const MARK: RGBColor = RGBColor(0xb3, 0x3c, 0x1a);
const DECADE: RGBColor = RGBColor(0xa8, 0xb4, 0xc0);
const MINOR: RGBColor = RGBColor(0xe2, 0xe7, 0xec);

/// Renders stacked panels (magnitude, phase and optionally group delay) that share a
/// log-frequency axis with decade and minor grid lines, into an SVG string.
pub fn render_svg(input: &PlotInput<'_>) -> Result<String, PlotError> {
    let n = input.freqs.len();
    if n == 0 || input.freqs.iter().any(|f| !(f.is_finite() && *f > 0.0)) {
        return Err(PlotError(
            "a Bode plot needs frequencies above 0 Hz on its log axis; start the sweep above 0 Hz"
                .into(),
        ));
    }
    let (mut f0, mut f1) = (input.freqs[0], input.freqs[n - 1]);
    if f1 <= f0 {
        f0 /= 1.5;
        f1 *= 1.5;
    }
    let panels = if input.delay_s.is_some() { 3 } else { 2 };
    let height = 220 * panels as u32 + 70;
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (960, height)).into_drawing_area();
        root.fill(&WHITE).map_err(perr)?;
        let (top, body) = root.split_vertically(44);
        top.draw(&Text::new(
            input.title.clone(),
            (16, 14),
            ("sans-serif", 20).into_font().color(&INK),
        ))
        .map_err(perr)?;
        let areas = body.split_evenly((panels, 1));
        let series: Vec<(&[f64], String, f64)> = {
            let mut s = vec![
                (input.magnitude_db, input.magnitude_label.clone(), 1.0),
                (input.phase_deg, "phase (°)".to_string(), 10.0),
            ];
            if let Some(d) = input.delay_s {
                s.push((d, "group delay (s)".to_string(), 0.0));
            }
            s
        };
        for (p, (area, (ys, label, min_span))) in areas.iter().zip(series).enumerate() {
            let min_span = if min_span == 0.0 {
                ys.iter().fold(0.0f64, |a, v| a.max(v.abs())) * 0.1 + 1e-15
            } else {
                min_span
            };
            let (y0, y1) = padded_range(ys, min_span);
            let last = p + 1 == panels;
            let mut chart = ChartBuilder::on(area)
                .margin_left(12)
                .margin_right(24)
                .margin_top(6)
                .margin_bottom(6)
                .x_label_area_size(if last { 40 } else { 8 })
                .y_label_area_size(78)
                .build_cartesian_2d((f0..f1).log_scale(), y0..y1)
                .map_err(perr)?;
            // Minor and decade lines first, so the trace lies on top.
            let lo_dec = f0.log10().floor() as i32;
            let hi_dec = f1.log10().ceil() as i32;
            for d in lo_dec..=hi_dec {
                for m in 1..=9 {
                    let f = f64::from(m) * 10f64.powi(d);
                    if f < f0 || f > f1 {
                        continue;
                    }
                    let color = if m == 1 { DECADE } else { MINOR };
                    chart
                        .draw_series(LineSeries::new([(f, y0), (f, y1)], color.stroke_width(1)))
                        .map_err(perr)?;
                }
            }
            let mut mesh = chart.configure_mesh();
            mesh.disable_x_mesh()
                .y_desc(label)
                .y_labels(7)
                .max_light_lines(1)
                .light_line_style(WHITE)
                .bold_line_style(MINOR)
                .axis_style(INK)
                .label_style(("sans-serif", 13).into_font().color(&INK))
                .y_label_formatter(&|v| tidy_label(format_eng(*v, 3, "")));
            if last {
                mesh.x_desc("frequency (Hz)")
                    .x_label_formatter(&|f| tidy_label(format_eng(*f, 3, "Hz")));
            } else {
                mesh.x_label_formatter(&|_| String::new());
            }
            mesh.draw().map_err(perr)?;
            let pts = decimate(input.freqs, ys, f0, f1);
            chart
                .draw_series(LineSeries::new(pts, TRACE.stroke_width(2)))
                .map_err(perr)?;
            // Labels are staggered upwards so neighbouring markers stay readable.
            let shown = input
                .markers
                .iter()
                .filter(|m| m.panel == p && m.freq >= f0 && m.freq <= f1 && m.value.is_finite());
            for (i, m) in shown.enumerate() {
                let dy = -16 - 14 * (i as i32 % 3);
                let mark = EmptyElement::at((m.freq, m.value))
                    + Circle::new((0, 0), 4, MARK.filled())
                    + PathElement::new(vec![(0, 0), (6, dy + 8)], MARK.stroke_width(1))
                    + Text::new(
                        m.label.clone(),
                        (7, dy),
                        ("sans-serif", 12).into_font().color(&MARK),
                    );
                chart.draw_series(std::iter::once(mark)).map_err(perr)?;
            }
        }
        root.present().map_err(perr)?;
    }
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unwraps_phase_continuously() {
        let vals: Vec<Complex64> = [170.0f64, -170.0, -150.0, 160.0]
            .iter()
            .map(|d| Complex64::from_polar(1.0, d.to_radians()))
            .collect();
        let p = phases_deg(&vals, true);
        let expect = [170.0, 190.0, 210.0, 160.0];
        for (a, b) in p.iter().zip(expect) {
            assert!((a - b).abs() < 1e-9, "{p:?}");
        }
    }

    #[test]
    fn csv_has_units_in_column_names() {
        let v = [Complex64::new(1.0, 0.0), Complex64::new(0.0, 1.0)];
        let mut out = Vec::new();
        write_csv(
            &mut out,
            &[1.0, 10.0],
            &[Columns {
                name: "zin",
                unit: ResponseUnit::Ohms,
                values: &v,
                delay: None,
                unwrap: true,
            }],
        )
        .unwrap();
        let text = String::from_utf8(out).unwrap();
        assert_eq!(
            text,
            "frequency_hz,magnitude_db,phase_deg,real_ohm,imag_ohm\n1.0,0.0,0.0,1.0,0.0\n10.0,0.0,90.0,0.0,1.0\n"
        );
    }
}
