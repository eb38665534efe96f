//! The real binary on every example design in sweeps/.

use analyzer_core::design;
use assert_cmd::Command;
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

fn designs() -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(root().join("sweeps"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "toml"))
        .collect();
    v.sort();
    v
}

#[test]
fn every_example_design_sweeps_to_csv_and_svg() {
    let designs = designs();
    assert!(designs.len() >= 4);
    for path in designs {
        let d = design::parse(&std::fs::read_to_string(&path).unwrap()).unwrap();
        let points = d.sweep.grid().unwrap().len();
        let tmp = tempfile::tempdir().unwrap();
        let out = Command::cargo_bin("analyzer")
            .unwrap()
            .args(["sweep", path.to_str().unwrap(), "--delay", "-o"])
            .arg(tmp.path())
            .assert()
            .success();
        let stdout = String::from_utf8_lossy(&out.get_output().stdout).to_string();
        assert!(stdout.contains(&d.network.title), "{stdout}");
        for r in &d.responses {
            let csv_path = tmp.path().join(format!("{}.csv", r.name));
            let mut reader = csv::Reader::from_path(&csv_path).unwrap();
            let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
            let suffix = r.kind.unit().column_suffix();
            let noise = r.kind.unit() == analyzer_core::response::ResponseUnit::NoiseDensity;
            let expected: Vec<String> = if noise {
                vec![
                    "frequency_hz".into(),
                    "density_v_per_rthz".into(),
                    "density_db".into(),
                ]
            } else {
                vec![
                    "frequency_hz".to_string(),
                    "magnitude_db".into(),
                    "phase_deg".into(),
                    format!("real{suffix}"),
                    format!("imag{suffix}"),
                    "group_delay_s".into(),
                ]
            };
            assert_eq!(header, expected);
            let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
            assert_eq!(rows.len(), points, "{}", csv_path.display());
            for row in &rows {
                for field in row.iter() {
                    let v: f64 = field.parse().unwrap();
                    assert!(v.is_finite());
                }
            }
            let svg = std::fs::read_to_string(tmp.path().join(format!("{}.svg", r.name))).unwrap();
            let doc = roxmltree::Document::parse(&svg).expect("SVG is well-formed XML");
            let texts: Vec<&str> = doc
                .descendants()
                .filter_map(|n| n.text())
                .map(str::trim)
                .collect();
            if noise {
                assert!(texts.iter().any(|t| t.ends_with("V/√Hz")), "{}", r.name);
                continue;
            }
            // Panels named, and every tick carrying its unit (dB, Ω or S, °, s, Hz).
            assert!(
                texts
                    .iter()
                    .any(|t| *t == "magnitude" || t.starts_with("|Z|") || t.starts_with("|Y|")),
                "{}",
                r.name
            );
            assert!(texts.contains(&"phase"));
            assert!(texts.contains(&"group delay"));
            assert!(texts.contains(&"frequency"));
            assert!(texts.iter().any(|t| t.ends_with("Hz")));
            assert!(texts.iter().any(|t| t.ends_with('°')));
            assert!(texts
                .iter()
                .any(|t| t.ends_with("dB") || t.ends_with('Ω') || t.ends_with('S')));
            assert!(texts.iter().any(|t| t.contains(&r.name)));
        }
    }
}

#[test]
fn dash_writes_one_csv_to_stdout() {
    let path = root().join("sweeps/bookshelf-crossover.toml");
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args([
            "sweep",
            path.to_str().unwrap(),
            "-o",
            "-",
            "--points",
            "11",
            "--from",
            "100",
            "--to",
            "1.1k",
        ])
        .assert()
        .success();
    let text = String::from_utf8_lossy(&out.get_output().stdout).to_string();
    let mut lines = text.lines();
    assert_eq!(
        lines.next().unwrap(),
        "frequency_hz,woofer.magnitude_db,woofer.phase_deg,woofer.real,woofer.imag,\
tweeter.magnitude_db,tweeter.phase_deg,tweeter.real,tweeter.imag,\
load.magnitude_db,load.phase_deg,load.real_ohm,load.imag_ohm"
    );
    let rows: Vec<&str> = lines.collect();
    assert_eq!(rows.len(), 11);
    assert!(rows[0].starts_with("100.0,"));
    assert!(rows[10].starts_with("1100.0,"));
    // The figures go to stderr so the CSV stays clean.
    assert!(String::from_utf8_lossy(&out.get_output().stderr).contains("woofer"));
}

