//! The catalogue of bad inputs: each design in tests/bad/ and each bad argument list must give
//! exit code 2, exactly its error text on stderr, nothing on stdout, no panic and no output.

use assert_cmd::Command;
use std::path::Path;

/// (design file in tests/bad/, the error text after "error: bad/NAME.toml").
const DESIGNS: &[(&str, &str)] = &[
    ("value_double_prefix", ":8:19: part R1: two prefixes in \"1kk\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_empty", ":8:19: part R1: empty value in \"\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_overflow", ":8:19: part R1: magnitude above 1e30 in \"1e999\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_nan", ":8:19: part R1: no digits in \"NaN\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_dash", ":8:19: part R1: no digits in \"-\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_letter_code_prefix", ":8:19: part R1: a prefix after the letter code in \"4k7k\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_meg", ":8:19: part R1: \"meg\" is not a prefix here: write M for mega (1M) or m for milli (1m) in \"1meg\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_unit_after_prefix", ":8:19: part R1: unit \"F\" does not fit a resistance (use Ω, ohm or R or no unit) in \"4.7 kF\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_wrong_unit", ":8:19: part R1: unit \"Hz\" does not fit a resistance (use Ω, ohm or R or no unit) in \"1 kHz\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_negative_resistance", ":8:19: R1: resistance must be positive and finite, got -1000"),
    ("value_zero_capacitance", ":9:20: C1: capacitance must be positive and finite, got 0"),
    ("value_too_large", ":8:19: part R1: magnitude above 1e30 in \"1e31\"; expected a resistance such as 4k7, 10 kΩ or 1R5"),
    ("value_too_small", ":9:20: part C1: magnitude below 1e-30 in \"1e-31\"; expected a capacitance such as 2n2, 100 nF or 1e-9"),
    ("value_tolerance_no_percent", ":8:62: part R1: a tolerance needs the % sign in \"1\"; expected a percentage such as 1%, 0.5 % or 5%"),
    ("value_float_inf", ":8:19: part R1: inf is not a finite number"),
    ("toml_unclosed_string", ":8:36: missing comma between key-value pairs; expected `,`"),
    ("toml_missing_equals", ":8:4: key with no value; expected `=`"),
    ("toml_duplicate_key", ":9:6: part name \"R1\" is used twice; give each part its own name"),
    ("toml_bad_table", ":12:7: unclosed table; expected `]`"),
    ("schema_unknown_top_key", ":1:1: unknown key `colour`, expected one of `title`, `caution`, `temperature`, `tolerances`, `sweep`, `parts`, `responses`, `limits`, `ports`"),
    ("schema_unknown_part_key", ":8:50: unknown part kind or key `colour`; a part takes one kind (resistor, capacitor, inductor, voltage, current, vcvs, vccs, ccvs, cccs, opamp, coupling) and the keys of that kind (the README's table of part kinds lists them)"),
    ("schema_unknown_kind", ":8:8: unknown part kind or key `diode`; a part takes one kind (resistor, capacitor, inductor, voltage, current, vcvs, vccs, ccvs, cccs, opamp, coupling) and the keys of that kind (the README's table of part kinds lists them)"),
    ("schema_no_kind", ":8:6: part R1 has no kind; give one of resistor, capacitor, inductor, voltage, current, vcvs, vccs, ccvs, cccs, opamp, coupling"),
    ("schema_two_kinds", ":8:25: part R1 has two kinds (resistor and capacitor); give exactly one"),
    ("schema_three_nodes", ":8:35: between takes two node names, e.g. [\"a\", \"gnd\"]; got 3"),
    ("schema_key_not_for_kind", ":8:50: key k does not apply to a resistor (part R1); it takes between, tolerance, distribution"),
    ("schema_no_parts", ":1:1: the design has no [parts] table; add the network's parts"),
    ("schema_no_responses", ":1:1: the design has no [responses]; name at least one, e.g. gain = { ratio = [\"out\", \"in\"] }"),
    ("schema_response_unknown_node", ":11:18: response gain reads node \"outt\", which no part connects to (nodes: gnd, in, out)"),
    ("schema_response_unknown_part", ":11:18: response gain reads the current of \"R9\", which is not a part of this design"),
    ("schema_response_two_kinds", ":11:8: response gain needs exactly one of ratio, impedance, admittance or noise"),
    ("schema_response_same", ":11:8: response gain: numerator and denominator are the same"),
    ("schema_coupling_k_range", ":11:48: coil_coupling: coupling coefficient k = 1.5 is outside 0 < k ≤ 1"),
    ("schema_coupling_missing", ":10:17: coil_coupling: coupled inductor \"L9\" is not a part of this design"),
    ("schema_coupling_not_inductor", ":10:17: coil_coupling: coupled inductor \"R1\" is a resistor, expected an inductor"),
    ("schema_control_missing", ":9:10: mirror: control \"V9\" is not a part of this design"),
    ("schema_control_wrong_shape", ":9:63: part buffer_gain (vcvs) senses a voltage: control takes two node names, e.g. [\"in\", \"gnd\"]"),
    ("schema_opamp_model", ":9:16: unknown op-amp model \"magic\"; use \"ideal\" or \"single-pole\""),
    ("schema_opamp_missing_gbw", ":9:6: op-amp U1 (single-pole) needs gbw, e.g. gbw = \"10 MHz\""),
    ("schema_shorted_part", ":8:6: R1: both ends are on node \"out\"; connect it between two different nodes"),
    ("schema_sweep_two_spacings", ":6:10: give only one of per_decade (log), points (linear) or at (a list)"),
    ("schema_sweep_reversed", ":3:8: the sweep ends (1 Hz) below where it starts (10 Hz)"),
    ("schema_sweep_log_from_zero", ":3:8: a log-spaced sweep must start above 0 Hz (got 0 Hz); use a list or a linear sweep to include 0 Hz"),
    ("schema_sweep_too_many", ":3:8: the sweep would have 400000001 points, more than the limit of 100000000; lower the density or narrow the range"),
    ("schema_sweep_list_order", ":3:6: the frequency list is not in ascending order at 100 Hz"),
    ("topology_floating", ": nodes x, y have no path to gnd: connect them to the rest of the network or to gnd"),
    ("topology_source_loop", ": parts V1, V2 form a loop of voltage sources: the loop voltage is fixed twice; put a resistance in the loop"),
    ("topology_current_cutset", ": node x has no path to gnd: current source(s) I1 form a cut-set, so the voltage there is undetermined; add a resistor from it to gnd"),
    ("topology_capacitor_cutset_dc", ": node out has no path to gnd at 0 Hz: it is reached only through capacitor(s) C0, C1, which are open there; start the sweep above 0 Hz or add a DC path (e.g. a large resistor to gnd)"),
    ("topology_inductor_loop_dc", ": parts L1, V1 form a loop of voltage sources and inductors (shorts at 0 Hz): the loop voltage is fixed twice; put a resistance in the loop or start the sweep above 0 Hz"),
    ("topology_opamp_output_free", ": the network is singular at 10.000 Hz: no solution determines the output of op-amp U1; give the op-amp feedback from its output to an input"),
    ("topology_opamp_grounded_output", ":9:6: U1: the output is on gnd; an op-amp output must drive a node of its own"),
    ("numeric_zero_denominator", ": response \"gain\": the denominator is zero at 10.000 Hz, so the ratio has no value there"),
    ("numeric_ratio_without_source", ":11:8: response gain is a ratio, which needs an independent source in [parts]; add one"),
    ("schema_limit_unknown_response", ":13:21: limit pass checks response \"gian\", which the design does not define (it has: gain)"),
    ("schema_limit_no_bound", ":13:8: limit pass needs min_db, max_db or both"),
    ("port_replaces_resistor", ":13:46: port p1 replaces R1, a resistor that is not across the port's nodes; a port replaces a source, or the termination resistor across its own nodes"),
    ("port_unknown_node", ":13:18: port p1 is on node \"outt\", which no part connects to (nodes: gnd, in, out)"),
    ("port_negative_z0", ":13:39: port p1: z0 must be a positive real impedance in ohms, e.g. \"50\""),
    ("port_unknown_key", ":13:34: unknown key `impedance`, expected one of `between`, `z0`, `replaces`"),
    ("port_same_nodes", ":13:18: port p1: the two nodes are the same"),
    ("tolerance_too_wide", ":9:62: R1: tolerance 150% is outside 0 % … 100 % (a value must stay positive); write e.g. \"1%\""),
    ("tolerance_negative", ":9:62: R1: tolerance -1% is outside 0 % … 100 % (a value must stay positive); write e.g. \"1%\""),
    ("tolerance_not_percent", ":9:62: part R1: write a tolerance as text with a % sign, e.g. \"1%\""),
    ("tolerance_distribution_alone", ":9:65: part R1: distribution applies to a tolerance; give tolerance = \"1%\" (or the like) too"),
    ("tolerance_distribution_unknown", ":9:83: part R1: distribution: unknown distribution \"gaussian\"; use \"uniform\" (every value inside ±tolerance, equally likely) or \"normal\" (σ = tolerance/3, cut at ±tolerance)"),
    ("tolerance_table_unknown_key", ":7:1: unknown key `resistors`, expected one of `resistor`, `capacitor`, `inductor`, `controlled`, `dc_gain`, `gbw`, `distribution`"),
    ("tolerance_ideal_opamp", ":10:94: an ideal op-amp has no values to vary; gbw_tolerance applies to opamp = \"single-pole\""),
];

