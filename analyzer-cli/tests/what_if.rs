//! `analyzer sensitivity`, `corners` and `variants` through the real binary.

use assert_cmd::Command;
use std::path::{Path, PathBuf};

fn analyzer() -> Command {
    Command::cargo_bin("analyzer").expect("binary")
}

fn example() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../sweeps/soil-probe-antialias.toml")
}

fn stdout(c: &mut Command) -> String {
    let out = c.assert().success();
    String::from_utf8_lossy(&out.get_output().stdout).to_string()
}

#[test]
fn sensitivity_ranks_the_values_and_writes_curves() {
    let tmp = tempfile::tempdir().unwrap();
    let text = stdout(
        analyzer()
            .args(["sensitivity", "--curves", "--at", "10 kHz", "-o"])
            .arg(tmp.path())
            .arg(example()),
    );
    // The unity-gain Sallen–Key section's f0 moves as −1/2 of every R and C (closed form
    // ω0 = 1/√(R1R2C1C2)); the 50 Ω source resistor barely matters.
    let line = text
        .lines()
        .find(|l| l.trim_start().starts_with("pole pair 1 f0"))
        .unwrap();
    assert!(line.contains("-0.500"), "{line}");
    let csv = std::fs::read_to_string(tmp.path().join("gain-sensitivity.csv")).unwrap();
    assert!(csv.starts_with("frequency_hz,Rs_db_per_pct,Rs_deg_per_pct,R1_db_per_pct"));
    assert!(tmp.path().join("gain-sensitivity.svg").exists());
    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(tmp.path().join("sensitivity.json")).unwrap())
            .unwrap();
    assert_eq!(json["values"][1]["name"], "R1");
}

#[test]
fn corners_verify_each_limit_and_variants_sit_side_by_side() {
    let tmp = tempfile::tempdir().unwrap();
    let text = stdout(
        analyzer()
            .args(["corners", "-o"])
            .arg(tmp.path().join("c"))
            .arg(example()),
    );
    assert!(
        text.contains("alias_band") && text.contains("C1 −5%"),
        "{text}"
    );
    let text = stdout(
        analyzer()
            .args(["variants", "--step", "R2=10k,12k", "-q", "-o"])
            .arg(tmp.path().join("v"))
            .arg(example()),
    );
    assert!(text.is_empty());
    let v = tmp.path().join("v");
    for f in [
        "gain@R2_10.00k.csv",
        "gain@R2_12.00k.csv",
        "gain-variants.svg",
        "variants.json",
    ] {
        assert!(v.join(f).exists(), "{f}");
    }
    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(v.join("variants.json")).unwrap()).unwrap();
    let names: Vec<&str> = json["figures"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_str().unwrap())
        .collect();
    let k = names
        .iter()
        .position(|n| *n == "gain.pole_pair1_f0_hz")
        .unwrap();
    let (a, b) = (
        json["values"][0][k].as_f64().unwrap(),
        json["values"][1][k].as_f64().unwrap(),
    );
    // f0 ∝ 1/√R2 (closed form).
    assert!((b / a - (10.0f64 / 12.0).sqrt()).abs() < 1e-9, "{a} {b}");
    let text = stdout(
        analyzer()
            .args(["variants", "--snap", "E12", "-o"])
            .arg(tmp.path().join("s"))
            .arg(example()),
    );
    assert!(text.contains("C2") && text.contains("1.200 nF"), "{text}");
}

#[test]
fn what_if_arguments_are_checked() {
    for (args, want) in [
        (
            vec!["variants", "--step", "R9=1k,2k"],
            "error: --step R9=1k,2k: the design has no part \"R9\"\n",
        ),
        (
            vec!["variants", "--snap", "E7"],
            "error: --snap: unknown series \"E7\"; the IEC 60063 series are E6, E12, E24, E48, E96 and E192\n",
        ),
        (
            vec!["sensitivity", "--set", "R1=4k7 apples"],
            "error: --set R1=4k7 apples: R1: ",
        ),
        (
            vec!["variants", "--step", "C1=1n..100n/1"],
            "error: --step C1=1n..100n/1: \"C1=1n..100n/1\": N after / must be a whole number from 2 to 50\n",
        ),
    ] {
        let tmp = tempfile::tempdir().unwrap();
        let out = analyzer()
            .args(&args)
            .arg("-o")
            .arg(tmp.path().join("o"))
            .arg(example())
            .assert()
            .code(2);
        let err = String::from_utf8_lossy(&out.get_output().stderr).to_string();
        assert!(err.starts_with(want), "{args:?}: {err}");
        assert!(!tmp.path().join("o").exists());
    }
}

