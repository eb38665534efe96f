//! Writers: CSV to any `impl Write`, SVG Bode plots into a `String`. Pure: no file paths.
//!
//! CSV columns (one response): `frequency_hz, magnitude_db, phase_deg, real, imag` and, with
//! group delay, `group_delay_s`. `real`/`imag` carry the unit of the response as a suffix
//! (`real_ohm`, `real_siemens`; none for a plain ratio) and magnitude is in dB relative to
//! 1 of that unit. With several responses in one file every column but the first is prefixed
//! with the response name and a dot (`gain.magnitude_db`). Numbers are written in the
//! shortest form that reads back to the same double (zmij, the Żmij algorithm; about twice as
//! fast as ryu here), formatted in parallel blocks and
//! written in order.
//!
//! Phase is unwrapped along the sweep ([`Unwrapper`]) unless asked otherwise: the first point is in
//! (−180°, 180°], and every later point differs from the one before by at most 180°.

use crate::response::ResponseUnit;
use crate::units::{format_eng, format_q};
use num_complex::Complex64;
use plotters::prelude::*;
use rayon::prelude::*;
use std::io::{self, Write};

/// Unwraps a phase sequence point by point, so a sweep can be unwrapped chunk by chunk: the
/// first value is kept as it is (in (−180°, 180°]), each later one is moved by whole turns to
/// within 180° of the one before.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Unwrapper {
    prev: Option<f64>,
    offset: f64,
}

impl Unwrapper {
    /// The unwrapped value of the next principal phase (degrees).
    pub fn next(&mut self, principal: f64) -> f64 {
        let mut cur = principal + self.offset;
        if let Some(prev) = self.prev {
            while cur - prev > 180.0 {
                cur -= 360.0;
                self.offset -= 360.0;
            }
            while cur - prev <= -180.0 {
                cur += 360.0;
                self.offset += 360.0;
            }
        }
        self.prev = Some(cur);
        cur
    }
}

/// Points per block of the parallel passes over a chunk (polar form, CSV text).
const BLOCK: usize = 16_384;

/// Magnitude and phase of a run of consecutive sweep values, computed once and shared by
/// every writer (CSV, figures' trace, plot): `20·log10|H|`, the principal phase `∠H` in
/// degrees, and the phase unwrapped along the sweep.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Polar {
    /// 20·log10|H| per point.
    pub db: Vec<f64>,
    /// Principal phase in degrees, as `atan2` gives it.
    pub principal_deg: Vec<f64>,
    /// Phase in degrees unwrapped along the sweep (see [`Unwrapper`]).
    pub unwrapped_deg: Vec<f64>,
}

impl Polar {
    /// The polar form of `values`; magnitude and principal phase in parallel blocks, then
    /// one cheap pass that unwraps, continuing from where `unwrap` left the previous run.
    pub fn compute(values: &[Complex64], unwrap: &mut Unwrapper) -> Polar {
        let n = values.len();
        let mut db = vec![0.0; n];
        let mut principal_deg = vec![0.0; n];
        db.par_chunks_mut(BLOCK)
            .zip(principal_deg.par_chunks_mut(BLOCK))
            .zip(values.par_chunks(BLOCK))
            .for_each(|((db, ph), v)| {
                for ((d, p), z) in db.iter_mut().zip(ph.iter_mut()).zip(v) {
                    *d = 20.0 * z.norm().log10();
                    *p = z.arg().to_degrees();
                }
            });
        let unwrapped_deg = principal_deg.iter().map(|&p| unwrap.next(p)).collect();
        Polar {
            db,
            principal_deg,
            unwrapped_deg,
        }
    }

    /// The phase column a writer shows: unwrapped or principal.
    pub fn phase_deg(&self, unwrapped: bool) -> &[f64] {
        if unwrapped {
            &self.unwrapped_deg
        } else {
            &self.principal_deg
        }
    }
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

/// A CSV written chunk by chunk: the header first, then each chunk's rows formatted in
/// parallel blocks and written in order. The caller supplies each chunk's [`Polar`] form
/// (computed once for all writers) and carries the phase unwrapping across chunks.
#[derive(Clone, Debug)]
pub struct CsvStream {
    unwrap: Vec<bool>,
    /// Per response, whether it is a noise density (its columns are density and dB).
    noise: Vec<bool>,
    /// Text of each block of the current chunk, reused from chunk to chunk.
    blocks: Vec<Vec<u8>>,
}

impl CsvStream {
    /// Writes the header for these responses (name, unit, whether a delay column follows,
    /// whether phase is unwrapped) and returns the stream.
    pub fn start<W: Write>(
        out: &mut W,
        cols: &[(&str, ResponseUnit, bool, bool)],
    ) -> io::Result<Self> {
        let prefix = cols.len() > 1;
        let mut header = csv::Writer::from_writer(Vec::new());
        let mut names = vec!["frequency_hz".to_string()];
        for &(name, unit, delay, _) in cols {
            let p = if prefix {
                format!("{name}.")
            } else {
                String::new()
            };
            let s = unit.column_suffix();
            if unit == ResponseUnit::NoiseDensity {
                names.push(format!("{p}density{s}"));
                names.push(format!("{p}density_db"));
                continue;
            }
            names.push(format!("{p}magnitude_db"));
            names.push(format!("{p}phase_deg"));
            names.push(format!("{p}real{s}"));
            names.push(format!("{p}imag{s}"));
            if delay {
                names.push(format!("{p}group_delay_s"));
            }
        }
        header.write_record(&names).map_err(io::Error::other)?;
        out.write_all(
            &header
                .into_inner()
                .map_err(|e| io::Error::other(e.to_string()))?,
        )?;
        Ok(CsvStream {
            unwrap: cols.iter().map(|c| c.3).collect(),
            noise: cols
                .iter()
                .map(|c| c.1 == ResponseUnit::NoiseDensity)
                .collect(),
            blocks: Vec::new(),
        })
    }

