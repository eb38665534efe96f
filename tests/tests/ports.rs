//! Ports and S-parameters against closed forms: reflection of a resistive load, a series
//! resistor between equal and unequal reference impedances, a T network's Z matrix, the
//! reflection figures' definitions; Touchstone files read back by our own reader.

use analyzer_core::design;
use analyzer_core::ports::{self, NPort, SPoint};
use analyzer_core::sweep::Grid;
use analyzer_core::touchstone::{self, Version};
use num_complex::Complex64;
use reference_suite::rel;

fn nport(text: &str) -> (NPort, Grid) {
    let d = design::parse(text).unwrap();
    let grid = d.sweep.grid().unwrap();
    (NPort::new(&d.network, d.ports).unwrap(), grid)
}

/// A design of resistors between 1 and 10 kHz with the given parts and ports.
fn resistive(parts: &str, ports: &str) -> String {
    format!(
        "[sweep]\nfrom = \"1 kHz\"\nto = \"10 kHz\"\n[parts]\n{parts}\n[responses]\nz = {{ impedance = [\"a\", \"gnd\"] }}\n[ports]\n{ports}\n"
    )
}

fn s_at(np: &NPort, f: f64) -> SPoint {
    let ev = np.analysis().evaluator().unwrap();
    let mut ws = ev.workspace();
    np.at(&ev, &mut ws, f).unwrap()
}