#[test]
fn json_figures_for_scripts() {
    let path = root().join("sweeps/vibration-bandpass.toml");
    let tmp = tempfile::tempdir().unwrap();
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args([
            "sweep",
            path.to_str().unwrap(),
            "--json",
            "-",
            "--only",
            "gain",
            "-o",
        ])
        .arg(tmp.path())
        .assert()
        .success();
    // The JSON alone on stdout (the table goes to stderr).
    let text = String::from_utf8_lossy(&out.get_output().stdout).to_string();
    let v: serde_json::Value = serde_json::from_str(&text).unwrap();
    let g = &v["responses"][0];
    assert_eq!(g["response"], "gain");
    let f0 = g["peaks"][0]["freq_hz"].as_f64().unwrap();
    assert!(f0 > 100.0 && f0 < 140.0);
    assert!(g["lower_cutoff_hz"].as_f64().unwrap() < f0);
}

#[test]
fn a_failed_run_leaves_the_previous_files_intact() {
    let tmp = tempfile::tempdir().unwrap();
    let good = root().join("sweeps/soil-probe-antialias.toml");
    Command::cargo_bin("analyzer")
        .unwrap()
        .args(["sweep", good.to_str().unwrap(), "-o"])
        .arg(tmp.path())
        .assert()
        .success();
    let before = std::fs::read(tmp.path().join("gain.csv")).unwrap();
    // Same responses, but a network that fails at solve time (a floating node).
    let text = std::fs::read_to_string(&good).unwrap().replace(
        "[responses]",
        "Rx = { resistor = \"1k\", between = [\"x\", \"y\"] }\n[responses]",
    );
    let bad = tmp.path().join("bad.toml");
    std::fs::write(&bad, text).unwrap();
    Command::cargo_bin("analyzer")
        .unwrap()
        .args(["sweep", bad.to_str().unwrap(), "-o"])
        .arg(tmp.path())
        .assert()
        .code(2);
    assert_eq!(std::fs::read(tmp.path().join("gain.csv")).unwrap(), before);
    let leftovers: Vec<_> = std::fs::read_dir(tmp.path())
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().ends_with(".part"))
        .collect();
    assert!(leftovers.is_empty());
}

#[test]
fn help_describes_every_subcommand() {
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .arg("--help")
        .assert()
        .success();
    let text = String::from_utf8_lossy(&out.get_output().stdout).to_string();
    for w in ["sweep", "check", "Exit codes"] {
        assert!(text.contains(w), "{w}");
    }
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args(["sweep", "--help"])
        .assert()
        .success();
    let text = String::from_utf8_lossy(&out.get_output().stdout).to_string();
    for w in [
        "--output",
        "--from",
        "--to",
        "--per-decade",
        "--points",
        "--only",
        "--delay",
        "--json",
        "--level",
        "--reference",
    ] {
        assert!(text.contains(w), "{w}");
    }
}

#[test]
fn a_failed_limit_exits_one_and_still_writes_the_outputs() {
    let tmp = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string(root().join("sweeps/soil-probe-antialias.toml"))
        .unwrap()
        .replace("max_db = -25", "max_db = -40");
    let design = tmp.path().join("strict.toml");
    std::fs::write(&design, text).unwrap();
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args(["sweep", design.to_str().unwrap(), "-o"])
        .arg(tmp.path().join("o"))
        .assert()
        .code(1);
    let o = out.get_output();
    assert_eq!(
        String::from_utf8_lossy(&o.stderr),
        "check failed: alias_band\n"
    );
    assert!(String::from_utf8_lossy(&o.stdout)
        .contains("alias_band        gain ≤ -40 dB over 50.000 kHz … 1.0000 MHz: FAIL"));
    assert!(tmp.path().join("o/gain.csv").exists());
}