    /// Writes the rows of one chunk: `values[r]`, `polar[r]` and `delays[r]` are response
    /// r's columns over `freqs`.
    pub fn rows<W: Write>(
        &mut self,
        out: &mut W,
        freqs: &[f64],
        values: &[&[Complex64]],
        polar: &[&Polar],
        delays: &[Option<&[f64]>],
    ) -> io::Result<()> {
        let n = freqs.len();
        // Per response: values, magnitude, the phase shown, delay.
        type Cols<'c> = (
            &'c [Complex64],
            &'c [f64],
            &'c [f64],
            Option<&'c [f64]>,
            bool,
        );
        let cols: Vec<Cols<'_>> = values
            .iter()
            .zip(polar)
            .zip(delays)
            .zip(self.unwrap.iter().zip(&self.noise))
            .map(|(((v, p), d), (&u, &noise))| (*v, p.db.as_slice(), p.phase_deg(u), *d, noise))
            .collect();
        self.blocks.resize_with(n.div_ceil(BLOCK), Vec::new);
        self.blocks.par_iter_mut().enumerate().for_each(|(b, buf)| {
            let rows = b * BLOCK..((b + 1) * BLOCK).min(n);
            buf.clear();
            buf.reserve(rows.len() * (25 + 5 * 25 * cols.len()));
            let mut r = zmij::Buffer::new();
            for k in rows {
                buf.extend_from_slice(r.format(freqs[k]).as_bytes());
                for &(v, db, ph, d, noise) in &cols {
                    if noise {
                        for x in [v[k].re, db[k]] {
                            buf.push(b',');
                            buf.extend_from_slice(r.format(x).as_bytes());
                        }
                        continue;
                    }
                    for x in [db[k], ph[k], v[k].re, v[k].im] {
                        buf.push(b',');
                        buf.extend_from_slice(r.format(x).as_bytes());
                    }
                    if let Some(d) = d {
                        buf.push(b',');
                        buf.extend_from_slice(r.format(d[k]).as_bytes());
                    }
                }
                buf.push(b'\n');
            }
        });
        for b in &self.blocks {
            out.write_all(b)?;
        }
        Ok(())
    }
}

/// Writes a CSV of one or more whole responses over `freqs`. Errors only from the writer.
pub fn write_csv<W: Write>(out: &mut W, freqs: &[f64], cols: &[Columns<'_>]) -> io::Result<()> {
    let meta: Vec<(&str, ResponseUnit, bool, bool)> = cols
        .iter()
        .map(|c| (c.name, c.unit, c.delay.is_some(), c.unwrap))
        .collect();
    let mut stream = CsvStream::start(out, &meta)?;
    let values: Vec<&[Complex64]> = cols.iter().map(|c| c.values).collect();
    let polar: Vec<Polar> = cols
        .iter()
        .map(|c| Polar::compute(c.values, &mut Unwrapper::default()))
        .collect();
    let polar: Vec<&Polar> = polar.iter().collect();
    let delays: Vec<Option<&[f64]>> = cols.iter().map(|c| c.delay).collect();
    stream.rows(out, freqs, &values, &polar, &delays)
}

/// Writes a CSV of columns over `freqs`: the header `names` (the first is the frequency's),
/// then one row per frequency with each column's value, numbers in their shortest exact form.
pub fn write_columns_csv<W: Write>(
    out: &mut W,
    names: &[String],
    freqs: &[f64],
    cols: &[Vec<f64>],
) -> io::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    w.write_record(names).map_err(io::Error::other)?;
    let mut z = zmij::Buffer::new();
    let mut row: Vec<String> = Vec::with_capacity(cols.len() + 1);
    for (k, f) in freqs.iter().enumerate() {
        row.clear();
        row.push(z.format(*f).to_string());
        row.extend(
            cols.iter()
                .map(|c| z.format(c.get(k).copied().unwrap_or(f64::NAN)).to_string()),
        );
        w.write_record(&row).map_err(io::Error::other)?;
    }
    w.flush()
}

/// Error while drawing (plotters' own errors, as text).
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("plot: {0}")]
pub struct PlotError(pub String);

/// Points of a trace to draw, from point k's frequency `freq(k)` and value `y(k)` for
/// `k < n`: all of them when there are few; otherwise, per one of `TRACE_BUCKETS` equal steps
/// of log-frequency, the first, lowest and highest point, so the drawn curve keeps every
/// excursion a pixel could show while the SVG stays small. Non-finite values and points at
/// or below 0 Hz are left out.
pub fn decimate(
    n: usize,
    freq: impl Fn(usize) -> f64,
    y: impl Fn(usize) -> f64,
) -> Vec<(f64, f64)> {
    let finite = (0..n)
        .map(|k| (freq(k), y(k)))
        .filter(|(f, v)| *f > 0.0 && f.is_finite() && v.is_finite());
    if n <= 2 * TRACE_BUCKETS {
        return finite.collect();
    }
    let (f0, f1) = (freq(0).max(f64::MIN_POSITIVE), freq(n - 1));
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
    for (f, v) in finite {
        let b = (((f.ln() - l0) / span) * TRACE_BUCKETS as f64) as usize;
        if b != bucket {
            flush(&mut group, &mut out);
            bucket = b;
        }
        group.push((f, v));
    }
    flush(&mut group, &mut out);
    out
}

const TRACE_BUCKETS: usize = 1500;

