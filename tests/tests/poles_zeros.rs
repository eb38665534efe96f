//! Poles and zeros from the pencil, and the figures that rest on them, against closed forms,
//! published tables and scipy.signal fixtures (written by `tests/reference/make_fixtures.py`).

use analyzer_core::metrics::{MetricOptions, Reference};
use analyzer_core::poles::{natural_frequencies, pole_zero, PoleZero};
use analyzer_core::response::Analysis;
use analyzer_core::sweep::Grid;
use num_complex::Complex64;
use reference_suite::{analysis, chebyshev_g, figures, ladder_design, rel, CRYSTAL};
use std::f64::consts::PI;

const WC: f64 = 2.0 * PI * 1000.0;

fn pz(a: &Analysis, i: usize, f_centre: f64) -> PoleZero {
    pole_zero(a, i, Some(2.0 * PI * f_centre)).unwrap()
}

/// Every expected root is matched by a distinct computed one within `tol` (relative to the
/// root's magnitude), and there are as many of each.
fn same_roots(got: &[Complex64], want: &[Complex64], tol: f64, what: &str) {
    assert_eq!(got.len(), want.len(), "{what}: {got:?} vs {want:?}");
    let mut left: Vec<Complex64> = got.to_vec();
    for w in want {
        let (k, d) = left
            .iter()
            .enumerate()
            .map(|(k, g)| (k, (g - w).norm()))
            .min_by(|a, b| a.1.total_cmp(&b.1))
            .unwrap();
        assert!(
            d <= tol * w.norm().max(1.0),
            "{what}: {w} not found (nearest {} off) in {got:?}",
            d
        );
        left.remove(k);
    }
}

/// Roots from a fixture, scaled by `scale` (rad/s per unit).
fn fixture_roots(name: &str, what: &str, scale: f64) -> Vec<Complex64> {
    let path = format!("{}/fixtures/{name}", env!("CARGO_MANIFEST_DIR"));
    std::fs::read_to_string(&path)
        .unwrap()
        .lines()
        .filter(|l| !l.starts_with('#'))
        .skip(1)
        .filter_map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            (f[0] == what).then(|| {
                Complex64::new(f[1].parse::<f64>().unwrap(), f[2].parse::<f64>().unwrap()) * scale
            })
        })
        .collect()
}

#[test]
fn butterworth_poles_lie_on_a_circle_at_the_published_angles() {
    // Closed form: s_k = ωc·exp(jπ(2k + n − 1)/2n), k = 1..n; and scipy.signal.butter.
    let n = 5;
    let g: Vec<f64> = (1..=n)
        .map(|k| 2.0 * ((2 * k - 1) as f64 * PI / (2 * n) as f64).sin())
        .collect();
    let a = analysis(&ladder_design("bw5", &g, 50.0, 50.0, 1e3));
    let p = pz(&a, 0, 1e3);
    let closed: Vec<Complex64> = (1..=n)
        .map(|k| Complex64::from_polar(WC, PI * (2 * k + n - 1) as f64 / (2 * n) as f64))
        .collect();
    same_roots(&p.poles, &closed, 1e-12, "Butterworth poles");
    same_roots(
        &p.poles,
        &fixture_roots("butterworth5_1khz_roots.csv", "pole", 1.0),
        1e-12,
        "scipy butter",
    );
    assert!(p.zeros.is_empty(), "{:?}", p.zeros);
    // The pair table: Q of the pair at angle θ from the negative real axis is 1/(2 cos θ).
    let rows = p.rows();
    let mut qs: Vec<f64> = rows.iter().filter_map(|r| r.q).collect();
    qs.sort_by(f64::total_cmp);
    let mut want: Vec<f64> = [1usize, 2]
        .iter()
        .map(|&k| 1.0 / (2.0 * (PI * (2 * k - 1) as f64 / (2 * n) as f64).sin()))
        .collect();
    want.sort_by(f64::total_cmp);
    assert_eq!(qs.len(), 2);
    for (q, w) in qs.iter().zip(&want) {
        assert!(rel(*q, *w) < 1e-12, "{q} vs {w}");
    }
}

