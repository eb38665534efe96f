//! Filters with published answers: closed forms, prototype tables, scipy.signal fixtures.

use analyzer_core::sweep::Grid;
use reference_suite::{analysis, fixture, ladder_design, rel, run, value};
use std::f64::consts::PI;

#[test]
fn rc_low_pass_is_half_power_and_minus_45_degrees_at_its_corner() {
    // Closed form: H = 1/(1 + jωRC); at f = 1/(2πRC) |H| = 1/√2 (−3.0103 dB), ∠H = −45°.
    let a = analysis(
        r#"[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
R1 = { resistor = "4k7", between = ["in", "out"] }
C1 = { capacitor = "33n", between = ["out", "gnd"] }
[responses]
g = { ratio = ["out", "in"] }"#,
    );
    let fc = 1.0 / (2.0 * PI * 4.7e3 * 33e-9);
    let h = value(&a, 0, fc);
    assert!((20.0 * h.norm().log10() - (-3.010_299_956_639_812)).abs() < 1e-12);
    assert!((h.arg().to_degrees() + 45.0).abs() < 1e-10);
}

const G5: [f64; 5] = [0.618_034, 1.618_034, 2.0, 1.618_034, 0.618_034];

fn butterworth_g(n: usize) -> Vec<f64> {
    // Published prototype values for a maximally flat ladder with equal terminations:
    // g_k = 2·sin((2k−1)π/(2n)).
    (1..=n)
        .map(|k| 2.0 * ((2 * k - 1) as f64 * PI / (2 * n) as f64).sin())
        .collect()
}

#[test]
fn butterworth_prototype_values_match_the_table() {
    // The closed form against the tabulated values (n = 5, to 6 digits; from memory of the
    // standard prototype tables: 0.6180, 1.6180, 2.0000, 1.6180, 0.6180).
    for (g, t) in butterworth_g(5).iter().zip(G5) {
        assert!((g - t).abs() < 1e-6);
    }
}

/// The fifth-order ladder at 1 kHz with 50 Ω terminations, as a design file.
fn butterworth5_1khz() -> analyzer_core::response::Analysis {
    analysis(&ladder_design(
        "butterworth 5",
        &butterworth_g(5),
        50.0,
        50.0,
        1e3,
    ))
}

#[test]
fn fifth_order_butterworth_ladder_matches_scipy_over_three_decades() {
    // Fixture: scipy.signal.butter(5, 2π·1 kHz, analog=True), |H| over 31.6 Hz … 31.6 kHz.
    // The doubly terminated ladder adds the 1/2 divider of its equal terminations.
    let a = butterworth5_1khz();
    for row in fixture("butterworth5_1khz.csv") {
        let (f, mag) = (row[0], row[1]);
        let h = value(&a, 0, f).norm();
        assert!(rel(h, 0.5 * mag) < 1e-9, "{f} Hz: {h} vs {}", 0.5 * mag);
        // And the closed form 1/√(1 + (f/fc)^10).
        let closed = 0.5 / (1.0 + (f / 1e3).powi(10)).sqrt();
        assert!(rel(h, closed) < 1e-9);
    }
}

#[test]
fn butterworth_group_delay_matches_the_analytic_derivative() {
    // Fixture: τ = −dφ/dω from the scipy.signal.butter polynomials, differentiated exactly.
    let a = butterworth5_1khz();
    let rows = fixture("butterworth5_1khz.csv");
    let grid = Grid::list(rows.iter().map(|r| r[0]).collect()).unwrap();
    let s = run(&a, &grid, true);
    let delays = &s.delays.as_ref().unwrap()[0];
    for (row, d) in rows.iter().zip(delays) {
        assert!(rel(*d, row[2]) < 1e-8, "{} Hz: {d} vs {}", row[0], row[2]);
    }
}

#[test]
fn unity_gain_sallen_key_has_its_published_natural_frequency_and_q() {
    // Published: f0 = 1/(2π√(R1R2C1C2)), Q = √(R1R2C1C2)/(C2(R1 + R2)) for the unity-gain
    // low-pass with C1 in the feedback path; at f0 the phase is exactly −90° and |H| = Q.
    let (r1, r2, c1, c2): (f64, f64, f64, f64) = (12e3, 27e3, 10e-9, 2.2e-9);
    let a = analysis(&format!(
        r#"[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
R1 = {{ resistor = {r1:e}, between = ["in", "x"] }}
R2 = {{ resistor = {r2:e}, between = ["x", "y"] }}
C1 = {{ capacitor = {c1:e}, between = ["x", "out"] }}
C2 = {{ capacitor = {c2:e}, between = ["y", "gnd"] }}
U1 = {{ opamp = "ideal", noninverting = "y", inverting = "out", output = "out" }}
[responses]
g = {{ ratio = ["out", "in"] }}"#
    ));
    let f0 = 1.0 / (2.0 * PI * (r1 * r2 * c1 * c2).sqrt());
    let q = (r1 * r2 * c1 * c2).sqrt() / (c2 * (r1 + r2));
    let h = value(&a, 0, f0);
    assert!((h.arg().to_degrees() + 90.0).abs() < 1e-9);
    assert!(rel(h.norm(), q) < 1e-12);
}