/// "10.0 Hz" → "10 Hz", "-20.0" → "-20": axis labels without idle zeros.
pub(crate) fn tidy_label(s: String) -> String {
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

const INK: RGBColor = RGBColor(0x1f, 0x3b, 0x57);
const TRACE: RGBColor = RGBColor(0x0b, 0x6e, 0x4f);
const MARK: RGBColor = RGBColor(0xb3, 0x3c, 0x1a);
const DECADE: RGBColor = RGBColor(0xa8, 0xb4, 0xc0);
const MINOR: RGBColor = RGBColor(0xe2, 0xe7, 0xec);

/// Draws the legend of a chart's labelled series in our style.
/// The charts below are drawn by plotters (whose SVG writer rounds every coordinate to a
/// whole unit) in a coordinate space `HI` times larger than the picture, every size scaled
/// alike, and [`scaled_down`] sets the picture's size back: coordinates then have a quarter
/// of a pixel's resolution, and no trace shows stair steps.
const HI: u32 = 4;
/// [`HI`] for plotters' signed pixel offsets.
const HI_I: i32 = HI as i32;

/// Sets a plotters SVG drawn at `HI` times its size back to its picture size (the viewBox
/// keeps the drawing's coordinates).
fn scaled_down(svg: String) -> String {
    let Some(end) = svg.find('>') else { return svg };
    let head = &svg[..end];
    let attr = |name: &str| -> Option<u32> {
        let at = head.find(&format!(" {name}=\""))? + name.len() + 3;
        let rest = &head[at..];
        rest[..rest.find('"')?].parse().ok()
    };
    let (Some(w), Some(h)) = (attr("width"), attr("height")) else {
        return svg;
    };
    let new_head = head
        .replacen(
            &format!(" width=\"{w}\""),
            &format!(" width=\"{}\"", w / HI),
            1,
        )
        .replacen(
            &format!(" height=\"{h}\""),
            &format!(" height=\"{}\"", h / HI),
            1,
        );
    format!("{new_head}{}", &svg[end..])
}

/// Display size (px) of a plotters font size given at `HI`×: plotters writes sizes in
/// points, 1.24 to the pixel (measured in its output: size 20 is written as 16.13).
fn shown_size(size: i32) -> f64 {
    f64::from(size) / 1.24 / f64::from(HI)
}

/// Font size of the marks' labels on the charts drawn by plotters (at `HI`×).
const CHART_LABEL: i32 = 16 * HI_I;

/// Labels of marked points on a chart drawn by plotters at `HI`×, placed by the Bode writer's
/// placer in display pixels: no label overlaps another, a fixed text (reserved) or a marked
/// point, all stay inside the plotting area and off the traces where they can; a label with
/// no room is numbered at its point and listed at the foot of the picture.
struct ChartLabels {
    placer: crate::bode::Placer<RGBColor>,
    within: crate::bode::Boxed,
    traces: Vec<(f64, f64)>,
}

impl ChartLabels {
    /// For a chart whose plotting area spans these backend pixels.
    fn new(area: (std::ops::Range<i32>, std::ops::Range<i32>)) -> Self {
        let d = |v: i32| f64::from(v) / f64::from(HI);
        ChartLabels {
            placer: crate::bode::Placer::new(shown_size(CHART_LABEL)),
            within: crate::bode::Boxed(
                d(area.0.start),
                d(area.1.start),
                d(area.0.end - area.0.start),
                d(area.1.end - area.1.start),
            ),
            traces: Vec::new(),
        }
    }

    fn display(p: (i32, i32)) -> (f64, f64) {
        (
            f64::from(p.0) / f64::from(HI),
            f64::from(p.1) / f64::from(HI),
        )
    }

    /// The box (display px, 2 px of margin) of a text drawn at backend point `p`
    /// (top-left anchored) in font `size`.
    fn text_box(p: (i32, i32), text: &str, size: i32) -> crate::bode::Boxed {
        let (x, y) = Self::display(p);
        let h = shown_size(size);
        crate::bode::Boxed(
            x - 2.0,
            y - 2.0,
            crate::bode::text_width(text, h) + 4.0,
            h + 4.0,
        )
    }

    /// Keeps labels off a text drawn at backend point `p` in font `size`.
    fn reserve(&mut self, p: (i32, i32), text: &str, size: i32) {
        self.placer.reserve(Self::text_box(p, text, size));
    }

    /// Like [`ChartLabels::reserve`], but only when the text would overlap nothing kept
    /// clear so far; says whether it did (the caller draws the text only then).
    fn try_reserve(&mut self, p: (i32, i32), text: &str, size: i32) -> bool {
        let b = Self::text_box(p, text, size);
        if self.placer.taken(&b) {
            return false;
        }
        self.placer.reserve(b);
        true
    }

    /// Keeps labels off the legend box in a top corner of the plotting area (display px).
    fn reserve_legend(&mut self, right: bool, w: f64, h: f64) {
        let a = self.within;
        let x = if right { a.0 + a.2 - w } else { a.0 };
        self.placer.reserve(crate::bode::Boxed(x, a.1, w, h));
    }

    /// A trace the labels should avoid (backend pixels).
    fn avoid(&mut self, pts: impl Iterator<Item = (i32, i32)>) {
        self.traces.extend(pts.map(Self::display));
    }

    /// Marked points (backend pixels) with their labels: every point is kept clear before
    /// any label is placed.
    fn mark_all(&mut self, marks: &[((i32, i32), String, RGBColor)]) {
        for (p, _, _) in marks {
            self.placer.points.push(Self::display(*p));
        }
        for (p, text, colour) in marks {
            self.placer
                .place(text, Self::display(*p), self.within, &self.traces, *colour);
        }
    }

    /// Draws the labels onto `root` (backend pixels), footnotes from `foot_y` (display px).
    fn draw(&self, root: &SvgArea<'_>, foot_y: f64) -> Result<(), PlotError> {
        let b = |v: f64| (v * f64::from(HI)).round() as i32;
        let font = ("sans-serif", CHART_LABEL).into_font();
        for p in &self.placer.placed {
            let crate::bode::Boxed(bx, by, bw, bh) = p.at;
            let (cx, cy) = (
                bx.max(p.point.0.min(bx + bw)),
                by.max(p.point.1.min(by + bh)),
            );
            if (cx - p.point.0).hypot(cy - p.point.1) > 8.0 {
                root.draw(&PathElement::new(
                    vec![(b(p.point.0), b(p.point.1)), (b(cx), b(cy))],
                    p.colour.stroke_width(HI),
                ))
                .map_err(perr)?;
            }
            root.draw(&Rectangle::new(
                [(b(bx), b(by)), (b(bx + bw), b(by + bh))],
                WHITE.mix(0.88).filled(),
            ))
            .map_err(perr)?;
            root.draw(&Text::new(
                p.text.clone(),
                (b(bx + 3.0), b(by + 2.0)),
                font.clone().color(&p.colour),
            ))
            .map_err(perr)?;
        }
        for f in &self.placer.footnotes {
            if !f.number_placed {
                root.draw(&Text::new(
                    f.number.to_string(),
                    (b(f.point.0 + 5.0), b(f.point.1 - 18.0)),
                    font.clone().color(&f.colour),
                ))
                .map_err(perr)?;
            }
            root.draw(&Text::new(
                format!("{}: {}", f.number, f.text),
                (b(16.0), b(foot_y + 18.0 * (f.number as f64 - 1.0))),
                font.clone().color(&f.colour),
            ))
            .map_err(perr)?;
        }
        Ok(())
    }
}

fn legend<'b, CT: plotters::coord::CoordTranslate>(
    chart: &mut ChartContext<'b, SVGBackend<'b>, CT>,
    position: SeriesLabelPosition,
) -> Result<(), PlotError> {
    chart
        .configure_series_labels()
        .background_style(WHITE.mix(0.85))
        .border_style(MINOR)
        .label_font(("sans-serif", 15 * HI_I).into_font().color(&INK))
        .legend_area_size(30 * HI)
        .margin(5 * HI)
        .position(position)
        .draw()
        .map_err(perr)
}

