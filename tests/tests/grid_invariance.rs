//! A figure is a property of the network, not of the grid: on grids of 10, 100, 1,000 and
//! 20,000 points per decade over the same range, and on a 4-point list with the same ends,
//! every example design and every reference design gives the same figures to their
//! refinement tolerance, and none appears or disappears.

use analyzer_core::design;
use analyzer_core::metrics::{Figures, MetricOptions};
use analyzer_core::response::Analysis;
use analyzer_core::sweep::Grid;
use reference_suite::{figures, ladder_design};
use std::f64::consts::PI;
use std::path::Path;

fn close(a: f64, b: f64, rel: f64, what: &str, ctx: &str) {
    let ok = (a - b).abs() <= rel * a.abs().max(b.abs()).max(1e-300) || (a == b);
    assert!(ok, "{ctx}: {what} {a} vs {b}");
}

fn close_opt(a: Option<f64>, b: Option<f64>, rel: f64, what: &str, ctx: &str) {
    match (a, b) {
        (Some(x), Some(y)) => close(x, y, rel, what, ctx),
        (None, None) => {}
        _ => panic!("{ctx}: {what} {a:?} vs {b:?}"),
    }
}

/// Frequencies agree to 1e-9 relative (the refinements aim at 1e-12 in ln f); levels to
/// 1e-9 dB; Q to 1e-6 (it is a ratio of two refined frequencies' difference).
fn same(a: &Figures, b: &Figures, ctx: &str) {
    assert_eq!(a.class, b.class, "{ctx}: class");
    close_opt(a.dc_db, b.dc_db, 1e-9, "DC gain", ctx);
    close_opt(a.hf_db, b.hf_db, 1e-9, "HF gain", ctx);
    match (&a.reference, &b.reference) {
        (Some(x), Some(y)) => {
            assert_eq!(x.kind, y.kind, "{ctx}: reference kind");
            close(x.db, y.db, 1e-9, "reference", ctx);
            close_opt(x.hz, y.hz, 1e-9, "reference frequency", ctx);
        }
        (None, None) => {}
        _ => panic!("{ctx}: reference {:?} vs {:?}", a.reference, b.reference),
    }
    assert_eq!(
        a.crossings.len(),
        b.crossings.len(),
        "{ctx}: crossings {:?} vs {:?}",
        a.crossings,
        b.crossings
    );
    for (x, y) in a.crossings.iter().zip(&b.crossings) {
        close(x.freq_hz, y.freq_hz, 1e-9, "crossing", ctx);
    }
    close_opt(
        a.lower_cutoff_hz,
        b.lower_cutoff_hz,
        1e-9,
        "lower cut-off",
        ctx,
    );
    close_opt(
        a.upper_cutoff_hz,
        b.upper_cutoff_hz,
        1e-9,
        "upper cut-off",
        ctx,
    );
    close_opt(a.q, b.q, 1e-6, "Q", ctx);
    for (xs, ys, what) in [
        (&a.peaks, &b.peaks, "peak"),
        (&a.notches, &b.notches, "notch"),
    ] {
        assert_eq!(xs.len(), ys.len(), "{ctx}: {what}s {xs:?} vs {ys:?}");
        for (x, y) in xs.iter().zip(ys) {
            close(x.freq_hz, y.freq_hz, 1e-8, what, ctx);
            close(x.magnitude_db, y.magnitude_db, 1e-9, what, ctx);
            close(x.prominence_db, y.prominence_db, 1e-6, "prominence", ctx);
            close_opt(x.q, y.q, 1e-6, "peak Q", ctx);
        }
    }
    assert_eq!(
        a.resonances.len(),
        b.resonances.len(),
        "{ctx}: resonances {:?} vs {:?}",
        a.resonances,
        b.resonances
    );
    for (x, y) in a.resonances.iter().zip(&b.resonances) {
        assert_eq!(x.kind, y.kind, "{ctx}");
        close(x.freq_hz, y.freq_hz, 1e-9, "resonance", ctx);
        close(x.q, y.q, 1e-6, "resonance Q", ctx);
    }
    close_opt(a.group_delay_s, b.group_delay_s, 1e-9, "group delay", ctx);
    match (&a.margins, &b.margins) {
        (Some(x), Some(y)) => {
            close_opt(
                x.gain_crossover_hz,
                y.gain_crossover_hz,
                1e-9,
                "gain crossover",
                ctx,
            );
            close_opt(
                x.phase_margin_deg,
                y.phase_margin_deg,
                1e-7,
                "phase margin",
                ctx,
            );
            close_opt(
                x.phase_crossover_hz,
                y.phase_crossover_hz,
                1e-9,
                "phase crossover",
                ctx,
            );
        }
        (None, None) => {}
        _ => panic!("{ctx}: margins"),
    }
    assert_eq!(a.poles, b.poles, "{ctx}: poles");
    match (&a.noise, &b.noise) {
        (Some(x), Some(y)) => {
            close(x.rms, y.rms, 1e-9, "integrated noise", ctx);
            close(x.spot_density, y.spot_density, 1e-12, "spot noise", ctx);
        }
        (None, None) => {}
        _ => panic!("{ctx}: noise"),
    }
}