#[test]
fn chebyshev_poles_follow_the_sinh_cosh_formula() {
    // Closed form: ε = √(10^(r/10) − 1), v = asinh(1/ε)/n, θ_k = (2k − 1)π/2n,
    // s_k = ωc·(−sinh v·sin θ_k + j·cosh v·cos θ_k); and scipy.signal.cheby1.
    let (n, ripple) = (3, 0.5);
    let a = analysis(&ladder_design(
        "cheby3",
        &chebyshev_g(n, ripple),
        50.0,
        50.0,
        1e3,
    ));
    let p = pz(&a, 0, 1e3);
    let eps = (10f64.powf(ripple / 10.0) - 1.0).sqrt();
    let v = (1.0 / eps).asinh() / n as f64;
    let closed: Vec<Complex64> = (1..=n)
        .map(|k| {
            let t = (2 * k - 1) as f64 * PI / (2 * n) as f64;
            Complex64::new(-v.sinh() * t.sin(), v.cosh() * t.cos()) * WC
        })
        .collect();
    same_roots(&p.poles, &closed, 1e-11, "Chebyshev poles");
    same_roots(
        &p.poles,
        &fixture_roots("chebyshev3_0p5db_1khz_roots.csv", "pole", 1.0),
        1e-11,
        "scipy cheby1",
    );
}

/// A cascade of buffered sections with the given poles (rad/s): a unity-gain Sallen–Key
/// low-pass per pair (R1 = R2 = R, C1 = 2Q/(ω0·R) in the feedback, C2 = 1/(2Q·ω0·R) to
/// ground: ω0 = 1/(R√(C1C2)), Q = √(C1/C2)/2, the published equal-resistor design) and an RC
/// with a follower per real pole.
fn active_cascade(poles: &[Complex64]) -> String {
    let r = 10e3;
    let mut s = String::from("[parts]\nV1 = { voltage = \"1\", between = [\"n0\", \"gnd\"] }\n");
    let mut k = 0;
    for p in poles.iter().filter(|p| p.im >= 0.0) {
        let (a, b) = (format!("n{k}"), format!("n{}", k + 1));
        if p.im > 0.0 {
            let w0 = p.norm();
            let q = w0 / (2.0 * p.re.abs());
            let (c1, c2) = (2.0 * q / (w0 * r), 1.0 / (2.0 * q * w0 * r));
            s += &format!(
                "Ra{k} = {{ resistor = {r:e}, between = [\"{a}\", \"x{k}\"] }}\n\
Rb{k} = {{ resistor = {r:e}, between = [\"x{k}\", \"y{k}\"] }}\n\
Cf{k} = {{ capacitor = {c1:e}, between = [\"x{k}\", \"{b}\"] }}\n\
Cg{k} = {{ capacitor = {c2:e}, between = [\"y{k}\", \"gnd\"] }}\n\
U{k} = {{ opamp = \"ideal\", noninverting = \"y{k}\", inverting = \"{b}\", output = \"{b}\" }}\n"
            );
        } else {
            let c = 1.0 / (p.re.abs() * r);
            s += &format!(
                "Ra{k} = {{ resistor = {r:e}, between = [\"{a}\", \"x{k}\"] }}\n\
Cg{k} = {{ capacitor = {c:e}, between = [\"x{k}\", \"gnd\"] }}\n\
U{k} = {{ opamp = \"ideal\", noninverting = \"x{k}\", inverting = \"{b}\", output = \"{b}\" }}\n"
            );
        }
        k += 1;
    }
    s += &format!("[responses]\ngain = {{ ratio = [\"n{k}\", \"n0\"] }}\n");
    s
}