fn analyzer() -> Command {
    let mut c = Command::cargo_bin("analyzer").expect("binary");
    c.current_dir(Path::new(env!("CARGO_MANIFEST_DIR")).join("tests"));
    c
}

#[test]
fn every_bad_design_gives_its_message_and_no_output() {
    assert!(DESIGNS.len() >= 40);
    let tmp = tempfile::tempdir().unwrap();
    for (name, rest) in DESIGNS {
        let out = tmp.path().join(name);
        let assert = analyzer()
            .args(["sweep", &format!("bad/{name}.toml"), "-o"])
            .arg(&out)
            .assert()
            .code(2);
        let o = assert.get_output();
        let stderr = String::from_utf8_lossy(&o.stderr);
        assert_eq!(
            stderr,
            format!("error: bad/{name}.toml{rest}\n"),
            "case {name}"
        );
        assert!(o.stdout.is_empty(), "case {name} printed to stdout");
        assert!(!stderr.contains("panicked"), "case {name}");
        assert!(
            !out.exists(),
            "case {name} left output at {}",
            out.display()
        );
    }
}

#[test]
fn every_bad_design_file_is_in_the_catalogue() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bad");
    for entry in std::fs::read_dir(dir).unwrap() {
        let p = entry.unwrap().path();
        let stem = p.file_stem().unwrap().to_string_lossy().to_string();
        assert!(
            DESIGNS.iter().any(|(n, _)| *n == stem),
            "{stem} has no expected message"
        );
    }
}

