//! Figures refined on the live network, against closed forms and scipy.signal fixtures.

use analyzer_core::metrics::{self, MetricOptions, Reference, HALF_POWER_DB};
use analyzer_core::response::Analysis;
use analyzer_core::sweep::Grid;
use reference_suite::{analysis, chebyshev_g, fixture, ladder_design, rel};
use std::f64::consts::PI;

fn figures_of(a: &Analysis, grid: &Grid, i: usize, opts: &MetricOptions) -> metrics::Figures {
    reference_suite::figures(a, grid, i, opts)
}

fn series_rlc(r: f64, l: f64, c: f64) -> Analysis {
    analysis(&format!(
        r#"[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
L1 = {{ inductor = {l:e}, between = ["in", "m"] }}
C1 = {{ capacitor = {c:e}, between = ["m", "out"] }}
R1 = {{ resistor = {r:e}, between = ["out", "gnd"] }}
[responses]
band = {{ ratio = ["out", "in"] }}
z = {{ impedance = ["in", "gnd"] }}"#
    ))
}

#[test]
fn series_rlc_resonance_q_and_both_half_power_points() {
    // Closed forms: f0 = 1/(2π√(LC)), Q = (1/R)·√(L/C), and the band-pass −3 dB points
    // f0·(√(1 + 1/(4Q²)) ± 1/(2Q)).
    let (r, l, c) = (47.0, 10e-3, 22e-9);
    let a = series_rlc(r, l, c);
    let f0 = 1.0 / (2.0 * PI * (l * c).sqrt());
    let q = (l / c).sqrt() / r;
    let grid = Grid::log(100.0, 1e6, 20.0).unwrap();
    let band = figures_of(&a, &grid, 0, &MetricOptions::default());
    let root = (1.0 + 1.0 / (4.0 * q * q)).sqrt();
    let (lo, hi) = (f0 * (root - 0.5 / q), f0 * (root + 0.5 / q));
    assert!(rel(band.lower_cutoff_hz.unwrap(), lo) < 1e-9);
    assert!(rel(band.upper_cutoff_hz.unwrap(), hi) < 1e-9);
    assert!(rel(band.q.unwrap(), q) < 1e-9);
    assert!(rel(band.peaks[0].freq_hz, f0) < 1e-9);

    let z = figures_of(&a, &grid, 1, &MetricOptions::default());
    let res = &z.resonances[0];
    assert_eq!(res.kind, "series");
    assert!(rel(res.freq_hz, f0) < 1e-9);
    assert!(rel(res.magnitude, r) < 1e-9);
    assert!(rel(res.q_phase_slope, q) < 1e-9);
    assert!(rel(res.q_bandwidth.unwrap(), q) < 1e-9);
}

#[test]
fn parallel_tank_peaks_at_r_with_q_both_ways() {
    // Closed forms: |Z| maximum R at 1/(2π√(LC)), Q = R·√(C/L).
    let (r, l, c): (f64, f64, f64) = (10e3, 2.2e-3, 4.7e-9);
    let a = analysis(&format!(
        r#"[parts]
I1 = {{ current = "1m", between = ["gnd", "t"] }}
R1 = {{ resistor = {r:e}, between = ["t", "gnd"] }}
L1 = {{ inductor = {l:e}, between = ["t", "gnd"] }}
C1 = {{ capacitor = {c:e}, between = ["t", "gnd"] }}
[responses]
z = {{ impedance = ["t", "gnd"] }}"#
    ));
    let f0 = 1.0 / (2.0 * PI * (l * c).sqrt());
    let q = r * (c / l).sqrt();
    let grid = Grid::log(1e3, 1e6, 7.0).unwrap();
    let z = figures_of(&a, &grid, 0, &MetricOptions::default());
    let res = &z.resonances[0];
    assert_eq!(res.kind, "parallel");
    assert!(rel(res.freq_hz, f0) < 1e-9);
    assert!(rel(res.magnitude, r) < 1e-9);
    assert!(rel(res.q_phase_slope, q) < 1e-9);
    assert!(rel(res.q_bandwidth.unwrap(), q) < 1e-9);
    assert!(rel(z.peaks[0].freq_hz, f0) < 1e-9);
    assert!(rel(10f64.powf(z.peaks[0].magnitude_db / 20.0), r) < 1e-9);
}

