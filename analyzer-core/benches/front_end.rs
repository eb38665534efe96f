//! The front end on a very large design: read (TOML → tree → checked network), check the
//! topology and assemble, prepare the solver, and solve, each timed apart (fastest of
//! several runs; this shared VM only ever adds time).
//!
//!     cargo bench -p analyzer-core --bench front_end [-- SECTIONS]
//!
//! The design is a generated RC line of SECTIONS sections (default 100,000: 200,002 parts,
//! about 12 MB of TOML), the case `benches/reference/compare.py` also times with scipy.
//! Peak memory is measured on the binary: `/usr/bin/time -f %M analyzer check FILE`.

use analyzer_core::design;
use analyzer_core::response::Analysis;
use analyzer_core::sweep::{self, SweepOptions};
use std::time::{Duration, Instant};

#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// The RC line as design text: a 1 V source, SECTIONS series resistors with shunt
/// capacitors, a load, and the transfer ratio; 19 log points from 1 kHz to 100 MHz.
pub fn rc_line(sections: usize) -> String {
    let mut s = String::with_capacity(sections * 120 + 512);
    s.push_str("title = \"RC line (benchmark)\"\n[sweep]\nfrom = \"1 kHz\"\nto = \"100 MHz\"\nper_decade = 3.6\n[parts]\nV1 = { voltage = \"1 V\", between = [\"n0\", \"gnd\"] }\n");
    for k in 0..sections {
        s.push_str(&format!(
            "R{k} = {{ resistor = \"10\", between = [\"n{k}\", \"n{}\"] }}\nC{k} = {{ capacitor = \"1p\", between = [\"n{}\", \"gnd\"] }}\n",
            k + 1,
            k + 1
        ));
    }
    s.push_str(&format!(
        "RL = {{ resistor = \"1k\", between = [\"n{sections}\", \"gnd\"] }}\n[responses]\ngain = {{ ratio = [\"n{sections}\", \"n0\"] }}\n"
    ));
    s
}

fn main() {
    let sections: usize = std::env::args()
        .skip(1)
        .find_map(|a| a.parse().ok())
        .unwrap_or(100_000);
    let text = rc_line(sections);
    println!(
        "RC line, {sections} sections, {} parts, {:.1} MB of TOML",
        2 * sections + 2,
        text.len() as f64 / 1e6
    );
    let runs = 5;
    let mut best = [Duration::MAX; 5];
    for _ in 0..runs {
        let t0 = Instant::now();
        let d = design::parse(&text).expect("design");
        let t1 = Instant::now();
        let grid = d.sweep.grid().expect("grid");
        let a = Analysis::new(d.network, d.responses).expect("analysis");
        let t2 = Instant::now();
        let ev = a.evaluator().expect("evaluator");
        let t3 = Instant::now();
        let s = sweep::run(&ev, &grid, &SweepOptions::default()).expect("sweep");
        let t4 = Instant::now();
        assert_eq!(s.freqs.len(), grid.len());
        for (b, t) in best
            .iter_mut()
            .zip([t1 - t0, t2 - t1, t3 - t2, t4 - t3, t4 - t0])
        {
            *b = (*b).min(t);
        }
        drop(a);
    }
    let ms = |d: Duration| d.as_secs_f64() * 1e3;
    println!("  read (parse + build network)     {:8.1} ms", ms(best[0]));
    println!("  check topology + assemble        {:8.1} ms", ms(best[1]));
    println!("  prepare solver (ordering)        {:8.1} ms", ms(best[2]));
    println!("  solve 19 points                  {:8.1} ms", ms(best[3]));
    println!("  end to end (fastest run)         {:8.1} ms", ms(best[4]));
}