const GOOD: &str = "../../sweeps/soil-probe-antialias.toml";

#[test]
fn bad_arguments_give_their_message() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("o");
    let out_s = out.to_string_lossy().to_string();
    let cases: &[(&[&str], &str)] = &[
        (&["sweep", GOOD, "--from", "ten", "-o", &out_s], "error: --from: no digits in \"ten\"; expected a frequency such as 1 kHz, 2.5MHz or 50\n"),
        (&["sweep", GOOD, "--to", "1 kΩ", "-o", &out_s], "error: --to: unit \"Ω\" does not fit a frequency (use Hz or no unit) in \"1 kΩ\"; expected a frequency such as 1 kHz, 2.5MHz or 50\n"),
        (&["sweep", GOOD, "--only", "gian", "-o", &out_s], "error: --only: the design has no response \"gian\" (it has: gain, zin)\n"),
        (&["sweep", GOOD, "--threads", "0", "-o", &out_s], "error: --threads must be at least 1\n"),
        (&["sweep", GOOD, "--points", "1", "-o", &out_s], "error: ../../sweeps/soil-probe-antialias.toml: sweep: the sweep needs at least 2 points, got 1\n"),
        (&["sweep", GOOD, "--per-decade", "0.5", "-o", &out_s], "error: ../../sweeps/soil-probe-antialias.toml: sweep: the sweep needs at least 1 point per decade, got 0.5\n"),
        (&["sweep", GOOD, "--reference", "loud", "-o", &out_s], "error: --reference: reference \"loud\" is not one of auto, dc, hf, peak, absolute or a frequency such as 1 kHz\n"),
        (&["sweep", GOOD, "--reference", "1 kΩ", "-o", &out_s], "error: --reference: unit \"Ω\" does not fit a frequency (use Hz or no unit) in \"1 kΩ\"; expected a frequency such as 1 kHz, 2.5MHz or 50\n"),
        (&["sweep", GOOD, "-o", "-", "--json", "-"], "error: -o - and --json - would both write to stdout; send one of them to a file (e.g. --json figures.json)\n"),
        (&["sweep", GOOD, "-o", "bad/value_nan.toml"], "error: -o bad/value_nan.toml: that is a file; -o takes a directory for RESPONSE.csv and RESPONSE.svg (made if missing), or - for CSV on stdout\n"),
        (&["sweep", "bad/does-not-exist.toml", "-o", &out_s], "error: bad/does-not-exist.toml: No such file or directory (os error 2)\n"),
    ];
    for (args, expected) in cases {
        let assert = analyzer().args(*args).assert().code(2);
        let stderr = String::from_utf8_lossy(&assert.get_output().stderr).to_string();
        assert_eq!(&stderr, expected, "args {args:?}");
        assert!(!out.exists());
    }
    // A design file over the 64 MiB limit is refused before it is read (a sparse file).
    let big = tmp.path().join("huge.toml");
    std::fs::File::create(&big)
        .unwrap()
        .set_len(65 * 1024 * 1024)
        .unwrap();
    let assert = analyzer()
        .args(["sweep", big.to_str().unwrap(), "-o", &out_s])
        .assert()
        .code(2);
    let stderr = String::from_utf8_lossy(&assert.get_output().stderr).to_string();
    assert_eq!(
        stderr,
        format!(
            "error: {}: the file is 68157440 bytes, more than the limit of 64 MiB for a design\n",
            big.display()
        )
    );
    // Usage errors come from the argument parser, also with exit code 2.
    for args in [
        &["sweep"][..],
        &["sweep", GOOD, "--no-such-flag"],
        &["frobnicate"],
    ] {
        let assert = analyzer().args(args).assert().code(2);
        let stderr = String::from_utf8_lossy(&assert.get_output().stderr).to_string();
        assert!(stderr.starts_with("error: "), "{args:?}: {stderr}");
        assert!(stderr.contains("Usage:"), "{args:?}: {stderr}");
    }
}