#[test]
fn an_unwritable_output_exits_three_and_leaves_nothing() {
    let tmp = tempfile::tempdir().unwrap();
    // A directory cannot be made below a plain file.
    let blocker = tmp.path().join("plain-file");
    std::fs::write(&blocker, "x").unwrap();
    let good = root().join("sweeps/soil-probe-antialias.toml");
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args(["sweep", good.to_str().unwrap(), "-o"])
        .arg(blocker.join("out"))
        .assert()
        .code(3);
    let stderr = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert!(stderr.starts_with("error: "), "{stderr}");
    assert!(stderr.contains("plain-file"), "{stderr}");
    assert_eq!(std::fs::read_to_string(&blocker).unwrap(), "x");
}

#[test]
fn check_summarises_a_design() {
    let good = root().join("sweeps/vibration-bandpass.toml");
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args(["check", good.to_str().unwrap()])
        .assert()
        .success();
    let text = String::from_utf8_lossy(&out.get_output().stdout).to_string();
    assert!(
        text.contains("Band-pass for a pump-bearing vibration sensor"),
        "{text}"
    );
    assert!(
        text.contains("9 parts, 6 nodes besides gnd, 9 unknowns"),
        "{text}"
    );
    assert!(text.contains("responses: gain, zin"), "{text}");
    assert!(
        text.contains("sweep: 1.0000 Hz … 100.00 kHz, 501 points, log"),
        "{text}"
    );
}

#[test]
fn check_applies_the_zero_hertz_checks_when_the_sweep_includes_dc() {
    let bad =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bad/topology_capacitor_cutset_dc.toml");
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args(["check", bad.to_str().unwrap()])
        .assert()
        .code(2);
    let o = out.get_output();
    assert!(o.stdout.is_empty());
    let stderr = String::from_utf8_lossy(&o.stderr).to_string();
    assert!(stderr.ends_with(": node out has no path to gnd at 0 Hz: it is reached only through capacitor(s) C0, C1, which are open there; start the sweep above 0 Hz or add a DC path (e.g. a large resistor to gnd)\n"), "{stderr}");
}

/// Every `--solver` path gives the same numbers on every example design (the real binary,
/// CSV to stdout), and the summary names the path that ran.
#[test]
fn every_solver_path_gives_the_same_csv() {
    let parse = |text: &str| -> Vec<Vec<f64>> {
        text.lines()
            .skip(1)
            .map(|l| l.split(',').map(|x| x.parse().unwrap()).collect())
            .collect()
    };
    for path in designs() {
        let run = |solver: &str| {
            let out = Command::cargo_bin("analyzer")
                .unwrap()
                .args(["sweep", path.to_str().unwrap(), "-o", "-", "--points", "97"])
                .args(["--solver", solver])
                .assert()
                .success();
            let o = out.get_output();
            (
                parse(&String::from_utf8_lossy(&o.stdout)),
                String::from_utf8_lossy(&o.stderr).to_string(),
            )
        };
        let (reference, _) = run("dense");
        for (solver, shown) in [
            ("small", None),
            ("band", Some("Band solver")),
            ("sparse", Some("Sparse solver")),
            ("auto", None),
        ] {
            let (rows, summary) = run(solver);
            if let Some(s) = shown {
                assert!(summary.contains(s), "{solver}: {summary}");
            }
            assert_eq!(rows.len(), reference.len());
            for (a, b) in rows.iter().zip(&reference) {
                // Columns: f, then per response dB, phase, re, im. Compare re and im
                // against the response's magnitude.
                for r in 0..(a.len() - 1) / 4 {
                    let (re, im) = (1 + 4 * r + 2, 1 + 4 * r + 3);
                    let mag = b[re].hypot(b[im]);
                    let d = (a[re] - b[re]).hypot(a[im] - b[im]);
                    assert!(
                        d <= 1e-9 * mag,
                        "{} --solver {solver} at {} Hz: {d} vs |H| {mag}",
                        path.display(),
                        a[0]
                    );
                }
            }
        }
    }
}