fn butterworth5() -> Analysis {
    let g: Vec<f64> = (1..=5)
        .map(|k| 2.0 * ((2 * k - 1) as f64 * PI / 10.0).sin())
        .collect();
    analysis(&ladder_design("bw5", &g, 50.0, 50.0, 1e3))
}

#[test]
fn butterworth_is_half_power_exactly_at_its_design_cut_off() {
    // Published prototype (g_k = 2·sin((2k−1)π/2n)) at fc = 1 kHz: −3.0103 dB at fc.
    let a = butterworth5();
    let f = figures_of(
        &a,
        &Grid::log(10.0, 100e3, 10.0).unwrap(),
        0,
        &MetricOptions::default(),
    );
    assert!(rel(f.upper_cutoff_hz.unwrap(), 1e3) < 1e-9);
    assert!(f.lower_cutoff_hz.is_none());
}

#[test]
fn crossing_accuracy_does_not_depend_on_grid_density() {
    // The refinement re-solves the network: 5 and 500 points per decade agree to 1e-10.
    let a = butterworth5();
    let opts = MetricOptions {
        level_db: Some(-40.0),
        ..MetricOptions::default()
    };
    let coarse = figures_of(&a, &Grid::log(10.0, 100e3, 5.0).unwrap(), 0, &opts);
    let fine = figures_of(&a, &Grid::log(10.0, 100e3, 500.0).unwrap(), 0, &opts);
    let (c, f) = (
        coarse.upper_cutoff_hz.unwrap(),
        fine.upper_cutoff_hz.unwrap(),
    );
    assert!(rel(c, f) < 1e-10, "{c} vs {f}");
    // Closed form for −40 dB below the passband: (f/fc)^10 = 10^4 − 1.
    assert!(rel(f, 1e3 * (1e4f64 - 1.0).powf(0.1)) < 1e-9);
}

#[test]
fn chebyshev_prototype_matches_the_published_table() {
    // Tabulated 0.5 dB ripple, n = 3: 1.5963, 1.0967, 1.5963 (from memory of the standard
    // prototype tables).
    for (g, t) in chebyshev_g(3, 0.5).iter().zip([1.5963, 1.0967, 1.5963]) {
        assert!((g - t).abs() < 1e-4, "{g} vs {t}");
    }
}

#[test]
fn third_order_chebyshev_ripple_and_ripple_edge() {
    // Fixture: scipy.signal.cheby1(3, 0.5, 2π·1 kHz, analog=True). The equal-terminated
    // ladder carries the 1/2 divider. The ripple is 0.5 dB and the ripple band ends at 1 kHz.
    let a = analysis(&ladder_design(
        "cheby3",
        &chebyshev_g(3, 0.5),
        50.0,
        50.0,
        1e3,
    ));
    for row in fixture("chebyshev3_0p5db_1khz.csv") {
        let h = reference_suite::value(&a, 0, row[0]).norm();
        assert!(
            rel(h, 0.5 * row[1]) < 1e-9,
            "{} Hz: {h} vs {}",
            row[0],
            0.5 * row[1]
        );
    }
    let f = figures_of(
        &a,
        &Grid::log(10.0, 10e3, 50.0).unwrap(),
        0,
        &MetricOptions {
            level_db: Some(-0.5),
            reference: Reference::Peak,
        },
    );
    // The passband maximum is the divider's 1/2 (−6.0206 dB), reached at the ripple peak
    // (and at DC, for an odd order).
    assert!((f.reference.as_ref().unwrap().db - 20.0 * 0.5f64.log10()).abs() < 1e-9);
    assert!(rel(f.upper_cutoff_hz.unwrap(), 1e3) < 1e-9);
    let notch = &f.notches[0];
    assert!((notch.magnitude_db - (20.0 * 0.5f64.log10() - 0.5)).abs() < 1e-9);
}

