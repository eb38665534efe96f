//! Human table and JSON of the figures.

use analyzer_core::metrics::{Figures, LimitResult};
use analyzer_core::response::Analysis;
use analyzer_core::solve::SolverKind;
use analyzer_core::sweep::Grid;
use analyzer_core::units::format_eng;
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
        let _ = writeln!(s, "\n{} ({unit})", f.response);
        let mut row = |label: &str, value: String| {
            let _ = writeln!(s, "  {label:<18}{value}");
        };
        match f.reference_hz {
            Some(r) => row("reference", format!("{} at {}", db(f.reference_db), hz(r))),
            None => row("reference", "0 dB (absolute)".into()),
        }
        row("level", db(f.level_db));
        if f.crossings.is_empty() {
            row("crossings", "none in the sweep".into());
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
                format!("{} around {} · Q {:.4}", hz(b), hz(c), q),
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
        for p in &f.peaks {
            let q = p.q.map(|q| format!(" · Q {q:.4}")).unwrap_or_default();
            row(
                "peak",
                format!("{} at {}{q}", db(p.magnitude_db), hz(p.freq_hz)),
            );
        }
        for n in &f.notches {
            row(
                "notch",
                format!("{} at {}", db(n.magnitude_db), hz(n.freq_hz)),
            );
        }
        for r in &f.resonances {
            let qb = r
                .q_bandwidth
                .map(|q| format!(", Q {q:.4} from bandwidth"))
                .unwrap_or_default();
            let (of, what) = if f.unit == "S" {
                ("Y", " (admittance)")
            } else {
                ("Z", "")
            };
            row(
                "resonance",
                format!(
                    "{}{what} at {}: |{of}| {} · Q {:.4} from phase slope{qb}",
                    r.kind,
                    hz(r.freq_hz),
                    format_eng(r.magnitude, 5, f.unit),
                    r.q_phase_slope
                ),
            );
        }
        if let Some(d) = f.group_delay_s {
            let at = f
                .reference_hz
                .map(hz)
                .unwrap_or_else(|| "the first point".into());
            row("group delay", format!("{} at {at}", format_eng(d, 5, "s")));
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
