//! `analyzer spread` and `analyzer merge` through the real binary: a study run in four shards
//! and merged writes the very files one run writes.

use assert_cmd::Command;
use std::path::{Path, PathBuf};

fn analyzer() -> Command {
    Command::cargo_bin("analyzer").expect("binary")
}

fn example() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../sweeps/soil-probe-antialias.toml")
}

#[test]
fn four_shards_merged_write_what_one_run_writes() {
    let tmp = tempfile::tempdir().unwrap();
    let whole = tmp.path().join("whole");
    analyzer()
        .args(["spread", "--samples", "240", "--seed", "5", "-q", "-o"])
        .arg(&whole)
        .arg(example())
        .assert()
        .success();
    let mut dirs = Vec::new();
    for k in 0..4 {
        let d = tmp.path().join(format!("shard{k}"));
        analyzer()
            .args([
                "spread",
                "--samples",
                "240",
                "--seed",
                "5",
                "-q",
                "--threads",
                "1",
            ])
            .args(["--shard", &format!("{k}/4"), "-o"])
            .arg(&d)
            .arg(example())
            .assert()
            .success();
        dirs.push(d);
    }
    let merged = tmp.path().join("merged");
    // Missing a shard: refused, naming it.
    let out = analyzer()
        .args(["merge", "-o"])
        .arg(&merged)
        .args(&dirs[..3])
        .assert()
        .code(2);
    let err = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert!(err.contains("shards 3/4 are missing"), "{err}");
    assert!(!merged.exists());
    analyzer()
        .args(["merge", "-q", "-o"])
        .arg(&merged)
        .args(&dirs)
        .assert()
        .success();
    for f in [
        "samples.csv",
        "spread.json",
        "gain-envelope.csv",
        "gain-envelope.svg",
        "zin-envelope.csv",
    ] {
        let a = std::fs::read(whole.join(f)).unwrap();
        let b = std::fs::read(merged.join(f)).unwrap();
        assert!(a == b, "{f} differs between one run and four merged shards");
    }
    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(whole.join("spread.json")).unwrap()).unwrap();
    assert_eq!(summary["samples"], 240);
    assert!(summary["overall"]["wilson_low"].as_f64().unwrap() <= 1.0);
}

#[test]
fn bad_spread_arguments_say_what_is_expected() {
    let out = analyzer()
        .args(["spread", "--shard", "4/4"])
        .arg(example())
        .assert()
        .code(2);
    let err = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert_eq!(
        err,
        "error: --shard 4/4: expected K/M with 0 ≤ K < M, e.g. 0/4 … 3/4 for four shards\n"
    );
    let tmp = tempfile::tempdir().unwrap();
    let design = tmp.path().join("plain.toml");
    std::fs::write(
        &design,
        "[sweep]\nfrom = \"1k\"\nto = \"10k\"\n[parts]\nV1 = { voltage = \"1\", between = [\"a\", \"gnd\"] }\nR1 = { resistor = \"1k\", between = [\"a\", \"b\"] }\nR2 = { resistor = \"1k\", between = [\"b\", \"gnd\"] }\n[responses]\ng = { ratio = [\"b\", \"a\"] }\n",
    )
    .unwrap();
    let out = analyzer()
        .args(["spread", "-o"])
        .arg(tmp.path().join("o"))
        .arg(&design)
        .assert()
        .code(2);
    let err = String::from_utf8_lossy(&out.get_output().stderr).to_string();
    assert!(err.ends_with("plain.toml: no part has a tolerance: give parts one (tolerance = \"1%\") or set defaults per kind in a [tolerances] table\n"), "{err}");
    assert!(!tmp.path().join("o").exists());
}
