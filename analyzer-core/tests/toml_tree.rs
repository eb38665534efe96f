//! The design file's TOML tree (toml_parser's events assembled by `design::tree`) against a
//! general-purpose reference, the `toml` crate's own document type: on random documents
//! built to collide (few key names, dotted keys, headers, arrays of tables, inline tables),
//! both accept with the same content or both refuse.

use analyzer_core::fuzz_targets::toml_tree;
use proptest::prelude::*;

fn show(v: &toml::Value) -> String {
    match v {
        toml::Value::String(s) => format!("{s:?}"),
        toml::Value::Integer(i) => i.to_string(),
        toml::Value::Float(f) => format!("{f:?}"),
        toml::Value::Boolean(b) => b.to_string(),
        toml::Value::Datetime(_) => "?".into(),
        toml::Value::Array(a) => {
            let inner: Vec<String> = a.iter().map(show).collect();
            format!("[{}]", inner.join(","))
        }
        toml::Value::Table(t) => table(t),
    }
}

fn table(t: &toml::Table) -> String {
    let mut inner: Vec<(String, String)> =
        t.iter().map(|(k, v)| (format!("{k:?}"), show(v))).collect();
    inner.sort();
    let inner: Vec<String> = inner.into_iter().map(|(k, v)| format!("{k}={v}")).collect();
    format!("{{{}}}", inner.join(","))
}

fn key() -> impl Strategy<Value = String> {
    prop_oneof![
        Just("a".to_string()),
        Just("b".to_string()),
        Just("c-1".to_string()),
        Just("\"a\"".to_string()),
        Just("'b'".to_string()),
        Just("\"q x\"".to_string()),
        Just("\"\\u0061\"".to_string()),
    ]
}

fn dotted() -> impl Strategy<Value = String> {
    prop::collection::vec(key(), 1..3).prop_map(|k| k.join("."))
}

fn scalar() -> impl Strategy<Value = String> {
    prop_oneof![
        (-5i64..5).prop_map(|i| i.to_string()),
        Just("1_000".to_string()),
        Just("0x1f".to_string()),
        Just("2.5e-3".to_string()),
        Just("inf".to_string()),
        Just("true".to_string()),
        Just("\"10 kΩ\"".to_string()),
        Just("\"tab\\there\"".to_string()),
        Just("'lit\\eral'".to_string()),
        Just("\"bad\\q\"".to_string()),
        Just("1979-05-27".to_string()),
    ]
}

fn value() -> impl Strategy<Value = String> {
    let leaf = scalar();
    leaf.prop_recursive(2, 8, 3, |inner| {
        prop_oneof![
            prop::collection::vec(inner.clone(), 0..3).prop_map(|v| format!("[{}]", v.join(", "))),
            prop::collection::vec((dotted(), inner), 0..3).prop_map(|kv| {
                let kv: Vec<String> = kv.into_iter().map(|(k, v)| format!("{k} = {v}")).collect();
                format!("{{ {} }}", kv.join(", "))
            }),
        ]
    })
}

fn line() -> impl Strategy<Value = String> {
    prop_oneof![
        3 => (dotted(), value()).prop_map(|(k, v)| format!("{k} = {v}")),
        1 => dotted().prop_map(|k| format!("[{k}]")),
        1 => dotted().prop_map(|k| format!("[[{k}]]")),
        1 => Just("# a comment".to_string()),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 2000, ..ProptestConfig::default() })]

    #[test]
    fn the_tree_reads_what_the_reference_reads(lines in prop::collection::vec(line(), 0..8)) {
        let text = lines.join("\n") + "\n";
        let ours = toml_tree(&text);
        let reference = text.parse::<toml::Table>().map(|t| table(&t));
        match (&ours, &reference) {
            (Ok(a), Ok(b)) => prop_assert_eq!(a, b, "{}", text),
            (Err(_), Err(_)) => {}
            _ => prop_assert!(false, "ours {:?}, reference {:?} on\n{}", ours, reference.map_err(|e| e.to_string()), text),
        }
    }
}

/// The generator is not trivial: both outcomes occur, and known collisions are refused.
#[test]
fn random_documents_are_both_accepted_and_refused() {
    use proptest::strategy::ValueTree;
    let mut runner = proptest::test_runner::TestRunner::deterministic();
    let (mut ok, mut err) = (0, 0);
    for _ in 0..500 {
        let lines = prop::collection::vec(line(), 0..8)
            .new_tree(&mut runner)
            .unwrap()
            .current();
        match toml_tree(&(lines.join("\n") + "\n")) {
            Ok(_) => ok += 1,
            Err(_) => err += 1,
        }
    }
    assert!(ok > 50 && err > 50, "accepted {ok}, refused {err}");
    assert!(toml_tree("a.b = 1\n[a]\n").is_err());
    assert_eq!(toml_tree("\"a\" = 1\n").unwrap(), "{\"a\"=1}");
}