type SvgArea<'b> = DrawingArea<SVGBackend<'b>, plotters::coord::Shift>;

/// Fills a plot white, writes its title line, and returns the area below the title.
fn titled<'b>(root: &SvgArea<'b>, title: &str) -> Result<SvgArea<'b>, PlotError> {
    root.fill(&WHITE).map_err(perr)?;
    let (head, body) = root.split_vertically(44 * HI);
    head.draw(&Text::new(
        title.to_string(),
        (16 * HI_I, 14 * HI_I),
        ("sans-serif", 20 * HI_I).into_font().color(&INK),
    ))
    .map_err(perr)?;
    Ok(body)
}

/// Where a root sits on the pole–zero chart: its natural frequency on a log radius (decades
/// above `inner`), its angle the angle of `s` itself (the left half-plane on the left), so
/// Q = 1/(2·cos θ) is read off the angle θ from the negative real axis. Roots at the origin
/// sit at the centre.
fn chart_xy(s_re: f64, s_im: f64, inner: f64) -> (f64, f64) {
    let m = (s_re * s_re + s_im * s_im).sqrt() / (2.0 * std::f64::consts::PI);
    if m <= 0.0 {
        return (0.0, 0.0);
    }
    let r = (m / inner).log10().max(0.0);
    let phi = s_im.atan2(s_re);
    (r * phi.cos(), r * phi.sin())
}

/// The pole–zero chart of one response, a look of our own: the upper half of the s-plane
/// (pairs shown once) with the natural frequency f0 = |s|/2π on a log radius — one ring per
/// decade, labelled in Hz — and the angle of `s` as it is, so the rays mark Q = 0.5 (the real
/// axis), 0.71, 1, 2, 5 and 20 on both halves. Poles are drawn as crosses, zeros as rings;
/// the right half-plane (unstable poles, right-half-plane zeros) is shaded.
pub fn render_pole_zero_svg(
    title: &str,
    rows: &[crate::poles::RootRow],
) -> Result<String, PlotError> {
    use std::f64::consts::PI;
    let nonzero: Vec<f64> = rows.iter().filter(|r| !r.origin).map(|r| r.f0_hz).collect();
    let lo = nonzero.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = nonzero.iter().copied().fold(0.0, f64::max);
    let (lo, hi) = if nonzero.is_empty() {
        (1.0, 10.0)
    } else {
        (lo, hi)
    };
    // Rings from a decade below the lowest root to a decade above the highest.
    let inner = 10f64.powf(lo.log10().floor() - 1.0);
    let outer_dec = (hi / inner).log10().ceil().max(1.0) + 0.0;
    let r_max = outer_dec;
    let mut svg = String::new();
    {
        let (w, h) = (760u32, 460u32);
        let root = SVGBackend::with_string(&mut svg, (w * HI, h * HI)).into_drawing_area();
        root.fill(&WHITE).map_err(perr)?;
        let (top, body) = root.split_vertically(44 * HI);
        top.draw(&Text::new(
            title.to_string(),
            (16 * HI_I, 14 * HI_I),
            ("sans-serif", 20 * HI_I).into_font().color(&INK),
        ))
        .map_err(perr)?;
        let pad = 0.12 * r_max;
        let mut chart = ChartBuilder::on(&body)
            .margin(16 * HI)
            .build_cartesian_2d(-(r_max + pad)..(r_max + pad), -0.04 * r_max..(r_max + pad))
            .map_err(perr)?;
        let mut labels = ChartLabels::new(chart.plotting_area().get_pixel_range());
        // The right half-plane, shaded.
        chart
            .draw_series(std::iter::once(Rectangle::new(
                [(0.0, 0.0), (r_max + pad, r_max + pad)],
                RGBColor(0xf6, 0xe7, 0xe1).filled(),
            )))
            .map_err(perr)?;
        // Decade rings, labelled on the jω axis.
        for d in 1..=(r_max as i32) {
            let r = f64::from(d);
            let arc: Vec<(f64, f64)> = (0..=180)
                .map(|k| {
                    let a = PI * f64::from(k) / 180.0;
                    (r * a.cos(), r * a.sin())
                })
                .collect();
            chart
                .draw_series(LineSeries::new(arc, MINOR.stroke_width(HI)))
                .map_err(perr)?;
            let f = inner * 10f64.powi(d);
            let text = tidy_label(format_eng(f, 3, "Hz"));
            labels.reserve(chart.backend_coord(&(0.04 * r_max, r)), &text, 15 * HI_I);
            chart
                .draw_series(std::iter::once(Text::new(
                    text,
                    (0.04 * r_max, r),
                    ("sans-serif", 15 * HI_I).into_font().color(&INK),
                )))
                .map_err(perr)?;
        }
        // Rays of constant Q, both halves, and the axes.
        for q in [std::f64::consts::FRAC_1_SQRT_2, 1.0, 2.0, 5.0, 20.0] {
            let theta = (1.0 / (2.0 * q)).acos();
            for side in [PI - theta, theta] {
                let end = (r_max * side.cos(), r_max * side.sin());
                chart
                    .draw_series(LineSeries::new([(0.0, 0.0), end], MINOR.stroke_width(HI)))
                    .map_err(perr)?;
                if side > PI / 2.0 {
                    // Anchored at its right end, so the label runs away from the jω axis.
                    let text = format!("Q {}", tidy_label(format!("{q:.2}")));
                    let at = chart.backend_coord(&(end.0 * 1.02, end.1 * 1.02));
                    let w = (crate::bode::text_width(&text, shown_size(14 * HI_I)) * f64::from(HI))
                        as i32;
                    let h = (shown_size(14 * HI_I) * f64::from(HI)) as i32;
                    if !labels.try_reserve((at.0 - w, at.1 - h), &text, 14 * HI_I) {
                        continue;
                    }
                    root.draw(&Text::new(
                        text,
                        (at.0 - w, at.1 - h),
                        ("sans-serif", 14 * HI_I).into_font().color(&DECADE),
                    ))
                    .map_err(perr)?;
                }
            }
        }
        chart
            .draw_series(LineSeries::new(
                [(-(r_max + pad), 0.0), (r_max + pad, 0.0)],
                INK.stroke_width(HI),
            ))
            .map_err(perr)?;
        chart
            .draw_series(LineSeries::new(
                [(0.0, 0.0), (0.0, r_max + pad)],
                INK.stroke_width(HI),
            ))
            .map_err(perr)?;
        chart
            .draw_series(std::iter::once(Text::new(
                "jω",
                (0.02 * r_max, r_max + 0.6 * pad),
                ("sans-serif", 16 * HI_I).into_font().color(&INK),
            )))
            .map_err(perr)?;
        labels.reserve(
            chart.backend_coord(&(-(r_max + pad) * 0.98, -0.03 * r_max)),
            "stable (left half-plane)",
            14 * HI_I,
        );
        labels.reserve(
            chart.backend_coord(&(0.02 * r_max, r_max + 0.6 * pad)),
            "jω",
            16 * HI_I,
        );
        chart
            .draw_series(std::iter::once(Text::new(
                "stable (left half-plane)",
                (-(r_max + pad) * 0.98, -0.03 * r_max),
                ("sans-serif", 14 * HI_I).into_font().color(&INK),
            )))
            .map_err(perr)?;
        let mut marked = Vec::new();
        for r in rows {
            let (x, y) = chart_xy(r.s_re, r.s_im, inner);
            let label = match r.q {
                Some(q) if q.is_finite() && !r.on_axis => format!(
                    "{} Q {}",
                    tidy_label(format_eng(r.f0_hz, 4, "Hz")),
                    format_q(q, 3)
                ),
                _ => tidy_label(format_eng(r.f0_hz, 4, "Hz")),
            };
            let color = if r.what == "pole" { MARK } else { TRACE };
            if r.what == "pole" {
                let mark = EmptyElement::at((x, y))
                    + PathElement::new(
                        vec![(-6 * HI_I, -6 * HI_I), (6 * HI_I, 6 * HI_I)],
                        color.stroke_width(2 * HI),
                    )
                    + PathElement::new(
                        vec![(-6 * HI_I, 6 * HI_I), (6 * HI_I, -6 * HI_I)],
                        color.stroke_width(2 * HI),
                    );
                chart.draw_series(std::iter::once(mark)).map_err(perr)?;
            } else {
                let mark = EmptyElement::at((x, y))
                    + Circle::new((0, 0), 6 * HI, color.stroke_width(2 * HI));
                chart.draw_series(std::iter::once(mark)).map_err(perr)?;
            }
            marked.push((chart.backend_coord(&(x, y)), label, color));
        }
        labels.mark_all(&marked);
        labels.draw(&root, f64::from(h) - 40.0)?;
        root.present().map_err(perr)?;
    }
    Ok(scaled_down(svg))
}

