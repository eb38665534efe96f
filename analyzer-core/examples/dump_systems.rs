//! Writes the very matrices the benches solve, for the side-by-side reference timing in
//! `benches/reference/compare.py`: per system a text file with `n`, then the entries
//! `row col g c` of G and C (A(ω) = G + jωC), then the right-hand side `re im` per row.
//! Run: `cargo run --release -p analyzer-core --example dump_systems DIR`, or
//! `… dump_systems DIR DESIGN.toml NAME` to write only the system of a design file.

use analyzer_core::ladders::{butterworth_ladder, ladder_gain, rlc_ladder};
use analyzer_core::stamp::System;
use std::io::Write;

fn main() -> std::io::Result<()> {
    let dir = std::env::args().nth(1).unwrap_or_else(|| "systems".into());
    std::fs::create_dir_all(&dir)?;
    if let (Some(design), Some(name)) = (std::env::args().nth(2), std::env::args().nth(3)) {
        let text = std::fs::read_to_string(&design)?;
        let d = analyzer_core::design::parse(&text).map_err(std::io::Error::other)?;
        return write(&dir, &name, &d.network);
    }
    let mut nets = vec![(
        "u3".to_string(),
        rlc_ladder(0, 1.0, 1.0, 1.0, 50.0, 50.0).map_err(std::io::Error::other)?,
    )];
    for order in [1, 3, 5, 7, 13, 29] {
        let (net, _) = butterworth_ladder(order, 50.0, 1e3).map_err(std::io::Error::other)?;
        let n = System::assemble(&net).n;
        nets.push((format!("u{n}"), net));
    }
    for s in [1_000, 10_000, 100_000] {
        let net = rlc_ladder(s, 1e-4, 1e-8, 1e-11, 50.0, 50.0).map_err(std::io::Error::other)?;
        assert!(ladder_gain(&net, s).is_some());
        nets.push((format!("ladder{s}"), net));
    }
    for (name, net) in nets {
        write(&dir, &name, &net)?;
    }
    Ok(())
}

fn write(dir: &str, name: &str, net: &analyzer_core::network::Network) -> std::io::Result<()> {
    {
        let sys = System::assemble(net);
        let path = format!("{dir}/{name}.txt");
        let mut f = std::io::BufWriter::new(std::fs::File::create(&path)?);
        writeln!(f, "{} {}", sys.n, sys.pattern.len())?;
        for (k, &(r, c)) in sys.pattern.iter().enumerate() {
            writeln!(f, "{r} {c} {:e} {:e}", sys.g[k], sys.c[k])?;
        }
        for b in &sys.b {
            writeln!(f, "{:e} {:e}", b.re, b.im)?;
        }
        println!("wrote {path} ({} unknowns)", sys.n);
    }
    Ok(())
}