#[test]
fn bessel_poles_match_the_published_table_in_active_sections() {
    // scipy.signal.bessel(n, 1, norm='delay'), scaled to 1 ms of delay (×1000 rad/s). From
    // memory of the published normalised tables (delay 1 s): n = 2: −1.5 ± 0.8660j;
    // n = 3: −2.3222, −1.8389 ± 1.7544j; n = 4: −2.8962 ± 0.8672j, −2.1038 ± 2.6574j;
    // n = 5: −3.6467, −3.3520 ± 1.7427j, −2.3247 ± 3.5710j.
    let table: [&[(f64, f64)]; 4] = [
        &[(-1.5, 0.8660)],
        &[(-2.3222, 0.0), (-1.8389, 1.7544)],
        &[(-2.8962, 0.8672), (-2.1038, 2.6574)],
        &[(-3.6467, 0.0), (-3.3520, 1.7427), (-2.3247, 3.5710)],
    ];
    for (n, memory) in (2..=5).zip(table) {
        let want = fixture_roots(&format!("bessel{n}_delay_roots.csv"), "pole", 1000.0);
        for &(re, im) in memory {
            let m = Complex64::new(re, im) * 1000.0;
            assert!(
                want.iter().any(|w| (w - m).norm() < 1e-4 * m.norm()),
                "n = {n}: {m}"
            );
        }
        let a = analysis(&active_cascade(&want));
        let p = pz(&a, 0, 300.0);
        same_roots(&p.poles, &want, 1e-10, &format!("Bessel {n}"));
        assert!(p.zeros.is_empty());
    }
}

#[test]
fn sallen_key_pole_pair_has_its_closed_form_f0_and_q() {
    // Unity-gain Sallen–Key low-pass (published): ω0 = 1/√(R1R2C1C2),
    // Q = √(R1R2C1C2)/(C2(R1 + R2)), C1 in the feedback, C2 to ground.
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
gain = {{ ratio = ["out", "in"] }}"#
    ));
    let rows = pz(&a, 0, 1e3).rows();
    let pair = rows.iter().find(|r| r.pair).unwrap();
    let f0 = 1.0 / (2.0 * PI * (r1 * r2 * c1 * c2).sqrt());
    let q = (r1 * r2 * c1 * c2).sqrt() / (c2 * (r1 + r2));
    assert!(rel(pair.f0_hz, f0) < 1e-12, "{} vs {f0}", pair.f0_hz);
    assert!(rel(pair.q.unwrap(), q) < 1e-12);
    assert_eq!(rows.len(), 1);
}

#[test]
fn twin_t_zeros_sit_on_the_imaginary_axis_at_one_over_rc() {
    // Published: the balanced twin-T (R, R, 2C / C, C, R/2) has zeros at s = ±j/RC.
    let (r, c) = (16e3, 10e-9);
    let a = analysis(&format!(
        r#"[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
Ra = {{ resistor = {r:e}, between = ["in", "p"] }}
Rb = {{ resistor = {r:e}, between = ["p", "out"] }}
Cp = {{ capacitor = {c2:e}, between = ["p", "gnd"] }}
Ca = {{ capacitor = {c:e}, between = ["in", "q"] }}
Cb = {{ capacitor = {c:e}, between = ["q", "out"] }}
Rq = {{ resistor = {rh:e}, between = ["q", "gnd"] }}
RL = {{ resistor = "10M", between = ["out", "gnd"] }}
[responses]
g = {{ ratio = ["out", "in"] }}"#,
        c2 = 2.0 * c,
        rh = r / 2.0
    ));
    let p = pz(&a, 0, 1e3);
    let w0 = 1.0 / (r * c);
    let on_axis: Vec<&Complex64> = p.zeros.iter().filter(|z| z.im != 0.0).collect();
    assert_eq!(on_axis.len(), 2, "{:?}", p.zeros);
    for z in on_axis {
        assert!(rel(z.im.abs(), w0) < 1e-10, "{z}");
        assert!(z.re.abs() < 1e-9 * w0, "{z}");
    }
}