/// The poles and zeros as CSV: one row per root (both members of a pair), with its natural
/// frequency and, for a pair, its Q.
pub fn write_poles_csv<W: Write>(out: &mut W, rows: &[crate::poles::RootRow]) -> io::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    w.write_record([
        "what",
        "s_re_rad_per_s",
        "s_im_rad_per_s",
        "f0_hz",
        "q",
        "right_half_plane",
    ])
    .map_err(io::Error::other)?;
    let mut z = zmij::Buffer::new();
    for r in rows {
        let members: &[f64] = if r.pair { &[1.0, -1.0] } else { &[1.0] };
        for sign in members {
            let q = r.q.map_or(String::new(), |q| z.format(q).to_string());
            let rec = [
                r.what.to_string(),
                z.format(r.s_re).to_string(),
                z.format(sign * r.s_im).to_string(),
                z.format(r.f0_hz).to_string(),
                q,
                r.right_half_plane.to_string(),
            ];
            w.write_record(&rec).map_err(io::Error::other)?;
        }
    }
    w.flush()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nyquist_rings_read_as_powers_of_ten_not_prefixes() {
        assert_eq!(ring_label(10.0), "|L| = 10");
        assert_eq!(ring_label(1000.0), "|L| = 1000");
        assert_eq!(ring_label(1e5), "|L| = 10⁵");
        assert_eq!(ring_label(1e12), "|L| = 10¹²");
    }

    #[test]
    fn charts_drawn_at_four_times_keep_their_picture_size() {
        let svg = render_nyquist_svg(&NyquistPlot {
            title: "t".into(),
            loop_gain: &[
                (1.0, Complex64::new(100.0, -10.0)),
                (10.0, Complex64::new(-0.5, -0.5)),
            ],
            phase_margin: None,
            gain_margin: None,
        })
        .unwrap();
        assert!(
            svg.starts_with(r#"<svg width="720" height="760" viewBox="0 0 2880 3040""#),
            "{}",
            &svg[..100]
        );
    }

    #[test]
    fn unwraps_phase_continuously() {
        let vals: Vec<Complex64> = [170.0f64, -170.0, -150.0, 160.0]
            .iter()
            .map(|d| Complex64::from_polar(1.0, d.to_radians()))
            .collect();
        let mut u = Unwrapper::default();
        let p: Vec<f64> = vals.iter().map(|v| u.next(v.arg().to_degrees())).collect();
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

/// What an envelope plot shows: a tolerance study's spread of |H| with the nominal trace.
#[derive(Clone, Debug)]
pub struct EnvelopePlot<'a> {
    /// Title line.
    pub title: String,
    /// The response's unit symbol ([`ResponseUnit::symbol`]), drawn as the Bode plots draw
    /// that unit ([`crate::bode::MagnitudeScale::of`]); an unknown symbol in dB re 1 unit.
    pub unit: &'a str,
    /// The spread.
    pub envelope: &'a crate::spread::EnvelopeTraces,
    /// Limits on this response, drawn as masks over their forbidden regions.
    pub limits: &'a [crate::metrics::Limit],
}

fn bode_error(e: crate::bode::BodeError) -> PlotError {
    PlotError(e.0)
}

/// Renders an envelope plot with the Bode writer: the min–max band light, the 5–95 % band
/// darker, the nominal trace on top, and each limit's forbidden region as a mask with its
/// name.
pub fn render_envelope_svg(input: &EnvelopePlot<'_>) -> Result<String, PlotError> {
    use crate::bode::{Band, Bode, MagnitudeScale, Mask, Series};
    let e = input.envelope;
    let keep: Vec<usize> = (0..e.freqs.len())
        .filter(|&k| e.freqs[k] > 0.0 && e.min[k].is_finite() && e.max[k].is_finite())
        .collect();
    let (Some(&first), Some(&last)) = (keep.first(), keep.last()) else {
        return Err(PlotError(
            "an envelope plot needs finite magnitudes at frequencies above 0 Hz".into(),
        ));
    };
    let (scale, label) = match ResponseUnit::from_symbol(input.unit) {
        Some(unit) => MagnitudeScale::of(unit, false),
        None => (
            MagnitudeScale::Decibels,
            format!("magnitude (dB re 1 {})", input.unit),
        ),
    };
    let band = |name: &str, lo: &[f64], hi: &[f64], opacity: f64| Band {
        name: name.into(),
        points: keep.iter().map(|&k| (e.freqs[k], lo[k], hi[k])).collect(),
        opacity,
    };
    let bands = [
        band("min … max", &e.min, &e.max, 0.16),
        band("5 % … 95 %", &e.p5, &e.p95, 0.32),
    ];
    let series = [Series {
        name: "nominal".into(),
        magnitude: keep.iter().map(|&k| (e.freqs[k], e.nominal[k])).collect(),
        phase: Vec::new(),
        delay: None,
    }];
    let masks: Vec<Mask> = input.limits.iter().map(Mask::of).collect();
    crate::bode::render(&Bode {
        masks: &masks,
        bands: &bands,
        ..Bode::new(
            input.title.clone(),
            (e.freqs[first], e.freqs[last]),
            &series,
            scale,
            label,
        )
    })
    .map_err(bode_error)
}

/// Several labelled traces on one log-frequency axis (variants of a design, sensitivities).
#[derive(Clone, Debug)]
pub struct LinesPlot<'a> {
    /// Title line.
    pub title: String,
    /// Axis label with unit.
    pub label: String,
    /// (legend label, (frequency, value) points ascending), drawn in this order.
    pub series: &'a [(String, Vec<(f64, f64)>)],
}

