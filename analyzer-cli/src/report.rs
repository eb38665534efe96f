//! Human table and JSON of the figures.

use analyzer_core::metrics::{Figures, LimitResult};
use analyzer_core::response::Analysis;
use analyzer_core::solve::SolverKind;
use analyzer_core::sweep::Grid;
use analyzer_core::units::{format_eng, format_q};
use std::fmt::Write;
use std::time::Duration;

/// The safety caution printed for mains-connected, high-voltage or medical designs.
pub const CAUTION: &str =
    "caution: this design names a mains-connected, high-voltage or medical use. \
A frequency-response simulation is no substitute for safety testing of the built unit; \
local codes, the applicable safety standards and licensed practice decide.";

fn hz(f: f64) -> String {
    format_eng(f, 5, "Hz")
}

fn db(v: f64) -> String {
    if v.is_finite() {
        // No "-0.00 dB" for a value that rounds to zero.
        let v = if v.abs() < 0.005 { 0.0 } else { v };
        format!("{v:.2} dB")
    } else {
        format!("{v} dB")
    }
}

/// The aligned table printed after a sweep.
pub fn table(
    a: &Analysis,
    grid: &Grid,
    figures: &[Figures],
    checks: &[LimitResult],
    caution: bool,
    took: Duration,
    solver: SolverKind,
) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "{}", a.network().title);
    let _ = writeln!(
        s,
        "sweep {} · {} unknowns · {:?} solver · solved in {:.1} ms",
        grid.describe(),
        a.system().n,
        solver,
        took.as_secs_f64() * 1e3
    );
    for f in figures {
        let unit = if f.unit.is_empty() {
            "ratio".to_string()
        } else {
            f.unit.to_string()
        };
        let _ = writeln!(s, "\n{} ({unit}, {})", f.response, f.class);
        let mut row = |label: &str, value: String| {
            let _ = writeln!(s, "  {label:<18}{value}");
        };
        let in_unit = |x: f64| format_eng(x, 5, f.unit);
        match (&f.reference, f.level_db) {
            (Some(r), Some(level)) => {
                let at = match (r.kind, r.hz) {
                    ("dc", _) => "the DC gain".to_string(),
                    ("hf", _) => "the high-frequency gain".to_string(),
                    ("absolute", _) => "absolute".to_string(),
                    (_, Some(h)) => format!("at {}", hz(h)),
                    _ => String::new(),
                };
                row("reference", format!("{} ({at}; {})", db(r.db), r.why));
                if let Some(u) = &f.upper_reference {
                    row("upper reference", format!("{} ({})", db(u.db), u.why));
                }
                row(
                    "level",
                    format!(
                        "{} below the reference",
                        db(level - r.db).trim_start_matches('-')
                    ),
                );
                if f.crossings.is_empty() {
                    row("crossings", "none in the sweep".into());
                }
            }
            _ => {
                if let Some(n) = &f.noise {
                    let referred = if f.unit.is_empty() { "" } else { " rms" };
                    row(
                        "integrated",
                        format!(
                            "{}{referred} over {} … {} (estimated error {:.0e})",
                            format_eng(n.rms, 5, "V"),
                            hz(n.band_hz.0),
                            hz(n.band_hz.1),
                            n.relative_error
                        ),
                    );
                    row(
                        "density",
                        format!(
                            "{}/√Hz at {}",
                            format_eng(n.spot_density, 5, "V"),
                            hz(n.spot_hz)
                        ),
                    );
                    let top: Vec<String> = n
                        .contributors
                        .iter()
                        .take(6)
                        .map(|(name, share)| format!("{name} {share:.1} %"))
                        .collect();
                    if !top.is_empty() {
                        row("contributors", top.join(", "));
                    }
                    if let (Some(nf), Some(spot)) = (n.noise_figure_db, n.spot_noise_figure_db) {
                        row(
                            "noise figure",
                            format!(
                                "{nf:.2} dB over the band, {spot:.2} dB at {} (IEEE: source at 290 K)",
                                hz(n.spot_hz)
                            ),
                        );
                    }
                } else if f.unit.is_empty() && f.margins.is_none() {
                    row(
                        "reference",
                        "none: the response has no passband (give --reference to measure crossings)".into(),
                    );
                }
            }
        }
        let level = |d: f64| {
            if f.unit.is_empty() {
                db(d)
            } else {
                in_unit(10f64.powf(d / 20.0))
            }
        };
        if let Some(d) = f.dc_db {
            row("at 0 Hz", level(d));
        }
        if let Some(h) = f.hf_db {
            row("as f → ∞", level(h));
        }
        if let Some(l) = f.lower_cutoff_hz {
            row("lower cut-off", hz(l));
        }
        if let Some(u) = f.upper_cutoff_hz {
            row("upper cut-off", hz(u));
        }
        if let (Some(b), Some(c), Some(q)) = (f.bandwidth_hz, f.centre_hz, f.q) {
            row(
                "bandwidth",
                format!("{} around {} · Q {}", hz(b), hz(c), format_q(q, 4)),
            );
        }
        let others: Vec<String> = f
            .crossings
            .iter()
            .filter(|c| {
                Some(c.freq_hz) != f.lower_cutoff_hz && Some(c.freq_hz) != f.upper_cutoff_hz
            })
            .map(|c| hz(c.freq_hz))
            .collect();
        if !others.is_empty() {
            row("other crossings", others.join(", "));
        }
        let magnitude = |x: &analyzer_core::metrics::Extremum| {
            if f.unit.is_empty() {
                db(x.magnitude_db)
            } else {
                in_unit(x.magnitude)
            }
        };
        for p in &f.peaks {
            let q =
                p.q.map(|q| format!(" · Q {}", format_q(q, 4)))
                    .unwrap_or_default();
            let label = if f.unit.is_empty() { "peak" } else { "maximum" };
            row(label, format!("{} at {}{q}", magnitude(p), hz(p.freq_hz)));
        }
        for n in &f.notches {
            let label = if f.unit.is_empty() {
                "notch"
            } else {
                "minimum"
            };
            row(label, format!("{} at {}", magnitude(n), hz(n.freq_hz)));
        }
        for r in &f.resonances {
            let of = if f.unit == "S" { "Y" } else { "Z" };
            row(
                "resonance",
                format!(
                    "{} at {}: |{of}| {} · Q {} ({})",
                    r.kind,
                    hz(r.freq_hz),
                    in_unit(r.magnitude),
                    format_q(r.q, 4),
                    r.q_definition
                ),
            );
        }
        for p in &f.poles.rows {
            let flag = match (p.what, p.right_half_plane) {
                ("pole", true) => " (unstable: right half-plane)",
                ("zero", true) => " (right half-plane)",
                _ => "",
            };
            let text = if p.origin {
                "at the origin (0 Hz)".to_string()
            } else if p.pair {
                match p.q {
                    Some(q) if q.is_finite() && !p.on_axis => {
                        format!("pair f0 {} · Q {}{flag}", hz(p.f0_hz), format_q(q, 4))
                    }
                    _ => format!("pair f0 {} on the jω axis", hz(p.f0_hz)),
                }
            } else {
                format!("real, corner {}{flag}", hz(p.f0_hz))
            };
            row(p.what, text);
        }
        if f.poles.cancelled > 0 {
            row(
                "cancelled",
                format!(
                    "{} pole–zero pair(s) the response cannot see",
                    f.poles.cancelled
                ),
            );
        }
        if let Some(note) = &f.poles.note {
            row("poles", note.clone());
        }
        if let (Some(d), Some(at)) = (f.group_delay_s, f.group_delay_hz) {
            row(
                "group delay",
                format!("{} at {}", format_eng(d, 5, "s"), hz(at)),
            );
        }
        if let Some(m) = &f.margins {
            match (m.gain_crossover_hz, m.phase_margin_deg) {
                (Some(fc), Some(pm)) => row(
                    "phase margin",
                    format!("{pm:.2}° at {} (gain crossover)", hz(fc)),
                ),
                _ => row("phase margin", "no gain crossover in the sweep".into()),
            }
            match (m.phase_crossover_hz, m.gain_margin_db) {
                (Some(fp), Some(gm)) => row(
                    "gain margin",
                    format!("{} at {} (phase crossover)", db(gm), hz(fp)),
                ),
                _ => row("gain margin", "no phase crossover in the sweep".into()),
            }
        }
    }
    if !checks.is_empty() {
        let _ = writeln!(s, "\nlimits");
        for c in checks {
            let l = &c.limit;
            let bounds = match (l.min_db, l.max_db) {
                (Some(a), Some(b)) => format!("{a} … {b} dB"),
                (Some(a), None) => format!("≥ {a} dB"),
                (None, Some(b)) => format!("≤ {b} dB"),
                (None, None) => String::new(),
            };
            let _ = writeln!(
                s,
                "  {:<18}{} {} over {} … {}: {}, worst margin {} at {}",
                l.name,
                l.response,
                bounds,
                hz(l.from),
                hz(l.to),
                if c.pass { "pass" } else { "FAIL" },
                db(c.worst_margin_db),
                hz(c.worst_at_hz)
            );
        }
    }
    if caution {
        let _ = writeln!(s, "\n{CAUTION}");
    }
    s
}

/// The figures as JSON.
pub fn json(
    a: &Analysis,
    grid: &Grid,
    figures: &[Figures],
    checks: &[LimitResult],
    caution: bool,
) -> String {
    let (from, to) = grid.bounds();
    let v = serde_json::json!({
        "title": a.network().title,
        "sweep": { "from_hz": from, "to_hz": to, "points": grid.len() },
        "unknowns": a.system().n,
        "caution": if caution { Some(CAUTION) } else { None },
        "responses": figures,
        "limits": checks,
    });
    serde_json::to_string_pretty(&v).unwrap_or_else(|e| format!("{{\"error\": \"{e}\"}}"))
}
