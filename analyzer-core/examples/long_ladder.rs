//! A 100,000-section RLC ladder (300,003 unknowns) built through the library's builder, no
//! design file, swept over 3 decades on the sparse path.
//! Run: `cargo run --release -p analyzer-core --example long_ladder [SECTIONS]`.

use analyzer_core::ladders::{ladder_gain, rlc_ladder};
use analyzer_core::response::Analysis;
use analyzer_core::sweep::{self, Grid, SweepOptions};
use analyzer_core::units::format_eng;
use std::time::Instant;

// The binaries' allocator (see analyzer-cli): benches measure what users run.
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let sections: usize = std::env::args()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(100_000);
    let t = Instant::now();
    // Each section: 0.1 mΩ and 10 nH in series, 10 pF to ground. 100,000 of them make a
    // slightly lossy line of √(L/C) ≈ 31.6 Ω and about 31.6 µs delay, between 50 Ω ends:
    // its response ripples every 1/(2·31.6 µs) ≈ 15.8 kHz.
    let net = rlc_ladder(sections, 1e-4, 1e-8, 1e-11, 50.0, 50.0)?;
    let spec = ladder_gain(&net, sections).ok_or("no output node")?;
    let analysis = Analysis::new(net, vec![spec])?;
    let ev = analysis.evaluator()?;
    println!(
        "{sections} sections, {} unknowns, {:?} path, built and analysed in {:.2} s",
        analysis.system().n,
        ev.solver_kind(),
        t.elapsed().as_secs_f64()
    );
    let grid = Grid::log(1e3, 1e6, 10.0)?;
    let t = Instant::now();
    let s = sweep::run(&ev, &grid, &SweepOptions::default())?;
    let dt = t.elapsed().as_secs_f64();
    println!(
        "{} points in {:.2} s ({:.1} ms per point)",
        grid.len(),
        dt,
        dt / grid.len() as f64 * 1e3
    );
    for k in (0..grid.len()).step_by(10) {
        let h = s.values[0][k];
        println!(
            "  {:>12}  {:8.3} dB  {:10.1}°",
            format_eng(s.freqs[k], 4, "Hz"),
            20.0 * h.norm().log10(),
            h.arg().to_degrees()
        );
    }
    Ok(())
}