/// Renders several traces of a plain level over log frequency with the Bode writer (its
/// palette and legend, sub-pixel coordinates, the zero line emphasised).
pub fn render_lines_svg(input: &LinesPlot<'_>) -> Result<String, PlotError> {
    use crate::bode::{Bode, MagnitudeScale, Series};
    let pts = || {
        input
            .series
            .iter()
            .flat_map(|s| s.1.iter())
            .filter(|p| p.0 > 0.0 && p.1.is_finite())
    };
    let (f0, f1) = pts().fold((f64::INFINITY, 0.0f64), |(a, b), p| {
        (a.min(p.0), b.max(p.0))
    });
    if !(f0.is_finite() && f1 > f0) {
        return Err(PlotError(
            "a plot over frequency needs two frequencies above 0 Hz".into(),
        ));
    }
    let series: Vec<Series> = input
        .series
        .iter()
        .map(|(name, points)| Series {
            name: name.clone(),
            magnitude: points.iter().copied().filter(|p| p.0 > 0.0).collect(),
            phase: Vec::new(),
            delay: None,
        })
        .collect();
    crate::bode::render(&Bode::new(
        input.title.clone(),
        (f0, f1),
        &series,
        MagnitudeScale::Level,
        input.label.clone(),
    ))
    .map_err(bode_error)
}

const MASK: RGBColor = RGBColor(0xb3, 0x3c, 0x1a);

/// A circle of radius `r` about (cx, cy), as 361 points (closed).
fn circle_points(cx: f64, cy: f64, r: f64) -> impl Iterator<Item = (f64, f64)> {
    (0..=360).map(move |k| {
        let t = std::f64::consts::TAU * f64::from(k) / 360.0;
        (cx + r * t.cos(), cy + r * t.sin())
    })
}

/// What a Smith chart shows: one port's reflection coefficient over frequency.
#[derive(Clone, Debug)]
pub struct SmithPlot<'a> {
    /// Title line.
    pub title: String,
    /// (frequency, Γ) ascending in frequency.
    pub gamma: &'a [(f64, num_complex::Complex64)],
    /// A VSWR circle to draw (|Γ| = (s − 1)/(s + 1)), where wanted.
    pub vswr_circle: Option<f64>,
}