/// The crystal's series and parallel resonances in closed form: the zeros of its impedance
/// at 1/(2π√(L1C1)) and its poles at 1/(2π√(L1·C1C0/(C1 + C0))).
fn crystal_closed_forms() -> (f64, f64) {
    let (_, l1, c1, c0) = CRYSTAL;
    (
        1.0 / (2.0 * PI * (l1 * c1).sqrt()),
        1.0 / (2.0 * PI * (l1 * c1 * c0 / (c1 + c0)).sqrt()),
    )
}

/// The zero-phase frequencies of the crystal's impedance from its closed-form admittance
/// Y = 1/(R1 + jX) + jωC0, X = ωL1 − 1/(ωC1): Im Y = 0 ⇔ ωC0(R1² + X²) − X = 0, solved by
/// bisection on each side of the series resonance's reactance zero.
fn crystal_zero_phase() -> (f64, f64) {
    let (r1, l1, c1, c0) = CRYSTAL;
    let g = |f: f64| {
        let w = 2.0 * PI * f;
        let x = w * l1 - 1.0 / (w * c1);
        w * c0 * (r1 * r1 + x * x) - x
    };
    let bisect = |mut a: f64, mut b: f64| {
        for _ in 0..200 {
            let m = 0.5 * (a + b);
            if (g(a) > 0.0) == (g(m) > 0.0) {
                a = m;
            } else {
                b = m;
            }
        }
        0.5 * (a + b)
    };
    let (fs, fp) = crystal_closed_forms();
    let mid = 0.5 * (fs + fp);
    (bisect(fs * 0.999, mid), bisect(mid, fp * 1.001))
}

#[test]
fn crystal_resonances_are_found_between_coarse_grid_points() {
    let a = analysis(&reference_suite::crystal_design());
    let (fs, fp) = crystal_closed_forms();
    let p = pz(&a, 0, 1e7);
    let rows = p.rows();
    let zero = rows.iter().find(|r| r.what == "zero" && r.pair).unwrap();
    let pole = rows.iter().find(|r| r.what == "pole" && r.pair).unwrap();
    assert!(rel(zero.f0_hz, fs) < 1e-9, "{} vs {fs}", zero.f0_hz);
    assert!(rel(pole.f0_hz, fp) < 1e-9, "{} vs {fp}", pole.f0_hz);
    // Series-arm Q (1/R1)·√(L1/C1), closed form.
    let (r1, l1, c1, _) = CRYSTAL;
    assert!(rel(zero.q.unwrap(), (l1 / c1).sqrt() / r1) < 1e-6);
    // At 10 points per decade over a decade around 10 MHz both resonances fall between
    // grid points; the pole and zero pairs seed their search.
    let f = figures(
        &a,
        &Grid::log(3.16e6, 31.6e6, 10.0).unwrap(),
        0,
        &MetricOptions::default(),
    );
    let (zs, zp) = crystal_zero_phase();
    assert_eq!(f.resonances.len(), 2, "{:?}", f.resonances);
    assert_eq!(f.resonances[0].kind, "series");
    assert_eq!(f.resonances[1].kind, "parallel");
    assert!(
        rel(f.resonances[0].freq_hz, zs) < 1e-9,
        "{} vs {zs}",
        f.resonances[0].freq_hz
    );
    assert!(
        rel(f.resonances[1].freq_hz, zp) < 1e-9,
        "{} vs {zp}",
        f.resonances[1].freq_hz
    );
    // The zero-phase points lie within a part in 10⁸ of the closed forms (R1 and C0 move
    // them a little).
    assert!(rel(zs, fs) < 1e-6 && rel(zp, fp) < 1e-6);
}