/// Values far outside the usual range of their kind are warned about, with the likely slip,
/// and used as written; a unit after a prefix reads with or without a space.
#[test]
fn unusual_values_are_warned_about_and_kept() {
    let tmp = tempfile::tempdir().unwrap();
    let design = tmp.path().join("slips.toml");
    std::fs::write(
        &design,
        r#"title = "slips"
[sweep]
from = "10 Hz"
to = "100 kHz"
per_decade = 10
[parts]
V1 = { voltage = "1 V", between = ["in", "gnd"] }
R1 = { resistor = "1m", between = ["in", "out"] }
C1 = { capacitor = "100", between = ["out", "gnd"] }
R2 = { resistor = "1k ohm", between = ["out", "gnd"] }
C2 = { capacitor = "100n F", between = ["out", "gnd"] }
[responses]
gain = { ratio = ["out", "in"] }
"#,
    )
    .unwrap();
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args(["sweep", design.to_str().unwrap(), "-o"])
        .arg(tmp.path().join("o"))
        .assert()
        .success();
    let stderr = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    let d = design.display();
    assert_eq!(
        stderr,
        format!(
            "warning: {d}:8:19: part R1: 1 mΩ is outside the usual 10 mΩ … 1 GΩ of a resistor; it is used as written (m is milli; for mega write M)\n\
warning: {d}:9:20: part C1: 100 F is outside the usual 100 fF … 1 F of a capacitor; it is used as written (is a prefix missing?)\n"
        )
    );
    // -q keeps stderr for errors.
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args(["sweep", design.to_str().unwrap(), "-q", "-o"])
        .arg(tmp.path().join("o"))
        .assert()
        .success();
    assert!(out.get_output().stderr.is_empty());
}

/// `check` runs what a sweep checks before writing (a trial solve finds an op-amp without
/// feedback), lists the parts as read, and shows the safety caution where it applies.
#[test]
fn check_lists_the_parts_and_finds_what_a_sweep_would() {
    let bad =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bad/topology_opamp_output_free.toml");
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args(["check", bad.to_str().unwrap()])
        .assert()
        .code(2);
    let stderr = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert!(stderr.ends_with(": the network is singular at 10.000 Hz: no solution determines the output of op-amp U1; give the op-amp feedback from its output to an input\n"), "{stderr}");
    let mains = root().join("sweeps/mains-line-filter.toml");
    let out = Command::cargo_bin("analyzer")
        .unwrap()
        .args(["check", mains.to_str().unwrap()])
        .assert()
        .success();
    let text = String::from_utf8_lossy(&out.get_output().stdout).to_string();
    for line in [
        "    Cx1             capacitor       100.00 nF             L1 – N1",
        "    choke_coupling  coupling        k 0.995 (Lc1, Lc2)",
        "caution: this design names a mains-connected, high-voltage or medical use.",
    ] {
        assert!(text.contains(line), "{line}\n{text}");
    }
}

/// The README's design block is the example file the README's command runs.
#[test]
fn the_readme_shows_the_real_example() {
    let readme = std::fs::read_to_string(root().join("README.md")).unwrap();
    let file = std::fs::read_to_string(root().join("sweeps/soil-probe-antialias.toml")).unwrap();
    assert!(
        readme.contains(&format!("```toml\n{file}```")),
        "README.md's design block differs from sweeps/soil-probe-antialias.toml"
    );
}