/// Renders a Smith chart of our own look: the unit circle, circles of constant normalised
/// resistance r ∈ {0.2, 0.5, 1, 2, 5} and arcs of constant reactance x ∈ ±{0.2, 0.5, 1, 2, 5}
/// (labelled), the trace of Γ with the first and last frequency and each decade marked, and
/// a VSWR circle.
pub fn render_smith_svg(input: &SmithPlot<'_>) -> Result<String, PlotError> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (720 * HI, 760 * HI)).into_drawing_area();
        let body = titled(&root, &input.title)?;
        let mut chart = ChartBuilder::on(&body)
            .margin(16 * HI)
            .build_cartesian_2d(-1.12f64..1.12f64, -1.12f64..1.12f64)
            .map_err(perr)?;
        let mut labels = ChartLabels::new(chart.plotting_area().get_pixel_range());
        // The part of a circle inside the unit circle (the chart's edge).
        let circle = |cx: f64, cy: f64, r: f64| -> Vec<(f64, f64)> {
            circle_points(cx, cy, r)
                .filter(|(x, y)| x * x + y * y <= 1.0 + 1e-9)
                .collect()
        };
        // Grid: the real axis, circles of constant r, arcs of constant x.
        chart
            .draw_series(LineSeries::new(
                [(-1.0, 0.0), (1.0, 0.0)],
                DECADE.stroke_width(HI),
            ))
            .map_err(perr)?;
        for r in [0.2, 0.5, 1.0, 2.0, 5.0] {
            chart
                .draw_series(LineSeries::new(
                    circle(r / (1.0 + r), 0.0, 1.0 / (1.0 + r)),
                    DECADE.stroke_width(HI),
                ))
                .map_err(perr)?;
            let x0 = (r - 1.0) / (r + 1.0);
            labels.reserve(
                chart.backend_coord(&(x0 + 0.01, 0.02)),
                &format!("{r}"),
                14 * HI_I,
            );
            chart
                .draw_series(std::iter::once(Text::new(
                    format!("{r}"),
                    (x0 + 0.01, 0.02),
                    ("sans-serif", 14 * HI_I).into_font().color(&INK),
                )))
                .map_err(perr)?;
        }
        for x in [0.2f64, 0.5, 1.0, 2.0, 5.0] {
            for sign in [1.0, -1.0] {
                let xs = sign * x;
                // The arc of constant x runs inside the unit circle: parametrise by r.
                let pts: Vec<(f64, f64)> = (0..=400)
                    .map(|k| {
                        let r = (f64::from(k) / 40.0).powi(2);
                        let z = num_complex::Complex64::new(r, xs);
                        let g = (z - 1.0) / (z + 1.0);
                        (g.re, g.im)
                    })
                    .collect();
                chart
                    .draw_series(LineSeries::new(pts, MINOR.mix(1.0).stroke_width(HI)))
                    .map_err(perr)?;
                let z = num_complex::Complex64::new(0.0, xs);
                let g = (z - 1.0) / (z + 1.0);
                labels.reserve(
                    chart.backend_coord(&(g.re * 1.04, g.im * 1.04)),
                    &format!("+{x}j"),
                    14 * HI_I,
                );
                chart
                    .draw_series(std::iter::once(Text::new(
                        format!("{}{x}j", if sign < 0.0 { "−" } else { "+" }),
                        (g.re * 1.04, g.im * 1.04),
                        ("sans-serif", 14 * HI_I).into_font().color(&INK),
                    )))
                    .map_err(perr)?;
            }
        }
        chart
            .draw_series(LineSeries::new(
                circle(0.0, 0.0, 1.0),
                INK.stroke_width(2 * HI),
            ))
            .map_err(perr)?;
        if let Some(s) = input.vswr_circle.filter(|s| *s >= 1.0 && s.is_finite()) {
            let g = (s - 1.0) / (s + 1.0);
            chart
                .draw_series(LineSeries::new(
                    circle(0.0, 0.0, g),
                    MASK.stroke_width(2 * HI),
                ))
                .map_err(perr)?
                .label(format!("VSWR {}", tidy_label(format_eng(s, 3, ""))))
                .legend(|(x, y)| {
                    PathElement::new(vec![(x, y), (x + 18 * HI_I, y)], MASK.stroke_width(2 * HI))
                });
        }
        let pts: Vec<(f64, f64)> = input
            .gamma
            .iter()
            .map(|(_, g)| (g.re, g.im))
            .filter(|p| p.0.is_finite() && p.1.is_finite())
            .collect();
        chart
            .draw_series(LineSeries::new(pts, TRACE.stroke_width(2 * HI)))
            .map_err(perr)?
            .label("Γ")
            .legend(|(x, y)| {
                PathElement::new(vec![(x, y), (x + 18 * HI_I, y)], TRACE.stroke_width(2 * HI))
            });
        // Markers: the ends and each decade crossed.
        let mut marks: Vec<(f64, num_complex::Complex64)> = Vec::new();
        if let (Some(first), Some(last)) = (input.gamma.first(), input.gamma.last()) {
            marks.push(*first);
            for w in input.gamma.windows(2) {
                let (a, b) = (w[0].0.log10().floor(), w[1].0.log10().floor());
                if b > a && w[1].0 != last.0 {
                    marks.push(w[1]);
                }
            }
            marks.push(*last);
        }
        labels.avoid(
            input
                .gamma
                .iter()
                .filter(|(_, g)| g.re.is_finite() && g.im.is_finite())
                .map(|(_, g)| chart.backend_coord(&(g.re, g.im))),
        );
        let mut marked = Vec::new();
        for (f, g) in marks {
            let mark = EmptyElement::at((g.re, g.im)) + Circle::new((0, 0), 3 * HI, MARK.filled());
            chart.draw_series(std::iter::once(mark)).map_err(perr)?;
            marked.push((
                chart.backend_coord(&(g.re, g.im)),
                tidy_label(format_eng(f, 3, "Hz")),
                MARK,
            ));
        }
        labels.reserve_legend(true, 170.0, 60.0);
        labels.mark_all(&marked);
        labels.draw(&root, 760.0 - 60.0)?;
        legend(&mut chart, SeriesLabelPosition::UpperRight)?;
        root.present().map_err(perr)?;
    }
    Ok(scaled_down(svg))
}

/// What a Nyquist chart shows: a loop gain L(jω) over the sweep, with its margins.
#[derive(Clone, Debug)]
pub struct NyquistPlot<'a> {
    /// Title line.
    pub title: String,
    /// (frequency, L) ascending in frequency.
    pub loop_gain: &'a [(f64, num_complex::Complex64)],
    /// Gain crossover (Hz) and phase margin (degrees), where found.
    pub phase_margin: Option<(f64, f64)>,
    /// Phase crossover (Hz) and gain margin (dB), where found.
    pub gain_margin: Option<(f64, f64)>,
}

/// A ring's label: |L| as a power of ten ("|L| = 10⁴"), never an SI prefix standing alone.
fn ring_label(ring: f64) -> String {
    const SUP: [char; 10] = ['⁰', '¹', '²', '³', '⁴', '⁵', '⁶', '⁷', '⁸', '⁹'];
    let exp = ring.log10().round() as i64;
    if exp <= 3 {
        return format!("|L| = {}", ring.round());
    }
    let digits: String = exp
        .to_string()
        .chars()
        .filter_map(|c| c.to_digit(10).map(|d| SUP[d as usize]))
        .collect();
    format!("|L| = 10{digits}")
}

/// The radius a loop gain of magnitude ρ is drawn at: ρ itself up to 1, then 1 + log10 ρ,
/// so the unit circle and the −1 point keep their places and a trace that goes far out
/// (a loop gain of 10⁵ at low frequency) stays on the page.
pub fn nyquist_radius(rho: f64) -> f64 {
    if rho <= 1.0 {
        rho
    } else {
        1.0 + rho.log10()
    }
}