#[test]
fn series_rlc_q_is_root_l_over_c_over_r() {
    // Closed form: Q = (1/R)·√(L/C), f0 = 1/(2π√(LC)), from the zeros of the impedance.
    let (r, l, c): (f64, f64, f64) = (22.0, 4.7e-3, 100e-9);
    let a = analysis(&format!(
        r#"[parts]
L1 = {{ inductor = {l:e}, between = ["a", "b"] }}
C1 = {{ capacitor = {c:e}, between = ["b", "d"] }}
R1 = {{ resistor = {r:e}, between = ["d", "gnd"] }}
[responses]
z = {{ impedance = ["a", "gnd"] }}"#
    ));
    let rows = pz(&a, 0, 1e3).rows();
    let pair = rows.iter().find(|x| x.what == "zero" && x.pair).unwrap();
    assert!(rel(pair.q.unwrap(), (l / c).sqrt() / r) < 1e-12);
    assert!(rel(pair.f0_hz, 1.0 / (2.0 * PI * (l * c).sqrt())) < 1e-12);
}

#[test]
fn rc_cut_off_does_not_move_with_the_sweep_start() {
    // Closed form: f_c = 1/(2πRC) against the DC gain, whether the sweep starts a decade or
    // a third of a decade below it, and on a 4-point list.
    let a = analysis(
        r#"[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
R1 = { resistor = "2.2k", between = ["in", "out"] }
C1 = { capacitor = "10n", between = ["out", "gnd"] }
[responses]
g = { ratio = ["out", "in"] }"#,
    );
    let fc = 1.0 / (2.0 * PI * 2.2e3 * 10e-9);
    let opts = MetricOptions::default();
    let mut seen = Vec::new();
    for grid in [
        Grid::log(fc / 10.0, fc * 100.0, 20.0).unwrap(),
        Grid::log(fc / 10f64.powf(1.0 / 3.0), fc * 100.0, 20.0).unwrap(),
        Grid::list(vec![fc / 2.0, fc * 0.9, fc * 3.0, fc * 50.0]).unwrap(),
    ] {
        let f = figures(&a, &grid, 0, &opts);
        assert_eq!(f.class, "low-pass");
        assert_eq!(f.reference.as_ref().unwrap().kind, "dc");
        seen.push(f.upper_cutoff_hz.unwrap());
    }
    for s in &seen {
        assert!(rel(*s, fc) < 1e-12, "{s} vs {fc}");
        assert!(rel(*s, seen[0]) < 1e-12);
    }
}

#[test]
fn high_pass_on_a_four_point_list_meets_its_closed_form() {
    // Closed form: a CR high-pass is −3.0103 dB against its high-frequency gain at 1/(2πRC).
    let a = analysis(
        r#"[parts]
V1 = { voltage = "1", between = ["in", "gnd"] }
C1 = { capacitor = "47n", between = ["in", "out"] }
R1 = { resistor = "3.3k", between = ["out", "gnd"] }
[responses]
g = { ratio = ["out", "in"] }"#,
    );
    let fc = 1.0 / (2.0 * PI * 3.3e3 * 47e-9);
    let f = figures(
        &a,
        &Grid::list(vec![fc / 7.0, fc / 1.5, fc * 2.0, fc * 9.0]).unwrap(),
        0,
        &MetricOptions::default(),
    );
    assert_eq!(f.class, "high-pass");
    assert!(f.hf_db.unwrap().abs() < 1e-12);
    assert!(
        rel(f.lower_cutoff_hz.unwrap(), fc) < 1e-12,
        "{:?}",
        f.lower_cutoff_hz
    );
}