#[test]
fn balanced_twin_t_notches_at_one_over_two_pi_rc() {
    // Published: the twin-T with R, R, 2C and C, C, R/2 has a null at f0 = 1/(2πRC).
    let (r, c) = (10e3, 10e-9);
    let a = analysis(
        &format!(
            r#"[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
Ra = {{ resistor = {r:e}, between = ["in", "p"] }}
Rb = {{ resistor = {r:e}, between = ["p", "out"] }}
Cp = {{ capacitor = {c2:e}, between = ["p", "gnd"] }}
Ca = {{ capacitor = {c:e}, between = ["in", "q"] }}
Cb = {{ capacitor = {c:e}, between = ["q", "out"] }}
Rq = {{ resistor = {rh:e}, between = ["q", "gnd"] }}
RL = {{ resistor = "10Meg", between = ["out", "gnd"] }}
[responses]
g = {{ ratio = ["out", "in"] }}
inverse = {{ ratio = ["in", "out"] }}"#,
            c2 = 2.0 * c,
            rh = r / 2.0
        )
        .replace("10Meg", "10M"),
    );
    let f0 = 1.0 / (2.0 * PI * r * c);
    let grid = Grid::log(10.0, 100e3, 20.0).unwrap();
    let f = figures_of(&a, &grid, 0, &MetricOptions::default());
    let notch = &f.notches[0];
    assert!(rel(notch.freq_hz, f0) < 1e-9, "{} vs {f0}", notch.freq_hz);
    assert!(notch.magnitude_db < -60.0);
    // Its inverse has a pole pair on the jω axis there, where its denominator vanishes:
    // the figures find an unbounded peak at f0 instead of refusing the response (with
    // these values a probe exactly at f0 finds the denominator exactly zero).
    let f = figures_of(&a, &grid, 1, &MetricOptions::default());
    let peak = &f.peaks[0];
    assert!(rel(peak.freq_hz, f0) < 1e-9, "{} vs {f0}", peak.freq_hz);
    assert!(peak.magnitude_db > 60.0);
}

/// A 1 kΩ, 1 µF low-pass driven from a voltage source; response 0 is its ratio.
const RC_LOW_PASS: &str = r#"[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
R1 = { resistor = "1k", between = ["in", "out"] }
C1 = { capacitor = "1u", between = ["out", "gnd"] }
[responses]
g = { ratio = ["out", "in"] }"#;

#[test]
fn rc_group_delay_is_rc_over_one_plus_omega_rc_squared() {
    // Closed form: H = 1/(1 + jωRC), τ = RC/(1 + (ωRC)²).
    let (r, c) = (1e3, 1e-6);
    let a = analysis(RC_LOW_PASS);
    for f in [1.0, 100.0, 159.154_943, 1e4] {
        let w = 2.0 * PI * f;
        let tau = reference_suite::at(&a, f)[0].group_delay();
        let expect = r * c / (1.0 + (w * r * c).powi(2));
        assert!(rel(tau, expect) < 1e-12, "{f} Hz");
    }
}

/// An all-pass has no passband to measure crossings from, but its group delay is reported, at
/// DC: the first-order op-amp all-pass H = (1 − sRC)/(1 + sRC) (R1 = R2, closed form) has
/// phase −2·atan(ωRC) and τ(0) = 2RC.
#[test]
fn an_all_pass_reports_its_group_delay_at_dc() {
    let (r, c) = (10e3, 15.9155e-9);
    let a = analysis(&format!(
        r#"[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
R1 = {{ resistor = "10k", between = ["in", "n"] }}
R2 = {{ resistor = "10k", between = ["n", "out"] }}
R3 = {{ resistor = {r:e}, between = ["in", "p"] }}
C1 = {{ capacitor = {c:e}, between = ["p", "gnd"] }}
U1 = {{ opamp = "ideal", noninverting = "p", inverting = "n", output = "out" }}
[responses]
g = {{ ratio = ["out", "in"] }}"#
    ));
    let grid = Grid::log(10.0, 1e5, 30.0).unwrap();
    let f = figures_of(&a, &grid, 0, &MetricOptions::default());
    assert_eq!(f.class, "all-pass");
    assert!(f.reference.is_none() && f.lower_cutoff_hz.is_none());
    assert_eq!(f.group_delay_hz, Some(0.0));
    let tau = f.group_delay_s.unwrap();
    assert!(rel(tau, 2.0 * r * c) < 1e-12, "{tau} vs {}", 2.0 * r * c);
}

