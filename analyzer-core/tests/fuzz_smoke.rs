//! A short deterministic run of the fuzz targets (the same bodies `cargo fuzz` runs, see
//! fuzz/): the committed seed corpus, then seeded mutations of it. Any panic fails the test.

use analyzer_core::fuzz_targets;
use std::path::Path;

fn corpus(name: &str) -> Vec<Vec<u8>> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../fuzz/corpus")
        .join(name);
    let mut v: Vec<(String, Vec<u8>)> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| {
            let p = e.unwrap().path();
            (p.display().to_string(), std::fs::read(&p).unwrap())
        })
        .collect();
    v.sort();
    v.into_iter().map(|(_, b)| b).collect()
}

/// xorshift64*: a fixed sequence, so the run is the same on every machine.
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n.max(1) as u64) as usize
    }
}

const TOKENS: &[&[u8]] = &[
    b"\"",
    b"=",
    b"[",
    b"]",
    b"{",
    b"}",
    b",",
    b"\n",
    b"gnd",
    b"k",
    b"e9",
    b"-",
    b"0",
    b"1e31",
    b"resistor",
    b"inductor",
    b"coupling",
    b"opamp",
    b"ratio",
    b"between",
    b"control",
    b"at",
];

fn mutate(rng: &mut Rng, seed: &[u8], other: &[u8]) -> Vec<u8> {
    let mut v = seed.to_vec();
    for _ in 0..1 + rng.below(4) {
        let at = rng.below(v.len() + 1);
        match rng.below(5) {
            0 if !v.is_empty() => {
                let i = at.min(v.len() - 1);
                v[i] = rng.next() as u8;
            }
            1 if !v.is_empty() => {
                let end = (at + 1 + rng.below(8)).min(v.len());
                v.drain(at.min(end)..end);
            }
            2 => {
                let t = TOKENS[rng.below(TOKENS.len())];
                v.splice(at..at, t.iter().copied());
            }
            3 if !other.is_empty() => {
                let from = rng.below(other.len());
                let len = rng.below(64).min(other.len() - from);
                v.splice(at..at, other[from..from + len].iter().copied());
            }
            _ => {
                let t = rng.next().to_le_bytes();
                v.splice(at..at, t[..1 + rng.below(7)].iter().copied());
            }
        }
    }
    v
}

fn run(name: &str, target: fn(&[u8]), mutations: usize) {
    let seeds = corpus(name);
    assert!(!seeds.is_empty());
    for s in &seeds {
        target(s);
    }
    let mut rng = Rng(0x9e37_79b9_7f4a_7c15);
    for _ in 0..mutations {
        let a = &seeds[rng.below(seeds.len())];
        let b = &seeds[rng.below(seeds.len())];
        target(&mutate(&mut rng, a, b));
    }
}

#[test]
fn value_target_survives_the_corpus_and_its_mutations() {
    run("value", fuzz_targets::value, 50_000);
}

#[test]
fn design_target_survives_the_corpus_and_its_mutations() {
    run("design", fuzz_targets::design, 3_000);
}