/// Renders a Nyquist chart of our own look: L(jω) for ω > 0 bold and its mirror for ω < 0
/// light, radius compressed beyond the unit circle (see [`nyquist_radius`], said in the
/// chart), the unit circle, the −1 point, the gain crossover with the phase margin and the
/// phase crossover with the gain margin marked.
pub fn render_nyquist_svg(input: &NyquistPlot<'_>) -> Result<String, PlotError> {
    let map = |l: num_complex::Complex64| {
        let r = nyquist_radius(l.norm());
        let a = l.arg();
        (r * a.cos(), r * a.sin())
    };
    let pts: Vec<(f64, f64)> = input
        .loop_gain
        .iter()
        .map(|(_, l)| map(*l))
        .filter(|p| p.0.is_finite() && p.1.is_finite())
        .collect();
    let extent = pts
        .iter()
        .fold(1.2f64, |m, p| m.max(p.0.abs()).max(p.1.abs()))
        * 1.08;
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (720 * HI, 760 * HI)).into_drawing_area();
        let body = titled(&root, &input.title)?;
        let mut chart = ChartBuilder::on(&body)
            .margin(16 * HI)
            .build_cartesian_2d(-extent..extent, -extent..extent)
            .map_err(perr)?;
        let mut labels = ChartLabels::new(chart.plotting_area().get_pixel_range());
        chart
            .draw_series(LineSeries::new(
                [(-extent, 0.0), (extent, 0.0)],
                DECADE.stroke_width(HI),
            ))
            .map_err(perr)?;
        chart
            .draw_series(LineSeries::new(
                [(0.0, -extent), (0.0, extent)],
                DECADE.stroke_width(HI),
            ))
            .map_err(perr)?;
        // Rings at |L| = 10, 100, … on the compressed scale.
        let mut ring = 10.0;
        while nyquist_radius(ring) < extent {
            let r = nyquist_radius(ring);
            labels.reserve(
                chart.backend_coord(&(r * 0.72, r * 0.72)),
                &ring_label(ring),
                14 * HI_I,
            );
            chart
                .draw_series(LineSeries::new(
                    circle_points(0.0, 0.0, r),
                    MINOR.stroke_width(HI),
                ))
                .map_err(perr)?;
            chart
                .draw_series(std::iter::once(Text::new(
                    ring_label(ring),
                    (r * 0.72, r * 0.72),
                    ("sans-serif", 14 * HI_I).into_font().color(&INK),
                )))
                .map_err(perr)?;
            ring *= 10.0;
        }
        chart
            .draw_series(LineSeries::new(
                circle_points(0.0, 0.0, 1.0),
                INK.stroke_width(HI),
            ))
            .map_err(perr)?
            .label("unit circle")
            .legend(|(x, y)| {
                PathElement::new(vec![(x, y), (x + 18 * HI_I, y)], INK.stroke_width(HI))
            });
        chart
            .draw_series(LineSeries::new(
                pts.iter().map(|p| (p.0, -p.1)),
                TRACE.mix(0.35).stroke_width(HI),
            ))
            .map_err(perr)?
            .label("ω < 0 (mirror)")
            .legend(|(x, y)| {
                PathElement::new(
                    vec![(x, y), (x + 18 * HI_I, y)],
                    TRACE.mix(0.35).stroke_width(HI),
                )
            });
        chart
            .draw_series(LineSeries::new(
                pts.iter().copied(),
                TRACE.stroke_width(2 * HI),
            ))
            .map_err(perr)?
            .label("L(jω), ω > 0")
            .legend(|(x, y)| {
                PathElement::new(vec![(x, y), (x + 18 * HI_I, y)], TRACE.stroke_width(2 * HI))
            });
        let minus_one = EmptyElement::at((-1.0, 0.0))
            + Cross::new((0, 0), 6 * HI_I, MASK.stroke_width(2 * HI))
            + Text::new(
                "−1",
                (6 * HI_I, 4 * HI_I),
                ("sans-serif", 16 * HI_I).into_font().color(&MASK),
            );
        chart
            .draw_series(std::iter::once(minus_one))
            .map_err(perr)?;
        let at = |f: f64| {
            input
                .loop_gain
                .iter()
                .min_by(|a, b| (a.0 / f).ln().abs().total_cmp(&(b.0 / f).ln().abs()))
                .map(|(_, l)| map(*l))
        };
        let mut marks: Vec<((f64, f64), String)> = Vec::new();
        if let Some((f, pm)) = input.phase_margin {
            if let Some(p) = at(f) {
                marks.push((
                    p,
                    format!(
                        "gain crossover {}, PM {pm:.1}°",
                        tidy_label(format_eng(f, 3, "Hz"))
                    ),
                ));
            }
        }
        if let Some((f, gm)) = input.gain_margin {
            if let Some(p) = at(f) {
                marks.push((
                    p,
                    format!(
                        "phase crossover {}, GM {gm:.1} dB",
                        tidy_label(format_eng(f, 3, "Hz"))
                    ),
                ));
            }
        }
        labels.reserve(chart.backend_coord(&(-1.0, 0.0)), "−1  ", 16 * HI_I);
        labels.reserve(
            chart.backend_coord(&(-extent * 0.97, -extent * 0.95)),
            "radius: |L| up to 1, 1 + log10|L| beyond (compressed)",
            14 * HI_I,
        );
        labels.avoid(pts.iter().map(|p| chart.backend_coord(p)));
        let mut marked = Vec::new();
        for (p, label) in marks {
            let mark = EmptyElement::at(p) + Circle::new((0, 0), 4 * HI, MARK.filled());
            chart.draw_series(std::iter::once(mark)).map_err(perr)?;
            marked.push((chart.backend_coord(&p), label, MARK));
        }
        labels.reserve_legend(false, 190.0, 75.0);
        labels.mark_all(&marked);
        labels.draw(&root, 760.0 - 40.0)?;
        chart
            .draw_series(std::iter::once(Text::new(
                "radius: |L| up to 1, 1 + log10|L| beyond (compressed)".to_string(),
                (-extent * 0.97, -extent * 0.95),
                ("sans-serif", 14 * HI_I).into_font().color(&INK),
            )))
            .map_err(perr)?;
        legend(&mut chart, SeriesLabelPosition::UpperLeft)?;
        root.present().map_err(perr)?;
    }
    Ok(scaled_down(svg))
}