/// A figure of one response never depends on another's failing: the input impedance of an
/// RC low-pass is infinite at DC (no current flows: a division by zero there), yet the
/// ratio's DC gain and its group delay are still taken at DC: 0 dB and τ(0) = RC (closed
/// form, H = 1/(1 + jωRC)), not at the grid's first point, where τ = RC/(1 + (ωRC)²) is
/// 1e-4 smaller.
#[test]
fn an_impedance_infinite_at_dc_leaves_the_ratio_figures_at_dc() {
    let (r, c) = (1e3, 1e-6);
    let a = analysis(&format!(
        "{RC_LOW_PASS}\nzin = {{ impedance = [\"in\", \"gnd\"] }}"
    ));
    let lo = 1e-2 / (2.0 * PI * r * c);
    let grid = Grid::log(lo, 1e5, 20.0).unwrap();
    let ev = a.evaluator().unwrap();
    let mut ws = ev.workspace();
    assert!(ev.at(&mut ws, 0.0, true).is_err(), "zin is finite at DC");
    let f = figures_of(&a, &grid, 0, &MetricOptions::default());
    assert_eq!(f.group_delay_hz, Some(0.0));
    let tau = f.group_delay_s.unwrap();
    assert!(rel(tau, r * c) < 1e-12, "{tau} vs {}", r * c);
    assert!(f.dc_db.unwrap().abs() < 1e-12, "{:?}", f.dc_db);
}

#[test]
fn two_pole_loop_has_its_closed_form_phase_margin() {
    // L(s) = K/((1 + s/ω1)(1 + s/ω2)): |L(jωc)| = 1 gives ωc² from
    // ωc⁴/(ω1²ω2²) + ωc²(1/ω1² + 1/ω2²) + 1 − K² = 0, and PM = 180° − atan(ωc/ω1) − atan(ωc/ω2).
    // Built from a gain stage and two buffered RC sections.
    let k: f64 = 1000.0;
    let (r1, c1, r2, c2): (f64, f64, f64, f64) = (10e3, 1.591_549_4e-6, 1e3, 1.591_549_4e-9);
    let a = analysis(&format!(
        r#"[parts]
Vt = {{ voltage = "1", between = ["t", "gnd"] }}
gain_stage = {{ vcvs = {k:e}, between = ["a", "gnd"], control = ["t", "gnd"] }}
R1 = {{ resistor = {r1:e}, between = ["a", "b"] }}
C1 = {{ capacitor = {c1:e}, between = ["b", "gnd"] }}
buffer = {{ vcvs = 1, between = ["c", "gnd"], control = ["b", "gnd"] }}
R2 = {{ resistor = {r2:e}, between = ["c", "d"] }}
C2 = {{ capacitor = {c2:e}, between = ["d", "gnd"] }}
[responses]
loop = {{ ratio = ["d", "t"], loop_gain = true }}"#
    ));
    let (w1, w2) = (1.0 / (r1 * c1), 1.0 / (r2 * c2));
    let (qa, qb, qc) = (
        1.0 / (w1 * w1 * w2 * w2),
        1.0 / (w1 * w1) + 1.0 / (w2 * w2),
        1.0 - k * k,
    );
    let wc = ((-qb + (qb * qb - 4.0 * qa * qc).sqrt()) / (2.0 * qa)).sqrt();
    let pm = 180.0 - (wc / w1).atan().to_degrees() - (wc / w2).atan().to_degrees();
    let f = figures_of(
        &a,
        &Grid::log(1.0, 1e8, 10.0).unwrap(),
        0,
        &MetricOptions::default(),
    );
    let m = f.margins.unwrap();
    assert!(rel(m.gain_crossover_hz.unwrap(), wc / (2.0 * PI)) < 1e-9);
    assert!((m.phase_margin_deg.unwrap() - pm).abs() < 1e-7);
    // Two poles never reach −180°: no phase crossover, no gain margin.
    assert!(m.phase_crossover_hz.is_none());
}

#[test]
fn half_power_constant_is_twenty_log_of_one_over_root_two() {
    // Common practice: 20·log10(1/√2).
    assert!((HALF_POWER_DB - 20.0 * (0.5f64.sqrt()).log10()).abs() < 1e-15);
}