#[test]
fn a_resistive_load_reflects_as_the_closed_form() {
    // Γ = (R − Z0)/(R + Z0) (closed form): 0 for a matched load (return loss infinite, VSWR
    // 1), |Γ| → 1 for a short and an open.
    for (r, z0) in [
        (50.0, 50.0),
        (1e-3, 50.0),
        (1e9, 50.0),
        (75.0, 50.0),
        (12.5, 75.0),
    ] {
        let (np, _) = nport(&resistive(
            &format!(r#"RL = {{ resistor = "{r}", between = ["a", "gnd"] }}"#),
            &format!(r#"p1 = {{ between = ["a", "gnd"], z0 = "{z0}" }}"#),
        ));
        let g = s_at(&np, 3e3).s[0];
        let want = (r - z0) / (r + z0);
        assert!(
            (g - Complex64::new(want, 0.0)).norm() < 1e-12,
            "{r} Ω: {g} vs {want}"
        );
        let f = ports::reflection(g);
        if r == z0 {
            assert!(f.return_loss_db.is_infinite() && f.vswr == 1.0 && f.mismatch_loss_db == 0.0);
        } else {
            // VSWR magnifies Γ's rounding by 1/(1 − |Γ|).
            let vswr = (1.0 + want.abs()) / (1.0 - want.abs());
            assert!(
                rel(f.vswr, vswr) < 1e-11 / (1.0 - want.abs()),
                "{r}: {} vs {vswr}",
                f.vswr
            );
            assert!((f.return_loss_db + 20.0 * want.abs().log10()).abs() < 1e-9);
        }
    }
}

#[test]
fn a_series_resistor_between_ports_matches_the_power_wave_closed_form() {
    // Power waves with real references (Kurokawa): for a series R between z1 and z2,
    // S11 = (R + z2 − z1)/(R + z1 + z2), S22 = (R + z1 − z2)/(R + z1 + z2),
    // S21 = S12 = 2√(z1·z2)/(R + z1 + z2) (closed form).
    for (r, z1, z2) in [
        (100.0f64, 50.0f64, 50.0f64),
        (33.0, 50.0, 75.0),
        (1.0, 10.0, 200.0),
    ] {
        let (np, _) = nport(&resistive(
            &format!(r#"R = {{ resistor = "{r}", between = ["a", "b"] }}"#),
            &format!(
                "p1 = {{ between = [\"a\", \"gnd\"], z0 = \"{z1}\" }}\np2 = {{ between = [\"b\", \"gnd\"], z0 = \"{z2}\" }}"
            ),
        ));
        let s = s_at(&np, 5e3).s;
        let d = r + z1 + z2;
        let want = [
            (r + z2 - z1) / d,
            2.0 * (z1 * z2).sqrt() / d,
            2.0 * (z1 * z2).sqrt() / d,
            (r + z1 - z2) / d,
        ];
        for (k, w) in want.iter().enumerate() {
            assert!(
                (s[k] - Complex64::new(*w, 0.0)).norm() < 1e-12,
                "{r} {z1} {z2} S[{k}]"
            );
        }
        assert!(ports::reciprocity_error(&s) < 1e-15);
        assert!(ports::largest_singular_value(&s) <= 1.0 + 1e-12);
        // A bare series element has no Z matrix, but its ABCD is [[1, R], [0, 1]] — through
        // Z it is undefined, and z_from_s says so.
        assert!(ports::z_from_s(&s, &[z1, z2]).is_none());
    }
}

#[test]
fn a_t_network_has_the_closed_form_z_matrix_and_lossless_power_balance() {
    // T network: Za from port 1 to the middle, Zb from the middle to port 2, Zc from the
    // middle to ground: Z11 = Za + Zc, Z12 = Z21 = Zc, Z22 = Zb + Zc (closed form); with
    // reactive arms, |S11|² + |S21|² = 1 (lossless: S is unitary).
    let (np, _) = nport(
        r#"
[sweep]
from = "1 MHz"
to = "10 MHz"
[parts]
La = { inductor = "1u", between = ["a", "m"] }
Lb = { inductor = "2u", between = ["m", "b"] }
Cc = { capacitor = "1n", between = ["m", "gnd"] }
[responses]
z = { impedance = ["a", "gnd"] }
[ports]
p1 = { between = ["a", "gnd"] }
p2 = { between = ["b", "gnd"], z0 = "75" }
"#,
    );
    let f = 3.3e6;
    let w = 2.0 * std::f64::consts::PI * f;
    let j = Complex64::new(0.0, 1.0);
    let (za, zb, zc) = (j * w * 1e-6, j * w * 2e-6, (j * w * 1e-9).inv());
    let p = s_at(&np, f);
    let z = ports::z_from_s(&p.s, &[50.0, 75.0]).unwrap();
    let want = [za + zc, zc, zc, zb + zc];
    for (k, w) in want.iter().enumerate() {
        assert!(
            (z[k] - w).norm() < 1e-9 * w.norm(),
            "Z[{k}] {} vs {w}",
            z[k]
        );
    }
    let y = ports::y_from_z(&z).unwrap();
    let det = want[0] * want[3] - want[1] * want[2];
    assert!((y[0] - want[3] / det).norm() < 1e-9 * y[0].norm());
    let abcd = ports::abcd_from_z(&z).unwrap();
    // AD − BC = 1 for a reciprocal two-port (closed form).
    assert!((abcd[0] * abcd[3] - abcd[1] * abcd[2] - 1.0).norm() < 1e-9);
    for col in 0..2 {
        let power = p.s[col].norm_sqr() + p.s[2 + col].norm_sqr();
        assert!((power - 1.0).abs() < 1e-12, "column {col}: {power}");
    }
    assert!((ports::largest_singular_value(&p.s) - 1.0).abs() < 1e-9);
}

#[test]
fn a_voltage_source_across_a_port_is_refused() {
    let d = design::parse(
        r#"
[parts]
V1 = { voltage = "1", between = ["a", "gnd"] }
R1 = { resistor = "50", between = ["a", "gnd"] }
[responses]
z = { impedance = ["a", "gnd"] }
[ports]
p1 = { between = ["gnd", "a"] }
"#,
    )
    .unwrap();
    let e = NPort::new(&d.network, d.ports).err().unwrap().to_string();
    assert!(
        e.starts_with("port p1 sits across voltage source V1"),
        "{e}"
    );
}

#[test]
fn touchstone_files_read_back_as_written() {
    // Our writer against our reader for 1, 2 and 3 ports, versions 1.1 and 2.0 (the
    // format's rules as we read the open specification, from memory: option line, the
    // two-port 21_12 order, rows of at most four pairs, the 2.0 keywords).
    let three = r#"
[sweep]
from = "1 MHz"
to = "100 MHz"
per_decade = 7
[parts]
R1 = { resistor = "10", between = ["a", "m"] }
L1 = { inductor = "100n", between = ["m", "b"] }
C1 = { capacitor = "47p", between = ["m", "c"] }
R2 = { resistor = "1k", between = ["c", "gnd"] }
C2 = { capacitor = "10p", between = ["b", "gnd"] }
[responses]
z = { impedance = ["a", "gnd"] }
[ports]
p1 = { between = ["a", "gnd"] }
p2 = { between = ["b", "gnd"] }
p3 = { between = ["c", "gnd"], z0 = "75" }
"#;
    for keep in [1usize, 2, 3] {
        let mut text = three.to_string();
        if keep < 3 {
            text = text.replace("p3 = { between = [\"c\", \"gnd\"], z0 = \"75\" }", "");
        }
        if keep < 2 {
            text = text.replace("p2 = { between = [\"b\", \"gnd\"] }", "");
        }
        let (np, grid) = nport(&text);
        let pts = np.sweep(&grid).unwrap();
        for version in [Version::V1, Version::V2] {
            let mut out = Vec::new();
            let r = touchstone::write(&mut out, version, "round trip", np.ports(), &pts);
            if keep == 3 && version == Version::V1 {
                // 1.1 cannot hold two reference impedances.
                assert!(r.is_err());
                continue;
            }
            r.unwrap();
            let text = String::from_utf8(out).unwrap();
            if keep == 3 {
                assert!(text
                    .lines()
                    .all(|l| l.split_whitespace().count() <= 9 || l.starts_with('!')));
            }
            let back = touchstone::read(&text, Some(keep)).unwrap();
            assert_eq!(back.version, version);
            assert_eq!(back.freqs, grid.points());
            assert_eq!(back.z0, np.ports().iter().map(|p| p.z0).collect::<Vec<_>>());
            for (p, s) in pts.iter().zip(&back.s) {
                assert_eq!(&p.s, s, "{keep} ports, {version:?}");
            }
        }
    }
    // A file in MA format with MHz, as another tool might write it (hand-made).
    let ma = "! hand-made\n# MHZ S MA R 50\n1 0.5 90 0.25 0 0.25 0 0.5 -90\n";
    let d = touchstone::read(ma, Some(2)).unwrap();
    assert_eq!(d.freqs, vec![1e6]);
    assert!((d.s[0][0] - Complex64::new(0.0, 0.5)).norm() < 1e-15);
    assert!((d.s[0][1] - Complex64::new(0.25, 0.0)).norm() < 1e-15);
}

#[test]
fn insertion_loss_between_terminations_matches_the_closed_forms() {
    // A series inductor between source zs and load zl: IL = 20·log10|1 + jωL/(zs + zl)|; a
    // shunt capacitor: IL = 20·log10|1 + jωC·zs·zl/(zs + zl)| (closed forms), for the 50/50,
    // 0.1/100 and 100/0.1 Ω terminations.
    let series = nport(&resistive(
        r#"L1 = { inductor = "10u", between = ["a", "b"] }
Rb = { resistor = "1G", between = ["b", "gnd"] }
Ra = { resistor = "1G", between = ["a", "gnd"] }"#,
        "p1 = { between = [\"a\", \"gnd\"] }\np2 = { between = [\"b\", \"gnd\"] }",
    ))
    .0;
    let shunt = nport(&resistive(
        r#"C1 = { capacitor = "100n", between = ["a", "gnd"] }
Rab = { resistor = "1u", between = ["a", "b"] }"#,
        "p1 = { between = [\"a\", \"gnd\"] }\np2 = { between = [\"b\", \"gnd\"] }",
    ))
    .0;
    for f in [1e3, 3.3e3, 9e3] {
        let w = 2.0 * std::f64::consts::PI * f;
        let j = Complex64::new(0.0, 1.0);
        for (zs, zl) in ports::EMI_TERMINATIONS {
            let a = ports::abcd_from_s(&s_at(&series, f).s, 50.0).unwrap();
            let want = 20.0 * (1.0 + j * w * 10e-6 / (zs + zl)).norm().log10();
            let got = ports::insertion_loss_db(&a, zs, zl);
            // The 1 GΩ shunts are there to give every node a path; they move IL by < 1e-9 dB.
            assert!(
                (got - want).abs() < 1e-6,
                "series L {zs}/{zl} at {f}: {got} vs {want}"
            );
            let a = ports::abcd_from_s(&s_at(&shunt, f).s, 50.0).unwrap();
            let want = 20.0 * (1.0 + j * w * 100e-9 * zs * zl / (zs + zl)).norm().log10();
            let got = ports::insertion_loss_db(&a, zs, zl);
            assert!(
                (got - want).abs() < 1e-6,
                "shunt C {zs}/{zl} at {f}: {got} vs {want}"
            );
        }
    }
}

/// A random LC ladder two-port (series inductors, shunt capacitors; no loss anywhere)
/// between ports at its ends.
fn lc_ladder(values: &[(bool, f64)]) -> String {
    let mut parts = String::new();
    let mut node = 0;
    for (k, &(series, e)) in values.iter().enumerate() {
        if series {
            parts += &format!(
                "L{k} = {{ inductor = \"{:e}\", between = [\"n{node}\", \"n{}\"] }}\n",
                10f64.powf(-7.0 + 2.0 * e),
                node + 1
            );
            node += 1;
        } else {
            parts += &format!(
                "C{k} = {{ capacitor = \"{:e}\", between = [\"n{node}\", \"gnd\"] }}\n",
                10f64.powf(-11.0 + 2.0 * e)
            );
        }
    }
    if node == 0 {
        parts += "Lthrough = { inductor = \"1u\", between = [\"n0\", \"n1\"] }\n";
        node = 1;
    }
    format!(
        "[sweep]\nfrom = \"1 MHz\"\nto = \"100 MHz\"\nper_decade = 5\n[parts]\n{parts}[responses]\nz = {{ impedance = [\"n0\", \"gnd\"] }}\n[ports]\np1 = {{ between = [\"n0\", \"gnd\"] }}\np2 = {{ between = [\"n{node}\", \"gnd\"], z0 = \"75\" }}\n"
    )
}

proptest::proptest! {
    #![proptest_config(proptest::prelude::ProptestConfig { cases: 48, ..Default::default() })]

    /// A lossless two-port conserves power: |S11|² + |S21|² = 1 and |S12|² + |S22|² = 1
    /// (closed form: S is unitary), at every frequency, for random LC ladders.
    #[test]
    fn lossless_two_ports_conserve_power(
        values in proptest::collection::vec((proptest::bool::ANY, 0.0f64..1.0), 1..8),
    ) {
        let (np, grid) = nport(&lc_ladder(&values));
        for p in np.sweep(&grid).unwrap() {
            for col in 0..2 {
                let power = p.s[col].norm_sqr() + p.s[2 + col].norm_sqr();
                proptest::prop_assert!((power - 1.0).abs() < 1e-12, "{power} at {} Hz", p.freq);
            }
        }
    }
}

#[test]
fn conversions_round_trip_and_agree_with_each_other() {
    // The standard two-port conversions (S ↔ Z ↔ Y ↔ ABCD, as tabulated in Pozar's
    // Microwave Engineering, table 4.2; from memory): S → Z → S is the identity, Y·Z = I, and
    // ABCD from S equals ABCD from Z, on a lossy π network at several frequencies.
    let (np, grid) = nport(
        r#"
[sweep]
from = "100 kHz"
to = "100 MHz"
per_decade = 3
[parts]
C1 = { capacitor = "220p", between = ["a", "gnd"] }
R1 = { resistor = "12", between = ["a", "m"] }
L1 = { inductor = "3.3u", between = ["m", "b"] }
C2 = { capacitor = "470p", between = ["b", "gnd"] }
R2 = { resistor = "2k", between = ["b", "gnd"] }
[responses]
z = { impedance = ["a", "gnd"] }
[ports]
p1 = { between = ["a", "gnd"] }
p2 = { between = ["b", "gnd"] }
"#,
    );
    for p in np.sweep(&grid).unwrap() {
        let z0 = [50.0, 50.0];
        let z = ports::z_from_s(&p.s, &z0).unwrap();
        let back = ports::s_from_z(&z, &z0).unwrap();
        for (a, b) in back.iter().zip(&p.s) {
            assert!((a - b).norm() < 1e-12, "S → Z → S at {} Hz", p.freq);
        }
        let y = ports::y_from_z(&z).unwrap();
        let yz = [
            y[0] * z[0] + y[1] * z[2],
            y[0] * z[1] + y[1] * z[3],
            y[2] * z[0] + y[3] * z[2],
            y[2] * z[1] + y[3] * z[3],
        ];
        for (k, v) in yz.iter().enumerate() {
            let want = if k == 0 || k == 3 { 1.0 } else { 0.0 };
            assert!((v - want).norm() < 1e-9, "Y·Z at {} Hz", p.freq);
        }
        let (a1, a2) = (
            ports::abcd_from_s(&p.s, 50.0).unwrap(),
            ports::abcd_from_z(&z).unwrap(),
        );
        for (x, y) in a1.iter().zip(&a2) {
            assert!(
                (x - y).norm() < 1e-9 * (1.0 + y.norm()),
                "ABCD at {} Hz",
                p.freq
            );
        }
    }
}

#[test]
fn the_beacon_match_returns_what_the_hand_calculation_says() {
    // Hand calculation at 27.145 MHz (ω = 1.70557e8 rad/s): the whip is 18 Ω with 30 pF,
    // 1/(ωC) = 195.44 Ω; the series 1.2865 µH adds ωL = 219.42 Ω, so the branch is
    // 18 + j23.98 Ω, i.e. 0.020017 − j0.026672 S; the shunt 156 pF adds +j0.026607 S, leaving
    // 0.020017 − j0.000065 S: Z = 49.956 + j0.162 Ω, |Γ| = 0.00168, return loss 55.5 dB.
    // The example's port replaces the transmitter's EMF (opened), so its 50 Ω output
    // resistor dangles and the port sees the match alone.
    let text = std::fs::read_to_string(
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../sweeps/beacon-match.toml"),
    )
    .unwrap();
    let (np, grid) = nport(&text);
    let w = 2.0 * std::f64::consts::PI * 27.145e6;
    let j = Complex64::new(0.0, 1.0);
    let branch = 18.0 + (j * w * 30e-12).inv() + j * w * 1.2865e-6;
    let z = (branch.inv() + j * w * 156e-12).inv();
    let want = (z - 50.0) / (z + 50.0);
    let got = s_at(&np, 27.145e6).s[0];
    assert!((got - want).norm() < 1e-12, "{got} vs {want}");
    let rl = ports::reflection(got).return_loss_db;
    assert!((rl - 55.50).abs() < 0.01, "{rl}");
    // The ≥ 10 dB band brackets the design frequency: |Γ| ≤ 0.3162 from below 27.145 MHz to
    // above it, and the ends of the sweep are far outside it.
    let pts = np.sweep(&grid).unwrap();
    let inside: Vec<f64> = pts
        .iter()
        .filter(|p| ports::reflection(p.s[0]).return_loss_db >= 10.0)
        .map(|p| p.freq)
        .collect();
    let (lo, hi) = (inside[0], inside[inside.len() - 1]);
    assert!(
        lo < 27.145e6 && hi > 27.145e6 && lo > 20e6 && hi < 35e6,
        "{lo} … {hi}"
    );
}

#[test]
fn s21_group_delay_of_a_series_inductor_is_the_closed_form() {
    // A series L between two z0 ports: S21 = 2·z0/(2·z0 + jωL), so
    // arg S21 = −atan(ωL/(2·z0)) and τ = (L/(2·z0))/(1 + (ωL/(2·z0))²) (closed form).
    let (l, z0) = (10e-6f64, 50.0f64);
    let (np, _) = nport(&resistive(
        &format!(r#"L = {{ inductor = "{l}", between = ["a", "b"] }}"#),
        &format!(
            "p1 = {{ between = [\"a\", \"gnd\"], z0 = \"{z0}\" }}\np2 = {{ between = [\"b\", \"gnd\"], z0 = \"{z0}\" }}"
        ),
    ));
    for f in [1e3, 1e5, 795.77e3, 1e7] {
        let p = s_at(&np, f);
        let x = 2.0 * std::f64::consts::PI * f * l / (2.0 * z0);
        let want = (l / (2.0 * z0)) / (1.0 + x * x);
        let got = ports::group_delay(p.s[2], p.ds[2]);
        assert!(rel(got, want) < 1e-10, "{f}: {got} vs {want}");
    }
    // A resistive two-port has no delay.
    let (np, _) = nport(&resistive(
        r#"R = { resistor = "100", between = ["a", "b"] }"#,
        "p1 = { between = [\"a\", \"gnd\"] }\np2 = { between = [\"b\", \"gnd\"] }",
    ));
    let p = s_at(&np, 5e3);
    assert!(ports::group_delay(p.s[2], p.ds[2]).abs() < 1e-18);
}

#[test]
fn a_return_loss_limit_on_a_resistive_load_has_the_closed_form_margin() {
    // 100 Ω on a 50 Ω port: Γ = (100 − 50)/(100 + 50) = 1/3, RL = 20·log10(3) = 9.5424 dB at
    // every frequency (closed form). Against 10 dB the margin is −0.4576 dB; against
    // VSWR 2.5 (RL 20·log10(3.5/1.5) = 7.3595 dB) it is +2.1829 dB.
    let text = resistive(
        r#"R = { resistor = "100", between = ["a", "gnd"] }"#,
        "p1 = { between = [\"a\", \"gnd\"] }",
    ) + "[limits]\nrl = { port = \"p1\", from = \"2 kHz\", to = \"8 kHz\", min_return_loss_db = 10 }\nsw = { port = \"p1\", from = \"2 kHz\", to = \"8 kHz\", max_vswr = 2.5 }\n";
    let d = design::parse(&text).unwrap();
    assert_eq!(d.port_limits.len(), 2);
    let grid = d.sweep.grid().unwrap();
    let np = NPort::new(&d.network, d.ports.clone()).unwrap();
    let pts = np.sweep(&grid).unwrap();
    let ev = np.analysis().evaluator().unwrap();
    let mut ws = ev.workspace();
    let rl = 20.0 * 3f64.log10();
    let r = np
        .check_limit(&ev, &mut ws, &pts, &d.port_limits[0])
        .unwrap()
        .unwrap();
    assert!(!r.pass);
    assert!((r.worst_margin_db - (rl - 10.0)).abs() < 1e-9, "{r:?}");
    let r = np
        .check_limit(&ev, &mut ws, &pts, &d.port_limits[1])
        .unwrap()
        .unwrap();
    assert!(r.pass);
    assert!(
        (r.worst_margin_db - (rl - 20.0 * (3.5f64 / 1.5).log10())).abs() < 1e-9,
        "{r:?}"
    );
    // A limit on a port the design does not define is refused, naming the ports it has.
    let bad = text.replace(
        "port = \"p1\", from = \"2 kHz\", to = \"8 kHz\", min",
        "port = \"p9\", from = \"2 kHz\", to = \"8 kHz\", min",
    );
    let e = design::parse(&bad).unwrap_err().to_string();
    assert!(
        e.contains("checks port \"p9\"") && e.contains("(it has: p1)"),
        "{e}"
    );
}

#[test]
fn s_z_y_and_abcd_equal_scipy_nodal_analysis_of_a_lossy_two_port() {
    // Fixture: tests/reference/make_fixtures.py two_port(), the same network solved by nodal
    // analysis in scipy.linalg, its S from Kurokawa's power-wave formula with z0 50/75 Ω.
    let text = r#"
[sweep]
from = "100 kHz"
to = "47 MHz"
[parts]
L1 = { inductor = "2.2u", between = ["a", "m"] }
R1 = { resistor = "4.7", between = ["m", "x"] }
C1 = { capacitor = "1n", between = ["x", "gnd"] }
L2 = { inductor = "3.3u", between = ["m", "b"] }
R2 = { resistor = "330", between = ["b", "gnd"] }
[responses]
z = { impedance = ["a", "gnd"] }
[ports]
p1 = { between = ["a", "gnd"], z0 = "50" }
p2 = { between = ["b", "gnd"], z0 = "75" }
"#;
    let (np, _) = nport(text);
    let z0 = [50.0, 75.0];
    let rows = reference_suite::fixture("two_port_lossy_tee.csv");
    assert_eq!(rows.len(), 5);
    for row in rows {
        let f = row[0];
        let c = |k: usize| Complex64::new(row[1 + 2 * k], row[2 + 2 * k]);
        let s = s_at(&np, f).s;
        let z = ports::z_from_s(&s, &z0).expect("Z exists");
        let y = ports::y_from_z(&z).expect("Y exists");
        let abcd = ports::abcd_from_z(&z).expect("ABCD exists");
        let close = |got: Complex64, want: Complex64, what: &str| {
            assert!(
                (got - want).norm() <= 1e-9 * want.norm().max(1e-3),
                "{what} at {f} Hz: {got} vs scipy {want}"
            );
        };
        for k in 0..4 {
            close(s[k], c(k), "S");
            close(z[k], c(4 + k), "Z");
            close(y[k], c(8 + k), "Y");
            close(abcd[k], c(12 + k), "ABCD");
        }
    }
}

#[test]
fn a_port_that_replaces_its_termination_resistor_sees_the_network_without_it() {
    // A series R = 100 Ω from a to b, and a 50 Ω load across b that port p2 stands in for:
    // with the load replaced, S is the bare series element's, S21 = 2·z0/(2·z0 + R) = 0.5 and
    // S11 = R/(2·z0 + R) = 0.5 (closed form); without `replaces` the load would sit in
    // parallel with p2's own termination.
    let text = resistive(
        r#"R = { resistor = "100", between = ["a", "b"] }
Rload = { resistor = "50", between = ["b", "gnd"] }"#,
        "p1 = { between = [\"a\", \"gnd\"] }\np2 = { between = [\"b\", \"gnd\"], replaces = [\"Rload\"] }",
    );
    let (np, _) = nport(&text);
    let s = s_at(&np, 5e3).s;
    for (k, want) in [(0, 0.5), (2, 0.5), (1, 0.5), (3, 0.5)] {
        assert!(
            (s[k] - Complex64::new(want, 0.0)).norm() < 1e-12,
            "S[{k}] = {}",
            s[k]
        );
    }
    let (np, _) = nport(&text.replace(", replaces = [\"Rload\"]", ""));
    let s = s_at(&np, 5e3).s;
    // Load 50 ∥ 50 = 25 Ω at b: S11 = (100 + 25 − 50)/(100 + 25 + 50) = 3/7 (closed form).
    assert!(
        (s[0] - Complex64::new(3.0 / 7.0, 0.0)).norm() < 1e-12,
        "{}",
        s[0]
    );
}
