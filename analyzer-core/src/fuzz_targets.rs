//! Bodies of the fuzz targets, shared by `fuzz/` (cargo fuzz) and the deterministic smoke run
//! in the tests. Each takes arbitrary bytes and must return without panicking, whatever
//! they hold.

use crate::design;
use crate::metrics::{self, MetricOptions};
use crate::response::Analysis;
use crate::sweep::{self, Grid, SweepOptions};
use crate::units::{parse_value, Quantity};

const QUANTITIES: [Quantity; 10] = [
    Quantity::Resistance,
    Quantity::Capacitance,
    Quantity::Inductance,
    Quantity::Frequency,
    Quantity::Voltage,
    Quantity::Current,
    Quantity::Conductance,
    Quantity::Ratio,
    Quantity::Angle,
    Quantity::Percent,
];

/// The value parser on arbitrary text, as every quantity. A value read back must be finite
/// and within the documented range.
pub fn value(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    for q in QUANTITIES {
        if let Ok(v) = parse_value(text, q) {
            assert!(v.is_finite(), "{text:?} gave {v}");
            assert!(v.abs() <= crate::units::VALUE_LIMIT);
        }
    }
}

/// The design parser on arbitrary text; when it accepts, the whole pipeline runs (assembly,
/// a sweep of at most 64 points, figures) and must end in a result or an error.
pub fn design(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let Ok(d) = design::parse(text) else {
        return;
    };
    let Ok(analysis) = Analysis::new(d.network, d.responses) else {
        return;
    };
    let Ok(ev) = analysis.evaluator() else {
        return;
    };
    let grid = match d.sweep.grid() {
        Ok(g) if g.len() <= 64 => g,
        Ok(g) => {
            let (a, b) = g.bounds();
            match Grid::linear(a, b, 16) {
                Ok(g) => g,
                Err(_) => return,
            }
        }
        Err(_) => match Grid::log(10.0, 1e5, 5.0) {
            Ok(g) => g,
            Err(_) => return,
        },
    };
    let opts = SweepOptions {
        derivatives: true,
        sequential: true,
    };
    let Ok(s) = sweep::run(&ev, &grid, &opts) else {
        return;
    };
    for i in 0..analysis.responses().len() {
        let delays = s.delays.as_ref().map(|d| d[i].as_slice());
        let trace = metrics::Trace::from_values(&s.values[i], delays);
        let pz = crate::poles::pole_zero(&analysis, i, None).ok();
        let _ = metrics::figures(
            &ev,
            &grid,
            &trace,
            i,
            &MetricOptions::default(),
            pz.as_ref(),
            None,
        );
    }
}

/// The design file's TOML tree rendered canonically (for the cross-check against a
/// reference TOML library): tables as `{key=value,…}` in key order, arrays as `[…]`,
/// strings quoted with Rust's escapes, numbers as Rust prints them; or the error message.
pub fn toml_tree(text: &str) -> Result<String, String> {
    crate::design::render_tree(text)
}