#[test]
fn peaked_sallen_key_cut_off_is_measured_from_its_dc_gain() {
    // Unity-gain Sallen–Key with Q ≈ 1.06 (closed forms as above). Against the DC gain
    // (common practice for a low-pass), |H|² = 1/((1 − x²)² + x²/Q²) = 1/2 at
    // x² = 1 − 1/(2Q²) + √((1 − 1/(2Q²))² + 1), x = f/f0.
    let (r1, r2, c1, c2): (f64, f64, f64, f64) = (10e3, 10e3, 10e-9, 2.22e-9);
    let a = analysis(&format!(
        r#"[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
R1 = {{ resistor = {r1:e}, between = ["in", "x"] }}
R2 = {{ resistor = {r2:e}, between = ["x", "y"] }}
C1 = {{ capacitor = {c1:e}, between = ["x", "out"] }}
C2 = {{ capacitor = {c2:e}, between = ["y", "gnd"] }}
U1 = {{ opamp = "ideal", noninverting = "y", inverting = "out", output = "out" }}
[responses]
gain = {{ ratio = ["out", "in"] }}"#
    ));
    let f0 = 1.0 / (2.0 * PI * (r1 * r2 * c1 * c2).sqrt());
    let q = (r1 * r2 * c1 * c2).sqrt() / (c2 * (r1 + r2));
    assert!(q > 1.0 && q < 1.1, "{q}");
    let k = 1.0 - 1.0 / (2.0 * q * q);
    let x2 = k + (k * k + 1.0).sqrt();
    let fc = f0 * x2.sqrt();
    for start in [f0 / 100.0, f0 / 3.0] {
        let f = figures(
            &a,
            &Grid::log(start, f0 * 30.0, 13.0).unwrap(),
            0,
            &MetricOptions::default(),
        );
        assert_eq!(f.class, "low-pass");
        assert!(f.reference.as_ref().unwrap().db.abs() < 1e-12);
        assert!(
            rel(f.upper_cutoff_hz.unwrap(), fc) < 1e-12,
            "{:?} vs {fc}",
            f.upper_cutoff_hz
        );
        // The peak is reported with its own figures, not used as the reference.
        assert_eq!(f.peaks.len(), 1);
    }
}

#[test]
fn chebyshev_ripple_band_and_cut_off_do_not_move_with_the_sweep_start() {
    // Fixture facts (scipy.signal.cheby1(3, 0.5, 2π·1 kHz)): the 0.5 dB ripple band ends at
    // 1 kHz; the ladder's DC gain is the divider's 1/2, the reference of a low-pass.
    let a = analysis(&ladder_design(
        "cheby3",
        &chebyshev_g(3, 0.5),
        50.0,
        50.0,
        1e3,
    ));
    let ripple = MetricOptions {
        level_db: Some(-0.5),
        reference: Reference::Dc,
    };
    let mut edges = Vec::new();
    let mut cut_offs = Vec::new();
    for start in [10.0, 300.0, 800.0] {
        let grid = Grid::log(start, 100e3, 25.0).unwrap();
        let f = figures(&a, &grid, 0, &ripple);
        edges.push(f.upper_cutoff_hz.unwrap());
        let f = figures(&a, &grid, 0, &MetricOptions::default());
        assert_eq!(f.class, "low-pass");
        cut_offs.push(f.upper_cutoff_hz.unwrap());
    }
    for e in &edges {
        assert!(rel(*e, 1e3) < 1e-9, "{e}");
    }
    for c in &cut_offs {
        assert!(rel(*c, cut_offs[0]) < 1e-12, "{c} vs {}", cut_offs[0]);
    }
}

#[test]
fn natural_frequencies_of_a_tank_are_its_resonance() {
    // Closed form: a parallel RLC has s = −1/(2RC) ± j√(1/LC − 1/(2RC)²).
    let (r, l, c): (f64, f64, f64) = (5e3, 1e-3, 10e-9);
    let d = analyzer_core::design::parse(&format!(
        r#"[parts]
R1 = {{ resistor = {r:e}, between = ["t", "gnd"] }}
L1 = {{ inductor = {l:e}, between = ["t", "gnd"] }}
C1 = {{ capacitor = {c:e}, between = ["t", "gnd"] }}
[responses]
z = {{ impedance = ["t", "gnd"] }}"#
    ))
    .unwrap();
    let a = Analysis::new(d.network, d.responses).unwrap();
    let roots = natural_frequencies(a.system(), Some(2.0 * PI * 5e4)).unwrap();
    let a_ = 1.0 / (2.0 * r * c);
    let wd = (1.0 / (l * c) - a_ * a_).sqrt();
    same_roots(
        &roots.finite,
        &[Complex64::new(-a_, wd), Complex64::new(-a_, -wd)],
        1e-12,
        "tank",
    );
}