#[test]
fn ports_write_touchstone_and_csv_that_agree() {
    let design = Path::new(env!("CARGO_MANIFEST_DIR")).join("../sweeps/sensor-line-filter.toml");
    let tmp = tempfile::tempdir().unwrap();
    let text = stdout(
        analyzer()
            .args(["ports", "-o"])
            .arg(tmp.path())
            .arg(&design),
    );
    assert!(
        text.contains("reciprocity") && text.contains("(passive)"),
        "{text}"
    );
    let ts = std::fs::read_to_string(tmp.path().join("ports.s2p")).unwrap();
    let data = analyzer_core::touchstone::read(&ts, None).unwrap();
    let csv = std::fs::read_to_string(tmp.path().join("ports.csv")).unwrap();
    let mut rows = csv.lines();
    let head: Vec<&str> = rows.next().unwrap().split(',').collect();
    let k = head.iter().position(|h| *h == "s21_db").unwrap();
    for (row, s) in rows.zip(&data.s) {
        let cells: Vec<f64> = row.split(',').map(|c| c.parse().unwrap()).collect();
        let want = 20.0 * s[2].norm().log10();
        assert!((cells[k] - want).abs() < 1e-9, "{} vs {want}", cells[k]);
    }
    // Version 1.1 on request; a design without ports says what to add.
    stdout(
        analyzer()
            .args(["ports", "--touchstone", "1", "-q", "-o"])
            .arg(tmp.path().join("v1"))
            .arg(&design),
    );
    let v1 = std::fs::read_to_string(tmp.path().join("v1/ports.s2p")).unwrap();
    assert!(v1.contains("# HZ S RI R 50") && !v1.contains("[Version]"));
    let out = analyzer()
        .args(["ports", "-o"])
        .arg(tmp.path().join("none"))
        .arg(example())
        .assert()
        .code(2);
    let err = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert!(err.contains("the design has no [ports]"), "{err}");
}

/// A design of ports alone is whole for `ports` (and `check`); the analyses of responses
/// say what is missing. A 50 Ω π attenuator of 6 dB: shunt arms Z0·(K+1)/(K−1) and series
/// arm Z0·(K²−1)/(2K) with K = 10^(6/20) (the matched attenuator's design equations, common
/// practice) give |S21| = −6 dB and a perfect match at both ports; its ABCD's A is
/// 1 + Rseries/Rshunt (closed form).
#[test]
fn a_design_of_ports_alone_is_analysed_as_an_n_port() {
    let (z0, k) = (50.0f64, 10f64.powf(6.0 / 20.0));
    let (shunt, series) = (z0 * (k + 1.0) / (k - 1.0), z0 * (k * k - 1.0) / (2.0 * k));
    let tmp = tempfile::tempdir().unwrap();
    let design = tmp.path().join("pad.toml");
    std::fs::write(
        &design,
        format!(
            "title = \"6 dB pad\"\n[sweep]\nfrom = \"1 MHz\"\nto = \"100 MHz\"\nper_decade = 5\n[parts]\n\
             Ra = {{ resistor = {shunt:e}, between = [\"p1\", \"gnd\"] }}\n\
             Rb = {{ resistor = {series:e}, between = [\"p1\", \"p2\"] }}\n\
             Rc = {{ resistor = {shunt:e}, between = [\"p2\", \"gnd\"] }}\n\
             [ports]\na = {{ between = [\"p1\", \"gnd\"], z0 = \"50\" }}\n\
             b = {{ between = [\"p2\", \"gnd\"], z0 = \"50\" }}\n"
        ),
    )
    .unwrap();
    let text = stdout(
        analyzer()
            .args(["ports", "-o"])
            .arg(tmp.path().join("out"))
            .arg(&design),
    );
    let a = format!("A {:.4}+0.0000i", 1.0 + series / shunt);
    assert!(text.contains(&a), "{a} in {text}");
    let csv = std::fs::read_to_string(tmp.path().join("out/ports.csv")).unwrap();
    let mut rows = csv.lines();
    let head: Vec<&str> = rows.next().unwrap().split(',').collect();
    let col = |name: &str| head.iter().position(|h| *h == name).unwrap();
    let (s11, s21) = (col("s11_db"), col("s21_db"));
    for row in rows {
        let cells: Vec<f64> = row.split(',').map(|c| c.parse().unwrap()).collect();
        assert!((cells[s21] + 6.0).abs() < 1e-9, "{row}");
        assert!(cells[s11] < -100.0, "{row}");
    }
    let listed = stdout(analyzer().arg("check").arg(&design));
    assert!(listed.contains("ports: a, b"), "{listed}");
    let out = analyzer()
        .args(["sweep", "-q", "-o"])
        .arg(tmp.path().join("sweep"))
        .arg(&design)
        .assert()
        .code(2);
    let err = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert!(
        err.contains("pad.toml:1:1: the design has no [responses]"),
        "{err}"
    );
    assert!(!tmp.path().join("sweep").exists());
}

#[test]
fn a_loop_gain_gets_a_nyquist_chart_with_its_margin() {
    let design = Path::new(env!("CARGO_MANIFEST_DIR")).join("../sweeps/cable-driver-loop.toml");
    let tmp = tempfile::tempdir().unwrap();
    stdout(
        analyzer()
            .args(["sweep", "-q", "-o"])
            .arg(tmp.path())
            .arg(&design),
    );
    let svg = std::fs::read_to_string(tmp.path().join("loop-nyquist.svg")).unwrap();
    let doc = roxmltree::Document::parse(&svg).unwrap();
    let texts: Vec<&str> = doc.descendants().filter_map(|n| n.text()).collect();
    assert!(texts.iter().any(|t| t.contains("PM 14.4°")), "{texts:?}");
    assert!(texts.iter().any(|t| t.contains("compressed")));
    // The compression keeps the unit circle in place (continuous at 1).
    use analyzer_core::export::nyquist_radius;
    assert_eq!(nyquist_radius(1.0), 1.0);
    assert_eq!(nyquist_radius(0.5), 0.5);
    assert!((nyquist_radius(1e5) - 6.0).abs() < 1e-12);
}