/// The grids: log at 10, 100, 1,000, 20,000 per decade and a 4-point list, all from `lo`
/// to `hi`.
fn grids(lo: f64, hi: f64) -> Vec<(String, Grid)> {
    let mut v: Vec<(String, Grid)> = [10.0, 100.0, 1000.0, 20000.0]
        .iter()
        .map(|&d| (format!("{d}/decade"), Grid::log(lo, hi, d).unwrap()))
        .collect();
    let r = hi / lo;
    v.push((
        "4-point list".into(),
        Grid::list(vec![lo, lo * r.powf(1.0 / 3.0), lo * r.powf(2.0 / 3.0), hi]).unwrap(),
    ));
    v
}

fn check(name: &str, a: &Analysis, lo: f64, hi: f64) {
    let gs = grids(lo, hi);
    for i in 0..a.responses().len() {
        let opts = MetricOptions::default();
        let reference = figures(a, &gs[2].1, i, &opts);
        for (g, grid) in &gs {
            let f = figures(a, grid, i, &opts);
            let ctx = format!("{name} {} on {g}", a.responses()[i].name);
            same(&f, &reference, &ctx);
        }
    }
}

#[test]
fn the_example_designs_give_the_same_figures_on_every_grid() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("../sweeps");
    let mut n = 0;
    for entry in std::fs::read_dir(dir).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().is_none_or(|e| e != "toml") {
            continue;
        }
        let d = design::parse(&std::fs::read_to_string(&path).unwrap()).unwrap();
        let (lo, hi) = d.sweep.grid().unwrap().bounds();
        let a = Analysis::new(d.network, d.responses).unwrap();
        check(&path.display().to_string(), &a, lo, hi);
        n += 1;
    }
    assert!(n >= 6);
}

#[test]
fn the_reference_designs_give_the_same_figures_on_every_grid() {
    // Butterworth (g_k = 2·sin((2k−1)π/2n)) and 0.5 dB Chebyshev ladders, a series RLC
    // band-pass and a crystal, each over a range that contains its figures.
    let bw: Vec<f64> = (1..=5)
        .map(|k| 2.0 * ((2 * k - 1) as f64 * PI / 10.0).sin())
        .collect();
    let a = reference_suite::analysis(&ladder_design("bw5", &bw, 50.0, 50.0, 1e3));
    check("Butterworth 5", &a, 10.0, 100e3);
    let a = reference_suite::analysis(&ladder_design(
        "cheby3",
        &[1.5963, 1.0967, 1.5963],
        50.0,
        50.0,
        1e3,
    ));
    check("Chebyshev 3", &a, 10.0, 100e3);
    let a = reference_suite::analysis(&reference_suite::crystal_design());
    check("crystal", &a, 3.16e6, 31.6e6);
    let a = reference_suite::analysis(&reference_suite::crystal_filter_design());
    check("crystal filter", &a, 3.16e6, 31.6e6);
}
